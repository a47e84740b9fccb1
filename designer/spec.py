"""Spec files (TOML) parsed once into typed, validated dataclasses in SI units.

A spec has the tables ``[beam]``, ``[laser]``, ``[sample]``, ``[path]``,
``[solver]``, ``[fabrication]``, ``[spectrum]``, ``[optimize]`` and ``[layout]``.
Unit-suffixed keys are converted to SI here and nowhere else.  Every bad value
raises :class:`~designer.errors.SpecError` naming the file, the dotted key and the
value.  The raw table tree is kept (``Spec.raw``) so that sweeps and the optimizer
can change one key and parse again, and so that a design can be written back as a
complete spec that reproduces itself.
"""

from __future__ import annotations

import copy
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from designer import beam as beam_physics
from designer import laser as laser_physics
from designer.errors import SpecError
from designer.io import MAX_SPEC_BYTES, canonical_sha256, decode_text, read_input
from designer.tables import TableReader

TABLES = ("beam", "laser", "sample", "path", "solver", "fabrication", "spectrum",
          "optimize", "layout")
MAX_VOLTAGE_KV = 10_000.0  # 10 MV: beyond this the electron-microscope scenarios end
MIN_VOLTAGE_KV = 1e-3      # 1 V: below, beta underflows the phase factors (|I| ~ e^{-iws/v})
# extreme ultraviolet to far infrared: outside this no material model applies and the
# grid either vanishes (cells of atomic size) or spans metres
MIN_WAVELENGTH_NM = 10.0
MAX_WAVELENGTH_NM = 1e7


@dataclass(frozen=True)
class BeamSpec:
    """Electron beam: accelerating voltage and the derived kinematics."""

    voltage_V: float
    beta: float
    gamma: float
    velocity_m_per_s: float


@dataclass(frozen=True)
class LaserSpec:
    """Laser at the sample.

    ``angle_rad`` is None when the spec asks for the phase-matched angle (the family
    resolves it).  The amplitude is given in exactly one of four forms; the peak
    field in a medium of index ``n`` follows from :meth:`peak_field_in`.
    ``duration_s`` is the intensity FWHM, ``spot_radius_m`` the 1/e² intensity radius.
    """

    wavelength_m: float
    angle_rad: float | None
    from_side: str
    amplitude_form: str          # "peak_field" | "peak_intensity" | "fluence" | "pulse_energy"
    amplitude_value: float       # V/m, W/m², J/m² or J
    duration_s: float | None
    spot_radius_m: float | None
    azimuth_rad: float = 0.0         # plane of incidence from x, toward y
    polarization_rad: float = 0.0    # 0: p (E in the plane of incidence), pi/2: s

    def peak_field_in(self, n: float = 1.0) -> float:
        """Peak field (V/m) of the incident wave in the incidence medium of index ``n``."""
        if self.amplitude_form == "peak_field":
            return self.amplitude_value
        if self.amplitude_form == "peak_intensity":
            return laser_physics.peak_field_from_intensity(self.amplitude_value, n)
        if self.amplitude_form == "fluence":
            return laser_physics.peak_field_from_fluence(self.amplitude_value,
                                                         self.duration_s, n)
        return laser_physics.peak_field_from_pulse_energy(
            self.amplitude_value, self.duration_s, self.spot_radius_m, n)


@dataclass(frozen=True)
class PathSpec:
    """Electron path: lateral position (membranes) or height and length (gratings, prisms)."""

    x_m: float | None
    offset_m: float | None
    length_m: float | None
    electron_spot_m: float | None   # FWHM of the electron spot across the path
    y_m: float | None = None        # hole membranes: lateral y from a hole centre
    tilt_rad: float = 0.0           # sample tilt: path direction from the film normal
    tilt_azimuth_rad: float = 0.0   # azimuth of that tilt, from x toward y


@dataclass(frozen=True)
class SolverSpec:
    grid_step_m: float | None      # None: chosen from wavelength and index
    method: str                     # "auto" | "fdfd" | "layers" | "fmm"
    refine: bool                    # Richardson error estimate from a second resolution
    force: bool                     # accept coarse grids (below 8 cells per wavelength)
    fourier_orders: int | None = None   # fmm: harmonics |m|, |n| <= N; None = automatic


@dataclass(frozen=True)
class SpectrumSpec:
    zlp_fwhm_eV: float
    electron_pulse_s: float | None
    delay_s: float


@dataclass(frozen=True)
class Spec:
    source: str
    base_dir: Path | None
    raw: dict
    beam: BeamSpec
    laser: LaserSpec
    family: str
    sample: Any                     # the family's frozen parameter dataclass
    path: PathSpec
    solver: SolverSpec
    fabrication: Any                # designer.fabrication.FabricationRules
    spectrum: SpectrumSpec
    optimize: dict = field(default_factory=dict)
    layout: dict = field(default_factory=dict)
    context: Any = None             # designer.families.SampleContext
    sha256: str = ""


def load_spec(path: str | Path) -> Spec:
    """Read and validate a spec file."""
    path = Path(path)
    source = str(path)
    try:
        text = decode_text(read_input(path, limit=MAX_SPEC_BYTES))
    except ValueError as exc:
        raise SpecError(source, None, str(exc)) from None
    return parse_spec(parse_toml(text, source), source=source, base_dir=path.resolve().parent)


MAX_NESTING = 20   # tables and arrays; a spec needs 4


def parse_toml(text: str, source: str) -> dict:
    """TOML text -> table tree, every failure one SpecError (nesting bounded first, so
    a deeply nested document cannot exhaust the parser's recursion)."""
    _check_nesting(text, source)
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(source, None, f"malformed TOML: {exc}") from None
    except (RecursionError, MemoryError):
        raise SpecError(source, None, "malformed TOML: nested too deeply") from None


def _check_nesting(text: str, source: str) -> None:
    if text.count("[") + text.count("{") <= MAX_NESTING:
        return
    depth = deepest = 0
    quote = None
    comment = escaped = False
    for ch in text:
        if comment:
            comment = ch != "\n"
        elif quote:
            if escaped:
                escaped = False
            elif ch == "\\" and quote == '"':
                escaped = True
            elif ch == quote:
                quote = None
        elif ch in "\"'":
            quote = ch
        elif ch == "#":
            comment = True
        elif ch in "[{":
            depth += 1
            deepest = max(deepest, depth)
        elif ch in "]}":
            depth = max(0, depth - 1)
    if deepest > MAX_NESTING:
        raise SpecError(source, None, f"malformed TOML: brackets nested {deepest} deep "
                        f"(at most {MAX_NESTING})")


def parse_spec(raw: dict, *, source: str = "<spec>", base_dir: Path | None = None) -> Spec:
    """Validate a table tree (as from TOML) and convert it to SI dataclasses."""
    from designer.fabrication import parse_fabrication
    from designer.families import FAMILY_NAMES, SampleContext, get_family

    raw = copy.deepcopy(raw)
    top = TableReader(raw, "", source)
    for name in raw:
        if name not in TABLES:
            raise SpecError(source, name, "unknown table (known tables: "
                            + ", ".join(TABLES) + ")", raw[name])

    beam = _parse_beam(top.subtable("beam", required=True))
    sample_reader = top.subtable("sample", required=True)
    family_name = sample_reader.string("family", choices=FAMILY_NAMES)
    laser = _parse_laser(top.subtable("laser", required=True), family_name)
    path = _parse_path(top.subtable("path"))
    solver = _parse_solver(top.subtable("solver"))
    fabrication = parse_fabrication(top.subtable("fabrication"))
    spectrum = _parse_spectrum(top.subtable("spectrum"))
    optimize = _table(top, "optimize")
    layout = _table(top, "layout")

    context = SampleContext(
        wavelength_m=laser.wavelength_m, beta=beam.beta, gamma=beam.gamma,
        angle_rad=laser.angle_rad, from_side=laser.from_side, source=source,
        base_dir=base_dir, path=dict(raw.get("path", {})))
    family = get_family(family_name)
    sample = family.parse(sample_reader, context)
    family.check_path(sample, context)
    _check_out_of_plane(raw, source, family_name, sample)
    return Spec(source=source, base_dir=base_dir, raw=raw, beam=beam, laser=laser,
                family=family_name, sample=sample, path=path, solver=solver,
                fabrication=fabrication, spectrum=spectrum, optimize=optimize,
                layout=layout, context=context, sha256=canonical_sha256(raw))


# keys that describe a problem out of the x-z plane: only the Fourier modal method
# (membranes) solves those; their defaults mean "in plane"
_OUT_OF_PLANE = (("laser", "azimuth_deg", 0.0), ("laser", "polarization", "p"),
                 ("path", "y_nm", None), ("path", "tilt_deg", 0.0),
                 ("path", "tilt_azimuth_deg", None), ("solver", "fourier_orders", None))


def _check_out_of_plane(raw: dict, source: str, family: str, sample) -> None:
    """Out-of-plane keys need a membrane; hole membranes need the Fourier modal method."""
    holes = getattr(sample, "holes", None) is not None
    method = get_value(raw, "solver.method", "auto")
    if holes and method in ("fdfd", "layers"):
        raise SpecError(source, "solver.method", 'a hole lattice is periodic in x and y: '
                        'use "fmm" or "auto"', method)
    for table, key, default in _OUT_OF_PLANE:
        value = get_value(raw, f"{table}.{key}", default)
        if value == default or (key == "polarization" and value == 0):
            continue
        if family != "membrane":
            raise SpecError(source, f"{table}.{key}", "only membranes are solved out of "
                            "the x-z plane (Fourier modal method)", value)
        if method in ("fdfd", "layers"):
            raise SpecError(source, f"{table}.{key}", 'needs solver.method = "fmm" or '
                            f'"auto" (the {method} solver works in the x-z plane)', value)
        if getattr(sample, "pattern", None) == "slits" and method != "fmm":
            raise SpecError(source, f"{table}.{key}", 'for a slit membrane this needs '
                            'solver.method = "fmm"', value)


def _table(top: TableReader, name: str) -> dict:
    value = top.raw(name, {})
    if not isinstance(value, dict):
        raise SpecError(top.source, name, "must be a table", value)
    return copy.deepcopy(value)


def _parse_beam(r: TableReader) -> BeamSpec:
    kv = r.number("voltage_kV", minimum=MIN_VOLTAGE_KV, maximum=MAX_VOLTAGE_KV)
    r.finish()
    e = beam_physics.electron(kv * 1e3)
    return BeamSpec(voltage_V=kv * 1e3, beta=e.beta, gamma=e.gamma,
                    velocity_m_per_s=e.velocity_m_per_s)


AMPLITUDE_KEYS = {
    "peak_field_V_per_m": ("peak_field", 1.0),
    "peak_intensity_W_per_cm2": ("peak_intensity", 1e4),   # W/cm² -> W/m²
    "fluence_mJ_per_cm2": ("fluence", 10.0),               # mJ/cm² -> J/m²
    "pulse_energy_uJ": ("pulse_energy", 1e-6),             # µJ -> J
}


def _parse_laser(r: TableReader, family: str) -> LaserSpec:
    wavelength = r.length("wavelength_nm", minimum=MIN_WAVELENGTH_NM,
                          maximum=MAX_WAVELENGTH_NM)
    default_angle = "phase-matched" if family == "prism" else 0.0
    angle = r.number_or_word("angle_deg", ["phase-matched"], default_angle,
                             minimum=-90.0, maximum=90.0, exclusive_minimum=True,
                             exclusive_maximum=True)
    angle_rad = None if angle == "phase-matched" else math.radians(angle)
    from_side = r.string("from", "below", choices=("below", "above"))
    duration = r.number("duration_fs", None, minimum=0.0, exclusive_minimum=True)
    duration_s = None if duration is None else duration * 1e-15
    spot = r.number("spot_radius_um", None, minimum=0.0, exclusive_minimum=True)
    spot_m = None if spot is None else spot * 1e-6
    given = [k for k in AMPLITUDE_KEYS if r.has(k)]
    if len(given) > 1:
        raise r.error(given[1], "give the laser amplitude in one form only (also given: "
                      + given[0] + ")", r.table[given[1]])
    key = given[0] if given else "peak_field_V_per_m"
    form, scale = AMPLITUDE_KEYS[key]
    value = r.number(key, 1.0, minimum=0.0, exclusive_minimum=True) * scale
    if form in ("fluence", "pulse_energy") and duration_s is None:
        raise r.error("duration_fs", f"needed with {key} (intensity FWHM of the pulse)",
                      with_value=False)
    if form == "pulse_energy" and spot_m is None:
        raise r.error("spot_radius_um", f"needed with {key} (1/e² intensity radius)",
                      with_value=False)
    azimuth = r.number("azimuth_deg", 0.0, minimum=-360.0, maximum=360.0)
    pol = r.number_or_word("polarization", ["p", "s"], "p", minimum=-180.0, maximum=180.0)
    pol_rad = {"p": 0.0, "s": math.pi / 2}.get(pol) if isinstance(pol, str) else math.radians(pol)
    r.finish()
    return LaserSpec(wavelength_m=wavelength, angle_rad=angle_rad, from_side=from_side,
                     amplitude_form=form, amplitude_value=value, duration_s=duration_s,
                     spot_radius_m=spot_m, azimuth_rad=math.radians(azimuth),
                     polarization_rad=pol_rad)


def _parse_path(r: TableReader) -> PathSpec:
    x = r.length("x_nm", None)
    offset = r.length("offset_nm", None)
    length = r.length("length_um", None, minimum=0.0, exclusive_minimum=True)
    spot = r.length("electron_spot_nm", None, minimum=0.0)
    y = r.length("y_nm", None)
    tilt = r.number("tilt_deg", 0.0, minimum=-80.0, maximum=80.0)
    tilt_az = r.number("tilt_azimuth_deg", 0.0, minimum=-360.0, maximum=360.0)
    r.finish()
    return PathSpec(x_m=x, offset_m=offset, length_m=length, electron_spot_m=spot, y_m=y,
                    tilt_rad=math.radians(tilt), tilt_azimuth_rad=math.radians(tilt_az))


def _parse_solver(r: TableReader) -> SolverSpec:
    resolution = r.length("grid_step_nm", None, minimum=0.0, exclusive_minimum=True)
    method = r.string("method", "auto", choices=("auto", "fdfd", "layers", "fmm"))
    refine = r.boolean("refine", True)
    force = r.boolean("force", False)
    orders = r.number_or_word("fourier_orders", ["auto"], "auto", minimum=0, maximum=40,
                              integer=True)
    r.finish()
    return SolverSpec(grid_step_m=resolution, method=method, refine=refine, force=force,
                      fourier_orders=None if orders == "auto" else int(orders))


def _parse_spectrum(r: TableReader) -> SpectrumSpec:
    zlp = r.number("zlp_fwhm_eV", 0.6, minimum=1e-4, maximum=100.0)
    pulse = r.number("electron_pulse_fs", None, minimum=0.0, exclusive_minimum=True)
    delay = r.number("delay_fs", 0.0)
    r.finish()
    return SpectrumSpec(zlp_fwhm_eV=zlp, electron_pulse_s=None if pulse is None else pulse * 1e-15,
                        delay_s=delay * 1e-15)


# -- editing the raw tree (sweeps, optimizer) ----------------------------------------

def resolve_key(raw: dict, key: str, *, source: str = "<spec>") -> str:
    """Turn a dotted key (``laser.angle_deg``) or a unique bare name into a dotted key."""
    if "." in key:
        table = key.split(".", 1)[0]
        if table not in TABLES:
            raise SpecError(source, key, "unknown table in key (known: " + ", ".join(TABLES) + ")")
        return key
    hits = [f"{t}.{key}" for t in TABLES if isinstance(raw.get(t), dict) and key in raw[t]]
    if len(hits) == 1:
        return hits[0]
    if not hits:
        raise SpecError(source, key, "no table of the spec has this key; write it as "
                        "table.key (e.g. laser.angle_deg)")
    raise SpecError(source, key, "ambiguous: found in " + ", ".join(hits))


def with_value(raw: dict, dotted_key: str, value: Any) -> dict:
    """A deep copy of the raw tree with ``dotted_key`` set to ``value``."""
    out = copy.deepcopy(raw)
    node = out
    parts = dotted_key.split(".")
    for part in parts[:-1]:
        node = node.setdefault(part, {})
    node[parts[-1]] = value
    return out


def get_value(raw: dict, dotted_key: str, default: Any = None) -> Any:
    node: Any = raw
    for part in dotted_key.split("."):
        if not isinstance(node, dict) or part not in node:
            return default
        node = node[part]
    return node


def dump_spec(raw: dict) -> str:
    """TOML text of a raw spec tree, tables in the canonical order."""
    import tomli_w

    ordered = {t: raw[t] for t in TABLES if t in raw}
    return tomli_w.dumps(ordered)


# -- files named by a spec -----------------------------------------------------------

FILE_KEYS = ("file", "density_file")   # material tables ({file = ...}), stored densities


def file_refs(raw: Any, prefix: str = "") -> list[tuple[str, str]]:
    """``(dotted key, path as written)`` of every file a raw spec tree names."""
    out = []
    if isinstance(raw, dict):
        for key, value in raw.items():
            dotted = f"{prefix}.{key}" if prefix else str(key)
            if key in FILE_KEYS and isinstance(value, str):
                out.append((dotted, value))
            else:
                out.extend(file_refs(value, dotted))
    elif isinstance(raw, list):
        for i, value in enumerate(raw):
            out.extend(file_refs(value, f"{prefix}.{i}"))
    return out


def resolve_file(name: str, base_dir: Path | None) -> Path:
    """A file named in a spec: relative names are taken from the spec's own folder."""
    path = Path(name).expanduser()
    if not path.is_absolute() and base_dir is not None:
        path = Path(base_dir) / path
    return path


def input_files(spec: Spec) -> list[Path]:
    """The spec file and every file it names (outputs must never replace one of them)."""
    files = [Path(spec.source)] if spec.base_dir is not None else []
    files += [resolve_file(v, spec.base_dir) for _, v in file_refs(spec.raw)]
    return files


def with_absolute_files(raw: dict, base_dir: Path | None, *, keep_in: Path | None = None) -> dict:
    """A copy of ``raw`` whose file names are absolute (resolved against ``base_dir``),
    so the tree can be written as a spec anywhere and still find its files.  Files
    inside ``keep_in`` (the folder the spec is written to) are named relative to it."""
    out = copy.deepcopy(raw)

    def fix(node):
        if isinstance(node, dict):
            for key, value in node.items():
                if key in FILE_KEYS and isinstance(value, str):
                    path = resolve_file(value, base_dir).resolve()
                    if keep_in is not None and path.parent == Path(keep_in).resolve():
                        node[key] = path.name
                    else:
                        node[key] = str(path)
                else:
                    fix(value)
        elif isinstance(node, list):
            for value in node:
                fix(value)

    fix(out)
    return out
