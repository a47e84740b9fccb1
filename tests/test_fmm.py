"""Fourier modal method: checks against the exact layer stack, scipy, conservation laws,
reciprocity and convergence.

References: the transfer-matrix layer stack of :mod:`solvers.layers` (itself checked
against Born & Wolf, Principles of Optics, ch. 1.5-1.6, in test_layers.py) is the
independent solution for unpatterned films; scipy.special.jv for Bessel functions;
Poynting's theorem (R + T = 1 without loss); Lorentz reciprocity for periodic
structures (R. Petit (ed.), Electromagnetic Theory of Gratings, Springer 1980, ch. 1:
the efficiency of order b for incidence a equals that of the reversed pair).
Compilations are the expensive part of these tests, so the checks share a few stacks.
"""

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import constants as sc
from scipy import special

from solvers import coupling as C
from solvers import fmm
from solvers import layers as L

LAM = 800e-9
OMEGA = 2 * np.pi * sc.c / LAM
V100 = sc.c * np.sqrt(1 - 1 / (1 + 100e3 * sc.e / (sc.m_e * sc.c**2)) ** 2)

# a three-layer film on a substrate, lossy middle layer (values invented for the test)
FILM_EPS = (2.1, 4.0 + 0.3j, 1.9)
FILM_T = (60e-9, 140e-9, 35e-9)
SUB, TOP = 2.25, 1.0


# ------------------------------------------------------------------ Bessel functions
def test_bessel_against_scipy():
    # scipy.special.jv (Cephes/AMOS) as the reference; range covers |G| R of N <= 12
    x = np.concatenate([np.linspace(0.0, 5.0, 101), np.linspace(5.0, 170.0, 700)])
    for n in (0, 1, 2):
        got = np.asarray(fmm.bessel_j(n, jnp.asarray(x)))
        assert np.max(np.abs(got - special.jv(n, x))) < 1e-14
    assert np.max(np.abs(np.asarray(fmm.bessel_j1(jnp.asarray(x))) - special.j1(x))) < 1e-14
    # 2 J1(x)/x, including x = 0, and its derivative d/dx (2 J1(x)/x) = -2 J2(x)/x
    got = np.asarray(fmm.airy_amplitude(jnp.asarray(x)))
    ref = np.where(x == 0, 1.0, 2 * special.j1(np.where(x == 0, 1, x)) / np.where(x == 0, 1, x))
    assert np.max(np.abs(got - ref)) < 1e-14
    xs = np.array([0.3, 2.0, 7.5, 40.0])
    d = np.asarray(jax.vmap(jax.grad(lambda t: fmm.airy_amplitude(t)))(jnp.asarray(xs)))
    assert np.max(np.abs(d + 2 * special.jv(2, xs) / xs)) < 1e-13


def test_disc_coefficients_against_quadrature():
    # indicator coefficient of a disc vs direct 2D quadrature of exp(-i G.r) on a fine
    # grid (midpoint rule, common practice, no source)
    lat = fmm.hexagonal_lattice(500e-9)
    shape = fmm.Circle(center=(40e-9, -25e-9), radius=160e-9)
    layer = fmm.PatternedLayer(100e-9, 4.0, (shape,), (1.0,))
    from solvers.fmm.geometry import convolution_matrix, permittivity_coefficients

    mat = np.asarray(convolution_matrix(permittivity_coefficients(layer, lat), lat, 1))
    b1, b2 = (np.asarray(b) for b in lat.reciprocal())
    a1, a2 = (np.asarray(a) for a in lat.vectors())
    n = 1400
    u = (np.arange(n) + 0.5) / n
    uu, vv = np.meshgrid(u, u, indexing="ij")
    px, py = uu * a1[0] + vv * a2[0], uu * a1[1] + vv * a2[1]
    best = np.full(px.shape, np.inf)
    for i in (-1, 0, 1):
        for j in (-1, 0, 1):
            dx = px + i * a1[0] + j * a2[0] - 40e-9
            dy = py + i * a1[1] + j * a2[1] + 25e-9
            best = np.minimum(best, np.hypot(dx, dy))
    eps = np.where(best < 160e-9, 1.0, 4.0)
    for (m1, n1), idx in (((1, 0), (7, 4)), ((1, 1), (8, 4)), ((0, 0), (4, 4))):
        g = m1 * b1 + n1 * b2
        ref = np.mean(eps * np.exp(-1j * (g[0] * px + g[1] * py)))
        assert abs(mat[idx] - ref) < 2e-3 * 3.0  # midpoint rule on a stepped edge


# ------------------------------------------------------------------ films vs layers.py
def _film_layers(patterned):
    if not patterned:
        return [fmm.UniformLayer(t, e) for t, e in zip(FILM_T, FILM_EPS)]
    # a "pattern" with the background permittivity inside the shape: a uniform film
    # that goes through the eigensolver, the shape coefficients and normal vectors
    out = [fmm.UniformLayer(t, e) for t, e in zip(FILM_T, FILM_EPS)]
    out[1] = fmm.PatternedLayer(FILM_T[1], FILM_EPS[1], (fmm.Circle((0.0, 0.0), 120e-9),),
                                (FILM_EPS[1],))
    return out


def _layers_ref(theta, pol, incidence):
    eps = jnp.asarray((SUB, *FILM_EPS, TOP))
    z = jnp.asarray(np.concatenate([[0.0], np.cumsum(FILM_T)]))
    sol = L.solve_plane_wave(eps, z, OMEGA, theta, polarization=pol, incidence=incidence)
    return sol, L.reflectance_transmittance(sol)


@pytest.mark.parametrize("patterned", [False, True])
def test_film_equals_layer_stack(patterned):
    lat = fmm.square_lattice(450e-9)
    lays = _film_layers(patterned)
    # a film has no azimuth: phi != 0 must agree with the 2D stack too; theta = 0.9 from
    # the substrate is beyond the critical angle (T = 0)
    cases = [(inc, th, ph, pol) for inc in ("above", "below")
             for th, ph in ((0.0, 0.0), (0.35, 0.7), (0.9, 0.0), (0.9, 2.5))
             for pol in ("p", "s")]
    for incidence, theta, phi, pol in cases:
        sol = fmm.solve(lat, lays, SUB, TOP, wavelength=LAM, theta=theta, phi=phi,
                        polarization=pol, orders=1, incidence=incidence)
        ref, (r_ref, t_ref) = _layers_ref(theta, pol, incidence)
        assert abs(float(sol.reflectance) - float(r_ref)) <= 1e-8 * float(r_ref)
        assert abs(float(sol.transmittance) - float(t_ref)) <= 1e-8 * float(t_ref) + 1e-15
        if pol == "p" and theta > 0:
            # normal path through x = y = 0 (phase referred to z = 0); rotating the
            # plane of incidence about that axis leaves the coupling unchanged
            got = complex(fmm.coupling_integral(sol, (0.0, 0.0), (0, 0, 1), V100,
                                                z_ref=0.0))
            want = complex(L.coupling_normal(ref, 0.0, V100))
            assert abs(got - want) < 1e-8 * abs(want)


def _tilted_reference(ref, x0, direction, z_ref, velocity):
    """Coupling of a tilted path in the xz plane from layers.py fields: Filon quadrature
    (solvers.coupling.phase_integral) inside the stack, analytic tails outside from the
    stack's own plane-wave amplitudes."""
    sx, _, sz = np.asarray(direction, float) / np.linalg.norm(direction)
    tx = sx / sz
    z_int = np.asarray(ref.z_interfaces)
    total = 0.0j
    for lo, hi in zip(z_int[:-1], z_int[1:]):
        z = np.linspace(lo, hi, 6001)[1:-1]
        z = np.concatenate([[lo + 1e-15], z, [hi - 1e-15]])
        x = x0 + tx * (z - z_ref)
        ex, ez, _ = (np.asarray(f) for f in L.stack_fields(ref, jnp.asarray(x), jnp.asarray(z)))
        f = sx * ex + sz * ez
        s = (z - z_ref) / sz
        total += complex(C.phase_integral(f, s, OMEGA / velocity)) / 1.0
    # outer media: Hy = a e^{i kz (z - zr)} + b e^{-i kz (z - zr)}, E from Maxwell
    kx, w = complex(ref.kx), OMEGA
    for j, (zr, side) in ((0, (z_int[0], -1)), (len(z_int), (z_int[-1], +1))):
        eps, kz = complex(ref.eps[j]), complex(ref.kz[j])
        for amp, sgn in ((complex(ref.a[j]), 1), (complex(ref.b[j]), -1)):
            ex = sgn * kz / (w * sc.epsilon_0 * eps) * amp
            ez = -kx / (w * sc.epsilon_0 * eps) * amp
            # integrand along z: exp(i kx x(z)) exp(i sgn kz (z - zr)) exp(-i w s / v)/|sz|
            beta = kx * tx + sgn * kz - w / (velocity * sz)
            pref = np.exp(1j * kx * (x0 + tx * (zr - z_ref))) * np.exp(
                -1j * w * (zr - z_ref) / (velocity * sz))
            tail = -side / (1j * beta)
            total += (sx * ex + sz * ez) * pref * tail / abs(sz)
    return total


def test_tilted_path_through_film():
    lat = fmm.square_lattice(450e-9)
    lays = _film_layers(False)
    for incidence, theta in (("above", 0.5), ("below", 0.2)):
        sol = fmm.solve(lat, lays, SUB, TOP, wavelength=LAM, theta=theta, polarization="p",
                        orders=1, incidence=incidence)
        ref, _ = _layers_ref(theta, "p", incidence)
        for direction in ((0.3, 0.0, 1.0), (-0.5, 0.0, 1.0)):
            got = complex(fmm.coupling_integral(sol, (30e-9, 0.0), direction, V100))
            want = _tilted_reference(ref, 30e-9, direction, 0.5 * sum(FILM_T), V100)
            assert abs(got - want) < 1e-6 * abs(want)


# ------------------------------------------------------------------ patterned layers
def _membrane(shape, eps=4.0 + 0.0j, t=180e-9):
    return [fmm.PatternedLayer(t, eps, (shape,), (1.0,))]


ELLIPSE = fmm.Ellipse(center=(30e-9, -20e-9), semi_axes=(150e-9, 100e-9), angle=0.4)


@pytest.mark.parametrize("lattice", ["square", "hexagonal"])
def test_energy_conservation_holes(lattice):
    # Poynting's theorem: R + T = 1 for a lossless membrane, several diffraction orders
    # (period 1.3 lambda), any polarization, from either side
    p = 1.3 * LAM
    lat = fmm.square_lattice(p) if lattice == "square" else fmm.hexagonal_lattice(p)
    shape = fmm.Ellipse(center=(30e-9, -20e-9), semi_axes=(0.3 * p, 0.2 * p), angle=0.4)
    for incidence in ("above", "below"):
        sol = fmm.solve(lat, _membrane(shape), 2.25, 1.0, wavelength=LAM, theta=0.3,
                        phi=0.5, polarization=0.7, orders=2, incidence=incidence)
        assert int(np.sum(np.asarray(sol.reflected_orders) > 1e-6)) >= 3
        assert abs(float(sol.reflectance + sol.transmittance) - 1) < 1e-10
    # with loss, R + T < 1
    sol = fmm.solve(lat, _membrane(shape, eps=4.0 + 0.2j), 2.25, 1.0, wavelength=LAM,
                    theta=0.3, phi=0.5, polarization=0.7, orders=2)
    assert float(sol.reflectance + sol.transmittance) < 0.99


def _order_power(sol, side):
    """Zeroth-order power fraction split into p and s parts on ``side``."""
    m = sol.kx.shape[0]
    g0 = m // 2
    mode = sol.above if side == "above" else sol.below
    amp = mode.up if side == "above" else mode.down
    ex, ey = complex(amp[g0]), complex(amp[m + g0])
    kx, ky = complex(sol.kx[g0]), complex(sol.ky[g0])
    kp = np.hypot(abs(kx), abs(ky))
    cphi, sphi = (kx / kp, ky / kp) if kp > 0 else (1.0, 0.0)
    eps = complex(sol.eps_above if side == "above" else sol.eps_below)
    q = complex(mode.q[g0])
    es = -ex * sphi + ey * cphi
    ep = (ex * cphi + ey * sphi) * np.sqrt(eps) / q  # |E_p| from its tangential part
    flux = (q / np.sqrt(eps)).real * np.sqrt(eps).real
    return np.array([abs(ep) ** 2, abs(es) ** 2]) * flux


def test_reciprocity_zeroth_order():
    # reversing a plane wave through a lossy, asymmetric hole layer on a substrate: the
    # zeroth-order transmitted power a -> b from above at k_par equals b -> a from below
    # at -k_par (Petit, ch. 1), for every pair of polarizations a, b in {p, s}
    lat = fmm.hexagonal_lattice(600e-9)
    lays = _membrane(ELLIPSE, eps=4.0 + 0.3j)
    theta_a, phi = 0.4, 0.3
    theta_b = np.arcsin(np.sin(theta_a) / np.sqrt(SUB))   # same |k_par| in the substrate
    fwd, bwd = {}, {}
    for pol, psi in (("p", 0.0), ("s", np.pi / 2)):
        s1 = fmm.solve(lat, lays, SUB, TOP, wavelength=LAM, theta=theta_a, phi=phi,
                       polarization=psi, orders=2, incidence="above")
        s2 = fmm.solve(lat, lays, SUB, TOP, wavelength=LAM, theta=theta_b, phi=phi + np.pi,
                       polarization=psi, orders=2, incidence="below")
        # normalise by the incident flux of each wave
        fwd[pol] = _order_power(s1, "below") / (np.sqrt(TOP) * np.cos(theta_a))
        bwd[pol] = _order_power(s2, "above") / (np.sqrt(SUB) * np.cos(theta_b))
    mat_f = np.array([fwd["p"], fwd["s"]])     # [in, out]
    mat_b = np.array([bwd["p"], bwd["s"]])
    assert mat_f[0, 1] > 1e-4                  # real polarization conversion
    assert np.max(np.abs(mat_f - mat_b.T)) < 1e-10


def test_convergence_with_orders():
    # Reflectance and spot-averaged coupling of a silicon-nitride-like hole membrane
    # converge as the order count grows (successive changes shrink; common practice).
    lat = fmm.square_lattice(500e-9)
    lays = _membrane(fmm.Ellipse((0.0, 0.0), (140e-9, 140e-9)), eps=4.0)
    rs, spots = [], []
    for n in (1, 2, 3):
        sol = fmm.solve(lat, lays, 1.0, 1.0, wavelength=LAM, theta=0.4, phi=0.0,
                        polarization="p", orders=n)
        rs.append(float(sol.reflectance))
        spots.append(float(fmm.spot_averaged_coupling(sol, (0.0, 0.0), (0, 0, 1), V100,
                                                      fwhm=2e-6).rms_abs))
    dr = np.abs(np.diff(rs))
    ds = np.abs(np.diff(spots))
    assert dr[-1] < dr[0] and dr[-1] < 0.02 * rs[-1]
    assert ds[-1] < ds[0] and ds[-1] < 0.03 * spots[-1]


def test_spot_average_against_quadrature():
    # <|I|> and sqrt(<|I|^2>) over a Gaussian current density (FWHM w) vs a direct 2D
    # Gauss-Hermite quadrature of |I(r)| (numpy.polynomial.hermite, common practice)
    lat = fmm.square_lattice(500e-9)
    sol = fmm.solve(lat, _membrane(ELLIPSE), 1.0, 1.0, wavelength=LAM, theta=0.4, phi=0.2,
                    polarization="p", orders=2)
    direction = (0.1, 0.05, 1.0)
    ig = np.asarray(fmm.harmonic_couplings(sol, (0.0, 0.0), direction, V100,
                                           fmm.default_z_ref(sol)))
    kx, ky = np.asarray(sol.kx * sol.k0), np.asarray(sol.ky * sol.k0)
    for fwhm in (80e-9, 400e-9):
        sigma = fwhm / (2 * np.sqrt(2 * np.log(2)))
        t, wt = np.polynomial.hermite.hermgauss(60)
        dx = np.sqrt(2) * sigma * t
        xx, yy = np.meshgrid(dx, dx, indexing="ij")
        ww = np.outer(wt, wt) / np.pi
        vals = np.tensordot(ig, np.exp(1j * (kx[:, None, None] * xx + ky[:, None, None] * yy)),
                            axes=(0, 0))
        spot = fmm.spot_averaged_coupling(sol, (0.0, 0.0), direction, V100, fwhm=fwhm,
                                          samples=128)
        assert abs(float(spot.rms_abs) / np.sqrt(np.sum(ww * np.abs(vals) ** 2)) - 1) < 1e-10
        assert abs(float(spot.mean_abs) / np.sum(ww * np.abs(vals)) - 1) < 2e-3
        assert abs(complex(spot.coherent) - np.sum(ww * vals)) < 1e-9 * np.abs(vals).max()


def _fdfd_slit_membrane(nx, period, width, thick, eps, theta, points, velocity):
    """R, T and I(x) of a slit membrane from the 2D FDFD solver (independent of the FMM:
    finite differences on a Yee grid, PML, Floquet tails of solvers.coupling)."""
    import math

    from solvers.fdfd import FdfdProblem, PlaneWave, Pml, eps_from_cells, solve
    from solvers.grid import Grid

    d = period / nx
    npml = int(math.ceil(0.6 * LAM / d))
    nb, na = int(round(400e-9 / d)), int(round(600e-9 / d))
    g = Grid(nx, 2 * npml + nb + na, d, d, x0=0.0, z0=-(npml + nb) * d)
    prob = FdfdProblem(g, OMEGA, Pml(0, npml), PlaneWave(theta))
    xc, zc = g.x_centres(), g.z_centres()
    mat = (np.abs(xc[:, None] - period / 2) > width / 2) & (zc[None, :] > 0) & (zc[None, :] < thick)
    ex, ez = eps_from_cells(np.where(mat, eps, 1.0))
    f = solve(prob, np.asarray(ex), np.asarray(ez))
    r, t = f.power_coefficients(-200e-9, thick + 300e-9)
    z1 = g.z0 + round((-200e-9 - g.z0) / d) * d
    z2 = g.z0 + round((thick + 200e-9 - g.z0) / d) * d
    i = np.asarray(C.coupling_along_z(f, np.asarray(points), z1, z2, 1.0, 1.0, velocity))
    return np.array([r, t, *np.abs(i)])


def test_slit_lattice_against_fdfd():
    # slits infinite along y (orders (N, 0)) vs the 2D FDFD membrane on three grids
    # (slit walls and film faces on cell faces, so no staircase).  FDFD error estimate:
    # Richardson with the observed order p (clipped to [0.5, 2]) from the three grids
    # (L. F. Richardson 1911; P. J. Roache, Verification and Validation in Computational
    # Science and Engineering, 1998, ch. 5).  R and T must agree within that estimate.
    # |I| at a point in the film and at the slit centre: the sharp corners limit the
    # FDFD to first order and its three-grid estimate is then optimistic; we require
    # 1 % (measured: 0.1 % in the film, 0.4 % in the slit at 240 cells per period).
    period, width, thick, eps, theta = 600e-9, 240e-9, 200e-9, 4.0, 0.3
    points = (100e-9, 300e-9)
    fd = np.array([_fdfd_slit_membrane(nx, period, width, thick, eps, theta, points, V100)
                   for nx in (60, 120, 240)])
    lat = fmm.Lattice(a1=(period, 0.0), a2=(0.0, period))
    lays = [fmm.PatternedLayer(thick, eps, (fmm.Slit(period / 2, width),), (1.0,))]
    sol = fmm.solve(lat, lays, 1.0, 1.0, wavelength=LAM, theta=theta, polarization="p",
                    orders=(40, 0), incidence="below")
    got = np.array([float(sol.reflectance), float(sol.transmittance)]
                   + [abs(complex(fmm.coupling_integral(sol, (x, 0.0), (0, 0, 1), V100,
                                                        z_ref=0.0))) for x in points])
    d1, d2 = np.abs(fd[1] - fd[0]), np.abs(fd[2] - fd[1])
    p = np.clip(np.log2(d1 / d2), 0.5, 2.0)
    est = d2 / (2.0**p - 1.0)
    assert np.all(np.abs(got[:2] - fd[2, :2]) <= est[:2] + 1e-12)
    assert np.all(np.abs(got[2:] / fd[2, 2:] - 1) < 1e-2)
    # the slit's coupling is not a film's: the comparison has something to resolve
    assert abs(got[3] / got[2] - 1) > 0.3


def test_patterned_modes_satisfy_the_curl_equations():
    # The modes' V and Z are built without the product Q W (via P V = W diag(q) and the
    # Woodbury identity).  Checked against the defining relations (common linear
    # algebra, no source): P Q W = W diag(q^2), V = Q W / q, E_z = -[eps]^{-1}
    # (Kx h_y - Ky h_x); and for a homogeneous layer the admittance V W^-1 and E_z map
    # Z W^-1 equal the closed-form ones of uniform_modes.
    from solvers.fmm import modes as md
    lat = fmm.square_lattice(500e-9)
    orders = (2, 2)
    mm, nn = fmm.harmonic_indices(orders)
    b1, b2 = lat.reciprocal()
    k0 = 2 * np.pi / LAM
    kx = 0.3 + 0.1j + (mm * b1[0] + nn * b2[0]) / k0
    ky = -0.2 + (mm * b1[1] + nn * b2[1]) / k0
    m = kx.shape[0]
    for shape, eps_hole in ((ELLIPSE, 1.0), (fmm.Circle((0.0, 0.0), 100e-9), 4.0 + 0.3j)):
        lay = fmm.PatternedLayer(100e-9, 4.0 + 0.3j, (shape,), (eps_hole,))
        mats = md.patterned_matrices(lay, lat, orders, "normal", 32)
        q, w, v, z = (np.asarray(x) for x in md.patterned_modes(mats, kx, ky))
        eps_c, exx, exy, eyx, eyy = (np.asarray(x) for x in mats)
        a = np.linalg.inv(eps_c)
        dkx, dky, one = np.diag(kx), np.diag(ky), np.eye(m)
        p = np.block([[dkx @ a @ dky, one - dkx @ a @ dkx], [dky @ a @ dky - one, -dky @ a @ dkx]])
        qm = np.block([[-dkx @ dky - eyx, dkx @ dkx - eyy], [exx - dky @ dky, dky @ dkx + exy]])
        scale = np.max(np.abs(p @ qm))
        assert np.max(np.abs(p @ qm @ w - w * q**2)) < 1e-9 * scale
        ref_v = (qm @ w) / q
        assert np.max(np.abs(v - ref_v)) < 1e-9 * np.max(np.abs(ref_v))
        ref_z = -a @ (dkx @ v[m:] - dky @ v[:m])
        assert np.max(np.abs(z - ref_z)) < 1e-9 * np.max(np.abs(ref_z))
    uniform = fmm.PatternedLayer(100e-9, 2.5 + 0.1j, (ELLIPSE,), (2.5 + 0.1j,))
    q, w, v, z = md.patterned_modes(md.patterned_matrices(uniform, lat, orders, "normal", 32),
                                    kx, ky)
    qu, _, vu, zu = md.uniform_modes(2.5 + 0.1j, kx, ky)
    winv = np.linalg.inv(np.asarray(w))
    assert np.allclose(np.sort_complex(np.asarray(q)), np.sort_complex(np.asarray(qu)),
                       rtol=1e-10)
    assert np.max(np.abs(np.asarray(v) @ winv - np.asarray(vu))) < 1e-9 * np.max(np.abs(vu))
    assert np.max(np.abs(np.asarray(z) @ winv - np.asarray(zu))) < 1e-9 * np.max(np.abs(zu))
