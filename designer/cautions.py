"""Safety cautions that outputs carry when they describe a real laser.

One place for the wording, so the command line, JSON results, HTML reports and the
studies say the same thing.  A field of 1 V/m (the default) is a normalization, not
a laser; at peak fields of 1 MV/m and more the numbers describe an intense,
typically class-4, laser and the cautions apply.
"""

from __future__ import annotations

SAFETY_NOTE = ("Safety: the laser powers, beam voltages and fields these designs imply can "
               "injure. Class-4 lasers, high voltage and X-rays in an electron column are "
               "governed by your local laser-safety officer, local codes and licensed practice.")

SAMPLE_DAMAGE_NOTE = ("Caution: these fields come from an intense (typically class-4) laser "
                      "and can damage the sample; check the damage factor against your "
                      "material's threshold and raise the fluence gradually on a spare sample.")

# peak fields from this value up describe a real laser rather than a normalization
REAL_LASER_FIELD_V_PER_M = 1e6


def is_real_laser(peak_field_V_per_m: float | None) -> bool:
    """True when ``peak_field_V_per_m`` is a field only an intense laser gives."""
    return peak_field_V_per_m is not None and peak_field_V_per_m >= REAL_LASER_FIELD_V_PER_M


def cautions(peak_field_V_per_m: float | None) -> list[str]:
    """The cautions for an output at this peak field (empty below a real-laser field)."""
    if not is_real_laser(peak_field_V_per_m):
        return []
    return [SAMPLE_DAMAGE_NOTE, SAFETY_NOTE]


def caution_lines(peak_field_V_per_m: float | None) -> list[str]:
    """Terminal lines (a blank line, then the cautions) or nothing."""
    notes = cautions(peak_field_V_per_m)
    return ["", *notes] if notes else []
