"""Numbers for people: SI values printed in the units the trade uses.

Lengths in nm below 1 µm and in µm (with the micro sign) above; voltages in kV;
fields in V/m with an SI prefix (MV/m, GV/m); fractions in per cent; angles in
degrees.  Used by the terminal output, HTML reports and picture labels, so they
agree.  Inside the code everything stays SI.
"""

from __future__ import annotations

import math

MICRO = "µ"


def _num(x: float, digits: int) -> str:
    return f"{x:.{digits}g}"


def _bad(x) -> bool:
    return x is None or not isinstance(x, (int, float)) or not math.isfinite(x)


def length(x_m: float | None, digits: int = 4) -> str:
    """``x_m`` in nm (below 1 µm), µm (below 1 mm) or mm."""
    if _bad(x_m):
        return "—"
    a = abs(x_m)
    if a < 1e-6:
        return f"{_num(x_m * 1e9, digits)} nm"
    if a < 1e-3:
        return f"{_num(x_m * 1e6, digits)} {MICRO}m"
    return f"{_num(x_m * 1e3, digits)} mm"


def voltage(u_V: float | None, digits: int = 4) -> str:
    """A beam voltage in kV (MV from 1 MV up)."""
    if _bad(u_V):
        return "—"
    if abs(u_V) >= 1e6:
        return f"{_num(u_V / 1e6, digits)} MV"
    return f"{_num(u_V / 1e3, digits)} kV"


_PREFIXES = ((1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""))


def prefixed(x: float | None, unit: str, digits: int = 4) -> str:
    """``x`` with the largest SI prefix (k, M, G, T) that keeps it >= 1."""
    if _bad(x):
        return "—"
    for scale, p in _PREFIXES:
        if abs(x) >= scale:
            return f"{_num(x / scale, digits)} {p}{unit}"
    return f"{_num(x, digits)} {unit}"


def field(e_V_per_m: float | None, digits: int = 4) -> str:
    """A field strength in V/m, kV/m, MV/m or GV/m."""
    return prefixed(e_V_per_m, "V/m", digits)


def percent(fraction: float | None, digits: int = 3) -> str:
    """A fraction as a percentage (0.1048 -> '10.5 %')."""
    if _bad(fraction):
        return "—"
    return f"{_num(100.0 * fraction, digits)} %"


def degrees(angle_deg: float | None, digits: int = 4) -> str:
    if _bad(angle_deg):
        return "—"
    return f"{_num(angle_deg, digits)}°"


# -- what a cleanroom can make -------------------------------------------------------

#: rounding steps of design values, by key: lengths to 0.1 nm, angles to 0.01°,
#: duty cycles and other fractions to 1e-4 (common practice, no source: finer steps
#: than lithography and deposition resolve only suggest a precision nobody can make)
STEP_NM = 0.1
STEP_DEG = 0.01
STEP_FRACTION = 1e-4


def cleanroom_step(key: str) -> float | None:
    """The rounding step of a spec-unit design variable ``key`` (None: leave it)."""
    base = key.rsplit(".", 1)[-1]
    if base.endswith("_nm"):
        return STEP_NM
    if base.endswith("_um"):
        return STEP_NM * 1e-3
    if base.endswith("_deg"):
        return STEP_DEG
    if base in ("duty_cycle",):
        return STEP_FRACTION
    return None


def cleanroom_round(values: dict, bounds: dict | None = None) -> dict:
    """Design values (spec units) rounded to :func:`cleanroom_step`, kept inside their
    ``bounds`` ``{key: (lo, hi)}``: a value that would round out of its bounds (the
    fabrication rules' limits among them) is rounded toward the inside instead."""
    out = {}
    for key, v in values.items():
        step = cleanroom_step(key)
        if step is None:
            out[key] = v
            continue
        r = round(round(v / step) * step, 6)
        lo, hi = (bounds or {}).get(key, (-math.inf, math.inf))
        if r < lo:
            r = round(math.ceil(lo / step - 1e-9) * step, 6)
        if r > hi:
            r = round(math.floor(hi / step + 1e-9) * step, 6)
        out[key] = r if lo <= r <= hi else v
    return out


def tidy(value):
    """Floats in a (nested) spec table written with 12 significant digits, so that
    330 nm stored through SI does not come back as 330.00000000000006."""
    if isinstance(value, float):
        return float(f"{value:.12g}")
    if isinstance(value, dict):
        return {k: tidy(v) for k, v in value.items()}
    if isinstance(value, list):
        return [tidy(v) for v in value]
    return value
