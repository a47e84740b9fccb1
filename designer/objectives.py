"""Design objectives as JAX functions of the spec-unit design variables.

A design variable vector ``x`` (spec units, e.g. nm and duty cycle) maps to the
coupling figures of one *operating point* (a :class:`Scenario`: beam voltage, laser
wavelength and angle, lateral etch bias) through the same physics chain as
``velomatch evaluate``:

    x --family.permittivity--> (eps_x, eps_z) --FDFD field_solver (adjoint)--> fields
      --coupling kernels--> I, E_max          (patterned samples)
    x --interfaces (affine in x)--> solvers.layers --> I, E_max   (planar stacks)

All figures are per unit incident field (E0 = 1 V/m in the incidence medium, so
each scales linearly with E0; README, Conventions):

    coupling          |beta_c| / E0 = e |I| / (2 hbar omega E0)           [m/V]
    structure_factor  kappa = G / E0,  G = |I| / L                        [1]
    damage_factor     G / E_max,  E_max the largest |E| in material       [1]

(``beta_c = e I / (2 hbar omega)``: F. J. Garcia de Abajo, A. Asenjo-Garcia,
M. Kociak, Nano Lett. 10, 1859, 2010; G, kappa and the damage factor as defined in
README, Conventions.)  L is the interaction length for paths along x and, for paths
crossing a film, its thickness plus one dephasing length on each side
(designer.evaluate.open_path_length), as in designer.evaluate.

Robust aggregates combine the figure over several scenarios: :func:`worst_case`
(the minimum, to be maximized) or :func:`mean_case`.  Which scenarios exist is
decided by :func:`scenarios` from the ``[optimize] robust`` table: a voltage band, a
wavelength band, an incidence-angle tolerance and an over/under-etch (eroded /
nominal / dilated lateral sizes, the parametric counterpart of the robust
formulation of F. Wang, B. S. Lazarov & O. Sigmund, Struct. Multidisc. Optim. 43,
767, 2011).  In every scenario the fabricated geometry, the electron's path and the
laser's set-up angle are those of the nominal design (a phase-matched period or angle
is resolved once, at the nominal operating point, and then held).

Geometry that the families compute on the host (electron height above the teeth,
layer interfaces, structure thickness) is affine in the spec-unit lengths; it is
recovered exactly as ``f(x) = f(x0) + J (x - x0)`` from one probe per variable
(:func:`affine_probe`), and checked to be affine by one more probe.
"""

from __future__ import annotations

import copy
import dataclasses
import itertools
import math
from dataclasses import dataclass
from typing import Any, Callable

import jax
import jax.numpy as jnp
import numpy as np
from scipy import constants

from designer.families import get_family
from designer.spec import Spec, parse_spec, with_value

jax.config.update("jax_enable_x64", True)

E_CHARGE = constants.e
HBAR = constants.hbar
C0 = constants.c

OBJECTIVES = ("coupling", "structure_factor", "damage_factor")
AGGREGATES = ("worst", "mean")


# ---------------------------------------------------------------------------------
# figures of merit (pure)
# ---------------------------------------------------------------------------------
class Figures(dict):
    """``integral`` (complex, V per V/m), ``e_max`` (|E|max in material per V/m, or
    nan), ``length`` (m, or nan), ``omega`` (rad/s) of one scenario."""


def coupling_per_field(fig) -> jnp.ndarray:
    """``|beta_c| / E0 = e |I| / (2 hbar omega)`` at E0 = 1 V/m (m/V)."""
    return E_CHARGE * jnp.abs(fig["integral"]) / (2.0 * HBAR * fig["omega"])


def structure_factor(fig) -> jnp.ndarray:
    """``kappa = G / E0 = |I| / L`` at E0 = 1 V/m (dimensionless)."""
    return jnp.abs(fig["integral"]) / fig["length"]


def damage_factor(fig) -> jnp.ndarray:
    """``G / E_max = (|I| / L) / E_max`` (dimensionless; independent of E0)."""
    return jnp.abs(fig["integral"]) / fig["length"] / fig["e_max"]


FIGURE_FUNCTIONS: dict[str, Callable] = {
    "coupling": coupling_per_field,
    "structure_factor": structure_factor,
    "damage_factor": damage_factor,
}


def worst_case(values: jnp.ndarray) -> jnp.ndarray:
    """Worst case of a figure to be maximized: ``min`` over scenarios."""
    return jnp.min(jnp.asarray(values))


def mean_case(values: jnp.ndarray) -> jnp.ndarray:
    """Mean of a figure over scenarios (equal weights)."""
    return jnp.mean(jnp.asarray(values))


AGGREGATE_FUNCTIONS = {"worst": worst_case, "mean": mean_case}


# ---------------------------------------------------------------------------------
# scenarios
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class Scenario:
    """One operating point: the (pinned) spec there, the laser angle, the etch bias.

    ``etch_m`` > 0 adds material on every lateral edge (dilated, under-etched),
    < 0 removes it (eroded, over-etched).
    """

    label: str
    spec: Spec
    angle_rad: float
    etch_m: float = 0.0


def _pinned_raw(spec: Spec) -> dict:
    """The spec tree with phase-matched choices resolved at the nominal point."""
    family = get_family(spec.family)
    raw = copy.deepcopy(spec.raw)
    angle = family.laser_angle(spec.sample, spec.context)
    raw = with_value(raw, "laser.angle_deg", math.degrees(angle))
    if getattr(spec.sample, "period_phase_matched", False):
        raw = with_value(raw, "sample.period_nm", spec.sample.period_m * 1e9)
    return raw


def _band(lo: float, hi: float, n: int) -> list[float]:
    return [float(v) for v in np.linspace(lo, hi, n)]


def scenarios(spec: Spec, robust: dict | None) -> list[Scenario]:
    """Operating points of a robust design (the nominal one first).

    ``robust`` (validated by designer.design): ``voltage_kV = [lo, hi]``,
    ``wavelength_nm = [lo, hi]``, ``angle_deg = tol``, ``etch_nm = e``, ``points`` per
    band (odd numbers include the centre), ``combine = "each"`` (vary one tolerance at
    a time, the others nominal: 1 + sum of points) or ``"all"`` (every combination).
    """
    family = get_family(spec.family)
    angle0 = family.laser_angle(spec.sample, spec.context)
    nominal = Scenario("nominal", spec, angle0, 0.0)
    if not robust:
        return [nominal]
    n = int(robust.get("points", 3))
    axes: list[list[tuple[str, Any]]] = []
    if "voltage_kV" in robust:
        axes.append([("voltage_kV", v) for v in _band(*robust["voltage_kV"], n)])
    if "wavelength_nm" in robust:
        axes.append([("wavelength_nm", v) for v in _band(*robust["wavelength_nm"], n)])
    if "angle_deg" in robust:
        t = robust["angle_deg"]
        axes.append([("angle_deg", v) for v in _band(-t, t, n)])
    if "etch_nm" in robust:
        e = robust["etch_nm"]
        axes.append([("etch_nm", v) for v in _band(-e, e, n)])
    if robust.get("combine", "each") == "all":
        combos = [dict(c) for c in itertools.product(*axes)]
    else:
        combos = [dict([c]) for axis in axes for c in axis]
    raw0 = _pinned_raw(spec)
    centre = {"voltage_kV": spec.beam.voltage_V / 1e3,
              "wavelength_nm": spec.laser.wavelength_m * 1e9, "angle_deg": 0.0, "etch_nm": 0.0}
    out = [nominal]
    seen = set()
    for combo in combos:
        key = tuple(sorted(combo.items()))
        if key in seen or all(math.isclose(v, centre[k], rel_tol=1e-12, abs_tol=1e-12)
                              for k, v in combo.items()):
            continue   # the nominal point reappears inside a band: keep one copy
        seen.add(key)
        raw = raw0
        if "voltage_kV" in combo:
            raw = with_value(raw, "beam.voltage_kV", combo["voltage_kV"])
        if "wavelength_nm" in combo:
            raw = with_value(raw, "laser.wavelength_nm", combo["wavelength_nm"])
        changed = "voltage_kV" in combo or "wavelength_nm" in combo
        s = parse_spec(raw, source=spec.source, base_dir=spec.base_dir) if changed else spec
        angle = angle0 + math.radians(combo.get("angle_deg", 0.0))
        label = ", ".join(f"{k} {'+' if k in ('angle_deg', 'etch_nm') and v > 0 else ''}{v:g}"
                          for k, v in combo.items())
        out.append(Scenario(label, s, angle, combo.get("etch_nm", 0.0) * 1e-9))
    return out


def etch_values(family_name: str, params, values: dict, etch_m: float) -> dict:
    """Spec-unit values of the design with every lateral edge moved out by ``etch_m``.

    Grating: the tooth width grows by ``2 etch`` (``duty_cycle += 2 etch / period``).
    Membrane with slits: each slit narrows by ``2 etch``.  Planar samples have no
    lateral edges (``ValueError`` if asked).
    """
    if etch_m == 0:
        return values
    v = dict(values)
    e_nm = etch_m * 1e9
    if family_name == "grating":
        v["duty_cycle"] = v["duty_cycle"] + 2.0 * e_nm / (params.period_m * 1e9)
        return v
    if family_name == "membrane" and params.pattern == "slits":
        for j in range(len(params.slit_widths_m)):
            v[f"slit_widths_nm.{j}"] = v[f"slit_widths_nm.{j}"] - 2.0 * e_nm
        return v
    raise ValueError(f"{family_name}: an etch tolerance needs lateral edges (a patterned sample)")


def has_lateral_edges(spec: Spec) -> bool:
    return spec.family == "grating" or (spec.family == "membrane"
                                        and spec.sample.pattern == "slits")


# ---------------------------------------------------------------------------------
# affine geometry from the host-side family functions
# ---------------------------------------------------------------------------------
def affine_probe(fn: Callable[[dict], np.ndarray], x0: np.ndarray, keys: tuple[str, ...],
                 *, step: float = 1.0, rtol: float = 1e-9) -> tuple[np.ndarray, np.ndarray]:
    """``(f0, J)`` with ``f(x) = f0 + J (x - x0)`` for a function affine in ``x``.

    ``fn`` takes ``{key: value}`` (spec units).  One probe per variable (``x0 + step
    e_k``) gives J; a probe of all variables together checks that ``fn`` is affine
    (``ValueError`` otherwise).  ``step`` is shrunk when a probe leaves the valid
    geometry.
    """
    x0 = np.asarray(x0, dtype=float)

    def call(x):
        return np.atleast_1d(np.asarray(fn(dict(zip(keys, map(float, x)))), dtype=float))

    f0 = call(x0)
    jac = np.zeros((f0.size, x0.size))
    for k in range(x0.size):
        for h in (step, -step, 0.1 * step, -0.1 * step):
            x = x0.copy()
            x[k] += h
            try:
                jac[:, k] = (call(x) - f0) / h
                break
            except ValueError:
                continue
        else:
            raise ValueError(f"cannot probe the geometry along {keys[k]}")
    for h in (0.5 * step, -0.5 * step, 0.05 * step):
        try:
            check = call(x0 + h)
        except ValueError:
            continue
        want = f0 + jac @ np.full(x0.size, h)
        scale = np.maximum(np.abs(f0), np.abs(jac).sum(axis=1) * abs(h)) + 1e-300
        if np.any(np.abs(check - want) > 1e-6 * scale + rtol * np.abs(f0)):
            raise ValueError("the path/structure geometry is not affine in the design "
                             "variables")
        break
    return f0, jac


# ---------------------------------------------------------------------------------
# the scenario's figures as a JAX function of x
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class ScenarioModel:
    """Everything the traced figures of one scenario need (built once per run).

    ``figures(x, mask) -> Figures`` is JAX-traceable in ``x`` (spec units, ordered as
    ``keys``); ``mask`` is the (nx, nz) boolean material mask for E_max from
    :meth:`material_mask` (ignored by planar stacks, pass any array).
    """

    scenario: Scenario
    keys: tuple[str, ...]
    method: str                     # "fdfd" | "layers"
    figures: Callable
    material_mask: Callable         # x (numpy) -> mask (numpy bool)
    mask_shape: tuple[int, int]
    peak_field_V_per_m: float       # the spec's incident peak field (for a field cap)
    solver: Any = None              # FDFD field_solver (engine: factor counts)
    layout: Any = None              # FDFD: the simulation layout (its grid holds the pixels)


def _values(keys, x) -> dict:
    return {k: x[i] for i, k in enumerate(keys)}


def _upper_params(family, params, keys, bounds):
    """Params with vertical sizes at their upper bounds, so one grid holds every design."""
    vertical = [k for k in keys if any(s in k for s in ("thickness", "height", "gap"))]
    for subset in (list(keys), vertical, []):
        try:
            return family.replace(params, {k: bounds[k][1] for k in subset})
        except ValueError:
            continue
    return params


def _peak_field(spec: Spec, layout) -> float:
    eps_inc = complex(layout.eps_incidence)
    return spec.laser.peak_field_in(math.sqrt(eps_inc.real) if eps_inc.real > 0 else 1.0)


def build_model(scenario: Scenario, nominal: Spec, keys: tuple[str, ...], x0: np.ndarray,
                bounds: dict[str, tuple[float, float]], method: str,
                grid_step_m: float | None, *, cache_size: int = 2) -> ScenarioModel:
    """The traced figures of ``scenario`` for design variables ``keys`` (see module doc).

    ``nominal`` fixes the path geometry; ``bounds`` (spec units) sizes the FDFD grid so
    that the largest design fits; ``method`` "fdfd" or "layers".  FDFD models take an
    optional third argument ``figures(x, mask, density)``: the projected density of the
    sample's free-form region (region cells).  ``cache_size``: factorizations kept by
    the FDFD solver (a robust free-form design needs one per eroded/nominal/dilated
    design so that each gradient reuses its forward factorization).
    """
    if method == "layers":
        return _layers_model(scenario, nominal, keys, x0)
    return _fdfd_model(scenario, nominal, keys, x0, bounds, grid_step_m, cache_size)


def _fixed_values(family, params) -> dict:
    return {k: v[0] for k, v in family.variables(params).items()}


def _fdfd_model(scenario, nominal, keys, x0, bounds, grid_step_m, cache_size=2):
    from designer.evaluate import (
        angular_frequency,
        corner_exclusion_mask,
        fdfd_problem,
        laterally_uniform,
        open_path_length,
        path_cells,
    )
    from solvers import coupling
    from solvers.fdfd import e_magnitude_at_centres, field_solver

    spec = scenario.spec
    family = get_family(spec.family)
    params = spec.sample
    h = grid_step_m
    big = family.layout(_upper_params(family, params, keys, bounds), spec.context, h)
    layout = dataclasses.replace(big, angle_rad=scenario.angle_rad)
    omega = angular_frequency(spec.laser.wavelength_m)
    solver = field_solver(fdfd_problem(layout, omega), force=spec.solver.force,
                          cache_size=cache_size)
    grid = layout.grid
    v = spec.beam.velocity_m_per_s
    q = omega / v
    path = layout.path
    fixed = _fixed_values(family, params)
    periodic = layout.pml_cells_x == 0

    # electron height (paths along x) and structure thickness, affine in x
    def geometry(values):
        lay = family.layout(family.replace(nominal.sample, values), nominal.context, h)
        bottom, top = lay.structure_z_m
        z = lay.path.z_m if lay.path.direction == "x" else 0.0
        return [z, top - bottom]

    g0, gj = affine_probe(geometry, x0, keys)
    x0j = jnp.asarray(x0)
    n_periods = 1
    if path.direction == "x":
        # as evaluate does: whole periods, or the exact length on a uniform surface
        n_periods = path_cells(path.length_m, layout.period_m,
                               exact=laterally_uniform(spec))
    kb = solver.engine.problem.kx_bloch

    def full_values(x):
        vals = {**fixed, **_values(keys, x)}
        return etch_values(spec.family, params, vals, scenario.etch_m)

    def figures(x, mask, density=None):
        eps_x, eps_z = family.permittivity(params, layout, full_values(x), density=density)
        ex, ez, hy = solver(eps_x, eps_z)
        geo = jnp.asarray(g0) + jnp.asarray(gj) @ (x - x0j)
        if path.direction == "x":
            # Ex at the electron from the vacuum Floquet harmonics of the gap rows (as
            # evaluate does): smooth in the electron's height, no cell-periodic error
            k = jnp.floor((geo[0] - grid.z0) / grid.dz).astype(int)
            rows = coupling.vacuum_ex_rows_traced(jnp.asarray(eps_x), jnp.asarray(eps_z), k,
                                                  layout.pml_cells_z)
            row = coupling.gap_row(ex, dx=grid.dx, dz=grid.dz, x0=grid.x0, z0=grid.z0,
                                   z=geo[0], omega=omega, bloch_kx=kb, rows=rows, xp=jnp)
            i1 = coupling.periodic_cell_integral(row, grid.x0 + 0.5 * grid.dx, grid.dx, kb, q)
            integral = i1 * coupling.lattice_sum(kb - q, layout.period_m, n_periods)
            length = n_periods * layout.period_m if path.length_m is not None else jnp.nan
        else:
            z1 = grid.z0 + math.floor((path.z_below_m - grid.z0) / grid.dz + 1e-9) * grid.dz
            z2 = grid.z0 + math.ceil((path.z_above_m - grid.z0) / grid.dz - 1e-9) * grid.dz
            integral = coupling.coupling_z_kernel(
                ez, hy, nx=grid.nx, dx=grid.dx, dz=grid.dz, x0=grid.x0, z0=grid.z0,
                x=path.x_m, z1=z1, z2=z2, eps_below=path.eps_below,
                eps_above=path.eps_above, omega=omega, bloch_kx=kb, velocity=v)[0]
            length = open_path_length(spec, scenario.angle_rad, geo[1])
        mag = e_magnitude_at_centres(ex, ez, grid, bloch_kx=kb, periodic_x=periodic)
        e_max = jnp.max(jnp.where(mask, mag, 0.0))
        return Figures(integral=integral, e_max=e_max, length=length, omega=omega)

    eps_void = 1.0
    eps_solid = complex(params.material.eps)

    def material_mask(x, density=None):
        values = full_values(np.asarray(x, dtype=float))
        ex_, ez_ = (np.real(np.asarray(a)) for a in family.permittivity(params, layout, values,
                                                                        density=density))
        # a cell is material when the mean of its four face values is past half way
        cell = 0.25 * (ex_ + np.concatenate([ex_[:, 1:], ex_[:, -1:]], axis=1)
                       + ez_ + np.concatenate([ez_[1:], ez_[:1]], axis=0))
        mask = cell > eps_void + 0.5 * (eps_solid.real - eps_void)
        n = layout.pml_cells_z
        mask[:, :n] = False
        mask[:, grid.nz - n:] = False
        design = family.replace(params, {k: float(values[k]) for k in keys})
        if density is not None:
            from designer.families import region as freeform_region

            design = dataclasses.replace(design, freeform=freeform_region.with_pattern(
                design.freeform, density, layout, "<in memory>"))
        poly = family.polygons(design, spec.context, layout)
        return mask & ~corner_exclusion_mask(layout, poly, spec.fabrication.corner_radius_m)

    return ScenarioModel(scenario, keys, "fdfd", figures, material_mask, grid.shape,
                         _peak_field(spec, layout), solver, layout)


def _layers_model(scenario, nominal, keys, x0):
    from designer.evaluate import angular_frequency, open_path_length
    from solvers import layers

    spec = scenario.spec
    family = get_family(spec.family)
    stack = family.layer_stack(spec.sample, spec.context)
    if stack is None:
        raise ValueError(f"{spec.family}: not a planar layer stack")
    eps = jnp.asarray(stack.eps, dtype=complex)
    lam = spec.laser.wavelength_m
    omega = angular_frequency(lam)
    probe_h = nominal.laser.wavelength_m / 20.0
    lay0 = family.layout(nominal.sample, nominal.context, probe_h)
    path = lay0.path
    v = spec.beam.velocity_m_per_s

    def geometry(values):
        q = family.replace(nominal.sample, values)
        z_if = list(family.layer_stack(q, nominal.context).z_interfaces)
        z = family.layout(q, nominal.context, probe_h).path.z_m if path.direction == "x" \
            else 0.0
        return z_if + [z]

    g0, gj = affine_probe(geometry, x0, keys)
    x0j = jnp.asarray(x0)
    n_if = len(stack.z_interfaces)
    material = np.array([abs(e - 1.0) > 1e-12 for e in stack.eps])
    s = jnp.linspace(0.0, 1.0, 401)[1:-1]

    def figures(x, mask=None):
        geo = jnp.asarray(g0) + jnp.asarray(gj) @ (x - x0j)
        z_if = geo[:n_if]
        sol = layers.solve_plane_wave(eps, z_if, omega, scenario.angle_rad,
                                      incidence=lay0.from_side)
        if path.direction == "z":
            integral = layers.coupling_normal(sol, path.x_m, v)
            length = open_path_length(spec, scenario.angle_rad, z_if[-1] - z_if[0])
        else:
            if path.length_m is None:
                raise ValueError("a path along x needs an interaction length ([path] length_um)")
            integral, _ = layers.coupling_parallel(sol, geo[n_if], v, length=path.length_m)
            length = path.length_m
        # largest |E| in the material layers (and 2 wavelengths into material
        # half-spaces), sampled on 399 points per layer
        pieces = []
        for j in np.nonzero(material)[0]:
            lo = z_if[j - 1] if j > 0 else z_if[0] - 2 * lam
            hi = z_if[j] if j < n_if else z_if[-1] + 2 * lam
            pieces.append(lo + (hi - lo) * s)
        if pieces:
            z = jnp.concatenate(pieces)
            ex, ez, _ = layers.stack_fields(sol, 0.0, z)
            e_max = jnp.max(jnp.sqrt(jnp.abs(ex) ** 2 + jnp.abs(ez) ** 2))
        else:
            e_max = jnp.nan
        return Figures(integral=integral, e_max=e_max, length=length, omega=omega)

    def material_mask(x):
        return np.zeros((1, 1), dtype=bool)

    return ScenarioModel(scenario, keys, "layers", figures, material_mask, (1, 1),
                         _peak_field(spec, lay0), None)


# ---------------------------------------------------------------------------------
# composing: objective and constraints of many scenarios
# ---------------------------------------------------------------------------------
def objective_function(models: list[ScenarioModel], objective: str, aggregate: str):
    """``f(x, masks) -> (F, per_scenario, e_max_per_scenario)``: the aggregated figure
    (to be maximized), the figure of each scenario and each scenario's E_max per V/m."""
    figure = FIGURE_FUNCTIONS[objective]
    agg = AGGREGATE_FUNCTIONS[aggregate]

    def f(x, masks):
        figs = [m.figures(x, mask) for m, mask in zip(models, masks)]
        per = jnp.stack([figure(fg) for fg in figs])
        e_max = jnp.stack([jnp.asarray(fg["e_max"], dtype=float) for fg in figs])
        return agg(per), per, e_max

    return f


def field_cap_constraint(models: list[ScenarioModel], cap_V_per_m: float):
    """``g = E_max E0 / cap - 1 <= 0`` per scenario (E0 the spec's incident peak field)."""
    e0 = jnp.asarray([m.peak_field_V_per_m for m in models])

    def g(e_max_per_field):
        return e_max_per_field * e0 / cap_V_per_m - 1.0

    return g


# ---------------------------------------------------------------------------------
# free-form density: filter, projection with continuation, robust triple
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class DensityChain:
    """``rho --conic filter--> rho~ --projection(beta)--> designs`` (designer.freeform).

    ``radius_m`` None: no filter (no length rule); ``delta_eta`` None: the nominal design
    only, else the eroded, nominal and dilated designs of thresholds ``0.5 + d, 0.5,
    0.5 - d`` (F. Wang, B. S. Lazarov & O. Sigmund, Struct. Multidisc. Optim. 43, 767,
    2011), whose worst case is optimized.  The filter is the cone filter of B. Bourdin,
    IJNME 50, 2143 (2001).
    """

    shape: tuple[int, int]
    dx: float
    dz: float
    periodic_x: bool
    radius_m: float | None = None
    delta_eta: float | None = None
    # design variables -> region pattern (designer.freeform.Parametrization: column
    # densities per etch step, mirrored upper regions); None: one variable per cell
    param: object = None

    def filtered(self, rho):
        from designer import freeform as ff

        if self.radius_m is None:
            return jnp.asarray(rho, dtype=float)
        if self.param is not None:
            return self.param.filter(rho, self.radius_m, self.dx, self.dz,
                                     periodic_x=self.periodic_x)
        return ff.density_filter(rho, self.radius_m, self.dx, self.dz, periodic_x=self.periodic_x)

    def _expand(self, a):
        return a if self.param is None else self.param.expand(a)

    def designs(self, rho, beta):
        """(1 or 3, nx, nz) projected designs (eroded, nominal, dilated when robust)."""
        from designer import freeform as ff

        rt = self.filtered(rho)
        if self.delta_eta is None:
            return self._expand(ff.threshold_projection(rt, beta))[None]
        return jnp.stack([self._expand(d) for d in ff.robust_triple(rt, beta, self.delta_eta)])

    def binarized(self, rho) -> np.ndarray:
        """The nominal design at ``beta = inf`` (0 or 1 per pixel): what is fabricated."""
        from designer import freeform as ff

        return np.asarray(self._expand(ff.threshold_projection(self.filtered(rho), math.inf)))


def _density_objective(models, objective, aggregate, n_keys, shape, designs_of):
    figure = FIGURE_FUNCTIONS[objective]
    agg = AGGREGATE_FUNCTIONS[aggregate]

    def f(x, masks, *extra):
        xc = x[:n_keys]
        designs = designs_of(jnp.reshape(x[n_keys:], shape), *extra)
        per, e_max = [], []
        for m, mask in zip(models, masks):
            figs = [m.figures(xc, mask, designs[j]) for j in range(designs.shape[0])]
            per.append(jnp.min(jnp.stack([figure(fg) for fg in figs])))      # worst design
            e_max.append(jnp.max(jnp.stack([jnp.asarray(fg["e_max"], dtype=float)
                                            for fg in figs])))
        per = jnp.stack(per)
        return agg(per), per, jnp.stack(e_max)

    return f


def freeform_objective_function(models: list[ScenarioModel], objective: str, aggregate: str,
                                chain: DensityChain, n_keys: int):
    """``f(x, masks, beta) -> (F, per_scenario, e_max)`` for ``x = [continuous values,
    raw densities (flattened region cells)]``.

    Per scenario the figure is the worst over the chain's designs (robust triple), then
    aggregated over scenarios as :func:`objective_function` does.  ``beta`` (the
    projection sharpness, continued by designer.freeform.beta_schedule) is data, so
    one compilation serves the whole continuation.
    """
    return _density_objective(models, objective, aggregate, n_keys, chain.shape,
                              chain.designs)


def pattern_objective_function(models: list[ScenarioModel], objective: str, aggregate: str,
                               shape: tuple[int, int], n_keys: int):
    """``f(x, masks)`` with ``x = [continuous values, pattern]``: the pattern (region
    cells, values in [0, 1]) is placed as it is -- no filter, no projection.  Used on
    binarized patterns: the figures a spec with that stored density evaluates to."""
    return _density_objective(models, objective, aggregate, n_keys, shape,
                              lambda rho: rho[None])
