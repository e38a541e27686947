"""Open walls held by particle reservoirs (direct solver): steady profiles and currents, the long-
horizon cost against the exact quasi-potential of the open exclusion process, equilibrium
reservoirs, 2D channels against 1D chains, and refused input."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import torch
from hydra.utils import instantiate

from mfbridge.errors import InputError
from mfbridge.model.grid import Grid
from mfbridge.model.mobility import EnergyExchange, Exclusion, ZeroRange
from mfbridge.model.problem import BridgeProblem
from mfbridge.model.reservoirs import Reservoirs
from mfbridge.runs.api import CONF_DIR, compose, solve
from mfbridge.solvers.direct import DirectOptions, solve_direct, steady_state
from mfbridge.solvers.open_ssep import local_free_energy, quasi_potential

torch.set_num_threads(1)
SIGMA = math.sqrt(2.0)  # noise at which the code's action is the MFT action (README)


def _chain(n: int, length: float = 1.0, steps: int = 2, horizon: float = 1.0,
           final: np.ndarray | None = None, noise: float = SIGMA) -> BridgeProblem:
    return BridgeProblem(grid=Grid(0.0, length, n), initial=np.ones(n),
                         final=np.ones(n) if final is None else final, noise=noise,
                         horizon=horizon, steps=steps)


@pytest.mark.parametrize("noise", [SIGMA, 1.0])
def test_open_exclusion_steady_profile_is_linear_with_fick_current(noise):
    # Open SSEP (D = 1): steady profile rho_a + (rho_b - rho_a) x/L, current (rho_a - rho_b)/L in
    # MFT units (sigma^2 = 2), (sigma^2/2)(rho_a - rho_b)/L in the code's (Bertini, De Sole,
    # Gabrielli, Jona-Lasinio & Landim, "Macroscopic fluctuation theory", Rev. Mod. Phys. 87,
    # 2015). Exact in the discretisation (measured errors 0.0 and 6e-16).
    problem = _chain(17, length=2.0, noise=noise)
    state = steady_state(problem, DirectOptions(mobility=Exclusion(),
                                                reservoirs=Reservoirs(lower=[0.9], upper=[0.1])))
    x = problem.grid.axes[0]
    np.testing.assert_allclose(state.density, 0.9 - 0.8 * x / 2.0, atol=1e-13)
    current = 0.5 * noise**2 * 0.8 / 2.0
    assert state.current["axis0_lower"] == pytest.approx(current, rel=1e-12)
    assert state.current["axis0_upper"] == pytest.approx(-current, rel=1e-12)


def test_energy_exchange_steady_profile_is_linear():
    # KMP-type energy exchange has D = 1 too: linear steady profile (Bertini et al., Rev. Mod.
    # Phys. 87, 2015), exact here (measured error 0.0)
    problem = _chain(12)
    state = steady_state(problem, DirectOptions(mobility=EnergyExchange(),
                                                reservoirs=Reservoirs(lower=[2.0], upper=[0.5])))
    np.testing.assert_allclose(state.density, 2.0 - 1.5 * problem.grid.axes[0], atol=1e-12)
    assert state.current["axis0_lower"] == pytest.approx(1.5, rel=1e-12)


def test_zero_range_steady_fugacity_is_linear_to_second_order():
    # zero-range: the hydrodynamic equation is d rho/dt = Laplacian phi(rho), so phi(rho_bar) is
    # linear between the reservoirs' fugacities and the current is phi(rho_a) - phi(rho_b)
    # (C. Kipnis & C. Landim, "Scaling limits of interacting particle systems", 1999; Bertini
    # et al., Rev. Mod. Phys. 87, 2015). The discretisation D(rho_f)(rho_hi - rho_lo) of
    # phi(rho_hi) - phi(rho_lo) is second order: measured largest errors of phi 1.397e-3,
    # 3.49e-4 (16, 32 cells), ratio 4.00.
    errors = []
    for n in (16, 32):
        problem = _chain(n)
        state = steady_state(problem, DirectOptions(
            mobility=ZeroRange(), reservoirs=Reservoirs(lower=[3.0], upper=[0.2])))
        phi = state.density / (1 + state.density)
        fa, fb = 3.0 / 4.0, 0.2 / 1.2
        errors.append(np.abs(phi - (fa + (fb - fa) * problem.grid.axes[0])).max())
        assert state.current["axis0_lower"] == pytest.approx(fa - fb, rel=2 * errors[-1] / 0.5)
    assert 3.6 < errors[0] / errors[1] < 4.4, errors


def _fluctuation(n: int, steps: int, horizon: float, a: float, b: float, profile
                 ) -> tuple[float, BridgeProblem]:
    """The direct solver's cost of the open SSEP's steady state rising to ``profile`` in
    ``horizon``, on n cells of [0, 1]."""
    grid = Grid(0.0, 1.0, n)
    target = profile(grid.axes[0])
    mass = float(target.sum() * grid.cell_volume)
    problem = BridgeProblem(grid=grid, initial=np.ones(n), final=target, noise=SIGMA,
                            horizon=horizon, steps=steps)
    result = solve_direct(problem, DirectOptions(
        mobility=Exclusion(), total_mass=mass,
        reservoirs=Reservoirs(lower=[a], upper=[b], initial="steady", final_mass=mass)))
    assert result.converged, result.message
    assert result.marginal_error < 1e-12  # mass balance through the open walls
    return result.cost, problem


#: fluctuations of the steady profile that keep the reservoirs' densities at the walls (profiles
#: that do not create a boundary layer at t = T and converge far more slowly)
BUMPS = {
    "sin": lambda x: 0.15 * np.sin(np.pi * x),
    "sin2": lambda x: -0.15 * np.sin(2 * np.pi * x),
    "square": lambda x: 0.2 * np.sin(np.pi * x) ** 2 * (1 - 0.5 * x),
}


def _profile(a: float, b: float, bump: str):
    return lambda x: a + (b - a) * x + BUMPS[bump](x)


def test_long_horizon_cost_is_the_exact_open_ssep_quasi_potential():
    # J_T(rho_bar -> rho) -> V(rho) as T -> infinity, V the Derrida-Lebowitz-Speer functional
    # (B. Derrida, J. L. Lebowitz & E. R. Speer, "Free energy functional for nonequilibrium
    # systems: an exactly solvable case", PRL 87, 2001; J. Stat. Phys. 107, 2002), computed
    # independently in mfbridge.solvers.open_ssep. At T = 0.5 the horizon's part of the gap is
    # ~e^{-2 pi^2 T} ~ 5e-5, the rest is the discretisation's: measured +2.06e-3 and +1.95e-4
    # at 32 cells x 32 steps (+5.17e-4, +8.79e-5 at 64 x 64; the slow study below has the full
    # table and its convergence).
    for (a, b), bump, bound in (((0.8, 0.2), "sin2", 4e-3), ((0.3, 0.6), "sin", 4e-4)):
        profile = _profile(a, b, bump)
        cost, _ = _fluctuation(32, 32, 0.5, a, b, profile)
        exact = quasi_potential(profile, a, b).value
        assert 0 < cost / exact - 1 < bound, (a, b, bump, cost, exact)


@pytest.mark.slow
def test_quasi_potential_table_converges_at_second_order():
    # The same check at two reservoir pairs and three profiles, at T = 0.8 (horizon error
    # ~e^{-2 pi^2 T} ~ 1e-7) and dt = h/2 on 32 and 64 cells: the gap to the exact V falls ~4x
    # (second order in h and dt jointly). Measured: largest |gap| at 64 cells 7.33e-4, gap
    # ratios 3.74 to 4.39 (table in experiments/reports/open_chain.md).
    for a, b in ((0.8, 0.2), (0.3, 0.6)):
        for bump in BUMPS:
            profile = _profile(a, b, bump)
            exact = quasi_potential(profile, a, b).value
            gaps = [_fluctuation(n, round(1.6 * n), 0.8, a, b, profile)[0] / exact - 1
                    for n in (32, 64)]
            assert abs(gaps[1]) < 1e-3, (a, b, bump, gaps)
            assert abs(gaps[0]) / abs(gaps[1]) > 2.5, (a, b, bump, gaps)


@pytest.mark.slow
def test_cost_approaches_the_quasi_potential_exponentially_in_the_horizon():
    # J_T - V ~ exp(-2 lambda T) with lambda the slowest relaxation rate of the linearised
    # dynamics around the steady state, pi^2 D/L^2 = pi^2 here (linear response; Bertini et al.,
    # Rev. Mod. Phys. 87, 2015, the quasi-potential as the infinite-horizon limit); the gap
    # falls by ~e^{2 pi^2 0.1} = 7.2 per 0.1 of horizon until the discretisation's floor.
    # Measured at 32 cells, dt = 1/64: gaps +0.160, +0.0199, +0.00323 at T = 0.1, 0.2, 0.3 (ratio
    # 8.0, then 6.2 as the discretisation's floor, ~6e-4 here, is approached).
    profile = _profile(0.8, 0.2, "sin")
    exact = quasi_potential(profile, 0.8, 0.2).value
    gaps = [_fluctuation(32, round(64 * t), t, 0.8, 0.2, profile)[0] / exact - 1
            for t in (0.1, 0.2, 0.3)]
    assert gaps[0] > gaps[1] > gaps[2] > 0, gaps
    assert 4 < gaps[0] / gaps[1] < 12, gaps


def test_equal_reservoirs_give_the_local_free_energy():
    # rho_a = rho_b: the open chain is in equilibrium and V is the local free energy
    # int rho log(rho/rho_a) + (1 - rho) log((1 - rho)/(1 - rho_a)) (Derrida, Lebowitz & Speer
    # 2001; Bertini et al., Rev. Mod. Phys. 87, 2015). Measured gaps -6.22e-3 (16 cells x 32
    # steps) and -1.76e-3 (32 x 64), ratio 3.5: second order.
    def profile(x):
        return 0.4 + 0.25 * np.sin(2 * np.pi * x)

    exact = local_free_energy(profile, 0.4, 0.4)
    gaps = [_fluctuation(n, 2 * n, 0.5, 0.4, 0.4, profile)[0] / exact - 1 for n in (16, 32)]
    assert -1.3e-2 < gaps[0] < gaps[1] < 0, gaps
    assert 3.0 < gaps[0] / gaps[1] < 4.5, gaps


def test_two_dimensional_channel_reduces_to_the_chain():
    # Open walls on both ends of axis 0 of a [0, 1] x [0, w] box, closed along axis 1, data that
    # do not depend on x1: by symmetry the optimal flow does not either, and J_2D = w J_1D (the
    # discrete problems coincide; common practice, no source). Measured relative mismatch 7e-16.
    n, width, steps = 12, 0.5, 6
    profile = 0.5 + 0.25 * np.cos(2.5 * Grid(0.0, 1.0, n).axes[0])
    grid = Grid([0.0, 0.0], [1.0, width], [n, 3])
    results = []
    for g, final, walls in ((Grid(0.0, 1.0, n), profile, ([0.7], [0.2])),
                            (grid, np.repeat(profile[:, None], 3, axis=1),
                             ([0.7, None], [0.2, None]))):
        area = float(np.prod(g.extent[1:])) if g.dim == 2 else 1.0
        mass = float(final.sum() * g.cell_volume)
        problem = BridgeProblem(grid=g, initial=np.ones(g.shape), final=final, noise=SIGMA,
                                horizon=0.2, steps=steps)
        results.append(solve_direct(problem, DirectOptions(
            mobility=Exclusion(), total_mass=mass, tol=1e-11,
            reservoirs=Reservoirs(lower=walls[0], upper=walls[1], initial="steady",
                                  final_mass=mass))).cost / area)
    assert results[1] == pytest.approx(results[0], rel=1e-12)


def test_bad_reservoirs_are_refused_with_the_fix():
    problem = _chain(8)
    with pytest.raises(InputError, match=r"reservoir density 1.2 .* exclusion mobility "
                                         r"\(0 < ρ < 1"):
        steady_state(problem, DirectOptions(mobility=Exclusion(),
                                            reservoirs=Reservoirs(lower=[1.2], upper=[0.2])))
    with pytest.raises(InputError, match=r"axis 1, but the grid has 1 axis"):
        solve_direct(problem, DirectOptions(reservoirs=Reservoirs(lower=[0.5, 0.4])))
    with pytest.raises(InputError, match="at least one open wall"):
        Reservoirs(lower=[None], upper=[])
    with pytest.raises(InputError, match="initial must be one of given, steady"):
        Reservoirs(lower=[0.5], initial="stationary")
    with pytest.raises(InputError, match="method='newton'"):
        DirectOptions(method="lbfgs", reservoirs=Reservoirs(lower=[0.5]))
    with pytest.raises(InputError, match=r"lower\[0\] must be a density"):
        Reservoirs(lower=["high"])


def test_every_reservoirs_option_builds_and_the_config_runs():
    # a test instantiates every option of the group (DEVELOPERS.md)
    for path in sorted((CONF_DIR / "reservoirs").glob("*.yaml")):
        built = instantiate(compose([f"reservoirs={path.stem}"]).reservoirs)
        assert built is None or isinstance(built, Reservoirs), path.stem
    cfg = compose(["solver=direct", "mobility=exclusion", "reservoirs=open_chain",
                   "grid=line", "grid.lower=0", "grid.upper=1", "grid.shape=16", "steps=4",
                   "horizon=0.1",
                   "endpoints=gaussians", "endpoints.initial.mean=0.5",
                   "endpoints.initial.cov=0.02", "endpoints.final.mean=0.5",
                   "endpoints.final.cov=0.02", "confinement=none", "interaction=none",
                   "solver.total_mass=0.2", f"noise={SIGMA}"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = solve(cfg)
    reservoirs = result.model["reservoirs"]
    assert reservoirs["steady_current"]["axis0_lower"] == pytest.approx(0.6, rel=1e-12)
    np.testing.assert_allclose(result.steady_density * 0.2, 0.8 - 0.6 * result.grid.axes[0],
                               atol=1e-13)
    np.testing.assert_allclose(result.density[0], result.steady_density, atol=1e-13)
    with pytest.raises(InputError, match="reservoirs=open_chain has no effect"):
        solve(compose(["reservoirs=open_chain"]))
