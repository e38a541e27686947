r"""A second opinion for the fixed-point solver: the direct solver (χ = ρ) as fallback and check.

Both solvers discretise the same rate function J (:mod:`mfbridge.solvers.fixed_point`: the
outer fixed-point loop; :mod:`mfbridge.solvers.direct`: the action minimised directly, with
the mobility χ = ρ of independent walkers), by different means, so they fail differently:
under strong attraction (Gaussian core of strength -20, range 0.5, σ = 1, demo endpoints, 64
cells × 20 steps) the fixed point does not converge (94 s, every continuation stopped) while
the direct solver converges in 4.6 s (J = 6.5577741); and at strength -10 the fixed point can
converge to a costlier critical point of J than the direct solver's (J = 4.6697831 from the
cold start, flows 1.85 apart in max L1; scored by one formula 4.832 against 4.018).

With solver option ``cross_check`` (``"auto"``, the default, or ``"always"``) and
``outer = "auto"``, for the optimal method, with an interaction, on 1D and 2D grids:

* **fallback**: when the fixed point ends ``"not_converged"`` or ``"diverged"`` with time
  budget left (:data:`FALLBACK_SHARE` of it is kept for this: :func:`reserve`), the direct
  solver runs (with what is left of the budget); if it converges its
  result is returned (``method = "direct"``) and the message names the fixed point's failure;
  otherwise the fixed point's result is returned, its message naming the direct solver's;
* **check**: after a converged solve (``"auto"``: only a hard one, which needed Newton–Krylov
  steps or a continuation, or found several bridges; ``"always"``: every one) the direct
  solver runs too, and the two flows are compared (:func:`compare`). If the direct flow is
  cheaper beyond the allowance the result becomes ``"suspect"`` with both J values in its
  message; if it is another bridge that is not cheaper it is added to ``result.alternatives``
  (start ``"direct"``); the same bridge leaves the result as it is, with a note.

**Comparing two discretisations.** Each solver's J is its own quadrature of the action, and
the two differ by the discretisation error (at 64 cells × 50 steps, on one bridge: 3.960
against 4.16). In 1D both flows are therefore scored by one formula,
:func:`~mfbridge.solvers.cost.flow_cost` (the flux that carries each step's masses to the
next, at the step midpoints), and the allowance is the larger of the two solvers' own
disagreements with that formula on their own flow, :math:`|J_s - \mathrm{flow\_cost}(p_s)|`:
two consistent quadratures of J on one flow differ by the discretisation error, which is what
may separate the two solvers' J on one bridge. In 2D, where the continuity flux of a flow is not
unique, the J values are compared directly with the allowance
:data:`~mfbridge.solvers.sanity.CHEAPER_SLACK` (5%) of the fixed point's J, the sanity check's
allowance for the same comparison.
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass

import numpy as np

from mfbridge.errors import SuspectResultWarning
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics.reference import PairField
from mfbridge.result import Alternative, BridgeResult
from mfbridge.solvers.cost import flow_cost
from mfbridge.solvers.direct import DirectOptions, solve_direct
from mfbridge.solvers.multistart import flow_distance
from mfbridge.solvers.options import SolverOptions
from mfbridge.solvers.sanity import CHEAPER_SLACK

MODES = ("auto", "always", "off")
# flows of the two solvers closer than this (max over time of the L1 distance of the masses) are
# one bridge: then more than half of the mass is shared at every time (2: disjoint). Measured
# (strength -10, range 0.5, sigma = 1, demo endpoints), one bridge by both solvers: 0.34 at 48
# cells x 40 steps, 0.55 at 64 x 30, 0.26 at 64 x 50; different bridges: 1.2-1.85 at 64 x 20
SAME_BRIDGE = 1.0
FAILED = ("not_converged", "diverged")
# of a time budget, this share is kept for the fallback (the fixed point stops when the rest is
# spent), provided it is at least FALLBACK_MIN seconds; and no fallback starts with less than
# FALLBACK_MIN left. Measured CPU time of the direct solver: 1.1-3.0 s at 64 cells x 20 steps,
# 4.3 s at 128 x 50 (strength -10, -20); the fixed point alone spent 600 s of wall time at
# -20 on a loaded machine (70 s CPU) and left nothing for a fallback
FALLBACK_SHARE = 0.25
FALLBACK_MIN = 5.0
NEWTON = 2.0  # history["kind"] of a Newton-Krylov step (mfbridge.solvers.outer_loop.KINDS)


@dataclass(frozen=True)
class Comparison:
    """The fixed point's and the direct solver's results compared (module docstring).

    ``fixed``, ``direct``: each solver's own J; ``fixed_scored``, ``direct_scored``: both flows
    scored by :func:`~mfbridge.solvers.cost.flow_cost` (1D; NaN in 2D); ``allowance``: how much
    cheaper the direct flow may be before the fixed point's result is suspect; ``distance``:
    max over time of the L1 distance of the two flows' masses."""

    fixed: float
    direct: float
    fixed_scored: float
    direct_scored: float
    allowance: float
    distance: float

    @property
    def scored(self) -> bool:
        """Whether the flows were scored by one formula (1D)."""
        return math.isfinite(self.fixed_scored) and math.isfinite(self.direct_scored)

    @property
    def gap(self) -> float:
        """How much cheaper the direct flow is (negative: costlier), by the formula used."""
        if self.scored:
            return self.fixed_scored - self.direct_scored
        return self.fixed - self.direct

    @property
    def cheaper(self) -> bool:
        """The direct flow is cheaper beyond the allowance."""
        return self.gap > self.allowance

    @property
    def same_bridge(self) -> bool:
        return self.distance <= SAME_BRIDGE

    def text(self) -> str:
        """The numbers, as a clause of a message."""
        own = f"J = {self.fixed:.8g} (fixed point) and J = {self.direct:.8g} (direct solver)"
        if self.scored:
            own += (f"; scored by one formula (flow_cost) {self.fixed_scored:.6g} and "
                    f"{self.direct_scored:.6g}, allowance {self.allowance:.3g} (the larger "
                    f"disagreement of a solver's J with that formula on its own flow)")
        else:
            own += f", allowance {self.allowance:.3g} ({CHEAPER_SLACK:.0%} of J)"
        return own + f"; flows {self.distance:.3g} apart (max L1)"


def applies(problem: BridgeProblem, options: SolverOptions) -> bool:
    """Whether :func:`second_opinion` may run for a fixed-point solve with ``options``."""
    return (options.cross_check != "off" and options.outer == "auto"
            and options.method == "optimal" and problem.grid.dim in (1, 2)
            and not PairField(problem.grid, problem.interaction).is_zero)


def reserve(budget: float | None) -> float:
    """Seconds of the time budget ``budget`` kept for the fallback (0: none kept)."""
    if budget is None or FALLBACK_SHARE * budget < FALLBACK_MIN:
        return 0.0
    return FALLBACK_SHARE * budget


def hard(result: BridgeResult) -> bool:
    """Whether a converged fixed-point solve was hard: Newton–Krylov steps, a continuation, or
    several bridges (from ``solver.starts``)."""
    newton = any(h.get("kind") == NEWTON for h in result.history)
    return newton or "by continuation" in result.message or bool(result.alternatives)


def compare(problem: BridgeProblem, fixed: BridgeResult, direct: BridgeResult) -> Comparison:
    """:class:`Comparison` of a fixed-point result and a direct-solver result of ``problem``."""
    distance = flow_distance(fixed.masses, direct.masses)
    if problem.grid.dim == 1:
        with np.errstate(all="ignore"):
            fs = flow_cost(problem, fixed.masses).cost
            ds = flow_cost(problem, direct.masses).cost
        allowance = max(abs(fixed.cost - fs), abs(direct.cost - ds))
        return Comparison(fixed.cost, direct.cost, fs, ds, allowance, distance)
    return Comparison(fixed.cost, direct.cost, math.nan, math.nan,
                      CHEAPER_SLACK * abs(fixed.cost), distance)


def _direct(problem: BridgeProblem, seconds: float | None) -> tuple[BridgeResult, float]:
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # its verdict goes into the message
        result = solve_direct(problem, DirectOptions(time_budget=seconds))
    return result, time.perf_counter() - t0


def second_opinion(problem: BridgeProblem, result: BridgeResult, mode: str,
                   seconds: float | None) -> BridgeResult:
    """Fallback or check of a fixed-point ``result`` (module docstring); ``seconds``: what is
    left of the time budget (``None``: no limit). Returns the result to give the user."""
    if result.status in FAILED:
        if seconds is not None and seconds < FALLBACK_MIN:
            return result  # the time budget is spent
        direct, took = _direct(problem, seconds)
        if direct.status != "converged":
            result.message += (f"; the direct solver (χ = ρ), tried as fallback, ended "
                               f"{direct.status.replace('_', ' ')} too ({took:.1f} s, J = "
                               f"{direct.cost:.8g})")
            return result
        direct.message = (f"converged by the direct solver (χ = ρ), the fallback, after the "
                          f"fixed point ended {result.status.replace('_', ' ')} "
                          f"({result.message}); direct solver: {direct.message}")
        direct.timings["fixed_point"] = result.timings.get("total", math.nan)
        direct.timings["total"] = direct.timings.get("total", took) + direct.timings[
            "fixed_point"]
        direct.start = result.start
        return direct
    if result.status != "converged" or (mode == "auto" and not hard(result)):
        return result
    direct, took = _direct(problem, seconds)
    result.timings["cross_check"] = took
    if direct.status != "converged":
        result.message += (f"; cross-check: the direct solver (χ = ρ) ended "
                           f"{direct.status.replace('_', ' ')} ({took:.1f} s)")
        return result
    c = compare(problem, result, direct)
    if c.cheaper:
        result.status = "suspect"
        result.message = (f"suspect: the iteration stopped as converged ({result.message}) but "
                          f"the direct solver (χ = ρ) found a cheaper flow between the same "
                          f"endpoints: {c.text()}. This is another critical point of J: try "
                          f"solver.starts=3, or solver=direct")
        warnings.warn(SuspectResultWarning(result.message), stacklevel=4)
    elif c.same_bridge:
        result.message += f"; cross-check: the direct solver (χ = ρ) agrees: {c.text()}"
    else:
        result.message += (f"; cross-check: the direct solver (χ = ρ) found another bridge, "
                           f"not cheaper (in result.alternatives): {c.text()}")
        result.alternatives = [*result.alternatives, Alternative(
            start="direct", cost=direct.cost, status=direct.status, residual=math.nan,
            distance=c.distance, mean=direct.mean, density=direct.density)]
    return result
