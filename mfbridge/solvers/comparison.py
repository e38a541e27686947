"""Comparing models fitted to the same snapshots by N·ΣJ at their optima.

N·ΣJ(θ̂) is minus the leading-order log-likelihood of a fitted model (see
:mod:`mfbridge.solvers.fit`); for two models on the same snapshots, e^Δ with Δ the difference of
their N·ΣJ is the implied likelihood ratio, and for nested models 2Δ is approximately χ² with as
many degrees of freedom as extra parameters (Wilks, "The large-sample distribution of the
likelihood ratio for testing composite hypotheses", Ann. Math. Statist. 9, 1938).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import scipy.stats

from mfbridge.errors import InputError

__all__ = ["CAUTION", "FitSummary", "ModelComparison", "compare_models"]


class _Summarised(Protocol):
    def summary(self) -> FitSummary: ...

@dataclass(frozen=True)
class FitSummary:
    """A fitted model as a comparison sees it: N, ΣJ(θ̂), the number of fitted parameters, the
    fit's status and the snapshot times."""

    population: int
    cost: float
    parameters: int
    status: str
    times: tuple[float, ...]

    @property
    def neg_log_likelihood(self) -> float:
        return self.population * self.cost


@dataclass
class ModelComparison:
    """Fitted models on the same snapshots, ranked by N·ΣJ at their optima.

    ``rows``: per model its label, number of fitted parameters, N·ΣJ(θ̂), the difference Δ from
    the best and the implied likelihood ratio exp(Δ) of the best against it; ``population``: N.
    """

    population: int
    rows: list[dict[str, Any]]
    caution: str


CAUTION = (
    "N·ΣJ is minus the leading-order (large-deviation) log-likelihood: the ratios exp(Δ) ignore "
    "prefactors of order one and the discretisation error of J, and hold for the whole "
    "population observed at every time. Compare models fitted on the same snapshots, grid and "
    "steps; a model with more parameters fits at least as well, so weigh Δ against the extra "
    "parameters (for nested models 2Δ is approximately χ² with that many degrees of freedom)."
)


def compare_models(models: Mapping[str, _Summarised | FitSummary]) -> ModelComparison:
    """Rank fitted models (label → :class:`FitResult` or :class:`FitSummary`) by N·ΣJ at their
    optima; all must share N and the snapshot times."""
    if len(models) < 2:
        raise InputError(f"compare at least two fitted models, got {len(models)}")
    fits = {label: m if isinstance(m, FitSummary) else m.summary()
            for label, m in models.items()}
    pops = {label: f.population for label, f in fits.items()}
    if len(set(pops.values())) != 1:
        raise InputError(f"the models were fitted with different population sizes N {pops}; "
                         "fit them on the same snapshots with the same N")
    times = {label: tuple(np.round(f.times, 12)) for label, f in fits.items()}
    if len(set(times.values())) != 1:
        raise InputError(f"the models were fitted on snapshots at different times {times}")
    population = next(iter(pops.values()))
    best = min(f.neg_log_likelihood for f in fits.values())
    rows = []
    for label, f in sorted(fits.items(), key=lambda kv: kv[1].neg_log_likelihood):
        delta = f.neg_log_likelihood - best
        rows.append({"model": label, "parameters": f.parameters,
                     "N_sum_J": f.neg_log_likelihood, "sum_J": f.cost, "delta": delta,
                     "likelihood_ratio": math.exp(delta) if delta < 700 else math.inf,
                     "status": f.status})
    largest = max(rows, key=lambda r: r["parameters"])
    for row in rows:
        extra = largest["parameters"] - row["parameters"]
        stat = 2.0 * (row["N_sum_J"] - largest["N_sum_J"])
        row["wilks_p_value"] = (float(scipy.stats.chi2.sf(max(stat, 0.0), extra))
                                if extra > 0 else math.nan)
    return ModelComparison(population=population, rows=rows, caution=CAUTION)
