r"""Files of sampled positions (CSV/TSV, NPY, NPZ, Parquet): paths, readers, validation.

The endpoint built from them is :class:`mfbridge.model.samples.Samples`.

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
import io
import os
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.grid import MAX_DIM, _to_plain
from mfbridge.result import sha256

__all__ = ["FORMATS", "REPO_ROOT", "SampleData", "plain_list", "read_samples", "resolve_path"]

REPO_ROOT = Path(__file__).resolve().parents[2]
"""The folder holding ``conf/`` and ``examples/``; relative paths are looked up there second."""

FORMATS: dict[str, str] = {
    ".csv": "csv", ".tsv": "csv", ".npy": "npy", ".npz": "npz", ".parquet": "parquet",
    ".pq": "parquet",
}
MAX_ABS = 1e100
"""Largest accepted |coordinate| (L): beyond it moments overflow double precision."""


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


def plain_list(value: Any, what: str) -> list[Any] | None:
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
    values, labels = _array_positions(source, loaded, plain_list(columns, "columns"), "array")
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
    values, labels = _array_positions(source, raw, plain_list(columns, "columns"), repr(key))
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
    return SampleData(values, w, tuple(labels), np.asarray(rows), row_kind, path, sha256(path))


def read_samples(path: Path, file_format: str, columns: list[Any] | None, weights: str | None,
                 key: str | None) -> SampleData:
    """Read and validate one snapshot from ``path`` in ``file_format`` (a value of
    :data:`FORMATS`); ``columns``, ``weights`` and ``key`` as for
    :class:`~mfbridge.model.samples.Samples`."""
    if file_format == "csv":
        raw = _read_csv(path, columns, weights)
    elif file_format == "npy":
        raw = _read_npy(path, columns, weights)
    elif file_format == "npz":
        raw = _read_npz(path, columns, weights, key)
    else:
        raw = _read_parquet(path, columns, weights)
    return _validate(path, *raw)
