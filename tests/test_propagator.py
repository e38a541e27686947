"""The reference chain and its exact-in-time steps, against scipy's dense matrix exponential."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from mfbridge.model.grid import Grid
from mfbridge.numerics.propagator import (
    CONTOUR_POINTS,
    UNIFORMISATION_TAIL,
    StepOperator,
    scalar_exp,
)
from mfbridge.numerics.reference import EdgeRates, bernoulli, bernoulli_derivative, edge_rates


def dense_generator(rates: EdgeRates, shape: tuple[int, ...]) -> np.ndarray:
    """The generator Q (rows: from, columns: to) assembled entry by entry."""
    n = int(np.prod(shape))
    index = np.arange(n).reshape(shape)
    q = np.zeros((n, n))
    for a in range(len(shape)):
        lo = np.take(index, range(shape[a] - 1), axis=a).ravel()
        hi = np.take(index, range(1, shape[a]), axis=a).ravel()
        q[lo, hi] += rates.forward[a].ravel()
        q[hi, lo] += rates.backward[a].ravel()
    q -= np.diag(q.sum(axis=1))
    return q


def scalar_error() -> float:
    """Uniform error of the rational approximation on (-inf, 0], sampled densely."""
    x = -np.concatenate([[0.0], np.logspace(-10, 8, 20000)])
    return float(np.abs(scalar_exp(x) - np.exp(x)).max())


def test_contour_rational_is_uniformly_accurate_on_the_negative_axis():
    # Trefethen, Weideman & Schmelzer, "Talbot quadratures and rational approximations",
    # BIT 46 (2006): the cotangent contour converges like 3.89^-N uniformly on (-inf, 0].
    err = scalar_error()
    assert err < 10 * 3.89 ** (-CONTOUR_POINTS)
    assert err < 1e-11


def test_bernoulli_function_against_its_definition():
    # B(z) = z / (e^z - 1) (Scharfetter & Gummel, IEEE Trans. Electron Devices 16, 1969),
    # evaluated in extended precision where it is well conditioned.
    z = np.array([-700.0, -30.0, -1.0, -1e-3, -1e-7, 0.0, 1e-7, 1e-3, 1.0, 30.0, 700.0])
    exact = np.array([float(v / np.expm1(np.longdouble(v))) if v != 0 else 1.0 for v in z])
    assert np.allclose(bernoulli(z), exact, rtol=1e-12, atol=0)
    h = 1e-6
    zz = np.array([-20.0, -2.0, -0.3, 0.3, 2.0, 20.0])
    fd = (bernoulli(zz + h) - bernoulli(zz - h)) / (2 * h)
    assert np.allclose(bernoulli_derivative(zz), fd, rtol=1e-7, atol=1e-12)
    assert bernoulli_derivative(np.array([0.0]))[0] == -0.5
    assert np.all(np.isfinite(bernoulli_derivative(np.array([-800.0, 800.0]))))


@pytest.mark.parametrize("dim", [1, 2])
def test_detailed_balance_with_the_gibbs_law(dim):
    # The Scharfetter-Gummel chain is reversible for pi ~ exp(-2 Phi / sigma^2): the discrete
    # Fokker-Planck equation has the Gibbs law as its equilibrium (common practice, no source).
    grid = Grid([-2.0] * dim, [2.0] * dim, [40, 30][:dim])
    x = grid.points
    phi = (x**2).sum(-1) / 2 + 0.4 * np.sin(2 * x[..., 0])
    sigma = 0.7
    q = dense_generator(edge_rates(phi, grid, sigma), grid.shape)
    pi = np.exp(-2 * phi / sigma**2).ravel()
    pi /= pi.sum()
    assert np.allclose(pi @ q, 0, atol=1e-12 * np.abs(q).max())
    flux = pi[:, None] * q
    off = ~np.eye(len(pi), dtype=bool)
    assert np.allclose(flux[off], flux.T[off], rtol=1e-12, atol=1e-300)


def gibbs(phi: np.ndarray, sigma: float) -> np.ndarray:
    pi = np.exp(-2 * (phi - phi.min()) / sigma**2).ravel()
    return pi / pi.sum()


def weighted_error(approx: np.ndarray, exact: np.ndarray, pi: np.ndarray) -> float:
    """Spectral norm of Pi^(1/2) (approx - exact) Pi^(-1/2).

    For a generator reversible with respect to pi, Pi^(1/2) tau Q Pi^(-1/2) is symmetric with
    spectrum in (-inf, 0], so in this norm the error of the rational approximation is at most
    its uniform scalar error on (-inf, 0] (spectral theorem; common practice, no source).
    """
    s = np.sqrt(pi)
    return float(np.linalg.norm(s[:, None] * (approx - exact) / s[None, :], 2))


def step_error_bound(method: str, factors: int) -> float:
    """Bound on the pi-weighted error of a product of ``factors`` axis factors.

    Contour: the scalar error on (-inf, 0] per factor (spectral theorem). Uniformisation: the
    neglected Poisson tail per factor, because every power of the stochastic matrix
    P = I + tau Q / Lambda, reversible for pi, has weighted norm at most 1 (Jensen, Skand.
    Aktuarietidskr. 1953; the norm bound is common practice, no source). Plus rounding.
    """
    per_factor = scalar_error() if method == "contour" else UNIFORMISATION_TAIL
    return factors * per_factor + 1e-13


def rippled_trap_step() -> tuple[Grid, EdgeRates, float, np.ndarray, np.ndarray]:
    """A 1D test step: U = x²/2 + 0.3 sin 3x on 200 cells, σ = 1, τ = 0.01; its exact e^{τQ}
    by scipy's dense expm and the chain's stationary weights."""
    grid = Grid(-4.0, 4.0, 200)
    x = grid.axes[0]
    phi = x**2 / 2 + 0.3 * np.sin(3 * x)
    rates = edge_rates(phi, grid, 1.0)
    tau = 0.01
    exact = scipy.linalg.expm(tau * dense_generator(rates, grid.shape))
    return grid, rates, tau, exact, gibbs(phi, 1.0)


@pytest.mark.parametrize("method", ["contour", "uniformisation"])
def test_step_operator_matches_dense_expm_in_1d(method):
    # measured weighted errors: contour 3.49e-12 (= the scalar error), uniformisation 2.8e-15
    grid, rates, tau, exact, pi = rippled_trap_step()
    op = StepOperator(rates, tau, grid.shape, method=method)
    bound = step_error_bound(method, 1)
    eye = np.eye(grid.size)
    assert weighted_error(op.apply(eye), exact, pi) < bound
    assert weighted_error(op.apply_transpose(eye).T, exact, pi) < bound
    v = np.random.default_rng(1).random((200, 3))
    assert np.allclose(op.apply(v), exact @ v, rtol=0, atol=1e-10)


@pytest.mark.parametrize("method", ["contour", "uniformisation"])
def test_step_operator_is_exact_for_a_separable_2d_potential(method):
    # For Phi(x, y) = f(x) + g(y) the axis generators commute, so Strang splitting is exact and
    # the only error is that of the three factors (measured: contour 1.05e-11, uniformisation
    # 1.37e-14).
    grid = Grid([-3.0, -2.0], [3.0, 2.0], [14, 11])
    x, y = grid.points[..., 0], grid.points[..., 1]
    phi = 0.5 * x**2 + 0.2 * y**4 - y
    rates = edge_rates(phi, grid, 0.8)
    tau = 0.05
    exact = scipy.linalg.expm(tau * dense_generator(rates, grid.shape))
    op = StepOperator(rates, tau, grid.shape, method=method)
    eye = np.eye(grid.size).reshape(*grid.shape, grid.size)
    approx = op.apply(eye).reshape(grid.size, grid.size)
    approx_t = op.apply_transpose(eye).reshape(grid.size, grid.size).T
    pi = gibbs(phi, 0.8)
    bound = step_error_bound(method, 3)
    assert weighted_error(approx, exact, pi) < bound
    assert weighted_error(approx_t, exact, pi) < bound


def test_strang_splitting_is_second_order_for_a_coupled_2d_potential():
    # Strang splitting has local error O(tau^3) (Strang, SIAM J. Numer. Anal. 5, 1968):
    # halving tau divides the one-step error by about 8.
    grid = Grid([-2.0, -2.0], [2.0, 2.0], [12, 12])
    x, y = grid.points[..., 0], grid.points[..., 1]
    phi = 0.5 * (x**2 + y**2) + 0.8 * x * y
    rates = edge_rates(phi, grid, 1.0)
    q = dense_generator(rates, grid.shape)
    v = np.exp(-((x - 0.3) ** 2 + y**2)).ravel()
    errors = []
    for tau in (0.02, 0.01, 0.005):
        op = StepOperator(rates, tau, grid.shape)
        errors.append(np.abs(op.apply(v.reshape(grid.shape)).ravel()
                             - scipy.linalg.expm(tau * q) @ v).max())
    ratios = np.array(errors[:-1]) / np.array(errors[1:])
    assert np.all((ratios > 6.5) & (ratios < 9.5)), ratios


def test_alternating_axis_order_is_strang_over_pairs_of_steps():
    # X(t) Y(t) followed by Y(t) X(t) is X(t) Y(2t) X(t): Strang's step of length 2t, local
    # error O(t^3) (ratio ~8 per halving); a single one-sided step has local error O(t^2).
    grid = Grid([-2.0, -2.0], [2.0, 2.0], [12, 12])
    x, y = grid.points[..., 0], grid.points[..., 1]
    rates = edge_rates(0.5 * (x**2 + y**2) + 0.8 * x * y, grid, 1.0)
    q = dense_generator(rates, grid.shape)
    v = np.exp(-((x - 0.3) ** 2 + y**2))
    pair_errors, single_errors = [], []
    for tau in (0.02, 0.01, 0.005):
        first = StepOperator(rates, tau, grid.shape, reverse=False)
        second = StepOperator(rates, tau, grid.shape, reverse=True)
        exact = scipy.linalg.expm(tau * q)
        single_errors.append(np.abs(first.apply(v).ravel() - exact @ v.ravel()).max())
        pair = second.apply(first.apply(v))
        pair_errors.append(np.abs(pair.ravel() - exact @ exact @ v.ravel()).max())
        # the transpose applies the transposed factors in reverse order
        w = np.random.default_rng(3).random(grid.shape)
        assert np.allclose(first.apply_transpose(w).ravel(),
                           dense_matrix(first, grid).T @ w.ravel(), atol=1e-12)
    pair_ratios = np.array(pair_errors[:-1]) / np.array(pair_errors[1:])
    single_ratios = np.array(single_errors[:-1]) / np.array(single_errors[1:])
    assert np.all((pair_ratios > 6.5) & (pair_ratios < 9.5)), pair_ratios
    assert np.all((single_ratios > 3.0) & (single_ratios < 5.0)), single_ratios


def dense_matrix(op: StepOperator, grid: Grid) -> np.ndarray:
    eye = np.eye(grid.size).reshape(*grid.shape, grid.size)
    return op.apply(eye).reshape(grid.size, grid.size)


@pytest.mark.parametrize("tail", [1e-4, 1e-8, 1e-12])
def test_uniformisation_error_is_below_its_requested_tail(tail):
    # The truncated series misses exactly the Poisson tail of the later terms, each of
    # weighted norm at most 1 (Jensen, Skand. Aktuarietidskr. 1953), so the error lies below
    # `tail` yet not far below it. Measured (weighted norm): 3.4e-5, 3.7e-9, 3.4e-13.
    grid, rates, tau, exact, pi = rippled_trap_step()
    op = StepOperator(rates, tau, grid.shape, method="uniformisation", tail=tail)
    err = weighted_error(op.apply(np.eye(grid.size)), exact, pi)
    assert tail / 100 < err < tail + 1e-14


@pytest.mark.parametrize("method", ["contour", "uniformisation"])
@pytest.mark.parametrize("reverse", [None, True])
def test_step_operator_is_exact_for_a_separable_3d_potential(method, reverse):
    # As in 2D: commuting axis generators make both splittings exact (Strang: 5 factors,
    # one-sided: 3). Measured weighted errors: contour 1.75e-11 / 1.05e-11, uniformisation
    # 3.1e-14 / 6.4e-15, against bounds of 1.76e-11 / 1.06e-11 and 1.5e-13 / 1.3e-13.
    grid = Grid([-3.0, -2.0, -2.5], [3.0, 2.0, 2.5], [7, 6, 5])
    x, y, z = grid.points[..., 0], grid.points[..., 1], grid.points[..., 2]
    phi = 0.5 * x**2 + 0.2 * y**4 - y + np.cos(z)
    rates = edge_rates(phi, grid, 0.8)
    tau = 0.05
    exact = scipy.linalg.expm(tau * dense_generator(rates, grid.shape))
    op = StepOperator(rates, tau, grid.shape, reverse=reverse, method=method)
    eye = np.eye(grid.size).reshape(*grid.shape, grid.size)
    approx = op.apply(eye).reshape(grid.size, grid.size)
    approx_t = op.apply_transpose(eye).reshape(grid.size, grid.size).T
    bound = step_error_bound(method, 5 if reverse is None else 3)
    pi = gibbs(phi, 0.8)
    assert weighted_error(approx, exact, pi) < bound
    assert weighted_error(approx_t, exact, pi) < bound
