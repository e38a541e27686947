r"""Damped Anderson acceleration of a fixed-point map :math:`x = G(x)`.

Type-II Anderson mixing (Anderson, J. ACM 1965; Walker & Ni, SIAM J. Numer. Anal. 2011): with
residuals :math:`f_j = G(x_j) - x_j` and the last m differences :math:`\Delta F, \Delta X`,

.. math::

    \gamma = \arg\min_\gamma \| f_k - \Delta F \gamma \|_2, \qquad
    x_{k+1} = x_k + \beta f_k - (\Delta X + \beta \Delta F)\gamma .

With depth 0 this is plain damped iteration :math:`x_{k+1} = x_k + \beta f_k`. Safeguard: the
history is dropped when the residual grows above ``restart_factor`` times the best seen, so a bad
extrapolation cannot compound.
"""

from __future__ import annotations

import numpy as np


class AndersonMixer:
    """Stateful mixer: call ``next(x, gx)`` once per iteration with flat float arrays."""

    def __init__(self, depth: int = 5, damping: float = 1.0, restart_factor: float = 10.0) -> None:
        self.depth = depth
        self.damping = damping
        self.restart_factor = restart_factor
        self._xs: list[np.ndarray] = []
        self._fs: list[np.ndarray] = []
        self._best = np.inf

    def reset(self) -> None:
        self._xs.clear()
        self._fs.clear()

    def next(self, x: np.ndarray, gx: np.ndarray) -> np.ndarray:
        f = gx - x
        norm = float(np.linalg.norm(f))
        if norm > self.restart_factor * self._best:
            self.reset()
        self._best = min(self._best, norm)
        step = x + self.damping * f
        if self.depth > 0 and self._xs:
            d_x = np.stack([x - xp for xp in self._xs], axis=1)
            d_f = np.stack([f - fp for fp in self._fs], axis=1)
            gamma, *_ = np.linalg.lstsq(d_f, f, rcond=1e-10)
            step = step - (d_x + self.damping * d_f) @ gamma
        if self.depth > 0:
            self._xs.insert(0, x)
            self._fs.insert(0, f)
            del self._xs[self.depth :], self._fs[self.depth :]
        return step
