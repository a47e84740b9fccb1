"""Candidate comparison: common footing, ranking, ±10 nm tolerance, bandwidths.

Checked against the closed-form coupling of a film crossed normally (Airy fields of
M. Born & E. Wolf, *Principles of Optics*, ch. 1; written out in test_sweep.py):
the bandwidth edges are the roots of |beta_c(x)| / |beta_c(x0)| = 1/sqrt(2), found
here with scipy.optimize.brentq on the closed form.
"""

from __future__ import annotations

import copy
import json
import math
import types

import numpy as np
import pytest
import tomli_w
from scipy.optimize import brentq
from test_sweep import FILM, closed_form_evaluator, film_beta_c

from designer.compare import compare_candidates, compare_command, make_candidates
from designer.errors import UsageError
from designer.spec import load_spec

LEVEL = 1 / math.sqrt(2)


def film(thickness_nm: float, angle_deg: float, **beam) -> dict:
    raw = copy.deepcopy(FILM)
    raw["sample"]["thickness_nm"] = thickness_nm
    raw["laser"]["angle_deg"] = angle_deg
    raw["beam"].update(beam)
    return raw


def write_specs(tmp_path, raws: dict[str, dict]) -> list[str]:
    paths = []
    for name, raw in raws.items():
        p = tmp_path / f"{name}.toml"
        p.write_text(tomli_w.dumps(raw))
        paths.append(str(p))
    return paths


def run_compare(tmp_path, raws, evaluator=closed_form_evaluator):
    specs = [load_spec(p) for p in write_specs(tmp_path, raws)]
    candidates, footing = make_candidates(specs)
    return compare_candidates(candidates, footing, evaluator=evaluator, workers=0)


def first_crossing(ratio, x0: float, direction: int, limit: float, step: float) -> float | None:
    """First x from x0 towards ``limit`` where ratio(x) falls below 1/sqrt(2) (brentq)."""
    a = x0
    while (limit - a) * direction > 0:
        b = a + direction * step
        if (b - limit) * direction > 0:
            b = limit
        if ratio(b) < LEVEL <= ratio(a):
            return brentq(lambda x: ratio(x) - LEVEL, a, b, xtol=1e-10)
        a = b
    return None


def test_footing_is_the_first_spec_and_the_ranking_follows_the_coupling(tmp_path):
    raws = {"thin": film(200.0, 40.0),
            "thick": film(1000.0, 60.0, voltage_kV=100.0),     # other beam: replaced
            "mid": film(600.0, 40.0)}
    raws["mid"]["laser"]["wavelength_nm"] = 1030.0           # other laser: replaced
    data = run_compare(tmp_path, raws)
    f = data["footing"]
    assert f["from"].endswith("thin.toml")
    assert f["beam"] == {"voltage_kV": 200.0} and f["laser"] == {"wavelength_nm": 800.0}
    assert sorted(p.rsplit("/", 1)[-1] for p in f["changed"]) == ["mid.toml", "thick.toml"]
    expected = {}
    for name, (d, angle) in {"thin": (200, 40), "thick": (1000, 60), "mid": (600, 40)}.items():
        expected[name] = film_beta_c(film(d, angle))       # 200 kV, 800 nm, own angle
    by_name = {e["name"]: e for e in data["candidates"]}
    for name, beta in expected.items():
        assert by_name[name]["coupling"]["beta_c"] == pytest.approx(beta, rel=1e-12)
        assert by_name[name]["angle_deg"] == pytest.approx(raws[name]["laser"]["angle_deg"])
    assert data["ranking"] == sorted(expected, key=lambda n: -expected[n])
    assert [e["rank"] for e in data["candidates"]] == [1, 2, 3]


def test_tolerance_is_the_worst_of_the_plus_minus_10_nm_films(tmp_path):
    data = run_compare(tmp_path, {"a": film(600.0, 40.0)})
    tol = data["candidates"][0]["tolerance_10nm"]
    nominal = film_beta_c(film(600.0, 40.0))
    ratios = {s: film_beta_c(film(600.0 + s, 40.0)) / nominal for s in (10.0, -10.0)}
    assert [p["parameter"] for p in tol["per_parameter"]] == ["sample.thickness_nm"] * 2
    assert tol["worst_ratio"] == pytest.approx(min(ratios.values()), rel=1e-12)
    assert tol["worst_change_nm"] == min(ratios, key=ratios.get)


def _check_band(band: dict, ratio, x0: float, lo_limit: float, hi_limit: float, step: float,
                tol: float) -> int:
    """Compare the reported band edges with the closed-form roots; count edges checked."""
    checked = 0
    for side, direction, limit in (("low", -1, lo_limit), ("high", 1, hi_limit)):
        root = first_crossing(ratio, x0, direction, limit, step)
        if root is None:
            assert band["lower_bound"] is True
            assert band[side] == pytest.approx(limit, abs=1e-9)
        else:
            assert band[side] == pytest.approx(root, abs=tol), side
            checked += 1
    assert band["full_width"] == pytest.approx(band["high"] - band["low"])
    return checked


@pytest.mark.parametrize("thickness_nm, angle_deg", [(1000.0, 60.0), (600.0, 40.0)])
def test_bandwidths_are_the_half_power_edges_of_the_closed_form(tmp_path, thickness_nm,
                                                               angle_deg):
    e = run_compare(tmp_path, {"a": film(thickness_nm, angle_deg)})["candidates"][0]
    b0 = film_beta_c(film(thickness_nm, angle_deg))

    def angle_ratio(a):
        return film_beta_c(film(thickness_nm, a)) / b0

    def wavelength_ratio(lam):
        raw = film(thickness_nm, angle_deg)
        raw["laser"]["wavelength_nm"] = lam
        return film_beta_c(raw) / b0

    checked = _check_band(e["angular_bandwidth_deg"], angle_ratio, angle_deg,
                          max(angle_deg - 32.0, -89.5), min(angle_deg + 32.0, 89.5), 0.05,
                          tol=0.05)
    checked += _check_band(e["spectral_bandwidth_nm"], wavelength_ratio, 800.0,
                           800.0 * 0.84, 800.0 * 1.16, 0.5, tol=0.3)
    assert checked >= 2     # these films have edges inside the scans (not just bounds)


def test_compare_command_writes_json_and_report_and_keeps_a_full_folder(tmp_path):
    paths = write_specs(tmp_path, {"a": film(200.0, 40.0), "b": film(600.0, 40.0)})
    out = tmp_path / "out"
    args = types.SimpleNamespace(specs=paths, out=str(out), overwrite=False)
    assert compare_command(args, evaluator=closed_form_evaluator, workers=0) == 0
    data = json.loads((out / "compare.json").read_text())
    assert {e["name"] for e in data["candidates"]} == {"a", "b"}
    html = (out / "report.html").read_text()
    assert "<img" in html and "data:image/png;base64," in html
    for e in data["candidates"]:
        assert e["name"] in html
    with pytest.raises(UsageError, match="not empty"):
        compare_command(args, evaluator=closed_form_evaluator, workers=0)


@pytest.mark.slow
def test_real_pipeline_comparison_matches_the_closed_form(tmp_path):
    raws = {"a": film(1000.0, 60.0)}
    real = run_compare(tmp_path, raws, evaluator=_real())["candidates"][0]
    closed = run_compare(tmp_path, raws)["candidates"][0]
    assert real["coupling"]["beta_c"] == pytest.approx(closed["coupling"]["beta_c"], rel=1e-9)
    assert real["tolerance_10nm"]["worst_ratio"] == pytest.approx(
        closed["tolerance_10nm"]["worst_ratio"], rel=1e-9)
    for key in ("angular_bandwidth_deg", "spectral_bandwidth_nm"):
        assert real[key]["full_width"] == pytest.approx(closed[key]["full_width"], rel=1e-6)
    assert np.isfinite(real["coupling"]["damage_factor"])


def _real():
    from designer.evaluate import evaluate_raw

    return evaluate_raw


def test_laser_spreads_of_a_100_fs_pulse_and_a_20_um_spot():
    """Transform-limited Gaussian, 100 fs at 800 nm: dlambda = 0.4413 lambda²/(c tau)
    = 9.42 nm (A. E. Siegman, Lasers, 1986, ch. 9); Gaussian beam of w0 = 20 um:
    theta0 = lambda/(pi w0) = 12.73 mrad (Siegman ch. 17)."""
    from designer.compare import laser_spreads

    s = laser_spreads({"laser": {"wavelength_nm": 800.0, "duration_fs": 100.0,
                                 "spot_radius_um": 20.0}})
    assert s["spectral_fwhm_nm"] == pytest.approx(9.42, abs=0.01)
    assert math.radians(s["angular_half_width_deg"]) == pytest.approx(12.73e-3, rel=1e-3)
    assert laser_spreads({"laser": {"wavelength_nm": 800.0}}) == {
        "spectral_fwhm_nm": None, "angular_half_width_deg": None}


def test_spread_average_of_a_gaussian_response_is_the_closed_form():
    """A Gaussian response exp(-x²/2s²) averaged over a Gaussian of rms sigma is
    s/sqrt(s² + sigma²) (Gaussian convolution, closed form)."""
    from designer.compare import spread_average

    s = 2.0
    x = np.linspace(-30.0, 30.0, 2001)
    curve = list(zip(x, np.exp(-x**2 / (2 * s**2))))
    fwhm = 3.0
    sigma = fwhm / (2 * math.sqrt(2 * math.log(2)))
    assert spread_average(curve, fwhm, "spectral") == pytest.approx(
        s / math.hypot(s, sigma), rel=1e-3)
    theta0 = 1.5                                  # 1/e² half-angle: rms theta0 / 2
    assert spread_average(curve, theta0, "angular") == pytest.approx(
        s / math.hypot(s, theta0 / 2), rel=1e-3)
    assert spread_average(curve, None, "angular") == 1.0


def test_ranking_is_on_the_pulse_and_divergence_averaged_coupling(tmp_path):
    """A 10 fs pulse and a 1 um spot (spreads of ~94 nm and ~14 deg) against the
    quadrature of the closed-form film over the same Gaussians: the averaged coupling
    within 1 % (the scan is interpolated linearly between its points)."""
    raw = film(1000.0, 60.0)
    raw["laser"].update(duration_fs=10.0, spot_radius_um=1.0)
    data = run_compare(tmp_path, {"a": raw})
    e = data["candidates"][0]
    avg = e["bandwidth_average"]
    b0 = film_beta_c(raw)
    sig_l = avg["spectral_fwhm_nm"] / (2 * math.sqrt(2 * math.log(2)))
    lams = np.linspace(-4 * sig_l, 4 * sig_l, 161)
    w = np.exp(-0.5 * (lams / sig_l) ** 2)
    r = []
    for d in lams:
        q = copy.deepcopy(raw)
        q["laser"]["wavelength_nm"] = 800.0 + d
        r.append(film_beta_c(q) / b0)
    spectral = float(np.sum(w * r) / np.sum(w))
    sig_a = 0.5 * avg["angular_half_width_deg"]
    angles = np.linspace(-4 * sig_a, 4 * sig_a, 161)
    w = np.exp(-0.5 * (angles / sig_a) ** 2)
    r = [film_beta_c(film(1000.0, 60.0 + d)) / b0 for d in angles]
    angular = float(np.sum(w * r) / np.sum(w))
    assert avg["spectral_ratio"] == pytest.approx(spectral, rel=0.01)
    assert avg["angular_ratio"] == pytest.approx(angular, rel=0.01)
    assert avg["beta_c"] == pytest.approx(b0 * spectral * angular, rel=0.02)
    assert data["ranked_on"].startswith("bandwidth_average")


def test_hole_candidates_keep_their_own_azimuth_polarization_and_path(tmp_path):
    """How a hole array is lit and crossed is its own (structural, no source)."""
    holes = copy.deepcopy(FILM)
    holes["sample"] = {"family": "membrane", "material": {"n": 2.0}, "thickness_nm": 100.0,
                       "pattern": "holes", "lattice": "hexagonal", "period_nm": 500.0,
                       "hole_axes_nm": [120.0, 80.0], "hole_angle_deg": 30.0}
    holes["laser"].update(azimuth_deg=30.0, polarization="s", wavelength_nm=900.0)
    holes["path"] = {"x_nm": 40.0, "y_nm": 60.0}
    holes["solver"] = {"fourier_orders": 2}
    first = film(200.0, 40.0)
    first["laser"]["azimuth_deg"] = 10.0
    first["solver"] = {"method": "auto"}
    specs = [load_spec(p) for p in write_specs(tmp_path, {"f": first, "h": holes})]
    candidates, footing = make_candidates(specs)
    h = candidates[1]
    assert h.raw["laser"]["azimuth_deg"] == 30.0 and h.raw["laser"]["polarization"] == "s"
    assert h.raw["laser"]["wavelength_nm"] == 800.0          # the common laser
    assert h.raw["path"] == {"x_nm": 40.0, "y_nm": 60.0}
    assert "azimuth_deg" not in footing["laser"]
    assert {k for k, _, _ in h.variants} == {"sample.thickness_nm", "sample.period_nm",
                                             "sample.hole_axes_nm.0",
                                             "sample.hole_axes_nm.1"}
