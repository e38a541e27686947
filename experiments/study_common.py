"""Shared plumbing of the study scripts: paths, running the console script, trimming its log."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
REPORT_DIR = ROOT / "experiments" / "reports"
FIGURE_DIR = REPORT_DIR / "figures"


def sweep_dir(name: str) -> tuple[str, Path]:
    """The study's sweep folder, relative to the repository root and absolute (git-ignored)."""
    relative = f"experiments/runs/study_{name}"
    return relative, ROOT / relative


def dirname_override(scenario: list[str]) -> str:
    """Leave the fixed scenario keys out of the job folder names (they would reach the
    255-character limit of file names)."""
    keys = [item.partition("=")[0] for item in scenario]
    return f"hydra.job.config.override_dirname.exclude_keys=[{','.join(keys)}]"


def mfbridge(*args: str) -> str:
    """Run the mfbridge console script from the repository root; return its output (stdout and
    stderr together); stop with the output when it fails."""
    script = Path(sys.executable).with_name("mfbridge")
    # PYTHONPATH: the console script imports this checkout, not whichever one is installed
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1",
           "PYTHONPATH": os.pathsep.join(p for p in (str(ROOT), os.environ.get("PYTHONPATH"))
                                         if p)}
    done = subprocess.run([str(script), *args], cwd=ROOT, env=env, text=True,
                          stdout=subprocess.PIPE, stderr=subprocess.STDOUT, check=False)
    if done.returncode != 0:
        raise SystemExit(f"mfbridge {' '.join(args)} failed:\n{done.stdout}")
    return done.stdout


def tail(text: str, n: int) -> str:
    """The last n lines of a log, without the per-iteration progress lines."""
    lines = [line for line in text.strip().splitlines() if "outer iteration" not in line]
    return "\n".join(lines[-n:])


def timing_sentence(seconds: float, solver_total: float) -> str:
    """The report's sentence on how long the sweep and collect took."""
    return (
        f"The two commands took {seconds:.0f} s wall time on 2 shared cores in the script's last\n"
        "invocation (a re-run skips complete runs, so only a first run measures the sweep); "
        f"solver time\nsummed over the runs: {solver_total:.0f} s."
    )
