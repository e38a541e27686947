"""Derivatives of the optimal cost J in the model's parameters (envelope theorem) against
central differences of J on the same grid, and of the potentials in their parameters.

The envelope theorem (Milgrom & Segal, "Envelope theorems for arbitrary choice sets",
Econometrica 70, 2002) holds exactly for the functional the solver minimises; the reported J
(the action of the control flux) agrees with that functional only to O(h²) and the time scheme
makes the fixed point stationary only to O(Δt²), so the envelope gradient matches central
differences of the reported J to the discretisation error, which falls at second order
(experiments/results/envelope_gradient.md has the full ladder and the explanation).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import torch

from mfbridge import InputError
from mfbridge.model.endpoints import Gaussian
from mfbridge.model.grid import Grid
from mfbridge.model.parameters import numeric_parameters, parameter_derivative, with_parameters
from mfbridge.model.potentials import (
    DoubleWell,
    GaussianCore,
    Harmonic,
    HarmonicInteraction,
    Morse,
    SoftCoulomb,
    TiltedDoubleWell,
    TorchInteraction,
)
from mfbridge.model.problem import BridgeProblem
from mfbridge.model.series import SeriesProblem
from mfbridge.solvers.fixed_point import solve_bridge
from mfbridge.solvers.linear_quadratic import lq_bridge
from mfbridge.solvers.sensitivity import cost_gradient
from mfbridge.solvers.series import solve_series

DELTA = 1e-3  # central-difference step; the solver's 1e-9 tolerance adds ~1e-6 to them


def _gaps(problem: BridgeProblem, names: list[str]) -> dict[str, tuple[float, float]]:
    """name -> (envelope gradient, central difference of the reported J)."""
    base = solve_bridge(problem)
    assert base.converged, base.message
    _, envelope = cost_gradient(problem, base, names)
    values = numeric_parameters(problem)
    out = {}
    for name in names:
        costs = [solve_bridge(with_parameters(problem, {name: values[name] + s * DELTA}),
                              warm_start=base).cost for s in (1, -1)]
        out[name] = (envelope[name], (costs[0] - costs[1]) / (2 * DELTA))
    return out


def _problem_1d(n: int, steps: int) -> BridgeProblem:
    # a spread cloud pushed through a harmonic trap into a narrow one against a soft repulsion
    return BridgeProblem(grid=Grid(-4, 4, n), initial=Gaussian(-0.8, 0.4),
                         final=Gaussian(0.8, 0.1), noise=0.8, horizon=1.0, steps=steps,
                         confinement=Harmonic(1.5), interaction=GaussianCore(2.0, 0.5))


NAMES = ["confinement.stiffness", "interaction.strength", "interaction.range", "noise"]


def test_envelope_gradient_matches_central_differences_1d() -> None:
    # 64 cells x 20 steps (gradients -0.062, 0.45, -0.23, -6.16), J and its gradient at the
    # step midpoints: measured gaps |envelope - central difference| 5.0e-3, 4.8e-3, 6.1e-3,
    # 1.6e-2 (relative 8%, 1.1%, 2.7%, 0.26%); the slow test below shows them falling at
    # second order
    measured = {"confinement.stiffness": 5.0e-3, "interaction.strength": 4.8e-3,
                "interaction.range": 6.1e-3, "noise": 1.6e-2}
    gaps = _gaps(_problem_1d(64, 20), NAMES)
    for name in NAMES:
        assert abs(gaps[name][0] - gaps[name][1]) < 2 * measured[name], (name, gaps[name])


@pytest.mark.slow
def test_envelope_gradient_error_falls_at_second_order_1d() -> None:
    # measured |envelope - central difference| at 64 cells x 20 steps and 128 x 40 (gradients
    # -0.062, 0.45, -0.23, -6.16), J and its gradient both at the step midpoints
    # (mfbridge.solvers.cost): stiffness 5.0e-3 -> 1.29e-3, strength 4.8e-3 -> 1.15e-3, range
    # 6.1e-3 -> 1.68e-3, noise 1.6e-2 -> 5.75e-3: second order (ratios 2.9 to 4.2). With the
    # trapezoid rule on the nodes, used before: 3.9e-4, 8.8e-3, 3.4e-2, 2.9e-2 at 128 x 40.
    coarse = _gaps(_problem_1d(64, 20), NAMES)
    fine = _gaps(_problem_1d(128, 40), NAMES)
    measured = {"confinement.stiffness": 1.29e-3, "interaction.strength": 1.15e-3,
                "interaction.range": 1.68e-3, "noise": 5.75e-3}
    for name in NAMES:
        gap_coarse = abs(coarse[name][0] - coarse[name][1])
        gap_fine = abs(fine[name][0] - fine[name][1])
        assert gap_fine < 2 * measured[name], (name, fine[name])
        assert gap_coarse / gap_fine > 2.0, (name, gap_coarse, gap_fine)


def test_envelope_gradient_matches_central_differences_2d() -> None:
    # 24 x 24 cells, 12 steps; measured gradients (central differences) -0.032, 0.228, -5.33
    # and gaps 1.8e-2, 2.8e-2, 1.1e-1 (relative to the largest, 5.33: 3e-3 to 2e-2)
    problem = BridgeProblem(grid=Grid((-3, -3), (3, 3), (24, 24)),
                            initial=Gaussian([-0.8, 0.0], [[0.3, 0], [0, 0.3]]),
                            final=Gaussian([0.8, 0.3], [[0.15, 0], [0, 0.4]]), noise=0.8,
                            horizon=1.0, steps=12, confinement=Harmonic(1.0),
                            interaction=GaussianCore(1.5, 0.6))
    measured = {"confinement.stiffness": 1.8e-2, "interaction.strength": 2.8e-2, "noise": 1.1e-1}
    gaps = _gaps(problem, list(measured))
    for name, bound in measured.items():
        assert abs(gaps[name][0] - gaps[name][1]) < 2 * bound, (name, gaps[name])


def test_gradient_of_summed_cost_against_linear_quadratic_closed_form() -> None:
    # ΣJ over two segments (U = a x²/2, W = κ x²/2) differentiated on the grid against the
    # derivative of the exact sum (mfbridge.solvers.linear_quadratic, checked in its own tests
    # against Bunne, Hsieh, Cuturi & Krause, AISTATS 2023), at (a, κ, σ) = (1.2, 0.2, 0.8):
    # measured relative errors 2.7e-2, 6.6e-2, 0.22 at 128 cells (dt 0.025), and 0.7%, 1.7%,
    # 5.6% at 256 cells (dt 0.0125) for ∂a, ∂κ, ∂σ: second order
    times = [0.0, 0.5, 1.2]
    means = [-1.5, -0.90979599, -0.45179132]
    covs = [0.1, 0.18804525, 0.21023664]

    def exact(a: float, kappa: float, sigma: float) -> float:
        return sum(lq_bridge(stiffness=a, strength=kappa, noise=sigma,
                             horizon=times[k + 1] - times[k], mean0=means[k], cov0=covs[k],
                             mean1=means[k + 1], cov1=covs[k + 1], times=3).cost
                   for k in range(2))

    e = 1e-5  # central differences of the closed form: error ~1e-10
    reference = [(exact(1.2 + e, 0.2, 0.8) - exact(1.2 - e, 0.2, 0.8)) / (2 * e),
                 (exact(1.2, 0.2 + e, 0.8) - exact(1.2, 0.2 - e, 0.8)) / (2 * e),
                 (exact(1.2, 0.2, 0.8 + e) - exact(1.2, 0.2, 0.8 - e)) / (2 * e)]
    names = ["confinement.stiffness", "interaction.strength", "noise"]
    errors = []
    for n, steps in ((128, 48), (256, 96)):
        problem = SeriesProblem(grid=Grid(-4, 4, n), snapshots=list(zip(
            times, [Gaussian(m, c) for m, c in zip(means, covs, strict=True)], strict=True)),
            noise=0.8, steps=steps, confinement=Harmonic(1.2),
            interaction=HarmonicInteraction(0.2))
        result = solve_series(problem)
        grads = [cost_gradient(p, r, names)[1] for p, r in
                 zip(problem.segments(), result.segments, strict=True)]
        total = [sum(g[name] for g in grads) for name in names]
        errors.append([abs(t / r - 1) for t, r in zip(total, reference, strict=True)])
    assert np.all(np.array(errors[1]) < 2 * np.array([7e-3, 1.7e-2, 5.6e-2])), errors
    assert np.all(np.array(errors[0]) / np.array(errors[1]) > 3.0), errors


@pytest.mark.parametrize("potential", [
    Harmonic(1.3, (0.2, -0.1)), DoubleWell(1.2, 0.8), TiltedDoubleWell(1.0, 0.3, 2.0),
    HarmonicInteraction(-0.4), GaussianCore(1.5, 0.4), Morse(0.5, 2.0, 0.8), SoftCoulomb(0.3, 0.2),
], ids=lambda p: type(p).__name__)
def test_parameter_derivatives_of_potentials(potential: object) -> None:
    # forward-mode autograd through the potential's formula against central differences of its
    # values (step 1e-6: truncation 1e-12, rounding 1e-10; common practice, no source):
    # measured relative differences below 1.5e-10, 9.6e-9 for the Morse softening (its values
    # depend on it only through softening², a cancellation in the differences)
    x = np.random.default_rng(0).normal(size=(50, 2))
    for name, value in numeric_parameters_of(potential).items():
        exact = parameter_derivative(potential, name, x)
        step = 1e-6
        values = [dataclasses.replace(potential, **{name: value + s * step}).value(x)
                  for s in (1, -1)]
        central = (values[0] - values[1]) / (2 * step)
        assert np.abs(exact - central).max() <= 2e-8 * max(np.abs(central).max(), 1e-3), name


def numeric_parameters_of(potential: object) -> dict[str, float]:
    from mfbridge.model.parameters import potential_parameters

    return potential_parameters(potential)


def test_torch_potential_parameters_are_differentiated() -> None:
    # W(z) = a exp(-|z|²/b): ∂W/∂a = W/a exactly, ∂W/∂b = W |z|²/b²
    def pair(z: torch.Tensor, a: float, b: float) -> torch.Tensor:
        return a * torch.exp(-(z * z).sum(-1) / b)

    w = TorchInteraction(pair, params={"a": 2.0, "b": 0.5})
    z = np.random.default_rng(1).normal(size=(30, 1))
    value = w.value(z)
    assert np.allclose(parameter_derivative(w, "params.a", z), value / 2.0, rtol=1e-14)
    assert np.allclose(parameter_derivative(w, "params.b", z),
                       value * (z[:, 0] ** 2) / 0.25, rtol=1e-12)
    assert w.with_params(a=3.0).value(z) == pytest.approx(1.5 * value)
    with pytest.raises(InputError, match="has no params c"):
        w.with_params(c=1.0)
    problem = _problem_1d(32, 4)
    assert "interaction.params.a" in numeric_parameters(
        dataclasses.replace(problem, interaction=w))


def test_gradient_refuses_what_it_cannot_differentiate() -> None:
    problem = BridgeProblem(grid=Grid(-4, 4, 48), initial=Gaussian(-0.5, 0.3),
                            final=Gaussian(0.5, 0.3), noise=1.0, steps=10,
                            confinement=Harmonic(1.0), interaction=GaussianCore(1.0, 0.5))
    result = solve_bridge(problem)
    assert result.converged
    with pytest.raises(InputError, match="no numeric parameter 'depth'"):
        cost_gradient(problem, result, ["interaction.depth"])
    with pytest.raises(InputError, match="flow shape"):
        cost_gradient(dataclasses.replace(problem, steps=5), result, ["noise"])
    other = dataclasses.replace(problem, confinement=Harmonic(3.0))
    with pytest.raises(InputError, match="not a solution of this problem"):
        cost_gradient(other, result, ["noise"])
