"""Hard regimes: wide dynamic range (log-domain propagation), strong attraction, warm starts."""

from __future__ import annotations

import mpmath
import numpy as np
import pytest

from mfbridge import lq_bridge
from mfbridge.errors import ConvergenceWarning, PrecisionWarning
from mfbridge.model.endpoints import Gaussian
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import DoubleWell, Harmonic, HarmonicInteraction
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics import observables
from mfbridge.numerics.entropic import UnderflowError
from mfbridge.numerics.propagator import StepOperator
from mfbridge.numerics.reference import PairField, edge_rates
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge

from .test_propagator import dense_generator


@pytest.mark.parametrize(("sigma", "tau"), [(1.0, 0.01), (0.3, 0.05)])
def test_log_domain_step_is_exact_cell_by_cell(sigma, tau):
    # log(M e^l) for l spanning thousands of e-folds, against the matrix exponential and the
    # sums evaluated with 60 significant digits (mpmath's expm, a general-purpose library).
    # measured errors 2.8e-14 and 5.7e-14 in the logarithm
    grid = Grid(-4.0, 4.0, 40)
    x = grid.axes[0]
    rates = edge_rates(x**2 / 2 + 0.3 * np.sin(3 * x), grid, sigma)
    q = dense_generator(rates, grid.shape)
    op = StepOperator(rates, tau, grid.shape)
    ell = -((x - 1.0) ** 2) / (2 * 0.05 * sigma**2)
    with mpmath.workdps(60):
        m = mpmath.expm(mpmath.matrix((tau * q).tolist()))
        weights = [mpmath.e ** mpmath.mpf(v) for v in ell]
        exact = [float(mpmath.log(sum(m[i, j] * weights[j] for j in range(40))))
                 for i in range(40)]
        exact_t = [float(mpmath.log(sum(m[j, i] * weights[j] for j in range(40))))
                   for i in range(40)]
    assert np.abs(op.log_apply(ell) - exact).max() < 5e-13
    assert np.abs(op.log_apply(ell, transpose=True) - exact_t).max() < 5e-13


def lq_problem(n: int = 64, steps: int = 10) -> BridgeProblem:
    return BridgeProblem(grid=Grid(-5.0, 5.0, n), initial=Gaussian(-1.0, 0.16),
                         final=Gaussian(1.2, 0.49), noise=1.0, horizon=1.0, steps=steps,
                         confinement=Harmonic(1.0), interaction=HarmonicInteraction(1.5))


def test_log_domain_and_rational_propagation_agree():
    # the same discrete kernel applied two ways: uniformisation in the log domain and the
    # rational contour approximation (accurate to ~1e-11 of the largest value)
    rational = solve_bridge(lq_problem(), SolverOptions(propagation="rational"))
    exact = solve_bridge(lq_problem(), SolverOptions(propagation="log"))
    assert rational.converged and exact.converged
    assert np.abs(rational.density - exact.density).max() < 1e-8
    assert abs(rational.cost - exact.cost) < 1e-8


def test_warm_start_from_the_solution_is_a_fixed_point():
    first = solve_bridge(lq_problem())
    again = solve_bridge(lq_problem(), warm_start=first)
    assert again.converged and again.iterations <= 2
    assert np.abs(again.density - first.density).max() < 1e-8


def double_well_problem(initial, final, horizon=1.0, n=256, steps=50, noise=0.7):
    return BridgeProblem(grid=Grid(-3.0, 3.0, n), initial=initial, final=final, noise=noise,
                         horizon=horizon, steps=steps, confinement=DoubleWell(1.0),
                         interaction=HarmonicInteraction(5.0))


def test_strong_attraction_needs_and_gets_the_log_domain():
    # Double well x^4/4 - x^2/2 with harmonic attraction kappa = 5 (far above the critical
    # strength), endpoints wider than the reference allows: the fast rational steps lose the tails
    # the endpoints need, the automatic route switches to exact log-domain steps and converges
    # from a cold start.
    problem = double_well_problem(Gaussian(0.0, 0.3), Gaussian(0.0, 0.3))
    with pytest.raises(UnderflowError, match="underflows"):
        solve_bridge(problem, SolverOptions(propagation="rational"))
    with pytest.warns(PrecisionWarning, match="log-domain"):
        result = solve_bridge(problem)
    assert result.converged, result.message
    assert "log-domain" in result.message
    # mirror symmetry of the problem (U, W, mu, nu all even): the mean stays at 0
    assert np.abs(result.mean).max() < 1e-8
    assert np.allclose(result.masses[0], problem.initial, atol=1e-10)
    assert np.allclose(result.masses[-1], problem.final, atol=1e-10)


def ordered_state(grid: Grid, noise: float) -> np.ndarray:
    """A stationary McKean-Vlasov state of the double well with attraction 5, ordered to the
    right: rho = exp(-2(U + W*rho)/sigma^2)/Z, found by damped iteration from a tilted start."""
    u = DoubleWell(1.0).value(grid.points)
    pair = PairField(grid, HarmonicInteraction(5.0))
    x = grid.axes[0]
    p = np.exp(-2 * (u - 0.5 * x) / noise**2)
    p /= p.sum()
    for _ in range(5000):
        phi = u + pair(p)
        q = np.exp(-2 * (phi - phi.min()) / noise**2)
        q /= q.sum()
        if np.abs(q - p).sum() < 1e-13:  # the rounding floor of the L1 change is ~2e-14
            return q
        p = 0.5 * (p + q)
    raise AssertionError("no stationary state")


@pytest.mark.slow
def test_strong_attraction_long_horizon_cost_is_the_free_energy_gap():
    # For kappa above the critical value the double well has ordered stationary states with mean
    # m solving m = int x exp(-2(U(x) + kappa (x - m)^2 / 2) / sigma^2) dx / Z (Dawson, J. Stat.
    # Phys. 31, 1983; Tugaut, Stochastics 86, 2014). From the ordered state to a nearby profile
    # the cost tends to (2/sigma^2)(F(nu) - F(rho_eq)) from above as T grows (the quasi-potential
    # of a reversible gradient flow; Bertini et al., Rev. Mod. Phys. 87, 2015). Measured gap of
    # the converged J: T = 1 +0.250, T = 4 +0.5e-4 .. +2e-4 (J(T = 4) = 0.73204 +- 0.00006 from
    # 512 cells and 400 steps).
    # J on the grid is second order in h and dt with errors of the same sign: 256 cells x 200
    # steps give 0.7287947, -4.4e-3 relative (space -1.7e-3: 64..512 cells at 200 steps 0.705261,
    # 0.723802, 0.728795, 0.730067, ratios 3.7, 3.9; time -1.5e-3: 50..400 steps at 128 cells
    # 0.708493, 0.719527, 0.723802, 0.724927, ratios 2.6, 3.8). (The trapezoid J reported before
    # the midpoint rule had time error +1.4e-3, which cancelled the space error: -1.9e-4.) A
    # grid meeting 5e-4 directly would need ~768 cells x 600 steps, so the test extrapolates
    # from 128 x 100 (0.7195274) to zero h and dt at order 2 (Richardson): 0.7318838, -9.3e-5
    # from the limit (-2.1e-4 from J(T = 4)).
    noise = 0.7
    options = SolverOptions(time_budget=None)  # a slow study: no wall-clock limit under load
    costs = []
    for n, steps in ((256, 200), (128, 100)):
        grid = Grid(-3.0, 3.0, n)
        rho_eq = ordered_state(grid, noise)
        x = grid.axes[0]
        mean = float((rho_eq * x).sum())
        gibbs = np.exp(-2 * (DoubleWell(1.0).value(grid.points) + 2.5 * (x - mean) ** 2)
                       / noise**2)
        assert abs((gibbs * x).sum() / gibbs.sum() - mean) < 1e-10
        assert mean > 0.5
        nu = Gaussian(0.3, 0.1).masses(grid)
        if n == 256:
            pair = PairField(grid, HarmonicInteraction(5.0))
            free = observables.free_energy(np.stack([rho_eq, nu]), grid, noise,
                                           DoubleWell(1.0).value(grid.points), pair)
            limit = 2 / noise**2 * (free[1] - free[0])  # 0.73195215 (the same on 64 cells)
        result = solve_bridge(double_well_problem(rho_eq, nu, horizon=4.0, n=n, steps=steps),
                              options)
        assert result.converged, result.message
        costs.append(result.cost)
    extrapolated = costs[0] + (costs[0] - costs[1]) / 3
    assert abs(extrapolated - limit) / limit < 5e-4, (costs, extrapolated, limit)


def test_failure_at_small_noise_on_a_coarse_grid_says_to_refine():
    # sigma = 0.1 with h = 1/8: the transport needs a cell Péclet number |u|h/D in the hundreds;
    # without the continuations the iteration fails, and the message must say why
    problem = BridgeProblem(grid=Grid(-4.0, 4.0, 64), initial=Gaussian(-1.0, 0.16),
                            final=Gaussian(1.2, 0.49), noise=0.1, horizon=1.0, steps=10,
                            confinement=Harmonic(1.0), interaction=HarmonicInteraction(1.5))
    with pytest.warns(ConvergenceWarning, match="Péclet"):
        result = solve_bridge(problem, SolverOptions(noise_continuation=0, continuation=0,
                                                     cross_check="off"))
    assert not result.converged
    assert "refine the grid" in result.message


@pytest.mark.slow
def test_small_noise_linear_quadratic_bridge_converges_at_second_order_in_time():
    # sigma = 0.1: the kernel spans e^{-Delta x^2 / (2 sigma^2 T)} far below double precision, so
    # the solver moves to log-domain steps by itself, and converges from a cold start (25-33
    # outer iterations). Linear-quadratic case, exact answer from mfbridge.solvers.linear_quadratic
    # (Mallasto, Gerolin & Minh 2022; Bunne et al. 2023). 512 cells on [-1.6, 1.8] keep the cell
    # Péclet number near 1. Measured J(K) for K = 10, 20, 40: 38.200413, 37.828323, 37.734996:
    # successive differences shrink 3.99-fold (second order in time); the extrapolated
    # J(40) - (J(20) - J(40))/3 is 3.4e-3 below the exact 37.834226, the space error at this h
    # (8.8e-3 at 256 cells).
    costs = []
    for steps in (10, 20, 40):
        problem = BridgeProblem(grid=Grid(-1.6, 1.8, 512), initial=Gaussian(-0.3, 0.0625),
                                final=Gaussian(0.3, 0.09), noise=0.1, horizon=1.0, steps=steps,
                                confinement=Harmonic(1.0), interaction=HarmonicInteraction(1.5))
        with pytest.warns(PrecisionWarning, match="log-domain"):
            result = solve_bridge(problem)
        assert result.converged, result.message
        costs.append(result.cost)
    exact = lq_bridge(stiffness=1.0, strength=1.5, noise=0.1, horizon=1.0, mean0=-0.3,
                      cov0=0.0625, mean1=0.3, cov1=0.09, times=2).cost
    ratio = (costs[0] - costs[1]) / (costs[1] - costs[2])
    assert 3.5 < ratio < 4.5, ratio
    extrapolated = costs[2] - (costs[1] - costs[2]) / 3
    assert abs(extrapolated / exact - 1) < 5e-3
    assert abs(costs[2] / exact - 1) < 5e-3  # measured 2.6e-3
