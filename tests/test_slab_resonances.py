"""Empty-lattice guide lines (slab-waveguide dispersion, folding) and resonance fits."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.constants import c as C0

from designer import resonances, slab_modes
from solvers import layers

LAM = 800e-9


@pytest.mark.parametrize("pol, stack_pol", [("TE", "s"), ("TM", "p")])
def test_guided_modes_are_poles_of_the_transfer_matrix(pol, stack_pol):
    """A guided mode is a solution with no incoming wave: the reflection coefficient
    of the stack diverges at kx = k0 N (transfer matrix of solvers/layers.py, an
    independent route to the same physics; Born & Wolf ch. 1.6)."""
    nf, d, ns = 2.0, 450e-9, 1.45
    Ns = slab_modes.effective_indices(nf, d, LAM, n_below=ns, polarization=pol)
    assert len(Ns) >= 2 and all(ns < N < nf for N in Ns)
    omega = 2 * math.pi * C0 / LAM
    k0 = omega / C0
    eps = np.array([ns**2, nf**2, 1.0])
    z = np.array([0.0, d])

    def inv_r(N):
        sol = layers.solve_stack(eps, z, omega, k0 * N, polarization=stack_pol)
        return abs(1.0 / complex(sol.r))

    for N in Ns:
        assert inv_r(N) < 1e-6 * inv_r(N + 2e-3)
        assert inv_r(N) < 1e-6 * inv_r(N - 2e-3)


def test_symmetric_slab_cutoffs():
    """Symmetric slab: mode m of either polarization appears at V = k0 d sqrt(nf^2 -
    ns^2) = m pi (Yariv & Yeh, Photonics, sec. 3.2)."""
    nf, ns = 2.0, 1.0
    d_cut = math.pi / (2 * math.pi / LAM * math.sqrt(nf**2 - ns**2))
    for pol in ("TE", "TM"):
        assert len(slab_modes.effective_indices(nf, 0.99 * d_cut, LAM, polarization=pol)) == 1
        assert len(slab_modes.effective_indices(nf, 1.01 * d_cut, LAM, polarization=pol)) == 2
    # TE0 lies above TM0 (the TM boundary condition weighs gamma by (nf/ns)^2)
    te = slab_modes.effective_indices(nf, 150e-9, LAM, polarization="TE")[0]
    tm = slab_modes.effective_indices(nf, 150e-9, LAM, polarization="TM")[0]
    assert te > tm


def test_folding_square_lattice_normal_incidence():
    """At normal incidence the (1, 0) band of a square lattice meets the light where
    2 pi / P = k0 N, i.e. lambda = P N (empty-lattice condition)."""
    P = 500e-9
    b1, b2 = slab_modes.reciprocal_vectors((P, 0.0), (0.0, P))
    assert b1 == pytest.approx([2 * math.pi / P, 0.0])
    band = slab_modes.Band("TE", 0, (1, 0))
    N = 1.6
    assert slab_modes.folded_mismatch(band, b1, b2, N, P * N, 0.0, 0.0) == pytest.approx(
        0.0, abs=1e-12)
    # hexagonal: |b| = 4 pi / (sqrt(3) P)
    h1, h2 = slab_modes.reciprocal_vectors((P, 0.0), (P / 2, P * math.sqrt(3) / 2))
    assert np.hypot(*h1) == pytest.approx(4 * math.pi / (math.sqrt(3) * P))
    assert np.dot(h1, (P / 2, P * math.sqrt(3) / 2)) == pytest.approx(0.0, abs=1e-9)


def test_fano_fit_recovers_q_and_position():
    """Synthetic Fano line from the coupled-mode form itself (closed form): the fit
    returns omega_0 and Q = omega_0 / (2 gamma) to 1e-6."""
    lam = np.linspace(780e-9, 820e-9, 41)
    w = 2 * math.pi * C0 / lam
    w0 = 2 * math.pi * C0 / 801.3e-9
    gamma = w0 / (2 * 400.0)                      # Q = 400
    I = (0.3 - 0.1j) + (0.02 + 0.05j) * gamma / (w - w0 + 1j * gamma)
    found = resonances.find_resonances(lam, I, "wavelength")
    assert len(found) == 1
    r = found[0]
    assert r["q_factor"] == pytest.approx(400.0, rel=1e-6)
    assert r["wavelength_m"] == pytest.approx(801.3e-9, rel=1e-9)
    assert r["resolved"]
    # FWHM in wavelength: lambda^2 / (2 pi c) * 2 gamma = lambda / Q
    assert r["fwhm_nm"] == pytest.approx(801.3 / 400.0, rel=1e-6)


def test_sweep_json_resonances_along_wavelength_of_a_2d_map():
    lam = np.linspace(780.0, 820.0, 21)
    ang = [0.0, 5.0]
    pts = []   # axis order: wavelength first, angle second (grid[i_lam, i_ang])
    w0s = {0.0: 795.0, 5.0: 805.0}
    grid = np.empty((len(lam), len(ang)), complex)
    for j, a in enumerate(ang):
        w = 2 * math.pi * C0 / (lam * 1e-9)
        w0 = 2 * math.pi * C0 / (w0s[a] * 1e-9)
        g = w0 / 300.0
        grid[:, j] = 1.0 + 0.5j * g / (w - w0 + 1j * g)
    for i in range(len(lam)):
        for j in range(len(ang)):
            pts.append({"coupling": {"integral_V": [grid[i, j].real, grid[i, j].imag]}})
    data = {"axes": {"laser.wavelength_nm": list(lam), "laser.angle_deg": ang},
            "shape": [len(lam), len(ang)], "points": pts}
    res = resonances.sweep_resonances(data)
    assert [r["at"]["laser.angle_deg"] for r in res] == ang
    assert [r["wavelength_m"] * 1e9 for r in res] == pytest.approx([795.0, 805.0], rel=1e-6)
    assert [r["q_factor"] for r in res] == pytest.approx([150.0, 150.0], rel=1e-6)
