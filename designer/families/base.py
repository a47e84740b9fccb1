"""Shared types and helpers of the sample families.

A family is a module with the functions ``parse``, ``to_table``, ``variables``,
``replace``, ``laser_angle``, ``layout``, ``permittivity``, ``layer_stack``,
``polygons``, ``check_path``, ``features`` and ``draw`` (see ``designer.families``).
This module holds what they share: the context and layout dataclasses, material
resolution, the z-stacking of a simulation domain and reading the ``[path]`` table.
"""

from __future__ import annotations

import math
import pathlib
from dataclasses import dataclass, field

import numpy as np

from designer.errors import SpecError
from designer.tables import TableReader
from solvers.grid import Grid

try:  # the fabrication module defines Feature; keep a compatible fallback
    from designer.fabrication import Feature
except ImportError:  # pragma: no cover - only while designer.fabrication is missing
    @dataclass(frozen=True)
    class Feature:  # type: ignore[no-redef]
        kind: str
        size_m: float
        location: tuple[float, float]
        description: str
        lateral_m: float | None = None


# ------------------------------------------------------------------------ dataclasses
@dataclass(frozen=True)
class SampleContext:
    """What a family needs to know beyond its own table (built by designer/spec.py)."""

    wavelength_m: float
    beta: float
    gamma: float
    angle_rad: float | None     # None when the spec says "phase-matched"
    from_side: str              # "below" | "above"
    source: str                 # spec file name (for SpecError)
    base_dir: pathlib.Path | None = None
    path: dict = field(default_factory=dict)


@dataclass(frozen=True)
class PathGeometry:
    """The electron's straight path in the simulation cell.

    ``direction`` "x": along +x at height ``z_m``, over ``length_m`` (None = not
    given); "z": along +z at lateral position ``x_m``, with the physical region
    bounded by the planes ``z_below_m`` < ``z_above_m`` outside which the media are
    homogeneous (``eps_below``, ``eps_above``).
    """

    direction: str
    x_m: float | None = None
    z_m: float | None = None
    length_m: float | None = None
    z_below_m: float | None = None
    z_above_m: float | None = None
    eps_below: complex | None = None
    eps_above: complex | None = None


@dataclass(frozen=True, eq=False)
class SimulationLayout:
    """Grid and sources of one FDFD run of a sample (SI).

    ``pml_cells_z`` PML cells lie inside the grid at its bottom and top;
    ``pml_cells_x = 0`` means x is Bloch-periodic with period ``period_m``
    (``grid.size_x``).  ``material_mask`` (nx, nz) marks cells more than half filled
    with material, outside the PML (for the largest field in material).
    ``z_source_m``: the plane-wave source line, in the homogeneous incidence medium
    ``eps_incidence`` just past the PML on the ``from_side``.
    ``structure_z_m``: (bottom, top) of the patterned/layered region, for pictures.
    """

    grid: Grid
    pml_cells_z: int
    pml_cells_x: int
    period_m: float | None
    eps_incidence: complex
    from_side: str
    z_source_m: float
    angle_rad: float
    material_mask: np.ndarray
    path: PathGeometry
    grid_step_m: float = 0.0
    structure_z_m: tuple[float, float] = (0.0, 0.0)
    wavelength_m: float = 0.0


@dataclass(frozen=True)
class LayerStack:
    """A planar stack: medium ``eps_below`` fills z < ``z_first_m``, then ``layers``
    ``[(thickness_m, eps), ...]`` bottom to top, then ``eps_above``.

    ``eps`` and ``z_interfaces`` give the form ``solvers.layers.solve_stack`` takes.
    """

    eps_below: complex
    eps_above: complex
    layers: tuple[tuple[float, complex], ...]
    z_first_m: float = 0.0

    @property
    def eps(self) -> tuple[complex, ...]:
        return (self.eps_below,) + tuple(e for _, e in self.layers) + (self.eps_above,)

    @property
    def z_interfaces(self) -> tuple[float, ...]:
        z = [self.z_first_m]
        for t, _ in self.layers:
            z.append(z[-1] + t)
        return tuple(z)


@dataclass(frozen=True)
class Polygon:
    """A closed polygon of the cross-section: vertices (n, 2) as (x, z) in metres."""

    vertices_m: np.ndarray
    material_name: str
    eps: complex


@dataclass(frozen=True)
class MaterialRef:
    """A resolved material: name for people, the spec value, eps at the wavelength."""

    name: str
    spec: object = field(compare=False)   # may be a dict: kept out of eq/hash
    eps: complex = 0j

    @property
    def index(self) -> complex:
        return complex(np.sqrt(self.eps))


# ------------------------------------------------------------------------ materials
RANGE_SLACK = 1.25   # within 25 % beyond a material's data: extrapolate with a warning


def resolve(reader: TableReader, key: str, value, ctx: SampleContext) -> MaterialRef:
    """Resolve a material value (catalogue name or dict) at the laser wavelength.

    Every failure becomes a SpecError naming ``key`` (dotted in ``reader``'s table).
    """
    try:
        from designer import materials
    except ImportError:  # pragma: no cover - fallback while the catalogue is missing
        materials = None
    if materials is not None:
        try:
            mat = materials.resolve_material(value, base_dir=ctx.base_dir)
            lo, hi = mat.valid_range_m
            if not lo / RANGE_SLACK <= ctx.wavelength_m <= hi * RANGE_SLACK:
                raise ValueError(f"the laser wavelength {ctx.wavelength_m * 1e9:.6g} nm is far "
                                 f"outside the data of '{mat.name}' ({lo * 1e9:.6g}-"
                                 f"{hi * 1e9:.6g} nm); give the material as {{n = ...}} or a "
                                 "table that covers it")
            eps = complex(mat.eps(ctx.wavelength_m))
        except (ValueError, TypeError, FileNotFoundError, KeyError) as exc:
            raise reader.error(key, str(exc), value) from None
        return MaterialRef(mat.name, value, eps)
    if isinstance(value, dict) and "n" in value:
        n = complex(float(value["n"]), float(value.get("k", 0.0)))
        return MaterialRef(f"n={n.real:g}", value, n * n)
    if isinstance(value, dict) and "eps" in value:
        return MaterialRef(f"eps={value['eps']}", value, complex(value["eps"]))
    raise reader.error(key, "material catalogue not available; give {n = ...}", value)


def material_with_eps(ref: MaterialRef, eps: complex) -> MaterialRef:
    return MaterialRef(ref.name, ref.spec, complex(eps))


# ------------------------------------------------------------------------ numbers
def decay_length(ctx: SampleContext) -> float:
    """Evanescent decay length of the synchronous field, 1/kappa = beta gamma lambda/2pi.

    Source: the standard synchronous-harmonic result (Lambda = m beta lambda; e.g.
    R. J. England et al., Rev. Mod. Phys. 86, 1337, 2014).
    """
    return ctx.beta * ctx.gamma * ctx.wavelength_m / (2.0 * math.pi)


def pml_cells(wavelength_m: float, dz: float) -> int:
    """PML thickness: at least 0.55 vacuum wavelengths (the solver refuses less than
    half a wavelength; the margin keeps rounding from landing on the limit) and at
    least 20 cells."""
    return max(20, int(math.ceil(0.55 * wavelength_m / dz)))


def margin_m(wavelength_m: float) -> float:
    """Homogeneous margin between PML and structure or path region: lambda/2."""
    return 0.5 * wavelength_m


def cells_per_period(period_m: float, grid_step_m: float, minimum: int = 4) -> int:
    """Integer number of cells in one period for a requested cell size."""
    return max(minimum, int(round(period_m / grid_step_m)))


def z_grid(z_lo_m: float, z_hi_m: float, dz: float, n_pml: int) -> tuple[float, int]:
    """(z0, nz) of a grid with ``n_pml`` PML cells outside [z_lo, z_hi] on both ends.

    z = 0 falls on a cell edge (z0 is an integer multiple of dz).
    """
    k_lo = int(math.floor(z_lo_m / dz + 1e-9)) - n_pml
    k_hi = int(math.ceil(z_hi_m / dz - 1e-9)) + n_pml
    return k_lo * dz, k_hi - k_lo


def source_plane(grid: Grid, n_pml: int, from_side: str) -> float:
    """z of the source line: two cells past the PML on the incidence side."""
    if from_side == "below":
        return grid.z0 + (n_pml + 2) * grid.dz
    return grid.z0 + (grid.nz - n_pml - 2) * grid.dz


def strip_pml(mask: np.ndarray, n_pml: int) -> np.ndarray:
    mask = np.array(mask, dtype=bool)
    mask[:, :n_pml] = False
    mask[:, mask.shape[1] - n_pml:] = False
    return mask


# ------------------------------------------------------------------------ path table
def path_reader(ctx: SampleContext) -> TableReader:
    return TableReader(ctx.path, "path", ctx.source)


def path_length(ctx: SampleContext, default=None):
    r = path_reader(ctx)
    return r.length("length_um", default, minimum=0.0, exclusive_minimum=True)


def path_number(ctx: SampleContext, name: str, default):
    """A length from [path] (``x_nm``/``offset_nm``) in metres, or ``default``."""
    return path_reader(ctx).length(name, default)


def fmt_nm(x_m: float) -> str:
    return f"{x_m * 1e9:.6g}"


def check_values(values: dict, variables: dict, family: str) -> None:
    """Refuse override keys that are not continuous parameters of this family."""
    unknown = sorted(set(values) - set(variables))
    if unknown:
        raise ValueError(f"{family}: not a continuous parameter: {unknown[0]!r} "
                         f"(known: {', '.join(sorted(variables)) or 'none'})")


def angle_from_incidence(sin_theta: float, ctx: SampleContext, what: str) -> float:
    if not abs(sin_theta) <= 1.0:
        raise SpecError(ctx.source, "laser.angle_deg",
                        f"no phase-matched angle: {what} would need sin(angle) = "
                        f"{sin_theta:.4f}; give the angle in degrees", "phase-matched")
    return math.asin(sin_theta)
