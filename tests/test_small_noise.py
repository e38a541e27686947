"""Small noise: why the jump chain fails there, and the split heat kernel that replaces it
(mfbridge.solvers.small_noise), against the exact linear-quadratic bridge and optimal transport."""

from __future__ import annotations

import math

import numpy as np
import ot
import pytest

from mfbridge.errors import InputError
from mfbridge.model.endpoints import Gaussian, GaussianMixture
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import Harmonic, HarmonicInteraction
from mfbridge.model.problem import BridgeProblem
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge
from mfbridge.solvers.linear_quadratic import lq_bridge
from mfbridge.solvers.small_noise import mean_response, resolution


def reference_case(noise: float, cells: int, steps: int) -> BridgeProblem:
    """The linear-quadratic reference case of the benchmarks: U = x^2/2, W = 1.5 x^2/2,
    N(-1, 0.4^2) -> N(1.2, 0.7^2) over T = 1 on [-4, 4]."""
    return BridgeProblem(grid=Grid(-4.0, 4.0, cells), initial=Gaussian(-1.0, 0.16),
                         final=Gaussian(1.2, 0.49), noise=noise, horizon=1.0, steps=steps,
                         confinement=Harmonic(1.0), interaction=HarmonicInteraction(1.5))


def exact_cost(noise: float) -> float:
    return lq_bridge(stiffness=1.0, strength=1.5, noise=noise, horizon=1.0, mean0=-1.0,
                     cov0=0.16, mean1=1.2, cov1=0.49, times=2).cost


def test_chain_overreacts_to_a_potential_at_large_peclet_numbers_and_gaussian_steps_do_not():
    # The cause of the small-noise failures. Weighting the bridge by exp(-eps int X_t dt) moves
    # its mean; for U = a x^2/2 the mean solves the linear-quadratic problem
    # min int (m' + a m)^2/(2 sigma^2) + eps m dt with fixed ends, whose Euler-Lagrange equation
    # gives dm(T/2)/d eps = (sigma/a)^2 e^{-aT/2} [tanh(aT/2) - (e^{aT/2} - 1)] (calculus of
    # variations; the linear-quadratic regulator, e.g. Anderson & Moore, "Optimal Control:
    # Linear Quadratic Methods", 1990, from memory; checked here against a finite-difference
    # solve, -4.5272e-3 both). The jump chain's response is larger by about Pe/2, Pe = 2.2 h/D
    # the transport's cell Péclet number (its transport cost is flatter than J): measured
    # 8.18 and 4.27 times at Pe = 18.3 and 9.2; the split heat kernel's is the continuum's
    # (measured 1 - 4.6e-4).
    noise, a, horizon = 0.2, 1.0, 1.0
    exact = (noise / a) ** 2 * math.exp(-a * horizon / 2) * (
        math.tanh(a * horizon / 2) - math.expm1(a * horizon / 2))
    ratios = {}
    for kernel, cells in (("chain", 48), ("chain", 96), ("gaussian", 96)):
        problem = BridgeProblem(grid=Grid(-4.0, 4.0, cells), initial=Gaussian(-1.0, 0.16),
                                final=Gaussian(1.2, 0.49), noise=noise, horizon=horizon,
                                steps=10, confinement=Harmonic(a))
        ratios[kernel, cells] = mean_response(problem, kernel, 0.25) / exact
    for cells in (48, 96):
        peclet = 2.2 * (8.0 / cells) / (noise**2 / 2)
        assert 0.35 * peclet < ratios["chain", cells] < 0.6 * peclet, ratios
    assert abs(ratios["gaussian", 96] - 1) < 1e-3, ratios


def test_reference_case_at_sigma_01_matches_the_exact_bridge():
    # sigma = 0.1 on 256 cells: the chain's cell Péclet number is ~14 and its outer loop
    # diverges; kernel=auto takes the Gaussian steps (sigma sqrt(dt) = 0.72 h at 20 steps).
    # Exact J from the closed form (Bunne, Hsieh, Cuturi & Krause, AISTATS 2023, for the
    # centred part; mfbridge.solvers.linear_quadratic). Measured relative error 1.8e-3 (the time
    # error of 20 steps; 5.4e-4 at 320 cells and 32 steps), mean error 9.7e-5.
    problem = reference_case(0.1, 256, 20)
    found = resolution(problem)
    assert found.kernel == "gaussian" and found.peclet > 2 and found.width >= 0.7
    result = solve_bridge(problem)
    assert result.converged, result.message
    assert "Gaussian steps" in result.message
    assert abs(result.cost / exact_cost(0.1) - 1) < 4e-3
    exact = lq_bridge(stiffness=1.0, strength=1.5, noise=0.1, horizon=1.0, mean0=-1.0,
                      cov0=0.16, mean1=1.2, cov1=0.49, times=21)
    assert np.abs(result.mean[:, 0] - exact.mean[:, 0]).max() < 2e-4
    # the correction potential is finite and of the continuum's size, kappa |u| |x - m| / sigma^2
    assert np.all(np.isfinite(result.correction))


def test_gaussian_cost_is_consistent_with_the_chains_at_second_order():
    # Where both kernels resolve the flow (sigma = 1: cell Péclet number <= 0.46 at 128 cells,
    # sigma sqrt(dt) >= 2.5 h), J reported with the Gaussian steps (the path-space KL of their
    # chain) and with the jump chain (the action of the control flux) are two discretisations of
    # the same rate function: their difference must fall like h^2 + dt^2 when h and dt are
    # halved together (common practice, no source: two consistent second-order schemes). Both
    # are also checked against the closed form (Bunne, Hsieh, Cuturi & Krause, AISTATS 2023).
    # Measured relative differences 4.71e-2, 1.28e-2, 3.27e-3 at 32 x 8, 64 x 16, 128 x 32
    # (ratios 3.67, 3.92; 3.98 at 256 x 64); errors against the closed form at 128 x 32:
    # chain -2.44e-3 (J at the step midpoints, solvers/cost.py: its time error -0.84/K^2 adds
    # to the space error, where the trapezoid rule's +0.73/K^2 gave -9.1e-4), Gaussian +8.4e-4.
    exact = exact_cost(1.0)
    gaps, errors = [], {}
    for cells, steps in ((32, 8), (64, 16), (128, 32)):
        problem = reference_case(1.0, cells, steps)
        costs = {}
        for kernel in ("chain", "gaussian"):
            result = solve_bridge(problem, SolverOptions(kernel=kernel))
            assert result.converged, result.message
            costs[kernel] = result.cost
        assert resolution(problem).kernel == "chain"  # auto keeps the chain here
        gaps.append((costs["gaussian"] - costs["chain"]) / exact)
        errors = {k: abs(c / exact - 1) for k, c in costs.items()}
    assert gaps[0] / gaps[1] > 3.2 and gaps[1] / gaps[2] > 3.5, gaps
    assert abs(gaps[2]) < 6.5e-3, gaps
    assert errors["chain"] < 5e-3 and errors["gaussian"] < 2e-3, errors


def test_two_dimensional_bridge_with_gaussian_steps_matches_the_exact_bridge():
    # The Gaussian steps in 2D (one convolution per axis) with W != 0, sigma = 0.3, 48 x 48
    # cells, 6 steps (sigma sqrt(dt) = 0.73 h; estimated cell Péclet number 9.7, where the jump
    # chain's mean path is off by 6.7e-2 at 60 x 60 cells). Exact bridge: Bunne, Hsieh, Cuturi &
    # Krause, AISTATS 2023 (mfbridge.solvers.linear_quadratic). Measured relative J error
    # 2.33e-2 (time error of 6 steps: 5.5e-3 at 68 x 68 and 12 steps, ratio 4.3), mean error
    # 1.3e-3.
    means, covs = ([-1.0, 0.5], [1.2, -0.5]), ([0.16, 0.25], [0.49, 0.3])
    problem = BridgeProblem(grid=Grid([-4.0, -4.0], [4.0, 4.0], [48, 48]),
                            initial=Gaussian(means[0], covs[0]),
                            final=Gaussian(means[1], covs[1]), noise=0.3, horizon=1.0, steps=6,
                            confinement=Harmonic(1.0), interaction=HarmonicInteraction(1.5))
    assert resolution(problem).kernel == "gaussian"
    result = solve_bridge(problem)
    assert result.converged, result.message
    exact = lq_bridge(stiffness=1.0, strength=1.5, noise=0.3, horizon=1.0, mean0=means[0],
                      cov0=covs[0], mean1=means[1], cov1=covs[1], times=7)
    assert abs(result.cost / exact.cost - 1) < 4.5e-2
    assert np.abs(result.mean - exact.mean).max() < 2.6e-3


@pytest.mark.slow
def test_reference_case_at_sigma_01_converges_at_second_order_in_time():
    # 512 cells (sigma sqrt(dt) >= h at 40 steps); J against the closed form (Bunne et al.
    # 2023). Measured relative errors 8.2e-3, 1.8e-3, 2.5e-4 for 10, 20, 40 steps: ratios 4.6
    # and 7 (second order, the space error ~1e-4 adding with the other sign).
    errors = []
    for steps in (10, 20, 40):
        result = solve_bridge(reference_case(0.1, 512, steps))
        assert result.converged, result.message
        errors.append(abs(result.cost / exact_cost(0.1) - 1))
    assert errors[0] / errors[1] > 3.5 and errors[1] / errors[2] > 3.5, errors
    assert errors[2] < 5e-4, errors


def transport_endpoints(cells: int) -> tuple[Grid, np.ndarray, np.ndarray]:
    grid = Grid(-3.0, 3.0, cells)
    mu = GaussianMixture([0.5, 0.5], [-1.2, -0.4], [0.05, 0.05]).masses(grid)
    nu = Gaussian(0.8, 0.1).masses(grid)
    return grid, mu, nu


def test_cost_tends_to_the_transport_cost_at_sigma_005_and_002():
    # W = U = 0: sigma^2 J -> W_2^2(mu, nu)/(2T) (entropic OT -> OT: Carlier, Duval, Peyré &
    # Schmitzer, SIAM J. Math. Anal. 2017), W_2 by POT's exact ot.emd2 on the same cells. The
    # gap is O(eps log(1/eps)), eps ~ sigma^2. The Gaussian steps are exact in time here (no
    # drift), so 10 steps suffice; the chain would need |u|h/D <~ 2, i.e. ~10^4 cells at
    # sigma = 0.02. Measured relative gaps 2.2e-4 (sigma = 0.05, 280 cells) and 3.4e-5
    # (sigma = 0.02, 680 cells).
    gaps = []
    for noise, cells in ((0.05, 280), (0.02, 680)):
        grid, mu, nu = transport_endpoints(cells)
        problem = BridgeProblem(grid=grid, initial=mu, final=nu, noise=noise, horizon=1.0,
                                steps=10)
        assert resolution(problem).kernel == "gaussian"
        result = solve_bridge(problem)
        assert result.converged, result.message
        x = grid.axes[0]
        w2sq = float(ot.emd2(mu, nu, (x[:, None] - x[None, :]) ** 2))
        gaps.append((noise**2 * result.cost - w2sq / 2) / (w2sq / 2))
    assert 0 < gaps[1] < gaps[0] < 5e-4, gaps


def test_kernel_choice_and_its_limits():
    # kernel=auto keeps the chain where it resolves the flow (sigma = 1) and where neither
    # kernel does (sigma = 0.1 on 64 cells and 10 steps: sigma sqrt(dt) = 0.25 h), and says so.
    easy = resolution(reference_case(1.0, 128, 25))
    assert easy.kernel == "chain" and easy.chain_resolved
    coarse = resolution(reference_case(0.1, 64, 10))
    assert coarse.kernel == "chain" and not coarse.chain_resolved
    assert not coarse.gaussian_resolved and "0.25" in coarse.describe()
    with pytest.raises(InputError, match="kernel"):
        SolverOptions(kernel="jump")
