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
loop: an iterate beyond :data:`Z_MAX` has blown up.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics.reference import PairField, potential_differences

# largest |beta dPhi| across one face whose rates double precision still represents (uphill rate
# ~ z e^-z must stay above the smallest normal double, e^-708.4; margin for the z factor)
Z_MAX = 700.0
# cell Péclet number up to which the discretisation is accurate (common practice, no source:
# finite-volume drift-diffusion schemes resolve layers for |v| h / D <~ 2)
PECLET_ACCURATE = 2.0


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
                 confinement: np.ndarray) -> None:
    """Raise :class:`InputError` when :math:`\\Phi = U + W \\star p` on ``flow`` (masses, shape
    (K+1, *grid.shape)) changes by more than :data:`Z_MAX` (in units of σ²/2) across a face.

    ``pair`` is the interaction's :class:`~mfbridge.numerics.reference.PairField` and
    ``confinement`` the values of U at the cell centres, as the solver built them. The message
    names the part responsible, where it happens, and the grid, noise or potential scale that
    would make the problem representable (z shrinks like h for a smooth Φ, like 1/σ², and in
    proportion to the potential).
    """
    phi_u = np.broadcast_to(confinement, flow.shape)
    phi_w = pair(flow) if not pair.is_zero else np.zeros_like(flow)
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
