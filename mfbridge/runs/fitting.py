"""Fits from run configurations, and the fit folder: estimate, intervals, profiles, every
evaluation, and the bridge at the estimate as an ordinary run folder.

A fit folder holds

* ``fit.json``: the fitted parameters with bounds and starting values, N, the estimate θ̂,
  ΣJ(θ̂) and N·ΣJ(θ̂), the Hessian and standard errors, the intervals (profile, joint-region
  projection, Hessian), L-BFGS-B's report, status and message, the snapshot times and the
  per-segment costs at θ̂, the configuration overrides, the caution on what the numbers mean;
  written last, so a folder without it is not a finished fit;
* ``evaluations.csv``: every solve of the series (search, Hessian, Newton, profile points) with
  its parameter values, ΣJ, N·ΣJ, segment costs, gradient, status, outer iterations and time;
* ``intervals.csv`` and ``profiles.csv``: the same numbers as tables;
* ``profile.png``: 2N(ΣJ − ΣJ(θ̂)) along each parameter (others re-minimised), its quadratic
  (Hessian) approximation, the χ² thresholds and the intervals;
* ``bridge/``: the bridge at θ̂ as a run folder of ``mfbridge`` (``check``, ``replay`` and
  ``collect`` work on it; its ``config.yaml`` is the configuration with θ̂ written in);
* ``fit.log``: the progress, one line per evaluation.
"""

from __future__ import annotations

import csv
import json
import logging
import math
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.problem import BridgeProblem
from mfbridge.model.series import SeriesProblem, Snapshot, smoothing_kernel
from mfbridge.runs.api import build_problem, compose, parallel_jobs, process_pool
from mfbridge.solvers.comparison import CAUTION, FitSummary, ModelComparison, compare_models
from mfbridge.solvers.fit import (
    Evaluation,
    FitOptions,
    FitParameter,
    FitResult,
    fit_series,
    smoothing_note,
)

log = logging.getLogger("mfbridge")

FIT_FILE = "fit.json"
EVALUATIONS_FILE = "evaluations.csv"
INTERVALS_FILE = "intervals.csv"
PROFILES_FILE = "profiles.csv"
PROFILE_FIGURE = "profile.png"
BRIDGE_DIR = "bridge"
LOG_FILE = "fit.log"


# --------------------------------------------------------------------------- inputs


def parse_parameter(text: str) -> FitParameter:
    """``NAME=LOWER:UPPER`` or ``NAME=LOWER:UPPER:START`` → :class:`FitParameter`."""
    name, sep, rest = str(text).partition("=")
    parts = rest.split(":")
    if not sep or not name.strip() or len(parts) not in (2, 3):
        raise InputError(f"a fitted parameter is NAME=LOWER:UPPER or NAME=LOWER:UPPER:START, "
                         f"e.g. interaction.strength=0:3; got {text!r}")
    try:
        numbers = [float(p) for p in parts]
    except ValueError as exc:
        raise InputError(f"the bounds of {name.strip()} must be numbers, got {rest!r}") from exc
    return FitParameter(name.strip(), numbers[0], numbers[1],
                        numbers[2] if len(numbers) == 3 else None)


def check_config_names(cfg: Any, names: Sequence[str]) -> None:
    """Each name must be a numeric model entry of the configuration (``noise``, ``diffusion``,
    ``confinement.*``, ``interaction.*``); :class:`InputError` naming the numeric entries
    otherwise. Checked before anything is built or solved."""
    from omegaconf import OmegaConf

    container = OmegaConf.to_container(cfg, resolve=True)
    numeric = []
    for part in ("confinement", "interaction"):
        numeric += [f"{part}.{k}" for k, v in _flatten(container.get(part) or {}).items()
                    if _is_number(v)]
    listing = ", ".join(["noise", "diffusion", *numeric])
    for name in names:
        if name in ("noise", "diffusion"):
            continue
        part = name.partition(".")[0]
        value = OmegaConf.select(cfg, name, default=_MISSING)
        if part not in ("confinement", "interaction"):
            raise InputError(f"{name!r} is not a model parameter that can be fitted (only the "
                             f"noise and the potentials' numbers can); they are: {listing}")
        if value is _MISSING:
            raise InputError(f"the configuration has no entry {name!r}; numeric model "
                             f"parameters are: {listing}")
        if not _is_number(value):
            raise InputError(f"{name} = {value!r} is not a number and cannot be fitted; numeric "
                             f"model parameters are: {listing}")


_MISSING = object()


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _flatten(node: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in node.items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping):
            out.update(_flatten(value, name + "."))
        else:
            out[name] = value
    return out


def series_problem(cfg: Any) -> SeriesProblem:
    """The series of snapshots a configuration describes; plain endpoints are a series of two
    snapshots, at 0 and at the horizon."""
    problem = build_problem(cfg)
    if isinstance(problem, SeriesProblem):
        return problem
    assert isinstance(problem, BridgeProblem)
    from mfbridge.runs.api import _build

    ends = _build(cfg, "endpoints")  # the laws themselves: their smoothing kernels
    return SeriesProblem(grid=problem.grid,
                         snapshots=(Snapshot(0.0, problem.initial),
                                    Snapshot(problem.horizon, problem.final)),
                         noise=problem.noise, steps=problem.steps,
                         confinement=problem.confinement, interaction=problem.interaction,
                         kernels=(smoothing_kernel(ends["initial"]),
                                  smoothing_kernel(ends["final"])))


def fitted_config(cfg: Any, estimate: Mapping[str, float]) -> Any:
    """A copy of ``cfg`` with the estimate written in (the noise as σ or D, the other cleared)."""
    from omegaconf import OmegaConf, open_dict

    out = OmegaConf.create(OmegaConf.to_container(cfg, resolve=False))
    with open_dict(out):
        for name, value in estimate.items():
            if name == "noise":
                out.noise, out.diffusion = float(value), None
            elif name == "diffusion":
                out.noise, out.diffusion = None, float(value)
            else:
                OmegaConf.update(out, name, float(value), force_add=False)
    return out


# --------------------------------------------------------------------------- fitting


def _progress(population: int) -> Any:
    def report(ev: Evaluation) -> None:
        values = ", ".join(f"{k} {v:.6g}" for k, v in ev.values.items())
        grad = max(abs(g) for g in ev.gradient.values())
        log.info("evaluation %3d (%s): %s: ΣJ = %.8g, N·ΣJ = %.6g, largest |dΣJ/dθ| %.2e, "
                 "%s, %d outer iterations, %.2f s", ev.index, ev.kind, values, ev.cost,
                 population * ev.cost, grad, ev.status.replace("_", " "), ev.iterations,
                 ev.seconds)
    return report


def fit(config: Any, parameters: Sequence[FitParameter | str] | Mapping[str, Any],
        population: int, out: str | Path | None = None, options: FitOptions | None = None,
        jobs: Any = None) -> FitResult:
    """Fit the named model parameters of a run configuration to its snapshots.

    ``config``: a composed configuration (:func:`~mfbridge.runs.api.compose`) or a list of
    overrides; ``parameters``: :class:`~mfbridge.solvers.fit.FitParameter` objects,
    ``"NAME=LO:HI[:START]"`` strings, or a mapping name → (lower, upper[, start]);
    ``population``: N, the number of particles observed at each time. With ``out`` the fit
    folder is written there (see the module docstring). ``jobs``: processes for the segments
    (default: the config's ``jobs``). Everything is checked before the first solve.
    """
    cfg = config if hasattr(config, "keys") else compose(list(config))
    params = _parameters(parameters)
    check_config_names(cfg, [p.name for p in params])
    problem = series_problem(cfg)
    options = options or FitOptions()
    n_jobs = parallel_jobs(cfg.get("jobs", 1) if jobs is None else jobs,
                           len(problem.snapshots) - 1)
    folder = None if out is None else Path(out)
    handler, lock = None, None
    if folder is not None:
        from mfbridge.runs.lock import RunLock

        check_fit_folder(folder)
        folder.mkdir(parents=True, exist_ok=True)
        lock = RunLock(folder).acquire()
        check_fit_folder(folder)  # again with the lock held: no other fit started meanwhile
        handler = logging.FileHandler(folder / LOG_FILE, mode="w")
        handler.setFormatter(logging.Formatter("[%(asctime)s] %(message)s"))
        log.addHandler(handler)
    try:
        log.info("fitting %s to %d snapshots at t = %s (N = %d, %d segment(s) in %d "
                 "process(es))", ", ".join(f"{p.name} in [{p.lower:g}, {p.upper:g}]"
                                           for p in params),
                 len(problem.snapshots), ", ".join(f"{t:g}" for t in problem.times),
                 population, len(problem.snapshots) - 1, n_jobs)
        if (note := smoothing_note(problem)) is not None:
            log.warning("%s", note)
        start = time.perf_counter()
        if n_jobs > 1:
            with process_pool(n_jobs) as pool:
                result = fit_series(problem, params, population, options,
                                    _progress(population), executor=pool)
        else:
            result = fit_series(problem, params, population, options, _progress(population))
        log.info("%s (%.1f s)", result.message, time.perf_counter() - start)
        for line in interval_lines(result):
            log.info("%s", line)
        if folder is not None:
            write_fit_folder(folder, cfg, result)
    finally:
        if handler is not None:
            log.removeHandler(handler)
            handler.close()
        if lock is not None:
            lock.release()
    return result


def check_fit_folder(folder: str | Path) -> None:
    """Refuse (:class:`~mfbridge.runs.folders.RunFolderError`, before any solve) a fit folder
    that must not be written: one that cannot be a folder, one holding a finished fit
    (``fit.json``), one holding anything but the files of a fit stopped before its bridge was
    written (that one is simply computed again)."""
    from mfbridge.runs.folders import RunFolderError, check_output_path
    from mfbridge.runs.lock import LOCK_FILE

    path = Path(folder)
    check_output_path(path)
    if not path.exists():
        return
    entries = {p.name for p in path.iterdir()}
    advice = "choose another --out folder or delete it"
    if FIT_FILE in entries:
        raise RunFolderError(f"{path} holds a finished fit ({FIT_FILE}); mfbridge does not "
                             f"overwrite it: {advice}")
    ours = {EVALUATIONS_FILE, INTERVALS_FILE, PROFILES_FILE, PROFILE_FIGURE, LOG_FILE,
            LOCK_FILE} | {f".{name}.tmp" for name in (EVALUATIONS_FILE, INTERVALS_FILE,
                                                      PROFILES_FILE, FIT_FILE)}
    others = sorted(entries - ours)
    if others:
        raise RunFolderError(f"{path} holds {', '.join(others[:5])}"
                             f"{' ...' if len(others) > 5 else ''}: not an unfinished fit "
                             f"folder, and mfbridge does not write into it: {advice}")


def _parameters(parameters: Any) -> list[FitParameter]:
    if isinstance(parameters, Mapping):
        out = []
        for name, bounds in parameters.items():
            values = list(bounds) if isinstance(bounds, (list, tuple)) else [bounds]
            if len(values) not in (2, 3):
                raise InputError(f"the bounds of {name} must be (lower, upper) or (lower, "
                                 f"upper, start), got {bounds!r}")
            out.append(FitParameter(name, *values))
        return out
    return [p if isinstance(p, FitParameter) else parse_parameter(p) for p in parameters]


def interval_lines(result: FitResult) -> list[str]:
    """The estimate and intervals, one line per parameter and method."""
    lines = [f"{'parameter':24s} {'estimate':>11s} {'method':>8s} {'lower':>11s} {'upper':>11s}"]
    for iv in result.intervals:
        lo = f"{iv.lower:.5g}" + ("+" if iv.lower_open else "")
        hi = f"{iv.upper:.5g}" + ("+" if iv.upper_open else "")
        lines.append(f"{iv.name:24s} {iv.estimate:11.5g} {iv.method:>8s} {lo:>11s} {hi:>11s}")
    return lines


# --------------------------------------------------------------------------- the fit folder


def _atomic_text(path: Path, text: str) -> None:
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(text)
    tmp.replace(path)


def _write_csv(path: Path, header: list[str], rows: list[list[Any]]) -> None:
    tmp = path.with_name(f".{path.name}.tmp")
    with tmp.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        writer.writerows(rows)
    tmp.replace(path)


def fit_record(cfg: Any, result: FitResult) -> dict[str, Any]:
    """The content of ``fit.json``."""
    from omegaconf import OmegaConf

    return {
        "parameters": [{"name": p.name, "lower": p.lower, "upper": p.upper,
                        "initial": p.initial} for p in result.parameters],
        "population": result.population,
        "estimate": result.estimate,
        "sum_J": result.cost,
        "N_sum_J": result.neg_log_likelihood,
        "segment_costs": result.bridge.costs,
        "snapshot_times": [float(t) for t in result.bridge.problem.times],
        "status": result.status,
        "message": result.message,
        "level": result.level,
        "standard_errors": result.standard_errors,
        "hessian": np.asarray(result.hessian).tolist(),
        "intervals": [{k: (bool(v) if isinstance(v, (bool, np.bool_)) else
                           float(v) if isinstance(v, (float, np.floating)) else v)
                       for k, v in iv.__dict__.items()} for iv in result.intervals],
        "optimizer": result.optimizer,
        "evaluations": len(result.evaluations),
        "seconds": result.seconds,
        "config": OmegaConf.to_container(cfg, resolve=True),
        "caution": CAUTION,
    }


def write_fit_folder(folder: Path, cfg: Any, result: FitResult) -> Path:
    """Write the fit folder (see the module docstring); ``fit.json`` last."""
    from mfbridge.runs.cli import run

    names = [p.name for p in result.parameters]
    segments = max(len(ev.segment_costs) for ev in result.evaluations)
    _write_csv(folder / EVALUATIONS_FILE,
               ["index", "kind", *names, "sum_J", "N_sum_J",
                *[f"J_segment_{k}" for k in range(segments)],
                *[f"dJ/d({n})" for n in names], "status", "outer_iterations", "seconds"],
               [[ev.index, ev.kind, *[ev.values[n] for n in names], ev.cost,
                 result.population * ev.cost, *ev.segment_costs,
                 *[ev.gradient[n] for n in names], ev.status, ev.iterations,
                 round(ev.seconds, 3)] for ev in result.evaluations])
    _write_csv(folder / INTERVALS_FILE,
               ["parameter", "method", "level", "estimate", "lower", "upper", "lower_open",
                "upper_open"],
               [[iv.name, iv.method, iv.level, iv.estimate, iv.lower, iv.upper, iv.lower_open,
                 iv.upper_open] for iv in result.intervals])
    rows = []
    for prof in result.profiles:
        for i, value in enumerate(prof.values):
            others = ";".join(f"{k}={v[i]:.8g}" for k, v in prof.others.items())
            rows.append([prof.name, value, prof.cost[i], prof.statistic[i], others])
    _write_csv(folder / PROFILES_FILE, ["parameter", "value", "sum_J", "statistic",
                                         "others"], rows)
    if result.profiles:
        from mfbridge.runs.fit_plots import plot_profiles

        plot_profiles(result, folder / PROFILE_FIGURE)
    log.info("the bridge at the estimate, as a run folder: %s", folder / BRIDGE_DIR)
    run(fitted_config(cfg, result.estimate), folder / BRIDGE_DIR)
    _atomic_text(folder / FIT_FILE, json.dumps(fit_record(cfg, result), indent=2) + "\n")
    log.info("fit folder: %s", folder.resolve())
    return folder


# --------------------------------------------------------------------------- comparison


def read_fit(folder: str | Path) -> tuple[FitSummary, dict[str, Any]]:
    """A fit folder's summary (for :func:`compare_fits`) and its ``fit.json``."""
    path = Path(folder) / FIT_FILE
    if not path.is_file():
        raise InputError(f"{folder} holds no {FIT_FILE}: not a finished fit folder "
                         "(mfbridge fit ... --out FOLDER writes one)")
    try:
        record = json.loads(path.read_text())
        summary = FitSummary(population=int(record["population"]), cost=float(record["sum_J"]),
                             parameters=len(record["parameters"]), status=str(record["status"]),
                             times=tuple(float(t) for t in record["snapshot_times"]))
    except (KeyError, TypeError, ValueError) as exc:
        raise InputError(f"{path} is not a valid fit record: {exc}") from exc
    return summary, record


def compare_fits(folders: Sequence[str | Path],
                 labels: Sequence[str] | None = None) -> ModelComparison:
    """:func:`~mfbridge.solvers.comparison.compare_models` of fit folders (labels: the folder names
    unless given)."""
    if labels is not None and len(labels) != len(folders):
        raise InputError(f"give one label per fit folder ({len(folders)}), got {len(labels)}")
    names = list(labels) if labels is not None else [Path(f).name for f in folders]
    if len(set(names)) != len(names):
        raise InputError(f"the models need distinct labels, got {names}")
    return compare_models({name: read_fit(f)[0] for name, f in zip(names, folders,
                                                                    strict=True)})


def comparison_table(comparison: ModelComparison) -> str:
    """The comparison as a Markdown table, followed by the caution."""
    lines = [f"N = {comparison.population}", "",
             "| model | fitted parameters | ΣJ(θ̂) | N·ΣJ(θ̂) | Δ = N·ΣJ − best | likelihood "
             "ratio best : model = e^Δ | Wilks p-value against the largest model | fit status |",
             "| --- | ---: | ---: | ---: | ---: | ---: | ---: | --- |"]
    for row in comparison.rows:
        ratio = row["likelihood_ratio"]
        ratio_text = "∞" if math.isinf(ratio) else f"{ratio:.4g}"
        p = row["wilks_p_value"]
        lines.append(f"| {row['model']} | {row['parameters']} | {row['sum_J']:.6g} | "
                     f"{row['N_sum_J']:.6g} | {row['delta']:.4g} | {ratio_text} | "
                     f"{'—' if math.isnan(p) else f'{p:.3g}'} | {row['status']} |")
    lines += ["", comparison.caution]
    return "\n".join(lines)
