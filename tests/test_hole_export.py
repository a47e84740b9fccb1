"""Hole lattices to GDSII/OASIS: array references keep large fields small, the holes are
where the lattice puts them with the right area, and the design-rule gate refuses."""

from __future__ import annotations

import math
from types import SimpleNamespace

import gdstk
import numpy as np
import pytest

from designer.hole_export import hole_polygon, polygon_sides


def _spec(tmp_path, *, lattice="square", period=400.0, radius=100.0, field=20.0,
          fabrication="", name="h.toml"):
    p = tmp_path / name
    p.write_text(f"""
[beam]
voltage_kV = 200.0
[laser]
wavelength_nm = 800.0
angle_deg = 10.0
[sample]
family = "membrane"
material = "silicon_nitride"
thickness_nm = 150.0
pattern = "holes"
lattice = "{lattice}"
period_nm = {period}
hole_radius_nm = {radius}
[fabrication]
{fabrication}
[layout]
field_um = {field}
tone = "remove"
""")
    return p


def _run(capsys, *args):
    """The console command in this process (designer.cli.main), as a user runs it."""
    from designer.cli import main

    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return SimpleNamespace(returncode=code, stdout=out.out, stderr=out.err)


def _holes(path):
    lib = gdstk.read_gds(path) if str(path).endswith(".gds") else gdstk.read_oas(path)
    top = [c for c in lib.top_level() if not c.name.endswith("_HOLE")][0]
    flat = top.copy("flat").flatten()
    return [p for p in flat.polygons]


@pytest.mark.parametrize("suffix", [".gds", ".oas"])
def test_square_field_of_400_um2_is_a_small_file(tmp_path, capsys, suffix):
    out = tmp_path / f"holes{suffix}"
    r = _run(capsys, "export", _spec(tmp_path), "--out", out)
    assert r.returncode == 0, r.stderr
    # 20 um / 400 nm: centres at -9.6 .. 9.6 um with the radius inside +-10 um: 49 x 49
    polys = _holes(out)
    assert len(polys) == 49 * 49
    # a flat layout would hold 2401 polygons of ~20 vertices (> 100 kB); one array
    # reference keeps the file near a kilobyte
    assert out.stat().st_size < 2048
    # equal-area polygon: pi r^2 within the database-unit snapping (1 nm on 100 nm)
    areas = np.array([p.area() for p in polys[:50]]) * 1e-12
    assert np.allclose(areas, math.pi * (100e-9) ** 2, rtol=0.02)
    centres = np.array([p.points.mean(axis=0) for p in polys])
    assert centres[:, 0].min() == pytest.approx(-9.6, abs=1e-3)
    assert sorted(set(np.round(centres[:, 0], 3)))[:2] == pytest.approx([-9.6, -9.2])


def test_hexagonal_lattice_two_arrays_and_nearest_neighbours(tmp_path, capsys):
    out = tmp_path / "hex.gds"
    r = _run(capsys, "export", _spec(tmp_path, lattice="hexagonal", period=500.0, radius=120.0,
                             field=10.0), "--out", out, "--json")
    assert r.returncode == 0, r.stderr
    polys = _holes(out)
    c = np.array([p.points.mean(axis=0) for p in polys])
    d = np.sqrt(((c[:, None, :] - c[None, :, :]) ** 2).sum(-1))
    np.fill_diagonal(d, np.inf)
    # every interior hole of a hexagonal lattice has six neighbours at the period
    # (elementary geometry, no source)
    inner = (np.abs(c[:, 0]) < 3.5) & (np.abs(c[:, 1]) < 3.5)
    counts = (np.abs(d[inner] - 0.5) < 1e-3).sum(axis=1)
    assert set(counts) == {6}
    assert d.min() == pytest.approx(0.5, abs=1e-3)


def test_polygon_within_one_dbu_of_the_circle():
    # sagitta r (1 - cos(pi/N)) <= dbu (elementary geometry)
    n = polygon_sides(100e-9, 1e-9)
    assert 100e-9 * (1 - math.cos(math.pi / n)) <= 1e-9
    poly = hole_polygon((100e-9, 100e-9), 0.0, 1e-9)
    r = np.hypot(poly[:, 0], poly[:, 1])
    assert np.all(np.abs(r - 100e-9) < 1.5e-9)


def test_design_rules_refuse_thin_walls_and_write_nothing(tmp_path, capsys):
    out = tmp_path / "bad.gds"
    spec = _spec(tmp_path, radius=180.0, fabrication="min_feature_nm = 60.0\n"
                 "max_aspect_ratio = 2.0")
    r = _run(capsys, "export", spec, "--out", out)
    assert r.returncode == 3
    assert not out.exists()
    assert "wall between neighbouring holes" in r.stderr and "min_feature" in r.stderr
    assert "aspect_ratio" in r.stderr
    r = _run(capsys, "export", spec, "--out", out, "--ignore-rules")
    assert r.returncode == 0 and out.exists()


def test_keep_tone_is_refused_with_key(tmp_path, capsys):
    spec = _spec(tmp_path)
    spec.write_text(spec.read_text().replace('tone = "remove"', 'tone = "keep"'))
    r = _run(capsys, "export", spec, "--out", tmp_path / "k.gds")
    assert r.returncode == 2 and "layout.tone" in r.stderr and "Traceback" not in r.stderr
