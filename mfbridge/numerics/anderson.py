r"""Damped Anderson acceleration of a fixed-point map :math:`x = G(x)`.

Type-II Anderson mixing (Anderson, J. ACM 1965; Walker & Ni, SIAM J. Numer. Anal. 2011): with
residuals :math:`f_j = G(x_j) - x_j` and the last m differences of successive iterates and
residuals, :math:`\Delta X, \Delta F` (columns :math:`x_{j+1} - x_j`, :math:`f_{j+1} - f_j`),

.. math::

    \gamma = \arg\min_\gamma \| f_k - \Delta F \gamma \|_2, \qquad
    x_{k+1} = x_k + \beta f_k - (\Delta X + \beta \Delta F)\gamma .

With depth 0 this is plain damped iteration :math:`x_{k+1} = x_k + \beta f_k`. Safeguard: the
history is dropped when the residual grows above ``restart_factor`` times the best seen, so a bad
extrapolation cannot compound.

The least-squares problem is solved through the m × m Gram matrix
:math:`\Delta F^\top \Delta F`, kept up to date one column per iteration (m inner products of
length N instead of an N × m factorisation: the mixed states are long, (K+1) × cells × 2), by a
pseudo-inverse that drops eigenvalues below ``RCOND`` times the largest (Walker & Ni discuss the
normal equations and this regularisation).
"""

from __future__ import annotations

import numpy as np

RCOND = 1e-14  # relative eigenvalue cut-off of the Gram matrix (singular values: 1e-7)


class AndersonMixer:
    """Stateful mixer: call ``next(x, gx)`` once per iteration with flat float arrays."""

    def __init__(self, depth: int = 5, damping: float = 1.0, restart_factor: float = 10.0) -> None:
        self.depth = depth
        self.damping = damping
        self.restart_factor = restart_factor
        self._dxs: list[np.ndarray] = []  # newest first
        self._dfs: list[np.ndarray] = []
        self._gram = np.zeros((0, 0))
        self._last: tuple[np.ndarray, np.ndarray] | None = None
        self._best = np.inf

    def reset(self) -> None:
        self._dxs.clear()
        self._dfs.clear()
        self._gram = np.zeros((0, 0))
        self._last = None

    def next(self, x: np.ndarray, gx: np.ndarray) -> np.ndarray:
        f = gx - x
        norm = float(np.linalg.norm(f))
        if norm > self.restart_factor * self._best:
            self.reset()
        self._best = min(self._best, norm)
        step = x + self.damping * f
        if self.depth == 0:
            return step
        if self._last is not None:
            self._push(x - self._last[0], f - self._last[1])
        if self._dfs:
            rhs = np.array([d @ f for d in self._dfs])
            gamma = _pseudo_solve(self._gram, rhs)
            for g, dx, df in zip(gamma, self._dxs, self._dfs, strict=True):
                step -= g * dx
                step -= (g * self.damping) * df
        self._last = (x, f)
        return step

    def _push(self, dx: np.ndarray, df: np.ndarray) -> None:
        """Add the newest differences and their inner products; forget beyond ``depth``."""
        self._dxs.insert(0, dx)
        self._dfs.insert(0, df)
        del self._dxs[self.depth :], self._dfs[self.depth :]
        m = len(self._dfs)
        gram = np.empty((m, m))
        gram[1:, 1:] = self._gram[: m - 1, : m - 1]
        gram[0, :] = gram[:, 0] = [df @ d for d in self._dfs]
        self._gram = gram


def _pseudo_solve(gram: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Minimum-norm solution of ``gram @ gamma = rhs`` for a symmetric positive semi-definite
    ``gram``, eigenvalues below ``RCOND`` times the largest treated as zero."""
    values, vectors = np.linalg.eigh(gram)
    keep = values > RCOND * max(float(values[-1]), 0.0)
    if not keep.any():
        return np.zeros_like(rhs)
    v = vectors[:, keep]
    return v @ ((v.T @ rhs) / values[keep])
