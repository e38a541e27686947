"""Python entry points: compose a config, solve it, load a saved result.

>>> import mfbridge
>>> cfg = mfbridge.compose(["interaction=harmonic", "interaction.strength=1.5"])  # doctest: +SKIP
>>> result = mfbridge.solve(cfg)                                                  # doctest: +SKIP
>>> result.save("runs/example")                                                   # doctest: +SKIP
>>> mfbridge.load("runs/example").cost                                            # doctest: +SKIP

Hydra is imported only here, and only when a function needs it.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from mfbridge.errors import InputError
from mfbridge.fixed_point import Iteration, SolverOptions, solve_bridge
from mfbridge.problem import BridgeProblem
from mfbridge.result import BridgeResult

CONF_DIR = Path(__file__).resolve().parent.parent / "conf"
GROUPS = ("grid", "confinement", "interaction", "endpoints", "solver")


def compose(overrides: Sequence[str] | None = None, config_name: str = "config") -> Any:
    """The run configuration (an OmegaConf ``DictConfig``) with Hydra-style ``overrides``.

    Unknown groups, options or keys raise :class:`~mfbridge.errors.InputError` listing what exists.
    """
    from hydra import compose as hydra_compose
    from hydra import initialize_config_dir
    from hydra.errors import HydraException
    from omegaconf.errors import OmegaConfBaseException

    overrides = list(overrides or [])
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


def build_problem(cfg: Any) -> BridgeProblem:
    """Instantiate the grid, potentials and endpoints of ``cfg`` into a :class:`BridgeProblem`."""
    for key in (*GROUPS, "noise", "horizon", "steps"):
        if key not in cfg:
            raise InputError(f"the configuration has no {key!r} entry")
    endpoints = _build(cfg, "endpoints")
    if set(endpoints) != {"initial", "final"}:
        raise InputError("the endpoints group must define exactly 'initial' and 'final'")
    from mfbridge.samples import check_same_dimension

    check_same_dimension(endpoints["initial"], endpoints["final"])
    return BridgeProblem(
        grid=_build(cfg, "grid"),
        initial=endpoints["initial"],
        final=endpoints["final"],
        noise=noise_from_config(cfg.noise, cfg.get("diffusion")),
        horizon=cfg.horizon,
        steps=cfg.steps,
        confinement=_build(cfg, "confinement"),
        interaction=_build(cfg, "interaction"),
    )


def solve(cfg: Any, callback: Callable[[Iteration], None] | None = None,
          warm_start: BridgeResult | None = None) -> BridgeResult:
    """Solve the bridge that ``cfg`` (from :func:`compose`) describes; the resolved config is
    stored in the result. ``warm_start``: a result on the same grid and steps that starts the
    fixed-point solver (see :func:`~mfbridge.fixed_point.solve_bridge`); the config's
    ``warm_start`` entry is read by the command line (:mod:`mfbridge.cli`), not here."""
    from omegaconf import OmegaConf

    problem = build_problem(cfg)
    options = _build(cfg, "solver")
    if type(options).__name__ == "DirectOptions":
        from mfbridge.direct import DirectOptions, solve_direct

        if isinstance(options, DirectOptions):
            if warm_start is not None:
                raise InputError("the direct solver takes no warm start from a result (it has "
                                 "its own: solver.warm_start=displacement)")
            progress = None
            if callback is not None:
                def progress(it: int, cost: float, grad: float) -> None:
                    if it % 100 == 0:
                        callback(Iteration(it, grad, 0.0, 0, 0.0))
            result = solve_direct(problem, options, progress)
            result.config = OmegaConf.to_container(cfg, resolve=True)
            return result
    if not isinstance(options, SolverOptions):
        raise InputError("the solver group must build a mfbridge.fixed_point.SolverOptions or "
                         "a mfbridge.direct.DirectOptions")
    result = solve_bridge(problem, options, callback, warm_start=warm_start)
    result.config = OmegaConf.to_container(cfg, resolve=True)
    return result
