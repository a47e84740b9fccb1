"""Memory of repeated differentiable FDFD solves stays flat with the number of solves.

A design run evaluates the loss and its adjoint gradient under ``jax.jit`` many times;
each evaluation factors a new permittivity and the solver's cache drops an older
factorization.  In a design run XLA calls the solver's host callbacks from its own worker
threads, each call under a fresh Python thread state, and SciPy's SuperLU wrapper does
not free a factorization across thread states (solvers/fdfd/linsolve.py).  Here each
evaluation runs on a fresh Python thread, which gives every callback its own thread
state whatever XLA's scheduling.  The check: the C heap in use (glibc ``mallinfo2``: arena
plus mmap blocks; where that is absent, the resident set) after 12 evaluations exceeds
the one after the first 3 by less than two factorizations' worth.  Without the fix it
grew by one factorization per evaluation.  Basis: common practice, no source (a leak
test compares memory after a warm-up with memory after many more of the same calls).
"""

import ctypes
import math
import sys
import threading

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import constants

from solvers.fdfd import FdfdProblem, PlaneWave, Pml, field_solver, spacing_for
from solvers.fdfd.linsolve import SUPERLU
from solvers.grid import Grid

LAM = 1.0e-6


class _MallInfo2(ctypes.Structure):
    _fields_ = [(name, ctypes.c_size_t) for name in (
        "arena", "ordblks", "smblks", "hblks", "hblkhd", "usmblks", "fsmblks",
        "uordblks", "fordblks", "keepcost")]


def _heap_bytes() -> int | None:
    """Bytes the C allocator has handed out and not had back (glibc >= 2.33)."""
    try:
        libc = ctypes.CDLL("libc.so.6")
        fn = libc.mallinfo2
    except (OSError, AttributeError):
        return None
    fn.restype = _MallInfo2
    m = fn()
    return int(m.uordblks + m.hblkhd)


def _rss_bytes() -> int | None:
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def _in_use() -> int | None:
    h = _heap_bytes()
    return h if h is not None else _rss_bytes()


@pytest.mark.skipif(not sys.platform.startswith("linux"),
                    reason="reads the process's memory through glibc or /proc (Linux)")
def test_repeated_gradient_solves_do_not_accumulate_memory():
    d = spacing_for(LAM, 3.5, 30)
    g = Grid(60, 400, d, d, z0=-200 * d)
    prob = FdfdProblem(g, 2 * math.pi * constants.c / LAM, Pml(0, 40), PlaneWave(0.2))
    fs = field_solver(prob, cache_size=2)
    band = np.zeros(g.shape)
    band[:, 180:220] = 1.0
    base = jnp.asarray(band)

    @jax.jit
    def loss_and_grad(t):
        def loss(t):
            eps = 1.0 + t * base
            ex, _, _ = fs(eps, eps)
            return jnp.sum(jnp.abs(ex[:, 230]) ** 2)
        return jax.value_and_grad(loss)(t)

    def run(ts):
        for t in ts:
            out = []
            worker = threading.Thread(target=lambda: out.append(loss_and_grad(jnp.asarray(t))))
            worker.start()
            worker.join()
            value, grad = out[0]
            assert np.isfinite(float(value)) and np.isfinite(float(grad))

    # other tests' solver caches may hold factorizations: count only this test's
    live_before = SUPERLU.live()
    ts = 2.0 + 0.1 * np.arange(12)
    run(ts[:3])
    before = _in_use()
    run(ts[3:])
    growth = _in_use() - before
    one_factorization = 16 * fs.engine.factorization(np.asarray(1.0 + ts[-1] * band),
                                                     np.asarray(1.0 + ts[-1] * band)).nnz
    assert fs.engine.n_factor == len(ts)
    assert SUPERLU.live() - live_before <= 4
    assert growth < 2 * one_factorization, (growth, one_factorization)
