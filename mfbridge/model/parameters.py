"""The model's numeric parameters by name: list them, check names, set them.

Names are those of the run configuration: ``noise`` (σ, length/√time), ``diffusion``
(D = σ²/2, length²/time), ``confinement.<field>`` and ``interaction.<field>`` for the numeric
parameters of the potentials (``confinement.stiffness``, ``interaction.strength``,
``interaction.range``...; :func:`mfbridge.model.potentials.numeric_parameters`), and
``confinement.params.<name>`` / ``interaction.params.<name>`` for the named numbers of a user's
torch potential.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Mapping
from dataclasses import fields, is_dataclass
from typing import Any, TypeVar

import numpy as np

from mfbridge.errors import InputError, is_real_number
from mfbridge.model.potentials import _points, formula_numbers

__all__ = ["NOISE_NAMES", "PARTS", "check_names", "numeric_parameters", "parameter_derivative",
           "potential_parameters", "with_parameters"]

NOISE_NAMES = ("noise", "diffusion")
PARTS = ("confinement", "interaction")
P = TypeVar("P")


def potential_parameters(potential: Any) -> dict[str, float]:
    """The numeric parameters of a potential by name, with their values: every dataclass field
    that holds one real number (``stiffness``, ``strength``, ``range``...) and, for a torch
    potential, ``params.<name>`` for each of its named numbers."""
    out: dict[str, float] = {}
    if is_dataclass(potential):
        for f in fields(potential):
            value = getattr(potential, f.name)
            if is_real_number(value):
                out[f.name] = float(value)
    params = getattr(potential, "params", None)
    if isinstance(params, Mapping):
        out.update({f"params.{k}": float(v) for k, v in params.items() if is_real_number(v)})
    return out


def parameter_derivative(potential: Any, name: str, x: np.ndarray) -> np.ndarray:
    r""":math:`\partial_\theta` of ``potential.value(x)`` for its numeric parameter ``name``
    (a key of :func:`potential_parameters`: a field name or ``params.<name>``), at points or
    separations ``x`` of shape (..., d); returns shape (...), units of the potential per unit
    of θ.

    Forward-mode torch autograd (one pass, float64) through the potential's ``formula``: the
    same expression as its values. A potential without a ``formula`` (a user object with
    ``value``/``grad`` only) cannot be differentiated in its parameters: write it as a
    :class:`TorchConfinement`/:class:`TorchInteraction` with ``params``.
    """
    import torch
    from torch.autograd import forward_ad

    numbers = potential_parameters(potential)
    if name not in numbers:
        raise InputError(f"{type(potential).__name__} has no numeric parameter {name!r}; it has "
                         f"{', '.join(numbers) or '(none)'}")
    formula = getattr(potential, "formula", None)
    if formula is None:
        raise InputError(
            f"{type(potential).__name__} gives no formula of its value in its parameters, so "
            "their derivatives are unknown; write it as TorchConfinement/TorchInteraction with "
            "params to fit them")
    arr = _points(x)
    key = name[len("params."):] if name.startswith("params.") else name
    with forward_ad.dual_level():
        args = formula_numbers(potential, torch)
        args[key] = forward_ad.make_dual(args[key], torch.ones((), dtype=torch.float64))
        out = formula(torch.from_numpy(np.array(arr, dtype=np.float64)), torch, **args)
        tangent = forward_ad.unpack_dual(out).tangent
    if tangent is None:  # the value does not depend on this parameter
        return np.zeros(arr.shape[:-1])
    return tangent.detach().numpy().copy()


def numeric_parameters(problem: Any) -> dict[str, float]:
    """Every numeric model parameter of ``problem`` (a bridge or series problem) by name, with
    its value: ``noise``, ``diffusion`` and the potentials' numbers."""
    out = {"noise": float(problem.noise), "diffusion": 0.5 * float(problem.noise) ** 2}
    for part in PARTS:
        out.update({f"{part}.{k}": v
                    for k, v in potential_parameters(getattr(problem, part)).items()})
    return out


def check_names(problem: Any, names: Iterable[str]) -> list[str]:
    """The names, validated: each a numeric model parameter of ``problem``, none twice, and not
    both ``noise`` and ``diffusion`` (they are one parameter).
    :class:`~mfbridge.errors.InputError` otherwise, listing the numeric model parameters."""
    names = list(names)
    known = numeric_parameters(problem)
    listing = ", ".join(known)
    for name in names:
        if not isinstance(name, str):
            raise InputError(f"a parameter name must be a string such as 'interaction.strength', "
                             f"got {name!r}")
        if name in known:
            continue
        part, _, rest = name.partition(".")
        if part in PARTS and rest:
            obj = getattr(problem, part)
            present = dataclasses.is_dataclass(obj) and rest in {
                f.name for f in dataclasses.fields(obj)}
            if present:
                raise InputError(
                    f"{name} is not a single number ({getattr(obj, rest)!r}) and cannot be "
                    f"fitted; numeric model parameters are: {listing}")
            raise InputError(
                f"{type(obj).__name__} has no numeric parameter {rest!r} ({name}); numeric model "
                f"parameters are: {listing}")
        raise InputError(f"{name!r} is not a model parameter that can be fitted (only the noise "
                         f"and the potentials' numbers can); numeric model parameters are: "
                         f"{listing}")
    if len(set(names)) != len(names):
        raise InputError(f"a parameter is named twice in {names}")
    if set(NOISE_NAMES) <= set(names):
        raise InputError("noise (σ) and diffusion (D = σ²/2) are one parameter: name only one")
    return names


def _replace_part(obj: Any, part: str, updates: dict[str, float]) -> Any:
    fields_ = {k: v for k, v in updates.items() if not k.startswith("params.")}
    params = {k[len("params."):]: v for k, v in updates.items() if k.startswith("params.")}
    if params:
        obj = obj.with_params(**params)
    if fields_:
        obj = dataclasses.replace(obj, **fields_)
    return obj


def with_parameters(problem: P, values: Mapping[str, float]) -> P:
    """A copy of ``problem`` with the named parameters set (names as in
    :func:`numeric_parameters`; the potentials' constructors validate the values)."""
    check_names(problem, values)
    changes: dict[str, Any] = {}
    for name, value in values.items():
        if not is_real_number(value):
            raise InputError(f"{name} must be a finite real number, got {value!r}")
        if name == "noise":
            changes["noise"] = float(value)
        elif name == "diffusion":
            if value <= 0:
                raise InputError(f"diffusion D must be positive, got {value!r}")
            changes["noise"] = math.sqrt(2.0 * float(value))
    for part in PARTS:
        updates = {name[len(part) + 1:]: float(v) for name, v in values.items()
                   if name.startswith(part + ".")}
        if updates:
            changes[part] = _replace_part(getattr(problem, part), part, updates)
    return dataclasses.replace(problem, **changes) if changes else problem  # type: ignore[type-var]
