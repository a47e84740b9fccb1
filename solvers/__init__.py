"""Field solvers and the electron coupling integral.

This package knows nothing of ``designer``: it takes arrays in SI units
(permittivity on a grid or a layer stack, angular frequency, Bloch wavevector,
a source description) and returns fields and coupling numbers.
"""
