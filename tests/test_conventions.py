"""Walking conventions (phases.conventions_phase, phases.flow_grid) against a slow, plain reference."""
import math

import numpy as np
from hypothesis import given, settings, strategies as st

from crowdcore.phases import _unit_hash, conventions_phase, flow_grid

FOX, FOY, FCELL, FNX, FNY = -5.0, -5.0, 1.5, 8, 8


def ref_flow(pos, vel):
    flow = np.zeros((FNY, FNX, 3))
    for (x, y), (vx, vy) in zip(pos, vel):
        cx, cy = math.floor((x - FOX) / FCELL), math.floor((y - FOY) / FCELL)
        if 0 <= cx < FNX and 0 <= cy < FNY:
            flow[cy, cx] += (vx, vy, 1.0)
    return flow


def ref_conventions(pos, vel, radius, ids, target, nav, nbrs, pref, T, cone_deg, keep_deg, flow, look, jostle_deg, seed,
                    frame, overtake_deg=0.0):
    out = pref.copy()
    for i in range(len(pos)):
        e = nav[i]
        if e[0] == 0 and e[1] == 0:
            continue
        limit, oncoming, lead_along, lead_ahead = math.inf, False, 0.0, 0.0
        for j in nbrs[i]:
            d_vec = pos[j] - pos[i]
            d = math.sqrt(d_vec[0] * d_vec[0] + d_vec[1] * d_vec[1])
            ahead = d_vec[0] * e[0] + d_vec[1] * e[1]
            if d == 0 or ahead <= 0:
                continue
            along = vel[j, 0] * e[0] + vel[j, 1] * e[1]
            if along < 0:
                oncoming = oncoming or target[j] != target[i]   # same target: converging, not oncoming
                continue
            if ahead < math.cos(math.radians(cone_deg)) * d:
                continue
            vj2 = vel[j, 0] ** 2 + vel[j, 1] ** 2
            if vj2 <= 0.01 or along * along < 0.25 * vj2:
                continue
            if T > 0 and max(0.0, d - radius[i] - radius[j]) / T < limit:
                limit = max(0.0, d - radius[i] - radius[j]) / T
                lead_along, lead_ahead = along, ahead
        stuck = jostle_deg != 0 and vel[i] @ vel[i] < 0.04 * (pref[i] @ pref[i]) and any(
            math.sqrt((pos[j] - pos[i]) @ (pos[j] - pos[i])) - radius[i] - radius[j] < 0.05 for j in nbrs[i])
        if not oncoming and keep_deg != 0:
            for k in range(1, int(look / (0.5 * FCELL)) + 1):
                q = pos[i] + e * 0.5 * FCELL * k
                cx, cy = math.floor((q[0] - FOX) / FCELL), math.floor((q[1] - FOY) / FCELL)
                if 0 <= cx < FNX and 0 <= cy < FNY and flow[cy, cx, 2] > 0 and \
                        flow[cy, cx, 0] * e[0] + flow[cy, cx, 1] * e[1] < -0.3 * flow[cy, cx, 2]:
                    oncoming = True
                    break
        p = pref[i].copy()
        sp = math.sqrt(p[0] * p[0] + p[1] * p[1])
        # overtaking: a slower leader sets the cap and nobody is on the left, from 0.5 m behind to 1 m past it
        left_free = all(not (-0.5 < (pos[j] - pos[i]) @ e < lead_ahead + 1.0
                             and 0 < e[0] * (pos[j] - pos[i])[1] - e[1] * (pos[j] - pos[i])[0]
                             < radius[i] + radius[j] + 0.3) for j in nbrs[i]) if limit < math.inf else False
        if overtake_deg != 0 and sp > limit and lead_along < 0.85 * sp and left_free:
            a = math.radians(overtake_deg)        # anticlockwise: pass on the left, at full speed
            p = np.array([math.cos(a) * p[0] - math.sin(a) * p[1], math.sin(a) * p[0] + math.cos(a) * p[1]])
        elif sp > limit:
            p *= limit / sp
        if oncoming and keep_deg != 0:
            a = -math.radians(keep_deg)          # clockwise
            p = np.array([math.cos(a) * p[0] - math.sin(a) * p[1], math.sin(a) * p[0] + math.cos(a) * p[1]])
        if stuck:
            ang = (2 * _unit_hash(seed, ids[i], frame // 5) - 1) * math.radians(jostle_deg)
            p = np.array([math.cos(ang) * p[0] - math.sin(ang) * p[1], math.sin(ang) * p[0] + math.cos(ang) * p[1]])
        out[i] = p
    return out


@settings(max_examples=80, deadline=None, derandomize=True)
@given(st.integers(0, 10**6), st.integers(1, 25), st.sampled_from([0.0, 0.5]), st.sampled_from([0.0, 25.0]),
       st.sampled_from([0.0, 30.0]), st.integers(0, 40), st.sampled_from([0.0, 20.0]))
def test_kernel_equals_reference(seed, n, T, keep, jostle, frame, overtake):
    rng = np.random.default_rng(seed)
    pos = rng.uniform(-4, 6, (n, 2))
    vel = rng.normal(0, 0.8, (n, 2)) * rng.integers(0, 2, (n, 1))        # some agents stand still
    radius = rng.uniform(0.2, 0.3, n)
    ids = rng.permutation(np.arange(1, n + 1)).astype(np.int32)
    target = rng.integers(0, 2, n).astype(np.int32)
    ang = rng.uniform(-np.pi, np.pi, n)
    nav = np.column_stack([np.cos(ang), np.sin(ang)]) * (rng.random((n, 1)) > 0.1)
    pref = nav * rng.uniform(0.8, 1.6, (n, 1))
    k = 10
    nbr = np.full((n, k), -1, np.int32)
    cnt = np.zeros(n, np.int32)
    nbrs = []
    for i in range(n):
        cand = sorted(((float(((pos[j] - pos[i]) ** 2).sum()), int(ids[j]), j) for j in range(n) if j != i
                       and ((pos[j] - pos[i]) ** 2).sum() <= 2.5 ** 2))[:k]
        nbrs.append([j for _, _, j in cand])
        cnt[i] = len(cand)
        nbr[i, :len(cand)] = nbrs[-1]
    flow = np.empty((FNY, FNX, 3))
    flow_grid(pos, vel, FOX, FOY, FCELL, FNX, FNY, flow)
    assert np.allclose(flow, ref_flow(pos, vel), rtol=0, atol=1e-12)
    got = pref.copy()
    conventions_phase(pos, vel, radius, ids, target, nav, nbr, cnt, T, math.cos(math.radians(30.0)), math.radians(keep),
                      flow, FOX, FOY, FCELL, 10.0, math.radians(jostle), seed, frame, got, math.radians(overtake))
    want = ref_conventions(pos, vel, radius, ids, target, nav, nbrs, pref, T, 30.0, keep, flow, 10.0, jostle, seed, frame,
                           overtake)
    assert np.allclose(got, want, rtol=0, atol=1e-12)


def _pair(leader_vel, gap=0.3, keep=0.0, targets=(0, 1)):
    pos = np.array([[0.0, 0.0], [0.5 + gap, 0.0]])
    vel = np.array([[1.0, 0.0], leader_vel])
    nav = np.array([[1.0, 0.0], [1.0, 0.0]])
    pref = np.array([[1.3, 0.0], [1.3, 0.0]])
    nbr = np.array([[1], [0]], np.int32)
    flow = np.zeros((FNY, FNX, 3))
    conventions_phase(pos, vel, np.array([0.25, 0.25]), np.array([1, 2], np.int32), np.array(targets, np.int32),
                      nav, nbr, np.array([1, 1], np.int32), 0.5, math.cos(math.radians(30.0)), math.radians(keep),
                      flow, FOX, FOY, FCELL, 10.0, 0.0, 0, 0, pref)
    return pref[0]


def test_headway_follows_a_leader_walking_the_same_way():
    assert np.allclose(_pair([1.0, 0.0]), [0.6, 0.0])           # gap 0.3 m / 0.5 s
    assert np.allclose(_pair([0.0, 0.0]), [1.3, 0.0])           # a standing leader is left to avoidance
    assert np.allclose(_pair([0.0, 1.2]), [1.3, 0.0])           # so is someone crossing the path


def test_keep_right_turns_clockwise_for_oncoming():
    p = _pair([-1.0, 0.0], keep=25.0)
    assert math.isclose(math.hypot(*p), 1.3) and p[1] < 0       # turned to the right of +x
    assert math.isclose(math.degrees(math.atan2(p[1], p[0])), -25.0)


def test_keep_right_ignores_someone_bound_for_the_same_target():
    # converging on one door is not meeting head-on: no turn
    assert np.allclose(_pair([-1.0, 0.0], keep=25.0, targets=(0, 0)), [1.3, 0.0])


def _follow(leader_speed, left_neighbour=False, overtake=20.0):
    # agent 0 at the origin walking +x behind a leader 0.8 m ahead; optionally someone at its left shoulder
    pos = [[0.0, 0.0], [0.8, 0.0]] + ([[0.3, 0.55]] if left_neighbour else [])
    vel = [[1.0, 0.0], [leader_speed, 0.0]] + ([[1.0, 0.0]] if left_neighbour else [])
    n = len(pos)
    pos, vel = np.array(pos), np.array(vel)
    nav = np.tile([1.0, 0.0], (n, 1))
    pref = np.tile([1.3, 0.0], (n, 1))
    nbr = np.array([[j for j in range(n) if j != i] for i in range(n)], np.int32)
    conventions_phase(pos, vel, np.full(n, 0.25), np.arange(1, n + 1, dtype=np.int32), np.zeros(n, np.int32), nav,
                      nbr, np.full(n, n - 1, np.int32), 0.5, math.cos(math.radians(30.0)), 0.0,
                      np.zeros((FNY, FNX, 3)), FOX, FOY, FCELL, 10.0, 0.0, 0, 0, pref, math.radians(overtake))
    return pref[0]


def test_overtake_passes_a_slower_leader_on_the_left_when_free():
    p = _follow(0.6)                                            # leader at 0.6 < 0.85 x 1.3 m/s
    assert math.isclose(math.hypot(*p), 1.3) and math.isclose(math.degrees(math.atan2(p[1], p[0])), 20.0)
    assert np.allclose(_follow(0.6, left_neighbour=True), [0.6, 0.0])   # left blocked: the headway holds (0.3/0.5)
    assert np.allclose(_follow(1.2), [0.6, 0.0])                # leader nearly as fast: follow, do not pass
    assert np.allclose(_follow(0.6, overtake=0.0), [0.6, 0.0])  # off


def test_jostle_angle_is_a_pure_function_of_seed_id_and_half_second():
    a = _unit_hash(7, 3, 10)
    assert a == _unit_hash(7, 3, 10) and 0.0 <= a < 1.0
    assert len({_unit_hash(7, 3, f) for f in range(50)}) == 50
