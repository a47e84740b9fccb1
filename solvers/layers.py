"""Exact plane-wave solutions of planar layer stacks, and their electron coupling.

Geometry: interfaces at ``z_interfaces = (z_1 < z_2 < ... < z_M)`` (m) separate
``M + 1`` media with relative permittivities ``eps = (eps_0, ..., eps_M)``; medium 0
fills ``z < z_1`` and medium M fills ``z > z_M`` (both semi-infinite).  Structures are
invariant along y; all fields carry ``exp(i kx x)`` and time dependence ``exp(-i w t)``.

In medium j the primary tangential field (``Hy`` for p/TM, ``Ey`` for s/TE) is

    U_j(z) = a_j exp(i kz_j (z - zu_j)) + b_j exp(-i kz_j (z - zd_j)),
    kz_j = sqrt(eps_j k0^2 - kx^2),  Im kz_j >= 0 (Re kz_j >= 0 when real),

with the up-going part referenced at the bottom of the layer (``zu_j = z_j``) and the
down-going part at its top (``zd_j = z_{j+1}``); the outer media use ``z_1`` and
``z_M``.  Inside every layer both exponentials have modulus <= 1, so the linear system
for (a_j, b_j) is well conditioned even for thick, strongly evanescent layers (total
internal reflection, tunnelling gaps).  From Maxwell's equations (SI, mu = mu0):

    p:  Ex = kz/(w eps0 eps) (up - down),   Ez = -kx/(w eps0 eps) (up + down)
    s:  Hx = -kz/(w mu0) (up - down),       Hz =  kx/(w mu0) (up + down)

Continuity of U and of ``Y (up - down)`` with ``Y = kz/eps`` (p) or ``Y = kz`` (s) at
every interface gives the transfer conditions (M. Born & E. Wolf, *Principles of
Optics*, ch. 1.5-1.6).

Normalization: the incident wave has peak amplitude ``|E| = amplitude`` (V/m) in the
incidence medium (exactly, for real eps and real angle): ``Hy = amplitude sqrt(eps)/Z0``
for p, ``Ey = amplitude`` for s.

Coefficients (returned by :func:`solve_stack`): ``r`` and ``t`` are ratios of the
*primary field* amplitudes (Hy for p, Ey for s), taken at the interface the wave hits
first (r) and leaves from last (t).  For p the E-field transmission coefficient of
Born & Wolf is ``t * sqrt(eps_in) / sqrt(eps_out)``; ``r`` is the same for Hy and E.

Everything here is written in ``jax.numpy`` and differentiable with respect to
permittivities, interface positions (thicknesses), kx (angle) and frequency.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
from scipy import constants as sc

jax.config.update("jax_enable_x64", True)

EPS0 = sc.epsilon_0
MU0 = sc.mu_0
C0 = sc.c
Z0 = float(np.sqrt(MU0 / EPS0))

_POLARIZATIONS = ("p", "s")
_INCIDENCES = ("below", "above")


# --------------------------------------------------------------------------- helpers
def kz_branch(eps, kx, k0):
    """Normal wavenumber ``kz = sqrt(eps k0^2 - kx^2)`` on the branch Im kz >= 0.

    For lossless propagating waves Im kz = 0 and the root with Re kz >= 0 is taken, so
    the ``a`` amplitudes always travel (or decay) towards +z.
    """
    arg = jnp.asarray(eps, dtype=complex) * k0**2 - jnp.asarray(kx, dtype=complex) ** 2
    root = jnp.sqrt(arg)
    return jnp.where(jnp.imag(root) < 0, -root, root)


def incident_kx(eps_incidence, omega, angle):
    """``kx = sqrt(eps_in) (omega/c) sin(angle)``, angle from the z axis (rad)."""
    return jnp.sqrt(jnp.asarray(eps_incidence, dtype=complex)) * (omega / C0) * jnp.sin(angle)


def _expm1_over(w, d):
    """``(exp(w d) - 1) / w`` for Re(w d) <= 0, stable as ``w d -> 0`` (limit ``d``).

    This is ``int_0^d exp(w s) ds``.
    """
    wd = w * d
    small = jnp.abs(wd) < 1e-3
    w_safe = jnp.where(small, 1.0, w)
    exact = (jnp.exp(w_safe * d) - 1.0) / w_safe
    series = d * (1.0 + wd / 2.0 + wd**2 / 6.0 + wd**3 / 24.0)
    return jnp.where(small, series, exact)


# --------------------------------------------------------------------------- solution
@partial(
    jax.tree_util.register_dataclass,
    data_fields=["eps", "z_interfaces", "omega", "kx", "kz", "a", "b", "r", "t"],
    meta_fields=["polarization", "incidence"],
)
@dataclass(frozen=True)
class StackSolution:
    """Plane-wave solution of a layer stack (see the module docstring for the form).

    ``a``, ``b``, ``kz``, ``eps`` have one entry per medium (M + 1), ``z_interfaces`` M.
    ``r`` and ``t`` are primary-field amplitude ratios (Hy for p, Ey for s).
    """

    eps: jax.Array
    z_interfaces: jax.Array
    omega: jax.Array
    kx: jax.Array
    kz: jax.Array
    a: jax.Array
    b: jax.Array
    r: jax.Array
    t: jax.Array
    polarization: str = field(default="p")
    incidence: str = field(default="below")


def _references(z_interfaces):
    """Reference planes (zu_j, zd_j) of the up- and down-going parts in each medium."""
    z = jnp.asarray(z_interfaces, dtype=float)
    if z.shape[0] == 0:
        zero = jnp.zeros(1)
        return zero, zero
    zu = jnp.concatenate([z[:1], z])
    zd = jnp.concatenate([z, z[-1:]])
    return zu, zd


def solve_stack(eps, z_interfaces, omega, kx, *, polarization="p", incidence="below",
                amplitude=1.0):
    """Solve the stack for one plane wave of tangential wavenumber ``kx``.

    Args:
      eps: (M+1,) complex relative permittivities, bottom medium first.
      z_interfaces: (M,) increasing interface positions (m); M may be 0.
      omega: angular frequency (rad/s).
      kx: tangential wavenumber (1/m), e.g. from :func:`incident_kx`.
      polarization: "p" (TM: Ex, Ez, Hy; couples to the electron) or "s" (TE).
      incidence: "below" (wave travelling +z in medium 0) or "above" (travelling -z in
        medium M).
      amplitude: peak |E| of the incident wave in its medium (V/m).

    Returns:
      :class:`StackSolution`.  From below: ``r = b_0/a_0``, ``t = a_M/a_0``; from
      above: ``r = a_M/b_M``, ``t = b_0/b_M`` (primary-field ratios).

    Source: transfer conditions of Born & Wolf, *Principles of Optics*, ch. 1.6.
    """
    if polarization not in _POLARIZATIONS:
        raise ValueError(f"polarization must be one of {_POLARIZATIONS}, got {polarization!r}")
    if incidence not in _INCIDENCES:
        raise ValueError(f"incidence must be one of {_INCIDENCES}, got {incidence!r}")
    eps = jnp.atleast_1d(jnp.asarray(eps, dtype=complex))
    zi = jnp.atleast_1d(jnp.asarray(z_interfaces, dtype=float))
    if eps.shape[0] != zi.shape[0] + 1:
        raise ValueError(f"need len(eps) = len(z_interfaces) + 1, got {eps.shape[0]} and "
                         f"{zi.shape[0]}")
    return _solve_stack(eps, zi, jnp.asarray(omega, dtype=float), jnp.asarray(kx, dtype=complex),
                        jnp.asarray(amplitude, dtype=float), polarization, incidence)


@partial(jax.jit, static_argnums=(5, 6))
def _solve_stack(eps, zi, omega, kx, amplitude, polarization, incidence):
    n_int = zi.shape[0]
    k0 = omega / C0
    kx = jnp.asarray(kx, dtype=complex)
    kz = kz_branch(eps, kx, k0)
    y = kz / (eps * k0) if polarization == "p" else kz / k0  # scaled by 1/k0 for conditioning
    inc_eps = eps[0] if incidence == "below" else eps[-1]
    u_inc = amplitude * (jnp.sqrt(inc_eps) / Z0 if polarization == "p" else 1.0 + 0j)

    if n_int == 0:
        a = jnp.where(incidence == "below", u_inc, 0.0) * jnp.ones(1, dtype=complex)
        b = jnp.where(incidence == "above", u_inc, 0.0) * jnp.ones(1, dtype=complex)
        return StackSolution(eps, zi, jnp.asarray(omega, dtype=float), kx, kz, a, b,
                             jnp.asarray(0.0 + 0j), jnp.asarray(1.0 + 0j),
                             polarization, incidence)

    thick = jnp.diff(zi)
    # p_j = exp(i kz_j d_j) for the finite layers; the outer media have p = 1.
    phase = jnp.concatenate([jnp.ones(1, complex), jnp.exp(1j * kz[1:-1] * thick),
                             jnp.ones(1, complex)])
    n_unk = 2 * (n_int + 1)
    # interface j (1..M) between media j-1 and j, unknowns (a_{j-1}, b_{j-1}, a_j, b_j):
    #   a_{j-1} p_{j-1} + b_{j-1} - a_j - b_j p_j = 0
    #   Y_{j-1} (a_{j-1} p_{j-1} - b_{j-1}) - Y_j (a_j - b_j p_j) = 0
    pl, pu = phase[:-1], phase[1:]
    yl, yu = y[:-1], y[1:]
    one = jnp.ones_like(pl)
    blocks = jnp.stack([jnp.stack([pl, one, -one, -pu], axis=-1),
                        jnp.stack([yl * pl, -yl, -yu, yu * pu], axis=-1)], axis=1)  # (M,2,4)
    jj = np.arange(n_int)
    rows = (2 * jj[:, None, None] + np.arange(2)[None, :, None]) * np.ones((1, 1, 4), int)
    cols = (2 * jj[:, None, None] + np.arange(4)[None, None, :]) * np.ones((1, 2, 1), int)
    mat = jnp.zeros((n_unk, n_unk), dtype=complex).at[rows, cols].set(blocks)
    # incident amplitude given, nothing incoming from the other side
    last = n_unk - 1
    mat = mat.at[n_unk - 2, 0].set(1.0).at[last, last].set(1.0)
    rhs = jnp.zeros(n_unk, dtype=complex)
    # the incident wave has phase zero at the origin (z = 0), as in the FDFD source;
    # amplitudes are referenced to the outer interfaces, so shift the phase there
    if incidence == "below":
        rhs = rhs.at[n_unk - 2].set(u_inc * jnp.exp(1j * kz[0] * zi[0]))
    else:
        rhs = rhs.at[last].set(u_inc * jnp.exp(-1j * kz[-1] * zi[-1]))
    sol = jnp.linalg.solve(mat, rhs)
    a, b = sol[0::2], sol[1::2]
    if incidence == "below":
        r, t = b[0] / a[0], a[-1] / a[0]
    else:
        r, t = a[-1] / b[-1], b[0] / b[-1]
    return StackSolution(eps, zi, jnp.asarray(omega, dtype=float), kx, kz, a, b, r, t,
                         polarization, incidence)


def solve_plane_wave(eps, z_interfaces, omega, angle, *, polarization="p",
                     incidence="below", amplitude=1.0):
    """:func:`solve_stack` for a plane wave at ``angle`` (rad) from the z axis.

    The angle is measured in the incidence medium (medium 0 from below, medium M from
    above); positive angles give kx > 0.
    """
    eps = jnp.atleast_1d(jnp.asarray(eps, dtype=complex))
    inc_eps = eps[0] if incidence == "below" else eps[-1]
    kx = incident_kx(inc_eps, omega, angle)
    return solve_stack(eps, z_interfaces, omega, kx, polarization=polarization,
                       incidence=incidence, amplitude=amplitude)


def reflectance_transmittance(sol: StackSolution):
    """Power reflectance R and transmittance T (z-components of the Poynting vector).

    ``T = Re(Y_out)/Re(Y_in) |t|^2`` with ``Y = kz/eps`` (p) or ``kz`` (s);
    ``R = |r|^2``.  For lossless media R + T = 1 (Born & Wolf ch. 1.5.3).
    """
    eps, kz = sol.eps, sol.kz
    y = kz / eps if sol.polarization == "p" else kz
    y_in, y_out = (y[0], y[-1]) if sol.incidence == "below" else (y[-1], y[0])
    return jnp.abs(sol.r) ** 2, jnp.real(y_out) / jnp.real(y_in) * jnp.abs(sol.t) ** 2


# --------------------------------------------------------------------------- fields
def _layer_index(z_interfaces, z):
    return jnp.searchsorted(z_interfaces, z, side="right")


def _up_down(sol: StackSolution, z):
    """Up- and down-going parts of the primary field at z, and the layer index."""
    z = jnp.asarray(z, dtype=float)
    j = _layer_index(sol.z_interfaces, z)
    zu, zd = _references(sol.z_interfaces)
    kz = sol.kz[j]
    up = sol.a[j] * jnp.exp(1j * kz * (z - zu[j]))
    down = sol.b[j] * jnp.exp(-1j * kz * (z - zd[j]))
    return up, down, j


@jax.jit
def stack_fields(sol: StackSolution, x, z):
    """Fields at points (x, z) (broadcast together), SI units.

    Returns ``(Ex, Ez, Hy)`` for p and ``(Ey, Hx, Hz)`` for s (formulas in the module
    docstring), each multiplied by ``exp(i kx x)``.  A point exactly on an interface
    belongs to the medium above it.
    """
    x, z = jnp.broadcast_arrays(jnp.asarray(x, dtype=float), jnp.asarray(z, dtype=float))
    up, down, j = _up_down(sol, z)
    bloch = jnp.exp(1j * sol.kx * x)
    kz, eps = sol.kz[j], sol.eps[j]
    w = sol.omega
    if sol.polarization == "p":
        hy = (up + down) * bloch
        ex = kz / (w * EPS0 * eps) * (up - down) * bloch
        ez = -sol.kx / (w * EPS0 * eps) * (up + down) * bloch
        return ex, ez, hy
    ey = (up + down) * bloch
    hx = -kz / (w * MU0) * (up - down) * bloch
    hz = sol.kx / (w * MU0) * (up + down) * bloch
    return ey, hx, hz


# --------------------------------------------------------------------------- coupling
@jax.jit
def coupling_normal(sol: StackSolution, x, velocity):
    """Coupling integral of an electron moving along +z through the whole stack.

    ``I(x) = int_{-inf}^{inf} Ez(x, z) exp(-i w z / v) dz``  [V], evaluated exactly:
    each up/down plane-wave piece ``c exp(+-i kz z)`` is integrated analytically over
    its layer, ``int_{lo}^{hi} exp(i q z) dz`` with ``q = +-kz - w/v``.  The
    semi-infinite media contribute ``int_{z_M}^{inf} exp(i q (z-z_M)) dz = -1/(i q)``
    and ``int_{-inf}^{z_1} exp(i q (z-z_1)) dz = 1/(i q)``: exact for evanescent
    pieces, and for propagating ones the limit of a field switched off
    adiabatically (factor exp(-eta |z|), eta -> 0+) far from the stack.  A phase-matched
    propagating piece in an outer medium (q = 0, Cherenkov condition) diverges.

    Only p polarization has Ez.  ``x`` may be an array (the result broadcasts).
    """
    if sol.polarization != "p":
        raise ValueError("only p (TM) polarization has a field component along the path")
    kappa = sol.omega / velocity
    zu, zd = _references(sol.z_interfaces)
    zi = sol.z_interfaces
    n_med = sol.eps.shape[0]
    coef = -sol.kx / (sol.omega * EPS0 * sol.eps)  # Ez per unit Hy
    total = 0.0 + 0.0j
    for j in range(n_med):
        q_up = sol.kz[j] - kappa
        q_dn = -sol.kz[j] - kappa
        # exp(-i kappa z) = exp(-i kappa z_ref) exp(-i kappa (z - z_ref))
        if n_med == 1:
            up = -1.0 / (1j * q_up) + 1.0 / (1j * q_up)  # both tails of an empty stack
            dn = -1.0 / (1j * q_dn) + 1.0 / (1j * q_dn)
        elif j == 0:
            up = 1.0 / (1j * q_up)
            dn = 1.0 / (1j * q_dn)
        elif j == n_med - 1:
            up = -1.0 / (1j * q_up)
            dn = -1.0 / (1j * q_dn)
        else:
            d = zi[j] - zi[j - 1]
            up = _expm1_over(1j * q_up, d)     # int_0^d exp(i q s) ds, Im q >= 0
            dn = _expm1_over(-1j * q_dn, d)    # int_{-d}^0 exp(i q s) ds, Im q <= 0
        total = total + coef[j] * (sol.a[j] * jnp.exp(-1j * kappa * zu[j]) * up
                                   + sol.b[j] * jnp.exp(-1j * kappa * zd[j]) * dn)
    return total * jnp.exp(1j * sol.kx * jnp.asarray(x, dtype=float))


def detuning_integral(delta, length):
    """``int_0^L exp(i delta s) ds`` (m), stable at ``delta L -> 0`` (value L).

    For real detuning this equals ``L exp(i delta L/2) sinc(delta L/2)``.
    """
    delta = jnp.asarray(delta, dtype=complex)
    dl = delta * length
    small = jnp.abs(dl) < 1e-3
    safe = jnp.where(small, 1.0, delta)
    exact = (jnp.exp(1j * safe * length) - 1.0) / (1j * safe)
    series = length * (1.0 + 1j * dl / 2.0 - dl**2 / 6.0 - 1j * dl**3 / 24.0)
    return jnp.where(small, series, exact)


def coupling_parallel(sol: StackSolution, z, velocity, length=None, x_start=0.0):
    """Coupling of an electron moving along +x at height z (above a prism surface).

    ``I = int_{x_start}^{x_start+L} Ex(x, z) exp(-i w x / v) dx
        = Ex(0, z) exp(i (kx - w/v) x_start) int_0^L exp(i delta s) ds`` [V],
    with ``delta = kx - w/v``.  With ``length=None`` returns the per-unit-length
    complex amplitude ``Ex(0, z)`` (V/m) that the electron sees at phase matching
    (delta = 0): the gradient is ``|Ex|`` and the detuning is ``delta``.

    Returns ``(I_or_Ex, delta)``.
    """
    if sol.polarization != "p":
        raise ValueError("only p (TM) polarization has a field component along the path")
    ex, _, _ = stack_fields(sol, 0.0, z)
    delta = sol.kx - sol.omega / velocity
    if length is None:
        return ex, delta
    phase = jnp.exp(1j * delta * x_start)
    return ex * phase * detuning_integral(delta, length), delta


# --------------------------------------------------------------------------- Gaussian beams
def gaussian_beam_spectrum(eps_incidence, omega, angle0, waist, n_angles=64, cutoff=18.0):
    """Plane-wave decomposition of a 2D Gaussian beam (invariant along y).

    Convention: in the beam's own frame (u across, w along the axis) the primary field
    across the waist is ``U(u, 0) = U0 exp(-u^2 / w0^2)``: ``w0`` (``waist``) is the
    1/e^2 *intensity* radius.  Its angular spectrum is
    ``U(u, 0) = int dk_u A(k_u) exp(i k_u u)``, ``A = U0 w0/(2 sqrt(pi))
    exp(-k_u^2 w0^2/4)``.  With ``k_u = k sin(alpha)`` each component is a plane wave
    at ``angle0 + alpha`` carrying weight ``A k cos(alpha) d alpha``.

    The spectrum is sampled uniformly in alpha up to ``k_u^2 w0^2/4 = cutoff``
    (exp(-18) ~ 1.5e-8 by default), and components beyond grazing (|angle| >= 90 deg)
    are dropped, so for w0 ~< wavelength/2 the beam is only approximately Gaussian.
    With E0 = 1 V/m plane-wave components the peak field at the waist centre is
    ``sum(weights)`` (= 1 in the paraxial limit).

    Returns ``(angles, weights)`` as jax arrays (n_angles,).  Weights are real.
    """
    k = float(np.real(np.sqrt(complex(eps_incidence)))) * omega / C0
    s_max = min(1.0, 2.0 * np.sqrt(cutoff) / (k * waist))
    alpha_max = float(np.arcsin(s_max))
    lo = max(-alpha_max, -np.pi / 2 - float(angle0) + 1e-6)
    hi = min(alpha_max, np.pi / 2 - float(angle0) - 1e-6)
    alpha = jnp.linspace(lo, hi, n_angles)
    d_alpha = (hi - lo) / (n_angles - 1)
    ku = k * jnp.sin(alpha)
    wts = waist / (2.0 * np.sqrt(np.pi)) * jnp.exp(-(ku * waist) ** 2 / 4.0) * k * jnp.cos(alpha)
    # trapezoid end weights (the ends are ~exp(-cutoff) when not clipped at grazing)
    wts = wts * d_alpha * jnp.ones(n_angles).at[0].set(0.5).at[-1].set(0.5)
    return angle0 + alpha, wts


def _beam_solutions(eps, z_interfaces, omega, angles, weights, focus, polarization, incidence):
    eps = jnp.atleast_1d(jnp.asarray(eps, dtype=complex))
    zi = jnp.atleast_1d(jnp.asarray(z_interfaces, dtype=float))
    inc_eps = eps[0] if incidence == "below" else eps[-1]
    kxs = incident_kx(inc_eps, omega, angles)
    sols = jax.vmap(lambda kx: solve_stack(eps, zi, omega, kx, polarization=polarization,
                                           incidence=incidence))(kxs)
    zu, zd = _references(zi)
    xf, zf = focus
    kz_in = sols.kz[:, 0] if incidence == "below" else sols.kz[:, -1]
    # every component in phase at the focus: incident part exp(i kx (x-xf) +- i kz (z-zf))
    if incidence == "below":
        ph = jnp.exp(-1j * (kxs * xf + kz_in * (zf - zu[0])))
    else:
        ph = jnp.exp(-1j * (kxs * xf - kz_in * (zf - zd[-1])))
    return sols, weights * ph


def gaussian_beam_fields(eps, z_interfaces, omega, angle0, waist, focus, x, z, *,
                         n_angles=64, polarization="p", incidence="below"):
    """Fields of a Gaussian beam (see :func:`gaussian_beam_spectrum`) focused at
    ``focus = (x_f, z_f)``, evaluated at points (x, z); same return order as
    :func:`stack_fields`.  The focus position refers to the incident beam as if it
    continued in the incidence medium."""
    eps = jnp.atleast_1d(jnp.asarray(eps, dtype=complex))
    inc_eps = eps[0] if incidence == "below" else eps[-1]
    angles, wts = gaussian_beam_spectrum(inc_eps, omega, angle0, waist, n_angles)
    sols, cw = _beam_solutions(eps, z_interfaces, omega, angles, wts, focus, polarization,
                               incidence)
    comps = jax.vmap(lambda s: jnp.stack(stack_fields(s, x, z)))(sols)
    total = jnp.tensordot(cw, comps, axes=(0, 0))
    return total[0], total[1], total[2]


def gaussian_beam_coupling_normal(eps, z_interfaces, omega, angle0, waist, focus, x,
                                  velocity, *, n_angles=64, incidence="below"):
    """Path-normal coupling ``I(x)`` (V) of a p-polarized Gaussian beam: the weighted
    sum of :func:`coupling_normal` over the beam's plane-wave components (linear in
    the field, so exact up to the angular sampling)."""
    eps = jnp.atleast_1d(jnp.asarray(eps, dtype=complex))
    inc_eps = eps[0] if incidence == "below" else eps[-1]
    angles, wts = gaussian_beam_spectrum(inc_eps, omega, angle0, waist, n_angles)
    sols, cw = _beam_solutions(eps, z_interfaces, omega, angles, wts, focus, "p", incidence)
    per = jax.vmap(lambda s: coupling_normal(s, x, velocity))(sols)
    return jnp.tensordot(cw, per, axes=(0, 0))
