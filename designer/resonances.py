"""Resonances in a sweep: positions, line widths and Q factors from the complex coupling.

Near an isolated resonance at angular frequency omega_0 with damping gamma, any
linear response of the structure, the coupling integral I included, is a smooth
background plus one pole (temporal coupled-mode theory, S. Fan, W. Suh and
J. D. Joannopoulos, J. Opt. Soc. Am. A 20, 569, 2003):

    I(omega) = A + B / (omega - omega_0 + i gamma),

so |I| traces a Fano line whose shape depends on the phase of B/A.  The fit is done on
the complex I (the sweep stores it), linear in A and B for given (omega_0, gamma)
(variable projection: G. H. Golub and V. Pereyra, SIAM J. Numer. Anal. 10, 413,
1973), with the two nonlinear parameters found by least squares.  The intensity line
width (FWHM of |B / (omega - omega_0 + i gamma)|^2) is 2 gamma, so Q = omega_0 / (2 gamma).

Along an angle axis the same form in the angle gives the resonance's angular position
and width (FWHM 2 gamma in degrees).  A peak is where the distance of I from the
scan's complex median is a local maximum and more than ``PROMINENCE`` times that
distance's median; each fit uses the ``WINDOW`` samples either side.  A fitted
width below the sample spacing is reported with ``resolved = false``: the sweep is
too coarse to measure it, and the true Q may be higher.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.constants import c as C0
from scipy.optimize import least_squares

WINDOW = 4
PROMINENCE = 3.0


def _fit_pole(x: np.ndarray, y: np.ndarray, x0: float, g0: float):
    """(x0, gamma, A, B, relative rms residual) of y ~ A + B / (x - x0 + i gamma)."""
    scale = float(np.max(np.abs(y))) or 1.0

    def linear(p):
        d = 1.0 / (x - p[0] + 1j * abs(p[1]))
        M = np.stack([np.ones_like(d), d], axis=1)
        coef, *_ = np.linalg.lstsq(M, y / scale, rcond=None)
        return coef, M @ coef - y / scale

    def resid(p):
        r = linear(p)[1]
        return np.concatenate([r.real, r.imag])

    span = float(x.max() - x.min())
    sol = least_squares(resid, [x0, g0], x_scale=[span, span],
                        bounds=([x.min() - span, 1e-9 * span], [x.max() + span, 10 * span]))
    coef, r = linear(sol.x)
    rms = float(np.sqrt(np.mean(np.abs(r) ** 2)))
    return float(sol.x[0]), abs(float(sol.x[1])), coef[0] * scale, coef[1] * scale, rms


def find_resonances(axis: np.ndarray, integrals: np.ndarray, kind: str) -> list[dict]:
    """Resonances along one scan.

    ``axis``: wavelengths (m) for ``kind = "wavelength"``, angles (deg) for ``"angle"``;
    ``integrals``: complex I at those points (NaN where missing).
    Returns dicts with the position, FWHM, Q (wavelength scans) and fit quality.
    """
    axis = np.asarray(axis, float)
    I = np.asarray(integrals, complex)
    ok = np.isfinite(I)
    out = []
    if ok.sum() < 2 * WINDOW + 1:
        return out
    mag = np.abs(I)
    # the resonant part stands out of the background whatever the Fano shape: its
    # distance from the (complex) median of the scan peaks at the resonance
    a_est = complex(np.median(I[ok].real), np.median(I[ok].imag))
    dev = np.where(ok, np.abs(I - a_est), np.nan)
    base = float(np.nanmedian(dev))
    x = 2 * math.pi * C0 / axis if kind == "wavelength" else axis
    step = float(np.median(np.abs(np.diff(x))))
    for k in range(1, len(axis) - 1):
        if not (ok[k - 1] and ok[k] and ok[k + 1]):
            continue
        if not (dev[k] > dev[k - 1] and dev[k] >= dev[k + 1] and dev[k] > PROMINENCE * base):
            continue
        lo, hi = max(0, k - WINDOW), min(len(axis), k + WINDOW + 1)
        sel = np.arange(lo, hi)[ok[lo:hi]]
        if sel.size < 5:
            continue
        x0, g, a, b, rms = _fit_pole(x[sel], I[sel], x[k], step)
        if not (x[sel].min() <= x0 <= x[sel].max()):
            continue
        entry = {"index": k, "fit_rms": rms, "resolved": bool(2 * g >= step),
                 "peak_abs_integral_V": float(mag[k])}
        if kind == "wavelength":
            entry.update(wavelength_m=2 * math.pi * C0 / x0, omega_rad_per_s=x0,
                         fwhm_nm=float(2 * math.pi * C0 / x0**2 * 2 * g * 1e9),
                         q_factor=x0 / (2 * g))
        else:
            entry.update(angle_deg=x0, fwhm_deg=2 * g)
        entry["_x0"], entry["_w"] = x0, 2 * g
        out.append(entry)
    # two maxima of one line (a Fano shape, or noise on its top) fit the same pole:
    # keep the better fit
    kept: list[dict] = []
    for e in sorted(out, key=lambda e: e["fit_rms"]):
        if all(abs(e["_x0"] - k["_x0"]) > max(e["_w"], k["_w"], step) for k in kept):
            kept.append(e)
    for e in kept:
        del e["_x0"], e["_w"]
    return sorted(kept, key=lambda e: e["index"])


def sweep_resonances(data: dict) -> list[dict] | None:
    """Resonances of every wavelength scan (and angle scan) in a sweep's JSON object.

    For a 2D sweep each line along the wavelength (or angle) axis is fitted; the other
    axis' value is given.  None when no axis is a wavelength or angle.
    """
    keys = list(data["axes"])
    shape = tuple(data["shape"])

    def kind_of(key):
        if key.endswith("wavelength_nm"):
            return "wavelength"
        if key.endswith("angle_deg"):
            return "angle"
        return None

    kinds = [kind_of(k) for k in keys]
    if not any(kinds):
        return None
    vals = []
    for p in data["points"]:
        c = p.get("coupling") or {}
        iv = c.get("integral_V")
        vals.append(complex(iv[0], iv[1]) if iv else complex(np.nan, np.nan))
    grid = np.asarray(vals).reshape(shape)
    axis_k = kinds.index("wavelength") if "wavelength" in kinds else kinds.index("angle")
    kind = kinds[axis_k]
    ax = np.asarray(data["axes"][keys[axis_k]], float)
    ax_si = ax * 1e-9 if kind == "wavelength" else ax
    out = []
    if len(keys) == 1:
        lines = [((), grid)]
    else:
        other = 1 - axis_k
        lines = [({keys[other]: data["axes"][keys[other]][j]},
                  grid[:, j] if axis_k == 0 else grid[j, :])
                 for j in range(shape[other])]
    top = float(np.nanmax(np.abs(grid))) if np.isfinite(grid).any() else 0.0
    for fixed, line in lines:
        if not np.nanmax(np.abs(line), initial=0.0) > 1e-6 * top:
            continue   # no coupling along this scan (e.g. forbidden by symmetry)
        for r in find_resonances(ax_si, line, kind):
            r = dict(r)
            r["along"] = keys[axis_k]
            if fixed:
                r["at"] = dict(fixed)
            out.append(r)
    return out
