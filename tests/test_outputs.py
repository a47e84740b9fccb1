"""What outputs say besides the numbers: cautions, the resolved sample, units, hints.

Checks of wording and bookkeeping (common practice, no source) and of the restated
sample parameters against closed forms: the phase-matched grating period Λ = mβλ
(S. J. Smith & E. M. Purcell, Phys. Rev. 92, 1069, 1953) and the 1/e decay length of
the synchronous field βγλ/(2π) (for the evanescent wave with k_x = ω/v; e.g.
R. J. England et al., Rev. Mod. Phys. 86, 1337, 2014, sec. II).
"""

from __future__ import annotations

import json
import math

import pytest
import tomli_w
from scipy import constants as sc

from designer.cautions import SAFETY_NOTE
from designer.cli import main

FILM = {
    "beam": {"voltage_kV": 200.0},
    "laser": {"wavelength_nm": 800.0, "angle_deg": 35.0, "peak_field_V_per_m": 1.0e7},
    "sample": {"family": "membrane", "material": "silicon_nitride", "thickness_nm": 50.0},
    "path": {"x_nm": 0.0},
}


def _write(tmp_path, raw, name="s.toml"):
    path = tmp_path / name
    path.write_text(tomli_w.dumps(raw))
    return path


def _run_json(argv, capsys):
    assert main(argv + ["--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_real_laser_fields_carry_cautions_in_json_and_text(tmp_path, capsys):
    spec = _write(tmp_path, FILM)
    data = _run_json(["evaluate", str(spec)], capsys)
    assert SAFETY_NOTE in data["cautions"]
    assert main(["evaluate", str(spec)]) == 0
    assert SAFETY_NOTE in capsys.readouterr().out
    low = dict(FILM, laser=dict(FILM["laser"], peak_field_V_per_m=1.0))
    data = _run_json(["evaluate", str(_write(tmp_path, low, "low.toml"))], capsys)
    assert data["cautions"] == []


def test_sweep_and_compare_print_the_caution_at_real_laser_fields(tmp_path, capsys):
    raw = dict(FILM, solver={"method": "layers"})
    spec = _write(tmp_path, raw)
    code = main(["sweep", str(spec), "--vary", "sample.thickness_nm=40:60:2",
                 "--out", str(tmp_path / "sw"), "--workers", "0"])
    assert code == 0
    assert SAFETY_NOTE in capsys.readouterr().out
    assert SAFETY_NOTE in json.loads((tmp_path / "sw" / "sweep.json").read_text())["cautions"]


def _kinematics(voltage_V):
    gamma = 1.0 + sc.e * voltage_V / (sc.m_e * sc.c**2)
    return math.sqrt(1.0 - 1.0 / gamma**2), gamma


GRATING = {
    "beam": {"voltage_kV": 30.0},
    "laser": {"wavelength_nm": 2000.0, "angle_deg": 0.0},
    "sample": {"family": "grating", "material": {"n": 1.45}, "period_nm": "phase-matched",
               "tooth_height_nm": 300.0},
    "path": {"length_um": 5.0},
    "solver": {"grid_step_nm": 40.0, "refine": False},
}


def test_grating_json_restates_the_sample_and_the_electron_height_used(tmp_path, capsys):
    data = _run_json(["evaluate", str(_write(tmp_path, GRATING))], capsys)
    s = data["sample"]
    beta, gamma = _kinematics(30e3)
    lam = 2000e-9
    decay = beta * gamma * lam / (2 * math.pi)
    assert s["period_m"] == pytest.approx(beta * lam, rel=1e-12)     # Λ = mβλ, m = 1
    assert s["period_phase_matched"] is True
    assert s["material"]["n"] == pytest.approx(1.45)
    assert s["tooth_height_m"] == pytest.approx(300e-9)
    assert s["decay_length_m"] == pytest.approx(decay, rel=1e-12)
    e = s["electron"]
    # default: half a decay length above the tooth tops
    assert e["height_above_surface_m"] == pytest.approx(0.5 * decay, rel=1e-9)
    assert e["height_m"] == pytest.approx(300e-9 + 0.5 * decay, rel=1e-9)
    assert "default" in e["height_from"]
    # the length used is whole periods of the spec's 5 µm
    assert e["length_m"] == pytest.approx(round(5e-6 / (beta * lam)) * beta * lam, rel=1e-9)
    assert data["coupling"]["interaction_length_m"] == pytest.approx(e["length_m"])


def test_text_output_speaks_in_kV_nm_and_percent(tmp_path, capsys):
    assert main(["evaluate", str(_write(tmp_path, GRATING))]) == 0
    out = capsys.readouterr().out
    assert "30 kV" in out and "2 µm" in out and " um" not in out
    assert "electron height" in out and "above the top surface" in out
    assert "e+0" not in out.split("coupling")[0]     # set-up and sample: no raw exponents


def test_membrane_length_includes_the_dephasing_length_and_damage_stays_below_one(tmp_path,
                                                                                 capsys):
    raw = dict(FILM, sample=dict(FILM["sample"], material="diamond", thickness_nm=100.0))
    data = _run_json(["evaluate", str(_write(tmp_path, raw))], capsys)
    beta, _ = _kinematics(200e3)
    k = 2 * math.pi / 800e-9
    dephasing = 1.0 / (k * (1.0 / beta - math.cos(math.radians(35.0))))
    c = data["coupling"]
    assert c["gradient_length_m"] == pytest.approx(100e-9 + 2 * dephasing, rel=1e-12)
    assert "dephasing" in c["gradient_length_rule"]
    assert 0 < c["damage_factor"] < 1


def test_flat_film_at_normal_incidence_explains_its_zero(tmp_path, capsys):
    raw = dict(FILM, laser=dict(FILM["laser"], angle_deg=0.0))
    data = _run_json(["evaluate", str(_write(tmp_path, raw))], capsys)
    assert data["coupling"]["beta_c"] == pytest.approx(0.0, abs=1e-15)
    assert any("normal incidence" in n and "angle_deg" in n for n in data["notes"])


def test_spectrum_at_the_default_field_says_which_key_to_set(tmp_path, capsys):
    raw = dict(FILM, laser={"wavelength_nm": 800.0, "angle_deg": 35.0})
    data = _run_json(["spectrum", str(_write(tmp_path, raw))], capsys)
    notes = " ".join(data["notes"])
    assert "peak_field_V_per_m" in notes and "zero-loss" in notes
    assert "Pulse averaging skipped" in notes


def test_json_keeps_progress_on_stderr(tmp_path, capsys):
    assert main(["evaluate", str(_write(tmp_path, FILM)), "--json"]) == 0
    captured = capsys.readouterr()
    json.loads(captured.out)
    assert "exact" in captured.err


def test_near_miss_keys_get_a_did_you_mean(tmp_path, capsys):
    raw = dict(FILM, beam={"voltage_kv": 200.0})
    assert main(["evaluate", str(_write(tmp_path, raw))]) == 2
    err = capsys.readouterr().err
    assert "did you mean 'voltage_kV'" in err and "\n" not in err.strip()
    raw = dict(FILM, sample=dict(FILM["sample"], thicknes_nm=50.0))
    del raw["sample"]["thickness_nm"]
    assert main(["evaluate", str(_write(tmp_path, raw, "b.toml"))]) == 2
    assert "did you mean 'thickness_nm'" in capsys.readouterr().err


def test_materials_lists_the_catalogue_with_sources(capsys):
    from designer.materials import catalogue

    data = _run_json(["materials", "--wavelength-nm", "800"], capsys)
    names = {m["name"]: m for m in data["materials"]}
    assert set(names) == set(catalogue())
    # Malitson's fused silica at 0.8 µm: n = 1.45332 (computed from the Sellmeier form
    # of I. H. Malitson, J. Opt. Soc. Am. 55, 1205, 1965)
    assert names["fused_silica"]["index_at_wavelength"][0] == pytest.approx(1.45332, abs=2e-5)
    assert "Malitson" in names["fused_silica"]["source"]
    assert main(["materials"]) == 0
    out = capsys.readouterr().out
    assert "silicon_nitride" in out and "Sellmeier" in out and "µm" in out


def test_beam_columns_line_up(capsys):
    assert main(["beam", "--voltage-kV", "200", "--index", "2.0"]) == 0
    rows = [r for r in capsys.readouterr().out.splitlines() if r.startswith("  ")]
    starts = {len(r) - len(r[2:].split("  ", 1)[1].lstrip()) for r in rows}
    assert len(starts) == 1
    assert any("decay length (1/e)" in r for r in rows)


def test_cleanroom_rounding_keeps_values_inside_their_bounds():
    from designer.units import cleanroom_round

    out = cleanroom_round({"tooth_height_nm": 331.23456, "duty_cycle": 0.1218249,
                           "sidewall_angle_deg": 3.14159, "order": 2},
                          {"duty_cycle": (0.12182, 0.9)})
    assert out["tooth_height_nm"] == 331.2
    assert out["duty_cycle"] == 0.1219          # 0.1218 would break the lower bound
    assert out["sidewall_angle_deg"] == 3.14
    assert out["order"] == 2
