"""Spatial hash against scipy's cKDTree (reference: scipy.spatial.cKDTree, a general-purpose PyPI library)."""
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st, HealthCheck
from scipy.spatial import cKDTree

from crowdcore.spatial import (HashGrid, build_hash, build_wall_grid, knn_phase, query_radius, segments_cross,
                               walls_near)


def _hash(pos, cell, bounds=(0.0, 0.0, 10.0, 10.0)):
    g = HashGrid.covering(*bounds, cell)
    start = np.zeros(g.nx * g.ny + 1, np.int32)
    items = np.zeros(len(pos), np.int32)
    build_hash(pos, *g.args, start, items)
    return g, start, items


points = st.integers(0, 60).flatmap(lambda n: st.lists(
    st.tuples(st.floats(-2, 12, allow_nan=False), st.floats(-2, 12, allow_nan=False)), min_size=n, max_size=n))


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(points, st.floats(0.3, 4.0), st.integers(1, 12), st.booleans())
def test_knn_equals_kdtree(pts, radius, k, coincide):
    pos = np.array(pts, dtype=np.float64).reshape(-1, 2)
    if coincide and len(pos) > 3:
        pos[1] = pos[0]          # coincident points
        pos[3] = pos[2]
    n = len(pos)
    ids = np.arange(100, 100 + n, dtype=np.int32)[::-1].copy()   # ids not in row order
    g, start, items = _hash(pos, radius)
    nbr = np.zeros((n, k), np.int32)
    cnt = np.zeros(n, np.int32)
    knn_phase(pos, ids, start, items, *g.args, radius, nbr, cnt)
    if n == 0:
        return
    tree = cKDTree(pos)
    for i in range(n):
        within = [j for j in tree.query_ball_point(pos[i], radius) if j != i]
        # the hash keeps the k nearest by (squared distance, id); recompute that order independently
        d2 = [((pos[j] - pos[i]) ** 2).sum() for j in within]
        expect = [j for _, _, j in sorted(zip(d2, ids[within], within))][:k]
        got = nbr[i, : cnt[i]].tolist()
        # cKDTree tests |d| <= r while the hash tests d^2 <= r^2: only a point within rounding of the rim may differ
        if got != expect:
            rim = [j for j in set(got) ^ set(expect) if abs(np.sqrt(((pos[j] - pos[i]) ** 2).sum()) - radius) < 1e-9]
            assert rim, (i, got, expect)


@settings(max_examples=100, deadline=None)
@given(points, st.floats(0.0, 5.0), st.floats(-2, 12), st.floats(-2, 12))
def test_query_radius_equals_kdtree(pts, r, x, y):
    pos = np.array(pts, dtype=np.float64).reshape(-1, 2)
    g, start, items = _hash(pos, 1.0)
    out = np.zeros(len(pos), np.int32)
    count = query_radius(pos, start, items, *g.args, x, y, r, out)
    got = sorted(out[:count].tolist())
    expect = sorted(cKDTree(pos).query_ball_point([x, y], r)) if len(pos) else []
    diff = set(got) ^ set(expect)
    assert all(abs(np.hypot(*(pos[j] - [x, y])) - r) < 1e-9 for j in diff)


def test_query_radius_reports_size_with_short_buffer():
    pos = np.array([[1.0, 1.0], [1.1, 1.0], [1.2, 1.0]])
    g, start, items = _hash(pos, 1.0)
    out = np.full(1, -7, np.int32)
    assert query_radius(pos, start, items, *g.args, 1.0, 1.0, 1.0, out) == 3
    assert out[0] == 0


def test_walls_near_finds_every_segment_within_reach():
    rng = np.random.default_rng(5)
    walls = rng.uniform(0, 20, (200, 4))
    g = HashGrid.covering(0, 0, 20, 20, 2.0)
    start, items = build_wall_grid(walls, g, 0.0)
    out = np.zeros(256, np.int32)
    for x, y in rng.uniform(0, 20, (100, 2)):
        n = walls_near(x, y, 1.5, walls, start, items, *g.args, out)
        got = out[:n]
        assert np.all(np.diff(got) > 0)
        # brute force: every segment whose distance is <= reach must be among the candidates
        for s, (x0, y0, x1, y1) in enumerate(walls):
            t = np.clip(((x - x0) * (x1 - x0) + (y - y0) * (y1 - y0)) / ((x1 - x0) ** 2 + (y1 - y0) ** 2), 0, 1)
            if np.hypot(x - x0 - t * (x1 - x0), y - y0 - t * (y1 - y0)) <= 1.5:
                assert s in got


@pytest.mark.parametrize("a,b,c,d,expect", [
    ((0, 0), (2, 0), (1, -1), (1, 1), True),
    ((0, 0), (2, 0), (3, -1), (3, 1), False),
    ((0, 0), (2, 0), (0, 1), (2, 1), False),
])
def test_segments_cross(a, b, c, d, expect):
    assert segments_cross(*a, *b, *c, *d) == expect
