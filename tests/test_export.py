"""Layout export: geometry read back from the written file, design-rule gate, provenance.

Expected polygon counts, areas, bounding boxes and widths are closed-form consequences
of the spec and of the top-view conventions in designer/layout.py (common practice,
no source).  The files are read back by two readers: gdstk (the writer's own library)
and the KLayout Python package (an independent GDSII/OASIS implementation); KLayout's
own width and space checks (``Region.width_check`` / ``space_check``) are the
independent reference for the layout design-rule check.
"""

import json
import math

import gdstk
import klayout.db as kdb
import numpy as np
import pytest

from designer import layout as geo
from designer.cli import build_parser
from designer.errors import SpecError, UsageError
from designer.export import DesignRuleError, export_command

HEAD = """\
[beam]
voltage_kV = 30.0
[laser]
wavelength_nm = 800.0
"""

GRATING = HEAD + """\
[sample]
family = "grating"
material = "fused_silica"
period_nm = {period}
duty_cycle = {duty}
tooth_height_nm = 200.0
sidewall_angle_deg = {angle}
{extra}
[path]
length_um = {length}
[layout]
line_length_um = {line}
{layout}
[fabrication]
{fab}
"""

MEMBRANE = """\
[beam]
voltage_kV = 100.0
[laser]
wavelength_nm = 800.0
angle_deg = 20.0
[sample]
family = "membrane"
material = "silicon_nitride"
thickness_nm = 100.0
pattern = "slits"
period_nm = {period}
slit_widths_nm = {widths}
slit_centers_nm = {centers}
[path]
x_nm = 0.0
[layout]
field_um = {field}
{layout}
[fabrication]
{fab}
"""


def grating_spec(tmp_path, *, period=500.0, duty=0.3, angle=0.0, extra="", length=10.0,
                 line=10.0, layout="", fab="", name="g.toml"):
    p = tmp_path / name
    p.write_text(GRATING.format(period=period, duty=duty, angle=angle, extra=extra,
                                length=length, line=line, layout=layout, fab=fab))
    return p


def membrane_spec(tmp_path, *, period=800.0, widths="[250.0]", centers="[400.0]", field=20.0,
                  layout="", fab="", name="m.toml"):
    p = tmp_path / name
    p.write_text(MEMBRANE.format(period=period, widths=widths, centers=centers, field=field,
                                 layout=layout, fab=fab))
    return p


def run(spec, out, *extra, capsys=None):
    args = build_parser().parse_args(["export", str(spec), "--out", str(out), "--json",
                                      *extra])
    code = export_command(args)
    summary = json.loads(capsys.readouterr().out) if capsys is not None else None
    return code, summary


# ------------------------------------------------------------------------ readers
def read_gdstk(path, layer=1, datatype=0):
    lib = gdstk.read_oas(str(path)) if str(path).endswith(".oas") else gdstk.read_gds(str(path))
    (top,) = lib.top_level()
    polys = [p for p in top.polygons if (p.layer, p.datatype) == (layer, datatype)]
    scale = lib.unit                                    # user unit (m)
    boxes = [np.array(p.bounding_box()) * scale for p in polys]
    return {"lib": lib, "top": top, "count": len(polys),
            "area": sum(p.area() for p in polys) * scale ** 2,
            "boxes": boxes,
            "bbox": (min(b[0][0] for b in boxes), min(b[0][1] for b in boxes),
                     max(b[1][0] for b in boxes), max(b[1][1] for b in boxes))}


def read_klayout(path, layer=1, datatype=0):
    ly = kdb.Layout()
    ly.read(str(path))
    top = ly.top_cell()
    li = ly.find_layer(layer, datatype)
    dbu_m = ly.dbu * 1e-6
    shapes = [s for s in top.shapes(li).each() if s.is_polygon() or s.is_box()]
    boxes = [s.bbox() for s in shapes]
    region = kdb.Region(top.begin_shapes_rec(li))
    bb = region.bbox()
    texts = [s for li2 in ly.layer_indexes() for s in top.shapes(li2).each() if s.is_text()]
    return {"layout": ly, "count": len(shapes), "area": sum(s.area() for s in shapes) * dbu_m ** 2,
            "boxes": boxes, "dbu_m": dbu_m, "region": region, "texts": texts,
            "bbox": (bb.left * dbu_m, bb.bottom * dbu_m, bb.right * dbu_m, bb.top * dbu_m)}


def assert_box(measured, expected, dbu):
    assert np.allclose(measured, expected, rtol=0, atol=1.01 * dbu), (measured, expected)


# ------------------------------------------------------------------------ gratings
def test_single_sided_grating_read_back_by_two_readers(tmp_path, capsys):
    spec = grating_spec(tmp_path)
    out = tmp_path / "g.gds"
    code, s = run(spec, out, capsys=capsys)
    assert code == 0 and s["written"] and s["violations"] == []
    P, w, L, N = 500e-9, 150e-9, 10e-6, 20          # N = round(10 um / 500 nm)
    area = N * w * L
    bbox = (-N * P / 2 + (P - w) / 2, -L / 2, N * P / 2 - (P - w) / 2, L / 2)
    for got in (read_gdstk(out), read_klayout(out)):
        assert got["count"] == N
        assert got["area"] == pytest.approx(area, rel=1e-9)
        assert_box(got["bbox"], bbox, 1e-9)
    assert s["polygons"] == N and s["area_m2"] == pytest.approx(area, rel=1e-9)
    assert_box(s["bbox_m"], bbox, 1e-9)


def test_tooth_and_gap_widths_round_trip_to_the_database_unit(tmp_path, capsys):
    # non-integer nm widths: base width d P + h tan(a) = 229.05 + 200 tan(7 deg) nm
    P, d, h, a = 763.5e-9, 0.3, 200e-9, math.radians(7.0)
    spec = grating_spec(tmp_path, period=763.5, duty=d, angle=7.0, length=15.27)
    out = tmp_path / "w.gds"
    run(spec, out, capsys=capsys)
    w_base = d * P + h * math.tan(a)
    k = read_klayout(out)
    widths = np.array([b.width() for b in k["boxes"]]) * k["dbu_m"]
    lefts = np.sort([b.left for b in k["boxes"]]) * k["dbu_m"]
    assert len(widths) == round(15.27e-6 / P)
    assert np.all(np.abs(widths - w_base) <= k["dbu_m"])
    assert np.all(np.abs(np.diff(lefts) - P) <= k["dbu_m"])
    # the top width when asked for it
    spec2 = grating_spec(tmp_path, period=763.5, duty=d, angle=7.0, length=15.27,
                         layout='tooth_width_at = "top"', name="top.toml")
    run(spec2, tmp_path / "t.gds", capsys=capsys)
    k2 = read_klayout(tmp_path / "t.gds")
    w_top = d * P - h * math.tan(a)
    assert all(abs(b.width() * k2["dbu_m"] - w_top) <= k2["dbu_m"] for b in k2["boxes"])


def test_double_sided_grating_oasis_two_facing_arrays(tmp_path, capsys):
    extra = "sides = 2\ngap_nm = 350.0\nshift_nm = 120.0"
    spec = grating_spec(tmp_path, period=400.0, duty=0.5, extra=extra, length=8.0, line=4.0)
    out = tmp_path / "d.oas"
    code, s = run(spec, out, capsys=capsys)
    assert code == 0 and s["format"] == "oasis"
    P, w, L, g, sh, N = 400e-9, 200e-9, 4e-6, 350e-9, 120e-9, 20
    bbox = (-N * P / 2 + (P - w) / 2, -g / 2 - L, N * P / 2 - (P - w) / 2 + sh, g / 2 + L)
    for got in (read_gdstk(out), read_klayout(out)):
        assert got["count"] == 2 * N
        assert got["area"] == pytest.approx(2 * N * w * L, rel=1e-9)
        assert_box(got["bbox"], bbox, 1e-9)
    k = read_klayout(out)
    dbu = k["dbu_m"]
    lower = [b for b in k["boxes"] if b.top <= 0]
    upper = [b for b in k["boxes"] if b.bottom >= 0]
    assert len(lower) == len(upper) == N
    assert abs((min(b.bottom for b in upper) - max(b.top for b in lower)) * dbu - g) <= dbu
    shift = (min(b.left for b in upper) - min(b.left for b in lower)) * dbu
    assert abs(shift - sh) <= dbu


def test_remove_tone_writes_the_complement_in_the_frame(tmp_path, capsys):
    spec = grating_spec(tmp_path, layout='tone = "remove"')
    out = tmp_path / "r.gds"
    run(spec, out, capsys=capsys)
    P, w, L, N = 500e-9, 150e-9, 10e-6, 20
    for got in (read_gdstk(out), read_klayout(out)):
        # N - 1 gaps between the teeth and one full gap beyond each end tooth
        assert got["count"] == N + 1
        assert got["area"] == pytest.approx((N + 1) * (P - w) * L, rel=1e-9)
        half = N * P / 2 + (P - w) / 2
        assert_box(got["bbox"], (-half, -L / 2, half, L / 2), 1e-9)


# ------------------------------------------------------------------------ membranes
def test_slit_array_tiles_the_field(tmp_path, capsys):
    spec = membrane_spec(tmp_path, layout='tone = "remove"')
    out = tmp_path / "m.gds"
    code, s = run(spec, out, capsys=capsys)
    P, w, F = 800e-9, 250e-9, 20e-6
    n = 25                                        # floor(20 um / 800 nm)
    bbox = (-F / 2 + (P - w) / 2, -F / 2, F / 2 - (P - w) / 2, F / 2)
    for got in (read_gdstk(out), read_klayout(out)):
        assert got["count"] == n
        assert got["area"] == pytest.approx(n * w * F, rel=1e-9)
        assert_box(got["bbox"], bbox, 1e-9)
    # keep tone: the bars and two edge strips, the field minus the slits
    spec2 = membrane_spec(tmp_path, name="k.toml")
    run(spec2, tmp_path / "k.gds", capsys=capsys)
    for got in (read_gdstk(tmp_path / "k.gds"), read_klayout(tmp_path / "k.gds")):
        assert got["count"] == n + 1
        assert got["area"] == pytest.approx(F * F - n * w * F, rel=1e-9)
        assert_box(got["bbox"], (-F / 2, -F / 2, F / 2, F / 2), 1e-9)


def test_slit_widths_round_trip_two_slits_per_period(tmp_path, capsys):
    spec = membrane_spec(tmp_path, period=900.0, widths="[200.4, 120.7]",
                         centers="[200.0, 610.0]", field=[9.0, 3.0], layout='tone = "remove"')
    out = tmp_path / "s.gds"
    run(spec, out, capsys=capsys)
    k = read_klayout(out)
    dbu = k["dbu_m"]
    boxes = sorted(k["boxes"], key=lambda b: b.left)
    assert len(boxes) == 20                        # 10 periods x 2 slits
    for j, b in enumerate(boxes):
        expected = (200.4e-9, 120.7e-9)[j % 2]
        assert abs(b.width() * dbu - expected) <= dbu
        assert abs(b.height() * dbu - 3e-6) <= dbu
    centres = np.array([0.5 * (b.left + b.right) for b in boxes]) * dbu
    # slit j of period k at -n P / 2 + k P + c_j
    expect = np.sort([-4.5e-6 + k * 900e-9 + c for k in range(10) for c in (200e-9, 610e-9)])
    assert np.all(np.abs(centres - expect) <= dbu)


# ------------------------------------------------------------------------ design rules
def test_planted_tooth_violation_refuses_and_override_writes(tmp_path, capsys):
    spec = grating_spec(tmp_path, fab="min_feature_nm = 200.0")   # teeth are 150 nm
    out = tmp_path / "v.gds"
    with pytest.raises(DesignRuleError) as err:
        run(spec, out)
    assert err.value.exit_code == 3
    captured = capsys.readouterr()
    summary = json.loads(captured.out)
    assert not out.exists() and summary["written"] is False
    assert sorted(p.name for p in tmp_path.iterdir()) == ["g.toml"]   # no temporary left
    found = summary["violations"]
    cross = [f for f in found if f["plane"] == "cross-section"]
    lay = [f for f in found if f["plane"] == "layout"]
    assert [f["rule"] for f in cross] == ["min_feature"]
    assert len(lay) == 20 and {f["rule"] for f in lay} == {"min_feature"}
    # every located at a tooth centre x_k = (k + 1/2 - N/2) P, y = 0
    xs = np.sort([f["location_m"][0] for f in lay])
    assert np.allclose(xs, (np.arange(20) + 0.5 - 10) * 500e-9, atol=1e-12)
    assert all(abs(f["measured_m"] - 150e-9) < 1e-12 for f in lay)
    assert "min_feature" in captured.err and "x = " in captured.err
    # KLayout's width check on the same geometry flags the same 20 teeth
    out_ok = tmp_path / "v_forced.gds"
    code, s = run(spec, out_ok, "--ignore-rules", capsys=capsys)
    assert code == 0 and s["rules_ignored"] and len(s["violations"]) == 21
    k = read_klayout(out_ok)
    pairs = k["region"].width_check(200, False, kdb.Metrics.Projection)
    k_xs = np.sort([e.bbox().center().x * k["dbu_m"] for e in pairs.each()])
    assert np.allclose(k_xs, xs, atol=1e-9)


def test_planted_gap_aspect_and_write_field_violations(tmp_path, capsys):
    fab = ("min_gap_nm = 360.0\nmax_aspect_ratio = 1.2\nwrite_field_um = 8.0")
    spec = grating_spec(tmp_path, fab=fab)           # gaps 350 nm, 200 / 150 = 1.33
    with pytest.raises(DesignRuleError):
        run(spec, tmp_path / "x.gds")
    found = json.loads(capsys.readouterr().out)["violations"]
    rules = [(f["plane"], f["rule"]) for f in found]
    assert ("cross-section", "min_gap") in rules
    assert ("cross-section", "aspect_ratio") in rules
    assert ("layout", "write_field") in rules          # 10 um frame > 8 um field
    gaps = [f for f in found if f["plane"] == "layout" and f["rule"] == "min_gap"]
    assert len(gaps) == 19                               # between 20 lines (keep tone)
    # the same count from KLayout's space check on the forced file
    run(spec, tmp_path / "x.gds", "--ignore-rules", capsys=capsys)
    k = read_klayout(tmp_path / "x.gds")
    assert k["region"].space_check(360, False, kdb.Metrics.Projection).count() == 19


def test_clean_design_passes_at_the_limits(tmp_path, capsys):
    # tooth 150 nm and gap 350 nm exactly at the limits: sizes equal to a limit pass
    fab = "min_feature_nm = 150.0\nmin_gap_nm = 350.0\nmax_aspect_ratio = 1.34"
    for tone in ("keep", "remove"):
        spec = grating_spec(tmp_path, fab=fab, layout=f'tone = "{tone}"', name=f"{tone}.toml")
        code, s = run(spec, tmp_path / f"{tone}.gds", capsys=capsys)
        assert code == 0 and s["violations"] == []


def test_slit_membrane_thin_bar_found_in_remove_tone(tmp_path, capsys):
    # two slits leave a 60 nm bar between them, below min_feature 80 nm
    spec = membrane_spec(tmp_path, period=1000.0, widths="[300.0, 300.0]",
                         centers="[300.0, 660.0]", field=5.0, layout='tone = "remove"',
                         fab="min_feature_nm = 80.0")
    with pytest.raises(DesignRuleError):
        run(spec, tmp_path / "b.gds")
    found = json.loads(capsys.readouterr().out)["violations"]
    lay = [f for f in found if f["plane"] == "layout"]
    assert len(lay) == 5 and all(abs(f["measured_m"] - 60e-9) < 1e-12 for f in lay)
    assert any(f["plane"] == "cross-section" and f["rule"] == "min_feature" for f in found)


# ------------------------------------------------------------------------ free-form
def test_traced_pixels_keep_their_area_and_thin_lines_are_found():
    px = 10e-9
    mask = np.zeros((30, 20), bool)
    mask[2:8, 2:18] = True         # 6 px = 60 nm wide
    mask[12, 2:18] = True          # 1 px = 10 nm wide: thin
    mask[16:22, 5:9] = True
    polys = geo.trace_pixels(mask, (px, px))
    assert sum(geo.polygon_area(p) for p in polys) == pytest.approx(mask.sum() * px * px)
    assert len(polys) == 3
    thin = geo.thin_parts(polys, 30e-9, "solid")
    assert len(thin) == 1 and thin[0].size_m == pytest.approx(10e-9)
    assert thin[0].center_m[0] == pytest.approx(12.5 * px)
    assert geo.thin_parts(polys, 30e-9, "void") == []   # gaps of 40 and 30 nm
    (gap,) = geo.thin_parts(polys, 40e-9, "void")
    assert gap.size_m == pytest.approx(30e-9) and gap.center_m[0] == pytest.approx(14.5 * px)


def test_region_lines_need_depth_invariant_columns():
    solid = np.zeros((10, 4), bool)
    solid[2:5] = True
    lines = geo.region_lines(solid, 20e-9, -100e-9, 1e-6)
    assert len(lines) == 1
    assert geo.bounding_box(lines) == pytest.approx((-60e-9, -0.5e-6, 0.0, 0.5e-6))
    solid[7, 1] = True
    with pytest.raises(geo.LayoutError, match="x = 50.0 nm"):
        geo.region_lines(solid, 20e-9, -100e-9, 1e-6)


# ------------------------------------------------------------------------ provenance, files
@pytest.mark.parametrize("suffix", [".gds", ".oas"])
def test_provenance_label_and_properties(tmp_path, capsys, suffix):
    from designer.provenance import version
    from designer.spec import load_spec

    spec = grating_spec(tmp_path, layout="dbu_nm = 0.5")
    out = tmp_path / f"p{suffix}"
    _, s = run(spec, out, capsys=capsys)
    sha = load_spec(spec).sha256
    g = read_gdstk(out)
    assert g["lib"].precision == pytest.approx(0.5e-9)
    (label,) = g["top"].labels
    assert f"spec_sha256={sha}" in label.text and f"velomatch {version()}" in label.text
    # GDSII pads odd-length strings with NUL
    assert label.get_gds_property(1).rstrip("\0") == sha
    assert label.get_gds_property(2).rstrip("\0") == version()
    k = read_klayout(out)
    assert k["dbu_m"] == pytest.approx(0.5e-9)
    (text,) = k["texts"]
    assert sha in text.text_string and text.property(1) == sha
    assert s["provenance"]["spec_sha256"] == sha


def test_frame_marks_and_label_are_clear_of_the_pattern(tmp_path, capsys):
    layout = ('frame = true\nmarks = true\nlabel = "CHIP A1"\nclearance_um = 3.0\n'
              "[layout.layers]\nframe = [2, 0]\nmarks = [3, 0]\nlabel = [4, 0]")
    spec = grating_spec(tmp_path, layout=layout)
    out = tmp_path / "f.gds"
    _, s = run(spec, out, "--preview", str(tmp_path / "f.svg"), capsys=capsys)
    assert s["polygons"] == 20
    assert "<svg" in (tmp_path / "f.svg").read_text()[:2000]
    ly = kdb.Layout()
    ly.read(str(out))
    top = ly.top_cell()
    dbu = ly.dbu
    frame = kdb.Box(-5175, -5000, 5175, 5000)    # teeth extent + one 350 nm gap (dbu)
    keepout = kdb.Region(frame.enlarged(int(round(3.0 / dbu)) - 1))
    for lay in (2, 3, 4):
        region = kdb.Region(top.begin_shapes_rec(ly.find_layer(lay, 0)))
        assert not region.is_empty()
        assert (region & keepout).is_empty(), lay
    marks = kdb.Region(top.begin_shapes_rec(ly.find_layer(3, 0)))
    assert marks.merged().count() == 4


def test_existing_file_needs_overwrite(tmp_path, capsys):
    spec = grating_spec(tmp_path)
    out = tmp_path / "o.gds"
    out.write_text("precious")
    with pytest.raises(UsageError, match="--overwrite"):
        run(spec, out)
    assert out.read_text() == "precious"
    code, _ = run(spec, out, "--overwrite", capsys=capsys)
    assert code == 0 and read_klayout(out)["count"] == 20


@pytest.mark.parametrize("layout, key", [
    ("colour = 3", "layout.colour"),
    ('tone = "sideways"', "layout.tone"),
    ("layer = -1", "layout.layer"),
    ("dbu_nm = 0.0", "layout.dbu_nm"),
    ("[layout.layers]\nwidgets = [1, 0]", "layout.layers.widgets"),
])
def test_bad_layout_keys_name_file_key_and_value(tmp_path, layout, key):
    spec = grating_spec(tmp_path, layout=layout)
    with pytest.raises(SpecError) as err:
        run(spec, tmp_path / "e.gds")
    assert err.value.key == key and str(spec) in str(err.value)
    assert err.value.exit_code == 2


def test_grating_without_path_length_is_refused(tmp_path):
    spec = grating_spec(tmp_path)
    spec.write_text(spec.read_text().replace("[path]\nlength_um = 10.0\n", "[path]\n"))
    with pytest.raises(SpecError, match="path.length_um"):
        run(spec, tmp_path / "n.gds")


@pytest.mark.parametrize("tone", ["keep", "remove"])
def test_narrow_channel_of_a_double_sided_grating_is_found(tmp_path, capsys, tone):
    extra = "sides = 2\ngap_nm = 150.0"                  # channel 150 nm < min_gap 180 nm
    spec = grating_spec(tmp_path, period=400.0, duty=0.5, extra=extra, length=4.0, line=2.0,
                        layout=f'tone = "{tone}"', fab="min_gap_nm = 180.0")
    with pytest.raises(DesignRuleError):
        run(spec, tmp_path / "c.gds")
    found = json.loads(capsys.readouterr().out)["violations"]
    lay = [f for f in found if f["plane"] == "layout"]
    assert lay and all(f["rule"] == "min_gap" for f in lay)
    assert all(abs(f["location_m"][1]) < 1e-12 for f in lay)          # on the channel
    assert all(abs(f["measured_m"] - 150e-9) < 1e-12 for f in lay)
    assert any(f["plane"] == "cross-section" and f["description"] == "channel gap"
               for f in found)


def test_flat_samples(tmp_path, capsys):
    prism = (HEAD.replace("30.0", "200.0")
             + '[sample]\nfamily = "prism"\nmaterial = "fused_silica"\n')
    (tmp_path / "p.toml").write_text(prism)
    with pytest.raises(SpecError, match="no lateral pattern"):
        run(tmp_path / "p.toml", tmp_path / "p.gds")
    plain = MEMBRANE.split("pattern =")[0] + "[layout]\nfield_um = [4.0, 2.0]\n"
    (tmp_path / "f.toml").write_text(plain)
    _, s = run(tmp_path / "f.toml", tmp_path / "f.gds", capsys=capsys)
    g = read_klayout(tmp_path / "f.gds")
    assert g["count"] == 1 and g["area"] == pytest.approx(8e-12, rel=1e-9)
    (tmp_path / "r.toml").write_text(plain + 'tone = "remove"\n')
    with pytest.raises(SpecError, match="nothing to etch"):
        run(tmp_path / "r.toml", tmp_path / "r.gds")
