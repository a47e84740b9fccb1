"""Cost and convergence of the Fourier modal method (solvers/fmm).

Scenario (our own): a membrane of permittivity 4.0 (silicon-nitride-like), 200 nm thick,
with a square lattice (period 500 nm) of circular holes of radius 140 nm, in vacuum, lit
from above by a p-polarized plane wave (azimuth 0) near 800 nm; a 100 kV electron crosses
it along the normal 100 nm from a hole centre.  Measured:

* ``solve_s``: one solve + coupling at the default order count (compiled; median);
  every time also as process CPU seconds (``*_cpu_s``, less sensitive to other loads);
* ``value_and_grad_over_value``: time of |beta_c| with its gradient w.r.t. hole radius,
  period, thickness and incidence angle, over the time of |beta_c| alone;
* ``map_points``, ``map_s``: an angle x wavelength map of |beta_c| (``jax.lax.map`` over
  the points, one compilation); 41 x 41 without ``--quick``, 5 x 5 with it (then
  ``map_41x41_estimate_s`` scales the measured time);
* ``convergence``: |beta_c| and R against the order count N (``(2N + 1)^2`` harmonics).

    python studies/benchmarks/fmm.py --quick     # a few minutes on 2 busy cores
    python studies/benchmarks/fmm.py             # includes the full 41 x 41 map

Prints one JSON object (seconds, wall clock); progress on stderr.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import time

# One BLAS thread: the eigensolve runs in numpy's LAPACK next to XLA's own thread pool,
# and a multithreaded OpenBLAS on 2 shared cores oversubscribes them (measured several
# times slower per solve).  Set before numpy loads; an explicit setting wins.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

import jax  # noqa: E402
import jax.numpy as jnp  # noqa: E402
from scipy import constants as sc  # noqa: E402

from solvers import fmm  # noqa: E402
from solvers.coupling import beta_from_integral  # noqa: E402

LAM = 800e-9
V100 = sc.c * np.sqrt(1 - 1 / (1 + 100e3 * sc.e / (sc.m_e * sc.c**2)) ** 2)
DEFAULT_ORDERS = 5
POINT = (100e-9, 0.0)


def beta_abs(params, wavelength, orders=DEFAULT_ORDERS):
    """|beta_c| and R for params = (radius, period, thickness, theta)."""
    radius, period, thick, theta = params[0], params[1], params[2], params[3]
    lat = fmm.Lattice(a1=(period, 0.0), a2=(0.0, period))
    lays = [fmm.PatternedLayer(thick, 4.0, (fmm.Circle((0.0, 0.0), radius),), (1.0,))]
    sol = fmm.solve(lat, lays, 1.0, 1.0, wavelength=wavelength, theta=theta, phi=0.0,
                    polarization="p", orders=orders, incidence="above")
    i = fmm.coupling_integral(sol, POINT, (0.0, 0.0, 1.0), V100)
    omega = 2 * np.pi * sc.c / wavelength
    return jnp.abs(beta_from_integral(i, omega)), sol.reflectance


def _median_time(fn, repeats):
    """Median wall-clock and process CPU seconds of ``fn()``.  The CPU time counts every
    thread of this process, so on shared cores it is the less noisy of the two."""
    wall, cpu = [], []
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        jax.block_until_ready(fn())
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return statistics.median(wall), statistics.median(cpu)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="5 x 5 map, orders up to 4")
    args = ap.parse_args(argv)
    out = {}
    x0 = jnp.asarray([140e-9, 500e-9, 200e-9, 0.3])

    value = jax.jit(lambda p: beta_abs(p, LAM)[0])
    vgrad = jax.jit(jax.value_and_grad(lambda p: beta_abs(p, LAM)[0]))
    t0 = time.perf_counter()
    jax.block_until_ready(value(x0))
    compile_value = time.perf_counter() - t0
    t0 = time.perf_counter()
    jax.block_until_ready(vgrad(x0))
    compile_grad = time.perf_counter() - t0
    print(f"compiled value ({compile_value:.1f} s) and value+gradient ({compile_grad:.1f} s)",
          file=sys.stderr)
    t_val, c_val = _median_time(lambda: value(x0), 7)
    t_grad, c_grad = _median_time(lambda: vgrad(x0), 7)
    m = (2 * DEFAULT_ORDERS + 1) ** 2
    out.update(orders=DEFAULT_ORDERS, harmonics=m, solve_s=t_val,
               value_and_grad_s=t_grad, value_and_grad_over_value=t_grad / t_val,
               solve_cpu_s=c_val, value_and_grad_cpu_s=c_grad,
               value_and_grad_over_value_cpu=c_grad / c_val,
               compile_value_s=compile_value, compile_value_and_grad_s=compile_grad,
               beta_c=float(value(x0)))

    # angle x wavelength map
    n_map = 5 if args.quick else 41
    thetas = jnp.linspace(0.0, 0.6, n_map)
    lams = jnp.linspace(700e-9, 900e-9, n_map)

    @jax.jit
    def beta_map(thetas, lams):
        tt, ll = jnp.meshgrid(thetas, lams, indexing="ij")
        pts = jnp.stack([tt.ravel(), ll.ravel()], axis=1)
        # lax.map: one compiled point evaluated sequentially (vmap over eig was slower
        # on CPU in our measurements)
        vals = jax.lax.map(lambda p: beta_abs(x0.at[3].set(p[0]), p[1])[0], pts)
        return vals.reshape(tt.shape)

    t0 = time.perf_counter()
    grid = np.asarray(beta_map(thetas, lams))
    t_first = time.perf_counter() - t0
    t0, c0 = time.perf_counter(), time.process_time()
    grid = np.asarray(beta_map(thetas, lams))
    t_map, c_map = time.perf_counter() - t0, time.process_time() - c0
    print(f"{n_map} x {n_map} map: {t_map:.1f} s (first call with compilation "
          f"{t_first:.1f} s)", file=sys.stderr)
    out.update(map_points=n_map * n_map, map_s=t_map, map_cpu_s=c_map,
               map_first_call_s=t_first,
               map_beta_c_max=float(grid.max()), map_beta_c_min=float(grid.min()))
    if n_map != 41:
        out["map_41x41_estimate_s"] = t_map * (41 * 41) / (n_map * n_map)
        out["map_41x41_estimate_cpu_s"] = c_map * (41 * 41) / (n_map * n_map)

    # convergence with the order count
    conv = []
    for n in range(1, 5 if args.quick else 8):
        t0 = time.perf_counter()
        b, r = (float(v) for v in jax.jit(lambda p, n=n: beta_abs(p, LAM, n))(x0))
        conv.append({"orders": n, "harmonics": (2 * n + 1) ** 2, "beta_c": b,
                     "reflectance": r, "seconds_with_compilation": time.perf_counter() - t0})
        print(f"orders {n}: |beta_c| = {b:.6e}, R = {r:.6f}", file=sys.stderr)
    ref = conv[-1]["beta_c"]
    for c in conv:
        c["relative_change_to_highest"] = abs(c["beta_c"] / ref - 1)
    out["convergence"] = conv
    out["cores"] = os.cpu_count()
    out["openblas_threads"] = os.environ.get("OPENBLAS_NUM_THREADS")
    print(json.dumps(out, indent=1))


if __name__ == "__main__":
    main()
