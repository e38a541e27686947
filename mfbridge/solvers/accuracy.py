r"""Discretisation-error estimates from companion solves on coarser grids, and target accuracy.

Every number a grid solve reports carries a discretisation error. This module estimates it the
way computational physics usually does (Richardson extrapolation with the observed order, and
Roache's grid convergence index: P. J. Roache, "Quantification of uncertainty in computational
fluid dynamics", Annu. Rev. Fluid Mech. 29, 1997):

* the problem is solved again on one or two *companion* grids, each coarser by the ratio
  r = 2 in every spatial axis and in time (cells and steps halved, then halved again), each
  started from the finer solution moved to its cells;
* with J_1 (the result), J_2 and J_3 (the companions), the observed order is
  :math:`p = \log\bigl((J_3 - J_2)/(J_2 - J_1)\bigr)/\log r`. The scheme is second order in h
  and Δt (:mod:`mfbridge.fixed_point`); when :math:`|p - 2| \le 0.5` the grids are taken to be
  in the asymptotic range, the order used is min(p, 2) and the safety factor 1.25; otherwise
  (or with one companion, or when the differences change sign) the order used is 2, the safety
  factor 3, and the estimate says it is not known to be in its asymptotic range;
* Richardson's extrapolation :math:`J_\infty = J_1 + (J_1 - J_2)/(r^p - 1)`; the error
  estimate of J is :math:`|J_1 - J_\infty|`; Roache's GCI is the safety factor times it,
  relative to :math:`|J_1|`;
* the density flow and the mean path get the same treatment: their largest difference over the
  companion's time nodes (cell masses compared on the companion's cells, L1; the mean in the
  Euclidean norm) divided by :math:`r^p - 1`.

What it assumes: the error is :math:`C_x h^2 + C_t \Delta t^2` plus higher order, with both
constants the same on all the grids. Space and time errors of opposite signs cancel in part on
some grids; the observed order then departs from 2 and the estimate says so. It is unreliable
whenever the companions resolve the flow much worse than the result (a cell Péclet number
above ~2 on the companion, a boundary layer of the width of a companion step).
"""

from __future__ import annotations

import dataclasses
import math
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from mfbridge.errors import GridWarning, InputError, MFBridgeError, TargetNotMetWarning
from mfbridge.model.endpoints import box_text
from mfbridge.model.grid import Grid
from mfbridge.model.problem import BridgeProblem
from mfbridge.model.series import SeriesProblem, Snapshot
from mfbridge.numerics.entropic import UnderflowError
from mfbridge.result import BridgeResult, ErrorEstimate
from mfbridge.solvers import advice
from mfbridge.solvers.fixed_point import LOG_DOMAIN_NOTE, Iteration, SolverOptions, solve_bridge
from mfbridge.solvers.series import join, split_joined

ORDER = 2.0  # the scheme's order in h and in Δt
RATIO = 2  # companions are coarser by this factor in cells per axis and in steps
ORDER_BAND = 0.5  # observed order within ORDER +- ORDER_BAND: asymptotic range
SAFETY_THREE_GRIDS = 1.25  # Roache (1997): with an observed order from three grids
SAFETY_TWO_GRIDS = 3.0  # Roache (1997): two grids, assumed order
MIN_COMPANION_CELLS = 8  # per axis
MIN_COMPANION_STEPS = 2
# the companions together may take at most this times the solve's own CPU time, and at least
# COMPANION_FLOOR CPU seconds (CPU time: wall-clock times on a shared machine vary several-fold).
# Measured: the demo's companions take 0.27-0.30 of its solve; on the double well with a
# Gaussian core at 512 x 100 (sigma = 1, [-4, 4]) about 1.8 (7 warm-started outer iterations
# each, with more Sinkhorn iterations on the coarse grids)
COMPANION_TIME = 3.0
COMPANION_FLOOR = 5.0
# the companions' outer tolerance (or the solver's, if looser): their J then carries an error of
# about this size, far below the differences between the grids that the estimate reads
COMPANION_TOL = 1e-7
# the statuses whose results get an estimate (a suspect result's companions usually end suspect
# too, and the estimate then says so)
ESTIMATED = ("converged", "suspect")
WALL_MASS = 1e-6  # more mass than this in the outer cells at some time: the box is too narrow


@dataclass(frozen=True)
class AccuracyOptions:
    """How the discretisation error is estimated, and to what accuracy to solve.

    * ``estimate``: solve on ``companions`` coarser grids (1 or 2) and attach an
      :class:`~mfbridge.result.ErrorEstimate` to the result (``False``: no estimate, no extra
      cost);
    * ``target``: a relative error of J to reach (e.g. ``1e-3``), or ``None``: then the grid is
      refined in space and time (and the box widened when mass reaches a wall) until Roache's
      GCI of J is below it, within ``budget`` seconds of wall-clock time;
    * ``max_cells``: the largest number of cells × (steps + 1) the refinement may use.
    """

    estimate: bool = True
    companions: int = 2
    target: float | None = None
    budget: float = 900.0
    max_cells: int = 50_000_000

    def __post_init__(self) -> None:
        checks = [
            ("estimate", isinstance(self.estimate, bool)),
            ("companions", self.companions in (1, 2) and not isinstance(self.companions, bool)),
            ("target", self.target is None or (isinstance(self.target, (int, float))
                                                and not isinstance(self.target, bool)
                                                and 0 < self.target < 1)),
            ("budget", isinstance(self.budget, (int, float)) and self.budget > 0),
            ("max_cells", isinstance(self.max_cells, int) and self.max_cells > 0),
        ]
        for name, ok in checks:
            if not ok:
                raise InputError(f"accuracy option {name} has an invalid value "
                                 f"{getattr(self, name)!r}")


# a solve of ``problem`` started from ``warm`` (None: cold). For the companion solves of an
# estimate the last argument is a callback to pass to the solver's outer loop (it raises
# :class:`OverTime` past the estimate's time limit), None for the solve the user asked for.
Solve = Callable[[BridgeProblem, "BridgeResult | None", "Callable[[Any], None] | None"],
                 BridgeResult]


class OverTime(MFBridgeError):
    """A companion solve ran past the share of time it was given."""


def coarser(problem: BridgeProblem, factor: int = RATIO) -> BridgeProblem | None:
    """The problem on the same box with ``factor`` times fewer cells per axis and steps
    (rounded), or None when that grid would have fewer than ``MIN_COMPANION_CELLS`` cells on
    an axis or fewer than ``MIN_COMPANION_STEPS`` steps. The endpoints are evaluated on the new
    cells (:meth:`~mfbridge.model.problem.BridgeProblem.on_grid`), or, if they are too narrow
    for them, moved there from the finer cells."""
    grid = problem.grid
    shape = tuple(max(1, round(n / factor)) for n in grid.shape)
    steps = max(1, round(problem.steps / factor))
    if min(shape) < MIN_COMPANION_CELLS or steps < MIN_COMPANION_STEPS:
        return None
    target = Grid(grid.lower, grid.upper, shape)
    try:
        return problem.on_grid(target, steps)
    except InputError:
        return dataclasses.replace(problem, grid=target, steps=steps,
                                   initial=grid.remap(problem.initial, target),
                                   final=grid.remap(problem.final, target), sources=None)


def effective_ratio(fine: BridgeProblem, coarse: BridgeProblem) -> float:
    """Mean refinement ratio of cell widths (per axis) and time step (2 on nested grids)."""
    ratios = [hc / hf for hc, hf in zip(coarse.grid.spacing, fine.grid.spacing, strict=True)]
    ratios.append(coarse.dt / fine.dt)
    return float(np.mean(ratios))


def series_coarser(problem: SeriesProblem, factor: int = RATIO) -> SeriesProblem | None:
    """The series on the same box with ``factor`` times fewer cells per axis and steps
    (rounded), the snapshots' masses moved to the new cells (:meth:`~mfbridge.model.grid.Grid.
    remap`); None when a segment would get fewer than ``MIN_COMPANION_STEPS`` steps or an axis
    fewer than ``MIN_COMPANION_CELLS`` cells."""
    grid = problem.grid
    shape = tuple(max(1, round(n / factor)) for n in grid.shape)
    steps = max(1, round(problem.steps / factor))
    if min(shape) < MIN_COMPANION_CELLS or steps < MIN_COMPANION_STEPS * len(problem.segments()):
        return None
    target = Grid(grid.lower, grid.upper, shape)
    coarse = dataclasses.replace(
        problem, grid=target, steps=steps,
        snapshots=tuple(Snapshot(s.time, grid.remap(s.law, target)) for s in problem.snapshots))
    return coarse if min(coarse.steps_per_segment) >= MIN_COMPANION_STEPS else None


def series_solve(solve: Solve) -> Solve:
    """The :data:`Solve` of a series from the :data:`Solve` of one bridge: the segments one
    after the other in this process (each from its own part of the warm start, a list of
    segment results), joined (:func:`~mfbridge.solvers.series.join`)."""

    def run(problem: Any, warm: Any, companion: Callable[[Any], None] | None) -> BridgeResult:
        parts = problem.segments()
        starts = warm if warm is not None else [None] * len(parts)
        return join(problem.times, [solve(p, w, companion)
                                    for p, w in zip(parts, starts, strict=True)])

    return run


def _warm(result: BridgeResult, problem: BridgeProblem | SeriesProblem
          ) -> BridgeResult | list[BridgeResult]:
    """:func:`transfer` of ``result`` to ``problem``; for a series, segment by segment."""
    if isinstance(problem, SeriesProblem):
        parts = split_joined(result) if result.segments else [
            dataclasses.replace(result, times=result.times - result.times[0])]
        return [transfer(r, p) for r, p in zip(parts, problem.segments(), strict=True)]
    return transfer(result, problem)


def _at_times(values: np.ndarray, times: np.ndarray, new_times: np.ndarray) -> np.ndarray:
    """Slices of ``values`` (leading axis over ``times``) at ``new_times``: the slice itself
    where a node coincides, linear interpolation in time otherwise."""
    out = np.empty((len(new_times), *values.shape[1:]))
    close = 1e-9 * float(times[-1] - times[0])
    for i, t in enumerate(new_times):
        j = int(np.clip(np.searchsorted(times, t), 1, len(times) - 1))
        if abs(times[j] - t) <= close or abs(times[j - 1] - t) <= close:
            out[i] = values[j] if abs(times[j] - t) <= close else values[j - 1]
            continue
        w = (t - times[j - 1]) / (times[j] - times[j - 1])
        with np.errstate(invalid="ignore"):
            out[i] = (1 - w) * values[j - 1] + w * values[j]
    return out


@dataclass(frozen=True)
class Difference:
    """How a result differs from a coarser one: J, and the largest L1 distance of the cell
    masses (on the coarse cells) and Euclidean distance of the means over the coarse times."""

    cost: float
    density_l1: float
    mean: float


def difference(fine: BridgeResult, coarse: BridgeResult) -> Difference:
    """``fine`` minus ``coarse``: J, the density flow (L1) and the mean path (see
    :class:`Difference`); the fine flow is moved to the coarse cells and times."""
    masses = fine.grid.remap(fine.masses, coarse.grid)
    masses = _at_times(masses, fine.times, coarse.times)
    axes = tuple(range(1, coarse.grid.dim + 1))
    l1 = float(np.abs(masses - coarse.masses).sum(axis=axes).max())
    mean = _at_times(fine.mean, fine.times, coarse.times)
    return Difference(fine.cost - coarse.cost, l1,
                      float(np.linalg.norm(mean - coarse.mean, axis=-1).max()))


def observed_order(d21: float, d32: float, ratio: float) -> float:
    """Order p from the differences J_2 - J_1 and J_3 - J_2 of three grids in ratio ``ratio``:
    :math:`p = \\log(d_{32}/d_{21})/\\log r`; NaN when they differ in sign or vanish
    (oscillatory or converged to round-off)."""
    if d21 == 0 or d32 == 0 or (d21 > 0) != (d32 > 0):
        return math.nan
    return math.log(d32 / d21) / math.log(ratio)


def combine(fine: BridgeResult, companions: list[BridgeResult], ratio: float,
            records: list[dict[str, object]], seconds: float, note: str = ""
            ) -> ErrorEstimate:
    """The :class:`~mfbridge.result.ErrorEstimate` of ``fine`` from its companions (finest
    first, each coarser by ``ratio``); see the module docstring for the rules."""
    d1 = difference(fine, companions[0])
    p_obs = math.nan
    if len(companions) > 1:
        d2 = difference(companions[0], companions[1])
        p_obs = observed_order(-d1.cost, -d2.cost, ratio)
    asymptotic = None if len(companions) < 2 else bool(abs(p_obs - ORDER) <= ORDER_BAND)
    if asymptotic:
        order, safety = min(p_obs, ORDER), SAFETY_THREE_GRIDS
    else:
        order, safety = ORDER, SAFETY_TWO_GRIDS
        if len(companions) > 1:
            why = ("the differences change sign" if math.isnan(p_obs)
                   else f"observed order {p_obs:.2f}, the scheme's is {ORDER:g}")
            note = (note + "; " if note else "") + (
                f"not in the asymptotic range ({why}): order {ORDER:g} assumed, safety factor "
                f"{SAFETY_TWO_GRIDS:g}; refine to make the estimate reliable")
        else:
            note = (note + "; " if note else "") + (
                f"one companion grid: order {ORDER:g} assumed, safety factor "
                f"{SAFETY_TWO_GRIDS:g}")
    factor = ratio**order - 1
    error = abs(d1.cost) / factor
    extrapolated = fine.cost + d1.cost / factor
    scale = abs(fine.cost) if fine.cost != 0 else math.nan
    return ErrorEstimate(
        cost_error=error,
        cost_relative=error / scale,
        cost_extrapolated=extrapolated,
        gci=safety * error / scale,
        safety_factor=safety,
        density_l1=d1.density_l1 / factor,
        mean_error=d1.mean / factor,
        observed_order=p_obs,
        order=order,
        asymptotic=asymptotic,
        grids=records,
        seconds=seconds,
        note=note,
        scheme_order=ORDER,
    )


def estimate_error(problem: BridgeProblem | SeriesProblem, fine: BridgeResult, solve: Solve,
                   companions: int = 2, time_limit: float | None = None) -> ErrorEstimate:
    """Solve ``problem`` on ``companions`` coarser grids (each coarser by ``RATIO`` than the
    previous, started from the finer solution) and estimate the discretisation error of
    ``fine`` (its solution on ``problem.grid``). A companion that cannot be set up (too few
    cells), raises an error, does not converge, or runs beyond ``time_limit`` CPU seconds (all
    companions together) ends the ladder there; with none left the estimate is NaN and its note
    says why. A series of snapshots (``fine`` its joined result, ``solve`` e.g.
    :func:`series_solve`) is treated as one problem: its companions are the series on the
    coarser grids (:func:`series_coarser`), and J is the sum over the segments."""
    start = time.perf_counter()
    deadline = math.inf if time_limit is None else time.process_time() + time_limit

    def watch(_: Any) -> None:
        if time.process_time() > deadline:
            raise OverTime(f"over the estimate's time limit of {time_limit:.3g} CPU s")

    results: list[BridgeResult] = []
    records: list[dict[str, Any]] = []
    note = ""
    current, previous = problem, fine
    ratio = float(RATIO)
    for _ in range(companions):
        nxt = series_coarser(current) if isinstance(current, SeriesProblem) else coarser(current)
        label = "" if nxt is None else f"{_shape_text(nxt)}"
        if nxt is None:
            note = f"a grid coarser than {_shape_text(current)} would be too small"
            break
        t0 = time.perf_counter()
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                res = solve(nxt, _warm(previous, nxt), watch)
        except OverTime as exc:
            note = f"the companion on {label} stopped: {exc}"
            break
        except (MFBridgeError, ArithmeticError, ValueError, RuntimeError,
                np.linalg.LinAlgError) as exc:  # RuntimeError: e.g. SuperLU's singular factor
            note = f"the companion on {label} failed: {exc}"
            break
        records.append({"shape": list(nxt.grid.shape), "steps": nxt.steps, "cost": res.cost,
                        "status": res.status, "iterations": res.iterations,
                        "seconds": time.perf_counter() - t0})
        if res.status != "converged":
            note = f"the companion on {label} ended {res.status.replace('_', ' ')}"
            break
        if not results:
            ratio = (effective_ratio(current.segment(0), nxt.segment(0))
                     if isinstance(current, SeriesProblem) and isinstance(nxt, SeriesProblem)
                     else effective_ratio(current, nxt))
        results.append(res)
        current, previous = nxt, res
    elapsed = time.perf_counter() - start
    if not results:
        return unavailable(note or "no companion grid", records, elapsed)
    return combine(fine, results, ratio, records, elapsed, note)


def unavailable(note: str, records: list[dict[str, Any]] | None = None,
                seconds: float = 0.0) -> ErrorEstimate:
    """An :class:`~mfbridge.result.ErrorEstimate` with no numbers (NaN) and the reason."""
    nan = math.nan
    return ErrorEstimate(nan, nan, nan, nan, nan, nan, nan, nan, nan, None, records or [],
                         seconds, note)


def _shape_text(problem: BridgeProblem) -> str:
    return f"{' x '.join(map(str, problem.grid.shape))} cells x {problem.steps} steps"


def transfer(result: BridgeResult, problem: BridgeProblem) -> BridgeResult:
    """``result`` moved to the grid and time nodes of ``problem`` (a warm start there, coarser
    or finer): masses conservatively (:meth:`~mfbridge.model.grid.Grid.remap`), the potentials
    and the correction as overlap-weighted cell averages, times by linear interpolation. Only
    the fields a warm start reads are meaningful; the moments and the control are zero."""
    src, dst = result.grid, problem.grid
    times = problem.times

    def average(values: np.ndarray) -> np.ndarray:
        finite = np.where(np.isfinite(values), values, 0.0)
        weight = src.remap(np.isfinite(values).astype(float), dst)
        with np.errstate(invalid="ignore", divide="ignore"):
            out = src.remap(finite, dst) / weight
        return _at_times(np.where(weight > 0, out, -np.inf), result.times, times)

    masses = _at_times(src.remap(result.masses, dst), result.times, times)
    axes = tuple(range(1, dst.dim + 1))
    masses /= masses.sum(axis=axes, keepdims=True)
    correction = np.nan_to_num(average(np.nan_to_num(result.correction)), neginf=0.0)
    return dataclasses.replace(
        result, grid=dst, times=times, density=masses / dst.cell_volume,
        control=np.zeros((len(times), *dst.shape, dst.dim)),
        log_forward=average(result.log_forward), log_backward=average(result.log_backward),
        correction=correction, mean=np.zeros((len(times), dst.dim)),
        cov=np.zeros((len(times), dst.dim, dst.dim)), free_energy=np.zeros(len(times)),
        entropy=np.zeros(len(times)), coupling=None, alternatives=[], error=None)


def _companion_time(solve_seconds: float) -> float:
    """CPU seconds the companions of a solve that took ``solve_seconds`` CPU seconds may use."""
    return max(COMPANION_FLOOR, COMPANION_TIME * solve_seconds)


def solve_with_estimate(problem: BridgeProblem, solve: Solve,
                        options: AccuracyOptions | None = None) -> BridgeResult:
    """Solve ``problem`` and, unless ``options.estimate`` is False, attach the error estimate
    from ``options.companions`` companion solves (:func:`estimate_error`; together they may take
    at most ``COMPANION_TIME`` times the solve's CPU time, :func:`_companion_time`); with a
    ``target``, refine until it is met (:func:`solve_to_target`)."""
    options = options or AccuracyOptions()
    notes = advise_before(problem)
    if options.target is not None:
        result = solve_to_target(problem, solve, options)
        notes += result.advice
    else:
        t0 = time.process_time()
        result = solve(problem, None, None)
        solve_seconds = time.process_time() - t0
        if options.estimate and result.status not in ESTIMATED:
            # the iterate is not a bridge: companions would only spend time
            result.error = unavailable(f"the solve ended {result.status.replace('_', ' ')}")
        elif options.estimate:
            result.error = estimate_error(problem, result, solve, options.companions,
                                          time_limit=_companion_time(solve_seconds))
            result.timings["estimate"] = result.error.seconds
            say_if_missing(result)
        notes += advise_after(problem, result)
    result.advice = notes
    return result


def series_estimate(problem: SeriesProblem, result: BridgeResult, options: SolverOptions,
                    accuracy: AccuracyOptions, solve_seconds: float) -> ErrorEstimate:
    """The error estimate of the joined ``result`` of a series (:func:`estimate_error` with the
    segments solved one after the other, :func:`series_solve`, under the companion options of
    :func:`fixed_point_solve`): J is the sum over the segments, the density flow and the mean
    path are compared over the whole span. ``solve_seconds``: the CPU time of the series'
    solve (the segments' own times when they ran in other processes), which sets the
    companions' time limit."""
    if result.status not in ESTIMATED:
        return unavailable(f"the solve ended {result.status.replace('_', ' ')}")
    spent = max(solve_seconds, float(result.timings.get("total", 0.0)))
    return estimate_error(problem, result, series_solve(fixed_point_solve(options)),
                          accuracy.companions, time_limit=_companion_time(spent))


def say_if_missing(result: BridgeResult) -> None:
    """A result estimated without numbers (no companion could be solved) says so in its
    message, where the status is read."""
    if result.error is not None and not math.isfinite(result.error.cost_error):
        result.message += (f"; no discretisation-error estimate: "
                           f"{result.error.note or 'no companion grid'}")


def advise_before(problem: BridgeProblem) -> list[str]:
    """:func:`mfbridge.solvers.advice.before`, each finding also issued as a
    :class:`~mfbridge.errors.GridWarning`; the list is returned, prefixed "before: "."""
    found = [f"before the solve: {text}" for text in advice.before(problem)]
    for text in found:
        warnings.warn(GridWarning(text), stacklevel=3)
    return found


def advise_after(problem: BridgeProblem, result: BridgeResult) -> list[str]:
    """:func:`mfbridge.solvers.advice.after` on ``result``, as :func:`advise_before`."""
    found = [f"after the solve: {text}" for text in advice.after(problem, result)]
    for text in found:
        warnings.warn(GridWarning(text), stacklevel=3)
    return found


def fixed_point_solve(options: SolverOptions | None = None,
                      callback: Callable[[Iteration], None] | None = None,
                      warm_start: BridgeResult | None = None,
                      problem: BridgeProblem | None = None) -> Solve:
    """The :data:`Solve` of the fixed-point solver with ``options``: the solve the user asked
    for gets ``callback`` and, for ``problem`` itself, ``warm_start``; the companions get one
    start, no coupling, the operator route when the route is ``auto``, the tolerance
    ``max(tol, COMPANION_TOL)`` and the estimate's time watch as callback. A companion of a
    flow that did not need log-domain propagation (``warm``, the finer flow moved to its grid)
    does not move to it either: a coarse grid can lose a far tail that the finer one kept, and
    the log domain then costs several times the solve (the double well with a Gaussian core,
    σ = 1, 512 cells × 100 steps: solve 1.9 CPU s, its 256 × 50 companion 12.3 CPU s in the log
    domain); the estimate stops there with a note instead (:class:`OverTime`)."""
    options = options or SolverOptions()
    # a companion is solved by the solver its start came from: a result of the direct solver
    # (the fixed point's fallback, mfbridge.solvers.cross_check) has direct companions, and a
    # fixed-point companion never switches solver (the estimate compares one discretisation)
    companion_options = dataclasses.replace(
        options, starts=1, coupling=False, tol=max(options.tol, COMPANION_TOL),
        route="operator" if options.route == "auto" else options.route, cross_check="off")
    rational_options = dataclasses.replace(
        companion_options,
        propagation="rational" if options.propagation == "auto" else options.propagation)

    def solve(pr: BridgeProblem, warm: BridgeResult | None,
              companion: Callable[[Any], None] | None) -> BridgeResult:
        if companion is None:
            own = warm_start if warm is None and pr is problem else warm
            return solve_bridge(pr, options, callback, warm_start=own)
        if warm is not None and warm.method == "direct":
            from mfbridge.solvers.direct import solve_direct

            return solve_direct(pr, None, lambda *args: companion(args))
        if warm is None or LOG_DOMAIN_NOTE in warm.message:
            return solve_bridge(pr, companion_options, companion, warm_start=warm)
        try:
            return solve_bridge(pr, rational_options, companion, warm_start=warm)
        except UnderflowError as exc:
            raise OverTime("it needs log-domain propagation, which the finer solve did not "
                           "(several times its cost): skipped") from exc

    return solve


def solve_and_estimate(problem: BridgeProblem, options: SolverOptions | None = None,
                       accuracy: AccuracyOptions | None = None, *,
                       callback: Callable[[Iteration], None] | None = None,
                       warm_start: BridgeResult | None = None) -> BridgeResult:
    """:func:`~mfbridge.solvers.fixed_point.solve_bridge` with the discretisation-error
    estimate of ``accuracy`` (default: two companions) in ``result.error``, or, with
    ``accuracy.target``, refined until the target is met (:func:`solve_to_target`)."""
    return solve_with_estimate(problem, fixed_point_solve(options, callback, warm_start,
                                                          problem), accuracy)


def wall_mass(result: BridgeResult) -> list[tuple[int, int, float]]:
    """(axis, side, mass) for every wall next to which the flow puts more than
    ``WALL_MASS`` of its mass in the outermost layer of cells at some time (side 0: lower)."""
    out = []
    masses = result.masses
    for a in range(result.grid.dim):
        for side, index in ((0, 0), (1, -1)):
            layer = np.take(masses, index, axis=1 + a)
            mass = float(layer.reshape(len(masses), -1).sum(axis=1).max())
            if mass > WALL_MASS:
                out.append((a, side, mass))
    return out


def solve_to_target(problem: BridgeProblem, solve: Solve, options: AccuracyOptions
                    ) -> BridgeResult:
    r"""Refine until Roache's GCI of J is at most ``options.target`` (relative), within
    ``options.budget`` seconds: solve, estimate (:func:`estimate_error`), and if the estimate
    is above the target refine cells per axis and steps by the same factor
    :math:`f = 1.2\,(\mathrm{GCI}/\mathrm{target})^{1/p}` (between 1.5 and 4; p the order
    used by the estimate), widening the box by a fifth of its extent on a side where the flow
    puts more than ``WALL_MASS`` of its mass in the outer cells (the cell width kept). Stops
    when the target is met, when the next grid's predicted time (the last one's times
    :math:`f^{d+1}`) would pass the budget, or at ``options.max_cells`` cells × (steps + 1).
    Returns the last result; its ``error`` records the grids tried and whether the target was
    met, and its message says what was chosen."""
    start = time.perf_counter()
    current, previous = problem, None
    tried: list[dict[str, Any]] = []
    while True:
        t0 = time.perf_counter()
        cpu = time.process_time()
        warm = None if previous is None else transfer(previous, current)
        result = solve(current, warm, None)
        solve_seconds = time.process_time() - cpu
        estimate = estimate_error(current, result, solve, options.companions,
                                  time_limit=_companion_time(solve_seconds))
        seconds = time.perf_counter() - t0
        gci = estimate.gci
        tried.append({"lower": list(current.grid.lower), "upper": list(current.grid.upper),
                      "shape": list(current.grid.shape), "steps": current.steps,
                      "cost": result.cost, "gci": None if not math.isfinite(gci) else gci,
                      "status": result.status, "seconds": seconds})
        walls = wall_mass(result)
        met = bool(math.isfinite(gci) and gci <= options.target and not walls)
        reason = "target met" if met else ""
        if not met:
            order = estimate.order if math.isfinite(estimate.order) else ORDER
            factor = 2.0 if not math.isfinite(gci) else 1.2 * (gci / options.target) ** (
                1 / order)
            factor = min(max(factor, 1.5), 4.0) if not (walls and gci <= options.target) else 1.0
            nxt = _refined(current, factor, walls)
            elapsed = time.perf_counter() - start
            predicted = seconds * max(factor, 1.0) ** (current.grid.dim + 1) * (
                nxt.grid.size / current.grid.size) / max(factor, 1.0) ** current.grid.dim
            if result.status != "converged":
                reason = f"stopped: the solve ended {result.status.replace('_', ' ')}"
            elif nxt.grid.size * (nxt.steps + 1) > options.max_cells:
                reason = (f"stopped: the next grid ({_shape_text(nxt)}) is above max_cells = "
                          f"{options.max_cells}")
            elif elapsed + predicted > options.budget:
                reason = (f"stopped: the next grid ({_shape_text(nxt)}, about {predicted:.0f} s) "
                          f"would pass the budget of {options.budget:g} s")
        if reason:
            estimate = dataclasses.replace(
                estimate, target=options.target, target_met=met, tried=tried,
                seconds=time.perf_counter() - start)
            result.error = estimate
            box = box_text(current.grid.lower, current.grid.upper, ".4g")
            text = (f"target relative error {options.target:g} of J "
                    f"{'met' if met else 'not met'} on {_shape_text(current)} on {box} "
                    f"({reason}; GCI {gci:.2g}; grids tried: "
                    + ", ".join(f"{'x'.join(map(str, t['shape']))}x{t['steps']}" for t in tried)
                    + ")")
            result.message = f"{result.message}; {text}"
            result.timings["accuracy"] = time.perf_counter() - start
            if not met:
                warnings.warn(TargetNotMetWarning(text), stacklevel=2)
            result.advice = advise_after(current, result)
            return result
        current, previous = nxt, result


def _refined(problem: BridgeProblem, factor: float, walls: list[tuple[int, int, float]]
             ) -> BridgeProblem:
    """``problem`` with cells per axis and steps times ``factor`` (rounded up), the box widened
    by a fifth of its extent on each side in ``walls`` (cells added at the new cell width)."""
    grid = problem.grid
    lower, upper = list(grid.lower), list(grid.upper)
    for a, side, _ in walls:
        widen = 0.2 * (grid.upper[a] - grid.lower[a])
        if side == 0:
            lower[a] -= widen
        else:
            upper[a] += widen
    shape = []
    for a, n in enumerate(grid.shape):
        h = grid.spacing[a] / factor
        shape.append(max(n, math.ceil((upper[a] - lower[a]) / h - 1e-9)))
    steps = max(problem.steps, math.ceil(problem.steps * factor - 1e-9))
    return problem.on_grid(Grid(tuple(lower), tuple(upper), tuple(shape)), steps)
