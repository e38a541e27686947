"""Exit codes of ``mfbridge``: what a shell or a scheduler can tell from a run without reading
its files.

======  ==================================================================================
code    meaning
======  ==================================================================================
0       converged (a sweep: every job converged, or was complete already and converged)
1       internal error: an unexpected exception (a bug), with its traceback
2       refused before any numerical work: bad input, a run folder that must not be
        written (another config's run, foreign or edited result files, a file, a folder
        another live process is computing into), not enough memory or disk
3       not converged (iteration limit, time budget, stalled marginal error)
4       diverged (the iteration blew up; the last finite iterate is saved)
5       suspect (stopped as converged, but a sanity check failed)
6       failed: an error during the run (a solver error, the disk filled up while saving)
130     interrupted by SIGINT (Ctrl-C); 143: interrupted by SIGTERM (128 + signal number)
======  ==================================================================================

A sweep goes on after a job that does not converge, fails or is refused, and exits with the
code of its most severe job, in the order of :data:`SEVERITY` (interrupted first).
"""

from __future__ import annotations

import signal
from collections.abc import Iterable

from mfbridge.result import STATUSES

#: exit code of each terminal status of a run (solve statuses and run statuses)
EXIT_CODES: dict[str, int] = {
    **dict(zip(STATUSES, (0, 3, 4, 5), strict=True)),
    "refused": 2,
    "failed": 6,
}
INTERNAL_ERROR = 1
#: statuses from the most to the least severe (a sweep exits with the first one present)
SEVERITY: tuple[str, ...] = ("interrupted", "failed", "refused", "diverged", "suspect",
                             "not_converged", "converged")


def signal_exit_code(signum: int) -> int:
    """128 + the signal number, the shells' convention (SIGINT 130, SIGTERM 143)."""
    return 128 + int(signum)


def exit_code(status: str, signum: int = signal.SIGTERM) -> int:
    """The exit code of a run that ended with ``status`` (``signum``: the signal that
    interrupted it, for status ``"interrupted"``)."""
    if status == "interrupted":
        return signal_exit_code(signum)
    return EXIT_CODES.get(status, INTERNAL_ERROR)


def sweep_exit_code(statuses: Iterable[str], signum: int = signal.SIGTERM) -> int:
    """The exit code of a sweep whose jobs ended with ``statuses``: that of the most severe."""
    present = set(statuses)
    for status in SEVERITY:
        if status in present:
            return exit_code(status, signum)
    return INTERNAL_ERROR if present else 0
