"""Placing agents without overlap and clear of walls (used when a scenario spawns agents)."""
import numpy as np

from ._jit import kernel
from .navfield import _point_in_poly
from .spatial import point_segment_distance


@kernel
def greedy_place(cand, radius, gap, segments, polys_flat, poly_start, placed, count):
    """Accept candidates in order if they keep `gap` from placed agents and `radius` from walls.

    placed: float64[cap, 2] filled from row `count`; returns the new count. The check against
    placed agents uses a bucket grid so the cost stays linear in the number of candidates."""
    cap = placed.shape[0]
    if cand.shape[0] == 0 or count >= cap:
        return count
    cell = 2.0 * radius + gap
    xmin, ymin = cand[:, 0].min(), cand[:, 1].min()
    xmax, ymax = cand[:, 0].max(), cand[:, 1].max()
    for i in range(count):
        xmin, ymin = min(xmin, placed[i, 0]), min(ymin, placed[i, 1])
        xmax, ymax = max(xmax, placed[i, 0]), max(ymax, placed[i, 1])
    nx = int((xmax - xmin) / cell) + 1
    ny = int((ymax - ymin) / cell) + 1
    head = np.full(nx * ny, -1, np.int64)
    nxt = np.full(cap, -1, np.int64)
    for i in range(count):
        cx = int((placed[i, 0] - xmin) / cell)
        cy = int((placed[i, 1] - ymin) / cell)
        nxt[i] = head[cy * nx + cx]
        head[cy * nx + cx] = i
    need2 = (2.0 * radius + gap) ** 2
    for c in range(cand.shape[0]):
        if count >= cap:
            break
        x, y = cand[c, 0], cand[c, 1]
        ok = True
        for s in range(segments.shape[0]):
            d, _, _ = point_segment_distance(x, y, segments[s, 0], segments[s, 1], segments[s, 2], segments[s, 3])
            if d < radius + 0.5 * gap:
                ok = False
                break
        if ok:
            for p in range(poly_start.shape[0] - 1):
                if _point_in_poly(x, y, polys_flat, poly_start[p], poly_start[p + 1]):
                    ok = False
                    break
        if ok:
            cx = int((x - xmin) / cell)
            cy = int((y - ymin) / cell)
            for gy in range(max(cy - 1, 0), min(cy + 1, ny - 1) + 1):
                for gx in range(max(cx - 1, 0), min(cx + 1, nx - 1) + 1):
                    j = head[gy * nx + gx]
                    while j >= 0 and ok:
                        dx, dy = placed[j, 0] - x, placed[j, 1] - y
                        if dx * dx + dy * dy < need2:
                            ok = False
                        j = nxt[j]
        if ok:
            placed[count, 0] = x
            placed[count, 1] = y
            nxt[count] = head[cy * nx + cx]
            head[cy * nx + cx] = count
            count += 1
    return count


def flatten_polygons(polygons):
    starts = np.zeros(len(polygons) + 1, np.int64)
    for i, p in enumerate(polygons):
        starts[i + 1] = starts[i] + len(p)
    flat = np.vstack(polygons) if polygons else np.zeros((0, 2))
    return np.ascontiguousarray(flat, np.float64), starts


def place_in_rect(rng, rect, count, radius, gap, segments, polygons, existing=None, tries=60):
    """Up to `count` random non-overlapping positions inside rect = (xmin, ymin, xmax, ymax)."""
    xmin, ymin, xmax, ymax = rect
    placed = np.zeros((count + (0 if existing is None else len(existing)), 2))
    n0 = 0
    if existing is not None and len(existing):
        placed[: len(existing)] = existing
        n0 = len(existing)
    flat, starts = flatten_polygons(polygons)
    segs = np.ascontiguousarray(segments, np.float64).reshape(-1, 4)
    # only walls near the rectangle matter
    near = ((np.minimum(segs[:, 0], segs[:, 2]) <= xmax + radius + gap) & (np.maximum(segs[:, 0], segs[:, 2]) >= xmin - radius - gap)
            & (np.minimum(segs[:, 1], segs[:, 3]) <= ymax + radius + gap) & (np.maximum(segs[:, 1], segs[:, 3]) >= ymin - radius - gap))
    segs = np.ascontiguousarray(segs[near])
    got = n0
    for _ in range(tries):
        batch = max(2 * (count + n0 - got), 64)
        cand = np.column_stack([rng.uniform(xmin + radius, xmax - radius, batch), rng.uniform(ymin + radius, ymax - radius, batch)]) \
            if xmax - xmin > 2 * radius and ymax - ymin > 2 * radius else np.zeros((0, 2))
        got = greedy_place(cand, radius, gap, segs, flat, starts, placed, got)
        if got == count + n0:
            break
    return placed[n0:got]
