"""Wall-clock budget and heartbeat of one long computation.

A :class:`Clock` is created when a solve starts. Long loops call :meth:`Clock.tick` often (every
Sinkhorn sweep step); it raises :class:`BudgetSpent` once the budget is used up, and calls the
owner's ``beat`` function when no progress line has been written for ``heartbeat`` seconds, so
a user sees a line at least every few seconds even inside one slow iteration. The owner catches
:class:`BudgetSpent` and returns its best answer so far; the exception never leaves the solver.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable

HEARTBEAT = 3.0  # seconds without a progress line after which tick() calls beat()


class BudgetSpent(Exception):
    """The time budget of the computation is used up (caught by the solver that owns it)."""


class Clock:
    """Time since the start, what is left of ``budget`` seconds (``None``: no limit), and the
    heartbeat."""

    def __init__(self, budget: float | None = None, heartbeat: float = HEARTBEAT) -> None:
        self.start = time.perf_counter()
        self.budget = math.inf if budget is None else float(budget)
        self.heartbeat = heartbeat
        self.beat: Callable[[float], None] | None = None
        self._last_line = self.start

    def elapsed(self) -> float:
        return time.perf_counter() - self.start

    def left(self) -> float:
        return self.budget - self.elapsed()

    @property
    def spent(self) -> bool:
        return self.elapsed() > self.budget

    def mark(self) -> None:
        """A progress line was just written: the heartbeat waits ``heartbeat`` seconds again."""
        self._last_line = time.perf_counter()

    def tick(self) -> None:
        """Raise :class:`BudgetSpent` when the budget is used up; call ``beat(elapsed)`` when
        no line was written for ``heartbeat`` seconds."""
        now = time.perf_counter()
        if now - self.start > self.budget:
            raise BudgetSpent
        if self.beat is not None and now - self._last_line >= self.heartbeat:
            self._last_line = now
            self.beat(now - self.start)


def remaining_estimate(residuals: list[float], seconds: list[float], target: float,
                       window: int = 6) -> float:
    """Seconds until ``target`` if the residual keeps falling at its recent geometric rate.

    Uses the last ``window`` residuals (and their iterations' seconds): with rate
    r = (last/first)^(1/(m-1)) < 1, about log(last/target)/log(1/r) more iterations at their
    mean duration. NaN when fewer than three residuals, no recent decrease, or non-finite.
    """
    res = [r for r in residuals[-window:] if math.isfinite(r) and r > 0]
    if len(res) < 3 or res[-1] <= target:
        return 0.0 if res and res[-1] <= target else math.nan
    rate = (res[-1] / res[0]) ** (1.0 / (len(res) - 1))
    if not rate < 1.0:
        return math.nan
    per_iteration = sum(seconds[-window:]) / len(seconds[-window:])
    return math.log(res[-1] / target) / -math.log(rate) * per_iteration
