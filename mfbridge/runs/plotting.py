"""Figures of a bridge result (matplotlib; never imported by ``import mfbridge``).

Everything is read from a :class:`~mfbridge.result.BridgeResult`, so a saved run can be plotted
again with ``plot_result(mfbridge.load(folder), folder)``.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.colors
import matplotlib.pyplot as plt
import matplotlib.ticker
import numpy as np

from mfbridge.result import BridgeResult

SCALES = ("auto", "linear", "log")
LOG_RANGE = 1e-4
"""Log colour scales show densities from LOG_RANGE × the largest one up."""
AUTO_LOG_RATIO = 10.0
"""``scale="auto"`` is log when the peak densities of the snapshots differ by more than this."""


def _title(result: BridgeResult) -> str:
    """Method, mobility and total mass (direct solver), noise, horizon and cost."""
    model = result.model or {}
    extra = ""
    mobility = model.get("mobility")
    if isinstance(mobility, dict) and mobility.get("name"):
        extra = f" ({mobility['name']} mobility, total mass {model.get('total_mass', 1.0):g})"
    text = (f"{result.method} bridge{extra}, σ = {result.noise:g}, T = {result.horizon:g}:  "
            f"J = {result.cost:.5g}")
    if result.error is not None:
        text += f"\n{result.error.describe()}"
    if result.status != "converged":
        text += f"  [{result.status.replace('_', ' ')}]"
    return text


def axis_names(result: BridgeResult) -> list[str]:
    """Names of the space axes: the data files' column names when the run read named columns
    (``result.model["axes"]``), else x (1D) or x0, x1, x2."""
    names = (result.model or {}).get("axes")
    if isinstance(names, list) and len(names) == result.grid.dim:
        return [str(n) for n in names]
    return ["x"] if result.grid.dim == 1 else [f"x{a}" for a in range(result.grid.dim)]


def _norm(result: BridgeResult, values: np.ndarray, scale: str) -> matplotlib.colors.Normalize:
    """One colour scale for all ``values`` (densities ≥ 0): linear from 0, or log over
    LOG_RANGE decades; ``auto`` is log when the snapshots' peaks differ by > AUTO_LOG_RATIO."""
    if scale not in SCALES:
        raise ValueError(f"scale must be one of {', '.join(SCALES)}, got {scale!r}")
    vmax = float(np.max(values)) if values.size else 1.0
    vmax = vmax if vmax > 0 else 1.0
    if scale == "auto":
        peaks = result.density.reshape(len(result.density), -1).max(axis=1)
        positive = peaks[peaks > 0]
        wide = positive.size and positive.max() > AUTO_LOG_RATIO * positive.min()
        scale = "log" if wide else "linear"
    if scale == "log":
        return matplotlib.colors.LogNorm(vmin=LOG_RANGE * vmax, vmax=vmax, clip=True)
    return matplotlib.colors.Normalize(vmin=0.0, vmax=vmax)


def _density_label(norm: matplotlib.colors.Normalize, result: BridgeResult) -> str:
    unit = "1/length" if result.grid.dim == 1 else f"1/length^{result.grid.dim}"
    log = " (log scale)" if isinstance(norm, matplotlib.colors.LogNorm) else ""
    return f"density ρ ({unit}){log}"


def snapshot_times(result: BridgeResult) -> list[float]:
    """The observation times of a bridge: its two ends, or every snapshot of a series."""
    if result.segments:
        return [seg.start for seg in result.segments] + [result.segments[-1].end]
    return [float(result.times[0]), float(result.times[-1])]


def _mark_snapshots(ax: plt.Axes, result: BridgeResult, colour: str) -> None:
    """Dotted vertical lines at the inner snapshot times of a series (nothing for two)."""
    for i, t in enumerate(snapshot_times(result)[1:-1]):
        ax.axvline(t, color=colour, ls=":", lw=1.2, label="snapshot" if i == 0 else None)


def plot_density_1d(result: BridgeResult, path: Path, scale: str = "auto") -> Path:
    """Heat map of ρ(t, x) with the observed μ and ν drawn beside it, and the mean ± std;
    ``scale``: ``linear``, ``log`` or ``auto`` (see :func:`_norm`)."""
    x = result.grid.axes[0]
    t = result.times
    name = axis_names(result)[0]
    fig, (ax_mu, ax, ax_nu) = plt.subplots(
        1, 3, figsize=(10, 4.4), sharey=True, gridspec_kw={"width_ratios": [1, 4, 1]},
        layout="constrained",
    )
    norm = _norm(result, result.density, scale)
    mesh = ax.pcolormesh(t, x, result.density.T, shading="auto", cmap="viridis", norm=norm)
    mean = result.mean[:, 0]
    std = np.sqrt(result.cov[:, 0, 0])
    ax.plot(t, mean, color="white", lw=1.5, label="mean")
    ax.plot(t, mean + std, color="white", lw=0.8, ls="--", label="mean ± std")
    ax.plot(t, mean - std, color="white", lw=0.8, ls="--")
    _mark_snapshots(ax, result, "white")
    ax.set_xlabel("time t")
    ax.set_title(_title(result), fontsize=10)
    ax.legend(loc="upper left", fontsize=8, framealpha=0.4)
    log = isinstance(norm, matplotlib.colors.LogNorm)
    first, last = snapshot_times(result)[0], snapshot_times(result)[-1]
    for axis, k, label in ((ax_mu, 0, f"μ (t = {first:g})"), (ax_nu, -1, f"ν (t = {last:g})")):
        axis.fill_betweenx(x, result.density[k], color="tab:orange", alpha=0.6)
        axis.set_xlabel(f"{label}\ndensity")
        if log:
            axis.set_xscale("log")
            axis.set_xlim(norm.vmin, norm.vmax * 1.5)
        else:
            axis.set_xlim(left=0)
    ax_mu.invert_xaxis()
    ax_mu.set_ylabel(name)
    fig.colorbar(mesh, ax=ax_nu, label=_density_label(norm, result))
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def _snapshots(result: BridgeResult, count: int) -> np.ndarray:
    """Indices of ``count`` evenly spaced time nodes (first and last included); for a series,
    the snapshot times."""
    if result.segments:
        return np.array([seg.first for seg in result.segments] + [len(result.times) - 1])
    return np.unique(np.linspace(0, len(result.times) - 1, count).round().astype(int))


def _plane(ax: plt.Axes, values: np.ndarray, result: BridgeResult, a: int, b: int,
           vmax: float | None = None, norm: matplotlib.colors.Normalize | None = None
           ) -> matplotlib.image.AxesImage:
    """Draw ``values`` (shape (shape[a], shape[b])) over the box face spanned by axes a, b."""
    grid = result.grid
    names = axis_names(result)
    extent = (grid.lower[a], grid.upper[a], grid.lower[b], grid.upper[b])
    limits = {"norm": norm} if norm is not None else {"vmin": 0.0, "vmax": vmax}
    image = ax.imshow(values.T, origin="lower", extent=extent, cmap="viridis", aspect="equal",
                      **limits)
    ax.set_xlabel(names[a])
    ax.set_ylabel(names[b])
    return image


def plot_density_2d(result: BridgeResult, path: Path, snapshots: int = 5,
                    scale: str = "auto") -> Path:
    """Density snapshots at evenly spaced times on one colour scale (one colour bar;
    ``scale`` as for :func:`plot_density_1d`), with the mean path and the current mean."""
    ks = _snapshots(result, snapshots)
    norm = _norm(result, result.density[ks], scale)
    fig, axes = plt.subplots(1, len(ks), figsize=(3.0 * len(ks) + 1.2, 3.6), sharey=True,
                             layout="constrained", squeeze=False)
    row = list(axes[0])
    for ax, k in zip(row, ks, strict=True):
        image = _plane(ax, result.density[k], result, 0, 1, norm=norm)
        ax.plot(result.mean[:, 0], result.mean[:, 1], color="white", lw=1, label="mean path")
        ax.plot(*result.mean[k], "o", color="tab:red", ms=4, label="mean at this t")
        ax.set_title(f"t = {result.times[k]:.3g}", fontsize=10)
        ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(4))  # no touching labels
        if ax is not row[0]:
            ax.set_ylabel("")
    row[0].legend(loc="lower left", fontsize=7, framealpha=0.5)
    fig.colorbar(image, ax=row, label=_density_label(norm, result), shrink=0.9)
    fig.suptitle(_title(result), fontsize=10)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


_PLANES = ((0, 1), (0, 2), (1, 2))


def plot_density_3d(result: BridgeResult, path: Path, snapshots: int = 4) -> Path:
    """Slices of ρ_t through the cell holding the mean, one row per time, one column per plane
    (x0-x1, x0-x2, x1-x2); the mean path is drawn projected onto each plane."""
    grid = result.grid
    ks = _snapshots(result, snapshots)
    fig, axes = plt.subplots(len(ks), 3, figsize=(10, 3.0 * len(ks)), squeeze=False,
                             layout="constrained")
    for row, k in zip(axes, ks, strict=True):
        # index of the cell holding the mean along each axis (clipped into the box)
        centre = [int(np.clip((result.mean[k, a] - grid.lower[a]) / grid.spacing[a], 0,
                              grid.shape[a] - 1)) for a in range(3)]
        vmax = 0.0
        for ax, (a, b) in zip(row, _PLANES, strict=True):
            c = 3 - a - b  # the axis cut through
            index = [slice(None)] * 3
            index[c] = centre[c]
            values = result.density[k][tuple(index)]
            vmax = max(vmax, float(values.max()))
            _plane(ax, values, result, a, b)
            ax.plot(result.mean[:, a], result.mean[:, b], color="white", lw=1)
            ax.plot(result.mean[k, a], result.mean[k, b], "o", color="tab:red", ms=4)
            ax.set_title(f"t = {result.times[k]:.3g}, {axis_names(result)[c]} = "
                         f"{grid.axes[c][centre[c]]:.3g}", fontsize=9)
        for image in (ax.images[0] for ax in row):
            image.set_clim(0.0, vmax)
        fig.colorbar(row[-1].images[0], ax=list(row), label="density")
    fig.suptitle(f"slices through the mean\n{_title(result)}", fontsize=10)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def plot_marginals_3d(result: BridgeResult, path: Path, snapshots: int = 4) -> Path:
    """Marginals of ρ_t: projections onto the three coordinate planes (one row per time) and,
    in the last row, onto each axis (one curve per time)."""
    ks = _snapshots(result, snapshots)
    fig, axes = plt.subplots(len(ks) + 1, 3, figsize=(10, 3.0 * (len(ks) + 1)),
                             squeeze=False, layout="constrained")
    planes = [result.marginal(plane) for plane in _PLANES]
    for row, k in zip(axes[:-1], ks, strict=True):
        vmax = max(float(m[k].max()) for m in planes)
        for ax, (a, b), marginal in zip(row, _PLANES, planes, strict=True):
            _plane(ax, marginal[k], result, a, b, vmax=vmax)
            ax.set_title(f"t = {result.times[k]:.3g}, ∫ d{axis_names(result)[3 - a - b]}",
                         fontsize=9)
        fig.colorbar(row[-1].images[0], ax=list(row), label="marginal density")
    colours = plt.cm.plasma(np.linspace(0.0, 0.85, len(ks)))
    for a, ax in enumerate(axes[-1]):
        marginal = result.marginal(a)
        for k, colour in zip(ks, colours, strict=True):
            ax.plot(result.grid.axes[a], marginal[k], color=colour,
                    label=f"t = {result.times[k]:.3g}")
        ax.set_xlabel(axis_names(result)[a])
        ax.set_ylabel(f"marginal density of {axis_names(result)[a]}")
    axes[-1][0].legend(fontsize=7)
    fig.suptitle(f"marginals\n{_title(result)}", fontsize=10)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def plot_moments(result: BridgeResult, path: Path) -> Path:
    """Mean ± std per axis, and free energy along t."""
    fig, (ax, ax_f) = plt.subplots(1, 2, figsize=(9, 3.8), layout="constrained")
    t = result.times
    names = axis_names(result)
    for a in range(result.grid.dim):
        mean = result.mean[:, a]
        std = np.sqrt(result.cov[:, a, a])
        line, = ax.plot(t, mean, label=f"mean of {names[a]}")
        ax.fill_between(t, mean - std, mean + std, color=line.get_color(), alpha=0.25,
                        label=f"± std of {names[a]}")
    _mark_snapshots(ax, result, "grey")
    ax.set_xlabel("time t")
    ax.set_ylabel("position (mean ± std)")
    ax.legend(fontsize=8)
    ax_f.plot(t, result.free_energy)
    _mark_snapshots(ax_f, result, "grey")
    ax_f.set_xlabel("time t")
    ax_f.set_ylabel("free energy F(ρ_t)")
    fig.suptitle(_title(result), fontsize=10)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def _iteration_name(result: BridgeResult) -> str:
    if result.method != "direct":
        return "outer iteration (fixed point)"
    return "Newton iteration" if "Newton" in result.message else "L-BFGS iteration"


def plot_convergence(result: BridgeResult, path: Path) -> Path:
    """What the stopping rule watches, against the iteration: the self-consistency residual
    and the marginal error (fixed-point solvers), or the stopping quantity the direct solver
    records (``criterion``; its largest gradient entry when none is recorded)."""
    import textwrap

    fig, ax = plt.subplots(figsize=(6, 4), layout="constrained")
    it = np.arange(1, len(result.history) + 1)
    if result.method == "direct":
        stopping = getattr(result, "stopping", None) or {}
        quantity = str(stopping.get("quantity", ""))
        if quantity and "gradient" not in quantity and any("criterion" in h
                                                           for h in result.history):
            values = [h.get("criterion", np.nan) for h in result.history]
            label = "\n".join(textwrap.wrap(quantity, 45))
        else:
            values = [h["residual"] for h in result.history]
            label = "largest entry of the gradient of J"
        ax.semilogy(it, np.where(np.asarray(values) > 0, values, np.nan), "o-", ms=3,
                    label=label)
        if stopping.get("tolerance"):
            ax.axhline(stopping["tolerance"], color="0.5", ls="--", lw=1, label="tolerance")
        ax.set_ylabel("stopping quantity (legend)")
    else:
        ax.semilogy(it, [h["residual"] or np.nan for h in result.history], "o-",
                    label="self-consistency residual")
        ax.semilogy(it, [h["marginal_error"] or np.nan for h in result.history], "s-",
                    label="marginal error")
        ax.set_ylabel("residual, marginal error")
    ax.set_xlabel(_iteration_name(result))
    ax.legend(fontsize=8)
    ax.set_title("\n".join(textwrap.wrap(result.message, 70)), fontsize=8)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def plot_result(result: BridgeResult, directory: str | Path, scale: str = "auto") -> list[Path]:
    """Write the standard figures of ``result`` into ``directory``; returns their paths.
    ``scale``: colour scale of the density figures (``auto``, ``linear``, ``log``)."""
    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    if result.grid.dim == 1:
        paths = [plot_density_1d(result, out / "density.png", scale=scale)]
    elif result.grid.dim == 2:
        paths = [plot_density_2d(result, out / "density.png", scale=scale)]
    else:
        paths = [plot_density_3d(result, out / "density.png"),
                 plot_marginals_3d(result, out / "marginals.png")]
    paths.append(plot_moments(result, out / "moments.png"))
    paths.append(plot_convergence(result, out / "convergence.png"))
    return paths
