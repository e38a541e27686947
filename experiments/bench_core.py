# ruff: noqa: E402 - thread limits must be set before numpy is imported
"""Benchmark of the core mean-field Schrödinger bridge solver.

Usage::

    python experiments/bench_core.py [--quick] [--out experiments/results]

Measures, on the linear-quadratic reference case (U = x²/2, W = 1.5 x²/2, σ = 1, T = 1,
μ = N(-1, 0.4²), ν = N(1.2, 0.7²)) where the exact bridge is known (``lq_bridge``):

1. accuracy and time of the operator route over a grid of (n, K) on the box [-4, 4]
   (Table 1, with targets at n = 512, K = 100) and on the wider box [-6, 6] (Table 1b, same
   cell width ratio) with fitted convergence orders in K and h;
2. the dense route against the operator route on small problems (Table 2);
3. 2D problems on a 64 × 64 grid, each solved in a fresh process so that peak memory is per
   case (Table 3);
4. the growth exponents of time in n and K;
5. a figure: error against K for several n, and time against n for both routes.

Writes ``bench_core.md``, ``bench_core.json`` and ``bench_core.png`` to the output folder.
Timings are the minimum over repeats (3 repeats for cases under 3 s, else 1) of the
solver's own ``timings["total"]``.
"""

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS",
             "NUMEXPR_NUM_THREADS", "VECLIB_MAXIMUM_THREADS"):
    os.environ[_var] = "1"

import argparse
import itertools
import json
import math
import multiprocessing
import platform
import resource
import sys
import time
import tracemalloc
import warnings
from pathlib import Path
from typing import Any

import numpy as np
from study_common import ROOT, UPDATE_FLAG, add_output_flag, output_dir

from mfbridge.errors import ConvergenceWarning
from mfbridge.model.endpoints import Gaussian
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import GaussianCore, Harmonic, HarmonicInteraction
from mfbridge.model.problem import BridgeProblem
from mfbridge.result import BridgeResult
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge
from mfbridge.solvers.linear_quadratic import lq_bridge

# ----------------------------------------------------------------------------- settings

STIFFNESS, STRENGTH, NOISE, HORIZON = 1.0, 1.5, 1.0, 1.0
MEAN0, COV0, MEAN1, COV1 = -1.0, 0.16, 1.2, 0.49
MEAN0_2D, COV0_2D, MEAN1_2D, COV1_2D = [-1.0, 0.5], [0.16, 0.25], [1.2, -0.5], [0.49, 0.3]

REPEAT_BELOW = 3.0  # seconds: cases faster than this are timed 3 times (minimum reported)
DENSE_BUDGET = 60.0  # seconds: dense cases estimated to take longer are skipped

TARGET = {"n": 512, "K": 100, "cost": 1e-3, "mean": 2e-3, "var": 2e-3, "time": 2.0}
TARGET_2D_TIME = 3.0  # seconds, wall: the 2D 64 x 64, K = 50 target of the speed work

FULL = {
    "t1_n": (128, 256, 512, 1024),
    "t1_K": (25, 50, 100, 200),
    "t1b_n": (192, 384, 768, 1536),
    "t2_n": (32, 64, 128),
    "t2_K": (10, 20, 50),
    "t3_n": 64,
    "t3_K": 50,
}
QUICK = {
    "t1_n": (128, 256),
    "t1_K": (25, 50),
    "t1b_n": (192, 384),
    "t2_n": (32, 64),
    "t2_K": (10, 20),
    "t3_n": 32,
    "t3_K": 20,
}


def log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


# ----------------------------------------------------------------------------- solving


def reference_problem(n: int, steps: int, half_width: float = 4.0) -> BridgeProblem:
    return BridgeProblem(
        grid=Grid(-half_width, half_width, n),
        initial=Gaussian(MEAN0, COV0),
        final=Gaussian(MEAN1, COV1),
        noise=NOISE,
        horizon=HORIZON,
        steps=steps,
        confinement=Harmonic(STIFFNESS),
        interaction=HarmonicInteraction(STRENGTH),
    )


def solve_once(problem: BridgeProblem, route: str) -> tuple[BridgeResult, float, float]:
    """One solve: the result, its wall time ``timings["total"]`` and the process CPU time."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        cpu0 = time.process_time()
        result = solve_bridge(problem, SolverOptions(route=route))
        cpu = time.process_time() - cpu0
    return result, float(result.timings["total"]), cpu


class Timed:
    """A solved case with its timings: minimum wall and CPU time over ``runs`` runs."""

    def __init__(self, problem: BridgeProblem, route: str) -> None:
        self.problem, self.route = problem, route
        self.result, self.wall, self.cpu = solve_once(problem, route)
        self.first = self.wall
        self.runs = 1

    def repeat(self) -> None:
        _, wall, cpu = solve_once(self.problem, self.route)
        self.wall, self.cpu = min(self.wall, wall), min(self.cpu, cpu)
        self.runs += 1


def repeat_fast(cases: list[Timed], repeat_below: float = REPEAT_BELOW) -> None:
    """Two more runs of every case whose first run took under ``repeat_below`` seconds.

    The repeats are interleaved (pass 2 over all cases, then pass 3) so that a burst of load
    from other processes does not hit all runs of one case.
    """
    for _ in range(2):
        for case in cases:
            if case.first < repeat_below:
                case.repeat()


def timed_solve(problem: BridgeProblem, route: str) -> Timed:
    case = Timed(problem, route)
    repeat_fast([case])
    return case


def lq_errors(result: BridgeResult, exact: Any) -> dict[str, float]:
    cov_num = np.asarray(result.cov)
    cov_ex = np.asarray(exact.cov)
    signed = (float(result.cost) - float(exact.cost)) / abs(float(exact.cost))
    return {
        "cost": float(result.cost),
        "cost_exact": float(exact.cost),
        "signed_err_cost": signed,
        "err_cost": abs(signed),
        "err_mean": float(np.max(np.abs(np.asarray(result.mean) - np.asarray(exact.mean)))),
        # variance error: the diagonal of the covariance (the whole matrix in 2D)
        "err_var": float(np.max(np.abs(cov_num - cov_ex))),
    }


def sinkhorn_total(result: BridgeResult) -> int:
    return int(sum(h["sinkhorn_iterations"] for h in result.history))


def lq_table_rows(ns: tuple[int, ...], ks: tuple[int, ...], half_width: float,
                  k_common: int) -> list[dict[str, Any]]:
    """Solve the reference case for all (n, K) (operator route), then time the fast ones again.

    ``k_common`` (dividing every K) fixes the common time nodes on which the moments are kept
    for the self-convergence orders.
    """
    cases = []
    for n in ns:
        for k in ks:
            case = Timed(reference_problem(n, k, half_width), "operator")
            log(f"  n={n:5d} K={k:4d} box=±{half_width:g}: {case.result.status}, "
                f"{case.wall:.2f} s")
            cases.append(case)
    repeat_fast(cases)
    rows = []
    for case in cases:
        problem, result = case.problem, case.result
        exact = lq_bridge(stiffness=STIFFNESS, strength=STRENGTH, noise=NOISE, horizon=HORIZON,
                          mean0=MEAN0, cov0=COV0, mean1=MEAN1, cov1=COV1,
                          times=problem.steps + 1)
        stride = problem.steps // k_common
        rows.append({
            "n": problem.grid.shape[0], "K": problem.steps, "box": [-half_width, half_width],
            "h": problem.grid.spacing[0], **lq_errors(result, exact),
            "status": result.status, "iterations": int(result.iterations),
            "sinkhorn": sinkhorn_total(result), "time": case.wall, "cpu": case.cpu,
            "runs": case.runs,
            "mean_common": np.asarray(result.mean)[::stride, 0].tolist(),
            "var_common": np.asarray(result.cov)[::stride, 0, 0].tolist(),
        })
    return rows


# ----------------------------------------------------------------------------- fits


def loglog_slope(x: list[float], y: list[float]) -> float:
    xs, ys = np.asarray(x, float), np.asarray(y, float)
    ok = (xs > 0) & (ys > 0) & np.isfinite(ys)
    if ok.sum() < 2:
        return float("nan")
    return float(np.polyfit(np.log(xs[ok]), np.log(ys[ok]), 1)[0])


def pairwise_orders(x: list[float], y: list[float]) -> list[float]:
    return [math.log(y[i + 1] / y[i]) / math.log(x[i + 1] / x[i])
            if y[i] > 0 and y[i + 1] > 0 else float("nan") for i in range(len(x) - 1)]


def self_convergence(values: list[Any]) -> tuple[list[float], list[float]]:
    """Differences between successive refinements and the orders log2(d_i / d_{i+1}).

    ``values`` are scalars or arrays on common nodes, ordered from coarse to fine, each
    refinement halving the step.
    """
    arrs = [np.atleast_1d(np.asarray(v, float)) for v in values]
    diffs = [float(np.max(np.abs(b - a))) for a, b in itertools.pairwise(arrs)]
    orders = [math.log2(a / b) if a > 0 and b > 0 else float("nan")
              for a, b in itertools.pairwise(diffs)]
    return orders, diffs


def source_digest() -> dict[str, str]:
    """sha256 (12 hex digits) of every mfbridge source file, to detect edits during a run."""
    import hashlib

    import mfbridge

    root = Path(mfbridge.__file__).parent
    return {str(f.relative_to(root)): hashlib.sha256(f.read_bytes()).hexdigest()[:12]
            for f in sorted(root.rglob("*.py"))}


# ----------------------------------------------------------------------------- 2D (child)


def _child_2d(kind: str, n: int, steps: int, queue: Any) -> None:
    """Run in a fresh spawned process: memory run under tracemalloc, then a timed run."""
    try:
        queue.put(_run_2d(kind, n, steps))
    except Exception as exc:  # reported in the table, not raised in the child
        queue.put({"kind": kind, "error": f"{type(exc).__name__}: {exc}"})


def problem_nd(kind: str, n: int, steps: int, mean0: list[float], cov0: list[float],
               mean1: list[float], cov1: list[float]) -> BridgeProblem:
    """The multi-dimensional case: n cells per axis on [-4, 4]^d, diagonal Gaussian endpoints,
    U = |x|²/2, W = GaussianCore(1, 0.5) (``kind="gaussian-core"``) or 1.5|z|²/2 (``"lq"``)."""
    dim = len(mean0)
    interaction = (GaussianCore(strength=1.0, range=0.5) if kind == "gaussian-core"
                   else HarmonicInteraction(STRENGTH))
    return BridgeProblem(
        grid=Grid([-4.0] * dim, [4.0] * dim, [n] * dim),
        initial=Gaussian(mean0, cov0),
        final=Gaussian(mean1, cov1),
        noise=NOISE, horizon=HORIZON, steps=steps,
        confinement=Harmonic(STIFFNESS), interaction=interaction,
    )


def _run_2d(kind: str, n: int, steps: int) -> dict[str, Any]:
    problem = problem_nd(kind, n, steps, MEAN0_2D, COV0_2D, MEAN1_2D, COV1_2D)
    options = SolverOptions(route="operator")
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    hwm_before = vm_hwm_mb()
    tracemalloc.start()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        solve_bridge(problem, options)
    traced_peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    rss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    hwm_after = vm_hwm_mb()
    # timed run(s) without tracemalloc, which slows allocation-heavy code
    timed = timed_solve(problem, "operator")
    result = timed.result
    row: dict[str, Any] = {
        "kind": kind, "n": n, "K": steps, "status": result.status,
        "iterations": int(result.iterations), "sinkhorn": sinkhorn_total(result),
        "cost": float(result.cost), "time": timed.wall, "cpu": timed.cpu,
        "runs": timed.runs,
        "tracemalloc_peak_mb": traced_peak / 2**20,
        "maxrss_before_mb": rss_before / 1024, "maxrss_after_mb": rss_after / 1024,
        "vmhwm_before_mb": hwm_before, "vmhwm_after_mb": hwm_after,
    }
    if kind == "lq":
        exact = lq_bridge(stiffness=STIFFNESS, strength=STRENGTH, noise=NOISE, horizon=HORIZON,
                          mean0=MEAN0_2D, cov0=COV0_2D, mean1=MEAN1_2D, cov1=COV1_2D,
                          times=steps + 1)
        row.update(lq_errors(result, exact))
    return row


def vm_hwm_mb() -> float:
    """Peak resident set of this process image (VmHWM, Linux), in MB; nan if unavailable.

    Unlike ``ru_maxrss`` it is not carried over from the parent through fork + exec.
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return float(line.split()[1]) / 1024
    except OSError:
        pass
    return float("nan")


def in_child(target: Any, args: tuple[Any, ...]) -> dict[str, Any]:
    """Run ``target(*args, queue)`` in a fresh spawned process (its own peak memory) and return
    what it puts on the queue."""
    ctx = multiprocessing.get_context("spawn")
    queue = ctx.Queue()
    proc = ctx.Process(target=target, args=(*args, queue))
    proc.start()
    row = queue.get()
    proc.join()
    return row


def run_2d(kind: str, n: int, steps: int) -> dict[str, Any]:
    row = in_child(_child_2d, (kind, n, steps))
    log(f"  2D {kind} {n}x{n} K={steps}: {row.get('status', row.get('error'))}, "
        f"{row.get('time', float('nan')):.2f} s")
    return row


# ----------------------------------------------------------------------------- markdown


def fmt(x: Any, spec: str = ".2e") -> str:
    if x is None:
        return "—"
    if isinstance(x, float) and not math.isfinite(x):
        return "nan"
    return format(x, spec)


def md_table(header: list[str], rows: list[list[str]]) -> str:
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    lines += ["| " + " | ".join(r) + " |" for r in rows]
    return "\n".join(lines)


def target_check(row: dict[str, Any]) -> tuple[str, bool]:
    checks = [
        (f"rel. cost err {row['err_cost']:.1e} < {TARGET['cost']:g}",
         row["err_cost"] < TARGET["cost"]),
        (f"mean err {row['err_mean']:.1e} < {TARGET['mean']:g}", row["err_mean"] < TARGET["mean"]),
        (f"var err {row['err_var']:.1e} < {TARGET['var']:g}", row["err_var"] < TARGET["var"]),
        (f"status {row['status']}", row["status"] == "converged"),
        (f"time {row['time']:.2f} s (CPU {row['cpu']:.2f} s) < {TARGET['time']:g} s",
         row["time"] < TARGET["time"]),
    ]
    text = "; ".join(f"{t} {'✅' if ok else '❌'}" for t, ok in checks)
    return text, all(ok for _, ok in checks)


def lq_table(rows: list[dict[str, Any]], mark_target: bool) -> str:
    header = ["n", "K", "h", "rel. cost err", "max mean err", "max var err", "status",
              "outer it.", "Sinkhorn it.", "time [s]", "CPU [s]", "note"]
    out = []
    for r in rows:
        note = ""
        if mark_target and r["n"] == TARGET["n"] and r["K"] == TARGET["K"]:
            text, ok = target_check(r)
            note = f"**TARGET ROW ({'met' if ok else 'NOT met'})**: {text}"
        n_txt = f"**{r['n']}**" if note else str(r["n"])
        out.append([n_txt, str(r["K"]), fmt(r["h"], ".4f"), fmt(r["err_cost"]),
                    fmt(r["err_mean"]), fmt(r["err_var"]), r["status"], str(r["iterations"]),
                    str(r["sinkhorn"]), f"{r['time']:.3f}" + ("" if r["runs"] > 1 else "*"),
                    f"{r['cpu']:.3f}", note])
    return md_table(header, out)


# ----------------------------------------------------------------------------- main


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="reduced set (smoke test)")
    parser.add_argument("--out", default=None, help="output folder (default: experiments/out/"
                        "results, or experiments/results with --update-committed)")
    add_output_flag(parser)
    args = parser.parse_args(argv)
    cfg = QUICK if args.quick else FULL
    out_dir = Path(args.out) if args.out else output_dir(
        ROOT / "experiments" / "results", [UPDATE_FLAG] if args.update_committed else [])
    out_dir.mkdir(parents=True, exist_ok=True)
    wall0 = time.perf_counter()
    data: dict[str, Any] = {
        "quick": args.quick,
        "machine": {"python": platform.python_version(), "numpy": np.__version__,
                    "cpus": os.cpu_count(), "platform": platform.platform(),
                    "load_average_at_start": list(os.getloadavg())},
        "config": {k: list(v) if isinstance(v, tuple) else v for k, v in cfg.items()},
        "timing_rule": f"min of timings['total'] (wall) and of process CPU time over 3 "
                       f"interleaved runs if the first < {REPEAT_BELOW} s, else 1 run",
        "sources_at_start": source_digest(),
    }
    md: list[str] = ["# bench_core: mean-field Schrödinger bridge solver benchmark", ""]
    md.append(f"Mode: {'quick' if args.quick else 'full'}; {os.cpu_count()} CPUs, "
              f"load average at start {os.getloadavg()[0]:.2f}; BLAS threads = 1. "
              "Times: solver wall time `timings['total']` and process CPU time, each the "
              "minimum of 3 runs for cases whose first run took under 3 s (repeats "
              "interleaved across the table; `*` = single run). With other processes on the "
              "machine the CPU time is the steadier measure.")
    md.append("")

    # ---- 2D cases first, while this process is small: on Linux a spawned child's ru_maxrss
    # starts from the parent's resident size at fork time
    log("Table 3: 2D (run first)")
    n2, k2 = cfg["t3_n"], cfg["t3_K"]
    t3 = [run_2d(kind, n2, k2) for kind in ("gaussian-core", "lq")]

    # ---- Table 1
    log("Table 1: reference case on [-4, 4], operator route")
    k_common = min(cfg["t1_K"])
    t1 = lq_table_rows(cfg["t1_n"], cfg["t1_K"], 4.0, k_common)
    data["table1"] = t1
    md += ["## Table 1 — reference LQ case on [-4, 4], operator route", "",
           "Errors against the exact (untruncated) `lq_bridge`: relative cost error "
           "|J − J_exact|/J_exact, max over t of |mean error| and |variance error|.", "",
           lq_table(t1, mark_target=True), ""]
    md.append(f"Targets at n = {TARGET['n']}, K = {TARGET['K']}: rel. cost error < "
              f"{TARGET['cost']:g}, mean and variance errors < {TARGET['mean']:g}, converged, "
              f"time < {TARGET['time']:g} s. Note: on [-4, 4] about 3e-5 of ν lies beyond the "
              "wall, which puts a floor of about 1e-4 on these errors (see Table 1b).")
    md.append("")

    # ---- Table 1b
    log("Table 1b: reference case on [-6, 6], operator route")
    t1b = lq_table_rows(cfg["t1b_n"], cfg["t1_K"], 6.0, k_common)
    data["table1b"] = t1b
    md += ["## Table 1b — same case on the wider box [-6, 6] (n × 1.5, same h)", "",
           lq_table(t1b, mark_target=False), ""]
    n_fine, k_fine = max(cfg["t1b_n"]), max(cfg["t1_K"])
    orders: dict[str, Any] = {}
    order_rows = []
    for key, label in (("err_cost", "rel. cost"), ("err_mean", "mean"), ("err_var", "variance")):
        at_n = sorted((r for r in t1b if r["n"] == n_fine), key=lambda r: r["K"])
        at_k = sorted((r for r in t1b if r["K"] == k_fine), key=lambda r: r["h"])
        ks = [r["K"] for r in at_n]
        hs = [r["h"] for r in at_k]
        s_k = loglog_slope(ks, [r[key] for r in at_n])
        s_h = loglog_slope(hs, [r[key] for r in at_k])
        pw_k = pairwise_orders(ks, [r[key] for r in at_n])
        pw_h = pairwise_orders(hs, [r[key] for r in at_k])
        orders[key] = {"slope_K": s_k, "slope_h": s_h, "pairwise_K": pw_k, "pairwise_h": pw_h,
                       "K_values": ks, "h_values": hs}
        order_rows.append([label, f"{s_k:+.2f}", ", ".join(f"{p:+.2f}" for p in pw_k),
                           f"{s_h:+.2f}", ", ".join(f"{p:+.2f}" for p in pw_h)])
    self_rows = []
    for key, label in (("signed_err_cost", "rel. cost"), ("mean_common", "mean"),
                       ("var_common", "variance")):
        at_n = sorted((r for r in t1b if r["n"] == n_fine), key=lambda r: r["K"])
        at_k = sorted((r for r in t1b if r["K"] == k_fine), key=lambda r: r["h"], reverse=True)
        o_k, d_k = self_convergence([r[key] for r in at_n])
        o_h, d_h = self_convergence([r[key] for r in at_k])
        orders[key] = {"self_orders_K": o_k, "self_diffs_K": d_k, "self_orders_h": o_h,
                       "self_diffs_h": d_h}
        self_rows.append([label, ", ".join(fmt(d) for d in d_k),
                          ", ".join(f"{o:.2f}" for o in o_k),
                          ", ".join(fmt(d) for d in d_h), ", ".join(f"{o:.2f}" for o in o_h)])
    data["orders"] = orders
    md += [f"Observed orders (least-squares slope of log error; slope in K at n = {n_fine}, "
           f"expected ≈ −2; slope in h at K = {k_fine}, expected ≈ +2; pairwise = between "
           "successive refinements):", "",
           md_table(["error", "slope vs K", "pairwise vs K", "slope vs h", "pairwise vs h"],
                    order_rows), "",
           "The slopes against the exact solution flatten once the other discretisation error "
           "dominates (the time error at the finest n reaches the spatial error of that n). "
           "Self-convergence removes that floor: differences between successive refinements "
           f"(K → 2K at n = {n_fine}; h → h/2 at K = {k_fine}; signed relative cost, and max "
           f"over the {k_common + 1} common time nodes for mean and variance) and the orders "
           "log2(d_i / d_{i+1}):", "",
           md_table(["quantity", "differences in K", "orders in K", "differences in h",
                     "orders in h"], self_rows), ""]

    # ---- growth exponents (Table 1)
    k_fix, n_fix = (100, 512) if not args.quick else (max(cfg["t1_K"]), max(cfg["t1_n"]))
    at_k = sorted((r for r in t1 if r["K"] == k_fix), key=lambda r: r["n"])
    at_n = sorted((r for r in t1 if r["n"] == n_fix), key=lambda r: r["K"])
    growth: dict[str, Any] = {"n_at_K": k_fix, "K_at_n": n_fix}
    growth_rows = []
    for measure in ("time", "cpu"):
        xn, yn = [r["n"] for r in at_k], [r[measure] for r in at_k]
        xk, yk = [r["K"] for r in at_n], [r[measure] for r in at_n]
        growth[measure] = {"exponent_n": loglog_slope(xn, yn), "exponent_K": loglog_slope(xk, yk),
                           "pairwise_n": pairwise_orders(xn, yn),
                           "pairwise_K": pairwise_orders(xk, yk)}
        g = growth[measure]
        name = "wall" if measure == "time" else "CPU"
        growth_rows += [
            [f"{name} time ∝ n^p at K = {k_fix} (n = {', '.join(map(str, xn))})",
             f"{g['exponent_n']:.2f}", ", ".join(f"{p:.2f}" for p in g["pairwise_n"])],
            [f"{name} time ∝ K^q at n = {n_fix} (K = {', '.join(map(str, xk))})",
             f"{g['exponent_K']:.2f}", ", ".join(f"{p:.2f}" for p in g["pairwise_K"])],
        ]
    data["growth"] = growth
    md += ["## Time growth (Table 1, operator route)", "",
           md_table(["fit", "exponent", "pairwise"], growth_rows), ""]

    # ---- Table 2
    log("Table 2: dense vs operator")
    pairs: list[tuple[int, int, Timed, Timed | None, float]] = []
    dense_done: list[tuple[int, int, float]] = []
    for n in cfg["t2_n"]:
        for k in cfg["t2_K"]:
            # dense cost: O(K n²) to form the kernel + O(n²) per Sinkhorn iteration; scale the
            # closest smaller finished case by (n/n0)^3 (K/K0) to stay on the safe side
            estimate = 0.0
            if dense_done:
                n0, k0, s0 = max(dense_done, key=lambda c: (c[0], c[1]))
                estimate = s0 * (n / n0) ** 3 * max(k / k0, 1.0)
            problem = reference_problem(n, k, 4.0)
            op_case = Timed(problem, "operator")
            de_case = None
            if estimate > DENSE_BUDGET:
                log(f"  n={n} K={k}: dense skipped (estimated {estimate:.0f} s)")
            else:
                de_case = Timed(problem, "dense")
                dense_done.append((n, k, de_case.wall))
                log(f"  n={n} K={k}: dense {de_case.wall:.2f} s, operator {op_case.wall:.2f} s")
            pairs.append((n, k, op_case, de_case, estimate))
    repeat_fast([c for p in pairs for c in (p[2], p[3]) if c is not None])
    t2 = []
    for n, k, op_case, de_case, estimate in pairs:
        op = op_case.result
        row: dict[str, Any] = {"n": n, "K": k, "time_operator": op_case.wall,
                               "cpu_operator": op_case.cpu, "status_operator": op.status,
                               "runs_operator": op_case.runs, "dense_estimate": estimate,
                               "skipped": de_case is None}
        if de_case is not None:
            de = de_case.result
            row.update({
                "time_dense": de_case.wall, "cpu_dense": de_case.cpu, "status_dense": de.status,
                "runs_dense": de_case.runs,
                "max_density_diff": float(np.max(np.abs(de.density - op.density))),
                "max_density": float(np.max(op.density)),
                "cost_diff": abs(float(de.cost) - float(op.cost)),
                "cost": float(op.cost),
                "iterations_dense": int(de.iterations), "iterations_operator": int(op.iterations),
            })
        t2.append(row)
    data["table2"] = t2
    rows2 = []
    for r in t2:
        if r["skipped"]:
            rows2.append([str(r["n"]), str(r["K"]), "—", "—", f"skipped (est. "
                          f"{r['dense_estimate']:.0f} s)", f"{r['time_operator']:.3f}", "—",
                          r["status_operator"]])
        else:
            rows2.append([str(r["n"]), str(r["K"]), fmt(r["max_density_diff"]),
                          fmt(r["cost_diff"]),
                          f"{r['time_dense']:.3f}" + ("" if r["runs_dense"] > 1 else "*"),
                          f"{r['time_operator']:.3f}" + ("" if r["runs_operator"] > 1 else "*"),
                          f"{r['time_dense'] / r['time_operator']:.1f}",
                          f"{r['status_dense']} / {r['status_operator']}"])
    md += ["## Table 2 — dense vs operator route (reference case, box [-4, 4])", "",
           md_table(["n", "K", r"max \|ρ_dense − ρ_op\|", r"\|J_dense − J_op\|", "dense [s]",
                     "operator [s]", "dense/operator", "status (dense / op)"], rows2), "",
           "Densities are per unit length (peak density ≈ 1); the difference is the maximum "
           "over all time nodes and cells.", ""]

    # ---- Table 3
    data["table3"] = t3
    rows3 = []
    for r in t3:
        if "error" in r:
            rows3.append([r["kind"], r["error"]] + ["—"] * 10)
            continue
        errs = (f"{r['err_cost']:.2e} / {r['err_mean']:.2e} / {r['err_var']:.2e}"
                if "err_cost" in r else "—")
        ok = r["status"] == "converged" and r["time"] < TARGET_2D_TIME
        rows3.append([
            ("W = GaussianCore(1, 0.5)" if r["kind"] == "gaussian-core"
             else "W = Harmonic(1.5) (LQ)"),
            f"{r['time']:.2f}" + ("" if r["runs"] > 1 else "*") + f" ({r['cpu']:.2f})",
            str(r["iterations"]),
            str(r["sinkhorn"]), r["status"], f"{r['cost']:.6f}",
            f"{r['tracemalloc_peak_mb']:.1f}",
            f"{r['maxrss_before_mb']:.0f} → {r['maxrss_after_mb']:.0f}",
            f"{r['maxrss_after_mb'] - r['maxrss_before_mb']:.0f}",
            f"{r['vmhwm_before_mb']:.0f} → {r['vmhwm_after_mb']:.0f}", errs,
            f"{'met' if ok else 'NOT met'}",
        ])
    md += [f"## Table 3 — 2D, grid {n2} × {n2} on [-4, 4]², K = {k2}, operator route", "",
           "μ = N([-1, 0.5], diag(0.16, 0.25)), ν = N([1.2, -0.5], diag(0.49, 0.3)), "
           "U = |x|²/2. Each case runs in a fresh spawned process: a first solve under "
           "`tracemalloc` gives the Python-level peak and the `ru_maxrss` change, a second "
           "untraced solve gives the time. These cases run before the 1D tables, while the "
           "parent process is small: on Linux `ru_maxrss` of a spawned child includes the "
           "parent's resident size at fork time (carried through exec), so its \"before\" "
           "value is mostly the parent's; VmHWM (/proc/self/status) is the child's own peak "
           "resident set (imports included).", "",
           md_table(["case", "time [s] (CPU)", "outer it.", "Sinkhorn it.", "status", "cost J",
                     "tracemalloc peak [MB]", "maxrss before → after [MB]",
                     "Δ maxrss [MB]", "VmHWM before → after [MB]",
                     "LQ errors: rel. cost / mean / cov",
                     f"target (converged, < {TARGET_2D_TIME:g} s)"], rows3), ""]

    # ---- figure
    make_figure(out_dir / "bench_core.png", t1, t1b, t2)
    wall = time.perf_counter() - wall0
    data["wall_seconds"] = wall
    data["sources_at_end"] = source_digest()
    if data["sources_at_end"] != data["sources_at_start"]:
        start, end = data["sources_at_start"], data["sources_at_end"]
        names = sorted(k for k in set(start) | set(end) if start.get(k) != end.get(k))
        md.append(f"**WARNING: mfbridge sources changed during this run ({', '.join(names)}); "
                  "the tables may mix code versions (2D cases run in fresh processes).**")
        md.append("")
        log(f"WARNING: mfbridge sources changed during the run: {names}")
    md.append(f"Total benchmark wall time: {wall:.0f} s. Figure: `bench_core.png`.")
    text = "\n".join(md) + "\n"
    print(text)
    (out_dir / "bench_core.md").write_text(text, encoding="utf-8")
    (out_dir / "bench_core.json").write_text(json.dumps(data, indent=2, default=float) + "\n",
                                             encoding="utf-8")
    log(f"wrote {out_dir / 'bench_core.md'}, .json, .png in {wall:.0f} s")
    return 0


def make_figure(path: Path, t1: list[dict[str, Any]], t1b: list[dict[str, Any]],
                t2: list[dict[str, Any]]) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (ax_a, ax_m, ax_b) = plt.subplots(1, 3, figsize=(17, 5))
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    for ax, key, ylabel, title in (
        (ax_a, "err_cost", "relative cost error |J − J_exact| / J_exact",
         "(a) cost error vs K"),
        (ax_m, "err_mean", "max_t |mean − mean_exact|", "(a') mean error vs K"),
    ):
        for i, n in enumerate(sorted({r["n"] for r in t1b})):
            rows = sorted((r for r in t1b if r["n"] == n), key=lambda r: r["K"])
            ax.loglog([r["K"] for r in rows], [r[key] for r in rows], "o-",
                      color=colors[i % len(colors)], label=f"[-6, 6], n = {n}")
        for i, n in enumerate(sorted({r["n"] for r in t1})):
            rows = sorted((r for r in t1 if r["n"] == n), key=lambda r: r["K"])
            ax.loglog([r["K"] for r in rows], [r[key] for r in rows], "x--",
                      color=colors[i % len(colors)], alpha=0.45, label=f"[-4, 4], n = {n}")
        ks = np.array(sorted({r["K"] for r in t1b}), float)
        if ks.size and t1b:
            top = max(r[key] for r in t1b)
            ax.loglog(ks, top * (ks / ks[0]) ** -2, "k:", label="slope −2")
        ax.set_xlabel("time steps K")
        ax.set_ylabel(ylabel)
        ax.set_title(title + " (same h on both boxes)")
        ax.legend(fontsize=7, ncol=2)
        ax.grid(True, which="both", alpha=0.3)

    for j, k in enumerate(sorted({r["K"] for r in t2})):
        rows = sorted((r for r in t2 if r["K"] == k), key=lambda r: r["n"])
        dense = [r for r in rows if not r["skipped"]]
        c = colors[j % len(colors)]
        ax_b.loglog([r["n"] for r in rows], [r["time_operator"] for r in rows], "o-", color=c,
                    label=f"operator, K = {k}")
        if dense:
            ax_b.loglog([r["n"] for r in dense], [r["time_dense"] for r in dense], "s--",
                        color=c, label=f"dense, K = {k}")
    k_big = [k for k in (50, 100) if any(r["K"] == k for r in t1)]
    for j, k in enumerate(k_big):
        rows = sorted((r for r in t1 if r["K"] == k), key=lambda r: r["n"])
        ax_b.loglog([r["n"] for r in rows], [r["time"] for r in rows], "^-",
                    color=colors[(3 + j) % len(colors)], label=f"operator, K = {k} (Table 1)")
    ax_b.set_xlabel("cells n")
    ax_b.set_ylabel("time [s] (min over repeats)")
    ax_b.set_title("(b) wall time vs n, both routes")
    ax_b.legend(fontsize=7)
    ax_b.grid(True, which="both", alpha=0.3)
    fig.tight_layout()
    fig.savefig(path, dpi=130)
    plt.close(fig)


if __name__ == "__main__":
    sys.exit(main())
