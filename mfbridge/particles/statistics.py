r"""Particle-level check of a bridge: does a finite interacting system driven by the computed
control really follow the flow?

:func:`check` runs the simulator (:mod:`mfbridge.particles.simulator`: Euler–Maruyama with the
result's control, and the same particles with u = 0) for several N and seeds, and measures at a
few output times the W₁ distance of each cloud to the bridge ρ_t (controlled) or to the
McKean–Vlasov flow (uncontrolled), the errors of mean and covariance, and the Girsanov estimate
of the cost with its 95% interval :math:`\bar I \pm 1.96\,s_I/\sqrt N` (central limit theorem
over particles).

Distances
---------
In 1D, W₁ between the cloud and the piecewise-constant density of the cell masses is exact:
:math:`\int|F_N - F|\,dx` with F piecewise linear between cell faces, integrated in closed form
between consecutive break points (equivalently :math:`\int_0^1|F_N^{-1} - F^{-1}|dq`). In 2D the
cloud is binned to the grid and W₁ between the two sets of cell masses (at the cell centres) is
computed exactly by POT's network simplex (``ot.emd2``); the binning is the same for both laws, so
the distance tends to zero as the cloud's law tends to the grid's. The sampling part of W₁ falls
like N^{-1/2} in 1D and like √(log N / N) in 2D (Ajtai, Komlós & Tusnády, Combinatorica 1984).

This module is part of the numerical core: no files, no plots, no Hydra.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

from mfbridge.errors import InputError
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import Confinement, Interaction
from mfbridge.numerics.observables import trapezoid_weights
from mfbridge.particles.simulator import (
    PAIR_MODES,
    SUBSTEP_TARGET,
    PairForce,
    ParticleRun,
    default_substeps,
    mckean_vlasov_flow,
    pair_mode_for,
    prepare_control,
    sample_particles,
    simulate,
)
from mfbridge.result import BridgeResult

__all__ = [
    "CheckReport",
    "ConvergenceRow",
    "ErrorFit",
    "RunStats",
    "check",
    "fit_error_law",
    "moments_of_masses",
    "w1_to_masses",
]

Z95 = 1.959963984540054  # 97.5% quantile of the standard normal


# --------------------------------------------------------------------------- statistics


def w1_to_masses(grid: Grid, x: np.ndarray, masses: np.ndarray) -> float:
    """Wasserstein-1 distance between the empirical law of ``x`` (N, d) and cell ``masses``.

    1D: exact against the piecewise-constant density, ∫|F_N − F| dx in closed form. 2D/3D: exact
    (POT network simplex) between the cloud binned to the grid and the masses, both at cell
    centres. Length units.
    """
    p = np.clip(np.asarray(masses, dtype=float), 0.0, None)
    p = p / p.sum()
    if grid.dim == 1:
        xs = np.sort(x[:, 0])
        edges = grid.edges[0]
        cdf = np.concatenate([[0.0], np.cumsum(p.ravel())])
        pts = np.union1d(xs, edges)
        f_grid = np.interp(pts, edges, cdf)
        f_emp = np.searchsorted(xs, pts, side="right") / xs.size
        d0 = (f_grid - f_emp)[:-1]
        # on [pts_j, pts_{j+1}) F_N is constant, F linear: d goes from d0 to d1
        d1 = f_grid[1:] - f_emp[:-1]
        length = np.diff(pts)
        a0, a1 = np.abs(d0), np.abs(d1)
        same = d0 * d1 >= 0
        denom = np.where(same, 1.0, a0 + a1)
        area = np.where(same, 0.5 * (a0 + a1), 0.5 * (d0 * d0 + d1 * d1) / denom)
        return float(np.sum(length * area))
    import ot

    st = _stencil_nearest(grid, x)
    hist = np.bincount(st, minlength=grid.size) / x.shape[0]
    flat = p.ravel()
    src = np.flatnonzero(hist)
    dst = np.flatnonzero(flat > 1e-14)
    pts = grid.points.reshape(grid.size, grid.dim)
    cost = ot.dist(pts[src], pts[dst], metric="euclidean")
    b = flat[dst] / flat[dst].sum()
    return float(ot.emd2(hist[src], b, cost, numItermax=50_000_000))


def _stencil_nearest(grid: Grid, x: np.ndarray) -> np.ndarray:
    """Flat index of the cell holding each point (N, d) -> (N,)."""
    idx = np.zeros(x.shape[0], dtype=np.int64)
    for a in range(grid.dim):
        i = np.floor((x[:, a] - grid.lower[a]) / grid.spacing[a]).astype(np.int64)
        idx = idx * grid.shape[a] + np.clip(i, 0, grid.shape[a] - 1)
    return idx


def moments_of_masses(grid: Grid, masses: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean (d,) and covariance (d, d) of the piecewise-constant density of cell ``masses``
    (the centre-based moments plus h_a²/12 on the diagonal, the variance within a cell)."""
    pts = grid.points.reshape(grid.size, grid.dim)
    p = masses.ravel() / masses.sum()
    mean = p @ pts
    c = pts - mean
    cov = np.einsum("i,ia,ib->ab", p, c, c) + np.diag(np.asarray(grid.spacing) ** 2 / 12.0)
    return mean, cov


def _cloud_moments(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    mean = x.mean(axis=0)
    c = x - mean
    return mean, c.T @ c / x.shape[0]


@dataclass
class RunStats:
    """Statistics of one (N, seed) pair at the output times (arrays of length n_out).

    Controlled cloud against the bridge ρ_t: ``w1``, ``mean_error`` (Euclidean norm),
    ``cov_error`` (Frobenius norm), ``w1_to_nu`` (at T); ``cost``, ``cost_low``, ``cost_high``
    (Girsanov estimate and 95% interval), ``cost_std`` (spread of the per-particle integrals).
    Uncontrolled cloud (only for the first seed of each N, else None) against the McKean–Vlasov
    flow: ``free_w1``, ``free_mean_error``, ``free_cov_error``; ``free_w1_to_nu`` at T.
    """

    n_particles: int
    seed: int
    pair_mode: str
    w1: list[float]
    mean_error: list[float]
    cov_error: list[float]
    w1_to_nu: float
    cost: float
    cost_std: float
    cost_low: float
    cost_high: float
    seconds: float
    free_w1: list[float] | None = None
    free_mean_error: list[float] | None = None
    free_cov_error: list[float] | None = None
    free_w1_to_nu: float | None = None
    free_w1_to_flow_at_T: float | None = None


@dataclass
class ConvergenceRow:
    """Seed-averaged numbers for one N: terminal W₁ to ρ_T (mean and standard error over
    seeds), W₁ to ν at T, worst W₁ over output times, pooled Girsanov cost and its interval:
    the 95% sampling interval widened by the grid's own uncertainty on J (|J − J_u|, see
    :class:`CheckReport`). ``w1_T_sem`` is NaN with one seed (a standard error needs two)."""

    n_particles: int
    seeds: int
    w1_T: float
    w1_T_sem: float
    w1_to_nu: float
    w1_max: float
    mean_error_T: float
    cov_error_T: float
    cost: float
    cost_low: float
    cost_high: float
    free_w1_T: float | None


@dataclass
class ErrorFit:
    """Fits of the seed-averaged terminal W₁ error e(N).

    ``slope``: least-squares slope of log e against log N. ``floor`` a and ``scale`` b of
    e ≈ a + b N^{-1/2} (non-negative least squares, weights 1/e so relative misfit counts);
    ``floor`` is the N = ∞ extrapolation, the part that does not average out (grid error,
    Euler–Maruyama bias).
    """

    slope: float
    floor: float
    scale: float


@dataclass
class CheckReport:
    """Everything the particle check measured (see :func:`check`).

    ``times`` (n_out,) output times; ``runs`` one :class:`RunStats` per (N, seed); ``table`` one
    :class:`ConvergenceRow` per N; ``fit`` (None with fewer than two N) the error law.
    ``grid_cost`` is the result's J (flux form); ``grid_cost_of_control`` is
    :math:`\\frac{1}{2\\sigma^2}\\sum_k\\omega_k\\sum_i|u_{k,i}|^2 p_{k,i}` with the stored
    control, the quantity the particle estimate targets. Both are O(h²) approximations of the
    same J; their difference is added to the half-width of the cost intervals in ``table``.
    ``snapshots``/``free_snapshots`` hold the controlled and uncontrolled clouds (n_out, N, d)
    of the largest N and first seed; ``flow`` the uncontrolled McKean–Vlasov masses
    (K+1, *shape) — arrays for the figures, not for JSON.
    """

    dim: int
    noise: float
    horizon: float
    grid_cost: float
    grid_cost_of_control: float
    marginal_error: float
    model: dict[str, Any]
    n_particles: list[int]
    seeds: list[int]
    substeps: int
    substeps_rule: str
    pair_mode: str
    times: list[float]
    record: list[int]
    filled_control_cells: int
    runs: list[RunStats]
    table: list[ConvergenceRow]
    fit: ErrorFit | None
    seconds: float
    grid: Grid | None = None
    density: np.ndarray | None = field(default=None, repr=False)
    flow: np.ndarray | None = field(default=None, repr=False)
    snapshots: np.ndarray | None = field(default=None, repr=False)
    free_snapshots: np.ndarray | None = field(default=None, repr=False)

    def to_dict(self) -> dict[str, Any]:
        """The numbers as plain JSON-ready types (no arrays, no grid object)."""
        from dataclasses import asdict

        out = {k: v for k, v in self.__dict__.items()
               if k not in ("grid", "density", "flow", "snapshots", "free_snapshots",
                            "runs", "table", "fit")}
        out["runs"] = [asdict(r) for r in self.runs]
        out["table"] = [asdict(r) for r in self.table]
        out["fit"] = None if self.fit is None else asdict(self.fit)
        return out

    def table_text(self) -> str:
        """A plain-text table of the convergence study and the fit."""
        lines = [
            f"{'N':>7} {'seeds':>5} {'W1(T)':>10} {'±sem':>9} {'W1 to nu':>10} {'max W1':>9} "
            f"{'mean err':>9} {'cov err':>9} {'cost':>9} {'95% interval':>21} {'free W1(T)':>10}"
        ]
        for r in self.table:
            free = "" if r.free_w1_T is None else f"{r.free_w1_T:10.4g}"
            sem = f"{r.w1_T_sem:9.2g}" if math.isfinite(r.w1_T_sem) else f"{'-':>9}"
            lines.append(
                f"{r.n_particles:7d} {r.seeds:5d} {r.w1_T:10.4g} {sem} "
                f"{r.w1_to_nu:10.4g} {r.w1_max:9.4g} {r.mean_error_T:9.3g} {r.cov_error_T:9.3g} "
                f"{r.cost:9.5g} [{r.cost_low:9.5g},{r.cost_high:9.5g}] {free}")
        lines.append(f"grid J = {self.grid_cost:.6g} (with the stored control: "
                     f"{self.grid_cost_of_control:.6g}); substeps {self.substeps} "
                     f"({self.substeps_rule}); pairs {self.pair_mode}")
        if self.fit is not None:
            lines.append(f"slope of W1(T) against N: {self.fit.slope:.3f}; fit W1 ≈ "
                         f"{self.fit.floor:.3g} + {self.fit.scale:.3g} N^-1/2")
        return "\n".join(lines)


def fit_error_law(ns: Sequence[int], errors: Sequence[float]) -> ErrorFit:
    """Slope of log e against log N, and e ≈ a + b N^{-1/2} with a, b ≥ 0 (weights 1/e)."""
    import scipy.optimize

    n = np.asarray(ns, dtype=float)
    e = np.asarray(errors, dtype=float)
    slope = float(np.polyfit(np.log(n), np.log(e), 1)[0])
    design = np.stack([np.ones_like(n), n**-0.5], axis=1) / e[:, None]
    coef, _ = scipy.optimize.nnls(design, np.ones_like(e))
    return ErrorFit(slope=slope, floor=float(coef[0]), scale=float(coef[1]))


# --------------------------------------------------------------------------- the check


def _output_indices(k_steps: int, outputs: int) -> list[int]:
    return sorted({round(v) for v in np.linspace(0, k_steps, outputs)})


def check(
    result: BridgeResult,
    confinement: Confinement,
    interaction: Interaction,
    n_particles: Sequence[int] = (250, 1000, 4000),
    seeds: Sequence[int] = (0, 1, 2, 3),
    substeps: int | None = None,
    pair_mode: str = "auto",
    outputs: int = 11,
    uncontrolled: bool = True,
    progress: Callable[[str], None] | None = None,
) -> CheckReport:
    r"""Simulate N interacting particles driven by ``result``'s control and compare them with it.

    For every N in ``n_particles`` and every seed in ``seeds``: sample N particles from the
    result's ρ_0 (= μ), run Euler–Maruyama with ``substeps`` sub-steps per grid step
    (``None``: :func:`default_substeps`), and measure at ``outputs`` evenly spaced grid times
    the W₁ distance to ρ_t and the errors of mean and covariance; at T the W₁ distance to ν
    (the result's final marginal, equal to ν within ``result.marginal_error``); the Girsanov
    estimate of the cost with its 95% interval. For the first seed of each N (if
    ``uncontrolled``) the same particles with the same noise are run with u = 0 and compared
    with :func:`mckean_vlasov_flow`. The random streams are
    ``numpy.random.SeedSequence([seed, N])``: the same seeds give the same numbers.

    ``confinement``/``interaction``: the model the result was solved with (the caller builds
    them; :func:`mfbridge.check` rebuilds them from the result's config). ``progress``, when
    given, receives one line after each (N, seed) run. Raises :class:`InputError` for bad
    arguments.
    """
    start = time.perf_counter()
    ns = [int(n) for n in n_particles]
    seed_list = [int(s) for s in seeds]
    if not ns or any(n < 2 for n in ns):
        raise InputError(f"n_particles must be a non-empty list of integers >= 2, got {ns}")
    if not seed_list or any(s < 0 for s in seed_list):
        raise InputError(f"seeds must be a non-empty list of non-negative integers, got "
                         f"{seed_list}")
    if substeps is not None and (int(substeps) != substeps or substeps < 1):
        raise InputError(f"substeps must be a positive integer, got {substeps!r}")
    if pair_mode not in PAIR_MODES:
        raise InputError(f"pair_mode must be one of {', '.join(PAIR_MODES)}, got {pair_mode!r}")
    if int(outputs) != outputs or outputs < 2:
        raise InputError(f"outputs must be an integer >= 2, got {outputs!r}")
    if result.grid.dim > 2:
        raise InputError("the particle check handles 1D and 2D results")
    if not (isinstance(confinement, Confinement) and isinstance(interaction, Interaction)):
        raise InputError("check needs the model the result was solved with: pass confinement= "
                         "and interaction= (mfbridge.check(result) rebuilds them from the "
                         f"result's config), got {confinement!r} and {interaction!r}")
    grid = result.grid
    times = np.asarray(result.times, dtype=float)
    masses = result.masses
    noise = float(result.noise)
    control, filled = prepare_control(result.control)
    with threadpool_limits(limits=1):
        if substeps is None:
            m = default_substeps(grid, times, noise, confinement, interaction, masses, control)
            rule = f"ceil(L dt / {SUBSTEP_TARGET})"
        else:
            m, rule = int(substeps), "given"
        record = _output_indices(len(times) - 1, int(outputs))
        flow = (mckean_vlasov_flow(grid, confinement, interaction, noise, masses[0], times)
                if uncontrolled else None)
        ref = [moments_of_masses(grid, masses[k]) for k in record]
        free_ref = ([moments_of_masses(grid, flow[k]) for k in record]
                    if flow is not None else None)
        runs: list[RunStats] = []
        snapshots = free_snapshots = None
        used_modes = set()
        for n in ns:
            mode = pair_mode_for(n, pair_mode)
            used_modes.add(mode)
            force = PairForce(interaction, grid, mode)
            for r, seed in enumerate(seed_list):
                seq = np.random.SeedSequence([seed, n])
                init_seq, noise_seq = seq.spawn(2)
                x0 = sample_particles(grid, masses[0], n, np.random.default_rng(init_seq))
                run = simulate(grid, times, noise, confinement, force, x0,
                               np.random.default_rng(noise_seq), m, record, control)
                stats = _run_stats(grid, run, masses, record, ref, n, seed, mode)
                if uncontrolled and r == 0:
                    assert flow is not None and free_ref is not None
                    free = simulate(grid, times, noise, confinement, force, x0,
                                    np.random.default_rng(noise_seq), m, record, None)
                    _add_free_stats(stats, grid, free, flow, masses, record, free_ref)
                    stats.seconds += free.seconds
                    if n == max(ns):
                        free_snapshots = free.positions
                if r == 0 and n == max(ns):
                    snapshots = run.positions
                runs.append(stats)
                if progress is not None:
                    progress(f"N = {n:6d}, seed {seed}: W1(T) = {stats.w1[-1]:.4g}, "
                             f"{stats.seconds:.1f} s ({len(runs)} of "
                             f"{len(ns) * len(seed_list)} runs, "
                             f"{time.perf_counter() - start:.0f} s so far)")
    j_control = _cost_of_control(result, control)
    spread = abs(float(result.cost) - j_control)
    table = [_row(n, [s for s in runs if s.n_particles == n], spread) for n in ns]
    fit = None
    if len(set(ns)) >= 2:
        fit = fit_error_law([row.n_particles for row in table], [row.w1_T for row in table])
    return CheckReport(
        dim=grid.dim, noise=noise, horizon=float(times[-1]), grid_cost=float(result.cost),
        grid_cost_of_control=j_control,
        marginal_error=float(result.marginal_error),
        model={"confinement": _describe(confinement), "interaction": _describe(interaction)},
        n_particles=ns, seeds=seed_list, substeps=m, substeps_rule=rule,
        pair_mode="+".join(sorted(used_modes)),
        times=[float(times[k]) for k in record], record=record, filled_control_cells=filled,
        runs=runs, table=table, fit=fit, seconds=time.perf_counter() - start,
        grid=grid, density=result.density, flow=flow, snapshots=snapshots,
        free_snapshots=free_snapshots,
    )


def _describe(obj: object) -> dict[str, Any]:
    describe = getattr(obj, "describe", None)
    return describe() if callable(describe) else {"repr": repr(obj)}


def _errors(x: np.ndarray, ref: tuple[np.ndarray, np.ndarray]) -> tuple[float, float]:
    mean, cov = _cloud_moments(x)
    return float(np.linalg.norm(mean - ref[0])), float(np.linalg.norm(cov - ref[1]))


def _run_stats(grid: Grid, run: ParticleRun, masses: np.ndarray, record: list[int],
               ref: list[tuple[np.ndarray, np.ndarray]], n: int, seed: int,
               mode: str) -> RunStats:
    w1 = [w1_to_masses(grid, run.positions[i], masses[k]) for i, k in enumerate(record)]
    errs = [_errors(run.positions[i], ref[i]) for i in range(len(record))]
    cost = float(run.path_cost.mean())
    std = float(run.path_cost.std(ddof=1))
    half = Z95 * std / math.sqrt(n)
    return RunStats(
        n_particles=n, seed=seed, pair_mode=mode, w1=w1,
        mean_error=[e[0] for e in errs], cov_error=[e[1] for e in errs],
        w1_to_nu=w1[-1] if record[-1] == masses.shape[0] - 1 else float("nan"),
        cost=cost, cost_std=std, cost_low=cost - half, cost_high=cost + half,
        seconds=run.seconds,
    )


def _add_free_stats(stats: RunStats, grid: Grid, free: ParticleRun, flow: np.ndarray,
                    masses: np.ndarray, record: list[int],
                    free_ref: list[tuple[np.ndarray, np.ndarray]]) -> None:
    stats.free_w1 = [w1_to_masses(grid, free.positions[i], flow[k])
                     for i, k in enumerate(record)]
    errs = [_errors(free.positions[i], free_ref[i]) for i in range(len(record))]
    stats.free_mean_error = [e[0] for e in errs]
    stats.free_cov_error = [e[1] for e in errs]
    stats.free_w1_to_flow_at_T = stats.free_w1[-1]
    stats.free_w1_to_nu = w1_to_masses(grid, free.positions[-1], masses[-1])


def _cost_of_control(result: BridgeResult, control: np.ndarray) -> float:
    """(1/2σ²) Σ_k ω_k Σ_i |u_{k,i}|² p_{k,i} (trapezoid weights ω in time)."""
    times = np.asarray(result.times, dtype=float)
    omega = trapezoid_weights(times)
    sq = np.sum(control**2, axis=-1) * result.masses
    per_time = sq.reshape(len(times), -1).sum(axis=1)
    return float(omega @ per_time / (2.0 * result.noise**2))


def _row(n: int, runs: list[RunStats], spread: float) -> ConvergenceRow:
    w1_t = np.array([r.w1[-1] for r in runs])
    sem = float(w1_t.std(ddof=1) / math.sqrt(len(runs))) if len(runs) > 1 else float("nan")
    # pooled Girsanov estimate over the seeds: independent runs of equal size
    cost = float(np.mean([r.cost for r in runs]))
    var = float(np.sum([r.cost_std**2 / n for r in runs])) / len(runs) ** 2
    half = Z95 * math.sqrt(var) + spread
    free = [r.free_w1[-1] for r in runs if r.free_w1 is not None]
    return ConvergenceRow(
        n_particles=n, seeds=len(runs), w1_T=float(w1_t.mean()), w1_T_sem=sem,
        w1_to_nu=float(np.mean([r.w1_to_nu for r in runs])),
        w1_max=float(np.mean([max(r.w1) for r in runs])),
        mean_error_T=float(np.mean([r.mean_error[-1] for r in runs])),
        cov_error_T=float(np.mean([r.cov_error[-1] for r in runs])),
        cost=cost, cost_low=cost - half, cost_high=cost + half,
        free_w1_T=float(np.mean(free)) if free else None,
    )
