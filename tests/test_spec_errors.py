"""Bad spec input: one message naming file, key and value; exit code 2; no traceback.

Checked through the console command in a subprocess, as a user meets it
(common practice, no source).
"""

import subprocess
import sys
from pathlib import Path

import pytest

VELOMATCH = str(Path(sys.executable).with_name("velomatch"))

GOOD = """\
[beam]
voltage_kV = 100.0
[laser]
wavelength_nm = 800.0
angle_deg = 30.0
peak_field_V_per_m = 1.0
[sample]
family = "membrane"
material = "silicon_nitride"
thickness_nm = 100.0
pattern = "none"
[path]
x_nm = 0.0
"""


def _replace(text, old, new):
    assert old in text, old
    return text.replace(old, new)


CASES = [
    # (name, spec text, words that must appear in the message)
    ("unknown key", _replace(GOOD, "thickness_nm = 100.0", "thickness_nm = 100.0\ncolour = 1"),
     ["sample.colour", "unknown key"]),
    ("missing key", _replace(GOOD, "wavelength_nm = 800.0\n", ""), ["laser.wavelength_nm",
                                                                   "missing"]),
    ("wrong type", _replace(GOOD, "voltage_kV = 100.0", 'voltage_kV = "high"'),
     ["beam.voltage_kV", "'high'"]),
    ("voltage zero", _replace(GOOD, "voltage_kV = 100.0", "voltage_kV = 0.0"),
     ["beam.voltage_kV", "0.0"]),
    ("voltage negative", _replace(GOOD, "voltage_kV = 100.0", "voltage_kV = -5.0"),
     ["beam.voltage_kV", "-5.0"]),
    ("voltage beyond 10 MV", _replace(GOOD, "voltage_kV = 100.0", "voltage_kV = 20000.0"),
     ["beam.voltage_kV", "20000.0"]),
    ("wavelength zero", _replace(GOOD, "wavelength_nm = 800.0", "wavelength_nm = 0.0"),
     ["laser.wavelength_nm", "0.0"]),
    ("negative thickness", _replace(GOOD, "thickness_nm = 100.0", "thickness_nm = -10.0"),
     ["sample.thickness_nm", "-10.0"]),
    ("unknown material", _replace(GOOD, '"silicon_nitride"', '"unobtainium"'),
     ["sample.material", "unobtainium"]),
    ("malformed TOML", _replace(GOOD, "[path]", "[path"), ["malformed TOML"]),
    ("unknown table", GOOD + "[colours]\nred = 1\n", ["colours", "unknown table"]),
    ("unknown family", _replace(GOOD, '"membrane"', '"teapot"'), ["sample.family", "teapot"]),
]

GRATING = """\
[beam]
voltage_kV = 30.0
[laser]
wavelength_nm = 800.0
[sample]
family = "grating"
material = { n = 1.45 }
sides = 1
period_nm = "phase-matched"
duty_cycle = DUTY
tooth_height_nm = 300.0
substrate = true
[path]
offset_nm = 50.0
length_um = 10.0
"""
CASES += [
    ("fill factor 1", GRATING.replace("DUTY", "1.0"), ["sample.duty_cycle", "1.0"]),
    ("fill factor 0", GRATING.replace("DUTY", "0.0"), ["sample.duty_cycle", "0.0"]),
]


@pytest.mark.parametrize("name,text,words", CASES, ids=[c[0] for c in CASES])
def test_bad_spec_gives_one_clear_message(tmp_path, name, text, words):
    spec = tmp_path / "bad.toml"
    spec.write_text(text)
    out = subprocess.run([VELOMATCH, "evaluate", str(spec)], capture_output=True, text=True,
                         timeout=300)
    assert out.returncode == 2, (out.stdout, out.stderr)
    assert "Traceback" not in out.stderr
    message = out.stderr.strip()
    assert len(message.splitlines()) == 1, message
    assert str(spec) in message
    for word in words:
        assert word in message, (word, message)


def test_missing_file_is_reported(tmp_path):
    out = subprocess.run([VELOMATCH, "evaluate", str(tmp_path / "nope.toml")],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 2 and "file not found" in out.stderr
    assert "Traceback" not in out.stderr
