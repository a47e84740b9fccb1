"""Incident fields and the total-field/scattered-field (TFSF) source line.

An incident field is a sum of plane-wave modes ``Hy = a exp(i (k_x (x - x_r) + k_z (z - z_r)))``
with ``Ex = a k_z / (omega eps0 eps)`` and ``Ez = -a k_x / (omega eps0 eps)`` times the
same exponential (from curl H = -i omega eps0 eps E).  For a plane wave of peak |E| E0 in
a medium of index n this gives ``a = n E0 / Z0``.

*Discrete* modes are the exact solutions of the Yee equations in a homogeneous medium:
the amplitudes use ``kt_x = (2/dx) sin(k_x dx/2)`` and ``kt_z = (2/dz) sin(k_z dz/2)``,
and ``kt_x^2 + kt_z^2 = eps k0^2`` fixes k_z for the Bloch k_x.  Then
``|Ex|^2 + |Ez|^2 = E0^2`` holds exactly on the grid as well (for real eps).

The source is the TFSF construction ``b = (A Q - Q A) f`` with Q the half-space of
Hy rows on the far side of the source line and f the discrete incident wave: it emits
f into Q and nothing backwards (A. Taflove & S. C. Hagness, Computational
Electrodynamics, 3rd ed., ch. 5, for the time-domain analogue).  b is non-zero on the
two Hy rows adjacent to the line only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from solvers.fdfd.specs import EPS0, Z0, FdfdProblem, GaussianBeam, PlaneWave


@dataclass(frozen=True)
class Modes:
    """Plane-wave decomposition of an incident field (arrays over modes)."""

    a: np.ndarray  # Hy amplitude (A/m)
    kx: np.ndarray  # phase wavenumbers (rad/m)
    kz: np.ndarray
    ax_e: np.ndarray  # Ex amplitude factor (V/m per A/m)
    az_e: np.ndarray  # Ez amplitude factor
    x_ref: float
    z_ref: float


def _discrete_kz(kx, eps, k0, dx, dz, sign):
    kxt = 2.0 / dx * np.sin(kx * dx / 2)
    kzt2 = eps * k0**2 - kxt**2
    kzt = np.sqrt(kzt2.astype(complex))
    kz = sign * 2.0 / dz * np.arcsin(kzt * dz / 2)
    return kxt, sign * kzt, kz, np.real(kzt2) > 0


def incident_modes(problem: FdfdProblem, discrete: bool = True) -> Modes:
    """Mode list of the problem's incident field (discrete Yee waves or continuum waves)."""
    src, g = problem.source, problem.grid
    eps = complex(src.eps_incidence)
    k0, omega = problem.k0, problem.omega
    n = np.sqrt(eps)
    sign = 1.0 if src.side == "below" else -1.0
    to_e = 1.0 / (omega * EPS0 * eps)
    if isinstance(src, PlaneWave):
        kx = np.array([src.kx(omega)])
        a = np.array([n * src.amplitude_V_per_m / Z0], dtype=complex)
        x_ref = z_ref = 0.0
    elif isinstance(src, GaussianBeam):
        period = g.size_x
        m = np.fft.fftfreq(g.nx, d=1.0 / g.nx)
        kx = problem.kx_bloch + 2 * np.pi * m / period
        k = np.real(n) * k0
        ok = np.abs(kx) < k
        kx = kx[ok]
        alpha = np.arcsin(kx / k) - src.angle_rad
        a = np.exp(-((k * np.sin(alpha) * src.waist_m / 2) ** 2)).astype(complex)
        a[np.abs(alpha) >= np.pi / 2] = 0.0
        x_ref, z_ref = src.x_focus, src.z_focus
    else:  # pragma: no cover - FdfdProblem validates
        raise ValueError(f"unsupported source {src!r}")

    if discrete:
        kxt, kzt, kz, prop = _discrete_kz(kx, eps, k0, g.dx, g.dz, sign)
        if isinstance(src, PlaneWave) and not prop.all():
            raise ValueError("the incident plane wave is evanescent on this grid")
        a = np.where(prop, a, 0.0)
    else:
        kxt = kx
        kzt = sign * np.sqrt((eps * k0**2 - kx**2).astype(complex))
        kz = kzt
    modes = Modes(a=a, kx=kx, kz=kz, ax_e=kzt * to_e, az_e=-kxt * to_e,
                  x_ref=x_ref, z_ref=z_ref)
    if isinstance(src, GaussianBeam):
        ex0, ez0 = np.sum(modes.a * modes.ax_e), np.sum(modes.a * modes.az_e)
        peak = np.sqrt(abs(ex0) ** 2 + abs(ez0) ** 2)
        if not peak > 0:
            raise ValueError("Gaussian beam has no propagating components on this grid")
        modes = Modes(a=a * src.amplitude_V_per_m / peak, kx=kx, kz=kz, ax_e=modes.ax_e,
                      az_e=modes.az_e, x_ref=x_ref, z_ref=z_ref)
    return modes


def evaluate_modes(modes: Modes, x, z, component: str) -> np.ndarray:
    """Sum of the modes at points (x, z) (broadcast together) for 'ex', 'ez' or 'hy'."""
    x, z = np.broadcast_arrays(np.asarray(x, float), np.asarray(z, float))
    coef = {"hy": modes.a, "ex": modes.a * modes.ax_e, "ez": modes.a * modes.az_e}[component]
    phase = np.exp(1j * (np.multiply.outer(x - modes.x_ref, modes.kx)
                         + np.multiply.outer(z - modes.z_ref, modes.kz)))
    return phase @ coef


def incident_on_rows(problem: FdfdProblem, modes: Modes, rows: np.ndarray) -> np.ndarray:
    """Incident Hy at the Hy points of the given z rows, shape (nx, len(rows))."""
    g = problem.grid
    ex = np.exp(1j * np.multiply.outer(g.x_centres() - modes.x_ref, modes.kx))  # (nx, M)
    ez = np.exp(1j * np.multiply.outer(modes.kz, g.z_centres()[rows] - modes.z_ref))
    return (ex * modes.a) @ ez


def incident_field(problem: FdfdProblem, x, z, discrete: bool = False):
    """Incident (Ex, Ez, Hy) at points (x, z) in the incidence medium.

    ``discrete=False``: the continuum plane wave / beam of the source description.
    ``discrete=True``: the wave the grid actually launches (its k_z follows the Yee
    dispersion relation, so its phase drifts from the continuum one by
    O((k dz)^2) per wavelength); use this one to separate scattered from incident
    fields.  Both have the requested peak amplitude.
    """
    modes = incident_modes(problem, discrete=discrete)
    return tuple(evaluate_modes(modes, x, z, c) for c in ("ex", "ez", "hy"))


@dataclass(frozen=True)
class SourceTerms:
    rhs: np.ndarray  # (nx*nz,) right-hand side of the symmetrized system
    add_rows: np.ndarray  # Hy rows outside the total-field region
    add_hy: np.ndarray  # incident Hy on those rows, (nx, len(add_rows))


def tfsf_source(problem: FdfdProblem, cx: np.ndarray) -> SourceTerms:
    """Right-hand side of the TFSF line and the incident Hy outside the total-field region.

    ``cx`` is the operator's Ex-point coefficient (carries s_x for x-PML).
    """
    g = problem.grid
    kb = problem.source_node
    modes = incident_modes(problem, discrete=True)
    f = incident_on_rows(problem, modes, np.array([kb - 1, kb]))
    c = cx[:, kb] / (complex(problem.source.eps_incidence) * g.dz**2)
    sgn = 1.0 if problem.source.side == "below" else -1.0
    b = np.zeros(g.shape, dtype=complex)
    b[:, kb] = -sgn * c * f[:, 0]
    b[:, kb - 1] = sgn * c * f[:, 1]
    rows = np.arange(kb) if problem.source.side == "below" else np.arange(kb, g.nz)
    return SourceTerms(rhs=b.ravel(), add_rows=rows,
                       add_hy=incident_on_rows(problem, modes, rows))
