"""2D frequency-domain (FDFD) solver for the (Ex, Ez, Hy) polarization on a Yee grid.

Conventions: SI units, time dependence ``exp(-i omega t)``, complex fields are peak
amplitudes; the grid and the staggering are those of :mod:`solvers.grid`
(eps_x at Ex points, eps_z at Ez points, arrays indexed ``[ix, iz]``).

Public API
----------
``Pml(cells_x=0, cells_z=20, strength=8.0, order=3.0)``
    stretched-coordinate PML inside the outer grid cells; ``cells_x=0``: x periodic.
``PlaneWave(angle_rad, eps_incidence=1.0, side="below", amplitude_V_per_m=1.0, z_source=None)``
``GaussianBeam(waist_m, angle_rad, x_focus, z_focus, eps_incidence=1.0, side="below",
amplitude_V_per_m=1.0, z_source=None)``
    sources, launched by a total-field/scattered-field line (exact amplitude, no
    backward emission) just outside the PML on their side.
``FdfdProblem(grid, omega, pml, source, bloch_kx=None)``
``solve(problem, eps_x, eps_z, *, force=False, backend="superlu_mmd") -> Fields``
    total fields everywhere (fields inside the PML are not physical).
``field_solver(problem, *, force=False, backend=..., cache_size=2)``
    JAX function ``(eps_x, eps_z) -> (ex, ez, hy)`` with an adjoint custom_vjp,
    jit/grad/vmap-safe; one factorization per permittivity serves value and gradient.
``incident_field(problem, x, z, discrete=False) -> (ex, ez, hy)``
    the incident wave alone (continuum, or exactly as launched on the grid).
``Fields``: ``sample_ex/ez/hy/e(x, z)``, ``e_magnitude_at_centres()``,
``max_field_in(mask)``, ``flux_z(z, subtract_incident=False)``, ``incident_flux()``,
``power_coefficients(z_reflect, z_transmit) -> (R, T)``.
Array-level, JAX-traceable: ``interpolate``, ``e_at_centres``,
``e_magnitude_at_centres``, ``flux_z``; ``floquet_amplitudes`` (numpy).
Permittivity builders: ``eps_from_cells``, ``eps_from_fine`` (Farjadpour rule).
Linear solvers: ``factorize``, ``register_backend``, ``available_backends``.
Guards: ``check_inputs`` (warns below 20, refuses below 8 cells per wavelength in
the densest material; PML at least half a wavelength; shapes; finiteness;
homogeneous medium at the source line).  ``spacing_for`` gives the grid step for
a target number of cells per wavelength (default resolution: 60).
"""

import jax

jax.config.update("jax_enable_x64", True)

from solvers.fdfd.averaging import eps_from_cells, eps_from_fine  # noqa: E402
from solvers.fdfd.fields import (  # noqa: E402
    Fields,
    e_at_centres,
    e_magnitude_at_centres,
    floquet_amplitudes,
    flux_z,
    interpolate,
)
from solvers.fdfd.linsolve import (  # noqa: E402
    available_backends,
    factorize,
    register_backend,
)
from solvers.fdfd.solver import (  # noqa: E402
    MIN_CELLS_PER_WAVELENGTH,
    WARN_CELLS_PER_WAVELENGTH,
    ResolutionWarning,
    check_inputs,
    field_solver,
    solve,
)
from solvers.fdfd.sources import incident_field  # noqa: E402
from solvers.fdfd.specs import FdfdProblem, GaussianBeam, PlaneWave, Pml  # noqa: E402

DEFAULT_CELLS_PER_WAVELENGTH = 60


def spacing_for(wavelength: float, eps_max: float,
                cells_per_wavelength: float = DEFAULT_CELLS_PER_WAVELENGTH) -> float:
    """Grid step (m) giving ``cells_per_wavelength`` cells per wavelength at index sqrt(eps_max)."""
    return wavelength / (abs(eps_max) ** 0.5 * cells_per_wavelength)


__all__ = [
    "DEFAULT_CELLS_PER_WAVELENGTH", "MIN_CELLS_PER_WAVELENGTH", "WARN_CELLS_PER_WAVELENGTH",
    "Fields", "FdfdProblem", "GaussianBeam", "Pml", "PlaneWave", "ResolutionWarning",
    "available_backends", "check_inputs", "e_at_centres", "e_magnitude_at_centres",
    "eps_from_cells", "eps_from_fine", "factorize", "field_solver", "floquet_amplitudes",
    "flux_z", "incident_field", "interpolate", "register_backend", "solve", "spacing_for",
]
