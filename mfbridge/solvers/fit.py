r"""Fitting the model's parameters to a series of snapshots, and comparing fitted models.

For N exchangeable particles observed at :math:`t_0 < \dots < t_m`, the probability that the
empirical law passes close to the observed snapshots is
:math:`\approx \exp(-N\sum_k J_\theta(\rho_{t_k}\to\rho_{t_{k+1}}))` (the rate function is
additive over time intervals given the marginals at the split times: Dawson & Gärtner,
Stochastics 1987). So :math:`\ell(\theta) = -N\sum_k J_\theta` is an approximate log-likelihood
of the parameters θ, its maximiser :math:`\hat\theta` (the minimiser of :math:`\sum_k J`) a
large-deviation estimate, and

.. math::

    \{\theta : 2N(\textstyle\sum_k J_\theta - \sum_k J_{\hat\theta}) \le \chi^2_{p,\,0.95}\}

an approximate 95% confidence region (Wilks, "The large-sample distribution of the likelihood
ratio for testing composite hypotheses", Ann. Math. Statist. 9, 1938). It is asymptotic in N and
assumes the whole population is observed at every time (not a fresh sub-sample each time), and
a density estimate of the snapshots adds its own bias (see the notes on smoothing in the
documentation).

The minimisation uses the envelope-theorem gradient of every segment's J
(:func:`mfbridge.solvers.sensitivity.cost_gradient`: one pass over the flow, no re-solve) with
scipy's L-BFGS-B in coordinates scaled to the bounds (Byrd, Lu, Nocedal & Zhu, SIAM J. Sci. Comput.
16, 1995); every solve starts from the previous flow. At :math:`\hat\theta` the Hessian of
:math:`\sum_k J` is the central difference of the gradient; it gives the Wald intervals
:math:`\hat\theta_i \pm z\sqrt{((NH)^{-1})_{ii}}` and the scale of the profiles: for each parameter,
:math:`\min_{\text{others}} 2N(\sum_k J - \sum_k J_{\hat\theta})` along a line of values around
:math:`\hat\theta_i`, whose crossings of :math:`\chi^2_{1,0.95}` are the profile interval and of
:math:`\chi^2_{p,0.95}` the projection of the joint region.

No files, no Hydra: the command line (``mfbridge fit``) writes the fit folder.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable, Sequence
from concurrent.futures import Executor
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import scipy.optimize
import scipy.stats

from mfbridge.errors import ConvergenceWarning, InputError, SmoothingWarning, is_real_number
from mfbridge.model.parameters import check_names, numeric_parameters, with_parameters
from mfbridge.model.series import SeriesProblem
from mfbridge.solvers.comparison import FitSummary
from mfbridge.solvers.fixed_point import SolverOptions
from mfbridge.solvers.sensitivity import cost_gradient
from mfbridge.solvers.series import SeriesResult, solve_series

__all__ = ["Evaluation", "FitOptions", "FitParameter", "FitResult", "Interval", "Profile",
           "fit_series"]




@dataclass(frozen=True)
class FitParameter:
    """A model parameter to fit, by its config name (``interaction.strength``, ``noise``...),
    with bounds ``lower < upper`` and an optional starting value (default: the problem's own
    value if inside the bounds, else the middle)."""

    name: str
    lower: float
    upper: float
    initial: float | None = None


@dataclass(frozen=True)
class FitOptions:
    """How to fit.

    * ``solver``: options of every bridge solve;
    * ``max_evaluations``: limit of the L-BFGS-B search (solves of the whole series);
    * ``precision``: the statistic 2N·ΣJ is wanted to this absolute precision: the search
      stops when an iteration lowers it by less than a tenth of it, a profile's
      re-minimisation when by less than it (L-BFGS-B's ``ftol``, scaled by ΣJ at the start);
      ``gtol``: or when every scaled gradient component (∂ΣJ/∂x, x = θ in units of
      ``first_step`` times its bound width) is below it;
    * ``first_step``: the search's first step moves each parameter by at most this fraction of
      its bound width (L-BFGS-B's first step has unit length in its coordinates; 1 would jump
      to a bound, where a solve may be slow or hard);
    * ``level``: confidence level of the intervals (0.95);
    * ``profile_offsets``: profile points at θ̂_i + c·se_i for these c (se_i: the Hessian's
      standard error), clipped to the bounds; ``profile``: compute profiles at all;
    * ``hessian_step``: step of the central differences, as a fraction of each bound width;
    * ``profile_max_evaluations``: limit of solves of each re-minimisation over the other
      parameters (Newton steps with the Hessian at θ̂).
    """

    solver: SolverOptions = field(default_factory=SolverOptions)
    max_evaluations: int = 60
    precision: float = 1e-3
    gtol: float = 1e-6
    first_step: float = 0.1
    level: float = 0.95
    profile: bool = True
    profile_offsets: tuple[float, ...] = (-3.0, -2.0, -1.0, 1.0, 2.0, 3.0)
    hessian_step: float = 1e-3
    profile_max_evaluations: int = 8

    def __post_init__(self) -> None:
        if not isinstance(self.solver, SolverOptions):
            raise InputError(f"solver must be a SolverOptions, got {self.solver!r}")
        checks = [
            ("max_evaluations", isinstance(self.max_evaluations, int)
             and self.max_evaluations >= 1),
            ("gtol", is_real_number(self.gtol) and self.gtol > 0),
            ("first_step", is_real_number(self.first_step) and 0 < self.first_step <= 1),
            ("precision", is_real_number(self.precision) and self.precision > 0),
            ("level", is_real_number(self.level) and 0 < self.level < 1),
            ("hessian_step", is_real_number(self.hessian_step) and 0 < self.hessian_step < 0.5),
            ("profile_offsets", all(is_real_number(c) and c != 0 for c in self.profile_offsets)),
            ("profile_max_evaluations", isinstance(self.profile_max_evaluations, int)
             and self.profile_max_evaluations >= 1),
        ]
        for name, ok in checks:
            if not ok:
                raise InputError(f"fit option {name} has an invalid value {getattr(self, name)!r}")


@dataclass
class Evaluation:
    """One solve of the whole series at parameter values ``values``: ΣJ (``cost``), each
    segment's J, the envelope gradient of ΣJ, the worst segment status, outer iterations, time.
    ``kind``: ``search``, ``hessian``, ``newton`` or ``profile <name>``."""

    index: int
    kind: str
    values: dict[str, float]
    cost: float
    segment_costs: list[float]
    gradient: dict[str, float]
    status: str
    iterations: int
    seconds: float


@dataclass
class Interval:
    """An approximate confidence interval of one parameter.

    ``method``: ``profile`` (profile likelihood, χ²₁ threshold), ``joint`` (projection of the
    joint region, χ²_p threshold: simultaneous for all p parameters) or ``hessian`` (Wald,
    θ̂ ± z·se). ``lower_open``/``upper_open``: the threshold was not crossed before the bound
    (or the profile's last point), so the interval reaches at least that far.
    """

    name: str
    method: str
    level: float
    estimate: float
    lower: float
    upper: float
    lower_open: bool = False
    upper_open: bool = False


@dataclass
class Profile:
    """ΣJ minimised over the other parameters along values of ``name``: ``statistic`` is
    2N(ΣJ − ΣJ(θ̂)); ``others`` the re-optimised values of the other parameters."""

    name: str
    values: np.ndarray
    cost: np.ndarray
    statistic: np.ndarray
    others: dict[str, np.ndarray]


@dataclass
class FitResult:
    """The outcome of :func:`fit_series`.

    ``estimate``: θ̂ by name; ``cost``: ΣJ(θ̂); ``population``: N; ``status``: ``converged``
    or ``not_converged`` (with ``message``); ``hessian`` (p, p) of ΣJ at θ̂ in the order of
    ``parameters``; ``standard_errors`` from (N H)⁻¹; ``intervals``, ``profiles``; every solve in
    ``evaluations``; ``bridge``: the series solved at θ̂; ``optimizer``: L-BFGS-B's report.
    """

    parameters: list[FitParameter]
    population: int
    estimate: dict[str, float]
    cost: float
    status: str
    message: str
    hessian: np.ndarray
    standard_errors: dict[str, float]
    intervals: list[Interval]
    profiles: list[Profile]
    evaluations: list[Evaluation]
    bridge: SeriesResult
    optimizer: dict[str, Any]
    seconds: float
    level: float

    @property
    def names(self) -> list[str]:
        return [p.name for p in self.parameters]

    @property
    def neg_log_likelihood(self) -> float:
        """N·ΣJ(θ̂): minus the leading-order log-likelihood at the estimate."""
        return self.population * self.cost

    def summary(self) -> FitSummary:
        """What a model comparison needs (:func:`compare_models`)."""
        return FitSummary(population=self.population, cost=self.cost,
                          parameters=len(self.parameters), status=self.status,
                          times=tuple(float(t) for t in self.bridge.problem.times))

    def interval(self, name: str, method: str = "profile") -> Interval:
        for iv in self.intervals:
            if iv.name == name and iv.method == method:
                return iv
        raise InputError(f"no {method} interval of {name!r}; parameters: {self.names}")


def _check_population(population: Any) -> int:
    if (isinstance(population, bool) or not isinstance(population, (int, np.integer))
            or population < 1):
        raise InputError(f"the population size N must be a positive integer (the number of "
                         f"particles observed at each time), got {population!r}")
    return int(population)


def _check_parameters(problem: SeriesProblem, parameters: Sequence[FitParameter]
                      ) -> list[FitParameter]:
    if not parameters:
        raise InputError("name at least one parameter to fit, e.g. "
                         "FitParameter('interaction.strength', 0, 5)")
    params = []
    for p in parameters:
        if not isinstance(p, FitParameter):
            raise InputError(f"parameters must be FitParameter(name, lower, upper), got {p!r}")
        params.append(p)
    check_names(problem, [p.name for p in params])
    current = numeric_parameters(problem)
    out = []
    for p in params:
        if not (is_real_number(p.lower) and is_real_number(p.upper)):
            raise InputError(f"the bounds of {p.name} must be finite numbers, got "
                             f"[{p.lower!r}, {p.upper!r}]")
        if not p.lower < p.upper:
            raise InputError(f"the bounds of {p.name} are reversed or empty: lower {p.lower:g} "
                             f"must be below upper {p.upper:g}")
        initial = p.initial
        if initial is None:
            value = current[p.name]
            initial = value if p.lower <= value <= p.upper else 0.5 * (p.lower + p.upper)
        elif not (is_real_number(initial) and p.lower <= initial <= p.upper):
            raise InputError(f"the starting value {initial!r} of {p.name} is outside its bounds "
                             f"[{p.lower:g}, {p.upper:g}]")
        out.append(FitParameter(p.name, float(p.lower), float(p.upper), float(initial)))
    # the model must be buildable at both bounds (e.g. a range must stay positive)
    for p in out:
        for bound in (p.lower, p.upper):
            try:
                with_parameters(problem, {p.name: bound})
            except InputError as exc:
                raise InputError(f"the bound {bound:g} of {p.name} is not an allowed value: "
                                 f"{exc}") from exc
    return out


class _Evaluator:
    """Solves the series at given parameter values, caching, warm-starting and recording."""

    def __init__(self, problem: SeriesProblem, params: list[FitParameter],
                 options: FitOptions, executor: Executor | None,
                 callback: Callable[[Evaluation], None] | None) -> None:
        self.problem = problem
        self.params = params
        self.names = [p.name for p in params]
        self.lower = np.array([p.lower for p in params])
        self.width = np.array([p.upper - p.lower for p in params])
        self.options = options
        self.executor = executor
        self.callback = callback
        self.evaluations: list[Evaluation] = []
        self.cache: dict[tuple[float, ...], Evaluation] = {}
        self.last: SeriesResult | None = None
        self.best: tuple[float, tuple[float, ...], SeriesResult] | None = None

    @property
    def unit(self) -> np.ndarray:
        """θ per unit of the search coordinate x: ``first_step`` of each bound width (L-BFGS-B's
        first step has unit length in x)."""
        return self.options.first_step * self.width

    @property
    def span(self) -> float:
        """The upper bound of x (its lower bound is 0)."""
        return 1.0 / self.options.first_step

    def theta(self, x: np.ndarray) -> np.ndarray:
        return np.minimum(self.lower + np.clip(x, 0.0, self.span) * self.unit,
                          self.lower + self.width)

    def scaled(self, theta: np.ndarray) -> np.ndarray:
        return (np.asarray(theta) - self.lower) / self.unit

    def solve(self, theta: np.ndarray) -> SeriesResult:
        values = dict(zip(self.names, map(float, theta), strict=True))
        problem = with_parameters(self.problem, values)
        # the envelope gradient needs the fixed point's own potentials: no direct-solver
        # fallback (mfbridge.solvers.cross_check), a failed evaluation stays failed
        solver = replace(self.options.solver, cross_check="off")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            result = solve_series(problem, solver, warm_start=self.last,
                                  executor=self.executor)
            if result.status != "converged" and self.last is not None:
                result = solve_series(problem, solver, executor=self.executor)
        return result

    def __call__(self, theta: np.ndarray, kind: str) -> Evaluation:
        key = tuple(float(v) for v in np.round(theta, 14))
        if key in self.cache:
            return self.cache[key]
        start = time.perf_counter()
        result = self.solve(np.asarray(key))
        cost, grad = 0.0, dict.fromkeys(self.names, 0.0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            for seg_problem, seg in zip(result.problem.segments(), result.segments, strict=True):
                j, g = cost_gradient(seg_problem, seg, self.names)
                cost += j
                for name in self.names:
                    grad[name] += g[name]
        if result.status == "converged":
            self.last = result
            if self.best is None or cost < self.best[0]:
                self.best = (cost, key, result)
        ev = Evaluation(index=len(self.evaluations) + 1, kind=kind,
                        values=dict(zip(self.names, key, strict=True)), cost=cost,
                        segment_costs=result.costs, gradient=grad, status=result.status,
                        iterations=int(sum(r.iterations for r in result.segments)),
                        seconds=time.perf_counter() - start)
        self.evaluations.append(ev)
        self.cache[key] = ev
        if self.callback is not None:
            self.callback(ev)
        return ev

    def scaled_objective(self, kind: str) -> Callable[[np.ndarray], tuple[float, np.ndarray]]:
        """ΣJ and its gradient in the coordinates x = (θ − lower)/unit."""

        def fun(x: np.ndarray) -> tuple[float, np.ndarray]:
            ev = self(self.theta(np.asarray(x)), kind)
            return ev.cost, self.gradient_vector(ev) * self.unit

        return fun

    def gradient_vector(self, ev: Evaluation) -> np.ndarray:
        return np.array([ev.gradient[n] for n in self.names])


def _minimise(fun: Callable[[np.ndarray], tuple[float, np.ndarray]], x0: np.ndarray,
              span: float, max_evaluations: int, gtol: float, ftol: float
              ) -> scipy.optimize.OptimizeResult:
    return scipy.optimize.minimize(
        fun, np.clip(x0, 0.0, span), jac=True, method="L-BFGS-B",
        bounds=[(0.0, span)] * len(x0),
        options={"maxfun": max_evaluations, "gtol": gtol, "ftol": ftol, "maxls": 20},
    )


def _hessian(evaluator: _Evaluator, theta: np.ndarray, options: FitOptions) -> np.ndarray:
    """Central differences of the envelope gradient (one-sided at a bound), symmetrised."""
    p = len(theta)
    h = np.zeros((p, p))
    upper = evaluator.lower + evaluator.width
    for i in range(p):
        step = options.hessian_step * evaluator.width[i]
        plus, minus = theta.copy(), theta.copy()
        plus[i] = min(theta[i] + step, upper[i])
        minus[i] = max(theta[i] - step, evaluator.lower[i])
        gp = evaluator.gradient_vector(evaluator(plus, "hessian"))
        gm = evaluator.gradient_vector(evaluator(minus, "hessian"))
        h[i] = (gp - gm) / (plus[i] - minus[i])
    return 0.5 * (h + h.T)


def _free(evaluator: _Evaluator, theta: np.ndarray, grad: np.ndarray) -> np.ndarray:
    """Parameters not held at a bound by the gradient (KKT: at the lower bound with ∂ΣJ > 0
    or at the upper bound with ∂ΣJ < 0 the minimum is on the bound)."""
    upper = evaluator.lower + evaluator.width
    tiny = 1e-12 * evaluator.width
    at_lower = (theta <= evaluator.lower + tiny) & (grad > 0)
    at_upper = (theta >= upper - tiny) & (grad < 0)
    return ~(at_lower | at_upper)


def _newton_polish(evaluator: _Evaluator, theta: np.ndarray, ev: Evaluation, h: np.ndarray,
                   se: np.ndarray) -> tuple[np.ndarray, Evaluation]:
    """One Newton step θ − H⁻¹g on the free parameters, kept if its gradient is smaller.

    L-BFGS-B's line search compares ΣJ values, whose derivative the envelope gradient matches
    only to the discretisation error, so the search may stop where the gradient is not yet zero;
    the zero of the gradient is the estimate the Hessian and the intervals refer to."""
    grad = evaluator.gradient_vector(ev)
    free = _free(evaluator, theta, grad)
    if not free.any() or not np.all(np.isfinite(se[free])):
        return theta, ev
    try:
        step_free = -np.linalg.solve(h[np.ix_(free, free)], grad[free])
    except np.linalg.LinAlgError:
        return theta, ev
    if not np.any(np.abs(step_free) > 0.01 * se[free]):
        return theta, ev
    trial = theta.copy()
    trial[free] = np.clip(theta[free] + step_free, evaluator.lower[free],
                          (evaluator.lower + evaluator.width)[free])
    ev_trial = evaluator(trial, "newton")
    g_trial = evaluator.gradient_vector(ev_trial)
    if (ev_trial.status == "converged"
            and np.linalg.norm((g_trial * se)[free]) < np.linalg.norm((grad * se)[free])):
        return trial, ev_trial
    return theta, ev


def _standard_errors(h: np.ndarray, population: int) -> np.ndarray:
    try:
        eig = np.linalg.eigvalsh(h)
        if not np.all(eig > 0):
            return np.full(len(h), np.nan)
        cov = np.linalg.inv(population * h)
    except np.linalg.LinAlgError:
        return np.full(len(h), np.nan)
    return np.sqrt(np.diag(cov))


def _crossings(values: np.ndarray, stat: np.ndarray, centre: float, threshold: float
               ) -> tuple[float, float, bool, bool]:
    """Where the signed root sign(θ − θ̂)·√stat crosses ±√threshold, by linear interpolation
    (the signed root is linear in θ where ΣJ is quadratic). Open ends when not crossed."""
    order = np.argsort(values)
    v, s = values[order], np.maximum(stat[order], 0.0)
    root = np.sign(v - centre) * np.sqrt(s)
    target = math.sqrt(threshold)
    ends = []
    for sign in (-1.0, 1.0):
        side = (v < centre) if sign < 0 else (v > centre)
        xs = np.concatenate([[centre], v[side]])
        rs = np.concatenate([[0.0], root[side]])
        idx = np.argsort(np.abs(xs - centre))
        xs, rs = xs[idx], rs[idx]
        found = None
        for a in range(len(xs) - 1):
            ra, rb = sign * rs[a], sign * rs[a + 1]
            if ra < target <= rb:
                found = xs[a] + (target - ra) * (xs[a + 1] - xs[a]) / (rb - ra)
                break
        ends.append((found, xs[-1]))
    (lo, lo_last), (hi, hi_last) = ends
    return (lo if lo is not None else lo_last, hi if hi is not None else hi_last,
            lo is None, hi is None)


def _reminimise(evaluator: _Evaluator, i: int, value: float, theta_hat: np.ndarray,
                h: np.ndarray, population: int, options: FitOptions, kind: str
                ) -> tuple[np.ndarray, float]:
    """min ΣJ over the other parameters with parameter i held at ``value``: Newton steps with
    the Hessian at θ̂ on the envelope gradient, from the quadratic model's optimum, each kept
    only if ΣJ decreases (else halved), until the predicted decrease of the statistic 2N·ΣJ is
    below ``options.precision`` (bounds: parameters held there by the gradient are frozen)."""
    others = np.array([j for j in range(len(theta_hat)) if j != i])
    lower, upper = evaluator.lower, evaluator.lower + evaluator.width
    h_oo = h[np.ix_(others, others)]
    theta = theta_hat.copy()
    theta[i] = value
    try:
        theta[others] -= np.linalg.solve(h_oo, h[others, i] * (value - theta_hat[i]))
        np.linalg.cholesky(h_oo)
    except np.linalg.LinAlgError:
        h_oo = np.diag(np.maximum(np.abs(np.diag(h_oo)), 1e-12))
    theta = np.clip(theta, lower, upper)
    ev = evaluator(theta, kind)
    for _ in range(options.profile_max_evaluations - 1):
        grad = evaluator.gradient_vector(ev)
        free = _free(evaluator, theta, grad)[others]
        if not free.any():
            break
        idx = others[free]
        step = -np.linalg.solve(h[np.ix_(idx, idx)] if np.all(free) else
                                h_oo[np.ix_(free, free)], grad[idx])
        if 2.0 * population * 0.5 * float(-grad[idx] @ step) < options.precision:
            break
        for _ in range(6):
            trial = theta.copy()
            trial[idx] = np.clip(theta[idx] + step, lower[idx], upper[idx])
            ev_trial = evaluator(trial, kind)
            if ev_trial.cost < ev.cost:
                theta, ev = trial, ev_trial
                break
            step = step / 2.0
        else:
            break
    return theta, ev.cost


def _profile(evaluator: _Evaluator, i: int, theta_hat: np.ndarray, cost_hat: float,
             se: float, h: np.ndarray, population: int, options: FitOptions) -> Profile:
    name = evaluator.names[i]
    lower, upper = evaluator.lower[i], evaluator.lower[i] + evaluator.width[i]
    scale = se if np.isfinite(se) and se > 0 else 0.05 * evaluator.width[i]
    points = sorted({float(np.clip(theta_hat[i] + c * scale, lower, upper))
                     for c in options.profile_offsets} - {float(theta_hat[i])})
    others = [j for j in range(len(theta_hat)) if j != i]
    values, costs, other_values = [], [], {evaluator.names[j]: [] for j in others}
    for value in points:
        if others:
            theta, cost = _reminimise(evaluator, i, value, theta_hat, h, population, options,
                                      f"profile {name}")
        else:
            theta = theta_hat.copy()
            theta[i] = value
            cost = evaluator(theta, f"profile {name}").cost
        values.append(value)
        costs.append(cost)
        for j in others:
            other_values[evaluator.names[j]].append(float(theta[j]))
    values_a = np.array(values)
    costs_a = np.array(costs)
    return Profile(name=name, values=values_a, cost=costs_a,
                   statistic=2.0 * population * (costs_a - cost_hat),
                   others={k: np.array(v) for k, v in other_values.items()})


# kernel widths (root mean variance per axis) that differ by more than this factor between
# snapshots are reported: on the synthetic beads of experiments/reports/bead_fit.md, Scott's
# rule (widths 0.025 to 0.096 µm, factor 3.8) moved the fitted core strength from 1.497 to 1.54
# (+2.5 standard errors; truth 1.5) while one kernel of 0.04 µm at every time did not
KERNEL_RATIO = 1.1


def smoothing_note(problem: SeriesProblem) -> str | None:
    """A warning text when the snapshots' density estimates used kernels of different widths
    (see :data:`KERNEL_RATIO`), else ``None``. A kernel adds its covariance to its snapshot;
    the same kernel at every time shifts every snapshot alike, while kernels that grow with
    the spread (bandwidth rules) add a spreading of their own that the fitted model must
    explain (DESIGN.md §8, "Fitting to sampled snapshots: smoothing bias")."""
    widths = {k: float(np.sqrt(np.trace(c) / len(c))) for k, c in enumerate(problem.kernels)
              if c is not None}
    if len(widths) < 2 or max(widths.values()) <= KERNEL_RATIO * min(widths.values()):
        return None
    listing = ", ".join(f"{w:.3g} at t = {problem.snapshots[k].time:g}"
                        for k, w in widths.items())
    return (f"the snapshots were smoothed by kernels of different widths ({listing}): each "
            "adds its own variance, so the fitted model must explain a spreading the population "
            "did not do (an interaction fitted this way is biased); give every snapshot the "
            "same bandwidth, small against the changes being fitted, or method=histogram")


def fit_series(
    problem: SeriesProblem,
    parameters: Sequence[FitParameter],
    population: int,
    options: FitOptions | None = None,
    callback: Callable[[Evaluation], None] | None = None,
    executor: Executor | None = None,
) -> FitResult:
    r"""Fit the named model parameters to the snapshots of ``problem`` (see the module
    docstring): minimise :math:`\sum_k J_\theta` over the box of bounds, then the Hessian,
    standard errors, profiles and intervals for a population of ``population`` particles.

    ``callback`` receives every :class:`Evaluation` (progress); ``executor`` runs the segments
    of each solve in parallel (:func:`mfbridge.solvers.series.solve_series`). Everything the user
    can get wrong (names, bounds, N, options) is refused before the first solve.
    """
    start = time.perf_counter()
    options = options or FitOptions()
    if not isinstance(options, FitOptions):
        raise InputError(f"options must be a FitOptions, got {options!r}")
    if not isinstance(problem, SeriesProblem):
        raise InputError(f"problem must be a SeriesProblem, got {type(problem).__name__}")
    population = _check_population(population)
    params = _check_parameters(problem, parameters)
    evaluator = _Evaluator(problem, params, options, executor, callback)
    x0 = evaluator.scaled(np.array([p.initial for p in params]))
    first = evaluator(evaluator.theta(x0), "search")
    ftol = 0.1 * options.precision / (2.0 * population * max(abs(first.cost), 1.0))
    out = _minimise(evaluator.scaled_objective("search"), x0, evaluator.span,
                    options.max_evaluations, options.gtol, ftol)
    theta_hat = evaluator.theta(out.x)
    ev_hat = evaluator(theta_hat, "search")
    optimizer = {"success": bool(out.success), "message": str(out.message),
                 "iterations": int(out.nit), "evaluations": int(out.nfev)}
    h = _hessian(evaluator, theta_hat, options)
    se = _standard_errors(h, population)
    theta_hat, ev_hat = _newton_polish(evaluator, theta_hat, ev_hat, h, se)
    names = evaluator.names
    estimate = dict(zip(names, map(float, theta_hat), strict=True))
    p = len(params)
    q1 = float(scipy.stats.chi2.ppf(options.level, 1))
    qp = float(scipy.stats.chi2.ppf(options.level, p))
    z = math.sqrt(q1)
    intervals: list[Interval] = []
    profiles: list[Profile] = []
    for i, name in enumerate(names):
        lo_b, hi_b = params[i].lower, params[i].upper
        if np.isfinite(se[i]):
            intervals.append(Interval(name, "hessian", options.level, estimate[name],
                                      max(estimate[name] - z * se[i], lo_b),
                                      min(estimate[name] + z * se[i], hi_b),
                                      estimate[name] - z * se[i] < lo_b,
                                      estimate[name] + z * se[i] > hi_b))
        else:
            intervals.append(Interval(name, "hessian", options.level, estimate[name],
                                      math.nan, math.nan))
        if not options.profile:
            continue
        prof = _profile(evaluator, i, theta_hat, ev_hat.cost, se[i], h, population, options)
        profiles.append(prof)
        for method, threshold in (("profile", q1), ("joint", qp)):
            lo, hi, lo_open, hi_open = _crossings(prof.values, prof.statistic, estimate[name],
                                                  threshold)
            intervals.append(Interval(name, method, options.level, estimate[name], lo, hi,
                                      lo_open, hi_open))
    failed = [ev for ev in evaluator.evaluations if ev.status != "converged"]
    status, notes = "converged", []
    smoothing = smoothing_note(problem)
    if smoothing is not None:
        notes.append(smoothing)
    if not (out.success or "ABNORMAL" in str(out.message)):
        status = "not_converged"
        notes.append(f"the search stopped: {out.message}")
    if failed:
        status = "not_converged"
        notes.append(f"{len(failed)} of {len(evaluator.evaluations)} solves did not converge "
                     f"(first: evaluation {failed[0].index}, {failed[0].status})")
    if not np.all(np.isfinite(se)):
        notes.append("the Hessian of ΣJ at the estimate is not positive definite: no Wald "
                     "intervals (a parameter may be unidentifiable or at a bound)")
    message = (f"fitted {', '.join(names)} in {len(evaluator.evaluations)} solves: "
               f"N·ΣJ = {population * ev_hat.cost:.6g}")
    if notes:
        message += "; " + "; ".join(notes)
    if status != "converged":
        warnings.warn(ConvergenceWarning(message), stacklevel=2)
    elif smoothing is not None:
        warnings.warn(SmoothingWarning(smoothing), stacklevel=2)
    key = tuple(float(v) for v in np.round(theta_hat, 14))
    bridge = evaluator.best[2] if (evaluator.best is not None
                                   and evaluator.best[1] == key) else evaluator.solve(theta_hat)
    return FitResult(
        parameters=params, population=population, estimate=estimate, cost=ev_hat.cost,
        status=status, message=message, hessian=h,
        standard_errors=dict(zip(names, map(float, se), strict=True)), intervals=intervals,
        profiles=profiles, evaluations=evaluator.evaluations, bridge=bridge,
        optimizer=optimizer, seconds=time.perf_counter() - start, level=options.level,
    )
