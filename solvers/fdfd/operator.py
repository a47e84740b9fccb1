"""Discrete Maxwell operator for (Ex, Ez, Hy) on the Yee grid of :mod:`solvers.grid`.

With ``exp(-i omega t)``, Maxwell's curl equations for fields invariant along y give

    Ex = (1 / (i omega eps0 eps_x)) (1/s_z) dHy/dz
    Ez = -(1 / (i omega eps0 eps_z)) (1/s_x) dHy/dx
    (1/s_z) d/dz [(1/(eps_x s_z)) dHy/dz] + (1/s_x) d/dx [(1/(eps_z s_x)) dHy/dx] + k0^2 Hy = 0

with complex coordinate stretching s_x(x), s_z(z) in the PML (Chew & Weedon 1994).
The Hy equation is multiplied by ``s_x s_z`` (at Hy points), which makes the matrix
complex symmetric when the Bloch phase is trivial and leaves the solution unchanged:

    A = Dzf diag(c_x / eps_x) Dzb + Dxf diag(c_z / eps_z) Dxb + k0^2 diag(s_x s_z)

``c_x = s_x(x_c) / s_z(z_n)`` at Ex points and ``c_z = s_z(z_c) / s_x(x_n)`` at Ez
points.  ``Dzb``/``Dxb`` take Hy (cell centres) to Ex/Ez positions (backward
differences), ``Dzf``/``Dxf`` bring them back (forward differences).  Beyond the grid
Hy = 0 below/left and Ex = Ez = 0 above/right, all inside the PML; along a periodic
x the neighbours wrap with the Bloch phase ``exp(i k_x L_x)``.
Unknowns are flattened C-order from arrays indexed ``[ix, iz]``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from solvers.fdfd.specs import EPS0, FdfdProblem


def stretch_profile(coords: np.ndarray, lo: float, hi: float, thickness: float,
                    strength: float, order: float) -> np.ndarray:
    """Stretch factor ``1 + i strength (d / L)^order``; d = depth beyond [lo, hi] (m)."""
    if thickness <= 0:
        return np.ones_like(coords, dtype=complex)
    d = np.maximum(lo - coords, 0.0) + np.maximum(coords - hi, 0.0)
    return 1.0 + 1j * strength * (d / thickness) ** order


def _diff_backward(n: int, h: float, phase: complex | None) -> sp.csr_matrix:
    """(f[j] - f[j-1]) / h with f[-1] = f[n-1] / phase (periodic) or 0."""
    D = sp.diags([np.ones(n), -np.ones(n - 1)], [0, -1], shape=(n, n), dtype=complex,
                 format="lil")
    if phase is not None:
        D[0, n - 1] += -1.0 / phase
    return sp.csr_matrix(D) / h


def _diff_forward(n: int, h: float, phase: complex | None) -> sp.csr_matrix:
    """(f[j+1] - f[j]) / h with f[n] = f[0] * phase (periodic) or 0."""
    D = sp.diags([-np.ones(n), np.ones(n - 1)], [0, 1], shape=(n, n), dtype=complex,
                 format="lil")
    if phase is not None:
        D[n - 1, 0] += phase
    return sp.csr_matrix(D) / h


@dataclass(frozen=True)
class Operator:
    """The permittivity-independent pieces of the FDFD system of one problem."""

    shape: tuple[int, int]
    k0: float
    omega: float
    dzb: sp.csr_matrix
    dzf: sp.csr_matrix
    dxb: sp.csr_matrix
    dxf: sp.csr_matrix
    cx: np.ndarray  # (nx, nz) at Ex points, s_x(x_c)/s_z(z_n)
    cz: np.ndarray  # (nx, nz) at Ez points, s_z(z_c)/s_x(x_n)
    ax: np.ndarray  # (nx, nz) at Ex points, 1/s_z(z_n)
    az: np.ndarray  # (nx, nz) at Ez points, 1/s_x(x_n)
    m: np.ndarray  # (nx, nz) at Hy points, s_x(x_c) s_z(z_c)

    def matrix(self, eps_x: np.ndarray, eps_z: np.ndarray) -> sp.csc_matrix:
        """System matrix A for permittivities at Ex and Ez points."""
        tx = sp.diags((self.cx / eps_x).ravel())
        tz = sp.diags((self.cz / eps_z).ravel())
        A = self.dzf @ tx @ self.dzb + self.dxf @ tz @ self.dxb
        A = A + sp.diags(self.k0**2 * self.m.ravel())
        return sp.csc_matrix(A)

    def e_from_h(self, hy: np.ndarray, eps_x, eps_z) -> tuple[np.ndarray, np.ndarray]:
        """(Ex, Ez) from Hy.

        Ex = (1/s_z) dHy/dz / (i w eps0 eps_x),  Ez = -(1/s_x) dHy/dx / (i w eps0 eps_z).
        """
        iwe = 1j * self.omega * EPS0
        h = hy.ravel()
        ex = self.ax * (self.dzb @ h).reshape(self.shape) / (iwe * eps_x)
        ez = -self.az * (self.dxb @ h).reshape(self.shape) / (iwe * eps_z)
        return ex, ez


def build_operator(problem: FdfdProblem) -> Operator:
    g, pml = problem.grid, problem.pml
    phase = np.exp(1j * problem.kx_bloch * g.size_x) if pml.periodic_x else None
    ix, iz = sp.identity(g.nx, format="csr"), sp.identity(g.nz, format="csr")
    dzb = sp.csr_matrix(sp.kron(ix, _diff_backward(g.nz, g.dz, None)))
    dzf = sp.csr_matrix(sp.kron(ix, _diff_forward(g.nz, g.dz, None)))
    dxb = sp.csr_matrix(sp.kron(_diff_backward(g.nx, g.dx, phase), iz))
    dxf = sp.csr_matrix(sp.kron(_diff_forward(g.nx, g.dx, phase), iz))

    Lz = pml.cells_z * g.dz
    zlo, zhi = g.z0 + Lz, g.z0 + g.size_z - Lz
    Lx = pml.cells_x * g.dx
    xlo, xhi = g.x0 + Lx, g.x0 + g.size_x - Lx

    def sz(z):
        return stretch_profile(z, zlo, zhi, Lz, pml.strength, pml.order)

    def sx(x):
        return stretch_profile(x, xlo, xhi, Lx, pml.strength, pml.order)

    sxc, sxn = sx(g.x_centres())[:, None], sx(g.x_nodes())[:, None]
    szc, szn = sz(g.z_centres())[None, :], sz(g.z_nodes())[None, :]
    ones = np.ones(g.shape, dtype=complex)
    return Operator(
        shape=g.shape, k0=problem.k0, omega=problem.omega,
        dzb=dzb, dzf=dzf, dxb=dxb, dxf=dxf,
        cx=ones * sxc / szn, cz=ones * szc / sxn,
        ax=ones / szn, az=ones / sxn, m=ones * sxc * szc,
    )
