"""Checks of the Meep (FDTD) worker against closed-form plane-wave fields.

Meep runs in its own process (see solvers/fdtd/runner.py); these tests skip when no
interpreter with Meep is found.
"""

from __future__ import annotations

import dataclasses
import json
import os
import subprocess
import sys

import numpy as np
import pytest
from conftest import skip_or_fail
from scipy import constants

from solvers.fdtd import (
    FdtdPolygon,
    FdtdProblem,
    FdtdWorkerError,
    MeepUnavailableError,
    meep_python,
    run_fdtd,
)
from solvers.fdtd import runner as fdtd_runner

UM = 1e-6
Z0 = constants.mu_0 * constants.c


def _meep_or_skip() -> str:
    try:
        return meep_python()
    except MeepUnavailableError as exc:
        skip_or_fail(f"Meep not available: {exc}")


def layer_fields_tm(z, x, eps, d_layers, k0, kx, h_inc):
    """Closed-form TM (Hy, Ex, Ez) of a plane wave on a planar stack, incident from below.

    Media eps[0] (z < 0), eps[1..-2] (layers of thickness d_layers, from z = 0 up),
    eps[-1] (top half-space).  For a single film (three media) this is the Airy
    summation of the Fresnel coefficients (M. Born & E. Wolf, Principles of Optics,
    7th ed., 1999, sec. 1.5-1.6): for the H amplitude of p-polarized light
        r_jk = (q_j - q_k) / (q_j + q_k),  t_jk = 1 + r_jk,  q_j = kz_j / eps_j,
        r = (r12 + r23 e^{2 i b}) / (1 + r12 r23 e^{2 i b}),  b = kz_2 d,
    and in the film Hy = H0 t12 [e^{i kz2 z} + r23 e^{2 i b} e^{-i kz2 z}] / (1 + r12 r23 e^{2ib}),
    on top Hy = H0 t12 t23 e^{i b} e^{i kz3 (z - d)} / (1 + r12 r23 e^{2 i b}).
    For two media (d_layers empty) it is the Fresnel formula, including total internal
    reflection (kz imaginary, Im kz > 0).  E follows from Ampere's law for exp(-i w t):
        Ex = -i dHy/dz / (w eps0 eps),   Ez = -kx Hy / (w eps0 eps).
    Hy_inc = h_inc exp(i (kx x + kz1 z)).
    """
    eps = [complex(e) for e in eps]
    kz = [np.sqrt(e * k0**2 - kx**2 + 0j) for e in eps]
    kz = [k if k.imag >= 0 else -k for k in kz]
    q = [k / e for k, e in zip(kz, eps)]

    def r(j, k):
        return (q[j] - q[k]) / (q[j] + q[k])

    z = np.asarray(z, float)
    hy = np.zeros(z.shape, complex)
    dhy = np.zeros(z.shape, complex)
    epsz = np.zeros(z.shape, complex)
    if len(eps) == 2:
        rr = r(0, 1)
        lo, hi = z < 0, z >= 0
        hy[lo] = np.exp(1j * kz[0] * z[lo]) + rr * np.exp(-1j * kz[0] * z[lo])
        dhy[lo] = 1j * kz[0] * (np.exp(1j * kz[0] * z[lo]) - rr * np.exp(-1j * kz[0] * z[lo]))
        hy[hi] = (1 + rr) * np.exp(1j * kz[1] * z[hi])
        dhy[hi] = 1j * kz[1] * hy[hi]
        epsz[lo], epsz[hi] = eps[0], eps[1]
    else:
        (d,) = d_layers
        b = kz[1] * d
        r12, r23 = r(0, 1), r(1, 2)
        den = 1 + r12 * r23 * np.exp(2j * b)
        rr = (r12 + r23 * np.exp(2j * b)) / den
        a2 = (1 + r12) / den
        b2 = a2 * r23 * np.exp(2j * b)
        tt = (1 + r12) * (1 + r23) * np.exp(1j * b) / den
        m1, m2, m3 = z < 0, (z >= 0) & (z <= d), z > d
        e1p, e1m = np.exp(1j * kz[0] * z[m1]), np.exp(-1j * kz[0] * z[m1])
        hy[m1] = e1p + rr * e1m
        dhy[m1] = 1j * kz[0] * (e1p - rr * e1m)
        e2p, e2m = np.exp(1j * kz[1] * z[m2]), np.exp(-1j * kz[1] * z[m2])
        hy[m2] = a2 * e2p + b2 * e2m
        dhy[m2] = 1j * kz[1] * (a2 * e2p - b2 * e2m)
        hy[m3] = tt * np.exp(1j * kz[2] * (z[m3] - d))
        dhy[m3] = 1j * kz[2] * hy[m3]
        epsz[m1], epsz[m2], epsz[m3] = eps
    w_eps0 = k0 * constants.c * constants.epsilon_0
    ph = h_inc * np.exp(1j * kx * x)
    hy, dhy = hy * ph, dhy * ph
    return hy, -1j * dhy / (w_eps0 * epsz), -kx * hy / (w_eps0 * epsz)


def _rel_err(num, ref, mask=None):
    if mask is not None:
        num, ref = num[mask], ref[mask]
    return float(np.max(np.abs(num - ref)) / np.max(np.abs(ref)))


def _slab(z_lo, z_hi, eps, half_width=5 * UM):
    v = np.array([[-half_width, z_lo], [half_width, z_lo], [half_width, z_hi],
                  [-half_width, z_hi]])
    return FdtdPolygon(v, eps)


# ---------------------------------------------------------------- spec checks (no Meep)


def test_problem_rejects_inconsistent_input():
    base = dict(size_z_m=1 * UM, z_min_m=-0.5 * UM, wavelength_m=0.8 * UM)
    with pytest.raises(ValueError, match="exactly one"):
        FdtdProblem(**base)
    with pytest.raises(ValueError, match="exactly one"):
        FdtdProblem(**base, period_x_m=0.4 * UM, size_x_m=0.4 * UM)
    with pytest.raises(ValueError, match="not equivalent"):
        FdtdProblem(**base, period_x_m=0.4 * UM, angle_rad=0.3, bloch_kx=1.0e6)
    with pytest.raises(ValueError, match="outside"):
        FdtdProblem(**base, period_x_m=0.4 * UM, lines=(("x", 0.6 * UM),))
    with pytest.raises(ValueError, match="within one period"):
        tooth = np.array([[0, 0], [0.1, 0], [0.1, 0.1], [0, 0.1]]) * UM + [2 * UM, 0]
        FdtdProblem(**base, period_x_m=0.4 * UM, polygons=(FdtdPolygon(tooth, 2.0),))
    # a traced polygon ending at the edge of the allowed range in single precision
    # (relative rounding 6e-8) is still inside (common practice, no source)
    edge = np.float32(2 * 0.4 * UM)
    sliver = np.array([[edge - 0.02 * UM, 0], [edge, 0], [edge, 0.1 * UM],
                       [edge - 0.02 * UM, 0.1 * UM]])
    assert float(edge) > 2 * 0.4 * UM + 1e-9 * 0.4 * UM
    FdtdProblem(**base, period_x_m=0.4 * UM, x_min_m=0.0,
                polygons=(FdtdPolygon(sliver, 2.0),))
    with pytest.raises(ValueError, match="Re\\(eps\\) > 0"):
        FdtdPolygon(np.zeros((3, 2)) + [[0, 0], [1, 0], [0, 1]], -10 + 1j)
    # a Bloch vector one reciprocal-lattice vector away is the same problem
    p = FdtdProblem(**base, period_x_m=0.4 * UM, angle_rad=0.3,
                    bloch_kx=2 * np.pi / 0.8 * UM**-1 * np.sin(0.3) + 2 * np.pi / (0.4 * UM))
    assert p.kx > p.kx_incident


def test_unavailable_meep_names_the_fix(monkeypatch):
    # the main environment's interpreter has no Meep (its numpy 2 could not load it)
    monkeypatch.setenv("VELOMATCH_MEEP_PYTHON", sys.executable)
    fdtd_runner._probe.cache_clear()
    try:
        with pytest.raises(MeepUnavailableError) as info:
            meep_python()
        msg = str(info.value)
        assert sys.executable in msg
        assert "apt-get install python3-meep python3-matplotlib" in msg
        assert "pymeep" in msg and "VELOMATCH_MEEP_PYTHON" in msg
        p = FdtdProblem(size_z_m=1 * UM, z_min_m=0, wavelength_m=UM, period_x_m=UM)
        with pytest.raises(MeepUnavailableError):
            run_fdtd(p)
    finally:
        fdtd_runner._probe.cache_clear()


# ---------------------------------------------------------------- Meep runs


def _film_problem(eps_film, res, side="below", angle_deg=30.0):
    d = 0.2 * UM
    z_lo, z_hi = (0.0, d) if side == "below" else (-d, 0.0)
    return FdtdProblem(
        size_z_m=1.2 * UM, z_min_m=-0.6 * UM if side == "below" else -0.6 * UM,
        wavelength_m=0.8 * UM, period_x_m=0.1 * UM, pml_m=0.5 * UM,
        angle_rad=np.deg2rad(angle_deg), side=side, cells_per_um=res,
        polygons=(_slab(z_lo, z_hi, eps_film),), lines=(("z", 0.05 * UM),),
    )


def test_worker_script_runs_tiny_problem(tmp_path):
    python = _meep_or_skip()
    p = FdtdProblem(size_z_m=0.6 * UM, z_min_m=-0.3 * UM, wavelength_m=1.0 * UM,
                    period_x_m=0.2 * UM, pml_m=0.3 * UM, cells_per_um=20, whole_cell=True,
                    polygons=(_slab(0, 0.1 * UM, 2.25),), lines=(("x", 0.2 * UM),))
    src, dst = tmp_path / "p.json", tmp_path / "f.npz"
    src.write_text(json.dumps(p.to_json()))
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    proc = subprocess.run([python, str(fdtd_runner.WORKER), str(src), str(dst)],
                          capture_output=True, text=True, timeout=120, env=env)
    assert proc.returncode == 0, proc.stderr
    with np.load(dst) as data:
        meta = json.loads(str(data["meta"]))
        assert meta["meep_version"].startswith("1.")
        assert meta["cells_per_um"] == 20
        x, ex = data["line0_x"], data["line0_ex"]
        # one sample per pixel centre across the period: (i + 1/2) dx
        np.testing.assert_allclose(x, (np.arange(4) + 0.5) * 0.05 * UM, rtol=0, atol=1e-15)
        assert ex.shape == (4, 1) and np.all(np.isfinite(ex)) and np.all(ex != 0)
        # the whole-cell output is on the same pixel centres and agrees with the line
        np.testing.assert_allclose(data["cell_x"], x, rtol=0, atol=1e-15)
        cz = data["cell_z"]
        np.testing.assert_allclose(cz, -0.3 * UM + (np.arange(12) + 0.5) * 0.05 * UM, atol=1e-15)
        k = int(np.argmin(np.abs(cz - data["line0_z"][0])))
        assert abs(cz[k] - data["line0_z"][0]) < 1e-15
        np.testing.assert_allclose(data["cell_ex"][:, k], ex[:, 0], rtol=1e-12)


@pytest.mark.parametrize("side", ["below", "above"])
def test_empty_cell_reproduces_incident_peak_field(side):
    """Incidence medium everywhere: the field must be the requested plane wave.

    Plane-wave relations Hy = n E0 / Z0, E perpendicular to k (Born & Wolf, Principles
    of Optics, 1999, sec. 1.4); the 1 % tolerance is common practice, no source.
    """
    _meep_or_skip()
    n, e0, th = 1.5, 2.5, np.deg2rad(20.0)
    lam = 0.8 * UM
    msgs = []
    p = FdtdProblem(size_z_m=1.0 * UM, z_min_m=-0.4 * UM, wavelength_m=lam,
                    period_x_m=0.15 * UM, pml_m=0.5 * UM, angle_rad=th, eps_incidence=n**2,
                    eps_background=n**2, side=side, cells_per_um=60,
                    amplitude_V_per_m=e0, lines=(("z", 0.07 * UM), ("x", 0.37 * UM)))
    r = run_fdtd(p, progress=msgs.append)
    assert r.converged
    assert any(m.startswith("calibration") for m in msgs)
    assert any(m.startswith("structure") for m in msgs)
    k = 2 * np.pi * n / lam
    sgn = 1 if side == "below" else -1
    kx, kz = k * np.sin(th), sgn * k * np.cos(th)
    for line in r.lines:
        e_mag = np.sqrt(np.abs(line.ex) ** 2 + np.abs(line.ez) ** 2)
        np.testing.assert_allclose(e_mag, e0, rtol=0.01)
        np.testing.assert_allclose(np.abs(line.hy), n * e0 / Z0, rtol=0.01)
        # transverse: E . k_hat = 0
        assert np.max(np.abs(line.ex * kx + line.ez * kz)) / (k * e0) < 0.01
        # polarization vector of the convention: E0 (sgn cos, -sin) for Hy = +n E0 / Z0
        ref_hy = n * e0 / Z0 * np.exp(1j * (kx * line.x + kz * line.z))
        np.testing.assert_allclose(line.hy, ref_hy, rtol=0, atol=0.02 * n * e0 / Z0)
        np.testing.assert_allclose(line.ex, sgn * np.cos(th) * ref_hy * Z0 / n, atol=0.02 * e0)
        np.testing.assert_allclose(line.ez, -np.sin(th) * ref_hy * Z0 / n, atol=0.02 * e0)
    # E and H were calibrated independently; their ratio in the raw Meep fields must be
    # the handedness mapping Hy = -Meep Hz up to the half-step time offset.
    ratio = complex(*r.info["calibration"]["handedness_ratio"])
    half = r.info["calibration"]["half_step_phase_rad"]
    assert abs(abs(ratio) - 1) < 0.01
    assert abs(np.angle(ratio)) < 1.5 * half + 1e-3


@pytest.mark.parametrize("eps_film", [4.0, 4.0 + 0.4j])
def test_film_at_oblique_incidence_matches_airy(eps_film):
    """n = 2 film (and a lossy one), 200 nm, 800 nm, 30 deg, TM, against the closed form."""
    _meep_or_skip()
    res = 100
    r = run_fdtd(_film_problem(eps_film, res))
    line = r.lines[0]
    k0, th, d = 2 * np.pi / (0.8 * UM), np.deg2rad(30.0), 0.2 * UM
    hy, ex, ez = layer_fields_tm(line.z, line.x, [1, eps_film, 1], [d], k0, k0 * np.sin(th),
                                 1 / Z0)
    dx = r.grid_step_m
    # Ez jumps at the interfaces; samples within a pixel of one mix both sides
    off = (np.abs(line.z) > 1.01 * dx) & (np.abs(line.z - d) > 1.01 * dx)
    assert _rel_err(line.hy, hy) < 0.02
    assert _rel_err(line.ex, ex) < 0.02
    assert _rel_err(line.ez, ez, off) < 0.02
    assert r.converged


def test_film_lit_from_above_is_the_mirror_image():
    """Incidence from above: the z-mirror of the closed form (Hy, Ez even, Ex odd)."""
    _meep_or_skip()
    r = run_fdtd(_film_problem(4.0, 80, side="above"))
    line = r.lines[0]
    k0, th, d = 2 * np.pi / (0.8 * UM), np.deg2rad(30.0), 0.2 * UM
    hy, ex, ez = layer_fields_tm(-line.z, line.x, [1, 4.0, 1], [d], k0, k0 * np.sin(th), 1 / Z0)
    dx = r.grid_step_m
    off = (np.abs(line.z) > 1.01 * dx) & (np.abs(line.z + d) > 1.01 * dx)
    assert _rel_err(line.hy, hy) < 0.02
    assert _rel_err(line.ex, -ex) < 0.02
    assert _rel_err(line.ez, ez, off) < 0.02


def test_total_internal_reflection_decay_constant():
    """Glass (n = 1.5) to air at 60 deg: evanescent field ~ exp(-kappa z) above the surface,
    kappa = k0 sqrt(n^2 sin^2 t - 1) (Born & Wolf, Principles of Optics, 1999, sec. 1.5.4).
    """
    _meep_or_skip()
    n, th, lam = 1.5, np.deg2rad(60.0), 0.8 * UM
    p = FdtdProblem(size_z_m=1.4 * UM, z_min_m=-0.5 * UM, wavelength_m=lam, period_x_m=0.1 * UM,
                    pml_m=0.5 * UM, angle_rad=th, eps_incidence=n**2, side="below",
                    cells_per_um=80,
                    polygons=(_slab(-5 * UM, 0.0, n**2),), lines=(("z", 0.03 * UM),))
    r = run_fdtd(p)
    line = r.lines[0]
    k0 = 2 * np.pi / lam
    kappa = k0 * np.sqrt(n**2 * np.sin(th) ** 2 - 1)
    air = (line.z > 0.05 * UM) & (line.z < 0.6 * UM)
    slope = np.polyfit(line.z[air], np.log(np.abs(line.hy[air])), 1)[0]
    assert abs(-slope / kappa - 1) < 0.01
    slope_ex = np.polyfit(line.z[air], np.log(np.abs(line.ex[air])), 1)[0]
    assert abs(-slope_ex / kappa - 1) < 0.01
    # and the whole field, against the Fresnel coefficients with imaginary kz
    hy, ex, ez = layer_fields_tm(line.z, line.x, [n**2, 1.0], [], k0, n * k0 * np.sin(th),
                                 n / Z0)
    off = np.abs(line.z) > 1.01 * r.grid_step_m
    assert _rel_err(line.hy, hy) < 0.02
    assert _rel_err(line.ex, ex) < 0.02
    assert _rel_err(line.ez, ez, off) < 0.02


@pytest.mark.slow
def test_equivalent_bloch_vector_gives_the_same_fields():
    """kx and kx + 2 pi / period are the same Bloch problem (F. Bloch, Z. Phys. 52, 555, 1929)."""
    _meep_or_skip()
    p = _film_problem(4.0, 30)
    q = dataclasses.replace(p, bloch_kx=p.kx_incident - 2 * np.pi / p.period_x_m)
    a, b = run_fdtd(p).lines[0], run_fdtd(q).lines[0]
    np.testing.assert_allclose(b.hy, a.hy, rtol=0, atol=1e-6 * np.max(np.abs(a.hy)))


@pytest.mark.slow
def test_film_at_normal_incidence_in_a_cell_with_pml_on_x():
    """Non-periodic cell (PML on all sides), normal incidence, film through the x PML:
    the Airy closed form (Born & Wolf, Principles of Optics, 1999, sec. 1.6) on the axis."""
    _meep_or_skip()
    d = 0.2 * UM
    p = FdtdProblem(size_z_m=1.2 * UM, z_min_m=-0.5 * UM, wavelength_m=0.8 * UM,
                    size_x_m=1.6 * UM, x_min_m=-0.8 * UM, pml_m=0.5 * UM, cells_per_um=50,
                    polygons=(_slab(0, d, 4.0),), lines=(("z", 0.0), ("x", 0.5 * UM)))
    r = run_fdtd(p)
    axis, top = r.lines
    k0 = 2 * np.pi / (0.8 * UM)
    hy, ex, _ = layer_fields_tm(axis.z, axis.x, [1, 4.0, 1], [d], k0, 0.0, 1 / Z0)
    assert _rel_err(axis.hy, hy) < 0.02
    assert _rel_err(axis.ex, ex) < 0.02
    assert np.max(np.abs(axis.ez)) < 0.01
    # transmitted wave uniform across the middle half of the width
    _, ex_top, _ = layer_fields_tm(top.z, top.x, [1, 4.0, 1], [d], k0, 0.0, 1 / Z0)
    mid = np.abs(top.x) < 0.4 * UM
    assert _rel_err(top.ex, ex_top, mid) < 0.02


def test_failing_worker_raises_with_its_exit_code(monkeypatch):
    _meep_or_skip()
    # a launch prefix that ignores the command and fails stands in for a crashed worker
    monkeypatch.setenv("VELOMATCH_MEEP_LAUNCH", "false")
    with pytest.raises(FdtdWorkerError, match="exit code 1"):
        run_fdtd(_film_problem(4.0, 20))


def test_wall_time_guard_stops_the_worker():
    _meep_or_skip()
    p = _film_problem(4.0, 200)
    with pytest.raises(FdtdWorkerError, match="wall-time limit"):
        run_fdtd(p, timeout_s=0.5)


@pytest.mark.slow
def test_film_error_falls_with_grid_step_at_second_order():
    """Yee scheme: field error ~ dx^2 (A. Taflove & S. C. Hagness, Computational
    Electrodynamics, 3rd ed., 2005, ch. 4); expect a ratio near (120/40)^2 = 9."""
    _meep_or_skip()
    errs = []
    k0, th, d = 2 * np.pi / (0.8 * UM), np.deg2rad(30.0), 0.2 * UM
    for res in (40, 120):
        line = run_fdtd(_film_problem(4.0, res)).lines[0]
        hy, _, _ = layer_fields_tm(line.z, line.x, [1, 4.0, 1], [d], k0, k0 * np.sin(th), 1 / Z0)
        errs.append(_rel_err(line.hy, hy))
    assert errs[0] / errs[1] > 5
