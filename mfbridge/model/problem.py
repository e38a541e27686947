"""The bridge problem: everything the model and the observations fix, validated up front."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.endpoints import Endpoint, endpoint_masses
from mfbridge.model.grid import Grid
from mfbridge.model.potential_checks import as_confinement, as_interaction
from mfbridge.model.potentials import Confinement, Interaction, NoConfinement, NoInteraction


@dataclass(frozen=True)
class BridgeProblem:
    r"""Find the most likely flow from ``initial`` (t = 0) to ``final`` (t = ``horizon``).

    Model: :math:`dX^i = [-\nabla U(X^i) - \frac1N\sum_j \nabla W(X^i - X^j)]\,dt + \sigma dB^i`
    with U = ``confinement``, W = ``interaction``, σ = ``noise`` (units: length/√time).
    ``initial`` and ``final`` are endpoint objects or arrays of densities/masses of shape
    ``grid.shape``; they are stored as normalised cell masses. ``steps`` is the number K of time
    steps of the grid in time.
    """

    grid: Grid
    initial: np.ndarray
    final: np.ndarray
    noise: float
    horizon: float = 1.0
    steps: int = 100
    confinement: Confinement = field(default_factory=NoConfinement)
    interaction: Interaction = field(default_factory=NoInteraction)
    # the endpoints as given (Endpoint objects, or masses on ``source_grid``), kept to put the
    # problem on other grids (:meth:`on_grid`); set from ``initial``/``final`` when None
    sources: tuple[Any, Any, Grid] | None = field(default=None, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not isinstance(self.grid, Grid):
            raise InputError(f"grid must be a mfbridge.Grid, got {type(self.grid).__name__}")
        for name, value in (("noise", self.noise), ("horizon", self.horizon)):
            numeric = isinstance(value, (int, float, np.floating, np.integer))
            if isinstance(value, bool) or not numeric:
                raise InputError(f"{name} must be a positive number, got {value!r}")
            if not (math.isfinite(value) and value > 0):
                raise InputError(f"{name} must be a positive finite number, got {value!r}")
        object.__setattr__(self, "noise", float(self.noise))
        object.__setattr__(self, "horizon", float(self.horizon))
        steps = self.steps
        if isinstance(steps, bool) or not isinstance(steps, (int, np.integer)) or steps < 1:
            raise InputError(f"steps must be a positive integer, got {steps!r}")
        object.__setattr__(self, "steps", int(steps))
        # any object with value/grad, checked on a few points of the box (potential_checks)
        box = (np.asarray(self.grid.lower), np.asarray(self.grid.upper))
        object.__setattr__(self, "confinement", as_confinement(self.confinement, *box))
        object.__setattr__(self, "interaction", as_interaction(self.interaction, *box))
        given = (self.initial, self.final)
        for name in ("initial", "final"):
            object.__setattr__(self, name, endpoint_masses(getattr(self, name), self.grid, name))
        if self.sources is None:
            kept = tuple(v if isinstance(v, Endpoint) else m
                         for v, m in zip(given, (self.initial, self.final), strict=True))
            object.__setattr__(self, "sources", (*kept, self.grid))

    @property
    def times(self) -> np.ndarray:
        """Time nodes :math:`t_k = kT/K`, shape (K+1,)."""
        return np.linspace(0.0, self.horizon, self.steps + 1)

    @property
    def dt(self) -> float:
        return self.horizon / self.steps

    def on_grid(self, grid: Grid, steps: int) -> BridgeProblem:
        """The same problem on another ``grid`` (same dimension, any box and cells) with
        ``steps`` time steps. Endpoint objects are evaluated on the new cells; endpoints given
        as arrays are moved there conservatively (:meth:`~mfbridge.grid.Grid.remap`), read as
        piecewise-constant densities on the grid they were given on."""
        assert self.sources is not None
        initial, final, source_grid = self.sources
        if not isinstance(initial, Endpoint):
            initial = source_grid.remap(initial, grid)
        if not isinstance(final, Endpoint):
            final = source_grid.remap(final, grid)
        return BridgeProblem(grid=grid, initial=initial, final=final, noise=self.noise,
                             horizon=self.horizon, steps=steps, confinement=self.confinement,
                             interaction=self.interaction, sources=self.sources)

    def linear_flow(self) -> np.ndarray:
        r""":math:`(1 - t/T)\,\mu + (t/T)\,\nu` at every time node: masses, shape
        (K+1, *grid.shape). The usual first guess of a flow."""
        s = (self.times / self.horizon).reshape(-1, *([1] * self.grid.dim))
        return (1 - s) * self.initial + s * self.final
