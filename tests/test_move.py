"""move_phase against a plain reference: a move across a wall is cancelled, arrivals are flagged."""
import numpy as np
from hypothesis import given, settings, strategies as st

from crowdcore.phases import TARGET_CIRCLE, TARGET_RECT, move_phase
from crowdcore.spatial import HashGrid, build_wall_grid


def crosses(a, b, c, d):
    def orient(p, q, r):
        return (q[0] - p[0]) * (r[1] - p[1]) - (q[1] - p[1]) * (r[0] - p[0])
    d1, d2, d3, d4 = orient(c, d, a), orient(c, d, b), orient(a, b, c), orient(a, b, d)
    return d1 * d2 < 0 and d3 * d4 < 0


@settings(max_examples=60, deadline=None, derandomize=True)
@given(st.integers(0, 10**6), st.integers(1, 40), st.sampled_from([0.05, 0.1, 0.5]))
def test_move_phase_equals_reference(seed, n, dt):
    rng = np.random.default_rng(seed)
    walls = rng.uniform(0, 10, (12, 4))
    pos = rng.uniform(0, 10, (n, 2))
    vel = rng.normal(0, 2.0, (n, 2))
    target = rng.integers(-1, 2, n).astype(np.int32)
    kinds = np.array([TARGET_CIRCLE, TARGET_RECT], np.int32)
    shapes = np.array([[5.0, 5.0, 1.5, 0.0], [0.0, 0.0, 3.0, 3.0]])
    g = HashGrid.covering(-1, -1, 11, 11, 2.0)
    ws, wi = build_wall_grid(walls, g, 0.0)
    out_pos, out_vel = np.empty((n, 2)), np.empty((n, 2))
    arrived, blocked = np.empty(n, np.bool_), np.empty(n, np.bool_)
    move_phase(pos, vel, np.full(n, 0.25), target, kinds, shapes, dt, walls, ws, wi, *g.args,
               out_pos, out_vel, arrived, blocked)
    for i in range(n):
        new = pos[i] + vel[i] * dt
        hit = any(crosses(pos[i], new, w[:2], w[2:]) for w in walls)
        assert blocked[i] == hit
        expect = pos[i] if hit else new
        assert np.allclose(out_pos[i], expect, rtol=0, atol=1e-12)
        assert np.allclose(out_vel[i], 0.0 if hit else vel[i])
        t = target[i]
        inside = False
        if t == 0:
            inside = np.hypot(*(expect - [5.0, 5.0])) <= 1.5
        elif t == 1:
            inside = 0 <= expect[0] <= 3 and 0 <= expect[1] <= 3
        assert arrived[i] == inside
