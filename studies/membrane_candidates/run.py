"""Worked study: four film candidates and photonic-crystal (hole-array) membranes for a
200 kV transmission microscope and an 800 nm laser, compared before anything is
fabricated (an invented scenario; see README.md).

    .venv/bin/python studies/membrane_candidates/run.py [--quick] [--out DIR] [--overwrite]

Part 1, films at 35°: angle x wavelength maps of the coupling for every candidate
(``velomatch sweep``), the ranking with fabrication tolerance and bandwidths
(``velomatch compare``), a Meep cross-check of the winner against the exact
layer-stack solution.

Part 2, hole arrays against the films: square and hexagonal lattices of round holes
(several radii) in the 150 nm silicon nitride film, the electron through a hole
centre; an angle scan per candidate (films included) at 800 nm finds its best angle;
``velomatch compare`` ranks everyone at their best angle on the coupling averaged
over a 100 fs pulse's spectrum and a 20 µm spot's divergence, with bandwidths; checks:
holes of vanishing radius give the exact film, and the winner's order-count error.
One HTML report.
"""

from __future__ import annotations

import dataclasses
import json
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))

from designer import io as vio  # noqa: E402
from designer import report as rp  # noqa: E402
from designer.demo import cli, study_main, study_script  # noqa: E402

CANDIDATES = ("sin_50nm.toml", "sin_150nm.toml", "diamond_100nm.toml", "sapphire_80nm.toml")
# (angle axis, wavelength axis) of the maps; the angle axis is symmetric about 0 so
# that the mirror-symmetry check has pairs
MAPS = {False: ("-70:70:29", "700:1000:31"), True: ("-60:60:13", "700:1000:7")}
# Meep grid step (nm) for the cross-check of the winner (films of 50-150 nm: 5-15 cells)
CROSSCHECK_NM = 10.0
CROSSCHECK_TOL = 0.02   # the command's default tolerance (common practice, no source)

# part 2: hole arrays (template sin_150nm_holes.toml) against the films
HOLE_TEMPLATE = "sin_150nm_holes.toml"
HOLE_LATTICES = ("square", "hexagonal")
HOLE_RADII_NM = {False: (80.0, 130.0, 180.0), True: (80.0,)}   # quick: one size per lattice
HOLE_ORDERS = {False: 3, True: 2}        # Fourier orders N of the scans and the ranking
ANGLE_SCAN = {False: "0:70:36", True: "0:60:13"}
# fine scans around each angle where a folded guided mode of the film is predicted
# (the sweep's empty-lattice guide lines): half-width (deg) and points
FINE_SCAN = {False: (3.0, 31), True: (3.0, 13)}
# the common laser of the ranking: a 100 fs pulse focused to a 20 um (1/e²) spot
PULSE_FS, SPOT_UM = 100.0, 20.0
TINY_RADIUS_NM = 1e-3    # the spec needs r > 0: a "zero-radius" hole for the film check


def beta_map(sweep_json: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(angles_deg, wavelengths_nm, |beta_c| per field [angle, wavelength])."""
    axes = sweep_json["axes"]
    angles = np.asarray(axes["laser.angle_deg"], float)
    lams = np.asarray(axes["laser.wavelength_nm"], float)
    b = np.array([p["coupling"]["beta_c_per_field_m_per_V"] for p in sweep_json["points"]],
                 float).reshape(sweep_json["shape"])
    return angles, lams, b


def maps_figure(maps: dict):
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    fig = Figure(figsize=(11.0, 7.5))
    axes = fig.subplots(2, 2).ravel()
    for ax, (name, (angles, lams, b)) in zip(axes, maps.items()):
        im = ax.pcolormesh(lams, angles, b * 1e6, shading="nearest", cmap="viridis")
        fig.colorbar(im, ax=ax, label="|β_c| per field (µm/V)")
        ax.set_title(name, fontsize=10)
        ax.set_xlabel("laser wavelength (nm)")
        ax.set_ylabel("angle of incidence (deg)")
    fig.tight_layout()
    return fig


def main(argv: list[str] | None = None) -> dict:
    return study_main(argv, description=__doc__.splitlines()[0], default_out=HERE / "output",
                      quick_help="coarser maps (~1 min)",
                      run=lambda out, quick: _run([HERE / n for n in CANDIDATES], out, quick),
                      closing=_print)


def _run(specs: list[Path], out: Path, quick: bool) -> dict:
    from designer.compare import compare_report
    from designer.crosscheck import MeepNotInstalledError, crosscheck, crosscheck_json
    from designer.spec import load_spec

    angle_axis, lam_axis = MAPS[quick]
    maps, checks = {}, {}
    for spec in specs:
        name = spec.stem
        print(f"map of {name}: angle {angle_axis} deg x wavelength {lam_axis} nm",
              file=sys.stderr)
        cli(["sweep", spec, "--vary", f"laser.angle_deg={angle_axis}",
             "--vary", f"laser.wavelength_nm={lam_axis}", "--out", out / "maps" / name,
             "--workers", 0])
        angles, lams, b = beta_map(json.loads((out / "maps" / name / "sweep.json").read_text()))
        maps[name] = (angles, lams, b)
        i0 = int(np.argmin(np.abs(angles)))
        # best point among angles >= 0 (the map is mirror-symmetric)
        half = np.where(angles[:, None] >= 0, b, -np.inf)
        ia, il = np.unravel_index(int(np.argmax(half)), b.shape)
        checks[name] = {
            # normal incidence: the film's field is Ex only, the electron sees Ez = 0
            "normal_incidence_ratio": float(np.max(b[i0]) / np.max(b)),
            # mirror x -> -x maps theta to -theta and leaves the path x = 0 in place
            "mirror_asymmetry": float(np.max(np.abs(b - b[::-1])) / np.max(b)),
            "best_angle_deg": float(angles[ia]), "best_wavelength_nm": float(lams[il]),
            "best_beta_c_per_field_m_per_V": float(b[ia, il]),
        }
    vio.save_figure(maps_figure(maps), out / "maps.png")

    print("ranking the candidates (velomatch compare)", file=sys.stderr)
    cli(["compare", *specs, "--out", out / "compare", "--workers", 0])
    data = json.loads((out / "compare" / "compare.json").read_text())
    ranking = [{"rank": e["rank"], "name": e["name"],
                "beta_c_per_field_m_per_V": e["coupling"]["beta_c_per_field_m_per_V"],
                "structure_factor": e["coupling"]["structure_factor"],
                "damage_factor": e["coupling"]["damage_factor"],
                "worst_ratio_10nm": e["tolerance_10nm"]["worst_ratio"],
                "angular_width_deg": e["angular_bandwidth_deg"]["full_width"],
                "spectral_width_nm": e["spectral_bandwidth_nm"]["full_width"]}
               for e in data["candidates"]]
    ranking.sort(key=lambda r: r["rank"])

    winner = ranking[0]["name"]
    print(f"cross-checking the winner {winner} with Meep", file=sys.stderr)
    try:
        xc = crosscheck(load_spec(HERE / f"{winner}.toml"), grid_step_m=CROSSCHECK_NM * 1e-9,
                        tolerance=CROSSCHECK_TOL, max_wall_s=300.0)
        xj = crosscheck_json(xc)
        vio.write_json(out / "crosscheck.json", xj)
        exact = complex(xc.exact_V)
        xcheck = {"candidate": winner, "grid_step_nm": CROSSCHECK_NM,
                  "tolerance": CROSSCHECK_TOL,
                  "fdtd_vs_fdfd": xc.relative_difference, "agree": xc.agree,
                  "fdtd_vs_exact": abs(xc.integral_fdtd_V - exact) / abs(exact),
                  "fdfd_vs_exact": abs(xc.integral_fdfd_V - exact) / abs(exact)}
    except MeepNotInstalledError as exc:
        xcheck = {"skipped": f"Meep is not available ({str(exc).splitlines()[0]})"}

    rep = compare_report(data)
    facts = [(f"{n}: best map point", f"{c['best_beta_c_per_field_m_per_V']:.4g} m/V at "
              f"{c['best_angle_deg']:g} deg, {c['best_wavelength_nm']:g} nm")
             for n, c in checks.items()]
    facts.append(("Meep cross-check of the winner",
                  xcheck.get("skipped") or
                  f"{winner}: FDTD vs exact layer stack {xcheck['fdtd_vs_exact']:.2%}, "
                  f"FDTD vs FDFD {xcheck['fdtd_vs_fdfd']:.2%} at {CROSSCHECK_NM:g} nm"))
    extra = rp.Section("Angle × wavelength maps", (
        rp.image(maps_figure(maps), "|β_c| per unit incident field, every candidate"),
        rp.Facts(tuple(facts)),
        rp.Paragraph("At normal incidence an unpatterned film carries no field along the "
                     "electron's path (Ez = 0), so every map vanishes on the 0° row and is "
                     "mirror-symmetric in the angle.", "note")))
    rep = dataclasses.replace(rep, title="Membrane candidates: 200 kV, 800 nm",
                              sections=(*rep.sections, extra),
                              footer="An invented scenario; numbers are computed, not "
                                     "measured.")
    holes, hole_sections = _holes(out, quick)
    rep = dataclasses.replace(rep, sections=(*rep.sections, *hole_sections))
    rp.write_report(out / "report.html", rep)
    return {"study": "membrane_candidates", "quick": quick, "ranking": ranking,
            "maps": checks, "crosscheck": xcheck, "holes": holes, "wall_s": None}


# -- part 2: photonic-crystal membranes --------------------------------------------

def _hole_specs(out: Path, quick: bool) -> dict[str, Path]:
    """Write the lattice x radius variants of the template; returns name -> path."""
    from designer.demo import spec_text

    text = (HERE / HOLE_TEMPLATE).read_text()
    specs = {}
    for lattice in HOLE_LATTICES:
        for r in HOLE_RADII_NM[quick]:
            name = f"{lattice}_r{r:g}nm"
            path = out / "holes" / "specs" / f"{name}.toml"
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_text(spec_text(text, {"sample.lattice": lattice,
                                             "sample.hole_radius_nm": r,
                                             "solver.fourier_orders": HOLE_ORDERS[quick]}))
            specs[name] = path
    return specs


def angle_scan(spec: Path, axis: str, out: Path) -> tuple[np.ndarray, np.ndarray, dict]:
    """(angles_deg, |beta_c| per field, sweep.json) of ``velomatch sweep`` over
    laser.angle_deg."""
    cli(["sweep", spec, "--vary", f"laser.angle_deg={axis}", "--out", out, "--workers", 0])
    data = json.loads((out / "sweep.json").read_text())
    angles = np.asarray(data["axes"]["laser.angle_deg"], float)
    b = np.array([p["coupling"]["beta_c_per_field_m_per_V"] for p in data["points"]], float)
    return angles, b, data


def guided_mode_angles(data: dict, angles: np.ndarray) -> list[float]:
    """Angles where the sweep's empty-lattice guide lines cross zero mismatch (a folded
    guided mode of the homogenized film meets the incident wave), interpolated."""
    out = []
    for values in (data.get("bands") or {}).get("mismatch", {}).values():
        m = np.asarray(values, dtype=float)
        for k in range(len(m) - 1):
            if np.isfinite(m[k]) and np.isfinite(m[k + 1]) and m[k] * m[k + 1] <= 0 \
                    and m[k] != m[k + 1]:
                out.append(float(angles[k] + (angles[k + 1] - angles[k]) * m[k]
                                 / (m[k] - m[k + 1])))
    return sorted(set(round(a, 6) for a in out))


def _holes(out: Path, quick: bool) -> tuple[dict, tuple]:
    from designer.compare import compare_report
    from designer.demo import spec_text

    hole_specs = _hole_specs(out, quick)
    films = {Path(n).stem: HERE / n for n in CANDIDATES}
    everyone = {**films, **hole_specs}
    scans, best = {}, {}
    half, points = FINE_SCAN[quick]
    for name, path in everyone.items():
        print(f"angle scan of {name}: {ANGLE_SCAN[quick]} deg at 800 nm", file=sys.stderr)
        where = out / "holes" / "angles" / name
        angles, b, data = angle_scan(path, ANGLE_SCAN[quick], where)
        modes = guided_mode_angles(data, angles)
        edges = []
        for j, a in enumerate(modes):
            lo, hi = max(a - half, 0.0), min(a + half, 89.0)
            print(f"  fine scan of {name} around the guided mode at {a:.2f} deg",
                  file=sys.stderr)
            fa, fb, _ = angle_scan(path, f"{lo:.6g}:{hi:.6g}:{points}", where / f"mode{j}")
            angles, b = np.concatenate([angles, fa]), np.concatenate([b, fb])
            edges += [float(fa[0]), float(fa[-1])]
        # a maximum on the edge of a fine window: one more window centred on it
        a = float(angles[int(np.argmax(b))])
        if modes and any(abs(a - e) < 1e-9 for e in edges) and 0.0 < a < 89.0:
            lo, hi = max(a - half, 0.0), min(a + half, 89.0)
            print(f"  fine scan of {name} around {a:.2f} deg (edge of a window)",
                  file=sys.stderr)
            fa, fb, _ = angle_scan(path, f"{lo:.6g}:{hi:.6g}:{points}", where / "edge")
            angles, b = np.concatenate([angles, fa]), np.concatenate([b, fb])
        order = np.argsort(angles)
        angles, b = angles[order], b[order]
        scans[name] = (angles, b)
        k = int(np.argmax(b))
        best[name] = {"angle_deg": float(angles[k]), "beta_c_per_field_m_per_V": float(b[k]),
                      "guided_mode_angles_deg": modes}
    # every candidate at its best angle, the film sin_150nm first: it sets the common
    # beam and laser (with the pulse and spot the averaged coupling needs)
    order = ["sin_150nm"] + [n for n in everyone if n != "sin_150nm"]
    pinned = []
    for name in order:
        extra = {"laser.angle_deg": best[name]["angle_deg"]}
        if name == "sin_150nm":
            extra.update({"laser.duration_fs": PULSE_FS, "laser.spot_radius_um": SPOT_UM})
        path = out / "holes" / "best" / f"{name}.toml"
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(spec_text(everyone[name].read_text(), extra))
        pinned.append(path)
    print("ranking films and hole arrays at their best angles (velomatch compare)",
          file=sys.stderr)
    cli(["compare", *pinned, "--out", out / "holes" / "compare", "--workers", 0])
    data = json.loads((out / "holes" / "compare" / "compare.json").read_text())
    rows = []
    for e in data["candidates"]:
        sample = e["spec"]["sample"]
        avg = e["bandwidth_average"]
        rows.append({
            "rank": e["rank"], "name": e["name"],
            "kind": "holes" if sample.get("pattern") == "holes" else "film",
            "lattice": sample.get("lattice"), "hole_radius_nm": sample.get("hole_radius_nm"),
            "best_angle_deg": e["angle_deg"],
            "beta_c_per_field_m_per_V": e["coupling"]["beta_c_per_field_m_per_V"],
            "averaged_beta_c_per_field_m_per_V": avg["beta_c_per_field_m_per_V"],
            "spectral_ratio": avg["spectral_ratio"], "angular_ratio": avg["angular_ratio"],
            "angular_width_deg": e["angular_bandwidth_deg"]["full_width"],
            "angular_width_lower_bound": e["angular_bandwidth_deg"]["lower_bound"],
            "spectral_width_nm": e["spectral_bandwidth_nm"]["full_width"],
            "spectral_width_lower_bound": e["spectral_bandwidth_nm"]["lower_bound"],
            "damage_factor": e["coupling"]["damage_factor"],
            "worst_ratio_10nm": e["tolerance_10nm"]["worst_ratio"],
            "fourier_orders": e["coupling"].get("fourier_orders")})
    rows.sort(key=lambda r: r["rank"])
    checks = _hole_checks(out, quick, rows, best, hole_specs)
    fig = _angle_figure(scans, best)
    vio.save_figure(fig, out / "holes" / "angles.png")
    rep = compare_report(data)
    hole_rows = [r for r in rows if r["kind"] == "holes"]
    top = hole_rows[0]
    facts = [("best hole array", f"{top['name']} at {top['best_angle_deg']:g}°: averaged "
              f"{top['averaged_beta_c_per_field_m_per_V']:.4g} m/V (rank {top['rank']})"),
             ("best film", next(f"{r['name']} at {r['best_angle_deg']:g}°: averaged "
                                f"{r['averaged_beta_c_per_field_m_per_V']:.4g} m/V"
                                for r in rows if r["kind"] == "film")),
             ("holes of vanishing radius vs the exact film",
              f"{checks['zero_radius']['relative_difference']:.2e} relative"),
             ("order-count estimate of the best hole array",
              f"{checks['order_estimate']['relative_error']:.2%} (N = "
              f"{checks['order_estimate']['orders']} vs N + 2)")]
    sections = (rp.Section("Photonic-crystal membranes against the films", (
        rp.Paragraph("Square and hexagonal lattices (period 500 nm) of round holes in the "
                     "150 nm silicon nitride film; the electron crosses a hole centre. "
                     "Each candidate, films included, at the best angle of its scan at "
                     f"800 nm; ranked on the coupling averaged over a {PULSE_FS:g} fs "
                     f"pulse and a {SPOT_UM:g} µm spot."),
        rp.Facts(tuple(facts)),
        rp.image(fig, "|β_c| per unit field versus angle of incidence at 800 nm"))),
        *[rp.Section(f"Films and hole arrays at their best angles: {s.title.lower()}",
                     s.blocks) for s in rep.sections if s.title in ("Ranking", "Plots")])
    return {"candidates": rows, "ranking": [r["name"] for r in rows],
            "best_angles": best, "angle_axis_deg": ANGLE_SCAN[quick],
            "pulse_fs": PULSE_FS, "spot_radius_um": SPOT_UM,
            "fourier_orders": HOLE_ORDERS[quick], **checks}, sections


def _hole_checks(out: Path, quick: bool, rows, best, hole_specs) -> dict:
    """Holes of vanishing radius against the exact film stack, and the order-count
    error of the best hole array at its angle."""
    from designer.demo import cli_json, spec_text

    film_angle = best["sin_150nm"]["angle_deg"]
    text = (HERE / HOLE_TEMPLATE).read_text()
    tiny = out / "holes" / "checks" / "tiny_holes.toml"
    tiny.parent.mkdir(parents=True, exist_ok=True)
    tiny.write_text(spec_text(text, {"sample.hole_radius_nm": TINY_RADIUS_NM,
                                     "solver.fourier_orders": HOLE_ORDERS[quick],
                                     "laser.angle_deg": film_angle}))
    film = out / "holes" / "checks" / "film_exact.toml"
    film.write_text(spec_text((HERE / "sin_150nm.toml").read_text(),
                              {"laser.angle_deg": film_angle, "solver.method": "layers"}))
    # |I|: the two solvers refer the phase to different planes
    i_h = abs(complex(*cli_json(["evaluate", tiny])["coupling"]["integral_V"]))
    i_f = abs(complex(*cli_json(["evaluate", film])["coupling"]["integral_V"]))
    diff = abs(i_h - i_f) / i_f
    top = next(r for r in rows if r["kind"] == "holes")
    est = out / "holes" / "checks" / f"{top['name']}_orders.toml"
    est.write_text(spec_text(hole_specs[top["name"]].read_text(),
                             {"laser.angle_deg": top["best_angle_deg"], "solver.refine": True}))
    c = cli_json(["evaluate", est])["coupling"]
    return {"zero_radius": {"hole_radius_nm": TINY_RADIUS_NM, "angle_deg": film_angle,
                            "relative_difference": diff},
            "order_estimate": {"candidate": top["name"], "orders": c["fourier_orders"],
                               "relative_error": c["relative_error_estimate"],
                               "beta_c_by_orders": c["order_convergence"]}}


def _angle_figure(scans: dict, best: dict):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(8.0, 4.2), layout="constrained")
    ax = fig.subplots()
    for name, (angles, b) in scans.items():
        style = "-" if "_r" in name else "--"
        ax.plot(angles, b * 1e9, style, lw=1.3, label=name)
        ax.plot(best[name]["angle_deg"], best[name]["beta_c_per_field_m_per_V"] * 1e9, "o",
                ms=4, color=ax.get_lines()[-1].get_color())
    ax.set_xlabel("angle of incidence (deg)")
    ax.set_ylabel("|β_c| per field (nm/V)")
    ax.set_title("films (dashed) and hole arrays (solid) at 800 nm; dots: best angle",
                 fontsize=9)
    ax.legend(fontsize=7, ncol=2)
    return fig


def _print(out: Path, s: dict) -> None:
    print(f"membrane study{' (quick)' if s['quick'] else ''} finished in {s['wall_s']:.0f} s")
    for r in s["ranking"]:
        print(f"  {r['rank']}. {r['name']:16s} |beta_c|/E0 = {r['beta_c_per_field_m_per_V']:.4g}"
              f" m/V, kappa = {r['structure_factor']:.4g}, worst +-10 nm ratio "
              f"{r['worst_ratio_10nm']:.3f}")
    xc = s["crosscheck"]
    print("  cross-check: " + (xc.get("skipped") or
                               f"{xc['candidate']}: Meep vs exact {xc['fdtd_vs_exact']:.2%}"))
    h = s["holes"]
    print("films and hole arrays at their best angles, averaged over the pulse and spot:")
    for r in h["candidates"]:
        aw = ("≥ " if r["angular_width_lower_bound"] else "") + f"{r['angular_width_deg']:.3g}"
        sw = ("≥ " if r["spectral_width_lower_bound"] else "") + f"{r['spectral_width_nm']:.3g}"
        print(f"  {r['rank']:>2}. {r['name']:18s} {r['best_angle_deg']:6.2f} deg  averaged "
              f"|beta_c|/E0 = {r['averaged_beta_c_per_field_m_per_V']:.4g} m/V, angular "
              f"width {aw} deg, spectral {sw} nm")
    print(f"  holes of vanishing radius vs exact film: "
          f"{h['zero_radius']['relative_difference']:.1e}; order estimate of "
          f"{h['order_estimate']['candidate']}: {h['order_estimate']['relative_error']:.2%}")
    print(f"outputs in {out}: report.html, summary.json, maps.png, maps/, compare/, "
          "crosscheck.json, holes/ (angles.png, angles/, best/, compare/, checks/)")


if __name__ == "__main__":
    sys.exit(study_script(main))
