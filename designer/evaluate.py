"""From a spec to coupling figures: fields, the coupling integral, error estimate.

This is the pipeline every command shares (``evaluate``, ``sweep``, ``compare``,
``design``'s re-evaluation).  The physics is in ``solvers``; this module decides
which solver to use, at which resolution, and assembles the result.

Solver choice (``[solver] method``): ``"layers"`` uses the exact transfer-matrix
solution where the sample is a planar stack (unpatterned membranes, prisms);
``"fdfd"`` always solves on the Yee grid; ``"auto"`` (default) takes the exact
solver when the sample is layered and FDFD otherwise.

Error estimate (FDFD): the coupling is computed at the chosen step h and again at
about h / 1.5 and 1.5 h (each rounded to whole cells per period); the observed order of
convergence p follows from the three results, and the error of the reported value (the
one at h) is its distance from the Richardson extrapolation of the finer pair.  A stored
pixel pattern on a grid of step pixel/k (k >= 3) is instead checked on pixel/(k-1) and
pixel/(k-2), coarser grids that hold exactly the same pattern (see
:func:`pixel_aligned_steps`), and the error is that of the finest result
(L. F. Richardson, Phil. Trans. R. Soc. A 210, 307, 1911; the three-grid procedure of
I. B. Celik et al., J. Fluids Eng. 130, 078001, 2008), see :func:`three_grid_estimate`.
The same procedure applied to |I| alone gives ``magnitude_error_estimate``: the figures
that depend on the magnitude only (|β_c|, κ, G/E_max) carry that one, which can be much
smaller than the complex one near a maximum of |I|, where a shift of the structure's
response moves the phase at first order and the magnitude at second.
The layer-stack solver is exact up to rounding; its estimate is 0.

Largest field in material (README, Conventions): at re-entrant corners of sharp-edged
dielectrics the field is singular, so the sampled maximum does not converge.  Real
corners are rounded: cells closer to a polygon corner than the fabrication rules'
``corner_radius_nm`` are left out of the maximum.  The rule used is reported.

Open paths (electrons crossing a membrane) have no interaction length: the coupling
is earned inside the film and in the vacuum on both sides, out to about one
dephasing length ℓ_φ = 1/|k cos θ − ω/v| = (λ/2π) β/(1 − β cos θ) of the incident
and transmitted waves (the distance over which their phase slips one radian against
the electron).  Their gradient, structure factor and damage factor therefore use
L = d + 2ℓ_φ (film thickness plus one dephasing length each side; see
:func:`open_path_length`), so that films of different thickness compare and the
damage factor does not exceed what the fields allow (``gradient_length_m`` and
``gradient_length_rule`` in the output).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
from scipy import constants

from designer.families import get_family
from designer.spec import Spec, parse_spec

C0 = constants.c
CORNER_RULE = "cells within corner_radius of a polygon corner excluded"
ERROR_GRID_FACTORS = (1 / 1.5, 1.5)  # the finer and the coarser grid of the error estimate (x step)
SIMILAR_WINDOW = 0.12              # ... each chosen within +-12 % of that (similar_step)
SIMILAR_CANDIDATES = 49


@dataclass(frozen=True)
class PathCoupling:
    """Coupling of the spec's path for a 1 V/m incident wave, from one solver run."""

    integral_V: complex                # I for E0 = 1 V/m
    max_field_in_material: float | None  # |E|max in material for E0 = 1 V/m
    grid_step_m: float | None
    fields: Any = None                 # solvers.fdfd.Fields (FDFD runs)
    stack: Any = None                  # solvers.layers.StackSolution (layer runs)
    layout: Any = None
    map_x_m: np.ndarray | None = None  # open paths: lateral positions across the cell
    map_integral_V: np.ndarray | None = None
    map_z_m: np.ndarray | None = None  # paths along x: heights in the clear vacuum gap
    map_z_integral_V: np.ndarray | None = None
    spot_z_m: np.ndarray | None = None  # paths along x: heights across the electron spot
    spot_z_integral_V: np.ndarray | None = None
    spot_fraction: float | None = None  # share of the spot's current in the clear gap
    fmm_solution: Any = None           # solvers.fmm.FMMSolution (fmm runs)


@dataclass(frozen=True)
class Evaluation:
    """Everything ``velomatch evaluate`` reports about one spec."""

    spec: Spec
    solver: str
    angle_rad: float
    peak_field_V_per_m: float
    omega: float
    run: PathCoupling
    relative_error: float
    interaction_length_m: float | None
    gradient_length_m: float | None
    e_max_rule: str
    fourier_orders: int | None = None     # fmm runs: the order count reported
    order_study: Any = None               # fmm runs: designer.holes.OrderStudy
    spot_integral_V: tuple | None = None  # fmm runs: (mean |I|, rms |I|) over the spot
    error_order: float | None = None            # observed order p of the estimate
    error_order_used: float | None = None       # the order the estimate uses
    error_grids_m: tuple[float, ...] | None = None
    error_note: str | None = None
    magnitude_error: float | None = None        # the same estimate applied to |I|
    magnitude_error_note: str | None = None


ORDER_RANGE = (1.0, 2.0)   # the orders the estimate may use (see three_grid_estimate)
SAFETY_FACTOR = 1.25       # on the Richardson error of three grids (Roache's GCI factor)


@dataclass(frozen=True)
class ErrorEstimate:
    """Relative error of the finest of three results, the observed order and why."""

    relative_error: float
    observed_order: float | None
    order_used: float
    note: str


def observed_order(e21: complex, e32: complex, r21: float, r32: float) -> float | None:
    """The order p with ``|e32 / e21| = r21^p (r32^p - 1) / (r21^p - 1)`` (bisection on
    [0.001, 12]), or None when the differences do not shrink in one direction
    (``Re(e32 conj e21) <= 0``) or no such p exists."""
    if abs(e21) == 0.0 or (e32 * e21.conjugate()).real <= 0:
        return None
    target = abs(e32) / abs(e21)

    def g(q):
        return r21**q * (r32**q - 1.0) / (r21**q - 1.0) - target

    lo, hi = 1e-3, 12.0
    if not g(lo) < 0 < g(hi):
        return None
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if g(mid) < 0 else (lo, mid)
    return 0.5 * (lo + hi)


def three_grid_estimate(values, steps, at: int = 0) -> ErrorEstimate:
    """Discretization error of ``values[at]`` (complex results at ``steps`` h1 < h2 < h3;
    ``at`` = 0, the finest, or 1, the middle one).

    With ``I(h) = I* + C h^p``: ``e21 = I2 − I1``, ``e32 = I3 − I2`` and
    ``|e32 / e21| = r21^p (r32^p − 1) / (r21^p − 1)``, ``r21 = h2/h1``, ``r32 = h3/h2``,
    gives the observed order p (:func:`observed_order`; for r21 = r32 = r,
    ``p = ln|e32/e21| / ln r``), and the error of I1 is ``|e21| / (r21^p − 1) / |I1|``
    (L. F. Richardson, Phil. Trans. R. Soc. A 210, 307, 1911; I. B. Celik, U. Ghia,
    P. J. Roache, C. J. Freitas, H. Coleman, P. E. Raad, J. Fluids Eng. 130, 078001,
    2008, who also limit the order used).  The error of I2 is its distance from the
    finer pair's extrapolation ``I* = I1 + (I1 − I2) / (r21^p − 1)``:
    ``|e21| r21^p / (r21^p − 1) / |I2|``.

    The order used is the observed one clipped to ORDER_RANGE = [1, 2]: the scheme is
    second order where interfaces are smooth (subpixel averaging) and first order near
    corners, so an observed order outside that range is a sign of results outside the
    asymptotic range rather than of a faster or slower scheme.  When the differences do
    not shrink in one direction at all (the error is then dominated by where the
    interfaces fall inside the cells, which changes erratically from grid to grid), the
    nominal second order is used: for I1 the larger difference,
    ``max(|e21|, |e32|) / (r^2 − 1)``; for I2 the finer pair as above.  ``note`` says
    which rule was used.  Results from an observed order, and the middle grid's, are
    times SAFETY_FACTOR (Roache's factor for three grids).
    """
    if at not in (0, 1):
        raise ValueError(f"at = {at!r}: the finest (0) or the middle (1) result")
    i1, i2, i3 = (complex(v) for v in values)
    h1, h2, h3 = (float(h) for h in steps)
    r21, r32 = h2 / h1, h3 / h2
    e21, e32 = i2 - i1, i3 - i2
    target = (i1, i2)[at]
    scale = abs(target) if target != 0 else 1.0
    if abs(e21) == 0.0:
        return ErrorEstimate(0.0, None, ORDER_RANGE[1], "the two finest grids agree exactly")
    p = observed_order(e21, e32, r21, r32)
    if p is None:
        q = ORDER_RANGE[1]
        note = ("the differences between the three grids do not converge in one direction "
                "(not in the asymptotic range): ")
    else:
        q = min(max(p, ORDER_RANGE[0]), ORDER_RANGE[1])
        note = f"observed order {p:.2f} (three grids)"
        if q != p:
            note += f", used {q:g} (limited to [{ORDER_RANGE[0]:g}, {ORDER_RANGE[1]:g}])"
    if at == 1:
        note += ("; " if p is not None else "the nominal second order; ") + (
            "the middle grid's distance from the finer pair's extrapolation")
        err = abs(e21) * r21**q / (r21**q - 1.0)
        return ErrorEstimate(SAFETY_FACTOR * err / scale, p, q, note)
    if p is None:
        err = max(abs(e21) / (r21**q - 1.0), abs(e32) / (r32**q - 1.0))
        return ErrorEstimate(err / scale, None, q,
                             note + "the larger difference at the nominal second order")
    # the error of I1 from the finer pair, and from the coarser pair carried down to h1;
    # equal for a clean power law, the larger one where the order had to be limited
    fine_pair = abs(e21) / (r21**q - 1.0)
    coarse_pair = abs(e32) / (r32**q - 1.0) / r21**q
    if coarse_pair > fine_pair * (1 + 1e-9):
        note += "; the coarser pair's error (larger) is used"
    return ErrorEstimate(SAFETY_FACTOR * max(fine_pair, coarse_pair) / scale, p, q, note)


def interface_fractions(grid, vertices_m: np.ndarray) -> np.ndarray:
    """Where the structure's corners fall inside their cells: ``frac((x - x0)/dx)`` and
    ``frac((z - z0)/dz)`` of every polygon vertex coordinate inside the grid (NaN for a
    coordinate outside, e.g. a layer's lateral ends beyond a short Bloch cell)."""
    v = np.asarray(vertices_m, dtype=float).reshape(-1, 2)
    tx = (v[:, 0] - grid.x0) / grid.dx
    tz = (v[:, 1] - grid.z0) / grid.dz
    tx = np.where((tx >= -1e-9) & (tx <= grid.nx + 1e-9), tx % 1.0, np.nan)
    tz = np.where((tz >= -1e-9) & (tz <= grid.nz + 1e-9), tz % 1.0, np.nan)
    return np.concatenate([tx, tz])


def similar_step(spec: Spec, reference, target_m: float, window: float | None = None,
                 vertices_m: np.ndarray | None = None) -> float:
    """A requested step within ``target_m (1 +- window)`` whose grid puts the structure's
    interfaces at (nearly) the same places inside their cells as the ``reference`` layout.

    With sharp interfaces (even subpixel-averaged) the second-order error is
    ``C(phi) h^2``, its coefficient a function of the fractional positions phi of the
    interfaces in their cells: a film's error jumps by a factor of several between grids
    a few per cent apart.  Richardson's procedure assumes one C for all three grids; it
    holds on grids that are similar in this sense (P. J. Roache, Verification and
    Validation in Computational Science and Engineering, Hermosa, 1998, ch. 5:
    systematic, geometrically similar refinement).  The score of a candidate is the
    largest circular distance between its fractions and the reference's
    (:func:`interface_fractions`); among the candidates within 0.02 of the best score
    the one nearest ``target_m`` is taken.
    """
    family = get_family(spec.family)
    window = SIMILAR_WINDOW if window is None else window
    if vertices_m is None:
        polys = family.polygons(spec.sample, spec.context, reference)
        vertices_m = (np.concatenate([np.asarray(p.vertices_m) for p in polys])
                      if polys else np.zeros((0, 2)))
    ref = interface_fractions(reference.grid, vertices_m)
    best = []
    seen = set()
    for h in np.geomspace(target_m * (1 - window), target_m * (1 + window),
                          SIMILAR_CANDIDATES):
        g = family.layout(spec.sample, spec.context, float(h)).grid
        if g.dx in seen:
            continue
        seen.add(g.dx)
        frac = interface_fractions(g, vertices_m)
        ok = ~(np.isnan(ref) | np.isnan(frac))
        d = np.abs(frac[ok] - ref[ok])
        score = float(np.max(np.minimum(d, 1.0 - d))) if ok.any() else 0.0
        best.append((score, abs(math.log(g.dx / target_m)), float(h)))
    if not best:
        return target_m
    low = min(b[0] for b in best)
    return min((b for b in best if b[0] <= low + 0.02), key=lambda b: b[1])[2]


def stored_pixel_m(spec: Spec) -> tuple[float, float] | None:
    """The (x, z) pitch of the spec's stored pixel density (``[sample.freeform]
    density_file``), or None when it holds none."""
    fr = getattr(spec.sample, "freeform", None)
    if fr is None or getattr(fr, "density", None) is None or fr.pixel_m is None:
        return None
    return (float(fr.pixel_m[0]), float(fr.pixel_m[1]))


def pixel_aligned_steps(spec: Spec, layout) -> list[float] | None:
    """The two coarser error-estimate steps for a spec that holds a stored pixel density
    (``[sample.freeform] density_file``) evaluated on a grid of step ``pitch / k``,
    k >= 3 an integer, whose cells tile the pixels: ``pitch / (k - 1)`` and
    ``pitch / (k - 2)``.  On these grids the pattern is placed pixel for pixel, the same
    structure on all three (geometric similarity; P. J. Roache, Verification and
    Validation in Computational Science and Engineering, Hermosa, 1998, ch. 5), where
    grids at 1.5 h and 2.25 h would resample it into different structures whose
    differences say little about the discretization error.  None when the spec holds no
    stored pattern, k < 3, or the grid does not tile the pixels."""
    pixel = stored_pixel_m(spec)
    if pixel is None:
        return None
    g = layout.grid
    px, pz = pixel
    k = round(px / g.dx)
    if k < 3 or abs(k * g.dx - px) > 1e-6 * px or abs(k * g.dz - pz) > 1e-6 * pz:
        return None
    frac = interface_fractions(g, np.asarray([spec.sample.freeform.origin_m], dtype=float))
    frac = frac[~np.isnan(frac)]
    if np.any(np.minimum(frac, 1.0 - frac) > 1e-4):
        return None
    return [px / (k - 1), px / (k - 2)]


def angular_frequency(wavelength_m: float) -> float:
    return 2.0 * math.pi * C0 / wavelength_m


def choose_method(spec: Spec) -> str:
    """``"layers"``, ``"fdfd"`` or ``"fmm"`` for this spec (see the module docstring)."""
    from designer import holes

    if spec.solver.method == "fmm" or holes.is_fmm_sample(spec) or (
            spec.solver.method == "auto" and holes.out_of_plane(spec)):
        return "fmm"
    family = get_family(spec.family)
    layered = family.layer_stack(spec.sample, spec.context) is not None
    if spec.solver.method == "layers":
        if not layered:
            from designer.errors import SpecError

            raise SpecError(spec.source, "solver.method", "this sample is not a planar layer "
                            "stack; use \"fdfd\" or \"auto\"", "layers")
        return "layers"
    if spec.solver.method == "fdfd":
        return "fdfd"
    return "layers" if layered else "fdfd"


CELLS_PER_DECAY_LENGTH = 6      # cells per evanescent decay length beta gamma lambda / 2 pi
CELLS_PER_SURFACE_DISTANCE = 4  # cells between the electron and the nearest surface
FINEST_DEFAULT_FRACTION = 0.25  # the default step is at least this share of the wavelength rule


def electron_surface_distance(spec: Spec, layout=None) -> float | None:
    """Distance (m) from an x-path to the nearest material, or None (paths along z,
    or no material).  The path is the line z = z_e; the polygons of the cross-section
    are convex pieces, so the distance is the smallest |z_vertex - z_e| of the pieces
    that do not straddle the line."""
    family = get_family(spec.family)
    if layout is None:
        layout = family.layout(spec.sample, spec.context, spec.laser.wavelength_m / 20.0)
    if layout.path.direction != "x":
        return None
    z_e = layout.path.z_m
    best = None
    for poly in family.polygons(spec.sample, spec.context, layout):
        z = np.asarray(poly.vertices_m)[:, 1]
        d = 0.0 if z.min() <= z_e <= z.max() else float(np.min(np.abs(z - z_e)))
        best = d if best is None else min(best, d)
    return best


def default_grid_step(spec: Spec, values: dict | None = None) -> float:
    """Default FDFD grid step (m): the smallest of

    * the wavelength rule: DEFAULT_CELLS_PER_WAVELENGTH cells per wavelength in the
      densest material (solvers.fdfd.spacing_for), a free-form region counted as its
      solid material whatever its density;
    * for paths along x, the evanescent decay length of the synchronous harmonic,
      ``beta gamma lambda / 2 pi`` (e.g. R. J. England et al., Rev. Mod. Phys. 86, 1337,
      2014), over CELLS_PER_DECAY_LENGTH, and the electron's distance to the nearest
      surface over CELLS_PER_SURFACE_DISTANCE: the coupling falls off on that scale,
      and the grid's second-order error in where an interface sits below the electron
      shows as a jitter periodic in the cell size when a dimension is scanned;

    but not finer than FINEST_DEFAULT_FRACTION of the wavelength rule (an electron a
    nanometre from a surface must not make the default grid explode; give
    ``[solver] grid_step_nm`` for more).
    """
    from designer.families.base import decay_length
    from solvers.fdfd import spacing_for

    family = get_family(spec.family)
    probe = family.layout(spec.sample, spec.context, spec.laser.wavelength_m / 20.0)
    eps_x, eps_z = family.permittivity(spec.sample, probe, values)
    eps_max = max(float(np.max(np.abs(np.asarray(eps_x)))),
                  float(np.max(np.abs(np.asarray(eps_z)))))
    region = getattr(spec.sample, "freeform", None)
    if region is not None:
        # a free-form region can put its solid anywhere: a grey start must not coarsen
        # the grid the optimized (solid) pattern is solved on
        eps_max = max(eps_max, abs(complex(region.material.eps)))
    wave = spacing_for(spec.laser.wavelength_m, eps_max)
    h = wave
    if probe.path.direction == "x":
        h = min(h, decay_length(spec.context) / CELLS_PER_DECAY_LENGTH)
        d = electron_surface_distance(spec, probe)
        if d:
            h = min(h, d / CELLS_PER_SURFACE_DISTANCE)
    return max(h, FINEST_DEFAULT_FRACTION * wave)


def laser_footprint_radius(spec: Spec, angle_rad: float) -> float | None:
    """Radius (1/e² intensity) of the laser spot's footprint along an x-path, or None.

    ``[laser] spot_radius_um`` is the radius across the beam; on a surface whose
    normal makes the angle θ with the beam the footprint is stretched to w / cos θ.
    The footprint is centred on the interaction length.  Open paths (membranes)
    ignore it: there the spot is much wider than the film is thick.
    """
    w = spec.laser.spot_radius_m
    if w is None:
        return None
    return w / max(math.cos(angle_rad), 1e-3)


def dephasing_length(spec: Spec, angle_rad: float) -> float:
    """ℓ_φ = 1/|k cos θ − ω/v| (m): how far the electron travels along z while a
    vacuum plane wave at angle θ from z slips one radian in phase against it."""
    beta = spec.beam.beta
    k = 2.0 * math.pi / spec.laser.wavelength_m
    return 1.0 / (k * abs(1.0 / beta - math.cos(angle_rad)))


def open_path_length(spec: Spec, angle_rad: float, thickness_m: float) -> float:
    """L = d + 2ℓ_φ: the length over which an electron crossing a film of thickness d
    earns its coupling (module docstring); the gradient of open paths is |I|/L."""
    return thickness_m + 2.0 * dephasing_length(spec, angle_rad)


OPEN_PATH_LENGTH_RULE = ("film thickness + one dephasing length 1/|k cos(angle) - omega/v| "
                         "each side, where the vacuum fields add to the coupling")


# -- one FDFD run --------------------------------------------------------------------

def fdfd_problem(layout, omega: float):
    """The FDFD problem of a family's simulation layout (incident field 1 V/m)."""
    from solvers.fdfd import FdfdProblem, PlaneWave, Pml

    source = PlaneWave(angle_rad=layout.angle_rad, eps_incidence=layout.eps_incidence,
                       side=layout.from_side, amplitude_V_per_m=1.0,
                       z_source=layout.z_source_m)
    return FdfdProblem(grid=layout.grid, omega=omega,
                       pml=Pml(cells_x=layout.pml_cells_x, cells_z=layout.pml_cells_z),
                       source=source)


def corner_exclusion_mask(layout, polygons, radius_m: float) -> np.ndarray:
    """True at cell centres closer than ``radius_m`` to a polygon corner inside the cell.

    Vertices on the periodic boundary or outside the grid are not corners of the
    physical structure (the polygon continues in the next period or into the PML).
    """
    grid = layout.grid
    keep = np.zeros(grid.shape, dtype=bool)
    if radius_m <= 0:
        return keep
    xc, zc = grid.hy_coords()
    X, Z = np.meshgrid(xc, zc, indexing="ij")
    tol = 1e-3 * grid.dx
    x_lo, x_hi = grid.x0, grid.x0 + grid.size_x
    z_lo, z_hi = grid.z0, grid.z0 + grid.size_z
    for poly in polygons:
        for vx, vz in np.asarray(poly.vertices_m):
            if layout.pml_cells_x == 0 and (abs(vx - x_lo) < tol or abs(vx - x_hi) < tol):
                continue
            if not (x_lo - tol <= vx <= x_hi + tol and z_lo <= vz <= z_hi):
                continue
            if layout.pml_cells_x == 0:
                dxp = (X - vx + 0.5 * grid.size_x) % grid.size_x - 0.5 * grid.size_x
            else:
                dxp = X - vx
            keep |= dxp**2 + (Z - vz) ** 2 < radius_m**2
    return keep


def laterally_uniform(spec: Spec) -> bool:
    """True for planar samples (a layer stack): their Bloch cell is a few grid cells
    chosen by the solver, not a period of the structure."""
    return get_family(spec.family).layer_stack(spec.sample, spec.context) is not None


def path_cells(length_m: float | None, period_m: float | None, *, exact: bool):
    """How many Bloch cells an x-path of ``length_m`` covers: whole periods of a
    structure (``round(L / period)``, at least 1), or for a laterally uniform sample
    (``exact``) the fractional count ``L / cell``.  The lattice sum
    ``(e^{i delta N cell} - 1) / (e^{i delta cell} - 1)`` times the one-cell integral is then
    the integral over exactly L of the cell's single Floquet wave, so the result does not
    jump with the rounding of L to whole cells (a jitter of up to cell / 2L that is not a
    discretization error and spoils the grid-convergence estimate)."""
    if length_m is None or not period_m:
        return 1
    if exact:
        return length_m / period_m
    return max(1, int(round(length_m / period_m)))


def run_fdfd(spec: Spec, grid_step_m: float, *, force: bool = False,
             values: dict | None = None, with_map: bool = True) -> PathCoupling:
    """Solve the spec's sample once on the Yee grid and integrate along its path."""
    from solvers import coupling
    from solvers.fdfd import solve

    family = get_family(spec.family)
    layout = family.layout(spec.sample, spec.context, grid_step_m)
    eps_x, eps_z = family.permittivity(spec.sample, layout, values)
    omega = angular_frequency(spec.laser.wavelength_m)
    fields = solve(fdfd_problem(layout, omega), np.asarray(eps_x), np.asarray(eps_z),
                   force=force)
    v = spec.beam.velocity_m_per_s
    path = layout.path
    map_x = map_i = map_z = map_zi = spot_z = spot_zi = spot_fraction = None
    if path.direction == "x":
        g = layout.grid
        rows = coupling.vacuum_ex_rows(np.asarray(eps_x), np.asarray(eps_z),
                                       math.floor((path.z_m - g.z0) / g.dz),
                                       layout.pml_cells_z)
        radius = laser_footprint_radius(spec, layout.angle_rad)
        n_periods = path_cells(path.length_m, layout.period_m,
                               exact=radius is None and laterally_uniform(spec))
        spot = None
        if radius is not None:
            g = layout.grid
            spot = (g.x0 + 0.5 * g.dx + 0.5 * n_periods * layout.period_m, radius)
        integral, _ = coupling.coupling_along_x(fields, path.z_m, v, n_periods=n_periods,
                                                spot=spot, rows=rows)
        if with_map:
            def along(z):
                return complex(coupling.coupling_along_x(fields, z, v, n_periods=n_periods,
                                                         spot=spot, rows=rows)[0])
            gap = clear_gap(layout)
            if gap is not None:
                map_z = np.linspace(gap[0], gap[1], 48)
                map_zi = np.array([along(z) for z in map_z])
                if spec.path.electron_spot_m:
                    spot_z, spot_fraction = spot_heights(path.z_m, spec.path.electron_spot_m,
                                                         gap)
                    spot_zi = np.array([along(z) for z in spot_z])
    else:
        g = layout.grid
        # the Floquet planes must sit on Ex rows; move them outward onto the nearest row
        z1 = g.z0 + math.floor((path.z_below_m - g.z0) / g.dz + 1e-9) * g.dz
        z2 = g.z0 + math.ceil((path.z_above_m - g.z0) / g.dz - 1e-9) * g.dz
        args = (z1, z2, path.eps_below, path.eps_above, v)
        integral = complex(np.asarray(coupling.coupling_along_z(fields, path.x_m, *args))[0])
        if with_map:
            map_x = layout.grid.x0 + layout.grid.size_x * (np.arange(32) + 0.5) / 32
            map_i = np.asarray(coupling.coupling_along_z(fields, map_x, *args))
    polygons = family.polygons(spec.sample, spec.context, layout)
    excluded = corner_exclusion_mask(layout, polygons, spec.fabrication.corner_radius_m)
    mask = np.asarray(layout.material_mask) & ~excluded
    e_max = float(fields.max_field_in(mask)) if mask.any() else None
    return PathCoupling(integral_V=complex(integral), max_field_in_material=e_max,
                        grid_step_m=layout.grid.dx, fields=fields, layout=layout,
                        map_x_m=map_x, map_integral_V=map_i, map_z_m=map_z,
                        map_z_integral_V=map_zi, spot_z_m=spot_z, spot_z_integral_V=spot_zi,
                        spot_fraction=spot_fraction)


def clear_gap(layout) -> tuple[float, float] | None:
    """(lowest, highest) height of the vacuum gap around an x-path, or None.

    An Ex row ``z0 + k dz`` is clear when the cells on both sides of it hold no
    material anywhere along the period and it lies outside the PML; the contiguous
    clear run containing the path's row is the gap.  Electrons outside it would strike
    the structure (or leave the simulated region).
    """
    g = layout.grid
    mask = np.asarray(layout.material_mask, dtype=bool)
    n = layout.pml_cells_z
    row_has = mask.any(axis=0)
    k_path = int(round((layout.path.z_m - g.z0) / g.dz))
    clear = np.zeros(g.nz, dtype=bool)
    clear[n + 1:g.nz - n] = ~(row_has[n:g.nz - n - 1] | row_has[n + 1:g.nz - n])
    if not (0 <= k_path < g.nz) or not clear[k_path]:
        return None
    lo = hi = k_path
    while lo - 1 >= 0 and clear[lo - 1]:
        lo -= 1
    while hi + 1 < g.nz and clear[hi + 1]:
        hi += 1
    return g.z0 + lo * g.dz, g.z0 + hi * g.dz


def spot_heights(z_centre: float, fwhm: float, gap: tuple[float, float], n: int = 41):
    """Heights sampling a Gaussian electron spot (current-density FWHM ``fwhm``) to
    ±3σ, clipped to the clear ``gap``; and the share of the spot's current inside the
    gap (the rest would strike the structure).  Returns ``(z, fraction)``."""
    from scipy.special import erf

    sigma = fwhm / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    lo, hi = max(gap[0], z_centre - 3 * sigma), min(gap[1], z_centre + 3 * sigma)
    root2 = sigma * math.sqrt(2.0)
    fraction = 0.5 * (erf((gap[1] - z_centre) / root2) - erf((gap[0] - z_centre) / root2))
    return np.linspace(lo, hi, n), float(fraction)


def spot_weights(z: np.ndarray, z_centre: float, fwhm: float) -> np.ndarray:
    """Normalized Gaussian weights of the electron current at heights ``z`` (uniform)."""
    sigma = fwhm / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    w = np.exp(-0.5 * ((np.asarray(z) - z_centre) / sigma) ** 2)
    return w / w.sum()


# -- the exact layer-stack run -------------------------------------------------------

def run_layers(spec: Spec) -> PathCoupling:
    """Exact transfer-matrix solution and coupling for layered samples."""
    from solvers import layers

    family = get_family(spec.family)
    stack = family.layer_stack(spec.sample, spec.context)
    layout = family.layout(spec.sample, spec.context, spec.laser.wavelength_m / 20.0)
    omega = angular_frequency(spec.laser.wavelength_m)
    sol = layers.solve_plane_wave(np.asarray(stack.eps), np.asarray(stack.z_interfaces),
                                  omega, layout.angle_rad, incidence=layout.from_side)
    v = spec.beam.velocity_m_per_s
    path = layout.path
    map_z = map_zi = spot_z = spot_zi = spot_fraction = None
    if path.direction == "z":
        integral = complex(np.asarray(layers.coupling_normal(sol, path.x_m, v)))
    else:
        length = path.length_m
        if length is None:
            raise ValueError("a path along x needs an interaction length")
        radius = laser_footprint_radius(spec, layout.angle_rad)
        if radius is None:
            factor = complex(np.asarray(layers.detuning_integral(
                sol.kx - sol.omega / v, length)))
        else:
            from solvers.coupling import gaussian_envelope_integral

            factor = gaussian_envelope_integral(complex(np.asarray(sol.kx - sol.omega / v)),
                                                length, radius)
        ex, _ = layers.coupling_parallel(sol, path.z_m, v)
        integral = complex(np.asarray(ex)) * factor
        top = float(np.asarray(stack.z_interfaces)[-1])
        decay = 1.0 / max(float(np.imag(np.asarray(sol.kz)[-1])), 1e-30)
        gap = (top, top + 4.0 * min(decay, 10 * spec.laser.wavelength_m))
        map_z = np.linspace(gap[0], gap[1], 48)

        def along(z):
            return np.asarray(layers.stack_fields(sol, 0.0, z)[0]) * factor
        map_zi = along(map_z)
        if spec.path.electron_spot_m:
            spot_z, spot_fraction = spot_heights(path.z_m, spec.path.electron_spot_m,
                                                 (top, math.inf))
            spot_zi = along(spot_z)
    return PathCoupling(integral_V=integral, max_field_in_material=_stack_e_max(stack, sol),
                        grid_step_m=None, stack=sol, layout=layout, map_z_m=map_z,
                        map_z_integral_V=map_zi, spot_z_m=spot_z, spot_z_integral_V=spot_zi,
                        spot_fraction=spot_fraction)


def _stack_e_max(stack, sol) -> float | None:
    """Largest |E| inside the material layers (and within 2 wavelengths of a material
    half-space's surface), sampled densely; the stack is planar, so no corner rule."""
    from solvers import layers

    z_if = list(stack.z_interfaces)
    eps = list(stack.eps)
    lam = 2 * math.pi * C0 / float(sol.omega)
    segments = []
    for j, e in enumerate(eps):
        if abs(e - 1.0) < 1e-12:
            continue
        lo = z_if[j - 1] if j > 0 else z_if[0] - 2 * lam
        hi = z_if[j] if j < len(z_if) else z_if[-1] + 2 * lam
        if hi > lo:
            segments.append(np.linspace(lo, hi, 801)[1:-1])
    if not segments:
        return None
    z = np.concatenate(segments)
    ex, ez, _ = layers.stack_fields(sol, 0.0, z)
    return float(np.max(np.sqrt(np.abs(np.asarray(ex)) ** 2 + np.abs(np.asarray(ez)) ** 2)))


# -- the whole evaluation ------------------------------------------------------------

def evaluate(spec: Spec, *, grid_step_m: float | None = None, refine: bool | None = None,
             progress: Callable[[str], None] | None = None) -> Evaluation:
    """Coupling figures of the spec's sample (see the module docstring)."""
    say = progress or (lambda message: None)
    method = choose_method(spec)
    family = get_family(spec.family)
    angle = family.laser_angle(spec.sample, spec.context)
    omega = angular_frequency(spec.laser.wavelength_m)
    refine = spec.solver.refine if refine is None else refine
    error_info = {}
    fmm_extra = {}
    holes_e_max_rule = None
    if method == "fmm":
        from designer import holes

        holes_e_max_rule = holes.e_max_rule
        run, study, sol = holes.run_fmm(spec, refine=refine, progress=say)
        rel_error = study.relative_error
        solver = "fmm"
        fmm_extra = dict(fourier_orders=study.chosen, order_study=study,
                         spot_integral_V=holes.spot_average(spec, sol))
    elif method == "layers":
        say("solving the layer stack (exact)")
        run = run_layers(spec)
        rel_error = 0.0
        solver = "layers"
    else:
        h = grid_step_m or spec.solver.grid_step_m or default_grid_step(spec)
        say(f"FDFD solve, requested step {h * 1e9:.3g} nm (rounded to whole cells per period)")
        run = run_fdfd(spec, h, force=spec.solver.force)
        rel_error = None
        if refine:
            # a finer and a coarser grid around h: the error of the result at h is
            # measured against the finer pair's extrapolation, so it includes where this
            # grid's interfaces happen to fall in their cells (three_grid_estimate, at=1);
            # a stored pixel pattern: two coarser grids that tile its pixels (at=0)
            aligned = pixel_aligned_steps(spec, run.layout)
            around = []
            for step in aligned or [similar_step(spec, run.layout, f * run.grid_step_m)
                                    for f in ERROR_GRID_FACTORS]:
                say(f"FDFD solve, requested step {step * 1e9:.3g} nm (error estimate)")
                around.append(run_fdfd(spec, step, force=True, with_map=False))
            trio = (run, *around) if aligned else (around[0], run, around[1])
            at = 0 if aligned else 1
            steps = [r.grid_step_m for r in trio]
            if abs(run.integral_V) > 0 and steps[0] < steps[1] < steps[2]:
                values = [r.integral_V for r in trio]
                est = three_grid_estimate(values, steps, at=at)
                mag = three_grid_estimate([abs(complex(v)) for v in values], steps, at=at)
                rel_error = est.relative_error
                note = est.note
                if aligned:
                    note += ("; grids whose steps divide the stored pattern's pixel, so "
                             "all three hold the same pattern")
                error_info = dict(error_order=est.observed_order,
                                  error_order_used=est.order_used,
                                  error_grids_m=tuple(steps), error_note=note,
                                  magnitude_error=mag.relative_error,
                                  magnitude_error_note=mag.note)
        solver = "fdfd"
    layout = run.layout
    eps_inc = complex(layout.eps_incidence)
    e0 = spec.laser.peak_field_in(math.sqrt(abs(eps_inc.real)) if eps_inc.real > 0 else 1.0)
    interaction = None
    gradient_length = None
    if layout.path.direction == "x":
        interaction = layout.path.length_m
        if interaction is not None and layout.period_m and solver == "fdfd":
            interaction = path_cells(
                interaction, layout.period_m,
                exact=(laser_footprint_radius(spec, angle) is None
                       and laterally_uniform(spec))) * layout.period_m
        gradient_length = interaction
    else:
        bottom, top = layout.structure_z_m
        gradient_length = open_path_length(spec, angle, max(top - bottom, 0.0))
    if solver == "layers":
        e_max_rule = "planar stack: no corners"
    elif solver == "fmm":
        e_max_rule = holes_e_max_rule(spec, fmm_extra["fourier_orders"])
    else:
        e_max_rule = f"{CORNER_RULE} ({spec.fabrication.corner_radius_m * 1e9:g} nm)"
    return Evaluation(spec=spec, solver=solver, angle_rad=angle, peak_field_V_per_m=e0,
                      omega=omega, run=run, relative_error=rel_error,
                      interaction_length_m=interaction, gradient_length_m=gradient_length,
                      e_max_rule=e_max_rule,
                      **fmm_extra, **error_info)


def coupling_figures(ev: Evaluation) -> dict:
    """The ``coupling`` block of the JSON contract, at the spec's peak field."""
    from solvers.coupling import beta_from_integral

    e0 = ev.peak_field_V_per_m
    integral = ev.run.integral_V * e0
    beta = abs(complex(beta_from_integral(integral, ev.omega)))
    gradient = kappa = damage = None
    e_max = None if ev.run.max_field_in_material is None else ev.run.max_field_in_material * e0
    if ev.gradient_length_m:
        gradient = abs(integral) / ev.gradient_length_m
        kappa = gradient / e0
        if e_max:
            damage = gradient / e_max
    out = {
        "integral_V": [integral.real, integral.imag],
        "beta_c": beta,
        "beta_c_per_field_m_per_V": beta / e0,
        "interaction_length_m": ev.interaction_length_m,
        "gradient_length_m": ev.gradient_length_m,
        "gradient_length_rule": ("interaction length" if ev.run.layout.path.direction == "x"
                                 else OPEN_PATH_LENGTH_RULE),
        "gradient_V_per_m": gradient,
        "structure_factor": kappa,
        "max_field_in_material_V_per_m": e_max,
        "damage_factor": damage,
        "relative_error_estimate": ev.relative_error,
        "error_estimate": {"observed_order": ev.error_order,
                           "order_used": ev.error_order_used,
                           "grid_steps_m": (list(ev.error_grids_m) if ev.error_grids_m
                                            else None),
                           "note": ev.error_note if ev.solver == "fdfd" else
                           "exact layer-stack solution"},
        # |I| alone (every figure but the phase depends on the magnitude only)
        "magnitude_error_estimate": (0.0 if ev.solver == "layers" else ev.magnitude_error),
        "magnitude_error_note": (ev.magnitude_error_note if ev.solver == "fdfd" else None),
        "max_field_rule": ev.e_max_rule,
        "classical_max_energy_gain_eV": abs(integral),
    }
    if ev.solver == "fmm":
        out["fourier_orders"] = ev.fourier_orders
        st = ev.order_study
        out["order_convergence"] = {"orders": list(st.orders),
                                    "beta_c": [abs(complex(beta_from_integral(i * e0, ev.omega)))
                                               for i in st.integrals_V]}
    run = ev.run
    if run.map_z_m is not None:
        betas = np.abs(np.asarray(beta_from_integral(run.map_z_integral_V * e0, ev.omega)))
        out["height_map"] = {"z_m": run.map_z_m, "beta_c": betas,
                             "path_z_m": run.layout.path.z_m}
    if run.spot_z_m is not None:
        spot = ev.spec.path.electron_spot_m
        betas = np.abs(np.asarray(beta_from_integral(run.spot_z_integral_V * e0, ev.omega)))
        w = spot_weights(run.spot_z_m, run.layout.path.z_m, spot)
        out["spot_average"] = {"fwhm_m": spot, "mean_beta_c": float(np.sum(w * betas)),
                               "rms_beta_c": math.sqrt(float(np.sum(w * betas**2))),
                               "fraction_in_clear_gap": run.spot_fraction}
    if run.map_x_m is not None:
        betas = np.abs(np.asarray(beta_from_integral(run.map_integral_V * e0, ev.omega)))
        out["map"] = {"x_m": run.map_x_m, "beta_c": betas}
        spot = ev.spec.path.electron_spot_m
        if spot and ev.spot_integral_V is not None:
            to_beta = abs(complex(beta_from_integral(e0, ev.omega)))
            mean, rms = ev.spot_integral_V
            out["spot_average"] = {"fwhm_m": spot, "mean_beta_c": mean * to_beta,
                                   "rms_beta_c": rms * to_beta}
        elif spot:
            from solvers.coupling import spot_average

            mean_abs, mean_sq = spot_average(run.map_x_m, betas, ev.run.layout.path.x_m, spot,
                                             period=ev.run.layout.grid.size_x)
            out["spot_average"] = {"fwhm_m": spot, "mean_beta_c": mean_abs,
                                   "rms_beta_c": math.sqrt(mean_sq)}
    return out


def evaluation_json(ev: Evaluation) -> dict:
    """The full ``velomatch evaluate --json`` object (contract keys first)."""
    from designer.cautions import cautions
    from designer.provenance import provenance
    from designer.resolved import explanations, resolved_sample

    spec = ev.spec
    out = {
        "electron": {"voltage_V": spec.beam.voltage_V, "beta": spec.beam.beta,
                     "gamma": spec.beam.gamma,
                     "velocity_m_per_s": spec.beam.velocity_m_per_s},
        "laser": {"wavelength_m": spec.laser.wavelength_m,
                  "angle_deg": math.degrees(ev.angle_rad),
                  "peak_field_V_per_m": ev.peak_field_V_per_m,
                  "from": spec.laser.from_side},
        "sample": resolved_sample(ev),
        "coupling": coupling_figures(ev),
        "cautions": cautions(ev.peak_field_V_per_m),
        "notes": explanations(ev),
        "plane": _plane_facts(spec),
        "design_rules": _design_rules(spec, ev),
        "provenance": provenance(spec.sha256, solver=ev.solver,
                                 grid_step_m=ev.run.grid_step_m),
    }
    if ev.solver == "fmm":
        out["laser"]["azimuth_deg"] = math.degrees(spec.laser.azimuth_rad)
        out["laser"]["polarization_deg"] = math.degrees(spec.laser.polarization_rad)
        out["provenance"]["fourier_orders"] = ev.fourier_orders
    return out


def _plane_facts(spec: Spec) -> dict:
    from designer.families import region

    info = getattr(spec.sample, "plane", None) or region.PlaneInfo()
    return region.plane_facts(info, spec.context)


def _design_rules(spec: Spec, ev: Evaluation) -> dict:
    """The design-rule verdict (designer.fabrication.check_design), on the grid this
    evaluation used for a free-form pattern."""
    from designer.fabrication import check_design

    step = ev.run.grid_step_m if getattr(spec.sample, "freeform", None) is not None else None
    return check_design(spec, grid_step_m=step).to_dict()


def evaluate_raw(raw: dict, *, source: str = "<spec>", base_dir=None, **options) -> dict:
    """Parse a raw spec tree and return the ``evaluate`` JSON object (for sweeps)."""
    from designer.io import require_finite

    spec = parse_spec(raw, source=source, base_dir=base_dir)
    return require_finite(evaluation_json(evaluate(spec, **options)), source)
