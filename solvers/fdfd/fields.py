"""Solved fields, sampling consistent with the Yee staggering, |E| and Poynting flux.

The array-level functions (:func:`interpolate`, :func:`e_at_centres`,
:func:`e_magnitude_at_centres`, :func:`flux_z`) run on ``jax.numpy`` when given JAX
arrays or tracers (so objectives built on :func:`solvers.fdfd.field_solver` can use
them under ``jit``/``grad``) and on plain numpy otherwise.
:class:`Fields` wraps one numpy solution.

Sampling: each component is bilinearly interpolated from its own positions (see
:mod:`solvers.grid`).  When x is Bloch-periodic, points anywhere along x are allowed:
a sample one period to the right is the sample times ``exp(i k_x L_x)``.  Along z
(and along a non-periodic x) points beyond the outermost samples take the edge
value (those points lie in the PML, where fields are not physical).

Poynting flux through the horizontal plane at Ex node k (time-averaged, per unit
length along y, W/m):  ``P_z = (1/2) sum_i Re(Ex[i,k] conj(Hy_avg[i,k])) dx`` with
``Hy_avg`` the mean of the two Hy rows next to the node.  In a lossless region this
discrete flux is conserved exactly from plane to plane by the Yee equations, so
R + T = 1 holds to solver precision (it is the discrete Poynting theorem; see
Taflove & Hagness, Computational Electrodynamics, 3rd ed., ch. 3).
"""

from __future__ import annotations

from dataclasses import dataclass

import jax
import jax.numpy as jnp
import numpy as np

from solvers.grid import Grid


def _xp(*arrays):
    """jax.numpy if any argument is a JAX array or tracer, else numpy (no compile cost)."""
    return jnp if any(isinstance(a, jax.Array) for a in arrays) else np

# offsets (in cells) of each component's first sample from (x0, z0)
_OFFSETS = {"ex": (0.5, 0.0), "ez": (0.0, 0.5), "hy": (0.5, 0.5)}


def _axis_weights(xp, t, n: int, periodic: bool):
    """Lower index, upper index, upper weight and wrap counts for fractional index t."""
    i0 = xp.floor(t)
    w = t - i0
    i0 = i0.astype(xp.int64)
    if periodic:
        i1 = i0 + 1
        return i0 % n, i1 % n, w, i0 // n, i1 // n
    i0c = xp.clip(i0, 0, n - 1)
    i1c = xp.clip(i0 + 1, 0, n - 1)
    w = xp.where(i0 < 0, 0.0, xp.where(i0 >= n - 1, 1.0, w))
    zero = xp.zeros_like(i0)
    return i0c, i1c, w, zero, zero


def interpolate(values, grid: Grid, component: str, x, z, *, bloch_kx: float = 0.0,
                periodic_x: bool = True):
    """Bilinear interpolation of one component ('ex', 'ez', 'hy') at points (x, z) (m)."""
    ox, oz = _OFFSETS[component]
    xp = _xp(values, x, z)
    x, z = xp.broadcast_arrays(xp.asarray(x, dtype=float), xp.asarray(z, dtype=float))
    tx = (x - grid.x0) / grid.dx - ox
    tz = (z - grid.z0) / grid.dz - oz
    i0, i1, wx, p0, p1 = _axis_weights(xp, tx, grid.nx, periodic_x)
    k0, k1, wz, _, _ = _axis_weights(xp, tz, grid.nz, False)
    v = xp.asarray(values)
    if periodic_x:
        ph = xp.exp(1j * bloch_kx * grid.size_x)
        f0, f1 = ph ** p0, ph ** p1
    else:
        f0 = f1 = 1.0
    lo = (1 - wz) * v[i0, k0] + wz * v[i0, k1]
    hi = (1 - wz) * v[i1, k0] + wz * v[i1, k1]
    return (1 - wx) * f0 * lo + wx * f1 * hi


def e_at_centres(ex, ez, grid: Grid, *, bloch_kx: float = 0.0, periodic_x: bool = True):
    """Ex and Ez brought to the cell centres (Hy points) by averaging their two neighbours."""
    xp = _xp(ex, ez)
    ex_up = xp.concatenate([ex[:, 1:], ex[:, -1:]], axis=1)
    if periodic_x:
        ez_right = xp.concatenate(
            [ez[1:], ez[:1] * np.exp(1j * bloch_kx * grid.size_x)], axis=0)
    else:
        ez_right = xp.concatenate([ez[1:], ez[-1:]], axis=0)
    return 0.5 * (ex + ex_up), 0.5 * (ez + ez_right)


def e_magnitude_at_centres(ex, ez, grid: Grid, *, bloch_kx: float = 0.0,
                           periodic_x: bool = True):
    """|E| at the cell centres (peak amplitude, V/m).

    ``|E|^2 = (|Ex_below|^2 + |Ex_above|^2)/2 + (|Ez_left|^2 + |Ez_right|^2)/2``:
    averaging the squared magnitudes of the two neighbours of each component (rather
    than the complex values) keeps |E| of a plane wave exact on the grid; the
    complex average would lower it by cos(k h / 2) (about 0.5 % at 30 cells per
    wavelength).  Common practice, no source.
    """
    xp = _xp(ex, ez)
    ax = xp.abs(ex) ** 2
    az = xp.abs(ez) ** 2
    ax_up = xp.concatenate([ax[:, 1:], ax[:, -1:]], axis=1)
    if periodic_x:
        az_right = xp.concatenate([az[1:], az[:1]], axis=0)
    else:
        az_right = xp.concatenate([az[1:], az[-1:]], axis=0)
    return xp.sqrt(0.5 * (ax + ax_up) + 0.5 * (az + az_right))


def flux_z(ex, hy, grid: Grid, node: int):
    """Time-averaged Poynting flux through the plane of Ex node ``node`` (W/m, +z positive)."""
    if not 1 <= node <= grid.nz - 1:
        raise ValueError(f"flux plane node must be within 1..{grid.nz - 1}, got {node}")
    xp = _xp(ex, hy)
    h_avg = 0.5 * (hy[:, node - 1] + hy[:, node])
    return 0.5 * xp.sum(xp.real(ex[:, node] * xp.conj(h_avg))) * grid.dx


def floquet_amplitudes(row, grid: Grid, component: str, bloch_kx: float):
    """Amplitudes c_m of ``row(x) = sum_m c_m exp(i (k_x + 2 pi m / L) x)`` along one z row.

    Returns (m, k_m, c_m) in FFT order; needs a Bloch-periodic x.
    """
    ox, _ = _OFFSETS[component]
    n = grid.nx
    x = grid.x0 + (np.arange(n) + ox) * grid.dx
    m = np.fft.fftfreq(n, d=1.0 / n).astype(int)
    km = bloch_kx + 2 * np.pi * m / grid.size_x
    # exact DFT on the sample positions, sign and origin included
    c = np.exp(-1j * np.outer(km, x)) @ np.asarray(row) / n
    return m, km, c


@dataclass(frozen=True)
class Fields:
    """One FDFD solution: complex peak amplitudes (V/m, A/m) on the grid, shape (nx, nz).

    Total fields everywhere (incident + scattered).  Values inside the PML are not
    physical.  ``problem`` (when set) gives access to the incident wave.
    """

    ex: np.ndarray
    ez: np.ndarray
    hy: np.ndarray
    grid: Grid
    omega: float
    bloch_kx: float
    periodic_x: bool = True
    problem: object | None = None

    def _interp(self, comp, x, z):
        x, z = np.broadcast_arrays(np.asarray(x, float), np.asarray(z, float))
        g = self.grid
        if np.any((z < g.z0) | (z > g.z0 + g.size_z)):
            raise ValueError("sample points outside the grid along z")
        if not self.periodic_x and np.any((x < g.x0) | (x > g.x0 + g.size_x)):
            raise ValueError("sample points outside the grid along x")
        return np.asarray(interpolate(getattr(self, comp), g, comp, x, z,
                                      bloch_kx=self.bloch_kx, periodic_x=self.periodic_x))

    def sample_ex(self, x, z) -> np.ndarray:
        return self._interp("ex", x, z)

    def sample_ez(self, x, z) -> np.ndarray:
        return self._interp("ez", x, z)

    def sample_hy(self, x, z) -> np.ndarray:
        return self._interp("hy", x, z)

    def sample_e(self, x, z) -> tuple[np.ndarray, np.ndarray]:
        return self.sample_ex(x, z), self.sample_ez(x, z)

    def e_magnitude_at_centres(self) -> np.ndarray:
        return np.asarray(e_magnitude_at_centres(self.ex, self.ez, self.grid,
                                                 bloch_kx=self.bloch_kx,
                                                 periodic_x=self.periodic_x))

    def max_field_in(self, mask) -> float:
        """max(weight * |E|) over cells; a boolean mask selects cells (weight 1)."""
        mask = np.asarray(mask)
        if mask.shape != self.grid.shape:
            raise ValueError(f"mask shape {mask.shape} != grid shape {self.grid.shape}")
        w = mask.astype(float)
        if not np.any(w > 0):
            raise ValueError("mask selects no cells")
        return float(np.max(w * self.e_magnitude_at_centres()))

    def node_at(self, z: float) -> int:
        """Index of the Ex node row nearest to height z."""
        return int(round((z - self.grid.z0) / self.grid.dz))

    def flux_z(self, z: float, subtract_incident: bool = False) -> float:
        """Poynting flux (W/m) through the horizontal plane nearest to z.

        ``subtract_incident=True`` uses the scattered field (total minus the discrete
        incident wave); meaningful in the incidence medium.
        """
        k = self.node_at(z)
        ex, hy = self.ex, self.hy
        if subtract_incident:
            iex, ihy = self.incident_rows(k)
            ex = ex[:, k - 1:k + 1] - iex
            hy = hy[:, k - 1:k + 1] - ihy
            return float(_flux_two_rows(ex, hy, self.grid))
        return float(flux_z(ex, hy, self.grid, k))

    def incident_rows(self, node: int):
        """Discrete incident (Ex, Hy) on Ex rows node-1, node and Hy rows node-1, node."""
        from solvers.fdfd.sources import evaluate_modes, incident_modes

        if self.problem is None:
            raise ValueError("these fields carry no problem description")
        g = self.grid
        modes = incident_modes(self.problem, discrete=True)
        rows = [node - 1, node]
        X, Zn = np.meshgrid(g.x_centres(), g.z_nodes()[rows], indexing="ij")
        _, Zc = np.meshgrid(g.x_centres(), g.z_centres()[rows], indexing="ij")
        return evaluate_modes(modes, X, Zn, "ex"), evaluate_modes(modes, X, Zc, "hy")

    def incident_flux(self) -> float:
        """|flux| of the discrete incident wave through a horizontal plane (W/m)."""
        k = self.problem.source_node
        iex, ihy = self.incident_rows(k)
        return abs(float(_flux_two_rows(iex, ihy, self.grid)))

    def power_coefficients(self, z_reflect: float, z_transmit: float) -> tuple[float, float]:
        """(R, T): reflected and transmitted power over incident power.

        ``z_reflect`` lies in the incidence medium between the source line and the
        structure (or beyond the source line), ``z_transmit`` on the far side of the
        structure, both in lossless media outside the PML.
        """
        sgn = 1.0 if self.problem.source.side == "below" else -1.0
        p_inc = self.incident_flux()
        r = -sgn * self.flux_z(z_reflect, subtract_incident=True) / p_inc
        t = sgn * self.flux_z(z_transmit) / p_inc
        return r, t


def _flux_two_rows(ex2, hy2, grid: Grid):
    """Flux at the upper Ex row of two-row slabs (Ex rows k-1, k; Hy rows k-1, k)."""
    h_avg = 0.5 * (hy2[:, 0] + hy2[:, 1])
    return 0.5 * np.sum(np.real(ex2[:, 1] * np.conj(h_avg))) * grid.dx
