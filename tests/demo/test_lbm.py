"""Checks of the lattice-Boltzmann kernels against exact properties and analytic solutions."""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.demo.lbm import (
    OPPOSITE,
    VELOCITIES,
    WEIGHTS,
    LatticeFlow,
    channel_walls,
    collide,
    collide_scalar,
    equilibrium,
    moments,
    scalar_equilibrium,
    stream,
)
from snaplift.errors import ConfigError


def _random_populations(rng: np.random.Generator, shape=(6, 7)) -> np.ndarray:
    return WEIGHTS[:, None, None] * (1.0 + 0.2 * rng.standard_normal((9, *shape)))


def test_lattice_tables_are_consistent():
    # D2Q9 weights sum to 1 and give c_s^2 = 1/3 (Qian, d'Humieres, Lallemand 1992).
    assert WEIGHTS.sum() == pytest.approx(1.0, abs=1e-15)
    second = np.einsum("i,ia,ib->ab", WEIGHTS, VELOCITIES, VELOCITIES)
    np.testing.assert_allclose(second, np.eye(2) / 3.0, atol=1e-15)
    np.testing.assert_array_equal(VELOCITIES[OPPOSITE], -VELOCITIES)


def test_equilibrium_moments():
    # Exact moments of the second-order equilibrium: rho, rho u, rho (I/3 + u u)
    # (Qian, d'Humieres, Lallemand 1992).
    rng = np.random.default_rng(1)
    rho = 1.0 + 0.1 * rng.standard_normal((4, 5))
    ux, uy = 0.1 * rng.standard_normal((2, 4, 5))
    feq = equilibrium(rho, ux, uy)
    c = VELOCITIES.astype(float)
    np.testing.assert_allclose(feq.sum(axis=0), rho, rtol=1e-13)
    np.testing.assert_allclose(np.einsum("ia,ixy->axy", c, feq), [rho * ux, rho * uy], atol=1e-14)
    flux = np.einsum("ia,ib,ixy->abxy", c, c, feq)
    u = np.stack([ux, uy])
    expected = rho * (np.eye(2)[:, :, None, None] / 3.0 + u[:, None] * u[None, :])
    np.testing.assert_allclose(flux, expected, atol=1e-14)


@pytest.mark.parametrize("magic", [None, 3.0 / 16.0], ids=["bgk", "trt"])
def test_collision_conserves_mass_and_momentum(magic):
    # The BGK and TRT operators conserve mass and momentum exactly (Qian et al. 1992;
    # Ginzburg, Verhaeghe, d'Humieres 2008): only round-off may change the sums.
    rng = np.random.default_rng(2)
    f = _random_populations(rng)
    rho, ux, uy = moments(f)
    post = collide(f, rho, ux, uy, 0.62, magic=magic)
    c = VELOCITIES.astype(float)
    np.testing.assert_allclose(post.sum(axis=0), f.sum(axis=0), rtol=0, atol=1e-12)
    np.testing.assert_allclose(
        np.einsum("ia,ixy->axy", c, post), np.einsum("ia,ixy->axy", c, f), rtol=0, atol=1e-12
    )
    assert not np.allclose(post, f)  # the operator did something


def test_forced_collision_adds_exactly_the_force():
    # Guo, Zheng, Shi (2002): with u = (sum f c + F/2) / rho the forced collision adds
    # exactly F to the momentum per step and leaves the mass unchanged.
    rng = np.random.default_rng(3)
    f = _random_populations(rng)
    force = (2e-4, -1e-4)
    rho, ux, uy = moments(f, force)
    post = collide(f, rho, ux, uy, 0.7, force=force)
    c = VELOCITIES.astype(float)
    gained = np.einsum("ia,ixy->axy", c, post - f)
    np.testing.assert_allclose(gained[0], force[0], rtol=0, atol=1e-12)
    np.testing.assert_allclose(gained[1], force[1], rtol=0, atol=1e-12)
    np.testing.assert_allclose(post.sum(axis=0), f.sum(axis=0), rtol=0, atol=1e-12)


def test_stream_matches_numpy_roll():
    # Reference: numpy.roll, one periodic shift per lattice direction.
    rng = np.random.default_rng(4)
    f = rng.standard_normal((9, 5, 7))
    expected = np.stack(
        [np.roll(f[i], (cy, cx), axis=(0, 1)) for i, (cx, cy) in enumerate(VELOCITIES)]
    )
    np.testing.assert_array_equal(stream(f), expected)


@pytest.mark.parametrize(
    ("magic", "tolerance"),
    [(None, 0.01), (3.0 / 16.0, 1e-6)],
    ids=["bgk", "trt-magic"],
)
def test_poiseuille_profile(magic, tolerance):
    # Plane Poiseuille flow driven by a body force G between walls at y=0 and y=H:
    # u(y) = G / (2 nu) * y (H - y) (White, Fluid Mechanics, section 6.x on laminar duct
    # flow; any fluids handbook). Half-way bounce-back puts the walls half a cell beyond
    # the first/last fluid rows. BGK is second-order accurate (within 1 %); TRT with
    # magic 3/16 is exact for this flow (Ginzburg, Verhaeghe, d'Humieres 2008).
    height, viscosity, gravity = 20, 0.1, 1e-4
    flow = LatticeFlow(
        channel_walls(height, 4), viscosity=viscosity, force=(gravity, 0.0), magic=magic
    )
    flow.step(8000)
    ux, uy = flow.velocity()
    y = np.arange(height) + 0.5
    analytic = gravity / (2 * viscosity) * y * (height - y)
    relative = np.abs(ux[1:-1] - analytic[:, None]).max() / analytic.max()
    assert relative < tolerance
    assert np.abs(uy).max() < 1e-12


def _periodic_scalar(theta: np.ndarray, diffusivity: float, ux: float = 0.0) -> LatticeFlow:
    solid = np.zeros(theta.shape, dtype=bool)
    flow = LatticeFlow(solid, viscosity=0.1, diffusivity=diffusivity)
    flow.initialise(np.full(theta.shape, ux), np.zeros(theta.shape), theta=theta)
    return flow


def test_scalar_collision_conserves_scalar():
    # The scalar collision conserves sum(g) exactly (Krueger et al. 2017, chapter 8).
    rng = np.random.default_rng(5)
    g = rng.random((5, 4, 6))
    ux, uy = 0.05 * rng.standard_normal((2, 4, 6))
    post, theta = collide_scalar(g, ux, uy, 0.6)
    np.testing.assert_allclose(post.sum(axis=0), g.sum(axis=0), rtol=0, atol=1e-13)
    np.testing.assert_allclose(scalar_equilibrium(theta, ux, uy).sum(axis=0), theta, rtol=1e-14)


@pytest.mark.parametrize("ux", [0.0, 0.05], ids=["diffusion", "advection-diffusion"])
def test_sine_profile_decays_with_lattice_diffusivity(ux):
    # theta = 1 + A sin(k (x - u t)) exp(-D k^2 t) solves the advection-diffusion equation
    # (Carslaw & Jaeger, Conduction of Heat in Solids, 1959) with D = (tau_g - 1/2) / 3.
    # With the linear D2Q5 equilibrium the effective diffusivity carries an O(u^2)
    # error, hence "a few %" (common practice).
    nx, tau, steps, amplitude = 64, 0.8, 600, 0.1
    diffusivity = (tau - 0.5) / 3.0
    k = 2 * np.pi / nx
    x = np.arange(nx)
    theta0 = 1.0 + amplitude * np.sin(k * x)[None, :].repeat(2, axis=0)
    flow = _periodic_scalar(theta0, diffusivity, ux)
    flow.step(steps)
    theta = flow.scalar()[0]
    coefficient = np.fft.rfft(theta - theta.mean())[1] * 2 / nx
    measured_amplitude = abs(coefficient)
    expected_amplitude = amplitude * np.exp(-diffusivity * k**2 * steps)
    assert measured_amplitude == pytest.approx(expected_amplitude, rel=0.03)
    # sin(k(x - ut)) has Fourier phase -pi/2 - k u t
    expected_phase = -np.pi / 2 - k * ux * steps
    assert np.angle(coefficient * np.exp(-1j * expected_phase)) == pytest.approx(0.0, abs=0.02)
    assert theta.mean() == pytest.approx(1.0, abs=1e-12)  # scalar is conserved


def test_fixed_wall_and_adiabatic_wall_conduction():
    # Slab 0 < y < H, insulated at y=0, held at 1 at y=H, initially 0 (Carslaw & Jaeger
    # 1959, section 3.3): theta = 1 - sum_n 4 (-1)^n / ((2n+1) pi) cos(l_n y)
    # exp(-D l_n^2 t), l_n = (2n+1) pi / (2H). Checks anti-bounce-back (fixed value)
    # and bounce-back (zero flux) half-way wall positions.
    height, tau, steps = 24, 0.9, 700
    diffusivity = (tau - 0.5) / 3.0
    solid = channel_walls(height, 3)
    hot = np.zeros_like(solid)
    hot[-1] = True
    flow = LatticeFlow(solid, viscosity=0.1, diffusivity=diffusivity, fixed_scalar=hot)
    flow.step(steps)
    theta = flow.scalar()[1:-1, 0]
    y = np.arange(height) + 0.5
    n = np.arange(200)[:, None]
    wavenumber = (2 * n + 1) * np.pi / (2 * height)
    series = 4 * (-1.0) ** n / ((2 * n + 1) * np.pi) * np.cos(wavenumber * y)
    analytic = 1.0 - (series * np.exp(-diffusivity * wavenumber**2 * steps)).sum(axis=0)
    assert 0.2 < analytic.mean() < 0.8  # a time where the profile is far from both states
    np.testing.assert_allclose(theta, analytic, atol=0.01)
    assert np.isnan(flow.scalar()[0]).all()  # adiabatic solid cells carry no value
    assert (flow.scalar()[-1] == 1.0).all()


def test_bounce_back_conserves_mass_and_heat_in_a_closed_box():
    # Half-way bounce-back returns every population that hits a wall, so a closed box
    # keeps its mass exactly, and adiabatic walls keep its heat (Krueger et al. 2017,
    # section 5.3).
    rng = np.random.default_rng(6)
    solid = np.zeros((16, 20), dtype=bool)
    solid[[0, -1], :] = True
    solid[:, [0, -1]] = True
    solid[6:10, 8:11] = True  # an obstacle inside
    flow = LatticeFlow(solid, viscosity=0.05, diffusivity=0.05)
    ux, uy = 0.05 * rng.standard_normal((2, *solid.shape))
    theta = 1.0 + 0.3 * rng.random(solid.shape)
    flow.initialise(ux, uy, theta=theta)
    fluid = ~solid
    mass0 = flow.density()[fluid].sum()
    heat0 = flow.scalar()[fluid].sum()
    flow.step(300)
    assert flow.density()[fluid].sum() == pytest.approx(mass0, rel=1e-12)
    assert flow.scalar()[fluid].sum() == pytest.approx(heat0, rel=1e-12)
    assert np.abs(flow.velocity()[0]).max() < 0.05  # motion decays, nothing blew up


def test_inlet_and_outflow_carry_the_imposed_flux():
    # A duct with a parabolic inlet and no obstacle must carry the same mass flux
    # sum(rho u) through every cross-section once steady (continuity; the scheme
    # conserves mass exactly), and the developed profile stays the Poiseuille parabola
    # (White, Fluid Mechanics). Densities at the inlet and outlet columns are
    # extrapolated or imposed, so their node fluxes may differ by 0.5 % (common practice).
    height, length, speed = 16, 60, 0.05
    y = np.arange(height) + 0.5
    profile = np.zeros(height + 2)
    profile[1:-1] = 6 * speed * y * (height - y) / height**2
    flow = LatticeFlow(channel_walls(height, length), viscosity=0.1, inlet_velocity=profile)
    solid = flow.solid
    flow.initialise(np.where(solid, 0.0, profile[:, None]), np.zeros(solid.shape))
    flow.step(4000)
    ux, _ = flow.velocity()
    mass_flux = (flow.density() * ux).sum(axis=0)
    interior = mass_flux[1:-1]
    np.testing.assert_allclose(interior, interior.mean(), rtol=1e-4)
    np.testing.assert_allclose(mass_flux[[0, -1]], interior.mean(), rtol=0.005)
    middle = ux[1:-1, length // 2]
    np.testing.assert_allclose(middle / middle.max(), profile[1:-1] / profile.max(), atol=0.01)


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"solid": np.zeros(5, bool), "viscosity": 0.1}, "2-D"),
        ({"solid": np.zeros((4, 5), bool), "viscosity": 0.0}, "viscosity"),
        ({"solid": np.zeros((4, 5), bool), "viscosity": 0.1, "diffusivity": -1.0}, "diffusivity"),
    ],
)
def test_bad_lattice_settings_are_rejected(options, message):
    with pytest.raises(ConfigError, match=message):
        LatticeFlow(**options)
