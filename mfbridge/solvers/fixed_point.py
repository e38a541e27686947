r"""The outer fixed-point loop: the minimiser of the mean-field rate function J.

Freeze the marginal flow :math:`\bar\rho` in the interaction and a potential :math:`\bar V`; the
reference becomes a Markov chain with drift :math:`-\nabla(U + W*\bar\rho_t)` weighted by
:math:`e^{-\int \bar V_t(X_t)dt}`, and its Schrödinger bridge is an entropic problem
(:mod:`mfbridge.numerics.entropic`). Update :math:`(\bar\rho, \bar V)` from the solution until
self-consistent. The first-order condition of
:math:`J(P) = \mathrm{KL}(P \,|\, \Gamma(P))` (Γ(P): the reference driven by P's own marginals)
gives the potential

.. math::

    V_t(y) = \int \nabla W(x - y)\cdot\nabla\psi_t(x)\,\rho_t(dx),
    \qquad u_t = \sigma^2\nabla\psi_t .

On the grid we use the exact derivative of the space-discrete rate function: for the chain with
rates :math:`q_{ij}(\rho)` and controlled rates :math:`q_{ij} h_j/h_i`, the relative-entropy rate
is :math:`\sum_i \rho_i\sum_j q_{ij}\,\phi(h_j/h_i)` with :math:`\phi(r) = r\log r - r + 1`, and
its derivative in the rates' argument is

.. math::

    V(y) = \sum_{i \to j} \rho_i \Bigl(1 - \frac{h_j}{h_i}\Bigr)
           \frac{\partial q_{ij}}{\partial \rho_y}
         = \sum_x W(x - y)\, c(x),

where :math:`c` collects, edge by edge, :math:`\rho_i(1 - h_j/h_i)\,\partial q_{ij}/\partial\Phi_j`
(Scharfetter–Gummel rates depend on :math:`\Phi = U + W\star\rho` only through differences).
Its continuum limit is the formula above. Method ``frozen`` keeps :math:`V = 0`: the
self-consistent bridge, which is *not* the minimiser of J when W ≠ 0.

Time: the drift of step k is frozen at the step midpoint, steps are exact exponentials, and the
weight :math:`e^{-\int V}` uses the trapezoid rule, so the scheme is second order in Δt.
"""

from __future__ import annotations

import dataclasses
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from threadpoolctl import threadpool_limits

from mfbridge.errors import ConvergenceWarning, InputError, PrecisionWarning
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics import entropic, observables
from mfbridge.numerics.clock import Clock
from mfbridge.numerics.propagator import UNIFORMISATION_TAIL, StepOperator
from mfbridge.numerics.reference import (
    EdgeRates,
    PairField,
    bernoulli_derivative,
    edge_rates,
    faces,
)
from mfbridge.result import BridgeResult
from mfbridge.solvers import cross_check, multistart, preflight, sanity, small_noise
from mfbridge.solvers.cost import bridge_cost
from mfbridge.solvers.options import COUPLING_MAX_CELLS, SolverOptions
from mfbridge.solvers.outer_loop import Iteration, Outcome, Run, Start, iterate

# largest |omega V| accepted in the log-weights: a double near 1e8 has an ulp of 1.5e-8, so
# log-domain sums of e^{-omega V} keep ~8 digits; beyond, an iterate has blown up (common
# practice, no source; measured: a diverging iterate at sigma = 0.04 on 24 cells had |V| ~ 1e33)
LOG_WEIGHT_MAX = 1e8


@dataclass
class _Solved:
    """Everything one frozen solve yields."""

    sol: entropic.EntropicSolution
    p: np.ndarray  # masses (K+1, *shape)
    log_f: np.ndarray  # forward Schrödinger potential at each node
    log_h: np.ndarray  # backward Schrödinger potential psi at each node
    phi: np.ndarray  # U + W*p at each node


class _Bridge:
    """Discretised problem: grid, potentials on the grid, time weights."""

    def __init__(self, problem: BridgeProblem, scale: float = 1.0,
                 log_domain: bool = False, kernel: str = "chain") -> None:
        self.problem = problem
        self.scale = scale  # the interaction used is scale * W (continuation)
        self.kernel = kernel  # "chain" or "gaussian"; the Gaussian steps are always in logs
        self._phi_mid = np.empty(0)  # Φ at the step midpoints of the last Gaussian reference
        self.log_domain = log_domain or kernel == "gaussian"
        grid = problem.grid
        self.grid = grid
        self.shape = grid.shape
        self.k_steps = problem.steps
        self.dt = problem.dt
        self.confinement = np.asarray(problem.confinement.value(grid.points), dtype=float)
        if self.confinement.shape != grid.shape or not np.all(np.isfinite(self.confinement)):
            raise InputError("the confinement potential is not finite at every grid point")
        try:
            self.pair = PairField(grid, problem.interaction)
        except ValueError as exc:
            raise InputError(str(exc)) from exc
        self.omega = np.full(self.k_steps + 1, self.dt)
        self.omega[[0, -1]] = self.dt / 2
        # share of V_k attributed to the backward potential at node k (trapezoid split)
        self.half = np.full(self.k_steps + 1, self.dt / 2)
        self.half[-1] = 0.0

    def expand(self, w: np.ndarray) -> np.ndarray:
        return w.reshape(-1, *([1] * self.grid.dim))

    def potential(self, p: np.ndarray) -> np.ndarray:
        return self.confinement + self.scale * self.pair(p)

    def reference(self, p_bar: np.ndarray, v_bar: np.ndarray,
                  tail: float = UNIFORMISATION_TAIL, phi: np.ndarray | None = None
                  ) -> entropic.FrozenReference:
        """The frozen reference of (p̄, V̄); ``phi``: U + W ⋆ p̄ if already computed."""
        phi = self.potential(p_bar) if phi is None else phi
        phi_mid = 0.5 * (phi[:-1] + phi[1:])
        log_weights = -self.expand(self.omega) * v_bar
        if self.kernel == "gaussian":
            self._phi_mid = phi_mid  # V is the derivative at the reference of this iteration
            steps = small_noise.gaussian_steps(phi_mid, self.grid, self.problem.noise, self.dt)
            return entropic.FrozenReference(steps, log_weights, True)
        rates = edge_rates(phi_mid, self.grid, self.problem.noise)
        steps = []
        for k in range(self.k_steps):
            rk = EdgeRates(tuple(r[k] for r in rates.forward),
                           tuple(r[k] for r in rates.backward))
            # in 2D/3D alternate the order of the axis factors (Strang over pairs of steps)
            steps.append(StepOperator(rk, self.dt, self.shape, reverse=bool(k % 2), tail=tail))
        return entropic.FrozenReference(steps, log_weights, self.log_domain)

    def solved(self, sol: entropic.EntropicSolution, ref: entropic.FrozenReference,
               v_bar: np.ndarray) -> _Solved:
        log_p = sol.log_marginals(ref.log_weights)
        p = np.exp(log_p)
        log_half = -self.expand(self.half) * v_bar
        log_h = sol.log_backward + log_half
        log_f = sol.log_forward + ref.log_weights - log_half
        return _Solved(sol, p, log_f, log_h, self.potential(p))

    def blown_up(self, phi: np.ndarray, v_bar: np.ndarray) -> bool:
        """Whether a mixed iterate has left what the discretisation represents: the steps built
        on ``phi`` = U + W ⋆ p̄ are beyond double precision
        (:func:`~mfbridge.solvers.preflight.representable`; the start passed that check), or
        the log-weights ωV̄ exceed :data:`LOG_WEIGHT_MAX` (then log-domain sums of e^{-ωV}
        have no precision left, and the log-domain steps' stopping test never passes)."""
        if not preflight.representable(phi, self.problem, self.kernel):
            return True
        with np.errstate(invalid="ignore", over="ignore"):
            weights = np.abs(self.expand(self.omega) * v_bar)
        return not bool(np.all(weights <= LOG_WEIGHT_MAX))

    def correction(self, s: _Solved, ref: entropic.FrozenReference) -> np.ndarray:
        """The potential V (K+1, *shape) from the flow, potentials and Φ of one solve."""
        noise = self.problem.noise
        if self.kernel == "gaussian":
            return small_noise.gaussian_correction(s.p, self._phi_mid, ref, self.grid, noise,
                                                   self.dt, self.pair, self.scale, self.omega)
        beta = 2.0 / noise**2
        c = np.zeros_like(s.p)
        for a in range(self.grid.dim):
            ax = 1 + a
            lo, hi = faces(s.p.ndim, ax, self.shape[a])
            dphi = np.diff(s.phi, axis=ax)
            scale = 0.5 * noise**2 / self.grid.spacing[a] ** 2 * beta
            # rho_i (1 - h_j/h_i) = p_i - f_i h_j, written with potentials to stay finite; far
            # from the fixed point on a coarse grid (cell Péclet >> 1) f_i h_j can overflow: the
            # residual is then infinite and the outer loop reports divergence
            with np.errstate(over="ignore", invalid="ignore"):
                s_fwd = s.p[lo] - np.exp(s.log_f[lo] + s.log_h[hi])
                s_bwd = s.p[hi] - np.exp(s.log_f[hi] + s.log_h[lo])
                edge = scale * (bernoulli_derivative(beta * dphi) * s_fwd
                                - bernoulli_derivative(-beta * dphi) * s_bwd)
                c[lo] -= edge
                c[hi] += edge
        if not np.all(np.isfinite(c)):
            return np.full_like(c, np.nan)
        return self.scale * self.pair(c)


def solve_bridge(
    problem: BridgeProblem,
    options: SolverOptions | None = None,
    callback: Callable[[Iteration], None] | None = None,
    warm_start: BridgeResult | None = None,
) -> BridgeResult:
    """Compute the mean-field Schrödinger bridge of ``problem``.

    Returns a :class:`~mfbridge.result.BridgeResult` whose ``status`` is ``"converged"`` or
    ``"not_converged"`` (then a :class:`~mfbridge.errors.ConvergenceWarning` is also issued, with
    the last residual). ``callback`` receives an :class:`Iteration` after every outer iteration.
    ``warm_start``: a result on the same grid and time steps (for example the solution for a
    nearby parameter value) whose flow, correction and potentials start the iteration.

    If the iteration from the given start fails and ``options.continuation`` is positive, the
    interaction is switched on gradually, W → (j/m) W for j = 1..m, each solve starting from the
    previous one. If it still fails, or converged only with effort, ``options.cross_check``
    brings in the direct solver (:mod:`mfbridge.solvers.cross_check`): its result is returned
    (``method = "direct"``) when the fixed point failed and it converged.
    """
    options = options or SolverOptions()
    if warm_start is not None:
        _check_warm_start(problem, warm_start)
    t0 = time.perf_counter()
    second = cross_check.applies(problem, options)
    reserve = cross_check.reserve(options.time_budget) if second else 0.0
    with threadpool_limits(limits=1):
        result = _solve(problem, options, callback, warm_start, reserve)
    if second:
        left = (None if options.time_budget is None
                else options.time_budget - (time.perf_counter() - t0))
        result = cross_check.second_opinion(problem, result, options.cross_check, left)
    return result


def _check_warm_start(problem: BridgeProblem, warm: BridgeResult) -> None:
    if not isinstance(warm, BridgeResult):
        raise InputError(f"warm_start must be a BridgeResult, got {type(warm).__name__}")
    if warm.grid.shape != problem.grid.shape or len(warm.times) != problem.steps + 1:
        raise InputError(
            f"warm_start has grid {warm.grid.shape} and {len(warm.times) - 1} steps; the problem "
            f"has grid {problem.grid.shape} and {problem.steps} steps"
        )


# in the message of a result whose chain steps ran in the log domain (mfbridge.solvers.accuracy
# reads it)
LOG_DOMAIN_NOTE = " (log-domain propagation: the endpoints span more than double precision)"


def _attempt(problem: BridgeProblem, scale: float, run: Run, start: Start,
             log_domain: bool = False) -> Outcome:
    """One outer iteration from ``start`` with the interaction ``scale`` × W; with
    ``propagation="auto"`` it moves to log-domain steps when the rational ones underflow where an
    endpoint has mass or the Sinkhorn iteration stalls."""
    options = run.options
    bridge = _Bridge(problem, scale=scale, log_domain=log_domain or options.propagation == "log",
                     kernel=options.kernel)
    outcome = None
    try:
        outcome = iterate(bridge, run, start)
    except entropic.UnderflowError:
        if options.propagation != "auto" or bridge.log_domain:
            raise
    if outcome is not None and outcome.budget_spent:
        return outcome
    lost = outcome is None or outcome.status == "stalled" or outcome.lost
    if not bridge.log_domain and lost:
        if options.propagation != "auto":
            assert outcome is not None
            outcome.status = "not_converged"
            return outcome
        warnings.warn(PrecisionWarning(
            "the endpoints need values below double precision of the reference kernel; "
            "switching to exact log-domain propagation (slower; set solver.propagation=log to "
            "start there)"), stacklevel=4)
        bridge = _Bridge(problem, scale=scale, log_domain=True, kernel=options.kernel)
        # a diverged attempt may end on a NaN flow: then start again from the given start
        start = outcome.start() if outcome is not None and outcome.finite() else start
        outcome = iterate(bridge, run, start)
    if outcome.status == "stalled":
        outcome.status = "not_converged"
    return outcome


def _noise_continuation(problem: BridgeProblem, run: Run) -> Outcome:
    """Solve with noise σ·2^m, σ·2^(m-1), …, σ (m = ``options.noise_continuation``), each stage
    warm-started from the previous one (ε-scaling of entropic transport: large noise is easy, and
    as σ → 0 the flow tends to the transport interpolation, so it moves little between stages)."""
    m = run.options.noise_continuation
    noises = [problem.noise * 2.0 ** (m - j) for j in range(m + 1)]
    stage = dataclasses.replace(problem, noise=noises[0])
    run.stage = f"noise continuation, σ = {noises[0]:.3g} (stage 0 of {m})"
    outcome = _attempt(stage, 1.0, run, _cold_start(stage))
    for j, noise in enumerate(noises[1:], start=1):
        if outcome.status != "converged" or outcome.budget_spent:
            break
        start = outcome.start(noise)
        stage = problem if noise == noises[-1] else dataclasses.replace(problem, noise=noise)
        run.stage = f"noise continuation, σ = {noise:.3g} (stage {j} of {m})"
        outcome = _attempt(stage, 1.0, run, start, log_domain=outcome.log_domain)
    outcome.noise_start = noises[0]
    return outcome


def _closer(a: Outcome, b: Outcome) -> Outcome:
    """The converged one of two outcomes for the same problem, else the one with the smaller
    finite residual (``a`` on ties)."""
    def rank(o: Outcome) -> tuple[bool, float]:
        return (o.status != "converged",
                o.residual if np.isfinite(o.residual) and o.finite() else np.inf)
    return b if rank(b) < rank(a) else a


def _cold_start(problem: BridgeProblem) -> Start:
    p_bar = problem.linear_flow()
    return Start(p_bar, np.zeros_like(p_bar), np.zeros(problem.grid.shape))


def _solve(problem: BridgeProblem, options: SolverOptions,
           callback: Callable[[Iteration], None] | None,
           warm_start: BridgeResult | None, reserve: float = 0.0) -> BridgeResult:
    """The fixed-point solve; ``reserve``: seconds of the time budget kept for the direct
    solver's fallback (:func:`mfbridge.solvers.cross_check.reserve`)."""
    start_time = time.perf_counter()
    grid = problem.grid
    route = options.route
    if route == "auto":
        route = "dense" if grid.size <= options.dense_max_cells else "operator"
    if (route == "dense" or options.coupling) and grid.size > COUPLING_MAX_CELLS:
        raise InputError(
            f"the static coupling of {grid.size} cells needs an n x n kernel; it is available up "
            f"to {COUPLING_MAX_CELLS} cells (use route=operator without coupling)"
        )
    kernel, kernel_note = small_noise.choose_kernel(problem, options.kernel)
    options = dataclasses.replace(options, kernel=kernel)
    if warm_start is None:
        start = _cold_start(problem)
    else:
        # a result without Schrödinger potentials (the direct solver's) has NaN there
        start = Start(warm_start.masses,
                      np.nan_to_num(warm_start.correction) if options.method == "optimal"
                      else np.zeros_like(warm_start.correction),
                      np.nan_to_num(warm_start.log_backward[-1], nan=0.0, neginf=-745.0),
                      solution=True)
    scaled = _Bridge(problem)
    preflight.check_scales(problem, start.p_bar, scaled.pair, scaled.confinement, kernel)
    preflight.check_resolution(problem)
    run = Run(options, route, Clock(None if options.time_budget is None
                                    else options.time_budget - reserve), callback)
    # an attempt that stalls far out ends early only if a continuation can take over
    run.give_up_far = options.noise_continuation > 0 or (options.continuation > 0
                                                         and not scaled.pair.is_zero)
    outcome = _attempt(problem, 1.0, run, start)
    # the answer must be for the problem as given: a continuation that stops early holds a flow
    # for a larger noise or a weaker interaction, which is never returned
    note = LOG_DOMAIN_NOTE if outcome.log_domain and options.kernel == "chain" else kernel_note
    answer, stopped = outcome, ""
    if (not outcome.stop and outcome.status != "converged" and options.noise_continuation > 0
            and not outcome.budget_spent):
        outcome = _noise_continuation(problem, run)
        if outcome.bridge.problem.noise != problem.noise:
            stopped = (f"; continuation in the noise stopped at σ = "
                       f"{outcome.bridge.problem.noise:.3g}")
        elif _closer(answer, outcome) is outcome:
            answer = outcome
            note = (f" (by continuation in the noise from {outcome.noise_start:.3g} over "
                    f"{options.noise_continuation} stages)")
    if (not answer.stop and answer.status != "converged" and options.continuation > 0
            and not outcome.bridge.pair.is_zero and not outcome.budget_spent):
        m = options.continuation
        start = _cold_start(problem)
        for j in range(1, m + 1):
            run.stage = f"interaction × {j / m:.3g} (stage {j} of {m})"
            outcome = _attempt(problem, j / m, run, start, log_domain=outcome.log_domain)
            if outcome.status != "converged" or outcome.budget_spent:
                break
            start = outcome.start()
        if outcome.bridge.scale == 1.0:
            if _closer(answer, outcome) is outcome:
                answer = outcome
                note = f" (by continuation in the interaction strength over {m} stages)"
        else:
            stopped += (f"; continuation in the interaction strength stopped at stage {j} of "
                        f"{m} (W × {j / m:.3g}: {outcome.status.replace('_', ' ')}, residual "
                        f"{outcome.residual:.2e})")
    if outcome.budget_spent:
        kept = (f", {reserve:.3g} s of it kept for the direct solver's fallback"
                if reserve > 0 else "")
        stopped += (f"; the time budget of {options.time_budget:g} s ran out (solver.time_budget"
                    f"{kept}) during {run.stage or 'the first attempt'}")
    outcome = answer
    note += stopped
    history = run.history
    if outcome.solved is None:
        return _unsolved_result(outcome, options, route, note, history, start_time)
    bridge = outcome.bridge
    solved, ref = outcome.solved, outcome.ref
    if options.coupling and solved.sol.coupling is None:
        sol = solved.sol
        plan = np.exp(sol.log_a.reshape(-1, 1) + entropic.log_kernel(ref)
                      + sol.log_b.reshape(1, -1))
        solved.sol = dataclasses.replace(sol, coupling=plan)
    # iterations over every attempt (fallback to the log domain, continuation stages)
    it, residual, status = len(history), outcome.residual, outcome.status
    if status == "converged":
        message = (f"converged in {it} outer iterations{note}: residual {residual:.2e}, "
                   f"marginal error {solved.sol.marginal_error:.2e}")
        message += small_noise.floor_note(bridge.kernel, problem, solved.p, outcome.v_bar,
                                          options.tol)
    elif outcome.stop:
        message = f"not converged: stopped after {it} outer iterations{note}: {outcome.stop}"
        warnings.warn(ConvergenceWarning(message), stacklevel=3)
    else:
        message = (f"{status.replace('_', ' ')} after {it} outer iterations{note}: last residual "
                   f"{residual:.2e} (tolerance {options.tol:.1e}), marginal error "
                   f"{solved.sol.marginal_error:.2e}")
        message += small_noise.failure_hint(bridge.kernel, problem, solved.p, solved.phi,
                                            solved.log_h)
        warnings.warn(ConvergenceWarning(message), stacklevel=3)
    solve_seconds = float(sum(h["seconds"] for h in history))
    # a diverged iterate may hold potentials whose products overflow: its cost is then inf/NaN
    with np.errstate(**({} if status == "converged" else {"over": "ignore", "invalid": "ignore"})):
        result = _result(bridge, solved, ref, outcome.v_bar, options, route, status, message,
                         it, residual, history,
                         {"solve": solve_seconds, "total": time.perf_counter() - start_time})
    if status == "converged":
        # the cell Péclet number is the chain's limit, not the Gaussian steps' (small_noise)
        peclet = (small_noise.cell_peclet(problem, solved.p, solved.phi, solved.log_h)
                  if bridge.kernel == "chain" else 0.0)
        sanity.gate(problem, result, options.tol, peclet, frozen=options.method == "frozen")
    if options.starts > 1:
        result.start = "cold" if warm_start is None else "warm"
        result = _other_starts(problem, run, result)
        result.timings["total"] = time.perf_counter() - start_time
    return result


def _result(bridge: _Bridge, s: _Solved, ref: entropic.FrozenReference, v_bar: np.ndarray,
            options: SolverOptions, route: str, status: str, message: str, iterations: int,
            residual: float, history: list[dict[str, float]], timings: dict[str, float]
            ) -> BridgeResult:
    problem = bridge.problem
    grid = problem.grid
    noise = problem.noise
    sol = s.sol
    # J evaluated on the flow in flux form, at the step midpoints (mfbridge.solvers.cost); with
    # the Gaussian steps the chain's KL (small_noise docstring)
    fe = observables.free_energy(s.p, grid, noise, bridge.confinement, bridge.pair)
    if bridge.kernel == "gaussian":
        parts = small_noise.gaussian_cost(problem, sol, ref, bridge.omega, s.p, s.log_h, s.phi,
                                          fe[-1] - fe[0])
    else:
        parts = bridge_cost(grid, noise, bridge.dt, s.phi, ref, sol, fe[-1] - fe[0])
    mean, cov = observables.moments(s.p, grid)
    model = {
        "confinement": _describe(problem.confinement),
        "interaction": _describe(problem.interaction),
    }
    return BridgeResult(
        grid=grid,
        times=problem.times,
        density=s.p / grid.cell_volume,
        control=observables.control_field(s.log_h, grid, noise),
        log_forward=s.log_f,
        log_backward=s.log_h,
        correction=v_bar,
        mean=mean,
        cov=cov,
        free_energy=fe,
        entropy=observables.entropy(s.p, grid),
        cost=parts.cost,
        cost_kinetic=parts.kinetic,
        cost_drift=parts.drift,
        cost_free_energy=parts.free_energy,
        noise=noise,
        method=options.method,
        route=route,
        status=status,
        message=message,
        iterations=iterations,
        residual=residual,
        marginal_error=sol.marginal_error,
        history=history,
        timings=timings,
        model=model,
        coupling=None if sol.coupling is None else sol.coupling.reshape(
            *grid.shape, *grid.shape),
    )




def _unsolved_result(outcome: Outcome, options: SolverOptions, route: str, note: str,
                     history: list[dict[str, float]], start_time: float) -> BridgeResult:
    """The answer when the time budget ran out before the first solve finished: the starting
    flow, no potentials, cost NaN, status not_converged."""
    assert outcome.unsolved is not None
    bridge, start = outcome.bridge, outcome.unsolved
    grid, noise = bridge.problem.grid, bridge.problem.noise
    message = (f"not converged: no outer iteration finished{note}; the result holds the "
               f"initial guess (no potentials, cost NaN): raise solver.time_budget or coarsen "
               f"the grid")
    warnings.warn(ConvergenceWarning(message), stacklevel=3)
    p = start.p_bar
    nan = np.full_like(p, np.nan)
    mean, cov = observables.moments(p, grid)
    return BridgeResult(
        grid=grid, times=bridge.problem.times, density=p / grid.cell_volume,
        control=np.full((*p.shape, grid.dim), np.nan), log_forward=nan, log_backward=nan.copy(),
        correction=start.v_bar, mean=mean, cov=cov,
        free_energy=observables.free_energy(p, grid, noise, bridge.confinement, bridge.pair),
        entropy=observables.entropy(p, grid), cost=np.nan, cost_kinetic=np.nan,
        cost_drift=np.nan, cost_free_energy=np.nan, noise=noise, method=options.method,
        route=route, status="not_converged", message=message, iterations=len(history),
        residual=np.inf, marginal_error=np.nan, history=history,
        timings={"solve": time.perf_counter() - start_time,
                 "total": time.perf_counter() - start_time},
        model={"confinement": _describe(bridge.problem.confinement),
               "interaction": _describe(bridge.problem.interaction)})


def _describe(obj: object) -> dict[str, object]:
    describe = getattr(obj, "describe", None)
    return describe() if callable(describe) else {"repr": repr(obj)}


def _other_starts(problem: BridgeProblem, run: Run, first: BridgeResult) -> BridgeResult:
    """Run the outer loop from ``options.starts - 1`` further guesses
    (:func:`mfbridge.solvers.multistart.starting_flows`; no continuation: a guess
    that fails is reported as such; none after the time budget is spent) and return
    :func:`mfbridge.solvers.multistart.gather` of all."""
    options = run.options
    found = [first]
    run.give_up_far = False  # no continuation follows a further start
    for label, p_bar in multistart.starting_flows(problem, options.starts - 1):
        if run.clock.spent:
            first.message += f"; start {label} and later ones skipped: time budget spent"
            break
        run.history, run.stage = [], f"start {label}"
        start = Start(p_bar, np.zeros_like(p_bar), np.zeros(problem.grid.shape))
        try:
            outcome = _attempt(problem, 1.0, run, start)
        except entropic.UnderflowError:
            continue
        if outcome.solved is None:
            continue
        it, res = len(run.history), outcome.residual
        message = (f"{outcome.status.replace('_', ' ')} in {it} outer iterations from start "
                   f"{label}: residual {res:.2e}, marginal error "
                   f"{outcome.solved.sol.marginal_error:.2e}")
        seconds = float(sum(h["seconds"] for h in run.history))
        with np.errstate(**({} if outcome.status == "converged"
                            else {"over": "ignore", "invalid": "ignore"})):
            result = _result(outcome.bridge, outcome.solved, outcome.ref, outcome.v_bar,
                             options, run.route, outcome.status,
                             message, it, res, run.history, {"solve": seconds, "total": seconds})
        result.start = label
        found.append(result)
    return multistart.gather(found, options.tol)
