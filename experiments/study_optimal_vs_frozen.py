"""Study 2: the most likely bridge (``solver=optimal``) against the self-consistent
frozen-reference bridge (``solver=frozen``) as the attraction grows.

Scenario (our own invention, for illustration): a flock feeds at ground A (x = -1.5, variance
0.1) and is seen one time unit later at ground B (x = 1.5, variance 0.2). The birds live in a
valley, U(x) = a x²/2 with a = 0.5, and keep together by a harmonic attraction
W(z) = κ z²/2 of strength κ (cohesion); noise σ = 1. This is the linear–quadratic case, so
both variants have exact answers (:func:`mfbridge.lq_bridge` with ``variant="optimal"`` and
``variant="frozen"``): the report gives the grid solver's numbers next to them.

The sweep ``mfbridge -m interaction.strength=0,0.5,1,2,4 solver=optimal,frozen`` runs through the
CLI (joblib launcher, 2 jobs) into ``experiments/runs/`` (git-ignored), is collected with
``mfbridge collect``, and the report goes to ``experiments/reports/optimal_vs_frozen.md`` with
figures in ``experiments/reports/figures/``. Re-running resumes (complete runs are skipped).

Run: ``OPENBLAS_NUM_THREADS=1 python experiments/study_optimal_vs_frozen.py`` (about a minute
on 2 cores).
"""

from __future__ import annotations

import csv
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from study_common import (
    FIGURE_DIR,
    REPORT_DIR,
    dirname_override,
    mfbridge,
    sweep_dir,
    tail,
    timing_sentence,
)

NAME = "optimal_vs_frozen"
SWEEP_REL, SWEEP_DIR = sweep_dir(NAME)
STRENGTHS = (0.0, 0.5, 1.0, 2.0, 4.0)
SOLVERS = ("optimal", "frozen")
STIFFNESS, NOISE, HORIZON = 0.5, 1.0, 1.0
MEAN0, COV0, MEAN1, COV1 = -1.5, 0.1, 1.5, 0.2
SCENARIO = [
    "confinement=harmonic", f"confinement.stiffness={STIFFNESS}", "interaction=harmonic",
    "endpoints=gaussians", f"endpoints.initial.mean={MEAN0}", f"endpoints.initial.cov={COV0}",
    f"endpoints.final.mean={MEAN1}", f"endpoints.final.cov={COV1}", f"noise={NOISE}",
    f"horizon={HORIZON}", "grid.shape=512", "steps=100", "figures=false",
]
# Keep the job folder names short (only the swept keys): the fixed overrides are in record.json.
DIRNAME = dirname_override(SCENARIO)


@dataclass(frozen=True)
class Case:
    """One (κ, variant) pair: the grid run and the exact answer on the same time grid."""

    strength: float
    solver: str
    status: str
    iterations: int
    runtime_s: float
    times: np.ndarray
    mean: np.ndarray  # grid mean path (K+1,)
    std: np.ndarray  # grid standard deviation path (K+1,)
    cost: float
    exact_mean: np.ndarray
    exact_cost: float

    @property
    def cost_error(self) -> float:
        """Relative error of the grid cost against the closed form."""
        return abs(self.cost - self.exact_cost) / abs(self.exact_cost)

    @property
    def mean_error(self) -> float:
        """Largest |grid mean - exact mean| over the time grid."""
        return float(np.max(np.abs(self.mean - self.exact_mean)))


def load_cases() -> dict[tuple[float, str], Case]:
    """Grid results from the run folders listed in the collected table, with the exact ones."""
    import mfbridge

    with open(SWEEP_DIR / "collected" / "runs.csv", newline="") as handle:
        rows = list(csv.DictReader(handle))
    cases: dict[tuple[float, str], Case] = {}
    for row in rows:
        if not row["cost"]:
            continue
        strength, solver = float(row["interaction.strength"]), row["solver"]
        result = mfbridge.load(SWEEP_DIR / row["run"])
        exact = mfbridge.lq_bridge(stiffness=STIFFNESS, strength=strength, noise=NOISE,
                                   horizon=HORIZON, mean0=MEAN0, cov0=COV0, mean1=MEAN1,
                                   cov1=COV1, times=np.asarray(result.times), variant=solver)
        cases[strength, solver] = Case(
            strength=strength, solver=solver, status=row["status"],
            iterations=int(row["iterations"]), runtime_s=float(row["runtime_s"]),
            times=np.asarray(result.times), mean=np.asarray(result.mean[:, 0]),
            std=np.sqrt(np.asarray(result.cov[:, 0, 0])),
            cost=float(result.cost), exact_mean=np.asarray(exact.mean[:, 0]),
            exact_cost=float(exact.cost),
        )
    return cases


def plot_gaps(path: Path, cases: dict[tuple[float, str], Case]) -> Path:
    """Left: J of both variants against κ (markers: grid, lines: exact). Right: cost gap and
    largest mean-path gap against κ (markers: grid, lines: exact)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fine = np.linspace(0.0, max(STRENGTHS), 81)
    exact = {s: [mfbridge_exact(k, s) for k in fine] for s in SOLVERS}
    fig, (left, right) = plt.subplots(1, 2, figsize=(9, 3.4))
    for solver, colour in zip(SOLVERS, ("tab:blue", "tab:orange"), strict=True):
        left.plot(fine, [e.cost for e in exact[solver]], color=colour, lw=1,
                  label=f"{solver} (exact)")
        ks = [k for k in STRENGTHS if (k, solver) in cases]
        left.plot(ks, [cases[k, solver].cost for k in ks], "o", color=colour,
                  label=f"{solver} (grid)")
    left.set_xlabel("attraction κ")
    left.set_ylabel("cost J")
    left.legend(fontsize=7)
    gap = [f.cost - o.cost for o, f in zip(exact["optimal"], exact["frozen"], strict=True)]
    path_gap = [float(np.max(np.abs(f.mean - o.mean)))
                for o, f in zip(exact["optimal"], exact["frozen"], strict=True)]
    both = [k for k in STRENGTHS if (k, "optimal") in cases and (k, "frozen") in cases]
    right.plot(fine, gap, color="tab:red", lw=1, label="J(frozen) - J(optimal), exact")
    right.plot(both, [cases[k, "frozen"].cost - cases[k, "optimal"].cost for k in both], "o",
               color="tab:red", label="cost gap, grid")
    right.plot(fine, path_gap, color="tab:green", lw=1, label="max |mean gap|, exact")
    right.plot(both, [float(np.max(np.abs(cases[k, "frozen"].mean - cases[k, "optimal"].mean)))
                      for k in both], "s", color="tab:green", label="max |mean gap|, grid")
    right.set_xlabel("attraction κ")
    right.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


def mfbridge_exact(strength: float, solver: str, times: int = 101) -> object:
    """The closed-form bridge of the scenario."""
    import mfbridge

    return mfbridge.lq_bridge(stiffness=STIFFNESS, strength=strength, noise=NOISE,
                              horizon=HORIZON, mean0=MEAN0, cov0=COV0, mean1=MEAN1, cov1=COV1,
                              times=times, variant=solver)


def plot_means(path: Path, cases: dict[tuple[float, str], Case]) -> Path:
    """Mean paths of both variants for every κ (solid: grid, dashed: exact)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(9, 3.4), sharey=True)
    colours = plt.get_cmap("viridis")(np.linspace(0, 0.9, len(STRENGTHS)))
    for ax, solver in zip(axes, SOLVERS, strict=True):
        for colour, k in zip(colours, STRENGTHS, strict=True):
            if (k, solver) not in cases:
                continue
            case = cases[k, solver]
            ax.plot(case.times, case.mean, color=colour, lw=1.5, label=f"κ = {k:g}")
            ax.plot(case.times, case.exact_mean, "--", color="black", lw=0.7)
        ax.set_title(f"solver={solver} (dashed: exact)", fontsize=9)
        ax.set_xlabel("t")
    axes[0].set_ylabel("mean position")
    axes[0].legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


def refine(case: Case) -> list[tuple[int, int, float, float]]:
    """Solve one case again on a finer grid and with a finer time step (Python API, same
    scenario); return ``(cells, steps, relative cost error, max mean error)`` per grid."""
    import mfbridge

    out = []
    base = [o for o in SCENARIO if not o.startswith(("grid.shape=", "steps="))]
    for cells, steps in ((512, 100), (1024, 100), (512, 200)):
        cfg = mfbridge.compose([*base, f"interaction.strength={case.strength}",
                                f"solver={case.solver}", f"grid.shape={cells}",
                                f"steps={steps}"])
        result = mfbridge.solve(cfg)
        exact = mfbridge.lq_bridge(stiffness=STIFFNESS, strength=case.strength, noise=NOISE,
                                   horizon=HORIZON, mean0=MEAN0, cov0=COV0, mean1=MEAN1,
                                   cov1=COV1, times=np.asarray(result.times),
                                   variant=case.solver)
        out.append((cells, steps, abs(result.cost - exact.cost) / exact.cost,
                    float(np.max(np.abs(result.mean[:, 0] - exact.mean[:, 0])))))
    return out


def shrink(source: Path, target: Path, scale: float = 0.6) -> Path:
    """Copy a PNG scaled down by ``scale`` (keeps the report's figures small)."""
    from PIL import Image

    with Image.open(source) as image:
        size = (round(image.width * scale), round(image.height * scale))
        small = image.convert("RGB").resize(size, Image.Resampling.LANCZOS)
        small.quantize(colors=128).save(target, optimize=True)
    return target


def main() -> None:
    start = time.perf_counter()
    strengths = ",".join(f"{k:g}" for k in STRENGTHS)
    sweep = mfbridge("-m", f"interaction.strength={strengths}", f"solver={','.join(SOLVERS)}",
                     *SCENARIO, f"hydra.sweep.dir={SWEEP_DIR}", "hydra.launcher.n_jobs=2",
                     DIRNAME)
    collected = mfbridge("collect", str(SWEEP_DIR))
    seconds = time.perf_counter() - start
    (SWEEP_DIR / "sweep_output.log").write_text(sweep)
    cases = load_cases()

    FIGURE_DIR.mkdir(parents=True, exist_ok=True)
    figures = {
        "gaps": plot_gaps(FIGURE_DIR / f"{NAME}_gaps.png", cases).name,
        "means": plot_means(FIGURE_DIR / f"{NAME}_means.png", cases).name,
    }
    shrink(SWEEP_DIR / "collected" / "densities.png", FIGURE_DIR / f"{NAME}_densities.png")
    figures["densities"] = f"{NAME}_densities.png"

    table = [
        "| κ | J optimal (grid) | exact | rel. err. | J frozen (grid) | exact | rel. err. |"
        " cost gap (grid) | exact | max mean gap (grid) | exact | mean err. opt. |"
        " mean err. frz. |",
        "| ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |"
        " ---: |",
    ]
    runs = [
        "| κ | solver | status | outer it. | solver s |",
        "| ---: | --- | --- | ---: | ---: |",
    ]
    gaps: list[tuple[float, float, float, float, float]] = []
    for k in STRENGTHS:
        for solver in SOLVERS:
            if (k, solver) in cases:
                c = cases[k, solver]
                runs.append(f"| {k:g} | {solver} | {c.status} | {c.iterations} | "
                            f"{c.runtime_s:.1f} |")
            else:
                runs.append(f"| {k:g} | {solver} | not complete | | |")
        if (k, "optimal") not in cases or (k, "frozen") not in cases:
            continue
        o, f = cases[k, "optimal"], cases[k, "frozen"]
        gap, gap_exact = f.cost - o.cost, f.exact_cost - o.exact_cost
        path_gap = float(np.max(np.abs(f.mean - o.mean)))
        path_gap_exact = float(np.max(np.abs(f.exact_mean - o.exact_mean)))
        gaps.append((k, gap, gap_exact, path_gap, path_gap_exact))
        table.append(
            f"| {k:g} | {o.cost:.5f} | {o.exact_cost:.5f} | {o.cost_error:.1e} | "
            f"{f.cost:.5f} | {f.exact_cost:.5f} | {f.cost_error:.1e} | {gap:.5f} | "
            f"{gap_exact:.5f} | {path_gap:.4f} | {path_gap_exact:.4f} | "
            f"{o.mean_error:.1e} | {f.mean_error:.1e} |")

    findings = []
    if gaps:
        nonzero = [g for g in gaps if g[0] > 0]
        findings.append(
            "* At κ = 0 the two variants are the same problem (no interaction to freeze): "
            f"the grid cost gap there is {gaps[0][1]:.1e} and the mean-path gap "
            f"{gaps[0][3]:.1e}." if gaps[0][0] == 0.0 else "")
        if nonzero:
            last = nonzero[-1]
            findings.append(
                f"* The cost gap grows from {nonzero[0][1]:.4f} at κ = {nonzero[0][0]:g} to "
                f"{last[1]:.4f} at κ = {last[0]:g} (exact {nonzero[0][2]:.4f} and "
                f"{last[2]:.4f}); the largest mean-path gap from {nonzero[0][3]:.3f} to "
                f"{last[3]:.3f} (exact {nonzero[0][4]:.3f} and {last[4]:.3f}).")
            ratio = [g[1] / g[0] ** 2 for g in nonzero]
            small_gap = (mfbridge_exact(0.01, "frozen").cost
                         - mfbridge_exact(0.01, "optimal").cost) / 0.01**2
            findings.append(
                "* Gap / κ² (grid): " + ", ".join(f"{g[0]:g}: {r:.3f}"
                                                    for g, r in zip(nonzero, ratio,
                                                                    strict=True))
                + f"; exact at κ = 0.01: {small_gap:.3f}. The gap starts quadratically in κ "
                "(J is quadratic about its minimum and the frozen flow is an O(κ) "
                "perturbation of it) and grows more slowly than κ² later.")
        std_gap = max(float(np.max(np.abs(cases[k, "frozen"].std - cases[k, "optimal"].std)))
                      for k, *_ in gaps)
        optimal = [cases[k, "optimal"].mean for k in STRENGTHS if (k, "optimal") in cases]
        spread = max(float(np.max(np.abs(m - optimal[0]))) for m in optimal)
        centred = max(abs(mfbridge_exact(k, "frozen").cost_centred
                          - mfbridge_exact(k, "optimal").cost_centred) for k, *_ in gaps)
        findings.append(
            f"* The spread around the mean is the same in both variants: the standard-deviation "
            f"paths differ by at most {std_gap:.1e} on the grid (the centred parts of the exact "
            f"costs differ by at most {centred:.1e}), so the cost gap is all in the mean part. "
            f"The optimal mean path does not depend on κ: the grid paths for different κ differ "
            f"by at most {spread:.1e}.")
        opt_best = min((cases[k, "optimal"].cost, k) for k, *_ in gaps)[1]
        frz_best = min((cases[k, "frozen"].cost, k) for k, *_ in gaps)[1]
        findings.append(
            f"* Ranking models by cost: the optimal J is smallest at κ = {opt_best:g} of the "
            f"swept values (the data are most typical of that cohesion), the frozen J at κ = "
            f"{frz_best:g}; the frozen J rises from {cases[gaps[0][0], 'frozen'].cost:.3f} to "
            f"{cases[gaps[-1][0], 'frozen'].cost:.3f} while the optimal J stays within "
            f"{min(cases[k, 'optimal'].cost for k, *_ in gaps):.3f} to "
            f"{max(cases[k, 'optimal'].cost for k, *_ in gaps):.3f}.")
        gap_err = max(abs(g[1] - g[2]) for g in gaps)
        gap_rel = max(abs(g[1] - g[2]) / g[2] for g in gaps if g[2] > 0)
        findings.append(
            f"* The grid cost gap is within {gap_err:.4f} of the exact one (at most "
            f"{100 * gap_rel:.1f}% of it), the mean-path gap within "
            f"{max(abs(g[3] - g[4]) for g in gaps):.1e}.")
        worst_cost = max(c.cost_error for c in cases.values())
        worst_mean = max(c.mean_error for c in cases.values())
        findings.append(
            f"* Grid against closed form: worst relative cost error {worst_cost:.1e}, worst "
            f"mean-path error {worst_mean:.1e} over all {len(cases)} runs.")
        below = all(cases[k, "optimal"].cost <= cases[k, "frozen"].cost + 1e-12
                    for k, *_ in gaps)
        findings.append("* In every pair the optimal cost is below the frozen one on the grid "
                        f"as well: {'yes' if below else 'NO'}.")
    findings = [line for line in findings if line]
    worst = max(cases.values(), key=lambda c: c.cost_error)
    refined = refine(worst)
    refinement = [
        f"Refinement of the run with the largest cost error (κ = {worst.strength:g}, "
        f"solver={worst.solver}), solved again through the Python API:",
        "",
        "| cells | steps | rel. cost error | max mean error |",
        "| ---: | ---: | ---: | ---: |",
        *(f"| {n} | {k} | {ce:.2e} | {me:.2e} |" for n, k, ce, me in refined),
    ]
    (_, _, e0, m0), (_, _, eh, mh), (_, _, et, mt) = refined
    # errors ~ c_h h² + c_t Δt²: halving h or Δt removes 3/4 of that part
    space, timestep = (e0 - eh) * 4 / 3, (e0 - et) * 4 / 3
    refinement += [
        "",
        f"Halving the cell size divides the mean error by {m0 / mh:.1f} and the cost error by "
        f"{e0 / eh:.1f}; halving the time step divides them by {m0 / mt:.1f} and "
        f"{e0 / et:.1f}. Read as c_h h² + c_t Δt², the cost error at 512 × 100 is about "
        f"{space:.1e} from space and {timestep:.1e} from time (sum {space + timestep:.1e}, "
        f"measured {e0:.1e}).",
    ]
    solver_total = sum(c.runtime_s for c in cases.values())

    report = f"""# The most likely bridge against the frozen-reference bridge

*Generated by `experiments/study_optimal_vs_frozen.py`; every number below is read from the
run folders of the sweep or computed by `mfbridge.lq_bridge`.*

Scenario (our own invention, for illustration): a flock feeds at ground A and is seen one time
unit later at ground B. Snapshots μ = N({MEAN0}, {COV0}) and ν = N({MEAN1}, {COV1}); the birds
live in a valley U(x) = a x²/2 with a = {STIFFNESS} and keep together through a harmonic
attraction W(z) = κ z²/2 (cohesion of strength κ); noise σ = {NOISE:g}, horizon T =
{HORIZON:g}. Grid: [-4, 4], 512 cells, 100 time steps.

Two bridges per κ: `solver=optimal` (the minimiser of the rate function J) and `solver=frozen`
(the interaction frozen at the flow's own marginals, iterated to a self-consistent fixed
point; not the minimiser of J when W ≠ 0). The model is linear–quadratic, so both have closed
forms (`mfbridge.lq_bridge(..., variant="optimal" | "frozen")`), evaluated on the same time
grid.

Commands (run by the script from the repository root; `FIXED` stands for the list of the fixed
keys above, which keeps the job folder names short):

```bash
mfbridge -m interaction.strength={strengths} solver={','.join(SOLVERS)} {' '.join(SCENARIO)} \\
    hydra.sweep.dir={SWEEP_REL} hydra.launcher.n_jobs=2 \\
    hydra.job.config.override_dirname.exclude_keys=[FIXED]
mfbridge collect {SWEEP_REL}
```

{timing_sentence(seconds, solver_total)}

## Costs and gaps, grid against exact

{chr(10).join(table)}

Cost gap = J(frozen) − J(optimal); max mean gap = max over t of |m_frozen(t) − m_optimal(t)|;
mean err. = max over t of |m_grid(t) − m_exact(t)| for each variant.

Runs:

{chr(10).join(runs)}

{chr(10).join(refinement)}

## Findings

{chr(10).join(findings)}

## Discussion

* **Where the gap comes from.** With W = κz²/2 the interaction force is −κ(x − m_t): it acts
  on the spread around the mean, never on the mean itself. The frozen bridge treats the force
  as an external field, −κ(x − m̄_t) with m̄ its own mean path held fixed, so when it chooses
  how to steer, the cohesion looks like an extra spring of stiffness κ tying each bird to a
  centre that will not follow it. Its mean control grows like exp((a+κ)t) instead of exp(at):
  the flock lingers near ground A and crosses late (mean-path figure), which the true J
  charges for. The optimal bridge accounts for the centre of attraction moving with the
  flock, and its mean path does not depend on κ at all. The spread around the mean is the
  same in both (the centred problems coincide), so the whole cost gap is in the mean part.
* **What it means.** The frozen bridge is a consistent story (every bird follows a bridge of
  the field the flock itself produces) but not the most likely one: its cost overstates the
  rarity of the observed crossing, by the factor exp(N·gap) in probability, and that
  overstatement grows fast with cohesion. Using the frozen solver to compare models with
  different κ would make cohesive models look far less compatible with the data than they are.
* **Accuracy.** The grid errors are small against the gaps (see the findings), so the
  comparison is not a discretisation artefact. They grow with κ, and faster for the frozen
  bridge; the refinement of the worst case shows most of its error is spatial (the mean error
  falls by about 4 when h is halved, as for a second-order scheme) but we have not isolated
  why the frozen runs are harder to resolve. The table uses one grid; only the worst case was
  refined.

## Figures

Costs and gaps against κ (markers: grid runs; lines: closed form):

![gaps](figures/{figures['gaps']})

Mean paths (solid: grid; dashed: closed form):

![means](figures/{figures['means']})

Densities ρ(t, x) from `mfbridge collect` (rows: κ; left column: frozen, right column: optimal):

![densities](figures/{figures['densities']})

## Output of the commands (last lines)

```text
{tail(sweep, 4)}
{collected.strip()}
```
"""
    (REPORT_DIR / f"{NAME}.md").write_text(report)
    print(report)


if __name__ == "__main__":
    main()
