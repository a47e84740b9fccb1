"""Lattices, layers and shapes of the Fourier modal method, and their Fourier coefficients.

A layer is periodic in x and y with lattice vectors ``a1``, ``a2`` (m); its reciprocal
vectors ``b_i . a_j = 2 pi delta_ij``.  Harmonics ``G_mn = m b1 + n b2`` with
``|m| <= N1``, ``|n| <= N2`` (``(2 N1 + 1)(2 N2 + 1)`` of them).  The Fourier
coefficient of a cell function is ``f_G = (1/A) int_cell f(r) exp(-i G . r) d^2 r``
(``A`` the cell area), so that ``f(r) = sum_G f_G exp(i G . r)``.

Shapes are filled regions inside one cell (shapes must not overlap each other or their
periodic images).  Their indicator functions have closed-form coefficients, so the
permittivity matrices are exact, smooth functions of radius, semi-axes, centre and
period (no pixels):

* disc of radius R at c: ``chi_G = (pi R^2 / A) (2 J1(|G| R) / (|G| R)) exp(-i G . c)``;
* ellipse of semi-axes (a, b) rotated by angle alpha: the same with area ``pi a b`` and
  ``|G| R -> sqrt((a G_u)^2 + (b G_v)^2)``, ``G_u, G_v`` the components of G along the
  ellipse axes (an ellipse is a disc under a linear map);
* slit of width w along y (rectangular lattices only): ``chi_G = (w / |a1|)
  sinc(G_x w / 2) exp(-i G_x c_x)`` for the harmonics with n = 0, zero otherwise.

``2 J1(x)/x = J0(x) + J2(x)`` (recurrence, M. Abramowitz & I. A. Stegun, Handbook of
Mathematical Functions, 9.1.27) is evaluated from Bessel's integral
``J_n(x) = (1/2 pi) int_0^{2 pi} cos(n t - x sin t) dt`` (ibid. 9.1.21) by the trapezoid
rule, which for this periodic, entire integrand is exact up to the aliased terms
``J_{K-n}(x)`` (K nodes): below 1e-15 for ``x < 180`` at K = 256.  Written in jax.numpy,
so derivatives are exact.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np

jax.config.update("jax_enable_x64", True)

_BESSEL_NODES = 256


def _pytree(cls, data):
    return jax.tree_util.register_dataclass(cls, data_fields=data, meta_fields=[])


# --------------------------------------------------------------------------- Bessel
def bessel_j(n, x, nodes=_BESSEL_NODES):
    """``J_n(x)`` for integer ``n >= 0`` and real ``x`` (any shape), JAX-traceable.

    Trapezoid rule on Bessel's integral (module docstring); accurate to ~1e-15 absolute
    for ``|x| < 180`` at the default 256 nodes.
    """
    x = jnp.asarray(x, dtype=float)
    t = 2.0 * np.pi * np.arange(nodes) / nodes
    return jnp.mean(jnp.cos(n * t - x[..., None] * jnp.sin(t)), axis=-1)


def bessel_j1(x):
    """``J_1(x)`` (real x), JAX-traceable; see :func:`bessel_j`."""
    return bessel_j(1, x)


def airy_amplitude(x):
    """``2 J1(x) / x`` (value 1 at x = 0), as ``J0(x) + J2(x)`` so nothing is divided."""
    x = jnp.asarray(x, dtype=float)
    t = 2.0 * np.pi * np.arange(_BESSEL_NODES) / _BESSEL_NODES
    ph = x[..., None] * jnp.sin(t)
    return jnp.mean(jnp.cos(ph) + jnp.cos(2.0 * t - ph), axis=-1)


# --------------------------------------------------------------------------- lattice
@partial(_pytree, data=["a1", "a2"])
@dataclass(frozen=True)
class Lattice:
    """Two lattice vectors in the xy plane (m): square ``a1 = (P, 0), a2 = (0, P)``;
    hexagonal ``a1 = (P, 0), a2 = (P/2, P sqrt(3)/2)``."""

    a1: tuple
    a2: tuple

    def vectors(self):
        return jnp.asarray(self.a1, dtype=float), jnp.asarray(self.a2, dtype=float)

    def area(self):
        a1, a2 = self.vectors()
        return jnp.abs(a1[0] * a2[1] - a1[1] * a2[0])

    def reciprocal(self):
        """``(b1, b2)`` with ``b_i . a_j = 2 pi delta_ij`` (1/m)."""
        a1, a2 = self.vectors()
        det = a1[0] * a2[1] - a1[1] * a2[0]
        b1 = 2.0 * np.pi * jnp.stack([a2[1], -a2[0]]) / det
        b2 = 2.0 * np.pi * jnp.stack([-a1[1], a1[0]]) / det
        return b1, b2


def square_lattice(period):
    return Lattice(a1=(period, 0.0), a2=(0.0, period))


def hexagonal_lattice(period):
    return Lattice(a1=(period, 0.0), a2=(0.5 * period, np.sqrt(3.0) / 2.0 * period))


# --------------------------------------------------------------------------- shapes
@partial(_pytree, data=["center", "radius"])
@dataclass(frozen=True)
class Circle:
    """Disc of ``radius`` (m) centred at ``center = (x, y)`` (m)."""

    center: tuple
    radius: float


@partial(_pytree, data=["center", "semi_axes", "angle"])
@dataclass(frozen=True)
class Ellipse:
    """Ellipse with ``semi_axes = (a, b)`` (m); the a axis makes ``angle`` (rad) with x."""

    center: tuple
    semi_axes: tuple
    angle: float = 0.0


@partial(_pytree, data=["center", "width"])
@dataclass(frozen=True)
class Slit:
    """Strip of ``width`` (m) along y, centred at x = ``center`` (m): a 1D grating.

    Needs a rectangular lattice (``a1`` along x, ``a2`` along y); then only the harmonics
    with n = 0 are non-zero and ``orders = (N, 0)`` solves the 1D problem."""

    center: float
    width: float


SHAPES = (Circle, Ellipse, Slit)


def _shape_coefficients(shape, gx, gy, area, a1x):
    """Indicator coefficients ``chi_G`` (module docstring) at reciprocal vectors (gx, gy)."""
    if isinstance(shape, Circle):
        cx, cy = shape.center
        rho = jnp.sqrt(gx**2 + gy**2) * shape.radius
        amp = np.pi * shape.radius**2 / area * airy_amplitude(rho)
        return amp * jnp.exp(-1j * (gx * cx + gy * cy))
    if isinstance(shape, Ellipse):
        cx, cy = shape.center
        a, b = shape.semi_axes
        c, s = jnp.cos(shape.angle), jnp.sin(shape.angle)
        gu = gx * c + gy * s
        gv = -gx * s + gy * c
        rho = jnp.sqrt((a * gu) ** 2 + (b * gv) ** 2)
        amp = np.pi * a * b / area * airy_amplitude(rho)
        return amp * jnp.exp(-1j * (gx * cx + gy * cy))
    if isinstance(shape, Slit):
        half = gx * shape.width / 2.0
        small = jnp.abs(half) < 1e-8
        sinc = jnp.where(small, 1.0 - half**2 / 6.0,
                         jnp.sin(jnp.where(small, 1.0, half)) / jnp.where(small, 1.0, half))
        val = shape.width / jnp.abs(a1x) * sinc * jnp.exp(-1j * gx * shape.center)
        return jnp.where(jnp.abs(gy) < 1e-9 * jnp.max(jnp.abs(gx)) + 1e-30, val, 0.0)
    raise TypeError(f"unknown shape {type(shape).__name__}")


# --------------------------------------------------------------------------- layers
@partial(_pytree, data=["thickness", "eps"])
@dataclass(frozen=True)
class UniformLayer:
    """Homogeneous layer: ``thickness`` (m), relative permittivity ``eps`` (complex)."""

    thickness: float
    eps: complex


@partial(_pytree, data=["thickness", "eps_background", "shapes", "eps_shapes"])
@dataclass(frozen=True)
class PatternedLayer:
    """Layer of permittivity ``eps_background`` with inclusions ``shapes`` (tuple of
    :class:`Circle` / :class:`Ellipse` / :class:`Slit`) of permittivities ``eps_shapes``
    (one per shape; 1.0 for holes)."""

    thickness: float
    eps_background: complex
    shapes: tuple
    eps_shapes: tuple


# --------------------------------------------------------------------------- harmonics
def harmonic_indices(orders):
    """Integer pairs (m, n), ``|m| <= N1``, ``|n| <= N2`` (``orders`` = N or (N1, N2)).

    Returns ``(m, n)`` as numpy int arrays of length ``(2 N1 + 1)(2 N2 + 1)``; the order
    (0, 0) sits in the middle (index ``len // 2``)."""
    n1, n2 = _orders_pair(orders)
    mm, nn = np.meshgrid(np.arange(-n1, n1 + 1), np.arange(-n2, n2 + 1), indexing="ij")
    return mm.ravel(), nn.ravel()


def _orders_pair(orders):
    if isinstance(orders, (tuple, list)):
        n1, n2 = (int(o) for o in orders)
    else:
        n1 = n2 = int(orders)
    if n1 < 0 or n2 < 0:
        raise ValueError(f"orders must be >= 0, got {orders!r}")
    return n1, n2


def convolution_matrix(coeff_fn, lattice, orders):
    """Toeplitz matrix ``C_ij = f_{G_i - G_j}`` of a cell function with coefficients
    ``coeff_fn(gx, gy)`` over the harmonics of :func:`harmonic_indices`."""
    m, n = harmonic_indices(orders)
    dm = m[:, None] - m[None, :]
    dn = n[:, None] - n[None, :]
    b1, b2 = lattice.reciprocal()
    gx = dm * b1[0] + dn * b2[0]
    gy = dm * b1[1] + dn * b2[1]
    return coeff_fn(gx, gy)


def permittivity_coefficients(layer: PatternedLayer, lattice: Lattice, inverse=False):
    """``coeff(gx, gy)`` of eps (or of 1/eps with ``inverse=True``) of a patterned layer:
    ``f_b delta_G0 + sum_s (f_s - f_b) chi_s(G)`` with ``f = eps`` or ``1/eps``."""
    area = lattice.area()
    a1x = jnp.asarray(lattice.a1, dtype=float)[0]
    eb = jnp.asarray(layer.eps_background, dtype=complex)
    fb = 1.0 / eb if inverse else eb

    def coeff(gx, gy):
        zero = (jnp.abs(gx) + jnp.abs(gy)) == 0.0
        out = jnp.where(zero, fb, 0.0 + 0.0j)
        for shape, es in zip(layer.shapes, layer.eps_shapes):
            es = jnp.asarray(es, dtype=complex)
            fs = 1.0 / es if inverse else es
            out = out + (fs - fb) * _shape_coefficients(shape, gx, gy, area, a1x)
        return out

    return coeff


# --------------------------------------------------------------------------- normal field
def _shape_normal(shape, dx, dy):
    """Level value (negative inside, ~distance outside) and unnormalised normal of one
    shape at displacements (dx, dy) from its centre."""
    if isinstance(shape, Circle):
        r = jnp.sqrt(dx**2 + dy**2)
        return jnp.abs(r - shape.radius), dx, dy
    if isinstance(shape, Ellipse):
        a, b = shape.semi_axes
        c, s = jnp.cos(shape.angle), jnp.sin(shape.angle)
        u = dx * c + dy * s
        v = -dx * s + dy * c
        rho = jnp.sqrt((u / a) ** 2 + (v / b) ** 2)
        # gradient of the level function (u/a)^2 + (v/b)^2, back in x, y
        nu, nv = u / a**2, v / b**2
        return jnp.abs(rho - 1.0) * jnp.minimum(a, b), nu * c - nv * s, nu * s + nv * c
    if isinstance(shape, Slit):
        return jnp.abs(jnp.abs(dx) - shape.width / 2.0), jnp.ones_like(dx), jnp.zeros_like(dy)
    raise TypeError(f"unknown shape {type(shape).__name__}")


def normal_field_matrices(layer: PatternedLayer, lattice: Lattice, orders, samples):
    """Toeplitz matrices of ``n_x n_x``, ``n_x n_y``, ``n_y n_y`` for a unit vector field
    n(r) normal to the shape edges (P. Götz, T. Schuster, K. Frenner, S. Rafler, W. Osten,
    Opt. Express 16, 17295 (2008); T. Schuster et al., J. Opt. Soc. Am. A 24, 2880
    (2007)).

    At each of ``samples x samples`` points of the cell the field of the nearest shape
    edge is used: radial about a disc's centre, along the gradient of ``(u/a)^2 +
    (v/b)^2`` for an ellipse (normal on its edge), x for a slit.  Coefficients by FFT.
    Only ``n n^T`` enters, so the sign of n is irrelevant.  At a shape's centre, where the
    field has no direction, the sample is given n = x (one point; its weight 1/samples^2).
    """
    a1, a2 = lattice.vectors()
    u = (np.arange(samples) + 0.5) / samples
    uu, vv = np.meshgrid(u, u, indexing="ij")
    best = None
    for shape in layer.shapes:
        cx, cy = (shape.center, 0.0) if isinstance(shape, Slit) else shape.center
        for i1 in (-1, 0, 1):
            for i2 in (-1, 0, 1):
                px = (uu + i1) * a1[0] + (vv + i2) * a2[0]
                py = (uu + i1) * a1[1] + (vv + i2) * a2[1]
                dist, nx, ny = _shape_normal(shape, px - cx, py - cy)
                if best is None:
                    best = (dist, nx, ny)
                else:
                    take = dist < best[0]
                    best = (jnp.where(take, dist, best[0]), jnp.where(take, nx, best[1]),
                            jnp.where(take, ny, best[2]))
    _, nx, ny = best
    norm2 = nx**2 + ny**2
    degenerate = norm2 < 1e-30
    safe = jnp.where(degenerate, 1.0, norm2)
    nxx = jnp.where(degenerate, 1.0, nx**2 / safe)
    nxy = jnp.where(degenerate, 0.0, nx * ny / safe)
    nyy = jnp.where(degenerate, 0.0, ny**2 / safe)
    m, n = harmonic_indices(orders)
    dm = (m[:, None] - m[None, :]) % samples
    dn = (n[:, None] - n[None, :]) % samples
    # sample points sit at fractional (u, v) = ((i + 1/2)/S, (j + 1/2)/S): the FFT of
    # f(u, v) over these points gives coefficients of exp(i 2 pi (m u + n v)) up to the
    # half-cell shift phase exp(-i pi (m + n) / S)
    dmi = m[:, None] - m[None, :]
    dni = n[:, None] - n[None, :]
    shift = np.exp(-1j * np.pi * (dmi + dni) / samples)

    def toeplitz(f):
        c = jnp.fft.fft2(f) / samples**2
        return c[dm, dn] * shift

    return toeplitz(nxx), toeplitz(nxy), toeplitz(nyy)
