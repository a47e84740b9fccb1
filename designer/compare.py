"""Rank candidate samples on the same footing and write a report.

``velomatch compare A.toml B.toml ... --out DIR`` writes ``DIR/compare.json`` and a
self-contained ``DIR/report.html``.

Same footing: every candidate is evaluated with the ``[beam]`` table, the ``[laser]``
table (wavelength, amplitude, pulse duration, spot) and the grid step of the
*first* spec.  How the sample is lit and crossed stays each candidate's own
(``laser.angle_deg``, ``laser.from``, ``laser.azimuth_deg``, ``laser.polarization`` and
the whole ``[path]`` table): they are part of a sample's design (a prism needs its
phase-matched angle, a film its oblique one, a hole array its azimuth and the
electron's point in the unit cell).  The grid step is the first spec's
``solver.grid_step_nm``; when it gives none, the step chosen automatically for the
first spec solved on a grid (or, if the first is an exact layer stack, the finest
automatic step among the others).  The report says which.

Each candidate's geometry and angle are then pinned (a "phase-matched" period or
angle is resolved to its number at the common beam and wavelength), so the scans
below move one thing at a time:

* coupling: ``|beta_c|`` at the common peak field, per unit field, structure factor
  kappa and damage factor (the ``evaluate`` figures); candidates are ranked on the
  coupling per unit field;
* fabrication tolerance: every size parameter of the family (lengths in nm; the
  duty cycle as a +-10 nm change of the tooth width) is moved by +-10 nm with the
  others held, and the smallest ``|beta_c| / |beta_c,0|`` is reported (positions
  such as slit centres and the lateral shift of a second grating are not sizes and
  are left out);
* angular and spectral bandwidth: the full width, around the nominal angle /
  wavelength, of the range where ``|beta_c| >= |beta_c,0| / sqrt(2)`` (half of the
  sideband probability ``|beta_c|^2``, which rules at weak coupling: P_±1 ≈ |beta_c|^2
  for P_l = J_l(2|beta_c|)^2).  Found on a geometric grid of offsets (angles up to
  ±89.5°), the bracket refined twice with three more points, the crossing linearly
  interpolated.  When the
  coupling stays above the level across the scan the width is a lower bound;
* ranking: on the *averaged* coupling per unit field, ``|beta_c,0|`` times the mean of
  ``|beta_c| / |beta_c,0|`` over the pulse's power spectrum (transform-limited
  Gaussian of ``laser.duration_fs``) and, separately, over the beam's angular spectrum
  (Gaussian beam of ``laser.spot_radius_um``), read off the two scans above
  (:func:`laser_spreads`, :func:`spread_average`).  Without duration and spot both
  means are 1 and the ranking is on the nominal coupling.  The product of the two
  means is exact when the response factorizes in angle and wavelength; for a
  resonance, whose line runs across the angle-wavelength plane, it is an estimate.

Every family goes through the same scans, the Fourier-modal hole and slit membranes
included (their angle scan moves the polar angle at the candidate's own azimuth).
"""

from __future__ import annotations

import copy
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from designer import io as vio
from designer import report as rp
from designer.errors import UsageError, VelomatchError
from designer.laser import spectral_fwhm_m
from designer.sweep import Job, _default_evaluator, _progress_bar, run_jobs

FAB_ERROR_NM = 10.0
LEVEL = 1.0 / math.sqrt(2.0)
ANGLE_STEPS_DEG = (0.5, 1.0, 2.0, 4.0, 8.0, 16.0, 32.0)
WAVELENGTH_STEPS = (0.005, 0.01, 0.02, 0.04, 0.08, 0.16)   # relative to the nominal
REFINE_POINTS = 3
REFINE_ROUNDS = 2
MAX_ANGLE_DEG = 89.5
_POSITION_KEYS = ("center", "centre", "shift")
# how a candidate is lit and crossed is part of its design, not of the footing
OWN_LASER_KEYS = ("angle_deg", "from", "azimuth_deg", "polarization")
AVERAGE_POINTS = 201


@dataclass(frozen=True)
class Candidate:
    """One sample on the common footing, geometry and angle pinned (spec units)."""

    name: str
    source: str
    base_dir: Path | None
    family: str
    raw: dict
    angle_deg: float
    wavelength_nm: float
    variants: tuple[tuple[str, float, dict | None], ...]   # (parameter, change, raw or None)


# -- footing -----------------------------------------------------------------------

def _names(sources: Sequence[str]) -> list[str]:
    stems = [Path(s).stem for s in sources]
    out = []
    for s, stem in zip(sources, stems):
        name = stem if stems.count(stem) == 1 else str(s)
        while name in out:
            name += "'"
        out.append(name)
    return out


def common_footing(specs: Sequence) -> tuple[list[dict], dict]:
    """Raw trees of every spec with the first spec's beam, laser and grid step.

    Returns ``(raws, footing)``; ``footing`` records what was taken from where.
    """
    from designer.evaluate import choose_method, default_grid_step
    from designer.spec import parse_spec

    if not specs:
        raise UsageError("give at least one candidate spec")
    first = specs[0]
    beam = copy.deepcopy(first.raw.get("beam", {}))
    laser = {k: copy.deepcopy(v) for k, v in first.raw.get("laser", {}).items()
             if k not in OWN_LASER_KEYS}
    raws = []
    changed = []
    for spec in specs:
        raw = copy.deepcopy(spec.raw)
        own_laser = raw.get("laser", {})
        kept = {k: own_laser[k] for k in OWN_LASER_KEYS if k in own_laser}
        new_laser = {**laser, **kept}
        if raw.get("beam") != beam or own_laser != new_laser:
            changed.append(spec.source)
        raw["beam"] = copy.deepcopy(beam)
        raw["laser"] = new_laser
        raws.append(raw)
    grid_step_nm = first.raw.get("solver", {}).get("grid_step_nm")
    how = f"solver.grid_step_nm of {first.source}"
    if grid_step_nm is None:
        parsed = [parse_spec(r, source=s.source, base_dir=s.base_dir) for r, s in zip(raws, specs)]
        grid = [p for p in parsed if choose_method(p) == "fdfd"]
        if grid and choose_method(parsed[0]) == "fdfd":
            grid_step_nm = default_grid_step(parsed[0]) * 1e9
            how = f"automatic grid step of {first.source}"
        elif grid:
            grid_step_nm = min(default_grid_step(p) for p in grid) * 1e9
            how = "finest automatic grid step among the candidates solved on a grid"
        else:
            how = "none needed: every candidate is an exact layer stack"
    if grid_step_nm is not None:
        grid_step_nm = float(f"{grid_step_nm:.6g}")
        for raw in raws:
            raw.setdefault("solver", {})["grid_step_nm"] = grid_step_nm
    footing = {"from": first.source, "beam": beam, "laser": laser,
               "grid_step_nm": grid_step_nm, "grid_step_from": how,
               "kept_per_candidate": [f"laser.{k}" for k in OWN_LASER_KEYS] + ["path"],
               "changed": changed}
    return raws, footing


def _pinned_sample(family, params) -> dict:
    table = family.to_table(params)
    if table.get("period_nm") == "phase-matched":
        table["period_nm"] = params.period_m * 1e9
    return table


def _size_keys(variables: dict) -> list[str]:
    keys = []
    for key in variables:
        if any(p in key for p in _POSITION_KEYS):
            continue
        if key.split(".", 1)[0].endswith("_nm") or key == "duty_cycle":
            keys.append(key)
    return keys


def make_candidates(specs: Sequence) -> tuple[list[Candidate], dict]:
    """Candidates on the common footing, pinned, with their ±10 nm variants."""
    from designer.families import get_family
    from designer.spec import parse_spec

    raws, footing = common_footing(specs)
    names = _names([s.source for s in specs])
    out = []
    for name, spec0, raw in zip(names, specs, raws):
        spec = parse_spec(raw, source=spec0.source, base_dir=spec0.base_dir)
        family = get_family(spec.family)
        angle_deg = math.degrees(family.laser_angle(spec.sample, spec.context))
        pinned = copy.deepcopy(raw)
        pinned["sample"] = _pinned_sample(family, spec.sample)
        pinned["laser"]["angle_deg"] = angle_deg
        variants = []
        variables = family.variables(spec.sample)
        for key in _size_keys(variables):
            value = variables[key][0]
            step = FAB_ERROR_NM
            if key == "duty_cycle":
                step = FAB_ERROR_NM * 1e-9 / spec.sample.period_m
            for sign in (+1, -1):
                try:
                    params = family.replace(spec.sample, {key: value + sign * step})
                    vraw = copy.deepcopy(pinned)
                    vraw["sample"] = _pinned_sample(family, params)
                except ValueError:
                    vraw = None
                variants.append((f"sample.{key}", sign * FAB_ERROR_NM, vraw))
        out.append(Candidate(name=name, source=spec.source, base_dir=spec.base_dir,
                             family=spec.family, raw=pinned, angle_deg=angle_deg,
                             wavelength_nm=spec.laser.wavelength_m * 1e9,
                             variants=tuple(variants)))
    return out, footing


# -- scans -------------------------------------------------------------------------

def _with(raw: dict, table: str, key: str, value) -> dict:
    out = copy.deepcopy(raw)
    out.setdefault(table, {})[key] = value
    return out


def _angle_offsets(c: Candidate) -> list[float]:
    """Geometric steps each way, the last one clipped to the grazing limit."""
    out = []
    for s in (-1, 1):
        room = MAX_ANGLE_DEG - s * c.angle_deg     # distance to +-MAX_ANGLE_DEG
        for d in ANGLE_STEPS_DEG:
            if d >= room:
                if room > 1e-6:
                    out.append(s * room)
                break
            out.append(s * d)
    return out


def _wavelength_offsets(c: Candidate) -> list[float]:
    return [s * r * c.wavelength_nm for r in WAVELENGTH_STEPS for s in (-1, 1)]


def _angle_raw(c: Candidate, offset: float) -> dict:
    return _with(c.raw, "laser", "angle_deg", float(f"{c.angle_deg + offset:.12g}"))


def _wavelength_raw(c: Candidate, offset: float) -> dict:
    return _with(c.raw, "laser", "wavelength_nm", float(f"{c.wavelength_nm + offset:.12g}"))


def _beta(outcome: dict | None) -> float | None:
    if not outcome or "result" not in outcome:
        return None
    value = outcome["result"].get("coupling", {}).get("beta_c")
    return None if value is None else abs(float(value))


def half_width(offsets: Sequence[float], ratios: Sequence[float | None],
               level: float = LEVEL) -> dict:
    """Where ``ratio(offset)`` first falls below ``level`` on each side of 0.

    ``offsets`` and ``ratios`` include the nominal point (0, 1).  Returns
    ``{"low", "high", "width", "lower_bound", "bracket_low", "bracket_high"}``: the
    interpolated crossings (or the scan edge, with ``lower_bound`` True), and the
    bracketing offsets to refine.
    """
    pts = sorted((float(o), float(r)) for o, r in zip(offsets, ratios) if r is not None)
    centre = min(range(len(pts)), key=lambda j: abs(pts[j][0]))
    out = {"lower_bound": False}
    for side, step in (("high", 1), ("low", -1)):
        j = centre
        crossing = None
        bracket = None
        while 0 <= j + step < len(pts):
            (o0, r0), (o1, r1) = pts[j], pts[j + step]
            if r1 < level <= r0:
                crossing = o0 + (o1 - o0) * (r0 - level) / (r0 - r1)
                bracket = (o0, o1)
                break
            j += step
        if crossing is None:
            crossing = pts[j][0]
            out["lower_bound"] = True
        out[side] = crossing
        out[f"bracket_{side}"] = bracket
    out["width"] = out["high"] - out["low"]
    return out


def _refinement(bracket) -> list[float]:
    if bracket is None:
        return []
    a, b = bracket
    return [a + (b - a) * k / (REFINE_POINTS + 1) for k in range(1, REFINE_POINTS + 1)]


@dataclass
class _Plan:
    jobs: list
    tags: list


def compare_candidates(candidates: Sequence[Candidate], footing: dict, *,
                       evaluator: Callable = _default_evaluator, workers: int | None = None,
                       scheduler: str | None = None, progress: bool = False) -> dict:
    """Evaluate and rank the candidates; returns the ``compare.json`` object."""
    plan = _Plan([], [])

    def add(c_index: int, what: str, offset, raw: dict | None) -> None:
        if raw is None:
            return
        c = candidates[c_index]
        plan.jobs.append(Job(raw, c.source, c.base_dir))
        plan.tags.append((c_index, what, offset))

    for k, c in enumerate(candidates):
        add(k, "nominal", 0.0, c.raw)
        for j, (_, _, vraw) in enumerate(c.variants):
            add(k, "fab", j, vraw)
        for o in _angle_offsets(c):
            add(k, "angle", o, _angle_raw(c, o))
        for o in _wavelength_offsets(c):
            add(k, "wavelength", o, _wavelength_raw(c, o))

    bar = _progress_bar(len(plan.jobs), 0, "compare", progress)
    try:
        outcomes = run_jobs(plan.jobs, evaluator=evaluator, workers=workers,
                            scheduler=scheduler, progress=bar)
        scans = _collect(candidates, plan.tags, outcomes)
        # refine each bandwidth bracket, all candidates at once, REFINE_ROUNDS times
        for _ in range(REFINE_ROUNDS):
            extra = _Plan([], [])
            for k, c in enumerate(candidates):
                for what, make in (("angle", _angle_raw), ("wavelength", _wavelength_raw)):
                    hw = _scan_width(scans[k], what)
                    if hw is None:
                        continue
                    for side in ("low", "high"):
                        for o in _refinement(hw[f"bracket_{side}"]):
                            extra.jobs.append(Job(make(c, o), c.source, c.base_dir))
                            extra.tags.append((k, what, o))
            if not extra.jobs:
                break
            if bar is not None:
                bar.total += len(extra.jobs)
                bar.refresh()
            more = run_jobs(extra.jobs, evaluator=evaluator, workers=workers,
                            scheduler=scheduler, progress=bar)
            for (k, what, o), outcome in zip(extra.tags, more):
                scans[k][what].append((o, outcome))
    finally:
        if bar is not None:
            bar.close()
    return _assemble(candidates, footing, scans)


def _collect(candidates, tags, outcomes) -> list[dict]:
    scans = [{"nominal": None, "fab": {}, "angle": [], "wavelength": []} for _ in candidates]
    for (k, what, o), outcome in zip(tags, outcomes):
        if what == "nominal":
            scans[k]["nominal"] = outcome
        elif what == "fab":
            scans[k]["fab"][o] = outcome
        else:
            scans[k][what].append((o, outcome))
    for k, c in enumerate(candidates):
        nominal = scans[k]["nominal"]
        if nominal is None or "error" in nominal:
            message = nominal.get("error") if nominal else "not evaluated"
            raise VelomatchError(f"{c.source}: candidate {c.name!r} could not be evaluated: "
                                 f"{message}")
    return scans


def _scan_width(scan: dict, what: str) -> dict | None:
    b0 = _beta(scan["nominal"])
    if not b0:
        return None
    offsets = [0.0] + [o for o, _ in scan[what]]
    ratios = [1.0] + [None if _beta(out) is None else _beta(out) / b0 for _, out in scan[what]]
    return half_width(offsets, ratios)


def laser_spreads(raw: dict) -> dict:
    """Spectral and angular spread of the common laser (spec units).

    * pulse: a transform-limited Gaussian of intensity FWHM ``duration_fs`` has the
      power-spectrum FWHM ``dnu = TIME_BANDWIDTH / tau``, i.e.
      ``dlambda = TIME_BANDWIDTH lambda^2 / (c tau)`` (nm);
    * beam: a Gaussian beam of 1/e² intensity radius ``w0 = spot_radius_um`` at its
      waist has the far-field 1/e² half-angle ``theta0 = lambda / (pi w0)`` in vacuum
      (Siegman, Lasers, ch. 17), its angular power spectrum ``exp(-2 dtheta² / theta0²)``.

    None where the spec gives no duration / spot (a monochromatic plane wave)."""
    laser = raw.get("laser", {})
    lam_m = float(laser["wavelength_nm"]) * 1e-9
    tau = laser.get("duration_fs")
    w0 = laser.get("spot_radius_um")
    return {"spectral_fwhm_nm": (None if tau is None else
                                 spectral_fwhm_m(lam_m, float(tau) * 1e-15) * 1e9),
            "angular_half_width_deg": (None if w0 is None else
                                       math.degrees(lam_m / (math.pi * float(w0) * 1e-6)))}


def spread_average(curve, spread: float | None, kind: str) -> float:
    """Mean of ``|beta_c| / |beta_c,0|`` over the laser's spread around the nominal
    value: ``curve`` rows ``(offset, ratio)``; ``kind`` "spectral" (``spread`` = power
    FWHM, weight ``exp(-4 ln 2 x² / FWHM²)``) or "angular" (``spread`` = 1/e²
    half-angle, weight ``exp(-2 x² / theta0²)``); the ratio is interpolated linearly
    on the scan.  1 without a spread."""
    if not spread:
        return 1.0
    pts = np.asarray(sorted(curve), dtype=float)
    sigma = spread / (2.0 * math.sqrt(2.0 * math.log(2.0))) if kind == "spectral" \
        else 0.5 * spread
    x = np.linspace(-4.0 * sigma, 4.0 * sigma, AVERAGE_POINTS)
    w = np.exp(-0.5 * (x / sigma) ** 2)
    r = np.interp(x, pts[:, 0], pts[:, 1])
    return float(np.sum(w * r) / np.sum(w))


def _bandwidth_average(c: Candidate, result: dict, curves: dict) -> dict:
    spreads = laser_spreads(c.raw)
    ratios = {"spectral_ratio": spread_average(curves["wavelength"],
                                               spreads["spectral_fwhm_nm"], "spectral"),
              "angular_ratio": spread_average(curves["angle"],
                                              spreads["angular_half_width_deg"], "angular")}
    factor = ratios["spectral_ratio"] * ratios["angular_ratio"]
    coupling = result["coupling"]
    return {**spreads, **ratios,
            "beta_c": coupling["beta_c"] * factor,
            "beta_c_per_field_m_per_V": coupling["beta_c_per_field_m_per_V"] * factor}


def _assemble(candidates, footing, scans) -> dict:
    from designer.provenance import provenance

    entries = []
    for k, c in enumerate(candidates):
        scan = scans[k]
        result = scan["nominal"]["result"]
        b0 = _beta(scan["nominal"])
        per_param = []
        for j, (key, change, vraw) in enumerate(c.variants):
            out = scan["fab"].get(j)
            b = _beta(out)
            if vraw is None:
                error = "geometry invalid with this change"
            else:
                error = out.get("error") if out else "not evaluated"
            per_param.append({"parameter": key, "change_nm": change,
                              "ratio": None if (b is None or not b0) else b / b0,
                              "error": error})
        valid = [p for p in per_param if p["ratio"] is not None]
        worst = min(valid, key=lambda p: p["ratio"]) if valid else None
        tolerance = {"error_nm": FAB_ERROR_NM, "per_parameter": per_param,
                     "worst_ratio": None if worst is None else worst["ratio"],
                     "worst_parameter": None if worst is None else worst["parameter"],
                     "worst_change_nm": None if worst is None else worst["change_nm"]}
        bands, curves = {}, {}
        for what, unit in (("angle", "deg"), ("wavelength", "nm")):
            hw = _scan_width(scan, what)
            curve = sorted([(0.0, 1.0)] + [(o, _beta(out) / b0) for o, out in scan[what]
                                            if _beta(out) is not None and b0])
            curves[what] = curve
            nominal = c.angle_deg if what == "angle" else c.wavelength_nm
            bands[what] = {
                "unit": unit, "nominal": nominal,
                "full_width": None if hw is None else hw["width"],
                "low": None if hw is None else nominal + hw["low"],
                "high": None if hw is None else nominal + hw["high"],
                "lower_bound": None if hw is None else hw["lower_bound"],
                "level": LEVEL,
                "curve": [[nominal + o, r] for o, r in curve],
            }
        entries.append({
            "name": c.name, "source": c.source, "family": c.family,
            "angle_deg": c.angle_deg, "spec": c.raw,
            "coupling": result["coupling"], "provenance": result.get("provenance"),
            "peak_field_V_per_m": result.get("laser", {}).get("peak_field_V_per_m"),
            "design_rules": result.get("design_rules"),
            "tolerance_10nm": tolerance,
            "angular_bandwidth_deg": bands["angle"],
            "spectral_bandwidth_nm": bands["wavelength"],
            "bandwidth_average": _bandwidth_average(c, result, curves),
        })
    order = sorted(range(len(entries)),
                   key=lambda k: -(entries[k]["bandwidth_average"]["beta_c_per_field_m_per_V"]
                                   or 0.0))
    for rank, k in enumerate(order, start=1):
        entries[k]["rank"] = rank
    from designer.cautions import cautions

    fields = [e["peak_field_V_per_m"] for e in entries if e["peak_field_V_per_m"] is not None]
    return {"footing": footing, "cautions": cautions(max(fields, default=None)),
            "ranking": [entries[k]["name"] for k in order],
            "ranked_on": "bandwidth_average.beta_c_per_field_m_per_V (descending)",
            "candidates": [entries[k] for k in order],
            "definitions": {
                "tolerance_10nm.worst_ratio": "smallest |beta_c|/|beta_c,0| over ±10 nm "
                                              "changes of each size parameter",
                "bandwidth": "full width of the range around the nominal value where "
                             "|beta_c| >= |beta_c,0|/sqrt(2)",
                "bandwidth_average": "|beta_c| x the mean of |beta_c|/|beta_c,0| over the "
                                     "pulse's power spectrum (transform-limited Gaussian "
                                     "of [laser] duration_fs) x the same over the beam's "
                                     "angular spectrum (Gaussian beam of [laser] "
                                     "spot_radius_um, in the plane of incidence); each "
                                     "ratio is 1 when the spec gives no duration / spot; "
                                     "the two spreads are averaged separately and "
                                     "multiplied: exact when the response factorizes in "
                                     "angle and wavelength, an estimate for a resonance "
                                     "whose line runs across both"},
            "provenance": provenance(None, candidates=[e["source"] for e in entries])}


# -- report ------------------------------------------------------------------------

def headline(entry: dict) -> str:
    """The headline number of a candidate as the report prints it: |β_c| at the
    common peak field."""
    return rp.fmt(entry["coupling"].get("beta_c"))


def _bw_text(band: dict, digits: int = 3) -> str:
    if band.get("full_width") is None:
        return "—"
    text = rp.fmt(band["full_width"], band["unit"], digits)
    return ("≥ " + text) if band.get("lower_bound") else text


def _tol_text(tol: dict) -> str:
    if tol.get("worst_ratio") is None:
        return "—"
    change = (tol["worst_ratio"] - 1.0) * 100.0
    return f"{change:+.1f} % ({tol['worst_parameter'].split('.', 1)[1]} " \
           f"{tol['worst_change_nm']:+g} nm)"


def _rules_cell(entry: dict) -> str:
    """The candidate's design-rule verdict (the check export applies)."""
    rules = entry.get("design_rules")
    if rules is None:
        return "n/a"
    return "clean" if rules["clean"] else f"{len(rules['violations'])} violation(s)"


def ranking_table(data: dict) -> rp.Table:
    rows, ids = [], []
    for e in data["candidates"]:
        c = e["coupling"]
        rows.append((str(e["rank"]), e["name"], e["family"], headline(e),
                     rp.fmt(e["bandwidth_average"]["beta_c"]),
                     rp.fmt(c.get("beta_c_per_field_m_per_V")), rp.fmt(c.get("structure_factor")),
                     rp.fmt(c.get("damage_factor")), _tol_text(e["tolerance_10nm"]),
                     _bw_text(e["angular_bandwidth_deg"]), _bw_text(e["spectral_bandwidth_nm"]),
                     _rules_cell(e)))
        ids.append("candidate-" + "".join(ch if ch.isalnum() else "-" for ch in e["name"]))
    return rp.Table(columns=("rank", "candidate", "family", "|β_c|", "averaged |β_c|",
                             "|β_c| per V/m", "κ",
                             "damage factor", "worst ±10 nm", "angular width",
                             "spectral width", "design rules"),
                    rows=tuple(rows), highlight=(0,), row_ids=tuple(ids),
                    caption="Ranked on the averaged |β_c| per unit incident field: the "
                            "nominal coupling times its mean over the pulse's spectrum and "
                            "the beam's angular spread. Widths: full range where |β_c| "
                            "stays above 1/√2 of its nominal value.")


def _figures(data: dict) -> list[rp.Image]:
    from matplotlib.figure import Figure

    cands = data["candidates"]
    names = [e["name"] for e in cands]
    out = []
    fig = Figure(figsize=(max(4.0, 1.2 * len(cands) + 2), 3.2), layout="constrained")
    ax = fig.subplots()
    values = [abs(e["coupling"].get("beta_c") or 0.0) for e in cands]
    averaged = [abs(e["bandwidth_average"]["beta_c"] or 0.0) for e in cands]
    x = np.arange(len(cands))
    ax.bar(x - 0.2, values, 0.4, color="#9bb7cc", label="nominal angle and wavelength")
    ax.bar(x + 0.2, averaged, 0.4, color=["#0d5c3f"] + ["#1f5f8b"] * (len(cands) - 1),
           label="averaged over pulse spectrum and beam divergence (ranked)")
    ax.set_xticks(x, names)
    ax.set_ylabel("|β_c| at the common peak field")
    ax.tick_params(axis="x", rotation=20)
    ax.legend(fontsize=7)
    out.append(rp.image(fig, "PINEM coupling of each candidate (same beam, laser, grid)",
                        "bar chart of the nominal and averaged coupling of each candidate"))
    for key, xlabel, what in (("angular_bandwidth_deg", "angle of incidence − nominal (deg)",
                               "angular"),
                              ("spectral_bandwidth_nm", "wavelength − nominal (nm)", "spectral")):
        fig = Figure(figsize=(6.0, 3.4), layout="constrained")
        ax = fig.subplots()
        for e in cands:
            band = e[key]
            curve = np.asarray(band["curve"], dtype=float)
            if curve.size:
                ax.plot(curve[:, 0] - band["nominal"], curve[:, 1], "o-", ms=2.5, lw=1.1,
                        label=e["name"])
        ax.axhline(LEVEL, color="#888", ls=":", lw=0.9, label="1/√2")
        ax.set_xlabel(xlabel)
        ax.set_ylabel("|β_c| / nominal")
        ax.legend(fontsize=7)
        out.append(rp.image(fig, f"{what.capitalize()} response of the coupling",
                            f"{what} response curves"))
    return out


def compare_report(data: dict) -> rp.Report:
    """The HTML report of a comparison (see :mod:`designer.report`)."""
    f = data["footing"]
    best = data["candidates"][0]
    laser = ", ".join(f"{k} = {v}" for k, v in f["laser"].items())
    beam = ", ".join(f"{k} = {v}" for k, v in f["beam"].items())
    footing_text = (f"All candidates are evaluated with the beam ({beam}) and laser ({laser}) "
                    f"of {f['from']}; grid step: "
                    + (f"{f['grid_step_nm']:g} nm ({f['grid_step_from']})"
                       if f["grid_step_nm"] is not None else f["grid_step_from"])
                    + ". The angle, side, azimuth and polarization of incidence and the "
                    "electron path stay each candidate's own.")
    summary = rp.Section("Summary", (
        rp.Facts(((f"best: {best['name']}", f"|β_c| = {headline(best)}"),), headline=True),
        rp.Paragraph(footing_text),
        rp.Paragraph("Changed to the common footing: " + (", ".join(f["changed"]) or "none"),
                     "note")))
    per = []
    for e in data["candidates"]:
        c = e["coupling"]
        tol = e["tolerance_10nm"]
        items = [("|β_c| (headline)", headline(e)),
                 ("source", e["source"]), ("family", e["family"]),
                 ("angle of incidence", rp.fmt(e["angle_deg"], "deg")),
                 ("averaged |β_c| (ranked)", rp.fmt(e["bandwidth_average"]["beta_c"])),
                 ("|β_c| per V/m", rp.fmt(c.get("beta_c_per_field_m_per_V"), "m/V")),
                 ("structure factor κ", rp.fmt(c.get("structure_factor"))),
                 ("damage factor", rp.fmt(c.get("damage_factor"))),
                 ("worst ±10 nm change", _tol_text(tol)),
                 ("angular width", _bw_text(e["angular_bandwidth_deg"])),
                 ("spectral width", _bw_text(e["spectral_bandwidth_nm"]))]
        per.append(rp.Paragraph(f"{e['rank']}. {e['name']}", "subhead"))
        per.append(rp.Facts(tuple(items)))
    return rp.Report(
        title="Candidate comparison",
        subtitle=f"{len(data['candidates'])} candidates — best: {best['name']}",
        sections=(summary,
                  rp.Section("Ranking", (ranking_table(data),)),
                  rp.Section("Plots", tuple(_figures(data))),
                  rp.Section("Candidates", tuple(per)),
                  rp.Section("Definitions", tuple(rp.Paragraph(f"{k}: {v}", "note")
                                                  for k, v in data["definitions"].items()))),
        provenance=data["provenance"])


# -- command -----------------------------------------------------------------------

def compare_command(args, *, evaluator: Callable = _default_evaluator,
                    workers: int | None = None) -> int:
    """``velomatch compare``: evaluate, rank, write compare.json and report.html."""
    from designer.spec import input_files, load_spec

    vio.check_output(args.out, folder=True)
    specs = [load_spec(p) for p in args.specs]
    out_dir = vio.prepare_output_dir(args.out, overwrite=getattr(args, "overwrite", False),
                                     inputs=[f for s in specs for f in input_files(s)],
                                     names=("compare.json", "report.html"))
    candidates, footing = make_candidates(specs)
    data = compare_candidates(candidates, footing, evaluator=evaluator,
                              workers=getattr(args, "workers", workers),
                              scheduler=getattr(args, "scheduler", None), progress=True)
    vio.write_json(out_dir / "compare.json", data)
    html_path = rp.write_report(out_dir / "report.html", compare_report(data))
    print(f"compared {len(candidates)} candidate(s) on the footing of {footing['from']}")
    for e in data["candidates"]:
        print(f"  {e['rank']:>2}. {e['name']:<24} |beta_c| = {headline(e):<10} "
              f"averaged = {rp.fmt(e['bandwidth_average']['beta_c']):<10} "
              f"kappa = {rp.fmt(e['coupling'].get('structure_factor')):<10} "
              f"damage = {rp.fmt(e['coupling'].get('damage_factor'))}")
    print(f"  json: {out_dir / 'compare.json'}\n  report: {html_path}")
    for line in data["cautions"]:
        print(line)
    return 0

