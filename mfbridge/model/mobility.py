r"""Density-dependent mobility and diffusion of lattice gases (macroscopic fluctuation theory).

At large scale many lattice particle systems (exclusion, zero-range, energy exchange) fluctuate
according to the rate function

.. math::

    J(\rho, j) = \frac{1}{2\sigma^2}\int_0^T\!\!\int
        \frac{|j + \tfrac{\sigma^2}{2} D(\rho)\nabla\rho + \chi(\rho)\nabla(U + W*\rho)|^2}
             {\chi(\rho)}\,dx\,dt,
    \qquad \partial_t\rho + \nabla\cdot j = 0,

with mobility :math:`\chi` and diffusion :math:`D` tied to the free-energy density :math:`f` by
the Einstein relation :math:`f''(\rho) = D(\rho)/\chi(\rho)` (Bertini, De Sole, Gabrielli,
Jona-Lasinio & Landim, "Macroscopic fluctuation theory", Rev. Mod. Phys. 2015). The free energy
is :math:`F(\rho) = \tfrac{\sigma^2}{2}\int f(\rho) + \int U\rho + \tfrac12\iint W\rho\rho`.
For :class:`Walkers` (:math:`\chi = \rho`, :math:`D = 1`, :math:`f = \rho\log\rho`) J is exactly
the mean-field rate function of the main solver; σ² = 2 gives the usual MFT normalisation.

A mobility is a small object with ``chi``, ``d``, ``f`` and ``f2`` (= f''), each mapping a
density array (numpy array *or* float64 torch tensor, any shape; units 1/length^d) to an array
of the same shape and type, and an open domain ``(lower, upper)`` for the density. Nothing here
imports torch unless a torch tensor is passed in or a user function is evaluated.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from collections.abc import Callable
from typing import Any, ClassVar

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.potentials import resolve_callable

__all__ = [
    "EnergyExchange",
    "Exclusion",
    "Mobility",
    "UserMobility",
    "Walkers",
    "ZeroRange",
    "check_einstein",
    "saturating_rate",
]


# --------------------------------------------------------------------------- array backends


def _is_torch(x: Any) -> bool:
    return type(x).__module__.startswith("torch")


def _xp(x: Any) -> Any:
    """The array module of ``x``: torch for a torch tensor, numpy otherwise."""
    if _is_torch(x):
        import torch

        return torch
    return np


def _xlogx(x: Any) -> Any:
    """x log x with 0 log 0 = 0, for numpy arrays or torch tensors."""
    if _is_torch(x):
        import torch

        return torch.xlogy(x, x)
    from scipy.special import xlogy

    return xlogy(x, x)


def _torch_fn_of_numpy(fn: Callable[[Any], Any], rho: Any) -> np.ndarray:
    import torch

    return fn(torch.as_tensor(np.asarray(rho, dtype=float))).detach().numpy()


# --------------------------------------------------------------------------- base


class Mobility(ABC):
    r"""Mobility :math:`\chi(\rho)`, diffusion :math:`D(\rho)` and free-energy density
    :math:`f(\rho)` (with :math:`f'' = D/\chi`) on the open density domain
    ``(lower, upper)``.

    ``zero_allowed``: an endpoint may have empty cells (ρ = 0), because f(0) is finite; inside
    the time interval the direct solver keeps every density strictly in the domain.
    """

    name: ClassVar[str] = ""
    lower: ClassVar[float] = 0.0
    upper: ClassVar[float] = math.inf
    zero_allowed: ClassVar[bool] = True

    @abstractmethod
    def chi(self, rho: Any) -> Any:
        """Mobility χ(ρ) ≥ 0, same shape as ρ."""

    @abstractmethod
    def d(self, rho: Any) -> Any:
        """Diffusion coefficient D(ρ) > 0 (dimensionless factor of σ²/2), same shape as ρ."""

    @abstractmethod
    def f(self, rho: Any) -> Any:
        """Free-energy density f(ρ) (defined up to an affine function of ρ)."""

    def f2(self, rho: Any) -> Any:
        """f''(ρ) = D(ρ)/χ(ρ) (the Einstein relation)."""
        return self.d(rho) / self.chi(rho)

    def describe(self) -> dict[str, Any]:
        """Name and parameters, for run summaries."""
        return {"name": self.name}

    def check_density(self, rho: np.ndarray, name: str, hint: str = "") -> None:
        """Raise :class:`InputError` unless every entry of ``rho`` (densities, 1/length^d) lies
        in the domain: ``lower < ρ < upper``, or ρ = 0 where ``zero_allowed``."""
        rho = np.asarray(rho, dtype=float)
        inside = (rho > self.lower) & (rho < self.upper)
        if self.zero_allowed:
            inside |= rho == 0.0
        if not np.all(inside):
            bad = np.argwhere(~inside)
            first = tuple(int(i) for i in bad[0])
            low = "0 ≤" if self.zero_allowed and self.lower == 0.0 else f"{self.lower:g} <"
            domain = f"{low} ρ < {self.upper:g}"
            raise InputError(
                f"{name} leaves the domain of the {self.name} mobility ({domain}): "
                f"{len(bad)} cell(s), first at index {first} with ρ = {rho[first]:.4g} "
                f"(range of {name}: {rho.min():.4g} to {rho.max():.4g}){hint}"
            )

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in self.describe().items() if k != "name")
        return f"{type(self).__name__}({params})"

    def __eq__(self, other: object) -> bool:
        return type(other) is type(self) and other.describe() == self.describe()

    def __hash__(self) -> int:
        return hash((type(self).__name__, repr(self)))


# --------------------------------------------------------------------------- shipped mobilities


class Walkers(Mobility):
    """Independent random walkers: χ = ρ, D = 1, f = ρ log ρ (the main solver's model)."""

    name: ClassVar[str] = "walkers"

    def chi(self, rho: Any) -> Any:
        return rho

    def d(self, rho: Any) -> Any:
        return rho * 0 + 1.0

    def f(self, rho: Any) -> Any:
        return _xlogx(rho)

    def f2(self, rho: Any) -> Any:
        return 1.0 / rho


class Exclusion(Mobility):
    """Symmetric simple exclusion: χ = ρ(1 - ρ), D = 1, f = ρ log ρ + (1 - ρ) log(1 - ρ).

    ρ is the occupation per site, so densities must lie in [0, 1) at the endpoints and in
    (0, 1) inside the time interval.
    """

    name: ClassVar[str] = "exclusion"
    upper: ClassVar[float] = 1.0

    def chi(self, rho: Any) -> Any:
        return rho * (1.0 - rho)

    def d(self, rho: Any) -> Any:
        return rho * 0 + 1.0

    def f(self, rho: Any) -> Any:
        return _xlogx(rho) + _xlogx(1.0 - rho)

    def f2(self, rho: Any) -> Any:
        return 1.0 / (rho * (1.0 - rho))


class EnergyExchange(Mobility):
    """Energy exchange (KMP-type): χ = ρ², D = 1, f = -log ρ. Densities must be > 0 everywhere
    (f is infinite at ρ = 0). χ is convex, so the action is not jointly convex here."""

    name: ClassVar[str] = "energy_exchange"
    zero_allowed: ClassVar[bool] = False

    def chi(self, rho: Any) -> Any:
        return rho * rho

    def d(self, rho: Any) -> Any:
        return rho * 0 + 1.0

    def f(self, rho: Any) -> Any:
        return -_xp(rho).log(rho)

    def f2(self, rho: Any) -> Any:
        return 1.0 / (rho * rho)


def saturating_rate(rho: Any) -> Any:
    r"""φ(ρ) = ρ / (1 + ρ): the fugacity of the zero-range process that jumps at rate 1 from any
    occupied site (Bertini et al., Rev. Mod. Phys. 2015, zero-range example)."""
    return rho / (1.0 + rho)


# Gauss–Legendre nodes on [0, 1] for f(ρ) = ∫_0^ρ log φ(s) ds, written with s = ρu⁴ so that the
# logarithmic singularity of log φ at s = 0 becomes the mild integrand 4u³ log φ(ρu⁴).
_GL_U, _GL_W = np.polynomial.legendre.leggauss(48)
_GL_U = 0.5 * (_GL_U + 1.0)
_GL_W = 0.5 * _GL_W


class ZeroRange(Mobility):
    r"""Zero-range process with fugacity (mean jump rate) φ: χ = φ(ρ), D = φ'(ρ),
    f(ρ) = ∫₀^ρ log φ(s) ds, so f'' = φ'/φ = D/χ.

    ``rate``: a torch function (or import path ``"package.module:function"``) mapping a float64
    tensor of densities to φ of the same shape; it must be increasing with φ(0) = 0 and φ > 0
    for ρ > 0 (checked at sample densities). φ' comes from ``torch.autograd``; f from 48-point
    Gauss–Legendre quadrature in u with s = ρu⁴.
    """

    name: ClassVar[str] = "zero_range"

    def __init__(self, rate: Callable[[Any], Any] | str = "mfbridge.model.mobility:saturating_rate"
                 ) -> None:
        self.rate_name = rate if isinstance(rate, str) else (
            f"{getattr(rate, '__module__', '?')}:{getattr(rate, '__qualname__', repr(rate))}")
        self.rate = resolve_callable(rate, "ZeroRange rate")
        samples = np.geomspace(1e-3, 1e2, 40)
        try:
            phi = _torch_fn_of_numpy(self.rate, samples)
            dphi = self.d(samples)
        except InputError:
            raise
        except Exception as exc:
            raise InputError(
                f"ZeroRange rate {self.rate_name} failed on a float64 torch tensor of densities: "
                f"{type(exc).__name__}: {exc}"
            ) from exc
        if np.shape(phi) != samples.shape or not np.all(np.isfinite(phi)) or np.any(phi <= 0):
            raise InputError(f"ZeroRange rate {self.rate_name} must be > 0 for ρ > 0 (one value "
                             "per density)")
        if not np.all(dphi > 0):
            raise InputError(f"ZeroRange rate {self.rate_name} must be increasing (φ' > 0)")

    def chi(self, rho: Any) -> Any:
        if _is_torch(rho):
            return self.rate(rho)
        return _torch_fn_of_numpy(self.rate, rho)

    def d(self, rho: Any) -> Any:
        import torch

        if _is_torch(rho):
            inp = rho if rho.requires_grad else rho.detach().requires_grad_(True)
            out = self.rate(inp)
            (grad,) = torch.autograd.grad(out.sum(), inp, create_graph=rho.requires_grad)
            return grad
        with torch.enable_grad():
            t = torch.as_tensor(np.asarray(rho, dtype=float)).requires_grad_(True)
            (grad,) = torch.autograd.grad(self.rate(t).sum(), t)
        return grad.numpy()

    def f(self, rho: Any) -> Any:
        xp = _xp(rho)
        if _is_torch(rho):
            u = xp.as_tensor(_GL_U, dtype=rho.dtype)
            w = xp.as_tensor(_GL_W, dtype=rho.dtype)
            s = rho[..., None] * u**4
            logphi = xp.log(self.rate(s))
        else:
            rho = np.asarray(rho, dtype=float)
            u, w = _GL_U, _GL_W
            s = rho[..., None] * u**4
            with np.errstate(divide="ignore"):
                logphi = np.log(_torch_fn_of_numpy(self.rate, s))
            logphi = np.where(s > 0, logphi, 0.0)
        return rho * (logphi * 4.0 * u**3 * w).sum(-1)

    def describe(self) -> dict[str, Any]:
        return {"name": self.name, "rate": self.rate_name}


class UserMobility(Mobility):
    r"""A user pair (χ, D) with its free-energy density f, checked against the Einstein
    relation f'' = D/χ at construction.

    ``chi``, ``d``, ``f``: torch functions or import paths mapping float64 tensors of densities to
    tensors of the same shape (f'' is taken by ``torch.autograd``); ``lower``/``upper``: the open
    density domain; ``zero_allowed``: whether endpoints may have empty cells. The relation is
    checked at 64 densities inside the domain (relative tolerance ``tolerance``).
    """

    name: ClassVar[str] = "user"

    def __init__(self, chi: Callable[[Any], Any] | str, d: Callable[[Any], Any] | str,
                 f: Callable[[Any], Any] | str, lower: float = 0.0, upper: float = math.inf,
                 zero_allowed: bool = True, tolerance: float = 1e-6) -> None:
        self.names = {k: v if isinstance(v, str) else repr(v) for k, v in
                      (("chi", chi), ("d", d), ("f", f))}
        self._chi = resolve_callable(chi, "UserMobility chi")
        self._d = resolve_callable(d, "UserMobility d")
        self._f = resolve_callable(f, "UserMobility f")
        lo, hi = float(lower), float(upper)
        if not (math.isfinite(lo) and lo < hi):
            raise InputError(f"UserMobility needs a finite lower < upper, got ({lower}, {upper})")
        self.lower = lo  # type: ignore[misc]
        self.upper = hi  # type: ignore[misc]
        self.zero_allowed = bool(zero_allowed) and lo == 0.0  # type: ignore[misc]
        try:
            error = check_einstein(self)
        except InputError:
            raise
        except Exception as exc:
            raise InputError(f"UserMobility functions failed on a float64 torch tensor: "
                             f"{type(exc).__name__}: {exc}") from exc
        if not error <= tolerance:
            raise InputError(
                f"UserMobility violates the Einstein relation f'' = D/χ: largest relative "
                f"mismatch {error:.3g} over the domain ({lo:g}, {hi:g}) (tolerance {tolerance:g})"
            )

    def _eval(self, fn: Callable[[Any], Any], rho: Any) -> Any:
        return fn(rho) if _is_torch(rho) else _torch_fn_of_numpy(fn, rho)

    def chi(self, rho: Any) -> Any:
        return self._eval(self._chi, rho)

    def d(self, rho: Any) -> Any:
        return self._eval(self._d, rho)

    def f(self, rho: Any) -> Any:
        return self._eval(self._f, rho)

    def describe(self) -> dict[str, Any]:
        return {"name": self.name, **self.names, "lower": self.lower, "upper": self.upper}


def _domain_samples(mobility: Mobility, count: int = 64) -> np.ndarray:
    lo, hi = mobility.lower, mobility.upper
    if math.isinf(hi):
        return lo + np.geomspace(1e-3, 1e2, count)
    return lo + (hi - lo) * np.linspace(0.01, 0.99, count)


def check_einstein(mobility: Mobility, samples: np.ndarray | None = None) -> float:
    r"""Largest relative mismatch :math:`|f''(\rho) - D(\rho)/\chi(\rho)| / |D/\chi|` over
    ``samples`` (default: 64 densities spread over the mobility's domain), with f'' computed by
    ``torch.autograd`` from ``mobility.f`` alone (independent of ``f2``)."""
    import torch

    rho_np = _domain_samples(mobility) if samples is None else np.asarray(samples, dtype=float)
    rho = torch.as_tensor(rho_np, dtype=torch.float64).requires_grad_(True)
    with torch.enable_grad():
        (df,) = torch.autograd.grad(mobility.f(rho).sum(), rho, create_graph=True)
        (d2f,) = torch.autograd.grad(df.sum(), rho)
    expected = np.asarray(mobility.d(rho_np), dtype=float) / np.asarray(mobility.chi(rho_np),
                                                                       dtype=float)
    return float(np.max(np.abs(d2f.numpy() - expected) / np.abs(expected)))
