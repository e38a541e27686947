r"""Particle-level check of a bridge: does a finite interacting system driven by the computed
control really follow the flow?

N particles start from μ (sampled from the grid's cell masses at t = 0) and move by

.. math::

    dX^i = \Bigl[-\nabla U(X^i) - \frac1N\sum_j \nabla W(X^i - X^j) + u_t(X^i)\Bigr]dt
           + \sigma\,dB^i ,

where :math:`u_t = \sigma^2\nabla\psi_t` is the result's control (length/time), known at the cell
centres and the K+1 grid times, interpolated linearly in space (bilinearly in 2D, constant beyond
the outermost centres) and linearly in time. The scheme is Euler–Maruyama with ``m`` sub-steps
of length :math:`\delta = \Delta t_k/m` per grid step; particles that cross a wall are reflected
(the grid's walls are no-flux, i.e. reflecting). The same seed drives an uncontrolled run
(u = 0, same initial particles, same Brownian increments), which by the law of large numbers
follows the McKean–Vlasov equation :math:`\partial_t\rho = \frac{\sigma^2}{2}\Delta\rho +
\nabla\cdot(\rho\nabla(U + W*\rho))`, solved on the grid by :func:`mckean_vlasov_flow`.

Along each controlled path the cost is accumulated by the trapezoid rule over the sub-steps,
:math:`I^i = \sum_s \tfrac12(|u_{t_s}(X^i_{t_s})|^2 + |u_{t_{s+1}}(X^i_{t_{s+1}})|^2)
\delta/(2\sigma^2)` (the left-point rule is biased by O(δ): measured −1.3% of J at δ = 0.01 on
the linear–quadratic case, more than the 95% interval's half-width at N = 4000); by
Girsanov's theorem :math:`I^i` is the expected log-likelihood ratio of the controlled against
the uncontrolled path of particle i given the others, and :math:`\frac1N\sum_i I^i \to J =
\frac{1}{2\sigma^2}\iint|u|^2\rho` as N → ∞. Its 95% interval is
:math:`\bar I \pm 1.96\,s_I/\sqrt N` (central limit theorem over particles; the particles are
exchangeable and their correlation is O(1/N)).

Number of sub-steps
-------------------
Euler–Maruyama has weak order one: for an Ornstein–Uhlenbeck process of rate L the stationary
variance of the scheme is :math:`\sigma^2/(2L - L^2\delta)`, a relative bias :math:`L\delta/2`
(common practice, no source; exact for the linear recursion). :func:`default_substeps` estimates
L as the largest derivative of the total drift over the cells that hold mass, on the grid, and
takes :math:`m = \lceil L\Delta t / 0.02\rceil` (at most 64), so the bias in variance stays near
1%, and that in a standard deviation or in W₁ near 0.5% of the spread: below the sampling error
:math:`\approx 0.5\,N^{-1/2}` of the spread up to N ≈ 10⁴. Measured on the linear–quadratic case
of ``tests/test_particles.py`` (L ≈ 2.6, Δt = 0.01 → m = 2): the terminal variance bias is
within the sampling noise at N = 2·10⁵.

Pair forces
-----------
``pair_mode="exact"`` sums :math:`\frac1N\sum_j\nabla W(x_i - x_j)` over all pairs, vectorised
in blocks (each unordered pair of blocks once, using ∇W(−z) = −∇W(z)): O(N²) time, O(block·N)
memory, used up to N = 10⁴ by ``"auto"``. For the harmonic interaction the sum is exactly
:math:`\kappa(x_i - \bar x)`, O(N). ``pair_mode="grid"`` deposits the particles on the grid by
cloud-in-cell weights, convolves the cell masses with the table of ∇W on cell offsets by FFT and
interpolates back with the same weights (no self-force, since the table is odd); its error is
O(h²) in the force, the same as the grid solver's own interaction.

Distances
---------
In 1D, W₁ between the cloud and the piecewise-constant density of the cell masses is exact:
:math:`\int|F_N - F|\,dx` with F piecewise linear between cell faces, integrated in closed form
between consecutive break points (equivalently :math:`\int_0^1|F_N^{-1} - F^{-1}|dq`). In 2D the
cloud is binned to the grid and W₁ between the two sets of cell masses (at the cell centres) is
computed exactly by POT's network simplex (``ot.emd2``); the binning is the same for both laws, so
the distance tends to zero as the cloud's law tends to the grid's. The sampling part of W₁ falls
like N^{-1/2} in 1D and like √(log N / N) in 2D (Ajtai, Komlós & Tusnády, Combinatorica 1984).

This module is part of the numerical core: no files, no plots, no Hydra.
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

from mfbridge.errors import InputError
from mfbridge.grid import Grid
from mfbridge.potentials import Confinement, HarmonicInteraction, Interaction
from mfbridge.propagator import StepOperator
from mfbridge.reference import EdgeRates, PairField, edge_rates
from mfbridge.result import BridgeResult

__all__ = [
    "CheckReport",
    "ConvergenceRow",
    "PairForce",
    "ParticleRun",
    "RunStats",
    "check",
    "default_substeps",
    "fit_error_law",
    "mckean_vlasov_flow",
    "moments_of_masses",
    "sample_particles",
    "simulate",
    "w1_to_masses",
]

PAIR_MODES = ("auto", "exact", "grid")
#: ``pair_mode="auto"`` sums pairs exactly up to this many particles, above it uses the grid.
EXACT_MAX = 10_000
#: Target of L·δ in :func:`default_substeps` (relative variance bias of Euler–Maruyama ≈ Lδ/2).
SUBSTEP_TARGET = 0.02
MAX_SUBSTEPS = 64
Z95 = 1.959963984540054  # 97.5% quantile of the standard normal


# --------------------------------------------------------------------------- grid geometry


@dataclass(frozen=True)
class _Stencil:
    """Linear (1D) / bilinear (2D) / trilinear weights of points on the cell-centre lattice.

    ``index`` (N, 2^d) flat cell indices, ``weight`` (N, 2^d), rows sum to 1. Points beyond the
    outermost centres get the value of the outermost centre (constant extrapolation).
    """

    index: np.ndarray
    weight: np.ndarray


def _stencil(grid: Grid, x: np.ndarray) -> _Stencil:
    n_pts = x.shape[0]
    idx = np.zeros((n_pts, 1), dtype=np.int64)
    wts = np.ones((n_pts, 1))
    for a in range(grid.dim):
        n = grid.shape[a]
        s = (x[:, a] - grid.lower[a]) / grid.spacing[a] - 0.5
        i0 = np.clip(np.floor(s).astype(np.int64), 0, n - 2)
        w1 = np.clip(s - i0, 0.0, 1.0)
        pair_idx = np.stack([i0, i0 + 1], axis=1)
        pair_w = np.stack([1.0 - w1, w1], axis=1)
        idx = (idx[:, :, None] * n + pair_idx[:, None, :]).reshape(n_pts, -1)
        wts = (wts[:, :, None] * pair_w[:, None, :]).reshape(n_pts, -1)
    return _Stencil(idx, wts)


def _gather(st: _Stencil, flat_field: np.ndarray) -> np.ndarray:
    """Interpolate a field given per cell (n_cells, c) at the stencil's points -> (N, c)."""
    return np.einsum("nk,nkc->nc", st.weight, flat_field[st.index])


def interpolate_field(grid: Grid, values: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Linear (1D) / bilinear (2D) interpolation of a cell-centred vector field.

    ``values`` has shape (*grid.shape, c), ``x`` shape (N, d) (length); returns (N, c).
    """
    return _gather(_stencil(grid, x), values.reshape(grid.size, -1))


def _reflect(x: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """Fold points back into the box [lower, upper] by mirror reflection at the walls."""
    width = upper - lower
    y = np.mod(x - lower, 2.0 * width)
    y = np.where(y > width, 2.0 * width - y, y)
    return lower + y


# --------------------------------------------------------------------------- sampling


def sample_particles(grid: Grid, masses: np.ndarray, n: int,
                     rng: np.random.Generator) -> np.ndarray:
    """N independent points from the piecewise-constant density of cell ``masses``.

    1D: inverse CDF of the piecewise-linear distribution function (exact within cells). 2D/3D:
    a cell drawn by its mass, then a uniform point in it. ``masses`` has shape ``grid.shape``
    (sum 1); returns (n, d) in length units.
    """
    p = np.clip(np.asarray(masses, dtype=float).ravel(), 0.0, None)
    total = p.sum()
    if not total > 0:
        raise InputError("cannot sample particles from a law with no mass on the grid")
    p = p / total
    if grid.dim == 1:
        cdf = np.concatenate([[0.0], np.cumsum(p)])
        cdf[-1] = 1.0
        q = rng.random(n)
        edges = grid.edges[0]
        # right-most face whose CDF is <= q, then linear inside the cell
        i = np.clip(np.searchsorted(cdf, q, side="right") - 1, 0, grid.shape[0] - 1)
        frac = np.where(p[i] > 0, (q - cdf[i]) / np.where(p[i] > 0, p[i], 1.0), 0.5)
        return (edges[i] + np.clip(frac, 0.0, 1.0) * grid.spacing[0])[:, None]
    cells = rng.choice(grid.size, size=n, p=p)
    multi = np.unravel_index(cells, grid.shape)
    jitter = rng.random((n, grid.dim))
    return np.stack([grid.lower[a] + (multi[a] + jitter[:, a]) * grid.spacing[a]
                     for a in range(grid.dim)], axis=1)


# --------------------------------------------------------------------------- pair forces


class PairForce:
    r"""The mean-field force :math:`\frac1N\sum_j\nabla W(x_i - x_j)` on every particle.

    Call with positions (N, d); returns (N, d) (units of ∇W, length/time²). ``mode`` is
    ``"exact"`` (all pairs, blocks of ``block`` rows) or ``"grid"`` (cloud-in-cell deposit on
    ``grid``, ∇W ⋆ masses by FFT, interpolation back with the same weights).
    """

    def __init__(self, interaction: Interaction, grid: Grid, mode: str = "exact",
                 block: int = 512) -> None:
        if mode not in ("exact", "grid"):
            raise InputError(f"pair mode must be 'exact' or 'grid', got {mode!r}")
        self.interaction = interaction
        self.grid = grid
        self.mode = mode
        self.block = int(block)
        self.is_zero = bool(getattr(interaction, "is_zero", False))
        self.linear = isinstance(interaction, HarmonicInteraction)
        if mode == "grid" and not self.is_zero:
            try:
                self._field = PairField(grid, interaction, gradient=True)
            except ValueError as exc:
                raise InputError(str(exc)) from exc

    def __call__(self, x: np.ndarray, stencil: _Stencil | None = None) -> np.ndarray:
        if self.is_zero:
            return np.zeros_like(x)
        if self.linear:  # exact: (1/N) sum_j kappa (x_i - x_j) = kappa (x_i - mean)
            strength = float(self.interaction.strength)  # type: ignore[attr-defined]
            return strength * (x - x.mean(axis=0))
        if self.mode == "exact":
            return self._exact(x)
        return self._grid(x, stencil if stencil is not None else _stencil(self.grid, x))

    def _exact(self, x: np.ndarray) -> np.ndarray:
        n = x.shape[0]
        out = np.zeros_like(x)
        b = max(1, self.block)
        starts = range(0, n, b)
        for s in starts:
            xs = x[s:s + b]
            # block (s, s): all pairs inside; blocks (s, r > s): add to s, subtract from r
            z = xs[:, None, :] - x[None, s:, :]
            g = self.interaction.grad(z)
            out[s:s + b] += g.sum(axis=1)
            out[s + b:] -= g[:, xs.shape[0]:, :].sum(axis=0)
        return out / n

    def _grid(self, x: np.ndarray, st: _Stencil) -> np.ndarray:
        n = x.shape[0]
        masses = np.bincount(st.index.ravel(), weights=st.weight.ravel(),
                             minlength=self.grid.size).reshape(self.grid.shape) / n
        field_ = self._field(masses).reshape(self.grid.size, self.grid.dim)
        return _gather(st, field_)


def pair_mode_for(n: int, mode: str) -> str:
    """The pair mode actually used for ``n`` particles (``"auto"``: exact up to EXACT_MAX)."""
    if mode not in PAIR_MODES:
        raise InputError(f"pair_mode must be one of {', '.join(PAIR_MODES)}, got {mode!r}")
    if mode == "auto":
        return "exact" if n <= EXACT_MAX else "grid"
    return mode


# --------------------------------------------------------------------------- simulation


@dataclass
class ParticleRun:
    """One simulated system.

    ``positions`` (n_out, N, d) at the grid times ``times[record]``; ``path_cost`` (N,): each
    particle's :math:`\\int|u_t(X_t)|^2/(2\\sigma^2)dt` (zero for an uncontrolled run).
    """

    record: np.ndarray
    positions: np.ndarray
    path_cost: np.ndarray
    seconds: float


def prepare_control(control: np.ndarray) -> tuple[np.ndarray, int]:
    """The control with its NaN cells filled, and how many were filled.

    NaN marks cells where ψ is not finite (ν without mass at t = T); such a cell takes the value
    of the previous time slice at that cell, and 0 if there is none. Euler–Maruyama evaluates the
    drift at the start of each sub-step, so the slice at T only enters through the time
    interpolation inside the last grid step.
    """
    u = np.array(control, dtype=float, copy=True)
    filled = int(np.count_nonzero(~np.isfinite(u)))
    for k in range(1, u.shape[0]):
        bad = ~np.isfinite(u[k])
        u[k][bad] = u[k - 1][bad]
    u[~np.isfinite(u)] = 0.0
    return u, filled


def simulate(
    grid: Grid,
    times: np.ndarray,
    noise: float,
    confinement: Confinement,
    pair_force: PairForce,
    x0: np.ndarray,
    rng: np.random.Generator,
    substeps: int,
    record: Sequence[int],
    control: np.ndarray | None = None,
) -> ParticleRun:
    r"""Euler–Maruyama for :math:`dX = [-\nabla U - \frac1N\sum_j\nabla W(X - X^j) + u]dt
    + \sigma dB` with reflection at the walls.

    ``times`` (K+1,), ``x0`` (N, d), ``control`` (K+1, *grid.shape, d) without NaN (see
    :func:`prepare_control`) or None for u = 0; ``record`` lists grid-time indices at which
    positions are kept. The Brownian increments are drawn in the same order whether or not there
    is a control, so one seed drives both runs with the same noise.
    """
    start = time.perf_counter()
    x = np.array(x0, dtype=float, copy=True)
    n, d = x.shape
    lower, upper = np.asarray(grid.lower), np.asarray(grid.upper)
    record = sorted({int(k) for k in record})
    positions = np.empty((len(record), n, d))
    slot = {k: i for i, k in enumerate(record)}
    cost = np.zeros(n)
    flat_u = None if control is None else control.reshape(len(times), grid.size, d)
    last = 0.0  # length of the previous sub-step (trapezoid weights of the cost)
    if 0 in slot:
        positions[slot[0]] = x
    for k in range(len(times) - 1):
        dt = float(times[k + 1] - times[k])
        delta = dt / substeps
        for s in range(substeps):
            theta = s / substeps
            st = _stencil(grid, x)
            drift = -np.asarray(confinement.grad(x), dtype=float)
            if not pair_force.is_zero:
                drift -= pair_force(x, st)
            if flat_u is not None:
                u = (1.0 - theta) * _gather(st, flat_u[k]) + theta * _gather(st, flat_u[k + 1])
                # trapezoid rule in time: half of |u|^2 to each adjacent sub-interval
                cost += np.einsum("nd,nd->n", u, u) * (0.5 * (delta + last) / (2.0 * noise**2))
                drift += u
            x = x + drift * delta + noise * math.sqrt(delta) * rng.standard_normal((n, d))
            x = _reflect(x, lower, upper)
            last = delta
        if k + 1 in slot:
            positions[slot[k + 1]] = x
    if flat_u is not None:
        u = _gather(_stencil(grid, x), flat_u[-1])
        cost += np.einsum("nd,nd->n", u, u) * (0.5 * last / (2.0 * noise**2))
    return ParticleRun(np.asarray(record), positions, cost, time.perf_counter() - start)


def default_substeps(grid: Grid, times: np.ndarray, noise: float, confinement: Confinement,
                     interaction: Interaction, masses: np.ndarray,
                     control: np.ndarray | None) -> int:
    r"""Sub-steps per grid step: :math:`m = \max(\lceil L\Delta t/0.02\rceil,
    \lceil L_{tail}\Delta t\rceil)`, at most 64 (see the module docstring).

    L is the largest |∂_b drift_a| over the bulk (cells whose density is at least 1% of the
    slice's peak: |x − m| < 3 sd for a Gaussian, 99.7% of the mass), so the bias there is near
    1%; :math:`L_{tail}`, the same over cells above 1e-6 of the peak, keeps the scheme stable
    (:math:`L_{tail}\delta \le 1`) in the tails, where the grid's control can be steep near a
    wall. The drift :math:`-\nabla(U + W\star\rho_t) + u_t` is differentiated by centred
    differences on the grid.
    """
    pair = PairField(grid, interaction)
    conf = np.asarray(confinement.value(grid.points), dtype=float)
    bulk = tail = 0.0
    for k in range(len(times)):
        phi = conf + pair(masses[k])
        grads = [-np.gradient(phi, h, axis=a) for a, h in enumerate(grid.spacing)]
        drift = np.stack(grads, axis=-1)
        if control is not None:
            drift = drift + control[k]
        peak = masses[k].max()
        in_bulk = masses[k] >= 1e-2 * peak
        in_tail = masses[k] >= 1e-6 * peak
        for a in range(grid.dim):
            for b, h in enumerate(grid.spacing):
                deriv = np.abs(np.gradient(drift[..., a], h, axis=b))
                bulk = max(bulk, float(np.nanmax(deriv[in_bulk], initial=0.0)))
                tail = max(tail, float(np.nanmax(deriv[in_tail], initial=0.0)))
    dt = float(np.max(np.diff(times)))
    m = max(math.ceil(bulk * dt / SUBSTEP_TARGET - 1e-9), math.ceil(tail * dt - 1e-9), 1)
    return int(min(MAX_SUBSTEPS, m))


# --------------------------------------------------------------------------- uncontrolled flow


def mckean_vlasov_flow(grid: Grid, confinement: Confinement, interaction: Interaction,
                       noise: float, initial_masses: np.ndarray,
                       times: np.ndarray) -> np.ndarray:
    r"""Cell masses (K+1, *grid.shape) of the McKean–Vlasov equation
    :math:`\partial_t\rho = \frac{\sigma^2}{2}\Delta\rho + \nabla\cdot(\rho\nabla(U + W*\rho))`
    from ``initial_masses`` (shape ``grid.shape``, sum 1) at the increasing ``times`` (K+1,).

    The same reference chain as the bridge solver: on each step the Scharfetter–Gummel rates
    (:func:`~mfbridge.reference.edge_rates`) of :math:`\Phi = U + W\star p` at the step midpoint,
    then the exact step :math:`p_{k+1} = e^{\Delta t Q}{}^\top p_k`
    (:meth:`~mfbridge.propagator.StepOperator.apply_transpose`). The midpoint density is
    predicted by a step with :math:`\Phi(p_k)` and Φ is taken at :math:`(p_k + p^*_{k+1})/2`
    (predictor–corrector, second order in Δt).
    """
    times = np.asarray(times, dtype=float)
    p0 = np.asarray(initial_masses, dtype=float)
    if p0.shape != grid.shape:
        raise InputError(f"initial masses must have the grid's shape {grid.shape}, "
                         f"got {p0.shape}")
    if times.ndim != 1 or times.size < 2 or np.any(np.diff(times) <= 0):
        raise InputError("times must be an increasing 1-D array of at least 2 points")
    conf = np.asarray(confinement.value(grid.points), dtype=float)
    pair = PairField(grid, interaction)

    def step(phi: np.ndarray, dt: float, p: np.ndarray) -> np.ndarray:
        rates = edge_rates(phi, grid, noise)
        op = StepOperator(EdgeRates(rates.forward, rates.backward), dt, grid.shape)
        out = np.clip(op.apply_transpose(p), 0.0, None)
        return out / out.sum()

    flow = np.empty((times.size, *grid.shape))
    flow[0] = p0 / p0.sum()
    with threadpool_limits(limits=1):
        for k in range(times.size - 1):
            dt = float(times[k + 1] - times[k])
            p = flow[k]
            phi0 = conf + pair(p)
            if pair.is_zero:
                flow[k + 1] = step(phi0, dt, p)
                continue
            predicted = step(phi0, dt, p)
            flow[k + 1] = step(conf + pair(0.5 * (p + predicted)), dt, p)
    return flow


# --------------------------------------------------------------------------- statistics


def w1_to_masses(grid: Grid, x: np.ndarray, masses: np.ndarray) -> float:
    """Wasserstein-1 distance between the empirical law of ``x`` (N, d) and cell ``masses``.

    1D: exact against the piecewise-constant density, ∫|F_N − F| dx in closed form. 2D/3D: exact
    (POT network simplex) between the cloud binned to the grid and the masses, both at cell
    centres. Length units.
    """
    p = np.clip(np.asarray(masses, dtype=float), 0.0, None)
    p = p / p.sum()
    if grid.dim == 1:
        xs = np.sort(x[:, 0])
        edges = grid.edges[0]
        cdf = np.concatenate([[0.0], np.cumsum(p.ravel())])
        pts = np.union1d(xs, edges)
        f_grid = np.interp(pts, edges, cdf)
        f_emp = np.searchsorted(xs, pts, side="right") / xs.size
        d0 = (f_grid - f_emp)[:-1]
        # on [pts_j, pts_{j+1}) F_N is constant, F linear: d goes from d0 to d1
        d1 = f_grid[1:] - f_emp[:-1]
        length = np.diff(pts)
        a0, a1 = np.abs(d0), np.abs(d1)
        same = d0 * d1 >= 0
        denom = np.where(same, 1.0, a0 + a1)
        area = np.where(same, 0.5 * (a0 + a1), 0.5 * (d0 * d0 + d1 * d1) / denom)
        return float(np.sum(length * area))
    import ot

    st = _stencil_nearest(grid, x)
    hist = np.bincount(st, minlength=grid.size) / x.shape[0]
    flat = p.ravel()
    src = np.flatnonzero(hist)
    dst = np.flatnonzero(flat > 1e-14)
    pts = grid.points.reshape(grid.size, grid.dim)
    cost = ot.dist(pts[src], pts[dst], metric="euclidean")
    b = flat[dst] / flat[dst].sum()
    return float(ot.emd2(hist[src], b, cost, numItermax=50_000_000))


def _stencil_nearest(grid: Grid, x: np.ndarray) -> np.ndarray:
    """Flat index of the cell holding each point (N, d) -> (N,)."""
    idx = np.zeros(x.shape[0], dtype=np.int64)
    for a in range(grid.dim):
        i = np.floor((x[:, a] - grid.lower[a]) / grid.spacing[a]).astype(np.int64)
        idx = idx * grid.shape[a] + np.clip(i, 0, grid.shape[a] - 1)
    return idx


def moments_of_masses(grid: Grid, masses: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean (d,) and covariance (d, d) of the piecewise-constant density of cell ``masses``
    (the centre-based moments plus h_a²/12 on the diagonal, the variance within a cell)."""
    pts = grid.points.reshape(grid.size, grid.dim)
    p = masses.ravel() / masses.sum()
    mean = p @ pts
    c = pts - mean
    cov = np.einsum("i,ia,ib->ab", p, c, c) + np.diag(np.asarray(grid.spacing) ** 2 / 12.0)
    return mean, cov


def _cloud_moments(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    mean = x.mean(axis=0)
    c = x - mean
    return mean, c.T @ c / x.shape[0]


@dataclass
class RunStats:
    """Statistics of one (N, seed) pair at the output times (arrays of length n_out).

    Controlled cloud against the bridge ρ_t: ``w1``, ``mean_error`` (Euclidean norm),
    ``cov_error`` (Frobenius norm), ``w1_to_nu`` (at T); ``cost``, ``cost_low``, ``cost_high``
    (Girsanov estimate and 95% interval), ``cost_std`` (spread of the per-particle integrals).
    Uncontrolled cloud (only for the first seed of each N, else None) against the McKean–Vlasov
    flow: ``free_w1``, ``free_mean_error``, ``free_cov_error``; ``free_w1_to_nu`` at T.
    """

    n_particles: int
    seed: int
    pair_mode: str
    w1: list[float]
    mean_error: list[float]
    cov_error: list[float]
    w1_to_nu: float
    cost: float
    cost_std: float
    cost_low: float
    cost_high: float
    seconds: float
    free_w1: list[float] | None = None
    free_mean_error: list[float] | None = None
    free_cov_error: list[float] | None = None
    free_w1_to_nu: float | None = None
    free_w1_to_flow_at_T: float | None = None


@dataclass
class ConvergenceRow:
    """Seed-averaged numbers for one N: terminal W₁ to ρ_T (mean and standard error over
    seeds), W₁ to ν at T, worst W₁ over output times, pooled Girsanov cost and its interval:
    the 95% sampling interval widened by the grid's own uncertainty on J (|J − J_u|, see
    :class:`CheckReport`)."""

    n_particles: int
    seeds: int
    w1_T: float
    w1_T_sem: float
    w1_to_nu: float
    w1_max: float
    mean_error_T: float
    cov_error_T: float
    cost: float
    cost_low: float
    cost_high: float
    free_w1_T: float | None


@dataclass
class ErrorFit:
    """Fits of the seed-averaged terminal W₁ error e(N).

    ``slope``: least-squares slope of log e against log N. ``floor`` a and ``scale`` b of
    e ≈ a + b N^{-1/2} (non-negative least squares, weights 1/e so relative misfit counts);
    ``floor`` is the N = ∞ extrapolation, the part that does not average out (grid error,
    Euler–Maruyama bias).
    """

    slope: float
    floor: float
    scale: float


@dataclass
class CheckReport:
    """Everything the particle check measured (see :func:`check`).

    ``times`` (n_out,) output times; ``runs`` one :class:`RunStats` per (N, seed); ``table`` one
    :class:`ConvergenceRow` per N; ``fit`` (None with fewer than two N) the error law.
    ``grid_cost`` is the result's J (flux form); ``grid_cost_of_control`` is
    :math:`\\frac{1}{2\\sigma^2}\\sum_k\\omega_k\\sum_i|u_{k,i}|^2 p_{k,i}` with the stored
    control, the quantity the particle estimate targets. Both are O(h²) approximations of the
    same J; their difference is added to the half-width of the cost intervals in ``table``.
    ``snapshots``/``free_snapshots`` hold the controlled and uncontrolled clouds (n_out, N, d)
    of the largest N and first seed; ``flow`` the uncontrolled McKean–Vlasov masses
    (K+1, *shape) — arrays for the figures, not for JSON.
    """

    dim: int
    noise: float
    horizon: float
    grid_cost: float
    grid_cost_of_control: float
    marginal_error: float
    model: dict[str, Any]
    n_particles: list[int]
    seeds: list[int]
    substeps: int
    substeps_rule: str
    pair_mode: str
    times: list[float]
    record: list[int]
    filled_control_cells: int
    runs: list[RunStats]
    table: list[ConvergenceRow]
    fit: ErrorFit | None
    seconds: float
    grid: Grid | None = None
    density: np.ndarray | None = field(default=None, repr=False)
    flow: np.ndarray | None = field(default=None, repr=False)
    snapshots: np.ndarray | None = field(default=None, repr=False)
    free_snapshots: np.ndarray | None = field(default=None, repr=False)

    def to_dict(self) -> dict[str, Any]:
        """The numbers as plain JSON-ready types (no arrays, no grid object)."""
        from dataclasses import asdict

        out = {k: v for k, v in self.__dict__.items()
               if k not in ("grid", "density", "flow", "snapshots", "free_snapshots",
                            "runs", "table", "fit")}
        out["runs"] = [asdict(r) for r in self.runs]
        out["table"] = [asdict(r) for r in self.table]
        out["fit"] = None if self.fit is None else asdict(self.fit)
        return out

    def table_text(self) -> str:
        """A plain-text table of the convergence study and the fit."""
        lines = [
            f"{'N':>7} {'seeds':>5} {'W1(T)':>10} {'±sem':>9} {'W1 to nu':>10} {'max W1':>9} "
            f"{'mean err':>9} {'cov err':>9} {'cost':>9} {'95% interval':>21} {'free W1(T)':>10}"
        ]
        for r in self.table:
            free = "" if r.free_w1_T is None else f"{r.free_w1_T:10.4g}"
            lines.append(
                f"{r.n_particles:7d} {r.seeds:5d} {r.w1_T:10.4g} {r.w1_T_sem:9.2g} "
                f"{r.w1_to_nu:10.4g} {r.w1_max:9.4g} {r.mean_error_T:9.3g} {r.cov_error_T:9.3g} "
                f"{r.cost:9.5g} [{r.cost_low:9.5g},{r.cost_high:9.5g}] {free}")
        lines.append(f"grid J = {self.grid_cost:.6g} (with the stored control: "
                     f"{self.grid_cost_of_control:.6g}); substeps {self.substeps} "
                     f"({self.substeps_rule}); pairs {self.pair_mode}")
        if self.fit is not None:
            lines.append(f"slope of W1(T) against N: {self.fit.slope:.3f}; fit W1 ≈ "
                         f"{self.fit.floor:.3g} + {self.fit.scale:.3g} N^-1/2")
        return "\n".join(lines)


def fit_error_law(ns: Sequence[int], errors: Sequence[float]) -> ErrorFit:
    """Slope of log e against log N, and e ≈ a + b N^{-1/2} with a, b ≥ 0 (weights 1/e)."""
    import scipy.optimize

    n = np.asarray(ns, dtype=float)
    e = np.asarray(errors, dtype=float)
    slope = float(np.polyfit(np.log(n), np.log(e), 1)[0])
    design = np.stack([np.ones_like(n), n**-0.5], axis=1) / e[:, None]
    coef, _ = scipy.optimize.nnls(design, np.ones_like(e))
    return ErrorFit(slope=slope, floor=float(coef[0]), scale=float(coef[1]))


# --------------------------------------------------------------------------- the check


def _model_from_result(result: BridgeResult) -> tuple[Confinement, Interaction]:
    """Rebuild U and W: from the resolved config (through Hydra, imported lazily by
    :func:`mfbridge.commands.check.model_from_config`) or else from the model description."""
    if result.config and "confinement" in result.config and "interaction" in result.config:
        from mfbridge.commands.check import model_from_config

        return model_from_config(result.config)
    from mfbridge.potentials import confinement_from_name, interaction_from_name

    try:
        conf = dict(result.model["confinement"])
        inter = dict(result.model["interaction"])
        return (confinement_from_name(conf.pop("name"), **conf),
                interaction_from_name(inter.pop("name"), **inter))
    except (KeyError, TypeError, InputError) as exc:
        raise InputError(
            "this result records no config and its model cannot be rebuilt from its description "
            f"({exc}); pass confinement= and interaction= to check()") from exc


def _output_indices(k_steps: int, outputs: int) -> list[int]:
    return sorted({round(v) for v in np.linspace(0, k_steps, outputs)})


def check(
    result: BridgeResult,
    confinement: Confinement | None = None,
    interaction: Interaction | None = None,
    n_particles: Sequence[int] = (250, 1000, 4000),
    seeds: Sequence[int] = (0, 1, 2, 3),
    substeps: int | None = None,
    pair_mode: str = "auto",
    outputs: int = 11,
    uncontrolled: bool = True,
) -> CheckReport:
    r"""Simulate N interacting particles driven by ``result``'s control and compare them with it.

    For every N in ``n_particles`` and every seed in ``seeds``: sample N particles from the
    result's ρ_0 (= μ), run Euler–Maruyama with ``substeps`` sub-steps per grid step
    (``None``: :func:`default_substeps`), and measure at ``outputs`` evenly spaced grid times
    the W₁ distance to ρ_t and the errors of mean and covariance; at T the W₁ distance to ν
    (the result's final marginal, equal to ν within ``result.marginal_error``); the Girsanov
    estimate of the cost with its 95% interval. For the first seed of each N (if
    ``uncontrolled``) the same particles with the same noise are run with u = 0 and compared
    with :func:`mckean_vlasov_flow`. The random streams are
    ``numpy.random.SeedSequence([seed, N])``: the same seeds give the same numbers.

    ``confinement``/``interaction`` default to the ones the result was solved with (rebuilt
    from ``result.config`` or ``result.model``). Raises :class:`InputError` for bad arguments.
    """
    start = time.perf_counter()
    ns = [int(n) for n in n_particles]
    seed_list = [int(s) for s in seeds]
    if not ns or any(n < 2 for n in ns):
        raise InputError(f"n_particles must be a non-empty list of integers >= 2, got {ns}")
    if not seed_list or any(s < 0 for s in seed_list):
        raise InputError(f"seeds must be a non-empty list of non-negative integers, got "
                         f"{seed_list}")
    if substeps is not None and (int(substeps) != substeps or substeps < 1):
        raise InputError(f"substeps must be a positive integer, got {substeps!r}")
    if pair_mode not in PAIR_MODES:
        raise InputError(f"pair_mode must be one of {', '.join(PAIR_MODES)}, got {pair_mode!r}")
    if int(outputs) != outputs or outputs < 2:
        raise InputError(f"outputs must be an integer >= 2, got {outputs!r}")
    if result.grid.dim > 2:
        raise InputError("the particle check handles 1D and 2D results")
    if confinement is None or interaction is None:
        conf_rebuilt, inter_rebuilt = _model_from_result(result)
        confinement = confinement or conf_rebuilt
        interaction = interaction or inter_rebuilt
    grid = result.grid
    times = np.asarray(result.times, dtype=float)
    masses = result.masses
    noise = float(result.noise)
    control, filled = prepare_control(result.control)
    with threadpool_limits(limits=1):
        if substeps is None:
            m = default_substeps(grid, times, noise, confinement, interaction, masses, control)
            rule = f"ceil(L dt / {SUBSTEP_TARGET})"
        else:
            m, rule = int(substeps), "given"
        record = _output_indices(len(times) - 1, int(outputs))
        flow = (mckean_vlasov_flow(grid, confinement, interaction, noise, masses[0], times)
                if uncontrolled else None)
        ref = [moments_of_masses(grid, masses[k]) for k in record]
        free_ref = ([moments_of_masses(grid, flow[k]) for k in record]
                    if flow is not None else None)
        runs: list[RunStats] = []
        snapshots = free_snapshots = None
        used_modes = set()
        for n in ns:
            mode = pair_mode_for(n, pair_mode)
            used_modes.add(mode)
            force = PairForce(interaction, grid, mode)
            for r, seed in enumerate(seed_list):
                seq = np.random.SeedSequence([seed, n])
                init_seq, noise_seq = seq.spawn(2)
                x0 = sample_particles(grid, masses[0], n, np.random.default_rng(init_seq))
                run = simulate(grid, times, noise, confinement, force, x0,
                               np.random.default_rng(noise_seq), m, record, control)
                stats = _run_stats(grid, run, masses, record, ref, n, seed, mode)
                if uncontrolled and r == 0:
                    assert flow is not None and free_ref is not None
                    free = simulate(grid, times, noise, confinement, force, x0,
                                    np.random.default_rng(noise_seq), m, record, None)
                    _add_free_stats(stats, grid, free, flow, masses, record, free_ref)
                    stats.seconds += free.seconds
                    if n == max(ns):
                        free_snapshots = free.positions
                if r == 0 and n == max(ns):
                    snapshots = run.positions
                runs.append(stats)
    j_control = _cost_of_control(result, control)
    spread = abs(float(result.cost) - j_control)
    table = [_row(n, [s for s in runs if s.n_particles == n], spread) for n in ns]
    fit = None
    if len(set(ns)) >= 2:
        fit = fit_error_law([row.n_particles for row in table], [row.w1_T for row in table])
    return CheckReport(
        dim=grid.dim, noise=noise, horizon=float(times[-1]), grid_cost=float(result.cost),
        grid_cost_of_control=j_control,
        marginal_error=float(result.marginal_error),
        model={"confinement": _describe(confinement), "interaction": _describe(interaction)},
        n_particles=ns, seeds=seed_list, substeps=m, substeps_rule=rule,
        pair_mode="+".join(sorted(used_modes)),
        times=[float(times[k]) for k in record], record=record, filled_control_cells=filled,
        runs=runs, table=table, fit=fit, seconds=time.perf_counter() - start,
        grid=grid, density=result.density, flow=flow, snapshots=snapshots,
        free_snapshots=free_snapshots,
    )


def _describe(obj: object) -> dict[str, Any]:
    describe = getattr(obj, "describe", None)
    return describe() if callable(describe) else {"repr": repr(obj)}


def _errors(x: np.ndarray, ref: tuple[np.ndarray, np.ndarray]) -> tuple[float, float]:
    mean, cov = _cloud_moments(x)
    return float(np.linalg.norm(mean - ref[0])), float(np.linalg.norm(cov - ref[1]))


def _run_stats(grid: Grid, run: ParticleRun, masses: np.ndarray, record: list[int],
               ref: list[tuple[np.ndarray, np.ndarray]], n: int, seed: int,
               mode: str) -> RunStats:
    w1 = [w1_to_masses(grid, run.positions[i], masses[k]) for i, k in enumerate(record)]
    errs = [_errors(run.positions[i], ref[i]) for i in range(len(record))]
    cost = float(run.path_cost.mean())
    std = float(run.path_cost.std(ddof=1))
    half = Z95 * std / math.sqrt(n)
    return RunStats(
        n_particles=n, seed=seed, pair_mode=mode, w1=w1,
        mean_error=[e[0] for e in errs], cov_error=[e[1] for e in errs],
        w1_to_nu=w1[-1] if record[-1] == masses.shape[0] - 1 else float("nan"),
        cost=cost, cost_std=std, cost_low=cost - half, cost_high=cost + half,
        seconds=run.seconds,
    )


def _add_free_stats(stats: RunStats, grid: Grid, free: ParticleRun, flow: np.ndarray,
                    masses: np.ndarray, record: list[int],
                    free_ref: list[tuple[np.ndarray, np.ndarray]]) -> None:
    stats.free_w1 = [w1_to_masses(grid, free.positions[i], flow[k])
                     for i, k in enumerate(record)]
    errs = [_errors(free.positions[i], free_ref[i]) for i in range(len(record))]
    stats.free_mean_error = [e[0] for e in errs]
    stats.free_cov_error = [e[1] for e in errs]
    stats.free_w1_to_flow_at_T = stats.free_w1[-1]
    stats.free_w1_to_nu = w1_to_masses(grid, free.positions[-1], masses[-1])


def _cost_of_control(result: BridgeResult, control: np.ndarray) -> float:
    """(1/2σ²) Σ_k ω_k Σ_i |u_{k,i}|² p_{k,i} (trapezoid weights ω in time)."""
    times = np.asarray(result.times, dtype=float)
    dt = np.diff(times)
    omega = np.zeros_like(times)
    omega[:-1] += dt / 2
    omega[1:] += dt / 2
    sq = np.sum(control**2, axis=-1) * result.masses
    per_time = sq.reshape(len(times), -1).sum(axis=1)
    return float(omega @ per_time / (2.0 * result.noise**2))


def _row(n: int, runs: list[RunStats], spread: float) -> ConvergenceRow:
    w1_t = np.array([r.w1[-1] for r in runs])
    sem = float(w1_t.std(ddof=1) / math.sqrt(len(runs))) if len(runs) > 1 else float("nan")
    # pooled Girsanov estimate over the seeds: independent runs of equal size
    cost = float(np.mean([r.cost for r in runs]))
    var = float(np.sum([r.cost_std**2 / n for r in runs])) / len(runs) ** 2
    half = Z95 * math.sqrt(var) + spread
    free = [r.free_w1[-1] for r in runs if r.free_w1 is not None]
    return ConvergenceRow(
        n_particles=n, seeds=len(runs), w1_T=float(w1_t.mean()), w1_T_sem=sem,
        w1_to_nu=float(np.mean([r.w1_to_nu for r in runs])),
        w1_max=float(np.mean([max(r.w1) for r in runs])),
        mean_error_T=float(np.mean([r.mean_error[-1] for r in runs])),
        cov_error_T=float(np.mean([r.cov_error[-1] for r in runs])),
        cost=cost, cost_low=cost - half, cost_high=cost + half,
        free_w1_T=float(np.mean(free)) if free else None,
    )
