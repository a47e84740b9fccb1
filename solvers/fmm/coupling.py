"""Electron coupling integrated in closed form through a solved 2D-periodic stack.

The electron moves on the straight line ``r(s) = r_c + s s_hat`` (``s_hat =
direction / |direction|``, ``s_z != 0``) through ``r_c = (x, y, z_ref)``; the coupling is

    I = int E(r(s)) . s_hat exp(-i w s / v) ds          [V]

(peak-amplitude fields, ``exp(-i w t)``; the phase is referred to s = 0 at r_c).  With
``z`` as variable, ``s = (z - z_ref)/s_z``, ``ds = dz/|s_z|`` and the lateral position
``r_par(z) = (x, y) + t (z - z_ref)``, ``t = s_par / s_z``.  In a layer, harmonic g of a
mode with normalized wavenumber q contributes

    c exp(i k_g . (x, y)) exp(+-i k0 q (z - z_ref')) exp(i alpha_g (z - z_ref)),
    alpha_g = k_g . t - w / (v s_z),

an exponential in z, so its integral over the layer is closed form,
``int_0^d exp(i beta s) ds = (exp(i beta d) - 1)/(i beta)`` (series near beta d = 0).
The semi-infinite outer media give ``-1/(i beta)`` above the stack and ``+1/(i beta)``
below it: exact for decaying waves and, for propagating ones, the limit of a field
switched off adiabatically far from the stack (``exp(-eta |z|)``, ``eta -> 0+``), the
convention of :func:`solvers.layers.coupling_normal` and :mod:`solvers.coupling`.  A
propagating order that keeps phase with the electron (beta = 0, Cherenkov condition in
an outer medium) makes the integral diverge.  Nothing is sampled along z.

The result is a sum over harmonics ``I(x, y) = sum_g I_g``, and moving the path sideways
by delta multiplies ``I_g`` by ``exp(i k_g . delta)``: maps over the unit cell and
averages over an electron spot come from one evaluation (:func:`harmonic_couplings`).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np

from .solve import FMMSolution


def _int_exp(beta, d):
    """``int_0^d exp(i beta s) ds`` for Im(beta) >= 0, stable as ``beta d -> 0``."""
    w = 1j * beta * d
    small = jnp.abs(w) < 1e-3
    bs = jnp.where(small, 1.0, beta)
    exact = (jnp.exp(1j * bs * d) - 1.0) / (1j * bs)
    series = d * (1.0 + w / 2.0 + w**2 / 6.0 + w**3 / 24.0)
    return jnp.where(small, series, exact)


def _unit(direction):
    s = jnp.asarray(direction, dtype=float)
    return s / jnp.linalg.norm(s)


def _mode_projection(mode, sx, sy, sz, m):
    """``s_hat . E`` of each up-going mode per harmonic (M, 2M), and the same for the
    down-going modes (E_t unchanged, E_z sign-flipped)."""
    wx, wy = mode.w[:m], mode.w[m:]
    up = sx * wx + sy * wy + sz * mode.ez
    dn = sx * wx + sy * wy - sz * mode.ez
    return up, dn


def default_z_ref(sol: FMMSolution):
    """Middle of the patterned/uniform stack: where the path crosses the point (x, y)."""
    return 0.5 * sol.z_top


@partial(jax.jit, static_argnames=())
def harmonic_couplings(sol: FMMSolution, point, direction, velocity, z_ref):
    """Per-harmonic contributions ``I_g`` (M,) [V] of the path through ``(x, y, z_ref)``;
    ``I = sum_g I_g`` (module docstring)."""
    sx, sy, sz = _unit(direction)
    x, y = jnp.asarray(point[0], dtype=float), jnp.asarray(point[1], dtype=float)
    z_ref = jnp.asarray(z_ref, dtype=float)
    k0 = sol.k0
    kxp, kyp = sol.kx * k0, sol.ky * k0           # physical (1/m)
    m = kxp.shape[0]
    kappa = k0 * 299792458.0 / (jnp.asarray(velocity, dtype=float) * sz)
    alpha = (kxp * sx + kyp * sy) / sz - kappa     # (M,)
    lateral = jnp.exp(1j * (kxp * x + kyp * y)) / jnp.abs(sz)
    total = jnp.zeros(m, dtype=complex)

    def layer_terms(mode, kind):
        proj_up, proj_dn = _mode_projection(mode, sx, sy, sz, m)
        kq = k0 * mode.q                           # (2M,)
        zb = mode.z_bottom
        zt = zb + mode.thickness
        a = alpha[:, None]
        if kind == "layer":
            # up: exp(i kq (z - zb)) exp(i alpha (z - z_ref)), z in [zb, zt]
            f_up = jnp.exp(1j * a * (zb - z_ref)) * _int_exp(kq[None, :] + a, mode.thickness)
            # down: exp(i kq (zt - z)) ..., s' = zt - z in [0, d]
            f_dn = jnp.exp(1j * a * (zt - z_ref)) * _int_exp(kq[None, :] - a, mode.thickness)
        elif kind == "above":
            f_up = jnp.exp(1j * a * (zb - z_ref)) * (-1.0 / (1j * (kq[None, :] + a)))
            f_dn = jnp.exp(1j * a * (zb - z_ref)) * (-1.0 / (1j * (a - kq[None, :])))
        else:  # below, both referenced at z = zb (= 0), integrated over z < zb
            f_up = jnp.exp(1j * a * (zb - z_ref)) * (1.0 / (1j * (kq[None, :] + a)))
            f_dn = jnp.exp(1j * a * (zb - z_ref)) * (1.0 / (1j * (a - kq[None, :])))
        return (proj_up * f_up) @ mode.up + (proj_dn * f_dn) @ mode.down

    total = total + layer_terms(sol.below, "below")
    for mode in sol.layers:
        total = total + layer_terms(mode, "layer")
    total = total + layer_terms(sol.above, "above")
    return total * lateral


def coupling_integral(sol: FMMSolution, point=(0.0, 0.0), direction=(0.0, 0.0, 1.0),
                      velocity=None, z_ref=None):
    """Coupling integral I [V] of an electron at ``velocity`` (m/s) moving along
    ``direction`` (any length, ``s_z != 0``) through ``(x, y) = point`` (m) at height
    ``z_ref`` (m; default the middle of the stack, :func:`default_z_ref`).

    Closed form along the whole line, outer media included (module docstring).
    """
    if velocity is None:
        raise ValueError("velocity (m/s) is required")
    z_ref = default_z_ref(sol) if z_ref is None else z_ref
    return jnp.sum(harmonic_couplings(sol, point, direction, velocity, z_ref))


@partial(jax.tree_util.register_dataclass,
         data_fields=["mean_abs", "rms_abs", "coherent", "centre"], meta_fields=[])
@dataclass(frozen=True)
class SpotCoupling:
    """Coupling over a Gaussian electron spot [V].

    Electrons at different lateral positions are mutually incoherent: each one sees its
    own ``I(r)`` and the measured PINEM spectrum is the current-weighted average of the
    single-electron spectra ``P_l = J_l(2 |beta_c(r)|)^2``.  Hence the figures that an
    experiment sees are moments of ``|I(r)|`` over the current density:
    ``mean_abs = <|I|>`` and ``rms_abs = sqrt(<|I|^2>)`` (the second fixes the spectrum's
    second moment, ``sum_l l^2 P_l = 2 <|beta_c|^2>``).  ``coherent = <I>`` (the complex
    average) is what a coherent superposition would give; it averages the incident
    wave's phase away for spots wider than ~1/k_par and is reported for completeness.
    ``centre`` = I at the spot centre.
    """

    mean_abs: jax.Array
    rms_abs: jax.Array
    coherent: jax.Array
    centre: jax.Array


@partial(jax.jit, static_argnames=("samples",))
def _spot(sol, point, direction, velocity, z_ref, fwhm, samples):
    ig = harmonic_couplings(sol, point, direction, velocity, z_ref)
    k0 = sol.k0
    kxp, kyp = sol.kx * k0, sol.ky * k0
    sigma = jnp.asarray(fwhm, dtype=float) / (2.0 * np.sqrt(2.0 * np.log(2.0)))
    m = ig.shape[0]
    g0 = m // 2
    # |I(r)| is periodic; sample it on the cell (fractional coordinates), take its Fourier
    # coefficients f_G by FFT and weight them with the Gaussian's characteristic function:
    # <f> = sum_G f_G exp(i G . r_c) exp(-|G|^2 sigma^2 / 2)  (r_c = spot centre).
    a1, a2 = sol.lattice.vectors()
    u = jnp.arange(samples) / samples
    uu, vv = jnp.meshgrid(u, u, indexing="ij")
    dx = uu * a1[0] + vv * a2[0]
    dy = uu * a1[1] + vv * a2[1]
    gx, gy = kxp - kxp[g0], kyp - kyp[g0]          # reciprocal vectors of the harmonics
    phase = jnp.exp(1j * (gx[:, None, None] * dx + gy[:, None, None] * dy))
    field = jnp.tensordot(ig, phase, axes=(0, 0))  # I(r_c + delta) / exp(i k_par . delta)
    b1, b2 = sol.lattice.reciprocal()
    kk = jnp.fft.fftfreq(samples, 1.0 / samples)
    k1, k2 = jnp.meshgrid(kk, kk, indexing="ij")
    gxs = k1 * b1[0] + k2 * b2[0]
    gys = k1 * b1[1] + k2 * b2[1]
    weight = jnp.exp(-0.5 * sigma**2 * (gxs**2 + gys**2))

    def average(f):
        # delta = u a1 + v a2 from the spot centre: <f> = sum_G f_G exp(-|G|^2 s^2/2)
        return jnp.real(jnp.sum(jnp.fft.fft2(f) / samples**2 * weight))

    mean_abs = average(jnp.abs(field))
    rms = jnp.sqrt(average(jnp.abs(field) ** 2))
    coherent = jnp.sum(ig * jnp.exp(-0.5 * sigma**2 * (kxp**2 + kyp**2)))
    return SpotCoupling(mean_abs=mean_abs, rms_abs=rms, coherent=coherent, centre=jnp.sum(ig))


def spot_averaged_coupling(sol: FMMSolution, point=(0.0, 0.0), direction=(0.0, 0.0, 1.0),
                           velocity=None, fwhm=None, z_ref=None, samples=None):
    """Coupling averaged over a Gaussian electron spot centred at ``point`` (m) whose
    current density has full width at half maximum ``fwhm`` (m); every electron moves
    along ``direction``.  Returns :class:`SpotCoupling` (moments of |I|, see there).

    ``samples`` per lattice direction for |I(r)| over the cell (default ``max(32,
    8 (2N + 1))``); |I| is smooth except at zeros of I, so this is spectrally accurate
    for spots wider than the cell and accurate to the sampling otherwise.
    """
    if velocity is None or fwhm is None:
        raise ValueError("velocity (m/s) and fwhm (m) are required")
    z_ref = default_z_ref(sol) if z_ref is None else z_ref
    if samples is None:
        samples = max(32, 8 * (2 * max(sol.orders) + 1))
    return _spot(sol, point, direction, velocity, z_ref, fwhm, int(samples))
