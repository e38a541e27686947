"""Endpoints from files of measured positions (mfbridge.model.samples): densities, boxes, units, and
a clear InputError for every malformed input."""

from __future__ import annotations

import math
import re
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from scipy.stats import gaussian_kde

import mfbridge
from mfbridge import BridgeProblem, Grid, InputError, compose
from mfbridge.model.endpoints import Gaussian
from mfbridge.model.samples import REPO_ROOT, Samples, auto_grid, box_from_samples
from mfbridge.numerics.entropic import UnderflowError
from mfbridge.runs.api import noise_from_config

DEMO_CSV = REPO_ROOT / "examples" / "data" / "chemotaxis_start.csv"
DEMO_NPZ = REPO_ROOT / "examples" / "data" / "chemotaxis_end.npz"


def _csv(path: Path, header: str, rows: np.ndarray) -> Path:
    body = "\n".join(",".join(repr(float(v)) for v in row) for row in np.atleast_2d(rows))
    path.write_text(f"{header}\n{body}\n")
    return path


@pytest.fixture
def cloud_1d() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(1)
    x = np.concatenate([rng.normal(-1.0, 0.3, 120), rng.normal(0.8, 0.5, 80)])
    w = rng.uniform(0.2, 1.0, x.size)
    return x, w


# ------------------------------------------------------------------ densities against scipy


@pytest.mark.parametrize("rule", ["scott", "silverman"])
def test_kde_masses_match_scipy_1d(tmp_path: Path, cloud_1d: Any, rule: str) -> None:
    """Weighted KDE cell masses against scipy.stats.gaussian_kde (Virtanen et al., "SciPy 1.0:
    fundamental algorithms for scientific computing in Python", Nature Methods 2020; bandwidth
    rules of Scott, "Multivariate Density Estimation", 1992, and Silverman, "Density Estimation
    for Statistics and Data Analysis", 1986), evaluated and integrated on the grid."""
    x, w = cloud_1d
    path = _csv(tmp_path / "s.csv", "x,w", np.column_stack([x, w]))
    grid = Grid(-5.0, 5.0, 400)
    samples = Samples(path, weights="w", bandwidth=rule)
    kde = gaussian_kde(x, bw_method=rule, weights=w)
    np.testing.assert_allclose(samples.kernel_cov(), kde.covariance, rtol=1e-12)
    ref = kde(grid.axes[0]) * grid.cell_volume
    np.testing.assert_allclose(samples.masses(grid), ref / ref.sum(), rtol=1e-9, atol=1e-15)
    # the point rule's total inside the box equals the KDE integrated over the box
    inside = float(np.sum(samples.density(grid.points)) * grid.cell_volume)
    assert inside == pytest.approx(kde.integrate_box_1d(-5.0, 5.0), abs=1e-9)
    # cell by cell, the point rule matches the exact cell integrals to O(h^2)
    exact = np.array([kde.integrate_box_1d(a, b) for a, b in
                      zip(grid.edges[0][:-1], grid.edges[0][1:], strict=True)])
    assert np.max(np.abs(samples.masses(grid) - exact)) < 1e-4


def test_kde_masses_match_scipy_2d_correlated(tmp_path: Path) -> None:
    """2D, correlated data, full kernel covariance: scipy.stats.gaussian_kde (Virtanen et al.,
    Nature Methods 2020) on the grid's centres."""
    rng = np.random.default_rng(2)
    pts = rng.multivariate_normal([0.3, -0.2], [[0.5, 0.3], [0.3, 0.4]], 300)
    np.save(tmp_path / "p.npy", pts)
    grid = Grid((-4.0, -4.0), (4.0, 4.0), (100, 80))
    samples = Samples(tmp_path / "p.npy", bandwidth="silverman")
    kde = gaussian_kde(pts.T, bw_method="silverman")
    ref = kde(grid.points.reshape(-1, 2).T).reshape(grid.shape)
    np.testing.assert_allclose(samples.masses(grid), ref / ref.sum(), rtol=1e-9, atol=1e-15)


def test_given_bandwidth_is_the_kernel_sd(tmp_path: Path, cloud_1d: Any) -> None:
    """A number is the kernel's standard deviation in the data's unit: scipy's factor
    b / std (Virtanen et al., Nature Methods 2020, gaussian_kde's bw_method scalar)."""
    x, _ = cloud_1d
    np.save(tmp_path / "x.npy", x)
    grid = Grid(-5.0, 5.0, 300)
    samples = Samples(tmp_path / "x.npy", bandwidth=0.2)
    kde = gaussian_kde(x, bw_method=0.2 / np.std(x, ddof=1))
    ref = kde(grid.axes[0])
    np.testing.assert_allclose(samples.masses(grid), ref / ref.sum(), rtol=1e-9, atol=1e-15)
    assert samples.kernel_cov() == pytest.approx(np.array([[0.04]]))


def test_histogram_masses_are_exact(tmp_path: Path) -> None:
    """Histogram masses equal numpy.histogramdd on the grid's faces with the same weights
    (common practice, no source); samples on the upper wall go to the last cell."""
    rng = np.random.default_rng(3)
    pts = rng.uniform(-2.0, 2.0, (500, 2))
    pts[0] = [2.0, 2.0]
    w = rng.uniform(0.0, 3.0, 500)
    np.savez(tmp_path / "h.npz", positions=pts, w=w)
    grid = Grid((-2.0, -2.0), (2.0, 2.0), (17, 9))
    m = Samples(tmp_path / "h.npz", weights="w", method="histogram").masses(grid)
    ref, _ = np.histogramdd(pts, bins=grid.edges, weights=w)
    np.testing.assert_allclose(m, ref / ref.sum(), rtol=1e-13, atol=0)
    assert m[-1, -1] > 0


def test_weights_act_as_repeats(tmp_path: Path) -> None:
    """Integer weights are the same as repeated samples (common practice, no source): equal
    moments, histogram and effective size; moments of the weighted empirical law against
    numpy.average and numpy.cov(bias=True)."""
    x = np.array([[-1.0, 0.2], [0.5, 0.1], [1.5, -0.7]])
    w = np.array([1.0, 3.0, 2.0])
    np.savez(tmp_path / "w.npz", positions=x, weights=w)
    np.save(tmp_path / "r.npy", np.repeat(x, w.astype(int), axis=0))
    weighted = Samples(tmp_path / "w.npz", weights="weights", method="histogram")
    repeated = Samples(tmp_path / "r.npy", method="histogram")
    np.testing.assert_allclose(weighted.mean(), repeated.mean(), rtol=1e-14)
    np.testing.assert_allclose(weighted.cov(), repeated.cov(), rtol=1e-13)
    np.testing.assert_allclose(weighted.mean(), np.average(x, axis=0, weights=w), rtol=1e-14)
    np.testing.assert_allclose(weighted.cov(), np.cov(x.T, aweights=w, bias=True), rtol=1e-13)
    grid = Grid((-2.0, -1.0), (2.0, 1.0), (8, 4))
    np.testing.assert_allclose(weighted.masses(grid), repeated.masses(grid), rtol=1e-14)
    assert weighted.data.effective_size == pytest.approx(36.0 / 14.0)


def test_every_format_reads_the_same_samples(tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    pts, w = rng.normal(0.0, 0.6, (50, 2)), rng.uniform(0.5, 1.0, 50)
    _csv(tmp_path / "a.csv", "# comment line\nx,y,w", np.column_stack([pts, w]))
    (tmp_path / "a.tsv").write_text((tmp_path / "a.csv").read_text().replace(",", "\t"))
    np.savez(tmp_path / "a.npz", positions=pts, w=w)
    pq.write_table(pa.table({"x": pts[:, 0], "y": pts[:, 1], "w": w}), tmp_path / "a.parquet")
    grid = Grid((-4.0, -4.0), (4.0, 4.0), 40)
    ref = Samples(tmp_path / "a.npz", weights="w").masses(grid)
    for name in ("a.csv", "a.tsv", "a.parquet"):
        got = Samples(tmp_path / name, columns=["x", "y"], weights="w").masses(grid)
        np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-18)
    np.save(tmp_path / "b.npy", np.column_stack([w, pts]))
    np.testing.assert_allclose(
        Samples(tmp_path / "b.npy", columns=[1, 2]).mean(), pts.mean(axis=0), rtol=1e-13)


def test_describe_names_the_file_and_its_hash() -> None:
    import hashlib

    info = Samples(DEMO_CSV, columns=["x_mm", "y_mm"], weights="confidence").describe()
    assert info["sha256"] == hashlib.sha256(DEMO_CSV.read_bytes()).hexdigest()
    assert info["path"] == str(DEMO_CSV) and info["samples"] == 500
    assert info["columns"] == ["x_mm", "y_mm"]


def test_relative_paths_fall_back_to_the_repository(tmp_path: Path,
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    assert Samples("examples/data/chemotaxis_end.npz").path == DEMO_NPZ
    (tmp_path / "examples" / "data").mkdir(parents=True)
    np.save(tmp_path / "examples" / "data" / "mine.npy", np.arange(5.0))
    assert Samples("examples/data/mine.npy").path == tmp_path / "examples/data/mine.npy"


# ------------------------------------------------------------------ automatic box


def test_box_from_samples_formula(tmp_path: Path) -> None:
    """The box is the data range widened by 5 kernel sds and by margin x extent."""
    np.save(tmp_path / "a.npy", np.array([0.0, 1.0, 2.0]))
    np.save(tmp_path / "b.npy", np.array([3.0, 4.0]))
    a = Samples(tmp_path / "a.npy", bandwidth=0.1)
    b = Samples(tmp_path / "b.npy", bandwidth=0.2)
    lower, upper = box_from_samples(a, b, margin=0.1)
    extent = (4.0 + 1.0) - (0.0 - 0.5)
    assert lower == pytest.approx((-0.5 - 0.1 * extent,))
    assert upper == pytest.approx((5.0 + 0.1 * extent,))
    grid = auto_grid(a, b, margin=0.1)
    assert grid.spacing[0] == pytest.approx(0.1 / 1.5, rel=0.02)
    assert b.masses(grid).sum() == pytest.approx(1.0)


def _snapshots(tmp_path: Path, final_sd: float, outlier: float | None = None
               ) -> tuple[Path, Path]:
    rng = np.random.default_rng(7)
    a = rng.normal(-1.0, 0.4, 300)
    if outlier is not None:
        a[17] = outlier
    return (_csv(tmp_path / "a.csv", "x", a[:, None]),
            _csv(tmp_path / "b.csv", "x", rng.normal(1.2, final_sd, 300)[:, None]))


def test_an_outlier_is_named_not_blamed_on_the_bandwidth(tmp_path: Path) -> None:
    """Before: one sample at x = 1e6 among 300 was blamed on 'the bandwidth of the final
    samples ... spacing 6477.8' with the advice of a finer grid (the automatic grid had capped
    its 1.1e7 cells at 256 without a word). Now the sample is named with its distance from the
    median in standard deviations, by the robust estimate 1.4826 x MAD, here against scipy's
    median_abs_deviation(scale='normal') (Rousseeuw & Croux, JASA 88, 1993)."""
    from scipy.stats import median_abs_deviation

    a_path, b_path = _snapshots(tmp_path, 0.3, outlier=1e6)
    a = np.loadtxt(a_path, skiprows=1)
    z = (1e6 - np.median(a)) / median_abs_deviation(a, scale="normal")
    named = (rf"1 outlying initial sample in sample file a.csv: line 19 \(x = 1e\+06, "
             rf"{re.escape(f'{z:.3g}')} standard deviations from the median\)\. Drop the "
             r"outlying samples from the file or clip them")
    with pytest.raises(InputError, match=named):
        auto_grid(Samples(a_path), Samples(b_path))
    overrides = ["endpoints=samples", f"endpoints.initial.path={a_path}",
                 f"endpoints.final.path={b_path}"]
    for extra in ([], ["grid.shape=200"]):  # cells chosen or given: the same diagnosis
        with pytest.raises(InputError, match=named):
            mfbridge.build_problem(compose(overrides + extra))
    # the same snapshot without the outlier builds its box and grid
    clean = _snapshots(tmp_path, 0.3)
    assert auto_grid(Samples(clean[0]), Samples(clean[1])).shape[0] < 256


def test_a_capped_cell_count_is_never_silent(tmp_path: Path) -> None:
    """Before: the automatic grid clipped its cell count to 256 without a word. A final
    snapshot of standard deviation 0.1 (kernel sd 0.0295) on the fitted box [-3.79, 2.50] wants
    ceil(6.29 x 1.5 / 0.0295) = 321 cells (measured): warned, 256 kept, where a cell is
    6.29 / 256 = 0.0246 and the kernel 1.2 cells wide; one of 0.001 wants 29201 cells (measured):
    refused with the count to give."""
    a_path, b_path = _snapshots(tmp_path, 0.1)
    with pytest.warns(mfbridge.ResolutionWarning, match=r"stops at 256 cells per axis: .* "
                      r"1\.2 cells wide instead of 1\.5; give grid\.shape=321 "):
        grid = auto_grid(Samples(a_path), Samples(b_path))
    assert grid.shape == (256,)
    a_path, b_path = _snapshots(tmp_path, 0.001)
    with pytest.raises(InputError, match=r"the automatic grid stops at 256 cells per axis, "
                       r"where the narrowest kernel .* need grid\.shape=\d{5} \(mind the memory"):
        auto_grid(Samples(a_path), Samples(b_path))


def test_demo_config_builds_on_the_fitted_box() -> None:
    cfg = compose(["endpoints=from_samples"])
    problem = mfbridge.build_problem(cfg)
    assert problem.grid.dim == 2
    endpoints = [Samples(DEMO_CSV, columns=["x_mm", "y_mm"]), Samples(DEMO_NPZ)]
    for e in endpoints:
        assert np.all(problem.grid.contains(e.data.positions))
    # a grid chosen on the command line wins over the one the option picks
    assert mfbridge.build_problem(compose(["endpoints=from_samples", "grid=plane"])
                                  ).grid.lower == (-3.0, -3.0)


def test_demo_bridge_solves_and_states_units_and_meaning() -> None:
    cfg = compose(["endpoints=from_samples", "endpoints.initial.bandwidth=0.5",
                   "endpoints.final.bandwidth=0.5", "grid.shape=[28,24]", "steps=6",
                   "noise=null", "diffusion=0.125", "horizon=1.5"])
    result = mfbridge.solve(cfg)
    assert result.converged and result.noise == pytest.approx(0.5)
    summary = result.summary()
    assert summary["noise_input"].startswith("diffusion coefficient D = 0.125")
    assert "not an observed trajectory" in summary["interpretation"]
    assert "sweeping" in summary["interpretation"]
    assert "length" in summary["units"]


# ------------------------------------------------------------------ noise as D


def test_noise_from_diffusion() -> None:
    assert noise_from_config(None, 0.125) == pytest.approx(0.5)
    assert noise_from_config(0.5, 0.125) == pytest.approx(0.5)
    assert noise_from_config(0.8, None) == 0.8


# ------------------------------------------------------------------ underflow advice


def test_far_endpoints_end_with_advice() -> None:
    cfg = compose(["endpoints=gaussians", "endpoints.initial.mean=-3.5",
                   "endpoints.final.mean=3.5", "endpoints.initial.cov=0.01",
                   "endpoints.final.cov=0.01", "noise=0.1", "grid.shape=96", "steps=8",
                   "solver.propagation=rational"])
    with pytest.raises(UnderflowError) as info:
        mfbridge.solve(cfg)
    message = str(info.value)
    for advice in ("solver.propagation=log", "longer horizon", "larger box"):
        assert advice in message
    assert isinstance(info.value, mfbridge.MFBridgeError)


# ------------------------------------------------------------------ malformed inputs

GRID_1D = Grid(-3.0, 3.0, 60)
GRID_2D = Grid((-3.0, -3.0), (3.0, 3.0), 30)


def _write(tmp: Path, name: str, content: str | bytes) -> Path:
    path = tmp / name
    if isinstance(content, bytes):
        path.write_bytes(content)
    else:
        path.write_text(content)
    return path


def _npy(tmp: Path, name: str, array: Any) -> Path:
    np.save(tmp / name, array, allow_pickle=True)
    return tmp / name


def _use(path: Path, **kw: Any) -> Callable[[], Any]:
    """Build Samples and use it on the 1D or 2D grid (masses, mean, kernel)."""
    def run() -> Any:
        s = Samples(path, **kw)
        grid = GRID_1D if s.dim == 1 else GRID_2D
        return s.masses(grid, name="initial")
    return run


GOOD_2D = "x,y\n0.1,0.2\n-0.3,0.5\n0.7,-0.4\n0.2,0.9\n"


def _parquet(tmp: Path, name: str, table: Any) -> Path:
    pq.write_table(table, tmp / name)
    return tmp / name


CORPUS: list[tuple[str, Callable[[Path], Callable[[], Any]], str]] = [
    ("missing-file", lambda t: _use(t / "nope.csv"), r"'.*nope.csv' does not exist"),
    ("directory", lambda t: _use(t), r"is a directory"),
    ("empty-path", lambda t: lambda: Samples(""), r"path is empty"),
    ("path-not-text", lambda t: lambda: Samples(123), r"path must be a string naming a file"),
    ("bad-extension", lambda t: _use(_write(t, "a.xlsx", GOOD_2D)), r"extension '.xlsx'"),
    ("empty-csv", lambda t: _use(_write(t, "a.csv", "")), r"is empty: expected a header row"),
    ("header-only", lambda t: _use(_write(t, "a.csv", "x,y\n")), r"but no data rows"),
    ("no-header", lambda t: _use(_write(t, "a.csv", "0.1,0.2\n0.3,0.4\n")),
     r"has no header row"),
    ("empty-column-name", lambda t: _use(_write(t, "a.csv", "x,\n1,2\n")),
     r"empty column name"),
    ("duplicate-header", lambda t: _use(_write(t, "a.csv", "x,x\n1,2\n")),
     r"duplicate column names"),
    ("missing-column", lambda t: _use(_write(t, "a.csv", GOOD_2D), columns=["x", "z"]),
     r"has no column 'z'; its columns are: x, y"),
    ("missing-weights-column", lambda t: _use(_write(t, "a.csv", GOOD_2D), weights="w"),
     r"has no weights column 'w'"),
    ("text-in-number", lambda t: _use(_write(t, "a.csv", "x,y\n1,abc\n")),
     r"line 2, column 'y' holds 'abc', which is not a number"),
    ("empty-field", lambda t: _use(_write(t, "a.csv", "x,y\n1,\n")),
     r"column 'y' is empty \(a missing value\)"),
    ("ragged-row", lambda t: _use(_write(t, "a.csv", "x,y\n1,2\n3\n")),
     r"line 3 has 1 field\(s\) but the header has 2"),
    ("nan-position", lambda t: _use(_write(t, "a.csv", "x,y\n1,2\nnan,1\n")),
     r"1 NaN position value\(s\), first in column 'x' at line 3"),
    ("inf-position", lambda t: _use(_write(t, "a.csv", "x,y\n1,2\n1,-inf\n")),
     r"1 infinite position value\(s\)"),
    ("nan-weight", lambda t: _use(_write(t, "a.csv", "x,w\n1,nan\n2,1\n"), weights="w"),
     r"1 NaN weight\(s\), first at line 2"),
    ("inf-weight", lambda t: _use(_write(t, "a.csv", "x,w\n1,1\n2,inf\n"), weights="w"),
     r"1 infinite weight\(s\)"),
    ("negative-weight", lambda t: _use(_write(t, "a.csv", "x,w\n1,1\n2,-0.5\n"), weights="w"),
     r"1 negative weight\(s\), first -0.5 at line 3"),
    ("zero-total-weight", lambda t: _use(_write(t, "a.csv", "x,w\n1,0\n2,0\n"), weights="w"),
     r"the weights sum to zero \(all 2 are 0\)"),
    ("not-utf8", lambda t: _use(_write(t, "a.csv", b"x,y\n\xff\xfe,1\n")),
     r"is not a UTF-8 text file"),
    ("nul-bytes", lambda t: _use(_write(t, "a.csv", "x,y\n1,\x002\n")), r"contains NUL bytes"),
    ("too-many-columns", lambda t: _use(_write(t, "a.csv", "a,b,c,d\n1,2,3,4\n")),
     r"has 4 candidate position columns \(a, b, c, d\)"),
    ("columns-as-indices-in-csv", lambda t: _use(_write(t, "a.csv", GOOD_2D), columns=[0, 1]),
     r"must name columns by their header names"),
    ("column-twice", lambda t: _use(_write(t, "a.csv", GOOD_2D), columns=["x", "x"]),
     r"names a column twice"),
    ("weights-as-position", lambda t: _use(_write(t, "a.csv", GOOD_2D), columns=["x", "y"],
                                           weights="y"),
     r"given both as a position and as the weights"),
    ("huge-value", lambda t: _use(_write(t, "a.csv", "x\n1e200\n0\n")),
     r"holds 1e\+200, beyond ±1e\+100"),
    ("object-array", lambda t: _use(_npy(t, "a.npy", np.array([{"x": 1}], dtype=object))),
     r"holds Python objects"),
    ("text-array", lambda t: _use(_npy(t, "a.npy", np.array(["1", "2"]))),
     r"array has dtype <U1, expected numbers"),
    ("complex-array", lambda t: _use(_npy(t, "a.npy", np.array([1 + 2j, 3j]))),
     r"complex numbers"),
    ("bool-array", lambda t: _use(_npy(t, "a.npy", np.array([True, False]))), r"booleans"),
    ("3d-array", lambda t: _use(_npy(t, "a.npy", np.zeros((2, 3, 4)))),
     r"has shape \(2, 3, 4\), expected \(N,\) or \(N, d\)"),
    ("scalar-array", lambda t: _use(_npy(t, "a.npy", np.float64(1.0))), r"is a single number"),
    ("no-samples", lambda t: _use(_npy(t, "a.npy", np.zeros((0, 2)))), r"holds no samples"),
    ("transposed-array", lambda t: _use(_npy(t, "a.npy", np.zeros((2, 7)))),
     r"7 coordinates per sample.*transposed"),
    ("column-index-out-of-range", lambda t: _use(_npy(t, "a.npy", np.zeros((4, 2))),
                                                 columns=[0, 5]),
     r"columns \[5\] out of range"),
    ("weights-for-npy", lambda t: _use(_npy(t, "a.npy", np.zeros(4)), weights="w"),
     r"needs an .npz file with a weights array"),
    ("garbage-npy", lambda t: _use(_write(t, "a.npy", b"hello world")),
     r"does not start with the NumPy or zip signature"),
    ("truncated-npy", lambda t: _use(_write(t, "a.npy", _npy(t, "b.npy", np.arange(50.0))
                                            .read_bytes()[:100])),
     r"damaged or truncated"),
    ("empty-npz", lambda t: (np.savez(t / "a.npz"), _use(t / "a.npz"))[1],
     r"empty .npz archive"),
    ("missing-key", lambda t: (np.savez(t / "a.npz", x=np.zeros(3)), _use(t / "a.npz",
                                                                         key="pos"))[1],
     r"has no array 'pos' \(key\); its arrays are: x"),
    ("ambiguous-npz", lambda t: (np.savez(t / "a.npz", a=np.zeros(3), b=np.zeros(3)),
                                 _use(t / "a.npz"))[1],
     r"say which one holds the positions with key"),
    ("missing-weights-array", lambda t: (np.savez(t / "a.npz", positions=np.zeros(3)),
                                         _use(t / "a.npz", weights="w"))[1],
     r"has no array 'w' \(weights\)"),
    ("weights-wrong-length", lambda t: (np.savez(t / "a.npz", positions=np.zeros(3),
                                                 w=np.ones(4)),
                                        _use(t / "a.npz", weights="w"))[1],
     r"has shape \(4,\), expected \(3,\): one weight per sample"),
    ("key-for-csv", lambda t: _use(_write(t, "a.csv", GOOD_2D), key="positions"),
     r"selects an array in an .npz file"),
    ("npy-named-npz", lambda t: _use(_write(t, "a.npz", _npy(t, "b.npy", np.zeros(3))
                                            .read_bytes())),
     r"holds a single .npy array but is named .npz"),
    ("npz-named-npy", lambda t: (np.savez(t / "b.npz", x=np.zeros(3)),
                                 _use(_write(t, "a.npy", (t / "b.npz").read_bytes())))[1],
     r"is named .npy: rename it to .npz"),
    ("garbage-parquet", lambda t: _use(_write(t, "a.parquet", b"not parquet at all")),
     r"is not a readable Parquet file"),
    ("text-parquet-column", lambda t: _use(_parquet(t, "a.parquet", pa.table({"x": ["a"]}))),
     r"column 'x' has type string, expected numbers"),
    ("null-in-parquet", lambda t: _use(_parquet(t, "a.parquet", pa.table({"x": [1.0, None]}))),
     r"1 missing \(null\) value\(s\), first in row 1"),
    ("parquet-no-rows", lambda t: _use(_parquet(t, "a.parquet",
                                                pa.table({"x": pa.array([], pa.float64())}))),
     r"but no rows"),
    ("unknown-bandwidth", lambda t: _use(_write(t, "a.csv", GOOD_2D), bandwidth="wide"),
     r"bandwidth must be 'scott', 'silverman' or a positive length, got 'wide'"),
    ("negative-bandwidth", lambda t: _use(_write(t, "a.csv", GOOD_2D), bandwidth=-0.1),
     r"bandwidth given as a length must be positive and finite"),
    ("unknown-method", lambda t: _use(_write(t, "a.csv", GOOD_2D), method="spline"),
     r"method must be 'kde' or 'histogram'"),
    ("weights-not-a-name", lambda t: _use(_write(t, "a.csv", GOOD_2D), weights=3),
     r"weights must be the name of a column or array"),
    ("key-not-a-name", lambda t: (np.savez(t / "a.npz", x=np.zeros(3)),
                                  _use(t / "a.npz", key=1))[1],
     r"key must be the name of an array"),
    ("single-sample-scott", lambda t: _use(_write(t, "a.csv", "x\n0.5\n")),
     r"needs at least two samples with positive weight"),
    ("no-spread", lambda t: _use(_write(t, "a.csv", "x,y\n0.5,1\n0.5,2\n0.5,3\n")),
     r"all samples share the same 'x'"),
    ("collinear", lambda t: _use(_write(t, "a.csv", "x,y\n0,0\n1,1\n2,2\n")),
     r"the samples lie on a line"),
    ("outside-the-box", lambda t: _use(_write(t, "a.csv", "x\n0\n1\n7.5\n")),
     r"1 of the 3 initial samples .* lie outside the box \[-3, 3\], first at line 4"),
    ("bandwidth-too-small", lambda t: _use(_write(t, "a.csv", "x\n0\n1\n"), bandwidth=0.01),
     r"is too small for the grid: the kernel's smallest standard deviation is 0.1 grid cells"),
    ("kde-spills-outside", lambda t: _use(_write(t, "a.csv", "x\n2.9\n2.95\n"), bandwidth=0.5),
     r"of the kernel density of the initial samples .* lies outside the box"),
    ("grid-dimension", lambda t: lambda: Samples(_write(t, "a.csv", GOOD_2D)).masses(
        GRID_1D, name="final"),
     r"the final samples .* are 2-dimensional but the grid is 1-dimensional"),
    ("snapshot-dimensions", lambda t: lambda: box_from_samples(
        Samples(_write(t, "a.csv", GOOD_2D)), Samples(_write(t, "b.csv", "x\n1\n2\n")), 0.2),
     r"dimension mismatch between the two snapshots: the initial one is 2D"),
    ("negative-margin", lambda t: lambda: box_from_samples(
        Samples(_write(t, "a.csv", GOOD_2D)), Samples(_write(t, "a.csv", GOOD_2D)), -1),
     r"margin must be a fraction ≥ 0"),
    ("flat-histogram-box", lambda t: lambda: auto_grid(
        Samples(_write(t, "a.csv", "x\n1\n1\n"), method="histogram"),
        Samples(_write(t, "a.csv", "x\n1\n1\n"), method="histogram")),
     r"cannot fit a box: every sample has the same coordinate 1"),
    ("negative-diffusion", lambda t: lambda: noise_from_config(None, -1.0),
     r"diffusion D must be a positive finite number"),
    ("noise-and-diffusion-disagree", lambda t: lambda: noise_from_config(0.8, 0.125),
     r"noise σ = 0.8 and diffusion D = 0.125 \(σ = √\(2D\) = 0.5\) are both given and "
     r"disagree"),
    ("no-noise-at-all", lambda t: lambda: noise_from_config(None, None), r"both are null"),
]


@pytest.mark.parametrize(("case", "make", "match"), CORPUS, ids=[c[0] for c in CORPUS])
def test_malformed_input_is_refused_clearly(tmp_path: Path, case: str,
                                            make: Callable[[Path], Callable[[], Any]],
                                            match: str) -> None:
    run = make(tmp_path)
    with pytest.raises(InputError, match=match):
        run()


def test_corpus_messages_are_all_different(tmp_path: Path) -> None:
    """Every malformed input of the corpus gets its own message (common practice, no source)."""
    assert len(CORPUS) >= 30
    messages: dict[str, str] = {}
    for case, make, _ in CORPUS:
        folder = tmp_path / case
        folder.mkdir()
        with pytest.raises(InputError) as info:
            make(folder)()
        text = str(info.value).replace(str(folder), "<tmp>")
        assert text not in messages.values(), f"{case} repeats the message of another case"
        messages[case] = text
    assert len(set(messages.values())) == len(CORPUS)


def test_samples_endpoints_through_the_problem(tmp_path: Path) -> None:
    """The same checks reached through BridgeProblem name the endpoint."""
    path = _write(tmp_path, "a.csv", "x\n0\n1\n9\n")
    with pytest.raises(InputError, match=r"of the 3 final samples"):
        BridgeProblem(grid=GRID_1D, initial=Gaussian(0.0, 0.5), final=Samples(path), noise=1.0)
    cfg = compose(["endpoints=from_samples", "grid=line"])
    with pytest.raises(InputError, match=r"are 2-dimensional but the grid is 1-dimensional"):
        mfbridge.build_problem(cfg)
    cfg = compose(["endpoints=from_samples", "+endpoints.final.columns=[0]"])
    with pytest.raises(InputError, match=r"dimension mismatch between the two snapshots"):
        mfbridge.build_problem(cfg)
    with pytest.raises(InputError, match=r"are both given and disagree"):
        mfbridge.build_problem(compose(["diffusion=1.0"]))


# ------------------------------------------------------------------ property-based


def _try(path: Path, **kw: Any) -> None:
    """Samples from ``path``: either works on a grid or raises InputError, nothing else."""
    try:
        s = Samples(path, **kw)
        grid = GRID_1D if s.dim == 1 else GRID_2D if s.dim == 2 else Grid(-3.0, 3.0, (8, 8, 8))
        s.masses(grid)
        s.describe()
    except InputError as exc:
        assert str(exc) and "Traceback" not in str(exc)


CSV_TOKENS = st.sampled_from([*"0123456789.,-+eE xyw#\"\t", "\n", "nan", "inf", "1e400",
                              "\x00", "é", ",,", "1e99", "-0"])
CSV_TEXT = st.lists(CSV_TOKENS, max_size=60).map("".join)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(text=CSV_TEXT, weights=st.sampled_from([None, "w", "x"]),
       method=st.sampled_from(["kde", "histogram"]),
       bandwidth=st.sampled_from(["scott", "silverman", 0.3, 1e-9]))
def test_property_malformed_csv_gives_input_error(text: str, weights: str | None, method: str,
                                                  bandwidth: Any) -> None:
    """Property (Hypothesis: MacIver, Hatfield-Dodds et al., "Hypothesis: a new approach to
    property-based testing", JOSS 2019): any CSV text either gives masses or an InputError —
    never an exception from inside numpy, scipy or the csv module."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "s.csv"
        path.write_text(f"x,w\n{text}" if text[:1] != "#" else text, encoding="utf-8")
        _try(path, weights=weights, method=method, bandwidth=bandwidth)


ARRAYS = hnp.arrays(
    dtype=st.sampled_from([np.float64, np.float32, np.int64, np.uint8, np.complex128,
                           np.bool_, np.dtype("<U3")]),
    shape=hnp.array_shapes(min_dims=0, max_dims=3, min_side=0, max_side=6),
)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(array=ARRAYS, weights=st.one_of(st.none(), hnp.arrays(np.float64, st.integers(0, 7))),
       method=st.sampled_from(["kde", "histogram"]))
def test_property_malformed_arrays_give_input_error(array: np.ndarray, weights: Any,
                                                    method: str) -> None:
    """Property (Hypothesis, MacIver, Hatfield-Dodds et al., JOSS 2019): any array of any
    dtype and shape (NaN, infinities, huge values included), with or without a weights array
    of any length, either gives masses or an InputError."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "s.npz"
        if weights is None:
            np.savez(path, positions=array)
        else:
            np.savez(path, positions=array, w=weights)
        _try(path, weights=None if weights is None else "w", method=method)


def test_diffusion_and_noise_are_consistent_by_construction() -> None:
    for d in (1e-4, 0.125, 3.0):
        assert noise_from_config(None, d) ** 2 == pytest.approx(2 * d)
        assert math.isclose(noise_from_config(math.sqrt(2 * d), d), math.sqrt(2 * d))
