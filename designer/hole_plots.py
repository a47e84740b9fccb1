"""The picture of a Fourier-modal evaluation (hole and slit membranes, out-of-plane films).

``fmm_figure(ev)`` has six panels:

1. top view of 3 x 3 unit cells: material and openings, the lattice vectors, the
   point where the electron crosses the film's mid-plane (and, for a tilted path, its
   projection across the stack);
2. |E| per unit incident field in the film's mid-plane (top view, Fourier series of
   the solved field, solvers.fmm.fields) with the hole outlines and the electron;
3. |E| in the x-z plane through the electron (side view), the stack outlined;
4. |β_c| over the unit cell as a function of where the electron crosses: the path's
   coupling is a sum of harmonics, ``I(r) = sum_g I_g exp(i k_g . (r - r_0))``
   (solvers.fmm.coupling), so the whole map comes from one solution;
5. where the coupling is earned: the contribution of each medium (below, each
   layer, above) to I, as magnitude and as its projection on the total's phase (the
   projections add up to |I|);
6. |β_c| against the Fourier order count (the convergence behind the error estimate).

The series rings within about P/(2N + 1) of a hole wall (Gibbs); the maps show it,
the reported E_max leaves that band out (designer.holes.max_field_in_material).
"""

from __future__ import annotations

import dataclasses
import math

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from designer import drawing  # noqa: E402

NM = 1e9
TOP_SAMPLES = 121
SIDE_SAMPLES = (161, 121)


def _cells(sol):
    a1, a2 = (np.asarray(v, dtype=float) for v in sol.lattice.vectors())
    return a1, a2


def _region(sol, point):
    """Lateral window (x0, x1, y0, y1) covering about 3 x 3 cells around the point."""
    a1, a2 = _cells(sol)
    half = 1.5 * max(np.linalg.norm(a1), np.linalg.norm(a2))
    return point[0] - half, point[0] + half, point[1] - half, point[1] + half


def _top_grid(sol, point, n=TOP_SAMPLES):
    x0, x1, y0, y1 = _region(sol, point)
    x, y = np.linspace(x0, x1, n), np.linspace(y0, y1, n)
    xx, yy = np.meshgrid(x, y, indexing="xy")
    return x, y, xx, yy


def _outline(ax, spec, x, y, xx, yy, color="white"):
    from designer.holes import openings

    inside, _ = openings(spec, xx, yy)
    if inside.any() and not inside.all():
        ax.contour(x * NM, y * NM, inside.astype(float), levels=[0.5], colors=color,
                   linewidths=0.9)


def _electron(ax, spec, point, film_z=None):
    from designer.holes import path_direction

    ax.plot(point[0] * NM, point[1] * NM, marker="o", ms=7, mfc="none",
            mec=drawing.ELECTRON, mew=2.0, ls="none", label="electron crossing")
    s = path_direction(spec)
    if abs(s[0]) + abs(s[1]) > 1e-9 and film_z is not None:
        # projection of the tilted path across the stack (one film thickness each way)
        d = film_z / s[2]
        ax.plot([(point[0] - s[0] * d) * NM, (point[0] + s[0] * d) * NM],
                [(point[1] - s[1] * d) * NM, (point[1] + s[1] * d) * NM],
                color=drawing.ELECTRON, lw=1.6)


def _top_view(ax, ev, sol, point):
    from designer.holes import openings

    spec = ev.spec
    x, y, xx, yy = _top_grid(sol, point, 241)
    inside, _ = openings(spec, xx, yy)
    ax.imshow(np.where(inside, 1.0, 0.0), origin="lower", cmap="Greys_r", vmin=-0.6,
              vmax=1.0, extent=[x[0] * NM, x[-1] * NM, y[0] * NM, y[-1] * NM])
    a1, a2 = _cells(sol)
    for v, name in ((a1, "a₁"), (a2, "a₂")):
        ax.annotate("", xy=(v[0] * NM, v[1] * NM), xytext=(0, 0),
                    arrowprops=dict(arrowstyle="->", color=drawing.LASER, lw=1.5))
        ax.text(v[0] * NM * 1.05, v[1] * NM * 1.05, name, color=drawing.LASER, fontsize=9)
    cell = np.array([[0, 0], a1, a1 + a2, a2, [0, 0]]) - 0.5 * (a1 + a2)
    ax.plot(cell[:, 0] * NM, cell[:, 1] * NM, color=drawing.LASER, lw=0.8, ls=":")
    _electron(ax, spec, point, spec.sample.thickness_m / 2)
    phi = spec.laser.azimuth_rad
    ax.set_title(f"top view: material (grey), openings (white); laser azimuth "
                 f"{math.degrees(phi):g}°", fontsize=9)
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    ax.legend(fontsize=7, loc="upper right", framealpha=0.8)


def _film_medium(spec) -> int:
    return 1 + len(spec.sample.layers_below)


def _mid_plane(ax, fig, ev, sol, point):
    from solvers.fmm.fields import field_magnitude, medium_bounds

    spec = ev.spec
    x, y, xx, yy = _top_grid(sol, point)
    j = _film_medium(spec)
    zb, zt = medium_bounds(sol, j)
    mag = field_magnitude(sol, j, xx.ravel(), yy.ravel(), [0.5 * (zb + zt)])[0]
    _top_map(ax, fig, spec, point, (x, y, xx, yy), mag, drawing_cmap(),
             "|E| per V/m incident", "|E| in the film's mid-plane")


def _top_map(ax, fig, spec, point, grid, values, cmap, label, title):
    """A quantity over the top-view grid of ``_top_grid`` with the hole outlines and the
    electron's crossing point."""
    x, y, xx, yy = grid
    im = ax.imshow(np.reshape(values, xx.shape), origin="lower", cmap=cmap,
                   extent=[x[0] * NM, x[-1] * NM, y[0] * NM, y[-1] * NM])
    fig.colorbar(im, ax=ax, label=label, shrink=0.85)
    _outline(ax, spec, x, y, xx, yy)
    _electron(ax, spec, point)
    ax.set_title(title, fontsize=9)
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")


def drawing_cmap() -> str:
    from designer.plots import FIELD_CMAP

    return FIELD_CMAP


def _side_view(ax, fig, ev, sol, point):
    from designer.families.membrane import stack_layers
    from designer.holes import openings
    from solvers.fmm.fields import field_magnitude, medium_bounds

    spec = ev.spec
    lam = spec.laser.wavelength_m
    x0, x1, _, _ = _region(sol, point)
    nx, nz = SIDE_SAMPLES
    x = np.linspace(x0, x1, nx)
    y = np.full_like(x, point[1])
    top = float(np.asarray(sol.z_top))
    z = np.linspace(-0.4 * lam, top + 0.4 * lam, nz)
    mag = np.zeros((nz, nx))
    n_media = len(sol.media)
    for j in range(n_media):
        zb, zt = medium_bounds(sol, j)
        lo = -np.inf if j == 0 else zb
        hi = np.inf if j == n_media - 1 else zt
        sel = (z >= lo) & (z < hi)
        if sel.any():
            mag[sel] = field_magnitude(sol, j, x, y, z[sel])
    im = ax.imshow(mag, origin="lower", cmap=drawing_cmap(), aspect="auto",
                   extent=[x[0] * NM, x[-1] * NM, z[0] * NM, z[-1] * NM])
    fig.colorbar(im, ax=ax, label="|E| per V/m incident", shrink=0.85)
    # outline the material: layers with eps != 1, the film minus its openings
    _, rows, _ = stack_layers(spec.sample)
    inside, _ = openings(spec, x, y)
    solid = np.zeros((nz, nx))
    for j, (th, e) in enumerate(rows, start=1):
        zb, zt = medium_bounds(sol, j)
        sel = (z >= zb) & (z < zt)
        if e == "film":
            solid[sel] = (~inside).astype(float)[None, :]
        elif abs(complex(e) - 1.0) > 1e-12:
            solid[sel] = 1.0
    if abs(complex(np.asarray(sol.eps_below)) - 1.0) > 1e-12:
        solid[z < 0] = 1.0
    if solid.any():
        ax.contour(x * NM, z * NM, solid, levels=[0.5], colors="white", linewidths=0.9)
    from designer.holes import film_mid_z, path_direction

    s = path_direction(spec)
    zc = film_mid_z(spec)
    ends = np.array([z[0], z[-1]])
    ax.plot((point[0] + s[0] / s[2] * (ends - zc)) * NM, ends * NM, color=drawing.ELECTRON,
            lw=2.0, label="electron path")
    ax.set_title(f"|E| in the x-z plane through the electron (y = {point[1] * NM:.4g} nm)",
                 fontsize=9)
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("z (nm)")
    ax.legend(fontsize=7, loc="upper right", framealpha=0.8)


def _integral_pieces(ev, sol, point):
    """(labels, complex I per medium) for E0 = 1 V/m, and the total."""
    import jax.numpy as jnp

    from designer.families.membrane import stack_layers
    from designer.holes import film_mid_z, path_direction
    from solvers.fmm import coupling_integral

    spec = ev.spec
    media = list(sol.media)

    def only(j):
        zero = [dataclasses.replace(m, up=jnp.zeros_like(m.up), down=jnp.zeros_like(m.down))
                if k != j else m for k, m in enumerate(media)]
        return dataclasses.replace(sol, below=zero[0], layers=tuple(zero[1:-1]),
                                   above=zero[-1])

    _, rows, _ = stack_layers(spec.sample)
    labels = ["below"] + [("film" if e == "film" else f"layer {k}")
                          for k, (_, e) in enumerate(rows, start=1)] + ["above"]
    kw = dict(point=point, direction=path_direction(spec),
              velocity=spec.beam.velocity_m_per_s, z_ref=film_mid_z(spec))
    pieces = [complex(np.asarray(coupling_integral(only(j), **kw)))
              for j in range(len(media))]
    return labels, np.array(pieces)


def _pieces_panel(ax, ev, sol, point):
    from solvers.coupling import beta_from_integral

    labels, pieces = _integral_pieces(ev, sol, point)
    total = complex(np.sum(pieces))
    e0, w = ev.peak_field_V_per_m, ev.omega
    to_beta = abs(complex(beta_from_integral(e0, w)))
    phase = total / abs(total) if abs(total) > 0 else 1.0
    xs = np.arange(len(labels))
    ax.bar(xs - 0.2, np.abs(pieces) * to_beta, 0.4, color="#9bb7cc", label="|contribution|")
    ax.bar(xs + 0.2, (pieces * np.conj(phase)).real * to_beta, 0.4, color=drawing.ELECTRON,
           label="along the total's phase (adds up to |β_c|)")
    ax.axhline(0.0, color="0.4", lw=0.7)
    ax.set_xticks(xs, labels, fontsize=8)
    ax.set_ylabel("|β_c| share")
    ax.set_title(f"where the coupling is earned (|β_c| = {abs(total) * to_beta:.4g})",
                 fontsize=9)
    ax.legend(fontsize=7, loc="best")


def _cell_map(ax, fig, ev, sol, point):
    from designer.holes import film_mid_z, path_direction
    from solvers.coupling import beta_from_integral
    from solvers.fmm import harmonic_couplings

    spec = ev.spec
    ig = np.asarray(harmonic_couplings(sol, point, path_direction(spec),
                                       spec.beam.velocity_m_per_s, film_mid_z(spec)))
    k0 = float(np.asarray(sol.k0))
    kx, ky = np.asarray(sol.kx) * k0, np.asarray(sol.ky) * k0
    x, y, xx, yy = _top_grid(sol, point, 81)
    dx, dy = xx.ravel() - point[0], yy.ravel() - point[1]
    integral = np.exp(1j * (np.outer(dx, kx) + np.outer(dy, ky))) @ ig
    beta = np.abs(np.asarray(beta_from_integral(integral * ev.peak_field_V_per_m, ev.omega)))
    _top_map(ax, fig, spec, point, (x, y, xx, yy), beta, "viridis",
             "|β_c| at the peak field", "coupling versus where the electron crosses")


def _orders_panel(ax, ev):
    from solvers.coupling import beta_from_integral

    st = ev.order_study
    e0 = ev.peak_field_V_per_m
    betas = [abs(complex(beta_from_integral(i * e0, ev.omega))) for i in st.integrals_V]
    ax.plot(st.orders, betas, "o-", color="0.15")
    ax.plot([st.chosen], [betas[list(st.orders).index(st.chosen)]], "*", ms=13,
            color=drawing.ELECTRON, label=f"reported (N = {st.chosen})")
    ax.set_xticks(list(st.orders))
    ax.set_xlabel("Fourier orders N (|m|, |n| ≤ N)")
    ax.set_ylabel("|β_c|")
    err = st.relative_error
    ax.set_title("order convergence" + ("" if err is None else
                                        f": estimate {err:.2%}"), fontsize=9)
    ax.legend(fontsize=7)


def fmm_figure(ev) -> Figure:
    """The six-panel picture of a Fourier-modal evaluation (module docstring)."""
    from designer.holes import path_point

    sol = ev.run.fmm_solution
    spec = ev.spec
    point = path_point(spec)
    fig = Figure(figsize=(16.0, 9.5), layout="constrained")
    axes = fig.subplots(2, 3)
    _top_view(axes[0, 0], ev, sol, point)
    _mid_plane(axes[0, 1], fig, ev, sol, point)
    _side_view(axes[0, 2], fig, ev, sol, point)
    _cell_map(axes[1, 0], fig, ev, sol, point)
    _pieces_panel(axes[1, 1], ev, sol, point)
    _orders_panel(axes[1, 2], ev)
    pattern = spec.sample.holes.lattice + " holes" if spec.sample.holes is not None \
        else spec.sample.pattern
    fig.suptitle(f"membrane ({pattern}) at {spec.beam.voltage_V / 1e3:g} kV, "
                 f"{spec.laser.wavelength_m * NM:g} nm, {math.degrees(ev.angle_rad):.2f}° "
                 f"(Fourier modal method, N = {ev.fourier_orders})", fontsize=11)
    return fig
