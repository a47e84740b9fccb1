"""Eigenmodes of one layer of the Fourier modal method.

Fields carry ``exp(i (k_x x + k_y y))`` per harmonic and time dependence ``exp(-i w t)``;
lengths along z are scaled by ``k0 = w/c`` and the magnetic field by the vacuum impedance
(``h = Z0 H``, V/m), so Maxwell's curl equations read ``curl E = i h``,
``curl h = -i eps E``.  With ``Kx, Ky`` the diagonal matrices of ``k_x/k0, k_y/k0`` over
the harmonics and ``e = (E_x; E_y)``, ``h = (h_x; h_y)`` the tangential Fourier vectors,

    E_z = -A (Kx h_y - Ky h_x),                               A = [eps]^{-1}
    de/dz = i P h,   P = [[Kx A Ky, 1 - Kx A Kx], [Ky A Ky - 1, -Ky A Kx]]
    dh/dz = i Q e,   Q = [[-Kx Ky - E_yx, Kx^2 - E_yy], [E_xx - Ky^2, Ky Kx + E_xy]]

where ``[f]`` is the Toeplitz (convolution) matrix of f and ``E_ab`` represents
``D_a = (eps E)_a``.  The factorization rules of L. Li (J. Opt. Soc. Am. A 13, 1870
(1996)) decide each product: E_z is continuous across the vertical hole walls while
``eps E_z`` jumps, so ``E_z = [eps]^{-1} D_z`` (inverse rule, the matrix A).  In the plane,
the tangential part of E and the normal part of D are continuous; with a unit field n(r)
normal to the edges (T. Schuster, J. Ruoff, N. Kerwien, S. Rafler, W. Osten, J. Opt.
Soc. Am. A 24, 2880 (2007)),

    [D] = [eps] E - Delta [N] E,    Delta = [eps] - [1/eps]^{-1},  N = n n^T,

(``factorization="normal"``, default).  We use the symmetrized product
``(Delta [N] + [N] Delta) / 2``: it has the same limit, and for lossless layers keeps the
matrices Hermitian, so that the truncated problem conserves energy exactly (R + T = 1
to rounding; the plain product misses it by ~1e-6). ``"laurent"`` uses ``[D] = [eps] E`` (slower
convergence for high-contrast TM-like fields, kept for comparison).  For a slit grating
n = x and the normal-vector rule is exactly Li's 1D rule, ``E_xx = [1/eps]^{-1}``.

Modes: ``e'' = -P Q e``, so ``P Q W = W diag(q^2)``; ``q = sqrt(q^2)`` on the branch
``Im q >= 0`` (``Re q > 0`` when q is real to rounding: propagating modes go up).  The
up-going mode ``exp(+i q k0 z)`` has ``h = V e`` with ``V = Q W q^{-1}``, the down-going
one ``h = -V e``.  Its E_z is ``Z e`` with ``Z = -A (Kx V_y - Ky V_x)`` (sign flips for
down-going).  Uniform layers need no eigensolve: per harmonic ``q = sqrt(eps - Kx^2 -
Ky^2)``, both polarizations share it, ``W = 1`` and ``V = Q / q``.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp

from .eig import eig
from .geometry import (
    PatternedLayer,
    convolution_matrix,
    normal_field_matrices,
    permittivity_coefficients,
)

FACTORIZATIONS = ("normal", "laurent")


@partial(jax.tree_util.register_dataclass,
         data_fields=["q", "w", "v", "ez", "up", "down", "z_bottom", "thickness"],
         meta_fields=[])
@dataclass(frozen=True)
class LayerModes:
    """Modes of one layer and their amplitudes in the solved stack.

    ``q`` (2M,): normalized normal wavenumbers (physical ``k_z = k0 q``).
    ``w`` (2M, 2M): tangential E of each mode (columns; rows E_x harmonics then E_y).
    ``v`` (2M, 2M): tangential ``h = Z0 H`` of each up-going mode (down-going: ``-v``).
    ``ez`` (M, 2M): E_z of each up-going mode (down-going: ``-ez``).
    ``up`` (2M,): up-going amplitudes referenced at the layer bottom ``z_bottom``;
    ``down`` (2M,): down-going amplitudes referenced at the layer top
    ``z_bottom + thickness``.  For the outer media the thickness is 0 and both
    amplitudes refer to the bounding plane (z = 0 below, the stack top above).

    In the layer: ``E_t(z) = w (exp(i k0 q (z - z_b)) up + exp(i k0 q (z_t - z)) down)``,
    ``h_t(z) = v (exp(i k0 q (z - z_b)) up - exp(i k0 q (z_t - z)) down)``.
    """

    q: jax.Array
    w: jax.Array
    v: jax.Array
    ez: jax.Array
    up: jax.Array
    down: jax.Array
    z_bottom: jax.Array
    thickness: jax.Array


def branch(q2):
    """``sqrt(q2)`` with Im >= 0, but Re > 0 where the root is real to rounding."""
    q = jnp.sqrt(q2)
    real_like = jnp.abs(jnp.imag(q)) <= 1e-10 * jnp.abs(q)
    flip = jnp.where(real_like, jnp.real(q) < 0, jnp.imag(q) < 0)
    return jnp.where(flip, -q, q)


def uniform_modes(eps, kx, ky):
    """Closed-form modes ``(q, W, V, Z)`` of a homogeneous medium (module docstring).

    ``kx, ky``: normalized tangential wavenumbers (M,)."""
    eps = jnp.asarray(eps, dtype=complex)
    m = kx.shape[0]
    qg = branch(eps - kx**2 - ky**2)
    q = jnp.concatenate([qg, qg])
    w = jnp.eye(2 * m, dtype=complex)
    d = jnp.diag
    v = jnp.block([[d(-kx * ky / qg), d((kx**2 - eps) / qg)],
                   [d((eps - ky**2) / qg), d(kx * ky / qg)]])
    # E_z = -(kx h_y - ky h_x)/eps for each unit tangential E
    vx, vy = v[:m], v[m:]
    z = -(kx[:, None] * vy - ky[:, None] * vx) / eps
    return q, w, v, z


def patterned_matrices(layer: PatternedLayer, lattice, orders, factorization, samples):
    """``([eps], E_xx, E_xy, E_yx, E_yy)`` of a patterned layer (module docstring).

    The inverse rule's ``A = [eps]^{-1}`` is never formed: :func:`patterned_modes` only
    needs products with it, which it takes as linear solves with ``[eps]``."""
    eps_c = convolution_matrix(permittivity_coefficients(layer, lattice), lattice, orders)
    if factorization == "laurent":
        zero = jnp.zeros_like(eps_c)
        return eps_c, eps_c, zero, zero, eps_c
    inv_c = convolution_matrix(permittivity_coefficients(layer, lattice, inverse=True),
                               lattice, orders)
    inverse_rule = jnp.linalg.inv(inv_c)
    delta = eps_c - inverse_rule
    nxx, nxy, _ = normal_field_matrices(layer, lattice, orders, samples)

    def sym(n):
        return 0.5 * (delta @ n + n @ delta)

    # n is a unit field, so [n_y n_y] = 1 - [n_x n_x] exactly (the Fourier series of 1
    # is the identity) and sym([n_y n_y]) = Delta - sym([n_x n_x])
    sxx = sym(nxx)
    cross = -sym(nxy)
    return (eps_c, eps_c - sxx, cross, cross, inverse_rule + sxx)


def patterned_modes(mats, kx, ky):
    """Modes ``(q, W, V, Z)`` of a patterned layer from its permittivity matrices.

    ``P = J + K_c A K_r`` with ``J = [[0, 1], [-1, 0]]``, ``K_c = [Kx; Ky]`` and
    ``K_r = [Ky, -Kx]``: the operator of the eigenproblem is assembled as
    ``P Q = J Q + K_c [eps]^{-1} (K_r Q)``, one solve of the harmonics' size instead of a
    product of twice that size.  ``V = Q W q^{-1}`` follows without a product with Q:
    ``P V = W diag(q)`` (the mode's ``de/dz = i q e = i P h``), and the Woodbury identity
    with ``[eps]^{-1}``'s inverse ``[eps]`` gives

        P^{-1} = -J - J K_c S^{-1} K_r J,    S = [eps] - Kx^2 - Ky^2,

    so with ``Y = W diag(q)`` and ``g = K_r J Y = Kx Y_x + Ky Y_y``,
    ``V = [-Y_y - Ky S^{-1} g;  Y_x + Kx S^{-1} g]`` and ``Z = A K_r V = -S^{-1} g``
    (E_z of the mode; ``K_r V = -[eps] S^{-1} g``).  Common linear algebra, no source;
    for a homogeneous medium it reproduces :func:`uniform_modes` (tested)."""
    eps_c, exx, exy, eyx, eyy = mats
    m = kx.shape[0]
    kx, ky = kx + 0j, ky + 0j
    qm = jnp.block([[-jnp.diag(kx * ky) - eyx, jnp.diag(kx * kx) - eyy],
                    [exx - jnp.diag(ky * ky), jnp.diag(ky * kx) + exy]])
    # Kx, Ky are diagonal: row scalings instead of matrix products
    t = jnp.linalg.solve(eps_c, ky[:, None] * qm[:m] - kx[:, None] * qm[m:])
    op = jnp.concatenate([kx[:, None] * t + qm[m:], ky[:, None] * t - qm[:m]], axis=0)
    lam, w = eig(op)
    q = branch(lam)
    y = w * q[None, :]
    s = eps_c - jnp.diag(kx * kx + ky * ky)
    h = jnp.linalg.solve(s, kx[:, None] * y[:m] + ky[:, None] * y[m:])
    v = jnp.concatenate([-y[m:] - ky[:, None] * h, y[:m] + kx[:, None] * h], axis=0)
    return q, w, v, -h
