"""Replay of a recorded run, resume in run(), and refusals on bad records."""

from __future__ import annotations

import json
import logging
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import xarray as xr

import mfbridge
from mfbridge import InputError, compose
from mfbridge.result import RESULT_FILE
from mfbridge.runs import records
from mfbridge.runs.cli import run
from mfbridge.runs.commands import replay

CONSOLE_SCRIPT = Path(sys.executable).with_name("mfbridge")
SMALL = ("grid.shape=32", "steps=8", "figures=false")


@pytest.fixture(scope="module")
def recorded(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("recorded") / "run"
    run(compose([*SMALL, "interaction.strength=1.5"]), folder)
    return folder


def _copy(folder: Path, target: Path) -> Path:
    shutil.copytree(folder, target)
    return target


def test_replay_reproduces_bit_for_bit(recorded: Path, tmp_path: Path,
                                       capsys: pytest.CaptureFixture[str]) -> None:
    code = replay.main([str(recorded), "--out", str(tmp_path / "again")])
    out = capsys.readouterr().out
    assert code == 0, out
    assert "density: max |stored - replayed| = 0\n" in out
    assert "|difference| = 0\n" in out
    assert "verdict: REPRODUCED bit for bit" in out
    assert "warning" not in out
    again = records.read_record(tmp_path / "again")
    assert again.replay_of == str(recorded.resolve())
    assert again.overrides == records.read_record(recorded).overrides
    assert mfbridge.load(tmp_path / "again").cost == mfbridge.load(recorded).cost


def test_replay_detects_a_tampered_result(recorded: Path, tmp_path: Path,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    folder = _copy(recorded, tmp_path / "run")
    path = folder / RESULT_FILE
    with xr.open_dataset(path) as ds:
        data = ds.load()
    data["density"] = data["density"] * (1 + 1e-6)
    path.unlink()
    data.to_netcdf(path)
    code = replay.main([str(folder), "--out", str(tmp_path / "again")])
    out = capsys.readouterr().out
    assert code == 1, out
    assert f"warning: {RESULT_FILE} in {folder} changed after the run" in out
    assert "verdict: DIFFERENT" in out
    density_line = next(line for line in out.splitlines() if line.startswith("density"))
    assert float(density_line.split("=")[-1]) > 1e-7


def test_replay_tolerance_is_applied(recorded: Path, tmp_path: Path,
                                     capsys: pytest.CaptureFixture[str]) -> None:
    folder = _copy(recorded, tmp_path / "run")
    summary = json.loads((folder / "summary.json").read_text())
    stored = mfbridge.load(folder)
    stored.cost += 1e-11  # a change below the default tolerance, above zero
    stored.save(folder)
    assert json.loads((folder / "summary.json").read_text())["cost"] != summary["cost"]
    assert replay.main([str(folder), "--out", str(tmp_path / "a")]) == 0
    assert "REPRODUCED within tolerance 1e-09 (not bit for bit)" in capsys.readouterr().out
    assert replay.main([str(folder), "--out", str(tmp_path / "b"), "--tol", "0"]) == 1


def test_replay_warns_about_other_versions(recorded: Path, tmp_path: Path,
                                           capsys: pytest.CaptureFixture[str]) -> None:
    folder = _copy(recorded, tmp_path / "run")
    data = json.loads((folder / records.RECORD_FILE).read_text())
    data["versions"]["numpy"] = "1.0.0"
    (folder / records.RECORD_FILE).write_text(json.dumps(data))
    assert replay.main([str(folder), "--out", str(tmp_path / "again")]) == 0
    out = capsys.readouterr().out
    assert "warning: package version differs: numpy 1.0.0 in the record" in out


@pytest.mark.parametrize(
    ("damage", "message"),
    [
        ("no_record", "has no record.json: not a recorded mfbridge run folder"),
        ("garbage_record", "record.json is corrupted"),
        ("record_without_config", "holds no configuration"),
        ("no_marker", "holds no completed run"),
        ("corrupted_result", f"cannot read .*{RESULT_FILE}"),
        ("no_folder", "no run folder at"),
    ],
)
def test_replay_refuses_bad_records(recorded: Path, tmp_path: Path, damage: str, message: str,
                                    capsys: pytest.CaptureFixture[str]) -> None:
    folder = _copy(recorded, tmp_path / "run")
    if damage == "no_record":
        (folder / records.RECORD_FILE).unlink()
    elif damage == "garbage_record":
        (folder / records.RECORD_FILE).write_bytes(b"\x00{not json")
    elif damage == "record_without_config":
        data = json.loads((folder / records.RECORD_FILE).read_text())
        del data["config"]
        (folder / records.RECORD_FILE).write_text(json.dumps(data))
    elif damage == "no_marker":
        (folder / records.COMPLETE_FILE).unlink()
    elif damage == "corrupted_result":
        (folder / RESULT_FILE).write_bytes(b"garbage" * 50)
    elif damage == "no_folder":
        shutil.rmtree(folder)
    assert replay.main([str(folder), "--out", str(tmp_path / "again")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("mfbridge replay: error: ")
    assert __import__("re").search(message, err), err
    assert not (tmp_path / "again" / RESULT_FILE).exists()


def test_console_replay_error_has_no_traceback(tmp_path: Path) -> None:
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1"}
    done = subprocess.run([str(CONSOLE_SCRIPT), "replay", str(tmp_path / "missing")], env=env,
                          cwd=tmp_path, text=True, capture_output=True, timeout=300, check=False)
    assert done.returncode == 2
    assert "no run folder at" in done.stderr
    assert "Traceback" not in done.stderr + done.stdout


# ----------------------------------------------------------------------------- resume in run()


def test_run_skips_a_complete_folder(recorded: Path, tmp_path: Path,
                                     caplog: pytest.LogCaptureFixture) -> None:
    folder = _copy(recorded, tmp_path / "run")
    marker = records.read_marker(folder)
    with caplog.at_level(logging.INFO, logger="mfbridge"):
        result = run(compose([*SMALL, "interaction.strength=1.5"]), folder)
    assert "skipped" in caplog.text
    assert "outer iteration" not in caplog.text
    assert records.read_marker(folder) == marker
    assert result.cost == mfbridge.load(recorded).cost


def test_run_refuses_a_folder_of_another_config(recorded: Path, tmp_path: Path) -> None:
    folder = _copy(recorded, tmp_path / "run")
    with pytest.raises(InputError, match="complete run of a different configuration"):
        run(compose([*SMALL, "interaction.strength=0.5"]), folder)


def test_run_redoes_a_folder_without_marker(recorded: Path, tmp_path: Path) -> None:
    folder = _copy(recorded, tmp_path / "run")
    (folder / records.COMPLETE_FILE).unlink()
    before = records.read_record(folder).started
    result = run(compose([*SMALL, "interaction.strength=1.5"]), folder)
    assert records.is_complete(folder)
    assert result.cost == mfbridge.load(recorded).cost
    assert records.read_record(folder).started >= before


def test_refused_run_is_recorded(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="noise must be a positive"):
        run(compose([*SMALL, "noise=-1"]), tmp_path)
    record = records.read_record(tmp_path)
    assert record.status == "refused"
    assert "noise must be a positive finite number" in (record.error or "")
    assert records.read_marker(tmp_path) is None
