"""The objective at the default grid is smooth in the geometry (no cell-periodic jitter).

A surface that moves through a cell changes the sampled permittivity in steps of the
cell; on a grid too coarse for the field's steepest scale (the synchronous harmonic's
decay length and the electron's distance to the surface) the coupling then ripples with
the period of the cell when a dimension is scanned, and a gradient optimizer chases the
ripple.  Reference: the same heights on a grid 2x finer (a second-order scheme, so
its ripple is about 4x smaller); the target (ripple below 0.3 %) is common practice, no
source.  The 5 kV case is a scenario of our own: fused silica, 1030 nm at normal
incidence, electron 10 nm above the teeth over 10 µm.
"""

import copy
import json
from pathlib import Path

import numpy as np
import pytest

from designer.evaluate import default_grid_step, run_fdfd
from designer.spec import parse_spec

CASE_5KV = {"beam": {"voltage_kV": 5.0},
            "laser": {"wavelength_nm": 1030.0, "angle_deg": 0.0},
            "sample": {"family": "grating", "material": "fused_silica", "duty_cycle": 0.5,
                       "tooth_height_nm": 200.0},
            "path": {"offset_nm": 10.0, "length_um": 10.0}}
JITTER_LIMIT = 3e-3


def spec_at(tooth_height_nm: float, duty_cycle: float = 0.5):
    raw = copy.deepcopy(CASE_5KV)
    raw["sample"].update(tooth_height_nm=tooth_height_nm, duty_cycle=duty_cycle)
    return parse_spec(raw, source="5kV")


def coupling_scan(heights_nm, step_m):
    return np.array([abs(run_fdfd(spec_at(h), step_m, with_map=False).integral_V)
                     for h in heights_nm])


def ripple(x, values, degree=3):
    """Largest relative deviation of ``values`` from a least-squares polynomial in x."""
    x = np.asarray(x, dtype=float) - np.mean(x)
    fit = np.polyval(np.polyfit(x, values, degree), x)
    return float(np.max(np.abs(values / fit - 1.0)))


@pytest.mark.slow
def test_tooth_height_scan_at_the_default_grid_has_no_cell_jitter():
    heights = np.arange(190.0, 211.0, 1.0)           # 1 nm steps across ~7 cells
    h = default_grid_step(spec_at(200.0))
    coarse = coupling_scan(heights, h)
    assert ripple(heights, coarse) <= JITTER_LIMIT
    # the reference: a 2x finer grid at both ends and the middle agrees with the default
    # grid's curve to the same limit (on a 3x finer grid the same scan follows a cubic
    # to 2e-6, DEVELOPERS.md)
    fine = coupling_scan(heights[::10], h / 2.0)
    assert np.max(np.abs(coarse[::10] / fine - 1.0)) <= JITTER_LIMIT
    # the check sees jitter where there is some: at the wavelength rule alone (60 cells
    # per wavelength in the glass, ~4x coarser) the same scan ripples by more
    from solvers.fdfd import spacing_for

    wave_rule = spacing_for(1030e-9, spec_at(200.0).sample.material.index.real ** 2)
    assert ripple(heights, coupling_scan(heights, wave_rule)) > JITTER_LIMIT


STUDY_SPEC = Path(__file__).resolve().parents[1] / "studies" / "grating_5kV" / "grating.toml"
# the best point of the study's scan inside the rules (studies/grating_5kV --quick:
# tooth height 40-400 nm in 30 nm, duty cycle 0.22-0.78 in 0.08 steps)
SCAN_BEST = {"sample.tooth_height_nm": 220.0, "sample.duty_cycle": 0.62}


@pytest.fixture(scope="module")
def default_design(tmp_path_factory):
    from designer import api

    spec = api.load_spec(STUDY_SPEC)
    run = api.design(spec, tmp_path_factory.mktemp("design5kV") / "out", quiet=True)
    history = json.loads(Path(run["files"][0]).with_name("history.json").read_text())
    return spec, run, history["starts"][0]["history"]


@pytest.mark.slow
def test_default_design_never_lowers_the_objective(default_design):
    # accepted L-BFGS-B steps satisfy the sufficient-decrease condition (J. Nocedal &
    # S. J. Wright, Numerical Optimization, 2nd ed., 2006, ch. 3): the recorded loss
    # never rises and, with no active rule, the objective never drops
    _, _, steps = default_design
    loss = np.array([r["loss"] for r in steps if r.get("accepted", True)])
    objective = np.array([r["objective"] for r in steps if r.get("accepted", True)])
    assert len(loss) >= 3
    assert np.all(np.diff(loss) <= 1e-12 * np.abs(loss[:-1]))
    assert np.all(np.diff(objective) >= -1e-12 * np.abs(objective[:-1]))
    assert objective[-1] > 1.1 * objective[0]


@pytest.mark.slow
@pytest.mark.xfail(strict=True, reason="L-BFGS-B stops (line search) at ~98 nm: along the "
                   "slowly rising tooth height the default grid's 0.05 % cell staircase "
                   "slopes as much as the trend; the design reaches 98.4 % of the best")
def test_default_design_reaches_the_scan_best_within_one_percent(default_design):
    from designer.api import with_values

    spec, run, _ = default_design
    fine = default_grid_step(spec) / 2.0      # the converged grid (see the study)
    design = abs(run_fdfd(run["design_spec"], fine, with_map=False).integral_V)
    best = abs(run_fdfd(with_values(spec, SCAN_BEST), fine, with_map=False).integral_V)
    assert design >= 0.99 * best
