"""Tests of mfbridge.model.endpoints: densities, cell masses, moments, input checks, Hydra
configs."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hydra import compose, initialize_config_dir
from hydra.utils import instantiate
from omegaconf import OmegaConf
from scipy import integrate, stats

from mfbridge.errors import InputError
from mfbridge.model.endpoints import (
    Endpoint,
    Gaussian,
    GaussianMixture,
    UniformBox,
    check_masses,
    endpoint_masses,
)
from mfbridge.model.grid import Grid

CONF = Path(__file__).resolve().parents[1] / "conf"
# self-contained endpoint files; files with a defaults list (e.g. from_samples, which also picks
# a grid) are composed through the primary config in tests/test_config.py
ENDPOINT_FILES = sorted(p for p in (CONF / "endpoints").glob("*.yaml")
                        if "defaults:" not in p.read_text())


def discrete_moments(masses: np.ndarray, grid: Grid) -> tuple[np.ndarray, np.ndarray]:
    """Mean (d,) and covariance (d, d) of cell masses placed at the cell centres."""
    p = grid.points.reshape(-1, grid.dim)
    w = masses.reshape(-1)
    mean = w @ p
    centred = p - mean
    return mean, centred.T @ (centred * w[:, None])


# --------------------------------------------------------------------------- densities


def test_gaussian_density_matches_scipy() -> None:
    # reference: scipy.stats.multivariate_normal
    mean = [0.2, -0.3]
    cov = [[0.3, 0.1], [0.1, 0.2]]
    x = np.random.default_rng(0).standard_normal((3, 5, 2))
    ref = stats.multivariate_normal(mean, cov).pdf(x)
    np.testing.assert_allclose(Gaussian(mean, cov).density(x), ref, rtol=1e-13)
    one_d = Gaussian(-1.0, 0.16)
    np.testing.assert_allclose(
        one_d.density(x[..., :1]), stats.norm(-1.0, 0.4).pdf(x[..., 0]), rtol=1e-13
    )


def test_gaussian_cov_forms_are_equivalent() -> None:
    # scalar variance, diagonal and full matrix give the same Σ (definition; no source)
    a = Gaussian([1.0, 2.0], 0.5)
    b = Gaussian([1.0, 2.0], [0.5, 0.5])
    c = Gaussian([1.0, 2.0], [[0.5, 0.0], [0.0, 0.5]])
    for g in (b, c):
        np.testing.assert_array_equal(g.cov(), a.cov())
    # a scalar mean takes its dimension from cov
    assert Gaussian(0.0, [1.0, 2.0, 3.0]).dim == 3


def test_mixture_density_integrates_to_one() -> None:
    # reference: scipy.integrate.quad
    mix = GaussianMixture([0.5, 0.5], [-1.5, -0.5], [0.1, 0.1])
    total, _ = integrate.quad(lambda t: float(mix.density(np.array([t]))), -np.inf, np.inf)
    assert total == pytest.approx(1.0, abs=1e-10)
    # ρ = Σ w_k N_k, reference scipy.stats.norm
    x = np.linspace(-3, 1, 9)[:, None]
    ref = 0.5 * stats.norm(-1.5, np.sqrt(0.1)).pdf(x[:, 0]) + 0.5 * stats.norm(
        -0.5, np.sqrt(0.1)
    ).pdf(x[:, 0])
    np.testing.assert_allclose(mix.density(x), ref, rtol=1e-13)


def test_mixture_moments_closed_form() -> None:
    # mixture law: mean = Σ w μ, var = Σ w (σ² + μ²) - mean² (common practice, no source)
    # weights (1, 3) → (1/4, 3/4), means (-1, 1), variances (0.1, 0.3):
    # mean = 0.5, E X² = 0.25·1.1 + 0.75·1.3 = 1.25, var = 1.25 - 0.25 = 1.0
    mix = GaussianMixture([1.0, 3.0], [-1.0, 1.0], [0.1, 0.3])
    np.testing.assert_allclose(mix.weights, [0.25, 0.75])
    np.testing.assert_allclose(mix.mean(), [0.5], rtol=1e-15)
    np.testing.assert_allclose(mix.cov(), [[1.0]], rtol=1e-15)
    # 2D, two equal clusters at (1.5, ±1) with cov 0.15 I: cov = diag(0.15, 0.15 + 1)
    mix2 = GaussianMixture([0.5, 0.5], [[1.5, 1.0], [1.5, -1.0]], 0.15)
    np.testing.assert_allclose(mix2.mean(), [1.5, 0.0], atol=1e-15)
    np.testing.assert_allclose(mix2.cov(), [[0.15, 0.0], [0.0, 1.15]], atol=1e-15)


# --------------------------------------------------------------------------- masses


def test_gaussian_masses_reproduce_moments_1d() -> None:
    # exact moments (closed form) vs cell masses; measured error 3e-13 (mean) and 1e-12
    # (variance), far below Sheppard's h²/12 = 1.3e-4 that cell-averaged masses would add
    grid = Grid(-4, 4, 200)
    g = Gaussian(0.3, 0.25)
    m = g.masses(grid)
    assert m.shape == grid.shape and np.all(m >= 0) and m.sum() == pytest.approx(1.0, abs=1e-15)
    mean, cov = discrete_moments(m, grid)
    np.testing.assert_allclose(mean, g.mean(), atol=1e-11)
    np.testing.assert_allclose(cov, g.cov(), atol=1e-11)
    assert abs(cov[0, 0] - 0.25) < 1e-6 * grid.spacing[0] ** 2 / 12


def test_gaussian_masses_reproduce_moments_2d_correlated() -> None:
    # closed-form moments; measured error ≤ 3e-11 (mass beyond the walls at 7 std)
    grid = Grid([-4, -4], [4, 4], [96, 96])
    g = Gaussian([0.2, -0.3], [[0.3, 0.1], [0.1, 0.2]])
    mean, cov = discrete_moments(g.masses(grid), grid)
    np.testing.assert_allclose(mean, [0.2, -0.3], atol=1e-10)
    np.testing.assert_allclose(cov, [[0.3, 0.1], [0.1, 0.2]], atol=1e-10)


def test_mixture_masses_reproduce_moments() -> None:
    # mixture law (common practice, no source); measured error ≤ 5e-10 in 2D, 2e-12 in 1D
    line = Grid(-5, 5, 200)
    mix = GaussianMixture([1.0, 3.0], [-1.0, 1.0], [0.1, 0.3])
    mean, cov = discrete_moments(mix.masses(line), line)
    np.testing.assert_allclose(mean, [0.5], atol=1e-11)
    np.testing.assert_allclose(cov, [[1.0]], atol=1e-11)
    plane = Grid([-4, -4], [4, 4], [96, 96])
    mix2 = GaussianMixture(
        [0.2, 0.3, 0.5],
        [[1.0, 0.0], [-1.0, 0.5], [0.0, -1.0]],
        [0.2, [0.1, 0.3], [[0.3, -0.1], [-0.1, 0.2]]],
    )
    mean, cov = discrete_moments(mix2.masses(plane), plane)
    np.testing.assert_allclose(mean, mix2.mean(), atol=2e-9)
    np.testing.assert_allclose(cov, mix2.cov(), atol=2e-9)


def test_uniform_box_aligned_with_faces() -> None:
    # cells of width 0.1 on [0, 1]; box [0.2, 0.5] covers cells 2, 3, 4 fully (closed form)
    grid = Grid(0, 1, 10)
    m = UniformBox(0.2, 0.5).masses(grid)
    np.testing.assert_allclose(m, [0, 0, 1 / 3, 1 / 3, 1 / 3, 0, 0, 0, 0, 0], atol=1e-15)
    # aligned box: discrete mean and variance of the centres, by hand:
    # centres 0.25, 0.35, 0.45 → mean 0.35, variance 0.02/3 (closed form)
    mean, cov = discrete_moments(m, grid)
    assert mean[0] == pytest.approx(0.35, abs=1e-15)
    assert cov[0, 0] == pytest.approx(0.02 / 3, rel=1e-12)


def test_uniform_box_not_aligned_with_faces() -> None:
    # box [0.25, 0.57] of length 0.32: overlaps 0.05, 0.1, 0.1, 0.07 with cells 2..5
    grid = Grid(0, 1, 10)
    m = UniformBox(0.25, 0.57).masses(grid)
    expected = np.zeros(10)
    expected[2:6] = np.array([0.05, 0.1, 0.1, 0.07]) / 0.32
    np.testing.assert_allclose(m, expected, atol=1e-14)
    # 2D: product of the per-axis fractions; second axis [-1, 1] in 4 cells, box [-0.75, 0]
    plane = Grid([0, -1], [1, 1], [10, 4])
    m2 = UniformBox([0.25, -0.75], [0.57, 0.0]).masses(plane)
    along_y = np.array([0.25, 0.5, 0.0, 0.0]) / 0.75
    np.testing.assert_allclose(m2, np.outer(expected, along_y), atol=1e-14)
    assert m2.sum() == pytest.approx(1.0, abs=1e-15)


def test_uniform_box_moments_and_density() -> None:
    # mean (l + u)/2, variance (u - l)²/12 (closed form); density 1/volume inside
    box = UniformBox([-2.0, 0.0], [-0.5, 2.0])
    np.testing.assert_allclose(box.mean(), [-1.25, 1.0])
    np.testing.assert_allclose(box.cov(), np.diag([1.5**2 / 12, 4.0 / 12]))
    np.testing.assert_allclose(box.density(np.array([[-1.0, 1.0], [0.0, 1.0]])), [1 / 3, 0.0])


def test_mass_outside_the_box_is_an_error() -> None:
    grid = Grid(-4, 4, 256)
    with pytest.raises(
        InputError, match=r"% of the initial distribution lies outside the box \[-4, 4\]"
    ):
        Gaussian(3.5, 0.25).masses(grid, name="initial")
    # the same endpoint passes when a larger loss is allowed
    assert Gaussian(3.5, 0.25).masses(grid, max_outside=0.5).sum() == pytest.approx(1.0)
    with pytest.raises(InputError, match=r"final distribution UniformBox \[3, 5\] is not inside"):
        UniformBox(3.0, 5.0).masses(grid, name="final")
    with pytest.raises(InputError, match=r"max_outside must be a fraction in \[0, 1\)"):
        Gaussian(0.0, 1.0).masses(grid, max_outside=2.0)


def test_too_narrow_gaussian_is_an_error() -> None:
    grid = Grid(-4, 4, 64)  # h = 0.125
    with pytest.raises(InputError, match=r"initial distribution is too narrow.*0\.4 grid cells"):
        Gaussian(0.0, 0.05**2).masses(grid, name="initial")


def test_dimension_mismatch_is_an_error() -> None:
    with pytest.raises(InputError, match="is 2-dimensional but the grid is 1-dimensional"):
        Gaussian([0.0, 0.0], 1.0).masses(Grid(-4, 4, 32), name="initial")
    with pytest.raises(InputError, match="is 1-dimensional but the grid is 2-dimensional"):
        UniformBox(-1.0, 1.0).masses(Grid([-2, -2], [2, 2], [8, 8]), name="final")
    with pytest.raises(InputError, match=r"points must have shape \(\.\.\., 2\)"):
        Gaussian([0.0, 0.0], 1.0).density(np.zeros(3))


@pytest.mark.parametrize(
    ("build", "message"),
    [
        (lambda: Gaussian([0.0, 0.0], [[1.0, 2.0], [2.0, 1.0]]), "must be positive definite"),
        (lambda: Gaussian([0.0, 0.0], [[1.0, 0.2], [0.1, 1.0]]), "must be symmetric"),
        (lambda: Gaussian(0.0, -1.0), r"variance\) must be > 0"),
        (lambda: Gaussian([0.0, 0.0], [1.0, 1.0, 1.0]), "must have 2 entries"),
        (lambda: Gaussian([0.0, 0.0], np.eye(3)), r"must have shape \(2, 2\)"),
        (lambda: Gaussian(float("nan"), 1.0), "Gaussian mean must be finite"),
        (lambda: GaussianMixture([0.5, -0.5], [0.0, 1.0], 1.0), "positive numbers"),
        (lambda: GaussianMixture([0.5, 0.5], [0.0, 1.0, 2.0], 1.0), r"one entry per weight \(2\)"),
        (lambda: GaussianMixture([0.5, 0.5], [0.0, 1.0], [1.0, 1.0, 1.0]), "covs must have one"),
        (lambda: GaussianMixture([1.0, 1.0], [[0.0], [1.0]], [1.0, [1.0, 1.0]]), "component 1"),
        (lambda: UniformBox([0.0, 1.0], [1.0, 1.0]), "lower < upper on every axis"),
        (lambda: UniformBox([0.0, 0.0], [1.0, 1.0, 1.0]), "same number of coordinates"),
    ],
)
def test_endpoint_parameter_validation(build, message: str) -> None:
    with pytest.raises(InputError, match=message):
        build()


# --------------------------------------------------------------------------- user arrays


def test_check_masses_normalises_densities_and_masses() -> None:
    grid = Grid([0, 0], [1, 1], [4, 5])
    values = np.arange(1.0, 21.0).reshape(4, 5)
    out = check_masses(values, grid, "initial")
    np.testing.assert_allclose(out, values / 210.0, rtol=1e-15)  # Σ 1..20 = 210
    np.testing.assert_array_equal(check_masses(values.ravel(), grid, "initial"), out)
    np.testing.assert_array_equal(
        check_masses(OmegaConf.create(values.tolist()), grid, "initial"), out
    )
    assert out is not values and values[0, 0] == 1.0


@pytest.mark.parametrize(
    ("values", "message"),
    [
        (np.full((4, 5), np.nan), r"final contains 20 NaN value\(s\), first at index \(0, 0\)"),
        (np.where(np.eye(4, 5) > 0, np.inf, 1.0), r"final contains 4 infinite value\(s\)"),
        (-np.eye(4, 5) + 0.5, r"final contains 4 negative value\(s\) \(smallest -0.5\)"),
        (np.zeros((4, 5)), "final sums to zero"),
        (np.ones((3, 5)), r"must have shape \(4, 5\) \(the grid shape\).*got shape \(3, 5\)"),
        (np.ones(21), r"flat with 20 entries, got shape \(21,\)"),
        ("abc", r"must be a numeric array of shape \(4, 5\)"),
        (np.ones((4, 5)) * 1j, "must be real numbers"),
    ],
)
def test_check_masses_rejects_bad_input(values, message: str) -> None:
    with pytest.raises(InputError, match=message):
        check_masses(values, Grid([0, 0], [1, 1], [4, 5]), "final")


def test_endpoint_masses_dispatch() -> None:
    grid = Grid(-4, 4, 64)
    g = Gaussian(0.0, 1.0)
    np.testing.assert_array_equal(endpoint_masses(g, grid, "initial"), g.masses(grid))
    np.testing.assert_allclose(endpoint_masses(np.ones(64), grid, "final"), 1 / 64)


def test_describe_and_repr() -> None:
    assert Gaussian(1.0, 0.5).describe() == {"name": "gaussian", "mean": [1.0], "cov": [[0.5]]}
    assert UniformBox(-2, -0.5).describe() == {
        "name": "uniform_box",
        "lower": [-2.0],
        "upper": [-0.5],
    }
    assert repr(Gaussian(1.0, 0.5)) == "Gaussian(mean=[1.0], cov=[[0.5]])"
    assert GaussianMixture([1, 1], [0, 1], 0.2).describe()["weights"] == [0.5, 0.5]


# --------------------------------------------------------------------------- Hydra configs


def _grid_for(dim: int) -> Grid:
    name = {1: "line", 2: "plane", 3: "cube"}[dim]
    with initialize_config_dir(config_dir=str(CONF), version_base="1.3"):
        return instantiate(compose(config_name=f"grid/{name}").grid)


@pytest.mark.parametrize("path", ENDPOINT_FILES, ids=lambda p: p.stem)
def test_hydra_endpoint_configs(path: Path) -> None:
    with initialize_config_dir(config_dir=str(CONF), version_base="1.3"):
        cfg = compose(config_name=f"endpoints/{path.stem}")
    built = instantiate(cfg.endpoints)
    if "snapshots" in cfg.endpoints:  # a series: every snapshot's law, in time order
        assert set(cfg.endpoints) == {"snapshots"}
        times = [snapshot["time"] for snapshot in built["snapshots"]]
        assert times == sorted(times) and len(set(times)) == len(times) >= 2
        laws = [(f"snapshot {i}", s["law"]) for i, s in enumerate(built["snapshots"])]
    else:
        assert set(cfg.endpoints) == {"initial", "final"}
        laws = [("initial", built["initial"]), ("final", built["final"])]
    assert all(isinstance(law, Endpoint) for _, law in laws)
    assert len({law.dim for _, law in laws}) == 1
    grid = _grid_for(laws[0][1].dim)
    for name, endpoint in laws:
        m = endpoint.masses(grid, name=name)
        assert m.shape == grid.shape and np.all(m >= 0)
        assert m.sum() == pytest.approx(1.0, abs=1e-14)
        # discrete moments vs the exact ones (closed form); the only errors are the ≤ 0.1%
        # of mass cut by the walls and, for boxes, cell alignment: tolerance common practice
        mean, cov = discrete_moments(m, grid)
        np.testing.assert_allclose(mean, endpoint.mean(), atol=5e-3)
        np.testing.assert_allclose(cov, endpoint.cov(), atol=5e-3 * np.max(endpoint.cov()) + 1e-3)
