"""The optimizers of ``velomatch design`` on small problems: bounds, best iterate,
monotone accepted steps, resume from a checkpoint.

References used:
* L-BFGS-B accepts a step only with sufficient decrease of the objective (the Armijo
  condition of its line search: R. H. Byrd, P. Lu, J. Nocedal & C. Zhu, SIAM J. Sci.
  Comput. 16, 1190, 1995; J. Nocedal & S. J. Wright, *Numerical Optimization*, 2nd ed.
  2006, sec. 3.1), so the recorded (accepted) losses never rise;
* MMA (K. Svanberg, IJNME 24, 359, 1987) and the projected Adam keep iterates in the
  box [0, 1] of the densities by construction (nlopt's bounds; the projection
  ``clip(u, 0, 1)``, Nocedal & Wright sec. 16.7);
* the step control of Adam rejects any candidate whose loss is above the accepted
  one at the same projection sharpness (designer.optimize.controlled_step);
* a checkpoint stores the optimizer state bit-exactly, so an interrupted run that
  resumes repeats the uninterrupted one (common practice, no source).
Spec values are scenarios of our own.
"""

from __future__ import annotations

import numpy as np
import pytest

from designer import design as d
from designer.spec import parse_spec

FREEFORM = {
    "beam": {"voltage_kV": 30.0}, "laser": {"wavelength_nm": 800.0},
    "sample": {"family": "grating", "material": "fused_silica", "duty_cycle": 0.5,
               "tooth_height_nm": 120.0,
               "freeform": {"z_nm": [0.0, 120.0], "density": 0.5}},
    "path": {"length_um": 5.0}, "solver": {"grid_step_nm": 20.0, "refine": False},
    "fabrication": {"min_feature_nm": 40.0, "min_gap_nm": 40.0},
    "optimize": {"objective": "structure_factor", "variables": ["density"],
                 "iterations": 6, "learning_rate": 0.1, "projection_beta": [2.0, 64.0],
                 "projection_beta_every": 3, "checkpoint_every": 1},
}

MEMBRANE = {
    "beam": {"voltage_kV": 100.0}, "laser": {"wavelength_nm": 800.0, "angle_deg": 30.0},
    "sample": {"family": "membrane", "material": "silicon_nitride", "thickness_nm": 45.0},
    "optimize": {"objective": "coupling", "variables": {"thickness_nm": [40.0, 300.0]},
                 "iterations": 6, "learning_rate": 0.05, "checkpoint_every": 1,
                 "tolerance": 0.0, "gradient_tolerance": 0.0},
}

GRATING = {
    "beam": {"voltage_kV": 30.0}, "laser": {"wavelength_nm": 800.0},
    "sample": {"family": "grating", "material": "fused_silica", "duty_cycle": 0.35,
               "tooth_height_nm": 70.0},
    "path": {"length_um": 5.0}, "solver": {"grid_step_nm": 20.0, "refine": False},
    "fabrication": {"min_feature_nm": 40.0, "min_gap_nm": 40.0},
    "optimize": {"objective": "coupling", "optimizer": "lbfgsb", "iterations": 6,
                 "variables": {"tooth_height_nm": [50.0, 300.0], "duty_cycle": [0.2, 0.8]},
                 "tolerance": 0.0, "gradient_tolerance": 0.0},
}


def spec_of(raw: dict, optimizer: str, **optimize):
    import copy

    raw = copy.deepcopy(raw)
    raw["optimize"].update(optimizer=optimizer, **optimize)
    return parse_spec(raw, source=f"test-{optimizer}")


def run(spec, out, iterations=None, resume=False, on_iteration=None):
    config = d.parse_optimize(spec, iterations)
    return d.run_design(spec, out, config, resume=resume, progress=False,
                        on_iteration=on_iteration)


def stages(history):
    """Records grouped by projection sharpness, in order."""
    out: dict = {}
    for rec in history:
        out.setdefault(rec.get("beta"), []).append(rec)
    return list(out.values())


# ---------------------------------------------------------------------------------
# free-form densities: MMA and Adam
# ---------------------------------------------------------------------------------
@pytest.mark.slow
@pytest.mark.parametrize("optimizer", ["mma", "adam"])
def test_density_optimizers_bounds_best_iterate_and_resume(tmp_path, optimizer):
    spec = spec_of(FREEFORM, optimizer)
    seen = []
    result = run(spec, tmp_path / "a", on_iteration=lambda st: seen.append(np.array(st.u)))
    problem = result.problem
    st = result.starts[0]
    assert len(st.losses) == 6 and st.reason == "iteration budget"
    # every iterate and the result stay in the box of the densities
    for u in seen + [result.best_u]:
        assert u.min() >= 0.0 and u.max() <= 1.0
    # the reported design is the binarized result, evaluated as a stored pattern would be
    pattern = problem.binarized(result.best_u)
    assert set(np.unique(pattern)) <= {0.0, 1.0}
    again = d.pattern_record(problem, result.best_u, pattern)
    assert again["objective"] == pytest.approx(result.best_record["objective"], rel=1e-12)
    # the best point of the last projection stage is kept
    last = stages(st.history)[-1]
    beta = last[0]["beta"]
    aux = problem.aux(result.best_u, st.multipliers, len(st.losses) - 1)
    assert aux[3] == beta
    if optimizer == "mma":
        # MMA carries the best evaluation of each stage into the next and to the end
        kept = float(problem.evaluate(result.best_u, aux)[0])
        assert kept == pytest.approx(min(r["loss"] for r in last), rel=1e-12)
    else:
        # Adam keeps the last accepted point; a rejected candidate is worse than it,
        # and accepted losses never rise within a stage
        for stage in stages(st.history):
            best = None
            for rec in stage:
                if rec["accepted"]:
                    assert best is None or rec["loss"] <= best * (1 - 1e-12 * np.sign(best))
                    best = rec["loss"]
                else:
                    assert rec["loss"] > best
        assert st.accepted["loss"] == min(r["loss"] for r in last)
    # interrupted after the first stage, resumed from the checkpoint: the same run
    short = run(spec, tmp_path / "b", iterations=3)
    assert len(short.starts[0].losses) == 3
    resumed = run(spec, tmp_path / "b", resume=True)
    assert resumed.starts[0].losses == st.losses
    np.testing.assert_array_equal(resumed.best_u, result.best_u)


def test_adam_density_reports_the_best_clean_end_candidate(tmp_path, monkeypatch):
    """Adam's final iterate is a step not yet checked; the binarized final iterate and
    the binarized last accepted one are both evaluated, and the rule-clean one with the
    larger objective is the result (common practice, no source)."""
    import dataclasses

    spec = spec_of(FREEFORM, "adam")
    result = run(spec, tmp_path / "a")
    problem, st = result.problem, result.starts[0]
    assert st.accepted is not None
    final, accepted = np.asarray(st.u), np.asarray(st.accepted["u"])
    scored = {}
    for name, u in (("final", final), ("accepted", accepted)):
        pattern = problem.binarized(u)
        scored[name] = (d.pattern_record(problem, u, pattern)["objective"],
                        d._violations(problem, u, pattern))
    clean = [s[0] for s in scored.values() if not s[1]]
    assert clean
    assert result.best_record["objective"] == pytest.approx(max(clean), rel=1e-12)
    # what design exports is the pattern of the reported candidate
    assert not d._violations(problem, result.best_u)
    n_keys = problem.n_keys
    # an empty density as the final iterate: the last accepted candidate wins
    empty = final.copy()
    empty[n_keys:] = 0.0
    u, rec = d._best_of(problem, dataclasses.replace(st, u=empty))
    np.testing.assert_array_equal(u, accepted)
    assert rec["objective"] == pytest.approx(scored["accepted"][0], rel=1e-12)
    # a candidate that breaks a rule loses to a clean one with a smaller objective
    flagged = accepted.copy()
    real_check = d._violations
    monkeypatch.setattr(d, "_violations", lambda p, u, pattern=None: (
        ["planted"] if np.array_equal(u, flagged) else real_check(p, u, pattern)))
    u, rec = d._best_of(problem, dataclasses.replace(st, u=empty))
    np.testing.assert_array_equal(u, empty)
    assert rec["objective"] < scored["accepted"][0]
    monkeypatch.undo()
    # with no accepted point kept (MMA, or after a multiplier update) the final iterate
    u, _ = d._best_of(problem, dataclasses.replace(st, accepted=None))
    np.testing.assert_array_equal(u, final)


# ---------------------------------------------------------------------------------
# L-BFGS-B: accepted steps never lose objective
# ---------------------------------------------------------------------------------
@pytest.mark.slow
def test_lbfgsb_accepted_steps_never_lower_the_objective(tmp_path):
    spec = parse_spec(GRATING, source="test-lbfgsb")
    result = run(spec, tmp_path / "g")
    st = result.starts[0]
    losses = np.asarray(st.losses)
    assert len(losses) >= 3 and all(r["accepted"] for r in st.history)
    assert np.all(np.diff(losses) <= 1e-12 * np.abs(losses[:-1]))   # loss never rises
    objective = np.array([r["objective"] for r in st.history])
    assert objective[-1] > objective[0]                  # it did move uphill
    # the best recorded iterate is what the run reports
    assert result.best_record["objective"] == pytest.approx(objective.max(), rel=1e-12)
    for r in st.history:
        for key, (lo, hi) in result.problem.config.bounds.items():
            assert lo <= r["values"][key] <= hi


# ---------------------------------------------------------------------------------
# resume of every optimizer on a cheap (layer-stack) problem
# ---------------------------------------------------------------------------------
@pytest.mark.parametrize("optimizer", ["lbfgsb", "mma", "adam",
                                       pytest.param("lbfgs", marks=pytest.mark.slow)])
def test_every_optimizer_resumes_from_its_checkpoint(tmp_path, optimizer):
    spec = spec_of(MEMBRANE, optimizer)
    full = run(spec, tmp_path / "full")
    run(spec, tmp_path / "cut", iterations=3)
    resumed = run(spec, tmp_path / "cut", resume=True)
    a, b = full.starts[0], resumed.starts[0]
    n = min(3, len(a.losses))
    assert b.losses[:n] == a.losses[:n]                 # the checkpointed part, exactly
    if optimizer in ("adam", "lbfgs"):
        # optax state stored bit-exactly: the resumed run is the uninterrupted one
        assert b.losses == a.losses
        np.testing.assert_array_equal(resumed.best_u, full.best_u)
    else:
        # scipy / nlopt restart from the last point (their inner memory starts afresh):
        # never worse than where the run was cut, within the budget
        assert len(b.losses) <= 6
        cut_best = max(r["objective"] for r in b.history[:n])
        assert resumed.best_record["objective"] >= cut_best * (1 - 1e-12)
