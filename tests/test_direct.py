"""The direct action solver: cross-checks against the main solver and the closed form (slow),
low-density exclusion against walkers, convexity, domain errors, config dispatch."""

from __future__ import annotations

import warnings

import numpy as np
import ot
import pytest
import torch

from mfbridge import compose, lq_bridge, solve
from mfbridge.errors import InputError
from mfbridge.model.endpoints import Gaussian, GaussianMixture
from mfbridge.model.grid import Grid
from mfbridge.model.mobility import Exclusion, Walkers
from mfbridge.model.potentials import GaussianCore, Harmonic, HarmonicInteraction, NoInteraction
from mfbridge.model.problem import BridgeProblem
from mfbridge.solvers.direct import DirectAction, DirectOptions, solve_direct
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge
from tests.test_limits import stationary_state

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
    _assert_cost_parts_add_up(walkers)
    gaps = []
    for mass in (0.1, 0.05):
        excl = solve_direct(problem, DirectOptions(mobility=Exclusion(), total_mass=mass))
        assert excl.converged, excl.message
        _assert_cost_parts_add_up(excl)
        gaps.append(excl.cost / mass / walkers.cost - 1)
    assert 0 < gaps[1] < gaps[0] < 0.1
    assert 1.7 < gaps[0] / gaps[1] < 2.3, gaps


def _assert_cost_parts_add_up(result) -> None:
    # J = kinetic + drift + dF/sigma^2, each part from its own face sum (Einstein relation
    # b = -chi grad(dF/drho): the cross term -(1/sigma^2) int int j.b/chi integrates to
    # dF/sigma^2 by continuity; common practice, no source), up to the discretisation error.
    # Measured relative gaps on 24 cells x 6 steps: -2.58e-3 (walkers), -2.11e-3 and -2.33e-3
    # (exclusion, M = 0.1, 0.05); on 96 x 24 steps: +5.7e-4 (walkers + Gaussian core),
    # +3.6e-4 (exclusion, M = 0.5).
    parts = result.cost_kinetic + result.cost_drift + result.cost_free_energy
    assert abs(result.cost - parts) <= 5e-3 * result.cost, (result.cost, parts)


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
    cfg = compose(["solver=direct", "mobility=exclusion",
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
    # order, so the relative cost gap shrinks ~4x per refinement of (h, dt). Measured (Newton;
    # main's J at the step midpoints since issue 12): cost gaps -5.69e-3 (48 x 10), -1.65e-3
    # (96 x 20), -4.31e-4 (192 x 40), ratios 3.44, 3.84 (with the trapezoid J before: -2.657e-2,
    # -6.21e-3, -1.53e-3); max density gap / peak 2.94e-2, 1.02e-2, 2.56e-3. The required 0.5%
    # (issue 5) is met at 192 x 40.
    gaps, dens = [], []
    for n, k in ((48, 10), (96, 20), (192, 40)):
        problem = BridgeProblem(
            grid=Grid(-5.0, 5.0, n), initial=GaussianMixture([0.5, 0.5], [-1.5, -0.5], [0.1, 0.1]),
            final=Gaussian(1.0, 0.3), noise=1.0, horizon=1.0, steps=k, confinement=Harmonic(1.0),
            interaction=GaussianCore(2.0, 0.5))
        main = solve_bridge(problem, SolverOptions())
        direct = solve_direct(problem, DirectOptions())
        assert direct.converged, direct.message
        gaps.append(direct.cost / main.cost - 1)
        dens.append(np.abs(main.density - direct.density).max() / main.density.max())
    assert abs(gaps[2]) < 0.005
    assert 3.0 < gaps[0] / gaps[1] < 5.5 and 3.0 < gaps[1] / gaps[2] < 5.5, gaps
    assert dens[0] > 2.5 * dens[1] > 2.5**2 * dens[2], dens


@pytest.mark.slow
def test_linear_quadratic_closed_form():
    # exact cost of the linear-quadratic mean-field bridge (DESIGN section 4; Bunne, Hsieh, Cuturi
    # & Krause, AISTATS 2023 for the centred part). Both solvers are second order in (h, dt) and
    # reach the exact cost from opposite sides. Measured relative errors against it:
    # direct (Newton) +1.059e-2 (48 x 10), +2.484e-3 (96 x 20), +6.02e-4 (192 x 40), ratios 4.26,
    # 4.13; main (J at the step midpoints, issue 12) -1.909e-2, -5.177e-3, -1.330e-3, ratios
    # 3.69, 3.89. Split at 96 x 20: main -3.1e-3 from space, -2.07e-3 = -0.83/K^2 from time (the
    # trapezoid rule used before issue 12 had +0.73/K^2, which cancelled part of the space error:
    # -1.3e-3 in all); direct +1.06e-3 from space, +1.42e-3 from time. So the gap between the
    # two, +3.03e-2, +7.70e-3, +1.93e-3, is the sum of two second-order errors: the required 0.5%
    # (issue 5) is met at 192 x 40. Largest error of the mean (direct): 6.4e-3, 1.38e-3.
    direct_errors, main_errors, means = [], [], []
    for n, k in ((48, 10), (96, 20), (192, 40)):
        problem = BridgeProblem(grid=Grid(-4.5, 4.5, n), initial=Gaussian(-1, 0.16),
                                final=Gaussian(1.2, 0.49), noise=1.0, horizon=1.0, steps=k,
                                confinement=Harmonic(1.0), interaction=HarmonicInteraction(1.5))
        exact = lq_bridge(stiffness=1.0, strength=1.5, noise=1.0, horizon=1.0, mean0=-1.0,
                          cov0=0.16, mean1=1.2, cov1=0.49, times=k + 1)
        direct = solve_direct(problem, DirectOptions())
        assert direct.converged, direct.message
        main = solve_bridge(problem, SolverOptions())
        assert main.converged, main.message
        direct_errors.append(direct.cost / exact.cost - 1)
        main_errors.append(main.cost / exact.cost - 1)
        means.append(np.abs(direct.mean[:, 0] - exact.mean.ravel()).max())
    assert 0 < direct_errors[1] < 0.005, direct_errors  # measured 2.48e-3
    assert -0.003 < main_errors[2] < 0, main_errors  # measured -1.33e-3
    for errors in (direct_errors, main_errors):
        assert 3.0 < errors[0] / errors[1] < 5.5 and 3.0 < errors[1] / errors[2] < 5.5, errors
    assert abs(direct.cost / main.cost - 1) < 0.005  # measured 1.93e-3 at 192 x 40
    assert means[1] < 0.0028 and means[0] > 3 * means[1], means


def _problem_2d(n: int, k: int) -> BridgeProblem:
    return BridgeProblem(grid=Grid([-4.0, -4.0], [4.0, 4.0], [n, n]),
                         initial=Gaussian([-1.0, -0.5], 0.36), final=Gaussian([1.0, 0.5], 0.25),
                         noise=1.0, horizon=1.0, steps=k, confinement=Harmonic(1.0),
                         interaction=GaussianCore(1.0, 0.7))


def _curl(stream: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Face fluxes of the discrete curl of a stream function on the interior vertices (zero on
    the walls): divergence-free by construction."""
    k, m0, m1 = stream.shape
    full = torch.zeros((k, m0 + 2, m1 + 2), dtype=torch.float64)
    full[:, 1:-1, 1:-1] = stream
    return (full[:, 1:-1, 1:] - full[:, 1:-1, :-1], -(full[:, 1:, 1:-1] - full[:, :-1, 1:-1]))


def test_2d_fluxes_satisfy_continuity_and_minimise_the_action():
    # For fixed densities the 2D action is a strictly convex quadratic in the fluxes under the
    # linear continuity constraint; its minimiser is the Lagrange point F = B + m grad(lambda)
    # (Nocedal & Wright, Numerical Optimization, 2006, section 16.1), so adding any
    # divergence-free flux (a discrete curl) raises J by exactly the curl's own quadratic form.
    problem = _problem_2d(16, 3)
    act = DirectAction(problem)
    s = torch.linspace(0, 1, 4, dtype=torch.float64)[:, None, None]
    rho = (1 - s) * act.rho0 + s * act.rho1 + 1e-3 * act.rho0.mean()
    rho = rho * act.mass / (rho.sum(dim=(1, 2), keepdim=True) * act.vol)
    terms = act.face_terms(rho)
    h = problem.grid.spacing
    flux = [j * act.vol / hh for (j, _, _, _), hh in zip(terms, h, strict=True)]
    inc = act._incidence
    source = (-(rho[1:] - rho[:-1]) * act.vol / act.dt).reshape(3, -1)
    residual = inc.div(inc.flatten(flux)) - source
    assert float(residual.abs().max()) < 1e-12 * float(source.abs().max())  # measured 1.9e-14
    base = float(act.value(rho))
    weight = act.vol * act.dt / (2.0 * problem.noise**2)
    rng = np.random.default_rng(1)
    for _ in range(5):
        curl = _curl(torch.as_tensor(rng.normal(size=(3, 15, 15))) * 1e-3)
        assert float(inc.div(inc.flatten(list(curl))).abs().max()) < 1e-15
        value = weight * sum((((f + c) * hh / act.vol - b) ** 2 / chi).sum()
                             for f, c, hh, (_, b, chi, _) in zip(flux, curl, h, terms,
                                                                 strict=True))
        extra = weight * sum(((c * hh / act.vol) ** 2 / chi).sum()
                             for c, hh, (_, _, chi, _) in zip(curl, h, terms, strict=True))
        # measured relative mismatch <= 1.1e-16 (the excess is ~2 J)
        assert float(value) - base == pytest.approx(float(extra), rel=1e-9)


def test_2d_gradient_and_hessian_through_the_weighted_poisson_solve():
    # the weighted Poisson solve has a hand-written backward (mfbridge.solvers.direct); central
    # differences (Taylor: error O(eps^2)) check it; measured relative errors at eps = 1e-4:
    # gradient 2.5e-9, Hessian-vector product 6.8e-9 of its largest entry
    problem = _problem_2d(16, 3)
    act = DirectAction(problem)
    s = torch.linspace(0, 1, 4, dtype=torch.float64)[:, None, None]
    rho = (1 - s) * act.rho0 + s * act.rho1

    def value(inner: torch.Tensor) -> torch.Tensor:
        return act.value(torch.cat([act.rho0[None], inner, act.rho1[None]]))

    x = rho[1:-1].clone().requires_grad_(True)
    (grad,) = torch.autograd.grad(value(x), x, create_graph=True)
    rng = np.random.default_rng(2)
    d = torch.as_tensor(rng.normal(size=x.shape)) * x.detach()
    (hd,) = torch.autograd.grad(grad, x, grad_outputs=d)
    eps = 1e-4
    with torch.no_grad():
        fd = (value(x + eps * d) - value(x - eps * d)) / (2 * eps)
    assert float(fd) == pytest.approx(float((grad * d).sum().detach()), rel=1e-6)
    grads = []
    for sign in (1, -1):
        xs = (x.detach() + sign * eps * d).requires_grad_(True)
        grads.append(torch.autograd.grad(value(xs), xs)[0])
    fd_h = (grads[0] - grads[1]) / (2 * eps)
    assert float((fd_h - hd).abs().max()) < 1e-6 * float(hd.abs().max())


def _fermi_profile(grid: Grid, confinement, noise: float, mass: float) -> np.ndarray:
    """Cell masses (normalised) of the exclusion equilibrium at total mass M and W = 0:
    (σ²/2) f'(ρ) + U = c with f' = log(ρ/(1-ρ)), i.e. ρ = 1/(1 + exp(2(U - c)/σ²)), c fixed by
    the mass (bisection)."""
    from scipy.optimize import brentq

    u = confinement.value(grid.points)

    def occupation(c: float) -> np.ndarray:
        return 1.0 / (1.0 + np.exp(2.0 * (u - c) / noise**2))

    c = brentq(lambda c: occupation(c).sum() * grid.cell_volume - mass, -50.0, 50.0)
    return occupation(c) * grid.cell_volume / mass


@pytest.mark.slow
@pytest.mark.parametrize("mobility", ["walkers", "exclusion"])
def test_long_horizon_cost_tends_to_twice_the_free_energy_gap(mobility):
    # Reversible lattice gases: J_T(rho_eq, nu) -> (2/sigma^2)(F(nu) - F(rho_eq)) as T -> infinity
    # (quasi-potential = free energy: Bertini, De Sole, Gabrielli, Jona-Lasinio & Landim,
    # "Macroscopic fluctuation theory", Rev. Mod. Phys. 87, 2015). 96 cells, 12 steps per time
    # unit, T = 1, 2, 4; measured relative gaps: walkers (Gaussian core W) +1.144e-1, +9.14e-3,
    # -4.63e-3; exclusion (M = 0.9, W = 0) +3.163e-1, +6.37e-2, +1.00e-3. At T = 4 the gap is the
    # discretisation's (the direct action's quasi-potential differs from the grid free energy at
    # O(h^2, dt^2)): walkers at 192 cells, 24 steps per time unit give -1.05e-3 at T = 4 (4.4x
    # smaller).
    grid = Grid(-4.0, 4.0, 96)
    confinement = Harmonic(1.0)
    if mobility == "walkers":
        interaction, mob, mass = GaussianCore(0.8, 0.5), None, 1.0
        p_eq = stationary_state(grid, confinement, interaction, 1.0)
    else:
        interaction, mob, mass = NoInteraction(), Exclusion(), 0.9
        p_eq = _fermi_profile(grid, confinement, 1.0, mass)
    nu = Gaussian(1.0, 0.2).masses(grid)
    gaps = []
    for horizon in (1.0, 2.0, 4.0):
        problem = BridgeProblem(grid=grid, initial=p_eq, final=nu, noise=1.0, horizon=horizon,
                                steps=int(12 * horizon), confinement=confinement,
                                interaction=interaction)
        act = DirectAction(problem, mob, mass)
        free = act.free_energy(mass * np.stack([p_eq, nu]) / grid.cell_volume)
        limit = 2.0 * (free[1] - free[0])
        result = solve_direct(problem, DirectOptions(mobility=mob or Walkers(), total_mass=mass))
        assert result.converged, result.message
        gaps.append(result.cost / limit - 1)
    assert gaps[0] > 4 * gaps[1] > 0, gaps
    # |gap(T=4)| / gap(T=2): measured 0.51 (walkers, discretisation floor), 0.016 (exclusion)
    assert abs(gaps[2]) < gaps[1], gaps
    assert abs(gaps[2]) < 0.007, gaps  # measured 4.63e-3 (walkers), 1.00e-3 (exclusion)


@pytest.mark.slow
def test_small_noise_cost_tends_to_the_transport_cost():
    # chi = rho: sigma^2 J -> W_2^2(mu, nu) / (2T) as sigma -> 0 (entropic OT -> OT: Carlier,
    # Duval, Peyré & Schmitzer, SIAM J. Math. Anal. 2017), W_2 from POT's exact ot.emd2, as in
    # tests/test_limits.py. Measured on 128 cells x 32 steps: gaps 4.79e-2, 2.09e-2, 7.11e-3,
    # 3.56e-3 (log-log slope 2.65; the main solver on 400 x 100 gives the same to 2 digits),
    # last relative gap 2.75e-3.
    grid = Grid(-3.0, 3.0, 128)
    mu = GaussianMixture([0.5, 0.5], [-1.2, -0.4], [0.05, 0.05]).masses(grid)
    nu = Gaussian(0.8, 0.1).masses(grid)
    x = grid.axes[0]
    w2sq = ot.emd2(mu, nu, (x[:, None] - x[None, :]) ** 2)
    sigmas = np.array([0.4, 0.3, 0.2, 0.15])
    gaps = []
    for sigma in sigmas:
        result = solve_direct(BridgeProblem(grid=grid, initial=mu, final=nu, noise=sigma,
                                            horizon=1.0, steps=32), DirectOptions())
        assert result.converged, result.message
        gaps.append(sigma**2 * result.cost - w2sq / 2.0)
    gaps = np.array(gaps)
    assert np.all(gaps > 0) and np.all(np.diff(gaps) < 0), gaps
    slope = np.polyfit(np.log(sigmas), np.log(gaps), 1)[0]
    assert slope > 1.5, slope
    assert gaps[-1] / (w2sq / 2) < 5e-3  # measured 2.75e-3


@pytest.mark.slow
def test_2d_agrees_with_the_main_solver():
    # chi = rho in 2D: the same J and flow as the main solver (DESIGN section 2); both
    # discretisations are second order in (h, dt). Measured (Newton, tol 1e-7; main with J at the
    # step midpoints): cost gaps -1.905e-2 (16x16 x 8) and -4.67e-3 (32x32 x 16; ratio 4.08).
    # Neither J is in its asymptotic range yet: main 3.05442, 3.03400, 3.04718 (64x64 x 32),
    # 3.05180 (128x128 x 64); direct 2.99623, 3.01983, 3.04362 (64x64 x 32, stopped by the 600 s
    # budget).
    # The largest density gap / peak between the two flows falls only 2.25x (5.0e-2, 2.2e-2):
    # at 16x16 (h = 0.5 against endpoint standard deviations 0.5 and 0.6) their errors partly
    # coincide. Each flow's own error falls at second order: against the main solver on
    # 64x64 x 32 (remapped to the coarse cells and times) direct 7.09e-2, 1.83e-2 (3.88x), main
    # 5.99e-2, 1.48e-2 (4.06x); against 128x128 x 64 the same to 2 digits. 32x32 x 16 takes
    # ~20 s of CPU for the direct solver, 64x64 x 32 ~10 s for the main solver.
    reference = solve_bridge(_problem_2d(64, 32), SolverOptions())
    assert reference.converged, reference.message
    gaps, dens, errors, own = [], [], [], []
    for n, k in ((16, 8), (32, 16)):
        problem = _problem_2d(n, k)
        main = solve_bridge(problem, SolverOptions())
        direct = solve_direct(problem, DirectOptions(tol=1e-7))
        assert direct.converged, direct.message
        ref = reference.grid.remap(reference.masses, problem.grid)[::32 // k]
        gaps.append(direct.cost / main.cost - 1)
        dens.append(np.abs(main.masses - direct.masses).max() / main.masses.max())
        errors.append(np.abs(direct.masses - ref).max() / ref.max())
        own.append(np.abs(main.masses - ref).max() / ref.max())
    assert -0.045 < gaps[0] < gaps[1] < 0, gaps
    assert 3.0 < gaps[0] / gaps[1] < 5.0, gaps
    assert errors[0] < 0.14 and errors[1] < errors[0] / 2.5, errors
    assert own[0] < 0.12 and own[1] < own[0] / 2.5, own
    # the two flows agree within the grid error (issue 5): measured gap 2.2e-2 against the
    # direct flow's own error 1.83e-2
    assert dens[1] < 2 * errors[1], (dens, errors)
