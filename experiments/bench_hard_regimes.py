"""Hard regimes (issue 13): strong attraction, the four extreme runs, and the outer method.

Usage::

    python experiments/bench_hard_regimes.py [--n 64 --steps 20] [--budget 600]

Table 1: the demo endpoints with a Gaussian core of strength -10 and -20, range 0.5, σ = 1,
solved by the fixed-point solver with ``outer=anderson`` (the earlier method) and
``outer=auto`` (Anderson, then Newton–Krylov; continuations when far out) in the same run, and
by the direct solver (χ = ρ) for J. Table 2: the four extreme runs of the issue (64 cells × 10
steps), each of which ran past 170 s before: the answer or refusal and its time.

Prints markdown tables; writes them to experiments/out/results/bench_hard_regimes.md (or the
tracked experiments/results/ with --update-committed).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import warnings
from pathlib import Path

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
# measure this checkout's package, not the editable install the interpreter would pick up
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from study_common import add_output_flag, output_dir  # noqa: E402

from mfbridge.errors import InputError  # noqa: E402
from mfbridge.runs.api import build_problem, compose  # noqa: E402
from mfbridge.solvers.direct import DirectOptions, solve_direct  # noqa: E402
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge  # noqa: E402

OUT = output_dir(Path(__file__).resolve().parent / "results")
EXTREME = [
    ["confinement=double_well", "confinement.depth=1e6"],
    ["interaction=gaussian", "interaction.strength=1e6"],
    ["interaction.strength=-1e6"],
    ["interaction=none", "noise=1e-4"],
]


def _quiet(fn, *args):
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = fn(*args)
    return result, time.perf_counter() - t0


def strong_attraction(n: int, steps: int, budget: float) -> list[str]:
    rows = ["| strength | solver | status | outer iterations | seconds | J |",
            "|---|---|---|---|---|---|"]
    for strength in (-10.0, -20.0):
        problem = build_problem(compose([f"interaction.strength={strength}",
                                         "interaction.range=0.5", "noise=1.0",
                                         f"grid.shape={n}", f"steps={steps}"]))
        for outer in ("anderson", "auto"):
            r, t = _quiet(solve_bridge, problem, SolverOptions(outer=outer, time_budget=budget))
            rows.append(f"| {strength:g} | fixed point, outer={outer} | {r.status} | "
                        f"{r.iterations} | {t:.1f} | {r.cost:.7f} |")
            print(rows[-1], flush=True)
        r, t = _quiet(solve_direct, problem, DirectOptions(time_budget=budget))
        rows.append(f"| {strength:g} | direct (χ = ρ) | {r.status} | – | {t:.1f} | "
                    f"{r.cost:.7f} |")
        print(rows[-1], flush=True)
    return rows


def extreme_runs() -> list[str]:
    rows = ["| overrides (64 cells × 10 steps) | answer | seconds |", "|---|---|---|"]
    for overrides in EXTREME:
        t0 = time.perf_counter()
        try:
            problem = build_problem(compose([*overrides, "grid.shape=64", "steps=10"]))
            r, _ = _quiet(solve_bridge, problem, SolverOptions())
            answer = f"{r.status}: {r.message[:80]}"
        except InputError as exc:
            answer = f"refused: {str(exc)[:80]}"
        rows.append(f"| {' '.join(overrides)} | {answer} | {time.perf_counter() - t0:.1f} |")
        print(rows[-1], flush=True)
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=64)
    parser.add_argument("--steps", type=int, default=20)
    parser.add_argument("--budget", type=float, default=600.0)
    add_output_flag(parser)
    args = parser.parse_args()
    text = ["# Hard regimes (issue 13)", "",
            f"## Strong attraction, σ = 1, range 0.5, {args.n} cells × {args.steps} steps", "",
            *strong_attraction(args.n, args.steps, args.budget), "",
            "## The four extreme runs", "", *extreme_runs(), ""]
    OUT.mkdir(parents=True, exist_ok=True)
    (OUT / "bench_hard_regimes.md").write_text("\n".join(text))
    print("\n".join(text))


if __name__ == "__main__":
    main()
