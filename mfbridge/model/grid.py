"""Cell-centred Cartesian grids on a box with no-flux walls.

A :class:`Grid` splits the box ``[lower_k, upper_k]`` (k = 0..dim-1, lengths in the user's
spatial unit L) into ``shape[k]`` equal cells of width ``h_k = (upper_k - lower_k) / shape[k]``.
Every field (a density, a potential) is stored at the cell centres

    x_k[i] = lower_k + (i + 1/2) h_k,   i = 0..shape[k]-1,

so the walls sit half a cell outside the first and last centres.  Probability is carried as
cell masses ``m[i] ≈ ρ(x[i]) · Π_k h_k`` (dimensionless, summing to 1).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np

from mfbridge.errors import InputError

__all__ = ["Grid", "to_float_array"]

MAX_DIM = 3
MIN_CELLS = 3


def _to_plain(value: Any) -> Any:
    """Turn nested sequences (lists, tuples, OmegaConf ``ListConfig``) into nested lists.

    Strings and mappings are returned unchanged so that the caller reports them as invalid.
    """
    if isinstance(value, np.ndarray) or np.isscalar(value):
        return value
    if isinstance(value, (str, bytes, dict)):
        return value
    if hasattr(value, "keys"):  # DictConfig and other mappings
        return value
    if isinstance(value, Iterable):
        return [_to_plain(item) for item in value]
    return value


def to_float_array(value: Any, name: str, *, max_ndim: int | None = None) -> np.ndarray:
    """Convert a scalar, (nested) sequence, array or OmegaConf list to a float64 array.

    Raises :class:`InputError` naming ``name`` if the value is not numeric, contains NaN or
    infinity, or has more than ``max_ndim`` array dimensions.
    """
    plain = _to_plain(value)
    if isinstance(plain, (str, bytes)) or hasattr(plain, "keys") or isinstance(plain, bool):
        raise InputError(f"{name} must be a number or a list of numbers, got {value!r}")
    try:
        array = np.asarray(plain, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"{name} must be a number or a (regular, nested) list of numbers, got {value!r}"
        ) from exc
    if max_ndim is not None and array.ndim > max_ndim:
        raise InputError(
            f"{name} must have at most {max_ndim} array dimension(s), got shape {array.shape}"
        )
    if not np.all(np.isfinite(array)):
        raise InputError(f"{name} must be finite (no NaN or infinity), got {value!r}")
    return array


def _as_int(value: Any, name: str) -> int:
    """Convert an integral number (int, numpy integer, or float with integer value) to int."""
    if isinstance(value, (bool, np.bool_)):
        raise InputError(f"{name} must be an integer, got {value!r}")
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)) and math.isfinite(value) and value == int(value):
        return int(value)
    raise InputError(f"{name} must be an integer, got {value!r}")


def _as_sequence(value: Any) -> list[Any]:
    """One list entry per axis: a scalar becomes a 1-element list."""
    plain = _to_plain(value)
    if isinstance(plain, np.ndarray):
        return list(plain.reshape(-1)) if plain.ndim <= 1 else [plain]
    if isinstance(plain, list):
        return plain
    return [plain]


@dataclass(frozen=True)
class Grid:
    """Box [lower, upper] (per axis) split into shape cells; values live at cell centres.

    The box faces are no-flux walls.

    Parameters
    ----------
    lower, upper
        Box corners, length L, one entry per axis (a scalar is used for every axis).
    shape
        Number of cells per axis (a scalar is used for every axis); each at least 3.

    The dimension ``dim`` (1, 2 or 3) is the longest of the three given lengths; entries of
    length one are repeated to that length.  All three are stored as tuples
    (``tuple[float, ...]`` and ``tuple[int, ...]``), so a Grid is hashable and comparable.
    """

    lower: tuple[float, ...]
    upper: tuple[float, ...]
    shape: tuple[int, ...]

    def __post_init__(self) -> None:
        lower = _as_sequence(self.lower)
        upper = _as_sequence(self.upper)
        shape = _as_sequence(self.shape)
        dim = max(len(lower), len(upper), len(shape))
        if not 1 <= dim <= MAX_DIM:
            raise InputError(f"a Grid has 1 to {MAX_DIM} axes, got {dim}")
        for label, seq in (("lower", lower), ("upper", upper), ("shape", shape)):
            if len(seq) not in (1, dim):
                raise InputError(
                    f"Grid {label} must be a scalar or have one entry per axis ({dim}), "
                    f"got {len(seq)} entries: {seq}"
                )
        lower = lower * dim if len(lower) == 1 else lower
        upper = upper * dim if len(upper) == 1 else upper
        shape = shape * dim if len(shape) == 1 else shape

        lo = tuple(float(v) for v in to_float_array(lower, "Grid lower", max_ndim=1))
        up = tuple(float(v) for v in to_float_array(upper, "Grid upper", max_ndim=1))
        n = tuple(_as_int(v, f"Grid shape[{k}]") for k, v in enumerate(shape))
        for k in range(dim):
            if not lo[k] < up[k]:
                raise InputError(
                    f"Grid needs lower < upper on every axis; axis {k} has "
                    f"lower={lo[k]} and upper={up[k]}"
                )
            if n[k] < MIN_CELLS:
                raise InputError(
                    f"Grid needs at least {MIN_CELLS} cells per axis; axis {k} has {n[k]}"
                )
        object.__setattr__(self, "lower", lo)
        object.__setattr__(self, "upper", up)
        object.__setattr__(self, "shape", n)

    @property
    def dim(self) -> int:
        """Number of spatial axes d."""
        return len(self.shape)

    @property
    def size(self) -> int:
        """Total number of cells Π_k shape[k]."""
        return math.prod(self.shape)

    @property
    def extent(self) -> tuple[float, ...]:
        """Box side lengths upper_k - lower_k (length L) per axis."""
        return tuple(u - lo for lo, u in zip(self.lower, self.upper, strict=True))

    @property
    def spacing(self) -> tuple[float, ...]:
        """Cell widths h_k = (upper_k - lower_k) / shape[k] (length L) per axis."""
        return tuple(e / n for e, n in zip(self.extent, self.shape, strict=True))

    @property
    def cell_volume(self) -> float:
        """Cell volume Π_k h_k (L^d)."""
        return math.prod(self.spacing)

    @property
    def axes(self) -> tuple[np.ndarray, ...]:
        """Cell centres per axis: x_k[i] = lower_k + (i + 1/2) h_k, arrays of shape (shape[k],)."""
        return tuple(
            lo + (np.arange(n, dtype=np.float64) + 0.5) * h
            for lo, n, h in zip(self.lower, self.shape, self.spacing, strict=True)
        )

    @property
    def edges(self) -> tuple[np.ndarray, ...]:
        """Cell faces per axis: lower_k + i h_k, i = 0..shape[k], arrays of shape (shape[k]+1,).

        The last face is set exactly to ``upper_k``.
        """
        out = []
        for lo, up, n, h in zip(self.lower, self.upper, self.shape, self.spacing, strict=True):
            faces = lo + np.arange(n + 1, dtype=np.float64) * h
            faces[-1] = up
            out.append(faces)
        return tuple(out)

    @property
    def points(self) -> np.ndarray:
        """All cell centres, array of shape (*shape, dim) with 'ij' indexing (L)."""
        return np.stack(np.meshgrid(*self.axes, indexing="ij"), axis=-1)

    def contains(self, x: Any) -> np.ndarray:
        """Whether points lie in the closed box: x of shape (..., dim) -> bool array (...)."""
        arr = to_float_array(x, "points") if not isinstance(x, np.ndarray) else np.asarray(x)
        if arr.ndim == 0 or arr.shape[-1] != self.dim:
            raise InputError(
                f"points must have shape (..., {self.dim}) for a {self.dim}D grid, "
                f"got shape {arr.shape}"
            )
        lower = np.asarray(self.lower)
        upper = np.asarray(self.upper)
        return np.all((arr >= lower) & (arr <= upper), axis=-1)

    def overlaps(self, target: Grid) -> tuple[np.ndarray, ...]:
        """Per axis, the fraction of each cell of this grid inside each cell of ``target``:
        arrays of shape (target.shape[k], shape[k]), O[j, i] = |c_i ∩ c'_j| / h_k (the cells'
        widths along axis k). A column sums to the fraction of cell i inside the target box."""
        if not isinstance(target, Grid) or target.dim != self.dim:
            raise InputError(f"a {self.dim}D target grid is needed, got {target!r}")
        out = []
        for e_src, e_dst, h in zip(self.edges, target.edges, self.spacing, strict=True):
            left = np.maximum(e_dst[:-1, None], e_src[None, :-1])
            right = np.minimum(e_dst[1:, None], e_src[None, 1:])
            out.append(np.clip(right - left, 0.0, None) / h)
        return tuple(out)

    def remap(self, masses: np.ndarray, target: Grid) -> np.ndarray:
        """Cell masses (..., *shape) moved to the cells of ``target`` (..., *target.shape),
        reading them as a piecewise-constant density: each target cell receives the mass of the
        parts of the cells it overlaps (conservative; mass outside the target box is lost).
        On nested grids (target cells unions of these) it sums the masses of the cells inside."""
        out = np.asarray(masses, dtype=float)
        lead = out.ndim - self.dim
        for a, weights in enumerate(self.overlaps(target)):
            out = np.moveaxis(np.tensordot(weights, out, axes=([1], [lead + a])), 0, lead + a)
        return out

    def describe(self) -> dict[str, Any]:
        """Plain-dict summary: lower, upper, shape and spacing as lists."""
        return {
            "lower": list(self.lower),
            "upper": list(self.upper),
            "shape": list(self.shape),
            "spacing": list(self.spacing),
        }
