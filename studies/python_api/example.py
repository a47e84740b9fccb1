"""velomatch from Python: evaluate a film, scan its thickness, compare with a grating.

Scenario (our own, invented): a 200 kV transmission microscope and an 800 nm laser.
Which silicon-nitride film thickness couples best at 40 degrees, and how does a
fused-silica grating for a 30 kV beam compare per unit field?

    .venv/bin/python studies/python_api/example.py [--out DIR]

Writes into DIR (default: a temporary folder): film.png (the evaluation picture),
thickness/ (a sweep: sweep.json, sweep.png) and prints a short summary.  About ten
seconds on two cores.  Every call returns what the matching command writes as JSON.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

from designer import api as vm  # noqa: E402

FILM = {
    "beam": {"voltage_kV": 200.0},
    "laser": {"wavelength_nm": 800.0, "angle_deg": 40.0},
    "sample": {"family": "membrane", "material": "silicon_nitride", "thickness_nm": 50.0},
    "path": {"x_nm": 0.0},
}

GRATING = """
[beam]
voltage_kV = 30.0
[laser]
wavelength_nm = 2000.0
angle_deg = 0.0
[sample]
family = "grating"
material = "fused_silica"
period_nm = "phase-matched"
tooth_height_nm = 330.0
[path]
length_um = 10.0
[solver]
grid_step_nm = 40.0
refine = false
"""


def main(argv=None) -> dict:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", help="output folder (default: a temporary folder)")
    args = p.parse_args(argv)
    out = args.out or tempfile.mkdtemp(prefix="velomatch-api-")
    os.makedirs(out, exist_ok=True)

    film = vm.build_spec(FILM)
    first = vm.evaluate(film, plot=os.path.join(out, "film.png"), quiet=True)

    thicker = vm.with_values(film, {"sample.thickness_nm": 120.0})
    second = vm.evaluate(thicker, quiet=True)

    scan = vm.sweep(film, ["sample.thickness_nm=20:300:15"], os.path.join(out, "thickness"),
                    quiet=True)
    best = max(scan["points"], key=lambda pt: pt["coupling"]["beta_c"])

    grating = vm.evaluate(vm.build_spec(GRATING), quiet=True)

    summary = {
        "film_50nm_beta_c_per_field_m_per_V": first["coupling"]["beta_c_per_field_m_per_V"],
        "film_120nm_beta_c_per_field_m_per_V": second["coupling"]["beta_c_per_field_m_per_V"],
        "best_thickness_nm": best["values"]["sample.thickness_nm"],
        "grating_beta_c_per_field_m_per_V": grating["coupling"]["beta_c_per_field_m_per_V"],
        "grating_electron_height_above_teeth_m":
            grating["sample"]["electron"]["height_above_surface_m"],
        "out": out,
    }
    per_field = "|beta_c| per field"
    print(f"50 nm film:   {per_field} {summary['film_50nm_beta_c_per_field_m_per_V']:.4g} m/V")
    print(f"120 nm film:  {per_field} {summary['film_120nm_beta_c_per_field_m_per_V']:.4g} m/V")
    print(f"best thickness of the scan (20 to 300 nm): {summary['best_thickness_nm']:g} nm")
    print(f"grating:      {per_field} {summary['grating_beta_c_per_field_m_per_V']:.4g} m/V, "
          f"electron {summary['grating_electron_height_above_teeth_m'] * 1e9:.4g} nm above "
          "the teeth (default: half a decay length)")
    print(f"pictures and the sweep are in {out}")
    return summary


if __name__ == "__main__":
    main()
