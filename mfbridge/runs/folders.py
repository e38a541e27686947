"""Whether a run may write into a folder, decided from the record and the completion marker.

:func:`prepare` is called with the folder's lock held (:mod:`mfbridge.runs.lock`), before
anything is written. It returns ``"skip"`` for a complete run of the same resolved config (a
resume), ``"run"`` for a folder that is new, empty, or holds an unfinished attempt of the same
config (killed, interrupted, failed, refused: its record says so), and refuses
(:class:`RunFolderError`, exit code 2) everything else, without touching the folder:

* a complete run of another config;
* a finished run whose files no longer match the SHA-256 in its ``complete.json`` (an edited
  ``summary.json`` or ``result.nc``): the hashes, never the summary alone, decide;
* result files (``result.nc``, ``summary.json``, ``complete.json``) with no run record, with an
  unreadable one, or with the record of another config: they were not made by this run.

:func:`check_output_path` is the check made on ``hydra.run.dir``/``hydra.sweep.dir`` before
Hydra creates anything (a path that is a file, on a pseudo file system such as /proc, or on a
device with less than :data:`MIN_FREE_BYTES` free: Hydra's own files would fail with a traceback).
"""

from __future__ import annotations

import logging
import os
import shutil
from pathlib import Path
from typing import Any

from mfbridge.errors import InputError
from mfbridge.result import COMPLETE_FILE, RESULT_FILE, SUMMARY_FILE
from mfbridge.runs import records
from mfbridge.runs.lock import owner

log = logging.getLogger("mfbridge")

#: roots of the kernel's pseudo file systems, where no run folder can be made
PSEUDO_ROOTS = ("/proc", "/sys", "/dev")
#: free space below which no run is started (Hydra's files, the record, a small result)
MIN_FREE_BYTES = 1 << 20
_ADVICE = "choose another output folder (hydra.run.dir / hydra.sweep.dir) or delete it"


class RunFolderError(InputError):
    """A run folder that this run must not write into (the folder is left as it is)."""


def prepare(out: str | Path, config: dict[str, Any]) -> str:
    """``"skip"`` (a complete run of ``config`` is there), ``"run"`` (compute into ``out``), or
    :class:`RunFolderError` (see the module docstring)."""
    folder = Path(out)
    if not folder.exists():
        return "run"
    if not folder.is_dir():
        raise RunFolderError(f"{folder} is a file, not a run folder; {_ADVICE}")
    held = [name for name in (RESULT_FILE, SUMMARY_FILE, COMPLETE_FILE)
            if (folder / name).exists()]
    try:
        record = records.read_record(folder) if (folder / records.RECORD_FILE).exists() else None
    except InputError as exc:
        if held:
            raise RunFolderError(f"{folder} holds {', '.join(held)} and a run record that "
                                 f"cannot be read ({exc}): mfbridge cannot tell whose they "
                                 f"are and does not overwrite them; {_ADVICE}") from exc
        return "run"
    if (folder / COMPLETE_FILE).exists():
        marker = records.read_marker(folder)
        if marker is None:
            raise RunFolderError(f"{folder} holds an unreadable completion marker "
                                 f"({COMPLETE_FILE}); {_ADVICE}")
        changed = records.changed_files(folder, marker)
        if changed:
            raise RunFolderError(
                f"{folder} holds a finished run whose {', '.join(changed)} changed after it "
                f"finished (SHA-256 differs from {COMPLETE_FILE}): mfbridge does not overwrite "
                f"a finished run; {_ADVICE}")
        if record is None or record.config != config:
            raise RunFolderError(f"{folder} already holds a complete run of a different "
                                 f"configuration; {_ADVICE}")
        return "skip"
    if not held:
        return "run"
    if record is None:
        raise RunFolderError(f"{folder} holds {', '.join(held)} but no run record: result "
                             f"files not made by a run of this configuration; mfbridge does "
                             f"not overwrite them; {_ADVICE}")
    if record.config != config:
        raise RunFolderError(f"{folder} holds {', '.join(held)} of an unfinished run of a "
                             f"different configuration (status {record.status!r}); {_ADVICE}")
    return "run"


def check_output_path(path: str | Path) -> None:
    """Refuse (:class:`RunFolderError`) an output folder that cannot be one: an existing file,
    a path below a file, a path on a pseudo file system, or below a folder that is not
    writable."""
    target = Path(path).expanduser().absolute()
    text = str(target)
    if any(text == root or text.startswith(root + "/") for root in PSEUDO_ROOTS):
        raise RunFolderError(f"{target} is on the kernel's pseudo file system "
                             f"({text.split('/')[1]}): a run folder cannot be made there; "
                             "choose a folder on a disk (hydra.run.dir / hydra.sweep.dir)")
    if target.exists() and not target.is_dir():
        raise RunFolderError(f"{target} is a file, not a folder; choose another output "
                             "folder (hydra.run.dir / hydra.sweep.dir)")
    parent = target
    while not parent.exists():
        parent = parent.parent
    if not parent.is_dir():
        raise RunFolderError(f"{parent} is a file, so {target} cannot be made; choose another "
                             "output folder (hydra.run.dir / hydra.sweep.dir)")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise RunFolderError(f"{parent} is not writable, so {target} cannot be made; choose "
                             "another output folder (hydra.run.dir / hydra.sweep.dir)")
    try:
        free = shutil.disk_usage(parent).free
    except OSError:
        return
    if free < MIN_FREE_BYTES:
        raise RunFolderError(f"no space left on the device at {target}: {free} bytes free, a "
                             f"run needs at least {MIN_FREE_BYTES >> 20} MB; free some space or "
                             "write the run elsewhere (hydra.run.dir / hydra.sweep.dir)")


def mark_interrupted(folder: str | Path, reason: str) -> bool:
    """Set the record of a run left ``running`` by a process that is gone to ``interrupted``
    (with ``reason``); ``True`` when the record was changed. A live owner's record is left."""
    try:
        record = records.read_record(folder)
    except InputError:
        return False
    held = owner(folder)
    if record.status != "running" or (held is not None and held.alive()):
        return False
    record.status, record.error = "interrupted", reason
    record.finished = record.finished or records.now()
    try:
        records.write_record(folder, record)
    except OSError as exc:  # e.g. the disk is full: say so, the marker is absent anyway
        log.error("could not mark %s interrupted: %s", folder, exc)
        return False
    return True
