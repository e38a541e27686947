"""Figures of a bridge result (matplotlib; never imported by ``import mfbridge``).

Everything is read from a :class:`~mfbridge.result.BridgeResult`, so a saved run can be plotted
again with ``plot_result(mfbridge.load(folder), folder)``.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np

from mfbridge.result import BridgeResult


def _title(result: BridgeResult) -> str:
    return (f"{result.method} bridge, σ = {result.noise:g}, T = {result.horizon:g}:  "
            f"J = {result.cost:.5g}")


def plot_density_1d(result: BridgeResult, path: Path) -> Path:
    """Heat map of ρ(t, x) with the observed μ and ν drawn beside it, and the mean ± std."""
    x = result.grid.axes[0]
    t = result.times
    fig, (ax_mu, ax, ax_nu) = plt.subplots(
        1, 3, figsize=(10, 4.2), sharey=True, gridspec_kw={"width_ratios": [1, 4, 1]}
    )
    mesh = ax.pcolormesh(t, x, result.density.T, shading="auto", cmap="viridis")
    mean = result.mean[:, 0]
    std = np.sqrt(result.cov[:, 0, 0])
    ax.plot(t, mean, color="white", lw=1.5, label="mean")
    ax.plot(t, mean + std, color="white", lw=0.8, ls="--", label="mean ± std")
    ax.plot(t, mean - std, color="white", lw=0.8, ls="--")
    ax.set_xlabel("t")
    ax.set_title(_title(result), fontsize=10)
    ax.legend(loc="upper left", fontsize=8, framealpha=0.4)
    for axis, k, label in ((ax_mu, 0, "μ (t = 0)"), (ax_nu, -1, "ν (t = T)")):
        axis.fill_betweenx(x, result.density[k], color="tab:orange", alpha=0.6)
        axis.set_xlabel(label)
        axis.set_xlim(left=0)
    ax_mu.invert_xaxis()
    ax_mu.set_ylabel("x")
    fig.colorbar(mesh, ax=ax_nu, label="density")
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def _snapshots(result: BridgeResult, count: int) -> np.ndarray:
    """Indices of ``count`` evenly spaced time nodes (first and last included)."""
    return np.unique(np.linspace(0, len(result.times) - 1, count).round().astype(int))


def _plane(ax: plt.Axes, values: np.ndarray, result: BridgeResult, a: int, b: int,
           vmax: float | None = None) -> matplotlib.image.AxesImage:
    """Draw ``values`` (shape (shape[a], shape[b])) over the box face spanned by axes a, b."""
    grid = result.grid
    extent = (grid.lower[a], grid.upper[a], grid.lower[b], grid.upper[b])
    image = ax.imshow(values.T, origin="lower", extent=extent, cmap="viridis", aspect="equal",
                      vmin=0.0, vmax=vmax)
    ax.set_xlabel(f"x{a}")
    ax.set_ylabel(f"x{b}")
    return image


def plot_density_2d(result: BridgeResult, path: Path, snapshots: int = 5) -> Path:
    """Density snapshots at evenly spaced times, with the mean path drawn on each."""
    ks = _snapshots(result, snapshots)
    fig, axes = plt.subplots(1, len(ks), figsize=(3.0 * len(ks), 3.2), sharey=True)
    for ax, k in zip(np.atleast_1d(axes), ks, strict=True):
        _plane(ax, result.density[k], result, 0, 1)
        ax.plot(result.mean[:, 0], result.mean[:, 1], color="white", lw=1)
        ax.plot(*result.mean[k], "o", color="tab:red", ms=4)
        ax.set_title(f"t = {result.times[k]:.3g}")
        if ax is not np.atleast_1d(axes)[0]:
            ax.set_ylabel("")
    fig.suptitle(_title(result), fontsize=10)
    fig.tight_layout()
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
            ax.set_title(f"t = {result.times[k]:.3g}, x{c} = {grid.axes[c][centre[c]]:.3g}",
                         fontsize=9)
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
            ax.set_title(f"t = {result.times[k]:.3g}, ∫ dx{3 - a - b}", fontsize=9)
        fig.colorbar(row[-1].images[0], ax=list(row), label="marginal density")
    colours = plt.cm.plasma(np.linspace(0.0, 0.85, len(ks)))
    for a, ax in enumerate(axes[-1]):
        marginal = result.marginal(a)
        for k, colour in zip(ks, colours, strict=True):
            ax.plot(result.grid.axes[a], marginal[k], color=colour,
                    label=f"t = {result.times[k]:.3g}")
        ax.set_xlabel(f"x{a}")
        ax.set_ylabel(f"marginal density of x{a}")
    axes[-1][0].legend(fontsize=7)
    fig.suptitle(f"marginals\n{_title(result)}", fontsize=10)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def plot_moments(result: BridgeResult, path: Path) -> Path:
    """Mean ± std per axis, and free energy along t."""
    fig, (ax, ax_f) = plt.subplots(1, 2, figsize=(9, 3.5))
    t = result.times
    for a in range(result.grid.dim):
        mean = result.mean[:, a]
        std = np.sqrt(result.cov[:, a, a])
        line, = ax.plot(t, mean, label=f"mean x{a}" if result.grid.dim > 1 else "mean")
        ax.fill_between(t, mean - std, mean + std, color=line.get_color(), alpha=0.25)
    ax.set_xlabel("t")
    ax.set_ylabel("position (mean ± std)")
    ax.legend(fontsize=8)
    ax_f.plot(t, result.free_energy)
    ax_f.set_xlabel("t")
    ax_f.set_ylabel("free energy F(ρ_t)")
    fig.suptitle(_title(result), fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def plot_convergence(result: BridgeResult, path: Path) -> Path:
    """Self-consistency residual and marginal error against the outer iteration."""
    fig, ax = plt.subplots(figsize=(5, 3.5))
    it = np.arange(1, len(result.history) + 1)
    ax.semilogy(it, [h["residual"] or np.nan for h in result.history], "o-", label="residual")
    ax.semilogy(it, [h["marginal_error"] for h in result.history], "s-", label="marginal error")
    ax.set_xlabel("outer iteration")
    ax.legend()
    ax.set_title(result.message, fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def plot_result(result: BridgeResult, directory: str | Path) -> list[Path]:
    """Write the standard figures of ``result`` into ``directory``; returns their paths."""
    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    if result.grid.dim == 1:
        paths = [plot_density_1d(result, out / "density.png")]
    elif result.grid.dim == 2:
        paths = [plot_density_2d(result, out / "density.png")]
    else:
        paths = [plot_density_3d(result, out / "density.png"),
                 plot_marginals_3d(result, out / "marginals.png")]
    paths.append(plot_moments(result, out / "moments.png"))
    paths.append(plot_convergence(result, out / "convergence.png"))
    return paths
