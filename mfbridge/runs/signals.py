"""SIGTERM and SIGINT: stop cleanly, record what was stopped, say so in one line.

A run (:func:`mfbridge.runs.cli.run`) executes inside :func:`interruptible`: the first SIGTERM
or SIGINT raises :class:`Interrupted` in the main thread, the run writes ``interrupted`` into
its record (no completion marker) and releases its lock; later signals during that clean-up
are noted and ignored. The console entry point catches :class:`Interrupted`, prints one line
and exits with 128 + the signal number (130 for SIGINT, 143 for SIGTERM).

A sweep's parent process (the Hydra launcher) gets :func:`stop_workers` as well: its worker
processes (joblib/loky) are sent SIGTERM, so that each records its own job as interrupted,
and given :data:`GRACE_SECONDS` to exit before the parent raises :class:`Interrupted`, on which
joblib kills what is left and stops dispatching. The parent then marks any job still recorded
as ``running`` by a process that is gone (:func:`mfbridge.runs.folders.mark_interrupted`).
"""

from __future__ import annotations

import os
import signal
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager, suppress
from pathlib import Path
from types import FrameType

SIGNALS = (signal.SIGTERM, signal.SIGINT)
GRACE_SECONDS = 5.0


class Interrupted(KeyboardInterrupt):
    """A run or sweep was stopped by a signal (``signum``)."""

    def __init__(self, signum: int) -> None:
        self.signum = int(signum)
        super().__init__(f"interrupted by {signal.Signals(self.signum).name}")


def signal_of(exc: BaseException) -> int:
    """The signal an interruption came from (a plain KeyboardInterrupt is SIGINT)."""
    return exc.signum if isinstance(exc, Interrupted) else int(signal.SIGINT)


def _children(parent: int) -> list[int]:
    """Process ids whose parent is ``parent`` (from /proc; empty where there is none)."""
    found = []
    try:
        names = os.listdir("/proc")
    except OSError:
        return found
    for name in names:
        if not name.isdigit():
            continue
        try:
            stat = Path(f"/proc/{name}/stat").read_text()
        except OSError:
            continue
        if int(stat.rsplit(")", 1)[1].split()[1]) == parent:
            found.append(int(name))
    return found


def _cmdline(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode()
    except OSError:
        return ""


def stop_workers(grace: float = GRACE_SECONDS) -> int:
    """Send SIGTERM to this process's children (not the resource trackers of joblib and
    multiprocessing, which ignore it and leave when their parent does) and wait up to ``grace``
    seconds for them to exit; returns how many were signalled."""
    children = [pid for pid in _children(os.getpid())
                if "resource_tracker" not in _cmdline(pid) and _state(pid) != "Z"]
    for pid in children:
        with suppress(OSError):
            os.kill(pid, signal.SIGTERM)
    deadline = time.monotonic() + grace
    while time.monotonic() < deadline:
        alive = [pid for pid in children if Path(f"/proc/{pid}").exists()
                 and "Z" not in _state(pid)]
        if not alive:
            break
        time.sleep(0.05)
    return len(children)


def _state(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return "Z"


@contextmanager
def interruptible(before_raise: Callable[[], object] | None = None) -> Iterator[None]:
    """Inside, the first SIGTERM or SIGINT raises :class:`Interrupted` (after calling
    ``before_raise``, e.g. :func:`stop_workers`); later ones are ignored. Outside the main
    thread (where Python cannot handle signals) this does nothing."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    old = {s: signal.getsignal(s) for s in SIGNALS}

    def handler(signum: int, frame: FrameType | None) -> None:
        for s in SIGNALS:  # the clean-up that follows must not be interrupted in turn
            signal.signal(s, signal.SIG_IGN)
        if before_raise is not None:
            before_raise()
        raise Interrupted(signum)

    for s in SIGNALS:
        signal.signal(s, handler)
    try:
        yield
    finally:
        for s, h in old.items():
            signal.signal(s, h)
