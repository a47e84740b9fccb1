"""Free-form density regions end to end: spec, permittivity, design, evaluate, export.

References used:
* gradients of the free-form objective against central finite differences of the same
  objective (common practice, no source);
* the length-scale check is the morphological opening/closing of
  designer.fabrication.pattern_rule_check (O. Sigmund, Struct. Multidisc. Optim. 33,
  401, 2007), with the robust eroded/nominal/dilated formulation of F. Wang,
  B. S. Lazarov & O. Sigmund, Struct. Multidisc. Optim. 43, 767 (2011);
* exported areas are closed-form consequences of the pixel pattern (pixel count x pixel
  width x line length x periods) read back with gdstk and KLayout (an independent
  GDSII implementation) -- common practice, no source;
* the permittivity placement is checked against the family's own exact raster where the
  region holds exactly the family's pattern (a pixel-aligned rectangle).
Spec values are scenarios of our own.
"""

import dataclasses
import json
import math

import jax
import numpy as np
import pytest

from designer import design as d
from designer.errors import SpecError
from designer.evaluate import evaluate, evaluation_json
from designer.families import get_family, region
from designer.spec import load_spec, parse_spec

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
{sample_extra}
[sample.freeform]
z_nm = [0.0, 120.0]
{freeform}
[path]
length_um = 10.0
[solver]
grid_step_nm = {resolution}
refine = false
[fabrication]
min_feature_nm = 40.0
min_gap_nm = 40.0
[optimize]
variables = ["density"]
iterations = {iterations}
learning_rate = 0.1
projection_beta = [2.0, 64.0]
projection_beta_every = 4
[layout]
line_length_um = 5.0
"""


def write(tmp_path, *, freeform="density = 0.5", resolution=10.0, iterations=20,
          sample_extra="", name="ff.toml"):
    p = tmp_path / name
    p.write_text(SPEC.format(freeform=freeform, resolution=resolution, iterations=iterations,
                             sample_extra=sample_extra))
    return p


# ---------------------------------------------------------------------------------
# spec and permittivity
# ---------------------------------------------------------------------------------
@pytest.mark.parametrize("freeform,key", [
    ("density = 1.5", "sample.freeform.density"),
    ('density = 0.5\ndensity_file = "a.npy"', "sample.freeform.density_file"),
    ("x_nm = [0.0, 900.0]", "sample.freeform.x_nm"),
    ("z_nm2 = 3", "sample.freeform.z_nm2"),
    ('density_file = "missing.npy"\npixel_nm = [10.0, 10.0]\norigin_nm = [0.0, 0.0]',
     "sample.freeform.density_file"),
    ('density_file = "a.npy"', "sample.freeform.pixel_nm"),
    ("pixel_nm = [10.0, 10.0]", "sample.freeform.pixel_nm"),
])
def test_bad_freeform_tables_name_the_key(tmp_path, freeform, key):
    text = SPEC.format(freeform=freeform, resolution=10.0, iterations=2, sample_extra="")
    text = text.replace('[sample.freeform]\nz_nm = [0.0, 120.0]\n',
                        "[sample.freeform]\n" + ("" if "z_nm2" in freeform else
                                                 "z_nm = [0.0, 120.0]\n"))
    p = tmp_path / "bad.toml"
    p.write_text(text)
    with pytest.raises(SpecError) as err:
        load_spec(p)
    assert err.value.key == key


def test_region_holding_the_family_pattern_matches_the_exact_raster(tmp_path):
    # A tooth of 13 of 26 cells and 12 rows: with the region covering exactly those
    # pixels, placing the family's own (binary) fill must reproduce the exact raster of
    # the family: the pixel-aligned rectangle has fill fractions 0 or 1 in every cell,
    # and on faces inside or on the border the arithmetic mean is the exact layered
    # average (Farjadpour et al., Opt. Lett. 31, 2972, 2006).
    text = SPEC.format(freeform="", resolution=10.0, iterations=2, sample_extra="")
    spec = load_spec(write(tmp_path, freeform=""))
    family = get_family("grating")
    h = spec.solver.grid_step_m
    probe = family.layout(spec.sample, spec.context, h)
    # choose the tooth height as a whole number of cells so that the tooth is pixel-aligned
    rows = 12
    height_nm = rows * probe.grid.dx * 1e9
    text = text.replace("tooth_height_nm = 120.0", f"tooth_height_nm = {height_nm!r}")
    text = text.replace("z_nm = [0.0, 120.0]", f"z_nm = [0.0, {height_nm!r}]")
    # 14 of 26 cells centred on the period: the tooth spans cells 6 .. 19 exactly
    text = text.replace("duty_cycle = 0.5", f"duty_cycle = {14 / 26!r}")
    spec = parse_spec(__import__("tomllib").loads(text), source="t")
    lay = family.layout(spec.sample, spec.context, h)
    assert lay.grid.nx == 26
    bare = parse_spec({**spec.raw, "sample": {k: v for k, v in spec.raw["sample"].items()
                                              if k != "freeform"}}, source="t")
    ex0, ez0 = (np.asarray(a) for a in family.permittivity(bare.sample, lay))
    ex1, ez1 = (np.asarray(a) for a in family.permittivity(spec.sample, lay))
    # Ex faces match, the region's bottom/top border included (there
    # freeform.place_eps averages the region cell with the family's cell just outside),
    # except the border faces next to a tooth corner, where the raster blends both
    # interface orientations while a pixel face is taken as one horizontal wall
    cells = region.region_cells(spec.sample.freeform, lay)
    keep = np.ones(ex0.shape, dtype=bool)
    for k in (cells.k0, cells.k1):
        keep[[5, 6, 19, 20], k] = False
    np.testing.assert_allclose(ex1[keep], ex0[keep], rtol=0, atol=1e-12)
    # and the four Ez faces whose dual cells hold a tooth corner, where the raster
    # blends both interface orientations while a pixel face is taken as one vertical wall
    keep = np.ones(ez0.shape, dtype=bool)
    keep[[6, 20], cells.k0] = keep[[6, 20], cells.k1 - 1] = False
    np.testing.assert_allclose(ez1[keep], ez0[keep], rtol=0, atol=1e-12)
    rho = family.freeform_density(spec.sample, lay)
    assert rho.shape == (26, rows) and rho.sum() == 14 * rows


def test_stored_density_is_placed_exactly_and_resampled_by_nearest_pixel(tmp_path):
    spec = load_spec(write(tmp_path, freeform=""))
    family = get_family("grating")
    lay = family.layout(spec.sample, spec.context, spec.solver.grid_step_m)
    cells = region.region_cells(spec.sample.freeform, lay)
    rng = np.random.default_rng(4)
    rho = (rng.random(cells.shape) > 0.5).astype(float)
    fr = region.with_pattern(spec.sample.freeform, rho, lay, "rho.npy")
    np.save(tmp_path / "rho.npy", rho)
    raw = dict(spec.raw)
    raw["sample"] = family.to_table(dataclasses.replace(spec.sample, freeform=fr))
    again = parse_spec(raw, source="t", base_dir=tmp_path)
    np.testing.assert_array_equal(family.freeform_density(again.sample, lay), rho)
    # on a grid 1.5x coarser every cell takes the stored pixel its centre falls in
    coarse = family.layout(again.sample, again.context, 1.5 * spec.solver.grid_step_m)
    cc = region.region_cells(again.sample.freeform, coarse)
    got = family.freeform_density(again.sample, coarse)
    xc = coarse.grid.x_centres()[cc.i0:cc.i1]
    zc = coarse.grid.z_centres()[cc.k0:cc.k1]
    i = np.clip(((xc - fr.origin_m[0]) // fr.pixel_m[0]).astype(int), 0, rho.shape[0] - 1)
    k = np.clip(((zc - fr.origin_m[1]) // fr.pixel_m[1]).astype(int), 0, rho.shape[1] - 1)
    np.testing.assert_array_equal(got, rho[np.ix_(i, k)])


# ---------------------------------------------------------------------------------
# gradient
# ---------------------------------------------------------------------------------
@pytest.mark.parametrize("freeform,extra,n_vars", [
    ("density = 0.5", "", lambda nx, nz: nx),                     # one etch: columns
    ("density = 0.5\netch_steps = 2", "", lambda nx, nz: 2 * nx),  # two levels
    ("density = 0.5", 'plane = "wafer"\ndevice_layer_nm = 2000.0',
     lambda nx, nz: nx * nz),                                     # wafer plane: pixels
])
def test_density_gradient_matches_finite_differences(tmp_path, freeform, extra, n_vars):
    spec = load_spec(write(tmp_path, resolution=20.0, iterations=2, freeform=freeform,
                           sample_extra=extra))
    problem = d.build_problem(spec, d.parse_optimize(spec))
    nx, nz = region.region_cells(spec.sample.freeform, problem.models[0].layout).shape
    # the design variables of the parametrization: columns per etch step, or pixels
    assert problem.box.lower.size == n_vars(nx, nz)
    assert problem.chain.delta_eta == 0.25 and problem.chain.radius_m > 0   # robust triple
    rng = np.random.default_rng(11)
    u = rng.uniform(0.2, 0.8, problem.box.lower.size)
    beta = 4.0
    aux0 = (problem.masks(u), np.zeros(0), 1.0, beta)
    scale = abs(float(problem.evaluate(u, aux0)[1][0]))
    aux = (aux0[0], np.zeros(0), scale, beta)
    (value, _), grad = jax.jit(jax.value_and_grad(problem.loss, has_aux=True))(u, aux)
    grad = np.asarray(grad)
    h = 1e-5
    for i in [int(np.argmax(np.abs(grad))), 5, u.size - 2]:
        e = np.zeros_like(u)
        e[i] = h
        fd = (float(problem.evaluate(u + e, aux)[0]) - float(problem.evaluate(u - e, aux)[0])) \
            / (2 * h)
        assert abs(grad[i] - fd) <= 1e-4 * max(abs(fd), 1e-3 * np.abs(grad).max()), (i, grad[i],
                                                                                     fd)


# ---------------------------------------------------------------------------------
# design: improvement, length scale, reproduction by evaluate
# ---------------------------------------------------------------------------------
@pytest.mark.slow
def test_freeform_grating_improves_and_meets_the_length_scale(tmp_path):
    spec = load_spec(write(tmp_path, iterations=20))
    config = d.parse_optimize(spec)
    result = d.run_design(spec, tmp_path / "out", config, progress=False)
    problem = result.problem
    assert result.best_record["objective"] > 5.0 * result.start_record["objective"]
    pattern = problem.binarized(result.best_u)
    assert set(np.unique(pattern)) <= {0.0, 1.0} and 0 < pattern.mean() < 1
    assert d.pattern_violations(problem, pattern) == []
    solid, void = d.measured_features(problem, pattern)
    # the requested 40 nm, within the check's one-pixel tolerance
    px = problem.chain.dx
    assert solid >= 40e-9 - px and void >= 40e-9 - px
    # a planted one-pixel void line through the solid, across its whole height, fails
    solid_cols = np.nonzero(pattern.min(axis=1) > 0.5)[0]      # solid all through
    void_cols = np.nonzero(pattern.max(axis=1) < 0.5)[0]       # void all through
    planted = pattern.copy()
    planted[solid_cols[len(solid_cols) // 2], :] = 0.0
    assert "min_gap" in [v.rule for v in d.pattern_violations(problem, planted)]
    # and so does a one-pixel solid line standing in the void
    planted = pattern.copy()
    planted[void_cols[len(void_cols) // 2], :] = 1.0
    assert "min_feature" in [v.rule for v in d.pattern_violations(problem, planted)]


@pytest.mark.slow
def test_design_outputs_reproduce_under_evaluate(tmp_path):
    spec = load_spec(write(tmp_path, resolution=20.0, iterations=4))
    config = d.parse_optimize(spec)
    out = tmp_path / "out"
    result = d.run_design(spec, out, config, progress=False)
    comp = d.write_outputs(result, out)
    assert (out / "density.npy").exists()
    design_spec = load_spec(out / "design.toml")
    assert design_spec.sample.freeform.density_file == "density.npy"
    stored = json.loads((out / "evaluation.json").read_text())
    again = evaluation_json(evaluate(design_spec))
    assert again["coupling"]["integral_V"] == stored["coupling"]["integral_V"]
    # the optimizer's final (binarized) figure is what evaluate computes for design.toml
    beta = again["coupling"]["beta_c_per_field_m_per_V"]
    assert abs(beta - result.best_record["objective"]) < 2e-3 * beta
    np.testing.assert_array_equal(np.load(out / "density.npy"),
                                  result.problem.binarized(result.best_u))
    assert comp["freeform"]["smallest_solid_m"] > 0


# ---------------------------------------------------------------------------------
# export
# ---------------------------------------------------------------------------------
def _pattern_spec(tmp_path, columns, *, rows_solid=None, period_nm=505.0):
    """A spec whose free-form region holds a stored columnar pattern (demo data)."""
    extra = f"period_nm = {period_nm}"
    spec = load_spec(write(tmp_path, freeform="", sample_extra=extra, name="probe.toml"))
    family = get_family("grating")
    lay = family.layout(spec.sample, spec.context, spec.solver.grid_step_m)
    cells = region.region_cells(spec.sample.freeform, lay)
    cols = np.asarray(columns, dtype=float)
    assert cols.size == cells.shape[0]
    rho = np.repeat(cols[:, None], cells.shape[1], axis=1)
    if rows_solid is not None:
        rho[:, rows_solid] = 1.0
    np.save(tmp_path / "pattern.npy", rho)
    g = lay.grid
    origin = region.pixel_origin(spec.sample.freeform, lay)
    ff_text = (f'density_file = "pattern.npy"\npixel_nm = [{g.dx * 1e9!r}, {g.dz * 1e9!r}]\n'
               f"origin_nm = [{origin[0] * 1e9!r}, {origin[1] * 1e9!r}]")
    return write(tmp_path, freeform=ff_text, sample_extra=extra), rho, g.dx


def test_exported_freeform_area_equals_the_pixel_area(tmp_path, capsys):
    import gdstk
    import klayout.db as kdb

    from designer.cli import build_parser
    from designer.export import export_command

    # 50 columns of 10.1 nm: two lines, one of them across the period's seam
    cols = np.zeros(50)
    cols[5:15] = 1
    cols[30:36] = 1
    cols[45:] = 1
    cols[:1] = 1                     # the line 45 .. 50 + 0 crosses the period's seam
    path, rho, dx = _pattern_spec(tmp_path, cols)
    out = tmp_path / "ff.gds"
    args = build_parser().parse_args(["export", str(path), "--out", str(out), "--json"])
    assert export_command(args) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["violations"] == []
    n_periods = round(10e-6 / 505e-9)                      # round(length / period) = 20
    L, dbu = 5e-6, 1e-9
    expected = n_periods * cols.sum() * dx * L
    lines = n_periods * 3            # the line across the seam is one line in the layout
    lib = gdstk.read_gds(str(out))
    (top,) = lib.top_level()
    area = sum(p.area() for p in top.polygons if (p.layer, p.datatype) == (1, 0)) \
        * lib.unit ** 2
    ly = kdb.Layout()
    ly.read(str(out))
    reg = kdb.Region(ly.top_cell().begin_shapes_rec(ly.find_layer(1, 0)))
    k_area = reg.area() * (ly.dbu * 1e-6) ** 2
    # each drawn width is off the pixel width by at most one database unit (snapping)
    for got in (area, k_area, summary["area_m2"]):
        assert abs(got - expected) <= lines * dbu * L, (got, expected)
    assert len([p for p in top.polygons if (p.layer, p.datatype) == (1, 0)]) == lines


def test_export_refuses_a_pattern_that_changes_with_depth(tmp_path, capsys):
    from designer.cli import build_parser
    from designer.export import DesignRuleError, export_command

    cols = np.zeros(50)
    cols[10:30] = 1
    path, _, _ = _pattern_spec(tmp_path, cols, rows_solid=[0])   # a foot under the voids
    args = build_parser().parse_args(["export", str(path), "--out", str(tmp_path / "x.gds")])
    with pytest.raises(DesignRuleError):
        export_command(args)
    assert "etch step 1 of 1" in capsys.readouterr().err
    assert not (tmp_path / "x.gds").exists()


def test_export_flags_a_thin_freeform_line(tmp_path, capsys):
    from designer.cli import build_parser
    from designer.export import DesignRuleError, export_command

    cols = np.zeros(50)
    cols[10:30] = 1
    cols[40:42] = 1                  # two pixels = 20.2 nm, below the 40 nm rule
    path, _, _ = _pattern_spec(tmp_path, cols)
    args = build_parser().parse_args(["export", str(path), "--out", str(tmp_path / "x.gds")])
    with pytest.raises(DesignRuleError):
        export_command(args)
    err = capsys.readouterr().err
    assert "cross-section: min_feature" in err and "layout: min_feature" in err
    assert not (tmp_path / "x.gds").exists()


def test_nominal_only_formulation_solves_one_design(tmp_path):
    """``robust_formulation = false``: the chain projects the nominal design alone (one
    design per scenario instead of the eroded/nominal/dilated three), with the same
    filter radius; the default keeps the three (F. Wang, B. S. Lazarov & O. Sigmund,
    Struct. Multidisc. Optim. 43, 767, 2011)."""
    robust = d.build_problem(s := load_spec(write(tmp_path)), d.parse_optimize(s))
    p = write(tmp_path, name="nominal.toml")
    p.write_text(p.read_text().replace("projection_beta_every = 4",
                                       "projection_beta_every = 4\nrobust_formulation = false"))
    spec = load_spec(p)
    nominal = d.build_problem(spec, d.parse_optimize(spec))
    assert nominal.chain.delta_eta is None and robust.chain.delta_eta == 0.25
    assert nominal.chain.radius_m == pytest.approx(robust.chain.radius_m, rel=1e-12)
    rho = np.full(nominal.chain.shape, 0.3)
    rho[: rho.shape[0] // 2] = 0.8
    assert robust.chain.designs(rho, 8.0).shape[0] == 3
    one = nominal.chain.designs(rho, 8.0)
    assert one.shape[0] == 1
    np.testing.assert_allclose(one[0], robust.chain.designs(rho, 8.0)[1], rtol=1e-12)


def test_damage_factor_from_a_uniform_grey_start_fails_cleanly(tmp_path, capsys):
    """Two rows with no substrate and a uniform grey start: the start binarizes to no
    material, so |E|max in material is 0 and G/E_max is not finite.  The command stops
    with one message naming the spec and the objective, a non-zero exit and no
    traceback (common practice, no source)."""
    from pathlib import Path

    from designer.cli import main

    text = (Path(__file__).parents[1] / "studies/onchip_accelerator/freeform_rows.toml"
            ).read_text()
    text = (text.replace('upper = "mirrored"', 'upper = "mirrored"\ndensity = 0.5')
                .replace("grid_step_nm = 25.0", "grid_step_nm = 50.0")
                .replace('objective = "structure_factor"', 'objective = "damage_factor"')
                .replace("iterations = 12", "iterations = 2"))
    p = tmp_path / "grey_rows.toml"
    p.write_text(text)
    code = main(["design", str(p), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code != 0
    assert "Traceback" not in err and "damage_factor" in err and str(p) in err


# ---------------------------------------------------------------------------------
# error estimate of a stored pixel pattern
# ---------------------------------------------------------------------------------
def test_error_grids_of_a_stored_pattern_tile_its_pixels(tmp_path):
    # On a grid of step pixel/k the error grids are pixel/(k-1) and pixel/(k-2): each
    # places the stored pattern pixel for pixel, i.e. it equals the stored array with
    # every pixel repeated k times along x and z (closed form; geometric similarity of
    # the three grids, P. J. Roache, Verification and Validation in Computational
    # Science and Engineering, 1998, ch. 5)
    from designer.design import refined_step
    from designer.evaluate import pixel_aligned_steps

    cols = np.zeros(50)
    cols[5:15] = 1
    cols[30:36] = 1
    path, rho, dx = _pattern_spec(tmp_path, cols, rows_solid=[0])
    spec = load_spec(path)
    family = get_family("grating")
    fr = spec.sample.freeform
    for k in (1, 2, 3, 4):
        lay = family.layout(spec.sample, spec.context, dx / k)
        assert lay.grid.dx == pytest.approx(dx / k, rel=1e-9)
        placed = region.start_density(fr, lay, lambda: None)
        assert np.array_equal(placed, np.kron(rho, np.ones((k, k))))
        steps = pixel_aligned_steps(spec, lay)
        if k < 3:
            assert steps is None          # no two coarser grids that tile the pixels
        else:
            assert steps == pytest.approx([dx / (k - 1), dx / (k - 2)], rel=1e-12)
    # the refined step of a stored pattern: the pixel over the next integer >= 3
    assert refined_step(spec, dx / 2) == pytest.approx(dx / 3, rel=1e-12)
    assert refined_step(spec, dx / 3.5) == pytest.approx(dx / 4, rel=1e-12)
    # a pattern whose pixels do not start on a cell edge gets the ordinary grids
    shifted = load_spec(path)
    moved = dataclasses.replace(fr, origin_m=(fr.origin_m[0], fr.origin_m[1] + 0.3 * dx))
    shifted = dataclasses.replace(shifted, sample=dataclasses.replace(shifted.sample,
                                                                      freeform=moved))
    lay = family.layout(shifted.sample, shifted.context, dx / 3)
    assert pixel_aligned_steps(shifted, lay) is None


def test_magnitude_figures_carry_the_magnitude_estimate():
    # kappa and |beta_c| depend on |I| only: they carry the three-grid estimate of |I|;
    # a pure phase drift I(h) = I* exp(i a h) leaves |I| exact (closed form)
    from designer.design import figure_errors
    from designer.evaluate import three_grid_estimate

    steps = [1e-9, 1.5e-9, 2.25e-9]
    vals = [2.0 * np.exp(1j * 3e7 * h) for h in steps]
    assert three_grid_estimate(vals, steps).relative_error > 0.01
    assert three_grid_estimate([abs(v) for v in vals], steps).relative_error == 0.0
    coupling = {"beta_c_per_field_m_per_V": 1e-5, "structure_factor": 0.5,
                "max_field_in_material_V_per_m": 2.0, "damage_factor": 0.25,
                "relative_error_estimate": 0.05, "magnitude_error_estimate": 0.01,
                "magnitude_error_note": "observed order 2 (three grids)",
                "error_estimate": {"note": "observed order 1.2 (three grids)"}}
    refined = {"coupling": coupling, "provenance": {"solver": "fdfd", "grid_step_m": 1e-9}}
    coarse = {"coupling": dict(coupling, max_field_in_material_V_per_m=2.1),
              "provenance": {"solver": "fdfd", "grid_step_m": 2e-9}}
    rows = figure_errors(refined, coarse)
    assert rows["structure_factor"]["relative_error"] == 0.01
    assert "|I|" in rows["structure_factor"]["error_rule"]
    # E_max two grids, first order: |2.0 - 2.1| / (2 - 1) / 2.0
    assert rows["max_field_in_material_V_per_m"]["relative_error"] == pytest.approx(0.05)
    assert rows["damage_factor"]["relative_error"] == pytest.approx(math.hypot(0.01, 0.05))
    del coupling["magnitude_error_estimate"]
    assert figure_errors(refined, coarse)["structure_factor"]["relative_error"] == 0.05
