r"""Newton's method on the density–flux action (:class:`~mfbridge.solvers.flux_action.FluxAction`)
with continuity as an exact linear constraint, a primal–dual log barrier for the mobility's
domain, and sparse KKT solves; and the steady profile between reservoirs.

**The barrier problem.** For μ > 0 minimise
:math:`J(\rho, F) - \mu|c|\sum\log(\rho - \ell)\ (-\ \mu|c|\sum\log(u - \rho))` subject to
:math:`A_\rho\rho + A_F F = c` (continuity), for μ = μ₀, 0.03 μ₀, ... down to a μ whose bias on
J (μ|c| per barrier term, the duality gap of a log barrier) is below ``tol`` × J; each stage is
solved until the Newton decrement is below a tenth of its own bias (``tol`` × J at the last,
whose duals must also be within a factor 2 of the central path). Primal–dual
interior point (Nocedal & Wright, "Numerical Optimization", 2006, §19.3; the monotone μ
strategy of Wächter & Biegler, "On the implementation of an interior-point filter line-search
algorithm for large-scale nonlinear programming", Math. Program. 106, 2006): the barrier's
Hessian μ|c|/ρ² is replaced by z/ρ with a dual estimate z, updated by its own Newton step and
kept within a factor 10¹⁰ of μ|c|/ρ. A plain primal barrier needed twice the iterations: far
tails (ρ ~ 1e-12 where the barrier's minimiser is ~1e-8) grow by at most a factor 2 per Newton
step.

**The Newton step.** With H the Hessian of J (+ Σ = z/ρ on the densities), g the gradient of
the barrier problem and r the constraint residual, the step solves the KKT system
:math:`H p + A^\top\nu = -g,\ A p = -r`. The flux block H_FF is diagonal (each flux is in one
face term), so the fluxes are eliminated (D = H_FF⁻¹) and then the multipliers, through the
per-step weighted Laplacians :math:`L_k = A_{F,k} D_k A_{F,k}^\top`:

.. math::

    \big(S + C^\top L^{-1} C\big)\,p_\rho = g_{red},\qquad
    S = H_{\rho\rho} + \Sigma - H_{\rho F} D H_{F\rho},\quad C = A_\rho - A_F D H_{F\rho},

solved by preconditioned conjugate gradients (:func:`~mfbridge.numerics.newton.pcg`) on the
exact reduced Hessian (sparse: the face terms' Hessians, with the mean field Φ̄ as a variable
of its own, composed with the convolution that gives Φ̄). The
preconditioner is built from the face terms' Hessians with the mean field frozen, made positive
semi-definite face by face (:func:`~mfbridge.solvers.flux_action.convexify`; exact, so one CG
iteration, when W = 0 and the terms are convex):

* ``"lu"`` (1D): the reduced KKT matrix :math:`[[S, C^\top], [C, -L - \delta I]]` factorised
  by SuperLU without pivoting (a quasi-definite matrix: Vanderbei, "Symmetric quasidefinite
  matrices", SIAM J. Optim. 5, 1995). In a closed box L is singular (constants), the whole
  matrix is not (C couples the levels' masses); a regularisation of L would not do: its smallest
  nonzero eigenvalues, set by the far tails' mobility, are below any fixed fraction of its
  diagonal;
* ``"blocks"`` (2D, where a factorisation of the whole space–time system fills in like a 3D
  one: 25 million entries and 18 s at 64×64 × 8 steps): symmetric block Gauss–Seidel over the
  time levels, each level's block :math:`S_{kk} + \sum C^\top L^{-1} C` solved exactly through its
  augmented (3 × cells) sparse system. Measured at 32×32 × 8 steps: 6 CG iterations for a
  1e-4 reduction of the error (block Jacobi: 17; diagonal: none within 300).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import splu

from mfbridge.numerics.newton import pcg
from mfbridge.solvers.flux_action import LOCAL, Assembler, FluxAction, convexify

MU0, MU_FACTOR = 1e-2, 0.03
SHIFT = 1e-6
CENTRAL = 10.0
# CG stops at a preconditioned residual below min(ETA, sqrt(decrement / |J_start|)) of the first
# (inexact Newton; 0.1 cost more Newton iterations than it saved CG ones at 32×32 × 16)
ETA = 0.01
DUAL_SPREAD = 1e10
LINEAR = ("auto", "lu", "blocks")


@dataclass
class FluxNewtonResult:
    """The minimiser found: interior densities ``rho`` and fluxes ``flux`` (flat), J there,
    the largest entry of the gradient of J, Newton and CG iterations, status and message
    (the statuses of :data:`~mfbridge.result.STATUSES`), and per-iteration ``history``."""

    rho: np.ndarray
    flux: np.ndarray
    value: float
    grad_norm: float
    iterations: int
    cg_iterations: int
    status: str
    message: str
    history: list[dict[str, float]] = field(default_factory=list)


class _Barrier:
    """Bounds ℓ < ρ < u of the mobility with their dual estimates."""

    def __init__(self, lower: float, upper: float, weight: float) -> None:
        self.lower, self.upper, self.weight = lower, upper, weight
        self.bounded = math.isfinite(upper)

    def inside(self, rho: np.ndarray) -> bool:
        return bool(np.all(rho > self.lower) and (not self.bounded or np.all(rho < self.upper)))

    def value(self, rho: np.ndarray, mu: float) -> float:
        out = -np.log(rho - self.lower).sum()
        if self.bounded:
            out -= np.log(self.upper - rho).sum()
        return float(mu * self.weight * out)

    def grad(self, rho: np.ndarray, mu: float) -> np.ndarray:
        out = -1.0 / (rho - self.lower)
        if self.bounded:
            out = out + 1.0 / (self.upper - rho)
        return mu * self.weight * out

    def primal(self, rho: np.ndarray, mu: float) -> tuple[np.ndarray, np.ndarray]:
        zl = mu * self.weight / (rho - self.lower)
        zu = mu * self.weight / (self.upper - rho) if self.bounded else np.zeros_like(rho)
        return zl, zu

    def curvature(self, rho: np.ndarray, zl: np.ndarray, zu: np.ndarray) -> np.ndarray:
        out = zl / (rho - self.lower)
        if self.bounded:
            out = out + zu / (self.upper - rho)
        return out

    def max_step(self, rho: np.ndarray, p: np.ndarray) -> float:
        with np.errstate(divide="ignore", invalid="ignore"):
            down = np.where(p < 0, (rho - self.lower) / -p, np.inf).min(initial=np.inf)
            up = (np.where(p > 0, (self.upper - rho) / p, np.inf).min(initial=np.inf)
                  if self.bounded else np.inf)
        return float(min(down, up))

    def centred(self, rho: np.ndarray, zl: np.ndarray, zu: np.ndarray, mu: float) -> bool:
        """Complementarity within a factor CENTRAL of μ|c| everywhere."""
        ratio = (rho - self.lower) * zl / (mu * self.weight)
        ok = np.all((ratio > 1 / CENTRAL) & (ratio < CENTRAL))
        if self.bounded:
            ratio = (self.upper - rho) * zu / (mu * self.weight)
            ok = ok and np.all((ratio > 1 / CENTRAL) & (ratio < CENTRAL))
        return bool(ok)

    def dual_step(self, rho: np.ndarray, p: np.ndarray, zl: np.ndarray, zu: np.ndarray,
                  mu: float, step: float) -> tuple[np.ndarray, np.ndarray]:
        """z ← z + α_z Δz with Δz from the linearised complementarity (ρ - ℓ)z = μ|c|, α_z the
        fraction to the boundary (0.995) of z ≥ 0, then z clipped to [1/s, s] × μ|c|/(ρ - ℓ)
        (s = 1e10) at the new ρ."""
        target_l, target_u = self.primal(rho, mu)
        dzl = target_l - zl - zl / (rho - self.lower) * p
        dzu = (target_u - zu + zu / (self.upper - rho) * p) if self.bounded else 0.0 * p
        with np.errstate(divide="ignore", invalid="ignore"):
            limit = min(np.where(dzl < 0, zl / -dzl, np.inf).min(initial=np.inf),
                        np.where(dzu < 0, zu / -dzu, np.inf).min(initial=np.inf))
        alpha = min(1.0, 0.995 * limit)
        new_rho = rho + step * p
        zl, zu = zl + alpha * dzl, zu + alpha * dzu
        pl, pu = self.primal(new_rho, mu)
        zl = np.clip(zl, pl / DUAL_SPREAD, pl * DUAL_SPREAD)
        if self.bounded:
            zu = np.clip(zu, pu / DUAL_SPREAD, pu * DUAL_SPREAD)
        return zl, zu


class _Step:
    """The Newton system at one point: exact reduced Hessian products and the preconditioner."""

    def __init__(self, fa: FluxAction, rho: np.ndarray, flux: np.ndarray, sigma: np.ndarray,
                 linear: str, constraint: tuple[Any, ...],
                 assemblers: dict[str, Assembler] | None = None) -> None:
        self.fa = fa
        # (A_ρ, A_F, c, A_ρᵀ, A_Fᵀ): transposes as CSR matrices of their own, since `.T` in a
        # loop builds a new object each time
        self.a_rho, self.a_flux, _, self.a_rho_t, self.a_flux_t = constraint
        n_r = fa.n_rho
        reduced, blocks, index, phi_index = fa.local_hessian(rho, flux)
        n_x = n_r + fa.n_flux
        n_phi = fa.steps * (fa.cells + int(fa.layout.boundary.sum()))
        if assemblers is None:
            assemblers = {
                "local": Assembler(index, index, (n_x, n_x)),
                "cross": Assembler(index, phi_index, (n_x, n_phi)),
                "phiphi": Assembler(phi_index, phi_index, (n_phi, n_phi)),
                "correction": Assembler(index[:, 1:], index[:, 1:], (n_x, n_x)),
            }
        self.assemblers = assemblers
        self.local = assemblers["local"](np.ascontiguousarray(blocks[:, :LOCAL, :LOCAL]))
        self.exact = not fa.act.interacting
        if not self.exact:
            # the mean field's part of the Hessian: H_xΦ M, Mᵀ H_Φx, Mᵀ H_ΦΦ M (M: densities →
            # mean field, a convolution; FluxAction.mean_field_map)
            self.cross = assemblers["cross"](np.ascontiguousarray(blocks[:, :LOCAL, LOCAL:]))
            self.cross_t = self.cross.T.tocsr()
            self.phiphi = assemblers["phiphi"](np.ascontiguousarray(blocks[:, LOCAL:, LOCAL:]))
        self.h_ff = self.local.diagonal()[n_r:].copy()
        self.d = 1.0 / self.h_ff
        self.h_rf = self.local[:n_r, n_r:].tocsr()
        self.sigma = sigma
        self.h_rr = (self.local[:n_r, :n_r] + sp.diags(sigma)).tocsr()
        self.closed = not fa.layout.is_open
        k_steps, n = fa.steps, fa.cells
        self.k_steps, self.n = k_steps, n
        d_mat = sp.diags(self.d)
        # all steps' Laplacians at once (block diagonal: A_F is)
        self.lap_all = (self.a_flux @ d_mat @ self.a_flux.T).tocsc()
        lap_diag = self.lap_all.diagonal()
        pinned = self.lap_all
        if self.closed:
            pin = np.zeros(k_steps * n)
            pin[::n] = lap_diag.reshape(k_steps, n).max(axis=1)
            pinned = (self.lap_all + sp.diags(pin)).tocsc()
        if linear == "lu":
            # one factorisation of the block-diagonal matrix: one call instead of K (1D: many
            # small steps)
            self._lap_lu = splu(pinned, permc_spec="MMD_AT_PLUS_A")
            self._lap_single = None
        else:
            self._lap_p = [pinned[k * n:(k + 1) * n, k * n:(k + 1) * n].tocsc()
                           for k in range(k_steps)]
            self._lap_single = [splu(lap, permc_spec="MMD_AT_PLUS_A") for lap in self._lap_p]
        self.linear = linear
        self._build_preconditioner(reduced, d_mat, lap_diag)

    def _build_preconditioner(self, reduced: np.ndarray, d_mat: Any, lap_diag: np.ndarray
                              ) -> None:
        n_r = self.fa.n_rho
        extra, self.convexified = convexify(reduced)
        correction = self.assemblers["correction"](extra)[:n_r, :n_r].tocsr()
        d_hfr = d_mat @ self.h_rf.T
        self.c_mat = (self.a_rho - self.a_flux @ d_hfr).tocsr()
        s_mat = (self.h_rr - self.h_rf @ d_hfr).tocsr()
        # the preconditioner's density block, kept definite: where the action is flat in ρ
        # once the fluxes are eliminated (zero control: S's face blocks have rank one) and the
        # barrier is weak, S has zero rows, and SuperLU without pivoting needs a non-zero
        # diagonal; the shift is 1e-6 of the diagonal of A_ρᵀ diag(L)⁻¹ A_ρ, an estimate of
        # the kinetic part CᵀL⁻¹C it sits next to
        shift = SHIFT * (self.a_rho.multiply(self.a_rho)).T @ (1.0 / lap_diag)
        self.s_pre = (s_mat + correction + sp.diags(shift)).tocsr()
        if self.linear == "lu":
            self._build_lu()
        else:
            self._build_blocks()

    # ---------------------------------------------------------------- pieces
    def project(self, v: np.ndarray) -> np.ndarray:
        """Remove each level's mean (closed boxes: densities keep their mass)."""
        if not self.closed:
            return v
        w = v.reshape(self.k_steps - 1, self.n)
        return (w - w.mean(axis=1, keepdims=True)).ravel()

    def lap_solve(self, r: np.ndarray) -> np.ndarray:
        """L⁻¹ r step by step (closed boxes: the solution of the consistent part)."""
        r = r.reshape(self.k_steps, self.n)
        if self.closed:
            r = r - r.mean(axis=1, keepdims=True)
        if self._lap_single is None:
            return self._lap_lu.solve(r.ravel())
        return np.concatenate([lu.solve(rk) for lu, rk in zip(self._lap_single, r, strict=True)])

    def hess(self, v_r: np.ndarray, v_f: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """H [v_r; v_f] of J (without the barrier), exact: the local sparse matrix, plus with
        W the mean field's part through two convolutions."""
        v = np.concatenate([v_r, v_f])
        out = self.local @ v
        if not self.exact:
            back = self.cross_t @ v
            if np.any(v_r):  # (the second product of `reduced` has v_r = 0)
                m_v = self.fa.mean_field_map(v_r)
                out += self.cross @ m_v
                back += self.phiphi @ m_v
            out[:self.fa.n_rho] += self.fa.mean_field_map(back, transpose=True)
        return out[:self.fa.n_rho], out[self.fa.n_rho:]

    def reduced(self, v: np.ndarray) -> np.ndarray:
        """The exact reduced Hessian (S + CᵀL⁻¹C) v on zero-mass levels (closed boxes)."""
        v = self.project(v)
        hr, hf = self.hess(v, np.zeros(self.fa.n_flux))
        mu = self.lap_solve(self.a_rho @ v - self.a_flux @ (self.d * hf))
        p_f = -self.d * (hf + self.a_flux_t @ mu)
        hr2, _ = self.hess(np.zeros_like(v), p_f)
        return self.project(hr + hr2 + self.a_rho_t @ mu + self.sigma * v)

    # ---------------------------------------------------------------- preconditioners
    def _build_lu(self) -> None:
        kkt = sp.bmat([[self.s_pre, self.c_mat.T], [self.c_mat, -self.lap_all]], format="csc")
        self._scale = 1.0 / np.sqrt(np.abs(kkt.diagonal()))
        scale = sp.diags(self._scale)
        self._kkt_lu = _quasi_definite_lu((scale @ kkt @ scale).tocsc())

    def _lu_apply(self, r: np.ndarray) -> np.ndarray:
        rhs = np.concatenate([self.project(r), np.zeros(self.k_steps * self.n)])
        out = self._scale * self._kkt_lu.solve(self._scale * rhs)
        return self.project(out[:self.fa.n_rho])

    def _build_blocks(self) -> None:
        n = self.n
        self._blocks = []
        lap_p = self._lap_p
        for k in range(self.k_steps - 1):
            rows = slice(k * n, (k + 1) * n)
            s_kk = self.s_pre[rows][:, rows]
            c_a = self.c_mat[k * n:(k + 1) * n][:, rows]
            c_b = self.c_mat[(k + 1) * n:(k + 2) * n][:, rows]
            aug = sp.bmat([[s_kk, c_a.T, c_b.T], [c_a, -lap_p[k], None],
                           [c_b, None, -lap_p[k + 1]]], format="csc")
            scale = 1.0 / np.sqrt(np.abs(aug.diagonal()))
            lu = _quasi_definite_lu((sp.diags(scale) @ aug @ sp.diags(scale)).tocsc())
            self._blocks.append((lu, scale))
        # the coupling of level k and k+1: S_{k,k+1} + C_{k,k}ᵀ L_k⁻¹ C_{k,k+1}
        self._couple = []
        for k in range(self.k_steps - 2):
            a, b = slice(k * n, (k + 1) * n), slice((k + 1) * n, (k + 2) * n)
            step = slice((k + 1) * n, (k + 2) * n)
            s_ab, c_a, c_b = (self.s_pre[a][:, b], self.c_mat[step][:, a],
                              self.c_mat[step][:, b])
            self._couple.append((s_ab, s_ab.T.tocsr(), c_a, c_a.T.tocsr(), c_b,
                                 c_b.T.tocsr(), k + 1))

    def _block_solve(self, k: int, r: np.ndarray) -> np.ndarray:
        lu, scale = self._blocks[k]
        rhs = np.zeros(len(scale))
        rhs[:self.n] = r
        return (scale * lu.solve(scale * rhs))[:self.n]

    def _upper(self, k: int, x: np.ndarray) -> np.ndarray:
        """Block (k, k+1) of the preconditioner's matrix applied to x (level k+1)."""
        s_ab, _, _, c_a_t, c_b, _, step = self._couple[k]
        return s_ab @ x + c_a_t @ self._lap_single[step].solve(c_b @ x)

    def _lower(self, k: int, x: np.ndarray) -> np.ndarray:
        """Block (k+1, k) applied to x (level k): the transpose of :meth:`_upper`."""
        _, s_ba, c_a, _, _, c_b_t, step = self._couple[k]
        return s_ba @ x + c_b_t @ self._lap_single[step].solve(c_a @ x)

    def _blocks_apply(self, r: np.ndarray) -> np.ndarray:
        """Symmetric block Gauss–Seidel over the levels: (D + U)⁻¹ D (D + L)⁻¹ r."""
        levels = self.k_steps - 1
        r = self.project(r).reshape(levels, self.n)
        y, w = np.empty_like(r), np.empty_like(r)
        for k in range(levels):
            w[k] = r[k] - (self._lower(k - 1, y[k - 1]) if k > 0 else 0.0)
            y[k] = self._block_solve(k, w[k])
        z = np.empty_like(r)
        for k in reversed(range(levels)):
            rhs = w[k] - (self._upper(k, z[k + 1]) if k < levels - 1 else 0.0)
            z[k] = self._block_solve(k, rhs)
        return self.project(z.ravel())

    def precondition(self, r: np.ndarray) -> np.ndarray:
        """M⁻¹ r (SPD on zero-mass levels)."""
        return self._lu_apply(r) if self.linear == "lu" else self._blocks_apply(r)

    # ---------------------------------------------------------------- the step
    def direction(self, g_r: np.ndarray, g_f: np.ndarray, resid: np.ndarray, eta: float,
                  max_cg: int) -> tuple[np.ndarray, np.ndarray, int]:
        """The Newton step (p_ρ, p_F) of the KKT system and the CG iterations used."""
        rhs2 = -resid + self.a_flux @ (self.d * g_f)
        y = self.lap_solve(rhs2)
        hr, _ = self.hess(np.zeros(self.fa.n_rho), self.d * (g_f - self.a_flux_t @ y))
        rhs = self.project(-g_r + self.a_rho_t @ y + hr)
        p_r, its = pcg(self.reduced, -rhs, self.precondition, eta, max_cg)
        p_r = self.project(p_r)
        _, hf = self.hess(p_r, np.zeros(self.fa.n_flux))
        nu = self.lap_solve(self.a_rho @ p_r - self.a_flux @ (self.d * hf) - rhs2)
        p_f = self.d * (-g_f - hf - self.a_flux_t @ nu)
        return p_r, p_f, its


def _largest(g_r: np.ndarray, g_f: np.ndarray) -> float:
    """The largest entry of the gradient of J in densities and fluxes."""
    return float(max(np.abs(g_r).max(initial=0.0), np.abs(g_f).max(initial=0.0)))


def _quasi_definite_lu(matrix: Any) -> Any:
    """SuperLU of a symmetric quasi-definite matrix with the diagonal pivots of a symmetric
    minimum-degree ordering (no fill from pivoting); if a pivot vanishes (the density block is
    only semi-definite where the barrier is weak), again with threshold pivoting."""
    try:
        return splu(matrix, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                    options={"SymmetricMode": True})
    except RuntimeError:
        return splu(matrix, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.1,
                    options={"SymmetricMode": True})


def _value_grad(fa: FluxAction, rho: np.ndarray, flux: np.ndarray
                ) -> tuple[float, np.ndarray, np.ndarray]:
    import torch

    tr = torch.from_numpy(rho).requires_grad_(True)
    tf = torch.from_numpy(flux).requires_grad_(True)
    value = fa.value(tr, tf)
    gr, gf = torch.autograd.grad(value, (tr, tf))
    return float(value.detach()), gr.numpy(), gf.numpy()


def _value(fa: FluxAction, rho: np.ndarray, flux: np.ndarray) -> float:
    import torch

    with torch.no_grad():
        return float(fa.value(torch.from_numpy(rho), torch.from_numpy(flux)))


def minimise(fa: FluxAction, rho0: np.ndarray, *, tol: float, max_iter: int, max_cg: int,
             linear: str = "auto",
             callback: Callable[[int, float, float], None] | None = None,
             stop: Callable[[], bool] | None = None) -> FluxNewtonResult:
    """Primal–dual barrier Newton (module docstring) from interior densities ``rho0`` (flat,
    strictly inside the mobility's domain; fluxes start optimal for them).
    ``callback(iteration, J, largest gradient entry of J)`` is called once per Newton
    iteration, numbered across the barrier stages. Stops when, at the
    last barrier weight, the Newton decrement² -g·p is at most 2 ``tol`` × |J|; "not_converged"
    when ``max_iter`` Newton iterations run out (whatever the barrier stage) or the line search
    finds no decrease before that, or when ``stop()`` (checked after every Newton iteration;
    a time budget) returns True."""
    mob = fa.mob
    if linear == "auto":
        linear = "lu" if fa.grid.dim == 1 else "blocks"
    a_rho, a_flux, c = fa.constraint()
    constraint = (a_rho, a_flux, c, a_rho.T.tocsr(), a_flux.T.tocsr())
    rho = np.array(rho0, dtype=float)
    flux = fa.optimal_fluxes(rho)
    barrier = _Barrier(mob.lower, mob.upper, fa.vol)
    bounded = 2 if barrier.bounded else 1
    terms = fa.n_rho * bounded
    j0 = _value(fa, rho, flux)
    scale = max(abs(j0), 1e-300)
    # relative tests use |J|, or 1e-6 |J_start| when J tends to zero (a relaxation to the
    # steady state costs nothing)
    floor = 1e-6 * scale
    mu = max(MU0 * scale / (terms * fa.vol), tol * scale / (terms * fa.vol))
    zl, zu = barrier.primal(rho, mu)
    history: list[dict[str, float]] = []
    start = time.perf_counter()
    it = cg_total = reported = 0
    assemblers = None
    status, message = "not_converged", ""
    decrement = math.inf
    while True:
        mu_end = tol * max(abs(_value(fa, rho, flux)), floor) / (terms * fa.vol)
        mu = max(mu, mu_end)
        last = mu <= mu_end
        # solve this stage to a decrease below a tenth of its own bias (tol at the last)
        stage_tol = tol if last else max(tol, 0.1 * mu * terms * fa.vol / scale)
        stage_done = False
        while it < max_iter:
            value, g_r, g_f = _value_grad(fa, rho, flux)
            if callback is not None and it > reported:
                callback(it, value, _largest(g_r, g_f))
                reported = it
            merit = value + barrier.value(rho, mu)
            g_r = g_r + barrier.grad(rho, mu)
            sigma = barrier.curvature(rho, zl, zu)
            step_data = _Step(fa, rho, flux, sigma, linear, constraint, assemblers)
            assemblers = step_data.assemblers
            resid = a_rho @ rho + a_flux @ flux - c
            eta = ETA if math.isinf(decrement) else min(ETA, math.sqrt(decrement / scale))
            p_r, p_f, n_cg = step_data.direction(g_r, g_f, resid, eta, max_cg)
            cg_total += n_cg
            slope = float(g_r @ p_r + g_f @ p_f)
            if not slope < 0:
                if abs(slope) <= 2 * stage_tol * max(abs(value), floor):
                    stage_done = True  # at round-off: the stage is solved
                else:
                    message = f"no descent direction at iteration {it} (slope {slope:.2e})"
                break
            full = min(1.0, 0.995 * barrier.max_step(rho, p_r))
            step = full
            while step > 1e-12:
                trial = rho + step * p_r
                if barrier.inside(trial):
                    f_new = _value(fa, trial, flux + step * p_f) + barrier.value(trial, mu)
                    if f_new <= merit + 1e-4 * step * slope:
                        break
                step *= 0.5
            else:
                decrement = -slope
                if last and decrement <= 2 * 100 * tol * max(abs(value), floor):
                    status, message = "converged", (
                        f"Newton decrement² {decrement:.2e} (line search at round-off)")
                    stage_done = True
                else:
                    message = f"line search found no decrease at iteration {it + 1}"
                break
            zl, zu = barrier.dual_step(rho, p_r, zl, zu, mu, step)
            rho, flux = rho + step * p_r, flux + step * p_f
            it += 1
            decrement = -slope
            history.append({"cost": _value(fa, rho, flux), "residual": decrement,
                            "criterion": decrement / (2 * max(abs(value), floor)),
                            "marginal_error": float(np.abs(resid).max()),
                            "seconds": time.perf_counter() - start, "cg": float(n_cg),
                            "step": step, "barrier": mu})
            # a solved stage: small decrement; at the last stage also the duals on the
            # central path (the far tails, where J hardly depends on ρ, settle last)
            if (decrement <= 2 * stage_tol * max(abs(value), floor)
                    and (not last or barrier.centred(rho, zl, zu, mu))):
                stage_done = True
                break
            if stop is not None and stop():
                message = f"stopped by the time budget at iteration {it} (barrier weight {mu:.2e})"
                break
        if not stage_done:
            if not message:
                message = f"not converged after {max_iter} Newton iterations"
            status = "not_converged"
            break
        if last:
            status = "converged"
            message = message or f"Newton decrement² {decrement:.2e} ≤ 2 tol × J"
            break
        mu *= MU_FACTOR
    value, g_r, g_f = _value_grad(fa, rho, flux)
    gnorm = _largest(g_r, g_f)
    if callback is not None and it > reported:
        callback(it, value, gnorm)
    message += f" ({it} Newton iterations, {cg_total} CG iterations)"
    return FluxNewtonResult(rho, flux, value, gnorm, it, cg_total, status, message, history)


def steady_profile(fa: FluxAction, guess: np.ndarray, tol: float = 1e-12, max_iter: int = 50
                 ) -> tuple[np.ndarray, np.ndarray, int]:
    r"""The steady profile between the reservoirs: :math:`\mathrm{div}_h B(\rho) = 0` in every
    cell (B the fluxes of the unconditioned dynamics of the module docstring of
    :mod:`~mfbridge.solvers.flux_action`, densities at the walls held by the reservoirs), by
    damped Newton from ``guess`` (cells,) with the Jacobian from torch (dense: cells² entries).
    Returns the densities, the fluxes B on every face (faces,) and the iterations; raises
    ``ArithmeticError`` if Newton does not converge."""
    import torch

    div = torch.from_numpy(fa.layout.div.toarray())
    mob = fa.mob

    def residual(rho: Any) -> Any:
        mid = rho[None]
        phi, wall = fa.mean_field(mid)
        _, b, _ = fa.face_fields(torch.zeros(1), *fa.sides(mid, phi, wall))
        return div @ (b[0] * fa._area), b[0] * fa._area

    rho = np.array(guess, dtype=float)
    scale = None
    for it in range(1, max_iter + 1):
        r, flux = residual(torch.from_numpy(rho))
        r = r.detach().numpy()
        scale = scale or max(float(np.abs(flux.detach().numpy()).max()), 1e-300)
        if np.abs(r).max() <= tol * scale:
            return rho, flux.detach().numpy(), it - 1
        jac = torch.autograd.functional.jacobian(lambda x: residual(x)[0],
                                                 torch.from_numpy(rho)).numpy()
        p = np.linalg.solve(jac, -r)
        step, norm = 1.0, np.abs(r).max()
        while step > 1e-8:
            trial = rho + step * p
            inside = np.all(trial > mob.lower) and np.all(trial < mob.upper)
            if inside and np.abs(residual(torch.from_numpy(trial))[0].detach().numpy()).max() < (
                    1 - 1e-4 * step) * norm:
                break
            step *= 0.5
        rho = rho + step * p
    raise ArithmeticError(f"the steady profile did not converge in {max_iter} Newton "
                          f"iterations (residual {np.abs(r).max():.2e})")
