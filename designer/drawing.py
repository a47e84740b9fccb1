"""Pictures of samples: cross-section, electron path, laser direction, scale bar, legend.

Matplotlib with the Agg backend only (figures are built from ``matplotlib.figure``
directly, no pyplot state).  Coordinates are drawn in nanometres.

The look is velomatch's own and the same in every picture (cross-sections, field
maps, path profiles, sweeps, the export preview): the electron is drawn in
:data:`ELECTRON` (teal), the laser in :data:`LASER` (amber, an arrow with a few
wavefronts across it), materials as muted fills with a dark outline, vacuum white.
What only a grid solver has (absorbing boundary bands, the planes beyond which an
open path's tails are added analytically) is drawn faintly and only for FDFD
results; an exact layer-stack result shows the sample, the electron and the laser.
"""

from __future__ import annotations

import math
import os

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import FancyArrowPatch, Patch  # noqa: E402
from matplotlib.patches import Polygon as MplPolygon  # noqa: E402

#: the electron, everywhere (paths, markers, path-profile curves)
ELECTRON = "#00838f"
#: the laser, everywhere (arrows, wavefronts, phase-matching guides)
LASER = "#e08a00"
#: material fills, muted and distinguishable in grey print; outlines in OUTLINE
MATERIALS = ("#c5cfd9", "#e4d4b0", "#c9ddc0", "#d8c6df", "#e7c3b8", "#cfcfb0")
OUTLINE = "#34424f"
#: what only the grid solver has (absorbing boundary bands)
SOLVER_BAND = "#f1f3f5"
NM = 1e9


def nice_length(span: float) -> float:
    """A 1-2-5 x 10^k length close to a fifth of ``span`` (same units)."""
    target = span / 5.0
    k = math.floor(math.log10(target))
    for m in (5.0, 2.0, 1.0):
        if m * 10**k <= target:
            return m * 10**k
    return 10**k


def _label_length(nm: float) -> str:
    return f"{nm / 1000:g} µm" if nm >= 1000 else f"{nm:g} nm"


def view_span(layout, periods: int = 1) -> tuple[float, float]:
    """(x_lo, x_hi) in metres of the picture: ``periods`` periods with the simulated
    cell in the middle, or at least one wavelength centred on the cell."""
    g = layout.grid
    P = layout.period_m or g.size_x
    lam = layout.wavelength_m or g.size_z
    if periods > 1:
        n_left = (periods - 1) // 2
        return g.x0 - n_left * P, g.x0 + (periods - n_left) * P
    width = max(P, lam)
    xc = g.x0 + 0.5 * P
    return xc - 0.5 * width, xc + 0.5 * width


def polygon_copies(polygons, layout, x_lo: float, x_hi: float):
    """Yield ``(polygon, vertices_m)`` covering [x_lo, x_hi]: pieces of one period
    repeated, and layers, substrates and half-spaces (wider than 1.5 periods)
    stretched to span the whole view."""
    g = layout.grid
    P = layout.period_m or g.size_x
    n_copies = int(math.ceil((x_hi - x_lo) / P)) + 2
    k0 = int(math.floor((x_lo - g.x0) / P)) - 1
    pad = 0.05 * (x_hi - x_lo)
    for poly in polygons:
        verts0 = np.array(poly.vertices_m, dtype=float)
        if np.ptp(verts0[:, 0]) > 1.5 * P:
            v = verts0.copy()
            lo, hi = v[:, 0].min(), v[:, 0].max()
            v[np.isclose(v[:, 0], lo), 0] = min(lo, x_lo - pad)
            v[np.isclose(v[:, 0], hi), 0] = max(hi, x_hi + pad)
            yield poly, v
            continue
        for k in range(k0, k0 + n_copies + 1):
            yield poly, verts0 + np.array([k * P, 0.0])


def material_colours(polygons) -> dict:
    colours = {}
    for poly in polygons:
        if poly.material_name not in colours:
            colours[poly.material_name] = MATERIALS[len(colours) % len(MATERIALS)]
    return colours


def material_label(poly) -> str:
    n = complex(np.sqrt(poly.eps))
    label = poly.material_name
    if not label.startswith(("n=", "eps=")):
        label += f" (n = {n.real:.3f}" + (f" + {n.imag:.3f}i)" if abs(n.imag) > 1e-6 else ")")
    return label


def outline_materials(ax, polygons, layout, x_lo: float, x_hi: float, *,
                      colour: str = "white", linewidth: float = 0.9) -> Line2D:
    """Outline every material piece (no fill) over a field map; returns a legend handle."""
    for poly, verts in polygon_copies(polygons, layout, x_lo, x_hi):
        ax.add_patch(MplPolygon(verts * NM, closed=True, facecolor="none", edgecolor=colour,
                                linewidth=linewidth))
    return Line2D([], [], color=colour, linewidth=linewidth, label="material outline")


def electron_handle(**kw) -> Line2D:
    return Line2D([], [], color=ELECTRON, linewidth=2.2, label=kw.pop("label", "electron path"),
                  **kw)


def _laser_arrow(ax, start, end, *, wavefronts: int = 3, width: float = 2.2):
    """An amber arrow from ``start`` to ``end`` (nm) with short wavefronts across it."""
    start, end = np.asarray(start, float), np.asarray(end, float)
    ax.add_patch(FancyArrowPatch(tuple(start), tuple(end), arrowstyle="-|>",
                                 mutation_scale=16, color=LASER, linewidth=width, zorder=5))
    d = end - start
    length = float(np.hypot(*d))
    if length == 0 or wavefronts <= 0:
        return
    u = d / length
    n = np.array([-u[1], u[0]])
    half = 0.09 * length
    for j in range(wavefronts):
        c = start + (0.25 + 0.17 * j) * d
        a, b = c - half * n, c + half * n
        ax.plot([a[0], b[0]], [a[1], b[1]], color=LASER, linewidth=1.3, zorder=5,
                solid_capstyle="round")


def draw_laser(ax, layout, x_lo: float, x_hi: float, z_lo: float, z_hi: float) -> Line2D:
    """The incident laser as an arrow along its wavevector, ending on the sample.

    When the incidence medium is a dielectric and ``n sin θ > 1`` (light meeting the
    vacuum above at more than the critical angle), the arrow reflects at the top
    surface: total internal reflection, with the evanescent field above.
    """
    th = layout.angle_rad
    from_below = layout.from_side == "below"
    up = 1.0 if from_below else -1.0
    bottom, top = layout.structure_z_m
    n_inc = complex(layout.eps_incidence) ** 0.5
    tir = from_below and n_inc.real > 1.0 and n_inc.real * abs(math.sin(th)) > 1.0
    length = 0.3 * (z_hi - z_lo)
    xc = 0.5 * (x_lo + x_hi)
    hit_z = (top if tir else bottom) if from_below else top
    hit = np.array([xc, hit_z])
    direction = np.array([math.sin(th), up * math.cos(th)])
    start = hit - length * direction
    _laser_arrow(ax, start * NM, hit * NM)
    label = f"laser, {math.degrees(th):.1f}° from {layout.from_side}"
    if tir:
        out = hit + length * np.array([math.sin(th), -math.cos(th)])
        _laser_arrow(ax, hit * NM, out * NM, wavefronts=0, width=1.6)
        label += " (total internal reflection)"
    return Line2D([], [], color=LASER, linewidth=2.2, label=label)


def draw_sample(ax, polygons, layout, *, title: str = "", periods: int = 1,
                exact: bool = False):
    """Draw a sample cross-section on ``ax``.

    Args:
      polygons: ``[Polygon(vertices_m, material_name, eps), ...]`` of one period.
      layout: the SimulationLayout (grid, PML, path, laser angle).
      title: axes title.
      periods: how many periods to show (the cell in the middle); with 1 the view is
        at least one wavelength wide.
      exact: True for results of the exact layer-stack solver, which has no absorbing
        boundary and no box: only the sample, the electron and the laser are drawn.
    Returns the legend handles drawn (for tests and callers adding their own).
    """
    g = layout.grid
    x_lo, x_hi = view_span(layout, periods)
    pml = layout.pml_cells_z * g.dz
    z_lo, z_hi = g.z0, g.z0 + g.size_z
    if exact:
        z_lo, z_hi = z_lo + pml, z_hi - pml

    colours, handles = material_colours(polygons), []
    seen = set()
    for poly, verts in polygon_copies(polygons, layout, x_lo, x_hi):
        ax.add_patch(MplPolygon(verts * NM, closed=True, facecolor=colours[poly.material_name],
                                edgecolor=OUTLINE, linewidth=0.7))
        if poly.material_name not in seen:
            seen.add(poly.material_name)
            handles.append(Patch(facecolor=colours[poly.material_name], edgecolor=OUTLINE,
                                 label=material_label(poly)))

    if not exact and pml > 0:
        for lo, hi in ((z_lo, z_lo + pml), (z_hi - pml, z_hi)):
            ax.axhspan(lo * NM, hi * NM, facecolor=SOLVER_BAND, edgecolor="none", zorder=3,
                       alpha=0.92)
            ax.text(0.5 * (x_lo + x_hi) * NM, 0.5 * (lo + hi) * NM, "absorbing boundary",
                    ha="center", va="center", fontsize=7, color="0.45", style="italic",
                    zorder=4)
        handles.append(Patch(facecolor=SOLVER_BAND, edgecolor="0.75",
                             label="absorbing boundary (FDFD only)"))

    path = layout.path
    inner_lo, inner_hi = (z_lo, z_hi) if exact else (z_lo + pml, z_hi - pml)
    if path.direction == "x":
        z = path.z_m * NM
        ax.add_patch(FancyArrowPatch((x_lo * NM, z), (x_hi * NM, z), arrowstyle="-|>",
                                     mutation_scale=14, color=ELECTRON, linewidth=2.2,
                                     zorder=6))
        from designer.units import length

        handles.append(electron_handle(label=f"electron path ({length(path.z_m)} above z = 0)"))
    else:
        x = path.x_m * NM
        ax.add_patch(FancyArrowPatch((x, inner_lo * NM), (x, inner_hi * NM), arrowstyle="-|>",
                                     mutation_scale=14, color=ELECTRON, linewidth=2.2,
                                     zorder=6))
        handles.append(electron_handle())
        if not exact:
            for zb in (path.z_below_m, path.z_above_m):
                ax.axhline(zb * NM, color=ELECTRON, linestyle=(0, (4, 3)), linewidth=0.8,
                           zorder=4)
            handles.append(Line2D([], [], color=ELECTRON, linestyle=(0, (4, 3)),
                                  linewidth=0.8,
                                  label="beyond these: tails added analytically"))

    handles.append(draw_laser(ax, layout, x_lo, x_hi, inner_lo, inner_hi))

    bar = nice_length((x_hi - x_lo) * NM)
    xb = x_lo * NM + 0.06 * (x_hi - x_lo) * NM
    zb = inner_lo * NM + 0.05 * (inner_hi - inner_lo) * NM
    ax.plot([xb, xb + bar], [zb, zb], color="k", linewidth=3, solid_capstyle="butt", zorder=7)
    ax.text(xb + 0.5 * bar, zb + 0.015 * (inner_hi - inner_lo) * NM, _label_length(bar),
            ha="center", va="bottom", fontsize=8, zorder=7)

    ax.set_xlim(x_lo * NM, x_hi * NM)
    ax.set_ylim(z_lo * NM, z_hi * NM)
    ax.set_aspect("equal", adjustable="box")
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("z (nm)")
    if title:
        ax.set_title(title, fontsize=10)
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=8,
              frameon=False)
    return handles


def sample_figure(family, params, ctx, layout, *, width_in: float = 7.0) -> Figure:
    """A Figure (Agg) with the family's picture of the sample."""
    fig = Figure(figsize=(width_in, width_in * 0.75))
    ax = fig.add_subplot(1, 1, 1)
    family.draw(ax, params, ctx, layout)
    fig.tight_layout()
    return fig


def save_sample_picture(path: str | os.PathLike, family, params, ctx, layout, *,
                        dpi: int = 120):
    """Write the picture of a sample to ``path`` (PNG/SVG/PDF by suffix), atomically."""
    from designer.io import save_figure

    fig = sample_figure(family, params, ctx, layout)
    fig.set_dpi(dpi)
    return save_figure(fig, path)
