r"""Advice on the grid, before and after a solve: is it fine enough, wide enough, not too wide?

Before (from the problem alone) and after (from the computed flow), one sentence per finding:

* **Péclet number.** A finite-volume drift–diffusion scheme resolves the flow when the cell
  Péclet number |b| h / D (D = σ²/2) is of order 1 where there is mass; above ~2 the scheme
  smears layers and the outer loop converges badly (common practice, no source). Before a solve
  the drift is b = −∇(U + W ⋆ ρ) at each endpoint, and the transport speed |m_ν − m_μ| / T
  that the control must supply; after, the drift of the flow and its control u = σ²∇ψ.
* **Walls.** An endpoint (before) or the flow at some time (after) with more than ``WALL_MASS``
  of its mass in the outermost layer of cells feels the no-flux wall: the box is too narrow.
* **Empty box.** When more than ``EMPTY_FRACTION`` of the cells lie outside the smallest box
  around the cells where the endpoints (before) or the flow (after) have mass (above
  ``EMPTY_MASS``), most of the work is spent on nothing: the box is far too wide.
"""

from __future__ import annotations

import numpy as np

from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics.reference import PairField
from mfbridge.result import BridgeResult

PECLET_LIMIT = 2.0
WALL_MASS = 1e-6
EMPTY_MASS = 1e-10
EMPTY_FRACTION = 0.6
MASS_SHARE = 1e-2  # a face "has mass" when a neighbour holds this share of the largest cell
# (a Gaussian: within 3 standard deviations, as mfbridge.model.fitted_grid resolves the drift)


def _axis_name(problem: BridgeProblem, axis: int) -> str:
    return "x" if problem.grid.dim == 1 else f"x{axis}"


def _peclet_text(problem: BridgeProblem, axis: int, peclet: float, what: str) -> str:
    n = problem.grid.shape[axis]
    need = int(np.ceil(n * peclet / PECLET_LIMIT))
    return (f"the cell Péclet number |v|h/D of {what} reaches {peclet:.3g} along "
            f"{_axis_name(problem, axis)} (above {PECLET_LIMIT:g}): the grid is coarse for "
            f"noise σ = {problem.noise:g}; about {need} cells along {_axis_name(problem, axis)} "
            f"(now {n}) would bring it to {PECLET_LIMIT:g}")


def _drift_peclet(problem: BridgeProblem, phi: np.ndarray, masses: np.ndarray
                  ) -> list[float]:
    """Per axis, the largest β|ΔΦ| over faces next to a cell with mass (masses and phi of
    shape (..., *grid.shape))."""
    beta = 2.0 / problem.noise**2
    out = []
    grid = problem.grid
    lead = masses.ndim - grid.dim
    heavy = masses > MASS_SHARE * masses.max()
    for a in range(grid.dim):
        ax = lead + a
        steep = beta * np.abs(np.diff(phi, axis=ax))
        n = grid.shape[a]
        lo = np.take(heavy, np.arange(n - 1), axis=ax)
        hi = np.take(heavy, np.arange(1, n), axis=ax)
        steep = np.where((lo | hi) & np.isfinite(steep), steep, 0.0)
        out.append(float(steep.max()) if steep.size else 0.0)
    return out


def _walls(problem: BridgeProblem, masses: np.ndarray) -> list[tuple[int, str, float]]:
    grid = problem.grid
    lead = masses.ndim - grid.dim
    found = []
    for a in range(grid.dim):
        for side, index in (("lower", 0), ("upper", -1)):
            layer = np.take(masses, index, axis=lead + a)
            mass = float(layer.reshape(*layer.shape[:lead], -1).sum(axis=-1).max())
            if mass > WALL_MASS:
                found.append((a, side, mass))
    return found


def _empty_fraction(problem: BridgeProblem, occupied: np.ndarray) -> tuple[float, list[str]]:
    """Fraction of the cells outside the hull of ``occupied`` (bool, grid.shape), and the
    hull's extent per axis as text."""
    grid = problem.grid
    inside = 1.0
    extents = []
    for a in range(grid.dim):
        other = tuple(b for b in range(grid.dim) if b != a)
        along = occupied.any(axis=other) if other else occupied
        cells = np.flatnonzero(along)
        if cells.size == 0:
            return 1.0, []
        inside *= (cells[-1] - cells[0] + 1) / grid.shape[a]
        edges = grid.edges[a]
        extents.append(f"[{edges[cells[0]]:.3g}, {edges[cells[-1] + 1]:.3g}]")
    return 1.0 - inside, extents


def _common(problem: BridgeProblem, masses: np.ndarray, what: str) -> list[str]:
    out = []
    grid = problem.grid
    for a, side, mass in _walls(problem, masses):
        edge = grid.lower[a] if side == "lower" else grid.upper[a]
        out.append(f"{what} puts {mass:.2g} of its mass in the outermost cells at "
                   f"{_axis_name(problem, a)} = {edge:g} (more than {WALL_MASS:g}): the box is "
                   "too narrow and the no-flux wall distorts the bridge; widen it "
                   "(grid.lower, grid.upper)")
    occupied = (masses > EMPTY_MASS).reshape(-1, *grid.shape).any(axis=0)
    fraction, extents = _empty_fraction(problem, occupied)
    if fraction > EMPTY_FRACTION:
        out.append(f"{100 * fraction:.0f}% of the cells lie outside the region where {what} "
                   f"has mass ({' × '.join(extents)}): the box is far too wide; a box around "
                   "that region would give the same answer with fewer cells")
    return out


def before(problem: BridgeProblem) -> list[str]:
    """Advice from the problem alone (see the module docstring)."""
    grid = problem.grid
    confinement = np.asarray(problem.confinement.value(grid.points), dtype=float)
    pair = PairField(grid, problem.interaction)
    out = []
    worst = [0.0] * grid.dim
    for p in (problem.initial, problem.final):
        for a, value in enumerate(_drift_peclet(problem, confinement + pair(p), p)):
            worst[a] = max(worst[a], value)
    for a, value in enumerate(worst):
        if value > PECLET_LIMIT:
            out.append(_peclet_text(problem, a, value, "the drift where an endpoint has mass"))
    pts = grid.points.reshape(-1, grid.dim)
    shift = (problem.final.reshape(-1) @ pts - problem.initial.reshape(-1) @ pts)
    diffusivity = 0.5 * problem.noise**2
    for a in range(grid.dim):
        value = abs(shift[a]) / problem.horizon * grid.spacing[a] / diffusivity
        if value > PECLET_LIMIT and value > worst[a]:
            out.append(_peclet_text(problem, a, value,
                                    "the transport between the endpoints (mean shift / T)"))
    out.extend(_common(problem, np.stack([problem.initial, problem.final]), "an endpoint"))
    return out


def after(problem: BridgeProblem, result: BridgeResult) -> list[str]:
    """Advice from the computed flow (see the module docstring)."""
    grid = problem.grid
    masses = result.masses
    if not np.all(np.isfinite(masses)):
        return []
    confinement = np.asarray(problem.confinement.value(grid.points), dtype=float)
    pair = PairField(grid, problem.interaction)
    out = []
    drift = _drift_peclet(problem, confinement + pair(masses), masses)
    # u = sigma^2 grad psi: |u| h / D = 2 |delta psi| across a face
    psi = np.where(np.isfinite(result.log_backward), result.log_backward, np.nan)
    control = _drift_peclet(problem, psi * problem.noise**2, masses)
    for a in range(grid.dim):
        if drift[a] > PECLET_LIMIT:
            out.append(_peclet_text(problem, a, drift[a], "the drift of the flow"))
        if control[a] > PECLET_LIMIT and control[a] >= drift[a]:
            out.append(_peclet_text(problem, a, control[a], "the control of the flow"))
    out.extend(_common(problem, masses, "the flow"))
    return out
