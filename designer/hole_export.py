"""Hole lattices to GDSII/OASIS with array references (``velomatch export`` of a hole
membrane).

Layout
    One cell ``<cell>_HOLE`` holds a single hole polygon (a regular N-gon, or an
    N-gon ellipse, with N chosen so the polygon departs from the true edge by less than
    one database unit and its radius scaled so its area equals the hole's:
    r_N = r sqrt(2 pi / (N sin(2 pi / N)))).  The top cell places it on the lattice
    with array references: a square lattice is one columns x rows array of pitch P;
    a hexagonal lattice two arrays of pitch (P, P sqrt(3)), the second shifted by
    (P/2, P sqrt(3)/2), so the field stays rectangular.  The file grows with the
    number of cells, not of holes: an array of any size is one record.
    The polygons are the holes (what is etched through the film): ``[layout] tone``
    must be "remove" (or absent).  Field: ``[layout] field_um`` (number or [x, y]),
    centred on the origin; only whole holes inside it are placed.

Design-rule check before anything is written, as for every export: the family's
features (hole diameter against ``min_gap_nm``, the narrowest wall between holes
against ``min_feature_nm``, film thickness, thickness over the narrower of hole and
wall against ``max_aspect_ratio``), the allowed materials and the write field.
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np

from designer import io as vio
from designer.errors import SpecError


def polygon_sides(radius_m: float, dbu_m: float, minimum: int = 16) -> int:
    """Sides N of a polygon within one dbu of a circle: r (1 - cos(pi/N)) <= dbu."""
    if radius_m <= dbu_m:
        return minimum
    return max(minimum, int(math.ceil(math.pi / math.acos(1.0 - dbu_m / radius_m))))


def hole_polygon(semi_axes_m, angle_rad: float, dbu_m: float) -> np.ndarray:
    """Vertices (N, 2) in m of an equal-area polygon of the elliptic hole at the origin."""
    a, b = semi_axes_m
    n = polygon_sides(max(a, b), dbu_m)
    scale = math.sqrt(2.0 * math.pi / (n * math.sin(2.0 * math.pi / n)))
    t = np.arange(n) * 2.0 * math.pi / n
    u, v = scale * a * np.cos(t), scale * b * np.sin(t)
    c, s = math.cos(angle_rad), math.sin(angle_rad)
    return np.stack([u * c - v * s, u * s + v * c], axis=1)


def placements(holes, field_m) -> list[tuple[tuple[float, float], int, int, tuple[float, float]]]:
    """Array references ``(origin, columns, rows, (pitch_x, pitch_y))`` (m) filling the
    field (centred on 0) with whole holes."""
    fx, fy = field_m
    P = holes.period_m
    reach = max(holes.semi_axes_m)
    py = P if holes.lattice == "square" else P * math.sqrt(3.0)
    shifts = [(0.0, 0.0)] if holes.lattice == "square" else [(0.0, 0.0), (0.5 * P, 0.5 * py)]
    out = []
    for sx, sy in shifts:
        # centres c = shift + (i P, j py) with |c| + reach inside the half field
        i_lo = math.ceil((-0.5 * fx + reach - sx) / P - 1e-9)
        i_hi = math.floor((0.5 * fx - reach - sx) / P + 1e-9)
        j_lo = math.ceil((-0.5 * fy + reach - sy) / py - 1e-9)
        j_hi = math.floor((0.5 * fy - reach - sy) / py + 1e-9)
        cols, rows = i_hi - i_lo + 1, j_hi - j_lo + 1
        if cols > 0 and rows > 0:
            out.append(((sx + i_lo * P, sy + j_lo * py), cols, rows, (P, py)))
    return out


def write_field_findings(spec) -> list:
    """The hole field (``[layout] field_um``) against the write field."""
    from designer.export import Finding, parse_layout

    settings = parse_layout(spec.layout, spec.source, materials=(spec.sample.material.name,))
    rules = spec.fabrication
    fx, fy = settings.field_m
    if max(fx, fy) > rules.write_field_m * (1 + 1e-9):
        return [Finding("layout", "write_field", max(fx, fy), rules.write_field_m,
                        (0.0, 0.0), f"hole field {fx * 1e6:.4g} x {fy * 1e6:.4g} um "
                        "(larger than one write field: stitching)")]
    return []


def hole_findings(spec, settings) -> list:
    """Design-rule findings of a hole membrane (module docstring): the verdict every
    command reports (designer.fabrication.check_design), plus the extra layers'
    materials."""
    from designer.export import Finding
    from designer.fabrication import check_design, check_materials

    out = list(check_design(spec).findings)
    names = [m.name for m, _ in spec.sample.layers_below + spec.sample.layers_above]
    out += [Finding("cross-section", v.rule, v.measured_m, v.limit_m, v.location,
                    v.description) for v in check_materials(names, spec.fabrication)]
    return out


def make_hole_library(spec, settings, items: dict, fmt: str):
    """gdstk Library: the hole cell and a top cell of array references."""
    import gdstk

    from designer.export import _USER_UNIT_M, add_provenance

    h = spec.sample.holes
    um = 1.0 / _USER_UNIT_M
    lib = gdstk.Library("VELOMATCH", unit=_USER_UNIT_M, precision=settings.dbu_m)
    hole = lib.new_cell(f"{settings.cell}_HOLE")
    layer, datatype = settings.layer_of("pattern", spec.sample.material.name)
    hole.add(gdstk.Polygon(hole_polygon(h.semi_axes_m, h.angle_rad, settings.dbu_m) * um,
                           layer=layer, datatype=datatype))
    top = lib.new_cell(settings.cell)
    for origin, cols, rows, pitch in placements(h, settings.field_m):
        top.add(gdstk.Reference(hole, (origin[0] * um, origin[1] * um), columns=cols,
                                rows=rows, spacing=(pitch[0] * um, pitch[1] * um)))
    fx, fy = settings.field_m
    info = settings.layer_of("info")
    add_provenance(lib, top, items, fmt, (-0.5 * fx * um, -0.5 * fy * um - 1.0), info)
    return lib


def _preview(path: Path, spec, settings) -> None:
    """A few lattice cells around the field centre (the whole field would be a grey box)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.collections import PolyCollection

    h = spec.sample.holes
    poly = hole_polygon(h.semi_axes_m, h.angle_rad, settings.dbu_m)
    span = 3.0 * h.period_m
    polys = []
    for origin, cols, rows, (px, py) in placements(h, (2 * span, 2 * span)):
        for i in range(cols):
            for j in range(rows):
                polys.append((poly + (origin[0] + i * px, origin[1] + j * py)) * 1e9)
    fig, ax = plt.subplots(figsize=(5, 5))
    ax.add_collection(PolyCollection(polys, facecolors="#2f6fb0", edgecolors="none",
                                     label="holes (etched)"))
    ax.set_xlim(-span * 1e9, span * 1e9)
    ax.set_ylim(-span * 1e9, span * 1e9)
    ax.set_aspect("equal")
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    fx, fy = settings.field_m
    ax.set_title(f"{h.lattice} lattice, P = {h.period_m * 1e9:.4g} nm (centre of the "
                 f"{fx * 1e6:.4g} x {fy * 1e6:.4g} um field)")
    ax.legend(loc="upper right", fontsize=8)
    vio.save_figure(fig, path)
    plt.close(fig)


def export_holes(args, spec, out: Path, preview: Path | None, fmt: str) -> int:
    """The export of a hole membrane (called by ``designer.export.export_command``)."""
    from designer.export import DesignRuleError, _atomic, parse_layout, provenance_items

    if spec.layout.get("tone", "remove") != "remove":
        raise SpecError(spec.source, "layout.tone", 'a hole lattice is drawn as the holes '
                        'to etch through the film: use tone = "remove"',
                        spec.layout.get("tone"))
    material = spec.sample.material.name
    settings = parse_layout(spec.layout, spec.source, materials=(material,))
    findings = hole_findings(spec, settings)
    items = provenance_items(spec.sha256, Path(spec.source).name)
    h = spec.sample.holes
    refs = placements(h, settings.field_m)
    count = sum(c * r for _, c, r, _ in refs)
    poly = hole_polygon(h.semi_axes_m, h.angle_rad, settings.dbu_m)
    summ = {"sample": f"membrane with {h.lattice} holes", "format": fmt, "tone": "remove",
            "holes": count, "array_references": len(refs),
            "hole_vertices": int(poly.shape[0]), "period_m": h.period_m,
            "semi_axes_m": list(h.semi_axes_m), "field_m": list(settings.field_m),
            "layer": list(settings.layer_of("pattern", material)),
            "findings": [f.to_dict() for f in findings], "written": False, "file": None,
            "preview": None, "provenance": items}
    as_json = bool(getattr(args, "json", False))
    if findings and not getattr(args, "ignore_rules", False):
        if as_json:
            print(vio.dumps(summ))
        for f in findings:
            print("velomatch export: " + f.message, file=sys.stderr)
        raise DesignRuleError(f"{len(findings)} design-rule violation(s); nothing written "
                              "(pass --ignore-rules to write anyway)")
    if count == 0:
        raise SpecError(spec.source, "layout.field_um", "the field holds no whole hole",
                        spec.layout.get("field_um"))
    lib = make_hole_library(spec, settings, items, fmt)
    _atomic(out, (lambda tmp: lib.write_gds(tmp)) if fmt == "gds" else
            (lambda tmp: lib.write_oas(tmp)))
    if preview is not None:
        _preview(preview, spec, settings)
    summ.update(written=True, file=str(out), file_bytes=out.stat().st_size,
                preview=str(preview) if preview else None)
    if as_json:
        print(vio.dumps(summ))
    else:
        word = {"gds": "GDSII", "oasis": "OASIS"}[fmt]
        print(f"wrote {out} ({word}): {count} holes in {len(refs)} array reference(s), "
              f"{out.stat().st_size} bytes")
        if findings:
            print(f"  {len(findings)} design-rule violation(s), ignored (--ignore-rules)")
            print("\n".join("    " + f.message for f in findings))
    return 0
