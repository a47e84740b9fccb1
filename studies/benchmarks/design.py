"""Benchmark of `velomatch design`: seconds per iteration vs grid size, iterations to
converge for the standard cases, and the share of time spent factorizing.

Run: ``.venv/bin/python studies/benchmarks/design.py`` (about 1-2 minutes on two
cores); prints one JSON object.  Scenarios are our own (a fused-silica grating at
30 kV and 800 nm, a silicon-nitride film at 100 kV).
"""

from __future__ import annotations

import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import solvers.fdfd.solver as fdfd_solver  # noqa: E402
from designer import design as d  # noqa: E402
from designer.spec import parse_spec  # noqa: E402

GRATING = {
    "beam": {"voltage_kV": 30.0},
    "laser": {"wavelength_nm": 800.0},
    "sample": {"family": "grating", "material": "fused_silica", "duty_cycle": 0.5,
               "tooth_height_nm": 130.0},
    "path": {"length_um": 10.0},
    "solver": {"grid_step_nm": 20.0},
    "fabrication": {"min_feature_nm": 40.0, "min_gap_nm": 40.0},
    "optimize": {"objective": "coupling", "iterations": 30, "learning_rate": 0.1,
                 "tolerance": 1e-4,
                 "variables": {"tooth_height_nm": [50.0, 400.0], "duty_cycle": [0.1, 0.9]}},
}

MEMBRANE = {
    "beam": {"voltage_kV": 100.0},
    "laser": {"wavelength_nm": 800.0, "angle_deg": 30.0},
    "sample": {"family": "membrane", "material": "silicon_nitride", "thickness_nm": 45.0},
    "optimize": {"objective": "coupling", "iterations": 60, "tolerance": 1e-6,
                 "variables": {"thickness_nm": [40.0, 140.0]}},
}


class FactorTimer:
    """Wraps the FDFD solver's factorize to add up its wall time."""

    def __init__(self):
        self.seconds = 0.0
        self.calls = 0
        self._orig = fdfd_solver.factorize

    def __call__(self, *args, **kwargs):
        t = time.perf_counter()
        try:
            return self._orig(*args, **kwargs)
        finally:
            self.seconds += time.perf_counter() - t
            self.calls += 1


def with_value(raw, table, key, value):
    out = json.loads(json.dumps(raw))
    out[table][key] = value
    return out


def per_iteration(grid_step_nm: float, timer: FactorTimer, steps: int = 6) -> dict:
    raw = with_value(GRATING, "solver", "grid_step_nm", grid_step_nm)
    spec = parse_spec(raw, source="benchmark-grating")
    config = d.parse_optimize(spec)
    t0 = time.perf_counter()
    problem = d.build_problem(spec, config)
    build = time.perf_counter() - t0
    u = np.asarray(d.opt.to_unit(problem.x_start, problem.box))
    state = problem.transform.init(u)
    aux = lambda v: (problem.masks(v), np.zeros(0), 1.0)  # noqa: E731
    t0 = time.perf_counter()
    u, state, *_ = problem.step(u, state, aux(u))        # compiles
    first = time.perf_counter() - t0
    f0, c0 = timer.seconds, timer.calls
    t0 = time.perf_counter()
    for _ in range(steps):
        u, state, *_ = problem.step(u, state, aux(u))
    total = time.perf_counter() - t0
    grid = problem.models[0].solver.engine.problem.grid
    return {"grid_step_nm": grid_step_nm, "grid": [grid.nx, grid.nz],
            "unknowns": grid.nx * grid.nz, "build_s": build, "first_step_s": first,
            "seconds_per_iteration": total / steps,
            "factorization_share": (timer.seconds - f0) / total,
            "factorizations_per_iteration": (timer.calls - c0) / steps}


def converge(name: str, raw: dict, method: str) -> dict:
    raw = json.loads(json.dumps(raw))
    raw["optimize"]["method"] = method
    spec = parse_spec(raw, source=f"benchmark-{name}")
    config = d.parse_optimize(spec)
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        result = d.run_design(spec, tmp, config, progress=False)
    st = result.starts[0]
    return {"case": name, "method": method, "iterations": len(st.losses),
            "stopped": st.reason, "start_objective": result.start_record["objective"],
            "best_objective": result.best_record["objective"],
            "best_values": result.best_record["values"],
            "wall_s": time.perf_counter() - t0}


def main() -> None:
    timer = FactorTimer()
    fdfd_solver.factorize = timer
    t0 = time.perf_counter()
    scaling = [per_iteration(h, timer) for h in (40.0, 20.0, 10.0)]
    cases = [converge("film thickness (layers)", MEMBRANE, "adam"),
             converge("film thickness (layers)", MEMBRANE, "lbfgs"),
             converge("grating height + duty (FDFD 20 nm)", GRATING, "adam")]
    print(json.dumps({"per_iteration_vs_grid": scaling, "convergence": cases,
                      "total_wall_s": time.perf_counter() - t0}, indent=2))


if __name__ == "__main__":
    main()
