"""Configurations that would do something else than the user meant, refused with the fix.

* :func:`override_mistakes`: command-line overrides that Hydra would apply where nothing reads
  them (``+mobility=exclusion``) or that name a group at the wrong place;
* :func:`check_config`: top-level entries nothing reads, required values left unset (``???``),
  a mobility with a solver that ignores it;
* :func:`sample_mismatches`: settings of the ``from_samples`` endpoints that do not fit the
  user's files (columns, weights, npz keys), all at once, each with the override that fixes it.

Each message shows the override that fixes it. Reads ``conf/`` and file headers only.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

from mfbridge.errors import InputError

CONF_DIR = Path(__file__).resolve().parents[2] / "conf"
#: Colour scales of the density figures (see mfbridge.runs.plotting).
DENSITY_SCALES = ("auto", "linear", "log")


def _primary() -> dict[str, Any]:
    """conf/config.yaml as plain data (its defaults list and top-level settings)."""
    import yaml

    return yaml.safe_load((CONF_DIR / "config.yaml").read_text(encoding="utf-8")) or {}


def default_choices() -> dict[str, str]:
    """``group -> option`` chosen by default in conf/config.yaml."""
    out: dict[str, str] = {}
    for item in _primary().get("defaults", []):
        if isinstance(item, dict):
            for key, value in item.items():
                if isinstance(key, str) and (CONF_DIR / key).is_dir():
                    out[key] = str(value)
    return out


#: overrides naming the output folder, and the characters Hydra's grammar does not take
#: unquoted in their values
OUTPUT_KEYS = ("hydra.run.dir", "hydra.sweep.dir")
GRAMMAR_CHARACTERS = "=, \t[]{}()"


def override_mistakes(overrides: Sequence[str]) -> list[str]:
    """What is wrong with command-line ``overrides`` that would otherwise be ignored or fail
    with Hydra's hint: ``+group=option`` for a group that already has a default (Hydra appends
    it at the top level, where nothing reads it), ``group@place=option`` for a group chosen at
    the top level, an output folder (``hydra.run.dir``, ``hydra.sweep.dir``) whose unquoted
    path holds characters of Hydra's override grammar (a sweep job's folder such as
    ``.../noise=0.8,steps=8``: Hydra's "mismatched input" or "Ambiguous value", exit 1). Each
    message shows the right syntax; empty when there is nothing to say."""
    groups = default_choices()
    mistakes = []
    for item in overrides:
        key, eq, value = item.partition("=")
        if not eq:
            continue
        bare = key.lstrip("+~")
        name, at, _ = bare.partition("@")
        if name in groups and (at or key.startswith("+")):
            mistakes.append(f"{item!r}: the {name} group is chosen at the top level (default "
                            f"{groups[name]}); write {name}={value}")
        if (bare in OUTPUT_KEYS and value and value[0] not in "'\"" and "${" not in value
                and any(c in value for c in GRAMMAR_CHARACTERS)):
            mistakes.append(f"{item!r}: Hydra reads '=', ',', spaces and brackets in a value as "
                            f"its own syntax; quote the folder: \"{bare}='{value}'\"")
    return mistakes


def _option_of(group: str, target: Any) -> str:
    """The option file of ``group`` whose ``_target_`` is ``target`` (else the target)."""
    import yaml

    for path in sorted((CONF_DIR / group).glob("*.yaml")):
        data = yaml.safe_load(path.read_text(encoding="utf-8")) or {}
        if data.get("_target_") == target:
            return path.stem
    return str(target)


def check_config(cfg: Any) -> None:
    """Refuse entries that would have no effect: top-level entries that nothing reads (e.g.
    from ``+key=value``), and a mobility other than walkers, or open reservoirs, with a solver
    that does not use them. Raises :class:`InputError` with the right syntax."""
    primary = _primary()
    known = set(default_choices()) | {k for k in primary if k != "defaults"} | {"hydra"}
    unknown = sorted(str(k) for k in cfg if str(k) not in known)
    if unknown:
        raise InputError(
            f"{', '.join(unknown)}: not read by mfbridge (nothing uses a top-level entry of that "
            f"name, so it would have no effect); top-level entries are {', '.join(sorted(known))}. "
            "Choose a group's option with group=option, set a parameter with group.key=value"
        )
    scale = cfg.get("density_scale", "auto")
    if scale not in DENSITY_SCALES:
        raise InputError(f"density_scale must be one of {', '.join(DENSITY_SCALES)}, got "
                         f"{scale!r}: e.g. density_scale=log")
    for flag in ("progress", "figures"):  # figures=no reaches the config as the string 'no'
        value = cfg.get(flag, True)
        if not isinstance(value, bool):
            raise InputError(f"{flag} must be true or false, got {value!r}; write {flag}=false "
                             f"(or {flag}=true)")
    solver = cfg.get("solver")
    solver_target = solver.get("_target_") if hasattr(solver, "get") else None
    # groups read by the direct solver only: (group, target of the option that changes nothing,
    # why the other solvers ignore it)
    for group, harmless, why in (
            ("mobility", ".Walkers", "whose fixed-point loop assumes independent walkers "
                                     "(mobility χ = ρ); add solver=direct to use it"),
            ("reservoirs", ".closed_box", "whose boxes are closed; open walls need the direct "
                                          "solver")):
        chosen = cfg.get(group)
        target = chosen.get("_target_") if hasattr(chosen, "get") else None
        if (target is not None and not str(target).endswith(harmless)
                and not str(solver_target).endswith(".DirectOptions")):
            option = _option_of(group, target)
            raise InputError(
                f"{group}={option} has no effect with solver="
                f"{solver.get('method', solver_target)}, {why}: mfbridge solver=direct "
                f"{group}={option}")
    _check_missing(cfg)
    endpoints = cfg.get("endpoints")
    if hasattr(endpoints, "get"):
        problems = sample_mismatches(endpoints)
        if problems:
            raise InputError(
                "the data files do not match the endpoint settings (fix all of these, or use "
                "endpoints=samples, which needs only the two paths):\n  "
                + "\n  ".join(problems))


def _check_missing(cfg: Any) -> None:
    """Required values (``???`` in conf/) that the user did not give."""
    from omegaconf import DictConfig, OmegaConf

    if not isinstance(cfg, DictConfig):
        return
    missing = sorted(k for k in OmegaConf.missing_keys(cfg) if not k.startswith("hydra"))
    if missing:
        examples = " ".join(f"{k}=..." for k in missing)
        raise InputError(f"{', '.join(missing)}: required but not given; add {examples} to "
                         "the command line (mfbridge --help lists every option)")


# ----------------------------------------------------------------------- data-file settings


def _header(path: Path, kind: str) -> list[str] | None:
    """Column names of a CSV/TSV (first line that is neither blank nor a # comment) or a
    Parquet file; ``None`` when unreadable (the reader then says why)."""
    try:
        if kind == "parquet":
            import pyarrow.parquet as pq

            return list(pq.read_schema(path).names)
        delimiter = "\t" if path.suffix.lower() == ".tsv" else ","
        with open(path, encoding="utf-8-sig") as handle:
            for line in handle:
                if line.strip() and not line.lstrip().startswith("#"):
                    return [c.strip().strip('"') for c in line.rstrip("\n").split(delimiter)]
    except Exception:  # unreadable: the sample reader reports it with the file's details
        return None
    return None


def _npz_keys(path: Path) -> list[str] | None:
    import numpy as np

    try:
        with np.load(path, allow_pickle=False) as data:
            return list(data.files)
    except Exception:  # unreadable: the sample reader reports it with the file's details
        return None


def _plain(value: Any) -> Any:
    from omegaconf import DictConfig, ListConfig, OmegaConf

    if isinstance(value, (DictConfig, ListConfig)):
        return OmegaConf.to_container(value, resolve=True)
    return value


def _one(node: Any, where: str) -> list[str]:
    """Mismatches of one ``Samples`` endpoint config ``node`` at config key ``where``."""
    from mfbridge.model.sample_files import FORMATS, resolve_path

    try:
        path = resolve_path(_plain(node.get("path")))
    except InputError:
        return []  # a missing file: the reader's own message says where it looked
    kind = FORMATS.get(path.suffix.lower(), "")
    columns, weights, key = (_plain(node.get(k)) for k in ("columns", "weights", "key"))
    out: list[str] = []
    name = path.name
    if key is not None and kind != "npz":
        out.append(f"key={key!r} selects an array of an .npz file, but {name} is not one: "
                   f"{where}.key=null")
    if kind in ("csv", "parquet"):
        header = _header(path, kind)
        if header is None:
            return out
        listed = ", ".join(header)
        if weights is not None and weights not in header:
            out.append(f"{name} has no weights column {weights!r} (its columns: {listed}): "
                       f"{where}.weights=null, or {where}.weights=<one of its columns>")
        if isinstance(columns, list) and columns and all(isinstance(c, str) for c in columns):
            absent = [c for c in columns if c not in header]
            if absent:
                rest = [c for c in header if c != weights or weights not in header]
                out.append(f"{name} has no column {', '.join(map(repr, absent))} (its columns: "
                           f"{listed}): {where}.columns=[{','.join(rest)}], or "
                           f"{where}.columns=null for every column but the weights")
    elif kind == "npz":
        arrays = _npz_keys(path)
        if arrays is None:
            return out
        listed = ", ".join(arrays)
        if key is not None and key not in arrays:
            out.append(f"{name} holds no array {key!r} (its arrays: {listed}): "
                       f"{where}.key=<one of them>, or {where}.key=null for the only one")
        if weights is not None and weights not in arrays:
            out.append(f"{name} holds no weights array {weights!r} (its arrays: {listed}): "
                       f"{where}.weights=null")
    elif kind == "npy" and weights is not None:
        out.append(f"{name} is an .npy file, which holds no weights: {where}.weights=null")
    return out


def sample_mismatches(endpoints: Any) -> list[str]:
    """Every setting of the ``Samples`` endpoints in the ``endpoints`` config node that does
    not fit its file, each ending with the override that fixes it."""
    out: list[str] = []
    for side in ("initial", "final"):
        node = endpoints.get(side)
        if hasattr(node, "get") and str(node.get("_target_", "")).endswith(".Samples"):
            out += _one(node, f"endpoints.{side}")
    return out


