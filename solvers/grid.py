"""The 2D Yee grid in the (x, z) plane shared by every solver and rasterizer.

Structures are invariant along y.  The polarization that couples to an electron
moving in the (x, z) plane has E in that plane: components Ex, Ez, Hy.

Staggering (cell (i, k) spans [x0 + i dx, x0 + (i+1) dx] x [z0 + k dz, z0 + (k+1) dz]):

* ``Hy[i, k]`` at the cell centre      (x0 + (i + 1/2) dx, z0 + (k + 1/2) dz)
* ``Ex[i, k]`` on the bottom cell face  (x0 + (i + 1/2) dx, z0 +  k        dz)
* ``Ez[i, k]`` on the left cell face    (x0 +  i        dx, z0 + (k + 1/2) dz)

Permittivity enters the solver as two arrays of shape (nx, nz): ``eps_x`` at the
Ex positions (the xx tensor component) and ``eps_z`` at the Ez positions (zz).
Arrays are indexed ``[ix, iz]``.  All lengths in metres.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Grid:
    """Uniform rectangular grid of ``nx`` x ``nz`` cells of size ``dx`` x ``dz`` (m).

    ``x0``, ``z0`` are the coordinates of the lower-left corner of cell (0, 0).
    Along x the domain is one period ``nx * dx`` when Bloch-periodic.
    """

    nx: int
    nz: int
    dx: float
    dz: float
    x0: float = 0.0
    z0: float = 0.0

    def __post_init__(self):
        if self.nx < 1 or self.nz < 1:
            raise ValueError(f"grid needs at least one cell per axis, got {self.nx} x {self.nz}")
        if not (self.dx > 0 and self.dz > 0):
            raise ValueError(f"grid spacing must be positive, got dx={self.dx}, dz={self.dz}")

    @property
    def shape(self) -> tuple[int, int]:
        return (self.nx, self.nz)

    @property
    def size_x(self) -> float:
        return self.nx * self.dx

    @property
    def size_z(self) -> float:
        return self.nz * self.dz

    # 1D coordinate axes of each staggered position
    def x_nodes(self) -> np.ndarray:
        """x of cell edges, i = 0..nx-1 (Ez positions)."""
        return self.x0 + np.arange(self.nx) * self.dx

    def x_centres(self) -> np.ndarray:
        """x of cell centres (Hy and Ex positions)."""
        return self.x0 + (np.arange(self.nx) + 0.5) * self.dx

    def z_nodes(self) -> np.ndarray:
        """z of cell edges, k = 0..nz-1 (Ex positions)."""
        return self.z0 + np.arange(self.nz) * self.dz

    def z_centres(self) -> np.ndarray:
        """z of cell centres (Hy and Ez positions)."""
        return self.z0 + (np.arange(self.nz) + 0.5) * self.dz

    def ex_coords(self) -> tuple[np.ndarray, np.ndarray]:
        """(x, z) axes of the Ex (and eps_x) positions."""
        return self.x_centres(), self.z_nodes()

    def ez_coords(self) -> tuple[np.ndarray, np.ndarray]:
        """(x, z) axes of the Ez (and eps_z) positions."""
        return self.x_nodes(), self.z_centres()

    def hy_coords(self) -> tuple[np.ndarray, np.ndarray]:
        """(x, z) axes of the Hy positions."""
        return self.x_centres(), self.z_centres()
