"""The measured cases of issue 12: the reported cost J against reference values, before and after.

Prints tables and writes experiments/results/accuracy_cases.md:

* the Morse/double-well case (boundary layer near T): J on a diagonal ladder of grids and on a
  time ladder at 120 cells, by the midpoint rule (what the solver reports) and by the trapezoid
  rule on the time nodes (what it reported before, recomputed here from the same flow); the
  same flows scored by the direct solver's discretisation of J (an independent formula);
* the double well with a Gaussian core (endpoints N(-1, 0.16) -> N(1.2, 0.49), sigma = 1,
  [-4, 4]);
* with --direct, the direct solver's own minimiser on the Morse case (slow: ~20 min);
* with --small-noise, the sigma = 0.04 coarse-grid case (frozen method; a few minutes).

Usage: python experiments/accuracy_cases.py [--direct] [--small-noise] [--quick]
"""

from __future__ import annotations

import argparse
import time
import warnings
from pathlib import Path

import numpy as np
from study_common import add_output_flag, output_dir

from mfbridge.model.endpoints import Gaussian, GaussianMixture
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import DoubleWell, GaussianCore, Morse
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics import observables
from mfbridge.numerics.reference import PairField, edge_rates, faces
from mfbridge.result import BridgeResult
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge

# experiments/out/results/ by default; experiments/results/ with --update-committed
OUT_NAME = "accuracy_cases.md"
MORSE_LIMIT = 1.63165  # see tests/test_accuracy.py for its provenance
DW_LIMIT = 3.752  # Richardson's rule on the 1024 x 200 and 2048 x 400 midpoint values


def morse(n: int, steps: int) -> BridgeProblem:
    return BridgeProblem(
        grid=Grid(-3.0, 3.0, n), initial=Gaussian(-1.0, 0.1),
        final=GaussianMixture([0.4, 0.6], [-1.0, 1.0], [0.1, 0.1]), noise=0.8, horizon=1.0,
        steps=steps, confinement=DoubleWell(),
        interaction=Morse(depth=0.5, width=2.0, distance=0.8))


def double_well(n: int, steps: int) -> BridgeProblem:
    return BridgeProblem(
        grid=Grid(-4.0, 4.0, n), initial=Gaussian(-1.0, 0.16), final=Gaussian(1.2, 0.49),
        noise=1.0, horizon=1.0, steps=steps, confinement=DoubleWell(),
        interaction=GaussianCore(1.0, 0.5))


def small_noise(n: int = 24, steps: int = 100) -> BridgeProblem:
    return BridgeProblem(grid=Grid(-6.0, 6.0, n), initial=Gaussian(-2.0, 0.5),
                         final=Gaussian(2.0, 0.5), noise=0.04, horizon=1.0, steps=steps,
                         interaction=GaussianCore(0.5, 1.0))


def trapezoid_cost(problem: BridgeProblem, result: BridgeResult) -> float:
    """J as reported before issue 12: the control flux at the time nodes (nodal Φ, the stored
    potentials log F and log G of each node) summed by the trapezoid rule."""
    grid = problem.grid
    p = result.masses
    pair = PairField(grid, problem.interaction)
    phi = np.asarray(problem.confinement.value(grid.points), dtype=float) + pair(p)
    rates = edge_rates(phi, grid, problem.noise)
    lo, hi = faces(p.ndim, 1, grid.shape[0])
    fwd, bwd = rates.forward[0], rates.backward[0]
    with np.errstate(under="ignore"):
        bridge = (fwd * np.exp(result.log_forward[lo] + result.log_backward[hi])
                  - bwd * np.exp(result.log_forward[hi] + result.log_backward[lo]))
    control = bridge - (fwd * p[lo] - bwd * p[hi])
    omega = np.full(problem.steps + 1, problem.dt)
    omega[[0, -1]] = problem.dt / 2
    return observables.flux_action((control,), p, grid, omega, problem.noise)


def run(problem: BridgeProblem) -> tuple[BridgeResult, float]:
    start = time.process_time()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = solve_bridge(problem)
    return result, time.process_time() - start


def independent(problem: BridgeProblem, result: BridgeResult) -> float:
    from mfbridge.solvers.direct_action import action

    return float(action(problem, result.density))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--direct", action="store_true")
    parser.add_argument("--small-noise", action="store_true")
    parser.add_argument("--quick", action="store_true", help="skip the finest grids")
    add_output_flag(parser)
    args = parser.parse_args()
    out = output_dir(Path(__file__).resolve().parent / "results") / OUT_NAME
    out.parent.mkdir(parents=True, exist_ok=True)
    lines = ["# The measured cases of issue 12", "",
             "Written by `python experiments/accuracy_cases.py`. J(mid): the cost as reported "
             "(integrand at the step midpoints); J(trap): the same flow by the trapezoid rule on "
             "the time nodes (what was reported before issue 12); J(indep): the same flow scored "
             "by the direct solver's discretisation of J (`solvers/direct_action.action`). CPU "
             "seconds of one solve.", ""]

    def table(title: str, problem_of, specs, limit: float, indep: bool) -> None:
        lines.extend([f"## {title}", "", f"Reference limit {limit:.6g}.", "",
                      "| cells x steps | J(mid) | rel. error | J(trap) | rel. error | J(indep) "
                      "| status | outer it. | CPU s |",
                      "| --- | ---: | ---: | ---: | ---: | ---: | --- | ---: | ---: |"])
        for n, k in specs:
            problem = problem_of(n, k)
            result, seconds = run(problem)
            trap = trapezoid_cost(problem, result)
            score = independent(problem, result) if indep else float("nan")
            row = (f"| {n} x {k} | {result.cost:.7f} | {result.cost / limit - 1:+.2e} | "
                   f"{trap:.7f} | {trap / limit - 1:+.2e} | {score:.7f} | {result.status} | "
                   f"{result.iterations} | {seconds:.1f} |")
            print(title, row, flush=True)
            lines.append(row)
        lines.append("")

    fine = [] if args.quick else [(960, 256)]
    table("Morse interaction, double well: diagonal ladder", morse,
          [(120, 32), (240, 64), (480, 128), *fine, (240, 100)], MORSE_LIMIT, True)
    table("Morse interaction, double well: time ladder at 120 cells", morse,
          [(120, 32), (120, 64), (120, 128), (120, 256)], MORSE_LIMIT, False)
    finest = [] if args.quick else [(2048, 400)]
    table("Double well, Gaussian core 1.0/0.5, sigma = 1, [-4, 4]", double_well,
          [(192, 40), (512, 100), (1024, 200), *finest], DW_LIMIT, False)
    if args.direct:
        from mfbridge.solvers.direct import DirectOptions, solve_direct

        lines.extend(["## Direct solver (truncated Newton) on the Morse case", "",
                      "| cells x steps | J | CPU s |", "| --- | ---: | ---: |"])
        for n, k in ((120, 32), (240, 64), (480, 128)):
            start = time.process_time()
            res = solve_direct(morse(n, k), DirectOptions())
            row = f"| {n} x {k} | {res.cost:.8f} | {time.process_time() - start:.0f} |"
            print("direct", row, flush=True)
            lines.append(row)
        lines.append("")
    if args.small_noise:
        problem = small_noise()
        start = time.process_time()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = solve_bridge(problem, SolverOptions(method="frozen"))
        lines.extend(["## sigma = 0.04, 24 cells, frozen method", "",
                      f"status `{res.status}`, J = {res.cost:.4g} (W2^2/(2 sigma^2 T) = 5000), "
                      f"{time.process_time() - start:.0f} CPU s. Message: {res.message}", ""])
        print(lines[-2], flush=True)
    out.write_text("\n".join(lines) + "\n")
    print(f"written {out}")


if __name__ == "__main__":
    main()
