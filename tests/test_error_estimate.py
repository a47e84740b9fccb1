"""The three-grid error estimate against the true error of cases with known answers.

References:
* a silicon-nitride film crossed by the electron and a prism surface under total
  internal reflection: the exact transfer-matrix solution (solvers.layers, checked
  against the Fresnel/Airy formulas of M. Born & E. Wolf, *Principles of Optics*, ch. 1);
* two fused-silica gratings: an FDFD solve on a grid 3x finer than the one checked
  (independent of the estimate: one solve, no extrapolation);
* the estimate itself: L. F. Richardson, Phil. Trans. R. Soc. A 210, 307 (1911);
  I. B. Celik et al., J. Fluids Eng. 130, 078001 (2008).  The target (the estimate
  brackets the true error and is within 3x of it) is common practice, no source.
Spec values are scenarios of our own.
"""

import copy

import pytest

from designer.evaluate import (
    SAFETY_FACTOR,
    default_grid_step,
    evaluate,
    evaluation_json,
    observed_order,
    run_fdfd,
    three_grid_estimate,
)
from designer.spec import parse_spec

FILM = {"beam": {"voltage_kV": 200.0}, "laser": {"wavelength_nm": 800.0, "angle_deg": 35.0},
        "sample": {"family": "membrane", "material": "silicon_nitride",
                   "thickness_nm": 50.0},
        "path": {"x_nm": 0.0}}
PRISM = {"beam": {"voltage_kV": 120.0},
         "laser": {"wavelength_nm": 800.0, "angle_deg": "phase-matched", "from": "below"},
         "sample": {"family": "prism", "material": "silicon_nitride"},
         "path": {"offset_nm": 30.0, "length_um": 10.0}}
GRATING = {"beam": {"voltage_kV": 30.0}, "laser": {"wavelength_nm": 800.0},
           "sample": {"family": "grating", "material": "fused_silica", "duty_cycle": 0.5,
                      "tooth_height_nm": 130.0},
           "path": {"length_um": 10.0}}


def spec(raw, method, **sample):
    r = copy.deepcopy(raw)
    r["sample"].update(sample)
    r["solver"] = {"method": method}
    return parse_spec(r, source="case")


def test_observed_order_of_a_known_power_law():
    # I(h) = 1 + (0.3 + 0.1j) h^p on uneven steps: the order and the error (times the
    # safety factor) are recovered
    for p in (1.0, 1.7, 2.0):
        steps = [1.0, 1.52, 2.31]
        vals = [1 + (0.3 + 0.1j) * (0.01 * h) ** p for h in steps]
        est = three_grid_estimate(vals, steps)
        assert est.observed_order == pytest.approx(p, rel=1e-6)
        true = abs(vals[0] - 1) / abs(vals[0])
        assert est.relative_error == pytest.approx(SAFETY_FACTOR * true, rel=1e-6)
        # the middle result's error against the finer pair's extrapolation
        mid = three_grid_estimate(vals, steps, at=1)
        assert mid.relative_error == pytest.approx(
            SAFETY_FACTOR * abs(vals[1] - 1) / abs(vals[1]), rel=1e-6)
    # differences of opposite sign: no order, the conservative rule
    assert observed_order(0.01 + 0j, -0.02 + 0j, 1.5, 1.5) is None
    est = three_grid_estimate([1.0, 1.01, 0.99], [1.0, 1.5, 2.25])
    assert est.observed_order is None and est.relative_error == pytest.approx(0.02 / 1.25)


# grids as multiples of each case's default step: coarser, the default, finer
GRID_FACTORS = (1.5, 1.0, 0.67)


@pytest.mark.parametrize("factor", GRID_FACTORS)
@pytest.mark.parametrize("raw", [FILM, PRISM], ids=["film", "prism"])
def test_estimate_brackets_the_exact_layer_stack_error(raw, factor):
    exact = evaluate(spec(raw, "layers")).run.integral_V
    s = spec(raw, "fdfd")
    ev = evaluate(s, grid_step_m=factor * default_grid_step(s), refine=True)
    true = abs(ev.run.integral_V - exact) / abs(exact)
    assert true <= ev.relative_error <= 3.0 * true
    block = evaluation_json(ev)["coupling"]["error_estimate"]
    assert len(block["grid_steps_m"]) == 3 and 1.0 <= block["order_used"] <= 2.0


GRATING_B = {"tooth_height_nm": 250.0, "duty_cycle": 0.4}
# grating b at its default grid (5.6 nm) has a true error about half its neighbours'
# (the tooth edges sit 0.1 cell from cell boundaries); an estimate from coarser grids
# only saw the trend (4.4x); the estimate against the finer pair's extrapolation sees it


@pytest.mark.slow
@pytest.mark.parametrize("sample,factor", [
    ({}, 1.5), ({}, 1.0), ({}, 0.67),
    (GRATING_B, 1.5), (GRATING_B, 1.0), (GRATING_B, 0.67)],
    ids=["grating_a-1.5", "grating_a-1.0", "grating_a-0.67",
         "grating_b-1.5", "grating_b-1.0", "grating_b-0.67"])
def test_estimate_brackets_a_converged_grating_error(sample, factor):
    s = spec(GRATING, "fdfd", **sample)
    ev = evaluate(s, grid_step_m=factor * default_grid_step(s), refine=True)
    ref = run_fdfd(s, ev.run.grid_step_m / 3.0, with_map=False).integral_V
    true = abs(ev.run.integral_V - ref) / abs(ref)
    # the reference has its own error, about (1/3)^2 of the one checked at second order:
    # "brackets" is taken to that accuracy
    assert 0.9 * true <= ev.relative_error <= 3.0 * true
