"""``velomatch crosscheck``: the spec's sample solved again in Meep (FDTD) and compared.

What is built
    The FDFD run of the spec (``designer.evaluate.run_fdfd``, for every family, also
    where ``evaluate`` would use the exact layer stack) fixes the grid.  The Meep
    problem (``solvers.fdtd``) gets the same grid spacing, pixels aligned with the
    FDFD cells (pixel edges on FDFD cell edges), the same physical region (the FDFD
    grid without its PML and without the source strip on the incidence side), the
    same polygons (``family.polygons``) with the same permittivities, the same
    Bloch-periodic cell and Bloch wavevector, PML of the same thickness on the open
    sides and a plane wave at the same angle from the same medium (vacuum, a
    substrate, or the prism for total internal reflection).

Amplitude
    Meep's worker calibrates its source with an empty-cell run (the incidence
    medium everywhere): the plane wave is measured in the physical region, projected
    on exp(i kx x) and scaled so that the incident peak |E| is 1 V/m with the FDFD
    phase convention (Hy real and positive at the origin); see solvers/fdtd/worker.py.
    The fields returned are the steady state at the laser frequency, demodulated from
    a continuous-wave run (equal to a long-window DFT), on monitor lines.

Paths and what is compared
    * Paths along x (gratings, prisms), height z over one period: Meep Ex on the two
      rows of pixel centres around z, interpolated linearly in z (as the FDFD
      coupling interpolates between its Ex rows), at the FDFD Ex x-positions.  Both
      one-period integrals ``I_1`` use ``solvers.coupling.periodic_cell_integral``;
      the lattice sum over the N periods of the path is the same factor on both
      sides, so ``I_N = I_1 S_N`` is reported for both and the comparison of ``I_N``
      is the comparison of ``I_1``.
    * Paths along z (membranes): Meep Ez on the two columns of pixel centres around
      the electron's x, interpolated linearly in x (periodic part, as the FDFD
      kernel does).  The incident, reflected and transmitted waves never decay, so
      the integral has analytic Floquet tails beyond the box [z1, z2]
      (``coupling_along_z``).  Compared are (a) the in-box part, the same
      ``path_integral`` over the same nodes (Meep pixel centres in the box) for both
      solvers, and (b) the full coupling: FDFD with its tails against Meep's box plus
      the FDFD tails (tails = FDFD full minus FDFD box).  (b) decides agreement; its
      difference is the box difference relative to the full value.  The tails
      themselves follow from the field on the box planes, which the profile compares.

Figures (all for an incident peak field of 1 V/m)
    relative difference ``|I_fdtd - I_fdfd| / |I_fdfd|`` (complex; it bounds both the
    magnitude difference and the phase difference in radians), the magnitude
    difference ``| |I_fdtd| - |I_fdfd| | / |I_fdfd|``, the phase difference
    ``arg(I_fdtd / I_fdfd)``, and the profile difference
    ``max |E_fdtd - E_fdfd| / max |E_fdfd|`` along the path.  ``agree`` when the
    relative difference is at most the tolerance.

Resolution
    Default: the spec's ``solver.grid_step_nm`` if given, else the FDFD default
    (``designer.evaluate.default_grid_step``, 60 cells per wavelength in the densest
    material), so that for paths along x the FDFD figure is the one ``evaluate``
    reports.  ``--grid-step-nm`` overrides it for both solvers.  Meep's cost grows as
    the inverse cube of the step in 2D; the wall-time guard stops the Meep worker.
"""

from __future__ import annotations

import dataclasses
import math
import sys
import time
import warnings
from dataclasses import dataclass
from typing import Callable

import numpy as np

from designer.errors import VelomatchError

DEFAULT_TOLERANCE = 0.02
# the Meep physical region starts this many cells past the FDFD source line, where the
# FDFD field is the total field (common practice, no source)
_SOURCE_CLEARANCE_CELLS = 3


class MeepNotInstalledError(VelomatchError):
    """No interpreter with Meep was found; the message says how to install it."""


class CrosscheckError(VelomatchError):
    """The cross-check cannot be run for this spec, or the Meep run failed or timed out."""


@dataclass(frozen=True)
class Crosscheck:
    """Result of one cross-check (SI units, incident peak field 1 V/m).

    ``s_m`` are the path nodes (x for paths along x, z for paths along z),
    ``e_fdfd``/``e_fdtd`` the field component along the path (Ex or Ez) there.
    ``integral_fdfd_V``/``integral_fdtd_V`` are the compared couplings: ``I_N`` for
    paths along x, the full coupling (Meep box + FDFD tails) for paths along z.
    ``box_*`` (paths along z only) are the in-box parts.
    """

    family: str
    direction: str
    path_x_m: float | None
    path_z_m: float | None
    n_periods: int | None
    period_m: float | None
    s_m: np.ndarray
    e_fdfd: np.ndarray
    e_fdtd: np.ndarray
    one_period_fdfd_V: complex | None
    one_period_fdtd_V: complex | None
    box_fdfd_V: complex | None
    box_fdtd_V: complex | None
    box_z_m: tuple[float, float] | None
    integral_fdfd_V: complex
    integral_fdtd_V: complex
    exact_V: complex | None
    omega: float
    grid_step_m: float
    fdfd_wall_s: float
    fdtd_wall_s: float
    fdtd_converged: bool
    fdtd_info: dict
    meep_version: str
    tolerance: float

    @property
    def relative_difference(self) -> float:
        return _rel(self.integral_fdtd_V, self.integral_fdfd_V)

    @property
    def magnitude_difference(self) -> float:
        ref = abs(self.integral_fdfd_V)
        return abs(abs(self.integral_fdtd_V) - ref) / ref if ref > 0 else math.inf

    @property
    def phase_difference_rad(self) -> float:
        if self.integral_fdfd_V == 0 or self.integral_fdtd_V == 0:
            return math.nan
        return float(np.angle(self.integral_fdtd_V / self.integral_fdfd_V))

    @property
    def profile_difference(self) -> float:
        ref = float(np.max(np.abs(self.e_fdfd)))
        return float(np.max(np.abs(self.e_fdtd - self.e_fdfd))) / ref if ref > 0 else math.inf

    @property
    def box_difference(self) -> float | None:
        if self.box_fdfd_V is None:
            return None
        return _rel(self.box_fdtd_V, self.box_fdfd_V)

    @property
    def agree(self) -> bool:
        return bool(self.relative_difference <= self.tolerance)


def _rel(a: complex, b: complex) -> float:
    return abs(a - b) / abs(b) if abs(b) > 0 else math.inf


# ------------------------------------------------------------------ resolution
def choose_grid_step(spec) -> float:
    """Grid step (m) for both solvers: the spec's ``solver.grid_step_nm`` or the FDFD
    default of ``designer.evaluate.default_grid_step``."""
    from designer.evaluate import default_grid_step

    return float(spec.solver.grid_step_m or default_grid_step(spec))


# ------------------------------------------------------------------ the Meep problem
def _pixel_pair(value: float, lo: float, step: float) -> tuple[int, float]:
    """Index k of the pixel centre ``lo + (k + 1/2) step`` at or below ``value`` and the
    linear weight w of centre k + 1 (value = (1 - w) c_k + w c_{k+1})."""
    t = (value - lo) / step - 0.5
    k = math.floor(t + 1e-9)
    return k, min(max(t - k, 0.0), 1.0)


def physical_region(layout) -> tuple[float, float]:
    """(z_min, z_max) of the Meep physical region: the FDFD grid without its PML and
    without the source strip (up to a few cells past the FDFD source line)."""
    g = layout.grid
    n_pml = layout.pml_cells_z
    z_lo = g.z0 + n_pml * g.dz
    z_hi = g.z0 + (g.nz - n_pml) * g.dz
    k_src = round((layout.z_source_m - g.z0) / g.dz)
    if layout.from_side == "below":
        z_lo = g.z0 + (k_src + _SOURCE_CLEARANCE_CELLS) * g.dz
    else:
        z_hi = g.z0 + (k_src - _SOURCE_CLEARANCE_CELLS) * g.dz
    return z_lo, z_hi


def fdtd_problem(spec, layout, polygons, bloch_kx: float, lines, *, steady_tol: float = 2e-4):
    """The ``solvers.fdtd.FdtdProblem`` of a family layout (see the module docstring)."""
    from solvers.fdtd import FdtdPolygon, FdtdProblem

    g = layout.grid
    if layout.pml_cells_x != 0:
        raise CrosscheckError("the cross-check needs a Bloch-periodic simulation cell")
    eps_inc = complex(layout.eps_incidence)
    if abs(eps_inc.imag) > 1e-12 * abs(eps_inc):
        raise CrosscheckError(f"the incidence medium has loss (eps = {eps_inc}); a plane "
                              "wave source needs a lossless medium")
    z_lo, z_hi = physical_region(layout)
    try:
        polys = tuple(FdtdPolygon(np.asarray(p.vertices_m, float), complex(p.eps))
                      for p in polygons)
        return FdtdProblem(
            size_z_m=z_hi - z_lo, z_min_m=z_lo, wavelength_m=spec.laser.wavelength_m,
            period_x_m=g.size_x, x_min_m=g.x0, pml_m=layout.pml_cells_z * g.dz,
            angle_rad=float(layout.angle_rad), eps_incidence=eps_inc.real,
            side=layout.from_side, bloch_kx=float(bloch_kx), polygons=polys,
            eps_background=1.0, cells_per_um=1e-6 / g.dx, lines=tuple(lines),
            steady_tol=steady_tol)
    except ValueError as exc:
        raise CrosscheckError(f"cannot build the Meep problem: {exc}") from None


# ------------------------------------------------------------------ the comparison
def crosscheck(spec, *, grid_step_m: float | None = None, tolerance: float = DEFAULT_TOLERANCE,
               max_wall_s: float = 900.0,
               progress: Callable[[str], None] | None = None) -> Crosscheck:
    """Solve the spec's sample with FDFD and with Meep and compare the couplings.

    Args:
      spec: a parsed ``designer.spec.Spec``.
      grid_step_m: grid step for both solvers (default :func:`choose_grid_step`).
      tolerance: agreement threshold on the relative difference of the coupling.
      max_wall_s: wall-time limit for the whole cross-check (FDFD + Meep).
      progress: called with short status lines.
    Raises:
      MeepNotInstalledError (with install instructions), CrosscheckError.
    """
    from designer.evaluate import angular_frequency, run_fdfd
    from designer.families import get_family
    from solvers.fdtd import FdtdWorkerError, MeepUnavailableError, meep_python

    say = progress or (lambda message: None)
    t_start = time.monotonic()
    try:
        meep_python()  # fail fast, before any solve
    except MeepUnavailableError as exc:
        raise MeepNotInstalledError(str(exc)) from None
    if not tolerance > 0:
        raise CrosscheckError(f"--tolerance = {tolerance!r}: must be > 0")
    h = float(grid_step_m or choose_grid_step(spec))
    if not h > 0:
        raise CrosscheckError(f"resolution {h!r} m: must be > 0")

    family = get_family(spec.family)
    say(f"FDFD solve at {h * 1e9:.3g} nm")
    t0 = time.perf_counter()
    try:
        run = run_fdfd(spec, h, force=spec.solver.force, with_map=False)
    except ValueError as exc:  # the solver's input checks (PML, source medium, ...)
        raise CrosscheckError(f"FDFD solve at {h * 1e9:.3g} nm failed: {exc}") from None
    fdfd_wall = time.perf_counter() - t0
    fields, layout = run.fields, run.layout
    g = layout.grid
    omega = angular_frequency(spec.laser.wavelength_m)
    v = spec.beam.velocity_m_per_s
    q = omega / v
    kb = float(fields.bloch_kx)
    path = layout.path
    polygons = family.polygons(spec.sample, spec.context, layout)
    # staircase outlines (free-form pixels) go to Meep as rectangles (layout.rectangles)
    from designer.layout import rectangles

    polygons = [dataclasses.replace(q, vertices_m=r) for q in polygons
                for r in rectangles(q.vertices_m)]

    if path.direction == "x":
        kz, wz = _pixel_pair(path.z_m, physical_region(layout)[0], g.dz)
        z_lo = physical_region(layout)[0]
        lines = [("x", z_lo + (kz + 0.5) * g.dz), ("x", z_lo + (kz + 1.5) * g.dz)]
    else:
        kx, wx = _pixel_pair(path.x_m, g.x0, g.dx)
        xa = g.x0 + (kx + 0.5) * g.dx
        xb = xa + g.dx
        wrap = lambda x: g.x0 + ((x - g.x0) % g.size_x)  # noqa: E731
        lines = [("z", wrap(xa)), ("z", wrap(xb))]
    problem = fdtd_problem(spec, layout, polygons, kb, lines)

    left = max_wall_s - (time.monotonic() - t_start)
    if left <= 0:
        raise CrosscheckError(f"wall-time limit of {max_wall_s:g} s reached before the Meep "
                              "run (raise --max-wall-s)")
    say(f"Meep (FDTD) run at {h * 1e9:.3g} nm, {g.nx} x {round(problem.size_z_m / g.dz)} "
        f"physical pixels (limit {left:.0f} s)")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # reported as converged = False
            td = _run_fdtd(problem, left, say)
    except MeepUnavailableError as exc:
        raise MeepNotInstalledError(str(exc)) from None
    except FdtdWorkerError as exc:
        msg = str(exc)
        if "wall-time" in msg:
            msg += f"; or pass a coarser --grid-step-nm (now {h * 1e9:.3g} nm)"
        raise CrosscheckError(msg) from None
    if not math.isclose(td.grid_step_m, g.dx, rel_tol=1e-9):
        raise CrosscheckError(f"Meep used a step of {td.grid_step_m} m instead of {g.dx} m")
    la, lb = td.lines

    exact = None
    if family.layer_stack(spec.sample, spec.context) is not None:
        from designer.evaluate import run_layers

        exact = complex(run_layers(spec).integral_V)

    common = dict(family=spec.family, direction=path.direction, omega=omega,
                  grid_step_m=g.dx, fdfd_wall_s=fdfd_wall, fdtd_wall_s=td.wall_s,
                  fdtd_converged=td.converged, fdtd_info=dict(td.info),
                  meep_version=td.meep_version, tolerance=float(tolerance), exact_V=exact)
    if path.direction == "x":
        return _compare_x(run, la, lb, path.z_m, kb, q, common)
    return _compare_z(run, la, lb, (xa, xb), wx, kb, q, common)


def _run_fdtd(problem, timeout_s, say):
    from solvers.fdtd import run_fdtd

    return run_fdtd(problem, timeout_s=timeout_s, progress=lambda line: say("meep: " + line))


def _compare_x(run, la, lb, z_e, kb, q, common) -> Crosscheck:
    from solvers.coupling import lattice_sum, periodic_cell_integral

    fields, layout = run.fields, run.layout
    g = layout.grid
    za, zb = float(la.z[0]), float(lb.z[0])
    w = (z_e - za) / (zb - za)
    if not (-1e-9 <= w <= 1 + 1e-9 and np.allclose(la.x, lb.x)):
        raise CrosscheckError("Meep monitor lines do not bracket the electron path")
    x = np.asarray(la.x, float)
    e_td = (1.0 - w) * la.ex + w * lb.ex
    e_fd = np.asarray(fields.sample_ex(x, np.full_like(x, z_e)))
    i1_fd = complex(periodic_cell_integral(e_fd, float(x[0]), g.dx, kb, q))
    i1_td = complex(periodic_cell_integral(e_td, float(x[0]), g.dx, kb, q))
    period = g.size_x
    n = 1
    if layout.path.length_m is not None:
        n = max(1, int(round(layout.path.length_m / period)))
    s_n = complex(lattice_sum(kb - q, period, n))
    return Crosscheck(path_x_m=None, path_z_m=z_e, n_periods=n, period_m=period, s_m=x,
                      e_fdfd=e_fd, e_fdtd=np.asarray(e_td), one_period_fdfd_V=i1_fd,
                      one_period_fdtd_V=i1_td, box_fdfd_V=None, box_fdtd_V=None,
                      box_z_m=None, integral_fdfd_V=i1_fd * s_n, integral_fdtd_V=i1_td * s_n,
                      **common)


def _compare_z(run, la, lb, xs, w, kb, q, common) -> Crosscheck:
    from solvers.coupling import path_integral

    fields, layout = run.fields, run.layout
    g = layout.grid
    path = layout.path
    x_e = path.x_m
    if not np.allclose(la.z, lb.z):
        raise CrosscheckError("Meep monitor lines have different z samples")
    xa, xb = xs
    # the lines were requested at the wrapped positions; bring them back with the Bloch
    # phase, then interpolate the periodic part linearly (as the FDFD kernel does)
    fa = la.ez * np.exp(1j * kb * (xa - float(la.x[0])))
    fb = lb.ez * np.exp(1j * kb * (xb - float(lb.x[0])))
    col = ((1.0 - w) * fa * np.exp(1j * kb * (x_e - xa))
           + w * fb * np.exp(1j * kb * (x_e - xb)))
    # the box of run_fdfd: its planes moved outward onto the nearest Ex rows
    z1 = g.z0 + math.floor((path.z_below_m - g.z0) / g.dz + 1e-9) * g.dz
    z2 = g.z0 + math.ceil((path.z_above_m - g.z0) / g.dz - 1e-9) * g.dz
    z = np.asarray(la.z, float)
    inside = (z > z1) & (z < z2)
    s = z[inside]
    e_td = np.asarray(col)[inside]
    e_fd = np.asarray(fields.sample_ez(np.full_like(s, x_e), s))
    box_fd = complex(path_integral(e_fd, s, common["omega"], common["omega"] / q))
    box_td = complex(path_integral(e_td, s, common["omega"], common["omega"] / q))
    full_fd = complex(run.integral_V)
    tails = full_fd - box_fd
    return Crosscheck(path_x_m=x_e, path_z_m=None, n_periods=None, period_m=g.size_x, s_m=s,
                      e_fdfd=e_fd, e_fdtd=e_td, one_period_fdfd_V=None, one_period_fdtd_V=None,
                      box_fdfd_V=box_fd, box_fdtd_V=box_td, box_z_m=(float(s[0]), float(s[-1])),
                      integral_fdfd_V=full_fd, integral_fdtd_V=box_td + tails, **common)


# ------------------------------------------------------------------ outputs
def crosscheck_json(result: Crosscheck, spec=None) -> dict:
    """The ``velomatch crosscheck --json`` object (contract keys first)."""
    from designer.provenance import provenance
    from solvers.coupling import beta_from_integral

    def block(integral):
        beta = abs(complex(beta_from_integral(integral, result.omega)))
        return {"beta_c_per_field_m_per_V": beta, "integral_V": integral}

    fdfd = block(result.integral_fdfd_V)
    fdtd = block(result.integral_fdtd_V)
    fdfd["grid_step_m"] = result.grid_step_m
    fdfd["wall_s"] = result.fdfd_wall_s
    fdtd.update(grid_step_m=result.grid_step_m, wall_s=result.fdtd_wall_s,
                converged=result.fdtd_converged, meep_version=result.meep_version,
                calibration=result.fdtd_info.get("calibration"),
                periods_run=result.fdtd_info.get("periods_run"))
    path = {"direction": result.direction, "x_m": result.path_x_m, "z_m": result.path_z_m,
            "period_m": result.period_m}
    if result.direction == "x":
        path["n_periods"] = result.n_periods
        fdfd["one_period_integral_V"] = result.one_period_fdfd_V
        fdtd["one_period_integral_V"] = result.one_period_fdtd_V
        compared = ("one-period integral I_1 times the same lattice sum, Ex interpolated "
                    "to the path height")
    else:
        path["box_z_m"] = list(result.box_z_m)
        fdfd["box_integral_V"] = result.box_fdfd_V
        fdtd["box_integral_V"] = result.box_fdtd_V
        fdtd["tails_from"] = "fdfd"
        compared = ("full coupling: FDFD with its Floquet tails against the Meep in-box "
                    "integral plus the FDFD tails; the in-box parts are compared separately")
    out = {
        "fdfd": fdfd,
        "fdtd": fdtd,
        "relative_difference": result.relative_difference,
        "agree": result.agree,
        "tolerance": result.tolerance,
        "magnitude_difference": result.magnitude_difference,
        "phase_difference_rad": result.phase_difference_rad,
        "profile_difference": result.profile_difference,
        "compared": compared,
        "path": path,
        "profile": {"s_m": result.s_m, "component": "Ex" if result.direction == "x" else "Ez",
                    "fdfd": result.e_fdfd, "fdtd": result.e_fdtd},
    }
    if result.box_fdfd_V is not None:
        out["box_difference"] = result.box_difference
    if result.exact_V is not None:
        out["exact_layer_stack"] = {"integral_V": result.exact_V}
    out["provenance"] = provenance(getattr(spec, "sha256", None), solver="fdfd+fdtd",
                                   grid_step_m=result.grid_step_m,
                                   meep_version=result.meep_version)
    return out


def crosscheck_text(result: Crosscheck) -> str:
    def fmt(z):
        return f"|I| = {abs(z):.5g} V, arg = {math.degrees(np.angle(z)):8.3f} deg"

    what = ("I over the path (one period x lattice sum)" if result.direction == "x"
            else "I along z (box + Floquet tails)")
    lines = [f"crosscheck: {result.family}, step {result.grid_step_m * 1e9:.3g} nm, "
             f"E0 = 1 V/m; {what}",
             f"  FDFD        {fmt(result.integral_fdfd_V)}   ({result.fdfd_wall_s:.1f} s)",
             f"  FDTD (Meep) {fmt(result.integral_fdtd_V)}   ({result.fdtd_wall_s:.1f} s"
             + ("" if result.fdtd_converged else ", NOT converged") + ")"]
    if result.exact_V is not None:
        lines.append(f"  exact stack {fmt(result.exact_V)}")
    if result.box_fdfd_V is not None:
        lines.append(f"  in-box part: FDFD |I| = {abs(result.box_fdfd_V):.5g} V, Meep |I| = "
                     f"{abs(result.box_fdtd_V):.5g} V, difference {result.box_difference:.2%}")
    lines += [f"  relative difference   {result.relative_difference:.2%}",
              f"  magnitude difference  {result.magnitude_difference:.2%}",
              f"  phase difference      {math.degrees(result.phase_difference_rad):.3f} deg",
              f"  profile difference    {result.profile_difference:.2%} (max along the path)",
              f"  {'AGREE' if result.agree else 'DISAGREE'} at tolerance "
              f"{result.tolerance:.2%}"]
    return "\n".join(lines)


def crosscheck_figure(result: Crosscheck):
    """|E.s| and its phase along the path for both solvers."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6.4, 5.0))
    ax_a, ax_p = fig.subplots(2, 1, sharex=True)
    s = result.s_m * 1e9
    comp = "E_x" if result.direction == "x" else "E_z"
    for e, style, label in ((result.e_fdfd, "-", "FDFD"), (result.e_fdtd, "--", "FDTD (Meep)")):
        ax_a.plot(s, np.abs(e), style, label=label)
        ax_p.plot(s, np.degrees(np.unwrap(np.angle(e))), style, label=label)
    ax_a.set_ylabel(f"|${comp}$| (V/m per V/m)")
    ax_p.set_ylabel(f"arg ${comp}$ (deg, unwrapped)")
    ax_p.set_xlabel(("x" if result.direction == "x" else "z") + " along the path (nm)")
    where = (f"z = {result.path_z_m * 1e9:.4g} nm" if result.direction == "x"
             else f"x = {result.path_x_m * 1e9:.4g} nm")
    ax_a.set_title(f"{result.family}: field along the electron path ({where}); "
                   f"difference {result.relative_difference:.2%}", fontsize=9)
    ax_a.legend()
    fig.tight_layout()
    return fig


def crosscheck_command(args) -> int:
    """``velomatch crosscheck SPEC``: 0 when the solvers agree, 1 when not, 2 on errors."""
    from designer import io as vio
    from designer.commands import check_outputs
    from designer.spec import input_files, load_spec

    outputs = [("--plot", getattr(args, "plot", None), tuple(vio.FIGURE_SUFFIXES))]
    check_outputs(args, outputs, [args.spec])
    spec = load_spec(args.spec)
    check_outputs(args, outputs, input_files(spec))
    quiet = bool(getattr(args, "json", False))

    tty = sys.stderr.isatty()
    live = [False]  # a Meep progress line is being overwritten in place

    def status(message: str) -> None:
        if quiet:
            return
        repeat = message.startswith("meep: ") and ("t = " in message)
        if tty and repeat:
            sys.stderr.write(f"\r  {message}\x1b[K")
            live[0] = True
        else:
            if live[0]:
                sys.stderr.write("\n")
                live[0] = False
            sys.stderr.write(f"  {message}\n")
        sys.stderr.flush()

    resolution = getattr(args, "grid_step_nm", None)
    if resolution is not None and not (math.isfinite(resolution) and resolution > 0):
        raise CrosscheckError(f"--grid-step-nm = {resolution!r}: must be > 0")
    from designer.evaluate import choose_method

    if choose_method(spec) == "fmm":  # 2D-periodic or out of plane: Meep in 3D
        from designer.crosscheck3d import crosscheck3d_command

        if not quiet:
            print(f"cross-checking {args.spec} (Fourier modal method against Meep 3D)",
                  file=sys.stderr)
        return crosscheck3d_command(args, spec, status)
    max_wall = float(getattr(args, "max_wall_s", 900.0))
    if not (math.isfinite(max_wall) and max_wall > 0):
        raise CrosscheckError(f"--max-wall-s = {max_wall!r}: must be > 0")
    if not quiet:
        print(f"cross-checking {args.spec} (FDFD against Meep FDTD)", file=sys.stderr)
    result = crosscheck(spec, grid_step_m=None if resolution is None else resolution * 1e-9,
                        tolerance=(DEFAULT_TOLERANCE if getattr(args, "tolerance", None) is None
                                   else float(args.tolerance)),
                        max_wall_s=max_wall, progress=status)
    data = crosscheck_json(result, spec)
    if result.agree:   # a pass (exit 0) is never reported on NaN or infinite figures
        vio.require_finite(data, spec.source)
    if getattr(args, "plot", None):
        vio.save_figure(crosscheck_figure(result), args.plot)
    if quiet:
        print(vio.dumps(data))
    else:
        print(crosscheck_text(result))
    return 0 if result.agree else 1
