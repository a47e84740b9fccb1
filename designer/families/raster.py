"""Exact-area rasterization of piecewise-linear shapes onto the Yee grid, in JAX.

A sample's cross-section is described by *pieces* of material, each either

* a :class:`Trapezoid`: ``z_lo <= z <= z_hi`` and ``xl(z) <= x <= xr(z)`` with ``xl`` and
  ``xr`` linear in ``z`` (rectangles, tapered teeth, bars between slits), repeated
  with the period along x, or
* a :class:`Slab`: ``z_lo <= z <= z_hi`` across the whole width (films, half-spaces
  with an infinite end),

plus the list of *interface segments* (the true material boundaries, without the
internal seams where two pieces of the same material touch), used only for the local
interface orientation.

Fill fraction.  For each Yee point the *dual cell* is the ``dx`` x ``dz`` box centred
on it (``solvers.grid`` staggering: Ex boxes are shifted by ``dz/2`` in z, Ez boxes by
``dx/2`` in x).  The fill fraction of a trapezoid in the box ``[a, b] x [c, d]`` is

    f = 1/(dx dz) * int_{z1}^{z2} [clip(xr(z), a, b) - clip(xl(z), a, b)] dz,
    z1 = clip(z_lo, c, d),  z2 = clip(z_hi, c, d),

exact because ``clip(u, a, b)`` of a linear ``u(z)`` integrates in closed form: with
``t = (u - a)/dx``, ``int clip dz = dz_clip * (H(t2) - H(t1)) / (t2 - t1)`` where
``H(t) = int_0^t clip(s, 0, 1) ds`` is 0, ``t^2/2``, ``t - 1/2`` on the three pieces.
The overlap length ``clip(xr) - clip(xl)`` is exact whenever ``xl <= xr``.  So the
rasterized area of every shape equals its analytic area to rounding, and ``f`` is a
continuous, piecewise-smooth function of every vertex coordinate (``jax.grad`` gives
the exact derivative of the area).

Anisotropic averaging (A. Farjadpour, D. Roundy, A. Rodriguez, M. Ibanescu,
P. Bermel, J. D. Joannopoulos, S. G. Johnson, G. W. Burr, "Improving accuracy by
subpixel smoothing in the finite-difference time domain", Opt. Lett. 31, 2972, 2006):
with the fill fractions ``f_m`` of all materials in the dual cell,

    <eps> = sum_m f_m eps_m,     <1/eps> = sum_m f_m / eps_m,
    1/eps_xx = n_x^2 <1/eps> + (1 - n_x^2) / <eps>,
    1/eps_zz = n_z^2 <1/eps> + (1 - n_z^2) / <eps>,

i.e. the diagonal of their inverse-permittivity tensor ``P <1/eps> + (1 - P) <eps>^-1``
with ``P = n n^T``.  The squared normal components are the length-weighted mean over
the interface segments inside the dual cell, ``n_x^2 = sum L_s n_x,s^2 / sum L_s``:
a field component tangential to a flat interface gets the arithmetic mean, a normal
one the harmonic mean, and sloped walls interpolate smoothly.
"""

from __future__ import annotations

from functools import partial
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from solvers.grid import Grid

jax.config.update("jax_enable_x64", True)

BIG = 1.0  # metres: "infinite" ends of half-spaces (far beyond any grid we build)

# Below this |t2 - t1| (in cells) the mean of clip over [t1, t2] is taken at the
# midpoint: the error is at most |t2 - t1|/8 < 2e-9 of a cell, while the exact
# formula would lose digits to cancellation.
_SMALL_DT = 1e-8


class Trapezoid(NamedTuple):
    """``z_lo <= z <= z_hi``, ``xl <= x <= xr``; ``xl``/``xr`` linear in z between their
    values at ``z_lo`` (``*_lo``) and ``z_hi`` (``*_hi``).  Repeated with the period."""

    material: int
    z_lo: object
    z_hi: object
    xl_lo: object
    xl_hi: object
    xr_lo: object
    xr_hi: object


class Slab(NamedTuple):
    """``z_lo <= z <= z_hi`` across the whole width (use ``-BIG``/``BIG`` for ends)."""

    material: int
    z_lo: object
    z_hi: object


class Segment(NamedTuple):
    """A straight piece of material interface from (x1, z1) to (x2, z2).

    ``periodic`` segments are repeated with the period; non-periodic ones (full-width
    slab faces) are given over a span that covers the whole grid.
    """

    x1: object
    z1: object
    x2: object
    z2: object
    periodic: bool = True


class Scene(NamedTuple):
    """Pieces and interfaces of one period; ``eps[0]`` is the background medium."""

    eps: tuple
    pieces: tuple
    segments: tuple


def trapezoid_area(t: Trapezoid):
    """Analytic area (m^2) of a trapezoid piece."""
    h = t.z_hi - t.z_lo
    return 0.5 * h * ((t.xr_lo - t.xl_lo) + (t.xr_hi - t.xl_hi))


def _h(t, xp=jnp):
    return xp.where(t <= 0.0, 0.0, xp.where(t >= 1.0, t - 0.5, 0.5 * t * t))


def _mean_clip(t1, t2, xp=jnp):
    """Mean of ``clip(t, 0, 1)`` over the interval between t1 and t2 (exact)."""
    d = t2 - t1
    small = xp.abs(d) < _SMALL_DT
    d_safe = xp.where(small, 1.0, d)
    exact = (_h(t2, xp) - _h(t1, xp)) / d_safe
    mid = xp.clip(0.5 * (t1 + t2), 0.0, 1.0)
    return xp.where(small, mid, exact)


class _Boxes(NamedTuple):
    """Dual cells ``[a_i, a_i + dx] x [c_k, c_k + dz]``: a (nx,), c (nz,)."""

    a: object
    c: object
    dx: float
    dz: float


def _boxes(grid: Grid, where: str) -> _Boxes:
    xn = grid.x0 + np.arange(grid.nx) * grid.dx
    zn = grid.z0 + np.arange(grid.nz) * grid.dz
    if where == "ex":      # Ex at (x centre, z node)
        a, c = xn, zn - 0.5 * grid.dz
    elif where == "ez":    # Ez at (x node, z centre)
        a, c = xn - 0.5 * grid.dx, zn
    elif where == "cell":  # the grid cell itself (Hy point)
        a, c = xn, zn
    else:
        raise ValueError(f"where must be 'ex', 'ez' or 'cell', got {where!r}")
    return _Boxes(np.asarray(a, dtype=float), np.asarray(c, dtype=float), grid.dx, grid.dz)


_FAR = 1e3  # metres: where disabled periodic images are parked (never in a box)


def _pack(scene: Scene, xp=jnp):
    """Static structure and coordinate arrays of a scene (pieces batched by kind)."""
    n_mat = len(scene.eps)
    traps = [p for p in scene.pieces if not isinstance(p, Slab)]
    slabs = [p for p in scene.pieces if isinstance(p, Slab)]
    key = (tuple(int(p.material) for p in traps), tuple(int(p.material) for p in slabs),
           tuple(bool(s.periodic) for s in scene.segments), n_mat)

    def stack(rows, width):
        if not rows:
            return xp.zeros((0, width))
        return xp.stack([xp.stack([xp.asarray(x, dtype=float) for x in r]) for r in rows])

    t = stack([p[1:] for p in traps], 6)
    sl = stack([p[1:] for p in slabs], 2)
    sg = stack([s[:4] for s in scene.segments], 4)
    return key, (t, sl, sg)


def _onehot(materials, n_mat):
    m = np.zeros((len(materials), max(n_mat - 1, 0)))
    for i, k in enumerate(materials):
        m[i, k - 1] = 1.0
    return m


def _shifts(periodic, period):
    s = np.array([[-period, 0.0, period] if p else [0.0, _FAR, -_FAR] for p in periodic])
    return s.reshape(len(periodic), 3)


def _fills(key, arrays, grid: Grid, period: float, boxes: _Boxes, xp=jnp):
    """Fill fractions (n_mat - 1, nx, nz); ``xp`` is jax.numpy or numpy."""
    trap_mat, slab_mat, _, n_mat = key
    t, sl, _ = arrays
    out = xp.zeros((max(n_mat - 1, 0),) + grid.shape)
    c = boxes.c
    d = c + boxes.dz
    if trap_mat:
        z_lo, z_hi, xl_lo, xl_hi, xr_lo, xr_hi = (t[:, j, None] for j in range(6))
        z1 = xp.clip(z_lo, c, d)                        # (nt, nz)
        z2 = xp.clip(z_hi, c, d)
        h = z_hi - z_lo
        h_safe = xp.where(h > 0, h, 1.0)
        sl_l = (xl_hi - xl_lo) / h_safe
        sl_r = (xr_hi - xr_lo) / h_safe
        shift = _shifts([True] * len(trap_mat), period)[:, :, None, None]   # (nt, 3, 1, 1)
        a = boxes.a[None, None, :, None]
        inv = 1.0 / boxes.dx

        def t_of(x0, slope, z):
            x = (x0 + slope * (z - z_lo))[:, None, None, :]
            return (x + shift - a) * inv                # (nt, 3, nx, nz)

        frac_z = ((z2 - z1) / boxes.dz)[:, None, None, :]
        f = frac_z * (_mean_clip(t_of(xr_lo, sl_r, z1), t_of(xr_lo, sl_r, z2), xp)
                      - _mean_clip(t_of(xl_lo, sl_l, z1), t_of(xl_lo, sl_l, z2), xp))
        f = xp.sum(f, axis=1)                           # images
        out = out + xp.tensordot(_onehot(trap_mat, n_mat), f, axes=(0, 0))
    if slab_mat:
        fz = (xp.clip(sl[:, 1, None], c, d) - xp.clip(sl[:, 0, None], c, d)) / boxes.dz
        fz = xp.tensordot(_onehot(slab_mat, n_mat), fz, axes=(0, 0))    # (n_mat-1, nz)
        out = out + fz[:, None, :]
    return out


def _interval(p, dp, lo, hi):
    """t range where lo <= p + t dp <= hi (dp may be zero)."""
    zero = jnp.abs(dp) < 1e-30
    dp_safe = jnp.where(zero, 1.0, dp)
    ta = (lo - p) / dp_safe
    tb = (hi - p) / dp_safe
    inside = (p >= lo) & (p <= hi)
    t_in = jnp.where(zero, jnp.where(inside, -jnp.inf, jnp.inf), jnp.minimum(ta, tb))
    t_out = jnp.where(zero, jnp.where(inside, jnp.inf, -jnp.inf), jnp.maximum(ta, tb))
    return t_in, t_out


def _segment_weights(key, arrays, grid: Grid, period: float, boxes: _Boxes):
    """(sum_s L_s n_x,s^2, sum_s L_s) over the interface segments in each box.

    The part of a segment inside a box is found by parametric (Liang-Barsky) clipping.
    """
    periodic = key[2]
    if not periodic:
        zero = jnp.zeros(grid.shape)
        return zero, zero, zero
    sg = arrays[2]
    x1, z1, x2, z2 = (sg[:, j] for j in range(4))
    dxs, dzs = x2 - x1, z2 - z1
    length2 = dxs * dxs + dzs * dzs
    pos = length2 > 0
    l2_safe = jnp.where(pos, length2, 1.0)
    length = jnp.where(pos, jnp.sqrt(l2_safe), 0.0)
    nx2 = jnp.where(pos, dzs * dzs / l2_safe, 0.0)
    shift = _shifts(periodic, period)                  # (ng, 3)
    tz_in, tz_out = _interval(z1[:, None], dzs[:, None], boxes.c[None, :],
                              boxes.c[None, :] + boxes.dz)                 # (ng, nz)
    xs = (x1[:, None] + shift)[:, :, None]                                 # (ng, 3, 1)
    tx_in, tx_out = _interval(xs, dxs[:, None, None], boxes.a[None, None, :],
                              boxes.a[None, None, :] + boxes.dx)           # (ng, 3, nx)
    t0 = jnp.maximum(jnp.maximum(tx_in[..., None], tz_in[:, None, None, :]), 0.0)
    t1 = jnp.minimum(jnp.minimum(tx_out[..., None], tz_out[:, None, None, :]), 1.0)
    inside = jnp.sum(jnp.maximum(t1 - t0, 0.0), axis=1) * length[:, None, None]  # (ng,nx,nz)
    wx = jnp.tensordot(nx2, inside, axes=(0, 0))
    wl = jnp.sum(inside, axis=0)
    return wx, wl - wx, wl


def _average(eps, fills, n2_weight, total_weight):
    eps_arr = jnp.asarray(eps)
    f_bg = 1.0 - jnp.sum(fills, axis=0)
    mean = f_bg * eps_arr[0] + jnp.tensordot(eps_arr[1:], fills, axes=(0, 0))
    mean_inv = f_bg / eps_arr[0] + jnp.tensordot(1.0 / eps_arr[1:], fills, axes=(0, 0))
    has = total_weight > 0
    n2 = jnp.where(has, n2_weight / jnp.where(has, total_weight, 1.0), 0.0)
    inv = n2 * mean_inv + (1.0 - n2) / mean
    return 1.0 / inv


@partial(jax.jit, static_argnums=(0, 3, 4))
def _rasterize_core(key, arrays, eps, grid: Grid, period: float):
    # Ex and Ez boxes differ only by offsets: one batched computation (half the
    # program for XLA to compile) instead of two copies
    bx, bz = _boxes(grid, "ex"), _boxes(grid, "ez")
    a = jnp.stack([bx.a, bz.a])
    c = jnp.stack([bx.c, bz.c])

    def one(a, c):
        boxes = _Boxes(a, c, grid.dx, grid.dz)
        fills = _fills(key, arrays, grid, period, boxes)
        wx, wz, wl = _segment_weights(key, arrays, grid, period, boxes)
        return fills, jnp.stack([wx, wz]), wl

    fills, w, wl = jax.vmap(one)(a, c)
    eps_x = _average(eps, fills[0], w[0, 0], wl[0])
    eps_z = _average(eps, fills[1], w[1, 1], wl[1])
    return eps_x, eps_z


@partial(jax.jit, static_argnums=(0, 2, 3, 4))
def _fill_core(key, arrays, grid: Grid, period: float, where: str):
    return _fills(key, arrays, grid, period, _boxes(grid, where))


def fill_fractions(scene: Scene, grid: Grid, period: float, where: str = "cell", *,
                   backend: str = "numpy"):
    """Fill fraction of every material (index >= 1) on the dual cells of ``where``.

    ``where``: "ex" | "ez" (Yee dual cells) or "cell" (the grid cells).  Returns an
    array (n_materials - 1, nx, nz); the background fraction is ``1 - sum``.  Pieces
    of one material must not overlap (their fractions add up).  ``backend``:
    "numpy" (no compilation; for masks and checks) or "jax" (the code path of
    :func:`rasterize`, jit-compiled).
    """
    from designer.cost import check_grid

    check_grid(grid)  # refuse a grid too large for memory before allocating on it
    if backend == "jax":
        key, arrays = _pack(scene)
        return _fill_core(key, arrays, grid, float(period), where)
    key, arrays = _pack(scene, np)
    b = _boxes(grid, where)
    boxes = _Boxes(np.asarray(b.a), np.asarray(b.c), b.dx, b.dz)
    with np.errstate(all="ignore"):
        return _fills(key, arrays, grid, float(period), boxes, np)


def rasterize(scene: Scene, grid: Grid, period: float):
    """Anisotropically averaged ``(eps_x, eps_z)`` on the Yee points of ``grid``.

    Args:
      scene: pieces, interfaces and permittivities (``eps[0]`` background).
      grid: the shared Yee grid; x is one period, ``grid.size_x == period``.
      period: repetition length along x (m) for periodic pieces and segments.
    Returns:
      (eps_x, eps_z): complex JAX arrays (nx, nz) at the Ex and Ez positions.
    Formula and source: module docstring (Farjadpour et al., Opt. Lett. 31, 2972, 2006).
    Compiled once per scene structure and grid (jax.jit); traceable in the geometry.
    """
    from designer.cost import check_grid

    check_grid(grid)
    key, arrays = _pack(scene)
    eps = jnp.asarray(scene.eps, dtype=complex)
    return _rasterize_core(key, arrays, eps, grid, float(period))


def cell_material(scene: Scene, grid: Grid, period: float) -> np.ndarray:
    """Boolean (nx, nz): cells more than half filled by any non-background material."""
    fills = np.asarray(fill_fractions(scene, grid, period, "cell"))
    if fills.shape[0] == 0:
        return np.zeros(grid.shape, dtype=bool)
    return np.sum(fills, axis=0) > 0.5


def scene_polygons(scene: Scene, period: float, x_span: tuple[float, float],
                   z_span: tuple[float, float], x_cell: tuple[float, float]):
    """Polygons of a scene as ``[(vertices (n, 2) as (x, z), material index), ...]``.

    Trapezoids come once per period; a piece that pokes out of the cell ``x_cell``
    also gets its image on the other side, so every point of the cell is covered.
    Slabs become rectangles over ``x_span``, with infinite ends cut at ``z_span``.
    """
    out = []
    x_lo, x_hi = x_cell
    for piece in scene.pieces:
        if isinstance(piece, Slab):
            z_lo = max(float(piece.z_lo), z_span[0])
            z_hi = min(float(piece.z_hi), z_span[1])
            if z_hi <= z_lo:
                continue
            verts = np.array([[x_span[0], z_lo], [x_span[1], z_lo],
                              [x_span[1], z_hi], [x_span[0], z_hi]])
            out.append((verts, piece.material))
            continue
        base = np.array([[float(piece.xl_lo), float(piece.z_lo)],
                         [float(piece.xr_lo), float(piece.z_lo)],
                         [float(piece.xr_hi), float(piece.z_hi)],
                         [float(piece.xl_hi), float(piece.z_hi)]])
        for s in (-period, 0.0, period):
            verts = base + np.array([s, 0.0])
            if s == 0.0 or (verts[:, 0].max() > x_lo and verts[:, 0].min() < x_hi):
                out.append((verts, piece.material))
    return out
