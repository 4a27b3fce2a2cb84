"""Spatial hash for agents (rebuilt every frame) and a static grid for wall segments.

The agent hash is a uniform grid over fixed bounds, filled by a counting sort, so a rebuild is
two passes over the agents and no allocation per agent. Agents outside the bounds fall into the
border cells, which keeps queries exact (border cells are just fuller).

Neighbour lists are sorted by (squared distance, agent id): everything downstream then sums in
an order that does not depend on row order or thread count.
"""
import numpy as np
from numba import prange

from ._jit import inline_kernel, kernel, parallel_kernel


class HashGrid:
    """Geometry of a uniform grid: origin, cell size and dimensions (plain numbers for kernels)."""

    __slots__ = ("ox", "oy", "cell", "nx", "ny")

    def __init__(self, ox, oy, cell, nx, ny):
        self.ox, self.oy, self.cell, self.nx, self.ny = float(ox), float(oy), float(cell), int(nx), int(ny)

    @classmethod
    def covering(cls, xmin, ymin, xmax, ymax, cell, max_cells=1 << 22):
        """A grid over the bounds with cells at least `cell` wide and at most `max_cells` cells."""
        if not (cell > 0 and np.isfinite(cell)):
            raise ValueError(f"cell: must be a positive finite number, got {cell!r}")
        w, h = max(xmax - xmin, cell), max(ymax - ymin, cell)
        while (int(w / cell) + 1) * (int(h / cell) + 1) > max_cells:
            cell *= 2.0
        return cls(xmin, ymin, cell, int(w / cell) + 1, int(h / cell) + 1)

    @property
    def args(self):
        return self.ox, self.oy, self.cell, self.nx, self.ny


@kernel
def _cell_of(x, y, ox, oy, cell, nx, ny):
    cx = int(np.floor((x - ox) / cell)) if np.isfinite(x) else 0
    cy = int(np.floor((y - oy) / cell)) if np.isfinite(y) else 0
    cx = min(max(cx, 0), nx - 1)
    cy = min(max(cy, 0), ny - 1)
    return cx, cy


@kernel
def build_hash(pos, ox, oy, cell, nx, ny, cell_start, cell_items):
    """Counting sort of agent rows into cells. cell_start: int32[nx*ny+1], cell_items: int32[n]."""
    n = pos.shape[0]
    cell_start[:] = 0
    agent_cell = np.empty(n, np.int32)
    for i in range(n):
        cx, cy = _cell_of(pos[i, 0], pos[i, 1], ox, oy, cell, nx, ny)
        c = cy * nx + cx
        agent_cell[i] = c
        cell_start[c + 1] += 1
    for c in range(nx * ny):
        cell_start[c + 1] += cell_start[c]
    fill = cell_start[:-1].copy()
    for i in range(n):
        c = agent_cell[i]
        cell_items[fill[c]] = i
        fill[c] += 1


@inline_kernel
def _insert_sorted(best_d, best_j, count, k, d, j, ids):
    """Insert candidate j at squared distance d into the sorted top-k list (key: d, then id)."""
    if count == k:
        last = count - 1
        if d > best_d[last] or (d == best_d[last] and ids[j] >= ids[best_j[last]]):
            return count
        count -= 1
    p = count
    while p > 0 and (best_d[p - 1] > d or (best_d[p - 1] == d and ids[best_j[p - 1]] > ids[j])):
        best_d[p] = best_d[p - 1]
        best_j[p] = best_j[p - 1]
        p -= 1
    best_d[p] = d
    best_j[p] = j
    return count + 1


_BLOCK = 64  # agents per parallel work item; scratch buffers are allocated once per block


_CHUNK = 64  # candidates filtered per pass in knn_phase


@parallel_kernel
def knn_phase(pos, ids, cell_start, cell_items, ox, oy, cell, nx, ny, radius, nbr, nbr_count):
    """For every agent, up to K = nbr.shape[1] nearest other agents within `radius`.

    Writes nbr[i, :nbr_count[i]] as row indices sorted by (squared distance, id). Cells gx0..gx1
    of one grid row are consecutive in cell_items, so each row of the query square is one run of
    candidates; a branch-free pass keeps those within the radius (about a third), and only they
    reach the top-K insertion. The insertion is written out inline: calling a helper with array
    arguments costs atomic reference counting per call, which dominated this loop. The result is
    the K smallest (distance^2, id) keys, whatever order candidates arrive in (ids are unique)."""
    n = pos.shape[0]
    k = nbr.shape[1]
    r2 = radius * radius
    reach = int(np.ceil(radius / cell))
    nblocks = (n + _BLOCK - 1) // _BLOCK
    for b in prange(nblocks):
        best_d = np.empty(k + 1, np.float64)
        best_j = np.empty(k + 1, np.int32)
        cd = np.empty(_CHUNK, np.float64)
        cj = np.empty(_CHUNK, np.int32)
        for i in range(b * _BLOCK, min((b + 1) * _BLOCK, n)):
            count = 0
            x, y = pos[i, 0], pos[i, 1]
            cx, cy = _cell_of(x, y, ox, oy, cell, nx, ny)
            gx0 = max(cx - reach, 0)
            gx1 = min(cx + reach, nx - 1)
            lim = r2
            # slack for rounding in the row test below (a row's agents lie within its strip up to the
            # rounding of their cell index): far below any real distance, far above the rounding
            eps = 1e-9 * (1.0 + abs(y) + abs(oy) + ny * cell)
            for t in range(2 * reach + 1):
                # the agent's own row first, then outwards (0, +1, -1, +2, ...): near candidates
                # fill the list early and tighten `lim`, so fewer of the rest reach the insertion
                gy = cy + (t + 1) // 2 if t % 2 else cy - t // 2
                if gy < 0 or gy >= ny:
                    continue
                # Skip a row whose strip lies farther than `lim` in y alone: every candidate in it has
                # d >= gap^2 > lim and would fail the test below (5% of this phase at 1 agent/m^2,
                # 25% at 4). Border rows hold agents outside the bounds, but only on their far side.
                if gy > cy:
                    gap = (oy + gy * cell - y) - eps
                elif gy < cy:
                    gap = (y - (oy + (gy + 1) * cell)) - eps
                else:
                    gap = 0.0
                if gap > 0.0 and gap * gap > lim:
                    continue
                s1 = cell_start[gy * nx + gx1 + 1]
                s0 = cell_start[gy * nx + gx0]
                while s0 < s1 and k > 0:
                    e = min(s0 + _CHUNK, s1)
                    m = 0
                    for s in range(s0, e):
                        j = cell_items[s]
                        dx = pos[j, 0] - x
                        dy = pos[j, 1] - y
                        d = dx * dx + dy * dy
                        cd[m] = d
                        cj[m] = j
                        m += (d <= lim) & (j != i)
                    s0 = e
                    for q in range(m):
                        d = cd[q]
                        j = cj[q]
                        idj = ids[j]
                        if count == k:
                            last = best_j[k - 1]
                            if d > best_d[k - 1] or (d == best_d[k - 1] and idj >= ids[last]):
                                continue
                            count -= 1
                        p = count
                        while p > 0 and (best_d[p - 1] > d or (best_d[p - 1] == d and ids[best_j[p - 1]] > idj)):
                            best_d[p] = best_d[p - 1]
                            best_j[p] = best_j[p - 1]
                            p -= 1
                        best_d[p] = d
                        best_j[p] = j
                        count += 1
                        if count == k:
                            lim = best_d[k - 1]   # a candidate beyond the K-th cannot enter
            for s in range(count):
                nbr[i, s] = best_j[s]
            for s in range(count, k):
                nbr[i, s] = -1
            nbr_count[i] = count


@kernel
def query_radius(pos, cell_start, cell_items, ox, oy, cell, nx, ny, x, y, radius, out):
    """Rows of agents within `radius` of (x, y), ascending; returns the total count.

    Writes at most len(out) rows; a caller with a short buffer learns the size it needs.
    """
    r2 = radius * radius
    cx0, cy0 = _cell_of(x - radius, y - radius, ox, oy, cell, nx, ny)
    cx1, cy1 = _cell_of(x + radius, y + radius, ox, oy, cell, nx, ny)
    total = 0
    for gy in range(cy0, cy1 + 1):
        for gx in range(cx0, cx1 + 1):
            c = gy * nx + gx
            total += cell_start[c + 1] - cell_start[c]
    hits = np.empty(total, np.int32)
    count = 0
    for gy in range(cy0, cy1 + 1):
        for gx in range(cx0, cx1 + 1):
            c = gy * nx + gx
            for s in range(cell_start[c], cell_start[c + 1]):
                j = cell_items[s]
                dx = pos[j, 0] - x
                dy = pos[j, 1] - y
                if dx * dx + dy * dy <= r2:
                    hits[count] = j
                    count += 1
    hits = np.sort(hits[:count])
    for s in range(min(count, out.shape[0])):
        out[s] = hits[s]
    return count


# ---------------------------------------------------------------- wall segments

def build_wall_grid(walls, grid, margin):
    """CSR lists of segment indices per cell; a segment is in every cell its bbox+margin touches."""
    ox, oy, cell, nx, ny = grid.args
    cells_of = []
    for s, (x0, y0, x1, y1) in enumerate(np.asarray(walls, np.float64).reshape(-1, 4)):
        gx0, gy0 = _cell_of(min(x0, x1) - margin, min(y0, y1) - margin, ox, oy, cell, nx, ny)
        gx1, gy1 = _cell_of(max(x0, x1) + margin, max(y0, y1) + margin, ox, oy, cell, nx, ny)
        gy, gx = np.mgrid[gy0:gy1 + 1, gx0:gx1 + 1]
        cells_of.append(np.stack([(gy * nx + gx).ravel(), np.full(gx.size, s)], axis=1))
    pairs = np.concatenate(cells_of) if cells_of else np.zeros((0, 2), np.int64)
    pairs = pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))]
    start = np.zeros(nx * ny + 1, np.int32)
    np.add.at(start, pairs[:, 0] + 1, 1)
    return np.cumsum(start).astype(np.int32), pairs[:, 1].astype(np.int32)


@kernel
def walls_near(x, y, reach, walls, wall_cell_start, wall_cell_items, ox, oy, wc, wnx, wny, out):
    """Indices (ascending, unique) of segments listed in cells within `reach` of (x, y).

    Candidates only: the caller tests real distances. Returns the count, at most len(out)."""
    cx0, cy0 = _cell_of(x - reach, y - reach, ox, oy, wc, wnx, wny)
    cx1, cy1 = _cell_of(x + reach, y + reach, ox, oy, wc, wnx, wny)
    count = 0
    cap = out.shape[0]
    for gy in range(cy0, cy1 + 1):
        for gx in range(cx0, cx1 + 1):
            c = gy * wnx + gx
            for s in range(wall_cell_start[c], wall_cell_start[c + 1]):
                w = wall_cell_items[s]
                p = 0
                while p < count and out[p] < w:
                    p += 1
                if p < count and out[p] == w:
                    continue
                if count == cap:
                    if p == cap:
                        continue
                    count -= 1  # keep the lowest indices when the buffer is full
                for q in range(count, p, -1):
                    out[q] = out[q - 1]
                out[p] = w
                count += 1
    return count


@inline_kernel
def any_wall_near(x, y, reach, wall_cell_start, ox, oy, wc, wnx, wny):
    """False when no cell within `reach` of (x, y) lists a segment, so walls_near would find none.

    Cheap enough to run for every agent: most agents are far from every wall, and skipping the
    walls_near call also skips its per-call array reference counting."""
    cx0, cy0 = _cell_of(x - reach, y - reach, ox, oy, wc, wnx, wny)
    cx1, cy1 = _cell_of(x + reach, y + reach, ox, oy, wc, wnx, wny)
    for gy in range(cy0, cy1 + 1):
        # cells cx0..cx1 of one row are consecutive in the CSR lists
        if wall_cell_start[gy * wnx + cx1 + 1] > wall_cell_start[gy * wnx + cx0]:
            return True
    return False


@kernel
def segments_cross(ax, ay, bx, by, cx, cy, dx, dy):
    """True if segment a-b properly intersects or touches segment c-d."""
    d1 = (dx - cx) * (ay - cy) - (dy - cy) * (ax - cx)
    d2 = (dx - cx) * (by - cy) - (dy - cy) * (bx - cx)
    d3 = (bx - ax) * (cy - ay) - (by - ay) * (cx - ax)
    d4 = (bx - ax) * (dy - ay) - (by - ay) * (dx - ax)
    if ((d1 > 0 and d2 < 0) or (d1 < 0 and d2 > 0)) and ((d3 > 0 and d4 < 0) or (d3 < 0 and d4 > 0)):
        return True
    return False


@kernel
def point_segment_distance(px, py, x0, y0, x1, y1):
    """Distance from a point to a segment and the closest point on it."""
    ex, ey = x1 - x0, y1 - y0
    l2 = ex * ex + ey * ey
    t = 0.0
    if l2 > 0.0:
        t = ((px - x0) * ex + (py - y0) * ey) / l2
        t = min(max(t, 0.0), 1.0)
    qx, qy = x0 + t * ex, y0 + t * ey
    return np.hypot(px - qx, py - qy), qx, qy
