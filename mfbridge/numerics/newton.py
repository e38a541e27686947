r"""Truncated (inexact) Newton method with preconditioned conjugate gradients.

Minimises a smooth f over an open feasible set. Each iteration solves the Newton system
:math:`H p = -g` only roughly, by preconditioned CG on Hessian–vector products (Dembo &
Steihaug, "Truncated-Newton algorithms for large-scale unconstrained optimization", Math.
Program. 1983; Nocedal & Wright, Numerical Optimization, 2006, Alg. 7.1), stops CG at negative
curvature, and backtracks (Armijo) from the unit step, rejecting any trial point outside the
feasible set. The forcing term :math:`\eta = \min(1/2, \sqrt{\|g\|/\|g_0\|})` (norms in the
preconditioner's metric) makes the convergence superlinear.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

Vector = np.ndarray
Operator = Callable[[Vector], Vector]


@dataclass
class SecondOrder:
    """f, its gradient and a Hessian–vector product at one point."""

    value: float
    grad: Vector
    hessp: Operator


@dataclass
class NewtonResult:
    x: Vector
    value: float
    grad_norm: float
    iterations: int
    cg_iterations: int
    status: str
    message: str
    history: list[dict[str, float]]


def pcg(hessp: Operator, grad: Vector, precond: Operator, eta: float,
        max_iter: int) -> tuple[Vector, int]:
    """Approximate solution of H p = -g by preconditioned CG, stopped when the residual's
    preconditioned norm falls below ``eta`` × that of g, at ``max_iter``, or at the first
    direction of non-positive curvature (then the last iterate, or -M⁻¹g if there is none)."""
    p = np.zeros_like(grad)
    r = -grad
    z = precond(r)
    rz = float(r @ z)
    target = eta * math.sqrt(max(rz, 0.0))
    d = z.copy()
    for i in range(1, max_iter + 1):
        hd = hessp(d)
        curv = float(d @ hd)
        if curv <= 0.0 or not math.isfinite(curv):
            return (z if i == 1 else p), i
        alpha = rz / curv
        p += alpha * d
        r -= alpha * hd
        z = precond(r)
        rz_new = float(r @ z)
        if math.sqrt(max(rz_new, 0.0)) <= target:
            return p, i
        d = z + (rz_new / rz) * d
        rz = rz_new
    return p, max_iter


def minimise(second_order: Callable[[Vector], SecondOrder | None],
             value: Callable[[Vector], float], x0: Vector,
             preconditioner: Callable[[Vector], Operator], *, max_iter: int, max_cg: int,
             tol: float, gtol: float,
             max_step: Callable[[Vector, Vector], float] | None = None,
             callback: Callable[[int, float, float], None] | None = None,
             stop: Callable[[], bool] | None = None) -> NewtonResult:
    """Truncated Newton from ``x0``.

    ``second_order(x)`` returns f, ∇f and a Hessian–vector product (None outside the feasible
    set); ``value(x)`` returns f or inf outside; ``preconditioner(x)`` returns q ↦ M⁻¹q for an
    SPD approximation M of the Hessian at x; ``max_step(x, p)``, when given, bounds the step
    along p (the distance to the boundary of a feasible set that is linear in x): the line
    search starts at min(1, 0.995 × that bound) (fraction to the boundary, as in interior-point
    methods: Nocedal & Wright, 2006, eq. 19.9). Stops when the predicted decrease of the Newton
    step, -g·p/2, is at most ``tol`` × |f|, or the largest gradient entry is at most ``gtol``.
    """
    x = np.array(x0, dtype=float)
    point = second_order(x)
    if point is None or not math.isfinite(point.value):
        raise ValueError("the starting point is not feasible")
    history: list[dict[str, float]] = []
    start = time.perf_counter()
    status, message = "not_converged", f"not converged after {max_iter} Newton iterations"
    cg_total = 0
    gnorm = float(np.abs(point.grad).max()) if point.grad.size else 0.0
    if point.grad.size == 0 or gnorm <= gtol:
        return NewtonResult(x, point.value, gnorm, 0, 0, "converged",
                            "the starting point is stationary", history)
    g0 = None
    it = 0
    for it in range(1, max_iter + 1):
        f, g = point.value, point.grad
        apply = preconditioner(x)
        gm = math.sqrt(max(float(g @ apply(g)), 0.0))
        g0 = g0 or gm
        eta = min(0.5, math.sqrt(gm / g0)) if g0 > 0 else 0.5
        p, n_cg = pcg(point.hessp, g, apply, eta, max_cg)
        cg_total += n_cg
        slope = float(g @ p)
        if not slope < 0:
            p = -apply(g)
            slope = float(g @ p)
        full = 1.0 if max_step is None else min(1.0, 0.995 * max_step(x, p))
        step = full
        for _ in range(60):
            f_new = value(x + step * p)
            if math.isfinite(f_new) and f_new <= f + 1e-4 * step * slope:
                break
            step *= 0.5
        else:
            step = 0.0
        x_new = x + step * p
        if not np.any(x_new != x):
            # no decrease found, or a step too short to change x (a fraction-to-the-boundary
            # step of 0 passes the Armijo test with f_new = f): iterating on cannot move
            converged = -slope <= 2 * tol * max(abs(f), 1e-300) or gnorm <= 100 * gtol
            status = "converged" if converged else "stalled"
            message = (f"line search found no step that moves the iterate and decreases f after "
                       f"{it} Newton iterations (longest feasible step {full:.2e}, largest "
                       f"gradient entry {gnorm:.2e})")
            break
        x = x_new
        new_point = second_order(x)
        assert new_point is not None
        point = new_point
        gnorm = float(np.abs(point.grad).max())
        # the stopping rule's quantity: the Newton step's predicted decrease -g·p/2 relative
        # to |J| (its Newton decrement² / 2|J|), stop at ≤ tol after a full step
        history.append({"residual": gnorm, "marginal_error": 0.0, "cost": point.value,
                        "seconds": time.perf_counter() - start, "cg": float(n_cg),
                        "step": step,
                        "criterion": -slope / (2 * max(abs(point.value), 1e-300))})
        if callback is not None:
            callback(it, point.value, gnorm)
        if gnorm <= gtol:
            status, message = "converged", f"gradient {gnorm:.2e} ≤ gtol"
            break
        if step == full and -slope <= 2 * tol * max(abs(point.value), 1e-300):
            status = "converged"
            message = f"Newton decrement² {-slope:.2e} ≤ 2 tol × J"
            break
        if stop is not None and stop():
            status = "not_converged"
            message = f"stopped by the time budget at f = {point.value:.8g}"
            break
    message += f" ({it} Newton iterations, {cg_total} CG iterations)"
    return NewtonResult(x, point.value, gnorm, it, cg_total, status, message, history)
