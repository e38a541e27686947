# ruff: noqa: E402 - thread limits must be set before numpy is imported
"""Scale benchmark: large 2D and 3D grids in the operator route (time, iterations, memory).

Usage::

    python experiments/bench_scale.py [--quick] [--skip-k100] [--out experiments/results]

Cases (the problems of ``bench_core.py``, extended by a third axis for 3D; U = |x|²/2, σ = 1,
T = 1, box [-4, 4]^d, diagonal Gaussian endpoints):

* 2D 64 × 64, K = 50 and 2D 128 × 128, K = 100 with the Gaussian-core repulsion
  W = exp(-|z|²/(2·0.5²));
* 3D 32³, K = 50 and K = 100 with the same W;
* 3D 32³, K = 50 with the harmonic attraction W = 1.5|z|²/2 (linear-quadratic), compared with
  the exact bridge (``lq_bridge``): with diagonal covariances the 3D problem is three 1D
  problems, and the closed form is the one of ``mfbridge.solvers.linear_quadratic``.

Every case runs alone in a fresh spawned process (one at a time: the big ones need GBs), once
(no repeats). Reported: the solver's own ``timings["total"]`` (wall), outer and Sinkhorn
iterations, wall time per outer iteration, and the peak resident set of the child process
(VmHWM from /proc/self/status: numpy buffers included, interpreter and imports too; the
baseline before the solve is given). The step operators keep, per time step and per axis,
LAPACK ``zgttrf`` factors of the stacked tridiagonal systems of the 10 Talbot poles: four
complex arrays of length 10·cells and an int32 pivot array, 680 bytes per cell; the table
gives this estimate, d·K·cells·680 B, beside the measured peak.

Writes ``bench_scale.md``, ``bench_scale.json``, ``bench_scale.png`` and the standard figures of
the 3D Gaussian-core K = 50 case (``bench_scale_3d/``) to the output folder.
"""

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS",
             "NUMEXPR_NUM_THREADS", "VECLIB_MAXIMUM_THREADS"):
    os.environ[_var] = "1"

import argparse
import json
import platform
import shutil
import sys
import tempfile
import time
import warnings
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_core import (  # the problems of the core benchmark
    COV0_2D,
    COV1_2D,
    HORIZON,
    MEAN0_2D,
    MEAN1_2D,
    NOISE,
    STIFFNESS,
    STRENGTH,
    in_child,
    lq_errors,
    md_table,
    problem_nd,
    sinkhorn_total,
    vm_hwm_mb,
)
from study_common import ROOT, UPDATE_FLAG, add_output_flag, output_dir

from mfbridge.errors import ConvergenceWarning
from mfbridge.numerics.propagator import CONTOUR_POINTS
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge
from mfbridge.solvers.linear_quadratic import lq_bridge

# the third axis: a small offset and variances between those of the first two axes
MEAN0_3D, COV0_3D = [*MEAN0_2D, 0.3], [*COV0_2D, 0.2]
MEAN1_3D, COV1_3D = [*MEAN1_2D, -0.2], [*COV1_2D, 0.36]

# zgttrf of an N-row tridiagonal system (N = poles x cells): dl, du (N-1), d (N), du2 (N-2)
# complex128 and ipiv (N) int32 -> (4 * 16 + 4) bytes per row
LU_BYTES_PER_CELL = (CONTOUR_POINTS // 2) * (4 * 16 + 4)

FULL = [
    ("2D", "gaussian-core", 64, 50),
    ("3D", "gaussian-core", 32, 50),
    ("2D", "gaussian-core", 128, 100),
    ("3D", "lq", 32, 50),
    ("3D", "gaussian-core", 32, 100),
]
QUICK = [
    ("2D", "gaussian-core", 32, 10),
    ("2D", "gaussian-core", 48, 12),
    ("3D", "gaussian-core", 24, 6),
    ("3D", "lq", 24, 6),
]
FIGURE_CASE = {"FULL": ("3D", "gaussian-core", 32, 50), "QUICK": ("3D", "gaussian-core", 24, 6)}


def log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def endpoints(dim: str) -> tuple[list[float], list[float], list[float], list[float]]:
    if dim == "2D":
        return MEAN0_2D, COV0_2D, MEAN1_2D, COV1_2D
    return MEAN0_3D, COV0_3D, MEAN1_3D, COV1_3D


def lu_estimate_mb(d: int, n: int, steps: int) -> float:
    """Bytes of the cached LU factors of all K step operators, in MB (2^20 bytes)."""
    return d * steps * n**d * LU_BYTES_PER_CELL / 2**20


def mem_available_mb() -> float:
    for line in Path("/proc/meminfo").read_text().splitlines():
        if line.startswith("MemAvailable:"):
            return float(line.split()[1]) / 1024
    return float("nan")


# ----------------------------------------------------------------------------- child


def _child(case: tuple[str, str, int, int], figures: str | None, queue: Any) -> None:
    try:
        queue.put(_run(case, figures))
    except Exception as exc:  # reported in the table, not raised in the child
        queue.put({"case": list(case), "error": f"{type(exc).__name__}: {exc}"})


def _run(case: tuple[str, str, int, int], figures: str | None) -> dict[str, Any]:
    dim, kind, n, steps = case
    mean0, cov0, mean1, cov1 = endpoints(dim)
    problem = problem_nd(kind, n, steps, mean0, cov0, mean1, cov1)
    hwm_before = vm_hwm_mb()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        cpu0 = time.process_time()
        result = solve_bridge(problem, SolverOptions(route="operator"))
        cpu = time.process_time() - cpu0
    hwm_after = vm_hwm_mb()
    wall = float(result.timings["total"])
    row: dict[str, Any] = {
        "case": list(case), "dim": dim, "kind": kind, "n": n, "K": steps,
        "cells": problem.grid.size, "status": result.status,
        "iterations": int(result.iterations), "sinkhorn": sinkhorn_total(result),
        "cost": float(result.cost), "time": wall, "cpu": cpu,
        "time_per_outer": wall / max(result.iterations, 1),
        "vmhwm_before_mb": hwm_before, "vmhwm_after_mb": hwm_after,
        "lu_estimate_mb": lu_estimate_mb(problem.grid.dim, n, steps),
    }
    if kind == "lq":
        exact = lq_bridge(stiffness=STIFFNESS, strength=STRENGTH, noise=NOISE, horizon=HORIZON,
                          mean0=mean0, cov0=cov0, mean1=mean1, cov1=cov1, times=steps + 1)
        row.update(lq_errors(result, exact))
    # the result file: save and load time, size on disk
    folder = Path(tempfile.mkdtemp(prefix="bench_scale_"))
    try:
        from mfbridge.runs.api import load

        t0 = time.perf_counter()
        result.save(folder)
        row["save_seconds"] = time.perf_counter() - t0
        row["result_nc_mb"] = (folder / "result.nc").stat().st_size / 2**20
        t0 = time.perf_counter()
        loaded = load(folder)
        row["load_seconds"] = time.perf_counter() - t0
        row["round_trip_exact"] = bool(np.array_equal(loaded.density, result.density))
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    if figures is not None:
        from mfbridge.runs.plotting import plot_result

        t0 = time.perf_counter()
        row["figures"] = [str(p) for p in plot_result(result, figures)]
        row["figure_seconds"] = time.perf_counter() - t0
    return row


def run_case(case: tuple[str, str, int, int], figures: str | None) -> dict[str, Any]:
    row = in_child(_child, (case, figures))
    log(f"  {case}: {row.get('status', row.get('error'))}, {row.get('time', float('nan')):.1f} s,"
        f" peak {row.get('vmhwm_after_mb', float('nan')):.0f} MB")
    return row


# ----------------------------------------------------------------------------- report


def table(rows: list[dict[str, Any]]) -> str:
    header = ["case", "cells", "K", "status", "time [s] (CPU)", "outer it.", "Sinkhorn it.",
              "s / outer it. (CPU)", "peak RSS [MB] (before solve)", "LU estimate [MB]",
              "cost J", "LQ errors: rel. cost / mean / cov", "result.nc [MB] (save, load s)"]
    out = []
    for r in rows:
        name = f"{r['case'][0]} {r['case'][1]} {r['case'][2]}^{r['case'][0][0]}"
        if "error" in r:
            out.append([name, "", str(r["case"][3]), r["error"], *[""] * 9])
            continue
        lq = (f"{r['err_cost']:.2e} / {r['err_mean']:.2e} / {r['err_var']:.2e}"
              if "err_cost" in r else "—")
        out.append([
            name, str(r["cells"]), str(r["K"]), r["status"], f"{r['time']:.1f} ({r['cpu']:.1f})",
            str(r["iterations"]), str(r["sinkhorn"]),
            f"{r['time_per_outer']:.2f} ({r['cpu'] / max(r['iterations'], 1):.2f})",
            f"{r['vmhwm_after_mb']:.0f} ({r['vmhwm_before_mb']:.0f})",
            f"{r['lu_estimate_mb']:.0f}", f"{r['cost']:.6f}", lq,
            f"{r['result_nc_mb']:.0f} ({r['save_seconds']:.1f}, {r['load_seconds']:.1f})",
        ])
    return md_table(header, out)


def figure(rows: list[dict[str, Any]], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    ok = [r for r in rows if "error" not in r]
    fig, (ax_t, ax_m) = plt.subplots(1, 2, figsize=(10, 4))
    for r in ok:
        label = f"{r['dim']} {r['kind']} n={r['n']} K={r['K']}"
        work = r["cells"] * r["K"] * (2 if r["dim"] == "2D" else 3)
        ax_t.loglog(work, r["cpu"] / max(r["iterations"], 1), "o", label=label)
        ax_m.loglog(r["lu_estimate_mb"], r["vmhwm_after_mb"] - r["vmhwm_before_mb"], "s",
                    label=label)
    ax_t.set_xlabel("d × cells × K")
    ax_t.set_ylabel("CPU time per outer iteration [s]")
    ax_t.legend(fontsize=7)
    lim = [min(r["lu_estimate_mb"] for r in ok) / 2, max(r["lu_estimate_mb"] for r in ok) * 4]
    ax_m.loglog(lim, lim, "k:", lw=0.8, label="peak = LU estimate")
    ax_m.set_xlabel("LU factors, estimate [MB]")
    ax_m.set_ylabel("peak RSS growth during the solve [MB]")
    ax_m.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small cases (smoke test)")
    parser.add_argument("--skip-k100", action="store_true", help="leave out 3D 32^3 K = 100")
    parser.add_argument("--out", default=None, help="output folder (default: experiments/out/"
                        "results, or experiments/results with --update-committed)")
    add_output_flag(parser)
    args = parser.parse_args(argv)
    mode = "QUICK" if args.quick else "FULL"
    cases = QUICK if args.quick else FULL
    if args.skip_k100:
        cases = [c for c in cases if not (c[0] == "3D" and c[3] == 100)]
    out = Path(args.out) if args.out else output_dir(
        ROOT / "experiments" / "results", [UPDATE_FLAG] if args.update_committed else [])
    out.mkdir(parents=True, exist_ok=True)
    fig_dir = out / "bench_scale_3d"
    wall0 = time.perf_counter()
    rows: list[dict[str, Any]] = []
    skipped: list[str] = []
    loads: list[float] = []
    md = ""
    for case in cases:
        d = 2 if case[0] == "2D" else 3
        need = lu_estimate_mb(d, case[2], case[3])
        avail = mem_available_mb()
        if need > 0.6 * avail:  # the factors alone would take most of the free memory
            skipped.append(f"{case}: LU estimate {need:.0f} MB > 60% of available {avail:.0f} MB")
            log(f"  skipped {skipped[-1]}")
            continue
        log(f"case {case}: LU estimate {need:.0f} MB, available {avail:.0f} MB")
        figures = str(fig_dir) if case == FIGURE_CASE[mode] else None
        rows.append(run_case(case, figures))
        loads.append(os.getloadavg()[1])
        # written after every case, so a long run can be read (and stopped) half-way
        md = report(out, rows, skipped, mode, time.perf_counter() - wall0, loads)
    print(md)
    return 0


def report(out: Path, rows: list[dict[str, Any]], skipped: list[str], mode: str, total: float,
           loads: list[float]) -> str:
    """Write bench_scale.md, .json and .png for the rows so far; returns the markdown."""
    md = ["# bench_scale: large 2D and 3D grids, operator route", "",
          f"Mode: {mode.lower()}; {os.cpu_count()} CPUs; BLAS threads = 1; python "
          f"{platform.python_version()}, numpy {np.__version__}. Each case ran once, alone, in a "
          "fresh spawned process. 5-minute load average at the end of each case: "
          + ", ".join(f"{x:.1f}" for x in loads) + " (other jobs shared the machine: with a "
          "load above the number of CPUs the wall times are inflated and the CPU times are "
          "the steadier measure).", "",
          "Problems (those of `bench_core.py`): box [-4, 4]^d, U = |x|²/2, σ = 1, T = 1, "
          f"μ = N({MEAN0_3D}, diag{tuple(COV0_3D)}), ν = N({MEAN1_3D}, diag{tuple(COV1_3D)}) in 3D "
          "(the first two coordinates in 2D); W = GaussianCore(1, 0.5) or, for `lq`, "
          "W = 1.5|z|²/2 (exact answer: `lq_bridge`). Solver defaults (tol 1e-9, Anderson 6).",
          "", table(rows), "",
          "Time: the solver's `timings['total']` (wall) and the child's CPU time. "
          "Peak RSS: VmHWM of the child process (/proc/self/status), i.e. the peak resident set "
          "including interpreter, imports and problem set-up; in brackets the value just before "
          "`solve_bridge`. LU estimate: d × K × cells × "
          f"{LU_BYTES_PER_CELL} B, the `zgttrf` factors cached by the step operators "
          "(10 poles × (4 complex128 + 1 int32) per cell, per axis, per step) if every axis "
          "factor used the contour method; in 2D and 3D `method=auto` picks uniformisation, "
          "which caches no factors, so this is an upper bound used to skip cases that would "
          "not fit. "
          "result.nc: size of the saved netCDF and the save/load times (the round trip is "
          "checked bit for bit: "
          + ", ".join(str(r.get("round_trip_exact")) for r in rows if "error" not in r) + ").",
          ""]
    if skipped:
        md += ["Skipped: " + "; ".join(skipped), ""]
    md += [f"Total benchmark wall time: {total:.0f} s. Figure: `bench_scale.png` (left: CPU "
           "time per outer iteration against d × cells × K; right: peak RSS "
           "growth against the LU estimate). 3D figures of the Gaussian-core K = 50 case: "
           "`bench_scale_3d/`.", ""]
    (out / "bench_scale.md").write_text("\n".join(md))
    (out / "bench_scale.json").write_text(json.dumps(
        {"mode": mode, "rows": rows, "skipped": skipped, "total_seconds": total}, indent=1))
    if any("error" not in r for r in rows):
        figure(rows, out / "bench_scale.png")
    return "\n".join(md)


if __name__ == "__main__":
    sys.exit(main())
