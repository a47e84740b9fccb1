"""Fill and memory of the FDFD factorization against the up-front estimate (designer.cost).

Scenario (our own): Bloch-periodic nx × nz cells at 60 cells per wavelength with PMLs
along z and a dielectric slab (eps 4) in the middle — the shape of our film, grating and
prism problems (thin strips to square cells).  For each size it factorizes with the
default backend (SciPy SuperLU, ``MMD_AT_PLUS_A``), records nnz(L + U), the CPU time
and the rise of the resident set during the factorization and first solve (sampled
with psutil), and prints the ratio of designer.cost's estimate to each measurement.
The constants in designer/cost.py come from this script's output.

    python studies/benchmarks/fdfd_memory.py --quick    # a few seconds
    python studies/benchmarks/fdfd_memory.py            # up to 1000 × 1000 (~1 min, 3 GB)
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import threading
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

from scipy import constants  # noqa: E402

from designer.cost import estimate  # noqa: E402
from solvers.fdfd import FdfdProblem, PlaneWave, Pml  # noqa: E402
from solvers.fdfd.linsolve import factorize  # noqa: E402
from solvers.fdfd.solver import _system  # noqa: E402
from solvers.grid import Grid  # noqa: E402

LAM = 1.0e-6
OMEGA = 2 * math.pi * constants.c / LAM
QUICK = [(4, 2000), (16, 2000), (64, 1000), (128, 1000), (256, 256)]
FULL = QUICK + [(4, 20000), (16, 8000), (64, 4000), (128, 3000), (256, 1000), (400, 400),
                (600, 600), (1000, 1000)]


def _rss() -> int:
    import psutil

    return psutil.Process().memory_info().rss


def measure(nx: int, nz: int) -> dict:
    d = LAM / 60
    g = Grid(nx, nz, d, d, z0=-nz / 2 * d)
    prob = FdfdProblem(g, OMEGA, Pml(0, max(20, math.ceil(0.55 * LAM / d))), PlaneWave(0.2))
    eps = np.ones(g.shape)
    eps[:, nz // 2 - nz // 8:nz // 2] = 4.0
    system = _system(prob)
    A = system.op.matrix(eps, eps)
    peak = [_rss()]
    stop = threading.Event()

    def sample():
        while not stop.is_set():
            peak[0] = max(peak[0], _rss())
            time.sleep(0.002)

    base = _rss()
    t = threading.Thread(target=sample, daemon=True)
    t.start()
    c0 = time.process_time()
    fac = factorize(A)
    fac.solve(system.src.rhs)
    cpu = time.process_time() - c0
    stop.set()
    t.join()
    est = estimate(nx, nz)
    rise = max(peak[0] - base, 1)
    out = dict(nx=nx, nz=nz, cells=nx * nz, lu_nnz=fac.nnz, cpu_s=cpu, rss_rise_bytes=rise,
               bytes_per_entry=rise / fac.nnz, estimate_nnz=est.lu_entries,
               estimate_bytes=est.memory_bytes, estimate_s=est.seconds,
               nnz_ratio=est.lu_entries / fac.nnz, memory_ratio=est.memory_bytes / rise)
    del fac, A
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args(argv)
    rows = [measure(nx, nz) for nx, nz in (QUICK if args.quick else FULL)]
    print(json.dumps({
        "rows": rows,
        "nnz_ratio_range": [min(r["nnz_ratio"] for r in rows),
                            max(r["nnz_ratio"] for r in rows)],
        "memory_ratio_range_over_1M_entries": [
            min((r["memory_ratio"] for r in rows if r["lu_nnz"] > 1e6), default=None),
            max((r["memory_ratio"] for r in rows if r["lu_nnz"] > 1e6), default=None)],
        "mode": "quick" if args.quick else "full", "load_average": os.getloadavg()}))


if __name__ == "__main__":
    main()
