"""The profile figure of a fit (matplotlib; never imported by ``import mfbridge``)."""

from __future__ import annotations

import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np
import scipy.stats

from mfbridge.solvers.fit import FitResult

_COLOURS = {"profile": "tab:blue", "joint": "tab:purple", "hessian": "tab:orange"}


def plot_profiles(result: FitResult, path: Path) -> Path:
    """One panel per fitted parameter: the profile statistic 2N(ΣJ − ΣJ(θ̂)) (the other
    parameters re-minimised at each point), its quadratic approximation from the Hessian, the
    χ² thresholds, and the profile, joint and Hessian intervals as bars."""
    p = len(result.profiles)
    fig, axes = plt.subplots(1, p, figsize=(4.2 * p, 3.8), squeeze=False)
    q1 = scipy.stats.chi2.ppf(result.level, 1)
    qp = scipy.stats.chi2.ppf(result.level, len(result.parameters))
    names = [par.name for par in result.parameters]
    for ax, prof in zip(axes[0], result.profiles, strict=True):
        hat = result.estimate[prof.name]
        xs = np.concatenate([[hat], prof.values])
        ys = np.concatenate([[0.0], prof.statistic])
        order = np.argsort(xs)
        ax.plot(xs[order], ys[order], "o-", color="tab:blue", ms=4, label="profile")
        se = result.standard_errors[prof.name]
        if math.isfinite(se):
            grid = np.linspace(xs.min(), xs.max(), 200)
            ax.plot(grid, ((grid - hat) / se) ** 2, "--", color="tab:orange",
                    label="quadratic (Hessian)")
        ax.axhline(q1, color="grey", lw=0.8, ls=":")
        ax.text(xs.min(), q1, f" χ²(1) {result.level:.0%}", va="bottom", fontsize=7, color="grey")
        if len(names) > 1:
            ax.axhline(qp, color="grey", lw=0.8, ls="-.")
            ax.text(xs.min(), qp, f" χ²({len(names)}) {result.level:.0%}", va="bottom", fontsize=7,
                    color="grey")
        top = max(float(np.nanmax(ys)), qp) * 1.1
        for level, method in enumerate(("profile", "joint", "hessian")):
            ivs = [iv for iv in result.intervals if iv.name == prof.name and iv.method == method]
            if not ivs or not math.isfinite(ivs[0].lower):
                continue
            y = top * (0.92 - 0.06 * level)
            ax.plot([ivs[0].lower, ivs[0].upper], [y, y], color=_COLOURS[method], lw=3,
                    label=f"{method} interval")
        ax.axvline(hat, color="black", lw=0.8)
        ax.set_ylim(0, top)
        ax.set_xlabel(prof.name)
        ax.set_ylabel("2N (ΣJ − ΣJ(θ̂))")
        ax.set_title(f"θ̂ = {hat:.4g} ± {se:.2g} (se)", fontsize=9)
    axes[0][0].legend(fontsize=7, loc="upper center")
    fig.suptitle(f"profiles of ΣJ, N = {result.population}: N·ΣJ(θ̂) = "
                 f"{result.neg_log_likelihood:.5g}", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path
