r"""Exact large deviations of the open symmetric simple exclusion process (reference values).

The symmetric simple exclusion process on a segment of length L held between two particle
reservoirs at densities :math:`\rho_a` (left end, x = 0) and :math:`\rho_b` (right end, x = L)
fluctuates at large scale according to the macroscopic fluctuation theory action (Bertini, De
Sole, Gabrielli, Jona-Lasinio & Landim, "Macroscopic fluctuation theory", Rev. Mod. Phys. 87,
593, 2015), here with D = 1 and the *mobility* χ(ρ) = ρ(1 − ρ):

.. math::

    I_{[0,T]}(\rho, j) = \frac14\int_0^T\!\!\int_0^L
        \frac{|j + \partial_x\rho|^2}{\rho(1-\rho)}\,dx\,dt,\qquad
    \partial_t\rho + \partial_x j = 0,\quad \rho(t, 0) = \rho_a,\ \rho(t, L) = \rho_b .

(Bertini et al. write :math:`\tfrac12\iint|j + \nabla\rho|^2/\sigma` with σ = 2ρ(1 − ρ): the
same number.) This is mfbridge's lattice-gas action :math:`\frac{1}{2\sigma^2}\iint|j +
\tfrac{\sigma^2}{2}\nabla\rho|^2/\chi` at noise σ² = 2; at another σ it is the same action in the
time unit stretched by σ²/2, so every T → ∞ limit below holds for the code's J at any σ.

* Steady profile and current: :math:`\bar\rho(x) = \rho_a + (\rho_b - \rho_a)x/L`,
  :math:`\bar j = (\rho_a - \rho_b)/L` (:func:`steady_profile`).
* Quasi-potential :math:`V(\rho) = \inf\{I_{[-\infty, 0]}(\rho, j):\ \rho(-\infty) =
  \bar\rho,\ \rho(0) = \rho\}`, the long-horizon limit of the cost of reaching ρ from the steady
  state. Derrida, Lebowitz & Speer ("Free energy functional for nonequilibrium systems: an
  exactly solvable case", Phys. Rev. Lett. 87, 150601, 2001; "Large deviation of the density
  profile in the steady state of the open symmetric simple exclusion process", J. Stat. Phys.
  107, 599, 2002) found it in closed form, and Bertini, De Sole, Gabrielli, Jona-Lasinio & Landim
  ("Macroscopic fluctuation theory for stationary non-equilibrium states", J. Stat. Phys. 107,
  635, 2002) derived it from this action. On [0, 1]:

  .. math::

      V(\rho) = \sup_F \int_0^1\Big[\rho\log\frac{\rho}{F}
          + (1-\rho)\log\frac{1-\rho}{1-F} + \log\frac{F'}{\rho_b - \rho_a}\Big]dx,

  the supremum over monotone F with F(0) = ρ_a, F(1) = ρ_b, attained at the unique monotone
  solution of the Euler–Lagrange equation

  .. math::

      F'' = \frac{(\rho - F)\,F'^2}{F(1 - F)},\qquad F(0) = \rho_a,\ F(1) = \rho_b

  (:func:`quasi_potential`). On [0, L]: :math:`V_L(\rho) = L\,V(\rho(L\,\cdot))` (x = Ly,
  t = L²s, j = j̃/L leave the integrand's form and multiply dx dt by L³ and the square by L⁻²),
  so V is extensive like a free energy.
* Equal reservoirs (ρ_a = ρ_b = ρ̄, equilibrium): F ≡ ρ̄ and V is the local free energy
  :math:`\int\rho\log(\rho/\bar\rho) + (1-\rho)\log((1-\rho)/(1-\bar\rho))`
  (:func:`local_free_energy`).
* Near the steady state V is quadratic, :math:`V(\bar\rho + \delta) = \tfrac12\langle\delta,
  C^{-1}\delta\rangle + O(\delta^3)`, C the covariance of the Gaussian density fluctuations,
  :math:`C(x, y) = \bar\chi(x)\delta(x - y) - (\rho_a - \rho_b)^2\,x(L - y)/L^3` for x ≤ y
  (on [0, L]; H. Spohn, "Long range correlations for stochastic lattice gases in a
  non-equilibrium steady state", J. Phys. A 16, 4275, 1983; :func:`gaussian_quadratic_form`).

* Current fluctuations: the variance and the rate function of the time-averaged current
  (:func:`current_variance`, :func:`current_rate`; independent walkers:
  :func:`walkers_current_rate`), references for
  :mod:`~mfbridge.solvers.current_fluctuations`.

The large-deviation probability of a profile of the chain with N sites is
:math:`\exp(-N\,V(\rho))` (ρ on [0, 1]). Nothing here depends on the rest of mfbridge: the
module is an independent reference for the tests and experiments of the direct solver.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.linalg import solve_banded
from scipy.optimize import minimize_scalar
from scipy.special import xlogy

from mfbridge.errors import ConvergenceWarning, InputError

__all__ = [
    "QuasiPotential",
    "current_rate",
    "current_variance",
    "gaussian_quadratic_form",
    "local_free_energy",
    "quasi_potential",
    "steady_profile",
    "walkers_current_rate",
]

Profile = Callable[[np.ndarray], np.ndarray]


def _check_reservoirs(rho_a: float, rho_b: float) -> tuple[float, float]:
    a, b = float(rho_a), float(rho_b)
    for name, v in (("rho_a", a), ("rho_b", b)):
        if not 0.0 < v < 1.0:
            raise InputError(f"the reservoir density {name} of the exclusion process must lie "
                             f"in (0, 1), got {v!r}")
    return a, b


def _profile_values(rho: Profile, x: np.ndarray, length: float) -> np.ndarray:
    values = np.asarray(rho(x * length), dtype=float)
    if values.shape != x.shape:
        raise InputError(f"the profile must map an array of positions to densities of the same "
                         f"shape; got shape {values.shape} for {x.shape}")
    if not np.all((values >= 0.0) & (values <= 1.0)):
        raise InputError(f"exclusion densities must lie in [0, 1]; the profile ranges over "
                         f"[{values.min():.4g}, {values.max():.4g}]")
    return values


def steady_profile(x: np.ndarray, rho_a: float, rho_b: float, length: float = 1.0
                   ) -> tuple[np.ndarray, float]:
    r"""The steady density :math:`\rho_a + (\rho_b - \rho_a)x/L` at positions ``x`` (in
    [0, L]) and the steady current :math:`(\rho_a - \rho_b)/L` (particles per unit time, MFT
    time unit, i.e. mfbridge's at σ² = 2)."""
    a, b = _check_reservoirs(rho_a, rho_b)
    x = np.asarray(x, dtype=float)
    return a + (b - a) * x / length, (a - b) / length


def _bernoulli_entropy(rho: np.ndarray, ref: np.ndarray) -> np.ndarray:
    """ρ log(ρ/r) + (1 - ρ) log((1 - ρ)/(1 - r)), with 0 log 0 = 0."""
    return (xlogy(rho, rho) - rho * np.log(ref) + xlogy(1 - rho, 1 - rho)
            - (1 - rho) * np.log(1 - ref))


def _trapezoid(values: np.ndarray, h: float) -> float:
    return float(h * (values.sum() - 0.5 * (values[0] + values[-1])))


def local_free_energy(rho: Profile, rho_a: float, rho_b: float, length: float = 1.0,
                      nodes: int = 4001) -> float:
    r""":math:`\int_0^L \rho\log(\rho/\bar\rho) + (1-\rho)\log((1-\rho)/(1-\bar\rho))\,dx` with
    the steady profile ρ̄ (the exact V when ρ_a = ρ_b; a lower bound of V otherwise, the value
    of the supremum's integrand at F = ρ̄). Trapezoid rule on ``nodes`` points."""
    a, b = _check_reservoirs(rho_a, rho_b)
    x = np.linspace(0.0, 1.0, nodes)
    values = _profile_values(rho, x, length)
    bar = a + (b - a) * x
    return length * _trapezoid(_bernoulli_entropy(values, bar), x[1] - x[0])


@dataclass
class QuasiPotential:
    """V(ρ) of :func:`quasi_potential` with its maximiser F at the nodes ``x`` (of [0, L]),
    the Newton iterations used and the largest residual of the discrete equation."""

    value: float
    x: np.ndarray
    density: np.ndarray
    optimiser: np.ndarray
    iterations: int
    residual: float


def _residual(f_in: np.ndarray, rho: np.ndarray, a: float, b: float
              ) -> tuple[np.ndarray, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """R_i = F_{i+1} - 2F_i + F_{i-1} - q_i (F_{i+1} - F_{i-1})²/4, q = (ρ - F)/(F(1 - F)), on
    the interior nodes, and the three diagonals of dR/dF."""
    f = np.concatenate([[a], f_in, [b]])
    mid, diff = f[1:-1], f[2:] - f[:-2]
    denom = mid * (1 - mid)
    q = (rho[1:-1] - mid) / denom
    dq = (-denom - (rho[1:-1] - mid) * (1 - 2 * mid)) / denom**2
    res = f[2:] - 2 * mid + f[:-2] - q * diff**2 / 4
    lower = 1 + q * diff / 2
    upper = 1 - q * diff / 2
    diag = -2 - dq * diff**2 / 4
    return res, (lower, diag, upper)


def _monotone(f_in: np.ndarray, a: float, b: float) -> bool:
    steps = np.diff(np.concatenate([[a], f_in, [b]])) * np.sign(b - a)
    return bool(np.all(steps > 0))


def _newton(rho: np.ndarray, a: float, b: float, f0: np.ndarray, tol: float, max_iter: int
            ) -> tuple[np.ndarray, int, float, bool]:
    """Damped Newton on the discrete Euler–Lagrange equation from ``f0`` (interior nodes);
    a step is halved until the residual decreases and F stays strictly monotone."""
    f = f0.copy()
    res, diags = _residual(f, rho, a, b)
    norm = float(np.abs(res).max())
    for it in range(1, max_iter + 1):
        if norm <= tol:
            return f, it - 1, norm, True
        lower, diag, upper = diags
        ab = np.zeros((3, len(f)))
        ab[0, 1:] = upper[:-1]
        ab[1] = diag
        ab[2, :-1] = lower[1:]
        step = solve_banded((1, 1), ab, -res)
        t = 1.0
        while t > 1e-6:
            trial = f + t * step
            if _monotone(trial, a, b):
                r_new, d_new = _residual(trial, rho, a, b)
                n_new = float(np.abs(r_new).max())
                if n_new < (1 - 1e-4 * t) * norm or n_new <= tol:
                    break
            t *= 0.5
        else:
            return f, it, norm, False
        f, res, diags, norm = trial, r_new, d_new, n_new
    return f, max_iter, norm, norm <= tol


def quasi_potential(rho: Profile, rho_a: float, rho_b: float, length: float = 1.0,
                    nodes: int = 4001, tol: float = 1e-13, max_iter: int = 100
                    ) -> QuasiPotential:
    r"""The quasi-potential V(ρ) of the open SSEP on [0, L] (module docstring), computed from
    the Derrida–Lebowitz–Speer formula.

    ``rho``: the profile, a function mapping positions in [0, L] (array) to densities in
    [0, 1]; ``rho_a``, ``rho_b``: reservoir densities in (0, 1) at x = 0 and x = L.

    The equation for F is solved by finite differences on ``nodes`` equally spaced points of
    [0, 1] (second order: :math:`F_{i+1} - 2F_i + F_{i-1} = q_i(F_{i+1} - F_{i-1})^2/4`, q =
    (ρ − F)/(F(1 − F))) by damped Newton from the steady profile (the solution when ρ = ρ̄),
    continued along :math:`\bar\rho + s(\rho - \bar\rho)`, s ↑ 1, if a step fails; the integral
    by the trapezoid rule (F' from the differences at the midpoints). The discretisation error
    of V is O(nodes⁻²). With ρ_a = ρ_b the exact local free energy is returned.
    """
    a, b = _check_reservoirs(rho_a, rho_b)
    if not (np.isfinite(length) and length > 0):
        raise InputError(f"length must be a positive number, got {length!r}")
    if nodes < 5:
        raise InputError(f"nodes must be at least 5, got {nodes}")
    x = np.linspace(0.0, 1.0, nodes)
    h = x[1] - x[0]
    values = _profile_values(rho, x, length)
    bar = a + (b - a) * x
    if a == b:
        value = length * _trapezoid(_bernoulli_entropy(values, bar), h)
        return QuasiPotential(value, x * length, values, bar, 0, 0.0)
    f, s, ds, iterations, norm = bar[1:-1].copy(), 0.0, 1.0, 0, 0.0
    while s < 1.0:
        target = min(1.0, s + ds)
        path = bar + target * (values - bar)
        trial, its, norm, ok = _newton(path, a, b, f, tol, max_iter)
        iterations += its
        if ok:
            f, s = trial, target
            ds = min(2 * ds, 1.0)
        else:
            ds *= 0.25
            if ds < 1e-6:
                import warnings

                warnings.warn(ConvergenceWarning(
                    f"open-SSEP quasi-potential: Newton failed at continuation parameter "
                    f"{s:.3g} (residual {norm:.2e})"), stacklevel=2)
                break
    full = np.concatenate([[a], f, [b]])
    slope = np.diff(full) / h / (b - a)
    local = _bernoulli_entropy(values, full)
    value = length * (_trapezoid(local, h) + h * float(np.log(slope).sum()))
    return QuasiPotential(value, x * length, values, full, iterations, norm)


def gaussian_quadratic_form(delta: Profile, rho_a: float, rho_b: float, length: float = 1.0,
                            nodes: int = 801) -> float:
    r""":math:`\tfrac12\langle\delta, C^{-1}\delta\rangle` with Spohn's covariance of the open
    SSEP's steady density fluctuations on [0, L] (module docstring): the leading term of
    :math:`V(\bar\rho + \delta)` for small δ. C is discretised by the trapezoid rule on
    ``nodes`` points (Nyström), :math:`\langle\delta, C^{-1}\delta\rangle = \sum_i w_i\delta_i
    u_i` with :math:`\bar\chi_i u_i + \sum_j c(x_i, x_j) w_j u_j = \delta_i`."""
    a, b = _check_reservoirs(rho_a, rho_b)
    y = np.linspace(0.0, 1.0, nodes)
    x = y * length
    d = np.asarray(delta(x), dtype=float)
    bar = a + (b - a) * y
    w = np.full(nodes, length * (y[1] - y[0]))
    w[[0, -1]] *= 0.5
    lo, hi = np.minimum.outer(y, y), np.maximum.outer(y, y)
    # x(L - x')/L³ in physical units on [0, L] is y_<(1 - y_>)/L with y = x/L
    corr = -(a - b) ** 2 * lo * (1 - hi) / length
    matrix = np.diag(bar * (1 - bar)) + corr * w[None, :]
    u = np.linalg.solve(matrix, d)
    return 0.5 * float((w * d * u).sum())


def current_variance(rho_a: float, rho_b: float) -> float:
    r"""Variance per unit time of the current through the open SSEP on [0, 1] (macroscopic
    units, the action of the module docstring): :math:`\int_0^1 2\bar\rho(1-\bar\rho)\,dx =
    \rho_a + \rho_b - \tfrac23(\rho_a^2 + \rho_a\rho_b + \rho_b^2)` (Derrida, Douçot & Roche,
    "Current fluctuations in the one-dimensional symmetric exclusion process with open
    boundaries", J. Stat. Phys. 115, 717, 2004; Bodineau & Derrida, "Current fluctuations in
    nonequilibrium diffusive systems: an additivity principle", PRL 92, 180601, 2004)."""
    a, b = _check_reservoirs(rho_a, rho_b)
    return a + b - 2.0 / 3.0 * (a * a + a * b + b * b)


def current_rate(j: float, rho_a: float, rho_b: float) -> float:
    r"""Rate function Φ(j) of the time-averaged current j through the open SSEP on [0, 1]:
    the Legendre transform :math:`\sup_\lambda[\lambda j - \mu(\lambda)]` of the cumulant
    generating function :math:`\mu(\lambda) = R(\omega)`, :math:`R(\omega) =
    \operatorname{arcsinh}^2\sqrt\omega` (continued by :math:`-\arcsin^2\sqrt{-\omega}` for
    ω < 0), :math:`\omega = \rho_a(e^\lambda - 1) + \rho_b(e^{-\lambda} - 1) +
    \rho_a\rho_b(e^\lambda - 1)(e^{-\lambda} - 1)` (Derrida, Douçot & Roche 2004, above;
    quoted from memory, its second derivative at 0 is :func:`current_variance`). λ is
    searched in [-8, 8] (currents up to a few times the steady one)."""
    a, b = _check_reservoirs(rho_a, rho_b)

    def r(w: float) -> float:
        return math.asinh(math.sqrt(w)) ** 2 if w >= 0 else -math.asin(math.sqrt(-w)) ** 2

    def minus(lam: float) -> float:
        e, f = math.exp(lam) - 1, math.exp(-lam) - 1
        return -(lam * j - r(a * e + b * f + a * b * e * f))

    out = minimize_scalar(minus, bounds=(-8.0, 8.0), method="bounded", options={"xatol": 1e-12})
    return -float(out.fun)


def walkers_current_rate(j: float, rho_a: float, rho_b: float) -> float:
    r"""The same for independent walkers (χ = ρ) between reservoirs at densities ρ_a, ρ_b > 0:
    two opposite Poisson streams, :math:`\mu(\lambda) = \rho_a(e^\lambda - 1) + \rho_b
    (e^{-\lambda} - 1)` (Derrida, "Non-equilibrium steady states: fluctuations and large
    deviations of the density and of the current", J. Stat. Mech. P07023, 2007; from memory),
    whose Legendre transform is :math:`\rho_a + \rho_b - s + j\log\frac{j + s}{2\rho_a}`,
    :math:`s = \sqrt{j^2 + 4\rho_a\rho_b}` (variance ρ_a + ρ_b)."""
    if not (rho_a > 0 and rho_b > 0):
        raise InputError(f"walker reservoir densities must be positive, got ({rho_a}, {rho_b})")
    s = math.sqrt(j * j + 4 * rho_a * rho_b)
    return rho_a + rho_b - s + j * math.log((j + s) / (2 * rho_a))
