"""The 3D Meep worker (one Bloch-periodic unit cell, plane wave, PML in z) and the
coupling integral along a line through its fields, against the exact layer stack.

A film is x- and y-invariant, so the exact plane-wave solution of the film
(M. Born & E. Wolf, Principles of Optics, ch. 1.6, as coded in solvers/layers.py and
checked there against Fresnel/Airy) is an independent reference for the 3D worker's
amplitude calibration, polarization vectors and Floquet tails.  Tolerance 3 % at
40 px/um (measured: 2.0 % at 40, 0.9 % at 60, 0.5 % at 80 px/um, first-order
convergence of the staircased film faces).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import skip_or_fail
from scipy import constants

from solvers import layers
from solvers.fdtd import MeepUnavailableError, meep_python
from solvers.fdtd.runner3d import Fdtd3dProblem, FdtdSlab, line_coupling, run_fdtd3d

LAM = 800e-9
T = 100e-9
EPS = 4.0
V = 0.6953144709798575 * constants.c   # 200 kV (beta from scipy.constants CODATA)


def _meep_or_skip():
    try:
        meep_python()
    except MeepUnavailableError as exc:
        skip_or_fail(f"Meep not available: {exc}")


def _exact(theta):
    omega = 2 * math.pi * constants.c / LAM
    sol = layers.solve_plane_wave(np.array([1.0, EPS, 1.0]), np.array([0.0, T]), omega, theta)
    return complex(layers.coupling_normal(sol, 0.0, V))


@pytest.mark.slow
@pytest.mark.parametrize("theta_deg, phi_deg, psi_deg", [(20.0, 0.0, 0.0), (30.0, 25.0, 40.0)])
def test_film_coupling_matches_layer_stack(theta_deg, phi_deg, psi_deg):
    """A film is rotation-invariant about z and its s part has no Ez: along the normal
    the coupling is cos(psi) times the p coupling at the same polar angle."""
    _meep_or_skip()
    theta = math.radians(theta_deg)
    prob = Fdtd3dProblem(size_x_m=0.2e-6, size_y_m=0.2e-6, z_min_m=-0.4e-6, size_z_m=0.9e-6,
                         wavelength_m=LAM, objects=(FdtdSlab(0.0, T, EPS),), theta_rad=theta,
                         phi_rad=math.radians(phi_deg), psi_rad=math.radians(psi_deg),
                         cells_per_um=40.0)
    res = run_fdtd3d(prob, timeout_s=300)
    assert res.converged
    assert res.info["calibration"]["polarization_residual"] < 0.01
    total, box = line_coupling(res, prob, (0.0, 0.0), (0.0, 0.0, 1.0), V, 1.0, 1.0)
    ref = _exact(theta) * math.cos(math.radians(psi_deg))
    assert abs(total - ref) / abs(ref) < 0.03
    # the tails matter: the in-box part alone is far off (a box-size-dependent number)
    assert abs(box - ref) / abs(ref) > 0.5
