"""Inverse design: known optimum, gradients, improvement under rules, determinism, resume.

References used:
* the maximum of the coupling over a film thickness is found by a dense scan with
  the exact transfer-matrix solution (solvers.layers, itself checked against the
  Fresnel/Airy formulas of M. Born & E. Wolf, *Principles of Optics*, ch. 1), called
  directly rather than through the optimizer's objective code;
* gradients are compared with central finite differences of the same objective
  (common practice, no source);
* the design-rule check is designer.fabrication.design_rule_check on the family's
  feature sizes.
Spec values below are scenarios of our own.
"""

import json
import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import constants

from designer import design as d
from designer import optimize as opt
from designer.errors import SpecError, UsageError
from designer.evaluate import angular_frequency, evaluate, evaluation_json
from designer.spec import load_spec, parse_spec
from solvers import layers

MEMBRANE = """\
[beam]
voltage_kV = 100.0
[laser]
wavelength_nm = 800.0
angle_deg = 30.0
[sample]
family = "membrane"
material = "silicon_nitride"
thickness_nm = {thickness}
[optimize]
objective = "coupling"
variables = {{ thickness_nm = [{lo}, {hi}] }}
iterations = {iterations}
starts = {starts}
seed = 3
method = "{method}"
learning_rate = 0.05
checkpoint_every = 2
{extra}
"""

GRATING = """\
[beam]
voltage_kV = 30.0
[laser]
wavelength_nm = 800.0
[sample]
family = "grating"
material = "fused_silica"
duty_cycle = 0.5
tooth_height_nm = 130.0
[path]
length_um = 10.0
[solver]
grid_step_nm = 20.0
[fabrication]
min_feature_nm = 60.0
min_gap_nm = 60.0
etch_depth_nm = [50.0, 300.0]
[optimize]
objective = "{objective}"
variables = {{ tooth_height_nm = [50.0, 400.0], duty_cycle = [0.1, 0.9] }}
iterations = {iterations}
starts = {starts}
method = "adam"
learning_rate = 0.1
{extra}
"""


def write(tmp_path, text, name="spec.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def membrane(tmp_path, *, thickness=45.0, lo=40.0, hi=140.0, iterations=40, starts=1,
             method="adam", extra="", name="m.toml"):
    return write(tmp_path, MEMBRANE.format(thickness=thickness, lo=lo, hi=hi,
                                           iterations=iterations, starts=starts,
                                           method=method, extra=extra), name)


def design_cli(path, out):
    """``velomatch design PATH --out OUT`` through the command line, with the handler
    called directly; returns the exit code."""
    from designer import commands
    from designer.cli import main

    orig = commands.run_design
    commands.run_design = d.design_command
    try:
        return main(["design", str(path), "--out", str(out)])
    finally:
        commands.run_design = orig


def scan_coupling(spec, t_lo_nm, t_hi_nm, n=2001):
    """|beta_c|/E0 of the film vs thickness, straight from the transfer-matrix solver."""
    eps = spec.sample.material.eps
    w = angular_frequency(spec.laser.wavelength_m)
    v = spec.beam.velocity_m_per_s
    angle = spec.laser.angle_rad

    def f(t):
        sol = layers.solve_plane_wave(jnp.array([1.0, eps, 1.0], dtype=complex),
                                      jnp.stack([0.0, t]), w, angle)
        return constants.e * jnp.abs(layers.coupling_normal(sol, 0.0, v)) / (
            2 * constants.hbar * w)

    t = np.linspace(t_lo_nm, t_hi_nm, n) * 1e-9
    return t * 1e9, np.asarray(jax.jit(jax.vmap(f))(t))


# ---------------------------------------------------------------------------------
# a known answer
# ---------------------------------------------------------------------------------
@pytest.mark.parametrize("method,lo,hi,start", [
    ("adam", 40.0, 140.0, 45.0),
    pytest.param("lbfgs", 200.0, 330.0, 210.0, marks=pytest.mark.slow)])
def test_film_thickness_reaches_the_scanned_maximum(tmp_path, method, lo, hi, start):
    spec = load_spec(membrane(tmp_path, thickness=start, lo=lo, hi=hi, method=method,
                              iterations=60 if method == "adam" else 15))
    t, y = scan_coupling(spec, lo, hi)
    k = int(np.argmax(y))
    assert 0 < k < len(t) - 1, "the test interval must hold one interior maximum"
    assert y[0] < 0.9 * y[k] or y[-1] < 0.9 * y[k]
    config = d.parse_optimize(spec)
    result = d.run_design(spec, tmp_path / "out", config, progress=False)
    found = result.best_record["objective"]
    assert result.start_record["objective"] < 0.95 * y[k]     # the start is not the answer
    assert abs(found - y[k]) <= 0.01 * y[k]
    assert found <= y[k] * (1 + 1e-6)                          # same physics, no overshoot
    assert abs(result.best_record["values"]["thickness_nm"] - t[k]) < 0.1 * (hi - lo)


# ---------------------------------------------------------------------------------
# gradients
# ---------------------------------------------------------------------------------
def _problem(spec):
    return d.build_problem(spec, d.parse_optimize(spec))


def _fd_check(problem, u, h=1e-5):
    aux = (problem.masks(u), np.zeros(len(problem.constraint_names)), 1.0)
    (value, _), grad = jax.jit(jax.value_and_grad(problem.loss, has_aux=True))(u, aux)
    fd = []
    for i in range(u.size):
        e = np.zeros_like(u)
        e[i] = h
        fp = float(problem.evaluate(u + e, aux)[0])
        fm = float(problem.evaluate(u - e, aux)[0])
        fd.append((fp - fm) / (2 * h))
    return np.asarray(grad), np.asarray(fd), float(value)


def test_layer_gradient_matches_finite_differences(tmp_path):
    spec = load_spec(membrane(tmp_path, thickness=120.0, lo=40.0, hi=300.0,
                              extra='[optimize.robust]\nvoltage_kV = [90.0, 110.0]\n'
                                    'points = 2\naggregate = "mean"'))
    problem = _problem(spec)
    assert len(problem.models) == 3           # nominal + 2 voltages
    grad, fd, _ = _fd_check(problem, np.array([0.3]))
    np.testing.assert_allclose(grad, fd, rtol=1e-5)


@pytest.mark.slow
def test_fdfd_gradient_matches_finite_differences(tmp_path):
    spec = load_spec(write(tmp_path, GRATING.format(
        objective="damage_factor", iterations=2, starts=1,
        extra='[optimize.robust]\netch_nm = 5.0\npoints = 2\naggregate = "mean"')))
    problem = _problem(spec)
    assert [m.scenario.etch_m for m in problem.models] == [0.0, -5e-9, 5e-9]
    u = np.array([0.27, 0.52])
    grad, fd, _ = _fd_check(problem, u, h=1e-5)
    np.testing.assert_allclose(grad, fd, rtol=2e-4, atol=1e-6 * np.abs(grad).max())


# ---------------------------------------------------------------------------------
# a grating start is improved and stays within the rules
# ---------------------------------------------------------------------------------
@pytest.mark.slow
def test_grating_start_improves_and_passes_rules(tmp_path):
    from designer.fabrication import design_rule_check
    from designer.families import get_family

    spec = load_spec(write(tmp_path, GRATING.format(objective="coupling", iterations=6,
                                                    starts=2, extra="")))
    assert spec.sample.period_phase_matched and spec.sample.duty_cycle == 0.5
    config = d.parse_optimize(spec)
    result = d.run_design(spec, tmp_path / "out", config, progress=False)
    assert result.best_record["objective"] > 1.03 * result.start_record["objective"]
    family = get_family("grating")
    for u, record, violations in result.per_start_best:
        params = result.problem.design_params(u)
        assert violations == []
        assert design_rule_check(family.features(params), spec.fabrication) == []
        assert 50.0 <= record["values"]["tooth_height_nm"] <= 300.0   # etch_depth rule
    # the optimizer's value agrees with an independent evaluation of the design
    best = result.problem.design_params(result.best_u)
    raw = d.design_raw(spec, best)
    ev = evaluate(parse_spec(raw), refine=False)
    from solvers.coupling import beta_from_integral

    beta = abs(complex(beta_from_integral(ev.run.integral_V, ev.omega)))
    assert abs(beta - result.best_record["objective"]) < 2e-3 * beta


# ---------------------------------------------------------------------------------
# determinism, resume, outputs
# ---------------------------------------------------------------------------------
def _summary(result):
    return [(st.reason, st.losses, [r["values"] for r in st.history]) for st in result.starts]


def test_same_seed_same_result_and_resume_matches(tmp_path):
    spec = load_spec(membrane(tmp_path, thickness=100.0, lo=40.0, hi=300.0, iterations=6,
                              starts=2))
    config = d.parse_optimize(spec)
    a = d.run_design(spec, tmp_path / "a", config, progress=False)
    b = d.run_design(spec, tmp_path / "b", config, progress=False)
    assert _summary(a) == _summary(b)
    assert a.starts[1].history[0]["values"] != a.starts[0].history[0]["values"]  # random start
    # interruption 1: an iteration cap, then --resume with the full budget
    short = d.parse_optimize(spec, iterations=3)
    c = d.run_design(spec, tmp_path / "c", short, progress=False)
    assert [len(st.losses) for st in c.starts] == [3, 3]
    c = d.run_design(spec, tmp_path / "c", config, resume=True, progress=False)
    assert _summary(c) == _summary(a)
    np.testing.assert_array_equal(c.best_u, a.best_u)
    # interruption 2: a crash in the middle of the second start
    def crash(st):
        if st.index == 1 and len(st.losses) == 5:
            raise KeyboardInterrupt
    with pytest.raises(KeyboardInterrupt):
        d.run_design(spec, tmp_path / "e", config, progress=False, on_iteration=crash)
    saved = json.loads((tmp_path / "e" / d.CHECKPOINT).read_text())
    assert [len(s["losses"]) for s in saved["starts"]] == [6, 4]   # checkpoint_every = 2
    e = d.run_design(spec, tmp_path / "e", config, resume=True, progress=False)
    assert _summary(e) == _summary(a)


def test_outputs_reproduce_under_evaluate(tmp_path):
    spec_path = membrane(tmp_path, thickness=100.0, lo=40.0, hi=140.0, iterations=8)
    assert design_cli(spec_path, tmp_path / "out") == 0
    # an existing non-empty folder is never reused unless asked
    assert design_cli(spec_path, tmp_path / "out") == 2
    out = tmp_path / "out"
    for name in ("design.toml", "evaluation.json", "refined.json", "start_refined.json",
                 "design.png",
                 "history.json", "convergence.png", "comparison.json", "comparison.txt",
                 "checkpoint.json", "report.html"):
        assert (out / name).exists(), name
    html = (out / "report.html").read_text()
    assert "Start against optimized" in html and "data:image/png;base64," in html
    again = evaluation_json(evaluate(load_spec(out / "design.toml")))
    stored = json.loads((out / "evaluation.json").read_text())
    assert again["coupling"]["integral_V"] == stored["coupling"]["integral_V"]
    assert again["coupling"]["beta_c"] == stored["coupling"]["beta_c"]
    comp = json.loads((out / "comparison.json").read_text())
    f = comp["figures"]["beta_c_per_field_m_per_V"]
    assert f["optimized"] > f["start"]
    hist = json.loads((out / "history.json").read_text())
    assert len(hist["starts"][0]["history"]) == 8


# ---------------------------------------------------------------------------------
# [optimize] validation
# ---------------------------------------------------------------------------------
@pytest.mark.parametrize("variables,extra,key,words", [
    ("{ width_nm = [1.0, 2.0] }", "", "optimize.variables.width_nm", "thickness_nm"),
    ("{ thickness_nm = [1.0, 200.0] }", "", "optimize.variables.thickness_nm",
     "physical bounds"),
    ("{ thickness_nm = [150.0, 100.0] }", "", "optimize.variables.thickness_nm",
     "lower < upper"),
    ("['thickness_nm']", 'objective = "speed"', "optimize.objective", "must be one of"),
    ("['thickness_nm']", "[optimize.robust]\netch_nm = 5.0", "optimize.robust.etch_nm",
     "lateral edges"),
])
def test_bad_optimize_tables_name_the_key(tmp_path, variables, extra, key, words):
    text = f"""\
[beam]
voltage_kV = 100.0
[laser]
wavelength_nm = 800.0
angle_deg = 30.0
[sample]
family = "membrane"
material = "silicon_nitride"
thickness_nm = 100.0
[optimize]
variables = {variables}
{extra}
"""
    spec = load_spec(write(tmp_path, text))
    with pytest.raises(SpecError) as err:
        d.parse_optimize(spec)
    assert err.value.key == key
    assert words in str(err.value)
    assert str(tmp_path / "spec.toml") in str(err.value)


def test_resume_refuses_a_changed_spec(tmp_path):
    spec = load_spec(membrane(tmp_path, iterations=2))
    d.run_design(spec, tmp_path / "out", d.parse_optimize(spec), progress=False)
    other = load_spec(membrane(tmp_path, iterations=2, thickness=50.0, name="n.toml"))
    with pytest.raises(UsageError):
        d.run_design(other, tmp_path / "out", d.parse_optimize(other), resume=True,
                     progress=False)


# ---------------------------------------------------------------------------------
# optimizer pieces
# ---------------------------------------------------------------------------------
def test_pieces_on_a_quadratic_with_a_box():
    # minimum of (x - 2)^2 + (y + 1)^2 on [0, 1] x [0, 1] is at (1, 0): closed form
    box = opt.Box(np.zeros(2), np.ones(2))

    def objective(x, masks):
        v = -((x[0] - 2.0) ** 2 + (x[1] + 1.0) ** 2)
        return v, jnp.stack([v]), jnp.zeros(1)

    loss = opt.make_loss(objective, None, box, opt.Penalty())
    for method in ("adam",):
        tr = opt.make_transform(method, 0.1)
        step = opt.make_step(loss, tr)
        u, state = np.array([0.2, 0.7]), tr.init(np.array([0.2, 0.7]))
        for _ in range(60):
            u, state, *_ = step(u, state, ((), np.zeros(0), 1.0))
        np.testing.assert_allclose(np.asarray(u), [1.0, 0.0], atol=1e-9)
        restored = opt.state_from_json(json.loads(json.dumps(opt.state_to_json(state))),
                                       tr.init(np.zeros(2)))
        for a, b in zip(jax.tree_util.tree_leaves(state), jax.tree_util.tree_leaves(restored)):
            np.testing.assert_array_equal(np.asarray(a), np.asarray(b))
    assert opt.stop_reason([1.0, 0.5], 1.0, opt.StopRule(iterations=2)) == "iteration budget"
    assert opt.stop_reason([1.0] * 5, 1.0, opt.StopRule(iterations=9)) == \
        "loss change below tolerance"


@pytest.mark.slow
def test_field_cap_in_material_is_respected(tmp_path):
    # A cap on the largest field in material, between the start design's value and the
    # unconstrained optimum's, must change the answer and hold for the returned design
    # as measured by an independent evaluation (common practice, no source).
    from designer.evaluate import coupling_figures

    def run(extra, name):
        text = GRATING.replace('method = "adam"', 'optimizer = "lbfgsb"')
        spec = load_spec(write(tmp_path, text.format(objective="coupling", iterations=12,
                                                     starts=1, extra=extra), name))
        result = d.run_design(spec, tmp_path / name.replace(".toml", ""),
                              d.parse_optimize(spec), progress=False)
        best = result.problem.design_params(result.best_u)
        figures = coupling_figures(evaluate(parse_spec(d.design_raw(spec, best)),
                                            refine=False))
        return result, figures

    free, free_fig = run("", "free.toml")
    start_fig = coupling_figures(evaluate(load_spec(tmp_path / "free.toml"), refine=False))
    e_start = start_fig["max_field_in_material_V_per_m"]
    e_free = free_fig["max_field_in_material_V_per_m"]
    assert e_free > 1.02 * e_start          # the unconstrained optimum raises the field
    cap = 0.5 * (e_start + e_free)
    capped, capped_fig = run(f"max_field_V_per_m = {cap!r}", "capped.toml")
    assert capped_fig["max_field_in_material_V_per_m"] <= cap * (1 + 1e-3)
    assert capped.best_record["objective"] >= capped.start_record["objective"]
    # the cap costs objective; the two end points are compared to the default grid's
    # cell ripple (design.CELL_RIPPLE): the optimizer's stops are only that precise
    assert capped_fig["max_field_in_material_V_per_m"] < e_free
    assert capped.best_record["objective"] <= free.best_record["objective"] * (1 + d.CELL_RIPPLE)


# ---------------------------------------------------------------------------------
# the start check and the error-bar comparison
# ---------------------------------------------------------------------------------
def test_start_outside_the_rules_is_reported_then_moved(tmp_path, capsys):
    # A 45 nm film under a [fabrication] thickness rule of [60, 140] nm: the start is
    # outside the rules.  design must say so (stderr and comparison.json), start from
    # the nearest bound (60 nm, closed form), and its "start" column must be that moved
    # film: compared with the transfer-matrix solution of a 60 nm film computed
    # directly (Born & Wolf, see the module docstring).  Layer stacks are exact, so a
    # gain of several per cent is far outside the (zero) error and gives no warning.
    path = membrane(tmp_path, thickness=45.0, lo=40.0, hi=140.0, iterations=3,
                    extra="[fabrication]\nthickness_nm = [60.0, 140.0]")
    assert design_cli(path, tmp_path / "out") == 0
    captured = capsys.readouterr()
    assert "the spec's own start is outside the rules" in captured.err
    assert "sample.thickness_nm = 45 is outside its bounds [60, 140]" in captured.err
    assert "continues from the start moved inside the bounds (thickness_nm = 60)" in captured.err
    assert "start: the spec's start moved inside the bounds (thickness_nm 45 -> 60)" in \
        captured.out
    comp = json.loads((tmp_path / "out" / "comparison.json").read_text())
    check = comp["start_check"]
    assert check["within_rules"] is False and check["continues_from"] == "moved"
    assert check["spec_values"] == {"thickness_nm": pytest.approx(45.0)}
    assert check["bounds"]["thickness_nm"] == pytest.approx([60.0, 140.0])
    assert check["moved"]["thickness_nm"]["from"] == pytest.approx(45.0)
    assert check["moved"]["thickness_nm"]["to"] == pytest.approx(60.0)
    assert "fabrication rules" in check["bounds_from"]["thickness_nm"]
    assert [v["rule"] for v in check["design_rules"]["violations"]] == ["thickness"]
    assert check["violations"] == comp["design_rule_violations"]["spec_start"]
    assert comp["design_rule_violations"]["start"] == []       # the moved start is clean
    assert comp["start_design"]["kind"] == "moved"
    assert comp["variables"]["thickness_nm"]["start"] == pytest.approx(60.0)
    assert comp["variables"]["thickness_nm"]["spec_start"] == pytest.approx(45.0)
    spec = load_spec(path)
    t, y = scan_coupling(spec, 45.0, 60.0, n=2)
    f = comp["figures"]["beta_c_per_field_m_per_V"]
    assert abs(f["start"] - y[1]) <= 1e-6 * y[1]                     # the moved start
    assert abs(check["spec_start_figures"]["beta_c_per_field_m_per_V"] - y[0]) <= 1e-6 * y[0]
    r = f["refined"]
    assert r["start"]["relative_error"] == 0.0 and r["optimized"]["relative_error"] == 0.0
    assert r["ratio"] > 1.05 and r["gain_exceeds_error"] is True
    assert comp["gain"]["gain_exceeds_error"] is True and comp["gain"]["warning"] is None
    assert comp["warnings"] == []
    assert "inside the combined error" not in captured.err + captured.out
    html = (tmp_path / "out" / "report.html").read_text()
    assert "The start is outside the rules" in html and "(exact)" in html


def _evaluation(beta, rel, e_max, step, solver="fdfd"):
    """A constructed evaluation JSON (only the keys the comparison reads)."""
    kappa = beta * 1e7
    return {"coupling": {"beta_c_per_field_m_per_V": beta, "structure_factor": kappa,
                         "max_field_in_material_V_per_m": e_max,
                         "damage_factor": kappa / e_max, "relative_error_estimate": rel,
                         "error_estimate": {"note": "observed order 2.00 (three grids)"}},
            "provenance": {"solver": solver, "grid_step_m": step}}


def test_gain_inside_the_combined_error_warns():
    # Error propagation for a quotient of independent results: relative errors add in
    # quadrature (J. R. Taylor, An Introduction to Error Analysis, 2nd ed., 1997,
    # section 3.6); the E_max error is Richardson's two-grid estimate at first order,
    # |E_f - E_c| / (r - 1) / E_f (L. F. Richardson, Phil. Trans. R. Soc. A 210, 307,
    # 1911).  The numbers are constructed for the arithmetic.
    h = 10e-9
    start = _evaluation(1.00e-8, 0.02, 1.0, h)
    start_coarse = _evaluation(0.99e-8, None, 1.1, 2 * h)      # E_max error 0.1
    inside = _evaluation(1.01e-8, 0.02, 1.0, h)
    out = d.refined_comparison(start, start_coarse, inside, start_coarse, "coupling")
    g = out["gain"]
    assert g["figure"] == "beta_c_per_field_m_per_V"
    assert g["ratio"] == pytest.approx(1.01)
    assert g["relative_error"] == pytest.approx(np.hypot(0.02, 0.02))
    assert g["absolute_error"] == pytest.approx(1.01 * np.hypot(0.02, 0.02))
    assert g["gain_exceeds_error"] is False
    assert "inside the combined error estimate" in g["warning"]
    assert out["warnings"] == [g["warning"]]
    rows = out["figures"]
    e = rows["max_field_in_material_V_per_m"]["start"]
    assert e["relative_error"] == pytest.approx(0.1) and e["absolute_error"] == pytest.approx(0.1)
    assert rows["damage_factor"]["start"]["relative_error"] == pytest.approx(np.hypot(0.02, 0.1))
    assert rows["structure_factor"]["optimized"]["relative_error"] == 0.02
    # a 20 % gain with 2 % errors is a gain: no warning
    clear = d.refined_comparison(start, start_coarse, _evaluation(1.2e-8, 0.02, 1.0, h),
                                 start_coarse, "coupling")
    assert clear["gain"]["gain_exceeds_error"] is True and clear["warnings"] == []
    # a loss beyond the error is named as one
    worse = d.refined_comparison(start, start_coarse, _evaluation(0.8e-8, 0.02, 1.0, h),
                                 start_coarse, "structure_factor")
    assert "worse than the start" in worse["gain"]["warning"]
    # no estimate (and no coarser grid to fall back on): the gain cannot be judged
    bare = _evaluation(1e-8, None, 1.0, h)
    unknown = d.refined_comparison(bare, bare, inside, start_coarse, "coupling")
    assert unknown["gain"]["gain_exceeds_error"] is None
    assert "no error estimate" in unknown["gain"]["warning"]


@pytest.mark.slow
def test_a_run_that_cannot_move_warns_that_its_gain_is_inside_the_error(tmp_path, capsys):
    # One iteration records only the start, so the optimized design is the start
    # (rounded for the cleanroom) and its ratio is 1 to rounding: any positive error
    # estimate must contain it, and design must say so (common practice, no source).
    # The start keeps the rules, so it is the spec's own.
    text = GRATING.replace('method = "adam"', 'optimizer = "lbfgsb"').replace(
        "grid_step_nm = 20.0", "grid_step_nm = 40.0").replace("length_um = 10.0",
                                                               "length_um = 3.0")
    path = write(tmp_path, text.format(objective="coupling", iterations=1, starts=1, extra=""))
    assert design_cli(path, tmp_path / "out") == 0
    captured = capsys.readouterr()
    assert "outside the rules" not in captured.err
    assert "start: the spec's own start" in captured.out
    warning = "is inside the combined error estimate: it is not a gain"
    assert warning in captured.err and warning in captured.out
    out = tmp_path / "out"
    comp = json.loads((out / "comparison.json").read_text())
    assert comp["start_check"]["within_rules"] and comp["start_design"]["kind"] == "spec"
    g = comp["gain"]
    assert g["gain_exceeds_error"] is False and warning in g["warning"]
    assert abs(g["ratio"] - 1.0) < 1e-3 < g["absolute_error"]
    start = json.loads((out / "start_refined.json").read_text())
    refined = json.loads((out / "refined.json").read_text())
    assert start["provenance"]["grid_step_m"] == refined["provenance"]["grid_step_m"]
    for key, _ in d.FIGURE_KEYS:
        row = comp["figures"][key]["refined"]
        for side in ("start", "optimized"):
            assert row[side]["relative_error"] > 0
            assert row[side]["absolute_error"] == pytest.approx(
                row[side]["value"] * row[side]["relative_error"])
    assert comp["figures"]["beta_c_per_field_m_per_V"]["refined"]["start"]["value"] == \
        start["coupling"]["beta_c_per_field_m_per_V"]
    assert warning in (out / "report.html").read_text()


def test_no_ratio_against_an_unresolved_start():
    """A start whose figure is known to no better than 50 % (a uniform grey density
    couples ~1e-15 +/- 60 %) gives no ratio; a resolved one gives the ratio with the
    root-sum-square error (J. R. Taylor, An Introduction to Error Analysis, 1997, 3.6)."""
    from designer.design import gain_of

    grey = {"value": 3.9e-14, "relative_error": 0.63}
    opt_row = {"value": 0.64, "relative_error": 0.13}
    g = gain_of(grey, opt_row)
    assert g["ratio"] is None and "not resolved" in g["note"]
    # a start at rounding level (a uniform density has no synchronous harmonic: zero
    # coupling; common practice, no source) gives none either, whatever its estimate
    g = gain_of({"value": 4.05e-14, "relative_error": 0.33}, opt_row)
    assert g["ratio"] is None and "rounding" in g["note"]
    g = gain_of({"value": 0.32, "relative_error": 0.03}, opt_row)
    assert g["ratio"] == pytest.approx(2.0)
    assert g["absolute_error"] == pytest.approx(2.0 * math.hypot(0.03, 0.13))
