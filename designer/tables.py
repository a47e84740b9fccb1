"""Strict reading of one TOML table: typed values, ranges, unknown-key detection.

Every spec table is read through a :class:`TableReader`, so each bad value produces
one :class:`~designer.errors.SpecError` naming the file, the dotted key and the
value.  Unit-suffixed keys are converted to SI here, once (``*_nm`` -> m, ``*_um``
-> m, ``*_kV`` -> V, ``*_deg`` -> rad via :func:`math.radians` by the caller).
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Iterable, Mapping
from typing import Any

from designer.errors import SpecError

REQUIRED = object()

UNIT_SCALE = {"nm": 1e-9, "um": 1e-6, "mm": 1e-3, "m": 1.0, "kV": 1e3, "V": 1.0, "MV": 1e6,
              "fs": 1e-15, "ps": 1e-12, "s": 1.0, "deg": math.pi / 180.0}


class TableReader:
    """Read keys of ``table`` (a dict from TOML) found at dotted ``path`` in ``source``.

    Call :meth:`finish` after reading: any key that was never asked for is reported
    as unknown, with the list of known keys.
    """

    def __init__(self, table: Any, path: str, source: str):
        if table is None:
            table = {}
        if not isinstance(table, Mapping):
            raise SpecError(source, path, "must be a table", table)
        self.table = dict(table)
        self.path = path
        self.source = source
        self._seen: set[str] = set()

    # -- helpers -------------------------------------------------------------
    def key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def error(self, name: str, message: str, value: Any = None, *, with_value: bool = True):
        if with_value:
            return SpecError(self.source, self.key(name), message, value)
        return SpecError(self.source, self.key(name), message)

    def has(self, name: str) -> bool:
        return name in self.table

    def raw(self, name: str, default: Any = REQUIRED) -> Any:
        self._seen.add(name)
        if name in self.table:
            return self.table[name]
        if default is REQUIRED:
            near = nearest(name, self.table)
            hint = f" (the table has {near!r}: did you mean {name!r}?)" if near else ""
            raise self.error(name, "missing required key" + hint, with_value=False)
        return default

    def subtable(self, name: str, *, required: bool = False) -> TableReader:
        value = self.raw(name, REQUIRED if required else {})
        return TableReader(value, self.key(name), self.source)

    # -- typed readers --------------------------------------------------------
    def number(self, name: str, default: Any = REQUIRED, *, minimum: float | None = None,
               maximum: float | None = None, exclusive_minimum: bool = False,
               exclusive_maximum: bool = False, integer: bool = False) -> Any:
        """A real number (ints accepted), checked against the given range."""
        value = self.raw(name, default)
        if value is default and default is not REQUIRED and name not in self.table:
            return value
        return self.check_number(name, value, minimum=minimum, maximum=maximum,
                                 exclusive_minimum=exclusive_minimum,
                                 exclusive_maximum=exclusive_maximum, integer=integer)

    def check_number(self, name: str, value: Any, *, minimum=None, maximum=None,
                     exclusive_minimum=False, exclusive_maximum=False, integer=False):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            kind = "an integer" if integer else "a number"
            raise self.error(name, f"must be {kind}", value)
        if integer and not float(value).is_integer():
            raise self.error(name, "must be an integer", value)
        if not math.isfinite(value):
            raise self.error(name, "must be finite", value)
        if minimum is not None:
            if exclusive_minimum and not value > minimum:
                raise self.error(name, f"must be > {minimum:g}", value)
            if not exclusive_minimum and not value >= minimum:
                raise self.error(name, f"must be >= {minimum:g}", value)
        if maximum is not None:
            if exclusive_maximum and not value < maximum:
                raise self.error(name, f"must be < {maximum:g}", value)
            if not exclusive_maximum and not value <= maximum:
                raise self.error(name, f"must be <= {maximum:g}", value)
        return int(value) if integer else float(value)

    def length(self, name: str, default: Any = REQUIRED, **limits) -> Any:
        """A length given in the key's unit suffix (``_nm``, ``_um``), returned in metres.

        Range limits are in the key's own unit (what the user wrote).
        """
        unit = name.rsplit("_", 1)[-1]
        value = self.number(name, default, **limits)
        if value is None or (value is default and name not in self.table):
            return value
        return value * UNIT_SCALE[unit]

    def string(self, name: str, default: Any = REQUIRED, *,
               choices: Iterable[str] | None = None) -> Any:
        value = self.raw(name, default)
        if value is default and name not in self.table:
            return value
        if not isinstance(value, str):
            raise self.error(name, "must be a string", value)
        if choices is not None:
            choices = list(choices)
            if value not in choices:
                raise self.error(name, "must be one of " + ", ".join(repr(c) for c in choices),
                                 value)
        return value

    def boolean(self, name: str, default: Any = REQUIRED) -> Any:
        value = self.raw(name, default)
        if value is default and name not in self.table:
            return value
        if not isinstance(value, bool):
            raise self.error(name, "must be true or false", value)
        return value

    def number_or_word(self, name: str, words: Iterable[str], default: Any = REQUIRED,
                       **limits) -> Any:
        """Either a number (range-checked) or one of the given words (returned as str)."""
        words = list(words)
        value = self.raw(name, default)
        if value is default and name not in self.table:
            return value
        if isinstance(value, str):
            if value in words:
                return value
            raise self.error(name, "must be a number or one of "
                             + ", ".join(repr(w) for w in words), value)
        return self.check_number(name, value, **limits)

    def finish(self) -> None:
        unknown = sorted(set(self.table) - self._seen)
        if unknown:
            known = sorted(self._seen)
            hint = ("known keys here: " + ", ".join(known)) if known else "this table takes no keys"
            name = unknown[0]
            near = nearest(name, known)
            if near:
                hint = f"did you mean {near!r}? " + hint
            raise self.error(name, f"unknown key ({hint})", self.table[name])


def nearest(name: str, candidates: Iterable[str]) -> str | None:
    """The candidate closest to ``name`` (same letters up to case, or a near spelling),
    or None: for "did you mean" hints."""
    candidates = [c for c in candidates if c != name]
    for c in candidates:
        if c.lower() == name.lower():
            return c
    lowered = {c.lower(): c for c in candidates}
    match = difflib.get_close_matches(name.lower(), list(lowered), n=1, cutoff=0.75)
    return lowered[match[0]] if match else None
