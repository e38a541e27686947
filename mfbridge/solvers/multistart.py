r"""Several initial guesses for the outer loop, and which of the bridges they reach to return.

With a strong attraction and a non-convex confinement the rate function J can have several
critical points, and the outer fixed-point loop (:mod:`mfbridge.solvers.fixed_point`) converges
to the one whose basin holds its start. Solver option ``starts = m`` runs the usual start (cold or
warm) and ``m - 1`` further guesses (:func:`starting_flows`): first McCann's displacement
interpolation, then *tilted* guesses; it reports every distinct converged bridge.

Displacement start
------------------
The cold start moves mass by fading one endpoint into the other; the displacement interpolation
(the bridge's small-noise limit: Carlier, Duval, Peyré & Schmitzer, SIAM J. Math. Anal. 2017)
moves it along straight lines, so with endpoints made of several clusters it keeps the clusters
apart. Under strong attraction this reaches a bridge the cold and tilted starts miss: Gaussian
core of strength -10, range 0.5, σ = 1, demo endpoints, 64 cells × 20 steps, the cold start and
both level-1 tilts converge to J = 4.6697831 and the displacement start to J = 4.1042056 (39
outer iterations; flows 1.41 apart in max L1). It is the direct solver's warm start
(:func:`mfbridge.solvers.direct.displacement_interpolation`), blended with
:data:`~mfbridge.solvers.direct.DISPLACEMENT_BLEND` of the linear interpolation
(:func:`mfbridge.solvers.direct.displacement_start`).

Tilted guesses
--------------
The cold start is the linear interpolation of the endpoint masses,
:math:`\bar p_s = (1-s)\mu + s\nu`, :math:`s = t/T`. A tilted guess reweights it along one grid
axis :math:`a`,

.. math::

    \bar p_s(x) \propto \bigl((1-s)\mu + s\nu\bigr)(x)\,
                        \exp\bigl(\pm\lambda\,(x_a - c_a)\,4s(1-s)\bigr),
    \qquad \lambda = \frac{2\,j}{\varsigma_a},

normalised at every time: the endpoints are unchanged and the bias is largest at :math:`T/2`.
:math:`c_a` is the centre of the grid box, :math:`\varsigma_a` the larger of the two endpoint
standard deviations along the axis, and :math:`j = 1, 2, \dots` the level; a Gaussian tilted by
:math:`e^{\lambda x}` moves its mean by :math:`\lambda\varsigma^2`, so level j moves the guess by
about :math:`2j` endpoint widths at :math:`T/2` whatever the length unit. Guesses go through the
axes in decreasing order of :math:`\varsigma_a` (ties: lower axis first), each with both signs,
then the next level: in 1D ``starts = 3`` is the cold start and the two tilts of level 1.
A reweighting never puts mass where the interpolation has none; the outer loop moves it.

Distinct bridges
----------------
Two converged flows are the same bridge when
:math:`\max_k \sum_i |p_{k,i} - p'_{k,i}| \le \max(10^{-3}, 10^{3}\,\mathrm{tol})`: runs of the
outer loop that reach the same fixed point from different starts differ by an amount of the order
of the residual tolerance (measured: at most 1.1e-10 with tol = 1e-9), while different critical
points of J differ at order one (the mirror-image bridges of the swarm passing an obstacle on
either side, tests/test_multistart.py, are disjoint: distance 2).
"""

from __future__ import annotations

import warnings

import numpy as np

from mfbridge.errors import InputError, MultipleBridgesWarning
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics import observables
from mfbridge.result import Alternative, BridgeResult
from mfbridge.solvers.direct import displacement_start

# Flows closer than this (max over time of the L1 distance of the masses) are one bridge; with
# tol = 1e-9 the same fixed point reached from the cold start and from tilted guesses differed by
# at most 1.1e-10 (LQ case of tests/test_multistart.py, 64 cells, 10 steps), far below.
SAME_BRIDGE_L1 = 1e-3
# the threshold grows with a looser outer tolerance: 1e3 x tol
SAME_BRIDGE_TOL_FACTOR = 1e3
TILT = 2.0  # endpoint widths the level-1 guess moves at T/2


def same_bridge_threshold(tol: float) -> float:
    """L1 distance below which two converged flows are counted as one bridge."""
    return max(SAME_BRIDGE_L1, SAME_BRIDGE_TOL_FACTOR * tol)


def flow_distance(p: np.ndarray, q: np.ndarray) -> float:
    """:math:`\\max_k \\sum_i |p_{k,i} - q_{k,i}|` for masses of shape (K+1, *grid.shape)."""
    return float(np.abs(p - q).reshape(p.shape[0], -1).sum(axis=1).max())


def _spreads(problem: BridgeProblem) -> np.ndarray:
    """The larger of the two endpoint standard deviations along each axis, shape (d,)."""
    grid = problem.grid
    _, cov = observables.moments(np.stack([problem.initial, problem.final]), grid)
    variances = np.clip(np.diagonal(cov, axis1=1, axis2=2), 0.0, None).max(axis=0)
    # a point mass: use one cell, so the tilt stays finite
    return np.maximum(np.sqrt(variances), np.asarray(grid.spacing))


def tilted_flows(problem: BridgeProblem, count: int) -> list[tuple[str, np.ndarray]]:
    """``count`` tilted guesses (label, masses of shape (K+1, *grid.shape)), as described in
    the module docstring."""
    grid = problem.grid
    spreads = _spreads(problem)
    # spreads equal to rounding (isotropic endpoints) count as ties
    rounded = np.round(spreads / spreads.max(), 9)
    order = sorted(range(grid.dim), key=lambda a: (-rounded[a], a))
    s = (problem.times / problem.horizon).reshape(-1, *([1] * grid.dim))
    base = problem.linear_flow()
    bump = 4 * s * (1 - s)
    out = []
    for i in range(count):
        level, rest = divmod(i, 2 * grid.dim)
        axis, sign = order[rest // 2], (1.0, -1.0)[rest % 2]
        lam = TILT * (level + 1) / spreads[axis]
        centre = 0.5 * (grid.lower[axis] + grid.upper[axis])
        log_w = sign * lam * (grid.points[..., axis] - centre) * bump
        log_w -= log_w.reshape(log_w.shape[0], -1).max(axis=1).reshape(s.shape)
        p = base * np.exp(log_w)
        p /= p.reshape(p.shape[0], -1).sum(axis=1).reshape(s.shape)
        name = f"tilt{'' if level == 0 else level + 1}{'+' if sign > 0 else '-'}x{axis}"
        out.append((name, p))
    return out


def displacement_flow(problem: BridgeProblem) -> np.ndarray | None:
    """The displacement start: masses (K+1, *grid.shape),
    :func:`mfbridge.solvers.direct.displacement_start` (McCann's displacement interpolation
    blended with a little of the linear one); ``None`` when the exact plan it needs is too
    large (2D/3D grids above :data:`mfbridge.solvers.direct.OT_MAX_CELLS` cells)."""
    try:
        return displacement_start(problem, problem.linear_flow())
    except InputError:
        return None


def starting_flows(problem: BridgeProblem, count: int) -> list[tuple[str, np.ndarray]]:
    """The ``count`` guesses after the usual start (label, masses of shape (K+1, *shape)): the
    displacement start (label ``"displacement"``), then :func:`tilted_flows` (all tilted when
    the displacement start is not available)."""
    if count <= 0:
        return []
    flow = displacement_flow(problem)
    if flow is None:
        return tilted_flows(problem, count)
    return [("displacement", flow), *tilted_flows(problem, count - 1)]


def gather(found: list[BridgeResult], tol: float) -> BridgeResult:
    """The cheapest converged bridge among ``found`` (one result per start, the first the usual
    start), carrying the other distinct converged bridges as ``alternatives``, cheapest first.

    If none converged the first is returned, its message naming the starts tried. A
    :class:`MultipleBridgesWarning` names the costs when more than one distinct bridge is found.
    """
    converged = sorted((r for r in found if r.converged), key=lambda r: r.cost)
    tried = ", ".join(f"{r.start}: {r.status.replace('_', ' ')}" for r in found)
    if not converged:
        found[0].message += f" [{len(found)} starts ({tried}); none converged]"
        return found[0]
    limit = same_bridge_threshold(tol)
    kept: list[BridgeResult] = []
    for r in converged:
        if all(flow_distance(r.masses, k.masses) > limit for k in kept):
            kept.append(r)
    best, others = kept[0], kept[1:]
    best.alternatives = [
        Alternative(start=r.start, cost=r.cost, status=r.status, residual=r.residual,
                    distance=flow_distance(r.masses, best.masses), mean=r.mean,
                    density=r.density)
        for r in others
    ]
    best.message += f" [{len(found)} starts ({tried}); {len(kept)} distinct bridge(s)]"
    if others:
        costs = "; ".join(f"J = {r.cost:.8g} from start {r.start}"
                          f" (max L1 distance {flow_distance(r.masses, best.masses):.3g})"
                          for r in others)
        warnings.warn(MultipleBridgesWarning(
            f"{len(kept)} different bridges solve this problem: returned the cheapest, "
            f"J = {best.cost:.8g} from start {best.start}; the others: {costs}. They are "
            f"critical points of J (the lowest found is not proven global); see "
            f"result.alternatives"), stacklevel=4)
    return best
