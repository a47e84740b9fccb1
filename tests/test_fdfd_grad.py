"""Adjoint gradients of the FDFD field solver against central finite differences.

Reference: central differences of the same objective (common practice, no source);
the adjoint method itself: T. W. Hughes et al., Opt. Express 25, 15414 (2017).
"""

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import constants

from solvers.fdfd import (
    FdfdProblem,
    PlaneWave,
    Pml,
    e_magnitude_at_centres,
    eps_from_cells,
    field_solver,
    interpolate,
    spacing_for,
)
from solvers.grid import Grid

LAM = 1.0e-6
OMEGA = 2 * math.pi * constants.c / LAM


def _setup(angle=0.3, eps_bg=1.0):
    d = spacing_for(LAM, 2.5, 25)
    g = Grid(20, 76, d, d, z0=-38 * d)
    prob = FdfdProblem(g, OMEGA, Pml(0, 20), PlaneWave(angle, eps_bg))
    X, Z = np.meshgrid(g.x_centres(), g.z_centres(), indexing="ij")

    def bump(xc, zc, R):  # C1 bump with compact support (keeps the source line clean)
        r = np.sqrt((X - xc) ** 2 + (Z - zc) ** 2) / R
        return np.where(r < 1, np.cos(np.pi * np.minimum(r, 1) / 2) ** 2, 0.0)

    b1 = bump(0.3 * g.size_x, 0.1 * LAM, 0.25 * LAM)
    b2 = bump(0.7 * g.size_x, -0.1 * LAM, 0.2 * LAM)
    return prob, g, b1, b2


def _central(f, q, h):
    out = []
    for i in range(q.size):
        e = np.zeros(q.size)
        e[i] = h
        out.append((f(q + e) - f(q - e)) / (2 * h))
    return np.array(out)


@pytest.mark.parametrize("loss", [0.0, 0.3])
def test_gradient_matches_finite_differences(loss):
    prob, g, b1, b2 = _setup()
    fs = field_solver(prob)
    px = np.array([0.2, 0.55]) * g.size_x
    pz = np.array([0.3, 0.35]) * LAM

    def objective(q):
        cells = 1.0 + q[0] * b1 + (q[1] + 1j * loss) * b2 if loss else 1.0 + q[0] * b1 + q[1] * b2
        ex, ez, hy = fs(*eps_from_cells(cells))
        a = interpolate(ex, g, "ex", px, pz, bloch_kx=prob.kx_bloch)
        b = interpolate(ez, g, "ez", px, pz, bloch_kx=prob.kx_bloch)
        mag = e_magnitude_at_centres(ex, ez, g, bloch_kx=prob.kx_bloch)
        return (jnp.sum(jnp.abs(a) ** 2 - 0.5 * jnp.real(b)) + 0.1 * jnp.max(mag)
                + 1e3 * jnp.imag(hy[3, 50]))

    q0 = np.array([1.3, 0.8])
    val, grad = jax.jit(jax.value_and_grad(objective))(q0)
    jobj = jax.jit(objective)
    fd = _central(lambda q: float(jobj(q)), q0, 1e-4)
    assert np.all(np.abs(np.asarray(grad) - fd) <= 1e-4 * np.abs(fd))


def test_gradient_every_cell_random_direction():
    # directional derivative along a random smooth perturbation of every eps cell
    prob, g, b1, _ = _setup()
    fs = field_solver(prob)
    rng = np.random.default_rng(3)
    mask = np.ones(g.shape)
    mask[:, : prob.source_node + 3] = 0.0
    mask[:, -22:] = 0.0
    v_x, v_z = rng.normal(size=g.shape) * mask, rng.normal(size=g.shape) * mask
    base_x, base_z = (np.asarray(e) for e in eps_from_cells(1.0 + 1.5 * b1))

    def objective(ex_, ez_):
        ex, ez, hy = fs(ex_, ez_)
        return jnp.sum(jnp.abs(ex[:, 40:50]) ** 2) + jnp.sum(jnp.real(ez[:, 45] * hy[:, 45]))

    gx, gz = jax.jit(jax.grad(objective, argnums=(0, 1)))(base_x, base_z)
    directional = float(jnp.sum(gx * v_x) + jnp.sum(gz * v_z))
    h = 1e-5
    jobj = jax.jit(objective)
    fd = (float(jobj(base_x + h * v_x, base_z + h * v_z))
          - float(jobj(base_x - h * v_x, base_z - h * v_z))) / (2 * h)
    assert abs(directional - fd) <= 1e-4 * abs(fd)


def test_gradient_reuses_factorization():
    # one factorization serves value and gradient (the adjoint is a transpose solve)
    prob, g, b1, _ = _setup()
    fs = field_solver(prob)
    ex_, ez_ = (np.asarray(e) for e in eps_from_cells(1.0 + 1.5 * b1))

    def objective(a, b):
        ex, _, _ = fs(a, b)
        return jnp.sum(jnp.abs(ex) ** 2)

    jax.jit(jax.grad(objective))(ex_, ez_)
    assert fs.engine.n_factor == 1
    ex2, ez2 = (np.asarray(e) for e in eps_from_cells(1.0 + 1.6 * b1))
    jax.jit(jax.grad(objective))(ex2, ez2)
    assert fs.engine.n_factor == 2
