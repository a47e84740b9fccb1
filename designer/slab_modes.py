"""Guided modes of a planar film and their folding by a 2D lattice (empty-lattice bands).

A photonic-crystal slab's sharp resonances are guided modes of the film that a
reciprocal-lattice vector G folds above the light line: light at in-plane wavevector
k_par excites the mode of effective index N where

    |k_par + G| = k0 N(lambda),   k_par = k0 sin(theta) (cos phi, sin phi).

Computing N for the unpatterned film of the lattice's average permittivity
(eps_avg = (1 - f) eps_film + f eps_hole, f the hole fill fraction) and drawing where
that condition holds gives the empty-lattice guide lines of a resonance map: each
resonance found by the full solver sits near one of them (shifted and split by the
real pattern), which tells which band it belongs to.

Slab dispersion (three layers: substrate n_s below, film n_f of thickness d, cover
n_c above; N between max(n_s, n_c) and n_f), the transverse-resonance condition

    TE:  kappa d = m pi + atan(gamma_s / kappa) + atan(gamma_c / kappa)
    TM:  kappa d = m pi + atan((n_f/n_s)^2 gamma_s / kappa) + atan((n_f/n_c)^2 gamma_c / kappa)

with kappa = k0 sqrt(n_f^2 - N^2), gamma_j = k0 sqrt(N^2 - n_j^2), m = 0, 1, ...
(H. Kogelnik, "Theory of dielectric waveguides", in T. Tamir (ed.), Integrated Optics,
Springer 1975, sec. 2.2; A. Yariv & P. Yeh, Photonics, 6th ed., sec. 3.2).  The
left side minus the right decreases monotonically in N, so each mode is one root,
bracketed and found by Brent's method.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq


def _mismatch(N, m, pol, k0d, nf, ns, nc):
    kap = math.sqrt(max(nf * nf - N * N, 0.0))
    gs = math.sqrt(max(N * N - ns * ns, 0.0))
    gc = math.sqrt(max(N * N - nc * nc, 0.0))
    ws, wc = ((nf / ns) ** 2, (nf / nc) ** 2) if pol == "TM" else (1.0, 1.0)
    if kap == 0.0:
        return -m * math.pi - math.pi  # at N = n_f the phase terms reach pi/2 each
    return kap * k0d - m * math.pi - math.atan(ws * gs / kap) - math.atan(wc * gc / kap)


def effective_indices(n_film: float, thickness_m: float, wavelength_m: float, *,
                      n_below: float = 1.0, n_above: float = 1.0, polarization: str = "TE",
                      max_modes: int = 8) -> list[float]:
    """Effective indices N_m (m = 0, 1, ...) of the guided modes of one polarization."""
    if polarization not in ("TE", "TM"):
        raise ValueError(f"polarization must be 'TE' or 'TM', got {polarization!r}")
    lo = max(n_below, n_above)
    if not n_film > lo:
        return []
    k0d = 2 * math.pi / wavelength_m * thickness_m
    a, b = lo * (1 + 1e-12), n_film * (1 - 1e-12)
    out = []
    for m in range(max_modes):
        fa = _mismatch(a, m, polarization, k0d, n_film, n_below, n_above)
        fb = _mismatch(b, m, polarization, k0d, n_film, n_below, n_above)
        if fa <= 0 or fb >= 0:
            break
        out.append(brentq(_mismatch, a, b, args=(m, polarization, k0d, n_film, n_below,
                                                 n_above), xtol=1e-14, rtol=1e-13))
    return out


def reciprocal_vectors(a1, a2) -> tuple[np.ndarray, np.ndarray]:
    """b1, b2 with a_i . b_j = 2 pi delta_ij (1/m)."""
    a = np.array([a1, a2], dtype=float)
    b = 2 * np.pi * np.linalg.inv(a).T
    return b[0], b[1]


@dataclass(frozen=True)
class Band:
    """One folded guided mode: polarization, mode number and the folding vector."""

    polarization: str
    mode: int
    g_index: tuple[int, int]

    @property
    def label(self) -> str:
        return f"{self.polarization}{self.mode} ({self.g_index[0]},{self.g_index[1]})"


def folded_mismatch(band: Band, b1, b2, n_eff: float, wavelength_m: float, theta_rad: float,
                    phi_rad: float, n_incidence: float = 1.0) -> float:
    """``|k_par + G| / k0 - N``: zero where the incident wave meets the folded band."""
    k0 = 2 * math.pi / wavelength_m
    s = n_incidence * math.sin(theta_rad)
    g = band.g_index[0] * np.asarray(b1) + band.g_index[1] * np.asarray(b2)
    kx = k0 * s * math.cos(phi_rad) + g[0]
    ky = k0 * s * math.sin(phi_rad) + g[1]
    return math.hypot(kx, ky) / k0 - n_eff


def hole_film(spec) -> tuple[float, float, float, float]:
    """(n_avg, thickness, n_below, n_above) of the homogenized film of a hole membrane."""
    p = spec.sample
    f = p.holes.fill_fraction if p.holes is not None else 0.0
    eps = (1 - f) * complex(p.material.eps).real + f * 1.0
    n_below = math.sqrt(complex(p.substrate.eps).real) if p.substrate is not None else 1.0
    return math.sqrt(eps), p.thickness_m, n_below, 1.0


def band_mismatches(spec, max_g: int = 1) -> dict[str, float]:
    """``{band label: mismatch}`` at the spec's wavelength and angles (no field solve)."""
    p = spec.sample
    n, d, nb, na = hole_film(spec)
    lam = spec.laser.wavelength_m
    h = p.holes
    b1, b2 = reciprocal_vectors(h.a1, h.a2)
    theta = spec.context.angle_rad or 0.0
    n_inc = nb if spec.laser.from_side == "below" else na
    out = {}
    for pol in ("TE", "TM"):
        for m, N in enumerate(effective_indices(n, d, lam, n_below=nb, n_above=na,
                                                polarization=pol, max_modes=3)):
            for i in range(-max_g, max_g + 1):
                for j in range(-max_g, max_g + 1):
                    if i == 0 and j == 0:
                        continue
                    band = Band(pol, m, (i, j))
                    out[band.label] = folded_mismatch(band, b1, b2, N, lam, theta,
                                                      spec.laser.azimuth_rad, n_inc)
    return out


def sweep_bands(base_raw: dict, values: list[dict], shape, *, source: str = "<spec>",
                base_dir=None) -> dict[str, np.ndarray] | None:
    """``{band label: mismatch grid}`` over a sweep of a hole membrane (None otherwise);
    a band's guide line is the zero contour of its grid."""
    from designer.errors import VelomatchError
    from designer.spec import parse_spec
    from designer.sweep import point_raw

    rows = []
    for v in values:
        try:
            spec = parse_spec(point_raw(base_raw, v), source=source, base_dir=base_dir)
        except (VelomatchError, ValueError):
            rows.append({})
            continue
        if getattr(spec.sample, "holes", None) is None:
            return None
        rows.append(band_mismatches(spec))
    labels = sorted({k for r in rows for k in r})
    out = {}
    for lab in labels:
        g = np.array([r.get(lab, np.nan) for r in rows], float).reshape(shape)
        finite = g[np.isfinite(g)]
        if finite.size and finite.min() <= 0 <= finite.max():   # the band crosses the map
            out[lab] = g
    return out


def draw_bands(ax, bands: dict[str, np.ndarray], axes: dict) -> None:
    """Guide lines of the folded bands on a sweep's plot (zero crossings / contours)."""
    keys = list(axes)
    colours = {"TE": "#ff7043", "TM": "#4fc3f7"}
    for j, (lab, g) in enumerate(sorted(bands.items())):
        col = colours[lab[:2]]
        if len(keys) == 1:
            x = np.asarray(axes[keys[0]], float)
            for k in range(len(x) - 1):
                a, b = g[k], g[k + 1]
                if np.isfinite(a) and np.isfinite(b) and a * b < 0:
                    pos = x[k] + (x[k + 1] - x[k]) * a / (a - b)
                    ax.axvline(pos, color=col, ls=":", lw=0.9)
                    ax.annotate(lab, (pos, 0.98), xycoords=("data", "axes fraction"),
                                fontsize=6, color=col, rotation=90, ha="right", va="top")
        else:
            x = np.asarray(axes[keys[0]], float)
            y = np.asarray(axes[keys[1]], float)
            if len(x) > 1 and len(y) > 1:
                cs = ax.contour(x, y, g.T, levels=[0.0], colors=col, linewidths=0.8,
                                linestyles=":")
                ax.clabel(cs, fmt=lambda _v, lab=lab: lab, fontsize=6)
    ax.plot([], [], color=colours["TE"], ls=":", label="empty-lattice TE bands")
    ax.plot([], [], color=colours["TM"], ls=":", label="empty-lattice TM bands")
    ax.legend(fontsize=7, loc="best")
