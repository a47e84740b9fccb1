"""Derivatives of the Fourier modal method against central finite differences.

Reference: central differences ``(f(x + h) - f(x - h)) / 2h`` with error O(h^2) (common
practice, no source), and for the eigen-derivative rule the derivative of the matrix
exponential by jax.scipy.linalg.expm (Padé approximation with scaling and squaring,
N. J. Higham, SIAM J. Matrix Anal. Appl. 26, 1179 (2005)), which does not use
eigenvectors at all.
"""

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.linalg import expm
from scipy import constants as sc

from solvers import fmm

LAM = 800e-9
V100 = sc.c * np.sqrt(1 - 1 / (1 + 100e3 * sc.e / (sc.m_e * sc.c**2)) ** 2)


def _expm_by_eig(a):
    lam, w = fmm.eig(a)
    return w @ jnp.diag(jnp.exp(lam)) @ jnp.linalg.inv(w)


def test_eig_derivative_generic_matrix():
    rng = np.random.default_rng(3)
    a = jnp.asarray(rng.normal(size=(6, 6)) + 1j * rng.normal(size=(6, 6)))
    da = jnp.asarray(rng.normal(size=(6, 6)) + 1j * rng.normal(size=(6, 6)))
    _, got = jax.jvp(_expm_by_eig, (a,), (da,))
    _, ref = jax.jvp(expm, (a,), (da,))
    assert np.max(np.abs(np.asarray(got - ref))) < 1e-9 * np.max(np.abs(np.asarray(ref)))
    # reverse mode (JAX transposes the custom rule) agrees with forward mode
    ct = jnp.asarray(rng.normal(size=(6, 6)) + 1j * rng.normal(size=(6, 6)))

    def scalar(x):
        return jnp.real(jnp.sum(ct * _expm_by_eig(x)))

    g = jax.grad(scalar)(a)
    fwd = jax.jvp(scalar, (a,), (da,))[1]
    # for real f of complex z JAX returns g with df = Re(g dz)
    assert abs(float(jnp.real(jnp.sum(g * da))) - float(fwd)) < 1e-9 * abs(float(fwd))


def test_eig_derivative_symmetric_degeneracy():
    # an exactly degenerate pair whose degeneracy the perturbation keeps (the perturbation
    # acts as a multiple of the identity on the degenerate subspace, as a symmetric
    # perturbation does by Schur's lemma): the broadened rule gives the exact derivative
    rng = np.random.default_rng(5)
    u = rng.normal(size=(5, 5)) + 1j * rng.normal(size=(5, 5))
    ui = np.linalg.inv(u)
    a = jnp.asarray(u @ np.diag([1.0, 1.0, 2.0, 3.0 + 1j, -0.5]) @ ui)
    pert = np.diag([0.7, 0.7, -0.2, 0.4, 0.1]).astype(complex)
    pert[2, 3], pert[3, 4], pert[0, 3], pert[4, 1] = 0.3, -0.5, 0.2, 0.6
    da = jnp.asarray(u @ pert @ ui)
    _, got = jax.jvp(_expm_by_eig, (a,), (da,))
    _, ref = jax.jvp(expm, (a,), (da,))
    assert np.all(np.isfinite(np.asarray(got)))
    assert np.max(np.abs(np.asarray(got - ref))) < 1e-7 * np.max(np.abs(np.asarray(ref)))


def _membrane_value(params, point, theta0=None, phi=0.5, lattice="hexagonal"):
    """(R, Re I, Im I) of an elliptical-hole membrane on a substrate as a function of
    (semi-axis scale, period, thickness, theta)."""
    scale, period, thick, theta = params[0], params[1], params[2], params[3]
    if lattice == "hexagonal":
        lat = fmm.Lattice(a1=(period, 0.0), a2=(0.5 * period, np.sqrt(3.0) / 2 * period))
    else:
        lat = fmm.Lattice(a1=(period, 0.0), a2=(0.0, period))
    shape = fmm.Ellipse(center=(30e-9, -20e-9), semi_axes=(150e-9 * scale, 100e-9 * scale),
                        angle=0.4)
    lays = [fmm.PatternedLayer(thick, 4.0 + 0.3j, (shape,), (1.0,))]
    sol = fmm.solve(lat, lays, 2.25, 1.0, wavelength=LAM, theta=theta, phi=phi,
                    polarization=0.3, orders=2, incidence="above")
    i = fmm.coupling_integral(sol, point, (0.2, 0.1, 1.0), V100)
    return jnp.stack([sol.reflectance, jnp.real(i) * 1e8, jnp.imag(i) * 1e8])


def _check_jacobian(fun, x0, steps, rtol):
    # compiled once each: the un-jitted reverse pass and the eight difference
    # evaluations dominated the test's time
    jac = np.asarray(jax.jit(jax.jacrev(fun))(jnp.asarray(x0)))
    fun = jax.jit(fun)
    for k, h in enumerate(steps):
        e = np.zeros_like(x0)
        e[k] = h
        fd = (np.asarray(fun(jnp.asarray(x0 + e))) - np.asarray(fun(jnp.asarray(x0 - e)))) / (2 * h)
        scale = np.max(np.abs(fd)) + 1e-30
        assert np.max(np.abs(jac[:, k] - fd)) < rtol * scale, (k, jac[:, k], fd)


def test_gradients_radius_period_thickness_angle():
    x0 = np.array([1.0, 600e-9, 180e-9, 0.4])
    steps = np.array([1e-4, 600e-9 * 1e-4, 180e-9 * 1e-4, 1e-4])
    _check_jacobian(lambda p: _membrane_value(p, (60e-9, 40e-9)), x0, steps, 1e-5)


def test_gradients_at_a_symmetric_degeneracy():
    # circular holes in a square lattice at normal incidence: C4v symmetry makes modes
    # pairwise degenerate; radius and thickness keep the symmetry (see the eig module)
    def fun(p):
        r, thick = p[0], p[1]
        lat = fmm.square_lattice(500e-9)
        lays = [fmm.PatternedLayer(thick, 4.0, (fmm.Ellipse((0.0, 0.0), (r, r)),), (1.0,))]
        sol = fmm.solve(lat, lays, 2.25, 1.0, wavelength=LAM, theta=0.0, phi=0.0,
                        polarization=0.0, orders=2)
        i = fmm.coupling_integral(sol, (90e-9, 40e-9), (0.0, 0.0, 1.0), V100)
        return jnp.stack([sol.reflectance, jnp.abs(i) * 1e8])

    x0 = np.array([140e-9, 180e-9])
    _check_jacobian(fun, x0, x0 * 1e-4, 1e-5)
