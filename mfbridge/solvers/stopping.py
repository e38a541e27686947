"""When the outer loop stops short of its tolerance because its end marginals no longer improve.

The outer loop of :mod:`~mfbridge.solvers.fixed_point` is converged when the self-consistency
residual and the L1 error of the end marginals are both at most ``tol``. Once the residual
meets ``tol`` and the Sinkhorn tolerance is at its floor ``sinkhorn_tol``, more outer iterations
can only lower the marginal error; :class:`MarginalStall` stops them, with a message that says
why, when they do not:

* ``sinkhorn_tol`` above ``tol``: the sub-problem stops at ``sinkhorn_tol`` by request, so the
  marginal error cannot reach ``tol`` (stopped at once);
* the marginal error has not halved over :data:`STALL_STEPS` iterations: the sweeps cannot
  match the end marginals more closely (before the dense route was polished by operator sweeps,
  it stalled at 2e-9 for 604 iterations; common practice, no source, for the test itself).
"""

from __future__ import annotations

from dataclasses import dataclass, field

# stop when the marginal error has not fallen below STALL_FACTOR x its value STALL_STEPS
# iterations earlier (while the residual meets tol and the Sinkhorn tolerance is at its floor)
STALL_STEPS = 3
STALL_FACTOR = 0.5


@dataclass
class MarginalStall:
    """Tracks the marginal error of the outer iterations whose residual already meets ``tol``;
    :meth:`check` returns ``""`` to go on, else the reason to stop."""

    tol: float
    sinkhorn_tol: float
    route: str
    errors: list[float] = field(default_factory=list)

    def check(self, residual: float, marginal_error: float, inner_tol: float) -> str:
        if residual > self.tol or marginal_error <= self.tol or inner_tol > self.sinkhorn_tol:
            self.errors.clear()
            return ""
        if marginal_error <= self.sinkhorn_tol:
            return (f"the marginal error {marginal_error:.2e} is within solver.sinkhorn_tol = "
                    f"{self.sinkhorn_tol:.1e}, where the Sinkhorn iterations stop, but above "
                    f"tol = {self.tol:.1e}; choose sinkhorn_tol below tol")
        self.errors.append(marginal_error)
        if (len(self.errors) > STALL_STEPS
                and marginal_error > STALL_FACTOR * self.errors[-1 - STALL_STEPS]):
            return (f"the marginal error stalled at {marginal_error:.2e}, above tol = "
                    f"{self.tol:.1e}, over the last {STALL_STEPS} iterations while the "
                    f"self-consistency residual ({residual:.2e}) met tol: the {self.route} "
                    f"route cannot match the end marginals more closely here; loosen tol to "
                    f"about {2 * marginal_error:.0e}"
                    + (" or use route=operator" if self.route == "dense" else ""))
        return ""
