"""Observed initial and final distributions, as densities on R^d and as cell masses on a Grid.

An :class:`Endpoint` is a probability density ρ on R^d (units 1/L^d when x has length units
L).  ``Endpoint.masses(grid)`` turns it into dimensionless cell masses of shape
``grid.shape`` that are ≥ 0 and sum to 1:

* smooth densities (:class:`Gaussian`, :class:`GaussianMixture`):
  m[i] = ρ(x[i]) · Π_k h_k at the cell centres x[i], renormalised.  For a density that is
  smooth and negligible at the walls this point rule is spectrally accurate, so the discrete
  mean and covariance match the exact ones to round-off on a resolved grid (integrating ρ
  over each cell instead would add h_k²/12 to every variance — Sheppard's correction);
* :class:`UniformBox`: m[i] = exact volume fraction of the box that falls in cell i.

User-supplied arrays of densities or masses go through :func:`check_masses`.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from typing import Any, ClassVar

import numpy as np
from scipy.linalg import solve_triangular

from mfbridge.errors import InputError
from mfbridge.model.grid import Grid, _to_plain, to_float_array

__all__ = [
    "MIN_WIDTH_CELLS",
    "Endpoint",
    "Gaussian",
    "GaussianMixture",
    "UniformBox",
    "check_masses",
    "endpoint_masses",
]

MIN_WIDTH_CELLS = 1.0
"""Default smallest standard deviation of a Gaussian, in grid cells, accepted by ``masses``.

At s cells the point rule's aliasing error in the total mass is about 2·exp(-2π² s²):
5e-9 at s = 1, 1.4e-2 at s = 0.5 (Poisson summation of a Gaussian)."""


def box_text(lower: Any, upper: Any, spec: str = "g") -> str:
    """A box as '[lo, up] × …', each bound formatted with ``spec``."""
    return " × ".join(f"[{lo:{spec}}, {up:{spec}}]" for lo, up in zip(lower, upper, strict=True))


def _check_dim(endpoint: Endpoint, grid: Grid, name: str) -> None:
    if not isinstance(grid, Grid):
        raise InputError(f"masses of the {name} distribution need a mfbridge Grid, got {grid!r}")
    if endpoint.dim != grid.dim:
        raise InputError(
            f"the {name} distribution {type(endpoint).__name__} is {endpoint.dim}-dimensional "
            f"but the grid is {grid.dim}-dimensional: give the endpoint {grid.dim} coordinates "
            f"or use a {endpoint.dim}D grid"
        )


def _check_max_outside(max_outside: Any) -> float:
    value = float(to_float_array(max_outside, "max_outside", max_ndim=0))
    if not 0.0 <= value < 1.0:
        raise InputError(f"max_outside must be a fraction in [0, 1), got {value}")
    return value


class Endpoint(ABC):
    """A probability density ρ on R^d (1/L^d); ``dim`` is d.

    Subclasses provide ``density`` (points (..., d) -> (...), integrating to 1 over R^d), the
    exact ``mean()`` (shape (d,), L) and ``cov()`` (shape (d, d), L²), and ``describe()``.
    """

    name: ClassVar[str] = ""
    dim: int

    @abstractmethod
    def density(self, x: np.ndarray) -> np.ndarray:
        """ρ(x) for points of shape (..., d); returns shape (...)."""

    @abstractmethod
    def mean(self) -> np.ndarray:
        """Exact mean E[X], shape (d,)."""

    @abstractmethod
    def cov(self) -> np.ndarray:
        """Exact covariance E[(X - E X)(X - E X)ᵀ], shape (d, d)."""

    @abstractmethod
    def describe(self) -> dict[str, Any]:
        """Plain-dict summary: name and parameters (lists of floats)."""

    def _narrowest_width(self, grid: Grid) -> float:
        """Smallest standard deviation in units of grid cells (inf if not meaningful)."""
        return math.inf

    def _points(self, x: Any) -> np.ndarray:
        try:
            arr = np.asarray(x, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise InputError(f"points must be a numeric array of shape (..., {self.dim})") from exc
        if arr.ndim == 0 or arr.shape[-1] != self.dim:
            raise InputError(
                f"points must have shape (..., {self.dim}) for this {self.dim}D "
                f"{type(self).__name__}, got shape {arr.shape}"
            )
        return arr

    def masses(
        self,
        grid: Grid,
        *,
        max_outside: float = 1e-3,
        name: str = "endpoint",
        min_width_cells: float = MIN_WIDTH_CELLS,
    ) -> np.ndarray:
        """Cell masses m = ρ(centres) · cell_volume, renormalised; shape grid.shape, sum 1.

        ``name`` ("initial", "final", ...) is used in error messages.  Raises InputError if the
        dimensions differ, if more than ``max_outside`` of the mass (1 - Σ m before
        renormalisation) lies outside the grid box, or if the distribution is narrower than
        ``min_width_cells`` grid cells along some direction (the point rule would be
        inaccurate).
        """
        _check_dim(self, grid, name)
        return self._point_masses(grid, name, _check_max_outside(max_outside), min_width_cells)

    def _point_masses(self, grid: Grid, name: str, limit: float,
                      min_width_cells: float) -> np.ndarray:
        """The point rule with its two guards (width in cells, mass outside the box); the error
        texts come from :meth:`_too_narrow` and :meth:`_outside` so subclasses can say more."""
        width = self._narrowest_width(grid)
        if width < min_width_cells:
            raise InputError(self._too_narrow(name, width, grid, min_width_cells))
        m = self.density(grid.points) * grid.cell_volume
        outside = 1.0 - float(m.sum())
        if outside > limit:
            raise InputError(self._outside(name, outside, grid, limit))
        return m / m.sum()

    def _too_narrow(self, name: str, width: float, grid: Grid, min_width_cells: float) -> str:
        return (
            f"the {name} distribution is too narrow for the grid: its smallest standard "
            f"deviation is {width:.3g} grid cells (spacing {list(grid.spacing)}), below "
            f"{min_width_cells:g}; refine the grid, widen the distribution, or pass your own "
            "cell masses through check_masses"
        )

    def _outside(self, name: str, outside: float, grid: Grid, limit: float) -> str:
        return (
            f"{100 * outside:.3g}% of the {name} distribution lies outside the box "
            f"{box_text(grid.lower, grid.upper)} (at most {100 * limit:.3g}% allowed): "
            "enlarge the grid or move the endpoint"
        )

    def __repr__(self) -> str:
        params = {k: v for k, v in self.describe().items() if k != "name"}
        inner = ", ".join(f"{k}={v!r}" for k, v in params.items())
        return f"{type(self).__name__}({inner})"


# --------------------------------------------------------------------------- Gaussian


def _parse_cov(cov: Any, dim: int | None, label: str) -> np.ndarray:
    """Covariance matrix (d, d) from a variance, a diagonal or a full SPD matrix."""
    c = to_float_array(cov, label, max_ndim=2)
    if c.ndim == 0:
        if c <= 0:
            raise InputError(f"{label} (a variance) must be > 0, got {float(c)}")
        return float(c) * np.eye(1 if dim is None else dim)
    if c.ndim == 1:
        if dim is not None and c.shape[0] != dim:
            raise InputError(
                f"{label} given as a diagonal must have {dim} entries (one variance per axis), "
                f"got {c.shape[0]}"
            )
        if np.any(c <= 0):
            raise InputError(f"{label} diagonal variances must all be > 0, got {c.tolist()}")
        return np.diag(c)
    if c.shape[0] != c.shape[1] or (dim is not None and c.shape[0] != dim):
        want = f"({dim}, {dim})" if dim is not None else "square"
        raise InputError(f"{label} matrix must have shape {want}, got {c.shape}")
    scale = float(np.max(np.abs(c)))
    if not np.allclose(c, c.T, rtol=0.0, atol=1e-12 * max(scale, 1e-300)):
        raise InputError(f"{label} matrix must be symmetric, got {c.tolist()}")
    c = 0.5 * (c + c.T)
    eig = np.linalg.eigvalsh(c)
    if eig[0] <= 1e-14 * max(scale, 1e-300):
        raise InputError(
            f"{label} matrix must be positive definite, but its eigenvalues are "
            f"{np.round(eig, 12).tolist()}"
        )
    return c


class Gaussian(Endpoint):
    """Normal density ρ(x) = exp(-(x-μ)ᵀ Σ⁻¹ (x-μ)/2) / sqrt((2π)^d det Σ).

    mean μ (L): scalar or sequence of d entries.  cov Σ (L²): scalar variance (Σ = v·I),
    sequence of d variances (diagonal Σ) or a symmetric positive definite (d, d) matrix.  A
    scalar mean is repeated to the dimension given by cov.
    """

    name: ClassVar[str] = "gaussian"

    def __init__(self, mean: Any = 0.0, cov: Any = 1.0, *, _label: str = "Gaussian") -> None:
        m = to_float_array(mean, f"{_label} mean", max_ndim=1)
        if m.ndim == 1 and m.shape[0] == 0:
            raise InputError(f"{_label} mean must have at least one coordinate")
        dim = m.shape[0] if m.ndim == 1 else None
        if dim is None:
            c_probe = to_float_array(cov, f"{_label} cov", max_ndim=2)
            dim = c_probe.shape[0] if c_probe.ndim >= 1 else 1
        self.dim = int(dim)
        self._mean = np.broadcast_to(m, (self.dim,)).astype(np.float64)
        self._cov = _parse_cov(cov, self.dim, f"{_label} cov")
        self._chol = np.linalg.cholesky(self._cov)
        self._log_norm = -0.5 * self.dim * math.log(2 * math.pi) - float(
            np.sum(np.log(np.diag(self._chol)))
        )

    def log_density(self, x: np.ndarray) -> np.ndarray:
        """log ρ(x) for points (..., d); returns shape (...)."""
        arr = self._points(x)
        diff = (arr - self._mean).reshape(-1, self.dim)
        y = solve_triangular(self._chol, diff.T, lower=True)
        quad = np.sum(y * y, axis=0).reshape(arr.shape[:-1])
        return self._log_norm - 0.5 * quad

    def density(self, x: np.ndarray) -> np.ndarray:
        """ρ(x) for points (..., d); returns shape (...)."""
        return np.exp(self.log_density(x))

    def mean(self) -> np.ndarray:
        """μ, shape (d,)."""
        return self._mean.copy()

    def cov(self) -> np.ndarray:
        """Σ, shape (d, d)."""
        return self._cov.copy()

    def _narrowest_width(self, grid: Grid) -> float:
        h = np.asarray(grid.spacing)
        scaled = self._cov / np.outer(h, h)
        return float(math.sqrt(np.linalg.eigvalsh(scaled)[0]))

    def describe(self) -> dict[str, Any]:
        """{"name": "gaussian", "mean": [...], "cov": [[...]]}."""
        return {"name": self.name, "mean": self._mean.tolist(), "cov": self._cov.tolist()}


class GaussianMixture(Endpoint):
    """Mixture ρ(x) = Σ_k w_k N(x; μ_k, Σ_k) of K Gaussians.

    weights: K positive numbers, normalised here to sum to 1.  means: K entries, each a scalar
    (1D) or d coordinates.  covs: K entries, each as ``cov`` of :class:`Gaussian`, or one
    scalar variance shared by all components.

    Exact moments: mean = Σ_k w_k μ_k, cov = Σ_k w_k (Σ_k + μ_k μ_kᵀ) - mean meanᵀ.
    """

    name: ClassVar[str] = "gaussian_mixture"

    def __init__(self, weights: Any, means: Any, covs: Any) -> None:
        w = to_float_array(weights, "GaussianMixture weights", max_ndim=1)
        w = np.atleast_1d(w)
        if w.shape[0] == 0 or np.any(w <= 0):
            raise InputError(
                f"GaussianMixture weights must be one or more positive numbers, got {w.tolist()}"
            )
        k = w.shape[0]
        mu = to_float_array(means, "GaussianMixture means", max_ndim=2)
        if mu.ndim == 0 or mu.shape[0] != k:
            raise InputError(
                f"GaussianMixture means must have one entry per weight ({k}), got "
                f"{'a scalar' if mu.ndim == 0 else f'{mu.shape[0]} entries'}"
            )
        plain_covs = _to_plain(covs)
        if isinstance(plain_covs, np.ndarray):
            plain_covs = plain_covs.tolist() if plain_covs.ndim > 0 else float(plain_covs)
        if not isinstance(plain_covs, list):
            cov_list: list[Any] = [plain_covs] * k
        elif len(plain_covs) == k:
            cov_list = plain_covs
        else:
            raise InputError(
                f"GaussianMixture covs must have one entry per weight ({k}) or be a single "
                f"variance, got {len(plain_covs)} entries"
            )
        self.components = tuple(
            Gaussian(mu[i], cov_list[i], _label=f"GaussianMixture component {i}") for i in range(k)
        )
        dims = {g.dim for g in self.components}
        if len(dims) != 1:
            raise InputError(
                f"GaussianMixture components must share one dimension, got dimensions "
                f"{[g.dim for g in self.components]}"
            )
        self.dim = dims.pop()
        self.weights = w / w.sum()

    def density(self, x: np.ndarray) -> np.ndarray:
        """ρ(x) for points (..., d); returns shape (...)."""
        arr = self._points(x)
        out = np.zeros(arr.shape[:-1])
        for wk, g in zip(self.weights, self.components, strict=True):
            out += wk * g.density(arr)
        return out

    def mean(self) -> np.ndarray:
        """Σ_k w_k μ_k, shape (d,)."""
        return sum(wk * g.mean() for wk, g in zip(self.weights, self.components, strict=True))

    def cov(self) -> np.ndarray:
        """Σ_k w_k (Σ_k + μ_k μ_kᵀ) - mean meanᵀ, shape (d, d)."""
        m = self.mean()
        second = sum(
            wk * (g.cov() + np.outer(g.mean(), g.mean()))
            for wk, g in zip(self.weights, self.components, strict=True)
        )
        return second - np.outer(m, m)

    def _narrowest_width(self, grid: Grid) -> float:
        return min(g._narrowest_width(grid) for g in self.components)

    def describe(self) -> dict[str, Any]:
        """{"name": "gaussian_mixture", "weights": [...], "means": [...], "covs": [...]}."""
        return {
            "name": self.name,
            "weights": self.weights.tolist(),
            "means": [g.mean().tolist() for g in self.components],
            "covs": [g.cov().tolist() for g in self.components],
        }


# --------------------------------------------------------------------------- uniform box


class UniformBox(Endpoint):
    """Uniform density on the closed box Π_k [lower_k, upper_k]: ρ = 1 / Π_k (upper_k - lower_k).

    lower, upper (L): scalars or sequences of d entries (a scalar is repeated).
    Mean (lower + upper)/2, covariance diag((upper - lower)² / 12).
    Cell masses are the exact fraction of the box volume inside each cell.
    """

    name: ClassVar[str] = "uniform_box"

    def __init__(self, lower: Any, upper: Any) -> None:
        lo = np.atleast_1d(to_float_array(lower, "UniformBox lower", max_ndim=1))
        up = np.atleast_1d(to_float_array(upper, "UniformBox upper", max_ndim=1))
        dim = max(lo.shape[0], up.shape[0])
        if lo.shape[0] not in (1, dim) or up.shape[0] not in (1, dim) or dim == 0:
            raise InputError(
                f"UniformBox lower and upper must have the same number of coordinates, got "
                f"{lo.tolist()} and {up.tolist()}"
            )
        self.dim = int(dim)
        self.lower = np.broadcast_to(lo, (dim,)).astype(np.float64)
        self.upper = np.broadcast_to(up, (dim,)).astype(np.float64)
        if np.any(self.lower >= self.upper):
            raise InputError(
                f"UniformBox needs lower < upper on every axis, got lower={self.lower.tolist()} "
                f"and upper={self.upper.tolist()}"
            )
        self._volume = float(np.prod(self.upper - self.lower))

    def density(self, x: np.ndarray) -> np.ndarray:
        """1/volume inside the closed box, 0 outside; shape (...)."""
        arr = self._points(x)
        inside = np.all((arr >= self.lower) & (arr <= self.upper), axis=-1)
        return np.where(inside, 1.0 / self._volume, 0.0)

    def mean(self) -> np.ndarray:
        """(lower + upper)/2, shape (d,)."""
        return 0.5 * (self.lower + self.upper)

    def cov(self) -> np.ndarray:
        """diag((upper - lower)²/12), shape (d, d)."""
        return np.diag((self.upper - self.lower) ** 2 / 12.0)

    def masses(
        self,
        grid: Grid,
        *,
        max_outside: float = 1e-3,
        name: str = "endpoint",
        min_width_cells: float = MIN_WIDTH_CELLS,
    ) -> np.ndarray:
        """Exact overlap fraction of the box with each cell; shape grid.shape, sum 1.

        The box must lie inside the grid box (``max_outside`` and ``min_width_cells`` are
        accepted for a uniform signature and not used: the overlap is exact at any width).
        """
        _check_dim(self, grid, name)
        g_lo = np.asarray(grid.lower)
        g_up = np.asarray(grid.upper)
        tol = 1e-12 * np.asarray(grid.extent)
        if np.any(self.lower < g_lo - tol) or np.any(self.upper > g_up + tol):
            raise InputError(
                f"the {name} distribution UniformBox {box_text(self.lower, self.upper)} is not "
                f"inside the grid box {box_text(grid.lower, grid.upper)}: enlarge the grid or "
                "move the box"
            )
        fractions = []
        for k, faces in enumerate(grid.edges):
            lo, up = self.lower[k], self.upper[k]
            overlap = np.clip(np.minimum(faces[1:], up) - np.maximum(faces[:-1], lo), 0.0, None)
            fractions.append(overlap / (up - lo))
        m = fractions[0]
        for f in fractions[1:]:
            m = np.multiply.outer(m, f)
        total = float(m.sum())
        if total <= 0.0:
            raise InputError(
                f"the {name} distribution UniformBox {box_text(self.lower, self.upper)} covers "
                "no grid cell"
            )
        return m / total

    def describe(self) -> dict[str, Any]:
        """{"name": "uniform_box", "lower": [...], "upper": [...]}."""
        return {"name": self.name, "lower": self.lower.tolist(), "upper": self.upper.tolist()}


# --------------------------------------------------------------------------- user arrays


def check_masses(values: Any, grid: Grid, name: str) -> np.ndarray:
    """Validate user densities or masses on ``grid`` and return normalised masses.

    values: shape grid.shape, or flat with grid.size entries in C ('ij') order; densities
    (1/L^d) or masses give the same result because all cells have the same volume.
    Returns float64 masses of shape grid.shape, ≥ 0, summing to 1.  Raises InputError (naming
    ``name``) for non-numeric input, wrong shape, NaN, infinity, negative entries or zero total.
    """
    if not isinstance(grid, Grid):
        raise InputError(f"check_masses needs a mfbridge Grid, got {grid!r}")
    plain = _to_plain(values)
    if np.iscomplexobj(plain):
        raise InputError(f"{name} must be real numbers, got a complex array")
    try:
        arr = np.array(plain, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"{name} must be a numeric array of shape {grid.shape}, got {type(values).__name__}"
        ) from exc
    if arr.shape != grid.shape:
        if arr.ndim == 1 and arr.size == grid.size:
            arr = arr.reshape(grid.shape)
        else:
            raise InputError(
                f"{name} must have shape {grid.shape} (the grid shape) or be flat with "
                f"{grid.size} entries, got shape {arr.shape}"
            )
    nan = np.isnan(arr)
    if nan.any():
        first = tuple(int(i) for i in np.argwhere(nan)[0])
        raise InputError(f"{name} contains {int(nan.sum())} NaN value(s), first at index {first}")
    inf = np.isinf(arr)
    if inf.any():
        first = tuple(int(i) for i in np.argwhere(inf)[0])
        raise InputError(
            f"{name} contains {int(inf.sum())} infinite value(s), first at index {first}"
        )
    negative = arr < 0
    if negative.any():
        raise InputError(
            f"{name} contains {int(negative.sum())} negative value(s) (smallest "
            f"{float(arr.min()):.3g}); densities and masses must be ≥ 0"
        )
    total = float(arr.sum())
    if total <= 0.0:
        raise InputError(f"{name} sums to zero; it must have a positive total mass")
    return arr / total


def endpoint_masses(
    source: Endpoint | Any, grid: Grid, name: str, *, max_outside: float = 1e-3
) -> np.ndarray:
    """Masses on ``grid`` from an :class:`Endpoint` (via ``masses``) or from an array (via
    :func:`check_masses`); shape grid.shape, sum 1."""
    if isinstance(source, Endpoint):
        return source.masses(grid, max_outside=max_outside, name=name)
    return check_masses(source, grid, name)
