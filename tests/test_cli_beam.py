"""`velomatch beam` through the installed console command (a subprocess, as a user runs it)."""

import json
import subprocess
import sys
from pathlib import Path

import pytest

VELOMATCH = [str(Path(sys.executable).with_name("velomatch"))]


def run(*argv):
    return subprocess.run(VELOMATCH + list(argv), capture_output=True, text=True, timeout=120)


def test_beam_json_keys_and_values():
    # 200 kV: beta = 0.69531, lambda_e = 2.5079 pm, computed from CODATA;
    # Williams & Carter, Transmission Electron Microscopy, Table 1.1: 0.00251 nm (from memory)
    out = run("beam", "--voltage-kV", "200", "--json")
    assert out.returncode == 0, out.stderr
    data = json.loads(out.stdout)
    for key in ("voltage_V", "beta", "gamma", "velocity_m_per_s", "de_broglie_wavelength_m"):
        assert key in data
    assert data["voltage_V"] == pytest.approx(2e5)
    assert data["beta"] == pytest.approx(0.69531, abs=1e-5)
    assert data["de_broglie_wavelength_m"] == pytest.approx(2.5079e-12, rel=1e-4)
    # grating period Lambda = m beta lambda (first-order synchronicity): 0.69531 * 800 nm
    assert data["grating_period_m"] == pytest.approx(0.69531 * 800e-9, rel=1e-5)


def test_beam_rejects_bad_voltage_without_traceback():
    out = run("beam", "--voltage-kV", "0")
    assert out.returncode == 2
    assert "--voltage-kV" in out.stderr and "Traceback" not in out.stderr


def test_help_lists_every_command():
    out = run("--help")
    assert out.returncode == 0
    for name in ("beam", "evaluate", "design", "sweep", "compare", "crosscheck", "export",
                 "spectrum", "demo"):
        assert name in out.stdout
