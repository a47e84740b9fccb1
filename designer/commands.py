"""Subcommand handlers: read inputs, call the physics, write outputs, show progress.

Each ``run_<command>(args)`` returns an exit code.  Physics lives elsewhere; this
module is the edge where files are read and written and results are printed.
"""

from __future__ import annotations

import math
import sys

from designer import io as vio
from designer.errors import UsageError
from designer.provenance import provenance


def _emit(args, result: dict, text: str) -> None:
    if getattr(args, "json", False):
        print(vio.dumps(result))
    else:
        print(text)


# -- beam --------------------------------------------------------------------------

def run_beam(args) -> int:
    from designer import beam

    if not (args.voltage_kV > 0 and args.voltage_kV <= 10_000):
        raise UsageError(f"--voltage-kV = {args.voltage_kV!r}: must be in (0, 10000]")
    if not args.wavelength_nm > 0:
        raise UsageError(f"--wavelength-nm = {args.wavelength_nm!r}: must be > 0")
    if args.order < 1:
        raise UsageError(f"--order = {args.order!r}: must be >= 1")
    e = beam.electron(args.voltage_kV * 1e3)
    lam = args.wavelength_nm * 1e-9
    result = {
        "voltage_V": e.voltage_V,
        "beta": e.beta,
        "gamma": e.gamma,
        "velocity_m_per_s": e.velocity_m_per_s,
        "de_broglie_wavelength_m": e.de_broglie_wavelength_m,
        "kinetic_energy_eV": e.voltage_V,
        "laser_wavelength_m": lam,
        "grating_period_m": beam.synchronous_period(e.beta, lam, args.order),
        "grating_order": args.order,
        "evanescent_decay_length_m": beam.evanescent_decay_length(e.beta, lam),
        "minimum_index_for_prism": 1.0 / e.beta,
        "prism": [],
    }
    lines = [
        f"electron at {args.voltage_kV:g} kV",
        f"  gamma                  {e.gamma:.6f}",
        f"  beta = v/c             {e.beta:.6f}",
        f"  speed                  {e.velocity_m_per_s:.6e} m/s",
        f"  de Broglie wavelength  {e.de_broglie_wavelength_m * 1e12:.4f} pm",
        f"phase matching at {args.wavelength_nm:g} nm",
        f"  grating period (m={args.order})   {result['grating_period_m'] * 1e9:.2f} nm",
        f"  evanescent decay length  {result['evanescent_decay_length_m'] * 1e9:.2f} nm",
        f"  prism needs n > 1/beta = {1.0 / e.beta:.4f}",
    ]
    for n in args.index or []:
        entry = {"index": n}
        if n * e.beta > 1:
            entry["cherenkov_angle_deg"] = math.degrees(beam.cherenkov_angle(n, e.beta))
            entry["incidence_angle_deg"] = math.degrees(
                beam.phase_matching_incidence_angle(n, e.beta))
            lines.append(f"  n = {n:g}: Cherenkov angle {entry['cherenkov_angle_deg']:.3f} deg, "
                         f"incidence {entry['incidence_angle_deg']:.3f} deg from the normal")
        else:
            entry["cherenkov_angle_deg"] = None
            entry["incidence_angle_deg"] = None
            lines.append(f"  n = {n:g}: cannot phase-match (n*beta = {n * e.beta:.4f} <= 1)")
        result["prism"].append(entry)
    result["provenance"] = provenance()
    _emit(args, result, "\n".join(lines))
    return 0


def _not_yet(name: str):
    def handler(args) -> int:
        print(f"velomatch {name}: not available in this build yet", file=sys.stderr)
        return 2
    return handler


run_evaluate = _not_yet("evaluate")
run_spectrum = _not_yet("spectrum")
run_design = _not_yet("design")
run_sweep = _not_yet("sweep")
run_compare = _not_yet("compare")
run_crosscheck = _not_yet("crosscheck")
run_export = _not_yet("export")
run_demo = _not_yet("demo")
