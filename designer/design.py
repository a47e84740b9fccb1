"""``velomatch design``: optimize a spec's sample, with checkpoints, resume and reports.

The ``[optimize]`` table of the spec::

    [optimize]
    objective = "coupling"        # | "structure_factor" | "damage_factor"
    variables = { thickness_nm = [40.0, 150.0] }   # or a list of names: family bounds
    iterations = 100              # budget per start
    starts = 1                    # 1 = the spec's design; more: seeded random starts
    seed = 0
    method = "adam"               # | "lbfgs"
    learning_rate = 0.05          # Adam step in unit-box variables
    tolerance = 1e-6              # relative loss change (for `patience` iterations)
    constraints = "penalty"       # | "augmented_lagrangian"
    max_field_V_per_m = 2e9       # optional cap on |E| in material at the spec's field
    checkpoint_every = 5
    refine_factor = 2.0           # the final re-evaluation uses step h / refine_factor
    robust = { voltage_kV = [95, 105], wavelength_nm = [790, 810], angle_deg = 1.0,
               etch_nm = 10, points = 3, aggregate = "worst", combine = "each" }
    # free-form density (needs [sample.freeform]): add "density" to the variables
    projection_beta = [1.0, 64.0]  # projection sharpness: start, largest
    projection_beta_every = 10     # iterations between doublings of beta
    threshold_spread = 0.25        # robust thresholds 0.5 +/- this (eroded/dilated)
    robust_formulation = true      # false: the nominal design alone is optimized
    length_margin = 1.0            # the filter is sized for this x the length rule

Free-form density (``variables`` includes ``"density"``, alone or with continuous
parameters): the raw density ``rho`` of the region cells (one value per FDFD cell,
bounds [0, 1] kept by the projected-gradient clip) goes through the cone filter, the
threshold projection with continuation ``beta(n) = min(beta0 2^(n // every), beta_max)``
and, when ``[fabrication]`` sets ``min_feature_nm`` / ``min_gap_nm``, the robust
eroded/nominal/dilated triple whose worst case is the objective (designer.freeform;
B. Bourdin, IJNME 50, 2143, 2001; F. Wang, B. S. Lazarov & O. Sigmund, Struct.
Multidisc. Optim. 43, 767, 2011).  The filter radius is
``freeform.filter_radius_for_length(max(min_feature, min_gap), threshold_spread)``.
``robust_formulation = false`` optimizes the nominal design alone (one solve per
iteration instead of three, and no penalty for a sensitivity to ±edge shifts; the
length rule then rests on the filter and on the final snap to the rules, which may
cost some of the gain: compare the reported figures of the binarized result).
The result is the best rule-clean of the run's end candidates binarized (the final
iterate; with Adam also the last accepted one; nominal design at beta = inf); its figures
are what the run reports, ``design.toml`` stores it as ``density.npy`` beside it, and
freeform.pattern_rule_check measures its smallest solid and void features
(``comparison.json`` -> ``freeform``).  The loss-change stop rule is off for density
runs (the continuation changes the loss on purpose): they run their iteration budget.

Outputs in the folder ``--out DIR`` (never reused unless ``--overwrite`` or
``--resume``): ``design.toml`` (the optimized design, a complete spec),
``evaluation.json`` (``velomatch evaluate design.toml`` reproduces it),
``refined.json`` / ``start_refined.json`` (the design and its start at one finer step,
with their error estimates), ``design.png`` (design and fields), ``history.json`` and
``convergence.png``, ``comparison.json`` / ``comparison.txt`` (start vs optimized: the
start check, every figure with its error, each gain with the combined error) and
``checkpoint.json`` (written every ``checkpoint_every`` iterations; ``--resume``
continues from it, bit-exactly).

A start outside the rules (:func:`start_check`: the design-rule check of the spec's own
start, and variables outside their bounds) is reported before the run and continues
from the start moved inside the bounds; the comparison says which start it shows.
"""

from __future__ import annotations

import copy
import dataclasses
import json
import math
import sys
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from designer import io as vio
from designer import objectives as obj
from designer import optimize as opt
from designer.errors import NumericalError, SpecError, UsageError
from designer.families import get_family
from designer.spec import Spec, dump_spec, load_spec
from designer.tables import TableReader

CHECKPOINT = "checkpoint.json"
FEASIBILITY_TOL = 1e-3   # g <= this counts as meeting a constraint (normalized g)


# ---------------------------------------------------------------------------------
# configuration
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class DesignConfig:
    """The validated ``[optimize]`` table (spec units for bounds)."""

    objective: str
    keys: tuple[str, ...]
    bounds: dict
    iterations: int = 50
    starts: int = 1
    seed: int = 0
    method: str = "lbfgsb"
    learning_rate: float = 0.05
    tolerance: float = 1e-6
    gradient_tolerance: float = 1e-8
    patience: int = 3
    constraints: str = "penalty"
    penalty_weight: float = 100.0
    al_mu: float = 10.0
    al_every: int = 5
    max_field_V_per_m: float | None = None
    checkpoint_every: int = 5
    refine_factor: float = 2.0
    robust: dict = field(default_factory=dict)
    aggregate: str = "worst"
    density: bool = False            # the free-form region's density is a variable
    projection: dict = field(default_factory=dict)   # beta0, beta_max, every, delta_eta
    bounds_source: dict = field(default_factory=dict)  # key -> where its bounds come from

    def identity(self) -> dict:
        """What must match for a resume (everything but the iteration budget)."""
        d = asdict(self)
        d.pop("iterations")
        d["keys"] = list(self.keys)
        d["bounds"] = {k: list(v) for k, v in self.bounds.items()}
        return d


def _pair(reader: TableReader, key: str, value, *, positive: bool = False) -> tuple[float, float]:
    if (not isinstance(value, (list, tuple)) or len(value) != 2
            or any(isinstance(v, bool) or not isinstance(v, (int, float)) for v in value)):
        raise SpecError(reader.source, reader.key(key), "must be a pair [lower, upper] of "
                        "numbers", value)
    lo, hi = float(value[0]), float(value[1])
    if not (math.isfinite(lo) and math.isfinite(hi)) or not lo < hi:
        raise SpecError(reader.source, reader.key(key), "needs lower < upper", value)
    if positive and lo <= 0:
        raise SpecError(reader.source, reader.key(key), "values must be > 0", value)
    return lo, hi


def parse_optimize(spec: Spec, iterations: int | None = None) -> DesignConfig:
    """Validate the spec's ``[optimize]`` table; SpecError names file, key and value."""
    from designer.fabrication import FabricationConflict, bounds_from_rules

    if not spec.optimize:
        raise SpecError(spec.source, "optimize", "velomatch design needs an [optimize] table "
                        "(at least: variables = [...])")
    r = TableReader(spec.optimize, "optimize", spec.source)
    family = get_family(spec.family)
    known = family.variables(spec.sample)
    known_text = ", ".join(sorted(known)) or "none"
    objective = r.string("objective", "coupling", choices=obj.OBJECTIVES)
    raw_vars = r.raw("variables")
    if isinstance(raw_vars, list):
        if not raw_vars or not all(isinstance(k, str) for k in raw_vars):
            raise r.error("variables", "must be a non-empty list of names or a table "
                          "{name = [lower, upper]}", raw_vars)
        wanted = {k: None for k in raw_vars}
    elif isinstance(raw_vars, dict) and raw_vars:
        wanted = dict(raw_vars)
    else:
        raise r.error("variables", "must be a non-empty list of names or a table "
                      "{name = [lower, upper]}", raw_vars)
    density = "density" in wanted
    if density:
        value = wanted.pop("density")
        if value not in (None, True, [0, 1], [0.0, 1.0]):
            raise SpecError(spec.source, "optimize.variables.density", "the density's "
                            "bounds are [0, 1]; write \"density\" in the list (or "
                            "density = [0.0, 1.0])", value)
        if getattr(spec.sample, "freeform", None) is None:
            raise SpecError(spec.source, "optimize.variables.density",
                            "needs a free-form region: add a [sample.freeform] table",
                            "density")
    variables = {}
    vr = TableReader(wanted, "optimize.variables", spec.source)
    for key, value in wanted.items():
        if key not in known:
            raise SpecError(spec.source, f"optimize.variables.{key}",
                            f"not a continuous parameter of the {spec.family} family "
                            f"(its variables: {known_text})", value)
        start, f_lo, f_hi = known[key]
        if value is None:
            lo, hi = f_lo, f_hi
        else:
            lo, hi = _pair(vr, key, value)
            slack = 1e-9 * max(1.0, abs(f_lo), abs(f_hi))
            if lo < f_lo - slack or hi > f_hi + slack:
                raise SpecError(spec.source, f"optimize.variables.{key}",
                                f"outside the family's physical bounds [{f_lo:g}, {f_hi:g}]",
                                value)
        variables[key] = (start, lo, hi)
    try:
        bounds = bounds_from_rules(spec.fabrication, variables)
    except FabricationConflict as exc:
        raise SpecError(spec.source, "optimize.variables", str(exc), raw_vars) from None
    bounds, sources = automatic_bounds(spec, variables, bounds,
                                       {k for k, v in wanted.items() if v is None})
    for key, (lo, hi) in bounds.items():
        if not hi - lo > 1e-12 * max(1.0, abs(lo)):
            raise SpecError(spec.source, f"optimize.variables.{key}",
                            f"the fabrication rules fix this variable at {lo:g}; remove it "
                            "from the variables", wanted[key])
    cfg = dict(
        iterations=r.number("iterations", 50, integer=True, minimum=1),
        starts=r.number("starts", 1, integer=True, minimum=1),
        seed=r.number("seed", 0, integer=True, minimum=0),
        method=_optimizer_choice(r, density),
        learning_rate=r.number("learning_rate", 0.05, minimum=0.0, exclusive_minimum=True),
        tolerance=r.number("tolerance", 1e-6, minimum=0.0),
        gradient_tolerance=r.number("gradient_tolerance", 1e-8, minimum=0.0),
        patience=r.number("patience", 3, integer=True, minimum=1),
        constraints=r.string("constraints", "penalty", choices=opt.CONSTRAINT_METHODS),
        penalty_weight=r.number("penalty_weight", 100.0, minimum=0.0, exclusive_minimum=True),
        al_mu=r.number("al_mu", 10.0, minimum=0.0, exclusive_minimum=True),
        al_every=r.number("al_every", 5, integer=True, minimum=1),
        max_field_V_per_m=r.number("max_field_V_per_m", None, minimum=0.0,
                                   exclusive_minimum=True),
        checkpoint_every=r.number("checkpoint_every", 5, integer=True, minimum=1),
        refine_factor=r.number("refine_factor", 2.0, minimum=1.0, exclusive_minimum=True),
    )
    robust, aggregate = _parse_robust(r.subtable("robust"), spec)
    projection = _parse_projection(r, density)
    r.finish()
    if iterations is not None:
        if iterations < 1:
            raise UsageError(f"--iterations = {iterations!r}: must be >= 1")
        cfg["iterations"] = int(iterations)
    return DesignConfig(objective=objective, keys=tuple(variables), bounds=bounds,
                        robust=robust, aggregate=aggregate, density=density,
                        projection=projection, bounds_source=sources, **cfg)


def _optimizer_choice(r: TableReader, density: bool) -> str:
    """``optimizer`` (``method`` is the older spelling of the same key)."""
    if r.has("optimizer") and r.has("method"):
        raise r.error("method", "give the optimizer once: `optimizer` (or the older "
                      "spelling `method`), not both", r.raw("method"))
    key = "method" if r.has("method") else "optimizer"
    default = opt.DENSITY_DEFAULT if density else opt.PARAMETRIC_DEFAULT
    return r.string(key, default, choices=opt.METHODS)


DEFAULT_SPAN = 4.0   # no rule bounds a length: [start / 4, 4 start] (within the family's)


def automatic_bounds(spec: Spec, variables: dict, bounds: dict, automatic: set
                     ) -> tuple[dict, dict]:
    """Bounds of the variables listed by name (``automatic``) from the fabrication rules.

    Starting from the family's physical range intersected with the rules
    (``fabrication.bounds_from_rules``: etch depth, thickness, minimum feature and gap),
    a tooth height is also capped by the aspect-ratio rule at its widest possible
    lateral size (``max_aspect_ratio * period / 2``; the exact coupling with the duty
    cycle stays a constraint), and a length that no rule bounds on a side gets
    ``start / DEFAULT_SPAN`` or ``DEFAULT_SPAN * start`` there instead of the family's
    wide physical range.  Returns ``(bounds, sources)``, sources naming for each key
    where its bounds come from.
    """
    rules = spec.fabrication
    out, sources = dict(bounds), {}
    for key, (start, f_lo, f_hi) in variables.items():
        lo, hi = bounds[key]
        why = []
        period = getattr(spec.sample, "period_m", None)
        if key == "duty_cycle" and period and "period_nm" not in variables:
            # minimum tooth and gap widths at the sample's (fixed) period
            d_lo = rules.min_feature_m / period
            d_hi = 1.0 - rules.min_gap_m / period
            if d_lo > lo or d_hi < hi:
                lo, hi = max(lo, d_lo), min(hi, d_hi)
                why.append("min_feature_nm, min_gap_nm")
                if not lo < hi:
                    raise SpecError(spec.source, "optimize.variables.duty_cycle",
                                    "min_feature_nm + min_gap_nm leave no room for the "
                                    f"duty cycle at the period {period * 1e9:.4g} nm",
                                    "duty_cycle")
        if key not in automatic:
            if not why and (lo > f_lo * (1 + 1e-12) + 1e-12
                            or hi < f_hi * (1 - 1e-12) - 1e-12):
                why.append("fabrication rules")    # bounds_from_rules tightened the pair
            out[key] = (lo, hi)
            sources[key] = "[optimize] variables" + (f" and {', '.join(why)}" if why else "")
            continue
        if lo > f_lo * (1 + 1e-12) + 1e-12 or hi < f_hi * (1 - 1e-12) - 1e-12:
            why.append("fabrication rules")
        if (key.endswith("tooth_height_nm") and math.isfinite(rules.max_aspect_ratio)
                and getattr(spec.sample, "period_m", None)):
            cap = rules.max_aspect_ratio * 0.5 * spec.sample.period_m * 1e9
            if cap < hi:
                hi = max(lo, cap)
                why.append("max_aspect_ratio")
        if key.endswith("_nm") and start > 0:
            lo_rule = lo > f_lo * (1 + 1e-12) + 1e-12
            hi_rule = hi < f_hi * (1 - 1e-12) - 1e-12
            if not lo_rule:
                lo = max(lo, start / DEFAULT_SPAN)
            if not hi_rule:
                hi = min(hi, max(start * DEFAULT_SPAN, lo * DEFAULT_SPAN))
            if not (lo_rule and hi_rule):
                why.append(f"{DEFAULT_SPAN:g}x around the start where no rule applies")
        if not lo < hi:
            lo, hi = bounds[key]
        out[key] = (lo, hi)
        sources[key] = ", ".join(why) or "family range"
    return out, sources


def _parse_projection(r: TableReader, density: bool) -> dict:
    keys = ("projection_beta", "projection_beta_every", "threshold_spread",
            "robust_formulation", "length_margin")
    if not density:
        for key in keys:
            if r.has(key):
                raise r.error(key, "only for a free-form density (add \"density\" to the "
                              "variables)", r.raw(key))
        return {}
    beta0, beta_max = _pair(r, "projection_beta", r.raw("projection_beta", [1.0, 64.0]),
                            positive=True) if r.has("projection_beta") else (1.0, 64.0)
    every = r.number("projection_beta_every", 10, integer=True, minimum=1)
    spread = r.number("threshold_spread", 0.25, minimum=0.0, maximum=0.5,
                      exclusive_minimum=True, exclusive_maximum=True)
    robust = r.boolean("robust_formulation", True)
    margin = r.number("length_margin", 1.0, minimum=1.0, maximum=4.0)
    return {"beta0": beta0, "beta_max": beta_max, "every": every, "factor": 2.0,
            "delta_eta": spread, "robust": robust, "length_margin": margin}


def _parse_robust(r: TableReader, spec: Spec) -> tuple[dict, str]:
    out = {}
    if r.has("voltage_kV"):
        out["voltage_kV"] = _pair(r, "voltage_kV", r.raw("voltage_kV"), positive=True)
    if r.has("wavelength_nm"):
        out["wavelength_nm"] = _pair(r, "wavelength_nm", r.raw("wavelength_nm"), positive=True)
    angle = r.number("angle_deg", None, minimum=0.0, exclusive_minimum=True, maximum=30.0)
    if angle is not None:
        out["angle_deg"] = angle
    etch = r.number("etch_nm", None, minimum=0.0, exclusive_minimum=True)
    if etch is not None:
        if not obj.has_lateral_edges(spec):
            raise r.error("etch_nm", "an over/under-etch tolerance needs lateral edges (a "
                          "grating or a membrane with slits)", etch)
        out["etch_nm"] = etch
    points = r.number("points", 3, integer=True, minimum=2, maximum=9)
    aggregate = r.string("aggregate", "worst", choices=obj.AGGREGATES)
    combine = r.string("combine", "each", choices=("each", "all"))
    r.finish()
    if out:
        out.update(points=points, combine=combine)
    return out, aggregate


def start_check(spec: Spec, config: DesignConfig, grid_step_m: float | None = None) -> dict:
    """Does the spec's own start keep the rules and the bounds, and where does the run
    begin?

    ``design_rules`` / ``violations``: the design-rule verdict of the spec's own start
    (designer.fabrication.check_design, the check ``export`` enforces, on the grid a
    free-form pattern lives on: ``grid_step_m``, default the spec's).  ``moved``: for
    every variable outside its bounds, ``from`` (the spec's value), ``to`` (the nearest
    bound, where the run starts) and ``why`` (the bound and the rule it comes from);
    ``outside_bounds`` says the same in words.  ``continues_from`` is ``"spec"`` (the
    run starts at the spec's own design) or ``"moved"``; ``within_rules`` is true when
    nothing was found and nothing moved."""
    from designer.fabrication import check_design

    known = get_family(spec.family).variables(spec.sample)
    verdict = check_design(spec, grid_step_m=grid_step_m)
    values = {k: float(known[k][0]) for k in config.keys}
    moved, words = {}, []
    for key in config.keys:
        value = values[key]
        lo, hi = config.bounds[key]
        inside = min(max(value, lo), hi)
        if inside == value:
            continue
        side = "lower" if value < lo else "upper"
        source = config.bounds_source.get(key, "[optimize] variables")
        why = f"outside [{lo:g}, {hi:g}]: moved to the {side} bound (bounds from {source})"
        moved[key] = {"from": value, "to": inside, "why": why}
        words.append(f"sample.{key} = {value:g} is outside its bounds [{lo:g}, {hi:g}] "
                     f"({source}): the run starts from {inside:g}")
    return {"within_rules": verdict.clean and not moved,
            "spec_values": values,
            "bounds": {k: list(config.bounds[k]) for k in config.keys},
            "bounds_from": {k: config.bounds_source.get(k, "[optimize] variables")
                            for k in config.keys},
            "design_rules": verdict.to_dict(), "violations": verdict.messages,
            "moved": moved, "outside_bounds": words,
            "continues_from": "moved" if moved else "spec"}


def start_check_lines(check: dict) -> list[str]:
    """What ``design`` says about a start that breaks the rules (empty when it keeps
    them)."""
    if check["within_rules"]:
        return []
    n = len(check["violations"])
    lines = ["warning: the spec's own start is outside the rules"
             + (f": the design-rule check (the one export applies) finds {n} violation(s)"
                if n else "")]
    lines += [f"  {m}" for m in check["violations"][:20]]
    if n > 20:
        lines.append(f"  ... and {n - 20} more (comparison.json -> start_check)")
    lines += [f"  {m}" for m in check["outside_bounds"]]
    if check["moved"]:
        moved = ", ".join(f"{k} = {v['to']:g}" for k, v in check["moved"].items())
        lines.append(f"  the run continues from the start moved inside the bounds ({moved})")
    else:
        lines.append("  no variable is outside its bounds: the run starts from the spec's "
                     "own design")
    return lines


# ---------------------------------------------------------------------------------
# the problem: models, loss, step
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class DesignProblem:
    """Everything a run needs, built once from a spec and its configuration."""

    spec: Spec
    config: DesignConfig
    method: str                       # solver: "fdfd" | "layers"
    grid_step_m: float | None
    models: tuple
    box: opt.Box
    x_start: np.ndarray
    constraint_names: tuple[str, ...]
    loss: Callable
    step: Callable
    evaluate: Callable
    transform: object
    scale: float = 1.0               # loss scale: |F| of the start design
    chain: object = None             # objectives.DensityChain of a free-form density
    pattern_evaluate: Callable | None = None   # loss of [u_keys, pattern] (no projection)
    rho_start: np.ndarray | None = None        # the spec's density on the region cells
    value_grad: Callable | None = None   # (u, aux) -> ((loss, extras), grad)
    update: Callable | None = None       # (grad, state, u, scale) -> (u_next, state)
    objective_grad: Callable | None = None   # (u, aux) -> ((-F/scale, extras), grad)
    constraint_jac: Callable | None = None   # (u, aux) -> (g, dg/du)

    @property
    def n_keys(self) -> int:
        return len(self.config.keys)

    def x_of(self, u) -> np.ndarray:
        return np.asarray(opt.from_unit(np.asarray(u, dtype=float), self.box))

    def beta_at(self, iteration: int) -> float:
        """Projection sharpness of the continuation at ``iteration``."""
        from designer import freeform as ff

        pr = self.config.projection
        return float(ff.beta_schedule(pr["beta0"], every=pr["every"], factor=pr["factor"],
                                      beta_max=pr["beta_max"])(iteration))

    def aux(self, u, multipliers, iteration: int = 0) -> tuple:
        """The loss's data at ``u``: masks, multipliers, scale (and beta for a density)."""
        base = (self.masks(u), np.asarray(multipliers, dtype=float), self.scale)
        return base + ((self.beta_at(iteration),) if self.chain is not None else ())

    def binarized(self, u) -> np.ndarray:
        """The fabricated free-form pattern of ``u``: the nominal design at beta = inf,
        with what breaks the minimum feature and gap opened/closed away
        (designer.families.region.snap_to_rules)."""
        from designer.families import region

        pattern = self.chain.binarized(self.x_of(u)[self.n_keys:].reshape(self.chain.shape))
        return region.snap_to_rules(self.spec.sample.freeform, self.models[0].layout, pattern,
                                    self.spec.fabrication)

    def pattern_u(self, u, pattern) -> np.ndarray:
        return np.concatenate([np.asarray(u, dtype=float)[:self.n_keys],
                               np.asarray(pattern, dtype=float).ravel()])

    def start_pattern(self) -> np.ndarray:
        """What the start spec evaluates to: its density binarized at 0.5, unfiltered."""
        from designer import freeform as ff

        return np.asarray(ff.threshold_projection(self.rho_start, math.inf))

    def pattern_masks(self, u, pattern) -> tuple:
        x = self.x_of(u)[:self.n_keys]
        return tuple(m.material_mask(x, density=pattern) for m in self.models)

    def values_of(self, u) -> dict:
        return {k: float(v) for k, v in zip(self.config.keys, self.x_of(u))}

    def masks(self, u) -> tuple:
        if self.chain is not None:
            return self.pattern_masks(u, self.binarized(u))
        x = self.x_of(u)
        return tuple(m.material_mask(x) for m in self.models)

    def valid(self, u) -> bool:
        """True when every scenario's geometry at ``u`` is a valid sample."""
        family = get_family(self.spec.family)
        values = self.values_of(u)
        try:
            q = family.replace(self.spec.sample, values)
            family.check_path(q, self.spec.context)
            full = {k: v[0] for k, v in family.variables(q).items()}
            for m in self.models:
                if m.scenario.etch_m:
                    family.replace(self.spec.sample, obj.etch_values(
                        self.spec.family, q, full, m.scenario.etch_m))
        except (ValueError, SpecError):
            return False
        return True

    def design_params(self, u, density_file: str = "density.npy"):
        """The family parameters of ``u``; a free-form region holds the binarized
        pattern (to be saved as ``density_file`` beside the design spec)."""
        q = get_family(self.spec.family).replace(self.spec.sample, self.values_of(u))
        if self.chain is not None:
            from designer.families import region

            q = dataclasses.replace(q, freeform=region.with_pattern(
                q.freeform, self.binarized(u), self.models[0].layout, density_file))
        return q


_PROBLEMS: dict = {}     # (spec sha256, config identity) -> DesignProblem, last few


def cached_problem(spec: Spec, config: DesignConfig) -> DesignProblem:
    """:func:`build_problem`, reused while spec and settings (bar the iteration budget)
    are the same, so a resume in the same process does not compile again."""
    key = (spec.sha256, spec.source, json.dumps(vio.to_jsonable(config.identity()),
                                                sort_keys=True), _density_digest(spec))
    problem = _PROBLEMS.get(key)
    if problem is None:
        problem = build_problem(spec, config)
        while len(_PROBLEMS) >= 4:
            _PROBLEMS.pop(next(iter(_PROBLEMS)))
        _PROBLEMS[key] = problem
    return dataclasses.replace(problem, config=config, scale=1.0)


def _density_digest(spec: Spec) -> str:
    # a stored density is a file: the spec's hash does not cover its content
    fr = getattr(spec.sample, "freeform", None)
    if fr is None or fr.density is None:
        return ""
    import hashlib

    return hashlib.sha256(np.ascontiguousarray(fr.density).tobytes()).hexdigest()


def build_problem(spec: Spec, config: DesignConfig) -> DesignProblem:
    """The models of every scenario and the loss, step and evaluate functions.

    The loss takes ``aux = (masks, multipliers, scale)``: the loss scale is data, so
    one compilation serves the scale's own evaluation and the whole run."""
    from designer.evaluate import choose_method, default_grid_step
    from designer.fabrication import constraint_function

    family = get_family(spec.family)
    method = choose_method(spec)
    h = None
    if method == "fdfd":
        h = spec.solver.grid_step_m or default_grid_step(spec)
    keys = config.keys
    box = opt.make_box(config.bounds, keys)
    known = family.variables(spec.sample)
    x_start = np.clip(np.array([known[k][0] for k in keys], dtype=float), box.lower, box.upper)
    if config.density and method != "fdfd":
        raise SpecError(spec.source, "solver.method", "a free-form density needs the FDFD "
                        "solver", spec.solver.method)
    # a robust density solves three designs per scenario: keep all their factorizations
    cache = 4 if config.density else 2
    models = tuple(obj.build_model(sc, spec, keys, x_start, config.bounds, method, h,
                                   cache_size=cache)
                   for sc in obj.scenarios(spec, config.robust))
    objective = obj.objective_function(list(models), config.objective, config.aggregate)
    chain = pattern_objective = rho_start = None
    if config.density:
        chain, rho_start = _density_chain(spec, config, models)
        pattern_objective = obj.pattern_objective_function(
            list(models), config.objective, config.aggregate, chain.param.shape, len(keys))
        objective = obj.freeform_objective_function(list(models), config.objective,
                                                    config.aggregate, chain, len(keys))
        raw_start = chain.param.reduce(rho_start)    # pattern -> design variables
        n = raw_start.size
        box = opt.Box(np.concatenate([box.lower, np.zeros(n)]),
                      np.concatenate([box.upper, np.ones(n)]))
        x_start = np.concatenate([x_start, raw_start.ravel()])
    names, fab_g = constraint_function(spec.fabrication, known)
    cap = (obj.field_cap_constraint(list(models), config.max_field_V_per_m)
           if config.max_field_V_per_m else None)
    constraint_names = tuple(names) + (tuple(f"max_field[{m.scenario.label}]" for m in models)
                                       if cap else ())
    constraints = None
    if constraint_names:
        import jax.numpy as jnp

        def constraints(x, e_max):
            parts = []
            if names:
                parts.append(fab_g({k: x[i] for i, k in enumerate(keys)}))
            if cap is not None:
                parts.append(cap(e_max))
            return jnp.concatenate(parts)

    penalty = opt.Penalty(config.constraints, config.penalty_weight, config.al_mu)
    transform = opt.make_transform(config.method, config.learning_rate)
    problem = DesignProblem(spec, config, method, h, models, box, x_start, constraint_names,
                            None, None, None, transform, chain=chain, rho_start=rho_start)
    problem = _finish_problem(problem, objective, constraints, penalty)
    if pattern_objective is not None:
        # the pattern loss takes [continuous values, region pattern] (pattern-sized box)
        n_pat = int(np.prod(chain.param.shape))
        k = len(keys)
        pattern_box = opt.Box(np.concatenate([problem.box.lower[:k], np.zeros(n_pat)]),
                              np.concatenate([problem.box.upper[:k], np.ones(n_pat)]))
        pattern_loss = opt.make_loss(pattern_objective, constraints, pattern_box, penalty)
        problem = dataclasses.replace(problem, pattern_evaluate=opt.make_evaluate(pattern_loss))
    return problem


def _finish_problem(problem: DesignProblem, objective, constraints, penalty) -> DesignProblem:
    import jax
    import jax.numpy as jnp

    loss = opt.make_loss(objective, constraints, problem.box, penalty)
    transform = problem.transform

    def update(grad, state, u, scale):
        updates, state = transform.update(grad, state, u)
        return opt.project(u + scale * updates), state

    # MMA takes the objective and the constraints apart (no penalty in the objective)
    bare = opt.make_loss(objective, None, problem.box, penalty)
    lower, upper = jnp.asarray(problem.box.lower), jnp.asarray(problem.box.upper)

    def g_of(u, aux):
        masks = aux[0]
        x = lower + opt.project(u) * (upper - lower)
        _, _, e_max = objective(x, masks, *aux[3:])
        return constraints(x, e_max)

    cjac = None
    if constraints is not None:
        m = len(problem.constraint_names)

        def cj(u, aux):
            # row by row (one adjoint solve each): the solver's callback is not vmapped
            g, pull = jax.vjp(lambda v: g_of(v, aux), u)
            rows = [pull(jnp.zeros(m).at[i].set(1.0))[0] for i in range(m)]
            return g, jnp.stack(rows)

        cjac = jax.jit(cj)
    return dataclasses.replace(problem, loss=loss, step=opt.make_step(loss, problem.transform),
                               evaluate=opt.make_evaluate(loss),
                               value_grad=jax.jit(jax.value_and_grad(loss, has_aux=True)),
                               update=jax.jit(update),
                               objective_grad=jax.jit(jax.value_and_grad(bare, has_aux=True)),
                               constraint_jac=cjac)


def length_rule(spec: Spec) -> float:
    """The free-form minimum length (m): the larger of min_feature and min_gap (the
    robust formulation imposes one length on both phases); 0 = no rule."""
    return max(spec.fabrication.min_feature_m, spec.fabrication.min_gap_m)


def _density_chain(spec: Spec, config: DesignConfig, models) -> tuple:
    from designer import freeform as ff
    from designer.families import region

    family = get_family(spec.family)
    fr = spec.sample.freeform
    layout = models[0].layout
    try:
        cells = region.region_cells(fr, layout)
        param = region.parametrization(fr, layout)
        for m in models[1:]:
            if region.pattern_shape(fr, m.layout) != param.shape:
                raise ValueError("the robust scenarios put the free-form region on grids "
                                 "of different sizes; drop the wavelength band")
    except ValueError as exc:
        raise SpecError(spec.source, "sample.freeform", str(exc)) from None
    length = length_rule(spec)
    radius = delta = None
    if length > 0:
        delta = config.projection["delta_eta"]
        radius = ff.filter_radius_for_length(config.projection["length_margin"] * length,
                                             delta)
        if not config.projection["robust"]:
            delta = None     # the nominal design only: the final snap enforces the rules
    g = layout.grid
    chain = obj.DensityChain(param.raw_shape, g.dx, g.dz, cells.periodic_x, radius, delta,
                             param=param)
    return chain, np.asarray(family.freeform_start(spec.sample, layout), dtype=float)


# ---------------------------------------------------------------------------------
# one start
# ---------------------------------------------------------------------------------
@dataclass
class StartState:
    """Mutable progress of one start (kept in the checkpoint)."""

    index: int
    u: np.ndarray
    opt_state: object
    multipliers: np.ndarray
    losses: list = field(default_factory=list)
    history: list = field(default_factory=list)
    reason: str | None = None
    step_scale: float = 1.0          # Adam step control
    accepted: dict | None = None     # Adam step control: the last accepted point
    evaluations: int = 0             # objective evaluations (line searches included)
    restarts: int = 0                # L-BFGS-B restarts after a cell-scale pattern move


def _record(problem: DesignProblem, k: int, u, loss, extras, pg, seconds) -> dict:
    value, per, g = extras
    return {"iteration": k, "loss": float(loss), "objective": float(value),
            "scenarios": [float(v) for v in np.asarray(per)],
            "constraints": [float(v) for v in np.asarray(g)],
            "values": problem.values_of(u), "projected_gradient": pg, "seconds": seconds}


def run_start(problem: DesignProblem, st: StartState, *, checkpoint: Callable[[], None],
              bar=None, on_iteration: Callable[[StartState], None] | None = None) -> None:
    """Iterate one start until its stop rule fires (mutates ``st``)."""
    method = problem.config.method
    runner = {"lbfgsb": _run_lbfgsb, "mma": _run_mma, "adam": _run_adam}.get(method)
    if runner is not None:
        runner(problem, st, checkpoint=checkpoint, bar=bar, on_iteration=on_iteration)
        return
    _run_optax(problem, st, checkpoint=checkpoint, bar=bar, on_iteration=on_iteration)


def _after_record(problem, st, k, extras, bar, checkpoint, on_iteration):
    cfg = problem.config
    if bar is not None:
        bar.update(1)
        bar.set_postfix(objective=f"{float(extras[0]):.4g}")
    if (k + 1) % cfg.checkpoint_every == 0:
        checkpoint()
    if on_iteration is not None:
        on_iteration(st)


def _scale_pattern(problem: DesignProblem) -> np.ndarray:
    """The pattern whose figure sets a density run's loss scale: the start pattern, or,
    when that is uniform (a grey start has no pattern and couples ~0), the family's own
    pattern in the region."""
    from designer import freeform as ff

    pattern = problem.start_pattern()
    if np.ptp(pattern) > 0:
        return pattern
    fr = problem.spec.sample.freeform
    own = dataclasses.replace(fr, density_value=None, density=None, density_file=None,
                              pixel_m=None, origin_m=None)
    sample = dataclasses.replace(problem.spec.sample, freeform=own)
    rho = get_family(problem.spec.family).freeform_start(sample, problem.models[0].layout)
    return np.asarray(ff.threshold_projection(np.asarray(rho, dtype=float), math.inf))


def _evaluate_with_grad(problem, u, multipliers, k, objective_only=False):
    aux = problem.aux(u, multipliers, k)
    fn = problem.objective_grad if objective_only else problem.value_grad
    (loss, extras), grad = fn(np.asarray(u, dtype=float), aux)
    loss, grad = float(loss), np.asarray(grad, dtype=float)
    if not (math.isfinite(loss) and np.all(np.isfinite(grad))):
        what = "objective" if not math.isfinite(loss) else "gradient"
        raise NumericalError(
            f"{problem.spec.source}: [optimize] objective = "
            f"{problem.config.objective!r}: the {what} is not finite at iteration {k} "
            "(e.g. a damage factor whose binarized pattern holds no material, as a "
            "uniform grey start does); start from a pattern with material in it, or "
            "optimize another figure first")
    return loss, grad, extras, aux


def _run_lbfgsb(problem, st, *, checkpoint, bar=None, on_iteration=None) -> None:
    """scipy L-BFGS-B on the unit box; every accepted iterate is recorded.

    The line search only accepts steps that decrease the loss (sufficient decrease), so
    the recorded losses never rise.  Augmented-Lagrangian multipliers change the loss:
    the run restarts L-BFGS-B after each ``al_every`` iterations with the new ones.
    A resume restarts from the last accepted point (the quasi-Newton memory starts
    afresh; the iterates of a resumed run are not bit-identical to an uninterrupted
    one)."""
    from scipy.optimize import minimize

    cfg = problem.config
    penalty = opt.Penalty(cfg.constraints, cfg.penalty_weight, cfg.al_mu)
    st.reason = None
    n = np.asarray(st.u).size
    while True:
        if len(st.losses) >= cfg.iterations:
            st.reason = "iteration budget"
            return
        t0 = [time.perf_counter()]
        last = {}

        def fun(u):
            u = np.clip(np.asarray(u, dtype=float), 0.0, 1.0)
            st.evaluations += 1
            if not problem.valid(u):
                # outside the family's geometry: a wall the line search backs away from
                ref = st.losses[-1] if st.losses else 0.0
                return abs(ref) * 10.0 + 10.0, np.zeros(n)
            loss, grad, extras, _ = _evaluate_with_grad(problem, u, st.multipliers,
                                                        len(st.losses))
            last[u.tobytes()] = (loss, grad, extras)
            return loss, grad

        def record(u):
            u = np.clip(np.asarray(u, dtype=float), 0.0, 1.0)
            hit = last.get(u.tobytes())
            if hit is None:
                fun(u)
                hit = last[u.tobytes()]
            loss, grad, extras = hit
            k = len(st.losses)
            pg = opt.projected_gradient_norm(u, grad)
            rec = _record(problem, k, u, loss, extras, pg, time.perf_counter() - t0[0])
            rec["accepted"] = True
            st.history.append(rec)
            st.losses.append(loss)
            st.u = u
            t0[0] = time.perf_counter()
            _after_record(problem, st, k, extras, bar, checkpoint, on_iteration)
            return extras

        if not st.losses:
            record(st.u)
            continue
        chunk = cfg.iterations - len(st.losses)
        if cfg.constraints == "augmented_lagrangian" and problem.constraint_names:
            chunk = min(chunk, cfg.al_every)

        def callback(intermediate_result):
            record(intermediate_result.x)
            if len(st.losses) >= cfg.iterations:
                raise StopIteration

        res = minimize(fun, np.asarray(st.u, dtype=float), jac=True, method="L-BFGS-B",
                       bounds=[(0.0, 1.0)] * n, callback=callback,
                       options={"maxiter": chunk, "maxfun": 20 * chunk + 20,
                                "ftol": cfg.tolerance, "gtol": cfg.gradient_tolerance,
                                "maxcor": 10})
        if cfg.constraints == "augmented_lagrangian" and problem.constraint_names:
            g = np.asarray(st.history[-1]["constraints"])
            st.multipliers = opt.update_multipliers(g, st.multipliers, penalty)
            # the loss changed: the last point is re-recorded under the new multipliers
            if res.nit < chunk and len(st.losses) < cfg.iterations:
                st.reason = f"L-BFGS-B: {res.message}"
                return
            continue
        if len(st.losses) >= cfg.iterations:
            st.reason = "iteration budget"
            return
        st.reason = f"L-BFGS-B: {res.message}"
        if problem.chain is not None or st.restarts >= CELL_RESTARTS:
            return
        # the objective is only meaningful above the grid's cell: a line search that
        # stops on the cell ripple's false zeros of the gradient is no optimum there
        if not _cell_pattern_moves(problem, st, fun, record):
            if len(st.losses) >= cfg.iterations:
                st.reason = "iteration budget"
            return
        st.restarts += 1


CELL_RIPPLE = 3e-3   # relative gain a cell-scale move must beat (the default grid's ripple
                     # bound, tests/test_smooth_objective.py)
CELL_RESTARTS = 4    # L-BFGS-B restarts after cell-scale pattern moves, at most


def cell_steps(problem: DesignProblem) -> np.ndarray:
    """One grid cell per variable in unit-box coordinates.

    A length (``*_nm``) moves a surface by its own change: ``h / (hi - lo)``.  Other
    variables (a duty cycle, an angle) have no length of their own: 1/48 of their box,
    about a cell of the default grid for a duty cycle (common practice, no source)."""
    span = problem.box.upper - problem.box.lower
    h_nm = (problem.grid_step_m or 0.0) * 1e9
    fallback = np.full(span.shape, 1.0 / 48.0)
    if h_nm <= 0.0:
        return fallback
    is_length = np.array([k.endswith("_nm") for k in problem.config.keys]
                         + [False] * (span.size - problem.n_keys))
    return np.where(is_length, h_nm / span, fallback)


def _cell_pattern_moves(problem, st, fun, record) -> bool:
    """A compass search (R. Hooke & T. A. Jeeves, J. ACM 8, 212, 1961) on the cell
    scale from the last accepted point: steps of 2 cells per variable, doubled after a
    gain and halved to one cell after a miss.  A move is accepted (and recorded) only
    when the loss falls by more than ``CELL_RIPPLE`` of itself, so accepted records
    keep or lower the loss.  True when at least one move was accepted."""
    cfg = problem.config
    u = np.asarray(st.u, dtype=float)
    loss = st.losses[-1]
    cell = cell_steps(problem)
    directions = [(i, s) for i in range(u.size) for s in (1.0, -1.0)]
    scale, moved = 2.0, False
    while len(st.losses) < cfg.iterations:
        gained = None
        for i, s in directions:
            cand = u.copy()
            cand[i] = np.clip(cand[i] + s * scale * cell[i], 0.0, 1.0)
            if cand[i] == u[i] or not problem.valid(cand):
                continue
            trial, _ = fun(cand)
            if trial < loss - CELL_RIPPLE * abs(loss):
                gained = (i, s)
                break
        if gained is None:
            if scale <= 1.0:
                return moved
            scale = max(1.0, scale / 2.0)
            continue
        u, loss = cand, trial
        record(cand)
        st.history[-1]["step"] = f"cell pattern ({scale:g} cells)"
        moved = True
        directions.remove(gained)
        directions.insert(0, gained)
        scale *= 2.0
    return moved


def _run_adam(problem, st, *, checkpoint, bar=None, on_iteration=None) -> None:
    """Adam with step control and (for a density) the projection continuation.

    Each iteration evaluates the loss and gradient at the candidate.  At a fixed
    projection sharpness a candidate whose loss is above the last accepted one is
    rejected (recorded with ``accepted: false``): the run returns to the accepted point
    and retries its Adam step at half the scale (opt.controlled_step).  A change of the
    sharpness changes the loss itself, so the first candidate after it is accepted."""
    cfg = problem.config
    tolerance = 0.0 if problem.chain is not None else cfg.tolerance
    rule = opt.StopRule(cfg.iterations, tolerance, cfg.gradient_tolerance, cfg.patience)
    penalty = opt.Penalty(cfg.constraints, cfg.penalty_weight, cfg.al_mu)
    st.reason = None
    while True:
        accepted_losses = [r["loss"] for r in st.history if r.get("accepted", True)]
        pg = st.accepted["pg"] if st.accepted else None
        reason = opt.stop_reason(accepted_losses, np.inf if pg is None else pg, rule)
        if len(st.losses) >= cfg.iterations:
            reason = "iteration budget"
        if reason is None and st.step_scale < opt.StepControl().smallest:
            reason = "step control: no step that keeps the objective"
        if reason:
            st.reason = reason
            return
        t0 = time.perf_counter()
        k = len(st.losses)
        u = np.asarray(st.u, dtype=float)
        loss, grad, extras, _ = _evaluate_with_grad(problem, u, st.multipliers, k)
        st.evaluations += 1
        beta = problem.beta_at(k) if problem.chain is not None else None
        acc = st.accepted
        same_beta = acc is not None and acc.get("beta") == beta
        ok, st.step_scale = opt.controlled_step(loss, acc["loss"] if same_beta else None,
                                                st.step_scale)
        pg = opt.projected_gradient_norm(u, grad)
        rec = _record(problem, k, u, loss, extras, pg, None)
        rec["accepted"] = bool(ok)
        rec["step_scale"] = st.step_scale
        if beta is not None:
            rec["beta"] = beta
        if ok:
            st.accepted = {"u": u, "loss": loss, "grad": grad, "state": st.opt_state,
                           "beta": beta, "pg": pg}
        acc = st.accepted
        u_next, state = problem.update(acc["grad"], acc["state"], acc["u"], st.step_scale)
        u_next = opt.backtrack_to_valid(acc["u"], np.asarray(u_next), problem.valid)
        rec["seconds"] = time.perf_counter() - t0
        st.history.append(rec)
        st.losses.append(loss)
        st.u, st.opt_state = u_next, state
        if (k + 1) % cfg.al_every == 0:
            st.multipliers = opt.update_multipliers(np.asarray(extras[2]), st.multipliers,
                                                    penalty)
            if penalty.kind == "augmented_lagrangian":
                st.accepted = None     # the loss changed with the multipliers
        _after_record(problem, st, k, extras, bar, checkpoint, on_iteration)


def _run_mma(problem, st, *, checkpoint, bar=None, on_iteration=None) -> None:
    """nlopt's MMA (LD_MMA) on the unit box, with the coupled constraints (fabrication
    couplings, the field cap) as inequality constraints ``g <= 0``.

    A free-form density runs MMA stage by stage of the projection continuation (a new
    MMA run per sharpness, started at the previous stage's best point).  Every
    evaluation is recorded; ``accepted`` marks those that improve on the best point of
    their stage (MMA's own inner iterations may try worse points)."""
    import nlopt

    cfg = problem.config
    st.reason = None
    n = np.asarray(st.u).size
    m = len(problem.constraint_names)
    while len(st.losses) < cfg.iterations:
        k0 = len(st.losses)
        beta0 = problem.beta_at(k0) if problem.chain is not None else None
        stage_end = cfg.iterations
        if problem.chain is not None:
            stage_end = k0 + 1
            while stage_end < cfg.iterations and problem.beta_at(stage_end) == beta0:
                stage_end += 1
        best = {"loss": math.inf, "u": np.asarray(st.u, dtype=float)}
        t0 = [time.perf_counter()]
        cons: dict = {}

        def f(u, grad):
            u = np.clip(np.asarray(u, dtype=float), 0.0, 1.0)
            k = len(st.losses)
            if k >= stage_end:
                raise nlopt.ForcedStop
            loss, g_, extras, aux = _evaluate_with_grad(problem, u, st.multipliers, k0,
                                                        objective_only=True)
            st.evaluations += 1
            if m:
                cons[u.tobytes()] = problem.constraint_jac(u, aux)
                extras = (extras[0], extras[1], cons[u.tobytes()][0])
            if grad.size:
                grad[:] = g_
            ok = loss <= best["loss"]
            if ok:
                best.update(loss=loss, u=u)
            pg = opt.projected_gradient_norm(u, g_)
            rec = _record(problem, k, u, loss, extras, pg, time.perf_counter() - t0[0])
            rec["accepted"] = bool(ok)
            if beta0 is not None:
                rec["beta"] = beta0
            st.history.append(rec)
            st.losses.append(loss)
            t0[0] = time.perf_counter()
            _after_record(problem, st, k, extras, bar, checkpoint, on_iteration)
            return loss

        def fc(result, u, grad):
            u = np.clip(np.asarray(u, dtype=float), 0.0, 1.0)
            hit = cons.get(u.tobytes())
            g, jac = hit if hit is not None else problem.constraint_jac(
                u, problem.aux(u, st.multipliers, k0))
            result[:] = np.asarray(g, dtype=float)
            if grad.size:
                grad[:, :] = np.asarray(jac, dtype=float)

        o = nlopt.opt(nlopt.LD_MMA, n)
        o.set_lower_bounds(np.zeros(n))
        o.set_upper_bounds(np.ones(n))
        o.set_min_objective(f)
        if m:
            o.add_inequality_mconstraint(fc, [1e-6] * m)
        o.set_maxeval(stage_end - k0)
        if problem.chain is None:
            o.set_ftol_rel(cfg.tolerance)
        try:
            o.optimize(np.asarray(st.u, dtype=float))
        except (nlopt.ForcedStop, nlopt.RoundoffLimited):
            pass
        st.u = best["u"]
        if problem.chain is None and len(st.losses) < cfg.iterations:
            st.reason = f"MMA: {_nlopt_reason(o.last_optimize_result())}"
            return
    st.reason = "iteration budget"


def _nlopt_reason(code: int) -> str:
    import nlopt

    names = {nlopt.SUCCESS: "success", nlopt.STOPVAL_REACHED: "objective target reached",
             nlopt.FTOL_REACHED: "relative objective change below tolerance",
             nlopt.XTOL_REACHED: "step below tolerance",
             nlopt.MAXEVAL_REACHED: "evaluation budget", nlopt.MAXTIME_REACHED: "time"}
    return names.get(code, f"nlopt code {code}")


def _run_optax(problem: DesignProblem, st: StartState, *, checkpoint: Callable[[], None],
               bar=None, on_iteration: Callable[[StartState], None] | None = None) -> None:
    """The optax loop (``optimizer = "lbfgs"``): one optax update per iteration."""
    cfg = problem.config
    tolerance = 0.0 if problem.chain is not None else cfg.tolerance
    rule = opt.StopRule(cfg.iterations, tolerance, cfg.gradient_tolerance, cfg.patience)
    penalty = opt.Penalty(cfg.constraints, cfg.penalty_weight, cfg.al_mu)
    st.reason = None
    while True:
        pg = None
        if st.history:
            pg = st.history[-1]["projected_gradient"]
        reason = opt.stop_reason(st.losses, np.inf if pg is None else pg, rule)
        if reason:
            st.reason = reason
            return
        t0 = time.perf_counter()
        u = np.asarray(st.u)
        aux = problem.aux(u, st.multipliers, len(st.losses))
        u_next, state, loss, grad, extras = problem.step(u, st.opt_state, aux)
        u_next = opt.backtrack_to_valid(u, np.asarray(u_next), problem.valid)
        pg = opt.projected_gradient_norm(u, grad)
        k = len(st.losses)
        st.history.append(_record(problem, k, u, loss, extras, pg, time.perf_counter() - t0))
        st.losses.append(float(loss))
        st.u, st.opt_state = u_next, state
        if (k + 1) % cfg.al_every == 0:
            st.multipliers = opt.update_multipliers(np.asarray(extras[2]), st.multipliers,
                                                    penalty)
        _after_record(problem, st, k, extras, bar, checkpoint, on_iteration)


def _state_json(st: StartState) -> dict:
    acc = None
    if st.accepted is not None:
        a = st.accepted
        acc = {"u": opt.array_to_json(a["u"]), "loss": float(a["loss"]).hex(),
               "grad": opt.array_to_json(a["grad"]), "state": opt.state_to_json(a["state"]),
               "beta": a["beta"], "pg": a["pg"]}
    return {"index": st.index, "u": opt.array_to_json(st.u),
            "opt_state": opt.state_to_json(st.opt_state),
            "multipliers": opt.array_to_json(st.multipliers), "losses": st.losses,
            "history": st.history, "reason": st.reason,
            "step_scale": float(st.step_scale).hex(), "accepted": acc,
            "evaluations": st.evaluations, "restarts": st.restarts}


def _state_from_json(d: dict, problem: DesignProblem) -> StartState:
    u = opt.array_from_json(d["u"])
    template = problem.transform.init(np.asarray(u))
    acc = d.get("accepted")
    if acc is not None:
        acc = {"u": opt.array_from_json(acc["u"]), "loss": float.fromhex(acc["loss"]),
               "grad": opt.array_from_json(acc["grad"]),
               "state": opt.state_from_json(acc["state"], template), "beta": acc["beta"],
               "pg": acc["pg"]}
    return StartState(d["index"], u, opt.state_from_json(d["opt_state"], template),
                      opt.array_from_json(d["multipliers"]), list(d["losses"]),
                      list(d["history"]), d["reason"],
                      float.fromhex(d.get("step_scale", (1.0).hex())), acc,
                      int(d.get("evaluations", 0)), int(d.get("restarts", 0)))


# ---------------------------------------------------------------------------------
# the run
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class DesignResult:
    """Per start: the best iterate (u, record) and its design-rule violations."""

    problem: DesignProblem
    starts: tuple            # StartState, in order
    best_start: int
    best_u: np.ndarray
    best_record: dict
    start_record: dict
    per_start_best: tuple    # (u, record, violations) per start
    start_check: dict | None = None   # start_check(): the spec's own start against the rules


def pattern_record(problem: DesignProblem, u, pattern, multipliers=None) -> dict:
    """Record of the design ``u`` with its free-form region set to ``pattern`` as it is
    (what evaluate computes for a spec holding that pattern)."""
    n_con = len(problem.constraint_names)
    mult = np.zeros(n_con) if multipliers is None else np.asarray(multipliers)
    up = problem.pattern_u(u, pattern)
    aux = (problem.pattern_masks(u, pattern), mult, problem.scale)
    loss, extras = problem.pattern_evaluate(up, aux)
    return _record(problem, 0, u, loss, extras, None, None)


def _best_of(problem: DesignProblem, st: StartState) -> tuple[np.ndarray, dict]:
    """The best evaluated iterate of a start (the final point evaluated too).

    Free-form density: the binarized candidates of the run's end (the final iterate and,
    for Adam, the last accepted one, which differ when the last step was not yet
    checked), each evaluated as binarized; the rule-clean, feasible one with the largest
    objective wins.  Gray iterates of earlier, smaller projection sharpness are not
    comparable and are not candidates."""
    u_last = np.asarray(st.u)
    if problem.chain is not None:
        cands = [u_last]
        if st.accepted is not None and not np.array_equal(st.accepted["u"], u_last):
            cands.append(np.asarray(st.accepted["u"]))
        scored = []
        for u in cands:
            pattern = problem.binarized(u)
            rec = pattern_record(problem, u, pattern, st.multipliers)
            rec["iteration"] = len(st.losses)
            clean = not _violations(problem, u, pattern)
            feasible = max(rec["constraints"], default=0.0) <= FEASIBILITY_TOL
            scored.append(((clean, feasible, rec["objective"]), u, rec))
        _, u, rec = max(scored, key=lambda c: c[0])
        return u, rec
    aux = (problem.masks(u_last), np.asarray(st.multipliers), problem.scale)
    loss, extras = problem.evaluate(u_last, aux)
    last = _record(problem, len(st.losses), u_last, loss, extras, None, None)
    candidates = [(np.asarray(opt.to_unit(np.array(list(r["values"].values())), problem.box)),
                   r) for r in st.history] + [(u_last, last)]
    feasible = [c for c in candidates if max(c[1]["constraints"], default=0.0) <= FEASIBILITY_TOL]
    if feasible:
        return max(feasible, key=lambda c: c[1]["objective"])
    return min(candidates, key=lambda c: c[1]["loss"])


def _violations(problem: DesignProblem, u, pattern=None) -> list[str]:
    """The design-rule verdict of ``u`` (designer.fabrication.check_design: the same
    check that evaluate, compare and export report), as messages."""
    from designer.fabrication import check_design

    return check_design(problem.spec, _checked_params(problem, u, pattern),
                        grid_step_m=problem.grid_step_m).messages


def _checked_params(problem: DesignProblem, u, pattern=None):
    q = get_family(problem.spec.family).replace(problem.spec.sample, problem.values_of(u))
    if problem.chain is not None:
        from designer.families import region

        pattern = problem.binarized(u) if pattern is None else pattern
        q = dataclasses.replace(q, freeform=region.with_pattern(
            q.freeform, np.asarray(pattern, dtype=float), problem.models[0].layout,
            "<in memory>"))
    return q


def pattern_violations(problem: DesignProblem, pattern) -> list:
    """The free-form part of the rule check for a binarized region pattern
    (designer.fabrication.freeform_findings; Finding list)."""
    from designer.fabrication import freeform_findings

    u = opt.to_unit(problem.x_start, problem.box)
    return freeform_findings(problem.spec, _checked_params(problem, u, pattern),
                             problem.grid_step_m)


def measured_features(problem: DesignProblem, pattern) -> tuple[float, float]:
    """Smallest solid and void sizes of a binarized pattern (m), measured by opening
    with discs of 1, 2, ... pixels (freeform/fabrication.smallest_features)."""
    from designer.fabrication import smallest_features

    c = problem.chain
    h = min(c.dx, c.dz)
    n = max(c.shape) + 1
    return smallest_features(np.asarray(pattern) > 0.5, c.dx, c.dz,
                             [k * h for k in range(1, n + 1)], periodic_x=c.periodic_x)


def _corrupt(path: Path, what: str) -> UsageError:
    return UsageError(f"{path}: damaged checkpoint ({what}); start afresh with --overwrite "
                      "instead of --resume")


def matching_checkpoint(path: Path, spec: Spec, config) -> dict:
    """The checkpoint at ``path`` to resume from, refused (UsageError) when it is missing
    or belongs to another spec or other ``[optimize]`` settings (``config.identity()``)."""
    out = path.parent
    if not path.exists():
        raise UsageError(f"{out}: no {path.name} to resume from")
    saved = _read_checkpoint(path)
    if saved["spec_sha256"] != spec.sha256:
        raise UsageError(f"{out}: the checkpoint belongs to a different spec "
                         "(its sha256 differs); resume with the same spec file")
    if saved["config"] != json.loads(vio.dumps(config.identity())):
        raise UsageError(f"{out}: the [optimize] settings differ from the checkpointed "
                         "run (only --iterations may change on resume)")
    return saved


def _read_checkpoint(path: Path) -> dict:
    """The saved checkpoint, or one UsageError when it is unreadable or incomplete."""
    try:
        saved = json.loads(vio.decode_text(vio.read_input(path, limit=vio.MAX_ARRAY_BYTES)))
    except ValueError as exc:
        raise _corrupt(path, str(exc).split(":")[0][:80]) from None
    needed = ("spec_sha256", "config", "scale", "start_record", "starts")
    if not isinstance(saved, dict) or any(k not in saved for k in needed) \
            or not isinstance(saved["starts"], list):
        raise _corrupt(path, "missing entries")
    return saved


def run_design(spec: Spec, out_dir: str | Path, config: DesignConfig, *, resume: bool = False,
               progress: bool = True,
               on_iteration: Callable[[StartState], None] | None = None,
               status: Callable[[str], None] | None = None) -> DesignResult:
    """Optimize (or continue optimizing) and keep ``out_dir/checkpoint.json`` current.

    Before the first iteration the spec's own start is checked (:func:`start_check`);
    a start outside the rules is reported through ``status`` (one call per line), then
    the run continues from the start moved inside the bounds."""
    out = Path(out_dir)
    problem = cached_problem(spec, config)
    check = start_check(spec, config, problem.grid_step_m)
    for line in start_check_lines(check):
        (status or (lambda m: None))(line)
    ck_path = out / CHECKPOINT
    saved = None
    if resume:
        saved = matching_checkpoint(ck_path, spec, config)
        try:
            scale = float.fromhex(saved["scale"])
        except (TypeError, ValueError):
            raise _corrupt(ck_path, "scale") from None
    else:
        scale = None
    u0 = np.asarray(opt.to_unit(problem.x_start, problem.box))
    n_con = len(problem.constraint_names)
    if scale is None:
        # the start design's aggregated figure sets the loss scale (loss -1 at the start)
        if problem.chain is not None:
            value = pattern_record(dataclasses.replace(problem, scale=1.0), u0,
                                   _scale_pattern(problem))["objective"]
        else:
            _, extras = problem.evaluate(u0, (problem.masks(u0), np.zeros(n_con), 1.0))
            value = float(extras[0])
        scale = abs(value) if value != 0 and math.isfinite(value) else 1.0
    problem = dataclasses.replace(problem, scale=scale)

    if saved is not None:
        try:
            starts = [_state_from_json(d, problem) for d in saved["starts"]]
        except (KeyError, TypeError, ValueError, IndexError, AttributeError):
            raise _corrupt(ck_path, "starts") from None
        start_record = saved["start_record"]
    else:
        us = opt.random_starts(u0, config.starts, config.seed, problem.valid)
        starts = [StartState(j, u, problem.transform.init(u), np.zeros(n_con))
                  for j, u in enumerate(us)]
        if problem.chain is not None:
            start_record = pattern_record(problem, u0, problem.start_pattern())
        else:
            loss, extras = problem.evaluate(u0, (problem.masks(u0), np.zeros(n_con), scale))
            start_record = _record(problem, 0, u0, loss, extras, None, None)

    def checkpoint():
        vio.write_json(ck_path, {"spec_sha256": spec.sha256,
                                 "config": config.identity(), "scale": float(scale).hex(),
                                 "start_record": start_record,
                                 "starts": [_state_json(s) for s in starts]})

    checkpoint()
    from tqdm import tqdm

    for st in starts:
        if st.reason is not None and not (st.reason == "iteration budget"
                                          and len(st.losses) < config.iterations):
            continue
        bar = tqdm(total=config.iterations, initial=len(st.losses), file=sys.stderr,
                   desc=f"start {st.index + 1}/{len(starts)}", disable=not progress,
                   leave=True)
        try:
            run_start(problem, st, checkpoint=checkpoint, bar=bar, on_iteration=on_iteration)
        finally:
            bar.close()
        checkpoint()
    per_start = []
    for st in starts:
        u, rec = _best_of(problem, st)
        per_start.append((u, rec, _violations(problem, u)))
    clean = [j for j, (_, _, v) in enumerate(per_start) if not v] or list(range(len(starts)))
    best = max(clean, key=lambda j: (max(per_start[j][1]["constraints"], default=0.0)
                                     <= FEASIBILITY_TOL, per_start[j][1]["objective"]))
    return DesignResult(problem, tuple(starts), best, per_start[best][0], per_start[best][1],
                        start_record, tuple(per_start), check)


# ---------------------------------------------------------------------------------
# outputs
# ---------------------------------------------------------------------------------
def design_raw(spec: Spec, params) -> dict:
    """The spec tree with the ``[sample]`` table of ``params`` (a complete spec)."""
    from designer.units import tidy

    raw = copy.deepcopy(spec.raw)
    raw["sample"] = tidy(get_family(spec.family).to_table(params))
    return raw


def convergence_figure(result: DesignResult):
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    cfg = result.problem.config
    fig = Figure(figsize=(6.4, 4.0))
    ax = fig.subplots()
    from matplotlib.ticker import MaxNLocator

    from designer.drawing import ELECTRON

    for st in result.starts:
        its = [r["iteration"] for r in st.history]
        ax.plot(its, [r["objective"] for r in st.history], marker=".",
                label=f"start {st.index + 1}" + (" (best)" if st.index == result.best_start
                                                 else ""))
    best = result.best_record
    if best is not None and "iteration" in best:
        ax.plot([best["iteration"]], [best["objective"]], marker="*", ms=14, ls="none",
                color=ELECTRON, zorder=5,
                label=f"best: iteration {best['iteration']}, {best['objective']:.4g}")
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    unit = {"coupling": "|beta_c|/E0 (m/V)", "structure_factor": "G/E0",
            "damage_factor": "G/E_max"}[cfg.objective]
    agg = f" ({cfg.aggregate} over {len(result.problem.models)} scenarios)" \
        if len(result.problem.models) > 1 else ""
    ax.set_xlabel("iteration")
    ax.set_ylabel(unit)
    ax.set_title(f"{cfg.objective}{agg}, {cfg.method}")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    return fig


FIGURE_KEYS = (("beta_c_per_field_m_per_V", "|beta_c| per field (m/V)"),
               ("structure_factor", "structure factor G/E0"),
               ("damage_factor", "damage factor G/E_max"),
               ("max_field_in_material_V_per_m", "max field in material (V/m)"))


OBJECTIVE_FIGURE = {"coupling": "beta_c_per_field_m_per_V",
                    "structure_factor": "structure_factor", "damage_factor": "damage_factor"}
COMBINED_ERROR_RULE = ("root-sum-square of the start's and the optimized design's relative "
                       "errors (treated as independent): the ratio's relative error")
MAX_FIELD_ERROR_RULE = ("two grids, first order: |E(h_f) - E(h_c)| / (h_c/h_f - 1) / E(h_f), "
                        "refined step h_f against the design step h_c (the maximum near "
                        "rounded corners converges at first order at best)")


def _two_grid_error(fine, coarse, ratio) -> float | None:
    """Relative error of ``fine`` from a result on a grid ``ratio`` times coarser, at
    first order: ``|fine - coarse| / (ratio - 1) / |fine|`` (Richardson's two-grid
    estimate with p = 1; L. F. Richardson, Phil. Trans. R. Soc. A 210, 307, 1911)."""
    if fine in (None, 0) or coarse is None or ratio is None or not ratio > 1.0 + 1e-9:
        return None
    return abs(fine - coarse) / (ratio - 1.0) / abs(fine)


def figure_errors(refined: dict, coarse: dict) -> dict:
    """Every comparison figure of ``refined`` (an evaluation JSON at the finer step, with
    the three-grid estimate) with its error: ``value``, ``relative_error``,
    ``absolute_error`` and ``error_rule``.

    |beta_c| and kappa = G/E0 carry the relative error of |I| (the three-grid estimate
    applied to the magnitude, ``magnitude_error_estimate``; the complex one where that
    is missing; the length and E0 are exact); E_max carries
    :data:`MAX_FIELD_ERROR_RULE` from ``coarse`` (the same design at the design step);
    G/E_max their root-sum-square.  Exact layer-stack results carry 0.  A figure without
    an estimate carries None."""
    c, cc = refined["coupling"], coarse["coupling"]
    solver = refined.get("provenance", {}).get("solver")
    h_f = refined.get("provenance", {}).get("grid_step_m")
    h_c = coarse.get("provenance", {}).get("grid_step_m")
    ratio = h_c / h_f if (h_f and h_c) else None
    e_key = "max_field_in_material_V_per_m"
    if solver == "layers":
        rel_i, rule_i = 0.0, "exact layer-stack solution"
        rel_e, rule_e = (0.0 if c.get(e_key) is not None else None), rule_i
    else:
        if c.get("magnitude_error_estimate") is not None:
            rel_i = c["magnitude_error_estimate"]
            rule_i = ("the three-grid estimate of |I| (the figure depends on the magnitude "
                      "only): " + str(c.get("magnitude_error_note") or "Richardson"))
        else:
            rel_i = c.get("relative_error_estimate")
            rule_i = "the coupling's error estimate: " + str(
                (c.get("error_estimate") or {}).get("note") or "three grids (Richardson)")
        if rel_i is None:
            key = "beta_c_per_field_m_per_V"
            rel_i = _two_grid_error(c.get(key), cc.get(key), ratio)
            rule_i = ("no three-grid estimate; two grids, first order: |b(h_f) - b(h_c)| / "
                      "(h_c/h_f - 1) / b(h_f)" if rel_i is not None else "no estimate")
        rel_e = _two_grid_error(c.get(e_key), cc.get(e_key), ratio)
        rule_e = MAX_FIELD_ERROR_RULE if rel_e is not None else "no estimate"
    both = None if rel_i is None or rel_e is None else math.hypot(rel_i, rel_e)
    errors = {"beta_c_per_field_m_per_V": (rel_i, rule_i), "structure_factor": (rel_i, rule_i),
              e_key: (rel_e, rule_e),
              "damage_factor": (both, "root-sum-square of the coupling's and E_max's "
                                "relative errors")}
    rows = {}
    for key, _ in FIGURE_KEYS:
        value = c.get(key)
        rel, rule = errors[key]
        if value is None:
            rel = None
        rows[key] = {"value": value, "relative_error": rel,
                     "absolute_error": None if rel is None else abs(value) * rel,
                     "error_rule": rule if value is not None else "not computed"}
    return rows


UNRESOLVED_START = 0.5   # a start known to no better than this has no meaningful ratio
ROUNDING_RATIO = 1e9     # ... nor one this many times smaller than the optimized figure


def gain_of(start: dict, optimized: dict) -> dict:
    """Optimized over start (rows of :func:`figure_errors`) with the combined error
    (:data:`COMBINED_ERROR_RULE`); ``gain_exceeds_error``: |ratio - 1| is larger than
    the ratio's absolute error (None when a value or an error is missing)."""
    a, b = start["value"], optimized["value"]
    out = {"ratio": None, "relative_error": None, "absolute_error": None,
           "combined_error": COMBINED_ERROR_RULE, "gain_exceeds_error": None}
    if a in (None, 0) or b is None:
        return out
    ra, rb = start["relative_error"], optimized["relative_error"]
    if ra is not None and ra >= UNRESOLVED_START:
        # e.g. a uniform grey start, which couples ~1e-15 +/- 60 %: no ratio to speak of
        out["note"] = (f"the start's figure is not resolved (relative error {ra:.0%}); "
                       "no ratio against it")
        return out
    if abs(a) * ROUNDING_RATIO < abs(b):
        # a laterally uniform start has no synchronous harmonic: its coupling is zero
        # and what the solver returns is rounding, whatever its error estimate says
        out["note"] = (f"the start's figure ({a:.3g}) is below {1 / ROUNDING_RATIO:g} of the "
                       "optimized one, at the solver's rounding level; no ratio against it")
        return out
    out["ratio"] = r = b / a
    if ra is not None and rb is not None:
        rel = math.hypot(ra, rb)
        out.update(relative_error=rel, absolute_error=abs(r) * rel,
                   gain_exceeds_error=bool(abs(r - 1.0) > abs(r) * rel))
    return out


def gain_warning(label: str, gain: dict) -> str | None:
    """The warning ``design`` prints about the gain of a figure where more is better
    (the objectives), or None when it is a gain."""
    r = gain["ratio"]
    if r is None:
        return None
    if gain["gain_exceeds_error"] is None:
        return (f"warning: {label}: no error estimate on the refined grid, so the ratio "
                f"{r:.5g} cannot be told from the discretization error")
    err = f"{r:.5g} +/- {gain['absolute_error']:.2g}"
    if not gain["gain_exceeds_error"]:
        return (f"warning: the gain in {label} on the refined grid, {err}, is inside the "
                "combined error estimate: it is not a gain (refine the grid, [solver] "
                "grid_step_nm, or change the variables)")
    if r < 1.0:
        return f"warning: the optimized design is worse than the start in {label}: {err}"
    return None


def refined_comparison(start_refined: dict, start_coarse: dict, design_refined: dict,
                       design_coarse: dict, objective: str) -> dict:
    """Start and optimized design on the refined grid, every figure with its error
    (:func:`figure_errors`), each ratio with the combined error (:func:`gain_of`), and
    the warning for the objective's figure (:func:`gain_warning`)."""
    s = figure_errors(start_refined, start_coarse)
    o = figure_errors(design_refined, design_coarse)
    figures = {key: {"start": s[key], "optimized": o[key], "gain": gain_of(s[key], o[key])}
               for key, _ in FIGURE_KEYS}
    key = OBJECTIVE_FIGURE[objective]
    label = dict(FIGURE_KEYS)[key]
    warning = gain_warning(label, figures[key]["gain"])
    return {"grid_step_m": {"start": start_refined.get("provenance", {}).get("grid_step_m"),
                            "optimized": design_refined.get("provenance", {})
                            .get("grid_step_m")},
            "figures": figures,
            "gain": {"figure": key, **figures[key]["gain"], "warning": warning},
            "warnings": [warning] if warning else []}


def _pm(row: dict) -> str:
    if row["value"] is None:
        return "n/a"
    if row["relative_error"] is None:
        return f"{row['value']:.5g} +/- ?"
    if row["relative_error"] == 0:
        return f"{row['value']:.5g} (exact)"
    return f"{row['value']:.5g} +/- {100 * row['relative_error']:.2g}%"


def _gain_text(g: dict) -> str:
    if g["ratio"] is None:
        return "n/a"
    if g["absolute_error"] is None:
        return f"{g['ratio']:.5g} +/- ?"
    inside = "" if g["gain_exceeds_error"] else " (inside error)"
    if g["absolute_error"] == 0:
        return f"{g['ratio']:.5g} (exact){inside}"
    return f"{g['ratio']:.5g} +/- {g['absolute_error']:.2g}{inside}"


def start_label(check: dict | None) -> str:
    """Which design the comparison's start column is."""
    if check is None or not check["moved"]:
        return "the spec's own start"
    moved = ", ".join(f"{k} {v['from']:g} -> {v['to']:g}" for k, v in check["moved"].items())
    return f"the spec's start moved inside the bounds ({moved})"


def comparison(result: DesignResult, start_eval: dict, design_eval: dict,
               refined: dict | None = None) -> tuple[dict, str]:
    """Start vs optimized: variables, figures (from evaluate), robust objective, rules,
    the start check and (``refined``: :func:`refined_comparison`) every figure with its
    error on the refined grid."""
    p = result.problem
    check = result.start_check or start_check(p.spec, p.config, p.grid_step_m)
    start_values = p.values_of(opt.to_unit(p.x_start, p.box))
    best_values = p.values_of(result.best_u)
    figures = {}
    for key, _ in FIGURE_KEYS:
        a, b = start_eval["coupling"].get(key), design_eval["coupling"].get(key)
        figures[key] = {"start": a, "optimized": b,
                        "ratio": (b / a) if (a not in (None, 0) and b is not None) else None}
        if refined is not None:
            r = refined["figures"][key]
            figures[key]["refined"] = {
                "start": r["start"], "optimized": r["optimized"], "ratio": r["gain"]["ratio"],
                "ratio_relative_error": r["gain"]["relative_error"],
                "ratio_absolute_error": r["gain"]["absolute_error"],
                "combined_error": r["gain"]["combined_error"],
                "gain_exceeds_error": r["gain"]["gain_exceeds_error"]}
            figures[key]["gain_exceeds_error"] = r["gain"]["gain_exceeds_error"]
            if r["gain"].get("note"):
                # a start the refined grid does not resolve (a uniform grey density) has
                # no ratio on the coarser design grid either
                figures[key]["ratio"] = None
                figures[key]["note"] = figures[key]["refined"]["note"] = r["gain"]["note"]
    data = {
        "objective": p.config.objective, "aggregate": p.config.aggregate,
        "scenarios": [m.scenario.label for m in p.models],
        "start_design": {"kind": check["continues_from"], "label": start_label(check),
                         "values": start_values},
        "start_check": check,
        "variables": {k: {"start": start_values[k], "optimized": best_values[k],
                          "bounds": list(p.config.bounds[k]),
                          "spec_start": check["spec_values"].get(k)} for k in p.config.keys},
        "optimizer_objective": {"start": result.start_record["objective"],
                                "optimized": result.best_record["objective"],
                                "start_scenarios": result.start_record["scenarios"],
                                "optimized_scenarios": result.best_record["scenarios"]},
        "figures": figures,
        "design_rule_violations": {
            "start": _violations(p, opt.to_unit(p.x_start, p.box),
                                 p.start_pattern() if p.chain is not None else None),
            "spec_start": check["violations"],
            "optimized": _violations(p, result.best_u)},
        "best_start": result.best_start,
        "starts": [{"index": st.index, "iterations": len(st.losses), "stopped": st.reason,
                    "restarts": st.restarts, "best_objective": rec["objective"], "violations": v}
                   for st, (_, rec, v) in zip(result.starts, result.per_start_best)],
    }
    if refined is not None:
        data["gain"] = refined["gain"]
        data["warnings"] = list(refined["warnings"])
    if p.chain is not None:
        data["freeform"] = freeform_summary(result)
    lines = [f"design: {p.spec.family}, objective {p.config.objective}"
             + (f" ({p.config.aggregate} of {len(p.models)} scenarios)" if len(p.models) > 1
                else ""),
             f"start: {start_label(check)}"]
    if not check["within_rules"]:
        lines += [""] + start_check_lines(check)
    head = "start (moved)" if check["moved"] else "start (spec)"
    if p.config.keys:
        lines += ["", f"  {'variable':28s} {head:>13s} {'optimized':>12s}   bounds"]
    for k in p.config.keys:
        lo, hi = p.config.bounds[k]
        lines.append(f"  {k:28s} {start_values[k]:13.5g} {best_values[k]:12.5g}   "
                     f"[{lo:g}, {hi:g}]")
    fmt = lambda v: "n/a" if v is None else f"{v:.5g}"  # noqa: E731
    if refined is not None:
        h = refined["grid_step_m"]
        steps = sorted({v for v in h.values() if v})
        where = ("on the refined grid (step " + " / ".join(f"{v * 1e9:.4g}" for v in steps)
                 + " nm)" if steps else "exact layer-stack solutions")
        lines += ["", f"  {where}, every figure +/- its error estimate; gain +/- the "
                  "combined error",
                  f"  {'figure':30s} {head:>24s} {'optimized':>24s}   gain"]
        for key, label in FIGURE_KEYS:
            r = refined["figures"][key]
            if r["start"]["value"] is None and r["optimized"]["value"] is None:
                continue
            lines.append(f"  {label:30s} {_pm(r['start']):>24s} {_pm(r['optimized']):>24s}   "
                         f"{_gain_text(r['gain'])}")
        lines += [f"  {w}" for w in refined["warnings"]]
    own = check.get("spec_start_figures")
    if own:
        lines += ["", "  the spec's own start (outside the rules), on the design grid: "
                  + ", ".join(f"{label} {fmt(own.get(key))}" for key, label in FIGURE_KEYS
                              if own.get(key) is not None)]
    lines += ["", "  on the design grid (evaluation.json)",
              f"  {'figure':36s} {head:>13s} {'optimized':>12s} {'ratio':>8s}"]
    for key, label in FIGURE_KEYS:
        f = figures[key]
        if f["start"] is None and f["optimized"] is None:
            continue
        lines.append(f"  {label:36s} {fmt(f['start']):>13s} {fmt(f['optimized']):>12s} "
                     f"{fmt(f['ratio']):>8s}")
    lines.append(f"  {'optimizer objective':36s} {result.start_record['objective']:13.5g} "
                 f"{result.best_record['objective']:12.5g}")
    v = data["design_rule_violations"]["optimized"]
    if p.chain is not None:
        fr = data["freeform"]
        lines += ["", f"  free-form region: {fr['pixels'][0]} x {fr['pixels'][1]} pixels, "
                  f"requested minimum length {fr['length_rule_m'] * 1e9:.4g} nm, measured "
                  f"smallest solid {fr['smallest_solid_m'] * 1e9:.4g} nm, void "
                  f"{fr['smallest_void_m'] * 1e9:.4g} nm (pixel steps)"]
    from designer.fabrication import check_design

    verdict = check_design(p.spec, _checked_params(p, result.best_u), grid_step_m=p.grid_step_m)
    data["design_rules"] = verdict.to_dict()
    lines += ["", "  design-rule check (the check export applies): " + verdict.summary_line()]
    lines += [f"    {m}" for m in v]
    for s in data["starts"]:
        lines.append(f"  start {s['index'] + 1}: {s['iterations']} iterations, "
                     f"{s['stopped']}, best {s['best_objective']:.5g}")
    return data, "\n".join(lines)


def freeform_summary(result: DesignResult) -> dict:
    """Free-form facts of the best design: filter, projection, measured length scales."""
    from designer import freeform as ff

    p = result.problem
    c = p.chain
    pattern = p.binarized(result.best_u)
    st = result.starts[result.best_start]
    solid, void = measured_features(p, pattern)
    rho = p.x_of(result.best_u)[p.n_keys:].reshape(c.shape)
    last_beta = p.beta_at(max(len(st.losses) - 1, 0))
    return {"pixels": list(c.shape), "pixel_m": [c.dx, c.dz], "periodic_x": c.periodic_x,
            "filter_radius_m": c.radius_m, "threshold_spread": c.delta_eta,
            "length_rule_m": length_rule(p.spec),
            "robust_formulation": c.delta_eta is not None,
            "robust_length_m": (ff.robust_length_scale(c.radius_m, c.delta_eta)
                                if c.radius_m and c.delta_eta else None),
            "final_beta": last_beta, "binarized_at": "beta = inf (nominal threshold 0.5)",
            "grayness_at_final_beta": float(ff.grayness(ff.threshold_projection(c.filtered(rho),
                                                                   last_beta))),
            "solid_fraction": float(np.mean(pattern > 0.5)),
            "smallest_solid_m": solid, "smallest_void_m": void,
            "pattern_violations": [v.message for v in pattern_violations(p, pattern)]}


OUTPUT_FILES = ("design.toml", "density.npy", "evaluation.json", "refined.json",
                "start_refined.json", "design.png",
                "history.json", "convergence.png", "comparison.json", "comparison.txt",
                "report.html", CHECKPOINT)


def start_spec(spec: Spec, check: dict) -> Spec:
    """The design the run starts from, as a spec: the spec itself, or (when
    :func:`start_check` moved variables into their bounds) the spec with the moved
    values."""
    if not check["moved"]:
        return spec
    from designer.spec import parse_spec

    values = {**check["spec_values"], **{k: m["to"] for k, m in check["moved"].items()}}
    params = get_family(spec.family).replace(spec.sample, values)
    return parse_spec(design_raw(spec, params), source=spec.source, base_dir=spec.base_dir)


def refined_step(spec: Spec, step_m: float) -> float:
    """The refined evaluation's step: ``step_m``, or for a stored pixel pattern the
    pixel divided by the smallest integer k >= 3 with ``pixel / k <= step_m``.  Then the
    step and the error estimate's two coarser grids (pixel/(k-1), pixel/(k-2);
    designer.evaluate.pixel_aligned_steps) all tile the pixels: the three grids hold
    the same pattern."""
    from designer.evaluate import stored_pixel_m

    pixel = stored_pixel_m(spec)
    if pixel is None:
        return step_m
    k = max(3, math.ceil(pixel[0] / step_m - 1e-9))
    return pixel[0] / k


def refined_evaluation(spec: Spec, ev, coarse: dict, fine_step_m: float | None, factor: float,
                       what: str, say) -> dict:
    """The evaluation JSON of ``spec`` at the finer step with its error estimate (FDFD:
    three grids; Fourier modal: N against N + 2 orders; layer stacks: exact, ``ev``, whose
    evaluation JSON is ``coarse``).

    Its ``design_rules`` are those of ``coarse`` (the design's own grid): a free-form
    pattern is made for that grid, and resampling it onto a finer one may tilt column
    edges that are straight on its own."""
    from designer.evaluate import evaluate, evaluation_json, stored_pixel_m

    if ev.solver == "fdfd":
        say(f"re-evaluating the {what} design at {fine_step_m * 1e9:.3g} nm with the error "
            "estimate (three grids)")
        out = evaluation_json(evaluate(spec, grid_step_m=fine_step_m, refine=True,
                                       progress=say))
        out["design_rules"] = coarse["design_rules"]
        out = vio.require_finite(out)
        grids = out["coupling"]["error_estimate"].get("grid_steps_m") or []
        out["note"] = (f"step {fine_step_m:.4g} m = the finer of the start's and the design's "
                       f"evaluation steps / {factor:g}"
                       + (" (for a stored pixel pattern: its pixel / the next integer >= 3)"
                          if stored_pixel_m(spec) else "")
                       + "; relative_error_estimate from solves at "
                       + ", ".join(f"{h * 1e9:.3g}" for h in grids if abs(h - out[
                           "provenance"]["grid_step_m"]) > 1e-3 * h)
                       + " nm (three-grid Richardson with the observed order)")
    elif ev.solver == "fmm":
        say(f"re-evaluating the {what} design with the Fourier-order error estimate")
        out = vio.require_finite(evaluation_json(evaluate(spec, refine=True, progress=say)))
        out["note"] = "Fourier modal method: relative_error_estimate compares N with N + 2 orders"
    else:
        out = dict(coarse)
        out["note"] = "exact layer-stack solution: no finer grid exists (error 0)"
    return out


def write_outputs(result: DesignResult, out_dir: str | Path, *, status=None) -> dict:
    """design.toml, evaluation.json, refined.json, design.png, history.json,
    convergence.png, comparison.json/.txt, report.html; returns the comparison dict."""
    from designer.evaluate import evaluate, evaluation_json
    from designer.plots import evaluation_figure

    say = status or (lambda m: None)
    out = Path(out_dir)
    p = result.problem
    spec = p.spec
    # stored as a cleanroom can make it, and evaluated as stored (design.toml is reloaded)
    from designer.spec import with_absolute_files
    from designer.units import cleanroom_round

    # files the spec names stay found wherever design.toml is evaluated from
    density = str((out / "density.npy").resolve())
    params = get_family(spec.family).replace(
        p.design_params(result.best_u, density),
        cleanroom_round(p.values_of(result.best_u), p.config.bounds))
    raw = with_absolute_files(design_raw(spec, params), spec.base_dir, keep_in=out)
    if p.chain is not None:
        # the pattern lives on the design grid: pin the step so evaluate uses that grid
        vio.write_atomic(out / "density.npy", _npy_bytes(p.binarized(result.best_u)))
        raw.setdefault("solver", {})
        raw["solver"].setdefault("grid_step_nm", p.grid_step_m * 1e9)
    vio.write_atomic(out / "design.toml", dump_spec(raw))
    design_spec = load_spec(out / "design.toml")
    say("evaluating the optimized design")
    ev = evaluate(design_spec)
    design_eval = vio.require_finite(evaluation_json(ev), str(out / "design.toml"))
    vio.write_json(out / "evaluation.json", design_eval)
    vio.save_figure(evaluation_figure(ev), out / "design.png")
    check = result.start_check or start_check(spec, p.config, p.grid_step_m)
    begin = start_spec(spec, check)
    say("evaluating the start design" + (" (moved inside the bounds)" if check["moved"]
                                         else ""))
    start_ev = evaluate(begin, refine=False)
    start_eval = vio.require_finite(evaluation_json(start_ev))
    if check["moved"]:
        own = vio.require_finite(evaluation_json(evaluate(spec, refine=False)))["coupling"]
        check = {**check, "spec_start_figures": {k: own.get(k) for k, _ in FIGURE_KEYS}}
        result = dataclasses.replace(result, start_check=check)
    # both designs are re-evaluated at the same requested finer step, with the
    # three-grid error estimate
    steps = [e.run.grid_step_m for e in (ev, start_ev) if e.run.grid_step_m]
    fine = refined_step(design_spec, min(steps) / p.config.refine_factor) if steps else None
    refined = refined_evaluation(design_spec, ev, design_eval, fine, p.config.refine_factor,
                                 "optimized", say)
    vio.write_json(out / "refined.json", refined)
    start_refined = refined_evaluation(begin, start_ev, start_eval, fine,
                                       p.config.refine_factor, "start", say)
    vio.write_json(out / "start_refined.json", start_refined)
    errors = refined_comparison(start_refined, start_eval, refined, design_eval,
                                p.config.objective)
    for warning in errors["warnings"]:
        say(warning)
    data, text = comparison(result, start_eval, design_eval, errors)
    data["refined"] = {"grid_step_m": refined["provenance"].get("grid_step_m"),
                       "beta_c_per_field_m_per_V":
                           refined["coupling"]["beta_c_per_field_m_per_V"],
                       "relative_error_estimate": refined["coupling"]["relative_error_estimate"],
                       "start": {"grid_step_m": start_refined["provenance"].get("grid_step_m"),
                                 "beta_c_per_field_m_per_V":
                                     start_refined["coupling"]["beta_c_per_field_m_per_V"],
                                 "relative_error_estimate":
                                     start_refined["coupling"]["relative_error_estimate"]}}
    vio.write_json(out / "comparison.json", data)
    vio.write_atomic(out / "comparison.txt", text + "\n")
    history = {"objective": p.config.objective, "aggregate": p.config.aggregate,
               "method": p.config.method, "variables": list(p.config.keys),
               "scenarios": [m.scenario.label for m in p.models],
               "constraints": list(p.constraint_names), "solver": p.method,
               "grid_step_m": p.grid_step_m, "start": result.start_record,
               "best_start": result.best_start, "best": result.best_record,
               "starts": [{"index": st.index, "stopped": st.reason, "restarts": st.restarts,
                           "history": st.history}
                          for st in result.starts]}
    vio.write_json(out / "history.json", history)
    vio.save_figure(convergence_figure(result), out / "convergence.png")
    say("writing the report")
    write_design_report(out / "report.html", result, ev, design_eval, start_eval, refined,
                        text, comparison_data=data)
    return data


def write_design_report(path, result: DesignResult, ev, design_eval: dict, start_eval: dict,
                        refined: dict, comparison_text: str, *,
                        comparison_data: dict | None = None) -> Path:
    """``DIR/report.html``: the optimized design's figures, the start check, start
    against optimized on the refined grid with error bars, the convergence plot and
    the design picture (self-contained)."""
    from designer import report as rp
    from designer.plots import evaluation_figure

    cfg = result.problem.config
    comp = comparison_data or {}
    figures = comp.get("figures", {})
    with_errors = all("refined" in figures.get(k, {}) for k, _ in FIGURE_KEYS) and figures

    def row(label, key):
        if with_errors:
            r = figures[key]["refined"]
            return (label, _pm(r["start"]), _pm(r["optimized"]),
                    _gain_text({"ratio": r["ratio"], "absolute_error": r["ratio_absolute_error"],
                                "gain_exceeds_error": r["gain_exceeds_error"]}))
        return (label, rp.fmt(start_eval["coupling"].get(key)),
                rp.fmt(design_eval["coupling"].get(key)))

    check = comp.get("start_check") or result.start_check
    start_name = start_label(check)
    head = "start (moved)" if check is not None and check["moved"] else "start (spec)"
    columns = (("figure", head, "optimized", "gain (optimized / start)") if with_errors
               else ("figure", head, "optimized"))
    caption = (f"start ({start_name}) against the optimized design, both on the refined "
               "grid; each figure +/- its error estimate, each gain +/- the combined error "
               "(root-sum-square of the relative errors)" if with_errors else
               f"start ({start_name}) against the optimized design (same solver)")
    table = rp.Table(columns, tuple(row(label, key) for key, label in FIGURE_KEYS),
                     caption=caption, highlight=(0,))
    facts = rp.Facts((("finer-grid |beta_c| per field",
                       rp.fmt(refined["coupling"]["beta_c_per_field_m_per_V"], "m/V")),
                      ("its relative error estimate",
                       rp.fmt(refined["coupling"]["relative_error_estimate"])),
                      ("objective", cfg.objective), ("method", cfg.method),
                      ("variables", ", ".join(cfg.keys))))
    blocks = [table]
    blocks += [rp.Paragraph(w) for w in comp.get("warnings", [])]
    blocks += [facts, rp.Paragraph(comparison_text, "note")]
    sections = [rp.evaluation_section(design_eval, "Optimized design")]
    if check is not None and not check["within_rules"]:
        sections.append(rp.Section("The start is outside the rules", tuple(
            [rp.Paragraph(line.strip()) for line in start_check_lines(check)])))
    sections += [rp.Section("Start against optimized", tuple(blocks)),
                 rp.Section("Design and fields", (rp.image(evaluation_figure(ev),
                                                           "optimized sample and its field"),)),
                 rp.Section("Convergence", (rp.image(convergence_figure(result),
                                                     "objective per iteration"),))]
    name = Path(result.problem.spec.source).name
    rep = rp.Report(f"Design from {name}", subtitle=f"{result.problem.spec.family} sample",
                    sections=tuple(sections), provenance=design_eval.get("provenance"))
    return rp.write_report(path, rep)


def _npy_bytes(a) -> bytes:
    import io

    buf = io.BytesIO()
    np.save(buf, np.asarray(a, dtype=float), allow_pickle=False)
    return buf.getvalue()


def design_command(args) -> int:
    """``velomatch design SPEC --out DIR [--resume] [--overwrite] [--iterations N]``."""
    spec = load_spec(args.spec)
    from designer.holes import is_fmm_sample

    if is_fmm_sample(spec):
        # hole lattices are solved by the Fourier modal method (designer.hole_design)
        from designer.hole_design import hole_design_command

        return hole_design_command(args, spec)
    config = parse_optimize(spec, getattr(args, "iterations", None))
    from designer.spec import input_files

    out = vio.prepare_output_dir(args.out, overwrite=getattr(args, "overwrite", False),
                                 resume=getattr(args, "resume", False),
                                 inputs=input_files(spec), names=OUTPUT_FILES)

    def status(message):
        print(f"  {message}", file=sys.stderr, flush=True)

    print(f"designing {args.spec} -> {out}", file=sys.stderr)
    result = run_design(spec, out, config, resume=getattr(args, "resume", False),
                        status=status)
    write_outputs(result, out, status=status)
    print((out / "comparison.txt").read_text(), end="")
    return 0
