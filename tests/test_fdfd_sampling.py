"""Field sampling, |E| at common points and the largest field in a material region."""

import math

import numpy as np
import pytest
from scipy import constants

from solvers.fdfd import (
    FdfdProblem,
    PlaneWave,
    Pml,
    eps_from_cells,
    floquet_amplitudes,
    incident_field,
    solve,
    spacing_for,
)
from solvers.grid import Grid

LAM = 1.0e-6
OMEGA = 2 * math.pi * constants.c / LAM
K0 = OMEGA / constants.c


def _empty(angle_deg=35.0, cpw=30):
    d = spacing_for(LAM, 1.0, cpw)
    g = Grid(7, 100, d, d, x0=0.2 * d, z0=-50 * d)
    prob = FdfdProblem(g, OMEGA, Pml(0, 20), PlaneWave(math.radians(angle_deg)))
    e = np.ones(g.shape)
    return prob, g, solve(prob, e, e)


def test_sampling_matches_plane_wave_with_bloch_wrap():
    # Bilinear interpolation of a plane wave errs by at most (k h)^2 / 8 of its
    # amplitude per axis (interpolation remainder bound, common practice, no source).
    prob, g, f = _empty()
    rng = np.random.default_rng(0)
    x = rng.uniform(-2 * g.size_x, 3 * g.size_x, 200)  # many periods: Bloch wrap
    z = rng.uniform(-0.5 * LAM, 0.5 * LAM, 200)
    iex, iez, ihy = incident_field(prob, x, z, discrete=True)
    bound = 2 * (K0 * g.dx) ** 2 / 8 + 1e-6
    assert np.max(np.abs(f.sample_ex(x, z) - iex)) < bound
    assert np.max(np.abs(f.sample_ez(x, z) - iez)) < bound
    assert np.max(np.abs(f.sample_hy(x, z) - ihy)) < bound * np.abs(ihy).max()
    # one period to the right is the Bloch phase exp(i k_x L)
    s0, s1 = f.sample_ex(x, z), f.sample_ex(x + g.size_x, z)
    assert np.allclose(s1, s0 * np.exp(1j * prob.kx_bloch * g.size_x), atol=1e-12)
    with pytest.raises(ValueError):
        f.sample_ex(0.0, g.z0 - 1e-9)


def test_max_field_in_glass_half_space():
    # Normal incidence on glass: |E| in the glass is |t_E| = 2 / (1 + n) and the
    # standing wave in air peaks at 1 + |r_E| (Born & Wolf, Principles of Optics, ch. 1.5).
    n2 = 1.5
    d = spacing_for(LAM, n2**2, 60)
    npml = math.ceil(0.55 * LAM / d)
    nphys = math.ceil(2 * LAM / d)
    g = Grid(2, nphys + 2 * npml, d, d, z0=-(npml + nphys // 2) * d)
    prob = FdfdProblem(g, OMEGA, Pml(0, npml), PlaneWave(0.0))
    zc = g.z_centres()
    cells = np.broadcast_to(np.where(zc > 0, n2**2, 1.0), g.shape)
    f = solve(prob, *(np.asarray(e) for e in eps_from_cells(cells)))
    inside = np.broadcast_to((zc > 0) & (zc < g.z0 + g.size_z - npml * d), g.shape)
    air = np.broadcast_to((zc < 0) & (zc > -0.7 * LAM), g.shape)
    assert abs(f.max_field_in(inside) - 2 / (1 + n2)) < 5e-3 * 2 / (1 + n2)
    assert abs(f.max_field_in(air) - (1 + (n2 - 1) / (n2 + 1))) < 5e-3 * 1.2
    with pytest.raises(ValueError):
        f.max_field_in(np.zeros(g.shape, bool))


def test_floquet_amplitudes_of_plane_wave():
    # a single plane wave has one Floquet order, m = 0, of the incident amplitude
    prob, g, f = _empty(angle_deg=20.0)
    k = 50
    m, km, c = floquet_amplitudes(f.ex[:, k], g, "ex", prob.kx_bloch)
    iex = incident_field(prob, 0.0, g.z_nodes()[k], discrete=True)[0]
    assert abs(c[m == 0][0] - iex) < 1e-4
    assert np.all(np.abs(c[m != 0]) < 1e-6)
