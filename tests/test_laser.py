"""Laser peak field conversions against hand calculations and numerical integration."""

import math

import numpy as np
import pytest
from scipy import constants as const
from scipy.integrate import quad

from designer import laser


def test_one_terawatt_per_cm2_in_vacuum():
    # Hand calculation (common practice, no source): |E| = sqrt(2 I / (eps0 c)) with
    # I = 1 TW/cm^2 = 1e16 W/m^2, eps0 c = 2.6544e-3 S  ->  sqrt(7.5346e18) = 2.745e9 V/m.
    assert laser.peak_field_from_intensity(1e16) == pytest.approx(2.745e9, rel=2e-4)


def test_field_in_medium_lower_by_sqrt_n():
    # I = (1/2) n eps0 c |E|^2 (Born & Wolf, Principles of Optics, ch. 1)
    n = 1.4533
    ratio = laser.peak_field_from_intensity(3e15, n) / laser.peak_field_from_intensity(3e15)
    assert ratio == pytest.approx(1 / math.sqrt(n), rel=1e-14)


def test_intensity_field_round_trip():
    for n in (1.0, 2.02):
        e = laser.peak_field_from_intensity(5.0e14, n)
        assert laser.intensity_from_peak_field(e, n) == pytest.approx(5.0e14, rel=1e-14)
    # complex amplitude: only its magnitude matters
    assert laser.intensity_from_peak_field(3e8 * 1j) == pytest.approx(
        laser.intensity_from_peak_field(3e8), rel=1e-15)


def test_gaussian_pulse_fluence_by_integration():
    # Independent check by numerical quadrature (scipy.integrate.quad): a Gaussian pulse
    # I(t) = I0 exp(-4 ln2 t^2 / tau^2) has intensity FWHM tau and integrates to F.
    fluence, tau = 250.0, 80e-15  # 25 mJ/cm^2, 80 fs
    i0 = laser.peak_intensity_from_fluence(fluence, tau)

    def shape(t):
        return i0 * math.exp(-4 * math.log(2) * t**2 / tau**2)

    assert shape(tau / 2) == pytest.approx(i0 / 2, rel=1e-14)
    integral, _ = quad(shape, -10 * tau, 10 * tau, points=[0.0])
    assert integral == pytest.approx(fluence, rel=1e-10)
    assert laser.fluence_from_peak_intensity(i0, tau) == pytest.approx(fluence, rel=1e-14)


def test_gaussian_spot_energy_by_integration():
    # F(r) = F0 exp(-2 r^2 / w^2) integrated over the plane gives the pulse energy
    # (scipy.integrate.quad as the independent reference).
    energy, w = 2e-6, 25e-6
    f0 = laser.peak_fluence_from_pulse_energy(energy, w)
    integral, _ = quad(lambda r: 2 * math.pi * r * f0 * math.exp(-2 * r**2 / w**2), 0, 10 * w)
    assert integral == pytest.approx(energy, rel=1e-10)
    assert laser.pulse_energy_from_peak_fluence(f0, w) == pytest.approx(energy, rel=1e-14)


def test_pulse_to_field_hand_calculation():
    # Hand calculation (common practice, no source): W = 1 uJ, w = 20 um, tau = 100 fs:
    # F0 = 2 W / (pi w^2) = 1591.55 J/m^2; I0 = 0.939437 F0 / tau = 1.49516e16 W/m^2;
    # |E| = sqrt(2 I0 / (eps0 c)) = sqrt(1.12655e19) = 3.3564e9 V/m.
    e = laser.peak_field_from_pulse_energy(1e-6, 100e-15, 20e-6)
    assert e == pytest.approx(3.3564e9, rel=2e-4)
    assert laser.pulse_energy_from_peak_field(e, 100e-15, 20e-6) == pytest.approx(1e-6, rel=1e-13)
    f = laser.fluence_from_peak_field(e, 100e-15)
    assert laser.peak_field_from_fluence(f, 100e-15) == pytest.approx(e, rel=1e-14)
    # inside glass the same pulse energy gives sqrt(n) less field
    e_glass = laser.peak_field_from_pulse_energy(1e-6, 100e-15, 20e-6, index=1.45)
    assert e_glass == pytest.approx(e / math.sqrt(1.45), rel=1e-14)


def test_photon_energy():
    # hc/e = 1239.84198 eV nm (CODATA 2018, exact-h SI; value from memory)
    assert laser.photon_energy_eV(800e-9) == pytest.approx(1239.84198 / 800, rel=1e-8)
    assert laser.photon_energy_J(800e-9) == pytest.approx(
        laser.photon_energy_eV(800e-9) * const.e, rel=1e-14)
    assert laser.angular_frequency(800e-9) * const.hbar == pytest.approx(
        laser.photon_energy_J(800e-9), rel=1e-14)


def test_array_input_and_bad_arguments():
    e = laser.peak_field_from_intensity(np.array([1e14, 4e14]))
    assert e[1] / e[0] == pytest.approx(2.0, rel=1e-14)
    with pytest.raises(ValueError):
        laser.peak_intensity_from_fluence(1.0, 0.0)
    with pytest.raises(ValueError):
        laser.peak_fluence_from_pulse_energy(1e-6, -1e-6)
    with pytest.raises(ValueError):
        laser.peak_field_from_intensity(1e14, index=0.0)
