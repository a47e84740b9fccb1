"""Problem descriptions for the 2D FDFD solver: boundaries, sources, the problem itself.

All quantities in SI units (metres, rad/s, rad/m).  Frozen dataclasses; they are
checked once here so that the numerical kernels can trust them.

Conventions (see the module docstring of :mod:`solvers.fdfd`): time dependence
``exp(-i omega t)``, fields are complex peak amplitudes, the plane of simulation is
(x, z) and the polarization has E in that plane (Ex, Ez, Hy).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Union

import numpy as np
from scipy import constants

from solvers.grid import Grid

C0 = constants.c
EPS0 = constants.epsilon_0
MU0 = constants.mu_0
Z0 = math.sqrt(MU0 / EPS0)

_SIDES = ("below", "above")


@dataclass(frozen=True)
class Pml:
    """Stretched-coordinate perfectly matched layer (Chew & Weedon 1994).

    The outer ``cells_x`` cells on the left and right and the outer ``cells_z`` cells
    at the bottom and top of the Grid are absorbing; the physical region is the
    interior.  ``cells_x = 0`` means x is Bloch-periodic.

    Inside a layer of thickness L the coordinate is stretched by
    ``s(d) = 1 + i * strength * (d / L) ** order`` with d the depth into the layer,
    so a wave with normal wavenumber k_n is attenuated on the round trip by
    ``exp(-2 k_n L strength / (order + 1))`` (S. G. Johnson, "Notes on perfectly
    matched layers", MIT 2008).  The default strength was chosen by measurement:
    power reflection < 1e-4 for 20 cells at 30 cells per wavelength, 0-60 degrees.
    """

    cells_x: int = 0
    cells_z: int = 20
    strength: float = 24.0
    order: float = 3.0

    def __post_init__(self):
        if self.cells_x < 0 or self.cells_z < 1:
            raise ValueError(
                f"PML needs cells_x >= 0 and cells_z >= 1, got {self.cells_x}, {self.cells_z}"
            )
        if not (self.strength > 0 and self.order >= 0):
            raise ValueError(f"PML strength must be > 0 and order >= 0, got {self}")

    @property
    def periodic_x(self) -> bool:
        return self.cells_x == 0


def _check_launch(side: str, angle_rad: float, eps_incidence: complex) -> None:
    """The checks every source shares: side, angle and incidence medium."""
    if side not in _SIDES:
        raise ValueError(f"side must be one of {_SIDES}, got {side!r}")
    if not abs(angle_rad) < math.pi / 2:
        raise ValueError(f"angle must be within (-pi/2, pi/2), got {angle_rad}")
    if not np.isfinite(eps_incidence) or np.real(eps_incidence) <= 0:
        raise ValueError(f"incidence medium must have Re(eps) > 0, got {eps_incidence}")


@dataclass(frozen=True)
class PlaneWave:
    """Plane wave of known peak amplitude, launched on a line (total-field/scattered-field).

    ``side="below"``: travels toward +z from a source line just above the bottom PML
    (or at ``z_source``); ``side="above"``: travels toward -z from just below the top
    PML.  ``angle_rad`` is measured from the propagation axis (+z or -z); positive
    angles tilt k toward +x, so ``k_x = sqrt(eps_incidence) * omega / c * sin(angle)``.
    The incident wave's peak |E| in the incidence medium is ``amplitude_V_per_m``;
    its Hy is real and positive at x = z = 0:
    ``Hy = n E0 / Z0 * exp(i (k_x x + k_z z))``.

    The medium at the source line must be homogeneous with ``eps_incidence``.
    The field returned by the solver is the total field everywhere; below the source
    line (side="below") the scattered part is the reflected wave only.
    """

    angle_rad: float
    eps_incidence: complex = 1.0
    side: str = "below"
    amplitude_V_per_m: float = 1.0
    z_source: float | None = None

    def __post_init__(self):
        _check_launch(self.side, self.angle_rad, self.eps_incidence)

    @property
    def n_incidence(self) -> complex:
        return complex(np.sqrt(complex(self.eps_incidence)))

    def kx(self, omega: float) -> float:
        """Tangential wavenumber k_x = n omega / c sin(angle) (rad/m)."""
        return float(np.real(self.n_incidence) * omega / C0 * math.sin(self.angle_rad))


@dataclass(frozen=True)
class GaussianBeam:
    """Gaussian beam (2D, invariant along y) focused at (x_focus, z_focus).

    Built as a sum of discrete plane waves (angular spectrum) whose amplitudes in the
    beam's own frame follow ``exp(-(k_perp w0 / 2)**2)``; evanescent components are
    dropped.  ``waist_m`` is the 1/e field radius w0 at focus; ``angle_rad`` the tilt
    of the beam axis from +z (side="below") or -z (side="above"), positive toward +x.
    ``amplitude_V_per_m`` is the peak |E| at the focus.
    """

    waist_m: float
    angle_rad: float
    x_focus: float
    z_focus: float
    eps_incidence: complex = 1.0
    side: str = "below"
    amplitude_V_per_m: float = 1.0
    z_source: float | None = None

    def __post_init__(self):
        _check_launch(self.side, self.angle_rad, self.eps_incidence)
        if not self.waist_m > 0:
            raise ValueError(f"waist must be positive, got {self.waist_m}")

    @property
    def n_incidence(self) -> complex:
        return complex(np.sqrt(complex(self.eps_incidence)))


Source = Union[PlaneWave, GaussianBeam]


@dataclass(frozen=True)
class FdfdProblem:
    """One frequency-domain problem: grid, angular frequency, boundaries and source.

    ``bloch_kx`` (rad/m) applies when x is periodic (``pml.cells_x == 0``); None
    derives it from the plane wave's k_x (0 for a Gaussian beam).  When set directly
    (phase-matched cases) a plane-wave source must satisfy
    ``k_x(source) = bloch_kx + 2 pi m / period`` for some integer m.
    """

    grid: Grid
    omega: float
    pml: Pml
    source: Source
    bloch_kx: float | None = None

    def __post_init__(self):
        if not (self.omega > 0 and math.isfinite(self.omega)):
            raise ValueError(f"omega must be positive and finite, got {self.omega}")
        g, p = self.grid, self.pml
        if 2 * p.cells_z + 4 >= g.nz:
            raise ValueError(f"grid of {g.nz} cells along z is too small for 2 x {p.cells_z} "
                             "PML cells plus a source")
        if 2 * p.cells_x >= g.nx:
            raise ValueError(f"grid of {g.nx} cells along x is too small for 2 x {p.cells_x} "
                             "PML cells")
        if not isinstance(self.source, (PlaneWave, GaussianBeam)):
            raise ValueError(f"unsupported source {type(self.source).__name__}")
        if isinstance(self.source, PlaneWave):
            if not p.periodic_x:
                raise ValueError("a plane-wave source needs a Bloch-periodic x (Pml.cells_x=0)")
            if self.bloch_kx is not None:
                period = g.size_x
                m = (self.source.kx(self.omega) - self.bloch_kx) * period / (2 * math.pi)
                if abs(m - round(m)) > 1e-6:
                    raise ValueError(
                        "plane wave k_x differs from bloch_kx by a non-integer number of "
                        f"reciprocal lattice vectors ({m:.6g})"
                    )
        if self.bloch_kx is not None and not p.periodic_x:
            raise ValueError("bloch_kx given but x is not periodic (Pml.cells_x > 0)")

    @property
    def k0(self) -> float:
        return self.omega / C0

    @property
    def wavelength(self) -> float:
        """Vacuum wavelength 2 pi c / omega (m)."""
        return 2 * math.pi * C0 / self.omega

    @property
    def kx_bloch(self) -> float:
        """Bloch wavevector actually used (0 when x is not periodic)."""
        if not self.pml.periodic_x:
            return 0.0
        if self.bloch_kx is not None:
            return float(self.bloch_kx)
        if isinstance(self.source, PlaneWave):
            return self.source.kx(self.omega)
        return 0.0

    @property
    def source_node(self) -> int:
        """Index k of the Ex node row on which the source line (TFSF boundary) lies.

        For side="below" Hy rows k >= node hold the total field, rows below it the
        scattered field; for side="above" rows k < node are total.
        """
        g, src, nzp = self.grid, self.source, self.pml.cells_z
        lo, hi = nzp + 1, g.nz - nzp - 1  # both adjacent Hy rows outside the PML
        if src.z_source is None:
            node = lo + 1 if src.side == "below" else hi - 1
        else:
            node = int(round((src.z_source - g.z0) / g.dz))
        if not lo <= node <= hi:
            raise ValueError(
                f"source line at node {node} is inside the PML or outside the grid "
                f"(allowed nodes {lo}..{hi})"
            )
        return node
