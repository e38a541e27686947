r"""Jacobian-free Newton–Krylov with a line search on the residual norm.

Solves :math:`F(x) = 0` for a residual map F known only through evaluations (here
:math:`F(x) = G(x) - x` of a fixed-point map G). Each step solves the Newton equation
:math:`F'(x)\,d = -F(x)` inexactly by GMRES (Saad & Schultz, SIAM J. Sci. Stat. Comput. 1986;
scipy's ``gmres``), with Jacobian–vector products by a forward difference

.. math::

    F'(x)\,v \approx \frac{F(x + \epsilon v) - F(x)}{\epsilon},\qquad
    \epsilon = \delta\,\frac{\max(\|x\|, 1)}{\|v\|},

(Knoll & Keyes, "Jacobian-free Newton–Krylov methods: a survey of approaches and applications",
J. Comput. Phys. 193, 2004, eq. 10), to the relative accuracy :math:`\eta_k` of Eisenstat &
Walker's second choice, :math:`\eta_k = \gamma(\|F_k\|/\|F_{k-1}\|)^2` with γ = 0.9, the
safeguard :math:`\eta_k \ge \gamma\eta_{k-1}^2` when that exceeds 0.1, at most
:data:`ETA_MAX`, and at least :math:`\tfrac12\,\tau/\|F_k\|` for a target norm τ (no
oversolving: Kelley, Iterative Methods for Linear and Nonlinear Equations, SIAM 1995, §6.3).

Globalisation: a step is accepted only if it decreases the merit :math:`\|F\|_2`,
:math:`\|F(x + \lambda d)\| \le (1 - 10^{-4}\lambda)\|F(x)\|`, halving λ from 1 (Eisenstat &
Walker, "Globally convergent inexact Newton methods", SIAM J. Optim. 4, 1994). When no λ down to
:data:`MIN_STEP` passes, the method has reached a point where the merit cannot be decreased
along the Newton direction (a local minimum of ‖F‖ that is not a root, or a direction spoiled
by inexact evaluations) and stops as ``"stalled"``.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Generic, Protocol, TypeVar

import numpy as np
from scipy.sparse.linalg import LinearOperator, gmres

ETA_MAX = 0.5
GAMMA = 0.9
MIN_STEP = 1.0 / 64
ARMIJO = 1e-4


class Evaluated(Protocol):
    """An evaluation of the residual map: ``f`` = F(x), a flat float array."""

    @property
    def f(self) -> np.ndarray: ...


E = TypeVar("E", bound=Evaluated)


@dataclass
class KrylovResult(Generic[E]):
    """Where Newton–Krylov stopped: the last accepted point and evaluation, ``status``
    (``"converged"`` when ``accept`` said so, ``"stalled"``, or ``"max_steps"``), Newton steps
    taken and residual evaluations spent on Jacobian products and on line-search trials."""

    x: np.ndarray
    point: E
    status: str
    steps: int
    products: int
    trials: int


def newton_krylov(evaluate: Callable[[np.ndarray], E], probe: Callable[[np.ndarray], np.ndarray],
                  x: np.ndarray, point: E, accept: Callable[[np.ndarray, E, int, int], bool], *,
                  max_steps: int, target: float, fd_step: float = 1e-7, restart: int = 40,
                  max_products: int = 200) -> KrylovResult[E]:
    """Newton–Krylov from ``x`` whose evaluation ``point`` is given.

    * ``evaluate(x)``: F at a trial point (an :class:`Evaluated`; a non-finite norm rejects it);
    * ``probe(x)``: F near the current point, for difference quotients only (may warm-start
      from the current point's internal state; must be as accurate as ``evaluate``);
    * ``accept(x, point, products, trials)``: called after every accepted step with the
      evaluations spent on it; returns True to stop (the caller's convergence test);
    * ``target``: the norm ‖F‖ at which the caller will be satisfied (bounds the forcing term);
    * ``max_products``: GMRES products per Newton step.
    """
    norm = float(np.linalg.norm(point.f))
    eta_prev, norm_prev = ETA_MAX, math.nan
    products = trials = 0
    for step in range(1, max_steps + 1):
        if math.isnan(norm_prev):
            eta = ETA_MAX
        else:
            eta = GAMMA * (norm / norm_prev) ** 2
            if GAMMA * eta_prev**2 > 0.1:
                eta = max(eta, GAMMA * eta_prev**2)
        eta = min(ETA_MAX, max(eta, 0.5 * target / max(norm, 1e-300)))
        base, f0, scale = x, point.f, max(float(np.linalg.norm(x)), 1.0)
        count = [0]

        def jv(v: np.ndarray, base: np.ndarray = base, f0: np.ndarray = f0,
               scale: float = scale, count: list[int] = count) -> np.ndarray:
            nv = float(np.linalg.norm(v))
            if nv == 0.0:
                return np.zeros_like(v)
            eps = fd_step * scale / nv
            count[0] += 1
            return (probe(base + eps * v) - f0) / eps

        op = LinearOperator((x.size, x.size), matvec=jv, dtype=float)
        d, _ = gmres(op, -f0, rtol=eta, atol=0.0, restart=restart,
                     maxiter=max(1, math.ceil(max_products / restart)))
        products += count[0]
        step_products, step_trials, lam = count[0], 0, 1.0
        while lam >= MIN_STEP:
            trial = evaluate(x + lam * d)
            step_trials += 1
            trial_norm = float(np.linalg.norm(trial.f))
            if math.isfinite(trial_norm) and trial_norm <= (1 - ARMIJO * lam) * norm:
                break
            lam *= 0.5
        trials += step_trials
        if lam < MIN_STEP:
            return KrylovResult(x, point, "stalled", step - 1, products, trials)
        x, point = x + lam * d, trial
        eta_prev, norm_prev, norm = eta, norm, trial_norm
        if accept(x, point, step_products, step_trials):
            return KrylovResult(x, point, "converged", step, products, trials)
    return KrylovResult(x, point, "max_steps", max_steps, products, trials)
