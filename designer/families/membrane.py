"""A thin film the electron crosses (along +z), plain or with a periodic slit pattern.

Geometry: the film fills ``0 <= z <= thickness`` (vacuum on both sides).  With
``pattern = "slits"`` it is cut by slits through its whole thickness, repeated with
``period_nm`` along x: slit j has width ``slit_widths_nm[j]`` and is centred at
``slit_centers_nm[j]`` (0 <= centre < period; slits must not overlap).  The material
between slits are the *bars*.  The electron moves along +z at ``path.x_nm``.

An unpatterned film is laid out as a short Bloch cell (the field is a plane wave
along x) and is also offered as an exact layer stack (solvers.layers).  There is no
phase-matched incidence angle for an electron crossing a film in vacuum (it would
need cos(theta) = 1/beta > 1), so the spec must give ``angle_deg``.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

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
    Scene,
    Segment,
    Slab,
    Trapezoid,
    cell_material,
    fill_fractions,
    rasterize,
    scene_polygons,
)
from designer.tables import TableReader
from solvers.grid import Grid

NAME = "membrane"
_PLAIN_CELLS = 4   # x cells of the Bloch cell of an unpatterned film


@dataclass(frozen=True)
class MembraneParams:
    """A film with optional slits (SI).  Slits sorted by centre."""

    material: MaterialRef
    thickness_m: float
    pattern: str                          # "none" | "slits"
    period_m: float | None                # slits only
    slit_widths_m: tuple[float, ...] = ()
    slit_centers_m: tuple[float, ...] = ()
    wavelength_m: float = 0.0
    freeform: freeform_region.FreeformRegion | None = None   # [sample.freeform]


def _float_list(reader: TableReader, name: str, default):
    value = reader.raw(name, default)
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        value = [value]
    if not isinstance(value, list) or not value:
        raise reader.error(name, "must be a non-empty list of numbers", value)
    for x in value:
        if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
            raise reader.error(name, "must be a list of finite numbers", value)
    return [float(x) for x in value]


def parse(reader: TableReader, ctx: SampleContext) -> MembraneParams:
    """Read the ``[sample]`` table of a membrane."""
    reader.raw("family", NAME)
    freeform_region.parse_plane(reader, NAME, allowed=("cross_section",))
    material = base.resolve(reader, "material", reader.raw("material"), ctx)
    thickness = reader.length("thickness_nm", 100e-9, minimum=0.0,
                              exclusive_minimum=True)
    pattern = reader.string("pattern", "none", choices=("none", "slits"))
    if pattern == "none":
        for key in ("period_nm", "slit_widths_nm", "slit_centers_nm"):
            if reader.has(key):
                raise reader.error(key, 'only with pattern = "slits"', reader.raw(key))
        if reader.has("freeform"):
            raise reader.error("freeform", 'a free-form region needs pattern = "slits" '
                               "(its period is the unit cell; the slits are the start "
                               "pattern unless a density is given)", reader.raw("freeform"))
        reader.finish()
        return MembraneParams(material, thickness, "none", None, wavelength_m=ctx.wavelength_m)
    # defaults: one slit of half the period, period = wavelength (a start, no source)
    period = reader.length("period_nm", round(ctx.wavelength_m * 1e9) * 1e-9, minimum=0.0,
                           exclusive_minimum=True)
    widths = _float_list(reader, "slit_widths_nm", [period * 0.5e9])
    n = len(widths)
    centers = _float_list(reader, "slit_centers_nm",
                          [(j + 0.5) * period * 1e9 / n for j in range(n)])
    if len(centers) != n:
        raise reader.error("slit_centers_nm", f"needs one centre per slit ({n} widths given)",
                           reader.raw("slit_centers_nm"))
    p = _make(material, thickness, period, [w * 1e-9 for w in widths],
              [c * 1e-9 for c in centers], ctx.wavelength_m)
    problem = _pattern_problem(p)
    if problem:
        key, msg = problem
        raise reader.error(key, msg, reader.raw(key, None))
    region = freeform_region.parse_freeform(reader, ctx, material, x_limits=(0.0, period),
                                            z_default=(0.0, thickness))
    reader.finish()
    return dataclasses.replace(p, freeform=region) if region is not None else p


def _make(material, thickness, period, widths, centers, wavelength):
    order = sorted(range(len(widths)), key=lambda j: centers[j])
    return MembraneParams(material, thickness, "slits", period,
                          tuple(widths[j] for j in order), tuple(centers[j] for j in order),
                          wavelength)


def _bars(widths, centers, period):
    """(left, right) x of each bar: from the right edge of slit j to the left of j+1."""
    n = len(widths)
    bars = []
    for j in range(n):
        k = (j + 1) % n
        left = centers[j] + 0.5 * widths[j]
        right = centers[k] - 0.5 * widths[k] + (period if k <= j else 0.0)
        bars.append((left, right))
    return bars


def _pattern_problem(p: MembraneParams):
    P = p.period_m
    for j, (w, c) in enumerate(zip(p.slit_widths_m, p.slit_centers_m)):
        if not w > 0:
            return "slit_widths_nm", f"slit {j} width must be > 0"
        if not 0 <= c < P:
            return "slit_centers_nm", f"slit centres must lie in [0, period = {P * 1e9:.4g} nm)"
    if sum(p.slit_widths_m) >= P:
        return "slit_widths_nm", "the slits fill the whole period (no bars left)"
    for left, right in _bars(p.slit_widths_m, p.slit_centers_m, P):
        if right - left <= 0:
            return "slit_centers_nm", (f"slits overlap near x = {left * 1e9:.4g} nm "
                                       "(centres and widths leave no bar between them)")
    return None


def to_table(p: MembraneParams) -> dict:
    t = {"family": NAME, "material": p.material.spec, "thickness_nm": p.thickness_m * 1e9,
         "pattern": p.pattern}
    if p.pattern == "slits":
        t["period_nm"] = p.period_m * 1e9
        t["slit_widths_nm"] = [w * 1e9 for w in p.slit_widths_m]
        t["slit_centers_nm"] = [c * 1e9 for c in p.slit_centers_m]
    if p.freeform is not None:
        t["freeform"] = freeform_region.to_table(p.freeform)
    return t


# ------------------------------------------------------------------------ variables
def _spec_values(p: MembraneParams) -> dict[str, float]:
    v = {"thickness_nm": p.thickness_m * 1e9}
    for j, (w, c) in enumerate(zip(p.slit_widths_m, p.slit_centers_m)):
        v[f"slit_widths_nm.{j}"] = w * 1e9
        v[f"slit_centers_nm.{j}"] = c * 1e9
    return v


def variables(p: MembraneParams) -> dict[str, tuple[float, float, float]]:
    """Continuous parameters (spec units): thickness, each slit's width and centre.

    List entries are keyed ``slit_widths_nm.J`` / ``slit_centers_nm.J`` (J = index in
    centre order).  Bounds keep neighbouring slits apart with the others held; the
    period is the Bloch cell and not a variable.
    """
    lam_nm = p.wavelength_m * 1e9
    out = {"thickness_nm": (p.thickness_m * 1e9, 0.005 * lam_nm, 2.0 * lam_nm)}
    n = len(p.slit_widths_m)
    if n:
        P = p.period_m * 1e9
        w = [x * 1e9 for x in p.slit_widths_m]
        c = [x * 1e9 for x in p.slit_centers_m]
        bars = [(a * 1e9, b * 1e9) for a, b in _bars(p.slit_widths_m, p.slit_centers_m,
                                                     p.period_m)]
        for j in range(n):
            # room to the neighbours' edges (bar j is right of slit j, bar j-1 left of it)
            room_right = bars[j][1] - bars[j][0]
            room_left = bars[j - 1][1] - bars[j - 1][0]
            w_hi = w[j] + 2.0 * min(room_left, room_right) * 0.99
            out[f"slit_widths_nm.{j}"] = (w[j], 0.01 * P, min(w_hi, 0.99 * P))
            if n == 1:
                c_lo, c_hi = 0.0, P
            else:
                c_lo = c[j] - 0.99 * room_left
                c_hi = c[j] + 0.99 * room_right
            out[f"slit_centers_nm.{j}"] = (c[j], c_lo, c_hi)
    return {k: (v, min(lo, v), max(hi, v)) for k, (v, lo, hi) in out.items()}


def replace(p: MembraneParams, values: dict[str, float]) -> MembraneParams:
    base.check_values(values, _spec_values(p), NAME)
    v = {**_spec_values(p), **{k: float(x) for k, x in values.items()}}
    if not v["thickness_nm"] > 0:
        raise ValueError("membrane: thickness must be > 0")
    if p.pattern == "none":
        return dataclasses.replace(p, thickness_m=v["thickness_nm"] * 1e-9)
    n = len(p.slit_widths_m)
    q = _make(p.material, v["thickness_nm"] * 1e-9, p.period_m,
              [v[f"slit_widths_nm.{j}"] * 1e-9 for j in range(n)],
              [(v[f"slit_centers_nm.{j}"] * 1e-9) % p.period_m for j in range(n)],
              p.wavelength_m)
    problem = _pattern_problem(q)
    if problem:
        raise ValueError(f"membrane: {problem[1]}")
    return dataclasses.replace(q, freeform=p.freeform)


# ------------------------------------------------------------------------ geometry
def _period(p: MembraneParams, dx: float | None = None) -> float:
    if p.pattern == "slits":
        return p.period_m
    return _PLAIN_CELLS * dx


def _scene(p: MembraneParams, v: dict, period: float) -> Scene:
    t = v["thickness_nm"] * 1e-9
    eps = (1.0 + 0j, p.material.eps)
    if p.pattern == "none":
        segs = (Segment(-period, 0.0, 2 * period, 0.0, periodic=False),
                Segment(-period, t, 2 * period, t, periodic=False))
        return Scene(eps, (Slab(1, 0.0, t),), segs)
    n = len(p.slit_widths_m)
    w = [v[f"slit_widths_nm.{j}"] * 1e-9 for j in range(n)]
    c = [v[f"slit_centers_nm.{j}"] * 1e-9 for j in range(n)]
    pieces, segs = [], []
    for left, right in _bars(w, c, period):
        pieces.append(Trapezoid(1, 0.0, t, left, left, right, right))
        segs += [Segment(left, 0.0, left, t), Segment(right, 0.0, right, t),
                 Segment(left, 0.0, right, 0.0), Segment(left, t, right, t)]
    return Scene(eps, tuple(pieces), tuple(segs))


def laser_angle(p: MembraneParams, ctx: SampleContext) -> float:
    if ctx.angle_rad is None:
        raise SpecError(ctx.source, "laser.angle_deg",
                        "no phase-matched angle exists for an electron crossing a membrane "
                        f"in vacuum (it would need cos(angle) = 1/beta = {1 / ctx.beta:.4g} "
                        "> 1); give the angle in degrees", "phase-matched")
    return ctx.angle_rad


def _electron_x(p: MembraneParams, ctx: SampleContext) -> float:
    return base.path_number(ctx, "x_nm", 0.0)


def layout(p: MembraneParams, ctx: SampleContext, grid_step_m: float) -> SimulationLayout:
    """z: PML, margin, path room, film, path room, margin, PML; x: one Bloch period."""
    if p.pattern == "slits":
        nx = base.cells_per_period(p.period_m, grid_step_m)
        dx = p.period_m / nx
    else:
        nx, dx = _PLAIN_CELLS, grid_step_m
    period = nx * dx
    n_pml = base.pml_cells(ctx.wavelength_m, dx)
    margin = base.margin_m(ctx.wavelength_m)
    room = 3.0 * base.decay_length(ctx)
    t = p.thickness_m
    z0, nz = base.z_grid(-room - margin, t + room + margin, dx, n_pml)
    grid = Grid(nx=nx, nz=nz, dx=dx, dz=dx, x0=0.0, z0=z0)
    scene = _scene(p, _spec_values(p), period)
    mask = base.strip_pml(cell_material(scene, grid, period), n_pml)
    x_e = _electron_x(p, ctx) % period
    path = PathGeometry("z", x_m=x_e, z_below_m=-room, z_above_m=t + room,
                        eps_below=1.0 + 0j, eps_above=1.0 + 0j)
    out = SimulationLayout(
        grid=grid, pml_cells_z=n_pml, pml_cells_x=0, period_m=period, eps_incidence=1.0 + 0j,
        from_side=ctx.from_side, z_source_m=base.source_plane(grid, n_pml, ctx.from_side),
        angle_rad=laser_angle(p, ctx), material_mask=mask, path=path, grid_step_m=dx,
        structure_z_m=(0.0, t), wavelength_m=ctx.wavelength_m)
    if p.freeform is None:
        return out
    lo, hi = p.freeform.z_m
    if lo < -room or hi > t + room:
        raise SpecError(ctx.source, "sample.freeform.z_nm",
                        f"the free-form region must lie within the physical region "
                        f"z = {-room * 1e9:.4g} .. {(t + room) * 1e9:.4g} nm",
                        [lo * 1e9, hi * 1e9])
    rho = freeform_density(p, out)
    return dataclasses.replace(out, material_mask=freeform_region.solid_mask(
        p.freeform, out, mask, rho))


def _family_fill(p: MembraneParams, layout: SimulationLayout):
    def fill():
        f = fill_fractions(_scene(p, _spec_values(p), layout.period_m), layout.grid,
                           layout.period_m, "cell")
        return np.sum(np.asarray(f), axis=0)
    return fill


def freeform_start(p: MembraneParams, layout: SimulationLayout) -> np.ndarray:
    """The spec's free-form density on the region cells (see designer.families.region)."""
    return freeform_region.start_density(p.freeform, layout, _family_fill(p, layout))


def freeform_density(p: MembraneParams, layout: SimulationLayout) -> np.ndarray:
    """The free-form pattern that is evaluated: the spec's density binarized at 0.5."""
    return freeform_region.physical_density(p.freeform, layout, _family_fill(p, layout))


def permittivity(p: MembraneParams, layout: SimulationLayout, values: dict | None = None,
                 density=None):
    """(eps_x, eps_z) on the Yee points, JAX-traceable in ``values`` (spec units) and
    in ``density`` (the projected density of a ``[sample.freeform]`` region; default:
    the spec's density binarized), as for the grating family.

    Farjadpour et al., Opt. Lett. 31, 2972, 2006 (see designer.families.raster).
    """
    v = _spec_values(p)
    if values:
        base.check_values(values, v, NAME)
        v.update(values)
    eps_x, eps_z = rasterize(_scene(p, v, layout.period_m), layout.grid, layout.period_m)
    if p.freeform is None:
        if density is not None:
            raise ValueError("membrane: a density needs a [sample.freeform] region")
        return eps_x, eps_z
    if density is None:
        density = freeform_density(p, layout)
    return freeform_region.place(p.freeform, eps_x, eps_z, density, layout)


def layer_stack(p: MembraneParams, ctx: SampleContext) -> LayerStack | None:
    """Vacuum / film / vacuum for an unpatterned membrane (film bottom at z = 0)."""
    if p.pattern != "none":
        return None
    return LayerStack(1.0 + 0j, 1.0 + 0j, ((p.thickness_m, p.material.eps),), 0.0)


def polygons(p: MembraneParams, ctx: SampleContext, layout: SimulationLayout) -> list[Polygon]:
    g = layout.grid
    P = layout.period_m
    wide = max(3 * P, ctx.wavelength_m)
    span_x = (g.x0 - wide, g.x0 + P + wide)
    span_z = (g.z0 - P, g.z0 + g.size_z + P)
    out = [Polygon(verts, p.material.name, p.material.eps)
           for verts, _ in scene_polygons(_scene(p, _spec_values(p), P), P, span_x, span_z,
                                          (g.x0, g.x0 + P))]
    if p.freeform is not None:
        out = freeform_region.polygons(p.freeform, layout, out, freeform_density(p, layout))
    return out


def check_path(p: MembraneParams, ctx: SampleContext) -> None:
    """An electron crossing a membrane may pass through material: nothing to check."""
    return None


def features(p: MembraneParams) -> list[Feature]:
    """Film thickness, slit widths, bar widths and the etch depth through the film."""
    t = p.thickness_m
    out = [Feature("layer", t, (0.0, 0.5 * t), "membrane thickness")]
    if p.pattern != "slits":
        return out
    lateral = []
    for j, (w, c) in enumerate(zip(p.slit_widths_m, p.slit_centers_m)):
        out.append(Feature("gap", w, (c, 0.5 * t), f"slit {j} width"))
        lateral.append(w)
    for j, (left, right) in enumerate(_bars(p.slit_widths_m, p.slit_centers_m, p.period_m)):
        out.append(Feature("solid", right - left, ((0.5 * (left + right)) % p.period_m, 0.5 * t),
                           f"bar {j} width (between slits {j} and {(j + 1) % len(lateral)})"))
        lateral.append(right - left)
    out.append(Feature("height", t, (p.slit_centers_m[0], 0.5 * t), "etch depth through the film",
                       lateral_m=min(lateral)))
    return out


def draw(ax, p: MembraneParams, ctx: SampleContext, layout: SimulationLayout, **options):
    """Picture of the sample; ``options`` go to :func:`designer.drawing.draw_sample`."""
    from designer import drawing

    what = "unpatterned membrane" if p.pattern == "none" else \
        f"membrane with {len(p.slit_widths_m)} slit(s) per {p.period_m * 1e9:.4g} nm"
    periods = 3 if p.pattern == "slits" else 1
    return drawing.draw_sample(ax, polygons(p, ctx, layout), layout,
                               title=f"{what}, {p.thickness_m * 1e9:.4g} nm thick",
                               **{"periods": periods, **options})
