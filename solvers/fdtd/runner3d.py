"""Main-environment side of the 3D Meep run: problem, launch, and the coupling from it.

One unit cell of a stack periodic in x and y (rectangular cell ``size_x`` x ``size_y``
centred on x = y = 0, Bloch-periodic), PML along z, a plane wave from below or above
(see ``worker3d.py`` for the method).  The worker returns the complex peak
amplitudes (Ex, Ey, Ez) on the pixel centres of the physical region
``z_min .. z_min + size_z``; :func:`line_coupling` integrates them along a straight
electron path, with analytic tails beyond the region.

Coupling along a line (same conventions as ``solvers.coupling``)
    ``I = int E(r(s)).s_hat exp(-i w s / v) ds``, ``r(s) = r0 + s s_hat``, with
    ``r0 = (x0, y0, z0)``.  Inside the region E is sampled where the line crosses each
    pixel plane (bilinear in x, y on the periodic part E exp(-i k_par.r)) and integrated
    by Filon-type product integration (``solvers.coupling.phase_integral``).  Beyond
    the first and last pixel planes the media are homogeneous: the scattered field on
    each of those planes is split into Floquet orders by a 2D FFT,
    ``E = sum_mn A_mn exp(i (k_mn.r_par + k_z,mn (z - z_p)))``, every order travelling
    or decaying away from the structure, and the incident plane wave is known (it was
    calibrated).  Each piece ``a exp(i q s)`` is integrated analytically,
    ``int_{s_p}^inf = -a exp(i q s_p) / (i q)`` above and ``+a exp(i q s_p) / (i q)``
    below: exact for evanescent orders and the adiabatic-switching limit for
    propagating ones, as for the 2D open paths.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
from scipy import constants

from .runner import FdtdWorkerError, run_worker

WORKER3D = Path(__file__).with_name("worker3d.py")


@dataclass(frozen=True)
class FdtdSlab:
    """A layer ``z_lo <= z <= z_hi`` filling the cell in x and y (m; +-inf allowed)."""

    z_lo_m: float
    z_hi_m: float
    eps: complex


@dataclass(frozen=True)
class FdtdHole:
    """An elliptic cylinder ``z_lo <= z <= z_hi`` (semi-axes a, b; a at ``angle_rad``
    from x) of permittivity ``eps``, painted over what lies below it in the list."""

    center_m: tuple[float, float]
    semi_axes_m: tuple[float, float]
    z_lo_m: float
    z_hi_m: float
    eps: complex = 1.0 + 0j
    angle_rad: float = 0.0


@dataclass(frozen=True)
class Fdtd3dProblem:
    """A 3D plane-wave problem in one rectangular unit cell (SI, radians).

    ``theta_rad``/``phi_rad``: polar angle from the z axis of the incidence side and
    azimuth from x toward y; ``psi_rad``: polarization angle (0 p, pi/2 s).
    ``objects`` are painted in order over ``eps_background``.
    """

    size_x_m: float
    size_y_m: float
    z_min_m: float
    size_z_m: float
    wavelength_m: float
    objects: tuple = ()
    theta_rad: float = 0.0
    phi_rad: float = 0.0
    psi_rad: float = 0.0
    side: str = "below"
    eps_incidence: float = 1.0
    eps_background: complex = 1.0 + 0j
    pml_m: float = 0.5e-6
    cells_per_um: float = 40.0
    amplitude_V_per_m: float = 1.0
    steady_tol: float = 1e-3
    max_periods: float = 400.0

    def __post_init__(self):
        for name in ("size_x_m", "size_y_m", "size_z_m", "wavelength_m", "pml_m",
                     "cells_per_um", "steady_tol", "max_periods"):
            if not getattr(self, name) > 0:
                raise ValueError(f"{name} must be positive, got {getattr(self, name)}")
        if self.side not in ("below", "above"):
            raise ValueError(f"side must be 'below' or 'above', got {self.side!r}")
        if not 0 <= self.theta_rad < math.pi / 2:
            raise ValueError(f"theta_rad must lie in [0, pi/2), got {self.theta_rad}")
        for o in self.objects:
            e = complex(o.eps)
            if not e.real > 0 or e.imag < 0:
                raise ValueError(f"object eps = {e}: needs Re > 0 and Im >= 0")

    @property
    def k_parallel(self) -> tuple[float, float]:
        k = 2 * math.pi / self.wavelength_m * math.sqrt(self.eps_incidence)
        return (k * math.sin(self.theta_rad) * math.cos(self.phi_rad),
                k * math.sin(self.theta_rad) * math.sin(self.phi_rad))

    def incident(self) -> tuple[np.ndarray, np.ndarray]:
        """(k vector, E0 polarization vector) of the incident wave (1/m, V/m)."""
        sz = 1.0 if self.side == "below" else -1.0
        t, f, p = self.theta_rad, self.phi_rad, self.psi_rad
        k_hat = np.array([math.sin(t) * math.cos(f), math.sin(t) * math.sin(f),
                          sz * math.cos(t)])
        s_hat = np.array([-math.sin(f), math.cos(f), 0.0])
        p_hat = np.cross(s_hat, k_hat)
        k = 2 * math.pi / self.wavelength_m * math.sqrt(self.eps_incidence)
        return k * k_hat, self.amplitude_V_per_m * (math.cos(p) * p_hat + math.sin(p) * s_hat)

    def to_json(self) -> dict:
        um = 1e-6
        big = 1e3  # um: an "infinite" end, clipped to the cell by the worker
        objs = []
        for o in self.objects:
            lo = -big if not math.isfinite(o.z_lo_m) else o.z_lo_m / um
            hi = big if not math.isfinite(o.z_hi_m) else o.z_hi_m / um
            e = complex(o.eps)
            d = {"z_lo_um": lo, "z_hi_um": hi, "eps_re": e.real, "eps_im": e.imag}
            if isinstance(o, FdtdSlab):
                d["kind"] = "slab"
            else:
                d.update(kind="hole", center_um=[c / um for c in o.center_m],
                         axes_um=[a / um for a in o.semi_axes_m], angle_rad=o.angle_rad)
            objs.append(d)
        eb = complex(self.eps_background)
        return {"size_x_m": self.size_x_m, "size_y_m": self.size_y_m,
                "z_min_m": self.z_min_m, "size_z_m": self.size_z_m,
                "wavelength_m": self.wavelength_m, "objects": objs,
                "theta_rad": self.theta_rad, "phi_rad": self.phi_rad, "psi_rad": self.psi_rad,
                "side": self.side, "eps_incidence": float(self.eps_incidence),
                "eps_background": [eb.real, eb.imag], "pml_m": self.pml_m,
                "cells_per_um": self.cells_per_um,
                "amplitude_V_per_m": self.amplitude_V_per_m, "steady_tol": self.steady_tol,
                "max_periods": self.max_periods}


@dataclass(frozen=True)
class Fdtd3dResult:
    """E on the pixel centres of the physical region: arrays [ix, iy, iz] (SI)."""

    x: np.ndarray
    y: np.ndarray
    z: np.ndarray
    ex: np.ndarray
    ey: np.ndarray
    ez: np.ndarray
    grid_step_m: float
    wall_s: float
    meep_version: str
    info: dict = field(default_factory=dict)

    @property
    def converged(self) -> bool:
        return bool(self.info.get("converged", False))


def _read(path: Path) -> Fdtd3dResult:
    with np.load(path, allow_pickle=False) as d:
        meta = json.loads(str(d["meta"]))
        return Fdtd3dResult(d["x"], d["y"], d["z"], d["ex"], d["ey"], d["ez"],
                            float(meta["dx_m"]), float(meta["wall_s"]), meta["meep_version"],
                            meta)


def run_fdtd3d(problem: Fdtd3dProblem, *, timeout_s: float = 900.0,
               progress: Callable[[str], None] | None = None) -> Fdtd3dResult:
    """Run the 3D worker on ``problem`` (wall-time guard ``timeout_s``)."""
    res = run_worker(WORKER3D, problem.to_json(), _read, timeout_s=timeout_s,
                     progress=progress)
    if res.x.size < 2 or res.y.size < 2 or res.z.size < 2:
        raise FdtdWorkerError("3D Meep worker returned an empty volume")
    return res


# ------------------------------------------------------------------ coupling along a line
def _periodic_part(res: Fdtd3dResult, kpar):
    X, Y = np.meshgrid(res.x, res.y, indexing="ij")
    ph = np.exp(-1j * (kpar[0] * X + kpar[1] * Y))[:, :, None]
    return [f * ph for f in (res.ex, res.ey, res.ez)]


def _bilinear(u, res: Fdtd3dResult, problem: Fdtd3dProblem, x, y, k):
    """Periodic part u (nx, ny, nz) at (x, y) on plane index k (bilinear, wrapped)."""
    dx = res.grid_step_m
    nx, ny = u.shape[0], u.shape[1]
    tx = (x - res.x[0]) / dx
    ty = (y - res.y[0]) / (problem.size_y_m / ny)
    i0, j0 = math.floor(tx), math.floor(ty)
    fx, fy = tx - i0, ty - j0
    i0, j0 = i0 % nx, j0 % ny
    i1, j1 = (i0 + 1) % nx, (j0 + 1) % ny
    return ((1 - fx) * (1 - fy) * u[i0, j0, k] + fx * (1 - fy) * u[i1, j0, k]
            + (1 - fx) * fy * u[i0, j1, k] + fx * fy * u[i1, j1, k])


def floquet_amplitudes(plane: np.ndarray, res: Fdtd3dResult, problem: Fdtd3dProblem):
    """Orders of one plane of the periodic part: (Gx, Gy, A) with A (3, nx, ny)."""
    nx, ny = plane.shape[1], plane.shape[2]
    lx, ly = problem.size_x_m, problem.size_y_m
    gx = 2 * np.pi * np.fft.fftfreq(nx, d=1.0 / nx) / lx
    gy = 2 * np.pi * np.fft.fftfreq(ny, d=1.0 / ny) / ly
    GX, GY = np.meshgrid(gx, gy, indexing="ij")
    A = np.fft.fft2(plane, axes=(1, 2)) / (nx * ny)
    A = A * np.exp(-1j * (GX * res.x[0] + GY * res.y[0]))[None]
    return GX, GY, A


def line_coupling(res: Fdtd3dResult, problem: Fdtd3dProblem, point, direction, velocity,
                  eps_below: complex, eps_above: complex, z0: float = 0.0):
    """``(I_total, I_box)`` along the line through ``(point, z0)`` with unit ``direction``.

    See the module docstring.  ``eps_below``/``eps_above``: the homogeneous media
    beyond the physical region.
    """
    from solvers.coupling import phase_integral

    sx, sy, sz = (float(c) for c in direction)
    if not sz > 0:
        raise ValueError("the path must cross the stack (direction z component > 0)")
    omega = 2 * math.pi * constants.c / problem.wavelength_m
    q0 = omega / velocity
    kpar = problem.k_parallel
    u = _periodic_part(res, kpar)
    s_nodes = (res.z - z0) / sz
    x_n, y_n = point[0] + sx * s_nodes, point[1] + sy * s_nodes
    samples = []
    for k in range(res.z.size):
        bloch = np.exp(1j * (kpar[0] * x_n[k] + kpar[1] * y_n[k]))
        e = [_bilinear(c, res, problem, x_n[k], y_n[k], k) * bloch for c in u]
        samples.append(e[0] * sx + e[1] * sy + e[2] * sz)
    box = complex(phase_integral(np.array(samples), s_nodes, q0, xp=np))

    k_inc, e_inc = problem.incident()
    k0 = 2 * math.pi / problem.wavelength_m
    total = box
    for end, eps_out, sign in ((0, eps_below, -1.0), (-1, eps_above, +1.0)):
        zp = float(res.z[end])
        sp = (zp - z0) / sz
        plane = np.stack([c[:, :, end] for c in u])
        incident_here = (problem.side == "below") == (sign < 0)
        if incident_here:
            # remove the incident wave from the periodic part (it is the (0, 0) order)
            ph = np.exp(1j * k_inc[2] * zp)
            plane = plane - (e_inc * ph)[:, None, None]
        GX, GY, A = floquet_amplitudes(plane, res, problem)
        KX, KY = kpar[0] + GX, kpar[1] + GY
        kz = np.sqrt(complex(eps_out) * k0**2 - KX**2 - KY**2 + 0j)
        kz = np.where(np.imag(kz) < 0, -kz, kz)
        kz = sign * kz  # away from the structure
        a_s = A[0] * sx + A[1] * sy + A[2] * sz
        # phase of the order at the crossing point of the plane
        xs, ys = point[0] + sx * sp, point[1] + sy * sp
        phase = np.exp(1j * (KX * xs + KY * ys))
        q = KX * sx + KY * sy + kz * sz - q0
        tail = -sign * a_s * phase * np.exp(-1j * q0 * sp) / (1j * q)
        total += complex(np.sum(tail))
        if incident_here:
            r_p = np.array([xs, ys, zp])
            a_inc = complex(np.dot(e_inc, [sx, sy, sz])) * complex(np.exp(1j * np.dot(k_inc,
                                                                                       r_p)))
            q_inc = float(np.dot(k_inc, [sx, sy, sz])) - q0
            total += -sign * a_inc * complex(np.exp(-1j * q0 * sp)) / (1j * q_inc)
    return total, box
