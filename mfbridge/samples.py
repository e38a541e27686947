r"""Endpoints from measured positions: files of samples turned into densities on the grid.

A user observes N particles (tracked beads, cells, agents) at t = 0 and M particles at t = T,
possibly with weights. :class:`Samples` reads one such snapshot from a file and is an
:class:`~mfbridge.endpoints.Endpoint`: it gives cell masses on any :class:`~mfbridge.grid.Grid`
of its dimension.

Files (chosen by the extension)
-------------------------------
* ``.csv`` (comma) or ``.tsv`` (tab): a header row naming the columns, then one row per sample.
  Blank lines and lines starting with ``#`` are skipped. ``columns`` names the position columns
  (default: every column except the ``weights`` column); ``weights`` names the weight column.
* ``.npy``: one array of shape (N,) (1D) or (N, d); ``columns`` may pick columns by index.
  An ``.npy`` file holds no weights: put positions and weights in an ``.npz`` instead.
* ``.npz``: ``key`` names the positions array (default: ``positions`` if present, else the only
  array in the file); ``weights`` names a weights array of shape (N,).
* ``.parquet`` / ``.pq``: named numeric columns as for CSV (read with pyarrow).

Positions are in the user's length unit L (the grid's box is given in the same unit); weights
are dimensionless, ≥ 0, with a positive total, and are normalised to w_i / Σ_j w_j.

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
:mod:`mfbridge.endpoints`, m[i] = ρ̂(x[i]) · Π_k h_k, renormalised; the kernel must be at least
``min_width_cells`` (default 1) cells wide along every direction, where the rule's error is
below 1e-8 of the mass.

``method="histogram"``: m[i] = Σ of the weights of the samples inside cell i (closed on the
upper wall), exact for the empirical law binned on the grid.

``mean()`` and ``cov()`` are the moments of the weighted empirical law,
x̄ = Σ_i w_i x_i and Σ_i w_i (x_i - x̄)(x_i - x̄)ᵀ (L, L²); the KDE's own covariance is
``cov() + kernel_cov()``.

Paths
-----
An absolute path is used as it is. A relative path is looked up in the working directory
first and, if no file is there, in the mfbridge repository root (the folder holding ``conf/``
and ``examples/``), so the shipped demo configuration works from any directory. ``describe()``
reports the absolute path and the file's SHA-256.

The file is read on first use (``dim``, ``masses``, ``mean``...), validated once, and cached;
every mistake raises :class:`~mfbridge.errors.InputError` naming the file and saying what was
expected and what was found.
"""

from __future__ import annotations

import csv
import hashlib
import io
import math
import os
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
from scipy.linalg import solve_triangular

from mfbridge.endpoints import MIN_WIDTH_CELLS, Endpoint, box_text
from mfbridge.errors import InputError
from mfbridge.grid import MAX_DIM, Grid, _to_plain

__all__ = [
    "BANDWIDTH_RULES",
    "FORMATS",
    "SampleData",
    "Samples",
    "auto_grid",
    "box_from_samples",
    "check_same_dimension",
    "resolve_path",
]

REPO_ROOT = Path(__file__).resolve().parent.parent
"""The folder holding ``conf/`` and ``examples/``; relative paths are looked up there second."""

FORMATS: dict[str, str] = {
    ".csv": "csv", ".tsv": "csv", ".npy": "npy", ".npz": "npz", ".parquet": "parquet",
    ".pq": "parquet",
}
BANDWIDTH_RULES = ("scott", "silverman")
METHODS = ("kde", "histogram")
MAX_ABS = 1e100
"""Largest accepted |coordinate| (L): beyond it moments overflow double precision."""
_BLOCK = 2_000_000  # grid points × samples evaluated at once by the KDE


# --------------------------------------------------------------------------- paths


def resolve_path(path: Any, what: str = "sample file") -> Path:
    """The absolute path of an existing file: ``path`` as given if absolute, else looked up in
    the working directory and then in the repository root (:data:`REPO_ROOT`)."""
    if isinstance(path, bytes) or not isinstance(path, (str, os.PathLike)):
        raise InputError(f"the {what} path must be a string naming a file, got {path!r}")
    text = os.fspath(path)
    if not text.strip():
        raise InputError(f"the {what} path is empty: give the name of a data file")
    candidate = Path(text).expanduser()
    places = [candidate] if candidate.is_absolute() else [Path.cwd() / candidate,
                                                          REPO_ROOT / candidate]
    for place in places:
        if place.is_file():
            return place.resolve()
    for place in places:
        if place.is_dir():
            raise InputError(f"the {what} {text!r} is a directory ({place}), expected a data file "
                             f"({', '.join(FORMATS)})")
    where = " or ".join(str(p) for p in places)
    raise InputError(f"the {what} {text!r} does not exist (looked for {where})")


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


# --------------------------------------------------------------------------- loaded data


@dataclass(frozen=True)
class SampleData:
    """One validated snapshot.

    positions: (N, d) float64 (L); weights: (N,) float64, ≥ 0, summing to 1; labels: one name
    per position column; rows: (N,) the line number (CSV) or row index (other formats) of each
    sample, for messages; path and sha256 of the file it came from.
    """

    positions: np.ndarray
    weights: np.ndarray
    labels: tuple[str, ...]
    rows: np.ndarray
    row_kind: str
    path: Path
    sha256: str

    @property
    def dim(self) -> int:
        return int(self.positions.shape[1])

    @property
    def effective_size(self) -> float:
        """Kish's effective sample size n_eff = 1 / Σ w_i² (= N for equal weights)."""
        return float(1.0 / np.sum(self.weights**2))

    def where(self, i: int) -> str:
        return f"{self.row_kind} {int(self.rows[i])}"


def _plain_list(value: Any, what: str) -> list[Any] | None:
    if value is None:
        return None
    plain = _to_plain(value)
    if isinstance(plain, np.ndarray):
        plain = plain.tolist()
    if isinstance(plain, (str, int)) and not isinstance(plain, bool):
        plain = [plain]
    if not isinstance(plain, list) or not plain:
        raise InputError(f"{what} must be a non-empty list of column names or indices, "
                         f"got {value!r}")
    return plain


def _column_names(columns: list[Any] | None, what: str) -> list[str] | None:
    if columns is None:
        return None
    if not all(isinstance(c, str) and c for c in columns):
        raise InputError(f"{what} must name columns by their header names (strings), "
                         f"got {columns!r}")
    if len(set(columns)) != len(columns):
        raise InputError(f"{what} names a column twice: {columns!r}")
    return columns


def _column_indices(columns: list[Any] | None, width: int, what: str) -> list[int] | None:
    if columns is None:
        return None
    if not all(isinstance(c, (int, np.integer)) and not isinstance(c, bool) for c in columns):
        raise InputError(f"{what} for an array file must be column indices (integers), "
                         f"got {columns!r}")
    out = [int(c) for c in columns]
    bad = [c for c in out if not 0 <= c < width]
    if bad:
        raise InputError(f"{what} {bad} out of range: the array has {width} column(s), "
                         f"indices 0..{width - 1}")
    if len(set(out)) != len(out):
        raise InputError(f"{what} names a column twice: {out!r}")
    return out


def _numeric_array(value: Any, source: str, what: str) -> np.ndarray:
    """A real numeric array, refusing text, objects, booleans and complex numbers."""
    arr = np.asarray(value)
    kind = arr.dtype.kind
    if kind == "b":
        raise InputError(f"{source}: {what} holds booleans (dtype {arr.dtype}), expected numbers")
    if kind == "c":
        raise InputError(f"{source}: {what} holds complex numbers, expected real numbers")
    if kind not in "iuf":
        raise InputError(f"{source}: {what} has dtype {arr.dtype}, expected numbers "
                         "(integers or floats)")
    return arr.astype(np.float64)


# --------------------------------------------------------------------------- readers


def _read_csv(path: Path, columns: list[Any] | None, weights: str | None
              ) -> tuple[np.ndarray, np.ndarray | None, list[str], np.ndarray, str]:
    source = f"sample file {path.name}"
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(f"{source} is not a UTF-8 text file (byte {exc.start} is not text): "
                         "expected a CSV table of positions") from exc
    except OSError as exc:
        raise InputError(f"cannot read {source}: {exc.strerror or exc}") from exc
    if "\x00" in text:
        raise InputError(f"{source} contains NUL bytes: it is a binary file, not a CSV table")
    delimiter = "\t" if path.suffix.lower() == ".tsv" else ","
    lines = [(n, line) for n, line in enumerate(text.splitlines(), start=1)
             if line.strip() and not line.lstrip().startswith("#")]
    if not lines:
        raise InputError(f"{source} is empty: expected a header row naming the columns "
                         "(e.g. x,y,weight) and one row per sample")
    try:
        rows = list(csv.reader(io.StringIO("\n".join(line for _, line in lines)),
                               delimiter=delimiter, strict=True))
    except csv.Error as exc:
        raise InputError(f"{source} is not valid CSV: {exc}") from exc
    if len(rows) != len(lines):
        raise InputError(f"{source} has a quoted field spanning several lines; expected one "
                         "sample per line")
    header = [h.strip() for h in rows[0]]
    if all(_is_number(h) for h in header):
        raise InputError(f"{source} has no header row: its first row {rows[0]} is numeric; add "
                         "a first line naming the columns (e.g. x,y,weight)")
    if any(not h for h in header):
        raise InputError(f"{source} has an empty column name in its header {header}")
    if len(set(header)) != len(header):
        raise InputError(f"{source} has duplicate column names in its header {header}")
    body, line_no = rows[1:], [n for n, _ in lines[1:]]
    if not body:
        raise InputError(f"{source} has a header {header} but no data rows: expected one row "
                         "per sample")
    names = _column_names(columns, "columns")
    return _table(source, header, body, line_no, names, weights, "line")


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _pick_columns(source: str, header: Sequence[str], names: list[str] | None,
                  weights: str | None) -> list[str]:
    available = ", ".join(header)
    if weights is not None and weights not in header:
        raise InputError(f"{source} has no weights column {weights!r}; its columns are: "
                         f"{available}")
    if names is None:
        names = [h for h in header if h != weights]
        if not names:
            raise InputError(f"{source} has no position column besides the weights column "
                             f"{weights!r}")
        if len(names) > MAX_DIM:
            raise InputError(f"{source} has {len(names)} candidate position columns "
                             f"({', '.join(names)}); at most {MAX_DIM} are allowed: choose "
                             "them with columns=[...]")
    missing = [c for c in names if c not in header]
    if missing:
        raise InputError(f"{source} has no column {missing[0]!r}; its columns are: {available}")
    if weights is not None and weights in names:
        raise InputError(f"{source}: column {weights!r} is given both as a position and as the "
                         "weights")
    return names


def _table(source: str, header: list[str], body: list[list[str]], row_ids: list[int],
           names: list[str] | None, weights: str | None, row_kind: str
           ) -> tuple[np.ndarray, np.ndarray | None, list[str], np.ndarray, str]:
    names = _pick_columns(source, header, names, weights)
    index = {h: k for k, h in enumerate(header)}
    wanted = [*names, *([weights] if weights is not None else [])]
    values = np.empty((len(body), len(wanted)))
    for r, (row, row_id) in enumerate(zip(body, row_ids, strict=True)):
        if len(row) != len(header):
            raise InputError(f"{source}: {row_kind} {row_id} has {len(row)} field(s) but the "
                             f"header has {len(header)}")
        for c, name in enumerate(wanted):
            field = row[index[name]].strip()
            if not field:
                raise InputError(f"{source}: {row_kind} {row_id}, column {name!r} is empty "
                                 "(a missing value); every sample needs every column")
            try:
                values[r, c] = float(field)
            except ValueError:
                raise InputError(f"{source}: {row_kind} {row_id}, column {name!r} holds "
                                 f"{field!r}, which is not a number") from None
    w = values[:, len(names)] if weights is not None else None
    return values[:, :len(names)], w, names, np.asarray(row_ids), row_kind


def _array_positions(source: str, arr: Any, columns: list[Any] | None, what: str
                     ) -> tuple[np.ndarray, list[str]]:
    values = _numeric_array(arr, source, what)
    if values.ndim == 0:
        raise InputError(f"{source}: {what} is a single number, expected an array of shape "
                         "(N,) or (N, d) with one row per sample")
    if values.ndim > 2:
        raise InputError(f"{source}: {what} has shape {values.shape}, expected (N,) or (N, d) "
                         "with one row per sample")
    if values.ndim == 1:
        values = values[:, None]
    picked = _column_indices(columns, values.shape[1], "columns")
    if picked is not None:
        values = values[:, picked]
    elif values.shape[1] > MAX_DIM and values.shape[0] > 0:
        raise InputError(f"{source}: {what} has shape {values.shape}, i.e. {values.shape[1]} "
                         f"coordinates per sample; at most {MAX_DIM} are allowed (pick some "
                         "with columns=[...], or is the array transposed?)")
    labels = [f"{what}[:, {k}]" for k in (picked or range(values.shape[1]))]
    return values, labels


def _read_npy(path: Path, columns: list[Any] | None, weights: str | None
              ) -> tuple[np.ndarray, np.ndarray | None, list[str], np.ndarray, str]:
    source = f"sample file {path.name}"
    if weights is not None:
        raise InputError(f"{source} is an .npy file, which holds one array: weights={weights!r} "
                         "needs an .npz file with a weights array (or a CSV/Parquet column)")
    loaded = _np_load(path, source)
    if isinstance(loaded, np.lib.npyio.NpzFile):
        loaded.close()
        raise InputError(f"{source} holds several arrays (an .npz archive) but is named .npy: "
                         "rename it to .npz")
    values, labels = _array_positions(source, loaded, _plain_list(columns, "columns"), "array")
    return values, None, labels, np.arange(values.shape[0]), "row"


def _np_load(path: Path, source: str) -> Any:
    with open(path, "rb") as handle:
        magic = handle.read(6)
    if magic != b"\x93NUMPY" and not magic.startswith(b"PK"):
        raise InputError(f"{source} is not an .npy or .npz file: it does not start with the "
                         "NumPy or zip signature (save it with numpy.save or numpy.savez)")
    try:
        return np.load(path, allow_pickle=False)
    except ValueError as exc:
        if "allow_pickle" in str(exc):
            raise InputError(f"{source} holds Python objects (an object array), which are not "
                             f"read for safety; save plain numbers: {exc}") from exc
        raise InputError(f"{source} is a damaged or truncated .npy/.npz file: {exc}") from exc
    except (OSError, EOFError, zipfile.BadZipFile) as exc:
        raise InputError(f"{source} is a damaged or truncated .npy/.npz file: {exc}") from exc


def _read_npz(path: Path, columns: list[Any] | None, weights: str | None, key: str | None
              ) -> tuple[np.ndarray, np.ndarray | None, list[str], np.ndarray, str]:
    source = f"sample file {path.name}"
    archive = _np_load(path, source)
    if not isinstance(archive, np.lib.npyio.NpzFile):
        raise InputError(f"{source} holds a single .npy array but is named .npz: rename it to "
                         ".npy")
    with archive:
        keys = list(archive.files)
        if not keys:
            raise InputError(f"{source} is an empty .npz archive: expected a positions array")
        if key is None:
            if "positions" in keys:
                key = "positions"
            elif len([k for k in keys if k != weights]) == 1:
                key = next(k for k in keys if k != weights)
            else:
                raise InputError(f"{source} holds arrays {keys}: say which one holds the "
                                 "positions with key=...")
        for name, role in ((key, "key"), (weights, "weights")):
            if name is not None and name not in keys:
                raise InputError(f"{source} has no array {name!r} ({role}); its arrays are: "
                                 f"{', '.join(keys)}")
        if weights is not None and weights == key:
            raise InputError(f"{source}: array {key!r} is given both as positions and as weights")
        try:
            raw = archive[key]
            raw_w = archive[weights] if weights is not None else None
        except (ValueError, OSError, EOFError, zipfile.BadZipFile) as exc:
            raise InputError(f"{source}: cannot read its arrays without unpickling Python "
                             f"objects, or the archive is damaged: {exc}") from exc
    values, labels = _array_positions(source, raw, _plain_list(columns, "columns"), repr(key))
    w = None
    if raw_w is not None:
        w = _numeric_array(raw_w, source, f"weights array {weights!r}")
        if w.ndim != 1 or w.shape[0] != values.shape[0]:
            raise InputError(f"{source}: weights array {weights!r} has shape {w.shape}, expected "
                             f"({values.shape[0]},): one weight per sample")
    return values, w, labels, np.arange(values.shape[0]), "row"


def _read_parquet(path: Path, columns: list[Any] | None, weights: str | None
                  ) -> tuple[np.ndarray, np.ndarray | None, list[str], np.ndarray, str]:
    source = f"sample file {path.name}"
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError as exc:  # pragma: no cover - pyarrow is a dependency
        raise InputError("reading Parquet files needs pyarrow (pip install pyarrow)") from exc
    try:
        table = pq.read_table(path)
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise InputError(f"{source} is not a readable Parquet file: {exc}") from exc
    header = list(table.column_names)
    if not header:
        raise InputError(f"{source} has no columns: expected named position columns")
    if len(set(header)) != len(header):
        raise InputError(f"{source} has duplicate column names {header}")
    names = _pick_columns(source, header, _column_names(columns, "columns"), weights)
    if table.num_rows == 0:
        raise InputError(f"{source} has columns {header} but no rows: expected one row per "
                         "sample")
    wanted = [*names, *([weights] if weights is not None else [])]
    out = []
    for name in wanted:
        col = table.column(name)
        if not (pa.types.is_integer(col.type) or pa.types.is_floating(col.type)):
            raise InputError(f"{source}: column {name!r} has type {col.type}, expected numbers")
        if col.null_count:
            first = int(np.flatnonzero(col.is_null().to_numpy(zero_copy_only=False))[0])
            raise InputError(f"{source}: column {name!r} has {col.null_count} missing (null) "
                             f"value(s), first in row {first}")
        out.append(col.to_numpy(zero_copy_only=False).astype(np.float64))
    values = np.stack(out[:len(names)], axis=1)
    w = out[-1] if weights is not None else None
    return values, w, names, np.arange(values.shape[0]), "row"


def _validate(path: Path, values: np.ndarray, raw_w: np.ndarray | None, labels: list[str],
              rows: np.ndarray, row_kind: str) -> SampleData:
    source = f"sample file {path.name}"
    n, d = values.shape
    if n == 0:
        raise InputError(f"{source} holds no samples: expected at least one row")
    if d == 0:
        raise InputError(f"{source} holds no coordinates: expected 1 to {MAX_DIM} columns")
    if d > MAX_DIM:
        raise InputError(f"{source} has {d} position columns; at most {MAX_DIM} are allowed")
    for kind, bad in (("NaN", np.isnan(values)), ("infinite", np.isinf(values))):
        if bad.any():
            r, c = (int(i) for i in np.argwhere(bad)[0])
            raise InputError(f"{source} contains {int(bad.sum())} {kind} position value(s), "
                             f"first in column {labels[c]!r} at {row_kind} {int(rows[r])}: "
                             "remove or fix those samples")
    big = np.abs(values) >= MAX_ABS
    if big.any():
        r, c = (int(i) for i in np.argwhere(big)[0])
        raise InputError(f"{source}: column {labels[c]!r} at {row_kind} {int(rows[r])} holds "
                         f"{values[r, c]:.3g}, beyond ±{MAX_ABS:g}: check the column and its units")
    if raw_w is None:
        w = np.full(n, 1.0 / n)
    else:
        for kind, bad in (("NaN", np.isnan(raw_w)), ("infinite", np.isinf(raw_w))):
            if bad.any():
                r = int(np.flatnonzero(bad)[0])
                raise InputError(f"{source} contains {int(bad.sum())} {kind} weight(s), first at "
                                 f"{row_kind} {int(rows[r])}")
        negative = raw_w < 0
        if negative.any():
            r = int(np.flatnonzero(negative)[0])
            raise InputError(f"{source} contains {int(negative.sum())} negative weight(s), first "
                             f"{raw_w[r]:.3g} at {row_kind} {int(rows[r])}; weights must be ≥ 0")
        top = float(raw_w.max())
        if top <= 0.0:
            raise InputError(f"{source}: the weights sum to zero (all {n} are 0): no sample "
                             "carries mass; expected a positive total weight")
        scaled = raw_w / top  # in [0, 1]: the sum cannot overflow
        w = scaled / scaled.sum()
    return SampleData(values, w, tuple(labels), np.asarray(rows), row_kind, path, _sha256(path))


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
        self.columns = _plain_list(columns, "columns")
        self._data: SampleData | None = None
        self._kernel: np.ndarray | None = None

    # ------------------------------------------------------------------ loading
    @property
    def data(self) -> SampleData:
        """The validated snapshot, read from the file on first use."""
        if self._data is None:
            if self.format == "csv":
                raw = _read_csv(self.path, self.columns, self.weights_name)
            elif self.format == "npy":
                raw = _read_npy(self.path, self.columns, self.weights_name)
            elif self.format == "npz":
                raw = _read_npz(self.path, self.columns, self.weights_name, self.key)
            else:
                raw = _read_parquet(self.path, self.columns, self.weights_name)
            self._data = _validate(self.path, *raw)
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
    lower, upper, _ = _box_and_widths(initial, final, margin)
    return tuple(float(v) for v in lower), tuple(float(v) for v in upper)


def _box_and_widths(initial: Endpoint, final: Endpoint, margin: Any
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    for label, e in (("initial", initial), ("final", final)):
        if not isinstance(e, Endpoint):
            raise InputError(f"the automatic box needs mfbridge endpoints; the {label} one is "
                             f"{e!r}")
    fraction = _check_margin(margin)
    check_same_dimension(initial, final)
    lo0, hi0, sd0 = _reach(initial)
    lo1, hi1, sd1 = _reach(final)
    lo, hi = np.minimum(lo0, lo1), np.maximum(hi0, hi1)
    positive = [s for s in (sd0, sd1) if np.all(s > 0)]
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


def auto_grid(initial: Endpoint, final: Endpoint, shape: Any = None, margin: float = 0.2,
              cells_per_width: float = 1.5) -> Grid:
    """A :class:`Grid` on :func:`box_from_samples` (``initial``, ``final``, ``margin``).

    ``shape``: cells per axis (a scalar is used on every axis), or None to choose them: along
    axis k, h_k = s_k / ``cells_per_width`` with s_k the narrower of the two snapshots' kernel
    standard deviations along k (the endpoint's own for parametric endpoints), clipped to
    :data:`AUTO_CELLS` cells; 64 cells per axis when neither snapshot has a width (histograms).
    """
    lower, upper, width = _box_and_widths(initial, final, margin)
    if shape is None:
        if isinstance(cells_per_width, (bool, np.bool_)) or not isinstance(
                cells_per_width, (int, float)) or not cells_per_width > 0:
            raise InputError(f"cells_per_width must be a positive number, got {cells_per_width!r}")
        if np.all(width > 0):
            n = np.ceil((upper - lower) * float(cells_per_width) / width)
            shape = tuple(int(v) for v in np.clip(n, *AUTO_CELLS))
        else:
            shape = 64
    return Grid(lower=tuple(map(float, lower)), upper=tuple(map(float, upper)), shape=shape)
