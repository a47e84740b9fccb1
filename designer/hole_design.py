"""``velomatch design`` of a hole membrane: radius, period, thickness and incidence angle
through the Fourier modal method, robust over the pulse spectrum and a radius error.

``designer.design.design_command`` hands a spec whose sample is a hole lattice
(``designer.holes.is_fmm_sample``) to :func:`hole_design_command`.  The ``[optimize]``
table uses the keys of the other families where they mean the same thing::

    [optimize]
    objective = "structure_factor"   # | "coupling" (|beta_c| per field)
    variables = { hole_radius_nm = [60, 180], period_nm = [300, 600] }
                                     # or a list of names: bounds from the rules
                                     # names: thickness_nm, period_nm, hole_radius_nm
                                     # (hole_axes_nm.0 / .1 for ellipses), angle_deg
    iterations = 30
    tolerance = 1e-6                 # L-BFGS-B relative loss change
    gradient_tolerance = 1e-8
    checkpoint_every = 5
    pulse_points = 5                 # wavelengths across the pulse spectrum (1 = off)
    robust = { etch_nm = 5, points = 3, aggregate = "worst" }   # radius +/- etch_nm

Objective
    For a set of radius errors d_j (``robust.etch_nm``: ``points`` values evenly over
    [-etch, +etch]; over-etch widens every hole, so each semi-axis becomes a + d_j) the
    figure f (``coupling`` = e|I|/(2 hbar omega), ``structure_factor`` = |I|/L with
    L = film stack thickness + 2 dephasing lengths, per unit incident field, as
    ``velomatch evaluate`` reports them) is averaged over the pulse's power spectrum,

        S_j = sum_k w_k f(lambda_k, a + d_j),

    and aggregated: ``worst`` = min_j S_j (the default, as for the other families) or
    ``mean``.  The spectrum of a transform-limited Gaussian pulse of intensity FWHM tau
    (``[laser] duration_fs``) is Gaussian in omega with FWHM 4 ln2 / tau (time-bandwidth
    product 2 ln2 / pi = 0.441; value from memory, A. E. Siegman, "Lasers", 1986); the
    nodes are Gauss-Hermite points of that weight (``pulse_points`` of them, weights
    summing to 1).  Without ``duration_fs`` the figure is taken at the laser wavelength.
    A resonance narrower than the spectrum then counts with its share of the spectrum,
    not with its peak.  Permittivities stay those of the laser wavelength (dispersion
    over the pulse is neglected).  Few nodes can miss a resonance narrower than their
    spacing: the run re-averages the start and the optimum with four times as many
    nodes (``bandwidth_check`` in comparison.json) and says when the two disagree.

Rules (``[fabrication]``, the same check ``evaluate`` and ``export`` apply:
designer.fabrication.check_design on the membrane's features)
    hole diameter 2 min(a) >= ``min_gap_nm``; wall between neighbouring holes
    >= ``min_feature_nm`` (circles: P - 2r on both lattices, whose nearest neighbours
    are one period apart); thickness / min(hole diameter, wall) <= ``max_aspect_ratio``;
    thickness within ``thickness_nm``.  Variables listed by name get their bounds from
    these rules with the other sizes at their loosest bound (``bounds_source`` says
    which); the coupled part (wall and aspect ratio when several sizes move) is kept
    exactly: a trial point that breaks a rule the start keeps is a wall the line search
    backs away from, so every accepted iterate keeps the rules.  A start that breaks a
    rule is reported (``start_check``) and moved inside first.

Optimizer: scipy L-BFGS-B on the unit box with the JAX gradient through the FMM
(custom eigen-derivative, solvers.fmm.eig).  The Fourier order count is the spec's
``[solver] fourier_orders`` (default ``designer.holes.AUTO_START_ORDERS``); the final
evaluation raises it by two for the error estimate of the gain.

Outputs in ``--out DIR``: ``design.toml`` (a complete spec: ``velomatch evaluate`` and
``export`` take it), ``evaluation.json``, ``history.json`` (every accepted iterate),
``comparison.json`` / ``comparison.txt`` (start vs optimum, rule verdict, gain with
its error), ``convergence.png`` and ``checkpoint.json`` (``--resume`` continues from
the last accepted iterate; the quasi-Newton memory restarts).
"""

from __future__ import annotations

import copy
import json
import math
import sys
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
from scipy import constants

from designer import io as vio
from designer.errors import SpecError, UsageError
from designer.families import get_family
from designer.laser import spectral_fwhm_m
from designer.spec import Spec, dump_spec, load_spec, parse_spec
from designer.tables import TableReader

CHECKPOINT = "checkpoint.json"
OUTPUT_FILES = ("design.toml", "evaluation.json", "history.json", "comparison.json",
                "comparison.txt", "convergence.png", CHECKPOINT)
OBJECTIVES = ("coupling", "structure_factor")
ANGLE_KEY = "angle_deg"
ANGLE_LIMIT_DEG = 85.0
AUTO_ANGLE_DEG = (0.0, 60.0)
CHECK_FACTOR = 4            # bandwidth check: this many times the nodes
BANDWIDTH_CHECK_TOL = 0.05  # relative difference above which the run warns
RADIUS_KEYS = ("hole_radius_nm", "hole_axes_nm.0", "hole_axes_nm.1")


# ---------------------------------------------------------------------------------
# configuration
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class HoleDesignConfig:
    """The validated ``[optimize]`` table of a hole membrane (spec units)."""

    objective: str
    keys: tuple[str, ...]
    bounds: dict
    bounds_source: dict
    orders: int
    iterations: int = 30
    tolerance: float = 1e-6
    gradient_tolerance: float = 1e-8
    checkpoint_every: int = 5
    pulse_points: int = 5
    etch_nm: float = 0.0
    robust_points: int = 3
    aggregate: str = "worst"
    wavelengths_m: tuple = ()
    weights: tuple = ()

    def identity(self) -> dict:
        d = asdict(self)
        d.pop("iterations")
        d["keys"] = list(self.keys)
        d["bounds"] = {k: list(v) for k, v in self.bounds.items()}
        d["wavelengths_m"] = list(self.wavelengths_m)
        d["weights"] = list(self.weights)
        return d

    @property
    def radius_errors_nm(self) -> tuple[float, ...]:
        if self.etch_nm <= 0:
            return (0.0,)
        return tuple(float(v) for v in np.linspace(-self.etch_nm, self.etch_nm,
                                                   self.robust_points))


def pulse_nodes(wavelength_m: float, duration_s: float | None, n: int
                ) -> tuple[np.ndarray, np.ndarray]:
    """Wavelengths (m) and weights (sum 1) sampling the power spectrum of a
    transform-limited Gaussian pulse of intensity FWHM ``duration_s``.

    S(omega) ~ exp(-(omega - omega0)^2 tau^2 / (4 ln 2)) (FWHM 4 ln2 / tau); with
    u = (omega - omega0) tau / (2 sqrt(ln 2)) this is exp(-u^2), sampled at the
    Gauss-Hermite nodes (weights / sqrt(pi)).  ``duration_s`` None or ``n`` = 1: the
    laser wavelength alone."""
    if duration_s is None or n <= 1:
        return np.array([wavelength_m]), np.array([1.0])
    u, w = np.polynomial.hermite.hermgauss(n)
    omega0 = 2.0 * math.pi * constants.c / wavelength_m
    omega = omega0 + u * 2.0 * math.sqrt(math.log(2.0)) / duration_s
    if np.any(omega <= 0):
        raise ValueError("the pulse is too short for its wavelength (negative frequencies)")
    return 2.0 * math.pi * constants.c / omega, w / math.sqrt(math.pi)


def _variables(spec: Spec) -> dict:
    """key -> (start, lo, hi): the family's continuous parameters and the laser angle."""
    known = dict(get_family(spec.family).variables(spec.sample))
    a0 = math.degrees(spec.context.angle_rad or 0.0)
    known[ANGLE_KEY] = (a0, min(-ANGLE_LIMIT_DEG, a0), max(ANGLE_LIMIT_DEG, a0))
    return known


def parse_hole_optimize(spec: Spec, iterations: int | None = None) -> HoleDesignConfig:
    """Validate the ``[optimize]`` table of a hole membrane (module docstring)."""
    from designer import design as dsg
    from designer.fabrication import FabricationConflict, bounds_from_rules
    from designer.holes import AUTO_START_ORDERS

    if not spec.optimize:
        raise SpecError(spec.source, "optimize", "velomatch design needs an [optimize] table "
                        "(at least: variables = [...])")
    r = TableReader(spec.optimize, "optimize", spec.source)
    objective = r.string("objective", "structure_factor", choices=OBJECTIVES)
    known = _variables(spec)
    raw_vars = r.raw("variables")
    if isinstance(raw_vars, list) and raw_vars and all(isinstance(k, str) for k in raw_vars):
        wanted = {k: None for k in raw_vars}
    elif isinstance(raw_vars, dict) and raw_vars:
        wanted = dict(raw_vars)
    else:
        raise r.error("variables", "must be a non-empty list of names or a table "
                      "{name = [lower, upper]}", raw_vars)
    variables = {}
    vr = TableReader(wanted, "optimize.variables", spec.source)
    for key, value in wanted.items():
        if key not in known:
            raise SpecError(spec.source, f"optimize.variables.{key}",
                            "not a variable of a hole membrane (its variables: "
                            f"{', '.join(sorted(known))})", value)
        start, f_lo, f_hi = known[key]
        if value is None:
            lo, hi = (f_lo, f_hi) if key != ANGLE_KEY else (
                min(AUTO_ANGLE_DEG[0], start), max(AUTO_ANGLE_DEG[1], start))
        else:
            lo, hi = dsg._pair(vr, key, value)
            slack = 1e-9 * max(1.0, abs(f_lo), abs(f_hi))
            if lo < f_lo - slack or hi > f_hi + slack:
                raise SpecError(spec.source, f"optimize.variables.{key}",
                                f"outside the physical bounds [{f_lo:g}, {f_hi:g}]", value)
        variables[key] = (start, lo, hi)
    sizes = {k: v for k, v in variables.items() if k != ANGLE_KEY}
    try:
        bounds = bounds_from_rules(spec.fabrication, sizes)
    except FabricationConflict as exc:
        raise SpecError(spec.source, "optimize.variables", str(exc), raw_vars) from None
    bounds, sources = dsg.automatic_bounds(spec, sizes, bounds,
                                           {k for k, v in wanted.items() if v is None})
    bounds, sources = hole_rule_bounds(spec, known, sizes, bounds, sources)
    if ANGLE_KEY in variables:
        bounds[ANGLE_KEY] = variables[ANGLE_KEY][1:]
        sources[ANGLE_KEY] = ("[optimize] variables" if wanted[ANGLE_KEY] is not None
                              else f"{AUTO_ANGLE_DEG[0]:g}..{AUTO_ANGLE_DEG[1]:g} deg")
    bounds = {k: bounds[k] for k in variables}
    for key, (lo, hi) in bounds.items():
        if not hi - lo > 1e-9 * max(1.0, abs(lo)):
            raise SpecError(spec.source, f"optimize.variables.{key}",
                            f"the fabrication rules leave no room: [{lo:g}, {hi:g}] "
                            f"({sources.get(key)}); remove it from the variables or relax "
                            "the rules", wanted[key])
    cfg = dict(
        iterations=r.number("iterations", 30, integer=True, minimum=1),
        tolerance=r.number("tolerance", 1e-6, minimum=0.0),
        gradient_tolerance=r.number("gradient_tolerance", 1e-8, minimum=0.0),
        checkpoint_every=r.number("checkpoint_every", 5, integer=True, minimum=1),
        pulse_points=r.number("pulse_points", 5, integer=True, minimum=1, maximum=15),
    )
    for key in ("starts", "seed", "method", "optimizer", "learning_rate", "constraints",
                "max_field_V_per_m"):
        if r.has(key):
            value = r.raw(key)
            if key in ("method", "optimizer") and value in ("lbfgs", "lbfgsb"):
                continue
            if key == "starts" and value == 1:
                continue
            raise r.error(key, "not available for hole membranes yet (one start, L-BFGS-B, "
                          "the rules kept exactly)", value)
    rob = r.subtable("robust")
    etch = rob.number("etch_nm", 0.0, minimum=0.0)
    points = rob.number("points", 3, integer=True, minimum=2, maximum=9)
    aggregate = rob.string("aggregate", "worst", choices=("worst", "mean"))
    for key in ("voltage_kV", "wavelength_nm", "angle_deg", "combine"):
        if rob.has(key):
            raise rob.error(key, "not available for hole membranes yet (they are robust "
                            "over the pulse spectrum and robust.etch_nm)", rob.raw(key))
    rob.finish()
    r.finish()
    if iterations is not None:
        if iterations < 1:
            raise UsageError(f"--iterations = {iterations!r}: must be >= 1")
        cfg["iterations"] = int(iterations)
    try:
        lams, weights = pulse_nodes(spec.laser.wavelength_m, spec.laser.duration_s,
                                    cfg["pulse_points"])
    except ValueError as exc:
        raise SpecError(spec.source, "laser.duration_fs", str(exc),
                        spec.laser.duration_s * 1e15) from None
    orders = spec.solver.fourier_orders or AUTO_START_ORDERS
    return HoleDesignConfig(objective=objective, keys=tuple(variables), bounds=bounds,
                            bounds_source=sources, orders=int(orders), etch_nm=float(etch),
                            robust_points=int(points), aggregate=aggregate,
                            wavelengths_m=tuple(float(v) for v in lams),
                            weights=tuple(float(v) for v in weights), **cfg)


def _rules_nm(spec: Spec) -> tuple[float, float, float]:
    rules = spec.fabrication
    return rules.min_gap_m * 1e9, rules.min_feature_m * 1e9, rules.max_aspect_ratio


def hole_rule_bounds(spec: Spec, known: dict, sizes: dict, bounds: dict, sources: dict
                     ) -> tuple[dict, dict]:
    """Tighten the size bounds by the hole rules (module docstring), each size against
    the others at their loosest bound (or their value when they are fixed)."""
    min_hole, min_wall, aspect = _rules_nm(spec)
    out, why = dict(bounds), {k: [] for k in bounds}

    def span(key):
        return out[key] if key in out else (known[key][0], known[key][0])

    def tighten(key, lo=None, hi=None, rule=""):
        a, b = out[key]
        if lo is not None and lo > a:
            a = lo
            why[key].append(rule)
        if hi is not None and hi < b:
            b = hi
            why[key].append(rule)
        out[key] = (a, b)

    t_lo, t_hi = span("thickness_nm")
    thin = t_lo / aspect if math.isfinite(aspect) else 0.0
    radii = [k for k in RADIUS_KEYS if k in out]
    if "period_nm" in out:
        r_lo = max([span(k)[0] for k in RADIUS_KEYS if k in known] or [0.0])
        tighten("period_nm", lo=2.0 * r_lo + max(min_wall, thin),
                rule="min_feature_nm (wall), max_aspect_ratio")
    p_lo, p_hi = span("period_nm")
    for key in radii:
        tighten(key, lo=max(0.5 * min_hole, 0.5 * thin), rule="min_gap_nm (hole), "
                "max_aspect_ratio")
        tighten(key, hi=0.5 * (p_hi - max(min_wall, thin)),
                rule="min_feature_nm (wall), max_aspect_ratio")
    if "thickness_nm" in out and math.isfinite(aspect):
        r_lo = min(span(k)[0] for k in RADIUS_KEYS if k in known)
        r_hi = min(span(k)[1] for k in RADIUS_KEYS if k in known)
        tighten("thickness_nm", hi=aspect * min(2.0 * r_hi, p_hi - 2.0 * r_lo),
                rule="max_aspect_ratio")
    new_sources = dict(sources)
    for key, rules in why.items():
        if rules:
            new_sources[key] = ", ".join([sources.get(key, "")] + sorted(set(rules))).strip(", ")
        lo, hi = out[key]
        if not lo < hi:
            raise SpecError(spec.source, f"optimize.variables.{key}",
                            f"the hole rules ({', '.join(sorted(set(rules)))}) leave no room "
                            f"for sample.{key}: needs {lo:g} <= value <= {hi:g}",
                            list(bounds[key]))
    return out, new_sources


# ---------------------------------------------------------------------------------
# geometry and rules at a point
# ---------------------------------------------------------------------------------
def spec_at(spec: Spec, values: dict) -> Spec:
    """The spec with its sample sizes and laser angle set to ``values`` (spec units)."""
    from designer.units import tidy

    family = get_family(spec.family)
    sizes = {k: v for k, v in values.items() if k != ANGLE_KEY}
    raw = copy.deepcopy(spec.raw)
    raw["sample"] = tidy(family.to_table(family.replace(spec.sample, sizes)))
    if ANGLE_KEY in values:
        raw.setdefault("laser", {})["angle_deg"] = tidy(float(values[ANGLE_KEY]))
    return parse_spec(raw, source=spec.source, base_dir=spec.base_dir)


def rule_findings(spec: Spec, values: dict) -> list[str] | None:
    """Rule names the sizes ``values`` break (the family's features against the rules,
    designer.fabrication.design_rule_check, as check_design reads them); None when
    the geometry is not a valid sample (overlapping holes)."""
    from designer.fabrication import design_rule_check

    family = get_family(spec.family)
    try:
        q = family.replace(spec.sample, {k: v for k, v in values.items() if k != ANGLE_KEY})
    except (ValueError, SpecError):
        return None
    return sorted({v.rule + ":" + v.description
                   for v in design_rule_check(family.features(q), spec.fabrication)})


def move_inside(spec: Spec, config: HoleDesignConfig) -> dict:
    """The start check: the spec's own verdict, and the start moved into the bounds and
    (circles) toward the coupled rules: radius, then period, then thickness.

    Returns ``{"violations": [messages], "moved": {key: [from, to]}, "values": {...},
    "remaining": [rules still broken after the move]}``."""
    from designer.fabrication import check_design

    known = _variables(spec)
    start = {k: float(known[k][0]) for k in config.keys}
    v = {k: min(max(x, config.bounds[k][0]), config.bounds[k][1]) for k, x in start.items()}
    messages = list(check_design(spec).messages)
    for k in config.keys:
        if v[k] != start[k]:
            lo, hi = config.bounds[k]
            messages.append(f"start {k} = {start[k]:g} is outside its bounds [{lo:g}, {hi:g}] "
                            f"({config.bounds_source.get(k, 'bounds')})")
    min_hole, min_wall, aspect = _rules_nm(spec)
    every = {k: float(x[0]) for k, x in known.items()}

    def get(k):
        return v.get(k, every[k])

    def clip(k, lo, hi):
        if k in v:
            b_lo, b_hi = config.bounds[k]
            v[k] = min(max(v[k], max(lo, b_lo)), min(hi, b_hi))

    if "hole_radius_nm" in every:
        thin = get("thickness_nm") / aspect if math.isfinite(aspect) else 0.0
        clip("hole_radius_nm", max(0.5 * min_hole, 0.5 * thin),
             0.5 * (get("period_nm") - max(min_wall, thin)))
        clip("period_nm", 2.0 * get("hole_radius_nm") + max(min_wall, thin), math.inf)
        if math.isfinite(aspect):
            r, p = get("hole_radius_nm"), get("period_nm")
            clip("thickness_nm", 0.0, aspect * min(2.0 * r, p - 2.0 * r))
    moved = {k: [start[k], v[k]] for k in config.keys if v[k] != start[k]}
    remaining = rule_findings(spec, v)
    return {"violations": messages, "moved": moved, "values": v,
            "remaining": ["overlapping holes"] if remaining is None else remaining}


# ---------------------------------------------------------------------------------
# the objective
# ---------------------------------------------------------------------------------
class HoleObjective:
    """F and dF/du of a hole membrane (module docstring) in the unit-box variables u
    over ``config.keys``.  One compiled JAX function ``(u, wavelength, radius error)
    -> (figure, gradient)`` serves every node and scenario.

    A circular hole's radius is mapped into the interval the rules leave at the
    present thickness t and period P,

        r = r_lo + u_r (r_hi - r_lo),   r_lo = max(min_gap, t / AR) / 2,
                                        r_hi = (P - max(min_feature, t / AR)) / 2

    (both also inside the radius bounds): hole diameter, wall and aspect ratio then
    hold for every u in the box, so the quasi-Newton steps never hit them."""

    def __init__(self, spec: Spec, config: HoleDesignConfig):
        import jax
        import jax.numpy as jnp

        from designer import holes

        self.spec, self.config = spec, config
        known = _variables(spec)
        self.all_keys = tuple(known)
        self.x_fixed = {k: float(known[k][0]) for k in self.all_keys}
        self.mapped = (spec.sample.holes.circular and "hole_radius_nm" in config.keys)
        family = get_family(spec.family)
        layout = family.layout(spec.sample, spec.context, spec.laser.wavelength_m / 20.0)
        bottom, top = layout.structure_z_m
        # the other layers' thickness (L is affine in the film's)
        self.extra_m = (top - bottom) - spec.sample.thickness_m
        size_keys = [k for k in self.all_keys if k != ANGLE_KEY]
        beta = spec.beam.beta
        kind = config.objective
        orders = config.orders

        def figure(u, lam, dr):
            x = self._decode(u, jnp)
            values = {k: x[k] + (dr if k in RADIUS_KEYS else 0.0) for k in size_keys}
            theta = jnp.deg2rad(x[ANGLE_KEY])
            i = holes.coupling(spec, orders, values, wavelength_m=lam, angle_rad=theta)
            if kind == "coupling":
                omega = 2.0 * jnp.pi * constants.c / lam
                return constants.e * jnp.abs(i) / (2.0 * constants.hbar * omega)
            k = 2.0 * jnp.pi / lam
            length = (x["thickness_nm"] * 1e-9 + self.extra_m
                      + 2.0 / (k * jnp.abs(1.0 / beta - jnp.cos(theta))))
            return jnp.abs(i) / length

        # one compilation per run: values alone come from the same function (the
        # gradient costs less than a second compilation)
        self._value_grad = jax.jit(jax.value_and_grad(figure))
        self.solves = 0

    def _radius_range(self, t, p, xp):
        min_hole, min_wall, aspect = _rules_nm(self.spec)
        thin = t / aspect if math.isfinite(aspect) else 0.0 * t
        lo, hi = self.config.bounds["hole_radius_nm"]
        r_lo = xp.maximum(lo, 0.5 * xp.maximum(min_hole, thin))
        r_hi = xp.minimum(hi, 0.5 * (p - xp.maximum(min_wall, thin)))
        return r_lo, r_hi

    def _decode(self, u, xp=np) -> dict:
        x = dict(self.x_fixed)
        for j, k in enumerate(self.config.keys):
            lo, hi = self.config.bounds[k]
            x[k] = lo + u[j] * (hi - lo)
        if self.mapped:
            j = self.config.keys.index("hole_radius_nm")
            r_lo, r_hi = self._radius_range(x["thickness_nm"], x["period_nm"], xp)
            x["hole_radius_nm"] = r_lo + u[j] * (r_hi - r_lo)
        return x

    def values_of(self, u) -> dict:
        """The variables' values (spec units) at ``u``."""
        x = self._decode(np.clip(np.asarray(u, dtype=float), 0.0, 1.0))
        return {k: float(x[k]) for k in self.config.keys}

    def encode(self, values: dict) -> np.ndarray:
        """``u`` of the values (inverse of :meth:`values_of`, clipped to the box)."""
        u = []
        x = {**self.x_fixed, **values}
        for k in self.config.keys:
            lo, hi = self.config.bounds[k]
            if self.mapped and k == "hole_radius_nm":
                lo, hi = self._radius_range(x["thickness_nm"], x["period_nm"], np)
            u.append((values[k] - lo) / (hi - lo) if hi > lo else 0.5)
        return np.clip(np.array(u, dtype=float), 0.0, 1.0)

    def point(self, u, wavelength_m: float, radius_error_nm: float = 0.0) -> float:
        """The figure at one wavelength and radius error (no spectral average)."""
        self.solves += 1
        return float(self._value_grad(np.asarray(u, dtype=float), float(wavelength_m),
                                      float(radius_error_nm))[0])

    def spectral(self, u, wavelengths, weights, radius_error_nm=0.0, grad=False):
        """sum_k w_k f(lambda_k): the pulse-averaged figure (and its gradient in u)."""
        u = np.asarray(u, dtype=float)
        total, g = 0.0, np.zeros(u.size)
        for lam, w in zip(wavelengths, weights):
            self.solves += 1
            v, d = self._value_grad(u, float(lam), float(radius_error_nm))
            g += w * np.asarray(d)
            total += w * float(v)
        return (total, g) if grad else total

    def __call__(self, u, grad: bool = True):
        """(F, dF/du or None, per-scenario spectral averages) at ``u``."""
        cfg = self.config
        per, grads = [], []
        for d in cfg.radius_errors_nm:
            if grad:
                v, g = self.spectral(u, cfg.wavelengths_m, cfg.weights, d, grad=True)
                grads.append(g)
            else:
                v = self.spectral(u, cfg.wavelengths_m, cfg.weights, d)
            per.append(v)
        if cfg.aggregate == "worst":
            j = int(np.argmin(per))
            return per[j], (grads[j] if grad else None), per
        return float(np.mean(per)), (np.mean(grads, axis=0) if grad else None), per

    def check_nodes(self) -> tuple[np.ndarray, np.ndarray]:
        """CHECK_FACTOR times as many nodes (the bandwidth check)."""
        cfg = self.config
        if len(cfg.wavelengths_m) <= 1:
            return np.asarray(cfg.wavelengths_m), np.asarray(cfg.weights)
        return pulse_nodes(self.spec.laser.wavelength_m, self.spec.laser.duration_s,
                           CHECK_FACTOR * cfg.pulse_points)


_OBJECTIVES: dict = {}    # (spec, settings bar the budget) -> HoleObjective, last few


def cached_objective(spec: Spec, config: HoleDesignConfig) -> HoleObjective:
    """:class:`HoleObjective`, reused while spec and settings are the same (a resume in
    the same process does not compile again)."""
    key = (spec.sha256, spec.source, json.dumps(vio.to_jsonable(config.identity()),
                                                sort_keys=True))
    if key not in _OBJECTIVES:
        while len(_OBJECTIVES) >= 4:
            _OBJECTIVES.pop(next(iter(_OBJECTIVES)))
        _OBJECTIVES[key] = HoleObjective(spec, config)
    fobj = _OBJECTIVES[key]
    fobj.config = config
    return fobj


# ---------------------------------------------------------------------------------
# the run
# ---------------------------------------------------------------------------------
@dataclass
class HoleRun:
    """Progress of a hole design (what the checkpoint holds)."""

    u: np.ndarray
    history: list = field(default_factory=list)
    reason: str | None = None
    evaluations: int = 0
    rejected: int = 0          # trial points that broke a rule (walls)


def run_hole_design(spec: Spec, out_dir, config: HoleDesignConfig, *, resume: bool = False,
                    progress: bool = True, objective: HoleObjective | None = None,
                    on_iteration: Callable[[HoleRun], None] | None = None) -> dict:
    """Optimize (or continue) and keep ``out_dir/checkpoint.json`` current.  Returns
    ``{"run", "start_check", "start", "scale", "objective"}``."""
    from scipy.optimize import minimize
    from tqdm import tqdm

    out = Path(out_dir)
    ck = out / CHECKPOINT
    keys = config.keys
    check = move_inside(spec, config)
    allowed = set(check["remaining"])
    fobj = objective or cached_objective(spec, config)
    if resume:
        from designer.design import matching_checkpoint

        saved = matching_checkpoint(ck, spec, config)
        try:
            d = saved["starts"][0]
            run = HoleRun(np.array(d["u"], dtype=float), list(d["history"]), d["reason"],
                          int(d["evaluations"]), int(d["rejected"]))
            scale = float.fromhex(saved["scale"])
        except (KeyError, TypeError, ValueError, IndexError):
            raise UsageError(f"{ck}: damaged checkpoint (starts); start afresh with "
                             "--overwrite instead of --resume") from None
        start_record = saved["start_record"]
    else:
        run = HoleRun(fobj.encode(check["values"]))
        start_record = None
        scale = None

    def checkpoint():
        vio.write_json(ck, {"spec_sha256": spec.sha256, "config": config.identity(),
                            "scale": float(scale).hex(), "start_record": start_record,
                            "starts": [{"u": [float(v) for v in run.u], "history": run.history,
                                        "reason": run.reason, "evaluations": run.evaluations,
                                        "rejected": run.rejected}]})

    cache: dict = {}
    n = len(keys)

    def evaluate(u):
        u = np.clip(np.asarray(u, dtype=float), 0.0, 1.0)
        hit = cache.get(u.tobytes())
        if hit is None:
            run.evaluations += 1
            broken = rule_findings(spec, fobj.values_of(u))
            if broken is None or not set(broken) <= allowed:
                run.rejected += 1
                hit = (None, None, None, broken)
            else:
                f, g, per = fobj(u)
                hit = (f, g, per, broken)
            cache[u.tobytes()] = hit
        return hit

    def record(u, k, seconds):
        f, g, per, broken = evaluate(u)
        pg = float(np.linalg.norm(np.where(((u <= 0) & (g > 0)) | ((u >= 1) & (g < 0)),
                                           0.0, g)))
        return {"iteration": k, "objective": float(f), "loss": -float(f) / scale,
                "scenarios": [float(v) for v in per],
                "values": fobj.values_of(u), "u": [float(v) for v in u],
                "projected_gradient": pg, "rules_broken": broken or [], "accepted": True,
                "seconds": seconds}

    if start_record is None:
        f0 = evaluate(run.u)[0]
        if f0 is None:
            raise SpecError(spec.source, "sample", "the start cannot be moved inside the "
                            f"fabrication rules ({', '.join(check['remaining'])})")
        scale = abs(f0) if f0 else 1.0
        start_record = record(run.u, 0, 0.0)
        run.history.append(start_record)
    checkpoint()
    bar = tqdm(total=config.iterations, initial=len(run.history) - 1, file=sys.stderr,
               desc="hole design", disable=not progress, leave=True)
    t0 = [time.perf_counter()]

    def fun(u):
        f, g, _, _ = evaluate(u)
        if f is None:
            # a rule the start keeps is broken: a wall the line search backs away from
            return abs(run.history[-1]["loss"]) * 10.0 + 10.0, np.zeros(n)
        return -f / scale, -g / scale

    def callback(intermediate_result):
        u = np.clip(np.asarray(intermediate_result.x, dtype=float), 0.0, 1.0)
        k = len(run.history)
        rec = record(u, k, time.perf_counter() - t0[0])
        t0[0] = time.perf_counter()
        run.history.append(rec)
        run.u = u
        bar.update(1)
        bar.set_postfix(objective=f"{rec['objective']:.4g}")
        if k % config.checkpoint_every == 0:
            checkpoint()
        if on_iteration is not None:
            on_iteration(run)
        if len(run.history) - 1 >= config.iterations:
            raise StopIteration

    try:
        left = config.iterations - (len(run.history) - 1)
        if left > 0:
            res = minimize(fun, run.u, jac=True, method="L-BFGS-B", bounds=[(0.0, 1.0)] * n,
                           callback=callback,
                           options={"maxiter": left, "maxfun": 20 * left + 20,
                                    "ftol": config.tolerance, "gtol": config.gradient_tolerance,
                                    "maxcor": 10})
            run.reason = ("iteration budget" if len(run.history) - 1 >= config.iterations
                          else f"L-BFGS-B: {res.message}")
        else:
            run.reason = "iteration budget"
    finally:
        bar.close()
    checkpoint()
    return {"run": run, "start_check": check, "start": start_record, "scale": scale,
            "objective": fobj}


# ---------------------------------------------------------------------------------
# outputs
# ---------------------------------------------------------------------------------
def _best(history: list) -> dict:
    return max(history, key=lambda r: r["objective"])


def bandwidth_check(fobj: HoleObjective, values: dict) -> dict:
    """The nominal-radius spectral average with the run's nodes against CHECK_FACTOR
    times as many (a resonance between the nodes shows as a difference)."""
    cfg = fobj.config
    x = fobj.encode(values)
    coarse = fobj.spectral(x, cfg.wavelengths_m, cfg.weights)
    lams, w = fobj.check_nodes()
    fine = fobj.spectral(x, lams, w) if len(lams) > len(cfg.wavelengths_m) else coarse
    peak = fobj.point(x, fobj.spec.laser.wavelength_m)
    rel = abs(coarse - fine) / abs(fine) if fine else 0.0
    return {"nodes": len(cfg.wavelengths_m), "average": coarse, "check_nodes": len(lams),
            "check_average": fine, "relative_difference": rel,
            "at_laser_wavelength": peak, "resolved": bool(rel <= BANDWIDTH_CHECK_TOL)}


def _gain(start_eval: dict, design_eval: dict, key: str) -> dict:
    """Nominal gain at the design's order count and at two orders more (evaluate's
    order study), with the error estimate of each figure."""
    a, b = start_eval["coupling"], design_eval["coupling"]
    ratio = b[key] / a[key] if a.get(key) else None

    def raised(c):
        conv = c["order_convergence"]
        if len(conv["beta_c"]) < 2 or not conv["beta_c"][0]:
            return None, None
        return c[key] * conv["beta_c"][-1] / conv["beta_c"][0], conv["orders"][-1]

    a2, n2 = raised(a)
    b2, _ = raised(b)
    ea, eb = a.get("relative_error_estimate"), b.get("relative_error_estimate")
    err = None if ea is None or eb is None else math.hypot(ea, eb)
    return {"figure": key, "start": a[key], "optimized": b[key], "ratio": ratio,
            "orders": a.get("fourier_orders"),
            "ratio_at_raised_orders": (b2 / a2) if a2 and b2 else None,
            "raised_orders": n2, "relative_error_estimate": err,
            "significant": (None if ratio is None or err is None
                            else bool(abs(ratio - 1.0) > 2.0 * err * ratio))}


def write_hole_outputs(spec: Spec, config: HoleDesignConfig, result: dict, out_dir, *,
                       status: Callable[[str], None] | None = None) -> dict:
    """design.toml, evaluation.json, history.json, comparison.json/.txt, convergence.png."""
    from designer.evaluate import evaluate, evaluation_json
    from designer.fabrication import check_design
    from designer.spec import with_absolute_files
    from designer.units import cleanroom_round

    say = status or (lambda m: None)
    out = Path(out_dir)
    run, fobj = result["run"], result["objective"]
    best = _best(run.history)
    start = result["start"]
    # rounded as a cleanroom draws it, inside the bounds (rules among them); a rounding
    # that would break a rule the optimum keeps falls back to the unrounded value
    values = cleanroom_round(best["values"], config.bounds)
    broken = rule_findings(spec, values)
    if broken is None or not set(broken) <= set(best["rules_broken"]):
        values = dict(best["values"])
    design_spec = spec_at(spec, values)
    raw = with_absolute_files(copy.deepcopy(design_spec.raw), spec.base_dir, keep_in=out)
    vio.write_atomic(out / "design.toml", dump_spec(raw))
    design_spec = load_spec(out / "design.toml")
    say("evaluating the optimized design (order count raised for the error estimate)")
    design_eval = vio.require_finite(evaluation_json(evaluate(design_spec, refine=True)),
                                     str(out / "design.toml"))
    vio.write_json(out / "evaluation.json", design_eval)
    say("evaluating the start design")
    start_spec = spec_at(spec, start["values"])
    start_eval = vio.require_finite(evaluation_json(evaluate(start_spec, refine=True)))
    say("bandwidth check at the start and the optimum")
    bw = {"start": bandwidth_check(fobj, start["values"]),
          "optimized": bandwidth_check(fobj, values)}
    verdict = check_design(design_spec)
    sc = result["start_check"]
    f_opt, _, per_opt = fobj(fobj.encode(values), grad=False)
    data = {
        "objective": config.objective, "aggregate": config.aggregate,
        "solver": "fmm", "fourier_orders": config.orders,
        "pulse": {"duration_s": spec.laser.duration_s,
                  "spectral_fwhm_m": (spectral_fwhm_m(spec.laser.wavelength_m,
                                                      spec.laser.duration_s)
                                      if spec.laser.duration_s else None),
                  "wavelengths_m": list(config.wavelengths_m), "weights": list(config.weights)},
        "radius_errors_m": [d * 1e-9 for d in config.radius_errors_nm],
        "variables": {k: {"start": start["values"][k], "optimized": values[k],
                          "bounds": list(config.bounds[k]),
                          "bounds_source": config.bounds_source.get(k)} for k in config.keys},
        "optimizer_objective": {"start": start["objective"], "optimized": f_opt,
                                "ratio": f_opt / start["objective"] if start["objective"]
                                else None,
                                "start_scenarios": start["scenarios"],
                                "optimized_scenarios": per_opt},
        "gain": _gain(start_eval, design_eval, config.objective if config.objective
                      != "coupling" else "beta_c_per_field_m_per_V"),
        "bandwidth_check": bw,
        "start_check": {"violations": sc["violations"], "moved": sc["moved"],
                        "remaining": sc["remaining"]},
        "design_rules": verdict.to_dict(),
        "iterations": len(run.history) - 1, "stopped": run.reason,
        "evaluations": run.evaluations, "rejected_trials": run.rejected,
    }
    vio.write_json(out / "comparison.json", data)
    history = {"objective": config.objective, "aggregate": config.aggregate,
               "method": "lbfgsb", "variables": list(config.keys), "solver": "fmm",
               "fourier_orders": config.orders, "start": start, "best": best,
               "starts": [{"index": 0, "stopped": run.reason, "history": run.history}]}
    vio.write_json(out / "history.json", history)
    vio.save_figure(convergence_figure(run.history, config), out / "convergence.png")
    text = comparison_text(data)
    vio.write_atomic(out / "comparison.txt", text + "\n")
    return data


def comparison_text(data: dict) -> str:
    fmt = lambda v: "n/a" if v is None else f"{v:.5g}"  # noqa: E731
    lines = [f"design: hole membrane, objective {data['objective']} ({data['aggregate']} over "
             f"{len(data['radius_errors_m'])} radius errors, mean over "
             f"{len(data['pulse']['wavelengths_m'])} wavelengths of the pulse), FMM orders "
             f"{data['fourier_orders']}", "",
             f"  {'variable':20s} {'start':>12s} {'optimized':>12s}   bounds (source)"]
    for k, v in data["variables"].items():
        lines.append(f"  {k:20s} {v['start']:12.5g} {v['optimized']:12.5g}   "
                     f"[{v['bounds'][0]:g}, {v['bounds'][1]:g}] ({v['bounds_source']})")
    o = data["optimizer_objective"]
    g = data["gain"]
    lines += ["", f"  optimizer objective: start {fmt(o['start'])}, optimized "
              f"{fmt(o['optimized'])}, ratio {fmt(o['ratio'])}",
              f"  nominal {g['figure']}: start {fmt(g['start'])}, optimized "
              f"{fmt(g['optimized'])}, ratio {fmt(g['ratio'])} at orders {g['orders']}, "
              f"{fmt(g['ratio_at_raised_orders'])} at {g['raised_orders']} (relative error "
              f"estimate {fmt(g['relative_error_estimate'])}"
              + ("" if g["significant"] is None else
                 ", a gain" if g["significant"] else ", inside the error: not a gain") + ")"]
    for name, b in data["bandwidth_check"].items():
        lines.append(f"  pulse average ({name}): {fmt(b['average'])} with {b['nodes']} "
                     f"wavelengths, {fmt(b['check_average'])} with {b['check_nodes']}"
                     + ("" if b["resolved"] else "  <- spectral structure between the "
                        "nodes: raise pulse_points") + f"; at the laser wavelength "
                     f"{fmt(b['at_laser_wavelength'])}")
    sc = data["start_check"]
    if sc["violations"] or sc["moved"]:
        lines += ["", "  start check:"] + [f"    {m}" for m in sc["violations"]]
        lines += [f"    moved {k}: {a:g} -> {b:g}" for k, (a, b) in sc["moved"].items()]
    rules = data["design_rules"]
    lines += ["", "  design-rule check (the check export applies): "
              + ("clean" if not rules.get("findings") else
                 f"{len(rules['findings'])} finding(s)")]
    lines += [f"    {f.get('message', f)}" for f in rules.get("findings", [])]
    lines.append(f"  {data['iterations']} iterations, {data['stopped']}; "
                 f"{data['rejected_trials']} trial points broke a rule and were refused")
    return "\n".join(lines)


def convergence_figure(history: list, config: HoleDesignConfig):
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure
    from matplotlib.ticker import MaxNLocator

    fig = Figure(figsize=(6.4, 4.0))
    ax = fig.subplots()
    its = [r["iteration"] for r in history]
    ax.plot(its, [r["objective"] for r in history], marker=".", label="objective")
    per = np.array([r["scenarios"] for r in history])
    if per.shape[1] > 1:
        for j, d in enumerate(config.radius_errors_nm):
            ax.plot(its, per[:, j], lw=0.8, alpha=0.6, label=f"radius {d:+.3g} nm")
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("accepted iteration")
    ax.set_ylabel({"coupling": "|beta_c|/E0 (m/V)", "structure_factor": "G/E0"}
                  [config.objective])
    ax.set_title(f"hole membrane: {config.objective}, pulse-averaged, {config.aggregate}")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    return fig


def design_holes(spec: Spec, out: Path, *, iterations: int | None = None,
                 resume: bool = False, progress: bool = True,
                 status: Callable[[str], None] | None = None) -> dict:
    """Parse, run and write a hole design into the prepared folder ``out``; returns the
    comparison dict."""
    config = parse_hole_optimize(spec, iterations)
    result = run_hole_design(spec, out, config, resume=resume, progress=progress)
    return write_hole_outputs(spec, config, result, out, status=status)


def hole_design_command(args, spec: Spec) -> int:
    """``velomatch design`` of a hole membrane (module docstring)."""
    from designer.spec import input_files

    config = parse_hole_optimize(spec, getattr(args, "iterations", None))
    out = vio.prepare_output_dir(args.out, overwrite=getattr(args, "overwrite", False),
                                 resume=getattr(args, "resume", False),
                                 inputs=input_files(spec), names=OUTPUT_FILES)

    def status(message):
        print(f"  {message}", file=sys.stderr, flush=True)

    print(f"designing {args.spec} -> {out} (hole membrane, Fourier modal method, "
          f"orders {config.orders}, {len(config.wavelengths_m)} wavelength(s) x "
          f"{len(config.radius_errors_nm)} radius error(s) per step)", file=sys.stderr)
    status("compiling the FMM gradient (once per run)")
    design_holes(spec, out, iterations=getattr(args, "iterations", None),
                 resume=getattr(args, "resume", False), status=status)
    print((out / "comparison.txt").read_text(), end="")
    return 0
