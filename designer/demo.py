"""``velomatch demo``: the worked grating study, quick version, end to end.

Scenario (our own): a scanning electron microscope at 30 kV and a 2 um infrared laser;
a fused-silica tooth grating along the beam, made in a cleanroom that can etch
100-800 nm deep with 80 nm features and gaps.  The study

1. starts from the phase-matched period ``Lambda = beta lambda`` (synchronicity of the
   first spatial harmonic with the electron at normal incidence);
2. optimizes tooth height and duty cycle for the structure factor ``kappa = G/E0``
   (``velomatch design``), reporting kappa and the damage factor before and after;
3. checks the decay of the coupling with the electron's height above the teeth
   against the closed form ``l = beta gamma lambda / 2 pi`` (the synchronous Floquet
   order is the only one the coupling integral keeps, and above the teeth it is a
   pure evanescent wave with ``kappa_z = (omega/v) / gamma``);
4. cross-checks the optimized design with Meep (FDTD, an independent solver);
5. writes the GDSII layout with an SVG preview and an HTML report.

The same code serves ``studies/grating_30kV/run.py`` (full and ``--quick``) and
``velomatch demo`` (quick, spec embedded here so that an installed package needs no
study files).

Output folders: a study writes into ``DIR`` only if ``DIR`` is absent or empty, or
(with ``--overwrite``) holds nothing but the files an earlier study run listed in its
manifest ``DIR/.velomatch-study.json``; those files are replaced, nothing else is
ever deleted.
"""

from __future__ import annotations

import contextlib
import io as _io
import json
import math
import sys
import time
from pathlib import Path
from typing import Callable

import numpy as np

from designer import io as vio
from designer.errors import UsageError, VelomatchError

MANIFEST = ".velomatch-study.json"

# The full study's spec (studies/grating_30kV/grating.toml holds the same text; a
# test keeps them equal).
GRATING_SPEC = """\
# Worked study: a fused-silica grating for a 30 kV scanning-microscope beam and a
# 2 um infrared laser (an invented scenario).
[beam]
voltage_kV = 30.0

[laser]
wavelength_nm = 2000.0
angle_deg = 0.0                  # normal incidence through the substrate
peak_field_V_per_m = 1.0         # figures per unit incident field

[sample]
family = "grating"
material = "fused_silica"
period_nm = "phase-matched"      # Lambda = m beta lambda
order = 1
duty_cycle = 0.5
tooth_height_nm = 330.0          # about half the period: a start
substrate = true

[path]
length_um = 20.0                 # about 30 periods

[solver]
grid_step_nm = 20.0

[fabrication]
min_feature_nm = 80.0
min_gap_nm = 80.0
etch_depth_nm = [100.0, 800.0]
max_aspect_ratio = 4.0
corner_radius_nm = 20.0
materials = ["fused_silica"]

[optimize]
objective = "structure_factor"
variables = ["tooth_height_nm", "duty_cycle"]
iterations = 40
learning_rate = 0.05
tolerance = 1e-5

[layout]
line_length_um = 10.0
"""

# --quick / demo: a coarser grid and fewer iterations (about a minute on 2 cores).
QUICK_OVERRIDES = {"solver.grid_step_nm": 40.0, "optimize.iterations": 15}
# Meep grid steps (nm) and agreement tolerances for the cross-check.  At 40 nm both
# solvers carry O(h) discretization errors of a few per cent of their own
# (the FDFD error estimate at 40 nm is ~10 %), so the quick check uses 5 %; the
# full study uses the command's default 2 % at 20 nm (common practice, no source).
CROSSCHECK = {True: (40.0, 0.05), False: (20.0, 0.02)}
# heights above the tooth tops, in decay lengths, for the decay-length fit
DECAY_OFFSETS = (0.5, 1.0, 1.5)


# ---------------------------------------------------------------------------------
# output folders
# ---------------------------------------------------------------------------------
def prepare_study_dir(path: str | Path, *, overwrite: bool = False,
                      resume: bool = False) -> Path:
    """Create ``path`` for a study run; see the module docstring for the rule.

    Raises UsageError when the folder holds files the study did not write, or
    earlier study files without ``overwrite``.  ``resume`` keeps everything in the
    folder (a run killed before its manifest was written left its files unlisted);
    the study itself checks that the folder holds its own earlier run.
    """
    if overwrite and resume:
        raise UsageError("--overwrite and --resume: choose one")
    out = Path(path)
    vio.open_output_dir(out)   # checked, created and locked for the whole run
    if out.exists() and not resume:
        present = {p.relative_to(out).as_posix() for p in out.rglob("*")
                   if p.is_file() and not vio.is_bookkeeping(p.name)}
        manifest = out / MANIFEST
        ours: set[str] = set()
        if manifest.is_file():
            try:
                ours = set(json.loads(manifest.read_text())["files"]) | {MANIFEST}
            except (ValueError, KeyError, TypeError):
                ours = set()
        foreign = sorted(present - ours)
        if foreign:
            shown = ", ".join(foreign[:5]) + (" ..." if len(foreign) > 5 else "")
            raise UsageError(f"{out}: folder holds files this study did not write ({shown}); "
                             "choose another --out folder")
        if present and not overwrite:
            raise UsageError(f"{out}: holds an earlier run; pass --overwrite to replace it")
        for rel in sorted(present, key=lambda r: -r.count("/")):
            (out / rel).unlink()
        for d in sorted((p for p in out.rglob("*") if p.is_dir()),
                        key=lambda p: -len(p.parts)):
            if not any(d.iterdir()):
                d.rmdir()
    out.mkdir(parents=True, exist_ok=True)
    return out


def study_main(argv, *, description: str, default_out: Path, quick_help: str, run,
               closing, resumable: bool = False) -> dict:
    """The shape every study script shares.

    Parse ``--quick``, ``--out`` and ``--overwrite`` (and ``--resume`` when the study
    is ``resumable``: then ``run(out, quick, resume)``); prepare the output folder
    (:func:`prepare_study_dir`); ``summary = run(out, quick)``; add the wall time and
    write ``summary.json``; list everything written in the manifest (so a later
    ``--overwrite`` may replace it); ``closing(out, summary)``; print the safety note.
    Returns the summary.
    """
    import argparse

    from designer.cautions import SAFETY_NOTE

    p = argparse.ArgumentParser(description=description)
    p.add_argument("--quick", action="store_true", help=quick_help)
    p.add_argument("--out", default=str(default_out), help="output folder")
    p.add_argument("--overwrite", action="store_true", help="replace an earlier run in --out")
    if resumable:
        p.add_argument("--resume", action="store_true",
                       help="continue an interrupted run in --out where it stopped")
    args = p.parse_args(argv)
    resume = bool(getattr(args, "resume", False))
    t0 = time.monotonic()
    out = prepare_study_dir(args.out, overwrite=args.overwrite, resume=resume)
    try:
        summary = run(out, args.quick, resume) if resumable else run(out, args.quick)
        summary["wall_s"] = time.monotonic() - t0
        vio.write_json(out / "summary.json", summary)
    finally:
        write_manifest(out)
    closing(out, summary)
    print(SAFETY_NOTE)
    return summary


def study_script(main) -> int:
    """Run a study's ``main`` as a script: a user error is one line and exit code 2."""
    from designer.errors import VelomatchError

    try:
        main()
    except VelomatchError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code
    return 0


def write_manifest(out: Path) -> list[str]:
    """List every file under ``out`` in the manifest (what ``--overwrite`` may replace)."""
    files = sorted(p.relative_to(out).as_posix() for p in out.rglob("*")
                   if p.is_file() and p.name != MANIFEST and not vio.is_bookkeeping(p.name))
    vio.write_json(out / MANIFEST, {"files": files})
    return files


# ---------------------------------------------------------------------------------
# small pieces the studies share
# ---------------------------------------------------------------------------------
def cli(argv: list[str]) -> int:
    """``velomatch ARGV`` in this process (one process: JAX compiles once)."""
    from designer.cli import main

    code = main([str(a) for a in argv])
    if code not in (0, None):
        raise VelomatchError(f"velomatch {' '.join(map(str, argv))}: exit code {code}")
    return int(code or 0)


def cli_json(argv: list[str]) -> dict:
    """``velomatch ARGV --json`` in this process; its stdout parsed as JSON."""
    from designer.cli import main

    buf = _io.StringIO()
    with contextlib.redirect_stdout(buf):
        code = main([str(a) for a in argv] + ["--json"])
    if code not in (0, None):
        raise VelomatchError(f"velomatch {' '.join(map(str, argv))}: exit code {code}")
    return json.loads(buf.getvalue())


def spec_text(text: str, overrides: dict) -> str:
    """``text`` (TOML) with dotted keys replaced, as TOML (designer.spec.dump_spec)."""
    import tomllib

    from designer.spec import dump_spec, with_value

    raw = tomllib.loads(text)
    for key, value in overrides.items():
        raw = with_value(raw, key, value)
    return dump_spec(raw)


def fit_decay_length(z_m, magnitude) -> float:
    """Decay length ``l`` (m) of ``|f(z)| = A exp(-z / l)`` by a least-squares line
    through ``ln |f|``."""
    slope, _ = np.polyfit(np.asarray(z_m, float), np.log(np.asarray(magnitude, float)), 1)
    return float(-1.0 / slope)


def decay_figure(z_m, magnitude, decay_m: float, fitted_m: float, title: str):
    """|coupling| against height, with the closed-form exp(-z/l) through the first point."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    z = np.asarray(z_m, float)
    m = np.asarray(magnitude, float)
    fig = Figure(figsize=(6.0, 4.0))
    ax = fig.subplots()
    zz = np.linspace(z.min(), z.max(), 100)
    ax.semilogy(z * 1e9, m, "o", label="computed")
    ax.semilogy(zz * 1e9, m[0] * np.exp(-(zz - z[0]) / decay_m), "-",
                label=f"exp(-z/l), l = beta gamma lambda/2pi = {decay_m * 1e9:.4g} nm")
    ax.set_xlabel("electron height (nm)")
    ax.set_ylabel("|beta_c| (normalized units)")
    ax.set_title(f"{title}; fitted l = {fitted_m * 1e9:.4g} nm", fontsize=9)
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8)
    return fig


# ---------------------------------------------------------------------------------
# the grating study
# ---------------------------------------------------------------------------------
def _rel(a: float, b: float) -> float:
    return abs(a - b) / abs(b)


def run_grating_study(spec_source: str, out: Path, *, quick: bool,
                      say: Callable[[str], None] | None = None) -> dict:
    """Run the grating study into the prepared folder ``out``; returns the summary.

    ``spec_source`` is the TOML text of the full study (``GRATING_SPEC`` or the
    study's file).  Writes ``spec.toml``, ``design/`` (the ``velomatch design``
    outputs), ``decay.json``/``decay.png``, ``crosscheck.json``/``crosscheck.png``
    (or a note in the summary when Meep is missing), ``layout.gds``/``layout.svg``,
    ``report.html`` and ``summary.json``.
    """
    from designer import beam
    from designer.evaluate import evaluate, evaluation_json
    from designer.spec import load_spec, parse_spec, with_value

    say = say or (lambda m: print(m, file=sys.stderr, flush=True))
    t_start = time.monotonic()
    text = spec_text(spec_source, QUICK_OVERRIDES if quick else {})
    spec_path = vio.write_atomic(out / "spec.toml", text)
    spec = load_spec(spec_path)
    e = beam.electron(spec.beam.voltage_V)
    lam = spec.laser.wavelength_m
    period_closed = beam.synchronous_period(e.beta, lam, spec.sample.order)
    decay_closed = beam.evanescent_decay_length(e.beta, lam)
    say(f"step 1/5: phase-matched start, period {spec.sample.period_m * 1e9:.2f} nm "
        f"(closed form m beta lambda = {period_closed * 1e9:.2f} nm)")

    say("step 2/5: optimizing tooth height and duty cycle (velomatch design)")
    design_dir = out / "design"
    cli(["design", spec_path, "--out", design_dir])
    comp = json.loads((design_dir / "comparison.json").read_text())
    design_toml = design_dir / "design.toml"
    design = load_spec(design_toml)

    say("step 3/5: coupling against electron height (closed-form decay length)")
    heights, betas = [], []
    for f in DECAY_OFFSETS:
        raw = with_value(design.raw, "path.offset_nm", f * decay_closed * 1e9)
        ev = evaluate(parse_spec(raw, source=str(design_toml), base_dir=design.base_dir),
                      refine=False)
        heights.append(ev.run.layout.path.z_m)
        betas.append(evaluation_json(ev)["coupling"]["beta_c_per_field_m_per_V"])
    decay_fit = fit_decay_length(heights, betas)
    vio.write_json(out / "decay.json", {"height_m": heights, "beta_c_per_field_m_per_V": betas,
                                        "fitted_decay_length_m": decay_fit,
                                        "closed_form_decay_length_m": decay_closed})
    vio.save_figure(decay_figure(heights, betas, decay_closed, decay_fit,
                                 "grating: coupling vs height"), out / "decay.png")

    say("step 4/5: cross-check with Meep (FDTD)")
    xc = _grating_crosscheck(design, out, quick, say)

    say("step 5/5: GDSII layout and report")
    export = cli_json(["export", design_toml, "--out", out / "layout.gds",
                       "--preview", out / "layout.svg"])
    teeth_gds = count_gds_polygons(out / "layout.gds", export["layer"])
    length = spec.path.length_m
    figures = comp["figures"]
    summary = {
        "study": "grating_30kV", "quick": quick,
        "scenario": {"voltage_kV": spec.beam.voltage_V / 1e3, "wavelength_nm": lam * 1e9,
                     "material": spec.sample.material.name, "path_length_um": length * 1e6},
        "beta": e.beta, "gamma": e.gamma,
        "period_nm": spec.sample.period_m * 1e9,
        "period_closed_form_nm": period_closed * 1e9,
        "decay_length_closed_form_nm": decay_closed * 1e9,
        "decay_length_fitted_nm": decay_fit * 1e9,
        "decay_length_relative_difference": _rel(decay_fit, decay_closed),
        "variables": comp["variables"],
        "structure_factor": figures["structure_factor"],
        "damage_factor": figures["damage_factor"],
        "beta_c_per_field_m_per_V": figures["beta_c_per_field_m_per_V"],
        "optimizer_objective": {k: comp["optimizer_objective"][k]
                                for k in ("start", "optimized")},
        "design_rule_violations": comp["design_rule_violations"]["optimized"],
        "refined": comp["refined"],
        "gain": comp.get("gain"),
        "crosscheck": xc,
        "layout": {"file": export["file"], "teeth_gds": teeth_gds,
                   "teeth_expected": round(length / spec.sample.period_m),
                   "violations": len(export["violations"])},
        "wall_s": None,
    }
    summary["wall_s"] = time.monotonic() - t_start
    _grating_report(out, summary, design_dir)
    vio.write_json(out / "summary.json", summary)
    return summary


def _grating_crosscheck(design, out: Path, quick: bool, say) -> dict:
    from designer.crosscheck import (
        MeepNotInstalledError,
        crosscheck,
        crosscheck_figure,
        crosscheck_json,
    )

    h_nm, tol = CROSSCHECK[quick]
    try:
        result = crosscheck(design, grid_step_m=h_nm * 1e-9, tolerance=tol,
                            max_wall_s=300.0, progress=lambda m: None)
    except MeepNotInstalledError as exc:
        note = f"skipped: Meep is not available ({str(exc).splitlines()[0]})"
        say("  " + note)
        return {"skipped": note}
    vio.write_json(out / "crosscheck.json", crosscheck_json(result, design))
    vio.save_figure(crosscheck_figure(result), out / "crosscheck.png")
    say(f"  FDFD vs Meep: relative difference {result.relative_difference:.2%} "
        f"(tolerance {tol:.0%})")
    return {"grid_step_nm": h_nm, "tolerance": tol,
            "relative_difference": result.relative_difference, "agree": result.agree,
            "fdtd_converged": result.fdtd_converged}


def count_gds_polygons(path: Path, layer_datatype) -> int:
    """Polygons on ``[layer, datatype]`` of a GDSII file, read back with gdstk."""
    import gdstk

    lib = gdstk.read_gds(str(path))
    layer, datatype = layer_datatype
    return sum(1 for cell in lib.top_level() for p in cell.get_polygons()
               if p.layer == layer and p.datatype == datatype)


def _grating_report(out: Path, s: dict, design_dir: Path) -> Path:
    from designer import report as rp

    def pair(block: dict, digits: int = 4) -> tuple[str, str, str]:
        return (rp.fmt(block["start"], digits=digits), rp.fmt(block["optimized"], digits=digits),
                rp.fmt(block["ratio"], digits=3))

    sc = s["scenario"]
    rows = [("structure factor κ = G/E0", *pair(s["structure_factor"])),
            ("damage factor G/E_max", *pair(s["damage_factor"])),
            ("|β_c| per incident field (m/V)", *pair(s["beta_c_per_field_m_per_V"]))]
    rows += [(k, rp.fmt(v["start"]), rp.fmt(v["optimized"]), "") for k, v in
             s["variables"].items()]
    xc = s["crosscheck"]
    xc_text = (xc["skipped"] if "skipped" in xc else
               f"{xc['relative_difference']:.2%} at {xc['grid_step_nm']:g} nm "
               f"(tolerance {xc['tolerance']:.0%}): "
               + ("agree" if xc["agree"] else "DISAGREE"))
    facts = (("phase-matched period (m β λ)", f"{s['period_nm']:.2f} nm"),
             ("decay length: closed form βγλ/2π", f"{s['decay_length_closed_form_nm']:.2f} nm"),
             ("decay length: fitted to the coupling", f"{s['decay_length_fitted_nm']:.2f} nm"),
             ("gain in κ, refined grid (± combined error)",
              _gain_words(s["gain"]) if (s.get("gain") or {}).get("ratio") is not None
              else "—"),
             ("FDFD vs Meep (FDTD)", xc_text),
             ("design-rule check", "clean" if not s["design_rule_violations"] else
              f"{len(s['design_rule_violations'])} violation(s)"),
             ("GDSII teeth (expected round(L/Λ))",
              f"{s['layout']['teeth_gds']} ({s['layout']['teeth_expected']})"),
             ("layout file", str(s["layout"]["file"])))
    images = [rp.image(design_dir / "design.png", "Optimized design and its field"),
              rp.image(design_dir / "convergence.png", "Optimizer history"),
              rp.image(out / "decay.png", "Coupling against electron height")]
    if (out / "crosscheck.png").is_file():
        images.append(rp.image(out / "crosscheck.png", "Field along the path: FDFD and Meep"))
    rep = rp.Report(
        f"Grating study: {sc['voltage_kV']:g} kV beam, {sc['wavelength_nm']:g} nm laser",
        subtitle=f"{sc['material']} tooth grating, {sc['path_length_um']:g} µm path"
                 + (" (quick version)" if s["quick"] else ""),
        sections=(rp.Section("Headline numbers", (
                      rp.Facts((("structure factor κ after optimization",
                                 rp.fmt(s["structure_factor"]["optimized"])),), headline=True),
                      rp.Facts(facts))),
                  rp.Section("Start and optimized design", (
                      rp.Table(("quantity", "start", "optimized", "ratio"), tuple(rows),
                               caption="Figures from velomatch evaluate at the study's grid "
                                       "step, incident peak field 1 V/m"),)),
                  rp.Section("Pictures", tuple(images))),
        footer="An invented scenario; numbers are computed, not measured.")
    return rp.write_report(out / "report.html", rep)


# ---------------------------------------------------------------------------------
# the command
# ---------------------------------------------------------------------------------
def output_listing(out: Path) -> list[tuple[str, Path]]:
    """What the grating study wrote, by kind, for the closing message."""
    items = [("report (HTML)", out / "report.html"), ("summary (JSON)", out / "summary.json"),
             ("layout (GDSII)", out / "layout.gds"), ("layout preview (SVG)", out / "layout.svg"),
             ("optimized design (spec)", out / "design" / "design.toml"),
             ("evaluation (JSON)", out / "design" / "evaluation.json"),
             ("start vs optimized (JSON)", out / "design" / "comparison.json"),
             ("design plot (PNG)", out / "design" / "design.png"),
             ("convergence plot (PNG)", out / "design" / "convergence.png"),
             ("decay check (PNG)", out / "decay.png"),
             ("cross-check (JSON)", out / "crosscheck.json"),
             ("cross-check plot (PNG)", out / "crosscheck.png")]
    return [(k, p) for k, p in items if p.is_file()]


def _gain_words(gain: dict) -> str:
    """The design's gain with its combined error, and whether it is one."""
    if gain.get("absolute_error") is None:
        return f"{gain['ratio']:.5g} (no error estimate)"
    text = f"{gain['ratio']:.5g} +/- {gain['absolute_error']:.2g}"
    return text + ("" if gain["gain_exceeds_error"] else
                   " (inside the combined error: not a gain)")


def print_closing(out: Path, summary: dict) -> None:
    k = summary["structure_factor"]
    d = summary["damage_factor"]
    print(f"grating study{' (quick)' if summary['quick'] else ''} finished in "
          f"{summary['wall_s']:.0f} s")
    print(f"  period {summary['period_nm']:.2f} nm (m beta lambda), kappa "
          f"{k['start']:.4g} -> {k['optimized']:.4g}, damage factor {d['start']:.4g} -> "
          f"{d['optimized']:.4g}")
    gain = summary.get("gain") or {}
    if gain.get("ratio") is not None:
        print(f"  gain in kappa on the refined grid: {_gain_words(gain)}")
    print(f"  decay length {summary['decay_length_fitted_nm']:.2f} nm (closed form "
          f"{summary['decay_length_closed_form_nm']:.2f} nm)")
    xc = summary["crosscheck"]
    if "skipped" in xc:
        print(f"  cross-check {xc['skipped']}")
    else:
        print(f"  cross-check: FDFD vs Meep {xc['relative_difference']:.2%} "
              f"({'agree' if xc['agree'] else 'DISAGREE'} at {xc['tolerance']:.0%})")
    print(f"  layout: {summary['layout']['teeth_gds']} teeth, "
          f"{summary['layout']['violations']} rule violation(s)")
    print(f"outputs in {out}:")
    for kind, path in output_listing(out):
        print(f"  {kind:28s} {path}")


def demo_command(args) -> int:
    """``velomatch demo [--out DIR] [--overwrite]``: the quick grating study."""
    from designer.cautions import SAFETY_NOTE

    out = prepare_study_dir(getattr(args, "out", None) or "demo-output",
                            overwrite=bool(getattr(args, "overwrite", False)))
    print(f"velomatch demo: quick grating study -> {out}", file=sys.stderr)
    try:
        summary = run_grating_study(GRATING_SPEC, out, quick=True)
    finally:
        write_manifest(out)
    print_closing(out, summary)
    print(SAFETY_NOTE)
    if math.isfinite(summary["wall_s"]) and "skipped" not in summary["crosscheck"] \
            and not summary["crosscheck"]["agree"]:
        return 1
    return 0
