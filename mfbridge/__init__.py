"""mfbridge: mean-field Schrödinger bridges for interacting particle systems.

Given two observed distributions of a population of interacting agents and a model (confinement U,
pair interaction W, noise σ), compute the most likely evolution between them — the minimiser of
the large-deviation rate function of the empirical process — with its cost.

Entry points: :func:`compose` and :func:`solve` (configs), :func:`solve_bridge` (objects),
:func:`load` (saved results), :func:`lq_bridge` (exact linear–quadratic bridges).
Importing the package imports neither Hydra nor matplotlib.
"""

from mfbridge.api import build_problem, compose, solve
from mfbridge.endpoints import Gaussian, GaussianMixture, UniformBox
from mfbridge.errors import (
    ConvergenceWarning,
    InputError,
    MFBridgeError,
    MultipleBridgesWarning,
    PrecisionWarning,
)
from mfbridge.fixed_point import Iteration, SolverOptions, solve_bridge
from mfbridge.grid import Grid
from mfbridge.linear_quadratic import LQBridge, lq_bridge
from mfbridge.particles import check
from mfbridge.problem import BridgeProblem
from mfbridge.result import BridgeResult, load

__version__ = "0.1.0"

__all__ = [
    "BridgeProblem",
    "BridgeResult",
    "ConvergenceWarning",
    "Gaussian",
    "GaussianMixture",
    "Grid",
    "InputError",
    "Iteration",
    "LQBridge",
    "MFBridgeError",
    "MultipleBridgesWarning",
    "PrecisionWarning",
    "SolverOptions",
    "UniformBox",
    "build_problem",
    "check",
    "compose",
    "load",
    "lq_bridge",
    "solve",
    "solve_bridge",
]
