"""Meep worker: one 2D time-domain run of a plane wave on a structure in the (x, z) plane.

Run as its own process by an interpreter that has Meep::

    PYTHON worker.py PROBLEM.json FIELDS.npz

It imports only the standard library, numpy and meep (the interpreter that has Meep
need not have our other dependencies), reads a problem in SI units written by
``runner.py`` and writes the complex field amplitudes on the requested lines.

Coordinates and components
    Meep's 2D cell lies in its (X, Y) plane.  We put our x on Meep's X and our z on
    Meep's Y.  For both frames to be right-handed, Meep's Z must then be
    x_hat cross z_hat = -y_hat, so
        Ex = Meep Ex,   Ez = Meep Ey,   Hy = -Meep Hz.
    Meep's length unit is a = 1 um; frequency is 1/lambda in um^-1, time in a/c.

Source and steady state
    A line of magnetic current (Meep Hz) across the whole cell width, with the Bloch
    phase exp(i kx x), in the incidence medium between the physical region and the
    PML on the source side.  It radiates both ways; the wave leaving the physical
    region is absorbed by the PML (without periodic x the line runs into the x PML and
    is an "integrated" source, as Meep recommends for that case).  The source is a
    continuous wave with Meep's tanh turn-on, started far in the tanh tail (no jump).
    The turn-on width is chosen from the nearest cut-off frequency of a diffraction
    order at the fixed Bloch kx (see ``turn_on_periods``): a short turn-on or a pulse
    would excite those grazing orders, which ring for hundreds of periods.  After the
    turn-on the fields on the monitors are demodulated, F(r) = f(r, t) exp(+i omega t),
    every four periods; the run stops when successive snapshots differ by less than
    ``steady_tol`` relative to their peak (or after ``max_periods``; ``converged`` in
    the output says which).  This is the steady state of the discretized equations at
    omega, i.e. what a DFT over a long window gives, without the turn-on transient.

Amplitude normalization
    A second run ("calibration") uses the same cell, source and monitors, with the
    incidence medium filling the whole cell.  Its field is a pure plane wave, which we
    measure on a horizontal line at the pixel-centre height nearest to z = 0 (inside
    the physical region), project on exp(i kx x) and carry analytically to the origin
    with exp(-i kz z_ref).  E and H are calibrated separately: Meep stores H half a
    time step away from E, so one complex factor for both would leave a phase error
    omega dt / 2.  The targets (our convention, phase zero at the origin) are

        Hy_inc = (n E0 / Z0) exp(i (kx x + kz z)),    E_inc = Z0/n * (H_inc x k_hat)

    i.e. for incidence from below (kz > 0) E_inc = E0 (cos t, -sin t), and from above
    (kz < 0) E_inc = E0 (-cos t, -sin t), with t the angle from the +z (resp. -z) axis,
    positive when k tilts toward +x.  Because the two factors are fitted independently,
    the ratio -Z0 * c_H / c_E (reported as ``handedness_ratio``) must come out close to
    exp(+- i omega dt / 2): this checks the component mapping above.

Materials
    Complex relative permittivity eps' + i eps'' (eps'' >= 0 is loss for exp(-i omega t))
    enters as Meep's Medium(epsilon=eps', D_conductivity=2 pi f eps''/eps'), for which
    Meep's eps(omega) = eps' (1 + i sigma_D / omega) equals the requested value at the
    laser frequency (exactly there only).  Polygons are painted in order, later ones
    over earlier ones, on top of ``eps_background``; Meep's subpixel averaging is on.
    The Courant number is lowered below 0.5 when some eps < 1/2 would need it.
"""

from __future__ import annotations

import json
import math
import sys
import time

import numpy as np

PROGRESS_PREFIX = "[fdtd] "
# Meep's "cutoff" (slowness): the tanh envelope starts at exp(-2 * 8) ~ 1e-7, not a jump
_SLOWNESS = 8.0
_TURN_ON_MIN, _TURN_ON_MAX = 2.0, 40.0  # turn-on width bounds, in optical periods
_CHECK_PERIODS = 4.0  # demodulated snapshots are compared this far apart


_QUIET = [False]  # True on MPI ranks other than the master


def _log(msg: str) -> None:
    if not _QUIET[0]:
        sys.stderr.write(PROGRESS_PREFIX + msg + "\n")
        sys.stderr.flush()


def _medium(mp, eps_re: float, eps_im: float, freq: float):
    if eps_im == 0.0:
        return mp.Medium(epsilon=eps_re)
    return mp.Medium(epsilon=eps_re, D_conductivity=2 * math.pi * freq * eps_im / eps_re)


class _Layout:
    """Pixel layout of the Meep cell and the map between our (x, z) and Meep (X, Y), in um."""

    def __init__(self, spec: dict):
        um = 1e-6
        self.periodic = bool(spec["periodic"])
        size_x = spec["size_x_m"] / um
        size_z = spec["size_z_m"] / um
        res = float(spec["cells_per_um"])
        if self.periodic:
            # the period must be a whole number of pixels, or Meep's cell is not the period
            self.nx = max(1, int(math.ceil(size_x * res - 1e-9)))
            res = self.nx / size_x
        else:
            self.nx = int(math.ceil(size_x * res - 1e-9))
        self.res = res
        self.dx = 1.0 / res
        self.nz = int(math.ceil(size_z * res - 1e-9))
        self.npml = int(math.ceil(spec["pml_m"] / um * res - 1e-9))
        lam = spec["wavelength_m"] / um
        n_inc = math.sqrt(spec["eps_incidence"])
        # source half-way across a buffer of at least a quarter wavelength (in the medium)
        self.nbuf = 2 * max(3, int(math.ceil(0.125 * lam / n_inc * res)))
        self.x_min = spec["x_min_m"] / um
        self.z_min = spec["z_min_m"] / um
        self.x_max = self.x_min + self.nx * self.dx
        self.z_max = self.z_min + self.nz * self.dx
        self.below = spec["side"] == "below"
        ny = self.nz + self.nbuf + 2 * self.npml
        nxc = self.nx if self.periodic else self.nx + 2 * self.npml
        self.size_X = nxc * self.dx
        self.size_Y = ny * self.dx
        self.xc = self.x_min + 0.5 * self.nx * self.dx
        if self.below:
            z_bottom = self.z_min - (self.npml + self.nbuf) * self.dx
            self.z_src = self.z_min - 0.5 * self.nbuf * self.dx
            self.inc_lo, self.inc_hi = z_bottom, self.z_min
        else:
            z_bottom = self.z_min - self.npml * self.dx
            self.z_src = self.z_max + 0.5 * self.nbuf * self.dx
            self.inc_lo, self.inc_hi = self.z_max, z_bottom + self.size_Y
        self.zc = z_bottom + 0.5 * self.size_Y

    def X(self, x):
        return x - self.xc

    def Y(self, z):
        return z - self.zc

    def snap(self, value, lo):
        """Nearest pixel centre lo + (k + 1/2) dx."""
        return lo + (math.floor((value - lo) / self.dx) + 0.5) * self.dx


def _clip(poly, axis: int, lo: float, hi: float):
    """Sutherland-Hodgman clip of a polygon [(x, y), ...] to lo <= p[axis] <= hi."""
    for bound, keep in ((lo, lambda v: v >= lo), (hi, lambda v: v <= hi)):
        out = []
        n = len(poly)
        for i in range(n):
            p, q = poly[i], poly[(i + 1) % n]
            pin, qin = keep(p[axis]), keep(q[axis])
            if pin:
                out.append(p)
            if pin != qin:
                t = (bound - p[axis]) / (q[axis] - p[axis])
                out.append((p[0] + t * (q[0] - p[0]), p[1] + t * (q[1] - p[1])))
        poly = out
        if len(poly) < 3:
            return []
    return poly


def _clip_to_cell(poly, lay):
    """The polygon's part inside the Meep cell height (and width, if x is not periodic).

    With a Bloch k_point Meep repeats every object by one cell in *each* direction,
    PML or not: a half-space reaching far below the cell would reappear at the top.
    Clipping to the cell height prevents that.  Along a periodic x the polygon is
    left whole and Meep's copies (one period either way) wrap it; an object edge
    cut at the cell side, where copies meet, would spoil the subpixel averaging
    there (measured: 4 % field error next to a film's surfaces at 60 px/um).
    """
    hy, hx = 0.5 * lay.size_Y, 0.5 * lay.size_X
    poly = _clip(list(poly), 1, -hy, hy)
    if poly and not lay.periodic:
        poly = _clip(poly, 0, -hx, hx)
    return [poly] if poly and abs(_area(poly)) > 1e-12 * lay.dx**2 else []


def _area(poly) -> float:
    n = len(poly)
    return 0.5 * sum(poly[i][0] * poly[(i + 1) % n][1] - poly[(i + 1) % n][0] * poly[i][1]
                     for i in range(n))


def turn_on_periods(spec: dict, freq: float, kx_um: float) -> tuple[float, float]:
    """Width of the tanh turn-on (periods) and the relative distance to the nearest cut-off.

    With the Bloch vector fixed, diffraction order m of a medium of index n is at
    cut-off (grazing, slow to ring down) at f_m = |kx + 2 pi m / period| / (2 pi n).
    The spectrum of the envelope (1 + tanh(t / w)) / 2 falls as exp(-pi w |d omega| / 2);
    w = 24 / (pi d omega) puts the nearest cut-off 1e-5 down (exp(-12)).
    """
    if not spec["periodic"]:
        return _TURN_ON_MIN, math.inf
    per = spec["size_x_m"] / 1e-6
    eps = {float(spec["eps_incidence"]), float(spec["eps_background"][0])}
    eps |= {float(p["eps_re"]) for p in spec["polygons"]}
    g = 2 * math.pi / per
    df = math.inf
    for e in eps:
        n = math.sqrt(e)
        m_max = int(math.ceil((4 * math.pi * freq * n + abs(kx_um)) / g)) + 1
        for m in range(-m_max, m_max + 1):
            df = min(df, abs(abs(kx_um + m * g) / (2 * math.pi * n) - freq))
    if df == 0:
        return _TURN_ON_MAX, 0.0
    w = 24.0 / (math.pi * 2 * math.pi * df) * freq
    return min(max(w, _TURN_ON_MIN), _TURN_ON_MAX), df / freq


def _build(mp, spec, lay: _Layout, freq: float, kx_um: float, kx_bloch_um: float, empty: bool,
           courant: float, width_periods: float):
    eps_inc = float(spec["eps_incidence"])
    if empty:
        geometry = []
        default = _medium(mp, eps_inc, 0.0, freq)
    else:
        geometry = []
        for poly in spec["polygons"]:
            mat = _medium(mp, poly["eps_re"], poly["eps_im"], freq)
            pts = [(lay.X(x), lay.Y(z)) for x, z in poly["vertices_um"]]
            for piece in _clip_to_cell(pts, lay):
                verts = [mp.Vector3(x, y) for x, y in piece]
                cx = sum(v.x for v in verts) / len(verts)
                cy = sum(v.y for v in verts) / len(verts)
                # Meep takes a prism's centre as the vertex mean plus half the height
                geometry.append(mp.Prism(verts, height=mp.inf, center=mp.Vector3(cx, cy),
                                         material=mat))
        # outside the physical region on the source side the incidence medium fills the
        # buffer and the PML, whatever the polygons say, so the source sits in it
        h = lay.inc_hi - lay.inc_lo
        geometry.append(
            mp.Block(
                size=mp.Vector3(mp.inf, h),
                center=mp.Vector3(0, lay.Y(0.5 * (lay.inc_lo + lay.inc_hi))),
                material=_medium(mp, eps_inc, 0.0, freq),
            )
        )
        eb = spec["eps_background"]
        default = _medium(mp, eb[0], eb[1], freq)

    x_phase0 = lay.xc  # amp_func gets positions relative to the source centre (X = 0)

    def amp(p):
        return complex(np.exp(1j * kx_um * (p.x + x_phase0)))

    src = mp.Source(
        mp.ContinuousSource(frequency=freq, width=width_periods / freq, cutoff=_SLOWNESS,
                            is_integrated=not lay.periodic),
        component=mp.Hz,
        center=mp.Vector3(0, lay.Y(lay.z_src)),
        size=mp.Vector3(lay.size_X, 0),
        amp_func=amp,
    )
    layers = [mp.PML(lay.npml * lay.dx, direction=mp.Y)]
    kw = {}
    if lay.periodic:
        kw["k_point"] = mp.Vector3(kx_bloch_um / (2 * math.pi))
    else:
        layers.append(mp.PML(lay.npml * lay.dx, direction=mp.X))
    return mp.Simulation(
        cell_size=mp.Vector3(lay.size_X, lay.size_Y),
        resolution=lay.res,
        geometry=geometry,
        default_material=default,
        sources=[src],
        boundary_layers=layers,
        force_complex_fields=True,
        Courant=courant,
        **kw,
    )


class _Monitor:
    """A set of points (a line or the physical region) read with get_array."""

    def __init__(self, mp, sim, center, size, keep_x, keep_z, lay: _Layout):
        self.center, self.size = center, size
        X, Y, _, _ = sim.get_array_metadata(center=center, size=size)
        X, Y = np.atleast_1d(np.asarray(X, float)), np.atleast_1d(np.asarray(Y, float))
        self.shape = (X.size, Y.size)
        x, z = X + lay.xc, Y + lay.zc
        tol = 1e-6 * lay.dx
        self.ix = np.nonzero((x >= keep_x[0] - tol) & (x <= keep_x[1] + tol))[0]
        self.iz = np.nonzero((z >= keep_z[0] - tol) & (z <= keep_z[1] + tol))[0]
        self.x, self.z = x[self.ix], z[self.iz]
        self.comps = (mp.Ex, mp.Ey, mp.Hz)

    def read(self, sim, phase):
        out = []
        for c in self.comps:
            a = sim.get_array(c, center=self.center, size=self.size, cmplx=True)
            a = np.asarray(a, complex).reshape(self.shape)
            out.append(a[np.ix_(self.ix, self.iz)] * phase)
        return out


def _monitors(mp, sim, spec, lay: _Layout):
    """Monitors for the requested lines, the calibration line and optionally the cell."""
    mons, described = [], []
    full_x = (lay.x_min, lay.x_max)
    full_z = (lay.z_min, lay.z_max)
    width = lay.nx * lay.dx
    height = lay.nz * lay.dx
    snap = bool(spec["snap_lines_to_grid"])
    for kind, pos_m in spec["lines"]:
        pos = pos_m / 1e-6
        if kind == "x":  # horizontal line at height pos
            if snap:
                pos = min(max(lay.snap(pos, lay.z_min), lay.z_min + 0.5 * lay.dx),
                          lay.z_max - 0.5 * lay.dx)
            c = mp.Vector3(lay.X(lay.xc), lay.Y(pos))
            s = mp.Vector3(width, 0)
            mons.append(_Monitor(mp, sim, c, s, full_x, (pos, pos), lay))
        else:  # vertical line at x = pos
            if snap:
                pos = min(max(lay.snap(pos, lay.x_min), lay.x_min + 0.5 * lay.dx),
                          lay.x_max - 0.5 * lay.dx)
            c = mp.Vector3(lay.X(pos), lay.Y(0.5 * (lay.z_min + lay.z_max)))
            s = mp.Vector3(0, height)
            mons.append(_Monitor(mp, sim, c, s, (pos, pos), full_z, lay))
        described.append((kind, pos))
    z_ref = lay.snap(min(max(0.0, lay.z_min), lay.z_max - 1e-9 * lay.dx), lay.z_min)
    cal = _Monitor(mp, sim, mp.Vector3(0, lay.Y(z_ref)), mp.Vector3(width, 0), full_x,
                   (z_ref, z_ref), lay)
    cell = None
    if spec["whole_cell"]:
        cell = _Monitor(mp, sim, mp.Vector3(0, lay.Y(0.5 * (lay.z_min + lay.z_max))),
                        mp.Vector3(width, height), full_x, full_z, lay)
    return mons, cal, cell, z_ref, described


def _run_to_steady_state(sim, monitors, freq, spec, stage, width_periods):
    omega = 2 * math.pi * freq
    period = 1.0 / freq
    t_max = float(spec["max_periods"]) * period
    # the envelope is centred at _SLOWNESS widths and within 1e-6 of one 7 widths later
    sim.run(until=(_SLOWNESS + 7.0) * width_periods * period)

    def snap():
        t = sim.meep_time()
        ph = complex(np.exp(1j * omega * t))
        return [m.read(sim, ph) for m in monitors]

    prev = snap()
    change = math.inf
    while True:
        sim.run(until=_CHECK_PERIODS * period)
        cur = snap()
        change = 0.0
        for group in (slice(0, 2), slice(2, 3)):  # E components, then H
            num = max(float(np.max(np.abs(c - p), initial=0.0))
                      for cm, pm in zip(cur, prev) for c, p in zip(cm[group], pm[group]))
            den = max(float(np.max(np.abs(c), initial=0.0)) for cm in cur for c in cm[group])
            change = max(change, num / den if den > 0 else 0.0)
        t = sim.meep_time()
        _log(f"{stage}: t = {t * freq:.0f} periods, change = {change:.2e}")
        if change < float(spec["steady_tol"]) or t >= t_max:
            break
        prev = cur
    return cur, change < float(spec["steady_tol"]), sim.meep_time() * freq, change


def solve(spec: dict) -> tuple[dict, dict]:
    """Run calibration and structure; return (arrays, meta) in SI units."""
    import meep as mp

    mp.verbosity(0)
    _QUIET[0] = not mp.am_master()
    t0 = time.perf_counter()
    um = 1e-6
    lay = _Layout(spec)
    lam = spec["wavelength_m"] / um
    freq = 1.0 / lam
    n_inc = math.sqrt(float(spec["eps_incidence"]))
    theta = float(spec["angle_rad"])
    k_inc = 2 * math.pi * freq * n_inc
    kx_inc = k_inc * math.sin(theta)  # um^-1; the source phase
    kz_inc = k_inc * math.cos(theta) * (1.0 if lay.below else -1.0)
    kx_bloch = float(spec["bloch_kx_per_m"]) * um

    eps_min = min([float(spec["eps_incidence"]), float(spec["eps_background"][0])]
                  + [p["eps_re"] for p in spec["polygons"]])
    # 2D Yee stability: S <= n_min / sqrt(2)
    courant = min(0.5, 0.95 * math.sqrt(eps_min) / math.sqrt(2.0))

    width, cutoff_gap = turn_on_periods(spec, freq, kx_bloch)
    _log(f"turn-on over {width:.1f} periods (nearest cut-off {cutoff_gap:.3g} f away)")

    # calibration (incidence medium everywhere)
    sim = _build(mp, spec, lay, freq, kx_inc, kx_bloch, empty=True, courant=courant,
                 width_periods=width)
    sim.init_sim()
    mons, cal, cell, z_ref, described = _monitors(mp, sim, spec, lay)
    (fields,), cal_ok, cal_t, cal_change = _run_to_steady_state(sim, [cal], freq, spec,
                                                               "calibration", width)
    dt = sim.fields.dt
    proj = np.exp(-1j * (kx_inc * cal.x))[:, None]
    if not lay.periodic:  # plane wave only away from the x PML: use the middle half
        w = np.abs(cal.x - lay.xc) <= 0.25 * (lay.x_max - lay.x_min)
    else:
        w = np.ones(cal.x.shape, bool)
    back = complex(np.exp(-1j * kz_inc * z_ref))
    a_ex, a_ey, a_hz = (complex(np.mean((f * proj)[w])) * back for f in fields)
    e0 = float(spec["amplitude_V_per_m"])
    z0_ohm = float(spec["impedance_ohm"])
    sgn = 1.0 if lay.below else -1.0
    t_ex, t_ez = sgn * e0 * math.cos(theta), -e0 * math.sin(theta)
    t_hy = n_inc * e0 / z0_ohm
    a_vec = np.array([a_ex, a_ey])
    c_e = complex(np.vdot(a_vec, np.array([t_ex, t_ez])) / np.vdot(a_vec, a_vec))
    c_h = t_hy / a_hz
    handedness = -z0_ohm * c_h / c_e
    pol_resid = float(np.linalg.norm(c_e * a_vec - np.array([t_ex, t_ez])) / e0)
    del sim

    # structure
    sim = _build(mp, spec, lay, freq, kx_inc, kx_bloch, empty=False, courant=courant,
                 width_periods=width)
    sim.init_sim()
    mons, cal, cell, z_ref, described = _monitors(mp, sim, spec, lay)
    mon_all = mons + ([cell] if cell is not None else [])
    out, ok, t_end, change = _run_to_steady_state(sim, mon_all, freq, spec, "structure", width)

    arrays = {}

    def put(prefix, mon, f):
        ex, ey, hz = f
        arrays[prefix + "x"] = mon.x * um
        arrays[prefix + "z"] = mon.z * um
        arrays[prefix + "ex"] = c_e * ex
        arrays[prefix + "ez"] = c_e * ey
        arrays[prefix + "hy"] = c_h * hz

    for i, (mon, f) in enumerate(zip(mons, out)):
        put(f"line{i}_", mon, f)
    if cell is not None:
        put("cell_", cell, out[-1])
    meta = {
        "meep_version": str(getattr(mp, "__version__", "unknown")),
        "cells_per_um": lay.res,
        "dx_m": lay.dx * um,
        "dt_s": dt * um / float(spec["c_m_per_s"]),
        "courant": courant,
        "turn_on_periods": width,
        "nearest_cutoff_rel": cutoff_gap,
        "lines": [[k, p * um] for k, p in described],
        "n_lines": len(mons),
        "whole_cell": cell is not None,
        "converged": bool(ok and cal_ok),
        "periods_run": [cal_t, t_end],
        "final_change": [cal_change, change],
        "calibration": {
            "z_ref_m": z_ref * um,
            "c_e": [c_e.real, c_e.imag],
            "c_h": [c_h.real, c_h.imag],
            "handedness_ratio": [handedness.real, handedness.imag],
            "half_step_phase_rad": math.pi * freq * dt,
            "polarization_residual": pol_resid,
        },
        "cell_pixels": [int(round(lay.size_X * lay.res)), int(round(lay.size_Y * lay.res))],
        "kx_bloch_per_m": kx_bloch / um,
        "kx_source_per_m": kx_inc / um,
        "wall_s": time.perf_counter() - t0,
    }
    return arrays, meta


def main(argv: list[str]) -> int:
    if len(argv) != 3:
        sys.stderr.write("usage: worker.py PROBLEM.json FIELDS.npz\n")
        return 2
    with open(argv[1], encoding="utf-8") as fh:
        spec = json.load(fh)
    arrays, meta = solve(spec)
    import meep as mp

    if mp.am_master():
        tmp = argv[2] + ".part.npz"
        np.savez(tmp, meta=np.array(json.dumps(meta)), **arrays)
        import os

        os.replace(tmp, argv[2])
        _log(f"done in {meta['wall_s']:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
