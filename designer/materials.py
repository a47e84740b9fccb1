"""Materials catalogue with dispersion models (SI units).

Every model returns the complex relative permittivity ``eps(lambda) = (n + i k)^2`` at a
vacuum wavelength ``lambda`` in metres, with ``k >= 0`` meaning loss — consistent with
the time dependence ``exp(-i omega t)`` used throughout (a lossy medium has
``Im eps > 0``).

Models:

* :class:`Sellmeier`   ``n^2 = A + sum_i B_i L^2/(L^2 - L_i^2) + sum_j c_j L^p_j`` (L = lambda)
* :class:`Cauchy`      ``n = sum_j A_j / lambda^(2 j)`` (plus a constant k)
* :class:`DrudeLorentz` ``eps = eps_inf + sum_j f_j wp^2 / (w_j^2 - w^2 - i w G_j)``
  (a term with ``w_j = 0`` is the free-electron Drude term)
* :class:`ConstantIndex`, :class:`ConstantPermittivity`
* :class:`Tabulated`   (lambda, n, k) with shape-preserving cubic (PCHIP) or linear
  interpolation of n and k in lambda
* :class:`Spliced`     different models on adjacent wavelength intervals

A :class:`Material` couples a model with its name, published source and valid
wavelength range; evaluating it outside that range emits a
:class:`MaterialRangeWarning`.  :func:`resolve_material` turns a catalogue name or a
user description (dict) into a :class:`Material`.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from scipy import constants as const

_DATA_DIR = Path(__file__).resolve().parent / "data"
_UM = 1e-6


class MaterialRangeWarning(UserWarning):
    """A material was evaluated outside the wavelength range of its source."""


class UnknownMaterialError(ValueError):
    """A material name is not in the catalogue."""


def _wavelengths(wavelength_m):
    lam = np.asarray(wavelength_m, dtype=float)
    if not np.all(np.isfinite(lam)) or np.any(lam <= 0):
        raise ValueError(f"wavelength must be positive and finite (m), got {wavelength_m!r}")
    return lam


def _angular_frequency(lam):
    return 2.0 * math.pi * const.c / lam


# ------------------------------------------------------------------------------- models


@dataclass(frozen=True)
class Sellmeier:
    """``n^2 = A + sum_i B_i lambda^2/(lambda^2 - lambda_i^2) + sum_j c_j lambda^p_j`` (lossless).

    ``resonances_m`` are the resonance wavelengths ``lambda_i`` (m); ``power_terms`` are
    pairs ``(c_j, p_j)`` with ``c_j`` in m^(-p_j) (e.g. Li's ``0.939816 um^2 / lambda^2``
    term is ``(0.939816e-12, -2)``).  Use :meth:`from_micrometres` for published
    coefficients, which are nearly always given with lambda in um.
    """

    strengths: tuple[float, ...]
    resonances_m: tuple[float, ...]
    constant: float = 1.0
    power_terms: tuple[tuple[float, float], ...] = ()

    @classmethod
    def from_micrometres(cls, strengths, resonances_um, constant=1.0, power_terms_um=()):
        """Build from coefficients with lambda in um (``power_terms_um``: (c in um^-p, p))."""
        return cls(
            strengths=tuple(float(b) for b in strengths),
            resonances_m=tuple(float(r) * _UM for r in resonances_um),
            constant=float(constant),
            power_terms=tuple((float(c) * _UM ** (-p), float(p)) for c, p in power_terms_um),
        )

    def eps(self, lam):
        lam2 = lam**2
        n2 = np.full_like(lam, self.constant, dtype=float)
        for b, r in zip(self.strengths, self.resonances_m):
            n2 = n2 + b * lam2 / (lam2 - r**2)
        for c, p in self.power_terms:
            n2 = n2 + c * lam**p
        return n2.astype(complex)


@dataclass(frozen=True)
class Cauchy:
    """``n = A_0 + A_1/lambda^2 + A_2/lambda^4 + ...`` (A_j in m^(2j)) with a constant k >= 0."""

    coefficients: tuple[float, ...]
    k: float = 0.0

    @classmethod
    def from_micrometres(cls, coefficients_um, k=0.0):
        """Build from coefficients with lambda in um (A_j in um^(2j))."""
        return cls(tuple(float(a) * _UM ** (2 * j) for j, a in enumerate(coefficients_um)),
                   float(k))

    def eps(self, lam):
        n = sum(a / lam ** (2 * j) for j, a in enumerate(self.coefficients))
        return (np.asarray(n, dtype=float) + 1j * self.k) ** 2


@dataclass(frozen=True)
class DrudeLorentz:
    """``eps(w) = eps_inf + sum_j f_j wp^2 / (w_j^2 - w^2 - i w G_j)`` for ``exp(-i w t)``.

    ``oscillators`` are triples ``(f_j, w_j, G_j)``: dimensionless strength, resonance
    and damping angular frequencies (rad/s).  ``w_j = 0`` gives the Drude (free-electron)
    term ``-f_0 wp^2 / (w^2 + i w G_0)``.  This is the Lorentz–Drude form of A. D. Rakic,
    A. B. Djurisic, J. M. Elazar & M. L. Majewski, Appl. Opt. 37, 5271 (1998), written for
    the ``exp(-i w t)`` convention so that ``Im eps > 0``.
    """

    eps_inf: float
    plasma_frequency_rad_per_s: float
    oscillators: tuple[tuple[float, float, float], ...]

    @classmethod
    def from_eV(cls, plasma_eV, oscillators_eV, eps_inf=1.0):
        """Build from energies in eV: ``oscillators_eV`` = ((f, hbar w_j, hbar G_j), ...)."""
        to_w = const.e / const.hbar
        return cls(float(eps_inf), float(plasma_eV) * to_w,
                   tuple((float(f), float(w) * to_w, float(g) * to_w)
                         for f, w, g in oscillators_eV))

    def eps(self, lam):
        w = _angular_frequency(lam)
        wp2 = self.plasma_frequency_rad_per_s**2
        out = np.full(lam.shape, self.eps_inf, dtype=complex)
        for f, wj, gj in self.oscillators:
            out = out + f * wp2 / (wj**2 - w**2 - 1j * w * gj)
        return out


@dataclass(frozen=True)
class ConstantIndex:
    """Wavelength-independent ``n + i k`` (k >= 0 is loss)."""

    n: float
    k: float = 0.0

    def eps(self, lam):
        return np.full(lam.shape, complex(self.n, self.k) ** 2, dtype=complex)


@dataclass(frozen=True)
class ConstantPermittivity:
    """Wavelength-independent complex relative permittivity (Im >= 0 is loss)."""

    value: complex

    def eps(self, lam):
        return np.full(lam.shape, complex(self.value), dtype=complex)


@dataclass(frozen=True)
class Tabulated:
    """Table of (lambda, n, k), interpolated separately in n and k versus lambda.

    ``interpolation="pchip"`` (default) is the shape-preserving piecewise cubic of
    F. N. Fritsch & R. E. Carlson, SIAM J. Numer. Anal. 17, 238 (1980) via SciPy: it
    never overshoots the data, so k stays >= 0.  ``"linear"`` joins the points with
    straight lines.  Outside the table the end values are held.
    """

    wavelengths_m: tuple[float, ...]
    n: tuple[float, ...]
    k: tuple[float, ...]
    interpolation: str = "pchip"

    def __post_init__(self):
        lam = np.asarray(self.wavelengths_m, dtype=float)
        if lam.ndim != 1 or lam.size < 2:
            raise ValueError("a table needs at least two wavelengths")
        if not (len(self.n) == len(self.k) == lam.size):
            raise ValueError("table columns must have equal length")
        if np.any(np.diff(lam) <= 0) or np.any(lam <= 0):
            raise ValueError("table wavelengths must be positive and strictly increasing")
        if np.any(np.asarray(self.k) < 0):
            raise ValueError("table extinction coefficients k must be >= 0 (k > 0 is loss)")
        if self.interpolation not in ("pchip", "linear"):
            raise ValueError(f"interpolation must be 'pchip' or 'linear', "
                             f"got {self.interpolation!r}")

    def _interp(self, lam, values):
        x = np.asarray(self.wavelengths_m)
        y = np.asarray(values, dtype=float)
        lam_c = np.clip(lam, x[0], x[-1])
        if self.interpolation == "linear" or x.size == 2:
            return np.interp(lam_c, x, y)
        from scipy.interpolate import PchipInterpolator  # only tables need it (start-up)

        return PchipInterpolator(x, y)(lam_c)

    def eps(self, lam):
        n = self._interp(lam, self.n)
        k = np.maximum(self._interp(lam, self.k), 0.0)
        return (n + 1j * k) ** 2


@dataclass(frozen=True)
class Spliced:
    """Model ``models[i]`` on ``[boundaries_m[i-1], boundaries_m[i])`` (first/last unbounded)."""

    boundaries_m: tuple[float, ...]
    models: tuple[Any, ...]

    def __post_init__(self):
        if len(self.models) != len(self.boundaries_m) + 1:
            raise ValueError("need one more model than boundaries")
        if np.any(np.diff(self.boundaries_m) <= 0):
            raise ValueError("boundaries must be strictly increasing")

    def eps(self, lam):
        which = np.searchsorted(np.asarray(self.boundaries_m), lam, side="right")
        out = np.empty(lam.shape, dtype=complex)
        for i, model in enumerate(self.models):
            mask = which == i
            if np.any(mask):
                out[mask] = model.eps(lam[mask])
        return out


# ----------------------------------------------------------------------------- material


@dataclass(frozen=True)
class Material:
    """A named dispersion model with its source and valid wavelength range (m).

    ``kind`` is ``"dielectric"``, ``"metal"`` or ``"vacuum"``.
    """

    name: str
    model: Any
    source: str
    valid_range_m: tuple[float, float] = (0.0, math.inf)
    kind: str = "dielectric"
    note: str = ""

    def in_range(self, wavelength_m):
        lam = _wavelengths(wavelength_m)
        lo, hi = self.valid_range_m
        return (lam >= lo * (1 - 1e-12)) & (lam <= hi * (1 + 1e-12))

    def eps(self, wavelength_m, *, warn: bool = True):
        """Complex relative permittivity ``(n + i k)^2`` at vacuum wavelength(s) (m).

        Returns a Python complex for scalar input, else an array of the input's shape.
        Emits :class:`MaterialRangeWarning` outside ``valid_range_m`` unless ``warn=False``.
        """
        out = self._evaluate(wavelength_m, warn)
        return complex(out) if out.ndim == 0 else out

    def index(self, wavelength_m, *, warn: bool = True):
        """Complex refractive index ``n + i k = sqrt(eps)`` with ``k >= 0`` (principal root)."""
        out = np.sqrt(self._evaluate(wavelength_m, warn))
        return complex(out) if out.ndim == 0 else out

    def _evaluate(self, wavelength_m, warn):
        lam = _wavelengths(wavelength_m)
        if warn:
            outside = ~self.in_range(lam)
            if np.any(outside):
                lo, hi = self.valid_range_m
                bad = lam[outside] if lam.ndim else lam
                warnings.warn(
                    MaterialRangeWarning(
                        f"material '{self.name}' evaluated at {np.round(bad * 1e9, 3)} nm, "
                        f"outside its valid range {lo * 1e9:.6g}-{hi * 1e9:.6g} nm "
                        f"({self.source}); the value is an extrapolation"),
                    stacklevel=3)
        return self.model.eps(np.atleast_1d(lam)).reshape(lam.shape)


# ---------------------------------------------------------------------------- catalogue


def _silicon_table() -> Tabulated:
    return read_nk_table(_DATA_DIR / "silicon_nk_400_1200nm.csv")


def _build_catalogue() -> dict[str, Material]:
    li_silicon = Sellmeier.from_micrometres(
        strengths=(0.00810461,), resonances_um=(1.1071,), constant=11.6858,
        power_terms_um=((0.939816, -2.0),))
    entries = [
        Material(
            "vacuum", ConstantIndex(1.0), "exact", (0.0, math.inf), kind="vacuum"),
        Material(
            "fused_silica",
            Sellmeier.from_micrometres((0.6961663, 0.4079426, 0.8974794),
                                       (0.0684043, 0.1162414, 9.896161)),
            "I. H. Malitson, J. Opt. Soc. Am. 55, 1205 (1965)",
            (0.21 * _UM, 6.7 * _UM)),
        Material(
            "silicon_nitride",
            Sellmeier.from_micrometres((3.0249, 40314.0), (0.1353406, 1239.842)),
            "K. Luke, Y. Okawachi, M. R. E. Lamont, A. L. Gaeta & M. Lipson, "
            "Opt. Lett. 40, 4823 (2015) (stoichiometric LPCVD film)",
            (0.31 * _UM, 5.504 * _UM)),
        Material(
            "silicon",
            Spliced((1.2 * _UM,), (_silicon_table(), li_silicon)),
            "below 1.2 µm: table from memory of M. A. Green, Sol. Energy Mater. Sol. Cells "
            "92, 1305 (2008) (approximate); from 1.2 µm: H. H. Li, J. Phys. Chem. Ref. Data "
            "9, 561 (1980)",
            (0.4 * _UM, 14.0 * _UM),
            note="absorbing below about 1.1 µm (indirect gap); the table values are "
                 "approximate (+-0.02 in n, +-20 % in k)"),
        Material(
            "sapphire",
            Sellmeier.from_micrometres((1.4313493, 0.65054713, 5.3414021),
                                       (0.0726631, 0.1193242, 18.028251)),
            "I. H. Malitson & M. J. Dodge, J. Opt. Soc. Am. 62, 1405 (1972) (citation from "
            "memory), ordinary ray",
            (0.2 * _UM, 5.0 * _UM),
            note="ordinary index n_o; the valid range is from memory"),
        Material(
            "diamond",
            Sellmeier.from_micrometres((4.3356, 0.3306), (0.1060, 0.1750)),
            "F. Peter, Z. Phys. 15, 358 (1923), as given in M. J. Weber, Handbook of "
            "Optical Materials (CRC, 2003)",
            (0.225 * _UM, math.inf)),
        Material(
            "gallium_phosphide",
            Sellmeier.from_micrometres((1.390, 4.131, 2.570, 2.056),
                                       (0.172, 0.234, 0.345, 27.52)),
            "W. L. Bond, J. Appl. Phys. 36, 1674 (1965), as given in Handbook of Optics, "
            "2nd ed., Vol. 2 (McGraw-Hill, 1994)",
            (0.8 * _UM, 10.0 * _UM)),
        Material(
            "gold",
            DrudeLorentz.from_eV(9.03, ((0.760, 0.0, 0.053), (0.024, 0.415, 0.241),
                                        (0.010, 0.830, 0.345), (0.071, 2.969, 0.870),
                                        (0.601, 4.304, 2.494), (4.384, 13.32, 2.214))),
            "A. D. Rakic, A. B. Djurisic, J. M. Elazar & M. L. Majewski, Appl. Opt. 37, "
            "5271 (1998), Lorentz-Drude model",
            (const.h * const.c / (5.0 * const.e), const.h * const.c / (0.2 * const.e)),
            kind="metal", note="fit range 0.2-5 eV (from memory)"),
        Material(
            "silver",
            DrudeLorentz.from_eV(9.01, ((0.845, 0.0, 0.048), (0.065, 0.816, 3.886),
                                        (0.124, 4.481, 0.452), (0.011, 8.185, 0.065),
                                        (0.840, 9.083, 0.916), (5.646, 20.29, 2.419))),
            "A. D. Rakic, A. B. Djurisic, J. M. Elazar & M. L. Majewski, Appl. Opt. 37, "
            "5271 (1998), Lorentz-Drude model",
            (const.h * const.c / (5.0 * const.e), const.h * const.c / (0.2 * const.e)),
            kind="metal", note="fit range 0.2-5 eV (from memory)"),
    ]
    return {m.name: m for m in entries}


_ALIASES = {
    "sio2": "fused_silica", "silica": "fused_silica", "fused_quartz": "fused_silica",
    "si3n4": "silicon_nitride", "sin": "silicon_nitride", "sinx": "silicon_nitride",
    "si": "silicon", "c_si": "silicon",
    "al2o3": "sapphire",
    "c": "diamond",
    "gap": "gallium_phosphide",
    "au": "gold",
    "ag": "silver",
}

_CATALOGUE: dict[str, Material] | None = None


def catalogue() -> dict[str, Material]:
    """The built-in materials, ``{snake_case_name: Material}`` (a fresh dict)."""
    global _CATALOGUE
    if _CATALOGUE is None:
        _CATALOGUE = _build_catalogue()
    return dict(_CATALOGUE)


def aliases() -> dict[str, str]:
    """Accepted alternative spellings (lower case), ``{alias: catalogue name}``."""
    return dict(_ALIASES)


def _normalize(name: str) -> str:
    return name.strip().lower().replace("-", "_").replace(" ", "_")


def get_material(name: str) -> Material:
    """Catalogue entry by name or alias (case-insensitive; '-' and ' ' count as '_')."""
    cat = catalogue()
    key = _normalize(name)
    key = _ALIASES.get(key, key)
    if key not in cat:
        raise UnknownMaterialError(
            f"unknown material {name!r}; the catalogue has: {', '.join(sorted(cat))} "
            f"(aliases: {', '.join(sorted(_ALIASES))}); or give a dict such as "
            f'{{"n": 2.0}}, {{"n": 2.0, "k": 0.01}}, {{"eps": [-20, 1.5]}} or '
            f'{{"file": "table.csv"}}')
    return cat[key]


# ------------------------------------------------------------------------- user tables


def read_nk_table(path, *, interpolation: str = "pchip") -> Tabulated:
    """Read a text table of ``wavelength_nm, n[, k]`` (comma, semicolon, tab or blanks).

    Lines starting with ``#`` and blank lines are ignored; one non-numeric header line
    is allowed.  A missing k column means k = 0.
    """
    from designer.io import MAX_TABLE_BYTES, decode_text, read_input

    path = Path(path)
    rows = []
    try:
        text = decode_text(read_input(path, limit=MAX_TABLE_BYTES))
    except ValueError as exc:
        raise ValueError(f"material table {path}: {exc}") from None
    # messages name the line and what is wrong, never the line's content (the file may
    # be anything the user pointed at)
    for lineno, raw in enumerate(text.splitlines(), start=1):
        line = raw.split("#", 1)[0].strip()
        if not line:
            continue
        fields = line.replace(",", " ").replace(";", " ").replace("\t", " ").split()
        try:
            values = [float(f) for f in fields]
        except ValueError:
            if rows:
                raise ValueError(f"{path}:{lineno}: not a row of numbers (expected "
                                 "'wavelength_nm, n[, k]')") from None
            continue  # header line
        if len(values) not in (2, 3):
            raise ValueError(f"{path}:{lineno}: expected 'wavelength_nm, n[, k]', got "
                             f"{len(values)} numbers")
        if not all(math.isfinite(v) for v in values) or values[0] <= 0 or values[1] <= 0 \
                or (len(values) == 3 and values[2] < 0):
            raise ValueError(f"{path}:{lineno}: needs a positive wavelength and n, k >= 0, "
                             "all finite")
        rows.append(values + [0.0] * (3 - len(values)))
    if len(rows) < 2:
        raise ValueError(f"{path}: a table needs at least two rows of wavelength_nm, n, k")
    data = np.array(rows)
    order = np.argsort(data[:, 0])
    data = data[order]
    if np.any(np.diff(data[:, 0]) <= 0):
        raise ValueError(f"{path}: repeated wavelength in table")
    return Tabulated(tuple(data[:, 0] * 1e-9), tuple(data[:, 1]), tuple(data[:, 2]),
                     interpolation)


# --------------------------------------------------------------------- user materials


def _parse_complex(value) -> complex:
    if isinstance(value, (list, tuple)):
        if len(value) != 2:
            raise ValueError(f"eps as a list must be [real, imag], got {value!r}")
        return complex(float(value[0]), float(value[1]))
    if isinstance(value, str):
        return complex(value.replace(" ", "").replace("i", "j"))
    return complex(value)


_USER_KEYS = {"n", "k", "eps", "file", "name", "interpolation"}
MAX_INDEX = 1000.0      # |n|, k; far infrared metals reach a few hundred
MIN_ABS_EPS = 1e-6      # eps = 0 (or nearly) makes the FDFD operator singular


def _real(value, name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError(f"{name} must be a number, got {type(value).__name__}")
    return float(value)


def resolve_material(value, *, base_dir=None) -> Material:
    """Turn a material description into a :class:`Material`.

    Accepts a :class:`Material` (returned as is), a catalogue name or alias (str), or a
    dict: ``{"n": 2.0}``, ``{"n": 2.0, "k": 0.01}``, ``{"eps": 2.25}`` /
    ``{"eps": [-20, 1.5]}`` / ``{"eps": "-20+1.5j"}``, or ``{"file": "path.csv"}`` (a table
    of wavelength_nm, n, k; relative paths are taken from ``base_dir``, default the
    current directory; optional ``"interpolation": "linear"``).  Any dict may carry
    ``"name"``.  Negative k or Im eps (gain) is refused.
    """
    if isinstance(value, Material):
        return value
    if isinstance(value, str):
        return get_material(value)
    if not isinstance(value, dict):
        raise TypeError(f"a material is a name (str) or a dict, got {type(value).__name__}")
    unknown = set(value) - _USER_KEYS
    if unknown:
        raise ValueError(f"unknown material keys {sorted(unknown)}; allowed: {sorted(_USER_KEYS)}")
    given = [key for key in ("n", "eps", "file") if key in value]
    if len(given) != 1:
        raise ValueError(f"a user material needs exactly one of 'n', 'eps' or 'file', "
                         f"got {value!r}")
    if "k" in value and "n" not in value:
        raise ValueError("'k' is only allowed together with 'n'")
    if "interpolation" in value and "file" not in value:
        raise ValueError("'interpolation' is only allowed together with 'file'")
    name = str(value.get("name", ""))

    if "n" in value:
        n, k = _real(value["n"], "n"), _real(value.get("k", 0.0), "k")
        if not (math.isfinite(n) and 0 < n <= MAX_INDEX):
            raise ValueError(f"refractive index n must be in (0, {MAX_INDEX:g}], got {n}")
        if k > MAX_INDEX:
            raise ValueError(f"extinction coefficient k must be <= {MAX_INDEX:g}, got {k}")
        if not (math.isfinite(k) and k >= 0):
            raise ValueError(f"extinction coefficient k must be >= 0 (k > 0 is loss), got {k}")
        kind = "metal" if k > n else "dielectric"
        return Material(name or f"n={n:g}" + (f",k={k:g}" if k else ""), ConstantIndex(n, k),
                        "user value", kind=kind)
    if "eps" in value:
        eps = _parse_complex(value["eps"])
        if not (math.isfinite(eps.real) and math.isfinite(eps.imag)):
            raise ValueError(f"permittivity must be finite, got {eps}")
        if eps.imag < 0:
            raise ValueError(f"Im eps must be >= 0 (loss, exp(-i omega t) convention), got {eps}")
        if abs(eps) < MIN_ABS_EPS or abs(eps) > MAX_INDEX**2:
            raise ValueError(f"|eps| must be within [{MIN_ABS_EPS:g}, {MAX_INDEX**2:g}] (the "
                             f"field solvers divide by eps), got {eps}")
        kind = "metal" if eps.real < 0 else "dielectric"
        return Material(name or f"eps={eps:g}", ConstantPermittivity(eps), "user value",
                        kind=kind)
    if not isinstance(value["file"], str) or not value["file"].strip():
        raise ValueError("'file' must be a file name")
    path = Path(value["file"]).expanduser()
    if not path.is_absolute():
        path = Path(base_dir if base_dir is not None else ".") / path
    if not path.exists():
        raise FileNotFoundError(f"material table not found: {path}")
    table = read_nk_table(path, interpolation=value.get("interpolation", "pchip"))
    kind = "metal" if np.any(np.asarray(table.k) > np.asarray(table.n)) else "dielectric"
    return Material(name or path.stem, table, f"user table {path}",
                    (table.wavelengths_m[0], table.wavelengths_m[-1]), kind=kind)


# ------------------------------------------------------------------------ phase matching


def phase_matching_materials(beta: float, wavelength_m: float) -> dict[str, float]:
    """Catalogue dielectrics with ``n beta > 1`` at this wavelength, ``{name: Re n}``.

    Sorted by increasing index; entries whose valid range excludes the wavelength are
    left out.  Needed for prism (Cherenkov) phase matching, ``cos theta = 1/(n beta)``.
    """
    found = {}
    for name, mat in catalogue().items():
        if mat.kind != "dielectric" or not bool(mat.in_range(wavelength_m)):
            continue
        n = mat.index(wavelength_m, warn=False).real
        if n * beta > 1.0:
            found[name] = n
    return dict(sorted(found.items(), key=lambda item: item[1]))
