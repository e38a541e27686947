"""Write the invented demo snapshots of ``examples/data/`` with mfbridge's particle simulator.

Scenario (ours, invented for demonstration; no measurement behind it): cells in a 2D stripe
migrate up a chemical gradient along x. Positions in millimetres, times in hours. The model
used to generate them, in mfbridge's terms:

* confinement U(x, y) = tilt·x + stiffness·y²/2 with tilt = -0.8 mm/h² (a constant chemotactic
  drift of 0.8 mm/h towards +x) and stiffness = 1 /h² (the stripe holds the cells near y = 0):
  ``confinement=tilted_double_well confinement.depth=0 confinement.tilt=-0.8``;
* interaction W(z) = 0.5·exp(-|z|²/(2·0.3²)) mm²/h² (contact inhibition: a soft repulsion);
* noise σ = 0.5 mm/√h, i.e. diffusion coefficient D = σ²/2 = 0.125 mm²/h;
* 500 cells seeded as a cluster around (-1.2, 0) mm with standard deviation 0.3 mm, observed at
  t = 0 and again at T = 1.5 h.

Files: ``chemotaxis_start.csv`` (500 cells at t = 0; columns x_mm, y_mm and a segmentation
``confidence`` in [0.5, 1] used as weights) and ``chemotaxis_end.npz`` (a random 350 of the cells
at t = T, array ``positions`` of shape (350, 2); the other cells left the field of view of the
second image, independently of where they were). Seeded: the files are the same on every run.
Run: ``python experiments/make_demo_samples.py``.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
from study_common import output_dir

from mfbridge.model.grid import Grid
from mfbridge.model.potentials import GaussianCore, TiltedDoubleWell
from mfbridge.particles import PairForce, simulate

# experiments/out/examples/data unless run with --update-committed (then examples/data)
OUT = output_dir(Path(__file__).resolve().parent.parent / "examples" / "data")
SEED = 20260
N_START, N_END = 500, 350
HORIZON, STEPS = 1.5, 150
NOISE = 0.5
# Euler–Maruyama sub-steps per step of 0.01 h: the drift's Lipschitz constant is at most
# stiffness + strength/range² ≈ 6.6 /h, so L·δ ≈ 0.017 (a ~1% bias in variance; see the
# docstring of mfbridge.particles)
SUBSTEPS = 4
CONFINEMENT = TiltedDoubleWell(depth=0.0, tilt=-0.8, stiffness=1.0)
INTERACTION = GaussianCore(strength=0.5, range=0.3)
# the simulator's walls are reflecting: put them far from every cell
SIM_GRID = Grid(lower=(-8.0, -8.0), upper=(8.0, 8.0), shape=(64, 64))

HEADER = (
    "# INVENTED demo data of mfbridge (not a measurement): cells migrating up a chemical\n"
    "# gradient, simulated by experiments/make_demo_samples.py. Positions in mm at t = 0 h;\n"
    "# confidence: invented segmentation confidence, used as weights.\n"
)


def main() -> None:
    rng = np.random.default_rng(SEED)
    x0 = np.array([-1.2, 0.0]) + 0.3 * rng.standard_normal((N_START, 2))
    times = np.linspace(0.0, HORIZON, STEPS + 1)
    pair = PairForce(INTERACTION, SIM_GRID, mode="exact")
    substeps = SUBSTEPS
    run = simulate(SIM_GRID, times, NOISE, CONFINEMENT, pair, x0, rng, substeps, [0, STEPS])
    start, end = run.positions[0], run.positions[-1]
    confidence = np.round(rng.uniform(0.5, 1.0, N_START), 3)
    kept = np.sort(rng.choice(N_START, size=N_END, replace=False))

    OUT.mkdir(parents=True, exist_ok=True)
    table = io.StringIO()
    table.write(HEADER)
    table.write("x_mm,y_mm,confidence\n")
    for (x, y), c in zip(start, confidence, strict=True):
        table.write(f"{x:.4f},{y:.4f},{c:.3f}\n")
    (OUT / "chemotaxis_start.csv").write_text(table.getvalue())
    np.savez_compressed(OUT / "chemotaxis_end.npz", positions=np.round(end[kept], 4))
    print(f"substeps {substeps}; wrote {OUT / 'chemotaxis_start.csv'} ({N_START} cells) and "
          f"{OUT / 'chemotaxis_end.npz'} ({N_END} cells)")
    for label, pts in (("start", start), ("end", end[kept])):
        print(f"{label}: mean {np.round(pts.mean(axis=0), 3)}, std {np.round(pts.std(axis=0), 3)},"
              f" range x [{pts[:, 0].min():.2f}, {pts[:, 0].max():.2f}],"
              f" y [{pts[:, 1].min():.2f}, {pts[:, 1].max():.2f}]")


if __name__ == "__main__":
    main()
