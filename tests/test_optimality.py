"""The returned flow minimises the rate function: admissible perturbations do not lower J.

J is evaluated here by a direct discretisation of its definition, independent of the solver's:

    J(rho) = 1/(2 sigma^2) int int |v - b[rho]|^2 rho dx dt,
    b = -grad(U + W*rho) - sigma^2/2 grad log rho,

in 1D with continuity imposed exactly through the cumulative mass (the flux through a face is
minus the time derivative of the mass on its left), central differences and midpoint-in-time
densities. Its minimiser differs from the solver's by O(h^2 + dt^2) only, so at the returned flow
the first variation is small and every perturbation of moderate size raises J; at the
frozen-reference flow a perturbation towards the true optimum lowers it.
"""

from __future__ import annotations

import numpy as np
import pytest

from mfbridge.model.endpoints import Gaussian, GaussianMixture
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import GaussianCore, Harmonic, HarmonicInteraction
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics.reference import PairField
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge

NOISE = 1.0
GRID = Grid(-5.0, 5.0, 256)


def direct_action(p: np.ndarray, times: np.ndarray, confinement, pair: PairField) -> float:
    """J of the mass flow p (K+1, n) on GRID, discretised directly (see module docstring)."""
    h = GRID.spacing[0]
    dt = np.diff(times)[:, None]
    left = np.cumsum(p, axis=1)[:, :-1]  # mass left of each face
    right = np.cumsum(p[:, ::-1], axis=1)[:, ::-1][:, 1:]  # mass right of each face
    # differentiate whichever tail is smaller, so tails keep their relative precision
    flux = np.where(0.5 * (left[1:] + left[:-1]) < 0.5,
                    -(left[1:] - left[:-1]) / dt, (right[1:] - right[:-1]) / dt)
    p_mid = 0.5 * (p[1:] + p[:-1])
    face = 0.5 * (p_mid[:, :-1] + p_mid[:, 1:])
    phi = confinement.value(GRID.points) + pair(p_mid)
    ref_flux = -(face * np.diff(phi, axis=1) + 0.5 * NOISE**2 * np.diff(p_mid, axis=1)) / h**2
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(face > 0, (flux - ref_flux) ** 2 * h**2 / face, 0.0)
    return float((dt[:, 0] * terms.sum(axis=1)).sum() / (2 * NOISE**2))


def perturbed(p: np.ndarray, times: np.ndarray, eps: float, kind: str) -> np.ndarray:
    """Shift (or dilate about the mean) each slice by eps sin(pi t/T): the end marginals stay
    fixed, mass is conserved and densities stay non-negative."""
    x = GRID.axes[0]
    out = np.empty_like(p)
    for k, t in enumerate(times):
        s = eps * np.sin(np.pi * t / times[-1])
        mean = (p[k] * x).sum()
        source = x - s if kind == "shift" else mean + (x - mean) / (1 + s)
        q = np.interp(source, x, p[k], left=0.0, right=0.0)
        out[k] = q / q.sum()
    return out


def action_profile(result, interaction, kind):
    """J at the flow, its changes at eps = +-0.05, +-0.1, +-0.2, and the minimiser along the
    perturbation estimated by Newton's step from central differences at eps = +-0.02."""
    pair = PairField(GRID, interaction)
    confinement = Harmonic(1.0)
    p = result.masses

    def action(eps: float) -> float:
        q = p if eps == 0 else perturbed(p, result.times, eps, kind)
        return direct_action(q, result.times, confinement, pair)

    base = action(0.0)
    changes = np.array([action(e) - base for e in (-0.2, -0.1, -0.05, 0.05, 0.1, 0.2)])
    e = 0.02
    plus, minus = action(e), action(-e)
    slope, curvature = (plus - minus) / (2 * e), (plus - 2 * base + minus) / e**2
    return base, changes, -slope / curvature


def solve(interaction, method):
    problem = BridgeProblem(
        grid=GRID, initial=GaussianMixture([0.5, 0.5], [-1.5, -0.5], [0.1, 0.1]),
        final=Gaussian(1.0, 0.3), noise=NOISE, horizon=1.0, steps=50,
        confinement=Harmonic(1.0), interaction=interaction,
    )
    result = solve_bridge(problem, SolverOptions(method=method))
    assert result.converged, result.message
    return result


INTERACTIONS = [HarmonicInteraction(1.5), GaussianCore(2.0, 0.5), HarmonicInteraction(-0.5)]


@pytest.mark.parametrize("interaction", INTERACTIONS, ids=repr)
def test_perturbations_of_the_optimal_flow_raise_the_action(interaction):
    result = solve(interaction, "optimal")
    for kind in ("shift", "dilate"):
        base, changes, best = action_profile(result, interaction, kind)
        # the two discretisations of J agree (measured relative gaps 3.6e-4, 9.6e-4, 4.1e-4)
        assert abs(base - result.cost) / result.cost < 2e-3
        assert np.all(changes > 0), (kind, changes)
        # the minimiser along the perturbation sits at the returned flow: measured |eps*| at
        # most 1.8e-4 for shifts (the frozen flows below: 0.12 to 0.29) and 2.9e-3 for
        # dilations, where the exact closed-form flow of the linear-quadratic case shows the same
        # offset under this discretisation of J
        assert abs(best) < (1e-3 if kind == "shift" else 6e-3), (kind, best)


@pytest.mark.parametrize("interaction", INTERACTIONS[:2], ids=repr)
def test_the_frozen_reference_flow_is_not_a_minimiser(interaction):
    # the same check fails for the self-consistent frozen-reference bridge: some shift lowers J
    result = solve(interaction, "frozen")
    _, changes, best = action_profile(result, interaction, "shift")
    assert changes.min() < -0.01
    assert abs(best) > 0.1


def test_cost_parts_add_up_at_second_order() -> None:
    """J = kinetic + drift + (F(nu) - F(mu))/sigma^2 with each part from its own formula.

    With j the bridge's flux and r = -rho grad(dF/drho) the reference's at the same density,
    |j - r|^2/rho = |j|^2/rho - 2 j.r/rho + |r|^2/rho, and the cross term integrates to
    (F(rho_T) - F(rho_0))/sigma^2 by the continuity equation and no-flux walls (common practice,
    no source). On the grid the identity holds up to the discretisation error, which must fall
    like (h^2 + dt^2): refining h and dt by 2 divides it by about 4. Default scenario (Gaussian
    core, two clusters to one cloud, its fitted box); the cost at the step midpoints (issue 12):
    measured relative gaps +3.21e-4 (64 x 16), +1.00e-4 (128 x 32), +2.67e-5 (256 x 64), ratios
    3.20, 3.76 (from 32 x 8, 5.9e-4, the ratio is 1.85: not yet asymptotic).
    """
    from mfbridge import compose, solve

    gaps = []
    for n, k in ((64, 16), (128, 32), (256, 64)):
        result = solve(compose([f"grid.shape={n}", f"steps={k}", "accuracy=none"]))
        assert result.converged, result.message
        parts = result.cost_kinetic + result.cost_drift + result.cost_free_energy
        gaps.append((result.cost - parts) / result.cost)
    assert 2.8 < gaps[0] / gaps[1] < 5.0 and 2.8 < gaps[1] / gaps[2] < 5.0, gaps
    assert abs(gaps[2]) < 5.4e-5, gaps

