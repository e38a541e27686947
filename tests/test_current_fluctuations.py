"""Current fluctuations of the open chain (additivity principle): the rate function of the
time-averaged current from the direct solver's action with a time-independent profile, against
the exact variance and cumulant generating functions of the open exclusion process and of
independent walkers."""

from __future__ import annotations

import math

import numpy as np
import pytest

from mfbridge.errors import InputError
from mfbridge.model.grid import Grid
from mfbridge.model.mobility import Exclusion, Walkers
from mfbridge.model.problem import BridgeProblem
from mfbridge.model.reservoirs import Reservoirs
from mfbridge.solvers.current_fluctuations import current_fluctuations
from mfbridge.solvers.direct import DirectOptions
from mfbridge.solvers.open_ssep import current_rate, current_variance, walkers_current_rate


def _chain(n: int, dim: int = 1) -> BridgeProblem:
    # noise sqrt(2): the action is the MFT action 1/4 int (j + rho')^2 / chi (D = 1)
    grid = Grid(0.0, 1.0, n) if dim == 1 else Grid([0.0, 0.0], [1.0, 1.0], [n, n])
    ones = np.ones(grid.shape)
    return BridgeProblem(grid=grid, initial=ones, final=ones, noise=math.sqrt(2.0), horizon=1.0,
                         steps=2)


def _options(mobility, a: float, b: float) -> DirectOptions:
    return DirectOptions(mobility=mobility, total_mass=1.0,
                         reservoirs=Reservoirs(lower=[a], upper=[b]))


@pytest.mark.parametrize(("a", "b", "bound"), [(0.8, 0.2, 1.4e-4), (0.3, 0.6, 3.2e-5)])
def test_ssep_current_variance(a, b, bound):
    # Var = int sigma(rho_bar) dx = a + b - (2/3)(a^2 + ab + b^2), sigma = 2 rho (1 - rho), the
    # linear profile (B. Derrida, B. Doucot & P.-E. Roche, "Current fluctuations in the
    # one-dimensional symmetric exclusion process with open boundaries", J. Stat. Phys. 115,
    # 2004; T. Bodineau & B. Derrida, "Current fluctuations in nonequilibrium diffusive systems:
    # an additivity principle", PRL 92, 2004; open_ssep.current_variance).
    # Measured: relative gaps -2.66e-4 / -6.66e-5 (0.8, 0.2) and -6.10e-5 / -1.53e-5 (0.3, 0.6)
    # at 32 / 64 cells (the discrete variance is exact - (a - b)^2 h^2 / 3): second order.
    exact = current_variance(a, b)
    gaps = []
    for n in (32, 64):
        cf = current_fluctuations(_chain(n), _options(Exclusion(), a, b), [a - b])
        assert cf.mean_current == pytest.approx(a - b, rel=1e-12)  # Fick's law, exact
        assert abs(cf.rates[0]) < 1e-14  # no cost for the typical current
        gaps.append(cf.variance / exact - 1)
    assert abs(gaps[1]) < bound
    assert 3.5 < gaps[0] / gaps[1] < 4.5  # measured 3.99, 4.00


def test_equal_reservoirs_give_the_equilibrium_variance():
    # rho_a = rho_b = rho: Var = 2 rho (1 - rho) (the formula above; measured gap 2e-16)
    cf = current_fluctuations(_chain(32), _options(Exclusion(), 0.3, 0.3), [0.0, 0.2])
    assert cf.variance == pytest.approx(2 * 0.3 * 0.7, rel=1e-12)
    assert cf.mean_current == pytest.approx(0.0, abs=1e-14)


@pytest.mark.parametrize(("a", "b", "bound"), [(0.8, 0.2, 8e-4), (0.3, 0.6, 4e-4)])
def test_ssep_rate_function_is_the_legendre_transform_of_the_exact_cgf(a, b, bound):
    # the Legendre transform of mu(lam) = arcsinh(sqrt(omega))^2 (Derrida, Doucot & Roche 2004,
    # quoted from memory: open_ssep.current_rate)
    # measured at 32 cells: largest relative gap 4.08e-4 (0.8, 0.2), 2.10e-4 (0.3, 0.6); at 64
    # cells 1.05e-4 and 5.5e-5 (second order)
    js = np.array([-0.5, 0.0, 0.3, 0.9, 1.5])
    cf = current_fluctuations(_chain(32), _options(Exclusion(), a, b), js)
    exact = np.array([current_rate(j, a, b) for j in js])
    assert np.abs(cf.rates / exact - 1).max() < bound
    assert np.all(cf.profiles > 0) and np.all(cf.profiles < 1)


def test_walkers_rate_function_in_closed_form():
    # two opposite Poisson streams, mu(lam) = a(e^lam - 1) + b(e^-lam - 1) (B. Derrida,
    # "Non-equilibrium steady states: fluctuations and large deviations of the density and of
    # the current", J. Stat. Mech. P07023, 2007; from memory: open_ssep.walkers_current_rate)
    # measured at 32 cells: largest relative gap 8.4e-4 (at j = 3, six times the mean current)
    a, b = 0.8, 0.3
    js = np.array([-1.0, -0.3, 0.0, 0.2, 0.8, 1.5, 3.0])
    cf = current_fluctuations(_chain(32), _options(Walkers(), a, b), js)
    exact = np.array([walkers_current_rate(j, a, b) for j in js])
    assert np.abs(cf.rates / exact - 1).max() < 1.7e-3
    assert cf.variance == pytest.approx(a + b, rel=1e-12)  # int 2 rho_bar = a + b, exact here


def test_not_an_open_chain_is_refused():
    with pytest.raises(InputError, match="1D chain"):
        current_fluctuations(_chain(8, dim=2), DirectOptions(
            mobility=Exclusion(), total_mass=1.0,
            reservoirs=Reservoirs(lower=[0.8, None], upper=[0.2, None])), [0.1])
    with pytest.raises(InputError, match="both ends"):
        current_fluctuations(_chain(16), DirectOptions(
            mobility=Exclusion(), total_mass=1.0, reservoirs=Reservoirs(lower=[0.8])), [0.1])
    with pytest.raises(InputError, match="both ends"):
        current_fluctuations(_chain(16), DirectOptions(mobility=Exclusion(), total_mass=1.0),
                             [0.1])
