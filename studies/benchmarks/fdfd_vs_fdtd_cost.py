"""Benchmark: wall time of FDFD against Meep at equal agreement with an exact reference.

Scenario (our own): a prism of index 2 lit from inside by total internal reflection at
the phase-matched angle for a 200 kV beam and an 800 nm laser; the electron passes
100 nm above the surface over 10 µm.  The exact transfer-matrix coupling is the
reference (checked against the closed-form evanescent field in tests/test_evaluate.py).
Both solvers run on the same grid steps (``velomatch crosscheck`` machinery); for a
target error we take, for each solver, the cheapest step that meets it and report the
ratio of wall times.

    .venv/bin/python studies/benchmarks/fdfd_vs_fdtd_cost.py [--target 0.01] [--quick]

Prints one JSON object: per step the errors and wall times of both solvers, and
``wall_ratio_fdtd_over_fdfd`` at the target.
"""

from __future__ import annotations

import argparse
import json
import time

SPEC = {
    "beam": {"voltage_kV": 200.0},
    "laser": {"wavelength_nm": 800.0},
    "sample": {"family": "prism", "material": {"n": 2.0}},
    "path": {"offset_nm": 100.0, "length_um": 10.0},
    "solver": {"method": "fdfd", "refine": False},
}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--target", type=float, default=0.01, help="relative error target")
    parser.add_argument("--quick", action="store_true", help="three steps only")
    args = parser.parse_args()

    from designer.crosscheck import crosscheck
    from designer.spec import parse_spec

    steps_nm = [20.0, 12.0, 8.0] if args.quick else [20.0, 16.0, 12.0, 10.0, 8.0, 6.0]
    spec = parse_spec(SPEC, source="benchmark")
    # warm-up (JAX compilation of the rasterizer, Meep start-up caches), not timed
    crosscheck(spec, grid_step_m=steps_nm[0] * 1e-9, max_wall_s=600.0)
    rows = []
    for h in steps_nm:
        t0 = time.perf_counter()
        cc = crosscheck(spec, grid_step_m=h * 1e-9, max_wall_s=600.0)
        exact = cc.exact_V
        rows.append({
            "step_nm": h,
            "fdfd_error": abs(cc.integral_fdfd_V - exact) / abs(exact),
            "fdtd_error": abs(cc.integral_fdtd_V - exact) / abs(exact),
            "fdfd_wall_s": cc.fdfd_wall_s,
            "fdtd_wall_s": cc.fdtd_wall_s,
            "total_s": time.perf_counter() - t0,
        })

    def cheapest(kind):
        ok = [r for r in rows if r[f"{kind}_error"] <= args.target]
        return min(ok, key=lambda r: r[f"{kind}_wall_s"]) if ok else None

    best_fdfd, best_fdtd = cheapest("fdfd"), cheapest("fdtd")
    ratio = (best_fdtd["fdtd_wall_s"] / best_fdfd["fdfd_wall_s"]
             if best_fdfd and best_fdtd else None)
    print(json.dumps({
        "scenario": "prism n=2, 200 kV, 800 nm, TIR, offset 100 nm, L = 10 um",
        "reference": "exact layer-stack coupling",
        "target_relative_error": args.target,
        "points": rows,
        "fdfd_step_nm_at_target": best_fdfd and best_fdfd["step_nm"],
        "fdtd_step_nm_at_target": best_fdtd and best_fdtd["step_nm"],
        "wall_ratio_fdtd_over_fdfd": ratio,
        "note": "FDFD wall time includes its factorization; Meep's includes the worker "
                "start-up (~1 s) and its empty-cell calibration run",
    }, indent=2))


if __name__ == "__main__":
    main()
