"""Tests of mfbridge.model.grid: cell centres, spacing, volume, points, validation, Hydra
configs."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hydra import compose, initialize_config_dir
from hydra.utils import instantiate
from omegaconf import OmegaConf

from mfbridge.errors import InputError
from mfbridge.model.grid import Grid

CONF = Path(__file__).resolve().parents[1] / "conf"
# explicit boxes; options computed from other groups (e.g. span, fitted to the endpoints) are
# composed through the primary config in tests/test_config.py and tests/test_samples.py
GRID_FILES = sorted(p for p in (CONF / "grid").glob("*.yaml")
                    if "_target_: mfbridge.model.grid.Grid" in p.read_text())


def test_1d_scalar_arguments() -> None:
    grid = Grid(lower=-4, upper=4, shape=512)
    assert grid.lower == (-4.0,) and grid.upper == (4.0,) and grid.shape == (512,)
    assert isinstance(grid.lower[0], float) and isinstance(grid.shape[0], int)
    assert grid.dim == 1 and grid.size == 512
    # centres x_i = lower + (i + 1/2) h: compared with numpy.linspace (common practice, no source)
    h = 8.0 / 512
    assert grid.spacing == pytest.approx((h,), rel=1e-15)
    assert grid.cell_volume == pytest.approx(h, rel=1e-15)
    np.testing.assert_allclose(
        grid.axes[0], np.linspace(-4 + h / 2, 4 - h / 2, 512), rtol=0, atol=1e-14
    )
    assert grid.points.shape == (512, 1)
    np.testing.assert_array_equal(grid.points[:, 0], grid.axes[0])
    assert grid.extent == (8.0,)


def test_2d_points_ij_indexing_and_volume() -> None:
    grid = Grid(lower=[0.0, -1.0], upper=[2.0, 1.0], shape=[4, 5])
    assert grid.dim == 2 and grid.size == 20
    # h = extent / n by hand: (2/4, 2/5) (closed form)
    assert grid.spacing == pytest.approx((0.5, 0.4), rel=1e-15)
    assert grid.cell_volume == pytest.approx(0.2, rel=1e-15)
    np.testing.assert_allclose(grid.axes[0], [0.25, 0.75, 1.25, 1.75], atol=1e-15)
    np.testing.assert_allclose(grid.axes[1], [-0.8, -0.4, 0.0, 0.4, 0.8], atol=1e-15)
    pts = grid.points
    assert pts.shape == (4, 5, 2)
    # 'ij' indexing: points[i, j] = (x0[i], x1[j]); reference numpy.meshgrid (no source)
    x0, x1 = np.meshgrid(grid.axes[0], grid.axes[1], indexing="ij")
    np.testing.assert_array_equal(pts[..., 0], x0)
    np.testing.assert_array_equal(pts[..., 1], x1)
    assert pts[2, 3].tolist() == pytest.approx([1.25, 0.4])
    # faces lower + i h, last face exactly upper
    np.testing.assert_allclose(grid.edges[1], [-1.0, -0.6, -0.2, 0.2, 0.6, 1.0], atol=1e-15)
    assert grid.edges[0][-1] == 2.0


def test_3d_and_broadcast_of_scalars() -> None:
    grid = Grid(lower=-1, upper=1, shape=[3, 4, 5])
    assert grid.lower == (-1.0, -1.0, -1.0)
    assert grid.points.shape == (3, 4, 5, 3)
    # total volume of the cells equals the box volume 2³ (closed form)
    assert grid.cell_volume * grid.size == pytest.approx(8.0, rel=1e-14)


def test_equal_hashable_and_listconfig_input() -> None:
    a = Grid(lower=-4, upper=4, shape=64)
    b = Grid(lower=OmegaConf.create([-4.0]), upper=np.array([4.0]), shape=(64,))
    assert a == b and hash(a) == hash(b)
    c = Grid(lower=OmegaConf.create([-3, -3]), upper=[3, 3], shape=OmegaConf.create([8, 8]))
    assert c.shape == (8, 8) and c.lower == (-3.0, -3.0)


def test_contains() -> None:
    grid = Grid(lower=[0, 0], upper=[1, 2], shape=[4, 4])
    pts = np.array([[[0.5, 1.0], [1.0, 2.0]], [[1.1, 0.0], [0.5, -0.01]]])
    np.testing.assert_array_equal(grid.contains(pts), [[True, True], [False, False]])
    with pytest.raises(InputError, match=r"shape \(\.\.\., 2\).*got shape \(3,\)"):
        grid.contains(np.zeros(3))


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"lower": [0] * 4, "upper": [1] * 4, "shape": 4}, "1 to 3 axes, got 4"),
        ({"lower": 1, "upper": 1, "shape": 8}, "lower < upper.*axis 0"),
        ({"lower": [0, 2], "upper": [1, 1], "shape": 8}, "lower < upper.*axis 1"),
        ({"lower": 0, "upper": 1, "shape": 2}, "at least 3 cells.*axis 0 has 2"),
        ({"lower": 0, "upper": 1, "shape": 3.5}, r"shape\[0\] must be an integer"),
        ({"lower": 0, "upper": 1, "shape": True}, r"shape\[0\] must be an integer"),
        ({"lower": float("nan"), "upper": 1, "shape": 8}, "lower must be finite"),
        ({"lower": 0, "upper": float("inf"), "shape": 8}, "upper must be finite"),
        ({"lower": [0, 0], "upper": [1, 1, 1], "shape": 8}, "one entry per axis"),
        ({"lower": "zero", "upper": 1, "shape": 8}, "lower must be a number"),
    ],
)
def test_validation_errors(kwargs: dict, message: str) -> None:
    with pytest.raises(InputError, match=message):
        Grid(**kwargs)


@pytest.mark.parametrize("path", GRID_FILES, ids=lambda p: p.stem)
def test_hydra_grid_configs(path: Path) -> None:
    with initialize_config_dir(config_dir=str(CONF), version_base="1.3"):
        cfg = compose(config_name=f"grid/{path.stem}")
    grid = instantiate(cfg.grid)
    assert isinstance(grid, Grid)
    raw = OmegaConf.to_container(cfg.grid)
    dim = grid.dim
    # the instantiated grid carries exactly the YAML values (broadcast to dim)
    for key in ("lower", "upper", "shape"):
        expected = np.broadcast_to(np.asarray(raw[key], dtype=float), (dim,))
        np.testing.assert_array_equal(np.asarray(getattr(grid, key), dtype=float), expected)
    pts = grid.points
    assert pts.shape == (*grid.shape, dim)
    assert grid.contains(pts).all()
    # the cells tile the box: Σ cell volumes = Π extents (closed form)
    assert grid.cell_volume * grid.size == pytest.approx(np.prod(grid.extent), rel=1e-13)
