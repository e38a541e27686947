"""The direct action solver: cross-checks against the main solver and the closed form (slow),
low-density exclusion against walkers, convexity, domain errors, config dispatch."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch

from mfbridge import compose, lq_bridge, solve
from mfbridge.direct import DirectAction, DirectOptions, solve_direct
from mfbridge.endpoints import Gaussian, GaussianMixture
from mfbridge.errors import InputError
from mfbridge.fixed_point import SolverOptions, solve_bridge
from mfbridge.grid import Grid
from mfbridge.mobility import Exclusion
from mfbridge.potentials import GaussianCore, Harmonic, HarmonicInteraction
from mfbridge.problem import BridgeProblem

torch.set_num_threads(1)


def _problem(n: int, k: int, **kw) -> BridgeProblem:
    base = dict(grid=Grid(-4.0, 4.0, n), initial=Gaussian(-1.0, 0.25), final=Gaussian(1.0, 0.36),
                noise=1.0, horizon=1.0, steps=k, confinement=Harmonic(1.0))
    base.update(kw)
    return BridgeProblem(**base)


def test_low_density_exclusion_approaches_walkers():
    # as rho -> 0, chi = rho(1 - rho) -> rho and (W = 0) the walkers' action is linear in the
    # total mass M, so J_excl(M)/M -> J_walkers(1) with an O(M) gap (Bertini et al., Rev. Mod.
    # Phys. 2015: exclusion at low density is independent walkers). Measured on 24 cells x 6
    # steps: relative gaps 0.0437 (M = 0.1) and 0.0214 (M = 0.05), ratio 2.05 (on 48 x 10:
    # 0.0435, 0.0212).
    problem = _problem(24, 6)
    walkers = solve_direct(problem, DirectOptions())
    gaps = []
    for mass in (0.1, 0.05):
        excl = solve_direct(problem, DirectOptions(mobility=Exclusion(), total_mass=mass))
        assert excl.converged, excl.message
        gaps.append(excl.cost / mass / walkers.cost - 1)
    assert 0 < gaps[1] < gaps[0] < 0.1
    assert 1.7 < gaps[0] / gaps[1] < 2.3, gaps


def test_convexity_random_perturbations_never_lower_the_cost():
    # concave chi, constant D, U = W = 0: the discrete action is jointly convex in (rho, j)
    # (square of a linear form over a concave positive function; Papadakis, Peyre & Oudet, SIAM
    # J. Imaging Sci. 2014; DESIGN section 5), so the returned flow is the global minimiser.
    problem = _problem(16, 4, confinement=Harmonic(0.0))
    opts = DirectOptions(mobility=Exclusion(), total_mass=0.5, tol=1e-12)
    res = solve_direct(problem, opts)
    act = DirectAction(problem, Exclusion(), 0.5)
    rho = torch.as_tensor(res.density * 0.5)
    base = float(act.value(rho))
    assert base == pytest.approx(res.cost, rel=1e-12)
    rng = np.random.default_rng(0)
    linear_rho = rho.clone()
    s = torch.linspace(0, 1, problem.steps + 1)[:, None]
    linear_rho[:] = (1 - s) * rho[0] + s * rho[-1]
    linear_lowered = 0
    for _ in range(40):
        bump = torch.as_tensor(rng.normal(size=rho.shape))
        bump[0] = bump[-1] = 0
        for eps in (1e-3, 1e-2):
            # relative bumps with each slice's mass kept: q stays in (0, 1) (admissible)
            centre = (bump * rho).sum(dim=1, keepdim=True) / rho.sum(dim=1, keepdim=True)
            pert = eps * rho * (bump - centre)
            q = rho + pert
            assert bool(((q > 0) & (q < 1)).all())
            assert float(act.value(q)) >= base - 1e-10 * base
            q_lin = linear_rho + pert
            linear_lowered += float(act.value(q_lin)) < float(act.value(linear_rho))
    # the check can fail: the (non-optimal) linear interpolation is lowered by many of them
    # (measured: 40 of 80)
    assert linear_lowered > 10


def test_endpoint_outside_the_exclusion_domain_is_refused():
    problem = _problem(32, 4)
    with pytest.raises(InputError, match=r"exclusion mobility \(0 ≤ ρ < 1\).*lower "
                                         r"DirectOptions.total_mass below"):
        solve_direct(problem, DirectOptions(mobility=Exclusion(), total_mass=2.0))


def test_bad_options():
    with pytest.raises(InputError, match="total_mass"):
        DirectOptions(total_mass=0.0)
    with pytest.raises(InputError, match="warm_start"):
        DirectOptions(warm_start="nope")
    with pytest.raises(InputError, match="method"):
        DirectOptions(method="nope")
    with pytest.raises(InputError, match="max_cg"):
        DirectOptions(max_cg=0)
    with pytest.raises(InputError, match="Mobility"):
        DirectOptions(mobility="exclusion")


def test_config_dispatches_to_the_direct_solver():
    cfg = compose(["solver=direct", "mobility@solver.mobility=exclusion",
                   "solver.total_mass=0.3", "grid.shape=48", "steps=4"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = solve(cfg)
    assert res.method == "direct" and res.route == "exclusion"
    assert res.model["total_mass"] == 0.3
    np.testing.assert_allclose(res.masses.sum(axis=1), 1.0, atol=1e-12)


@pytest.mark.slow
def test_agrees_with_the_main_solver_on_a_gaussian_core():
    # chi = rho: the same J as the main solver (DESIGN section 2). Both discretisations are second
    # order, so the relative cost gap shrinks ~4x per refinement: measured -2.66e-2 (48 x 10),
    # -6.2e-3 (96 x 20); -3.9e-3 at 128 x 25 against the main solver at 256 x 50.
    gaps = []
    for n, k in ((48, 10), (96, 20)):
        problem = BridgeProblem(
            grid=Grid(-5.0, 5.0, n), initial=GaussianMixture([0.5, 0.5], [-1.5, -0.5], [0.1, 0.1]),
            final=Gaussian(1.0, 0.3), noise=1.0, horizon=1.0, steps=k, confinement=Harmonic(1.0),
            interaction=GaussianCore(2.0, 0.5))
        main = solve_bridge(problem, SolverOptions())
        direct = solve_direct(problem, DirectOptions())
        gaps.append(direct.cost / main.cost - 1)
    assert abs(gaps[1]) < 0.01
    assert 3.0 < gaps[0] / gaps[1] < 5.5, gaps


@pytest.mark.slow
def test_linear_quadratic_closed_form():
    # exact cost of the linear-quadratic mean-field bridge (DESIGN section 4; Bunne, Hsieh, Cuturi
    # & Krause, AISTATS 2023 for the centred part). Measured relative error 1.06e-2 on 48 x 10.
    problem = BridgeProblem(grid=Grid(-4.5, 4.5, 48), initial=Gaussian(-1, 0.16),
                            final=Gaussian(1.2, 0.49), noise=1.0, horizon=1.0, steps=10,
                            confinement=Harmonic(1.0), interaction=HarmonicInteraction(1.5))
    exact = lq_bridge(stiffness=1.0, strength=1.5, noise=1.0, horizon=1.0, mean0=-1.0, cov0=0.16,
                      mean1=1.2, cov1=0.49, times=11)
    direct = solve_direct(problem, DirectOptions())
    assert abs(direct.cost / exact.cost - 1) < 0.02
    assert np.abs(direct.mean[:, 0] - exact.mean.ravel()).max() < 0.013  # measured 6.4e-3
