r"""Direct solver: minimise the discretised action with a density-dependent mobility.

The action (see :mod:`mfbridge.mobility`) with noise σ, mobility χ, diffusion D,
:math:`\Phi = U + W*\rho`:

.. math::

    J(\rho, j) = \frac{1}{2\sigma^2}\int_0^T\!\!\int
        \frac{|j - b[\rho]|^2}{\chi(\rho)}\,dx\,dt,\qquad
    b[\rho] = -\tfrac{\sigma^2}{2}D(\rho)\nabla\rho - \chi(\rho)\nabla\Phi,\qquad
    \partial_t\rho + \nabla\cdot j = 0 .

For χ = ρ, D = 1 this is the main solver's J (:mod:`mfbridge.fixed_point`), which makes this
solver an independent cross-check of it.

**Discretisation** (grid of n cells per axis, spacing :math:`h_a`, cell volume
:math:`|c| = \prod_a h_a`; K time steps of length Δt):

* densities :math:`\rho_k` (1/length^d) at the nodes :math:`t_k = k\Delta t`, shape
  (K+1, *grid.shape), with :math:`\rho_0 = M\mu/|c|`, :math:`\rho_K = M\nu/|c|` (M =
  ``total_mass``, μ, ν the problem's normalised cell masses);
* fluxes :math:`F_{k+1/2}` (mass per time through each interior face; walls carry none) on each
  step, tied to the densities *exactly* by the discrete continuity equation
  :math:`|c|(\rho_{k+1} - \rho_k)/\Delta t + \mathrm{div}_h F_{k+1/2} = 0`:

  - 1D: :math:`F_{k+1/2,i+1/2} = -(C_{k+1,i} - C_{k,i})/\Delta t` with
    :math:`C_{k,i} = \sum_{l\le i}|c|\rho_{k,l}` the mass left of the face (the smaller tail is
    differenced, so tails keep their relative precision);
  - 2D: continuity leaves the fluxes free up to a divergence-free part, so for the given
    densities the fluxes *minimising J* are used (the minimisation over F is done exactly):
    with :math:`B = b|c|/h_a` (b below, in flux units) and face weights
    :math:`m = \chi(\rho_f)|c|/h_a^2`,

    .. math::

        F = B + m\,(\lambda_{lo} - \lambda_{hi}),\qquad
        \mathrm{div}_h\big(m\,(\lambda_{lo} - \lambda_{hi})\big)
            = -|c|(\rho_{k+1} - \rho_k)/\Delta t - \mathrm{div}_h B,

    a χ-weighted graph Laplace (Poisson) equation for λ on each step, no-flux walls (sparse
    LU, :class:`_Incidence`); then :math:`j - b = -\chi(\rho_f)\nabla_h\lambda` and J below is
    :math:`\frac{\Delta t}{2\sigma^2}\sum_k\sum_{faces}|c|\,\chi(\rho_f)|\nabla_h\lambda|^2`
    (the continuous optimality condition :math:`j = b + \chi\nabla\lambda`). Gradients and
    Hessian–vector products pass through the solve (:func:`_laplace_solve_function`), so no
    flux variable is left: an unweighted potential flux plus a free stream function, tried
    first, has :math:`(j - b)^2/\chi \sim 10^{11}` in the tails where χ ~ 1e-17, which only
    the stream function could cancel, and L-BFGS never did;

* on a face along axis a, between cells lo and hi, with midpoint-in-time densities
  :math:`\bar\rho = (\rho_k + \rho_{k+1})/2` and :math:`\rho_f = (\bar\rho_{lo} + \bar\rho_{hi})/2`:
  :math:`j = F/(|c|/h_a)`,
  :math:`b = -\tfrac{\sigma^2}{2}D(\rho_f)(\bar\rho_{hi} - \bar\rho_{lo})/h_a -
  \chi(\rho_f)(\bar\Phi_{hi} - \bar\Phi_{lo})/h_a`, :math:`\bar\Phi = U + W\star(|c|\bar\rho)`;
* :math:`J = \frac{\Delta t}{2\sigma^2}\sum_k\sum_a\sum_{faces}|c|\,(j - b)^2/\chi(\rho_f)`.

Second order in h and Δt; for concave χ and constant D (and U = W = 0) it is jointly convex in
(ρ, F), because :math:`(\text{linear})^2/\chi(\text{linear})` is.

**Minimisation**, gradients and Hessian–vector products by ``torch.autograd`` (float64):

* ``method="newton"`` (1D): the interior densities themselves (each slice's mean removed, so the
  mass is exactly M) are the variables; a truncated Newton method (:mod:`mfbridge.newton`) with a
  sparse Gauss–Newton preconditioner built in cumulative-mass variables
  (:func:`_preconditioner_1d`) minimises J - μ|c|Σ log(ρ - lower) (+ log(upper - ρ)) for a
  decreasing sequence of barrier weights μ (:func:`_interior_newton`), steps kept inside the
  mobility's domain by the fraction-to-the-boundary rule;
* ``method="lbfgs"`` (and always in 2D): the interior densities as
  :math:`\rho_k = M\,\mathrm{softmax}(z_k)/|c|` (positive, mass exactly M);
  L-BFGS with a backtracking line search that rejects any step leaving the
  mobility's domain (e.g. ρ ≥ 1 for exclusion). (Truncated Newton in 2D was tried with the
  kinetic part's inverse Hessian, :math:`G T^{-1} G^\top`, T the time-difference matrix and
  :math:`G_k = \mathrm{div}_h\,\mathrm{diag}(\sqrt{\chi_f|c|}/h)`, as preconditioner: 3–5 s per
  Newton step at 16×16 × 8, no faster than L-BFGS, since the barrier dominates the tails'
  curvature and the preconditioner ignores it.)

Warm start: McCann's displacement interpolation
(1D quantile interpolation; 2D from the exact plan of ``ot.emd``), blended with 1e-3 of the linear
interpolation (itself mixed with 1e-12 of the uniform profile, as endpoints may vanish on far
cells) to keep every cell positive; the linear interpolation is used when the
displacement interpolation leaves the domain.

**Mass scale**: :class:`~mfbridge.problem.BridgeProblem` stores normalised masses; the
mobility and the mean field see densities of total mass M = ``DirectOptions.total_mass``
(for exclusion: the occupation per site, so M must keep the endpoints below 1). The returned
:class:`~mfbridge.result.BridgeResult` keeps the package's convention: ``density`` is the
normalised density (the occupation is ``total_mass × density``), while ``cost``, its parts and
``free_energy`` are those of the mass-M profile (for walkers without interaction, M times the
per-particle values). ``log_forward``, ``log_backward`` and ``correction`` are NaN: no
Schrödinger potentials exist here. ``control`` is the velocity :math:`(j - b)/\rho_f`
interpolated to cell centres and time nodes (for walkers, σ²∇ψ of the main solver).
"""

from __future__ import annotations

import functools
import math
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

from mfbridge import observables
from mfbridge.errors import ConvergenceWarning, InputError, is_real_number, unknown_name
from mfbridge.grid import Grid
from mfbridge.mobility import Mobility, Walkers
from mfbridge.newton import NewtonResult, Operator, SecondOrder, minimise
from mfbridge.problem import BridgeProblem
from mfbridge.reference import PairField, faces
from mfbridge.result import BridgeResult

WARM_STARTS = ("displacement", "linear")
METHODS = ("newton", "lbfgs")
MAX_DIM = 2
OT_MAX_CELLS = 4096
MU0, MU_FACTOR = 1e-2, 0.1
CHI_FLOOR = 1e-60
FLOOR_MIX = 1e-12


@dataclass(frozen=True)
class DirectOptions:
    """Options of the direct solver.

    * ``mobility``: a :class:`~mfbridge.mobility.Mobility` (default independent walkers);
    * ``total_mass``: M, the mass of the density profiles the mobility sees (see the module
      docstring; e.g. the mean occupation times the box volume for exclusion);
    * ``method``: ``"newton"`` (truncated Newton with a barrier; 1D) or ``"lbfgs"`` (always
      used in 2D); ``max_iter``: Newton or L-BFGS iterations; ``max_cg``: CG iterations per
      Newton step; ``memory``: L-BFGS history depth;
    * ``tol``: Newton stops when the predicted decrease of a Newton step is below ``tol`` × J
      (the barrier's bias is then also below ``tol`` × J); L-BFGS when the cost decreased by
      less than ``tol`` × J over the last ``window`` iterations; ``gtol``: or when the largest
      gradient entry is below it;
    * ``warm_start``: ``"displacement"`` (McCann interpolation) or ``"linear"``.
    """

    mobility: Mobility = field(default_factory=Walkers)
    total_mass: float = 1.0
    max_iter: int = 20000
    tol: float = 1e-9
    gtol: float = 1e-10
    memory: int = 20
    window: int = 20
    warm_start: str = "displacement"
    method: str = "newton"
    max_cg: int = 500

    def __post_init__(self) -> None:
        if not isinstance(self.mobility, Mobility):
            raise InputError(f"direct solver option mobility must be a mfbridge.mobility."
                             f"Mobility, got {self.mobility!r}")
        if self.warm_start not in WARM_STARTS:
            raise unknown_name("warm_start", self.warm_start, WARM_STARTS)
        if self.method not in METHODS:
            raise unknown_name("method", self.method, METHODS)
        checks = [
            ("total_mass", is_real_number(self.total_mass)
             and self.total_mass > 0),
            ("max_iter", _is_int(self.max_iter) and self.max_iter >= 1),
            ("max_cg", _is_int(self.max_cg) and self.max_cg >= 1),
            ("memory", _is_int(self.memory) and self.memory >= 1),
            ("window", _is_int(self.window) and self.window >= 1),
            ("tol", is_real_number(self.tol) and self.tol >= 0),
            ("gtol", is_real_number(self.gtol) and self.gtol >= 0),
        ]
        for name, ok in checks:
            if not ok:
                raise InputError(f"direct solver option {name} has an invalid value "
                                 f"{getattr(self, name)!r}")
        object.__setattr__(self, "total_mass", float(self.total_mass))


def _is_int(v: Any) -> bool:
    return is_real_number(v) and float(v) == int(v)


# --------------------------------------------------------------------------- the action


class DirectAction:
    """The discretised action of ``problem`` with ``mobility`` at mass ``total_mass``.

    Works on torch float64 tensors: :meth:`value` takes the full density flow (K+1, *shape) in
    1/length^d (total mass M per slice) and returns J (a 0-d tensor; in 2D minimised over the
    fluxes) — see the module docstring for the formulas.
    """

    def __init__(self, problem: BridgeProblem, mobility: Mobility | None = None,
                 total_mass: float = 1.0) -> None:
        import torch

        grid = problem.grid
        if grid.dim > MAX_DIM:
            raise InputError(f"the direct solver handles 1D and 2D grids, got a {grid.dim}D grid")
        self.problem = problem
        self.grid = grid
        self.mobility = mobility or Walkers()
        self.mass = float(total_mass)
        self.vol = grid.cell_volume
        self.dt = problem.dt
        self.noise = problem.noise
        self.shape = grid.shape
        u = np.asarray(problem.confinement.value(grid.points), dtype=float)
        if u.shape != grid.shape or not np.all(np.isfinite(u)):
            raise InputError("the confinement potential is not finite at every grid point")
        self.confinement_np = u
        self.confinement = torch.from_numpy(u)
        try:
            self.pair_np = PairField(grid, problem.interaction)
        except ValueError as exc:
            raise InputError(str(exc)) from exc
        self.interacting = not self.pair_np.is_zero
        if self.interacting:
            offsets = [np.arange(-(n - 1), n) * h
                       for n, h in zip(grid.shape, grid.spacing, strict=True)]
            mesh = np.stack(np.meshgrid(*offsets, indexing="ij"), axis=-1)
            table = torch.from_numpy(np.asarray(problem.interaction.value(mesh), dtype=float))
            self._fft_shape = tuple(2 * n - 1 for n in grid.shape)
            self._axes = tuple(range(-grid.dim, 0))
            self._table_hat = torch.fft.rfftn(table, s=self._fft_shape, dim=self._axes)
        self.rho0 = torch.from_numpy(self.mass * problem.initial / self.vol)
        self.rho1 = torch.from_numpy(self.mass * problem.final / self.vol)
        if grid.dim == 2:
            self._incidence = _Incidence(grid.shape)

    # ---------------------------------------------------------------- pieces
    def mean_field(self, rho: Any) -> Any:
        """Φ = U + W ⋆ (|c|ρ) for densities of shape (..., *shape)."""
        import torch

        if not self.interacting:
            return self.confinement.expand_as(rho)
        p = rho * self.vol
        full = torch.fft.irfftn(torch.fft.rfftn(p, s=self._fft_shape, dim=self._axes)
                                * self._table_hat, s=self._fft_shape, dim=self._axes)
        index = (Ellipsis, *(slice(n - 1, 2 * n - 1) for n in self.shape))
        return self.confinement + full[index]

    def fluxes(self, rho: Any) -> tuple[Any, ...]:
        """1D: the face fluxes F (mass per time) on every step fixed by continuity, shape
        (K, n-1) (the smaller tail's cumulative mass is differenced)."""
        import torch

        m = rho * self.vol
        left = torch.cumsum(m, dim=1)[:, :-1]
        right = torch.flip(torch.cumsum(torch.flip(m, dims=[1]), dim=1), dims=[1])[:, 1:]
        small_left = 0.5 * (left[1:] + left[:-1]) < 0.5 * self.mass
        flux = torch.where(small_left, -(left[1:] - left[:-1]) / self.dt,
                           (right[1:] - right[:-1]) / self.dt)
        return (flux,)

    def optimal_fluxes(self, rho: Any, drifts: list[Any], chis: list[Any]) -> tuple[Any, ...]:
        r"""2D: the fluxes F minimising J at fixed ρ under exact continuity, one array per axis
        (K, *faces).

        With :math:`B = b|c|/h_a` and face weights :math:`m = \chi_f|c|/h_a^2`, minimising
        :math:`\sum (F - B)^2/m` subject to :math:`\mathrm{div}_h F = s`,
        :math:`s = -|c|(\rho_{k+1} - \rho_k)/\Delta t`, gives :math:`F = B + m\,\delta\lambda`
        (δλ = λ_lo - λ_hi) with :math:`\mathrm{div}_h(m\,\delta\lambda) = s - \mathrm{div}_h B`,
        a χ-weighted graph Laplace equation per step with no-flux walls (:class:`_Incidence`)."""
        inc = self._incidence
        m = rho * self.vol
        source = (-(m[1:] - m[:-1]) / self.dt).reshape(len(rho) - 1, -1)
        big_b = [b * self.vol / h for b, h in zip(drifts, self.grid.spacing, strict=True)]
        weight = [c * self.vol / h**2 for c, h in zip(chis, self.grid.spacing, strict=True)]
        flat_b, flat_w = inc.flatten(big_b), inc.flatten(weight)
        lam = _laplace_solve_function().apply(flat_w, source - inc.div(flat_b), inc)
        flux = flat_b + flat_w * inc.grad(lam)
        return inc.unflatten(flux)

    def face_terms(self, rho: Any, fluxes: tuple[Any, ...] | None = None,
                   phi: Any = None) -> list[tuple[Any, Any, Any, Any]]:
        """Per axis: (j, b, χ_f, ρ_f) on every face and step, shapes (K, faces...).

        ``fluxes`` (one array per axis) replaces the continuity fluxes (1D) or the optimal ones
        (2D), and ``phi`` (K, *shape) the mean field Φ̄ of the step midpoints (the
        preconditioner freezes it)."""
        mid = 0.5 * (rho[1:] + rho[:-1])
        if phi is None:
            phi = self.mean_field(mid)
        drifts, chis, rfs = [], [], []
        for a in range(self.grid.dim):
            h = self.grid.spacing[a]
            lo, hi = faces(mid.ndim, 1 + a, self.shape[a])
            rf = 0.5 * (mid[lo] + mid[hi])
            chi = self.mobility.chi(rf)
            b = (-0.5 * self.noise**2 * self.mobility.d(rf) * (mid[hi] - mid[lo])
                 - chi * (phi[hi] - phi[lo])) / h
            drifts.append(b)
            chis.append(chi)
            rfs.append(rf)
        if fluxes is None:
            fluxes = (self.fluxes(rho) if self.grid.dim == 1
                      else self.optimal_fluxes(rho, drifts, chis))
        return [(flux * h / self.vol, b, chi, rf) for flux, h, b, chi, rf
                in zip(fluxes, self.grid.spacing, drifts, chis, rfs, strict=True)]

    def value(self, rho: Any) -> Any:
        """J of the density flow ``rho`` (K+1, *shape)."""
        total = 0.0
        for j, b, chi, _ in self.face_terms(rho):
            total = total + ((j - b) ** 2 / chi).sum()
        return total * self.vol * self.dt / (2.0 * self.noise**2)

    def kinetic(self, rho: Any) -> Any:
        r""":math:`\frac{1}{2\sigma^2}\iint |j|^2/\chi` of the flow."""
        total = 0.0
        for j, _, chi, _ in self.face_terms(rho):
            total = total + (j**2 / chi).sum()
        return total * self.vol * self.dt / (2.0 * self.noise**2)

    def free_energy(self, rho: np.ndarray) -> np.ndarray:
        r""":math:`F(\rho) = \frac{\sigma^2}{2}\int f(\rho) + \int U\rho + \frac12\iint W\rho\rho`
        of each slice of densities ``rho`` (numpy, (K+1, *shape)); shape (K+1,)."""
        axes = tuple(range(1, self.grid.dim + 1))
        p = rho * self.vol
        energy = (p * self.confinement_np).sum(axis=axes)
        if self.interacting:
            energy = energy + 0.5 * (p * self.pair_np(p)).sum(axis=axes)
        fdens = np.asarray(self.mobility.f(rho), dtype=float)
        return 0.5 * self.noise**2 * fdens.sum(axis=axes) * self.vol + energy


class _Incidence:
    """Cell–face incidence of a 2D grid with no-flux walls: face f between cells lo(f) and
    hi(f) (flat indices; axis-0 faces first, then axis-1 faces), F > 0 from lo to hi."""

    def __init__(self, shape: tuple[int, ...]) -> None:
        import scipy.sparse as sp
        import torch

        n0, n1 = shape
        idx = np.arange(n0 * n1).reshape(n0, n1)
        lo = np.concatenate([idx[:-1, :].ravel(), idx[:, :-1].ravel()])
        hi = np.concatenate([idx[1:, :].ravel(), idx[:, 1:].ravel()])
        self.shapes = [(n0 - 1, n1), (n0, n1 - 1)]
        self.cells = n0 * n1
        self.lo, self.hi = torch.from_numpy(lo), torch.from_numpy(hi)
        f = np.arange(len(lo))
        # div_h: (cells x faces), the outflow of each cell
        self.div_matrix = sp.csr_matrix(
            (np.r_[np.ones(len(lo)), -np.ones(len(lo))], (np.r_[lo, hi], np.r_[f, f])),
            shape=(self.cells, len(lo)))

    def flatten(self, per_axis: list[Any]) -> Any:
        import torch

        return torch.cat([x.reshape(len(x), -1) for x in per_axis], dim=1)

    def unflatten(self, flat: Any) -> tuple[Any, ...]:
        n_first = int(np.prod(self.shapes[0]))
        return (flat[:, :n_first].reshape(-1, *self.shapes[0]),
                flat[:, n_first:].reshape(-1, *self.shapes[1]))

    def grad(self, lam: Any) -> Any:
        """δλ = λ_lo - λ_hi on every face, (K, faces), of cell values (K, cells)."""
        return lam[:, self.lo] - lam[:, self.hi]

    def div(self, flux: Any) -> Any:
        """Outflow of every cell, (K, cells), of face fluxes (K, faces)."""
        out = flux.new_zeros((flux.shape[0], self.cells))
        return out.index_add(1, self.lo, flux).index_add(1, self.hi, -flux)

    def factor(self, weight: np.ndarray) -> list[tuple[np.ndarray, np.ndarray, Any]]:
        """Sparse LU of div_h diag(w) div_hᵀ for each row of ``weight`` (K, faces): the cell of
        largest diagonal is pinned (λ = 0 there: the Laplacian's null space is the constants),
        the rest scaled symmetrically by the diagonal (the weights χ span many orders of
        magnitude)."""
        import scipy.sparse as sp
        from scipy.sparse.linalg import splu

        out = []
        for w in weight:
            lap = (self.div_matrix @ sp.diags(np.maximum(w, CHI_FLOOR))
                   @ self.div_matrix.T).tocsc()
            diag = lap.diagonal()
            keep = np.ones(self.cells, dtype=bool)
            keep[int(np.argmax(diag))] = False
            scale = 1.0 / np.sqrt(diag[keep])
            reduced = sp.diags(scale) @ lap[keep][:, keep] @ sp.diags(scale)
            out.append((keep, scale, splu(reduced.tocsc())))
        return out

    def solve(self, factors: list[tuple[np.ndarray, np.ndarray, Any]],
              rhs: np.ndarray) -> np.ndarray:
        x = np.zeros_like(rhs)
        for k, (keep, scale, lu) in enumerate(factors):
            x[k, keep] = scale * lu.solve(scale * rhs[k, keep])
        return x


@functools.cache
def _laplace_solve_function() -> Any:
    """torch Function λ = S(w) r with S(w) the pinned inverse of div_h diag(w) div_hᵀ (a
    symmetric map), differentiable to any order: dλ = S dr - S (div_h diag(dw) div_hᵀ) λ, so
    the backward of an output gradient g is (y = S g): ∂/∂r = y, ∂/∂w_f = -δy_f δλ_f, built
    from the same Function (double backward for Hessian–vector products)."""
    import torch

    class WeightedLaplaceSolve(torch.autograd.Function):
        @staticmethod
        def forward(ctx: Any, weight: Any, rhs: Any, inc: _Incidence,
                    factors: Any = None) -> Any:
            if factors is None:
                factors = inc.factor(weight.detach().numpy())
            lam = torch.from_numpy(inc.solve(factors, rhs.detach().numpy()))
            ctx.save_for_backward(weight, lam)
            ctx.inc, ctx.factors = inc, factors
            return lam

        @staticmethod
        def backward(ctx: Any, grad: Any) -> Any:
            weight, lam = ctx.saved_tensors
            y = WeightedLaplaceSolve.apply(weight, grad, ctx.inc, ctx.factors)
            return -ctx.inc.grad(y) * ctx.inc.grad(lam), y, None, None

    return WeightedLaplaceSolve


def action(problem: BridgeProblem, density: np.ndarray, mobility: Mobility | None = None,
           total_mass: float = 1.0) -> float:
    """J of a flow of *normalised* densities ``density`` (K+1, *grid.shape) of ``problem``
    (each slice integrating to 1; scaled by ``total_mass`` for the mobility), with the
    continuity-exact fluxes of :class:`DirectAction` (in 2D: the optimal ones).
    Endpoint slices are used as given."""
    import torch

    act = DirectAction(problem, mobility, total_mass)
    rho = torch.as_tensor(np.asarray(density, dtype=float) * act.mass)
    expected = (problem.steps + 1, *problem.grid.shape)
    if tuple(rho.shape) != expected:
        raise InputError(f"density must have shape {expected}, got {tuple(rho.shape)}")
    return float(act.value(rho))


# --------------------------------------------------------------------------- warm start


def _cell_cdf_quantiles(p: np.ndarray, edges: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Quantile function of the piecewise-uniform law with cell masses p at levels u."""
    cdf = np.concatenate([[0.0], np.cumsum(p)])
    cdf /= cdf[-1]
    keep = np.concatenate([[True], np.diff(cdf) > 0])
    return np.interp(u, cdf[keep], edges[keep])


def displacement_interpolation(problem: BridgeProblem) -> np.ndarray:
    """McCann's displacement interpolation between the problem's endpoints as cell masses
    (K+1, *shape), each slice summing to 1.

    1D: quantile interpolation :math:`Q_t = (1-t)Q_\\mu + tQ_\\nu` of the piecewise-uniform
    laws, read back as masses by differencing the CDF at the cell edges. 2D: the exact plan π of
    ``ot.emd`` between the cell masses; each pair moves along the straight line and is
    deposited by bilinear (cloud-in-cell) weights.
    """
    grid = problem.grid
    mu, nu = problem.initial, problem.final
    s = problem.times / problem.horizon
    out = np.empty((len(s), *grid.shape))
    if grid.dim == 1:
        edges = grid.edges[0]
        u = np.linspace(0.0, 1.0, 20 * grid.size + 1)
        q0 = _cell_cdf_quantiles(mu, edges, u)
        q1 = _cell_cdf_quantiles(nu, edges, u)
        for k, t in enumerate(s):
            qt = (1 - t) * q0 + t * q1
            cdf = np.interp(edges, qt, u)
            cdf[0], cdf[-1] = 0.0, 1.0
            out[k] = np.clip(np.diff(cdf), 0.0, None)
    else:
        import ot

        if grid.size > OT_MAX_CELLS:
            raise InputError(f"the displacement warm start needs an exact plan of {grid.size}² "
                             f"entries; use warm_start='linear' above {OT_MAX_CELLS} cells")
        pts = grid.points.reshape(-1, grid.dim)
        a, b = mu.ravel(), nu.ravel()
        ia, ib = np.flatnonzero(a > 0), np.flatnonzero(b > 0)
        cost = ot.dist(pts[ia], pts[ib])
        plan = ot.emd(a[ia] / a[ia].sum(), b[ib] / b[ib].sum(), cost, numItermax=10**7)
        ri, ci = np.nonzero(plan > 0)
        weights = plan[ri, ci]
        x0, x1 = pts[ia[ri]], pts[ib[ci]]
        lower = np.asarray(grid.lower)
        spacing = np.asarray(grid.spacing)
        for k, t in enumerate(s):
            pos = ((1 - t) * x0 + t * x1 - lower) / spacing - 0.5
            base = np.floor(pos).astype(int)
            frac = pos - base
            slab = np.zeros(grid.shape)
            for corner in np.ndindex(*(2,) * grid.dim):
                c = np.asarray(corner)
                idx = np.clip(base + c, 0, np.asarray(grid.shape) - 1)
                w = weights * np.prod(np.where(c == 1, frac, 1 - frac), axis=1)
                np.add.at(slab, tuple(idx.T), w)
            out[k] = slab
    out /= out.reshape(len(s), -1).sum(axis=1).reshape(-1, *([1] * grid.dim))
    out[0], out[-1] = mu, nu
    return out


# --------------------------------------------------------------------------- L-BFGS


@dataclass
class _Minimised:
    x: np.ndarray
    value: float
    grad_norm: float
    iterations: int
    status: str
    message: str
    history: list[dict[str, float]]


def _lbfgs(fun: Callable[[np.ndarray], tuple[float, np.ndarray | None]], x0: np.ndarray,
           options: DirectOptions, callback: Callable[[int, float, float], None] | None,
           preconditioner: Callable[[np.ndarray], Callable[[np.ndarray], np.ndarray]] | None
           = None) -> _Minimised:
    """L-BFGS (two-loop recursion; Nocedal & Wright, Numerical Optimization, 2006, Alg. 7.4)
    with Armijo backtracking; ``fun`` returns (inf, None) outside the feasible set.

    ``preconditioner(x)``, when given, returns the map q ↦ H₀⁻¹q of an SPD approximation H₀ of
    the Hessian at x, used instead of the scalar initial matrix."""
    x = x0.copy()
    f, g = fun(x)
    if g is None or not math.isfinite(f):
        raise InputError("the warm start of the direct solver is not feasible")
    s_hist: list[np.ndarray] = []
    y_hist: list[np.ndarray] = []
    values = [f]
    history: list[dict[str, float]] = []
    start = time.perf_counter()
    status, message = "not_converged", ""
    it = 0
    gnorm = float(np.abs(g).max()) if g.size else 0.0
    if g.size == 0:
        return _Minimised(x, f, 0.0, 0, "converged", "no free variables (one time step)", [])
    apply = preconditioner(x) if preconditioner is not None else None
    for it in range(1, options.max_iter + 1):
        q = g.copy()
        alphas = []
        for s, y in zip(reversed(s_hist), reversed(y_hist), strict=True):
            rho = 1.0 / (y @ s)
            alpha = rho * (s @ q)
            q -= alpha * y
            alphas.append((rho, alpha))
        if apply is not None:
            q = apply(q)
        elif s_hist:
            q *= (s_hist[-1] @ y_hist[-1]) / (y_hist[-1] @ y_hist[-1])
        else:
            q *= min(1.0, 1.0 / max(gnorm, 1e-300))
        for (s, y), (rho, alpha) in zip(zip(s_hist, y_hist, strict=True), reversed(alphas),
                                        strict=True):
            beta = rho * (y @ q)
            q += (alpha - beta) * s
        d = -q
        slope = float(g @ d)
        if slope >= 0:
            s_hist.clear()
            y_hist.clear()
            d = -apply(g) if apply is not None else -g * min(1.0, 1.0 / max(gnorm, 1e-300))
            slope = float(g @ d)
        step = 1.0
        for _ in range(60):
            x_new = x + step * d
            f_new, g_new = fun(x_new)
            if g_new is not None and math.isfinite(f_new) and f_new <= f + 1e-4 * step * slope:
                break
            step *= 0.5
        else:
            status = "converged" if gnorm <= 100 * options.gtol else "stalled"
            message = f"line search found no decrease after {it} iterations"
            break
        assert g_new is not None
        s_vec, y_vec = x_new - x, g_new - g
        if s_vec @ y_vec > 1e-12 * np.linalg.norm(s_vec) * np.linalg.norm(y_vec):
            s_hist.append(s_vec)
            y_hist.append(y_vec)
            if len(s_hist) > options.memory:
                s_hist.pop(0)
                y_hist.pop(0)
        x, f, g = x_new, f_new, g_new
        gnorm = float(np.abs(g).max())
        values.append(f)
        history.append({"residual": gnorm, "marginal_error": 0.0, "cost": f,
                        "seconds": time.perf_counter() - start})
        if callback is not None:
            callback(it, f, gnorm)
        if gnorm <= options.gtol:
            status, message = "converged", f"gradient {gnorm:.2e} ≤ gtol after {it} iterations"
            break
        if len(values) > options.window:
            drop = values[-options.window - 1] - f
            if drop <= options.tol * max(abs(f), 1e-300):
                status = "converged"
                message = (f"cost changed by {drop:.2e} over the last {options.window} "
                           f"iterations (≤ tol × J) after {it} iterations")
                break
    else:
        message = (f"not converged after {options.max_iter} iterations: gradient {gnorm:.2e}, "
                   f"last change {values[-2] - values[-1] if len(values) > 1 else 0.0:.2e}")
    return _Minimised(x, f, gnorm, it, status, message, history)


# --------------------------------------------------------------------------- solver


def solve_direct(problem: BridgeProblem, options: DirectOptions | None = None,
                 callback: Callable[[int, float, float], None] | None = None) -> BridgeResult:
    """Minimise the discretised action of ``problem`` with ``options.mobility``.

    Returns a :class:`~mfbridge.result.BridgeResult` (method ``"direct"``, route the mobility's
    name); ``status`` is ``"converged"`` or ``"not_converged"``/``"stalled"`` (then a
    :class:`~mfbridge.errors.ConvergenceWarning` is issued). ``callback(iteration, cost,
    gradient)`` is called after every L-BFGS iteration. Raises :class:`InputError` when an
    endpoint leaves the mobility's domain at the chosen ``total_mass``.
    """
    options = options or DirectOptions()
    if not isinstance(options, DirectOptions):
        raise InputError(f"solve_direct needs DirectOptions, got {type(options).__name__}")
    import torch

    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        with threadpool_limits(limits=1):
            return _solve(problem, options, callback)
    finally:
        torch.set_num_threads(threads)


def _check_endpoints(problem: BridgeProblem, options: DirectOptions) -> None:
    mob, mass, vol = options.mobility, options.total_mass, problem.grid.cell_volume
    for name, p in (("initial", problem.initial), ("final", problem.final)):
        rho = mass * p / vol
        hint = ""
        if rho.max() >= mob.upper:
            hint = (f"; at total_mass = {mass:g} the peak density is {rho.max():.4g}: lower "
                    f"DirectOptions.total_mass below {mass * mob.upper / rho.max():.4g}")
        mob.check_density(rho, f"the {name} density (total_mass × normalised density)", hint)


def _solve(problem: BridgeProblem, options: DirectOptions,
           callback: Callable[[int, float, float], None] | None) -> BridgeResult:
    import torch

    start = time.perf_counter()
    _check_endpoints(problem, options)
    act = DirectAction(problem, options.mobility, options.total_mass)
    grid, mob, mass = problem.grid, options.mobility, options.total_mass
    vol = grid.cell_volume
    k_steps = problem.steps
    # endpoints may vanish on far cells; the interior must not (χ > 0, barrier)
    linear = (1 - FLOOR_MIX) * problem.linear_flow() + FLOOR_MIX / grid.size
    if options.warm_start == "displacement" and k_steps > 1:
        guess = 0.999 * displacement_interpolation(problem) + 0.001 * linear
        if not _inside(mob, mass * guess[1:-1] / vol):
            guess = linear
    else:
        guess = linear
    interior = guess[1:-1]
    if k_steps > 1 and not _inside(mob, mass * interior / vol):
        raise InputError("the linear interpolation of the endpoints leaves the mobility's domain")
    # Newton's preconditioner exists in 1D only (_preconditioner_1d); 2D uses L-BFGS
    use_lbfgs = options.method == "lbfgs" or grid.dim == 2
    if use_lbfgs:
        unpack, x0 = _softmax_variables(act, guess)
    else:
        unpack, x0 = _density_variables(act, guess)
    objective = _Objective(act, unpack, mob)
    setup = time.perf_counter() - start
    if use_lbfgs:
        opt = _lbfgs(objective.value_grad, x0, options, callback)
    else:
        opt = _interior_newton(objective, x0, options, callback)
    solve_seconds = time.perf_counter() - start - setup
    with torch.no_grad():
        rho_t = unpack(torch.from_numpy(opt.x))
        cost = float(act.value(rho_t))
        kinetic = float(act.kinetic(rho_t))
        terms = act.face_terms(rho_t)
        velocity = [((j - b) / rf).numpy() for j, b, _, rf in terms]
    rho = rho_t.numpy()
    p = rho * vol / mass
    fe = act.free_energy(rho)
    delta_f = float(fe[-1] - fe[0]) / problem.noise**2
    mean, cov = observables.moments(p, grid)
    masses = p.reshape(len(p), -1).sum(axis=1)
    marginal_error = float(np.abs(masses - 1.0).max())
    status, message = opt.status, opt.message
    if status == "converged":
        message = f"converged: {message}; J = {cost:.8g}"
    else:
        warnings.warn(ConvergenceWarning(f"direct solver {status}: {message}"), stacklevel=2)
    nan = np.full(rho.shape, np.nan)
    model = {
        "confinement": _describe(problem.confinement),
        "interaction": _describe(problem.interaction),
        "mobility": mob.describe(),
        "total_mass": mass,
    }
    return BridgeResult(
        grid=grid,
        times=problem.times,
        density=p / vol,
        control=_centre_control(velocity, grid, k_steps),
        log_forward=nan,
        log_backward=nan.copy(),
        correction=nan.copy(),
        mean=mean,
        cov=cov,
        free_energy=fe,
        entropy=observables.entropy(rho * vol, grid),
        cost=cost,
        cost_kinetic=kinetic,
        cost_drift=cost - kinetic - delta_f,
        cost_free_energy=delta_f,
        noise=problem.noise,
        method="direct",
        route=mob.name,
        status=status,
        message=message,
        iterations=opt.iterations,
        residual=opt.grad_norm,
        marginal_error=marginal_error,
        history=opt.history,
        timings={"setup": setup, "solve": solve_seconds, "total": time.perf_counter() - start},
        model=model,
    )


Unpack = Callable[[Any], Any]


def _softmax_variables(act: DirectAction, guess: np.ndarray) -> tuple[Unpack, np.ndarray]:
    """Free variables z (interior densities ρ_k = M softmax(z_k)/|c|); returns the map
    x ↦ ρ (K+1, *shape) and the starting point."""
    import torch

    grid, k_steps, mass, vol = act.grid, act.problem.steps, act.mass, act.vol
    x0 = np.log(np.maximum(guess[1:-1], 1e-300)).ravel()

    def unpack(x: Any) -> Any:
        z = x.reshape(k_steps - 1, -1)
        rho_int = (mass / vol) * torch.softmax(z, dim=1).reshape(k_steps - 1, *grid.shape)
        return torch.cat([act.rho0[None], rho_int, act.rho1[None]], dim=0)

    return unpack, x0


def _density_variables(act: DirectAction, guess: np.ndarray) -> tuple[Unpack, np.ndarray]:
    """Free variables y (interior densities ρ_k = Πy_k + M/(n|c|), Π removing each slice's
    mean, so the mass is exactly M and ρ is linear in y)."""
    import torch

    grid, k_steps, mass, vol = act.grid, act.problem.steps, act.mass, act.vol
    x0 = (mass * guess[1:-1] / vol).ravel()
    level = mass / (vol * grid.size)

    def unpack(x: Any) -> Any:
        y = x.reshape(k_steps - 1, -1)
        rho_int = (y - y.mean(dim=1, keepdim=True) + level).reshape(k_steps - 1, *grid.shape)
        return torch.cat([act.rho0[None], rho_int, act.rho1[None]], dim=0)

    return unpack, x0


def _max_step(act: DirectAction, mob: Mobility) -> Callable[[np.ndarray, np.ndarray], float]:
    """Largest α keeping the interior densities of ``x + αp`` inside the mobility's domain
    (density variables, :func:`_density_variables`)."""
    n_y = (act.problem.steps - 1) * act.grid.size
    level = act.mass / (act.vol * act.grid.size)

    def bound(x: np.ndarray, p: np.ndarray) -> float:
        y, d = x[:n_y].reshape(-1, act.grid.size), p[:n_y].reshape(-1, act.grid.size)
        rho = y - y.mean(axis=1, keepdims=True) + level
        d = d - d.mean(axis=1, keepdims=True)
        with np.errstate(divide="ignore", invalid="ignore"):
            down = np.where(d < 0, (rho - mob.lower) / -d, np.inf)
            up = np.where(d > 0, (mob.upper - rho) / d, np.inf)
        return float(min(down.min(initial=np.inf), up.min(initial=np.inf)))

    return bound


def _inside(mob: Mobility, rho: np.ndarray) -> bool:
    return bool(np.all(rho > mob.lower) and np.all(rho < mob.upper))


def _centre_control(velocity: list[np.ndarray], grid: Grid, k_steps: int) -> np.ndarray:
    """Face velocities per step → cell centres (mean of the two faces, walls 0) → time nodes
    (mean of the adjacent steps); shape (K+1, *shape, d)."""
    comps = []
    for a, v in enumerate(velocity):
        pad = [(0, 0)] * v.ndim
        pad[1 + a] = (1, 1)
        full = np.pad(v, pad)
        lo, hi = faces(full.ndim, 1 + a, full.shape[1 + a])
        cell = 0.5 * (full[lo] + full[hi])
        nodes = np.empty((k_steps + 1, *grid.shape))
        nodes[0], nodes[-1] = cell[0], cell[-1]
        nodes[1:-1] = 0.5 * (cell[1:] + cell[:-1])
        comps.append(nodes)
    return np.stack(comps, axis=-1)


def _describe(obj: object) -> dict[str, object]:
    describe = getattr(obj, "describe", None)
    return describe() if callable(describe) else {"repr": repr(obj)}


# --------------------------------------------------------------------------- Newton


def _interior_newton(objective: _Objective, x0: np.ndarray, options: DirectOptions,
                     callback: Callable[[int, float, float], None] | None) -> NewtonResult:
    r"""Truncated Newton on J - μ|c|Σ log(ρ - lower) (+ log(upper - ρ)) over the interior
    densities, for μ = μ₀, μ₀/10, ... down to a μ whose bias on J (μ|c| per barrier term, the
    duality gap of a log barrier: Nocedal & Wright, 2006, §19.2) is below tol × J; each stage is
    warm-started from the last, the last one solved to ``options.tol``. Without the barrier,
    Newton steps in ρ keep pushing the far tails (optimal values ~1e-20) below zero and the
    fraction-to-the-boundary rule stalls."""
    j0 = objective.value(x0)
    act = objective.act
    terms = (act.problem.steps - 1) * act.grid.size * (2 if math.isfinite(objective.mob.upper)
                                                         else 1)
    mu_end = options.tol * max(abs(j0), 1e-300) / (terms * act.vol)
    mu = max(MU0 * abs(j0) / (terms * act.vol), mu_end)
    precond = _preconditioner_1d(objective)
    x, iterations, cg, history, start = x0, 0, 0, [], time.perf_counter()
    while True:
        objective.barrier = mu
        last = mu <= mu_end
        offset = time.perf_counter() - start
        opt = minimise(objective.second_order, objective.value, x, precond,
                       max_iter=max(options.max_iter - iterations, 1), max_cg=options.max_cg,
                       tol=options.tol if last else 1e-6, gtol=options.gtol if last else 0.0,
                       max_step=_max_step(act, objective.mob), callback=callback)
        history += [{**h, "seconds": h["seconds"] + offset, "barrier": mu} for h in opt.history]
        x, iterations, cg = opt.x, iterations + opt.iterations, cg + opt.cg_iterations
        if last or iterations >= options.max_iter:
            break
        mu = max(mu * MU_FACTOR, mu_end)
    objective.barrier = 0.0
    value, grad = objective.value_grad(x)
    gnorm = float(np.abs(grad).max()) if grad is not None else math.nan
    message = opt.message.split(" (")[0] + f" ({iterations} Newton iterations, {cg} CG iterations)"
    return NewtonResult(x, value, gnorm, iterations, cg, opt.status, message, history)


class _Objective:
    """J as a function of the free variables, with the domain guard; value, gradient and
    Hessian–vector products (double backward) by torch autograd."""

    def __init__(self, act: DirectAction, unpack: Unpack, mob: Mobility) -> None:
        self.act, self.unpack, self.mob = act, unpack, mob
        self.barrier = 0.0

    def _evaluate(self, x: Any) -> Any:
        import torch

        rho = self.unpack(x)
        if not _inside(self.mob, rho[1:-1].detach().numpy()):
            return None
        value = self.act.value(rho)
        if self.barrier > 0:
            inner = rho[1:-1]
            value = value - self.barrier * self.act.vol * torch.log(inner - self.mob.lower).sum()
            if math.isfinite(self.mob.upper):
                value = value - (self.barrier * self.act.vol
                                 * torch.log(self.mob.upper - inner).sum())
        return value if math.isfinite(float(value.detach())) else None

    def value(self, x_np: np.ndarray) -> float:
        import torch

        with torch.no_grad():
            value = self._evaluate(torch.from_numpy(x_np))
        return math.inf if value is None else float(value)

    def value_grad(self, x_np: np.ndarray) -> tuple[float, np.ndarray | None]:
        import torch

        x = torch.from_numpy(x_np).requires_grad_(True)
        value = self._evaluate(x)
        if value is None:
            return math.inf, None
        (grad,) = torch.autograd.grad(value, x)
        return float(value.detach()), grad.numpy().copy()

    def second_order(self, x_np: np.ndarray) -> SecondOrder | None:
        import torch

        x = torch.from_numpy(x_np.copy()).requires_grad_(True)
        value = self._evaluate(x)
        if value is None:
            return None
        (grad,) = torch.autograd.grad(value, x, create_graph=True)

        def hessp(v: np.ndarray) -> np.ndarray:
            (hv,) = torch.autograd.grad(grad, x, grad_outputs=torch.from_numpy(v),
                                        retain_graph=True)
            return hv.numpy().copy()

        return SecondOrder(float(value.detach()), grad.detach().numpy().copy(), hessp)


def _preconditioner_1d(objective: _Objective) -> Callable[[np.ndarray], Operator]:
    r"""Gauss–Newton preconditioner of the 1D action, built in cumulative-mass variables.

    In the masses left of each face, :math:`C_{k,i}`, every term of J is local:
    :math:`\rho_{k,i} = (C_{k,i} - C_{k,i-1})/|c|`, :math:`F_{k+1/2,i} = -(C_{k+1,i} -
    C_{k,i})/\Delta t`. With the mean field Φ̄ frozen, J = Σ r² with residuals
    :math:`r = \sqrt{w/\chi_f}\,(j - b)`, :math:`w = |c|\Delta t/(2\sigma^2)`, and the
    Gauss–Newton matrix :math:`M_C = 2 J_r^\top J_r` is sparse (a residual on step k+1/2, face i
    sees C at nodes k, k+1 and faces i-1..i+1), so J_r comes from 6 Jacobian–vector products
    with the variables coloured by (k mod 2, i mod 3) (Curtis, Powell & Reid, IMA J. Appl.
    Math. 1974). It is mapped to the density variables y (ρ = Πy + M/(n|c|), Π the projection
    on zero-sum slices) through the linear map P: δy ↦ δC = cumsum(|c|Πδy), invertible on
    zero-sum slices: M_y⁻¹ = P⁻¹ M_C⁻¹ P⁻ᵀ.
    """
    import scipy.sparse as sp
    import torch
    from scipy.sparse.linalg import splu

    act, unpack, mob = objective.act, objective.unpack, objective.mob
    k_steps, n = act.problem.steps, act.grid.shape[0]
    vol, dt, mass = act.vol, act.dt, act.mass
    weight = vol * dt / (2.0 * act.noise**2)
    n_int, n_face = k_steps - 1, n - 1
    kk, ii = np.meshgrid(np.arange(n_int), np.arange(n_face), indexing="ij")
    s_row, f_row = np.meshgrid(np.arange(k_steps), np.arange(n_face), indexing="ij")
    zero, total = torch.zeros((k_steps + 1, 1), dtype=torch.float64), None

    # ρ_{k,i} = (C_{k,i} - C_{k,i-1})/|c| on every interior slice, as a sparse matrix
    one = sp.diags([np.ones(n_face), -np.ones(n_face)], [0, -1], shape=(n, n_face)) / vol
    diff = sp.block_diag([one] * n_int, format="csr")

    def build(x_np: np.ndarray) -> Operator:
        nonlocal total
        with torch.no_grad():
            rho = unpack(torch.from_numpy(x_np))
            phi = act.mean_field(0.5 * (rho[1:] + rho[:-1]))
            cum = torch.cumsum(rho * vol, dim=1)[:, :-1]
        total = torch.full((k_steps + 1, 1), mass, dtype=torch.float64)

        def residuals(c_int: Any) -> Any:
            c = torch.cat([cum[:1], c_int, cum[-1:]], dim=0)
            full = torch.cat([zero, c, total], dim=1)
            r = (full[:, 1:] - full[:, :-1]) / vol
            flux = -(c[1:] - c[:-1]) / dt
            ((j, b, chi, _),) = act.face_terms(r, fluxes=(flux,), phi=phi)
            # floored: χ^(-3/2) of the far tails (ρ ~ 1e-200) would overflow; an approximation
            # is all a preconditioner needs
            return (j - b) * torch.sqrt(weight / chi.clamp_min(CHI_FLOOR))

        rows, cols, vals = [], [], []
        base = cum[1:-1].clone()
        for a in range(2):
            for c3 in range(3):
                seed = torch.from_numpy(((kk % 2 == a) & (ii % 3 == c3)).astype(float))
                _, out = torch.func.jvp(residuals, (base,), (seed,))
                out = out.numpy()
                # the one variable of this colour each residual (s, f) sees
                k_var = np.where((s_row - 1) % 2 == a, s_row - 1, s_row)
                i_var = f_row - 1 + (c3 - (f_row - 1)) % 3
                ok = (k_var >= 0) & (k_var < n_int) & (i_var >= 0) & (i_var < n_face)
                rows.append((s_row * n_face + f_row)[ok])
                cols.append((k_var * n_face + i_var)[ok])
                vals.append(out[ok])
        jac = sp.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                            shape=(k_steps * n_face, n_int * n_face))
        gn = 2.0 * (jac.T @ jac)
        if objective.barrier > 0:
            # barrier -μ|c|Σ log(ρ - lower) (+ log(upper - ρ)): diagonal in ρ = D C
            r_int = rho[1:-1].numpy()
            curv = 1.0 / (r_int - mob.lower) ** 2
            if math.isfinite(mob.upper):
                curv = curv + 1.0 / (mob.upper - r_int) ** 2
            gn = gn + diff.T @ sp.diags(objective.barrier * vol * curv.ravel()) @ diff
        # symmetric diagonal scaling first: the weights 1/χ span ~100 orders of magnitude
        scale = np.sqrt(gn.diagonal())
        scale[~(scale > 0)] = 1.0
        inv = sp.diags(1.0 / scale)
        gn = (inv @ gn @ inv + 1e-12 * sp.identity(gn.shape[0])).tocsc()
        lu = splu(gn)
        def apply(q: np.ndarray) -> np.ndarray:
            big_g = q.reshape(n_int, n) / vol
            big_g = big_g - big_g[:, -1:]
            g_c = big_g[:, :-1] - big_g[:, 1:]
            p_c = (lu.solve(g_c.ravel() / scale) / scale).reshape(n_int, n_face)
            pad = np.pad(p_c, ((0, 0), (1, 1)))
            return ((pad[:, 1:] - pad[:, :-1]) / vol).ravel()

        return apply

    return build


