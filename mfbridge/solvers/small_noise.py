r"""The outer loop at small noise: the split heat kernel as reference, its V, and the cost.

At small σ the Scharfetter–Gummel chain needs cells with Péclet number |u|h/D ≲ 2 for its
bridge to be the diffusion's (see :mod:`mfbridge.numerics.gaussian_step` for the cause and the
measurements); ``kernel="gaussian"`` (or ``"auto"`` when that is the case) replaces every step
by the split heat kernel, which only needs σ√Δt ≳ 0.7h. Everything else in the outer loop stays:
Sinkhorn sweeps in the log domain, node weights :math:`e^{-\omega_k V_k}`, Anderson mixing.

**V for this chain.** The discrete rate function is :math:`\mathrm{KL}(P \,|\, R[\rho])`, R the
chain with steps :math:`M_j` built on :math:`\Phi_j = U + W\star(\rho_j + \rho_{j+1})/2`. With
:math:`M_j(x, y) = e^{-|y-x|^2/(2w^2) + \ell_j(y)}/Z_j(x)`, the derivative in :math:`\Phi_j` of
:math:`-E_P\log M_j(X_j, X_{j+1})` involves only one-time marginals, because the row
normalisation cancels the x-part:

.. math::

    c_j = -\nabla_{\Phi}\sum_y r_j(y)\,\ell_j(y), \qquad r_j = p_{j+1} - M_j^\top p_j,
    \qquad \omega_k V_k = \tfrac12\,W\star(c_{k-1} + c_k)

(:func:`~mfbridge.numerics.gaussian_step.split_log_weight_adjoint`; c₋₁ = c_K = 0). r is what
the control adds to the reference's push-forward; to leading order
:math:`r \approx -\Delta t\,\nabla\cdot(\rho\,\sigma^2\nabla\psi)`, which gives the continuum
:math:`V = \int\nabla W(x - y)\cdot\nabla\psi\,\rho(dx)`.

**The cost.** J is the discrete rate function of the computed flow,
:math:`\mathrm{KL}(P\,|\,R[\rho])` (:func:`~mfbridge.numerics.entropic.path_relative_entropy`):
the steps are stochastic and their large deviations are the diffusion's, so this KL converges to
J at second order (on the σ = 0.1 reference case at 512 cells: 8.2e-3, 1.8e-3, 2.5e-4 above the
exact J at 10, 20, 40 steps; the direct solver's discretisation of J on the same flows, at the
step midpoints with centred fluxes, gives 1.0e-2, 1.8e-3, 2.2e-4). Unlike that Eulerian form it
needs no time resolution of the density at a point: with W = U = 0 the steps are exact and so
is the KL, while the midpoint form is off by ~(vΔt/width)² when a narrow bump crosses a cell in
less than a step. The chain's face fluxes do not exist here, so the kinetic and drift parts are
evaluated at the nodes from the bridge velocity :math:`v = \sigma^2\nabla\psi + b`
(:func:`node_fluxes`). (The Scharfetter–Gummel reference flux would be first order once βΔΦ
across a cell is large: on the σ = 0.1 case at 512 cells it put the midpoint cost of these flows
0.6% low at 20 and 40 steps alike.)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from mfbridge.model.grid import Grid
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics import entropic, observables
from mfbridge.numerics.gaussian_step import (
    MIN_WIDTH,
    GaussianStep,
    split_log_weight,
    split_log_weight_adjoint,
    width_in_cells,
)
from mfbridge.numerics.propagator import StepOperator
from mfbridge.numerics.reference import PairField, edge_rates, faces
from mfbridge.solvers.cost import CostParts, cost_parts

KERNELS = ("auto", "chain", "gaussian")
# Anderson depth of the Sinkhorn iterations with the Gaussian steps (entropic.solve_operator)
SINKHORN_ANDERSON = 5
# relative rounding of V with the Gaussian steps: on the sigma = 0.05 reference case (640 cells,
# 32 steps) the residual stagnated between 1.1e-12 and 3.5e-11 of T max_k sum p|V| (tol 1e-9
# was never met: 1067 outer iterations, then continuations)
ROUNDOFF = 1e-10
# above this cell Péclet number a failure with the chain suggests refining the grid (common
# practice, no source: finite-volume drift-diffusion schemes resolve layers only for
# |v|h/D <~ 2)
PECLET_HINT = 2.0
# above this estimated cell Péclet number kernel=auto takes the Gaussian steps. The chain's
# bridge answers a potential too strongly by a factor that grows with it (mean_response, sigma =
# 0.2, 10 steps): 1.15, 1.49, 2.37, 4.27, 8.18 at estimated Pe 1.9, 3.9, 7.7, 15, 31; at 3
# (factor ~1.3) coarse grids at sigma ~ 1 (2D 32 x 32 cells: Pe 2.0) keep the chain, whose
# measured errors there are those of its h
PECLET_LIMIT = 3.0
# masses below this fraction of an endpoint's largest are ignored when reading its support
_SUPPORT = 1e-3


@dataclass(frozen=True)
class Resolution:
    """What the grid resolves at this noise, read off the problem before solving.

    ``peclet``: estimated cell Péclet number of the control, :math:`\\hat u\\,h/D` with
    :math:`\\hat u` = (distance between the endpoint means + change of their spreads along each
    axis) / T + |∇Φ| at the endpoint means (the drift the control must overcome), h the largest
    cell width, D = σ²/2; ``width``: σ√Δt / h, smallest over axes (the split heat kernel needs
    ``MIN_WIDTH``); ``kernel``: the choice of ``"auto"``.
    """

    peclet: float
    width: float
    kernel: str

    @property
    def chain_resolved(self) -> bool:
        return self.peclet <= PECLET_LIMIT

    @property
    def gaussian_resolved(self) -> bool:
        return self.width >= MIN_WIDTH

    def describe(self) -> str:
        return (f"estimated cell Péclet number {self.peclet:.3g} (the jump chain needs "
                f"<= {PECLET_LIMIT:g}); sigma sqrt(dt) / h = {self.width:.3g} (the Gaussian steps "
                f"need >= {MIN_WIDTH:g})")


def resolution(problem: BridgeProblem) -> Resolution:
    """Estimate the control's cell Péclet number and the Gaussian step's width in cells, and
    choose the kernel for ``kernel="auto"``: the chain when its Péclet number is at most
    ``PECLET_LIMIT`` or the Gaussian steps are not resolved either, else ``"gaussian"``."""
    grid = problem.grid
    ends = np.stack([problem.initial, problem.final])
    mean, cov = observables.moments(ends, grid)
    spread = np.sqrt(np.maximum(np.diagonal(cov, axis1=1, axis2=2), 0.0))
    travel = float(np.linalg.norm(mean[1] - mean[0]) + np.abs(spread[1] - spread[0]).sum())
    interacting = not getattr(problem.interaction, "is_zero", False)
    force = np.asarray(problem.confinement.grad(mean), dtype=float)
    points = grid.points.reshape(-1, grid.dim)
    drift = 0.0
    for k in range(2):
        # ∇(W * p)(m) = sum_x ∇W(m - x) p(x), at the endpoint's mean
        field = problem.interaction.grad(mean[k][None, :] - points) if interacting else 0.0
        total = force[k] + (np.asarray(field, dtype=float) * ends[k].reshape(-1, 1)).sum(axis=0)
        drift = max(drift, float(np.linalg.norm(total)))
    speed = travel / problem.horizon + drift
    diffusivity = problem.noise**2 / 2.0
    peclet = speed * max(grid.spacing) / diffusivity
    width = min(width_in_cells(problem.noise, problem.dt, grid.spacing))
    gaussian = peclet > PECLET_LIMIT and width >= MIN_WIDTH
    return Resolution(peclet, width, "gaussian" if gaussian else "chain")


def choose_kernel(problem: BridgeProblem, kernel: str) -> tuple[str, str]:
    """The kernel to use for ``kernel`` (``"auto"`` resolved by :func:`resolution`) and a note
    for the solver's message ("" unless the Gaussian steps were chosen by ``"auto"``)."""
    if kernel != "auto":
        return kernel, ""
    found = resolution(problem)
    note = f" with Gaussian steps ({found.describe()})" if found.kernel == "gaussian" else ""
    return found.kernel, note


def roundoff_floor(kernel: str, problem: BridgeProblem, p: np.ndarray, v: np.ndarray) -> float:
    """The smallest self-consistency residual the Gaussian steps can resolve (0 for the chain):
    V is O(1/σ²) and computed from log-potentials of size O(1/σ²), whose rounding puts a floor
    under :math:`T\\max_k\\sum_i p_{k,i}|V_{k,i} - \\bar V_{k,i}|` at ``ROUNDOFF`` times
    :math:`T\\max_k\\sum_i p_{k,i}|V_{k,i}|` (p, v: (K+1, *grid.shape))."""
    if kernel != "gaussian":
        return 0.0
    axes = tuple(range(1, p.ndim))
    return ROUNDOFF * problem.horizon * float((p * np.abs(v)).sum(axis=axes).max())


def floor_note(kernel: str, problem: BridgeProblem, p: np.ndarray, v: np.ndarray,
               tol: float) -> str:
    """Says so in the message when the solver stopped at :func:`roundoff_floor` above tol."""
    floor = roundoff_floor(kernel, problem, p, v)
    if floor <= tol:
        return ""
    return (f" (the tolerance is below the rounding of V here: stopped under {floor:.1e}, "
            f"{ROUNDOFF:g} of T max_k sum p|V|)")


def gaussian_steps(phi_mid: np.ndarray, grid: Grid, noise: float, dt: float
                   ) -> list[GaussianStep]:
    """The split-heat-kernel steps for Φ at the step midpoints, ``phi_mid`` (K, *grid.shape)."""
    widths = width_in_cells(noise, dt, grid.spacing)
    ell = split_log_weight(phi_mid, grid.spacing, noise, dt)
    return [GaussianStep(ell[k], widths) for k in range(len(phi_mid))]


def gaussian_correction(p: np.ndarray, phi_mid: np.ndarray, ref: entropic.FrozenReference,
                        grid: Grid, noise: float, dt: float, pair: PairField, scale: float,
                        omega: np.ndarray) -> np.ndarray:
    r"""V (K+1, *grid.shape) of the split-heat-kernel chain from the masses ``p`` (K+1, *shape)
    of one solve, Φ at the step midpoints and the steps of ``ref`` (module docstring)."""
    with np.errstate(divide="ignore"):
        log_p = np.log(p)
    push = np.stack([np.exp(step.push_forward(log_p[j])) for j, step in enumerate(ref.steps)])
    r = p[1:] - push
    c_steps = split_log_weight_adjoint(r, phi_mid, grid.spacing, noise, dt)
    c = np.zeros_like(p)
    c[:-1] += 0.5 * c_steps
    c[1:] += 0.5 * c_steps
    weights = omega.reshape(-1, *([1] * grid.dim))
    return scale * pair(c) / weights


def gaussian_cost(problem: BridgeProblem, sol: entropic.EntropicSolution,
                  ref: entropic.FrozenReference, omega: np.ndarray, p: np.ndarray,
                  log_h: np.ndarray, phi: np.ndarray, free_energy_change: float) -> CostParts:
    """J (the chain's KL, module docstring) and its parts for a solve with the Gaussian steps:
    the kinetic and drift parts from :func:`node_fluxes` by the one quadrature of the cost
    (:func:`~mfbridge.solvers.cost.cost_parts`, trapezoid weights ``omega`` in time), the
    free-energy part from ``free_energy_change`` F(ρ_T) − F(ρ_0) (units of U); ``p``, ``log_h``
    (ψ) and ``phi`` have shape (K+1, *grid.shape)."""
    cost = entropic.path_relative_entropy(sol, ref, problem.initial, problem.final)
    bridge, reference = node_fluxes(problem.grid, problem.noise, p, log_h, phi)
    return cost_parts(problem.grid, problem.noise, omega, p, bridge, reference,
                      free_energy_change, cost=cost)


def node_fluxes(grid: Grid, noise: float, p: np.ndarray, log_h: np.ndarray, phi: np.ndarray
                ) -> tuple[list[np.ndarray], list[np.ndarray]]:
    r"""The bridge's and the reference's net face fluxes at the nodes (mass per time, one array
    per axis), whose actions are the kinetic and drift parts of J,
    :math:`\frac{1}{2\sigma^2}\iint |v|^2\rho` and :math:`\frac{1}{2\sigma^2}\iint |b|^2\rho`:
    the reference's flux :math:`b\rho = -D\nabla\rho - \rho\nabla\Phi` and the bridge's
    :math:`v\rho = b\rho + \rho\,\sigma^2\nabla\psi`, centred on every face (mass per time
    :math:`(-D\Delta p - \bar p_f\Delta\Phi)/h_a^2` and :math:`\bar p_f\sigma^2\Delta\psi/h_a^2`
    more). ``p``, ``log_h`` (ψ) and ``phi`` have shape (K+1, *grid.shape). Faces without mass
    carry no control flux."""
    diffusivity = noise**2 / 2.0
    bridge, reference = [], []
    for a, h in enumerate(grid.spacing):
        lo, hi = faces(p.ndim, 1 + a, grid.shape[a])
        face_mass = 0.5 * (p[lo] + p[hi])
        with np.errstate(invalid="ignore"):
            step = log_h[hi] - log_h[lo]
        control = np.where((face_mass > 0) & np.isfinite(step),
                           face_mass * noise**2 * np.nan_to_num(step), 0.0) / h**2
        drift = (-diffusivity * (p[hi] - p[lo]) - face_mass * (phi[hi] - phi[lo])) / h**2
        reference.append(drift)
        bridge.append(drift + control)
    return bridge, reference


def mean_response(problem: BridgeProblem, kernel: str, eps: float) -> float:
    r"""The sensitivity :math:`d\,E[X_{T/2}]/d\varepsilon` of the bridge weighted by
    :math:`e^{-\varepsilon\int_0^T X_t\,dt}` (W = 0, first axis), by central differences of two
    log-domain solves with ``kernel`` ("chain" or "gaussian"): how strongly the flow answers a
    potential such as V, the gain of the outer loop. For U = a x²/2 the continuum value is
    :math:`(\sigma/a)^2 e^{-aT/2}(\tanh(aT/2) - (e^{aT/2} - 1))` (the Euler–Lagrange equation
    of :math:`\min\int (\dot m + am)^2/(2\sigma^2) + \varepsilon m\,dt`)."""
    grid, k_steps, dt = problem.grid, problem.steps, problem.dt
    confinement = np.asarray(problem.confinement.value(grid.points), dtype=float)
    if kernel == "chain":
        chain = StepOperator(edge_rates(confinement, grid, problem.noise), dt, grid.shape)
        steps: list[StepOperator] | list[GaussianStep] = [chain] * k_steps
    else:
        phi = np.broadcast_to(confinement, (k_steps, *grid.shape))
        steps = gaussian_steps(phi, grid, problem.noise, dt)
    omega = np.full(k_steps + 1, dt)
    omega[[0, -1]] = dt / 2
    x = grid.points[..., 0]
    means = []
    for sign in (-1.0, 1.0):
        log_weights = -sign * eps * omega.reshape(-1, *([1] * grid.dim)) * x
        ref = entropic.FrozenReference(steps, log_weights, True)
        sol = entropic.solve_operator(ref, problem.initial, problem.final,
                                      np.zeros(grid.shape), tol=1e-12, max_iter=20000)
        p = np.exp(sol.log_marginals(ref.log_weights))[k_steps // 2]
        means.append(float((p * x).sum()))
    return (means[1] - means[0]) / (2 * eps)


def cell_peclet(problem: BridgeProblem, p: np.ndarray, phi: np.ndarray, log_h: np.ndarray
                ) -> float:
    """Largest cell Péclet number |v| h / D (D = σ²/2) of a computed flow over faces and times
    where it has mass, for the reference drift (βΔΦ across a face) and for the control
    (u = σ²∇ψ gives 2Δψ across a face); ``p``, ``phi``, ``log_h`` (K+1, *grid.shape)."""
    beta = 2.0 / problem.noise**2
    largest = 0.0
    for a in range(problem.grid.dim):
        ax = 1 + a
        with np.errstate(invalid="ignore"):
            drift = np.abs(beta * np.diff(phi, axis=ax))
            control = np.abs(2 * np.diff(log_h, axis=ax))
        mass = (p > 1e-12 * p.max())
        lo, hi = faces(p.ndim, ax, problem.grid.shape[a])
        occupied = mass[lo] | mass[hi]
        for v in (drift, control):
            v = v[occupied & np.isfinite(v)]
            if v.size:
                largest = max(largest, float(v.max()))
    return largest


def failure_hint(kernel: str, problem: BridgeProblem, p: np.ndarray, phi: np.ndarray,
                 log_h: np.ndarray) -> str:
    """What a failure message adds about the grid: with the chain, the largest cell Péclet
    number when it is above ``PECLET_HINT`` (and the Gaussian steps when they would resolve the
    flow); with the Gaussian steps, how to make σ√Δt at least ``MIN_WIDTH`` cells."""
    width = min(width_in_cells(problem.noise, problem.dt, problem.grid.spacing))
    factor = MIN_WIDTH / max(width, 1e-300)
    narrow = (f"sigma sqrt(dt) / h = {width:.3g} is below {MIN_WIDTH:g}: use {factor**2:.3g}x "
              f"fewer time steps or {factor:.3g}x finer cells")
    if kernel == "gaussian":
        return "; " + narrow if width < MIN_WIDTH else ""
    peclet = cell_peclet(problem, p, phi, log_h)
    if peclet <= PECLET_HINT:
        return ""
    cure = ("or use solver.kernel=gaussian, which needs sigma sqrt(dt) >= 0.7 h only"
            if width >= MIN_WIDTH else "or, for the Gaussian steps (solver.kernel=gaussian), "
            + narrow)
    return (f"; the largest cell Péclet number is {peclet:.3g}: the grid is coarse for this noise "
            f"(the jump chain needs |u|h/D of order 1 or below); refine the grid, {cure}")
