r"""Direct solver: minimise the discretised action with a density-dependent mobility.

The action (see :mod:`mfbridge.model.mobility`) with noise σ, mobility χ, diffusion D,
:math:`\Phi = U + W*\rho`:

.. math::

    J(\rho, j) = \frac{1}{2\sigma^2}\int_0^T\!\!\int
        \frac{|j - b[\rho]|^2}{\chi(\rho)}\,dx\,dt,\qquad
    b[\rho] = -\tfrac{\sigma^2}{2}D(\rho)\nabla\rho - \chi(\rho)\nabla\Phi,\qquad
    \partial_t\rho + \nabla\cdot j = 0 .

For χ = ρ, D = 1 this is the main solver's J (:mod:`mfbridge.solvers.fixed_point`), which makes this
solver an independent cross-check of it.

This module is the driver (options, warm start, result). The default method, ``"newton"``,
minimises the action in density–flux variables with continuity as an exact linear constraint
(:mod:`mfbridge.solvers.flux_action`) by a primal–dual barrier Newton method with sparse KKT
solves (:mod:`mfbridge.solvers.flux_newton`), in 1D and 2D, closed or with open walls
(``reservoirs``). The earlier minimisers of the density-only form
(:mod:`mfbridge.solvers.direct_action`): ``"truncated"`` (truncated Newton with a log barrier,
1D) and ``"lbfgs"`` (:mod:`mfbridge.solvers.direct_optimisers`), closed boxes only.

**Reservoirs** (:class:`~mfbridge.model.reservoirs.Reservoirs`): open walls hold the density
fixed and let particles through. The steady profile between them solves
:math:`\mathrm{div}_h B(\bar\rho) = 0` (:func:`steady_state`); it is reported with the steady
current through each open wall (``result.model["reservoirs"]``, ``result.steady_density``), and
either endpoint may be it (``Reservoirs.initial``/``final = "steady"``). Masses are not
conserved: ``density`` is the occupation divided by ``total_mass`` at every time (so
``total_mass × density`` is still the occupation), and ``marginal_error`` is the largest
mismatch of the mass balance (change of mass against the flux through the open walls) per
step, relative to the mass.

Warm start: McCann's displacement interpolation
(1D quantile interpolation; 2D from the exact plan of ``ot.emd``), blended with 1e-3 of the linear
interpolation (itself mixed with 1e-12 of the uniform profile, as endpoints may vanish on far
cells) to keep every cell positive; the linear interpolation is used when the
displacement interpolation leaves the domain.

**Mass scale**: :class:`~mfbridge.model.problem.BridgeProblem` stores normalised masses; the
mobility and the mean field see densities of total mass M = ``DirectOptions.total_mass``
(for exclusion: the occupation per site, so M must keep the endpoints below 1). The returned
:class:`~mfbridge.result.BridgeResult` keeps the package's convention: ``density`` is the
normalised density (the occupation is ``total_mass × density``), while ``cost``, its parts and
``free_energy`` are those of the mass-M profile (for walkers without interaction, M times the
per-particle values). ``log_forward``, ``log_backward`` and ``correction`` are NaN: no
Schrödinger potentials exist here. ``control`` is the velocity :math:`(j - b)/\rho_f`
interpolated to cell centres and time nodes (for walkers, σ²∇ψ of the main solver).
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

from mfbridge.errors import ConvergenceWarning, InputError, is_real_number, unknown_name
from mfbridge.model.grid import Grid
from mfbridge.model.mobility import Mobility, Walkers
from mfbridge.model.problem import BridgeProblem
from mfbridge.model.reservoirs import Reservoirs
from mfbridge.numerics import observables
from mfbridge.numerics.reference import faces
from mfbridge.result import BridgeResult
from mfbridge.solvers.direct_action import DirectAction, action
from mfbridge.solvers.direct_optimisers import (
    Objective,
    density_variables,
    inside,
    interior_newton,
    lbfgs,
    softmax_variables,
)
from mfbridge.solvers.flux_action import FaceLayout, FluxAction
from mfbridge.solvers.flux_newton import minimise, steady_profile

__all__ = ["DirectAction", "DirectOptions", "SteadyState", "action",
           "displacement_interpolation", "solve_direct", "steady_state"]

WARM_STARTS = ("displacement", "linear")
METHODS = ("newton", "truncated", "lbfgs")
# the Newton start is mixed with this fraction of the uniform profile: the barrier's first stage
# holds the far tails near 1e-6 anyway, and tails at 1e-15 make the first Newton systems
# hopelessly ill-conditioned (scaled condition number 1e76 against 7e11 measured at 48 cells)
NEWTON_FLOOR = 1e-6
OT_MAX_CELLS = 4096
DISPLACEMENT_CUT = 1e-9
# share of the linear interpolation in every displacement start (:func:`displacement_start`)
DISPLACEMENT_BLEND = 1e-3
FLOOR_MIX = 1e-12


@dataclass(frozen=True)
class DirectOptions:
    """Options of the direct solver.

    * ``mobility``: a :class:`~mfbridge.model.mobility.Mobility` (default independent walkers);
    * ``total_mass``: M, the mass of the density profiles the mobility sees (see the module
      docstring; e.g. the mean occupation times the box volume for exclusion);
    * ``method``: ``"newton"`` (primal–dual barrier Newton on densities and fluxes, 1D and 2D,
      closed or open), ``"truncated"`` (truncated Newton on densities, 1D, closed) or
      ``"lbfgs"`` (closed; the 2D fallback of ``"truncated"``); ``max_iter``: Newton or L-BFGS
      iterations; ``max_cg``: CG iterations per Newton step; ``memory``: L-BFGS history depth;
    * ``reservoirs``: open walls held at fixed densities
      (:class:`~mfbridge.model.reservoirs.Reservoirs`; ``"newton"`` only), or ``None``;
    * ``tol``: Newton stops when the predicted decrease of a Newton step is below ``tol`` × J
      (the barrier's bias is then also below ``tol`` × J; the far tails, where J hardly depends
      on ρ, limit what is reached: J agreed with the truncated method to 6e-8 at 192 cells × 40
      steps); L-BFGS when the cost decreased by less than ``tol`` × J over the last ``window``
      iterations; ``gtol``: or (earlier methods) when the largest gradient entry is below it;
    * ``warm_start``: ``"displacement"`` (McCann interpolation) or ``"linear"``;
    * ``time_budget``: wall-clock seconds after which the minimisation stops with status
      ``"not_converged"`` and its last iterate (``None``: no limit).
    """

    mobility: Mobility = field(default_factory=Walkers)
    total_mass: float = 1.0
    max_iter: int = 20000
    tol: float = 1e-9
    gtol: float = 1e-10
    memory: int = 20
    window: int = 20
    warm_start: str = "displacement"
    method: str = "newton"
    max_cg: int = 500
    reservoirs: Reservoirs | None = None
    time_budget: float | None = 600.0

    def __post_init__(self) -> None:
        if not isinstance(self.mobility, Mobility):
            raise InputError(f"direct solver option mobility must be a mfbridge.model.mobility."
                             f"Mobility, got {self.mobility!r}")
        if self.warm_start not in WARM_STARTS:
            raise unknown_name("warm_start", self.warm_start, WARM_STARTS)
        if self.method not in METHODS:
            raise unknown_name("method", self.method, METHODS)
        if self.reservoirs is not None:
            if not isinstance(self.reservoirs, Reservoirs):
                raise InputError(f"direct solver option reservoirs must be a mfbridge.model."
                                 f"reservoirs.Reservoirs or None, got {self.reservoirs!r}")
            if self.method != "newton":
                raise InputError(f"reservoirs need method='newton' (the {self.method!r} "
                                 f"minimiser handles closed boxes only)")
        checks = [
            ("total_mass", is_real_number(self.total_mass)
             and self.total_mass > 0),
            ("max_iter", _is_int(self.max_iter) and self.max_iter >= 1),
            ("max_cg", _is_int(self.max_cg) and self.max_cg >= 1),
            ("memory", _is_int(self.memory) and self.memory >= 1),
            ("window", _is_int(self.window) and self.window >= 1),
            ("tol", is_real_number(self.tol) and self.tol >= 0),
            ("gtol", is_real_number(self.gtol) and self.gtol >= 0),
            ("time_budget", self.time_budget is None
             or (is_real_number(self.time_budget) and self.time_budget > 0)),
        ]
        for name, ok in checks:
            if not ok:
                raise InputError(f"direct solver option {name} has an invalid value "
                                 f"{getattr(self, name)!r}")
        object.__setattr__(self, "total_mass", float(self.total_mass))


def _is_int(v: Any) -> bool:
    return is_real_number(v) and float(v) == int(v)


# --------------------------------------------------------------------------- warm start


def _cell_cdf_quantiles(p: np.ndarray, edges: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Quantile function of the piecewise-uniform law with cell masses p at levels u."""
    cdf = np.concatenate([[0.0], np.cumsum(p)])
    cdf /= cdf[-1]
    keep = np.concatenate([[True], np.diff(cdf) > 0])
    return np.interp(u, cdf[keep], edges[keep])


def displacement_interpolation(problem: BridgeProblem) -> np.ndarray:
    """McCann's displacement interpolation between the problem's endpoints as cell masses
    (K+1, *shape), each slice summing to 1.

    1D: quantile interpolation :math:`Q_t = (1-t)Q_\\mu + tQ_\\nu` of the piecewise-uniform
    laws, read back as masses by differencing the CDF at the cell edges. 2D: the exact plan π of
    ``ot.emd`` between the cell masses; each pair moves along the straight line and is
    deposited by bilinear (cloud-in-cell) weights.
    """
    grid = problem.grid
    mu, nu = problem.initial, problem.final
    s = problem.times / problem.horizon
    out = np.empty((len(s), *grid.shape))
    if grid.dim == 1:
        edges = grid.edges[0]
        u = np.linspace(0.0, 1.0, 20 * grid.size + 1)
        q0 = _cell_cdf_quantiles(mu, edges, u)
        q1 = _cell_cdf_quantiles(nu, edges, u)
        for k, t in enumerate(s):
            qt = (1 - t) * q0 + t * q1
            cdf = np.interp(edges, qt, u)
            cdf[0], cdf[-1] = 0.0, 1.0
            out[k] = np.clip(np.diff(cdf), 0.0, None)
    else:
        import ot

        if grid.size > OT_MAX_CELLS:
            raise InputError(f"the displacement warm start needs an exact plan of {grid.size}² "
                             f"entries; use warm_start='linear' above {OT_MAX_CELLS} cells")
        pts = grid.points.reshape(-1, grid.dim)
        a, b = mu.ravel(), nu.ravel()
        # cells below 1e-9 of the peak stay out of the plan (their mass reaches the start
        # through the blend with the linear interpolation): in bench_direct's 64 x 64 case the
        # exact plan of all 4096 cells took 70 s (loaded machine), of the 2764 and 2080 cells
        # above the cut 2.2 s
        ia = np.flatnonzero(a > DISPLACEMENT_CUT * a.max())
        ib = np.flatnonzero(b > DISPLACEMENT_CUT * b.max())
        cost = ot.dist(pts[ia], pts[ib])
        plan = ot.emd(a[ia] / a[ia].sum(), b[ib] / b[ib].sum(), cost, numItermax=10**7)
        ri, ci = np.nonzero(plan > 0)
        weights = plan[ri, ci]
        x0, x1 = pts[ia[ri]], pts[ib[ci]]
        lower = np.asarray(grid.lower)
        spacing = np.asarray(grid.spacing)
        for k, t in enumerate(s):
            pos = ((1 - t) * x0 + t * x1 - lower) / spacing - 0.5
            base = np.floor(pos).astype(int)
            frac = pos - base
            slab = np.zeros(grid.shape)
            for corner in np.ndindex(*(2,) * grid.dim):
                c = np.asarray(corner)
                idx = np.clip(base + c, 0, np.asarray(grid.shape) - 1)
                w = weights * np.prod(np.where(c == 1, frac, 1 - frac), axis=1)
                np.add.at(slab, tuple(idx.T), w)
            out[k] = slab
    out /= out.reshape(len(s), -1).sum(axis=1).reshape(-1, *([1] * grid.dim))
    out[0], out[-1] = mu, nu
    return out


def displacement_start(problem: BridgeProblem, linear: np.ndarray) -> np.ndarray:
    """A start of masses (K+1, *grid.shape): ``(1 - b) D + b L`` with D
    :func:`displacement_interpolation`, ``linear`` = L a linear interpolation of the endpoints
    and b = :data:`DISPLACEMENT_BLEND` (which keeps the guess off D's piecewise-constant quantile
    profile and gives every cell some mass). Raises :class:`InputError` as D does."""
    return (1 - DISPLACEMENT_BLEND) * displacement_interpolation(problem) + (
        DISPLACEMENT_BLEND * linear)


# --------------------------------------------------------------------------- solver


def solve_direct(problem: BridgeProblem, options: DirectOptions | None = None,
                 callback: Callable[[int, float, float], None] | None = None) -> BridgeResult:
    """Minimise the discretised action of ``problem`` with ``options.mobility``.

    Returns a :class:`~mfbridge.result.BridgeResult` (method ``"direct"``, route the mobility's
    name); ``status`` is ``"converged"`` or ``"not_converged"`` (iteration limit, time budget,
    or a line search that cannot move; then a :class:`~mfbridge.errors.ConvergenceWarning` is
    issued). ``callback(iteration, cost, largest gradient entry)`` is called after every
    iteration (Newton or L-BFGS). Raises :class:`InputError` when an endpoint leaves the
    mobility's domain at the chosen ``total_mass``, or for reservoirs that do not fit the grid
    or the mobility.
    """
    options = options or DirectOptions()
    if not isinstance(options, DirectOptions):
        raise InputError(f"solve_direct needs DirectOptions, got {type(options).__name__}")
    import torch

    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        with threadpool_limits(limits=1):
            return _solve(problem, options, callback)
    finally:
        torch.set_num_threads(threads)


def _check_endpoints(problem: BridgeProblem, options: DirectOptions) -> None:
    mob, mass, vol = options.mobility, options.total_mass, problem.grid.cell_volume
    for name, p in (("initial", problem.initial), ("final", problem.final)):
        rho = mass * p / vol
        hint = ""
        if rho.max() >= mob.upper:
            hint = (f"; at total_mass = {mass:g} the peak density is {rho.max():.4g}: lower "
                    f"DirectOptions.total_mass below {mass * mob.upper / rho.max():.4g}")
        mob.check_density(rho, f"the {name} density (total_mass × normalised density)", hint)


def _solve(problem: BridgeProblem, options: DirectOptions,
           callback: Callable[[int, float, float], None] | None) -> BridgeResult:
    import torch

    if options.method == "newton":
        return _solve_flux(problem, options, callback)
    start = time.perf_counter()
    _check_endpoints(problem, options)
    act = DirectAction(problem, options.mobility, options.total_mass)
    grid, mob, mass = problem.grid, options.mobility, options.total_mass
    vol = grid.cell_volume
    k_steps = problem.steps
    # endpoints may vanish on far cells; the interior must not (χ > 0, barrier)
    linear = (1 - FLOOR_MIX) * problem.linear_flow() + FLOOR_MIX / grid.size
    if options.warm_start == "displacement" and k_steps > 1:
        guess = displacement_start(problem, linear)
        if not inside(mob, mass * guess[1:-1] / vol):
            guess = linear
    else:
        guess = linear
    interior = guess[1:-1]
    if k_steps > 1 and not inside(mob, mass * interior / vol):
        raise InputError("the linear interpolation of the endpoints leaves the mobility's domain")
    # Newton's preconditioner exists in 1D only (preconditioner_1d); 2D uses L-BFGS
    use_lbfgs = options.method == "lbfgs" or grid.dim == 2
    if use_lbfgs:
        unpack, x0 = softmax_variables(act, guess)
    else:
        unpack, x0 = density_variables(act, guess)
    objective = Objective(act, unpack, mob)
    setup = time.perf_counter() - start
    budget = math.inf if options.time_budget is None else float(options.time_budget)

    def stop() -> bool:
        return time.perf_counter() - start > budget

    if use_lbfgs:
        opt = lbfgs(objective.value_grad, x0, options, callback, stop=stop)
    else:
        opt = interior_newton(objective, x0, options, callback, stop=stop)
    solve_seconds = time.perf_counter() - start - setup
    with torch.no_grad():
        rho_t = unpack(torch.from_numpy(opt.x))
        terms = act.face_terms(rho_t)
        cost, kinetic, drift = (float(act.face_action(terms, w))
                                for w in ("control", "bridge", "drift"))
        velocity = [((j - b) / rf).numpy() for j, b, _, rf in terms]
    rho = rho_t.numpy()
    masses = rho.reshape(len(rho), -1).sum(axis=1) * vol / mass
    stopping = stopping_record(opt.history, options, use_lbfgs, opt.grad_norm)
    return _bridge_result(
        problem, options, act, rho, _centre_control(velocity, grid, k_steps),
        (cost, kinetic, drift), status=opt.status, message=opt.message,
        iterations=opt.iterations, history=opt.history, stopping=stopping,
        marginal_error=float(np.abs(masses - 1.0).max()),
        timings={"setup": setup, "solve": solve_seconds, "total": time.perf_counter() - start})


def _bridge_result(problem: BridgeProblem, options: DirectOptions, act: DirectAction,
                   rho: np.ndarray, control: np.ndarray, parts: tuple[float, float, float], *,
                   status: str, message: str, iterations: int,
                   history: list[dict[str, float]], stopping: dict[str, Any],
                   marginal_error: float, timings: dict[str, float],
                   model: dict[str, Any] | None = None,
                   steady_density: np.ndarray | None = None) -> BridgeResult:
    """The :class:`BridgeResult` of a direct solve: densities ``rho`` (occupation, (K+1,
    *shape)), cell-centred ``control`` (K+1, *shape, d), J and its kinetic and drift parts;
    free energies and moments from ``rho``; a :class:`ConvergenceWarning` unless converged.
    ``model`` adds entries to the description of the model (e.g. the reservoirs)."""
    grid, mob, mass = problem.grid, options.mobility, options.total_mass
    vol = grid.cell_volume
    cost, kinetic, drift = parts
    p = rho * vol / mass
    fe = act.free_energy(rho)
    mean, cov = observables.moments(p, grid)
    if status == "stalled":  # the shared statuses (result.STATUSES): a stall stops short of tol
        status, message = "not_converged", f"stalled: {message}"
    if status == "converged":
        message = f"converged: {message}; J = {cost:.8g}"
    else:
        warnings.warn(ConvergenceWarning(f"direct solver {status}: {message}"), stacklevel=4)
    nan = np.full(rho.shape, np.nan)
    return BridgeResult(
        grid=grid,
        times=problem.times,
        density=p / vol,
        control=control,
        log_forward=nan,
        log_backward=nan.copy(),
        correction=nan.copy(),
        mean=mean,
        cov=cov,
        free_energy=fe,
        entropy=observables.entropy(rho * vol, grid),
        cost=cost,
        cost_kinetic=kinetic,
        cost_drift=drift,
        cost_free_energy=float(fe[-1] - fe[0]) / problem.noise**2,
        noise=problem.noise,
        method="direct",
        route=mob.name,
        status=status,
        message=message,
        iterations=iterations,
        residual=stopping["value"],
        marginal_error=marginal_error,
        history=history,
        timings=timings,
        model={"confinement": _describe(problem.confinement),
               "interaction": _describe(problem.interaction),
               "mobility": mob.describe(), "total_mass": mass, **(model or {})},
        stopping=stopping,
        steady_density=steady_density,
    )


def stopping_record(history: list[dict[str, float]], options: DirectOptions, lbfgs: bool,
                    grad_norm: float) -> dict[str, Any]:
    """What the direct solver's stopping rule watched, named, with its last value and its
    tolerance (the result's ``residual`` is that value): for truncated Newton the predicted
    decrease of J by a Newton step relative to |J|, for L-BFGS the decrease of J over the last
    ``window`` iterations relative to |J|; both against ``tol``. When the largest gradient
    entry met ``gtol`` first, that is the quantity."""
    if lbfgs:
        name = f"relative decrease of J over the last {options.window} L-BFGS iterations"
    else:
        name = "predicted relative decrease of J by a Newton step (Newton decrement² / 2|J|)"
    last = history[-1].get("criterion", math.nan) if history else math.nan
    if grad_norm <= options.gtol or not math.isfinite(last):
        return {"quantity": "largest entry of the gradient of J", "value": grad_norm,
                "tolerance": options.gtol, "largest_gradient": grad_norm}
    return {"quantity": name, "value": float(last), "tolerance": options.tol,
            "largest_gradient": grad_norm}


@dataclass
class SteadyState:
    """The steady profile between reservoirs: ``density`` (occupation, grid.shape), the
    steady ``current`` through each open wall (mass per time *into* the box, keyed
    ``"axis0_lower"`` ...; in 1D with two open ends the current is ``current["axis0_lower"]``
    = −``current["axis0_upper"]``), the ``fluxes`` B on every face (:class:`~mfbridge.solvers.
    flux_action.FaceLayout` order) and the Newton ``iterations``."""

    density: np.ndarray
    current: dict[str, float]
    fluxes: np.ndarray
    iterations: int


def _wall_key(axis: int, side: str) -> str:
    return f"axis{axis}_{side}"


def steady_state(problem: BridgeProblem, options: DirectOptions) -> SteadyState:
    r"""The steady profile of the open system ``options.reservoirs`` (with the problem's grid,
    noise, U and W and ``options.mobility``): :math:`\mathrm{div}_h B(\bar\rho) = 0` in every
    cell, by Newton from the linear profile between the walls of the first open axis (or the
    mean wall density). Raises :class:`InputError` for bad reservoirs and
    :class:`~mfbridge.errors.ConvergenceWarning`-free ``ArithmeticError`` if Newton fails."""
    reservoirs = options.reservoirs
    if reservoirs is None:
        raise InputError("steady_state needs DirectOptions.reservoirs (open walls)")
    mob = options.mobility
    reservoirs.check(problem.grid.dim, mob.lower, mob.upper, mob.name)
    act = DirectAction(problem, mob, options.total_mass)
    layout = FaceLayout.build(problem.grid, reservoirs)
    zero = np.zeros(problem.grid.size)
    fa = FluxAction(act, layout, zero, zero)
    density, fluxes, its = steady_profile(fa, _steady_guess(problem.grid, reservoirs))
    inflow = fa.wall_flux(np.tile(fluxes, problem.steps))
    current = {_wall_key(a, side): float(v[0]) for (a, side), v in inflow.items()}
    return SteadyState(density.reshape(problem.grid.shape), current, fluxes, its)


def _steady_guess(grid: Grid, reservoirs: Reservoirs) -> np.ndarray:
    walls = reservoirs.walls
    axes = sorted({a for a, _ in walls})
    a = axes[0]
    lo, hi = walls.get((a, "lower")), walls.get((a, "upper"))
    if lo is None or hi is None:
        return np.full(grid.size, float(np.mean(list(walls.values()))))
    s = (grid.points[..., a] - grid.lower[a]) / grid.extent[a]
    return (lo + (hi - lo) * s).ravel()


def _solve_flux(problem: BridgeProblem, options: DirectOptions,
                callback: Callable[[int, float, float], None] | None) -> BridgeResult:
    """The ``"newton"`` method: :func:`~mfbridge.solvers.flux_newton.minimise` on the
    density–flux action, closed or open."""
    import torch

    start = time.perf_counter()
    grid, mob, mass = problem.grid, options.mobility, options.total_mass
    vol, k_steps = grid.cell_volume, problem.steps
    reservoirs = options.reservoirs
    steady = None
    if reservoirs is not None:
        reservoirs.check(grid.dim, mob.lower, mob.upper, mob.name)
    final_mass = mass if reservoirs is None or reservoirs.final_mass is None else \
        float(reservoirs.final_mass)
    ends = {}
    own_final = reservoirs is not None and reservoirs.final_mass is not None
    for name, p, m in (("initial", problem.initial, mass), ("final", problem.final, final_mass)):
        if reservoirs is not None and getattr(reservoirs, name) == "steady":
            continue
        rho = m * p / vol
        option = ("Reservoirs.final_mass" if name == "final" and own_final
                  else "DirectOptions.total_mass")
        label = "final_mass" if option.startswith("Res") else "total_mass"
        hint = ""
        if rho.max() >= mob.upper:
            hint = (f"; at {label} = {m:g} the peak density is {rho.max():.4g}: lower "
                    f"{option} below {m * mob.upper / rho.max():.4g}")
        mob.check_density(rho, f"the {name} density ({label} × normalised density)", hint)
        ends[name] = rho.ravel()
    act = DirectAction(problem, mob, mass)
    layout = FaceLayout.build(grid, reservoirs)
    if reservoirs is not None:
        steady = steady_state(problem, options)
        for name in ("initial", "final"):
            ends.setdefault(name, steady.density.ravel())
    fa = FluxAction(act, layout, ends["initial"], ends["final"])
    if reservoirs is None:
        guess = mass * _newton_start(problem, options) / vol
    else:
        s = (problem.times / problem.horizon)[:, None]
        guess = (1 - s) * ends["initial"] + s * ends["final"]
        guess = (1 - NEWTON_FLOOR) * guess + NEWTON_FLOOR * guess.mean()
    guess = guess.reshape(k_steps + 1, -1)
    if k_steps > 1 and not inside(mob, guess[1:-1]):
        raise InputError("the interpolation of the endpoints leaves the mobility's domain")
    setup = time.perf_counter() - start
    if k_steps == 1:
        flux = fa.optimal_fluxes(np.zeros(0))
        rho_int = np.zeros(0)
        status, message, iterations, grad_norm, history = "converged", "one step: the " \
            "optimal fluxes", 0, 0.0, []
    else:
        budget = math.inf if options.time_budget is None else float(options.time_budget)
        opt = minimise(fa, guess[1:-1].ravel(), tol=options.tol, max_iter=options.max_iter,
                       max_cg=options.max_cg, callback=callback,
                       stop=lambda: time.perf_counter() - start > budget)
        rho_int, flux = opt.rho, opt.flux
        status, message, iterations, grad_norm, history = (
            opt.status, opt.message, opt.iterations, opt.grad_norm, opt.history)
    last = history[-1].get("criterion", 0.0) if history else 0.0
    stopping = {"quantity": "predicted relative decrease of J by a Newton step (Newton "
                            "decrement² / 2|J|) at the last barrier weight",
                "value": float(last), "tolerance": options.tol, "largest_gradient": grad_norm}
    solve_seconds = time.perf_counter() - start - setup
    parts = fa.parts(torch.from_numpy(rho_int), torch.from_numpy(flux))
    velocity = fa.velocity(rho_int, flux)
    rho = fa.full(torch.from_numpy(rho_int)).numpy().reshape(k_steps + 1, *grid.shape)
    masses = rho.reshape(k_steps + 1, -1).sum(axis=1) * vol
    inflow = sum(fa.wall_flux(flux).values(), np.zeros(k_steps))
    balance = np.abs(np.diff(masses) - problem.dt * inflow) / masses.max()
    model = None
    if reservoirs is not None and steady is not None:
        model = {"reservoirs": {**reservoirs.describe(), "steady_current": steady.current,
                                "steady_mass": float(steady.density.sum() * vol),
                                "mass": [float(masses[0]), float(masses[-1])]}}
    return _bridge_result(
        problem, options, act, rho, _centre_flux_control(velocity, layout, grid, k_steps),
        parts, status=status, message=message, iterations=iterations, history=history,
        stopping=stopping, marginal_error=float(balance.max(initial=0.0)),
        timings={"setup": setup, "solve": solve_seconds, "total": time.perf_counter() - start},
        model=model, steady_density=None if steady is None else steady.density / mass)


def _newton_start(problem: BridgeProblem, options: DirectOptions) -> np.ndarray:
    """Cell masses (K+1, *shape) of the closed-box start: the displacement interpolation (or
    the linear one) blended as for the other minimisers, then mixed with NEWTON_FLOOR of the
    uniform profile (mass kept)."""
    grid = problem.grid
    linear = problem.linear_flow()
    guess = linear
    if options.warm_start == "displacement" and problem.steps > 1:
        guess = displacement_start(problem, linear)
        mass, vol = options.total_mass, grid.cell_volume
        if not inside(options.mobility, mass * ((1 - NEWTON_FLOOR) * guess[1:-1]
                                                 + NEWTON_FLOOR / grid.size) / vol):
            guess = linear
    return (1 - NEWTON_FLOOR) * guess + NEWTON_FLOOR / grid.size


def _centre_flux_control(velocity: np.ndarray, layout: FaceLayout, grid: Grid,
                         k_steps: int) -> np.ndarray:
    """Face velocities (K, faces) → cell centres (mean of the two faces along each axis; 0 on a
    closed wall, the wall face's value on an open one) → time nodes; (K+1, *shape, d)."""
    comps = []
    for a in range(grid.dim):
        low = np.zeros((k_steps, grid.size))
        high = np.zeros((k_steps, grid.size))
        on = layout.axis == a
        into, out_of = on & (layout.hi >= 0), on & (layout.lo >= 0)
        low[:, layout.hi[into]] = velocity[:, into]
        high[:, layout.lo[out_of]] = velocity[:, out_of]
        cell = (0.5 * (low + high)).reshape(k_steps, *grid.shape)
        nodes = np.empty((k_steps + 1, *grid.shape))
        nodes[0], nodes[-1] = cell[0], cell[-1]
        nodes[1:-1] = 0.5 * (cell[1:] + cell[:-1])
        comps.append(nodes)
    return np.stack(comps, axis=-1)


def _centre_control(velocity: list[np.ndarray], grid: Grid, k_steps: int) -> np.ndarray:
    """Face velocities per step → cell centres (mean of the two faces, walls 0) → time nodes
    (mean of the adjacent steps); shape (K+1, *shape, d)."""
    comps = []
    for a, v in enumerate(velocity):
        pad = [(0, 0)] * v.ndim
        pad[1 + a] = (1, 1)
        full = np.pad(v, pad)
        lo, hi = faces(full.ndim, 1 + a, full.shape[1 + a])
        cell = 0.5 * (full[lo] + full[hi])
        nodes = np.empty((k_steps + 1, *grid.shape))
        nodes[0], nodes[-1] = cell[0], cell[-1]
        nodes[1:-1] = 0.5 * (cell[1:] + cell[:-1])
        comps.append(nodes)
    return np.stack(comps, axis=-1)


def _describe(obj: object) -> dict[str, object]:
    describe = getattr(obj, "describe", None)
    return describe() if callable(describe) else {"repr": repr(obj)}
