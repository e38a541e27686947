"""Study 1: how attraction and repulsion change a bridge between two fixed snapshots.

Scenario (our own invention, for illustration): two herds graze at x = -2 and x = 1.5 and are
seen one time unit later as one group gathered around a waterhole at x = 0 (no external
confinement, only the walls of [-4, 4]). The animals interact through a Gaussian soft core of
range 1: negative strength attracts, positive repels. The sweep runs ``mfbridge -m`` in
parallel, collects it with ``mfbridge collect`` and writes
``experiments/reports/interaction_strength.md`` with its figures in
``experiments/reports/figures/``.

Run folders go to ``experiments/runs/`` (git-ignored); re-running the script resumes the sweep
there (complete runs are skipped) and rewrites the report.

Run: ``OPENBLAS_NUM_THREADS=1 python experiments/study_interaction_strength.py`` (a few minutes
on 2 cores).
"""

from __future__ import annotations

import csv
import itertools
import shutil
import time
from pathlib import Path
from typing import Any

from study_common import (
    FIGURE_DIR,
    REPORT_DIR,
    dirname_override,
    mfbridge,
    sweep_dir,
    tail,
    timing_sentence,
)

NAME = "interaction_strength"
SWEEP_REL, SWEEP_DIR = sweep_dir(NAME)
STRENGTHS = "-2,-1,-0.5,0,0.5,1,2"
SCENARIO = [
    "confinement=none", "interaction=gaussian", "interaction.range=1.0",
    "endpoints=trap_release", "endpoints.initial.means=[-2.0,1.5]",
    "endpoints.initial.covs=[0.15,0.15]", "endpoints.final.mean=0.0", "endpoints.final.cov=0.25",
    "noise=0.8", "grid.shape=256", "steps=50", "figures=false",
]
# Keep the job folder names short (only the swept key): the fixed overrides are in record.json.
DIRNAME = dirname_override(SCENARIO)


def _trend(values: list[float], rising: str, falling: str, neither: str) -> str:
    if all(b > a for a, b in itertools.pairwise(values)):
        return rising
    if all(b < a for a, b in itertools.pairwise(values)):
        return falling
    return neither


def _f(row: dict[str, str], key: str) -> float:
    return float(row[key])


def main() -> None:
    start = time.perf_counter()
    sweep = mfbridge("-m", f"interaction.strength={STRENGTHS}", *SCENARIO,
                     f"hydra.sweep.dir={SWEEP_DIR}", "hydra.launcher.n_jobs=2", DIRNAME)
    collected = mfbridge("collect", str(SWEEP_DIR))
    seconds = time.perf_counter() - start
    (SWEEP_DIR / "sweep_output.log").write_text(sweep)
    with open(SWEEP_DIR / "collected" / "runs.csv", newline="") as handle:
        rows = sorted(csv.DictReader(handle), key=lambda r: _f(r, "interaction.strength"))

    FIGURE_DIR.mkdir(parents=True, exist_ok=True)
    figures = {}
    for name in ("cost", "densities"):
        target = FIGURE_DIR / f"{NAME}_{name}.png"
        shutil.copyfile(SWEEP_DIR / "collected" / f"{name}.png", target)
        figures[name] = f"figures/{target.name}"
    figures["profiles"] = f"figures/{plot_profiles(FIGURE_DIR / f'{NAME}_profiles.png').name}"
    shape = flow_numbers()

    ok = [r for r in rows if r["status"] == "converged"]
    lines = [
        "| strength s | status | J | kinetic | drift | free-energy change | outer it. |"
        " mean x at T/2 | std x at T/2 | entropy at T/2 | solver s |",
        "| ---: | --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for r in rows:
        if r["cost"]:
            lines.append(
                f"| {_f(r, 'interaction.strength'):g} | {r['status']} | {_f(r, 'cost'):.5f} | "
                f"{_f(r, 'cost_kinetic'):.5f} | {_f(r, 'cost_drift'):.5f} | "
                f"{_f(r, 'cost_free_energy'):.5f} | {r['iterations']} | "
                f"{_f(r, 'mean_mid'):.4f} | {_f(r, 'std_mid'):.4f} | "
                f"{_f(r, 'entropy_mid'):.4f} | {_f(r, 'runtime_s'):.1f} |")
        else:
            lines.append(f"| {r['interaction.strength']} | {r['status']} | {r['problem']} |"
                         " | | | | | | | |")

    findings = []
    if ok:
        best = min(ok, key=lambda r: _f(r, "cost"))
        worst = max(ok, key=lambda r: _f(r, "cost"))
        zero = [r for r in ok if _f(r, "interaction.strength") == 0.0]
        findings.append(
            f"* The cheapest bridge is at strength {_f(best, 'interaction.strength'):g} "
            f"(J = {_f(best, 'cost'):.5f}), the dearest at strength "
            f"{_f(worst, 'interaction.strength'):g} (J = {_f(worst, 'cost'):.5f})"
            + (f"; without interaction J = {_f(zero[0], 'cost'):.5f}." if zero else "."))
        costs = [_f(r, "cost") for r in ok]
        cost_trend = _trend(costs, "rises monotonically", "falls monotonically",
                            "is not monotonic")
        findings.append(f"* Over the swept strengths the cost {cost_trend} from attraction to "
                        "repulsion.")
        spreads = [_f(r, "std_mid") for r in ok]
        trend = _trend(spreads, "increases monotonically", "decreases monotonically",
                       "does not change monotonically")
        findings.append(f"* The spread (standard deviation) of the population at T/2 {trend} "
                        f"with the strength, from {spreads[0]:.4f} (s = "
                        f"{_f(ok[0], 'interaction.strength'):g}) to {spreads[-1]:.4f} (s = "
                        f"{_f(ok[-1], 'interaction.strength'):g}).")
        parts = [(r, _f(r, "cost_drift"), _f(r, "cost_free_energy")) for r in ok]
        findings.append(
            "* The free-energy change term ranges from "
            f"{min(p[2] for p in parts):.5f} to {max(p[2] for p in parts):.5f}, the drift term "
            f"from {min(p[1] for p in parts):.5f} to {max(p[1] for p in parts):.5f}.")
    failed = [r for r in rows if r["status"] != "converged"]
    findings.append(f"* {len(ok)} of {len(rows)} runs converged"
                    + (f"; not converged or failed: {', '.join(r['run'] for r in failed)}."
                       if failed else "."))
    solver_total = sum(_f(r, "runtime_s") for r in rows if r["runtime_s"])
    report = f"""# Attraction and repulsion between two fixed snapshots

*Generated by `experiments/study_interaction_strength.py`; every number below is read from
the run folders of the sweep.*

Scenario (our own invention, for illustration): two herds at x = -2 and x = 1.5 (equal
weights, variance 0.15 each) are seen one time unit later as one group around a waterhole at
x = 0 (variance 0.25); no external confinement, walls at ±4, noise σ = 0.8. The animals
interact through a Gaussian soft core W(z) = s·exp(-z²/2) (range 1): s < 0 attracts, s > 0
repels. Grid 256 cells, 50 time steps, the optimal (minimum-J) bridge.

Commands (run by the script from the repository root; `FIXED` stands for the list of the fixed
keys above, which keeps the job folder names short):

```bash
mfbridge -m interaction.strength={STRENGTHS} {' '.join(SCENARIO)} \\
    hydra.sweep.dir={SWEEP_REL} hydra.launcher.n_jobs=2 \\
    hydra.job.config.override_dirname.exclude_keys=[FIXED]
mfbridge collect {SWEEP_REL}
```

{timing_sentence(seconds, solver_total)}

## Numbers

{chr(10).join(lines)}

(J = kinetic + drift + free-energy change, the decomposition reported by the solver; each
part is computed from its own formula, so the sum equals J up to the discretisation error.)

## Findings

{chr(10).join(findings)}

## Discussion

{discussion(ok, shape)}

## Figures

Cost against strength:

![cost]({figures['cost']})

Density at T/2 and standard deviation against time, one line per strength (drawn from the
collected `sweep.nc`; the mean paths of `mean_paths.png` coincide and are not shown):

![profiles]({figures['profiles']})

Densities ρ(t, x), one panel per strength (white: the mean):

![densities]({figures['densities']})

## Output of the commands (last lines)

```text
{tail(sweep, 4)}
{collected.strip()}
```
"""
    (REPORT_DIR / f"{NAME}.md").write_text(report)
    print(report)


def _dataset() -> Any:
    import xarray as xr

    return xr.open_dataset(SWEEP_DIR / "collected" / "sweep.nc")


def flow_numbers() -> dict[str, float]:
    """How much the flow itself changes across the sweep (from the collected dataset)."""
    import numpy as np

    with _dataset() as ds:
        key = "interaction.strength"
        mean = ds["mean"].values[..., 0]
        std = np.sqrt(ds["cov"].values[..., 0, 0])
        density = ds["density"].values
        zero = list(ds[key].values).index(0.0)
        dx = float(ds["x"].values[1] - ds["x"].values[0])
        # largest L1 distance between the density at some time and the one without interaction
        l1 = np.max(np.sum(np.abs(density - density[zero]), axis=-1) * dx)
        return {
            "mean_gap": float(np.max(np.abs(mean - mean[zero]))),
            "std_gap": float(np.max(np.abs(std - std[zero]))),
            "density_l1": float(l1),
        }


def plot_profiles(path: Path) -> Path:
    """ρ(T/2, x) and std(t) for every strength, one line each."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    with _dataset() as ds:
        key = "interaction.strength"
        strengths = sorted(float(v) for v in ds[key].values)
        mid = ds.sizes["t"] // 2
        fig, (left, right) = plt.subplots(1, 2, figsize=(9, 3.4))
        colours = plt.get_cmap("coolwarm")(np.linspace(0, 1, len(strengths)))
        for colour, value in zip(colours, strengths, strict=True):
            one = ds.sel({key: value})
            left.plot(ds["x"], one["density"].isel(t=mid), color=colour, label=f"s = {value:g}")
            right.plot(ds["t"], np.sqrt(one["cov"].values[:, 0, 0]), color=colour)
        left.set_xlabel("x")
        left.set_ylabel(f"density at t = {float(ds['t'][mid]):g}")
        left.legend(fontsize=7)
        right.set_xlabel("t")
        right.set_ylabel("standard deviation of x")
        fig.tight_layout()
        fig.savefig(path, dpi=90)
        plt.close(fig)
    return path


def discussion(ok: list[dict[str, str]], shape: dict[str, float]) -> str:
    """A short reading of the numbers (every number is computed, none typed in)."""
    if len(ok) < 2:
        return "Too few converged runs to discuss."
    kin = [_f(r, "cost_kinetic") for r in ok]
    fe = [_f(r, "cost_free_energy") for r in ok]
    drift = [_f(r, "cost_drift") for r in ok]
    cost = [_f(r, "cost") for r in ok]
    lo, hi = ok[0], ok[-1]
    return f"""\
* **The observed merger is cheaper under attraction.** J changes by {cost[-1] - cost[0]:.3f}
  between s = {_f(lo, 'interaction.strength'):g} and s = {_f(hi, 'interaction.strength'):g}.
  {fe[-1] - fe[0]:.3f} of it is the free-energy term (F(ν) - F(μ))/σ² ({fe[0]:.3f} to
  {fe[-1]:.3f}), which depends on the two snapshots only: gathering two herds into one tight
  group lowers the interaction energy under attraction and raises it under repulsion.
  {drift[-1] - drift[0]:.3f} is the drift term (1/2σ²)∫∫|b|²ρ ({drift[0]:.3f} to
  {drift[-1]:.3f}), and only {kin[-1] - kin[0]:.4f} the kinetic term ({kin[0]:.4f} to
  {kin[-1]:.4f}). So the most likely flow is nearly the same for every strength; what the
  strength changes is how well the model's own drift agrees with it. As a probability, the
  ratio between the two extremes is about exp(-N·{cost[-1] - cost[0]:.2f}) for N animals.
* **The flow itself hardly changes.** The largest L¹ distance between a density of the sweep
  and the density without interaction at the same time is {shape['density_l1']:.3f}; the
  standard deviation differs by at most {shape['std_gap']:.4f} and does not even move
  monotonically with s at T/2. A reason: the soft core has range 1 while the herds start 3.5
  apart (W has decayed to exp(-3.5²/2) ≈ 0.002 of its peak), so the interaction acts mainly
  within each herd and only late, when they merge; and the endpoint constraints at σ = 0.8
  leave little freedom.
* **The mean path does not depend on the interaction** (largest difference
  {shape['mean_gap']:.1e}): with no confinement a pair force has zero net force on the
  population and the problem is translation invariant, so the mean moves on a straight line
  from -0.25 to 0 whatever W is; the residue comes from the walls at ±4 and the grid. This is a
  useful check of the solver rather than a finding about the herds.
* **Limits.** One grid (256 cells, 50 steps) and no refinement study here (the accuracy of the
  solver on this grid size is documented in README.md, "Accuracy"); one noise level; the
  strength range is small enough that all runs converge. The bridge is the most likely
  evolution *under this model*; the sweep compares models, it does not say which one is
  true."""


if __name__ == "__main__":
    main()
