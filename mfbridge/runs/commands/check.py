"""``mfbridge check RUN_DIR``: drive N interacting particles with a saved bridge's control.

Loads the result in RUN_DIR (refusing, with exit code 2, a folder that is missing, incomplete or
from another format version, and a run that is not complete and converged unless ``--force``:
see :func:`mfbridge.runs.api.run_problem`), rebuilds the model from its resolved config, runs
:func:`mfbridge.particles.check`, prints the convergence table and writes ``check.json`` and the
figures ``check_histograms.png``, ``check_clouds.png``, ``check_convergence.png`` into RUN_DIR
(each written to a temporary file and renamed). A simulation that gives NaN or infinite
numbers (a model force that is not finite) writes nothing and exits 6.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

from mfbridge.errors import InputError, MFBridgeError
from mfbridge.runs.exits import EXIT_CODES

CHECK_FILE = "check.json"
FIGURES = ("check_histograms.png", "check_clouds.png", "check_convergence.png")


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="mfbridge check",
        description="Simulate N interacting particles driven by the computed control of a run "
                    "and compare them with the bridge (W1 distances, moments, Girsanov cost).")
    parser.add_argument("run_dir", metavar="RUN_DIR", help="run folder holding result.nc")
    parser.add_argument("--particles", type=int, nargs="+", default=[250, 1000, 4000],
                        metavar="N", help="particle numbers (default: 250 1000 4000)")
    parser.add_argument("--seed", type=int, nargs="+", default=[0, 1, 2, 3], metavar="S",
                        help="seeds, one repetition each (default: 0 1 2 3)")
    parser.add_argument("--substeps", type=int, default=None,
                        help="Euler-Maruyama sub-steps per grid step (default: from the drift's "
                             "Lipschitz constant)")
    parser.add_argument("--pairs", choices=("auto", "exact", "grid"), default="auto",
                        help="pair forces: exact O(N^2) sums or grid convolution (default: auto)")
    parser.add_argument("--no-figures", action="store_true", help="write no figures")
    parser.add_argument("--force", action="store_true",
                        help="check a run that is not complete and converged (killed, failed, "
                             "changed after the run, not converged, diverged, suspect)")
    parser.add_argument("--quiet", action="store_true",
                        help="no progress lines on stderr (one per particle number and seed)")
    return parser


def _atomic_write(target: Path, write: Callable[[str], None]) -> None:
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=target.suffix,
                               dir=target.parent)
    os.close(fd)
    try:
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, 0o666 & ~mask)
        write(tmp)
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _clean(value: Any) -> Any:
    """JSON cannot hold NaN: write null instead."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    return value


def main(argv: list[str] | None = None) -> int:
    """Run the check; 0 on success, 2 when refused (a user error, or a run that is not
    complete and converged without ``--force``), 6 when the simulation gives non-finite
    numbers (message on stderr)."""
    args = _parser().parse_args(argv)
    try:
        return _main(args)
    except MFBridgeError as exc:
        print(f"mfbridge check: error: {exc}", file=sys.stderr)
        return EXIT_CODES["refused" if isinstance(exc, InputError) else "failed"]


def _non_finite(report_data: dict[str, Any]) -> list[str]:
    """Names of the table's numbers that are NaN or infinite (first row where each occurs).
    The standard error over seeds of a row with one seed is undefined (NaN by design, null in
    ``check.json``), not a failure of the simulation."""
    bad = []
    for row in report_data.get("table", []):
        for key, value in row.items():
            if key == "w1_T_sem" and row.get("seeds") == 1:
                continue
            if isinstance(value, float) and not math.isfinite(value) and key not in bad:
                bad.append(key)
    return bad


def _main(args: argparse.Namespace) -> int:
    from mfbridge.particles import check
    from mfbridge.runs.api import load, model_from_config, run_problem

    folder = Path(args.run_dir)
    result = load(folder, warn=False)
    problem = run_problem(folder, result.status, result.message)
    if problem and not args.force:
        raise InputError(f"{folder} is not a complete, converged run: {problem}. Its control "
                         "is not that of a bridge, so the particles would check nothing; pass "
                         "--force to simulate them anyway")
    if problem:
        print(f"mfbridge check: warning: {folder}: {problem} (checked anyway: --force)",
              file=sys.stderr)
    if not result.config:
        raise InputError(f"{folder} records no resolved config: cannot rebuild the model "
                         "(use mfbridge.check(result, confinement=..., interaction=...))")
    confinement, interaction = model_from_config(result.config)
    def progress(line: str) -> None:
        print(line, file=sys.stderr, flush=True)

    report = check(result, confinement, interaction, n_particles=args.particles,
                   seeds=args.seed, substeps=args.substeps, pair_mode=args.pairs,
                   progress=None if args.quiet else progress)
    print(report.table_text())
    bad = _non_finite(report.to_dict())
    if bad:
        raise MFBridgeError(
            f"the particle simulation gave non-finite values ({', '.join(bad)}): the model's "
            "forces are NaN or infinite somewhere the particles went (check the gradient of "
            "the confinement and interaction, e.g. a user potential's autograd), or the time "
            "step is too coarse (--substeps); nothing was written")
    data = _clean(report.to_dict())
    data["run_dir"] = str(folder.resolve())
    text = json.dumps(data, indent=2)
    _atomic_write(folder / CHECK_FILE, lambda tmp: Path(tmp).write_text(text + "\n"))
    print(f"wrote {folder / CHECK_FILE}")
    if not args.no_figures:
        from mfbridge.particles.plots import plot_check

        for path in plot_check(report, folder, writer=_atomic_write):
            print(f"figure: {path}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
