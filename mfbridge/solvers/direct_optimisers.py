r"""Minimisers of the direct solver's action
(:class:`~mfbridge.solvers.direct_action.DirectAction`).

**Minimisation**, gradients and Hessian–vector products by ``torch.autograd`` (float64):

* ``method="newton"`` (1D): the interior densities themselves (each slice's mean removed, so the
  mass is exactly M) are the variables; a truncated Newton method (:mod:`mfbridge.numerics.newton`)
  with a sparse Gauss–Newton preconditioner built in cumulative-mass variables
  (:func:`preconditioner_1d`) minimises J - μ|c|Σ log(ρ - lower) (+ log(upper - ρ)) for a
  decreasing sequence of barrier weights μ (:func:`interior_newton`), steps kept inside the
  mobility's domain by the fraction-to-the-boundary rule;
* ``method="lbfgs"`` (and always in 2D): the interior densities as
  :math:`\rho_k = M\,\mathrm{softmax}(z_k)/|c|` (positive, mass exactly M);
  L-BFGS with a backtracking line search that rejects any step leaving the
  mobility's domain (e.g. ρ ≥ 1 for exclusion). (Truncated Newton in 2D was tried with the
  kinetic part's inverse Hessian, :math:`G T^{-1} G^\top`, T the time-difference matrix and
  :math:`G_k = \mathrm{div}_h\,\mathrm{diag}(\sqrt{\chi_f|c|}/h)`, as preconditioner: 3–5 s per
  Newton step at 16×16 × 8, no faster than L-BFGS, since the barrier dominates the tails'
  curvature and the preconditioner ignores it.)
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.mobility import Mobility
from mfbridge.numerics.newton import NewtonResult, Operator, SecondOrder, minimise
from mfbridge.solvers.direct_action import CHI_FLOOR, DirectAction

MU0, MU_FACTOR = 1e-2, 0.1


class StopRule(Protocol):
    """The iteration limits and tolerances the minimisers read
    (:class:`~mfbridge.solvers.direct.DirectOptions` documents them)."""

    @property
    def max_iter(self) -> int: ...
    @property
    def max_cg(self) -> int: ...
    @property
    def memory(self) -> int: ...
    @property
    def window(self) -> int: ...
    @property
    def tol(self) -> float: ...
    @property
    def gtol(self) -> float: ...


Unpack = Callable[[Any], Any]


def softmax_variables(act: DirectAction, guess: np.ndarray) -> tuple[Unpack, np.ndarray]:
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


def density_variables(act: DirectAction, guess: np.ndarray) -> tuple[Unpack, np.ndarray]:
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


def max_step(act: DirectAction, mob: Mobility) -> Callable[[np.ndarray, np.ndarray], float]:
    """Largest α keeping the interior densities of ``x + αp`` inside the mobility's domain
    (density variables, :func:`density_variables`)."""
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


def inside(mob: Mobility, rho: np.ndarray) -> bool:
    return bool(np.all(rho > mob.lower) and np.all(rho < mob.upper))


@dataclass
class Minimised:
    x: np.ndarray
    value: float
    grad_norm: float
    iterations: int
    status: str
    message: str
    history: list[dict[str, float]]


def lbfgs(fun: Callable[[np.ndarray], tuple[float, np.ndarray | None]], x0: np.ndarray,
           options: StopRule, callback: Callable[[int, float, float], None] | None,
           preconditioner: Callable[[np.ndarray], Callable[[np.ndarray], np.ndarray]] | None
           = None, stop: Callable[[], bool] | None = None) -> Minimised:
    """L-BFGS (two-loop recursion; Nocedal & Wright, Numerical Optimization, 2006, Alg. 7.4)
    with Armijo backtracking; ``fun`` returns (inf, None) outside the feasible set.

    ``preconditioner(x)``, when given, returns the map q ↦ H₀⁻¹q of an SPD approximation H₀ of
    the Hessian at x, used instead of the scalar initial matrix. ``stop()``, checked after every
    iteration, ends the run with status ``"not_converged"`` when it returns True (time budget)."""
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
        return Minimised(x, f, 0.0, 0, "converged", "no free variables (one time step)", [])
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
        # the stopping rule's quantity: the decrease of J over the last `window` iterations,
        # relative to |J| (stop at ≤ tol); not defined before `window` iterations
        drop = (values[-options.window - 1] - f) / max(abs(f), 1e-300) \
            if len(values) > options.window else float("nan")
        history.append({"residual": gnorm, "marginal_error": 0.0, "cost": f,
                        "seconds": time.perf_counter() - start, "criterion": drop})
        if callback is not None:
            callback(it, f, gnorm)
        if gnorm <= options.gtol:
            status, message = "converged", f"gradient {gnorm:.2e} ≤ gtol after {it} iterations"
            break
        if stop is not None and stop():
            message = f"stopped by the time budget after {it} iterations: gradient {gnorm:.2e}"
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
    return Minimised(x, f, gnorm, it, status, message, history)


def interior_newton(objective: Objective, x0: np.ndarray, options: StopRule,
                    callback: Callable[[int, float, float], None] | None,
                    stop: Callable[[], bool] | None = None) -> NewtonResult:
    r"""Truncated Newton on J - μ|c|Σ log(ρ - lower) (+ log(upper - ρ)) over the interior
    densities, for μ = μ₀, μ₀/10, ... down to a μ whose bias on J (μ|c| per barrier term, the
    duality gap of a log barrier: Nocedal & Wright, 2006, §19.2) is below tol × J; each stage is
    warm-started from the last, the last one solved to ``options.tol``. Without the barrier,
    Newton steps in ρ keep pushing the far tails (optimal values ~1e-20) below zero and the
    fraction-to-the-boundary rule stalls.

    Only the last stage can end ``"converged"``: when ``max_iter`` runs out (or ``stop()`` says
    so) in an earlier one, the status is ``"not_converged"`` and the message gives the barrier
    weight reached, even if that stage met its own loose tolerance."""
    j0 = objective.value(x0)
    act = objective.act
    terms = (act.problem.steps - 1) * act.grid.size * (2 if math.isfinite(objective.mob.upper)
                                                         else 1)
    mu_end = options.tol * max(abs(j0), 1e-300) / (terms * act.vol)
    mu = max(MU0 * abs(j0) / (terms * act.vol), mu_end)
    precond = preconditioner_1d(objective)
    x, iterations, cg, history, start = x0, 0, 0, [], time.perf_counter()
    while True:
        objective.barrier = mu
        last = mu <= mu_end
        offset = time.perf_counter() - start
        opt = minimise(objective.second_order, objective.value, x, precond,
                       max_iter=max(options.max_iter - iterations, 1), max_cg=options.max_cg,
                       tol=options.tol if last else 1e-6, gtol=options.gtol if last else 0.0,
                       max_step=max_step(act, objective.mob), callback=callback, stop=stop)
        history += [{**h, "seconds": h["seconds"] + offset, "barrier": mu} for h in opt.history]
        x, iterations, cg = opt.x, iterations + opt.iterations, cg + opt.cg_iterations
        stopped = stop is not None and opt.status == "not_converged" and stop()
        if last or iterations >= options.max_iter or stopped:
            break
        mu = max(mu * MU_FACTOR, mu_end)
    objective.barrier = 0.0
    value, grad = objective.value_grad(x)
    gnorm = float(np.abs(grad).max()) if grad is not None else math.nan
    status, message = opt.status, opt.message.split(" (")[0]
    if not last:
        # an intermediate stage's "converged" is not the answer: its barrier still biases J
        status = "not_converged"
        why = "the time budget ran out" if stopped else f"max_iter = {options.max_iter} ran out"
        message = (f"not converged: {why} at barrier weight μ = {mu:.2e}, before the last "
                   f"stage (μ = {mu_end:.2e}); the barrier still shifts J by up to "
                   f"{mu * act.vol * terms:.2e}")
    message += f" ({iterations} Newton iterations, {cg} CG iterations)"
    return NewtonResult(x, value, gnorm, iterations, cg, status, message, history)


class Objective:
    """J as a function of the free variables, with the domain guard; value, gradient and
    Hessian–vector products (double backward) by torch autograd."""

    def __init__(self, act: DirectAction, unpack: Unpack, mob: Mobility) -> None:
        self.act, self.unpack, self.mob = act, unpack, mob
        self.barrier = 0.0

    def _evaluate(self, x: Any) -> Any:
        import torch

        rho = self.unpack(x)
        if not inside(self.mob, rho[1:-1].detach().numpy()):
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


def preconditioner_1d(objective: Objective) -> Callable[[np.ndarray], Operator]:
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
