"""One computation per run folder: a lock file that names its owner.

A run holds ``RUN/.mfbridge.lock`` from before it looks at the folder until its files are
written. The file holds the owner's process id, host, start time and the kernel's start tick of
that process; the lock itself is an advisory ``flock`` on the open file, which the kernel drops
when the process ends however it ends (SIGKILL included). So a second run into the same folder
(an immediate re-run of a sweep whose workers still run, two terminals) is refused while the
owner lives, and takes the lock over as soon as that process is gone: no stale lock is ever
left to delete by hand. Releasing removes the file.

:func:`owner` reads the file without touching the lock (used to describe a folder: a record
still "running" whose owner is gone was killed). On a file system without ``flock`` (some
network mounts) the lock is not exclusive; the folder checks still refuse finished runs.
"""

from __future__ import annotations

import datetime as _dt
import fcntl
import json
import os
import socket
from dataclasses import asdict, dataclass
from pathlib import Path

from mfbridge.errors import InputError

LOCK_FILE = ".mfbridge.lock"


class FolderBusy(InputError):
    """Another live process is computing into this run folder."""


def _start_tick(pid: int) -> str | None:
    """The start time of process ``pid`` in clock ticks since boot (/proc/PID/stat, field 22),
    or ``None`` when there is no such process (or no /proc)."""
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    # the command name (field 2) is in parentheses and may hold spaces
    return text.rsplit(")", 1)[1].split()[19]


@dataclass(frozen=True)
class LockOwner:
    """Who holds (or last held) a run folder's lock."""

    pid: int
    host: str
    started: str
    tick: str | None = None

    def alive(self) -> bool:
        """Whether the owner still runs: the same process id on this host with the same start
        tick (a reused pid is another process). On another host this cannot be told: ``True``."""
        if self.host != socket.gethostname():
            return True
        tick = _start_tick(self.pid)
        return tick is not None and (self.tick is None or tick == self.tick)

    def describe(self) -> str:
        return f"process {self.pid} on {self.host} since {self.started}"


def owner(folder: str | Path) -> LockOwner | None:
    """The owner named in ``folder``'s lock file (``None``: no lock file, or unreadable)."""
    try:
        data = json.loads((Path(folder) / LOCK_FILE).read_text())
        return LockOwner(pid=int(data["pid"]), host=str(data["host"]),
                         started=str(data["started"]), tick=data.get("tick"))
    except (OSError, ValueError, KeyError, TypeError):
        return None


class RunLock:
    """The lock of one run folder (which must exist): :meth:`acquire` or raise
    :class:`FolderBusy`; :meth:`release` (also on leaving a ``with`` block)."""

    def __init__(self, folder: str | Path) -> None:
        self.path = Path(folder) / LOCK_FILE
        self._fd: int | None = None

    def acquire(self) -> RunLock:
        while self._fd is None:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                os.close(fd)
                held = owner(self.path.parent)
                who = held.describe() if held else "another process"
                raise FolderBusy(
                    f"{self.path.parent} is being computed by {who} (lock file {self.path}); "
                    "mfbridge does not start a second computation into the same folder: wait "
                    "for it, or stop it"
                    + (f" (kill {held.pid})" if held else "")
                    + "; the lock is taken over as soon as its process is gone") from None
            try:
                same = os.fstat(fd).st_ino == os.stat(self.path).st_ino
            except FileNotFoundError:
                same = False
            if not same:  # the previous owner removed the file meanwhile: lock the new one
                os.close(fd)
                continue
            pid = os.getpid()
            me = LockOwner(pid=pid, host=socket.gethostname(),
                           started=_dt.datetime.now(_dt.timezone.utc).isoformat(
                               timespec="seconds"), tick=_start_tick(pid))
            os.ftruncate(fd, 0)
            os.write(fd, (json.dumps(asdict(me)) + "\n").encode())
            self._fd = fd
        return self

    def release(self) -> None:
        if self._fd is None:
            return
        self.path.unlink(missing_ok=True)  # still holding the lock: nobody else owns this file
        os.close(self._fd)
        self._fd = None

    def __enter__(self) -> RunLock:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()
