"""Optimizer pieces on top of optax: small pure functions that compose into a run.

The run (designer.design) is a chain of these:

    u in [0, 1]^n  --from_unit-->  x (spec units)  --objective, constraints-->
    loss(u) = -F(x) / F_ref + penalty(g(x))  --value_and_grad, optax update-->
    project onto the box  --stop rule-->  next iterate or done

* Variables are scaled to the unit box ``u = (x - lo) / (hi - lo)`` so that one
  learning rate fits lengths in nm and duty cycles alike; bounds are kept by
  projection ``u <- clip(u, 0, 1)`` after every step (projected gradient method,
  e.g. J. Nocedal & S. J. Wright, *Numerical Optimization*, 2nd ed. 2006, sec. 16.7),
  and the loss itself sees ``clip(u)`` so that a line search may step outside.
* Optimizers (``[optimize] optimizer``):
  - ``"lbfgsb"`` (default for parametric designs): scipy.optimize's L-BFGS-B, a bounded
    limited-memory quasi-Newton method with a line search on the unit box (R. H. Byrd,
    P. Lu, J. Nocedal, C. Zhu, SIAM J. Sci. Comput. 16, 1190, 1995; C. Zhu et al., ACM
    TOMS 23, 550, 1997).  Its line search accepts a step only with sufficient decrease
    of the loss, so accepted iterates never lose objective (with no active penalty).
  - ``"mma"`` (default for free-form densities): the method of moving asymptotes
    (K. Svanberg, IJNME 24, 359, 1987; the globally convergent variant, SIAM J. Optim.
    12, 555, 2002) from nlopt (``LD_MMA``), with the coupled constraints as explicit
    inequality constraints, run stage by stage of the projection continuation.
  - ``"adam"``: Adam (D. P. Kingma & J. Ba, ICLR 2015) with step control: a step that
    lowers the objective at a fixed projection sharpness is rejected, the iterate goes
    back and the step is halved (:func:`controlled_step`); accepted steps grow it again.
  - ``"lbfgs"``: optax L-BFGS with a zoom line search (Nocedal & Wright, ch. 7 and 3.5).
* Inequality constraints ``g(x) <= 0`` enter as the quadratic penalty or the
  augmented-Lagrangian term of designer.fabrication (multipliers updated every
  ``al_every`` iterations).
* Multi-start: the spec's design first, then uniform random points of the box from
  ``numpy.random.default_rng(seed)``, rejected while the geometry is invalid.
* Stopping: an iteration budget, or the relative change of the loss below ``ftol``
  for ``patience`` iterations in a row, or the projected gradient (in unit
  variables) below ``gtol``.
* Optimizer states are pytrees; :func:`state_to_json` / :func:`state_from_json`
  store them bit-exactly (hex of the raw float64 bytes) for checkpoints.
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import optax

jax.config.update("jax_enable_x64", True)

METHODS = ("lbfgsb", "mma", "adam", "lbfgs")
PARAMETRIC_DEFAULT = "lbfgsb"
DENSITY_DEFAULT = "mma"
CONSTRAINT_METHODS = ("penalty", "augmented_lagrangian")


# ---------------------------------------------------------------------------------
# the box
# ---------------------------------------------------------------------------------
class Box(NamedTuple):
    """Lower and upper bounds of the design variables (spec units)."""

    lower: np.ndarray
    upper: np.ndarray


def make_box(bounds: dict[str, tuple[float, float]], keys) -> Box:
    lo = np.array([bounds[k][0] for k in keys], dtype=float)
    hi = np.array([bounds[k][1] for k in keys], dtype=float)
    if np.any(hi <= lo):
        raise ValueError("every variable needs lower < upper")
    return Box(lo, hi)


def to_unit(x, box: Box):
    """``u = (x - lo) / (hi - lo)``."""
    return (x - box.lower) / (box.upper - box.lower)


def from_unit(u, box: Box):
    """``x = lo + u (hi - lo)``."""
    return box.lower + u * (box.upper - box.lower)


def project(u):
    """Projection onto the unit box, ``clip(u, 0, 1)``."""
    return jnp.clip(u, 0.0, 1.0)


def projected_gradient_norm(u, grad) -> float:
    """``max |u - clip(u - grad)|``: zero exactly at a KKT point of the box problem."""
    u = np.asarray(u)
    return float(np.max(np.abs(u - np.clip(u - np.asarray(grad), 0.0, 1.0)))) if u.size else 0.0


# ---------------------------------------------------------------------------------
# loss
# ---------------------------------------------------------------------------------
class Penalty(NamedTuple):
    """How constraints enter the loss: ``kind`` "penalty" (weight) or
    "augmented_lagrangian" (mu; multipliers are carried in the run state)."""

    kind: str = "penalty"
    weight: float = 100.0
    mu: float = 10.0


def penalty_term(g, multipliers, penalty: Penalty):
    """The constraint term added to the loss for ``g <= 0`` (designer.fabrication)."""
    from designer.fabrication import al_penalty, quadratic_penalty

    if g.shape[0] == 0:
        return jnp.asarray(0.0)
    if penalty.kind == "augmented_lagrangian":
        return al_penalty(g, multipliers, penalty.mu)
    return quadratic_penalty(g, penalty.weight)


OUTSIDE_WEIGHT = 100.0   # slope of the loss outside the unit box (line searches only)


def make_loss(objective: Callable, constraints: Callable | None, box: Box, penalty: Penalty):
    """``loss(u, aux) -> (loss, extras)`` with ``aux = (masks, multipliers, scale, *rest)``.

    Entries of ``aux`` past the third (e.g. the projection sharpness of a free-form
    density) are passed on: ``objective(x, masks, *rest)``.

    ``objective(x, masks) -> (F, per_scenario, e_max)`` is maximized, so
    ``loss = -F(clip u) / scale + penalty(g) + (100/2) |u - clip u|^2``;
    ``constraints(x, e_max) -> g`` (or None).  The last term is zero on the box; it
    only tells a line search that steps beyond the box do not pay (without it the
    loss would be flat out there).  ``extras = (F, per_scenario, g)``.
    """
    lower, upper = jnp.asarray(box.lower), jnp.asarray(box.upper)

    def loss(u, aux):
        masks, multipliers, scale = aux[:3]
        inside = project(u)
        x = lower + inside * (upper - lower)
        value, per, e_max = objective(x, masks, *aux[3:])
        g = constraints(x, e_max) if constraints is not None else jnp.zeros(0)
        total = (-value / scale + penalty_term(g, multipliers, penalty)
                 + 0.5 * OUTSIDE_WEIGHT * jnp.sum((u - inside) ** 2))
        return total, (value, per, g)

    return loss


# ---------------------------------------------------------------------------------
# optax transformations and one step
# ---------------------------------------------------------------------------------
def make_transform(method: str = "adam", learning_rate: float = 0.05,
                   memory_size: int = 10, max_linesearch_steps: int = 12):
    """The optax transformation (extra-args interface) of ``method``.

    ``"adam"``: ``optax.adam(learning_rate)``; ``"lbfgs"``: ``optax.lbfgs`` with the zoom
    line search (strong Wolfe conditions) and ``memory_size`` pairs.
    """
    if method == "adam":
        return optax.with_extra_args_support(optax.adam(learning_rate))
    if method == "lbfgs":
        search = optax.scale_by_zoom_linesearch(max_linesearch_steps=max_linesearch_steps)
        return optax.lbfgs(memory_size=memory_size, linesearch=search)
    if method in ("lbfgsb", "mma"):
        # driven by scipy / nlopt; the optax slot holds an empty state for checkpoints
        return optax.with_extra_args_support(optax.identity())
    raise ValueError(f"method must be one of {METHODS}, got {method!r}")


def make_step(loss: Callable, transform, *, jit: bool = True):
    """``step(u, state, aux) -> (u_next, state, loss, grad, extras)``.

    Value and gradient at ``u``, one optax update (L-BFGS gets the value function for
    its line search), then the projection onto the unit box.  Compiled once.
    """
    value_and_grad = jax.value_and_grad(loss, has_aux=True)

    def step(u, state, aux):
        (value, extras), grad = value_and_grad(u, aux)

        def value_fn(v):
            return loss(v, aux)[0]

        updates, state = transform.update(grad, state, u, value=value, grad=grad,
                                          value_fn=value_fn)
        u_next = project(optax.apply_updates(u, updates))
        return u_next, state, value, grad, extras

    return jax.jit(step) if jit else step


def make_evaluate(loss: Callable, *, jit: bool = True):
    """``evaluate(u, aux) -> (loss, extras)`` without a gradient."""
    return jax.jit(loss) if jit else loss


# ---------------------------------------------------------------------------------
# step control (Adam)
# ---------------------------------------------------------------------------------
class StepControl(NamedTuple):
    """Step-control constants: shrink on rejection, grow on acceptance, give up below."""

    shrink: float = 0.5
    grow: float = 1.5
    smallest: float = 1e-4


def controlled_step(loss: float, accepted_loss: float | None, scale: float,
                    control: StepControl = StepControl(), rtol: float = 1e-12):
    """``(accept, new_scale)`` for a candidate whose loss is ``loss``.

    The candidate is accepted when there is no accepted point yet or its loss is not
    above the accepted one (``loss <= accepted + rtol |accepted|``): the step scale then
    grows (at most to 1); otherwise it is rejected and the scale shrinks.  A classic
    backtracking safeguard (Nocedal & Wright, *Numerical Optimization*, 2nd ed., sec. 3.1)
    applied to Adam's steps.
    """
    if accepted_loss is None or loss <= accepted_loss + rtol * abs(accepted_loss):
        return True, min(1.0, scale * control.grow)
    return False, scale * control.shrink


# ---------------------------------------------------------------------------------
# stopping and multipliers
# ---------------------------------------------------------------------------------
class StopRule(NamedTuple):
    """Stop after ``iterations``, or when ``|dloss| <= ftol max(1, |loss|)`` for
    ``patience`` consecutive iterations, or when the projected gradient <= ``gtol``."""

    iterations: int = 50
    ftol: float = 1e-6
    gtol: float = 1e-8
    patience: int = 3


def stop_reason(losses: list[float], pg_norm: float, rule: StopRule) -> str | None:
    """Why to stop after the iterations whose losses are ``losses`` (None: go on)."""
    if len(losses) >= rule.iterations:
        return "iteration budget"
    if pg_norm <= rule.gtol:
        return "projected gradient below tolerance"
    if len(losses) > rule.patience:
        recent = np.asarray(losses[-rule.patience - 1:])
        change = np.abs(np.diff(recent))
        if np.all(change <= rule.ftol * np.maximum(1.0, np.abs(recent[1:]))):
            return "loss change below tolerance"
    return None


def update_multipliers(g, multipliers, penalty: Penalty):
    """Augmented-Lagrangian multiplier update (designer.fabrication); identity otherwise."""
    from designer.fabrication import al_update_multipliers

    if penalty.kind != "augmented_lagrangian" or np.size(g) == 0:
        return np.asarray(multipliers, dtype=float)
    return np.asarray(al_update_multipliers(g, multipliers, penalty.mu), dtype=float)


# ---------------------------------------------------------------------------------
# starts
# ---------------------------------------------------------------------------------
def random_starts(u0: np.ndarray, n_starts: int, seed: int,
                  valid: Callable[[np.ndarray], bool] = lambda u: True,
                  max_tries: int = 200) -> list[np.ndarray]:
    """``[u0, r1, ..., r_{n-1}]``: the given start, then uniform random points of the
    unit box from ``numpy.random.default_rng(seed)`` for which ``valid(u)`` holds."""
    rng = np.random.default_rng(seed)
    out = [np.clip(np.asarray(u0, dtype=float), 0.0, 1.0)]
    while len(out) < n_starts:
        for _ in range(max_tries):
            u = rng.uniform(0.0, 1.0, size=out[0].shape)
            if valid(u):
                out.append(u)
                break
        else:
            raise ValueError(f"no valid random start found in {max_tries} tries")
    return out


def backtrack_to_valid(u_old: np.ndarray, u_new: np.ndarray,
                       valid: Callable[[np.ndarray], bool], halvings: int = 10) -> np.ndarray:
    """``u_new`` if valid, else the first valid point of ``u_old + 2^-k (u_new - u_old)``
    (k = 1 .. halvings), else ``u_old``: keeps iterates inside the family's geometry."""
    u_old, u_new = np.asarray(u_old), np.asarray(u_new)
    if valid(u_new):
        return u_new
    t = 0.5
    for _ in range(halvings):
        u = u_old + t * (u_new - u_old)
        if valid(u):
            return u
        t *= 0.5
    return u_old


# ---------------------------------------------------------------------------------
# bit-exact state storage
# ---------------------------------------------------------------------------------
def array_to_json(a) -> dict:
    a = np.asarray(a)
    return {"dtype": a.dtype.str, "shape": list(a.shape),
            "hex": np.ascontiguousarray(a).tobytes().hex()}


def array_from_json(d: dict) -> np.ndarray:
    return np.frombuffer(bytes.fromhex(d["hex"]), dtype=np.dtype(d["dtype"])).reshape(
        d["shape"]).copy()


def state_to_json(state) -> list[dict]:
    """The leaves of an optax state (any pytree), exactly."""
    return [array_to_json(leaf) for leaf in jax.tree_util.tree_leaves(state)]


def state_from_json(data: list[dict], template):
    """Rebuild a state stored by :func:`state_to_json` on the structure of ``template``
    (a freshly initialized state of the same transformation and variable count)."""
    leaves, treedef = jax.tree_util.tree_flatten(template)
    if len(leaves) != len(data):
        raise ValueError("checkpointed optimizer state does not match this optimizer")
    restored = [jnp.asarray(array_from_json(d)) for d in data]
    for new, old in zip(restored, leaves):
        if np.shape(new) != np.shape(old):
            raise ValueError("checkpointed optimizer state does not match this optimizer")
    return jax.tree_util.tree_unflatten(treedef, restored)
