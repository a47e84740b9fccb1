"""Lithography export: ``[layout]`` settings, design-rule gate, GDSII/OASIS, preview.

``velomatch export SPEC.toml --out FILE.gds [--format oasis] [--preview FILE.svg]``

1. ``[layout]`` is read strictly (:func:`parse_layout`); the sample becomes a top view
   (designer.layout, whose docstring fixes the cross-section -> top-view conventions).
2. The design-rule check (:func:`rule_check`) runs before anything is written:

   * the family's cross-section features against ``[fabrication]`` (min feature,
     min gap, thickness, etch depth, max aspect ratio, allowed materials:
     designer.fabrication.design_rule_check);
   * the top view itself: every part of the physical material narrower than
     ``min_feature_nm`` and every void narrower than ``min_gap_nm`` (morphological
     opening/closing of the polygons, designer.layout.thin_parts), each located;
   * the pattern's frame against ``write_field_um`` (larger patterns need stitching);
   * the clearance and line widths of frame, marks and label.

   Any violation refuses the write (exit code 3, every violation listed with its
   location on stderr) unless ``--ignore-rules`` is given.
3. The file is written atomically with gdstk: user unit 1 um, database unit
   ``dbu_nm`` (default 1 nm), one top cell, flat polygons.  Traceability: a text
   element (a label, not geometry) on the ``info`` layer reading
   ``velomatch <version> spec_sha256=<hash> date=<UTC ISO date> spec=<file name>``,
   carrying the same three items as GDSII properties (attribute 1: spec hash,
   2: tool version, 3: date; OASIS stores them as S_GDS_PROPERTY), and for OASIS also
   as library properties ``velomatch_spec_sha256``, ``velomatch_version``,
   ``velomatch_date``.

``[layout]`` keys (all optional)::

    line_length_um = 10.0    # grating lines along y
    field_um = 50.0          # membrane field: a number (square) or [x, y]
    layer = 1                # pattern layer and datatype
    datatype = 0
    tone = "keep"            # "keep": polygons stay; "remove": polygons are etched
    dbu_nm = 1.0             # database unit
    tooth_width_at = "base"  # "base" | "top" | "mid": which tooth width is drawn
    margin_um = 0.0          # grows the pattern frame (tone "remove" etches it too)
    frame = false            # a ring around the pattern
    frame_width_um = 2.0
    clearance_um = 5.0       # free space between pattern, frame, marks and label
    marks = false            # alignment crosses at the four corners
    mark_size_um = 20.0
    mark_width_um = 2.0
    label = "..."            # text drawn as polygons below the pattern
    label_height_um = 2.0
    cell = "DESIGN"          # top cell name

    [layout.layers]          # [layer, datatype] per purpose or per material name
    frame = [2, 0]           # purposes: frame, marks, label, info; default: the
    fused_silica = [1, 5]    # pattern layer; a material name moves the pattern
"""

from __future__ import annotations

import datetime as _dt
import math
import os
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from designer import io as vio
from designer import layout as geo
from designer.errors import SpecError, UsageError, VelomatchError
from designer.fabrication import Finding
from designer.tables import TableReader

FORMATS = {".gds": "gds", ".gdsii": "gds", ".gds2": "gds", ".oas": "oasis", ".oasis": "oasis"}
PURPOSES = ("frame", "marks", "label", "info")
_MAX_LAYER = 32767           # GDSII LAYER/DATATYPE records are 2-byte signed integers
_USER_UNIT_M = 1e-6          # gdstk user unit: coordinates in the library are in um
_TEXT_LIMIT = 20             # violations printed before "... and N more"


class DesignRuleError(VelomatchError):
    """The design breaks fabrication rules and ``--ignore-rules`` was not given."""

    exit_code = 3


# ---------------------------------------------------------------------------------
# settings
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class LayoutSettings:
    """The ``[layout]`` table in SI units (see the module docstring for the keys)."""

    line_length_m: float = 10e-6
    field_m: tuple[float, float] = (50e-6, 50e-6)
    layer: int = 1
    datatype: int = 0
    tone: str = "keep"
    dbu_m: float = 1e-9
    tooth_width_at: str = "base"
    margin_m: float = 0.0
    frame: bool = False
    frame_width_m: float = 2e-6
    clearance_m: float = 5e-6
    marks: bool = False
    mark_size_m: float = 20e-6
    mark_width_m: float = 2e-6
    label: str | None = None
    label_height_m: float = 2e-6
    cell: str = "DESIGN"
    layers: tuple[tuple[str, int, int], ...] = ()

    def layer_of(self, purpose: str, material: str | None = None) -> tuple[int, int]:
        """(layer, datatype) of a purpose (``pattern`` uses the material's entry)."""
        table = {k: (a, b) for k, a, b in self.layers}
        key = material if purpose == "pattern" else purpose
        return table.get(key, (self.layer, self.datatype))


def _layer_pair(r: TableReader, name: str) -> tuple[int, int]:
    value = r.raw(name)
    ok = (isinstance(value, list) and len(value) == 2
          and all(isinstance(v, int) and not isinstance(v, bool) and 0 <= v <= _MAX_LAYER
                  for v in value))
    if not ok:
        raise r.error(name, f"must be [layer, datatype], integers 0..{_MAX_LAYER}", value)
    return int(value[0]), int(value[1])


def parse_layout(table: dict, source: str, *, materials: tuple[str, ...] = ()) -> LayoutSettings:
    """Validate the raw ``[layout]`` table; SpecError names file, key and value.

    ``materials``: the sample's material names, accepted as keys of ``[layout.layers]``.
    """
    r = TableReader(table, "layout", source)
    d = LayoutSettings()
    pos = dict(minimum=0.0, exclusive_minimum=True)
    line = r.length("line_length_um", d.line_length_m, **pos)
    field = r.raw("field_um", None)
    if field is None:
        field_m = d.field_m
    elif isinstance(field, list):
        if len(field) != 2:
            raise r.error("field_um", "must be a number or a pair [x, y]", field)
        field_m = tuple(r.check_number("field_um", v, **pos) * 1e-6 for v in field)
    else:
        side = r.check_number("field_um", field, **pos) * 1e-6
        field_m = (side, side)
    layer = r.number("layer", d.layer, integer=True, minimum=0, maximum=_MAX_LAYER)
    datatype = r.number("datatype", d.datatype, integer=True, minimum=0, maximum=_MAX_LAYER)
    tone = r.string("tone", d.tone, choices=("keep", "remove"))
    dbu = r.length("dbu_nm", d.dbu_m, minimum=0.01, maximum=1000.0)
    width_at = r.string("tooth_width_at", d.tooth_width_at, choices=("base", "top", "mid"))
    margin = r.length("margin_um", d.margin_m, minimum=0.0)
    frame = r.boolean("frame", d.frame)
    frame_w = r.length("frame_width_um", d.frame_width_m, **pos)
    clearance = r.length("clearance_um", d.clearance_m, minimum=0.0)
    marks = r.boolean("marks", d.marks)
    mark_size = r.length("mark_size_um", d.mark_size_m, **pos)
    mark_w = r.length("mark_width_um", d.mark_width_m, **pos)
    if mark_w >= mark_size:
        raise r.error("mark_width_um", "must be smaller than mark_size_um", r.raw("mark_width_um"))
    label = r.string("label", None)
    if label is not None and (not label.strip() or not label.isascii()):
        raise r.error("label", "must be non-empty ASCII text", label)
    label_h = r.length("label_height_um", d.label_height_m, **pos)
    cell = r.string("cell", d.cell)
    if not cell or not cell.isascii() or any(c.isspace() for c in cell) or len(cell) > 32:
        raise r.error("cell", "must be 1-32 ASCII characters without spaces", cell)
    lr = r.subtable("layers")
    allowed = PURPOSES + tuple(materials)
    layers = []
    for key in lr.table:
        if key not in allowed:
            raise lr.error(key, "unknown key (known keys here: " + ", ".join(allowed) + ")",
                           lr.table[key])
        layers.append((key,) + _layer_pair(lr, key))
    lr.finish()
    r.finish()
    if (dbu_check := _off_grid(line, dbu)) is not None:
        raise r.error("line_length_um", f"is not a whole number of database units "
                      f"({dbu * 1e9:g} nm); nearest: {dbu_check:g}", r.raw("line_length_um"))
    return LayoutSettings(line, field_m, layer, datatype, tone, dbu, width_at, margin, frame,
                          frame_w, clearance, marks, mark_size, mark_w, label, label_h, cell,
                          tuple(layers))


def _off_grid(length_m: float, dbu_m: float) -> float | None:
    """None if ``length`` is a whole number of dbu, else the nearest such length in um."""
    n = length_m / dbu_m
    if abs(n - round(n)) <= 1e-6:
        return None
    return round(n) * dbu_m * 1e6


# ---------------------------------------------------------------------------------
# spec -> top view
# ---------------------------------------------------------------------------------
def top_view(spec, settings: LayoutSettings) -> geo.TopView:
    """The top view of a spec's sample; SpecError where the spec cannot give one."""
    p = spec.sample
    if getattr(p, "plane", None) is not None and p.plane.plane == "wafer":
        return wafer_top_view(spec, settings)
    if getattr(p, "freeform", None) is not None:
        return freeform_top_view(spec, settings)
    try:
        if spec.family == "grating":
            if spec.path.length_m is None:
                raise SpecError(spec.source, "path.length_um", "needed to export a grating "
                                "(the number of teeth is round(length / period))")
            n = geo.teeth_count(spec.path.length_m, p.period_m)
            if n < 1:
                raise SpecError(spec.source, "path.length_um", "shorter than half a period: "
                                "the grating would have no teeth", spec.path.length_m * 1e6)
            return geo.grating_top_view(p, n, settings.line_length_m,
                                        width_at=settings.tooth_width_at,
                                        margin_m=settings.margin_m)
        if spec.family == "membrane":
            if p.pattern != "slits" and settings.tone == "remove":
                raise SpecError(spec.source, "layout.tone", "an unpatterned membrane has "
                                "nothing to etch; the layout would be empty", "remove")
            return geo.membrane_top_view(p, settings.field_m, margin_m=settings.margin_m,
                                         electron_x_m=spec.path.x_m or 0.0)
    except geo.LayoutError as exc:
        key = "layout.field_um" if spec.family == "membrane" else "path.length_um"
        raise SpecError(spec.source, key, str(exc)) from None
    raise SpecError(spec.source, "sample.family", "has no lateral pattern to export "
                    "(a flat surface needs no lithography)", spec.family)


def freeform_pattern(spec):
    """(layout, region cells, binarized solid pattern) of a spec's free-form region on
    the grid its evaluation uses (the pattern holds every part, designer.families.region)."""
    from designer.evaluate import default_grid_step
    from designer.families import get_family, region

    family = get_family(spec.family)
    h = spec.solver.grid_step_m or default_grid_step(spec)
    lay = family.layout(spec.sample, spec.context, h)
    cells = region.region_cells(spec.sample.freeform, lay)
    return lay, cells, np.asarray(family.freeform_density(spec.sample, lay)) > 0.5


def _grating_periods(spec) -> int:
    if spec.path.length_m is None:
        raise SpecError(spec.source, "path.length_um", "needed to export a grating "
                        "(the number of periods is round(length / period))")
    n = geo.teeth_count(spec.path.length_m, spec.sample.period_m)
    if n < 1:
        raise SpecError(spec.source, "path.length_um", "shorter than half a period: "
                        "the grating would have no periods", spec.path.length_m * 1e6)
    return n


def freeform_top_view(spec, settings: LayoutSettings) -> geo.TopView:
    """Top view of a cross-section free-form grating or membrane (see designer.layout).

    The region must span the whole period and, in each of its etch steps, be columnar
    (designer.fabrication.freeform_findings says where it is not).  Each etch step is
    one lithography level: its solid columns are lines (grating, ``round(length /
    period)`` periods; a two-sided grating's upper side faces the lower one across the
    channel, as for parametric gratings), drawn on layer ``layer + step``.  Membrane
    (one step through the film): void columns are slits tiling the field.
    """
    from types import SimpleNamespace

    from designer.families import region

    p = spec.sample
    fr = p.freeform
    key = "sample.freeform"
    lay, cells, solid = freeform_pattern(spec)
    g = lay.grid
    if not cells.periodic_x:
        raise SpecError(spec.source, f"{key}.x_nm", "exporting a free-form region needs it "
                        "to span the whole period (x_nm from 0 to the period)",
                        [v * 1e9 for v in fr.x_m])
    blocks = region.split(fr, lay, solid)
    slabs = region.slab_rows(fr, lay)
    rows = []                      # (part index, step index, columns)
    for j, block in enumerate(blocks):
        for k, (a, b) in enumerate(slabs):
            slab = block[:, a:b]
            if (slab.any(axis=1) & ~slab.all(axis=1)).any():
                raise SpecError(spec.source, key, f"etch step {k + 1}: some pixel columns "
                                "change material within the step; one etch step can only "
                                "make columns that are solid or void all through")
            rows.append((j, k, slab[:, 0]))
    if spec.family == "grating":
        n = _grating_periods(spec)
        union_cols = np.zeros(g.nx, dtype=bool)
        for _, _, c in rows:
            union_cols |= c
        cut = geo.widest_void_centre(union_cols, g.dx)
        L = settings.line_length_m
        if p.sides == 1:
            y_of = {0: (-0.5 * L, 0.5 * L)}
        else:
            y_of = {0: (-0.5 * p.gap_m - L, -0.5 * p.gap_m), 1: (0.5 * p.gap_m, 0.5 * p.gap_m + L)}
        levels = []
        for k in range(len(slabs)):
            polys = []
            for j, kk, c in rows:
                if kk != k:
                    continue
                if j not in y_of:
                    raise SpecError(spec.source, f"{key}.upper", "an upper region needs a "
                                    "two-sided grating", fr.upper)
                polys += geo.periodic_lines(c, g.dx, n, cut, y_of[j])
            levels.append(tuple(polys))
        if p.sides == 2 and fr.upper is None:
            # the parametric upper grating, drawn as parametric gratings are
            upper = geo.grating_top_view(p, n, L, width_at=settings.tooth_width_at)
            ups = [q for q in upper.keep if q[:, 1].min() >= 0.5 * p.gap_m * (1 - 1e-9)]
            levels[0] = tuple(geo.union(list(levels[0]) + ups))
        P = p.period_m
        ys = [v for r in y_of.values() for v in r]
        # the period window starts and ends mid-void; grow that half void to a full one
        void = _widest_void(union_cols) * g.dx
        frame = geo.grow((-0.5 * n * P - 0.5 * void, min(ys), 0.5 * n * P + 0.5 * void,
                          max(ys)), settings.margin_m)
        z_lo, z_hi = g.z0 + cells.k0 * g.dz, g.z0 + cells.k1 * g.dz
        sides = "two-sided " if p.sides == 2 else ""
        kind = (f"free-form {sides}grating, {n} periods, {len(slabs)} etch step(s) over "
                f"{(z_hi - z_lo) * 1e9:.4g} nm")
        return geo.TopView(levels[0], frame, kind,
                           levels=tuple(levels) if len(levels) > 1 else ())
    # membrane: the region must go through the film, its void columns are slits
    z_lo, z_hi = g.z0 + cells.k0 * g.dz, g.z0 + cells.k1 * g.dz
    half = 0.5 * g.dz
    if z_lo > half or z_hi < p.thickness_m - half or len(slabs) != 1:
        raise SpecError(spec.source, f"{key}.z_nm", "exporting a free-form membrane needs "
                        f"the region to span the film (z from 0 to "
                        f"{p.thickness_m * 1e9:.4g} nm) in one etch step",
                        [v * 1e9 for v in fr.z_m])
    columns = rows[0][2]
    if columns.all():
        raise SpecError(spec.source, key, "the free-form pattern has no slits; the layout "
                        "would be the bare film")
    runs, _ = geo.column_runs(~columns, g.dx)
    P = g.size_x
    slits = SimpleNamespace(pattern="slits", period_m=P,
                            slit_widths_m=tuple(b - a for a, b in runs),
                            slit_centers_m=tuple((0.5 * (a + b)) % P for a, b in runs))
    try:
        return geo.membrane_top_view(slits, settings.field_m, margin_m=settings.margin_m,
                                     electron_x_m=spec.path.x_m or 0.0)
    except geo.LayoutError as exc:
        raise SpecError(spec.source, "layout.field_um", str(exc)) from None


def _period_pieces(polys_nm, period_m: float, x_cut_m: float, z_lo_m: float,
                   z_hi_m: float) -> list[np.ndarray]:
    """The parts of one period window ``[x_cut, x_cut + P)`` of a band, in metres.

    The periodic pattern (five periods of ``polys_nm`` joined) is split into connected
    parts; a part narrower than a period is kept whole by the period that holds the
    centre of its bounding box (each part of the infinite pattern belongs to exactly
    one period, so the repeated windows rebuild it, and the two ends of the row hold
    whole parts, never a sliver cut off at the window's edge, even where a part is
    wider than a period); a part joined to its own copies (a continuous rail, spanning
    all five periods) is cut to the window."""
    import gdstk

    P = period_m * 1e9
    x0, z0, z1 = x_cut_m * 1e9, z_lo_m * 1e9, z_hi_m * 1e9
    ks = range(math.floor(x0 / P) - 3, math.ceil(x0 / P) + 4)    # copies cover the band
    moved = [q + np.array([k * P, 0.0]) for k in ks for q in polys_nm]
    band = geo.rectangle(x0 - 2 * P, z0, x0 + 3 * P, z1)
    parts = gdstk.boolean(moved, [band], "and", precision=1e-4)
    window = geo.rectangle(x0, z0, x0 + P, z1)
    out = []
    for part in parts:
        pts = np.asarray(part.points)
        lo, hi = pts[:, 0].min(), pts[:, 0].max()
        if hi - lo >= 4.5 * P:         # joined to its own copies: a rail
            out += [np.asarray(x.points) * 1e-9 for x in
                    gdstk.boolean([pts], [window], "and", precision=1e-4)]
        elif math.floor((0.5 * (lo + hi) - x0) / P + 1e-9) == 0:   # ties: one copy
            out.append(pts * 1e-9)
    return out


def _row_bands(mask: np.ndarray) -> list[tuple[int, int, np.ndarray]]:
    """Bands ``[k_lo, k_hi)`` of consecutive rows holding material (not every row of a
    band is a full slab), with the columns that hold material anywhere in the band;
    rows of full slab or of no material separate bands (slab rows join a band of
    their own, whose cut does not matter)."""
    rows = mask.any(axis=0)
    out, k = [], 0
    nz = mask.shape[1]
    while k < nz:
        if not rows[k]:
            k += 1
            continue
        full = mask[:, k].all()
        j = k
        while j < nz and rows[j] and mask[:, j].all() == full:
            j += 1
        out.append((k, j, mask[:, k:j].any(axis=1)))
        k = j
    return out


def _widest_void(columns) -> int:
    cols = np.asarray(columns, dtype=bool)
    if cols.all():
        return 0
    if not cols.any():
        return cols.size
    rolled = np.roll(~cols, -int(np.argmax(cols)))      # start on a solid column
    d = np.diff(np.concatenate([[0], rolled.astype(np.int8), [0]]))
    return int((np.nonzero(d == -1)[0] - np.nonzero(d == 1)[0]).max())


def wafer_top_view(spec, settings: LayoutSettings) -> geo.TopView:
    """Top view of a wafer-plane sample: the simulated polygons themselves.

    The simulated plane is the chip surface, so the cross-section polygons of one
    period (family polygons, free-form pixels traced exactly) are drawn with x -> x and
    z -> y, clipped to the simulated domain inside the PML (semi-infinite parts end
    there), and repeated ``round(length / period)`` times along x, centred on x = 0.
    Each row band (consecutive grid rows holding material, e.g. each of two facing
    rows) gets its own period window, started in its widest column without material,
    and keeps whole parts (:func:`_period_pieces`), so no pillar is cut at the ends
    (``row_bands`` in the summary: where each band's simulated x = 0 lands).  The frame
    is the simulated domain: with tone ``remove`` everything simulated as vacuum is
    etched.
    """
    from designer.evaluate import default_grid_step
    from designer.families import get_family

    p = spec.sample
    family = get_family(spec.family)
    h = spec.solver.grid_step_m or default_grid_step(spec)
    lay = family.layout(p, spec.context, h)
    g = lay.grid
    P = lay.period_m
    n = _grating_periods(spec)
    z_lo = g.z0 + lay.pml_cells_z * g.dz
    z_hi = g.z0 + (g.nz - lay.pml_cells_z) * g.dz
    n_pml = lay.pml_cells_z
    mask = np.asarray(lay.material_mask, dtype=bool)[:, n_pml:g.nz - n_pml]
    polys = [np.asarray(q.vertices_m) * 1e9 for q in family.polygons(p, spec.context, lay)]
    x_first = -0.5 * n * P
    keep, origins = [], []
    # each row band (consecutive grid rows holding a pattern) gets its own period window,
    # started in its widest column without material, so no row is cut through a pillar
    for k_lo, k_hi, cols in _row_bands(mask):
        free = ~cols
        cut = geo.widest_void_centre(cols, g.dx) if free.any() else 0.0
        x_cut = g.x0 + cut
        zb_lo = z_lo + k_lo * g.dz if k_lo > 0 else z_lo
        zb_hi = z_lo + k_hi * g.dz if k_hi < mask.shape[1] else z_hi
        pieces = _period_pieces(polys, P, x_cut, zb_lo, zb_hi)
        keep += [q + np.array([x_first - x_cut + k * P, 0.0]) for k in range(n) for q in pieces]
        if not cols.all():                  # full slabs: their window does not matter
            origins.append(((x_first - x_cut, 0.0), (zb_lo, zb_hi)))
    keep = geo.union(keep)
    frame = geo.grow((x_first, z_lo, -x_first, z_hi), settings.margin_m)
    free_text = " with a free-form pattern" if getattr(p, "freeform", None) is not None else ""
    kind = (f"wafer-plane {'two' if p.sides == 2 else 'one'}-row structure{free_text}, "
            f"{n} periods, etched through {p.plane.device_layer_m * 1e9:.4g} nm")
    return geo.TopView(tuple(keep), frame, kind, path_y_m=lay.path.z_m,
                       origin_m=origins[0][0] if origins else (x_first, 0.0),
                       band_origins_m=tuple(origins))


# ---------------------------------------------------------------------------------
# what is drawn
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class Drawing:
    """Everything that goes into the file, in metres, snapped to the database unit.

    ``shapes``: ``(purpose, layer, datatype, polygons)``; the purpose ``pattern`` is the
    sample itself.  ``info_at``: where the provenance text sits.
    """

    shapes: tuple[tuple[str, int, int, tuple[np.ndarray, ...]], ...]
    info_at: tuple[float, float]
    info_layer: tuple[int, int]

    def polygons(self, purpose: str | None = None) -> list[np.ndarray]:
        return [p for name, _, _, polys in self.shapes for p in polys
                if purpose is None or name == purpose]


def decoration_polygons(view: geo.TopView, s: LayoutSettings) -> dict[str, list[np.ndarray]]:
    """Frame ring, corner marks and label, each ``clearance`` clear of what is inside."""
    out: dict[str, list[np.ndarray]] = {}
    box = view.frame
    if s.frame:
        inner = geo.grow(box, s.clearance_m)
        out["frame"] = geo.frame_ring(inner, s.frame_width_m)
        box = geo.grow(inner, s.frame_width_m)
    if s.marks:
        out["marks"] = geo.corner_marks(box, s.clearance_m, s.mark_size_m, s.mark_width_m)
        box = geo.grow(box, s.clearance_m + s.mark_size_m)
    if s.label:
        out["label"] = geo.text_polygons(s.label, s.label_height_m,
                                         (box[0], box[1] - s.clearance_m - s.label_height_m))
    return out


def build_drawing(view: geo.TopView, s: LayoutSettings, material: str) -> Drawing:
    """The pattern (one layer per lithography level: ``layer``, ``layer + 1``, ...) and
    the decorations, snapped to the database unit."""
    shapes = []
    layer, datatype = s.layer_of("pattern", material)
    for j, v in enumerate(view.level_views()):
        pattern = list(v.keep) if s.tone == "keep" else geo.complement(v)
        shapes.append(("pattern", layer + j, datatype, tuple(geo.snap(pattern, s.dbu_m))))
    for purpose, polys in decoration_polygons(view, s).items():
        shapes.append((purpose,) + s.layer_of(purpose) + (tuple(geo.snap(polys, s.dbu_m)),))
    return Drawing(tuple(shapes), (view.frame[0], view.frame[1]), s.layer_of("info"))


# ---------------------------------------------------------------------------------
# design-rule check
# ---------------------------------------------------------------------------------
def rule_check(spec, view: geo.TopView | None = None, s: LayoutSettings | None = None
               ) -> list[Finding]:
    """Every violation of ``spec.fabrication`` by the sample and its top view: the one
    check every command reports (designer.fabrication.check_design)."""
    from designer.fabrication import check_design

    return list(check_design(spec).findings)


def layout_rule_check(view: geo.TopView, s: LayoutSettings, rules) -> list[Finding]:
    """Width/space of the physical material for the tone, write field, decorations."""
    out = []
    views = view.level_views()
    for j, v in enumerate(views):
        level = f" (level {j + 1} of {len(views)})" if len(views) > 1 else ""
        for rule, find, limit, word in (("min_feature", geo.thin_material,
                                         rules.min_feature_m, "material"),
                                        ("min_gap", geo.thin_openings, rules.min_gap_m,
                                         "opening")):
            for part in find(v, s.tone, limit):
                out.append(Finding("layout", rule, part.size_m, limit, part.center_m,
                                   f"{word}{level} of {part.area_m2 * 1e12:.4g} µm²"))
    x0, y0, x1, y1 = view.frame
    extent = max(x1 - x0, y1 - y0)
    if extent > rules.write_field_m * (1 + 1e-9):
        out.append(Finding("layout", "write_field", extent, rules.write_field_m,
                           (0.5 * (x0 + x1), 0.5 * (y0 + y1)),
                           f"pattern frame {(x1 - x0) * 1e6:.4g} x {(y1 - y0) * 1e6:.4g} µm "
                           "(larger than one write field: stitching)"))
    decorated = s.frame or s.marks or bool(s.label)
    if decorated and rules.min_gap_m > 0 and s.clearance_m < rules.min_gap_m * (1 - 1e-9):
        out.append(Finding("layout", "min_gap", s.clearance_m, rules.min_gap_m, (x0, y0),
                           "clearance_um between pattern and frame/marks/label"))
    widths = [("frame_width_um", s.frame_width_m, s.frame), ("mark_width_um", s.mark_width_m,
                                                             s.marks)]
    for key, w, used in widths:
        if used and rules.min_feature_m > 0 and w < rules.min_feature_m * (1 - 1e-9):
            out.append(Finding("layout", "min_feature", w, rules.min_feature_m, (x0, y0), key))
    return out


# ---------------------------------------------------------------------------------
# writing
# ---------------------------------------------------------------------------------
def provenance_items(spec_sha256: str, spec_name: str) -> dict:
    from designer.provenance import version

    return {"version": version(), "spec_sha256": spec_sha256,
            "date": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "spec": spec_name}


def provenance_text(items: dict) -> str:
    return (f"velomatch {items['version']} spec_sha256={items['spec_sha256']} "
            f"date={items['date']} spec={items['spec']}")


def make_library(drawing: Drawing, s: LayoutSettings, items: dict, fmt: str):
    """A gdstk Library with one flat top cell (user unit 1 um, precision = dbu)."""
    import gdstk

    lib = gdstk.Library("VELOMATCH", unit=_USER_UNIT_M, precision=s.dbu_m)
    cell = lib.new_cell(s.cell)
    scale = 1.0 / _USER_UNIT_M
    for _purpose, layer, datatype, polys in drawing.shapes:
        for p in polys:
            cell.add(gdstk.Polygon(np.asarray(p) * scale, layer=layer, datatype=datatype))
    add_provenance(lib, cell, items, fmt, (drawing.info_at[0] * scale,
                                           drawing.info_at[1] * scale), drawing.info_layer)
    return lib


def add_provenance(lib, cell, items: dict, fmt: str, at, layer) -> None:
    """The provenance label (text, with the spec hash, version and date as GDSII
    properties) at ``at`` on ``layer = (layer, texttype)``; OASIS files also carry them
    as library properties."""
    import gdstk

    lab = gdstk.Label(provenance_text(items), at, anchor="sw", layer=layer[0],
                      texttype=layer[1])
    lab.set_gds_property(1, items["spec_sha256"])
    lab.set_gds_property(2, items["version"])
    lab.set_gds_property(3, items["date"])
    cell.add(lab)
    if fmt == "oasis":
        lib.set_property("velomatch_spec_sha256", items["spec_sha256"])
        lib.set_property("velomatch_version", items["version"])
        lib.set_property("velomatch_date", items["date"])


def _atomic(path: Path, write) -> None:
    """Call ``write(tmp_path)`` on a temporary file beside ``path``, then rename."""
    with vio.atomic_path(path) as tmp:
        write(tmp)


def write_layout(path: str | os.PathLike, drawing: Drawing, s: LayoutSettings, items: dict,
                 fmt: str) -> Path:
    """Write GDSII (``fmt = "gds"``) or OASIS atomically."""
    path = Path(path)
    lib = make_library(drawing, s, items, fmt)
    if fmt == "gds":
        _atomic(path, lambda tmp: lib.write_gds(tmp))
    else:
        _atomic(path, lambda tmp: lib.write_oas(tmp))
    return path


def write_preview(path: str | os.PathLike, drawing: Drawing, view: geo.TopView,
                  s: LayoutSettings) -> Path:
    """SVG or PNG picture (by suffix): pattern, decorations, frame, electron path."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.collections import PolyCollection

    fig, ax = plt.subplots(figsize=(7, 5))
    colours = {"pattern": "#5b6f82", "frame": "#9aa5b0", "marks": "#8a7a5a", "label": "#444444"}
    for purpose, layer, datatype, polys in drawing.shapes:
        if polys:
            ax.add_collection(PolyCollection([p * 1e6 for p in polys], closed=True,
                                             facecolors=colours[purpose], edgecolors="none",
                                             label=f"{purpose} ({layer}/{datatype})"))
    x0, y0, x1, y1 = (v * 1e6 for v in view.frame)
    ax.plot([x0, x1, x1, x0, x0], [y0, y0, y1, y1, y0], ls=":", lw=0.8, color="k",
            label="pattern frame")
    from designer.drawing import ELECTRON

    if view.crossing_x_m is None:
        ax.annotate("", xy=(x1, view.path_y_m * 1e6), xytext=(x0, view.path_y_m * 1e6),
                    arrowprops=dict(arrowstyle="-|>", color=ELECTRON, lw=2.0))
        ax.plot([], [], color=ELECTRON, lw=2.0, label="electron path")
    else:
        ax.plot([view.crossing_x_m * 1e6], [0.0], marker="o", ms=7, mfc="none", mew=2.0,
                color=ELECTRON, ls="none", label="electron crosses the film")
    bx = geo.bounding_box(drawing.polygons() + [geo.rectangle(*view.frame)])
    pad = 0.05 * max(bx[2] - bx[0], bx[3] - bx[1]) * 1e6
    ax.set_xlim(bx[0] * 1e6 - pad, bx[2] * 1e6 + pad)
    ax.set_ylim(bx[1] * 1e6 - pad, bx[3] * 1e6 + pad)
    ax.set_aspect("equal")
    ax.set_xlabel("x (µm)")
    ax.set_ylabel("y (µm)")
    ax.set_title(f"{view.kind}; tone '{s.tone}'", fontsize=10)
    ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=7, framealpha=0.85)
    return vio.save_figure(fig, path)


# ---------------------------------------------------------------------------------
# summary and command
# ---------------------------------------------------------------------------------
def summary(drawing: Drawing, view: geo.TopView, s: LayoutSettings, findings, *,
            file: str | None, fmt: str, written: bool, ignored: bool, preview: str | None,
            items: dict) -> dict:
    pattern = drawing.polygons("pattern")
    every = drawing.polygons()
    return {
        "file": file, "format": fmt, "written": written, "rules_ignored": ignored,
        "sample": view.kind, "tone": s.tone,
        "layer": [[x[1], x[2]] for x in drawing.shapes if x[0] == "pattern"][0],
        "pattern_layers": [{"layer": [x[1], x[2]], "polygons": len(x[3]),
                            "area_m2": float(sum(geo.polygon_area(q) for q in x[3]))}
                           for x in drawing.shapes if x[0] == "pattern"],
        "origin_m": list(view.origin_m) if view.origin_m is not None else None,
        "row_bands": [{"origin_m": list(o), "y_m": list(y)} for o, y in view.band_origins_m],
        "polygons": len(pattern), "polygons_total": len(every),
        "area_m2": float(sum(geo.polygon_area(p) for p in pattern)),
        "bbox_m": list(geo.bounding_box(pattern)) if pattern else None,
        "bbox_total_m": list(geo.bounding_box(every)) if every else None,
        "frame_m": list(view.frame), "dbu_m": s.dbu_m,
        "drawn_widths_m": {name: w for name, w in view.widths_m},
        "violations": [f.to_dict() for f in findings],
        "preview": preview, "provenance": items,
    }


def _format_of(out: Path, given: str | None) -> str:
    if given:
        return given
    fmt = FORMATS.get(out.suffix.lower())
    if fmt is None:
        raise UsageError(f"--out {out}: cannot tell the format from the suffix "
                         f"{out.suffix!r}; use .gds or .oas, or pass --format")
    return fmt


def _check_outputs(out: Path, preview: Path | None, overwrite: bool, inputs=()) -> None:
    """Both outputs are checked before anything is written (an export never leaves a
    layout without its preview because the preview's path was bad)."""
    vio.check_output(out, flag="--out", overwrite=overwrite, inputs=inputs)
    if preview is not None:
        vio.check_output(preview, flag="--preview", overwrite=overwrite, inputs=inputs,
                         suffixes=(".svg", ".png"))
    vio.check_distinct([("--out", out), ("--preview", preview)])


def _text_report(summ: dict, findings) -> str:
    lines = []
    if summ["written"]:
        word = {"gds": "GDSII", "oasis": "OASIS"}[summ["format"]]
        lines.append(f"wrote {summ['file']} ({word}): {summ['sample']}, tone "
                     f"'{summ['tone']}'")
    lines.append(f"  pattern: {summ['polygons']} polygons on layer "
                 f"{summ['layer'][0]}/{summ['layer'][1]}, area {summ['area_m2'] * 1e12:.6g} µm²")
    if summ["bbox_m"]:
        b = [v * 1e6 for v in summ["bbox_m"]]
        lines.append(f"  bounding box: x {b[0]:.4f} .. {b[2]:.4f} µm, y {b[1]:.4f} .. "
                     f"{b[3]:.4f} µm")
    if findings:
        lines.append(f"  {len(findings)} design-rule violation(s), ignored (--ignore-rules)")
        lines += ["    " + f.message for f in findings[:_TEXT_LIMIT]]
        if len(findings) > _TEXT_LIMIT:
            lines.append(f"    ... and {len(findings) - _TEXT_LIMIT} more (see --json)")
    if summ["preview"]:
        lines.append(f"  preview: {summ['preview']}")
    return "\n".join(lines)


def export_command(args) -> int:
    """``velomatch export``: spec -> DRC gate -> GDSII/OASIS (+ preview); exit code.

    0 written; 2 bad spec or usage (SpecError/UsageError, raised); 3 design-rule
    violations without ``--ignore-rules`` (DesignRuleError, raised, nothing written).
    """
    from designer.spec import load_spec

    out = Path(args.out)
    preview = Path(args.preview) if getattr(args, "preview", None) else None
    fmt = _format_of(out, getattr(args, "format", None))
    overwrite = bool(getattr(args, "overwrite", False))
    ignore = bool(getattr(args, "ignore_rules", False))
    _check_outputs(out, preview, overwrite)
    spec = load_spec(args.spec)
    if getattr(spec.sample, "holes", None) is not None:  # lattice of holes: array references
        from designer.hole_export import export_holes

        return export_holes(args, spec, out, preview, fmt)
    from designer.fabrication import check_design
    from designer.spec import input_files

    _check_outputs(out, preview, overwrite, input_files(spec))
    material = spec.sample.material.name
    materials = tuple(dict.fromkeys(
        [material] + ([spec.sample.freeform.material.name]
                      if getattr(spec.sample, "freeform", None) is not None else [])))
    settings = parse_layout(spec.layout, spec.source, materials=materials)
    verdict = check_design(spec)
    findings = list(verdict.findings)
    items = provenance_items(spec.sha256, Path(spec.source).name)
    as_json = bool(getattr(args, "json", False))
    if findings and not ignore:
        try:
            view = top_view(spec, settings)
            drawing = build_drawing(view, settings, material)
        except SpecError:
            view = drawing = None         # the violations say why it cannot be drawn
        if as_json:
            summ = summary(drawing, view, settings, findings, file=None, fmt=fmt,
                           written=False, ignored=False, preview=None, items=items) \
                if drawing is not None else {"written": False, "violations":
                                             [f.to_dict() for f in findings]}
            print(vio.dumps(summ))
        for f in findings[:_TEXT_LIMIT]:
            print("velomatch export: " + f.message, file=sys.stderr)
        if len(findings) > _TEXT_LIMIT:
            print(f"velomatch export: ... and {len(findings) - _TEXT_LIMIT} more "
                  "(see --json)", file=sys.stderr)
        raise DesignRuleError(f"{len(findings)} design-rule violation(s); nothing written "
                              "(pass --ignore-rules to write anyway)")
    view = top_view(spec, settings)
    drawing = build_drawing(view, settings, material)
    if preview is None:
        write_layout(out, drawing, settings, items, fmt)
    else:
        # the preview is renamed into place only once the layout is written
        with vio.atomic_path(preview) as tmp_preview:
            write_preview(tmp_preview, drawing, view, settings)
            write_layout(out, drawing, settings, items, fmt)
    summ = summary(drawing, view, settings, findings, file=str(out), fmt=fmt, written=True,
                   ignored=bool(findings), preview=str(preview) if preview else None,
                   items=items)
    print(vio.dumps(summ) if as_json else _text_report(summ, findings))
    return 0
