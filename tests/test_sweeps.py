"""Sweeps: the joblib, basic and submitit launchers, run records, resume after a kill, collect,
and warm starts from the nearest finished run."""

from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import xarray as xr

import mfbridge
from mfbridge import InputError
from mfbridge.result import RESULT_FILE, SUMMARY_FILE
from mfbridge.runs import records
from mfbridge.runs.cli import run
from mfbridge.runs.commands import collect, replay

CONSOLE_SCRIPT = Path(sys.executable).with_name("mfbridge")
SMALL = ["grid.shape=32", "steps=8", "figures=false"]
STRENGTHS = (0, 1, 2)
# Warm and cold starts stop at different points within the solver tolerance (tol = 1e-9 on the
# self-consistency residual and on the marginal error). Measured on SMALL, strengths -2..2, each
# warm-started from each other (20 pairs): largest |dJ| 7.0e-10, largest |d density| 1.4e-10,
# largest |d mean| 1.3e-10. Bounds about twice that.
COST_TOL = 1.5e-9
DENSITY_TOL = 3e-10


def _env() -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k != "HYDRA_FULL_ERROR"}
    env["OPENBLAS_NUM_THREADS"] = "1"
    # the console script imports the mfbridge under test, not whichever checkout is installed
    root = str(Path(mfbridge.__file__).resolve().parent.parent)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (root, env.get("PYTHONPATH")) if p)
    return env


def _sweep(sweep_dir: Path, *args: str, timeout: float = 600) -> subprocess.CompletedProcess[str]:
    command = [str(CONSOLE_SCRIPT), "-m", *args, f"hydra.sweep.dir={sweep_dir}"]
    return subprocess.run(command, cwd=sweep_dir.parent, env=_env(), text=True, timeout=timeout,
                          stdout=subprocess.PIPE, stderr=subprocess.STDOUT, check=False)


def _job(sweep_dir: Path, strength: int, figures: bool = False) -> Path:
    name = f"figures={figures},grid.shape=32,interaction.strength={strength},steps=8"
    return sweep_dir / name


@pytest.fixture(scope="module")
def joblib_sweep(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    sweep_dir = tmp_path_factory.mktemp("joblib") / "sweep"
    values = ",".join(map(str, STRENGTHS))
    done = _sweep(sweep_dir, f"interaction.strength={values}", *SMALL, "hydra.launcher.n_jobs=2")
    assert done.returncode == 0, done.stdout
    return sweep_dir, done.stdout


@pytest.fixture(scope="module")
def collected(joblib_sweep: tuple[Path, str]) -> Path:
    sweep_dir, _ = joblib_sweep
    assert collect.main([str(sweep_dir)]) == 0
    return sweep_dir / "collected"


def _table(path: Path) -> list[dict[str, str]]:
    with open(path, newline="") as handle:
        return list(csv.DictReader(handle))


def test_sweep_runs_through_the_joblib_launcher(joblib_sweep: tuple[Path, str]) -> None:
    sweep_dir, output = joblib_sweep
    assert "Joblib.Parallel(n_jobs=2" in output
    assert f"sweep progress: {len(STRENGTHS)} of {len(STRENGTHS)} runs complete" in output
    assert "sweep finished: 3 of 3 runs complete (" in output
    assert "outer iteration" in output  # every job shows its progress
    for strength in STRENGTHS:
        assert records.is_complete(_job(sweep_dir, strength))


def test_table_costs_equal_single_runs(collected: Path) -> None:
    rows = _table(collected / "runs.csv")
    assert len(rows) == len(STRENGTHS)
    assert [float(r["interaction.strength"]) for r in rows] == list(STRENGTHS)
    cold = 0
    for row in rows:
        strength = row["interaction.strength"]
        single = mfbridge.solve(mfbridge.compose([*SMALL, f"interaction.strength={strength}"]))
        assert row["status"] == single.status
        warm = records.read_record(collected.parent / row["run"]).warm_start
        assert warm is not None
        if warm["path"] is None:
            cold += 1
            # same code, same config, one BLAS thread in both: the numbers agree bit for bit
            assert float(row["cost"]) == single.cost, strength
            assert float(row["cost_kinetic"]) == single.cost_kinetic
            assert int(row["iterations"]) == single.iterations
        else:  # a job started from a finished one: same answer to the solver tolerance
            assert abs(float(row["cost"]) - single.cost) <= COST_TOL, strength
    assert cold >= 2  # two parallel jobs start together, before any run has finished
    costs = [float(r["cost"]) for r in rows]
    assert len(set(costs)) == len(costs)  # the interaction changes the bridge


def test_combined_dataset_has_the_swept_dimension(collected: Path,
                                                  joblib_sweep: tuple[Path, str]) -> None:
    sweep_dir, _ = joblib_sweep
    with xr.open_dataset(collected / "sweep.nc") as ds:
        assert ds["density"].dims == ("interaction.strength", "t", "x")
        assert list(ds["interaction.strength"].values) == list(STRENGTHS)
        assert ds["cost"].dims == ("interaction.strength",)
        for strength in STRENGTHS:
            stored = mfbridge.load(_job(sweep_dir, strength))
            sel = ds.sel({"interaction.strength": strength})
            assert float(sel["cost"]) == stored.cost
            assert (sel["density"].values == stored.density).all()
    for name in ("cost.png", "mean_paths.png", "densities.png"):
        assert (collected / name).read_bytes()[:4] == b"\x89PNG", name


def test_run_record_contents(joblib_sweep: tuple[Path, str]) -> None:
    sweep_dir, _ = joblib_sweep
    folder = _job(sweep_dir, 1)
    record = records.read_record(folder)
    assert "interaction.strength=1" in (record.overrides or [])
    assert record.choices is not None and record.choices["interaction"] == "gaussian"
    assert record.config["interaction"]["strength"] == 1
    assert record.status == mfbridge.load(folder).status
    assert record.seeds == {}
    for name in ("python", "numpy", "scipy", "pot", "torch", "hydra-core", "mfbridge"):
        assert record.versions[name], name
    assert record.versions["numpy"] == __import__("numpy").__version__
    if record.git is not None:
        assert len(record.git["commit"]) == 40
    marker = records.read_marker(folder)
    assert marker is not None
    assert marker.sha256[RESULT_FILE] == records.sha256(folder / RESULT_FILE)
    assert set(marker.sha256) == {RESULT_FILE, SUMMARY_FILE, records.RECORD_FILE}
    assert "${" not in (folder / "config.yaml").read_text()


def test_input_data_files_are_hashed(tmp_path: Path) -> None:
    data = tmp_path / "snapshot.npy"
    data.write_bytes(b"observed density")
    found = records.input_files({"endpoints": {"initial": {"path": str(data)}},
                                 "solver": {"method": "optimal"}, "names": ["snapshot.npy"]},
                                base=tmp_path)
    # sha256 of b"observed density", computed independently with hashlib
    digest = __import__("hashlib").sha256(b"observed density").hexdigest()
    assert found == {"endpoints.initial.path": {"path": str(data), "sha256": digest},
                     "names[0]": {"path": str(data), "sha256": digest}}


def test_git_state_outside_a_checkout_and_without_git(tmp_path: Path,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    assert records.git_state(tmp_path) is None
    monkeypatch.setenv("PATH", str(tmp_path))  # no git executable at all
    assert records.git_state() is None


def test_failed_job_does_not_abort_the_sweep(tmp_path: Path,
                                             capsys: pytest.CaptureFixture[str]) -> None:
    # The failing job comes first and the launcher runs the jobs one after the other, so the
    # valid job only runs at all if the failure does not end the sweep.
    sweep_dir = tmp_path / "sweep"
    done = _sweep(sweep_dir, "noise=-1,0.8", "grid.shape=32", "steps=8", "figures=false",
                  "hydra.launcher.n_jobs=1")
    # the sweep goes on after a refused job and exits with its code (2; mfbridge.runs.exits)
    assert done.returncode == 2, done.stdout
    assert "job refused in" in done.stdout
    assert "noise must be a positive finite number, got -1" in done.stdout
    assert "sweep finished: 1 of 2 runs complete (1 converged); 1 refused" in done.stdout
    valid = sweep_dir / "figures=False,grid.shape=32,noise=0.8,steps=8"
    failed = sweep_dir / "figures=False,grid.shape=32,noise=-1,steps=8"
    assert records.is_complete(valid)
    assert not records.is_complete(failed)
    record = records.read_record(failed)
    assert record.status == "refused"
    assert record.error is not None and record.error.startswith("noise must be")
    stored = mfbridge.load(valid)
    assert stored.status == "converged"

    capsys.readouterr()
    written = collect.collect(sweep_dir, figures=False)
    printed = capsys.readouterr().out
    assert f"{sweep_dir}: 2 runs, 1 complete, 1 converged; swept: noise" in printed
    assert ("  refused: figures=False,grid.shape=32,noise=-1,steps=8: refused: "
            "noise must be a positive finite number, got -1") in printed
    rows = {float(r["noise"]): r for r in _table(written["table"])}
    assert set(rows) == {0.8, -1.0}  # the failed job has a row, it is not dropped
    assert rows[-1.0]["status"] == "refused"
    assert "noise must be a positive finite number" in rows[-1.0]["problem"]
    assert rows[-1.0]["cost"] == ""
    assert rows[0.8]["status"] == "converged"
    assert float(rows[0.8]["cost"]) == stored.cost


def test_failed_single_run_exits_non_zero(tmp_path: Path) -> None:
    command = [str(CONSOLE_SCRIPT), "noise=-1", *SMALL, f"hydra.run.dir={tmp_path / 'run'}"]
    done = subprocess.run(command, cwd=tmp_path, env=_env(), text=True, timeout=600,
                          stdout=subprocess.PIPE, stderr=subprocess.STDOUT, check=False)
    assert done.returncode == 2, done.stdout
    assert "noise must be a positive finite number, got -1" in done.stdout
    assert records.read_record(tmp_path / "run").status == "refused"


def test_collect_refuses_a_folder_without_runs(tmp_path: Path,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    assert collect.main([str(tmp_path)]) == 2
    assert "holds no run folders" in capsys.readouterr().err
    assert collect.main([str(tmp_path / "nope")]) == 2
    assert "no sweep folder" in capsys.readouterr().err


def test_killed_sweep_resumes_only_unfinished_runs(tmp_path: Path) -> None:
    sweep_dir = tmp_path / "sweep"
    args = ["-m", "interaction.strength=0,1,2", *SMALL[:2], "figures=true",
            "hydra.launcher.n_jobs=1", f"hydra.sweep.dir={sweep_dir}"]
    folders = {s: _job(sweep_dir, s, figures=True) for s in STRENGTHS}
    proc = subprocess.Popen([str(CONSOLE_SCRIPT), *args], cwd=tmp_path, env=_env(),
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    try:
        deadline = time.monotonic() + 300
        while not (folders[0] / records.COMPLETE_FILE).exists():
            assert proc.poll() is None, "the sweep ended before it could be killed"
            assert time.monotonic() < deadline
            time.sleep(0.02)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)  # the sweep and its worker processes
        proc.wait()
    finished = {s: records.read_marker(folders[s]) for s in STRENGTHS}
    assert finished[0] is not None
    unfinished = [s for s, m in finished.items() if m is None]
    if not unfinished:
        pytest.skip("every run finished before the kill landed")
    started = {s: records.read_record(folders[s]).started for s, m in finished.items()
               if m is not None}
    for s in unfinished:  # a killed run leaves no result that looks complete
        assert not records.is_complete(folders[s])
    done = subprocess.run([str(CONSOLE_SCRIPT), *args], cwd=tmp_path, env=_env(), text=True,
                          stdout=subprocess.PIPE, stderr=subprocess.STDOUT, timeout=600,
                          check=False)
    assert done.returncode == 0, done.stdout
    assert done.stdout.count("skipped (delete the folder to recompute)") == len(started)
    for s, marker in finished.items():
        assert records.is_complete(folders[s])
        if marker is not None:  # untouched: same marker, same record
            assert records.read_marker(folders[s]) == marker
            assert records.read_record(folders[s]).started == started[s]
    rows = _table(collect.collect(sweep_dir, figures=False)["table"])
    assert len(rows) == 3
    assert all(r["status"] in ("converged", "not_converged") for r in rows)


def test_submitit_local_launcher(tmp_path: Path) -> None:
    pytest.importorskip("hydra_plugins.hydra_submitit_launcher")
    sweep_dir = tmp_path / "sweep"
    done = _sweep(sweep_dir, "hydra/launcher=submitit_local", "interaction.strength=0,2",
                  *SMALL)
    assert done.returncode == 0, done.stdout
    assert (sweep_dir / ".submitit").is_dir()
    rows = _table(collect.collect(sweep_dir, figures=False)["table"])
    assert [float(r["interaction.strength"]) for r in rows] == [0.0, 2.0]
    single = mfbridge.solve(mfbridge.compose([*SMALL, "interaction.strength=2"]))
    assert abs(float(rows[1]["cost"]) - single.cost) <= COST_TOL  # may be warm-started


# ------------------------------------------------------------------------------ warm starts


def _run(folder: Path, *overrides: str, sweep_dir: Path | None = None) -> mfbridge.BridgeResult:
    return run(mfbridge.compose([*SMALL, *overrides]), folder, sweep_dir=sweep_dir)


def _config(*overrides: str) -> dict:
    from omegaconf import OmegaConf

    return OmegaConf.to_container(mfbridge.compose([*SMALL, *overrides]), resolve=True)


def test_nearest_run_skips_incompatible_and_unfinished_runs(tmp_path: Path) -> None:
    sweep = tmp_path / "sweep"
    for name, overrides in {
        "s0": ["interaction.strength=0"], "s1.5": ["interaction.strength=1.5"],
        "s4": ["interaction.strength=4"],
        # each of these is closer (strength 1, distance 0) but must not be chosen
        "grid": ["interaction.strength=1", "grid.shape=40"],
        "steps": ["interaction.strength=1", "steps=4"],
        "kind": ["interaction=harmonic", "interaction.strength=1"],
        "method": ["interaction.strength=1", "solver=frozen"],
        "stopped": ["interaction.strength=1", "solver.max_iter=2", "solver.cross_check=off"],
        "killed": ["interaction.strength=1"],
    }.items():
        if name == "stopped":
            with pytest.warns(mfbridge.ConvergenceWarning):
                _run(sweep / name, *overrides)
        else:
            _run(sweep / name, *overrides)
    (sweep / "killed" / records.COMPLETE_FILE).unlink()
    assert records.read_record(sweep / "stopped").status == "not_converged"

    folder, warm = records.nearest_run(_config("interaction.strength=1"), sweep)
    assert folder == sweep / "s1.5"
    assert warm.differences == {"interaction.strength": [1.5, 1]}
    # the documented distance by hand: |1.5 - 1| / (range of the strengths in the sweep, 4 - 0)
    assert warm.distance == pytest.approx(0.5 / 4, rel=1e-15)
    assert warm.sha256 == records.sha256(sweep / "s1.5" / RESULT_FILE)

    # the new run's own folder is never its warm start; nothing compatible left: the reason
    only = tmp_path / "only"
    _run(only / "grid", "interaction.strength=1", "grid.shape=40")
    folder, warm = records.nearest_run(_config("interaction.strength=1"), only)
    assert folder is None and warm.path is None
    assert "grid.shape differs (40 there, 32 here)" in warm.reason
    assert records.nearest_run(_config(), only, exclude=only / "grid")[0] is None


def test_distance_is_normalised_by_the_sweep_range(tmp_path: Path) -> None:
    # A at (strength 0, noise 0.8), B at (strength 4, noise 0.9); the new run at (1, 1.0).
    # Ranges over the sweep: strength 4, noise 0.2. Normalised: d(A) = sqrt((1/4)^2 + 1) = 1.03,
    # d(B) = sqrt((3/4)^2 + (1/2)^2) = 0.90, so B. Raw differences would pick A
    # (sqrt(1 + 0.04) against sqrt(9 + 0.01)): the check fails without the normalisation.
    # (a fixed box: the default one is fitted to the trap's spread, which depends on the noise,
    # and a warm start needs the same grid)
    sweep = tmp_path / "sweep"
    _run(sweep / "A", "grid=line", "interaction.strength=0", "noise=0.8")
    _run(sweep / "B", "grid=line", "interaction.strength=4", "noise=0.9")
    folder, warm = records.nearest_run(_config("grid=line", "interaction.strength=1",
                                               "noise=1.0"), sweep)
    assert folder == sweep / "B"
    assert warm.distance == pytest.approx((0.75**2 + 0.5**2) ** 0.5, rel=1e-12)


def test_warm_start_changes_the_path_not_the_answer() -> None:
    results = {s: mfbridge.solve(mfbridge.compose([*SMALL, f"interaction.strength={s}"]))
               for s in (-2, -1, 2)}
    cfg = mfbridge.compose([*SMALL, "interaction.strength=-1"])
    cold = results[-1]
    for start in (-2, 2):
        warm = mfbridge.solve(cfg, warm_start=results[start])
        assert warm.converged
        # it did start elsewhere: the first residuals differ
        assert warm.history[0]["residual"] != cold.history[0]["residual"]
        assert abs(warm.cost - cold.cost) <= COST_TOL  # measured 3.6e-10, 3.8e-10
        assert abs(warm.density - cold.density).max() <= DENSITY_TOL  # measured 6e-11, 1e-11


def test_sequential_sweep_warm_starts_from_the_previous_value(tmp_path: Path) -> None:
    sweep_dir = tmp_path / "sweep"
    done = _sweep(sweep_dir, "hydra/launcher=basic", "interaction.strength=0,1,2", *SMALL)
    assert done.returncode == 0, done.stdout
    assert "Launching 3 jobs locally" in done.stdout  # Hydra's basic launcher: one by one
    warm = {s: records.read_record(_job(sweep_dir, s)).warm_start for s in STRENGTHS}
    assert warm[0] == {"mode": "nearest", "path": None, "overrides": None, "differences": {},
                       "distance": None, "sha256": None,
                       "reason": f"no finished run in {sweep_dir} yet"}
    for s in (1, 2):
        assert warm[s]["path"] == str(_job(sweep_dir, s - 1).resolve())
        assert f"interaction.strength={s - 1}" in warm[s]["overrides"]
        assert warm[s]["differences"] == {"interaction.strength": [s - 1, s]}
        assert warm[s]["distance"] == 0.5  # 1 / range 2
        single = mfbridge.solve(mfbridge.compose([*SMALL, f"interaction.strength={s}"]))
        assert abs(mfbridge.load(_job(sweep_dir, s)).cost - single.cost) <= COST_TOL
    assert done.stdout.count("warm start from") == 2

    # warm_start=none in the same sweep folder starts cold
    result = _run(tmp_path / "none", "interaction.strength=1", "warm_start=none",
                  sweep_dir=sweep_dir)
    record = records.read_record(tmp_path / "none")
    assert record.warm_start is not None and record.warm_start["path"] is None
    assert record.warm_start["reason"] == "warm_start=none"
    assert result.cost == mfbridge.solve(mfbridge.compose(
        [*SMALL, "interaction.strength=1"])).cost  # cold: bit for bit


def test_explicit_warm_start_folder(tmp_path: Path) -> None:
    source = tmp_path / "source"
    _run(source, "interaction.strength=2")
    single = _run(tmp_path / "single", "interaction.strength=1")
    assert records.read_record(tmp_path / "single").warm_start["reason"] == (
        "a single run, not a job of a sweep")
    result = _run(tmp_path / "warm", "interaction.strength=1", f"warm_start={source}")
    warm = records.read_record(tmp_path / "warm").warm_start
    assert warm["mode"] == "path" and warm["path"] == str(source.resolve())
    assert warm["differences"] == {"interaction.strength": [2, 1]}
    assert result.history[0]["residual"] != single.history[0]["residual"]
    assert abs(result.cost - single.cost) <= COST_TOL

    with pytest.raises(InputError, match=r"grid\.shape differs"):
        _run(tmp_path / "x", "grid.shape=40", f"warm_start={source}")
    with pytest.raises(InputError, match="no run folder"):
        _run(tmp_path / "y", f"warm_start={tmp_path / 'nope'}")
    (source / records.COMPLETE_FILE).unlink()
    with pytest.raises(InputError, match="did not complete"):
        _run(tmp_path / "z", f"warm_start={source}")


def test_replay_of_a_warm_started_run(tmp_path: Path, capsys: pytest.CaptureFixture[str]
                                      ) -> None:
    sweep = tmp_path / "sweep"
    _run(sweep / "a", "interaction.strength=2", sweep_dir=sweep)
    _run(sweep / "b", "interaction.strength=1", sweep_dir=sweep)
    assert records.read_record(sweep / "b").warm_start["path"] == str((sweep / "a").resolve())
    capsys.readouterr()
    assert replay.main([str(sweep / "b"), "--out", str(tmp_path / "r1")]) == 0
    out = capsys.readouterr().out
    assert "warm start: re-solving from the recorded warm-start run" in out
    assert "verdict: REPRODUCED bit for bit" in out
    assert records.read_record(tmp_path / "r1").warm_start["path"] == str((sweep / "a").resolve())

    # the warm-start run changed since: the replay says so, starts cold and agrees to the
    # solver tolerance only (cost, density and mean bounds as measured above)
    changed = sweep / "a" / RESULT_FILE
    changed.write_bytes(changed.read_bytes() + b"\0")
    assert replay.main([str(sweep / "b"), "--out", str(tmp_path / "r2"),
                        "--tol", str(COST_TOL)]) == 0
    out = capsys.readouterr().out
    assert "is missing or changed since" in out and "replaying from a cold start" in out
    assert "REPRODUCED within tolerance" in out and "bit for bit)" in out
    assert records.read_record(tmp_path / "r2").warm_start["path"] is None
