"""Coverage of the fit's intervals, and the smoothing bias, on synthetic populations.

For each seed, N beads of the scenario of ``experiments/make_bead_snapshots.py`` (released from
a tweezer at -1 µm into a harmonic trap, Gaussian soft-core repulsion, σ = 0.5 µm/√s) are
simulated by the particle simulator and seen at t = 0, 0.3 and 1.0 s; the core strength is
fitted (trap stiffness, range and noise held at their true values) with each density estimate
of the snapshots: Gaussian kernels of 0.04 µm (small against the changes fitted), Scott's rule,
and the grid's own cells (histogram). Reported per estimate: the mean estimate and its bias in
standard errors, the spread of the estimates against the reported standard error, and the
fraction of seeds whose 95% profile interval covers the true strength (the nominal 95% holds
asymptotically in N for the whole population observed at every time). A second table does the
same in 2D (a swarm in a round trap) with a kernel of 0.08 (the smallest the 64² grid resolves)
and the grid's cells.

    python experiments/study_fit_coverage.py [--seeds 20] [--population 5000]

A study cut short is resumed with ``--first-seed`` (seeds first-seed, first-seed + 1, ...; the
seeds' data do not depend on which seeds run before them); ``--estimates`` picks density
estimates of either case by name (e.g. ``--seeds 0 --seeds-2d 4 --first-seed 16 --estimates
histogram``).

Writes fit_coverage.md into experiments/out/results/ (experiments/results/ with
--update-committed).
"""

from __future__ import annotations

import argparse
import math
import tempfile
import time
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
from study_common import ROOT, Conditions, add_output_flag, output_dir

from mfbridge.model.grid import Grid
from mfbridge.model.potentials import GaussianCore, Harmonic
from mfbridge.model.samples import Samples, auto_grid
from mfbridge.model.series import SeriesProblem, Snapshot
from mfbridge.particles import population_snapshots
from mfbridge.solvers.fit import FitOptions, FitParameter, fit_series

OUT = output_dir(ROOT / "experiments" / "results") / "fit_coverage.md"
TIMES = (0.0, 0.3, 1.0)
NOISE = 0.5
STRENGTH = 1.5
CONFINEMENT = Harmonic(1.0)
SIM_DT = 5e-4


@dataclass
class Case:
    """One synthetic scenario: dimension, start, grids and density estimates to compare."""

    dim: int
    start_mean: tuple[float, ...]
    start_sd: float
    core_range: float
    sim_grid: Grid
    cells: int
    steps: int
    estimates: tuple[tuple[str, object], ...]


CASE_1D = Case(1, (-1.0,), 0.15, 0.4, Grid(-5.0, 5.0, 4096), 192, 60,
               (("kernel 0.04", ("kde", 0.04)), ("Scott", ("kde", "scott")),
                ("histogram", ("histogram", "scott"))))
CASE_2D = Case(2, (-0.8, 0.0), 0.35, 0.5, Grid((-5.0, -5.0), (5.0, 5.0), (256, 256)), 64, 20,
               (("kernel 0.08", ("kde", 0.08)), ("histogram", ("histogram", 0.08))))


def snapshots(case: Case, population: int, seed: int) -> np.ndarray:
    """Positions (3, N, d) of the population at the snapshot times."""
    rng = np.random.default_rng([seed, population, case.dim])
    x0 = np.asarray(case.start_mean) + case.start_sd * rng.standard_normal((population,
                                                                            case.dim))
    return population_snapshots(x0, TIMES, NOISE, CONFINEMENT,
                                GaussianCore(STRENGTH, case.core_range), case.sim_grid, SIM_DT,
                                rng)


def fit_strength(case: Case, positions: np.ndarray, method: str, bandwidth: object,
                 population: int, folder: Path) -> tuple[float, float, float, float]:
    """(estimate, standard error, profile interval lower, upper) of the core strength."""
    laws = []
    for k, t in enumerate(TIMES):
        path = folder / f"snapshot_{k}.npy"
        np.save(path, positions[k])
        laws.append(Snapshot(t, Samples(path, bandwidth=bandwidth, method=method)))
    # the same box for every estimate: fitted to the reach of the data with the first kernel
    kernel = case.estimates[0][1][1]
    box = auto_grid(snapshots=[Snapshot(t, Samples(folder / f"snapshot_{k}.npy",
                                                   bandwidth=kernel))
                               for k, t in enumerate(TIMES)], shape=case.cells, margin=0.1)
    problem = SeriesProblem(grid=box, snapshots=laws, noise=NOISE, steps=case.steps,
                            confinement=CONFINEMENT,
                            interaction=GaussianCore(1.0, case.core_range))
    result = fit_series(problem, [FitParameter("interaction.strength", 0.0, 5.0)], population,
                        FitOptions(profile_offsets=(-2.5, -1.5, 1.5, 2.5)))
    iv = result.interval("interaction.strength")
    return (result.estimate["interaction.strength"],
            result.standard_errors["interaction.strength"], iv.lower, iv.upper)


def study(case: Case, seeds: range, population: int) -> dict[str, np.ndarray]:
    """Per density estimate: rows (estimate, se, lower, upper), one per seed."""
    rows: dict[str, list[tuple[float, float, float, float]]] = {n: [] for n, _ in case.estimates}
    for seed in seeds:
        start = time.perf_counter()
        positions = snapshots(case, population, seed)
        with tempfile.TemporaryDirectory() as tmp:
            for name, (method, bandwidth) in case.estimates:
                rows[name].append(fit_strength(case, positions, method, bandwidth, population,
                                               Path(tmp)))
        print(f"{case.dim}D seed {seed}: " + ", ".join(
            f"{name} {rows[name][-1][0]:.4f} [{rows[name][-1][2]:.4f}, {rows[name][-1][3]:.4f}]"
            for name, _ in case.estimates) + f" ({time.perf_counter() - start:.0f} s)",
            flush=True)
    return {name: np.array(values) for name, values in rows.items()}


def coverage_rows(results: dict[str, np.ndarray]) -> list[str]:
    lines = ["| density estimate | mean θ̂ | bias / mean se | sd of θ̂ / mean se | coverage of "
             "the 95% profile interval |", "| --- | ---: | ---: | ---: | ---: |"]
    for name, rows in results.items():
        est, se, lo, hi = rows.T
        covered = int(np.sum((lo <= STRENGTH) & (hi >= STRENGTH)))
        lines.append(f"| {name} | {est.mean():.4f} | {(est.mean() - STRENGTH) / se.mean():+.2f} "
                     f"| {est.std(ddof=1) / se.mean():.2f} | {covered}/{len(est)} "
                     f"({covered / len(est):.0%}) |")
    return lines


def seed_rows(results: dict[str, np.ndarray], seeds: range) -> list[str]:
    """Per seed and density estimate: θ̂, se and the interval (so a resumed study's seeds can
    be pooled with these)."""
    lines = ["| seed | density estimate | θ̂ | se | 95% profile interval | covers the truth |",
             "| ---: | --- | ---: | ---: | --- | --- |"]
    for i, seed in enumerate(seeds):
        for name, rows in results.items():
            est, se, lo, hi = rows[i]
            lines.append(f"| {seed} | {name} | {est:.4f} | {se:.4f} | [{lo:.4f}, {hi:.4f}] | "
                         f"{'yes' if lo <= STRENGTH <= hi else 'no'} |")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=20, help="seeds of the 1D case (0 skips it)")
    parser.add_argument("--population", type=int, default=5000)
    parser.add_argument("--seeds-2d", type=int, default=None,
                        help="seeds of the 2D case (default: --seeds; 0 skips it)")
    parser.add_argument("--first-seed", type=int, default=0,
                        help="first seed of both cases (resumes a study cut short)")
    names = [n for case in (CASE_1D, CASE_2D) for n, _ in case.estimates]
    parser.add_argument("--estimates", default=None,
                        help="comma-separated names of the density estimates to fit, in either "
                             f"case (default all: {', '.join(dict.fromkeys(names))})")
    add_output_flag(parser)
    args = parser.parse_args()
    start = time.perf_counter()
    conditions = Conditions()
    case_1d, case_2d = CASE_1D, CASE_2D
    if args.estimates is not None:
        wanted = [w.strip() for w in args.estimates.split(",")]
        unknown = sorted(set(wanted) - set(names))
        if unknown:
            parser.error(f"unknown estimates {unknown}")
        case_1d, case_2d = (replace(case, estimates=tuple(e for e in case.estimates
                                                          if e[0] in wanted))
                            for case in (CASE_1D, CASE_2D))
    seeds_2d = args.seeds if args.seeds_2d is None else args.seeds_2d
    first = args.first_seed
    one = (study(case_1d, range(first, first + args.seeds), args.population)
           if args.seeds > 0 and case_1d.estimates else {})
    two = (study(case_2d, range(first, first + seeds_2d), args.population)
           if seeds_2d > 0 and case_2d.estimates else {})
    half = math.sqrt(3.841458820694124)
    lines = [
        "# Coverage of the fitted intervals on synthetic populations",
        "",
        f"N = {args.population} particles per snapshot, snapshots at t = 0, 0.3, 1.0; true core "
        f"strength {STRENGTH}; the strength alone is fitted (profile interval = slice, "
        f"threshold χ²₁,0.95 = {half**2:.3f}). Simulated by Euler–Maruyama (steps 5e-4) with grid "
        "pair forces; `python experiments/study_fit_coverage.py`.",
        "",
    ]
    if first:
        lines += [f"Seeds {first} and on (`--first-seed {first}`).", ""]
    if one:
        lines += [
            f"1D (beads: start N(−1, 0.15²), trap stiffness 1, core range 0.4, σ = 0.5; "
            f"{CASE_1D.cells} cells, {CASE_1D.steps} steps):",
            "",
            *coverage_rows(one),
            "",
            *seed_rows(one, range(first, first + args.seeds)),
            "",
        ]
    if two:
        lines += [
            f"2D (a swarm: start N((−0.8, 0), 0.35² I), round trap stiffness 1, core range 0.5, "
            f"σ = 0.5; {CASE_2D.cells}×{CASE_2D.cells} cells, {CASE_2D.steps} steps):",
            "",
            *coverage_rows(two),
            "",
            *seed_rows(two, range(first, first + seeds_2d)),
            "",
        ]
    lines += [
        f"{time.perf_counter() - start:.0f} s in all. {conditions.sentence()}",
    ]
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text("\n".join(lines) + "\n")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
