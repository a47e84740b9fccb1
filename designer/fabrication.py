"""Fabrication rules: reading them, tightening bounds, penalties, design-rule checks.

The ``[fabrication]`` spec table describes what a cleanroom can make::

    [fabrication]
    min_feature_nm = 50.0          # narrowest solid (tooth, bar)          default 0 = no rule
    min_gap_nm = 50.0              # narrowest void (gap, slit, channel)   default 0 = no rule
    thickness_nm = [50.0, 500.0]   # layer/film thickness: [lo, hi] or a number (fixed)
    etch_depth_nm = [100.0, 600.0] # tooth height / etch depth: [lo, hi] or a number
    max_aspect_ratio = 5.0         # height / smallest lateral size        default: no rule
    sidewall_angle_deg = 0.0       # the process's sidewall angle (fixed)  default: no rule
    corner_radius_nm = 10.0        # rounding of sharp corners for E_max   default 10 nm
    materials = ["fused_silica"]   # allowed materials, empty = any        default any
    write_field_um = 100.0         # lithography write field (export)      default 100 um

Every key is optional; an absent table means "no rules" except the corner radius
(10 nm, common practice, no source) and the write field.

Three ways the rules reach a design:

* :func:`bounds_from_rules` tightens the box bounds of a family's variables;
* :func:`constraint_function` gives the rules that couple variables (tooth width
  ``duty_cycle * period``, aspect ratio) as inequalities ``g(x) <= 0`` for the
  optimizer, used with :func:`quadratic_penalty` or the augmented-Lagrangian pair
  :func:`al_penalty` / :func:`al_update_multipliers`;
* :func:`design_rule_check` (from a family's :class:`Feature` list) and
  :func:`pattern_rule_check` (binarized free-form pixels, by morphological
  opening/closing) report :class:`Violation` s before export.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass

import jax.numpy as jnp
import numpy as np
from scipy import ndimage

from designer.errors import VelomatchError
from designer.tables import TableReader

DEFAULT_CORNER_RADIUS_M = 10e-9
DEFAULT_WRITE_FIELD_M = 100e-6

# Relative slack when comparing a measured size with a limit: sizes derived from
# spec values in nm round-trip through floating point, and 50 nm must pass 50 nm.
_REL_TOL = 1e-9


# ---------------------------------------------------------------------------------
# rules
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class FabricationRules:
    """Fabrication limits in SI units (metres, radians).

    ``thickness_m`` / ``etch_depth_m`` are ``(lo, hi)`` (``lo == hi`` for a fixed
    value) or ``None`` for no rule.  ``max_aspect_ratio`` is ``math.inf`` for no rule,
    ``sidewall_angle_rad`` ``None`` when the process does not fix it, ``materials``
    empty for "any material".
    """

    min_feature_m: float = 0.0
    min_gap_m: float = 0.0
    thickness_m: tuple[float, float] | None = None
    etch_depth_m: tuple[float, float] | None = None
    max_aspect_ratio: float = math.inf
    sidewall_angle_rad: float | None = None
    corner_radius_m: float = DEFAULT_CORNER_RADIUS_M
    materials: tuple[str, ...] = ()
    write_field_m: float = DEFAULT_WRITE_FIELD_M


def parse_fabrication(reader: TableReader) -> FabricationRules:
    """Read the ``[fabrication]`` table (may be empty) into :class:`FabricationRules`.

    Every bad value raises :class:`~designer.errors.SpecError` naming file, key, value.
    Calls ``reader.finish()`` so unknown keys are reported.
    """
    min_feature = reader.length("min_feature_nm", 0.0, minimum=0.0)
    min_gap = reader.length("min_gap_nm", 0.0, minimum=0.0)
    thickness = _read_bounds(reader, "thickness_nm")
    etch_depth = _read_bounds(reader, "etch_depth_nm")
    aspect = reader.number("max_aspect_ratio", math.inf, minimum=0.0, exclusive_minimum=True)
    sidewall = reader.number("sidewall_angle_deg", None, minimum=-90.0, maximum=90.0,
                             exclusive_minimum=True, exclusive_maximum=True)
    corner = reader.length("corner_radius_nm", DEFAULT_CORNER_RADIUS_M, minimum=0.0)
    materials = _read_names(reader, "materials")
    write_field = reader.length("write_field_um", DEFAULT_WRITE_FIELD_M, minimum=0.0,
                                exclusive_minimum=True)
    reader.finish()
    return FabricationRules(
        min_feature_m=float(min_feature), min_gap_m=float(min_gap), thickness_m=thickness,
        etch_depth_m=etch_depth, max_aspect_ratio=float(aspect),
        sidewall_angle_rad=None if sidewall is None else math.radians(sidewall),
        corner_radius_m=float(corner), materials=materials, write_field_m=float(write_field))


def _read_bounds(reader: TableReader, name: str) -> tuple[float, float] | None:
    """``name = x`` (fixed) or ``name = [lo, hi]`` with 0 < lo <= hi, in the key's unit."""
    value = reader.raw(name, None)
    if value is None:
        return None
    unit = 1e-9 if name.endswith("_nm") else 1e-6
    if isinstance(value, (list, tuple)):
        if len(value) != 2:
            raise reader.error(name, "must be a number or a pair [lo, hi]", value)
        for v in value:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise reader.error(name, "bounds must be finite numbers", value)
            if not v > 0:
                raise reader.error(name, "bounds must be > 0", value)
        lo, hi = float(value[0]), float(value[1])
        if lo > hi:
            raise reader.error(name, "lower bound exceeds upper bound", value)
        return (lo * unit, hi * unit)
    fixed = reader.check_number(name, value, minimum=0.0, exclusive_minimum=True)
    return (fixed * unit, fixed * unit)


def _read_names(reader: TableReader, name: str) -> tuple[str, ...]:
    value = reader.raw(name, [])
    if not isinstance(value, (list, tuple)) or not all(isinstance(v, str) for v in value):
        raise reader.error(name, "must be a list of material names", value)
    if len(set(value)) != len(value):
        raise reader.error(name, "lists a material twice", value)
    return tuple(value)


# ---------------------------------------------------------------------------------
# bounds
# ---------------------------------------------------------------------------------
class FabricationConflict(VelomatchError, ValueError):
    """The fabrication rules leave an empty range for a design variable."""


# Which spec keys each rule acts on (spec units).  Keys are matched exactly or, for
# numbered parameters such as "slit_widths_nm.0", by the part before the first dot.
HEIGHT_KEYS = ("tooth_height_nm", "etch_depth_nm", "height_nm")
GAP_KEYS = ("gap_nm", "slit_width_nm", "slit_widths_nm", "channel_nm")
SOLID_KEYS = ("tooth_width_nm", "bar_width_nm", "bar_widths_nm")


def _base_key(key: str) -> str:
    return key.split(".", 1)[0].split("[", 1)[0]


def bounds_from_rules(rules: FabricationRules,
                      variables: Mapping[str, tuple[float, float, float]]
                      ) -> dict[str, tuple[float, float]]:
    """Tighten a family's variable bounds by the fabrication rules.

    Args:
      rules: the fabrication rules (SI).
      variables: spec key -> ``(value, lo, hi)`` in spec units, as returned by
        ``family.variables(params)``.

    Returns:
      spec key -> ``(lo, hi)`` for every key of ``variables`` (unchanged where no rule
      applies).  Rules used:

      * ``*thickness_nm``: intersect with ``thickness_nm`` (a fixed thickness pins it);
      * ``tooth_height_nm`` / ``etch_depth_nm``: intersect with ``etch_depth_nm``;
      * ``gap_nm``, slit widths: ``>= min_gap_nm``; tooth/bar widths ``>= min_feature_nm``;
      * ``period_nm``: ``>= min_feature_nm + min_gap_nm`` (a tooth and a gap per period);
      * ``duty_cycle`` (with the current ``period_nm`` value):
        ``min_feature/period <= duty <= 1 - min_gap/period``; when the period is a
        variable too, the exact product rule is in :func:`constraint_function`;
      * ``sidewall_angle_deg``: pinned to the process angle when the rules fix one.

    Raises:
      FabricationConflict: a rule leaves an empty range (names the key and the rules).
    """
    nm = 1e9
    out: dict[str, tuple[float, float]] = {}
    period = variables.get("period_nm", (None,))[0]
    for key, (_value, lo, hi) in variables.items():
        base = _base_key(key)
        lo, hi = float(lo), float(hi)
        why = []
        if base.endswith("thickness_nm") and rules.thickness_m is not None:
            lo, hi = max(lo, rules.thickness_m[0] * nm), min(hi, rules.thickness_m[1] * nm)
            why.append("thickness_nm")
        if base in HEIGHT_KEYS and rules.etch_depth_m is not None:
            lo, hi = max(lo, rules.etch_depth_m[0] * nm), min(hi, rules.etch_depth_m[1] * nm)
            why.append("etch_depth_nm")
        if base in GAP_KEYS and rules.min_gap_m > 0:
            lo = max(lo, rules.min_gap_m * nm)
            why.append("min_gap_nm")
        if base in SOLID_KEYS and rules.min_feature_m > 0:
            lo = max(lo, rules.min_feature_m * nm)
            why.append("min_feature_nm")
        if base == "period_nm" and rules.min_feature_m + rules.min_gap_m > 0:
            lo = max(lo, (rules.min_feature_m + rules.min_gap_m) * nm)
            why.append("min_feature_nm + min_gap_nm")
        if base == "duty_cycle" and period:
            if rules.min_feature_m > 0:
                lo = max(lo, rules.min_feature_m * nm / period)
                why.append("min_feature_nm")
            if rules.min_gap_m > 0:
                hi = min(hi, 1.0 - rules.min_gap_m * nm / period)
                why.append("min_gap_nm")
        if base == "sidewall_angle_deg" and rules.sidewall_angle_rad is not None:
            fixed = math.degrees(rules.sidewall_angle_rad)
            lo, hi = max(lo, fixed), min(hi, fixed)
            why.append("sidewall_angle_deg")
        if lo > hi * (1 + _REL_TOL) + _REL_TOL:
            raise FabricationConflict(
                f"fabrication rules ({', '.join(why)}) leave no room for sample.{key}: "
                f"needs {lo:g} <= value <= {hi:g}")
        out[key] = (lo, max(lo, hi))
    return out


# ---------------------------------------------------------------------------------
# coupled constraints and penalties (JAX)
# ---------------------------------------------------------------------------------
def constraint_function(rules: FabricationRules,
                        variables: Mapping[str, tuple[float, float, float]]
                        ) -> tuple[tuple[str, ...], Callable]:
    """Inequality constraints ``g(values) <= 0`` that couple several grating variables.

    ``values`` maps spec keys to (JAX) scalars in spec units; keys missing from it take
    their current value from ``variables``.  Each ``g`` is normalized by its limit so
    that ``g = 0.1`` means "10 % beyond the rule":

    * ``min_feature``:  1 - duty * period / min_feature
    * ``min_gap``:      1 - (1 - duty) * period / min_gap
    * ``aspect_ratio``: height / (max_aspect_ratio * min(duty, 1 - duty) * period) - 1
      (the smallest lateral size of a rectangular tooth profile is the narrower of
      tooth and gap; the ``min`` is written smoothly enough for gradients away from
      duty = 0.5, where either branch is a valid subgradient).

    Returns ``(names, g)`` where ``g(values) -> jnp.ndarray`` of shape ``(len(names),)``;
    ``names`` is empty when no coupled rule applies.  Sidewall taper is not included:
    the exact trapezoid sizes are checked by :func:`design_rule_check`.
    """
    have = set(variables)
    names: list[str] = []
    if {"duty_cycle", "period_nm"} <= have:
        if rules.min_feature_m > 0:
            names.append("min_feature")
        if rules.min_gap_m > 0:
            names.append("min_gap")
        if "tooth_height_nm" in have and math.isfinite(rules.max_aspect_ratio):
            names.append("aspect_ratio")
    current = {k: v[0] for k, v in variables.items()}

    def g(values: Mapping) -> jnp.ndarray:
        get = {**current, **values}.__getitem__
        out = []
        for name in names:
            duty, period = get("duty_cycle"), get("period_nm")
            if name == "min_feature":
                out.append(1.0 - duty * period / (rules.min_feature_m * 1e9))
            elif name == "min_gap":
                out.append(1.0 - (1.0 - duty) * period / (rules.min_gap_m * 1e9))
            else:
                lateral = jnp.minimum(duty, 1.0 - duty) * period
                out.append(get("tooth_height_nm") / (rules.max_aspect_ratio * lateral) - 1.0)
        return jnp.stack([jnp.asarray(v, dtype=float) for v in out]) if out else jnp.zeros(0)

    return tuple(names), g


def quadratic_penalty(g: jnp.ndarray, weight: float = 1.0) -> jnp.ndarray:
    """Exterior quadratic penalty ``(weight / 2) * sum(max(g, 0)^2)`` for ``g <= 0``.

    Continuously differentiable; zero on the feasible set (Courant 1943; Nocedal &
    Wright, *Numerical Optimization*, 2nd ed. 2006, section 17.1).
    """
    g = jnp.asarray(g)
    return 0.5 * weight * jnp.sum(jnp.maximum(g, 0.0) ** 2)


def al_penalty(g: jnp.ndarray, multipliers: jnp.ndarray, mu: float) -> jnp.ndarray:
    """Augmented-Lagrangian term for inequalities ``g <= 0`` (to be ADDED to a loss).

        psi(g, lam, mu) = lam g + (mu/2) g^2     if g >= -lam/mu
                        = -lam^2 / (2 mu)         otherwise

    summed over constraints; ``C^1`` in ``g``.  Source: R. T. Rockafellar, "The
    multiplier method of Hestenes and Powell applied to convex programming",
    J. Optim. Theory Appl. 12, 555 (1973); D. P. Bertsekas, *Constrained Optimization
    and Lagrange Multiplier Methods* (1982), ch. 3 -- formula from memory.
    """
    g = jnp.asarray(g)
    lam = jnp.asarray(multipliers)
    active = g >= -lam / mu
    return jnp.sum(jnp.where(active, lam * g + 0.5 * mu * g ** 2, -lam ** 2 / (2.0 * mu)))


def al_update_multipliers(g: jnp.ndarray, multipliers: jnp.ndarray, mu: float) -> jnp.ndarray:
    """Multiplier update after an inner minimization: ``lam <- max(0, lam + mu g)``.

    Same sources as :func:`al_penalty`.
    """
    return jnp.maximum(0.0, jnp.asarray(multipliers) + mu * jnp.asarray(g))


# ---------------------------------------------------------------------------------
# design-rule check on features
# ---------------------------------------------------------------------------------
FEATURE_KINDS = ("solid", "gap", "layer", "height")


@dataclass(frozen=True)
class Feature:
    """One measurable size of a sample, as reported by ``family.features(params)``.

    kind:
      ``"solid"`` (tooth or bar width: min_feature rule), ``"gap"`` (gap between teeth,
      channel, slit: min_gap rule), ``"layer"`` (film/membrane thickness: thickness
      rule), ``"height"`` (tooth height / etch depth: etch_depth and aspect-ratio rules).
    size_m: the size (m).
    location: ``(x_m, z_m)`` of the feature's centre in the cross-section.
    description: words for the user, e.g. ``"tooth 1 width (top)"``.
    lateral_m: for ``"height"``: the smallest lateral size next to it (narrower of tooth
      and gap) for the aspect ratio; ``None`` = no aspect-ratio check.
    """

    kind: str
    size_m: float
    location: tuple[float, float]
    description: str
    lateral_m: float | None = None

    def __post_init__(self):
        if self.kind not in FEATURE_KINDS:
            raise ValueError(f"feature kind must be one of {FEATURE_KINDS}, got {self.kind!r}")


@dataclass(frozen=True)
class Violation:
    """A broken fabrication rule.

    rule: ``"min_feature" | "min_gap" | "thickness" | "etch_depth" | "aspect_ratio" |
      "material"``.
    measured_m / limit_m: the measured size and the limit it breaks (m).  For
      ``aspect_ratio``: the height and the largest height the rule allows for that
      lateral size.  ``nan`` where no length applies (material).
    location: ``(x_m, z_m)``; ``description`` says what was measured.
    """

    rule: str
    measured_m: float
    limit_m: float
    location: tuple[float, float]
    description: str

    @property
    def message(self) -> str:
        """One line for the user."""
        x, z = self.location
        where = f"at x = {x * 1e9:.1f} nm, z = {z * 1e9:.1f} nm"
        if self.rule == "material":
            return f"{self.rule}: {self.description}"
        if self.rule == "aspect_ratio":
            return (f"{self.rule}: {self.description} {where} is {self.measured_m * 1e9:.1f} nm "
                    f"high; the rule allows at most {self.limit_m * 1e9:.1f} nm")
        return (f"{self.rule}: {self.description} {where} "
                f"{size_phrase(self.rule, self.measured_m, self.limit_m)}")


def size_phrase(rule: str, measured_m: float, limit_m: float) -> str:
    """``measures 38.5 nm, below the minimum 80.0 nm`` (or ``above the maximum``).  A
    minimum rule whose region was found by opening/closing but whose local width
    estimate is not below the limit (a part that is thin only somewhere) says so."""
    m, lim = measured_m * 1e9, limit_m * 1e9
    if rule.startswith("min_") and measured_m >= limit_m:
        return f"is narrower than {lim:.1f} nm in places (local width estimate {m:.1f} nm)"
    relation = "above the maximum" if measured_m > limit_m else "below the minimum"
    return f"measures {m:.1f} nm, {relation} {lim:.1f} nm"


def _below(measured: float, limit: float) -> bool:
    return measured < limit * (1 - _REL_TOL)


def _above(measured: float, limit: float) -> bool:
    return measured > limit * (1 + _REL_TOL)


def _range_violations(rule, f: Feature, bounds) -> list[Violation]:
    if bounds is None:
        return []
    lo, hi = bounds
    if _below(f.size_m, lo):
        return [Violation(rule, f.size_m, lo, f.location, f.description)]
    if _above(f.size_m, hi):
        return [Violation(rule, f.size_m, hi, f.location, f.description)]
    return []


def design_rule_check(features: Iterable[Feature], rules: FabricationRules) -> list[Violation]:
    """Check a family's features against the rules; an empty list means the design is clean.

    solid < min_feature, gap < min_gap, layer outside thickness bounds, height outside
    etch_depth bounds, height / lateral > max_aspect_ratio.  Sizes equal to a limit pass.
    """
    out: list[Violation] = []
    for f in features:
        if f.kind == "solid" and rules.min_feature_m > 0 and _below(f.size_m, rules.min_feature_m):
            out.append(Violation("min_feature", f.size_m, rules.min_feature_m, f.location,
                                 f.description))
        elif f.kind == "gap" and rules.min_gap_m > 0 and _below(f.size_m, rules.min_gap_m):
            out.append(Violation("min_gap", f.size_m, rules.min_gap_m, f.location,
                                 f.description))
        elif f.kind == "layer":
            out += _range_violations("thickness", f, rules.thickness_m)
        elif f.kind == "height":
            out += _range_violations("etch_depth", f, rules.etch_depth_m)
            if f.lateral_m is not None and math.isfinite(rules.max_aspect_ratio):
                allowed = rules.max_aspect_ratio * f.lateral_m
                if _above(f.size_m, allowed):
                    out.append(Violation("aspect_ratio", f.size_m, allowed, f.location,
                                         f"{f.description} (aspect ratio "
                                         f"{f.size_m / f.lateral_m:.2f} > "
                                         f"{rules.max_aspect_ratio:g})"))
    return out


def check_materials(names: Iterable[str], rules: FabricationRules) -> list[Violation]:
    """One ``material`` violation per material not in ``rules.materials`` (empty = any)."""
    if not rules.materials:
        return []
    allowed = ", ".join(rules.materials)
    return [Violation("material", math.nan, math.nan, (math.nan, math.nan),
                      f"material {name!r} is not among the allowed materials ({allowed})")
            for name in dict.fromkeys(names) if name not in rules.materials]


# ---------------------------------------------------------------------------------
# design-rule check on binarized pixel patterns (free-form regions)
# ---------------------------------------------------------------------------------
def disc_element(diameter_m: float, dx: float, dz: float) -> np.ndarray:
    """Boolean structuring element: pixel offsets (i dx, k dz) within ``diameter/2``.

    Its extent along x is ``2 floor(diameter / (2 dx)) + 1`` pixels, so a straight
    feature of ``w`` pixels survives an opening iff ``w`` is at least that: the check
    is exact when ``diameter/dx`` is an odd integer and otherwise stricter by less than
    one pixel (a pixel pattern cannot resolve finer than its pixel).
    """
    r = 0.5 * diameter_m * (1 + _REL_TOL)
    mx, mz = int(math.floor(r / dx)), int(math.floor(r / dz))
    i = np.arange(-mx, mx + 1)[:, None] * dx
    k = np.arange(-mz, mz + 1)[None, :] * dz
    return i ** 2 + k ** 2 <= r ** 2


def _pad(a: np.ndarray, px: int, pz: int, periodic_x: bool) -> np.ndarray:
    # Outside the pattern the material is taken to continue as on its edge ("edge"):
    # a tooth standing on a substrate, or void above it, is not a feature boundary.
    a = np.pad(a, ((px, px), (0, 0)), mode="wrap" if periodic_x else "edge")
    return np.pad(a, ((0, 0), (pz, pz)), mode="edge")


def _merge_periodic(labels: np.ndarray, count: int) -> np.ndarray:
    """Join labels of regions that touch across the x seam of a periodic pattern."""
    parent = list(range(count + 1))

    def find(a):
        while parent[a] != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        return a

    for a, b in zip(labels[0], labels[-1]):
        if a and b:
            parent[find(a)] = find(b)
    roots = np.array([find(a) for a in range(count + 1)])
    return roots[labels]


@dataclass(frozen=True)
class ThinRegion:
    """Pixels of one connected region removed by the opening (or added by closing)."""

    mask: np.ndarray          # bool, same shape as the pattern
    centroid_m: tuple[float, float]
    width_m: float            # local width estimate, +/- one pixel
    area_m2: float
    protrusion_m: float       # farthest distance of its pixels from the opened pattern


def thin_regions(solid: np.ndarray, dx: float, dz: float, diameter_m: float, *,
                 origin: tuple[float, float] = (0.0, 0.0), periodic_x: bool = False
                 ) -> list[ThinRegion]:
    """Connected regions of ``solid`` that an opening with a disc of ``diameter_m`` removes.

    These are the parts of the solid phase narrower than the disc (a disc of that
    diameter cannot be placed inside the solid around them), including convex corners
    sharper than radius ``diameter/2``: the opening-based minimum length scale of
    Sigmund, "Morphology-based black and white filters for topology optimization",
    Struct. Multidisc. Optim. 33, 401 (2007), and Zhou, Lazarov, Wang & Sigmund,
    CMAME 293, 266 (2015).  For gaps pass ``~solid`` (an opening of the void phase is
    the closing of the solid with the same symmetric disc).

    ``solid[i, k]`` is the pixel whose lower-left corner is ``origin + (i dx, k dz)``.
    The local width of a region is ``2 max(d) - h`` with ``d`` the distance of its
    pixel centres to the nearest other-phase pixel centre and ``h = min(dx, dz)``.
    """
    solid = np.asarray(solid, dtype=bool)
    if diameter_m <= 0 or not solid.any():
        return []
    disc = disc_element(diameter_m, dx, dz)
    px, pz = disc.shape[0], disc.shape[1]          # > 2 * radius: covers both passes
    big = _pad(solid, px, pz, periodic_x)
    opened = ndimage.binary_opening(big, structure=disc)
    dist = ndimage.distance_transform_edt(big, sampling=(dx, dz))
    crop = (slice(px, px + solid.shape[0]), slice(pz, pz + solid.shape[1]))
    removed = solid & ~opened[crop]
    dist = dist[crop]
    # distance of every pixel to the nearest pixel that survives the opening
    reach = ndimage.distance_transform_edt(~opened, sampling=(dx, dz))[crop] \
        if opened.any() else np.full(solid.shape, np.inf)
    labels, count = ndimage.label(removed)
    if periodic_x and count:
        labels = _merge_periodic(labels, count)
    h = min(dx, dz)
    out = []
    x_c = origin[0] + (np.arange(solid.shape[0]) + 0.5) * dx
    z_c = origin[1] + (np.arange(solid.shape[1]) + 0.5) * dz
    for lab in np.unique(labels[labels > 0]):
        mask = labels == lab
        ii, kk = np.nonzero(mask)
        if periodic_x:
            # circular mean so a region across the seam gets a centroid on it
            phase = np.exp(2j * np.pi * (ii + 0.5) / solid.shape[0])
            xm = origin[0] + (np.angle(phase.mean()) % (2 * np.pi)) / (2 * np.pi) \
                * solid.shape[0] * dx
        else:
            xm = float(x_c[ii].mean())
        out.append(ThinRegion(mask=mask, centroid_m=(float(xm), float(z_c[kk].mean())),
                              width_m=float(2 * dist[mask].max() - h),
                              area_m2=float(mask.sum() * dx * dz),
                              protrusion_m=float(reach[mask].max())))
    return out


def pattern_rule_check(solid: np.ndarray, dx: float, dz: float, rules: FabricationRules, *,
                       origin: tuple[float, float] = (0.0, 0.0), periodic_x: bool = False,
                       tolerance_px: int = 1) -> list[Violation]:
    """Minimum feature and gap of a binarized pixel pattern, by opening and closing.

    Pixels removed by opening with a disc of diameter ``min_feature`` are solid features
    thinner than the disc; pixels added by closing with a disc of diameter ``min_gap``
    are gaps narrower than it (see :func:`thin_regions`).  One :class:`Violation` per
    connected region, located at its centroid, with its local width as ``measured_m``.
    Regions lying within ``tolerance_px`` pixels (diagonal pixel size) of the opened
    pattern are not reported: on a pixelated curved edge the discrete disc misses
    staircase pixels and one-pixel slivers, a shaving of the boundary rather than a
    feature (a Hausdorff tolerance of one pixel by default; 0 reports everything).
    Outside the pattern the edge pixels are taken to continue (or the pattern wraps
    along x when ``periodic_x``).
    """
    solid = np.asarray(solid, dtype=bool)
    tol = tolerance_px * math.hypot(dx, dz) * (1 + _REL_TOL)
    out: list[Violation] = []
    for rule, phase, limit, word in (("min_feature", solid, rules.min_feature_m, "solid"),
                                     ("min_gap", ~solid, rules.min_gap_m, "void")):
        for reg in thin_regions(phase, dx, dz, limit, origin=origin, periodic_x=periodic_x):
            if reg.protrusion_m > tol:
                out.append(Violation(
                    rule, reg.width_m, limit, reg.centroid_m,
                    f"free-form {word} region of {int(reg.mask.sum())} pixels "
                    f"({reg.area_m2 * 1e18:.0f} nm^2)"))
    return out


def smallest_features(solid: np.ndarray, dx: float, dz: float, diameters_m: Sequence[float],
                      *, periodic_x: bool = False, tolerance_px: int = 1
                      ) -> tuple[float, float]:
    """Largest disc diameters (from the increasing list ``diameters_m``) that an opening
    of the solid and of the void leaves intact (up to regions within ``tolerance_px``,
    as in :func:`pattern_rule_check`): the measured minimum solid and void sizes of a
    pattern at the resolution of that list (0 when even the first fails).
    """
    solid = np.asarray(solid, dtype=bool)
    tol = tolerance_px * math.hypot(dx, dz) * (1 + _REL_TOL)
    result = []
    for phase in (solid, ~solid):
        best = 0.0
        for d in diameters_m:
            regs = thin_regions(phase, dx, dz, d, periodic_x=periodic_x)
            if any(r.protrusion_m > tol for r in regs):
                break
            best = d
        result.append(best)
    return result[0], result[1]


# ---------------------------------------------------------------------------------
# one rule check for every command
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class Finding:
    """One rule violation, located in the sample's plane or in the layout (x, y).

    plane: ``"cross-section"`` (x along the surface, z depth), ``"wafer plane"`` (the
    simulated plane is the chip surface) or ``"layout"`` (the drawn top view).
    """

    plane: str
    rule: str
    measured_m: float
    limit_m: float
    location_m: tuple[float, float]
    description: str

    @property
    def message(self) -> str:
        x, v = self.location_m
        if not math.isfinite(self.measured_m):
            return f"{self.plane}: {self.rule}: {self.description}"
        if self.plane != "layout":
            return f"{self.plane}: " + Violation(self.rule, self.measured_m, self.limit_m,
                                                 self.location_m, self.description).message
        where = f"at x = {x * 1e6:.4f} µm, y = {v * 1e6:.4f} µm"
        return (f"layout: {self.rule}: {self.description} {where} "
                f"{size_phrase(self.rule, self.measured_m, self.limit_m)}")

    def to_dict(self) -> dict:
        # a finding without a size (etch, region, material) stores null, not NaN: the
        # JSON stays standard and the finite-result check does not mistake it for a
        # failed solve
        def size(v):
            return v if math.isfinite(v) else None

        return {"plane": self.plane, "rule": self.rule, "measured_m": size(self.measured_m),
                "limit_m": size(self.limit_m), "location_m": list(self.location_m),
                "description": self.description, "message": self.message}


@dataclass(frozen=True)
class RuleVerdict:
    """What :func:`check_design` found: ``findings`` (empty = can be made as it is) and
    ``not_checked`` (parts of the check that could not run, with the reason)."""

    findings: tuple[Finding, ...]
    not_checked: tuple[str, ...] = ()

    @property
    def clean(self) -> bool:
        return not self.findings

    @property
    def messages(self) -> list[str]:
        return [f.message for f in self.findings]

    def summary_line(self) -> str:
        head = "clean" if self.clean else f"{len(self.findings)} violation(s)"
        if self.not_checked:
            head += " (not checked: " + "; ".join(self.not_checked) + ")"
        return head

    def to_dict(self) -> dict:
        return {"clean": self.clean, "violations": [f.to_dict() for f in self.findings],
                "not_checked": list(self.not_checked)}


def _from_violation(plane: str, v: Violation) -> Finding:
    return Finding(plane, v.rule, v.measured_m, v.limit_m, v.location, v.description)


def column_run_violations(columns: np.ndarray, dx: float, x0: float, z: float,
                          rules: FabricationRules, *, periodic: bool, what: str
                          ) -> list[Violation]:
    """Solid runs narrower than ``min_feature`` and void runs narrower than ``min_gap`` in
    one row of pixel columns (the lines and spaces one lithography level draws).

    Widths are whole pixels, compared with the limits exactly (sizes equal to a limit
    pass).  Without ``periodic`` the runs touching either end continue outside the row
    and are not measured.
    """
    cols = np.asarray(columns, dtype=bool)
    n = cols.size
    out = []
    if cols.all() or not cols.any():
        return out
    start = int(np.nonzero(cols != cols[0])[0][0]) if periodic else 0
    rolled = np.roll(cols, -start)
    edges = np.nonzero(np.diff(rolled.astype(np.int8)))[0] + 1
    bounds = np.concatenate([[0], edges, [n]])
    for a, b in zip(bounds, bounds[1:]):
        if not periodic and (a == 0 or b == n):
            continue
        solid = bool(rolled[a])
        rule, limit = ("min_feature", rules.min_feature_m) if solid else \
            ("min_gap", rules.min_gap_m)
        width = (b - a) * dx
        if limit > 0 and _below(width, limit):
            centre = x0 + ((start + 0.5 * (a + b)) % n) * dx
            out.append(Violation(rule, width, limit, (centre, z),
                                 f"{what}: {'line' if solid else 'space'} of {b - a} pixel "
                                 "columns"))
    return out


def square_findings(lay, fr, pattern, rules):
    """Parts of a wafer-plane free-form pattern that a square of ``min_feature`` (solid)
    or ``min_gap`` (void) pixels does not reach, by opening/closing on the pixel grid
    (rectilinear sets: the criterion of designer.layout.thin_parts).  Yields
    ``(rule, limit, solid?, (width, (x, z), pixels, area))`` per connected part."""
    from designer.families import region

    g = lay.grid
    n = lay.pml_cells_z
    full = np.asarray(lay.material_mask, dtype=bool).copy()
    inside = np.zeros_like(full)
    for cells, block in zip(region.parts(fr, lay), region.split(fr, lay, pattern)):
        full[cells.i0:cells.i1, cells.k0:cells.k1] = block
        inside[cells.i0:cells.i1, cells.k0:cells.k1] = True
    full, inside = full[:, n:g.nz - n], inside[:, n:g.nz - n]
    periodic = region.parts(fr, lay)[0].periodic_x
    for rule, limit, solid_phase in (("min_feature", rules.min_feature_m, True),
                                     ("min_gap", rules.min_gap_m, False)):
        if limit <= 0:
            continue
        kx = int(math.ceil(limit / g.dx * (1 - _REL_TOL) - 1e-6))
        kz = int(math.ceil(limit / g.dz * (1 - _REL_TOL) - 1e-6))
        phase = full if solid_phase else ~full
        big = np.pad(phase, ((kx, kx), (0, 0)), mode="wrap" if periodic else "edge")
        big = np.pad(big, ((0, 0), (kz, kz)), mode="edge")
        opened = ndimage.binary_opening(big, structure=np.ones((kx, kz), dtype=bool))
        removed = phase & ~opened[kx:kx + phase.shape[0], kz:kz + phase.shape[1]] & inside
        labels, count = ndimage.label(removed)
        if periodic and count:
            labels = _merge_periodic(labels, count)
        for lab in np.unique(labels[labels > 0]):
            ii, kk = np.nonzero(labels == lab)
            w = (min(ii.max() - ii.min() + 1, kk.max() - kk.min() + 1)
                 * min(g.dx, g.dz))
            x = g.x0 + (ii.mean() + 0.5) * g.dx
            z = g.z0 + (kk.mean() + n + 0.5) * g.dz
            yield rule, limit, solid_phase, (float(w), (float(x), float(z)), int(ii.size),
                                             float(ii.size * g.dx * g.dz))


def freeform_findings(spec, params, grid_step_m: float | None = None) -> list[Finding]:
    """Can the sample's free-form pattern be made as it is?

    Cross-section plane: in each etch step (slab) every pixel column must be solid or
    void all through the slab (rule ``etch``), and the slab's lines and spaces must meet
    ``min_feature`` / ``min_gap`` (:func:`column_run_violations`); a drawn layout needs
    the region to span the whole period (rule ``region``).  Wafer plane: the pattern is
    the top view; its solid and void parts are checked by opening and closing
    (:func:`pattern_rule_check`).
    """
    from designer.evaluate import default_grid_step
    from designer.families import get_family, region

    fr = params.freeform
    family = get_family(spec.family)
    h = grid_step_m or spec.solver.grid_step_m or default_grid_step(spec)
    lay = family.layout(params, spec.context, h)
    g = lay.grid
    pattern = np.asarray(family.freeform_density(params, lay)) > 0.5
    blocks = region.split(fr, lay, pattern)
    out: list[Finding] = []
    names = ["region", "upper region"]
    if fr.plane == "wafer":
        # the pattern is the drawn top view: the layout's criterion (a square of the
        # minimum feature fits around every solid pixel, one of the minimum gap around
        # every void pixel), on the whole cell with the family's material around it
        for rule, limit, solid_phase, v in square_findings(lay, fr, pattern,
                                                           spec.fabrication):
            out.append(Finding("wafer plane", rule, v[0], limit, v[1],
                               f"free-form {'solid' if solid_phase else 'void'} part of "
                               f"{v[2]} pixels ({v[3] * 1e18:.0f} nm^2)"))
        return out
    for name, cells, block in zip(names, region.parts(fr, lay), blocks):
        x0, z0 = region.part_origin(cells, lay)
        for j, (a, b) in enumerate(region.slab_rows(fr, lay)):
            slab = block[:, a:b]
            step = f"free-form {name}, etch step {j + 1} of {fr.etch_steps}"
            z_mid = z0 + 0.5 * (a + b) * g.dz
            mixed = np.nonzero(slab.any(axis=1) & ~slab.all(axis=1))[0]
            if mixed.size:
                x = x0 + (mixed[0] + 0.5) * g.dx
                out.append(Finding(
                    "cross-section", "etch", math.nan, math.nan, (x, z_mid),
                    f"{step}: {mixed.size} pixel column(s), the first at x = "
                    f"{x * 1e9:.1f} nm, change material within the step (one etch makes "
                    "columns solid or void all through it)"))
                continue
            for v in column_run_violations(slab[:, 0], g.dx, x0, z_mid, spec.fabrication,
                                           periodic=cells.periodic_x, what=step):
                out.append(_from_violation("cross-section", v))
        if spec.family == "membrane":
            z_lo, z_hi = z0, z0 + cells.shape[1] * g.dz
            if fr.etch_steps != 1 or z_lo > 0.5 * g.dz or \
                    z_hi < params.thickness_m - 0.5 * g.dz:
                out.append(Finding(
                    "cross-section", "region", math.nan, math.nan, (x0, z0),
                    f"free-form {name} of a membrane: slits are etched through the film "
                    "in one step, so the region must span the film with etch_steps = 1"))
        if not cells.periodic_x:
            out.append(Finding(
                "cross-section", "region", math.nan, math.nan, (x0, z0),
                f"free-form {name} covers x = {fr.x_m[0] * 1e9:.4g} .. "
                f"{fr.x_m[1] * 1e9:.4g} nm of the period; a cross-section pattern is "
                "drawn as lines only when the region spans the whole period"))
    return out


def _outside_region(features, fr) -> list[Feature]:
    """The family's sizes that a free-form region leaves standing: solids and gaps
    inside the region are the pattern's (checked pixel by pixel); heights keep their
    etch-depth rule but lose the aspect ratio of a tooth that is no longer there."""
    boxes = [(fr.x_m, fr.z_m)]
    if fr.upper is not None:
        boxes.append((fr.x_m, (fr.mirror_z_m - fr.z_m[1], fr.mirror_z_m - fr.z_m[0])))
    tol = 1e-12

    def inside(loc):
        return any(x[0] - tol <= loc[0] <= x[1] + tol and z[0] - tol <= loc[1] <= z[1] + tol
                   for x, z in boxes)

    out = []
    for f in features:
        if f.kind in ("solid", "gap") and inside(f.location):
            continue
        if f.kind == "height" and inside(f.location):
            f = Feature("height", f.size_m, f.location, f.description)
        out.append(f)
    return out


def check_design(spec, params=None, *, grid_step_m: float | None = None,
                 layout: bool = True) -> RuleVerdict:
    """The design-rule verdict of a sample: the one check that ``design``, ``evaluate``,
    ``compare`` and ``export`` all report.

    ``params``: the family parameters to check (default ``spec.sample``);
    ``grid_step_m``: the grid a free-form pattern lives on (default: the spec's).
    Checks: the family's sizes (:func:`design_rule_check`, read in the sample's plane),
    the allowed materials, a free-form pattern (:func:`freeform_findings`) and, with
    ``layout``, the top view that ``export`` would draw from the spec's ``[layout]``
    table (designer.export.layout_rule_check: width and space of the drawn material
    for the tone, write field, decorations).
    """
    import dataclasses

    from designer.errors import SpecError
    from designer.families import get_family

    p = spec.sample if params is None else params
    family = get_family(spec.family)
    rules = spec.fabrication
    plane_info = getattr(p, "plane", None)
    where = "wafer plane" if plane_info is not None and plane_info.plane == "wafer" \
        else "cross-section"
    fr = getattr(p, "freeform", None)
    features = family.features(p)
    if fr is not None:
        features = _outside_region(features, fr)
    out = [_from_violation(where, v) for v in design_rule_check(features, rules)]
    names = [p.material.name]
    if fr is not None:
        names.append(fr.material.name)
    out += [_from_violation(where, v) for v in check_materials(names, rules)]
    skipped = []
    blocking = False
    if fr is not None:
        found = freeform_findings(spec, p, grid_step_m)
        blocking = any(f.rule in ("etch", "region") for f in found)
        out += found
    if layout and getattr(p, "holes", None) is not None:
        # hole lattices are drawn as array references: their sizes are the features
        # above; the layout adds the write field (designer.hole_export)
        from designer.hole_export import write_field_findings

        out += write_field_findings(spec)
    elif layout:
        if blocking:
            skipped.append("layout: the free-form pattern cannot be drawn as it is")
        else:
            from designer import export

            sp = dataclasses.replace(spec, sample=p)
            if grid_step_m is not None:
                sp = dataclasses.replace(sp, solver=dataclasses.replace(
                    spec.solver, grid_step_m=grid_step_m))
            try:
                settings = export.parse_layout(spec.layout, spec.source,
                                               materials=tuple(dict.fromkeys(names)))
                view = export.top_view(sp, settings)
            except SpecError as exc:
                skipped.append(f"layout: {exc.key}: {exc.message}" if hasattr(exc, "message")
                               else f"layout: {exc}")
            else:
                out += export.layout_rule_check(view, settings, rules)
    return RuleVerdict(tuple(out), tuple(skipped))
