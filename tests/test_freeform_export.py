"""Free-form designs that can be made: a short design run, then `export` of its
design.toml without --ignore-rules, read back by two GDSII readers.

References:
* the areas and the rasterized pattern are closed-form consequences of the pixel
  pattern (pixel count x pixel size; a pixel is solid in the layout when its centre
  lies inside a polygon) -- common practice, no source;
* the files are read back with gdstk (the writer's library) and KLayout's Python
  package (an independent GDSII implementation).
Spec values are scenarios of our own.
"""

import json

import gdstk
import klayout.db as kdb
import numpy as np
import pytest

from designer import design as d
from designer.cli import build_parser
from designer.export import export_command
from designer.families import get_family, region
from designer.spec import load_spec

SPEC = """\
[beam]
voltage_kV = 30.0
[laser]
wavelength_nm = 800.0
[sample]
family = "grating"
material = "fused_silica"
duty_cycle = 0.5
tooth_height_nm = 120.0
{sample}
[sample.freeform]
z_nm = [0.0, 120.0]
{freeform}
[path]
length_um = 3.0
{path}
[solver]
grid_step_nm = 20.0
refine = false
[fabrication]
min_feature_nm = 40.0
min_gap_nm = 40.0
[optimize]
variables = ["density"]
iterations = 6
learning_rate = 0.1
projection_beta = [4.0, 64.0]
projection_beta_every = 2
refine_factor = 1.25
[layout]
line_length_um = 2.0
"""


def _design(tmp_path, *, sample="", freeform="", path=""):
    p = tmp_path / "ff.toml"
    p.write_text(SPEC.format(sample=sample, freeform=freeform, path=path))
    spec = load_spec(p)
    out = tmp_path / "run"
    result = d.run_design(spec, out, d.parse_optimize(spec), progress=False)
    comp = d.write_outputs(result, out)
    return out, comp, load_spec(out / "design.toml")


def _export(spec_path, out, capsys):
    args = build_parser().parse_args(["export", str(spec_path), "--out", str(out), "--json"])
    assert export_command(args) == 0          # no --ignore-rules
    return json.loads(capsys.readouterr().out)


def _areas(gds, layer):
    lib = gdstk.read_gds(str(gds))
    (top,) = lib.top_level()
    a_gdstk = sum(p.area() for p in top.polygons if (p.layer, p.datatype) == (layer, 0)) \
        * lib.unit ** 2
    ly = kdb.Layout()
    ly.read(str(gds))
    reg = kdb.Region(ly.top_cell().begin_shapes_rec(ly.find_layer(layer, 0)))
    return a_gdstk, reg.area() * (ly.dbu * 1e-6) ** 2, reg


@pytest.mark.slow
@pytest.mark.parametrize("steps", [1, 2])
def test_cross_section_design_exports_with_the_density_area(tmp_path, capsys, steps):
    freeform = "" if steps == 1 else f"etch_steps = {steps}"
    out, comp, spec = _design(tmp_path, freeform=freeform)
    assert comp["design_rules"]["clean"], comp["design_rules"]
    summ = _export(out / "design.toml", tmp_path / "ff.gds", capsys)
    assert summ["violations"] == [] and len(summ["pattern_layers"]) == steps
    lay = get_family("grating").layout(spec.sample, spec.context, spec.solver.grid_step_m)
    g = lay.grid
    pattern = np.load(out / "density.npy") > 0.5
    n_periods = round(3e-6 / spec.sample.period_m)
    L = 2e-6
    for j, (a, b) in enumerate(region.slab_rows(spec.sample.freeform, lay)):
        slab = pattern[:, a:b]
        assert (slab.all(axis=1) | ~slab.any(axis=1)).all()     # columnar by construction
        # solid area of the slab's density per unit height = drawn width per period
        width = slab.sum() * g.dx * g.dz / ((b - a) * g.dz)
        lines = max(1, int(np.count_nonzero(np.diff(np.r_[slab[-1, 0], slab[:, 0]]))))
        for area in _areas(tmp_path / "ff.gds", 1 + j)[:2]:
            per_period = area / (n_periods * L)
            assert abs(per_period - width) <= lines * 1e-9, (j, per_period, width)


@pytest.mark.slow
def test_wafer_plane_design_exports_the_simulated_shape(tmp_path, capsys):
    out, comp, spec = _design(tmp_path, sample='plane = "wafer"\ndevice_layer_nm = 2000.0')
    assert comp["design_rules"]["clean"], comp["design_rules"]
    summ = _export(out / "design.toml", tmp_path / "w.gds", capsys)
    assert summ["violations"] == []
    fam = get_family("grating")
    lay = fam.layout(spec.sample, spec.context, spec.solver.grid_step_m)
    g = lay.grid
    cells = region.region_cells(spec.sample.freeform, lay)
    pattern = np.load(out / "density.npy") > 0.5
    lib = gdstk.read_gds(str(tmp_path / "w.gds"))
    (top,) = lib.top_level()
    polys = [p.points * lib.unit for p in top.polygons if (p.layer, p.datatype) == (1, 0)]
    ly = kdb.Layout()
    ly.read(str(tmp_path / "w.gds"))
    reg = kdb.Region(ly.top_cell().begin_shapes_rec(ly.find_layer(1, 0)))
    P = spec.sample.period_m
    n = round(3e-6 / P)
    x_first = -0.5 * n * P
    x_cut = x_first - summ["origin_m"][0]
    xc = g.x0 + (cells.i0 + np.arange(cells.shape[0]) + 0.5) * g.dx
    zc = g.z0 + (cells.k0 + np.arange(cells.shape[1]) + 0.5) * g.dz
    for k in (0, n // 2, n - 1):
        # simulated (x, z) -> layout (x_first + k P + (x - x_cut) mod P, z)
        X = x_first + k * P + np.mod(xc - x_cut, P)
        pts = [(x / lib.unit, z / lib.unit) for x in X for z in zc]
        inside = np.array(gdstk.inside(pts, [q / lib.unit for q in polys])).reshape(cells.shape)
        np.testing.assert_array_equal(inside, pattern[:, :cells.shape[1]])
        # and KLayout agrees pixel by pixel (its own point-in-region test)
        dbu = ly.dbu * 1e-6
        k_inside = np.array([[not reg.interacting(kdb.Region(kdb.Box(
            round(x / dbu) - 1, round(z / dbu) - 1, round(x / dbu) + 1, round(z / dbu) + 1))
        ).is_empty() for z in zc] for x in X])
        np.testing.assert_array_equal(k_inside, pattern[:, :cells.shape[1]])


@pytest.mark.parametrize("x_cut_nm", [0.0, 450.0, 950.0])
def test_period_window_keeps_whole_parts(x_cut_nm):
    """One period window of a periodic top view holds every part of the infinite
    pattern exactly once and whole: a part straddling the cell edge, a slanted part
    wider than a period (not touching its copies) and a rail (cut to the window).  The
    areas are closed-form (common geometry, no source); read with gdstk."""
    import gdstk

    from designer.export import _period_pieces

    P = 1000.0
    cell = [np.array([[0, -1000], [P, -1000], [P, 1000], [0, 1000]], dtype=float)]
    straddle = np.array([[900, 0], [1100, 0], [1100, 100], [900, 100]], dtype=float)
    rail = np.array([[-500, 200], [1500, 200], [1500, 300], [-500, 300]], dtype=float)
    slanted = np.array([[0, 400], [200, 400], [1200, 600], [1000, 600]], dtype=float)
    polys = []      # what one simulated cell holds: every part folded into [0, P)
    for part in (straddle, rail, slanted):
        for k in (-1, 0, 1):
            polys += [np.asarray(q.points) for q in gdstk.boolean(
                [part + np.array([k * P, 0.0])], cell, "and")]
    pieces = _period_pieces(polys, P * 1e-9, x_cut_nm * 1e-9, -1e-6, 1e-6)
    areas = sorted(round(gdstk.Polygon(q * 1e9).area()) for q in pieces)
    assert areas == [20000, 40000, 100000]
