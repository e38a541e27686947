r"""Reference dynamics on the grid: a finite-volume Markov generator for the Fokker–Planck equation.

For a frozen potential :math:`\Phi = U + W * \bar\rho` the reference diffusion
:math:`dX = -\nabla\Phi(X)\,dt + \sigma\,dB` is replaced by a continuous-time Markov chain that
jumps between neighbouring cells. Along each axis, with cell width :math:`h`,
:math:`D = \sigma^2/2` and :math:`\beta = 2/\sigma^2`, the Scharfetter–Gummel rates are

.. math::

    q_{i \to i+1} = \frac{D}{h^2} B\bigl(\beta(\Phi_{i+1} - \Phi_i)\bigr), \qquad
    q_{i+1 \to i} = \frac{D}{h^2} B\bigl(\beta(\Phi_i - \Phi_{i+1})\bigr), \qquad
    B(z) = \frac{z}{e^z - 1}.

All rates are positive, walls have no flux, and the chain satisfies detailed balance with respect
to :math:`\pi \propto e^{-\beta\Phi}` (because :math:`B(z)/B(-z) = e^{-z}`), so its generator is
similar to a symmetric negative semi-definite matrix. The forward equation
:math:`\dot p = Q^\top p` is a conservative, positivity-preserving discretisation of
:math:`\partial_t\rho = \tfrac{\sigma^2}{2}\Delta\rho + \nabla\cdot(\rho\nabla\Phi)`
(Scharfetter & Gummel, IEEE Trans. Electron Devices, 1969).

Arrays of cell values have the grid's shape ``grid.shape`` (optionally with leading batch axes);
edge arrays along axis ``a`` have that axis one shorter.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import scipy.fft

if TYPE_CHECKING:
    from mfbridge.model.grid import Grid
    from mfbridge.model.potentials import Interaction

_SMALL = 1e-5


def bernoulli(z: np.ndarray) -> np.ndarray:
    """Bernoulli function :math:`B(z) = z/(e^z - 1)`, with :math:`B(0) = 1`, overflow-free."""
    z = np.asarray(z, dtype=float)
    out = np.empty_like(z)
    small = np.abs(z) < _SMALL
    zs = z[small]
    out[small] = 1.0 - zs / 2.0 + zs * zs / 12.0
    big = ~small
    zb = z[big]
    pos = zb > 0
    res = np.empty_like(zb)
    # for z > 0 write B(z) = z e^{-z} / (1 - e^{-z}) to avoid overflow
    res[pos] = zb[pos] * np.exp(-zb[pos]) / (-np.expm1(-zb[pos]))
    res[~pos] = zb[~pos] / np.expm1(zb[~pos])
    out[big] = res
    return out


def bernoulli_derivative(z: np.ndarray) -> np.ndarray:
    """:math:`B'(z) = (1 - B(z)e^z)/(e^z - 1)`, with :math:`B'(0) = -1/2`, overflow-free."""
    z = np.asarray(z, dtype=float)
    out = np.empty_like(z)
    small = np.abs(z) < _SMALL
    zs = z[small]
    out[small] = -0.5 + zs / 6.0
    big = ~small
    zb = z[big]
    pos = zb > 0
    res = np.empty_like(zb)
    zp = zb[pos]
    em = -np.expm1(-zp)  # 1 - e^{-z}
    # B e^z = z / (1 - e^{-z});  1/(e^z - 1) = e^{-z} / (1 - e^{-z})
    res[pos] = (1.0 - zp / em) * np.exp(-zp) / em
    zn = zb[~pos]
    res[~pos] = (1.0 - zn * np.exp(zn) / np.expm1(zn)) / np.expm1(zn)
    out[big] = res
    return out


@dataclass(frozen=True)
class EdgeRates:
    """Jump rates of the reference chain along every axis.

    ``forward[a]`` holds :math:`q_{i \\to i+1}` and ``backward[a]`` holds :math:`q_{i+1 \\to i}`
    along axis ``a`` (units 1/time), each of shape ``(*batch, *grid.shape)`` with axis ``a``
    (counted from the end of the batch axes) one shorter.
    """

    forward: tuple[np.ndarray, ...]
    backward: tuple[np.ndarray, ...]


def faces(ndim: int, axis: int, n: int) -> tuple[tuple[slice, ...], tuple[slice, ...]]:
    """Index tuples selecting the cells below and above every face along ``axis`` of an array
    with ``ndim`` dimensions whose that axis has length ``n``: ``x[lo]``, ``x[hi]``."""
    lo = [slice(None)] * ndim
    hi = [slice(None)] * ndim
    lo[axis], hi[axis] = slice(0, n - 1), slice(1, n)
    return tuple(lo), tuple(hi)


def potential_differences(phi: np.ndarray, grid: Grid) -> tuple[np.ndarray, ...]:
    """:math:`\\Phi_{i+1} - \\Phi_i` along each axis; ``phi`` has shape (*batch, *grid.shape)."""
    nb = phi.ndim - grid.dim
    return tuple(np.diff(phi, axis=nb + a) for a in range(grid.dim))


def edge_rates(phi: np.ndarray, grid: Grid, noise: float) -> EdgeRates:
    """Scharfetter–Gummel rates for potential ``phi`` (shape (*batch, *grid.shape)), noise σ."""
    diffusivity = noise**2 / 2.0
    beta = 2.0 / noise**2
    fwd, bwd = [], []
    for a, dphi in enumerate(potential_differences(phi, grid)):
        scale = diffusivity / grid.spacing[a] ** 2
        fwd.append(scale * bernoulli(beta * dphi))
        bwd.append(scale * bernoulli(-beta * dphi))
    return EdgeRates(tuple(fwd), tuple(bwd))


class PairField:
    """Discrete convolution with a pair potential, :math:`(W\\star p)_i = \\sum_j W(x_i - x_j)p_j`,
    or with its gradient, :math:`\\sum_j \\nabla W(x_i - x_j) p_j` (``gradient=True``).

    ``p`` holds cell masses (shape (*batch, *grid.shape)); the result has the same shape (with a
    trailing axis of length d for the gradient) and the units of W (of ∇W). Computed by FFT with
    the table of W on all cell offsets, O(n log n) per field. Because W is even, the potential
    operator is its own adjoint.
    """

    def __init__(self, grid: Grid, interaction: Interaction, gradient: bool = False) -> None:
        self.grid = grid
        self.gradient = gradient
        self.is_zero = bool(getattr(interaction, "is_zero", False))
        offsets = [np.arange(-(n - 1), n) * h
                   for n, h in zip(grid.shape, grid.spacing, strict=True)]
        mesh = np.stack(np.meshgrid(*offsets, indexing="ij"), axis=-1)
        table = np.asarray(interaction.grad(mesh) if gradient else interaction.value(mesh),
                           dtype=float)
        if not np.all(np.isfinite(table)):
            what = "gradient" if gradient else "potential"
            raise ValueError(f"the interaction {what} is not finite on the grid offsets")
        # components first, so each is one more batch axis of the transform
        tables = np.moveaxis(table, -1, 0) if gradient else table
        # a period of 2n - 1 already keeps the n wanted outputs free of wrap-around
        self._fft_shape = tuple(scipy.fft.next_fast_len(2 * n - 1, real=True) for n in grid.shape)
        self._axes = tuple(range(-grid.dim, 0))
        self._table_hat = scipy.fft.rfftn(tables, s=self._fft_shape, axes=self._axes)

    def __call__(self, p: np.ndarray) -> np.ndarray:
        shape = (*p.shape, self.grid.dim) if self.gradient else p.shape
        if self.is_zero:
            return np.zeros(shape)
        hat = scipy.fft.rfftn(p, s=self._fft_shape, axes=self._axes)
        if self.gradient:
            hat = np.expand_dims(hat, -self.grid.dim - 1)  # a component axis
        full = scipy.fft.irfftn(hat * self._table_hat, s=self._fft_shape, axes=self._axes)
        index = (Ellipsis, *(slice(n - 1, 2 * n - 1) for n in self.grid.shape))
        out = full[index]
        return np.moveaxis(out, -self.grid.dim - 1, -1) if self.gradient else out
