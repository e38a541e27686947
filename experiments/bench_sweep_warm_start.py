"""Benefit of warm starts in a sweep: outer iterations and solver time of a 5-value sweep of the
interaction strength, run one job after the other (Hydra's basic launcher), with
``warm_start=nearest`` (each job starts from the finished job nearest in strength: here the
previous value) and with ``warm_start=none`` (cold starts).

Scenario: the default one (conf/config.yaml: beads in a harmonic trap released into a broad
cloud, Gaussian soft-core interaction of range 0.5, σ = 0.8, T = 1), 256 cells, K = 100, solver
``optimal`` with tol 1e-9. Two sweeps: a coarse one (strength -2..2, step 1) and a fine one
(0.8..1.2, step 0.1). Each sweep is run ``--repeat`` times per mode, alternating which mode goes
first; times are the solver's own (``timings.solve`` of each run, summed), the command's wall
time includes process start-up and Hydra. Writes experiments/results/sweep_warm_start.md.

    python experiments/bench_sweep_warm_start.py [--repeat 2]
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import time
from pathlib import Path
from typing import Any

from study_common import ROOT, add_output_flag, mfbridge, output_dir

from mfbridge import load
from mfbridge.runs import records

SWEEPS = {"coarse": (-2, -1, 0, 1, 2), "fine": (0.8, 0.9, 1.0, 1.1, 1.2)}
MODES = ("none", "nearest")
RUN_DIR = ROOT / "experiments" / "runs" / "bench_sweep_warm_start"
OUT = output_dir(ROOT / "experiments" / "results") / "sweep_warm_start.md"


def run_sweep(values: tuple[float, ...], mode: str, folder: Path) -> dict[str, Any]:
    """One sequential sweep; per strength: iterations, Sinkhorn iterations, solver seconds,
    cost, and the value it was warm-started from."""
    shutil.rmtree(folder, ignore_errors=True)
    start = time.perf_counter()
    mfbridge("-m", "hydra/launcher=basic", f"interaction.strength={','.join(map(str, values))}",
             f"warm_start={mode}", "figures=false", f"hydra.sweep.dir={folder}")
    wall = time.perf_counter() - start
    jobs: dict[float, dict[str, Any]] = {}
    for entry in records.scan_sweep(folder):
        assert entry.complete and entry.record is not None, entry.problem
        result = load(entry.folder)
        warm = entry.record.warm_start or {}
        source = (warm.get("differences") or {}).get("interaction.strength", [None])[0]
        jobs[float(entry.record.config["interaction"]["strength"])] = {
            "iterations": result.iterations,
            "sinkhorn": int(sum(h["sinkhorn_iterations"] for h in result.history)),
            "seconds": float(result.timings["solve"]),
            "cost": result.cost,
            "status": result.status,
            "from": source,
        }
    return {"wall": wall, "jobs": jobs}


def table(name: str, values: tuple[float, ...], runs: dict[str, list[dict[str, Any]]]) -> str:
    cold, warm = runs["none"], runs["nearest"]
    lines = [
        f"### {name} sweep: interaction.strength = {', '.join(map(str, values))}",
        "",
        "| strength | warm start from | outer it. cold | outer it. warm | Sinkhorn it. cold "
        "| Sinkhorn it. warm | solve s cold | solve s warm | \\|J_warm − J_cold\\| |",
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- |",
    ]

    def med(runs_: list[dict[str, Any]], s: float, key: str) -> float:
        return statistics.median(r["jobs"][s][key] for r in runs_)

    for s in values:
        c, w = cold[0]["jobs"][float(s)], warm[0]["jobs"][float(s)]
        source = "—" if w["from"] is None else f"{w['from']:g}"
        lines.append(
            f"| {s:g} | {source} | {c['iterations']} | {w['iterations']} | {c['sinkhorn']} "
            f"| {w['sinkhorn']} | {med(cold, float(s), 'seconds'):.2f} "
            f"| {med(warm, float(s), 'seconds'):.2f} | {abs(w['cost'] - c['cost']):.1e} |"
        )
    tot = {m: [sum(j[key] for j in r["jobs"].values()) for r in runs[m]]
           for m in MODES for key in ("seconds",)}
    it = {m: sum(j["iterations"] for j in runs[m][0]["jobs"].values()) for m in MODES}
    sk = {m: sum(j["sinkhorn"] for j in runs[m][0]["jobs"].values()) for m in MODES}
    walls = {m: [r["wall"] for r in runs[m]] for m in MODES}
    lines.append(
        f"| **total** | | {it['none']} | {it['nearest']} | {sk['none']} | {sk['nearest']} "
        f"| {statistics.median(tot['none']):.2f} | {statistics.median(tot['nearest']):.2f} | |"
    )
    ratio = [w / c for w, c in zip(tot["nearest"], tot["none"], strict=True)]
    lines += [
        "",
        f"Solver time warm / cold per repetition: {', '.join(f'{r:.2f}' for r in ratio)}; "
        f"wall time of the sweep command (s), cold: "
        f"{', '.join(f'{x:.1f}' for x in walls['none'])}, warm: "
        f"{', '.join(f'{x:.1f}' for x in walls['nearest'])}. Statuses: "
        f"{sorted({j['status'] for m in MODES for r in runs[m] for j in r['jobs'].values()})}.",
        "",
    ]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=2)
    add_output_flag(parser)
    args = parser.parse_args(argv)
    OUT.parent.mkdir(parents=True, exist_ok=True)
    sections = []
    for name, values in SWEEPS.items():
        runs: dict[str, list[dict[str, Any]]] = {m: [] for m in MODES}
        for rep in range(args.repeat):
            for mode in (MODES if rep % 2 == 0 else MODES[::-1]):
                print(f"{name} sweep, warm_start={mode}, repetition {rep + 1}", flush=True)
                runs[mode].append(run_sweep(values, mode, RUN_DIR / f"{name}_{mode}_{rep}"))
        sections.append(table(name, values, runs))
        print(sections[-1], flush=True)
    text = "\n".join([
        "# Warm starts in sweeps",
        "",
        "Written by `python experiments/bench_sweep_warm_start.py "
        f"--repeat {args.repeat}`. Default scenario (conf/config.yaml), 256 cells, K = 100, "
        "`solver=optimal`, tol 1e-9; sweeps run one job after the other "
        "(`hydra/launcher=basic`), with `warm_start=none` (cold) and `warm_start=nearest` "
        "(warm: each job starts from the finished run nearest in strength, the previous "
        "value). Iteration counts are deterministic (first repetition shown); solver seconds "
        "are medians over the repetitions (2 cores shared with other jobs: noisy, compare "
        "ratios).",
        "",
        *sections,
        "## Reading",
        "",
        "Compare the total outer iterations of the two modes above. Why a neighbour's solution "
        "saves little here: the outer loop contracts fast from the cold start (linear "
        "interpolation of the endpoints, V = 0), its first residual of about 2 falls to about "
        "0.1 in three iterations, while the warm start's first residual stays of order 0.3–2: "
        "the correction potential V scales with the strength, so the neighbour's V is off by "
        "a fraction Δstrength/strength of itself, and the self-consistency residual weighs "
        "that error. From there both starts contract at the same rate. Even the exact V of "
        "the new strength with the neighbour's flow (strength −1 from −2, 64 cells, K = 32, "
        "measured once by hand) needs 13 outer iterations against 15 cold. The answers agree "
        "to the solver tolerance (last column).",
        "",
    ])
    OUT.write_text(text)
    print(f"written: {OUT}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
