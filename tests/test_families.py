"""Sample families: spec reading, phase-matching defaults, layouts, path checks,
layer stacks against the raster, polygons, features and pictures."""

from __future__ import annotations

import math

import numpy as np
import pytest

from designer.beam import electron
from designer.errors import SpecError
from designer.families import FAMILY_NAMES, SampleContext, get_family
from designer.families import raster as R
from designer.tables import TableReader


def _ctx(kv=30.0, lam=800e-9, angle=0.0, path=None, from_side="below"):
    e = electron(kv * 1e3)
    return SampleContext(wavelength_m=lam, beta=e.beta, gamma=e.gamma, angle_rad=angle,
                         from_side=from_side, source="test.toml", base_dir=None,
                         path=path or {})


def _parse(name, table, ctx):
    return get_family(name).parse(TableReader(dict(table, family=name), "sample", "test.toml"),
                                  ctx)


# ------------------------------------------------------------------ phase matching
def test_family_names():
    assert set(FAMILY_NAMES) == {"grating", "membrane", "prism"}
    with pytest.raises(ValueError):
        get_family("nothing")


def test_default_period_is_m_beta_lambda():
    # phase matching (computed from Lambda = m beta lambda, CODATA):
    # 28 kV, 800 nm, m = 3 -> 763.5 nm
    ctx = _ctx(kv=28.0)
    p = _parse("grating", {"material": {"n": 1.45}, "order": 3}, ctx)
    assert p.period_m * 1e9 == pytest.approx(763.5, abs=0.05)
    p1 = _parse("grating", {"material": {"n": 1.45}}, ctx)
    assert p1.period_m == pytest.approx(ctx.beta * 800e-9, rel=1e-12)
    # phase-matched incidence at the default period is normal incidence
    ctx_pm = _ctx(kv=28.0, angle=None)
    assert get_family("grating").laser_angle(p, ctx_pm) == pytest.approx(0.0, abs=1e-12)


def test_phase_matched_angle_for_a_detuned_grating():
    # synchronicity n k sin(theta) + 2 pi m / P = omega / v (closed form), from vacuum
    ctx = _ctx(kv=30.0, angle=None, from_side="above")
    p = _parse("grating", {"material": {"n": 1.45}, "period_nm": 280.0}, ctx)
    theta = get_family("grating").laser_angle(p, ctx)
    kx = 2 * math.pi / 800e-9 * math.sin(theta)
    assert kx + 2 * math.pi / 280e-9 == pytest.approx(2 * math.pi / (ctx.beta * 800e-9),
                                                      rel=1e-12)


def test_prism_phase_matched_angle():
    # computed: n = 2.0244 (Si3N4 at 800 nm), 200 kV -> Cherenkov angle 44.72 deg
    # from the electron direction, i.e. 90 - 44.72 = 45.28 deg from the surface normal
    ctx = _ctx(kv=200.0, angle=None)
    p = _parse("prism", {"material": {"n": 2.0244}}, ctx)
    theta = get_family("prism").laser_angle(p, ctx)
    assert math.degrees(theta) == pytest.approx(90.0 - 44.72, abs=0.01)
    assert math.sin(theta) == pytest.approx(1.0 / (2.0244 * ctx.beta), rel=1e-12)


def test_prism_n_beta_below_one_lists_working_materials():
    # fused silica (n ~ 1.453 at 800 nm, Malitson 1965) at 30 kV: n beta = 0.48 < 1
    ctx = _ctx(kv=30.0, angle=None)
    with pytest.raises(SpecError) as err:
        _parse("prism", {"material": "fused_silica"}, ctx)
    msg = str(err.value)
    assert "sample.material" in msg and "n beta" in msg
    from designer.materials import phase_matching_materials
    working = phase_matching_materials(ctx.beta, 800e-9)
    assert working, "the catalogue has high-index materials (silicon) for 30 kV"
    for name in working:
        assert name in msg
    assert "fused_silica (" not in msg


def test_membrane_refuses_phase_matched_angle():
    ctx = _ctx(angle=None)
    p = _parse("membrane", {"material": {"n": 2.0}}, ctx)
    with pytest.raises(SpecError, match="laser.angle_deg"):
        get_family("membrane").laser_angle(p, ctx)


# ------------------------------------------------------------------ spec reading
CASES = {
    "grating": {"material": {"n": 1.45}, "sides": 2, "gap_nm": 300.0, "shift_nm": 20.0,
                "sidewall_angle_deg": 4.0, "duty_cycle": 0.4, "tooth_height_nm": 150.0},
    "membrane": {"material": "silicon_nitride", "thickness_nm": 50.0, "pattern": "slits",
                 "period_nm": 500.0, "slit_widths_nm": [100.0, 60.0],
                 "slit_centers_nm": [300.0, 100.0]},
    "prism": {"material": {"n": 2.0}, "layers": [{"material": {"n": 1.5},
                                                  "thickness_nm": 20.0}]},
}


def _approx_equal(a, b):
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(_approx_equal(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(_approx_equal(x, y) for x, y in zip(a, b))
    if isinstance(a, float):
        return a == pytest.approx(b, rel=1e-12, abs=1e-12)
    return a == b


@pytest.mark.parametrize("name", sorted(CASES))
def test_round_trip_and_replace(name):
    ctx = _ctx(kv=200.0, angle=0.5)
    fam = get_family(name)
    p = _parse(name, CASES[name], ctx)
    table = fam.to_table(p)
    assert table["family"] == name
    q = fam.parse(TableReader(table, "sample", "test.toml"), ctx)
    assert _approx_equal(fam.to_table(q), table)
    assert fam.variables(q).keys() == fam.variables(p).keys()
    vs = fam.variables(p)
    for key, (v, lo, hi) in vs.items():
        assert lo <= v <= hi, key
    new = {k: 0.99 * v + 0.01 * 0.5 * (lo + hi) for k, (v, lo, hi) in vs.items()}
    r = fam.replace(p, new)
    for key, value in fam.variables(r).items():
        assert value[0] == pytest.approx(new[key], rel=1e-12, abs=1e-9), key
    with pytest.raises(ValueError):
        fam.replace(p, {"no_such_key": 1.0})


def test_spec_errors_name_the_key():
    ctx = _ctx()
    with pytest.raises(SpecError, match="sample.duty_cycle"):
        _parse("grating", {"material": {"n": 1.45}, "duty_cycle": 1.2}, ctx)
    with pytest.raises(SpecError, match="sample.sidewall_angle_deg"):
        _parse("grating", {"material": {"n": 1.45}, "sidewall_angle_deg": 29.0,
                           "tooth_height_nm": 900.0}, ctx)
    with pytest.raises(SpecError, match="sample.gap_nm"):
        _parse("grating", {"material": {"n": 1.45}, "gap_nm": 100.0}, ctx)
    with pytest.raises(SpecError, match="sample.colour"):
        _parse("grating", {"material": {"n": 1.45}, "colour": 3}, ctx)
    with pytest.raises(SpecError, match="sample.material"):
        _parse("grating", {"material": "unobtainium"}, ctx)
    with pytest.raises(SpecError, match="sample.slit_centers_nm"):
        _parse("membrane", {"material": {"n": 2.0}, "pattern": "slits", "period_nm": 400.0,
                            "slit_widths_nm": [100.0, 100.0],
                            "slit_centers_nm": [100.0, 150.0]}, ctx)
    with pytest.raises(SpecError, match=r"sample.layers\[0\].thickness_nm"):
        _parse("prism", {"material": {"n": 3.5},
                         "layers": [{"material": {"n": 1.5}, "thickness_nm": -1.0}]}, ctx)


# ------------------------------------------------------------------ path checks
def test_path_in_material_errors():
    gr = get_family("grating")
    p1 = _parse("grating", {"material": {"n": 1.45}}, _ctx())
    gr.check_path(p1, _ctx(path={"offset_nm": 15.0}))
    with pytest.raises(SpecError, match="path.offset_nm.*teeth"):
        gr.check_path(p1, _ctx(path={"offset_nm": -5.0}))
    p2 = _parse("grating", {"material": {"n": 1.45}, "sides": 2, "gap_nm": 200.0}, _ctx())
    gr.check_path(p2, _ctx(path={"offset_nm": 99.0}))
    with pytest.raises(SpecError, match="upper grating"):
        gr.check_path(p2, _ctx(path={"offset_nm": 100.0}))
    with pytest.raises(SpecError, match="lower grating"):
        gr.check_path(p2, _ctx(path={"offset_nm": -120.0}))
    pr = get_family("prism")
    p3 = _parse("prism", CASES["prism"], _ctx(kv=200.0))
    pr.check_path(p3, _ctx(kv=200.0, path={"offset_nm": 1.0}))
    with pytest.raises(SpecError, match="path.offset_nm.*layers"):
        pr.check_path(p3, _ctx(kv=200.0, path={"offset_nm": -10.0}))


# ------------------------------------------------------------------ layouts
@pytest.mark.parametrize("name", sorted(CASES))
def test_layout_rules(name):
    ctx = _ctx(kv=200.0, angle=0.2, path={"offset_nm": 30.0, "x_nm": 40.0})
    fam = get_family(name)
    p = _parse(name, CASES[name], ctx)
    lay = fam.layout(p, ctx, 12e-9)
    g = lay.grid
    assert g.dx == g.dz == lay.grid_step_m
    assert abs(g.dx - 12e-9) / 12e-9 < 0.1
    if lay.period_m is not None and name != "prism":
        assert g.nx * g.dx == pytest.approx(lay.period_m, rel=1e-12)
    assert lay.pml_cells_x == 0
    assert lay.pml_cells_z * g.dz >= 0.5 * 800e-9 and lay.pml_cells_z >= 20
    # source in the homogeneous incidence medium: eps there equals eps_incidence
    ex, ez = (np.asarray(a) for a in fam.permittivity(p, lay))
    k_src = int(round((lay.z_source_m - g.z0) / g.dz))
    assert np.allclose(ex[:, k_src - 3:k_src + 3], lay.eps_incidence)
    assert lay.z_source_m < lay.structure_z_m[0] - 0.5 * 800e-9 + 3 * g.dz
    # room for the evanescent field beyond the path
    decay = ctx.beta * ctx.gamma * 800e-9 / (2 * math.pi)
    top_phys = g.z0 + (g.nz - lay.pml_cells_z) * g.dz
    bottom_phys = g.z0 + lay.pml_cells_z * g.dz
    if lay.path.direction == "x":
        assert top_phys - lay.path.z_m >= 3 * decay
    else:
        assert bottom_phys < lay.path.z_below_m < 0 < lay.path.z_above_m < top_phys
    # material mask: more than half filled cells, none in the PML
    assert lay.material_mask.shape == g.shape
    assert not lay.material_mask[:, :lay.pml_cells_z].any()
    assert lay.material_mask.any()


def test_grating_layout_positions():
    ctx = _ctx(kv=30.0, path={"offset_nm": 20.0})
    p = _parse("grating", {"material": {"n": 1.45}, "tooth_height_nm": 130.0}, ctx)
    lay = get_family("grating").layout(p, ctx, 10e-9)
    assert lay.path.direction == "x"
    assert lay.path.z_m == pytest.approx(150e-9)
    assert lay.eps_incidence == pytest.approx(1.45**2)   # through the substrate
    assert lay.z_source_m < 0
    ctx_above = _ctx(kv=30.0, path={"offset_nm": 20.0}, from_side="above")
    lay2 = get_family("grating").layout(p, ctx_above, 10e-9)
    assert lay2.eps_incidence == 1.0 and lay2.z_source_m > lay2.path.z_m


# ------------------------------------------------------------------ stack vs raster
def _dual_cell_average(stack, z_lo, z_hi, harmonic):
    """Exact average of eps (or 1/eps) of a layer stack over [z_lo, z_hi]."""
    zs = (-np.inf,) + stack.z_interfaces + (np.inf,)
    total = 0.0
    for j, e in enumerate(stack.eps):
        overlap = max(0.0, min(z_hi, zs[j + 1]) - max(z_lo, zs[j]))
        total += overlap * (1.0 / e if harmonic else e)
    mean = total / (z_hi - z_lo)
    return 1.0 / mean if harmonic else mean


@pytest.mark.parametrize("name,table", [
    ("membrane", {"material": {"n": 2.0}, "thickness_nm": 87.3}),
    ("prism", {"material": {"n": 3.5}, "layers": [{"material": {"n": 1.5}, "thickness_nm": 33.3},
                                                  {"material": {"n": 2.2},
                                                   "thickness_nm": 14.1}]}),
])
def test_layer_stack_equals_raster(name, table):
    # a planar stack seen by the raster: along each row the x-average of eps_x is the
    # arithmetic mean of the stack's eps over the Ex dual cell, eps_z the harmonic
    # mean over the Ez dual cell (Farjadpour et al., Opt. Lett. 31, 2972, 2006)
    ctx = _ctx(kv=100.0, angle=0.3)
    fam = get_family(name)
    p = _parse(name, table, ctx)
    stack = fam.layer_stack(p, ctx)
    lay = fam.layout(p, ctx, 10e-9)
    g = lay.grid
    ex, ez = (np.asarray(a).mean(axis=0) for a in fam.permittivity(p, lay))
    zn = g.z_nodes()
    for k in range(g.nz):
        assert ex[k] == pytest.approx(_dual_cell_average(stack, zn[k] - g.dz / 2,
                                                         zn[k] + g.dz / 2, False), rel=1e-12)
        assert ez[k] == pytest.approx(_dual_cell_average(stack, zn[k], zn[k] + g.dz, True),
                                      rel=1e-12)
    # thicknesses: the excess eps summed over rows is sum (eps_j - eps_above) t_j
    top = stack.z_interfaces[-1]
    rows = zn < top + 5 * g.dz
    rows &= zn > 0 - 5 * g.dz
    lhs = np.sum(ex[rows] - 1.0) * g.dz
    rhs = sum((e - 1.0) * t for t, e in stack.layers) \
        + (stack.eps_below - 1.0) * (0 - (zn[rows][0] - g.dz / 2))
    assert lhs.real == pytest.approx(rhs.real, rel=1e-10)
    assert get_family("grating").layer_stack(_parse("grating", {"material": {"n": 1.4}}, ctx),
                                             ctx) is None


# ------------------------------------------------------------------ polygons, features
def _shoelace(v):
    x, z = v[:, 0], v[:, 1]
    return 0.5 * abs(np.dot(x, np.roll(z, -1)) - np.dot(z, np.roll(x, -1)))


def test_polygons_match_the_raster_area():
    # tooth polygons (shoelace area, elementary geometry) against the summed fill of
    # the teeth layer z in [0, h]
    ctx = _ctx(kv=30.0, path={"offset_nm": 20.0})
    fam = get_family("grating")
    p = _parse("grating", {"material": {"n": 1.45}, "sidewall_angle_deg": 8.0,
                           "tooth_height_nm": 113.0, "duty_cycle": 0.41}, ctx)
    lay = fam.layout(p, ctx, 10e-9)
    polys = fam.polygons(p, ctx, lay)
    teeth = [q for q in polys if q.vertices_m[:, 1].min() >= 0]
    assert len(teeth) == 1 and teeth[0].material_name == "n=1.45"
    area = _shoelace(teeth[0].vertices_m)
    assert area == pytest.approx(0.41 * p.period_m * 113e-9, rel=1e-12)
    subs = [q for q in polys if q.vertices_m[:, 1].min() < 0]
    assert subs[0].vertices_m[:, 1].min() < lay.grid.z0
    assert subs[0].vertices_m[:, 0].min() < 0 < lay.grid.size_x < subs[0].vertices_m[:, 0].max()
    scene = fam._scene(p, fam._spec_values(p))
    f = R.fill_fractions(scene, lay.grid, p.period_m, "cell")[0]
    zc = lay.grid.z_centres()
    teeth_rows = (zc > 0) & (zc < 113e-9 + lay.grid.dz)
    assert np.sum(f[:, teeth_rows]) * lay.grid.dx ** 2 == pytest.approx(area, abs=1e-6 *
                                                                          lay.grid.dx ** 2)


def test_grating_features():
    # widths of a tapered tooth: mid-height width d P, +- h tan(alpha) (geometry)
    ctx = _ctx()
    p = _parse("grating", {"material": {"n": 1.45}, "sides": 2, "gap_nm": 250.0,
                           "sidewall_angle_deg": 5.0, "tooth_height_nm": 100.0,
                           "duty_cycle": 0.5}, ctx)
    feats = get_family("grating").features(p)
    taper = 100e-9 * math.tan(math.radians(5.0))
    solid = [f for f in feats if f.kind == "solid"]
    gaps = [f for f in feats if f.kind == "gap"]
    heights = [f for f in feats if f.kind == "height"]
    assert len(solid) == 2 and len(heights) == 2
    assert solid[0].size_m == pytest.approx(0.5 * p.period_m - taper)
    assert min(f.size_m for f in gaps) == pytest.approx(0.5 * p.period_m - taper)
    assert any(f.description == "channel gap" and f.size_m == pytest.approx(250e-9)
               for f in gaps)
    assert heights[0].lateral_m == pytest.approx(0.5 * p.period_m - taper)


def test_features_feed_the_design_rule_check():
    from designer.fabrication import FabricationRules, design_rule_check
    ctx = _ctx()
    p = _parse("membrane", {"material": {"n": 2.0}, "thickness_nm": 50.0, "pattern": "slits",
                            "period_nm": 500.0, "slit_widths_nm": [30.0],
                            "slit_centers_nm": [250.0]}, ctx)
    feats = get_family("membrane").features(p)
    bars = [f for f in feats if f.kind == "solid"]
    assert bars[0].size_m == pytest.approx(470e-9)
    bad = design_rule_check(feats, FabricationRules(min_gap_m=40e-9))
    assert [v.rule for v in bad] == ["min_gap"]
    assert not design_rule_check(feats, FabricationRules(min_gap_m=20e-9))


# ------------------------------------------------------------------ pictures
@pytest.mark.parametrize("name", sorted(CASES))
def test_picture_of_every_sample(name, tmp_path):
    from designer.drawing import sample_figure, save_sample_picture
    ctx = _ctx(kv=200.0, angle=0.3, path={"offset_nm": 30.0, "x_nm": 120.0})
    fam = get_family(name)
    p = _parse(name, CASES[name], ctx)
    lay = fam.layout(p, ctx, 20e-9)
    fig = sample_figure(fam, p, ctx, lay)
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert any("electron" in t for t in labels) and any("laser" in t for t in labels)
    assert any(p_.material_name in t for t in labels for p_ in fam.polygons(p, ctx, lay))
    assert any(t.get_text().endswith("nm") or t.get_text().endswith("µm")
               for t in fig.axes[0].texts)          # the scale bar label
    out = save_sample_picture(tmp_path / f"{name}.png", fam, p, ctx, lay)
    assert out.stat().st_size > 5000
