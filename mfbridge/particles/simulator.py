r"""Finite-N particle dynamics driven by a bridge's control (the simulator of the particle check).

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

This module is part of the numerical core: no files, no plots, no Hydra. The check's statistics
are :mod:`mfbridge.particles.statistics`.
"""

from __future__ import annotations

import itertools
import math
import time
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from threadpoolctl import threadpool_limits

from mfbridge.errors import InputError
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import Confinement, HarmonicInteraction, Interaction
from mfbridge.numerics.propagator import StepOperator
from mfbridge.numerics.reference import EdgeRates, PairField, edge_rates

__all__ = [
    "PAIR_MODES",
    "PairForce",
    "ParticleRun",
    "default_substeps",
    "interpolate_field",
    "mckean_vlasov_flow",
    "pair_mode_for",
    "population_snapshots",
    "prepare_control",
    "sample_particles",
    "simulate",
]

PAIR_MODES = ("auto", "exact", "grid")
#: ``pair_mode="auto"`` sums pairs exactly up to this many particles, above it uses the grid.
EXACT_MAX = 10_000
#: Target of L·δ in :func:`default_substeps` (relative variance bias of Euler–Maruyama ≈ Lδ/2).
SUBSTEP_TARGET = 0.02
MAX_SUBSTEPS = 64


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


def population_snapshots(x0: np.ndarray, times: Sequence[float], noise: float,
                         confinement: Confinement, interaction: Interaction, grid: Grid,
                         dt: float, rng: np.random.Generator) -> np.ndarray:
    r"""Positions (len(times), N, d) of an uncontrolled interacting population,
    :math:`dX^i = [-\nabla U(X^i) - \frac1N\sum_j\nabla W(X^i - X^j)]dt + \sigma dB^i`, from
    ``x0`` (N, d) at ``times[0]``, seen at the increasing ``times`` (synthetic snapshots for
    fits and tests). Euler–Maruyama with steps of about ``dt`` (each interval between
    consecutive times is cut into equal steps no longer than ``dt``); pair forces by the grid
    route on ``grid`` (:class:`PairForce`, cloud-in-cell, error O(h²)); reflecting walls at the
    grid's box.
    """
    times = np.asarray(times, dtype=float)
    if times.ndim != 1 or times.size < 1 or np.any(np.diff(times) <= 0):
        raise InputError(f"times must increase strictly, got {times.tolist()}")
    if not dt > 0:
        raise InputError(f"dt must be positive, got {dt!r}")
    nodes, record = [times[:1]], [0]
    for a, b in itertools.pairwise(times):
        steps = max(1, math.ceil((b - a) / dt - 1e-9))
        nodes.append(a + (b - a) * np.arange(1, steps + 1) / steps)
        record.append(record[-1] + steps)
    force = PairForce(interaction, grid, mode="grid")
    run = simulate(grid, np.concatenate(nodes), noise, confinement, force, x0, rng, 1, record)
    return run.positions


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
    (:func:`~mfbridge.numerics.reference.edge_rates`) of :math:`\Phi = U + W\star p` at the step
    midpoint, then the exact step :math:`p_{k+1} = e^{\Delta t Q}{}^\top p_k`
    (:meth:`~mfbridge.numerics.propagator.StepOperator.apply_transpose`). The midpoint density is
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
