"""Electron kinematics and phase-matching aids (pure functions, SI units).

Every constant is CODATA via :mod:`scipy.constants`.  The functions accept Python
floats, NumPy arrays or JAX arrays; with JAX input they stay traceable (so a
voltage- or wavelength-dependent objective can be differentiated).

Formulas (standard special relativity, e.g. J. D. Jackson, *Classical
Electrodynamics*, 3rd ed., 1999, ch. 11-12):

* ``gamma = 1 + e U / (m_e c^2)``, ``beta = sqrt(1 - 1/gamma^2)``, ``v = beta c``
* kinetic energy ``T = e U``; momentum ``p = gamma m_e v = sqrt(T^2 + 2 T m_e c^2) / c``
* de Broglie wavelength ``lambda_e = h / p = h / sqrt(2 m_e e U (1 + e U / (2 m_e c^2)))``
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import constants as const

_E = const.e
_ME = const.m_e
_C = const.c
_H = const.h
_REST_ENERGY_J = _ME * _C**2


class PhaseMatchingError(ValueError):
    """The requested phase matching is impossible (e.g. ``n beta <= 1``)."""


def _xp(x):
    """Array namespace for ``x``: jax.numpy for JAX values, NumPy otherwise."""
    if type(x).__module__.startswith("jax"):
        import jax.numpy as jnp

        return jnp
    return np


def _scalar_or_array(x):
    """Plain float for 0-d NumPy results; arrays (NumPy or JAX) unchanged."""
    if isinstance(x, np.ndarray) and x.ndim == 0:
        return float(x)
    if isinstance(x, np.floating):
        return float(x)
    return x


# --------------------------------------------------------------------------- kinematics


def lorentz_factor(voltage_V):
    """Lorentz factor ``gamma = 1 + e U / (m_e c^2)`` of an electron accelerated by ``U`` volts."""
    return 1.0 + _E * voltage_V / _REST_ENERGY_J


def beta_from_voltage(voltage_V):
    """Speed over c, ``beta = sqrt(1 - 1/gamma^2)``, for an accelerating voltage ``U`` (V)."""
    gamma = lorentz_factor(voltage_V)
    return (1.0 - 1.0 / gamma**2) ** 0.5


def voltage_from_beta(beta):
    """Inverse of :func:`beta_from_voltage`: ``U = (gamma - 1) m_e c^2 / e`` (V)."""
    gamma = 1.0 / (1.0 - beta**2) ** 0.5
    return (gamma - 1.0) * _REST_ENERGY_J / _E


def gamma_from_beta(beta):
    """``gamma = 1 / sqrt(1 - beta^2)``."""
    return 1.0 / (1.0 - beta**2) ** 0.5


def de_broglie_wavelength(voltage_V):
    """Relativistic de Broglie wavelength (m).

    ``lambda_e = h / sqrt(2 m_e e U (1 + e U / (2 m_e c^2)))``
    (e.g. D. B. Williams & C. B. Carter, *Transmission Electron Microscopy*, ch. 1).
    """
    relativistic = 1.0 + _E * voltage_V / (2.0 * _REST_ENERGY_J)
    return _H / (2.0 * _ME * _E * voltage_V * relativistic) ** 0.5


@dataclass(frozen=True)
class Electron:
    """Kinematics of an electron accelerated from rest through ``voltage_V`` volts (SI)."""

    voltage_V: float
    gamma: float
    beta: float
    velocity_m_per_s: float
    kinetic_energy_J: float
    momentum_kg_m_per_s: float
    de_broglie_wavelength_m: float

    @property
    def kinetic_energy_eV(self) -> float:
        return self.kinetic_energy_J / _E

    @property
    def total_energy_J(self) -> float:
        return self.gamma * _REST_ENERGY_J

    def wavenumber(self, angular_frequency_rad_per_s: float) -> float:
        """Electron phase wavenumber ``omega / v`` (rad/m) that a co-moving field must match."""
        return angular_frequency_rad_per_s / self.velocity_m_per_s


def electron(voltage_V: float) -> Electron:
    """Build an :class:`Electron` from the accelerating voltage (V, must be > 0)."""
    voltage_V = float(voltage_V)
    if not (voltage_V > 0.0 and math.isfinite(voltage_V)):
        raise ValueError(f"accelerating voltage must be a positive finite number of volts, "
                         f"got {voltage_V!r}")
    gamma = float(lorentz_factor(voltage_V))
    beta = float(beta_from_voltage(voltage_V))
    kinetic = _E * voltage_V
    momentum = math.sqrt(kinetic**2 + 2.0 * kinetic * _REST_ENERGY_J) / _C
    return Electron(
        voltage_V=voltage_V,
        gamma=gamma,
        beta=beta,
        velocity_m_per_s=beta * _C,
        kinetic_energy_J=kinetic,
        momentum_kg_m_per_s=momentum,
        de_broglie_wavelength_m=float(de_broglie_wavelength(voltage_V)),
    )


# ----------------------------------------------------------------------- phase matching


def synchronous_period(beta, wavelength_m, order: int = 1):
    """Grating period phase-matched to the electron, ``Lambda = m beta lambda`` (m).

    A grating of period Lambda lit at normal incidence has spatial harmonics
    ``k_x = 2 pi m / Lambda``; the m-th one travels with the electron when
    ``k_x = omega / v``, i.e. ``Lambda = m beta lambda`` (the synchronicity condition of
    dielectric laser acceleration; e.g. R. J. England et al., Rev. Mod. Phys. 86, 1337, 2014).
    """
    if order < 1:
        raise ValueError(f"spatial harmonic order must be >= 1, got {order}")
    return order * beta * wavelength_m


def evanescent_decay_length(beta, wavelength_m):
    """1/e decay length of the field component synchronous with the electron (m).

    A wave with ``k_x = omega/v`` in vacuum has ``kappa = sqrt(k_x^2 - k0^2) = k0/(beta gamma)``,
    so ``1/kappa = beta gamma lambda / (2 pi)`` — the same for every spatial harmonic.
    """
    gamma = gamma_from_beta(beta)
    return beta * gamma * wavelength_m / (2.0 * math.pi)


def _check_cherenkov(n, beta):
    n_beta = n * beta
    if np.any(np.asarray(n_beta) <= 1.0):
        raise PhaseMatchingError(
            f"no phase matching: n*beta = {np.asarray(n_beta)} <= 1 for n = {np.asarray(n)}, "
            f"beta = {np.asarray(beta)}; the medium needs a refractive index above "
            f"1/beta = {np.asarray(1.0 / beta)}"
        )


def cherenkov_angle(n, beta):
    """Phase-matching (Cherenkov) angle from the electron direction (rad): ``cos th = 1/(n beta)``.

    A plane wave in a medium of index n whose wavevector makes this angle with the
    electron velocity has a phase velocity along the path equal to v.
    Raises :class:`PhaseMatchingError` when ``n beta <= 1``.
    (P. A. Cherenkov, Dokl. Akad. Nauk SSSR 2, 451, 1934; I. Frank & I. Tamm, 1937.)
    Not JAX-traceable (it checks its arguments).
    """
    _check_cherenkov(n, beta)
    return _scalar_or_array(np.arccos(1.0 / (np.asarray(n) * np.asarray(beta))))


def phase_matching_incidence_angle(n, beta):
    """Incidence angle from the surface normal (rad) that phase-matches a wave to an electron.

    For an electron moving parallel to a flat surface of a medium of index n, a wave
    in the medium at angle ``theta_inc`` from the normal has tangential wavenumber
    ``n k0 sin theta_inc``; matching ``omega / v`` gives ``sin theta_inc = 1/(n beta)``
    (complement of :func:`cherenkov_angle`).  Above the critical angle of the
    surface, so the wave is totally reflected and the synchronous field is evanescent.
    """
    _check_cherenkov(n, beta)
    return _scalar_or_array(np.arcsin(1.0 / (np.asarray(n) * np.asarray(beta))))


def smith_purcell_wavelength(period_m, beta, angle_rad, order: int = 1):
    """Smith–Purcell emission wavelength ``lambda = (Lambda/m)(1/beta - cos theta)`` (m).

    ``theta`` is the observation angle measured from the electron direction
    (S. J. Smith & E. M. Purcell, Phys. Rev. 92, 1069, 1953).
    """
    if order < 1:
        raise ValueError(f"emission order must be >= 1, got {order}")
    xp = _xp(angle_rad)
    return (period_m / order) * (1.0 / beta - xp.cos(angle_rad))
