"""Plane-wave solution of a stack of 2D-periodic layers (Fourier modal method / RCWA).

Geometry: z is the stack normal; layers are listed bottom to top, the lowest starts at
z = 0; a homogeneous medium ``eps_below`` fills z < 0 and ``eps_above`` the space above
the top layer.  A plane wave of vacuum wavelength ``wavelength`` arrives from
``incidence = "above"`` (travelling -z) or ``"below"`` (+z) at polar angle ``theta``
(from the z axis, in the incidence medium) and azimuth ``phi`` (from x):
``k_par = sqrt(eps_in) k0 sin(theta) (cos phi, sin phi)``.  Its electric field is
``E0 (cos(psi) p + sin(psi) s)`` with ``s = (-sin phi, cos phi, 0)``, ``p = s x k_hat``
(``polarization = psi``; ``psi = 0`` is p (TM), ``pi/2`` is s (TE)), peak amplitude
``E0 = 1 V/m`` and phase zero at the origin.  For ``phi = 0`` the p and s waves are
exactly those of :mod:`solvers.layers` (same signs and phase reference).

Harmonic ``g`` carries ``exp(i (k_par + G_g) . r_par)``; the modes of each layer are
described in :mod:`solvers.fmm.modes`; layers are joined with S-matrices
(:mod:`solvers.fmm.smatrix`).  The returned :class:`FMMSolution` exposes every layer's
modes and their up/down amplitudes (the electron coupling is integrated from them in
closed form, :mod:`solvers.fmm.coupling`).

Reflectance and transmittance are ratios of the z component of the time-averaged
Poynting vector, ``S_z = Re(E_x H_y^* - E_y H_x^*)/2`` summed over the harmonics (only
propagating orders carry power in lossless outer media; R and T assume lossless outer
media).  Every quantity is a JAX function of thicknesses, permittivities, shape
parameters, lattice vectors, wavelength and angles.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np

from . import smatrix as sm
from .geometry import Lattice, PatternedLayer, UniformLayer, _orders_pair, harmonic_indices
from .modes import FACTORIZATIONS, LayerModes, patterned_matrices, patterned_modes, uniform_modes

jax.config.update("jax_enable_x64", True)

INCIDENCES = ("above", "below")


@partial(jax.tree_util.register_dataclass,
         data_fields=["lattice", "k0", "kx", "ky", "eps_below", "eps_above", "below",
                      "layers", "above", "reflectance", "transmittance",
                      "reflected_orders", "transmitted_orders", "polarization",
                      "from_above"],
         meta_fields=["orders"])
@dataclass(frozen=True)
class FMMSolution:
    """Solved stack.

    ``kx, ky`` (M,): tangential wavenumbers of the harmonics divided by ``k0 = 2 pi /
    wavelength`` (1/m); harmonic order as :func:`solvers.fmm.geometry.harmonic_indices`,
    (0, 0) at index M // 2.  ``below``, ``layers`` (tuple, bottom to top), ``above``:
    :class:`~solvers.fmm.modes.LayerModes`.  ``reflectance``, ``transmittance``: power
    fractions; ``reflected_orders``, ``transmitted_orders`` (M,): per harmonic.
    """

    lattice: Lattice
    k0: jax.Array
    kx: jax.Array
    ky: jax.Array
    eps_below: jax.Array
    eps_above: jax.Array
    below: LayerModes
    layers: tuple
    above: LayerModes
    reflectance: jax.Array
    transmittance: jax.Array
    reflected_orders: jax.Array
    transmitted_orders: jax.Array
    polarization: jax.Array
    from_above: jax.Array
    orders: tuple = (0, 0)

    @property
    def incidence(self):
        """"above" or "below" (needs a concrete solution, not a traced one)."""
        return "above" if bool(self.from_above) else "below"

    @property
    def omega(self):
        return self.k0 * 299792458.0

    @property
    def z_top(self):
        return self.above.z_bottom

    @property
    def media(self):
        """All media bottom to top: ``(below, *layers, above)``."""
        return (self.below, *self.layers, self.above)


def _polarization_angle(polarization):
    if isinstance(polarization, str):
        if polarization == "p":
            return 0.0
        if polarization == "s":
            return np.pi / 2
        raise ValueError(f"polarization must be 'p', 's' or an angle in rad, got "
                         f"{polarization!r}")
    return polarization


def default_normal_samples(orders):
    n1, n2 = _orders_pair(orders)
    need = 8 * max(n1, n2, 4)
    return int(2 ** np.ceil(np.log2(need)))


def solve(lattice: Lattice, layers, eps_below=1.0, eps_above=1.0, *, wavelength, theta=0.0,
          phi=0.0, polarization=0.0, orders=5, incidence="above", factorization="normal",
          normal_samples=None) -> FMMSolution:
    """Solve the stack for one incident plane wave (conventions in the module docstring).

    Args:
      lattice: :class:`~solvers.fmm.geometry.Lattice` (m).
      layers: sequence of :class:`UniformLayer` / :class:`PatternedLayer`, bottom to top.
      eps_below, eps_above: relative permittivities of the outer media (complex).
      wavelength: vacuum wavelength (m).
      theta, phi: polar and azimuthal angle of incidence (rad) in the incidence medium.
      polarization: angle psi (rad) between E and the p direction, or "p" / "s".
      orders: N or (N1, N2): harmonics ``|m| <= N1, |n| <= N2``.
      incidence: "above" or "below".
      factorization: "normal" (normal-vector rule, default) or "laurent".
      normal_samples: samples per lattice direction for the normal-vector field
        (default ``8 max(N, 4)`` rounded up to a power of 2).

    Returns:
      :class:`FMMSolution`.
    """
    if incidence not in INCIDENCES:
        raise ValueError(f"incidence must be one of {INCIDENCES}, got {incidence!r}")
    if factorization not in FACTORIZATIONS:
        raise ValueError(f"factorization must be one of {FACTORIZATIONS}, got "
                         f"{factorization!r}")
    layers = tuple(layers)
    for lay in layers:
        if not isinstance(lay, (UniformLayer, PatternedLayer)):
            raise TypeError(f"layers must be UniformLayer or PatternedLayer, got "
                            f"{type(lay).__name__}")
        if isinstance(lay, PatternedLayer) and len(lay.shapes) != len(lay.eps_shapes):
            raise ValueError("PatternedLayer needs one entry of eps_shapes per shape")
    orders = _orders_pair(orders)
    samples = normal_samples or default_normal_samples(orders)
    return _solve(lattice, layers, eps_below, eps_above, wavelength, theta, phi,
                  _polarization_angle(polarization), 1.0 if incidence == "above" else 0.0,
                  orders=orders,
                  factorization=factorization, samples=int(samples))


def _flux(e, h, m):
    """Per-harmonic ``Re(E_x h_y^* - E_y h_x^*)`` (proportional to S_z)."""
    return jnp.real(e[:m] * jnp.conj(h[m:]) - e[m:] * jnp.conj(h[:m]))


def _single_layer_amplitudes(media, x, u0, dtop):
    """Amplitudes of one layer between the outer media as one linear system, without
    S-matrices: ``(u, d, d0, utop)``.

    Continuity of tangential E and h at z = 0 (layer amplitudes there: ``u``, ``X d``)
    and at the top (``X u``, ``d``), with ``W = 1`` in the outer media,
    ``W (u + X d) = u0 + d0``, ``V (u - X d) = V_b (u0 - d0)``,
    ``W (X u + d) = utop + dtop``, ``V (X u - d) = V_a (utop - dtop)``; eliminating
    ``d0`` and ``utop``

        [[V + V_b W,  (V_b W - V) X ],  [[u],   [[ 2 V_b u0 ],
         [(V - V_a W) X, -(V + V_a W)]]  [d]] =  [-2 V_a dtop]]

    (``X = diag(exp(i k0 q d))``, only decaying exponentials, as in the S-matrix
    algebra).  One LU of twice the modes' size with a single right-hand side replaces
    the two interface solves with 2n right-hand sides and the matrix products of the
    star product; its reverse-mode derivative is one transposed solve and an outer
    product (instead of transposed solves and products of whole S-matrices)."""
    _, w, v, _ = media[1]
    vb, va = media[0][2], media[-1][2]
    vbw = sm.uniform_v_times(vb, w)
    vaw = sm.uniform_v_times(va, w)
    lhs = jnp.concatenate([
        jnp.concatenate([v + vbw, (vbw - v) * x[None, :]], axis=1),
        jnp.concatenate([(v - vaw) * x[None, :], -(v + vaw)], axis=1)], axis=0)
    rhs = jnp.concatenate([2.0 * (vb @ u0), -2.0 * (va @ dtop)])
    ud = jnp.linalg.solve(lhs, rhs)
    n = x.shape[0]
    u, d = ud[:n], ud[n:]
    return u, d, w @ (u + x * d) - u0, w @ (x * u + d) - dtop


@partial(jax.jit, static_argnames=("orders", "factorization", "samples"))
def _solve(lattice, layers, eps_below, eps_above, wavelength, theta, phi, psi, from_above, *,
           orders, factorization, samples):
    # the side of incidence is a traced switch (one compilation serves both sides)
    above_ = jnp.asarray(from_above, dtype=float) > 0.5
    k0 = 2.0 * np.pi / jnp.asarray(wavelength, dtype=float)
    eps_below = jnp.asarray(eps_below, dtype=complex)
    eps_above = jnp.asarray(eps_above, dtype=complex)
    eps_in = jnp.where(above_, eps_above, eps_below)
    n_in = jnp.sqrt(eps_in)
    theta = jnp.asarray(theta, dtype=float)
    phi = jnp.asarray(phi, dtype=float)
    psi = jnp.asarray(psi, dtype=float)
    kx0 = n_in * jnp.sin(theta) * jnp.cos(phi)
    ky0 = n_in * jnp.sin(theta) * jnp.sin(phi)
    mm, nn = harmonic_indices(orders)
    b1, b2 = lattice.reciprocal()
    kx = kx0 + (mm * b1[0] + nn * b2[0]) / k0
    ky = ky0 + (mm * b1[1] + nn * b2[1]) / k0
    m = kx.shape[0]
    g0 = m // 2

    # modes of every medium, bottom to top
    media = [uniform_modes(eps_below, kx, ky)]
    thick = []
    for lay in layers:
        if isinstance(lay, UniformLayer):
            media.append(uniform_modes(lay.eps, kx, ky))
        else:
            mats = patterned_matrices(lay, lattice, orders, factorization, samples)
            media.append(patterned_modes(mats, kx, ky))
        thick.append(jnp.asarray(lay.thickness, dtype=float))
    media.append(uniform_modes(eps_above, kx, ky))
    n_lay = len(layers)
    z_b = [jnp.asarray(0.0)]
    for t in thick:
        z_b.append(z_b[-1] + t)
    z_top = z_b[-1]

    xs = [jnp.exp(1j * k0 * media[j + 1][0] * thick[j]) for j in range(n_lay)]
    # incident wave (tangential E of the (0, 0) harmonic; W = 1 in the outer media)
    q_in = jnp.where(above_, media[-1][0][g0], media[0][0][g0])
    cos_t = q_in / n_in
    sign = jnp.where(above_, -1.0, 1.0)
    ex = jnp.cos(psi) * sign * jnp.cos(phi) * cos_t - jnp.sin(psi) * jnp.sin(phi)
    ey = jnp.cos(psi) * sign * jnp.sin(phi) * cos_t + jnp.sin(psi) * jnp.cos(phi)
    e_inc = jnp.zeros(2 * m, dtype=complex).at[g0].set(ex).at[m + g0].set(ey)
    zero = jnp.zeros(2 * m, dtype=complex)
    u0 = jnp.where(above_, zero, e_inc)
    dtop = jnp.where(above_, e_inc * jnp.exp(-1j * k0 * q_in * z_top), zero)

    if n_lay == 1:
        u, d, d0, utop = _single_layer_amplitudes(media, xs[0], u0, dtop)
        q, w, v, z = media[1]
        modes = [LayerModes(q=q, w=w, v=v, ez=z, up=u, down=d, z_bottom=z_b[0],
                            thickness=thick[0])]
    else:
        # S-matrices: interfaces k = 0..L between media k and k+1 (media index 0 = below);
        # pre[j]: from the medium below up to the bottom of layer j; suf[j]: from the top
        # of layer j to the medium above.  Only the response to the one incident wave is
        # needed, so the global S-matrix is never formed.
        uniform = [True] + [isinstance(lay, UniformLayer) for lay in layers] + [True]
        ints = [sm.interface(media[k][1], media[k][2], media[k + 1][1], media[k + 1][2],
                             a_identity=uniform[k], b_identity=uniform[k + 1])
                for k in range(n_lay + 1)]
        pre = [ints[0]]
        for j in range(1, n_lay):
            pre.append(sm.star(sm.propagate_above(pre[-1], xs[j - 1]), ints[j]))
        suf = [None] * n_lay
        if n_lay:
            suf[-1] = ints[-1]
            for j in range(n_lay - 2, -1, -1):
                suf[j] = sm.star(ints[j + 1], sm.propagate_below(xs[j + 1], suf[j + 1]))

        # amplitudes in layer j: u = Ta u0 + Ra X d,  d = Rb X u + Tb dtop  (a = pre, b = suf)
        modes = []
        one = jnp.eye(2 * m, dtype=complex)
        for j in range(n_lay):
            q, w, v, z = media[j + 1]
            x = xs[j]
            a, b = pre[j], suf[j]
            ra_x = a.r_top * x[None, :]
            rb_x = b.r_bot * x[None, :]
            tb_d = b.t_dn @ dtop
            u = jnp.linalg.solve(one - ra_x @ rb_x, a.t_up @ u0 + ra_x @ tb_d)
            d = rb_x @ u + tb_d
            modes.append(LayerModes(q=q, w=w, v=v, ez=z, up=u, down=d, z_bottom=z_b[j],
                                    thickness=thick[j]))
        if n_lay:
            d0 = ints[0].r_bot @ u0 + ints[0].t_dn @ (xs[0] * modes[0].down)
            utop = ints[-1].t_up @ (xs[-1] * modes[-1].up) + ints[-1].r_top @ dtop
        else:
            d0 = ints[0].r_bot @ u0 + ints[0].t_dn @ dtop
            utop = ints[0].t_up @ u0 + ints[0].r_top @ dtop
    qb, wb, vb, zb = media[0]
    qa, wa, va, za = media[-1]
    below = LayerModes(q=qb, w=wb, v=vb, ez=zb, up=u0, down=d0, z_bottom=jnp.asarray(0.0),
                       thickness=jnp.asarray(0.0))
    above = LayerModes(q=qa, w=wa, v=va, ez=za, up=utop, down=dtop, z_bottom=z_top,
                       thickness=jnp.asarray(0.0))

    # power balance through S_z in the outer media
    f_d0 = -_flux(d0, -(vb @ d0), m)
    f_up = _flux(utop, va @ utop, m)
    f_in_above = -_flux(dtop, -(va @ dtop), m)[g0]
    f_in_below = _flux(u0, vb @ u0, m)[g0]
    f_in = jnp.where(above_, f_in_above, f_in_below)
    refl = jnp.where(above_, f_up, f_d0) / f_in
    trans = jnp.where(above_, f_d0, f_up) / f_in
    return FMMSolution(lattice=lattice, k0=k0, kx=kx, ky=ky, eps_below=eps_below,
                       eps_above=eps_above, below=below, layers=tuple(modes), above=above,
                       reflectance=jnp.sum(refl), transmittance=jnp.sum(trans),
                       reflected_orders=refl, transmitted_orders=trans, polarization=psi,
                       from_above=above_.astype(float), orders=orders)
