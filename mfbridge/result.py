"""The result of a bridge computation: one self-describing object, saved as labelled arrays.

A run folder holds ``result.nc`` (netCDF, opened by ``xarray.open_dataset``) with every array
labelled by its coordinates (``t``, ``x``/``x0``, ``x1``..., ``dim``), and ``summary.json`` with
the scalar numbers a reader wants first (cost and its parts, convergence, timings, model).

The format is written by :meth:`BridgeResult.save` and decoded by
:meth:`BridgeResult.from_dataset`; reading a run folder (``mfbridge.load``,
:func:`mfbridge.runs.api.load`) belongs to the runs layer, which also builds the grid. This
module sits at the root of the package and imports nothing from its layers: a result's grid is
any object with the :class:`GridLike` attributes.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import errno
import hashlib
import json
import math
import os
import shutil
import tempfile
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from mfbridge.errors import DiskFullError, InputError

FORMAT_VERSION = 1
UNITS = ("positions in the user's length unit (that of the grid box and of any data files), "
         "times in the user's time unit (that of the horizon); σ in length/√time, D in "
         "length²/time, control in length/time, density in 1/length^d, cost J dimensionless "
         "(per particle)")
INTERPRETATION = (
    "The bridge is the most likely evolution of the population between the two observed "
    "distributions under the chosen model (confinement U, interaction W, noise σ); it is not "
    "an observed trajectory. Change the model and the bridge and its cost change: compare "
    "models by sweeping their parameters (mfbridge -m ..., then mfbridge collect)."
)
RESULT_FILE = "result.nc"
SUMMARY_FILE = "summary.json"
COMPLETE_FILE = "complete.json"
#: The statuses of a solve (``BridgeResult.status``): "converged" (tol met on both the
#: self-consistency residual and the marginal error, sanity checks passed), "not_converged"
#: (stopped before meeting tol: iteration limit, time budget, stall; best iterate returned),
#: "diverged" (the iteration blew up; last finite iterate returned), "suspect" (stopped as
#: converged but a sanity check failed; the message names it).
STATUSES = ("converged", "not_converged", "diverged", "suspect")


class GridLike(Protocol):
    """What a result needs of its grid (:class:`mfbridge.model.grid.Grid` has it): the box
    corners ``lower``/``upper`` and ``shape`` (one entry per axis), the cell ``spacing``, the
    cell centres per axis ``axes``, ``dim`` and the cell volume."""

    @property
    def dim(self) -> int: ...
    @property
    def shape(self) -> tuple[int, ...]: ...
    @property
    def lower(self) -> tuple[float, ...]: ...
    @property
    def upper(self) -> tuple[float, ...]: ...
    @property
    def spacing(self) -> tuple[float, ...]: ...
    @property
    def axes(self) -> tuple[np.ndarray, ...]: ...
    @property
    def cell_volume(self) -> float: ...


@dataclass
class Alternative:
    r"""Another bridge of the same problem, found from another start of the solver.

    ``start``: label of the initial guess (``"cold"``, ``"warm"``, ``"tilt+x0"``...);
    ``cost``: its J; ``status`` and ``residual``: of its outer iteration; ``distance``:
    :math:`\max_t \sum_i |p_{t,i} - p'_{t,i}|`, the largest L1 distance between its cell masses
    and those of the returned bridge; ``mean``: its mean path (K+1, d); ``density``: its
    :math:`\rho_t` (K+1, *grid.shape), or ``None`` if not kept.
    """

    start: str
    cost: float
    status: str
    residual: float
    distance: float
    mean: np.ndarray
    density: np.ndarray | None = None

    def summary(self) -> dict[str, Any]:
        """The record written into ``summary.json`` (every field but the density)."""
        return {"start": self.start, "cost": self.cost, "status": self.status,
                "residual": self.residual, "distance": self.distance,
                "mean": np.asarray(self.mean).tolist()}


@dataclass
class Segment:
    """One segment of a bridge through a series of snapshots (:mod:`mfbridge.model.series`):
    from the snapshot at ``start`` to the one at ``end``; its nodes are ``first`` to
    ``first + steps`` of the joined result's times; its cost J and parts, status, message and
    outer iterations."""

    start: float
    end: float
    first: int
    steps: int
    cost: float
    cost_kinetic: float
    cost_drift: float
    cost_free_energy: float
    status: str
    message: str
    iterations: int

    def summary(self) -> dict[str, Any]:
        """The record written into ``summary.json``."""
        return dict(self.__dict__)


@dataclass
class ErrorEstimate:
    r"""Estimated discretisation error of a result, from companion solves on coarser grids
    (how: :mod:`mfbridge.accuracy`; Richardson extrapolation and Roache's grid convergence
    index, Annu. Rev. Fluid Mech. 29, 1997).

    * ``cost_error``: estimated :math:`|J_h - J|` (absolute, dimensionless) and
      ``cost_relative`` the same divided by :math:`|J_h|`;
    * ``cost_extrapolated``: Richardson's extrapolation of J to zero cell width and time step;
    * ``gci``: Roache's grid convergence index of J (relative): ``safety_factor`` ×
      ``cost_relative``, an error band meant to hold with about 95% confidence;
    * ``density_l1``: estimated largest L1 error of the density flow over time (cell masses,
      on the companion's cells); ``mean_error``: estimated largest error of the mean path
      (length);
    * ``observed_order``: the order from three grids (NaN with fewer, or when the differences
      change sign), ``order``: the order used, ``asymptotic``: whether the observed order
      agrees with the scheme's (None: not checked);
    * ``grids``: one record per companion (shape, steps, cost, status, iterations, seconds);
      ``seconds``: the wall-clock time the companions took; ``note``: caveats in words.
    """

    cost_error: float
    cost_relative: float
    cost_extrapolated: float
    gci: float
    safety_factor: float
    density_l1: float
    mean_error: float
    observed_order: float
    order: float
    asymptotic: bool | None
    grids: list[dict[str, Any]] = field(default_factory=list)
    seconds: float = 0.0
    note: str = ""
    # with a target accuracy: the target (relative error of J), whether the GCI met it, and the
    # grids tried (box, shape, steps, cost, gci, status, seconds), the last one returned
    target: float | None = None
    target_met: bool | None = None
    tried: list[dict[str, Any]] = field(default_factory=list)
    scheme_order: float = 2.0  # the order of the scheme in h and Δt

    @property
    def available(self) -> bool:
        return bool(np.isfinite(self.cost_error))

    def summary(self) -> dict[str, Any]:
        """The record written into ``summary.json`` (NaN written as null)."""
        out = dataclasses.asdict(self)
        return {k: (None if isinstance(v, float) and not np.isfinite(v) else v)
                for k, v in out.items()}

    @classmethod
    def from_summary(cls, record: dict[str, Any]) -> ErrorEstimate:
        values = {k: (math.nan if v is None and k not in ("asymptotic", "target", "target_met")
                      else v)
                  for k, v in record.items() if k in {f.name for f in dataclasses.fields(cls)}}
        return cls(**values)

    def describe(self) -> str:
        """One line for figure titles and tables."""
        if not self.available:
            return "no error estimate"
        text = (f"est. error {100 * self.cost_relative:.2g}% (GCI {100 * self.gci:.2g}%), "
                f"extrapolated J = {self.cost_extrapolated:.6g}")
        if self.asymptotic is False:
            text += " (not asymptotic)"
        return text

    def lines(self) -> list[str]:
        """A few lines for the log: the estimate, how it was made, and its caveats."""
        companions = ", ".join(f"{' x '.join(map(str, g['shape']))} cells x {g['steps']} steps"
                               for g in self.grids) or "none"
        if not self.available:
            return [f"no discretisation-error estimate: {self.note} (companions: {companions})"]
        out = [f"discretisation error of J: ±{self.cost_error:.3g} ({100 * self.cost_relative:.2g}"
               f"%), GCI {100 * self.gci:.2g}% (safety factor {self.safety_factor:g}); "
               f"extrapolated J = {self.cost_extrapolated:.8g}; density flow ±"
               f"{self.density_l1:.2g} (L1), mean path ±{self.mean_error:.2g}",
               f"estimated from companion solves on {companions} ({self.seconds:.3g} s); "
               + (f"observed order {self.observed_order:.2f} (the scheme's: "
                  f"{self.scheme_order:g}), order used {self.order:.3g}"
                  if np.isfinite(self.observed_order) else f"order {self.order:g} assumed")]
        if self.note:
            out.append(f"note: {self.note}")
        return out


@dataclass
class BridgeResult:
    r"""The mean-field Schrödinger bridge on a grid.

    Arrays over time have leading length K+1 (``times``); spatial axes follow ``grid.shape``.

    * ``density``: :math:`\rho_t` (1/length^d), shape (K+1, *grid.shape);
    * ``control``: :math:`u_t = \sigma^2\nabla\psi_t` (length/time), shape (K+1, *grid.shape, d);
    * ``log_forward``, ``log_backward``: Schrödinger potentials :math:`\log\hat\varphi_t`,
      :math:`\psi_t = \log\varphi_t` with :math:`\rho_t\,\mathrm{vol} = \hat\varphi_t\varphi_t`;
    * ``correction``: the potential :math:`V_t` that makes the frozen-reference bridge the
      minimiser of J (zero for the ``frozen`` method);
    * ``cost``: J (dimensionless, per particle) = ``cost_kinetic`` + ``cost_drift`` +
      ``cost_free_energy``, with :math:`\frac{1}{2\sigma^2}\iint|v|^2\rho`,
      :math:`\frac{1}{2\sigma^2}\iint|b|^2\rho` and :math:`(F(\nu) - F(\mu))/\sigma^2`
      (v the flow's velocity, b the reference drift): each part is computed from its own
      formula, so on the grid the sum equals J up to the discretisation error;
    * ``mean`` (K+1, d), ``cov`` (K+1, d, d), ``free_energy`` and ``entropy`` (K+1,).
    """

    grid: GridLike
    times: np.ndarray
    density: np.ndarray
    control: np.ndarray
    log_forward: np.ndarray
    log_backward: np.ndarray
    correction: np.ndarray
    mean: np.ndarray
    cov: np.ndarray
    free_energy: np.ndarray
    entropy: np.ndarray
    cost: float
    cost_kinetic: float
    cost_drift: float
    cost_free_energy: float
    noise: float
    method: str
    route: str
    status: str
    message: str
    iterations: int
    residual: float
    marginal_error: float
    history: list[dict[str, float]] = field(default_factory=list)
    timings: dict[str, float] = field(default_factory=dict)
    model: dict[str, Any] = field(default_factory=dict)
    config: dict[str, Any] | None = None
    coupling: np.ndarray | None = None
    # other bridges found by a multi-start solve (solver option ``starts``), cheapest first
    alternatives: list[Alternative] = field(default_factory=list)
    # label of the initial guess this bridge came from ("" when not a multi-start solve)
    start: str = ""
    # what the stopping rule watched: {"quantity": name, "value": last value, "tolerance": tol}
    stopping: dict[str, Any] = field(default_factory=dict)
    # open systems (direct solver with reservoirs): the steady profile, in the units and
    # normalisation of ``density`` (grid.shape)
    steady_density: np.ndarray | None = None
    # a bridge through more than two snapshots: its segments (times[seg.first] = seg.start)
    segments: list[Segment] = field(default_factory=list)
    # discretisation-error estimate (mfbridge.solvers.accuracy), None when not estimated
    error: ErrorEstimate | None = None
    # advice on the grid, before and after the solve (mfbridge.solvers.advice)
    advice: list[str] = field(default_factory=list)

    @property
    def converged(self) -> bool:
        return self.status == "converged"

    @property
    def horizon(self) -> float:
        return float(self.times[-1] - self.times[0])

    @property
    def masses(self) -> np.ndarray:
        """Cell masses, shape (K+1, *grid.shape); each slice sums to 1 (in a closed box: with
        reservoirs the mass changes, see :mod:`mfbridge.solvers.direct`)."""
        return self.density * self.grid.cell_volume

    def marginal(self, axes: int | tuple[int, ...]) -> np.ndarray:
        r"""Marginal density of the kept spatial ``axes``: :math:`\rho_t` integrated over the
        other axes (cell masses summed), divided by the kept cells' area.

        Shape (K+1, *[grid.shape[a] for a in axes]), units 1/length^len(axes); summed over the
        kept cells and multiplied by their area it gives 1 at every time. Axes are kept in
        increasing order.
        """
        kept = sorted({axes} if isinstance(axes, (int, np.integer)) else set(axes))
        if not kept or any(not 0 <= a < self.grid.dim for a in kept):
            raise InputError(f"marginal axes must be distinct integers in [0, {self.grid.dim}), "
                             f"got {axes!r}")
        dropped = tuple(1 + a for a in range(self.grid.dim) if a not in kept)
        area = float(np.prod([self.grid.spacing[a] for a in kept]))
        return self.masses.sum(axis=dropped) / area

    def summary(self) -> dict[str, Any]:
        """The scalar record written to ``summary.json``."""
        return {
            "format_version": FORMAT_VERSION,
            "cost": self.cost,
            "cost_kinetic": self.cost_kinetic,
            "cost_drift": self.cost_drift,
            "cost_free_energy": self.cost_free_energy,
            "status": self.status,
            "message": self.message,
            "iterations": self.iterations,
            "residual": self.residual,
            "marginal_error": self.marginal_error,
            "stopping": self.stopping,
            "method": self.method,
            "route": self.route,
            "noise": self.noise,
            "horizon": self.horizon,
            "steps": len(self.times) - 1,
            "grid": {"lower": list(self.grid.lower), "upper": list(self.grid.upper),
                     "shape": list(self.grid.shape)},
            "model": self.model,
            "noise_input": self._noise_input(),
            "units": UNITS,
            "interpretation": INTERPRETATION,
            "timings": self.timings,
            "start": self.start,
            "alternatives": [a.summary() for a in self.alternatives],
            **({"segments": [s.summary() for s in self.segments]} if self.segments else {}),
            "error_estimate": None if self.error is None else self.error.summary(),
            "advice": list(self.advice),
        }

    def _noise_input(self) -> str:
        """Which of σ (``noise``) or D (``diffusion``, σ = √(2D)) the configuration gave."""
        diffusion = (self.config or {}).get("diffusion")
        if diffusion is not None:
            return (f"diffusion coefficient D = {diffusion:g} length²/time given; "
                    f"noise σ = √(2D) = {self.noise:.6g} length/√time")
        return (f"noise σ = {self.noise:g} length/√time given "
                f"(diffusion coefficient D = σ²/2 = {0.5 * self.noise**2:.6g} length²/time)")

    # ------------------------------------------------------------------ labelled arrays
    def _space_dims(self) -> list[str]:
        return ["x"] if self.grid.dim == 1 else [f"x{a}" for a in range(self.grid.dim)]

    def to_dataset(self) -> Any:
        """The result as an ``xarray.Dataset`` (coordinates t, x or x0/x1..., dim)."""
        import xarray as xr

        space = self._space_dims()
        coords: dict[str, Any] = {"t": self.times, "dim": np.arange(self.grid.dim)}
        coords.update({name: axis for name, axis in zip(space, self.grid.axes, strict=True)})
        field_dims = ["t", *space]
        data = {
            "density": (field_dims, self.density, {"units": "1/length^d"}),
            "control": ([*field_dims, "dim"], self.control, {"units": "length/time"}),
            "log_forward": (field_dims, self.log_forward, {}),
            "log_backward": (field_dims, self.log_backward, {}),
            "correction": (field_dims, self.correction, {}),
            "mean": (["t", "dim"], self.mean, {}),
            "cov": (["t", "dim", "dim_"], self.cov, {}),
            "free_energy": (["t"], self.free_energy, {}),
            "entropy": (["t"], self.entropy, {}),
        }
        if self.coupling is not None:
            data["coupling"] = (["cell_0", "cell_T"], self.coupling, {})
        if self.steady_density is not None:
            data["steady_density"] = (space, self.steady_density,
                                      {"units": "1/length^d", "meaning": "steady profile "
                                       "between the reservoirs"})
        kept = [a.density for a in self.alternatives if a.density is not None]
        if kept and len(kept) == len(self.alternatives):
            coords["bridge"] = np.arange(1, len(kept) + 1)
            data["alternative_density"] = (["bridge", *field_dims], np.stack(kept),
                                           {"units": "1/length^d",
                                            "meaning": "other bridges, in the order of "
                                                       "summary alternatives"})
        hist_keys = sorted({k for row in self.history for k in row})
        if self.history:
            coords["iteration"] = np.arange(1, len(self.history) + 1)
            for key in hist_keys:
                values = [row.get(key, np.nan) for row in self.history]
                data[f"history_{key}"] = (["iteration"], np.asarray(values, dtype=float), {})
        variables = {k: xr.Variable(d, np.asarray(v), attrs=a) for k, (d, v, a) in data.items()}
        attrs = {"summary": json.dumps(self.summary(), default=_json_default),
                 "config": json.dumps(self.config)}
        if self.error is not None:
            attrs.update({"cost_error_estimate": self.error.cost_error,
                          "cost_relative_error_estimate": self.error.cost_relative,
                          "cost_extrapolated": self.error.cost_extrapolated,
                          "cost_gci": self.error.gci,
                          "density_l1_error_estimate": self.error.density_l1,
                          "mean_error_estimate": self.error.mean_error})
        return xr.Dataset(variables, coords=coords, attrs=attrs)

    def save(self, directory: str | os.PathLike[str], *, marker: bool = True) -> Path:
        """Write ``result.nc`` and ``summary.json`` into ``directory`` (created if needed), then
        (``marker=True``) the completion marker ``complete.json`` with their SHA-256 and the
        status; the command line writes its own marker after the run record instead.

        Each file is written to a temporary name and renamed, and the marker comes last with
        the files' hashes, so an interrupted save never leaves a complete-looking but partial
        result (an older marker no longer matches the files). A
        full disk raises :class:`~mfbridge.errors.DiskFullError` ("no space left on the device
        at ..."). Returns the directory.
        """
        out = Path(directory)
        try:
            out.mkdir(parents=True, exist_ok=True)
            dataset = self.to_dataset()
            _atomic_write(out / RESULT_FILE,
                          lambda tmp: dataset.to_netcdf(tmp, engine="netcdf4"))
            text = json.dumps(self.summary(), indent=2, default=_json_default)
            _atomic_write(out / SUMMARY_FILE, lambda tmp: Path(tmp).write_text(text + "\n"))
            if marker:
                write_marker(out, self.status, (RESULT_FILE, SUMMARY_FILE))
        except (OSError, RuntimeError) as exc:
            full = disk_full(out, exc, need=sum(np.asarray(v).nbytes for v in (
                self.density, self.control, self.log_forward, self.log_backward,
                self.correction)))
            if full is None:
                raise
            raise full from exc
        return out

    @classmethod
    def from_dataset(cls, ds: Any, summary: dict[str, Any], grid: GridLike) -> BridgeResult:
        """Decode a dataset written by :meth:`to_dataset` (and ``result.nc``), with its
        ``summary`` (from :func:`dataset_summary`) and the ``grid`` its ``summary["grid"]``
        describes (the caller builds it: this module does not know the grid class). Raises
        ``KeyError``/``TypeError``/``ValueError`` on a missing or malformed entry."""
        history = []
        hist_vars = [k for k in ds.data_vars if k.startswith("history_")]
        if hist_vars:
            for i in range(ds.sizes["iteration"]):
                history.append({k[len("history_"):]: float(ds[k].values[i]) for k in hist_vars})
        config = json.loads(ds.attrs.get("config", "null"))
        # results written before multi-start solves have neither entry
        densities = ds["alternative_density"].values if "alternative_density" in ds else None
        alternatives = [
            Alternative(start=a["start"], cost=a["cost"], status=a["status"],
                        residual=a["residual"], distance=a["distance"], mean=np.asarray(a["mean"]),
                        density=None if densities is None else densities[i])
            for i, a in enumerate(summary.get("alternatives", []))
        ]
        return cls(
            grid=grid,
            times=ds["t"].values,
            density=ds["density"].values,
            control=ds["control"].values,
            log_forward=ds["log_forward"].values,
            log_backward=ds["log_backward"].values,
            correction=ds["correction"].values,
            mean=ds["mean"].values,
            cov=ds["cov"].values,
            free_energy=ds["free_energy"].values,
            entropy=ds["entropy"].values,
            cost=summary["cost"],
            cost_kinetic=summary["cost_kinetic"],
            cost_drift=summary["cost_drift"],
            cost_free_energy=summary["cost_free_energy"],
            noise=summary["noise"],
            method=summary["method"],
            route=summary["route"],
            status=summary["status"],
            message=summary["message"],
            iterations=summary["iterations"],
            residual=summary["residual"],
            marginal_error=summary["marginal_error"],
            history=history,
            timings=summary["timings"],
            model=summary["model"],
            config=config,
            coupling=ds["coupling"].values if "coupling" in ds else None,
            alternatives=alternatives,
            start=summary.get("start", ""),
            stopping=summary.get("stopping", {}),
            steady_density=ds["steady_density"].values if "steady_density" in ds else None,
            segments=[Segment(**s) for s in summary.get("segments", [])],
            error=(None if summary.get("error_estimate") is None
                   else ErrorEstimate.from_summary(summary["error_estimate"])),
            advice=list(summary.get("advice", [])),
        )


def _json_default(value: Any) -> Any:
    if isinstance(value, (np.floating, np.integer)):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    return str(value)


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _atomic_write(target: Path, write: Any) -> None:
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", dir=target.parent)
    os.close(fd)
    try:
        # mkstemp creates the file private (0600); give the result the usual permissions
        os.chmod(tmp, 0o666 & ~_umask())
        write(tmp)
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def disk_full(path: Path, exc: BaseException, need: int = 0) -> DiskFullError | None:
    """The :class:`~mfbridge.errors.DiskFullError` that ``exc``, raised while writing under
    ``path``, stands for, or ``None``. An ``OSError`` with ``ENOSPC``/``EDQUOT`` is one; the
    netCDF library reports a full disk only as ``RuntimeError: NetCDF: HDF error``, so any
    error counts when the device has less room left than ``need`` bytes (or under 1 MB)."""
    codes = (errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC))
    where = path if path.exists() else next((p for p in path.parents if p.exists()), path)
    try:
        free: int | None = shutil.disk_usage(where).free
    except OSError:
        free = None
    full = isinstance(exc, OSError) and exc.errno in codes
    if not full and (free is None or free >= max(need, 1 << 20)):
        return None
    room = "" if free is None else f" ({_bytes(free)} free"
    room += "" if free is None or not need else f", the result needs about {_bytes(need)}"
    room += "" if free is None else ")"
    return DiskFullError(f"no space left on the device at {path}{room}: free some space or "
                         "write the run elsewhere (hydra.run.dir / hydra.sweep.dir)")


def _bytes(n: float) -> str:
    for unit in ("B", "kB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n:.3g} {unit}" if unit != "B" else f"{int(n)} B"
        n /= 1000
    return f"{n:.3g} TB"  # pragma: no cover - the loop returns


def sha256(path: str | Path) -> str:
    """Hex SHA-256 of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


@dataclass(frozen=True)
class CompleteMarker:
    """The content of ``complete.json``: when the run finished, its status and the SHA-256 of
    its files (the result and summary; in a command-line run folder also the run record)."""

    finished: str
    status: str
    sha256: dict[str, str]


def write_marker(folder: str | Path, status: str, names: tuple[str, ...],
                 finished: str | None = None) -> CompleteMarker:
    """Write ``complete.json`` (atomically, last) for the files ``names`` of ``folder``."""
    out = Path(folder)
    marker = CompleteMarker(
        finished=finished or _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        status=status, sha256={name: sha256(out / name) for name in names})
    text = json.dumps(asdict(marker), indent=2) + "\n"
    _atomic_write(out / COMPLETE_FILE, lambda tmp: Path(tmp).write_text(text))
    return marker


def read_marker(folder: str | Path) -> CompleteMarker | None:
    """The completion marker of a folder, or ``None`` when there is none (the run did not
    complete) or it is unreadable."""
    path = Path(folder) / COMPLETE_FILE
    try:
        data = json.loads(path.read_text())
        return CompleteMarker(finished=str(data["finished"]), status=str(data["status"]),
                              sha256={str(k): str(v) for k, v in dict(data["sha256"]).items()})
    except (OSError, UnicodeDecodeError, ValueError, KeyError, TypeError, AttributeError):
        return None


def changed_files(folder: str | Path, marker: CompleteMarker) -> list[str]:
    """Files of a completed run whose bytes no longer match the hashes in its marker."""
    out = Path(folder)
    return [name for name, digest in marker.sha256.items()
            if not (out / name).is_file() or sha256(out / name) != digest]


def dataset_summary(ds: Any, source: str) -> dict[str, Any]:
    """The summary record a dataset written by :meth:`BridgeResult.to_dataset` carries, checked
    to be of this :data:`FORMAT_VERSION`; raises :class:`InputError` naming ``source`` (the
    file) otherwise."""
    try:
        summary = json.loads(ds.attrs["summary"])
    except (KeyError, TypeError, ValueError) as exc:
        raise InputError(f"{source} has no valid mfbridge summary: not an mfbridge result") from exc
    version = summary.get("format_version") if isinstance(summary, dict) else None
    if version != FORMAT_VERSION:
        raise InputError(
            f"{source} has format version {version}, this mfbridge reads version {FORMAT_VERSION}"
        )
    return summary
