"""Fabrication rules: parsing, bounds, penalties and design-rule checks."""

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from designer import fabrication as fab
from designer.errors import SpecError
from designer.tables import TableReader

NM = 1e-9


def rules_from(table):
    return fab.parse_fabrication(TableReader(table, "fabrication", "demo.toml"))


# ---------------------------------------------------------------- parsing
def test_defaults_when_table_absent():
    r = rules_from(None)
    assert r == fab.FabricationRules()
    assert r.min_feature_m == 0 and r.thickness_m is None and math.isinf(r.max_aspect_ratio)
    assert r.corner_radius_m == pytest.approx(10 * NM)        # common practice, no source


def test_full_table_in_si():
    r = rules_from({"min_feature_nm": 50.0, "min_gap_nm": 60, "thickness_nm": [50.0, 500.0],
                    "etch_depth_nm": 300, "max_aspect_ratio": 5.0,
                    "sidewall_angle_deg": 4.0, "corner_radius_nm": 12.0,
                    "materials": ["fused_silica", "silicon"], "write_field_um": 100.0})
    assert r.min_feature_m == pytest.approx(50 * NM) and r.min_gap_m == pytest.approx(60 * NM)
    assert r.thickness_m == pytest.approx((50 * NM, 500 * NM))
    assert r.etch_depth_m == pytest.approx((300 * NM, 300 * NM))     # a number = fixed
    assert r.sidewall_angle_rad == pytest.approx(math.radians(4.0))
    assert r.materials == ("fused_silica", "silicon")
    assert r.write_field_m == pytest.approx(100e-6)


@pytest.mark.parametrize("key, value, words", [
    ("min_feature_nm", -5.0, ">= 0"),
    ("thickness_nm", [500.0, 50.0], "lower bound exceeds"),
    ("thickness_nm", [1.0, 2.0, 3.0], "pair"),
    ("etch_depth_nm", [0.0, 100.0], "> 0"),
    ("max_aspect_ratio", 0.0, "> 0"),
    ("materials", "silicon", "list"),
    ("sidewall_angle_deg", 90.0, "< 90"),
    ("min_gap", 50.0, "unknown key"),
])
def test_bad_values_name_file_key_value(key, value, words):
    with pytest.raises(SpecError) as err:
        rules_from({key: value})
    text = str(err.value)
    assert "demo.toml" in text and f"fabrication.{key}" in text and words in text
    assert repr(value) in text


# ---------------------------------------------------------------- bounds
def test_bounds_tightened_by_rules():
    rules = rules_from({"min_feature_nm": 60.0, "min_gap_nm": 100.0,
                        "etch_depth_nm": [100.0, 600.0], "thickness_nm": 200.0,
                        "sidewall_angle_deg": 3.0})
    variables = {"period_nm": (400.0, 100.0, 2000.0), "duty_cycle": (0.5, 0.05, 0.95),
                 "tooth_height_nm": (300.0, 10.0, 2000.0), "gap_nm": (400.0, 20.0, 2000.0),
                 "thickness_nm": (100.0, 10.0, 1000.0),
                 "sidewall_angle_deg": (0.0, 0.0, 30.0), "shift_nm": (0.0, -200.0, 200.0)}
    b = fab.bounds_from_rules(rules, variables)
    assert b["period_nm"] == pytest.approx((160.0, 2000.0))
    assert b["duty_cycle"] == pytest.approx((60 / 400, 1 - 100 / 400))
    assert b["tooth_height_nm"] == pytest.approx((100.0, 600.0))
    assert b["gap_nm"] == pytest.approx((100.0, 2000.0))
    assert b["thickness_nm"] == pytest.approx((200.0, 200.0))
    assert b["sidewall_angle_deg"] == pytest.approx((3.0, 3.0))
    assert b["shift_nm"] == (-200.0, 200.0)


def test_bounds_conflict_is_reported():
    rules = rules_from({"min_feature_nm": 300.0, "min_gap_nm": 300.0})
    with pytest.raises(fab.FabricationConflict, match="duty_cycle"):
        fab.bounds_from_rules(rules, {"period_nm": (700.0, 700.0, 700.0),
                                      "duty_cycle": (0.3, 0.1, 0.4)})


# ---------------------------------------------------------------- constraints, penalties
def test_coupled_constraints_and_gradient():
    rules = rules_from({"min_feature_nm": 50.0, "min_gap_nm": 80.0, "max_aspect_ratio": 4.0})
    variables = {"period_nm": (400.0, 100, 1000), "duty_cycle": (0.3, 0.01, 0.99),
                 "tooth_height_nm": (300.0, 10, 1000)}
    names, g = fab.constraint_function(rules, variables)
    assert names == ("min_feature", "min_gap", "aspect_ratio")
    vals = g({"duty_cycle": jnp.array(0.1)})        # 40 nm tooth, 360 nm gap
    np.testing.assert_allclose(vals, [1 - 40 / 50, 1 - 360 / 80, 300 / (4 * 40) - 1])
    dg = jax.jacobian(lambda d: g({"duty_cycle": d}))(0.1)
    np.testing.assert_allclose(dg, [-400 / 50, 400 / 80, -300 / (4 * 0.1 ** 2 * 400)],
                               rtol=1e-12)


def test_quadratic_penalty():
    g = jnp.array([-1.0, 0.5, 2.0])
    assert float(fab.quadratic_penalty(g, 4.0)) == pytest.approx(2.0 * (0.25 + 4.0))
    assert float(fab.quadratic_penalty(jnp.array([-0.1, -3.0]))) == 0.0


def test_augmented_lagrangian_is_c1_and_solves_a_closed_form_problem():
    # psi(g, lam, mu) (Rockafellar 1973; Bertsekas 1982): value and slope continuous
    # where the branches meet, g = -lam / mu.
    lam, mu = 1.5, 3.0
    psi = lambda x: fab.al_penalty(jnp.array([x]), jnp.array([lam]), mu)  # noqa: E731
    g0 = -lam / mu
    for x in (g0 - 1e-7, g0 + 1e-7):
        assert float(psi(x)) == pytest.approx(-lam ** 2 / (2 * mu), abs=1e-6)
    assert float(jax.grad(psi)(g0 - 1e-9)) == pytest.approx(0.0, abs=1e-7)
    assert float(jax.grad(psi)(g0 + 1e-9)) == pytest.approx(0.0, abs=1e-7)
    # minimize (x - 2)^2 subject to x <= 1: KKT gives x* = 1, multiplier 2(2 - x*) = 2
    mu = 10.0

    @jax.jit
    def outer(x, lam_k):
        grad = jax.grad(lambda x: (x - 2) ** 2 + fab.al_penalty(jnp.array([x - 1]), lam_k, mu))
        # inner minimization by plain gradient steps, then the multiplier update
        x = jax.lax.fori_loop(0, 200, lambda _, x: x - 0.04 * grad(x), x)
        return x, fab.al_update_multipliers(jnp.array([x - 1]), lam_k, mu)

    x, lam_k = jnp.array(0.0), jnp.array([0.0])
    for _ in range(30):
        x, lam_k = outer(x, lam_k)
    assert float(x) == pytest.approx(1.0, abs=1e-6)
    assert float(lam_k[0]) == pytest.approx(2.0, abs=1e-5)


# ---------------------------------------------------------------- feature DRC
RULES = fab.FabricationRules(min_feature_m=50 * NM, min_gap_m=60 * NM,
                             thickness_m=(50 * NM, 500 * NM),
                             etch_depth_m=(100 * NM, 600 * NM), max_aspect_ratio=5.0)


def clean_grating():
    # a demo grating of our own: 400 nm period, 200 nm teeth 300 nm high, 100 nm membrane
    return [fab.Feature("solid", 200 * NM, (0.0, 150 * NM), "tooth 1 width"),
            fab.Feature("gap", 200 * NM, (200 * NM, 150 * NM), "gap 1 width"),
            fab.Feature("height", 300 * NM, (0.0, 150 * NM), "tooth 1 height",
                        lateral_m=200 * NM),
            fab.Feature("layer", 100 * NM, (0.0, -50 * NM), "membrane thickness"),
            fab.Feature("solid", 50 * NM, (0.0, 0.0), "bar exactly at the limit")]


def test_clean_design_passes():
    assert fab.design_rule_check(clean_grating(), RULES) == []
    assert fab.design_rule_check(clean_grating(), fab.FabricationRules()) == []


@pytest.mark.parametrize("feature, rule, measured, limit", [
    (fab.Feature("solid", 40 * NM, (1e-7, 2e-7), "tooth 2 width"), "min_feature", 40, 50),
    (fab.Feature("gap", 30 * NM, (3e-7, 2e-7), "gap 2 width"), "min_gap", 30, 60),
    (fab.Feature("layer", 700 * NM, (0.0, 0.0), "membrane thickness"), "thickness", 700, 500),
    (fab.Feature("layer", 20 * NM, (0.0, 0.0), "top film"), "thickness", 20, 50),
    (fab.Feature("height", 50 * NM, (0.0, 0.0), "tooth height"), "etch_depth", 50, 100),
    (fab.Feature("height", 500 * NM, (0.0, 0.0), "tooth height", lateral_m=80 * NM),
     "aspect_ratio", 500, 400),
])
def test_planted_violation_is_caught(feature, rule, measured, limit):
    found = fab.design_rule_check(clean_grating() + [feature], RULES)
    assert len(found) == 1
    v = found[0]
    assert (v.rule, v.location) == (rule, feature.location)
    assert v.measured_m == pytest.approx(measured * NM)
    assert v.limit_m == pytest.approx(limit * NM)
    assert "\n" not in v.message and rule in v.message and feature.description in v.message


def test_feature_kind_and_materials():
    with pytest.raises(ValueError):
        fab.Feature("tooth", 1e-7, (0, 0), "bad kind")
    rules = fab.FabricationRules(materials=("fused_silica",))
    found = fab.check_materials(["fused_silica", "silicon", "silicon"], rules)
    assert [v.rule for v in found] == ["material"] and "silicon" in found[0].message
    assert fab.check_materials(["anything"], fab.FabricationRules()) == []


# ---------------------------------------------------------------- pixel DRC
H = 5 * NM


def test_disc_element_extent():
    assert fab.disc_element(45 * NM, H, H).shape == (9, 9)     # odd 9 pixels: exact
    assert fab.disc_element(50 * NM, H, H).shape == (11, 11)   # even: strict by < 1 px
    assert fab.disc_element(50 * NM, H, 10 * NM).shape == (11, 5)


def test_pattern_with_thin_line_fails_and_wide_passes():
    # Morphological opening/closing as a length-scale measure (Sigmund, Struct.
    # Multidisc. Optim. 33, 401, 2007).  A 15 nm line beside a 60 nm bar; rule 45 nm.
    solid = np.zeros((40, 30), bool)
    solid[5:17, :] = True            # 60 nm bar, spans the whole height
    solid[28:31, 5:25] = True        # 15 nm line, 100 nm long
    rules = fab.FabricationRules(min_feature_m=45 * NM)
    found = fab.pattern_rule_check(solid, H, H, rules, origin=(1e-6, 0.0))
    assert [v.rule for v in found] == ["min_feature"]
    v = found[0]
    assert v.location == pytest.approx((1e-6 + 29.5 * H, 15 * H))
    assert v.measured_m == pytest.approx(15 * NM)
    assert fab.smallest_features(solid, H, H, np.arange(1, 20) * H)[0] == pytest.approx(15 * NM)
    solid[28:31] = False
    assert fab.pattern_rule_check(solid, H, H, rules) == []


def test_pattern_narrow_gap_fails():
    solid = np.ones((40, 30), bool)
    solid[18:20, 3:27] = False       # a 10 nm slot
    rules = fab.FabricationRules(min_feature_m=45 * NM, min_gap_m=30 * NM)
    found = fab.pattern_rule_check(solid, H, H, rules)
    assert [v.rule for v in found] == ["min_gap"]
    assert found[0].measured_m == pytest.approx(5 * NM, abs=H)     # +/- one pixel
    solid[15:22, 3:27] = False       # widen to 35 nm
    assert fab.pattern_rule_check(solid, H, H, rules) == []


def test_pattern_periodic_seam():
    # a 20 nm line split across the x seam of a periodic cell is one feature at x = 0
    solid = np.zeros((30, 20), bool)
    solid[:2] = solid[-2:] = True
    solid[10:22] = True
    rules = fab.FabricationRules(min_feature_m=40 * NM)
    found = fab.pattern_rule_check(solid, H, H, rules, periodic_x=True)
    assert len(found) == 1
    x = found[0].location[0]
    assert min(x, 30 * H - x) == pytest.approx(0.0, abs=1e-12)
    assert found[0].measured_m == pytest.approx(20 * NM, abs=H)
