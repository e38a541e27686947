"""Shared plumbing of the study scripts: paths, running the console script, trimming its log."""

from __future__ import annotations

import argparse
import datetime
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
#: Regenerate the committed reports and results (tracked files) instead of experiments/out/.
UPDATE_FLAG = "--update-committed"
#: Where the scripts write by default: git-ignored, so later run records are not "dirty".
OUT_ROOT = ROOT / "experiments" / "out"


def output_dir(committed: Path, argv: list[str] | None = None) -> Path:
    """The folder a script writes to: ``committed`` (a tracked folder such as
    experiments/results) only when the command line has ``--update-committed``; else the same
    relative place under the git-ignored experiments/out/ (experiments/results ->
    experiments/out/results, examples/data -> experiments/out/examples/data)."""
    args = sys.argv[1:] if argv is None else argv
    if UPDATE_FLAG in args:
        return committed
    committed = committed.resolve()
    experiments = ROOT / "experiments"
    base = experiments if experiments in committed.parents else ROOT
    return OUT_ROOT / committed.relative_to(base)


def add_output_flag(parser: argparse.ArgumentParser) -> None:
    """The --update-committed option of a script's parser (see :func:`output_dir`)."""
    parser.add_argument(UPDATE_FLAG, action="store_true",
                        help="write into the committed (tracked) folder instead of "
                             "experiments/out/ (regenerating the committed reports)")


REPORT_DIR = output_dir(ROOT / "experiments" / "reports")
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


QUIET = "--quiet" in sys.argv[1:]


def mfbridge(*args: str) -> str:
    """Run ``python -m mfbridge`` (this interpreter: no ``mfbridge`` on PATH needed) from the
    repository root; return its output (stdout and stderr together), echoing each line to
    stderr as it comes unless the script was given ``--quiet``; stop with the output when it
    fails."""
    # PYTHONPATH: the command imports this checkout, not whichever one is installed
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1",
           "PYTHONPATH": os.pathsep.join(p for p in (str(ROOT), os.environ.get("PYTHONPATH"))
                                         if p)}
    lines = []
    with subprocess.Popen([sys.executable, "-m", "mfbridge", *args], cwd=ROOT, env=env,
                          text=True, stdout=subprocess.PIPE, stderr=subprocess.STDOUT) as proc:
        assert proc.stdout is not None
        for line in proc.stdout:
            lines.append(line)
            if not QUIET:
                sys.stderr.write(line)
                sys.stderr.flush()
    output = "".join(lines)
    if proc.returncode != 0:
        raise SystemExit(f"mfbridge {' '.join(args)} failed:\n{output}")
    return output


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


class Conditions:
    """The measurement conditions of a study run, for its report: created at the start (UTC
    time, 1-minute load average, git commit of this checkout), :meth:`sentence` at the end."""

    def __init__(self) -> None:
        from mfbridge.runs.records import git_state

        self.start = datetime.datetime.now(datetime.timezone.utc)
        self.load = os.getloadavg()[0]
        state = git_state(ROOT)
        self.commit = ("unknown commit" if state is None else
                       state["commit"][:7] + (" with uncommitted changes" if state["dirty"]
                                              else ""))

    def sentence(self) -> str:
        end = datetime.datetime.now(datetime.timezone.utc)
        return (f"Measured {self.start:%Y-%m-%d %H:%M}–{end:%H:%M} UTC at commit {self.commit}; "
                f"1-minute load average {self.load:.1f} at the start, "
                f"{os.getloadavg()[0]:.1f} at the end (2 cores shared).")
