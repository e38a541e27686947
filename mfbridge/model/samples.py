r"""Endpoints from measured positions: files of samples turned into densities on the grid.

A user observes N particles (tracked beads, cells, agents) at t = 0 and M particles at t = T,
possibly with weights. :class:`Samples` reads one such snapshot from a file and is an
:class:`~mfbridge.model.endpoints.Endpoint`: it gives cell masses on any
:class:`~mfbridge.model.grid.Grid` of its dimension.

Reading the files (formats, columns, weights, paths, validation) is
:mod:`mfbridge.model.sample_files`; this module is the density estimate and the boxes.

Densities on the grid
---------------------
``method="kde"``: the weighted Gaussian kernel density estimate

.. math::  \hat\rho(x) = \sum_i w_i\,\mathcal N(x;\,x_i,\,H),

with kernel covariance H (L²). ``bandwidth="scott"`` or ``"silverman"`` follow the convention
of ``scipy.stats.gaussian_kde`` (Scott, *Multivariate Density Estimation*, 1992; Silverman,
*Density Estimation for Statistics and Data Analysis*, 1986): H = f² Ĉ with Ĉ the weighted,
bias-corrected sample covariance Ĉ = Σ_i w_i (x_i - x̄)(x_i - x̄)ᵀ / (1 - Σ_i w_i²), the
effective sample size n_eff = 1/Σ_i w_i², and f = n_eff^{-1/(d+4)} (Scott) or
f = (n_eff (d+2)/4)^{-1/(d+4)} (Silverman). A number is the kernel's standard deviation in L
(H = b² I, the same on every axis). Cell masses use the point rule of
:mod:`mfbridge.model.endpoints`, m[i] = ρ̂(x[i]) · Π_k h_k, renormalised; the kernel must be at least
``min_width_cells`` (default 1) cells wide along every direction, where the rule's error is
below 1e-8 of the mass.

``method="histogram"``: m[i] = Σ of the weights of the samples inside cell i (closed on the
upper wall), exact for the empirical law binned on the grid.

``mean()`` and ``cov()`` are the moments of the weighted empirical law,
x̄ = Σ_i w_i x_i and Σ_i w_i (x_i - x̄)(x_i - x̄)ᵀ (L, L²); the KDE's own covariance is
``cov() + kernel_cov()``.

The file is read on first use (``dim``, ``masses``, ``mean``...), validated once, and cached;
every mistake raises :class:`~mfbridge.errors.InputError` naming the file and saying what was
expected and what was found.
"""

from __future__ import annotations

import math
import warnings
from typing import Any, ClassVar

import numpy as np
from scipy.linalg import solve_triangular

from mfbridge.errors import InputError, ResolutionWarning
from mfbridge.model.endpoints import MIN_WIDTH_CELLS, Endpoint, box_text
from mfbridge.model.grid import Grid
from mfbridge.model.sample_files import (
    FORMATS,
    REPO_ROOT,
    SampleData,
    plain_list,
    read_samples,
    resolve_path,
)

__all__ = [
    "BANDWIDTH_RULES",
    "FORMATS",
    "REPO_ROOT",
    "SampleData",
    "Samples",
    "auto_grid",
    "box_from_samples",
    "check_same_dimension",
    "outliers",
    "resolve_path",
]

BANDWIDTH_RULES = ("scott", "silverman")
METHODS = ("kde", "histogram")
_BLOCK = 2_000_000  # grid points × samples evaluated at once by the KDE


# --------------------------------------------------------------------------- the endpoint


def _check_bandwidth(bandwidth: Any) -> str | float:
    if isinstance(bandwidth, str):
        rule = bandwidth.strip().lower()
        if rule not in BANDWIDTH_RULES:
            raise InputError(f"bandwidth must be 'scott', 'silverman' or a positive length, "
                             f"got {bandwidth!r}")
        return rule
    if isinstance(bandwidth, (bool, np.bool_)) or not isinstance(
            bandwidth, (int, float, np.integer, np.floating)):
        raise InputError(f"bandwidth must be 'scott', 'silverman' or a positive length, got "
                         f"{bandwidth!r}")
    value = float(bandwidth)
    if not (math.isfinite(value) and value > 0):
        raise InputError(f"bandwidth given as a length must be positive and finite, got {value}")
    return value


class Samples(Endpoint):
    """Measured positions read from a file, as an endpoint (see the module docstring).

    Parameters
    ----------
    path
        CSV/TSV, NPY, NPZ or Parquet file (absolute, or relative to the working directory or
        the repository root).
    columns
        Position columns: names (CSV, Parquet) or integer indices (NPY, NPZ); default all
        columns except the weights column (CSV, Parquet) or the whole array (NPY, NPZ).
    weights
        Name of the weights column (CSV, Parquet) or array (NPZ); default equal weights.
    bandwidth
        ``"scott"``, ``"silverman"`` (kernel covariance f² Ĉ, as in scipy), or the kernel's
        standard deviation in L (isotropic).
    method
        ``"kde"`` (Gaussian kernel density estimate) or ``"histogram"`` (weights binned on the
        grid's cells).
    key
        NPZ only: name of the positions array.
    """

    name: ClassVar[str] = "samples"

    def __init__(self, path: Any, columns: Any = None, weights: Any = None,
                 bandwidth: Any = "scott", method: str = "kde", key: Any = None) -> None:
        self.path = resolve_path(path)
        self.format = FORMATS.get(self.path.suffix.lower(), "")
        if not self.format:
            raise InputError(f"sample file {self.path.name} has extension "
                             f"{self.path.suffix or '(none)'!r}; supported: {', '.join(FORMATS)}")
        if not isinstance(method, str) or method.strip().lower() not in METHODS:
            raise InputError(f"method must be 'kde' or 'histogram', got {method!r}")
        self.method = method.strip().lower()
        self.bandwidth = _check_bandwidth(bandwidth)
        if weights is not None and (not isinstance(weights, str) or not weights):
            raise InputError(f"weights must be the name of a column or array, got {weights!r}")
        self.weights_name: str | None = weights
        if key is not None and (not isinstance(key, str) or not key):
            raise InputError(f"key must be the name of an array in the .npz file, got {key!r}")
        if key is not None and self.format != "npz":
            raise InputError(f"key={key!r} selects an array in an .npz file, but "
                             f"{self.path.name} is a {self.format} file")
        self.key: str | None = key
        self.columns = plain_list(columns, "columns")
        self._data: SampleData | None = None
        self._kernel: np.ndarray | None = None

    # ------------------------------------------------------------------ loading
    @property
    def data(self) -> SampleData:
        """The validated snapshot, read from the file on first use."""
        if self._data is None:
            self._data = read_samples(self.path, self.format, self.columns,
                                      self.weights_name, self.key)
        return self._data

    @property  # type: ignore[override]
    def dim(self) -> int:
        """Number of coordinates per sample d (1 to 3)."""
        return self.data.dim

    @property
    def source(self) -> str:
        return f"sample file {self.path.name}"

    # ------------------------------------------------------------------ moments
    def mean(self) -> np.ndarray:
        """Weighted sample mean Σ w_i x_i, shape (d,) (L)."""
        d = self.data
        return d.weights @ d.positions

    def cov(self) -> np.ndarray:
        """Covariance of the weighted empirical law Σ w_i (x_i - x̄)(x_i - x̄)ᵀ, (d, d) (L²)."""
        d = self.data
        centred = d.positions - self.mean()
        return (d.weights[:, None] * centred).T @ centred

    def kernel_cov(self) -> np.ndarray:
        """Kernel covariance H, shape (d, d) (L²); see the module docstring."""
        if self._kernel is None:
            self._kernel = self._kernel_cov()
        return self._kernel.copy()

    def _kernel_cov(self) -> np.ndarray:
        data = self.data
        d = data.dim
        if isinstance(self.bandwidth, float):
            return self.bandwidth**2 * np.eye(d)
        n_eff = data.effective_size
        if data.positions.shape[0] < 2 or n_eff <= 1.0 + 1e-12:
            raise InputError(
                f"{self.source}: the {self.bandwidth} bandwidth rule needs at least two samples "
                f"with positive weight (effective sample size {n_eff:.3g}); give bandwidth as a "
                "length or use method=histogram"
            )
        spread = self.cov() / (1.0 - float(np.sum(data.weights**2)))
        scale = float(np.max(np.abs(data.positions))) or 1.0
        eig = np.linalg.eigvalsh(spread)
        if eig[0] <= 1e-12 * scale**2:
            flat = [data.labels[k] for k in range(d) if spread[k, k] <= 1e-12 * scale**2]
            detail = (f"all samples share the same {', '.join(repr(f) for f in flat)}" if flat
                      else "the samples lie on a line")
            raise InputError(
                f"{self.source}: {detail}, so the {self.bandwidth} rule gives a kernel of zero "
                "width; give bandwidth as a length or use method=histogram"
            )
        if self.bandwidth == "scott":
            factor = n_eff ** (-1.0 / (d + 4))
        else:
            factor = (n_eff * (d + 2) / 4.0) ** (-1.0 / (d + 4))
        return factor**2 * spread

    # ------------------------------------------------------------------ densities
    def density(self, x: np.ndarray) -> np.ndarray:
        """Kernel density estimate ρ̂(x) (1/L^d) for points (..., d); returns shape (...).

        Used by ``method="kde"``; a histogram has no density off the grid, so this is the KDE
        for both methods.
        """
        arr = self._points(x)
        data = self.data
        chol = np.linalg.cholesky(self.kernel_cov())
        flat = arr.reshape(-1, data.dim)
        zp = solve_triangular(chol, flat.T, lower=True).T
        zs = solve_triangular(chol, data.positions.T, lower=True).T
        out = np.zeros(flat.shape[0])
        block = max(1, _BLOCK // max(1, flat.shape[0]))
        for s in range(0, zs.shape[0], block):
            diff = zp[:, None, :] - zs[None, s:s + block, :]
            out += np.exp(-0.5 * np.einsum("msd,msd->ms", diff, diff)) @ data.weights[s:s + block]
        norm = (2.0 * math.pi) ** (-0.5 * data.dim) / float(np.prod(np.diag(chol)))
        return (out * norm).reshape(arr.shape[:-1])

    def _narrowest_width(self, grid: Grid) -> float:
        h = np.asarray(grid.spacing)
        scaled = self.kernel_cov() / np.outer(h, h)
        return float(math.sqrt(max(np.linalg.eigvalsh(scaled)[0], 0.0)))

    def _check_inside(self, grid: Grid, name: str) -> None:
        data = self.data
        lower, upper = np.asarray(grid.lower), np.asarray(grid.upper)
        carried = data.weights > 0
        outside = carried & ~np.all((data.positions >= lower) & (data.positions <= upper), axis=1)
        if outside.any():
            lo = data.positions[carried].min(axis=0)
            hi = data.positions[carried].max(axis=0)
            first = int(np.flatnonzero(outside)[0])
            box, span = box_text(lower, upper, ".4g"), box_text(lo, hi, ".4g")
            raise InputError(
                f"{int(outside.sum())} of the {int(carried.sum())} {name} samples ({self.source}) "
                f"lie outside the box {box}, first at {data.where(first)}; the data "
                f"span {span}: use grid=span (a box fitted to the data) or enlarge "
                "grid.lower/grid.upper"
            )

    def masses(self, grid: Grid, *, max_outside: float = 1e-3, name: str = "endpoint",
               min_width_cells: float = MIN_WIDTH_CELLS) -> np.ndarray:
        """Cell masses of the samples on ``grid``, shape grid.shape, sum 1 (see the module
        docstring). Raises InputError when the dimension differs from the grid's, a sample lies
        outside the box, the kernel is narrower than ``min_width_cells`` cells, or more than
        ``max_outside`` of the KDE's mass falls outside the box."""
        if not isinstance(grid, Grid):
            raise InputError(f"masses of the {name} distribution need a mfbridge Grid, "
                             f"got {grid!r}")
        if self.dim != grid.dim:
            raise InputError(
                f"the {name} samples ({self.source}, columns {', '.join(self.data.labels)}) are "
                f"{self.dim}-dimensional but the grid is {grid.dim}-dimensional: choose "
                f"{grid.dim} position column(s) or a {self.dim}D grid"
            )
        self._check_inside(grid, name)
        if self.method == "histogram":
            return self._histogram(grid)
        return self._point_masses(grid, name, float(max_outside), min_width_cells)

    def _too_narrow(self, name: str, width: float, grid: Grid, min_width_cells: float) -> str:
        return (
            f"the bandwidth of the {name} samples ({self.source}) is too small for the "
            f"grid: the kernel's smallest standard deviation is {width:.3g} grid cells "
            f"(spacing {[round(h, 6) for h in grid.spacing]}), below {min_width_cells:g}; "
            "use a larger bandwidth, a finer grid (grid.shape), or method=histogram"
        )

    def _outside(self, name: str, outside: float, grid: Grid, limit: float) -> str:
        box = box_text(grid.lower, grid.upper, ".4g")
        return (
            f"{100 * outside:.3g}% of the kernel density of the {name} samples "
            f"({self.source}) lies outside the box {box} (at most "
            f"{100 * limit:.3g}% allowed): kernels of samples near the walls spill over; "
            "use grid=span, enlarge the box, or give a smaller bandwidth"
        )

    def _histogram(self, grid: Grid) -> np.ndarray:
        data = self.data
        index = []
        for k, faces in enumerate(grid.edges):
            i = np.searchsorted(faces, data.positions[:, k], side="right") - 1
            index.append(np.clip(i, 0, grid.shape[k] - 1))  # x == upper goes to the last cell
        flat = np.ravel_multi_index(tuple(index), grid.shape)
        m = np.bincount(flat, weights=data.weights, minlength=grid.size).reshape(grid.shape)
        return m / m.sum()

    # ------------------------------------------------------------------ records
    def describe(self) -> dict[str, Any]:
        """Plain-dict summary: file (absolute path, format, SHA-256), columns, sample count,
        effective sample size, method, bandwidth, kernel covariance (L²), mean and covariance
        of the weighted samples."""
        data = self.data
        out: dict[str, Any] = {
            "name": self.name,
            "path": str(self.path),
            "format": self.format,
            "sha256": data.sha256,
            "columns": list(data.labels),
            "weights": self.weights_name,
            "samples": int(data.positions.shape[0]),
            "effective_samples": data.effective_size,
            "method": self.method,
            "bandwidth": self.bandwidth,
            "mean": self.mean().tolist(),
            "cov": self.cov().tolist(),
        }
        if self.method == "kde":
            out["kernel_cov"] = self.kernel_cov().tolist()
        if self.key is not None:
            out["key"] = self.key
        return out

    def __repr__(self) -> str:
        return (f"Samples(path={str(self.path)!r}, columns={self.columns!r}, "
                f"weights={self.weights_name!r}, bandwidth={self.bandwidth!r}, "
                f"method={self.method!r})")


# --------------------------------------------------------------------------- boxes


def check_same_dimension(initial: Any, final: Any) -> None:
    """Raise InputError if two endpoints have different dimensions (naming sample files)."""
    if not (isinstance(initial, Endpoint) and isinstance(final, Endpoint)):
        return
    if initial.dim != final.dim:
        def text(e: Endpoint) -> str:
            if isinstance(e, Samples):
                return f"{e.source} (columns {', '.join(e.data.labels)})"
            return type(e).__name__
        raise InputError(
            f"dimension mismatch between the two snapshots: the initial one is {initial.dim}D "
            f"({text(initial)}) but the final one is {final.dim}D ({text(final)}); give both "
            "the same position columns"
        )


def _reach(endpoint: Endpoint) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(lowest, highest, width) per axis. Samples: the data range widened by 5 kernel standard
    deviations (KDE) and the kernel standard deviation as width (0 for histograms). Other
    endpoints: mean ± 6 standard deviations, width the standard deviation."""
    if isinstance(endpoint, Samples):
        data = endpoint.data
        pts = data.positions[data.weights > 0]
        sd = (np.sqrt(np.diag(endpoint.kernel_cov())) if endpoint.method == "kde"
              else np.zeros(data.dim))
        return pts.min(axis=0) - 5.0 * sd, pts.max(axis=0) + 5.0 * sd, sd
    mean = np.asarray(endpoint.mean(), dtype=float)
    sd = np.sqrt(np.diag(np.asarray(endpoint.cov(), dtype=float)))
    # narrowest feature (e.g. one mixture component): the width in cells of a unit grid
    unit = Grid(lower=0.0, upper=[3.0] * endpoint.dim, shape=3)
    narrow = endpoint._narrowest_width(unit)
    width = np.minimum(sd, narrow) if math.isfinite(narrow) else sd
    return mean - 6.0 * sd, mean + 6.0 * sd, width


def _check_margin(margin: Any) -> float:
    if isinstance(margin, (bool, np.bool_)) or not isinstance(
            margin, (int, float, np.integer, np.floating)) or not (
            math.isfinite(float(margin)) and margin >= 0):
        raise InputError(f"margin must be a fraction ≥ 0 of the data's extent, got {margin!r}")
    return float(margin)


def box_from_samples(initial: Endpoint, final: Endpoint, margin: float = 0.2
                     ) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """A box (lower, upper) (L, one entry per axis) holding both snapshots.

    Per axis: [lo - margin·(hi - lo), hi + margin·(hi - lo)], where lo and hi are the extremes,
    over both snapshots, of the samples widened by 5 of that snapshot's kernel standard
    deviations (KDE; none for histograms), so the kernel of an outermost sample loses less than
    3e-7 of its mass; for other endpoints mean ± 6 standard deviations. ``margin`` is a
    fraction ≥ 0.
    """
    lower, upper, _ = _box_and_widths({"initial": initial, "final": final}, margin)
    return tuple(float(v) for v in lower), tuple(float(v) for v in upper)


def _box_and_widths(laws: dict[str, Any], margin: Any
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    for label, e in laws.items():
        if not isinstance(e, Endpoint):
            raise InputError(f"the automatic box needs mfbridge endpoints; the {label} one is "
                             f"{e!r}")
    fraction = _check_margin(margin)
    items = list(laws.values())
    for other in items[1:]:
        check_same_dimension(items[0], other)
    reach = [_reach(e) for e in items]
    lo = np.min([r[0] for r in reach], axis=0)
    hi = np.max([r[1] for r in reach], axis=0)
    positive = [r[2] for r in reach if np.all(r[2] > 0)]
    width = np.min(positive, axis=0) if positive else np.zeros_like(lo)
    extent = hi - lo
    flat = np.flatnonzero(extent <= 1e-12 * np.maximum(np.abs(lo), 1.0))
    if flat.size:
        raise InputError(f"cannot fit a box: every sample has the same coordinate {lo[flat[0]]:g} "
                         f"on axis {int(flat[0])} (and histograms add no kernel width); give "
                         "grid.lower and grid.upper")
    return lo - fraction * extent, hi + fraction * extent, width


AUTO_CELLS = (16, 256)
"""Smallest and largest number of cells per axis chosen by :func:`auto_grid`."""

OUTLIER_SDS = 10.0
"""A sample farther than this many (robust) standard deviations from its snapshot's median
along an axis is named as outlying when the automatic box cannot be resolved."""


def outliers(samples: Samples, limit: float = OUTLIER_SDS
             ) -> list[tuple[int, int, float, float]]:
    """The samples (with weight > 0) farther than ``limit`` standard deviations from the median
    along some axis, as (sample index, axis, value, distance in standard deviations), farthest
    first. Per axis, the standard deviation is estimated as 1.4826 × the median absolute
    deviation from the median, which a few outliers do not inflate (it equals the standard
    deviation for normal data: Rousseeuw & Croux, "Alternatives to the median absolute
    deviation", J. Amer. Statist. Assoc. 88, 1993); an axis whose deviation is 0 is skipped."""
    data = samples.data
    carried = np.flatnonzero(data.weights > 0)
    pts = data.positions[carried]
    median = np.median(pts, axis=0)
    scale = 1.4826 * np.median(np.abs(pts - median), axis=0)
    found = []
    for k in range(pts.shape[1]):
        if not scale[k] > 0:
            continue
        z = np.abs(pts[:, k] - median[k]) / scale[k]
        found += [(int(carried[i]), k, float(pts[i, k]), float(z[i]))
                  for i in np.flatnonzero(z > limit)]
    return sorted(found, key=lambda f: -f[3])


def _outlier_notes(laws: dict[str, Any], shown: int = 5) -> list[str]:
    notes = []
    for name, e in laws.items():
        if not isinstance(e, Samples):
            continue
        found = outliers(e)
        if not found:
            continue
        labels = e.data.labels
        listed = ", ".join(f"{e.data.where(i)} ({labels[k]} = {value:.6g}, {z:.3g} standard "
                           "deviations from the median)" for i, k, value, z in found[:shown])
        more = f" and {len(found) - shown} more" if len(found) > shown else ""
        count = len({i for i, *_ in found})
        notes.append(f"{count} outlying {name} sample{'s' if count > 1 else ''} in "
                     f"{e.source}: {listed}{more}")
    return notes


def _check_resolution(laws: dict[str, Any], grid: Grid, width: np.ndarray,
                      wanted: np.ndarray | None, cells_per_width: Any) -> None:
    """Say why the automatic box cannot resolve the laws (name → endpoint: the two endpoints,
    or every snapshot of a series), never cap it silently: outlying samples (named) that
    stretch the box, a kernel narrower than a cell (refused), or a cell count capped at
    :data:`AUTO_CELLS` (a :class:`ResolutionWarning`)."""
    if not np.all(width > 0):
        return
    h = np.asarray(grid.spacing)
    per_sd = width / h  # the narrowest kernel's standard deviation, in cells, per axis
    capped = wanted is not None and bool(np.any(wanted > np.asarray(grid.shape)))
    if not capped and np.all(per_sd >= MIN_WIDTH_CELLS):
        return
    k = int(np.argmin(per_sd))
    box = box_text(grid.lower, grid.upper, ".4g")
    notes = _outlier_notes(laws)
    if notes:
        extent = grid.upper[k] - grid.lower[k]
        raise InputError(
            f"the box fitted to the samples, {box}, is {extent / width[k]:.3g} times the "
            f"narrowest kernel's standard deviation ({width[k]:.3g}) along axis {k}, because of "
            f"{'; '.join(notes)}. Drop the outlying samples from the file or clip them to the "
            "range of the others, or set the box and the cells yourself (grid=line, plane or "
            "cube with grid.lower, grid.upper and grid.shape)")
    if wanted is None:
        return  # cells given by the user: Samples.masses says when a kernel is too narrow
    need = [int(v) for v in wanted]
    if per_sd[k] < MIN_WIDTH_CELLS:
        raise InputError(
            f"the automatic grid stops at {AUTO_CELLS[1]} cells per axis, where the narrowest "
            f"kernel (standard deviation {width[k]:.3g}) is {per_sd[k]:.3g} cells wide along "
            f"axis {k} of the box {box}, below {MIN_WIDTH_CELLS:g}; {cells_per_width:g} cells per "
            f"standard deviation need grid.shape={need if len(need) > 1 else need[0]} (mind "
            "the memory estimate), or use a larger bandwidth or method=histogram")
    warnings.warn(ResolutionWarning(
        f"the automatic grid stops at {AUTO_CELLS[1]} cells per axis: along axis {k} of the box "
        f"{box} the narrowest kernel (standard deviation {width[k]:.3g}) is {per_sd[k]:.3g} "
        f"cells wide instead of {cells_per_width:g}; give grid.shape="
        f"{need if len(need) > 1 else need[0]} for that resolution"), stacklevel=3)


def auto_grid(initial: Endpoint | None = None, final: Endpoint | None = None, shape: Any = None,
              margin: float = 0.2, cells_per_width: float = 1.5,
              snapshots: Any = None) -> Grid:
    """A :class:`Grid` on :func:`box_from_samples` (``initial``, ``final``, ``margin``), or on
    the same box around every law of ``snapshots`` (a series: items with a ``law``).

    ``shape``: cells per axis (a scalar is used on every axis), or None to choose them: along
    axis k, h_k = s_k / ``cells_per_width`` with s_k the narrower of the two snapshots' kernel
    standard deviations along k (the endpoint's own for parametric endpoints), clipped to
    :data:`AUTO_CELLS` cells; 64 cells per axis when neither snapshot has a width (histograms).
    Never silently: when the box cannot resolve the narrowest kernel because of outlying
    samples (:func:`outliers`), an :class:`InputError` names them; a count capped at the
    largest of :data:`AUTO_CELLS` is refused when a kernel is then narrower than a cell, else
    warned about (:class:`~mfbridge.errors.ResolutionWarning`).
    """
    if snapshots is not None:
        laws = {f"snapshot {i}": (item["law"] if hasattr(item, "keys")
                                  else getattr(item, "law", item))
                for i, item in enumerate(snapshots)}
    else:
        laws = {"initial": initial, "final": final}
    lower, upper, width = _box_and_widths(laws, margin)
    wanted = None
    if shape is None:
        if isinstance(cells_per_width, (bool, np.bool_)) or not isinstance(
                cells_per_width, (int, float)) or not cells_per_width > 0:
            raise InputError(f"cells_per_width must be a positive number, got {cells_per_width!r}")
        if np.all(width > 0):
            wanted = np.ceil((upper - lower) * float(cells_per_width) / width)
            shape = tuple(int(v) for v in np.clip(wanted, *AUTO_CELLS))
        else:
            shape = 64
    grid = Grid(lower=tuple(map(float, lower)), upper=tuple(map(float, upper)), shape=shape)
    _check_resolution(laws, grid, width, wanted, cells_per_width)
    return grid
