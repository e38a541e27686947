"""Confining potentials U(x) and pair interactions W(z) of the particle model.

The particles follow

    dX^i = [-∇U(X^i) - (1/N) Σ_j ∇W(X^i - X^j)] dt + σ dB^i,

so U and W are energies per unit mass with units L²/T² when x has length units L and time
has units T (equivalently, in the units in which σ²/2 is a diffusivity L²/T).  Gradients then
have units L/T².

All classes take and return float64 numpy arrays and are vectorised over leading axes:
``value`` maps points of shape (..., d) to (...), ``grad`` maps (..., d) to (..., d).  The
dimension d is taken from the last axis of the input.  Pair interactions take the
separation z = x - y and are even, W(-z) = W(z), hence ∇W(-z) = -∇W(z) and ∇W(0) = 0.

User-defined potentials are given as torch functions (:class:`TorchConfinement`,
:class:`TorchInteraction`); their gradients come from ``torch.autograd`` in float64.
"""

from __future__ import annotations

import importlib
from abc import ABC, abstractmethod
from collections.abc import Callable
from dataclasses import dataclass, fields, is_dataclass
from typing import Any, ClassVar

import numpy as np

from mfbridge.errors import InputError, unknown_name
from mfbridge.model.grid import to_float_array

__all__ = [
    "Confinement",
    "DoubleWell",
    "GaussianCore",
    "Harmonic",
    "HarmonicInteraction",
    "Interaction",
    "Morse",
    "NoConfinement",
    "NoInteraction",
    "SoftCoulomb",
    "TiltedDoubleWell",
    "TorchConfinement",
    "TorchInteraction",
    "confinement_from_name",
    "confinement_names",
    "formula_numbers",
    "interaction_from_name",
    "interaction_names",
    "resolve_callable",
]


# --------------------------------------------------------------------------- helpers


def _points(x: Any, what: str = "points") -> np.ndarray:
    """Float64 array of shape (..., d) with d ≥ 1; InputError otherwise."""
    if isinstance(x, np.ndarray) and x.dtype == np.float64:
        arr = x
    else:
        try:
            arr = np.asarray(x, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise InputError(f"{what} must be a numeric array of shape (..., d)") from exc
    if arr.ndim == 0 or arr.shape[-1] == 0:
        raise InputError(
            f"{what} must be an array of shape (..., d) with d ≥ 1 coordinates on the last "
            f"axis, got shape {arr.shape}"
        )
    return arr


def _finite(value: Any, name: str) -> float:
    arr = to_float_array(value, name, max_ndim=0)
    return float(arr)


def _positive(value: Any, name: str) -> float:
    out = _finite(value, name)
    if out <= 0.0:
        raise InputError(f"{name} must be > 0, got {out}")
    return out


def _nonnegative(value: Any, name: str) -> float:
    out = _finite(value, name)
    if out < 0.0:
        raise InputError(f"{name} must be ≥ 0, got {out}")
    return out


def _params(obj: Any) -> dict[str, Any]:
    """Fields of a dataclass potential; for any other class its public attributes of simple
    types (a user's subclass need not be a dataclass)."""
    if not is_dataclass(obj):
        return {k: v for k, v in vars(obj).items() if not k.startswith("_")
                and (v is None or isinstance(v, (bool, int, float, str)))}
    out: dict[str, Any] = {}
    for f in fields(obj):
        v = getattr(obj, f.name)
        out[f.name] = list(v) if isinstance(v, tuple) else v
    return out


def resolve_callable(fn: Callable[..., Any] | str, what: str = "fn") -> Callable[..., Any]:
    """Return ``fn`` itself, or import it from a dotted path.

    Accepted paths: ``"package.module:function"`` (attribute path after the colon may itself
    be dotted, e.g. ``"pkg.mod:Class.method"``) or ``"package.module.function"``.
    """
    if callable(fn):
        return fn
    if not isinstance(fn, str) or not fn.strip():
        raise InputError(
            f"{what} must be a callable or an import path 'package.module:function', got {fn!r}"
        )
    path = fn.strip()
    if ":" in path:
        module_name, _, attr_path = path.partition(":")
    else:
        module_name, _, attr_path = path.rpartition(".")
    if not module_name or not attr_path:
        raise InputError(
            f"{what} import path must look like 'package.module:function' or "
            f"'package.module.function', got {fn!r}"
        )
    try:
        obj: Any = importlib.import_module(module_name)
    except ImportError as exc:
        import os

        raise InputError(
            f"{what} {fn!r}: cannot import module {module_name!r} ({exc}); modules are looked "
            f"up on Python's path (installed packages) and, by the mfbridge command, in the "
            f"working directory {os.getcwd()}: put {module_name.split('.')[0]}.py there or "
            "install its package"
        ) from exc
    for part in attr_path.split("."):
        try:
            obj = getattr(obj, part)
        except AttributeError as exc:
            raise InputError(
                f"{what} {fn!r}: {module_name!r} has no attribute {attr_path!r}"
            ) from exc
    if not callable(obj):
        raise InputError(f"{what} {fn!r} resolves to {obj!r}, which is not callable")
    return obj


def _fn_name(fn: Callable[..., Any], given: Callable[..., Any] | str) -> str:
    if isinstance(given, str):
        return given
    module = getattr(fn, "__module__", None) or "?"
    name = getattr(fn, "__qualname__", None) or repr(fn)
    return f"{module}:{name}"


# --------------------------------------------------------------------------- bases


class Confinement(ABC):
    """Confining potential U(x) (L²/T²) acting on each particle.

    ``value``: x (..., d) -> U(x) (...);  ``grad``: x (..., d) -> ∇U(x) (..., d) (L/T²).
    """

    name: ClassVar[str] = ""

    @abstractmethod
    def value(self, x: np.ndarray) -> np.ndarray:
        """U(x) for points x of shape (..., d); returns shape (...)."""

    @abstractmethod
    def grad(self, x: np.ndarray) -> np.ndarray:
        """∇U(x) for points x of shape (..., d); returns shape (..., d)."""

    def describe(self) -> dict[str, Any]:
        """Registry name (or class path) and parameters as a plain dict (for run summaries)."""
        cls = type(self)
        return {"name": self.name or f"{cls.__module__}.{cls.__qualname__}", **_params(self)}


class Interaction(ABC):
    """Even pair potential W(z) (L²/T²) of the separation z = x - y of two particles.

    ``value``: z (..., d) -> W(z) (...);  ``grad``: z (..., d) -> ∇W(z) (..., d).
    ``is_zero`` is True only for :class:`NoInteraction`, so a solver can skip the mean field.
    """

    name: ClassVar[str] = ""
    is_zero: ClassVar[bool] = False

    @abstractmethod
    def value(self, z: np.ndarray) -> np.ndarray:
        """W(z) for separations z of shape (..., d); returns shape (...)."""

    @abstractmethod
    def grad(self, z: np.ndarray) -> np.ndarray:
        """∇W(z) for separations z of shape (..., d); returns shape (..., d)."""

    def describe(self) -> dict[str, Any]:
        """Registry name (or class path) and parameters as a plain dict (for run summaries)."""
        cls = type(self)
        return {"name": self.name or f"{cls.__module__}.{cls.__qualname__}", **_params(self)}


# --------------------------------------------------------------------------- confinements


@dataclass(frozen=True)
class NoConfinement(Confinement):
    """U(x) = 0 (free particles, held only by the no-flux walls of the grid)."""

    name: ClassVar[str] = "none"

    def value(self, x: np.ndarray) -> np.ndarray:
        """U(x) = 0, shape (...)."""
        return np.zeros(_points(x).shape[:-1])

    def grad(self, x: np.ndarray) -> np.ndarray:
        """∇U(x) = 0, shape (..., d)."""
        return np.zeros(_points(x).shape)


@dataclass(frozen=True)
class Harmonic(Confinement):
    """U(x) = stiffness · |x - centre|² / 2;  ∇U(x) = stiffness · (x - centre).

    stiffness: 1/T² (any finite real; negative gives an inverted, repelling parabola).
    centre: L, a scalar (same on every axis) or one value per axis (stored as a tuple).
    """

    name: ClassVar[str] = "harmonic"
    stiffness: float = 1.0
    centre: float | tuple[float, ...] = 0.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "stiffness", _finite(self.stiffness, "Harmonic stiffness"))
        c = to_float_array(self.centre, "Harmonic centre", max_ndim=1)
        centre: float | tuple[float, ...] = float(c) if c.ndim == 0 else tuple(map(float, c))
        object.__setattr__(self, "centre", centre)

    def _shift(self, x: np.ndarray) -> np.ndarray:
        arr = _points(x)
        if isinstance(self.centre, tuple):
            if len(self.centre) != arr.shape[-1]:
                raise InputError(
                    f"Harmonic centre has {len(self.centre)} coordinates but the points have "
                    f"d = {arr.shape[-1]} (shape {arr.shape})"
                )
            return arr - np.asarray(self.centre)
        return arr - self.centre

    def formula(self, x: Any, xp: Any, stiffness: Any, centre: Any) -> Any:
        """stiffness |x - centre|²/2 in the array library ``xp`` (see :func:`formula_numbers`)."""
        s = x - centre
        return 0.5 * stiffness * (s * s).sum(-1)

    def value(self, x: np.ndarray) -> np.ndarray:
        """stiffness |x - centre|²/2, shape (...)."""
        self._shift(x)  # checks the number of coordinates of a per-axis centre
        return self.formula(_points(x), np, **formula_numbers(self, np))

    def grad(self, x: np.ndarray) -> np.ndarray:
        """stiffness (x - centre), shape (..., d)."""
        return self.stiffness * self._shift(x)


def _double_well_value(x: Any, depth: Any, tilt: Any, stiffness: Any) -> Any:
    """The double-well formula for numpy arrays or torch tensors."""
    x0 = x[..., 0]
    rest = x[..., 1:]
    return (
        depth * (0.25 * x0**4 - 0.5 * x0**2)
        + tilt * x0
        + 0.5 * stiffness * (rest * rest).sum(-1)
    )


def _double_well_grad(x: np.ndarray, depth: float, tilt: float, stiffness: float) -> np.ndarray:
    out = stiffness * x
    x0 = x[..., 0]
    out[..., 0] = depth * (x0**3 - x0) + tilt
    return out


@dataclass(frozen=True)
class DoubleWell(Confinement):
    """U(x) = depth · (x₀⁴/4 - x₀²/2) + stiffness · Σ_{i≥1} x_i² / 2.

    Along the first axis the wells sit at x₀ = ±1 (length unit L) with U = -depth/4 and the
    barrier at x₀ = 0 has U = 0; the other axes are harmonic.  depth (L²/T², > 0 for two
    wells) and stiffness (1/T²) are any finite reals.

    ∇U = (depth · (x₀³ - x₀), stiffness · x₁, ..., stiffness · x_{d-1}).
    """

    name: ClassVar[str] = "double_well"
    depth: float = 1.0
    stiffness: float = 1.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "depth", _finite(self.depth, "DoubleWell depth"))
        object.__setattr__(self, "stiffness", _finite(self.stiffness, "DoubleWell stiffness"))

    def formula(self, x: Any, xp: Any, depth: Any, stiffness: Any) -> Any:
        """U in the array library ``xp`` (see :func:`formula_numbers`)."""
        return _double_well_value(x, depth, 0.0, stiffness)

    def value(self, x: np.ndarray) -> np.ndarray:
        """U(x), shape (...)."""
        return self.formula(_points(x), np, **formula_numbers(self, np))

    def grad(self, x: np.ndarray) -> np.ndarray:
        """∇U(x), shape (..., d)."""
        return _double_well_grad(_points(x), self.depth, 0.0, self.stiffness)


@dataclass(frozen=True)
class TiltedDoubleWell(Confinement):
    """U(x) = depth · (x₀⁴/4 - x₀²/2) + tilt · x₀ + stiffness · Σ_{i≥1} x_i² / 2.

    :class:`DoubleWell` plus a linear tilt (L/T²) along the first axis; a positive tilt
    raises the right well (x₀ ≈ +1) relative to the left one.
    ∇U = (depth · (x₀³ - x₀) + tilt, stiffness · x₁, ..., stiffness · x_{d-1}).
    """

    name: ClassVar[str] = "tilted_double_well"
    depth: float = 1.0
    tilt: float = 0.1
    stiffness: float = 1.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "depth", _finite(self.depth, "TiltedDoubleWell depth"))
        object.__setattr__(self, "tilt", _finite(self.tilt, "TiltedDoubleWell tilt"))
        object.__setattr__(self, "stiffness", _finite(self.stiffness, "TiltedDoubleWell stiffness"))

    def formula(self, x: Any, xp: Any, depth: Any, tilt: Any, stiffness: Any) -> Any:
        """U in the array library ``xp`` (see :func:`formula_numbers`)."""
        return _double_well_value(x, depth, tilt, stiffness)

    def value(self, x: np.ndarray) -> np.ndarray:
        """U(x), shape (...)."""
        return self.formula(_points(x), np, **formula_numbers(self, np))

    def grad(self, x: np.ndarray) -> np.ndarray:
        """∇U(x), shape (..., d)."""
        return _double_well_grad(_points(x), self.depth, self.tilt, self.stiffness)


# --------------------------------------------------------------------------- interactions


@dataclass(frozen=True)
class NoInteraction(Interaction):
    """W(z) = 0: independent particles (the mean-field drift vanishes)."""

    name: ClassVar[str] = "none"
    is_zero: ClassVar[bool] = True

    def value(self, z: np.ndarray) -> np.ndarray:
        """W(z) = 0, shape (...)."""
        return np.zeros(_points(z, "separations").shape[:-1])

    def grad(self, z: np.ndarray) -> np.ndarray:
        """∇W(z) = 0, shape (..., d)."""
        return np.zeros(_points(z, "separations").shape)


@dataclass(frozen=True)
class HarmonicInteraction(Interaction):
    """W(z) = strength · |z|² / 2;  ∇W(z) = strength · z.

    strength (1/T²) > 0 attracts the particles to each other, < 0 repels them.
    """

    name: ClassVar[str] = "harmonic"
    strength: float = 1.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "strength", _finite(self.strength, "HarmonicInteraction strength"))

    def formula(self, z: Any, xp: Any, strength: Any) -> Any:
        """W in the array library ``xp`` (see :func:`formula_numbers`)."""
        return 0.5 * strength * (z * z).sum(-1)

    def value(self, z: np.ndarray) -> np.ndarray:
        """W(z), shape (...)."""
        return self.formula(_points(z, "separations"), np, **formula_numbers(self, np))

    def grad(self, z: np.ndarray) -> np.ndarray:
        """∇W(z), shape (..., d)."""
        return self.strength * _points(z, "separations")


@dataclass(frozen=True)
class GaussianCore(Interaction):
    """W(z) = strength · exp(-|z|² / (2 range²));  ∇W(z) = -(strength / range²) · z · exp(...).

    strength (L²/T²) > 0 is a soft repulsion, < 0 a soft attraction; range (L) > 0.
    """

    name: ClassVar[str] = "gaussian"
    strength: float = 1.0
    range: float = 0.5

    def __post_init__(self) -> None:
        object.__setattr__(self, "strength", _finite(self.strength, "GaussianCore strength"))
        object.__setattr__(self, "range", _positive(self.range, "GaussianCore range"))

    def formula(self, z: Any, xp: Any, strength: Any, range: Any) -> Any:
        """W in the array library ``xp`` (see :func:`formula_numbers`)."""
        return strength * xp.exp(-(z * z).sum(-1) / (2.0 * range**2))

    def value(self, z: np.ndarray) -> np.ndarray:
        """W(z), shape (...)."""
        return self.formula(_points(z, "separations"), np, **formula_numbers(self, np))

    def grad(self, z: np.ndarray) -> np.ndarray:
        """∇W(z), shape (..., d)."""
        arr = _points(z, "separations")
        w = self.value(arr)
        return (-w / self.range**2)[..., None] * arr


@dataclass(frozen=True)
class Morse(Interaction):
    """Morse pair potential, softened at z = 0 to be smooth and even.

        W(z) = depth · (e^{-2 width (r_ε - distance)} - 2 e^{-width (r_ε - distance)}),
        r_ε = sqrt(|z|² + softening²),
        ∇W(z) = 2 depth width (e^{-width (r_ε - distance)} - e^{-2 width (r_ε - distance)}) z / r_ε.

    depth (L²/T²) > 0 is the well depth, width (1/L) > 0 its inverse width, distance (L) ≥ 0
    the preferred separation and softening ε (L) > 0 (default 1e-3) the regularisation.  The
    minimum W = -depth is reached at r_ε = distance, i.e. |z| = sqrt(distance² - ε²); for
    ε ≪ distance this differs from the unsoftened Morse potential by O(ε²/distance).
    """

    name: ClassVar[str] = "morse"
    depth: float = 1.0
    width: float = 1.0
    distance: float = 1.0
    softening: float = 1e-3

    def __post_init__(self) -> None:
        object.__setattr__(self, "depth", _finite(self.depth, "Morse depth"))
        object.__setattr__(self, "width", _positive(self.width, "Morse width"))
        object.__setattr__(self, "distance", _nonnegative(self.distance, "Morse distance"))
        object.__setattr__(self, "softening", _positive(self.softening, "Morse softening"))

    def _r(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        arr = _points(z, "separations")
        return arr, np.sqrt(np.sum(arr * arr, axis=-1) + self.softening**2)

    def formula(self, z: Any, xp: Any, depth: Any, width: Any, distance: Any,
                softening: Any) -> Any:
        """W in the array library ``xp`` (see :func:`formula_numbers`)."""
        r = xp.sqrt((z * z).sum(-1) + softening**2)
        e = xp.exp(-width * (r - distance))
        return depth * (e * e - 2.0 * e)

    def value(self, z: np.ndarray) -> np.ndarray:
        """W(z), shape (...)."""
        return self.formula(_points(z, "separations"), np, **formula_numbers(self, np))

    def grad(self, z: np.ndarray) -> np.ndarray:
        """∇W(z), shape (..., d)."""
        arr, r = self._r(z)
        e = np.exp(-self.width * (r - self.distance))
        dw_dr = 2.0 * self.depth * self.width * (e - e * e)
        return (dw_dr / r)[..., None] * arr


@dataclass(frozen=True)
class SoftCoulomb(Interaction):
    """Softened Coulomb pair potential.

        W(z) = strength / sqrt(|z|² + softening²),
        ∇W(z) = -strength · z / (|z|² + softening²)^{3/2}.

    Same formula in 1D, 2D and 3D.  strength (L³/T²) > 0 repels, < 0 attracts; softening (L) > 0.
    """

    name: ClassVar[str] = "coulomb"
    strength: float = 1.0
    softening: float = 0.1

    def __post_init__(self) -> None:
        object.__setattr__(self, "strength", _finite(self.strength, "SoftCoulomb strength"))
        object.__setattr__(self, "softening", _positive(self.softening, "SoftCoulomb softening"))

    def formula(self, z: Any, xp: Any, strength: Any, softening: Any) -> Any:
        """W in the array library ``xp`` (see :func:`formula_numbers`)."""
        return strength / xp.sqrt((z * z).sum(-1) + softening**2)

    def value(self, z: np.ndarray) -> np.ndarray:
        """W(z), shape (...)."""
        return self.formula(_points(z, "separations"), np, **formula_numbers(self, np))

    def grad(self, z: np.ndarray) -> np.ndarray:
        """∇W(z), shape (..., d)."""
        arr = _points(z, "separations")
        s2 = np.sum(arr * arr, axis=-1) + self.softening**2
        return (-self.strength / (s2 * np.sqrt(s2)))[..., None] * arr


# --------------------------------------------------------------------------- formulas


def formula_numbers(potential: Any, xp: Any) -> dict[str, Any]:
    """The keyword arguments of ``potential.formula``: its dataclass fields (tuples as arrays
    of the library ``xp``) or its torch ``params``; float64 tensors when ``xp`` is torch.

    Each built-in potential writes its value once, as ``formula(x, xp, **numbers)`` with
    operations that numpy arrays and torch tensors share; ``value`` calls it with numpy and
    :func:`parameter_derivative` with torch tensors (forward-mode autograd).
    """
    if is_dataclass(potential):
        raw: dict[str, Any] = {f.name: getattr(potential, f.name) for f in fields(potential)}
    else:  # a torch potential: its named numbers
        raw = dict(getattr(potential, "params", {}))
    if xp is np:
        return {k: np.asarray(v, dtype=float) if isinstance(v, tuple) else v
                for k, v in raw.items()}
    return {k: xp.as_tensor(v, dtype=xp.float64) for k, v in raw.items()}


# --------------------------------------------------------------------------- registries

_CONFINEMENTS: dict[str, type[Confinement]] = {
    cls.name: cls for cls in (NoConfinement, Harmonic, DoubleWell, TiltedDoubleWell)
}
_INTERACTIONS: dict[str, type[Interaction]] = {
    cls.name: cls for cls in (NoInteraction, HarmonicInteraction, GaussianCore, Morse, SoftCoulomb)
}


def confinement_names() -> tuple[str, ...]:
    """Registry names accepted by :func:`confinement_from_name`."""
    return tuple(_CONFINEMENTS)


def interaction_names() -> tuple[str, ...]:
    """Registry names accepted by :func:`interaction_from_name`."""
    return tuple(_INTERACTIONS)


def _build(kind: str, registry: dict[str, type[Any]], name: str, params: dict[str, Any]) -> Any:
    if not isinstance(name, str) or name not in registry:
        raise unknown_name(kind, str(name), list(registry))
    cls = registry[name]
    valid = [f.name for f in fields(cls)]
    wrong = sorted(set(params) - set(valid))
    if wrong:
        raise InputError(
            f"{kind} {name!r} has no parameter(s) {', '.join(wrong)}; valid parameters are: "
            f"{', '.join(valid) if valid else '(none)'}"
        )
    return cls(**params)


def confinement_from_name(name: str, **params: Any) -> Confinement:
    """Build a confinement from its registry name ("none", "harmonic", "double_well",
    "tilted_double_well") and keyword parameters."""
    return _build("confinement", _CONFINEMENTS, name, params)


def interaction_from_name(name: str, **params: Any) -> Interaction:
    """Build an interaction from its registry name ("none", "harmonic", "gaussian", "morse",
    "coulomb") and keyword parameters."""
    return _build("interaction", _INTERACTIONS, name, params)


# user potentials (torch functions) live in their own module; importable from here as before
from mfbridge.model.torch_potentials import TorchConfinement, TorchInteraction  # noqa: E402
