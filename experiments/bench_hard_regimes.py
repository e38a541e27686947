"""Hard regimes (issue 13): strong attraction, the four extreme runs, and the outer method.

Usage::

    python experiments/bench_hard_regimes.py [--grids 64x20 128x50] [--budget 600]
        [--starts 3] [--anderson-below 2000]

Table 1 (per grid): the demo endpoints with a Gaussian core of strength -10 and -20, range 0.5,
σ = 1, solved

* by the fixed-point solver alone (``cross_check=off``) with ``outer=anderson`` (the earlier
  method; only on grids of at most ``--anderson-below`` cells × steps) and with ``outer=auto``
  and ``starts`` initial guesses (cold, displacement, tilted: every distinct converged bridge
  is a row);
* with the defaults (``outer=auto``, one start, ``cross_check=auto``: the direct solver as
  fallback when the fixed point fails, and as a check after a hard converged solve);
* by the direct solver (χ = ρ).

Columns: each solver's own J; J of the flow scored by one formula
(:func:`mfbridge.solvers.cost.flow_cost`, the same for every row); the max-over-time L1
distance of the flow to the direct solver's; wall and CPU seconds (CPU of this process: the
solvers run single-threaded).

Table 2: the four extreme runs of the issue (64 cells × 10 steps), each of which ran past 170 s
before: the answer or refusal and its time.

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
from mfbridge.solvers.cost import flow_cost  # noqa: E402
from mfbridge.solvers.direct import DirectOptions, solve_direct  # noqa: E402
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge  # noqa: E402
from mfbridge.solvers.multistart import flow_distance  # noqa: E402

OUT = output_dir(Path(__file__).resolve().parent / "results")
EXTREME = [
    ["confinement=double_well", "confinement.depth=1e6"],
    ["interaction=gaussian", "interaction.strength=1e6"],
    ["interaction.strength=-1e6"],
    ["interaction=none", "noise=1e-4"],
]


def _quiet(fn, *args):
    t0, c0 = time.perf_counter(), time.process_time()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = fn(*args)
    return result, time.perf_counter() - t0, time.process_time() - c0


def _scored(problem, masses) -> float:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return flow_cost(problem, masses).cost


HEADER = ["| strength | solver | starts | status | J (own) | J (one formula) | L1 to direct | "
          "outer its | wall s | CPU s | note |",
          "|---|---|---|---|---|---|---|---|---|---|---|"]


ROWS = ("anderson", "starts", "defaults", "direct")


def strong_attraction(n: int, steps: int, budget: float, starts: int,
                      anderson_below: int, strengths: list[float] | None = None,
                      which: tuple[str, ...] = ROWS) -> list[str]:
    rows = list(HEADER)

    def row(*cells: object) -> None:
        rows.append("| " + " | ".join(str(c) for c in cells) + " |")
        print(rows[-1], flush=True)

    for strength in strengths or [-10.0, -20.0]:
        problem = build_problem(compose([f"interaction.strength={strength}",
                                         "interaction.range=0.5", "noise=1.0",
                                         f"grid.shape={n}", f"steps={steps}"]))
        d, dw, dc = _quiet(solve_direct, problem, DirectOptions(time_budget=budget))
        ref = d.masses

        def describe(r, label: str, k: object, wall: float, cpu: float, note: str = "",
                     strength: float = strength, problem=problem, ref=ref) -> None:
            row(f"{strength:g}", label, k, r.status, f"{r.cost:.7f}",
                f"{_scored(problem, r.masses):.5f}", f"{flow_distance(r.masses, ref):.3g}",
                r.iterations, f"{wall:.1f}", f"{cpu:.1f}", note)

        if "anderson" in which and n * steps <= anderson_below:
            r, w, c = _quiet(solve_bridge, problem, SolverOptions(
                outer="anderson", time_budget=budget, cross_check="off"))
            describe(r, "fixed point, outer=anderson", 1, w, c)
        if "starts" in which:
            _multistart_rows(problem, budget, starts, strength, ref, row, describe)
        if "defaults" in which:
            _default_row(problem, budget, describe)
        if "direct" in which:
            describe(d, "direct (χ = ρ)", "–", dw, dc)
    return rows


def _multistart_rows(problem, budget, starts, strength, ref, row, describe) -> None:
    r, w, c = _quiet(solve_bridge, problem, SolverOptions(
        starts=starts, time_budget=budget, cross_check="off"))
    tried = r.message[r.message.find("[") + 1:r.message.find("]")] if "[" in r.message else ""
    describe(r, "fixed point, outer=auto", starts, w, c,
             f"from start {r.start}" + (f"; {tried}" if tried else ""))
    for a in r.alternatives:
        m = a.density * problem.grid.cell_volume
        row(f"{strength:g}", "  another bridge (same solve)", starts, a.status,
            f"{a.cost:.7f}", f"{_scored(problem, m):.5f}",
            f"{flow_distance(m, ref):.3g}", "", "", "", f"from start {a.start}")


def _default_row(problem, budget, describe) -> None:
    r, w, c = _quiet(solve_bridge, problem, SolverOptions(time_budget=budget))
    if r.method == "direct":
        verdict = "fallback: the direct solver's result"
    elif "cross-check" in r.message:
        verdict = "cross-check: " + r.message.split("cross-check: ")[1].split(":")[0]
    elif r.status == "suspect":
        verdict = "cross-check: the direct flow is cheaper"
    elif r.status == "converged":
        verdict = "no cross-check (easy solve)"
    else:
        verdict = "no fallback: " + r.message[-120:]
    describe(r, "defaults (outer=auto, cross_check=auto)", 1, w, c, verdict)


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
    parser.add_argument("--grids", nargs="+", default=["64x20", "128x50"],
                        help="cells x steps, e.g. 64x20")
    parser.add_argument("--budget", type=float, default=600.0)
    parser.add_argument("--starts", type=int, default=3)
    parser.add_argument("--anderson-below", type=int, default=2000,
                        help="run outer=anderson only on grids of at most this cells x steps")
    parser.add_argument("--no-extremes", action="store_true")
    parser.add_argument("--strengths", type=float, nargs="+", default=[-10.0, -20.0])
    parser.add_argument("--rows", nargs="+", choices=ROWS, default=list(ROWS),
                        help="which solves to run (the direct one always runs: the reference)")
    parser.add_argument("--name", default="bench_hard_regimes.md",
                        help="file name of the table (to run grids in separate processes)")
    add_output_flag(parser)
    args = parser.parse_args()
    text = ["# Hard regimes (issue 13)", ""]
    for spec in args.grids:
        n, steps = (int(v) for v in spec.split("x"))
        text += [f"## Strong attraction, σ = 1, range 0.5, {n} cells × {steps} steps", "",
                 *strong_attraction(n, steps, args.budget, args.starts, args.anderson_below,
                                    args.strengths, tuple(args.rows)),
                 ""]
    if not args.no_extremes:
        text += ["## The four extreme runs", "", *extreme_runs(), ""]
    OUT.mkdir(parents=True, exist_ok=True)
    (OUT / args.name).write_text("\n".join(text))
    print("\n".join(text))


if __name__ == "__main__":
    main()
