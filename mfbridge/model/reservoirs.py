r"""Particle reservoirs: walls of the box held at a fixed density (open, boundary-driven systems).

A lattice gas between two reservoirs at different densities carries a steady current and is out
of equilibrium (Bertini, De Sole, Gabrielli, Jona-Lasinio & Landim, "Macroscopic fluctuation
theory", Rev. Mod. Phys. 87, 2015, section on boundary-driven systems). In the direct solver an
open wall is a Dirichlet condition on the density: the density at the wall is the reservoir's,
and particles cross the wall freely (the flux through it is a variable of the bridge, priced by
the same action as every other face). Walls that are not open stay no-flux.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from mfbridge.errors import InputError, is_real_number

__all__ = ["ENDS", "Reservoirs", "closed_box"]

ENDS = ("given", "steady")
SIDES = ("lower", "upper")


def _densities(value: Any, name: str) -> tuple[float | None, ...]:
    if value is None:
        return ()
    if is_real_number(value):
        value = [value]
    if isinstance(value, (str, bytes)) or not isinstance(value, Sequence):
        raise InputError(f"Reservoirs {name} must be a list of densities (null for a closed "
                         f"wall), one per axis, got {value!r}")
    out: list[float | None] = []
    for i, v in enumerate(list(value)):
        if v is None:
            out.append(None)
        elif is_real_number(v):
            out.append(float(v))
        else:
            raise InputError(f"Reservoirs {name}[{i}] must be a density (a number) or null for a "
                             f"closed wall, got {v!r}")
    return tuple(out)


@dataclass(frozen=True)
class Reservoirs:
    """Densities held on walls of the box.

    * ``lower``, ``upper``: one entry per grid axis, the reservoir density (1/length^d, the
      occupation per site for exclusion) at the wall at the lower / upper end of that axis, or
      ``None`` (``null`` in a config) for a closed, no-flux wall; a scalar means axis 0; missing
      trailing axes are closed. Example (1D chain from ρ_a = 0.8 to ρ_b = 0.2):
      ``Reservoirs(lower=[0.8], upper=[0.2])``;
    * ``initial``, ``final``: ``"given"`` (the problem's endpoint, at density
      ``total_mass`` × its normalised density) or ``"steady"`` (the steady profile between the
      reservoirs, computed by the solver);
    * ``final_mass``: the total mass of a given final profile (default: ``total_mass``, the
      initial one); open systems exchange particles with the reservoirs, so the two endpoints may
      hold different masses.
    """

    lower: tuple[float | None, ...] = ()
    upper: tuple[float | None, ...] = ()
    initial: str = "given"
    final: str = "given"
    final_mass: float | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "lower", _densities(self.lower, "lower"))
        object.__setattr__(self, "upper", _densities(self.upper, "upper"))
        for name in ("initial", "final"):
            if getattr(self, name) not in ENDS:
                raise InputError(f"Reservoirs {name} must be one of {', '.join(ENDS)}, got "
                                 f"{getattr(self, name)!r}")
        if self.final_mass is not None and not (is_real_number(self.final_mass)
                                                and self.final_mass > 0):
            raise InputError(f"Reservoirs final_mass must be a positive number or null, got "
                             f"{self.final_mass!r}")
        if not self.walls:
            raise InputError("Reservoirs need at least one open wall: give a density in lower or "
                             "upper (e.g. lower=[0.8], upper=[0.2]); without reservoirs leave the "
                             "option out (closed box)")

    @property
    def walls(self) -> dict[tuple[int, str], float]:
        """The open walls: (axis, "lower" or "upper") → density."""
        out = {}
        for side, values in (("lower", self.lower), ("upper", self.upper)):
            for axis, v in enumerate(values):
                if v is not None:
                    out[(axis, side)] = v
        return out

    def check(self, dim: int, lower: float, upper: float, mobility: str) -> None:
        """Raise :class:`InputError` unless every open wall is on an axis of a ``dim``-D grid and
        its density lies strictly inside the mobility's domain (``lower``, ``upper``): the
        mobility χ must be positive at an open wall."""
        for (axis, side), rho in self.walls.items():
            if axis >= dim:
                raise InputError(
                    f"Reservoirs open the {side} wall of axis {axis}, but the grid has {dim} "
                    f"axis{'es' if dim > 1 else ''} (axes 0..{dim - 1}): give at most {dim} "
                    f"entr{'ies' if dim > 1 else 'y'} in lower and upper")
            if not (lower < rho < upper and math.isfinite(rho)):
                raise InputError(
                    f"the reservoir density {rho:g} at the {side} wall of axis {axis} is outside "
                    f"the domain of the {mobility} mobility ({lower:g} < ρ < {upper:g}; the "
                    f"mobility must be positive at an open wall)")

    def describe(self) -> dict[str, Any]:
        return {"lower": list(self.lower), "upper": list(self.upper), "initial": self.initial,
                "final": self.final, "final_mass": self.final_mass}


def closed_box() -> None:
    """No reservoirs (the config option ``reservoirs=closed``): every wall is no-flux."""
    return None
