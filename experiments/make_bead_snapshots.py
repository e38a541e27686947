"""Write the invented bead snapshots of ``examples/data/`` with mfbridge's particle simulator.

Scenario (ours, invented for demonstration; no measurement behind it): colloidal beads held in a
tight optical tweezer at x = -1 µm are released into a wide harmonic trap centred at 0; they
repel each other through a soft, screened core. Video microscopy records the bead positions along
the channel at three times, t = 0, 0.3 and 1.0 s (the whole population at each time). The model
used to generate them, in mfbridge's terms:

* confinement U(x) = stiffness·x²/2 with stiffness = 1 /s²;
* interaction W(z) = strength·exp(-z²/(2·range²)) with strength = 1.5 µm²/s², range = 0.4 µm;
* noise σ = 0.5 µm/√s (diffusion coefficient D = σ²/2 = 0.125 µm²/s);
* N = 8000 beads, at t = 0 normally distributed around -1 µm with standard deviation 0.15 µm.

Euler–Maruyama with steps of 5e-4 s: the drift's Lipschitz constant is at most
stiffness + strength/range² ≈ 10 /s, so L·δ ≈ 0.005 (a 0.25% bias in variance; see the docstring
of :mod:`mfbridge.particles`). Pair forces by the grid route on 4096 cells over [-5, 5] µm
(h ≈ 0.0024 µm, error O(h²)). Files ``beads_t0.csv``, ``beads_t1.csv``, ``beads_t2.csv`` with
one column ``x_um``. Seeded: the files are the same on every run.
Run: ``python experiments/make_bead_snapshots.py`` (writes to experiments/out/examples/data;
``--update-committed`` rewrites the files in examples/data).
"""

from __future__ import annotations

import argparse

import numpy as np
from study_common import ROOT, add_output_flag, output_dir

from mfbridge.model.grid import Grid
from mfbridge.model.potentials import GaussianCore, Harmonic
from mfbridge.particles import population_snapshots

SEED = 16
N = 8000
TIMES = (0.0, 0.3, 1.0)
DT = 5e-4
NOISE = 0.5
CONFINEMENT = Harmonic(stiffness=1.0)
INTERACTION = GaussianCore(strength=1.5, range=0.4)
START_MEAN, START_SD = -1.0, 0.15
# the simulator's walls are reflecting: far from every bead
SIM_GRID = Grid(-5.0, 5.0, 4096)


def simulate_snapshots(n: int, seed: int) -> np.ndarray:
    """Positions (len(TIMES), n, 1) of n beads at the snapshot times (µm)."""
    rng = np.random.default_rng(seed)
    x0 = rng.normal(START_MEAN, START_SD, size=(n, 1))
    return population_snapshots(x0, TIMES, NOISE, CONFINEMENT, INTERACTION, SIM_GRID, DT, rng)


HEADER = ("# INVENTED demo data of mfbridge (not a measurement): beads released from a tweezer "
          "into a\n# harmonic trap, simulated by experiments/make_bead_snapshots.py. Positions "
          "in µm at t = {t:g} s.\n")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_output_flag(parser)
    parser.parse_args()
    out = output_dir(ROOT / "examples" / "data")
    positions = simulate_snapshots(N, SEED)
    out.mkdir(parents=True, exist_ok=True)
    for k, t in enumerate(TIMES):
        path = out / f"beads_t{k}.csv"
        lines = [HEADER.format(t=t).rstrip("\n"), "x_um"]
        lines += [f"{x:.5f}" for x in positions[k, :, 0]]
        path.write_text("\n".join(lines) + "\n")
        print(f"{path}: {N} beads, mean {positions[k].mean():.4f} µm, "
              f"sd {positions[k].std():.4f} µm")


if __name__ == "__main__":
    main()
