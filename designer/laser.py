"""Laser peak field from intensity, fluence or pulse energy (pure functions, SI units).

Conventions (stated once, used everywhere):

* **Peak amplitude.**  The physical field is ``E(t) = Re[E exp(-i omega t)]`` and ``|E|``
  is its peak value, so the cycle-averaged intensity in a medium of (real) index n is
  ``I = (1/2) n eps0 c |E|^2``  (M. Born & E. Wolf, *Principles of Optics*, 7th ed.,
  1999, ch. 1; J. D. Jackson, *Classical Electrodynamics*, 3rd ed., 1999, ch. 7).
  Inside a medium the same intensity therefore needs a field smaller by ``sqrt(n)``.
* **Pulse duration** ``tau`` is the full width at half maximum (FWHM) of the
  *intensity*; the temporal shape is Gaussian, ``I(t) = I0 exp(-4 ln2 t^2 / tau^2)``,
  so the fluence is ``F = I0 tau sqrt(pi / (4 ln 2))`` and ``I0 = 2 sqrt(ln2/pi) F / tau``
  (common practice; A. E. Siegman, *Lasers*, 1986).
* **Spot size** ``w`` is the 1/e^2 *intensity* radius of a Gaussian beam,
  ``F(r) = F0 exp(-2 r^2 / w^2)``; the pulse energy is ``W = pi w^2 F0 / 2`` so the
  **peak** fluence is ``F0 = 2 W / (pi w^2)`` (common practice; Siegman, *Lasers*, 1986).

All intensities in W/m^2, fluences in J/m^2, energies in J, durations in s, lengths in m.
"""

from __future__ import annotations

import math

from scipy import constants as const

_EPS0 = const.epsilon_0
_C = const.c
# I0 = _TEMPORAL_PEAK * F / tau for a Gaussian pulse of intensity-FWHM tau.
_TEMPORAL_PEAK = 2.0 * math.sqrt(math.log(2.0) / math.pi)


def _positive(name, value):
    try:
        bad = not (value > 0)
    except TypeError:  # array input: check every element
        import numpy as np

        bad = not np.all(np.asarray(value) > 0)
    if bad:
        raise ValueError(f"{name} must be positive, got {value!r}")


# ----------------------------------------------------------------- intensity <-> field


def peak_field_from_intensity(intensity_W_per_m2, index: float = 1.0):
    """Peak field amplitude ``|E| = sqrt(2 I / (n eps0 c))`` (V/m) for intensity I in index n."""
    _positive("index", index)
    return (2.0 * intensity_W_per_m2 / (index * _EPS0 * _C)) ** 0.5


def intensity_from_peak_field(peak_field_V_per_m, index: float = 1.0):
    """Cycle-averaged intensity ``I = (1/2) n eps0 c |E|^2`` (W/m^2) of a peak field |E|."""
    _positive("index", index)
    return 0.5 * index * _EPS0 * _C * abs(peak_field_V_per_m) ** 2


# ---------------------------------------------------------- fluence <-> peak intensity


def peak_intensity_from_fluence(fluence_J_per_m2, duration_fwhm_s):
    """Peak intensity of a Gaussian pulse, ``I0 = 2 sqrt(ln2/pi) F / tau`` (W/m^2).

    ``tau`` is the FWHM of the intensity (see module docstring).
    """
    _positive("pulse duration", duration_fwhm_s)
    return _TEMPORAL_PEAK * fluence_J_per_m2 / duration_fwhm_s


def fluence_from_peak_intensity(peak_intensity_W_per_m2, duration_fwhm_s):
    """Fluence ``F = I0 tau / (2 sqrt(ln2/pi))`` (J/m^2) of a Gaussian pulse (inverse of above)."""
    _positive("pulse duration", duration_fwhm_s)
    return peak_intensity_W_per_m2 * duration_fwhm_s / _TEMPORAL_PEAK


# ------------------------------------------------------- pulse energy <-> peak fluence


def peak_fluence_from_pulse_energy(pulse_energy_J, spot_radius_m):
    """Peak (on-axis) fluence ``F0 = 2 W / (pi w^2)`` (J/m^2); w = 1/e^2 intensity radius."""
    _positive("spot radius", spot_radius_m)
    return 2.0 * pulse_energy_J / (math.pi * spot_radius_m**2)


def pulse_energy_from_peak_fluence(peak_fluence_J_per_m2, spot_radius_m):
    """Pulse energy ``W = pi w^2 F0 / 2`` (J) of a Gaussian spot (inverse of above)."""
    _positive("spot radius", spot_radius_m)
    return 0.5 * math.pi * spot_radius_m**2 * peak_fluence_J_per_m2


# --------------------------------------------------------------------- compositions


def peak_field_from_fluence(fluence_J_per_m2, duration_fwhm_s, index: float = 1.0):
    """Peak field (V/m) at the temporal peak of a Gaussian pulse of fluence F and FWHM tau."""
    return peak_field_from_intensity(
        peak_intensity_from_fluence(fluence_J_per_m2, duration_fwhm_s), index)


def fluence_from_peak_field(peak_field_V_per_m, duration_fwhm_s, index: float = 1.0):
    """Fluence (J/m^2) of a Gaussian pulse whose temporal-peak field amplitude is |E|."""
    return fluence_from_peak_intensity(
        intensity_from_peak_field(peak_field_V_per_m, index), duration_fwhm_s)


def peak_field_from_pulse_energy(pulse_energy_J, duration_fwhm_s, spot_radius_m,
                                 index: float = 1.0):
    """Peak field (V/m) at the centre of a Gaussian spot at the peak of a Gaussian pulse.

    ``|E| = sqrt(2 I0 / (n eps0 c))`` with ``I0 = 2 sqrt(ln2/pi) F0 / tau`` and
    ``F0 = 2 W / (pi w^2)``.
    """
    return peak_field_from_fluence(
        peak_fluence_from_pulse_energy(pulse_energy_J, spot_radius_m), duration_fwhm_s, index)


def pulse_energy_from_peak_field(peak_field_V_per_m, duration_fwhm_s, spot_radius_m,
                                 index: float = 1.0):
    """Pulse energy (J) giving peak field |E|; inverse of :func:`peak_field_from_pulse_energy`."""
    return pulse_energy_from_peak_fluence(
        fluence_from_peak_field(peak_field_V_per_m, duration_fwhm_s, index), spot_radius_m)


# ------------------------------------------------------------------------- photons


def angular_frequency(wavelength_m):
    """Angular frequency ``omega = 2 pi c / lambda`` (rad/s) for a vacuum wavelength (m)."""
    return 2.0 * math.pi * _C / wavelength_m


def photon_energy_J(wavelength_m):
    """Photon energy ``h c / lambda`` (J) for a vacuum wavelength (m)."""
    return const.h * _C / wavelength_m


def photon_energy_eV(wavelength_m):
    """Photon energy ``h c / (e lambda)`` (eV) for a vacuum wavelength (m)."""
    return const.h * _C / (const.e * wavelength_m)


# transform-limited Gaussian pulse: intensity FWHM in time x in frequency
# (A. E. Siegman, Lasers, 1986, ch. 9: 2 ln 2 / pi)
TIME_BANDWIDTH = 2.0 * math.log(2.0) / math.pi


def spectral_fwhm_m(wavelength_m, duration_fwhm_s):
    """Wavelength FWHM (m) of the power spectrum of a transform-limited Gaussian pulse of
    intensity FWHM ``duration_fwhm_s``: ``dlambda = TIME_BANDWIDTH lambda^2 / (c tau)``,
    TIME_BANDWIDTH = 2 ln2 / pi (Siegman, *Lasers*, 1986, ch. 9)."""
    return TIME_BANDWIDTH * wavelength_m**2 / (const.c * duration_fwhm_s)
