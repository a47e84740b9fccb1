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
