"""Pictures of samples: cross-section, electron path, laser direction, scale bar, legend.

Matplotlib with the Agg backend only (figures are built from ``matplotlib.figure``
directly, no pyplot state).  Coordinates are drawn in nanometres.
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

# our own palette: soft, distinguishable, printable in grey
_PALETTE = ("#9ec5e8", "#f2c57c", "#a8d8a0", "#d2b4de", "#f0a8a0", "#c8c8a0")
_ELECTRON = "#1f4e9e"
_LASER = "#c0392b"
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


def draw_sample(ax, polygons, layout, *, title: str = "", periods: int = 1):
    """Draw a sample cross-section on ``ax``.

    Args:
      polygons: ``[Polygon(vertices_m, material_name, eps), ...]`` of one period.
      layout: the SimulationLayout (grid, PML, source line, path, laser angle).
      title: axes title.
      periods: how many periods to show (the cell in the middle); with 1 the view is
        at least one wavelength wide.
    Returns the legend handles drawn (for tests and callers adding their own).
    """
    g = layout.grid
    P = layout.period_m or g.size_x
    lam = layout.wavelength_m or g.size_z
    if periods > 1:
        n_left = (periods - 1) // 2
        x_lo, x_hi = g.x0 - n_left * P, g.x0 + (periods - n_left) * P
    else:
        width = max(P, lam)
        xc = g.x0 + 0.5 * P
        x_lo, x_hi = xc - 0.5 * width, xc + 0.5 * width
    z_lo, z_hi = g.z0, g.z0 + g.size_z
    n_copies = int(math.ceil((x_hi - x_lo) / P)) + 2
    k0 = int(math.floor((x_lo - g.x0) / P)) - 1

    colours, handles = {}, []
    for poly in polygons:
        if poly.material_name not in colours:
            colours[poly.material_name] = _PALETTE[len(colours) % len(_PALETTE)]
            n = complex(np.sqrt(poly.eps))
            label = poly.material_name
            if not label.startswith(("n=", "eps=")):
                label += f" (n = {n.real:.3f}" + \
                    (f" + {n.imag:.3f}i)" if abs(n.imag) > 1e-6 else ")")
            handles.append(Patch(facecolor=colours[poly.material_name], edgecolor="0.3",
                                 label=label))
        verts0 = np.asarray(poly.vertices_m)
        # pieces of one period repeat; layers and half-spaces already span the view
        wide = np.ptp(verts0[:, 0]) > 1.5 * P
        for k in ((0,) if wide else range(k0, k0 + n_copies + 1)):
            verts = verts0 + np.array([k * P, 0.0])
            ax.add_patch(MplPolygon(verts * NM, closed=True,
                                    facecolor=colours[poly.material_name],
                                    edgecolor="0.3", linewidth=0.6))

    # PML bands and the source line
    pml = layout.pml_cells_z * g.dz
    for lo, hi in ((z_lo, z_lo + pml), (z_hi - pml, z_hi)):
        ax.axhspan(lo * NM, hi * NM, facecolor="none", edgecolor="0.6", hatch="//",
                   linewidth=0)
    handles.append(Patch(facecolor="none", edgecolor="0.6", hatch="//",
                         label="absorbing layer (PML)"))
    ax.axhline(layout.z_source_m * NM, color=_LASER, linestyle=":", linewidth=0.8)

    # electron path
    path = layout.path
    if path.direction == "x":
        z = path.z_m * NM
        ax.add_patch(FancyArrowPatch((x_lo * NM, z), (x_hi * NM, z), arrowstyle="-|>",
                                     mutation_scale=14, color=_ELECTRON, linewidth=1.6))
    else:
        zs = (path.z_below_m * NM, path.z_above_m * NM)
        x = path.x_m * NM
        ax.add_patch(FancyArrowPatch((x, (z_lo + pml) * NM), (x, (z_hi - pml) * NM),
                                     arrowstyle="-|>", mutation_scale=14, color=_ELECTRON,
                                     linewidth=1.6))
        for zb in zs:
            ax.axhline(zb, color=_ELECTRON, linestyle="--", linewidth=0.6)
    handles.append(Line2D([], [], color=_ELECTRON, linewidth=1.6, label="electron path"))

    # laser direction: an arrow from the source line, along the incident wavevector
    th = layout.angle_rad
    up = 1.0 if layout.from_side == "below" else -1.0
    length = 0.25 * (z_hi - z_lo)
    start = np.array([0.5 * (x_lo + x_hi) - 0.5 * length * math.sin(th),
                      layout.z_source_m + up * 0.02 * (z_hi - z_lo)])
    end = start + length * np.array([math.sin(th), up * math.cos(th)])
    ax.add_patch(FancyArrowPatch(tuple(start * NM), tuple(end * NM), arrowstyle="-|>",
                                 mutation_scale=16, color=_LASER, linewidth=2.0))
    handles.append(Line2D([], [], color=_LASER, linewidth=2.0,
                          label=f"laser, {math.degrees(th):.1f}° from {layout.from_side}"))

    # scale bar (bottom left, above the PML band)
    bar = nice_length((x_hi - x_lo) * NM)
    xb = x_lo * NM + 0.1 * (x_hi - x_lo) * NM
    zb = (z_lo + pml) * NM + 0.04 * (z_hi - z_lo) * NM
    ax.plot([xb, xb + bar], [zb, zb], color="k", linewidth=3, solid_capstyle="butt")
    ax.text(xb + 0.5 * bar, zb + 0.015 * (z_hi - z_lo) * NM, _label_length(bar),
            ha="center", va="bottom", fontsize=8)

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
