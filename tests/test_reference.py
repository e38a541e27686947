"""Pair-interaction fields on the grid against direct summation."""

from __future__ import annotations

import numpy as np
import pytest

from mfbridge.model.grid import Grid
from mfbridge.model.potentials import GaussianCore, HarmonicInteraction, Morse, SoftCoulomb
from mfbridge.numerics.reference import PairField


@pytest.mark.parametrize("interaction", [GaussianCore(1.0, 0.4), SoftCoulomb(1.0, 0.2),
                                         Morse(1.0, 2.0, 0.5), HarmonicInteraction(-0.7)])
@pytest.mark.parametrize("grid", [Grid(-3.0, 2.0, 57), Grid([-2.0, -1.0], [2.0, 3.0], [13, 18])])
def test_pair_field_equals_direct_sum(interaction, grid):
    # (W * p)_i = sum_j W(x_i - x_j) p_j, computed here by an explicit O(n^2) sum.
    rng = np.random.default_rng(0)
    p = rng.random((3, *grid.shape))
    pts = grid.points.reshape(-1, grid.dim)
    table = interaction.value(pts[:, None, :] - pts[None, :, :])
    direct = (p.reshape(3, -1) @ table.T).reshape(p.shape)
    assert np.allclose(PairField(grid, interaction)(p), direct, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("grid", [Grid(-3.0, 2.0, 41), Grid([-2.0, -1.0], [2.0, 3.0], [11, 14])])
def test_pair_force_field_equals_direct_sum(grid):
    # sum_j grad W(x_i - x_j) p_j by an explicit O(n^2) sum
    interaction = GaussianCore(1.0, 0.4)
    p = np.random.default_rng(1).random((2, *grid.shape))
    pts = grid.points.reshape(-1, grid.dim)
    table = interaction.grad(pts[:, None, :] - pts[None, :, :])  # (n, n, d)
    direct = np.einsum("ija,bj->bia", table, p.reshape(2, -1)).reshape(*p.shape, grid.dim)
    field = PairField(grid, interaction, gradient=True)(p)
    assert field.shape == direct.shape
    assert np.allclose(field, direct, rtol=1e-12, atol=1e-12)
