r"""Fluctuations of the time-averaged current through an open 1D chain (additivity principle).

For a chain [a, b] between reservoirs, the probability that the current averaged over a long
time t is j decays as :math:`e^{-t\,\Phi(j)}`. Bodineau & Derrida (PRL 92, 180601, 2004)
conjectured that the optimal path is a time-independent profile; then Φ is the direct solver's
action per unit time of that profile carrying the constant current j:

.. math::

    \Phi(j) = \min_{\rho}\ \frac{1}{2\sigma^2}\int \frac{(j - b(\rho))^2}{\chi(\rho)}\,dx,
    \qquad b = -\tfrac{\sigma^2}{2}D(\rho)\,\partial_x\rho - \chi(\rho)\,\partial_x\Phi_\rho,

ρ equal to the reservoir densities at the two ends (σ = √2: the action ¼∫(j + ∂ₓρ)²/χ of
macroscopic fluctuation theory for D = 1, no field). Discretised exactly as
:class:`~mfbridge.solvers.flux_action.FluxAction` discretises one time step of a
time-independent path (faces, half-cell walls, face mobility χ at the face midpoint), so j is a
mass per unit time through each face (1D: the face area is 1). Φ(j̄) = 0 at the steady current
j̄ and, near it, Φ(j) ≈ (j − j̄)²/(2 Var) with Var the variance of the current per unit time:
:math:`\mathrm{Var} = 1/\Phi''(\bar j)`, here from the Schur complement of the Hessian of the
action in (ρ, j) at the steady state (exact for the discretised action, no finite differences).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.problem import BridgeProblem
from mfbridge.solvers.direct import DirectOptions
from mfbridge.solvers.direct_action import DirectAction
from mfbridge.solvers.flux_action import FaceLayout, FluxAction
from mfbridge.solvers.flux_newton import steady_profile

__all__ = ["CurrentFluctuations", "current_fluctuations"]

#: dense Hessians (cells + 1)² are used; above this the chain is refused
MAX_CELLS = 2000
NEWTON_TOL = 1e-13
NEWTON_MAX = 100


@dataclass
class CurrentFluctuations:
    """Φ at the requested ``currents`` (mass per time through the chain, in the direction of
    the grid axis): ``rates`` (1/time), the optimal ``profiles`` (len(currents), cells;
    occupation), the steady ``mean_current`` j̄ and profile ``steady_density``, the
    ``variance`` 1/Φ''(j̄) of the current per unit time and the Newton ``iterations`` per
    current."""

    currents: np.ndarray
    rates: np.ndarray
    profiles: np.ndarray
    mean_current: float
    steady_density: np.ndarray
    variance: float
    iterations: list[int]


def _chain(problem: BridgeProblem, options: DirectOptions) -> FluxAction:
    res = options.reservoirs
    if problem.grid.dim != 1:
        raise InputError(f"current fluctuations need a 1D chain, got a {problem.grid.dim}D grid")
    if res is None or set(res.walls) != {(0, "lower"), (0, "upper")}:
        raise InputError("current fluctuations need reservoirs at both ends of the chain: "
                         "DirectOptions(reservoirs=Reservoirs(lower=[rho_a], upper=[rho_b]))")
    if problem.grid.size > MAX_CELLS:
        raise InputError(f"current fluctuations use dense Hessians: at most {MAX_CELLS} cells, "
                         f"got {problem.grid.size}; use a coarser grid")
    mob = options.mobility
    res.check(1, mob.lower, mob.upper, mob.name)
    act = DirectAction(problem, mob, options.total_mass)
    zero = np.zeros(problem.grid.size)
    return FluxAction(act, FaceLayout.build(problem.grid, res), zero, zero)


def _rate(fa: FluxAction) -> Any:
    """The action per unit time A(ρ, j) of a time-independent profile ρ (cells,) carrying the
    current j (0-d) through every face, as a function of torch tensors."""
    import torch

    def action(rho: Any, j: Any) -> Any:
        mid = rho[None]
        _, b, chi = fa.face_fields(torch.zeros(1), *fa.sides(mid, *fa.mean_field(mid)))
        return (fa._weight * (j - b[0]) ** 2 / chi[0]).sum() / (2.0 * fa.noise**2)

    return action


def _minimise(action: Any, j: float, rho: np.ndarray, lower: float, upper: float
              ) -> tuple[np.ndarray, float, int]:
    """min over ρ of A(ρ, j) by damped Newton (dense Hessian from torch; a Levenberg shift
    when the Hessian is not positive definite; steps kept inside (lower, upper))."""
    import torch

    def f(x: np.ndarray) -> float:
        with torch.no_grad():
            return float(action(torch.from_numpy(x), torch.tensor(j)))

    value = f(rho)
    for it in range(NEWTON_MAX):
        x = torch.from_numpy(rho)
        g = torch.autograd.functional.jacobian(lambda r: action(r, torch.tensor(j)), x).numpy()
        h = torch.autograd.functional.hessian(lambda r: action(r, torch.tensor(j)), x).numpy()
        shift = 0.0
        while True:
            try:
                c = np.linalg.cholesky(h + shift * np.eye(len(h)))
                break
            except np.linalg.LinAlgError:
                shift = max(2 * shift, 1e-8 * max(float(np.abs(np.diag(h)).max()), 1e-300))
        p = -np.linalg.solve(c.T, np.linalg.solve(c, g))
        decrement = float(-g @ p)
        if decrement <= 2 * NEWTON_TOL * max(abs(value), 1e-300) and shift == 0.0:
            return rho, value, it
        step = 1.0
        neg, pos = p < 0, p > 0
        if neg.any():
            step = min(step, 0.99 * float(((lower - rho[neg]) / p[neg]).min()))
        if pos.any() and math.isfinite(upper):
            step = min(step, 0.99 * float(((upper - rho[pos]) / p[pos]).min()))
        while step > 1e-12:
            trial = rho + step * p
            new = f(trial)
            if new <= value - 1e-4 * step * decrement:
                break
            step *= 0.5
        else:
            return rho, value, it  # no decrease at round-off
        rho, value = trial, new
    raise ArithmeticError(f"the optimal profile for j = {j:g} did not converge in "
                          f"{NEWTON_MAX} Newton iterations")


def current_fluctuations(problem: BridgeProblem, options: DirectOptions,
                         currents: Any) -> CurrentFluctuations:
    """Φ(j) (module docstring) of the chain ``problem.grid`` (1D) between
    ``options.reservoirs`` (both ends open) for the mobility ``options.mobility`` and the
    problem's noise, confinement and interaction, at each of ``currents``; and the variance of
    the current. The endpoints, horizon and steps of ``problem`` are not used. Raises
    :class:`InputError` for a grid or reservoirs that are not an open chain."""
    import torch

    fa = _chain(problem, options)
    mob = options.mobility
    res = options.reservoirs
    lo, hi = res.walls[(0, "lower")], res.walls[(0, "upper")]
    guess = np.linspace(lo, hi, problem.grid.size + 2)[1:-1]
    steady, fluxes, _ = steady_profile(fa, guess)
    j_bar = float(np.mean(fluxes))
    action = _rate(fa)
    x = torch.from_numpy(np.append(steady, j_bar))
    hess = torch.autograd.functional.hessian(lambda v: action(v[:-1], v[-1]), x).numpy()
    h_rr, h_rj, h_jj = hess[:-1, :-1], hess[:-1, -1], hess[-1, -1]
    variance = 1.0 / float(h_jj - h_rj @ np.linalg.solve(h_rr, h_rj))
    currents = np.atleast_1d(np.asarray(currents, dtype=float))
    rates = np.empty(len(currents))
    profiles = np.empty((len(currents), len(steady)))
    iterations = [0] * len(currents)
    # continuation outwards from the steady current: each start is the nearest solved profile
    order = np.argsort(np.abs(currents - j_bar))
    solved: list[tuple[float, np.ndarray]] = [(j_bar, steady)]
    for i in order:
        j = float(currents[i])
        start = min(solved, key=lambda s: abs(s[0] - j))[1]
        rho, value, its = _minimise(action, j, start.copy(), mob.lower, mob.upper)
        rates[i], profiles[i], iterations[i] = value, rho, its
        solved.append((j, rho))
    return CurrentFluctuations(currents, rates, profiles, j_bar, steady, variance, iterations)
