"""Command line: ``mfbridge [overrides...]`` solves the configured bridge into a run folder.

The Hydra app composes ``conf/`` with the overrides; :func:`run` does the work and is what tests
call. The run folder gets ``result.nc`` and ``summary.json`` (see :mod:`mfbridge.result`),
``config.yaml`` (the resolved config), Hydra's own ``.hydra/`` record, figures and a log.
"""

from __future__ import annotations

import logging
import sys
from pathlib import Path
from typing import Any

from mfbridge.api import CONF_DIR, solve
from mfbridge.errors import MFBridgeError
from mfbridge.fixed_point import Iteration
from mfbridge.result import BridgeResult

log = logging.getLogger("mfbridge")


def _progress(it: Iteration) -> None:
    log.info(
        "outer iteration %3d: residual %.2e, marginal error %.2e, Sinkhorn %d it, %.2f s",
        it.iteration, it.residual, it.marginal_error, it.sinkhorn_iterations, it.seconds,
    )


def run(cfg: Any, output_dir: str | Path) -> BridgeResult:
    """Solve ``cfg``, write the result, the resolved config and figures into ``output_dir``."""
    from omegaconf import OmegaConf

    out = Path(output_dir)
    out.mkdir(parents=True, exist_ok=True)
    (out / "config.yaml").write_text(OmegaConf.to_yaml(cfg, resolve=True))
    result = solve(cfg, callback=_progress)
    result.save(out)
    log.info("%s", result.message)
    log.info("cost J = %.8g  (kinetic %.6g, drift %.6g, free-energy change %.6g)",
             result.cost, result.cost_kinetic, result.cost_drift, result.cost_free_energy)
    if cfg.get("figures", True):
        from mfbridge.plotting import plot_result

        for path in plot_result(result, out):
            log.info("figure: %s", path)
    log.info("run folder: %s", out.resolve())
    return result


# Subcommands: ``mfbridge NAME ...`` runs ``mfbridge.commands.NAME.main(argv)``; anything else
# is a Hydra override list for a solve.
SUBCOMMANDS: dict[str, str] = {
    "check": "mfbridge.commands.check",
    "replay": "mfbridge.commands.replay",
    "collect": "mfbridge.commands.collect",
}


def main() -> None:
    """Console entry point (``mfbridge``)."""
    if len(sys.argv) > 1 and sys.argv[1] in SUBCOMMANDS:
        import importlib

        module = importlib.import_module(SUBCOMMANDS[sys.argv[1]])
        sys.exit(module.main(sys.argv[2:]))

    import hydra
    from hydra.core.hydra_config import HydraConfig

    @hydra.main(config_path=str(CONF_DIR), config_name="config", version_base="1.3")
    def app(cfg: Any) -> None:
        try:
            run(cfg, HydraConfig.get().runtime.output_dir)
        except MFBridgeError as exc:
            log.error("%s", exc)
            sys.exit(2)

    app()


if __name__ == "__main__":
    main()
