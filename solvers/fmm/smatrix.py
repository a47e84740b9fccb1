"""Scattering matrices of interfaces and layers, and their Redheffer star product.

A section between a medium L below and a medium U above maps the incoming amplitudes
(up-going ``u_L`` at its bottom, down-going ``d_U`` at its top) to the outgoing ones:

    d_L = R_bot u_L + T_dn d_U,        u_U = T_up u_L + R_top d_U.

Only the exponentials ``X = exp(i k0 q d)`` of a layer (|X| <= 1 on our branch) ever
appear, never their inverses, so the composition is stable for any thickness and any
number of evanescent modes (R. Redheffer, J. Math. Phys. 41, 1 (1962); L. Li, J. Opt.
Soc. Am. A 13, 1024 (1996) for its use in modal methods).
"""

from __future__ import annotations

from typing import NamedTuple

import jax
import jax.numpy as jnp


class SMatrix(NamedTuple):
    t_up: jax.Array
    r_bot: jax.Array
    r_top: jax.Array
    t_dn: jax.Array


def interface(w_a, v_a, w_b, v_b):
    """S-matrix of the interface from medium a (below) to b (above), amplitudes taken on
    the interface.  Continuity of tangential E and h:
    ``W_a (u_a + d_a) = W_b (u_b + d_b)``, ``V_a (u_a - d_a) = V_b (u_b - d_b)``."""
    lhs = jnp.block([[-w_a, w_b], [v_a, v_b]])
    rhs = jnp.block([[w_a, -w_b], [v_a, v_b]])
    s = jnp.linalg.solve(lhs, rhs)
    n = w_a.shape[1]
    return SMatrix(t_up=s[n:, :n], r_bot=s[:n, :n], r_top=s[n:, n:], t_dn=s[:n, n:])


def propagation(x):
    """S-matrix of a layer's interior: ``u_top = X u_bottom``, ``d_bottom = X d_top``."""
    d = jnp.diag(x)
    zero = jnp.zeros_like(d)
    return SMatrix(t_up=d, r_bot=zero, r_top=zero, t_dn=d)


def star(a: SMatrix, b: SMatrix) -> SMatrix:
    """Redheffer product: section a below section b (formulas in the module docstring,
    eliminating the amplitudes between them)."""
    n = a.t_up.shape[0]
    one = jnp.eye(n, dtype=a.t_up.dtype)
    # u_mid = (1 - Ra_top Rb_bot)^{-1} (Ta_up u_L + Ra_top Tb_dn d_U)
    g1 = jnp.linalg.solve(one - a.r_top @ b.r_bot, jnp.concatenate([a.t_up, a.r_top @ b.t_dn],
                                                                   axis=1))
    # d_mid = (1 - Rb_bot Ra_top)^{-1} (Rb_bot Ta_up u_L + Tb_dn d_U)
    g2 = jnp.linalg.solve(one - b.r_bot @ a.r_top, jnp.concatenate([b.r_bot @ a.t_up, b.t_dn],
                                                                   axis=1))
    t_up = b.t_up @ g1[:, :n]
    r_top = b.r_top + b.t_up @ g1[:, n:]
    r_bot = a.r_bot + a.t_dn @ g2[:, :n]
    t_dn = a.t_dn @ g2[:, n:]
    return SMatrix(t_up=t_up, r_bot=r_bot, r_top=r_top, t_dn=t_dn)


def identity(n, dtype=complex):
    one = jnp.eye(n, dtype=dtype)
    zero = jnp.zeros((n, n), dtype=dtype)
    return SMatrix(t_up=one, r_bot=zero, r_top=zero, t_dn=one)
