"""Tooth gratings along the electron path: single-sided, or two facing gratings.

Geometry (one period ``P`` along x, cell ``0 <= x < P``):

* lower grating: teeth stand on the plane z = 0 and reach z = h; tooth centred at
  x = P/2; width at mid-height ``duty_cycle * P``; the sidewall angle ``alpha``
  (positive: wider at the base, as etched) gives base width ``dP + h tan(alpha)`` and
  top width ``dP - h tan(alpha)``, so the tooth area is ``d P h`` at any angle;
* under the teeth either a semi-infinite substrate of the same material (z < 0) or,
  free-standing, a base layer of thickness ``base_thickness`` (0 = bare teeth);
* ``sides = 2``: a mirror-image grating above a vacuum channel of width ``gap``
  between the tooth tops (its tooth tips at z = h + gap, its teeth shifted by
  ``shift`` along +x), with its own substrate/base above.

The electron moves along +x at ``z = h + offset`` (one side) or at the channel centre
plus ``offset`` (two sides).  The default period is phase matched at normal
incidence, ``P = m beta lambda`` (synchronicity of the m-th spatial harmonic with the
electron: 2 pi m / P = omega / v; e.g. R. J. England et al., Rev. Mod. Phys. 86, 1337,
2014, sec. on dielectric laser acceleration — value from memory).  A phase-matched
angle for any other period: ``n_inc k sin(theta) + 2 pi m / P = omega / v``.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import jax.numpy as jnp
import numpy as np

from designer.errors import SpecError
from designer.families import base
from designer.families import region as freeform_region
from designer.families.base import (
    Feature,
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
    Trapezoid,
    cell_material,
    fill_fractions,
    rasterize,
    scene_polygons,
)
from designer.tables import TableReader
from solvers.grid import Grid

NAME = "grating"
_MAX_SIDEWALL_DEG = 30.0


@dataclass(frozen=True)
class GratingParams:
    """A tooth grating (SI units; angles in rad).  See the module docstring."""

    material: MaterialRef
    sides: int
    order: int
    period_m: float
    period_phase_matched: bool
    duty_cycle: float
    tooth_height_m: float
    sidewall_angle_rad: float
    substrate: bool
    base_thickness_m: float
    gap_m: float | None
    shift_m: float
    wavelength_m: float          # laser wavelength the material was evaluated at
    freeform: freeform_region.FreeformRegion | None = None   # [sample.freeform]
    plane: freeform_region.PlaneInfo = freeform_region.PlaneInfo()   # [sample] plane


# ------------------------------------------------------------------------ parsing
def parse(reader: TableReader, ctx: SampleContext) -> GratingParams:
    """Read the ``[sample]`` table of a grating (``family`` already read by the caller)."""
    reader.raw("family", NAME)
    plane = freeform_region.parse_plane(reader, NAME)
    material = base.resolve(reader, "material", reader.raw("material"), ctx)
    sides = reader.number("sides", 1, integer=True, minimum=1, maximum=2)
    order = reader.number("order", 1, integer=True, minimum=1)
    period = reader.number_or_word("period_nm", ["phase-matched"], "phase-matched",
                                   minimum=0.0, exclusive_minimum=True)
    matched = period == "phase-matched"
    period_m = order * ctx.beta * ctx.wavelength_m if matched else period * 1e-9
    duty = reader.number("duty_cycle", 0.5, minimum=0.0, maximum=1.0,
                         exclusive_minimum=True, exclusive_maximum=True)
    # default height P/2: a start, common practice, no source
    height = reader.length("tooth_height_nm", round(period_m * 0.5e9) * 1e-9,
                           minimum=0.0, exclusive_minimum=True)
    angle = math.radians(reader.number("sidewall_angle_deg", 0.0, minimum=-_MAX_SIDEWALL_DEG,
                                       maximum=_MAX_SIDEWALL_DEG))
    substrate = reader.boolean("substrate", True)
    if substrate and reader.has("base_thickness_nm"):
        raise reader.error("base_thickness_nm", "only for a free-standing grating "
                           "(substrate = false)", reader.raw("base_thickness_nm"))
    base_t = reader.length("base_thickness_nm", 0.0, minimum=0.0)
    gap = shift = None
    if sides == 2:
        gap = reader.length("gap_nm", round(ctx.wavelength_m * 0.5e9) * 1e-9,
                            minimum=0.0, exclusive_minimum=True)
        shift = reader.length("shift_nm", 0.0)
    else:
        for key in ("gap_nm", "shift_nm"):
            if reader.has(key):
                raise reader.error(key, "only for sides = 2", reader.raw(key))
    p = GratingParams(material=material, sides=sides, order=order, period_m=period_m,
                      period_phase_matched=matched, duty_cycle=duty, tooth_height_m=height,
                      sidewall_angle_rad=angle, substrate=substrate,
                      base_thickness_m=base_t, gap_m=gap, shift_m=shift or 0.0,
                      wavelength_m=ctx.wavelength_m, plane=plane)
    problem = _geometry_problem(p)
    if problem:
        key, msg = problem
        raise reader.error(key, msg, reader.raw(key, None))
    region = freeform_region.parse_freeform(
        reader, ctx, material, x_limits=(0.0, period_m), z_default=(0.0, height),
        plane=plane.plane, mirror_z_m=(2 * height + gap) if sides == 2 else None,
        shift_m=shift or 0.0)
    reader.finish()
    return dataclasses.replace(p, freeform=region) if region is not None else p


def _widths(p: GratingParams) -> tuple[float, float]:
    """(top width, base width) of a tooth (m)."""
    mid = p.duty_cycle * p.period_m
    taper = p.tooth_height_m * math.tan(p.sidewall_angle_rad)
    return mid - taper, mid + taper


def _geometry_problem(p: GratingParams) -> tuple[str, str] | None:
    top, bottom = _widths(p)
    if top <= 0:
        return ("sidewall_angle_deg", f"tooth top width would be {top * 1e9:.4g} nm "
                "(the tapered tooth closes before its full height)")
    if bottom >= p.period_m:
        return ("sidewall_angle_deg", f"tooth base width {bottom * 1e9:.4g} nm would "
                f"reach the period {p.period_m * 1e9:.4g} nm (neighbouring teeth merge)")
    return None


def to_table(p: GratingParams) -> dict:
    """Back to ``[sample]`` spec keys (spec units)."""
    t = {"family": NAME, "material": p.material.spec, "sides": p.sides, "order": p.order,
         "period_nm": "phase-matched" if p.period_phase_matched else p.period_m * 1e9,
         "duty_cycle": p.duty_cycle, "tooth_height_nm": p.tooth_height_m * 1e9,
         "sidewall_angle_deg": math.degrees(p.sidewall_angle_rad), "substrate": p.substrate}
    if not p.substrate:
        t["base_thickness_nm"] = p.base_thickness_m * 1e9
    if p.sides == 2:
        t["gap_nm"] = p.gap_m * 1e9
        t["shift_nm"] = p.shift_m * 1e9
    if p.plane.plane == "wafer":
        t["plane"] = "wafer"
        t["device_layer_nm"] = p.plane.device_layer_m * 1e9
    if p.freeform is not None:
        t["freeform"] = freeform_region.to_table(p.freeform)
    return t


# ------------------------------------------------------------------------ variables
def _has_base_layer(p: GratingParams) -> bool:
    return (not p.substrate) and p.base_thickness_m > 0


def _spec_values(p: GratingParams) -> dict[str, float]:
    v = {"duty_cycle": p.duty_cycle, "tooth_height_nm": p.tooth_height_m * 1e9,
         "sidewall_angle_deg": math.degrees(p.sidewall_angle_rad)}
    if p.sides == 2:
        v["gap_nm"] = p.gap_m * 1e9
        v["shift_nm"] = p.shift_m * 1e9
    if _has_base_layer(p):
        v["base_thickness_nm"] = p.base_thickness_m * 1e9
    return v


def variables(p: GratingParams) -> dict[str, tuple[float, float, float]]:
    """Continuous parameters ``key -> (value, lo, hi)`` in spec units.

    Bounds keep the geometry valid with the other parameters held (top width > 0,
    base width < period) and span 1 % to 200 % of the wavelength for lengths.  The
    period is not a variable: it fixes the Bloch cell (re-run ``layout`` to change it).
    """
    P = p.period_m
    lam_nm = p.wavelength_m * 1e9
    tan_a = abs(math.tan(p.sidewall_angle_rad))
    h = p.tooth_height_m
    d = p.duty_cycle
    taper = h * tan_a / P
    out = {}
    out["duty_cycle"] = (d, max(0.02, taper + 0.01), min(0.98, 1.0 - taper - 0.01))
    h_hi = 2.0 * lam_nm
    if tan_a > 0:
        h_hi = min(h_hi, 0.99 * min(d, 1.0 - d) * P / tan_a * 1e9)
    out["tooth_height_nm"] = (h * 1e9, 0.01 * lam_nm, h_hi)
    a_lim = min(_MAX_SIDEWALL_DEG, math.degrees(math.atan(0.99 * min(d, 1.0 - d) * P / h)))
    out["sidewall_angle_deg"] = (math.degrees(p.sidewall_angle_rad), -a_lim, a_lim)
    if p.sides == 2:
        out["gap_nm"] = (p.gap_m * 1e9, 0.01 * lam_nm, 2.0 * lam_nm)
        out["shift_nm"] = (p.shift_m * 1e9, -0.5 * P * 1e9, 0.5 * P * 1e9)
    if _has_base_layer(p):
        out["base_thickness_nm"] = (p.base_thickness_m * 1e9, 0.01 * lam_nm, 2.0 * lam_nm)
    # a start outside the default box widens the box rather than being refused
    return {k: (v, min(lo, v), max(hi, v)) for k, (v, lo, hi) in out.items()}


def replace(p: GratingParams, values: dict[str, float]) -> GratingParams:
    """New parameters with some continuous values replaced (spec units)."""
    base.check_values(values, _spec_values(p), NAME)
    v = {**_spec_values(p), **{k: float(x) for k, x in values.items()}}
    q = dataclasses.replace(
        p, duty_cycle=v["duty_cycle"], tooth_height_m=v["tooth_height_nm"] * 1e-9,
        sidewall_angle_rad=math.radians(v["sidewall_angle_deg"]),
        gap_m=v["gap_nm"] * 1e-9 if p.sides == 2 else None,
        shift_m=v.get("shift_nm", 0.0) * 1e-9,
        base_thickness_m=v.get("base_thickness_nm", p.base_thickness_m * 1e9) * 1e-9)
    if not 0 < q.duty_cycle < 1 or q.tooth_height_m <= 0 or (q.sides == 2 and q.gap_m <= 0):
        raise ValueError(f"grating: invalid values {values}")
    problem = _geometry_problem(q)
    if problem:
        raise ValueError(f"grating: {problem[1]}")
    return q


# ------------------------------------------------------------------------ geometry
def _scene(p: GratingParams, v: dict) -> Scene:
    """Pieces and interfaces from spec-unit values ``v`` (floats or JAX scalars)."""
    P = p.period_m
    d = v["duty_cycle"]
    h = v["tooth_height_nm"] * 1e-9
    tan_a = jnp.tan(jnp.deg2rad(v["sidewall_angle_deg"]))
    mid = d * P
    half_top = 0.5 * (mid - h * tan_a)
    half_bot = 0.5 * (mid + h * tan_a)
    b = v.get("base_thickness_nm", 0.0) * 1e-9
    pieces, segs = [], []
    xc = 0.5 * P

    def side(z_root, direction, xc):
        """Teeth rooted at z_root growing in ``direction`` (+1 up, -1 down) + backing."""
        z_tip = z_root + direction * h
        lo_z, hi_z = (z_root, z_tip) if direction > 0 else (z_tip, z_root)
        w_lo, w_hi = (half_bot, half_top) if direction > 0 else (half_top, half_bot)
        pieces.append(Trapezoid(1, lo_z, hi_z, xc - w_lo, xc - w_hi, xc + w_lo, xc + w_hi))
        segs.append(Segment(xc - half_bot, z_root, xc - half_top, z_tip))
        segs.append(Segment(xc + half_bot, z_root, xc + half_top, z_tip))
        segs.append(Segment(xc - half_top, z_tip, xc + half_top, z_tip))
        if p.substrate or _has_base_layer(p):
            far = -direction * (BIG if p.substrate else b)
            z_far = z_root + far
            lo, hi = (z_far, z_root) if direction > 0 else (z_root, z_far)
            pieces.append(Slab(1, lo, hi))
            # the floor between teeth; the seam under a tooth is not an interface
            segs.append(Segment(xc + half_bot, z_root, xc - half_bot + P, z_root))
            if not p.substrate:
                segs.append(Segment(-P, z_far, 2 * P, z_far, periodic=False))
        else:
            segs.append(Segment(xc - half_bot, z_root, xc + half_bot, z_root))

    side(0.0, +1, xc)
    if p.sides == 2:
        g = v["gap_nm"] * 1e-9
        s = v["shift_nm"] * 1e-9
        side(2 * h + g, -1, xc + s)
    return Scene((1.0 + 0j, p.material.eps), tuple(pieces), tuple(segs))


def _structure_z(p: GratingParams) -> tuple[float, float]:
    h = p.tooth_height_m
    b = p.base_thickness_m if _has_base_layer(p) else 0.0
    top = h if p.sides == 1 else 2 * h + p.gap_m
    return -b, top + (b if p.sides == 2 else 0.0)


def _electron_z(p: GratingParams, ctx: SampleContext) -> float:
    if p.sides == 1:
        # default: half a decay length above the tooth tops (a start, no source)
        offset = base.path_number(ctx, "offset_nm", 0.5 * base.decay_length(ctx))
        return p.tooth_height_m + offset
    offset = base.path_number(ctx, "offset_nm", 0.0)
    return p.tooth_height_m + 0.5 * p.gap_m + offset


def _eps_incidence(p: GratingParams, from_side: str) -> complex:
    if from_side == "below":
        return p.material.eps if p.substrate else 1.0 + 0j
    return p.material.eps if (p.sides == 2 and p.substrate) else 1.0 + 0j


def laser_angle(p: GratingParams, ctx: SampleContext) -> float:
    """Incidence angle (rad) from the z axis in the incidence medium.

    Phase matched when asked: ``sin(theta) = (1/beta - m lambda / P) / n_inc``, which
    is 0 for the default period ``P = m beta lambda``.
    """
    if ctx.angle_rad is not None:
        return ctx.angle_rad
    n_inc = complex(_eps_incidence(p, ctx.from_side)) ** 0.5
    s = (1.0 / ctx.beta - p.order * ctx.wavelength_m / p.period_m) / n_inc.real
    return base.angle_from_incidence(s, ctx, f"the period {p.period_m * 1e9:.4g} nm")


def layout(p: GratingParams, ctx: SampleContext, grid_step_m: float) -> SimulationLayout:
    """Bloch cell of one period; z: PML, margin, structure, path room, margin, PML."""
    P = p.period_m
    nx = base.cells_per_period(P, grid_step_m)
    dx = P / nx
    n_pml = base.pml_cells(ctx.wavelength_m, dx)
    margin = base.margin_m(ctx.wavelength_m)
    z_bot, z_top = _structure_z(p)
    z_e = _electron_z(p, ctx)
    hi = z_top + margin
    if p.sides == 1:
        hi = max(z_top, z_e) + 3.0 * base.decay_length(ctx) + margin
    z0, nz = base.z_grid(z_bot - margin, hi, dx, n_pml)
    grid = Grid(nx=nx, nz=nz, dx=dx, dz=dx, x0=0.0, z0=z0)
    scene = _scene(p, _spec_values(p))
    mask = base.strip_pml(cell_material(scene, grid, P), n_pml)
    path = PathGeometry("x", z_m=z_e, length_m=base.path_length(ctx))
    out = SimulationLayout(
        grid=grid, pml_cells_z=n_pml, pml_cells_x=0, period_m=P,
        eps_incidence=_eps_incidence(p, ctx.from_side), from_side=ctx.from_side,
        z_source_m=base.source_plane(grid, n_pml, ctx.from_side),
        angle_rad=laser_angle(p, ctx), material_mask=mask, path=path, grid_step_m=dx,
        structure_z_m=(z_bot, z_top), wavelength_m=ctx.wavelength_m)
    if p.freeform is None:
        return out
    rho = freeform_density(p, out)
    return dataclasses.replace(out, material_mask=freeform_region.solid_mask(
        p.freeform, out, mask, rho))


def _family_fill(p: GratingParams, layout: SimulationLayout):
    def fill():
        f = fill_fractions(_scene(p, _spec_values(p)), layout.grid, layout.period_m, "cell")
        return np.sum(np.asarray(f), axis=0)
    return fill


def freeform_start(p: GratingParams, layout: SimulationLayout) -> np.ndarray:
    """The spec's free-form density on the region cells (see designer.families.region)."""
    return freeform_region.start_density(p.freeform, layout, _family_fill(p, layout))


def freeform_density(p: GratingParams, layout: SimulationLayout) -> np.ndarray:
    """The free-form pattern that is evaluated: the spec's density binarized at 0.5."""
    return freeform_region.physical_density(p.freeform, layout, _family_fill(p, layout))


def permittivity(p: GratingParams, layout: SimulationLayout, values: dict | None = None,
                 density=None):
    """(eps_x, eps_z) on the Yee points, JAX-traceable in ``values`` (spec units) and
    in ``density``.

    Exact fill fractions and anisotropic averaging (designer.families.raster;
    Farjadpour et al., Opt. Lett. 31, 2972, 2006).  With a ``[sample.freeform]`` region
    its cells are replaced by the projected density ``density`` (region cells, values in
    [0, 1]; default: the spec's density binarized, :func:`freeform_density`) through
    designer.freeform.place_eps.
    """
    v = _spec_values(p)
    if values:
        base.check_values(values, v, NAME)
        v.update(values)
    eps_x, eps_z = rasterize(_scene(p, v), layout.grid, layout.period_m)
    if p.freeform is None:
        if density is not None:
            raise ValueError("grating: a density needs a [sample.freeform] region")
        return eps_x, eps_z
    if density is None:
        density = freeform_density(p, layout)
    return freeform_region.place(p.freeform, eps_x, eps_z, density, layout)


def layer_stack(p: GratingParams, ctx: SampleContext):
    """A grating is not a layer stack."""
    return None


def polygons(p: GratingParams, ctx: SampleContext, layout: SimulationLayout) -> list[Polygon]:
    """One period of the cross-section; substrates extend past the grid."""
    g = layout.grid
    P = p.period_m
    span_x = (g.x0 - P, g.x0 + 2 * P)
    span_z = (g.z0 - P, g.z0 + g.size_z + P)
    out = []
    for verts, m in scene_polygons(_scene(p, _spec_values(p)), P, span_x, span_z,
                                   (g.x0, g.x0 + P)):
        out.append(Polygon(verts, p.material.name, p.material.eps))
    if p.freeform is not None:
        out = freeform_region.polygons(p.freeform, layout, out, freeform_density(p, layout))
    return out


def check_path(p: GratingParams, ctx: SampleContext) -> None:
    """SpecError (key path.offset_nm) if the electron would pass through material."""
    z_e = _electron_z(p, ctx)
    h = p.tooth_height_m
    if p.freeform is not None:
        freeform_region.check_path_clear(p.freeform, z_e, ctx)
    if p.sides == 1:
        if z_e <= h:
            raise SpecError(ctx.source, "path.offset_nm",
                            f"the electron at z = {z_e * 1e9:.4g} nm would run through the "
                            f"teeth (tooth tops at z = {h * 1e9:.4g} nm); the offset is the "
                            "height above the tooth tops and must be > 0",
                            ctx.path.get("offset_nm"))
        return
    half = 0.5 * p.gap_m
    off = base.path_number(ctx, "offset_nm", 0.0)   # from the channel centre
    if abs(off) >= half:
        which = "upper" if off > 0 else "lower"
        raise SpecError(ctx.source, "path.offset_nm",
                        f"the electron at z = {z_e * 1e9:.4g} nm would hit the {which} "
                        f"grating's teeth: the channel spans z = {h * 1e9:.4g} to "
                        f"{(h + p.gap_m) * 1e9:.4g} nm, so |offset| must be < "
                        f"{half * 1e9:.4g} nm (offset is from the channel centre)",
                        ctx.path.get("offset_nm"))


def features(p: GratingParams) -> list[Feature]:
    """Every size the design-rule check needs: teeth, gaps, channel, base, heights."""
    P = p.period_m
    h = p.tooth_height_m
    top, bottom = _widths(p)
    solid, gap = min(top, bottom), P - max(top, bottom)
    z_solid = h if top < bottom else 0.0
    out = []
    roots = [(0.0, 1, 0.0, "lower")] if p.sides == 1 else \
        [(0.0, 1, 0.0, "lower"), (2 * h + p.gap_m, -1, p.shift_m, "upper")]
    for z_root, direction, s, name in roots:
        xc = 0.5 * P + s
        zs = z_root + direction * z_solid
        zg = z_root + direction * (h - z_solid)
        pre = f"{name} grating " if p.sides == 2 else ""
        out.append(Feature("solid", solid, (xc, zs), f"{pre}tooth width (narrowest)"))
        out.append(Feature("gap", gap, (xc + 0.5 * P, zg), f"{pre}gap between teeth (narrowest)"))
        out.append(Feature("height", h, (xc, z_root + direction * 0.5 * h),
                           f"{pre}tooth height", lateral_m=min(solid, gap)))
        if _has_base_layer(p):
            out.append(Feature("layer", p.base_thickness_m,
                               (xc, z_root - direction * 0.5 * p.base_thickness_m),
                               f"{pre}base layer thickness"))
    if p.sides == 2:
        out.append(Feature("gap", p.gap_m, (0.5 * P, h + 0.5 * p.gap_m), "channel gap"))
    if p.plane.plane == "wafer":
        return freeform_region.wafer_features(out, p.plane)
    return out


def draw(ax, p: GratingParams, ctx: SampleContext, layout: SimulationLayout, **options):
    """Picture of the sample (geometry, electron path, laser, scale bar, legend);
    ``options`` go to :func:`designer.drawing.draw_sample` (e.g. ``exact=True``)."""
    from designer import drawing

    title = (f"{'double' if p.sides == 2 else 'single'}-sided grating, period "
             f"{p.period_m * 1e9:.4g} nm")
    return drawing.draw_sample(ax, polygons(p, ctx, layout), layout, title=title,
                               **{"periods": 3, **options})
