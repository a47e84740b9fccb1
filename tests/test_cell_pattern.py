"""The cell-scale compass moves of the ``lbfgsb`` runner (design._cell_pattern_moves)
on a synthetic objective whose answer is known.

The loss is a smooth bowl evaluated on a staircase of grid cells plus a sawtooth
ripple of 0.1 % inside each cell, so its gradient carries no information about the
bowl (inside a cell it is the ripple's slope only): a gradient method stops anywhere,
and only moves of whole cells can find the bowl's bottom.  Expected behaviour (common
practice, no source; a compass search in the sense of R. Hooke & T. A. Jeeves,
J. ACM 8, 212, 1961): moves of 2 cells, doubled after a gain, down to 1 cell; a move is
accepted only when the loss falls by more than ``design.CELL_RIPPLE`` of itself, so
the search stops within one cell of the bottom (there a one-cell move gains less than
that bound by construction).  Numbers below are invented for the test.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np

from designer import design as d

KEYS = ["sample.tooth_height_nm", "sample.duty_cycle"]
LOWER = np.array([40.0, 0.2])
UPPER = np.array([400.0, 0.8])
GRID_NM = 3.0
Q = 0.002          # bowl curvature per cell^2: a 1-cell move from 1 cell away gains 0.2 %
RIPPLE = 0.001     # sawtooth inside each cell: 0.1 %, below CELL_RIPPLE (0.3 %)
BOTTOM = np.array([70.0, 30.0])   # the bowl's bottom, in cells of each variable


def _problem(iterations: int = 200):
    config = SimpleNamespace(keys=KEYS, iterations=iterations)
    return SimpleNamespace(config=config, box=SimpleNamespace(lower=LOWER, upper=UPPER),
                           grid_step_m=GRID_NM * 1e-9, n_keys=len(KEYS),
                           valid=lambda u: bool(np.all((u >= 0.0) & (u <= 1.0))))


def _loss(u, cell):
    n = np.asarray(u) / cell + 1e-9
    stair, frac = np.floor(n), n - np.floor(n)
    return 1.0 + Q * float(np.sum((stair - BOTTOM) ** 2)) + RIPPLE * float(np.sum(frac))


def _runner_pieces(problem, u0):
    """The runner's ``fun`` and ``record`` for the synthetic loss, and its state."""
    cell = d.cell_steps(problem)
    st = SimpleNamespace(u=np.asarray(u0, float), losses=[], history=[])
    calls = []

    def fun(u):
        calls.append(np.array(u))
        # the gradient of the staircase + sawtooth: the ripple's slope only
        return _loss(u, cell), RIPPLE / cell

    def record(u):
        loss, _ = fun(u)
        st.history.append({"loss": loss, "accepted": True, "u": np.array(u)})
        st.losses.append(loss)
        st.u = np.array(u)

    return cell, st, fun, record, calls


def test_cell_steps_are_one_grid_cell():
    cell = d.cell_steps(_problem())
    # a length moves by its own change (3 nm of a 360 nm box); a duty cycle by 1/48
    assert np.allclose(cell, [GRID_NM / 360.0, 1.0 / 48.0], rtol=1e-12)


def test_moves_reach_the_bottom_within_a_cell_and_lower_the_loss():
    problem = _problem()
    cell, st, fun, record, _ = _runner_pieces(problem, [0.0, 0.0])
    st.u = (np.array([10.5, 5.5]) * cell)      # cell centres, far from the bottom
    record(st.u)
    # a gradient method sees only the ripple: the gradient points the same way in every
    # cell and says nothing of the bowl (the spurious information L-BFGS-B stops on)
    assert np.allclose(fun(st.u)[1], fun(BOTTOM * cell + 0.5 * cell)[1])

    moved = d._cell_pattern_moves(problem, st, fun, record)
    assert moved
    moves = st.history[1:]
    assert len(moves) >= 4
    labels = [r.get("step", "") for r in moves]
    assert all(lab.startswith("cell pattern (") for lab in labels)
    scales = [float(lab.split("(")[1].split()[0]) for lab in labels]
    assert scales[0] == 2.0 and 4.0 in scales and 8.0 in scales   # doubled after gains
    assert min(scales) >= 1.0
    # each accepted record lowers the loss by more than the ripple bound
    losses = np.array(st.losses)
    assert np.all(losses[1:] < losses[:-1] * (1.0 - d.CELL_RIPPLE))
    # within one cell of the known bottom in every variable
    n_final = np.floor(st.u / cell + 1e-9)
    assert np.all(np.abs(n_final - BOTTOM) <= 1.0), n_final


def test_gains_below_the_ripple_bound_are_refused():
    problem = _problem()
    cell, st, fun, record, calls = _runner_pieces(problem, [0.0, 0.0])
    # one cell from the bottom in height: moving there gains Q / loss = 0.2 % < 0.3 %
    st.u = (BOTTOM + [1.0, 0.0] + 0.5) * cell
    record(st.u)
    before = _loss(st.u, cell)
    gain = (before - _loss(st.u - [cell[0], 0.0], cell)) / before
    assert 0.0 < gain < d.CELL_RIPPLE
    assert not d._cell_pattern_moves(problem, st, fun, record)
    assert len(st.history) == 1 and len(calls) > 1      # tried, nothing accepted
    assert np.array_equal(st.u, (BOTTOM + [1.0, 0.0] + 0.5) * cell)


def test_moves_respect_the_iteration_budget():
    problem = _problem(iterations=3)
    cell, st, fun, record, _ = _runner_pieces(problem, [0.0, 0.0])
    record(np.array([10.5, 5.5]) * cell)
    assert d._cell_pattern_moves(problem, st, fun, record)
    assert len(st.losses) == 3
