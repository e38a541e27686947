"""How exact is the envelope-theorem gradient of J? A ladder of grids in 1D.

For each grid (cells n, steps K) the bridge is solved at θ and at θ ± δ for four parameters
(trap stiffness, Gaussian-core strength and range, noise σ), and two pairs are compared:

* the envelope gradient of the *reported* J (:func:`mfbridge.solvers.sensitivity.cost_gradient`)
  against central differences of the reported J;
* the envelope gradient of the chain's relative-entropy rate J_chain (the functional whose
  first-order condition the solver imposes, its derivative is the correction V) against
  central differences of J_chain on the same flows.

Expected: the first gap shrinks with h (J and J_chain differ by O(h²), so the flow is not
stationary for the reported J), the second only with Δt (the time scheme makes the fixed point
stationary for J_chain to O(Δt²)). Writes envelope_gradient.md into experiments/out/results/
(experiments/results/ with --update-committed).

    python experiments/study_envelope_gradient.py [--update-committed]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from study_common import ROOT, add_output_flag, output_dir

from mfbridge.model.endpoints import Gaussian
from mfbridge.model.grid import Grid
from mfbridge.model.parameters import parameter_derivative, with_parameters
from mfbridge.model.potentials import GaussianCore, Harmonic
from mfbridge.model.problem import BridgeProblem
from mfbridge.numerics.observables import trapezoid_weights
from mfbridge.numerics.reference import (
    PairField,
    bernoulli,
    bernoulli_derivative,
    edge_rates,
    faces,
)
from mfbridge.solvers.fixed_point import SolverOptions, solve_bridge
from mfbridge.solvers.sensitivity import cost_gradient

OUT = output_dir(ROOT / "experiments" / "results") / "envelope_gradient.md"
NAMES = ("confinement.stiffness", "interaction.strength", "interaction.range", "noise")
OPTIONS = SolverOptions()
DELTA = 1e-3
LADDER = ((64, 20), (128, 20), (128, 40), (256, 40), (256, 80))


def problem(n: int, steps: int) -> BridgeProblem:
    """The case of tests/test_sensitivity.py: a cloud pulled across a harmonic trap, soft-core
    repulsion."""
    return BridgeProblem(grid=Grid(-4.0, 4.0, n), initial=Gaussian(-1.2, 0.1),
                         final=Gaussian(1.0, 0.5), noise=0.8, horizon=1.0, steps=steps,
                         confinement=Harmonic(1.5), interaction=GaussianCore(1.0, 0.6))


def chain_rate(prob: BridgeProblem, result, names=()) -> tuple[float, dict[str, float]]:
    """J_chain = ∫ Σ_i p_i Σ_j q_ij φ(h_j/h_i) dt (φ(r) = r log r − r + 1, trapezoid rule) and
    its partial derivatives at the fixed flow: ∫ Σ_edges p_i (1 − h_j/h_i) ∂θ q_ij dt."""
    grid, sigma = prob.grid, prob.noise
    p, lf, lh = result.masses, result.log_forward, result.log_backward
    conf = prob.confinement.value(grid.points)
    phi = conf + PairField(grid, prob.interaction)(p)
    rates = edge_rates(phi, grid, sigma)
    w = trapezoid_weights(prob.times)
    beta, diffusivity = 2 / sigma**2, sigma**2 / 2
    total = np.zeros(p.shape[0])
    grads = {name: np.zeros(p.shape[0]) for name in names}
    dphi = {}
    for name in names:
        part, _, field = name.partition(".")
        if part == "confinement":
            dphi[name] = np.broadcast_to(parameter_derivative(prob.confinement, field,
                                                              grid.points), p.shape)
        elif part == "interaction":
            class _D:
                is_zero = False

                def value(self, z, field=field):
                    return parameter_derivative(prob.interaction, field, z)
            dphi[name] = PairField(grid, _D())(p)
    h2 = grid.spacing[0] ** 2
    lo, hi = faces(p.ndim, 1, grid.shape[0])
    z = beta * np.diff(phi, axis=1)
    for q, i, j, sign in ((rates.forward[0], lo, hi, 1.0), (rates.backward[0], hi, lo, -1.0)):
        flow = np.exp(lf[i] + lh[j])  # p_i h_j / h_i
        total += (q * (flow * (lh[j] - lh[i]) - flow + p[i])).sum(axis=1)
        for name in names:
            if name == "noise":
                sz = sign * z
                dq = (sigma / h2) * (bernoulli(sz) - sz * bernoulli_derivative(sz))
            else:
                dq = sign * (diffusivity / h2) * bernoulli_derivative(sign * z) * beta * \
                    np.diff(dphi[name], axis=1)
            grads[name] += ((p[i] - flow) * dq).sum(axis=1)
    return float(w @ total), {name: float(w @ g) for name, g in grads.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_output_flag(parser)
    parser.parse_args()
    rows = []
    for n, steps in LADDER:
        start = time.perf_counter()
        prob = problem(n, steps)
        base = solve_bridge(prob, OPTIONS)
        _, env = cost_gradient(prob, base, NAMES)
        _, env_chain = chain_rate(prob, base, NAMES)
        for name in NAMES:
            value = {"confinement.stiffness": 1.5, "interaction.strength": 1.0,
                     "interaction.range": 0.6, "noise": 0.8}[name]
            pp, pm = (with_parameters(prob, {name: value + s * DELTA}) for s in (1, -1))
            rp = solve_bridge(pp, OPTIONS, warm_start=base)
            rm = solve_bridge(pm, OPTIONS, warm_start=base)
            fd = (rp.cost - rm.cost) / (2 * DELTA)
            fd_chain = (chain_rate(pp, rp)[0] - chain_rate(pm, rm)[0]) / (2 * DELTA)
            rows.append((n, steps, name, fd, env[name], abs(env[name] - fd) / abs(fd),
                         fd_chain, env_chain[name],
                         abs(env_chain[name] - fd_chain) / abs(fd_chain)))
        print(f"n = {n}, K = {steps}: {time.perf_counter() - start:.1f} s", flush=True)
    lines = [
        "# Envelope-theorem gradient of J against central differences (1D)",
        "",
        "Case: U = 1.5 x²/2, W = Gaussian core (strength 1, range 0.6), σ = 0.8, T = 1, "
        "N(−1.2, 0.1) → N(1.0, 0.5) on [−4, 4]; central differences with δ = 1e-3, solver "
        "tolerance 1e-9. `python experiments/study_envelope_gradient.py`.",
        "",
        "| cells | steps | parameter | FD of reported J | envelope | relative gap | "
        "FD of J_chain | envelope of J_chain | relative gap |",
        "| ---: | ---: | --- | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for r in rows:
        lines.append(f"| {r[0]} | {r[1]} | {r[2]} | {r[3]:.6g} | {r[4]:.6g} | {r[5]:.2e} | "
                     f"{r[6]:.6g} | {r[7]:.6g} | {r[8]:.2e} |")
    lines += [
        "",
        "The reported J (the action of the control flux, face by face) is not the functional "
        "the solver minimises: that is the chain's relative-entropy rate J_chain, which agrees "
        "with it to O(h²). So the envelope gradient of the reported J differs from its central "
        "difference by the discretisation error; the gap falls with the cell size at about "
        "second order. The envelope gradient of J_chain differs from J_chain's central "
        "difference only through the time scheme (the outer loop's V is the derivative of the "
        "time-continuous chain functional): that gap does not change with the cell size and "
        "falls like Δt².",
    ]
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text("\n".join(lines) + "\n")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
