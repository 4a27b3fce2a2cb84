"""World: end-to-end steps on the bundled scenes, bad input, and determinism."""
import os

import numpy as np
import pytest

import crowdcore
from crowdcore import _jit, verify
from crowdcore.errors import StepError
from crowdcore.invariants import pair_overlaps, wall_crossings

SCENES = os.path.join(os.path.dirname(__file__), "..", "samples", "scenes")


def scene(name):
    return crowdcore.load_scenario(os.path.join(SCENES, name + ".toml"))


def state(w):
    return (w.ids.copy(), w.positions.copy(), w.velocities.copy(), w.frame)


def run_checked(w, frames, dt=0.1):
    """Step, checking every frame with independent checks; returns (worst overlap fraction, crossings)."""
    worst, crossings = 0.0, 0
    radius_of = dict(zip(w.ids.tolist(), w.agents["radius"].tolist()))
    for _ in range(frames):
        prev = (w.ids.copy(), w.positions.copy())
        w.step(dt)
        crossings += len(wall_crossings(w, *prev)[0])
        ov = pair_overlaps(w.positions, np.array([radius_of[i] for i in w.ids.tolist()]), w.ids, tolerance=0.0)
        if len(ov):
            worst = max(worst, float(ov[:, 2].max()))
        if w.agent_count == 0:
            break
    return worst, crossings


def test_corridor_walk_time():
    # RiMEA guideline test 1 [M] (../shared/REFERENCES.md): one person at 1.33 m/s along a 40 m x 2 m
    # corridor takes 26-34 s.
    t = verify.case_corridor(quick=True)["values"]["walk_time_s"]   # the verification suite's own run
    assert t is not None and 26.0 <= t <= 34.0, t


def test_corner_no_wall_crossed():
    # RiMEA test 6 / IMO MSC.1/Circ.1533 test 6 [M]: 20 persons round a left-hand 90-degree corner in a
    # 2 m corridor without crossing any wall.
    w = scene("corner")
    worst, crossings = run_checked(w, 600)
    assert crossings == 0
    assert w.arrived_total == 20, w.arrived_total
    assert worst <= 0.01   # ORCA guarantee [V abstract, M conditions]: no overlap beyond 1% of the radius sum


def test_step_rejects_bad_dt_and_changes_nothing():
    w = scene("corner")
    w.step(0.1)
    before = state(w)
    for bad in (0.0, -0.1, float("nan"), float("inf"), 5.0, "0.1", True):
        with pytest.raises(StepError, match="dt"):
            w.step(bad)
        after = state(w)
        assert all(np.array_equal(a, b) for a, b in zip(before, after))


def test_bad_agent_input_changes_nothing():
    w = scene("corner")
    before = state(w)
    with pytest.raises(StepError, match=r"positions\[1\]"):
        w.add_agents([[1.0, 1.0], [np.nan, 1.0]])
    with pytest.raises(StepError, match="unknown agent id"):
        w.remove_agents([w.ids[0], 99999])
    with pytest.raises(StepError, match="radius"):
        w.add_agents([[1.0, 1.0]], radius=-1)
    assert all(np.array_equal(a, b) for a, b in zip(before, state(w)))


def test_empty_batches_add_and_remove_nothing():
    w = scene("corner")
    before = state(w)
    assert w.add_agents(np.zeros((0, 2)), velocity=np.zeros((0, 2))).tolist() == []
    w.remove_agents([])
    assert all(np.array_equal(a, b) for a, b in zip(before, state(w)))
    w.step(0.1)  # and the world still steps


def test_world_in_code_and_queries():
    w = crowdcore.World(seed=2)
    w.add_wall([[0, 0], [20, 0]])
    goal = w.add_target("goal", "circle", (18, 2, 1.0))
    ids = w.add_agents([[1, 1], [1, 3], [5, 1]], target=goal, pref_speed=1.3)
    assert ids.tolist() == [1, 2, 3]
    assert sorted(w.neighbours(1, 2, 1.01).tolist()) == [1, 2]
    with pytest.raises(ValueError):
        w.positions[0, 0] = 3.0          # views are read-only
    w.remove_agents([2])
    assert w.ids.tolist() == [1, 3]
    for _ in range(200):
        w.step(0.1)
    assert w.arrived_total == 2


def test_same_result_on_one_and_two_threads():
    runs = []
    for threads in (1, 2):
        _jit.set_threads(threads)
        try:
            w = scene("crossing")
            for _ in range(40):
                w.step()
            runs.append(state(w))
        finally:
            _jit.set_threads(_jit.max_threads())
    for a, b in zip(*runs):
        assert np.array_equal(a, b)


def test_social_force_runs_and_reports_overlap():
    w = scene("corner")
    w.set_params(avoidance="social-force")
    worst, crossings = run_checked(w, 300)
    assert crossings == 0      # the move guard holds for every model
    assert np.isfinite(w.positions).all()
