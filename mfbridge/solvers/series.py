r"""Bridges through a series of snapshots: one bridge per pair of consecutive snapshots.

Given the snapshots, the segments are independent (the rate function is additive over time intervals
given the marginals at the split times: Dawson & Gärtner, Stochastics 1987), so each is solved on
its own by :func:`~mfbridge.solvers.fixed_point.solve_bridge`, in parallel processes when asked.
:class:`SeriesResult` keeps the segments' results; :meth:`SeriesResult.joined` glues them into one
:class:`~mfbridge.result.BridgeResult` over :math:`[t_0, t_m]` whose cost is :math:`\sum_k J_k` and
whose ``segments`` list the per-segment costs and statuses.

Joining: at an inner snapshot time both neighbouring segments have a node; the joined flow keeps
the later segment's (its density is the snapshot; its control is the one that leaves it), so the
joined control is right-continuous in time.
"""

from __future__ import annotations

import dataclasses
import pickle
from collections.abc import Callable, Sequence
from concurrent.futures import Executor
from dataclasses import dataclass

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.problem import BridgeProblem
from mfbridge.model.series import SeriesProblem
from mfbridge.result import BridgeResult, Segment
from mfbridge.solvers.fixed_point import Iteration, SolverOptions, solve_bridge

__all__ = ["SeriesResult", "solve_series", "split_joined"]

# worst first: the joined result takes the worst status of its segments
_SEVERITY = ("diverged", "not_converged", "suspect", "converged")


@dataclass
class SeriesResult:
    """The bridges between consecutive snapshots of a :class:`~mfbridge.model.series.SeriesProblem`.

    ``segments[k]`` is the bridge from snapshot k to k + 1 on its own clock (starting at 0).
    """

    problem: SeriesProblem
    segments: list[BridgeResult]

    @property
    def costs(self) -> list[float]:
        """J of each segment."""
        return [float(r.cost) for r in self.segments]

    @property
    def cost(self) -> float:
        r""":math:`\sum_k J_k`."""
        return float(sum(self.costs))

    @property
    def status(self) -> str:
        """The worst status of the segments."""
        return _worst([r.status for r in self.segments])

    def joined(self) -> BridgeResult:
        """One :class:`~mfbridge.result.BridgeResult` over :math:`[t_0, t_m]` (see the module
        docstring); a single segment is returned with its clock shifted to :math:`t_0`."""
        return join(self.problem.times, self.segments)


def _worst(statuses: Sequence[str]) -> str:
    ranked = [_SEVERITY.index(s) if s in _SEVERITY else 0 for s in statuses]
    return _SEVERITY[min(ranked)]


def join(times: np.ndarray, parts: Sequence[BridgeResult]) -> BridgeResult:
    """Glue segment results (segment k from ``times[k]`` to ``times[k+1]``) into one result."""
    m = len(parts)
    keep = [slice(0, -1)] * (m - 1) + [slice(None)]

    def cat(name: str) -> np.ndarray:
        return np.concatenate([getattr(r, name)[s] for r, s in zip(parts, keep, strict=True)])

    joined_times = np.concatenate([times[k] + np.asarray(r.times)[s]
                                   for k, (r, s) in enumerate(zip(parts, keep, strict=True))])
    segments, first = [], 0
    history: list[dict[str, float]] = []
    for k, r in enumerate(parts):
        steps = len(r.times) - 1
        segments.append(Segment(start=float(times[k]), end=float(times[k + 1]), first=first,
                                steps=steps, cost=float(r.cost),
                                cost_kinetic=float(r.cost_kinetic),
                                cost_drift=float(r.cost_drift),
                                cost_free_energy=float(r.cost_free_energy),
                                status=r.status, message=r.message,
                                iterations=int(r.iterations)))
        first += steps
        history.extend({**row, "segment": float(k)} for row in r.history)
    status = _worst([r.status for r in parts])
    if m == 1:
        message = parts[0].message
    else:
        message = "; ".join(f"segment {k} [{times[k]:g}, {times[k + 1]:g}]: {r.message}"
                            for k, r in enumerate(parts))
    timings = {key: float(sum(r.timings.get(key, 0.0) for r in parts))
               for key in sorted({key for r in parts for key in r.timings})}
    base = parts[0]
    return dataclasses.replace(
        base,
        times=joined_times,
        density=cat("density"), control=cat("control"), log_forward=cat("log_forward"),
        log_backward=cat("log_backward"), correction=cat("correction"), mean=cat("mean"),
        cov=cat("cov"), free_energy=cat("free_energy"), entropy=cat("entropy"),
        cost=float(sum(r.cost for r in parts)),
        cost_kinetic=float(sum(r.cost_kinetic for r in parts)),
        cost_drift=float(sum(r.cost_drift for r in parts)),
        cost_free_energy=float(sum(r.cost_free_energy for r in parts)),
        status=status, message=message,
        iterations=int(sum(r.iterations for r in parts)),
        residual=float(max(r.residual for r in parts)),
        marginal_error=float(max(r.marginal_error for r in parts)),
        history=history, timings=timings,
        coupling=None if m > 1 else base.coupling,
        alternatives=[] if m > 1 else base.alternatives,
        segments=segments if m > 1 else [],
    )


def split_joined(result: BridgeResult) -> list[BridgeResult]:
    """The segments of a joined result, each on its own clock (for warm starts). The end node of
    every segment but the last is taken from the next segment's first node (the same snapshot);
    its backward potential there is not stored and is set to zero (a cold Sinkhorn start)."""
    if not result.segments:
        return [result]
    out = []
    names = ("density", "control", "log_forward", "log_backward", "correction", "mean", "cov",
             "free_energy", "entropy")
    for seg in result.segments:
        index = slice(seg.first, seg.first + seg.steps + 1)
        arrays = {name: np.array(getattr(result, name)[index]) for name in names}
        arrays["log_backward"][-1] = 0.0
        out.append(dataclasses.replace(
            result, times=np.asarray(result.times[index]) - seg.start, **arrays,
            cost=seg.cost, status=seg.status, message=seg.message, iterations=seg.iterations,
            history=[], segments=[]))
    return out


def _picklable(*objects: object) -> bool:
    try:
        pickle.dumps(objects)
    except Exception:  # a user's lambda in a potential, an open file...
        return False
    return True


def _solve_one(problem: BridgeProblem, options: SolverOptions,
               warm: BridgeResult | None) -> BridgeResult:
    return solve_bridge(problem, options, warm_start=warm)


def solve_series(
    problem: SeriesProblem,
    options: SolverOptions | None = None,
    warm_start: SeriesResult | BridgeResult | Sequence[BridgeResult] | None = None,
    callback: Callable[[int, Iteration], None] | None = None,
    executor: Executor | None = None,
) -> SeriesResult:
    """Solve the bridge of every segment of ``problem`` (see the module docstring).

    ``warm_start``: a previous :class:`SeriesResult` of the same series shape, a joined result
    (split by :func:`split_joined`) or a list of segment results; each segment starts from its
    own. ``callback(segment, iteration)`` receives every outer iteration when the segments are
    solved in this process; with an ``executor`` (e.g. a
    :class:`concurrent.futures.ProcessPoolExecutor`) the segments run in parallel and report
    nothing until they finish. Problems that cannot be sent to another process (a potential
    built from a lambda) are solved here.
    """
    options = options or SolverOptions()
    parts = problem.segments()
    warms = _warm_list(warm_start, len(parts))
    if executor is not None and len(parts) > 1 and _picklable(parts, options, warms):
        futures = [executor.submit(_solve_one, p, options, w)
                   for p, w in zip(parts, warms, strict=True)]
        results = [f.result() for f in futures]
    else:
        results = []
        for k, (p, w) in enumerate(zip(parts, warms, strict=True)):
            cb = None if callback is None else (lambda it, k=k: callback(k, it))
            results.append(solve_bridge(p, options, cb, warm_start=w))
    return SeriesResult(problem, results)


def _warm_list(warm: SeriesResult | BridgeResult | Sequence[BridgeResult] | None,
               n: int) -> list[BridgeResult | None]:
    if warm is None:
        return [None] * n
    if isinstance(warm, SeriesResult):
        items: list[BridgeResult] = list(warm.segments)
    elif isinstance(warm, BridgeResult):
        items = split_joined(warm)
    else:
        items = list(warm)
    if len(items) != n:
        raise InputError(f"the warm start has {len(items)} segments, the series has {n}")
    return list(items)
