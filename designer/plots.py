"""Pictures of evaluations: the sample, the field, and where along the path the
electron earns its coupling.

``evaluation_figure(ev)`` has five panels:

1. the cross-section (designer.drawing; exact layer-stack results without the grid
   solver's absorbing boundary);
2. |E| per unit incident field at the true aspect ratio, the material outlined and
   the electron path drawn, repeated over the same periods as panel 1 (|E| of a
   Bloch field is periodic);
3. paths along x: |β_c| versus height over the clear gap on a log scale, with the
   reference exp(−(z − z_e)/ℓ) of the synchronous field's 1/e length
   ℓ = βγλ/(2π) (R. J. England et al., Rev. Mod. Phys. 86, 1337, 2014); paths
   crossing a film: |β_c| across the cell;
4. a snapshot Re(E·ŝ) along the path at t = 0 and the synchronous amplitude |I|/L
   (for a path along a periodic structure, exactly the amplitude of the harmonic
   that travels with the electron);
5. the coupling integrand Re[E·ŝ e^{−iωs/v}] and the running integral
   |∫_0^s E·ŝ e^{−iωs'/v} ds'|, which ends at |I| (for open paths, the analytic tails
   beyond the modelled region are added at the end).

Matplotlib with the Agg backend only; figures are returned for
:func:`designer.io.save_figure` to write.
"""

from __future__ import annotations

import math

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402

from designer import drawing  # noqa: E402
from designer.families import get_family  # noqa: E402

NM = 1e9
FIELD_CMAP = "cividis"


# -- data ----------------------------------------------------------------------------

def _cumtrapz(y: np.ndarray, x: np.ndarray) -> np.ndarray:
    out = np.zeros_like(y)
    out[1:] = np.cumsum(0.5 * (y[1:] + y[:-1]) * np.diff(x))
    return out


def path_profile(ev) -> dict:
    """E·ŝ along the electron's path for a 1 V/m incident wave, the coupling integrand
    E·ŝ e^{−iωs/v} (with the laser-spot envelope when one is given) and its running
    integral; ``s_m`` is the position along the path (x or z, m)."""
    run, layout = ev.run, ev.run.layout
    path = layout.path
    v = ev.spec.beam.velocity_m_per_s
    omega = ev.omega
    envelope = None
    start = 0j
    if path.direction == "x":
        P = layout.period_m or layout.grid.size_x
        L = ev.interaction_length_m or P
        n = int(min(6000, max(400, 64 * round(L / P))))
        if run.fields is not None:
            g = layout.grid
            s = g.x0 + np.linspace(0.0, L, n)
            along = run.fields.sample_ex(s, np.full_like(s, path.z_m))
            centre = g.x0 + 0.5 * g.dx + 0.5 * L
        else:
            from solvers import layers

            s = np.linspace(0.0, L, n)
            ex = complex(np.asarray(layers.stack_fields(run.stack, 0.0, path.z_m)[0]))
            along = ex * np.exp(1j * complex(np.asarray(run.stack.kx)).real * s)
            centre = 0.5 * L
        from designer.evaluate import laser_footprint_radius

        radius = laser_footprint_radius(ev.spec, layout.angle_rad)
        if radius is not None:
            envelope = np.exp(-((s - centre) / radius) ** 2)
        tails = False
    else:
        if run.fields is not None:
            g = layout.grid
            z1 = g.z0 + math.floor((path.z_below_m - g.z0) / g.dz + 1e-9) * g.dz
            z2 = g.z0 + math.ceil((path.z_above_m - g.z0) / g.dz - 1e-9) * g.dz
            s = np.linspace(z1, z2, 1200)
            along = run.fields.sample_ez(np.full_like(s, path.x_m), s)
        else:
            from solvers import layers

            s = np.linspace(path.z_below_m, path.z_above_m, 1200)
            along = np.asarray(layers.stack_fields(run.stack, path.x_m, s)[1])
            start = _tail_below(ev, s[0])
        tails = True
    along = np.asarray(along, dtype=complex)
    integrand = along * np.exp(-1j * omega * s / v)
    if envelope is not None:
        integrand = integrand * envelope
    return {"s_m": s, "along": along, "integrand": integrand,
            "running": start + _cumtrapz(integrand, s), "total_V": complex(run.integral_V),
            "tails": tails, "from_minus_infinity": tails and run.fields is None,
            "envelope": envelope}


def _tail_below(ev, z1: float) -> complex:
    """∫_{−∞}^{z1} E_z e^{−iωz/v} dz of an exact layer-stack field in the homogeneous
    medium below (adiabatic switching, as in solvers.coupling): there E_z is the sum of
    an up- and a down-going plane wave, whose amplitudes two samples fix exactly; each
    wave a e^{iqz} contributes a e^{iq z1}/(iq), q = ±k_z − ω/v."""
    from solvers import layers

    sol, path = ev.run.stack, ev.run.layout.path
    lam = ev.spec.laser.wavelength_m
    k0 = 2 * math.pi / lam
    kx = complex(np.asarray(sol.kx))
    kz = np.sqrt(complex(path.eps_below) * k0**2 - kx**2)
    za, zb = z1 - 0.1 * lam, z1 - 0.37 * lam
    ez = np.asarray(layers.stack_fields(sol, path.x_m, np.array([za, zb]))[1], dtype=complex)
    m = np.array([[np.exp(1j * kz * za), np.exp(-1j * kz * za)],
                  [np.exp(1j * kz * zb), np.exp(-1j * kz * zb)]])
    amp = np.linalg.solve(m, ez)
    q = np.array([kz, -kz]) - ev.omega / ev.spec.beam.velocity_m_per_s
    return complex(np.sum(amp * np.exp(1j * q * z1) / (1j * q)))


def _tile_fdfd_map(ev, x_lo: float, x_hi: float):
    fields, layout = ev.run.fields, ev.run.layout
    from solvers.fdfd import e_magnitude_at_centres

    g = fields.grid
    mag = np.asarray(e_magnitude_at_centres(fields.ex, fields.ez, g, bloch_kx=fields.bloch_kx,
                                            periodic_x=layout.pml_cells_x == 0))
    n = layout.pml_cells_z
    mag = mag[:, n:g.nz - n]
    z_lo, z_hi = g.z0 + n * g.dz, g.z0 + (g.nz - n) * g.dz
    if layout.pml_cells_x:
        return mag, (g.x0, g.x0 + g.size_x, z_lo, z_hi)
    P = g.size_x
    k0 = int(math.floor((x_lo - g.x0) / P))
    k1 = int(math.ceil((x_hi - g.x0) / P))
    tiled = np.tile(mag, (max(1, k1 - k0), 1))
    return tiled, (g.x0 + k0 * P, g.x0 + k1 * P, z_lo, z_hi)


def _stack_map(ev, x_lo: float, x_hi: float):
    from solvers import layers

    layout = ev.run.layout
    g = layout.grid
    n = layout.pml_cells_z
    z = np.linspace(g.z0 + n * g.dz, g.z0 + (g.nz - n) * g.dz, 600)
    ex, ez, _ = layers.stack_fields(ev.run.stack, 0.0, z)
    mag = np.sqrt(np.abs(np.asarray(ex)) ** 2 + np.abs(np.asarray(ez)) ** 2)
    return np.repeat(mag[None, :], 2, axis=0), (x_lo, x_hi, z[0], z[-1])


# -- panels --------------------------------------------------------------------------

def _field_map(ax, fig, ev, polygons, x_lo: float, x_hi: float) -> list:
    layout = ev.run.layout
    if ev.run.fields is not None:
        mag, ext = _tile_fdfd_map(ev, x_lo, x_hi)
    else:
        mag, ext = _stack_map(ev, x_lo, x_hi)
    im = ax.imshow(mag.T, origin="lower", extent=[e * NM for e in ext], cmap=FIELD_CMAP,
                   interpolation="nearest", aspect="equal")
    fig.colorbar(im, ax=ax, label="|E| per V/m incident", shrink=0.85)
    handles = [drawing.outline_materials(ax, polygons, layout, x_lo, x_hi)]
    path = layout.path
    if path.direction == "x":
        ax.axhline(path.z_m * NM, color=drawing.ELECTRON, lw=2.0)
    else:
        ax.axvline(path.x_m * NM, color=drawing.ELECTRON, lw=2.0)
    handles.append(drawing.electron_handle())
    ax.set_xlim(x_lo * NM, x_hi * NM)
    ax.set_ylim(ext[2] * NM, ext[3] * NM)
    ax.set_aspect("equal", adjustable="box")
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("z (nm)")
    ax.set_title("field magnitude" + (" (exact)" if ev.run.fields is None else " (FDFD)"),
                 fontsize=10)
    ax.legend(handles=handles, loc="upper right", fontsize=7, framealpha=0.8)
    return handles


def _height_scan(ax, ev) -> list:
    from solvers.coupling import beta_from_integral

    run, spec = ev.run, ev.spec
    layout = run.layout
    handles = []
    if run.map_z_m is not None:
        e0 = ev.peak_field_V_per_m
        sides = getattr(spec.sample, "sides", 1)
        # between two rows there is no "above the top surface": heights are then z itself,
        # as in the field map beside this panel
        top = 0.0 if sides == 2 else layout.structure_z_m[1]
        h = (np.asarray(run.map_z_m) - top) * NM
        beta = np.abs(np.asarray(beta_from_integral(run.map_z_integral_V * e0, ev.omega)))
        ax.plot(h, beta, color="0.15", lw=1.6, label="|β_c| at each height")
        z_e = (layout.path.z_m - top) * NM
        b_e = abs(complex(beta_from_integral(run.integral_V * e0, ev.omega)))
        if sides != 2 and b_e > 0:
            from designer.families.base import decay_length

            ell = decay_length(spec.context) * NM
            ax.plot(h, b_e * np.exp(-(h - z_e) / ell), color=drawing.LASER, lw=1.2,
                    ls=(0, (5, 3)), label=f"exp(−z/ℓ), ℓ = {ell:.4g} nm (1/e of the field)")
        ax.axvline(z_e, color=drawing.ELECTRON, lw=1.8, label="electron height")
        if np.all(beta > 0):
            ax.set_yscale("log")
        ax.set_xlabel("electron height z (nm), as in the field map" if sides == 2
                      else "height above the top surface (nm)")
        ax.set_ylabel("|β_c|")
        ax.set_title("coupling versus electron height", fontsize=10)
        handles = ax.legend(fontsize=7, loc="upper right").legend_handles
    elif run.map_x_m is not None:
        e0 = ev.peak_field_V_per_m
        beta = np.abs(np.asarray(beta_from_integral(run.map_integral_V * e0, ev.omega)))
        ax.plot(np.asarray(run.map_x_m) * NM, beta, color="0.15", lw=1.6,
                label="|β_c| across the cell")
        ax.axvline(layout.path.x_m * NM, color=drawing.ELECTRON, lw=1.8,
                   label="electron position")
        ax.set_xlabel("lateral electron position x (nm)")
        ax.set_ylabel("|β_c|")
        ax.set_title("coupling across the unit cell", fontsize=10)
        handles = ax.legend(fontsize=7, loc="best").legend_handles
    else:
        ax.axis("off")
        ax.text(0.5, 0.5, "uniform film:\nthe coupling is the same\nat every lateral position",
                ha="center", va="center", fontsize=9, color="0.35", transform=ax.transAxes)
    return handles


def _with_zero(ax) -> None:
    """Plain tick labels (no offset) and a y range that includes zero, so that a
    constant curve reads as a constant and not as noise around an offset."""
    lo, hi = ax.get_ylim()
    span = max(hi, 0.0) - min(lo, 0.0)
    ax.set_ylim(min(lo, 0.0) - 0.05 * span, max(hi, 0.0) + 0.05 * span)
    ax.ticklabel_format(axis="y", useOffset=False)


def _s_axis(profile) -> tuple[np.ndarray, str]:
    s = profile["s_m"]
    span = s[-1] - s[0]
    if span > 5e-6:
        return s * 1e6, "µm"
    return s * NM, "nm"


def _snapshot(ax, ev, profile) -> list:
    s, unit = _s_axis(profile)
    along = profile["along"]
    which = "E_x" if ev.run.layout.path.direction == "x" else "E_z"
    ax.plot(s, along.real, color="0.25", lw=0.9, label=f"Re(E·ŝ) = Re {which} at t = 0")
    L = ev.gradient_length_m
    if L:
        amp = abs(profile["total_V"]) / L
        for sign in (1, -1):
            ax.axhline(sign * amp, color=drawing.ELECTRON, lw=1.4, ls=(0, (5, 3)))
        handles_extra = [Line2D([], [], color=drawing.ELECTRON, lw=1.4, ls=(0, (5, 3)),
                                label=f"± synchronous amplitude |I|/L = {amp:.3g} V/m")]
    else:
        handles_extra = []
    if profile["envelope"] is not None:
        ax.plot(s, profile["envelope"] * np.max(np.abs(along)), color=drawing.LASER, lw=1.0,
                label="laser-spot envelope")
    if ev.run.layout.path.direction == "z":
        bottom, top = ev.run.layout.structure_z_m
        scale = 1e6 if unit == "µm" else NM
        ax.axvspan(bottom * scale, top * scale, color=drawing.MATERIALS[0], alpha=0.6, lw=0)
    ax.set_xlabel(f"position along the path ({unit})")
    ax.set_ylabel("field per V/m incident")
    ax.set_title("what the electron sees: field along its path", fontsize=10)
    handles = ax.get_legend_handles_labels()[0] + handles_extra
    ax.legend(handles=handles, fontsize=7, loc="upper right", framealpha=0.85)
    return handles


def _integrand(ax, ev, profile) -> list:
    s, unit = _s_axis(profile)
    ax.plot(s, profile["integrand"].real, color=drawing.ELECTRON, lw=0.8,
            label="Re[E·ŝ e^(−iωs/v)]")
    ax.set_xlabel(f"position along the path ({unit})")
    ax.set_ylabel("integrand (V/m per V/m)")
    twin = ax.twinx()
    if profile["from_minus_infinity"]:
        what = "running |∫ from −∞ to s|"
    elif profile["tails"]:
        what = "running |∫| over the modelled region only"
    else:
        what = "running |∫ E·ŝ e^(−iωs/v) ds|"
    twin.plot(s, np.abs(profile["running"]), color="0.1", lw=2.0, label=what)
    total = abs(profile["total_V"])
    handles = ax.get_legend_handles_labels()[0] + twin.get_legend_handles_labels()[0]
    if profile["tails"]:
        twin.plot([s[-1]], [total], marker="*", ms=11, color="0.1", ls="none",
                  label="|I|, the limit s → ∞ (tail above added)")
        handles = handles + [twin.get_lines()[-1]]
    twin.set_ylabel("running |integral| (V per V/m)")
    twin.set_ylim(bottom=0)
    _with_zero(ax)
    if profile["from_minus_infinity"]:
        ax.text(0.99, 0.03, "in vacuum the running integral circles around its limit:\n"
                "propagating waves add no net coupling", transform=ax.transAxes,
                ha="right", va="bottom", fontsize=7, color="0.35")
    ax.set_title("where the coupling is earned", fontsize=10)
    ax.legend(handles=handles, fontsize=7, loc="upper left", framealpha=0.85)
    return handles


def evaluation_figure(ev) -> Figure:
    """The five-panel picture of one evaluation (module docstring); Fourier-modal
    runs get their own picture (designer.hole_plots)."""
    if ev.solver == "fmm":
        from designer.hole_plots import fmm_figure

        return fmm_figure(ev)
    spec = ev.spec
    family = get_family(spec.family)
    layout = ev.run.layout
    exact = ev.run.fields is None
    fig = Figure(figsize=(15.0, 10.0))
    gs = fig.add_gridspec(2, 6, height_ratios=(1.3, 1.0), hspace=0.5, wspace=1.6)
    ax_s = fig.add_subplot(gs[0, 0:2])
    ax_f = fig.add_subplot(gs[0, 2:4])
    ax_h = fig.add_subplot(gs[0, 4:6])
    ax_p = fig.add_subplot(gs[1, 0:3])
    ax_i = fig.add_subplot(gs[1, 3:6])
    polygons = family.polygons(spec.sample, spec.context, layout)
    family.draw(ax_s, spec.sample, spec.context, layout, exact=exact)
    ax_s.legend(handles=ax_s.get_legend().legend_handles, loc="upper center",
                bbox_to_anchor=(0.5, -0.14), fontsize=7, frameon=False, ncol=2)
    xmin, xmax = (v / NM for v in ax_s.get_xlim())
    _field_map(ax_f, fig, ev, polygons, xmin, xmax)
    _height_scan(ax_h, ev)
    profile = path_profile(ev)
    _snapshot(ax_p, ev, profile)
    _integrand(ax_i, ev, profile)
    fig.suptitle(f"{spec.family} at {spec.beam.voltage_V / 1e3:g} kV, "
                 f"{spec.laser.wavelength_m * NM:g} nm, {math.degrees(ev.angle_rad):.2f}° "
                 f"({'exact layer-stack solution' if exact else 'FDFD'})", fontsize=11)
    return fig


# -- sweeps --------------------------------------------------------------------------

_KEY_WORDS = {
    "beam.voltage_kV": "beam voltage", "laser.wavelength_nm": "laser wavelength",
    "laser.angle_deg": "laser angle of incidence",
    "path.offset_nm": "electron height above the surface",
    "path.length_um": "interaction length", "path.x_nm": "electron position x",
    "sample.thickness_nm": "film thickness", "sample.period_nm": "period",
    "sample.duty_cycle": "duty cycle", "sample.tooth_height_nm": "tooth height",
    "sample.sidewall_angle_deg": "sidewall angle", "sample.gap_nm": "gap between gratings",
    "sample.shift_nm": "shift between gratings", "laser.peak_field_V_per_m": "peak field",
}
_UNIT_WORDS = {"nm": "nm", "um": "µm", "kV": "kV", "deg": "°", "fs": "fs", "eV": "eV",
               "V_per_m": "V/m", "W_per_cm2": "W/cm²", "mJ_per_cm2": "mJ/cm²", "uJ": "µJ"}


def axis_label(key: str) -> str:
    """A spec key in words with its unit: ``laser.angle_deg`` -> "laser angle of
    incidence (°)"; unknown keys: the last part without its unit suffix."""
    unit = None
    for suffix, word in sorted(_UNIT_WORDS.items(), key=lambda t: -len(t[0])):
        if key.endswith("_" + suffix):
            unit = word
            break
    words = _KEY_WORDS.get(key)
    if words is None:
        last = key.split(".")[-1]
        for suffix in sorted(_UNIT_WORDS, key=len, reverse=True):
            if last.endswith("_" + suffix):
                last = last[: -len(suffix) - 1]
                break
        words = last.replace("_", " ")
        if ".layers." in key:
            words = f"layer {int(key.split('.')[2]) + 1} {words}"
    return f"{words} ({unit})" if unit else words


def _is_height(key: str) -> bool:
    return key in ("path.offset_nm",)


def sweep_figure(data: dict, plotted, quantity_grid, *, guides=None, guide_positions=None,
                 decay_length_m: float | None = None, bands: dict | None = None) -> Figure:
    """The sweep picture: one panel per figure of merit.

    One swept key: a line plot; guide lines (laser colour) only where the swept key
    changes the matching condition; for heights a log scale and the reference
    exp(−z/ℓ) of the synchronous field's 1/e length.  Two keys: heat maps with the
    guide contours.  Axis labels are the keys in words with their units.
    """
    keys = list(data["axes"])
    panels = [(n, label) for n, label in plotted
              if np.isfinite(quantity_grid(data, n)).any()] or [plotted[0]]
    fig = Figure(figsize=(5.4 * len(panels), 4.2), layout="constrained")
    axs = fig.subplots(1, len(panels), squeeze=False)[0]
    for ax, (name, label) in zip(axs, panels):
        grid = quantity_grid(data, name)
        if len(keys) == 1:
            x = np.asarray(data["axes"][keys[0]], dtype=float)
            ax.plot(x, grid, "o-", ms=3.5, lw=1.4, color="0.15", label=label)
            ax.set_xlabel(axis_label(keys[0]))
            ax.set_ylabel(label)
            if _is_height(keys[0]):
                finite = np.isfinite(grid) & (grid > 0)
                if finite.sum() >= 2:
                    ax.set_yscale("log")
                    if decay_length_m and name == "beta_c":
                        j = int(np.argmax(finite))
                        ell = decay_length_m * NM
                        ax.plot(x, grid[j] * np.exp(-(x - x[j]) / ell), color=drawing.LASER,
                                lw=1.2, ls=(0, (5, 3)),
                                label=f"exp(−z/ℓ), ℓ = {ell:.4g} nm (1/e of the field)")
            if guides is not None and guide_positions is not None:
                for j, (m, pos) in enumerate(guide_positions(x, guides.orders, guides.levels)):
                    ax.axvline(pos, color=drawing.LASER, ls=(0, (4, 3)), lw=1.1,
                               label=guides.label if j == 0 else None)
                    ax.annotate(f"m={m:g}", (pos, 1.0), xycoords=("data", "axes fraction"),
                                fontsize=7, color=drawing.LASER, ha="center", va="bottom")
            ax.legend(fontsize=7, loc="best")
        else:
            x = np.asarray(data["axes"][keys[0]], dtype=float)
            y = np.asarray(data["axes"][keys[1]], dtype=float)
            if len(x) > 1 and len(y) > 1:
                mesh = ax.pcolormesh(x, y, np.ma.masked_invalid(grid.T), shading="nearest",
                                     cmap=FIELD_CMAP)
                fig.colorbar(mesh, ax=ax, label=label)
                if guides is not None and guides.levels:
                    cs = ax.contour(x, y, guides.orders.T, levels=sorted(guides.levels),
                                    colors=drawing.LASER, linewidths=1.1,
                                    linestyles="dashed")
                    ax.clabel(cs, fmt=lambda m: f"m={m:g}", fontsize=7)
                    ax.plot([], [], color=drawing.LASER, ls="--", label=guides.label)
                    ax.legend(fontsize=7, loc="upper right")
                if _is_height(keys[1]):
                    ax.set_yscale("log")
                if _is_height(keys[0]):
                    ax.set_xscale("log")
            else:
                ax.text(0.5, 0.5, "grid too small for a heat map", ha="center",
                        transform=ax.transAxes)
            ax.set_xlabel(axis_label(keys[0]))
            ax.set_ylabel(axis_label(keys[1]))
            ax.set_title(label, fontsize=9)
        if bands:
            from designer.slab_modes import draw_bands

            draw_bands(ax, bands, data["axes"])
    return fig
