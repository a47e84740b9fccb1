"""Fourier modal method (RCWA) for stacks of layers periodic in x and y, in JAX.

Public interface::

    lat = Lattice(a1=(Px, 0.0), a2=(0.0, Py))
    layer = PatternedLayer(thickness=t, eps_background=eps, shapes=(Circle((0, 0), r),),
                           eps_shapes=(1.0,))
    sol = solve(lat, [layer], eps_below=1.0, eps_above=1.0, wavelength=lam, theta=th,
                phi=ph, polarization=psi, orders=N, incidence="above")
    sol.reflectance, sol.transmittance
    I = coupling_integral(sol, point=(x, y), direction=(sx, sy, sz), velocity=v)
    spot = spot_averaged_coupling(sol, point=(x, y), direction=..., velocity=v, fwhm=w)

Conventions are in the docstrings of :mod:`.solve` (geometry, incidence, polarization),
:mod:`.modes` (eigenmodes, Fourier factorization), :mod:`.smatrix` (S-matrices) and
:mod:`.coupling` (the closed-form coupling integral).
"""

from .coupling import (
                       SpotCoupling,
                       coupling_integral,
                       default_z_ref,
                       harmonic_couplings,
                       spot_averaged_coupling,
)
from .eig import eig
from .geometry import (
                       Circle,
                       Ellipse,
                       Lattice,
                       PatternedLayer,
                       Slit,
                       UniformLayer,
                       airy_amplitude,
                       bessel_j,
                       bessel_j1,
                       harmonic_indices,
                       hexagonal_lattice,
                       square_lattice,
)
from .modes import LayerModes
from .solve import FMMSolution, solve

__all__ = [
    "Circle", "Ellipse", "FMMSolution", "Lattice", "LayerModes", "PatternedLayer", "Slit",
    "SpotCoupling", "UniformLayer", "airy_amplitude", "bessel_j", "bessel_j1",
    "coupling_integral", "default_z_ref", "eig", "harmonic_couplings", "harmonic_indices",
    "hexagonal_lattice", "solve", "spot_averaged_coupling", "square_lattice",
]
