"""Gradients of the rasterized permittivity w.r.t. every continuous family parameter.

Reference: central finite differences of the same function (common practice, no
source).  The fill fractions are piecewise quadratic in the vertex positions, so
central differences are exact up to rounding unless a vertex crosses a cell edge
within the step (so no test value puts an interface on a cell edge, where the
one-sided derivatives differ); the harmonic mean of a high-contrast cell is strongly
curved in the fill (third derivative ~ eps^2), so the steps are 1e-4 of a cell.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from designer.beam import electron
from designer.families import SampleContext, get_family
from designer.tables import TableReader


def _ctx(kv=30.0, lam=800e-9, angle=0.0, path=None):
    e = electron(kv * 1e3)
    return SampleContext(wavelength_m=lam, beta=e.beta, gamma=e.gamma, angle_rad=angle,
                         from_side="below", source="test.toml", base_dir=None, path=path or {})


def _check_gradients(family_name, table, ctx, resolution):
    fam = get_family(family_name)
    p = fam.parse(TableReader(table, "sample", ctx.source), ctx)
    lay = fam.layout(p, ctx, resolution)
    variables = fam.variables(p)
    assert variables, "every family here has continuous parameters"
    rng = np.random.default_rng(7)
    w1 = jnp.asarray(rng.normal(size=lay.grid.shape))
    w2 = jnp.asarray(rng.normal(size=lay.grid.shape))

    def objective(values):
        ex, ez = fam.permittivity(p, lay, values)
        return jnp.sum(w1 * jnp.real(ex)) + jnp.sum(w2 * jnp.real(ez))

    v0 = {k: jnp.asarray(v) for k, (v, lo, hi) in variables.items()}
    value, grad = jax.jit(jax.value_and_grad(objective))(v0)
    f = jax.jit(objective)
    cell_nm = lay.grid_step_m * 1e9
    for key, (v, lo, hi) in variables.items():
        if key.endswith("_nm") or ".thickness_nm" in key:
            h = 1e-4 * cell_nm
        elif key.endswith("_deg"):
            h = 1e-5
        else:
            h = 1e-7
        vp = dict(v0, **{key: jnp.asarray(v + h)})
        vm = dict(v0, **{key: jnp.asarray(v - h)})
        fd = (float(f(vp)) - float(f(vm))) / (2 * h)
        g = float(grad[key])
        assert abs(g - fd) <= 1e-5 * abs(fd) + 1e-7 * abs(float(value)) / max(abs(v), 1.0), \
            (key, g, fd)
        assert g != 0.0, key


def test_double_sided_tapered_grating_gradients():
    table = {"family": "grating", "material": {"n": 1.45}, "sides": 2, "gap_nm": 310.0,
             "shift_nm": 33.0, "sidewall_angle_deg": 6.0, "tooth_height_nm": 143.0,
             "duty_cycle": 0.47}
    _check_gradients("grating", table, _ctx(), 20e-9)


@pytest.mark.slow
def test_membrane_with_slits_gradients():
    table = {"family": "membrane", "material": {"n": 2.0}, "thickness_nm": 87.0,
             "pattern": "slits", "period_nm": 600.0, "slit_widths_nm": [111.0, 73.0],
             "slit_centers_nm": [140.0, 433.0]}
    _check_gradients("membrane", table, _ctx(angle=0.3), 20e-9)


@pytest.mark.slow
def test_free_standing_grating_with_base_gradients():
    table = {"family": "grating", "material": {"n": 3.5}, "substrate": False,
             "base_thickness_nm": 57.0, "sidewall_angle_deg": -4.0, "tooth_height_nm": 121.0}
    _check_gradients("grating", table, _ctx(kv=100.0), 20e-9)


@pytest.mark.slow
def test_prism_layer_gradients():
    table = {"family": "prism", "material": {"n": 2.0},
             "layers": [{"material": {"n": 1.5}, "thickness_nm": 37.0},
                        {"material": {"n": 2.5}, "thickness_nm": 23.3}]}
    _check_gradients("prism", table, _ctx(kv=200.0, angle=None), 20e-9)
