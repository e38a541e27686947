"""Benchmark of issue 12: time to a relative cost error of 1e-4, and the cost of the estimate.

1. The 1D linear-quadratic case (U = x^2/2, W = 1.5 x^2/2, sigma = 1, T = 1, N(-1, 0.16) ->
   N(1.2, 0.49), box [-6, 6]; exact J from the closed form of mfbridge.solvers.linear_quadratic,
   Bunne, Hsieh, Cuturi & Krause, AISTATS 2023):
   * mfbridge with a target accuracy of 1e-4 (AccuracyOptions(target=1e-4), starting from
     64 cells x 16 steps): the CPU time of the whole refinement, and the true error of the J it
     reports;
   * the direct solver (L-BFGS, second order in h and dt) on a ladder of grids; its CPU time
     at a relative error of 1e-4 by log-log interpolation (extrapolation from the last two
     grids when the ladder stops short of 1e-4, said so in the table);
   * for reference, plain mfbridge solves (no estimate) on a ladder, interpolated the same way.
2. The overhead of the default error estimate (two companion grids) on a few cases: CPU time
   of the companions over CPU time of the solve.

Times are CPU seconds of this process (time.process_time; one BLAS thread), so a loaded
machine slows them less than wall-clock times. Writes experiments/results/bench_accuracy.md.
Usage: python experiments/bench_accuracy.py [--quick]  (quick: no 384 x 96 direct solve)
"""

from __future__ import annotations

import argparse
import math
import time
import warnings
from pathlib import Path

import numpy as np
from study_common import add_output_flag, output_dir

from mfbridge.model.endpoints import Gaussian, GaussianMixture
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import (
    DoubleWell,
    GaussianCore,
    Harmonic,
    HarmonicInteraction,
    Morse,
)
from mfbridge.model.problem import BridgeProblem
from mfbridge.solvers.accuracy import AccuracyOptions, solve_and_estimate
from mfbridge.solvers.direct import DirectOptions, solve_direct
from mfbridge.solvers.fixed_point import solve_bridge
from mfbridge.solvers.linear_quadratic import lq_bridge

# experiments/out/results/ by default; experiments/results/ with --update-committed
OUT_NAME = "bench_accuracy.md"
TARGET = 1e-4


def lq(n: int, steps: int) -> BridgeProblem:
    return BridgeProblem(grid=Grid(-6.0, 6.0, n), initial=Gaussian(-1.0, 0.16),
                         final=Gaussian(1.2, 0.49), noise=1.0, horizon=1.0, steps=steps,
                         confinement=Harmonic(1.0), interaction=HarmonicInteraction(1.5))


EXACT = lq_bridge(stiffness=1.0, strength=1.5, noise=1.0, horizon=1.0, mean0=-1.0, cov0=0.16,
                  mean1=1.2, cov1=0.49, times=3).cost


def timed(fn):
    start = time.process_time()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = fn()
    return out, time.process_time() - start


def time_at(errors: list[float], seconds: list[float], target: float) -> tuple[float, str]:
    """CPU time at ``target`` error by log-log interpolation between the two ladder grids
    around it (extrapolation from the last two if none is below it)."""
    e, t = np.log(np.abs(errors)), np.log(seconds)
    below = [i for i in range(1, len(e)) if e[i] <= math.log(target) <= e[i - 1]]
    i = below[0] if below else len(e) - 1
    how = "interpolated" if below else "extrapolated from the last two grids"
    slope = (t[i] - t[i - 1]) / (e[i] - e[i - 1])
    return float(math.exp(t[i] + slope * (math.log(target) - e[i]))), how


def ladder(name: str, solve, specs, lines: list[str]) -> tuple[float, str]:
    lines.extend([f"### {name}", "", "| cells x steps | J | relative error | status | CPU s |",
                  "| --- | ---: | ---: | --- | ---: |"])
    errors, seconds = [], []
    for n, k in specs:
        result, cpu = timed(lambda n=n, k=k: solve(lq(n, k)))
        error = result.cost / EXACT - 1
        errors.append(error)
        seconds.append(cpu)
        row = f"| {n} x {k} | {result.cost:.8f} | {error:+.3e} | {result.status} | {cpu:.1f} |"
        print(name, row, flush=True)
        lines.append(row)
    at, how = time_at(errors, seconds, TARGET)
    lines.extend(["", f"CPU time at relative error {TARGET:g}: {at:.1f} s ({how}).", ""])
    return at, how


def overhead(lines: list[str]) -> None:
    cases = {
        "1D LQ, 512 x 100, [-4, 4]": BridgeProblem(
            grid=Grid(-4.0, 4.0, 512), initial=Gaussian(-1.0, 0.16), final=Gaussian(1.2, 0.49),
            noise=1.0, steps=100, confinement=Harmonic(1.0),
            interaction=HarmonicInteraction(1.5)),
        "1D default demo (fitted box)": None,
        "1D Morse / double well, 240 x 100": BridgeProblem(
            grid=Grid(-3.0, 3.0, 240), initial=Gaussian(-1.0, 0.1),
            final=GaussianMixture([0.4, 0.6], [-1.0, 1.0], [0.1, 0.1]), noise=0.8, steps=100,
            confinement=DoubleWell(), interaction=Morse(depth=0.5, width=2.0, distance=0.8)),
        "2D Gaussian core, 64 x 64 x 50": BridgeProblem(
            grid=Grid([-3.0, -3.0], [3.0, 3.0], [64, 64]), initial=Gaussian([-1.0, 0.0], 0.2),
            final=Gaussian([1.0, 0.5], 0.3), noise=1.0, steps=50, confinement=Harmonic(1.0),
            interaction=GaussianCore(1.0, 0.5)),
    }
    lines.extend(["## Cost of the default error estimate", "",
                  "Two companion grids (cells and steps halved, then halved again), each started "
                  "from the finer solution, tolerance max(tol, 1e-7).", "",
                  "| case | solve CPU s | companions CPU s | overhead | estimated rel. error "
                  "| observed order |", "| --- | ---: | ---: | ---: | ---: | ---: |"])
    for name, problem in cases.items():
        if problem is None:
            import mfbridge
            from mfbridge.runs.api import build_problem

            problem = build_problem(mfbridge.compose([]))
        _, solve_cpu = timed(lambda p=problem: solve_bridge(p))
        estimated, total_cpu = timed(lambda p=problem: solve_and_estimate(p))
        error = estimated.error
        extra = max(total_cpu - solve_cpu, 0.0)
        if problem.grid.dim == 1 and "x" not in name:
            name = f"{name}, {problem.grid.shape[0]} x {problem.steps}"
        row = (f"| {name} | {solve_cpu:.2f} | {extra:.2f} | {100 * extra / solve_cpu:.0f}% | "
               f"{error.cost_relative:.2e} | {error.observed_order:.2f} |")
        print("overhead", row, flush=True)
        lines.append(row)
    lines.append("")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--no-overhead", action="store_true")
    add_output_flag(parser)
    args = parser.parse_args()
    out = output_dir(Path(__file__).resolve().parent / "results") / OUT_NAME
    out.parent.mkdir(parents=True, exist_ok=True)
    lines = ["# Time to a relative cost error of 1e-4 (issue 12)", "",
             "Written by `python experiments/bench_accuracy.py`. CPU seconds of one process "
             "(one BLAS thread).", ""]
    # 1. target accuracy
    result, cpu = timed(lambda: solve_and_estimate(
        lq(64, 16), accuracy=AccuracyOptions(target=TARGET)))
    error = result.cost / EXACT - 1
    tried = ", ".join(f"{t['shape'][0]} x {t['steps']}" for t in result.error.tried)
    lines.extend(["## mfbridge with a target accuracy", "",
                  f"`AccuracyOptions(target={TARGET:g})` from 64 x 16: grids tried {tried}; "
                  f"reported J = {result.cost:.8f}, GCI {result.error.gci:.2e}, "
                  f"target met: {result.error.target_met}; true relative error {error:+.2e} "
                  f"(exact J = {EXACT:.8f}); **{cpu:.1f} CPU s** in all.", ""])
    print(lines[-2], flush=True)
    # 2. the direct solver's ladder
    specs = [(48, 12), (96, 24), (192, 48)] + ([] if args.quick else [(384, 96)])
    direct_at, how = ladder("direct solver, L-BFGS", lambda p: solve_direct(
        p, DirectOptions(method="lbfgs")), specs, lines)
    plain_at, plain_how = ladder("mfbridge, plain solves (no estimate)", solve_bridge,
                         [(96, 24), (192, 48), (384, 96), (768, 192)], lines)
    lines.extend(["## Ratio", "",
                  f"direct L-BFGS at {TARGET:g} ({how}): {direct_at:.1f} CPU s; mfbridge with "
                  f"the target option: {cpu:.1f} CPU s: **ratio {direct_at / cpu:.0f}** "
                  f"(plain mfbridge ladder at {TARGET:g}, {plain_how}: {plain_at:.1f} s, "
                  f"ratio {direct_at / plain_at:.0f}).", ""])
    print(lines[-2], flush=True)
    if not args.no_overhead:
        overhead(lines)
    out.write_text("\n".join(lines) + "\n")
    print(f"written {out}")


if __name__ == "__main__":
    main()
