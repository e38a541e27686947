"""User potentials: any object with value/grad is accepted and checked up front (issue 15, item 2).

The checks compare the user's gradient with central differences of the user's value (common
practice, no source) and test the evenness W(-z) = W(z) that the pair model requires.
"""

from __future__ import annotations

import numpy as np
import pytest

from mfbridge import BridgeProblem, Gaussian, Grid, SolverOptions, solve_bridge
from mfbridge.errors import InputError
from mfbridge.model.potentials import GaussianCore, Interaction, TorchInteraction


class PlainCore:
    """A Gaussian soft core written as a plain class (no mfbridge base class)."""

    def __init__(self, strength: float = 2.0, width: float = 0.5) -> None:
        self.strength, self.width = strength, width

    def value(self, z: np.ndarray) -> np.ndarray:
        return self.strength * np.exp(-np.sum(z * z, axis=-1) / (2 * self.width**2))

    def grad(self, z: np.ndarray) -> np.ndarray:
        return -(self.value(z) / self.width**2)[..., None] * z


class WrongSign(PlainCore):
    def grad(self, z: np.ndarray) -> np.ndarray:
        return -super().grad(z)


class Lopsided:
    """W(z) = exp(-|z - 0.1|²/2): a consistent value and gradient, but not even."""

    def value(self, z: np.ndarray) -> np.ndarray:
        return np.exp(-np.sum((z - 0.1) ** 2, axis=-1) / 2)

    def grad(self, z: np.ndarray) -> np.ndarray:
        return -(z - 0.1) * self.value(z)[..., None]


class FlatShape(PlainCore):
    def value(self, z: np.ndarray) -> np.ndarray:
        return super().value(z).ravel()[:1]


class NotADataclass(Interaction):
    """A subclass that is not a frozen dataclass and has no ``name``."""

    def __init__(self, strength: float) -> None:
        self.strength = strength

    def value(self, z: np.ndarray) -> np.ndarray:
        return 0.5 * self.strength * np.sum(z * z, axis=-1)

    def grad(self, z: np.ndarray) -> np.ndarray:
        return self.strength * z


def _problem(interaction: object, dim: int = 1) -> BridgeProblem:
    grid = Grid(-4.0, 4.0, 64) if dim == 1 else Grid([-4.0, -4.0], [4.0, 4.0], [24, 24])
    return BridgeProblem(grid=grid, initial=Gaussian([-1.0] * dim, 0.3),
                         final=Gaussian([1.0] * dim, 0.4), noise=1.0, steps=8,
                         interaction=interaction)


def test_plain_class_gives_the_builtin_answer():
    """A plain class with the formula of GaussianCore gives the same bridge bit for bit."""
    options = SolverOptions(tol=1e-8)
    mine = solve_bridge(_problem(PlainCore(2.0, 0.5)), options)
    builtin = solve_bridge(_problem(GaussianCore(2.0, 0.5)), options)
    assert mine.status == "converged"
    assert mine.cost == builtin.cost
    assert mine.model["interaction"]["class"].endswith("PlainCore")


@pytest.mark.parametrize(("bad", "words"), [
    (WrongSign(), ["WrongSign", "central differences"]),
    (Lopsided(), ["Lopsided", "not even", "W(-z) = W(z)"]),
    (FlatShape(), ["FlatShape", "shape"]),
    (object(), ["value(x) and grad(x)", "no value"]),
])
@pytest.mark.parametrize("dim", [1, 2])
def test_wrong_potentials_are_refused_up_front(bad, words, dim):
    with pytest.raises(InputError) as info:
        _problem(bad, dim)
    for word in words:
        assert word in str(info.value)


def test_torch_interaction_must_be_even():
    with pytest.raises(InputError, match="not even"):
        _problem(TorchInteraction(fn=lambda z: z[..., 0] ** 3))
    _problem(TorchInteraction(fn=lambda r: r**2, radial=True))


def test_subclass_without_dataclass_survives_describe():
    """Before: TypeError in describe() after the whole solve; now its fields are described."""
    result = solve_bridge(_problem(NotADataclass(0.5)), SolverOptions(tol=1e-8))
    described = result.model["interaction"]
    assert described["strength"] == 0.5
    assert described["name"].endswith("NotADataclass")
