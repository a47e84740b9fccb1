"""Hole membranes in the spec: parsing, geometry closed forms, rule features, bad input."""

import math

import pytest

from designer.errors import SpecError
from designer.evaluate import choose_method
from designer.fabrication import FabricationRules, design_rule_check
from designer.families import membrane
from designer.spec import parse_spec

NM = 1e-9


def _raw(sample=None, laser=None, path=None, solver=None, fabrication=None):
    raw = {
        "beam": {"voltage_kV": 200.0},
        "laser": {"wavelength_nm": 800.0, "angle_deg": 10.0, **(laser or {})},
        "sample": {"family": "membrane", "material": {"n": 2.0}, "thickness_nm": 150.0,
                   "pattern": "holes", "lattice": "square", "period_nm": 500.0,
                   "hole_radius_nm": 100.0, **(sample or {})},
        "path": {"x_nm": 0.0, **(path or {})},
    }
    if solver:
        raw["solver"] = solver
    if fabrication:
        raw["fabrication"] = fabrication
    return raw


def _spec(**kw):
    raw = _raw(**kw)
    raw["sample"] = {k: v for k, v in raw["sample"].items() if v is not None}
    return parse_spec(raw, source="holes.toml")


def test_hole_membrane_parses_with_3d_keys():
    s = _spec(sample={"lattice": "hexagonal", "layers": [
        {"material": {"n": 1.45}, "thickness_nm": 20.0, "side": "below"},
        {"material": {"n": 1.45}, "thickness_nm": 10.0, "side": "above"}],
        "substrate": {"n": 1.5}},
        laser={"azimuth_deg": 30.0, "polarization": 45.0},
        path={"y_nm": 12.0, "tilt_deg": 5.0, "tilt_azimuth_deg": 90.0},
        solver={"fourier_orders": 7})
    h = s.sample.holes
    assert h.lattice == "hexagonal" and h.circular
    assert h.a2 == pytest.approx((250 * NM, 250 * math.sqrt(3) * NM))
    assert s.laser.azimuth_rad == pytest.approx(math.radians(30))
    assert s.laser.polarization_rad == pytest.approx(math.radians(45))
    assert s.path.y_m == pytest.approx(12 * NM) and s.path.tilt_rad == pytest.approx(
        math.radians(5))
    assert s.solver.fourier_orders == 7
    assert choose_method(s) == "fmm"
    below, rows, above = membrane.stack_layers(s.sample)
    assert below == pytest.approx(1.5**2) and above == 1.0
    assert [r[1] for r in rows] == [pytest.approx(1.45**2), "film", pytest.approx(1.45**2)]
    assert membrane.film_bottom_m(s.sample) == pytest.approx(20 * NM)
    # the table written back parses to the same sample
    again = parse_spec({**_raw(), "sample": membrane.to_table(s.sample)}, source="x")
    assert again.sample.holes.lattice == "hexagonal"
    assert again.sample.holes.period_m == pytest.approx(h.period_m)
    assert again.sample.thickness_m == pytest.approx(s.sample.thickness_m)
    assert len(again.sample.layers_below) == len(again.sample.layers_above) == 1


def test_polarization_words_and_film_out_of_plane_picks_fmm():
    assert _spec(laser={"polarization": "s"}).laser.polarization_rad == pytest.approx(math.pi / 2)
    film = parse_spec({**_raw(laser={"polarization": "s"}),
                       "sample": {"family": "membrane", "material": {"n": 2.0},
                                  "thickness_nm": 50.0}}, source="f.toml")
    assert choose_method(film) == "fmm"
    plain = parse_spec({**_raw(), "sample": {"family": "membrane", "material": {"n": 2.0},
                                             "thickness_nm": 50.0}}, source="f.toml")
    assert choose_method(plain) == "layers"


def test_wall_and_chords_closed_form():
    # circles: wall = P - 2r on both lattices (nearest neighbours at distance P);
    # chord of a circle at height y: 2 sqrt(r^2 - y^2) (elementary geometry, no source)
    for lattice in ("square", "hexagonal"):
        h = membrane.HoleLattice(lattice, 500 * NM, (180 * NM, 180 * NM))
        assert membrane.hole_wall(h) == pytest.approx(140 * NM, rel=1e-5)
        (cx, w), = membrane.hole_chords(h, 60 * NM)
        assert cx == pytest.approx(0.0, abs=1e-15) and w == pytest.approx(
            2 * math.sqrt(180**2 - 60**2) * NM)
    # an ellipse along x in a square lattice: the narrowest wall is P - 2a along x
    e = membrane.HoleLattice("square", 500 * NM, (200 * NM, 100 * NM), 0.0, circular=False)
    assert membrane.hole_wall(e) == pytest.approx(100 * NM, rel=1e-5)
    # rotated by 90 degrees the narrow wall is along y, same width
    r = membrane.HoleLattice("square", 500 * NM, (200 * NM, 100 * NM), math.pi / 2, False)
    assert membrane.hole_wall(r) == pytest.approx(100 * NM, rel=1e-5)
    assert membrane.hole_chords(r, 0.0)[0][1] == pytest.approx(200 * NM)
    # fill fraction of a hexagonal lattice: pi r^2 / (P^2 sqrt(3)/2)
    h = membrane.HoleLattice("hexagonal", 500 * NM, (150 * NM, 150 * NM))
    assert h.fill_fraction == pytest.approx(math.pi * 150**2 / (500**2 * math.sqrt(3) / 2))


def test_rule_features_find_thin_wall_small_hole_and_aspect_ratio():
    s = _spec(sample={"hole_radius_nm": 230.0, "thickness_nm": 300.0})
    rules = FabricationRules(min_feature_m=60 * NM, min_gap_m=500 * NM, max_aspect_ratio=3.0)
    found = {v.rule for v in design_rule_check(membrane.features(s.sample), rules)}
    # wall 40 nm < 60 nm, hole 460 nm < 500 nm, 300 nm deep over a 40 nm wall > 3
    assert found == {"min_feature", "min_gap", "aspect_ratio"}


def test_variables_and_replace_round_trip():
    s = _spec(sample={"hole_axes_nm": [150.0, 90.0], "hole_radius_nm": None})
    keys = set(membrane.variables(s.sample))
    assert keys == {"thickness_nm", "period_nm", "hole_axes_nm.0", "hole_axes_nm.1"}
    q = membrane.replace(s.sample, {"hole_axes_nm.1": 80.0, "period_nm": 520.0})
    assert q.holes.semi_axes_m == pytest.approx((150 * NM, 80 * NM))
    assert q.holes.period_m == pytest.approx(520 * NM)
    with pytest.raises(ValueError, match="overlap"):
        membrane.replace(s.sample, {"hole_axes_nm.0": 260.0})


@pytest.mark.parametrize("kw, key, word", [
    (dict(sample={"hole_radius_nm": 260.0}), "sample.hole_radius_nm", "overlap"),
    (dict(sample={"lattice": "triangular"}), "sample.lattice", "triangular"),
    (dict(sample={"hole_axes_nm": [100.0], "hole_radius_nm": None}), "sample.hole_axes_nm",
     "two positive"),
    (dict(sample={"hole_angle_deg": 10.0}), "sample.hole_angle_deg", "ellipses"),
    (dict(sample={"layers": [{"material": {"n": 1.5}, "thickness_nm": -3.0}]}),
     "sample.layers.0.thickness_nm", "-3.0"),
    (dict(sample={"layers": [{"material": {"n": 1.5}, "thickness_nm": 3.0, "side": "up"}]}),
     "sample.layers.0.side", "up"),
    (dict(solver={"method": "fdfd"}), "solver.method", "fdfd"),
    (dict(solver={"fourier_orders": 2.5}), "solver.fourier_orders", "2.5"),
    (dict(laser={"polarization": "q"}), "laser.polarization", "q"),
    (dict(path={"tilt_deg": 85.0}), "path.tilt_deg", "85"),
])
def test_bad_hole_input_names_key_and_value(kw, key, word):
    raw = _raw(**kw)
    raw["sample"] = {k: v for k, v in raw["sample"].items() if v is not None}
    with pytest.raises(SpecError) as info:
        parse_spec(raw, source="holes.toml")
    msg = str(info.value)
    assert "holes.toml" in msg and key in msg and word in msg


def test_out_of_plane_keys_refused_where_no_solver_takes_them():
    raw = _raw(laser={"azimuth_deg": 20.0})
    raw["sample"] = {"family": "membrane", "material": {"n": 2.0}, "thickness_nm": 50.0,
                     "pattern": "slits", "period_nm": 500.0, "slit_widths_nm": [200.0]}
    with pytest.raises(SpecError, match="laser.azimuth_deg"):
        parse_spec(raw, source="s.toml")
    raw["sample"] = {"family": "membrane", "material": {"n": 2.0}, "thickness_nm": 50.0,
                     "lattice": "square"}
    with pytest.raises(SpecError, match="sample.lattice"):
        parse_spec(raw, source="s.toml")
