r"""Exact mean-field Schrödinger bridge for the linear–quadratic (Gaussian) family.

The particle model
------------------
``N`` particles in ``R^d`` move by

.. math::

    dX^i = \Big[-\nabla U(X^i) - \frac1N \sum_j \nabla W(X^i - X^j)\Big]\,dt + \sigma\,dB^i,
    \qquad U(x) = \tfrac{a}{2}|x|^2,\quad W(z) = \tfrac{\kappa}{2}|z|^2,

with ``a`` the *stiffness* of the confinement (any real number) and ``κ`` the *strength* of
the pairwise interaction (``κ < 0`` is repulsion). As ``N → ∞`` the empirical measure follows
the McKean–Vlasov drift ``b_t[ρ](x) = -a x - κ (x - m_t) - (σ²/2) ∇log ρ_t(x)`` (written as a
current velocity), with ``m_t`` the mean of ``ρ_t``.

The problem
-----------
The mean-field Schrödinger bridge between ``μ = N(m0, S0)`` at ``t = 0`` and
``ν = N(m1, S1)`` at ``t = T`` minimises the large-deviation rate function

.. math::

    J(ρ) = \frac{1}{2σ^2}\int_0^T\!\!\int |u_t(x)|^2 ρ_t(x)\,dx\,dt,\qquad u = v - b[ρ],

over flows ``(ρ, v)`` with ``∂_t ρ + ∇·(ρ v) = 0``, ``ρ_0 = μ``, ``ρ_T = ν``.

The exact split
---------------
Write ``X = m_t + Y``. Because the interaction drift ``-κ(x - m_t)`` is centred, for *every*
flow ``u_t(x) = ū(t) + ũ_t(x - m_t)`` with ``ū = dm/dt + a m`` and ``∫ ũ_t ρ̃_t = 0``, so the
cross term vanishes and ``J = J_mean + J_centred`` exactly:

(i) the mean, ``dm/dt = -a m + ū``, cost ``∫_0^T |ū|²/(2σ²) dt``, ``m(0) = m0``,
    ``m(T) = m1``. The optimum is ``ū(t) = c e^{a t}`` with
    ``m(t) = m0 sinh(a(T-t))/sinh(aT) + m1 sinh(at)/sinh(aT)`` and
    ``J_mean = |cosh(aT/2)(m1-m0) + sinh(aT/2)(m1+m0)|² / (2σ² T sinhc(aT))``,
    ``sinhc(x) = sinh(x)/x``; this equals ``|c|²(e^{2aT}-1)/(4aσ²)`` with
    ``c = a(m1 - e^{-aT}m0)/sinh(aT)``.

(ii) the centred part: a classical Schrödinger bridge with Ornstein–Uhlenbeck reference
    ``dY = -θ Y dt + σ dB``, ``θ = a + κ``, between ``N(0, S0)`` and ``N(0, S1)``. With
    ``v(t) = σ²(1 - e^{-2θt})/(2θ)`` the reference endpoint law ``R0T`` is
    ``Y0 ~ N(0, S0)``, ``YT | Y0 ~ N(e^{-θT} Y0, v(T) I)``. The optimal coupling ``π``
    minimises ``KL(π | R0T)``; it is entropic optimal transport for the cost
    ``|y - e^{-θT} x|²/(2 v(T))``. Since ``e^{-θT}/v(T) = 1/ε`` with
    ``ε = σ² sinh(θT)/θ = σ² T sinhc(θT)`` (even in ``θ``), the coupling is the entropic
    transport plan between ``N(0,S0)`` and ``N(0,S1)`` for the cost ``|x - y|²`` and
    regularisation ``2ε KL`` (Janati, Muzellec, Peyré & Cuturi 2020; Mallasto, Gerolin & Minh
    2022; for the OU reference, Bunne, Hsieh, Cuturi & Krause 2023):

    .. math::

        M = S_0^{1/2} S_1 S_0^{1/2} = Q\,\mathrm{diag}(μ_i)\,Q^T,\quad
        D = (4M + ε^2 I)^{1/2},\quad
        C = \mathrm{Cov}(Y_0, Y_T) = \tfrac12 S_0^{1/2}(D - εI) S_0^{-1/2},

    evaluated without cancellation as ``D - εI = Q diag(δ_i) Qᵀ``,
    ``δ_i = 4μ_i / (sqrt(4μ_i + ε²) + ε)``. Given the endpoints the path is the OU bridge,
    ``Y_t | (Y0=x, YT=y) ~ N(α_t x + β_t y, γ_t I)`` with

    .. math::

        α_t = \frac{\sinh θ(T-t)}{\sinh θT},\quad β_t = \frac{\sinh θt}{\sinh θT},\quad
        γ_t = σ^2\,\frac{\sinh(θt)\,\sinh(θ(T-t))}{θ \sinh θT},

    so ``S_t = α_t² S0 + β_t² S1 + α_t β_t (C + Cᵀ) + γ_t I``. The centred control is linear,
    ``ũ_t(y) = A_t y`` with ``A_t`` symmetric, the solution of the Sylvester equation
    ``S_t A_t + A_t S_t = dS_t/dt + 2θ S_t - σ² I`` (the covariance equation
    ``dS/dt = (A - θI)S + S(A - θI) + σ² I``). ``J_centred = KL(π | R0T)`` (the path-space
    and the endpoint relative entropies of a bridge agree, since given its endpoints the bridge
    is the reference bridge: Föllmer 1988; Chen, Georgiou & Pavon 2021), also equal to
    ``(1/(2σ²)) ∫ tr(A_t S_t A_t) dt``.

The optimal control field is ``u_t(x) = ū(t) + A_t (x - m_t)``.

(iii) The *frozen* (self-consistent) variant freezes the interaction at the flow's own
    marginals, solves the classical bridge and iterates to a fixed point. Its centred part is
    the same, but its mean control is ``ū(t) = c' e^{θ t}`` with
    ``m(t) = e^{-at} m0 + c' e^{-at} (e^{(2a+κ)t} - 1)/(2a+κ)``,
    ``c' = (e^{aT} m1 - m0) / (T exprel((2a+κ)T))``, ``exprel(z) = (e^z - 1)/z``, and
    ``J_mean = |c'|² T exprel(2θT) / (2σ²) ≥`` the optimum's. It is not the minimiser of ``J``.

Free energy of ``N(m, S)``:
``F = (σ²/2)∫ρ log ρ + ∫Uρ + ½∬W ρρ = -(σ²/4)(d log(2πe) + log det S) + a(|m|² + tr S)/2
+ κ tr(S)/2``.

All small-parameter limits (``a → 0``, ``θ → 0``, ``2a + κ → 0``) are evaluated through
``sinhc`` and ``exprel`` (``sinh``/``expm1`` divided by their argument), which are exact to
rounding at and near zero, so no case split is needed.

References
----------
* H. Janati, B. Muzellec, G. Peyré, M. Cuturi, "Entropic optimal transport between unbalanced
  Gaussian measures has a closed form", NeurIPS 2020.
* A. Mallasto, A. Gerolin, H. Q. Minh, "Entropy-regularized 2-Wasserstein distance between
  Gaussian measures", Information Geometry 2022.
* C. Bunne, Y.-P. Hsieh, M. Cuturi, A. Krause, "The Schrödinger bridge between Gaussian
  measures has a closed form", AISTATS 2023.
* H. Föllmer, "Random fields and diffusion processes", École d'Été de Probabilités de
  Saint-Flour XV–XVII, Springer, 1988.
* Y. Chen, T. T. Georgiou, M. Pavon, "Stochastic control liaisons: Richard Sinkhorn meets
  Gaspard Monge on a Schrödinger bridge", SIAM Review 63, 2021.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.linalg

from mfbridge.errors import InputError, unknown_name

__all__ = ["VARIANTS", "LQBridge", "lq_bridge"]

#: Names accepted by ``lq_bridge(variant=...)``.
VARIANTS: tuple[str, ...] = ("optimal", "frozen")

#: Largest allowed ``|rate| * horizon`` for the rates ``a``, ``a + κ`` and ``2a + κ``: beyond
#: it the exponentials ``e^{2 r T}`` multiplying each other in the costs overflow float64.
MAX_RATE_TIMES_HORIZON = 150.0

_SYMMETRY_RTOL = 1e-10


# ---------------------------------------------------------------------------------------------
# Result
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class LQBridge:
    """The exact linear–quadratic mean-field Schrödinger bridge on a time grid.

    The marginal at ``t_k`` is ``ρ_{t_k} = N(mean[k], cov[k])``; the control field is
    ``u_{t_k}(x) = mean_control[k] + gain[k] (x - mean[k])``.

    Attributes:
        times: ``(K+1,)`` time grid, ``times[0] = 0``, ``times[-1] = T``.
        mean: ``(K+1, d)`` mean path ``m_t``.
        cov: ``(K+1, d, d)`` covariance path ``S_t``.
        mean_control: ``(K+1, d)`` mean control ``ū(t)``.
        gain: ``(K+1, d, d)`` symmetric gain ``A_t`` of the centred control.
        endpoint_cross_cov: ``(d, d)`` ``Cov(X_0, X_T)`` under the bridge.
        cost: rate function ``J = cost_mean + cost_centred``.
        cost_mean: ``∫_0^T |ū|²/(2σ²) dt``.
        cost_centred: ``KL(π | R0T) = (1/(2σ²)) ∫ tr(A_t S_t A_t) dt``.
        free_energy: ``(K+1,)`` free energy ``F(ρ_t)``.
        variant: ``"optimal"`` (minimiser of ``J``) or ``"frozen"`` (self-consistent).
    """

    times: np.ndarray
    mean: np.ndarray
    cov: np.ndarray
    mean_control: np.ndarray
    gain: np.ndarray
    endpoint_cross_cov: np.ndarray
    cost: float
    cost_mean: float
    cost_centred: float
    free_energy: np.ndarray
    variant: str

    @property
    def dim(self) -> int:
        """Space dimension ``d``."""
        return int(self.mean.shape[1])

    def _index(self, k: int) -> int:
        n = self.times.shape[0]
        if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not -n <= k < n:
            raise InputError(f"time index must be an integer in [{-n}, {n - 1}], got {k!r}")
        return int(k)

    def _points(self, x: Any) -> tuple[np.ndarray, bool]:
        """Points of shape (..., d), and whether they were given as bare positions: in 1D a
        scalar or an array whose last axis is not of length 1 is a set of positions (..., )."""
        try:
            arr = np.asarray(x, dtype=float)
        except (TypeError, ValueError) as exc:
            raise InputError(f"points must be a real array of shape (..., {self.dim})") from exc
        if self.dim == 1 and (arr.ndim == 0 or arr.shape[-1] != 1):
            return arr[..., None], True
        if arr.ndim == 0 or arr.shape[-1] != self.dim:
            raise InputError(
                f"points must have shape (..., {self.dim}) (last axis = dimension), "
                f"got shape {arr.shape}"
            )
        return arr, False

    def control(self, k: int, x: np.ndarray) -> np.ndarray:
        """Control ``u_{t_k}(x) = ū(t_k) + A_{t_k}(x - m_{t_k})``; ``x (..., d)`` → ``(..., d)``.

        In 1D ``x`` may also be a scalar or an array of positions of any shape (last axis not of
        length 1); the control then has the shape of ``x``."""
        k = self._index(k)
        arr, bare = self._points(x)
        out = self.mean_control[k] + (arr - self.mean[k]) @ self.gain[k].T
        return out[..., 0] if bare else out

    def density(self, k: int, x: np.ndarray) -> np.ndarray:
        """Gaussian density of ``ρ_{t_k} = N(m, S)`` at ``x`` ``(..., d)`` → ``(...)``.

        ``ρ(x) = (2π)^{-d/2} det(S)^{-1/2} exp(-½ (x-m)ᵀ S⁻¹ (x-m))``. In 1D ``x`` may also be
        a scalar or an array of positions (see :meth:`control`); the density has its shape.
        """
        k = self._index(k)
        arr, _ = self._points(x)
        d = self.dim
        chol = np.linalg.cholesky(self.cov[k])
        diff = (arr - self.mean[k]).reshape(-1, d).T
        z = scipy.linalg.solve_triangular(chol, diff, lower=True)
        quad = np.sum(z * z, axis=0)
        logdet = 2.0 * np.sum(np.log(np.diag(chol)))
        logpdf = -0.5 * quad - 0.5 * logdet - 0.5 * d * np.log(2.0 * np.pi)
        return np.exp(logpdf).reshape(arr.shape[:-1])


# ---------------------------------------------------------------------------------------------
# Scalar helpers, exact to rounding at and near zero
# ---------------------------------------------------------------------------------------------


def _sinhc(x: np.ndarray | float) -> np.ndarray:
    """``sinh(x)/x`` with value 1 at 0 (``sinh`` is accurate to rounding near 0)."""
    x = np.asarray(x, dtype=float)
    safe = np.where(x == 0.0, 1.0, x)
    return np.where(x == 0.0, 1.0, np.sinh(safe) / safe)


def _exprel(x: np.ndarray | float) -> np.ndarray:
    """``(e^x - 1)/x`` with value 1 at 0 (``expm1`` is accurate to rounding near 0)."""
    x = np.asarray(x, dtype=float)
    safe = np.where(x == 0.0, 1.0, x)
    return np.where(x == 0.0, 1.0, np.expm1(safe) / safe)


@dataclass(frozen=True)
class _BridgeCoefficients:
    """OU-bridge coefficients on a grid, each ``(K+1,)``, with their time derivatives."""

    alpha: np.ndarray
    beta: np.ndarray
    gamma: np.ndarray
    dalpha: np.ndarray
    dbeta: np.ndarray
    dgamma: np.ndarray


def _bridge_coefficients(
    rate: float, noise: float, horizon: float, t: np.ndarray
) -> _BridgeCoefficients:
    r"""Coefficients of the bridge of ``dY = -r Y dt + σ dB`` pinned at ``0`` and ``T``.

    ``α_t = (T-t) sinhc(r(T-t)) / (T sinhc(rT))``, ``β_t = t sinhc(rt) / (T sinhc(rT))``,
    ``γ_t = σ² t (T-t) sinhc(rt) sinhc(r(T-t)) / (T sinhc(rT))``; derivatives
    ``α' = -cosh(r(T-t))/(T sinhc(rT))``, ``β' = cosh(rt)/(T sinhc(rT))``,
    ``γ' = σ² (T-2t) sinhc(r(T-2t)) / (T sinhc(rT))``. All even in ``r``.
    """
    T = horizon
    s = t
    rest = T - s
    den = T * _sinhc(rate * T)
    alpha = rest * _sinhc(rate * rest) / den
    beta = s * _sinhc(rate * s) / den
    gamma = noise**2 * s * rest * _sinhc(rate * s) * _sinhc(rate * rest) / den
    dalpha = -np.cosh(rate * rest) / den
    dbeta = np.cosh(rate * s) / den
    dgamma = noise**2 * (T - 2.0 * s) * _sinhc(rate * (T - 2.0 * s)) / den
    return _BridgeCoefficients(alpha, beta, gamma, dalpha, dbeta, dgamma)


# ---------------------------------------------------------------------------------------------
# The static (endpoint) problem
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Coupling:
    """Entropic Gaussian coupling ``π = N(0, [[S0, C], [Cᵀ, S1]])``."""

    cross: np.ndarray  # (d, d) C = Cov(Y0, YT)
    delta: np.ndarray  # (d,)   eigenvalues of D - εI
    logdet_s0: float


def _sym_sqrt(S: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(S^{1/2}, S^{-1/2})`` of an SPD matrix ``S`` ``(d, d)`` via its eigendecomposition."""
    w, V = np.linalg.eigh(S)
    root = (V * np.sqrt(w)) @ V.T
    inv_root = (V / np.sqrt(w)) @ V.T
    return root, inv_root


def _entropic_coupling(S0: np.ndarray, S1: np.ndarray, eps: float) -> _Coupling:
    r"""Cross-covariance of the entropic plan between ``N(0,S0)`` and ``N(0,S1)``.

    Minimiser of ``E|X - Y|² + 2ε KL(π | μ⊗ν)``:
    ``C = ½ S0^{1/2} (D - εI) S0^{-1/2}``, ``D = (4 S0^{1/2} S1 S0^{1/2} + ε² I)^{1/2}``;
    with ``M = S0^{1/2} S1 S0^{1/2} = Q diag(μ) Qᵀ``,
    ``D - εI = Q diag(4μ / (sqrt(4μ + ε²) + ε)) Qᵀ`` (no cancellation for large ``ε``).
    """
    root, inv_root = _sym_sqrt(S0)
    M = root @ S1 @ root
    M = 0.5 * (M + M.T)
    mu, Q = np.linalg.eigh(M)
    delta = 4.0 * mu / (np.sqrt(4.0 * mu + eps**2) + eps)
    cross = 0.5 * root @ ((Q * delta) @ Q.T) @ inv_root
    logdet_s0 = float(np.linalg.slogdet(S0)[1])
    return _Coupling(cross=cross, delta=delta, logdet_s0=logdet_s0)


def _kl_to_reference(
    coupling: _Coupling,
    S0: np.ndarray,
    S1: np.ndarray,
    theta: float,
    noise: float,
    horizon: float,
    eps: float,
) -> float:
    r"""``KL(π | R0T)`` for the OU reference, in a form free of cancellation and overflow.

    With ``v = v(T) = σ² T exprel(-2θT)`` and ``e = e^{-θT}``:
    ``KL = -½ log det Σ_{Y|X} + (d/2) log v - d/2 + E|Y - eX|²/(2v)``, where the conditional
    covariance of ``π`` is ``S1 - Cᵀ S0⁻¹ C = S0^{-1/2} Q diag(ε δ/2) Qᵀ S0^{-1/2}`` and
    ``E|Y - eX|²/(2v) = tr S1/(2v) - tr C/ε + tr S0 /(2 σ² T exprel(2θT))``.
    """
    d = S0.shape[0]
    delta = coupling.delta
    v = noise**2 * horizon * float(_exprel(-2.0 * theta * horizon))
    logdet_cond = -coupling.logdet_s0 + float(np.sum(np.log(0.5 * eps * delta)))
    quad = (
        np.trace(S1) / (2.0 * v)
        - 0.5 * float(np.sum(delta)) / eps
        + np.trace(S0) / (2.0 * noise**2 * horizon * float(_exprel(2.0 * theta * horizon)))
    )
    return float(-0.5 * logdet_cond + 0.5 * d * np.log(v) - 0.5 * d + quad)


# ---------------------------------------------------------------------------------------------
# Input validation
# ---------------------------------------------------------------------------------------------


def _real(name: str, value: Any) -> float:
    if isinstance(value, bool):
        raise InputError(f"{name} must be a real number, got a bool ({value!r})")
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name} must be a real number, got {value!r}") from exc
    if arr.ndim != 0:
        raise InputError(f"{name} must be a scalar, got an array of shape {arr.shape}")
    out = float(arr)
    if not np.isfinite(out):
        raise InputError(f"{name} must be finite, got {out}")
    return out


def _array(name: str, value: Any) -> np.ndarray:
    if isinstance(value, bool):
        raise InputError(f"{name} must be real, got a bool")
    try:
        arr = np.array(value, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name} must be a real scalar or array, got {value!r}") from exc
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} must contain only finite values, got {arr!r}")
    return arr


def _parse_mean(name: str, value: Any) -> np.ndarray:
    arr = _array(name, value)
    if arr.ndim > 1:
        raise InputError(f"{name} must be a scalar or a length-d sequence, got shape {arr.shape}")
    return arr


def _parse_cov(name: str, value: Any) -> np.ndarray:
    arr = _array(name, value)
    if arr.ndim == 0 or arr.ndim == 1:
        if arr.ndim == 1 and arr.size == 0:
            raise InputError(f"{name} must not be empty")
        if np.any(arr <= 0.0):
            raise InputError(
                f"{name} given as a variance or a diagonal must be positive, got {arr!r}"
            )
        return arr
    if arr.ndim != 2 or arr.shape[0] != arr.shape[1] or arr.shape[0] == 0:
        raise InputError(
            f"{name} must be a positive scalar, a length-d diagonal or a d×d symmetric "
            f"positive-definite matrix, got shape {arr.shape}"
        )
    scale = float(np.max(np.abs(arr)))
    if np.max(np.abs(arr - arr.T)) > _SYMMETRY_RTOL * scale:
        raise InputError(f"{name} must be symmetric, got {arr!r}")
    arr = 0.5 * (arr + arr.T)
    try:
        np.linalg.cholesky(arr)
    except np.linalg.LinAlgError as exc:
        raise InputError(
            f"{name} must be positive definite (smallest eigenvalue "
            f"{np.linalg.eigvalsh(arr)[0]:.3g})"
        ) from exc
    if np.linalg.eigvalsh(arr)[0] <= 0.0:
        raise InputError(f"{name} must be positive definite")
    return arr


def _dimension(items: Sequence[tuple[str, np.ndarray]]) -> int:
    dims = {name: arr.shape[0] for name, arr in items if arr.ndim >= 1}
    if not dims:
        return 1
    if len(set(dims.values())) > 1:
        listing = ", ".join(f"{n}: {k}" for n, k in dims.items())
        raise InputError(f"mismatched dimensions between the endpoint laws ({listing})")
    return next(iter(dims.values()))


def _broadcast_mean(arr: np.ndarray, d: int) -> np.ndarray:
    return np.full(d, float(arr)) if arr.ndim == 0 else arr.copy()


def _broadcast_cov(arr: np.ndarray, d: int) -> np.ndarray:
    if arr.ndim == 0:
        return float(arr) * np.eye(d)
    if arr.ndim == 1:
        return np.diag(arr)
    return arr.copy()


def _parse_times(times: Any, horizon: float) -> np.ndarray:
    if isinstance(times, bool):
        raise InputError("times must be an int (number of points) or an increasing array")
    if isinstance(times, (int, np.integer)):
        if times < 2:
            raise InputError(f"times as a number of grid points must be at least 2, got {times}")
        return np.linspace(0.0, horizon, int(times))
    arr = _array("times", times)
    if arr.ndim != 1 or arr.size < 2:
        raise InputError(
            f"times must be an int or a 1-D array of at least 2 points, got shape {arr.shape}"
        )
    tol = 1e-12 * horizon
    if abs(arr[0]) > tol or abs(arr[-1] - horizon) > tol:
        raise InputError(
            f"times must run from 0 to the horizon {horizon}, got [{arr[0]}, ..., {arr[-1]}]"
        )
    if np.any(np.diff(arr) <= 0.0):
        raise InputError("times must be strictly increasing")
    arr[0] = 0.0
    arr[-1] = horizon
    if np.any(np.diff(arr) <= 0.0):
        raise InputError("times must be strictly increasing")
    return arr


# ---------------------------------------------------------------------------------------------
# Main entry point
# ---------------------------------------------------------------------------------------------


def lq_bridge(
    *,
    stiffness: float,
    strength: float,
    noise: float,
    horizon: float,
    mean0: Any,
    cov0: Any,
    mean1: Any,
    cov1: Any,
    times: np.ndarray | int = 101,
    variant: str = "optimal",
) -> LQBridge:
    """Exact mean-field Schrödinger bridge of the linear–quadratic model (see module docstring).

    Args:
        stiffness: ``a`` in ``U(x) = a|x|²/2`` (any real).
        strength: ``κ`` in ``W(z) = κ|z|²/2`` (any real; negative = repulsion).
        noise: ``σ > 0``.
        horizon: ``T > 0``.
        mean0, mean1: endpoint means, scalar (broadcast) or length-``d`` sequences.
        cov0, cov1: endpoint covariances: a positive scalar (times identity), a length-``d``
            positive diagonal or a ``d×d`` symmetric positive-definite matrix.
        times: number of equally spaced points on ``[0, T]`` (``≥ 2``) or a strictly
            increasing array from ``0`` to ``T``.
        variant: ``"optimal"`` (minimiser of ``J``) or ``"frozen"`` (self-consistent fixed
            point of the bridge with frozen interaction).

    Returns:
        The :class:`LQBridge` on the time grid.

    Raises:
        InputError: for any invalid input, before any numerical work.
    """
    a = _real("stiffness", stiffness)
    kappa = _real("strength", strength)
    sigma = _real("noise", noise)
    T = _real("horizon", horizon)
    if sigma <= 0.0:
        raise InputError(f"noise must be positive, got {sigma}")
    if T <= 0.0:
        raise InputError(f"horizon must be positive, got {T}")
    if not isinstance(variant, str) or variant not in VARIANTS:
        raise unknown_name("variant", str(variant), VARIANTS)
    theta = a + kappa
    for label, rate in (
        ("stiffness", a),
        ("stiffness + strength", theta),
        ("2*stiffness + strength", 2.0 * a + kappa),
    ):
        if abs(rate) * T > MAX_RATE_TIMES_HORIZON:
            raise InputError(
                f"|{label}| * horizon must be at most {MAX_RATE_TIMES_HORIZON} "
                f"(exponentials overflow beyond), got {abs(rate) * T:.6g}"
            )
    m0_raw = _parse_mean("mean0", mean0)
    m1_raw = _parse_mean("mean1", mean1)
    s0_raw = _parse_cov("cov0", cov0)
    s1_raw = _parse_cov("cov1", cov1)
    d = _dimension([("mean0", m0_raw), ("mean1", m1_raw), ("cov0", s0_raw), ("cov1", s1_raw)])
    if d == 0:
        raise InputError("the dimension must be at least 1")
    m0 = _broadcast_mean(m0_raw, d)
    m1 = _broadcast_mean(m1_raw, d)
    S0 = _broadcast_cov(s0_raw, d)
    S1 = _broadcast_cov(s1_raw, d)
    t = _parse_times(times, T)
    eps = sigma**2 * T * float(_sinhc(theta * T))
    if not (eps > 0.0 and np.isfinite(eps)):
        raise InputError(f"noise**2 * horizon = {sigma**2 * T} is too small to be represented")

    # (ii) centred part: entropic coupling, OU-bridge covariance path, gain.
    coupling = _entropic_coupling(S0, S1, eps)
    C = coupling.cross
    cost_centred = _kl_to_reference(coupling, S0, S1, theta, sigma, T, eps)
    co = _bridge_coefficients(theta, sigma, T, t)
    eye = np.eye(d)
    CC = C + C.T
    ab = co.alpha * co.beta
    cov = (
        (co.alpha**2)[:, None, None] * S0
        + (co.beta**2)[:, None, None] * S1
        + ab[:, None, None] * CC
        + co.gamma[:, None, None] * eye
    )
    cov = 0.5 * (cov + np.swapaxes(cov, 1, 2))
    dcov = (
        (2.0 * co.alpha * co.dalpha)[:, None, None] * S0
        + (2.0 * co.beta * co.dbeta)[:, None, None] * S1
        + (co.dalpha * co.beta + co.alpha * co.dbeta)[:, None, None] * CC
        + co.dgamma[:, None, None] * eye
    )
    gain = np.empty_like(cov)
    for k in range(t.size):
        rhs = dcov[k] + 2.0 * theta * cov[k] - sigma**2 * eye
        rhs = 0.5 * (rhs + rhs.T)
        A = scipy.linalg.solve_sylvester(cov[k], cov[k], rhs)
        gain[k] = 0.5 * (A + A.T)

    # (i)/(iii) mean part.
    if variant == "optimal":
        ma = _bridge_coefficients(a, sigma, T, t)
        mean = ma.alpha[:, None] * m0 + ma.beta[:, None] * m1
        num = (m1 - m0) + np.expm1(a * t)[:, None] * m1 - np.expm1(-a * (T - t))[:, None] * m0
        mean_control = num / (T * float(_sinhc(a * T)))
        w = np.cosh(0.5 * a * T) * (m1 - m0) + np.sinh(0.5 * a * T) * (m1 + m0)
        cost_mean = float(w @ w) / (2.0 * sigma**2 * T * float(_sinhc(a * T)))
    else:
        q = 2.0 * a + kappa
        c_prime = ((m1 - m0) + np.expm1(a * T) * m1) / (T * float(_exprel(q * T)))
        decay = np.exp(-a * t)
        mean = decay[:, None] * m0 + (decay * t * _exprel(q * t))[:, None] * c_prime
        mean_control = np.exp(theta * t)[:, None] * c_prime
        cost_mean = (
            float(c_prime @ c_prime) * T * float(_exprel(2.0 * theta * T)) / (2.0 * sigma**2)
        )

    logdet = np.linalg.slogdet(cov)[1]
    trace = np.trace(cov, axis1=1, axis2=2)
    free_energy = (
        -0.25 * sigma**2 * (d * np.log(2.0 * np.pi * np.e) + logdet)
        + 0.5 * a * (np.sum(mean**2, axis=1) + trace)
        + 0.5 * kappa * trace
    )

    arrays = (t, mean, cov, mean_control, gain, C, free_energy)
    for arr in arrays:
        arr.setflags(write=False)
    return LQBridge(
        times=t,
        mean=mean,
        cov=cov,
        mean_control=mean_control,
        gain=gain,
        endpoint_cross_cov=C,
        cost=cost_mean + cost_centred,
        cost_mean=cost_mean,
        cost_centred=cost_centred,
        free_energy=free_energy,
        variant=variant,
    )
