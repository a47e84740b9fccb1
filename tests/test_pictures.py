"""Pictures: what each kind shows and that it tells the truth.

Checks of the drawings themselves (legend entries, true aspect ratio, no grid-solver
decorations on exact results, layers that span the view: common practice, no source)
and one physics check of the path profile: the running coupling integral of an exact
film field, taken from −∞ with adiabatic switching and closed with the tail above,
ends at the coupling of ``solvers.layers`` (the closed-form Airy fields of M. Born &
E. Wolf, *Principles of Optics*, ch. 1.6, integrated analytically there).
"""

from __future__ import annotations

import math
import types

import numpy as np
import pytest
from matplotlib.figure import Figure

from designer import drawing
from designer.evaluate import evaluate
from designer.plots import axis_label, evaluation_figure, path_profile, sweep_figure
from designer.spec import parse_spec

FILM = {"beam": {"voltage_kV": 200.0},
        "laser": {"wavelength_nm": 800.0, "angle_deg": 35.0},
        "sample": {"family": "membrane", "material": "silicon_nitride", "thickness_nm": 50.0},
        "path": {"x_nm": 0.0}}
PRISM = {"beam": {"voltage_kV": 120.0},
         "laser": {"wavelength_nm": 800.0, "angle_deg": "phase-matched"},
         "sample": {"family": "prism", "material": "silicon_nitride"},
         "path": {"offset_nm": 30.0, "length_um": 5.0}}
GRATING = {"beam": {"voltage_kV": 30.0},
           "laser": {"wavelength_nm": 2000.0, "angle_deg": 0.0},
           "sample": {"family": "grating", "material": {"n": 1.45},
                      "tooth_height_nm": 300.0},
           "path": {"length_um": 4.0},
           "solver": {"grid_step_nm": 50.0, "refine": False}}
SLITS = {"beam": {"voltage_kV": 200.0},
         "laser": {"wavelength_nm": 800.0, "angle_deg": 30.0},
         "sample": {"family": "membrane", "material": {"n": 2.0}, "thickness_nm": 100.0,
                    "pattern": "slits", "period_nm": 560.0, "slit_widths_nm": [200.0]},
         "path": {"x_nm": 100.0},
         "solver": {"grid_step_nm": 20.0, "refine": False}}


@pytest.fixture(scope="module")
def evaluations():
    return {name: evaluate(parse_spec(raw)) for name, raw in
            (("film", FILM), ("prism", PRISM), ("grating", GRATING), ("slits", SLITS))}


def _cross_section(ev, **options):
    from designer.families import get_family

    fig = Figure()
    ax = fig.add_subplot()
    spec = ev.spec
    handles = get_family(spec.family).draw(ax, spec.sample, spec.context, ev.run.layout,
                                           exact=ev.run.fields is None, **options)
    return ax, handles


def _labels(handles):
    return [h.get_label() for h in handles]


def test_exact_results_show_no_absorbing_layers_and_no_source_line(evaluations):
    for name in ("film", "prism"):
        ax, handles = _cross_section(evaluations[name])
        assert not any(p.get_hatch() for p in ax.patches)
        assert not any("absorbing" in label for label in _labels(handles))
        assert not any("absorbing" in t.get_text() for t in ax.texts)
        labels = _labels(handles)
        assert any(label.startswith("electron path") for label in labels)
        assert any(label.startswith("laser") for label in labels)


def test_fdfd_results_show_the_boundary_and_dashed_planes_in_the_legend(evaluations):
    ax, handles = _cross_section(evaluations["slits"])
    labels = _labels(handles)
    assert "absorbing boundary (FDFD only)" in labels
    dashed = [h for h in handles if hasattr(h, "get_linestyle") and
              h.get_linestyle() not in ("-", "solid", "None")]
    assert dashed and "tails" in dashed[0].get_label()
    assert not any(p.get_hatch() for p in ax.patches)


def test_pictures_keep_the_true_aspect_ratio(evaluations):
    for ev in evaluations.values():
        fig = evaluation_figure(ev)
        cross, field = fig.axes[0], fig.axes[1]
        assert cross.get_aspect() == 1.0 and field.get_aspect() == 1.0
        # the material is outlined on the field map
        assert "material outline" in [t.get_text() for t in field.get_legend().get_texts()]


def test_grating_substrate_spans_the_whole_view(evaluations):
    ax, _ = _cross_section(evaluations["grating"], periods=7)
    x_lo, x_hi = ax.get_xlim()
    from matplotlib.patches import Polygon

    spans = [p for p in ax.patches if isinstance(p, Polygon)
             and p.get_xy()[:, 0].min() <= x_lo and p.get_xy()[:, 0].max() >= x_hi]
    assert spans          # the substrate under the teeth reaches both edges of the view


def test_prism_laser_reflects_at_the_surface(evaluations):
    ax, handles = _cross_section(evaluations["prism"])
    assert any("total internal reflection" in label for label in _labels(handles))
    arrows = [p for p in ax.patches if p.__class__.__name__ == "FancyArrowPatch"
              and p.get_edgecolor()[:3] == pytest.approx(
                  tuple(int(drawing.LASER[i:i + 2], 16) / 255 for i in (1, 3, 5)))]
    assert len(arrows) == 2     # incident and reflected


def test_running_integral_of_an_exact_film_ends_at_its_coupling(evaluations):
    from solvers import layers

    ev = evaluations["film"]
    prof = path_profile(ev)
    assert prof["from_minus_infinity"]
    sol, path = ev.run.stack, ev.run.layout.path
    lam = ev.spec.laser.wavelength_m
    kx = complex(np.asarray(sol.kx))
    kz = np.sqrt((2 * math.pi / lam) ** 2 - kx**2)
    z2 = prof["s_m"][-1]
    za, zb = z2 + 0.1 * lam, z2 + 0.37 * lam
    ez = np.asarray(layers.stack_fields(sol, path.x_m, np.array([za, zb]))[1], dtype=complex)
    m = np.array([[np.exp(1j * kz * za), np.exp(-1j * kz * za)],
                  [np.exp(1j * kz * zb), np.exp(-1j * kz * zb)]])
    a = np.linalg.solve(m, ez)
    q = np.array([kz, -kz]) - ev.omega / ev.spec.beam.velocity_m_per_s
    above = np.sum(-a * np.exp(1j * q * z2) / (1j * q))
    total = complex(np.asarray(layers.coupling_normal(sol, path.x_m,
                                                      ev.spec.beam.velocity_m_per_s)))
    assert abs(prof["running"][-1] + above - total) < 2e-3 * abs(total)


def test_running_integral_along_a_prism_ends_at_its_coupling(evaluations):
    ev = evaluations["prism"]
    prof = path_profile(ev)
    assert abs(prof["running"][-1] - prof["total_V"]) < 1e-3 * abs(prof["total_V"])


def test_height_sweep_on_a_prism_has_no_guides_a_log_scale_and_the_decay_reference():
    from designer.sweep import PLOTTED, guide_orders, plan_sweep, quantity_grid

    plan = plan_sweep(PRISM, ["path.offset_nm=10:200:5"])
    assert guide_orders(plan) is None        # the height does not change phase matching
    x = np.linspace(10, 200, 5)
    ell = 90e-9
    data = {"axes": {"path.offset_nm": list(x)}, "shape": [5],
            "points": [{"coupling": {"beta_c": float(np.exp(-z * 1e-9 / ell))}} for z in x]}
    fig = sweep_figure(data, PLOTTED, quantity_grid, decay_length_m=ell)
    ax = fig.axes[0]
    assert ax.get_yscale() == "log"
    assert ax.get_xlabel() == "electron height above the surface (nm)"
    assert any("exp(−z/ℓ)" in t.get_text() for t in ax.get_legend().get_texts())
    assert axis_label("laser.angle_deg") == "laser angle of incidence (°)"
    assert axis_label("path.length_um") == "interaction length (µm)"


def test_convergence_plot_has_integer_ticks_and_marks_the_best_iteration():
    from designer.design import convergence_figure

    history = [{"iteration": k, "objective": 1 - 0.5 ** k} for k in range(7)]
    start = types.SimpleNamespace(index=0, history=history)
    cfg = types.SimpleNamespace(objective="coupling", aggregate="worst", method="lbfgs")
    result = types.SimpleNamespace(problem=types.SimpleNamespace(config=cfg, models=(1,)),
                                   starts=(start,), best_start=0, best_record=history[-1])
    fig = convergence_figure(result)
    ax = fig.axes[0]
    fig.canvas.draw()
    ticks = [t for t in ax.get_xticks() if ax.get_xlim()[0] <= t <= ax.get_xlim()[1]]
    assert all(float(t).is_integer() for t in ticks)
    assert any("best: iteration 6" in t.get_text() for t in ax.get_legend().get_texts())


def test_spectrum_plot_states_the_line_scale_and_skipped_averaging(tmp_path):
    from designer import spectrum as S

    lines = S.averaged_line_spectrum(np.array([1.0]), 2.35e15)
    e, d = S.broadened_spectrum(lines, 0.6)
    S.plot_spectrum(tmp_path / "s.png", e, d, lines, notes=["pulse averaging skipped"])
    assert (tmp_path / "s.png").stat().st_size > 1000
