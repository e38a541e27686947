# ruff: noqa: E402 - thread limits must be set before numpy is imported
"""Benchmark: mfbridge against a plain direct-minimisation baseline on the 1D LQ bridge.

Usage::

    python experiments/bench_baseline.py [--quick] [--out experiments/results]

Problem (exact answer from ``lq_bridge``): U = x²/2, W = 1.5 x²/2, σ = 1, T = 1,
μ = N(-1, 0.4²), ν = N(1.2, 0.7²), box [-6, 6].

Methods, run in one process on the same problems:

* **mfbridge**: ``solve_bridge(problem, SolverOptions())`` (default operator route);
* **baseline**: what a user would write without the package — discretise the action

  .. math:: J(\\rho) = \\frac{1}{2\\sigma^2}\\int_0^T\\!\\!\\int |v - b[\\rho]|^2\\rho\\,dx\\,dt,
     \\qquad b = -\\partial_x(U + W*\\rho) - \\tfrac{\\sigma^2}{2}\\partial_x\\log\\rho,

  directly (continuity exact through the cumulative mass: the flux through a face is minus the
  time derivative of the mass on its left; central differences in space, midpoint in time;
  interior densities as a softmax of logits per time slice; fixed end masses) and minimise it
  with ``scipy.optimize.minimize(method="L-BFGS-B", jac=True)`` using the hand-derived adjoint
  gradient below, warm-started from the linear interpolation of the end masses.

Measured: relative cost error against the exact cost over a ladder of resolutions (n, K) for
each method, CPU and wall time (mfbridge: minimum over 2 repeats under ``REPEAT_BELOW`` s), time
per outer iteration, Sinkhorn iterations (mfbridge), L-BFGS iterations (baseline), peak traced
memory (``tracemalloc``, in a separate untimed run), the time each method needs to reach a
relative cost error of 1e-3 and 1e-4 and their ratio, and the growth exponents of mfbridge's
time in n (fixed K) and in K (fixed n).

"Time to reach an error e" = the smallest CPU time over the method's ladder among resolutions
whose error is below e and stays below e at every finer resolution of that ladder (finer = both
n and K at least as large). For the baseline, the time of a resolution is the CPU time for
L-BFGS-B to reach its own convergence (max |∂J/∂z| ≤ ``GTOL``); the run is continued to a
10× tighter tolerance (for at most ``TIGHTEN_BUDGET`` more CPU seconds) to check that the
optimisation error at ``GTOL`` is below the discretisation error (column "opt. err").

Writes ``bench_baseline.md``, ``bench_baseline.json`` and ``bench_baseline.png``.
"""

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS",
             "NUMEXPR_NUM_THREADS", "VECLIB_MAXIMUM_THREADS"):
    os.environ[_var] = "1"

import argparse
import itertools
import json
import math
import platform
import sys
import time
import tracemalloc
from pathlib import Path
from typing import Any

import numpy as np
import scipy
import scipy.optimize
from study_common import ROOT, UPDATE_FLAG, add_output_flag, output_dir

from mfbridge.model.endpoints import Gaussian
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import Harmonic, HarmonicInteraction
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics.reference import PairField
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge
from mfbridge.solvers.linear_quadratic import lq_bridge

# ----------------------------------------------------------------------------- settings

STIFFNESS, STRENGTH, NOISE, HORIZON = 1.0, 1.5, 1.0, 1.0
MEAN0, COV0, MEAN1, COV1 = -1.0, 0.16, 1.2, 0.49
LOWER, UPPER = -6.0, 6.0
TARGETS = (1e-3, 1e-4)
GOAL = {"speedup": 20.0, "seconds": 1.0, "error": 1e-4}
REPEAT_BELOW = 2.0  # seconds: runs faster than this are timed twice (minimum reported)
GTOL = 1e-6  # baseline convergence: max |dJ/dz| over all logits
TIGHTEN = 10.0  # the check run continues to GTOL / TIGHTEN
MAXITER = 1_000_000
BASELINE_BUDGET = 240.0  # CPU seconds per baseline run before it is cut off
TIGHTEN_BUDGET = 30.0  # CPU seconds allowed for the tightening check after convergence

FULL = {
    "mf": [(96, 12), (96, 24), (192, 24), (192, 48), (384, 48), (384, 96), (768, 96),
           (768, 192)],
    "base": [(48, 6), (96, 12), (192, 24), (384, 48), (768, 96)],
    "scale_n": (192, 384, 768, 1536),
    "scale_K": (25, 50, 100, 200),
}
QUICK = {
    "mf": [(96, 12), (192, 24), (384, 48)],
    "base": [(48, 6), (96, 12)],
    "scale_n": (192, 384),
    "scale_K": (25, 50),
}


def log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def exact_cost() -> float:
    return float(lq_bridge(stiffness=STIFFNESS, strength=STRENGTH, noise=NOISE, horizon=HORIZON,
                           mean0=MEAN0, cov0=COV0, mean1=MEAN1, cov1=COV1).cost)


def make_problem(n: int, steps: int) -> BridgeProblem:
    return BridgeProblem(
        grid=Grid(LOWER, UPPER, n), initial=Gaussian(MEAN0, COV0), final=Gaussian(MEAN1, COV1),
        noise=NOISE, horizon=HORIZON, steps=steps, confinement=Harmonic(STIFFNESS),
        interaction=HarmonicInteraction(STRENGTH),
    )


# ----------------------------------------------------------------------------- baseline


def _diff_adjoint(bar: np.ndarray) -> np.ndarray:
    """Adjoint of ``np.diff(x, axis=-1)``: maps (..., n-1) to (..., n)."""
    pad = np.zeros((*bar.shape[:-1], 1))
    return np.concatenate([pad, bar], axis=-1) - np.concatenate([bar, pad], axis=-1)


class DirectAction:
    """The discretised action J of a mass flow on an n-cell grid with K time steps, as a
    function of the interior logits z (shape (K-1, n), p_k = softmax(z_k)), with its gradient.

    Forward pass (masses p_k, k = 0..K, p_0 = μ, p_K = ν fixed; Δ = difference between
    neighbouring cells; h the cell width; dt = T/K):

    * C_k = mass left of each interior face, F_k = -(C_{k+1} - C_k)/dt (exact continuity);
    * m_k = (p_k + p_{k+1})/2, f_k = face average of m_k, Φ_k = U + W*m_k;
    * R_k = -(f_k ΔΦ_k + σ²/2 Δm_k)/h² (the flux of the uncontrolled mean-field drift);
    * J = dt/(2σ²) Σ_k Σ_faces h² (F_k - R_k)²/f_k.

    The gradient is the hand-written reverse sweep of exactly these steps (W is even, so the
    convolution is its own adjoint).
    """

    def __init__(self, n: int, steps: int) -> None:
        grid = Grid(LOWER, UPPER, n)
        self.n, self.steps = n, steps
        self.h = float(grid.spacing[0])
        self.dt = HORIZON / steps
        self.start = Gaussian(MEAN0, COV0).masses(grid)
        self.end = Gaussian(MEAN1, COV1).masses(grid)
        self.confinement = Harmonic(STIFFNESS).value(grid.points)
        self.pair = PairField(grid, HarmonicInteraction(STRENGTH))
        self.evaluations = 0

    def masses(self, z: np.ndarray) -> np.ndarray:
        z = z.reshape(self.steps - 1, self.n)
        e = np.exp(z - z.max(axis=1, keepdims=True))
        inner = e / e.sum(axis=1, keepdims=True)
        return np.concatenate([self.start[None], inner, self.end[None]])

    def warm_start(self) -> np.ndarray:
        t = np.arange(1, self.steps)[:, None] / self.steps
        return np.log((1 - t) * self.start + t * self.end).ravel()

    def __call__(self, z: np.ndarray) -> tuple[float, np.ndarray]:
        self.evaluations += 1
        h2, dt, s2 = self.h**2, self.dt, NOISE**2
        p = self.masses(z)
        left = np.cumsum(p, axis=1)[:, :-1]
        right = np.cumsum(p[:, ::-1], axis=1)[:, ::-1][:, 1:]
        # difference the smaller tail, so the tails keep their relative precision (the two
        # agree up to rounding, since left + right = 1 on every slice)
        flux = np.where(0.5 * (left[1:] + left[:-1]) < 0.5,
                        -(left[1:] - left[:-1]) / dt, (right[1:] - right[:-1]) / dt)
        mid = 0.5 * (p[1:] + p[:-1])
        face = 0.5 * (mid[:, :-1] + mid[:, 1:])
        dphi = np.diff(self.confinement + self.pair(mid), axis=1)
        ref = -(face * dphi + 0.5 * s2 * np.diff(mid, axis=1)) / h2
        gap = flux - ref
        value = dt / (2 * s2) * float(np.sum(gap**2 * h2 / face))
        # reverse sweep
        g_gap = dt / s2 * gap * h2 / face  # dJ/dF = -dJ/dR
        g_face = -dt / (2 * s2) * gap**2 * h2 / face**2 + g_gap * dphi / h2
        g_mid = self.pair(_diff_adjoint(g_gap * face / h2))
        g_mid += _diff_adjoint(g_gap * (0.5 * s2 / h2))
        g_mid[:, :-1] += 0.5 * g_face
        g_mid[:, 1:] += 0.5 * g_face
        g_left = np.zeros_like(left)
        g_left[1:] -= g_gap / dt
        g_left[:-1] += g_gap / dt
        g_p = np.zeros_like(p)
        g_p[1:] += 0.5 * g_mid
        g_p[:-1] += 0.5 * g_mid
        # C_i = sum_{l <= i} p_l for faces i = 0..n-2: dC_i/dp_l = 1 for l <= i
        g_p[:, :-1] += np.cumsum(g_left[:, ::-1], axis=1)[:, ::-1]
        inner, g_inner = p[1:-1], g_p[1:-1]
        g_z = inner * (g_inner - np.sum(inner * g_inner, axis=1, keepdims=True))
        return value, g_z.ravel()


class _Budget(Exception):
    pass


def run_baseline(n: int, steps: int, exact: float, budget: float = BASELINE_BUDGET
                 ) -> dict[str, Any]:
    """Minimise J with L-BFGS-B to GTOL / TIGHTEN (or the CPU budget), recording every
    iteration; the reported run is the prefix up to the first iterate with max|g| ≤ GTOL."""
    action = DirectAction(n, steps)
    cpu0, wall0 = time.process_time(), time.perf_counter()
    last: dict[str, float] = {}
    trace: list[tuple[float, float, float, float]] = []  # cpu, wall, J, max|g|

    def fun(z: np.ndarray) -> tuple[float, np.ndarray]:
        value, grad = action(z)
        last["g"] = float(np.abs(grad).max())
        return value, grad

    def callback(intermediate_result: Any) -> None:
        cpu = time.process_time() - cpu0
        trace.append((cpu, time.perf_counter() - wall0, float(intermediate_result.fun),
                      last["g"]))
        if last["g"] <= GTOL and "converged_at" not in last:
            last["converged_at"] = cpu
        if cpu > min(budget, last.get("converged_at", math.inf) + TIGHTEN_BUDGET):
            raise StopIteration

    result = scipy.optimize.minimize(
        fun, action.warm_start(), jac=True, method="L-BFGS-B", callback=callback,
        options={"maxiter": MAXITER, "maxfun": 2 * MAXITER, "gtol": GTOL / TIGHTEN,
                 "ftol": 0.0, "maxcor": 10})
    stop = next((i for i, row in enumerate(trace) if row[3] <= GTOL), None)
    converged = stop is not None
    i = stop if converged else len(trace) - 1
    cpu, wall, value, _ = trace[i]
    final = trace[-1][2]
    err = abs(value - exact) / exact
    first = {f"{e:g}": next((row[0] for row in trace if abs(row[2] - exact) / exact <= e), None)
             for e in TARGETS}
    return {
        "method": "baseline", "n": n, "K": steps, "cost": value, "rel_err": err,
        "cpu": cpu, "wall": wall, "iterations": i + 1, "evaluations": action.evaluations,
        "per_iter": cpu / (i + 1), "converged": converged,
        "opt_err": abs(value - final) / exact,
        "tight_converged": bool(trace[-1][3] <= GTOL / TIGHTEN),
        "tight_cpu": trace[-1][0], "first_within": first, "message": str(result.message),
        "curve": [(row[0], abs(row[2] - exact) / exact) for row in trace[:: max(1, len(trace)
                                                                               // 300)]],
    }


def baseline_peak_memory(n: int, steps: int, iterations: int = 30) -> float:
    """Peak traced memory (MiB) of a short L-BFGS-B run: the working set is reached within
    the first iterations (L-BFGS keeps a fixed number of correction pairs)."""
    action = DirectAction(n, steps)
    tracemalloc.start()
    scipy.optimize.minimize(action, action.warm_start(), jac=True, method="L-BFGS-B",
                            options={"maxiter": iterations, "maxcor": 10})
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return peak / 2**20


# ----------------------------------------------------------------------------- mfbridge


def mf_once(n: int, steps: int) -> tuple[Any, float, float]:
    problem = make_problem(n, steps)
    cpu0, wall0 = time.process_time(), time.perf_counter()
    result = solve_bridge(problem, SolverOptions())
    return result, time.process_time() - cpu0, time.perf_counter() - wall0


def run_mf(n: int, steps: int, exact: float, memory: bool = True) -> dict[str, Any]:
    result, cpu, wall = mf_once(n, steps)
    if cpu < REPEAT_BELOW:
        _, cpu2, wall2 = mf_once(n, steps)
        cpu, wall = min(cpu, cpu2), min(wall, wall2)
    peak = math.nan
    if memory:
        tracemalloc.start()
        solve_bridge(make_problem(n, steps), SolverOptions())
        peak = tracemalloc.get_traced_memory()[1] / 2**20
        tracemalloc.stop()
    sinkhorn = [int(h.get("sinkhorn_iterations", 0)) for h in result.history]
    return {
        "method": "mfbridge", "n": n, "K": steps, "cost": float(result.cost),
        "rel_err": abs(float(result.cost) - exact) / exact, "cpu": cpu, "wall": wall,
        "iterations": int(result.iterations), "per_iter": cpu / max(1, int(result.iterations)),
        "sinkhorn": int(sum(sinkhorn)), "converged": bool(result.converged),
        "solver_total": float(result.timings["total"]), "peak_mib": peak,
    }


# ----------------------------------------------------------------------------- analysis


def time_to_reach(rows: list[dict[str, Any]], target: float) -> dict[str, Any] | None:
    """Cheapest resolution whose error is below target and stays below at every finer one."""
    ok = []
    for row in rows:
        finer = [r for r in rows if r["n"] >= row["n"] and r["K"] >= row["K"]]
        if all(r["rel_err"] <= target for r in finer):
            ok.append(row)
    return min(ok, key=lambda r: r["cpu"]) if ok else None


def extrapolate(rows: list[dict[str, Any]], target: float) -> dict[str, float] | None:
    """Baseline CPU time at the target error, extrapolated along its ladder (K ∝ n) from
    power-law fits err ∝ n^-a and CPU ∝ n^b over its converged runs; an estimate only."""
    rows = [r for r in rows if r["converged"]]
    if len(rows) < 2:
        return None
    ns = [float(r["n"]) for r in rows]
    slope_err = growth(ns, [r["rel_err"] for r in rows])
    fit_cpu = np.polyfit(np.log(ns), np.log([r["cpu"] for r in rows]), 1)
    fit_err = np.polyfit(np.log(ns), np.log([r["rel_err"] for r in rows]), 1)
    if slope_err >= 0:
        return None
    n_star = math.exp((math.log(target) - fit_err[1]) / fit_err[0])
    return {"n": n_star, "cpu": float(math.exp(np.polyval(fit_cpu, math.log(n_star)))),
            "err_order_in_n": -slope_err, "cpu_exponent_in_n": float(fit_cpu[0])}


def growth(xs: list[float], ts: list[float]) -> float:
    return float(np.polyfit(np.log(xs), np.log(ts), 1)[0])


def fmt(x: float | None, spec: str = ".3g") -> str:
    return "—" if x is None or (isinstance(x, float) and math.isnan(x)) else format(x, spec)


def tables(data: dict[str, Any]) -> str:
    out = [f"# mfbridge against a direct L-BFGS-B baseline (1D LQ, box [{LOWER:g}, {UPPER:g}])",
           "", f"Exact cost {data['exact']:.10g}. CPU = `time.process_time`; "
           f"min over 2 repeats for mfbridge runs under {REPEAT_BELOW:g} s. "
           f"Baseline converged at max|∂J/∂z| ≤ {GTOL:g}; 'opt. err' = change of J when "
           f"continuing to {GTOL / TIGHTEN:g} (or for at most {TIGHTEN_BUDGET:g} s CPU more), "
           "relative to the exact cost.", "",
           "## Runs", "",
           "| method | n | K | rel. cost err | CPU s | wall s | outer it. | CPU s / it. "
           "| Sinkhorn it. | peak MiB | opt. err |",
           "|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in data["mf"] + data["base"]:
        conv = "" if r["converged"] else " (not conv.)"
        out.append(
            f"| {r['method']} | {r['n']} | {r['K']} | {r['rel_err']:.2e} | {r['cpu']:.3f}{conv} "
            f"| {r['wall']:.3f} | {r['iterations']} | {r['per_iter']:.2e} "
            f"| {r.get('sinkhorn', '—')} | {fmt(r.get('peak_mib'), '.1f')} "
            f"| {fmt(r.get('opt_err'), '.1e')} |")
    out += ["", "## Time to reach a relative cost error", "",
            "| mfbridge ladder | target | mfbridge (n, K) | mfbridge CPU s | baseline (n, K) "
            "| baseline CPU s "
            "| ratio baseline / mfbridge | baseline extrapolated (n, CPU s) "
            "| extrapolated ratio |", "|---|---|---|---|---|---|---|---|---|"]
    for t in data["reach"]:
        mf, base = t["mfbridge"], t["baseline"]
        mf_txt = f"({mf['n']}, {mf['K']})" if mf else "not reached"
        base_txt = f"({base['n']}, {base['K']})" if base else "not reached"
        ratio = t["ratio"]
        ratio_txt = (f"{ratio:.3g}" if t["ratio_kind"] == "exact" else
                     f"> {ratio:.3g}" if ratio is not None else "—")
        ex = t["baseline_extrapolated"]
        ex_txt = f"({ex['n']:.0f}, {ex['cpu']:.3g})" if ex else "—"
        ex_ratio = fmt(ex["cpu"] / mf["cpu"]) if ex and mf else "—"
        out.append(f"| {t['ladder']} | {t['target']:g} | {mf_txt} | {fmt(mf and mf['cpu'])} "
                   f"| {base_txt} "
                   f"| {fmt(base and base['cpu'])} | {ratio_txt} | {ex_txt} | {ex_ratio} |")
    out += ["", "When the baseline does not reach a target on its ladder, the ratio is a lower "
            "bound: the CPU time of its finest run over mfbridge's time. The extrapolated "
            "columns fit err ∝ n^-a and CPU ∝ n^b over the baseline's converged runs (K = n/8) "
            "and solve for the target: an estimate, not a measurement. Ladder 'all' uses every "
            "mfbridge run (finer = both n and K at least as large); 'K = n/8' only the "
            "diagonal, the same shape as the baseline's ladder. The target below is judged on "
            "'all'.", "",
            "## Growth of mfbridge's CPU time", "",
            "| sweep | values | CPU s | fitted exponent |", "|---|---|---|---|"]
    for key, label in (("scale_n", f"n (K = {data['scale_K_fixed']})"),
                       ("scale_K", f"K (n = {data['scale_n_fixed']})")):
        s = data[key]
        out.append(f"| {label} | {', '.join(str(v) for v in s['values'])} "
                   f"| {', '.join(f'{c:.3f}' for c in s['cpu'])} | {s['exponent']:.2f} |")
    g = data["goal"]
    out += ["", "## Target", "",
            f"mfbridge reaches {GOAL['error']:g} relative cost error at least "
            f"{GOAL['speedup']:g}× faster than the baseline and in under {GOAL['seconds']:g} s: "
            f"**{'met' if g['met'] else 'not met'}** ({g['text']}).", ""]
    return "\n".join(out)


def figure(data: dict[str, Any], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(7, 5))
    for r in data["base"]:
        xs, ys = zip(*r["curve"], strict=True)
        ax.loglog(xs, ys, color="0.75", lw=0.8)
    ax.plot([], [], color="0.75", lw=0.8, label="baseline L-BFGS-B trajectories")
    mf = data["mf"]
    ax.loglog([r["cpu"] for r in mf], [r["rel_err"] for r in mf], "o", color="C0",
              label="mfbridge (ladder of n, K)")
    for r in mf:
        ax.annotate(f"{r['n']},{r['K']}", (r["cpu"], r["rel_err"]), fontsize=7,
                    xytext=(3, 3), textcoords="offset points")
    base = data["base"]
    ax.loglog([r["cpu"] for r in base], [r["rel_err"] for r in base], "s", color="C3",
              label=f"baseline at max|g| ≤ {GTOL:g}")
    for r in base:
        ax.annotate(f"{r['n']},{r['K']}", (r["cpu"], r["rel_err"]), fontsize=7,
                    xytext=(3, -9), textcoords="offset points")
    for t in TARGETS:
        ax.axhline(t, color="k", ls=":", lw=0.8)
    ax.set_xlabel("CPU time (s)")
    ax.set_ylabel("relative cost error")
    ax.set_title("1D linear-quadratic bridge: error against CPU time")
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=130)
    plt.close(fig)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--out", type=Path, default=None, help="output folder (default: "
                        "experiments/out/results, or experiments/results with --update-committed)")
    add_output_flag(parser)
    args = parser.parse_args()
    if args.out is None:
        args.out = output_dir(ROOT / "experiments" / "results",
                              [UPDATE_FLAG] if args.update_committed else [])
    cfg = QUICK if args.quick else FULL
    exact = exact_cost()
    data: dict[str, Any] = {"exact": exact, "quick": args.quick, "gtol": GTOL,
                            "platform": platform.platform(), "python": sys.version.split()[0],
                            "numpy": np.__version__, "scipy": scipy.__version__}
    data["mf"] = []
    for n, k in cfg["mf"]:
        data["mf"].append(run_mf(n, k, exact))
        log(f"mfbridge n={n} K={k}: err {data['mf'][-1]['rel_err']:.2e} "
            f"cpu {data['mf'][-1]['cpu']:.3f}")
    data["base"] = []
    for n, k in cfg["base"]:
        row = run_baseline(n, k, exact)
        row["peak_mib"] = baseline_peak_memory(n, k)
        data["base"].append(row)
        log(f"baseline n={n} K={k}: err {row['rel_err']:.2e} cpu {row['cpu']:.2f} "
            f"it {row['iterations']} opt {row['opt_err']:.1e}")
    data["reach"] = []
    ladders = {"all": data["mf"], "K = n/8": [r for r in data["mf"] if 8 * r["K"] == r["n"]]}
    for (ladder, mf_rows), target in itertools.product(ladders.items(), TARGETS):
        mf, base = time_to_reach(mf_rows, target), time_to_reach(data["base"], target)
        ratio, kind = None, "none"
        if mf and base:
            ratio, kind = base["cpu"] / mf["cpu"], "exact"
        elif mf:
            finest = max(data["base"], key=lambda r: r["cpu"])
            ratio, kind = finest["cpu"] / mf["cpu"], "lower bound"
        data["reach"].append({"ladder": ladder, "target": target, "mfbridge": mf, "baseline": base,
                              "ratio": ratio, "ratio_kind": kind,
                              "baseline_extrapolated": extrapolate(data["base"], target)})
    kn = cfg["scale_K"][1]
    nk = cfg["scale_n"][1]
    data["scale_K_fixed"], data["scale_n_fixed"] = kn, nk
    for key, values, make in (("scale_n", cfg["scale_n"], lambda v: (v, kn)),
                              ("scale_K", cfg["scale_K"], lambda v: (nk, v))):
        rows = [run_mf(*make(v), exact, memory=False) for v in values]
        cpus = [r["cpu"] for r in rows]
        data[key] = {"values": list(values), "cpu": cpus, "exponent": growth(values, cpus)}
        log(f"{key}: {cpus}")
    goal = next(t for t in data["reach"] if t["target"] == GOAL["error"] and t["ladder"] == "all")
    mf = goal["mfbridge"]
    met = bool(mf and mf["cpu"] < GOAL["seconds"] and goal["ratio"] is not None
               and goal["ratio"] >= GOAL["speedup"])
    text = (f"mfbridge {fmt(mf and mf['cpu'])} s CPU; speed-up "
            f"{'>' if goal['ratio_kind'] == 'lower bound' else ''}"
            f"{fmt(goal['ratio'])}" + ("" if goal["baseline"] else
                                      ", baseline never reached the target on its ladder"))
    data["goal"] = {"met": met, "text": text}
    args.out.mkdir(parents=True, exist_ok=True)
    md = tables(data)
    print(md)
    (args.out / "bench_baseline.md").write_text(md)
    (args.out / "bench_baseline.json").write_text(json.dumps(data, indent=1, default=str))
    figure(data, args.out / "bench_baseline.png")


if __name__ == "__main__":
    main()
