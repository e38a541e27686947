r"""The discretised action of the direct solver (:mod:`mfbridge.solvers.direct`).

The action (see :mod:`mfbridge.model.mobility`) with noise σ, mobility χ, diffusion D,
:math:`\Phi = U + W*\rho`:

.. math::

    J(\rho, j) = \frac{1}{2\sigma^2}\int_0^T\!\!\int
        \frac{|j - b[\rho]|^2}{\chi(\rho)}\,dx\,dt,\qquad
    b[\rho] = -\tfrac{\sigma^2}{2}D(\rho)\nabla\rho - \chi(\rho)\nabla\Phi,\qquad
    \partial_t\rho + \nabla\cdot j = 0 .

For χ = ρ, D = 1 this is the main solver's J (:mod:`mfbridge.solvers.fixed_point`), which makes this
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
"""

from __future__ import annotations

import functools
from typing import Any

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.mobility import Mobility, Walkers
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics.reference import PairField, faces

MAX_DIM = 2
CHI_FLOOR = 1e-60


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

    def face_action(self, terms: list[tuple[Any, Any, Any, Any]], flux: str) -> Any:
        r""":math:`\frac{\Delta t}{2\sigma^2}\sum_k\sum_a\sum_{faces}|c|\,w^2/\chi(\rho_f)`
        over the ``terms`` of :meth:`face_terms` for the face flux w named by ``flux``:
        ``"control"`` (j − b: J itself), ``"bridge"`` (j: the kinetic part) or ``"drift"``
        (b: the drift part); the one quadrature of the action and of its parts. Since
        :math:`|j - b|^2 = |j|^2 - 2j\cdot b + |b|^2` and the cross term
        :math:`-\frac{1}{\sigma^2}\iint j\cdot b/\chi` tends to
        :math:`(F(\rho_T) - F(\rho_0))/\sigma^2` (Einstein relation
        :math:`b = -\chi\nabla\,\delta F/\delta\rho`, continuity, no-flux walls),
        J ≈ kinetic + drift + ΔF/σ² up to the discretisation error."""
        total = 0.0
        for j, b, chi, _ in terms:
            w = {"control": j - b, "bridge": j, "drift": b}[flux]
            total = total + (w**2 / chi).sum()
        return total * self.vol * self.dt / (2.0 * self.noise**2)

    def value(self, rho: Any) -> Any:
        """J of the density flow ``rho`` (K+1, *shape)."""
        return self.face_action(self.face_terms(rho), "control")

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
