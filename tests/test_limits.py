"""Limits with known answers: small noise (optimal transport) and long horizon (free energy)."""

from __future__ import annotations

import numpy as np
import ot
import pytest

from mfbridge.errors import PrecisionWarning
from mfbridge.model.endpoints import Gaussian, GaussianMixture
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import GaussianCore, Harmonic
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics import observables
from mfbridge.numerics.reference import PairField
from mfbridge.solvers.fixed_point import solve_bridge


def quantile_function(p: np.ndarray, grid: Grid, u: np.ndarray) -> np.ndarray:
    """Inverse CDF of cell masses spread uniformly in their cells (1D)."""
    cdf = np.concatenate([[0.0], np.cumsum(p)])
    cdf /= cdf[-1]
    return np.interp(u, cdf, grid.edges[0])


def small_noise_endpoints() -> tuple[Grid, np.ndarray, np.ndarray]:
    grid = Grid(-3.0, 3.0, 400)
    mu = GaussianMixture([0.5, 0.5], [-1.2, -0.4], [0.05, 0.05]).masses(grid)
    nu = Gaussian(0.8, 0.1).masses(grid)
    return grid, mu, nu


def transport_cost(grid: Grid, mu: np.ndarray, nu: np.ndarray) -> float:
    """W_2^2(mu, nu) between cell masses at the cell centres, by POT's exact solver ot.emd2."""
    x = grid.axes[0]
    return float(ot.emd2(mu, nu, (x[:, None] - x[None, :]) ** 2))


def displacement_distance(result, grid: Grid, mu: np.ndarray, nu: np.ndarray) -> float:
    """W_2 at t = T/2 between the bridge and McCann's displacement interpolation, whose 1D
    quantile function is (1 - t) Q_mu + t Q_nu (McCann, Adv. Math. 1997)."""
    u = (np.arange(20000) + 0.5) / 20000
    q_mu, q_nu = quantile_function(mu, grid, u), quantile_function(nu, grid, u)
    k = len(result.times) // 2
    t = result.times[k] / result.horizon
    q_bridge = quantile_function(result.masses[k], grid, u)
    return float(np.sqrt(np.mean((q_bridge - ((1 - t) * q_mu + t * q_nu)) ** 2)))


@pytest.fixture(scope="module")
def small_noise_runs():
    grid, mu, nu = small_noise_endpoints()
    runs = {}
    for sigma in (0.4, 0.3, 0.2, 0.15):
        result = solve_bridge(BridgeProblem(grid=grid, initial=mu, final=nu, noise=sigma,
                                            horizon=1.0, steps=100))
        assert result.converged, result.message
        runs[sigma] = result
    return grid, mu, nu, runs


def test_small_noise_cost_tends_to_the_transport_cost(small_noise_runs):
    # sigma^2 J -> W_2^2(mu, nu) / (2T) as sigma -> 0 (entropic OT -> OT: Carlier, Duval,
    # Peyré & Schmitzer, SIAM J. Math. Anal. 2017), with W_2 from POT's exact solver ot.emd2.
    # The gap of entropic OT is O(eps log(1/eps)) with eps ~ sigma^2, i.e. a local log-log
    # slope of at least ~1.5 here; measured gaps 4.8e-2, 2.1e-2, 7.1e-3, 3.5e-3 (slope ~2.6).
    grid, mu, nu, runs = small_noise_runs
    w2sq = transport_cost(grid, mu, nu)
    sigmas = np.array(sorted(runs, reverse=True))
    gaps = np.array([s**2 * runs[s].cost - w2sq / 2.0 for s in sigmas])
    assert np.all(gaps > 0)
    assert np.all(np.diff(gaps) < 0)
    slope = np.polyfit(np.log(sigmas), np.log(gaps), 1)[0]
    assert slope > 1.5, slope
    assert gaps[-1] / (w2sq / 2) < 5e-3  # measured 2.7e-3


def test_small_noise_flow_tends_to_displacement_interpolation(small_noise_runs):
    # As sigma -> 0 the bridge marginals tend to McCann's displacement interpolation, which in 1D
    # has quantile function (1 - t) Q_mu + t Q_nu (McCann, Adv. Math. 1997). The entropic flow
    # adds Brownian-bridge variance of order sigma^2 t(1-t)T, and W_2 is linear in a variance
    # perturbation, so W_2 falls like sigma^2 (measured slope 1.98).
    grid, mu, nu, runs = small_noise_runs
    sigmas = np.array(sorted(runs, reverse=True))
    distances = np.array([displacement_distance(runs[s], grid, mu, nu) for s in sigmas])
    slope = np.polyfit(np.log(sigmas), np.log(distances), 1)[0]
    assert 1.6 < slope < 2.4, slope
    assert np.all(distances < sigmas**2)


@pytest.mark.slow
def test_transport_limit_holds_at_sigma_005():
    # The same endpoints at sigma = 0.05: the kernel spans ~e^{-W_2^2/(2 sigma^2 T)} = e^{-260},
    # so the solver must move to exact log-domain propagation on its own (PrecisionWarning).
    # Against POT's exact W_2 (ot.emd2): the entropic gap is O(eps log(1/eps)), eps ~ sigma^2
    # (Carlier, Duval, Peyré & Schmitzer, SIAM J. Math. Anal. 2017). Measured relative gaps
    # 2.7e-3 (sigma = 0.15), 1.1e-3 (0.1), 2.5e-4 (0.05); bound 5e-4 at 0.05.
    grid, mu, nu = small_noise_endpoints()
    with pytest.warns(PrecisionWarning, match="log-domain"):
        result = solve_bridge(BridgeProblem(grid=grid, initial=mu, final=nu, noise=0.05,
                                            horizon=1.0, steps=100))
    assert result.converged, result.message
    w2sq = transport_cost(grid, mu, nu)
    gap = (0.05**2 * result.cost - w2sq / 2) / (w2sq / 2)
    assert 0 < gap < 5e-4, gap
    # the flow: McCann's interpolation plus O(sigma^2) Brownian-bridge spread (see above);
    # measured 2.8e-3 = 1.12 sigma^2 here (the grid's h = 0.015 adds to the spread at this sigma)
    assert displacement_distance(result, grid, mu, nu) < 1.5 * 0.05**2


def stationary_state(grid: Grid, confinement, interaction, noise: float) -> np.ndarray:
    """The discrete McKean-Vlasov equilibrium p = exp(-2(U + W*p)/sigma^2)/Z by damped iteration.

    The reference chain is reversible for exp(-2 Phi/sigma^2) (tests/test_propagator.py), so this
    p is stationary for the chain with Phi = U + W*p.
    """
    u = confinement.value(grid.points)
    pair = PairField(grid, interaction)
    p = np.exp(-2 * u / noise**2)
    p /= p.sum()
    for _ in range(500):
        q = np.exp(-2 * (u + pair(p) - (u + pair(p)).min()) / noise**2)
        q /= q.sum()
        if np.abs(q - p).sum() < 1e-15:
            return q
        p = 0.5 * (p + q)
    raise AssertionError("no stationary state found")


CONFINEMENT, INTERACTION, NOISE = Harmonic(1.0), GaussianCore(0.8, 0.5), 1.0


def test_stationary_endpoints_give_a_constant_flow_at_zero_cost():
    # mu = nu = rho_eq: the reference itself is the bridge (Bertini et al., Rev. Mod. Phys. 87,
    # 2015: the quasi-potential vanishes at equilibrium).
    grid = Grid(-4.0, 4.0, 256)
    p_eq = stationary_state(grid, CONFINEMENT, INTERACTION, NOISE)
    result = solve_bridge(BridgeProblem(grid=grid, initial=p_eq, final=p_eq, noise=NOISE,
                                        horizon=1.0, steps=20, confinement=CONFINEMENT,
                                        interaction=INTERACTION))
    assert result.converged
    assert np.abs(result.masses - p_eq).max() < 1e-12
    assert abs(result.cost) < 1e-12
    assert np.abs(result.control).max() < 1e-10
    assert np.abs(result.correction).max() < 1e-10


def test_long_horizon_cost_tends_to_twice_the_free_energy_gap():
    # For reversible dynamics J_T(rho_eq, nu) -> (2/sigma^2)(F(nu) - F(rho_eq)) as T -> infinity
    # (quasi-potential = free energy: Bertini, De Sole, Gabrielli, Jona-Lasinio & Landim, Rev.
    # Mod. Phys. 87, 2015). Measured relative gaps 1.2e-1, 1.4e-2, 1.5e-3 for T = 1, 2, 3: an
    # exponential approach with rate ~2.2 per unit time, the same on both steps. (At T = 4 the
    # gap, 2.0e-4 by Richardson's rule from 256 and 512 cells, is below the cost's own
    # discretisation error at 256 cells, -3.2e-4, so the ladder stops at T = 3.)
    grid = Grid(-4.0, 4.0, 256)
    p_eq = stationary_state(grid, CONFINEMENT, INTERACTION, NOISE)
    nu = Gaussian(1.0, 0.2).masses(grid)
    pair = PairField(grid, INTERACTION)
    u = CONFINEMENT.value(grid.points)
    free = observables.free_energy(np.stack([p_eq, nu]), grid, NOISE, u, pair)
    limit = 2.0 / NOISE**2 * (free[1] - free[0])
    horizons = np.array([1.0, 2.0, 3.0])
    gaps = []
    for horizon in horizons:
        result = solve_bridge(BridgeProblem(grid=grid, initial=p_eq, final=nu, noise=NOISE,
                                            horizon=horizon, steps=int(80 * horizon),
                                            confinement=CONFINEMENT, interaction=INTERACTION))
        assert result.converged, result.message
        gaps.append((result.cost - limit) / limit)
    gaps = np.array(gaps)
    assert np.all(gaps > 0) and np.all(np.diff(gaps) < 0)
    rates = -np.diff(np.log(gaps)) / np.diff(horizons)
    assert abs(rates[1] - rates[0]) < 0.2 * rates[0], rates
    assert gaps[-1] < 3e-3
