r"""Checks before numerical work: refuse problems whose scales the chosen grid cannot represent.

The reference chain jumps between neighbouring cells with Scharfetter–Gummel rates
:math:`q_{i\to j} = (D/h^2) B(z)`, :math:`z = \beta(\Phi_j - \Phi_i)`, :math:`\beta = 2/\sigma^2`,
:math:`B(z) = z/(e^z - 1)` (:mod:`mfbridge.numerics.reference`). The two rates across a face
differ by the factor :math:`e^{z}`, and the uphill one is about :math:`(D/h^2)\,z\,e^{-|z|}`.
IEEE 754 double precision represents :math:`e^{-x}` as a normal number only for
:math:`x \le 708.4` (smallest normal 2.2e-308; common practice, no source), so beyond
:data:`Z_MAX` the uphill rates vanish: the chain cannot climb the potential, the bridge's kernel
is zero where the endpoints need it, and no route (rational or log-domain steps) can solve the
problem on that grid. The same number :math:`|z| = |\nabla\Phi|\,h/D` is the cell Péclet number
of the reference drift, which an accurate answer needs of order 1 (:data:`PECLET_ACCURATE`).

:func:`check_scales` evaluates z for :math:`\Phi = U + W \star \bar p` on the flow the outer loop
starts from and refuses, with the numbers and what to change, when any face exceeds
:data:`Z_MAX`. It is the check that turns steep confinements, huge interaction strengths and
tiny noise on coarse grids into an immediate :class:`~mfbridge.errors.InputError` instead of a
run that cannot finish. :func:`largest_cell_drift` is also used on every iterate of the outer
loop: an iterate beyond :data:`Z_MAX` has blown up. With the Gaussian steps (``kernel=gaussian``)
the rates do not exist: the steps are exact log-domain sums whatever the potential's range, so
the limit is the precision of their log-weights (:data:`LOG_RANGE_MAX`).

:func:`check_resolution` refuses a grid on which no number of time steps resolves the noise:
the split heat kernel needs :math:`\sigma\sqrt{\Delta t} \ge 0.7h`
(:data:`~mfbridge.numerics.gaussian_step.MIN_WIDTH`), impossible when
:math:`\sigma\sqrt{T} < 0.7h`, and the jump chain's estimated cell Péclet number
(:func:`~mfbridge.solvers.small_noise.resolution`) is above :data:`PECLET_HOPELESS`. Such a
solve used to run for the whole time budget (600 s) and end ``not_converged``, or, without a
budget, stop after minutes on a self-consistent flow whose J is 60 times the transport
limit (σ = 0.04 on 24 cells, issue 12): no answer on that grid can be right.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics.gaussian_step import MIN_WIDTH, split_log_weight
from mfbridge.numerics.reference import PairField, potential_differences
from mfbridge.solvers.small_noise import resolution

# largest |beta dPhi| across one face whose rates double precision still represents (uphill rate
# ~ z e^-z must stay above the smallest normal double, e^-708.4; margin for the z factor)
Z_MAX = 700.0
# cell Péclet number up to which the discretisation is accurate (common practice, no source:
# finite-volume drift-diffusion schemes resolve layers for |v| h / D <~ 2)
PECLET_ACCURATE = 2.0
# estimated cell Péclet number of the chain above which, when the Gaussian steps cannot be
# resolved either, a grid is refused. The chain's bridge answers a potential ~Pe/2 times more
# strongly than the diffusion's (measured 8.18 at Pe 31: experiments/bench_small_noise.py,
# Table 3), its outer loop diverges from Pe ~ 20 (sigma = 0.1, 256 cells: estimated Pe 23), and
# at Pe 23 the frozen bridge's J is 3892 where the exact optimal J is 394.8; at 100 no answer
# of the chain is worth computing
PECLET_HOPELESS = 100.0
# largest range of the Gaussian steps' log-weights l = -Phi/sigma^2 - ... over one step: the
# log-domain sums keep about 8 digits up to 1e8 (an ulp of 1.5e-8 there; as LOG_WEIGHT_MAX of
# the solver's e^{-omega V}); beyond, the Sinkhorn potentials cannot meet the tolerance
LOG_RANGE_MAX = 1e8


@dataclass(frozen=True)
class CellDrift:
    """The largest :math:`|z| = \\beta|\\Delta\\Phi|` across one face: its value, the axis and
    the time node and cell (index tuple) below the face where it occurs."""

    z: float
    axis: int
    node: int
    cell: tuple[int, ...]


def largest_cell_drift(phi: np.ndarray, problem: BridgeProblem) -> CellDrift:
    """:math:`\\max |\\beta(\\Phi_{i+1} - \\Phi_i)|` over faces (every axis) and time nodes;
    ``phi`` has shape (K+1, *grid.shape) (any leading length). Non-finite differences count as
    infinite."""
    beta = 2.0 / problem.noise**2
    best = CellDrift(0.0, 0, 0, (0,) * problem.grid.dim)
    for a, dphi in enumerate(potential_differences(phi, problem.grid)):
        z = np.abs(beta * dphi)
        z = np.where(np.isfinite(z), z, np.inf)
        if z.size == 0:
            continue
        flat = int(np.argmax(z))
        value = float(z.flat[flat])
        if value > best.z:
            index = np.unravel_index(flat, z.shape)
            best = CellDrift(value, a, int(index[0]), tuple(int(i) for i in index[1:]))
    return best


def check_scales(problem: BridgeProblem, flow: np.ndarray, pair: PairField,
                 confinement: np.ndarray, kernel: str = "chain") -> None:
    """Raise :class:`InputError` when :math:`\\Phi = U + W \\star p` on ``flow`` (masses, shape
    (K+1, *grid.shape)) changes by more than :data:`Z_MAX` (in units of σ²/2) across a face
    (``kernel="chain"``), or, for the Gaussian steps (``kernel="gaussian"``), when their
    log-weights span more than :data:`LOG_RANGE_MAX` over one step.

    ``pair`` is the interaction's :class:`~mfbridge.numerics.reference.PairField` and
    ``confinement`` the values of U at the cell centres, as the solver built them. The message
    names the part responsible, where it happens, and the grid, noise or potential scale that
    would make the problem representable (z shrinks like h for a smooth Φ, like 1/σ², and in
    proportion to the potential).
    """
    phi_u = np.broadcast_to(confinement, flow.shape)
    phi_w = pair(flow) if not pair.is_zero else np.zeros_like(flow)
    if kernel == "gaussian":
        _check_log_weights(problem, phi_u + phi_w)
        return
    total = largest_cell_drift(phi_u + phi_w, problem)
    if total.z <= Z_MAX:
        return
    z_u = largest_cell_drift(phi_u, problem).z
    z_w = largest_cell_drift(phi_w, problem).z
    grid = problem.grid
    n = grid.shape[total.axis]
    where = ", ".join(f"{grid.axes[a][i] + 0.5 * grid.spacing[a] * (a == total.axis):.4g}"
                      for a, i in enumerate(total.cell))
    parts = [name for name, z in (("the confinement U", z_u), ("the interaction W ⋆ ρ", z_w))
             if z > 0.1 * total.z]
    ratio = total.z / Z_MAX
    if math.isinf(ratio):
        advice = "the potential is not finite on the grid; check its parameters"
    else:
        advice = (
            f"refine the grid to at least {math.ceil(n * ratio)} cells along axis {total.axis} "
            f"(for an accurate answer the cell Péclet number should be ≲ {PECLET_ACCURATE:g}: "
            f"about {math.ceil(n * total.z / PECLET_ACCURATE)} cells), or raise the noise to "
            f"σ ≥ {problem.noise * math.sqrt(ratio):.3g}, or make the potential about "
            f"{ratio:.3g} times weaker")
    raise InputError(
        f"refused before solving: on this grid ({n} cells along axis {total.axis}, h = "
        f"{grid.spacing[total.axis]:.3g}) with noise σ = {problem.noise:.3g}, the potential "
        f"changes by β|ΔΦ| = {total.z:.3g} across one cell (β = 2/σ²; at x = {where}, time node "
        f"{total.node}; from {' and '.join(parts) or 'U + W ⋆ ρ'}). The reference chain's two "
        f"jump rates across such a cell differ by e^{total.z:.3g}, beyond what double "
        f"precision represents (about e^{Z_MAX:g}); no solver route can work on this grid. "
        f"To fix: {advice}"
    )


def log_weight_span(phi: np.ndarray, problem: BridgeProblem) -> float:
    """The largest range over the grid of the Gaussian steps' log-weights ℓ of one step
    (:func:`~mfbridge.numerics.gaussian_step.split_log_weight` of Φ at the step midpoints;
    ``phi`` = U + W ⋆ p at the nodes, shape (K+1, *grid.shape)); inf when not finite."""
    phi_mid = 0.5 * (phi[:-1] + phi[1:])
    with np.errstate(all="ignore"):
        ell = split_log_weight(phi_mid, problem.grid.spacing, problem.noise, problem.dt)
        axes = tuple(range(1, ell.ndim))
        span = float(np.max(np.max(ell, axis=axes) - np.min(ell, axis=axes)))
    return span if math.isfinite(span) else math.inf


def representable(phi: np.ndarray, problem: BridgeProblem, kernel: str) -> bool:
    """Whether the steps of ``kernel`` (``"chain"`` or ``"gaussian"``) built on ``phi`` = U +
    W ⋆ p (K+1, *grid.shape) are within double precision: the chain's largest βΔΦ across a face
    at most :data:`Z_MAX`; the Gaussian steps' log-weight span at most :data:`LOG_RANGE_MAX`."""
    if kernel == "gaussian":
        return log_weight_span(phi, problem) <= LOG_RANGE_MAX
    return largest_cell_drift(phi, problem).z <= Z_MAX


def _check_log_weights(problem: BridgeProblem, phi: np.ndarray) -> None:
    """The Gaussian steps' limit: refuse when their log-weights over one step are not finite
    or span more than :data:`LOG_RANGE_MAX` (:func:`log_weight_span`)."""
    span = log_weight_span(phi, problem)
    if span <= LOG_RANGE_MAX:
        return
    ratio = span / LOG_RANGE_MAX
    advice = ("the potential is not finite on the grid; check its parameters"
              if not math.isfinite(span) else
              f"raise the noise to σ ≥ {problem.noise * math.sqrt(ratio):.3g} or make the "
              f"potential about {ratio:.3g} times weaker")
    raise InputError(
        f"refused before solving: with noise σ = {problem.noise:.3g} the Gaussian steps' "
        f"log-weights -Φ/σ² (with their drift terms) span {span:.3g} over the grid, beyond the "
        f"{LOG_RANGE_MAX:g} whose exponentials double precision keeps to about 8 digits: the "
        f"Sinkhorn potentials could not meet the tolerance. To fix: {advice}")


def check_resolution(problem: BridgeProblem) -> None:
    """Raise :class:`InputError` when no number of time steps lets either kernel resolve the
    noise on this grid (module docstring): σ√T below ``MIN_WIDTH`` cells along some axis and
    the chain's estimated cell Péclet number above :data:`PECLET_HOPELESS`. The message gives
    both numbers and the cells (or noise) that would do."""
    found = resolution(problem)
    grid = problem.grid
    spread = found.width * math.sqrt(problem.steps)  # σ√T / h, smallest over axes
    if spread >= MIN_WIDTH or found.peclet <= PECLET_HOPELESS:
        return
    axis = int(np.argmax(grid.spacing))
    n = grid.shape[axis]
    gaussian_cells = math.ceil(n * MIN_WIDTH / found.width)
    chain_cells = math.ceil(n * found.peclet / PECLET_ACCURATE)
    raise InputError(
        f"refused before solving: on this grid ({n} cells along axis {axis}, h = "
        f"{grid.spacing[axis]:.3g}) no number of time steps resolves the noise σ = "
        f"{problem.noise:.3g}: over the whole horizon T = {problem.horizon:.3g} it spreads "
        f"σ√T = {spread:.3g} cells (the Gaussian steps need σ√Δt ≥ {MIN_WIDTH:g} cells), and "
        f"the jump chain's estimated cell Péclet number is {found.peclet:.4g} (accurate ≲ "
        f"{PECLET_ACCURATE:g}; above {PECLET_HOPELESS:g} its bridge is not the diffusion's). "
        f"To fix: refine the grid to at least {gaussian_cells} cells along axis {axis} with "
        f"solver.kernel=gaussian and {problem.steps} steps (fewer steps need fewer cells: "
        f"cells ∝ √steps), or about {chain_cells} cells for the jump chain, or raise the noise "
        f"to σ ≥ {problem.noise * MIN_WIDTH / found.width:.3g}")
