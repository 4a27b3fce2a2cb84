"""Budget benchmark harness (tiny sizes: well-formed JSON and plots) and the budget governor's logic.

No timing is asserted anywhere: timings depend on the machine. The governor is checked for
determinism: its decisions are pure functions, and a governed run replays bit-exactly.
"""
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from crowdcore import governor as gv
from crowdcore.budget import SCENES, TINY, fit_exponent, layout, run_budget
from crowdcore.errors import ScenarioError

coeff = st.floats(0.0, 1.0, allow_nan=False)
coeffs_st = st.tuples(st.floats(0.0, 10.0), coeff, coeff, coeff, coeff)


def plan_reference(n, budget, coeffs, z_max, k_min, k_max):
    """Obvious version of the rule: every (z, K) in order of preference, the first that fits HEADROOM x budget."""
    if budget <= 0:
        return z_max, k_max
    prefs = [(z, k_max) for z in range(z_max, -1, -1)] + [(0, k) for k in range(k_max - 1, k_min - 1, -1)]
    for z, k in prefs:
        c0, ca, cn, cb, cw = coeffs
        if c0 + n * (ca + cn * k + cb * (2 * z + 1) + (cw if z > 0 else 0.0)) <= gv.HEADROOM * budget:
            return z, k
    return 0, k_min


@settings(max_examples=200, deadline=None)
@given(st.integers(0, 100000), st.integers(0, 64), st.integers(0, 20), coeffs_st)
def test_estimate_never_falls_when_work_grows(n, k, z, coeffs):
    e = gv.estimate_ms(n, k, z, coeffs)
    assert e >= 0
    assert gv.estimate_ms(n + 1, k, z, coeffs) >= e
    assert gv.estimate_ms(n, k + 1, z, coeffs) >= e
    assert gv.estimate_ms(n, k, z + 1, coeffs) >= e


@settings(max_examples=300, deadline=None)
@given(st.integers(0, 50000), st.floats(0.0, 100.0), coeffs_st, st.integers(0, 10), st.integers(0, 8),
       st.integers(0, 8))
def test_plan_matches_reference_and_fits(n, budget, coeffs, z_max, k_min, dk):
    k_max = k_min + dk
    got = gv.plan(n, budget, coeffs, z_max, k_min, k_max)
    assert got == plan_reference(n, budget, coeffs, z_max, k_min, k_max)
    assert got == gv.plan(n, budget, coeffs, z_max, k_min, k_max)  # same inputs, same decision
    z, k = got
    assert 0 <= z <= z_max and k_min <= k <= k_max
    if budget > 0 and (z, k) != (0, k_min):
        assert gv.estimate_ms(n, k, z, coeffs) <= gv.HEADROOM * budget


def test_four_coefficients_read_as_the_model_without_the_wide_step():
    assert gv.check_coeffs((1, 2, 3, 4)) == (1.0, 2.0, 3.0, 4.0, 0.0)
    assert gv.estimate_ms(10, 4, 2, (1, 2, 3, 4)) == gv.estimate_ms(10, 4, 2, (1, 2, 3, 4, 0))
    assert gv.estimate_ms(10, 4, 1, (0, 0, 0, 0, 1.0)) == 10.0 and gv.estimate_ms(10, 4, 0, (0, 0, 0, 0, 1.0)) == 0.0


@settings(max_examples=100, deadline=None)
@given(st.integers(0, 20000), st.integers(1, 5000), st.floats(1.0, 50.0), coeffs_st)
def test_more_agents_never_widen_the_search(n, extra, budget, coeffs):
    z1, k1 = gv.plan(n, budget, coeffs, 8, 4, 10)
    z2, k2 = gv.plan(n + extra, budget, coeffs, 8, 4, 10)
    assert (k2, z2) <= (k1, z1)  # lexicographic: K only drops once z is 0


def test_plan_examples_and_bounds():
    c = (1.0, 0.001, 0.0001, 0.0002)
    assert gv.plan(100, 0.0, c, 3, 4, 10) == (3, 10)      # budget 0 = governor off
    assert gv.plan(100, 1e9, c, 3, 4, 10) == (3, 10)
    assert gv.plan(10**7, 5.0, c, 3, 4, 10) == (0, 4)     # nothing fits: the cheapest setting
    n = gv.max_agents(33.3, c, 10, 3)
    assert gv.estimate_ms(n, 10, 3, c) <= 33.3 < gv.estimate_ms(n + 1, 10, 3, c)
    with pytest.raises(ScenarioError, match="k_min"):
        gv.plan(100, 10.0, c, 3, 5, 4)


@pytest.mark.parametrize("bad, name", [((1, 2, 3), "budget_coeffs"), ((1, 2, -1, 0), "nbr_ms"),
                                       ((1, 2, 3, 4, 5, 6), "budget_coeffs"), ((1, 2, 0, 0, -1), "wide_ms"),
                                       ((1, math.nan, 0, 0), "agent_ms"), ("abcd", "budget_coeffs"),
                                       ((True, 0, 0, 0), "c0_ms")])
def test_check_coeffs_names_the_problem(bad, name):
    with pytest.raises(ScenarioError, match=name):
        gv.check_coeffs(bad)


def test_governed_run_replays_bit_exact(tmp_path):
    from crowdcore.recording import replay
    # invented coefficients chosen so z and then K fall while agents are added
    coeffs = (0.0, 0.0, 0.001, 0.002)
    path = tmp_path / "governed.rec"
    a = gv.run_governed(1.0, coeffs, start=20, add=12, frames=8, z_max=8, k_min=4, k_max=10,
                        recorder_path=path)
    assert len(set(a["z"])) > 1 and a["z"] == sorted(a["z"], reverse=True)
    assert a["n"][-1] > a["n"][0]
    report = replay(path)
    assert report.identical, str(report)
    assert report.frames_checked == 8
    assert report.world.state_hash() == a["state_hash"]
    b = gv.run_governed(1.0, coeffs, start=20, add=12, frames=8, z_max=8, k_min=4, k_max=10)
    assert (b["z"], b["k"], b["state_hash"]) == (a["z"], a["k"], a["state_hash"])


def test_builtin_governor_replays_bit_exact(tmp_path):
    from crowdcore.params import Params
    from crowdcore.recording import replay
    if not hasattr(Params(), "budget_ms"):
        pytest.skip("World has no built-in governor yet")
    coeffs = (0.0, 0.0, 0.001, 0.002)
    path = tmp_path / "builtin.rec"
    a = gv.run_governed(1.0, coeffs, start=20, add=12, frames=6, recorder_path=path, builtin=True)
    assert len(set(a["z"])) > 1
    assert a["z"] == [gv.plan(n, 1.0, coeffs, 8, 4, 10)[0] for n in a["n"]]
    report = replay(path)
    assert report.identical, str(report)
    assert report.world.state_hash() == a["state_hash"]


@pytest.mark.parametrize("kind", SCENES)
def test_benchmark_scenes_spawn_apart_and_inside(kind):
    from scipy.spatial import cKDTree  # reference: scipy.spatial.cKDTree
    lay = layout(kind, 500)
    pos = lay.positions
    assert pos.shape == (500, 2) and len(lay.target) == 500
    d, _ = cKDTree(pos).query(pos, k=2)
    assert d[:, 1].min() >= 0.5  # two radii of 0.25 m: no overlap at spawn
    assert pos.min() > 1.0 and pos[:, 1].max() < lay.side


def test_fit_exponent_recovers_a_power_law():
    n = np.array([1000, 2000, 5000, 10000, 20000])
    assert fit_exponent(n, 3e-3 * n ** 1.1) == pytest.approx(1.1)
    assert math.isnan(fit_exponent([1000], [3.0]))


def test_tiny_run_writes_well_formed_json_and_plots(tmp_path):
    from PIL import Image
    res = run_budget(out_dir=str(tmp_path), progress=False, config=TINY)
    data = json.loads((tmp_path / "budget.json").read_text())
    assert data == json.loads(json.dumps(res))
    for key in ("max_agents_30fps", "max_agents_60fps", "pruned_vs_full_speedup", "pruned_equals_full",
                "hash_vs_kdtree_speedup", "scaling_exponent", "threads_speedup", "machine", "curve",
                "search_width", "buckets", "governor", "phase_breakdown_at", "sustained", "sustained_fits_30fps"):
        assert key in data, key
    assert [r["after_frames"] for r in data["sustained"]] == [TINY.sustained_after]
    assert data["pruned_equals_full"] is True
    assert data["hash_vs_kdtree"]["same_neighbour_distances"] is True
    assert isinstance(data["max_agents_30fps"], int) and data["max_agents_30fps"] >= data["max_agents_60fps"]
    for row in data["curve"]["square-1"]:
        assert set(row["phases"]) >= {"index", "sense", "navigate", "avoid", "choose", "move"}
        assert row["ms_p95"] >= row["ms_median"] >= 0
    assert {"cpu_model", "cpu_count", "numba_threads", "threading_layer", "numpy", "numba"} <= set(data["machine"])
    for name in ("ms_vs_agents", "phases", "search_cost", "governor"):
        with Image.open(data["plots"][name]) as im:
            assert im.format == "PNG" and im.size[0] > 100
