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


def interface(w_a, v_a, w_b, v_b, a_identity=False, b_identity=False):
    """S-matrix of the interface from medium a (below) to b (above), amplitudes taken on
    the interface.  Continuity of tangential E and h:
    ``W_a (u_a + d_a) = W_b (u_b + d_b)``, ``V_a (u_a - d_a) = V_b (u_b - d_b)``.

    Eliminating ``d_a`` with ``X = W_a^{-1} W_b`` leaves one system of the modes' size
    (the usual RCWA reduction, M. G. Moharam, E. B. Grann, D. A. Pommet, T. K. Gaylord,
    J. Opt. Soc. Am. A 12, 1068 (1995)):

        (V_a X + V_b) u_b = 2 V_a u_a + (V_b - V_a X) d_b,    d_a = X (u_b + d_b) - u_a,

    or, eliminating ``u_b`` with ``Y = W_b^{-1} W_a``,

        (V_a + V_b Y) d_a = (V_a - V_b Y) u_a + 2 V_b d_b,    u_b = Y (u_a + d_a) - d_b.

    ``a_identity`` / ``b_identity`` (static) say that ``W_a`` / ``W_b`` is the identity
    (homogeneous media), which saves the solve for X or Y; a half-size system costs about
    a quarter of the stacked ``[[-W_a, W_b], [V_a, V_b]]`` one."""
    n = w_a.shape[1]
    one = jnp.eye(n, dtype=w_a.dtype)
    if b_identity and not a_identity:
        y = w_a
        vy = uniform_v_times(v_b, y)
        g = jnp.linalg.solve(v_a + vy, jnp.concatenate([v_a - vy, 2.0 * v_b], axis=1))
        r_bot, t_dn = g[:, :n], g[:, n:]
        return SMatrix(t_up=y @ (one + r_bot), r_bot=r_bot, r_top=y @ t_dn - one,
                       t_dn=t_dn)
    x = w_b if a_identity else jnp.linalg.solve(w_a, w_b)
    vx = uniform_v_times(v_a, x) if a_identity else v_a @ x
    g = jnp.linalg.solve(vx + v_b, jnp.concatenate([2.0 * v_a, v_b - vx], axis=1))
    t_up, r_top = g[:, :n], g[:, n:]
    return SMatrix(t_up=t_up, r_bot=x @ t_up - one, r_top=r_top, t_dn=x @ (r_top + one))


def uniform_v_times(v, x):
    """``v @ x`` for the ``v`` of a homogeneous medium, a 2 x 2 block matrix of diagonal
    blocks (:func:`solvers.fmm.modes.uniform_modes`): O(n^2) instead of a full product."""
    m = v.shape[0] // 2
    d = [jnp.diagonal(v[i * m:(i + 1) * m, j * m:(j + 1) * m]) for i in (0, 1) for j in (0, 1)]
    x1, x2 = x[:m], x[m:]
    return jnp.concatenate([d[0][:, None] * x1 + d[1][:, None] * x2,
                            d[2][:, None] * x1 + d[3][:, None] * x2], axis=0)


def propagation(x):
    """S-matrix of a layer's interior: ``u_top = X u_bottom``, ``d_bottom = X d_top``."""
    d = jnp.diag(x)
    zero = jnp.zeros_like(d)
    return SMatrix(t_up=d, r_bot=zero, r_top=zero, t_dn=d)


def star(a: SMatrix, b: SMatrix) -> SMatrix:
    """Redheffer product: section a below section b (formulas in the module docstring,
    eliminating the amplitudes between them).  One LU: ``(1 - Rb Ra)^{-1} = 1 + Rb (1 -
    Ra Rb)^{-1} Ra`` with ``Ra = a.r_top``, ``Rb = b.r_bot``."""
    n = a.t_up.shape[0]
    one = jnp.eye(n, dtype=a.t_up.dtype)
    # F = (1 - Ra Rb)^{-1} applied to [Ta_up, Ra Tb_dn, Ra]
    rhs = jnp.concatenate([a.t_up, a.r_top @ b.t_dn, a.r_top], axis=1)
    g = jnp.linalg.solve(one - a.r_top @ b.r_bot, rhs)
    g_up, g_dn, f_ra = g[:, :n], g[:, n:2 * n], g[:, 2 * n:]
    # u_mid = g_up u_L + g_dn d_U;  d_mid = (1 + Rb F Ra) (Rb Ta u_L + Tb d_U)
    h = one + b.r_bot @ f_ra
    t_up = b.t_up @ g_up
    r_top = b.r_top + b.t_up @ g_dn
    r_bot = a.r_bot + a.t_dn @ (h @ (b.r_bot @ a.t_up))
    t_dn = a.t_dn @ (h @ b.t_dn)
    return SMatrix(t_up=t_up, r_bot=r_bot, r_top=r_top, t_dn=t_dn)


def propagate_above(a: SMatrix, x) -> SMatrix:
    """``star(a, propagation(x))`` in closed form (no solve)."""
    return SMatrix(t_up=x[:, None] * a.t_up, r_bot=a.r_bot,
                   r_top=x[:, None] * a.r_top * x[None, :], t_dn=a.t_dn * x[None, :])


def propagate_below(x, b: SMatrix) -> SMatrix:
    """``star(propagation(x), b)`` in closed form (no solve)."""
    return SMatrix(t_up=b.t_up * x[None, :], r_bot=x[:, None] * b.r_bot * x[None, :],
                   r_top=b.r_top, t_dn=x[:, None] * b.t_dn)


def identity(n, dtype=complex):
    one = jnp.eye(n, dtype=dtype)
    zero = jnp.zeros((n, n), dtype=dtype)
    return SMatrix(t_up=one, r_bot=zero, r_top=zero, t_dn=one)
