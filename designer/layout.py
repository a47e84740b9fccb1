"""From a cross-section design to a top-view lithography layout (polygons, SI metres).

The simulations work in the (x, z) cross-section, invariant along y.  Lithography
draws the (x, y) top view.  The conventions chosen here:

* the electron path runs along x (at y = 0 in the pictures);
* **single-sided grating**: each tooth becomes a rectangle of the tooth width along x
  (by default the width at the tooth *base*; ``tooth_width_at`` may pick the top or
  the mid-height width) by ``line_length`` along y, centred on y = 0.  A grating of
  ``[path] length_um`` gets ``N = round(length / period)`` teeth per side; the teeth
  sit in the middle of ``N`` cells ``[x_k, x_k + P)`` that span ``-N P/2 .. N P/2``;
  the grating's frame is the teeth's extent plus one full gap ``P - w`` at each end
  (so tone ``remove`` etches ``N + 1`` equal gaps);
* **double-sided grating**: two such arrays facing each other across the channel
  ``gap`` along y (the cross-section's z becomes y: the lower grating's lines occupy
  ``-gap/2 - L <= y <= -gap/2``, the upper one's ``gap/2 <= y <= gap/2 + L``), the
  upper array shifted by ``shift`` along +x as in the cross-section;
* **membrane slits**: slits along y (the full height of the field), periodic along x,
  tiling the field ``field_x x field_y`` centred on the origin: ``n = floor(field_x/P)``
  periods centred in the field, every slit copy lying wholly inside the field is
  drawn.  The material that stays is the field minus the slits (bars and two edge
  strips);
* **free-form regions**: a binarized pixel pattern is traced exactly along pixel edges
  (:func:`trace_pixels`), so the traced polygons are the pixel pattern itself and the
  polygon width/space check (:func:`thin_parts`) measures what will be written; a
  cross-section region of a single etch step becomes lines along y
  (:func:`region_lines`), which needs every pixel column to be all solid or all void;
* **tone**: ``keep`` writes the material that stays (everything not drawn is
  removed); ``remove`` writes what is etched: the complement of the kept polygons
  within the pattern's *frame* (the grating's frame above, or the membrane field,
  grown by ``margin``); outside the frame the material stays.

The physical material left on the chip therefore depends on the tone; the width/space
check runs on that (:func:`thin_material`, :func:`thin_openings`).  Every top-view shape
here is rectilinear (sidewall angles live in z), so the morphological checks use a
square structuring element, which is exact for rectilinear polygons.

Geometry is in metres in numpy arrays ``(n, 2)``; gdstk boolean and offset operations
run internally in nanometres with a 1e-4 nm grid (far below any database unit).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import gdstk
import numpy as np

_NM = 1e9                 # metres -> nm for the polygon engine
_ENGINE_PRECISION = 1e-4  # nm: rounding grid of gdstk boolean/offset (far below 1 dbu)
_SLACK_NM = 1e-2          # sizes equal to a limit pass (0.01 nm below the limit still passes)
_MIN_RESIDUE_M = 5e-12    # parts thinner on average than 5e-3 nm are rounding slivers


class LayoutError(ValueError):
    """A design that has no top-view layout under these settings (message for users)."""


@dataclass(frozen=True)
class TopView:
    """A top-view pattern in metres.

    ``keep``: polygons ``(n, 2)`` of the material that stays inside ``frame``
    ``(x_min, y_min, x_max, y_max)``; ``path_y_m``: where the electron passes along
    x (gratings); ``crossing_x_m``: where it crosses a membrane (at y = 0), for
    pictures; ``kind``: words for people; ``widths_m``: the drawn line widths along x
    by name (for the summary).
    """

    keep: tuple[np.ndarray, ...]
    frame: tuple[float, float, float, float]
    kind: str
    path_y_m: float = 0.0
    widths_m: tuple[tuple[str, float], ...] = ()
    crossing_x_m: float | None = None   # membranes: the electron crosses the film here
    levels: tuple[tuple[np.ndarray, ...], ...] = ()   # multi-level: kept polygons per
                                                      # lithography level (level 0 first)
    origin_m: tuple[float, float] | None = None   # wafer plane: where the simulated
                                                  # (x, z) = (0, 0) of one period lands

    def level_views(self) -> list["TopView"]:
        """One view per lithography level (the view itself when it has one level)."""
        if not self.levels:
            return [self]
        from dataclasses import replace

        return [replace(self, keep=tuple(k), levels=()) for k in self.levels]


def rectangle(x0: float, y0: float, x1: float, y1: float) -> np.ndarray:
    """Counter-clockwise rectangle with corners (x0, y0), (x1, y1)."""
    return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], dtype=float)


def polygon_area(p: np.ndarray) -> float:
    """Unsigned area by the shoelace formula (m^2)."""
    x, y = p[:, 0], p[:, 1]
    return 0.5 * abs(float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def bounding_box(polys) -> tuple[float, float, float, float]:
    pts = np.concatenate([np.asarray(p) for p in polys])
    return (float(pts[:, 0].min()), float(pts[:, 1].min()), float(pts[:, 0].max()),
            float(pts[:, 1].max()))


def grow(box, d: float) -> tuple[float, float, float, float]:
    return (box[0] - d, box[1] - d, box[2] + d, box[3] + d)


# ------------------------------------------------------------------------ families
def teeth_count(length_m: float, period_m: float) -> int:
    """Teeth per side for a grating of ``length`` along the path: ``round(length / P)``."""
    return int(round(length_m / period_m))


def tooth_width(params, at: str = "base") -> float:
    """Tooth width along x (m) at the tooth ``base``, ``top`` or ``mid`` height.

    Mid-height width ``d P``; the sidewall angle ``a`` adds ``h tan(a)`` at the base
    and removes it at the top (designer.families.grating).
    """
    mid = params.duty_cycle * params.period_m
    taper = params.tooth_height_m * math.tan(params.sidewall_angle_rad)
    return {"base": mid + taper, "top": mid - taper, "mid": mid}[at]


def grating_top_view(params, n_teeth: int, line_length_m: float, *, width_at: str = "base",
                     margin_m: float = 0.0) -> TopView:
    """Lines of a single- or double-sided grating (see the module docstring).

    ``params`` is a :class:`designer.families.grating.GratingParams`.
    """
    if n_teeth < 1:
        raise LayoutError("the grating would have no teeth (round(length / period) = 0)")
    P, L = params.period_m, line_length_m
    w = tooth_width(params, width_at)
    x_cells = -0.5 * n_teeth * P + P * np.arange(n_teeth)
    half = 0.5 * w

    def array(shift, y0, y1):
        return [rectangle(x + 0.5 * P + shift - half, y0, x + 0.5 * P + shift + half, y1)
                for x in x_cells]

    # frame: the teeth's extent plus one full gap at each end, so that in tone
    # "remove" the outer teeth see the same gap as the inner ones
    gap = P - w
    x_lo, x_hi = -0.5 * n_teeth * P + 0.5 * gap - gap, 0.5 * n_teeth * P - 0.5 * gap + gap
    if params.sides == 1:
        keep = array(0.0, -0.5 * L, 0.5 * L)
        frame = (x_lo, -0.5 * L, x_hi, 0.5 * L)
        kind = f"single-sided grating, {n_teeth} teeth"
    else:
        g, s = params.gap_m, params.shift_m
        keep = array(0.0, -0.5 * g - L, -0.5 * g) + array(s, 0.5 * g, 0.5 * g + L)
        frame = (x_lo + min(0.0, s), -0.5 * g - L, x_hi + max(0.0, s), 0.5 * g + L)
        kind = f"double-sided grating, {n_teeth} teeth per side"
    return TopView(tuple(keep), grow(frame, margin_m), kind,
                   widths_m=(("tooth", w), ("gap between teeth", P - w)))


def slit_intervals(params, field_x_m: float) -> list[tuple[float, float]]:
    """x intervals of the slits tiling a field of width ``field_x`` centred on 0.

    ``n = floor(field_x / P)`` periods centred in the field; copies of every slit in
    periods ``-1 .. n`` that lie wholly inside the field (a slit that straddles the
    cell edge may fit on one end only).
    """
    P = params.period_m
    n = int(math.floor(field_x_m / P * (1 + 1e-12)))
    if n < 1:
        raise LayoutError(f"the field ({field_x_m * 1e6:.6g} µm) is narrower than one "
                          f"period ({P * 1e9:.6g} nm)")
    x0 = -0.5 * n * P
    lim = 0.5 * field_x_m * (1 + 1e-12)
    out = []
    for k in range(-1, n + 1):
        for w, c in zip(params.slit_widths_m, params.slit_centers_m):
            a, b = x0 + k * P + c - 0.5 * w, x0 + k * P + c + 0.5 * w
            if a >= -lim and b <= lim:
                out.append((a, b))
    return sorted(out)


def membrane_top_view(params, field_m: tuple[float, float], *, margin_m: float = 0.0,
                      electron_x_m: float = 0.0) -> TopView:
    """Bars (material between slits) of a slit membrane tiling the field.

    ``params`` is a :class:`designer.families.membrane.MembraneParams`; an unpatterned
    film is the whole field.
    """
    fx, fy = field_m
    frame = (-0.5 * fx, -0.5 * fy, 0.5 * fx, 0.5 * fy)
    if params.pattern != "slits":
        return TopView((rectangle(*frame),), grow(frame, margin_m), "unpatterned membrane")
    slits = slit_intervals(params, fx)
    edges = [-0.5 * fx] + [v for ab in slits for v in ab] + [0.5 * fx]
    keep = [rectangle(a, -0.5 * fy, b, 0.5 * fy)
            for a, b in zip(edges[::2], edges[1::2]) if b - a > 0]
    widths = tuple((f"slit {j}", w) for j, w in enumerate(params.slit_widths_m))
    P = params.period_m
    n = int(math.floor(fx / P * (1 + 1e-12)))
    # the cross-section's x in the period nearest the field centre
    crossing = -0.5 * n * P + (n // 2) * P + electron_x_m % P
    return TopView(tuple(keep), grow(frame, margin_m),
                   f"membrane, {len(slits)} slits over a {fx * 1e6:.6g} µm field",
                   widths_m=widths, crossing_x_m=crossing)


# ------------------------------------------------------------------------ free-form
def trace_pixels(mask: np.ndarray, pitch_m: tuple[float, float],
                 origin_m: tuple[float, float] = (0.0, 0.0)) -> list[np.ndarray]:
    """Polygons of the True pixels of ``mask[i, j]`` (pixel (i, j) has its lower-left
    corner at ``origin + (i px, j py)``), traced exactly along pixel edges.

    Runs of True pixels in each column become rectangles, merged by a boolean union;
    the result covers exactly the pixel area, so no feature shrinks in tracing and the
    width/space check of the polygons sees the same sizes as the pixel check.
    """
    mask = np.asarray(mask, dtype=bool)
    px, py = pitch_m
    rects = []
    for i in range(mask.shape[0]):
        col = np.concatenate([[False], mask[i], [False]]).astype(np.int8)
        d = np.diff(col)
        for j0, j1 in zip(np.nonzero(d == 1)[0], np.nonzero(d == -1)[0]):
            rects.append(rectangle(origin_m[0] + i * px, origin_m[1] + j0 * py,
                                   origin_m[0] + (i + 1) * px, origin_m[1] + j1 * py))
    return union(rects)


def region_lines(solid: np.ndarray, dx_m: float, x0_m: float,
                 line_length_m: float) -> list[np.ndarray]:
    """Top view of a cross-section free-form region made by one etch step.

    ``solid[i, k]`` (x index i, z index k) must be constant along k in every column
    (a single vertical etch cannot make anything else); runs of solid columns become
    lines ``[x_a, x_b] x [-L/2, L/2]``.
    """
    solid = np.asarray(solid, dtype=bool)
    mixed = np.nonzero(solid.any(axis=1) & ~solid.all(axis=1))[0]
    if mixed.size:
        x_nm = (x0_m + (mixed[0] + 0.5) * dx_m) * 1e9
        raise LayoutError(f"free-form region: column at x = {x_nm:.1f}"
                          f" nm changes material with depth ({mixed.size} such columns); "
                          "one etch step can only make columns that are solid or void "
                          "all through")
    return trace_pixels(solid[:, :1], (dx_m, line_length_m), (x0_m, -0.5 * line_length_m))


def widest_void_centre(columns: np.ndarray, pitch_m: float) -> float:
    """x (from the row's start) of the centre of the widest void run of a periodic row
    of pixel columns (0 when the row has no void or no solid)."""
    cols = np.asarray(columns, dtype=bool)
    if cols.all() or not cols.any():
        return 0.0
    return column_runs(cols, pitch_m)[1]


def column_runs(columns: np.ndarray, pitch_m: float) -> tuple[list[tuple[float, float]], float]:
    """Solid runs of one periodic row of pixel columns as x intervals (m), and the
    cell start ``c``: the runs are given in ``[c, c + n pitch)`` with ``c`` at the centre
    of the widest void run, so no run crosses the cell edge.

    ``columns[i]``: pixel column i (x from ``i pitch``) is solid.  All solid: one run
    over the whole cell (c = 0); all void: no run.
    """
    cols = np.asarray(columns, dtype=bool)
    n = cols.size
    if cols.all():
        return [(0.0, n * pitch_m)], 0.0
    if not cols.any():
        return [], 0.0
    # rotate so that index 0 is void and the row starts with the widest void run
    start = int(np.nonzero(~cols)[0][0])
    rolled = np.roll(cols, -start)
    d = np.diff(np.concatenate([[0], rolled.astype(np.int8), [0]]))
    on, off = np.nonzero(d == 1)[0], np.nonzero(d == -1)[0]
    voids = np.diff(np.concatenate([[0], (~rolled).astype(np.int8), [0]]))
    v_on, v_off = np.nonzero(voids == 1)[0], np.nonzero(voids == -1)[0]
    j = int(np.argmax(v_off - v_on))
    centre = (start + 0.5 * (v_on[j] + v_off[j])) * pitch_m
    runs = []
    for a, b in zip(on, off):
        xa = ((start + a) * pitch_m - centre) % (n * pitch_m) + centre
        runs.append((xa, xa + (b - a) * pitch_m))
    return sorted(runs), centre


def periodic_lines(columns: np.ndarray, pitch_m: float, n_periods: int, cut_m: float,
                   y_range: tuple[float, float], x_shift_m: float = 0.0) -> list[np.ndarray]:
    """Lines of a periodic row of pixel columns, repeated ``n_periods`` times from
    ``x = -n P / 2``, the period window starting at ``cut`` (m from the row's start; the
    row's x = cut lands on x = -n P / 2), each line spanning ``y_range``."""
    cols = np.asarray(columns, dtype=bool)
    n = cols.size
    P = n * pitch_m
    x_first = -0.5 * n_periods * P
    out = []
    for i in np.nonzero(cols)[0]:
        x = ((i * pitch_m - cut_m) % P)
        for k in range(n_periods):
            out.append(rectangle(x_first + k * P + x + x_shift_m, y_range[0],
                                 x_first + k * P + x + pitch_m + x_shift_m, y_range[1]))
    return union(out) if out else []


def freeform_lines_top_view(columns: np.ndarray, pitch_m: float, n_periods: int,
                            line_length_m: float, *, kind: str, margin_m: float = 0.0,
                            solid_lines: bool = True) -> TopView:
    """Top view of a periodic free-form cross-section made by one etch step.

    ``columns`` (one period of pixel columns, solid = True) repeats ``n_periods`` times
    along x, centred on 0; every solid run becomes a line ``line_length`` long along y
    (``solid_lines``; membranes: the void runs are the slits and the material is the
    rest of the frame).  The frame is the periods' extent; it starts and ends in the
    middle of the widest void, which is grown to a full void at each end (as the
    grating's frame does).
    """
    if n_periods < 1:
        raise LayoutError("the pattern would have no periods (round(length / period) = 0)")
    cols = np.asarray(columns, dtype=bool)
    P = cols.size * pitch_m
    runs, c = column_runs(cols, pitch_m)
    L = line_length_m
    x_first = -0.5 * n_periods * P
    keep = []
    for k in range(n_periods):
        for a, b in runs:
            keep.append(rectangle(x_first + k * P + (a - c), -0.5 * L,
                                  x_first + k * P + (b - c), 0.5 * L))
    keep = union(keep) if keep else []
    widest_void = P - sum(b - a for a, b in runs) if len(runs) <= 1 else \
        max((runs[(j + 1) % len(runs)][0] - runs[j][1]) % P for j in range(len(runs)))
    half = 0.5 * widest_void if runs and len(runs) and widest_void > 0 else 0.0
    frame = (x_first - half, -0.5 * L, -x_first + half, 0.5 * L)
    widths = tuple((f"line {j}", b - a) for j, (a, b) in enumerate(runs))
    return TopView(tuple(keep), grow(frame, margin_m), kind, widths_m=widths)


# ------------------------------------------------------------------------ polygon set ops
def _nm(polys) -> list[np.ndarray]:
    return [np.asarray(p, dtype=float) * _NM for p in polys]


def _m(polys) -> list[np.ndarray]:
    return [np.asarray(p.points, dtype=float) / _NM for p in polys]


def union(polys) -> list[np.ndarray]:
    if not polys:
        return []
    return _m(gdstk.boolean(_nm(polys), [], "or", precision=_ENGINE_PRECISION))


def rect_subtract(a, b) -> list[np.ndarray]:
    """Union of polygons ``a`` minus union of ``b`` for rectilinear polygons, exactly.

    The plane is cut into the grid of all vertex coordinates; a grid cell is kept when
    its centre lies in some polygon of ``a`` and in none of ``b``; kept cells are merged
    into column runs and rectangles, then united.  Done on the grid rather than by a
    polygon "not", which leaves zero-width bridges where the pieces of the result touch
    the edges of ``a`` (separate pieces would come out as one polygon).
    """
    from matplotlib.path import Path as _Path

    a = [np.asarray(p, dtype=float) for p in a]
    b = [np.asarray(p, dtype=float) for p in b]
    if not a:
        return []
    x0, y0, x1, y1 = bounding_box(a)
    xs = np.unique(np.clip(np.concatenate([p[:, 0] for p in a + b]), x0, x1))
    ys = np.unique(np.clip(np.concatenate([p[:, 1] for p in a + b]), y0, y1))
    if len(xs) < 2 or len(ys) < 2:
        return []
    cx, cy = 0.5 * (xs[1:] + xs[:-1]), 0.5 * (ys[1:] + ys[:-1])
    pts = np.stack(np.meshgrid(cx, cy, indexing="ij"), axis=-1).reshape(-1, 2)
    inside = np.zeros(len(pts), dtype=bool)
    for p in a:
        inside |= _Path(p).contains_points(pts)
    for p in b:
        inside &= ~_Path(p).contains_points(pts)
    inside = inside.reshape(len(cx), len(cy))
    rects, open_runs = [], {}
    for i in range(len(cx) + 1):
        runs = set()
        if i < len(cx):
            col = np.concatenate([[False], inside[i], [False]]).astype(np.int8)
            d = np.diff(col)
            runs = set(zip(np.nonzero(d == 1)[0], np.nonzero(d == -1)[0]))
        for run in list(open_runs):
            if run not in runs:
                rects.append(rectangle(xs[open_runs.pop(run)], ys[run[0]], xs[i], ys[run[1]]))
        for run in runs:
            open_runs.setdefault(run, i)
    return union(rects)


def complement(view: TopView) -> list[np.ndarray]:
    """What is etched for tone ``remove``: the frame minus the kept material."""
    return rect_subtract([rectangle(*view.frame)], view.keep)


def thin_material(view: TopView, tone: str, width_m: float) -> list["ThinPart"]:
    """Parts of the material left on the chip narrower than ``width_m``.

    ``keep``: the material is the drawn polygons; ``remove``: everything but the
    etched complement, so its thin parts are what a closing of the etched set adds
    (morphological duality; the etched set has no holes, the material around it would).
    """
    if tone == "keep":
        return thin_parts(list(view.keep), width_m, "solid")
    return thin_parts(complement(view), width_m, "void")


def thin_openings(view: TopView, tone: str, width_m: float) -> list["ThinPart"]:
    """Openings (voids) between the material narrower than ``width_m`` (see above)."""
    if tone == "keep":
        return thin_parts(list(view.keep), width_m, "void")
    return thin_parts(complement(view), width_m, "solid")


def _offset(polys_nm, d_nm):
    return gdstk.offset(polys_nm, d_nm, join="miter", use_union=True,
                        precision=_ENGINE_PRECISION)


@dataclass(frozen=True)
class ThinPart:
    """A part of a layout narrower than a limit: centre (m), narrow size (m), area (m^2)."""

    center_m: tuple[float, float]
    size_m: float
    area_m2: float


def _parts(polys) -> list[ThinPart]:
    out = []
    for p in polys:
        a = polygon_area(p)
        x0, y0, x1, y1 = bounding_box([p])
        if a <= 0 or a / max(x1 - x0, y1 - y0) < _MIN_RESIDUE_M:
            continue          # rounding slivers of the offset engine, not features
        out.append(ThinPart((0.5 * (x0 + x1), 0.5 * (y0 + y1)), min(x1 - x0, y1 - y0), a))
    return sorted(out, key=lambda t: (t.center_m[0], t.center_m[1]))


def thin_parts(material, width_m: float, phase: str = "solid") -> list[ThinPart]:
    """Parts of the ``solid`` material (or of the ``void`` between it) narrower than
    ``width_m``, by morphological opening (solid) or closing (void) with a square of
    side ``width_m``.

    For rectilinear polygons the miter offset by ``d`` is the Minkowski sum with a
    square of half-side ``d``, so the opening removes exactly the parts where no such
    square fits (J. Serra, *Image Analysis and Mathematical Morphology*, 1982 — the
    opening/closing definitions; from memory).  Sizes equal to the limit pass.
    """
    if width_m <= 0 or not material:
        return []
    src = _nm(material)
    d = 0.5 * width_m * _NM - _SLACK_NM
    if phase == "solid":
        eroded = _offset(src, -d)
        opened = _offset(eroded, d) if eroded else []
        diff = rect_subtract(material, _m(opened))
    else:
        closed = _offset(_offset(src, d), -d)
        diff = rect_subtract(_m(closed), material)
    return _parts(diff)


def snap(polys, dbu_m: float) -> list[np.ndarray]:
    """Vertices rounded to the database unit (what a GDSII/OASIS file stores)."""
    return [np.round(np.asarray(p) / dbu_m) * dbu_m for p in polys]


# ------------------------------------------------------------------------ decorations
def frame_ring(box, width_m: float) -> list[np.ndarray]:
    """A rectangular ring of ``width`` just outside ``box`` as four rectangles."""
    x0, y0, x1, y1 = box
    w = width_m
    return [rectangle(x0 - w, y0 - w, x1 + w, y0), rectangle(x0 - w, y1, x1 + w, y1 + w),
            rectangle(x0 - w, y0, x0, y1), rectangle(x1, y0, x1 + w, y1)]


def cross(cx: float, cy: float, size_m: float, width_m: float) -> list[np.ndarray]:
    """An alignment cross of arm span ``size`` and arm width ``width`` (two bars, joined)."""
    h, t = 0.5 * size_m, 0.5 * width_m
    return union([rectangle(cx - h, cy - t, cx + h, cy + t),
                  rectangle(cx - t, cy - h, cx + t, cy + h)])


def corner_marks(box, clearance_m: float, size_m: float, width_m: float) -> list[np.ndarray]:
    """Crosses at the four corners of ``box``, each ``clearance`` clear of it."""
    x0, y0, x1, y1 = grow(box, clearance_m + 0.5 * size_m)
    return [p for cx, cy in ((x0, y0), (x1, y0), (x0, y1), (x1, y1))
            for p in cross(cx, cy, size_m, width_m)]


def text_polygons(text: str, height_m: float, position_m: tuple[float, float]):
    """Polygon text (gdstk's stroke font), lower-left at ``position``."""
    polys = gdstk.text(text, height_m * _NM, (position_m[0] * _NM, position_m[1] * _NM))
    return _m(polys)
