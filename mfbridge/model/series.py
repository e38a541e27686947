r"""A population observed at several times: snapshots, and the bridge problem through them.

Observed laws :math:`\rho_{t_0}, \rho_{t_1}, \dots, \rho_{t_m}` at increasing times
:math:`t_0 < t_1 < \dots < t_m`. The rate function of the empirical process is additive over
time intervals given the marginals at the split times (Dawson & Gärtner, Stochastics 1987), so
the most likely evolution through all the snapshots is made of the m bridges between consecutive
ones, each solved on its own, and its cost is the sum

.. math::

    \sum_{k=0}^{m-1} J_\theta(\rho_{t_k} \to \rho_{t_{k+1}}).

:class:`SeriesProblem` holds the model and the snapshots, validated up front, and splits into one
:class:`~mfbridge.model.problem.BridgeProblem` per segment (:meth:`SeriesProblem.segments`). Two
snapshots are the plain bridge problem.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from mfbridge.errors import InputError, is_real_number
from mfbridge.model.endpoints import endpoint_masses
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import Confinement, Interaction, NoConfinement, NoInteraction
from mfbridge.model.problem import BridgeProblem

__all__ = ["SeriesProblem", "Snapshot", "segment_steps", "smoothing_kernel"]


@dataclass(frozen=True)
class Snapshot:
    """One observation: the law of the population at ``time`` (time units).

    ``law`` is an :class:`~mfbridge.model.endpoints.Endpoint` (a parametric law, or
    :class:`~mfbridge.model.samples.Samples` read from a file of positions) or an array of densities
    or cell masses on the grid.
    """

    time: float
    law: Any

    def __post_init__(self) -> None:
        if not is_real_number(self.time):
            raise InputError(f"a snapshot time must be a finite real number, got {self.time!r}")
        object.__setattr__(self, "time", float(self.time))


def segment_steps(times: np.ndarray, steps: int) -> list[int]:
    r"""Time steps of each segment: ``steps`` over :math:`[t_0, t_m]`, shared in proportion to
    the segments' durations (largest remainders), at least one per segment.

    With two snapshots this is ``[steps]``: the plain problem. Shape (m,).
    """
    durations = np.diff(np.asarray(times, dtype=float))
    share = steps * durations / durations.sum()
    base = np.maximum(np.floor(share).astype(int), 1)
    while base.sum() < steps:
        base[int(np.argmax(share - base))] += 1
    return [int(k) for k in base]


def smoothing_kernel(law: Any) -> np.ndarray | None:
    """The covariance (d, d) (L²) that the density estimate of a file of positions adds to its
    law: the Gaussian kernel's (:class:`~mfbridge.model.samples.Samples` with ``method="kde"``);
    ``None`` for every other law (parametric laws, arrays, histograms, whose cells add
    h²/12 per axis at every time alike)."""
    if getattr(law, "method", None) == "kde" and callable(getattr(law, "kernel_cov", None)):
        return np.array(law.kernel_cov(), dtype=float)
    return None


@dataclass(frozen=True)
class SeriesProblem:
    r"""Find the most likely flow through the snapshots (see the module docstring).

    Model as in :class:`~mfbridge.model.problem.BridgeProblem`: confinement U, interaction W,
    noise σ (length/√time). ``snapshots``: at least two :class:`Snapshot` (or ``(time, law)``
    pairs, or mappings with keys ``time`` and ``law``) with strictly increasing times; stored as
    normalised cell masses on ``grid``. ``steps``: the number of time steps over
    :math:`[t_0, t_m]`, shared among the segments in proportion to their durations
    (:func:`segment_steps`). ``kernels``: the smoothing kernel covariance of each snapshot's
    density estimate (:func:`smoothing_kernel`; found from the laws when not given).
    """

    grid: Grid
    snapshots: tuple[Snapshot, ...]
    noise: float
    steps: int = 100
    confinement: Confinement = field(default_factory=NoConfinement)
    interaction: Interaction = field(default_factory=NoInteraction)
    kernels: tuple[np.ndarray | None, ...] = ()

    def __post_init__(self) -> None:
        if not isinstance(self.grid, Grid):
            raise InputError(f"grid must be a mfbridge.grid.Grid, got {type(self.grid).__name__}")
        items = list(self.snapshots) if isinstance(self.snapshots, (list, tuple)) else None
        if items is None or len(items) < 2:
            raise InputError("a series needs a list of at least two snapshots (time and law), "
                             f"got {self.snapshots!r}")
        snaps = []
        for i, item in enumerate(items):
            if isinstance(item, Snapshot):
                snaps.append(item)
            elif hasattr(item, "keys") and set(item.keys()) == {"time", "law"}:
                snaps.append(Snapshot(item["time"], item["law"]))
            elif isinstance(item, (list, tuple)) and len(item) == 2:
                snaps.append(Snapshot(item[0], item[1]))
            else:
                raise InputError(f"snapshot {i} must be a time and a law (time: 0.5, law: ...), "
                                 f"got {item!r}")
        times = [s.time for s in snaps]
        for i in range(len(times) - 1):
            if not times[i + 1] > times[i]:
                raise InputError(
                    f"snapshot times must increase strictly: snapshot {i + 1} is at "
                    f"t = {times[i + 1]:g}, not after snapshot {i} at t = {times[i]:g}; "
                    "list the snapshots in time order, each at its own time"
                )
        steps = self.steps
        if isinstance(steps, bool) or not isinstance(steps, (int, np.integer)) or steps < 1:
            raise InputError(f"steps must be a positive integer, got {steps!r}")
        if steps < len(snaps) - 1:
            raise InputError(f"steps = {steps} is fewer than the {len(snaps) - 1} segments "
                             "between the snapshots; give at least one step per segment")
        object.__setattr__(self, "steps", int(steps))
        kernels = tuple(self.kernels) or tuple(smoothing_kernel(s.law) for s in snaps)
        if len(kernels) != len(snaps):
            raise InputError(f"kernels must give one entry per snapshot ({len(snaps)}), got "
                             f"{len(kernels)}")
        object.__setattr__(self, "kernels", kernels)
        masses = tuple(
            Snapshot(s.time, endpoint_masses(s.law, self.grid, f"snapshot {i} (t = {s.time:g})"))
            for i, s in enumerate(snaps)
        )
        object.__setattr__(self, "snapshots", masses)
        # the model is checked by the first segment's BridgeProblem (same messages)
        first = self.segment(0)
        object.__setattr__(self, "noise", first.noise)

    @property
    def times(self) -> np.ndarray:
        """Snapshot times :math:`t_0 < \\dots < t_m`, shape (m+1,)."""
        return np.array([s.time for s in self.snapshots])

    @property
    def steps_per_segment(self) -> list[int]:
        return segment_steps(self.times, self.steps)

    def segment(self, k: int) -> BridgeProblem:
        """The bridge problem from snapshot k to snapshot k + 1 (its clock starts at 0)."""
        a, b = self.snapshots[k], self.snapshots[k + 1]
        return BridgeProblem(
            grid=self.grid, initial=a.law, final=b.law, noise=self.noise,
            horizon=b.time - a.time, steps=self.steps_per_segment[k],
            confinement=self.confinement, interaction=self.interaction,
        )

    def segments(self) -> list[BridgeProblem]:
        """One :class:`~mfbridge.model.problem.BridgeProblem` per pair of consecutive snapshots."""
        return [self.segment(k) for k in range(len(self.snapshots) - 1)]

    def joined_times(self) -> np.ndarray:
        """Time nodes of the joined flow over :math:`[t_0, t_m]`: every segment's nodes, each
        snapshot time once; shape (steps + 1,)."""
        parts = [np.array([self.snapshots[0].time])]
        for k, n in enumerate(self.steps_per_segment):
            a, b = self.snapshots[k].time, self.snapshots[k + 1].time
            parts.append(a + (b - a) * np.arange(1, n + 1) / n)
        return np.concatenate(parts)
