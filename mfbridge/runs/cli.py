"""Command line: ``mfbridge [overrides...]`` solves the configured bridge into a run folder.

The Hydra app composes ``conf/`` with the overrides; :func:`run` does the work and is what tests
call. A run folder (``hydra.run.dir``, or one sub-folder of ``hydra.sweep.dir`` per job of a
``mfbridge -m`` sweep) holds

* ``result.nc``: the result as labelled arrays (see :mod:`mfbridge.result`);
* ``summary.json``: cost and its parts, status, timings, model;
* ``config.yaml``: the resolved configuration;
* ``record.json``: the run record: overrides, group choices, versions, git state, input-file
  hashes, times, status, the error of a failed run and the warm start (see
  :mod:`mfbridge.runs.records`);
* ``complete.json``: the completion marker, written last, with the SHA-256 of the result,
  summary and record, for every solve status (a folder without it was killed, interrupted,
  refused or failed);
* ``.mfbridge.lock`` while a process computes into the folder (:mod:`mfbridge.runs.lock`);
* figures (``density.png``, ``moments.png``, ``convergence.png``; unless ``figures=false``);
* the log (``mfbridge.log``) and Hydra's own ``.hydra/`` record.

Warm starts (config entry ``warm_start``): ``auto`` (default) is ``nearest`` in a sweep and
``none`` in a single run; ``nearest`` starts the solver from the finished, converged run of the
same sweep folder nearest in the swept numbers (:func:`mfbridge.runs.records.nearest_run` defines
the distance; the first jobs of a sweep, and parallel jobs that start together, start cold);
``none`` always starts cold; a path starts from that run folder. ``record.json`` says which run
was used, or why none was. The answer does not depend on the start beyond the solver tolerance.

Exit codes (:mod:`mfbridge.runs.exits`): 0 converged, 2 refused (bad input, a run folder that
must not be written, not enough memory), 3 not converged, 4 diverged, 5 suspect, 6 failed, 130
or 143 interrupted by SIGINT or SIGTERM (one line on stderr, the record says ``interrupted``;
:mod:`mfbridge.runs.signals`), 1 an unexpected error (with its traceback). In a multirun a job
that does not converge, fails or is refused is logged and recorded in its folder, the sweep goes
on with the other jobs (``mfbridge collect`` lists them) and exits with the code of its most
severe job; SIGTERM/SIGINT stop its workers too.
"""

from __future__ import annotations

import logging
import math
import os
import signal
import sys
import time
import warnings
from dataclasses import asdict
from pathlib import Path
from typing import Any

import numpy as np

from mfbridge.errors import DiskFullError, InputError, MFBridgeError, RunStatusWarning
from mfbridge.model.endpoints import box_text
from mfbridge.result import COMPLETE_FILE, BridgeResult, disk_full
from mfbridge.runs import folders, records
from mfbridge.runs.api import CONF_DIR, solve
from mfbridge.runs.exits import EXIT_CODES, exit_code
from mfbridge.runs.lock import RunLock
from mfbridge.runs.records import WarmStart
from mfbridge.runs.signals import interruptible, signal_of, stop_workers
from mfbridge.solvers.fixed_point import Iteration

log = logging.getLogger("mfbridge")
# ${mfbridge_job_dir:...} names sweep job folders; sweep workers import this module too
records.register_resolvers()


def _progress(it: Iteration) -> None:
    """One log line per outer iteration or Newton–Krylov step, and a heartbeat line inside long
    ones (at least every few seconds), each with the time so far and an estimate of what
    remains."""
    if math.isnan(it.remaining):
        rest = "time left unknown (no steady decrease yet)"
    else:
        rest = f"about {it.remaining:.0f} s to go"
    if math.isfinite(it.budget_left):
        rest += f", budget left {max(it.budget_left, 0.0):.0f} s"
    stage = f" [{it.stage}]" if it.stage else ""
    if it.kind == "working":
        log.info("working on outer iteration %d%s: %.0f s so far; last residual %.2e; %s",
                 it.iteration + 1, stage, it.elapsed, it.residual, rest)
        return
    what = f"outer iteration {it.iteration:3d}"
    if it.kind == "newton":
        what += f" (Newton–Krylov, {it.products} Jacobian products, {it.trials} line-search solves)"
    log.info("%s%s: residual %.2e, marginal error %.2e, Sinkhorn %d it, %.2f s; %.0f s so far, %s",
             what, stage, it.residual, it.marginal_error, it.sinkhorn_iterations, it.seconds,
             it.elapsed, rest)


class _DirectProgress:
    """Log lines of the direct solver: every Newton iteration; L-BFGS iterations (thousands)
    for the first 10, then every 100th or after 2 s of silence."""

    def __init__(self) -> None:
        self.start = self.last = time.perf_counter()

    def __call__(self, kind: str, it: int, cost: float, grad: float) -> None:
        now = time.perf_counter()
        if kind == "L-BFGS" and it > 10 and it % 100 and now - self.last < 2.0:
            return
        self.last = now
        log.info("%s iteration %4d: J = %.8g, largest gradient entry %.2e, %.1f s",
                 kind, it, cost, grad, now - self.start)


def _segment_progress(segment: int, it: Iteration) -> None:
    log.info(
        "segment %d, outer iteration %3d: residual %.2e, marginal error %.2e, Sinkhorn %d it, "
        "%.2f s", segment, it.iteration, it.residual, it.marginal_error, it.sinkhorn_iterations,
        it.seconds,
    )


def _multirun() -> Any:
    """Hydra's config of the running job when it is a job of a multirun, else ``None``."""
    try:
        from hydra.core.hydra_config import HydraConfig
    except ImportError:  # pragma: no cover - hydra is a dependency
        return None
    if not HydraConfig.initialized():
        return None
    hc = HydraConfig.get()
    if hc.mode is None or hc.mode.name != "MULTIRUN":
        return None
    return hc


def _job_label() -> str | None:
    """``"#num override_dirname"`` of the running job of a Hydra multirun, else ``None``."""
    hc = _multirun()
    if hc is None:
        return None
    return f"#{hc.job.get('num')} {records.job_dir_name(hc.job.override_dirname)}".strip()


def choose_warm_start(config: dict[str, Any], out: Path, sweep_dir: Path | None
                      ) -> tuple[BridgeResult | None, WarmStart]:
    """The result that starts the solver for a run of the resolved ``config`` into ``out`` (or
    ``None``) and what to record about it; ``sweep_dir`` is the sweep folder of a multirun job.
    """
    from mfbridge.runs.api import load

    choice = config.get("warm_start", "auto")
    choice = "auto" if choice is None else choice
    if not isinstance(choice, str) or not choice:
        raise InputError(f"warm_start must be auto, nearest, none or a run folder, got {choice!r}")
    if choice == "none":
        return None, WarmStart(mode="none", reason="warm_start=none")
    if choice in ("auto", "nearest"):
        if sweep_dir is None:
            return None, WarmStart(mode="none" if choice == "auto" else "nearest",
                                   reason="a single run, not a job of a sweep")
        folder, warm = records.nearest_run(config, sweep_dir, exclude=out)
    else:
        warm = records.chosen_run(config, choice)
        folder = Path(warm.path) if warm.path else None
    if folder is None:
        return None, warm
    try:
        return load(folder), warm
    except InputError as exc:
        if warm.mode == "path":
            raise
        # e.g. removed by the user meanwhile: a cold start gives the same answer
        return None, WarmStart(mode=warm.mode, reason=f"could not read {folder}: {exc}")


class _LabelFilter(logging.Filter):
    """Prefix every message with a job label (parallel jobs share one console)."""

    def __init__(self, label: str) -> None:
        super().__init__()
        self.label = label

    def filter(self, record: logging.LogRecord) -> bool:
        record.msg = f"[{self.label}] {record.msg}"
        return True


def run(cfg: Any, output_dir: str | Path, *, record_extra: dict[str, Any] | None = None,
        sweep_dir: str | Path | None = None) -> BridgeResult:
    """Solve ``cfg``, write the result, the resolved config, the run record and figures into
    ``output_dir``; return the result (its ``status`` gives the exit code, see
    :mod:`mfbridge.runs.exits`).

    The folder's lock is held throughout (:mod:`mfbridge.runs.lock`); whether the folder may be
    written is decided from its record and completion marker (:func:`~mfbridge.runs.folders.
    prepare`): a complete run of the same resolved config is not recomputed (the *loaded* stored
    result is returned, whatever its status); an unfinished attempt of the same config is
    recomputed; anything else is refused with :class:`~mfbridge.runs.folders.RunFolderError`
    before anything is written. The record ends ``refused`` (an :class:`InputError`: bad input
    or not enough memory), ``failed`` (any other error), ``interrupted`` (SIGTERM/SIGINT) or
    with the solve's status, followed by the completion marker; figures are drawn after that,
    and a figure that cannot be drawn is logged, never changing the result's status. BLAS pools
    are capped at one thread (parallel sweep jobs must not fight over the cores).
    ``record_extra`` sets fields of the :class:`~mfbridge.runs.records.RunRecord` (e.g.
    ``replay_of``). ``sweep_dir`` is where the finished runs of the same sweep are looked for a
    warm start (default: Hydra's ``hydra.sweep.dir`` in a multirun job).
    """
    from omegaconf import OmegaConf

    out = Path(output_dir)
    config = OmegaConf.to_container(cfg, resolve=True)
    label = _job_label()
    label_filter = _LabelFilter(label) if label else None
    if label_filter is not None:
        log.addFilter(label_filter)
    lock = RunLock(out)
    try:
        with interruptible():
            folders.check_output_path(out)
            out.mkdir(parents=True, exist_ok=True)
            lock.acquire()
            if folders.prepare(out, config) == "skip":
                from mfbridge.runs.api import load

                stored = records.read_record(out)
                log.info("complete result already in %s (%s): skipped (delete the folder to "
                         "recompute)", out.resolve(), stored.status.replace("_", " "))
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", RunStatusWarning)
                    return load(out)
            return _compute(cfg, config, out, record_extra, sweep_dir)
    finally:
        lock.release()
        if label_filter is not None:
            log.removeFilter(label_filter)


def _compute(cfg: Any, config: dict[str, Any], out: Path,
             record_extra: dict[str, Any] | None, sweep_dir: str | Path | None
             ) -> BridgeResult:
    """The part of :func:`run` that writes into ``out`` (lock held, folder checked)."""
    from omegaconf import OmegaConf
    from threadpoolctl import threadpool_limits

    if sweep_dir is None and (hc := _multirun()) is not None:
        sweep_dir = hc.sweep.dir
    (out / COMPLETE_FILE).unlink(missing_ok=True)
    record = records.new_record(config, blas_threads=1, **(record_extra or {}))
    start = time.perf_counter()
    try:
        records.write_record(out, record)
        (out / "config.yaml").write_text(OmegaConf.to_yaml(cfg, resolve=True))
        warm, warm_record = choose_warm_start(config, out,
                                              None if sweep_dir is None else Path(sweep_dir))
        record.warm_start = asdict(warm_record)
        if warm_record.path is not None:
            log.info("warm start from %s (%s)", warm_record.path,
                     ", ".join(f"{k}: {a} there" for k, (a, _) in
                               warm_record.differences.items()) or "same numbers")
        else:
            log.info("cold start: %s", warm_record.reason)
        with threadpool_limits(limits=1):
            quiet = cfg.get("progress", True) is False
            result = solve(cfg, callback=None if quiet else _progress, warm_start=warm,
                           direct_callback=None if quiet else _DirectProgress(),
                           segment_callback=None if quiet else _segment_progress)
            result.save(out, marker=False)
        _report(result)
        record.status, record.finished = result.status, records.now()
        record.runtime_seconds = time.perf_counter() - start
        records.write_record(out, record)
    except MemoryError as exc:  # the estimate fitted, yet an allocation failed
        from mfbridge.runs.resources import out_of_memory

        error = out_of_memory(exc)
        _record_end(out, record, error, time.perf_counter() - start)
        raise error from exc
    except BaseException as exc:
        full = disk_full(out, exc) if isinstance(exc, OSError | RuntimeError) and not \
            isinstance(exc, DiskFullError) else None
        _record_end(out, record, full or exc, time.perf_counter() - start)
        if full is not None:  # e.g. config.yaml on a full disk: named, not a traceback
            raise full from exc
        raise
    if cfg.get("figures", True):  # a strict boolean (checked by solve)
        _draw_figures(cfg, result, out)
    log.info("run folder: %s", out.resolve())
    return result


def _report(result: BridgeResult) -> None:
    """Log the outcome: converged results at INFO, the others as warnings (their cost is not
    that of a bridge)."""
    level = logging.INFO if result.converged else logging.WARNING
    log.log(level, "%s", result.message)
    cost = "cost J" if result.converged else f"cost J of the {result.status.replace('_', ' ')} " \
                                            "iterate (not a bridge's)"
    for k, seg in enumerate(result.segments):
        log.log(level, "segment %d [%g, %g]: J = %.8g (%s)", k, seg.start, seg.end, seg.cost,
                seg.status.replace("_", " "))
    log.log(level, "%s = %.8g  (kinetic %.6g, drift %.6g, free-energy change %.6g)%s", cost,
            result.cost, result.cost_kinetic, result.cost_drift, result.cost_free_energy,
            f", summed over {len(result.segments)} segments" if result.segments else "")
    for alt in result.alternatives:
        log.warning("another bridge (start %s, %s): cost J = %.8g, max L1 distance "
                    "%.3g to the returned one, mean at T/2 %s", alt.start,
                    alt.status.replace("_", " "), alt.cost, alt.distance,
                    np.array2string(alt.mean[len(alt.mean) // 2], precision=4))
    # the grid (fitted by default: model.fitted_grid), the discretisation-error estimate
    # (mfbridge.solvers.accuracy) and the grid advice
    grid = result.grid
    log.log(level, "grid: %s cells on %s, %d time steps", " x ".join(map(str, grid.shape)),
            box_text(grid.lower, grid.upper, ".4g"), len(result.times) - 1)
    for line in result.error.lines() if result.error is not None else []:
        log.log(level, "%s", line)
    for line in result.advice:
        log.warning("%s", line)


def _record_end(out: Path, record: records.RunRecord, exc: BaseException,
                seconds: float) -> None:
    """Write the record of a run that ended in ``exc``: interrupted, refused or failed."""
    if isinstance(exc, KeyboardInterrupt):
        record.status = "interrupted"
        record.error = f"interrupted by {signal.Signals(signal_of(exc)).name}"
    elif isinstance(exc, InputError):
        record.status, record.error = "refused", str(exc)
    else:
        record.status, record.error = "failed", f"{type(exc).__name__}: {exc}"
    record.finished, record.runtime_seconds = records.now(), seconds
    try:
        records.write_record(out, record)
    except OSError as write_error:
        full = disk_full(out, write_error)
        log.error("could not record the end of the run in %s (%s): its record may still say "
                  "'running'; with no completion marker it is never taken for a finished run",
                  out, full or write_error)


def _draw_figures(cfg: Any, result: BridgeResult, out: Path) -> None:
    """Draw the run's figures; a failure (a full disk...) is logged and changes nothing else:
    the result is saved and complete already."""
    from mfbridge.runs.plotting import plot_result

    try:
        for path in plot_result(result, out, scale=cfg.get("density_scale", "auto")):
            log.info("figure: %s", path)
    except Exception as exc:
        reason = disk_full(out, exc) or f"{type(exc).__name__}: {exc}"
        log.warning("figures not drawn (%s); the result in %s is saved and complete: draw "
                    "them again with mfbridge.runs.plotting.plot_result(mfbridge.load(...), "
                    "folder)", reason, out)


# Subcommands: ``mfbridge NAME ...`` runs ``mfbridge.runs.commands.NAME.main(argv)``; anything
# else is a Hydra override list for a solve.
SUBCOMMANDS: dict[str, str] = {
    "check": "mfbridge.runs.commands.check",
    "replay": "mfbridge.runs.commands.replay",
    "collect": "mfbridge.runs.commands.collect",
    "fit": "mfbridge.runs.commands.fit",
    "compare": "mfbridge.runs.commands.compare",
}
# the process that runs main(); a sweep's worker processes import this module but are not it
_MAIN_PID: int | None = None


def _output_overrides(argv: list[str]) -> list[str]:
    """The folders named by hydra.run.dir=/hydra.sweep.dir= overrides (no interpolations)."""
    found = []
    for arg in argv:
        key, sep, value = arg.lstrip("+~").partition("=")
        if sep and key in ("hydra.run.dir", "hydra.sweep.dir") and value and "${" not in value:
            found.append(value.strip("'\""))
    return found


def _interrupted(exc: BaseException, multirun: bool) -> int:
    """Print the one line of an interruption; return the exit code (128 + signal)."""
    from mfbridge.runs.exits import signal_exit_code
    from mfbridge.runs.sweeps import LAST, split_entries, summary_line, sweep_jobs

    signum = signal_of(exc)
    name = signal.Signals(signum).name
    if multirun and LAST.sweep_dir is not None:
        for entry in split_entries(LAST.sweep_dir)[0]:
            folders.mark_interrupted(entry.folder, f"interrupted by {name} (sweep stopped)")
        ours, _ = split_entries(LAST.sweep_dir)
        jobs = sweep_jobs(LAST.sweep_dir)
        sys.stderr.write(f"mfbridge: interrupted by {name}: "
                         f"{summary_line(ours, None if jobs is None else len(jobs))} in "
                         f"{LAST.sweep_dir}; run the same command again to resume\n")
    else:
        sys.stderr.write(f"mfbridge: interrupted by {name}; the run is recorded as "
                         "interrupted (run the same command again to recompute it)\n")
    return signal_exit_code(signum)


def main() -> None:
    """Console entry point (``mfbridge``, ``python -m mfbridge``); exit codes in
    :mod:`mfbridge.runs.exits`."""
    global _MAIN_PID
    _MAIN_PID = os.getpid()
    if sys.argv[1:] in (["--help"], ["-h"], ["help"]):
        from mfbridge.runs.cli_help import help_text

        sys.stdout.write(help_text())
        sys.exit(0)
    if sys.argv[1:] in (["--version"], ["-V"]):
        from mfbridge.runs.cli_help import version_text

        sys.stdout.write(version_text())
        sys.exit(0)
    # user modules named in the config (_target_=mypot.MyPair, interaction.fn=mypot:f) are
    # found in the working directory, as data files are; last, so they shadow nothing
    if os.getcwd() not in sys.path:
        sys.path.append(os.getcwd())
    if len(sys.argv) > 1 and sys.argv[1] in SUBCOMMANDS:
        import importlib

        module = importlib.import_module(SUBCOMMANDS[sys.argv[1]])
        sys.exit(module.main(sys.argv[2:]))

    from mfbridge.runs.config_checks import override_mistakes

    mistakes = override_mistakes(sys.argv[1:])
    multirun = any(a in ("-m", "--multirun") for a in sys.argv[1:])
    # without an override the run goes below the working directory (conf/config.yaml)
    for folder in _output_overrides(sys.argv[1:]) or ["multirun" if multirun else "runs"]:
        try:
            folders.check_output_path(folder)
        except InputError as exc:
            mistakes.append(str(exc))
    if mistakes:
        sys.stderr.write("".join(f"mfbridge: error: {m}\n" for m in mistakes))
        sys.exit(EXIT_CODES["refused"])
    try:
        with interruptible(stop_workers if multirun else None):
            _hydra_app()
    except KeyboardInterrupt as exc:
        sys.exit(_interrupted(exc, multirun))
    if multirun:
        from mfbridge.runs.sweeps import LAST

        sys.exit(LAST.exit_code or 0)


def _hydra_app() -> None:
    import hydra
    from hydra.core.hydra_config import HydraConfig
    from hydra.types import RunMode

    @hydra.main(config_path=str(CONF_DIR), config_name="config", version_base="1.3")
    def app(cfg: Any) -> None:
        hc = HydraConfig.get()
        output_dir = hc.runtime.output_dir
        if hc.mode == RunMode.MULTIRUN:
            # One failing job must not abort the sweep: run() has already recorded it in its
            # folder (collect lists it); log it and let the launcher go on.
            try:
                run(cfg, output_dir)
            except KeyboardInterrupt as exc:
                if os.getpid() != _MAIN_PID:  # a worker: its job is recorded, stop it now
                    os._exit(128 + signal_of(exc))
                raise
            except Exception as exc:  # any job error is reported, not raised
                detail = "" if isinstance(exc, MFBridgeError) else f" ({type(exc).__name__})"
                log.error("job %s in %s: %s", "refused" if isinstance(exc, InputError)
                          else "failed" + detail, output_dir, exc,
                          exc_info=not isinstance(exc, MFBridgeError))
            return
        try:
            result = run(cfg, output_dir)
        except MFBridgeError as exc:
            log.error("%s", exc)
            sys.exit(EXIT_CODES["refused" if isinstance(exc, InputError) else "failed"])
        sys.exit(exit_code(result.status))

    app()


if __name__ == "__main__":
    main()
