"""Pictures of evaluations: the sample with its path, and the field the electron sees.

Matplotlib with the Agg backend only; figures are returned for
:func:`designer.io.save_figure` to write.
"""

from __future__ import annotations

import math

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from designer.drawing import draw_sample  # noqa: E402
from designer.families import get_family  # noqa: E402

NM = 1e9


def evaluation_figure(ev) -> Figure:
    """Left: the sample cross-section; right: |E| (FDFD) or the field along the path."""
    spec = ev.spec
    family = get_family(spec.family)
    layout = ev.run.layout
    fig = Figure(figsize=(11.0, 4.4))
    ax_s, ax_f = fig.subplots(1, 2)
    polygons = family.polygons(spec.sample, spec.context, layout)
    draw_sample(ax_s, polygons, layout, title=f"{spec.family}: cross-section")
    fields = ev.run.fields
    if fields is not None:
        from solvers.fdfd import e_magnitude_at_centres

        g = fields.grid
        mag = np.asarray(e_magnitude_at_centres(fields.ex, fields.ez, g,
                                                bloch_kx=fields.bloch_kx,
                                                periodic_x=layout.pml_cells_x == 0))
        n = layout.pml_cells_z
        extent = [g.x0 * NM, (g.x0 + g.size_x) * NM, (g.z0 + n * g.dz) * NM,
                  (g.z0 + (g.nz - n) * g.dz) * NM]
        im = ax_f.imshow(mag[:, n:g.nz - n].T, origin="lower", extent=extent, aspect="auto",
                         cmap="magma")
        fig.colorbar(im, ax=ax_f, label="|E| per V/m incident")
        path = layout.path
        if path.direction == "x":
            ax_f.axhline(path.z_m * NM, color="#7fd4ff", lw=1.2, ls="--", label="electron")
        else:
            ax_f.axvline(path.x_m * NM, color="#7fd4ff", lw=1.2, ls="--", label="electron")
        ax_f.legend(loc="upper right", fontsize=8)
        ax_f.set_xlabel("x (nm)")
        ax_f.set_ylabel("z (nm)")
        ax_f.set_title("field magnitude (one period)")
    else:
        _stack_profile(ax_f, ev)
    fig.suptitle(f"{spec.beam.voltage_V / 1e3:g} kV, {spec.laser.wavelength_m * NM:g} nm, "
                 f"{math.degrees(ev.angle_rad):.2f}°")
    return fig


def _stack_profile(ax, ev) -> None:
    from solvers import layers

    layout = ev.run.layout
    path = layout.path
    lam = ev.spec.laser.wavelength_m
    if path.direction == "z":
        z = np.linspace(layout.structure_z_m[0] - lam, layout.structure_z_m[1] + lam, 800)
        ex, ez, _ = layers.stack_fields(ev.run.stack, path.x_m, z)
        along = np.asarray(ez)
        ax.set_xlabel("z along the path (nm)")
    else:
        z = np.linspace(layout.structure_z_m[0] - 0.5 * lam, path.z_m + 3 * lam / 4, 800)
        ex, ez, _ = layers.stack_fields(ev.run.stack, 0.0, z)
        along = np.asarray(ex)
        ax.axvline(path.z_m * NM, color="#1f4e9e", ls="--", lw=1, label="electron height")
        ax.set_xlabel("height z (nm)")
    ax.plot(z * NM, np.abs(along), label="|E along path|")
    ax.plot(z * NM, np.real(along), lw=0.8, label="Re")
    ax.set_ylabel("field per V/m incident")
    ax.set_title("exact layer-stack field")
    ax.legend(fontsize=8)
