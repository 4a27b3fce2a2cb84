"""Contact guard: whatever velocities come in, no pair overlaps and no agent nears a wall after the move."""
import numpy as np
from hypothesis import given, settings, strategies as st

from crowdcore.guard import contact_guard_phase
from crowdcore.spatial import HashGrid, build_hash, build_wall_grid, knn_phase, point_segment_distance

WALLS = np.array([[0, 0, 8, 0], [8, 0, 8, 8], [8, 8, 0, 8], [0, 8, 0, 0], [3, 3, 5, 4.5]], float)


def _neighbours(pos, ids, cell, k, wall_reach):
    """Hash grid, K nearest within `cell` and the wall grid, as a world step builds them."""
    g = HashGrid.covering(-1, -1, 9, 9, cell)
    start = np.zeros(g.nx * g.ny + 1, np.int32)
    items = np.zeros(len(pos), np.int32)
    build_hash(pos, *g.args, start, items)
    nbr = np.zeros((len(pos), k), np.int32)
    cnt = np.zeros(len(pos), np.int32)
    knn_phase(pos, ids, start, items, *g.args, cell, nbr, cnt)
    wg = HashGrid.covering(-1, -1, 9, 9, 2.0)
    ws, wi = build_wall_grid(WALLS, wg, wall_reach)
    return g, start, items, nbr, cnt, wg, ws, wi


def _setup(seed, n, k):
    rng = np.random.default_rng(seed)
    pos = []
    radius = rng.uniform(0.15, 0.3, 4 * n)
    for p, r in zip(rng.uniform(0.4, 7.6, (4 * n, 2)), radius):
        if all(np.hypot(*(p - q)) >= r + rq + 1e-3 for q, rq in pos) and \
                all(point_segment_distance(p[0], p[1], *w)[0] > r + 1e-3 for w in WALLS):
            pos.append((p, r))
        if len(pos) == n:
            break
    P = np.array([p for p, _ in pos])
    R = np.array([r for _, r in pos])
    m = len(P)
    ids = rng.permutation(np.arange(1, m + 1)).astype(np.int32)
    vmax = rng.uniform(0.8, 2.2, m)
    v = rng.normal(0, 1.5, (m, 2))                  # adversarial velocities, often straight into others
    return (P, R, ids, vmax, v) + _neighbours(P, ids, 2.5, k, 0.0)


def _guard(P, R, ids, vmax, v, g, start, items, nbr, cnt, wg, ws, wi, dt):
    out = np.empty_like(v)
    changed = np.zeros(len(P), np.bool_)
    contact_guard_phase(P, ids, R, vmax, v, nbr, cnt, 2.5, start, items, *g.args, WALLS, ws, wi, *wg.args, dt, out, changed)
    return out, changed


@settings(max_examples=60, deadline=None, derandomize=True)
@given(st.integers(0, 10**6), st.integers(2, 60), st.sampled_from([0.05, 0.1, 0.25]), st.sampled_from([0, 4, 10]))
def test_no_overlap_and_no_wall_contact_after_guard(seed, n, dt, k):
    P, R, ids, vmax, v, g, start, items, nbr, cnt, wg, ws, wi = _setup(seed, n, k)
    out, changed = _guard(P, R, ids, vmax, v, g, start, items, nbr, cnt, wg, ws, wi, dt)
    speed = np.hypot(out[:, 0], out[:, 1])
    assert (speed <= vmax * (1 + 1e-9) + 1e-12).all()
    new = P + out * dt
    for i in range(len(P)):
        for j in range(i + 1, len(P)):
            assert np.hypot(*(new[i] - new[j])) >= (R[i] + R[j]) * (1 - 1e-9)
        for w in WALLS:
            assert point_segment_distance(new[i, 0], new[i, 1], *w)[0] >= R[i] * (1 - 1e-9)
    # an allowed velocity comes back bit for bit
    assert np.array_equal(out[~changed], v[~changed])


@settings(max_examples=30, deadline=None, derandomize=True)
@given(st.integers(0, 10**6), st.integers(2, 60))
def test_neighbour_list_shortcut_equals_hash_search(seed, n):
    # k = 0 forces the hash search; k = 30 mostly takes the shortcut through the sense list
    a = _setup(seed, n, 0)
    b = _setup(seed, n, 30)
    out_a, _ = _guard(*a, 0.1)
    out_b, _ = _guard(*b, 0.1)
    assert np.array_equal(out_a, out_b)


# ------------------------------------------------------------------ pinned outputs
# The sense, avoid and guard kernels were sped up (inlined per-agent bodies, fewer array-argument
# calls, a branch-free radius filter) without changing any arithmetic. These digests are of the
# outputs of the implementation before that change (commit 6e54967), on an invented dense scene
# with walls; any change to a result, even in the last bit, changes them.
PINNED = {
    "knn": "9e9ebe56cd5a8b42e5e57965b4890a1121b0e1fa7c2f284c375bd86bf5116ad7",
    "orca": "47629176b9b294abc01b1af677cb834fa16323e1685bd2a71274730b9c3a0ecf",
    "guard": "a6dd1f320071166b36d165b3d848a06d561401099c0903144ee16480e523ca92",
}


def _pinned_outputs():
    import hashlib
    from crowdcore.orca import orca_phase
    rng = np.random.default_rng(20240611)
    n, k, cap = 900, 10, 26
    pos = rng.uniform(0.2, 7.8, (n, 2))              # ~14 agents/m^2: overlaps, full lists, hash search
    pos[5] = pos[4]                                  # coincident agents
    pos[:20] = np.round(pos[:20] * 4) / 4            # exact distance ties
    ids = rng.permutation(np.arange(3, n + 3)).astype(np.int32)
    vel = rng.normal(0, 1.0, (n, 2))
    radius = rng.uniform(0.15, 0.3, n)
    vmax = rng.uniform(0.8, 2.2, n)
    pref = rng.normal(0, 1.2, (n, 2))
    pref[::3] *= 1e-3                                # mostly allowed: the guard returns these unchanged
    g, start, items, nbr, cnt, wg, ws, wi = _neighbours(pos, ids, 1.2, k, 0.01)
    lines = np.zeros((n, cap, 4))
    lc = np.zeros(n, np.int32)
    vs = np.zeros((n, 2))
    orca_phase(pos, vel, radius, vmax, pref, nbr, cnt, WALLS, ws, wi, *wg.args, 2.0, 0.5, 0.1, np.zeros((n, 2)),
               np.zeros(n), np.zeros(n, np.int32), 0.0, lines, lc, vs)  # queue_gap 0: plain ORCA
    used = np.arange(cap)[None, :] < lc[:, None]
    out = np.zeros((n, 2))
    changed = np.zeros(n, np.bool_)
    contact_guard_phase(pos, ids, radius, vmax, pref, nbr, cnt, 1.2, start, items, *g.args, WALLS, ws, wi, *wg.args,
                        0.1, out, changed)

    def digest(*arrays):
        h = hashlib.sha256()
        for a in arrays:
            h.update(np.ascontiguousarray(a).tobytes())
        return h.hexdigest()
    return {"knn": digest(nbr, cnt), "orca": digest(lines[used], lc, vs), "guard": digest(out, changed)}, changed


def test_kernels_bit_identical_to_pinned_outputs():
    got, changed = _pinned_outputs()
    assert 0 < changed.sum() < len(changed)          # both the unchanged and the projected path ran
    assert got == PINNED
