"""Design of hole membranes (designer.hole_design): rule-derived bounds, the gradient of
the pulse- and radius-robust objective, a short run, resume, and the point that a
resonance narrower than the pulse is not a gain.  FMM at orders 2 (speed)."""

from __future__ import annotations

import json
import math
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import constants

from designer import hole_design as hd
from designer.spec import load_spec

SPEC = """
[beam]
voltage_kV = 100.0
[laser]
wavelength_nm = 800.0
angle_deg = {angle}
duration_fs = {duration}
[sample]
family = "membrane"
material = "silicon_nitride"
thickness_nm = {thickness}
pattern = "holes"
lattice = "{lattice}"
period_nm = {period}
hole_radius_nm = {radius}
[path]
x_nm = {x}
[solver]
fourier_orders = 2
[fabrication]
min_feature_nm = 50.0
min_gap_nm = 60.0
max_aspect_ratio = 4.0
[layout]
field_um = 10.0
tone = "remove"
[optimize]
objective = "{objective}"
variables = {variables}
iterations = {iterations}
pulse_points = {points}
robust = {{ etch_nm = 4, points = {rpoints}, aggregate = "{aggregate}" }}
"""


def _spec(tmp_path, name="h.toml", **kw):
    v = dict(angle=10.0, duration=50.0, thickness=150.0, lattice="square", period=400.0,
             radius=100.0, x=200.0, objective="structure_factor",
             variables='["hole_radius_nm", "period_nm", "thickness_nm", "angle_deg"]',
             iterations=3, points=3, aggregate="mean", rpoints=3)
    v.update(kw)
    p = tmp_path / name
    p.write_text(SPEC.format(**v))
    return p


def _run(capsys, *args):
    from designer.cli import main

    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return SimpleNamespace(returncode=code, stdout=out.out, stderr=out.err)


# ------------------------------------------------------------------ no solver
def test_pulse_spectrum_width_against_fft_of_the_pulse():
    # reference: the numpy FFT of the pulse E(t) = exp(-2 ln2 t^2/tau^2) cos(w0 t) (intensity
    # FWHM tau); its power spectrum's FWHM in wavelength against spectral_fwhm_m, and the
    # node weights' mean and variance in omega against the same spectrum's (common
    # practice, no source)
    lam0, tau = 800e-9, 20e-15
    w0 = 2 * math.pi * constants.c / lam0
    t = np.linspace(-3e-12, 3e-12, 2**18)
    e = np.exp(-2 * math.log(2) * t**2 / tau**2) * np.cos(w0 * t)
    spec = np.abs(np.fft.rfft(e)) ** 2
    w = 2 * math.pi * np.fft.rfftfreq(t.size, t[1] - t[0])
    half = w[spec >= 0.5 * spec.max()]
    lam_fwhm = 2 * math.pi * constants.c * (1 / half.min() - 1 / half.max())
    assert hd.spectral_fwhm_m(lam0, tau) == pytest.approx(lam_fwhm, rel=0.02)
    lams, weights = hd.pulse_nodes(lam0, tau, 7)
    assert weights.sum() == pytest.approx(1.0, abs=1e-12)
    om = 2 * math.pi * constants.c / lams
    p = spec / spec.sum()
    mean_ref = np.sum(p * w)
    var_ref = np.sum(p * (w - mean_ref) ** 2)
    assert np.sum(weights * om) == pytest.approx(mean_ref, rel=1e-4)
    assert np.sum(weights * (om - np.sum(weights * om)) ** 2) == pytest.approx(var_ref,
                                                                               rel=0.01)
    # no duration: the laser wavelength alone
    assert hd.pulse_nodes(lam0, None, 7)[0].tolist() == [lam0]


def test_bounds_from_hole_rules(tmp_path):
    # radius alone at P = 400 nm, t = 150 nm: hole >= 60 nm -> r >= 30; wall >= 50 and
    # thickness / wall <= 4 (wall >= 37.5) -> r <= (400 - 50) / 2 = 175
    spec = load_spec(_spec(tmp_path, variables='["hole_radius_nm"]'))
    cfg = hd.parse_hole_optimize(spec)
    assert cfg.bounds["hole_radius_nm"] == pytest.approx((30.0, 175.0))
    assert "min_feature_nm" in cfg.bounds_source["hole_radius_nm"]
    # thickness alone at r = 100: t <= 4 min(200, 400 - 200) = 800, within its 4x span
    spec = load_spec(_spec(tmp_path, radius=60.0, variables='["thickness_nm"]'))
    cfg = hd.parse_hole_optimize(spec)
    assert cfg.bounds["thickness_nm"][1] == pytest.approx(4 * 120.0)
    # hexagonal lattice: nearest neighbours one period apart as well
    spec = load_spec(_spec(tmp_path, lattice="hexagonal", variables='["hole_radius_nm"]'))
    assert hd.parse_hole_optimize(spec).bounds["hole_radius_nm"] == pytest.approx(
        (30.0, 175.0))


def test_start_breaking_the_wall_is_reported_and_moved(tmp_path):
    spec = load_spec(_spec(tmp_path, radius=190.0, variables='["hole_radius_nm"]'))
    cfg = hd.parse_hole_optimize(spec)
    check = hd.move_inside(spec, cfg)
    assert any("wall between neighbouring holes" in m for m in check["violations"])
    assert check["moved"]["hole_radius_nm"] == pytest.approx([190.0, 175.0])
    assert check["remaining"] == []


def test_mapped_radius_keeps_the_rules_everywhere_in_the_box(tmp_path):
    # thickness, period and radius all free: the radius map keeps hole, wall and aspect
    # ratio for any point of the unit box (checked by the shared rule check)
    spec = load_spec(_spec(tmp_path))
    cfg = hd.parse_hole_optimize(spec)
    obj = object.__new__(hd.HoleObjective)      # the map only, no solver compiled
    obj.spec, obj.config = spec, cfg
    obj.x_fixed = {k: v[0] for k, v in hd._variables(spec).items()}
    obj.mapped = True
    rng = np.random.default_rng(1)
    broken = 0
    for u in rng.uniform(0, 1, size=(200, 4)):
        values = obj.values_of(u)
        t, p = values["thickness_nm"], values["period_nm"]
        if p < max(60.0, t / 4) + max(50.0, t / 4):
            continue            # no radius fits: the run refuses such trial points
        assert hd.rule_findings(spec, values) == [], values
        assert obj.encode(values) == pytest.approx(u, abs=1e-9)
        broken += 1
    assert broken > 100


def test_bad_keys_name_file_key_and_value(tmp_path, capsys):
    p = _spec(tmp_path, variables='["hole_depth_nm"]')
    r = _run(capsys, "design", p, "--out", tmp_path / "o")
    assert r.returncode != 0
    assert "optimize.variables.hole_depth_nm" in r.stderr and "Traceback" not in r.stderr


# ------------------------------------------------------------------ through the FMM
@pytest.fixture(scope="module")
def objective(tmp_path_factory):
    # radius errors -4 and +4 nm (two scenarios keep the finite differences affordable)
    spec = load_spec(_spec(tmp_path_factory.mktemp("obj"), rpoints=2))
    cfg = hd.parse_hole_optimize(spec)
    return hd.HoleObjective(spec, cfg)


@pytest.mark.slow
def test_gradient_of_robust_pulse_average_against_central_differences(objective):
    # reference: central differences (f(u + h) - f(u - h)) / 2h, O(h^2) (common practice,
    # no source); mean over radius errors and pulse nodes, all four variables
    u = np.array([0.4, 0.3, 0.35, 0.2])
    f, g, per = objective(u)
    assert len(per) == 2
    h = 1e-5
    fd = []
    for j in range(4):
        e = np.zeros(4)
        e[j] = h
        fd.append((objective(u + e, grad=False)[0] - objective(u - e, grad=False)[0]) / (2 * h))
    fd = np.array(fd)
    assert np.allclose(g, fd, rtol=2e-4, atol=2e-5 * np.max(np.abs(fd)))


@pytest.mark.slow
def test_nominal_figure_is_what_evaluate_reports(objective):
    # one wavelength, no radius error: the design's figure is evaluate's structure factor
    from designer.evaluate import evaluate, evaluation_json

    u = np.array([0.4, 0.3, 0.35, 0.2])
    values = objective.values_of(u)
    ev = evaluation_json(evaluate(hd.spec_at(objective.spec, values), refine=False))
    assert objective.point(u, 800e-9) == pytest.approx(ev["coupling"]["structure_factor"],
                                                       rel=1e-6)


@pytest.mark.slow
def test_resonance_narrower_than_the_pulse_is_not_a_gain(tmp_path):
    """A guided resonance (~1 nm wide near 818 nm at orders 2) under a 20 fs pulse (about
    49 nm wide): its pulse average is far below its peak.  Reference: an independent
    brute-force average, the trapezoid rule of S(omega) f over 100 wavelengths (dense on
    the resonance), with S the Gaussian power spectrum (common practice, no source)."""
    p = _spec(tmp_path, angle=20.0, duration=20.0, thickness=200.0, period=500.0,
              radius=80.0, x=150.0, variables='["hole_radius_nm"]', points=5)
    spec = load_spec(p)
    obj = hd.HoleObjective(spec, hd.parse_hole_optimize(spec))
    u = obj.encode({"hole_radius_nm": 80.0})
    scan = np.linspace(812e-9, 824e-9, 13)
    lam_p = scan[int(np.argmax([obj.point(u, lam) for lam in scan]))]
    scan = lam_p + np.linspace(-0.75e-9, 0.75e-9, 7)
    vals = [obj.point(u, lam) for lam in scan]
    lam_p, peak = scan[int(np.argmax(vals))], max(vals)
    tau = 20e-15
    w0 = 2 * math.pi * constants.c / lam_p
    sw = 2 * math.sqrt(math.log(2)) / tau      # omega - w0 = x * sw, S ~ exp(-x^2)
    x = np.unique(np.concatenate([np.linspace(-3, 3, 61),
                                  (2 * math.pi * constants.c / np.linspace(
                                      lam_p + 2e-9, lam_p - 2e-9, 41) - w0) / sw]))
    f = np.array([obj.point(u, 2 * math.pi * constants.c / (w0 + xi * sw)) for xi in x])
    s = np.exp(-x**2)
    brute = np.trapezoid(s * f, x) / np.trapezoid(s, x)
    # the physics: the pulse sees the resonance with its share of the spectrum
    assert brute < 0.3 * peak
    # a few nodes cannot resolve it: with the centre node on the peak the 5-node average
    # overstates the pulse average; the run's bandwidth check (4x the nodes) exposes that
    lams, w = hd.pulse_nodes(lam_p, tau, 5)
    coarse = sum(wi * obj.point(u, li) for li, wi in zip(lams, w))
    lams, w = hd.pulse_nodes(lam_p, tau, 4 * 5)
    fine = sum(wi * obj.point(u, li) for li, wi in zip(lams, w))
    assert coarse > 2 * brute
    assert abs(coarse - fine) / fine > hd.BANDWIDTH_CHECK_TOL


@pytest.mark.slow
def test_short_design_improves_keeps_rules_resumes_and_exports(tmp_path, capsys):
    # one wavelength (the pulse average has its own tests): three solves per step
    p = _spec(tmp_path, radius=190.0, iterations=2, aggregate="worst", points=1)
    out = tmp_path / "out"
    out.mkdir()
    # the first two iterations through the API (checkpoint only), the rest by --resume
    spec = load_spec(p)
    first = hd.run_hole_design(spec, out, hd.parse_hole_optimize(spec), progress=False)
    assert len(first["run"].history) == 3 and (out / "checkpoint.json").is_file()
    r = _run(capsys, "design", p, "--out", out, "--resume", "--iterations", "4")
    assert r.returncode == 0, r.stderr
    hist = json.loads((out / "history.json").read_text())
    recs = hist["starts"][0]["history"]
    assert [rec["iteration"] for rec in recs] == list(range(len(recs)))
    assert len(recs) >= 3
    objs = [rec["objective"] for rec in recs]
    assert all(b >= a for a, b in zip(objs, objs[1:]))       # accepted steps only rise
    assert objs[-1] > objs[0]
    assert all(rec["rules_broken"] == [] for rec in recs)
    comp = json.loads((out / "comparison.json").read_text())
    assert comp["start_check"]["moved"]["hole_radius_nm"] == pytest.approx([190.0, 175.0])
    assert comp["design_rules"]["clean"]
    assert comp["optimizer_objective"]["ratio"] > 1.0
    for key in ("gain", "bandwidth_check", "pulse", "variables"):
        assert key in comp
    assert (out / "convergence.png").stat().st_size > 1000
    # design.toml is a complete spec: evaluate reproduces evaluation.json, export's DRC passes
    r = _run(capsys, "evaluate", out / "design.toml", "--json")
    assert r.returncode == 0, r.stderr
    ev = json.loads(r.stdout)
    saved = json.loads((out / "evaluation.json").read_text())
    assert ev["coupling"]["structure_factor"] == pytest.approx(
        saved["coupling"]["structure_factor"], rel=1e-9)
    r = _run(capsys, "export", out / "design.toml", "--out", tmp_path / "d.gds")
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "d.gds").stat().st_size > 0
