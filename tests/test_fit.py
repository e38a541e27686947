"""Fitting model parameters to snapshots: recovery of known parameters from exact snapshots of
the McKean-Vlasov flow, refusals before any solve, the fit folder, and model comparison."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

import mfbridge
from mfbridge import InputError
from mfbridge.model.endpoints import Gaussian
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import GaussianCore, Harmonic, HarmonicInteraction
from mfbridge.model.series import SeriesProblem, Snapshot
from mfbridge.runs import fitting
from mfbridge.runs.commands import compare as compare_command
from mfbridge.runs.commands import fit as fit_command
from mfbridge.runs.commands import replay
from mfbridge.solvers import fit as fit_module
from mfbridge.solvers.comparison import FitSummary, compare_models
from mfbridge.solvers.fit import FitOptions, FitParameter, fit_series
from mfbridge.solvers.linear_quadratic import lq_bridge

SIGMA = 0.8
TIMES = np.array([0.0, 0.5, 1.2])
# the series demo with less transport, on a small grid (0.4 s of CPU per solve of the series)
FIT_SMALL = ["endpoints=series", "endpoints.snapshots.1.law.mean=-0.6",
             "endpoints.snapshots.2.law.mean=0.0", "grid.shape=48", "steps=12", "jobs=1"]


def mckean_vlasov_gaussian(a: float, kappa: float, m0: float, s0: float,
                           t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and variance of the McKean-Vlasov flow of U = a x²/2, W = κ x²/2 from N(m0, s0):
    the mean relaxes at rate a, the centred part is an Ornstein-Uhlenbeck process of rate
    θ = a + κ, with variance s0 e^{-2θt} + σ²(1 - e^{-2θt})/(2θ) (Uhlenbeck & Ornstein, "On the
    theory of the Brownian motion", Phys. Rev. 36, 1930)."""
    theta = a + kappa
    return (m0 * np.exp(-a * t),
            s0 * np.exp(-2 * theta * t) - SIGMA**2 * np.expm1(-2 * theta * t) / (2 * theta))


def lq_snapshots() -> tuple[np.ndarray, np.ndarray]:
    return mckean_vlasov_gaussian(1.0, 0.5, -1.5, 0.1, TIMES)


def test_exact_snapshots_of_the_flow_cost_nothing() -> None:
    # the closed form (mfbridge.solvers.linear_quadratic) gives ΣJ = 0 on snapshots of the
    # uncontrolled flow, and a positive ΣJ for other parameters
    means, covs = lq_snapshots()

    def total(a: float, kappa: float) -> float:
        return sum(lq_bridge(stiffness=a, strength=kappa, noise=SIGMA,
                             horizon=TIMES[k + 1] - TIMES[k], mean0=means[k], cov0=covs[k],
                             mean1=means[k + 1], cov1=covs[k + 1], times=3).cost
                   for k in range(2))

    assert total(1.0, 0.5) < 1e-20  # measured 1.2e-32
    assert total(0.9, 0.5) > 1e-3 and total(1.0, 0.6) > 1e-4


def test_linear_quadratic_parameters_are_recovered() -> None:
    # stiffness and strength fitted on the grid from exact Gaussian snapshots of the flow at
    # θ* = (1, 0.5), from the start (0.7, 0.2): measured errors 4.9e-4 and 1.8e-5 at 240 cells
    # and 30 steps (mostly the grid's O(h²) error: 1.34e-3 at 128 cells, 9.1e-4 at 160, 6.4e-4
    # at 200, all with 30 steps; 160 cells and 60 steps: 7.9e-4, in 1.4x the CPU time, 7.5 s
    # against 5.5 s interleaved at a load of 10; 1.2e-7 of ΣJ remains at θ̂)
    means, covs = lq_snapshots()
    problem = SeriesProblem(grid=Grid(-3.5, 1.5, 240),
                            snapshots=[Snapshot(t, Gaussian(m, c))
                                       for t, m, c in zip(TIMES, means, covs, strict=True)],
                            noise=SIGMA, steps=30, confinement=Harmonic(0.7),
                            interaction=HarmonicInteraction(0.2))
    result = fit_series(problem, [FitParameter("confinement.stiffness", 0.1, 3.0),
                                  FitParameter("interaction.strength", -0.5, 2.0)],
                        10_000, FitOptions(profile=False))
    assert result.status == "converged", result.message
    assert abs(result.estimate["confinement.stiffness"] - 1.0) < 1e-3
    assert abs(result.estimate["interaction.strength"] - 0.5) < 1e-3
    assert result.cost < 1e-6
    # the Hessian of ΣJ against the closed form's, by central differences of lq_bridge:
    # measured diagonal 1.705 and 0.270 at 240 x 30 ([[1.70, 0.268], [0.268, 0.270]] at 160 x 60)
    assert result.hessian[0, 0] == pytest.approx(1.73, rel=0.05)
    assert result.hessian[1, 1] == pytest.approx(0.27, rel=0.05)


@pytest.fixture
def no_solve(monkeypatch: pytest.MonkeyPatch) -> None:
    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("a bridge was solved before the input was checked")

    monkeypatch.setattr(fit_module, "solve_series", refuse)


def _tiny_series() -> SeriesProblem:
    return SeriesProblem(grid=Grid(-4, 4, 48), snapshots=[(0.0, Gaussian(-1, 0.3)),
                                                          (1.0, Gaussian(0.5, 0.4))],
                         noise=0.8, steps=10, confinement=Harmonic(1.0, centre=(0.0,)),
                         interaction=GaussianCore(1.0, 0.5))


@pytest.mark.parametrize(("parameters", "population", "message"), [
    ([FitParameter("interaction.strenght", 0, 1)], 100, "no numeric parameter 'strenght'"),
    ([FitParameter("confinement.centre", 0, 1)], 100, "not a single number"),
    ([FitParameter("horizon", 0, 1)], 100, "not a model parameter"),
    ([FitParameter("interaction.strength", 2, 1)], 100, "reversed or empty"),
    ([FitParameter("interaction.range", 0, 1)], 100, "bound 0 of interaction.range"),
    ([FitParameter("interaction.strength", 0, 1, 3)], 100, "outside its bounds"),
    ([FitParameter("noise", 0.5, 1), FitParameter("diffusion", 0.1, 1)], 100, "one parameter"),
    ([FitParameter("interaction.strength", 0, 1)], 0, "positive integer"),
    ([], 100, "at least one parameter"),
])
def test_bad_fits_are_refused_before_any_solve(no_solve: None, parameters: list,
                                               population: int, message: str) -> None:
    with pytest.raises(InputError, match=message):
        fit_series(_tiny_series(), parameters, population)


@pytest.mark.parametrize(("param", "message"), [
    ("interaction.strenght=0:1", "no entry 'interaction.strenght'"),
    ("interaction._target_=0:1", "is not a number"),
    ("steps=1:10", "not a model parameter"),
    ("interaction.strength=2:1", "reversed or empty"),
    ("interaction.strength=a:b", "must be numbers"),
    ("interaction.strength", "NAME=LOWER:UPPER"),
])
def test_bad_fit_commands_are_refused(no_solve: None, tmp_path: Path, param: str, message: str,
                                      capsys: pytest.CaptureFixture[str]) -> None:
    code = fit_command.main(["endpoints=series", "grid.shape=48", "--param", param,
                             "-N", "100", "--out", str(tmp_path / "fit")])
    assert code == 2
    assert message in capsys.readouterr().err


@pytest.fixture(scope="module")
def fitted(tmp_path_factory: pytest.TempPathFactory) -> Path:
    # a small fit through the command line: strength and stiffness on the series demo, started
    # near θ̂ = (1.2542, 1.2696) (recovery from afar is the linear-quadratic test's): the search
    # takes 6 solves instead of 14 from (1, 1), 23 in all instead of 31 (6.8 CPU s against
    # 8.7, interleaved at a load of 6), same θ̂ to 6 digits, interval ends within 2e-4
    folder = tmp_path_factory.mktemp("fits") / "core"
    code = fit_command.main([*FIT_SMALL, "--param", "interaction.strength=0:3:1.25",
                             "--param", "confinement.stiffness=0.2:4:1.27",
                             "-N", "1000", "--out", str(folder)])
    assert code == 0
    return folder


def test_fit_folder(fitted: Path) -> None:
    record = json.loads((fitted / fitting.FIT_FILE).read_text())
    assert record["population"] == 1000 and record["status"] == "converged"
    assert record["N_sum_J"] == pytest.approx(1000 * record["sum_J"])
    assert set(record["estimate"]) == {"interaction.strength", "confinement.stiffness"}
    # (the bridge kept for θ̂ may come from another solve than the evaluation: solver tolerance)
    assert sum(record["segment_costs"]) == pytest.approx(record["sum_J"], rel=1e-8)
    methods = {(iv["name"], iv["method"]) for iv in record["intervals"]}
    assert len(methods) == 6  # profile, joint and Hessian for both
    for iv in record["intervals"]:
        assert iv["lower"] <= iv["estimate"] <= iv["upper"]
    rows = (fitted / fitting.EVALUATIONS_FILE).read_text().splitlines()
    assert len(rows) == record["evaluations"] + 1
    assert {"search", "hessian"} <= {row.split(",")[1] for row in rows[1:]}
    assert (fitted / fitting.PROFILE_FIGURE).stat().st_size > 0
    # the bridge at the estimate is an ordinary, complete run folder solved at θ̂
    bridge = mfbridge.load(fitted / fitting.BRIDGE_DIR)
    assert (fitted / fitting.BRIDGE_DIR / "complete.json").is_file()
    assert bridge.cost == pytest.approx(record["sum_J"], rel=1e-6)
    assert bridge.config["interaction"]["strength"] == record["estimate"]["interaction.strength"]


def test_fit_bridge_replays(fitted: Path, tmp_path: Path,
                            capsys: pytest.CaptureFixture[str]) -> None:
    code = replay.main([str(fitted / fitting.BRIDGE_DIR), "--out", str(tmp_path / "again")])
    assert code == 0, capsys.readouterr().out


def test_profile_statistic_is_quadratic_near_the_estimate(fitted: Path) -> None:
    # Wilks: near θ̂ the profile statistic follows the Hessian's quadratic; the profile and
    # Hessian intervals then agree (measured within 4% of the half-width on this fit)
    record = json.loads((fitted / fitting.FIT_FILE).read_text())
    iv = {(i["name"], i["method"]): i for i in record["intervals"]}
    name = "confinement.stiffness"
    prof, hess = iv[(name, "profile")], iv[(name, "hessian")]
    half = hess["upper"] - hess["estimate"]
    assert abs(prof["upper"] - hess["upper"]) < 0.3 * half


def test_models_are_compared(fitted: Path, tmp_path: Path,
                             capsys: pytest.CaptureFixture[str]) -> None:
    other = tmp_path / "free"
    code = fit_command.main([*FIT_SMALL, "interaction=none",
                             "--param", "confinement.stiffness=0.2:4",
                             "-N", "1000", "--out", str(other), "--no-profile"])
    assert code == 0
    capsys.readouterr()
    code = compare_command.main([str(fitted), str(other), "--out", str(tmp_path / "cmp.md")])
    out = capsys.readouterr().out
    assert code == 0
    assert "likelihood ratio" in out and "leading-order" in out
    assert (tmp_path / "cmp.md").read_text().startswith("N = 1000")


def test_comparison_numbers() -> None:
    # N·ΣJ, differences and likelihood ratios e^Δ; Wilks: 2Δ ~ χ²(extra parameters)
    times = (0.0, 1.0)
    models = {"small": FitSummary(1000, 0.012, 1, "converged", times),
              "large": FitSummary(1000, 0.010, 3, "converged", times)}
    comparison = compare_models(models)
    best, other = comparison.rows
    assert best["model"] == "large" and other["model"] == "small"
    assert other["delta"] == pytest.approx(2.0)
    assert other["likelihood_ratio"] == pytest.approx(math.exp(2.0))
    # χ²(2) survival function at 4 is e^{-2} (the χ² law with two degrees of freedom is
    # exponential of mean 2: common practice, no source)
    assert other["wilks_p_value"] == pytest.approx(math.exp(-2.0))
    with pytest.raises(InputError, match="different population sizes"):
        compare_models({"a": models["small"], "b": FitSummary(10, 0.01, 1, "converged", times)})
    with pytest.raises(InputError, match="different times"):
        compare_models({"a": models["small"],
                        "b": FitSummary(1000, 0.01, 1, "converged", (0.0, 2.0))})
    with pytest.raises(InputError, match="at least two"):
        compare_models({"a": models["small"]})
