"""Up-front cost of an FDFD solve: cells, memory of the sparse factorization, time order.

Every Yee grid is checked here before anything of its size is allocated (the
rasterizer calls :func:`check_grid`), so a grid that cannot fit in memory is refused
in a fraction of a second with one line instead of growing until the kernel kills
the process.

Model (fitted to SciPy's SuperLU with the ``MMD_AT_PLUS_A`` ordering on our own FDFD
operators, Bloch-periodic along x with PMLs along z; measured fill of nx × nz grids
from 4 × 2000 to 1000 × 1000, ``studies/benchmarks/fdfd_memory.py``):

* fill of the LU factors per cell, ``nnz(L + U) / N ≈ min(6.5 √m, 4.5 log₂ N)`` with
  ``m = min(nx, nz)``: a thin strip behaves like a band matrix (fill grows with the
  width), a square grid like nested dissection, whose fill is O(N log N)
  (A. George, SIAM J. Numer. Anal. 10, 345, 1973); the fit is within 0.8-1.3 of every
  measured size (conservative on squares) and carries a 1.2 safety factor;
* memory ``≈ 26 bytes per LU entry`` (complex128 value, int32 index, supernode
  overhead; measured 25.6-26.0 B from the rise of the resident set during the
  factorization) plus about 800 bytes per cell for the operator, permittivities,
  fields and their copies;
* time ``≈ 1e-7 s per LU entry`` on one core of the 2-core development machine (an
  order of magnitude, not a promise).

Against the benchmark (quick mode, 5 shapes) the estimate is 1.2-1.6 times the
measured fill and 1.7-2.0 times the measured rise of the resident set: it errs on the
side of refusing.

The available memory is ``MemAvailable`` of ``/proc/meminfo`` (or psutil), reduced to
the cgroup's limit when one is set.  ``--force`` on the command line (environment
``VELOMATCH_FORCE=1``, inherited by local sweep workers) skips the refusal.
"""

from __future__ import annotations

import contextlib
import contextvars
import math
import os
from dataclasses import dataclass

from designer.errors import VelomatchError

FILL_STRIP = 6.5          # nnz(L+U)/N ≈ FILL_STRIP √min(nx, nz) for thin grids
FILL_SQUARE = 4.5         # nnz(L+U)/N ≈ FILL_SQUARE log2 N for square grids
FILL_SAFETY = 1.2
BYTES_PER_ENTRY = 26.0
BYTES_PER_CELL = 800.0
SECONDS_PER_ENTRY = 1e-7
USABLE_SHARE = 0.8        # leave a fifth of the available memory to everything else
FORCE_ENV = "VELOMATCH_FORCE"


class CostError(VelomatchError):
    """A solve that would not fit in the machine's memory (exit code 2)."""


@dataclass(frozen=True)
class Estimate:
    nx: int
    nz: int
    lu_entries: float
    memory_bytes: float
    seconds: float

    @property
    def cells(self) -> int:
        return self.nx * self.nz

    def describe(self) -> str:
        return (f"FDFD grid {self.nx} x {self.nz} = {self.cells:,} cells, factorization "
                f"about {format_bytes(self.memory_bytes)}, time order "
                f"{format_seconds(self.seconds)}")


def estimate(nx: int, nz: int) -> Estimate:
    """Cost of factorizing and solving an nx × nz FDFD system (see the module docstring)."""
    n = max(1, int(nx) * int(nz))
    m = max(1, min(int(nx), int(nz)))
    per_cell = min(FILL_STRIP * math.sqrt(m), FILL_SQUARE * math.log2(max(n, 2)))
    entries = FILL_SAFETY * max(per_cell, 5.0) * n
    # beyond the measured sizes the dense top separators (m × m) dominate: m³ work
    # against the fill's m² log m, so the time grows faster than the fill
    slower = max(1.0, m / 1000.0)
    return Estimate(int(nx), int(nz), entries, BYTES_PER_ENTRY * entries + BYTES_PER_CELL * n,
                    SECONDS_PER_ENTRY * entries * slower)


def available_memory() -> tuple[float, str]:
    """(bytes, where the figure comes from) the machine can give this process now."""
    value, origin = None, "unknown"
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    value, origin = float(line.split()[1]) * 1024, "MemAvailable in /proc/meminfo"
                    break
    except (OSError, ValueError, IndexError):
        pass
    if value is None:
        try:
            import psutil

            value, origin = float(psutil.virtual_memory().available), "psutil"
        except Exception:  # noqa: BLE001 - no figure at all: do not refuse on a guess
            return math.inf, "unknown"
    limit = _cgroup_room()
    if limit is not None and limit < value:
        value, origin = limit, "the cgroup memory limit"
    return value, origin


def _cgroup_room() -> float | None:
    try:
        with open("/sys/fs/cgroup/memory.max") as handle:
            text = handle.read().strip()
        if text == "max":
            return None
        with open("/sys/fs/cgroup/memory.current") as handle:
            current = float(handle.read().strip())
        return max(0.0, float(text) - current)
    except (OSError, ValueError):
        return None


_WATCH: contextvars.ContextVar = contextvars.ContextVar("velomatch_cost_watch", default=None)


@contextlib.contextmanager
def watch(say=None):
    """Within this block :func:`check_grid` reports each new large grid's estimate
    through ``say`` (progress on stderr)."""
    token = _WATCH.set({"say": say, "seen": set()})
    try:
        yield
    finally:
        _WATCH.reset(token)


def forced() -> bool:
    """True when the user passed ``--force`` (also in sweep workers: environment)."""
    return os.environ.get(FORCE_ENV, "") not in ("", "0")


def check_grid(grid) -> Estimate:
    """Refuse (:class:`CostError`) a grid whose solve would not fit; return the estimate."""
    est = estimate(grid.nx, grid.nz)
    if not forced():
        room, origin = available_memory()
        if est.memory_bytes > USABLE_SHARE * room:
            step = getattr(grid, "dx", None)
            now = f" (now {step * 1e9:.3g} nm)" if step else ""
            raise CostError(f"{est.describe()}; {format_bytes(room)} available ({origin}): "
                            f"too large — raise [solver] grid_step_nm{now} or pass --force")
    state = _WATCH.get()
    if state is not None and state["say"] is not None and est.cells > 20_000 \
            and (grid.nx, grid.nz) not in state["seen"]:
        state["seen"].add((grid.nx, grid.nz))
        state["say"](est.describe())
    return est


def format_bytes(n: float) -> str:
    if not math.isfinite(n):
        return "unknown"
    for unit, size in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{n / 1e3:.3g} kB"


def format_seconds(s: float) -> str:
    if s < 1:
        return "under a second"
    if s < 120:
        return f"{s:.2g} s"
    if s < 7200:
        return f"{s / 60:.2g} min"
    if s < 2 * 86400:
        return f"{s / 3600:.2g} h"
    return f"{s / 86400:.2g} days"
