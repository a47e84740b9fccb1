"""Layer-stack solver: Fresnel/Airy coefficients, TIR, energy, fields, coupling, gradients."""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import constants as sc
from scipy import integrate, special

from solvers import layers as L

LAM = 800e-9
OMEGA = 2 * np.pi * sc.c / LAM
K0 = OMEGA / sc.c


def electron_speed(kilovolts):
    """v = beta c with gamma = 1 + eU/(m c^2) (relativistic kinematics, textbook)."""
    gamma = 1 + kilovolts * 1e3 * sc.e / (sc.m_e * sc.c**2)
    return sc.c * np.sqrt(1 - 1 / gamma**2)


V100 = electron_speed(100.0)


def snell_cos(n1, n2, theta):
    return np.sqrt(1 - (n1 * np.sin(theta) / n2) ** 2 + 0j)


def fresnel(n1, n2, theta):
    """Born & Wolf, Principles of Optics, ch. 1.5.2, eqs. (20)-(21): E-field r, t."""
    c1, c2 = np.cos(theta), snell_cos(n1, n2, theta)
    rs = (n1 * c1 - n2 * c2) / (n1 * c1 + n2 * c2)
    ts = 2 * n1 * c1 / (n1 * c1 + n2 * c2)
    rp = (n2 * c1 - n1 * c2) / (n2 * c1 + n1 * c2)
    tp = 2 * n1 * c1 / (n2 * c1 + n1 * c2)
    return rs, ts, rp, tp


@pytest.mark.parametrize("theta_deg", [0.0, 20.0, 50.0, 70.0])
def test_half_space_fresnel(theta_deg):
    # Born & Wolf ch. 1.5.2; Brewster angle of n=1.45332 is 55.47 deg.
    n1, n2 = 1.0, 1.45332
    th = np.radians(theta_deg)
    rs, ts, rp, tp = fresnel(n1, n2, th)
    sp = L.solve_plane_wave([n1**2, n2**2], [0.0], OMEGA, th, polarization="p")
    ss = L.solve_plane_wave([n1**2, n2**2], [0.0], OMEGA, th, polarization="s")
    assert abs(complex(sp.r) - rp) < 1e-12
    assert abs(complex(sp.t) * n1 / n2 - tp) < 1e-12  # Hy ratio -> E ratio
    assert abs(complex(ss.r) - rs) < 1e-12
    assert abs(complex(ss.t) - ts) < 1e-12


def test_brewster_and_normal_reflectance():
    # computed from the Fresnel formula: fused silica at 800 nm, R(0) = 0.0341,
    # Brewster 55.47 deg.
    n = 1.45332
    s0 = L.solve_plane_wave([1.0, n**2], [0.0], OMEGA, 0.0)
    assert abs(float(L.reflectance_transmittance(s0)[0]) - 0.0341) < 5e-5
    sb = L.solve_plane_wave([1.0, n**2], [0.0], OMEGA, np.radians(55.47))
    assert abs(complex(sb.r)) < 1e-4


def airy(n1, n2, n3, h, theta, pol):
    """Born & Wolf ch. 1.6.4, eqs. (57)-(58): film between two half-spaces.
    (equation numbers from memory)"""
    c1, c2, c3 = np.cos(theta), snell_cos(n1, n2, theta), snell_cos(n1, n3, theta)
    if pol == "s":
        r12 = (n1 * c1 - n2 * c2) / (n1 * c1 + n2 * c2)
        r23 = (n2 * c2 - n3 * c3) / (n2 * c2 + n3 * c3)
        t12 = 2 * n1 * c1 / (n1 * c1 + n2 * c2)
        t23 = 2 * n2 * c2 / (n2 * c2 + n3 * c3)
    else:
        r12 = (n2 * c1 - n1 * c2) / (n2 * c1 + n1 * c2)
        r23 = (n3 * c2 - n2 * c3) / (n3 * c2 + n2 * c3)
        t12 = 2 * n1 * c1 / (n2 * c1 + n1 * c2)
        t23 = 2 * n2 * c2 / (n3 * c2 + n2 * c3)
    beta = K0 * n2 * h * c2
    den = 1 + r12 * r23 * np.exp(2j * beta)
    return (r12 + r23 * np.exp(2j * beta)) / den, t12 * t23 * np.exp(1j * beta) / den


@pytest.mark.parametrize("pol", ["s", "p"])
@pytest.mark.parametrize("theta_deg", [0.0, 35.0, 65.0])
@pytest.mark.parametrize("n2", [2.02416, 3.6 + 0.05j])
def test_film_airy(pol, theta_deg, n2):
    n1, n3, h = 1.0, 1.45332, 317e-9
    th = np.radians(theta_deg)
    r_ref, t_ref = airy(n1, n2, n3, h, th, pol)
    sol = L.solve_plane_wave([n1**2, n2**2, n3**2], [50e-9, 50e-9 + h], OMEGA, th,
                             polarization=pol)
    t = complex(sol.t) * (n1 / n3 if pol == "p" else 1.0)
    assert abs(complex(sol.r) - r_ref) < 1e-11
    assert abs(t - t_ref) < 1e-11


def test_film_from_above_matches_reversed_airy():
    # Same Airy formula with the media order reversed (Born & Wolf ch. 1.6.4).
    n1, n2, n3, h = 1.0, 2.02416, 1.45332, 317e-9
    th = np.radians(25.0)  # angle in the incidence medium n3
    r_ref, t_ref = airy(n3, n2, n1, h, th, "p")
    sol = L.solve_plane_wave([n1**2, n2**2, n3**2], [0.0, h], OMEGA, th, incidence="above")
    assert abs(complex(sol.r) - r_ref) < 1e-11
    assert abs(complex(sol.t) * n3 / n1 - t_ref) < 1e-11


@pytest.mark.parametrize("theta_deg", [45.0, 60.0, 80.0])
def test_total_internal_reflection_phase(theta_deg):
    # Born & Wolf ch. 1.5.4, eq. (60): tan(d_s/2) = sqrt(sin^2 - n^2)/cos,
    # tan(d_p/2) = sqrt(sin^2 - n^2)/(n^2 cos), n = n2/n1.  With exp(-i w t) and Im kz >= 0
    # our r = exp(-i d).
    n1, n2 = 1.5, 1.0
    th = np.radians(theta_deg)
    n = n2 / n1
    root = np.sqrt(np.sin(th) ** 2 - n**2)
    ds = 2 * np.arctan(root / np.cos(th))
    dp = 2 * np.arctan(root / (n**2 * np.cos(th)))
    for pol, d in (("s", ds), ("p", dp)):
        sol = L.solve_plane_wave([n1**2, n2**2], [0.0], OMEGA, th, polarization=pol)
        r = complex(sol.r)
        assert abs(abs(r) - 1) < 1e-13
        assert abs(np.angle(r) + d) < 1e-12


@pytest.mark.parametrize("pol", ["s", "p"])
@pytest.mark.parametrize("incidence", ["below", "above"])
def test_energy_conservation_multilayer(pol, incidence):
    # Poynting theorem for lossless media: R + T = 1 (Born & Wolf ch. 1.5.3).
    eps = [1.0, 4.0, 2.1, 12.0, 1.0, 2.25]
    zi = np.cumsum([0.0, 110e-9, 240e-9, 60e-9, 900e-9])
    for th in np.radians([0.0, 30.0, 55.0, 80.0]):
        sol = L.solve_plane_wave(eps, zi, OMEGA, th, polarization=pol, incidence=incidence)
        r, t = L.reflectance_transmittance(sol)
        assert abs(float(r + t) - 1) < 1e-12


def test_tunnelling_gap_and_absorption():
    # Frustrated TIR through a 3-um gap (field decays ~e^-40: stable solve) and an
    # absorbing film (R + T < 1): common practice, no source.
    th = np.radians(60.0)
    sol = L.solve_plane_wave([2.25, 1.0, 2.25], [0.0, 3e-6], OMEGA, th)
    r_ref, t_ref = airy(1.5, 1.0, 1.5, 3e-6, th, "p")  # Airy with complex cos(theta_2)
    assert abs(complex(sol.t) - t_ref) < 1e-9 * abs(t_ref) and abs(t_ref) < 1e-8
    assert abs(complex(sol.r) - r_ref) < 1e-12
    sol = L.solve_plane_wave([1.0, (0.2 + 4.9j) ** 2, 1.0], [0.0, 20e-9], OMEGA, 0.3)
    r, t = L.reflectance_transmittance(sol)
    assert 0.1 < float(r + t) < 0.999


def test_fields_satisfy_maxwell_and_normalization():
    eps = [1.0, 4.0, 2.25]
    zi = [0.0, 200e-9]
    th = 0.4
    sol = L.solve_plane_wave(eps, zi, OMEGA, th)
    # uniform medium: a pure plane wave of peak |E| = 1 V/m (peak-amplitude convention, README)
    uni = L.solve_plane_wave([2.25, 2.25, 2.25], zi, OMEGA, th)
    ex, ez, _ = L.stack_fields(uni, 0.3e-6, np.linspace(-1e-6, 1e-6, 7))
    assert np.allclose(np.sqrt(abs(ex) ** 2 + abs(ez) ** 2), 1.0, atol=1e-12)
    # tangential Hy, Ex and normal D continuous across interfaces (Born & Wolf ch. 1.1.3)
    for j, z in enumerate(zi):
        lo = L.stack_fields(sol, 0.1e-6, z - 1e-18)
        hi = L.stack_fields(sol, 0.1e-6, z + 1e-18)
        assert abs(complex(lo[2] - hi[2])) < 1e-9 * abs(complex(hi[2]))
        assert abs(complex(lo[0] - hi[0])) < 1e-9 * abs(complex(hi[0]))
        assert abs(complex(eps[j] * lo[1] - eps[j + 1] * hi[1])) < 1e-9 * abs(complex(hi[1]))
    # Ampere's law inside the film: Ex = dHy/dz / (-i w eps0 eps) * (-1), central difference
    z, h = 100e-9, 1e-11
    hy_p = complex(L.stack_fields(sol, 0.0, z + h)[2])
    hy_m = complex(L.stack_fields(sol, 0.0, z - h)[2])
    ex0 = complex(L.stack_fields(sol, 0.0, z)[0])
    ex_fd = (hy_p - hy_m) / (2 * h) / (1j * OMEGA * sc.epsilon_0 * 4.0)
    assert abs(ex_fd - ex0) < 1e-6 * abs(ex0)


def smooth_window(z, half_width, taper):
    """0.5 erfc((|z| - A)/T): a field switched off slowly far from the sample."""
    return 0.5 * special.erfc((np.abs(z) - half_width) / taper)


def brute_force_normal(sol, x, v, zi, half_width=30 * LAM, taper=5 * LAM, n_seg=16385):
    """Simpson quadrature of Ez exp(-i w z/v) x window, layer by layer (one field call)."""
    edges = [-(half_width + 7 * taper)] + list(zi) + [half_width + 7 * taper]
    kappa = OMEGA / v
    segs = [np.linspace(lo, hi, n_seg) for lo, hi in zip(edges[:-1], edges[1:])]
    # evaluate just inside each segment so each layer uses its own field
    zz = np.concatenate([np.clip(z, z[0] + 1e-18, z[-1] - 1e-18) for z in segs])
    ez = np.asarray(L.stack_fields(sol, x, zz)[1]).reshape(len(segs), n_seg)
    total = 0.0
    for z, e in zip(segs, ez):
        total += integrate.simpson(e * np.exp(-1j * kappa * z)
                                   * smooth_window(z, half_width, taper), x=z)
    return total


@pytest.mark.parametrize("theta_deg", [0.0, 30.0, 60.0])
def test_film_coupling_vs_quadrature_with_switch_off(theta_deg):
    # Tail convention: the closed form equals the integral of a field switched off
    # smoothly far away (adiabatic switching); common practice, no source.
    eps = [1.0, 4.0, 1.0]
    zi = [0.0, 180e-9]
    th = np.radians(theta_deg)
    sol = L.solve_plane_wave(eps, zi, OMEGA, th)
    exact = complex(L.coupling_normal(sol, 0.25e-6, V100))
    ref = brute_force_normal(sol, 0.25e-6, V100, zi)
    if theta_deg == 0.0:
        assert abs(exact) < 1e-30 and abs(ref) < 1e-20  # no Ez at normal incidence
        return
    assert abs(exact - ref) < 1e-6 * abs(exact)
    # the box alone (no tails) would be wrong by O(1)
    box = brute_force_normal(sol, 0.25e-6, V100, zi, half_width=LAM, taper=1e-3 * LAM)
    assert abs(box - exact) > 0.05 * abs(exact)


@pytest.mark.slow
def test_lossy_multilayer_coupling_vs_quadrature():
    eps = [1.0, 2.1, (0.5 + 3j) ** 2, 12.0, 2.25]
    zi = [0.0, 150e-9, 170e-9, 260e-9]
    sol = L.solve_plane_wave(eps, zi, OMEGA, 0.7)
    exact = complex(L.coupling_normal(sol, 0.0, V100))
    ref = brute_force_normal(sol, 0.0, V100, zi)
    assert abs(exact - ref) < 1e-6 * abs(exact)


def test_vacuum_gives_zero_coupling():
    # A plane wave in vacuum cannot exchange energy with an electron v < c:
    # |q| = |kz - w/v| > 0 for all its pieces, and the tails cancel exactly.
    film = L.solve_plane_wave([1.0, 4.0, 1.0], [0.0, 200e-9], OMEGA, 0.6)
    vac = L.solve_plane_wave([1.0, 1.0, 1.0], [0.0, 200e-9], OMEGA, 0.6)
    i_film = abs(complex(L.coupling_normal(film, 0.0, V100)))
    i_vac = abs(complex(L.coupling_normal(vac, 0.0, V100)))
    assert i_vac < 1e-12 * i_film
    empty = L.solve_plane_wave([1.0], [], OMEGA, 0.6)
    assert abs(complex(L.coupling_normal(empty, 0.0, V100))) == 0.0


def test_gradients_match_finite_differences():
    zi0 = 0.0

    def objective(p):
        d, eps_r, th = p
        sol = L.solve_plane_wave(jnp.array([1.0, eps_r + 0.02j, 2.25]), jnp.stack([zi0, zi0 + d]),
                                 OMEGA, th)
        i = L.coupling_normal(sol, 0.1e-6, V100)
        return jnp.abs(i) ** 2 * 1e14 + L.reflectance_transmittance(sol)[0]

    objective = jax.jit(objective)
    p0 = jnp.array([190e-9, 4.2, 0.5])
    g = np.asarray(jax.jit(jax.grad(objective))(p0))
    steps = np.array([1e-12, 1e-6, 1e-7])
    for k in range(3):
        e = np.zeros(3)
        e[k] = steps[k]
        fd = (objective(p0 + e) - objective(p0 - e)) / (2 * steps[k])
        assert abs(g[k] - float(fd)) < 1e-5 * max(abs(g[k]), 1e-30) + 1e-12


def test_prism_phase_matching_and_decay():
    # computed from the formulas with CODATA constants: Si3N4 n = 2.02416 at 800 nm,
    # 200 kV: Cherenkov angle
    # 44.72 deg from the electron direction (incidence 45.28 deg from the normal), and
    # the synchronous evanescent decay length beta gamma lambda / 2 pi = 123.2 nm.
    n = 2.02416
    v = electron_speed(200.0)
    beta = v / sc.c
    th = np.arcsin(1 / (n * beta))
    assert abs(90 - np.degrees(th) - 44.72) < 0.01
    sol = L.solve_plane_wave([n**2, 1.0], [0.0], OMEGA, th)
    e1, delta = L.coupling_parallel(sol, 50e-9, v)
    e2, _ = L.coupling_parallel(sol, 150e-9, v)
    assert abs(complex(delta)) < 1e-9 * K0
    decay = 100e-9 / np.log(abs(complex(e1)) / abs(complex(e2)))
    assert abs(decay - 123.2e-9) < 0.1e-9
    # over a length L at phase matching the gradient |I|/L is |Ex|
    i_len, _ = L.coupling_parallel(sol, 50e-9, v, length=20e-6)
    assert abs(abs(complex(i_len)) / 20e-6 - abs(complex(e1))) < 1e-9 * abs(complex(e1))


def test_detuning_integral_closed_form():
    # int_0^L e^{i d s} ds = L e^{i d L/2} sinc(d L/2): elementary integral.
    length = 7e-6
    for delta in [0.0, 1e3, 2 * np.pi / length, 3.3e6]:
        ref = length * np.exp(1j * delta * length / 2) * np.sinc(delta * length / 2 / np.pi)
        assert abs(complex(L.detuning_integral(delta, length)) - ref) < 1e-12 * length


@pytest.mark.slow
def test_gaussian_beam_profile_at_waist():
    # Gaussian beam with 1/e^2 intensity radius w0: |Hy| = exp(-x^2/w0^2) at the waist
    # (A. E. Siegman, Lasers, 1986, ch. 17); paraxial corrections ~ (1/(k w0))^2.
    w0 = 3 * LAM
    x = np.linspace(-2 * w0, 2 * w0, 9)
    _, _, hy = L.gaussian_beam_fields([1.0, 1.0], [0.0], OMEGA, 0.0, w0, (0.0, -2e-6), x,
                                      -2e-6 * np.ones_like(x), n_angles=96)
    prof = np.abs(np.asarray(hy)) * sc.c * sc.mu_0  # Hy -> |E| in vacuum (Z0 Hy)
    assert np.allclose(prof, np.exp(-(x**2) / w0**2), atol=3e-3)


@pytest.mark.slow
def test_wide_gaussian_beam_coupling_tends_to_plane_wave():
    # A beam much wider than the sample couples like its central plane wave
    # (angular spread 2/(k w0) -> 0); common practice, no source.
    eps = [1.0, 4.0, 1.0]
    zi = [0.0, 180e-9]
    th = np.radians(40.0)
    pw = complex(L.coupling_normal(L.solve_plane_wave(eps, zi, OMEGA, th), 0.0, V100))
    ib = complex(L.gaussian_beam_coupling_normal(eps, zi, OMEGA, th, 40 * LAM, (0.0, 0.0),
                                                 0.0, V100, n_angles=48))
    assert abs(ib - pw) < 2e-3 * abs(pw)
    # a beam focused 3 w0 away laterally barely reaches the electron (exp(-9 cos^2...))
    far = complex(L.gaussian_beam_coupling_normal(eps, zi, OMEGA, th, 2 * LAM, (6 * LAM, 0.0),
                                                  0.0, V100, n_angles=48))
    near = complex(L.gaussian_beam_coupling_normal(eps, zi, OMEGA, th, 2 * LAM, (0.0, 0.0),
                                                   0.0, V100, n_angles=48))
    assert abs(far) < 0.05 * abs(near)
