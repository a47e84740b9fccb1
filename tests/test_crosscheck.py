"""`velomatch crosscheck`: FDFD against an independent time-domain solver on a spec's sample.

The independent solver is Meep (A. F. Oskooi et al., "MEEP: A flexible free-software
package for electromagnetic simulations by the FDTD method", Comput. Phys. Commun. 181,
687, 2010), run in its own process; tests that need it skip when it is not installed.
Where a closed form exists (films and prisms: the exact transfer-matrix solution, itself
checked against M. Born & E. Wolf, Principles of Optics, ch. 1, in test_layers.py) the
Meep result is also held against it.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import skip_or_fail

from designer.crosscheck import CrosscheckError, crosscheck, fdtd_problem, physical_region
from designer.spec import parse_spec
from solvers.fdtd import MeepUnavailableError, meep_python

VELOMATCH = str(Path(sys.executable).with_name("velomatch"))
LAM = 800e-9


def _meep_or_skip():
    try:
        meep_python()
    except MeepUnavailableError as exc:
        skip_or_fail(f"Meep not available: {exc}")


def film_raw(n=2.0, angle_deg=30.0, side="below", grid_step_nm=9.5):
    return {
        "beam": {"voltage_kV": 100.0},
        "laser": {"wavelength_nm": LAM * 1e9, "angle_deg": angle_deg, "from": side},
        "sample": {"family": "membrane", "material": {"n": n}, "thickness_nm": 120.0,
                   "pattern": "none"},
        "path": {"x_nm": 0.0},
        "solver": {"refine": False, "grid_step_nm": grid_step_nm},
    }


def grating_raw(grid_step_nm=10.0):
    # our own scenario: a glass-like (n = 1.45) tooth grating, phase-matched in first
    # order for 100 kV at 800 nm, lit at normal incidence through the substrate
    return {
        "beam": {"voltage_kV": 100.0},
        "laser": {"wavelength_nm": LAM * 1e9},
        "sample": {"family": "grating", "material": {"n": 1.45}, "tooth_height_nm": 250.0},
        "path": {"offset_nm": 40.0, "length_um": 10.0},
        "solver": {"refine": False, "grid_step_nm": grid_step_nm},
    }


def write_spec(tmp_path, raw, name="spec.toml") -> Path:
    def val(v):
        if isinstance(v, dict):
            return "{" + ", ".join(f"{k} = {val(x)}" for k, x in v.items()) + "}"
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return json.dumps(v)
        return repr(v)

    text = "".join(f"[{table}]\n" + "".join(f"{k} = {val(v)}\n" for k, v in body.items())
                   for table, body in raw.items())
    path = tmp_path / name
    path.write_text(text)
    return path


# ---------------------------------------------------------------- without Meep runs
def test_meep_problem_has_the_spec_geometry_wavevector_and_region():
    # Bloch wavevector of a plane wave at 30 degrees in vacuum: k0 sin(30 deg)
    # (phase matching along the interface, Snell; Born & Wolf ch. 1); the region and the
    # monitor lines follow the layout (common practice, no source)
    from designer.evaluate import angular_frequency, fdfd_problem
    from designer.families import get_family

    spec = parse_spec(film_raw())
    family = get_family("membrane")
    layout = family.layout(spec.sample, spec.context, 9.5e-9)
    polys = family.polygons(spec.sample, spec.context, layout)
    x_line = layout.grid.x0 + 0.5 * layout.grid.dx
    bloch = fdfd_problem(layout, angular_frequency(LAM)).kx_bloch
    prob = fdtd_problem(spec, layout, polys, bloch, [("z", x_line)])
    assert prob.kx == pytest.approx(2 * math.pi / LAM * math.sin(math.radians(30)), rel=1e-12)
    assert prob.period_x_m == pytest.approx(layout.grid.size_x)
    assert prob.cells_per_um * layout.grid.dx * 1e6 == pytest.approx(1.0)
    assert [p.eps for p in prob.polygons] == [pytest.approx(4.0)]
    g = layout.grid
    z_lo, z_hi = physical_region(layout)
    assert g.z0 + layout.pml_cells_z * g.dz < layout.z_source_m < z_lo < layout.path.z_below_m
    assert layout.path.z_above_m < z_hi <= g.z0 + (g.nz - layout.pml_cells_z) * g.dz + 1e-15
    # the Meep region is a whole number of FDFD cells, so pixels line up with the cells
    assert (z_hi - z_lo) / g.dz == pytest.approx(round((z_hi - z_lo) / g.dz), abs=1e-9)


def test_missing_meep_gives_install_hint_and_exit_2(tmp_path):
    # the main environment's interpreter has no Meep (its numpy 2 cannot load Debian's)
    spec = write_spec(tmp_path, film_raw())
    env = dict(os.environ, VELOMATCH_MEEP_PYTHON=sys.executable)
    out = subprocess.run([VELOMATCH, "crosscheck", str(spec), "--json"], capture_output=True,
                         text=True, timeout=300, env=env)
    assert out.returncode == 2, out.stderr
    assert "Traceback" not in out.stderr
    assert "apt-get install python3-meep" in out.stderr
    assert "VELOMATCH_MEEP_PYTHON" in out.stderr
    assert out.stdout == ""


def test_wall_time_guard_stops_with_a_message():
    # common practice, no source: a limit already used up by the FDFD solve stops the
    # cross-check before Meep starts, as a user-facing error (exit code 2)
    _meep_or_skip()
    with pytest.raises(CrosscheckError, match="wall-time limit") as info:
        crosscheck(parse_spec(film_raw()), max_wall_s=1e-6)
    assert info.value.exit_code == 2


# ---------------------------------------------------------------- Meep runs
@pytest.mark.slow
def test_empty_cell_through_crosscheck_is_the_incident_plane_wave():
    # a "film" of n = 1 is empty space: Ez along the path must be the incident wave,
    # Ez = -E0 sin(theta) exp(i (kx x + kz z)) with E0 = 1 V/m (our convention, see the README;
    # plane-wave relations of Born & Wolf ch. 1)
    _meep_or_skip()
    theta = math.radians(30.0)
    res = crosscheck(parse_spec(film_raw(n=1.0)))
    k0 = 2 * math.pi / LAM
    expect = -math.sin(theta) * np.exp(1j * (k0 * math.sin(theta) * res.path_x_m
                                             + k0 * math.cos(theta) * res.s_m))
    assert res.fdtd_converged
    # Meep's Yee dispersion at ~80 cells per wavelength and its source calibration:
    # the grid dispersion (relative phase-velocity error ~ (k h)^2 / 24) stays well below
    # 0.5 % of the amplitude over the path (Taflove & Hagness, Computational
    # Electrodynamics, 3rd ed., ch. 4; the tolerance is common practice, no source)
    assert np.max(np.abs(res.e_fdtd - expect)) < 5e-3
    assert np.max(np.abs(res.e_fdfd - expect)) < 5e-3


@pytest.mark.slow
def test_film_at_oblique_incidence_fdfd_meep_and_exact_agree():
    # issue 7: FDFD and Meep agree within 3 % on the coupling of an electron crossing a
    # film lit at 30 degrees; the exact transfer-matrix value is a third, closed-form
    # opinion (Airy summation, Born & Wolf ch. 1.6)
    _meep_or_skip()
    res = crosscheck(parse_spec(film_raw()))
    assert res.fdtd_converged
    assert res.relative_difference < 0.03
    assert res.box_difference < 0.03
    assert res.profile_difference < 0.03
    assert abs(res.integral_fdtd_V - res.exact_V) / abs(res.exact_V) < 0.03
    assert res.agree == (res.relative_difference <= 0.02)


@pytest.mark.slow
def test_phase_matched_grating_fdfd_and_meep_agree():
    # issue 7: a phase-matched grating, FDFD against Meep within 3 % at 44 cells per
    # period.  Phase matching (k_x - w/v) Lambda = -2 pi makes the lattice sum N exactly
    # (Dirichlet kernel), so |I_N| = N |I_1| for both solvers.
    _meep_or_skip()
    res = crosscheck(parse_spec(grating_raw()))
    assert res.fdtd_converged
    assert res.relative_difference < 0.03
    assert res.profile_difference < 0.03
    n = round(10e-6 / res.period_m)
    assert res.n_periods == n
    assert abs(res.integral_fdtd_V) == pytest.approx(n * abs(res.one_period_fdtd_V), rel=1e-6)
    assert abs(res.integral_fdfd_V) == pytest.approx(n * abs(res.one_period_fdfd_V), rel=1e-6)


@pytest.mark.slow
def test_prism_total_internal_reflection_agrees_with_closed_form():
    # incidence from inside a dielectric (n = 2) at the phase-matched angle
    # sin(theta) = 1/(n beta): Meep and FDFD against each other and against the exact
    # evanescent field (Fresnel transmission, Born & Wolf ch. 1.5, via the layer stack)
    _meep_or_skip()
    raw = {"beam": {"voltage_kV": 200.0}, "laser": {"wavelength_nm": 800.0},
           "sample": {"family": "prism", "material": {"n": 2.0}},
           "path": {"offset_nm": 60.0, "length_um": 5.0},
           "solver": {"refine": False, "grid_step_nm": 9.0}}
    res = crosscheck(parse_spec(raw))
    assert res.fdtd_converged
    assert res.relative_difference < 0.03
    assert abs(res.integral_fdtd_V - res.exact_V) / abs(res.exact_V) < 0.03


@pytest.mark.slow
def test_json_output_has_the_contract_keys(tmp_path):
    _meep_or_skip()
    spec = write_spec(tmp_path, film_raw(grid_step_nm=12.0))
    plot = tmp_path / "profile.png"
    out = subprocess.run([VELOMATCH, "crosscheck", str(spec), "--json", "--tolerance", "0.05",
                          "--plot", str(plot)], capture_output=True, text=True, timeout=300)
    assert out.returncode in (0, 1), out.stderr
    data = json.loads(out.stdout)
    for side in ("fdfd", "fdtd"):
        assert {"beta_c_per_field_m_per_V", "integral_V"} <= set(data[side])
        assert len(data[side]["integral_V"]) == 2
    assert {"grid_step_m", "wall_s"} <= set(data["fdtd"])
    for key in ("relative_difference", "agree", "tolerance", "phase_difference_rad",
                "profile_difference", "path", "provenance"):
        assert key in data
    assert data["tolerance"] == 0.05
    assert data["agree"] == (data["relative_difference"] <= 0.05)
    assert out.returncode == (0 if data["agree"] else 1)
    assert data["fdfd"]["grid_step_m"] == pytest.approx(12e-9, rel=0.05)
    assert data["provenance"]["spec_sha256"]
    assert plot.stat().st_size > 1000
