r"""Derivatives of the optimal cost J in the model's parameters, from one pass over the flow.

The bridge minimises the rate function over flows whose constraints (the two endpoint laws) do
not depend on the model's parameters θ (confinement, interaction, noise), so the derivative of
the optimal cost is the partial derivative at the optimal flow (envelope theorem: Milgrom &
Segal, "Envelope theorems for arbitrary choice sets", Econometrica 70, 2002). In the continuum

.. math::

    \frac{dJ}{d\theta} = \frac{1}{\sigma^2}\int_0^T\!\!\int (v - b_\theta)\cdot
        (-\partial_\theta b_\theta)\,\rho\,dx\,dt
        \;-\; [\theta = \sigma]\,\frac{2}{\sigma}J,
    \qquad b_\theta = -\nabla U_\theta - \nabla W_\theta\star\rho
        - \tfrac{\sigma^2}{2}\nabla\log\rho .

On the grid the reported J is the action of the control flux, face by face
(:func:`mfbridge.numerics.observables.flux_action`):

.. math::

    J = \frac{1}{2\sigma^2}\sum_t w_t\sum_{\text{faces}}
        \frac{(j^{\rm b} - j^{\rm r})^2 h^2}{\bar p},\qquad
    j^{\rm r} = q^+ p_{\rm lo} - q^- p_{\rm hi},

with :math:`j^{\rm b}` the bridge's net flux, :math:`q^\pm` the Scharfetter–Gummel rates of
:math:`\Phi = U + W\star p` (:mod:`mfbridge.numerics.reference`) and :math:`\bar p` the mean
mass of the two cells, all at the step midpoints with weights :math:`w_t = \Delta t` (the rule
of :mod:`mfbridge.solvers.cost`; the flow there is rebuilt from the result's stored potentials
and V by :func:`~mfbridge.solvers.cost.result_midpoint_flow`; Φ and its derivatives are the
means of their two nodes, being affine in the masses). Holding the flow (:math:`p` and
:math:`j^{\rm b}`) fixed,

.. math::

    \frac{\partial J}{\partial\theta} = -\frac{1}{\sigma^2}\sum_t w_t\sum_{\text{faces}}
        \frac{(j^{\rm b} - j^{\rm r})h^2}{\bar p}
        \bigl(\partial_\theta q^+\,p_{\rm lo} - \partial_\theta q^-\,p_{\rm hi}\bigr)
        \;-\; [\theta = \sigma]\,\frac{2}{\sigma}J,

where :math:`\partial_\theta q^\pm = \pm\frac{D}{h^2}B'(\pm z)\,\beta\,\partial_\theta\Delta\Phi`
(:math:`z = \beta\Delta\Phi`, :math:`D = \sigma^2/2`, :math:`\beta = 2/\sigma^2`) for a
parameter of U or W, and :math:`\partial_\sigma q^\pm = \frac{\sigma}{h^2}(B(\pm z) \mp
zB'(\pm z))` for the noise (through D and β: the entropy term of b). :math:`\partial_\theta U`
and :math:`\partial_\theta W` come from :func:`mfbridge.model.parameters.parameter_derivative`
(forward-mode torch autograd).

How exact it is. The solver's flow is the minimiser of the chain's relative entropy (whose
derivative is the correction potential V of :mod:`mfbridge.solvers.fixed_point`), not of the flux
form, which agrees with it to O(h²); and the time scheme makes the fixed point stationary for that
functional only to O(Δt²). So this derivative equals the central difference of the reported J up to
the discretisation error, O(h² + Δt²), not to rounding (measured in ``tests/test_sensitivity.py``).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence

import numpy as np

from mfbridge.errors import ConvergenceWarning, InputError
from mfbridge.model.parameters import NOISE_NAMES, check_names, parameter_derivative
from mfbridge.model.potentials import Interaction
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics import observables
from mfbridge.numerics.reference import (
    PairField,
    bernoulli,
    bernoulli_derivative,
    faces,
)
from mfbridge.result import BridgeResult
from mfbridge.solvers.cost import result_midpoint_flow

__all__ = ["cost_gradient"]

# the recomputed J must match the stored one to this relative error, or the result is not a
# solution of this problem (both are the same formula on the same arrays: rounding only)
SAME_COST_RTOL = 1e-8


class _Derivative(Interaction):
    """∂θ W as an interaction (its table feeds :class:`~mfbridge.numerics.reference.PairField`)."""

    name = "derivative"

    def __init__(self, interaction: Interaction, field: str) -> None:
        self.interaction = interaction
        self.field = field

    def value(self, z: np.ndarray) -> np.ndarray:
        return parameter_derivative(self.interaction, self.field, z)

    def grad(self, z: np.ndarray) -> np.ndarray:  # pragma: no cover - never called
        raise NotImplementedError


def cost_gradient(problem: BridgeProblem, result: BridgeResult,
                  names: Sequence[str]) -> tuple[float, dict[str, float]]:
    """J and its derivatives in the named model parameters (see the module docstring).

    ``result`` is the solution of ``problem`` (same grid and steps); ``names`` are numeric model
    parameters (:func:`mfbridge.model.parameters.numeric_parameters`: ``noise``, ``diffusion``,
    ``confinement.<field>``, ``interaction.<field>``...). Returns ``(J, {name: dJ/dθ})`` with J
    recomputed from the flow (equal to ``result.cost`` for a converged result of this problem;
    :class:`~mfbridge.errors.InputError` otherwise). Warns with
    :class:`~mfbridge.errors.ConvergenceWarning` when the result is not converged: the envelope
    theorem holds only at the minimiser.
    """
    names = check_names(problem, names)
    grid = problem.grid
    if result.density.shape[1:] != grid.shape or result.density.shape[0] != problem.steps + 1:
        raise InputError(f"the result has flow shape {result.density.shape}, the problem "
                         f"({problem.steps} steps on grid {grid.shape}) needs "
                         f"{(problem.steps + 1, *grid.shape)}")
    if result.status != "converged":
        warnings.warn(ConvergenceWarning(
            f"the gradient of J is taken on a {result.status} bridge; the envelope theorem "
            "holds only at the minimiser"), stacklevel=2)
    sigma = problem.noise
    beta, diffusivity = 2.0 / sigma**2, 0.5 * sigma**2
    # the flow at the step midpoints, where the reported J is evaluated (mfbridge.solvers.cost)
    flow = result_midpoint_flow(problem, result)
    p = flow.p
    nodes = result.masses
    pair = PairField(grid, problem.interaction)
    phi_nodes = np.asarray(problem.confinement.value(grid.points), dtype=float) + pair(nodes)
    phi = 0.5 * (phi_nodes[1:] + phi_nodes[:-1])
    weights = np.full(p.shape[0], problem.dt)
    dphi: dict[str, np.ndarray] = {}
    for name in names:
        part, _, field = name.partition(".")
        if part == "confinement":
            dphi[name] = np.broadcast_to(
                parameter_derivative(problem.confinement, field, grid.points), p.shape)
        elif part == "interaction":
            # ∂W ⋆ p is affine in p: at a step midpoint the mean of its two nodes, as Φ
            nodal = PairField(grid, _Derivative(problem.interaction, field))(nodes)
            dphi[name] = 0.5 * (nodal[1:] + nodal[:-1])
    control_flux, dterms = [], {name: np.zeros(p.shape[0]) for name in names}
    for a in range(grid.dim):
        ax = 1 + a
        lo, hi = faces(p.ndim, ax, grid.shape[a])
        ju = flow.bridge_flux[a] - flow.reference_flux[a]
        control_flux.append(ju)
        mean_mass = 0.5 * (p[lo] + p[hi])
        h2 = grid.spacing[a] ** 2
        with np.errstate(invalid="ignore", over="ignore"):
            factor = np.where(mean_mass > 0,
                              ju * h2 / np.where(mean_mass > 0, mean_mass, 1.0), 0.0)
        z = beta * np.diff(phi, axis=ax)
        for name in names:
            if name in NOISE_NAMES:
                dfwd = (sigma / h2) * (bernoulli(z) - z * bernoulli_derivative(z))
                dbwd = (sigma / h2) * (bernoulli(-z) + z * bernoulli_derivative(-z))
            else:
                ddiff = beta * np.diff(dphi[name], axis=ax)
                dfwd = (diffusivity / h2) * bernoulli_derivative(z) * ddiff
                dbwd = -(diffusivity / h2) * bernoulli_derivative(-z) * ddiff
            term = factor * (dfwd * p[lo] - dbwd * p[hi])
            dterms[name] += term.reshape(p.shape[0], -1).sum(axis=1)
    cost = observables.flux_action(tuple(control_flux), p, grid, weights, sigma)
    # a stalled solve may return the flow of an intermediate stage (a continuation in the
    # interaction or the noise), whose cost is not this problem's: it was warned about above
    if (result.status == "converged"
            and abs(cost - result.cost) > SAME_COST_RTOL * max(abs(result.cost), 1e-300) + 1e-14):
        raise InputError(f"the result's cost {result.cost!r} is not that of its flow under this "
                         f"problem ({cost!r}): it is not a solution of this problem")
    grads = {}
    for name in names:
        g = -float(weights @ dterms[name]) / sigma**2
        if name in NOISE_NAMES:
            g -= 2.0 * cost / sigma
            if name == "diffusion":
                g /= sigma  # dσ/dD = 1/σ
        grads[name] = g
    return cost, grads

