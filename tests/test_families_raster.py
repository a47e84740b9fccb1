"""Exact-area rasterization and anisotropic averaging (designer.families.raster)."""

from __future__ import annotations

import numpy as np
import pytest

from designer.families import raster as R
from solvers.grid import Grid

DX = 10e-9
GRID = Grid(nx=20, nz=40, dx=DX, dz=DX, x0=0.0, z0=-200e-9)
P = GRID.size_x
CELL = DX * DX


def _scene(*pieces, eps=(1.0, 2.25)):
    return R.Scene(tuple(complex(e) for e in eps), tuple(pieces), ())


SHAPES = {
    # off-grid vertices on purpose: the exact fill must not care
    "tapered tooth": R.Trapezoid(1, 3.3e-9, 131.7e-9, 52.1e-9, 71.9e-9, 143.4e-9, 121.2e-9),
    "rectangle": R.Trapezoid(1, -57.2e-9, 12.9e-9, 33.3e-9, 33.3e-9, 88.8e-9, 88.8e-9),
    "over the period edge": R.Trapezoid(1, 0.0, 77.7e-9, 171.3e-9, 180.2e-9, 233.9e-9, 224.1e-9),
    "inverted taper": R.Trapezoid(1, 20e-9, 95.5e-9, 90.5e-9, 60.25e-9, 110.5e-9, 140.75e-9),
}


@pytest.mark.parametrize("name", sorted(SHAPES))
@pytest.mark.parametrize("where", ["ex", "ez", "cell"])
def test_area_of_each_shape_is_exact(name, where):
    # Analytic trapezoid area h (w_top + w_bottom) / 2 (elementary geometry); the dual
    # cells of any Yee component tile the periodic plane, so the summed fill is the area.
    shape = SHAPES[name]
    f = R.fill_fractions(_scene(shape), GRID, P, where)
    area = float(np.sum(f)) * CELL
    assert abs(area - float(R.trapezoid_area(shape))) < 1e-6 * CELL
    assert np.all(f >= -1e-12) and np.all(f <= 1 + 1e-12)


def test_jax_path_gives_the_same_fill_as_numpy():
    shape = SHAPES["tapered tooth"]
    a = np.asarray(R.fill_fractions(_scene(shape), GRID, P, "ex", backend="jax"))
    b = R.fill_fractions(_scene(shape), GRID, P, "ex")
    assert np.max(np.abs(a - b)) < 1e-12
    assert abs(np.sum(a) * CELL - float(R.trapezoid_area(shape))) < 1e-6 * CELL


def test_fill_of_single_cells_matches_supersampling():
    # independent check, cell by cell: point sampling on a fine sub-grid (common
    # practice, no source); its error is about one sub-row/column, 1/400 here
    shape = SHAPES["tapered tooth"]
    f = R.fill_fractions(_scene(shape), GRID, P, "cell")
    n = 400
    s = (np.arange(n) + 0.5) / n
    rng = np.random.default_rng(3)
    edge = np.argwhere((f[0] > 0.02) & (f[0] < 0.98))
    for i, k in edge[rng.choice(len(edge), 8, replace=False)]:
        x = GRID.x0 + (i + s[:, None]) * DX
        z = GRID.z0 + (k + s[None, :]) * DX
        frac = (z - shape.z_lo) / (shape.z_hi - shape.z_lo)
        xl = shape.xl_lo + frac * (shape.xl_hi - shape.xl_lo)
        xr = shape.xr_lo + frac * (shape.xr_hi - shape.xr_lo)
        inside = (x >= xl) & (x <= xr) & (z >= shape.z_lo) & (z <= shape.z_hi)
        assert abs(inside.mean() - f[0, i, k]) < 3.0 / n


def test_slab_fill_and_half_space():
    slab = R.Slab(1, -R.BIG, 23.4e-9)
    f = R.fill_fractions(_scene(slab), GRID, P, "cell")[0]
    # cell (.., k) with z from z0 + k dx: the interface lies 0.34 into cell k = 22
    assert np.allclose(f[:, :22], 1.0) and np.allclose(f[:, 23:], 0.0)
    assert np.allclose(f[:, 22], 0.34)


def test_anisotropic_averaging_at_a_horizontal_interface():
    # Farjadpour et al., Opt. Lett. 31, 2972 (2006): the field component tangential to
    # the interface sees the arithmetic mean, the normal one the harmonic mean.
    eps1 = 4.0
    zi = 23.4e-9
    scene = R.Scene((1.0 + 0j, eps1 + 0j), (R.Slab(1, -R.BIG, zi),),
                    (R.Segment(-P, zi, 2 * P, zi, periodic=False),))
    ex, ez = (np.asarray(a) for a in R.rasterize(scene, GRID, P))
    # Ex dual cell of row k = 22 spans z0 + (21.5 .. 22.5) dx: fill 0.84
    f = 0.84
    assert np.allclose(ex[:, 22], f * eps1 + (1 - f))
    # Ez dual cell of row k = 22 spans z0 + (22 .. 23) dx: fill 0.34
    f = 0.34
    assert np.allclose(ez[:, 22], 1.0 / (f / eps1 + (1 - f)))
    assert np.allclose(ex[:, 5], eps1) and np.allclose(ez[:, 35], 1.0)


def test_anisotropic_averaging_at_a_vertical_interface():
    # same source: Ex is normal to a vertical wall (harmonic mean), Ez tangential
    eps1 = 4.0
    x1, x2 = 52.5e-9, 147.5e-9
    rect = R.Trapezoid(1, -R.BIG, R.BIG, x1, x1, x2, x2)
    scene = R.Scene((1.0 + 0j, eps1 + 0j), (rect,),
                    (R.Segment(x1, -R.BIG, x1, R.BIG), R.Segment(x2, -R.BIG, x2, R.BIG)))
    ex, ez = (np.asarray(a) for a in R.rasterize(scene, GRID, P))
    # Ex dual cell of column 5 spans x = 50..60 nm: fill 0.75
    assert np.allclose(ex[5, 10], 1.0 / (0.75 / eps1 + 0.25))
    # Ez dual cell of column 5 spans x = 45..55 nm: fill 0.25
    assert np.allclose(ez[5, 10], 0.25 * eps1 + 0.75)
