r"""Reference steps for small noise: the split heat kernel (a sampled Gaussian per time step).

**Why not the jump chain.** The Scharfetter–Gummel chain (:mod:`mfbridge.numerics.reference`)
jumps between neighbouring cells. Its bridge tilts the rates by :math:`h_j/h_i = e^{\Delta\psi}`,
so its transport cost per unit mass at speed v is :math:`\tfrac{v}{h}\log\tfrac{vh}{D}` instead of
:math:`v^2/(2\sigma^2)` once the cell Péclet number :math:`\mathrm{Pe} = |v|h/D` (D = σ²/2) is
above ~2: the chain's rate function is flatter than J by a factor ~Pe/2 in the transport
direction. The correction V of the outer loop is the exact derivative of that rate function, so
the flow's response to V is amplified ~Pe/2 and the fixed point is lost (measured: the response
of the bridge's mean to a linear potential is 3.3, 6.2, 12.0, 23.8 times the continuum's at
Pe = 6.9, 13.7, 27.5, 55 at σ = 0.1; at σ = 0.2: ``experiments/bench_small_noise.py``, Table
3). Refining until Pe ≲ 2 costs ~1000 cells at σ = 0.1 and ~25000 at σ = 0.02.

**The step.** A sampled Gaussian tilted by :math:`e^{s y}` is again a sampled Gaussian, exact up
to aliasing of order :math:`e^{-2\pi^2 w^2/h^2}` whatever s is (Poisson summation), so a
discrete-time chain whose step is a sampled Gaussian of width :math:`w = \sigma\sqrt{\Delta t}`
has the diffusion's large deviations as soon as :math:`w \gtrsim 0.7h`, at any Péclet number.
The drift enters by Strang's splitting of the symmetrised generator: with
:math:`L = D\Delta - \nabla\Phi\cdot\nabla = e^{\beta\Phi/2}(D\Delta - W_s)e^{-\beta\Phi/2}`,
:math:`W_s = |\nabla\Phi|^2/(2\sigma^2) - \Delta\Phi/2`, β = 2/σ²,

.. math::

    e^{\Delta t L} \approx e^{\beta\Phi/2}\, e^{-\Delta t W_s/2}\, e^{\Delta t D\Delta}\,
    e^{-\Delta t W_s/2}\, e^{-\beta\Phi/2},
    \qquad
    M(x, y) = \frac{1}{Z(x)} \exp\Bigl(-\frac{|y - x|^2}{2\sigma^2\Delta t} + \ell(y)\Bigr),

    \ell = -\frac{\Phi}{\sigma^2} - \frac{\Delta t}{4\sigma^2}|\nabla_h\Phi|^2
           + \frac{\Delta t}{4}\Delta_h\Phi ,
    \qquad Z(x) = \sum_y \exp\Bigl(-\frac{|y - x|^2}{2\sigma^2\Delta t} + \ell(y)\Bigr),

second order in Δt (exact for a linear Φ), with the factors of x absorbed by the row
normalisation Z, so that M is a stochastic matrix (walls reflect by renormalisation). This is the
trapezoid rule on the Onsager–Machlup action of a step. ∇_h are centred differences (one-sided
at the walls), Δ_h the three-point Laplacian with reflecting ends. The Gaussian factorises over
axes, so a step is one one-dimensional convolution per axis.

**Log domain.** Every application is exact in the log domain:
:math:`\log\sum_y \exp(a(y) - (x - y)^2/(2w^2))` (w in cells) is summed, row by row, over a window
that holds every local maximum of the summand (they lie where the line
:math:`x = y - w^2\,\Delta a` crosses x; :func:`log_gaussian_convolution`) with a margin beyond
which the summand is below :math:`e^{-60}` of the row's largest term (checked, widened where
not). The row-normalised terms are kept as a sparse matrix; while a later input differs from the
last one by a spread of at most 20 in the log, the application is that matrix times
:math:`e^{\delta}` (Schmitzer's absorption of the scalings into the kernel, SIAM J. Sci. Comput.
41, 2019), the windows being still valid with a margin of :math:`e^{-40}`.

Arrays of cell values have the grid's shape; widths are in cells per axis.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

# sigma sqrt(dt) / h below this: the sampled Gaussian aliases (relative error ~e^{-2 pi^2 r^2},
# 6e-5 at r = 0.7; measured: the response of the bridge's mean to a linear potential is 1.000 of
# the continuum's at r = 0.72 and 1.068 at r = 0.36)
MIN_WIDTH = 0.7
_THETA = 60.0  # summands this far (natural log) below a row's largest are dropped
_SPREAD = 20.0  # a cached window is reused while the input moved by at most this spread


@dataclass(frozen=True)
class Windows:
    """Row-normalised summands of a log-domain convolution, by groups of rows: row ``rows[i]``
    (flat over lines × cells) sums ``weights[i, j]`` times the input at flat index
    ``index[i, j]``."""

    groups: tuple[tuple[np.ndarray, np.ndarray, np.ndarray], ...]

    def log_apply(self, log_base: np.ndarray, delta: np.ndarray) -> np.ndarray:
        """``log_base + log(W e^delta)`` with every row's result, δ flat (lines × cells)."""
        top = float(delta.max())
        expd = np.exp(delta - top)
        out = np.empty_like(log_base)
        for rows, index, weights in self.groups:
            with np.errstate(divide="ignore"):
                out[rows] = log_base[rows] + top + np.log(
                    np.einsum("ij,ij->i", weights, expd[index]))
        return out


def log_gaussian_convolution(values: np.ndarray, width: float) -> tuple[np.ndarray, Windows]:
    r""":math:`\mathrm{out}_{l,x} = \log\sum_y \exp(a_{l,y} - (x - y)^2/(2w^2))` for every line l
    of ``values`` (shape (lines, n), entries may be -inf), w = ``width`` in cells.

    Returns ``out`` (lines, n) and the row-normalised summands (:class:`Windows`), so that for a
    nearby input a + δ, :math:`\mathrm{out} + \log(P e^{\delta})` is the new result. Exact to
    rounding: a local maximum of :math:`y \mapsto a_y - (x - y)^2/(2w^2)` at y needs
    :math:`X_{y-1/2} \le x \le X_{y+1/2}` with
    :math:`X_{y+1/2} = y + \tfrac12 - w^2(a_{y+1} - a_y)`, so every local maximum lies between
    the first y whose running maximum of X reaches x and the last y whose running minimum (from
    the right) does not exceed x; the summand is monotone outside, and the window around that
    range is widened until its edge terms are below :math:`e^{-60}` of the row's largest.
    """
    lines, n = values.shape
    size = lines * n
    if n == 1:
        rows = np.arange(size)
        return values.copy(), Windows(((rows, rows[:, None], np.ones((size, 1))),))
    w2 = width * width
    with np.errstate(invalid="ignore"):
        cross = np.arange(n - 1) + 0.5 - w2 * np.diff(values, axis=1)
    up = np.maximum.accumulate(np.where(np.isnan(cross), -np.inf, cross), axis=1)
    down = np.minimum.accumulate(np.where(np.isnan(cross), np.inf, cross)[:, ::-1],
                                 axis=1)[:, ::-1]
    targets = np.arange(n, dtype=float)
    if lines == 1:
        first = np.searchsorted(up[0], targets, side="left")
        last = np.searchsorted(down[0], targets, side="right")
    else:  # one sorted search for all lines: clip to [-1, n], shift line l by l (n + 2)
        shift = (np.arange(lines) * (n + 2.0))[:, None]
        base = (np.arange(lines) * (n - 1))[:, None]
        flat_targets = (targets[None, :] + shift).ravel()
        first = np.searchsorted((np.clip(up, -1.0, n) + shift).ravel(), flat_targets,
                                side="left").reshape(lines, n) - base
        last = np.searchsorted((np.clip(down, -1.0, n) + shift).ravel(), flat_targets,
                               side="right").reshape(lines, n) - base
    lo_all = np.minimum(first, last).ravel()
    hi_all = np.maximum(first, last).ravel()
    flat = values.ravel()
    row_x = np.tile(np.arange(n), lines)
    out = np.empty(size)
    rows = np.arange(size)
    margin = math.ceil(math.sqrt(2.0 * _THETA) * width) + 1
    groups = []
    while True:
        lo = lo_all[rows] - margin
        hi = hi_all[rows] + margin
        span = int((hi - lo).max()) + 1
        idx = lo[:, None] + np.arange(span)[None, :]
        valid = (idx >= 0) & (idx < n) & (idx <= hi[:, None])
        index = (rows - row_x[rows])[:, None] + np.clip(idx, 0, n - 1)  # flat, line start + y
        terms = np.where(valid, flat[index], -np.inf)
        terms -= (idx - row_x[rows][:, None]) ** 2 / (2.0 * w2)
        peak = terms.max(axis=1)
        finite = np.isfinite(peak)
        peak0 = np.where(finite, peak, 0.0)
        expo = np.exp(terms - peak0[:, None])
        total = expo.sum(axis=1)
        with np.errstate(divide="ignore"):
            result = np.where(finite, peak0 + np.log(total), -np.inf)
        left = np.where(lo >= 0, terms[:, 0], -np.inf)
        right = np.where(hi <= n - 1, terms[np.arange(len(rows)), np.clip(hi - lo, 0, span - 1)],
                         -np.inf)
        bad = finite & (np.maximum(left, right) > peak - _THETA)
        if margin > n:  # the window is the whole line: exact whatever the edges
            bad[:] = False
        good = ~bad
        out[rows[good]] = result[good]
        weights = expo[good] / np.where(finite[good], total[good], 1.0)[:, None]
        groups.append((rows[good], index[good], weights))
        if not bad.any():
            break
        rows = rows[bad]
        margin *= 2
    return out.reshape(lines, n), Windows(tuple(groups))


class _CachedConvolution:
    """:func:`log_gaussian_convolution` along one axis, reusing the last windows and weights
    while the input stays within a spread of ``_SPREAD`` of the last one (same -inf pattern)."""

    def __init__(self, axis: int, width: float) -> None:
        self.axis = axis
        self.width = width
        self._last = np.empty(0)
        self._finite = np.empty(0, dtype=bool)
        self._all_finite = False
        self._out = np.empty(0)
        self._windows: Windows | None = None

    def __call__(self, values: np.ndarray) -> np.ndarray:
        if values.ndim == 1:
            return self._lines(values[None, :]).reshape(values.shape)
        moved = np.moveaxis(values, self.axis, -1)
        result = self._lines(moved.reshape(-1, moved.shape[-1]))
        return np.moveaxis(result.reshape(moved.shape), -1, self.axis)

    def _lines(self, lines: np.ndarray) -> np.ndarray:
        flat = lines.ravel()
        if self._windows is not None and flat.shape == self._last.shape:
            if self._all_finite:
                same = bool(np.isfinite(flat).all())
                delta = flat - self._last
            else:
                finite = np.isfinite(flat)
                same = bool(np.array_equal(finite, self._finite))
                delta = np.where(finite, flat - np.where(finite, self._last, 0.0), 0.0)
            if same and float(delta.max()) - float(delta.min()) <= _SPREAD:
                return self._windows.log_apply(self._out, delta)
        out, self._windows = log_gaussian_convolution(lines, self.width)
        self._last, self._out = flat.copy(), out.ravel()
        self._finite = np.isfinite(flat)
        self._all_finite = bool(self._finite.all())
        return self._out.copy()


class GaussianStep:
    r"""One step :math:`M(x, y) = e^{-|y - x|^2/(2w^2) + \ell(y)}/Z(x)` of the split heat kernel.

    ``log_weight`` is ℓ (grid shape, dimensionless; :func:`split_log_weight`), ``widths`` the
    Gaussian's width σ√Δt in cells along each axis. :meth:`log_apply` computes
    :math:`\log(M e^v)` (a backward step: expectation at the start of the step of a function at
    its end) or, with ``transpose``, :math:`\log(M^\top e^v)` (a forward step of a law), exact in
    the log domain. The interface is that of :class:`~mfbridge.numerics.propagator.StepOperator`
    in log-domain use.
    """

    def __init__(self, log_weight: np.ndarray, widths: Sequence[float]) -> None:
        self.log_weight = log_weight
        self.widths = tuple(float(w) for w in widths)
        self._log_norm = self._convolve(log_weight, None)
        self._caches = {t: [_CachedConvolution(a, w) for a, w in enumerate(self.widths)]
                        for t in (False, True)}

    def _convolve(self, values: np.ndarray, caches: list[_CachedConvolution] | None
                  ) -> np.ndarray:
        out = values
        for a, width in enumerate(self.widths):
            if caches is None:
                moved = np.moveaxis(out, a, -1)
                conv, _ = log_gaussian_convolution(moved.reshape(-1, moved.shape[-1]), width)
                out = np.moveaxis(conv.reshape(moved.shape), -1, a)
            else:
                out = caches[a](out)
        return out

    def log_apply(self, log_values: np.ndarray, transpose: bool = False) -> np.ndarray:
        """``log(M exp(log_values))`` (``M^T`` if ``transpose``); shape: the grid's."""
        caches = self._caches[transpose]
        if transpose:
            return self.log_weight + self._convolve(log_values - self._log_norm, caches)
        return self._convolve(self.log_weight + log_values, caches) - self._log_norm

    def push_forward(self, log_values: np.ndarray) -> np.ndarray:
        """``log(M^T exp(log_values))`` without touching the caches of the sweeps (for a law
        unlike the sweeps' vectors, e.g. the flow's own marginal)."""
        return self.log_weight + self._convolve(log_values - self._log_norm, None)


def width_in_cells(noise: float, dt: float, spacing: Sequence[float]) -> tuple[float, ...]:
    """σ√Δt / h along each axis: the split heat kernel needs at least ``MIN_WIDTH``."""
    return tuple(noise * math.sqrt(dt) / h for h in spacing)


def _gradient(f: np.ndarray, h: float, axis: int) -> np.ndarray:
    """Centred differences along ``axis`` (one-sided at the two ends); shape of f."""
    g = np.empty_like(f)
    f0 = np.moveaxis(f, axis, 0)
    g0 = np.moveaxis(g, axis, 0)
    g0[1:-1] = (f0[2:] - f0[:-2]) / (2.0 * h)
    g0[0] = (f0[1] - f0[0]) / h
    g0[-1] = (f0[-1] - f0[-2]) / h
    return g


def _gradient_adjoint(c: np.ndarray, h: float, axis: int) -> np.ndarray:
    """The transpose of :func:`_gradient` applied to c."""
    out = np.zeros_like(c)
    c0 = np.moveaxis(c, axis, 0)
    o0 = np.moveaxis(out, axis, 0)
    o0[2:] += c0[1:-1] / (2.0 * h)
    o0[:-2] -= c0[1:-1] / (2.0 * h)
    o0[1] += c0[0] / h
    o0[0] -= c0[0] / h
    o0[-1] += c0[-1] / h
    o0[-2] -= c0[-1] / h
    return out


def _laplacian(f: np.ndarray, h: float, axis: int) -> np.ndarray:
    """Three-point second difference along ``axis`` with reflecting ends (a symmetric
    operator); shape of f."""
    d = np.diff(f, axis=axis) / h**2
    out = np.zeros_like(f)
    o0 = np.moveaxis(out, axis, 0)
    d0 = np.moveaxis(d, axis, 0)
    o0[:-1] += d0
    o0[1:] -= d0
    return out


def split_log_weight(phi: np.ndarray, spacing: Sequence[float], noise: float, dt: float
                     ) -> np.ndarray:
    r""":math:`\ell = -\Phi/\sigma^2 - \Delta t|\nabla_h\Phi|^2/(4\sigma^2)
    + \Delta t\,\Delta_h\Phi/4` for Φ of shape (*batch, *grid) (units of Φ: length²/time,
    like σ²)."""
    dim = len(spacing)
    nb = phi.ndim - dim
    s2 = noise**2
    out = -phi / s2
    for a, h in enumerate(spacing):
        g = _gradient(phi, h, nb + a)
        out = out - dt * g**2 / (4.0 * s2) + dt * _laplacian(phi, h, nb + a) / 4.0
    return out


def split_log_weight_adjoint(r: np.ndarray, phi: np.ndarray, spacing: Sequence[float],
                             noise: float, dt: float) -> np.ndarray:
    r"""The gradient in Φ of :math:`-\sum_y r(y)\,\ell(y)` (ℓ of :func:`split_log_weight`):
    :math:`r/\sigma^2 + \tfrac{\Delta t}{2\sigma^2}\sum_a G_a^\top(r\,G_a\Phi)
    - \tfrac{\Delta t}{4}\sum_a L_a r` (G centred differences, L the symmetric Laplacian);
    shapes of ``phi``."""
    dim = len(spacing)
    nb = phi.ndim - dim
    s2 = noise**2
    out = r / s2
    for a, h in enumerate(spacing):
        g = _gradient(phi, h, nb + a)
        out = out + dt / (2.0 * s2) * _gradient_adjoint(r * g, h, nb + a)
        out = out - dt / 4.0 * _laplacian(r, h, nb + a)
    return out
