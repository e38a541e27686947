"""Fits to snapshots of finite populations simulated by the particle simulator at a known core
strength θ* (slow): the profile interval holds θ*, and over 20 seeds it covers θ* at close to
its nominal 95% rate.

The interval {θ : 2N (ΣJ_θ − ΣJ_θ̂) ≤ χ²₁,0.95} is Wilks-type: it rests on N·ΣJ being the
large-deviation rate of the empirical law of N exchangeable particles (Dawson & Gärtner, "Large
deviations from the McKean-Vlasov limit for weakly interacting diffusions", Stochastics 20,
1987) and on the asymptotic χ² law of the likelihood-ratio statistic (Wilks, "The large-sample
distribution of the likelihood ratio for testing composite hypotheses", Ann. Math. Statist. 9,
1938); it is asymptotic in N and assumes the whole population is observed at every time, which
is how the snapshots are made here. The scenarios and the fit are those of
experiments/study_fit_coverage.py (its report: experiments/results/fit_coverage.md).
"""

from __future__ import annotations

import sys
from dataclasses import replace
from pathlib import Path

import pytest
from scipy import stats

EXPERIMENTS = Path(__file__).resolve().parent.parent / "experiments"

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def study():
    sys.path.insert(0, str(EXPERIMENTS))
    try:
        import study_fit_coverage
    finally:
        sys.path.remove(str(EXPERIMENTS))
    return study_fit_coverage


def test_one_dimensional_intervals_cover_the_truth_at_their_nominal_rate(study) -> None:
    # 20 seeds, N = 5000 beads, Gaussian core (strength 1.5, range 0.4) in a harmonic trap,
    # kernel 0.04 (small against the spreads fitted). With the nominal rate 0.95, fewer than
    # 16 of 20 covered has binomial probability 0.00257 (the binomial law: 1 minus the terms
    # k = 16..20, 0.01333 + 0.05958 + 0.18868 + 0.37735 + 0.35849, summed by hand): the bound
    # fails a correct interval about once in 390 runs of this test, one covering at 94% (what a
    # bias of +0.3 se, the measured one, leaves of 95%) once in 180, one covering at 80% with
    # probability 0.37 and one covering at 70% with probability 0.76 (binom.cdf(15, 20, p)).
    assert stats.binom.cdf(15, 20, 0.95) == pytest.approx(0.00257, abs=1e-5)
    case = replace(study.CASE_1D, estimates=(study.CASE_1D.estimates[0],))
    rows = study.study(case, range(20), 5000)["kernel 0.04"]
    est, se, lower, upper = rows.T
    covered = int(((lower <= study.STRENGTH) & (upper >= study.STRENGTH)).sum())
    assert covered >= 16, rows
    assert ((lower <= est) & (est <= upper)).all(), rows
    # the spread of the estimates over seeds against the reported standard error (both
    # measure the same sampling error when the interval is right): measured ratio in
    # experiments/results/fit_coverage.md
    assert 0.5 < est.std(ddof=1) / se.mean() < 2.0, rows


def test_two_dimensional_interval_holds_the_truth(study) -> None:
    # one seed of the 2D swarm (N = 5000, Gaussian core strength 1.5, range 0.5, round trap),
    # snapshots as histograms on the grid's cells: measured at seed 0 on 64² cells, 20 steps,
    # 1.5076 [1.4661, 1.5503] (J at the step midpoints; 1.5139 [1.4814, 1.5673] with the
    # trapezoid J used before). (With a Gaussian kernel of 0.08, the smallest the grid resolves,
    # the same seed gives 1.5529 [1.5103, 1.5956]: the kernel's added variance biases the
    # strength by about 2.5 standard errors; experiments/results/fit_coverage.md.)
    case = replace(study.CASE_2D, estimates=(study.CASE_2D.estimates[1],))
    rows = study.study(case, range(1), 5000)["histogram"]
    est, _se, lower, upper = rows[0]
    assert lower <= study.STRENGTH <= upper, rows
    assert lower <= est <= upper
