"""User potentials given as torch functions: values by the user's function, gradients and
parameter derivatives by ``torch.autograd`` in float64.

``TorchConfinement(fn, params)`` and ``TorchInteraction(fn, radial, params)``: ``fn`` is a
callable or an import path; ``params`` are named numbers passed to it as keyword arguments, so
they are model parameters like the built-in potentials' fields (swept, fitted:
``interaction.params.<name>``). Also importable from :mod:`mfbridge.model.potentials`.
"""

from __future__ import annotations

import copy
import functools
from collections.abc import Callable, Mapping
from typing import Any, ClassVar

import numpy as np

from mfbridge.errors import InputError
from mfbridge.model.potentials import (
    Confinement,
    Interaction,
    _finite,
    _fn_name,
    _points,
    resolve_callable,
)

__all__ = ["TorchConfinement", "TorchInteraction"]


def _torch_eval(
    fn: Callable[..., Any], arg: Any, expected_shape: tuple[int, ...], label: str
) -> Any:
    """Call a user torch function and check that it returns a float tensor of the right shape."""
    import torch

    try:
        out = fn(arg)
    except Exception as exc:  # the user's code failed: say where, keep the cause
        raise InputError(
            f"{label} raised {type(exc).__name__}: {exc} (it is called with a float64 torch "
            f"tensor of shape {tuple(arg.shape)})"
        ) from exc
    if not isinstance(out, torch.Tensor):
        raise InputError(
            f"{label} must return a torch tensor of shape {expected_shape}, got "
            f"{type(out).__name__}; use torch operations (torch.exp, ...) rather than numpy"
        )
    if tuple(out.shape) != expected_shape:
        raise InputError(
            f"{label} must return shape {expected_shape} for an input of shape "
            f"{tuple(arg.shape)} (one value per point), got {tuple(out.shape)}"
        )
    if not out.is_floating_point():
        raise InputError(f"{label} must return a floating-point tensor, got dtype {out.dtype}")
    return out.to(torch.float64)


def _grad_of(out: Any, inp: Any) -> Any:
    import torch

    if not out.requires_grad:  # the output does not depend on the input: zero gradient
        return torch.zeros_like(inp)
    (g,) = torch.autograd.grad(out.sum(), inp, allow_unused=True)
    return torch.zeros_like(inp) if g is None else g


def _check_params(params: Any, label: str) -> dict[str, float]:
    """Named numbers for a user's torch function: a mapping of identifiers to finite reals."""
    if params is None:
        return {}
    if not isinstance(params, Mapping) and not hasattr(params, "items"):
        raise InputError(f"{label} params must be a mapping of names to numbers, got {params!r}")
    out: dict[str, float] = {}
    for key, value in dict(params.items()).items():
        if not isinstance(key, str) or not key.isidentifier():
            raise InputError(f"{label} params names must be Python identifiers, got {key!r}")
        out[key] = _finite(value, f"{label} params.{key}")
    return out


class _TorchParams:
    """Named numbers passed to a user's torch function as keyword arguments."""

    params: dict[str, float]
    fn: Callable[..., Any]
    fn_name: str

    def _bound(self, params: Mapping[str, Any] | None = None) -> Callable[..., Any]:
        values = self.params if params is None else params
        return functools.partial(self.fn, **values) if values else self.fn

    def with_params(self, **updates: float) -> Any:
        """A copy with some of the named numbers changed (for fitting them)."""
        unknown = sorted(set(updates) - set(self.params))
        if unknown:
            raise InputError(f"{type(self).__name__} has no params {', '.join(unknown)}; it has "
                             f"{', '.join(self.params) or '(none)'}")
        new = copy.copy(self)
        new.params = {**self.params, **_check_params(updates, type(self).__name__)}
        return new


class TorchConfinement(_TorchParams, Confinement):
    """User confinement U given as a torch function; ∇U by ``torch.autograd`` in float64.

    ``fn`` maps a float64 tensor x of shape (..., d) to U(x) of shape (...); it may be a
    callable or an import path ``"package.module:function"`` / ``"package.module.function"``.
    ``params``: named numbers passed to ``fn`` as keyword arguments, ``fn(x, **params)``; they
    are model parameters like any other (``confinement.params.<name>``: swept, fitted).
    """

    name: ClassVar[str] = "torch"

    def __init__(self, fn: Callable[..., Any] | str,
                 params: Mapping[str, float] | None = None) -> None:
        self.fn = resolve_callable(fn, "TorchConfinement fn")
        self.fn_name = _fn_name(self.fn, fn)
        self.params = _check_params(params, "TorchConfinement")

    def formula(self, x: Any, xp: Any, **params: Any) -> Any:
        """U(x) = fn(x, **params) for a torch tensor x (``xp`` must be torch)."""
        return self._bound(params)(x)

    def value(self, x: np.ndarray) -> np.ndarray:
        """U(x), shape (...)."""
        import torch

        arr = _points(x)
        with torch.no_grad():
            t = torch.from_numpy(np.array(arr, dtype=np.float64))
            out = _torch_eval(self._bound(), t, arr.shape[:-1],
                              f"TorchConfinement fn {self.fn_name}")
        return out.detach().numpy().copy()

    def grad(self, x: np.ndarray) -> np.ndarray:
        """∇U(x) by autograd, shape (..., d)."""
        import torch

        arr = _points(x)
        t = torch.from_numpy(np.array(arr, dtype=np.float64)).requires_grad_(True)
        with torch.enable_grad():
            out = _torch_eval(self._bound(), t, arr.shape[:-1],
                              f"TorchConfinement fn {self.fn_name}")
            g = _grad_of(out, t)
        return g.detach().numpy().copy()

    def describe(self) -> dict[str, Any]:
        """{"name": "torch", "fn": <import path or module:qualname>, "params": {...}}."""
        return {"name": self.name, "fn": self.fn_name, **({"params": self.params}
                                                          if self.params else {})}

    def __repr__(self) -> str:
        extra = f", params={self.params!r}" if self.params else ""
        return f"TorchConfinement(fn={self.fn_name!r}{extra})"


class TorchInteraction(_TorchParams, Interaction):
    """User pair potential W given as a torch function; ∇W by ``torch.autograd`` in float64.

    With ``radial=False`` ``fn`` maps separations z (..., d) to W(z) (...) and must itself be
    even, W(-z) = W(z) (checked on a few points when a problem is built:
    :mod:`mfbridge.model.potential_checks`).  With ``radial=True`` ``fn`` maps distances
    r = |z| (...) to W (...), which is even by construction; r is computed so that the
    gradient at z = 0 is exactly 0 (never NaN) and the value there is fn(0).
    ``fn`` may be a callable or an import path as for :class:`TorchConfinement`; ``params``
    are named numbers passed to it as keyword arguments (``interaction.params.<name>``).
    """

    name: ClassVar[str] = "torch"

    def __init__(self, fn: Callable[..., Any] | str, radial: bool = False,
                 params: Mapping[str, float] | None = None) -> None:
        self.fn = resolve_callable(fn, "TorchInteraction fn")
        self.fn_name = _fn_name(self.fn, fn)
        if not isinstance(radial, (bool, np.bool_)):
            raise InputError(f"TorchInteraction radial must be true or false, got {radial!r}")
        self.radial = bool(radial)
        self.params = _check_params(params, "TorchInteraction")

    def _call(self, t: Any, shape: tuple[int, ...],
              params: Mapping[str, Any] | None = None) -> Any:
        import torch

        label = f"TorchInteraction fn {self.fn_name}"
        fn = self._bound(params)
        if not self.radial:
            return _torch_eval(fn, t, shape, label)
        r2 = (t * t).sum(-1)
        positive = r2 > 0
        # double-where: sqrt never sees 0, so d r / d z = z / r is finite and masked to 0 at z = 0
        r = torch.where(positive, torch.sqrt(torch.where(positive, r2, torch.ones_like(r2))), 0.0)
        return _torch_eval(fn, r, shape, label + " (radial, called with r = |z|)")

    def formula(self, z: Any, xp: Any, **params: Any) -> Any:
        """W(z) = fn(z, **params) (or fn(|z|, **params)) for a torch tensor z."""
        return self._call(z, tuple(z.shape[:-1]), params)

    def value(self, z: np.ndarray) -> np.ndarray:
        """W(z), shape (...)."""
        import torch

        arr = _points(z, "separations")
        with torch.no_grad():
            out = self._call(torch.from_numpy(np.array(arr, dtype=np.float64)), arr.shape[:-1])
        return out.detach().numpy().copy()

    def grad(self, z: np.ndarray) -> np.ndarray:
        """∇W(z) by autograd, shape (..., d)."""
        import torch

        arr = _points(z, "separations")
        t = torch.from_numpy(np.array(arr, dtype=np.float64)).requires_grad_(True)
        with torch.enable_grad():
            out = self._call(t, arr.shape[:-1])
            g = _grad_of(out, t)
        return g.detach().numpy().copy()

    def describe(self) -> dict[str, Any]:
        """{"name": "torch", "fn": <import path or module:qualname>, "radial": bool,
        "params": {...}}."""
        return {"name": self.name, "fn": self.fn_name, "radial": self.radial,
                **({"params": self.params} if self.params else {})}

    def __repr__(self) -> str:
        extra = f", params={self.params!r}" if self.params else ""
        return f"TorchInteraction(fn={self.fn_name!r}, radial={self.radial}{extra})"
