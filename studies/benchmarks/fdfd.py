"""Cost of the 2D FDFD solver: factor and solve time, peak memory, gradient overhead.

Scenario (our own): a Bloch-periodic cell with a smooth dielectric lump (eps 1..4)
between PMLs, at 30 cells per wavelength, square-ish grids from about 10k to 1M
cells.  For each sparse backend it measures the factor time, one solve, the peak
resident-memory rise during the factorization (sampled with psutil) and the LU fill;
it fits ``time ~ cells^p`` (wall and process CPU time; the CPU time is the figure to
trust on a shared machine) and ``memory ~ cells^q`` and extrapolates the largest
grid whose factorization fits in 24 GiB.  It also times ``value_and_grad`` against
the value alone through :func:`solvers.fdfd.field_solver` on fresh permittivities.

    python studies/benchmarks/fdfd.py --quick     # < 1 minute, prints one JSON object
    python studies/benchmarks/fdfd.py             # full range (slow on 2 cores)
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

from solvers.fdfd import FdfdProblem, PlaneWave, Pml, field_solver, spacing_for  # noqa: E402
from solvers.fdfd.linsolve import factorize  # noqa: E402
from solvers.fdfd.solver import _system  # noqa: E402
from solvers.grid import Grid  # noqa: E402

LAM = 1.0e-6
OMEGA = 2 * math.pi * constants.c / LAM
MEMORY_LIMIT = 24 * 2**30


def _rss() -> int:
    try:
        import psutil

        return psutil.Process().memory_info().rss
    except ImportError:  # pragma: no cover
        import resource

        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


class _PeakRss:
    """Samples the resident set size in a thread; .peak - .base is the rise."""

    def __enter__(self):
        self.base = self.peak = _rss()
        self._stop = threading.Event()
        self._t = threading.Thread(target=self._run, daemon=True)
        self._t.start()
        return self

    def _run(self):
        while not self._stop.is_set():
            self.peak = max(self.peak, _rss())
            time.sleep(0.005)

    def __exit__(self, *exc):
        self._stop.set()
        self._t.join()
        self.peak = max(self.peak, _rss())


def scenario(cells: int):
    d = spacing_for(LAM, 4.0, 30)
    n = int(round(math.sqrt(cells)))
    g = Grid(n, n, d, d, z0=-n / 2 * d)
    npml = max(20, math.ceil(0.55 * LAM / d))
    prob = FdfdProblem(g, OMEGA, Pml(0, npml), PlaneWave(0.2))
    X, Z = np.meshgrid(g.x_centres(), g.z_centres(), indexing="ij")
    radius = 0.8 * (n / 2 - npml - 4) * d  # clear of the source line
    r = np.sqrt((X - g.size_x / 2) ** 2 + Z**2) / radius
    lump = np.where(r < 1, np.cos(np.pi * np.minimum(r, 1) / 2) ** 2, 0.0)
    eps = 1.0 + 3.0 * lump
    return prob, eps


def measure(cells: int, backend: str) -> dict:
    prob, eps = scenario(cells)
    A = _system(prob).op.matrix(eps, eps)
    b = _system(prob).src.rhs
    with _PeakRss() as mem:
        c0 = time.process_time()
        t0 = time.perf_counter()
        fac = factorize(A, backend)
        t1 = time.perf_counter()
        c1 = time.process_time()
    t2 = time.perf_counter()
    fac.solve(b)  # first solve includes the residual check
    t3 = time.perf_counter()
    fac.solve(b, trans=True)
    t4 = time.perf_counter()
    out = dict(cells=prob.grid.nx * prob.grid.nz, backend=fac.backend, factor_s=t1 - t0,
               factor_cpu_s=c1 - c0,
               solve_s=t3 - t2, transpose_solve_s=t4 - t3, peak_mem_bytes=mem.peak - mem.base,
               lu_nnz=fac.nnz)
    del fac, A
    return out


def gradient_overhead(cells: int, repeats: int = 3) -> dict:
    """Median time of jit(value_and_grad) / jit(value) on fresh permittivities."""
    import jax
    import jax.numpy as jnp

    prob, eps = scenario(cells)
    fs = field_solver(prob, cache_size=1)
    lump = (eps - 1.0) / 3.0

    def value(s):
        e = 1.0 + s * lump
        ex, ez, hy = fs(e, e)
        return jnp.sum(jnp.abs(ex) ** 2 + jnp.abs(ez) ** 2)

    f_val = jax.jit(value)
    f_vg = jax.jit(jax.value_and_grad(value))
    f_val(2.0).block_until_ready()
    jax.block_until_ready(f_vg(2.1))
    tv, tg = [], []
    for i in range(repeats):
        s = 2.5 + 0.01 * i
        t = time.perf_counter()
        f_val(s).block_until_ready()
        tv.append(time.perf_counter() - t)
        t = time.perf_counter()
        jax.block_until_ready(f_vg(s + 0.005))
        tg.append(time.perf_counter() - t)
    return dict(cells=prob.grid.nx * prob.grid.nz, value_s=float(np.median(tv)),
                value_and_grad_s=float(np.median(tg)),
                ratio=float(np.median(tg) / np.median(tv)))


def _fit(x, y):
    x, y = np.asarray(x, float), np.asarray(y, float)
    ok = y > 0
    if ok.sum() < 2:
        return float("nan"), float("nan")
    p, c = np.polyfit(np.log(x[ok]), np.log(y[ok]), 1)
    return float(p), float(c)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes, under a minute")
    args = ap.parse_args(argv)
    if args.quick:
        plan = {"superlu_mmd": [10_000, 22_500, 40_000, 90_000], "superlu": [10_000, 40_000]}
        grad_cells = 22_500
    else:
        plan = {"superlu_mmd": [10_000, 40_000, 160_000, 360_000, 640_000, 1_000_000],
                "superlu": [10_000, 40_000, 160_000, 360_000]}
        grad_cells = 160_000

    runs = {name: [measure(n, name) for n in sizes] for name, sizes in plan.items()}
    report = {"backends": {}}
    for name, rows in runs.items():
        cells = [r["cells"] for r in rows]
        pt, _ = _fit(cells, [r["factor_s"] for r in rows])
        pc, _ = _fit(cells, [r["factor_cpu_s"] for r in rows])
        # small factorizations can reuse freed heap and show no RSS rise: fit memory
        # on the sizes >= 40k cells when there are two of them
        big = [r for r in rows if r["cells"] >= 40_000]
        mrows = big if len(big) >= 2 else rows
        pm, cm = _fit([r["cells"] for r in mrows], [r["peak_mem_bytes"] for r in mrows])
        largest = (math.exp((math.log(MEMORY_LIMIT) - cm) / pm)
                   if np.isfinite(pm) and pm > 0 else None)
        report["backends"][name] = dict(
            cells=cells, factor_s=[r["factor_s"] for r in rows],
            factor_cpu_s=[r["factor_cpu_s"] for r in rows], factor_cpu_exponent=pc,
            solve_s=[r["solve_s"] for r in rows],
            transpose_solve_s=[r["transpose_solve_s"] for r in rows],
            peak_mem_bytes=[r["peak_mem_bytes"] for r in rows],
            lu_nnz=[r["lu_nnz"] for r in rows], factor_exponent=pt, memory_exponent=pm,
            largest_cells_in_24GiB=largest, used=[r["backend"] for r in rows])
    default = report["backends"]["superlu_mmd"]
    g = gradient_overhead(grad_cells)
    report.update(
        cells=default["cells"], factor_s=default["factor_s"], solve_s=default["solve_s"],
        factor_cpu_s=default["factor_cpu_s"], factor_cpu_exponent=default["factor_cpu_exponent"],
        load_average=os.getloadavg(),
        peak_mem_bytes=default["peak_mem_bytes"], factor_exponent=default["factor_exponent"],
        memory_exponent=default["memory_exponent"],
        largest_cells_in_24GiB=default["largest_cells_in_24GiB"],
        value_and_grad_over_value=g["ratio"], gradient_timing=g,
        mode="quick" if args.quick else "full", cpu_count=os.cpu_count(),
    )
    print(json.dumps(report))


if __name__ == "__main__":
    main()
