"""mfbridge: mean-field Schrödinger bridges for interacting particle systems.

Given two observed distributions of a population of interacting agents and a model (confinement U,
pair interaction W, noise σ), compute the most likely evolution between them — the minimiser of
the large-deviation rate function of the empirical process — with its cost.

Entry points: :func:`compose` and :func:`solve` (configs), :func:`solve_bridge` (objects),
:func:`solve_series` (through several snapshots), :func:`fit` and :func:`fit_series` (model
parameters from snapshots), :func:`compare_fits` (models by N·ΣJ), :func:`load` (saved results),
:func:`check` (particle check), :func:`lq_bridge` (exact linear–quadratic bridges). Importing the
package imports neither Hydra nor matplotlib.

Layout (imports go one way, left to right): :mod:`mfbridge.model` (what the user states) ←
:mod:`mfbridge.numerics` (building blocks) ← :mod:`mfbridge.solvers` and
:mod:`mfbridge.particles` ← :mod:`mfbridge.runs` (Hydra, command line, files, figures);
:mod:`mfbridge.result` and :mod:`mfbridge.errors` sit at the root. The module paths used before
this layout (``mfbridge.potentials``, ``mfbridge.fixed_point``, ``mfbridge.records``...) still
import, as the same module objects (:mod:`mfbridge._moved`).
"""

from mfbridge import _moved
from mfbridge.errors import (
    ConvergenceWarning,
    DiskFullError,
    GridWarning,
    InputError,
    MFBridgeError,
    MultipleBridgesWarning,
    PrecisionWarning,
    ResolutionWarning,
    RunStatusWarning,
    SuspectResultWarning,
    TargetNotMetWarning,
)
from mfbridge.model.endpoints import Gaussian, GaussianMixture, UniformBox
from mfbridge.model.grid import Grid
from mfbridge.model.problem import BridgeProblem
from mfbridge.model.series import SeriesProblem, Snapshot
from mfbridge.result import BridgeResult
from mfbridge.runs.api import build_problem, check, compose, load, solve
from mfbridge.runs.fitting import compare_fits, fit
from mfbridge.solvers.accuracy import AccuracyOptions, solve_and_estimate
from mfbridge.solvers.comparison import compare_models
from mfbridge.solvers.fit import FitOptions, FitParameter, fit_series
from mfbridge.solvers.fixed_point import Iteration, SolverOptions, solve_bridge
from mfbridge.solvers.linear_quadratic import LQBridge, lq_bridge
from mfbridge.solvers.series import solve_series

_moved.install()

__version__ = "0.1.0"

__all__ = [
    "AccuracyOptions",
    "BridgeProblem",
    "BridgeResult",
    "ConvergenceWarning",
    "DiskFullError",
    "FitOptions",
    "FitParameter",
    "Gaussian",
    "GaussianMixture",
    "Grid",
    "GridWarning",
    "InputError",
    "Iteration",
    "LQBridge",
    "MFBridgeError",
    "MultipleBridgesWarning",
    "PrecisionWarning",
    "ResolutionWarning",
    "RunStatusWarning",
    "SeriesProblem",
    "Snapshot",
    "SolverOptions",
    "SuspectResultWarning",
    "TargetNotMetWarning",
    "UniformBox",
    "build_problem",
    "check",
    "compare_fits",
    "compare_models",
    "compose",
    "fit",
    "fit_series",
    "load",
    "lq_bridge",
    "solve",
    "solve_and_estimate",
    "solve_bridge",
    "solve_series",
]
