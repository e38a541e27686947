r"""The peak memory of a fixed-point solve, estimated from the sizes alone, before allocating.

With n cells in d dimensions, K time steps and :math:`A = 8(K+1)n` bytes (one float64 array over
time and space), the solve holds, beyond what the process holds already:

* ``c`` path arrays, :math:`c\,A`: the sweeps' log-potentials, the flow and its mixing state,
  the step operators' coefficients (six per cell per axis per step), the correction V, the
  result. Measured growth of the peak RSS over the value before the solve (VmHWM; 2 cores, one
  BLAS thread; see DEVELOPERS.md): 16 A (1D, no interaction), 34 A (2D), 44 A (3D); with an
  interaction and ``method=optimal`` (Anderson depth m = 6) 58-60 A (1D), 86 A (2D), 115 A
  (3D); ``frozen`` 39 A (1D). Model: :math:`c = 16 + 18(d-1)` plus, with an interaction,
  :math:`10(d-1) + 4m + 20` (optimal: the mixed state (p, V) and 2m differences of it) or
  :math:`2m + 11` (frozen), plus 2 for saving;
* the contour method's LU factors, 680 bytes per cell per axis per step, for each axis whose
  factor the step operator applies by the contour (:func:`~mfbridge.numerics.propagator.
  uniformisation_is_cheaper` decides it per factor from Λ = τ × largest exit rate; here Λ is
  bounded by τ σ²/h² × 2, the diffusive exit rate with room for the drift);
* the dense route and the ``coupling`` option: an n × n kernel and POT's work arrays, measured
  61-64 × 8n² bytes (n = 512, 1024 in 1D; 24 × 24 in 2D): 64 × 8n²;
* the Gaussian steps (``kernel="gaussian"``, or ``"auto"`` when it picks them;
  :mod:`mfbridge.numerics.gaussian_step`) instead of the contour factors: per step, direction
  (forward, backward) and axis a rectangular table of the row-normalised summands, 16 bytes (a
  weight and an index) per cell times the widest window along that axis, which the noise
  continuation's early stages (larger σ) stretch to most of the line, or beyond it with the
  margins; and the next iteration's tables are built while the last ones are alive. Measured
  largest total of the live tables (1D, σ = 0.1, default continuation, 3-4 iterations) against
  :math:`T = 2K \cdot 16\, n \sum_a n_a`: 40 MB / 34 MB (256 cells, K = 16), 89 / 105 MB
  (320, 32), 893 MB / 1.07 GB (1024, 32; peak RSS growth 0.96 GB where the model without
  them said 39.5 MB); 2048 cells, K = 64: peak RSS growth 5.2 GB / 8.6 GB (156 MB without).
  Counted as 1.5 T (ratios 0.6-1.2 measured in 1D; in 2D, 96 × 96 cells, K = 20, without
  continuation, the peak RSS grew 0.28 GB where 1.5 T is 1.7 GB: an over-estimate there);
* the reported J's midpoint flow (:mod:`mfbridge.solvers.cost`): K half-step operators at
  once, with the contour's LU factors for each axis the cost rule gives it at τ/2. Measured
  (1D, 2048 cells, K = 200): the peak growth rose from 490 MB to 648 MB when it came, against
  the 278 MB of factors counted (2D 96², K = 40, uniformisation: unchanged, 269 MB);
* ``starts`` > 1: the other starts' results, (4 + d) A each;
* per cell, independent of K: the endpoints, potentials and the FFT tables of the pair field,
  :math:`8(40 + 2^d\cdot 4(d+1))` bytes.

The model is within about 20% of the measured peaks above and over-estimates slightly (3D 32³,
K = 100: 3.17 GB estimated growth, 2.95 GB measured in ``experiments/results/bench_scale.md``).
"""

from __future__ import annotations

from dataclasses import dataclass

from mfbridge.numerics.propagator import (
    UNIFORMISATION_TAIL,
    poisson_terms,
    uniformisation_is_cheaper,
)

LU_BYTES_PER_CELL = 680  # 10 poles x (4 complex128 + 1 int32) per cell, axis and step
DENSE_BYTES_PER_PAIR = 64 * 8
GAUSSIAN_BYTES_PER_ENTRY = 16  # a float64 weight and an int64 index per window entry


@dataclass(frozen=True)
class MemoryEstimate:
    """Bytes a solve needs beyond the process's current use, with the main parts named."""

    total: int
    parts: dict[str, int]
    route: str

    def describe(self) -> str:
        big = sorted(self.parts.items(), key=lambda kv: -kv[1])
        return (f"{format_bytes(self.total)} ({self.route} route: "
                + ", ".join(f"{name} {format_bytes(b)}" for name, b in big if b > 0) + ")")


def format_bytes(n: float) -> str:
    """Bytes in decimal units: 3.1 GB, 480 MB."""
    for unit in ("B", "kB", "MB", "GB"):
        if abs(n) < 1000:
            return f"{n:.3g} {unit}" if unit != "B" else f"{int(n)} B"
        n /= 1000
    return f"{n:.3g} TB"


def estimate(shape: tuple[int, ...], spacing: tuple[float, ...], steps: int, horizon: float,
             noise: float, *, route: str, interacting: bool, method: str = "optimal",
             anderson: int = 6, coupling: bool = False, starts: int = 1,
             gaussian_steps: bool = False) -> MemoryEstimate:
    """The peak memory of :func:`~mfbridge.solvers.fixed_point.solve_bridge` on a grid of
    ``shape`` cells of widths ``spacing`` (length) with ``steps`` time steps over ``horizon``
    and noise σ = ``noise``; ``route`` is ``"operator"`` or ``"dense"`` (as chosen);
    ``gaussian_steps``: the reference steps are the split heat kernel's (the kernel chosen)."""
    d = len(shape)
    n = 1
    for cells in shape:
        n *= int(cells)
    path = 8 * (steps + 1) * n
    c = 16 + 18 * (d - 1) + 2
    if interacting:
        c += 10 * (d - 1) + (4 * anderson + 20 if method == "optimal" else 2 * anderson + 11)
    parts = {"path arrays": c * path}
    tau = horizon / steps

    def contour(step: float) -> int:  # axes whose factor the contour applies at this step
        axes = 0
        for h in spacing:
            lam = 2.0 * step * noise**2 / h**2
            # beyond a few thousand, the terms are about lam (and the contour always cheaper)
            terms = poisson_terms(lam, UNIFORMISATION_TAIL) if lam < 1e4 else int(lam)
            axes += not uniformisation_is_cheaper(terms, n)
        return axes

    contour_axes = contour(tau)
    if gaussian_steps:  # no step operators: the windows' tables instead
        contour_axes = 0
        parts["Gaussian-step windows"] = int(
            1.5 * 2 * steps * GAUSSIAN_BYTES_PER_ENTRY * n * sum(int(c) for c in shape))
    parts["contour LU factors"] = LU_BYTES_PER_CELL * steps * n * contour_axes
    # the reported J's half-step operators (solvers/cost.py), all K of them at once
    parts["midpoint half-step LU factors"] = LU_BYTES_PER_CELL * steps * n * contour(tau / 2)
    parts["n x n kernel"] = DENSE_BYTES_PER_PAIR * n * n if route == "dense" or coupling else 0
    parts["other starts"] = (starts - 1) * (4 + d) * path
    parts["per-cell tables"] = 8 * (40 + 2**d * 4 * (d + 1)) * n
    return MemoryEstimate(total=int(sum(parts.values())), parts=parts, route=route)
