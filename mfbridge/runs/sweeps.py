"""Sweeps: which jobs a multirun launches, its progress, its summary and its exit code.

:class:`SweepProgress` is the Hydra callback of every ``mfbridge -m`` run. At the start it writes
``SWEEP_DIR/sweep.json`` with the override lists of the jobs this sweep launches; after each job
it logs how many *of those* are complete (a sweep folder reused for another sweep also holds
the old sweep's runs: they are counted apart, never as "4 of 1"); at the end it logs one line
per status, the runs that did not complete, and sets :data:`LAST` (the sweep folder and the
exit code of :func:`mfbridge.runs.exits.sweep_exit_code`) for the console entry point.
"""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from mfbridge.result import STATUSES
from mfbridge.runs.exits import sweep_exit_code
from mfbridge.runs.records import RUN_STATUSES, RunEntry, _write_json, now, scan_sweep

log = logging.getLogger("mfbridge")
JOBS_FILE = "sweep.json"


def expected_jobs(config: Any) -> list[list[str]] | None:
    """The override lists of the jobs a basic-sweeper multirun launches, from the task
    overrides of its (Hydra) ``config``; ``None`` when they cannot be worked out."""
    try:
        from hydra._internal.core_plugins.basic_sweeper import BasicSweeper
        from hydra.core.override_parser.overrides_parser import OverridesParser

        parsed = OverridesParser.create().parse_overrides(list(config.hydra.overrides.task))
        return [list(job) for batch in BasicSweeper.split_arguments(parsed, None)
                for job in batch]
    except Exception:  # another sweeper, or a Hydra without these internals
        return None


def _key(overrides: list[str] | None) -> tuple[str, ...]:
    return tuple(sorted(overrides or []))


@dataclass
class SweepState:
    """Where the sweep of this process runs, and how it ended."""

    sweep_dir: Path | None = None
    exit_code: int | None = None


#: the sweep run by this process (set by :class:`SweepProgress`)
LAST = SweepState()


def sweep_jobs(sweep_dir: Path) -> list[tuple[str, ...]] | None:
    """The sorted override lists of the jobs of the sweep last started in ``sweep_dir``."""
    try:
        jobs = json.loads((sweep_dir / JOBS_FILE).read_text()).get("overrides")
    except (OSError, ValueError, AttributeError):
        return None
    return None if jobs is None else [_key(job) for job in jobs]


def split_entries(sweep_dir: Path) -> tuple[list[RunEntry], list[RunEntry]]:
    """The run folders of the sweep last started in ``sweep_dir`` and the others there."""
    entries = scan_sweep(sweep_dir)
    jobs = sweep_jobs(sweep_dir)
    if jobs is None:
        return entries, []
    wanted = set(jobs)
    ours = [e for e in entries if e.record is None or _key(e.record.overrides) in wanted]
    return ours, [e for e in entries if e not in ours]


def summary_line(entries: list[RunEntry], total: int | None) -> str:
    """"3 of 4 runs complete (2 converged, 1 diverged); 1 failed" for this sweep's runs."""
    counts: dict[str, int] = {}
    for entry in entries:
        counts[entry.status] = counts.get(entry.status, 0) + 1
    complete = sum(e.complete for e in entries)
    done = ", ".join(f"{n} {s.replace('_', ' ')}" for s, n in counts.items()
                     if any(e.complete and e.status == s for e in entries))
    rest = ", ".join(f"{n} {s.replace('_', ' ')}" for s, n in counts.items()
                     if not any(e.complete and e.status == s for e in entries))
    text = f"{complete} of {total if total is not None else len(entries)} runs complete"
    return text + (f" ({done})" if done else "") + (f"; {rest}" if rest else "")


try:
    from hydra.experimental.callback import Callback as _Callback
except ImportError:  # pragma: no cover - hydra is a dependency
    _Callback = object  # type: ignore[assignment,misc]


class SweepProgress(_Callback):  # type: ignore[misc,valid-type]
    """Hydra callback: after each job, log how many runs of the sweep are complete; at the end
    of a multirun, log a summary per status, the runs that did not complete, the collect
    command, and set :data:`LAST`."""

    JOBS_FILE = JOBS_FILE

    def on_multirun_start(self, config: Any, **kwargs: Any) -> None:
        sweep_dir = Path(config.hydra.sweep.dir)
        sweep_dir.mkdir(parents=True, exist_ok=True)
        jobs = expected_jobs(config)
        _write_json(sweep_dir / JOBS_FILE, {"jobs": None if jobs is None else len(jobs),
                                            "overrides": jobs, "started": now()})
        LAST.sweep_dir, LAST.exit_code = sweep_dir, None

    def on_job_end(self, config: Any, job_return: Any = None, **kwargs: Any) -> None:
        if str(config.hydra.mode) != "RunMode.MULTIRUN":
            return
        sweep_dir = Path(config.hydra.sweep.dir)
        ours, others = split_entries(sweep_dir)
        jobs = sweep_jobs(sweep_dir)
        of = f" of {len(jobs)}" if jobs is not None else ""
        extra = f" (and {len(others)} runs of other sweeps)" if others else ""
        log.info("sweep progress: %d%s runs complete in %s%s",
                 sum(e.complete for e in ours), of, sweep_dir, extra)

    def on_multirun_end(self, config: Any, **kwargs: Any) -> None:
        sweep_dir = Path(config.hydra.sweep.dir)
        ours, others = split_entries(sweep_dir)
        jobs = sweep_jobs(sweep_dir)
        log.info("sweep finished: %s in %s", summary_line(ours, None if jobs is None
                                                           else len(jobs)), sweep_dir)
        if others:
            log.info("the folder also holds %d runs of other sweeps (not counted)", len(others))
        for entry in ours:
            if not entry.complete:
                log.warning("incomplete run %s: %s", entry.folder, entry.problem)
        log.info("collect with: mfbridge collect %s", sweep_dir)
        # "killed" (a worker gone without a word) and "unreadable" count as failed; "running"
        # (another live process computes into the folder, so this job was refused) as refused
        statuses = [e.status if e.status in (*STATUSES, *RUN_STATUSES[1:]) else
                    "refused" if e.status == "running" else "failed" for e in ours]
        if jobs is not None and len(ours) < len(jobs):
            statuses.append("failed")  # a job that left no folder at all
        LAST.sweep_dir, LAST.exit_code = sweep_dir, sweep_exit_code(statuses)
