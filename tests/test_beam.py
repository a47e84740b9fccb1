"""Electron kinematics and phase-matching aids against closed forms and published values."""

import math

import numpy as np
import pytest
from scipy import constants as const

from designer import beam

KV = 1e3


# Values computed from the relativistic formulas with CODATA constants (scipy.constants):
# beta and de Broglie wavelength (pm).
@pytest.mark.parametrize(
    "voltage_kV, beta, wavelength_pm",
    [(30, 0.32838, 6.979), (100, 0.54822, 3.7014), (200, 0.69531, 2.5079),
     (300, 0.77653, 1.9687)],
)
def test_beta_and_wavelength_match_computed_table(voltage_kV, beta, wavelength_pm):
    e = beam.electron(voltage_kV * KV)
    assert e.beta == pytest.approx(beta, abs=0.5e-5)
    # the table rounds to 4-5 significant figures
    assert e.de_broglie_wavelength_m * 1e12 == pytest.approx(wavelength_pm, rel=1e-4)


# D. B. Williams & C. B. Carter, Transmission Electron Microscopy (Springer), Table 1.1:
# relativistic wavelength (nm) and speed (1e8 m/s) — values from memory.  The speeds in
# the table differ from CODATA-based ones by up to 9e-4 (relative), hence the tolerance.
@pytest.mark.parametrize(
    "voltage_kV, wavelength_nm, speed_1e8",
    [(100, 0.00370, 1.644), (200, 0.00251, 2.086), (300, 0.00197, 2.330)],
)
def test_williams_carter_table(voltage_kV, wavelength_nm, speed_1e8):
    e = beam.electron(voltage_kV * KV)
    assert e.de_broglie_wavelength_m * 1e9 == pytest.approx(wavelength_nm, abs=0.5e-5)
    assert e.velocity_m_per_s / 1e8 == pytest.approx(speed_1e8, rel=1e-3)


def test_nonrelativistic_limit_wavelength():
    # Classical lambda = h / sqrt(2 m e U) = 1.2264 nm / sqrt(U/V) (common practice,
    # e.g. Williams & Carter ch. 1; value from memory); the relativistic correction at
    # 1 V is ~1e-6.
    assert beam.de_broglie_wavelength(1.0) * 1e9 == pytest.approx(1.2264, rel=1e-4)
    assert beam.beta_from_voltage(1.0) == pytest.approx(
        math.sqrt(2 * const.e / const.m_e) / const.c, rel=1e-5)


def test_electron_is_self_consistent():
    # momentum from energy-momentum relation vs gamma m v and h / lambda (closed form)
    e = beam.electron(200 * KV)
    assert e.momentum_kg_m_per_s == pytest.approx(e.gamma * const.m_e * e.velocity_m_per_s,
                                                  rel=1e-12)
    assert e.momentum_kg_m_per_s == pytest.approx(const.h / e.de_broglie_wavelength_m, rel=1e-12)
    assert e.kinetic_energy_eV == pytest.approx(200e3, rel=1e-15)
    assert e.total_energy_J - e.kinetic_energy_J == pytest.approx(const.m_e * const.c**2,
                                                                   rel=1e-12)
    assert beam.voltage_from_beta(e.beta) == pytest.approx(200e3, rel=1e-9)


@pytest.mark.parametrize("bad", [0.0, -5.0, float("nan"), float("inf")])
def test_electron_rejects_bad_voltage(bad):
    with pytest.raises(ValueError):
        beam.electron(bad)


def test_synchronous_period():
    # computed from the formula with CODATA constants: 28 kV, 800 nm, third spatial
    # harmonic -> 763.5 nm
    b = beam.beta_from_voltage(28 * KV)
    assert beam.synchronous_period(b, 800e-9, order=3) * 1e9 == pytest.approx(763.5, abs=0.05)
    with pytest.raises(ValueError):
        beam.synchronous_period(b, 800e-9, order=0)


def test_synchronous_period_matches_electron_wavenumber():
    # Closed-form requirement: the m-th harmonic 2 pi m / Lambda equals omega / v.
    e = beam.electron(60 * KV)
    lam = 1.55e-6
    period = beam.synchronous_period(e.beta, lam, order=2)
    omega = 2 * math.pi * const.c / lam
    assert 2 * math.pi * 2 / period == pytest.approx(e.wavenumber(omega), rel=1e-12)


@pytest.mark.parametrize("voltage_kV, decay_nm", [(30, 44.3), (100, 83.5), (200, 123.2)])
def test_evanescent_decay_length(voltage_kV, decay_nm):
    # computed from the formula with CODATA constants, at 800 nm
    b = beam.beta_from_voltage(voltage_kV * KV)
    assert beam.evanescent_decay_length(b, 800e-9) * 1e9 == pytest.approx(decay_nm, abs=0.05)


def test_evanescent_decay_from_dispersion_relation():
    # Independent route: k_z = sqrt(k0^2 - kx^2) for kx = omega/v is imaginary; decay 1/Im k_z.
    b, lam = 0.5, 1.0e-6
    k0 = 2 * math.pi / lam
    kz = np.emath.sqrt(k0**2 - (k0 / b) ** 2)
    assert beam.evanescent_decay_length(b, lam) == pytest.approx(1 / kz.imag, rel=1e-12)


def test_smith_purcell():
    # S. J. Smith & E. M. Purcell, Phys. Rev. 92, 1069 (1953); computed from the formula
    # with CODATA constants:
    # 30 kV, period 500 nm, observed at 90 deg -> 1522.6 nm
    b = beam.beta_from_voltage(30 * KV)
    lam = beam.smith_purcell_wavelength(500e-9, b, math.radians(90))
    assert lam * 1e9 == pytest.approx(1522.6, abs=0.05)


def test_smith_purcell_is_grating_equation():
    # Closed form: emitted wave's wavenumber along the grating k0 cos(theta) equals the
    # electron harmonic omega/v - 2 pi m / Lambda.
    b, period, theta, m = 0.4, 300e-9, math.radians(40), 2
    lam = beam.smith_purcell_wavelength(period, b, theta, order=m)
    k0 = 2 * math.pi / lam
    assert k0 * math.cos(theta) == pytest.approx(k0 / b - 2 * math.pi * m / period, rel=1e-12)


def test_cherenkov_angle_silicon_nitride():
    # computed from the formula with CODATA constants: n = 2.0244 (Si3N4 at 800 nm),
    # 200 kV -> 44.72 deg.
    # Recomputed here by hand from arccos(1/(n beta)) with beta = 0.695314: 44.7299 deg,
    # i.e. 44.73 when rounded (a rounded value quoted elsewhere), hence the 0.01 deg tolerance.
    b = beam.beta_from_voltage(200 * KV)
    theta = beam.cherenkov_angle(2.0244, b)
    assert math.degrees(theta) == pytest.approx(44.72, abs=0.01)
    inc = beam.phase_matching_incidence_angle(2.0244, b)
    assert math.degrees(inc) == pytest.approx(90 - 44.72, abs=0.01)
    # synchronism: tangential wavenumber n k0 sin(inc) = omega / v  (closed form)
    assert 2.0244 * math.sin(inc) == pytest.approx(1 / b, rel=1e-12)


def test_cherenkov_impossible_raises_clear_error():
    b = beam.beta_from_voltage(30 * KV)  # 0.328: needs n > 3.045
    with pytest.raises(beam.PhaseMatchingError) as info:
        beam.cherenkov_angle(1.45, b)
    msg = str(info.value)
    assert "1.45" in msg and "0.328" in msg and "3.045" in msg
    assert isinstance(info.value, ValueError)
    with pytest.raises(beam.PhaseMatchingError):
        beam.phase_matching_incidence_angle(1 / b, b)  # n beta == 1 exactly


def test_functions_broadcast_over_arrays():
    u = np.array([30e3, 100e3, 200e3])
    b = beam.beta_from_voltage(u)
    assert b.shape == (3,)
    assert np.allclose(b, [beam.electron(x).beta for x in u], rtol=1e-14)


def test_jax_gradient_of_period_with_voltage():
    jax = pytest.importorskip("jax")
    jax.config.update("jax_enable_x64", True)

    def period(u):
        return beam.synchronous_period(beam.beta_from_voltage(u), 800e-9)

    u0, h = 30e3, 1.0
    grad = jax.grad(period)(u0)
    fd = (period(u0 + h) - period(u0 - h)) / (2 * h)  # central difference (numpy path)
    assert float(grad) == pytest.approx(fd, rel=1e-6)
    # and Smith-Purcell wavelength with respect to angle (uses jnp.cos)
    d_sp = jax.grad(lambda th: beam.smith_purcell_wavelength(500e-9, 0.3, th))(1.0)
    assert float(d_sp) == pytest.approx(500e-9 * math.sin(1.0), rel=1e-12)
