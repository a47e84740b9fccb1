"""Membranes through the Fourier modal method: the one place that calls ``solvers.fmm``.

A membrane spec (film, slit or hole pattern, extra layers, substrate) becomes a
stack of layers periodic in x and y (``fmm_geometry``); ``coupling`` solves it for
one plane wave and integrates the electron coupling exactly along the straight path
(``solvers.fmm.coupling_integral``: closed form per layer and analytic tails in the
outer media).  ``run_fmm`` is what ``designer.evaluate`` calls for ``method = "fmm"``.

Conventions (SI inside)
    z is the stack normal, z = 0 at the bottom of the lowest layer; the film's bottom
    face is at ``membrane.film_bottom_m``.  The lattice origin is a hole centre.  The
    incidence direction has polar angle θ (``[laser] angle_deg``) and azimuth φ
    (``azimuth_deg``, from x toward y); the polarization angle ψ is 0 for p (E in the
    plane of incidence) and π/2 for s.  The path direction is
    ŝ = (sin τ cos χ, sin τ sin χ, cos τ) with the sample tilt τ (``[path] tilt_deg``)
    and its azimuth χ (``tilt_azimuth_deg``); the path crosses the film's mid-plane at
    ``(x_nm, y_nm)``, and the phase of I refers to that crossing.

Fourier orders
    Harmonics |m|, |n| <= N ((2N + 1)^2 of them).  With ``[solver] fourier_orders = N``
    the coupling is reported at N and its error estimated from raising the count to
    N + 2: ``|I_{N+2} - I_N| / |I_N|``.  Automatic (default): N = 3, 5, 7, ... until
    that change falls below ``AUTO_TOLERANCE`` or N reaches ``AUTO_MAX_ORDERS``; the
    value at the last N is reported with the last change as its estimate.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

AUTO_TOLERANCE = 0.01
AUTO_START_ORDERS = 3
AUTO_MAX_ORDERS = 11
ORDER_STEP = 2
MAP_POINTS = 24


def _fmm():
    from solvers import fmm

    return fmm


# ------------------------------------------------------------------ geometry
def is_fmm_sample(spec) -> bool:
    """True for samples only the Fourier modal method can solve (hole lattices)."""
    return getattr(spec.sample, "holes", None) is not None


def out_of_plane(spec) -> bool:
    """True when the laser or the path leaves the x-z plane (azimuth, s or mixed
    polarization, tilt, a lateral y)."""
    return bool(spec.laser.azimuth_rad or spec.laser.polarization_rad
                or spec.path.tilt_rad or (spec.path.y_m or 0.0))


def fmm_geometry(params, values: dict | None = None):
    """``(lattice, layers bottom to top, eps_below, eps_above)`` of a membrane.

    ``values`` (spec units, may hold JAX tracers) override ``thickness_nm``,
    ``period_nm``, ``hole_radius_nm`` / ``hole_axes_nm.0`` / ``hole_axes_nm.1``.
    A film gets a square lattice of one wavelength's period (any period gives the
    same specular answer; the FMM of a uniform layer couples no orders).
    """
    from designer.families import membrane

    fmm = _fmm()
    v = dict(membrane._spec_values(params))
    if values:
        v.update(values)
    t = v["thickness_nm"] * 1e-9
    eps_below, rows, eps_above = membrane.stack_layers(params, thickness_m=t)
    h = params.holes
    if h is not None:
        P = v["period_nm"] * 1e-9
        if h.circular:
            a = b = v["hole_radius_nm"] * 1e-9
        else:
            a, b = v["hole_axes_nm.0"] * 1e-9, v["hole_axes_nm.1"] * 1e-9
        a2 = (0.0, P) if h.lattice == "square" else (0.5 * P, 0.5 * math.sqrt(3.0) * P)
        lattice = fmm.Lattice(a1=(P, 0.0), a2=a2)
        if h.circular:
            shapes = (fmm.Circle(center=(0.0, 0.0), radius=a),)
        else:
            shapes = (fmm.Ellipse(center=(0.0, 0.0), semi_axes=(a, b), angle=h.angle_rad),)
        film = lambda th: fmm.PatternedLayer(  # noqa: E731
            thickness=th, eps_background=params.material.eps, shapes=shapes,
            eps_shapes=(1.0 + 0j,))
    elif params.pattern == "slits":
        P = params.period_m
        lattice = fmm.Lattice(a1=(P, 0.0), a2=(0.0, P))
        shapes = tuple(fmm.Slit(center=v[f"slit_centers_nm.{j}"] * 1e-9,
                                width=v[f"slit_widths_nm.{j}"] * 1e-9)
                       for j in range(len(params.slit_widths_m)))
        film = lambda th: fmm.PatternedLayer(  # noqa: E731
            thickness=th, eps_background=params.material.eps, shapes=shapes,
            eps_shapes=(1.0 + 0j,) * len(shapes))
    else:
        P = params.wavelength_m
        lattice = fmm.Lattice(a1=(P, 0.0), a2=(0.0, P))
        film = lambda th: fmm.UniformLayer(thickness=th, eps=params.material.eps)  # noqa: E731
    layers = [film(th) if e == "film" else fmm.UniformLayer(thickness=th, eps=e)
              for th, e in rows]
    return lattice, layers, eps_below, eps_above


def path_direction(spec) -> tuple[float, float, float]:
    """Unit vector of the electron's motion (see the module docstring)."""
    tau, chi = spec.path.tilt_rad, spec.path.tilt_azimuth_rad
    return (math.sin(tau) * math.cos(chi), math.sin(tau) * math.sin(chi), math.cos(tau))


def path_point(spec, x_m=None, y_m=None):
    """(x, y) where the path crosses the film's mid-plane (default: the spec's
    ``[path] x_nm, y_nm``; 0 when not given)."""
    x = (spec.path.x_m or 0.0) if x_m is None else x_m
    y = (spec.path.y_m or 0.0) if y_m is None else y_m
    return (x, y)


def film_mid_z(spec, thickness_m=None):
    """z of the film's mid-plane in the solver's frame (lowest layer from z = 0)."""
    from designer.families import membrane

    t = spec.sample.thickness_m if thickness_m is None else thickness_m
    return membrane.film_bottom_m(spec.sample) + 0.5 * t


def solver_orders(spec, n: int):
    """The ``orders`` argument for N: (N, N) for 2D lattices, (N, 0) for slits (1D), 0
    for unpatterned stacks (their harmonics do not couple: one is exact)."""
    if spec.sample.holes is not None:
        return int(n)
    if spec.sample.pattern == "slits":
        return (int(n), 0)
    return 0


# ------------------------------------------------------------------ one solve
def solve(spec, orders: int, values: dict | None = None, *, wavelength_m=None,
          angle_rad=None, azimuth_rad=None):
    """The FMM solution of the spec's membrane for its plane wave (E0 = 1 V/m)."""
    fmm = _fmm()
    lattice, layers, eps_below, eps_above = fmm_geometry(spec.sample, values)
    lam = spec.laser.wavelength_m if wavelength_m is None else wavelength_m
    theta = spec.context.angle_rad if angle_rad is None else angle_rad
    phi = spec.laser.azimuth_rad if azimuth_rad is None else azimuth_rad
    return fmm.solve(lattice, layers=layers, eps_below=eps_below, eps_above=eps_above,
                     wavelength=lam, theta=theta, phi=phi,
                     polarization=spec.laser.polarization_rad,
                     orders=solver_orders(spec, orders), incidence=spec.laser.from_side)


def coupling(spec, orders: int, values: dict | None = None, *, point=None, **kw):
    """Coupling integral I (V, complex) for E0 = 1 V/m along the spec's path.

    JAX-traceable in ``values`` and in the keyword overrides of :func:`solve`.
    """
    fmm = _fmm()
    sol = solve(spec, orders, values, **kw)
    t = None if not values or "thickness_nm" not in values else values["thickness_nm"] * 1e-9
    return fmm.coupling_integral(sol, point=path_point(spec) if point is None else point,
                                 direction=path_direction(spec),
                                 velocity=spec.beam.velocity_m_per_s,
                                 z_ref=film_mid_z(spec, t))


# ------------------------------------------------------------------ evaluate
@dataclass(frozen=True)
class OrderStudy:
    """Coupling versus Fourier order count (the convergence behind the estimate)."""

    orders: tuple[int, ...]
    integrals_V: tuple[complex, ...]
    chosen: int
    relative_error: float | None


def order_study(spec, orders: int | None = None, *, refine: bool = True,
                say: Callable[[str], None] = lambda m: None) -> tuple[OrderStudy, object]:
    """Run the order schedule of the module docstring; returns (study, solution at the
    chosen order)."""
    fmm = _fmm()
    point, direction = path_point(spec), path_direction(spec)
    v, z_ref = spec.beam.velocity_m_per_s, film_mid_z(spec)
    done: list[tuple[int, complex, object]] = []

    def at(n):
        o = solver_orders(spec, n)
        count = (2 * n + 1) ** 2 if o == n else (2 * n + 1 if o else 1)
        say(f"Fourier modal solve, orders up to {n} ({count} harmonics)")
        sol = solve(spec, n)
        i = complex(np.asarray(fmm.coupling_integral(sol, point=point, direction=direction,
                                                     velocity=v, z_ref=z_ref)))
        done.append((n, i, sol))
        return i

    def change(a, b):
        return abs(a - b) / abs(b) if abs(b) > 0 else (0.0 if a == b else math.inf)

    if solver_orders(spec, 1) == 0:
        # an unpatterned stack: one harmonic is exact (the estimate is 0)
        at(0)
        study = OrderStudy((0,), (done[0][1],), 0, 0.0)
        return study, done[0][2]
    if orders is not None:
        i0 = at(orders)
        err = None
        if refine:
            err = change(at(orders + ORDER_STEP), i0)
        sol = done[0][2]
        chosen = orders
    else:
        n = AUTO_START_ORDERS
        prev = at(n)
        err = math.inf
        while n + ORDER_STEP <= AUTO_MAX_ORDERS:
            n += ORDER_STEP
            cur = at(n)
            err = change(prev, cur)
            prev = cur
            if err < AUTO_TOLERANCE:
                break
        chosen, sol = done[-1][0], done[-1][2]
        i0 = done[-1][1]
    study = OrderStudy(tuple(d[0] for d in done), tuple(d[1] for d in done), chosen,
                       None if err is None else float(err))
    return study, sol


def run_fmm(spec, *, refine: bool | None = None, with_map: bool = True,
            progress: Callable[[str], None] | None = None):
    """(PathCoupling, OrderStudy) of the spec through the Fourier modal method."""
    from designer.evaluate import PathCoupling
    from designer.families import get_family

    fmm = _fmm()
    say = progress or (lambda m: None)
    refine = spec.solver.refine if refine is None else refine
    study, sol = order_study(spec, spec.solver.fourier_orders, refine=refine, say=say)
    integral = study.integrals_V[study.orders.index(study.chosen)]
    family = get_family(spec.family)
    layout = family.layout(spec.sample, spec.context, spec.laser.wavelength_m / 20.0)
    map_x = map_i = None
    if with_map:
        P = float(layout.period_m or spec.laser.wavelength_m)
        y = spec.path.y_m or 0.0
        map_x = (np.arange(MAP_POINTS) + 0.5) / MAP_POINTS * P - 0.5 * P
        direction, v = path_direction(spec), spec.beam.velocity_m_per_s
        z_ref = film_mid_z(spec)
        map_i = np.array([complex(np.asarray(fmm.coupling_integral(
            sol, point=path_point(spec, x_m=float(x), y_m=y), direction=direction,
            velocity=v, z_ref=z_ref))) for x in map_x])
    e_max = max_field_in_material(spec, sol, study.chosen)
    run = PathCoupling(integral_V=complex(integral), max_field_in_material=e_max,
                       grid_step_m=None, layout=layout, map_x_m=map_x, map_integral_V=map_i,
                       fmm_solution=sol)
    return run, study, sol


# ------------------------------------------------------------------ largest field
E_MAX_SAMPLES = 40        # lateral samples per lattice direction
E_MAX_PLANES_PER_WAVELENGTH = 40   # heights per wavelength in the material (faces included)


def edge_band_m(spec, orders: int) -> float:
    """Width of the band along hole walls left out of the field maximum:
    ``max(corner_radius, P / (2N + 1))``.  Within about one resolution length of the
    truncated series the in-plane field normal to the wall rings (Gibbs), and where the
    wall meets a face the field of a sharp rim is singular; real rims are rounded (the
    corner rule of designer.evaluate)."""
    p = spec.sample
    corner = spec.fabrication.corner_radius_m
    if p.holes is not None:
        return max(corner, p.holes.period_m / (2 * int(orders) + 1))
    if p.pattern == "slits":
        return max(corner, p.period_m / (2 * int(orders) + 1))
    return corner


def e_max_rule(spec, orders: int) -> str:
    """The sampling rule behind the reported largest field (JSON ``max_field_rule``)."""
    return (f"|E| of the Fourier series on {E_MAX_SAMPLES}x{E_MAX_SAMPLES} points per cell "
            f"x {E_MAX_PLANES_PER_WAVELENGTH} heights per wavelength in material; points within "
            f"{edge_band_m(spec, orders) * 1e9:.3g} nm of a hole/slit wall or rim left out "
            "(max(corner_radius, P/(2N+1)): Gibbs ringing of the truncated series and the "
            "singular field at sharp rims)")


def openings(spec, x, y):
    """``(inside, wall)`` at lateral points (m): True where (x, y) is in a hole or slit,
    and the lateral distance to the nearest wall (m; ellipses: ``|rho - 1| min(a, b)``
    with rho the scaled radius, an estimate; unpatterned films: inf)."""
    p = spec.sample
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    inside = np.zeros(x.shape, dtype=bool)
    wall = np.full(x.shape, np.inf)
    h = p.holes
    if h is not None:
        P = h.period_m
        a2 = h.a2
        a, b = h.semi_axes_m
        c, s = math.cos(h.angle_rad), math.sin(h.angle_rad)
        for i in (-1, 0, 1):
            for j in (-1, 0, 1):
                dx, dy = x - (i * P + j * a2[0]), y - j * a2[1]
                u, v = c * dx + s * dy, -s * dx + c * dy
                rho = np.sqrt((u / a) ** 2 + (v / b) ** 2)
                inside |= rho < 1.0
                wall = np.minimum(wall, np.abs(rho - 1.0) * min(a, b))
    elif p.pattern == "slits":
        P = p.period_m
        for w, c in zip(p.slit_widths_m, p.slit_centers_m):
            d = np.abs((x - c + 0.5 * P) % P - 0.5 * P)      # distance to the slit centre
            inside |= d < 0.5 * w
            wall = np.minimum(wall, np.abs(d - 0.5 * w))
    return inside, wall


def cell_points(spec, sol, samples: int = E_MAX_SAMPLES):
    """Lateral sample points (x, y) (m) filling one unit cell of the solution's lattice."""
    a1, a2 = (np.asarray(v, dtype=float) for v in sol.lattice.vectors())
    u = (np.arange(samples) + 0.5) / samples - 0.5
    uu, vv = np.meshgrid(u, u, indexing="ij")
    return (uu * a1[0] + vv * a2[0]).ravel(), (uu * a1[1] + vv * a2[1]).ravel()


def max_field_in_material(spec, sol, orders: int) -> float | None:
    """Largest |E| (per V/m incident) in the material of the stack, sampled on
    ``E_MAX_SAMPLES^2`` lateral points x ``E_MAX_PLANES_PER_WAVELENGTH`` heights per
    wavelength in the medium, in every layer with eps != 1 and in a material half-space
    below down to one wavelength; points within :func:`edge_band_m` of a hole wall (or,
    in the neighbouring layers, of its rim) are left out.  None when no material point remains."""
    from designer.families.membrane import stack_layers
    from solvers.fmm.fields import field_magnitude, medium_bounds

    x, y = cell_points(spec, sol)
    band = edge_band_m(spec, orders)
    hole_pts, wall = openings(spec, x, y)
    _, rows, _ = stack_layers(spec.sample)
    film_j = 1 + len(spec.sample.layers_below)
    z_film = medium_bounds(sol, film_j)
    lam = spec.laser.wavelength_m
    best = None
    for j in range(len(sol.media)):
        zb, zt = medium_bounds(sol, j)
        if j == 0:
            eps = complex(np.asarray(sol.eps_below))
            zb = zt - lam
        elif j == len(sol.media) - 1:
            eps = complex(np.asarray(sol.eps_above))
            zt = zb + lam
        else:
            e = rows[j - 1][1]
            eps = spec.sample.material.eps if e == "film" else complex(e)
        if abs(eps - 1.0) < 1e-12 or zt <= zb:
            continue
        n = abs(np.sqrt(eps))
        z = np.linspace(zb, zt, max(5, math.ceil(E_MAX_PLANES_PER_WAVELENGTH * n * (zt - zb)
                                                 / lam) + 1))
        mag = field_magnitude(sol, j, x, y, z)                 # (Z, P)
        if j == film_j:
            keep = np.broadcast_to(~hole_pts & (wall >= band), mag.shape)
        else:
            # distance to the nearer rim of the patterned layer
            dz = np.minimum(np.abs(z - z_film[0]), np.abs(z - z_film[1]))[:, None]
            keep = np.sqrt(wall[None, :] ** 2 + dz ** 2) >= band
        if keep.any():
            m = float(np.max(mag[keep]))
            best = m if best is None else max(best, m)
    return best


def spot_average(spec, sol):
    """(mean |I|, rms |I|) over the Gaussian electron spot (``[path] electron_spot_nm``),
    in V, or None.  Electrons at different positions are incoherent: the spectrum is
    the current-weighted mean of single-electron spectra (solvers.fmm.coupling)."""
    fwhm = spec.path.electron_spot_m
    if not fwhm:
        return None
    fmm = _fmm()
    spot = fmm.spot_averaged_coupling(sol, point=path_point(spec),
                                      direction=path_direction(spec),
                                      velocity=spec.beam.velocity_m_per_s, fwhm=fwhm,
                                      z_ref=film_mid_z(spec))
    return float(np.asarray(spot.mean_abs)), float(np.asarray(spot.rms_abs))
