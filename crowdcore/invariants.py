"""Independent checks of a world's motion between two frames (used by the CLI and the test kit).

These do not trust the step's own bookkeeping: they compare committed positions directly.
"""
import numpy as np
from numba import prange

from ._jit import parallel_kernel
from .spatial import walls_near, segments_cross


@parallel_kernel
def _crossings(p0, p1, walls, wall_start, wall_items, ox, oy, wc, wnx, wny, out):
    for i in prange(p0.shape[0]):
        cand = np.empty(256, np.int32)
        reach = np.hypot(p1[i, 0] - p0[i, 0], p1[i, 1] - p0[i, 1]) + 1e-9
        cnt = walls_near(p0[i, 0], p0[i, 1], reach, walls, wall_start, wall_items, ox, oy, wc, wnx, wny, cand)
        hit = -1
        for c in range(cnt):
            s = cand[c]
            if segments_cross(p0[i, 0], p0[i, 1], p1[i, 0], p1[i, 1], walls[s, 0], walls[s, 1], walls[s, 2], walls[s, 3]):
                hit = s
                break
        out[i] = hit


def wall_crossings(world, prev_ids, prev_pos):
    """(ids, wall segment index) of agents whose move since (prev_ids, prev_pos) crossed a wall."""
    ids = world.ids
    rows = np.searchsorted(prev_ids, ids)
    rows = np.minimum(rows, max(len(prev_ids) - 1, 0))
    both = (len(prev_ids) > 0) & (prev_ids[rows] == ids) if len(prev_ids) else np.zeros(len(ids), bool)
    p0 = np.ascontiguousarray(prev_pos[rows[both]])
    p1 = np.ascontiguousarray(world.positions[both])
    c = world._cache
    hit = np.empty(len(p0), np.int32)
    _crossings(p0, p1, c.segments, c.wall_start, c.wall_items, *c.wall_grid.args, hit)
    bad = hit >= 0
    return ids[both][bad], hit[bad]


def pair_overlaps(positions, radius, ids, tolerance=0.01):
    """All pairs (id_a < id_b, overlap / radius sum) overlapping by more than tolerance x radius sum.

    Uses scipy's cKDTree, an implementation independent of our spatial hash."""
    from scipy.spatial import cKDTree

    if len(positions) < 2:
        return np.zeros((0, 3))
    tree = cKDTree(positions)
    pairs = tree.query_pairs(2.0 * float(np.max(radius)), output_type="ndarray")
    if not len(pairs):
        return np.zeros((0, 3))
    d = np.linalg.norm(positions[pairs[:, 0]] - positions[pairs[:, 1]], axis=1)
    rs = radius[pairs[:, 0]] + radius[pairs[:, 1]]
    frac = (rs - d) / rs
    m = frac > tolerance
    a, b = ids[pairs[m, 0]], ids[pairs[m, 1]]
    return np.column_stack([np.minimum(a, b), np.maximum(a, b), frac[m]])
