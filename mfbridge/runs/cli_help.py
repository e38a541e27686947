"""``mfbridge --help`` and ``mfbridge --version``: the command line's own help text.

Built from the files themselves, so it cannot drift: the config groups and their options are the
files of ``conf/<group>/`` (each option described by the first comment line of its file), the
defaults are those of ``conf/config.yaml``, the settings its top-level keys. Imports neither
Hydra nor the numerical core.
"""

from __future__ import annotations

import shutil
import textwrap
from pathlib import Path
from typing import Any

CONF_DIR = Path(__file__).resolve().parents[2] / "conf"
REPO_DIR = CONF_DIR.parent

#: What each top-level setting is, with its unit.
SETTINGS: dict[str, str] = {
    "noise": "σ of dX = b dt + σ dB (length/√time)",
    "diffusion": "or the diffusion coefficient D = σ²/2 instead (length²/time): noise=null "
                 "diffusion=D",
    "horizon": "time T between the two observations (time)",
    "steps": "number K of time steps on [0, T] (a series: over [t_0, t_m], shared by duration)",
    "jobs": "processes solving the segments of a series of snapshots in parallel (auto or N)",
    "figures": "write figures into the run folder (true/false)",
    "density_scale": "colour scale of density figures: auto, linear or log",
    "warm_start": "auto, nearest, none or a run folder to start the solver from",
    "progress": "log solver progress lines (true/false; false: only the summary)",
}

SUBCOMMANDS: tuple[tuple[str, str], ...] = (
    ("mfbridge [OVERRIDE ...]", "solve the configured bridge into a run folder"),
    ("mfbridge -m OVERRIDE ...", "sweep: comma lists run one job each "
                                 "(mfbridge -m interaction.strength=0,1,2)"),
    ("mfbridge check RUN_DIR", "drive N particles with a run's control and compare"),
    ("mfbridge collect SWEEP_DIR", "table, combined dataset and figures of a sweep"),
    ("mfbridge replay RUN_DIR", "solve a recorded run again and compare with it"),
    ("mfbridge fit OPTIONS [OVERRIDE ...]",
     "fit model parameters to snapshots: --param NAME=LO:HI -N N --out DIR"),
    ("mfbridge compare FIT_DIR FIT_DIR ...", "rank fitted models by N·ΣJ, likelihood ratios"),
    ("mfbridge SUBCOMMAND --help", "options of check, collect, replay, fit, compare"),
    ("mfbridge --cfg job [OVERRIDE ...]", "print the composed configuration, solve nothing"),
    ("mfbridge --version", "versions of mfbridge and of the packages it records"),
)

UNITS = ("Units are yours: positions in the length unit of the grid box and of your data files, "
         "times in the unit of the horizon; potentials are energies per unit mass "
         "(length²/time²); the cost J is dimensionless, per particle.")


def _first_comment(path: Path) -> str:
    """The first sentence of the comment block that opens a config file."""
    text = []
    for line in path.read_text(encoding="utf-8").splitlines():
        if not line.startswith("#"):
            break
        text.append(line.lstrip("# ").strip())
    joined = " ".join(text)
    end = joined.find(". ")
    return joined if end < 0 else joined[:end + 1]


def _yaml_value(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return str(value).lower()
    return str(value)


def _defaults(config: dict[str, Any]) -> dict[str, str]:
    """``group -> option`` of the defaults list of conf/config.yaml."""
    out: dict[str, str] = {}
    for item in config.get("defaults", []):
        if isinstance(item, dict):
            for key, value in item.items():
                if isinstance(key, str) and not key.startswith("override") and "/" not in key:
                    out[key] = str(value)
    return out


def groups(conf_dir: Path = CONF_DIR) -> dict[str, list[tuple[str, str]]]:
    """``group -> [(option, description)]`` from the files of ``conf_dir`` (not hydra/)."""
    out: dict[str, list[tuple[str, str]]] = {}
    for folder in sorted(p for p in conf_dir.iterdir() if p.is_dir() and p.name != "hydra"):
        out[folder.name] = [(f.stem, _first_comment(f)) for f in sorted(folder.glob("*.yaml"))]
    return out


def help_text(conf_dir: Path = CONF_DIR) -> str:
    """The text of ``mfbridge --help``."""
    import yaml

    config = yaml.safe_load((conf_dir / "config.yaml").read_text(encoding="utf-8")) or {}
    chosen = _defaults(config)
    width = min(shutil.get_terminal_size((100, 20)).columns, 110)
    lines = ["mfbridge: the mean-field Schrödinger bridge of an interacting population between "
             "two observed distributions.", "", "usage:"]
    lines += [f"  {use:<36} {what}" for use, what in SUBCOMMANDS]
    lines += ["", "config groups (pick with group=option; * = default; override a parameter "
              "with group.key=value):"]
    for group, options in groups(conf_dir).items():
        lines.append(f"  {group}")
        for option, what in options:
            star = "*" if chosen.get(group) == option else " "
            text = f"    {star}{option:<20} {what}"
            lines += textwrap.wrap(text, width, subsequent_indent=" " * 26) or [text]
    lines += ["", "settings (key=value; default in brackets):"]
    for key, what in SETTINGS.items():
        if key in config:
            lines.append(f"  {key:<14} [{_yaml_value(config[key])}] {what}")
    lines += ["", *textwrap.wrap(UNITS, width), "",
              "examples:",
              "  mfbridge interaction=gaussian interaction.strength=2 noise=0.5",
              "  mfbridge grid=plane endpoints=corridor",
              "  mfbridge endpoints=samples endpoints.initial.path=a.csv "
              "endpoints.final.path=b.csv",
              "  mfbridge solver=direct mobility=exclusion solver.total_mass=0.5",
              "",
              f"documentation: {REPO_DIR / 'README.md'} (users), "
              f"{REPO_DIR / 'DEVELOPERS.md'} (contributors);",
              f"every option's file, with its parameters: {conf_dir}/<group>/<option>.yaml;",
              "Hydra's own options: mfbridge --hydra-help."]
    return "\n".join(lines) + "\n"


def version_text() -> str:
    """The text of ``mfbridge --version``: mfbridge's version, then the recorded packages'."""
    from importlib import metadata

    from mfbridge.runs.records import package_versions

    try:
        own = metadata.version("mfbridge")
    except metadata.PackageNotFoundError:  # pragma: no cover - run from a source tree
        own = "unknown (not installed)"
    others = ", ".join(f"{k} {v}" for k, v in package_versions().items()
                       if k != "mfbridge" and v is not None)
    return f"mfbridge {own}\n{others}\n"
