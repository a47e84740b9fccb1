"""The sample as it was evaluated: every parameter resolved, defaults made explicit.

A spec may leave things to defaults (a phase-matched period, a tooth height of half a
period, an electron half a decay length above the teeth, a catalogue material's
index at the laser wavelength).  :func:`resolved_sample` restates what was actually
used, in SI, for the ``sample`` block of the JSON results; :func:`sample_lines`
prints the same for people (nm, µm, degrees, per cent).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from designer import units
from designer.families.base import MaterialRef, decay_length

_SKIP = {"wavelength_m", "freeform", "plane"}


def _material(ref: MaterialRef) -> dict:
    n = ref.index
    return {"name": ref.name, "n": n.real, "k": n.imag}


def _value(name: str, value):
    if isinstance(value, MaterialRef):
        return name, _material(value)
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return name, dict(_value(f.name, getattr(value, f.name))
                          for f in dataclasses.fields(value) if f.name not in _SKIP)
    if isinstance(value, np.ndarray):
        return name, f"array of shape {value.shape}"
    if name.endswith("_rad") and isinstance(value, (int, float)):
        return name[:-4] + "_deg", math.degrees(value)
    if isinstance(value, tuple):
        items = []
        for item in value:
            if isinstance(item, tuple) and len(item) == 2 and isinstance(item[0], MaterialRef):
                items.append({"material": _material(item[0]), "thickness_m": item[1]})
            else:
                items.append(item)
        return name, items
    if value is None or isinstance(value, (bool, int, float, str)):
        return name, value
    if isinstance(value, (list, dict)):
        return name, value
    return name, str(value)


def _given(ctx, key: str) -> bool:
    return key in (ctx.path or {})


def resolved_sample(ev) -> dict:
    """The ``sample`` block of an evaluation: family, material(s) with the index at the
    laser wavelength, every geometric parameter (SI), and the electron path used.

    ``electron`` holds the path: direction, height above z = 0 (paths along +x) or
    lateral position (paths along +z), its distance to the structure's top surface,
    the interaction length, and where each came from (``*_from``: "spec" or the
    default rule).  ``decay_length_m`` is the 1/e length βγλ/(2π) of the synchronous
    evanescent field (R. J. England et al., Rev. Mod. Phys. 86, 1337, 2014).
    """
    spec = ev.spec
    params = spec.sample
    ctx = spec.context
    out: dict = {"family": spec.family}
    for f in dataclasses.fields(params):
        if f.name in _SKIP:
            continue
        key, value = _value(f.name, getattr(params, f.name))
        out[key] = value
    if getattr(params, "freeform", None) is not None:
        out["freeform_region"] = True
    plane = getattr(params, "plane", None)
    if plane is not None:          # designer.families.region.PlaneInfo
        out["plane"] = plane.plane
        if plane.device_layer_m is not None:
            out["device_layer_m"] = plane.device_layer_m
    out["laser_wavelength_m"] = spec.laser.wavelength_m
    layout = ev.run.layout
    path = layout.path
    bottom, top = layout.structure_z_m
    electron: dict = {"direction": "+" + path.direction}
    if path.direction == "x":
        electron["height_m"] = path.z_m
        sides = getattr(params, "sides", 1)
        if sides == 2:
            electron["height_from"] = ("spec ([path] offset_nm from the middle of the gap)"
                                       if _given(ctx, "offset_nm") else
                                       "default: the middle of the gap")
        else:
            electron["height_above_surface_m"] = path.z_m - top
            electron["height_from"] = ("spec ([path] offset_nm)" if _given(ctx, "offset_nm")
                                       else "default: half the decay length above the "
                                            "top surface")
        electron["length_m"] = ev.interaction_length_m
        if path.length_m is None:
            electron["length_from"] = "not given ([path] length_um): one period"
        elif ev.interaction_length_m is not None and \
                abs(ev.interaction_length_m - path.length_m) > 1e-12:
            electron["length_from"] = ("spec ([path] length_um), rounded to whole periods")
        else:
            electron["length_from"] = "spec ([path] length_um)"
    else:
        electron["x_m"] = path.x_m
        electron["x_from"] = "spec ([path] x_nm)" if _given(ctx, "x_nm") else "default: 0"
        electron["crosses_m"] = [bottom, top]
        if getattr(params, "holes", None) is not None or spec.path.tilt_rad:
            electron["y_m"] = spec.path.y_m or 0.0
            electron["tilt_deg"] = math.degrees(spec.path.tilt_rad)
            electron["tilt_azimuth_deg"] = math.degrees(spec.path.tilt_azimuth_rad)
    out["electron"] = electron
    out["decay_length_m"] = decay_length(ctx)
    out["decay_length_rule"] = "1/e length of the synchronous field, beta*gamma*lambda/(2*pi)"
    out["structure_z_m"] = [bottom, top]
    return out


_LABELS = {
    "thickness_m": "thickness", "period_m": "period", "duty_cycle": "duty cycle",
    "tooth_height_m": "tooth height", "sidewall_angle_deg": "sidewall angle",
    "base_thickness_m": "base thickness", "gap_m": "gap", "shift_m": "shift",
    "slit_widths_m": "slit widths", "slit_centers_m": "slit centres", "order": "order m",
    "sides": "sides", "substrate": "substrate", "pattern": "pattern",
    "period_phase_matched": "period phase-matched",
}


def _material_text(m: dict) -> str:
    k = f" + {m['k']:.3g}i" if abs(m["k"]) > 1e-6 else ""
    return f"{m['name']} (n = {m['n']:.4f}{k})"


def _text(key: str, value) -> str:
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if key == "duty_cycle":
        return f"{value:.4f}"
    if key.endswith("_deg"):
        return units.degrees(value)
    if key.endswith("_m"):
        if isinstance(value, (list, tuple)):
            return ", ".join(units.length(v) for v in value) or "—"
        return units.length(value)
    return str(value)


def _sub_label(key: str) -> str:
    """A nested key for people: the unit suffix goes, the value's text carries the unit."""
    for suffix in ("_m", "_deg"):
        if key.endswith(suffix):
            key = key[: -len(suffix)]
    return key.replace("_", " ")


def sample_items(block: dict) -> list[tuple[str, str]]:
    """(label, text) pairs of a resolved ``sample`` block (for text and HTML)."""
    items = []
    for key, value in block.items():
        if key in ("family", "electron", "structure_z_m", "decay_length_rule",
                   "laser_wavelength_m"):
            continue
        if key == "material":
            items.append(("material", _material_text(value)))
        elif key == "layers":
            for j, layer in enumerate(value):
                items.append((f"layer {j + 1}", f"{_material_text(layer['material'])}, "
                              f"{units.length(layer['thickness_m'])}"))
        elif key == "decay_length_m":
            items.append(("field decay length (1/e)", units.length(value)))
        elif value is None or (isinstance(value, list) and not value):
            continue
        elif isinstance(value, dict):
            parts = [_text(k, v) if k == key else f"{_sub_label(k)} {_text(k, v)}"
                     for k, v in value.items() if v is not None]
            items.append((_LABELS.get(key, key.replace("_", " ")), ", ".join(parts)))
        elif key == "freeform_region":
            items.append(("free-form region", "yes"))
        else:
            items.append((_LABELS.get(key, key.replace("_", " ")), _text(key, value)))
    e = block.get("electron", {})
    if "height_m" in e:
        text = units.length(e["height_m"]) + " above z = 0"
        if "height_above_surface_m" in e:
            text = f"{units.length(e['height_above_surface_m'])} above the top surface"
        items.append(("electron height", f"{text} ({e['height_from']})"))
        items.append(("interaction length", f"{units.length(e['length_m'])} "
                                            f"({e['length_from']})"))
    if "x_m" in e:
        items.append(("electron position x", f"{units.length(e['x_m'])} ({e['x_from']})"))
    return items


def sample_lines(block: dict, indent: str = "  ") -> list[str]:
    """Terminal lines for a resolved ``sample`` block, labels aligned."""
    items = sample_items(block)
    width = max((len(k) for k, _ in items), default=0)
    return [f"{indent}{k:<{width}}  {v}" for k, v in items]


# -- results that need an explanation ----------------------------------------------

AMPLITUDE_KEYS = ("[laser] peak_field_V_per_m, peak_intensity_W_per_cm2, "
                  "fluence_mJ_per_cm2 with duration_fs, or pulse_energy_uJ with duration_fs "
                  "and spot_radius_um")


def explanations(ev) -> list[str]:
    """Plain-language notes for results that look wrong but are not (may be empty).

    * An unpatterned film lit at normal incidence couples exactly zero: the incident,
      reflected and transmitted waves have E along x, across the electron's path
      along z, so E·ŝ = 0 everywhere on the path.
    """
    notes = []
    spec = ev.spec
    path = ev.run.layout.path
    flat = spec.family == "membrane" and getattr(spec.sample, "pattern", "") == "none" \
        and getattr(spec.sample, "freeform", None) is None
    if flat and path.direction == "z" and abs(math.sin(ev.angle_rad)) < 1e-9:
        notes.append("The coupling is zero because the laser meets the flat film at normal "
                     "incidence: its field points along x, across the electron's path along "
                     "z, so there is no field along the path. Tilt the laser "
                     "([laser] angle_deg, e.g. 30 to 60 degrees) or pattern the film.")
    return notes


def spectrum_notes(ev) -> list[str]:
    """Notes for a PINEM spectrum: at the default 1 V/m normalization |β_c| is of order
    1e-8 and the spectrum is a bare zero-loss peak; say which laser key to set."""
    notes = explanations(ev)
    if ev.spec.laser.amplitude_form == "peak_field" and ev.peak_field_V_per_m <= 1.0:
        notes.append("The laser field is the default 1 V/m normalization, so the spectrum "
                     "is a bare zero-loss peak (sidebands of order |beta_c|^2 ~ 1e-16). For "
                     f"the spectrum of a real experiment set {AMPLITUDE_KEYS}.")
    return notes
