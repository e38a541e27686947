"""Three-dimensional grids: the solver, the result file, the figures and the run folder.

The reference is the exact linear-quadratic mean-field bridge (U = a|x|^2/2, W = kappa|z|^2/2,
Gaussian endpoints): the mean follows a linear-quadratic control problem and the centred part is
an Ornstein-Uhlenbeck Schrödinger bridge with a closed form (Bunne, Hsieh, Cuturi & Krause,
AISTATS 2023; Mallasto, Gerolin & Minh, Information Geometry 2022), implemented in
:mod:`mfbridge.solvers.linear_quadratic`. With diagonal covariances every part of that closed form
is diagonal, so the 3D bridge is three independent 1D bridges, one per axis.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from scipy.stats import norm

import mfbridge
from mfbridge import compose
from mfbridge.model.endpoints import Gaussian
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import Harmonic, HarmonicInteraction
from mfbridge.model.problem import BridgeProblem
from mfbridge.result import RESULT_FILE, BridgeResult
from mfbridge.runs.cli import run
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge
from mfbridge.solvers.linear_quadratic import lq_bridge
from tests.test_run_folder import PNG_MAGIC, _assert_same_result

M0, C0 = [-0.6, 0.3, 0.2], [0.16, 0.25, 0.2]
M1, C1 = [0.7, -0.3, -0.2], [0.36, 0.2, 0.3]
N, STEPS, KAPPA = 16, 8, 1.5
FIGURES_3D = ("density.png", "marginals.png", "moments.png", "convergence.png")


def _problem(axes: tuple[int, ...]) -> BridgeProblem:
    """The LQ case restricted to ``axes``: N cells per axis on [-3, 3] (h = 0.375), K = 8."""
    d = len(axes)
    return BridgeProblem(
        grid=Grid([-3.0] * d, [3.0] * d, [N] * d),
        initial=Gaussian([M0[a] for a in axes], [C0[a] for a in axes]),
        final=Gaussian([M1[a] for a in axes], [C1[a] for a in axes]),
        noise=1.0, horizon=1.0, steps=STEPS, confinement=Harmonic(1.0),
        interaction=HarmonicInteraction(KAPPA),
    )


@pytest.fixture(scope="module")
def solved_3d() -> BridgeResult:
    result = solve_bridge(_problem((0, 1, 2)), SolverOptions(route="operator"))
    assert result.converged, result.message
    return result


def test_3d_matches_exact_lq_bridge(solved_3d: BridgeResult) -> None:
    exact = lq_bridge(stiffness=1.0, strength=KAPPA, noise=1.0, horizon=1.0, mean0=M0, cov0=C0,
                      mean1=M1, cov1=C1, times=STEPS + 1)
    cost_err = abs(solved_3d.cost - exact.cost) / exact.cost
    mean_err = float(np.abs(solved_3d.mean - exact.mean).max())
    cov_err = float(np.abs(solved_3d.cov - exact.cov).max())
    # measured on 16^3 cells (h = 0.375), K = 8: 1.9e-2, 4.7e-3, 1.4e-2 (the coarse h and dt,
    # see tests/test_bridge_linear_quadratic.py for the orders); bounds about twice these
    assert cost_err < 4e-2
    assert mean_err < 1e-2
    assert cov_err < 3e-2
    # the off-diagonal covariances are zero in the closed form (diagonal endpoints)
    off = ~np.eye(3, dtype=bool)
    assert np.abs(solved_3d.cov[:, off]).max() < 1e-9


def test_3d_is_three_1d_bridges(solved_3d: BridgeResult) -> None:
    # Separable U and W, product endpoints: the reference chain is a product of 1D chains and
    # the bridge is their product, with cost the sum of the 1D costs (relative entropy of
    # product measures adds up: common practice, no source). The axis splitting is then exact.
    # Measured differences: 2.2e-11 (cost), 5.6e-11 (marginal densities), 5.1e-11 (means);
    # bound: the outer tolerance 1e-9 at which both solves stop.
    total = 0.0
    for a in range(3):
        line = solve_bridge(_problem((a,)), SolverOptions(route="operator"))
        assert line.converged, line.message
        total += line.cost
        assert np.abs(solved_3d.marginal(a) - line.density).max() < 1e-9
        assert np.abs(solved_3d.mean[:, a] - line.mean[:, 0]).max() < 1e-9
    assert abs(solved_3d.cost - total) < 1e-9


def test_3d_marginals(solved_3d: BridgeResult) -> None:
    h = solved_3d.grid.spacing
    for kept in ((0,), (1,), (2,), (0, 1), (0, 2), (1, 2), (0, 1, 2)):
        marginal = solved_3d.marginal(kept)
        assert marginal.shape == (STEPS + 1, *(N for _ in kept))
        total = marginal.reshape(STEPS + 1, -1).sum(axis=1) * np.prod([h[a] for a in kept])
        np.testing.assert_allclose(total, 1.0, atol=1e-12)
    np.testing.assert_array_equal(solved_3d.marginal((0, 1, 2)), solved_3d.density)
    # at t = 0 the axis marginals are the 1D Gaussians N(M0[a], C0[a]) (marginals of a
    # Gaussian with diagonal covariance, exact); measured max difference 1.2e-6 per unit length,
    # from the point rule's renormalisation on this coarse grid
    for a in range(3):
        exact = norm.pdf(solved_3d.grid.axes[a], M0[a], np.sqrt(C0[a]))
        assert np.abs(solved_3d.marginal(a)[0] - exact).max() < 3e-6
    with pytest.raises(mfbridge.InputError, match="marginal axes"):
        solved_3d.marginal((0, 3))


def test_3d_save_load_round_trip(solved_3d: BridgeResult, tmp_path: Path) -> None:
    solved_3d.save(tmp_path)
    _assert_same_result(solved_3d, mfbridge.load(tmp_path))
    with xr.open_dataset(tmp_path / RESULT_FILE) as ds:
        assert ds["density"].dims == ("t", "x0", "x1", "x2")
        assert ds["density"].shape == (STEPS + 1, N, N, N)
        assert ds["control"].dims == ("t", "x0", "x1", "x2", "dim")
        assert ds["cov"].shape == (STEPS + 1, 3, 3)
        for a in range(3):
            np.testing.assert_array_equal(ds[f"x{a}"].values, solved_3d.grid.axes[a])


def test_3d_figures(solved_3d: BridgeResult, tmp_path: Path) -> None:
    from mfbridge.runs.plotting import plot_result

    paths = plot_result(solved_3d, tmp_path)
    assert sorted(p.name for p in paths) == sorted(FIGURES_3D)
    for path in paths:
        assert path.is_file() and path.read_bytes()[:8] == PNG_MAGIC, path


def test_cli_run_3d(tmp_path: Path) -> None:
    # the 3D demo scenario on a coarser cube (the initial cloud is 1.04 cells wide at 18^3)
    cfg = compose(["grid=cube", "grid.shape=18", "endpoints=trap_cloud_3d", "steps=4"])
    result = run(cfg, tmp_path)
    assert result.grid.dim == 3
    for name in (RESULT_FILE, "summary.json", "config.yaml", *FIGURES_3D):
        assert (tmp_path / name).is_file(), name
    np.testing.assert_allclose(result.mean[0], [-0.8, 0.0, 0.4], atol=1e-2)
    np.testing.assert_allclose(result.mean[-1], [0.9, 0.0, -0.5], atol=1e-2)
    assert mfbridge.load(tmp_path).grid.shape == (18, 18, 18)


def test_sweep_density_panels_accept_3d(solved_3d: BridgeResult, tmp_path: Path) -> None:
    from mfbridge.runs.commands.collect import Row, plot_densities

    row = Row(run="a", params={}, status="converged", folder=tmp_path)
    path = plot_densities(tmp_path / "densities.png", [], [row], [solved_3d])
    assert path.read_bytes()[:8] == PNG_MAGIC
