"""Figures and progress a new user reads (issue 15, items 9, 10, 11): checked by what the
figures contain (colour bars, shared colour scales, legends, labels inside the canvas) and by
the log lines a run writes."""

from __future__ import annotations

import logging
from pathlib import Path

import matplotlib
import numpy as np
import pytest

matplotlib.use("Agg")
import matplotlib.colors
from matplotlib.figure import Figure

from mfbridge.runs.api import compose, solve


@pytest.fixture
def saved(monkeypatch):
    """Every matplotlib figure saved during the test, by file name."""
    figures: dict[str, Figure] = {}
    original = Figure.savefig

    def savefig(self, fname, *args, **kwargs):
        out = original(self, fname, *args, **kwargs)
        # drawn positions, read while the figure still has its Agg canvas
        self.canvas.draw()
        self.clipped = _clipped(self)
        self.overlapping = _overlapping_ticks(self)
        figures[Path(str(fname)).name] = self
        return out

    monkeypatch.setattr(Figure, "savefig", savefig)
    return figures


def colorbars(fig: Figure) -> list:
    return [ax for ax in fig.axes if getattr(ax, "_colorbar", None) is not None]


def clipped_texts(fig: Figure) -> list[str]:
    """Axis labels and titles that reached outside the canvas when the figure was saved."""
    return fig.clipped


def overlapping_ticks(fig: Figure) -> list[tuple[str, str]]:
    """Pairs of visible tick labels that overlapped when the figure was saved."""
    return fig.overlapping


def _overlapping_ticks(fig: Figure) -> list[tuple[str, str]]:
    renderer = fig.canvas.get_renderer()
    labels = [t for ax in fig.axes for t in ax.get_xticklabels(which="both")
              + ax.get_yticklabels(which="both") if t.get_visible() and t.get_text()]
    boxes = [(t.get_text(), t.get_window_extent(renderer)) for t in labels]
    return [(a, b) for i, (a, box_a) in enumerate(boxes) for b, box_b in boxes[i + 1:]
            if box_a.overlaps(box_b) and box_a.width > 0 and box_b.width > 0]


def _clipped(fig: Figure) -> list[str]:
    """Axis labels and titles that reach outside the canvas (1 px tolerance)."""
    renderer = fig.canvas.get_renderer()
    box = fig.bbox
    out = []
    texts = [fig._suptitle] if fig._suptitle is not None else []
    for ax in fig.axes:
        texts += [ax.xaxis.label, ax.yaxis.label, ax.title]
    for text in texts:
        if not text.get_text() or not text.get_visible():
            continue
        ext = text.get_window_extent(renderer)
        if (ext.x0 < box.x0 - 1 or ext.y0 < box.y0 - 1 or ext.x1 > box.x1 + 1
                or ext.y1 > box.y1 + 1):
            out.append(text.get_text())
    return out


@pytest.fixture(scope="module")
def result_2d():
    return solve(compose(["grid=plane", "endpoints=gaussians_2d", "grid.shape=[16,16]",
                          "steps=8"]))


def test_2d_density_has_one_scale_a_colour_bar_and_a_legend(result_2d, saved, tmp_path):
    """Before: each snapshot scaled to its own peak, no colour bar, unlabelled mean path,
    clipped labels."""
    from mfbridge.runs.plotting import plot_result

    result_2d.model["axes"] = ["x_mm", "y_mm"]  # as from a data file's named columns
    plot_result(result_2d, tmp_path, scale="linear")
    fig = saved["density.png"]
    images = [im for ax in fig.axes for im in ax.images]
    assert len(images) == 5
    limits = {(im.norm.vmin, im.norm.vmax) for im in images}
    assert len(limits) == 1  # one colour scale for every snapshot
    vmax = limits.pop()[1]
    assert vmax == pytest.approx(max(float(im.get_array().max()) for im in images))
    assert len(colorbars(fig)) == 1
    assert "density" in colorbars(fig)[0].get_ylabel()
    legends = [ax.get_legend() for ax in fig.axes if ax.get_legend() is not None]
    labels = {t.get_text() for legend in legends for t in legend.get_texts()}
    assert {"mean path", "mean at this t"} <= labels
    assert fig.axes[0].get_xlabel() == "x_mm" and fig.axes[0].get_ylabel() == "y_mm"
    assert clipped_texts(fig) == []
    assert overlapping_ticks(fig) == []
    assert clipped_texts(saved["moments.png"]) == []
    assert clipped_texts(saved["convergence.png"]) == []


def test_log_scale_for_narrow_endpoints(saved, tmp_path):
    """A narrow endpoint: ``auto`` picks a log colour scale, in 1D too; ``linear`` does not."""
    from mfbridge.runs.plotting import plot_density_1d

    result = solve(compose(["endpoints=gaussians", "grid.shape=96", "steps=10"]))
    x = result.grid.axes[0]
    narrow = np.exp(-0.5 * ((x + 1) / 0.02) ** 2)  # a spike narrower than a cell: peak ~ 1/h
    result.density[0] = narrow / (narrow.sum() * result.grid.spacing[0])
    plot_density_1d(result, tmp_path / "density.png")
    mesh = saved["density.png"].axes[1].collections[0]
    assert isinstance(mesh.norm, matplotlib.colors.LogNorm)
    assert "log" in colorbars(saved["density.png"])[0].get_ylabel()
    plot_density_1d(result, tmp_path / "density.png", scale="linear")
    mesh = saved["density.png"].axes[1].collections[0]
    assert not isinstance(mesh.norm, matplotlib.colors.LogNorm)
    assert clipped_texts(saved["density.png"]) == []


@pytest.fixture(scope="module")
def direct_run():
    """A tiny direct solve with its progress lines."""
    lines: list[str] = []
    result = solve(compose(["solver=direct", "mobility=exclusion", "solver.total_mass=0.3",
                            "grid.shape=32", "steps=6"]),
                   direct_callback=lambda kind, it, cost, grad: lines.append(
                       f"{kind} {it} {cost} {grad}"))
    return result, lines


def test_direct_solver_reports_progress_per_iteration(direct_run):
    """Before: nothing printed until the end (50-60 s on the demo)."""
    result, lines = direct_run
    assert len(lines) == result.iterations >= 2
    kind, it, cost, grad = lines[-1].split()
    assert kind == "Newton" and int(it) == result.iterations
    assert float(cost) == pytest.approx(result.cost, rel=1e-6)
    assert np.isfinite(float(grad))


def test_direct_solver_reports_its_stopping_quantity(direct_run):
    """Before: summary.json said "residual": 3.34 (a gradient entry) with status converged.
    Now the residual is the quantity the stopping rule compares with tol, named."""
    result, _ = direct_run
    stopping = result.summary()["stopping"]
    assert stopping["quantity"].startswith("predicted relative decrease of J by a Newton step")
    assert stopping["tolerance"] == 1e-9
    assert result.status == "converged"
    assert result.residual == stopping["value"] <= stopping["tolerance"]
    assert result.history[-1]["criterion"] == stopping["value"]


def test_direct_figures_name_mobility_mass_and_iterations(direct_run, saved, tmp_path):
    """Before: 'outer iteration', an empty 'marginal error' entry, a clipped title."""
    from mfbridge.runs.plotting import plot_result

    result, _ = direct_run
    plot_result(result, tmp_path)
    density = saved["density.png"]
    title = " ".join(ax.get_title() for ax in density.axes)
    assert "exclusion mobility" in title and "total mass 0.3" in title
    conv = saved["convergence.png"].axes[0]
    assert conv.get_xlabel() == "Newton iteration"
    assert conv.get_ylabel()
    labels = [t.get_text().replace("\n", " ") for t in conv.get_legend().get_texts()]
    assert "marginal error" not in labels
    assert result.stopping["quantity"] in labels and "tolerance" in labels
    assert clipped_texts(saved["convergence.png"]) == []


def test_cli_progress_lines_and_quiet(tmp_path, caplog):
    from mfbridge.runs.cli import run

    overrides = ["grid.shape=48", "steps=10", "figures=false"]
    with caplog.at_level(logging.INFO, logger="mfbridge"):
        run(compose(overrides), tmp_path / "loud")
    assert "outer iteration   1:" in caplog.text
    caplog.clear()
    with caplog.at_level(logging.INFO, logger="mfbridge"):
        run(compose([*overrides, "progress=false"]), tmp_path / "quiet")
    assert "outer iteration " not in caplog.text  # (the summary says "outer iterations")
    assert "cost J = " in caplog.text


def test_direct_progress_lines(caplog, monkeypatch):
    """Every Newton iteration is logged; L-BFGS (thousands of iterations) the first 10, then
    every 100th or after 2 s of silence."""
    from mfbridge.runs import cli

    clock = iter(np.arange(0.0, 1e4, 0.01))
    monkeypatch.setattr(cli.time, "perf_counter", lambda: float(next(clock)))
    with caplog.at_level(logging.INFO, logger="mfbridge"):
        newton = cli._DirectProgress()
        for it in range(1, 31):
            newton("Newton", it, 3.0 + 1 / it, 10.0 / it)
        lbfgs = cli._DirectProgress()
        for it in range(1, 1001):
            lbfgs("L-BFGS", it, 3.0, 1.0)
    lines = caplog.text.splitlines()
    assert sum("Newton iteration" in line for line in lines) == 30
    assert "Newton iteration    1: J = 4, largest gradient entry 1.00e+01" in caplog.text
    assert sum("L-BFGS iteration" in line for line in lines) == 10 + 9 + 1


# ------------------------------------------------------------------ item 12: collect figures


@pytest.fixture(scope="module")
def sweep(tmp_path_factory):
    """Four tiny runs of a sweep over interaction.strength, in folders named as Hydra names
    them (their text order -0.4, -0.8, -1.2, 0.0 is not the numeric order)."""
    from mfbridge.runs.cli import run

    root = tmp_path_factory.mktemp("sweep")
    for value in ("-0.4", "-0.8", "-1.2", "0.0"):
        override = f"interaction.strength={value}"
        run(compose([override, "grid.shape=48", "steps=10", "figures=false"]), root / override,
            record_extra={"overrides": [override]})
    return root


def test_collect_figures_in_numeric_order_on_one_scale(sweep, saved):
    """Before: panels in folder-name order, one colour scale each, no colour bar, mean paths
    only (they coincide for an interaction sweep)."""
    from mfbridge.runs.commands.collect import collect

    collect(sweep)
    fig = saved["densities.png"]
    panels = [ax for ax in fig.axes if ax.get_visible() and ax.collections
              and getattr(ax, "_colorbar", None) is None]
    titles = [ax.get_title().splitlines()[0] for ax in panels]
    assert titles == [f"interaction.strength={v}" for v in (-1.2, -0.8, -0.4, 0.0)]
    assert len({(ax.collections[0].norm.vmin, ax.collections[0].norm.vmax)
                for ax in panels}) == 1
    assert len(colorbars(fig)) == 1
    paths = saved["mean_paths.png"]
    mean_ax, spread_ax = paths.axes[:2]
    assert spread_ax.get_ylabel() == "standard deviation (length)"
    assert mean_ax.get_ylabel() and spread_ax.get_title().startswith("spread")
    legend = [t.get_text() for t in spread_ax.get_legend().get_texts()]
    assert legend == [f"interaction.strength={v}" for v in (-1.2, -0.8, -0.4, 0.0)]
    for name in ("cost.png", "densities.png", "mean_paths.png"):
        assert clipped_texts(saved[name]) == [], name
        assert all(ax.get_ylabel() for ax in saved[name].axes
                   if ax.get_visible() and getattr(ax, "_colorbar", None) is None), name


def test_check_figures_have_y_labels_and_no_overlapping_ticks(sweep, saved, tmp_path):
    """Before: check_convergence.png's minor tick labels overlapped; histograms had no y label."""
    from mfbridge.particles.plots import plot_check
    from mfbridge.runs.api import check, load

    result = load(sweep / "interaction.strength=0.0")
    lines: list[str] = []
    report = check(result, n_particles=[60, 120, 240], seeds=[0, 1], progress=lines.append)
    # item 9: one progress line per particle number and seed, in order
    assert len(lines) == 6 and lines[-1].startswith("N =    240, seed 1: W1(T) = ")
    assert "(6 of 6 runs" in lines[-1]
    plot_check(report, tmp_path)
    for name in ("check_histograms.png", "check_clouds.png", "check_convergence.png"):
        fig = saved[name]
        assert all(ax.get_ylabel() for ax in fig.axes), name
        assert overlapping_ticks(fig) == [], name
        assert clipped_texts(fig) == [], name
