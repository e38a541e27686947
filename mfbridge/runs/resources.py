"""Memory: the estimate of a solve against what the machine can give, checked before allocating.

:func:`check_memory` is called by :func:`mfbridge.runs.api.solve` (and so by every command-line
run) after the grid and solver options are built and before anything of size n or (K+1) × n
is: it logs the estimate of :func:`mfbridge.solvers.memory.estimate` on every run and raises
:class:`MemoryRefusal` (an :class:`~mfbridge.errors.InputError`: status ``refused``, exit 2)
when it exceeds the memory available to this process, with the estimate, what is available,
and what to change. Available is the smallest of the kernel's ``MemAvailable``, the room left
under the cgroup's ``memory.max`` (containers, SLURM jobs) and the room left under the address
space limit (``ulimit -v``, ``prlimit --as``). Jobs of a parallel sweep are each checked against
what is available when they start.
"""

from __future__ import annotations

import logging
import resource
from pathlib import Path

from mfbridge.errors import InputError, MFBridgeError
from mfbridge.solvers.memory import MemoryEstimate, format_bytes

log = logging.getLogger("mfbridge")


class MemoryRefusal(InputError):
    """A solve would need more memory than the machine can give this process."""


class OutOfMemory(MFBridgeError):
    """An allocation failed during a run that the estimate let through (another process took
    the memory meanwhile, or the estimate was low): the run is recorded ``failed``."""


def out_of_memory(exc: MemoryError) -> OutOfMemory:
    """The :class:`OutOfMemory` error for ``exc``, with what is available now and advice."""
    have, source = available_memory()
    now = "unknown" if have is None else f"{format_bytes(have)} ({source})"
    return OutOfMemory(
        f"out of memory during the run ({exc or 'MemoryError'}); available now: {now}. The "
        "estimate logged at the start fitted, so other processes may have taken the memory "
        "since: run it again when more memory is free, or use fewer cells (grid.shape) or "
        "fewer time steps (steps)")


def _meminfo(key: str) -> int | None:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith(key + ":"):
                return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def _read_int(path: Path) -> int | None:
    try:
        text = path.read_text().strip()
    except OSError:
        return None
    return int(text) if text.isdigit() else None


def _vm_size() -> int | None:
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmSize:"):
                return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def available_memory() -> tuple[int | None, str]:
    """Bytes this process can still allocate, and which limit sets it (``None``: unknown)."""
    found: list[tuple[int, str]] = []
    free = _meminfo("MemAvailable")
    if free is not None:
        found.append((free, "MemAvailable of the machine"))
    cgroup = Path("/sys/fs/cgroup")
    limit, used = _read_int(cgroup / "memory.max"), _read_int(cgroup / "memory.current")
    if limit is not None and used is not None:
        found.append((max(limit - used, 0), "room under the cgroup's memory.max"))
    soft, _ = resource.getrlimit(resource.RLIMIT_AS)
    size = _vm_size()
    if soft != resource.RLIM_INFINITY and size is not None:
        found.append((max(soft - size, 0), "room under the address-space limit (ulimit -v)"))
    return min(found) if found else (None, "unknown")


def log_unestimated(what: str) -> None:
    """Log that the memory of a run with ``what`` is not estimated, and what is available."""
    have, source = available_memory()
    log.info("memory estimate: none for %s (only the fixed-point solver on a mfbridge Grid is "
             "modelled); available %s (%s)", what,
             "unknown" if have is None else format_bytes(have), source)


def check_memory(need: MemoryEstimate, coupling: bool = False) -> None:
    """Log ``need`` and the memory available; raise :class:`MemoryRefusal` when it does not
    fit."""
    have, source = available_memory()
    log.info("memory estimate: %s; available %s (%s)", need.describe(),
             "unknown" if have is None else format_bytes(have), source)
    if have is None or need.total <= have:
        return
    advice = ["fewer cells (grid.shape)", "fewer time steps (steps)"]
    if need.route == "dense":
        advice.append("solver.route=operator (the dense route holds an n x n kernel)")
    if coupling:
        advice.append("solver.coupling=false (the coupling is n x n)")
    raise MemoryRefusal(
        f"not enough memory: this run needs about {need.describe()}, and this process can "
        f"get {format_bytes(have)} ({source}); nothing was allocated. Use "
        + ", ".join(advice[:-1]) + f" or {advice[-1]}")
