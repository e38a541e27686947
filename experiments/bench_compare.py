# ruff: noqa: E402 - thread limits must be set before numpy is imported
"""Benchmark: the core cases of ``bench_core.py`` solved by an earlier commit and by this checkout,
interleaved in one run, so that a change's cost is a ratio measured under the same machine load.

Usage::

    python experiments/bench_compare.py --before REV [--rounds 3] [--quick] [--update-committed]

``REV`` is checked out into a temporary git worktree; every solve runs in a fresh process whose
``PYTHONPATH`` points at one of the two checkouts (the rounds alternate which goes first). Cases
(all with σ = 1, T = 1, U = x²/2 and the default ``SolverOptions``): the linear-quadratic
reference of ``bench_core.py`` (W = 1.5 x²/2, μ = N(-1, 0.4²), ν = N(1.2, 0.7²), box [-4, 4]) on
n cells × K steps, the same with an attractive Gaussian core (strength -4, range 0.5), and the
2D linear-quadratic case of ``bench_core.py`` Table 3. Reported: the minimum process CPU time over
the rounds for each checkout, their ratio, and J of both (the same J means the same answer).

Writes ``bench_compare.md`` to experiments/out/results (experiments/results with
``--update-committed``).
"""

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from study_common import ROOT, add_output_flag, output_dir

FULL = [("lq", 128, 25), ("lq", 256, 50), ("lq", 512, 100), ("lq", 1024, 200),
        ("core", 256, 50), ("lq2d", 64, 50)]
QUICK = [("lq", 128, 25), ("core", 64, 20), ("lq2d", 32, 10)]


def solve_case(case: str, n: int, steps: int) -> dict:
    """Solve one case with the ``mfbridge`` found on ``sys.path``; CPU and wall seconds, J."""
    import warnings

    import mfbridge
    from mfbridge.model.endpoints import Gaussian
    from mfbridge.model.grid import Grid
    from mfbridge.model.potentials import GaussianCore, Harmonic, HarmonicInteraction
    from mfbridge.model.problem import BridgeProblem
    from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge

    common = dict(noise=1.0, horizon=1.0, steps=steps, confinement=Harmonic(1.0))
    if case == "lq2d":
        problem = BridgeProblem(grid=Grid([-4.0, -4.0], [4.0, 4.0], [n, n]),
                                initial=Gaussian([-1.0, 0.5], [0.16, 0.25]),
                                final=Gaussian([1.2, -0.5], [0.49, 0.3]),
                                interaction=HarmonicInteraction(1.5), **common)
    else:
        pair = HarmonicInteraction(1.5) if case == "lq" else GaussianCore(-4.0, 0.5)
        problem = BridgeProblem(grid=Grid(-4.0, 4.0, n), initial=Gaussian(-1.0, 0.16),
                                final=Gaussian(1.2, 0.49), interaction=pair, **common)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cpu0, wall0 = time.process_time(), time.perf_counter()
        result = solve_bridge(problem, SolverOptions())
        cpu, wall = time.process_time() - cpu0, time.perf_counter() - wall0
    return {"package": str(Path(mfbridge.__file__).parent), "cpu": cpu, "wall": wall,
            "cost": float(result.cost), "status": str(result.status)}


def run_in(checkout: Path, case: tuple[str, int, int]) -> dict:
    env = dict(os.environ, PYTHONPATH=str(checkout))
    out = subprocess.run([sys.executable, __file__, "--solve", *map(str, case)], env=env,
                         capture_output=True, text=True, timeout=1800, check=False)
    if out.returncode != 0:
        raise RuntimeError(f"{case} in {checkout} failed:\n{out.stderr[-2000:]}")
    record = json.loads(out.stdout.strip().splitlines()[-1])
    if not record["package"].startswith(str(checkout)):
        raise RuntimeError(f"{case}: imported {record['package']}, not {checkout}")
    return record


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--before", help="git revision to compare against (e.g. a commit id)")
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--quick", action="store_true", help="three small cases (smoke test)")
    parser.add_argument("--solve", nargs=3, metavar=("CASE", "N", "K"), help=argparse.SUPPRESS)
    add_output_flag(parser)
    args = parser.parse_args()
    if args.solve:
        print(json.dumps(solve_case(args.solve[0], int(args.solve[1]), int(args.solve[2]))))
        return
    if not args.before:
        parser.error("--before REV is required")
    rev = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", args.before],
                         capture_output=True, text=True, check=True).stdout.strip()
    head = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", "HEAD"],
                          capture_output=True, text=True, check=True).stdout.strip()
    cases = QUICK if args.quick else FULL
    records: dict[tuple, list[dict]] = {}
    with tempfile.TemporaryDirectory() as tmp:
        before = Path(tmp) / "before"
        subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "--detach", str(before), rev],
                       capture_output=True, check=True)
        try:
            for r in range(args.rounds):
                for case in cases:
                    order = [("before", before), ("after", ROOT)]
                    for name, checkout in order if r % 2 == 0 else order[::-1]:
                        rec = run_in(checkout, case)
                        records.setdefault((case, name), []).append(rec)
                        print(f"round {r} {case} {name}: {rec['cpu']:.3f} CPU s, "
                              f"J {rec['cost']:.9f} {rec['status']}", file=sys.stderr, flush=True)
        finally:
            subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force", str(before)],
                           capture_output=True, check=False)
    load = os.getloadavg()
    md = [f"# Core cases: {rev} (before) against {head} (after), interleaved",
          "",
          f"{args.rounds} rounds, fresh process per solve, minimum process CPU time per checkout; "
          f"load average at the end {load[0]:.1f}/{load[1]:.1f}/{load[2]:.1f} on "
          f"{os.cpu_count()} CPUs; {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}.",
          "",
          "| case | n | K | before CPU s | after CPU s | after / before | J before | J after "
          "| status after |",
          "|---|---|---|---|---|---|---|---|---|"]
    for case in cases:
        b, a = records[(case, "before")], records[(case, "after")]
        cb, ca = min(x["cpu"] for x in b), min(x["cpu"] for x in a)
        md.append(f"| {case[0]} | {case[1]} | {case[2]} | {cb:.3f} | {ca:.3f} | {ca / cb:.2f} "
                  f"| {b[0]['cost']:.9f} | {a[0]['cost']:.9f} | {a[0]['status']} |")
    out = output_dir(ROOT / "experiments" / "results")
    out.mkdir(parents=True, exist_ok=True)
    (out / "bench_compare.md").write_text("\n".join(md) + "\n")
    print("\n".join(md))


if __name__ == "__main__":
    main()
