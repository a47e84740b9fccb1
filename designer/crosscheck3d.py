"""``velomatch crosscheck`` for membranes solved by the Fourier modal method: Meep in 3D.

The spec's membrane (holes, or a film with its layers) is built as one unit cell,
Bloch-periodic in x and y, PML along z, lit by the spec's plane wave (polar angle,
azimuth, polarization, side) in the 3D Meep worker (``solvers.fdtd.runner3d``).  The
electron's coupling is integrated along the spec's straight path through the
returned fields, with analytic Floquet tails beyond the simulated region
(``runner3d.line_coupling``), and compared with the Fourier-modal value at the
spec's order count (``designer.holes``) — or, for an unpatterned film at φ = 0 on the
normal path, with the exact layer stack as well.

Cell: square lattice P x P; hexagonal lattice as its rectangular cell P x P sqrt(3)
with two holes (the Bloch vector of the incident wave is the same).  Physical region:
the stack plus half a wavelength of the outer media on each side.  Resolution
``--grid-step-nm`` (default ``DEFAULT_CELLS_PER_UM`` px/um, measured on a film: 2 %
at 40, 0.9 % at 60, 0.5 % at 80 px/um).  Meep's cost grows as the inverse fourth
power of the step in 3D.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Callable

import numpy as np

DEFAULT_CELLS_PER_UM = 40.0
DEFAULT_TOLERANCE = 0.03   # the 3D target; the command passes its --tolerance


@dataclass(frozen=True)
class Crosscheck3d:
    """FMM against Meep 3D (E0 = 1 V/m; SI)."""

    integral_fmm_V: complex
    integral_fdtd_V: complex
    box_fdtd_V: complex
    exact_V: complex | None
    fourier_orders: int
    fmm_error_estimate: float | None
    grid_step_m: float
    cell_pixels: tuple
    fdtd_wall_s: float
    fmm_wall_s: float
    converged: bool
    polarization_residual: float
    meep_version: str
    tolerance: float

    @property
    def relative_difference(self) -> float:
        ref = abs(self.integral_fmm_V)
        return abs(self.integral_fdtd_V - self.integral_fmm_V) / ref if ref > 0 else math.inf

    @property
    def magnitude_difference(self) -> float:
        ref = abs(self.integral_fmm_V)
        return abs(abs(self.integral_fdtd_V) - ref) / ref if ref > 0 else math.inf

    @property
    def agree(self) -> bool:
        return bool(self.relative_difference <= self.tolerance)


def fdtd3d_problem(spec, cells_per_um: float):
    """The ``Fdtd3dProblem`` of a membrane spec (module docstring) and its z offset."""
    from designer import holes
    from designer.families import membrane
    from solvers.fdtd.runner3d import Fdtd3dProblem, FdtdHole, FdtdSlab

    p = spec.sample
    lam = spec.laser.wavelength_m
    eps_below, rows, eps_above = membrane.stack_layers(p)
    objects, z = [], 0.0
    if abs(eps_below - 1.0) > 0:
        objects.append(FdtdSlab(-math.inf, 0.0, eps_below))
    film_z = None
    for th, e in rows:
        eps = p.material.eps if e == "film" else complex(e)
        objects.append(FdtdSlab(z, z + th, eps))
        if e == "film":
            film_z = (z, z + th)
        z += th
    top = z
    if abs(eps_above - 1.0) > 0:
        objects.append(FdtdSlab(top, math.inf, eps_above))
    h = p.holes
    if h is not None:
        P = h.period_m
        if h.lattice == "square":
            lx, ly, centres = P, P, [(0.0, 0.0)]
        else:
            lx, ly = P, P * math.sqrt(3.0)
            centres = [(0.0, 0.0), (0.5 * P, 0.5 * ly)]
        for c in centres:
            objects.append(FdtdHole(c, h.semi_axes_m, film_z[0], film_z[1], 1.0 + 0j,
                                    h.angle_rad))
    elif p.pattern == "slits":
        raise ValueError("the 3D cross-check takes hole membranes and films; slit "
                         "membranes are cross-checked in 2D (solver.method = \"fdfd\")")
    else:
        lx = ly = min(0.25 * lam, 0.2e-6)
    margin = 0.5 * lam
    theta = float(spec.context.angle_rad)
    if theta < 0:
        raise ValueError("the 3D cross-check takes angle_deg >= 0 (turn azimuth_deg by "
                         "180 degrees instead)")
    inc = eps_below if spec.laser.from_side == "below" else eps_above
    prob = Fdtd3dProblem(size_x_m=lx, size_y_m=ly, z_min_m=-margin, size_z_m=top + 2 * margin,
                         wavelength_m=lam, objects=tuple(objects), theta_rad=theta,
                         phi_rad=spec.laser.azimuth_rad, psi_rad=spec.laser.polarization_rad,
                         side=spec.laser.from_side, eps_incidence=float(np.real(inc)),
                         pml_m=0.5 * lam, cells_per_um=cells_per_um)
    return prob, holes.film_mid_z(spec), (eps_below, eps_above)


def crosscheck3d(spec, *, grid_step_m: float | None = None,
                 tolerance: float = DEFAULT_TOLERANCE, max_wall_s: float = 900.0,
                 progress: Callable[[str], None] | None = None) -> Crosscheck3d:
    """Solve the spec's membrane by FMM and by Meep 3D and compare the couplings."""
    from designer import holes
    from designer.crosscheck import CrosscheckError, MeepNotInstalledError
    from solvers.fdtd import FdtdWorkerError, MeepUnavailableError, meep_python
    from solvers.fdtd.runner3d import line_coupling, run_fdtd3d

    say = progress or (lambda m: None)
    t_start = time.monotonic()
    try:
        meep_python()
    except MeepUnavailableError as exc:
        raise MeepNotInstalledError(str(exc)) from None
    cells = DEFAULT_CELLS_PER_UM if grid_step_m is None else 1e-6 / grid_step_m
    try:
        prob, z_mid, (eps_below, eps_above) = fdtd3d_problem(spec, cells)
    except ValueError as exc:
        raise CrosscheckError(f"cannot build the 3D Meep problem: {exc}") from None
    t0 = time.perf_counter()
    study, _ = holes.order_study(spec, spec.solver.fourier_orders, refine=True, say=say)
    fmm_wall = time.perf_counter() - t0
    i_fmm = study.integrals_V[study.orders.index(study.chosen)]
    left = max_wall_s - (time.monotonic() - t_start)
    say(f"Meep 3D run at {cells:.3g} px/um (limit {left:.0f} s)")
    try:
        res = run_fdtd3d(prob, timeout_s=max(1.0, left), progress=lambda m: say("meep: " + m))
    except FdtdWorkerError as exc:
        raise CrosscheckError(str(exc)) from None
    total, box = line_coupling(res, prob, holes.path_point(spec), holes.path_direction(spec),
                               spec.beam.velocity_m_per_s, eps_below, eps_above, z0=z_mid)
    exact = None
    if spec.sample.holes is None and not (spec.laser.azimuth_rad or spec.path.tilt_rad
                                          or spec.sample.layers_below):
        from designer.evaluate import run_layers

        # exact stack coupling refers its phase to the film bottom at z = 0: refer it to
        # the mid-plane crossing like the others (exp(+i w z_mid / v) along +z)
        omega = 2 * math.pi * 299792458.0 / spec.laser.wavelength_m
        shift = np.exp(1j * omega * (spec.sample.thickness_m * 0.5) / spec.beam.velocity_m_per_s)
        exact = complex(run_layers(spec).integral_V) * math.cos(spec.laser.polarization_rad) \
            * complex(shift)
    return Crosscheck3d(
        integral_fmm_V=complex(i_fmm), integral_fdtd_V=complex(total), box_fdtd_V=complex(box),
        exact_V=exact, fourier_orders=study.chosen, fmm_error_estimate=study.relative_error,
        grid_step_m=res.grid_step_m, cell_pixels=tuple(res.info.get("cell_pixels", ())),
        fdtd_wall_s=res.wall_s, fmm_wall_s=fmm_wall, converged=res.converged,
        polarization_residual=float(res.info["calibration"]["polarization_residual"]),
        meep_version=res.meep_version, tolerance=float(tolerance))


def crosscheck3d_json(r: Crosscheck3d, spec) -> dict:
    from designer.provenance import provenance

    def c(z):
        return None if z is None else [z.real, z.imag]

    return {"solvers": ["fmm", "meep-3d"], "integral_fmm_V": c(r.integral_fmm_V),
            "integral_fdtd_V": c(r.integral_fdtd_V), "box_fdtd_V": c(r.box_fdtd_V),
            "exact_V": c(r.exact_V), "relative_difference": r.relative_difference,
            "magnitude_difference": r.magnitude_difference, "tolerance": r.tolerance,
            "agree": r.agree, "fourier_orders": r.fourier_orders,
            "fmm_relative_error_estimate": r.fmm_error_estimate,
            "grid_step_m": r.grid_step_m, "cell_pixels": list(r.cell_pixels),
            "fdtd_wall_s": r.fdtd_wall_s, "fmm_wall_s": r.fmm_wall_s,
            "fdtd_converged": r.converged, "polarization_residual": r.polarization_residual,
            "meep_version": r.meep_version,
            "provenance": provenance(spec.sha256, solver="fmm", grid_step_m=r.grid_step_m)}


def crosscheck3d_text(r: Crosscheck3d) -> str:
    lines = [f"Fourier modal method ({r.fourier_orders} orders) against Meep 3D "
             f"({1e-6 / r.grid_step_m:.3g} px/um, cell {' x '.join(map(str, r.cell_pixels))})",
             f"  |I| FMM           {abs(r.integral_fmm_V):.5g} V per V/m",
             f"  |I| Meep 3D       {abs(r.integral_fdtd_V):.5g} V per V/m"]
    if r.exact_V is not None:
        lines.append(f"  |I| exact stack   {abs(r.exact_V):.5g} V per V/m")
    lines += [f"  relative difference {r.relative_difference:.2%} "
              f"(tolerance {r.tolerance:.0%}): {'agree' if r.agree else 'DISAGREE'}",
              f"  Meep {r.fdtd_wall_s:.0f} s, FMM {r.fmm_wall_s:.1f} s"
              + ("" if r.converged else "; Meep stopped before steady state")]
    return "\n".join(lines)


def crosscheck3d_command(args, spec, status) -> int:
    from designer import io as vio

    quiet = bool(getattr(args, "json", False))
    step = getattr(args, "grid_step_nm", None)
    tol = getattr(args, "tolerance", None)
    tol = DEFAULT_TOLERANCE if tol is None else float(tol)
    if not tol > 0:
        from designer.crosscheck import CrosscheckError

        raise CrosscheckError(f"--tolerance = {tol!r}: must be > 0")
    r = crosscheck3d(spec, grid_step_m=None if step is None else step * 1e-9, tolerance=tol,
                     max_wall_s=float(getattr(args, "max_wall_s", 900.0)), progress=status)
    if quiet:
        print(vio.dumps(crosscheck3d_json(r, spec)))
    else:
        print(crosscheck3d_text(r))
    return 0 if r.agree else 1
