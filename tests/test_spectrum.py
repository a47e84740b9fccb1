"""PINEM sideband spectrum: Bessel identities, zero-loss zero, cutoff, broadening, averages."""

import numpy as np
import pytest
from scipy import constants as sc
from scipy import special

from designer import spectrum as S
from solvers import coupling as C

LAM = 800e-9
OMEGA = 2 * np.pi * sc.c / LAM


@pytest.mark.parametrize("beta", [0.05, 0.7, 3.0, 12.5])
def test_sum_rules(beta):
    # sum J_l(x)^2 = 1, sum l J_l^2 = 0, sum l^2 J_l(x)^2 = x^2/2 (Neumann's addition
    # theorem; Abramowitz & Stegun 9.1.76 and its derivatives -- numbers from memory),
    # with x = 2|beta|: sum l^2 P_l = 2|beta|^2.
    orders, p = S.sideband_probabilities(beta)
    assert abs(p.sum() - 1) < 1e-13
    assert abs(np.sum(orders * p)) < 1e-12
    assert abs(np.sum(orders**2 * p) - 2 * beta**2) < 1e-10 * max(1, beta**2)
    # lines are scipy's Bessel functions
    assert np.allclose(p, special.jv(orders, 2 * beta) ** 2, rtol=0, atol=1e-15)


def test_zero_loss_line_vanishes_at_first_bessel_zero():
    # J_0 first zero 2.404825557695773 (scipy.special.jn_zeros; A&S Table 9.5).
    x0 = special.jn_zeros(0, 1)[0]
    assert abs(x0 - 2.40483) < 1e-5
    orders, p = S.sideband_probabilities(x0 / 2)
    assert p[orders == 0][0] < 1e-30
    _, p_off = S.sideband_probabilities(x0 / 2 * 1.05)
    assert p_off[orders == 0][0] > 1e-4


@pytest.mark.parametrize("i_volts", [5.0, 20.0])
def test_cutoff_matches_classical_energy_change(i_volts):
    # Classical maximum energy change e|I| = 2|beta_c| hbar w (conventions in the README): the
    # outermost sideband peak sits at l = x - 0.8086 x^(1/3), x = e|I|/(hbar w), from the
    # transition-region form J_l(x) ~ (2/l)^(1/3) Ai(2^(1/3)(l - x)/l^(1/3))
    # (A&S 9.3.23; Ai maximum at -1.0188, A&S 10.4 -- values from memory), and lines
    # beyond x + 4 x^(1/3) are negligible.
    beta = C.beta_from_integral(i_volts, OMEGA)
    lines = S.line_spectrum(beta, OMEGA)
    x = sc.e * i_volts / (sc.hbar * OMEGA)
    assert abs(2 * abs(beta) - x) < 1e-12 * x
    pos = lines.orders > 0
    lpos, ppos = lines.orders[pos], lines.probability[pos]
    # outermost local maximum
    peaks = [k for k in range(1, len(ppos) - 1) if ppos[k] > ppos[k - 1] and ppos[k] > ppos[k + 1]]
    l_peak = lpos[peaks[-1]]
    assert abs(l_peak - (x - 0.8086 * np.cbrt(x))) < 1.0
    assert ppos[lpos > x + 4 * np.cbrt(x)].sum() < 1e-6
    # energy axis is l hbar w in eV (1.5498 eV photons at 800 nm, hc/(e lambda))
    assert abs(lines.energy_eV[lines.orders == 1][0] - sc.h * sc.c / (sc.e * LAM)) < 1e-12


def test_broadening_preserves_probability():
    lines = S.line_spectrum(1.7, OMEGA)
    e, dens = S.broadened_spectrum(lines, fwhm_eV=0.6, n_points=4001)
    assert abs(np.trapezoid(dens, e) - 1) < 1e-6
    # a single line broadened: the Gaussian's FWHM is the given one (definition of FWHM)
    one = S.LineSpectrum(np.array([0]), np.array([0.0]), np.array([1.0]))
    e, d = S.broadened_spectrum(one, fwhm_eV=0.8, energy_eV=np.linspace(-2, 2, 40001))
    above = e[d >= d.max() / 2]
    assert abs((above[-1] - above[0]) - 0.8) < 2e-4


def test_spot_average_is_weighted_mean_of_bessel_lines():
    b = np.array([0.5, 1.0, 2.0])
    w = np.array([1.0, 2.0, 1.0])
    orders, p = S.sideband_probabilities(b, w, max_order=20)
    ref = (special.jv(orders, 1.0) ** 2 + 2 * special.jv(orders, 2.0) ** 2
           + special.jv(orders, 4.0) ** 2) / 4
    assert np.allclose(p, ref, atol=1e-15)
    # second moment of an incoherent mix is 2 <|beta|^2>
    assert abs(np.sum(orders**2 * p) - 2 * np.sum(w * b**2) / w.sum()) < 1e-10


def test_pulse_average_limits():
    beta = 2.0
    # short electron pulse at the laser peak: the peak spectrum
    short = S.averaged_line_spectrum(beta, OMEGA, tau_laser=100e-15, tau_electron=1e-15)
    peak = S.line_spectrum(beta, OMEGA, max_order=len(short.orders) // 2)
    assert np.allclose(short.probability, peak.probability, atol=2e-4)
    # electron arriving 5 laser FWHM late sees no field: all in the zero-loss line
    late = S.averaged_line_spectrum(beta, OMEGA, tau_laser=100e-15, tau_electron=10e-15,
                                    delay=500e-15)
    assert late.probability[late.orders == 0][0] > 1 - 1e-9
    # |beta|(t) follows exp(-2 ln2 t^2/tau^2): half the intensity (|beta|^2) at t = tau/2
    env, _ = S.pulse_samples(100e-15, 1e-20, delay=50e-15, n=3)
    assert abs(env[1] ** 2 - 0.5) < 1e-9
    # long electron pulse: second moment = 2 |beta|^2 <env^2> (Gaussian average, closed form:
    # <exp(-4 ln2 t^2/tau_L^2)> over exp(-4 ln2 t^2/tau_e^2) = tau_L / sqrt(tau_e^2 + tau_L^2))
    tl, te = 100e-15, 300e-15
    lng = S.averaged_line_spectrum(beta, OMEGA, tau_laser=tl, tau_electron=te, n_time=401)
    m2 = np.sum(lng.orders**2 * lng.probability)
    assert abs(m2 - 2 * beta**2 * tl / np.sqrt(te**2 + tl**2)) < 1e-3 * m2


def test_plot_writes_png(tmp_path):
    lines = S.line_spectrum(1.2, OMEGA)
    e, d = S.broadened_spectrum(lines, 0.5)
    out = S.plot_spectrum(tmp_path / "spec.png", e, d, lines, title="demo")
    data = (tmp_path / "spec.png").read_bytes()
    assert out == tmp_path / "spec.png" and data[:8] == b"\x89PNG\r\n\x1a\n"
