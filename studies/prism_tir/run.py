"""Worked study: total-internal-reflection phase matching on a prism at 120 kV and
800 nm (an invented scenario; see README.md).

    .venv/bin/python studies/prism_tir/run.py [--quick] [--out DIR] [--overwrite]

Which catalogue materials can phase-match (n beta > 1), the coupling against electron
height (decay length beta gamma lambda / 2 pi) and against interaction length (linear
when phase matched, bounded when detuned), the predicted PINEM spectrum for the spec's
laser and electron pulses, a Meep cross-check and one HTML report.
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))

from designer import io as vio  # noqa: E402
from designer import report as rp  # noqa: E402
from designer.demo import (  # noqa: E402
    cli,
    cli_json,
    decay_figure,
    fit_decay_length,
    spec_text,
    study_main,
    study_script,
)

HEIGHTS = {False: "10:250:25", True: "10:250:7"}        # path.offset_nm
LENGTHS = {False: "1:60:60", True: "1:60:12"}           # path.length_um
DETUNING_DEG = 0.5           # angle above the phase-matched one for the detuned curve
CROSSCHECK_NM = 10.0
CROSSCHECK_TOL = 0.02        # the command's default tolerance (common practice, no source)


def materials_table(beta: float, wavelength_m: float) -> list[dict]:
    """Every catalogue dielectric valid at the wavelength: n, n beta, angles."""
    from designer import beam
    from designer.materials import catalogue

    rows = []
    for name, mat in catalogue().items():
        if mat.kind != "dielectric" or not bool(mat.in_range(wavelength_m)):
            continue
        n = float(mat.index(wavelength_m, warn=False).real)
        ok = n * beta > 1.0
        rows.append({"material": name, "n": n, "n_beta": n * beta, "phase_matches": ok,
                     "cherenkov_angle_deg":
                         math.degrees(beam.cherenkov_angle(n, beta)) if ok else None,
                     "incidence_angle_deg":
                         math.degrees(beam.phase_matching_incidence_angle(n, beta))
                         if ok else None})
    return sorted(rows, key=lambda r: r["n"])


def sweep_values(path: Path, key: str) -> tuple[np.ndarray, np.ndarray]:
    data = json.loads(path.read_text())
    x = np.asarray(data["axes"][key], float)
    b = np.array([p["coupling"]["beta_c_per_field_m_per_V"] for p in data["points"]], float)
    return x, b


def length_figure(lengths_um, matched, detuned, closed_detuned, detuning_deg):
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6.4, 4.0))
    ax = fig.subplots()
    ax.plot(lengths_um, matched * 1e6, "o-", label="phase matched")
    ax.plot(lengths_um, detuned * 1e6, "s", label=f"detuned by {detuning_deg:g} deg")
    ax.plot(lengths_um, closed_detuned * 1e6, "-", label="|sin(δL/2)/(δ/2)| (closed form)")
    ax.set_xlabel("interaction length L (µm)")
    ax.set_ylabel("|β_c| per field (µm/V)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    return fig


def main(argv: list[str] | None = None) -> dict:
    return study_main(argv, description=__doc__.splitlines()[0], default_out=HERE / "output",
                      quick_help="coarser sweeps (~1 min)",
                      run=_run,
                      closing=_print)


def _run(out: Path, quick: bool) -> dict:
    from designer import beam
    from designer.crosscheck import MeepNotInstalledError, crosscheck
    from designer.evaluate import evaluate, evaluation_json
    from designer.spec import load_spec

    spec_path = HERE / "prism.toml"
    spec = load_spec(spec_path)
    e = beam.electron(spec.beam.voltage_V)
    lam = spec.laser.wavelength_m
    n = float(spec.sample.material.index.real)

    # 1. which materials can phase-match
    table = materials_table(e.beta, lam)

    # 2. the nominal design
    ev = evaluate(spec)
    nominal = evaluation_json(ev)
    vio.write_json(out / "evaluation.json", nominal)
    angle = nominal["laser"]["angle_deg"]

    # 3. coupling against height
    print(f"coupling against electron height: offset_nm = {HEIGHTS[quick]}", file=sys.stderr)
    cli(["sweep", spec_path, "--vary", f"path.offset_nm={HEIGHTS[quick]}",
         "--out", out / "height", "--workers", 0])
    heights_nm, b_height = sweep_values(out / "height" / "sweep.json", "path.offset_nm")
    decay_closed = beam.evanescent_decay_length(e.beta, lam)
    decay_fit = fit_decay_length(heights_nm * 1e-9, b_height)
    vio.save_figure(decay_figure(heights_nm * 1e-9, b_height, decay_closed, decay_fit,
                                 "prism: coupling vs height"), out / "decay.png")

    # 4. coupling against interaction length, matched and detuned
    print(f"coupling against interaction length: length_um = {LENGTHS[quick]}",
          file=sys.stderr)
    cli(["sweep", spec_path, "--vary", f"path.length_um={LENGTHS[quick]}",
         "--out", out / "length", "--workers", 0])
    lengths_um, b_matched = sweep_values(out / "length" / "sweep.json", "path.length_um")
    detuned_angle = angle + DETUNING_DEG
    detuned_spec = vio.write_atomic(out / "detuned.toml", spec_text(
        spec_path.read_text(), {"laser.angle_deg": detuned_angle}))
    cli(["sweep", detuned_spec, "--vary", f"path.length_um={LENGTHS[quick]}",
         "--out", out / "length_detuned", "--workers", 0])
    _, b_detuned = sweep_values(out / "length_detuned" / "sweep.json", "path.length_um")
    # detuning of the evanescent wave from the electron, delta = n k sin(theta) - omega/v
    k0 = 2 * math.pi / lam
    delta = n * k0 * math.sin(math.radians(detuned_angle)) - k0 / e.beta
    L = lengths_um * 1e-6
    shape = np.abs(np.sin(delta * L / 2) / (delta / 2))
    closed_detuned = b_detuned[0] * shape / shape[0]
    per_length = b_matched / L
    vio.save_figure(length_figure(lengths_um, b_matched, b_detuned, closed_detuned,
                                  DETUNING_DEG), out / "length.png")

    # 5. the PINEM spectrum for the spec's pulses
    print("PINEM spectrum", file=sys.stderr)
    spectrum = cli_json(["spectrum", spec_path, "--plot", out / "pinem.png"])
    vio.write_json(out / "spectrum.json", spectrum)
    orders = np.asarray(spectrum["orders"], float)
    prob = np.asarray(spectrum["line_probability"], float)
    beta_peak = spectrum["beta_c_peak"]
    tau_l, tau_e = spec.laser.duration_s, spec.spectrum.electron_pulse_s
    second_closed = 2 * beta_peak**2 * tau_l / math.hypot(tau_l, tau_e)

    # 6. Meep cross-check of the nominal design
    print(f"cross-checking with Meep at {CROSSCHECK_NM:g} nm", file=sys.stderr)
    try:
        xc = crosscheck(spec, grid_step_m=CROSSCHECK_NM * 1e-9, tolerance=CROSSCHECK_TOL,
                        max_wall_s=300.0)
        exact = complex(xc.exact_V)
        xcheck = {"grid_step_nm": CROSSCHECK_NM, "tolerance": CROSSCHECK_TOL,
                  "fdtd_vs_fdfd": xc.relative_difference, "agree": xc.agree,
                  "fdtd_vs_exact": abs(xc.integral_fdtd_V - exact) / abs(exact)}
    except MeepNotInstalledError as exc:
        xcheck = {"skipped": f"Meep is not available ({str(exc).splitlines()[0]})"}

    c = nominal["coupling"]
    summary = {
        "study": "prism_tir", "quick": quick,
        "beta": e.beta, "gamma": e.gamma, "minimum_index": 1 / e.beta,
        "materials": table,
        "phase_matching_materials": [r["material"] for r in table if r["phase_matches"]],
        "prism_index": n, "incidence_angle_deg": angle,
        "incidence_angle_closed_form_deg": math.degrees(math.asin(1 / (n * e.beta))),
        "peak_field_V_per_m": nominal["laser"]["peak_field_V_per_m"],
        "beta_c": c["beta_c"], "structure_factor": c["structure_factor"],
        "damage_factor": c["damage_factor"],
        "decay_length_closed_form_nm": decay_closed * 1e9,
        "decay_length_fitted_nm": decay_fit * 1e9,
        "decay_length_relative_difference": abs(decay_fit - decay_closed) / decay_closed,
        "length_linearity_deviation": float(np.max(np.abs(per_length / per_length[0] - 1))),
        "detuned_shape_deviation": float(np.max(np.abs(b_detuned - closed_detuned))
                                         / np.max(b_detuned)),
        "detuning_per_m": delta,
        "spectrum": {"beta_c_peak": beta_peak, "probability_sum": float(prob.sum()),
                     "second_moment": float(np.sum(orders**2 * prob)),
                     "second_moment_closed_form": second_closed,
                     "zero_loss_probability": float(prob[orders == 0][0]),
                     "laser_fwhm_fs": tau_l * 1e15, "electron_fwhm_fs": tau_e * 1e15},
        "crosscheck": xcheck, "wall_s": None,
    }
    _report(out, summary)
    return summary


def _report(out: Path, s: dict) -> Path:
    rows = tuple((r["material"], f"{r['n']:.5g}", f"{r['n_beta']:.4f}",
                  "yes" if r["phase_matches"] else "no",
                  rp.fmt(r["cherenkov_angle_deg"], "deg"), rp.fmt(r["incidence_angle_deg"], "deg"))
                 for r in s["materials"])
    sp = s["spectrum"]
    xc = s["crosscheck"]
    facts = (("prism index n (silicon nitride, 800 nm)", f"{s['prism_index']:.5f}"),
             ("phase-matched incidence angle", f"{s['incidence_angle_deg']:.3f} deg"),
             ("PINEM coupling |β_c| at the pulse peak", f"{s['beta_c']:.4g}"),
             ("structure factor κ", f"{s['structure_factor']:.4g}"),
             ("decay length: closed form βγλ/2π", f"{s['decay_length_closed_form_nm']:.3f} nm"),
             ("decay length: fitted", f"{s['decay_length_fitted_nm']:.3f} nm"),
             ("coupling per length, largest deviation (matched)",
              f"{s['length_linearity_deviation']:.2e}"),
             ("detuned curve vs closed form, largest deviation",
              f"{s['detuned_shape_deviation']:.2e}"),
             ("spectrum: Σ P_l", f"{sp['probability_sum']:.6f}"),
             ("spectrum: Σ l² P_l (closed form 2|β|² τ_L/√(τ_L²+τ_e²))",
              f"{sp['second_moment']:.4g} ({sp['second_moment_closed_form']:.4g})"),
             ("Meep cross-check", xc.get("skipped") or
              f"FDTD vs exact {xc['fdtd_vs_exact']:.2%}, vs FDFD {xc['fdtd_vs_fdfd']:.2%}"))
    rep = rp.Report(
        "Prism study: TIR phase matching at 120 kV, 800 nm",
        subtitle="silicon-nitride prism" + (" (quick version)" if s["quick"] else ""),
        sections=(
            rp.Section("Which materials can phase-match", (
                rp.Paragraph(f"Needs n > 1/β = {s['minimum_index']:.4f}."),
                rp.Table(("material", "n", "n β", "phase-matches", "Cherenkov angle",
                          "incidence angle"), rows,
                         caption="Catalogue dielectrics valid at 800 nm"))),
            rp.Section("Headline numbers", (rp.Facts(facts),)),
            rp.Section("Pictures", (
                rp.image(out / "decay.png", "Coupling against electron height"),
                rp.image(out / "length.png", "Coupling against interaction length"),
                rp.image(out / "pinem.png", "Predicted PINEM spectrum"))),
        ),
        footer="An invented scenario; numbers are computed, not measured.")
    return rp.write_report(out / "report.html", rep)


def _print(out: Path, s: dict) -> None:
    print(f"prism study{' (quick)' if s['quick'] else ''} finished in {s['wall_s']:.0f} s")
    print(f"  phase-matching materials (n > {s['minimum_index']:.4f}): "
          + ", ".join(s["phase_matching_materials"]))
    print(f"  incidence {s['incidence_angle_deg']:.3f} deg, |beta_c| {s['beta_c']:.4g}, "
          f"kappa {s['structure_factor']:.4g}")
    print(f"  decay length {s['decay_length_fitted_nm']:.3f} nm (closed form "
          f"{s['decay_length_closed_form_nm']:.3f} nm)")
    xc = s["crosscheck"]
    print("  cross-check: " + (xc.get("skipped") or f"Meep vs exact {xc['fdtd_vs_exact']:.2%}"))
    print(f"outputs in {out}: report.html, summary.json, decay.png, length.png, pinem.png")


if __name__ == "__main__":
    sys.exit(study_script(main))
