r"""The direct solver's action in density–flux variables, with continuity as a linear constraint
and open walls (particle reservoirs, :class:`~mfbridge.model.reservoirs.Reservoirs`).

Variables: the interior densities :math:`\rho_k` (1/length^d), k = 1..K-1, flattened to
((K-1)·cells,), and the fluxes :math:`F_k` (mass per time) through every face of the
:class:`FaceLayout` on every step k = 0..K-1, flattened to (K·faces,). A face is either interior
(between cells lo and hi along axis a, F > 0 from lo to hi) or an *open wall* at density
:math:`\rho_w` (F > 0 along +a: into the box at a lower wall, out of it at an upper wall); closed
walls carry no flux and have no face. The constraint is discrete continuity, exact in every cell:

.. math::

    |c|(\rho_{k+1} - \rho_k)/\Delta t + \mathrm{div}_h F_k = 0 .

On step k, with midpoint densities :math:`\bar\rho = (\rho_k + \rho_{k+1})/2` and
:math:`\bar\Phi = U + W\star(|c|\bar\rho)`:

* interior face: :math:`\rho_f = (\bar\rho_{lo} + \bar\rho_{hi})/2`, distance :math:`\ell = h_a`,
  weight :math:`\omega = |c|`;
* open wall: :math:`\rho_f = \rho_w`, the wall side holds :math:`\rho_w` and
  :math:`\Phi_w = U(x_w) + \sum_j W(x_w - x_j)|c|\bar\rho_j` (x_w the wall point facing the cell),
  :math:`\ell = h_a/2` (wall to centre), :math:`\omega = |c|/2` (the half cell between them: the
  dual cells of the faces then tile the box, a trapezoid rule);
* :math:`j = F h_a/|c|`, :math:`b = -\tfrac{\sigma^2}{2}D(\rho_f)(\bar\rho_{hi} -
  \bar\rho_{lo})/\ell - \chi(\rho_f)(\bar\Phi_{hi} - \bar\Phi_{lo})/\ell`;

.. math::

    J = \frac{\Delta t}{2\sigma^2}\sum_k\sum_f \omega\,\frac{(j - b)^2}{\chi(\rho_f)} .

With closed walls this is :class:`~mfbridge.solvers.direct_action.DirectAction`'s J (there the
fluxes are the continuity ones in 1D and the optimal ones in 2D; here they are free and the
minimiser makes them optimal). A steady profile :math:`\bar\rho` with :math:`F = B(\bar\rho)`
(:math:`B = b\,|c|/h_a`, the fluxes of the unconditioned dynamics) has zero cost. For D = 1,
U = W = 0 the linear profile between the reservoirs is steady exactly (its centred and half-cell
differences are all the same slope).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp

from mfbridge.model.grid import Grid
from mfbridge.model.reservoirs import Reservoirs
from mfbridge.solvers.direct_action import CHI_FLOOR, DirectAction

LOCAL = 5  # local variables of a face term: F, ρ_k(lo), ρ_k(hi), ρ_{k+1}(lo), ρ_{k+1}(hi)


@dataclass(frozen=True)
class FaceLayout:
    """The faces of a grid with some walls open (numpy arrays over faces: interior faces axis by
    axis, then the open walls' faces).

    ``lo``, ``hi``: the cells on either side (flat indices; -1 on the wall side of an open
    wall); ``axis``; ``wall``: the reservoir density (NaN for interior faces); ``dist``, the
    distance between the two density points (h or h/2); ``weight``, the face's share of the
    box (|c| or |c|/2); ``area``, |c|/h (a flux F is j × area); ``wall_points`` (walls, d), the
    point of the wall facing each open-wall face; ``div`` (cells × faces, sparse), the outflow
    of each cell."""

    lo: np.ndarray
    hi: np.ndarray
    axis: np.ndarray
    wall: np.ndarray
    dist: np.ndarray
    weight: np.ndarray
    area: np.ndarray
    wall_points: np.ndarray
    div: Any

    @property
    def count(self) -> int:
        return int(self.lo.size)

    @property
    def boundary(self) -> np.ndarray:
        return (self.lo < 0) | (self.hi < 0)

    @property
    def is_open(self) -> bool:
        return bool(self.boundary.any())

    @classmethod
    def build(cls, grid: Grid, reservoirs: Reservoirs | None = None) -> FaceLayout:
        shape, cells = grid.shape, grid.size
        idx = np.arange(cells).reshape(shape)
        lo, hi, axis, wall, pts = [], [], [], [], []
        for a in range(grid.dim):
            lo.append(np.take(idx, np.arange(shape[a] - 1), axis=a).ravel())
            hi.append(np.take(idx, np.arange(1, shape[a]), axis=a).ravel())
            axis.append(np.full(lo[-1].size, a))
            wall.append(np.full(lo[-1].size, np.nan))
        centres = grid.points.reshape(-1, grid.dim)
        for (a, side), rho in (reservoirs.walls if reservoirs else {}).items():
            at = np.take(idx, 0 if side == "lower" else shape[a] - 1, axis=a).ravel()
            none = np.full(at.size, -1)
            lo.append(none if side == "lower" else at)
            hi.append(at if side == "lower" else none)
            axis.append(np.full(at.size, a))
            wall.append(np.full(at.size, rho))
            p = centres[at].copy()
            p[:, a] = grid.lower[a] if side == "lower" else grid.upper[a]
            pts.append(p)
        lo_a, hi_a, ax = np.concatenate(lo), np.concatenate(hi), np.concatenate(axis)
        h = np.asarray(grid.spacing)[ax]
        bnd = (lo_a < 0) | (hi_a < 0)
        f = np.arange(lo_a.size)
        out_cells = np.r_[lo_a[lo_a >= 0], hi_a[hi_a >= 0]]
        out_faces = np.r_[f[lo_a >= 0], f[hi_a >= 0]]
        signs = np.r_[np.ones(int((lo_a >= 0).sum())), -np.ones(int((hi_a >= 0).sum()))]
        div = sp.csr_matrix((signs, (out_cells, out_faces)), shape=(cells, lo_a.size))
        vol = grid.cell_volume
        return cls(lo=lo_a, hi=hi_a, axis=ax, wall=np.concatenate(wall),
                   dist=np.where(bnd, h / 2, h), weight=np.where(bnd, vol / 2, vol),
                   area=vol / h, wall_points=(np.concatenate(pts) if pts
                                              else np.zeros((0, grid.dim))), div=div)


class FluxAction:
    """J(ρ, F) of the module docstring for ``act`` (problem, mobility, mass) on ``layout``,
    between the density profiles ``start`` and ``end`` (1/length^d, shape grid.shape).

    :meth:`value` works on torch float64 tensors (autograd); :meth:`constraint`,
    :meth:`optimal_fluxes` and :meth:`local_hessian` return numpy / scipy objects."""

    def __init__(self, act: DirectAction, layout: FaceLayout, start: np.ndarray,
                 end: np.ndarray) -> None:
        import torch

        self.act, self.layout = act, layout
        self.mob = act.mobility
        self.grid = act.grid
        self.cells, self.steps = act.grid.size, act.problem.steps
        self.vol, self.dt, self.noise = act.vol, act.dt, act.noise
        self.n_rho = (self.steps - 1) * self.cells
        self.n_flux = self.steps * layout.count
        self.start = torch.as_tensor(np.asarray(start, dtype=float).ravel())
        self.end = torch.as_tensor(np.asarray(end, dtype=float).ravel())
        t = torch.from_numpy
        self._lo, self._hi = t(np.maximum(layout.lo, 0)), t(np.maximum(layout.hi, 0))
        self._has_lo, self._has_hi = t(layout.lo >= 0), t(layout.hi >= 0)
        self._bnd = t(layout.boundary)
        self._wall = t(np.nan_to_num(layout.wall))
        self._dist, self._weight, self._area = t(layout.dist), t(layout.weight), t(layout.area)
        problem = act.problem
        pts = layout.wall_points
        self._wall_u = t(np.zeros(layout.count))
        self._wall_pair = None
        if len(pts):
            u = np.zeros(layout.count)
            u[layout.boundary] = np.asarray(problem.confinement.value(pts), dtype=float)
            self._wall_u = t(u)
            if act.interacting:
                diff = pts[:, None, :] - act.grid.points.reshape(1, -1, act.grid.dim)
                pair = np.zeros((layout.count, self.cells))
                pair[layout.boundary] = np.asarray(problem.interaction.value(diff), dtype=float)
                self._wall_pair = t(pair * self.vol)

    # ---------------------------------------------------------------- pieces
    def full(self, rho: Any) -> Any:
        """All density slices (K+1, cells) from the interior ones (flat)."""
        import torch

        return torch.cat([self.start[None], rho.reshape(self.steps - 1, self.cells),
                          self.end[None]])

    def mean_field(self, mid: Any) -> tuple[Any, Any]:
        """Φ̄ (K, cells) at the cells and on the wall side of every face (K, faces)."""
        phi = self.act.mean_field(mid.reshape(len(mid), *self.grid.shape)).reshape(len(mid), -1)
        wall = self._wall_u.expand(len(mid), -1)
        if self._wall_pair is not None:
            wall = wall + mid @ self._wall_pair.T
        return phi, wall

    def sides(self, mid: Any, phi: Any, wall_phi: Any) -> tuple[Any, Any, Any, Any]:
        """Densities and Φ on the lo and hi side of every face (K, faces)."""
        import torch

        r_lo = torch.where(self._has_lo, mid[:, self._lo], self._wall)
        r_hi = torch.where(self._has_hi, mid[:, self._hi], self._wall)
        p_lo = torch.where(self._has_lo, phi[:, self._lo], wall_phi)
        p_hi = torch.where(self._has_hi, phi[:, self._hi], wall_phi)
        return r_lo, r_hi, p_lo, p_hi

    def face_fields(self, flux: Any, r_lo: Any, r_hi: Any, p_lo: Any, p_hi: Any
                    ) -> tuple[Any, Any, Any]:
        """(j, b, χ(ρ_f)) on every face and step from the face-local quantities."""
        import torch

        rf = torch.where(self._bnd, self._wall, 0.5 * (r_lo + r_hi))
        chi = self.mob.chi(rf)
        b = (-0.5 * self.noise**2 * self.mob.d(rf) * (r_hi - r_lo) - chi * (p_hi - p_lo)
             ) / self._dist
        return flux / self._area, b, chi

    def fields(self, rho: Any, flux: Any) -> tuple[Any, Any, Any]:
        """(j, b, χ_f), each (K, faces), of interior densities and fluxes (flat)."""
        full = self.full(rho)
        mid = 0.5 * (full[1:] + full[:-1])
        phi, wall_phi = self.mean_field(mid)
        return self.face_fields(flux.reshape(self.steps, -1), *self.sides(mid, phi, wall_phi))

    def quadrature(self, w: Any, chi: Any) -> Any:
        r""":math:`\frac{\Delta t}{2\sigma^2}\sum_k\sum_f \omega\,w^2/\chi`."""
        return (self._weight * w**2 / chi).sum() * self.dt / (2.0 * self.noise**2)

    def value(self, rho: Any, flux: Any) -> Any:
        """J (0-d tensor) of interior densities ``rho`` and fluxes ``flux`` (flat tensors)."""
        j, b, chi = self.fields(rho, flux)
        return self.quadrature(j - b, chi)

    def parts(self, rho: Any, flux: Any) -> tuple[float, float, float]:
        """J, its kinetic part (w = j) and its drift part (w = b), as floats."""
        import torch

        with torch.no_grad():
            j, b, chi = self.fields(rho, flux)
            return tuple(float(self.quadrature(w, chi)) for w in (j - b, j, b))

    def velocity(self, rho: np.ndarray, flux: np.ndarray) -> np.ndarray:
        """The control velocity (j − b)/ρ_f on every face and step (K, faces)."""
        import torch

        with torch.no_grad():
            full = self.full(torch.as_tensor(rho))
            mid = 0.5 * (full[1:] + full[:-1])
            sides = self.sides(mid, *self.mean_field(mid))
            j, b, _ = self.face_fields(torch.as_tensor(flux).reshape(self.steps, -1), *sides)
            rf = torch.where(self._bnd, self._wall, 0.5 * (sides[0] + sides[1]))
            return ((j - b) / rf).numpy()

    def wall_flux(self, flux: np.ndarray) -> dict[tuple[int, str], np.ndarray]:
        """Mass per time entering the box through each open wall, on every step (K,)."""
        f = np.asarray(flux).reshape(self.steps, -1)
        out = {}
        lay = self.layout
        for a in np.unique(lay.axis[lay.boundary]):
            for side, sel, sign in (("lower", lay.lo < 0, 1.0), ("upper", lay.hi < 0, -1.0)):
                mask = sel & (lay.axis == a)
                if mask.any():
                    out[(int(a), side)] = sign * f[:, mask].sum(axis=1)
        return out

    # ---------------------------------------------------------------- linear algebra
    def constraint(self) -> tuple[Any, Any, np.ndarray]:
        """Continuity :math:`A_\\rho\\,\\rho + A_F F = c` (rows: step k, cell i): A_ρ, A_F
        (sparse) and c (numpy), from the fixed end slices."""
        k_steps, n = self.steps, self.cells
        scale = self.vol / self.dt
        shift = sp.eye(k_steps, k_steps - 1, k=0) - sp.eye(k_steps, k_steps - 1, k=-1)
        a_rho = sp.kron(shift, sp.identity(n) * scale, format="csr")
        a_flux = sp.block_diag([self.layout.div] * k_steps, format="csr")
        c = np.zeros((k_steps, n))
        c[0] += scale * self.start.numpy()
        c[-1] -= scale * self.end.numpy()
        return a_rho, a_flux, c.ravel()

    def optimal_fluxes(self, rho: np.ndarray) -> np.ndarray:
        r"""The fluxes minimising J at fixed interior densities (flat, (K·faces,)): per step,
        :math:`F = B + m\,\mathrm{div}_h^\top\lambda` with :math:`m = \chi_f\,\mathrm{area}^2/
        \omega` and :math:`\mathrm{div}_h(m\,\mathrm{div}_h^\top\lambda) = s - \mathrm{div}_h B`,
        s the continuity source (a weighted Laplace equation; with closed walls only, its
        constant null space is pinned at one cell)."""
        import torch
        from scipy.sparse.linalg import splu

        with torch.no_grad():
            full = self.full(torch.as_tensor(rho))
            mid = 0.5 * (full[1:] + full[:-1])
            _, b, chi = self.face_fields(torch.zeros(1), *self.sides(mid, *self.mean_field(mid)))
            big_b = (b * self._area).numpy()
            weight = (chi.clamp_min(CHI_FLOOR) * self._area**2 / self._weight).numpy()
            source = (-(self.vol / self.dt) * (full[1:] - full[:-1])).numpy()
        div = self.layout.div
        out = np.empty_like(big_b)
        for k in range(self.steps):
            lap = (div @ sp.diags(weight[k]) @ div.T).tocsc()
            if not self.layout.is_open:
                lap = lap + sp.csc_matrix(([lap.diagonal().max()], ([0], [0])), shape=lap.shape)
            lam = splu(lap).solve(source[k] - div @ big_b[k])
            out[k] = big_b[k] + weight[k] * (div.T @ lam)
        return out.ravel()

    def local_hessian(self, rho: np.ndarray, flux: np.ndarray
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        r"""Second derivatives of every face term, the mean field treated as a variable of its
        own. A term depends on F, the two midpoint densities :math:`\bar\rho_{lo}`,
        :math:`\bar\rho_{hi}` and Φ̄ on either side only, so its Hessian ``reduced`` (K·faces,
        w, w) in (F, ρ̄_lo, ρ̄_hi[, Φ̄_lo, Φ̄_hi]) takes w = 3 (5 with W) Hessian–vector products
        of the sum of the terms, each term seeing only its own copy of its variables. Returned
        with ``blocks`` (K·faces, 7, 7), the same in (F, ρ_k(lo), ρ_k(hi), ρ_{k+1}(lo),
        ρ_{k+1}(hi), Φ̄(lo), Φ̄(hi)) (ρ̄ = (ρ_k + ρ_{k+1})/2), the global index of the first 5
        (in the (ρ, F) vector; -1 where fixed: an end slice or a wall) and of the last 2 (in the
        vector of :meth:`mean_field_map`). The 5 × 5 part is the Hessian with the mean field
        frozen; with W = 0 it is the whole Hessian."""
        import torch

        k_steps, n_f = self.steps, self.layout.count
        with torch.no_grad():
            full = self.full(torch.as_tensor(rho))
            mid = 0.5 * (full[1:] + full[:-1])
            phi, wall_phi = self.mean_field(mid)
            r_lo, r_hi, p_lo, p_hi = self.sides(mid, phi, wall_phi)
        width = 5 if self.act.interacting else 3
        copies = torch.stack([torch.as_tensor(flux).reshape(k_steps, n_f), r_lo, r_hi, p_lo,
                              p_hi][:width], dim=-1)
        x = copies.clone().requires_grad_(True)
        lo_side = torch.where(self._has_lo, x[..., 1], self._wall)
        hi_side = torch.where(self._has_hi, x[..., 2], self._wall)
        p_sides = (x[..., 3], x[..., 4]) if width == 5 else (p_lo, p_hi)
        j, b, chi = self.face_fields(x[..., 0], lo_side, hi_side, *p_sides)
        (grad,) = torch.autograd.grad(self.quadrature(j - b, chi), x, create_graph=True)
        cols = []
        for c in range(width):
            seed = torch.zeros_like(x)
            seed[..., c] = 1.0
            # a scalar product, not grad_outputs=: that argument makes torch import sympy (2 s)
            (col,) = torch.autograd.grad((grad * seed).sum(), x, retain_graph=c < width - 1)
            cols.append(col)
        reduced = torch.stack(cols, dim=-1).detach().numpy().reshape(-1, width, width)
        # local variables → reduced ones: F; ρ̄ = (ρ_k + ρ_{k+1})/2 on each side; Φ̄
        # (a gather: each local variable is one reduced variable times a weight)
        source = np.array([0, 1, 2, 1, 2, 3, 4])
        weight = np.array([1.0, 0.5, 0.5, 0.5, 0.5, 1.0, 1.0])
        if width == 3:
            source[5:], weight[5:] = 0, 0.0
        blocks = reduced[:, source[:, None], source[None, :]] * np.outer(weight, weight)
        kk = np.repeat(np.arange(k_steps), n_f)
        lo, hi = np.tile(self.layout.lo, k_steps), np.tile(self.layout.hi, k_steps)

        def level(step: np.ndarray, cell: np.ndarray) -> np.ndarray:
            ok = (step >= 1) & (step <= k_steps - 1) & (cell >= 0)
            return np.where(ok, (step - 1) * self.cells + np.maximum(cell, 0), -1)

        index = np.stack([self.n_rho + np.arange(k_steps * n_f), level(kk, lo), level(kk, hi),
                          level(kk + 1, lo), level(kk + 1, hi)], axis=1)
        wall_slot = np.full(n_f, -1)
        wall_slot[self.layout.boundary] = np.arange(int(self.layout.boundary.sum()))
        n_walls = int(self.layout.boundary.sum())
        wall_index = k_steps * self.cells + kk * n_walls + np.tile(wall_slot, k_steps)
        phi_index = np.stack([np.where(lo >= 0, kk * self.cells + lo, wall_index),
                              np.where(hi >= 0, kk * self.cells + hi, wall_index)], axis=1)
        keep = np.concatenate([index >= 0, np.ones((len(index), 2), dtype=bool)], axis=1)
        blocks = blocks * keep[:, :, None] * keep[:, None, :]
        return reduced, blocks, index, phi_index

    def mean_field_map(self, v: np.ndarray, transpose: bool = False) -> np.ndarray:
        r"""The linear map M from interior density changes (flat) to mean-field changes at the
        step midpoints: cells (K·cells) then the open walls' points (K·walls),
        :math:`\delta\bar\Phi_k = W\star(|c|(\delta\rho_k + \delta\rho_{k+1})/2)`; or its
        transpose (``transpose=True``, from that space back to densities). Zero without W."""
        k_steps, n = self.steps, self.cells
        n_w = int(self.layout.boundary.sum())
        pair = self.act.pair_np
        wall = (None if self._wall_pair is None
                else self._wall_pair.numpy()[self.layout.boundary])
        if not transpose:
            dv = np.zeros((k_steps + 1, n))
            dv[1:-1] = np.asarray(v).reshape(k_steps - 1, n)
            mid = 0.5 * (dv[1:] + dv[:-1])
            cells = pair(self.vol * mid.reshape(k_steps, *self.grid.shape)).reshape(k_steps, n)
            walls = mid @ wall.T if wall is not None else np.zeros((k_steps, n_w))
            return np.concatenate([cells.ravel(), walls.ravel()])
        u = np.asarray(v)
        cells = u[:k_steps * n].reshape(k_steps, *self.grid.shape)
        back = self.vol * pair(cells).reshape(k_steps, n)
        if wall is not None:
            back = back + u[k_steps * n:].reshape(k_steps, n_w) @ wall
        out = 0.5 * (back[1:] + back[:-1])
        return out.ravel()


class Assembler:
    """Sparse matrices Σ_b R_bᵀ blocks_b C_b with a fixed pattern: block b's entry (i, j) is
    added at (rows[b, i], cols[b, j]); entries with a -1 index are dropped. The pattern (sorted,
    duplicates merged) is computed once; each call only sums the values into it."""

    def __init__(self, rows: np.ndarray, cols: np.ndarray, shape: tuple[int, int]) -> None:
        r = np.repeat(rows, cols.shape[1], axis=1).ravel()
        c = np.tile(cols, (1, rows.shape[1])).ravel()
        self.keep = (r >= 0) & (c >= 0)
        linear = r[self.keep].astype(np.int64) * shape[1] + c[self.keep]
        unique, self.slot = np.unique(linear, return_inverse=True)
        self.indices = (unique % shape[1]).astype(np.int32)
        self.indptr = np.searchsorted(unique // shape[1], np.arange(shape[0] + 1)).astype(
            np.int32)
        self.shape = shape

    def __call__(self, blocks: np.ndarray) -> Any:
        data = np.bincount(self.slot, weights=blocks.ravel()[self.keep],
                           minlength=len(self.indices))
        return sp.csr_matrix((data, self.indices, self.indptr), shape=self.shape)


def convexify(reduced: np.ndarray) -> tuple[np.ndarray, int]:
    r"""Positive semi-definite corrections of the face terms' Hessians that change only their
    density part. In (F, ρ̄_lo, ρ̄_hi) (the first 3 × 3 of :meth:`FluxAction.local_hessian`'s
    ``reduced``, F first), :math:`\begin{pmatrix} d & b^\top \\ b & A\end{pmatrix}` is PSD iff
    d > 0 and the 2 × 2 Schur complement :math:`A - bb^\top/d \succeq 0`; its negative
    eigenvalue (closed form) is set to zero, the flux row (d, b) is kept. Returns the
    corrections in (ρ_k(lo), ρ_k(hi), ρ_{k+1}(lo), ρ_{k+1}(hi)) (K·faces, 4, 4), to add to the
    ρρ block of the assembled matrix, and how many faces needed one (round-off in the
    cancelling Schur complement, relative to A's entries, is ignored)."""
    d = reduced[:, 0, 0]
    b = reduced[:, 1:3, 0]
    a = reduced[:, 1:3, 1:3]
    schur = a - b[:, :, None] * b[:, None, :] / np.where(d > 0, d, 1.0)[:, None, None]
    p, q, r = schur[:, 0, 0], schur[:, 0, 1], schur[:, 1, 1]
    half = 0.5 * (p + r)
    radius = np.sqrt(0.25 * (p - r) ** 2 + q**2)
    low = half - radius
    scale = np.abs(a).max(axis=(1, 2))
    bad = low < -1e-12 * scale
    extra2 = np.zeros_like(schur)
    if bad.any():
        # eigenvector of the lower eigenvalue: (q, low - p) or (low - r, q)
        v = np.stack([q, low - p], axis=1)
        alt = np.stack([low - r, q], axis=1)
        use_alt = np.abs(v).sum(axis=1) < np.abs(alt).sum(axis=1)
        v = np.where(use_alt[:, None], alt, v)
        v = v / np.maximum(np.linalg.norm(v, axis=1, keepdims=True), 1e-300)
        extra2[bad] = (-low[bad])[:, None, None] * v[bad][:, :, None] * v[bad][:, None, :]
    # ρ̄_lo = (ρ_k(lo) + ρ_{k+1}(lo))/2, ρ̄_hi likewise: a gather with weight 1/4
    side = np.array([0, 1, 0, 1])
    return 0.25 * extra2[:, side[:, None], side[None, :]], int(bad.sum())
