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
from mfbridge.numerics.anderson import AndersonMixer
from mfbridge.numerics.propagator import UNIFORMISATION_TAIL, StepOperator, step_tail
from mfbridge.numerics.reference import (
    EdgeRates,
    PairField,
    bernoulli_derivative,
    edge_rates,
    faces,
)
from mfbridge.result import BridgeResult
from mfbridge.solvers import multistart, preflight, sanity, small_noise
from mfbridge.solvers.cost import bridge_cost
from mfbridge.solvers.options import COUPLING_MAX_CELLS, SolverOptions
from mfbridge.solvers.stopping import MarginalStall

# an outer residual this many times above max(first residual, 1) means the start is outside the
# basin of the fixed point (transient rises of 100x the best residual occur in converging runs)
DIVERGENCE_FACTOR = 10.0
# Sinkhorn tolerance while the outer loop is far out: INNER_FRACTION x the outer residual (at
# most 10 x INNER_FRACTION), 100x tighter after STAGNATION iterations without a new best
# residual, down to INNER_FRACTION_MIN. Inexact sub-solves enter V through the potentials,
# amplified like 1/sigma^2: with 1e-2 alone, sigma = 0.2 stagnated at residual ~3e-2; with 1e-4
# it converged in 59 outer iterations (n = 128, K = 25). Strong coupling needs it too: the swarm
# passing an obstacle (tests/test_multistart.py) converges from its tilted starts with 1e-4 and
# diverges with 1e-2. At sigma = 1, 1e-2 would save ~6% of the sweeps.
INNER_FRACTION = 1e-4
INNER_FRACTION_MIN = 1e-6
STAGNATION = 4
# largest |omega V| accepted in the log-weights: a double near 1e8 has an ulp of 1.5e-8, so
# log-domain sums of e^{-omega V} keep ~8 digits; beyond, an iterate has blown up (common
# practice, no source; measured: a diverging iterate at sigma = 0.04 on 24 cells had |V| ~ 1e33)
LOG_WEIGHT_MAX = 1e8


@dataclass(frozen=True)
class Iteration:
    """One outer iteration, as passed to the progress callback."""

    iteration: int
    residual: float
    marginal_error: float
    sinkhorn_iterations: int
    seconds: float


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


def _blown_up(bridge: _Bridge, phi: np.ndarray, v_bar: np.ndarray) -> bool:
    """Whether a mixed iterate has left what the discretisation represents: U + W ⋆ p̄ changes by
    more than :data:`~mfbridge.solvers.preflight.Z_MAX` across a cell (the start passed that
    check), or the log-weights ωV̄ exceed :data:`LOG_WEIGHT_MAX` (then log-domain sums of
    e^{-ωV} have no precision left, and the log-domain steps' stopping test never passes)."""
    if preflight.largest_cell_drift(phi, bridge.problem).z > preflight.Z_MAX:
        return True
    with np.errstate(invalid="ignore", over="ignore"):
        weights = np.abs(bridge.expand(bridge.omega) * v_bar)
    return not bool(np.all(weights <= LOG_WEIGHT_MAX))


def _residual(p: np.ndarray, p_bar: np.ndarray, v: np.ndarray, v_bar: np.ndarray,
              horizon: float, grid_dim: int) -> float:
    axes = tuple(range(1, grid_dim + 1))
    r_p = np.abs(p - p_bar).sum(axis=axes).max()
    r_v = horizon * (p * np.abs(v - v_bar)).sum(axis=axes).max()
    return float(r_p + r_v)


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
    previous one.
    """
    options = options or SolverOptions()
    if warm_start is not None:
        _check_warm_start(problem, warm_start)
    with threadpool_limits(limits=1):
        return _solve(problem, options, callback, warm_start)


def _check_warm_start(problem: BridgeProblem, warm: BridgeResult) -> None:
    if not isinstance(warm, BridgeResult):
        raise InputError(f"warm_start must be a BridgeResult, got {type(warm).__name__}")
    if warm.grid.shape != problem.grid.shape or len(warm.times) != problem.steps + 1:
        raise InputError(
            f"warm_start has grid {warm.grid.shape} and {len(warm.times) - 1} steps; the problem "
            f"has grid {problem.grid.shape} and {problem.steps} steps"
        )


@dataclass
class _Start:
    """Where an outer iteration starts."""

    p_bar: np.ndarray
    v_bar: np.ndarray
    log_b: np.ndarray
    # a solution given by the caller: its first sub-problem is solved to sinkhorn_tol, so that a
    # converged result is a fixed point (a loose first solve moves it by more than tol)
    solution: bool = False


@dataclass
class _Outcome:
    status: str
    solved: _Solved
    ref: entropic.FrozenReference
    v_bar: np.ndarray
    residual: float
    bridge: _Bridge
    noise_start: float = 0.0  # first noise of a noise continuation (0: none)
    stop: str = ""  # why the loop stopped short of tol where retrying cannot help

    @property
    def log_domain(self) -> bool:
        return self.bridge.log_domain

    def finite(self) -> bool:
        """Whether the flow, V and the final scaling can start another attempt (log b may be
        -inf where ν has no mass)."""
        log_b = self.solved.sol.log_b
        return bool(np.all(np.isfinite(self.solved.p)) and np.all(np.isfinite(self.v_bar))
                    and not np.any(np.isnan(log_b) | (log_b == np.inf)))

    def start(self, noise: float | None = None) -> _Start:
        """Where to start next; for another noise σ' the potentials are rescaled by
        (σ/σ')², their leading small-noise order (log-potentials and V are O(1/σ²))."""
        factor = 1.0 if noise is None else (self.bridge.problem.noise / noise) ** 2
        return _Start(self.solved.p, factor * self.v_bar, factor * self.solved.sol.log_b)


_LOG_NOTE = " (log-domain propagation: the endpoints span more than double precision)"


def _attempt(problem: BridgeProblem, scale: float, options: SolverOptions, route: str,
             start: _Start, history: list[dict[str, float]],
             callback: Callable[[Iteration], None] | None, log_domain: bool = False
             ) -> _Outcome:
    """One outer iteration from ``start`` with the interaction ``scale`` × W; with
    ``propagation="auto"`` it moves to log-domain steps when the rational ones underflow where an
    endpoint has mass or the Sinkhorn iteration stalls."""
    bridge = _Bridge(problem, scale=scale, log_domain=log_domain or options.propagation == "log",
                     kernel=options.kernel)
    outcome = None
    try:
        outcome = _iterate(bridge, options, route, start, history, callback)
    except entropic.UnderflowError:
        if options.propagation != "auto" or bridge.log_domain:
            raise
    lost = outcome is None or outcome.status == "stalled" or not np.isfinite(outcome.residual)
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
        outcome = _iterate(bridge, options, route, start, history, callback)
    if outcome.status == "stalled":
        outcome.status = "not_converged"
    return outcome


def _noise_continuation(problem: BridgeProblem, options: SolverOptions, route: str,
                        history: list[dict[str, float]],
                        callback: Callable[[Iteration], None] | None) -> _Outcome:
    """Solve with noise σ·2^m, σ·2^(m-1), …, σ (m = ``options.noise_continuation``), each stage
    warm-started from the previous one (ε-scaling of entropic transport: large noise is easy, and
    as σ → 0 the flow tends to the transport interpolation, so it moves little between stages)."""
    m = options.noise_continuation
    noises = [problem.noise * 2.0 ** (m - j) for j in range(m + 1)]
    stage = dataclasses.replace(problem, noise=noises[0])
    outcome = _attempt(stage, 1.0, options, route, _cold_start(stage), history,
                       callback)
    for noise in noises[1:]:
        if outcome.status != "converged":
            break
        start = outcome.start(noise)
        stage = problem if noise == noises[-1] else dataclasses.replace(problem, noise=noise)
        outcome = _attempt(stage, 1.0, options, route, start, history, callback,
                           log_domain=outcome.log_domain)
    outcome.noise_start = noises[0]
    return outcome


def _closer(a: _Outcome, b: _Outcome) -> _Outcome:
    """The converged one of two outcomes for the same problem, else the one with the smaller
    finite residual (``a`` on ties)."""
    def rank(o: _Outcome) -> tuple[bool, float]:
        return (o.status != "converged",
                o.residual if np.isfinite(o.residual) and o.finite() else np.inf)
    return b if rank(b) < rank(a) else a


def _cold_start(problem: BridgeProblem) -> _Start:
    p_bar = problem.linear_flow()
    return _Start(p_bar, np.zeros_like(p_bar), np.zeros(problem.grid.shape))


def _solve(problem: BridgeProblem, options: SolverOptions,
           callback: Callable[[Iteration], None] | None,
           warm_start: BridgeResult | None) -> BridgeResult:
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
        start = _Start(warm_start.masses,
                       np.nan_to_num(warm_start.correction) if options.method == "optimal"
                       else np.zeros_like(warm_start.correction),
                       np.nan_to_num(warm_start.log_backward[-1], nan=0.0, neginf=-745.0),
                       solution=True)
    scaled = _Bridge(problem)
    preflight.check_scales(problem, start.p_bar, scaled.pair, scaled.confinement)
    history: list[dict[str, float]] = []
    outcome = _attempt(problem, 1.0, options, route, start, history, callback)
    # the answer must be for the problem as given: a continuation that stops early holds a flow
    # for a larger noise or a weaker interaction, which is never returned
    note = _LOG_NOTE if outcome.log_domain and options.kernel == "chain" else kernel_note
    answer, stopped = outcome, ""
    if not outcome.stop and outcome.status != "converged" and options.noise_continuation > 0:
        outcome = _noise_continuation(problem, options, route, history, callback)
        if outcome.bridge.problem.noise != problem.noise:
            stopped = (f"; continuation in the noise stopped at σ = "
                       f"{outcome.bridge.problem.noise:.3g}")
        elif _closer(answer, outcome) is outcome:
            answer = outcome
            note = (f" (by continuation in the noise from {outcome.noise_start:.3g} over "
                    f"{options.noise_continuation} stages)")
    if (not answer.stop and answer.status != "converged" and options.continuation > 0
            and not outcome.bridge.pair.is_zero):
        m = options.continuation
        start = _cold_start(problem)
        for j in range(1, m + 1):
            outcome = _attempt(problem, j / m, options, route, start, history, callback,
                               log_domain=outcome.log_domain)
            if outcome.status != "converged":
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
    outcome = answer
    note += stopped
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
        result = _other_starts(problem, options, route, result, callback)
        result.timings["total"] = time.perf_counter() - start_time
    return result


def _iterate(bridge: _Bridge, options: SolverOptions, route: str, start: _Start,
             history: list[dict[str, float]],
             callback: Callable[[Iteration], None] | None) -> _Outcome:
    """The outer fixed-point iteration from ``start``; appends to ``history``."""
    problem = bridge.problem
    grid = problem.grid
    inner = entropic.solve_dense if route == "dense" else entropic.solve_operator
    # Anderson-mixed Sinkhorn with the Gaussian steps (small noise: plain Sinkhorn is slow)
    accelerate = ({"anderson": small_noise.SINKHORN_ANDERSON}
                  if route != "dense" and bridge.kernel == "gaussian" else {})
    mu, nu = problem.initial, problem.final
    interacting = not bridge.pair.is_zero
    optimal = options.method == "optimal" and interacting
    p_bar, v_bar, log_b = start.p_bar, start.v_bar, start.log_b
    mixer = AndersonMixer(options.anderson, options.damping)
    loose = interacting and not start.solution
    inner_tol = max(options.sinkhorn_tol, 1e-3) if loose else options.sinkhorn_tol
    status, residual, solved, ref = "not_converged", np.inf, None, None
    first: float | None = None
    best, since_best, fraction = np.inf, 0, INNER_FRACTION
    stall, stop = MarginalStall(options.tol, options.sinkhorn_tol, route), ""
    for _ in range(options.max_iter):
        t0 = time.perf_counter()
        phi = bridge.potential(p_bar)
        if solved is not None and _blown_up(bridge, phi, v_bar):
            status = "diverged"
            break
        ref = bridge.reference(p_bar, v_bar, step_tail(inner_tol, bridge.k_steps), phi)
        sol = inner(ref, mu, nu, log_b, tol=inner_tol, max_iter=options.sinkhorn_max_iter,
                    **accelerate)
        log_b = sol.log_b
        solved = bridge.solved(sol, ref, v_bar)
        v_new = bridge.correction(solved, ref) if optimal else np.zeros_like(v_bar)
        residual = (
            _residual(solved.p, p_bar, v_new, v_bar, problem.horizon, grid.dim)
            if interacting else 0.0
        )
        seconds = time.perf_counter() - t0
        history.append({"residual": residual, "marginal_error": sol.marginal_error,
                        "sinkhorn_iterations": float(sol.iterations), "seconds": seconds,
                        "interaction_scale": bridge.scale})
        if callback is not None:
            callback(Iteration(len(history), residual, sol.marginal_error, sol.iterations,
                               seconds))
        first = residual if first is None else first
        if (not np.isfinite(residual) or not np.isfinite(sol.marginal_error)
                or residual > DIVERGENCE_FACTOR * max(first, 1.0)):
            status = "diverged"
            break
        if (sol.iterations >= options.sinkhorn_max_iter and sol.marginal_error > inner_tol
                and not bridge.log_domain):
            status = "stalled"  # the entropic problem cannot be solved to working precision
            break
        floor = small_noise.roundoff_floor(bridge.kernel, problem, solved.p, v_new)
        if residual <= max(options.tol, floor) and sol.marginal_error <= options.tol:
            status = "converged"
            break
        stop = stall.check(residual, sol.marginal_error, inner_tol)
        if stop:
            break
        if not interacting:
            continue  # Sinkhorn goes on from log_b
        if residual < best:
            best, since_best = residual, 0
        else:
            since_best += 1
        if since_best >= STAGNATION and fraction > INNER_FRACTION_MIN:
            # inexact sub-solves enter V amplified like 1/sigma^2: at small noise the outer
            # iteration stagnates at the sub-solves' error, so solve them more exactly
            fraction, since_best = fraction * 1e-2, 0
        inner_tol = max(options.sinkhorn_tol, min(10 * fraction, fraction * residual))
        if optimal:
            x = np.concatenate([p_bar.ravel(), v_bar.ravel()])
            gx = np.concatenate([solved.p.ravel(), v_new.ravel()])
        else:
            x, gx = p_bar.ravel(), solved.p.ravel()
        x_next = mixer.next(x, gx)
        p_bar = x_next[: p_bar.size].reshape(p_bar.shape)
        if optimal:
            v_bar = x_next[p_bar.size :].reshape(v_bar.shape)
    assert solved is not None and ref is not None
    return _Outcome(status, solved, ref, v_bar, residual, bridge, stop=stop)


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




def _describe(obj: object) -> dict[str, object]:
    describe = getattr(obj, "describe", None)
    return describe() if callable(describe) else {"repr": repr(obj)}


def _other_starts(problem: BridgeProblem, options: SolverOptions, route: str,
                  first: BridgeResult, callback: Callable[[Iteration], None] | None
                  ) -> BridgeResult:
    """Run the outer loop from ``options.starts - 1`` tilted guesses (no continuation: a guess
    that fails is reported as such) and return :func:`mfbridge.solvers.multistart.gather` of all."""
    found = [first]
    for label, p_bar in multistart.tilted_flows(problem, options.starts - 1):
        history: list[dict[str, float]] = []
        start = _Start(p_bar, np.zeros_like(p_bar), np.zeros(problem.grid.shape))
        try:
            outcome = _attempt(problem, 1.0, options, route, start, history, callback)
        except entropic.UnderflowError:
            continue
        it, res = len(history), outcome.residual
        message = (f"{outcome.status.replace('_', ' ')} in {it} outer iterations from start "
                   f"{label}: residual {res:.2e}, marginal error "
                   f"{outcome.solved.sol.marginal_error:.2e}")
        seconds = float(sum(h["seconds"] for h in history))
        result = _result(outcome.bridge, outcome.solved, outcome.ref, outcome.v_bar, options,
                         route, outcome.status, message, it, res, history,
                         {"solve": seconds, "total": seconds})
        result.start = label
        found.append(result)
    return multistart.gather(found, options.tol)
