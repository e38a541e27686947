"""Finite-N particle systems: the simulator driven by a bridge's control
(:mod:`~mfbridge.particles.simulator`), the particle check and its statistics
(:mod:`~mfbridge.particles.statistics`) and its figures (:mod:`~mfbridge.particles.plots`,
matplotlib, imported only by the ``mfbridge check`` command).

Layer: imports the model, the numerics and the result, never the solvers or the runs layer.
"""

from mfbridge.particles.simulator import (
    PairForce,
    ParticleRun,
    default_substeps,
    mckean_vlasov_flow,
    population_snapshots,
    sample_particles,
    simulate,
)
from mfbridge.particles.statistics import (
    CheckReport,
    ConvergenceRow,
    RunStats,
    check,
    fit_error_law,
    moments_of_masses,
    w1_to_masses,
)

__all__ = [
    "CheckReport",
    "ConvergenceRow",
    "PairForce",
    "ParticleRun",
    "RunStats",
    "check",
    "default_substeps",
    "fit_error_law",
    "mckean_vlasov_flow",
    "moments_of_masses",
    "population_snapshots",
    "sample_particles",
    "simulate",
    "w1_to_masses",
]
