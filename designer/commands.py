"""Subcommand handlers: read inputs, call the physics, write outputs, show progress.

Each ``run_<command>(args)`` returns an exit code.  Physics lives elsewhere; this
module is the edge where files are read and written and results are printed.
"""

from __future__ import annotations

import math
import sys

from designer import io as vio
from designer.errors import UsageError
from designer.io import require_finite
from designer.provenance import provenance


def _emit(args, result: dict, text: str) -> None:
    if getattr(args, "json", False):
        print(vio.dumps(result))
    else:
        print(text)


# -- beam --------------------------------------------------------------------------

def run_beam(args) -> int:
    from designer import beam
    from designer.materials import MAX_INDEX
    from designer.spec import MAX_VOLTAGE_KV, MAX_WAVELENGTH_NM, MIN_VOLTAGE_KV, MIN_WAVELENGTH_NM

    # the same ranges as the spec keys [beam] voltage_kV and [laser] wavelength_nm
    if not MIN_VOLTAGE_KV <= args.voltage_kV <= MAX_VOLTAGE_KV:
        raise UsageError(f"--voltage-kV = {args.voltage_kV!r}: must be within "
                         f"[{MIN_VOLTAGE_KV:g}, {MAX_VOLTAGE_KV:g}]")
    if not MIN_WAVELENGTH_NM <= args.wavelength_nm <= MAX_WAVELENGTH_NM:
        raise UsageError(f"--wavelength-nm = {args.wavelength_nm!r}: must be within "
                         f"[{MIN_WAVELENGTH_NM:g}, {MAX_WAVELENGTH_NM:g}]")
    if args.order < 1 or args.order > 1000:
        raise UsageError(f"--order = {args.order!r}: must be within [1, 1000]")
    for n in args.index or []:
        if not 0 < n <= MAX_INDEX:
            raise UsageError(f"--index = {n!r}: must be a refractive index in (0, "
                             f"{MAX_INDEX:g}]")
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
    rows = [
        (f"electron at {args.voltage_kV:g} kV", None),
        ("gamma", f"{e.gamma:.6f}"),
        ("beta = v/c", f"{e.beta:.6f}"),
        ("speed", f"{e.velocity_m_per_s:.6e} m/s"),
        ("de Broglie wavelength", f"{e.de_broglie_wavelength_m * 1e12:.4f} pm"),
        (f"phase matching at {args.wavelength_nm:g} nm", None),
        (f"grating period (order m = {args.order})",
         f"{result['grating_period_m'] * 1e9:.2f} nm"),
        ("field decay length (1/e)", f"{result['evanescent_decay_length_m'] * 1e9:.2f} nm "
                                     "(of the synchronous evanescent field)"),
        ("prism index needed", f"n > 1/beta = {1.0 / e.beta:.4f}"),
    ]
    for n in args.index or []:
        entry = {"index": n}
        if n * e.beta > 1:
            entry["cherenkov_angle_deg"] = math.degrees(beam.cherenkov_angle(n, e.beta))
            entry["incidence_angle_deg"] = math.degrees(
                beam.phase_matching_incidence_angle(n, e.beta))
            rows.append((f"prism n = {n:g}",
                         f"Cherenkov angle {entry['cherenkov_angle_deg']:.3f}°, incidence "
                         f"{entry['incidence_angle_deg']:.3f}° from the normal"))
        else:
            entry["cherenkov_angle_deg"] = None
            entry["incidence_angle_deg"] = None
            rows.append((f"prism n = {n:g}",
                         f"cannot phase-match (n*beta = {n * e.beta:.4f} <= 1)"))
        result["prism"].append(entry)
    width = max(len(k) for k, v in rows if v is not None)
    lines = [k if v is None else f"  {k:<{width}}  {v}" for k, v in rows]
    result["provenance"] = provenance()
    _emit(args, result, "\n".join(lines))
    return 0


# -- materials -------------------------------------------------------------------

_MODEL_WORDS = {"Sellmeier": "Sellmeier", "Cauchy": "Cauchy", "DrudeLorentz": "Drude-Lorentz",
                "ConstantIndex": "constant index", "ConstantPermittivity": "constant eps",
                "Tabulated": "table", "Spliced": "table + Sellmeier"}


def run_materials(args) -> int:
    """``velomatch materials``: the catalogue with model, valid range, source, index."""
    from designer import units
    from designer.materials import aliases, catalogue

    lam = None
    if args.wavelength_nm is not None:
        from designer.spec import MAX_WAVELENGTH_NM, MIN_WAVELENGTH_NM

        if not MIN_WAVELENGTH_NM <= args.wavelength_nm <= MAX_WAVELENGTH_NM:
            raise UsageError(f"--wavelength-nm = {args.wavelength_nm!r}: must be within "
                             f"[{MIN_WAVELENGTH_NM:g}, {MAX_WAVELENGTH_NM:g}]")
        lam = args.wavelength_nm * 1e-9
    names_for = {}
    for alias, name in aliases().items():
        names_for.setdefault(name, []).append(alias)
    entries, rows = [], []
    for name, m in catalogue().items():
        lo, hi = m.valid_range_m
        entry = {"name": name, "kind": m.kind,
                 "model": _MODEL_WORDS.get(type(m.model).__name__, type(m.model).__name__),
                 "valid_range_m": [lo, hi if math.isfinite(hi) else None],
                 "source": m.source, "note": m.note, "aliases": sorted(names_for.get(name, []))}
        index = ""
        if lam is not None:
            n = complex(m.index(lam, warn=False))
            inside = bool(m.in_range(lam))
            entry["index_at_wavelength"] = [n.real, n.imag]
            entry["wavelength_in_range"] = inside
            index = f"{n.real:.4f}" + (f"{n.imag:+.4f}i" if abs(n.imag) > 1e-6 else "") \
                + ("" if inside else " (outside range)")
        entries.append(entry)
        span = (f"{units.length(lo, 3)} - " + (units.length(hi, 3) if math.isfinite(hi)
                                               else "(no upper limit)")) if lo > 0 or \
            math.isfinite(hi) else "all"
        rows.append((name, entry["model"], span, index))
    head = ("name", "model", "valid range", f"n at {args.wavelength_nm:g} nm" if lam else "")
    widths = [max(len(r[i]) for r in rows + [head]) for i in range(4)]
    lines = ["  ".join(c.ljust(w) for c, w in zip(head, widths)).rstrip()]
    lines += ["  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows]
    lines.append("")
    lines.append("sources")
    for e in entries:
        extra = f" ({e['note']})" if e["note"] else ""
        also = f"; also written {', '.join(e['aliases'])}" if e["aliases"] else ""
        lines.append(f"  {e['name']}: {e['source']}{extra}{also}")
    lines.append("")
    lines.append('In a spec: material = "NAME", or { n = 2.0 }, { n = 2.0, k = 0.01 }.')
    _emit(args, {"materials": entries, "wavelength_m": lam, "provenance": provenance()},
          "\n".join(lines))
    return 0


def _status(message: str) -> None:
    print(f"  {message}", file=sys.stderr, flush=True)


def _rules_text(result: dict) -> list[str]:
    """The plane's assumption and the design-rule verdict (the check export applies)."""
    out = []
    plane = result.get("plane") or {}
    if plane.get("assumption"):
        out.append(f"  plane                     wafer ({plane['assumption']})")
    rules = result.get("design_rules")
    if rules is not None:
        head = "clean" if rules["clean"] else f"{len(rules['violations'])} violation(s)"
        if rules["not_checked"]:
            head += " (not checked: " + "; ".join(rules["not_checked"]) + ")"
        out.append(f"  design-rule check         {head}")
        out += [f"    {v['message']}" for v in rules["violations"][:10]]
    return out


def _coupling_text(result: dict) -> str:
    """The ``evaluate`` result for people: set-up, sample as evaluated, figures, notes."""
    from designer import units
    from designer.resolved import sample_lines

    c, prov, las = result["coupling"], result["provenance"], result["laser"]
    if prov.get("solver") == "fmm":
        solver = f"Fourier modal method, orders N = {prov.get('fourier_orders')}"
    elif prov["grid_step_m"]:
        solver = f"FDFD, grid step {units.length(prov['grid_step_m'], 3)}"
    else:
        solver = "exact layer-stack solution"
    err = c["relative_error_estimate"]
    figures = [
        ("coupling integral |I|", f"{math.hypot(*c['integral_V']):.4g} V"),
        ("|beta_c|", f"{c['beta_c']:.4g}"),
        ("|beta_c| per field", f"{c['beta_c_per_field_m_per_V']:.4g} m/V"),
    ]
    if c["gradient_V_per_m"] is not None:
        figures.append(("gradient G = |I|/L", f"{units.field(c['gradient_V_per_m'])} over "
                        f"L = {units.length(c['gradient_length_m'])} "
                        f"({c.get('gradient_length_rule', '')})"))
        figures.append(("structure factor G/E0", f"{c['structure_factor']:.4g}"))
    if c["max_field_in_material_V_per_m"] is not None:
        figures.append(("max field in material",
                        f"{units.field(c['max_field_in_material_V_per_m'])} "
                        f"({c['max_field_rule']})"))
    if c["damage_factor"] is not None:
        figures.append(("damage factor G/E_max", f"{c['damage_factor']:.4g}"))
    figures.append(("relative error estimate",
                    units.percent(err) if err is not None
                    else "n/a (not estimated: [solver] refine = false or an exact solution)"))
    width = max(len(k) for k, _ in figures)
    e = result["electron"]
    lines = [f"{result['sample']['family']} sample ({solver})",
             f"  beam   {units.voltage(e['voltage_V'])} (beta = {e['beta']:.5f})",
             f"  laser  {units.length(las['wavelength_m'])}, "
             f"{units.degrees(las['angle_deg'])} from {las['from']}, "
             f"peak field {units.field(las['peak_field_V_per_m'])} in the incidence medium",
             "sample as evaluated"]
    lines.extend(sample_lines(result["sample"]))
    lines.append("coupling")
    lines.extend(f"  {k:<{width}}  {v}" for k, v in figures)
    lines.extend(_rules_text(result))
    for note in result.get("notes", []):
        lines.extend(["", "Note: " + note])
    lines.extend(_caution(las["peak_field_V_per_m"]))
    return "\n".join(lines)


def _caution(peak_field_V_per_m: float) -> list[str]:
    """Safety lines for outputs that describe a real laser (designer.cautions)."""
    from designer.cautions import caution_lines

    return caution_lines(peak_field_V_per_m)


def check_outputs(args, outputs, inputs=()) -> None:
    """Refuse bad output files before any work: ``outputs`` is ``[(flag, path, suffixes)]``
    (see :func:`designer.io.check_output`); ``--overwrite`` allows replacing files."""
    overwrite = bool(getattr(args, "overwrite", False))
    for flag, path, suffixes in outputs:
        if path:
            vio.check_output(path, flag=flag, overwrite=overwrite, inputs=inputs,
                             suffixes=suffixes)
    vio.check_distinct([(flag, path) for flag, path, _ in outputs])


def run_evaluate(args) -> int:
    from designer import cost
    from designer.evaluate import evaluate, evaluation_json
    from designer.spec import input_files, load_spec

    outputs = [("--out", args.out, None), ("--plot", args.plot, tuple(vio.FIGURE_SUFFIXES)),
               ("--report", args.report, None)]
    check_outputs(args, outputs, [args.spec])
    spec = load_spec(args.spec)
    check_outputs(args, outputs, input_files(spec))
    print(f"evaluating {args.spec}", file=sys.stderr)
    with cost.watch(_status):
        ev = evaluate(spec, progress=_status)
    result = require_finite(evaluation_json(ev), spec.source)
    figure = report = None
    if args.plot:
        from designer.plots import evaluation_figure

        figure = evaluation_figure(ev)
    if args.report:
        from designer.report import evaluation_report

        report = evaluation_report(ev, result)
    if args.out:
        vio.write_json(args.out, result)
    if figure is not None:
        vio.save_figure(figure, args.plot)
    if report is not None:
        vio.write_atomic(args.report, report)
    _emit(args, result, _coupling_text(result))
    return 0


def spectrum_of(ev) -> dict:
    """PINEM spectrum of an evaluation: spot and pulse averaged, ZLP-broadened."""
    import numpy as np

    from designer import spectrum
    from solvers.coupling import beta_from_integral

    spec = ev.spec
    e0 = ev.peak_field_V_per_m
    coupling = abs(complex(beta_from_integral(ev.run.integral_V * e0, ev.omega)))
    samples, weights = np.array([coupling]), None
    spot = spec.path.electron_spot_m
    if spot and ev.run.map_x_m is not None:
        x = ev.run.map_x_m
        period = ev.run.layout.grid.size_x
        betas = np.abs(np.asarray(beta_from_integral(ev.run.map_integral_V * e0, ev.omega)))
        shifts = period * np.arange(-20, 21)
        d = x[:, None] + shifts[None, :] - ev.run.layout.path.x_m
        weights = np.exp(-4 * np.log(2) * d**2 / spot**2).sum(axis=1)
        samples = betas
    elif spot and ev.run.spot_z_m is not None:
        from designer.evaluate import spot_weights

        samples = np.abs(np.asarray(beta_from_integral(ev.run.spot_z_integral_V * e0,
                                                       ev.omega)))
        weights = spot_weights(ev.run.spot_z_m, ev.run.layout.path.z_m, spot)
    tau_l, tau_e = spec.laser.duration_s, spec.spectrum.electron_pulse_s
    if tau_l is None or tau_e is None:
        tau_l = tau_e = None
    lines = spectrum.averaged_line_spectrum(samples, ev.omega, spot_weights=weights,
                                            tau_laser=tau_l, tau_electron=tau_e,
                                            delay=spec.spectrum.delay_s)
    energy, density = spectrum.broadened_spectrum(lines, spec.spectrum.zlp_fwhm_eV)
    return {"beta_c_peak": coupling, "photon_energy_eV": spectrum.photon_energy_eV(ev.omega),
            "orders": lines.orders, "line_energy_eV": lines.energy_eV,
            "line_probability": lines.probability, "energy_eV": energy,
            "density_per_eV": density, "zlp_fwhm_eV": spec.spectrum.zlp_fwhm_eV,
            "averaged_over": {"electron_spot_fwhm_m": spot if weights is not None else None,
                              "laser_duration_s": tau_l, "electron_pulse_s": tau_e,
                              "delay_s": spec.spectrum.delay_s if tau_l else None},
            "_lines": lines}


def spectrum_result(ev) -> tuple[dict, object]:
    """The ``spectrum --json`` object of an evaluation (notes, cautions, provenance
    included) and the line spectrum behind it (for the picture)."""
    from designer.cautions import cautions
    from designer.resolved import spectrum_notes

    result = spectrum_of(ev)
    lines = result.pop("_lines")
    notes = spectrum_notes(ev)
    if result["averaged_over"]["laser_duration_s"] is None:
        notes.append("Pulse averaging skipped: it needs both [laser] duration_fs and "
                     "[spectrum] electron_pulse_fs; the lines are those of the peak field.")
    result["notes"] = notes
    result["cautions"] = cautions(ev.peak_field_V_per_m)
    result["provenance"] = provenance(ev.spec.sha256, solver=ev.solver,
                                      grid_step_m=ev.run.grid_step_m)
    return result, lines


def spectrum_picture(path, result: dict, lines) -> None:
    """Write the spectrum picture of a :func:`spectrum_result`."""
    from designer import spectrum

    short = ["pulse averaging skipped (set [laser] duration_fs and [spectrum] "
             "electron_pulse_fs)"] if result["averaged_over"]["laser_duration_s"] is None \
        else []
    spectrum.plot_spectrum(path, result["energy_eV"], result["density_per_eV"], lines,
                           title=f"PINEM spectrum, |β_c| = {result['beta_c_peak']:.3g}",
                           notes=short)


def run_spectrum(args) -> int:
    from designer import cost
    from designer.evaluate import evaluate
    from designer.spec import input_files, load_spec

    outputs = [("--plot", args.plot, tuple(vio.FIGURE_SUFFIXES))]
    check_outputs(args, outputs, [args.spec])
    spec = load_spec(args.spec)
    check_outputs(args, outputs, input_files(spec))
    with cost.watch(_status):
        ev = evaluate(spec, refine=False, progress=_status)
    result, lines = spectrum_result(ev)
    require_finite(result, spec.source)
    if args.plot:
        spectrum_picture(args.plot, result, lines)
    strongest = sorted(zip(lines.orders, lines.probability), key=lambda t: -t[1])[:5]
    text = [f"PINEM spectrum: |beta_c| = {result['beta_c_peak']:.4g}, "
            f"photon energy {result['photon_energy_eV']:.4g} eV, "
            f"zero-loss width {spec.spectrum.zlp_fwhm_eV:g} eV",
            "  strongest lines: " + ", ".join(f"l={int(o)}: {p:.3g}" for o, p in strongest)]
    for note in result["notes"]:
        text.extend(["", "Note: " + note])
    text.extend(_caution(ev.peak_field_V_per_m))
    _emit(args, result, "\n".join(text))
    return 0




def run_export(args) -> int:
    from designer.export import export_command

    return export_command(args)


def run_crosscheck(args) -> int:
    from designer.crosscheck import crosscheck_command

    return crosscheck_command(args)


def run_design(args) -> int:
    from designer.design import design_command

    return design_command(args)


def run_sweep(args) -> int:
    from designer.sweep import sweep_command

    return sweep_command(args)


def run_compare(args) -> int:
    from designer.compare import compare_command

    return compare_command(args)


def run_demo(args) -> int:
    from designer.demo import demo_command

    return demo_command(args)
