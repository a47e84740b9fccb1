"""The coupling at the electron's height in a vacuum gap, from the gap's Floquet harmonics.

References:
* the Yee grid's plane waves obey the discrete dispersion relation
  ((2/dz) sin(kz dz/2))^2 = k0^2 - ((2/dx) sin(kx dx/2))^2 (A. Taflove & S. C. Hagness,
  Computational Electrodynamics, 3rd ed., 2005, ch. 4): a field built from such waves in
  closed form must be reproduced exactly between the rows;
* above a phase-matched grating the synchronous harmonic decays as exp(-z / delta),
  delta = beta gamma lambda / (2 pi) (e.g. R. J. England et al., Rev. Mod. Phys. 86,
  1337, 2014): the computed coupling must fall off exponentially with the electron's
  height, with no ripple periodic in the cell, and with that decay length.
Spec values are scenarios of our own.
"""

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from designer.evaluate import default_grid_step, run_fdfd
from designer.families import get_family
from designer.spec import parse_spec
from solvers import coupling


def test_gap_row_reproduces_grid_harmonics_between_rows():
    nx, nz, dx, dz = 16, 12, 9e-9, 7e-9
    omega = 2 * math.pi * 299792458.0 / 800e-9
    kb = 0.3 / (nx * dx)
    rng = np.random.default_rng(1)
    m = np.fft.fftfreq(nx) * nx
    kx = kb + 2 * np.pi * m / (nx * dx)
    # closed form of the grid's vacuum dispersion (independent of the module's helper)
    big_kx = (2 / dx) * np.sin(kx * dx / 2)
    s = np.sqrt((omega / 299792458.0) ** 2 - big_kx**2 + 0j) * dz / 2
    kz = (2 / dz) * np.arcsin(s)
    kz = np.where(kz.imag < 0, -kz, kz)
    a = rng.normal(size=nx) + 1j * rng.normal(size=nx)
    b = 1e-3 * (rng.normal(size=nx) + 1j * rng.normal(size=nx))
    xs = (np.arange(nx) + 0.5) * dx
    lat = np.exp(1j * np.outer(xs, kx))

    def field(z):
        return lat @ (a * np.exp(1j * kz * z) + b * np.exp(-1j * kz * z))

    z_rows = np.arange(nz) * dz
    ex = np.stack([field(z) for z in z_rows], axis=1)
    for z in (3.3 * dz, 4.5 * dz, 6.9 * dz, 2.0 * dz):
        row = coupling.gap_row(ex, dx=dx, dz=dz, x0=0.0, z0=0.0, z=z, omega=omega,
                               bloch_kx=kb, rows=(2, 9))
        np.testing.assert_allclose(row, field(z), rtol=1e-9, atol=1e-12 * np.abs(ex).max())
    # outside the clear rows the same vacuum form extrapolates (still exact)
    row = coupling.gap_row(ex, dx=dx, dz=dz, x0=0.0, z0=0.0, z=1.4 * dz, omega=omega,
                           bloch_kx=kb, rows=(2, 9))
    np.testing.assert_allclose(row, field(1.4 * dz), rtol=1e-8, atol=1e-12 * np.abs(ex).max())
    # traced: value and height derivative agree with numpy and with the closed form
    f = jax.jit(lambda z: coupling.gap_row(jnp.asarray(ex), dx=dx, dz=dz, x0=0.0, z0=0.0,
                                           z=z, omega=omega, bloch_kx=kb,
                                           rows=(jnp.asarray(2), jnp.asarray(9)))[3].real)
    z = 5.2 * dz
    d_ref = (field(z + 1e-12)[3].real - field(z - 1e-12)[3].real) / 2e-12
    np.testing.assert_allclose(float(jax.grad(f)(z)), d_ref, rtol=1e-5)


GRATING = {"beam": {"voltage_kV": 5.0},
           "laser": {"wavelength_nm": 1030.0, "angle_deg": 0.0},
           "sample": {"family": "grating", "material": "fused_silica", "duty_cycle": 0.5,
                      "tooth_height_nm": 200.0},
           "path": {"offset_nm": 10.0, "length_um": 10.0}}


def test_coupling_falls_off_with_the_synchronous_decay_length_without_cell_ripple():
    spec = parse_spec(GRATING, source="5kV")
    h = 12e-9          # a coarse grid: the decay length is under two cells
    run = run_fdfd(spec, h, with_map=False)
    layout, fields = run.layout, run.fields
    g = layout.grid
    eps_x, eps_z = (np.asarray(a) for a in
                    get_family("grating").permittivity(spec.sample, layout))
    v = spec.beam.velocity_m_per_s
    top = spec.sample.tooth_height_m
    z = top + np.linspace(30e-9, 60e-9, 16)          # across almost three cells
    rows = coupling.vacuum_ex_rows(eps_x, eps_z, math.floor((z[0] - g.z0) / g.dz),
                                   layout.pml_cells_z)
    assert rows is not None and rows[1] - rows[0] > 10
    fit = np.array([abs(coupling.coupling_along_x(fields, zz, v, rows=rows)[1]) for zz in z])
    lin = np.array([abs(coupling.coupling_along_x(fields, zz, v)[1]) for zz in z])
    slope, icept = np.polyfit(z, np.log(fit), 1)
    resid = np.log(fit) - (slope * z + icept)
    assert np.max(np.abs(resid)) < 1e-4          # a pure exponential: no ripple
    lin_resid = np.log(lin) - (slope * z + icept)
    assert np.max(np.abs(lin_resid)) > 3e-3      # (linear interpolation ripples)
    ctx = spec.context
    delta = ctx.beta * ctx.gamma * ctx.wavelength_m / (2 * math.pi)
    # the grid's own decay constant is a little off the continuum at 12 nm cells
    assert abs(-1.0 / slope - delta) < 0.05 * delta


def test_default_grid_resolves_decay_length_and_surface_distance():
    spec = parse_spec(GRATING, source="5kV")
    ctx = spec.context
    delta = ctx.beta * ctx.gamma * ctx.wavelength_m / (2 * math.pi)
    n = spec.sample.material.index.real
    wave_rule = ctx.wavelength_m / (n * 60)
    h = default_grid_step(spec)
    assert h <= delta / 6 * (1 + 1e-9)
    assert h < wave_rule / 3
    assert h >= wave_rule / 4 * (1 - 1e-9)       # never finer than a quarter of the rule
    far = parse_spec({**GRATING, "path": {"offset_nm": 200.0, "length_um": 10.0}})
    assert default_grid_step(far) == pytest.approx(min(wave_rule, delta / 6))


def test_harmonic_weights_stay_finite_far_outside_the_rows():
    """The two-row weights equal sin(kz (z2 - z)) / sin(kz dz) (closed form, common
    practice, no source) where that is representable, and stay finite for a strongly
    evanescent harmonic extrapolated far from the rows (where the plain quotient is
    inf / inf)."""
    from solvers.coupling import _harmonic_weights

    kz = np.array([0.3, 2.0j, 1.0 + 2.0j, 40.0j])
    w1, w2 = _harmonic_weights(kz, 0.25, 0.0, 1.0, np)
    np.testing.assert_allclose(w1, np.sin(kz * 0.75) / np.sin(kz), rtol=1e-12)
    np.testing.assert_allclose(w2, np.sin(kz * 0.25) / np.sin(kz), rtol=1e-12)
    w1, w2 = _harmonic_weights(np.array([3000.0j, 5.0j]), 4.0, 0.0, 1.0, np)
    assert np.all(np.isfinite(w1)) and np.all(np.isfinite(w2))
    np.testing.assert_allclose(w2[1], np.sin(5.0j * 4.0) / np.sin(5.0j), rtol=1e-12)
