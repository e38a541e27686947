"""Figures of a particle check (:mod:`mfbridge.particles`): matplotlib, never imported by
``import mfbridge``.

* ``check_histograms.png``: particle histograms (largest N, first seed) over ρ_t at a few times
  (1D), or particle scatter over the contours of ρ_t (2D);
* ``check_clouds.png``: controlled and uncontrolled clouds at T against ν (and the uncontrolled
  McKean–Vlasov law);
* ``check_convergence.png``: seed-averaged W₁ error at T against N on log-log axes, with the
  fitted a + b N^{-1/2} and an N^{-1/2} guide.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from mfbridge.particles.statistics import CheckReport


def _save(fig: Any, path: Path, writer: Callable[[Path, Callable[[str], None]], None] | None
          ) -> Path:
    import matplotlib.pyplot as plt

    if writer is None:
        fig.savefig(path, dpi=120)
    else:
        writer(path, lambda tmp: fig.savefig(tmp, dpi=120, format="png"))
    plt.close(fig)
    return path


def plot_check(report: CheckReport, folder: str | Path,
               writer: Callable[[Path, Callable[[str], None]], None] | None = None
               ) -> list[Path]:
    """Write the three figures into ``folder``; ``writer(path, write)`` may make writes atomic.
    Returns the paths."""
    import matplotlib

    matplotlib.use("Agg")
    out = Path(folder)
    paths = [
        _save(_histograms(report), out / "check_histograms.png", writer),
        _save(_clouds(report), out / "check_clouds.png", writer),
        _save(_convergence(report), out / "check_convergence.png", writer),
    ]
    return paths


def _picks(report: CheckReport, count: int = 4) -> list[int]:
    n = len(report.record)
    return sorted({round(v) for v in np.linspace(0, n - 1, count)})


def _ticks_inside(ax: Any) -> None:
    """Keep only the x ticks inside the view: the locator also returns the next round number
    beyond each end, whose label (never drawn) lies over the neighbouring panel's."""
    lo, hi = sorted(ax.get_xlim())
    ax.set_xticks([t for t in ax.get_xticks() if lo <= t <= hi])
    ax.set_xlim(lo, hi)


def _histograms(report: CheckReport) -> Any:
    import matplotlib.pyplot as plt

    assert report.grid is not None and report.density is not None
    assert report.snapshots is not None
    grid = report.grid
    picks = _picks(report)
    fig, axes = plt.subplots(1, len(picks), figsize=(3.6 * len(picks), 3.2), squeeze=False)
    n = report.snapshots.shape[1]
    for ax, i in zip(axes[0], picks, strict=True):
        k = report.record[i]
        pts = report.snapshots[i]
        if grid.dim == 1:
            x = grid.axes[0]
            ax.hist(pts[:, 0], bins=min(80, max(10, n // 40)), density=True, color="tab:blue",
                    alpha=0.5, label=f"{n} particles")
            ax.plot(x, report.density[k], color="k", lw=1.2, label="ρ_t (grid)")
            _ticks_inside(ax)
            ax.set_xlabel("x")
            ax.set_ylabel("density (1/length)")
        else:
            ax.contour(grid.axes[0], grid.axes[1], report.density[k].T, levels=6,
                       colors="k", linewidths=0.8)
            ax.scatter(pts[:, 0], pts[:, 1], s=1, alpha=0.3, color="tab:blue")
            ax.set_aspect("equal")
            ax.set_xlabel("x0")
            ax.set_ylabel("x1")
        run = report.runs[[r.n_particles for r in report.runs].index(n)]
        ax.set_title(f"t = {report.times[i]:.3g}, W1 = {run.w1[i]:.3g}", fontsize=9)
    axes[0][0].legend(fontsize=7) if grid.dim == 1 else None
    fig.tight_layout()
    return fig


def _clouds(report: CheckReport) -> Any:
    import matplotlib.pyplot as plt

    assert report.grid is not None and report.density is not None
    assert report.snapshots is not None
    grid = report.grid
    ctrl = report.snapshots[-1]
    free = None if report.free_snapshots is None else report.free_snapshots[-1]
    if grid.dim == 1:
        fig, ax = plt.subplots(figsize=(6.4, 3.6))
        x = grid.axes[0]
        bins = np.linspace(grid.lower[0], grid.upper[0], 81)
        ax.hist(ctrl[:, 0], bins=bins, density=True, alpha=0.5, color="tab:blue",
                label="controlled particles")
        if free is not None:
            ax.hist(free[:, 0], bins=bins, density=True, alpha=0.5, color="tab:orange",
                    label="uncontrolled particles")
        ax.plot(x, report.density[-1], "k", lw=1.4, label="ν")
        if report.flow is not None:
            ax.plot(x, report.flow[-1] / grid.cell_volume, "--", color="tab:red", lw=1.2,
                    label="McKean–Vlasov at T (grid)")
        ax.set_xlabel("x")
        ax.set_ylabel("density (1/length)")
        ax.legend(fontsize=8)
    else:
        fig, axes = plt.subplots(1, 2, figsize=(9, 4.2), sharex=True, sharey=True)
        for ax, pts, name in ((axes[0], ctrl, "controlled"), (axes[1], free, "uncontrolled")):
            ax.contour(grid.axes[0], grid.axes[1], report.density[-1].T, levels=6, colors="k",
                       linewidths=0.8)
            if pts is not None:
                ax.scatter(pts[:, 0], pts[:, 1], s=1, alpha=0.3)
            ax.set_title(f"{name} at T against ν", fontsize=9)
            ax.set_aspect("equal")
            ax.set_xlabel("x0")
        axes[0].set_ylabel("x1")
    fig.suptitle(f"N = {ctrl.shape[0]}, T = {report.horizon:g}", fontsize=10)
    fig.tight_layout()
    return fig


def _convergence(report: CheckReport) -> Any:
    import matplotlib.pyplot as plt
    from matplotlib.ticker import NullFormatter

    fig, ax = plt.subplots(figsize=(5.2, 4.0))
    ns = np.array([r.n_particles for r in report.table], dtype=float)
    err = np.array([r.w1_T for r in report.table])
    sem = np.array([r.w1_T_sem for r in report.table])
    ax.errorbar(ns, err, yerr=np.where(np.isfinite(sem), sem, 0.0), fmt="o", capsize=3,
                label="W1 to ρ_T (mean over seeds)")
    for r in report.runs:
        ax.plot(r.n_particles, r.w1[-1], ".", color="0.6", ms=3)
    free = [(r.n_particles, r.free_w1_T) for r in report.table if r.free_w1_T is not None]
    if free:
        fn, fe = zip(*free, strict=True)
        ax.plot(fn, fe, "s", color="tab:orange", ms=4, label="uncontrolled vs McKean–Vlasov")
    dense = np.geomspace(ns.min(), ns.max(), 50)
    if report.fit is not None:
        ax.plot(dense, report.fit.floor + report.fit.scale / np.sqrt(dense), "-", color="tab:blue",
                lw=1, label=f"a + b N^-1/2 (a = {report.fit.floor:.2g}); slope "
                            f"{report.fit.slope:.2f}")
    ax.plot(dense, err[0] * np.sqrt(ns[0] / dense), ":", color="k", lw=1, label="N^-1/2")
    ax.set_xscale("log")
    ax.set_yscale("log")
    # a log axis over less than a decade labels its minor ticks too, and they collide
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.yaxis.set_minor_formatter(NullFormatter())
    ax.set_xticks(ns, [f"{int(n)}" for n in ns])
    ax.set_xlabel("number of particles N")
    ax.set_ylabel("W1 distance to ρ_T (length)")
    ax.legend(fontsize=7)
    fig.tight_layout()
    return fig
