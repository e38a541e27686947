"""Python entry points: compose a config, solve it, load a saved result, check it with particles.

>>> import mfbridge
>>> cfg = mfbridge.compose(["interaction=harmonic", "interaction.strength=1.5"])  # doctest: +SKIP
>>> result = mfbridge.solve(cfg)                                                  # doctest: +SKIP
>>> result.save("runs/example")                                                   # doctest: +SKIP
>>> mfbridge.load("runs/example").cost                                            # doctest: +SKIP

Hydra is imported only by the runs layer, and only when a function needs it.
"""

from __future__ import annotations

import json
import math
import os
import time
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from mfbridge.errors import InputError, RunStatusWarning, is_real_number
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import (
    Confinement,
    Interaction,
    confinement_from_name,
    interaction_from_name,
)
from mfbridge.model.problem import BridgeProblem
from mfbridge.model.series import SeriesProblem
from mfbridge.particles.statistics import CheckReport
from mfbridge.particles.statistics import check as particle_check
from mfbridge.result import (
    COMPLETE_FILE,
    RESULT_FILE,
    BridgeResult,
    changed_files,
    dataset_summary,
    read_marker,
)
from mfbridge.solvers.accuracy import (
    AccuracyOptions,
    fixed_point_solve,
    say_if_missing,
    series_estimate,
    solve_with_estimate,
)
from mfbridge.solvers.fixed_point import Iteration, SolverOptions
from mfbridge.solvers.series import SeriesResult, solve_series

CONF_DIR = Path(__file__).resolve().parents[2] / "conf"
GROUPS = ("grid", "confinement", "interaction", "endpoints", "solver")  # required ones


def compose(overrides: Sequence[str] | None = None, config_name: str = "config") -> Any:
    """The run configuration (an OmegaConf ``DictConfig``) with Hydra-style ``overrides``.

    Unknown groups, options or keys raise :class:`~mfbridge.errors.InputError` listing what exists.
    """
    from hydra import compose as hydra_compose
    from hydra import initialize_config_dir
    from hydra.errors import HydraException
    from omegaconf.errors import OmegaConfBaseException

    overrides = list(overrides or [])
    from mfbridge.runs.config_checks import override_mistakes

    mistakes = override_mistakes(overrides)
    if mistakes:
        raise InputError("; ".join(mistakes))
    try:
        with initialize_config_dir(config_dir=str(CONF_DIR), version_base="1.3"):
            return hydra_compose(config_name=config_name, overrides=overrides)
    except (HydraException, OmegaConfBaseException) as exc:
        raise InputError(f"invalid configuration {overrides}: {exc}") from exc


def _build(cfg: Any, group: str) -> Any:
    from hydra.utils import instantiate

    try:
        return instantiate(cfg[group])
    except InputError:
        raise
    except Exception as exc:
        cause = exc.__cause__ or exc
        raise InputError(f"config group {group!r}: {cause}") from exc


def noise_from_config(noise: Any, diffusion: Any) -> Any:
    """σ from the config's ``noise`` (σ, length/√time) or ``diffusion`` (D, length²/time):
    σ = √(2D). Both may be given only if they agree (relative difference ≤ 1e-9)."""
    if diffusion is None:
        if noise is None:
            raise InputError("give the noise as noise=σ (length/√time) or as diffusion=D "
                             "(length²/time, σ = √(2D)); both are null")
        return noise
    numeric = isinstance(diffusion, (int, float)) and not isinstance(diffusion, bool)
    if not numeric or not (math.isfinite(diffusion) and diffusion > 0):
        raise InputError(f"diffusion D must be a positive finite number (length²/time), "
                         f"got {diffusion!r}")
    sigma = math.sqrt(2.0 * diffusion)
    if noise is not None:
        numeric = isinstance(noise, (int, float)) and not isinstance(noise, bool)
        if not numeric or not math.isclose(noise, sigma, rel_tol=1e-9):
            raise InputError(
                f"noise σ = {noise!r} and diffusion D = {diffusion!r} (σ = √(2D) = {sigma:.6g}) "
                "are both given and disagree: give only one, e.g. "
                f"noise=null diffusion={diffusion!r}"
            )
    return sigma


def build_problem(cfg: Any) -> BridgeProblem | SeriesProblem:
    """Instantiate the grid, potentials and endpoints of ``cfg`` into a :class:`BridgeProblem`,
    or into a :class:`~mfbridge.model.series.SeriesProblem` when the endpoints group lists
    ``snapshots`` (each a ``time`` and a ``law``; ``horizon`` is then not used)."""
    return _problem_and_axes(cfg)[0]


def _axis_names(laws: list[Any]) -> list[str] | None:
    """Column names of endpoint files with named columns (CSV/TSV, Parquet), else ``None``."""
    for endpoint in laws:
        if getattr(endpoint, "format", None) in ("csv", "parquet"):
            return list(endpoint.data.labels)
    return None


def _check_entries(cfg: Any) -> None:
    """Refuse a configuration that lacks one of the entries every solve reads."""
    for key in (*GROUPS, "noise", "horizon", "steps"):
        if key not in cfg:
            raise InputError(f"the configuration has no {key!r} entry")


def _laws(endpoints: Any) -> list[Any] | None:
    """The laws of the built endpoints group: initial and final, or every snapshot's; None when
    the group is malformed (the problem's own checks say how)."""
    if not hasattr(endpoints, "keys"):
        return None
    if set(endpoints) == {"snapshots"}:
        return [s["law"] if hasattr(s, "keys") else getattr(s, "law", None)
                for s in endpoints["snapshots"]]
    if set(endpoints) == {"initial", "final"}:
        return [endpoints["initial"], endpoints["final"]]
    return None


def _span(snapshots: Any) -> float | None:
    """The time a series of snapshots spans (None unless every time is a number)."""
    times = [s.get("time") if hasattr(s, "get") else getattr(s, "time", None)
             for s in snapshots]
    if not times or not all(is_real_number(t) for t in times):
        return None
    return float(max(times) - min(times))


def _steps(cfg: Any, laws: list[Any], confinement: Any, horizon: Any) -> Any:
    """``cfg.steps``, or with ``steps: null`` the number chosen from the confinement's curvature
    where the laws have their mass over ``horizon`` (:func:`mfbridge.model.fitted_grid.
    fitted_steps`)."""
    if cfg.steps is not None:
        return cfg.steps
    from mfbridge.model.endpoints import Endpoint
    from mfbridge.model.fitted_grid import fitted_steps

    if not all(isinstance(e, Endpoint) for e in laws):
        raise InputError("steps=null chooses the time steps from endpoint objects; with "
                         "arrays of masses give steps=K")
    if not (is_real_number(horizon) and horizon > 0):
        return None  # the problem's own check names the bad horizon or times
    return fitted_steps(laws, confinement, horizon)


def _problem_and_axes(cfg: Any, grid: Grid | None = None
                      ) -> tuple[BridgeProblem | SeriesProblem, list[str] | None]:
    """The problem of ``cfg`` (on ``grid`` when it is built already) and the names of its space
    axes (data-file columns) if any."""
    _check_entries(cfg)
    endpoints = _build(cfg, "endpoints")
    noise = noise_from_config(cfg.noise, cfg.get("diffusion"))
    from mfbridge.model.fitted_grid import checked_noise

    checked_noise(noise)  # before the grid, which may be fitted to the noise
    confinement = _build(cfg, "confinement")
    laws = _laws(endpoints)
    if set(endpoints) == {"snapshots"}:
        snapshots = list(endpoints["snapshots"])
        series = SeriesProblem(
            grid=_build(cfg, "grid") if grid is None else grid,
            snapshots=snapshots,
            noise=noise,
            steps=_steps(cfg, laws or [], confinement, _span(snapshots)),
            confinement=confinement,
            interaction=_build(cfg, "interaction"),
        )
        return series, _axis_names(laws or [])
    if laws is None:
        raise InputError("the endpoints group must define exactly 'initial' and 'final', or "
                         "'snapshots' (a list of time and law)")
    from mfbridge.model.samples import check_same_dimension

    check_same_dimension(endpoints["initial"], endpoints["final"])
    problem = BridgeProblem(
        grid=_build(cfg, "grid") if grid is None else grid,
        initial=endpoints["initial"],
        final=endpoints["final"],
        noise=noise,
        horizon=cfg.horizon,
        steps=_steps(cfg, laws, confinement, cfg.horizon),
        confinement=confinement,
        interaction=_build(cfg, "interaction"),
    )
    return problem, _axis_names(laws)


def _check_memory(cfg: Any, grid: Grid, options: SolverOptions, kernel: str | None = None
                  ) -> None:
    """Estimate the solve's peak memory from the sizes alone and refuse it, before anything of
    size n x K is allocated, when the machine cannot give it (:mod:`mfbridge.runs.resources`).
    ``kernel``: the reference kernel the solver will use (default: ``options.kernel``, where
    ``"auto"`` counts as the chain until the problem is built). Invalid numbers are left to the
    problem's own checks."""
    from mfbridge.model.potentials import NoInteraction
    from mfbridge.runs.resources import check_memory
    from mfbridge.solvers.memory import estimate

    steps, horizon = cfg.steps, cfg.horizon
    snapshots = cfg.endpoints.get("snapshots") if hasattr(cfg.endpoints, "get") else None
    if snapshots:  # a series: the steps span its times (horizon is not used)
        horizon = _span(snapshots)
        if horizon is None:
            return
    if steps is None:  # chosen from the laws and the confinement (cheap objects)
        laws = _laws(_build(cfg, "endpoints"))
        if laws is None or not (is_real_number(horizon) and horizon > 0):
            return
        steps = _steps(cfg, laws, _build(cfg, "confinement"), horizon)
    noise = noise_from_config(cfg.noise, cfg.get("diffusion"))
    if not (isinstance(steps, int) and not isinstance(steps, bool) and steps >= 1
            and is_real_number(horizon) and horizon > 0 and is_real_number(noise) and noise > 0):
        return
    route = options.route
    if route == "auto":
        route = "dense" if grid.size <= options.dense_max_cells else "operator"
    interacting = not isinstance(_build(cfg, "interaction"), NoInteraction)
    need = estimate(grid.shape, grid.spacing, steps, float(horizon), float(noise), route=route,
                    interacting=interacting, method=options.method, anderson=options.anderson,
                    coupling=options.coupling, starts=options.starts,
                    gaussian_steps=(kernel or options.kernel) == "gaussian")
    check_memory(need, coupling=options.coupling)


def solve(cfg: Any, callback: Callable[[Iteration], None] | None = None,
          warm_start: BridgeResult | None = None,
          direct_callback: Callable[[str, int, float, float], None] | None = None,
          segment_callback: Callable[[int, Iteration], None] | None = None) -> BridgeResult:
    """Solve the bridge that ``cfg`` (from :func:`compose`) describes; the resolved config is
    stored in the result. ``warm_start``: a result on the same grid and steps that starts the
    fixed-point solver (see :func:`~mfbridge.solvers.fixed_point.solve_bridge`); the config's
    ``warm_start`` entry is read by the command line (:mod:`mfbridge.runs.cli`), not here.
    ``callback`` sees every outer iteration of the fixed-point solvers; ``direct_callback``
    every iteration of the direct solver as ``(kind, iteration, J, largest gradient entry)``
    with kind ``"Newton"`` or ``"L-BFGS"``.

    A series of snapshots is solved segment by segment (:func:`solve_series`, in ``jobs``
    parallel processes when the config sets ``jobs`` above 1) and returned joined over
    :math:`[t_0, t_m]`; ``segment_callback(segment, iteration)`` then receives the progress
    (``callback`` is not used)."""
    from omegaconf import DictConfig, OmegaConf

    from mfbridge.runs.config_checks import check_config

    if not isinstance(cfg, DictConfig):
        raise InputError(f"solve expects a configuration from mfbridge.compose([...]), got "
                         f"{type(cfg).__name__} {cfg!r}; to solve a BridgeProblem object use "
                         "mfbridge.solve_bridge(problem, options)")
    check_config(cfg)
    _check_entries(cfg)
    from mfbridge.model.fitted_grid import checked_noise

    checked_noise(noise_from_config(cfg.noise, cfg.get("diffusion")))  # the grid may use it
    grid = _build(cfg, "grid")
    options = _build(cfg, "solver")
    if isinstance(options, SolverOptions) and isinstance(grid, Grid):
        _check_memory(cfg, grid, options)
    else:
        from mfbridge.runs.resources import log_unestimated

        log_unestimated("the direct solver" if type(options).__name__ == "DirectOptions"
                        else f"a grid of type {type(grid).__name__}")
    problem, axes = _problem_and_axes(cfg, grid)
    if isinstance(options, SolverOptions) and options.kernel == "auto":
        from mfbridge.solvers.small_noise import choose_kernel

        # the Gaussian steps' windows, before solving (a series: when any segment takes them)
        bridges = problem.segments() if isinstance(problem, SeriesProblem) else [problem]
        if any(choose_kernel(b, "auto")[0] == "gaussian" for b in bridges):
            _check_memory(cfg, problem.grid, options, kernel="gaussian")
    # runs recorded before the estimate existed have no accuracy group: solve them as they were
    accuracy = (_build(cfg, "accuracy") if "accuracy" in cfg
                else AccuracyOptions(estimate=False))
    if not isinstance(accuracy, AccuracyOptions):
        raise InputError("the accuracy group must build a "
                         "mfbridge.solvers.accuracy.AccuracyOptions")
    if isinstance(problem, SeriesProblem):
        if not isinstance(options, SolverOptions):
            raise InputError("a series of snapshots is solved by the fixed-point solver "
                             "(solver=optimal or solver=frozen)")
        if accuracy.target is not None:
            raise InputError(f"accuracy.target={accuracy.target:g} (refining until a target "
                             "accuracy is met) is not available for a series of snapshots: "
                             "give accuracy.target=null and choose grid.shape and steps (the "
                             "error estimate of the result tells how far J is from converged)")
        cpu = time.process_time()
        result = solve_series_jobs(problem, options, warm_start, segment_callback,
                                   cfg.get("jobs", 1)).joined()
        if accuracy.estimate:
            result.error = series_estimate(problem, result, options, accuracy,
                                           time.process_time() - cpu)
            result.timings["estimate"] = result.error.seconds
            say_if_missing(result)
        result.config = OmegaConf.to_container(cfg, resolve=True)
        result.stopping = {"quantity": "self-consistency residual and marginal error of every "
                                       "segment (both below tol)",
                           "value": max(result.residual, result.marginal_error),
                           "tolerance": options.tol}
        if axes is not None:
            result.model["axes"] = axes
        return result
    if type(options).__name__ == "DirectOptions":
        from mfbridge.solvers.direct import DirectOptions, solve_direct

        if isinstance(options, DirectOptions):
            if warm_start is not None:
                raise InputError("the direct solver takes no warm start from a result (it has "
                                 "its own: solver.warm_start=displacement)")
            progress = None
            if direct_callback is not None:
                # the direct solver's own rule: Newton (1D and 2D), truncated Newton in 1D,
                # L-BFGS when asked or for method=truncated in 2D
                lbfgs = options.method == "lbfgs" or (options.method == "truncated"
                                                      and problem.grid.dim > 1)
                kind = "L-BFGS" if lbfgs else "Newton"
                report = direct_callback
                count = {"last": 0, "offset": 0}

                def progress(it: int, cost: float, grad: float) -> None:
                    # Newton's barrier stages each count from 1: report the running total
                    if it <= count["last"]:
                        count["offset"] += count["last"]
                    count["last"] = it
                    report(kind, count["offset"] + it, cost, grad)

            def direct(pr: BridgeProblem, warm: BridgeResult | None,
                       companion: Callable[[Any], None] | None) -> BridgeResult:
                if companion is None:
                    return solve_direct(pr, options, progress)
                return solve_direct(pr, options, lambda *args: companion(args))

            result = solve_with_estimate(problem, direct, accuracy)
            result.config = OmegaConf.to_container(cfg, resolve=True)
            if axes is not None:
                result.model["axes"] = axes
            return result
    if not isinstance(options, SolverOptions):
        raise InputError("the solver group must build a mfbridge.solvers.fixed_point."
                         "SolverOptions or a mfbridge.solvers.direct.DirectOptions")
    fixed_point = fixed_point_solve(options, callback, warm_start, problem)
    result = solve_with_estimate(problem, fixed_point, accuracy)
    result.config = OmegaConf.to_container(cfg, resolve=True)
    if not result.stopping:
        result.stopping = {"quantity": "self-consistency residual and marginal error (both "
                                       "below tol)",
                           "value": max(result.residual, result.marginal_error),
                           "tolerance": options.tol}
    if axes is not None:
        result.model["axes"] = axes  # figures label the axes with the data files' columns
    return result


def solve_series_jobs(problem: SeriesProblem, options: SolverOptions,
                      warm_start: Any, callback: Callable[[int, Iteration], None] | None,
                      jobs: Any) -> SeriesResult:
    """:func:`~mfbridge.solvers.series.solve_series` with its segments spread over ``jobs``
    processes (1: in this process, with progress; ``auto``: one per segment up to the cores)."""
    jobs = parallel_jobs(jobs, len(problem.snapshots) - 1)
    if jobs == 1:
        return solve_series(problem, options, warm_start, callback)
    with process_pool(jobs) as pool:
        return solve_series(problem, options, warm_start, callback, executor=pool)


def parallel_jobs(jobs: Any, tasks: int) -> int:
    """The number of processes for ``tasks`` independent solves: ``jobs`` (a positive integer,
    or ``auto``: one per task up to the cores), never more than ``tasks``."""
    if jobs == "auto" or jobs is None:
        return max(1, min(tasks, os.cpu_count() or 1))
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise InputError(f"jobs must be a positive integer or auto, got {jobs!r}")
    return max(1, min(jobs, tasks))


def process_pool(jobs: int) -> Any:
    """A pool of ``jobs`` worker processes, forked from a server process that imported the
    solvers once (no state of this process, such as its threads, is copied; each solve caps BLAS
    at one thread itself)."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    context = multiprocessing.get_context("forkserver")
    context.set_forkserver_preload(["mfbridge.solvers.series"])
    return ProcessPoolExecutor(max_workers=jobs, mp_context=context)


def load(directory: str | os.PathLike[str], *, warn: bool = True) -> BridgeResult:
    """Read a result written by :meth:`BridgeResult.save` (or a run folder) back into a
    :class:`BridgeResult` (the grid rebuilt as a :class:`~mfbridge.model.grid.Grid`). Raises
    :class:`InputError` for a missing, incomplete or foreign folder, or another format version.

    Unless the folder holds a complete run (a completion marker whose SHA-256 hashes match the
    files) with status ``converged``, a :class:`~mfbridge.errors.RunStatusWarning` says what it
    is (killed, failed, changed after the run, not converged...): its numbers are then not those
    of a bridge. ``warn=False`` skips the check."""
    import xarray as xr

    if not isinstance(directory, (str, os.PathLike)):
        raise InputError(f"load expects the path of a run folder (a str or pathlib.Path), got "
                         f"{type(directory).__name__} {directory!r}")
    folder = Path(directory)
    path = folder / RESULT_FILE
    if not folder.is_dir():
        raise InputError(f"no run folder at {folder}")
    if not path.is_file():
        raise InputError(f"{folder} holds no {RESULT_FILE}: not a complete mfbridge result")
    try:
        with xr.open_dataset(path, engine="netcdf4") as ds:
            ds = ds.load()
    except Exception as exc:
        raise InputError(f"cannot read {path}: {exc}") from exc
    summary = dataset_summary(ds, str(path))
    try:
        g = summary["grid"]
        grid = Grid(lower=tuple(g["lower"]), upper=tuple(g["upper"]), shape=tuple(g["shape"]))
        result = BridgeResult.from_dataset(ds, summary, grid)
    except (KeyError, TypeError, ValueError) as exc:
        raise InputError(f"{path} is not a complete mfbridge result: missing or bad {exc}") from exc
    if warn:
        problem = run_problem(folder, result.status, result.message)
        if problem:
            warnings.warn(RunStatusWarning(f"{folder}: {problem}"), stacklevel=2)
    return result


def run_problem(folder: str | os.PathLike[str], status: str, message: str = "") -> str:
    """Why the result in ``folder`` is not a complete, converged run, or ``""`` when it is:
    no completion marker (with the record's status and error when there is a record), files
    that changed after the run, or a status other than converged (with its message)."""
    out = Path(folder)
    marker = read_marker(out)
    if marker is None:
        what = "the run was killed, failed or is still running"
        try:
            data = json.loads((out / "record.json").read_text())
            what = f"record status {data.get('status')!r}" + (
                f": {data['error']}" if data.get("error") else "")
        except (OSError, ValueError, AttributeError, TypeError):
            pass
        return (f"no completion marker ({COMPLETE_FILE}): {what}; the result may be partial "
                "or stale")
    changed = changed_files(out, marker)
    if changed:
        return (f"{', '.join(changed)} changed after the run (SHA-256 differs from "
                f"{COMPLETE_FILE}); the numbers may not be the run's")
    if status != "converged":
        return f"status {status}: {message}"
    return ""


# --------------------------------------------------------------------------- particle check


def model_from_config(config: dict[str, Any]) -> tuple[Confinement, Interaction]:
    """The confinement and interaction of a resolved run config (``_target_`` entries),
    instantiated by Hydra (imported here, lazily)."""
    from hydra.utils import instantiate
    from omegaconf import OmegaConf

    built = []
    for group in ("confinement", "interaction"):
        if not isinstance(config, dict) or group not in config:
            raise InputError(f"the run's config has no {group!r} entry: cannot rebuild the model")
        try:
            built.append(instantiate(OmegaConf.create(config[group])))
        except InputError:
            raise
        except Exception as exc:
            cause = exc.__cause__ or exc
            raise InputError(f"cannot rebuild the {group} of the run: {cause}") from exc
    return built[0], built[1]


def model_of_result(result: BridgeResult) -> tuple[Confinement, Interaction]:
    """The U and W a result was solved with: from its resolved config (through Hydra, see
    :func:`model_from_config`) or else from its model description (the potentials' registries)."""
    if result.config and "confinement" in result.config and "interaction" in result.config:
        return model_from_config(result.config)
    try:
        conf = dict(result.model["confinement"])
        inter = dict(result.model["interaction"])
        return (confinement_from_name(conf.pop("name"), **conf),
                interaction_from_name(inter.pop("name"), **inter))
    except (KeyError, TypeError, InputError) as exc:
        raise InputError(
            "this result records no config and its model cannot be rebuilt from its description "
            f"({exc}); pass confinement= and interaction= to check()") from exc


def check(result: BridgeResult, confinement: Confinement | None = None,
          interaction: Interaction | None = None, **options: Any) -> CheckReport:
    """Simulate N interacting particles driven by ``result``'s control and compare them with it:
    :func:`mfbridge.particles.check` (its keyword ``options``: ``n_particles``, ``seeds``,
    ``substeps``, ``pair_mode``, ``outputs``, ``uncontrolled``), with ``confinement`` and
    ``interaction`` defaulting to the ones the result was solved with (rebuilt by
    :func:`model_of_result`)."""
    if confinement is None or interaction is None:
        conf_rebuilt, inter_rebuilt = model_of_result(result)
        confinement = confinement or conf_rebuilt
        interaction = interaction or inter_rebuilt
    return particle_check(result, confinement, interaction, **options)
