"""Configuration: every option on disk composes and builds; bad inputs are refused clearly."""

from __future__ import annotations

import dataclasses
import math
import re
import subprocess
import sys
from functools import cache
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hydra.utils import instantiate
from omegaconf import open_dict

import mfbridge
from mfbridge import (
    BridgeProblem,
    Gaussian,
    Grid,
    InputError,
    SeriesProblem,
    SolverOptions,
    compose,
)
from mfbridge.model.potentials import Harmonic, HarmonicInteraction
from mfbridge.runs.api import CONF_DIR, GROUPS
from mfbridge.solvers.direct import DirectOptions

# Options with required values (??? in conf/): what a user must add on the command line.
REQUIRED: dict[str, list[str]] = {
    "endpoints=samples": ["endpoints.initial.path=examples/data/chemotaxis_end.npz",
                          "endpoints.final.path=examples/data/chemotaxis_end.npz"],
    "interaction=torch": ["interaction.fn=tests.test_config:soft_core"],
    "confinement=torch": ["confinement.fn=tests.test_config:trap"],
}


def soft_core(r: Any) -> Any:
    """A torch pair potential of the distance r (the interaction=torch option's test fn)."""
    import torch

    return torch.exp(-r * r)


def trap(x: Any) -> Any:
    """A torch confinement of the positions x (..., d) (the confinement=torch option's)."""
    return 0.5 * (x * x).sum(-1)


def _options(group: str) -> list[str]:
    return sorted(path.stem for path in (CONF_DIR / group).glob("*.yaml"))


def _for_series(group: str, option: str) -> bool:
    """Options that describe or need a series of snapshots (a ``snapshots`` entry, or an
    interpolation of the endpoints' one)."""
    text = (CONF_DIR / group / f"{option}.yaml").read_text()
    return re.search(r"^snapshots:|\$\{endpoints\.snapshots\}", text, re.MULTILINE) is not None


FITTED_GRIDS = ("fitted", "span")


def _grid_dim(option: str) -> int:
    extra = ["endpoints=series"] if _for_series("grid", option) else []
    grid = instantiate(compose([f"grid={option}", *extra]).grid)
    assert isinstance(grid, Grid)
    return grid.dim


def _laws(endpoints: Any) -> list[Any]:
    if "snapshots" in endpoints:
        return [snapshot["law"] for snapshot in endpoints["snapshots"]]
    return [endpoints["initial"], endpoints["final"]]


@cache
def _endpoint_dim(option: str) -> int:
    choice = f"endpoints={option}"
    endpoints = instantiate(compose([choice, *REQUIRED.get(choice, [])]).endpoints)
    dims = {law.dim for law in _laws(endpoints)}
    assert len(dims) == 1, f"endpoints={option} mixes dimensions {dims}"
    return dims.pop()


def _matching_grid(dim: int) -> str:
    # a fixed box: the fitted ones (fitted, span) take their dimension from the endpoints
    found = [opt for opt in _options("grid") if opt not in FITTED_GRIDS and _grid_dim(opt) == dim]
    assert found, f"no grid option in {CONF_DIR / 'grid'} is {dim}-dimensional"
    return found[0]


def _matching_endpoints(dim: int, series: bool = False) -> str | None:
    found = [opt for opt in _options("endpoints") if _endpoint_dim(opt) == dim
             and _for_series("endpoints", opt) == series]
    return found[0] if found else None


ALL_OPTIONS = [(group, option) for group in GROUPS for option in _options(group)]


def test_every_group_has_options_on_disk() -> None:
    for group in GROUPS:
        assert _options(group), f"config group {group!r} has no YAML option in {CONF_DIR}"
    assert (CONF_DIR / "config.yaml").is_file()


@pytest.mark.parametrize(("group", "option"), ALL_OPTIONS, ids=[f"{g}={o}" for g, o in ALL_OPTIONS])
def test_every_option_composes_and_builds(group: str, option: str) -> None:
    overrides = [f"{group}={option}", *REQUIRED.get(f"{group}={option}", [])]
    if group == "endpoints":
        dim = _endpoint_dim(option)
        if dim != 1:
            overrides.append(f"grid={_matching_grid(dim)}")
    cfg = compose(overrides)
    if group == "grid":
        dim = _grid_dim(option)
        endpoints = _matching_endpoints(dim, _for_series("grid", option))
        if endpoints is not None:
            cfg = compose([*overrides, f"endpoints={endpoints}"])
    problem = mfbridge.build_problem(cfg)
    if isinstance(problem, SeriesProblem):
        laws = [snapshot.law for snapshot in problem.snapshots]
    else:
        assert isinstance(problem, BridgeProblem)
        laws = [problem.initial, problem.final]
    for masses in laws:
        assert masses.shape == problem.grid.shape
        assert np.all(masses >= 0)
        assert masses.sum() == pytest.approx(1.0, abs=1e-12)
    if group == "endpoints":
        assert problem.grid.dim == _endpoint_dim(option)
    if group == "grid":
        assert problem.grid.dim == _grid_dim(option)
    options = instantiate(cfg.solver)
    assert isinstance(options, (SolverOptions, DirectOptions))


def test_default_solver_config_matches_python_defaults() -> None:
    """The command line and ``solve_bridge(problem)`` use the same solver settings by default."""
    assert instantiate(compose().solver) == SolverOptions()
    frozen = instantiate(compose(["solver=frozen"]).solver)
    assert frozen == dataclasses.replace(SolverOptions(), method="frozen")


def test_linear_quadratic_case_by_overrides() -> None:
    cfg = compose([
        "confinement=harmonic", "confinement.stiffness=1",
        "interaction=harmonic", "interaction.strength=1.5",
        "endpoints=gaussians",
    ])
    problem = mfbridge.build_problem(cfg)
    assert isinstance(problem.confinement, Harmonic)
    assert float(problem.confinement.stiffness) == 1.0
    assert isinstance(problem.interaction, HarmonicInteraction)
    assert float(problem.interaction.strength) == 1.5
    endpoints = instantiate(cfg.endpoints)
    for name in ("initial", "final"):
        assert isinstance(endpoints[name], Gaussian)
    np.testing.assert_allclose(endpoints["initial"].mean(), [-1.0])
    np.testing.assert_allclose(endpoints["initial"].cov(), [[0.16]])
    np.testing.assert_allclose(endpoints["final"].mean(), [1.2])
    np.testing.assert_allclose(endpoints["final"].cov(), [[0.49]])
    # the discrete initial marginal matches the Gaussian it was built from
    x = problem.grid.axes[0]
    mean = float(problem.initial @ x)
    var = float(problem.initial @ (x - mean) ** 2)
    assert mean == pytest.approx(-1.0, abs=1e-8)
    assert var == pytest.approx(0.16, rel=1e-6)


# ------------------------------------------------------------------------------- bad inputs


def test_unknown_group_option_lists_valid_options() -> None:
    with pytest.raises(InputError, match="nope") as info:
        compose(["interaction=nope"])
    message = str(info.value)
    for option in _options("interaction"):
        assert option in message


def test_unknown_key_override() -> None:
    with pytest.raises(InputError, match="no_such_key"):
        compose(["no_such_key=1"])
    with pytest.raises(InputError, match="no_such_key"):
        compose(["grid.no_such_key=1"])


@pytest.mark.parametrize("noise", ["-1", "0", "nan", "inf"])
def test_bad_noise(noise: str) -> None:
    cfg = compose([f"noise={noise}"])
    with pytest.raises(InputError, match="noise must be a positive"):
        mfbridge.build_problem(cfg)


@pytest.mark.parametrize("horizon", ["-1", "0"])
def test_bad_horizon(horizon: str) -> None:
    with pytest.raises(InputError, match="horizon must be a positive"):
        mfbridge.build_problem(compose([f"horizon={horizon}"]))


@pytest.mark.parametrize("steps", ["0", "-3", "2.5"])
def test_bad_steps(steps: str) -> None:
    with pytest.raises(InputError, match="steps must be a positive integer"):
        mfbridge.build_problem(compose([f"steps={steps}"]))


@pytest.mark.parametrize(
    ("override", "match"),
    [
        ("noise=abc", "noise must be a positive number"),
        ("interaction.strength=abc", r"interaction.*strength must be a number"),
        ("confinement.stiffness=abc", r"confinement.*stiffness must be a number"),
        ("grid=line grid.lower=abc", "Grid lower must be a number"),
    ],
)
def test_non_numeric_parameter(override: str, match: str) -> None:
    with pytest.raises(InputError, match=match):
        mfbridge.build_problem(compose(override.split()))


def test_grid_with_two_cells() -> None:
    with pytest.raises(InputError, match="at least 3 cells"):
        mfbridge.build_problem(compose(["grid.shape=2"]))


def test_endpoint_mass_outside_the_box() -> None:
    # a fixed box (the default, grid=fitted, would hold the endpoint)
    cfg = compose(["grid=line", "endpoints=gaussians", "endpoints.final.mean=10"])
    with pytest.raises(InputError, match=r"final distribution lies outside the box \[-4, 4\]"):
        mfbridge.build_problem(cfg)


def test_endpoint_dimension_mismatch() -> None:
    two_d = [opt for opt in _options("endpoints") if _endpoint_dim(opt) == 2]
    assert two_d, "expected at least one 2D endpoints option"
    cfg = compose([f"endpoints={two_d[0]}", f"grid={_matching_grid(1)}"])
    with pytest.raises(InputError, match="2-dimensional but the grid is 1-dimensional"):
        mfbridge.build_problem(cfg)


def test_incomplete_configuration() -> None:
    cfg = compose()
    with open_dict(cfg):
        del cfg["noise"]
    with pytest.raises(InputError, match="no 'noise' entry"):
        mfbridge.build_problem(cfg)


GRID = Grid(lower=-1.0, upper=1.0, shape=8)


@pytest.mark.parametrize(
    ("values", "match"),
    [
        (np.r_[-0.5, np.ones(7)], "initial contains 1 negative value"),
        (
            np.r_[np.ones(3), np.nan, np.ones(4)],
            r"initial contains 1 NaN value\(s\), first at index \(3,\)",
        ),
        (np.r_[np.ones(7), np.inf], "initial contains 1 infinite value"),
        (np.zeros(8), "initial sums to zero"),
        (np.ones(7), r"initial must have shape \(8,\)"),
        (np.ones((2, 4)), r"initial must have shape \(8,\)"),
        ("abc", "initial must be a numeric array"),
    ],
    ids=["negative", "nan", "inf", "zero-total", "too-short", "wrong-ndim", "text"],
)
def test_bad_arrays_given_directly(values: Any, match: str) -> None:
    with pytest.raises(InputError, match=match):
        BridgeProblem(grid=GRID, initial=values, final=np.ones(8), noise=1.0)


def test_bad_final_array_is_named() -> None:
    with pytest.raises(InputError, match="final contains 1 negative value"):
        BridgeProblem(grid=GRID, initial=np.ones(8), final=np.r_[np.ones(7), -1.0], noise=1.0)


def test_good_arrays_are_normalised_masses() -> None:
    initial = np.arange(1.0, 9.0)
    problem = BridgeProblem(grid=GRID, initial=initial, final=np.ones(8), noise=1.0)
    np.testing.assert_allclose(problem.initial, initial / initial.sum())
    np.testing.assert_allclose(problem.final, np.full(8, 1 / 8))
    assert not math.isclose(problem.initial[0], problem.initial[-1])


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"method": "nope"}, "unknown method 'nope'; valid names are: frozen, optimal"),
        ({"route": "nope"}, "unknown route 'nope'; valid names are: auto, dense, operator"),
        ({"damping": 0}, "damping has an invalid value 0"),
        ({"damping": 1.5}, "damping has an invalid value 1.5"),
        ({"tol": 0.0}, "tol has an invalid value"),
        ({"max_iter": 0}, "max_iter has an invalid value 0"),
        ({"anderson": -1}, "anderson has an invalid value -1"),
    ],
)
def test_bad_solver_options(kwargs: dict[str, Any], match: str) -> None:
    with pytest.raises(InputError, match=match):
        SolverOptions(**kwargs)


def test_bad_solver_option_from_config() -> None:
    with pytest.raises(InputError, match=r"config group 'solver'.*unknown method 'nope'"):
        mfbridge.solve(compose(["solver.method=nope", "grid.shape=32", "steps=2"]))


def test_input_error_is_a_value_error() -> None:
    assert issubclass(InputError, ValueError)
    assert issubclass(InputError, mfbridge.MFBridgeError)


def test_import_does_not_pull_in_hydra_or_matplotlib() -> None:
    code = (
        "import sys, mfbridge\n"
        "heavy = sorted(m for m in sys.modules"
        " if m.split('.')[0] in ('hydra', 'omegaconf', 'matplotlib'))\n"
        "print(repr(heavy))\n"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True,
        cwd=Path(__file__).parent, timeout=120,
    )
    assert out.stdout.strip() == "[]", out.stdout
