r"""Checks a converged bridge must pass before it is called converged, and grid advice.

A stalled or misled outer iteration can stop with a small residual on a flow that is not a
bridge at all (on a grid far too coarse for the noise, the residual measures self-consistency,
not optimality). These checks cannot be fooled that way; a result that fails one is
``"suspect"`` (:data:`~mfbridge.result.STATUSES`), never ``"converged"``:

* **cost**: J is finite and ≥ 0;
* **cheaper flow**: J is not above the cost of a cheap feasible flow scored by the same J
  (for the self-consistent ``frozen`` bridge, which minimises J with its own interaction
  field frozen, the cheap flow is scored in that field)
  (:func:`~mfbridge.solvers.cost.flow_cost`): the linear interpolation of the endpoint masses
  and, in 1D, McCann's displacement interpolation (quantile interpolation). The bridge
  minimises J, so its J can exceed theirs only by the discretisation error: the check allows
  ``CHEAPER_SLACK`` (5%) of the cheaper flow's cost, plus ``CHEAPER_FLOOR`` (1e-8). (Measured:
  J/J_displacement = 0.93 on the linear–quadratic case at σ = 1, where the displacement
  interpolation is nearly optimal);
* **marginals**: the flow's first and last slices are within ``MARGINAL_LIMIT`` (L1, or 10 ×
  the solver tolerance if larger) of μ and ν, measured on the returned flow;
* **mass**: every slice of the flow sums to 1 within the same limit.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from mfbridge.errors import SuspectResultWarning
from mfbridge.model.problem import BridgeProblem
from mfbridge.result import BridgeResult
from mfbridge.solvers.cost import flow_cost, steady_flux

CHEAPER_SLACK = 0.05
CHEAPER_FLOOR = 1e-8  # an absolute allowance: costs this small are zero to solver tolerance
MARGINAL_LIMIT = 1e-6
# the cell Péclet number above which the grid is called coarse for the flow (common practice,
# no source: finite-volume drift-diffusion schemes resolve layers only for |v|h/D <~ 2)
PECLET_LIMIT = 2.0


@dataclass(frozen=True)
class Sanity:
    """The outcome of :func:`check`: ``failures`` (one sentence per failed check, empty when
    all pass) and the cheap feasible flow's cost the result was compared with."""

    failures: tuple[str, ...]
    feasible_cost: float
    feasible_flow: str

    @property
    def passed(self) -> bool:
        return not self.failures


def feasible_cost(problem: BridgeProblem, field: np.ndarray | None = None
                  ) -> tuple[float, str]:
    """The smaller J of two cheap feasible flows between the endpoints, and its name: the
    linear interpolation of the masses (in 2D and 3D with the steady flux of
    :func:`~mfbridge.solvers.cost.steady_flux`, weighted by the mean of the endpoints) and, in
    1D, the displacement interpolation. ``field``: a flow whose interaction field is frozen
    in the reference (see :func:`~mfbridge.solvers.cost.flow_cost`)."""
    linear = problem.linear_flow()
    grid = problem.grid
    flux = None
    if grid.dim > 1:
        change = (problem.final - problem.initial) / problem.horizon
        flux = steady_flux(grid, change, 0.5 * (problem.initial + problem.final))
    best = flow_cost(problem, linear, flux, field).cost
    name = "the linear interpolation of the endpoints"
    if grid.dim == 1:
        from mfbridge.solvers.direct import displacement_interpolation

        moved = flow_cost(problem, displacement_interpolation(problem), None, field).cost
        if moved < best:
            best, name = moved, "the displacement interpolation of the endpoints"
    return best, name


def check(problem: BridgeProblem, masses: np.ndarray, cost: float, tol: float,
          frozen: bool = False) -> Sanity:
    """Run the checks of the module docstring on a computed flow of cell masses
    (K+1, *grid.shape) with cost J = ``cost``; ``tol`` is the solver's tolerance. ``frozen``:
    the flow is a self-consistent (frozen-reference) bridge, which minimises J with its own
    interaction field frozen, not J itself: the cheap flows are then scored in that field."""
    failures = []
    if not (math.isfinite(cost) and cost >= 0):
        failures.append(f"the cost J = {cost:.6g} is not a finite number ≥ 0")
    with np.errstate(all="ignore"):
        bound, name = feasible_cost(problem, masses if frozen else None)
    if math.isfinite(cost) and cost > (1 + CHEAPER_SLACK) * bound + CHEAPER_FLOOR:
        failures.append(f"the cost J = {cost:.6g} is above the cost {bound:.6g} of {name} (a "
                        "flow between the same endpoints that the bridge should beat): the "
                        "computed flow is not the minimiser")
    limit = max(MARGINAL_LIMIT, 10 * tol)
    axes = tuple(range(1, problem.grid.dim + 1))
    for label, slice_, target in (("initial", masses[0], problem.initial),
                                  ("final", masses[-1], problem.final)):
        error = float(np.abs(slice_ - target).sum())
        if not error <= limit:
            failures.append(f"the flow misses the {label} distribution by {error:.3g} (L1, "
                            f"limit {limit:.1g})")
    drift = float(np.abs(masses.sum(axis=axes) - 1.0).max())
    if not drift <= limit:
        failures.append(f"the flow does not conserve mass: a slice sums to 1 ± {drift:.3g} "
                        f"(limit {limit:.1g})")
    return Sanity(tuple(failures), bound, name)


def gate(problem: BridgeProblem, result: BridgeResult, tol: float, peclet: float,
         frozen: bool = False) -> None:
    """Run :func:`check` on a result the solver calls converged; on a failure make it
    ``"suspect"``, with a message naming the failed checks and what to do, and warn
    (:class:`~mfbridge.errors.SuspectResultWarning`). ``peclet``: the flow's largest cell
    Péclet number, named in the advice when above ``PECLET_LIMIT``."""
    outcome = check(problem, result.masses, result.cost, tol, frozen)
    if outcome.passed:
        return
    if peclet > PECLET_LIMIT:
        advice = (f"the largest cell Péclet number of the flow is {peclet:.3g} (above "
                  f"{PECLET_LIMIT:g}): the grid is too coarse for this noise; refine it until "
                  f"it is below {PECLET_LIMIT:g} (about {peclet / PECLET_LIMIT:.2g} times "
                  "more cells per axis)")
    else:
        advice = "refine the grid and the time steps and compare the results"
    result.status = "suspect"
    result.message = (f"suspect: the iteration stopped as converged ({result.message}) but "
                      f"{'; and '.join(outcome.failures)}. {advice[0].upper()}{advice[1:]}")
    warnings.warn(SuspectResultWarning(result.message), stacklevel=4)
