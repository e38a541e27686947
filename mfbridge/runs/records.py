"""Run records: what a run folder says about how its result was made, and whether it is complete.

Besides the result (``result.nc``, ``summary.json``, see :mod:`mfbridge.result`), a run folder
written by :func:`mfbridge.runs.cli.run` holds

* ``record.json``: the resolved configuration, the command-line overrides and config-group
  choices (when run through Hydra), versions of Python and the numerical packages, the git
  commit of the mfbridge checkout (and whether it had uncommitted changes), seeds, SHA-256
  hashes of the input data files and user modules named in the config, start and finish
  times, the status, and the
  error of a failed run;
* ``complete.json``: the completion marker, written last, with SHA-256 hashes of the result,
  the summary and the record. A folder without it (a run killed or failed midway) is never
  taken for a finished run; a folder whose files no longer match its hashes was changed
  after the run.

Both are written atomically (temporary file, then rename). :class:`SweepProgress` is a Hydra
callback that reports how many runs of a sweep have finished. :func:`nearest_run` picks the
finished run of a sweep that warm-starts a new job (see "warm starts" below). Nothing here does
numerics.
"""

from __future__ import annotations

import datetime as _dt
import errno
import hashlib
import json
import logging
import math
import platform
import re
import subprocess
import sys
from dataclasses import asdict, dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any

from mfbridge.errors import InputError, is_real_number
from mfbridge.result import (
    COMPLETE_FILE,
    RESULT_FILE,
    STATUSES,
    SUMMARY_FILE,
    _atomic_write,
    changed_files,
    read_marker,
    sha256,
    write_marker,
)

log = logging.getLogger("mfbridge")

RECORD_FILE = "record.json"
RECORD_FORMAT = 1
# Distribution names whose versions a record keeps (import name in brackets where it differs).
PACKAGES: tuple[str, ...] = (
    "mfbridge", "numpy", "scipy", "pot", "torch", "hydra-core", "omegaconf", "xarray",
    "netcdf4", "threadpoolctl",
)
# A run that wrote its result has one of the solve STATUSES and a completion marker; re-running
# the same config gives the same answer, so a resume skips it whatever its status. A run that
# did not has one of RUN_STATUSES ("running": being computed, or killed - its lock says which)
# and no marker; a resume computes it again.
FINISHED = STATUSES
RUN_STATUSES = ("running", "failed", "refused", "interrupted")


@dataclass
class RunRecord:
    """The content of ``record.json``.

    ``overrides`` are the Hydra task overrides (``["interaction.strength=2", ...]``) and
    ``choices`` the selected option of every config group, both ``None`` outside Hydra;
    ``inputs`` maps each data file and user module named in the config to its absolute path
    and SHA-256 (modules also to their ``module`` name);
    ``git`` is ``{"commit": ..., "dirty": ...}`` or ``None`` when mfbridge is not in a checkout;
    ``warm_start`` is a :class:`WarmStart` as a dict (which run started the solver, or why none
    did; ``None`` in records written before warm starts existed).
    """

    config: dict[str, Any]
    overrides: list[str] | None = None
    choices: dict[str, str] | None = None
    job: dict[str, Any] | None = None
    command: list[str] = field(default_factory=list)
    versions: dict[str, str | None] = field(default_factory=dict)
    git: dict[str, Any] | None = None
    seeds: dict[str, int] = field(default_factory=dict)
    inputs: dict[str, dict[str, str]] = field(default_factory=dict)
    blas_threads: int | None = None
    started: str = ""
    finished: str | None = None
    runtime_seconds: float | None = None
    status: str = "running"
    error: str | None = None
    replay_of: str | None = None
    warm_start: dict[str, Any] | None = None
    format_version: int = RECORD_FORMAT


# ------------------------------------------------------------------------------ environment


def now() -> str:
    """The current time, ISO 8601 in UTC with seconds."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def package_versions() -> dict[str, str | None]:
    """Installed versions of Python and of :data:`PACKAGES` (``None`` when not installed)."""
    out: dict[str, str | None] = {"python": platform.python_version()}
    for name in PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


def git_state(directory: str | Path | None = None) -> dict[str, Any] | None:
    """``{"commit", "dirty"}`` of the git checkout holding ``directory`` (default: the mfbridge
    package), or ``None`` when it is not in a checkout or git is not installed."""
    where = str(directory or Path(__file__).resolve().parent)

    def git(*args: str) -> str:
        done = subprocess.run(["git", "-C", where, *args], capture_output=True, text=True,
                              timeout=20, check=True)
        return done.stdout.strip()

    try:
        commit = git("rev-parse", "HEAD")
    except (OSError, subprocess.SubprocessError):
        return None
    try:
        dirty: bool | None = bool(git("status", "--porcelain", "--untracked-files=no"))
    except (OSError, subprocess.SubprocessError):
        dirty = None
    return {"commit": commit, "dirty": dirty}


def input_files(config: Any, base: str | Path | None = None) -> dict[str, dict[str, str]]:
    """The user's inputs named in ``config`` (nested dicts and lists), keyed by the dotted
    config key, each with its absolute ``path`` and ``sha256``:

    * every string value that names an existing file, looked up as the data files are: from
      ``base`` (default the working directory), then from the mfbridge repository root;
    * every module named by a ``_target_`` or an import path (``"mymod:fn"``,
      ``"mypkg.mymod.fn"``) that is not part of mfbridge, with its source file and ``module``.
    """
    from mfbridge.model.sample_files import REPO_ROOT

    roots = [Path(base) if base is not None else Path.cwd(), REPO_ROOT]
    found: dict[str, dict[str, str]] = {}

    def walk(node: Any, key: str) -> None:
        if isinstance(node, dict):
            for k, v in node.items():
                walk(v, f"{key}.{k}" if key else str(k))
        elif isinstance(node, (list, tuple)):
            for i, v in enumerate(node):
                walk(v, f"{key}[{i}]")
        elif isinstance(node, str) and node and "\n" not in node and len(node) < 4096:
            path = Path(node).expanduser()
            for place in [path] if path.is_absolute() else [r / path for r in roots]:
                try:
                    is_file = place.is_file()
                except OSError:
                    is_file = False
                if is_file:
                    found[key] = {"path": str(place.resolve()), "sha256": sha256(place)}
                    return
            module = user_module(node)
            if module is not None:
                found[key] = {"module": module[0], "path": str(module[1]),
                              "sha256": sha256(module[1])}

    walk(config, "")
    return found


_IMPORT_PATH = re.compile(r"^[A-Za-z_]\w*(\.[A-Za-z_]\w*)*(:[A-Za-z_][\w.]*)?$")


def user_module(text: str) -> tuple[str, Path] | None:
    """``(module name, source file)`` of the module an import path names (``"pkg.mod:attr"``,
    ``"pkg.mod.attr"``, a ``_target_``), when it is a file outside the mfbridge package and
    the standard library; else ``None``. Nothing is imported but parent packages."""
    import importlib.util
    import sysconfig

    if not _IMPORT_PATH.match(text) or ("." not in text and ":" not in text):
        return None
    parts = text.partition(":")[0].split(".")
    package_dir = Path(__file__).resolve().parents[1]  # the mfbridge package
    stdlib = Path(sysconfig.get_paths()["stdlib"]).resolve()
    for n in range(len(parts), 0, -1):
        name = ".".join(parts[:n])
        try:
            spec = importlib.util.find_spec(name)
        except (ImportError, ValueError, AttributeError):
            spec = None
        if spec is None or not spec.origin or not spec.has_location:
            continue
        origin = Path(spec.origin).resolve()
        if (not origin.is_file() or package_dir in origin.parents
                or (stdlib in origin.parents and "site-packages" not in origin.parts)):
            return None
        return name, origin
    return None


def changed_inputs(recorded: dict[str, dict[str, str]]) -> list[str]:
    """One line for each recorded input file whose bytes differ now, or that is gone."""
    lines = []
    for key, entry in sorted(recorded.items()):
        path = Path(entry.get("path", ""))
        what = f"module {entry['module']}" if entry.get("module") else "data file"
        if not path.is_file():
            lines.append(f"{key}: {what} {path} is missing")
        elif sha256(path) != entry.get("sha256"):
            lines.append(f"{key}: {what} {path} changed since the run (SHA-256 differs)")
    return lines


def hydra_job() -> tuple[list[str] | None, dict[str, str] | None, dict[str, Any] | None]:
    """The task overrides, group choices and job description of the running Hydra job, or
    ``(None, None, None)`` outside Hydra."""
    try:
        from hydra.core.hydra_config import HydraConfig
    except ImportError:  # pragma: no cover - hydra is a dependency
        return None, None, None
    if not HydraConfig.initialized():
        return None, None, None
    from omegaconf import OmegaConf

    hc = HydraConfig.get()
    overrides = [str(o) for o in hc.overrides.task]
    choices = {str(k): str(v) for k, v in OmegaConf.to_container(hc.runtime.choices).items()
               if v is not None and not str(k).startswith("hydra/")}
    job = {"name": hc.job.name, "mode": str(hc.mode.name) if hc.mode is not None else None,
           "num": hc.job.get("num"), "override_dirname": hc.job.override_dirname}
    return overrides, choices, job


# ------------------------------------------------------------------------------ read / write


def _write_json(path: Path, data: Any) -> None:
    """Write ``data`` to ``path`` atomically (a temporary file renamed over it). On a full disk
    there may be no room for the temporary copy; an existing file is then rewritten in place,
    in the blocks it holds already (a run's last record must say why it ended)."""
    text = json.dumps(data, indent=2, sort_keys=False, default=str) + "\n"
    try:
        _atomic_write(path, lambda tmp: Path(tmp).write_text(text))
    except OSError as exc:
        if exc.errno not in (errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC)) or \
                not path.is_file():
            raise
        path.write_text(text)


def new_record(config: dict[str, Any], **extra: Any) -> RunRecord:
    """A record of a run of the resolved ``config`` starting now, with the environment filled
    in (versions, git, input files, Hydra overrides when inside a Hydra job)."""
    overrides, choices, job = hydra_job()
    record = RunRecord(
        config=config, overrides=overrides, choices=choices, job=job,
        command=list(sys.argv), versions=package_versions(), git=git_state(),
        seeds={},  # the solver is deterministic: no random numbers are drawn yet
        inputs=input_files(config), started=now(),
    )
    for key, value in extra.items():
        setattr(record, key, value)
    return record


def write_record(folder: str | Path, record: RunRecord) -> Path:
    """Write ``record.json`` atomically; a finished record is followed by the marker."""
    out = Path(folder)
    _write_json(out / RECORD_FILE, asdict(record))
    if record.status in FINISHED:
        write_marker(out, record.status, (RESULT_FILE, SUMMARY_FILE, RECORD_FILE),
                     record.finished or now())
    return out / RECORD_FILE


def _read_json(path: Path, what: str) -> dict[str, Any]:
    try:
        data = json.loads(path.read_text())
    except FileNotFoundError:
        raise InputError(f"{path.parent} has no {path.name}: not a recorded mfbridge run "
                         f"folder ({what} missing)") from None
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise InputError(f"{path} is corrupted ({what} is not valid JSON: {exc})") from exc
    if not isinstance(data, dict):
        raise InputError(f"{path} is corrupted ({what} is not a JSON object)")
    return data


def read_record(folder: str | Path) -> RunRecord:
    """Read ``record.json`` of a run folder; a missing, unreadable or incomplete record is an
    :class:`InputError` that says which."""
    out = Path(folder)
    if not out.is_dir():
        raise InputError(f"no run folder at {out}")
    data = _read_json(out / RECORD_FILE, "the run record")
    version = data.get("format_version")
    if version != RECORD_FORMAT:
        raise InputError(f"{out / RECORD_FILE} has record format {version}, this mfbridge "
                         f"reads format {RECORD_FORMAT}")
    known = set(RunRecord.__dataclass_fields__)
    if not isinstance(data.get("config"), dict):
        raise InputError(f"{out / RECORD_FILE} is corrupted: it holds no configuration")
    return RunRecord(**{k: v for k, v in data.items() if k in known})


def is_complete(folder: str | Path) -> bool:
    """Whether the folder holds a finished run whose files are as the run left them."""
    marker = read_marker(folder)
    return marker is not None and not changed_files(folder, marker)


# ------------------------------------------------------------------------------ sweeps


@dataclass(frozen=True)
class RunEntry:
    """One job folder of a sweep: its path, record (``None`` when unreadable) and whether it
    completed; ``problem`` says what is wrong with an incomplete or failed one."""

    folder: Path
    record: RunRecord | None
    complete: bool
    problem: str | None = None

    @property
    def status(self) -> str:
        """The record's status; ``"running"`` of a killed run is ``"killed"``, an unreadable
        record ``"unreadable"``."""
        if self.record is None:
            return "unreadable"
        if self.record.status == "running" and (self.problem or "").startswith("killed"):
            return "killed"
        return self.record.status


def scan_sweep(sweep_dir: str | Path) -> list[RunEntry]:
    """Every job folder under ``sweep_dir`` (a folder with a Hydra ``.hydra/`` record or a run
    record), sorted by path."""
    root = Path(sweep_dir)
    folders = {p.parent for p in root.rglob(RECORD_FILE)}
    folders |= {p.parent for p in root.rglob(".hydra") if p.is_dir() and p.parent != root}
    entries = []
    for folder in sorted(folders):
        try:
            record: RunRecord | None = read_record(folder)
        except InputError as exc:
            entries.append(RunEntry(folder, None, False, str(exc)))
            continue
        complete = is_complete(folder)
        entries.append(RunEntry(folder, record, complete,
                                None if complete else _problem(folder, record)))
    return entries


def _problem(folder: Path, record: RunRecord) -> str:
    """What is wrong with a run folder that is not complete, from its record, marker and lock."""
    if (folder / COMPLETE_FILE).is_file():
        return f"files changed after the run (hashes differ from {COMPLETE_FILE})"
    if record.status in ("failed", "refused", "interrupted"):
        return f"{record.status}: {record.error}"
    if record.status == "running":
        from mfbridge.runs.lock import owner

        held = owner(folder)
        if held is not None and held.alive():
            return f"running ({held.describe()})"
        return ("killed: recorded as running, but no live process holds its lock "
                "(no completion marker)")
    return (f"status {record.status!r} but no completion marker: the run stopped between "
            "saving its result and finishing its record")


#: Longest job folder name kept as Hydra writes it (``key=value,...``); longer ones, and any
#: holding a path, are shortened by :func:`job_dir_name`.
JOB_DIR_CHARS = 120
_VALUE_CHARS = 24


def _split_items(text: str) -> list[str]:
    """Split Hydra's ``override_dirname`` at the commas outside brackets and quotes."""
    items, depth, quote, start = [], 0, "", 0
    for i, ch in enumerate(text):
        if quote:
            quote = "" if ch == quote else quote
        elif ch in "'\"":
            quote = ch
        elif ch in "[{(":
            depth += 1
        elif ch in "]})":
            depth -= 1
        elif ch == "," and depth == 0:
            items.append(text[start:i])
            start = i + 1
    items.append(text[start:])
    return [item for item in items if item]


def job_dir_name(override_dirname: str) -> str:
    """The folder name of a sweep job from Hydra's ``override_dirname``: unchanged when short
    and free of paths (``interaction.strength=1,steps=8``); else each value that is a path or
    longer than 24 characters becomes ``<file stem>-<6 hex>`` (SHA-256 of the value), and a
    name still over :data:`JOB_DIR_CHARS` characters becomes ``job-<10 hex>``. Stable: the same
    overrides give the same name; ``record.json`` keeps the full overrides."""
    text = str(override_dirname)
    if len(text) <= JOB_DIR_CHARS and "/" not in text and "\\" not in text:
        return text

    def digest(value: str, n: int) -> str:
        return hashlib.sha256(value.encode()).hexdigest()[:n]

    items = []
    for item in _split_items(text):
        key, eq, value = item.partition("=")
        if eq and ("/" in value or "\\" in value or len(value) > _VALUE_CHARS):
            stem = re.sub(r"[^\w.-]", "", Path(value.replace("\\", "/")).stem)[:16]
            value = f"{stem}-{digest(value, 6)}" if stem else digest(value, 6)
        items.append(f"{key}{eq}{value}")
    short = ",".join(items)
    return short if len(short) <= JOB_DIR_CHARS else f"job-{digest(text, 10)}"


def register_resolvers() -> None:
    """Register ``${mfbridge_job_dir:...}`` (:func:`job_dir_name`) with OmegaConf (once)."""
    from omegaconf import OmegaConf

    if not OmegaConf.has_resolver("mfbridge_job_dir"):
        OmegaConf.register_new_resolver("mfbridge_job_dir", job_dir_name)


def __getattr__(name: str) -> Any:
    """:class:`~mfbridge.runs.sweeps.SweepProgress` and ``expected_jobs`` live in
    :mod:`mfbridge.runs.sweeps`; configs and run folders name them here."""
    if name in ("SweepProgress", "expected_jobs"):
        from mfbridge.runs import sweeps

        return getattr(sweeps, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


# ------------------------------------------------------------------------------ warm starts
#
# A job of a sweep may start the solver from the result of a finished job of the same sweep
# (``solve_bridge(..., warm_start=...)``). Two runs are *compatible* when their resolved configs
# differ only in numeric entries (int or float, not bool) outside SAME_KEYS, ignoring
# IGNORED_KEYS: same grid shape, steps, solver method, endpoints, potentials' kinds... Among the
# compatible converged runs the nearest one is chosen, with the distance
#
#     d(a, b) = sqrt( sum_k ((a_k - b_k) / R_k)^2 )
#
# over the entries k where the two configs differ, R_k being the range (max - min) of entry k
# over the whole sweep: the jobs ``multirun.yaml`` asks for, every run folder's record and the
# new job. R_k >= |a_k - b_k| > 0, so each term lies in (0, 1] whatever the units of k. (Plain
# relative differences |a_k - b_k| / max(|a_k|, |b_k|) cannot rank neighbours of 0: from 0, both
# 1 and 2 are at relative distance 1.) Ties go to the folder whose path sorts first.

#: Config entries that do not change the solution and may differ freely.
WARM_IGNORED_KEYS = frozenset({"figures", "warm_start"})
#: Numeric entries that must be equal: the warm start lives on the same grid and time steps.
WARM_SAME_KEYS = frozenset({"grid.shape", "steps"})
#: The solver options that accept a warm start (the fixed-point solver).
WARM_SOLVER = "mfbridge.solvers.fixed_point.SolverOptions"


@dataclass(frozen=True)
class WarmStart:
    """How a run was started, as ``record.json`` keeps it (field ``warm_start``).

    ``mode`` is what the config asked for (``"nearest"``, ``"none"`` or ``"path"``); ``path`` the
    run folder whose result started the solver (``None``: cold start, ``reason`` says why);
    ``overrides`` that run's command-line overrides; ``differences`` maps each config entry that
    differs to ``[value of the warm-start run, value of this run]``; ``distance`` is d above;
    ``sha256`` the hash of that run's ``result.nc`` when it was read (replay checks it).
    """

    mode: str
    reason: str
    path: str | None = None
    overrides: list[str] | None = None
    differences: dict[str, list[Any]] = field(default_factory=dict)
    distance: float | None = None
    sha256: str | None = None


def flatten(config: Any, prefix: str = "") -> dict[str, Any]:
    """Dotted keys of the leaves of nested dicts (lists are leaves): ``{"grid.shape": 32}``."""
    if not isinstance(config, dict):
        return {prefix: config}
    out: dict[str, Any] = {}
    for key, value in config.items():
        out.update(flatten(value, f"{prefix}.{key}" if prefix else str(key)))
    return out


def warm_differences(theirs: dict[str, Any], ours: dict[str, Any]
                     ) -> tuple[dict[str, list[Any]], str | None]:
    """The config entries in which a finished run (``theirs``) differs from a new one
    (``ours``), as ``{key: [their value, our value]}``, and ``None``; or ``({}, reason)`` when
    the run cannot warm-start the new one (a non-numeric entry, the grid shape or the number of
    steps differ, or the solver takes no warm start)."""
    a, b = flatten(theirs), flatten(ours)
    if b.get("solver._target_") != WARM_SOLVER:
        return {}, f"the solver {b.get('solver._target_')} takes no warm start"
    differences: dict[str, list[Any]] = {}
    for key in sorted(set(a) | set(b)):
        if key.split(".")[0] in WARM_IGNORED_KEYS or a.get(key) == b.get(key):
            continue
        if key in WARM_SAME_KEYS:
            return {}, f"{key} differs ({a.get(key)!r} there, {b.get(key)!r} here)"
        if key not in a or key not in b or not (is_real_number(a[key]) and is_real_number(b[key])):
            return {}, f"{key} differs ({a.get(key)!r} there, {b.get(key)!r} here)"
        differences[key] = [a[key], b[key]]
    return differences, None


def _sweep_values(sweep_dir: Path, configs: list[dict[str, Any]]) -> dict[str, list[float]]:
    """Numeric values each config entry takes over a sweep: the jobs of ``multirun.yaml`` (when
    readable) and ``configs``."""
    from mfbridge.runs.sweeps import expected_jobs

    values: dict[str, list[float]] = {}
    for config in configs:
        for key, value in flatten(config).items():
            if is_real_number(value):
                values.setdefault(key, []).append(float(value))
    multirun = sweep_dir / "multirun.yaml"
    if multirun.is_file():
        from omegaconf import OmegaConf

        try:
            jobs = expected_jobs(OmegaConf.load(multirun)) or []
        except Exception:  # unreadable: the run folders' configs still give the ranges
            jobs = []
        for job in jobs:
            for text in job:
                key, _, value = text.lstrip("+~").partition("=")
                try:
                    number = float(value)
                except ValueError:
                    continue
                if math.isfinite(number):
                    values.setdefault(key, []).append(number)
    return values


def warm_distance(differences: dict[str, list[Any]], values: dict[str, list[float]]) -> float:
    """d = sqrt(sum_k ((a_k - b_k) / R_k)^2) with R_k the range of entry k in ``values``
    (which must hold both a_k and b_k, so that R_k > 0)."""
    total = 0.0
    for key, (a, b) in differences.items():
        spread = max(values[key]) - min(values[key])
        total += ((float(a) - float(b)) / spread) ** 2
    return math.sqrt(total)


def nearest_run(config: dict[str, Any], sweep_dir: str | Path,
                exclude: str | Path | None = None) -> tuple[Path | None, WarmStart]:
    """The finished, converged run under ``sweep_dir`` nearest to a new run of the resolved
    ``config`` (distance d above, among compatible runs), and the :class:`WarmStart` to record;
    ``(None, WarmStart(reason=...))`` when there is none. ``exclude`` is the new run's folder."""
    root = Path(sweep_dir)
    skip = Path(exclude).resolve() if exclude is not None else None
    entries = [e for e in scan_sweep(root) if e.folder.resolve() != skip] if root.is_dir() else []
    finished = [e for e in entries if e.complete and e.record is not None]
    converged = [e for e in finished if e.record is not None and e.record.status == "converged"]
    candidates: list[tuple[RunEntry, dict[str, list[Any]]]] = []
    reasons: list[str] = []
    for entry in converged:
        assert entry.record is not None
        differences, reason = warm_differences(entry.record.config, config)
        if reason is None:
            candidates.append((entry, differences))
        else:
            reasons.append(reason)
    if not candidates:
        if not finished:
            why = f"no finished run in {root} yet"
        elif not converged:
            why = f"no converged run among the {len(finished)} finished in {root}"
        else:
            why = (f"none of the {len(converged)} converged runs in {root} is compatible "
                   f"(first: {reasons[0]})")
        return None, WarmStart(mode="nearest", reason=why)
    values = _sweep_values(root, [config, *(e.record.config for e in entries if e.record)])
    scored = sorted(((warm_distance(diff, values), str(entry.folder), entry, diff)
                     for entry, diff in candidates), key=lambda row: row[:2])
    distance, _, entry, differences = scored[0]
    assert entry.record is not None
    return entry.folder, WarmStart(
        mode="nearest", path=str(entry.folder.resolve()), overrides=entry.record.overrides,
        differences=differences, distance=distance, sha256=sha256(entry.folder / RESULT_FILE),
        reason=f"nearest of {len(candidates)} compatible converged runs in {root}",
    )


def chosen_run(config: dict[str, Any], folder: str | Path) -> WarmStart:
    """The :class:`WarmStart` of a run named explicitly (``warm_start=/path/to/run``): it must be
    a complete run compatible with ``config``, else :class:`InputError`."""
    path = Path(folder).expanduser()
    record = read_record(path)
    if not is_complete(path):
        raise InputError(f"warm_start={folder}: the run did not complete (no valid "
                         f"{COMPLETE_FILE}); name a finished run folder")
    differences, reason = warm_differences(record.config, config)
    if reason is not None:
        raise InputError(f"warm_start={folder} cannot start this run: {reason}; a warm start "
                         "must have the same grid, steps and model, differing only in numbers")
    if record.status != "converged":
        log.warning("warm start from %s, a run that did not converge", path)
    return WarmStart(mode="path", path=str(path.resolve()), overrides=record.overrides,
                     differences=differences, sha256=sha256(path / RESULT_FILE),
                     reason="named in the config")
