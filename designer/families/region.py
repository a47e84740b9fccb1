"""A free-form density region inside a sample family: the ``[sample.freeform]`` table.

::

    [sample.freeform]
    x_nm = [0.0, 400.0]        # region in the unit cell (default: the whole period)
    z_nm = [0.0, 300.0]        # region height (default: the tooth layer / the film)
    material = "fused_silica"  # the solid (default: the family's material); void = vacuum
    density = 0.5              # a uniform density, or:
    density_file = "density.npy"   # one value per pixel, shape (nx, nz), values in [0, 1]
    pixel_nm = [10.0, 10.0]        # pitch of the stored pixels   (with density_file)
    origin_nm = [0.0, -5.0]        # lower-left corner of pixel [0, 0] (with density_file)
    etch_steps = 1                 # cross-section plane: stacked slabs, each one etch
    upper = "mirrored"             # two-sided gratings: the upper side's tooth layer too:
                                   # "independent" | "mirrored" | "shifted" (default: none)

The sample's plane (``[sample] plane``, :func:`parse_plane`) decides what a pattern
means.  In the cross-section plane (``"cross_section"``) the region's x is along the
chip surface and z is depth: a pattern can be made by lithography only if, in every one
of its ``etch_steps`` stacked slabs, each pixel column is solid or void all through
the slab (vertical sidewalls; one etch step per slab, multi-level lithography for
k > 1).  A design run therefore optimizes one density per column and slab, extruded
through the slab (designer.freeform.Parametrization).  In the wafer plane
(``"wafer"``) the simulated plane is the chip surface: the pattern is the top view of
structures etched through the device layer, any pixel pattern can be made by one
etch, and ``etch_steps`` does not apply.

A two-sided grating may take a second region over its upper tooth layer (``upper``):
its own variables, or the lower region mirrored about the channel centre line
(``mirrored``), or mirrored and moved by the grating's ``shift_nm`` (``shifted``).
The pattern array then holds the lower region's rows followed by the upper
region's rows (each in increasing z).

Without ``density`` / ``density_file`` the region starts from the family's own pattern
there (the fill fraction of each cell by the family's pieces).

The design pixels are the FDFD cells whose centres lie in the region
(designer.freeform.region_cells).  What a spec *evaluates* is the density placed as
it is, binarized at 0.5 (``freeform.threshold_projection`` with ``beta = inf``, no
filter; a value of exactly 0.5 stays half way).  A design run stores its final pattern
already filtered and projected (0 or 1 per pixel), so ``velomatch evaluate DIR/design.toml`` places
exactly the pattern the optimizer evaluated last.

Grid step: a stored density belongs to the grid it was computed on (``pixel_nm``,
``origin_nm``).  On that grid it is placed pixel for pixel; on any other grid (the
error-estimate grids, a refined re-evaluation) every cell takes the value of the
stored pixel its centre falls in (nearest-neighbour resampling), so nothing is refused
but a resampled pattern is only as good as the coarser of the two grids.
"""

from __future__ import annotations

import dataclasses
import math
import pathlib
from dataclasses import dataclass

import numpy as np

from designer import freeform as ff
from designer.errors import SpecError
from designer.families.base import MaterialRef, Polygon, SampleContext, resolve
from designer.tables import TableReader


@dataclass(frozen=True, eq=False)
class FreeformRegion:
    """The validated ``[sample.freeform]`` table (SI).  ``density`` (nx, nz) with its
    ``pixel_m`` / ``origin_m`` when stored, else ``density_value`` (uniform) or neither
    (start from the family's own pattern)."""

    x_m: tuple[float, float]
    z_m: tuple[float, float]
    material: MaterialRef
    density_value: float | None = None
    density: np.ndarray | None = None
    pixel_m: tuple[float, float] | None = None
    origin_m: tuple[float, float] | None = None
    density_file: str | None = None
    plane: str = "cross_section"
    etch_steps: int | None = 1            # None in the wafer plane (2D pixels)
    upper: str | None = None              # None | "independent" | "mirrored" | "shifted"
    mirror_z_m: float | None = None       # upper region: z' = mirror_z - z
    shift_m: float = 0.0                  # "shifted": x' = x + shift


PLANES = ("cross_section", "wafer")


@dataclass(frozen=True)
class PlaneInfo:
    """``[sample] plane`` and, in the wafer plane, ``device_layer_nm`` (SI)."""

    plane: str = "cross_section"
    device_layer_m: float | None = None


def parse_plane(sample: TableReader, family: str, *, allowed=PLANES) -> PlaneInfo:
    """Read ``plane`` (default ``"cross_section"``) and ``device_layer_nm`` (needed in,
    and only in, the wafer plane)."""
    plane = sample.string("plane", "cross_section", choices=PLANES)
    if plane not in allowed:
        raise sample.error("plane", f"the {family} family is modelled in the cross-section "
                           "plane only (in the wafer plane use a grating: rows of pillars "
                           "along the electron path)", plane)
    if plane == "wafer":
        if not sample.has("device_layer_nm"):
            raise sample.error("device_layer_nm", "needed with plane = \"wafer\": the "
                               "thickness of the layer the pattern is etched through",
                               with_value=False)
        t = sample.length("device_layer_nm", None, minimum=0.0, exclusive_minimum=True)
        return PlaneInfo("wafer", float(t))
    if sample.has("device_layer_nm"):
        raise sample.error("device_layer_nm", "only with plane = \"wafer\" (in the "
                           "cross-section plane the thickness is part of the profile)",
                           sample.raw("device_layer_nm"))
    return PlaneInfo()


def wafer_features(features, info: PlaneInfo):
    """A cross-section feature list read in the wafer plane: every size in the plane is
    lateral (a tooth's height is a pillar's length), and the one etch goes through the
    device layer, whose aspect ratio is its thickness over the narrowest lateral size."""
    from designer.fabrication import Feature

    out, lateral = [], []
    for f in features:
        if f.kind == "height":
            f = Feature("solid", f.size_m, f.location, f.description.replace(
                "tooth height", "pillar length across the path"))
        elif f.kind == "layer":      # a base layer is a spine of that width in the plane
            f = Feature("solid", f.size_m, f.location, f.description + " (spine width)")
        if f.kind in ("solid", "gap"):
            lateral.append(f.size_m)
        out.append(f)
    out.append(Feature("height", info.device_layer_m, (0.0, 0.0),
                       "etch through the device layer",
                       lateral_m=min(lateral) if lateral else None))
    return out


def plane_facts(info: PlaneInfo, ctx: SampleContext) -> dict:
    """What the plane means, for outputs: orientation, device layer, 2D assumption.

    The 2D model is invariant along y.  In the wafer plane y is the wafer normal, so the
    model takes the etched device layer as infinitely thick; the synchronous field
    decays away from the structure over ``1/kappa = beta gamma lambda / (2 pi)`` (the
    decay length of the evanescent harmonic; R. J. England et al., Rev. Mod. Phys. 86,
    1337, 2014), so the assumption holds when the layer is thick compared with it
    (and the laser spot is confined to the layer); a thin layer couples less than
    computed and its out-of-plane guiding is not modelled.
    """
    from designer.families.base import decay_length

    if info.plane != "wafer":
        return {"plane": "cross_section",
                "meaning": "x-z is the cross-section: z is the wafer normal, structures "
                           "are invariant along y (lines along y in the layout)"}
    decay = decay_length(ctx)
    ratio = info.device_layer_m / decay
    note = ("2D assumption: the device layer is taken as infinitely thick along the "
            f"wafer normal; it is {info.device_layer_m * 1e9:.4g} nm = {ratio:.3g} decay "
            f"lengths (beta gamma lambda / 2 pi = {decay * 1e9:.4g} nm)")
    if ratio < 3.0:
        note += ("; that is not thick compared with the decay length, so the true "
                 "coupling is lower than computed (out-of-plane leakage not modelled)")
    return {"plane": "wafer",
            "meaning": "x-z is the chip surface: the pattern is the top view, etched "
                       "through the device layer; the electron runs in the plane",
            "device_layer_m": info.device_layer_m, "decay_length_m": decay,
            "device_layer_over_decay_length": ratio, "assumption": note}


# ------------------------------------------------------------------------ parsing
def _pair(r: TableReader, name: str, default, scale: float = 1e-9, *, increasing=True,
          positive=False):
    value = r.raw(name, default)
    if value is None:
        return None
    if (not isinstance(value, (list, tuple)) or len(value) != 2
            or any(isinstance(v, bool) or not isinstance(v, (int, float))
                   or not math.isfinite(v) for v in value)):
        raise r.error(name, "must be a pair [a, b] of finite numbers", value)
    a, b = float(value[0]), float(value[1])
    if increasing and not a < b:
        raise r.error(name, "needs a < b", value)
    if positive and not (a > 0 and b > 0):
        raise r.error(name, "values must be > 0", value)
    return (a * scale, b * scale)


def parse_freeform(sample: TableReader, ctx: SampleContext, material: MaterialRef, *,
                   x_limits: tuple[float, float], z_default: tuple[float, float],
                   plane: str = "cross_section", mirror_z_m: float | None = None,
                   shift_m: float = 0.0) -> FreeformRegion | None:
    """Read ``[sample.freeform]`` (None when absent).  ``x_limits``: the unit cell along
    x; the region must lie inside it.  ``mirror_z_m``: where an upper region may go
    (two-sided structures; ``z' = mirror_z - z``), None when there is no upper side.
    Every bad value is a SpecError."""
    if not sample.has("freeform"):
        return None
    r = sample.subtable("freeform")
    x = _pair(r, "x_nm", [x_limits[0] * 1e9, x_limits[1] * 1e9])
    tol = 1e-9 * (x_limits[1] - x_limits[0])
    if x[0] < x_limits[0] - tol or x[1] > x_limits[1] + tol:
        raise r.error("x_nm", f"must lie within the unit cell [{x_limits[0] * 1e9:.6g}, "
                      f"{x_limits[1] * 1e9:.6g}] nm", r.raw("x_nm"))
    z = _pair(r, "z_nm", [z_default[0] * 1e9, z_default[1] * 1e9])
    mat = material
    if r.has("material"):
        mat = resolve(r, "material", r.raw("material"), ctx)
    if r.has("density") and r.has("density_file"):
        raise r.error("density_file", "give density (a number) or density_file, not both",
                      r.raw("density_file"))
    value = r.number("density", None, minimum=0.0, maximum=1.0)
    name = r.string("density_file", None)
    pixel = _pair(r, "pixel_nm", None, positive=True, increasing=False)
    origin = _pair(r, "origin_nm", None, increasing=False)
    density = None
    if name is not None:
        if pixel is None or origin is None:
            missing = "pixel_nm" if pixel is None else "origin_nm"
            raise r.error(missing, "needed with density_file (the grid the density was "
                          "computed on)", with_value=False)
        density = _load_density(r, name, ctx.base_dir)
    else:
        for key, v in (("pixel_nm", pixel), ("origin_nm", origin)):
            if v is not None:
                raise r.error(key, "only with density_file", r.raw(key))
    if plane == "wafer":
        if r.has("etch_steps"):
            raise r.error("etch_steps", "only in the cross-section plane: in the wafer "
                          "plane the pattern is the top view, made by one etch through "
                          "the device layer", r.raw("etch_steps"))
        steps = None
    else:
        steps = r.number("etch_steps", 1, integer=True, minimum=1, maximum=64)
    upper = r.string("upper", "none", choices=("none",) + ff.UPPER_MODES)
    upper = None if upper == "none" else upper
    if upper is not None:
        if mirror_z_m is None:
            raise r.error("upper", "only for two-sided structures (sides = 2)", upper)
        if not (z[1] < mirror_z_m - z[1]):
            raise r.error("z_nm", "with an upper region the region must stay below the "
                          f"channel centre (z < {0.5 * mirror_z_m * 1e9:.4g} nm)",
                          [v * 1e9 for v in z])
    r.finish()
    return FreeformRegion(x, z, mat, value, density, pixel, origin, name, plane, steps,
                          upper, mirror_z_m if upper else None, shift_m if upper else 0.0)


def _load_density(r: TableReader, name: str, base_dir) -> np.ndarray:
    import io

    from designer import io as vio

    path = pathlib.Path(name).expanduser()
    if not path.is_absolute() and base_dir is not None:
        path = pathlib.Path(base_dir) / path
    try:
        data = vio.read_input(path, limit=vio.MAX_ARRAY_BYTES)
    except ValueError as exc:
        raise r.error("density_file", f"{path}: {exc}", name) from None
    if not data.startswith(b"\x93NUMPY"):
        kind = "a text file" if _looks_like_text(data) else "not a NumPy array file"
        raise r.error("density_file", f"{path}: is {kind}; a density must be a .npy file "
                      "(numpy.save of a 2D array)", name)
    try:
        a = np.load(io.BytesIO(data), allow_pickle=False)
    except (OSError, ValueError, EOFError):
        raise r.error("density_file", f"{path}: damaged .npy file, or one holding Python "
                      "objects instead of numbers", name) from None
    if a.ndim != 2 or a.size == 0 or not np.issubdtype(a.dtype, np.number) \
            or np.iscomplexobj(a):
        raise r.error("density_file", f"must hold a 2D real array (nx, nz); got shape "
                      f"{a.shape}, dtype {a.dtype}", name)
    a = np.asarray(a, dtype=float)
    if not np.all(np.isfinite(a)) or a.min() < 0.0 or a.max() > 1.0:
        raise r.error("density_file", "densities must be finite and within [0, 1]", name)
    return a


def _looks_like_text(data: bytes) -> bool:
    try:
        data[:4096].decode("utf-8")
    except UnicodeDecodeError:
        return False
    return b"\x00" not in data[:4096]


def to_table(fr: FreeformRegion) -> dict:
    """Back to ``[sample.freeform]`` keys (spec units)."""
    t = {"x_nm": [fr.x_m[0] * 1e9, fr.x_m[1] * 1e9], "z_nm": [fr.z_m[0] * 1e9, fr.z_m[1] * 1e9],
         "material": fr.material.spec}
    if fr.density_file is not None:
        t["density_file"] = fr.density_file
        t["pixel_nm"] = [fr.pixel_m[0] * 1e9, fr.pixel_m[1] * 1e9]
        t["origin_nm"] = [fr.origin_m[0] * 1e9, fr.origin_m[1] * 1e9]
    elif fr.density_value is not None:
        t["density"] = fr.density_value
    if fr.plane != "wafer" and fr.etch_steps != 1:
        t["etch_steps"] = fr.etch_steps
    if fr.upper is not None:
        t["upper"] = fr.upper
    return t


def with_pattern(fr: FreeformRegion, rho: np.ndarray, layout, file_name: str,
                 base_dir=None) -> FreeformRegion:
    """The region holding ``rho`` (the region cells of ``layout``) as a stored density.

    The array is written to ``base_dir / file_name`` by the caller; ``base_dir`` only
    lets this function check the shape now.
    """
    cells = region_cells(fr, layout)
    rho = np.asarray(rho, dtype=float)
    if rho.shape != pattern_shape(fr, layout):
        raise ValueError(f"density shape {rho.shape} does not match the region's "
                         f"{pattern_shape(fr, layout)} cells")
    g = layout.grid
    return dataclasses.replace(fr, density_value=None, density=rho, pixel_m=(g.dx, g.dz),
                               origin_m=(g.x0 + cells.i0 * g.dx, g.z0 + cells.k0 * g.dz),
                               density_file=file_name)


# ------------------------------------------------------------------------ grid
def density_patch(fr: FreeformRegion, layout) -> ff.DensityPatch:
    g = layout.grid
    xc = g.x_centres()
    inside = (xc >= fr.x_m[0]) & (xc <= fr.x_m[1])
    periodic = layout.pml_cells_x == 0 and bool(inside.all())
    return ff.DensityPatch(fr.x_m[0], fr.x_m[1], fr.z_m[0], fr.z_m[1],
                           eps_solid=complex(fr.material.eps), eps_void=1.0 + 0j,
                           periodic_x=periodic)


def _rows(z_lo: float, z_hi: float, grid) -> tuple[int, int]:
    """Grid rows ``[k0, k1)`` that overlap ``[z_lo, z_hi]`` (rounded outward to cell
    edges, so no sliver of the family's pattern is left between region and edge)."""
    k0 = int(math.floor((z_lo - grid.z0) / grid.dz + 1e-6))
    k1 = int(math.ceil((z_hi - grid.z0) / grid.dz - 1e-6))
    return max(k0, 0), min(max(k1, k0 + 1), grid.nz)


def _all_parts(fr: FreeformRegion, layout) -> list[ff.RegionCells]:
    g = layout.grid
    xcells = ff.region_cells(density_patch(fr, layout), g)    # x: cell centres inside
    spans = [_rows(*fr.z_m, g)]
    if fr.upper is not None:
        spans.append(_rows(fr.mirror_z_m - fr.z_m[1], fr.mirror_z_m - fr.z_m[0], g))
        # the same number of rows on both sides (mirrored row for row), grown away
        # from the channel between them
        n = max(b - a for a, b in spans)
        spans = [(spans[0][1] - n, spans[0][1]), (spans[1][0], spans[1][0] + n)]
        if spans[0][0] < 0 or spans[1][1] > g.nz:
            raise ValueError("the free-form regions do not fit on the grid")
    return [ff.RegionCells(xcells.i0, xcells.i1, a, b, xcells.periodic_x) for a, b in spans]


def region_cells(fr: FreeformRegion, layout) -> ff.RegionCells:
    """The design pixels of the (lower) region on this layout's grid: the cells whose
    centres lie inside along x, and every row the region overlaps along z (ValueError
    if the region has none)."""
    return _all_parts(fr, layout)[0]


def parts(fr: FreeformRegion, layout) -> list[ff.RegionCells]:
    """The region's cell blocks: the region, then the upper region (same shape) if any."""
    return _all_parts(fr, layout)


def pattern_shape(fr: FreeformRegion, layout) -> tuple[int, int]:
    """Shape of the region pattern: (nx, rows), rows summed over the parts."""
    ps = parts(fr, layout)
    return (ps[0].shape[0], sum(c.shape[1] for c in ps))


def split(fr: FreeformRegion, layout, pattern) -> list:
    """The pattern's block of each part (see :func:`parts`)."""
    out, k = [], 0
    for c in parts(fr, layout):
        out.append(pattern[:, k:k + c.shape[1]])
        k += c.shape[1]
    return out


def parametrization(fr: FreeformRegion, layout) -> ff.Parametrization:
    """The design variables of the region (designer.freeform.Parametrization): column
    densities per etch step in the cross-section plane, pixels in the wafer plane."""
    cells = region_cells(fr, layout)
    roll = int(round(fr.shift_m / layout.grid.dx)) if fr.upper == "shifted" else 0
    slabs = None if fr.plane == "wafer" else fr.etch_steps
    if slabs is not None and slabs > cells.shape[1]:
        raise ValueError(f"{slabs} etch steps need at least {slabs} grid rows in the "
                         f"region; it has {cells.shape[1]} (use a finer grid)")
    return ff.Parametrization(cells.shape[0], cells.shape[1], slabs, fr.upper, roll)


def slab_rows(fr: FreeformRegion, layout) -> list[tuple[int, int]]:
    """Row ranges ``[a, b)`` of the etch steps within one part (bottom first)."""
    cells = region_cells(fr, layout)
    n = cells.shape[1]
    if fr.plane == "wafer":
        return [(0, n)]
    counts = ff.slab_counts(n, min(fr.etch_steps, n))
    edges = np.cumsum((0,) + counts)
    return [(int(a), int(b)) for a, b in zip(edges, edges[1:])]


def part_origin(cells: ff.RegionCells, layout) -> tuple[float, float]:
    g = layout.grid
    return (g.x0 + cells.i0 * g.dx, g.z0 + cells.k0 * g.dz)


def resample(density: np.ndarray, pixel_m, origin_m, cells: ff.RegionCells, grid
             ) -> np.ndarray:
    """Nearest-neighbour values of a stored pixel density at the region's cell centres:
    the stored pixel each centre falls in (clamped to the stored pattern)."""
    xc = grid.x_centres()[cells.i0:cells.i1]
    zc = grid.z_centres()[cells.k0:cells.k1]
    i = np.clip(np.floor((xc - origin_m[0]) / pixel_m[0]).astype(int), 0, density.shape[0] - 1)
    k = np.clip(np.floor((zc - origin_m[1]) / pixel_m[1]).astype(int), 0, density.shape[1] - 1)
    return np.asarray(density)[np.ix_(i, k)]


def start_density(fr: FreeformRegion, layout, family_fill) -> np.ndarray:
    """The spec's density on the region cells (numpy): stored (resampled), uniform, or
    ``family_fill()`` -- the family's own cell fill fractions (nx, nz) of the grid."""
    ps = parts(fr, layout)
    if fr.density is not None:
        return _resample_stored(fr, ps, layout)
    if fr.density_value is not None:
        return np.full(pattern_shape(fr, layout), float(fr.density_value))
    fill = np.asarray(family_fill())
    return np.concatenate([np.clip(fill[c.i0:c.i1, c.k0:c.k1], 0.0, 1.0) for c in ps], axis=1)


def _resample_stored(fr: FreeformRegion, ps, layout) -> np.ndarray:
    d = np.asarray(fr.density)
    if len(ps) == 1:
        return resample(d, fr.pixel_m, fr.origin_m, ps[0], layout.grid)
    half = d.shape[1] // 2
    lower = resample(d[:, :half], fr.pixel_m, fr.origin_m, ps[0], layout.grid)
    # the upper block, read in the mirror image of the lower region's coordinates
    upper = resample(d[:, half:][:, ::-1], fr.pixel_m, fr.origin_m,
                     ps[0], layout.grid)[:, ::-1]
    return np.concatenate([lower, upper], axis=1)


def physical_density(fr: FreeformRegion, layout, family_fill) -> np.ndarray:
    """What is evaluated: the spec's density binarized at 0.5 (beta = inf, no filter)."""
    return np.asarray(ff.threshold_projection(start_density(fr, layout, family_fill), math.inf))


def place(fr: FreeformRegion, eps_x, eps_z, rho_bar, layout):
    """The family's ``(eps_x, eps_z)`` with the region replaced by ``rho_bar``'s eps
    (linear interpolation, freeform.place_eps); JAX-traceable in ``rho_bar``."""
    eps = ff.density_to_eps(rho_bar, 1.0 + 0j, complex(fr.material.eps))
    for cells, block in zip(parts(fr, layout), split(fr, layout, eps)):
        eps_x, eps_z = ff.place_eps(eps_x, eps_z, block, cells)
    return eps_x, eps_z


def solid_mask(fr: FreeformRegion, layout, mask: np.ndarray, rho_phys) -> np.ndarray:
    """A cell material mask with the region's cells set from ``rho_phys > 0.5``."""
    out = np.array(mask, dtype=bool)
    for cells, block in zip(parts(fr, layout), split(fr, layout, np.asarray(rho_phys))):
        out[cells.i0:cells.i1, cells.k0:cells.k1] = block > 0.5
    n = layout.pml_cells_z
    out[:, :n] = False
    out[:, out.shape[1] - n:] = False
    return out


def pixel_origin(fr: FreeformRegion, layout) -> tuple[float, float]:
    cells = region_cells(fr, layout)
    g = layout.grid
    return (g.x0 + cells.i0 * g.dx, g.z0 + cells.k0 * g.dz)


def polygons(fr: FreeformRegion, layout, family_polygons: list[Polygon], rho_phys
             ) -> list[Polygon]:
    """The family's polygons with the region's pixel box cut out, plus the region's
    solid pixels traced along pixel edges (designer.layout.trace_pixels)."""
    import gdstk

    from designer.layout import rectangle, trace_pixels, union

    g = layout.grid
    ps = parts(fr, layout)
    boxes = []
    for cells in ps:
        x0, z0 = part_origin(cells, layout)
        x1 = x0 + cells.shape[0] * g.dx
        if cells.periodic_x:
            # the region replaces the family's pattern in every period: cut the images
            # of its pieces outside the cell too (they would come back when the cell
            # is repeated)
            x0, x1 = x0 - 4 * g.size_x, x1 + 4 * g.size_x
        boxes.append(rectangle(x0, z0, x1, z0 + cells.shape[1] * g.dz) * 1e9)
    out = []
    for poly in family_polygons:
        for piece in gdstk.boolean([np.asarray(poly.vertices_m) * 1e9], boxes, "not",
                                   precision=1e-4):
            out.append(Polygon(np.asarray(piece.points) * 1e-9, poly.material_name, poly.eps))
    traced = []
    for cells, block in zip(ps, split(fr, layout, np.asarray(rho_phys))):
        traced += trace_pixels(block > 0.5, (g.dx, g.dz), part_origin(cells, layout))
    # one polygon per connected piece of the region's material, joined with the family's
    # pieces of that material it touches: pieces cut at a region edge or at the period's
    # seam would leave interfaces that are not there (a field solver smooths across
    # them, and the corners would be taken as real for E_max)
    same = [np.asarray(q.vertices_m) for q in out if q.material_name == fr.material.name
            and complex(q.eps) == complex(fr.material.eps)]
    out = [q for q in out if not (q.material_name == fr.material.name
                                  and complex(q.eps) == complex(fr.material.eps))]
    if ps[0].periodic_x and traced:
        P = g.size_x
        traced = [v + np.array([s, 0.0]) for v in traced for s in (-P, 0.0, P)]
    x_lo, x_hi = g.x0, g.x0 + g.size_x
    for verts in union(same + traced):
        if ps[0].periodic_x and not (verts[:, 0].max() > x_lo and verts[:, 0].min() < x_hi):
            continue                       # an image wholly outside the cell
        out.append(Polygon(verts, fr.material.name, complex(fr.material.eps)))
    return out


def z_extent(fr: FreeformRegion) -> tuple[float, float]:
    """Lowest and highest z of the region and its upper region (m)."""
    lo, hi = fr.z_m
    if fr.upper is not None:
        lo, hi = min(lo, fr.mirror_z_m - fr.z_m[1]), max(hi, fr.mirror_z_m - fr.z_m[0])
    return lo, hi


def check_path_clear(fr: FreeformRegion, z_electron: float, ctx: SampleContext) -> None:
    """SpecError if an electron moving along x at ``z_electron`` would cross the region."""
    ranges = [fr.z_m]
    if fr.upper is not None:
        ranges.append((fr.mirror_z_m - fr.z_m[1], fr.mirror_z_m - fr.z_m[0]))
    for lo, hi in ranges:
        if lo <= z_electron <= hi:
            raise SpecError(ctx.source, "sample.freeform.z_nm",
                            f"the free-form region (z = {lo * 1e9:.4g} .. "
                            f"{hi * 1e9:.4g} nm) contains the electron's path at "
                            f"z = {z_electron * 1e9:.4g} nm", [v * 1e9 for v in fr.z_m])


def snap_to_rules(fr: FreeformRegion, layout, pattern, rules) -> np.ndarray:
    """The binarized pattern with the parts that break the minimum feature and gap
    removed: morphological opening (solid) and closing (void) with a rectangle of
    ``ceil(min_feature / pixel)`` (``ceil(min_gap / pixel)``) pixels, repeated until
    nothing changes (at most four rounds).

    Wafer plane: 2D, on the whole cell with the family's material around the region
    (what the drawn layout holds), periodic along x.  Cross-section plane: along x only,
    on each etch step's row of columns (lithography sets the lateral sizes; a slab's
    thickness is a deposition, not a lithography, rule).  The opening of a rectilinear
    pixel set by a k x k square keeps exactly the pixels covered by some k x k square
    inside it, the criterion of the layout check (designer.layout.thin_parts); J. Serra,
    *Image Analysis and Mathematical Morphology* (1982) -- from memory.
    """
    from scipy import ndimage

    from designer.fabrication import disc_element

    pattern = np.asarray(pattern, dtype=float) > 0.5
    g = layout.grid
    kx_f = int(math.ceil(rules.min_feature_m / g.dx - 1e-6))
    kx_g = int(math.ceil(rules.min_gap_m / g.dx - 1e-6))
    if max(kx_f, kx_g) <= 1:
        return pattern.astype(float)
    ps = parts(fr, layout)
    periodic = ps[0].periodic_x

    def morph(a, size, opening, st=None):
        if st is None:
            if size[0] <= 1 and size[1] <= 1:
                return a
            st = np.ones(size, dtype=bool)
        px, pz = st.shape
        big = np.pad(a, ((px, px), (0, 0)), mode="wrap" if periodic else "edge")
        big = np.pad(big, ((0, 0), (pz, pz)), mode="edge")
        op = ndimage.binary_opening if opening else ndimage.binary_closing
        return op(big, structure=st)[px:px + a.shape[0], pz:pz + a.shape[1]]

    if fr.plane == "wafer":
        kz_f = int(math.ceil(rules.min_feature_m / g.dz - 1e-6))
        kz_g = int(math.ceil(rules.min_gap_m / g.dz - 1e-6))
        n = layout.pml_cells_z
        base = np.asarray(layout.material_mask, dtype=bool).copy()
        full = base.copy()
        for cells, block in zip(ps, split(fr, layout, pattern)):
            full[cells.i0:cells.i1, cells.k0:cells.k1] = block
        inside = np.zeros_like(base)
        for c in ps:
            inside[c.i0:c.i1, c.k0:c.k1] = True
        for _ in range(6):
            before = full.copy()
            inner = full[:, n:g.nz - n]
            # squares: the drawn layout's width/space check; discs: the pixel check of
            # the pattern (fabrication.pattern_rule_check), which also sees diagonals
            # voids first (closing: squares, then discs), then solids (opening: discs,
            # then squares): what is left is a union of squares of the minimum feature,
            # which passes both the disc check and the layout's square check
            inner = morph(inner, (kx_g, kz_g), False)
            if rules.min_gap_m > 0:
                inner = morph(inner, None, False, disc_element(rules.min_gap_m, g.dx, g.dz))
            if rules.min_feature_m > 0:
                inner = morph(inner, None, True, disc_element(rules.min_feature_m, g.dx, g.dz))
            inner = morph(inner, (kx_f, kz_f), True)
            full[:, n:g.nz - n] = np.where(inside[:, n:g.nz - n], inner,
                                           before[:, n:g.nz - n])
            if (full == before).all():
                break
        return np.concatenate([full[c.i0:c.i1, c.k0:c.k1] for c in ps], axis=1).astype(float)
    out = []
    for block in split(fr, layout, pattern):
        block = block.copy()
        for a, b in slab_rows(fr, layout):
            row = block[:, a:b].mean(axis=1) > 0.5
            for _ in range(4):
                before = row.copy()
                row = morph(row[:, None], (kx_f, 1), True)[:, 0]
                row = morph(row[:, None], (kx_g, 1), False)[:, 0]
                if (row == before).all():
                    break
            block[:, a:b] = row[:, None]
        out.append(block)
    return np.concatenate(out, axis=1).astype(float)
