"""``mfbridge replay RUN_DIR``: re-run a recorded run and compare with its stored result.

The configuration is read from the run's ``record.json`` (the resolved config, so the replay
does not depend on today's ``conf/``), solved again into a new folder, and compared with the
stored result: the largest absolute difference of the density and the cost difference. The
verdict is printed; the exit status is 0 when both are within the tolerance, 1 when not, 2 on
an unusable record. Package versions that differ from the record are reported as warnings, and
a stored result whose bytes differ from the hashes written at the end of the run is flagged.

A run that was warm-started (``warm_start`` in its record) is replayed from the same recorded
warm-start run, whose ``result.nc`` must still hash to the recorded SHA-256: then the replay is
bit for bit. If that run is gone or was changed, the replay says so and starts cold; the answer
then agrees only to within the solver tolerance. A run that started cold is replayed cold
(``warm_start=none``), whatever folder it sits in.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import logging
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from mfbridge.errors import InputError
from mfbridge.result import BridgeResult

DEFAULT_TOL = 1e-9


@dataclass(frozen=True)
class Comparison:
    """Stored against replayed: largest |Δ density| (1/length^d), |Δ cost|, largest |Δ mean|."""

    density: float
    cost: float
    mean: float
    stored_cost: float
    replayed_cost: float

    @property
    def identical(self) -> bool:
        return self.density == 0.0 and self.cost == 0.0 and self.mean == 0.0

    def within(self, tol: float) -> bool:
        return max(self.density, self.cost, self.mean) <= tol


def compare(stored: BridgeResult, replayed: BridgeResult) -> Comparison:
    """Compare two :class:`~mfbridge.result.BridgeResult` objects (shape mismatch: infinite)."""

    def maxdiff(a: np.ndarray, b: np.ndarray) -> float:
        if a.shape != b.shape:
            return float("inf")
        diff = np.abs(np.asarray(a, dtype=float) - np.asarray(b, dtype=float))
        return float(np.max(diff)) if diff.size else 0.0

    return Comparison(
        density=maxdiff(stored.density, replayed.density),
        cost=abs(float(stored.cost) - float(replayed.cost)),
        mean=maxdiff(stored.mean, replayed.mean),
        stored_cost=float(stored.cost),
        replayed_cost=float(replayed.cost),
    )


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="mfbridge replay",
        description="Re-run a recorded run from its logged config into a new folder and compare "
                    "the new result with the stored one.",
    )
    parser.add_argument("run_dir", type=Path, help="a run folder written by mfbridge")
    parser.add_argument("--out", type=Path, default=None,
                        help="folder for the replay (default: replays/<run name>/<time>)")
    parser.add_argument("--tol", type=float, default=DEFAULT_TOL,
                        help=f"largest accepted absolute difference of density, mean and cost "
                             f"(default {DEFAULT_TOL:g})")
    parser.add_argument("--figures", action="store_true", help="also draw the replay's figures")
    return parser


def _version_warnings(recorded: dict[str, str | None]) -> list[str]:
    from mfbridge.runs.records import package_versions

    current = package_versions()
    return [f"{name} {recorded.get(name)} in the record, {current.get(name)} now"
            for name in sorted(set(recorded) | set(current))
            if recorded.get(name) != current.get(name)]


def _recorded_warm_start(warm: dict[str, Any] | None) -> str:
    """The ``warm_start`` config value that repeats the recorded start, printing what it does."""
    from mfbridge.result import RESULT_FILE
    from mfbridge.runs import records

    path = (warm or {}).get("path")
    if not path:
        print("warm start: none recorded; replaying from a cold start")
        return "none"
    folder = Path(path)
    overrides = " ".join((warm or {}).get("overrides") or []) or "no overrides"
    if (records.is_complete(folder) and (folder / RESULT_FILE).is_file()
            and records.sha256(folder / RESULT_FILE) == (warm or {}).get("sha256")):
        print(f"warm start: re-solving from the recorded warm-start run {folder} ({overrides})")
        return str(folder)
    print(f"warning: the recorded warm-start run {folder} ({overrides}) is missing or changed "
          "since (its result.nc does not match the recorded SHA-256): replaying from a cold "
          "start, expect agreement within the solver tolerance, not bit for bit")
    return "none"


def _module_dirs(inputs: dict[str, dict[str, str]]) -> None:
    """Make the recorded user modules importable from any working directory (appended to
    ``sys.path``: their folders, as seen when the run was made)."""
    for entry in inputs.values():
        module, path = entry.get("module"), Path(entry.get("path", ""))
        if not module or not path.is_file():
            continue
        depth = module.count(".") + (1 if path.name == "__init__.py" else 0)
        folder = str(path.parents[depth])
        if folder not in sys.path:
            sys.path.append(folder)


def replay(run_dir: Path, out: Path | None, tol: float, figures: bool) -> int:
    """Replay ``run_dir`` into ``out``; print the comparison and verdict; return the exit code."""
    from omegaconf import OmegaConf

    from mfbridge.runs import records
    from mfbridge.runs.api import load
    from mfbridge.runs.cli import run

    if not tol >= 0:
        raise InputError(f"--tol must be a non-negative number, got {tol}")
    record = records.read_record(run_dir)
    marker = records.read_marker(run_dir)
    if marker is None:
        raise InputError(f"{run_dir} holds no completed run (no {records.COMPLETE_FILE}; "
                         f"record status {record.status!r}): there is no result to compare with")
    stored = load(run_dir, warn=False)
    changed = records.changed_files(run_dir, marker)
    if out is None:
        stamp = _dt.datetime.now().strftime("%Y-%m-%d_%H-%M-%S")
        out = Path("replays") / run_dir.resolve().name / stamp
    if out.exists() and any(out.iterdir()):
        raise InputError(f"replay folder {out} exists and is not empty; choose another --out")

    print(f"replaying {run_dir} into {out}")
    for line in _version_warnings(record.versions):
        print(f"warning: package version differs: {line}")
    if stored.status != "converged":
        print(f"note: the stored run ended {stored.status.replace('_', ' ')}: the replay "
              "reproduces that iterate (and status), not a bridge")
    if changed:
        print(f"warning: {', '.join(changed)} in {run_dir} changed after the run "
              f"(SHA-256 differs from {records.COMPLETE_FILE})")
    inputs = records.changed_inputs(record.inputs)
    for line in inputs:
        print(f"warning: input {line}")
    _module_dirs(record.inputs)
    cfg = OmegaConf.create(record.config)
    cfg.figures = bool(figures)
    cfg.warm_start = _recorded_warm_start(record.warm_start)
    replayed = run(cfg, out, record_extra={"replay_of": str(run_dir.resolve()),
                                           "overrides": record.overrides,
                                           "choices": record.choices})
    result = compare(stored, replayed)
    print(f"density: max |stored - replayed| = {result.density:.3g}")
    print(f"mean:    max |stored - replayed| = {result.mean:.3g}")
    print(f"cost:    stored {result.stored_cost:.12g}, replayed {result.replayed_cost:.12g}, "
          f"|difference| = {result.cost:.3g}")
    if stored.status != "converged" or replayed.status != stored.status:
        print(f"status:  stored {stored.status}, replayed {replayed.status}")
    if replayed.status != stored.status:
        print("verdict: DIFFERENT: the replay ended with another status")
        return 1
    if result.identical:
        print(f"verdict: REPRODUCED bit for bit (tolerance {tol:g})")
        return 0
    if result.within(tol):
        print(f"verdict: REPRODUCED within tolerance {tol:g} (not bit for bit)")
        return 0
    print(f"verdict: DIFFERENT: the replay differs from the stored result beyond tolerance "
          f"{tol:g}")
    if inputs:
        print("inputs changed since the run (a likely cause): "
              + "; ".join(line.partition(": ")[0] for line in inputs))
    return 1


def main(argv: list[str]) -> int:
    """Console entry: ``mfbridge replay RUN_DIR [--out DIR] [--tol TOL] [--figures]``."""
    args = _parser().parse_args(argv)
    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s")
    try:
        return replay(args.run_dir, args.out, args.tol, args.figures)
    except InputError as exc:
        print(f"mfbridge replay: error: {exc}", file=sys.stderr)
        return 2
