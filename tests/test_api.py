"""The Python interface gives what the commands give (common practice, no source), and
the worked example under studies/python_api runs."""

from __future__ import annotations

import importlib.util
import json
import math
from pathlib import Path

import pytest
import tomli_w

from designer import api as vm
from designer.cli import main
from designer.errors import SpecError

ROOT = Path(__file__).resolve().parents[1]
FILM = {"beam": {"voltage_kV": 200.0},
        "laser": {"wavelength_nm": 800.0, "angle_deg": 40.0},
        "sample": {"family": "membrane", "material": "silicon_nitride", "thickness_nm": 80.0},
        "path": {"x_nm": 0.0}}


def test_evaluate_gives_the_numbers_of_the_command(tmp_path, capsys):
    path = tmp_path / "film.toml"
    path.write_text(tomli_w.dumps(FILM))
    assert main(["evaluate", str(path), "--json"]) == 0
    cli = json.loads(capsys.readouterr().out)
    py = vm.evaluate(vm.load_spec(path), quiet=True)
    assert py["coupling"]["integral_V"] == cli["coupling"]["integral_V"]
    assert py["sample"] == cli["sample"]
    built = vm.evaluate(vm.build_spec(FILM), quiet=True)
    assert built["coupling"]["beta_c"] == pytest.approx(cli["coupling"]["beta_c"], rel=1e-12)


def test_with_values_changes_one_key_and_keeps_the_spec_valid():
    spec = vm.build_spec(FILM)
    thicker = vm.with_values(spec, {"thickness_nm": 120.0, "laser.angle_deg": 30.0})
    assert thicker.sample.thickness_m == pytest.approx(120e-9)
    assert thicker.laser.angle_rad == pytest.approx(math.radians(30.0))
    assert spec.sample.thickness_m == pytest.approx(80e-9)      # the original is untouched
    with pytest.raises(SpecError):
        vm.with_values(spec, {"thickness_nm": -5.0})


def test_export_of_a_spec_built_in_memory(tmp_path):
    raw = {"beam": {"voltage_kV": 30.0}, "laser": {"wavelength_nm": 2000.0, "angle_deg": 0.0},
           "sample": {"family": "grating", "material": "fused_silica",
                      "tooth_height_nm": 300.0},
           "path": {"length_um": 5.0}, "layout": {"line_length_um": 4.0}}
    summary = vm.export(vm.build_spec(raw), tmp_path / "chip.gds")
    assert summary["written"] and (tmp_path / "chip.gds").stat().st_size > 0


def test_the_worked_example_runs(tmp_path, capsys):
    path = ROOT / "studies" / "python_api" / "example.py"
    spec = importlib.util.spec_from_file_location("python_api_example", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    summary = module.main(["--out", str(tmp_path)])
    assert (tmp_path / "film.png").exists() and (tmp_path / "thickness" / "sweep.json").exists()
    assert summary["film_120nm_beta_c_per_field_m_per_V"] > 0
    assert 20 <= summary["best_thickness_nm"] <= 300     # a point of the scan
    assert "best thickness" in capsys.readouterr().out
