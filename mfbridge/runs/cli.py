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
  summary and record (a folder without it was killed or failed);
* figures (``density.png``, ``moments.png``, ``convergence.png``; unless ``figures=false``);
* the log (``mfbridge.log``) and Hydra's own ``.hydra/`` record.

Warm starts (config entry ``warm_start``): ``auto`` (default) is ``nearest`` in a sweep and
``none`` in a single run; ``nearest`` starts the solver from the finished, converged run of the
same sweep folder nearest in the swept numbers (:func:`mfbridge.runs.records.nearest_run` defines
the distance; the first jobs of a sweep, and parallel jobs that start together, start cold);
``none`` always starts cold; a path starts from that run folder. ``record.json`` says which run
was used, or why none was. The answer does not depend on the start beyond the solver tolerance.

Errors: a single run that fails exits with status 2 (an input or solver error) or with
Hydra's traceback (anything else). In a multirun a failing job is logged and recorded as failed
in its folder, and the sweep goes on with the other jobs (``mfbridge collect`` lists it).
"""

from __future__ import annotations

import logging
import os
import sys
import time
from dataclasses import asdict
from pathlib import Path
from typing import Any

import numpy as np

from mfbridge.runs import records
from mfbridge.runs.api import CONF_DIR, solve
from mfbridge.errors import InputError, MFBridgeError
from mfbridge.solvers.fixed_point import Iteration
from mfbridge.runs.records import WarmStart
from mfbridge.result import BridgeResult

log = logging.getLogger("mfbridge")
# ${mfbridge_job_dir:...} names sweep job folders; sweep workers import this module too
records.register_resolvers()


def _progress(it: Iteration) -> None:
    log.info(
        "outer iteration %3d: residual %.2e, marginal error %.2e, Sinkhorn %d it, %.2f s",
        it.iteration, it.residual, it.marginal_error, it.sinkhorn_iterations, it.seconds,
    )


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
    ``output_dir``; return the result.

    Resume: when ``output_dir`` already holds a complete run (see :mod:`mfbridge.runs.records`) of the
    same resolved config, nothing is recomputed and the *loaded* stored result is returned; a
    complete run of a different config is an :class:`~mfbridge.errors.InputError`. A folder
    left by a killed or failed run is recomputed. BLAS pools are capped at one thread for the
    whole run (parallel sweep jobs must not fight over the cores). ``record_extra`` sets fields
    of the :class:`~mfbridge.runs.records.RunRecord` (e.g. ``replay_of``). ``sweep_dir`` is where
    the finished runs of the same sweep are looked for a warm start (default: Hydra's
    ``hydra.sweep.dir`` in a multirun job; see :func:`choose_warm_start`).
    """
    from omegaconf import OmegaConf
    from threadpoolctl import threadpool_limits

    from mfbridge.runs.api import load

    out = Path(output_dir)
    config = OmegaConf.to_container(cfg, resolve=True)
    label = _job_label()
    label_filter = _LabelFilter(label) if label else None
    if label_filter is not None:
        log.addFilter(label_filter)
    try:
        if records.is_complete(out):
            stored = records.read_record(out)
            if stored.config != config:
                raise InputError(
                    f"{out} already holds a complete run of a different configuration; "
                    "choose another output folder (hydra.run.dir / hydra.sweep.dir) or delete it"
                )
            log.info("complete result already in %s: skipped (delete the folder to recompute)",
                     out.resolve())
            return load(out)
        if sweep_dir is None and (hc := _multirun()) is not None:
            sweep_dir = hc.sweep.dir
        warm, warm_record = choose_warm_start(config, out,
                                              None if sweep_dir is None else Path(sweep_dir))
        if warm_record.path is not None:
            log.info("warm start from %s (%s)", warm_record.path,
                     ", ".join(f"{k}: {a} there" for k, (a, _) in
                               warm_record.differences.items()) or "same numbers")
        else:
            log.info("cold start: %s", warm_record.reason)
        out.mkdir(parents=True, exist_ok=True)
        records.clear_marker(out)
        record = records.new_record(config, blas_threads=1, warm_start=asdict(warm_record),
                                    **(record_extra or {}))
        records.write_record(out, record)
        (out / "config.yaml").write_text(OmegaConf.to_yaml(cfg, resolve=True))
        start = time.perf_counter()
        try:
            with threadpool_limits(limits=1):
                quiet = cfg.get("progress", True) is False
                result = solve(cfg, callback=None if quiet else _progress, warm_start=warm,
                               direct_callback=None if quiet else _DirectProgress())
                result.save(out)
                log.info("%s", result.message)
                log.info("cost J = %.8g  (kinetic %.6g, drift %.6g, free-energy change %.6g)",
                         result.cost, result.cost_kinetic, result.cost_drift,
                         result.cost_free_energy)
                for alt in result.alternatives:
                    log.warning("another bridge (start %s, %s): cost J = %.8g, max L1 distance "
                                "%.3g to the returned one, mean at T/2 %s", alt.start,
                                alt.status.replace("_", " "), alt.cost, alt.distance,
                                np.array2string(alt.mean[len(alt.mean) // 2], precision=4))
                if cfg.get("figures", True):
                    from mfbridge.runs.plotting import plot_result

                    for path in plot_result(result, out,
                                            scale=cfg.get("density_scale", "auto")):
                        log.info("figure: %s", path)
        except BaseException as exc:
            record.status, record.error = "failed", f"{type(exc).__name__}: {exc}"
            record.finished, record.runtime_seconds = records.now(), time.perf_counter() - start
            records.write_record(out, record)
            raise
        record.status, record.finished = result.status, records.now()
        record.runtime_seconds = time.perf_counter() - start
        records.write_record(out, record)
        log.info("run folder: %s", out.resolve())
        return result
    finally:
        if label_filter is not None:
            log.removeFilter(label_filter)


# Subcommands: ``mfbridge NAME ...`` runs ``mfbridge.runs.commands.NAME.main(argv)``; anything else
# is a Hydra override list for a solve.
SUBCOMMANDS: dict[str, str] = {
    "check": "mfbridge.runs.commands.check",
    "replay": "mfbridge.runs.commands.replay",
    "collect": "mfbridge.runs.commands.collect",
}


def main() -> None:
    """Console entry point (``mfbridge``, ``python -m mfbridge``)."""
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
    if mistakes:
        sys.stderr.write("".join(f"mfbridge: error: {m}\n" for m in mistakes))
        sys.exit(2)

    import hydra
    from hydra.core.hydra_config import HydraConfig
    from hydra.types import RunMode

    @hydra.main(config_path=str(CONF_DIR), config_name="config", version_base="1.3")
    def app(cfg: Any) -> None:
        hc = HydraConfig.get()
        output_dir = hc.runtime.output_dir
        if hc.mode == RunMode.MULTIRUN:
            # One failing job must not abort the sweep: run() has already recorded it as
            # failed in its folder (collect lists it); log it and let the launcher go on.
            try:
                run(cfg, output_dir)
            except Exception as exc:  # any job error is reported, not raised
                detail = "" if isinstance(exc, MFBridgeError) else f" ({type(exc).__name__})"
                log.error("job failed%s in %s: %s", detail, output_dir, exc,
                          exc_info=not isinstance(exc, MFBridgeError))
            return
        try:
            run(cfg, output_dir)
        except MFBridgeError as exc:
            log.error("%s", exc)
            sys.exit(2)

    app()


if __name__ == "__main__":
    main()
