"""Meep worker, 3D: one unit cell of a stack periodic in x and y, lit by a plane wave.

Run as its own process by an interpreter that has Meep::

    PYTHON worker3d.py PROBLEM.json FIELDS.npz

Imports only the standard library, numpy, meep and its sibling ``worker`` (the 2D
worker: materials, tanh turn-on constants, logging).  Reads a problem in SI units
written by ``runner3d.py``; writes the complex peak amplitudes of (Ex, Ey, Ez) on the
pixel centres of the physical region.

Cell
    Meep's (X, Y, Z) are our (x, y, z) (both right-handed, no remapping); length unit
    1 um.  x and y are Bloch-periodic over the rectangular cell ``size_x`` x
    ``size_y`` centred on x = y = 0 (a hexagonal lattice is passed as its rectangular
    two-hole cell); PML along z only.  Objects are painted in order, later over
    earlier: slabs (infinite in x, y) and elliptic holes (prisms of 96 vertices,
    or cylinders for circles), each with a z range and a permittivity.

Source
    A sheet of electric current (Meep Ex, Ey) across the cell in the buffer on the
    incidence side, with the Bloch phase exp(i k_par.r).  Its tangential direction
    follows from the field a current sheet radiates, E_t = -(Z/2) [(J.s) s / cos t
    + (J.p_t) p_t cos t] (s, p_t unit vectors along s and the tangential part of p):
    J ~ cos(psi) p_t / cos t ... scaled so both polarizations come out in the ratio
    asked for.  The amplitude and phase are then calibrated exactly as in the 2D
    worker: an empty-cell run (incidence medium everywhere), the field on the pixel
    plane nearest z = 0 projected on exp(i k_par.r) and fitted to the target

        E_inc = E0 (cos psi p_hat + sin psi s_hat) exp(i k.r),   s_hat = z x k / |z x k|,
        p_hat = s_hat x k_hat

    (s_hat = (-sin phi, cos phi, 0) for the azimuth phi; psi = 0 is p).  The residual of
    that fit (``polarization_residual``) checks the ratio of the two components.

Steady state
    Continuous source with Meep's tanh turn-on whose width keeps the nearest cut-off
    of a diffraction order (m, n) 1e-5 down in the envelope's spectrum, then the
    demodulated volume compared every four periods until it changes by less than
    ``steady_tol`` (see the 2D worker's docstring for the reasoning).
"""

from __future__ import annotations

import json
import math
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import worker as w2d  # noqa: E402  (sibling module: materials, constants, logging)

_ELLIPSE_VERTICES = 96


class _Cell:
    """Pixel layout of the Meep cell, in um."""

    def __init__(self, spec: dict):
        um = 1e-6
        res = float(spec["cells_per_um"])
        lx, ly = spec["size_x_m"] / um, spec["size_y_m"] / um
        self.nx = max(2, int(math.ceil(lx * res - 1e-9)))
        self.ny = max(2, int(math.ceil(ly * res - 1e-9)))
        # whole pixels per period in x; y gets its own spacing only if it must (Meep has
        # one resolution: make both periods whole multiples of it)
        res = self.nx / lx
        self.ny = max(2, int(round(ly * res)))
        if abs(self.ny / res - ly) > 1e-6 * ly:
            raise ValueError(f"cell {lx} x {ly} um: the y period must be a whole number of "
                             f"pixels at {res:.4g} px/um")
        self.res = res
        self.dx = 1.0 / res
        self.lx, self.ly = lx, ly
        self.nz = int(math.ceil(spec["size_z_m"] / um * res - 1e-9))
        self.npml = int(math.ceil(spec["pml_m"] / um * res - 1e-9))
        lam = spec["wavelength_m"] / um
        n_inc = math.sqrt(spec["eps_incidence"])
        self.nbuf = 2 * max(3, int(math.ceil(0.125 * lam / n_inc * res)))
        self.z_min = spec["z_min_m"] / um
        self.z_max = self.z_min + self.nz * self.dx
        self.below = spec["side"] == "below"
        self.size_z = (self.nz + self.nbuf + 2 * self.npml) * self.dx
        if self.below:
            z_bottom = self.z_min - (self.npml + self.nbuf) * self.dx
            self.z_src = self.z_min - 0.5 * self.nbuf * self.dx
            self.inc_lo, self.inc_hi = z_bottom, self.z_min
        else:
            z_bottom = self.z_min - self.npml * self.dx
            self.z_src = self.z_max + 0.5 * self.nbuf * self.dx
            self.inc_lo, self.inc_hi = self.z_max, z_bottom + self.size_z
        self.zc = z_bottom + 0.5 * self.size_z

    def Z(self, z):
        return z - self.zc


def _vectors(theta, phi, psi, below):
    """Unit k, s, p and the target polarization vector (see the module docstring)."""
    sz = 1.0 if below else -1.0
    k = np.array([math.sin(theta) * math.cos(phi), math.sin(theta) * math.sin(phi),
                  sz * math.cos(theta)])
    s = np.array([-math.sin(phi), math.cos(phi), 0.0])
    p = np.cross(s, k)
    e = math.cos(psi) * p + math.sin(psi) * s
    return k, s, p, e


def _current(theta, phi, psi, below):
    """Tangential current (Jx, Jy) radiating the asked-for polarization ratio."""
    k, s, p, _ = _vectors(theta, phi, psi, below)
    pt = p.copy()
    pt[2] = 0.0
    c = math.cos(theta)
    pt_unit = pt / np.linalg.norm(pt) if np.linalg.norm(pt) > 0 else np.array(
        [math.cos(phi), math.sin(phi), 0.0]) * (-1.0 if not below else 1.0)
    j = math.cos(psi) * pt_unit + math.sin(psi) * c * s
    return complex(j[0]), complex(j[1])


def turn_on_periods(spec, freq, kx, ky):
    """Turn-on width (periods) from the nearest cut-off of an order (m, n); in 1/um."""
    gx, gy = 2 * math.pi / (spec["size_x_m"] / 1e-6), 2 * math.pi / (spec["size_y_m"] / 1e-6)
    eps = {float(spec["eps_incidence"])} | {float(o["eps_re"]) for o in spec["objects"]}
    eps |= {float(spec["eps_background"][0])}
    df = math.inf
    for e in eps:
        n = math.sqrt(e)
        mmax = int(math.ceil((4 * math.pi * freq * n + abs(kx)) / gx)) + 1
        nmax = int(math.ceil((4 * math.pi * freq * n + abs(ky)) / gy)) + 1
        for m in range(-mmax, mmax + 1):
            for q in range(-nmax, nmax + 1):
                f = math.hypot(kx + m * gx, ky + q * gy) / (2 * math.pi * n)
                df = min(df, abs(f - freq))
    if df == 0:
        return w2d._TURN_ON_MAX, 0.0
    width = 24.0 / (math.pi * 2 * math.pi * df) * freq
    return min(max(width, w2d._TURN_ON_MIN), w2d._TURN_ON_MAX), df / freq


def _geometry(mp, spec, cell: _Cell, freq, empty: bool):
    eps_inc = float(spec["eps_incidence"])
    if empty:
        return [], w2d._medium(mp, eps_inc, 0.0, freq)
    geo = []
    for o in spec["objects"]:
        mat = w2d._medium(mp, o["eps_re"], o["eps_im"], freq)
        zlo, zhi = o["z_lo_um"], o["z_hi_um"]
        # clip half-spaces to the cell (Meep repeats objects by one cell in z too)
        zlo = max(zlo, cell.zc - 0.5 * cell.size_z)
        zhi = min(zhi, cell.zc + 0.5 * cell.size_z)
        if zhi <= zlo:
            continue
        zmid, h = cell.Z(0.5 * (zlo + zhi)), zhi - zlo
        if o["kind"] == "slab":
            geo.append(mp.Block(size=mp.Vector3(mp.inf, mp.inf, h),
                                center=mp.Vector3(0, 0, zmid), material=mat))
            continue
        cx, cy = o["center_um"]
        a, b = o["axes_um"]
        if abs(a - b) <= 1e-12 * max(a, b):
            geo.append(mp.Cylinder(radius=a, height=h, center=mp.Vector3(cx, cy, zmid),
                                   axis=mp.Vector3(0, 0, 1), material=mat))
            continue
        ang = o["angle_rad"]
        t = np.linspace(0, 2 * np.pi, _ELLIPSE_VERTICES, endpoint=False)
        xs = cx + a * np.cos(t) * math.cos(ang) - b * np.sin(t) * math.sin(ang)
        ys = cy + a * np.cos(t) * math.sin(ang) + b * np.sin(t) * math.cos(ang)
        verts = [mp.Vector3(float(x), float(y), zmid - 0.5 * h) for x, y in zip(xs, ys)]
        geo.append(mp.Prism(verts, height=h, axis=mp.Vector3(0, 0, 1),
                            center=mp.Vector3(float(np.mean(xs)), float(np.mean(ys)), zmid),
                            material=mat))
    # the source side's buffer and PML hold the incidence medium, whatever the objects say
    geo.append(mp.Block(size=mp.Vector3(mp.inf, mp.inf, cell.inc_hi - cell.inc_lo),
                        center=mp.Vector3(0, 0, cell.Z(0.5 * (cell.inc_lo + cell.inc_hi))),
                        material=w2d._medium(mp, eps_inc, 0.0, freq)))
    eb = spec["eps_background"]
    return geo, w2d._medium(mp, eb[0], eb[1], freq)


def _build(mp, spec, cell: _Cell, freq, kpar, empty, courant, width_periods):
    geo, default = _geometry(mp, spec, cell, freq, empty)
    theta, phi, psi = (float(spec[k]) for k in ("theta_rad", "phi_rad", "psi_rad"))
    jx, jy = _current(theta, phi, psi, cell.below)
    kx, ky = kpar

    def amp(c):
        def f(p):
            return c * complex(np.exp(1j * (kx * p.x + ky * p.y)))
        return f

    src_time = mp.ContinuousSource(frequency=freq, width=width_periods / freq,
                                   cutoff=w2d._SLOWNESS)
    centre = mp.Vector3(0, 0, cell.Z(cell.z_src))
    size = mp.Vector3(cell.lx, cell.ly, 0)
    sources = [mp.Source(src_time, component=comp, center=centre, size=size, amp_func=amp(c))
               for comp, c in ((mp.Ex, jx), (mp.Ey, jy)) if abs(c) > 1e-12]
    return mp.Simulation(
        cell_size=mp.Vector3(cell.lx, cell.ly, cell.size_z), resolution=cell.res,
        geometry=geo, default_material=default, sources=sources,
        boundary_layers=[mp.PML(cell.npml * cell.dx, direction=mp.Z)],
        k_point=mp.Vector3(kx / (2 * math.pi), ky / (2 * math.pi), 0),
        force_complex_fields=True, Courant=courant)


class _Volume:
    """Pixel centres of a box (the physical region or one plane), read with get_array."""

    def __init__(self, mp, sim, cell: _Cell, z_lo, z_hi):
        self.center = mp.Vector3(0, 0, cell.Z(0.5 * (z_lo + z_hi)))
        self.size = mp.Vector3(cell.lx, cell.ly, z_hi - z_lo)
        X, Y, Z, _ = sim.get_array_metadata(center=self.center, size=self.size)
        X, Y, Z = (np.atleast_1d(np.asarray(a, float)) for a in (X, Y, Z))
        self.shape = (X.size, Y.size, Z.size)
        tol = 1e-6 * cell.dx
        # one period: drop a sample that repeats the first one a period later
        self.ix = np.nonzero(X < X[0] + cell.lx - tol)[0]
        self.iy = np.nonzero(Y < Y[0] + cell.ly - tol)[0]
        z = Z + cell.zc
        self.iz = np.nonzero((z >= z_lo - tol) & (z <= z_hi + tol))[0]
        self.x, self.y, self.z = X[self.ix], Y[self.iy], z[self.iz]

    def read(self, mp, sim, phase):
        out = []
        for c in (mp.Ex, mp.Ey, mp.Ez):
            a = np.asarray(sim.get_array(c, center=self.center, size=self.size, cmplx=True),
                           complex).reshape(self.shape)
            out.append(a[np.ix_(self.ix, self.iy, self.iz)] * phase)
        return out


def _steady(mp, sim, vols, freq, spec, stage, width):
    omega = 2 * math.pi * freq
    period = 1.0 / freq
    t_max = float(spec["max_periods"]) * period
    sim.run(until=(w2d._SLOWNESS + 7.0) * width * period)

    def snap():
        ph = complex(np.exp(1j * omega * sim.meep_time()))
        return [v.read(mp, sim, ph) for v in vols]

    prev = snap()
    while True:
        sim.run(until=w2d._CHECK_PERIODS * period)
        cur = snap()
        num = max(float(np.max(np.abs(c - p))) for cv, pv in zip(cur, prev)
                  for c, p in zip(cv, pv))
        den = max(float(np.max(np.abs(c))) for cv in cur for c in cv)
        change = num / den if den > 0 else 0.0
        t = sim.meep_time()
        w2d._log(f"{stage}: t = {t * freq:.0f} periods, change = {change:.2e}")
        if change < float(spec["steady_tol"]) or t >= t_max:
            break
        prev = cur
    return cur, change < float(spec["steady_tol"]), sim.meep_time() * freq, change


def solve(spec: dict):
    import meep as mp

    mp.verbosity(0)
    w2d._QUIET[0] = not mp.am_master()
    t0 = time.perf_counter()
    um = 1e-6
    cell = _Cell(spec)
    freq = 1.0 / (spec["wavelength_m"] / um)
    n_inc = math.sqrt(float(spec["eps_incidence"]))
    theta, phi, psi = (float(spec[k]) for k in ("theta_rad", "phi_rad", "psi_rad"))
    k_hat, _, _, e_target = _vectors(theta, phi, psi, cell.below)
    k_inc = 2 * math.pi * freq * n_inc
    kx, ky, kz = (k_inc * c for c in k_hat)
    eps_min = min([float(spec["eps_incidence"]), float(spec["eps_background"][0])]
                  + [o["eps_re"] for o in spec["objects"]])
    courant = min(0.5, 0.95 * math.sqrt(eps_min) / math.sqrt(3.0))
    width, gap = turn_on_periods(spec, freq, kx, ky)
    w2d._log(f"3D cell {cell.nx} x {cell.ny} x {cell.nz + cell.nbuf + 2 * cell.npml} px, "
             f"turn-on over {width:.1f} periods (nearest cut-off {gap:.3g} f away)")

    # calibration: the plane wave alone, measured on the pixel plane nearest z = 0
    sim = _build(mp, spec, cell, freq, (kx, ky), True, courant, width)
    sim.init_sim()
    z_ref = cell.z_min + (math.floor((min(max(0.0, cell.z_min), cell.z_max - 1e-9)
                                      - cell.z_min) / cell.dx) + 0.5) * cell.dx
    plane = _Volume(mp, sim, cell, z_ref, z_ref)
    (cal,), cal_ok, cal_t, cal_change = _steady(mp, sim, [plane], freq, spec, "calibration",
                                                width)
    X, Y = np.meshgrid(plane.x, plane.y, indexing="ij")
    proj = np.exp(-1j * (kx * X + ky * Y))[:, :, None]
    back = complex(np.exp(-1j * kz * float(plane.z[0])))
    a = np.array([complex(np.mean(f * proj)) * back for f in cal])
    e0 = float(spec["amplitude_V_per_m"])
    target = e0 * e_target
    c_e = complex(np.vdot(a, target) / np.vdot(a, a))
    resid = float(np.linalg.norm(c_e * a - target) / e0)
    del sim

    sim = _build(mp, spec, cell, freq, (kx, ky), False, courant, width)
    sim.init_sim()
    vol = _Volume(mp, sim, cell, cell.z_min + 0.5 * cell.dx, cell.z_max - 0.5 * cell.dx)
    (out,), ok, t_end, change = _steady(mp, sim, [vol], freq, spec, "structure", width)
    arrays = {"x": vol.x * um, "y": vol.y * um, "z": vol.z * um,
              "ex": c_e * out[0], "ey": c_e * out[1], "ez": c_e * out[2]}
    meta = {
        "meep_version": str(getattr(mp, "__version__", "unknown")),
        "cells_per_um": cell.res, "dx_m": cell.dx * um, "courant": courant,
        "turn_on_periods": width, "nearest_cutoff_rel": gap,
        "converged": bool(ok and cal_ok), "periods_run": [cal_t, t_end],
        "final_change": [cal_change, change],
        "calibration": {"z_ref_m": z_ref * um, "c_e": [c_e.real, c_e.imag],
                        "polarization_residual": resid},
        "cell_pixels": [cell.nx, cell.ny, cell.nz + cell.nbuf + 2 * cell.npml],
        "k_parallel_per_m": [kx / um, ky / um],
        "wall_s": time.perf_counter() - t0,
    }
    return arrays, meta


def main(argv):
    if len(argv) != 3:
        sys.stderr.write("usage: worker3d.py PROBLEM.json FIELDS.npz\n")
        return 2
    with open(argv[1], encoding="utf-8") as fh:
        spec = json.load(fh)
    arrays, meta = solve(spec)
    import meep as mp

    if mp.am_master():
        tmp = argv[2] + ".part.npz"
        np.savez(tmp, meta=np.array(json.dumps(meta)), **arrays)
        os.replace(tmp, argv[2])
        w2d._log(f"done in {meta['wall_s']:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
