"""Run folders: what solve + save, cli.run and the mfbridge script write, and load."""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
import stat
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import xarray as xr
from omegaconf import OmegaConf

import mfbridge
from mfbridge import BridgeResult, ConvergenceWarning, InputError, RunStatusWarning, compose
from mfbridge.result import FORMAT_VERSION, RESULT_FILE, SUMMARY_FILE
from mfbridge.runs.cli import run

FIGURES = ("density.png", "moments.png", "convergence.png")
CONSOLE_SCRIPT = Path(sys.executable).with_name("mfbridge")
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@dataclasses.dataclass
class Solved:
    cfg: Any
    result: BridgeResult
    folder: Path


def _solve_and_save(overrides: tuple[str, ...], folder: Path) -> Solved:
    cfg = compose(list(overrides))
    result = mfbridge.solve(cfg)
    result.save(folder)
    return Solved(cfg, result, folder)


@pytest.fixture(scope="module")
def solved_1d(tmp_path_factory: pytest.TempPathFactory,
              tiny_overrides: tuple[str, ...]) -> Solved:
    return _solve_and_save(tiny_overrides, tmp_path_factory.mktemp("run1d"))


@pytest.fixture(scope="module")
def solved_2d(tmp_path_factory: pytest.TempPathFactory,
              tiny_overrides_2d: tuple[str, ...]) -> Solved:
    return _solve_and_save(tiny_overrides_2d, tmp_path_factory.mktemp("run2d"))


def _copy_folder(solved: Solved, target: Path) -> Path:
    shutil.copytree(solved.folder, target)
    return target


def _assert_same_result(a: BridgeResult, b: BridgeResult) -> None:
    """Every field equal: arrays bit for bit (and same dtype), everything else by ==."""
    for f in dataclasses.fields(BridgeResult):
        va, vb = getattr(a, f.name), getattr(b, f.name)
        if isinstance(va, np.ndarray):
            assert isinstance(vb, np.ndarray), f.name
            assert va.dtype == vb.dtype, f.name
            assert va.shape == vb.shape, f.name
            assert np.array_equal(va, vb), f"{f.name} differs after the round trip"
        else:
            assert va == vb, f"{f.name}: {va!r} != {vb!r}"


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


# ------------------------------------------------------------------------- solve + save + load


def test_solved_tiny_problem_is_converged(solved_1d: Solved) -> None:
    result = solved_1d.result
    assert result.converged, result.message
    assert result.residual <= 1e-9
    masses = result.masses.sum(axis=1)
    np.testing.assert_allclose(masses, 1.0, atol=1e-9)
    # the three parts are computed each from its own formula (kinetic and drift by the cost's
    # flux quadrature, the free-energy change from F at the ends); J = kinetic + drift + dF/sigma^2
    # holds in the continuum (common practice, no source: expand |j - r|^2 and integrate the
    # cross term by parts with the continuity equation) and on the grid up to the discretisation
    # error: measured relative gap +6.5e-4 on 48 cells x 10 steps (fitted box; cost at the
    # step midpoints) (its order: tests/test_optimality.py::test_cost_parts_add_up_at_second_order)
    parts = result.cost_kinetic + result.cost_drift + result.cost_free_energy
    assert abs(result.cost - parts) <= 1.3e-3 * result.cost


def test_result_nc_is_labelled_1d(solved_1d: Solved) -> None:
    result = solved_1d.result
    k1, n = 11, 48
    with xr.open_dataset(solved_1d.folder / RESULT_FILE) as ds:
        expected = {
            "density": (("t", "x"), (k1, n)),
            "control": (("t", "x", "dim"), (k1, n, 1)),
            "mean": (("t", "dim"), (k1, 1)),
            "cov": (("t", "dim", "dim_"), (k1, 1, 1)),
            "free_energy": (("t",), (k1,)),
            "entropy": (("t",), (k1,)),
        }
        for name, (dims, shape) in expected.items():
            assert name in ds.data_vars, name
            assert ds[name].dims == dims, name
            assert ds[name].shape == shape, name
        np.testing.assert_array_equal(ds["t"].values, np.linspace(0.0, 1.0, k1))
        np.testing.assert_array_equal(ds["x"].values, result.grid.axes[0])
        np.testing.assert_array_equal(ds["density"].values, result.density)
        # densities integrate to one at every time
        dx = float(ds["x"][1] - ds["x"][0])
        np.testing.assert_allclose(ds["density"].sum("x").values * dx, 1.0, atol=1e-9)
        assert ds["density"].attrs["units"] == "1/length^d"


def test_summary_json(solved_1d: Solved) -> None:
    result = solved_1d.result
    summary = json.loads((solved_1d.folder / SUMMARY_FILE).read_text())
    assert summary["format_version"] == FORMAT_VERSION
    assert summary["cost"] == result.cost
    assert summary["status"] == "converged"
    assert summary["steps"] == 10
    assert summary["grid"]["shape"] == [48]
    assert summary["noise"] == solved_1d.cfg.noise
    assert summary["model"]["interaction"] == result.model["interaction"]


def test_load_round_trips_exactly_1d(solved_1d: Solved) -> None:
    loaded = mfbridge.load(solved_1d.folder)
    _assert_same_result(solved_1d.result, loaded)
    assert loaded.coupling is not None  # tiny 1D grid: the dense route stores the coupling


def test_stored_config_is_the_resolved_config(solved_1d: Solved) -> None:
    resolved = OmegaConf.to_container(solved_1d.cfg, resolve=True)
    assert solved_1d.result.config == resolved
    assert mfbridge.load(solved_1d.folder).config == resolved
    with xr.open_dataset(solved_1d.folder / RESULT_FILE) as ds:
        assert json.loads(ds.attrs["config"]) == resolved


def test_saved_files_respect_the_umask(solved_1d: Solved) -> None:
    reference = solved_1d.folder / "reference.txt"
    reference.write_text("x")
    try:
        mode = stat.S_IMODE(reference.stat().st_mode)
        for name in (RESULT_FILE, SUMMARY_FILE):
            assert stat.S_IMODE((solved_1d.folder / name).stat().st_mode) == mode, name
    finally:
        reference.unlink()


def test_result_nc_is_labelled_2d(solved_2d: Solved) -> None:
    result = solved_2d.result
    assert result.converged, result.message
    k1 = 9
    with xr.open_dataset(solved_2d.folder / RESULT_FILE) as ds:
        assert ds["density"].dims == ("t", "x0", "x1")
        assert ds["density"].shape == (k1, 16, 16)
        assert ds["control"].dims == ("t", "x0", "x1", "dim")
        assert ds["control"].shape == (k1, 16, 16, 2)
        assert ds["mean"].shape == (k1, 2)
        assert ds["cov"].shape == (k1, 2, 2)
        assert ds["free_energy"].dims == ds["entropy"].dims == ("t",)
        np.testing.assert_array_equal(ds["x0"].values, result.grid.axes[0])
        np.testing.assert_array_equal(ds["x1"].values, result.grid.axes[1])
        assert "x" not in ds.coords
    # the flow starts and ends at the means of the observed (discretised) distributions
    problem = mfbridge.build_problem(solved_2d.cfg)
    points = problem.grid.points
    for k, masses in ((0, problem.initial), (-1, problem.final)):
        expected = np.tensordot(masses, points, axes=2)
        np.testing.assert_allclose(result.mean[k], expected, atol=1e-8)
    np.testing.assert_allclose(result.mean[0], [-1.0, 0.5], atol=1e-2)
    np.testing.assert_allclose(result.mean[-1], [1.0, -0.5], atol=1e-2)


def test_cost_parts_add_up_2d(solved_2d: Solved) -> None:
    # as in 1D (test_solved_tiny_problem_is_converged); measured relative gap -5.01e-3 on
    # 16x16 cells x 8 steps
    result = solved_2d.result
    parts = result.cost_kinetic + result.cost_drift + result.cost_free_energy
    assert abs(result.cost - parts) <= 1e-2 * result.cost


def test_load_round_trips_exactly_2d(solved_2d: Solved) -> None:
    loaded = mfbridge.load(solved_2d.folder)
    _assert_same_result(solved_2d.result, loaded)
    assert loaded.grid.dim == 2


def test_saved_result_can_be_plotted_again(solved_2d: Solved, tmp_path: Path) -> None:
    from mfbridge.runs.plotting import plot_result

    paths = plot_result(mfbridge.load(solved_2d.folder), tmp_path)
    assert sorted(p.name for p in paths) == sorted(FIGURES)
    for path in paths:
        assert path.read_bytes()[:8] == PNG_MAGIC


# ------------------------------------------------------------------------------- load refuses


def test_load_missing_folder(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="no run folder at"):
        mfbridge.load(tmp_path / "does-not-exist")


def test_load_folder_without_result(tmp_path: Path) -> None:
    (tmp_path / SUMMARY_FILE).write_text("{}")
    with pytest.raises(InputError, match=f"holds no {RESULT_FILE}"):
        mfbridge.load(tmp_path)


def test_load_corrupted_result(solved_1d: Solved, tmp_path: Path) -> None:
    folder = _copy_folder(solved_1d, tmp_path / "run")
    (folder / RESULT_FILE).write_bytes(b"\x00garbage, not netCDF\xff" * 40)
    with pytest.raises(InputError, match=f"cannot read .*{RESULT_FILE}"):
        mfbridge.load(folder)


def test_load_truncated_result(solved_1d: Solved, tmp_path: Path) -> None:
    folder = _copy_folder(solved_1d, tmp_path / "run")
    data = (folder / RESULT_FILE).read_bytes()
    (folder / RESULT_FILE).write_bytes(data[: len(data) // 3])
    with pytest.raises(InputError, match=f"cannot read .*{RESULT_FILE}"):
        mfbridge.load(folder)


def _rewrite(path: Path, edit: Any) -> None:
    with xr.open_dataset(path) as ds:
        data = ds.load()
    edit(data)
    path.unlink()
    data.to_netcdf(path)


def test_load_other_format_version(solved_1d: Solved, tmp_path: Path) -> None:
    folder = _copy_folder(solved_1d, tmp_path / "run")

    def bump(ds: xr.Dataset) -> None:
        summary = json.loads(ds.attrs["summary"])
        summary["format_version"] = FORMAT_VERSION + 1
        ds.attrs["summary"] = json.dumps(summary)

    _rewrite(folder / RESULT_FILE, bump)
    with pytest.raises(InputError, match=f"format version {FORMAT_VERSION + 1}.*reads version"):
        mfbridge.load(folder)


def test_load_netcdf_that_is_not_a_result(tmp_path: Path) -> None:
    xr.Dataset({"a": ("t", np.arange(3.0))}).to_netcdf(tmp_path / RESULT_FILE)
    with pytest.raises(InputError, match="not an mfbridge result"):
        mfbridge.load(tmp_path)


def test_load_result_with_a_missing_variable(solved_1d: Solved, tmp_path: Path) -> None:
    folder = _copy_folder(solved_1d, tmp_path / "run")

    def drop(ds: xr.Dataset) -> None:
        del ds["density"]

    _rewrite(folder / RESULT_FILE, drop)
    with pytest.raises(InputError, match="density"):
        mfbridge.load(folder)


# ------------------------------------------------------------------------------- atomic save


def _failing_to_netcdf(self: xr.Dataset, path: Any = None, *args: Any, **kwargs: Any) -> None:
    Path(path).write_bytes(b"CDF\x01 half a file")
    raise OSError("simulated: no space left on device")


def test_failed_save_leaves_no_result(solved_1d: Solved, tmp_path: Path,
                                      monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(xr.Dataset, "to_netcdf", _failing_to_netcdf)
    folder = tmp_path / "run"
    with pytest.raises(OSError, match="simulated"):
        solved_1d.result.save(folder)
    assert not (folder / RESULT_FILE).exists()
    assert not (folder / SUMMARY_FILE).exists()
    assert list(folder.iterdir()) == []


def test_failed_save_keeps_previous_result(solved_1d: Solved, tmp_path: Path,
                                           monkeypatch: pytest.MonkeyPatch) -> None:
    folder = _copy_folder(solved_1d, tmp_path / "run")
    before = (folder / RESULT_FILE).read_bytes()
    monkeypatch.setattr(xr.Dataset, "to_netcdf", _failing_to_netcdf)
    with pytest.raises(OSError, match="simulated"):
        solved_1d.result.save(folder)
    monkeypatch.undo()
    assert (folder / RESULT_FILE).read_bytes() == before
    assert _leftovers(folder) == []
    _assert_same_result(solved_1d.result, mfbridge.load(folder))


def test_interrupted_save_leaves_no_temporary_file(solved_1d: Solved, tmp_path: Path,
                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    def interrupted(self: xr.Dataset, path: Any = None, *args: Any, **kwargs: Any) -> None:
        Path(path).write_bytes(b"CDF")
        raise KeyboardInterrupt

    monkeypatch.setattr(xr.Dataset, "to_netcdf", interrupted)
    with pytest.raises(KeyboardInterrupt):
        solved_1d.result.save(tmp_path)
    assert list(tmp_path.iterdir()) == []


# ----------------------------------------------------------------------------------- cli.run


def _check_run_folder(folder: Path, cfg: Any, result: BridgeResult) -> None:
    for name in (RESULT_FILE, SUMMARY_FILE, "config.yaml", *FIGURES):
        assert (folder / name).is_file(), f"{name} missing from {sorted(os.listdir(folder))}"
    for name in FIGURES:
        assert (folder / name).read_bytes()[:8] == PNG_MAGIC, name
    text = (folder / "config.yaml").read_text()
    assert "${" not in text
    assert OmegaConf.to_container(OmegaConf.load(folder / "config.yaml")) == \
        OmegaConf.to_container(cfg, resolve=True)
    assert json.loads((folder / SUMMARY_FILE).read_text())["cost"] == result.cost
    assert _leftovers(folder) == []


def test_cli_run_1d(tmp_path: Path, tiny_overrides: tuple[str, ...]) -> None:
    cfg = compose(list(tiny_overrides))
    result = run(cfg, tmp_path / "out")
    _check_run_folder(tmp_path / "out", cfg, result)
    _assert_same_result(result, mfbridge.load(tmp_path / "out"))


def test_cli_run_2d(tmp_path: Path, tiny_overrides_2d: tuple[str, ...]) -> None:
    cfg = compose(list(tiny_overrides_2d))
    result = run(cfg, tmp_path)
    _check_run_folder(tmp_path, cfg, result)
    assert mfbridge.load(tmp_path).grid.shape == (16, 16)


def test_cli_run_without_figures(tmp_path: Path, tiny_overrides: tuple[str, ...]) -> None:
    cfg = compose([*tiny_overrides, "figures=false"])
    run(cfg, tmp_path)
    assert (tmp_path / RESULT_FILE).is_file()
    assert not any((tmp_path / name).exists() for name in FIGURES)


# --------------------------------------------------------------------------- console script


@dataclasses.dataclass
class Console:
    """One invocation of the ``mfbridge`` console script: its working directory, run folder,
    exit code and merged stdout + stderr."""

    cwd: Path
    folder: Path
    returncode: int
    output: str


CONSOLE_CASES: dict[str, list[str]] = {
    "ok": ["grid.shape=32", "steps=8"],
    "unknown_option": ["interaction=nope"],
    "bad_value": ["grid.shape=32", "noise=-1"],
}


@pytest.fixture(scope="module")
def console(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Console]:
    """Run every case of CONSOLE_CASES as a subprocess, all at once (each pays the import)."""
    assert CONSOLE_SCRIPT.is_file(), f"console script not installed at {CONSOLE_SCRIPT}"
    env = {k: v for k, v in os.environ.items() if k != "HYDRA_FULL_ERROR"}
    started: dict[str, tuple[Path, subprocess.Popen[str]]] = {}
    out: dict[str, Console] = {}
    try:
        for name, args in CONSOLE_CASES.items():
            cwd = tmp_path_factory.mktemp(f"console_{name}")
            command = [str(CONSOLE_SCRIPT), *args, f"hydra.run.dir={cwd / 'run'}"]
            started[name] = (cwd, subprocess.Popen(
                command, cwd=cwd, env=env, text=True,
                stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
            ))
        for name, (cwd, proc) in started.items():
            output, _ = proc.communicate(timeout=300)
            out[name] = Console(cwd, cwd / "run", proc.returncode, output)
    finally:
        for _, proc in started.values():
            if proc.poll() is None:
                proc.kill()
                proc.wait()
    return out


def test_console_script_writes_a_run_folder(console: dict[str, Console]) -> None:
    run_ = console["ok"]
    assert run_.returncode == 0, run_.output
    folder = run_.folder
    for name in (RESULT_FILE, SUMMARY_FILE, "config.yaml", *FIGURES):
        assert (folder / name).is_file(), name
    assert (folder / ".hydra" / "overrides.yaml").is_file()
    log = (folder / "mfbridge.log").read_text()
    assert "outer iteration" in log
    assert "cost J" in log
    loaded = mfbridge.load(folder)
    assert loaded.converged
    assert loaded.grid.shape == (32,)
    assert len(loaded.times) == 9
    assert f"cost J = {loaded.cost:.8g}" in log
    assert "outer iteration" in run_.output  # progress is shown on the console too
    # nothing was written outside the requested folder
    assert sorted(p.name for p in run_.cwd.iterdir()) == ["run"]


def test_console_script_unknown_option(console: dict[str, Console]) -> None:
    run_ = console["unknown_option"]
    assert run_.returncode != 0
    assert "interaction/nope" in run_.output
    options = (mfbridge.runs.api.CONF_DIR / "interaction").glob("*.yaml")
    for option in sorted(p.stem for p in options):
        assert option in run_.output
    assert not (run_.folder / RESULT_FILE).exists()


def test_console_script_bad_value_is_a_clean_error(console: dict[str, Console]) -> None:
    run_ = console["bad_value"]
    assert run_.returncode == 2, run_.output
    assert "noise must be a positive finite number, got -1" in run_.output
    assert "Traceback" not in run_.output
    assert not (run_.folder / RESULT_FILE).exists()


# ---------------------------------------------------------------------------- non-convergence


def test_non_convergence_is_never_silent(tmp_path: Path,
                                        tiny_overrides: tuple[str, ...]) -> None:
    cfg = compose([*tiny_overrides, "solver.max_iter=1", "solver.continuation=0",
                   "solver.noise_continuation=0", "solver.cross_check=off"])
    with pytest.warns(ConvergenceWarning, match="last residual") as record:
        result = mfbridge.solve(cfg)
    assert result.status == "not_converged"
    assert not result.converged
    assert result.iterations == 1
    assert result.residual > cfg.solver.tol
    assert "last residual" in result.message
    assert f"{result.residual:.2e}" in result.message
    assert str(record[0].message) == result.message
    result.save(tmp_path)
    summary = json.loads((tmp_path / SUMMARY_FILE).read_text())
    assert summary["status"] == "not_converged"
    assert summary["message"] == result.message
    with pytest.warns(RunStatusWarning, match="status not_converged: not converged after 1"):
        assert mfbridge.load(tmp_path).status == "not_converged"
