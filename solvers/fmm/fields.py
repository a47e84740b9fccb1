"""Electric field of a solved 2D-periodic stack at given points (Fourier modal method).

In medium j of ``sol.media`` (below, layers bottom to top, above) harmonic g carries
``exp(i (k_x,g x + k_y,g y))`` and, with ``z_b``/``z_t`` the medium's bottom and top
(``z_t = z_b`` for the outer media, :class:`~solvers.fmm.modes.LayerModes`),

    E_t,g(z) = sum_n w_gn (u_n exp(i k0 q_n (z - z_b)) + d_n exp(i k0 q_n (z_t - z)))
    E_z,g(z) = sum_n z_gn (u_n exp(i k0 q_n (z - z_b)) - d_n exp(i k0 q_n (z_t - z)))

(peak amplitudes for the incident ``E0 = 1 V/m``, ``exp(-i w t)``).  This is the
truncated Fourier series of the field: in a patterned layer the in-plane component
normal to a hole wall jumps there, so its series rings (Gibbs) within about one
resolution length ``P / (2N + 1)`` of the wall; callers that take a maximum leave that
band out.  Nothing here is differentiated; numpy on the solved arrays.
"""

from __future__ import annotations

import numpy as np

from .solve import FMMSolution


def _np(a):
    return np.asarray(a)


def medium_bounds(sol: FMMSolution, j: int) -> tuple[float, float]:
    """(z_bottom, z_top) of medium j of ``sol.media`` (outer media: the bounding plane
    twice)."""
    mode = sol.media[j]
    zb = float(_np(mode.z_bottom))
    return zb, zb + float(_np(mode.thickness))


def harmonic_amplitudes(sol: FMMSolution, j: int, z) -> np.ndarray:
    """Fourier amplitudes ``(3, M, len(z))`` of (E_x, E_y, E_z) in medium j at heights z."""
    mode = sol.media[j]
    z = np.atleast_1d(np.asarray(z, dtype=float))
    k0 = float(_np(sol.k0))
    q, w, ez = _np(mode.q), _np(mode.w), _np(mode.ez)
    up, dn = _np(mode.up), _np(mode.down)
    zb, zt = medium_bounds(sol, j)
    m = ez.shape[0]
    e_up = np.exp(1j * k0 * q[:, None] * (z[None, :] - zb)) * up[:, None]   # (2M, Z)
    e_dn = np.exp(1j * k0 * q[:, None] * (zt - z[None, :])) * dn[:, None]
    et = w @ (e_up + e_dn)
    ezz = ez @ (e_up - e_dn)
    return np.stack([et[:m], et[m:], ezz])


def fields_on_planes(sol: FMMSolution, j: int, x, y, z) -> np.ndarray:
    """(E_x, E_y, E_z) in medium j, shape ``(3, len(z), len(x))``, at the lateral points
    ``(x[i], y[i])`` (m) of every height ``z[k]`` (m)."""
    x = np.asarray(x, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    k0 = float(_np(sol.k0))
    kx, ky = _np(sol.kx) * k0, _np(sol.ky) * k0
    amp = harmonic_amplitudes(sol, j, z)                                  # (3, M, Z)
    phase = np.exp(1j * (kx[:, None] * x[None, :] + ky[:, None] * y[None, :]))  # (M, P)
    return np.einsum("cmz,mp->czp", amp, phase)


def field_magnitude(sol: FMMSolution, j: int, x, y, z) -> np.ndarray:
    """|E| (V/m per V/m incident), shape ``(len(z), len(x))`` (see
    :func:`fields_on_planes`)."""
    e = fields_on_planes(sol, j, x, y, z)
    return np.sqrt(np.sum(np.abs(e) ** 2, axis=0))
