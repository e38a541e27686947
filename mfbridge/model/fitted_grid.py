r"""The default grid of a run: a box fitted to the endpoints and the confinement.

The box must hold both endpoints with their tails and the places the confinement sends mass to;
the cells must resolve the endpoints and the drift. Per axis k:

* the endpoints' reach: mean ± 5 standard deviations of each Gaussian (or mixture component;
  5.7e-7 of its mass lies beyond), the samples' range widened by 5 kernel widths for sample
  endpoints (:func:`~mfbridge.model.samples.box_from_samples` without margin);
* the confinement's: a harmonic trap of stiffness a holds its stationary law
  N(centre, σ²/(2a)): centre ± 5 σ/√(2a); a double well's wells at x₀ = ±1 with their local
  spread σ/√(2 U''(±1)) = σ/√(4 depth): ±(1 + 5 σ/√(4 depth)) along the first axis (its other
  axes are a harmonic trap of stiffness ``stiffness``);
* the box is the hull of these reaches, widened by ``margin`` of its extent on each side.

Cells: the width is the smallest of (i) the narrowest endpoint standard deviation along the
axis (of a mixture's components; a sample endpoint's kernel) divided by ``cells_per_width``
(default 8 in 1D, 4 in 2D, 2 in 3D) and (ii) D / |∇U| within 3 standard deviations of the
endpoints (D = σ²/2), so that the drift's cell Péclet number |∇U| h / D is at most 1 where the
endpoints have their mass (measured on the double-well default run, σ = 0.8: at Péclet 2, 390
cells, the space error of J is −0.15%; at Péclet 1, 780 cells, −0.04%); the count is clipped
to ``CELLS`` (per dimension). The interaction is not included (it is usually weaker than the
confinement where mass is; the advice printed before a solve names the Péclet number of the
full drift).

Time steps (config ``steps: null``): :func:`fitted_steps`, from the curvature of the
confinement where the endpoints have their mass.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from mfbridge.errors import InputError, is_real_number
from mfbridge.model.endpoints import Endpoint, Gaussian
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import Confinement, DoubleWell, Harmonic, TiltedDoubleWell
from mfbridge.model.samples import box_from_samples

# cells per axis chosen by fitted_grid, by dimension (smallest, largest)
CELLS = {1: (64, 1024), 2: (32, 128), 3: (16, 32)}
# cells per standard deviation of the narrowest endpoint, by dimension (a 2D or 3D grid pays
# for resolution with the square or the cube)
CELLS_PER_WIDTH = {1: 8.0, 2: 4.0, 3: 2.0}
PECLET = 1.0  # the largest cell Péclet number |grad U| h / D of the drift where mass is
STATIONARY_REACH = 5.0  # standard deviations of a trap's stationary law inside the box
PECLET_REACH = 3.0  # the drift is resolved within this many standard deviations of the endpoints
ENDPOINT_REACH = 5.0  # a Gaussian endpoint's standard deviations inside the box (5.7e-7 beyond)


def checked_noise(noise: Any, diffusion: Any = None) -> float:
    """σ from ``noise`` or ``diffusion`` D (σ = √(2D)), refused unless a positive number."""
    if diffusion is not None:
        if not (is_real_number(diffusion) and diffusion > 0):
            raise InputError(f"diffusion D must be a positive number, got {diffusion!r}")
        return math.sqrt(2.0 * float(diffusion))
    # the same words as the problem's own check, which comes later
    if isinstance(noise, bool) or not isinstance(noise, (int, float, np.integer, np.floating)):
        raise InputError(f"noise must be a positive number, got {noise!r}")
    if not (is_real_number(noise) and noise > 0):
        raise InputError(f"noise must be a positive finite number, got {noise!r}")
    return float(noise)


def confinement_reach(confinement: Confinement | None, noise: float, dim: int
                      ) -> tuple[np.ndarray, np.ndarray] | None:
    """(lower, upper) per axis of the region the confinement holds mass in at noise σ (see
    the module docstring), or None when it does not confine (or is unknown)."""
    if isinstance(confinement, Harmonic):
        if confinement.stiffness <= 0:
            return None
        centre = np.broadcast_to(np.asarray(confinement.centre, dtype=float), (dim,))
        spread = STATIONARY_REACH * noise / math.sqrt(2.0 * confinement.stiffness)
        return centre - spread, centre + spread
    if isinstance(confinement, (DoubleWell, TiltedDoubleWell)):
        lower, upper = np.zeros(dim), np.zeros(dim)
        if confinement.depth > 0:
            reach = 1.0 + STATIONARY_REACH * noise / math.sqrt(4.0 * confinement.depth)
            lower[0], upper[0] = -reach, reach
        if dim > 1 and confinement.stiffness > 0:
            spread = STATIONARY_REACH * noise / math.sqrt(2.0 * confinement.stiffness)
            lower[1:], upper[1:] = -spread, spread
        return lower, upper
    return None


def _parts(endpoint: Endpoint) -> tuple[Endpoint, ...]:
    return tuple(getattr(endpoint, "components", (endpoint,)))


def _endpoint_reach(laws: Sequence[Endpoint], spreads: float = ENDPOINT_REACH
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Per axis, the hull of mean ± ``spreads`` standard deviations of every Gaussian (or
    mixture component) law, and of the samples' range + 5 kernel widths of the others."""
    lows, highs = [], []
    for e in laws:
        if all(isinstance(c, Gaussian) for c in _parts(e)):
            for c in _parts(e):
                sd = np.sqrt(np.clip(np.diag(np.atleast_2d(c.cov())), 0.0, None))
                lows.append(np.asarray(c.mean(), dtype=float) - spreads * sd)
                highs.append(np.asarray(c.mean(), dtype=float) + spreads * sd)
        else:
            lo, up = box_from_samples(e, e, 0.0)
            lows.append(np.asarray(lo))
            highs.append(np.asarray(up))
    return np.min(lows, axis=0), np.max(highs, axis=0)


def _snapshot_laws(snapshots: Any) -> list[Any]:
    """The law of each item of a series (a mapping or an object with a ``law``)."""
    return [item["law"] if hasattr(item, "keys") else getattr(item, "law", item)
            for item in snapshots]


def fitted_grid(initial: Endpoint | None = None, final: Endpoint | None = None,
                confinement: Confinement | None = None, noise: Any = None,
                diffusion: Any = None, shape: Any = None, margin: float = 0.1,
                cells_per_width: float | None = None, snapshots: Any = None) -> Grid:
    """A :class:`Grid` whose box holds the endpoints and the confinement's wells (module
    docstring); ``shape``: cells per axis, or None to choose them from the endpoints' widths
    and the drift; ``noise`` σ (length/√time) or ``diffusion`` D (σ = √(2D)). For a series,
    ``snapshots`` (items with a ``law``) instead of ``initial`` and ``final``: the box holds
    every snapshot's law and the cells resolve the narrowest."""
    laws = _snapshot_laws(snapshots) if snapshots is not None else [initial, final]
    if len(laws) < 2 or not all(isinstance(e, Endpoint) for e in laws):
        raise InputError("the fitted grid needs endpoint objects (grid=fitted): initial and "
                         "final, or the laws of a series' snapshots; with arrays of masses give "
                         "the grid yourself")
    if not (is_real_number(margin) and margin >= 0):
        raise InputError(f"margin must be a number ≥ 0, got {margin!r}")
    if cells_per_width is not None and not (is_real_number(cells_per_width)
                                            and cells_per_width > 0):
        raise InputError(f"cells_per_width must be a positive number or null, got "
                         f"{cells_per_width!r}")
    sigma = checked_noise(noise, diffusion)
    lower, upper = _endpoint_reach(laws)
    dim = len(lower)
    reach = confinement_reach(confinement, sigma, dim)
    if reach is not None:
        lower, upper = np.minimum(lower, reach[0]), np.maximum(upper, reach[1])
    extent = upper - lower
    lower, upper = lower - margin * extent, upper + margin * extent
    if shape is not None:
        return Grid(tuple(map(float, lower)), tuple(map(float, upper)), shape)
    parts = [c for e in laws for c in _parts(e)]
    widths, lows, highs = [], [], []
    for e in parts:
        kernel = getattr(e, "kernel_cov", None)
        cov = np.atleast_2d(np.asarray(kernel() if callable(kernel) else e.cov(), dtype=float))
        sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
        if np.all(sd > 0):
            widths.append(sd)
        spread = np.sqrt(np.clip(np.diag(np.atleast_2d(np.asarray(e.cov(), dtype=float))),
                                 0.0, None))
        mean = np.asarray(e.mean(), dtype=float).reshape(dim)
        lows.append(mean - PECLET_REACH * spread)
        highs.append(mean + PECLET_REACH * spread)
    per_width = CELLS_PER_WIDTH.get(dim, 2.0) if cells_per_width is None else cells_per_width
    h = np.min(widths, axis=0) / per_width if widths else extent / 64
    if confinement is not None:
        # cell Péclet number |grad U| h / D <= PECLET (D = sigma^2 / 2) where the endpoints have
        # their mass (each component's mean +- PECLET_REACH standard deviations)
        lo_e, up_e = np.min(lows, axis=0), np.max(highs, axis=0)
        points = np.stack(np.meshgrid(*[np.linspace(a, b, 17) for a, b in
                                        zip(lo_e, up_e, strict=True)], indexing="ij"), axis=-1)
        grad = np.abs(np.asarray(confinement.grad(points.reshape(-1, dim)), dtype=float))
        steepest = grad.max(axis=0)
        with np.errstate(divide="ignore"):
            h = np.minimum(h, np.where(steepest > 0, PECLET * 0.5 * sigma**2 / steepest,
                                       np.inf))
    smallest, largest = CELLS.get(dim, CELLS[3])
    n = np.clip(np.ceil((upper - lower) / h), smallest, largest).astype(int)
    return Grid(tuple(map(float, lower)), tuple(map(float, upper)), tuple(int(v) for v in n))


# time steps: the midpoint rule in time (mfbridge.solvers.cost) has the relative error
# (dt lambda)^2 / 24 when the cost's integrand varies at the rate lambda; STEP_RATE keeps it
# at 2.5e-4. Measured: the error constants (relative error x K^2) -1.7, -16 and -0.84 of the
# Morse, Gaussian-core double-well and linear-quadratic cases of issue 12 correspond to
# lambda = 6.4, 19.6 and 4.5, where the rule below (the confinement's curvature) gives 7.0,
# 19.3 and 1.0 (the last one then gets the fewest STEPS, 100).
STEP_RATE = 0.077
STEPS = (100, 1000)  # fewest and most steps chosen by fitted_steps
BULK = 2.0  # standard deviations of the endpoints where the curvature of U is read


def _curvature(values: Any, points: np.ndarray, axis: int, delta: float) -> np.ndarray:
    step = np.zeros(points.shape[-1])
    step[axis] = delta
    return (np.asarray(values(points + step), dtype=float) - 2 * np.asarray(values(points))
            + np.asarray(values(points - step), dtype=float)) / delta**2


def fitted_steps(laws: Sequence[Endpoint], confinement: Confinement | None,
                 horizon: float) -> int:
    r"""Time steps K for the horizon T: :math:`K = \lceil T\lambda/0.077\rceil`, clipped to
    ``STEPS``, with λ the largest curvature |∂²U| within 2 standard deviations of the ``laws``
    (the endpoints, or every snapshot of a series over its span T): the rate at which the
    confinement relaxes the flow (see ``STEP_RATE``). The interaction is left out: its
    curvature at short range (Morse's core) did not show in the measured time errors."""
    lower, upper = _endpoint_reach(laws, BULK)
    dim = len(lower)
    if confinement is None:
        return STEPS[0]
    extent = np.maximum(upper - lower, 1e-6)
    points = np.stack(np.meshgrid(*[np.linspace(a, b, 17) for a, b in
                                    zip(lower, upper, strict=True)], indexing="ij"),
                      axis=-1).reshape(-1, dim)
    rate = max(float(np.abs(_curvature(confinement.value, points, a,
                                       1e-3 * float(extent[a]))).max()) for a in range(dim))
    steps = math.ceil(float(horizon) * rate / STEP_RATE) if np.isfinite(rate) else STEPS[1]
    return int(min(max(steps, STEPS[0]), STEPS[1]))
