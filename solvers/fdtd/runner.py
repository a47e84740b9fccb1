"""Main-environment side of the Meep (FDTD) cross-check: problem spec, launch, results.

Meep cannot live in the main environment (Debian's build needs numpy 1.x, and
``import meep`` switches the process to flush-denormals-to-zero), so every run is a
separate process, ``PYTHON worker.py PROBLEM.json FIELDS.npz``, under the interpreter
that has Meep.  This module finds that interpreter, writes the problem, runs the worker
with a wall-time guard, passes its progress lines to a callback and reads the fields.

Layout of a problem (all lengths in metres)::

            PML (pml_m)                      <- outside the physical region
    z_min + size_z  ------------------
            physical region: polygons, background, monitor lines
    z_min           ------------------
            buffer (incidence medium, source line)   } for side="below";
            PML (pml_m, incidence medium)            } mirrored for "above"

x spans [x_min, x_min + period) with Bloch-periodic sides, or [x_min, x_min + size_x]
with PML (pml_m) added outside on both sides.  The PML and buffer are added outside
the physical region; polygons that should continue into the PML (half-spaces) must
extend beyond it.  The source-side buffer and PML are filled with the incidence medium
regardless of the polygons.  The grid spacing is 1/cells_per_um um, raised if
needed so that a period is a whole number of pixels; pixel edges fall on x_min and
z_min, so pixel centres are at x_min + (i + 1/2) dx, z_min + (k + 1/2) dx.
"""

from __future__ import annotations

import functools
import json
import os
import queue
import shlex
import signal
import subprocess
import tempfile
import threading
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, NamedTuple

import numpy as np
from scipy import constants

WORKER = Path(__file__).with_name("worker.py")
PROGRESS_PREFIX = "[fdtd] "
ENV_PYTHON = "VELOMATCH_MEEP_PYTHON"
ENV_LAUNCH = "VELOMATCH_MEEP_LAUNCH"
DEFAULT_PYTHON = "/usr/bin/python3"

INSTALL_HINT = (
    "Meep (the FDTD cross-check) was not found. Install it for some Python interpreter, e.g.\n"
    "  Debian/Ubuntu:  sudo apt-get install python3-meep python3-matplotlib\n"
    "  conda:          conda create -n meep -c conda-forge pymeep\n"
    f"then point velomatch at that interpreter: export {ENV_PYTHON}=/path/to/that/python"
)


class MeepUnavailableError(RuntimeError):
    """No interpreter with a working ``import meep`` was found."""


class FdtdWorkerError(RuntimeError):
    """The Meep worker process failed or exceeded its wall-time limit."""


@dataclass(frozen=True)
class FdtdPolygon:
    """A closed polygon of uniform relative permittivity ``eps`` (complex, Im >= 0 is loss).

    ``vertices_m``: array (n, 2) of (x, z) in metres, n >= 3, either orientation.
    """

    vertices_m: np.ndarray
    eps: complex

    def __post_init__(self):
        v = np.array(self.vertices_m, dtype=float)
        if v.ndim != 2 or v.shape[1] != 2 or v.shape[0] < 3:
            raise ValueError(f"polygon needs an (n>=3, 2) vertex array, got shape {v.shape}")
        if not np.all(np.isfinite(v)):
            raise ValueError("polygon vertices must be finite")
        v.setflags(write=False)
        object.__setattr__(self, "vertices_m", v)
        object.__setattr__(self, "eps", _check_eps(self.eps, "polygon eps"))


def _check_eps(eps, what: str) -> complex:
    e = complex(eps)
    if not e.real > 0:
        raise ValueError(f"{what} = {e}: the time-domain worker needs Re(eps) > 0 "
                         "(metals would need a dispersive model)")
    if e.imag < 0:
        raise ValueError(f"{what} = {e}: Im(eps) < 0 is gain")
    return e


@dataclass(frozen=True)
class FdtdProblem:
    """One plane-wave problem for the Meep worker (SI units; see the module docstring).

    Give exactly one of ``period_x_m`` (Bloch-periodic x) or ``size_x_m`` (PML on x).
    ``angle_rad`` is measured from the propagation axis (+z for ``side="below"``, the
    wave travelling up; -z for ``"above"``), positive when k tilts toward +x.
    ``eps_incidence`` (real) is the medium the source sits in.  ``bloch_kx`` (rad/m)
    defaults to n k0 sin(angle); if given it must differ from that by a multiple of
    2 pi / period.  ``lines``: ``("x", z)`` is a horizontal line across the whole
    width at height z, ``("z", x)`` a vertical line across the physical height at x.
    With ``snap_lines_to_grid`` (default) each line is moved to the nearest pixel
    centre, where the fields need no interpolation across the line; the result gives
    the exact coordinates.  The incident wave has peak amplitude
    ``amplitude_V_per_m`` in the incidence medium and zero phase at the origin:
    ``Hy = n E0 / Z0 exp(i (kx x + kz z))`` (the FDFD solver's convention).

    In a periodic cell a polygon describes one period: Meep repeats it by one period
    either way, so it must lie within [x_min - period, x_min + 2 period] unless it is a
    rectangle spanning all of that (a film or half-space).  Without periodic x, only
    normal incidence gives a clean plane wave (an oblique line source cut by the x PML
    is not one: about 5 % ripple at 20 degrees); use a periodic cell for oblique
    plane waves, with any period for an x-invariant structure.
    """

    size_z_m: float
    z_min_m: float
    wavelength_m: float
    period_x_m: float | None = None
    size_x_m: float | None = None
    x_min_m: float = 0.0
    pml_m: float = 1.0e-6
    angle_rad: float = 0.0
    eps_incidence: float = 1.0
    side: str = "below"
    bloch_kx: float | None = None
    polygons: tuple[FdtdPolygon, ...] = ()
    eps_background: complex = 1.0
    cells_per_um: float = 40.0
    lines: tuple[tuple[str, float], ...] = ()
    amplitude_V_per_m: float = 1.0
    whole_cell: bool = False
    snap_lines_to_grid: bool = True
    steady_tol: float = 2e-4
    max_periods: float = 600.0

    def __post_init__(self):
        if (self.period_x_m is None) == (self.size_x_m is None):
            raise ValueError("give exactly one of period_x_m (Bloch x) and size_x_m (PML x)")
        for name in ("size_z_m", "wavelength_m", "pml_m", "cells_per_um", "steady_tol",
                     "max_periods"):
            if not getattr(self, name) > 0:
                raise ValueError(f"{name} must be positive, got {getattr(self, name)}")
        if not self.size_x > 0:
            raise ValueError(f"x size must be positive, got {self.size_x}")
        if self.side not in ("below", "above"):
            raise ValueError(f"side must be 'below' or 'above', got {self.side!r}")
        eps_inc = complex(self.eps_incidence)
        if eps_inc.imag != 0 or not eps_inc.real > 0:
            raise ValueError(f"eps_incidence must be real and positive, got {self.eps_incidence}")
        object.__setattr__(self, "eps_incidence", float(eps_inc.real))
        if not abs(np.sin(self.angle_rad)) < 1 or not np.cos(self.angle_rad) > 0:
            raise ValueError(f"angle_rad must lie in (-pi/2, pi/2), got {self.angle_rad}")
        object.__setattr__(self, "eps_background", _check_eps(self.eps_background,
                                                              "eps_background"))
        object.__setattr__(self, "polygons", tuple(self.polygons))
        for p in self.polygons:
            if not isinstance(p, FdtdPolygon):
                raise TypeError(f"polygons must be FdtdPolygon, got {type(p).__name__}")
        lines = tuple((str(k), float(v)) for k, v in self.lines)
        for kind, pos in lines:
            if kind == "x":
                lo, hi = self.z_min_m, self.z_min_m + self.size_z_m
            elif kind == "z":
                lo, hi = self.x_min_m, self.x_min_m + self.size_x
            else:
                raise ValueError(f"line kind must be 'x' (horizontal) or 'z' (vertical), "
                                 f"got {kind!r}")
            if not lo <= pos <= hi:
                raise ValueError(f"line ({kind!r}, {pos}) lies outside the physical region "
                                 f"[{lo}, {hi}]")
        object.__setattr__(self, "lines", lines)
        if self.periodic:
            # Meep wraps objects by one period either way; anything wider must be an
            # x-invariant slab (a rectangle covering the cell and its neighbours)
            lo, hi = self.x_min_m - self.period_x_m, self.x_min_m + 2 * self.period_x_m
            # traced polygons may carry single-precision vertices (~1e-7 relative)
            slack = 1e-6 * self.period_x_m
            for p in self.polygons:
                vx = p.vertices_m[:, 0]
                if vx.min() >= lo - slack and vx.max() <= hi + slack:
                    continue
                is_rect = (len(p.vertices_m) == 4 and len(np.unique(vx)) == 2
                           and len(np.unique(p.vertices_m[:, 1])) == 2)
                if not (is_rect and vx.min() <= lo and vx.max() >= hi):
                    raise ValueError(
                        "a polygon in a periodic cell must lie within one period of the cell "
                        f"([{lo}, {hi}] m) or be a rectangle spanning all of it; got x in "
                        f"[{vx.min()}, {vx.max()}] m")
            k_inc = self.kx_incident
            m = (self.kx - k_inc) * self.period_x_m / (2 * np.pi)
            if abs(m - round(m)) > 1e-6:
                raise ValueError(f"bloch_kx = {self.bloch_kx} is not equivalent to the incident "
                                 f"n k0 sin(angle) = {k_inc} modulo 2 pi / period")
        elif self.bloch_kx is not None:
            raise ValueError("bloch_kx needs a periodic cell (period_x_m)")

    @property
    def periodic(self) -> bool:
        return self.period_x_m is not None

    @property
    def size_x(self) -> float:
        return float(self.period_x_m if self.periodic else self.size_x_m)

    @property
    def kx_incident(self) -> float:
        """n k0 sin(angle) in rad/m."""
        return float(2 * np.pi / self.wavelength_m * np.sqrt(self.eps_incidence)
                     * np.sin(self.angle_rad))

    @property
    def kx(self) -> float:
        """Bloch wavevector in rad/m."""
        return self.kx_incident if self.bloch_kx is None else float(self.bloch_kx)

    def to_json(self) -> dict:
        """The worker's input: SI values, plus polygon vertices in um for Meep."""
        return {
            "periodic": self.periodic,
            "size_x_m": self.size_x,
            "size_z_m": float(self.size_z_m),
            "x_min_m": float(self.x_min_m),
            "z_min_m": float(self.z_min_m),
            "pml_m": float(self.pml_m),
            "wavelength_m": float(self.wavelength_m),
            "angle_rad": float(self.angle_rad),
            "eps_incidence": self.eps_incidence,
            "side": self.side,
            "bloch_kx_per_m": self.kx,
            "polygons": [
                {"vertices_um": (p.vertices_m * 1e6).tolist(), "eps_re": p.eps.real,
                 "eps_im": p.eps.imag}
                for p in self.polygons
            ],
            "eps_background": [self.eps_background.real, self.eps_background.imag],
            "cells_per_um": float(self.cells_per_um),
            "lines": [list(line) for line in self.lines],
            "amplitude_V_per_m": float(self.amplitude_V_per_m),
            "whole_cell": bool(self.whole_cell),
            "snap_lines_to_grid": bool(self.snap_lines_to_grid),
            "steady_tol": float(self.steady_tol),
            "max_periods": float(self.max_periods),
            "impedance_ohm": float(constants.mu_0 * constants.c),
            "c_m_per_s": float(constants.c),
        }


class FdtdLine(NamedTuple):
    """Complex peak-amplitude fields on one monitor line (SI: m, V/m, A/m).

    ``coords`` is (n, 2) of (x, z); samples are uniform, one per pixel.
    """

    coords: np.ndarray
    ex: np.ndarray
    ez: np.ndarray
    hy: np.ndarray

    @property
    def x(self) -> np.ndarray:
        return self.coords[:, 0]

    @property
    def z(self) -> np.ndarray:
        return self.coords[:, 1]


@dataclass(frozen=True)
class FdtdCellFields:
    """Fields on the pixel centres of the physical region, arrays indexed [ix, iz]."""

    x: np.ndarray
    z: np.ndarray
    ex: np.ndarray
    ez: np.ndarray
    hy: np.ndarray


@dataclass(frozen=True)
class FdtdResult:
    """Output of one worker run.

    ``lines`` in the order requested; ``grid_step_m`` the grid spacing; ``wall_s`` the
    worker's own wall time (both runs); ``info`` the worker's diagnostics (convergence,
    calibration factors, handedness ratio, actual line positions, ...).
    """

    lines: tuple[FdtdLine, ...]
    grid_step_m: float
    wall_s: float
    meep_version: str
    cell: FdtdCellFields | None = None
    info: dict = field(default_factory=dict)

    @property
    def converged(self) -> bool:
        return bool(self.info.get("converged", False))


def _has_meep(python: str) -> bool:
    return _probe(python) is None


@functools.lru_cache(maxsize=None)
def _probe(python: str) -> str | None:
    """None if ``python -c 'import meep'`` works, else the reason it does not."""
    try:
        proc = subprocess.run([python, "-c", "import meep"], capture_output=True, text=True,
                              timeout=120, env=_worker_env())
    except (OSError, subprocess.TimeoutExpired) as exc:
        return f"{type(exc).__name__}: {exc}"
    if proc.returncode != 0:
        tail = (proc.stderr or "").strip().splitlines()[-1:] or ["(no message)"]
        return tail[0]
    return None


def meep_python() -> str:
    """Path of an interpreter that can ``import meep`` (checked once per path, cached).

    ``$VELOMATCH_MEEP_PYTHON`` if set (an error if it cannot import meep), else
    ``/usr/bin/python3``.  Raises ``MeepUnavailableError`` with install instructions.
    """
    env = os.environ.get(ENV_PYTHON, "").strip()
    if env:
        why = _probe(env)
        if why is not None:
            raise MeepUnavailableError(f"{ENV_PYTHON}={env} cannot import meep ({why}).\n"
                                       + INSTALL_HINT)
        return env
    if os.path.exists(DEFAULT_PYTHON) and _probe(DEFAULT_PYTHON) is None:
        return DEFAULT_PYTHON
    raise MeepUnavailableError(INSTALL_HINT)


def _worker_env() -> dict:
    env = dict(os.environ)
    # the main environment's paths would shadow the worker interpreter's numpy
    for k in ("PYTHONPATH", "PYTHONHOME", "VIRTUAL_ENV"):
        env.pop(k, None)
    env.setdefault("MPLBACKEND", "Agg")
    return env


def _reader(stream, q: queue.Queue):
    for line in iter(stream.readline, ""):
        q.put(line.rstrip("\n"))
    q.put(None)


def run_fdtd(problem: FdtdProblem, *, timeout_s: float = 600.0,
             progress: Callable[[str], None] | None = None) -> FdtdResult:
    """Run ``problem`` in the Meep worker and return the fields on its lines.

    Args:
      problem: the structure, source and monitors.
      timeout_s: wall-time limit for the worker; on expiry it is killed and
        ``FdtdWorkerError`` raised.
      progress: called with each progress line the worker reports (main thread).
    Returns:
      FdtdResult with fields in SI units, normalized to the incident peak amplitude.
    """
    result = run_worker(WORKER, problem.to_json(), _read_result, timeout_s=timeout_s,
                        progress=progress)
    if not result.converged:
        warnings.warn(f"Meep run stopped before steady state (last relative change "
                      f"{max(result.info['final_change']):.2e} > steady_tol "
                      f"{problem.steady_tol:g}); raise max_periods", RuntimeWarning,
                      stacklevel=2)
    return result


def run_worker(script: Path, payload: dict, read: Callable[[Path], object], *,
               timeout_s: float, progress: Callable[[str], None] | None = None):
    """Run a Meep worker script on ``payload`` (JSON) and ``read`` its npz output.

    The worker runs as ``PYTHON script PROBLEM.json FIELDS.npz`` in a temporary folder
    (optionally under ``$VELOMATCH_MEEP_LAUNCH``), in its own process group, killed
    when ``timeout_s`` runs out; its progress lines go to ``progress``.
    """
    python = meep_python()
    launch = shlex.split(os.environ.get(ENV_LAUNCH, ""))
    with tempfile.TemporaryDirectory(prefix="velomatch-fdtd-") as tmp:
        tmp = Path(tmp)
        src, dst = tmp / "problem.json", tmp / "fields.npz"
        src.write_text(json.dumps(payload), encoding="utf-8")
        cmd = launch + [python, str(script), str(src), str(dst)]
        with open(tmp / "stdout.txt", "w") as out:
            proc = subprocess.Popen(cmd, stdout=out, stderr=subprocess.PIPE, text=True,
                                    cwd=tmp, env=_worker_env(), start_new_session=True)
            q: queue.Queue = queue.Queue()
            th = threading.Thread(target=_reader, args=(proc.stderr, q), daemon=True)
            th.start()
            other: list[str] = []
            deadline = time.monotonic() + timeout_s
            done_reading = False
            try:
                while not done_reading:
                    left = deadline - time.monotonic()
                    if left <= 0:
                        raise FdtdWorkerError(
                            f"Meep worker exceeded its wall-time limit of {timeout_s:g} s "
                            "(lower cells_per_um, shrink the cell, or raise timeout_s)")
                    try:
                        line = q.get(timeout=min(left, 0.5))
                    except queue.Empty:
                        continue
                    if line is None:
                        done_reading = True
                    elif line.startswith(PROGRESS_PREFIX):
                        if progress is not None:
                            progress(line[len(PROGRESS_PREFIX):])
                    else:
                        other.append(line)
                try:
                    rc = proc.wait(timeout=max(1.0, deadline - time.monotonic()))
                except subprocess.TimeoutExpired:
                    raise FdtdWorkerError(f"Meep worker exceeded its wall-time limit of "
                                          f"{timeout_s:g} s") from None
            except BaseException:
                _kill(proc)
                raise
            finally:
                th.join(timeout=5)
        if rc != 0 or not dst.exists():
            tail = "\n".join(other[-20:])
            raise FdtdWorkerError(f"Meep worker failed (exit code {rc}): {' '.join(cmd)}\n{tail}")
        return read(dst)


def _kill(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        try:
            os.killpg(proc.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        proc.wait()


def _read_result(path: Path) -> FdtdResult:
    with np.load(path, allow_pickle=False) as data:
        meta = json.loads(str(data["meta"]))
        lines = []
        for i in range(meta["n_lines"]):
            x, z = data[f"line{i}_x"], data[f"line{i}_z"]
            xx, zz = np.broadcast_arrays(x[:, None], z[None, :])
            coords = np.stack([xx.ravel(), zz.ravel()], axis=1)
            lines.append(FdtdLine(coords, *(data[f"line{i}_{c}"].ravel()
                                            for c in ("ex", "ez", "hy"))))
        cell = None
        if meta["whole_cell"]:
            cell = FdtdCellFields(*(data["cell_" + c] for c in ("x", "z", "ex", "ez", "hy")))
    return FdtdResult(lines=tuple(lines), grid_step_m=float(meta["dx_m"]),
                      wall_s=float(meta["wall_s"]), meep_version=meta["meep_version"],
                      cell=cell, info=meta)
