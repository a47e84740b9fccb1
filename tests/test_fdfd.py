"""Checks of the 2D FDFD solver against closed forms and conservation laws.

Closed forms (written out here, independent of the project's layer-stack solver):
Fresnel and Airy coefficients for the magnetic field of TM (E in the plane of
incidence) waves, M. Born & E. Wolf, Principles of Optics, ch. 1.5-1.6:
with q_j = k_zj / eps_j,  r_ij = (q_i - q_j)/(q_i + q_j),  t_ij = 1 + r_ij,
film of thickness d:  r = (r12 + r23 e^{2i b})/(1 + r12 r23 e^{2i b}),
t = t12 t23 e^{i b}/(1 + r12 r23 e^{2i b}),  b = k_z2 d,
R = |r|^2, T = |t|^2 Re(q_3)/Re(q_1).
"""

import math
import warnings

import numpy as np
import pytest
from scipy import constants

from solvers.fdfd import (
    DEFAULT_CELLS_PER_WAVELENGTH,
    FdfdProblem,
    GaussianBeam,
    PlaneWave,
    Pml,
    ResolutionWarning,
    eps_from_cells,
    eps_from_fine,
    incident_field,
    solve,
    spacing_for,
)
from solvers.grid import Grid

LAM = 1.0e-6
OMEGA = 2 * math.pi * constants.c / LAM
K0 = OMEGA / constants.c


# ---------------------------------------------------------------- closed forms
def tm_stack(eps, thickness, angle):
    """(r_H, t_H, R, T) of a half-space (len(eps)=2) or film (len 3), Born & Wolf ch. 1."""
    kx = math.sqrt(eps[0]) * K0 * math.sin(angle)
    q = [np.sqrt(complex(e * K0**2 - kx**2)) / e for e in eps]
    kz = [qq * e for qq, e in zip(q, eps)]

    def r(i, j):
        return (q[i] - q[j]) / (q[i] + q[j])

    if len(eps) == 2:
        rr = r(0, 1)
        tt = 1 + rr
    else:
        ph = np.exp(1j * kz[1] * thickness)
        den = 1 + r(0, 1) * r(1, 2) * ph**2
        rr = (r(0, 1) + r(1, 2) * ph**2) / den
        tt = (1 + r(0, 1)) * (1 + r(1, 2)) * ph / den
    return rr, tt, abs(rr) ** 2, abs(tt) ** 2 * q[-1].real / q[0].real


# ---------------------------------------------------------------- set-ups
def layered_problem(eps, thickness, angle, cpw=DEFAULT_CELLS_PER_WAVELENGTH, nx=2,
                    phys=2.0):
    """Bloch-periodic column: eps[0] below z=0, eps[1] in 0<z<thickness, eps[-1] above."""
    d = spacing_for(LAM, max(eps), cpw)
    npml = math.ceil(0.55 * LAM / math.sqrt(min(eps)) / d)
    nphys = math.ceil(phys * LAM / d)
    nz = nphys + 2 * npml
    g = Grid(nx, nz, d, d, z0=-(npml + nphys // 2) * d)
    prob = FdfdProblem(g, OMEGA, Pml(0, npml), PlaneWave(angle, eps[0]))
    zc = g.z_centres()
    cells = np.where(zc > 0, eps[-1] if len(eps) == 2 else eps[1], eps[0])
    if len(eps) == 3:
        cells = np.where(zc > thickness, eps[2], cells)
    cells = np.broadcast_to(cells, g.shape)
    ex, ez = eps_from_cells(cells)
    return prob, np.asarray(ex), np.asarray(ez)


# ---------------------------------------------------------------- Fresnel / Airy
# angles kept away from the Brewster angle, where R -> 0 and a relative error in R
# says nothing (air-glass 56.3, air-silicon 73.9, glass-air 33.7 degrees)
@pytest.mark.parametrize("eps, angle_deg", [
    ((1.0, 2.25), 0.0), ((1.0, 2.25), 25.0), ((1.0, 2.25), 75.0),
    ((1.0, 12.0), 0.0), ((1.0, 12.0), 45.0),
    ((2.25, 1.0), 0.0), ((2.25, 1.0), 15.0),
])
def test_half_space_fresnel(eps, angle_deg):
    # Born & Wolf, Principles of Optics, ch. 1.5 (Fresnel formulae, TM)
    th = math.radians(angle_deg)
    prob, ex, ez = layered_problem(eps, 0.0, th)
    f = solve(prob, ex, ez)
    R, T = f.power_coefficients(-0.5 * LAM, 0.5 * LAM)
    _, _, Rf, Tf = tm_stack(eps, 0.0, th)
    assert abs(R - Rf) <= 5e-3 * Rf
    assert abs(T - Tf) <= 5e-3 * Tf


@pytest.mark.parametrize("angle_deg", [0.0, 30.0, 70.0])
def test_film_airy(angle_deg):
    # Born & Wolf, Principles of Optics, ch. 1.6 (Airy formulae for a film)
    eps = (1.0, 4.0, 2.25)
    d = spacing_for(LAM, 4.0, DEFAULT_CELLS_PER_WAVELENGTH)
    thickness = 37 * d  # on the grid: interfaces on Ex nodes
    th = math.radians(angle_deg)
    prob, ex, ez = layered_problem(eps, thickness, th)
    f = solve(prob, ex, ez)
    R, T = f.power_coefficients(-0.5 * LAM, thickness + 0.5 * LAM)
    _, _, Rf, Tf = tm_stack(eps, thickness, th)
    assert abs(R - Rf) <= 5e-3 * Rf
    assert abs(T - Tf) <= 5e-3 * Tf
    assert abs(R + T - 1) < 1e-6  # lossless: discrete Poynting theorem


# ---------------------------------------------------------------- total internal reflection
def test_total_internal_reflection_decay_and_phase():
    # Born & Wolf, Principles of Optics, ch. 1.5.4: beyond the critical angle the
    # transmitted field decays as exp(-kappa z), kappa = k0 sqrt(eps1 sin^2 - eps2),
    # and r_H = (q1 - q2)/(q1 + q2) has |r| = 1 and the TM phase shift.
    eps = (2.25, 1.0)
    th = math.radians(60.0)
    prob, ex, ez = layered_problem(eps, 0.0, th, phys=2.5)
    f = solve(prob, ex, ez)
    g = prob.grid
    kappa = K0 * math.sqrt(eps[0] * math.sin(th) ** 2 - eps[1])
    zc = g.z_centres()
    sel = (zc > 0.1 * LAM) & (zc < 0.6 * LAM)
    slope = np.polyfit(zc[sel], np.log(np.abs(f.hy[0, sel])), 1)[0]
    assert abs(-slope - kappa) / kappa < 5e-3

    r_ref = tm_stack(eps, 0.0, th)[0]
    # reflected Hy = r * Hy_inc(z=0) * exp(-i kz (z - 0)) below the interface
    k = np.argmin(np.abs(zc + 0.3 * LAM))
    x = g.x_centres()
    inc = np.asarray(incident_field(prob, x, zc[k], discrete=True)[2])
    scat = f.hy[:, k] - inc
    kz = np.angle(inc[0] / incident_field(prob, x[0], 0.0, discrete=True)[2]) / zc[k]
    r = np.mean(scat / (inc * np.exp(-2j * kz * zc[k])))
    assert abs(abs(r) - 1) < 1e-3
    assert abs(np.angle(r / r_ref)) < 5e-3  # rad


# ---------------------------------------------------------------- empty domain, PML
@pytest.mark.parametrize("angle_deg", [0.0, 60.0])
@pytest.mark.parametrize("side", ["below", "above"])
def test_empty_domain_amplitude_and_pml(angle_deg, side):
    # exact amplitude of the launched wave (requested 1 V/m) and PML reflection;
    # target values: common practice, no source
    d = spacing_for(LAM, 1.0, 30)
    g = Grid(3, 100, d, d, z0=-50 * d)
    prob = FdfdProblem(g, OMEGA, Pml(0, 20), PlaneWave(math.radians(angle_deg), side=side))
    e = np.ones(g.shape)
    f = solve(prob, e, e)
    phys = slice(24, 76)
    mag = f.e_magnitude_at_centres()[:, phys]
    assert np.all(np.abs(mag - 1.0) < 5e-3)
    assert np.all(np.abs(np.sqrt(np.abs(f.ex) ** 2)[:, phys] - math.cos(math.radians(angle_deg)))
                  < 5e-3)
    refl = abs(f.flux_z(0.0, subtract_incident=True) / f.incident_flux())
    assert refl < 1e-4
    # the analytic (continuum) incident wave has the requested amplitude too
    iex, iez, _ = incident_field(prob, 0.0, 0.0)
    assert abs(math.hypot(abs(iex), abs(iez)) - 1.0) < 1e-12


def test_pml_oblique_grazing_in_dielectric():
    # PML inside a dielectric incidence medium (prism case), 75 degrees
    eps = 2.25
    d = spacing_for(LAM, eps, 30)
    g = Grid(2, 120, d, d, z0=-60 * d)
    prob = FdfdProblem(g, OMEGA, Pml(0, 30), PlaneWave(math.radians(75), eps))
    e = np.full(g.shape, eps)
    f = solve(prob, e, e)
    assert abs(f.flux_z(0.0, subtract_incident=True) / f.incident_flux()) < 1e-4


# ---------------------------------------------------------------- energy in a grating
def test_grating_energy_conservation_several_orders():
    # Poynting theorem (lossless structure): R + T = 1; period 1.8 lambda gives
    # 4 reflected and 6 transmitted propagating orders at 10 degrees.
    period = 1.8 * LAM
    eps_t, eps_s = 2.1, 2.25
    d = spacing_for(LAM, eps_s, 30)
    nx = int(round(period / d))
    npml = 30
    nz = 2 * npml + 120
    g = Grid(nx, nz, period / nx, d, z0=-(npml + 50) * d)
    prob = FdfdProblem(g, OMEGA, Pml(0, npml), PlaneWave(math.radians(10.0)))
    xc, zc = g.x_centres(), g.z_centres()
    tooth = (np.abs(xc[:, None] - period / 2) < 0.3 * period) & (zc[None, :] > 0) & (
        zc[None, :] < 0.5 * LAM)
    cells = np.where(tooth, eps_t, np.where(zc[None, :] > 0.5 * LAM, eps_s, 1.0))
    ex, ez = eps_from_cells(cells)
    f = solve(prob, np.asarray(ex), np.asarray(ez))
    R, T = f.power_coefficients(-0.3 * LAM, 1.0 * LAM)
    m = np.arange(-5, 6)
    kxm = prob.kx_bloch + 2 * math.pi * m / period
    assert np.sum(np.abs(kxm) < K0) == 4
    assert np.sum(np.abs(kxm) < math.sqrt(eps_s) * K0) == 6
    assert R > 1e-3 and T > 0.5
    assert abs(R + T - 1) < 1e-3


# ---------------------------------------------------------------- Gaussian beam
def test_gaussian_beam_waist_and_peak():
    # 2D Gaussian beam: |Hy| at focus ~ exp(-x^2/w0^2) (H. Kogelnik & T. Li, Appl. Opt.
    # 5, 1550, 1966; at the focus the profile of our angular-spectrum beam is
    # Gaussian up to the cut-off at |k_x| = k, here exp(-pi^2) ~ 5e-5);
    # peak |E| at focus = requested amplitude.
    d = spacing_for(LAM, 1.0, 20)
    w0 = 1.0 * LAM
    g = Grid(180, 90, d, d, x0=-90 * d, z0=-45 * d)
    src = GaussianBeam(w0, 0.0, 0.0, 0.3 * LAM, amplitude_V_per_m=2.0)
    prob = FdfdProblem(g, OMEGA, Pml(20, 20), src)
    e = np.ones(g.shape)
    f = solve(prob, e, e)
    ex, ez = f.sample_e(0.0, 0.3 * LAM)
    assert abs(math.hypot(abs(ex), abs(ez)) - 2.0) < 2e-3 * 2.0
    x = np.linspace(-3 * w0, 3 * w0, 121)
    hy = np.abs(f.sample_hy(x, 0.3 * LAM))
    sel = hy > 0.05 * hy.max()
    curv = np.polyfit(x[sel], np.log(hy[sel] / hy.max()), 2)[0]
    assert abs(1 / math.sqrt(-curv) - w0) / w0 < 1e-2
    # nothing emitted backwards from the source line, power conserved along z
    p1, p2 = f.flux_z(-0.5 * LAM), f.flux_z(1.0 * LAM)
    assert abs(p1 - p2) / p1 < 1e-3


# ---------------------------------------------------------------- convergence
def test_convergence_order_film():
    # Yee scheme is second order (Taflove & Hagness, Computational Electrodynamics,
    # 3rd ed., ch. 4); the measured order of the film reflectance error is checked.
    eps = (1.0, 4.0, 2.25)
    thickness = 0.3 * LAM
    errs, hs = [], []
    _, _, Rf, _ = tm_stack(eps, thickness, 0.0)
    for cpw in (20, 40, 80):
        # thickness a whole number of cells at every resolution
        d = 0.3 * LAM / round(0.3 * cpw * 2)
        cpw_exact = LAM / 2 / d
        prob, ex, ez = layered_problem(eps, thickness, 0.0, cpw=cpw_exact)
        R, _ = solve(prob, ex, ez).power_coefficients(-0.5 * LAM, thickness + 0.5 * LAM)
        errs.append(abs(R - Rf))
        hs.append(prob.grid.dz)
    order = np.polyfit(np.log(hs), np.log(errs), 1)[0]
    assert 1.8 < order < 2.3, order


def test_subpixel_smoothing_off_grid_film():
    # A film whose interfaces fall between grid nodes: with the Farjadpour et al.
    # (Opt. Lett. 31, 2972, 2006) averaging, R tracks the Airy value for a film of the
    # true thickness; staircasing (nearest cell) is off by about one cell of thickness.
    eps = (1.0, 4.0, 2.25)
    thickness = 0.2937 * LAM
    d = spacing_for(LAM, 4.0, DEFAULT_CELLS_PER_WAVELENGTH)
    npml = math.ceil(0.55 * LAM / d)
    nphys = math.ceil(2.0 * LAM / d)
    g = Grid(2, nphys + 2 * npml, d, d, z0=-(npml + nphys // 2) * d)
    prob = FdfdProblem(g, OMEGA, Pml(0, npml), PlaneWave(math.radians(30), 1.0))
    s = 8
    zf = g.z0 + (np.arange(s * g.nz) + 0.5) * d / s
    fine = np.where(zf > thickness, eps[2], np.where(zf > 0, eps[1], eps[0]))
    fine = np.broadcast_to(fine, (s * g.nx, s * g.nz))
    ex, ez = eps_from_fine(fine, s)
    R, T = solve(prob, np.asarray(ex), np.asarray(ez)).power_coefficients(
        -0.5 * LAM, thickness + 0.5 * LAM)
    _, _, Rf, Tf = tm_stack(eps, thickness, math.radians(30))
    assert abs(R - Rf) < 5e-3 * Rf


# ---------------------------------------------------------------- guards
def _vacuum(nx=2, nz=100, cpw=30.0, npml=20):
    d = spacing_for(LAM, 1.0, cpw)
    g = Grid(nx, nz, d, d, z0=-nz // 2 * d)
    return FdfdProblem(g, OMEGA, Pml(0, npml), PlaneWave(0.0)), g


def test_guards():
    # thresholds: common practice, no source
    prob, g = _vacuum(cpw=40.0, npml=30)
    one = np.ones(g.shape)
    dense = one.copy()
    dense[:, 50:60] = 9.0  # n = 3: 40/3 = 13 cells per wavelength
    with pytest.warns(ResolutionWarning):
        solve(prob, dense, dense)
    very = one.copy()
    very[:, 50:60] = 36.0  # n = 6: 6.7 cells per wavelength
    with pytest.raises(ValueError, match="cells per wavelength"):
        solve(prob, very, very)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResolutionWarning)
        solve(prob, very, very, force=True)
    with pytest.raises(ValueError, match="shape"):
        solve(prob, one[:, :-1], one)
    bad = one.copy()
    bad[1, 40] = np.nan
    with pytest.raises(ValueError, match="non-finite"):
        solve(prob, bad, one)
    thin, g2 = _vacuum(npml=10)  # 10 cells = lambda/3
    with pytest.raises(ValueError, match="PML"):
        solve(thin, np.ones(g2.shape), np.ones(g2.shape))
    src_bad = one.copy()
    src_bad[:, prob.source_node] = 2.0
    with pytest.raises(ValueError, match="source line"):
        solve(prob, src_bad, src_bad)
    with pytest.raises(ValueError):
        FdfdProblem(g, OMEGA, Pml(0, 20), PlaneWave(0.3), bloch_kx=0.123e6)
