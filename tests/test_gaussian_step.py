"""The split heat kernel (mfbridge.numerics.gaussian_step): exact log-domain sums, closed-form
transitions, and the derivative used by the correction V."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import logsumexp

from mfbridge.numerics.gaussian_step import (
    GaussianStep,
    log_gaussian_convolution,
    split_log_weight,
    split_log_weight_adjoint,
)


def dense_convolution(a: np.ndarray, width: float) -> np.ndarray:
    """The same sum over every cell of the line, by scipy's logsumexp (direct sums)."""
    y = np.arange(a.shape[-1])
    gauss = -((y[:, None] - y[None, :]) ** 2) / (2 * width**2)
    return logsumexp(a[:, None, :] + gauss[None], axis=2)


def awkward_lines(n: int, rng: np.random.Generator) -> np.ndarray:
    """A rough line with a steep trend, and a bimodal one with cells at -inf at both ends (a
    log-potential split between two targets, zero mass beyond)."""
    y = np.arange(n, dtype=float)
    rough = np.cumsum(rng.normal(size=n)) * 2 + 3 * y
    bimodal = 10 * np.logaddexp(-((y - 30) ** 2) / 20, -((y - 90) ** 2) / 20)
    bimodal[:10] = bimodal[-7:] = -np.inf
    return np.stack([rough, bimodal])


@pytest.mark.parametrize("width", [0.7, 2.5])
def test_windowed_sums_equal_the_full_sums(width):
    # Against the full sum over every cell (scipy.special.logsumexp; direct sums): the windows
    # must hold every term that matters, including a second mode and -inf regions. Measured
    # largest differences 2.8e-14 (w = 0.7) and 7.1e-15 (w = 2.5), i.e. rounding of results up
    # to ~400 (one unit in the last place there: 5.7e-14).
    rng = np.random.default_rng(3)
    a = awkward_lines(120, rng)
    out, windows = log_gaussian_convolution(a, width)
    exact = dense_convolution(a, width)
    assert np.array_equal(np.isfinite(out), np.isfinite(exact))
    assert np.nanmax(np.abs(out - exact)) < 6e-14
    # the kept summands reproduce the sum for a nearby input (the reuse path); measured 1.1e-13
    # (w = 0.7) and 5.7e-14 (w = 2.5)
    delta = rng.normal(size=a.shape)
    moved = windows.log_apply(out.ravel(), np.where(np.isfinite(a), delta, 0.0).ravel())
    exact_moved = dense_convolution(a + delta, width).ravel()
    assert np.nanmax(np.abs(moved - exact_moved)) < 2.3e-13


def test_two_dimensional_step_is_the_product_kernel():
    # A step on a 2D grid is one convolution per axis; it must equal the normalised kernel
    # exp(-|y - x|^2/(2w^2) + l(y)) / Z(x) summed over all cells at once (direct sums).
    # Measured largest difference 1.3e-15 in all three (rounding of results up to ~10).
    rng = np.random.default_rng(4)
    shape, widths = (12, 9), (0.8, 1.3)
    ell = rng.normal(size=shape)
    step = GaussianStep(ell, widths)
    cells = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), -1).reshape(-1, 2)
    diff = cells[:, None, :] - cells[None, :, :]
    log_kernel = -(diff[..., 0] ** 2 / (2 * widths[0] ** 2) + diff[..., 1] ** 2
                   / (2 * widths[1] ** 2)) + ell.ravel()[None, :]
    log_kernel -= logsumexp(log_kernel, axis=1, keepdims=True)
    v = 3 * rng.normal(size=shape)
    backward = logsumexp(log_kernel + v.ravel()[None, :], axis=1)
    forward = logsumexp(log_kernel + v.ravel()[:, None], axis=0)
    assert np.abs(step.log_apply(v).ravel() - backward).max() < 3e-15
    assert np.abs(step.log_apply(v, transpose=True).ravel() - forward).max() < 3e-15
    assert np.abs(step.push_forward(v).ravel() - forward).max() < 3e-15


def one_step_moments(phi: np.ndarray, x: np.ndarray, start: int, noise: float, dt: float
                     ) -> tuple[float, float]:
    """Mean and variance after one split step from cell ``start``."""
    h = x[1] - x[0]
    step = GaussianStep(split_log_weight(phi, (h,), noise, dt), (noise * np.sqrt(dt) / h,))
    delta = np.full(x.size, -np.inf)
    delta[start] = 0.0
    p = np.exp(step.log_apply(delta, transpose=True))
    mean = float(p @ x)
    return mean, float(p @ (x - mean) ** 2)


def test_step_is_exact_for_a_constant_drift():
    # For a linear potential Phi = -f x the split kernel is the exact transition of Brownian
    # motion with drift f: N(x0 + f dt, sigma^2 dt) (Strang's splitting is exact when the parts
    # commute up to constants; Strang, SIAM J. Numer. Anal. 5, 1968). On the lattice the sampled
    # Gaussian's moments are exact up to aliasing ~exp(-2 pi^2 (w/h)^2) (Poisson summation):
    # at w/h = 1 (exp(-2 pi^2) = 2.7e-9, times ~4 pi^2 for the second moment) measured variance
    # error 2.1e-7 relative. The new centre x0 + f dt = x0 + 3h is a cell, so the mean is exact
    # by symmetry: measured error 2.3e-15 (rounding).
    noise, dt, f = 0.2, 0.04, 3.0
    x = np.linspace(-2.0, 2.0, 101)  # h = 0.04 = sigma sqrt(dt): w/h = 1
    mean, var = one_step_moments(-f * x, x, 30, noise, dt)
    assert abs(mean - (x[30] + f * dt)) < 5e-15
    assert abs(var / (noise**2 * dt) - 1) < 5e-7


def test_step_matches_the_ornstein_uhlenbeck_transition_at_second_order():
    # Phi = theta x^2 / 2: the exact transition is N(x0 e^{-theta dt},
    # sigma^2 (1 - e^{-2 theta dt}) / (2 theta)) (Uhlenbeck & Ornstein, Phys. Rev. 36, 1930).
    # Strang's splitting has local error O(dt^3): halving dt divides the one-step mean and
    # variance errors by ~8 (measured 6.7, 7.3 for the mean and 6.6, 7.3 for the variance).
    noise, theta = 0.3, 2.0
    x = np.linspace(-2.0, 2.0, 261)
    start = int(np.argmin(np.abs(x - 1.0)))
    x0 = x[start]
    errors = []
    for dt in (0.1, 0.05, 0.025):
        mean, var = one_step_moments(theta * x**2 / 2, x, start, noise, dt)
        exact_var = noise**2 * (1 - np.exp(-2 * theta * dt)) / (2 * theta)
        errors.append((abs(mean - x0 * np.exp(-theta * dt)), abs(var - exact_var)))
    errors = np.array(errors)
    ratios = errors[:-1] / errors[1:]
    assert np.all((ratios > 6.0) & (ratios < 9.0)), ratios


def test_adjoint_is_the_gradient_of_the_weighted_log_weight():
    # c = grad_Phi of -sum r l(Phi), checked by central differences (common practice, no
    # source); l is quadratic in Phi, so the difference quotient is exact up to rounding
    # (measured relative gap 1.6e-11).
    rng = np.random.default_rng(5)
    spacing, noise, dt = (0.1, 0.07), 0.3, 0.05
    phi, r, e = (rng.normal(size=(3, 8, 6)) for _ in range(3))

    def objective(values):
        return -(r * split_log_weight(values, spacing, noise, dt)).sum()

    eps = 1e-5
    numeric = (objective(phi + eps * e) - objective(phi - eps * e)) / (2 * eps)
    analytic = (split_log_weight_adjoint(r, phi, spacing, noise, dt) * e).sum()
    assert abs(numeric / analytic - 1) < 4e-11
