"""``mfbridge fit``: fit model parameters to a series of snapshots (see
:mod:`mfbridge.runs.fitting` for the fit folder).

    mfbridge fit --param interaction.strength=0:3 --param confinement.stiffness=0.2:4 \\
        --population 8000 --out fits/core endpoints=series ...

Positional arguments are the configuration's overrides, as for a plain run. Exit status as for
a run (:mod:`mfbridge.runs.exits`): 0 for a converged fit, 3 when it did not converge (the folder
is still written), 2 for input refused before any solve, 6 for a failure, 130/143 when
interrupted.
"""

from __future__ import annotations

import argparse
import logging
import signal
import sys

from mfbridge.errors import InputError, MFBridgeError


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="mfbridge fit",
        description="Fit model parameters (confinement, interaction, noise) to snapshots of a "
                    "population: minimise the sum of the bridges' costs J over the segments "
                    "between consecutive snapshots (N·ΣJ is minus the leading-order "
                    "log-likelihood), with profile and Hessian intervals.")
    parser.add_argument("overrides", nargs="*", metavar="OVERRIDE",
                        help="configuration overrides, as for a run (e.g. endpoints=series)")
    parser.add_argument("--param", action="append", required=True, metavar="NAME=LO:HI[:START]",
                        help="a numeric model entry to fit with its bounds, e.g. "
                             "interaction.strength=0:3 (repeat for several)")
    parser.add_argument("--population", "-N", type=int, required=True, metavar="N",
                        help="number of particles observed at each time")
    parser.add_argument("--out", required=True, metavar="DIR", help="fit folder to write")
    parser.add_argument("--level", type=float, default=0.95, help="confidence level (0.95)")
    parser.add_argument("--max-evaluations", type=int, default=60,
                        help="limit of solves in the search (60)")
    parser.add_argument("--no-profile", action="store_true",
                        help="skip the profiles (Hessian intervals only)")
    parser.add_argument("--jobs", default=None,
                        help="processes for the segments (default: the config's jobs)")
    return parser


def main(argv: list[str]) -> int:
    """Run the fit; exit status as for a run (:mod:`mfbridge.runs.exits`): 0 converged,
    3 not converged, 2 refused before any solve (bad input, a folder that must not be written),
    6 failed, 130/143 interrupted."""
    from mfbridge.runs.exits import EXIT_CODES, exit_code, signal_exit_code
    from mfbridge.runs.fitting import fit, parse_parameter
    from mfbridge.runs.signals import interruptible, signal_of
    from mfbridge.solvers.fit import FitOptions

    args = _parser().parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="[%(asctime)s][%(name)s][%(levelname)s] - "
                                                   "%(message)s")
    try:
        with interruptible():
            jobs = None if args.jobs is None else (args.jobs if args.jobs == "auto"
                                                   else _jobs(args.jobs))
            options = FitOptions(level=args.level, max_evaluations=args.max_evaluations,
                                 profile=not args.no_profile)
            result = fit(args.overrides, [parse_parameter(p) for p in args.param],
                         args.population, out=args.out, options=options, jobs=jobs)
    except KeyboardInterrupt as exc:
        name = signal.Signals(signal_of(exc)).name
        print(f"mfbridge fit: interrupted by {name}; {args.out} holds no fit.json (run the "
              "same command again to fit again)", file=sys.stderr)
        return signal_exit_code(signal_of(exc))
    except MFBridgeError as exc:
        print(f"mfbridge fit: {exc}", file=sys.stderr)
        return EXIT_CODES["refused" if isinstance(exc, InputError) else "failed"]
    return exit_code(result.status)


def _jobs(text: str) -> int:
    try:
        return int(text)
    except ValueError:
        raise InputError(f"--jobs must be a positive integer or auto, got {text!r}") from None
