"""SIGTERM and SIGINT with real processes, started and stopped by pid (issue 14, item 2).

Before: SIGTERM left a single run's record 'running' forever; SIGINT printed a KeyboardInterrupt
traceback and recorded 'failed'; SIGTERM of a sweep left its joblib workers running (re-parented
to init), and they even started queued jobs after the kill. Now each stops, records
'interrupted', prints one line and exits 128 + the signal number (common practice, no source).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

import mfbridge
from mfbridge.runs import records
from mfbridge.runs.lock import LOCK_FILE

CONSOLE_SCRIPT = Path(sys.executable).with_name("mfbridge")
# a run that cannot converge (tol below what double precision reaches) and would go on for
# minutes: the test stops it while it computes
ENDLESS = ("grid.shape=256", "steps=40", "figures=false", "solver.tol=1e-15",
           "solver.continuation=0", "solver.noise_continuation=0")


def _env() -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k != "HYDRA_FULL_ERROR"}
    env["OPENBLAS_NUM_THREADS"] = "1"
    root = str(Path(mfbridge.__file__).resolve().parent.parent)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (root, env.get("PYTHONPATH")) if p)
    return env


def _status(folder: Path) -> str | None:
    try:
        return records.read_record(folder).status
    except Exception:
        return None


def _wait_running(proc: subprocess.Popen[str], folders: list[Path], timeout: float = 300
                  ) -> None:
    """Until every folder's record says running and the solve has begun."""
    deadline = time.monotonic() + timeout
    while not all(_status(f) == "running" and (f / "config.yaml").exists() for f in folders):
        assert proc.poll() is None, "the command ended before it could be stopped"
        assert time.monotonic() < deadline, "the runs did not start in time"
        time.sleep(0.05)
    time.sleep(1.0)  # inside the outer loop


def _children(pid: int) -> list[int]:
    out = []
    for name in os.listdir("/proc"):
        if name.isdigit():
            try:
                stat = Path(f"/proc/{name}/stat").read_text()
            except OSError:
                continue
            if int(stat.rsplit(")", 1)[1].split()[1]) == pid:
                out.append(int(name))
    return out


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


@pytest.mark.parametrize(("signum", "code"), [
    (signal.SIGTERM, 143),
    pytest.param(signal.SIGINT, 130, marks=pytest.mark.slow),  # the same path; 10 s each
])
def test_single_run_stops_records_and_says_one_line(tmp_path: Path, signum: int,
                                                    code: int) -> None:
    folder = tmp_path / "run"
    proc = subprocess.Popen([str(CONSOLE_SCRIPT), *ENDLESS, f"hydra.run.dir={folder}"],
                            cwd=tmp_path, env=_env(), text=True, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE)
    try:
        _wait_running(proc, [folder])
        os.kill(proc.pid, signum)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == code, err
    name = signal.Signals(signum).name
    lines = [line for line in err.splitlines() if line.startswith("mfbridge: interrupted")]
    assert lines == [f"mfbridge: interrupted by {name}; the run is recorded as interrupted "
                     "(run the same command again to recompute it)"]
    assert "Traceback" not in out + err and "KeyboardInterrupt" not in out + err
    record = records.read_record(folder)
    assert record.status == "interrupted" and record.error == f"interrupted by {name}"
    assert records.read_marker(folder) is None and not (folder / LOCK_FILE).exists()


@pytest.mark.slow
def test_sweep_stops_its_workers_and_records_their_jobs(tmp_path: Path) -> None:
    """Two jobs on two workers; SIGTERM to the sweep's process: both workers end (within the
    5 s grace, then killed), both jobs are recorded interrupted, the third job never starts,
    one line, exit 143. A re-run then computes all three (the locks are free)."""
    sweep = tmp_path / "sweep"
    args = [str(CONSOLE_SCRIPT), "-m", *ENDLESS, "noise=0.8,0.9,1.0",
            "hydra.launcher.n_jobs=2", f"hydra.sweep.dir={sweep}"]
    proc = subprocess.Popen(args, cwd=tmp_path, env=_env(), text=True, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, start_new_session=True)
    jobs = [sweep / f"figures=False,grid.shape=256,noise={n},solver.continuation=0,"
                    f"solver.noise_continuation=0,solver.tol=1e-15,steps=40" for n in (0.8, 0.9)]
    try:
        _wait_running(proc, jobs)
        workers = _children(proc.pid)
        os.kill(proc.pid, signal.SIGTERM)
        out, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    assert proc.returncode == 143, err
    time.sleep(1.0)
    assert [pid for pid in workers if _alive(pid)] == []
    lines = [line for line in err.splitlines() if line.startswith("mfbridge: interrupted")]
    assert len(lines) == 1 and "0 of 3 runs complete; 2 interrupted" in lines[0], err
    assert "Traceback" not in out + err
    assert [_status(j) for j in jobs] == ["interrupted", "interrupted"]
    time.sleep(3.0)  # nothing starts after the kill
    assert len(list(sweep.glob("figures=*"))) == 2
