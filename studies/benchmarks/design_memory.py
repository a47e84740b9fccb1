"""Resident memory of a parametric design against the number of loss-and-gradient
evaluations (the on-chip accelerator's rectangular pillars, a scenario of our own).

Each evaluation factors a new permittivity inside JAX host callbacks and the solver's
cache drops an older factorization, so a flat resident set after the first few
evaluations means dropped factorizations are freed.  Random points of the design's
unit box (seeded), the study's own grid unless ``--quick`` (25 nm).

    .venv/bin/python studies/benchmarks/design_memory.py --quick   # ~30 s
    .venv/bin/python studies/benchmarks/design_memory.py           # 9.6 nm grid, ~1 min

Prints one JSON object: the grid, the resident set (MB) after each evaluation, the
mean rise per evaluation over the second half, and the factorizations held.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from designer import design as d  # noqa: E402
from designer.demo import spec_text  # noqa: E402
from designer.spec import parse_spec  # noqa: E402
from solvers.fdfd.linsolve import SUPERLU  # noqa: E402

SPEC = ROOT / "studies" / "onchip_accelerator" / "pillars.toml"


def rss_mb() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    raise OSError("no VmRSS in /proc/self/status")


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="25 nm grid")
    ap.add_argument("--evaluations", type=int, default=16)
    args = ap.parse_args(argv)
    import tomllib

    text = spec_text(SPEC.read_text(), {"solver.grid_step_nm": 25.0} if args.quick else {})
    spec = parse_spec(tomllib.loads(text), source=str(SPEC))
    problem = d.cached_problem(spec, d.parse_optimize(spec))
    rng = np.random.default_rng(0)
    multipliers = np.zeros(len(problem.constraint_names))
    rss, seconds = [], []
    while len(rss) < args.evaluations:
        u = rng.uniform(0.2, 0.8, problem.box.lower.size)
        if not problem.valid(u):
            continue
        t = time.perf_counter()
        d._evaluate_with_grad(problem, u, multipliers, 0)
        seconds.append(time.perf_counter() - t)
        rss.append(rss_mb())
    half = len(rss) // 2
    out = {"grid_step_nm": problem.grid_step_m * 1e9,
           "cells": list(problem.models[0].layout.grid.shape),
           "rss_mb": [round(r, 1) for r in rss],
           "rise_mb_per_evaluation": (rss[-1] - rss[half]) / max(len(rss) - 1 - half, 1),
           "seconds_per_evaluation": float(np.median(seconds)),
           "factorizations_held": SUPERLU.live(),
           "openblas_threads": os.environ.get("OPENBLAS_NUM_THREADS"),
           "load_average": os.getloadavg()}
    print(json.dumps(out))
    return out


if __name__ == "__main__":
    main()
