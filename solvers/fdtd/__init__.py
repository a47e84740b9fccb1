"""FDTD cross-check: the same structure and plane wave solved in Meep, in its own process.

``run_fdtd(FdtdProblem(...))`` returns complex peak-amplitude fields (Ex, Ez, Hy) on
monitor lines, normalized to the incident wave; see ``runner`` for the problem layout
and ``worker`` for the method (continuous source run to steady state, empty-cell
amplitude calibration).
"""

from .runner import (
    FdtdCellFields,
    FdtdLine,
    FdtdPolygon,
    FdtdProblem,
    FdtdResult,
    FdtdWorkerError,
    MeepUnavailableError,
    meep_python,
    run_fdtd,
)

__all__ = [
    "FdtdCellFields",
    "FdtdLine",
    "FdtdPolygon",
    "FdtdProblem",
    "FdtdResult",
    "FdtdWorkerError",
    "MeepUnavailableError",
    "meep_python",
    "run_fdtd",
]
