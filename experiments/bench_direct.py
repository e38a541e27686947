"""Direct solver bench: cross-check against the main solver (chi = rho), timings, and a worked
example comparing exclusion and independent-walker bridges between the same two profiles.

``--previous`` also times the earlier minimisers in the same run (1D truncated Newton, 2D
L-BFGS: the 64x64 x 8 case alone takes 6-16 minutes), for before/after ratios.

Scenario (ours): tagged particles in a narrow channel. A channel segment [-4, 4] with a weak
harmonic restoring force holds a crowded plug on the left (mean occupation up to 0.85 per site);
one time unit later the plug is observed spread over the right half. Exclusion particles cannot
overtake or pile up, independent walkers can: the two bridges between the same profiles differ.

Writes experiments/results/bench_direct.md and bench_direct_*.png.
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
# measure this checkout's package, not the editable install the interpreter would pick up
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np
import torch
from study_common import output_dir

from mfbridge import lq_bridge
from mfbridge.model.endpoints import Gaussian, GaussianMixture
from mfbridge.model.grid import Grid
from mfbridge.model.mobility import Exclusion
from mfbridge.model.potentials import GaussianCore, Harmonic, HarmonicInteraction
from mfbridge.model.problem import BridgeProblem
from mfbridge.solvers.direct import DirectOptions, solve_direct
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge

# experiments/out/results unless run with --update-committed (then the tracked results/)
OUT = output_dir(Path(__file__).resolve().parent / "results")


PREVIOUS = "--previous" in sys.argv[1:]


class Clock:
    """Wall and CPU seconds (this process) since creation: on a shared machine the CPU time is
    the steadier measure (the solvers run on one thread)."""

    def __init__(self) -> None:
        self.wall, self.cpu = time.perf_counter(), time.process_time()

    def stop(self) -> tuple[float, float]:
        return time.perf_counter() - self.wall, time.process_time() - self.cpu


def _timed(problem: BridgeProblem, options: DirectOptions) -> tuple[object, float, float]:
    """The direct solver's result, its wall and its CPU seconds."""
    import warnings

    clock = Clock()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = solve_direct(problem, options)
    return (result, *clock.stop())


def cross_check(n: int, k: int) -> list[str]:
    rows = []
    cases = [
        ("Gaussian core W (2, 0.5)", GaussianMixture([0.5, 0.5], [-1.5, -0.5], [0.1, 0.1]),
         Gaussian(1.0, 0.3), (-5.0, 5.0), GaussianCore(2.0, 0.5)),
        ("linear-quadratic (a=1, kappa=1.5)", Gaussian(-1.0, 0.16), Gaussian(1.2, 0.49),
         (-5.0, 5.0), HarmonicInteraction(1.5)),
    ]
    for label, mu, nu, box, w in cases:
        problem = BridgeProblem(grid=Grid(*box, n), initial=mu, final=nu, noise=1.0, horizon=1.0,
                                steps=k, confinement=Harmonic(1.0), interaction=w)
        clock = Clock()
        main = solve_bridge(problem, SolverOptions())
        w_main, t_main = clock.stop()
        direct, w_direct, t_direct = _timed(problem, DirectOptions())
        previous = ""
        if PREVIOUS:
            old, _, t_old = _timed(problem, DirectOptions(method="truncated"))
            previous = f" | {t_old:.1f} ({old.iterations} it; J {old.cost / direct.cost - 1:+.1e})"
        # the main solver can fail on coarse grids (reported, not hidden)
        gap = direct.cost / main.cost - 1 if main.cost > 0 else float("nan")
        if main.cost <= 0:
            print(f"main solver on {label}, {n} x {k}: {main.status}: {main.message}")
        dens = np.abs(main.density - direct.density).max() / main.density.max()
        exact = ""
        if isinstance(w, HarmonicInteraction):
            ex = lq_bridge(stiffness=1.0, strength=1.5, noise=1.0, horizon=1.0, mean0=-1.0,
                           cov0=0.16, mean1=1.2, cov1=0.49, times=k + 1)
            exact = f"{ex.cost:.6f} (direct {direct.cost / ex.cost - 1:+.2e})"
        rows.append(f"| {label} | {n} x {k} | {main.cost:.6f} | {direct.cost:.6f} | {gap:+.2e} | "
                    f"{dens:.2e} | {exact or '—'} | {t_main:.2f} ({w_main:.2f}) | {t_direct:.1f} "
                    f"({w_direct:.1f}; {direct.iterations} it) | {t_direct / t_main:.1f}"
                    f"{previous} |")
        print(rows[-1], flush=True)
    return rows


def problem_2d(n: int, k: int) -> BridgeProblem:
    return BridgeProblem(grid=Grid([-4.0, -4.0], [4.0, 4.0], [n, n]),
                         initial=Gaussian([-1.0, -0.5], 0.36), final=Gaussian([1.0, 0.5], 0.25),
                         noise=1.0, horizon=1.0, steps=k, confinement=Harmonic(1.0),
                         interaction=GaussianCore(1.0, 0.7))


def cross_check_2d(n: int, k: int) -> str:
    """The 2D case at tol 1e-7: main solver, the Newton method, and (--previous) L-BFGS."""
    problem = problem_2d(n, k)
    clock = Clock()
    main = solve_bridge(problem, SolverOptions())
    w_main, t_main = clock.stop()
    direct, w_direct, t_direct = _timed(problem, DirectOptions(tol=1e-7))
    dens = np.abs(main.density - direct.density).max() / main.density.max()
    cg = direct.message.rsplit("Newton iterations, ", 1)[-1].split(" CG")[0]
    previous = ""
    if PREVIOUS:
        old, _, t_old = _timed(problem, DirectOptions(tol=1e-7, method="lbfgs"))
        previous = (f" | {t_old:.1f} ({old.iterations} it, {old.status}; J "
                    f"{old.cost / direct.cost - 1:+.1e}) | {t_old / t_direct:.1f}")
    row = (f"| 2D Gaussian core W (1, 0.7) | {n}x{n} x {k} | {main.cost:.6f} | "
           f"{direct.cost:.6f} | {direct.cost / main.cost - 1:+.2e} | {dens:.2e} | {t_main:.1f} "
           f"({w_main:.1f}) | {t_direct:.1f} ({w_direct:.1f}; {direct.iterations} Newton, {cg} CG, "
           f"{direct.status}){previous} |")
    print(row, flush=True)
    return row


def worked_example() -> tuple[list[str], list]:
    grid = Grid(-4.0, 4.0, 64)
    mu = GaussianMixture([1.0], [-1.8], [0.35])
    nu = GaussianMixture([0.5, 0.5], [0.8, 2.2], [0.2, 0.2])
    problem = BridgeProblem(grid=grid, initial=mu, final=nu, noise=1.0, horizon=1.0, steps=16,
                            confinement=Harmonic(0.2))
    peak = max(problem.initial.max(), problem.final.max()) / grid.cell_volume
    mass = 0.85 / peak
    results = {}
    rows = []
    for name, mob in (("walkers", None), ("exclusion", Exclusion())):
        opts = DirectOptions(total_mass=mass) if mob is None else DirectOptions(mob, mass)
        t0 = time.perf_counter()
        res = solve_direct(problem, opts)
        results[name] = res
        occ = mass * res.density
        rows.append(f"| {name} | {res.cost:.5f} | {res.cost_kinetic:.5f} | "
                    f"{res.cost_free_energy:.5f} | {occ.max():.3f} | "
                    f"{time.perf_counter() - t0:.1f} | {res.status} |")
        print(rows[-1], flush=True)
    return rows, [results, mass]


def figures(results: dict, mass: float) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from mfbridge.runs.plotting import plot_result

    for name, res in results.items():
        folder = OUT / f"bench_direct_{name}"
        plot_result(res, folder)
    fig, axes = plt.subplots(1, 4, figsize=(13, 3.2), sharey=True)
    x = results["walkers"].grid.axes[0]
    for ax, k in zip(axes, (0, 5, 11, 16), strict=True):
        for name, res in results.items():
            ax.plot(x, mass * res.density[k], label=name)
        ax.set_title(f"t = {res.times[k]:.2f}")
        ax.set_xlabel("x")
    axes[0].set_ylabel("occupation per site")
    axes[0].legend()
    fig.tight_layout()
    fig.savefig(OUT / "bench_direct_channel.png", dpi=120)
    plt.close(fig)


def main() -> None:
    torch.set_num_threads(1)
    OUT.mkdir(parents=True, exist_ok=True)
    load = f"{os.getloadavg()[0]:.1f}"
    lines = ["# Direct solver bench", "",
             "Cross-check (chi = rho, sigma = 1, T = 1, U = x^2/2): main fixed-point solver vs "
             "direct solver (Newton on densities and fluxes, tol 1e-9) on the same grid; "
             "times are CPU seconds of this process (wall seconds in brackets: on a shared machine "
             "the wall time grows with the load, the CPU time much less); 'ratio' is direct / main "
             "CPU s (the 1D target is 10)."
             + (" 'previous' is the truncated Newton method of the density-only form "
                "(method=truncated), timed in the same run, with its J relative to Newton's."
                if PREVIOUS else ""),
             f"Machine load at start (1-minute load average, 2 cores shared): {load}.", "",
             "| case | cells x steps | J main | J direct | rel. gap | max density gap / peak "
             "| exact J | main CPU s (wall) | direct CPU s (wall) | ratio |"
             + (" previous CPU s |" if PREVIOUS else ""),
             "|---|---|---|---|---|---|---|---|---|---|" + ("---|" if PREVIOUS else "")]
    for n, k in ((48, 10), (96, 20), (192, 40)):
        lines += cross_check(n, k)
    lines += ["", "2D (Gaussian core W (1, 0.7), tol 1e-7; targets: 64x64 x 8 under 60 s, "
              "32x32 x 16 under 20 s on a quiet machine)"
              + (", with L-BFGS (method=lbfgs, the earlier 2D minimiser) timed in the same run"
                 if PREVIOUS else "") + ":", "",
              "| case | grid x steps | J main | J direct | rel. gap | max density gap / peak "
              "| main CPU s (wall) | direct CPU s (wall) |"
              + (" L-BFGS CPU s | L-BFGS / Newton |" if PREVIOUS else ""),
              "|---|---|---|---|---|---|---|---|" + ("---|---|" if PREVIOUS else "")]
    for n, k in ((16, 8), (24, 12), (32, 8), (32, 16), (64, 8)):
        lines.append(cross_check_2d(n, k))
    rows, (results, mass) = worked_example()
    lines += ["", "Worked example: tagged particles in a narrow channel (scenario of our own), "
              f"total mass {mass:.3f}, 64 cells, 16 steps, sigma = 1, U = 0.2 x^2/2.", "",
              "| mobility | J | kinetic | free-energy change | peak occupation | s | status |",
              "|---|---|---|---|---|---|---|", *rows, "",
              "Figures: bench_direct_channel.png (snapshots), bench_direct_<mobility>/ (standard "
              "figures).", "", f"Load average at the end: {os.getloadavg()[0]:.1f}."]
    (OUT / "bench_direct.md").write_text("\n".join(lines) + "\n")
    figures(results, mass)


if __name__ == "__main__":
    main()
