r"""Quantities read off a flow of cell masses: moments, free energy, control field, cost parts.

Every function takes masses ``p`` of shape (K+1, *grid.shape) (each slice sums to 1) on a
:class:`~mfbridge.model.grid.Grid`; densities are ``p / grid.cell_volume``.
"""

from __future__ import annotations

import numpy as np

from mfbridge.model.grid import Grid
from mfbridge.numerics.reference import PairField, faces


def trapezoid_weights(times: np.ndarray) -> np.ndarray:
    """Weights ω (shape (K+1,), time units) of the trapezoid rule on the nodes ``times``:
    ∫ f dt ≈ Σ_k ω_k f(t_k), ω_k = (t_{k+1} − t_{k−1})/2 inside, half a step at the ends."""
    dt = np.diff(np.asarray(times, dtype=float))
    weights = np.zeros(dt.size + 1)
    weights[:-1] += dt / 2
    weights[1:] += dt / 2
    return weights


def _spatial_axes(grid: Grid) -> tuple[int, ...]:
    return tuple(range(1, grid.dim + 1))


def moments(p: np.ndarray, grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Mean (K+1, d) and covariance (K+1, d, d) of each time slice."""
    pts = grid.points.reshape(-1, grid.dim)
    flat = p.reshape(p.shape[0], -1)
    mean = flat @ pts
    centred = pts[None, :, :] - mean[:, None, :]
    cov = np.einsum("ki,kia,kib->kab", flat, centred, centred)
    return mean, cov


def entropy(p: np.ndarray, grid: Grid) -> np.ndarray:
    r"""Differential entropy :math:`-\int \rho\log\rho\,dx` of each slice, shape (K+1,)."""
    rho = p / grid.cell_volume
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(p > 0, p * np.log(rho), 0.0)
    return -terms.sum(axis=_spatial_axes(grid))


def free_energy(
    p: np.ndarray, grid: Grid, noise: float, confinement_values: np.ndarray, pair: PairField
) -> np.ndarray:
    r""":math:`F(\rho) = \frac{\sigma^2}{2}\int\rho\log\rho + \int U\rho + \frac12\iint W\rho\rho`.

    Shape (K+1,); units of U.
    """
    axes = _spatial_axes(grid)
    energy = (p * confinement_values).sum(axis=axes)
    if not pair.is_zero:
        energy = energy + 0.5 * (p * pair(p)).sum(axis=axes)
    return -0.5 * noise**2 * entropy(p, grid) + energy


def control_field(log_h: np.ndarray, grid: Grid, noise: float) -> np.ndarray:
    r"""Control drift :math:`u_t = \sigma^2\nabla\psi_t` with :math:`\psi = \log h` (centred
    differences inside, one-sided at walls); shape (K+1, *grid.shape, d), units length/time.
    NaN where ψ is not finite (cells that the final law gives no mass at t = T)."""
    psi = np.where(np.isfinite(log_h), log_h, np.nan)
    grads = [np.gradient(psi, h, axis=1 + a) for a, h in enumerate(grid.spacing)]
    return noise**2 * np.stack(grads, axis=-1)


def flux_action(
    net_flux: tuple[np.ndarray, ...], p: np.ndarray, grid: Grid, weights: np.ndarray, noise: float
) -> float:
    r""":math:`\frac{1}{2\sigma^2}\int_0^T\!\!\int |w|^2\rho\,dx\,dt` for the velocity field w
    whose mass flux :math:`w\rho` is ``net_flux``.

    ``net_flux[a]`` is the mass per unit time crossing each face along axis a (shape
    (K+1, *grid.shape) with axis a one shorter); on a face, :math:`\int|w_a|^2\rho \approx
    j^2 h_a^2 / \bar p` with :math:`\bar p` the mean mass of the two cells; ``weights`` are the
    trapezoid weights in time, shape (K+1,). With the flux of the bridge this is the kinetic part
    of the cost, with the flux of the reference chain at the same density the drift part; with
    the flux of the control (bridge minus reference) it is J itself. The three share this one
    quadrature, so a change of it changes them together.
    """
    total = np.zeros(p.shape[0])
    for a, j in enumerate(net_flux):
        lo, hi = faces(p.ndim, 1 + a, p.shape[1 + a])
        mean_mass = 0.5 * (p[lo] + p[hi])
        with np.errstate(divide="ignore", invalid="ignore"):
            term = np.where(mean_mass > 0, j**2 * grid.spacing[a] ** 2 / mean_mass, 0.0)
        total += term.reshape(p.shape[0], -1).sum(axis=1)
    return float(weights @ total / (2.0 * noise**2))
