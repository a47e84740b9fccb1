"""Sweeps: --vary parsing, caching and resuming, Dask vs local pool, film resonances.

The machinery tests use a closed-form evaluator (the coupling of a film crossed
normally, from the Airy fields; M. Born & E. Wolf, *Principles of Optics*, ch. 1.6
and 7.6.1) so that they cost nothing; the physics tests run the real pipeline
(``designer.evaluate.evaluate_raw`` with ``[solver] method = "layers"``) and compare
it with that closed form, written here independently of ``solvers/layers.py``.
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
import tomllib
import types

import numpy as np
import pytest
from scipy import constants as sc
from scipy.optimize import minimize_scalar

from designer.errors import SpecError, UsageError
from designer.sweep import (
    guide_orders,
    guide_positions,
    parse_vary,
    plan_sweep,
    run_sweep,
    sweep_command,
)

FILM = {
    "beam": {"voltage_kV": 200.0},
    "laser": {"wavelength_nm": 800.0, "angle_deg": 40.0},
    "sample": {"family": "membrane", "material": {"n": 3.5}, "thickness_nm": 200.0},
    "solver": {"method": "layers"},
}


# -- closed form (independent of solvers/layers.py) ---------------------------------

def electron_beta(voltage_V: float) -> float:
    """beta from gamma = 1 + eU/(m_e c^2) (CODATA constants)."""
    gamma = 1.0 + sc.e * voltage_V / (sc.m_e * sc.c**2)
    return math.sqrt(1.0 - 1.0 / gamma**2)


def film_coefficients(d, n, theta, lam):
    """Airy reflection/transmission of a film (index n, thickness d) in vacuum for p
    polarization, as Hy amplitude ratios, and the two Hy amplitudes inside.

    r = (r12 + r23 e^{2i b}) / (1 + r12 r23 e^{2i b}), b = kz2 d, with the Fresnel
    coefficients of Hy r_ij = (kz_i/eps_i - kz_j/eps_j)/(kz_i/eps_i + kz_j/eps_j)
    (M. Born & E. Wolf, Principles of Optics, sec. 1.5.2 and 1.6.4).
    """
    k = 2 * np.pi / lam
    kz1 = k * np.cos(theta)
    kz2 = k * np.sqrt(complex(n * n) - np.sin(theta) ** 2)
    y1, y2 = kz1, kz2 / (n * n)
    r12 = (y1 - y2) / (y1 + y2)
    r23 = -r12
    ph = np.exp(2j * kz2 * d)
    den = 1 + r12 * r23 * ph
    r = (r12 + r23 * ph) / den
    c_up = (1 + r12) / den             # forward Hy wave inside, referenced at z = 0
    c_dn = c_up * r23 * ph             # backward wave inside, referenced at z = 0
    t = c_up * np.exp(1j * kz2 * d) + c_dn * np.exp(-1j * kz2 * d)   # Hy continuous at d
    return r, t, c_up, c_dn, kz1, kz2


def film_integral(d, n, theta, lam, beta, e0=1.0):
    """I = int Ez(0, z) exp(-i w z / v) dz (V) through the film, incident p wave of peak
    field e0 from below, Ez = -kx Hy / (w eps0 eps).  Each plane-wave piece is
    integrated exactly; the outer media use the adiabatic limits
    int_{-inf}^0 e^{iqz} dz = 1/(iq) and int_d^inf e^{iq(z-d)} dz = -1/(iq)."""
    r, t, c_up, c_dn, kz1, kz2 = film_coefficients(d, n, theta, lam)
    k = 2 * np.pi / lam
    w = sc.c * k
    kap = w / (beta * sc.c)
    kx = k * np.sin(theta)
    h0 = e0 / math.sqrt(sc.mu_0 / sc.epsilon_0)
    pre = -kx * h0 / (w * sc.epsilon_0)
    qa, qb = kz1 - kap, -kz1 - kap
    below = 1 / (1j * qa) + r / (1j * qb)
    q2a, q2b = kz2 - kap, -kz2 - kap
    inside = (c_up * (np.exp(1j * q2a * d) - 1) / (1j * q2a)
              + c_dn * (np.exp(1j * q2b * d) - 1) / (1j * q2b)) / (n * n)
    above = t * np.exp(-1j * kap * d) * (-1 / (1j * qa))
    return pre * (below + inside + above)


def film_beta_c(raw: dict) -> float:
    """|beta_c| = e|I|/(2 hbar w) of a FILM-like raw spec (peak-field convention,
    F. J. Garcia de Abajo et al., Nano Lett. 10, 1859, 2010)."""
    lam = raw["laser"]["wavelength_nm"] * 1e-9
    e0 = raw["laser"].get("peak_field_V_per_m", 1.0)
    integral = film_integral(raw["sample"]["thickness_nm"] * 1e-9, raw["sample"]["material"]["n"],
                             math.radians(raw["laser"]["angle_deg"]), lam,
                             electron_beta(raw["beam"]["voltage_kV"] * 1e3), e0)
    return sc.e * abs(integral) / (2 * sc.hbar * 2 * math.pi * sc.c / lam)


def closed_form_evaluator(raw: dict, *, source: str = "<spec>", base_dir=None) -> dict:
    """A cheap stand-in for designer.evaluate.evaluate_raw on FILM-like specs."""
    lam = raw["laser"]["wavelength_nm"] * 1e-9
    d = raw["sample"]["thickness_nm"] * 1e-9
    e0 = raw["laser"].get("peak_field_V_per_m", 1.0)
    if not d > 0:
        raise ValueError("thickness must be > 0")
    integral = film_integral(d, raw["sample"]["material"]["n"],
                             math.radians(raw["laser"]["angle_deg"]), lam,
                             electron_beta(raw["beam"]["voltage_kV"] * 1e3), e0)
    beta = film_beta_c(raw)
    return {"electron": {"voltage_V": raw["beam"]["voltage_kV"] * 1e3},
            "laser": {"wavelength_m": lam, "angle_deg": raw["laser"]["angle_deg"],
                      "peak_field_V_per_m": e0},
            "coupling": {"integral_V": [integral.real, integral.imag], "beta_c": beta,
                         "beta_c_per_field_m_per_V": beta / e0,
                         "interaction_length_m": None, "gradient_V_per_m": abs(integral) / d,
                         "structure_factor": abs(integral) / d / e0,
                         "max_field_in_material_V_per_m": None, "damage_factor": None,
                         "relative_error_estimate": 0.0},
            "provenance": {"solver": "closed form (test)"}}


class Counting:
    """Counts calls (in this process: use workers=0); raises after ``fail_after``."""

    def __init__(self, fail_after: int | None = None):
        self.calls = 0
        self.fail_after = fail_after

    def __call__(self, raw, *, source="<spec>", base_dir=None):
        if self.fail_after is not None and self.calls >= self.fail_after:
            raise RuntimeError("simulated crash")
        self.calls += 1
        return closed_form_evaluator(raw, source=source, base_dir=base_dir)


def sha_of(raw: dict) -> str:
    """Hash of a point spec, computed here from its definition (canonical JSON)."""
    return hashlib.sha256(json.dumps(raw, sort_keys=True, separators=(",", ":")).encode()
                          ).hexdigest()


# -- --vary parsing ----------------------------------------------------------------

def test_parse_vary_forms():
    assert parse_vary("laser.angle_deg=0:30:4") == ("laser.angle_deg", (0, 10, 20, 30))
    key, values = parse_vary("thickness_nm=100:200.5:3")
    assert key == "thickness_nm" and values == (100.0, 150.25, 200.5)
    assert parse_vary("beam.voltage_kV=30:30:1") == ("beam.voltage_kV", (30,))
    key, values = parse_vary("x=0:1:11")
    assert values[3] == 0.3   # rounded to 12 digits, not 0.30000000000000004


@pytest.mark.parametrize("text, message", [
    ("laser.angle_deg", "KEY=START:STOP:N"),
    ("laser.angle_deg=0:30", "KEY=START:STOP:N"),
    ("laser.angle_deg=a:30:3", "START 'a' is not a number"),
    ("laser.angle_deg=0:30:2.5", "whole number"),
    ("laser.angle_deg=0:30:0", "at least 1"),
    ("laser.angle_deg=0:30:-3", "at least 1"),
    ("laser.angle_deg=0:30:1", "START = STOP"),
    ("laser.angle_deg=5:5:3", "use N = 1"),
    ("laser.angle_deg=0:inf:3", "finite"),
])
def test_parse_vary_rejects(text, message):
    with pytest.raises(UsageError, match=message):
        parse_vary(text)


def test_plan_rejects_unknown_keys_and_extra_axes():
    with pytest.raises(SpecError, match="no table of the spec has this key"):
        plan_sweep(FILM, ["thicknes_nm=1:2:2"])
    with pytest.raises(SpecError, match="unknown key"):
        plan_sweep(FILM, ["sample.thicknes_nm=100:200:2"])
    with pytest.raises(SpecError, match="unknown table"):
        plan_sweep(FILM, ["sampel.thickness_nm=100:200:2"])
    with pytest.raises(SpecError, match="thickness_nm"):
        plan_sweep(FILM, ["sample.thickness_nm=-10:200:2"])
    with pytest.raises(UsageError, match="at most two"):
        plan_sweep(FILM, ["thickness_nm=1:2:2", "angle_deg=1:2:2", "wavelength_nm=1:2:2"])
    with pytest.raises(UsageError, match="varied twice"):
        plan_sweep(FILM, ["thickness_nm=100:200:2", "sample.thickness_nm=1:2:2"])
    plan = plan_sweep(FILM, ["thickness_nm=100:200:2", "angle_deg=10:20:3"])
    assert [a.key for a in plan.axes] == ["sample.thickness_nm", "laser.angle_deg"]
    assert plan.shape == (2, 3)


def _spec_file(tmp_path, raw=FILM):
    import tomli_w

    path = tmp_path / "film.toml"
    path.write_text(tomli_w.dumps(raw))
    return path


def test_cli_reports_bad_vary_in_one_line(tmp_path, monkeypatch, capsys):
    from designer import cli, commands

    monkeypatch.setattr(commands, "run_sweep", sweep_command, raising=False)
    spec = _spec_file(tmp_path)
    for bad in ("thickness_nm=1:2", "sample.nope_nm=1:2:2", "thickness_nm=1:2:0"):
        code = cli.main(["sweep", str(spec), "--vary", bad, "--out", str(tmp_path / "o")])
        err = capsys.readouterr().err.strip()
        assert code == 2
        assert err.startswith("velomatch sweep: error:") and "\n" not in err
    assert not (tmp_path / "o").exists()


# -- outputs, cache, resume --------------------------------------------------------

def test_sweep_outputs_follow_the_contract(tmp_path):
    plan = plan_sweep(FILM, ["thickness_nm=100:300:3", "laser.angle_deg=20:60:3"])
    out = tmp_path / "s"
    res = run_sweep(plan, out, evaluator=closed_form_evaluator, workers=0)
    data = json.loads((out / "sweep.json").read_text())
    assert data["axes"] == {"sample.thickness_nm": [100, 200, 300],
                            "laser.angle_deg": [20, 40, 60]}
    assert len(data["points"]) == 9 and res.computed == 9 and res.cached == 0
    for p in data["points"]:
        raw = copy.deepcopy(FILM)
        raw["sample"]["thickness_nm"] = p["values"]["sample.thickness_nm"]
        raw["laser"]["angle_deg"] = p["values"]["laser.angle_deg"]
        # the point's numbers belong to its values, and its cache file to its spec
        assert p["coupling"]["beta_c"] == pytest.approx(film_beta_c(raw), rel=1e-12)
        assert set(p["coupling"]) >= {"integral_V", "beta_c", "structure_factor",
                                      "damage_factor"}
        cached = json.loads((out / "points" / f"{sha_of(raw)}.json").read_text())
        assert cached["result"]["coupling"]["beta_c"] == p["coupling"]["beta_c"]
    assert tomllib.loads((out / "spec.toml").read_text()) == FILM
    from PIL import Image

    img = np.asarray(Image.open(out / "sweep.png").convert("L"), dtype=float)
    assert img.shape[0] > 100 and img.std() > 1.0


def test_resume_recomputes_only_missing_points(tmp_path):
    plan = plan_sweep(FILM, ["thickness_nm=100:400:4", "angle_deg=20:50:3"])
    out = tmp_path / "s"
    crash = Counting(fail_after=5)
    with pytest.raises(RuntimeError, match="simulated crash"):
        run_sweep(plan, out, evaluator=crash, workers=0)
    assert len(list((out / "points").glob("*.json"))) == 5
    assert not (out / "sweep.json").exists()

    again = Counting()
    res = run_sweep(plan, out, evaluator=again, workers=0, plot=False)
    assert again.calls == 12 - 5 and res.computed == 7 and res.cached == 5
    first = json.loads((out / "sweep.json").read_text())

    nothing = Counting()
    run_sweep(plan, out, evaluator=nothing, workers=0, plot=False)
    assert nothing.calls == 0

    victims = sorted((out / "points").glob("*.json"))[:3]
    for v in victims:
        v.unlink()
    partial = Counting()
    run_sweep(plan, out, evaluator=partial, workers=0, plot=False)
    assert partial.calls == 3
    second = json.loads((out / "sweep.json").read_text())
    assert [p["coupling"] for p in second["points"]] == [p["coupling"] for p in first["points"]]


def test_other_sweep_in_the_folder_is_refused(tmp_path):
    out = tmp_path / "s"
    plan = plan_sweep(FILM, ["thickness_nm=100:200:2"])
    run_sweep(plan, out, evaluator=closed_form_evaluator, workers=0, plot=False)
    before = (out / "sweep.json").read_bytes()
    with pytest.raises(UsageError, match="different --vary"):
        run_sweep(plan_sweep(FILM, ["thickness_nm=100:200:3"]), out,
                  evaluator=closed_form_evaluator, workers=0)
    other = copy.deepcopy(FILM)
    other["beam"]["voltage_kV"] = 100.0
    with pytest.raises(UsageError, match="different base spec"):
        run_sweep(plan_sweep(other, ["thickness_nm=100:200:2"]), out,
                  evaluator=closed_form_evaluator, workers=0)
    assert (out / "sweep.json").read_bytes() == before
    stranger = tmp_path / "x"
    stranger.mkdir()
    (stranger / "notes.txt").write_text("mine")
    with pytest.raises(UsageError, match="holds no velomatch sweep"):
        run_sweep(plan, stranger, evaluator=closed_form_evaluator, workers=0)


def test_failed_points_are_recorded_and_the_rest_computed(tmp_path):
    def picky(raw, *, source="<spec>", base_dir=None):
        if raw["sample"]["thickness_nm"] > 250:
            raise SpecError(source, "sample.thickness_nm", "too thick for this test",
                            raw["sample"]["thickness_nm"])
        return closed_form_evaluator(raw)

    spec = _spec_file(tmp_path)
    args = types.SimpleNamespace(spec=str(spec), vary=["thickness_nm=100:400:4"],
                                 out=str(tmp_path / "s"), scheduler=None, workers=0)
    assert sweep_command(args, evaluator=picky) == 1
    data = json.loads((tmp_path / "s" / "sweep.json").read_text())
    ok = [p for p in data["points"] if p["coupling"] is not None]
    bad = [p for p in data["points"] if p.get("error")]
    assert [p["values"]["sample.thickness_nm"] for p in ok] == [100, 200]
    assert [p["values"]["sample.thickness_nm"] for p in bad] == [300, 400]
    assert "too thick" in bad[0]["error"]


# -- execution backends ------------------------------------------------------------

def _dask_cluster():
    distributed = pytest.importorskip("distributed")
    return distributed.LocalCluster(n_workers=1, processes=False, threads_per_worker=2,
                                    host="127.0.0.1", protocol="tcp://",
                                    dashboard_address=None)


def test_dask_cluster_gives_the_local_pool_numbers(tmp_path):
    plan = plan_sweep(FILM, ["thickness_nm=100:400:4", "angle_deg=20:50:3"])
    with _dask_cluster() as cluster:
        assert cluster.scheduler_address.startswith("tcp://127.0.0.1:")
        on_dask = run_sweep(plan, tmp_path / "dask", evaluator=closed_form_evaluator,
                            scheduler=cluster.scheduler_address, plot=False)
    on_pool = run_sweep(plan, tmp_path / "pool", evaluator=closed_form_evaluator, workers=2,
                        plot=False)
    assert on_dask.computed == on_pool.computed == 12
    assert on_dask.data["points"] == on_pool.data["points"]


def test_automatic_choice_keeps_a_cheap_sweep_in_this_process(tmp_path):
    count = Counting()     # counts only calls made in this process
    res = run_sweep(plan_sweep(FILM, ["thickness_nm=100:400:7"]), tmp_path / "s",
                    evaluator=count, workers=None, plot=False)
    assert count.calls == res.computed == 7


def test_unreachable_scheduler_is_one_message(tmp_path, monkeypatch):
    from designer import sweep

    monkeypatch.setattr(sweep, "DASK_CONNECT_TIMEOUT", "2s")
    plan = plan_sweep(FILM, ["thickness_nm=100:200:2"])
    with pytest.raises(UsageError, match="cannot reach a Dask scheduler"):
        run_sweep(plan, tmp_path / "s", evaluator=closed_form_evaluator,
                  scheduler="tcp://127.0.0.1:9", plot=False)


@pytest.mark.slow
def test_dask_and_pool_agree_on_the_real_pipeline(tmp_path):
    plan = plan_sweep(FILM, ["thickness_nm=150:250:2", "angle_deg=30:50:2"])
    with _dask_cluster() as cluster:
        on_dask = run_sweep(plan, tmp_path / "dask", scheduler=cluster.scheduler_address,
                            plot=False)
    on_pool = run_sweep(plan, tmp_path / "pool", workers=2, plot=False)
    beta_dask = [p["coupling"]["beta_c"] for p in on_dask.data["points"]]
    beta_pool = [p["coupling"]["beta_c"] for p in on_pool.data["points"]]
    assert beta_dask == beta_pool
    for p, b in zip(on_pool.data["points"], beta_pool):
        raw = copy.deepcopy(FILM)
        raw["sample"]["thickness_nm"] = p["values"]["sample.thickness_nm"]
        raw["laser"]["angle_deg"] = p["values"]["laser.angle_deg"]
        assert b == pytest.approx(film_beta_c(raw), rel=1e-9)


# -- physics: film resonances ------------------------------------------------------

def _extremum(data: dict, key: str, kind: str) -> tuple[float, int]:
    """Vertex of the parabola through the discrete extremum and its neighbours."""
    x = np.asarray(data["axes"][key], dtype=float)
    y = np.asarray([p["coupling"]["beta_c"] for p in data["points"]])
    i = int(np.argmin(y) if kind == "min" else np.argmax(y))
    assert 0 < i < len(x) - 1, "extremum at the edge of the sweep"
    a, b, _ = np.polyfit(x[i - 1:i + 2], y[i - 1:i + 2], 2)
    return -b / (2 * a), i


@pytest.mark.slow
def test_film_coupling_extrema_versus_thickness_match_the_airy_closed_form(tmp_path):
    """The minimum and maximum of |beta_c| versus thickness of a film (n = 3.5, 40 deg,
    200 kV, 800 nm) found by sweeps of the real pipeline lie where the closed form
    (Born & Wolf ch. 1 Airy fields, integrated along the path) puts them."""
    beta = electron_beta(200e3)

    def closed(d_nm):
        return abs(film_integral(d_nm * 1e-9, 3.5, math.radians(40.0), 800e-9, beta))

    expected = {
        "min": minimize_scalar(closed, bounds=(330, 400), method="bounded",
                               options={"xatol": 1e-7}).x,
        "max": minimize_scalar(lambda d: -closed(d), bounds=(180, 260), method="bounded",
                               options={"xatol": 1e-7}).x,
    }
    for kind, (lo, hi) in (("min", (300, 420)), ("max", (160, 280))):
        coarse = run_sweep(plan_sweep(FILM, [f"thickness_nm={lo}:{hi}:7"]),
                           tmp_path / f"{kind}0", workers=0, plot=False).data
        for p in coarse["points"]:   # every point is the closed-form number
            raw = copy.deepcopy(FILM)
            raw["sample"]["thickness_nm"] = p["values"]["sample.thickness_nm"]
            assert p["coupling"]["beta_c"] == pytest.approx(film_beta_c(raw), rel=1e-9)
        x = _extremum(coarse, "sample.thickness_nm", kind)[0]
        for half, n in ((10.0, 11), (1.0, 5)):    # zoom in: 2 nm, then 0.5 nm steps
            zoom = run_sweep(plan_sweep(FILM, [f"thickness_nm={x - half:.6f}:{x + half:.6f}:{n}"]),
                             tmp_path / f"{kind}{n}", workers=0, plot=False).data
            x = _extremum(zoom, "sample.thickness_nm", kind)[0]
        x1 = x
        assert x1 == pytest.approx(expected[kind], abs=0.05), kind


def test_film_guides_are_the_airy_transmission_maxima(tmp_path):
    """The guide lines of a thickness sweep sit where the Airy transmittance of the
    lossless film is 1 (Born & Wolf sec. 7.6.1)."""
    plan = plan_sweep(FILM, ["thickness_nm=50:700:14"])
    guides = guide_orders(plan)
    pos = guide_positions(plan.axes[0].values, guides.orders, guides.levels)
    assert [m for m, _ in pos] == [1.0, 2.0, 3.0, 4.0, 5.0, 6.0]   # d_1 = 116 nm
    for _, d_nm in pos:
        _, t, *_ = film_coefficients(d_nm * 1e-9, 3.5, math.radians(40.0), 800e-9)
        assert abs(t) ** 2 == pytest.approx(1.0, abs=1e-9)   # Hy ratio; same medium both sides
        _, t_off, *_ = film_coefficients((d_nm + 30) * 1e-9, 3.5, math.radians(40.0), 800e-9)
        assert abs(t_off) ** 2 < 0.99


def test_grating_guide_is_the_synchronous_period():
    """Lambda = m beta lambda; 28 kV, 800 nm, m = 3 -> 763.5 nm (computed with CODATA constants)."""
    grating = {"beam": {"voltage_kV": 28.0},
               "laser": {"wavelength_nm": 800.0},
               "sample": {"family": "grating", "material": {"n": 1.45}, "period_nm": 700.0,
                          "tooth_height_nm": 300.0},
               "path": {"offset_nm": 50.0, "length_um": 10.0}}
    plan = plan_sweep(grating, ["sample.period_nm=700:800:11"])
    guides = guide_orders(plan)
    pos = guide_positions(plan.axes[0].values, guides.orders, guides.levels)
    assert [m for m, _ in pos] == [3.0]
    assert pos[0][1] == pytest.approx(763.5, abs=0.05)
