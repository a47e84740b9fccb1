"""The evaluation pipeline (spec -> fields -> coupling) against independent references."""

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import constants as sc

from designer.evaluate import coupling_figures, evaluate, fdfd_problem, run_fdfd
from designer.spec import parse_spec

VELOMATCH = str(Path(sys.executable).with_name("velomatch"))


def film_raw(method, side="below"):
    return {
        "beam": {"voltage_kV": 100.0},
        "laser": {"wavelength_nm": 800.0, "angle_deg": 30.0, "from": side},
        "sample": {"family": "membrane", "material": {"n": 2.0}, "thickness_nm": 120.0,
                   "pattern": "none"},
        "path": {"x_nm": 0.0},
        "solver": {"method": method, "refine": False, "grid_step_nm": 8.0},
    }


@pytest.mark.parametrize("side", ["below", "above"])
def test_film_fdfd_matches_exact_layer_stack(side):
    # Two independent methods: the FDFD grid solution with Floquet tails against the
    # exact transfer-matrix solution (itself checked against Born & Wolf's Airy formulas
    # in test_layers.py). Complex difference (magnitude and phase), tolerance 0.5 %
    # (issue 4). Lit from above too: the incident phase is referred to z = 0 in both.
    exact = evaluate(parse_spec(film_raw("layers", side)))
    grid = evaluate(parse_spec(film_raw("fdfd", side)))
    assert abs(grid.run.integral_V - exact.run.integral_V) / abs(exact.run.integral_V) < 5e-3


def test_prism_evanescent_coupling_closed_form():
    # Total internal reflection in a medium of index n at the phase-matched angle
    # (n sin(theta) = c/v): the field above the surface is evanescent with decay
    # constant kappa = omega / (c beta gamma) (closed form of the synchronous evanescent order).
    # p-polarized Fresnel transmission of the magnetic field (Born & Wolf, Principles of
    # Optics, ch. 1.5): t_H = 2 (kz1/eps1) / (kz1/eps1 + kz2/eps2), incident
    # Hy = n E0 / Z0; above the surface Ex = kz2 / (omega eps0) Hy_t exp(-kappa z) with
    # kz2 = i kappa. At phase matching the coupling over L is I = Ex(z) L.
    n, kv, lam, offset, length = 2.0, 200.0, 800e-9, 100e-9, 10e-6
    raw = {"beam": {"voltage_kV": kv},
           "laser": {"wavelength_nm": lam * 1e9},
           "sample": {"family": "prism", "material": {"n": n}},
           "path": {"offset_nm": offset * 1e9, "length_um": length * 1e6}}
    ev = evaluate(parse_spec(raw))
    gamma = 1 + kv * 1e3 * sc.e / (sc.m_e * sc.c**2)
    beta = math.sqrt(1 - 1 / gamma**2)
    omega = 2 * math.pi * sc.c / lam
    theta = math.asin(1 / (n * beta))
    assert math.degrees(ev.angle_rad) == pytest.approx(math.degrees(theta), abs=1e-9)
    k0 = omega / sc.c
    kappa = omega / (sc.c * beta * gamma)
    kz1 = n * k0 * math.cos(theta)
    kz2 = 1j * kappa
    t_h = 2 * (kz1 / n**2) / (kz1 / n**2 + kz2 / 1.0)
    hy_i = n * 1.0 / math.sqrt(sc.mu_0 / sc.epsilon_0)
    ex = kz2 / (omega * sc.epsilon_0) * hy_i * t_h * math.exp(-kappa * offset)
    expected = abs(ex) * length
    assert abs(ev.run.integral_V) == pytest.approx(expected, rel=1e-6)
    figures = coupling_figures(ev)
    assert figures["structure_factor"] == pytest.approx(abs(ex), rel=1e-6)


def test_lattice_sum_matches_five_period_supercell():
    # Brute force (common practice, no source): solve one period with Bloch phase, use
    # I_N = I_1 sum_n exp(i (k_x - w/v) n Lambda); against a 5-period supercell with the
    # same Bloch wavevector integrated directly along the whole length. The grating is
    # detuned (period 10 % off phase matching) so the lattice sum is not trivially N.
    from solvers import coupling
    from solvers.fdfd import solve
    from solvers.grid import Grid

    raw = {"beam": {"voltage_kV": 30.0},
           "laser": {"wavelength_nm": 800.0, "angle_deg": 0.0},
           "sample": {"family": "grating", "material": {"n": 1.45}, "sides": 1,
                      "period_nm": 0.9 * 0.32838 * 800.0, "duty_cycle": 0.5,
                      "tooth_height_nm": 200.0, "substrate": True},
           "path": {"offset_nm": 40.0, "length_um": 5 * 0.9 * 0.32838 * 0.8},
           "solver": {"grid_step_nm": 12.0, "refine": False}}
    spec = parse_spec(raw)
    one = run_fdfd(spec, 12e-9)
    layout = one.layout
    from designer.families import get_family

    family = get_family("grating")
    eps_x, eps_z = (np.asarray(a) for a in family.permittivity(spec.sample, layout))
    g = layout.grid
    big = Grid(nx=5 * g.nx, nz=g.nz, dx=g.dx, dz=g.dz, x0=g.x0, z0=g.z0)
    problem = fdfd_problem(layout, one.fields.omega)
    problem5 = type(problem)(grid=big, omega=problem.omega, pml=problem.pml,
                             source=problem.source, bloch_kx=one.fields.bloch_kx)
    fields5 = solve(problem5, np.tile(eps_x, (5, 1)), np.tile(eps_z, (5, 1)))
    v = spec.beam.velocity_m_per_s
    # supercell: one "period" of the kernel is the whole 5-period cell
    rows = coupling.vacuum_ex_rows(np.tile(eps_x, (5, 1)), np.tile(eps_z, (5, 1)),
                                   int((layout.path.z_m - g.z0) // g.dz), layout.pml_cells_z)
    direct, _ = coupling.coupling_along_x(fields5, layout.path.z_m, v, n_periods=1,
                                          rows=rows)
    assert abs(one.integral_V - complex(direct)) / abs(complex(direct)) < 2e-3
    # and the detuned sum is clearly below N |I_1|
    _, i1 = coupling.coupling_along_x(one.fields, layout.path.z_m, v, n_periods=1)
    assert abs(one.integral_V) < 0.9 * 5 * abs(complex(i1))


def test_evaluate_json_contract(tmp_path):
    spec = tmp_path / "film.toml"
    spec.write_text("""\
[beam]
voltage_kV = 100.0
[laser]
wavelength_nm = 800.0
angle_deg = 30.0
peak_field_V_per_m = 2.0e8
[sample]
family = "membrane"
material = "silicon_nitride"
thickness_nm = 100.0
pattern = "none"
[path]
x_nm = 0.0
""")
    out = subprocess.run([VELOMATCH, "evaluate", str(spec), "--json"], capture_output=True,
                         text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    data = json.loads(out.stdout)
    assert set(data["electron"]) >= {"voltage_V", "beta", "gamma"}
    assert set(data["laser"]) >= {"wavelength_m", "angle_deg", "peak_field_V_per_m"}
    keys = {"integral_V", "beta_c", "beta_c_per_field_m_per_V", "interaction_length_m",
            "gradient_V_per_m", "structure_factor", "max_field_in_material_V_per_m",
            "damage_factor", "relative_error_estimate"}
    assert set(data["coupling"]) >= keys
    assert set(data["provenance"]) >= {"version", "spec_sha256", "solver", "grid_step_m"}
    c = data["coupling"]
    # couplings scale linearly with the field: beta_c = (beta_c per field) * E0
    assert c["beta_c"] == pytest.approx(c["beta_c_per_field_m_per_V"] * 2.0e8, rel=1e-12)
    assert c["interaction_length_m"] is None


def test_empty_domain_does_not_couple():
    # A plane wave in vacuum cannot exchange net energy with an electron moving on a
    # straight line at v < c (the Lawson-Woodward theorem; J. D. Lawson, IEEE Trans.
    # Nucl. Sci. 26, 4217, 1979 — citation from memory). The FDFD domain with the film
    # replaced by vacuum, Floquet tails included, must couple < 1e-6 of the film.
    film = evaluate(parse_spec(film_raw("fdfd")))
    raw = film_raw("fdfd")
    raw["sample"]["material"] = {"n": 1.0}
    empty = evaluate(parse_spec(raw))
    assert abs(empty.run.integral_V) < 1e-6 * abs(film.run.integral_V)


def test_laser_spot_footprint_reduces_prism_coupling():
    # A Gaussian spot of 1/e^2 radius w across the beam, incident at theta, lights the
    # surface with a footprint of radius w / cos(theta); at phase matching the coupling
    # over L is Ex * integral of exp(-(s - L/2)^2 / r^2) = Ex sqrt(pi) r erf(L / 2r)
    # (Abramowitz & Stegun 7.1.1).
    from scipy.special import erf

    raw = {"beam": {"voltage_kV": 200.0},
           "laser": {"wavelength_nm": 800.0},
           "sample": {"family": "prism", "material": {"n": 2.0}},
           "path": {"offset_nm": 100.0, "length_um": 10.0}}
    plain = evaluate(parse_spec(raw))
    raw["laser"]["spot_radius_um"] = 4.0
    lit = evaluate(parse_spec(raw))
    r = 4e-6 / math.cos(lit.angle_rad)
    ratio = math.sqrt(math.pi) * r * erf(10e-6 / (2 * r)) / 10e-6
    assert abs(lit.run.integral_V) == pytest.approx(ratio * abs(plain.run.integral_V), rel=1e-9)


def test_electron_spot_average_above_a_prism():
    # Above a totally reflecting surface |beta_c(z)| = |beta_c(z0)| exp(-kappa (z - z0))
    # (evanescent decay, kappa = omega / (c beta gamma)). A Gaussian
    # electron spot of standard deviation sigma across the height then sees
    # <|beta_c|> = |beta_c(z0)| exp(kappa^2 sigma^2 / 2) (the Gaussian moment-generating
    # function; common practice, no source), up to the +-3 sigma truncation (< 1e-3).
    from designer.evaluate import coupling_figures

    kv, lam, fwhm = 200.0, 800e-9, 60e-9
    raw = {"beam": {"voltage_kV": kv},
           "laser": {"wavelength_nm": lam * 1e9},
           "sample": {"family": "prism", "material": {"n": 2.0}},
           "path": {"offset_nm": 200.0, "length_um": 10.0, "electron_spot_nm": fwhm * 1e9}}
    ev = evaluate(parse_spec(raw))
    fig = coupling_figures(ev)
    gamma = 1 + kv * 1e3 * sc.e / (sc.m_e * sc.c**2)
    beta = math.sqrt(1 - 1 / gamma**2)
    kappa = 2 * math.pi / (beta * gamma * lam)
    sigma = fwhm / (2 * math.sqrt(2 * math.log(2)))
    expected = fig["beta_c"] * math.exp((kappa * sigma) ** 2 / 2)
    assert fig["spot_average"]["mean_beta_c"] == pytest.approx(expected, rel=1e-3)
    assert fig["spot_average"]["fraction_in_clear_gap"] == pytest.approx(1.0, abs=1e-6)
    # the height map decays with the closed-form constant
    z = np.asarray(fig["height_map"]["z_m"])
    b = np.asarray(fig["height_map"]["beta_c"])
    slope = np.polyfit(z, np.log(b), 1)[0]
    assert -slope == pytest.approx(kappa, rel=1e-6)


def test_grating_spot_clipped_by_the_teeth():
    # A spot centred 10 nm above the tooth tops with FWHM 40 nm: the share of the
    # current above the teeth is Phi(10 nm / sigma) for a Gaussian (common practice, no
    # source), counting from where the clear gap starts: the first grid row whose
    # neighbouring cells hold no material, within two rows of the tooth tops.
    from scipy.stats import norm

    from designer.evaluate import coupling_figures

    raw = {"beam": {"voltage_kV": 30.0},
           "laser": {"wavelength_nm": 800.0},
           "sample": {"family": "grating", "material": {"n": 1.45}, "duty_cycle": 0.5,
                      "tooth_height_nm": 200.0},
           "path": {"offset_nm": 10.0, "length_um": 5.0, "electron_spot_nm": 40.0},
           "solver": {"grid_step_nm": 10.0, "refine": False}}
    ev = evaluate(parse_spec(raw))
    fig = coupling_figures(ev)
    dz = ev.run.layout.grid.dz
    z0 = fig["height_map"]["z_m"][0]
    assert 200e-9 <= z0 <= 200e-9 + 2 * dz + 1e-12
    sigma = 40e-9 / (2 * math.sqrt(2 * math.log(2)))
    expected = norm.cdf((10e-9 - (z0 - 200e-9)) / sigma)
    assert fig["spot_average"]["fraction_in_clear_gap"] == pytest.approx(expected, rel=1e-9)
