r"""Potentials given by the user: any object with ``value`` and ``grad``, checked up front.

A confinement U or pair interaction W may be any object with two methods,

* ``value(x)``: points of shape (m, d) (float64; length L) → U(x) of shape (m,) (L²/T²);
* ``grad(x)``: points of shape (m, d) → ∇U(x) of shape (m, d) (L/T²),

a subclass of :class:`~mfbridge.model.potentials.Confinement` /
:class:`~mfbridge.model.potentials.Interaction` or not. Before any numerical work,
:func:`as_confinement` and :func:`as_interaction` call both methods on a few points of the
problem's box (deterministic, seed 0) and refuse, with an
:class:`~mfbridge.errors.InputError` that names the user's class, a potential whose

* outputs have the wrong shape or are not finite;
* gradient disagrees with central differences of the value,
  (V(x + h e_k) − V(x − h e_k)) / (2h) with h = 1e-5 × the box side, by more than 1 % of the
  largest gradient seen (the central-difference error is O(h²); common practice, no source);
* (interactions; separations from 1e-3 to 1 box side) is not even: |W(z) − W(−z)| or
  |∇W(z) + ∇W(−z)| above 1e-9 of the largest value or gradient (the model needs
  W(−z) = W(z): the pair force must be antisymmetric).

Objects that are not subclasses are wrapped (:class:`UserConfinement`, :class:`UserInteraction`)
so the solvers see the usual interface; ``describe()`` of any potential then names its class.
"""

from __future__ import annotations

from typing import Any, ClassVar

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.potentials import Confinement, Interaction

__all__ = ["UserConfinement", "UserInteraction", "as_confinement", "as_interaction",
           "check_potential", "class_path"]

CHECK_POINTS = 6
"""Points at which a potential is checked (plus their mirror images for interactions)."""
STEP = 1e-5
"""Central-difference step as a fraction of the box side."""
GRAD_RTOL = 1e-2
"""Accepted gradient mismatch, relative to the largest gradient seen."""
EVEN_RTOL = 1e-9
"""Accepted asymmetry W(z) − W(−z), relative to the largest value seen."""


def class_path(obj: Any) -> str:
    """``module.QualName`` of ``obj``'s class (how the user wrote it)."""
    cls = type(obj)
    return f"{cls.__module__}.{cls.__qualname__}"


def _describe_any(obj: Any) -> dict[str, Any]:
    """``describe()`` of the object if it has a working one, else its class and public fields."""
    describe = getattr(obj, "describe", None)
    if callable(describe):
        try:
            out = describe()
        except Exception:  # a user's describe must not fail a run after the solve
            out = None
        if isinstance(out, dict):
            return out
    public = {k: v for k, v in getattr(obj, "__dict__", {}).items() if not k.startswith("_")}
    plain = {k: v for k, v in public.items()
             if isinstance(v, (bool, int, float, str)) or v is None}
    return {"name": getattr(obj, "name", "") or class_path(obj), "class": class_path(obj),
            **plain}


class _Wrapped:
    """Delegates ``value``/``grad`` to the user's object, as float64 arrays."""

    def __init__(self, obj: Any) -> None:
        self.obj = obj
        self.user_class = class_path(obj)

    def value(self, x: np.ndarray) -> np.ndarray:
        """The user's value at points x (..., d); shape (...)."""
        return np.asarray(self.obj.value(x), dtype=np.float64)

    def grad(self, x: np.ndarray) -> np.ndarray:
        """The user's gradient at points x (..., d); shape (..., d)."""
        return np.asarray(self.obj.grad(x), dtype=np.float64)

    def describe(self) -> dict[str, Any]:
        """The user's ``describe()`` if any, else class path and simple public attributes."""
        return {"class": self.user_class, **_describe_any(self.obj)}

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.obj!r})"


class UserConfinement(_Wrapped, Confinement):
    """A confinement U given as any object with ``value(x)`` and ``grad(x)``."""

    name: ClassVar[str] = "user"


class UserInteraction(_Wrapped, Interaction):
    """A pair interaction W given as any object with ``value(z)`` and ``grad(z)`` (even in z)."""

    name: ClassVar[str] = "user"


def _call(obj: Any, method: str, points: np.ndarray, expected: tuple[int, ...], label: str
          ) -> np.ndarray:
    try:
        out = getattr(obj, method)(points.copy())
    except InputError:
        raise
    except Exception as exc:  # the user's code failed: say where, keep the cause
        raise InputError(f"{label}.{method} raised {type(exc).__name__}: {exc} (called with "
                         f"a float64 array of shape {points.shape})") from exc
    try:
        arr = np.asarray(out, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{label}.{method} must return a float array of shape {expected}, got "
                         f"{type(out).__name__}") from exc
    if arr.shape != expected:
        raise InputError(f"{label}.{method} must return shape {expected} for points of shape "
                         f"{points.shape}, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        bad = ~np.isfinite(arr.reshape(len(points), -1)).all(axis=1)
        raise InputError(f"{label}.{method} returned NaN or infinite values, e.g. at "
                         f"{np.array2string(points[bad][0], precision=4)} (inside the box)")
    return arr


def check_potential(obj: Any, kind: str, lower: np.ndarray, upper: np.ndarray) -> None:
    """Check ``obj.value``/``obj.grad`` on a few points; ``kind`` is ``"confinement"`` (points
    in the box [lower, upper]) or ``"interaction"`` (separations in [−side, side], and evenness).
    Raises :class:`InputError` naming the class of ``obj``."""
    lower, upper = np.asarray(lower, dtype=float), np.asarray(upper, dtype=float)
    d = lower.size
    side = upper - lower
    rng = np.random.default_rng(0)
    label = f"{kind} {class_path(obj)}"
    if getattr(obj, "fn_name", None):  # a torch potential: name the user's function
        label += f"(fn={obj.fn_name})"
    if kind == "interaction":
        # separations from 1e-3 to 1 box side, in random directions: short-ranged potentials
        # must be seen where they vary
        directions = rng.normal(size=(CHECK_POINTS, d))
        directions /= np.linalg.norm(directions, axis=1, keepdims=True)
        points = directions * np.logspace(-3, 0, CHECK_POINTS)[:, None] * side
    else:
        points = lower + rng.uniform(0.0, 1.0, (CHECK_POINTS, d)) * side
    m = len(points)
    value = _call(obj, "value", points, (m,), label)
    grad = _call(obj, "grad", points, (m, d), label)
    h = STEP * side
    shifted = np.concatenate([points + np.diag(h)[k] for k in range(d)]
                             + [points - np.diag(h)[k] for k in range(d)])
    around = _call(obj, "value", shifted, (2 * d * m,), label).reshape(2, d, m)
    central = ((around[0] - around[1]) / (2 * h[:, None])).T  # (m, d)
    scale = max(float(np.abs(grad).max()), float(np.abs(central).max()), 1e-300)
    worst = int(np.argmax(np.abs(central - grad).max(axis=1)))
    mismatch = float(np.abs(central - grad).max())
    rounding = 100 * np.finfo(float).eps * float(np.abs(around).max()) / float(h.min())
    if mismatch > GRAD_RTOL * scale and mismatch > rounding:
        raise InputError(
            f"{label}: grad disagrees with central differences of value: at x = "
            f"{np.array2string(points[worst], precision=4)} grad gives "
            f"{np.array2string(grad[worst], precision=6)}, differences give "
            f"{np.array2string(central[worst], precision=6)} (step {h.max():.3g}); grad(x) must "
            "be the gradient of value(x) (check signs and factors)"
        )
    if kind != "interaction":
        return
    mirror_value = _call(obj, "value", -points, (m,), label)
    mirror_grad = _call(obj, "grad", -points, (m, d), label)
    odd = float(np.abs(mirror_value - value).max())
    if odd > EVEN_RTOL * max(float(np.abs(value).max()), 1e-300):
        i = int(np.argmax(np.abs(mirror_value - value)))
        raise InputError(
            f"{label} is not even: W(z) = {value[i]:.6g} but W(-z) = {mirror_value[i]:.6g} at "
            f"z = {np.array2string(points[i], precision=4)}; a pair interaction of the "
            "separation z = x - y must satisfy W(-z) = W(z)"
        )
    if float(np.abs(mirror_grad + grad).max()) > EVEN_RTOL * scale:
        raise InputError(f"{label}: grad(-z) must equal -grad(z) for an even W")


def _as(obj: Any, kind: str, base: type, wrapper: type, lower: Any, upper: Any) -> Any:
    if not isinstance(obj, base):
        missing = [m for m in ("value", "grad") if not callable(getattr(obj, m, None))]
        if missing:
            raise InputError(
                f"{kind} must be an object with methods value(x) and grad(x) (points of shape "
                f"(m, d) to shapes (m,) and (m, d)); {class_path(obj)} has no "
                f"{' and no '.join(missing)}. For a value-only torch function use "
                f"mfbridge.model.potentials.Torch{kind.capitalize()}(fn=...)"
            )
        obj = wrapper(obj)
    check_potential(obj.obj if isinstance(obj, _Wrapped) else obj, kind, lower, upper)
    return obj


def as_confinement(obj: Any, lower: Any, upper: Any) -> Confinement:
    """``obj`` as a checked :class:`Confinement` on the box [lower, upper] (see module doc)."""
    return _as(obj, "confinement", Confinement, UserConfinement, lower, upper)


def as_interaction(obj: Any, lower: Any, upper: Any) -> Interaction:
    """``obj`` as a checked, even :class:`Interaction` for separations in the box's extent."""
    return _as(obj, "interaction", Interaction, UserInteraction, lower, upper)
