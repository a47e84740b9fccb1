"""Sparse direct solve behind one small interface.

A *backend* is a function ``factor(A) -> Factorization`` where ``A`` is a square
complex ``scipy.sparse`` matrix and the returned object has
``solve(b, trans=False)`` (``trans=True`` solves ``A^T x = b`` with the same factors,
which is what the adjoint gradient needs).  Register more with
:func:`register_backend`; :func:`factorize` picks one by name.

Built in:

* ``"superlu_mmd"`` (default): SciPy's SuperLU with the minimum-degree ordering of
  ``A^T + A`` and symmetric-mode pivoting (``permc_spec="MMD_AT_PLUS_A"``,
  ``SymmetricMode=True``, ``DiagPivotThresh=0.01``).  Measured on this machine kind
  (2 cores) as the fastest option that needs no extra package: about 2x faster and
  half the memory of the default ordering for 2D FDFD operators.
* ``"superlu"``: SciPy's SuperLU with its default (COLAMD) ordering; the fallback.

If the preferred factorization fails, or its first solve leaves a relative
residual above ``RESIDUAL_TOL``, :func:`factorize` falls back to ``"superlu"``.

SuperLU calls the BLAS on small dense blocks; with OpenBLAS running several threads
on a shared 2-core machine this was measured 5-15x slower (CPU and wall time) than
one thread (40k cells: 0.45 s CPU with one thread, 4.7-5.8 s with the default).
So the SuperLU backends run with the OpenBLAS libraries that SciPy and NumPy
loaded limited to one thread (restored afterwards); ``BLAS_THREADS`` changes that.

Every SuperLU factorization is made, used and freed on one persistent worker thread
(:class:`SuperLUThread`).  SciPy's SuperLU wrapper records each block it allocates in
a table of the calling Python thread state and frees a block only if the thread state
that frees it finds it in its own table (scipy/sparse/linalg/_dsolve/_superlu_utils.c,
SciPy 1.17); JAX runs each host callback of ``field_solver`` under a fresh thread
state, so a factorization made in one callback and dropped from the solver's cache in
a later one kept its L and U for good -- measured 85 MB per factorization on a
104 x 731 grid, 6 GB after about 70 evaluations of a parametric design.
"""

from __future__ import annotations

import contextlib
import ctypes
import itertools
import os
import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Callable, Protocol

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

RESIDUAL_TOL = 1e-8
BLAS_THREADS = 1


def _openblas_handles():
    """(set, get) function pairs of the OpenBLAS libraries loaded in this process."""
    handles = []
    try:
        with open("/proc/self/maps") as fh:
            paths = sorted({ln.split()[-1] for ln in fh if "openblas" in ln and "/" in ln})
    except OSError:
        return handles
    for path in paths:
        try:
            lib = ctypes.CDLL(path)
        except OSError:
            continue
        for set_name, get_name in (
            ("scipy_openblas_set_num_threads64_", "scipy_openblas_get_num_threads64_"),
            ("scipy_openblas_set_num_threads", "scipy_openblas_get_num_threads"),
            ("openblas_set_num_threads64_", "openblas_get_num_threads64_"),
            ("openblas_set_num_threads", "openblas_get_num_threads"),
        ):
            if hasattr(lib, set_name) and hasattr(lib, get_name):
                handles.append((getattr(lib, set_name), getattr(lib, get_name)))
                break
    return handles


_HANDLES = None


@contextlib.contextmanager
def blas_threads(n: int | None):
    """Temporarily limit OpenBLAS to ``n`` threads (no-op for None or no OpenBLAS)."""
    global _HANDLES
    if n is None:
        yield
        return
    if _HANDLES is None:
        _HANDLES = _openblas_handles()
    saved = []
    for set_fn, get_fn in _HANDLES:
        saved.append((set_fn, int(get_fn())))
        set_fn(ctypes.c_int(n))
    try:
        yield
    finally:
        for set_fn, old in saved:
            set_fn(ctypes.c_int(old))


class Factorization(Protocol):
    def solve(self, b: np.ndarray, trans: bool = False) -> np.ndarray: ...


class SuperLUThread:
    """The one thread that creates, uses and frees SuperLU factorizations (see the
    module docstring for why).  The factorizations live in a table only this thread
    touches; callers hold a handle.  ``call`` runs a function there and waits for it;
    ``release`` drops a handle's factorization there without waiting."""

    def __init__(self):
        self._lock = threading.Lock()
        self._pool: ThreadPoolExecutor | None = None
        self._ident: int | None = None
        self._table: dict[int, spla.SuperLU] = {}
        self._ids = itertools.count()

    def _executor(self) -> ThreadPoolExecutor:
        with self._lock:
            if self._pool is None:
                self._pool = ThreadPoolExecutor(1, thread_name_prefix="velomatch-superlu",
                                                initializer=self._mark)
            return self._pool

    def _mark(self) -> None:
        self._ident = threading.get_ident()

    def call(self, fn, *args, **kwargs):
        if threading.get_ident() == self._ident:
            return fn(*args, **kwargs)
        return self._executor().submit(fn, *args, **kwargs).result()

    def factor(self, A, **options) -> int:
        """Factor ``A`` (scipy.sparse.linalg.splu keyword options); a handle."""
        def run():
            with blas_threads(BLAS_THREADS):
                lu = spla.splu(sp.csc_matrix(A), **options)
            handle = next(self._ids)
            self._table[handle] = lu
            return handle

        return self.call(run)

    def solve(self, handle: int, b, trans: str = "N") -> np.ndarray:
        def run():
            with blas_threads(BLAS_THREADS):
                return self._table[handle].solve(b, trans=trans)

        return self.call(run)

    def nnz(self, handle: int) -> int:
        return self.call(lambda: int(self._table[handle].L.nnz + self._table[handle].U.nnz))

    def release(self, handle: int) -> None:
        def run():
            # nothing returned: the factorization's last reference dies on this thread
            self._table.pop(handle, None)

        try:
            self._executor().submit(run)
        except RuntimeError:
            pass        # interpreter shutdown: the process frees everything anyway

    def live(self) -> int:
        """How many factorizations are held (for tests and benchmarks)."""
        return self.call(lambda: len(self._table))

    def _after_fork(self) -> None:
        # a forked child has no worker thread; it starts its own on first use
        self._lock = threading.Lock()
        self._pool, self._ident, self._table = None, None, {}


SUPERLU = SuperLUThread()
if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=SUPERLU._after_fork)


class _SuperLU:
    """A SuperLU factorization held by :data:`SUPERLU` (freed there when dropped)."""

    def __init__(self, A, name: str, **options):
        self.name = name
        self._handle = SUPERLU.factor(A, **options)

    def solve(self, b, trans=False):
        return SUPERLU.solve(self._handle, np.asarray(b, dtype=complex),
                             "T" if trans else "N")

    @property
    def nnz(self) -> int:
        return SUPERLU.nnz(self._handle)

    def __del__(self):
        handle = getattr(self, "_handle", None)
        # at interpreter shutdown the module's globals may already be gone
        if handle is not None and SUPERLU is not None:
            SUPERLU.release(handle)


def _superlu_mmd(A):
    return _SuperLU(A, "superlu_mmd", permc_spec="MMD_AT_PLUS_A",
                    options=dict(SymmetricMode=True, DiagPivotThresh=0.01))


def _superlu_plain(A):
    return _SuperLU(A, "superlu")


_BACKENDS: dict[str, Callable] = {"superlu_mmd": _superlu_mmd, "superlu": _superlu_plain}
DEFAULT_BACKEND = "superlu_mmd"
FALLBACK_BACKEND = "superlu"


def register_backend(name: str, factor: Callable) -> None:
    """Add a backend: ``factor(A) -> object with solve(b, trans=False)``."""
    _BACKENDS[name] = factor


def available_backends() -> list[str]:
    return list(_BACKENDS)


class CheckedFactorization:
    """A factorization that verifies its first solve and falls back if it is poor."""

    def __init__(self, A, backend: str):
        if backend not in _BACKENDS:
            raise ValueError(f"unknown backend {backend!r}; have {available_backends()}")
        self._A = sp.csr_matrix(A)
        self.backend = backend
        try:
            self._f = _BACKENDS[backend](A)
        except RuntimeError:
            if backend == FALLBACK_BACKEND:
                raise
            self._use_fallback()
        self._checked = False

    def _use_fallback(self):
        self.backend = FALLBACK_BACKEND
        self._f = _BACKENDS[FALLBACK_BACKEND](self._A)

    def solve(self, b, trans: bool = False) -> np.ndarray:
        x = self._f.solve(b, trans=trans)
        if not self._checked:
            M = self._A.T if trans else self._A
            res = np.linalg.norm(M @ x - b) / max(np.linalg.norm(b), 1e-300)
            if not np.isfinite(res) or res > RESIDUAL_TOL:
                if self.backend == FALLBACK_BACKEND:
                    raise RuntimeError(f"sparse solve residual {res:.2e} too large")
                self._use_fallback()
                return self.solve(b, trans)
            self._checked = True
        return x

    @property
    def nnz(self) -> int | None:
        return getattr(self._f, "nnz", None)


def factorize(A, backend: str = DEFAULT_BACKEND) -> CheckedFactorization:
    """Factor the square sparse matrix ``A`` once; solve and transpose-solve with it."""
    return CheckedFactorization(A, backend)
