"""A new user's first hour on the command line (issue 15, items 1, 3, 4, 5).

Subprocess tests run the installed console script (the venv's ``mfbridge``) and are kept few
and tiny; the rest calls the same functions in-process.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from mfbridge.errors import InputError
from mfbridge.runs.api import compose
from mfbridge.runs.config_checks import check_config

ROOT = Path(__file__).resolve().parent.parent
SCRIPT = Path(sys.executable).with_name("mfbridge")


def _mfbridge(*args: str, cwd: Path, timeout: float = 300) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1"}
    return subprocess.run([str(SCRIPT), *args], cwd=cwd, env=env, text=True,
                          capture_output=True, timeout=timeout, check=False)


# ------------------------------------------------------------------ item 5: help and version


def test_help(tmp_path):
    """Before: Hydra's stock help (no subcommands, no docs) and Hydra's version."""
    done = _mfbridge("--help", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    text = done.stdout
    for word in ("check RUN_DIR", "collect SWEEP_DIR", "replay RUN_DIR", "README.md",
                 "length/√time", "mfbridge --version"):
        assert word in text
    for group in ("grid", "confinement", "interaction", "endpoints", "mobility", "reservoirs",
                  "solver"):
        options = sorted(p.stem for p in (ROOT / "conf" / group).glob("*.yaml"))
        assert f"\n  {group}\n" in text
        for option in options:
            assert f" {option} " in text or f"*{option} " in text, (group, option)
    assert "*optimal" in text and "*fitted" in text and "*estimate" in text  # defaults marked


def test_version(monkeypatch, capsys):
    """The console script's own function, in-process (before: Hydra's version)."""
    from mfbridge.runs.cli import main

    monkeypatch.setattr(sys, "argv", ["mfbridge", "--version"])
    with pytest.raises(SystemExit) as done:
        main()
    assert done.value.code == 0
    out = capsys.readouterr().out
    assert out.startswith("mfbridge 0.1.0\n") and "hydra-core" in out


# ------------------------------------------------------------------ item 1: groups in place


def test_group_given_where_it_has_no_effect_is_refused(tmp_path):
    """Before: `+mobility=exclusion solver=direct` solved with the walkers mobility."""
    done = _mfbridge("+mobility=exclusion", "solver=direct", cwd=tmp_path)
    assert done.returncode == 2
    assert "write mobility=exclusion" in done.stderr
    assert not any(tmp_path.iterdir())  # refused before any run folder


def test_mobility_option_reaches_the_direct_solver():
    from hydra.utils import instantiate

    from mfbridge.model.mobility import Exclusion

    options = instantiate(compose(["solver=direct", "mobility=exclusion"]).solver)
    assert isinstance(options.mobility, Exclusion)
    with pytest.raises(InputError, match="write mobility=exclusion"):
        compose(["solver=direct", "mobility@solver.mobility=exclusion"])


@pytest.mark.parametrize(("overrides", "words"), [
    (["mobility=exclusion"], ["no effect with solver=optimal", "solver=direct mobility=exclusion"]),
    (["reservoirs=open_chain"], ["no effect with solver=optimal",
                                 "solver=direct reservoirs=open_chain"]),
    (["+colour=red"], ["colour", "not read by mfbridge"]),
    (["interaction=torch"], ["interaction.fn", "required"]),
])
def test_settings_without_effect_are_refused(overrides, words):
    with pytest.raises(InputError) as info:
        check_config(compose(overrides))
    for word in words:
        assert word in str(info.value)


# ------------------------------------------------------------------ item 4: own data files


def _write_csv(path: Path, rows: np.ndarray, header: str) -> None:
    np.savetxt(path, rows, delimiter=",", header=header, comments="")


def test_own_csv_mismatches_reported_at_once(tmp_path, monkeypatch):
    """Before: three runs, three messages (key, weights column, columns), one at a time."""
    monkeypatch.chdir(tmp_path)
    rng = np.random.default_rng(0)
    _write_csv(tmp_path / "start.csv", rng.normal(-1, 0.5, (200, 2)), "x,y")
    _write_csv(tmp_path / "end.csv", rng.normal(1, 0.5, (150, 2)), "x,y")
    paths = ["endpoints.initial.path=start.csv", "endpoints.final.path=end.csv"]
    with pytest.raises(InputError) as info:
        check_config(compose(["endpoints=from_samples", *paths]))
    message = str(info.value)
    fixes = ["endpoints.initial.weights=null", "endpoints.initial.columns=[x,y]",
             "endpoints.final.key=null"]
    for fix in fixes:
        assert fix in message
    # the suggested overrides fix it; so does the samples preset with only the two paths
    check_config(compose(["endpoints=from_samples", *paths, *fixes]))
    cfg = compose(["endpoints=samples", *paths])
    check_config(cfg)
    from mfbridge.runs.api import build_problem

    assert build_problem(cfg).grid.dim == 2


# ------------------------------------------------------------------ item 3: user modules


MYPOT = """import torch

def soft_repulsion(r):
    return {strength} * torch.exp(-r * r / 0.5)
"""


def test_user_module_in_working_directory_is_found_and_recorded(tmp_path, monkeypatch,
                                                                 capsys):
    """Before: "cannot import module 'mypot'"; the module was not in record.json, and replay
    said DIFFERENT without naming the edited module."""
    (tmp_path / "mypot.py").write_text(MYPOT.format(strength=1.0))
    run = tmp_path / "run"
    done = _mfbridge("interaction=torch", "interaction.fn=mypot:soft_repulsion",
                     "grid.shape=32", "steps=6", "figures=false", f"hydra.run.dir={run}",
                     cwd=tmp_path)
    assert done.returncode == 0, done.stderr + done.stdout
    record = json.loads((run / "record.json").read_text())
    entry = record["inputs"]["interaction.fn"]
    assert entry["module"] == "mypot"
    assert Path(entry["path"]) == (tmp_path / "mypot.py").resolve()
    import hashlib

    assert entry["sha256"] == hashlib.sha256((tmp_path / "mypot.py").read_bytes()).hexdigest()

    (tmp_path / "mypot.py").write_text(MYPOT.format(strength=2.0))
    from mfbridge.runs.commands.replay import replay

    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)  # the recorded module is found from anywhere
    monkeypatch.setattr(sys, "path", list(sys.path))
    monkeypatch.delitem(sys.modules, "mypot", raising=False)
    try:
        code = replay(run, tmp_path / "replay", 1e-9, False)
    finally:
        sys.modules.pop("mypot", None)
    out = capsys.readouterr().out
    assert code == 1
    assert "interaction.fn: module mypot" in out and "changed since the run" in out
    assert "inputs changed since the run (a likely cause): interaction.fn" in out


def test_data_file_found_in_repository_is_recorded(tmp_path):
    """Before: `inputs` was {} when the demo files were found through the repository."""
    from mfbridge.runs.records import input_files

    config = {"endpoints": {"initial": {"path": "examples/data/chemotaxis_start.csv"}}}
    found = input_files(config, base=tmp_path)
    assert Path(found["endpoints.initial.path"]["path"]) == (
        ROOT / "examples/data/chemotaxis_start.csv").resolve()
    builtin = {"interaction": {"_target_": "mfbridge.model.potentials.GaussianCore"}}
    assert input_files(builtin) == {}


def test_unimportable_module_message_names_the_working_directory(tmp_path, monkeypatch):
    from mfbridge.model.potentials import resolve_callable

    monkeypatch.chdir(tmp_path)
    with pytest.raises(InputError, match="working directory"):
        resolve_callable("nosuchmodule_xyz:f")


# ------------------------------------------------------------------ item 8: job folder names


def test_job_folder_names_are_short_and_stable():
    """Before: sweeps over data files nested folders and names of 300+ characters."""
    from mfbridge.records import JOB_DIR_CHARS, job_dir_name

    plain = "figures=False,grid.shape=32,interaction.strength=1,steps=8"
    assert job_dir_name(plain) == plain  # short sweeps keep readable names
    long_path = "/data/" + "deep/" * 60 + "session_2024_cells.csv"
    name = job_dir_name(f"endpoints.initial.path={long_path},interaction.strength=1")
    assert "/" not in name and len(name) <= JOB_DIR_CHARS
    assert name.startswith("endpoints.initial.path=session_2024_cel")
    assert name.endswith(",interaction.strength=1")
    assert name == job_dir_name(f"endpoints.initial.path={long_path},interaction.strength=1")
    other = job_dir_name(f"endpoints.initial.path={long_path[:-5]}2.csv,interaction.strength=1")
    assert other != name  # different files, different folders
    many = ",".join(f"solver.option{i}=value{i}" for i in range(20))
    assert job_dir_name(many).startswith("job-") and len(job_dir_name(many)) == 14


@pytest.mark.slow
def test_sweep_over_data_files_names_jobs_by_short_ids(tmp_path):
    rng = np.random.default_rng(1)
    deep = tmp_path / ("long_folder_name_" * 4) / "more"
    deep.mkdir(parents=True)
    files = []
    for i in range(2):
        path = deep / f"start_{i}.csv"
        _write_csv(path, rng.normal(-1 + 0.2 * i, 0.5, (150, 1)), "x")
        files.append(str(path))
    _write_csv(tmp_path / "end.csv", rng.normal(1, 0.5, (150, 1)), "x")
    sweep = tmp_path / "sweep"
    done = _mfbridge("-m", "endpoints=samples", f"endpoints.initial.path={files[0]},{files[1]}",
                     "endpoints.final.path=end.csv", "steps=6", "figures=false",
                     f"hydra.sweep.dir={sweep}", "hydra.launcher.n_jobs=1", cwd=tmp_path,
                     timeout=900)
    assert done.returncode == 0, done.stderr + done.stdout
    jobs = sorted(p for p in sweep.iterdir() if p.is_dir())
    assert len(jobs) == 2
    for job in jobs:
        assert len(job.name) <= 120 and "/" not in job.name and (job / "record.json").is_file()
        record = json.loads((job / "record.json").read_text())
        assert any(o.startswith("endpoints.initial.path=/") for o in record["overrides"])


# ------------------------------------------------------------------ item 13: script outputs


EXPERIMENTS = ROOT / "experiments"


def test_scripts_write_to_an_untracked_folder_by_default():
    """Before: the study and bench scripts overwrote tracked reports, so every later run record
    said git dirty. Every script that writes goes through study_common.output_dir."""
    sys.path.insert(0, str(EXPERIMENTS))
    try:
        import study_common
    finally:
        sys.path.remove(str(EXPERIMENTS))
    results = EXPERIMENTS / "results"
    assert study_common.output_dir(results, []) == EXPERIMENTS / "out" / "results"
    assert study_common.output_dir(results, ["--update-committed"]) == results
    assert study_common.output_dir(ROOT / "examples" / "data", []) == (
        EXPERIMENTS / "out" / "examples" / "data")
    ignored = subprocess.run(["git", "check-ignore", "-q", "experiments/out/x.md"], cwd=ROOT,
                             check=False)
    assert ignored.returncode == 0
    for script in sorted(EXPERIMENTS.glob("*.py")):
        text = script.read_text()
        writes = any(w in text for w in ("write_text(", "savefig(", "savez"))
        if writes and script.name != "study_common.py":
            assert "output_dir" in text or "REPORT_DIR" in text, script.name


@pytest.mark.slow
def test_demo_data_script_leaves_the_checkout_clean(tmp_path):
    before = subprocess.run(["git", "status", "--porcelain"], cwd=ROOT, text=True,
                            capture_output=True, check=True).stdout
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1"}
    subprocess.run([sys.executable, str(EXPERIMENTS / "make_demo_samples.py")], cwd=tmp_path,
                   env=env, check=True, capture_output=True, timeout=900)
    after = subprocess.run(["git", "status", "--porcelain"], cwd=ROOT, text=True,
                           capture_output=True, check=True).stdout
    assert after == before
    assert (EXPERIMENTS / "out" / "examples" / "data" / "chemotaxis_start.csv").is_file()


def test_lq_control_takes_positions_in_1d():
    """Before: exact.control(50, x) refused a 1D array or a scalar in 1D. The values are the
    closed form u = ū + A (x - m) (Bunne, Hsieh, Cuturi & Krause, AISTATS 2023)."""
    from mfbridge import lq_bridge

    exact = lq_bridge(stiffness=1.0, strength=1.5, noise=1.0, horizon=1.0, mean0=-1.0,
                      cov0=0.16, mean1=1.2, cov1=0.49, times=101)
    x = np.linspace(-2.0, 2.0, 5)
    expected = exact.mean_control[50, 0] + exact.gain[50, 0, 0] * (x - exact.mean[50, 0])
    np.testing.assert_allclose(exact.control(50, x), expected, rtol=1e-14)
    assert exact.control(50, x).shape == (5,)
    assert float(exact.control(50, 0.5)) == pytest.approx(
        exact.mean_control[50, 0] + exact.gain[50, 0, 0] * (0.5 - exact.mean[50, 0]))
    np.testing.assert_allclose(exact.control(50, x[:, None])[:, 0], expected, rtol=1e-14)
    assert exact.density(50, x).shape == (5,)


@pytest.mark.slow
def test_check_shows_progress_on_stderr(tmp_path):
    """Before: mfbridge check printed nothing for 88 s; now a line per particle number and
    seed on stderr (none with --quiet), the table on stdout."""
    run = tmp_path / "run"
    done = _mfbridge("grid.shape=48", "steps=10", "figures=false", f"hydra.run.dir={run}",
                     cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    loud = _mfbridge("check", str(run), "--particles", "50", "100", "--seed", "0",
                     "--no-figures", cwd=tmp_path)
    assert loud.returncode == 0, loud.stderr
    assert loud.stderr.count("N = ") == 2 and "N = " not in loud.stdout
    quiet = _mfbridge("check", str(run), "--particles", "50", "--seed", "0", "--no-figures",
                      "--quiet", cwd=tmp_path)
    assert quiet.returncode == 0 and "N = " not in quiet.stderr
