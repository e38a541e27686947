"""Exceptions and warnings raised by mfbridge.

Every mistake a user can make in their input is reported as an :class:`InputError` (a
``ValueError``) whose message says what was expected, before any numerical work starts.
"""

from __future__ import annotations

from typing import Any

import numpy as np


class MFBridgeError(Exception):
    """Base class of all errors raised by mfbridge."""


class InputError(MFBridgeError, ValueError):
    """A user's input (a density, a parameter, a config option) is not valid."""


class DiskFullError(MFBridgeError):
    """The device a run writes to is full (or over quota); the message names the path."""


class RunStatusWarning(UserWarning):
    """A loaded run is not complete and converged (killed, failed, edited since, or its status
    is not_converged, diverged or suspect): its numbers are not those of a bridge."""


class ConvergenceWarning(UserWarning):
    """An iterative solver stopped before reaching its stated tolerance."""


class SuspectResultWarning(ConvergenceWarning):
    """The iteration stopped as converged but the result failed a sanity check (its status is
    ``"suspect"``; the message names the check and what to do)."""


class GridWarning(UserWarning):
    """The grid looks coarse for the noise (cell Péclet number), too narrow (mass at a wall) or
    far too wide (most cells empty); the message says what to change."""


class TargetNotMetWarning(UserWarning):
    """A target accuracy was asked for and not reached within the budget (the message says
    which grids were tried and why the refinement stopped)."""


class PrecisionWarning(UserWarning):
    """The fast route lost precision and the solver switched to a slower exact one."""


class ResolutionWarning(UserWarning):
    """The grid resolves an endpoint more coarsely than asked (e.g. the automatic grid capped
    its cell count); the message says what to set for the full resolution."""


class SmoothingWarning(UserWarning):
    """Snapshots of a fit were smoothed by kernels of different widths: each adds its own
    variance, so the fitted model explains a spreading the population did not do."""


class MultipleBridgesWarning(UserWarning):
    """A multi-start solve found several different bridges (critical points of the rate
    function); the cheapest is returned and the others are kept in ``result.alternatives``."""


def unknown_name(kind: str, name: str, valid: list[str] | tuple[str, ...]) -> InputError:
    """Error for an unknown option name, listing the valid ones."""
    return InputError(f"unknown {kind} {name!r}; valid names are: {', '.join(sorted(valid))}")


def is_real_number(value: Any) -> bool:
    """A finite real number given as int, float or a numpy scalar (not a bool, not a string)."""
    return (isinstance(value, (int, float, np.integer, np.floating))
            and not isinstance(value, bool) and bool(np.isfinite(value)))
