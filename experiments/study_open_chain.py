"""Study: the open symmetric exclusion chain between two reservoirs — the direct solver's
long-horizon cost against the exact quasi-potential, and the shape of the optimal paths.

Model: simple exclusion (χ = ρ(1 − ρ), D = 1) on [0, 1], reservoirs at densities ρ_a (x = 0) and
ρ_b (x = 1), noise σ = √2 (the code's action is then the MFT action ¼∫∫|j + ∇ρ|²/χ, README).
For a profile ρ the cost J_T of reaching it from the steady profile in time T tends to the
quasi-potential V(ρ) of Derrida, Lebowitz & Speer (PRL 87, 2001; J. Stat. Phys. 107, 2002),
computed independently by :mod:`mfbridge.solvers.open_ssep`.

Writes ``experiments/reports/open_chain.md`` and figures ``open_chain_*.png`` (under
experiments/out/ unless ``--update-committed``). Run:
``OPENBLAS_NUM_THREADS=1 python experiments/study_open_chain.py`` (a few minutes on 2 cores).
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np
import torch
from study_common import ROOT, add_output_flag, output_dir

from mfbridge.model.grid import Grid
from mfbridge.model.mobility import Exclusion, Walkers
from mfbridge.model.problem import BridgeProblem
from mfbridge.model.reservoirs import Reservoirs
from mfbridge.solvers.current_fluctuations import current_fluctuations
from mfbridge.solvers.direct import DirectOptions, solve_direct
from mfbridge.solvers.open_ssep import (
    current_rate,
    current_variance,
    local_free_energy,
    quasi_potential,
    walkers_current_rate,
)

SIGMA = math.sqrt(2.0)
PAIRS = ((0.8, 0.2), (0.3, 0.6))
BUMPS = {
    "0.15 sin(πx)": lambda x: 0.15 * np.sin(np.pi * x),
    "−0.15 sin(2πx)": lambda x: -0.15 * np.sin(2 * np.pi * x),
    "0.2 sin²(πx)(1 − x/2)": lambda x: 0.2 * np.sin(np.pi * x) ** 2 * (1 - 0.5 * x),
}
HORIZON = 0.8  # e^{-2π² T} ~ 1e-7: the horizon's part of the gap is negligible


def signed(bump: str) -> str:
    """'ρ̄ + bump', or 'ρ̄ − ...' when the bump's name starts with a minus sign."""
    return f"ρ̄ − {bump[1:]}" if bump.startswith("−") else f"ρ̄ + {bump}"


def profile(a: float, b: float, bump: str):
    return lambda x: a + (b - a) * x + BUMPS[bump](x)


def bridge(n: int, steps: int, horizon: float, a: float, b: float, target, rise: bool = True):
    """The bridge from the steady profile to ``target`` (rise) or back (relaxation)."""
    grid = Grid(0.0, 1.0, n)
    rho = target(grid.axes[0])
    mass = float(rho.sum() * grid.cell_volume)
    problem = BridgeProblem(grid=grid, initial=rho if not rise else np.ones(n),
                            final=rho if rise else np.ones(n), noise=SIGMA, horizon=horizon,
                            steps=steps)
    res = Reservoirs(lower=[a], upper=[b], initial="steady" if rise else "given",
                     final="given" if rise else "steady", final_mass=mass if rise else None)
    return solve_direct(problem, DirectOptions(mobility=Exclusion(), total_mass=mass,
                                               reservoirs=res)), mass


def table() -> tuple[list[str], list[float]]:
    rows, ratios = [], []
    for a, b in PAIRS:
        for bump in BUMPS:
            target = profile(a, b, bump)
            exact = quasi_potential(target, a, b).value
            local = local_free_energy(target, a, b)
            costs, seconds = [], []
            for n in (32, 64):
                t0 = time.perf_counter()
                res, _ = bridge(n, round(2 * n * HORIZON), HORIZON, a, b, target)
                seconds.append(time.perf_counter() - t0)
                costs.append(res.cost)
            gaps = [c / exact - 1 for c in costs]
            ratios.append(abs(gaps[0] / gaps[1]))
            rows.append(f"| ({a}, {b}) | {signed(bump)} | {exact:.7f} | {local:.7f} | "
                        f"{costs[0]:.7f} ({gaps[0]:+.2e}) | {costs[1]:.7f} ({gaps[1]:+.2e}) | "
                        f"{ratios[-1]:.2f} | {seconds[0]:.1f} + {seconds[1]:.1f} |")
            print(rows[-1], flush=True)
    for rho_eq in (0.4, 0.5):
        def target(x, r=rho_eq):
            return r + 0.25 * np.sin(2 * np.pi * x)

        exact = local_free_energy(target, rho_eq, rho_eq)
        costs = [bridge(n, round(2 * n * HORIZON), HORIZON, rho_eq, rho_eq, target)[0].cost
                 for n in (32, 64)]
        gaps = [c / exact - 1 for c in costs]
        rows.append(f"| ({rho_eq}, {rho_eq}) | {rho_eq} + 0.25 sin(2πx) | {exact:.7f} "
                    f"(free energy) | {exact:.7f} | {costs[0]:.7f} ({gaps[0]:+.2e}) | "
                    f"{costs[1]:.7f} ({gaps[1]:+.2e}) | {abs(gaps[0] / gaps[1]):.2f} | — |")
        print(rows[-1], flush=True)
    return rows, ratios


def horizons() -> tuple[list[str], np.ndarray, np.ndarray]:
    a, b, bump = 0.8, 0.2, "0.15 sin(πx)"
    target = profile(a, b, bump)
    exact = quasi_potential(target, a, b).value
    ts = np.array([0.05, 0.1, 0.15, 0.2, 0.3])
    gaps = np.array([bridge(32, round(64 * t), t, a, b, target)[0].cost / exact - 1
                     for t in ts])
    rate = -np.polyfit(ts[:4], np.log(gaps[:4]), 1)[0]
    rows = [f"| {t:.2f} | {g:+.3e} |" for t, g in zip(ts, gaps, strict=True)]
    rows.append(f"\nFitted decay rate of the gap over T = 0.05–0.2: {rate:.1f} per unit time "
                f"(2π² = {2 * math.pi**2:.1f}: twice the slowest relaxation rate π² of the "
                "linearised dynamics around the steady state).")
    return rows, ts, gaps


def paths(figure_dir: Path) -> list[str]:
    """Rise and relaxation of the same fluctuation, out of and in equilibrium."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n, horizon, steps = 64, 0.3, 96
    cases = [((0.9, 0.1), "out of equilibrium: ρ_a = 0.9, ρ_b = 0.1"),
             ((0.5, 0.5), "equilibrium: ρ_a = ρ_b = 0.5")]
    fig, axes = plt.subplots(2, 4, figsize=(16, 7), constrained_layout=True)
    lines = []
    for row, ((a, b), title) in enumerate(cases):
        target = profile(a, b, "−0.15 sin(2πx)")
        rise, mass = bridge(n, steps, horizon, a, b, target, rise=True)
        relax, _ = bridge(n, steps, horizon, a, b, target, rise=False)
        x = rise.grid.axes[0]
        bar = rise.steady_density * mass
        occ_rise = rise.density * mass
        # the relaxation read backwards in time, to compare with the rise
        back = (relax.density * mass)[::-1]
        diff = occ_rise - back
        extent = [0, 1, 0, horizon]
        vmax = np.abs(occ_rise - bar).max()
        for col, data, name in ((0, occ_rise - bar, "rise: ρ_t − ρ̄"),
                                (1, back - bar, "relaxation, time reversed: ρ_(T−t) − ρ̄")):
            im = axes[row, col].imshow(data, origin="lower", aspect="auto", extent=extent,
                                       cmap="RdBu_r", vmin=-vmax, vmax=vmax)
            axes[row, col].set_title(f"{name}\n{title}", fontsize=9)
        fig.colorbar(im, ax=axes[row, 1], label="occupation − steady")
        dmax = max(np.abs(diff).max(), 1e-300)
        im = axes[row, 2].imshow(diff, origin="lower", aspect="auto", extent=extent,
                                 cmap="PuOr", vmin=-dmax, vmax=dmax)
        axes[row, 2].set_title(f"rise − reversed relaxation (largest {dmax:.1e})", fontsize=9)
        fig.colorbar(im, ax=axes[row, 2])
        for col in range(3):
            axes[row, col].set_xlabel("x")
            axes[row, col].set_ylabel("t")
        ax = axes[row, 3]
        for k, colour in zip((steps * 2 // 3, steps * 5 // 6, steps * 15 // 16),
                             ("tab:blue", "tab:orange", "tab:green"), strict=True):
            t = rise.times[k]
            ax.plot(x, occ_rise[k] - bar, color=colour, label=f"rise, t = {t:.3f}")
            ax.plot(x, back[k] - bar, "--", color=colour,
                    label=f"relaxation at T − t = {horizon - t:.3f}")
        ax.set_xlabel("x")
        ax.set_ylabel("occupation − steady")
        ax.set_title(f"costs: rise {rise.cost:.4f}, relaxation {relax.cost:.1e}", fontsize=9)
        ax.legend(fontsize=7)
        lines.append(f"| {title} | {rise.cost:.5f} | {relax.cost:.2e} | {dmax:.2e} |")
        print(lines[-1], flush=True)
    fig.savefig(figure_dir / "open_chain_paths.png", dpi=110)
    plt.close(fig)
    return lines


def currents(figure_dir: Path) -> list[str]:
    """Φ(j) of the time-averaged current (additivity principle) against the exact rate
    functions, the variance against ∫σ(ρ̄), and the optimal profiles."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    a, b = 0.8, 0.2
    js = np.linspace(-0.6, 1.8, 13)
    rows = []
    fig, axes = plt.subplots(1, 2, figsize=(11, 4), constrained_layout=True)
    for name, mob, exact_rate in (("exclusion", Exclusion(), current_rate),
                                  ("walkers", Walkers(), walkers_current_rate)):
        exact = np.array([exact_rate(j, a, b) for j in js])
        var_exact = current_variance(a, b) if name == "exclusion" else a + b
        for n in (32, 64):
            grid = Grid(0.0, 1.0, n)
            problem = BridgeProblem(grid=grid, initial=np.ones(n), final=np.ones(n),
                                    noise=SIGMA, horizon=1.0, steps=2)
            t0 = time.perf_counter()
            cf = current_fluctuations(problem, DirectOptions(
                mobility=mob, total_mass=1.0, reservoirs=Reservoirs(lower=[a], upper=[b])), js)
            seconds = time.perf_counter() - t0
            away = np.abs(js - cf.mean_current) > 1e-6  # Φ(j̄) = 0: no relative gap there
            gap = np.abs(cf.rates[away] / exact[away] - 1)
            rows.append(f"| {name} | {n} | {cf.variance:.7f} | {var_exact:.7f} | "
                        f"{cf.variance / var_exact - 1:+.2e} | {gap.max():.2e} | "
                        f"{seconds:.1f} |")
            print(rows[-1], flush=True)
        style = "-" if name == "exclusion" else "--"
        axes[0].plot(js, exact, "k" + style, lw=1, label=f"{name}, exact")
        axes[0].plot(js, cf.rates, "o", ms=4, label=f"{name}, time-independent profile (64)")
        if name == "exclusion":
            x = grid.axes[0]
            for j, prof in zip(js[::3], cf.profiles[::3], strict=True):
                axes[1].plot(x, prof, label=f"j = {j:.1f}")
            axes[1].plot(x, cf.steady_density, "k:", label=f"steady (j̄ = {cf.mean_current:.1f})")
    axes[0].set_xlabel("time-averaged current j")
    axes[0].set_ylabel("Φ(j) (per unit time)")
    axes[0].legend(fontsize=7)
    axes[1].set_xlabel("x")
    axes[1].set_ylabel("occupation")
    axes[1].set_title("exclusion: optimal profile for an atypical current", fontsize=9)
    axes[1].legend(fontsize=7)
    fig.savefig(figure_dir / "open_chain_currents.png", dpi=110)
    plt.close(fig)
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_output_flag(parser)
    parser.parse_args()
    torch.set_num_threads(1)
    report_dir = output_dir(ROOT / "experiments" / "reports")
    figure_dir = report_dir / "figures"
    figure_dir.mkdir(parents=True, exist_ok=True)
    start = time.perf_counter()
    rows, ratios = table()
    hrows, ts, gaps = horizons()
    prows = paths(figure_dir)
    crows = currents(figure_dir)
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(5, 3.5), constrained_layout=True)
    ax.semilogy(ts, gaps, "o-", label="J_T / V − 1 (32 cells, Δt = 1/64)")
    ax.semilogy(ts, gaps[0] * np.exp(-2 * math.pi**2 * (ts - ts[0])), "k--",
                label="∝ exp(−2π² T)")
    ax.set_xlabel("horizon T")
    ax.set_ylabel("relative gap to the quasi-potential")
    ax.legend(fontsize=8)
    fig.savefig(figure_dir / "open_chain_horizon.png", dpi=110)
    plt.close(fig)
    text = [
        "# The open exclusion chain: long-horizon cost against the exact quasi-potential", "",
        "Symmetric simple exclusion (χ = ρ(1 − ρ), D = 1) on [0, 1] between reservoirs at "
        "densities ρ_a (x = 0) and ρ_b (x = 1), noise σ = √2, so the direct solver's action "
        "is the macroscopic fluctuation theory action ¼∫∫|j + ∇ρ|²/χ (README, \"Lattice gases "
        "and the direct solver\"). J_T is the direct solver's cost of reaching a profile ρ from "
        "the steady (linear) profile in time T; V is the quasi-potential of Derrida, Lebowitz "
        "& Speer (PRL 87, 2001; J. Stat. Phys. 107, 2002), computed independently from its "
        "closed form by `mfbridge.solvers.open_ssep` (F from its boundary-value problem on "
        "4001 nodes). \"local\" is the local-equilibrium functional ∫ρ log(ρ/ρ̄) + "
        "(1 − ρ) log((1 − ρ)/(1 − ρ̄)): V exceeds it out of equilibrium (the long-range "
        "correlations of the open chain) and equals it when ρ_a = ρ_b.", "",
        f"T = {HORIZON} (the horizon's part of the gap, ~e^(−2π²T), is 1e-7), Δt = h/2, "
        "profiles that keep the reservoir densities at the walls.", "",
        "| reservoirs (ρ_a, ρ_b) | profile | V exact | local | J, 32 cells (gap) | "
        "J, 64 cells (gap) | gap ratio | seconds |",
        "|---|---|---|---|---|---|---|---|", *rows, "",
        f"The gap falls {min(ratios):.1f}–{max(ratios):.1f}× per refinement of h and Δt "
        "together: second order, the time step's error dominating (at 64 cells, 32 → 64 → 128 "
        "steps over T = 0.5 changed the gap from −1.2e-3 to −2.6e-4 to +3e-6 on the first "
        "profile). Profiles that do not match the reservoirs at the walls need a boundary layer "
        "at t = T and converge more slowly (0.15 + 0.7x² between 0.3 and 0.6: gap −2.8% at 32 "
        "cells × 32 steps).", "",
        "## Horizon", "",
        "| T | J_T / V − 1 |", "|---|---|", *hrows, "",
        "![gap against the horizon](figures/open_chain_horizon.png)", "",
        "## Optimal paths: the rise of a fluctuation and its relaxation", "",
        "The most likely way a fluctuation appears (rise: steady profile → ρ) is not the "
        "relaxation (ρ → steady profile, the free hydrodynamic evolution at zero cost) run "
        "backwards, unless the chain is in equilibrium: out of equilibrium the rise follows the "
        "adjoint hydrodynamics (Bertini, De Sole, Gabrielli, Jona-Lasinio & Landim, Rev. Mod. "
        "Phys. 87, 2015). 64 cells, T = 0.3, 96 steps, profile ρ̄ − 0.15 sin(2πx); the "
        "relaxation costs nothing (the free dynamics), the rise costs about V.", "",
        "| case | rise J | relaxation J | max |rise − reversed relaxation| |",
        "|---|---|---|---|", *prows, "",
        "![rise and relaxation](figures/open_chain_paths.png)", "",
        "## Current fluctuations (additivity principle)", "",
        "The probability that the current averaged over a long time t is j decays as "
        "exp(−t Φ(j)). With a time-independent optimal profile (Bodineau & Derrida, PRL 92, "
        "2004), Φ(j) is the minimum over profiles of the same action per unit time "
        "(`mfbridge.solvers.current_fluctuations`), and the variance of the current per unit "
        "time is 1/Φ''(j̄) (computed exactly from the discrete Hessian). Exact: for exclusion the "
        "Legendre transform of the cumulant generating function arcsinh²√ω (Derrida, Douçot & "
        "Roche, J. Stat. Phys. 115, 2004; variance ρ_a + ρ_b − (2/3)(ρ_a² + ρ_aρ_b + ρ_b²)), "
        "for independent walkers that of ρ_a(e^λ − 1) + ρ_b(e^−λ − 1) (variance ρ_a + ρ_b). "
        "Reservoirs (0.8, 0.2), 13 currents j from −0.6 to 1.8 (the steady current is 0.6).", "",
        "| mobility | cells | variance | exact | gap | largest relative gap of Φ (j ≠ j̄) | "
        "seconds |", "|---|---|---|---|---|---|---|", *crows, "",
        "![current fluctuations](figures/open_chain_currents.png)", "",
        f"Total time {time.perf_counter() - start:.0f} s on a shared 2-core machine "
        f"(load {os.getloadavg()[0]:.1f} at the end).",
    ]
    (report_dir / "open_chain.md").write_text("\n".join(text) + "\n")
    print(f"wrote {report_dir / 'open_chain.md'}")


if __name__ == "__main__":
    main()
