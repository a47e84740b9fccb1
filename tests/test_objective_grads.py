"""Gradients of what the design loop differentiates, against central finite differences.

Reference: central differences ``(f(x + h e_i) - f(x - h e_i)) / 2h`` of the same
function, truncation error O(h^2) (finite-difference check of adjoint gradients,
common practice; J. Nocedal & S. J. Wright, *Numerical Optimization*, 2nd ed. 2006,
sec. 8.1).  Tolerances: pure JAX maps (rule constraints, penalties, the density
chain) to 1e-6 relative (smooth, O(h^2) with h = 1e-6); FDFD objectives to 2e-4
relative of the largest component (the solver's rounding over h = 1e-5 in unit
variables), as in tests/test_design.py.

Already covered elsewhere and not repeated here: the FDFD adjoint itself
(tests/test_fdfd_grad.py), family permittivities (tests/test_families_grad.py), the
filter/projection/robust chain on one region (tests/test_freeform.py), the coupling
objective of a density (one etch step, two etch steps, wafer plane) in
tests/test_freeform_design.py, the damage factor of a parametric grating and the
coupling of a film (tests/test_design.py).  Added here: the coupled rule
constraints and both penalty forms, the density chain with its etch-step extrusion
and mirrored / shifted / independent upper regions, the structure factor of a
two-sided grating with its row offset and tooth height, the E_max field-cap constraint row by row
(what MMA receives), and the damage factor of a two-sided free-form grating whose
upper region is mirrored or shifted.  Spec values are scenarios of our own.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from designer import design as d
from designer import freeform as ff
from designer import objectives as obj
from designer.fabrication import (
    FabricationRules,
    al_penalty,
    constraint_function,
    quadratic_penalty,
)
from designer.spec import parse_spec

jax.config.update("jax_enable_x64", True)


def central(f, x, h):
    x = np.asarray(x, dtype=float)
    out = []
    for i in range(x.size):
        e = np.zeros_like(x)
        e[i] = h
        out.append((f(x + e) - f(x - e)) / (2 * h))
    return np.stack(out, axis=-1)


# ---------------------------------------------------------------------------------
# rule constraints and penalties (pure)
# ---------------------------------------------------------------------------------
def test_rule_constraints_and_penalties_match_finite_differences():
    rules = FabricationRules(min_feature_m=90e-9, min_gap_m=70e-9, max_aspect_ratio=1.5)
    variables = {"duty_cycle": (0.4, 0.1, 0.9), "period_nm": (260.0, 100.0, 500.0),
                 "tooth_height_nm": (150.0, 20.0, 400.0)}
    names, g = constraint_function(rules, variables)
    assert names == ("min_feature", "min_gap", "aspect_ratio")

    def gx(x):
        return g({"duty_cycle": x[0], "period_nm": x[1], "tooth_height_nm": x[2]})

    # duty 0.55 (the gap is the narrower: the aspect ratio takes the gap; every rule
    # broken, so every penalty is active), then 0.3 (the tooth is the narrower)
    for x0 in (np.array([0.55, 140.0, 180.0]), np.array([0.3, 280.0, 120.0])):
        g0 = np.asarray(gx(x0))
        jac = np.asarray(jax.jacfwd(gx)(jnp.asarray(x0)))
        np.testing.assert_allclose(jac, central(lambda x: np.asarray(gx(x)), x0, 1e-6),
                                   rtol=1e-6, atol=1e-9)
        lam = np.array([0.5, 0.0, 2.0])
        for pen in (lambda x: quadratic_penalty(gx(x), 100.0),
                    lambda x: al_penalty(gx(x), lam, 10.0)):
            grad = np.asarray(jax.grad(pen)(jnp.asarray(x0)))
            fd = central(lambda x: float(pen(x)), x0, 1e-6)
            np.testing.assert_allclose(grad, fd, rtol=1e-6, atol=1e-9 * np.abs(fd).max())
    assert np.all(np.asarray(gx(np.array([0.55, 140.0, 180.0]))) > 0)   # penalties active
    assert g0.shape == (3,)


# ---------------------------------------------------------------------------------
# the density chain: filter, robust projection, etch-step extrusion, upper regions
# ---------------------------------------------------------------------------------
@pytest.mark.parametrize("slabs,upper,roll", [
    (None, None, 0), (2, None, 0), (3, "mirrored", 0), (2, "shifted", 3),
    (None, "independent", 0), (None, "shifted", 2)])
def test_density_chain_matches_finite_differences(slabs, upper, roll):
    nx, rows, dx = 11, 6, 10e-9
    param = ff.Parametrization(nx, rows, slabs, upper, roll)
    chain = obj.DensityChain(param.raw_shape, dx, dx, True, 25e-9, 0.2, param=param)
    rng = np.random.default_rng(5)
    raw = rng.uniform(0.1, 0.9, param.raw_shape)
    w = rng.standard_normal((3,) + param.shape)
    beta = 6.0

    @jax.jit
    def f(r):
        return jnp.sum(jnp.asarray(w) * chain.designs(jnp.reshape(r, param.raw_shape), beta))

    grad = np.asarray(jax.jit(jax.grad(f))(jnp.asarray(raw.ravel())))
    fd = central(lambda r: float(f(r)), raw.ravel(), 1e-6)
    np.testing.assert_allclose(grad, fd, rtol=1e-6, atol=1e-8 * np.abs(fd).max())
    # and the map is the one described: the upper rows mirror (and roll) the lower ones
    pat = np.asarray(param.expand(raw))
    assert pat.shape == param.shape
    if upper in ("mirrored", "shifted"):
        np.testing.assert_array_equal(pat[:, rows:],
                                      np.roll(pat[:, :rows][:, ::-1], roll, axis=0))
    if slabs is not None:
        counts = ff.slab_counts(rows, slabs)
        assert np.all(pat[:, :counts[0]] == pat[:, :1])             # extruded through a step


# ---------------------------------------------------------------------------------
# FDFD objectives through the design problem
# ---------------------------------------------------------------------------------
def two_sided(extra_sample: dict | None = None, optimize: dict | None = None,
              fabrication: dict | None = None) -> dict:
    """A two-sided fused-silica grating at 30 kV and 800 nm (coarse 20 nm grid)."""
    sample = {"family": "grating", "material": "fused_silica", "sides": 2,
              "duty_cycle": 0.45, "tooth_height_nm": 110.0, "gap_nm": 160.0,
              "shift_nm": 40.0, **(extra_sample or {})}
    return {"beam": {"voltage_kV": 30.0}, "laser": {"wavelength_nm": 800.0},
            "sample": sample, "path": {"length_um": 5.0},
            "solver": {"grid_step_nm": 20.0, "refine": False},
            "fabrication": {"min_feature_nm": 40.0, "min_gap_nm": 40.0,
                            **(fabrication or {})},
            "optimize": optimize}


def fd_check(problem, u, extra=(), h=1e-5, pick=None, bare=True):
    """Loss gradient (penalty included), the field-cap rows MMA receives and MMA's bare
    objective gradient at ``u``, each against central differences of one evaluation
    (``problem.evaluate``: loss and extras = (figure, per scenario, g)) at u +- h e_i.
    The loss is scaled by the figure at ``u``.  ``pick(grad)``: the indices to check."""
    n_con = len(problem.constraint_names)
    aux0 = (problem.masks(u), np.zeros(n_con), 1.0) + tuple(extra)
    scale = abs(float(problem.evaluate(u, aux0)[1][0]))
    aux = (aux0[0], np.zeros(n_con), scale) + tuple(extra)
    (_, extras), grad = problem.value_grad(u, aux)
    grad = np.asarray(grad)
    idx = list(range(u.size)) if pick is None else pick(grad)
    fd_loss, fd_value, fd_g = [], [], []
    for i in idx:
        e = np.zeros_like(u)
        e[i] = h
        (lp, (vp, _, gp)), (lm, (vm, _, gm)) = (problem.evaluate(u + e, aux),
                                                problem.evaluate(u - e, aux))
        fd_loss.append((float(lp) - float(lm)) / (2 * h))
        fd_value.append((float(vp) - float(vm)) / (2 * h))
        fd_g.append((np.asarray(gp) - np.asarray(gm)) / (2 * h))
    g, jac = problem.constraint_jac(u, aux)
    out = {"g": np.asarray(g), "idx": idx, "grad_all": grad,
           "loss": (grad[idx], np.asarray(fd_loss)),
           "constraints": (np.asarray(jac)[:, idx], np.stack(fd_g, axis=1))}
    if bare:
        # MMA minimizes -F / scale without the penalty
        (_, _), g_bare = problem.objective_grad(u, aux)
        out["bare"] = (np.asarray(g_bare)[idx], -np.asarray(fd_value) / scale)
    return out


def assert_close(pair, rtol=2e-4):
    got, fd = pair
    np.testing.assert_allclose(got, fd, rtol=rtol, atol=rtol * np.abs(fd).max())


@pytest.mark.slow
def test_structure_factor_and_field_cap_of_a_two_sided_grating():
    # kappa of a two-sided grating over height and row offset, with an E_max cap set
    # below the start's field so that the penalty is active in the loss (MMA's bare
    # objective is checked in the free-form test below: one compilation less here)
    raw = two_sided(optimize={"objective": "structure_factor", "iterations": 2,
                              "variables": {"tooth_height_nm": [60.0, 200.0],
                                            "shift_nm": [-100.0, 100.0]},
                              "max_field_V_per_m": 0.5})
    spec = parse_spec(raw, source="two-sided")
    problem = d.build_problem(spec, d.parse_optimize(spec))
    assert problem.constraint_names == ("max_field[nominal]",)
    u = np.array([0.37, 0.61])
    c = fd_check(problem, u, bare=False)
    assert c["g"][0] > 0                                 # the cap is violated: penalty on
    for part in ("loss", "constraints"):
        assert_close(c[part])


@pytest.mark.slow
# "shifted" is the mirror image rolled along x, so it covers the mirrored map too (the
# pure chain test above checks both maps); two etch steps: the extrusion as well
@pytest.mark.parametrize("upper,etch_steps", [("shifted", 2)])
def test_damage_factor_of_a_two_sided_freeform_grating(upper, etch_steps):
    raw = two_sided(
        extra_sample={"freeform": {"z_nm": [0.0, 110.0], "density": 0.5, "upper": upper,
                                   "etch_steps": etch_steps}},
        optimize={"objective": "damage_factor", "iterations": 2, "variables": ["density"],
                  "projection_beta": [2.0, 64.0], "max_field_V_per_m": 0.5})
    spec = parse_spec(raw, source="two-sided-freeform")
    problem = d.build_problem(spec, d.parse_optimize(spec))
    param = problem.chain.param
    assert param.upper == upper and param.slabs == etch_steps
    if upper == "shifted":
        assert param.roll == 2                           # 40 nm of 20 nm cells
    rng = np.random.default_rng(3)
    u = rng.uniform(0.25, 0.75, problem.box.lower.size)
    c = fd_check(problem, u, extra=(4.0,),
                 pick=lambda grad: [int(np.argmax(np.abs(grad))), 1, u.size - 2])
    assert c["g"][0] > 0
    for part in ("loss", "constraints", "bare"):
        assert_close(c[part])
