"""Permittivity at the Ex and Ez points from a cell fill or a supersampled map.

Two builders, both written with ``jax.numpy`` so that gradients flow from a density
or geometry through them (they also accept plain numpy arrays):

* :func:`eps_from_cells` - permittivity given per cell (at cell centres).  Each Ex
  point lies on the face between two vertically adjacent cells, each Ez point on the
  face between two horizontally adjacent cells; the field there is tangential to
  that face, so the arithmetic mean of the two cells is used.  Exact for interfaces
  that lie on cell faces (the tangential component sees the mean).
* :func:`eps_from_fine` - permittivity on a grid ``s`` times finer along each axis
  (``s`` even).  Over the ``dx x dz`` window centred on each Ex/Ez point it uses the
  anisotropic rule of A. Farjadpour et al., Opt. Lett. 31, 2972 (2006):

      eps_jj = (1 - n_j^2) <eps> + n_j^2 <1/eps>^-1

  with n the unit normal of the interface in the window, estimated from the first
  moment of eps over the window (points toward higher eps); the off-diagonal term
  is dropped (the Yee grid stores only eps_xx and eps_zz).

Along x the map wraps periodically when ``periodic_x`` (default); along z (and x
when not periodic) the edge values are repeated.
"""

from __future__ import annotations

import jax.numpy as jnp

_TINY = 1e-30


def eps_from_cells(eps_cells, periodic_x: bool = True):
    """(eps_x, eps_z) of shape (nx, nz) from per-cell permittivity of shape (nx, nz)."""
    e = jnp.asarray(eps_cells)
    below = jnp.concatenate([e[:, :1], e[:, :-1]], axis=1)  # cell (i, k-1)
    eps_x = 0.5 * (e + below)
    if periodic_x:
        left = jnp.roll(e, 1, axis=0)
    else:
        left = jnp.concatenate([e[:1, :], e[:-1, :]], axis=0)
    eps_z = 0.5 * (e + left)
    return eps_x, eps_z


def _pad(a, s2: int, periodic_x: bool):
    a = jnp.pad(a, ((0, 0), (s2, s2)), mode="edge")
    return jnp.pad(a, ((s2, s2), (0, 0)), mode="wrap" if periodic_x else "edge")


def _window_moments(a, s: int, ox: int, oz: int, nx: int, nz: int):
    """Means of a, a*x', a*z' over s x s windows; window (i, k) starts at fine (s i + ox, s k + oz).

    x', z' are offsets from the window centre in units of the fine cell.
    """
    w = a[ox:ox + s * nx, oz:oz + s * nz].reshape(nx, s, nz, s)
    off = jnp.arange(s) - (s - 1) / 2
    mean = w.mean(axis=(1, 3))
    mx = (w * off[None, :, None, None]).mean(axis=(1, 3))
    mz = (w * off[None, None, None, :]).mean(axis=(1, 3))
    return mean, mx, mz


def eps_from_fine(eps_fine, factor: int, periodic_x: bool = True):
    """(eps_x, eps_z) from a map sampled ``factor`` times finer, shape (factor*nx, factor*nz).

    The fine sample (p, q) sits at the centre of fine cell p, q; coarse cell (i, k)
    covers fine cells [factor*i, factor*(i+1)) x [factor*k, factor*(k+1)).
    """
    s = int(factor)
    if s < 2 or s % 2:
        raise ValueError(f"supersampling factor must be even and >= 2, got {factor}")
    e = jnp.asarray(eps_fine)
    if e.ndim != 2 or e.shape[0] % s or e.shape[1] % s:
        raise ValueError(f"fine map of shape {e.shape} is not a multiple of factor {s}")
    nx, nz = e.shape[0] // s, e.shape[1] // s
    h = s // 2
    ep, ip = _pad(e, h, periodic_x), _pad(1.0 / e, h, periodic_x)

    def rule(ox, oz, normal_axis):
        mean, mx, mz = _window_moments(ep, s, ox, oz, nx, nz)
        imean = _window_moments(ip, s, ox, oz, nx, nz)[0]
        # Real part of the moment fixes the direction even for lossy media.
        mxr, mzr = jnp.real(mx), jnp.real(mz)
        nn = (mxr if normal_axis == 0 else mzr) ** 2 / (mxr**2 + mzr**2 + _TINY)
        return (1 - nn) * mean + nn / imean

    # Ex point (x centre, z node): window spans the cell in x, straddles the node in z.
    eps_x = rule(h, 0, 0)
    # Ez point (x node, z centre).
    eps_z = rule(0, h, 1)
    return eps_x, eps_z
