"""Options of the fixed-point solver (:func:`mfbridge.solvers.fixed_point.solve_bridge`).

Kept apart from the loop so that the solver's modules can share them; configs name the class
by its historical path ``mfbridge.solvers.fixed_point.SolverOptions``, which re-exports it.
"""

from __future__ import annotations

from dataclasses import dataclass

from mfbridge.errors import InputError, is_real_number, unknown_name
from mfbridge.solvers.small_noise import KERNELS

METHODS = ("optimal", "frozen")
PROPAGATIONS = ("auto", "rational", "log")
COUPLING_MAX_CELLS = 4096
ROUTES = ("auto", "operator", "dense")
OUTER_METHODS = ("auto", "anderson", "newton")
CROSS_CHECKS = ("auto", "always", "off")  # mfbridge.solvers.cross_check.MODES
# seconds: long enough for every documented run (3D 32^3 x 100 steps: 53 s), short enough that a
# run that cannot converge answers within minutes
DEFAULT_TIME_BUDGET = 600.0
MAX_STARTS = 64


@dataclass(frozen=True)
class SolverOptions:
    """How to solve.

    * ``method``: ``"optimal"`` (minimiser of J, with the correction V) or ``"frozen"``
      (self-consistent frozen-reference bridge, V = 0);
    * ``route``: ``"operator"`` (kernel applied by time steps), ``"dense"`` (n × n kernel, POT
      Sinkhorn, also returns the coupling) or ``"auto"`` (dense for grids of at most
      ``dense_max_cells`` cells, else operator);
    * ``tol``: stop when the self-consistency residual
      :math:`\\max_k\\|p_k - \\bar p_k\\|_1 + T\\max_k \\sum_i p_{k,i}|V_{k,i} - \\bar V_{k,i}|`
      and the L1 error of the initial marginal are both below it;
    * ``outer``: the outer method (:mod:`mfbridge.solvers.outer_loop`): ``"auto"`` (Anderson
      mixing while it makes progress, then Newton–Krylov steps that each decrease the residual
      norm, from the best iterate), ``"anderson"`` (Anderson only) or ``"newton"``
      (Newton–Krylov from the start);
    * ``anderson`` (history depth, 0 = plain iteration) and ``damping`` (mixing weight in (0, 1]);
    * ``time_budget``: wall-clock seconds for the whole solve (every attempt, continuation and
      start); when spent the solve returns its best iterate with status ``"not_converged"``
      (``None``: no limit);
    * ``sinkhorn_tol``, ``sinkhorn_max_iter``: the entropic sub-problem's own stopping rule (its
      tolerance is loosened to 1e-4 × the outer residual, at most 1e-3, while the outer loop
      is far out, and tightened 100-fold whenever the outer residual stalls);
    * ``propagation``: how time steps are applied in the sweeps: ``"rational"`` (fast; values
      below ~1e-11 of the largest are lost), ``"log"`` (exact in the log domain, any dynamic
      range, slower), or ``"auto"`` (rational, switching to log when the kernel underflows where
      an endpoint has mass or the Sinkhorn iteration stalls);
    * ``noise_continuation``: if the iteration fails from the start given, retry from noise
      2^m σ, halving it stage by stage down to σ (m = this value; 0: never). Small noise makes
      the cold start fail (the potentials are O(1/σ²)); this is the usual cure;
    * ``continuation``: if that fails too, retry switching the interaction on in this many
      stages (0: never);
    * ``coupling``: also return the static coupling π(x₀, x_T) (who ends where) with the operator
      route, by forming the kernel once at the end (n × n memory; at most ``COUPLING_MAX_CELLS``
      cells). The dense route always returns it;
    * ``starts``: run the outer loop from this many initial guesses, the usual one and
      ``starts - 1`` tilted ones (:mod:`mfbridge.solvers.multistart`); the cheapest converged
      bridge is returned, the other distinct ones are in ``result.alternatives`` and a
      :class:`~mfbridge.errors.MultipleBridgesWarning` names their costs (1: one start);
    * ``kernel``: the reference's steps: ``"chain"`` (Scharfetter–Gummel), ``"gaussian"`` (the
      split heat kernel, for small noise), ``"auto"`` (:mod:`mfbridge.solvers.small_noise`);
    * ``cross_check``: the direct solver (χ = ρ) as a second opinion
      (:mod:`mfbridge.solvers.cross_check`; with ``outer = "auto"``, the optimal method, an
      interaction, in 1D and 2D): ``"auto"`` (its result is returned when the fixed point does
      not converge; a converged solve that needed Newton–Krylov steps or a continuation, or
      found several bridges, is compared with it and called ``"suspect"`` if the direct flow is
      cheaper), ``"always"`` (compare after every converged solve) or ``"off"``.
    """

    method: str = "optimal"
    route: str = "auto"
    tol: float = 1e-9
    max_iter: int = 300
    anderson: int = 6
    damping: float = 1.0
    sinkhorn_tol: float = 1e-11
    sinkhorn_max_iter: int = 5000
    dense_max_cells: int = 64
    coupling: bool = False
    continuation: int = 4
    noise_continuation: int = 4
    propagation: str = "auto"
    starts: int = 1
    kernel: str = "auto"
    outer: str = "auto"
    time_budget: float | None = DEFAULT_TIME_BUDGET
    cross_check: str = "auto"

    def __post_init__(self) -> None:
        for what, value, known in (("method", self.method, METHODS),
                                   ("kernel", self.kernel, KERNELS),
                                   ("route", self.route, ROUTES),
                                   ("propagation", self.propagation, PROPAGATIONS),
                                   ("outer method", self.outer, OUTER_METHODS),
                                   ("cross_check", self.cross_check, CROSS_CHECKS)):
            if value not in known:
                raise unknown_name(what, value, known)
        checks = [
            ("tol", self.tol > 0),
            ("sinkhorn_tol", self.sinkhorn_tol > 0),
            ("max_iter", int(self.max_iter) == self.max_iter and self.max_iter >= 1),
            ("sinkhorn_max_iter", int(self.sinkhorn_max_iter) == self.sinkhorn_max_iter
             and self.sinkhorn_max_iter >= 1),
            ("anderson", int(self.anderson) == self.anderson and self.anderson >= 0),
            ("damping", 0 < self.damping <= 1),
            ("dense_max_cells", self.dense_max_cells >= 0),
            ("coupling", isinstance(self.coupling, bool)),
            ("continuation", int(self.continuation) == self.continuation
             and self.continuation >= 0),
            ("noise_continuation", int(self.noise_continuation) == self.noise_continuation
             and 0 <= self.noise_continuation <= 10),
            ("starts", isinstance(self.starts, int) and not isinstance(self.starts, bool)
             and 1 <= self.starts <= MAX_STARTS),
            ("time_budget", self.time_budget is None
             or (is_real_number(self.time_budget) and self.time_budget > 0)),
        ]
        for name, ok in checks:
            if not ok:
                value = getattr(self, name)
                raise InputError(f"solver option {name} has an invalid value {value!r}")
