"""A thin film the electron crosses (along +z), plain, with slits or with a lattice of holes.

Geometry: the film fills ``0 <= z <= thickness`` (vacuum on both sides).  With
``pattern = "slits"`` it is cut by slits through its whole thickness, repeated with
``period_nm`` along x: slit j has width ``slit_widths_nm[j]`` and is centred at
``slit_centers_nm[j]`` (0 <= centre < period; slits must not overlap).  The material
between slits are the *bars*.  The electron moves along +z at ``path.x_nm``.

With ``pattern = "holes"`` the film is a photonic-crystal slab: holes through the
whole thickness on a ``lattice = "square"`` (a1 = (P, 0), a2 = (0, P)) or
``"hexagonal"`` (a1 = (P, 0), a2 = (P/2, P sqrt(3)/2)) lattice of ``period_nm`` P,
circular (``hole_radius_nm``) or elliptical (``hole_axes_nm = [a, b]`` semi-axes,
``hole_angle_deg`` from x to the a axis).  A hole centre is the origin of x and y, so
``[path] x_nm = y_nm = 0`` is the middle of a hole.  Unpatterned films and hole
membranes may sit on further unpatterned layers, ``layers = [{material, thickness_nm,
side = "below" | "above"}, ...]`` (each side listed from the film outward), and on a
``substrate`` half-space below.  Hole membranes are solved by the Fourier modal method
(designer.holes); the x-z cross-section through a row of hole centres (y = 0) is what
the pictures and the Yee-grid layout show.

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
    holes: "HoleLattice | None" = None    # pattern = "holes"
    layers_below: tuple = ()              # ((MaterialRef, thickness_m), ...) film outward
    layers_above: tuple = ()
    substrate: MaterialRef | None = None  # half-space below everything


@dataclass(frozen=True)
class HoleLattice:
    """Holes through the film on a 2D lattice (SI).

    ``semi_axes_m = (a, b)``: a along the direction ``angle_rad`` from x, b across it;
    a circle has a == b and ``circular`` True (given as ``hole_radius_nm``).
    """

    lattice: str                      # "square" | "hexagonal"
    period_m: float
    semi_axes_m: tuple[float, float]
    angle_rad: float = 0.0
    circular: bool = True

    @property
    def a1(self) -> tuple[float, float]:
        return (self.period_m, 0.0)

    @property
    def a2(self) -> tuple[float, float]:
        if self.lattice == "square":
            return (0.0, self.period_m)
        return (0.5 * self.period_m, 0.5 * math.sqrt(3.0) * self.period_m)

    @property
    def cell_area_m2(self) -> float:
        (ax, ay), (bx, by) = self.a1, self.a2
        return abs(ax * by - ay * bx)

    @property
    def fill_fraction(self) -> float:
        """Share of the cell area that is hole (open)."""
        a, b = self.semi_axes_m
        return math.pi * a * b / self.cell_area_m2


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
    pattern = reader.string("pattern", "none", choices=("none", "slits", "holes"))
    for key in _HOLE_KEYS:
        if pattern != "holes" and reader.has(key):
            raise reader.error(key, 'only with pattern = "holes"', reader.raw(key))
    if pattern != "slits":
        for key in ("slit_widths_nm", "slit_centers_nm"):
            if reader.has(key):
                raise reader.error(key, 'only with pattern = "slits"', reader.raw(key))
    if pattern == "slits":
        for key in ("layers", "substrate"):
            if reader.has(key):
                raise reader.error(key, 'extra layers and a substrate are offered for '
                                   'pattern = "none" and "holes" only', reader.raw(key))
    if pattern != "slits" and reader.has("freeform"):
        raise reader.error("freeform", 'a free-form region needs pattern = "slits" '
                           "(its period is the unit cell; the slits are the start "
                           "pattern unless a density is given)", reader.raw("freeform"))
    if pattern == "none":
        if reader.has("period_nm"):
            raise reader.error("period_nm", 'only with pattern = "slits" or "holes"',
                               reader.raw("period_nm"))
        below, above, substrate = _read_layers(reader, ctx)
        reader.finish()
        return MembraneParams(material, thickness, "none", None, wavelength_m=ctx.wavelength_m,
                              layers_below=below, layers_above=above, substrate=substrate)
    if pattern == "holes":
        holes = _read_holes(reader, ctx)
        below, above, substrate = _read_layers(reader, ctx)
        reader.finish()
        return MembraneParams(material, thickness, "holes", holes.period_m,
                              wavelength_m=ctx.wavelength_m, holes=holes,
                              layers_below=below, layers_above=above, substrate=substrate)
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


_HOLE_KEYS = ("lattice", "hole_radius_nm", "hole_axes_nm", "hole_angle_deg")


def _read_holes(reader: TableReader, ctx: SampleContext) -> HoleLattice:
    lattice = reader.string("lattice", "square", choices=("square", "hexagonal"))
    period = reader.length("period_nm", round(ctx.wavelength_m * 0.6e9) * 1e-9, minimum=0.0,
                           exclusive_minimum=True)
    if reader.has("hole_radius_nm") and reader.has("hole_axes_nm"):
        raise reader.error("hole_axes_nm", "give either hole_radius_nm (circles) or "
                           "hole_axes_nm (ellipses), not both", reader.raw("hole_axes_nm"))
    if reader.has("hole_axes_nm"):
        axes = _float_list(reader, "hole_axes_nm", None)
        if len(axes) != 2 or not all(a > 0 for a in axes):
            raise reader.error("hole_axes_nm", "must be two positive semi-axes [a, b] in nm",
                               reader.raw("hole_axes_nm"))
        angle = reader.number("hole_angle_deg", 0.0, minimum=-180.0, maximum=180.0)
        holes = HoleLattice(lattice, period, (axes[0] * 1e-9, axes[1] * 1e-9),
                            math.radians(angle), circular=False)
        key = "hole_axes_nm"
    else:
        if reader.has("hole_angle_deg"):
            raise reader.error("hole_angle_deg", "only with hole_axes_nm (ellipses)",
                               reader.raw("hole_angle_deg"))
        radius = reader.length("hole_radius_nm", 0.25 * period * 1e9, minimum=0.0,
                               exclusive_minimum=True)
        holes = HoleLattice(lattice, period, (radius, radius), 0.0, circular=True)
        key = "hole_radius_nm"
    wall = hole_wall(holes)
    if wall <= 0:
        raise reader.error(key, f"neighbouring holes overlap on the {lattice} lattice of "
                           f"period {period * 1e9:.4g} nm (wall {wall * 1e9:.3g} nm)",
                           reader.raw(key, None))
    return holes


def hole_wall(h: HoleLattice) -> float:
    """Narrowest wall of film between neighbouring holes (m; negative when they overlap).

    Two holes related by a lattice vector d are translates of one centrally symmetric
    ellipse E, so their distance is the distance from the point d to E - E = 2E (the
    ellipse with doubled semi-axes); sampled on 2048 boundary points (relative error
    < 2e-6 of the period, common practice, no source).
    """
    a, b = h.semi_axes_m
    t = np.linspace(0.0, 2.0 * np.pi, 2048, endpoint=False)
    c, s = math.cos(h.angle_rad), math.sin(h.angle_rad)
    ex = 2 * a * np.cos(t) * c - 2 * b * np.sin(t) * s
    ey = 2 * a * np.cos(t) * s + 2 * b * np.sin(t) * c
    (a1x, a1y), (a2x, a2y) = h.a1, h.a2
    best = math.inf
    for i, j in ((1, 0), (0, 1), (1, 1), (1, -1), (2, -1), (-1, 2)):
        dx, dy = i * a1x + j * a2x, i * a1y + j * a2y
        d = float(np.min(np.hypot(ex - dx, ey - dy)))
        # inside 2E means the holes overlap: report minus the depth
        inside = (((dx * c + dy * s) / (2 * a)) ** 2 + ((-dx * s + dy * c) / (2 * b)) ** 2) < 1
        best = min(best, -d if inside else d)
    return best


def _read_layers(reader: TableReader, ctx: SampleContext):
    """``layers = [{material, thickness_nm, side}]`` and ``substrate``: unpatterned extras."""
    value = reader.raw("layers", [])
    if not isinstance(value, list):
        raise reader.error("layers", "must be a list of tables {material, thickness_nm, "
                           'side = "below" | "above"}', value)
    below, above = [], []
    for j, entry in enumerate(value):
        sub = TableReader(entry, reader.key(f"layers.{j}"), reader.source)
        mat = base.resolve(sub, "material", sub.raw("material"), ctx)
        t = sub.length("thickness_nm", minimum=0.0, exclusive_minimum=True)
        side = sub.string("side", "below", choices=("below", "above"))
        sub.finish()
        (below if side == "below" else above).append((mat, t))
    substrate = None
    if reader.has("substrate"):
        substrate = base.resolve(reader, "substrate", reader.raw("substrate"), ctx)
    return tuple(below), tuple(above), substrate


def stack_layers(p: MembraneParams, thickness_m=None):
    """``(eps_below, [(thickness_m, eps or "film"), ...] bottom to top, eps_above)``.

    The film itself appears as ``"film"`` so callers can substitute a patterned layer;
    ``thickness_m`` overrides the film thickness (may be a JAX tracer).
    """
    t = p.thickness_m if thickness_m is None else thickness_m
    rows = [(th, m.eps) for m, th in reversed(p.layers_below)]
    rows.append((t, "film"))
    rows += [(th, m.eps) for m, th in p.layers_above]
    below = p.substrate.eps if p.substrate is not None else 1.0 + 0j
    return complex(below), rows, 1.0 + 0j


def film_bottom_m(p: MembraneParams) -> float:
    """z of the film's bottom face when the lowest layer starts at z = 0."""
    return float(sum(th for _, th in p.layers_below))


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
    if p.holes is not None:
        h = p.holes
        t["lattice"] = h.lattice
        t["period_nm"] = h.period_m * 1e9
        if h.circular:
            t["hole_radius_nm"] = h.semi_axes_m[0] * 1e9
        else:
            t["hole_axes_nm"] = [h.semi_axes_m[0] * 1e9, h.semi_axes_m[1] * 1e9]
            t["hole_angle_deg"] = math.degrees(h.angle_rad)
    layers = ([{"material": m.spec, "thickness_nm": th * 1e9, "side": "below"}
               for m, th in p.layers_below]
              + [{"material": m.spec, "thickness_nm": th * 1e9, "side": "above"}
                 for m, th in p.layers_above])
    if layers:
        t["layers"] = layers
    if p.substrate is not None:
        t["substrate"] = p.substrate.spec
    if p.freeform is not None:
        t["freeform"] = freeform_region.to_table(p.freeform)
    return t


# ------------------------------------------------------------------------ variables
def _spec_values(p: MembraneParams) -> dict[str, float]:
    v = {"thickness_nm": p.thickness_m * 1e9}
    if p.holes is not None:
        return {**v, **_hole_values(p.holes)}
    for j, (w, c) in enumerate(zip(p.slit_widths_m, p.slit_centers_m)):
        v[f"slit_widths_nm.{j}"] = w * 1e9
        v[f"slit_centers_nm.{j}"] = c * 1e9
    return v


def _hole_values(h: HoleLattice) -> dict[str, float]:
    v = {"period_nm": h.period_m * 1e9}
    if h.circular:
        v["hole_radius_nm"] = h.semi_axes_m[0] * 1e9
    else:
        v["hole_axes_nm.0"] = h.semi_axes_m[0] * 1e9
        v["hole_axes_nm.1"] = h.semi_axes_m[1] * 1e9
    return v


def _holes_from(h: HoleLattice, v: dict) -> HoleLattice:
    if h.circular:
        r = v["hole_radius_nm"] * 1e-9
        axes = (r, r)
    else:
        axes = (v["hole_axes_nm.0"] * 1e-9, v["hole_axes_nm.1"] * 1e-9)
    return HoleLattice(h.lattice, v["period_nm"] * 1e-9, axes, h.angle_rad, h.circular)


def variables(p: MembraneParams) -> dict[str, tuple[float, float, float]]:
    """Continuous parameters (spec units): thickness, each slit's width and centre.

    List entries are keyed ``slit_widths_nm.J`` / ``slit_centers_nm.J`` (J = index in
    centre order).  Bounds keep neighbouring slits apart with the others held; the
    period is the Bloch cell and not a variable.
    """
    lam_nm = p.wavelength_m * 1e9
    out = {"thickness_nm": (p.thickness_m * 1e9, 0.005 * lam_nm, 2.0 * lam_nm)}
    if p.holes is not None:
        # holes: period 0.2..2 wavelengths; semi-axes up to what keeps a wall at the
        # present period (the fabrication rules tighten these further)
        h = p.holes
        P = h.period_m * 1e9
        out["period_nm"] = (P, 0.2 * lam_nm, 2.0 * lam_nm)
        for key, val in _hole_values(h).items():
            if key != "period_nm":
                out[key] = (val, 0.01 * P, 0.5 * P)
        return {k: (v, min(lo, v), max(hi, v)) for k, (v, lo, hi) in out.items()}
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
    if p.holes is not None:
        holes = _holes_from(p.holes, v)
        if not (holes.period_m > 0 and min(holes.semi_axes_m) > 0):
            raise ValueError("membrane: period and hole size must be > 0")
        if hole_wall(holes) <= 0:
            raise ValueError("membrane: neighbouring holes overlap")
        return dataclasses.replace(p, thickness_m=v["thickness_nm"] * 1e-9, holes=holes,
                                   period_m=holes.period_m)
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
def hole_chords(h: HoleLattice, y_m: float) -> list[tuple[float, float]]:
    """(centre x, width) of the hole chords on the line y = ``y_m`` in one period [0, P)
    along x (a1), from the holes of the nearby lattice rows; overlapping chords merged."""
    a, b = h.semi_axes_m
    c, s = math.cos(h.angle_rad), math.sin(h.angle_rad)
    (a2x, a2y) = h.a2
    P = h.period_m
    out = []
    for j in range(-3, 4):
        cy = j * a2y
        cx0 = j * a2x
        # ellipse quadratic in x at fixed y: A x^2 + B x + C = 0, local coords about centre
        dy = y_m - cy
        A = (c / a) ** 2 + (s / b) ** 2
        B = 2 * dy * (c * s / a**2 - c * s / b**2)
        C = (s * dy / a) ** 2 + (c * dy / b) ** 2 - 1.0
        disc = B * B - 4 * A * C
        if disc <= 0:
            continue
        half = math.sqrt(disc) / (2 * A)
        mid = -B / (2 * A) + cx0
        out.append(((mid % P), 2 * half))
    out.sort()
    merged = []
    for cx, w in out:
        if merged and cx - 0.5 * w < merged[-1][0] + 0.5 * merged[-1][1]:
            lo = merged[-1][0] - 0.5 * merged[-1][1]
            hi = max(merged[-1][0] + 0.5 * merged[-1][1], cx + 0.5 * w)
            merged[-1] = (0.5 * (lo + hi), hi - lo)
        else:
            merged.append((cx, w))
    return merged


def section(p: MembraneParams, y_m: float = 0.0) -> MembraneParams:
    """The x-z cross-section of a hole membrane at y = ``y_m``: a film with the hole
    chords as slits (for pictures and the Yee-grid layout); other patterns unchanged."""
    if p.holes is None:
        return p
    chords = [(cx, w) for cx, w in hole_chords(p.holes, y_m) if w > 1e-3 * p.holes.period_m]
    if not chords or sum(w for _, w in chords) >= p.holes.period_m:
        return MembraneParams(p.material, p.thickness_m, "none", None,
                              wavelength_m=p.wavelength_m)
    return _make(p.material, p.thickness_m, p.holes.period_m, [w for _, w in chords],
                 [cx for cx, _ in chords], p.wavelength_m)


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
    """z: PML, margin, path room, film, path room, margin, PML; x: one Bloch period.

    A hole membrane is laid out as its cross-section through the path (``section``).
    """
    if p.holes is not None:
        return layout(section(p), ctx, grid_step_m)
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
    if p.holes is not None:
        if values:
            p = replace(p, values)
        return permittivity(section(p), layout)
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
    """Substrate (or vacuum) / layers / film / layers / vacuum for an unpatterned
    membrane, film bottom at z = 0."""
    if p.pattern != "none":
        return None
    below, rows, above = stack_layers(p)
    rows = tuple((th, p.material.eps if e == "film" else complex(e)) for th, e in rows)
    return LayerStack(below, above, rows, -film_bottom_m(p))


def polygons(p: MembraneParams, ctx: SampleContext, layout: SimulationLayout) -> list[Polygon]:
    if p.holes is not None:
        return polygons(section(p), ctx, layout)
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
    if p.holes is not None:
        h = p.holes
        wall = hole_wall(h)
        hole = 2.0 * min(h.semi_axes_m)
        out.append(Feature("gap", hole, (0.0, 0.5 * t), "hole diameter (smallest)"))
        out.append(Feature("solid", wall, (0.5 * h.period_m, 0.5 * t),
                           "wall between neighbouring holes"))
        out.append(Feature("height", t, (0.0, 0.5 * t), "etch depth through the film",
                           lateral_m=min(hole, wall)))
        return out
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

    if p.holes is not None:
        h = p.holes
        size = (f"r = {h.semi_axes_m[0] * 1e9:.4g} nm" if h.circular else
                f"a, b = {h.semi_axes_m[0] * 1e9:.4g}, {h.semi_axes_m[1] * 1e9:.4g} nm")
        return drawing.draw_sample(
            ax, polygons(p, ctx, layout), layout,
            title=f"{h.lattice} holes, P = {h.period_m * 1e9:.4g} nm, {size}, "
                  f"{p.thickness_m * 1e9:.4g} nm thick (section through hole centres)",
            **{"periods": 3, **options})
    what = "unpatterned membrane" if p.pattern == "none" else \
        f"membrane with {len(p.slit_widths_m)} slit(s) per {p.period_m * 1e9:.4g} nm"
    periods = 3 if p.pattern == "slits" else 1
    return drawing.draw_sample(ax, polygons(p, ctx, layout), layout,
                               title=f"{what}, {p.thickness_m * 1e9:.4g} nm thick",
                               **{"periods": periods, **options})
