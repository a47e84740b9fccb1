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


def _status(message: str) -> None:
    print(f"  {message}", file=sys.stderr, flush=True)


def _coupling_text(result: dict) -> str:
    c = result["coupling"]
    lines = [f"sample: {result['sample']['family']}  "
             f"({result['provenance']['solver']}, "
             + (f"step {result['provenance']['grid_step_m'] * 1e9:.3g} nm)"
                if result["provenance"]["grid_step_m"] else "exact)"),
             f"  laser angle               {result['laser']['angle_deg']:.3f} deg",
             f"  peak field (incidence)    {result['laser']['peak_field_V_per_m']:.4g} V/m",
             f"  coupling integral |I|     {math.hypot(*c['integral_V']):.4g} V",
             f"  |beta_c|                  {c['beta_c']:.4g}",
             f"  |beta_c| per field        {c['beta_c_per_field_m_per_V']:.4g} m/V"]
    if c["gradient_V_per_m"] is not None:
        lines.append(f"  gradient G                {c['gradient_V_per_m']:.4g} V/m "
                     f"(over {c['gradient_length_m'] * 1e6:.4g} um)")
        lines.append(f"  structure factor G/E0     {c['structure_factor']:.4g}")
    if c["max_field_in_material_V_per_m"] is not None:
        lines.append(f"  max field in material     {c['max_field_in_material_V_per_m']:.4g} V/m")
    if c["damage_factor"] is not None:
        lines.append(f"  damage factor G/E_max     {c['damage_factor']:.4g}")
    err = c["relative_error_estimate"]
    lines.append("  relative error estimate   " + ("n/a" if err is None else f"{err:.2%}"))
    lines.extend(_caution(result["laser"]["peak_field_V_per_m"]))
    return "\n".join(lines)


def _caution(peak_field_V_per_m: float) -> list[str]:
    """A safety line for outputs that describe a real laser (fields above 1 MV/m)."""
    if peak_field_V_per_m is None or peak_field_V_per_m < 1e6:
        return []
    from designer.cli import SAFETY_NOTE

    return ["", "Caution: these fields come from an intense (typically class-4) laser and "
            "can damage the sample; check the damage factor against your material's "
            "threshold.", SAFETY_NOTE]


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
    if not args.json:
        print(f"evaluating {args.spec}", file=sys.stderr)
    say = None if args.json else _status
    with cost.watch(say):
        ev = evaluate(spec, progress=say)
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


def run_spectrum(args) -> int:
    from designer import cost, spectrum
    from designer.evaluate import evaluate
    from designer.spec import input_files, load_spec

    outputs = [("--plot", args.plot, tuple(vio.FIGURE_SUFFIXES))]
    check_outputs(args, outputs, [args.spec])
    spec = load_spec(args.spec)
    check_outputs(args, outputs, input_files(spec))
    say = None if args.json else _status
    with cost.watch(say):
        ev = evaluate(spec, refine=False, progress=say)
    result = spectrum_of(ev)
    require_finite({k: v for k, v in result.items() if k != "_lines"}, spec.source)
    lines = result.pop("_lines")
    if args.plot:
        spectrum.plot_spectrum(args.plot, result["energy_eV"], result["density_per_eV"], lines,
                               title=f"PINEM spectrum, |beta_c| = {result['beta_c_peak']:.3g}")
    result["provenance"] = provenance(spec.sha256, solver=ev.solver,
                                      grid_step_m=ev.run.grid_step_m)
    strongest = sorted(zip(lines.orders, lines.probability), key=lambda t: -t[1])[:5]
    text = [f"PINEM spectrum: |beta_c| = {result['beta_c_peak']:.4g}, "
            f"photon energy {result['photon_energy_eV']:.4g} eV, "
            f"zero-loss width {spec.spectrum.zlp_fwhm_eV:g} eV",
            "  strongest lines: " + ", ".join(f"l={int(o)}: {p:.3g}" for o, p in strongest)]
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
