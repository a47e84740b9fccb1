"""Cost of the coupling kernels: the numpy path against the jit-compiled jax.numpy path.

Scenario (our own): a Bloch-periodic cell of 1.3 wavelengths at 800 nm, 64 x 400 Yee
cells (40 cells per wavelength along z), holding a synthetic field made of a few
Floquet orders (propagating and evanescent) on either side of a 200 nm "structure"
layer.  It times

* ``coupling_along_z`` at one lateral position and on a 32-point lateral map, and
  ``coupling_along_x`` over 10 periods: the numpy path (the default for numpy fields),
  the first jax.numpy call (tracing + XLA compilation, paid once per grid and box) and
  later jax.numpy calls (cached executable);
* the full evaluation pipeline ``designer.evaluate.evaluate`` on a 120 nm film (the
  scenario of ``film_raw("fdfd")`` in tests/test_evaluate.py), first and second call.

    python studies/benchmarks/coupling.py              # about a minute on 2 busy cores
    python studies/benchmarks/coupling.py --no-evaluate

Prints one JSON object (seconds; wall clock, median of the repeats).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

import jax.numpy as jnp  # noqa: E402
from scipy import constants  # noqa: E402

from solvers import coupling  # noqa: E402
from solvers.grid import Grid  # noqa: E402

LAM = 800e-9
OMEGA = 2 * np.pi * constants.c / LAM
K0 = OMEGA / constants.c
EPS_BELOW, EPS_ABOVE = 2.25, 1.0


class SyntheticFields:
    """Ex, Ez, Hy of a few Floquet orders outgoing from a layer |z| < 100 nm."""

    def __init__(self, nx=64, nz=400, period=1.3 * LAM):
        self.grid = Grid(nx, nz, period / nx, LAM / 40, 0.0, -nz / 2 * LAM / 40)
        self.omega = OMEGA
        self.bloch_kx = K0 * np.sin(0.4)
        self.ex, self.ez, self.hy = (self._sample(k) for k in range(3))

    def _sample(self, component):
        g = self.grid
        x, z = np.meshgrid(*(g.ex_coords(), g.ez_coords(), g.hy_coords())[component],
                           indexing="ij")
        out = np.zeros(x.shape, complex)
        for m, (ca, cb) in {-1: (0.3, 0.2j), 0: (1.0, 0.5), 1: (0.4j, 0.1), 2: (0.2, 0.3)}.items():
            kxm = self.bloch_kx + 2 * np.pi * m / g.size_x
            for eps, c, sgn, side in ((EPS_ABOVE, ca, 1, z >= 100e-9),
                                      (EPS_BELOW, cb, -1, z <= -100e-9)):
                kz = np.sqrt(eps * K0**2 - kxm**2 + 0j)
                kz = np.where(kz.imag < 0, -kz, kz)
                w = c * np.exp(1j * kxm * x + sgn * 1j * kz * (z - sgn * 100e-9))
                # (Ex, Ez, Hy) per unit Hy of a plane wave in a homogeneous medium
                factor = (sgn * kz / (OMEGA * constants.epsilon_0 * eps),
                          -kxm / (OMEGA * constants.epsilon_0 * eps), 1.0)[component]
                out += np.where(side, factor * w, 0)
        return out


def _timed(fn, repeats):
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        out = fn()
        np.asarray(out[0] if isinstance(out, tuple) else out)  # wait for jax results
        times.append(time.perf_counter() - t)
    return times


def kernel_timings(repeats=5):
    f = SyntheticFields()
    g = f.grid
    v = 0.54822 * constants.c  # 100 kV
    z1, z2 = g.z0 + 150 * g.dz, g.z0 + 250 * g.dz
    z_path = g.z0 + 230.5 * g.dz
    map_x = g.x0 + g.size_x * (np.arange(32) + 0.5) / 32
    cases = {
        "coupling_along_z_one_x": lambda xp: coupling.coupling_along_z(
            f, 0.21 * g.size_x, z1, z2, EPS_BELOW, EPS_ABOVE, v, xp=xp),
        "coupling_along_z_map_32": lambda xp: coupling.coupling_along_z(
            f, map_x, z1, z2, EPS_BELOW, EPS_ABOVE, v, xp=xp),
        "coupling_along_x_10_periods": lambda xp: coupling.coupling_along_x(
            f, z_path, v, n_periods=10, xp=xp),
    }
    out = {}
    for name, run in cases.items():
        numpy_t = _timed(lambda: run(None), repeats)
        first = _timed(lambda: run(jnp), 1)[0]
        later = _timed(lambda: run(jnp), repeats)
        a, b = run(None), run(jnp)
        a, b = (np.asarray(a[0]), np.asarray(b[0])) if isinstance(a, tuple) else (a, b)
        out[name] = {
            "numpy_s": statistics.median(numpy_t),
            "jit_first_call_s": first,
            "jit_later_calls_s": statistics.median(later),
            "max_rel_difference": float(np.max(np.abs(np.asarray(b) - a)) / np.max(np.abs(a))),
        }
    return {"grid": list(g.shape), "repeats": repeats, "kernels": out}


def evaluate_timings():
    t = time.perf_counter()
    from designer.evaluate import evaluate
    from designer.spec import parse_spec
    t_import = time.perf_counter() - t
    raw = {
        "beam": {"voltage_kV": 100.0},
        "laser": {"wavelength_nm": 800.0, "angle_deg": 30.0},
        "sample": {"family": "membrane", "material": {"n": 2.0}, "thickness_nm": 120.0,
                   "pattern": "none"},
        "path": {"x_nm": 0.0},
        "solver": {"method": "fdfd", "refine": False, "grid_step_nm": 7.0},
    }
    calls = []
    for _ in range(2):
        t = time.perf_counter()
        ev = evaluate(parse_spec(raw))
        calls.append(time.perf_counter() - t)
    return {"import_s": t_import, "first_call_s": calls[0], "second_call_s": calls[1],
            "integral_V": [ev.run.integral_V.real, ev.run.integral_V.imag]}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--no-evaluate", action="store_true", help="skip the pipeline timing")
    args = ap.parse_args(argv)
    result = kernel_timings(args.repeats)
    if not args.no_evaluate:
        result["evaluate_film_fdfd"] = evaluate_timings()
    print(json.dumps(result, indent=1))


if __name__ == "__main__":
    main()
