"""Mobility plug-ins: the Einstein relation f'' = D/chi for every shipped mobility, closed forms,
and clear errors for bad user input."""

from __future__ import annotations

import numpy as np
import pytest

from mfbridge.errors import InputError
from mfbridge.model.mobility import (
    EnergyExchange,
    Exclusion,
    UserMobility,
    Walkers,
    ZeroRange,
    check_einstein,
)

SHIPPED = [Walkers(), Exclusion(), ZeroRange(), EnergyExchange()]


@pytest.mark.parametrize("mobility", SHIPPED, ids=repr)
def test_einstein_relation_by_finite_differences(mobility):
    # Einstein relation f'' = D/chi (Bertini, De Sole, Gabrielli, Jona-Lasinio & Landim,
    # "Macroscopic fluctuation theory", Rev. Mod. Phys. 2015); f'' by central differences of f,
    # independent of torch. Measured relative errors at most 5.7e-7 (exclusion; step 1e-4 × ρ).
    hi = 0.95 if np.isfinite(mobility.upper) else 20.0
    rho = np.linspace(0.05, hi, 40)
    step = 1e-4 * rho
    f2 = (mobility.f(rho + step) - 2 * mobility.f(rho) + mobility.f(rho - step)) / step**2
    expected = np.asarray(mobility.d(rho)) / np.asarray(mobility.chi(rho))
    assert np.max(np.abs(f2 / expected - 1)) < 1e-5
    # the autograd check used for user mobilities agrees (measured at most 1.1e-14, zero range)
    assert check_einstein(mobility) < 1e-12


def test_closed_forms():
    # common practice, no source: the four standard models' chi and D
    rho = np.array([0.1, 0.5, 0.9])
    np.testing.assert_allclose(Exclusion().chi(rho), rho * (1 - rho))
    np.testing.assert_allclose(EnergyExchange().chi(rho), rho**2)
    np.testing.assert_allclose(Walkers().chi(rho), rho)
    z = ZeroRange()
    np.testing.assert_allclose(z.chi(rho), rho / (1 + rho), rtol=1e-14)
    np.testing.assert_allclose(z.d(rho), 1 / (1 + rho) ** 2, rtol=1e-14)
    # f = int_0^rho log(s/(1+s)) ds = rho log rho - (1+rho) log(1+rho) (by hand); the quadrature
    # matches to a measured 5e-12
    np.testing.assert_allclose(z.f(rho), rho * np.log(rho) - (1 + rho) * np.log1p(rho), rtol=1e-10)


def test_zero_range_with_linear_rate_is_walkers():
    # phi(rho) = rho is the zero-range process of independent walkers (Bertini et al. 2015):
    # f = rho log rho - rho, so f'' = 1/rho as for walkers
    z = ZeroRange(rate=lambda r: 1.0 * r)
    rho = np.array([0.2, 1.0, 3.0])
    np.testing.assert_allclose(z.f(rho), rho * np.log(rho) - rho, rtol=1e-10)
    np.testing.assert_allclose(z.f2(rho), Walkers().f2(rho), rtol=1e-12)


def test_user_mobility_checked_against_einstein():
    def f_ok(r):
        return r * r.log() + (1 - r) * (1 - r).log()

    good = UserMobility(chi=lambda r: r * (1 - r), d=lambda r: r * 0 + 1, f=f_ok, upper=1.0)
    assert check_einstein(good) < 1e-12
    # the same chi with the walkers' free energy violates the relation: refused
    with pytest.raises(InputError, match="Einstein relation"):
        UserMobility(chi=lambda r: r * (1 - r), d=lambda r: r * 0 + 1,
                     f=lambda r: r * r.log(), upper=1.0)


def test_domain_errors():
    with pytest.raises(InputError, match=r"exclusion mobility \(0 ≤ ρ < 1\)"):
        Exclusion().check_density(np.array([0.2, 1.3]), "final")
    with pytest.raises(InputError, match="energy_exchange"):
        EnergyExchange().check_density(np.array([0.0, 1.0]), "initial")
    Walkers().check_density(np.array([0.0, 7.0]), "initial")
    with pytest.raises(InputError, match="increasing"):
        ZeroRange(rate=lambda r: 1.0 / (1.0 + r))
