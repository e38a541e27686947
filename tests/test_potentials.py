"""Tests of mfbridge.model.potentials: gradients, evenness, closed forms, torch autograd,
registries."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import torch
from hydra import compose, initialize_config_dir
from hydra.utils import instantiate
from omegaconf import OmegaConf

from mfbridge.errors import InputError
from mfbridge.model.grid import Grid
from mfbridge.model.potentials import (
    Confinement,
    DoubleWell,
    GaussianCore,
    Harmonic,
    HarmonicInteraction,
    Interaction,
    Morse,
    NoConfinement,
    NoInteraction,
    SoftCoulomb,
    TiltedDoubleWell,
    TorchConfinement,
    TorchInteraction,
    confinement_from_name,
    interaction_from_name,
)

CONF = Path(__file__).resolve().parents[1] / "conf"
CONFINEMENT_FILES = sorted((CONF / "confinement").glob("*.yaml"))
INTERACTION_FILES = sorted((CONF / "interaction").glob("*.yaml"))
STEP = 1e-5
EPS = np.finfo(np.float64).eps


def quadratic_energy(x: torch.Tensor) -> torch.Tensor:
    """U(x) = |x|²/2, used through its dotted import path."""
    return 0.5 * (x**2).sum(-1)


def _central_difference(f: Callable[[np.ndarray], np.ndarray], x: np.ndarray, h: float):
    """Central differences (f(x + h e_k) - f(x - h e_k)) / 2h for every axis k, shape (..., d)."""
    out = np.empty_like(x)
    for k in range(x.shape[-1]):
        e = np.zeros(x.shape[-1])
        e[k] = h
        out[..., k] = (f(x + e) - f(x - e)) / (2 * h)
    return out


def check_grad_by_finite_differences(potential: Confinement | Interaction, x: np.ndarray) -> None:
    """grad vs central differences of value (common practice, no source).

    The truncation error of the central difference, C h², is measured as |D(h) - D(2h)| / 3
    (Richardson); the tolerance allows 10 times that plus the rounding error ~ ε |f| / h.
    """
    g = potential.grad(x)
    assert g.shape == x.shape
    d1 = _central_difference(potential.value, x, STEP)
    d2 = _central_difference(potential.value, x, 2 * STEP)
    truncation = np.abs(d1 - d2) / 3
    rounding = 10 * EPS * (np.abs(potential.value(x))[..., None] + 1.0) / STEP
    np.testing.assert_array_less(np.abs(g - d1), 10 * truncation + rounding + 1e-300)


def _points(d: int, seed: int = 0, scale: float = 1.5) -> np.ndarray:
    """Random points of shape (3, 4, d): two leading axes test the vectorisation."""
    return scale * np.random.default_rng(seed).standard_normal((3, 4, d))


def _confinements(d: int) -> list[Confinement]:
    return [
        NoConfinement(),
        Harmonic(stiffness=1.7, centre=0.3),
        Harmonic(stiffness=0.4, centre=list(np.linspace(-0.5, 0.5, d))),
        DoubleWell(depth=2.0, stiffness=0.5),
        TiltedDoubleWell(depth=1.5, tilt=0.3, stiffness=2.0),
        TorchConfinement(lambda x: torch.cos(x).sum(-1) + 0.1 * (x**4).sum(-1)),
    ]


def _interactions() -> list[Interaction]:
    return [
        NoInteraction(),
        HarmonicInteraction(strength=-0.7),
        GaussianCore(strength=1.3, range=0.6),
        Morse(depth=2.0, width=1.5, distance=0.8),
        SoftCoulomb(strength=0.9, softening=0.2),
        TorchInteraction(lambda z: torch.cosh(z).prod(-1)),
        TorchInteraction(lambda r: torch.exp(-r) * (1 + r), radial=True),
    ]


# --------------------------------------------------------------------------- gradients


@pytest.mark.parametrize("d", [1, 2, 3])
def test_confinement_gradients_match_finite_differences(d: int) -> None:
    x = _points(d)
    for potential in _confinements(d):
        assert potential.value(x).shape == x.shape[:-1]
        check_grad_by_finite_differences(potential, x)


@pytest.mark.parametrize("d", [1, 2, 3])
def test_interaction_gradients_match_finite_differences(d: int) -> None:
    z = _points(d, seed=1)
    for potential in _interactions():
        assert potential.value(z).shape == z.shape[:-1]
        check_grad_by_finite_differences(potential, z)


@pytest.mark.parametrize("d", [1, 2, 3])
def test_interactions_are_even(d: int) -> None:
    # W(-z) = W(z) and ∇W(-z) = -∇W(z) (definition of a pair potential; no source)
    z = _points(d, seed=2)
    for potential in _interactions():
        np.testing.assert_allclose(potential.value(-z), potential.value(z), rtol=1e-14, atol=0)
        np.testing.assert_allclose(potential.grad(-z), -potential.grad(z), rtol=1e-14, atol=0)
        np.testing.assert_array_equal(potential.grad(np.zeros(d)), np.zeros(d))


def test_morse_softening_makes_the_origin_smooth() -> None:
    # near z = 0 the softened Morse is smooth: finite differences at the scale of ε agree
    morse = Morse(depth=1.0, width=2.0, distance=1.0, softening=1e-3)
    z = np.array([[0.0, 0.0], [3e-4, -2e-4], [1e-3, 5e-4]])
    assert np.all(np.isfinite(morse.grad(z)))
    step = 1e-7
    fd = _central_difference(morse.value, z, step)
    np.testing.assert_allclose(morse.grad(z), fd, rtol=1e-6, atol=1e-6)


# --------------------------------------------------------------------------- closed forms


def test_harmonic_closed_form() -> None:
    # U = k |x - c|²/2 at x - c = (1, 2): k·5/2 (closed form)
    u = Harmonic(stiffness=3.0, centre=[0.5, -1.0])
    x = np.array([1.5, 1.0])
    assert u.value(x) == pytest.approx(7.5, rel=1e-15)
    np.testing.assert_allclose(u.grad(x), [3.0, 6.0], rtol=1e-15)


def test_double_well_minima_and_barrier() -> None:
    # wells at x0 = ±1 with U = -depth/4, barrier U(0) = 0, zero gradient there (closed form)
    u = DoubleWell(depth=2.5, stiffness=4.0)
    x = np.array([[-1.0, 0.0], [1.0, 0.0], [0.0, 0.0]])
    np.testing.assert_allclose(u.value(x), [-2.5 / 4, -2.5 / 4, 0.0], rtol=1e-15)
    np.testing.assert_array_equal(u.grad(x), np.zeros((3, 2)))
    # transverse harmonic term: U(1, 0.5) = -depth/4 + 4·0.25/2 (closed form)
    assert u.value(np.array([1.0, 0.5])) == pytest.approx(-0.625 + 0.5, rel=1e-15)
    # along x0 only in 1D: U(2) = depth (4 - 2) = 5 (closed form)
    assert DoubleWell(depth=2.5).value(np.array([2.0])) == pytest.approx(5.0, rel=1e-15)


def test_tilted_double_well_closed_form() -> None:
    # U(1) - U(-1) = 2 tilt and ∇U(0) = (tilt, 0) (closed form)
    u = TiltedDoubleWell(depth=1.0, tilt=0.2, stiffness=1.0)
    right, left = u.value(np.array([[1.0, 0.0], [-1.0, 0.0]]))
    assert right - left == pytest.approx(0.4, rel=1e-14)
    np.testing.assert_allclose(u.grad(np.zeros(2)), [0.2, 0.0], atol=1e-16)


def test_pair_potential_closed_forms() -> None:
    # Gaussian core: W(0) = strength, W(|z| = range) = strength e^{-1/2} (closed form)
    g = GaussianCore(strength=2.0, range=0.5)
    np.testing.assert_allclose(g.value(np.array([[0.0, 0.0], [0.3, 0.4]])), [2.0, 2 * np.exp(-0.5)])
    # soft Coulomb: W(3, 4) = strength / sqrt(25 + ε²) (closed form)
    c = SoftCoulomb(strength=1.5, softening=0.1)
    assert c.value(np.array([3.0, 4.0])) == pytest.approx(1.5 / np.sqrt(25.01), rel=1e-15)
    assert c.value(np.zeros(1)) == pytest.approx(15.0, rel=1e-15)
    # harmonic interaction: W(z) = s |z|²/2 (closed form)
    assert HarmonicInteraction(strength=-2.0).value(np.array([1.0, 1.0, 1.0])) == -3.0


def test_morse_minimum_closed_form() -> None:
    # W = -depth and ∇W = 0 at r_ε = distance, i.e. |z| = sqrt(distance² - ε²) (closed form)
    eps = 1e-3
    m = Morse(depth=1.7, width=1.3, distance=0.9, softening=eps)
    r_min = np.sqrt(0.9**2 - eps**2)
    z = np.array([[r_min, 0.0], [0.0, -r_min], [r_min / np.sqrt(2), r_min / np.sqrt(2)]])
    np.testing.assert_allclose(m.value(z), -1.7, rtol=1e-14)
    np.testing.assert_allclose(m.grad(z), 0.0, atol=1e-14)
    # at r_ε = distance + ln 2 / width the exponential is 1/2: W = -3 depth / 4 (closed form)
    r = np.sqrt((0.9 + np.log(2) / 1.3) ** 2 - eps**2)
    assert m.value(np.array([r])) == pytest.approx(-0.75 * 1.7, rel=1e-13)
    # unsoftened minimum at |z| = distance is within O(ε²) of -depth (closed form)
    assert m.value(np.array([0.9])) == pytest.approx(-1.7, abs=1.7 * (1.3 * eps) ** 2)


# --------------------------------------------------------------------------- torch potentials


def test_torch_confinement_matches_harmonic() -> None:
    x = _points(3, seed=4)
    user = TorchConfinement(lambda t: 0.5 * (t**2).sum(-1))
    ref = Harmonic()
    np.testing.assert_allclose(user.value(x), ref.value(x), rtol=1e-15)
    np.testing.assert_allclose(user.grad(x), ref.grad(x), rtol=1e-15)
    assert user.value(x).dtype == np.float64


def test_torch_confinement_matches_double_well() -> None:
    x = _points(2, seed=5)
    user = TorchConfinement(
        lambda t: 2.0 * (t[..., 0] ** 4 / 4 - t[..., 0] ** 2 / 2) + 0.5 * 0.5 * t[..., 1] ** 2
    )
    ref = DoubleWell(depth=2.0, stiffness=0.5)
    np.testing.assert_allclose(user.value(x), ref.value(x), rtol=1e-13)
    np.testing.assert_allclose(user.grad(x), ref.grad(x), rtol=1e-13, atol=1e-15)


def test_torch_interactions_match_analytic_classes() -> None:
    z = _points(2, seed=6)
    radial = TorchInteraction(lambda r: 1.3 * torch.exp(-(r**2) / (2 * 0.6**2)), radial=True)
    ref = GaussianCore(strength=1.3, range=0.6)
    np.testing.assert_allclose(radial.value(z), ref.value(z), rtol=1e-14)
    np.testing.assert_allclose(radial.grad(z), ref.grad(z), rtol=1e-13)
    coulomb = TorchInteraction(lambda r: 0.9 / torch.sqrt(r**2 + 0.2**2), radial=True)
    ref_c = SoftCoulomb(strength=0.9, softening=0.2)
    np.testing.assert_allclose(coulomb.grad(z), ref_c.grad(z), rtol=1e-13)
    full = TorchInteraction(lambda t: -0.35 * (t**2).sum(-1))
    ref_h = HarmonicInteraction(strength=-0.7)
    np.testing.assert_allclose(full.grad(z), ref_h.grad(z), rtol=1e-15)


def test_radial_torch_interaction_has_zero_gradient_at_origin() -> None:
    # W(r) = r is a cone (no derivative at 0): the radial wrapper gives value 0, gradient 0
    cone = TorchInteraction(lambda r: r, radial=True)
    z = np.zeros((2, 3))
    np.testing.assert_array_equal(cone.value(z), [0.0, 0.0])
    g = cone.grad(z)
    assert np.all(np.isfinite(g))
    np.testing.assert_array_equal(g, np.zeros((2, 3)))
    # away from 0, ∇|z| = z/|z| (closed form)
    np.testing.assert_allclose(cone.grad(np.array([3.0, 4.0, 0.0])), [0.6, 0.8, 0.0], rtol=1e-15)


def test_dotted_paths_resolve() -> None:
    x = _points(2, seed=7)
    for path in (f"{__name__}:quadratic_energy", f"{__name__}.quadratic_energy"):
        user = TorchConfinement(path)
        np.testing.assert_allclose(user.grad(x), x, rtol=1e-15)
        assert user.describe() == {"name": "torch", "fn": path}
    # torch.cosh as a radial potential: W = cosh|z|, ∇W = sinh|z| z/|z| (closed form)
    w = TorchInteraction("torch.cosh", radial=True)
    z = np.array([0.6, -0.8])
    assert w.value(z) == pytest.approx(np.cosh(1.0), rel=1e-15)
    np.testing.assert_allclose(w.grad(z), np.sinh(1.0) * z, rtol=1e-15)


@pytest.mark.parametrize(
    ("path", "message"),
    [
        ("no_such_package_xyz.mod:f", "cannot import module 'no_such_package_xyz.mod'"),
        ("math:no_such_function", "has no attribute 'no_such_function'"),
        ("math:pi", "is not callable"),
        ("quadratic", "must look like 'package.module:function'"),
        (3, "must be a callable or an import path"),
    ],
)
def test_bad_dotted_paths(path: object, message: str) -> None:
    with pytest.raises(InputError, match=message):
        TorchConfinement(path)  # type: ignore[arg-type]


def test_torch_user_function_mistakes() -> None:
    x = np.zeros((5, 2))
    with pytest.raises(InputError, match=r"must return shape \(5,\).*got \(5, 2\)"):
        TorchConfinement(lambda t: t).value(x)
    with pytest.raises(InputError, match="must return a torch tensor"):
        TorchConfinement(lambda t: np.sum(np.asarray(t.detach()), -1)).grad(x)
    with pytest.raises(InputError, match="raised RuntimeError"):
        TorchInteraction(lambda t: t @ torch.ones(7)).value(x)
    # a constant user potential has zero gradient (not an autograd error)
    np.testing.assert_array_equal(
        TorchConfinement(lambda t: torch.zeros(t.shape[:-1], dtype=t.dtype)).grad(x), 0.0
    )


# --------------------------------------------------------------------------- registries, checks


def test_registries_build_the_named_classes() -> None:
    u = confinement_from_name("double_well", depth=2.0)
    assert isinstance(u, DoubleWell) and u.depth == 2.0
    w = interaction_from_name("gaussian", strength=-1.0, range=0.3)
    assert w == GaussianCore(strength=-1.0, range=0.3)
    assert interaction_from_name("none").is_zero
    assert not any(type(i).is_zero for i in _interactions() if not isinstance(i, NoInteraction))


def test_registry_errors_list_valid_names_and_parameters() -> None:
    with pytest.raises(
        InputError, match="valid names are: double_well, harmonic, none, tilted_double_well"
    ):
        confinement_from_name("quartic")
    with pytest.raises(InputError, match="valid names are: coulomb, gaussian, harmonic, morse"):
        interaction_from_name("lennard_jones")
    with pytest.raises(InputError, match=r"no parameter.*sigma.*valid parameters are: strength"):
        interaction_from_name("gaussian", sigma=1.0)


@pytest.mark.parametrize(
    ("build", "message"),
    [
        (lambda: GaussianCore(range=0.0), "GaussianCore range must be > 0"),
        (lambda: Morse(width=-1.0), "Morse width must be > 0"),
        (lambda: Morse(softening=0.0), "Morse softening must be > 0"),
        (lambda: Morse(distance=-1.0), "Morse distance must be ≥ 0"),
        (lambda: SoftCoulomb(softening=-0.1), "SoftCoulomb softening must be > 0"),
        (lambda: Harmonic(stiffness=float("nan")), "Harmonic stiffness must be finite"),
        (lambda: DoubleWell(depth="deep"), "DoubleWell depth must be a number"),
        (lambda: TiltedDoubleWell(tilt=[1.0, 2.0]), "tilt must have at most 0 array dim"),
        (lambda: TorchInteraction(torch.exp, radial="yes"), "radial must be true or false"),
    ],
)
def test_parameter_validation(build: Callable[[], object], message: str) -> None:
    with pytest.raises(InputError, match=message):
        build()


def test_point_shape_errors() -> None:
    with pytest.raises(InputError, match=r"shape \(\.\.\., d\)"):
        Harmonic().value(np.float64(1.0))
    with pytest.raises(InputError, match="centre has 2 coordinates but the points have d = 3"):
        Harmonic(centre=[0.0, 1.0]).grad(np.zeros((4, 3)))


def test_describe_and_repr() -> None:
    assert Morse().describe() == {
        "name": "morse",
        "depth": 1.0,
        "width": 1.0,
        "distance": 1.0,
        "softening": 1e-3,
    }
    assert Harmonic(centre=[1, 2]).describe() == {
        "name": "harmonic",
        "stiffness": 1.0,
        "centre": [1.0, 2.0],
    }
    assert repr(TiltedDoubleWell()) == "TiltedDoubleWell(depth=1.0, tilt=0.1, stiffness=1.0)"
    assert repr(GaussianCore()) == "GaussianCore(strength=1.0, range=0.5)"
    assert "radial=True" in repr(TorchInteraction("torch.cosh", radial=True))


# --------------------------------------------------------------------------- Hydra configs


def _compose(group: str, stem: str):
    from tests.test_config import REQUIRED

    # options with required values (??? in conf/) get what a user must give
    required = REQUIRED.get(f"{group}={stem}", [])
    with initialize_config_dir(config_dir=str(CONF), version_base="1.3"):
        return compose(config_name=f"{group}/{stem}", overrides=required)


def _check_params_match(obj: Confinement | Interaction, node) -> None:
    raw = OmegaConf.to_container(node)
    raw.pop("_target_")
    described = obj.describe()
    for key, value in raw.items():
        assert described[key] == pytest.approx(value), key


@pytest.mark.parametrize("path", CONFINEMENT_FILES, ids=lambda p: p.stem)
def test_hydra_confinement_configs(path: Path) -> None:
    cfg = _compose("confinement", path.stem)
    u = instantiate(cfg.confinement)
    assert isinstance(u, Confinement)
    assert u.describe()["name"] == path.stem
    _check_params_match(u, cfg.confinement)
    for grid in (Grid(-3, 3, 16), Grid([-2, -2], [2, 2], [5, 6])):
        x = grid.points
        assert u.value(x).shape == grid.shape
        check_grad_by_finite_differences(u, x)


@pytest.mark.parametrize("path", INTERACTION_FILES, ids=lambda p: p.stem)
def test_hydra_interaction_configs(path: Path) -> None:
    cfg = _compose("interaction", path.stem)
    w = instantiate(cfg.interaction)
    assert isinstance(w, Interaction)
    assert w.is_zero == (path.stem == "none")
    _check_params_match(w, cfg.interaction)
    for grid in (Grid(-3, 3, 16), Grid([-2, -2], [2, 2], [5, 6])):
        z = grid.points
        np.testing.assert_allclose(w.value(-z), w.value(z), rtol=1e-14)
        check_grad_by_finite_differences(w, z)
