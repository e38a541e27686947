"""Shared fixtures of the test suite."""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
import pytest

# Small problems that still exercise every code path: interacting (Gaussian core, the default),
# harmonic trap, two-cluster initial cloud. The default grid is [-4, 4].
TINY_1D: tuple[str, ...] = ("grid.shape=48", "steps=10")
TINY_2D: tuple[str, ...] = ("grid=plane", "endpoints=gaussians_2d", "grid.shape=[16,16]", "steps=8")


@pytest.fixture(scope="session", autouse=True)
def _raise_on_floating_point_errors() -> Iterator[None]:
    """Overflow, division by zero and invalid operations are errors everywhere in the suite
    (underflow is ordinary in log-domain Sinkhorn and stays silent)."""
    old = np.seterr(all="raise", under="ignore")
    yield
    np.seterr(**old)


@pytest.fixture(scope="session")
def tiny_overrides() -> tuple[str, ...]:
    """Overrides that shrink the default 1D scenario to a sub-second solve."""
    return TINY_1D


@pytest.fixture(scope="session")
def tiny_overrides_2d() -> tuple[str, ...]:
    """Overrides for a small 2D Gaussian-to-Gaussian scenario."""
    return TINY_2D
