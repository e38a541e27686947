"""A run you can trust (issue 14): statuses and exit codes, run folders that cannot be confused,
load and check gated on complete and converged runs, a full disk named as such, clear errors.

Each test reproduces a case the issue lists (its numbers before the fix are in the docstrings)
and checks the behaviour the README's reliability table states. The facts checked are the
tool's own contract (common practice, no source).
"""

from __future__ import annotations

import errno
import json
import logging
import shutil
import subprocess
import warnings
from pathlib import Path
from types import SimpleNamespace

import pytest

import mfbridge
from mfbridge import InputError, RunStatusWarning, compose
from mfbridge.errors import DiskFullError
from mfbridge.result import COMPLETE_FILE, RESULT_FILE, SUMMARY_FILE, read_marker
from mfbridge.runs import cli, folders, records, sweeps
from mfbridge.runs.cli import run
from mfbridge.runs.commands import check, collect, replay
from mfbridge.runs.config_checks import override_mistakes
from mfbridge.runs.exits import EXIT_CODES, exit_code, sweep_exit_code
from mfbridge.runs.lock import LOCK_FILE, FolderBusy, RunLock

SMALL = ("grid.shape=32", "steps=8", "figures=false")
# a Morse attraction of depth 50 blows the outer loop up in 2 iterations (1.9 s measured)
# the jump chain diverges here within 2 outer iterations (kernel=auto would take the Gaussian
# steps, estimated cell Péclet number 11, which run to max_iter without converging instead)
DIVERGING = ("grid.shape=48", "steps=8", "figures=false", "interaction=morse",
             "interaction.depth=50", "endpoints=gaussians", "solver.route=operator",
             "solver.continuation=0", "solver.noise_continuation=0", "solver.kernel=chain",
             "solver.cross_check=off")


@pytest.fixture(scope="module")
def finished(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("finished") / "run"
    run(compose(list(SMALL)), folder)
    return folder


@pytest.fixture(scope="module")
def diverged(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("diverged") / "run"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert run(compose(list(DIVERGING)), folder).status == "diverged"
    return folder


def _copy(folder: Path, target: Path) -> Path:
    shutil.copytree(folder, target, ignore=shutil.ignore_patterns(LOCK_FILE))
    return target


# ------------------------------------------------------------------------------- exit codes


def test_exit_codes_are_distinct_and_sweeps_report_the_worst() -> None:
    codes = [exit_code(s) for s in ("converged", "not_converged", "diverged", "suspect",
                                     "refused", "failed")]
    assert codes[0] == 0 and len(set(codes)) == len(codes) and 1 not in codes
    assert exit_code("interrupted", 2) == 130 and exit_code("interrupted", 15) == 143
    assert sweep_exit_code(["converged", "converged"]) == 0
    assert sweep_exit_code(["converged", "not_converged", "diverged"]) == EXIT_CODES["diverged"]
    assert sweep_exit_code(["diverged", "refused", "converged"]) == EXIT_CODES["refused"]
    assert sweep_exit_code(["failed", "interrupted"], 15) == 143


def test_console_exit_code_follows_the_status(tmp_path: Path, monkeypatch: pytest.MonkeyPatch
                                              ) -> None:
    """Before: a diverged run exited 0 and logged its cost at INFO."""
    monkeypatch.setattr("sys.argv", ["mfbridge", *DIVERGING, f"hydra.run.dir={tmp_path}"])
    with warnings.catch_warnings(), pytest.raises(SystemExit) as stop:
        warnings.simplefilter("ignore")
        cli.main()
    assert stop.value.code == EXIT_CODES["diverged"] == 4
    assert read_marker(tmp_path) is not None  # diverged is a terminal status: complete


# ------------------------------------------------------------------------- terminal statuses


def test_diverged_run_is_complete_resumed_collected_and_replayed(
        diverged: Path, tmp_path: Path, caplog: pytest.LogCaptureFixture,
        capsys: pytest.CaptureFixture[str]) -> None:
    """Before: no completion marker, recomputed by every re-run, dropped by collect, refused by
    replay, reported as '(0 not converged)' plus a false claim of changed files."""
    assert records.is_complete(diverged)
    assert records.read_record(diverged).status == "diverged"
    with caplog.at_level(logging.INFO, logger="mfbridge"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        again = run(compose(list(DIVERGING)), diverged)
    assert again.status == "diverged" and "skipped" in caplog.text  # resume: not recomputed
    sweep = tmp_path / "sweep"
    _copy(diverged, sweep / "job")
    rows, _ = collect.collect_rows(sweep)[1:]
    assert [r.status for r in rows] == ["diverged"]
    assert rows[0].numbers["cost"] == mfbridge.load(diverged, warn=False).cost
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert replay.replay(diverged, tmp_path / "replayed", 1e-9, figures=False) == 0
    out = capsys.readouterr().out
    assert "status:  stored diverged, replayed diverged" in out and "REPRODUCED" in out


# ------------------------------------------------------------------------------ run folders


def test_edited_finished_run_is_never_overwritten(finished: Path, tmp_path: Path) -> None:
    """Before: editing summary.json of a copy made `mfbridge ... noise=0.9` replace result.nc."""
    folder = _copy(finished, tmp_path / "X")
    summary = json.loads((folder / SUMMARY_FILE).read_text())
    summary["cost"] = 9.5
    (folder / SUMMARY_FILE).write_text(json.dumps(summary))
    before = (folder / RESULT_FILE).read_bytes()
    with pytest.raises(folders.RunFolderError, match=r"summary\.json changed after it finished"):
        run(compose([*SMALL, "noise=0.9"]), folder)
    with pytest.raises(folders.RunFolderError, match="changed after it finished"):
        run(compose(list(SMALL)), folder)  # the same config: still not overwritten
    assert (folder / RESULT_FILE).read_bytes() == before


@pytest.mark.parametrize("record", ["none", "other config", "corrupted"])
def test_foreign_result_files_are_never_overwritten(finished: Path, tmp_path: Path,
                                                    record: str) -> None:
    """Before: a folder holding a foreign result.nc was overwritten without a word."""
    folder = tmp_path / "F"
    folder.mkdir()
    shutil.copy(finished / RESULT_FILE, folder)
    if record == "other config":
        stale = records.read_record(finished)
        stale.config = {**stale.config, "noise": 0.5}
        stale.status = "failed"
        records.write_record(folder, stale)
    elif record == "corrupted":
        (folder / records.RECORD_FILE).write_text("{")
    before = (folder / RESULT_FILE).read_bytes()
    with pytest.raises(folders.RunFolderError, match=r"does not overwrite|different"):
        run(compose(list(SMALL)), folder)
    assert (folder / RESULT_FILE).read_bytes() == before
    assert not (folder / "config.yaml").exists()


def test_unfinished_attempt_of_the_same_config_is_recomputed(finished: Path,
                                                             tmp_path: Path) -> None:
    folder = _copy(finished, tmp_path / "killed")
    (folder / COMPLETE_FILE).unlink()
    stale = records.read_record(folder)
    stale.status = "running"
    records._write_json(folder / records.RECORD_FILE, stale.__dict__)
    assert run(compose(list(SMALL)), folder).status == "converged"
    assert records.is_complete(folder)


def test_a_live_owner_blocks_a_second_run_until_it_is_gone(tmp_path: Path) -> None:
    """Before: an immediate re-run computed the same job concurrently into the same folder.
    A separate process holds the folder's lock (flock, as RunLock takes it); the run is refused
    naming its pid; once that process is killed, the next run takes the lock over."""
    folder = tmp_path / "run"
    folder.mkdir()
    holder = subprocess.Popen(
        ["python3", "-c", "import fcntl, json, os, socket, sys, time\n"
         f"f = open({str(folder / LOCK_FILE)!r}, 'w')\n"
         "fcntl.flock(f, fcntl.LOCK_EX)\n"
         "json.dump({'pid': os.getpid(), 'host': socket.gethostname(), 'started': 'now'}, f)\n"
         "f.flush(); print('locked', flush=True); time.sleep(300)\n"],
        stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "locked"
        with pytest.raises(FolderBusy, match=f"process {holder.pid} on"):
            run(compose(list(SMALL)), folder)
        assert not (folder / records.RECORD_FILE).exists()  # nothing written meanwhile
    finally:
        holder.kill()
        holder.wait()
    assert run(compose(list(SMALL)), folder).status == "converged"
    assert not (folder / LOCK_FILE).exists()  # released at the end


def test_lock_is_exclusive_within_a_process_too(tmp_path: Path) -> None:
    with RunLock(tmp_path), pytest.raises(FolderBusy):
        RunLock(tmp_path).acquire()
    RunLock(tmp_path).acquire().release()


@pytest.mark.parametrize("where", ["file", "below a file", "/proc"])
def test_output_path_that_cannot_be_a_folder(tmp_path: Path, where: str) -> None:
    """Before: Hydra's FileExistsError / FileNotFoundError traceback."""
    afile = tmp_path / "afile"
    afile.write_text("x")
    path = {"file": afile, "below a file": afile / "run", "/proc": Path("/proc/x")}[where]
    with pytest.raises(folders.RunFolderError, match=r"is a file|pseudo file system"):
        folders.check_output_path(path)


# -------------------------------------------------------------------------- load and check


@pytest.mark.parametrize("name", ["noise=0.8", "noise=0.8,steps=8"])
def test_output_path_with_hydra_syntax_asks_for_quotes(tmp_path: Path, name: str,
                                                       monkeypatch: pytest.MonkeyPatch,
                                                       capsys: pytest.CaptureFixture[str]
                                                       ) -> None:
    """Before: a folder named like a sweep job (hydra.run.dir=.../noise=0.8,steps=8) gave
    Hydra's "mismatched input '=' expecting <EOF>" or "Ambiguous value", exit 1. Now one line,
    exit 2, with the quoted form, which Hydra accepts (measured: the run went into .../a=b,c)."""
    folder = tmp_path / name
    monkeypatch.setattr("sys.argv", ["mfbridge", *SMALL, f"hydra.run.dir={folder}"])
    with pytest.raises(SystemExit) as stop:
        cli.main()
    assert stop.value.code == EXIT_CODES["refused"]
    assert not folder.exists()
    err = capsys.readouterr().err
    assert f"quote the folder: \"hydra.run.dir='{folder}'\"" in err
    assert "Traceback" not in err
    assert override_mistakes([f"hydra.run.dir='{folder}'", f'hydra.sweep.dir="{folder}"']) == []


def test_load_warns_unless_complete_and_converged(finished: Path, tmp_path: Path) -> None:
    """Before: a folder without complete.json, or recorded as failed, loaded as converged
    without a word."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert mfbridge.load(finished).status == "converged"  # complete and converged: silent
    no_marker = _copy(finished, tmp_path / "no_marker")
    (no_marker / COMPLETE_FILE).unlink()
    with pytest.warns(RunStatusWarning, match="no completion marker.*'converged'"):
        mfbridge.load(no_marker)
    failed = _copy(finished, tmp_path / "failed")
    (failed / COMPLETE_FILE).unlink()
    record = records.read_record(failed)
    record.status, record.error = "failed", "DiskFullError: no space left on the device at X"
    records._write_json(failed / records.RECORD_FILE, record.__dict__)
    with pytest.warns(RunStatusWarning, match="record status 'failed': DiskFullError"):
        mfbridge.load(failed)
    edited = _copy(finished, tmp_path / "edited")
    (edited / SUMMARY_FILE).write_text((edited / SUMMARY_FILE).read_text() + " ")
    with pytest.warns(RunStatusWarning, match="summary.json changed after the run"):
        mfbridge.load(edited)
    # a result saved from Python carries its own marker
    saved = mfbridge.load(finished).save(tmp_path / "saved")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        mfbridge.load(saved)


def test_check_refuses_a_run_that_did_not_converge(diverged: Path,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    """Before: `mfbridge check` on a diverged run exited 0 with a cost interval [-730, 784]."""
    assert check.main([str(diverged), "--quiet"]) == EXIT_CODES["refused"]
    err = capsys.readouterr().err
    assert "not a complete, converged run: status diverged" in err and "--force" in err


def test_check_fails_on_non_finite_particles(finished: Path, tmp_path: Path,
                                             monkeypatch: pytest.MonkeyPatch,
                                             capsys: pytest.CaptureFixture[str]) -> None:
    """Before: a NaN gradient in a user potential gave an all-NaN table and exit 0. The
    confinement's gradient is made NaN everywhere; the simulation then gives NaN."""
    import numpy as np

    from mfbridge.model.potentials import Harmonic

    monkeypatch.setattr(Harmonic, "grad", lambda self, x: np.full_like(x, np.nan))
    folder = _copy(finished, tmp_path / "run")
    with np.errstate(invalid="ignore"):
        code = check.main([str(folder), "--particles", "50", "--seed", "0", "--quiet",
                           "--no-figures"])
    assert code == EXIT_CODES["failed"]
    assert "non-finite values" in capsys.readouterr().err
    assert not (folder / check.CHECK_FILE).exists()


def test_check_with_one_seed_succeeds(finished: Path, tmp_path: Path,
                                      capsys: pytest.CaptureFixture[str]) -> None:
    """Before: one seed gave exit 6 ("non-finite values (w1_T_sem)"): the standard error over
    seeds is undefined for one seed (NaN by design), not a failed simulation. Now: exit 0, the
    table shows "-", check.json holds null, and every other number is finite."""
    import json
    import math

    folder = _copy(finished, tmp_path / "run")
    code = check.main([str(folder), "--particles", "50", "--seed", "0", "--quiet",
                       "--no-figures"])
    out = capsys.readouterr().out
    assert code == 0, out
    row = json.loads((folder / check.CHECK_FILE).read_text())["table"][0]
    assert row["seeds"] == 1 and row["w1_T_sem"] is None
    assert all(math.isfinite(v) for k, v in row.items() if k != "w1_T_sem" and v is not None)
    assert out.splitlines()[1].split()[3] == "-"


# ------------------------------------------------------------------------------- disk full


def _tiny_filesystem(path: Path, size: str) -> bool:
    """Mount a tmpfs of ``size`` at ``path`` (needs root); ``False`` where that is not allowed."""
    path.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)],
                          capture_output=True, check=False)
    return done.returncode == 0


def test_disk_full_while_saving_is_named(finished: Path, tmp_path: Path,
                                         monkeypatch: pytest.MonkeyPatch) -> None:
    """Before: `RuntimeError: NetCDF: HDF error` with no word of disk space, and the record
    left 'running'. On a 40 kB tmpfs (result.nc is 50 kB) where one can be mounted, else by an
    injected ENOSPC."""
    result = mfbridge.load(finished)
    small = tmp_path / "small"
    if _tiny_filesystem(small, "40k"):
        try:
            with pytest.raises(DiskFullError, match=f"no space left on the device at {small}"):
                result.save(small / "run")
            assert read_marker(small / "run") is None
        finally:
            # the netCDF library may still hold the failed file open: detach lazily
            subprocess.run(["umount", "-l", str(small)], check=True)
    else:
        def full(*args: object, **kwargs: object) -> None:
            raise OSError(errno.ENOSPC, "No space left on device")

        monkeypatch.setattr("xarray.Dataset.to_netcdf", full)
        with pytest.raises(DiskFullError, match="no space left on the device at"):
            result.save(small / "run")


def test_full_device_is_refused_before_hydra_writes(tmp_path: Path,
                                                   monkeypatch: pytest.MonkeyPatch,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    """Before: on a device with a few kB free, Hydra's `OSError: [Errno 28]` traceback while
    writing .hydra/ (exit 1). On an 8 kB tmpfs where one can be mounted, else a faked free
    space."""
    small = tmp_path / "small"
    mounted = _tiny_filesystem(small, "8k")
    if not mounted:
        monkeypatch.setattr("shutil.disk_usage", lambda path: SimpleNamespace(free=8192))
    monkeypatch.setattr("sys.argv", ["mfbridge", *SMALL, f"hydra.run.dir={small}/run"])
    try:
        with pytest.raises(SystemExit) as stop:
            cli.main()
        assert stop.value.code == EXIT_CODES["refused"]
        assert not (small / "run").exists()
    finally:
        if mounted:
            subprocess.run(["umount", "-l", str(small)], check=True)
    assert f"no space left on the device at {small}/run: 8192 bytes free" in capsys.readouterr().err


def test_disk_filling_during_a_run_is_recorded(tmp_path: Path,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    """Before: the record stayed 'running' (its atomic rewrite needed a block the full disk did
    not have) and a full disk while writing config.yaml was a bare OSError. A 12 kB tmpfs
    (measured: the record and config.yaml fit, the 11.5 kB result does not) with the start-up
    check lowered, else injected ENOSPC on every write after the first record."""
    monkeypatch.setattr(folders, "MIN_FREE_BYTES", 0)
    small = tmp_path / "small"
    mounted = _tiny_filesystem(small, "12k")
    if not mounted:
        real = records._atomic_write
        calls = {"n": 0}

        def full(target: Path, write: object) -> None:
            calls["n"] += 1
            if calls["n"] > 1:
                raise OSError(errno.ENOSPC, "No space left on device")
            real(target, write)

        monkeypatch.setattr(records, "_atomic_write", full)
        monkeypatch.setattr("mfbridge.result._atomic_write", full)
    try:
        with pytest.raises(DiskFullError, match=f"no space left on the device at {small}"):
            run(compose(list(SMALL)), small / "run")
        record = records.read_record(small / "run")
        assert record.status == "failed" and "no space left on the device" in record.error
        assert read_marker(small / "run") is None
    finally:
        if mounted:
            subprocess.run(["umount", "-l", str(small)], check=True)


def test_out_of_memory_during_a_run_is_recorded(tmp_path: Path,
                                               monkeypatch: pytest.MonkeyPatch) -> None:
    """An allocation that fails although the estimate fitted (numpy's _ArrayMemoryError, a
    MemoryError): recorded 'failed' with the memory available now, exit 6, no traceback."""
    def oom(*args: object, **kwargs: object) -> None:
        raise MemoryError("Unable to allocate 1.38 GiB for an array with shape (11, 16777216)")

    monkeypatch.setattr(cli, "solve", oom)
    monkeypatch.setattr("sys.argv", ["mfbridge", *SMALL, f"hydra.run.dir={tmp_path}/run"])
    with pytest.raises(SystemExit) as stop:
        cli.main()
    assert stop.value.code == EXIT_CODES["failed"]
    record = records.read_record(tmp_path / "run")
    assert record.status == "failed"
    assert record.error.startswith("OutOfMemory: out of memory during the run (Unable to")
    assert "available now:" in record.error


def test_figure_failure_keeps_the_saved_status(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                               caplog: pytest.LogCaptureFixture) -> None:
    """Before: a full disk while drawing figures marked a saved, converged result 'failed'."""
    def full(*args: object, **kwargs: object) -> None:
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr("mfbridge.runs.plotting.plot_result", full)
    with caplog.at_level(logging.WARNING, logger="mfbridge"):
        result = run(compose([*SMALL[:2], "figures=true"]), tmp_path / "run")
    assert result.status == "converged"
    assert records.read_record(tmp_path / "run").status == "converged"
    assert records.is_complete(tmp_path / "run")
    assert "figures not drawn (no space left on the device at" in caplog.text


# -------------------------------------------------------------------------------- messages


def test_figures_must_be_a_boolean(tmp_path: Path) -> None:
    """Before: figures=no and figures=off drew the figures."""
    with pytest.raises(InputError, match="figures must be true or false, got 'no'"):
        run(compose([*SMALL[:2], "figures=no"]), tmp_path / "run")
    assert records.read_record(tmp_path / "run").status == "refused"


def test_solve_and_load_of_none_are_clear_errors() -> None:
    """Before: a bare TypeError."""
    with pytest.raises(InputError, match=r"solve expects a configuration from mfbridge.compose"):
        mfbridge.solve(None)
    with pytest.raises(InputError, match="load expects the path of a run folder"):
        mfbridge.load(None)  # type: ignore[arg-type]


def test_collect_counts_a_corrupted_record_once(finished: Path, tmp_path: Path) -> None:
    """Before: a job with a corrupted record.json got an 'incomplete' row and a 'missing' row."""
    sweep = tmp_path / "sweep"
    job = _copy(finished, sweep / "noise=0.8")
    (job / ".hydra").mkdir()
    (job / ".hydra" / "overrides.yaml").write_text("- noise=0.8\n")
    (job / records.RECORD_FILE).write_text('{"config": ')
    (sweep / "multirun.yaml").write_text(
        "hydra:\n  overrides:\n    task:\n    - noise=0.8,0.9\n")
    rows = collect.collect_rows(sweep)[1]
    assert [(r.status, r.params) for r in rows] == [("unreadable", {"noise": 0.8}),
                                                    ("missing", {"noise": 0.9})]


def test_reused_sweep_folder_counts_only_this_sweeps_runs(finished: Path, tmp_path: Path
                                                          ) -> None:
    """Before: 'sweep progress: 4 of 1 runs complete' in a folder reused for another sweep."""
    sweep = tmp_path / "sweep"
    for name in ("a", "b", "c"):
        _copy(finished, sweep / name)  # runs of an older sweep (overrides: none)
    job = _copy(finished, sweep / "new")
    record = records.read_record(job)
    record.overrides = ["noise=1.5"]
    records.write_record(job, record)  # with a new marker
    (sweep / sweeps.JOBS_FILE).write_text(json.dumps({"jobs": 1, "overrides": [["noise=1.5"]]}))
    ours, others = sweeps.split_entries(sweep)
    assert [e.folder.name for e in ours] == ["new"] and len(others) == 3
    assert sweeps.summary_line(ours, 1) == "1 of 1 runs complete (1 converged)"
