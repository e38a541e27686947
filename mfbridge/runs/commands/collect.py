"""``mfbridge collect SWEEP_DIR``: one table, one labelled dataset and figures for a sweep.

Reads every job folder under ``SWEEP_DIR`` (see :func:`mfbridge.runs.records.scan_sweep`) and
writes, into ``SWEEP_DIR/collected/`` (or ``--out``):

* ``runs.csv``: one row per run: the swept values, status, cost and its parts, iterations,
  residual, the discretisation-error estimate of J (estimated error, GCI, extrapolated J,
  observed order; empty when not estimated), runtime and a few summaries of the flow (mean and
  standard deviation of the first coordinate at T/2, entropy at T/2); failed and unfinished
  runs have a row with their status and problem and empty numbers;
* ``sweep.nc``: the complete runs' results combined into one dataset with the swept parameters
  as dimensions (missing combinations are NaN);
* ``cost.png`` (cost against each swept parameter), ``mean_paths.png`` (mean paths and
  spreads over time), ``densities.png`` (density heat maps on one colour scale, in the order of
  the swept values).

Swept parameters are the keys of the sweep overrides in ``multirun.yaml`` together with every
override key whose value differs between runs. Runs that failed, did not finish or did not
converge are printed; the exit status is 0 once the collection is written.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from mfbridge.errors import InputError
from mfbridge.runs.records import RunEntry, scan_sweep

SCALARS = ("cost", "cost_kinetic", "cost_drift", "cost_free_energy", "iterations", "residual",
           "marginal_error")
# columns from the discretisation-error estimate: |J_h - J| estimated, Roache's GCI (relative),
# Richardson's extrapolated J, the observed order (NaN: not estimated)
ESTIMATE = ("cost_error", "cost_gci", "cost_extrapolated", "observed_order")
FIELDS = ("density", "control", "correction", "mean", "cov", "free_energy", "entropy")


@dataclass
class Row:
    """One run of the sweep as the table shows it."""

    run: str
    params: dict[str, Any]
    status: str
    problem: str = ""
    numbers: dict[str, float] = field(default_factory=dict)
    folder: Path | None = None


def _split_override(text: str) -> tuple[str, str]:
    key, _, value = text.partition("=")
    return key.lstrip("+~"), value


def _parse_value(text: str) -> Any:
    from hydra.core.override_parser.overrides_parser import OverridesParser

    try:
        value = OverridesParser.create().parse_override(f"k={text}").value()
    except Exception:
        return text
    return value if isinstance(value, (int, float, str, bool)) else str(value)


def swept_keys(sweep_dir: Path, entries: list[RunEntry]) -> list[str]:
    """Keys swept in ``sweep_dir``: sweep overrides of ``multirun.yaml`` plus every override
    key whose value differs between the runs, in command-line order."""
    keys: list[str] = []
    multirun = sweep_dir / "multirun.yaml"
    if multirun.is_file():
        from hydra.core.override_parser.overrides_parser import OverridesParser
        from omegaconf import OmegaConf

        try:
            task = list(OmegaConf.load(multirun).hydra.overrides.task)
            for override in OverridesParser.create().parse_overrides(task):
                if override.is_sweep_override():
                    keys.append(override.key_or_group)
        except Exception as exc:
            raise InputError(f"cannot read the sweep overrides of {multirun}: {exc}") from exc
    per_run = [dict(_split_override(t) for t in (e.record.overrides or []))
               for e in entries if e.record is not None]
    for key in dict.fromkeys(k for overrides in per_run for k in overrides):
        values = {overrides.get(key) for overrides in per_run}
        if key not in keys and len(values) > 1:
            keys.append(key)
    return keys


def _coerce(values: list[Any]) -> list[Any]:
    """Numbers stay numbers (int promoted to float when mixed); anything else becomes text."""
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values):
        return [float(v) for v in values] if any(isinstance(v, float) for v in values) else values
    return [str(v) for v in values]


def _summaries(result: Any) -> dict[str, float]:
    mid = len(result.times) // 2
    out = {k: float(getattr(result, k)) for k in SCALARS}
    out["iterations"] = int(result.iterations)
    out["mean_mid"] = float(result.mean[mid, 0])
    out["std_mid"] = float(np.sqrt(result.cov[mid, 0, 0]))
    out["entropy_mid"] = float(result.entropy[mid])
    out["runtime_s"] = float(result.timings.get("total", math.nan))
    error = result.error
    # the discretisation-error estimate (mfbridge.solvers.accuracy); NaN when not estimated
    out["cost_error"] = error.cost_error if error is not None else math.nan
    out["cost_gci"] = error.gci if error is not None else math.nan
    out["cost_extrapolated"] = error.cost_extrapolated if error is not None else math.nan
    out["observed_order"] = error.observed_order if error is not None else math.nan
    return out


def collect_rows(sweep_dir: Path) -> tuple[list[str], list[Row], list[Any]]:
    """The swept keys, one :class:`Row` per job folder and the loaded complete results."""
    from mfbridge.runs.api import load

    if not sweep_dir.is_dir():
        raise InputError(f"no sweep folder at {sweep_dir}")
    entries = scan_sweep(sweep_dir)
    if not entries:
        raise InputError(f"{sweep_dir} holds no run folders (no record.json or .hydra/ below "
                         "it): is it the sweep folder of an mfbridge -m run?")
    keys = swept_keys(sweep_dir, entries)
    rows: list[Row] = []
    results: list[Any] = []
    for entry in entries:
        overrides = dict(_split_override(t) for t in _overrides_of(entry))
        choices = (entry.record.choices or {}) if entry.record else {}
        params = {k: (choices[k] if k in choices else
                      _parse_value(overrides[k]) if k in overrides else None) for k in keys}
        name = str(entry.folder.relative_to(sweep_dir))
        if not entry.complete:
            # failed, refused, interrupted, killed, running (elsewhere) or unreadable
            rows.append(Row(name, params, entry.status, entry.problem or ""))
            continue
        result = load(entry.folder, warn=False)
        numbers = _summaries(result)
        if entry.record and entry.record.runtime_seconds is not None:
            numbers["runtime_s"] = float(entry.record.runtime_seconds)
        rows.append(Row(name, params, result.status,
                        "" if result.converged else result.message, numbers, entry.folder))
        results.append(result)
    rows.extend(_never_started(sweep_dir, keys, rows))
    for key in keys:
        present = [r.params[key] for r in rows if r.params[key] is not None]
        for row, value in zip((r for r in rows if r.params[key] is not None),
                              _coerce(present), strict=True):
            row.params[key] = value
    return keys, rows, results


def _overrides_of(entry: RunEntry) -> list[str]:
    """A job's overrides: from its record, or, when the record is unreadable, from Hydra's
    ``.hydra/overrides.yaml`` (so the job is not also counted as never started)."""
    if entry.record is not None:
        return list(entry.record.overrides or [])
    try:
        from omegaconf import OmegaConf

        return [str(o) for o in OmegaConf.load(entry.folder / ".hydra" / "overrides.yaml")]
    except Exception:  # no Hydra record either: the row has no parameters
        return []


def _never_started(sweep_dir: Path, keys: list[str], rows: list[Row]) -> list[Row]:
    """Rows for the jobs that ``multirun.yaml`` asks for but that have no folder at all."""
    from omegaconf import OmegaConf

    from mfbridge.runs.sweeps import expected_jobs

    multirun = sweep_dir / "multirun.yaml"
    if not multirun.is_file():
        return []
    jobs = expected_jobs(OmegaConf.load(multirun)) or []
    seen = [{k: str(r.params[k]) for k in keys} for r in rows]
    missing = []
    for job in jobs:
        overrides = dict(_split_override(t) for t in job)
        params = {k: _parse_value(overrides[k]) if k in overrides else None for k in keys}
        if {k: str(v) for k, v in params.items()} not in seen:
            missing.append(Row(" ".join(job), params, "missing",
                               "no run folder: the job never started (sweep interrupted?)"))
    return missing


def write_table(path: Path, keys: list[str], rows: list[Row]) -> Path:
    """``runs.csv`` (written atomically)."""
    from mfbridge.result import _atomic_write

    numbers = [*SCALARS, *ESTIMATE, "runtime_s", "mean_mid", "std_mid", "entropy_mid"]
    header = ["run", *keys, "status", *numbers, "problem"]

    def write(tmp: str) -> None:
        with open(tmp, "w", newline="") as handle:
            writer = csv.writer(handle)
            writer.writerow(header)
            for row in rows:
                writer.writerow([row.run, *(row.params[k] for k in keys), row.status,
                                 *(repr(row.numbers[n]) if n in row.numbers else ""
                                   for n in numbers), row.problem])

    _atomic_write(path, write)
    return path


def combined_dataset(keys: list[str], rows: list[Row], results: list[Any]) -> Any:
    """The complete runs as one ``xarray.Dataset`` with the swept keys as dimensions."""
    import xarray as xr

    complete = [r for r in rows if r.folder is not None]
    parts = []
    for row, result in zip(complete, results, strict=True):
        ds = result.to_dataset()[list(FIELDS)]
        for name in SCALARS:
            ds[name] = float(getattr(result, name))
        ds["converged"] = float(result.converged)
        ds["runtime_s"] = row.numbers.get("runtime_s", math.nan)
        for name in ESTIMATE:
            ds[name] = row.numbers.get(name, math.nan)
        ds.attrs = {}
        parts.append(ds.expand_dims({k: [row.params[k]] for k in keys}))
    if not parts:
        raise InputError("no run of the sweep is complete: nothing to combine")
    combined = xr.merge(parts, join="outer", compat="no_conflicts", combine_attrs="drop")
    combined.attrs["swept"] = json.dumps(keys)
    combined.attrs["runs"] = json.dumps([r.run for r in complete])
    return combined


# ----------------------------------------------------------------------------------- figures


def _label(row: Row, keys: list[str]) -> str:
    return ", ".join(f"{k}={row.params[k]}" for k in keys) or row.run


def _value_key(value: Any) -> tuple[int, Any]:
    """Sort key of a swept value: numbers by value (also when given as text), then text."""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return (0, float(value))
    try:
        return (0, float(str(value)))
    except ValueError:
        return (1, str(value))


def _in_order(rows: list[Row], results: list[Any], keys: list[str]
              ) -> tuple[list[Row], list[Any]]:
    """Complete runs and their results, ordered by the swept values (numerically), not by the
    folder names' text (which put -0.4 before -0.8 before -1.2 before 0.0)."""
    complete = [r for r in rows if r.folder is not None]
    order = sorted(range(len(complete)),
                   key=lambda i: [_value_key(complete[i].params.get(k)) for k in keys]
                   + [(1, complete[i].run)])
    return [complete[i] for i in order], [results[i] for i in order]


def plot_cost(path: Path, keys: list[str], rows: list[Row]) -> Path:
    """Cost against each swept parameter (one line per value of the other parameters), with
    the estimated discretisation error of J as error bars; runs that did not converge are
    drawn as open red circles."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    # a diverged run's cost is that of a blown-up iterate: listed, not drawn
    done = [r for r in rows if r.numbers and r.status != "diverged"]
    axes_keys = keys or ["run"]
    fig, axes = plt.subplots(1, len(axes_keys), figsize=(4.5 * len(axes_keys), 3.6),
                             squeeze=False)
    for ax, key in zip(axes[0], axes_keys, strict=True):
        others = [k for k in keys if k != key]
        groups: dict[str, list[Row]] = {}
        for row in done:
            groups.setdefault(", ".join(f"{k}={row.params[k]}" for k in others), []).append(row)
        for label, group in groups.items():
            xs = [r.params[key] if keys else r.run for r in group]
            order = sorted(range(len(xs)), key=lambda i: _value_key(xs[i]))
            xs = [xs[i] for i in order]
            ys = [group[i].numbers["cost"] for i in order]
            (line,) = ax.plot(xs, ys, marker="o", label=label or None)
            # the estimated discretisation error of J (error bars; none when not estimated)
            errs = [group[i].numbers.get("cost_error", math.nan) for i in order]
            if any(math.isfinite(e) for e in errs):
                ax.errorbar(xs, ys, yerr=[e if math.isfinite(e) else 0.0 for e in errs],
                            fmt="none", ecolor=line.get_color(), capsize=3)
            bad = [(x, y) for x, y, i in zip(xs, ys, order, strict=True)
                   if group[i].status != "converged"]
            if bad:
                ax.scatter(*zip(*bad, strict=True), s=90, facecolors="none", edgecolors="red",
                           label="not converged")
        ax.set_xlabel(key)
        ax.set_ylabel("cost J")
        if any(groups) or ax.get_legend_handles_labels()[1]:
            ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def _varies(curves: list[np.ndarray]) -> bool:
    """Whether the curves differ by more than 1e-3 of their range (else they coincide)."""
    if len(curves) < 2:
        return True
    stack = np.array([np.ravel(c) for c in curves if np.size(c) == np.size(curves[0])])
    spread = float(np.ptp(stack, axis=0).max()) if stack.size else 0.0
    scale = max(float(np.ptp(stack)), float(np.abs(stack).max()), 1e-300)
    return spread > 1e-3 * scale


def plot_mean_paths(path: Path, keys: list[str], rows: list[Row], results: list[Any]) -> Path:
    """Mean and spread of every complete run against time, in the order of the swept values:
    left the mean (1D: m_t; 2D/3D: the mean's track in the x0-x1 plane), right the spread
    (1D: std; else √tr Σ_t, length). Pair forces cancel in the mean, so an interaction sweep
    moves only the spread: a panel whose curves coincide says so in its title."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    ordered, res = _in_order(rows, results, keys)
    fig, (ax, ax_s) = plt.subplots(1, 2, figsize=(10, 4.2), layout="constrained")
    colours = plt.cm.viridis(np.linspace(0.0, 0.9, max(len(res), 1)))
    means, spreads = [], []
    for row, result, colour in zip(ordered, res, colours, strict=False):
        style = "-" if result.converged else ":"
        label = _label(row, keys)
        cov = np.asarray(result.cov)
        spread = np.sqrt(np.trace(cov, axis1=1, axis2=2))
        if result.grid.dim == 1:
            ax.plot(result.times, result.mean[:, 0], style, color=colour, label=label)
            means.append(result.mean[:, 0])
        else:
            ax.plot(result.mean[:, 0], result.mean[:, 1], style, color=colour, label=label)
            means.append(result.mean[:, :2])
        ax_s.plot(result.times, spread, style, color=colour, label=label)
        spreads.append(spread)
    if res and res[0].grid.dim == 1:
        ax.set_xlabel("time t")
        ax.set_ylabel("mean position")
        ax_s.set_ylabel("standard deviation (length)")
    else:
        ax.set_xlabel("mean of x0")
        ax.set_ylabel("mean of x1")
        ax_s.set_ylabel("spread √tr Σ (length)")
    ax_s.set_xlabel("time t")
    same = " (all runs coincide)"
    ax.set_title("mean paths" + ("" if _varies(means) else same), fontsize=10)
    ax_s.set_title("spread" + ("" if _varies(spreads) else same), fontsize=10)
    target = ax_s if _varies(spreads) or not _varies(means) else ax
    target.legend(fontsize=7)
    if not all(r.converged for r in res):
        fig.suptitle("dotted: not converged", fontsize=9)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def plot_densities(path: Path, keys: list[str], rows: list[Row], results: list[Any]) -> Path:
    """A grid of density heat maps on one colour scale (one colour bar), one panel per complete
    run in the order of the swept values (1D: ρ(t, x); 2D: ρ at T/2; 3D: the x0-x1 marginal at
    T/2). With two swept parameters the panels form their table (rows: first, columns:
    second)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.colors
    import matplotlib.pyplot as plt
    import matplotlib.ticker

    complete, res = _in_order(rows, results, keys)
    if len(keys) == 2:
        row_vals = sorted({r.params[keys[0]] for r in complete}, key=_value_key)
        col_vals = sorted({r.params[keys[1]] for r in complete}, key=_value_key)
        place = {i: (row_vals.index(r.params[keys[0]]), col_vals.index(r.params[keys[1]]))
                 for i, r in enumerate(complete)}
        nr, nc = len(row_vals), len(col_vals)
    else:
        nc = min(max(len(complete), 1), 4)
        nr = max(math.ceil(len(complete) / nc), 1)
        place = {i: divmod(i, nc) for i in range(len(complete))}

    def shown(result: Any) -> np.ndarray:
        if result.grid.dim == 1:
            return np.asarray(result.density)
        mid = len(result.times) // 2
        # in 3D: the marginal on the x0-x1 plane (ρ integrated over x2)
        return np.asarray(result.density[mid] if result.grid.dim == 2
                          else result.marginal((0, 1))[mid])

    planes = [shown(r) for r in res]
    vmax = max((float(p.max()) for p in planes), default=1.0) or 1.0
    norm = matplotlib.colors.Normalize(vmin=0.0, vmax=vmax)
    fig, axes = plt.subplots(nr, nc, figsize=(3.2 * nc + 1.0, 2.9 * nr), squeeze=False,
                             layout="constrained")
    for ax in axes.flat:
        ax.set_visible(False)
    image = None
    for i, (row, result, plane) in enumerate(zip(complete, res, planes, strict=True)):
        ax = axes[place[i]]
        ax.set_visible(True)
        if result.grid.dim == 1:
            image = ax.pcolormesh(result.times, result.grid.axes[0], plane.T, shading="auto",
                                  cmap="viridis", norm=norm)
            ax.plot(result.times, result.mean[:, 0], color="white", lw=1)
            ax.set_xlabel("time t")
            ax.set_ylabel("x")
        else:
            g = result.grid
            image = ax.imshow(plane.T, origin="lower", cmap="viridis", norm=norm,
                              extent=(g.lower[0], g.upper[0], g.lower[1], g.upper[1]))
            ax.set_xlabel("x0")
            ax.set_ylabel("x1")
        ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(4))
        flag = "" if result.converged else f" ({result.status.replace('_', ' ')})"
        error = result.error
        spread = (f" ± {error.cost_error:.2g}" if error is not None and error.available else "")
        ax.set_title(f"{_label(row, keys)}\nJ = {result.cost:.5g}{spread}{flag}", fontsize=8)
    if image is not None:
        dim = res[0].grid.dim
        what = "ρ(t, x)" if dim == 1 else "ρ at T/2" if dim == 2 else "x0-x1 marginal at T/2"
        fig.colorbar(image, ax=list(axes.flat), label=f"density {what}", shrink=0.9)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


# ----------------------------------------------------------------------------------- command


def collect(sweep_dir: Path, out: Path | None = None, figures: bool = True) -> dict[str, Path]:
    """Write the table, the combined dataset and the figures of a sweep; print a summary and
    the runs that failed, did not finish or did not converge. Returns the written paths."""
    from mfbridge.result import _atomic_write

    keys, rows, results = collect_rows(sweep_dir)
    target = out or sweep_dir / "collected"
    target.mkdir(parents=True, exist_ok=True)
    written = {"table": write_table(target / "runs.csv", keys, rows)}
    if results:
        dataset = combined_dataset(keys, rows, results)
        _atomic_write(target / "sweep.nc", lambda tmp: dataset.to_netcdf(tmp, engine="netcdf4"))
        written["dataset"] = target / "sweep.nc"
        if figures:
            written["cost"] = plot_cost(target / "cost.png", keys, rows)
            written["mean_paths"] = plot_mean_paths(target / "mean_paths.png", keys, rows,
                                                    results)
            written["densities"] = plot_densities(target / "densities.png", keys, rows,
                                                  results)
    converged = sum(r.status == "converged" for r in rows)
    print(f"{sweep_dir}: {len(rows)} runs, {len(results)} complete, {converged} converged; "
          f"swept: {', '.join(keys) or '(nothing)'}")
    for row in rows:
        if row.status != "converged":
            print(f"  {row.status}: {row.run}: {row.problem}")
    for name, path in written.items():
        print(f"{name}: {path}")
    return written


def main(argv: list[str]) -> int:
    """Console entry: ``mfbridge collect SWEEP_DIR [--out DIR] [--no-figures]``."""
    parser = argparse.ArgumentParser(
        prog="mfbridge collect",
        description="Collect the runs of a sweep into a table, a combined dataset and figures.",
    )
    parser.add_argument("sweep_dir", type=Path, help="the hydra.sweep.dir of an mfbridge -m run")
    parser.add_argument("--out", type=Path, default=None,
                        help="output folder (default: SWEEP_DIR/collected)")
    parser.add_argument("--no-figures", action="store_true", help="skip the figures")
    args = parser.parse_args(argv)
    try:
        collect(args.sweep_dir, args.out, figures=not args.no_figures)
    except InputError as exc:
        print(f"mfbridge collect: error: {exc}", file=sys.stderr)
        return 2
    return 0
