r"""The outer iteration on one discretised problem: Anderson mixing, then Newton–Krylov.

The state is :math:`x = (\bar p, \bar V)` (flow and correction potential; :math:`\bar p` alone
for the frozen method) and one evaluation of the map :math:`G` is one frozen entropic solve
(:mod:`mfbridge.solvers.fixed_point`). The fixed points of G are the critical points of J.

**Why Anderson alone fails under strong attraction.** At the fixed point of the demo problem
with a Gaussian core of strength -8 (σ = 0.8, 64 cells × 20 steps) the Jacobian of G has complex
eigenvalues 0.98 ± 0.56i and 0.79 ± 0.70i (Arnoldi on difference quotients): spectral radius
1.13, so plain iteration diverges; damping :math:`x + \alpha(G(x) - x)` contracts only for
α < 0.1, at best by a factor 0.9996 per iteration. :math:`I - G'` itself is well conditioned
there (its eigenvalues are 0.02 ∓ 0.56i, ...), which is what a Newton–Krylov method needs.
Anderson mixing (depth 6) is a short-memory secant method on the same equation: it converged
in 185 iterations at -8 and stagnated (residual ~5e-4, σ = 0.8, 256 × 100) at -10.

**The method** (``options.outer``):

* ``"anderson"``: damped Anderson mixing (:mod:`mfbridge.numerics.anderson`) as before;
* ``"newton"``: Jacobian-free Newton–Krylov on :math:`F(x) = G(x) - x`, every accepted step
  decreasing :math:`\|F\|_2` (line search; :mod:`mfbridge.numerics.newton_krylov`, Knoll &
  Keyes, J. Comput. Phys. 193, 2004), from the start;
* ``"auto"`` (default): Anderson while it makes progress — easy problems converge in ~13
  Anderson iterations and never see the rest — and Newton–Krylov from the best iterate as soon
  as Anderson stalls (:func:`handover`: :data:`STALL_WINDOW` iterations without a new best
  residual, or a slow decrease with no new best for :data:`PAUSE` iterations, or a residual
  rising :data:`DIVERGENCE_FACTOR`-fold), provided the best residual is at most
  :data:`NEWTON_FROM`; from farther out, once Anderson has stopped improving, the attempt ends
  ``"not_converged"`` and the solver's continuations (in the noise, in the interaction
  strength) start instead. When no continuation follows
  (:attr:`Run.give_up_far` false: the further starts of ``solver.starts``, or both
  continuations switched off) Anderson goes on instead: the tilted starts of the swarm passing an
  obstacle (tests/test_multistart.py) stay above residual 1 for ~300 iterations and converge
  after 385; ending them early lost that bridge.

Every evaluation ticks the run's :class:`~mfbridge.numerics.clock.Clock`; when the time budget
is spent the iteration returns its best iterate with status ``"not_converged"``. Progress goes
to the callback after every Anderson iteration and Newton step, and as a heartbeat inside
long ones, with an estimate of the time left.
"""

from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics import entropic
from mfbridge.numerics.anderson import AndersonMixer
from mfbridge.numerics.clock import BudgetSpent, Clock, remaining_estimate
from mfbridge.numerics.newton_krylov import newton_krylov
from mfbridge.numerics.propagator import step_tail
from mfbridge.solvers import small_noise
from mfbridge.solvers.options import SolverOptions
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
# "auto" (see handover): Newton-Krylov takes over after STALL_WINDOW Anderson iterations without a
# new best residual, or when the best residual fell by less than 1/SLOW_FACTOR over SLOW_WINDOW
# iterations and has not improved for PAUSE; far out (best above NEWTON_FROM) the attempt ends
# after SLOW_WINDOW iterations without a new best, or less than 1/FAR_FACTOR over SLOW_WINDOW.
# Both wait while Anderson still improves: the reference LQ case at sigma = 0.02 (1600 cells,
# 32 steps) keeps its best residual 1.035 for 10 iterations, the residual rising to 4.8, then
# falls to 0.49 and converges at iteration 39 (68 CPU s); the earlier rule ended it at iteration
# 26 as "far" (best 5.3 -> 1.035 over 20 iterations) and the noise continuation took 112
# iterations, 131 CPU s. The strong-attraction hand-overs are unchanged (64 cells x 20 steps,
# core -10: no new best for 10, Newton from iteration 28; core -8: slow and 6 iterations without
# a new best, Newton from iteration 88).
STALL_WINDOW = 10
SLOW_WINDOW = 20
SLOW_FACTOR = 0.1
FAR_FACTOR = 0.5
PAUSE = 5
# GMRES restart length and Jacobian products allowed per Newton step
KRYLOV_RESTART = 40
KRYLOV_PRODUCTS = 120
# Newton-Krylov takes over only from a best residual at most this (L1 distance of flows is at most
# 2; a larger residual is an iterate far from any fixed point, where Newton from it wanders: the
# diverging start at sigma = 0.04 on 24 cells, residual 9e33, took over 100 s of Newton steps)
NEWTON_FROM = 1.0
KINDS = {"anderson": 1.0, "newton": 2.0}  # history["kind"] (numbers: history holds floats)


class Discretised(Protocol):
    """What the loop needs of the discretised problem (:class:`fixed_point._Bridge`)."""

    problem: BridgeProblem
    scale: float
    log_domain: bool
    kernel: str
    k_steps: int
    pair: Any

    def potential(self, p: np.ndarray) -> np.ndarray: ...
    def reference(self, p_bar: np.ndarray, v_bar: np.ndarray, tail: float,
                  phi: np.ndarray | None = None) -> entropic.FrozenReference: ...
    def solved(self, sol: entropic.EntropicSolution, ref: entropic.FrozenReference,
               v_bar: np.ndarray) -> Any: ...
    def correction(self, s: Any, ref: entropic.FrozenReference) -> np.ndarray: ...
    def blown_up(self, phi: np.ndarray, v_bar: np.ndarray) -> bool: ...


@dataclass(frozen=True)
class Iteration:
    """Progress of the solve, as passed to the callback.

    ``kind``: ``"anderson"`` (an Anderson iteration), ``"newton"`` (a Newton–Krylov step, which
    spent ``products`` Jacobian products and ``trials`` line-search evaluations), or
    ``"working"`` (a heartbeat inside a long iteration; the numbers are those of the last
    finished one). ``elapsed``: seconds since the solve started; ``remaining``: estimated
    seconds to convergence at the recent rate (NaN: unknown); ``budget_left``: seconds of the
    time budget left (inf: none); ``stage``: which attempt (e.g. a continuation stage)."""

    iteration: int
    residual: float
    marginal_error: float
    sinkhorn_iterations: int
    seconds: float
    kind: str = "anderson"
    elapsed: float = 0.0
    remaining: float = math.nan
    budget_left: float = math.inf
    stage: str = ""
    products: int = 0
    trials: int = 0


@dataclass
class Start:
    """Where an outer iteration starts."""

    p_bar: np.ndarray
    v_bar: np.ndarray
    log_b: np.ndarray
    # a solution given by the caller: its first sub-problem is solved to sinkhorn_tol, so that a
    # converged result is a fixed point (a loose first solve moves it by more than tol)
    solution: bool = False


@dataclass
class Outcome:
    """How an attempt ended. ``solved``/``ref`` are ``None`` only when the time budget ran out
    before the first evaluation (then ``unsolved`` is the start). ``lost``: a non-finite
    residual occurred (rational propagation lost precision)."""

    status: str
    solved: Any
    ref: entropic.FrozenReference | None
    v_bar: np.ndarray
    residual: float
    bridge: Discretised
    noise_start: float = 0.0  # first noise of a noise continuation (0: none)
    lost: bool = False
    budget_spent: bool = False
    unsolved: Start | None = None
    newton_steps: int = 0
    stop: str = ""  # why the loop stopped short of tol where retrying cannot help

    @property
    def log_domain(self) -> bool:
        return self.bridge.log_domain

    def finite(self) -> bool:
        """Whether the flow, V and the final scaling can start another attempt (log b may be
        -inf where ν has no mass)."""
        if self.solved is None:
            return False
        log_b = self.solved.sol.log_b
        return bool(np.all(np.isfinite(self.solved.p)) and np.all(np.isfinite(self.v_bar))
                    and not np.any(np.isnan(log_b) | (log_b == np.inf)))

    def start(self, noise: float | None = None) -> Start:
        """Where to start next; for another noise σ' the potentials are rescaled by
        (σ/σ')², their leading small-noise order (log-potentials and V are O(1/σ²))."""
        factor = 1.0 if noise is None else (self.bridge.problem.noise / noise) ** 2
        return Start(self.solved.p, factor * self.v_bar, factor * self.solved.sol.log_b)


@dataclass
class Run:
    """What every attempt of one solve shares: options, route, the history of accepted
    iterations (all attempts), the progress callback, the clock and a label of the stage."""

    options: SolverOptions
    route: str
    clock: Clock
    callback: Callable[[Iteration], None] | None = None
    history: list[dict[str, float]] = field(default_factory=list)
    stage: str = ""
    # "auto": end an attempt that stalls far from any fixed point ("far"), so that a
    # continuation can try; false when none follows (Anderson then goes on to max_iter)
    give_up_far: bool = True

    def record(self, kind: str, point: _Point, seconds: float, sinkhorn: int,
               products: int = 0, trials: int = 0) -> None:
        """Append an accepted iteration to the history and report it."""
        self.history.append({
            "residual": point.residual, "marginal_error": point.sol.marginal_error,
            "sinkhorn_iterations": float(sinkhorn), "seconds": seconds,
            "interaction_scale": point.scale, "kind": KINDS[kind],
            "products": float(products), "trials": float(trials)})
        self.report(kind, products, trials)

    def report(self, kind: str, products: int = 0, trials: int = 0) -> None:
        if self.callback is None or not self.history:
            return
        h = self.history[-1]
        residuals = [r["residual"] for r in self.history]
        seconds = [r["seconds"] for r in self.history]
        self.clock.mark()
        self.callback(Iteration(
            len(self.history), h["residual"], h["marginal_error"],
            int(h["sinkhorn_iterations"]), h["seconds"], kind, self.clock.elapsed(),
            remaining_estimate(residuals, seconds, self.options.tol), self.clock.left(),
            self.stage, products, trials))


def residual(p: np.ndarray, p_bar: np.ndarray, v: np.ndarray, v_bar: np.ndarray,
             horizon: float, grid_dim: int) -> float:
    r""":math:`\max_k\|p_k - \bar p_k\|_1 + T\max_k \sum_i p_{k,i}|V_{k,i} - \bar V_{k,i}|`."""
    axes = tuple(range(1, grid_dim + 1))
    r_p = np.abs(p - p_bar).sum(axis=axes).max()
    r_v = horizon * (p * np.abs(v - v_bar)).sum(axis=axes).max()
    return float(r_p + r_v)


@dataclass
class _Point:
    """One evaluation of G at (p̄, V̄): the solve and the new V."""

    p_bar: np.ndarray
    v_bar: np.ndarray
    ref: entropic.FrozenReference
    solved: Any
    v_new: np.ndarray
    residual: float
    optimal: bool
    scale: float
    floor: float = 0.0  # the residual's rounding floor (Gaussian steps: small_noise)

    @property
    def sol(self) -> entropic.EntropicSolution:
        return self.solved.sol

    @property
    def x(self) -> np.ndarray:
        return _pack(self.p_bar, self.v_bar, self.optimal)

    @property
    def f(self) -> np.ndarray:
        return _pack(self.solved.p, self.v_new, self.optimal) - self.x


def _pack(p: np.ndarray, v: np.ndarray, optimal: bool) -> np.ndarray:
    return np.concatenate([p.ravel(), v.ravel()]) if optimal else p.ravel().copy()


class _Map:
    """Evaluations of G for one discretised problem (warm-started Sinkhorn)."""

    def __init__(self, bridge: Discretised, run: Run) -> None:
        self.bridge, self.run = bridge, run
        problem = bridge.problem
        self.inner = entropic.solve_dense if run.route == "dense" else entropic.solve_operator
        self.interacting = not bridge.pair.is_zero
        self.optimal = run.options.method == "optimal" and self.interacting
        self.shape = (problem.steps + 1, *problem.grid.shape)
        self.sinkhorn = 0
        # Anderson-mixed Sinkhorn with the Gaussian steps (small noise: plain Sinkhorn is slow)
        self.accelerate = ({"anderson": small_noise.SINKHORN_ANDERSON}
                           if run.route != "dense" and bridge.kernel == "gaussian" else {})

    def unpack(self, x: np.ndarray, v_bar: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        n = math.prod(self.shape)
        p_bar = x[:n].reshape(self.shape)
        return p_bar, (x[n:].reshape(self.shape) if self.optimal else v_bar)

    def __call__(self, p_bar: np.ndarray, v_bar: np.ndarray, tol: float,
                 log_b: np.ndarray, check: bool = True) -> _Point | None:
        """G at (p̄, V̄) with Sinkhorn tolerance ``tol`` warm-started from ``log_b``; ``None``
        when ``check`` and the iterate has left what the chain represents (blown up)."""
        bridge, problem = self.bridge, self.bridge.problem
        phi = bridge.potential(p_bar)
        if check and bridge.blown_up(phi, v_bar):
            return None
        ref = bridge.reference(p_bar, v_bar, step_tail(tol, bridge.k_steps), phi)
        ref = dataclasses.replace(ref, tick=self.run.clock.tick)
        sol = self.inner(ref, problem.initial, problem.final, log_b, tol=tol,
                         max_iter=self.run.options.sinkhorn_max_iter, **self.accelerate)
        self.sinkhorn += sol.iterations
        solved = bridge.solved(sol, ref, v_bar)
        v_new = bridge.correction(solved, ref) if self.optimal else np.zeros_like(v_bar)
        res = (residual(solved.p, p_bar, v_new, v_bar, problem.horizon, problem.grid.dim)
               if self.interacting else 0.0)
        floor = small_noise.roundoff_floor(bridge.kernel, problem, solved.p, v_new)
        return _Point(p_bar, v_bar, ref, solved, v_new, res, self.optimal, bridge.scale, floor)


def iterate(bridge: Discretised, run: Run, start: Start) -> Outcome:
    """The outer iteration from ``start``; appends accepted iterations to ``run.history``."""
    g = _Map(bridge, run)
    state = _State()

    def beat(elapsed: float) -> None:
        run.report("working")

    run.clock.beat = beat
    try:
        status = _anderson(g, run, start, state)
        if status == "stalled_anderson":
            status = _newton(g, run, state)
    except BudgetSpent:
        status = "budget"
    finally:
        run.clock.beat = None
    return state.outcome(bridge, status, start)


class _State:
    """The points an attempt has seen: the last, the best (smallest finite residual) and the
    last finite one."""

    def __init__(self) -> None:
        self.last: _Point | None = None
        self.best: _Point | None = None
        self.last_finite: _Point | None = None
        self.lost = False
        self.newton_steps = 0
        self.stop = ""  # a MarginalStall message

    def see(self, point: _Point) -> None:
        self.last = point
        if math.isfinite(point.residual) and math.isfinite(point.sol.marginal_error):
            self.last_finite = point
            if self.best is None or point.residual < self.best.residual:
                self.best = point
        else:
            self.lost = True

    def outcome(self, bridge: Discretised, status: str, start: Start) -> Outcome:
        budget = status == "budget"
        if status in ("budget", "stalled_anderson", "newton_stalled", "max_iter", "stopped",
                      "far"):
            status = "not_converged"
        # converged: the last point; diverged: the last finite one; otherwise the best
        point = {"converged": self.last, "diverged": self.last_finite or self.last,
                 "stalled": self.last}.get(status, self.best or self.last)
        if point is None:
            return Outcome("not_converged", None, None, start.v_bar, math.inf, bridge,
                           lost=self.lost, budget_spent=budget, unsolved=start)
        res = point.residual if status != "diverged" or self.last is None else (
            self.last.residual)
        return Outcome(status, point.solved, point.ref, point.v_bar, res, bridge,
                       lost=self.lost, budget_spent=budget, newton_steps=self.newton_steps,
                       stop=self.stop)


def _anderson(g: _Map, run: Run, start: Start, state: _State) -> str:
    """Anderson mixing from ``start``. Returns ``"converged"``, ``"diverged"``, ``"stalled"``
    (Sinkhorn cannot reach working precision: the caller moves to the log domain),
    ``"stopped"`` (the marginal error stalled while the residual met tol:
    :class:`~mfbridge.solvers.stopping.MarginalStall`, message in ``state.stop``),
    ``"max_iter"``, ``"stalled_anderson"`` (no progress near a fixed point; Newton–Krylov
    should take over) or ``"far"`` (no progress with the best residual above
    :data:`NEWTON_FROM`: the continuations should try)."""
    options = run.options
    auto = options.outer == "auto"
    p_bar, v_bar, log_b = start.p_bar, start.v_bar, start.log_b
    mixer = AndersonMixer(options.anderson, options.damping)
    loose = g.interacting and not start.solution
    inner_tol = max(options.sinkhorn_tol, 1e-3) if loose else options.sinkhorn_tol
    first: float | None = None
    best, since_best, fraction = np.inf, 0, INNER_FRACTION
    stall = MarginalStall(options.tol, options.sinkhorn_tol, run.route)
    bests: list[float] = []
    # "newton": one evaluation from the start, then Newton-Krylov from it
    iterations = 1 if options.outer == "newton" and g.interacting else options.max_iter
    for _ in range(iterations):
        t0, sinkhorn0 = time.perf_counter(), g.sinkhorn
        point = g(p_bar, v_bar, inner_tol, log_b, check=state.last is not None)
        if point is None:
            near = state.best is not None and state.best.residual <= NEWTON_FROM
            return "stalled_anderson" if auto and near else "diverged"
        state.see(point)
        sol, res = point.sol, point.residual
        log_b = sol.log_b
        run.record("anderson", point, time.perf_counter() - t0, g.sinkhorn - sinkhorn0)
        first = res if first is None else first
        if not np.isfinite(res) or not np.isfinite(sol.marginal_error):
            return "diverged"
        if res > DIVERGENCE_FACTOR * max(first, 1.0):
            # Newton-Krylov only from a best iterate near a fixed point (a flow within L1
            # distance NEWTON_FROM of its image), never from a blown-up one
            near = state.best is not None and state.best.residual <= NEWTON_FROM
            return "stalled_anderson" if auto and near else "diverged"
        if (sol.iterations >= options.sinkhorn_max_iter and sol.marginal_error > inner_tol
                and not g.bridge.log_domain):
            return "stalled"  # the entropic problem cannot be solved to working precision
        if _done(point, options):
            return "converged"
        state.stop = stall.check(res, sol.marginal_error, inner_tol)
        if state.stop:
            return "stopped"
        if not g.interacting:
            continue  # Sinkhorn goes on from log_b
        if res < best:
            best, since_best = res, 0
        else:
            since_best += 1
        bests.append(best)
        verdict = handover(bests) if auto else ""
        if verdict == "far" and not run.give_up_far:
            verdict = ""  # no continuation follows: Anderson goes on
        if verdict:
            # near a fixed point Newton-Krylov takes over; far from any, this start is hopeless
            # and the caller's continuation (noise, interaction strength) should try instead
            return verdict
        if since_best >= STAGNATION and fraction > INNER_FRACTION_MIN:
            # inexact sub-solves enter V amplified like 1/sigma^2: at small noise the outer
            # iteration stagnates at the sub-solves' error, so solve them more exactly
            fraction, since_best = fraction * 1e-2, 0
        inner_tol = max(options.sinkhorn_tol, min(10 * fraction, fraction * res))
        x_next = mixer.next(point.x, point.x + point.f)
        p_bar, v_bar = g.unpack(x_next, v_bar)
    return "stalled_anderson" if iterations < options.max_iter else "max_iter"


def handover(bests: list[float]) -> str:
    """Whether ``"auto"`` ends Anderson, from ``bests`` (the best residual after each iteration).

    Let *paused* be the iterations since the last new best and *gained* the factor the best fell
    over the last :data:`SLOW_WINDOW` iterations. Near a fixed point (best residual at most
    :data:`NEWTON_FROM`) Newton–Krylov takes over (``"stalled_anderson"``) when paused reaches
    :data:`STALL_WINDOW`, or when gained is below 1/:data:`SLOW_FACTOR` and paused reaches
    :data:`PAUSE`. Farther out the attempt ends (``"far"``: a continuation should try) when paused
    reaches :data:`SLOW_WINDOW` or gained is below 1/:data:`FAR_FACTOR`. Returns ``""`` while
    Anderson should go on."""
    if len(bests) <= STALL_WINDOW or bests[-1] <= 0.0:
        return ""
    best = bests[-1]
    paused = 0
    while paused + 1 < len(bests) and bests[-2 - paused] == best:
        paused += 1
    gained = bests[-1 - SLOW_WINDOW] / best if len(bests) > SLOW_WINDOW else math.inf
    if best <= NEWTON_FROM:
        slow = gained < 1.0 / SLOW_FACTOR and paused >= PAUSE
        return "stalled_anderson" if paused >= STALL_WINDOW or slow else ""
    return "far" if paused >= SLOW_WINDOW or gained < 1.0 / FAR_FACTOR else ""


def _newton(g: _Map, run: Run, state: _State) -> str:
    """Newton–Krylov from the best point so far, re-evaluated with exact sub-solves."""
    options = run.options
    if state.best is None:
        return "diverged"
    tol = options.sinkhorn_tol
    base = state.best
    t0, sinkhorn0 = time.perf_counter(), g.sinkhorn
    point = g(base.p_bar, base.v_bar, tol, base.sol.log_b, check=False)
    assert point is not None
    state.see(point)
    run.record("newton", point, time.perf_counter() - t0, g.sinkhorn - sinkhorn0)
    if _done(point, options):
        return "converged"
    current = {"point": point, "t0": time.perf_counter(), "sinkhorn0": g.sinkhorn}
    stall = MarginalStall(options.tol, options.sinkhorn_tol, run.route)
    target = math.sqrt(point.f @ point.f) * options.tol / max(point.residual, 1e-300)

    def evaluate(x: np.ndarray) -> _Point:
        p_bar, v_bar = g.unpack(x, current["point"].v_bar)
        trial = g(p_bar, v_bar, tol, current["point"].sol.log_b)
        return trial if trial is not None else _Infinite(x)  # type: ignore[return-value]

    def probe(x: np.ndarray) -> np.ndarray:
        p_bar, v_bar = g.unpack(x, current["point"].v_bar)
        probe_point = g(p_bar, v_bar, tol, current["point"].sol.log_b, check=False)
        assert probe_point is not None
        return probe_point.f

    def accept(x: np.ndarray, new: _Point, products: int, trials: int) -> bool:
        state.see(new)
        state.newton_steps += 1
        run.record("newton", new, time.perf_counter() - current["t0"],
                   g.sinkhorn - current["sinkhorn0"], products, trials)
        current.update(point=new, t0=time.perf_counter(), sinkhorn0=g.sinkhorn)
        state.stop = stall.check(new.residual, new.sol.marginal_error, tol)
        return _done(new, options) or bool(state.stop)

    result = newton_krylov(evaluate, probe, point.x, point, accept,
                           max_steps=options.max_iter, target=target, restart=KRYLOV_RESTART,
                           max_products=KRYLOV_PRODUCTS)
    state.last = result.point
    if _done(result.point, options):
        return "converged"
    if state.stop:
        return "stopped"
    return "newton_stalled" if result.status == "stalled" else "max_iter"


class _Infinite:
    """A rejected trial (the iterate blew up): infinite residual."""

    def __init__(self, x: np.ndarray) -> None:
        self.f = np.full_like(x, np.inf)


def _done(point: _Point, options: SolverOptions) -> bool:
    """Converged: the residual (or its rounding floor, if larger) and the L1 error of the
    initial marginal both at most tol."""
    return (point.residual <= max(options.tol, point.floor)
            and point.sol.marginal_error <= options.tol)
