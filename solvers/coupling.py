"""The electron coupling integral from sampled fields.

For a straight path ``r(s) = r0 + s s_hat`` at speed v (conventions in the README):

    I = int E(r(s)).s_hat exp(-i w s / v) ds            [V]
    beta_c = e I / (2 hbar w),  G = |I| / L,  kappa = G / E0,  damage factor = G / E_max.

Peak-amplitude fields with time dependence exp(-i w t).  Two path families:

* periodic paths along +x (gratings, prism surfaces), Bloch wavevector ``k_b``: one
  period ``I_1`` times the lattice sum ``sum_{n<N} exp(i (k_b - w/v) n Lambda)``;
* open paths along +z crossing a periodic structure (membranes): the sampled field
  inside a box ``[z1, z2]`` plus analytic semi-infinite tails of every Floquet order
  on the homogeneous media below and above.

Every kernel is written once against an array namespace ``xp`` (``numpy`` or
``jax.numpy``, see :func:`array_namespace`).  Given plain numpy arrays and Python numbers
the kernels run in numpy, with no JAX dispatch or compilation (the cheap path for
evaluations, sweeps and comparisons, whose grids change from call to call); given JAX
arrays or tracers (inside ``jax.jit`` / ``jax.grad``) the same code runs in
``jax.numpy``, jit-compiled and differentiable w.r.t. the field arrays, the
permittivities of the outer media and the Bloch wavevector.  The ``fields`` wrappers
take any object with ``ex, ez, hy`` arrays on a :class:`solvers.grid.Grid` (Yee
staggering documented there), ``omega`` and ``bloch_kx``.  The Bloch convention is
``F(x + Lambda) = F(x) exp(i k_b Lambda)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import jax
import jax.numpy as jnp
import numpy as np
from scipy import constants as sc

jax.config.update("jax_enable_x64", True)

EPS0 = sc.epsilon_0
C0 = sc.c
E_CHARGE = sc.e
HBAR = sc.hbar


# --------------------------------------------------------------------------- array namespace
def array_namespace(*values):
    """``jax.numpy`` if any of ``values`` is a JAX array or tracer, else ``numpy``.

    Tracers of ``jit``, ``grad`` and ``vmap`` are instances of ``jax.Array``, so traced
    calls pick ``jax.numpy``; numpy arrays, Python and numpy scalars, None and tuples of
    plain numbers pick ``numpy``.
    """
    for v in values:
        if isinstance(v, jax.Array):
            return jnp
        if isinstance(v, (tuple, list)) and any(isinstance(w, jax.Array) for w in v):
            return jnp
    return np


def _resolve(xp, *values):
    return array_namespace(*values) if xp is None else xp


# --------------------------------------------------------------------------- 1D integrals
def _linear_weights(phi, xp):
    """``w0 = int_0^1 (1-u) e^{i phi u} du`` and ``w1 = int_0^1 u e^{i phi u} du``.

    Closed forms ``f0 = (e^{i phi} - 1)/(i phi)``, ``w1 = e^{i phi}/(i phi) -
    (e^{i phi} - 1)/(i phi)^2``, ``w0 = f0 - w1``; a Taylor series
    ``int_0^1 u^n e^{i phi u} du = sum_m (i phi)^m / (m! (m + n + 1))`` for |phi| < 0.1.
    """
    phi = xp.asarray(phi, dtype=complex)
    small = xp.abs(phi) < 0.1
    # the closed form is evaluated at a harmless phi where the series is used, so that
    # neither branch divides by zero (and jnp.where's gradient stays finite)
    ps = xp.where(small, 1.0, phi)
    ip = 1j * ps
    e = xp.exp(ip)
    f0_exact = (e - 1.0) / ip
    w1_exact = e / ip - (e - 1.0) / ip**2
    f0_ser = 0.0 + 0.0j
    w1_ser = 0.0 + 0.0j
    term = 1.0 + 0.0j
    for m in range(9):
        f0_ser = f0_ser + term / (m + 1)
        w1_ser = w1_ser + term / (m + 2)
        term = term * (1j * phi) / (m + 1)
    f0 = xp.where(small, f0_ser, f0_exact)
    w1 = xp.where(small, w1_ser, w1_exact)
    return f0 - w1, w1


def _phase_integral(f, s, q, xp):
    f = xp.asarray(f, dtype=complex)
    s = xp.asarray(s, dtype=float)
    h = xp.diff(s)
    w0, w1 = _linear_weights(-q * h, xp)
    base = xp.exp(-1j * q * s[:-1]) * h
    extra = (1,) * (f.ndim - 1)
    w0 = (base * w0).reshape(h.shape + extra)
    w1 = (base * w1).reshape(h.shape + extra)
    return xp.sum(w0 * f[:-1] + w1 * f[1:], axis=0)


_phase_integral_jit = jax.jit(_phase_integral, static_argnames=("xp",))


def phase_integral(f, s, q, *, xp=None):
    """``int f(s) exp(-i q s) ds`` over the nodes ``s`` (increasing, any spacing).

    Exact when f is piecewise linear between the nodes (the phase factor is integrated
    analytically), so it stays accurate for rapidly oscillating exp(-i q s) on coarse
    grids.  ``f`` may have trailing dimensions (integrated along axis 0).
    ``xp``: array namespace (numpy or jax.numpy); inferred from the inputs when None
    (:func:`array_namespace`); the jax.numpy path is jit-compiled.
    Source: Filon-type product integration, common practice.
    """
    xp = _resolve(xp, f, s, q)
    if xp is np:
        return _phase_integral(f, s, q, np)
    return _phase_integral_jit(f, s, q, xp=jnp)


def path_integral(e_parallel, s, omega, v, method="linear", *, xp=None):
    """Coupling integral ``I = int E_par(s) exp(-i w s / v) ds`` (V) along a sampled path.

    Args:
      e_parallel: E . s_hat at the nodes (V/m), complex.
      s: path coordinate of the nodes (m), increasing.
      omega: angular frequency (rad/s); v: electron speed (m/s).
      method: "linear" (exact for piecewise-linear E, see :func:`phase_integral`) or
        "trapezoid" (trapezoid rule on the full integrand).
      xp: array namespace, inferred from the inputs when None.
    """
    xp = _resolve(xp, e_parallel, s, omega, v)
    q = omega / v
    if method == "linear":
        return phase_integral(e_parallel, s, q, xp=xp)
    if method == "trapezoid":
        s = xp.asarray(s, dtype=float)
        g = xp.asarray(e_parallel, dtype=complex) * xp.exp(-1j * q * s)
        return xp.sum(0.5 * (g[1:] + g[:-1]) * xp.diff(s))
    raise ValueError(f"method must be 'linear' or 'trapezoid', got {method!r}")


def lattice_sum(delta, period, n_periods, weights=None, *, xp=None):
    """``S = sum_{n=0}^{N-1} w_n exp(i delta n Lambda)`` (dimensionless).

    Without weights this is the Dirichlet kernel
    ``exp(i (N-1) delta Lambda/2) sin(N delta Lambda/2) / sin(delta Lambda/2)``,
    ``|S| = N`` at phase matching ``delta Lambda = 2 pi m``.  Weights (length N) model a
    finite laser spot sampled once per period (valid for spots much wider than
    Lambda); then the sum is evaluated term by term.  ``xp``: array namespace, inferred
    from the inputs when None.
    """
    xp = _resolve(xp, delta, period, weights)
    delta = xp.asarray(delta)
    if weights is not None:
        n = xp.arange(len(weights))
        return xp.sum(xp.asarray(weights) * xp.exp(1j * delta * n * period))
    half = delta * period / 2.0
    sin_half = xp.sin(half)
    near = xp.abs(sin_half) < 1e-7
    safe = xp.where(near, 1.0, sin_half)
    ratio = xp.where(near, n_periods * xp.cos(n_periods * half) / xp.cos(half),
                     xp.sin(n_periods * half) / safe)
    return xp.exp(1j * (n_periods - 1) * half) * ratio


# --------------------------------------------------------------------------- periodic path along x
def _interp_rows(arr, coord0, step, z):
    """Linear interpolation along axis 1 of ``arr`` (rows at coord0 + k step)."""
    t = (z - coord0) / step
    k = int(np.floor(t))
    if k < 0 or k + 1 >= arr.shape[1]:
        raise ValueError(f"height {z} outside the sampled rows")
    f = t - k
    return (1.0 - f) * arr[:, k] + f * arr[:, k + 1]


def vacuum_kz(kx, omega, dx, dz, *, xp=np):
    """``k_z`` of the Yee grid's own plane waves in vacuum for lateral wavenumbers ``kx``.

    ``((2/dz) sin(k_z dz/2))^2 = k0^2 - ((2/dx) sin(k_x dx/2))^2`` (A. Taflove & S. C.
    Hagness, Computational Electrodynamics, 3rd ed., 2005, ch. 4); branch Im k_z >= 0
    (Re k_z >= 0 when real).  Evanescent harmonics have ``k_z = i kappa_grid``.
    """
    return _order_wavenumbers(1.0, xp.asarray(kx, dtype=float), omega / C0, dx, dz, "grid",
                              xp)[1]


def vacuum_ex_rows(eps_x, eps_z, k, n_pml=0, tol=1e-9):
    """``(k_lo, k_hi)``: the contiguous Ex rows around row ``k`` on which the grid field
    is a sum of vacuum Floquet harmonics, or None.

    The discrete Helmholtz equation for Hy row j (cell centres) involves ``eps_x`` on
    the Ex rows j and j + 1 and ``eps_z`` on row j; where all three are vacuum across
    the period, each Floquet harmonic of Hy obeys the vacuum three-term recurrence, and
    so does Ex (a z difference of Hy divided by ``eps_x = 1``).  With [j_a, j_b] the
    run of such Hy rows containing the electron, Ex rows j_a .. j_b + 1 follow
    ``a e^{i k_z z} + b e^{-i k_z z}`` exactly.  ``k`` is the Ex row at or below the
    electron; rows inside the PML (``n_pml`` cells at each end) are excluded.
    Numpy (host) only; :func:`vacuum_ex_rows_traced` is the JAX counterpart.
    """
    ex_ok, ez_ok = (np.all(np.abs(np.asarray(a) - 1.0) < tol, axis=0) for a in (eps_x, eps_z))
    nz = ex_ok.shape[0]
    good = np.zeros(nz, dtype=bool)
    good[:-1] = ex_ok[:-1] & ex_ok[1:] & ez_ok[:-1]
    good[: n_pml + 1] = False
    good[max(nz - n_pml - 2, 0):] = False
    # the electron lies between Ex rows k and k + 1, i.e. in Hy row k; when that row
    # holds a partly filled cell (the electron closer to a surface than a cell), the
    # nearest clear run beside it continues the vacuum field (extrapolation)
    for j in (int(k), int(k) + 1, int(k) - 1, int(k) + 2, int(k) - 2):
        if 0 <= j < nz and good[j]:
            break
    else:
        return None
    ja = jb = j
    while ja - 1 >= 0 and good[ja - 1]:
        ja -= 1
    while jb + 1 < nz and good[jb + 1]:
        jb += 1
    return ja, jb + 1


def vacuum_ex_rows_traced(eps_x, eps_z, k, n_pml=0, tol=1e-9):
    """:func:`vacuum_ex_rows` for JAX arrays and a traced row index ``k`` (returns
    ``(k_lo, k_hi)`` as traced integers; when Hy row k is not clear, the clear run just
    above it, else just below, is used)."""
    ex_ok = jnp.all(jnp.abs(eps_x - 1.0) < tol, axis=0)
    ez_ok = jnp.all(jnp.abs(eps_z - 1.0) < tol, axis=0)
    nz = ex_ok.shape[0]
    idx = jnp.arange(nz)
    good = jnp.concatenate([ex_ok[:-1] & ex_ok[1:] & ez_ok[:-1], jnp.zeros(1, bool)])
    good = good & (idx > n_pml) & (idx < nz - n_pml - 2)
    bad = ~good
    k = jnp.clip(k, 1, nz - 2)
    kk = jnp.where(good[k], k, jnp.where(good[k + 1], k + 1, k - 1))
    ja = jnp.max(jnp.where(bad & (idx < kk), idx, -1)) + 1
    jb = jnp.min(jnp.where(bad & (idx > kk), idx, nz)) - 1
    return ja, jb + 1


def _harmonic_weights(kz, z, z1, z2, xp):
    """Weights ``(w1, w2)`` with ``c(z) = w1 c(z1) + w2 c(z2)`` for every
    ``c(z) = a e^{i kz z} + b e^{-i kz z}``: ``w1 = sin(kz (z2 - z)) / sin(kz (z2 - z1))``,
    ``w2 = sin(kz (z - z1)) / sin(kz (z2 - z1))`` (linear weights as kz -> 0)."""
    kz = xp.asarray(kz, dtype=complex)
    small = xp.abs(kz * (z2 - z1)) < 1e-6
    ks = xp.where(small, 1.0, kz)
    w1 = xp.where(small, (z2 - z) / (z2 - z1), _sin_ratio(ks * (z2 - z), ks * (z2 - z1), xp))
    w2 = xp.where(small, (z - z1) / (z2 - z1), _sin_ratio(ks * (z - z1), ks * (z2 - z1), xp))
    return w1, w2


# weights above this only amplify rounding: an evanescent harmonic extrapolated far
# outside the two rows that fix it (a height outside the vacuum run)
_LARGEST_WEIGHT = 1e12


def _sin_ratio(a, d, xp):
    """``sin(a) / sin(d)`` for complex arguments without overflow: both sines are scaled
    by ``e^{-t}``, ``t = max(|Im a|, |Im d|)``; a ratio beyond ``_LARGEST_WEIGHT`` (or a
    vanishing scaled denominator) gives 0 -- that harmonic is dropped."""
    t = xp.maximum(xp.abs(xp.imag(a)), xp.abs(xp.imag(d)))
    num = xp.exp(1j * a - t) - xp.exp(-1j * a - t)
    den = xp.exp(1j * d - t) - xp.exp(-1j * d - t)
    ok = xp.abs(den) * _LARGEST_WEIGHT > xp.abs(num)
    return xp.where(ok, num / xp.where(ok, den, 1.0), 0.0)


def gap_row(ex, *, dx, dz, x0, z0, z, omega, bloch_kx, rows, xp=None):
    """Ex along x at height ``z`` inside a vacuum gap, from its Floquet harmonics.

    In vacuum every Floquet harmonic ``m`` of the grid field is exactly
    ``a_m e^{i k_z,m z} + b_m e^{-i k_z,m z}`` (for the synchronous, evanescent harmonic
    ``a e^{-kappa z} + b e^{kappa z}``) with ``k_z,m`` on the grid's own dispersion
    (:func:`vacuum_kz`).  The two Ex rows of the gap nearest ``z`` (inside ``rows =
    (k_lo, k_hi)``, :func:`vacuum_ex_rows`) fix ``a_m, b_m``; the row at ``z`` is then
    the sum of the harmonics there.  Linear interpolation across a cell would instead
    err by ``(kappa dz)^2 / 8`` relative, periodically in the electron's height.
    Exact (to rounding) for a grid field; outside [k_lo, k_hi] the same form
    extrapolates, which is still exact while the medium is vacuum.  ``rows`` may be
    traced integers; ``z`` may be traced.  Returns (nx,) complex.
    """
    xp = _resolve(xp, ex, z, omega, bloch_kx)
    ex = xp.asarray(ex, dtype=complex)
    nx = ex.shape[0]
    k_lo, k_hi = rows
    k = xp.floor((z - z0) / dz).astype(int)
    k1 = xp.clip(k, k_lo, xp.maximum(k_hi - 1, k_lo))
    k1 = xp.clip(k1, 0, ex.shape[1] - 2)
    k2 = k1 + 1
    z1 = z0 + k1 * dz
    z2 = z1 + dz
    xs = x0 + dx * (xp.arange(nx) + 0.5)
    phase = xp.exp(-1j * bloch_kx * xs)
    u1 = xp.fft.fft(xp.take(ex, k1, axis=1) * phase)
    u2 = xp.fft.fft(xp.take(ex, k2, axis=1) * phase)
    m = xp.asarray(np.fft.fftfreq(nx) * nx)
    kx = bloch_kx + 2.0 * np.pi * m / (nx * dx)
    kz = vacuum_kz(kx, omega, dx, dz, xp=xp)
    w1, w2 = _harmonic_weights(kz, z, z1, z2, xp)
    return xp.fft.ifft(w1 * u1 + w2 * u2) / phase


def periodic_cell_integral(row, x_first, dx, bloch_kx, q, *, xp=None):
    """One-period integral ``int_{x_first}^{x_first+Lambda} F(x) exp(-i q x) dx``.

    ``row`` holds F at ``x_first + i dx`` (i < nx, Lambda = nx dx), F Bloch-periodic.
    The periodic part ``u = F exp(-i k_b x)`` is interpolated linearly (closing the
    period with u_nx = u_0) and integrated exactly against ``exp(-i (q - k_b) x)``.
    ``xp``: array namespace, inferred from the inputs when None.
    """
    xp = _resolve(xp, row, x_first, dx, bloch_kx, q)
    nx = row.shape[0]
    x = x_first + dx * xp.arange(nx + 1)
    u = xp.asarray(row, dtype=complex) * xp.exp(-1j * bloch_kx * x[:-1])
    u = xp.concatenate([u, u[:1]])
    return phase_integral(u, x, q - bloch_kx, xp=xp)


def _coupling_x(ex, *, dx, dz, x0, z0, z, omega, bloch_kx, velocity, n_periods, spot, xp,
                rows=None):
    ex = xp.asarray(ex, dtype=complex)
    if rows is None:
        row = _interp_rows(ex, z0, dz, z)
    else:
        row = gap_row(ex, dx=dx, dz=dz, x0=x0, z0=z0, z=z, omega=omega, bloch_kx=bloch_kx,
                      rows=rows, xp=xp)
    nx = ex.shape[0]
    period = nx * dx
    x_first = x0 + 0.5 * dx
    q = omega / velocity
    i1 = periodic_cell_integral(row, x_first, dx, bloch_kx, q, xp=xp)
    weights = None
    if spot is not None:
        xc, radius = spot
        centres = x_first + (np.arange(n_periods) + 0.5) * period
        weights = np.exp(-((centres - xc) / radius) ** 2)
    return i1 * lattice_sum(bloch_kx - q, period, n_periods, weights, xp=xp), i1


_X_STATIC = ("dx", "dz", "x0", "z0", "z", "n_periods", "spot", "xp", "rows")
_coupling_x_jit = jax.jit(_coupling_x, static_argnames=_X_STATIC)


def coupling_x_kernel(ex, *, dx, dz, x0, z0, z, omega, bloch_kx, velocity, n_periods=1,
                      spot=None, xp=None, rows=None):
    """Kernel of :func:`coupling_along_x` on a bare ``ex`` array (Yee positions:
    x = x0 + (i + 1/2) dx, z = z0 + k dz).  ``z`` and the grid numbers are static
    (Python numbers).  ``xp``: array namespace, inferred from ``ex``, ``omega``,
    ``bloch_kx`` and ``velocity`` when None; the jax.numpy path is jit-compiled (one
    compilation per grid and height).

    ``rows = (k_lo, k_hi)``: the electron is in a vacuum gap whose Ex rows k_lo..k_hi
    hold vacuum Floquet harmonics (:func:`vacuum_ex_rows`); the row at ``z`` is then
    built from them (:func:`gap_row`) instead of interpolated linearly.

    Returns ``(I_total, I_one_period)``; the path starts at the first Ex sample
    ``x0 + dx/2``.
    """
    xp = _resolve(xp, ex, omega, bloch_kx, velocity)
    kw = dict(dx=dx, dz=dz, x0=x0, z0=z0, z=z, omega=omega, bloch_kx=bloch_kx,
              velocity=velocity, n_periods=n_periods, spot=spot,
              rows=None if rows is None else (int(rows[0]), int(rows[1])))
    if xp is np:
        return _coupling_x(ex, xp=np, **kw)
    return _coupling_x_jit(ex, xp=jnp, **kw)


def coupling_along_x(fields, z, velocity, n_periods=1, spot=None, *, xp=None, rows=None):
    """Coupling of an electron moving along +x at height ``z`` over ``n_periods`` periods.

    ``I = I_1 sum_{n<N} exp(i (k_b - w/v) n Lambda)``, ``I_1`` the one-period integral of
    Ex starting at ``x0 + dx/2``; Ex at height z is built from the vacuum Floquet
    harmonics of the gap rows ``rows`` (:func:`gap_row`), or, without ``rows``,
    interpolated linearly between the Ex rows.
    ``spot = (x_centre, radius)`` applies a laser field envelope
    ``exp(-(x - x_c)^2 / radius^2)`` (radius = 1/e^2 intensity radius) period by period.
    Checking that the path does not cross material is the caller's job.  Runs in numpy
    for numpy fields unless ``xp`` says otherwise (see :func:`coupling_x_kernel`).

    Returns ``(I_total, I_one_period)`` (V).
    """
    g = fields.grid
    return coupling_x_kernel(fields.ex, dx=g.dx, dz=g.dz, x0=g.x0, z0=g.z0, z=z,
                             omega=fields.omega, bloch_kx=fields.bloch_kx,
                             velocity=velocity, n_periods=n_periods, spot=spot, xp=xp,
                             rows=rows)


# --------------------------------------------------------------------------- open path along z
def _kz(eps, kx, k0, xp):
    root = xp.sqrt(xp.asarray(eps, dtype=complex) * k0**2 - kx**2)
    return xp.where(xp.imag(root) < 0, -root, root)


DISPERSIONS = ("grid", "continuum")


def _order_wavenumbers(eps, kx_m, k0, dx, dz, dispersion, xp):
    """(K_x, k_z) of each Floquet order in a homogeneous medium.

    ``dispersion="grid"``: the Yee grid's own plane waves, which the FDFD solution
    is made of: ``K_x = (2/dx) sin(kx dx/2)`` is what the staggered x difference gives
    (so ``Ez = -K_x Hy/(w eps0 eps)``) and ``k_z`` solves the discrete dispersion
    relation ``K_x^2 + ((2/dz) sin(kz dz/2))^2 = eps k0^2`` (A. Taflove & S. C.
    Hagness, Computational Electrodynamics, 3rd ed., 2005, ch. 4).  Using them makes
    the split of a grid wave into orders exact, so an empty domain couples nothing
    to rounding.  ``"continuum"``: ``K_x = kx``, ``kz = sqrt(eps k0^2 - kx^2)``, for
    fields sampled from a closed form.  Branch: Im kz >= 0, Re kz >= 0 when real.
    """
    if dispersion == "continuum":
        return kx_m, _kz(eps, kx_m, k0, xp)
    big_kx = (2.0 / dx) * xp.sin(kx_m * dx / 2.0)
    kz_c = _kz(eps, big_kx, k0, xp)
    kz = (2.0 / dz) * xp.arcsin(xp.asarray(kz_c * dz / 2.0, dtype=complex))
    kz = xp.where(xp.imag(kz) < 0, -kz, kz)
    kz = xp.where((xp.abs(xp.imag(kz)) < 1e-12 * xp.abs(kz)) & (xp.real(kz) < 0), -kz, kz)
    return big_kx, kz


def floquet_orders(hy_lo, hy_hi, x_first, dx, dz, eps, omega, bloch_kx, *, xp=None,
                   dispersion="grid"):
    """Up/down amplitudes of every Floquet order on the plane between two Hy rows.

    The rows ``hy_lo``, ``hy_hi`` sit at ``z_p - dz/2`` and ``z_p + dz/2`` at
    ``x = x_first + i dx``, in a homogeneous medium ``eps``.  With
    ``Hy = sum_m [a_m e^{i kz_m (z - z_p)} + b_m e^{-i kz_m (z - z_p)}] e^{i kx_m x}``,
    ``kx_m = k_b + 2 pi m / Lambda`` (m centred on the reduced Bloch vector),
    the two rows give a 2x2 system per order.  Two Hy rows are used rather than Hy and
    Ex because Hy is the solver's primary unknown and the pair fixes (a_m, b_m) with an
    error O(dz (kz_grid - kz)) instead of the O(dz^2) of averaging Hy onto the Ex row;
    with ``dispersion="grid"`` (default, see :func:`_order_wavenumbers`) kz_m is the
    grid's own and the split of a grid wave is exact.
    ``xp``: array namespace, inferred from the inputs when None.

    Returns ``(kx_m, kz_m, a_m, b_m)``, each (nx,).
    """
    xp = _resolve(xp, hy_lo, hy_hi, eps, omega, bloch_kx)
    nx = hy_lo.shape[0]
    period = nx * dx
    k0 = omega / C0
    g = 2.0 * np.pi / period
    shift = xp.round(xp.real(bloch_kx) / g)
    m = xp.asarray(np.fft.fftfreq(nx) * nx) - shift
    kx_m = bloch_kx + g * m
    x = x_first + dx * xp.arange(nx)
    bloch = xp.exp(-1j * bloch_kx * x)
    # F_m = (1/nx) sum_i F(x_i) exp(-i kx_m x_i)
    corr = xp.exp(-1j * g * m * x_first)
    # exp(-i 2 pi m i / nx) is the FFT's kernel at index m mod nx
    idx = xp.mod(m, nx).astype(int)
    f_lo = xp.fft.fft(hy_lo * bloch)[idx] / nx * corr
    f_hi = xp.fft.fft(hy_hi * bloch)[idx] / nx * corr
    _, kz = _order_wavenumbers(eps, kx_m, k0, dx, dz, dispersion, xp)
    ph = xp.exp(1j * kz * dz / 2.0)
    det = 1.0 / ph**2 - ph**2
    a = (f_lo / ph - f_hi * ph) / det
    b = (f_hi / ph - f_lo * ph) / det
    return kx_m, kz, a, b


def _tail(kz, kappa, z_p, sign, xp):
    """``int exp(+-i kz (z - z_p)) exp(-i kappa z) dz`` over the half line above
    (sign=+1, from z_p to inf) or below (sign=-1, from -inf to z_p), for both the up (+)
    and down (-) parts: ``-sign exp(-i kappa z_p) / (i q)``, ``q = +-kz - kappa``."""
    pref = xp.exp(-1j * kappa * z_p)
    up = -sign * pref / (1j * (kz - kappa))
    dn = -sign * pref / (1j * (-kz - kappa))
    return up, dn


def _node_index(z, z0, dz):
    t = (z - z0) / dz
    k = int(round(t))
    if abs(t - k) > 1e-6:
        raise ValueError(f"plane z = {z} is not on an Ex row (z0 + k dz); use a grid node")
    return k


def _order_field(coef, a, b, kz, z, z_p, lat, xp):
    """Ez of the Floquet orders ``coef (a e^{i kz (z-z_p)} + b e^{-i kz (z-z_p)})``
    summed with the lateral factors ``lat`` (n_x, n_orders); returns (n_x, len(z))."""
    dz = z[None, :] - z_p
    per = coef[:, None] * (_wave(a[:, None], 1j * kz[:, None] * dz, xp)
                           + _wave(b[:, None], -1j * kz[:, None] * dz, xp))
    return lat @ per


def _wave(amplitude, exponent, xp):
    """``amplitude * exp(exponent)``, with the exponent dropped where the amplitude is
    zero: an evanescent order switched off on the side where it would grow must give
    0, not 0 * inf = NaN (fine grids have orders with |Im kz| dz ~ 1e3)."""
    return amplitude * xp.exp(xp.where(amplitude != 0, exponent, 0.0))


def _coupling_z(ez, hy, *, nx, dx, dz, x0, z0, x, z1, z2, eps_below, eps_above, omega,
                bloch_kx, velocity, spot, xp, dispersion="grid"):
    ez = xp.asarray(ez, dtype=complex)
    hy = xp.asarray(hy, dtype=complex)
    nz = ez.shape[1]
    k1, k2 = _node_index(z1, z0, dz), _node_index(z2, z0, dz)
    if not (1 <= k1 < k2 <= nz - 1):
        raise ValueError("need one Hy/Ez row outside the box on each side: 1 <= k1 < k2 <= nz-1")
    kappa = omega / velocity
    x = xp.atleast_1d(xp.asarray(x, dtype=float))

    # Ez at the electron's lateral position: linear interpolation of the periodic part
    xn = x0 + dx * xp.arange(nx)
    u = ez * xp.exp(-1j * bloch_kx * xn)[:, None]
    xi = (x - x0) / dx
    i0 = xp.floor(xi)
    f = (xi - i0)[:, None]
    i0 = i0.astype(int)
    col = ((1.0 - f) * u[i0 % nx] + f * u[(i0 + 1) % nx]) * xp.exp(1j * bloch_kx * x)[:, None]
    zc = z0 + (xp.arange(nz) + 0.5) * dz

    def nodes(ka, kb):
        """Path nodes from Ex row ka to Ex row kb: the plane, Ez centres, the plane."""
        zs = xp.concatenate([xp.asarray([z0 + ka * dz]), zc[ka:kb], xp.asarray([z0 + kb * dz])])
        lo = 0.5 * (col[:, ka - 1] + col[:, ka])
        hi = 0.5 * (col[:, kb - 1] + col[:, kb])
        return zs, xp.concatenate([lo[:, None], col[:, ka:kb], hi[:, None]], axis=1)

    x_first = x0 + 0.5 * dx
    kxa, kza, aa, ba = floquet_orders(hy[:, k2 - 1], hy[:, k2], x_first, dx, dz, eps_above,
                                      omega, bloch_kx, xp=xp, dispersion=dispersion)
    kxb, kzb, ab, bb = floquet_orders(hy[:, k1 - 1], hy[:, k1], x_first, dx, dz, eps_below,
                                      omega, bloch_kx, xp=xp, dispersion=dispersion)
    k0 = omega / C0
    big_kxa, _ = _order_wavenumbers(eps_above, kxa, k0, dx, dz, dispersion, xp)
    big_kxb, _ = _order_wavenumbers(eps_below, kxb, k0, dx, dz, dispersion, xp)
    eva = xp.real(eps_above * k0**2 - big_kxa**2) < 0
    evb = xp.real(eps_below * k0**2 - big_kxb**2) < 0
    # evanescent orders: keep only the part decaying away from the structure
    ba = xp.where(eva, 0.0, ba)
    ab = xp.where(evb, 0.0, ab)
    ca = -big_kxa / (omega * EPS0 * eps_above)   # Ez per unit Hy, order by order
    cb = -big_kxb / (omega * EPS0 * eps_below)
    # lateral factors exp(i kx_m x) with their periodic parts interpolated linearly between
    # the Ez columns, exactly as the sampled Ez is: the result at any x is then the linear
    # interpolation of the results at the columns, and the box subtraction stays exact
    x_lo = (x0 + dx * i0.astype(float))[:, None]

    def lateral(kx_m):
        per = kx_m - bloch_kx
        lin = (1.0 - f) * xp.exp(1j * per[None, :] * x_lo) \
            + f * xp.exp(1j * per[None, :] * (x_lo + dx))
        return lin * xp.exp(1j * bloch_kx * x)[:, None]

    lat_a = lateral(kxa)
    lat_b = lateral(kxb)

    if spot is not None:
        # finite laser spot: envelope on the whole path, outer field sampled to 6 radii
        zc_spot, radius = spot
        zs, vals = nodes(k1, k2)
        box = phase_integral((vals * xp.exp(-((zs - zc_spot) / radius) ** 2)[None, :]).T,
                             zs, kappa, xp=xp)
        n_a = max(2, int(np.ceil(max(zc_spot + 6 * radius - z2, dz) / dz)) + 1)
        n_b = max(2, int(np.ceil(max(z1 - (zc_spot - 6 * radius), dz) / dz)) + 1)
        za = z2 + dz * xp.arange(n_a)
        zb = z1 - dz * xp.arange(n_b)[::-1]
        ea = (_order_field(ca, aa, ba, kza, za, z2, lat_a, xp)
              * xp.exp(-((za - zc_spot) / radius) ** 2))
        eb = (_order_field(cb, ab, bb, kzb, zb, z1, lat_b, xp)
              * xp.exp(-((zb - zc_spot) / radius) ** 2))
        return (box + phase_integral(ea.T, za, kappa, xp=xp)
                + phase_integral(eb.T, zb, kappa, xp=xp))

    # Propagating orders never die out, and integrating them numerically across the box
    # and analytically beyond it leaves an O(h^2) error proportional to the box size.
    # So subtract them inside the box (the order expansion from below on [z1, zs], from
    # above on [zs, z2]) and integrate them analytically over the half lines from zs; the
    # numerical box integral then only sees the structure's near field.
    ks = (k1 + k2) // 2
    z_s = z0 + ks * dz
    zl, vl = nodes(k1, ks)
    zu_, vu = nodes(ks, k2)
    zero = xp.zeros_like(aa)
    pa, pb = ~eva, ~evb
    def reference(coef, a, b, kz, ka, kb, z_p, lat):
        # the order field at the same nodes and with the same plane averaging as the
        # samples (nodes()), so that a pure grid wave is subtracted exactly
        cen = _order_field(coef, a, b, kz, zc[ka - 1:kb + 1], z_p, lat, xp)
        lo = 0.5 * (cen[:, 0] + cen[:, 1])
        hi = 0.5 * (cen[:, -2] + cen[:, -1])
        return xp.concatenate([lo[:, None], cen[:, 1:-1], hi[:, None]], axis=1)

    ref_u = reference(ca, xp.where(pa, aa, zero), xp.where(pa, ba, zero), kza, ks, k2, z2,
                      lat_a)
    ref_l = reference(cb, xp.where(pb, ab, zero), xp.where(pb, bb, zero), kzb, k1, ks, z1,
                      lat_b)
    box = (phase_integral((vl - ref_l).T, zl, kappa, xp=xp)
           + phase_integral((vu - ref_u).T, zu_, kappa, xp=xp))

    def half_line(kz, a, b, z_from, z_p, sign):
        # int over z >= z_from (sign=+1) or z <= z_from (sign=-1) of
        # (a e^{i kz (z - z_p)} + b e^{-i kz (z - z_p)}) e^{-i kappa z}
        up, dn = _tail(kz, kappa, z_from, sign, xp)
        return (_wave(a, 1j * kz * (z_from - z_p), xp) * up
                + _wave(b, -1j * kz * (z_from - z_p), xp) * dn)

    prop_a = half_line(kza, xp.where(pa, aa, zero), xp.where(pa, ba, zero), z_s, z2, +1)
    prop_b = half_line(kzb, xp.where(pb, ab, zero), xp.where(pb, bb, zero), z_s, z1, -1)
    ev_a = half_line(kza, xp.where(eva, aa, zero), zero, z2, z2, +1)
    ev_b = half_line(kzb, zero, xp.where(evb, bb, zero), z1, z1, -1)
    tails = lat_a @ (ca * (prop_a + ev_a)) + lat_b @ (cb * (prop_b + ev_b))
    return box + tails


_Z_STATIC = ("nx", "dx", "dz", "x0", "z0", "z1", "z2", "spot", "xp", "dispersion")
_coupling_z_jit = jax.jit(_coupling_z, static_argnames=_Z_STATIC)


def coupling_z_kernel(ez, hy, *, nx, dx, dz, x0, z0, x, z1, z2, eps_below, eps_above,
                      omega, bloch_kx, velocity, spot=None, xp=None, dispersion="grid"):
    """Kernel of :func:`coupling_along_z` on bare arrays (Yee positions of
    :mod:`solvers.grid`).  ``x`` may be an array of lateral positions; grid numbers,
    ``z1``, ``z2`` and ``spot`` are static (Python numbers).  ``xp``: array namespace,
    inferred from the arrays and numbers when None (any JAX array or tracer among
    ``ez, hy, x, eps_below, eps_above, omega, bloch_kx, velocity`` selects jax.numpy);
    the jax.numpy path is jit-compiled (one compilation per grid and box).
    Returns ``I(x)`` (V)."""
    xp = _resolve(xp, ez, hy, x, eps_below, eps_above, omega, bloch_kx, velocity)
    kw = dict(nx=nx, dx=dx, dz=dz, x0=x0, z0=z0, x=x, z1=z1, z2=z2, eps_below=eps_below,
              eps_above=eps_above, omega=omega, bloch_kx=bloch_kx, velocity=velocity,
              spot=spot, dispersion=dispersion)
    if dispersion not in DISPERSIONS:
        raise ValueError(f"dispersion must be one of {DISPERSIONS}, got {dispersion!r}")
    if xp is np:
        return _coupling_z(ez, hy, xp=np, **kw)
    return _coupling_z_jit(ez, hy, xp=jnp, **kw)


def coupling_along_z(fields, x, z1, z2, eps_below, eps_above, velocity, spot=None, *,
                     xp=None, dispersion="grid"):
    """Coupling ``I(x) = int_{-inf}^{inf} Ez(x, z) exp(-i w z / v) dz`` (V) of an
    electron moving along +z at lateral position(s) ``x``.

    Inside the box ``[z1, z2]`` (both on Ex rows, ``z0 + k dz``) the Ez samples are
    integrated with :func:`phase_integral` (Ez interpolated linearly in x).  Outside,
    the field is split into Floquet orders (:func:`floquet_orders`) on the planes z1
    (medium ``eps_below``) and z2 (medium ``eps_above``) and each order's tail is added
    analytically, ``int_{z2}^{inf} a e^{i q (z - z2)} dz = -a/(i q)``, ``q = +-kz - w/v``
    (and ``+a/(i q)`` below z1).  Evanescent orders decay on their own (their part
    growing away from the structure is dropped); propagating orders use the adiabatic
    switching convention: the field is taken to fall off as ``exp(-eta |z|)`` far away,
    ``eta -> 0+``, the limit of a laser pulse or spot that is finite but much larger
    than the structure.  The result does not depend on where the box ends.

    Requirements: the Hy rows on either side of z1 and of z2 (``z1 +- dz/2``,
    ``z2 +- dz/2``) lie in the homogeneous outer media, and no source plane lies
    between the structure and z1 or z2 (tails assume the field there continues to
    infinity).  ``spot = (z_centre, radius)`` multiplies the whole path by the field
    envelope ``exp(-(z - z_c)^2 / radius^2)``; the tails are then sampled to 6 radii.
    Runs in numpy for numpy fields unless ``xp`` says otherwise (see
    :func:`coupling_z_kernel`).  ``dispersion``: "grid" for fields solved on the Yee
    grid (the FDFD solver's), "continuum" for closed-form fields sampled on a grid
    (:func:`_order_wavenumbers`).

    Returns a complex array shaped like ``x`` (at least 1D).
    """
    g = fields.grid
    return coupling_z_kernel(fields.ez, fields.hy, nx=g.nx, dx=g.dx, dz=g.dz, x0=g.x0,
                             z0=g.z0, x=x, z1=z1, z2=z2, eps_below=eps_below,
                             eps_above=eps_above, omega=fields.omega,
                             bloch_kx=fields.bloch_kx, velocity=velocity, spot=spot, xp=xp,
                             dispersion=dispersion)


def gaussian_envelope_integral(delta, length, radius):
    """``int_0^L exp(i delta s) exp(-(s - L/2)^2 / radius^2) ds`` (m), closed form.

    The laser spot centred on a path of length L (field envelope with 1/e^2
    intensity radius ``radius`` along the path), under detuning ``delta``
    (1/m).  Completing the square,
    ``= exp(i delta L/2) (sqrt(pi) r / 2) exp(-delta^2 r^2/4)
    [erf(L/(2r) - i delta r/2) + erf(L/(2r) + i delta r/2)]``
    (M. Abramowitz & I. A. Stegun, Handbook of Mathematical Functions, 7.4.32).
    Evaluated through the Faddeeva function, ``erfc(z) = exp(-z^2) w(i z)``, so that
    wide spots (where exp(-delta^2 r^2/4) underflows and erf overflows) stay finite.
    Numpy/scipy only (not traced).  Tends to :func:`solvers.layers.detuning_integral`
    as ``radius -> inf``.
    """
    from scipy.special import wofz

    d, L, r = complex(delta), float(length), float(radius)
    a, b = L / (2 * r), 0.5j * d * r
    # exp(b^2) erf(a +- b) = exp(b^2) - exp(-a^2 -+ 2 a b) w(i (a +- b))
    plus = np.exp(b * b) - np.exp(-a * a - 2 * a * b) * wofz(1j * (a + b))
    minus = np.exp(b * b) - np.exp(-a * a + 2 * a * b) * wofz(1j * (a - b))
    return np.exp(0.5j * d * L) * (np.sqrt(np.pi) * r / 2) * (plus + minus)


# --------------------------------------------------------------------------- figures of merit
def beta_from_integral(integral, omega):
    """PINEM coupling constant ``beta_c = e I / (2 hbar w)`` (dimensionless, complex).

    With peak-amplitude fields ``P_l = J_l(2 |beta_c|)^2`` (F. J. Garcia de Abajo,
    A. Asenjo-Garcia, M. Kociak, Nano Lett. 10, 1859, 2010).
    """
    return E_CHARGE * integral / (2.0 * HBAR * omega)


def spot_average(x, beta_abs, x_centre, fwhm, period=None):
    """Average of |beta_c| and of |beta_c|^2 over a Gaussian electron spot.

    The electron current density across the spot is ``exp(-4 ln2 (x - x_c)^2 / fwhm^2)``
    (fwhm of the current density).  Electrons at different x are mutually incoherent,
    so the measured spectrum is the weighted average of spectra; ``<|beta|^2>`` fixes its
    second moment (``sum l^2 P_l = 2 <|beta|^2>``), ``<|beta|>`` is a convenient figure.
    With ``period`` the samples ``x`` cover one cell of a map periodic in x and the
    weights are summed over periodic images.  Uniform sample spacing is assumed.

    Returns ``(mean_abs, mean_sq)``.
    """
    x = np.asarray(x, dtype=float)
    b = np.abs(np.asarray(beta_abs))
    if period is None:
        w = np.exp(-4 * np.log(2) * (x - x_centre) ** 2 / fwhm**2)
    else:
        n_img = int(np.ceil(3 * fwhm / period)) + 1
        shifts = period * np.arange(-n_img, n_img + 1)
        w = np.exp(-4 * np.log(2) * (x[:, None] + shifts[None, :] - x_centre) ** 2
                   / fwhm**2).sum(axis=1)
    w = w / w.sum()
    return float(np.sum(w * b)), float(np.sum(w * b**2))


def richardson(value_h, value_h2, order, ratio=2.0):
    """Richardson extrapolation from results at spacings h and h/ratio.

    ``V = V_{h/r} + (V_{h/r} - V_h)/(r^p - 1)``; the error estimate of the finer value is
    ``|V - V_{h/r}| / |V|`` (L. F. Richardson, Phil. Trans. R. Soc. A 210, 307, 1911).
    Works for complex values.  Returns ``(extrapolated, relative_error)``.
    """
    fine = complex(value_h2)
    extrap = fine + (fine - complex(value_h)) / (ratio**order - 1.0)
    rel = abs(extrap - fine) / abs(extrap) if extrap != 0 else float("inf")
    return extrap, rel


@dataclass(frozen=True)
class CouplingResult:
    """Coupling figures of one electron path (SI units; see the module docstring).

    ``beta_c_per_field`` is beta_c per V/m of incident amplitude (m/V).  Path-length
    figures (gradient, structure factor, damage factor) are None for open paths,
    which have no interaction length.
    """

    integral_V: complex
    beta_c: complex
    beta_c_per_field: complex
    interaction_length_m: float | None
    gradient_V_per_m: float | None
    structure_factor: float | None
    max_field_in_material_V_per_m: float | None
    damage_factor: float | None
    relative_error_estimate: float | None


def coupling_result(integral, omega, *, incident_amplitude=1.0, interaction_length=None,
                    max_field_in_material=None, relative_error=None) -> CouplingResult:
    """Assemble a :class:`CouplingResult` from the integral I (V).

    ``G = |I|/L``, ``kappa = G/E0``, damage factor ``G/E_max`` (E_max: the largest |E|
    inside material, computed by the caller under its corner rule).
    """
    integral = complex(integral)
    beta = complex(beta_from_integral(integral, omega))
    grad = kappa = damage = None
    if interaction_length is not None:
        grad = abs(integral) / interaction_length
        kappa = grad / incident_amplitude
        if max_field_in_material is not None:
            damage = grad / max_field_in_material
    return CouplingResult(
        integral_V=integral,
        beta_c=beta,
        beta_c_per_field=beta / incident_amplitude,
        interaction_length_m=interaction_length,
        gradient_V_per_m=grad,
        structure_factor=kappa,
        max_field_in_material_V_per_m=max_field_in_material,
        damage_factor=damage,
        relative_error_estimate=relative_error,
    )
