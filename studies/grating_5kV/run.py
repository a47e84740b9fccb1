"""Worked study: does the default design run find the best 5 kV grating? (invented scenario)

    .venv/bin/python studies/grating_5kV/run.py [--quick] [--out DIR] [--overwrite | --resume]

A fused-silica grating at 5 kV and 1030 nm (normal incidence, electron 10 nm above the
teeth over 10 µm; tooth height and duty cycle free inside the fabrication rules) is
optimized by ``velomatch design`` at its defaults (L-BFGS-B, default grid).  The result
is checked against a dense (tooth height x duty cycle) scan inside the rules: the best
scan points and the design are re-evaluated on a 2x finer ("converged") grid and
compared; a dense sub-scan on the converged grid around the best scan point gives the
maximum the design is measured against; the optimizer's accepted steps must never lower
the objective; and 1 nm scans through the optimum at the default grid show whether the
objective jitters with the cell (see README.md for the numbers and their sources).

Every field solve is stored under ``OUT/points/`` as it finishes (and the design run
keeps its own checkpoint), so ``--resume`` continues a killed run where it stopped.
"""

from __future__ import annotations

import json
import math
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))

from designer import io as vio  # noqa: E402
from designer import report as rp  # noqa: E402
from designer.demo import study_main, study_script  # noqa: E402

CONVERGED_FACTOR = 2.0     # the converged grid: default step / 2
TOP_POINTS = 6             # best scan points re-evaluated on the converged grid
WITHIN = 0.01              # the design must reach 99 % of the scan's best
JITTER_LIMIT = 3e-3        # largest ripple about a smooth cubic (common practice, no source)
SCAN = {False: dict(heights=np.arange(40.0, 401.0, 10.0), duties=np.arange(0.22, 0.781, 0.02)),
        True: dict(heights=np.arange(40.0, 401.0, 30.0), duties=np.arange(0.22, 0.781, 0.08))}
# the dense sub-scan on the converged grid: half-widths and steps (tooth height nm, duty)
DENSE = {False: dict(half=(20.0, 0.04), step=(5.0, 0.01)),
         True: dict(half=(10.0, 0.02), step=(5.0, 0.01))}
POINTS = "points"          # one stored field solve per file (what --resume reads)


def _spec_with(spec, height_nm: float, duty: float):
    from designer.api import with_values

    return with_values(spec, {"sample.tooth_height_nm": float(height_nm),
                              "sample.duty_cycle": float(duty)})


def _coupling(spec, step_m: float) -> float:
    """|I| (V per V/m of incident field) of one FDFD solve at ``step_m``."""
    from designer.evaluate import run_fdfd

    return abs(run_fdfd(spec, step_m, with_map=False).integral_V)


def stored_coupling(points_dir: Path):
    """``_coupling`` that stores each solve as ``points_dir/<key>.json`` and reads it back
    when asked again (key: SHA-256 of the spec's hash and the exact grid step), the
    point cache ``velomatch sweep`` resumes from (designer.sweep.cached_point)."""
    from designer.sweep import cached_point

    points_dir.mkdir(parents=True, exist_ok=True)

    def solve(spec, step_m: float) -> float:
        key = vio.canonical_sha256({"spec_sha256": spec.sha256,
                                    "grid_step_m": float(step_m).hex()})
        hit = cached_point(points_dir, key)
        if hit is not None:
            return float(hit["result"]["coupling"])
        value = _coupling(spec, step_m)
        vio.write_json(points_dir / f"{key}.json", {"spec_sha256": key,
                                                    "result": {"coupling": value}})
        return value

    return solve


def _allowed(spec, height_nm: float, duty: float) -> bool:
    rules = spec.fabrication
    period_nm = spec.sample.period_m * 1e9
    lateral = min(duty, 1.0 - duty) * period_nm
    lo, hi = (x * 1e9 for x in rules.etch_depth_m)
    return (duty * period_nm >= rules.min_feature_m * 1e9 - 1e-9
            and (1.0 - duty) * period_nm >= rules.min_gap_m * 1e9 - 1e-9
            and lo - 1e-9 <= height_nm <= hi + 1e-9
            and height_nm <= rules.max_aspect_ratio * lateral + 1e-9)


def _scan_map(solve, spec, heights, duties, step_m: float, say) -> np.ndarray:
    """|I| over tooth height x duty cycle at ``step_m``; NaN outside the rules."""
    out = np.full((len(heights), len(duties)), np.nan)
    for i, th in enumerate(heights):
        for j, du in enumerate(duties):
            if _allowed(spec, th, du):
                out[i, j] = solve(_spec_with(spec, th, du), step_m)
        say(f"  tooth height {th:.0f} nm ({i + 1}/{len(heights)})")
    return out


def ripple(x, values, degree: int = 3) -> float:
    """Largest relative deviation of ``values`` from a least-squares polynomial in x."""
    x = np.asarray(x, dtype=float) - np.mean(x)
    values = np.asarray(values, dtype=float)
    fit = np.polyval(np.polyfit(x, values, degree), x)
    return float(np.max(np.abs(values / fit - 1.0)))


def accepted_drops(history: list[dict]) -> dict:
    """How often the objective (and the loss) got worse from one accepted step to the
    next; the objective is maximized, the loss minimized."""
    acc = [r for r in history if r.get("accepted", True)]
    obj = np.array([r["objective"] for r in acc])
    loss = np.array([r["loss"] for r in acc])
    tol = 1e-12
    d_obj = np.diff(obj) / np.maximum(np.abs(obj[:-1]), tol)
    d_loss = np.diff(loss) / np.maximum(np.abs(loss[:-1]), tol)
    return {"accepted_steps": len(acc),
            "objective_drops": int(np.sum(d_obj < -1e-9)),
            "largest_objective_drop": float(max(0.0, -d_obj.min())) if d_obj.size else 0.0,
            "loss_rises": int(np.sum(d_loss > 1e-9))}


def run_study(out: Path, quick: bool, resume: bool = False, say=None) -> dict:
    from designer import api
    from designer.errors import UsageError
    from designer.evaluate import default_grid_step

    say = say or (lambda m: print(m, file=sys.stderr, flush=True))
    spec_path = out / "spec.toml"
    text = (HERE / "grating.toml").read_text()
    if resume and any(out.iterdir()):
        if not spec_path.is_file() or spec_path.read_text() != text:
            raise UsageError(f"--resume {out}: the folder holds no earlier run of this study "
                             "(spec.toml missing or different)")
    else:
        vio.write_atomic(spec_path, text)
    spec = api.load_spec(spec_path)
    solve = stored_coupling(out / POINTS)
    h = default_grid_step(spec)
    fine = h / CONVERGED_FACTOR
    say(f"step 1/5: velomatch design at its defaults (default grid {h * 1e9:.3f} nm)")
    t0 = time.monotonic()
    run = api.design(spec, out / "design", quiet=True,
                     resume=resume and (out / "design" / "checkpoint.json").is_file(),
                     overwrite=resume)
    t_design = time.monotonic() - t0
    history = json.loads((out / "design" / "history.json").read_text())
    steps = history["starts"][0]["history"] if "starts" in history else history["history"]
    drops = accepted_drops(steps)
    first = history["starts"][0] if "starts" in history else history
    drops.update(stopped=first.get("stopped"), restarts=first.get("restarts", 0),
                 cell_pattern_steps=sum(1 for r in steps
                                        if str(r.get("step", "")).startswith("cell pattern")))
    best = run["design_spec"]
    h_opt, d_opt = best.sample.tooth_height_m * 1e9, best.sample.duty_cycle

    grid = SCAN[quick]
    heights, duties = grid["heights"], grid["duties"]
    say(f"step 2/5: scan {len(heights)} tooth heights x {len(duties)} duty cycles at the "
        "default grid (inside the rules)")
    scan = _scan_map(solve, spec, heights, duties, h, say)

    say(f"step 3/5: the {TOP_POINTS} best scan points and the design on the converged grid "
        f"({fine * 1e9:.3f} nm)")
    order = np.argsort(np.where(np.isnan(scan), -np.inf, scan), axis=None)[::-1][:TOP_POINTS]
    top = []
    for flat in order:
        i, j = np.unravel_index(flat, scan.shape)
        top.append({"tooth_height_nm": float(heights[i]), "duty_cycle": float(duties[j]),
                    "default_grid": float(scan[i, j]),
                    "converged_grid": solve(_spec_with(spec, heights[i], duties[j]), fine)})
    scan_best = max(top, key=lambda r: r["converged_grid"])
    design_default = solve(best, h)
    design_fine = solve(best, fine)
    start_fine = solve(spec, fine)
    ratio = design_fine / scan_best["converged_grid"]

    dense = DENSE[quick]
    (hh, hd), (sh, sd) = dense["half"], dense["step"]
    d_heights = scan_best["tooth_height_nm"] + np.arange(-hh, hh + sh / 2, sh)
    d_duties = np.round(scan_best["duty_cycle"] + np.arange(-hd, hd + sd / 2, sd), 6)
    say(f"step 4/5: dense scan on the converged grid around the best scan point "
        f"({len(d_heights)} x {len(d_duties)} points, {sh:g} nm x {sd:g})")
    dense_map = _scan_map(solve, spec, d_heights, d_duties, fine, say)
    i, j = np.unravel_index(np.nanargmax(dense_map), dense_map.shape)
    dense_best = {"tooth_height_nm": float(d_heights[i]), "duty_cycle": float(d_duties[j]),
                  "converged_grid": float(dense_map[i, j]),
                  # a maximum on the sub-scan's rim may have a better neighbour outside it
                  "on_edge": bool(i in (0, len(d_heights) - 1) or j in (0, len(d_duties) - 1))}
    dense_ratio = design_fine / dense_best["converged_grid"]

    say("step 5/5: 1 nm scans through the optimum at the default grid (cell jitter)")
    dh = np.arange(-10.0, 10.01, 1.0)
    along_h = [(h_opt + x, d_opt) for x in dh]
    width_nm = spec.sample.period_m * 1e9
    along_d = [(h_opt, d_opt + x / width_nm) for x in dh]   # tooth width in 1 nm steps
    jitter = {}
    for name, pts in (("tooth_height", along_h), ("duty_cycle", along_d)):
        vals = [solve(_spec_with(spec, a, b), h) if _allowed(spec, a, b) else np.nan
                for a, b in pts]
        ok = ~np.isnan(vals)
        jitter[name] = {"offsets_nm": dh[ok].tolist(), "coupling": np.asarray(vals)[ok].tolist(),
                        "ripple": ripple(dh[ok], np.asarray(vals)[ok])}
    to_beta = _beta_per_integral(spec)
    summary = {
        "quick": quick,
        "default_grid_step_nm": h * 1e9,
        "converged_grid_step_nm": fine * 1e9,
        "period_nm": spec.sample.period_m * 1e9,
        "design": {"tooth_height_nm": h_opt, "duty_cycle": d_opt,
                   "beta_c_default_grid": design_default * to_beta,
                   "beta_c_converged_grid": design_fine * to_beta,
                   "seconds": t_design, **drops},
        "start_beta_c_converged_grid": start_fine * to_beta,
        "scan": {"tooth_height_nm": heights.tolist(), "duty_cycle": duties.tolist(),
                 "beta_c_default_grid": [[None if math.isnan(v) else v * to_beta for v in row]
                                         for row in scan],
                 "best_converged": {**scan_best,
                                    "default_grid": scan_best["default_grid"] * to_beta,
                                    "converged_grid": scan_best["converged_grid"] * to_beta},
                 "top_points": len(top)},
        "dense": {"tooth_height_nm": d_heights.tolist(), "duty_cycle": d_duties.tolist(),
                  "beta_c_converged_grid": [[None if math.isnan(v) else v * to_beta
                                             for v in row] for row in dense_map],
                  "best": {**dense_best,
                           "converged_grid": dense_best["converged_grid"] * to_beta}},
        "design_over_scan_best": ratio,
        "design_over_dense_best": dense_ratio,
        "within_1_percent": bool(dense_ratio >= 1.0 - WITHIN),
        "jitter": {k: v["ripple"] for k, v in jitter.items()},
        "jitter_limit": JITTER_LIMIT,
        "jitter_scans": jitter,
    }
    vio.save_figure(_figure(summary, scan * to_beta, dense_map * to_beta), out / "scan.png")
    _report(out, summary)
    return summary


def _beta_per_integral(spec) -> float:
    """|beta_c| per unit |I| (for a 1 V/m incident wave) at the spec's peak field."""
    from designer.evaluate import angular_frequency, evaluate
    from solvers.coupling import beta_from_integral

    e0 = evaluate(spec, refine=False).peak_field_V_per_m
    return abs(complex(beta_from_integral(e0, angular_frequency(spec.laser.wavelength_m))))


def _figure(s: dict, beta_map: np.ndarray, dense_map: np.ndarray):
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    from designer import drawing

    fig = Figure(figsize=(15, 4.4))
    ax, cx, bx = fig.subplots(1, 3, gridspec_kw={"width_ratios": [1.3, 1.1, 1]})
    sc, dn, d = s["scan"], s["dense"], s["design"]
    b = sc["best_converged"]
    x0, x1 = dn["duty_cycle"][0], dn["duty_cycle"][-1]
    y0, y1 = dn["tooth_height_nm"][0], dn["tooth_height_nm"][-1]

    def map_panel(axis, grid, values, grid_name, best, best_label, design_label, title):
        # |β_c| per V/m, shown in units of 1e-7 (no offset text over the title)
        im = axis.pcolormesh(grid["duty_cycle"], grid["tooth_height_nm"], values / 1e-7,
                             shading="nearest", cmap="viridis")
        fig.colorbar(im, ax=axis, label=f"|β_c| ({grid_name} grid, 10⁻⁷ per V/m)")
        axis.plot(best["duty_cycle"], best["tooth_height_nm"], "s", mfc="none", mec="w",
                  ms=10, label=best_label)
        if design_label:
            axis.plot(d["duty_cycle"], d["tooth_height_nm"], "*", color=drawing.LASER,
                      mec="k", ms=14, label=design_label)
        axis.set_xlabel("duty cycle")
        axis.set_ylabel("tooth height (nm)")
        axis.set_title(title, fontsize=10)

    map_panel(ax, sc, beta_map, "default", b, "best scan point", "design (L-BFGS-B)",
              f"scan; design / best scan point = {s['design_over_scan_best']:.4f}")
    ax.plot([x0, x1, x1, x0, x0], [y0, y0, y1, y1, y0], "w--", lw=1, label="dense scan")
    ax.text(0.02, 0.98, "blank: outside the fabrication rules", transform=ax.transAxes,
            va="top", fontsize=8, bbox=dict(facecolor="w", alpha=0.8, lw=0))
    db = dn["best"]
    inside = x0 <= d["duty_cycle"] <= x1 and y0 <= d["tooth_height_nm"] <= y1
    map_panel(cx, dn, dense_map, "converged", db, "dense maximum", "design" if inside else None,
              f"dense scan; design / dense maximum = {s['design_over_dense_best']:.4f}"
              + (" (maximum on the rim)" if db["on_edge"] else ""))
    for axis in (ax, cx):
        axis.legend(loc="lower right", fontsize=8, facecolor="0.35", labelcolor="w")
    for (name, style), colour in zip((("tooth_height", "o-"), ("duty_cycle", "s-")),
                                     (drawing.ELECTRON, drawing.LASER)):
        j = s["jitter_scans"][name]
        v = np.asarray(j["coupling"])
        bx.plot(j["offsets_nm"], v / v.mean(), style, ms=3, color=colour,
                label=f"{name.replace('_', ' ')} (ripple {j['ripple']:.2%})")
    bx.set_xlabel("offset from the design (nm of height / of tooth width)")
    bx.set_ylabel("coupling / mean (default grid)")
    bx.set_title("1 nm steps through the optimum", fontsize=10)
    bx.legend(fontsize=8)
    fig.tight_layout()
    return fig


def _report(out: Path, s: dict) -> Path:
    d = s["design"]
    b = s["scan"]["best_converged"]
    dm = s["dense"]["best"]
    facts = (("default grid / converged grid", f"{s['default_grid_step_nm']:.3f} nm / "
              f"{s['converged_grid_step_nm']:.3f} nm"),
             ("design (tooth height, duty cycle)",
              f"{d['tooth_height_nm']:.1f} nm, {d['duty_cycle']:.4f}"),
             ("design |β_c| per V/m (converged grid)", f"{d['beta_c_converged_grid']:.4g}"),
             ("best scan point", f"{b['tooth_height_nm']:.0f} nm, {b['duty_cycle']:.2f}: "
              f"{b['converged_grid']:.4g}"),
             ("design / best scan point", f"{s['design_over_scan_best']:.4f}"),
             ("dense maximum (converged grid)",
              f"{dm['tooth_height_nm']:.0f} nm, {dm['duty_cycle']:.2f}: "
              f"{dm['converged_grid']:.4g}" + (" (on the sub-scan's rim)" if dm["on_edge"]
                                               else "")),
             ("design / dense maximum", f"{s['design_over_dense_best']:.4f}"),
             ("accepted steps, objective drops", f"{d['accepted_steps']}, "
              f"{d['objective_drops']}"),
             ("cell jitter (height, width)", f"{s['jitter']['tooth_height']:.2%}, "
              f"{s['jitter']['duty_cycle']:.2%} (limit {s['jitter_limit']:.1%})"))
    rep = rp.Report("Study: the best 5 kV grating, found by the default design run",
                    subtitle="fused silica, 1030 nm, electron 10 nm above the teeth"
                    + (" (quick version)" if s["quick"] else ""),
                    sections=(rp.Section("Headline numbers", (rp.Facts(facts),)),
                              rp.Section("Scan and jitter", (
                                  rp.image(out / "scan.png", "Scan map and 1 nm scans"),))),
                    footer="An invented scenario; numbers are computed, not measured.")
    return rp.write_report(out / "report.html", rep)


def _closing(out: Path, s: dict) -> None:
    d = s["design"]
    print(f"5 kV grating study{' (quick)' if s['quick'] else ''} finished in "
          f"{s['wall_s']:.0f} s")
    print(f"  design {d['tooth_height_nm']:.1f} nm x {d['duty_cycle']:.4f}: "
          f"{s['design_over_scan_best']:.4f} of the best scan point, "
          f"{s['design_over_dense_best']:.4f} of the dense maximum (converged grid; "
          f"{'within' if s['within_1_percent'] else 'NOT within'} 1 %)")
    print(f"  accepted steps {d['accepted_steps']}, objective drops {d['objective_drops']}; "
          f"cell jitter {s['jitter']['tooth_height']:.2%} (height), "
          f"{s['jitter']['duty_cycle']:.2%} (width)")
    print(f"outputs in {out}: summary.json, scan.png, report.html, design/")


def main(argv: list[str] | None = None) -> dict:
    return study_main(argv, description=__doc__.splitlines()[0], default_out=HERE / "output",
                      quick_help="coarse scan (13 x 8 points)",
                      run=run_study, closing=_closing, resumable=True)


if __name__ == "__main__":
    sys.exit(study_script(main))
