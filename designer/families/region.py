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

Without ``density`` / ``density_file`` the region starts from the family's own pattern
there (the fill fraction of each cell by the family's pieces).

The design pixels are the FDFD cells whose centres lie in the region
(designer.freeform.region_cells).  What a spec *evaluates* is the density placed as
it is, binarized at 0.5 (``freeform.threshold_projection`` with ``beta = inf``, no filter; a value of
exactly 0.5 stays half way).  A design run stores its final pattern already filtered
and projected (0 or 1 per pixel), so ``velomatch evaluate DIR/design.toml`` places
exactly the pattern the optimizer evaluated last.

Resolution: a stored density belongs to the grid it was computed on (``pixel_nm``,
``origin_nm``).  On that grid it is placed pixel for pixel; on any other grid (the
error estimate at 1.5 h, a refined re-evaluation) every cell takes the value of the
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
                   x_limits: tuple[float, float], z_default: tuple[float, float]
                   ) -> FreeformRegion | None:
    """Read ``[sample.freeform]`` (None when absent).  ``x_limits``: the unit cell along
    x; the region must lie inside it.  Every bad value is a SpecError."""
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
    r.finish()
    return FreeformRegion(x, z, mat, value, density, pixel, origin, name)


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
    return t


def with_pattern(fr: FreeformRegion, rho: np.ndarray, layout, file_name: str,
                 base_dir=None) -> FreeformRegion:
    """The region holding ``rho`` (the region cells of ``layout``) as a stored density.

    The array is written to ``base_dir / file_name`` by the caller; ``base_dir`` only
    lets this function check the shape now.
    """
    cells = region_cells(fr, layout)
    rho = np.asarray(rho, dtype=float)
    if rho.shape != cells.shape:
        raise ValueError(f"density shape {rho.shape} does not match the region's "
                         f"{cells.shape} cells")
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


def region_cells(fr: FreeformRegion, layout) -> ff.RegionCells:
    """The design pixels on this layout's grid (ValueError if the region has none)."""
    return ff.region_cells(density_patch(fr, layout), layout.grid)


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
    cells = region_cells(fr, layout)
    if fr.density is not None:
        return resample(fr.density, fr.pixel_m, fr.origin_m, cells, layout.grid)
    if fr.density_value is not None:
        return np.full(cells.shape, float(fr.density_value))
    fill = np.asarray(family_fill())
    return np.clip(fill[cells.i0:cells.i1, cells.k0:cells.k1], 0.0, 1.0)


def physical_density(fr: FreeformRegion, layout, family_fill) -> np.ndarray:
    """What is evaluated: the spec's density binarized at 0.5 (beta = inf, no filter)."""
    return np.asarray(ff.threshold_projection(start_density(fr, layout, family_fill), math.inf))


def place(fr: FreeformRegion, eps_x, eps_z, rho_bar, layout):
    """The family's ``(eps_x, eps_z)`` with the region replaced by ``rho_bar``'s eps
    (linear interpolation, freeform.place_eps); JAX-traceable in ``rho_bar``."""
    cells = region_cells(fr, layout)
    eps = ff.density_to_eps(rho_bar, 1.0 + 0j, complex(fr.material.eps))
    return ff.place_eps(eps_x, eps_z, eps, cells)


def solid_mask(fr: FreeformRegion, layout, mask: np.ndarray, rho_phys) -> np.ndarray:
    """A cell material mask with the region's cells set from ``rho_phys > 0.5``."""
    cells = region_cells(fr, layout)
    out = np.array(mask, dtype=bool)
    out[cells.i0:cells.i1, cells.k0:cells.k1] = np.asarray(rho_phys) > 0.5
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

    from designer.layout import rectangle, trace_pixels

    cells = region_cells(fr, layout)
    g = layout.grid
    x0, z0 = pixel_origin(fr, layout)
    box = rectangle(x0, z0, x0 + cells.shape[0] * g.dx, z0 + cells.shape[1] * g.dz) * 1e9
    out = []
    for poly in family_polygons:
        for piece in gdstk.boolean([np.asarray(poly.vertices_m) * 1e9], [box], "not",
                                   precision=1e-4):
            out.append(Polygon(np.asarray(piece.points) * 1e-9, poly.material_name, poly.eps))
    solid = np.asarray(rho_phys) > 0.5
    for verts in trace_pixels(solid, (g.dx, g.dz), (x0, z0)):
        out.append(Polygon(verts, fr.material.name, complex(fr.material.eps)))
    return out


def check_path_clear(fr: FreeformRegion, z_electron: float, ctx: SampleContext) -> None:
    """SpecError if an electron moving along x at ``z_electron`` would cross the region."""
    if fr.z_m[0] <= z_electron <= fr.z_m[1]:
        raise SpecError(ctx.source, "sample.freeform.z_nm",
                        f"the free-form region (z = {fr.z_m[0] * 1e9:.4g} .. "
                        f"{fr.z_m[1] * 1e9:.4g} nm) contains the electron's path at "
                        f"z = {z_electron * 1e9:.4g} nm", [v * 1e9 for v in fr.z_m])
