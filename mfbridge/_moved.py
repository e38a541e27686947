"""Old module paths of mfbridge, kept importable after the package was split into layers.

Configs and scripts written before the move name modules such as ``mfbridge.potentials`` (in
``_target_: mfbridge.potentials.GaussianCore``), ``mfbridge.fixed_point`` or the Hydra callback
``mfbridge.records.SweepProgress``. :data:`MOVED` maps each old name to its new one, and
:class:`MovedModuleFinder` (installed on ``sys.meta_path`` by ``import mfbridge``) makes
``import mfbridge.<old>`` return the module object of ``mfbridge.<new>`` itself: one module, so
classes and ``isinstance`` checks are shared, and nothing is imported before an old name is
asked for (``import mfbridge`` stays free of Hydra and matplotlib). A name under a moved package
(``mfbridge.commands.check``) maps through its package.

This module imports nothing from the package.
"""

from __future__ import annotations

import importlib
import importlib.abc
import importlib.machinery
import sys
from collections.abc import Sequence
from types import ModuleType

MOVED: dict[str, str] = {
    # model: what the user states
    "mfbridge.grid": "mfbridge.model.grid",
    "mfbridge.potentials": "mfbridge.model.potentials",
    "mfbridge.endpoints": "mfbridge.model.endpoints",
    "mfbridge.samples": "mfbridge.model.samples",
    "mfbridge.mobility": "mfbridge.model.mobility",
    "mfbridge.problem": "mfbridge.model.problem",
    # numerics: building blocks
    "mfbridge.reference": "mfbridge.numerics.reference",
    "mfbridge.propagator": "mfbridge.numerics.propagator",
    "mfbridge.entropic": "mfbridge.numerics.entropic",
    "mfbridge.anderson": "mfbridge.numerics.anderson",
    "mfbridge.newton": "mfbridge.numerics.newton",
    "mfbridge.observables": "mfbridge.numerics.observables",
    # solvers
    "mfbridge.fixed_point": "mfbridge.solvers.fixed_point",
    "mfbridge.multistart": "mfbridge.solvers.multistart",
    "mfbridge.direct": "mfbridge.solvers.direct",
    "mfbridge.linear_quadratic": "mfbridge.solvers.linear_quadratic",
    # particles (mfbridge.particles is now the package; it exports what the module did)
    "mfbridge.check_plots": "mfbridge.particles.plots",
    # runs: files, command line, figures
    "mfbridge.api": "mfbridge.runs.api",
    "mfbridge.cli": "mfbridge.runs.cli",
    "mfbridge.records": "mfbridge.runs.records",
    "mfbridge.plotting": "mfbridge.runs.plotting",
    "mfbridge.commands": "mfbridge.runs.commands",
}


def new_name(fullname: str) -> str | None:
    """The current name of the module an old ``fullname`` refers to, or ``None`` if it did not
    move (``mfbridge.commands.check`` -> ``mfbridge.runs.commands.check``)."""
    head, dot, rest = fullname, "", ""
    while head:
        if head in MOVED:
            return MOVED[head] + dot + rest
        head, _, last = head.rpartition(".")
        rest = last + dot + rest
        dot = "."
    return None


class _AliasLoader(importlib.abc.Loader):
    """Loads an old name as the already-imported module of its new name."""

    def __init__(self, target: str) -> None:
        self.target = target
        self.own_spec: importlib.machinery.ModuleSpec | None = None

    def create_module(self, spec: importlib.machinery.ModuleSpec) -> ModuleType:
        module = importlib.import_module(self.target)
        self.own_spec = module.__spec__
        return module

    def exec_module(self, module: ModuleType) -> None:
        # Between create_module and here the import system has set ``module.__spec__`` to the
        # alias's spec; give the module its own back, so it keeps one identity (name, file,
        # loader) and ``importlib.reload`` still works.
        if self.own_spec is not None:
            module.__spec__ = self.own_spec


class MovedModuleFinder(importlib.abc.MetaPathFinder):
    """Finds the old module names of :data:`MOVED` (and names under them)."""

    def find_spec(self, fullname: str, path: Sequence[str] | None,
                  target: ModuleType | None = None) -> importlib.machinery.ModuleSpec | None:
        if not fullname.startswith("mfbridge."):
            return None
        moved = new_name(fullname)
        if moved is None:
            return None
        return importlib.machinery.ModuleSpec(fullname, _AliasLoader(moved))


def install() -> None:
    """Put one :class:`MovedModuleFinder` first on ``sys.meta_path`` (idempotent)."""
    if not any(isinstance(f, MovedModuleFinder) for f in sys.meta_path):
        sys.meta_path.insert(0, MovedModuleFinder())
