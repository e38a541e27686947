"""Anderson mixing against its equivalence with GMRES on linear maps."""

from __future__ import annotations

import numpy as np
import pytest

from mfbridge.numerics.anderson import AndersonMixer


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_full_memory_anderson_solves_a_linear_map_in_n_plus_one_steps(seed):
    # Walker & Ni, "Anderson acceleration for fixed-point iterations", SIAM J. Numer. Anal. 49
    # (2011): undamped Anderson with memory >= n on x = A x + b is equivalent to GMRES, so its
    # (n+1)-th iterate is the fixed point. Measured errors: 4.4e-16 at step n + 1, 3.5e-4 to
    # 1.2e-3 at step n (the check can fail: one step earlier is not exact).
    rng = np.random.default_rng(seed)
    n = 5
    a = rng.standard_normal((n, n))
    a *= 0.5 / np.linalg.norm(a, 2)
    b = rng.standard_normal(n)
    fixed = np.linalg.solve(np.eye(n) - a, b)
    mixer = AndersonMixer(depth=n, damping=1.0)
    x = np.zeros(n)
    errors = []
    for _ in range(n + 1):
        x = mixer.next(x, a @ x + b)
        errors.append(float(np.abs(x - fixed).max()))
    assert errors[n - 1] > 1e-6
    assert errors[n] < 1e-12
