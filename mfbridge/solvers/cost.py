r"""The cost J of a flow and its three parts, evaluated the way the flow is computed.

.. math::

    J = \frac{1}{2\sigma^2}\int_0^T\!\!\int |v - b[\rho]|^2\rho\,dx\,dt
      = \underbrace{\frac{1}{2\sigma^2}\iint |v|^2\rho}_{\text{kinetic}}
      + \underbrace{\frac{1}{2\sigma^2}\iint |b|^2\rho}_{\text{drift}}
      + \underbrace{\frac{F(\nu) - F(\mu)}{\sigma^2}}_{\text{free-energy change}},

because :math:`b = -\nabla\,\delta F/\delta\rho` gives :math:`\frac{d}{dt}F(\rho_t) =
-\int b\cdot v\,\rho`. Each part comes from its own formula: J from the control flux (bridge flux
minus reference flux), the kinetic part from the bridge flux, the drift part from the reference
flux (each summed face by face by :func:`~mfbridge.numerics.observables.flux_action`), and the
free-energy change from the free energies of the end slices. On the grid the three add up to J
only up to the discretisation error (the chain rule above holds in the limit); the gap is
second order in h and Δt (``tests/test_accuracy.py``).

**Time rule.** The outer loop freezes the drift of step k at the step midpoint and applies the
exact exponential of the chain over the step, so the flow is computed most accurately at the
step midpoints: the integrand is evaluated there, from the bridge's potentials propagated over
half a step (:func:`~mfbridge.numerics.entropic.midpoint_log_potentials`), with the frozen
rates of the step for both fluxes, and summed with weight Δt. The trapezoid rule on the nodes,
used before, over-weighted boundary layers near t = T: on a double-well problem with a Morse
interaction its error was +10% at 32 steps (104/K² relative) against −0.05% (−1.7/K²) for the
midpoint rule; on the linear–quadratic case the two constants are +0.73/K² and −0.84/K²
(``experiments/results/accuracy_cases.md``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from mfbridge.model.grid import Grid
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics import entropic, observables
from mfbridge.numerics.propagator import StepOperator
from mfbridge.numerics.reference import EdgeRates, PairField, edge_rates, faces
from mfbridge.result import BridgeResult


@dataclass(frozen=True)
class CostParts:
    """J and its parts (dimensionless, per particle), each from its own formula."""

    cost: float
    kinetic: float
    drift: float
    free_energy: float

    @property
    def gap(self) -> float:
        """J minus the sum of its parts: zero in the continuum, O(h² + Δt²) on the grid."""
        return self.cost - (self.kinetic + self.drift + self.free_energy)


def _step_rates(rates: EdgeRates, k: int) -> EdgeRates:
    return EdgeRates(tuple(r[k] for r in rates.forward), tuple(r[k] for r in rates.backward))


def cost_parts(grid: Grid, noise: float, weights: float | np.ndarray, p: np.ndarray,
               bridge_flux: list[np.ndarray], reference_flux: list[np.ndarray],
               free_energy_change: float, cost: float | None = None) -> CostParts:
    r"""J and its parts from a flow given at some times: masses ``p`` (K', *shape), the
    bridge's and the reference's net face fluxes (mass per time, one array per axis, (K', faces
    along that axis)), the slices weighted by ``weights`` (time units: Δt for each step
    midpoint, or an array (K',), e.g. trapezoid weights on the nodes); ``free_energy_change``
    F(ρ_T) − F(ρ_0) (units of U). The one quadrature of the cost, for every reference of the
    outer loop and for :func:`flow_cost`: J from the control flux (bridge minus reference), the
    kinetic part from the bridge flux, the drift part from the reference flux, each
    :math:`\frac{1}{2\sigma^2}\sum_t w_t \sum_f j_f^2 h_a^2/\bar p_f` by
    :func:`~mfbridge.numerics.observables.flux_action`; the free-energy part is
    (F(ρ_T) − F(ρ_0))/σ². ``cost``: J from another formula (the Gaussian steps' path KL,
    :mod:`mfbridge.solvers.small_noise`), which then replaces the control flux's action."""
    weights = np.broadcast_to(np.asarray(weights, dtype=float), (p.shape[0],))
    if cost is None:
        control = tuple(b - r for b, r in zip(bridge_flux, reference_flux, strict=True))
        cost = observables.flux_action(control, p, grid, weights, noise)
    return CostParts(
        cost=float(cost),
        kinetic=observables.flux_action(tuple(bridge_flux), p, grid, weights, noise),
        drift=observables.flux_action(tuple(reference_flux), p, grid, weights, noise),
        free_energy=float(free_energy_change) / noise**2,
    )


@dataclass(frozen=True)
class MidpointFlow:
    """A bridge at the step midpoints: masses ``p`` (K, *shape), the bridge's and the
    reference's net face fluxes (one array per axis, mass per time) and the step's frozen
    Scharfetter–Gummel ``rates`` (Φ at the step midpoint)."""

    p: np.ndarray
    bridge_flux: list[np.ndarray]
    reference_flux: list[np.ndarray]
    rates: EdgeRates


def midpoint_flow(grid: Grid, noise: float, dt: float, phi: np.ndarray,
                  ref: entropic.FrozenReference, sol: entropic.EntropicSolution) -> MidpointFlow:
    """The bridge of the outer loop at the step midpoints (module docstring).

    ``phi``: Φ = U + W ⋆ p at the nodes (K+1, *shape); ``ref``, ``sol``: the frozen reference
    and the entropic solution of the last outer iteration. The step rates are those of Φ at the
    step midpoints, as in the sweeps (Φ is affine in the masses, so the mean of the nodal Φ is
    Φ of the mean masses).
    """
    return _midpoint_flow(grid, noise, dt, phi, sol.log_forward + ref.log_weights,
                          sol.log_backward + ref.log_weights, ref.log_domain)


def result_midpoint_flow(problem: BridgeProblem, result: BridgeResult) -> MidpointFlow:
    """:func:`midpoint_flow` of a result of the outer loop with the jump chain, rebuilt from
    what it stores: the node potentials ``log_forward`` = log F_k + log E_k − log H_k and
    ``log_backward`` = log G_k + log H_k, with log E_k = −ω_k V_k (trapezoid weights ω) and
    log H_k = −(Δt/2) V_k (0 at k = K) the share of V_k given to the backward potential, V =
    ``correction``; Φ from the flow's masses (used by :mod:`mfbridge.solvers.sensitivity`)."""
    grid = problem.grid
    dt = problem.dt
    expand = (-1, *([1] * grid.dim))
    omega = observables.trapezoid_weights(problem.times).reshape(expand)
    half = np.full(problem.steps + 1, 0.5 * dt)
    half[-1] = 0.0
    v = np.asarray(result.correction, dtype=float)
    log_half = -half.reshape(expand) * v
    p = result.masses
    phi = (np.asarray(problem.confinement.value(grid.points), dtype=float)
           + PairField(grid, problem.interaction)(p))
    return _midpoint_flow(grid, problem.noise, dt, phi, result.log_forward + log_half,
                          result.log_backward - log_half - omega * v, True)


def _midpoint_flow(grid: Grid, noise: float, dt: float, phi: np.ndarray,
                   log_f_nodes: np.ndarray, log_g_nodes: np.ndarray,
                   log_domain: bool) -> MidpointFlow:
    """:func:`midpoint_flow` from log(E_k F_k) and log(E_k G_k) at the nodes (K+1, *shape)."""
    rates = edge_rates(0.5 * (phi[:-1] + phi[1:]), grid, noise)
    halves = [StepOperator(_step_rates(rates, k), 0.5 * dt, grid.shape)
              for k in range(len(phi) - 1)]
    log_f, log_g = entropic.midpoint_log_potentials(log_f_nodes, log_g_nodes, halves,
                                                    log_domain)
    axes = tuple(range(1, grid.dim + 1))
    with np.errstate(under="ignore"):
        p = np.exp(log_f + log_g)
    total = p.sum(axis=axes, keepdims=True)
    p /= total
    log_f = log_f - np.log(total)
    bridge_flux, reference_flux = [], []
    for a in range(grid.dim):
        lo, hi = faces(p.ndim, 1 + a, grid.shape[a])
        fwd, bwd = rates.forward[a], rates.backward[a]
        # controlled rates q_ij G_j/G_i carry p_i q_ij G_j / G_i = q_ij F_i G_j from i to j
        with np.errstate(under="ignore", over="ignore", invalid="ignore"):
            bridge_flux.append(fwd * np.exp(log_f[lo] + log_g[hi])
                               - bwd * np.exp(log_f[hi] + log_g[lo]))
        reference_flux.append(fwd * p[lo] - bwd * p[hi])
    return MidpointFlow(p, bridge_flux, reference_flux, rates)


def bridge_cost(grid: Grid, noise: float, dt: float, phi: np.ndarray,
                ref: entropic.FrozenReference, sol: entropic.EntropicSolution,
                free_energy_change: float) -> CostParts:
    """J and its parts for a bridge computed by the outer loop: :func:`cost_parts` of its
    :func:`midpoint_flow` (arguments as there; ``free_energy_change``: F(ρ_T) − F(ρ_0), units
    of U)."""
    flow = midpoint_flow(grid, noise, dt, phi, ref, sol)
    return cost_parts(grid, noise, dt, flow.p, flow.bridge_flux, flow.reference_flux,
                      free_energy_change)


def flow_cost(problem: BridgeProblem, masses: np.ndarray,
              flux: tuple[np.ndarray, ...] | None = None,
              field: np.ndarray | None = None) -> CostParts:
    """J and its parts of a flow of cell masses (K+1, *shape), by the same rule as
    :func:`bridge_cost`: at the step midpoints, masses (p_k + p_{k+1})/2, the Scharfetter–Gummel
    reference flux of their Φ, and the flux that carries p_k to p_{k+1}.

    ``flux`` (one array per axis, faces only, constant in time) must satisfy the discrete
    continuity equation :math:`p_{k+1} - p_k = -\\Delta t\\,\\mathrm{div}\\,j` of the flow; by
    default, in 1D, the unique one (differences of the cumulative masses). Any flow with its
    continuity flux is feasible, so the minimiser's J is at most this one's. ``field``: masses
    (K+1, *shape) whose interaction field W ⋆ p is used instead of the flow's own (the frozen
    reference of a self-consistent bridge: it minimises the cost with its own field frozen).
    """
    grid = problem.grid
    dt = problem.dt
    mid = 0.5 * (masses[1:] + masses[:-1])
    source = mid if field is None else 0.5 * (field[1:] + field[:-1])
    confinement = np.asarray(problem.confinement.value(grid.points), dtype=float)
    pair = PairField(grid, problem.interaction)
    rates = edge_rates(confinement + pair(source), grid, problem.noise)
    if flux is None:
        if grid.dim != 1:
            raise ValueError("give the flux of a flow in 2D and 3D (continuity leaves it free)")
        # the mass left of each face, or right of it where that is the smaller tail (so tails
        # keep their relative precision: a round-off flux over a tiny mass is a huge cost)
        left = np.cumsum(masses, axis=1)[:, :-1]
        right = np.cumsum(masses[:, ::-1], axis=1)[:, ::-1][:, 1:]
        small_left = 0.5 * (left[1:] + left[:-1]) < 0.5
        flows = [np.where(small_left, -(left[1:] - left[:-1]), right[1:] - right[:-1]) / dt]
    else:
        flows = [np.broadcast_to(f, (len(mid), *f.shape)) for f in flux]
    reference = []
    for a in range(grid.dim):
        lo, hi = faces(mid.ndim, 1 + a, grid.shape[a])
        reference.append(rates.forward[a] * mid[lo] - rates.backward[a] * mid[hi])
    ends = observables.free_energy(masses[[0, -1]], grid, problem.noise, confinement, pair)
    return cost_parts(grid, problem.noise, dt, mid, flows, reference, ends[1] - ends[0])


def steady_flux(grid: Grid, change: np.ndarray, weights: np.ndarray) -> tuple[np.ndarray, ...]:
    r"""A face flux j (mass per time, one array per axis) with :math:`\mathrm{div}\,j =
    -\text{change}` (``change`` sums to zero): :math:`j = w\,(\lambda_{lo} - \lambda_{hi})` with
    :math:`\lambda` from the weighted graph Laplace equation, weights ``weights`` (cell
    values, averaged onto the faces, floored at 1e-12 of their largest value). Among the fluxes
    with that divergence it minimises :math:`\sum j^2/w`."""
    import scipy.sparse as sp
    from scipy.sparse.linalg import spsolve

    idx = np.arange(grid.size).reshape(grid.shape)
    lo_all, hi_all, w_all = [], [], []
    floor = 1e-12 * float(weights.max())
    for a in range(grid.dim):
        lo, hi = faces(grid.dim, a, grid.shape[a])
        lo_all.append(idx[lo].ravel())
        hi_all.append(idx[hi].ravel())
        w_all.append(np.maximum(0.5 * (weights[lo] + weights[hi]), floor).ravel())
    lo_i, hi_i, w = np.concatenate(lo_all), np.concatenate(hi_all), np.concatenate(w_all)
    n_faces = len(w)
    f = np.arange(n_faces)
    div = sp.csr_matrix((np.r_[np.ones(n_faces), -np.ones(n_faces)],
                         (np.r_[lo_i, hi_i], np.r_[f, f])), shape=(grid.size, n_faces))
    lap = (div @ sp.diags(w) @ div.T).tocsc()
    lam = np.zeros(grid.size)
    lam[1:] = spsolve(lap[1:, 1:], -change.ravel()[1:])  # λ = 0 in the first cell
    jflat = w * (lam[lo_i] - lam[hi_i])
    out, start = [], 0
    for a in range(grid.dim):
        shape = list(grid.shape)
        shape[a] -= 1
        size = int(np.prod(shape))
        out.append(jflat[start:start + size].reshape(shape))
        start += size
    return tuple(out)
