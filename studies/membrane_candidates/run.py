"""Worked study: four film candidates for a 200 kV transmission microscope and an
800 nm laser, compared before anything is fabricated (an invented scenario; see
README.md).

    .venv/bin/python studies/membrane_candidates/run.py [--quick] [--out DIR] [--overwrite]

Angle x wavelength maps of the coupling for every candidate (``velomatch sweep``), the
ranking with fabrication tolerance and bandwidths (``velomatch compare``), a Meep
cross-check of the winner against the exact layer-stack solution, and one HTML report.
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
    rp.write_report(out / "report.html", rep)
    return {"study": "membrane_candidates", "quick": quick, "ranking": ranking,
            "maps": checks, "crosscheck": xcheck, "wall_s": None}


def _print(out: Path, s: dict) -> None:
    print(f"membrane study{' (quick)' if s['quick'] else ''} finished in {s['wall_s']:.0f} s")
    for r in s["ranking"]:
        print(f"  {r['rank']}. {r['name']:16s} |beta_c|/E0 = {r['beta_c_per_field_m_per_V']:.4g}"
              f" m/V, kappa = {r['structure_factor']:.4g}, worst +-10 nm ratio "
              f"{r['worst_ratio_10nm']:.3f}")
    xc = s["crosscheck"]
    print("  cross-check: " + (xc.get("skipped") or
                               f"{xc['candidate']}: Meep vs exact {xc['fdtd_vs_exact']:.2%}"))
    print(f"outputs in {out}: report.html, summary.json, maps.png, maps/, compare/, "
          "crosscheck.json")


if __name__ == "__main__":
    sys.exit(study_script(main))
