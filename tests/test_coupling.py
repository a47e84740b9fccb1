"""Coupling integral kernels: quadrature, lattice sums, Floquet tails, figures of merit."""

from dataclasses import dataclass

import jax
import numpy as np
import pytest
from scipy import constants as sc
from scipy import integrate

from solvers import coupling as C
from solvers import layers as L
from solvers.grid import Grid

LAM = 800e-9
OMEGA = 2 * np.pi * sc.c / LAM
K0 = OMEGA / sc.c


def electron_speed(kilovolts):
    """v = beta c with gamma = 1 + eU/(m c^2) (relativistic kinematics, textbook)."""
    gamma = 1 + kilovolts * 1e3 * sc.e / (sc.m_e * sc.c**2)
    return sc.c * np.sqrt(1 - 1 / gamma**2)


V30 = electron_speed(30.0)
V100 = electron_speed(100.0)


@dataclass(frozen=True)
class FieldsLike:
    """What the FDFD solver returns, built here from analytic fields."""

    ex: np.ndarray
    ez: np.ndarray
    hy: np.ndarray
    grid: Grid
    omega: float
    bloch_kx: float


def sample_on_grid(func, grid, omega, bloch_kx):
    """func(x, z) -> (ex, ez, hy) sampled at the Yee positions of solvers.grid."""
    out = []
    for k, coords in enumerate((grid.ex_coords(), grid.ez_coords(), grid.hy_coords())):
        x, z = np.meshgrid(*coords, indexing="ij")
        out.append(np.asarray(func(x, z)[k]))
    return FieldsLike(*out, grid, omega, bloch_kx)


def test_kinematics_reference_values():
    # computed from CODATA constants: beta = 0.32838 at 30 kV, 0.54822 at 100 kV.
    assert abs(V30 / sc.c - 0.32838) < 1e-5
    assert abs(V100 / sc.c - 0.54822) < 1e-5


def test_path_integral_gaussian_closed_form():
    # int exp(-s^2/s0^2) exp(-i q s) ds = s0 sqrt(pi) exp(-q^2 s0^2/4) (Fourier transform of
    # a Gaussian, Abramowitz & Stegun 7.4.6 -- equation number from memory).
    q = OMEGA / V100
    s0 = 2.0 / q
    ref = s0 * np.sqrt(np.pi) * np.exp(-(q * s0) ** 2 / 4)
    errs = []
    for n in (201, 401):
        s = np.linspace(-6 * s0, 6 * s0, n)
        i = complex(C.path_integral(np.exp(-(s / s0) ** 2), s, OMEGA, V100))
        errs.append(abs(i - ref) / abs(ref))
    assert errs[1] < 5e-4
    assert 3.0 < errs[0] / errs[1] < 5.0  # second order, as expected of linear interpolation
    tr = complex(C.path_integral(np.exp(-(s / s0) ** 2), s, OMEGA, V100, method="trapezoid"))
    assert abs(tr - ref) / abs(ref) < 5e-3


def test_phase_integral_exact_for_piecewise_linear():
    # A piecewise-linear function on irregular nodes against adaptive quadrature (scipy.quad).
    rng = np.random.default_rng(1)
    s = np.sort(rng.uniform(0, 3e-6, 12))
    f = rng.normal(size=12) + 1j * rng.normal(size=12)
    q = 2.7e7
    val = complex(C.phase_integral(f, s, q))

    def part(fn):
        return integrate.quad(lambda t: fn(np.interp(t, s, f) * np.exp(-1j * q * t)), s[0], s[-1],
                              points=s[1:-1], limit=400, epsabs=1e-22)[0]

    ref = part(np.real) + 1j * part(np.imag)
    assert abs(val - ref) < 1e-9 * abs(ref)


@pytest.mark.parametrize("n", [1, 5, 40])
def test_lattice_sum_dirichlet(n):
    # |sum_{k<N} e^{i k x}| = |sin(N x/2)/sin(x/2)| (Dirichlet kernel, closed form);
    # N at x = 2 pi m.
    period = 700e-9
    for delta in np.array([0.0, 0.3, 1.0, 2 * np.pi - 1e-9, 2 * np.pi, 4 * np.pi + 0.2]) / period:
        x = delta * period
        brute = np.sum(np.exp(1j * x * np.arange(n)))
        s = complex(C.lattice_sum(delta, period, n))
        assert abs(s - brute) < 1e-9 * n
        if abs(np.sin(x / 2)) > 1e-6:
            assert abs(abs(s) - abs(np.sin(n * x / 2) / np.sin(x / 2))) < 1e-9 * n


def grating_field(period, kb, coeffs):
    """Bloch-periodic evanescent field sum_m c_m exp(i kx_m x - g_m z), as (ex, ez, hy)."""
    def func(x, z):
        ex = 0.0
        for m, c in coeffs.items():
            kxm = kb + 2 * np.pi * m / period
            ex = ex + c * np.exp(1j * kxm * x - np.sqrt(kxm**2 - K0**2 + 0j) * z)
        return ex, 0 * ex, 0 * ex
    return func


def test_periodic_path_lattice_sum_vs_brute_force():
    # N periods sampled explicitly and integrated with the same rule, and the analytic
    # integral of the synthetic field (closed form of each exponential).
    beta = V30 / sc.c
    period = 3 * beta * LAM  # Lambda = m beta lambda, m = 3
    kb = 0.1 * K0
    coeffs = {-1: 0.4 + 0.1j, 0: 0.05, 1: 1.0, 2: 0.2j}
    func = grating_field(period, kb, coeffs)
    nx = 96
    grid = Grid(nx, 8, period / nx, 20e-9, 0.0, 0.0)
    f = sample_on_grid(func, grid, OMEGA, kb)
    z = 60e-9  # on an Ex row: no interpolation across rows
    n_per = 7
    total, one = C.coupling_along_x(f, z, V30, n_periods=n_per)
    # brute force: the same field sampled over all N periods and integrated with the same
    # rule (linear interpolation of the periodic part exp(-i kb x) Ex)
    xs = grid.dx / 2 + grid.dx * np.arange(nx * n_per + 1)
    ex_line = func(xs, z * np.ones_like(xs))[0]
    brute = complex(C.phase_integral(ex_line * np.exp(-1j * kb * xs), xs, OMEGA / V30 - kb))
    assert abs(complex(total) - brute) < 1e-10 * abs(brute)
    assert abs(complex(one) * n_per) > 0  # one-period value is returned too
    # analytic: int_{x_a}^{x_a + N Lambda} sum c_m e^{-g z} e^{i (kx_m - w/v) x} dx
    q = OMEGA / V30
    ref = 0
    for m, c in coeffs.items():
        kxm = kb + 2 * np.pi * m / period
        amp = c * np.exp(-np.sqrt(kxm**2 - K0**2 + 0j) * z)
        d = kxm - q
        ref += amp * (np.exp(1j * d * xs[-1]) - np.exp(1j * d * xs[0])) / (1j * d)
    assert abs(complex(total) - ref) < 2e-3 * abs(ref)


# Fields here are closed forms sampled on a grid, not Yee-grid solutions, so the open-path
# kernel is told to use the continuum dispersion (dispersion="continuum").
def film_fields(eps, zi, theta, ppw, box_margin=3.0, nx=4, period=LAM):
    sol = L.solve_plane_wave(eps, zi, OMEGA, theta)
    dz = LAM / ppw
    nz = int(round(2 * box_margin * ppw))
    grid = Grid(nx, nz, period / nx, dz, 0.0, -box_margin * LAM)
    f = sample_on_grid(lambda x, z: L.stack_fields(sol, x, z), grid, OMEGA,
                       float(np.real(sol.kx)))
    return sol, f


def test_open_path_box_independence_and_exact_film():
    # Box grown by a wavelength on each side changes I by < 0.1 % (README, Conventions);
    # the result agrees with the exact layer-stack coupling to O(dz^2).
    eps = [1.0, 4.0, 2.25]
    zi = [0.0, 200e-9]
    sol, f = film_fields(eps, zi, 0.5, ppw=80)
    x_e = 0.3e-6
    exact = complex(L.coupling_normal(sol, x_e, V100))
    tight = complex(C.coupling_along_z(f, x_e, -0.5 * LAM, 0.5 * LAM, eps[0], eps[-1], V100,
                                      dispersion="continuum")[0])
    grown = complex(C.coupling_along_z(f, x_e, -1.5 * LAM, 1.5 * LAM, eps[0], eps[-1], V100,
                                      dispersion="continuum")[0])
    assert abs(grown - tight) < 1e-3 * abs(tight)
    assert abs(tight - exact) < 2e-3 * abs(exact)


@pytest.mark.slow
def test_open_path_convergence_and_richardson():
    # Halving dz cuts the error ~4x; Richardson (p = 2) from the two gets much closer.
    eps = [1.0, 2.1, 12.0, 1.0]
    zi = [0.0, 100e-9, 160e-9]  # interfaces on grid nodes at both resolutions
    vals = []
    for ppw in (40, 80):
        sol, f = film_fields(eps, zi, 0.6, ppw=ppw, box_margin=1.0)
        vals.append(complex(C.coupling_along_z(f, 0.0, -0.5 * LAM, 0.5 * LAM, 1.0, 1.0, V100,
                                               dispersion="continuum")[0]))
    exact = complex(L.coupling_normal(sol, 0.0, V100))
    e1, e2 = abs(vals[0] - exact), abs(vals[1] - exact)
    assert 2.5 < e1 / e2 < 6.0
    extrap, rel = C.richardson(vals[0], vals[1], 2)
    assert abs(extrap - exact) < 0.3 * e2
    assert 0.3 < rel / (e2 / abs(exact)) < 3.0  # the estimate tracks the true error


@pytest.mark.slow
def test_open_path_floquet_orders_of_a_grating_like_field():
    # Field above/below made of several Floquet orders (propagating and evanescent) on
    # both sides of a "structure" region where the field is an arbitrary smooth function;
    # the box result must not depend on where the box ends.  Common practice, no source.
    period = 1.3 * LAM
    kb = K0 * np.sin(0.3)
    eps_b, eps_a = 2.25, 1.0

    def func(x, z):
        hy = np.zeros(np.shape(x), complex)
        ez = np.zeros_like(hy)
        ex = np.zeros_like(hy)
        for m, (ca, cb) in {-1: (0.3, 0.2j), 0: (1.0, 0.5), 1: (0.4j, 0.1), 2: (0.2, 0.3)}.items():
            kxm = kb + 2 * np.pi * m / period
            for eps, c, sgn, zp, side in ((eps_a, ca, 1, 0.1e-6, z >= 0.1e-6),
                                          (eps_b, cb, -1, -0.1e-6, z <= -0.1e-6)):
                kz = np.sqrt(eps * K0**2 - kxm**2 + 0j)
                kz = np.where(kz.imag < 0, -kz, kz)
                w = c * np.exp(1j * kxm * x + sgn * 1j * kz * (z - zp))  # outgoing / decaying
                hy += np.where(side, w, 0)
                ex += np.where(side, sgn * kz / (OMEGA * sc.epsilon_0 * eps) * w, 0)
                ez += np.where(side, -kxm / (OMEGA * sc.epsilon_0 * eps) * w, 0)
        mid = (z > -0.1e-6) & (z < 0.1e-6)
        bump = np.exp(1j * kb * x) * np.cos(np.pi * z / 0.2e-6) * (1 + 0.3 * np.cos(2 * np.pi * x
                                                                                      / period))
        ez = ez + np.where(mid, 3e-3 * bump, 0)
        return ex, ez, hy

    nx = 32
    dz = LAM / 80
    grid = Grid(nx, 320, period / nx, dz, 0.0, -2 * LAM)
    f = sample_on_grid(func, grid, OMEGA, kb)
    xs = np.array([0.0, 0.37 * period])
    a = np.asarray(C.coupling_along_z(f, xs, -0.25 * LAM, 0.25 * LAM, eps_b, eps_a, V100,
                                      dispersion="continuum"))
    b = np.asarray(C.coupling_along_z(f, xs, -1.25 * LAM, 1.25 * LAM, eps_b, eps_a, V100,
                                      dispersion="continuum"))
    assert np.all(np.abs(a - b) < 1e-3 * np.abs(a))


@pytest.mark.slow
def test_open_path_with_wide_spot_tends_to_adiabatic_limit():
    eps = [1.0, 4.0, 1.0]
    zi = [0.0, 200e-9]
    sol, f = film_fields(eps, zi, 0.5, ppw=40, box_margin=1.0)
    plain = complex(C.coupling_along_z(f, 0.0, -0.5 * LAM, 0.5 * LAM, 1.0, 1.0, V100,
                                       dispersion="continuum")[0])
    spot = complex(C.coupling_along_z(f, 0.0, -0.5 * LAM, 0.5 * LAM, 1.0, 1.0, V100,
                                      dispersion="continuum",
                                      spot=(100e-9, 6 * LAM))[0])
    # (d / R)^2 ~ 1e-3 change from the envelope over the film (common practice, no source)
    assert abs(spot - plain) < 1e-2 * abs(plain)


@pytest.mark.slow
def test_gradient_wrt_outer_permittivity_matches_fd():
    eps = [1.0, 4.0, 1.0]
    zi = [0.0, 200e-9]
    _, f = film_fields(eps, zi, 0.5, ppw=20, box_margin=1.0)
    g = f.grid

    def obj(eps_a):
        i = C.coupling_z_kernel(f.ez, f.hy, nx=g.nx, dx=g.dx, dz=g.dz, x0=g.x0, z0=g.z0, x=0.0,
                                z1=-0.5 * LAM, z2=0.5 * LAM, eps_below=1.0, eps_above=eps_a,
                                omega=OMEGA, bloch_kx=f.bloch_kx, velocity=V100,
                                dispersion="continuum")
        return 1e16 * jax.numpy.abs(i[0]) ** 2

    obj = jax.jit(obj)
    gr = float(jax.grad(obj)(1.1))
    h = 1e-6
    fd = (float(obj(1.1 + h)) - float(obj(1.1 - h))) / (2 * h)
    assert abs(gr - fd) < 1e-5 * abs(fd)


def test_spot_average_closed_form():
    # <1 + a cos(2 pi x/L)> over a Gaussian of std s centred at x_c equals
    # 1 + a cos(2 pi x_c/L) exp(-(2 pi s/L)^2/2) (characteristic function of a Gaussian).
    period = 1e-6
    x = np.linspace(0, period, 400, endpoint=False)
    amp = 0.5
    beta = 1 + amp * np.cos(2 * np.pi * x / period)
    fwhm = 0.7 * period
    sig = fwhm / (2 * np.sqrt(2 * np.log(2)))
    xc = 0.2 * period
    mean, mean_sq = C.spot_average(x, beta, xc, fwhm, period=period)
    damp = np.exp(-((2 * np.pi * sig / period) ** 2) / 2)
    assert abs(mean - (1 + amp * np.cos(2 * np.pi * xc / period) * damp)) < 1e-9
    ref_sq = (1 + amp**2 / 2 + 2 * amp * np.cos(2 * np.pi * xc / period) * damp
              + amp**2 / 2 * np.cos(4 * np.pi * xc / period) * damp**4)
    assert abs(mean_sq - ref_sq) < 1e-9


def test_richardson_on_known_series():
    # Trapezoid rule for int_0^1 e^x dx = e - 1 has error ~ h^2 (Euler-Maclaurin).
    def trap(n):
        x = np.linspace(0, 1, n + 1)
        return np.trapezoid(np.exp(x), x)

    exact = np.e - 1
    extrap, rel = C.richardson(trap(8), trap(16), 2)
    assert abs(extrap - exact) < 1e-6
    true_rel = abs(trap(16) - exact) / exact
    assert abs(rel / true_rel - 1) < 0.01


def test_coupling_result_figures():
    # beta_c = e I/(2 hbar w), so the classical energy change e|I| equals 2|beta_c| hbar w
    # (README, Conventions); G = |I|/L, kappa = G/E0, damage factor G/E_max.
    i = (3.0 - 4.0j) * 1e-6
    res = C.coupling_result(i, OMEGA, incident_amplitude=2.0, interaction_length=10e-6,
                            max_field_in_material=5.0, relative_error=1e-3)
    assert abs(2 * abs(res.beta_c) * sc.hbar * OMEGA - sc.e * abs(i)) < 1e-12 * sc.e * abs(i)
    assert abs(res.gradient_V_per_m - 0.5) < 1e-12
    assert abs(res.structure_factor - 0.25) < 1e-12
    assert abs(res.damage_factor - 0.1) < 1e-12
    assert abs(res.beta_c_per_field - res.beta_c / 2) < 1e-15
    open_path = C.coupling_result(i, OMEGA)
    assert open_path.interaction_length_m is None and open_path.gradient_V_per_m is None


# ------------------------------------------------------------------ numpy / jax.numpy paths
def random_fields(nx=12, nz=40, period=1.3 * LAM, seed=3):
    """Random complex fields on a small grid (any arrays will do: the numpy and
    jax.numpy paths must evaluate the same formula)."""
    rng = np.random.default_rng(seed)
    grid = Grid(nx, nz, period / nx, LAM / 20, 0.0, -nz / 2 * LAM / 20)

    def arr():
        return rng.normal(size=(nx, nz)) + 1j * rng.normal(size=(nx, nz))

    # Bloch vector past half a reciprocal vector, so the order centring (round) matters;
    # kx_m / k0 = (0.63 + m) / 1.3 keeps every order >= 5 % away from grazing in eps 1
    # and 2.25 (at grazing kz = 0 and the two-row Floquet split is singular)
    return FieldsLike(arr(), arr(), arr(), grid, OMEGA, 0.63 * 2 * np.pi / period)


def z_kernel_args(f, x, z1, z2, eps_b, eps_a, spot=None):
    g = f.grid
    return dict(nx=g.nx, dx=g.dx, dz=g.dz, x0=g.x0, z0=g.z0, x=x, z1=z1, z2=z2,
                eps_below=eps_b, eps_above=eps_a, omega=f.omega, bloch_kx=f.bloch_kx,
                velocity=V100, spot=spot)


def assert_close(a, b, rel=1e-12):
    a, b = np.asarray(a), np.asarray(b)
    assert a.shape == b.shape
    assert np.max(np.abs(a - b)) <= rel * np.max(np.abs(b))


def test_namespace_inference():
    # numpy inputs (and Python numbers) stay in numpy; JAX arrays and tracers pick jax.numpy.
    assert C.array_namespace(np.ones(3), 1.0, None, (1.0, 2.0)) is np
    assert C.array_namespace(np.ones(3), jax.numpy.ones(3)) is jax.numpy
    seen = []
    jax.jit(lambda t: seen.append(C.array_namespace(1.0, t)) or t)(1.0)
    assert seen == [jax.numpy]


def test_numpy_path_matches_jit_path_open_and_periodic():
    # The same formulas evaluated by numpy and by XLA under jax.jit agree to rounding
    # (1e-12 relative).  Common practice, no source: the reference is the other backend.
    jnp = jax.numpy
    f = random_fields()
    g = f.grid
    z1, z2 = g.z0 + 12 * g.dz, g.z0 + 29 * g.dz
    xs = np.array([0.0, 0.37 * g.size_x, 0.999 * g.size_x])
    for spot in (None, (0.1e-6, 2 * LAM)):
        kw = z_kernel_args(f, xs, z1, z2, 2.25, 1.0, spot)
        ref = C.coupling_z_kernel(f.ez, f.hy, **kw)
        assert isinstance(ref, np.ndarray) and not isinstance(ref, jax.Array)
        jit = jax.jit(lambda ez, hy, kw=kw: C.coupling_z_kernel(ez, hy, **kw))
        assert_close(jit(jnp.asarray(f.ez), jnp.asarray(f.hy)), ref)
        assert_close(C.coupling_along_z(f, xs, z1, z2, 2.25, 1.0, V100, spot=spot), ref)
    # Floquet amplitudes, traced Bloch vector
    rows = (f.hy[:, 20], f.hy[:, 21], g.x0 + 0.5 * g.dx, g.dx, g.dz, 2.25, OMEGA)
    ref = C.floquet_orders(*rows, f.bloch_kx)
    out = jax.jit(lambda kb: C.floquet_orders(*rows, kb))(f.bloch_kx)
    for a, b in zip(out, ref):
        assert_close(a, b)
    # periodic path, with and without a spot
    for spot in (None, (2.0e-6, 3e-6)):
        ref = C.coupling_along_x(f, g.z0 + 17.4 * g.dz, V30, n_periods=6, spot=spot)
        assert not isinstance(ref[0], jax.Array)
        out = C.coupling_along_x(f, g.z0 + 17.4 * g.dz, V30, n_periods=6, spot=spot,
                                 xp=jnp)
        assert isinstance(out[0], jax.Array)
        for a, b in zip(out, ref):
            assert_close(a, b)


def test_grad_through_jax_path_matches_numpy_finite_differences():
    # jax.grad of |I|^2 w.r.t. a field perturbation amplitude t and the Bloch vector,
    # against central differences of the numpy path (two independent evaluations).
    jnp = jax.numpy
    f = random_fields(seed=5)
    d = random_fields(seed=6)
    g = f.grid
    z1, z2 = g.z0 + 12 * g.dz, g.z0 + 29 * g.dz
    kw = z_kernel_args(f, 0.21 * g.size_x, z1, z2, 2.25, 1.0)
    kw.pop("bloch_kx")

    def obj(t, kb):
        ez = f.ez + t * d.ez
        hy = f.hy + t * d.hy
        i = C.coupling_z_kernel(ez, hy, bloch_kx=kb, **kw)
        return 1e16 * (i.real[0] ** 2 + i.imag[0] ** 2)

    t0, kb0 = 0.3, f.bloch_kx
    gt, gk = jax.jit(jax.grad(obj, argnums=(0, 1)))(t0, kb0)
    ht, hk = 1e-3, 1e-5 * abs(kb0)
    fd_t = (obj(t0 + ht, kb0) - obj(t0 - ht, kb0)) / (2 * ht)  # exact: |I|^2 quadratic in t
    fd_k = (obj(t0, kb0 + hk) - obj(t0, kb0 - hk)) / (2 * hk)
    assert isinstance(fd_t, float | np.floating)  # the finite differences ran in numpy
    assert abs(float(gt) - fd_t) < 1e-8 * abs(fd_t)
    assert abs(float(gk) - fd_k) < 1e-6 * abs(fd_k)
    # the periodic path: gradient w.r.t. the row values (Ex scaled by (1 + t))
    z = g.z0 + 17.4 * g.dz

    def obj_x(t):
        i, _ = C.coupling_x_kernel((1.0 + t) * jnp.asarray(f.ex), dx=g.dx, dz=g.dz, x0=g.x0,
                                   z0=g.z0, z=z, omega=OMEGA, bloch_kx=f.bloch_kx,
                                   velocity=V30, n_periods=4)
        return jnp.abs(i) ** 2

    i_np, _ = C.coupling_along_x(f, z, V30, n_periods=4)
    # d/dt |(1+t) I|^2 at t = 0 is 2 |I|^2 (closed form)
    assert abs(float(jax.grad(obj_x)(0.0)) - 2 * abs(i_np) ** 2) < 1e-10 * abs(i_np) ** 2


def test_gaussian_envelope_integral_matches_quadrature():
    # closed form (Abramowitz & Stegun 7.4.32, completing the square) against
    # scipy.integrate.quad of the definition, detuned and phase matched
    from scipy import integrate

    length, radius = 10e-6, 3e-6
    for delta in (0.0, 2.0e5, 1.3e6):
        def part(s, f):
            return f(np.exp(1j * delta * s - (s - length / 2) ** 2 / radius**2))
        re = integrate.quad(part, 0, length, args=(np.real,), limit=200)[0]
        im = integrate.quad(part, 0, length, args=(np.imag,), limit=200)[0]
        got = C.gaussian_envelope_integral(delta, length, radius)
        assert abs(got - complex(re, im)) < 1e-9 * length
    # a very wide spot tends to the plain detuning integral
    wide = C.gaussian_envelope_integral(2.0e5, length, 1e3)
    plain = (np.exp(1j * 2.0e5 * length) - 1) / (1j * 2.0e5)
    assert abs(wide - plain) < 1e-6 * abs(plain)
