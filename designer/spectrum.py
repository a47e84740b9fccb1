"""Electron energy spectrum after the interaction (PINEM sidebands).

An electron that crosses a field with coupling constant beta_c leaves in a superposition
of energy states ``E0 + l hbar w`` with probabilities

    P_l = J_l(2 |beta_c|)^2                                  (l = ..., -1, 0, 1, ...)

(F. J. Garcia de Abajo, A. Asenjo-Garcia, M. Kociak, Nano Lett. 10, 1859, 2010;
S. T. Park, M. Lin, A. H. Zewail, New J. Phys. 12, 123028, 2010).  The energy axis is
the electron's energy *change*, ``l hbar w`` in eV, gain positive.

Incoherent averages (electrons at different positions or times do not interfere):

* across the electron spot: samples of |beta_c| with weights (e.g. from
  :func:`solvers.coupling.spot_average`'s positions);
* over the pulses: the laser *intensity* envelope has FWHM ``tau_laser``, so the
  field and |beta_c| follow ``|beta_c|(t) = |beta_c|_peak exp(-2 ln2 t^2 / tau_laser^2)``
  (the field FWHM is sqrt(2) tau_laser); the electron current is
  ``exp(-4 ln2 (t - delay)^2 / tau_electron^2)`` (tau_electron its FWHM), which gives
  the weights.

The measured spectrum is the line spectrum convolved with the zero-loss-peak shape,
here a unit-area Gaussian of given FWHM.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import constants as sc
from scipy import special

LN2 = np.log(2.0)


@dataclass(frozen=True)
class LineSpectrum:
    """Discrete sideband lines: orders l, energy changes l hbar w (eV), probabilities."""

    orders: np.ndarray
    energy_eV: np.ndarray
    probability: np.ndarray


def photon_energy_eV(omega):
    """hbar w in eV."""
    return sc.hbar * omega / sc.e


def default_max_order(beta_abs_max):
    """Orders beyond ``2|beta| + 8 + 4 (2|beta|)^(1/3)`` carry < ~1e-12 probability
    (J_l(x) decays faster than exponentially for l > x + O(x^(1/3)); M. Abramowitz &
    I. A. Stegun, Handbook of Mathematical Functions, 9.3)."""
    x = 2.0 * float(beta_abs_max)
    return int(np.ceil(x + 8.0 + 4.0 * np.cbrt(x)))


def sideband_probabilities(beta_abs, weights=None, max_order=None):
    """Incoherently averaged sideband probabilities ``P_l = <J_l(2|beta|)^2>``.

    Args:
      beta_abs: |beta_c| (scalar or samples, any shape).
      weights: optional weights of the samples (same shape); normalized here.
      max_order: largest |l| kept (default :func:`default_max_order`).

    Returns ``(orders, P)`` with orders ``-L..L``.
    """
    b = np.abs(np.atleast_1d(np.asarray(beta_abs, dtype=complex))).ravel()
    w = np.ones_like(b) if weights is None else np.asarray(weights, dtype=float).ravel()
    if w.shape != b.shape:
        raise ValueError("weights must have the shape of beta_abs")
    if not np.all(w >= 0) or w.sum() <= 0:
        raise ValueError("weights must be non-negative and not all zero")
    w = w / w.sum()
    lmax = default_max_order(b.max()) if max_order is None else int(max_order)
    orders = np.arange(-lmax, lmax + 1)
    p = (special.jv(orders[:, None], 2.0 * b[None, :]) ** 2) @ w
    return orders, p


def line_spectrum(beta_abs, omega, weights=None, max_order=None) -> LineSpectrum:
    """:func:`sideband_probabilities` with the energy axis ``l hbar w`` (eV)."""
    orders, p = sideband_probabilities(beta_abs, weights, max_order)
    return LineSpectrum(orders, orders * photon_energy_eV(omega), p)


def pulse_samples(tau_laser, tau_electron, delay=0.0, n=81):
    """Relative field envelope and electron weights on a time grid.

    Returns ``(envelope, weights)``: ``envelope = exp(-2 ln2 t^2/tau_laser^2)`` (field,
    for an intensity FWHM tau_laser) at times covering the electron pulse
    ``exp(-4 ln2 (t - delay)^2/tau_electron^2)`` to +-3 FWHM; weights sum to 1.
    """
    t = delay + np.linspace(-3.0, 3.0, n) * tau_electron
    weights = np.exp(-4.0 * LN2 * (t - delay) ** 2 / tau_electron**2)
    envelope = np.exp(-2.0 * LN2 * t**2 / tau_laser**2)
    return envelope, weights / weights.sum()


def averaged_line_spectrum(beta_abs_samples, omega, spot_weights=None, tau_laser=None,
                           tau_electron=None, delay=0.0, n_time=81,
                           max_order=None) -> LineSpectrum:
    """Line spectrum averaged over the electron spot and, optionally, the pulses.

    ``beta_abs_samples`` are peak |beta_c| at positions across the spot with
    ``spot_weights``; with ``tau_laser`` and ``tau_electron`` (s) every sample is also
    scaled by the laser envelope at the electron's arrival times (see module docstring).
    """
    b = np.abs(np.atleast_1d(np.asarray(beta_abs_samples, dtype=complex))).ravel()
    w = np.ones_like(b) if spot_weights is None else np.asarray(spot_weights, float).ravel()
    if (tau_laser is None) != (tau_electron is None):
        raise ValueError("give both tau_laser and tau_electron, or neither")
    if tau_laser is not None:
        env, wt = pulse_samples(tau_laser, tau_electron, delay, n_time)
        b = (b[:, None] * env[None, :]).ravel()
        w = (w[:, None] * wt[None, :]).ravel()
    return line_spectrum(b, omega, w, max_order)


def broadened_spectrum(lines: LineSpectrum, fwhm_eV, energy_eV=None, n_points=2001):
    """Lines convolved with a unit-area Gaussian zero-loss peak of FWHM ``fwhm_eV``.

    ``density(E) = sum_l P_l g(E - l hbar w)``, ``g(E) = exp(-4 ln2 E^2/F^2) sqrt(4 ln2/pi)/F``
    (1/eV).  The default energy axis spans the lines +- 4 FWHM.

    Returns ``(energy_eV, density_per_eV)``.
    """
    if fwhm_eV <= 0:
        raise ValueError("fwhm_eV must be positive")
    if energy_eV is None:
        lo = lines.energy_eV.min() - 4.0 * fwhm_eV
        hi = lines.energy_eV.max() + 4.0 * fwhm_eV
        energy_eV = np.linspace(lo, hi, n_points)
    energy_eV = np.asarray(energy_eV, dtype=float)
    a = 4.0 * LN2 / fwhm_eV**2
    g = np.sqrt(a / np.pi) * np.exp(-a * (energy_eV[:, None] - lines.energy_eV[None, :]) ** 2)
    return energy_eV, g @ lines.probability


def plot_spectrum(path, energy_eV, density, lines: LineSpectrum | None = None, title=None,
                  notes=()):
    """Write a picture of the broadened spectrum and its lines (PNG/SVG by suffix).

    The lines are probabilities (dimensionless) drawn on the density axis (1/eV): they
    are multiplied by one factor, stated in the legend, so that the tallest line meets
    the tallest peak.  ``notes`` (e.g. "pulse averaging skipped") are printed in the
    plot's top left corner.  Matplotlib's Agg backend, written atomically; returns the path.
    """
    from matplotlib.figure import Figure

    from designer import drawing
    from designer.io import save_figure

    fig = Figure(figsize=(7.0, 4.2), layout="constrained")
    ax = fig.subplots()
    ax.plot(energy_eV, density, lw=1.6, color="0.15", label="spectrum (zero-loss broadened)")
    if lines is not None and np.max(density) > 0:
        scale = np.max(density) / max(np.max(lines.probability), 1e-300)
        ax.vlines(lines.energy_eV, 0, lines.probability * scale, lw=1.0,
                  color=drawing.ELECTRON,
                  label=f"lines: probability × {scale:.3g} eV⁻¹")
    ax.set_xlabel("electron energy change (eV)")
    ax.set_ylabel("probability density (1/eV)")
    if title:
        ax.set_title(title, fontsize=10)
    ax.legend(frameon=False, fontsize=8)
    for j, note in enumerate(notes):
        ax.text(0.01, 0.98 - 0.06 * j, note, fontsize=7, color="0.35", ha="left", va="top",
                transform=ax.transAxes)
    return save_figure(fig, path)
