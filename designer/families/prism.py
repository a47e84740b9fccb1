"""A dielectric surface lit from inside by total internal reflection (prism coupling).

Geometry: the prism material fills z < 0; the lit surface is z = 0, optionally covered
by thin layers (bottom to top); vacuum above.  The laser comes from below inside the
prism; the electron moves along +x at ``offset`` above the top surface.

Phase matching: the evanescent wave above the surface travels along x with
``kx = n k sin(theta)``; it keeps pace with the electron when ``kx = omega / v``, i.e.

    sin(theta_inc) = 1 / (n beta)   (from the surface normal; cos theta_c = 1/(n beta)
                                     from the electron direction: the Cherenkov angle),

which needs ``n beta > 1`` (the Cherenkov condition: I. M. Frank & I. E. Tamm,
Dokl. Akad. Nauk SSSR 14, 109, 1937 — from memory).  Then
``n sin(theta) = 1/beta > 1``: total internal reflection at the vacuum side, whatever
thin layers lie between.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

from designer.errors import SpecError
from designer.families import base
from designer.families import region as freeform_region
from designer.families.base import (
    Feature,
    LayerStack,
    MaterialRef,
    PathGeometry,
    Polygon,
    SampleContext,
    SimulationLayout,
)
from designer.families.raster import (
    BIG,
    Scene,
    Segment,
    Slab,
    cell_material,
    rasterize,
    scene_polygons,
)
from designer.tables import TableReader
from solvers.grid import Grid

NAME = "prism"
_CELLS_X = 4   # the surface is uniform along x: a short Bloch cell suffices


@dataclass(frozen=True)
class PrismParams:
    """Prism material and the layers on its surface ``((material, thickness_m), ...)``."""

    material: MaterialRef
    layers: tuple[tuple[MaterialRef, float], ...] = ()
    wavelength_m: float = 0.0


def parse(reader: TableReader, ctx: SampleContext) -> PrismParams:
    """Read the ``[sample]`` table of a prism; refuses n beta <= 1 when phase matching."""
    reader.raw("family", NAME)
    freeform_region.parse_plane(reader, NAME, allowed=("cross_section",))
    material = base.resolve(reader, "material", reader.raw("material"), ctx)
    raw_layers = reader.raw("layers", [])
    if not isinstance(raw_layers, list):
        raise reader.error("layers", "must be a list of tables {material, thickness_nm}",
                           raw_layers)
    layers = []
    for j, item in enumerate(raw_layers):
        r = TableReader(item, reader.key(f"layers[{j}]"), reader.source)
        ref = base.resolve(r, "material", r.raw("material"), ctx)
        t = r.length("thickness_nm", minimum=0.0, exclusive_minimum=True)
        r.finish()
        layers.append((ref, t))
    if ctx.from_side != "below":
        raise SpecError(ctx.source, "laser.from", "a prism is lit from below, inside the "
                        'prism (use from = "below")', ctx.from_side)
    p = PrismParams(material, tuple(layers), ctx.wavelength_m)
    if ctx.angle_rad is None:
        laser_angle(p, ctx)  # the n beta <= 1 error belongs to reading the spec
    reader.finish()
    return p


def to_table(p: PrismParams) -> dict:
    t = {"family": NAME, "material": p.material.spec}
    if p.layers:
        t["layers"] = [{"material": m.spec, "thickness_nm": th * 1e9} for m, th in p.layers]
    return t


def _spec_values(p: PrismParams) -> dict[str, float]:
    return {f"layers.{j}.thickness_nm": th * 1e9 for j, (_, th) in enumerate(p.layers)}


def variables(p: PrismParams) -> dict[str, tuple[float, float, float]]:
    """Layer thicknesses ``layers.J.thickness_nm`` (spec units), 0.2 % to 200 % of lambda."""
    lam_nm = p.wavelength_m * 1e9
    out = {}
    for key, v in _spec_values(p).items():
        out[key] = (v, min(0.002 * lam_nm, v), max(2.0 * lam_nm, v))
    return out


def replace(p: PrismParams, values: dict[str, float]) -> PrismParams:
    base.check_values(values, _spec_values(p), NAME)
    v = {**_spec_values(p), **{k: float(x) for k, x in values.items()}}
    layers = []
    for j, (m, _) in enumerate(p.layers):
        t = v[f"layers.{j}.thickness_nm"] * 1e-9
        if not t > 0:
            raise ValueError(f"prism: layer {j} thickness must be > 0")
        layers.append((m, t))
    return dataclasses.replace(p, layers=tuple(layers))


def _phase_matching_hint(beta: float, wavelength_m: float) -> str:
    try:
        from designer.materials import phase_matching_materials
        found = phase_matching_materials(beta, wavelength_m)
    except ImportError:  # pragma: no cover - while designer.materials is missing
        return "(the materials catalogue is not available to suggest one)"
    if isinstance(found, dict):
        names = [f"{k} (n = {v:.4g})" for k, v in found.items()]
    else:
        names = [getattr(x, "name", x if isinstance(x, str) else str(x[0])) for x in found]
    if not names:
        return "no catalogue material works at this voltage and wavelength"
    return "catalogue materials that work here: " + ", ".join(names)


def laser_angle(p: PrismParams, ctx: SampleContext) -> float:
    """Incidence angle inside the prism from the surface normal (rad).

    Phase matched when asked: ``sin(theta) = 1/(n beta)``; SpecError if n beta <= 1,
    listing the catalogue materials with n beta > 1.
    """
    if ctx.angle_rad is not None:
        return ctx.angle_rad
    n = p.material.index.real
    if n * ctx.beta <= 1.0:
        raise SpecError(ctx.source, "sample.material",
                        f"no phase-matched angle: n beta = {n:.4g} x {ctx.beta:.4g} = "
                        f"{n * ctx.beta:.4g} <= 1 (needs n > 1/beta = {1 / ctx.beta:.4g}); "
                        + _phase_matching_hint(ctx.beta, ctx.wavelength_m), p.material.spec)
    return math.asin(1.0 / (n * ctx.beta))


def _top(p: PrismParams, v: dict | None = None) -> float:
    v = v or _spec_values(p)
    return sum(v[f"layers.{j}.thickness_nm"] * 1e-9 for j in range(len(p.layers)))


def _scene(p: PrismParams, v: dict, period: float) -> Scene:
    eps = [1.0 + 0j, p.material.eps]
    pieces = [Slab(1, -BIG, 0.0)]
    segs = [Segment(-period, 0.0, 2 * period, 0.0, periodic=False)]
    z = 0.0
    for j, (m, _) in enumerate(p.layers):
        t = v[f"layers.{j}.thickness_nm"] * 1e-9
        eps.append(m.eps)
        pieces.append(Slab(len(eps) - 1, z, z + t))
        z = z + t
        segs.append(Segment(-period, z, 2 * period, z, periodic=False))
    return Scene(tuple(eps), tuple(pieces), tuple(segs))


def _electron_z(p: PrismParams, ctx: SampleContext) -> float:
    # default: half a decay length above the top surface (a start, no source)
    return _top(p) + base.path_number(ctx, "offset_nm", 0.5 * base.decay_length(ctx))


def layout(p: PrismParams, ctx: SampleContext, grid_step_m: float) -> SimulationLayout:
    """Short Bloch cell; z: PML and margin inside the prism, layers, path room, PML."""
    nx, dx = _CELLS_X, grid_step_m
    period = nx * dx
    n_pml = base.pml_cells(ctx.wavelength_m, dx)
    margin = base.margin_m(ctx.wavelength_m)
    top = _top(p)
    z_e = _electron_z(p, ctx)
    z0, nz = base.z_grid(-margin, max(top, z_e) + 3.0 * base.decay_length(ctx) + margin,
                         dx, n_pml)
    grid = Grid(nx=nx, nz=nz, dx=dx, dz=dx, x0=0.0, z0=z0)
    scene = _scene(p, _spec_values(p), period)
    mask = base.strip_pml(cell_material(scene, grid, period), n_pml)
    path = PathGeometry("x", z_m=z_e, length_m=base.path_length(ctx))
    return SimulationLayout(
        grid=grid, pml_cells_z=n_pml, pml_cells_x=0, period_m=period,
        eps_incidence=p.material.eps, from_side="below",
        z_source_m=base.source_plane(grid, n_pml, "below"), angle_rad=laser_angle(p, ctx),
        material_mask=mask, path=path, grid_step_m=dx, structure_z_m=(0.0, top),
        wavelength_m=ctx.wavelength_m)


def permittivity(p: PrismParams, layout: SimulationLayout, values: dict | None = None):
    """(eps_x, eps_z), JAX-traceable in the layer thicknesses (Farjadpour et al. 2006)."""
    v = _spec_values(p)
    if values:
        base.check_values(values, v, NAME)
        v.update(values)
    return rasterize(_scene(p, v, layout.period_m), layout.grid, layout.period_m)


def layer_stack(p: PrismParams, ctx: SampleContext) -> LayerStack:
    """Prism below z = 0, the layers, vacuum above."""
    return LayerStack(p.material.eps, 1.0 + 0j, tuple((t, m.eps) for m, t in p.layers), 0.0)


def polygons(p: PrismParams, ctx: SampleContext, layout: SimulationLayout) -> list[Polygon]:
    g = layout.grid
    P = layout.period_m
    wide = max(3 * P, ctx.wavelength_m)
    span_x = (g.x0 - wide, g.x0 + P + wide)
    span_z = (g.z0 - P, g.z0 + g.size_z + P)
    names = [p.material] + [m for m, _ in p.layers]
    return [Polygon(verts, names[k - 1].name, names[k - 1].eps)
            for verts, k in scene_polygons(_scene(p, _spec_values(p), P), P, span_x, span_z,
                                           (g.x0, g.x0 + P))]


def check_path(p: PrismParams, ctx: SampleContext) -> None:
    """SpecError (path.offset_nm) unless the electron passes above the top surface."""
    top = _top(p)
    z_e = _electron_z(p, ctx)
    if z_e <= top:
        what = "the prism" if not p.layers else "the layers on the prism"
        raise SpecError(ctx.source, "path.offset_nm",
                        f"the electron at z = {z_e * 1e9:.4g} nm would run inside {what} "
                        f"(top surface at z = {top * 1e9:.4g} nm); the offset is the height "
                        "above the top surface and must be > 0", ctx.path.get("offset_nm"))


def features(p: PrismParams) -> list[Feature]:
    out, z = [], 0.0
    for j, (m, t) in enumerate(p.layers):
        out.append(Feature("layer", t, (0.0, z + 0.5 * t), f"layer {j} ({m.name}) thickness"))
        z += t
    return out


def draw(ax, p: PrismParams, ctx: SampleContext, layout: SimulationLayout, **options):
    """Picture of the sample; ``options`` go to :func:`designer.drawing.draw_sample`."""
    from designer import drawing

    title = f"prism surface ({p.material.name}), {len(p.layers)} layer(s)"
    return drawing.draw_sample(ax, polygons(p, ctx, layout), layout, title=title,
                               **{"periods": 1, **options})
