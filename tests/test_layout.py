"""The package layout: imports go one way between the layers, modules stay small, and the module
paths of configs and run folders written before the layout still work.

Layers (DEVELOPERS.md, "Layout"): ``errors`` and ``result`` (0) ← ``model`` (1) ← ``numerics``
(2) ← ``solvers`` and ``particles`` (3, neither imports the other) ← ``runs`` (4). A module may
import its own folder and any lower layer, never a higher one, not even under ``if
TYPE_CHECKING`` or inside a function: every ``Import``/``ImportFrom`` node is checked.
"""

from __future__ import annotations

import ast
import re
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hydra.utils import get_object, instantiate
from omegaconf import OmegaConf

import mfbridge
from mfbridge._moved import MOVED, new_name
from mfbridge.runs.api import CONF_DIR, build_problem, compose
from mfbridge.runs.commands.replay import replay

PACKAGE = Path(mfbridge.__file__).resolve().parent
MAX_LINES = 700

# folder -> layer; "root" is the modules at the package root (errors, result)
LEVELS = {"root": 0, "model": 1, "numerics": 2, "solvers": 3, "particles": 3, "runs": 4}
ROOT_MODULES = {"mfbridge.errors", "mfbridge.result"}
# the package's front doors (import, python -m) and the table of moved names sit above every
# layer
FACADE = {"mfbridge", "mfbridge._moved", "mfbridge.__main__"}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _is_package(name: str) -> bool:
    return (PACKAGE.parent.joinpath(*name.split(".")) / "__init__.py").is_file()


def _exists(name: str) -> bool:
    path = PACKAGE.parent.joinpath(*name.split("."))
    return path.with_suffix(".py").is_file() or (path / "__init__.py").is_file()


def _group(name: str) -> str | None:
    """The layer folder or root module a module name belongs to (None: the facade)."""
    if name in ROOT_MODULES:
        return "root"
    parts = name.split(".")
    if name in FACADE or len(parts) < 2:
        return None
    return parts[1]


def _imported(node: ast.Import | ast.ImportFrom, module: str, is_package: bool) -> list[str]:
    """The mfbridge modules an import node loads (``from pkg import name`` counts
    ``pkg.name`` when that is a module, else ``pkg``)."""
    if isinstance(node, ast.Import):
        return [alias.name for alias in node.names]
    if node.level:
        base = module.split(".")
        if not is_package:
            base = base[:-1]
        base = base[: len(base) - (node.level - 1)]
        target = ".".join(base + ([node.module] if node.module else []))
    else:
        target = node.module or ""
    if not target.startswith("mfbridge"):
        return []
    out = []
    for alias in node.names:
        sub = f"{target}.{alias.name}"
        out.append(sub if _exists(sub) else target)
    return out


def layer_violations(module: str, source: str, is_package: bool = False) -> list[str]:
    """Every import in ``source`` (the text of ``module``) that goes against the layer order:
    into a higher layer, sideways between ``solvers`` and ``particles``, into the package's
    front door, or through a module path that does not exist (an old, moved name)."""
    group = _group(module)
    problems = []
    for node in ast.walk(ast.parse(source)):
        if not isinstance(node, (ast.Import, ast.ImportFrom)):
            continue
        for target in _imported(node, module, is_package):
            if not (target == "mfbridge" or target.startswith("mfbridge.")):
                continue
            where = f"{module} line {node.lineno} imports {target}"
            if not _exists(target):
                moved = new_name(target)
                hint = f" (moved to {moved})" if moved else ""
                problems.append(f"{where}: no such module{hint}")
                continue
            if group is None:
                continue
            other = _group(target)
            if other is None:
                problems.append(f"{where}: the package's front door, above every layer")
            elif other != group and LEVELS[other] >= LEVELS[group]:
                problems.append(f"{where}: layer {other} ({LEVELS[other]}) is not below "
                                f"{group} ({LEVELS[group]})")
    return problems


def _modules() -> list[Path]:
    return sorted(PACKAGE.rglob("*.py"))


def test_every_module_is_in_a_layer() -> None:
    for path in _modules():
        name = _module_name(path)
        group = _group(name)
        assert group is None or group in LEVELS, f"{name} is in no layer of {sorted(LEVELS)}"


def test_imports_go_one_way_between_layers() -> None:
    problems = []
    for path in _modules():
        name = _module_name(path)
        problems += layer_violations(name, path.read_text(), path.name == "__init__.py")
    assert not problems, "\n".join(problems)


@pytest.mark.parametrize(("module", "source"), [
    ("mfbridge.model.grid", "from mfbridge.runs.api import load\n"),
    ("mfbridge.result", "from mfbridge.model.grid import Grid\n"),
    ("mfbridge.errors", "import mfbridge.numerics.observables\n"),
    ("mfbridge.numerics.observables", "def f():\n    from mfbridge.solvers import direct\n"),
    ("mfbridge.model.problem",
     "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from mfbridge.numerics.reference "
     "import PairField\n"),
    ("mfbridge.solvers.fixed_point", "from mfbridge.particles.simulator import simulate\n"),
    ("mfbridge.particles.simulator", "from mfbridge.solvers import fixed_point\n"),
    ("mfbridge.numerics.entropic", "from ..runs import records\n"),
    ("mfbridge.model.grid", "from mfbridge import Grid\n"),
    ("mfbridge.runs.cli", "from mfbridge import records\n"),
    ("mfbridge.runs.cli", "import mfbridge.potentials\n"),
])
def test_the_layer_check_flags_a_wrong_import(module: str, source: str) -> None:
    assert layer_violations(module, source), f"not flagged: {source!r} in {module}"


@pytest.mark.parametrize(("module", "source"), [
    ("mfbridge.numerics.observables", "from mfbridge.model.grid import Grid\n"),
    ("mfbridge.solvers.direct", "from mfbridge.solvers.direct_action import DirectAction\n"),
    ("mfbridge.runs.api", "from mfbridge.particles.statistics import check\n"),
    ("mfbridge.result", "from mfbridge.errors import InputError\nimport numpy\n"),
    ("mfbridge.particles.plots", "from .statistics import CheckReport\n"),
    ("mfbridge.runs.cli", "from mfbridge.runs import records\n"),
])
def test_the_layer_check_passes_a_right_import(module: str, source: str) -> None:
    assert layer_violations(module, source) == []


def test_no_module_is_over_700_lines() -> None:
    sizes = {_module_name(p): len(p.read_text().splitlines()) for p in _modules()}
    big = {name: n for name, n in sizes.items() if n > MAX_LINES}
    assert not big, f"modules over {MAX_LINES} lines: {big}"
    assert max(sizes.values()) > 100  # the count sees the modules


# --------------------------------------------------------------------------- old module paths

#: every ``mfbridge.*`` object a file under conf/ named before the layout (commit 74848cb), and
#: where it lives now
OLD_TARGETS = {
    # presets added after the move (interaction=torch, confinement=torch), old names too
    "mfbridge.potentials.TorchConfinement": "mfbridge.model.potentials.TorchConfinement",
    "mfbridge.potentials.TorchInteraction": "mfbridge.model.potentials.TorchInteraction",
    "mfbridge.grid.Grid": "mfbridge.model.grid.Grid",
    "mfbridge.samples.auto_grid": "mfbridge.model.samples.auto_grid",
    "mfbridge.samples.Samples": "mfbridge.model.samples.Samples",
    "mfbridge.endpoints.Gaussian": "mfbridge.model.endpoints.Gaussian",
    "mfbridge.endpoints.GaussianMixture": "mfbridge.model.endpoints.GaussianMixture",
    "mfbridge.endpoints.UniformBox": "mfbridge.model.endpoints.UniformBox",
    "mfbridge.potentials.DoubleWell": "mfbridge.model.potentials.DoubleWell",
    "mfbridge.potentials.GaussianCore": "mfbridge.model.potentials.GaussianCore",
    "mfbridge.potentials.Harmonic": "mfbridge.model.potentials.Harmonic",
    "mfbridge.potentials.HarmonicInteraction": "mfbridge.model.potentials.HarmonicInteraction",
    "mfbridge.potentials.Morse": "mfbridge.model.potentials.Morse",
    "mfbridge.potentials.NoConfinement": "mfbridge.model.potentials.NoConfinement",
    "mfbridge.potentials.NoInteraction": "mfbridge.model.potentials.NoInteraction",
    "mfbridge.potentials.SoftCoulomb": "mfbridge.model.potentials.SoftCoulomb",
    "mfbridge.potentials.TiltedDoubleWell": "mfbridge.model.potentials.TiltedDoubleWell",
    "mfbridge.mobility.EnergyExchange": "mfbridge.model.mobility.EnergyExchange",
    "mfbridge.mobility.Exclusion": "mfbridge.model.mobility.Exclusion",
    "mfbridge.mobility.Walkers": "mfbridge.model.mobility.Walkers",
    "mfbridge.mobility.ZeroRange": "mfbridge.model.mobility.ZeroRange",
    "mfbridge.mobility.saturating_rate": "mfbridge.model.mobility.saturating_rate",
    "mfbridge.fixed_point.SolverOptions": "mfbridge.solvers.fixed_point.SolverOptions",
    "mfbridge.direct.DirectOptions": "mfbridge.solvers.direct.DirectOptions",
    "mfbridge.records.SweepProgress": "mfbridge.runs.records.SweepProgress",
    "mfbridge.cli.run": "mfbridge.runs.cli.run",
}


#: targets of modules written after the layout (no old name exists for them)
NEW_TARGETS = {
    "mfbridge.model.reservoirs.Reservoirs",
    "mfbridge.model.reservoirs.closed_box",
    "mfbridge.model.fitted_grid.fitted_grid",  # issue 12: the default box
    "mfbridge.model.fitted_grid.fitted_steps",  # issue 12: the default steps (named in a comment)
    "mfbridge.solvers.accuracy.AccuracyOptions",  # issue 12: the accuracy group
}


def test_every_target_in_conf_has_its_old_name_listed() -> None:
    found = set()
    for path in CONF_DIR.rglob("*.yaml"):
        found |= set(re.findall(r"\b(mfbridge(?:\.\w+)+)[.:](\w+)", path.read_text()))
    now = {f"{module}.{name}" for module, name in found} - NEW_TARGETS
    assert now, "no mfbridge target found under conf/"
    assert now <= set(OLD_TARGETS.values()), sorted(now - set(OLD_TARGETS.values()))


@pytest.mark.parametrize("old", sorted(OLD_TARGETS))
def test_old_target_is_the_same_object(old: str) -> None:
    assert get_object(old) is get_object(OLD_TARGETS[old])


def test_every_old_module_name_imports_as_the_new_module() -> None:
    import importlib

    for old, new in MOVED.items():
        assert importlib.import_module(old) is importlib.import_module(new), old
        assert sys.modules[old].__name__ == new
    import mfbridge.commands.check
    import mfbridge.potentials as p

    import mfbridge.runs.commands.check

    assert p.GaussianCore is mfbridge.model.potentials.GaussianCore
    assert p.__spec__ is not None and p.__spec__.name == "mfbridge.model.potentials"
    assert mfbridge.commands.check is mfbridge.runs.commands.check
    # unmoved names are not caught by the table
    assert new_name("mfbridge.result") is None and new_name("mfbridge.particles") is None
    assert new_name("mfbridge.commands.replay") == "mfbridge.runs.commands.replay"
    with pytest.raises(ModuleNotFoundError):
        importlib.import_module("mfbridge.no_such_module")


FRESH = """
import sys
import mfbridge.direct as direct  # the first import of the interpreter names an old path
print(direct.__name__)
print(sorted(m for m in sys.modules if m.split(".")[0] in ("hydra", "matplotlib")
             or m in ("mfbridge.potentials", "mfbridge.records", "mfbridge.runs.records",
                      "mfbridge.runs.cli", "mfbridge.particles.plots", "mfbridge.runs.plotting")))
import mfbridge.commands.check, mfbridge.potentials, mfbridge.records
print(mfbridge.potentials.__name__, mfbridge.records.__name__, mfbridge.commands.check.__name__)
"""


def test_old_module_path_imports_first_in_a_fresh_interpreter() -> None:
    """``python -c "import mfbridge.direct"`` works, and loads neither Hydra, matplotlib, nor
    the modules of other old names (the aliases are made on demand)."""
    out = subprocess.run([sys.executable, "-c", FRESH], capture_output=True, text=True,
                         timeout=120, check=True)
    assert out.stdout.split("\n")[:3] == [
        "mfbridge.solvers.direct", "[]",
        "mfbridge.model.potentials mfbridge.runs.records mfbridge.runs.commands.check"]


def _old_targets(value: Any) -> Any:
    """``value`` (a plain config) with every current ``_target_`` replaced by its old name."""
    back = {new: old for old, new in OLD_TARGETS.items()}
    if isinstance(value, dict):
        return {k: (back.get(v, v) if k == "_target_" else _old_targets(v))
                for k, v in value.items()}
    if isinstance(value, list):
        return [_old_targets(v) for v in value]
    return value


OLD_GROUPS = [("grid", "line"), ("grid", "plane"), ("grid", "cube"),
              ("endpoints", "from_samples"), ("confinement", "tilted_double_well"),
              ("confinement", "double_well"), ("interaction", "morse"),
              ("interaction", "coulomb"), ("solver", "direct"), ("solver", "frozen")]


@pytest.mark.parametrize(("group", "option"), OLD_GROUPS, ids=[f"{g}={o}" for g, o in OLD_GROUPS])
def test_a_config_with_old_targets_builds_the_same_objects(group: str, option: str) -> None:
    overrides = [f"{group}={option}"]
    if option in ("plane", "cube"):
        overrides.append("endpoints=gaussians_2d" if option == "plane"
                         else "endpoints=trap_cloud_3d")
    cfg = compose(overrides)
    plain = OmegaConf.to_container(cfg, resolve=True)
    old = OmegaConf.create(_old_targets(plain))
    assert OmegaConf.to_yaml(old) != OmegaConf.to_yaml(cfg)  # the old names are in use
    new_obj, old_obj = instantiate(cfg[group]), instantiate(old[group])
    assert type(old_obj) is type(new_obj)
    problem_new, problem_old = build_problem(cfg), build_problem(old)
    assert problem_old.grid == problem_new.grid
    np.testing.assert_array_equal(problem_old.initial, problem_new.initial)
    assert type(problem_old.confinement) is type(problem_new.confinement)
    assert type(problem_old.interaction) is type(problem_new.interaction)


def test_old_hydra_callback_instantiates() -> None:
    callback = instantiate({"_target_": "mfbridge.records.SweepProgress"})
    assert type(callback) is get_object("mfbridge.runs.records.SweepProgress")


# --------------------------------------------------------------------------- a run folder written
# before the layout: tests/data/premove_run, made by ``mfbridge grid.shape=32 steps=8
# figures=false`` at commit 74848cb (the last commit of the flat layout); its config.yaml names
# the old module paths (mfbridge.grid.Grid, mfbridge.potentials.GaussianCore, ...).

PREMOVE = Path(__file__).resolve().parent / "data" / "premove_run"


def test_premove_config_names_the_old_paths() -> None:
    text = (PREMOVE / "config.yaml").read_text()
    assert "_target_: mfbridge.potentials.GaussianCore" in text
    assert "_target_: mfbridge.fixed_point.SolverOptions" in text


def test_premove_run_replays(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``mfbridge replay`` solves the recorded config (old targets) again and compares with the
    stored result: the same flow within 1e-8 (measured: bit for bit on the machine that wrote
    it, until the dense route's marginals were polished by operator sweeps (issue 14), which
    moved the density of this 32-cell run by 3.6e-10). The cost differs: it was stored by the
    trapezoid rule on the time nodes and is now evaluated at the step midpoints (issue 12),
    3.4093187856 then, 3.37566 now (32 cells, 8 steps): the verdict is DIFFERENT on the cost."""
    code = replay(PREMOVE, tmp_path / "again", 1e-8, figures=False)
    out = capsys.readouterr().out
    lines = {line.split(":")[0]: line for line in out.splitlines() if ":" in line}
    for field in ("density", "mean"):
        assert float(lines[field].rsplit("=", 1)[1]) <= 1e-8, out
    assert "stored 3.40931878" in lines["cost"] and "replayed 3.37566" in lines["cost"], out
    assert code == 1 and "verdict: DIFFERENT" in out
    stored = mfbridge.load(PREMOVE)
    assert stored.config is not None
    assert stored.config["interaction"]["_target_"] == "mfbridge.potentials.GaussianCore"
    assert stored.grid == mfbridge.Grid(-4.0, 4.0, 32)
