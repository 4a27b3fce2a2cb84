"""Navigation fields: obstacle raster, fast-marching distance and direction per target.

Free space is a regular grid. Cell (i, j) is row i (y) and column j (x); its centre is at
(ox + (j + 0.5) h, oy + (i + 0.5) h). For each target we solve the eikonal equation |grad T| = 1
by first-order fast marching (Sethian 1996, PNAS 93) and store minus the normalised gradient.
Agents read both fields through `sample_dir` / `sample_dist`, which are numba functions that
other kernels call per agent.
"""
import math

import numpy as np

from ._jit import inline_kernel, kernel
from .errors import ScenarioError

TARGET_KINDS = ("circle", "rect")
MAX_CELLS = 1 << 26  # ~67 M cells; a larger grid is almost surely a unit mistake


class Grid:
    """Geometry of the navigation grid (plain numbers, so kernels can take them as arguments)."""

    __slots__ = ("ox", "oy", "h", "nx", "ny")

    def __init__(self, ox, oy, h, nx, ny):
        ox, oy, h = float(ox), float(oy), float(h)
        if not (math.isfinite(ox) and math.isfinite(oy)):
            raise ScenarioError(f"grid origin: must be finite, got ({ox!r}, {oy!r})")
        if not (math.isfinite(h) and h > 0):
            raise ScenarioError(f"grid cell size: must be a positive finite number, got {h!r}")
        nx, ny = int(nx), int(ny)
        if nx < 1 or ny < 1 or nx * ny > MAX_CELLS:
            raise ScenarioError(f"grid size: needs 1 <= nx*ny <= {MAX_CELLS}, got nx={nx}, ny={ny}")
        self.ox, self.oy, self.h, self.nx, self.ny = ox, oy, h, nx, ny

    def centre(self, i, j):
        return self.ox + (j + 0.5) * self.h, self.oy + (i + 0.5) * self.h

    def centres(self):
        """Cell-centre coordinates X, Y, each float64[ny, nx]."""
        xs = self.ox + (np.arange(self.nx) + 0.5) * self.h
        ys = self.oy + (np.arange(self.ny) + 0.5) * self.h
        return np.meshgrid(xs, ys)

    @property
    def args(self):
        return self.ox, self.oy, self.h, self.nx, self.ny

    def __eq__(self, other):
        return isinstance(other, Grid) and self.args == other.args

    def __repr__(self):
        return f"Grid(ox={self.ox!r}, oy={self.oy!r}, h={self.h!r}, nx={self.nx}, ny={self.ny})"


def grid_for_bounds(xmin, ymin, xmax, ymax, h):
    """The grid with origin (xmin, ymin) and cell size h whose cells cover the bounds."""
    vals = [float(v) for v in (xmin, ymin, xmax, ymax)]
    if not all(math.isfinite(v) for v in vals) or not (vals[0] < vals[2] and vals[1] < vals[3]):
        raise ScenarioError(f"bounds: need finite xmin < xmax and ymin < ymax, got {tuple(vals)!r}")
    h = float(h)
    if not (math.isfinite(h) and h > 0):
        raise ScenarioError(f"cell_size: must be a positive finite number, got {h!r}")
    # the tiny slack keeps an exact multiple (10 m / 0.1 m) from gaining a spurious extra column
    nx = max(1, int(math.ceil((vals[2] - vals[0]) / h - 1e-9)))
    ny = max(1, int(math.ceil((vals[3] - vals[1]) / h - 1e-9)))
    if nx * ny > MAX_CELLS:
        raise ScenarioError(f"cell_size: {h!r} over bounds {tuple(vals)!r} gives {nx}x{ny} cells, "
                            f"more than {MAX_CELLS}")
    return Grid(vals[0], vals[1], h, nx, ny)


# ------------------------------------------------------------------------------------ raster
@kernel
def _seg_d2(px, py, x0, y0, x1, y1):
    """Squared distance from a point to a segment (a degenerate segment is a point)."""
    dx = x1 - x0
    dy = y1 - y0
    L2 = dx * dx + dy * dy
    t = 0.0
    if L2 > 0.0:
        t = ((px - x0) * dx + (py - y0) * dy) / L2
        t = min(max(t, 0.0), 1.0)
    qx = x0 + t * dx - px
    qy = y0 + t * dy - py
    return qx * qx + qy * qy


@kernel
def _cell_range(lo, hi, o, h, n):
    """Index range of cell centres within [lo, hi] (one cell of slack each side; callers re-test)."""
    a = math.floor((lo - o) / h - 0.5)
    b = math.ceil((hi - o) / h - 0.5)
    a = min(max(a, 0.0), float(n))  # clamp both ends so huge coordinates never reach int()
    b = min(max(b, -1.0), n - 1.0)
    return int(a), int(b)


@kernel
def _stamp_segments(segs, reach, ox, oy, h, nx, ny, blocked):
    r2 = reach * reach
    for s in range(segs.shape[0]):
        x0 = segs[s, 0]
        y0 = segs[s, 1]
        x1 = segs[s, 2]
        y1 = segs[s, 3]
        j0, j1 = _cell_range(min(x0, x1) - reach, max(x0, x1) + reach, ox, h, nx)
        i0, i1 = _cell_range(min(y0, y1) - reach, max(y0, y1) + reach, oy, h, ny)
        for i in range(i0, i1 + 1):
            cy = oy + (i + 0.5) * h
            for j in range(j0, j1 + 1):
                if blocked[i, j]:
                    continue
                cx = ox + (j + 0.5) * h
                if _seg_d2(cx, cy, x0, y0, x1, y1) <= r2:
                    blocked[i, j] = 1


@kernel
def _point_in_poly(px, py, verts, a, b):
    """Even-odd rule over vertices verts[a:b] (implicitly closed)."""
    inside = False
    k = b - 1
    for m in range(a, b):
        xa = verts[m, 0]
        ya = verts[m, 1]
        xb = verts[k, 0]
        yb = verts[k, 1]
        if (ya > py) != (yb > py):
            xint = (xb - xa) * (py - ya) / (yb - ya) + xa
            if px < xint:
                inside = not inside
        k = m
    return inside


@kernel
def _fill_polygons(verts, starts, ox, oy, h, nx, ny, blocked):
    for p in range(starts.shape[0] - 1):
        a = starts[p]
        b = starts[p + 1]
        if b - a < 3:
            continue
        xmin = verts[a, 0]
        xmax = xmin
        ymin = verts[a, 1]
        ymax = ymin
        for m in range(a + 1, b):
            xmin = min(xmin, verts[m, 0])
            xmax = max(xmax, verts[m, 0])
            ymin = min(ymin, verts[m, 1])
            ymax = max(ymax, verts[m, 1])
        j0, j1 = _cell_range(xmin, xmax, ox, h, nx)
        i0, i1 = _cell_range(ymin, ymax, oy, h, ny)
        for i in range(i0, i1 + 1):
            cy = oy + (i + 0.5) * h
            for j in range(j0, j1 + 1):
                if blocked[i, j]:
                    continue
                if _point_in_poly(ox + (j + 0.5) * h, cy, verts, a, b):
                    blocked[i, j] = 1


def _check_walls(walls):
    w = np.asarray(walls if walls is not None else np.zeros((0, 4)), dtype=np.float64)
    if w.size == 0:
        return np.zeros((0, 4))
    if w.ndim != 2 or w.shape[1] != 4:
        raise ScenarioError(f"walls: must be an array of shape (m, 4) (x0, y0, x1, y1), got shape {w.shape}")
    bad = np.flatnonzero(~np.isfinite(w).all(axis=1))
    if bad.size:
        raise ScenarioError(f"walls[{bad[0]}]: coordinates must be finite, got {w[bad[0]].tolist()!r}")
    return np.ascontiguousarray(w)


def _check_polygons(polygons):
    out = []
    for k, p in enumerate(polygons if polygons is not None else []):
        a = np.asarray(p, dtype=np.float64)
        if a.ndim != 2 or a.shape[1] != 2 or a.shape[0] < 3:
            raise ScenarioError(f"polygons[{k}]: must be an array of at least 3 (x, y) points, got shape {a.shape}")
        if not np.isfinite(a).all():
            raise ScenarioError(f"polygons[{k}]: coordinates must be finite")
        out.append(np.ascontiguousarray(a))
    return out


def _polygon_edges(polys):
    if not polys:
        return np.zeros((0, 4))
    return np.vstack([np.hstack([p, np.roll(p, -1, axis=0)]) for p in polys])


def rasterise(walls, polygons, grid, clearance):
    """blocked uint8[ny, nx]: 1 where the cell centre is inside a polygon or within the wall reach
    of a wall segment or polygon edge.

    The reach is max(clearance, h/2) (slightly more, against rounding): with a smaller reach a thin
    wall could miss every cell centre and let the 4-neighbour march leak through it.
    """
    clearance = float(clearance)
    if not (math.isfinite(clearance) and clearance >= 0):
        raise ScenarioError(f"clearance: must be a finite number >= 0, got {clearance!r}")
    w = _check_walls(walls)
    polys = _check_polygons(polygons)
    segs = np.ascontiguousarray(np.vstack([w, _polygon_edges(polys)]))
    blocked = np.zeros((grid.ny, grid.nx), dtype=np.uint8)
    reach = wall_reach(clearance, grid.h)
    _stamp_segments(segs, reach, grid.ox, grid.oy, grid.h, grid.nx, grid.ny, blocked)
    if polys:
        verts = np.ascontiguousarray(np.vstack(polys))
        starts = np.zeros(len(polys) + 1, dtype=np.int64)
        starts[1:] = np.cumsum([len(p) for p in polys])
        _fill_polygons(verts, starts, grid.ox, grid.oy, grid.h, grid.nx, grid.ny, blocked)
    return blocked


def wall_reach(clearance, h):
    """Distance from a wall within which a cell centre counts as blocked."""
    return max(float(clearance), 0.5 * float(h) * (1.0 + 1e-9))


# ------------------------------------------------------------------------------ fast marching
# The heap keeps (value, cell) pairs side by side in hv/hk so sifting touches contiguous memory;
# hpos[cell] is the cell's slot, for decrease-key. Order: value, then flat index (deterministic).
@kernel
def _sift_up(hv, hk, hpos, p, v, k):
    while p > 0:
        q = (p - 1) >> 1
        if not (v < hv[q] or (v == hv[q] and k < hk[q])):
            break
        hv[p] = hv[q]
        hk[p] = hk[q]
        hpos[hk[p]] = p
        p = q
    hv[p] = v
    hk[p] = k
    hpos[k] = p


@kernel
def _sift_down(hv, hk, hpos, size, p, v, k):
    while True:
        c = 2 * p + 1
        if c >= size:
            break
        if c + 1 < size and (hv[c + 1] < hv[c] or (hv[c + 1] == hv[c] and hk[c + 1] < hk[c])):
            c += 1
        if not (hv[c] < v or (hv[c] == v and hk[c] < k)):
            break
        hv[p] = hv[c]
        hk[p] = hk[c]
        hpos[hk[p]] = p
        p = c
    hv[p] = v
    hk[p] = k
    hpos[k] = p


@kernel
def _eikonal_update(T, state, k, i, j, nx, ny, h):
    """First-order upwind solution at cell k from its accepted 4-neighbours."""
    a = np.inf
    if j > 0 and state[k - 1] == 2:
        a = T[k - 1]
    if j < nx - 1 and state[k + 1] == 2 and T[k + 1] < a:
        a = T[k + 1]
    b = np.inf
    if i > 0 and state[k - nx] == 2:
        b = T[k - nx]
    if i < ny - 1 and state[k + nx] == 2 and T[k + nx] < b:
        b = T[k + nx]
    if a > b:
        a, b = b, a
    if b - a >= h:  # also covers b == inf: only one axis is upwind
        return a + h
    d = a - b
    return 0.5 * (a + b + math.sqrt(2.0 * h * h - d * d))


@kernel
def _relax_neighbours(cur, blocked, T, state, hv, hk, hpos, size, nx, ny, h):
    """Update the far/trial 4-neighbours of the newly accepted cell `cur`; returns the heap size."""
    ci = cur // nx
    cj = cur - ci * nx
    for nb in range(4):
        mi = ci
        mj = cj
        if nb == 0:
            mj = cj - 1
        elif nb == 1:
            mj = cj + 1
        elif nb == 2:
            mi = ci - 1
        else:
            mi = ci + 1
        if mi < 0 or mi >= ny or mj < 0 or mj >= nx:
            continue
        m = mi * nx + mj
        if blocked[m] or state[m] == 2:
            continue
        t = _eikonal_update(T, state, m, mi, mj, nx, ny, h)
        if t < T[m]:
            T[m] = t
            if state[m] == 0:
                state[m] = 1
                size += 1
                _sift_up(hv, hk, hpos, size - 1, t, m)
            else:
                _sift_up(hv, hk, hpos, hpos[m], t, m)  # a value only ever decreases
    return size


@kernel
def _fast_march(blocked, source, h, nx, ny, T):
    """blocked, source: uint8[n] flat; T: float64[n] filled with inf on entry."""
    n = nx * ny
    state = np.zeros(n, np.uint8)  # 0 far, 1 trial (in heap), 2 accepted
    hv = np.empty(n, np.float64)
    hk = np.empty(n, np.int64)
    hpos = np.full(n, -1, np.int64)
    for k in range(n):
        if source[k] and not blocked[k]:
            T[k] = 0.0
            state[k] = 2
    size = 0
    for k in range(n):
        if state[k] == 2:
            size = _relax_neighbours(k, blocked, T, state, hv, hk, hpos, size, nx, ny, h)
    while size > 0:
        cur = hk[0]
        size -= 1
        if size > 0:
            _sift_down(hv, hk, hpos, size, 0, hv[size], hk[size])
        hpos[cur] = -1
        state[cur] = 2
        size = _relax_neighbours(cur, blocked, T, state, hv, hk, hpos, size, nx, ny, h)
    return T


def _check_mask(arr, name, shape=None):
    a = np.asarray(arr)
    if a.ndim != 2 or a.size == 0:
        raise ScenarioError(f"{name}: must be a non-empty 2-D array (ny, nx), got shape {a.shape}")
    if shape is not None and a.shape != shape:
        raise ScenarioError(f"{name}: shape {a.shape} does not match blocked shape {shape}")
    return np.ascontiguousarray(a != 0, dtype=np.uint8)


def fast_march(blocked, source, h):
    """dist float64[ny, nx]: first-order fast-marching travel distance from the source cells.

    Sources are 0, blocked and unreachable cells +inf. A source on a blocked cell is ignored.
    The heap breaks ties by flat cell index, so the result is deterministic.
    """
    b = _check_mask(blocked, "blocked")
    s = _check_mask(source, "source", b.shape)
    h = float(h)
    if not (math.isfinite(h) and h > 0):
        raise ScenarioError(f"h: must be a positive finite number, got {h!r}")
    ny, nx = b.shape
    T = np.full(nx * ny, np.inf)
    _fast_march(b.reshape(-1), s.reshape(-1), h, nx, ny, T)
    return T.reshape(ny, nx)


# ---------------------------------------------------------------------------- direction field
@kernel
def _upwind(c, lo_ok, lo, hi_ok, hi):
    """h times the upwind derivative along one axis, from the smaller finite neighbour if it lies
    below c, else 0. Ties go to the lower-index side, which breaks symmetric stalls (say, right
    behind a pillar) deterministically."""
    if lo_ok and lo < c and not (hi_ok and hi < lo):
        return c - lo
    if hi_ok and hi < c:
        return hi - c
    return 0.0


@kernel
def _direction_kernel(T, blocked, h, passes, out):
    ny, nx = T.shape
    have = np.zeros((ny, nx), np.uint8)
    for i in range(ny):
        for j in range(nx):
            out[i, j, 0] = 0.0
            out[i, j, 1] = 0.0
            c = T[i, j]
            if blocked[i, j] or not np.isfinite(c):
                continue
            have[i, j] = 1
            gx = _upwind(c, j > 0, T[i, j - 1] if j > 0 else np.inf,
                         j < nx - 1, T[i, j + 1] if j < nx - 1 else np.inf)
            gy = _upwind(c, i > 0, T[i - 1, j] if i > 0 else np.inf,
                         i < ny - 1, T[i + 1, j] if i < ny - 1 else np.inf)
            nrm = math.sqrt(gx * gx + gy * gy)
            if nrm > 0.0:
                out[i, j, 0] = -gx / nrm
                out[i, j, 1] = -gy / nrm
    # dilation: cells without a direction (blocked, unreachable) take the normalised mean of
    # their 8 neighbours' directions from the previous pass (Jacobi, so order-independent)
    nxt = out.copy()
    nhave = have.copy()
    for _ in range(passes):
        changed = False
        for i in range(ny):
            for j in range(nx):
                if have[i, j]:
                    continue
                sx = 0.0
                sy = 0.0
                cnt = 0
                for di in range(-1, 2):
                    ii = i + di
                    if ii < 0 or ii >= ny:
                        continue
                    for dj in range(-1, 2):
                        jj = j + dj
                        if (di == 0 and dj == 0) or jj < 0 or jj >= nx or not have[ii, jj]:
                            continue
                        sx += out[ii, jj, 0]
                        sy += out[ii, jj, 1]
                        cnt += 1
                if cnt == 0:
                    continue
                nrm = math.sqrt(sx * sx + sy * sy)
                if nrm > 1e-9:
                    nxt[i, j, 0] = sx / nrm
                    nxt[i, j, 1] = sy / nrm
                    nhave[i, j] = 1
                    changed = True
        out[:, :, :] = nxt
        have[:, :] = nhave
        if not changed:
            break
    return out


def direction_field(dist, blocked, h, fill_passes=4):
    """dir float64[ny, nx, 2]: unit (x, y) vector along minus the upwind gradient of dist.

    Sources (zero gradient) get (0, 0). Blocked and unreachable cells within `fill_passes` cells
    of a cell with a direction take the normalised mean of their neighbours' directions, so an
    agent standing in the clearance band next to a wall still knows where to go.
    """
    T = np.asarray(dist, dtype=np.float64)
    if T.ndim != 2 or T.size == 0:
        raise ScenarioError(f"dist: must be a non-empty 2-D array (ny, nx), got shape {T.shape}")
    b = _check_mask(blocked, "blocked", T.shape)
    h = float(h)
    if not (math.isfinite(h) and h > 0):
        raise ScenarioError(f"h: must be a positive finite number, got {h!r}")
    passes = int(fill_passes)
    if passes < 0:
        raise ScenarioError(f"fill_passes: must be >= 0, got {fill_passes!r}")
    out = np.zeros(T.shape + (2,))
    return _direction_kernel(np.ascontiguousarray(T), b, h, passes, out)


# ------------------------------------------------------------------------------- sampling
@kernel
def _bilinear_setup(ox, oy, h, nx, ny, x, y):
    """Corner indices and weights of the bilinear stencil on cell centres (clamped at borders)."""
    u = (x - ox) / h - 0.5
    v = (y - oy) / h - 0.5
    u = min(max(u, 0.0), nx - 1.0)
    v = min(max(v, 0.0), ny - 1.0)
    j0 = min(int(math.floor(u)), max(nx - 2, 0))
    i0 = min(int(math.floor(v)), max(ny - 2, 0))
    j1 = min(j0 + 1, nx - 1)
    i1 = min(i0 + 1, ny - 1)
    fx = u - j0
    fy = v - i0
    return i0, i1, j0, j1, fx, fy


@inline_kernel
def sample_dir(dirs, t, ox, oy, h, nx, ny, x, y):
    """Bilinear direction of target t at (x, y), renormalised; (0, 0) when unknown or ~zero."""
    if not (np.isfinite(x) and np.isfinite(y)) or t < 0 or t >= dirs.shape[0]:
        return 0.0, 0.0
    i0, i1, j0, j1, fx, fy = _bilinear_setup(ox, oy, h, nx, ny, x, y)
    w00 = (1.0 - fx) * (1.0 - fy)
    w01 = fx * (1.0 - fy)
    w10 = (1.0 - fx) * fy
    w11 = fx * fy
    dx = w00 * dirs[t, i0, j0, 0] + w01 * dirs[t, i0, j1, 0] + w10 * dirs[t, i1, j0, 0] + w11 * dirs[t, i1, j1, 0]
    dy = w00 * dirs[t, i0, j0, 1] + w01 * dirs[t, i0, j1, 1] + w10 * dirs[t, i1, j0, 1] + w11 * dirs[t, i1, j1, 1]
    nrm = math.sqrt(dx * dx + dy * dy)
    if nrm < 1e-9:
        return 0.0, 0.0
    return dx / nrm, dy / nrm


@inline_kernel
def sample_dist(dists, t, ox, oy, h, nx, ny, x, y):
    """Bilinear distance of target t at (x, y) over the finite corners only; inf if none is finite.

    If the finite corners all carry zero weight (the point sits on an infinite cell's centre),
    their plain mean is returned.
    """
    if not (np.isfinite(x) and np.isfinite(y)) or t < 0 or t >= dists.shape[0]:
        return np.inf
    i0, i1, j0, j1, fx, fy = _bilinear_setup(ox, oy, h, nx, ny, x, y)
    s = 0.0
    ws = 0.0
    plain = 0.0
    cnt = 0
    for c in range(4):
        ii = i0 if c < 2 else i1
        jj = j0 if (c & 1) == 0 else j1
        wx = fx if (c & 1) == 1 else 1.0 - fx
        wy = fy if c >= 2 else 1.0 - fy
        val = dists[t, ii, jj]
        if np.isfinite(val):
            s += wx * wy * val
            ws += wx * wy
            plain += val
            cnt += 1
    if cnt == 0:
        return np.inf
    if ws > 1e-12:
        return s / ws
    return plain / cnt


# -------------------------------------------------------------------------------- targets
def _check_target(kind, params, where="target"):
    if kind not in TARGET_KINDS:
        raise ScenarioError(f"{where}.kind: must be one of {', '.join(TARGET_KINDS)}, got {kind!r}")
    need = 3 if kind == "circle" else 4
    try:
        p = tuple(float(v) for v in params)
    except (TypeError, ValueError):
        raise ScenarioError(f"{where}: a {kind} needs {need} numbers, got {params!r}") from None
    if len(p) != need or not all(math.isfinite(v) for v in p):
        raise ScenarioError(f"{where}: a {kind} needs {need} finite numbers, got {params!r}")
    if kind == "circle" and p[2] < 0:
        raise ScenarioError(f"{where}: circle radius must be >= 0, got {p[2]!r}")
    if kind == "rect" and not (p[0] <= p[2] and p[1] <= p[3]):
        raise ScenarioError(f"{where}: rect needs xmin <= xmax and ymin <= ymax, got {p!r}")
    return kind, p


def target_sources(grid, blocked, kind, params):
    """source uint8[ny, nx]: free cells whose centres lie in the region (boundary included).

    kind "circle": params (cx, cy, r); kind "rect": params (xmin, ymin, xmax, ymax). The region may
    reach outside the grid. If no free centre is inside, the free cell nearest to the region's
    centre is the source (lowest flat index on ties).
    """
    kind, p = _check_target(kind, params)
    b = _check_mask(blocked, "blocked", (grid.ny, grid.nx))
    free = b == 0
    if not free.any():
        raise ScenarioError("blocked: every cell of the navigation grid is blocked; no target can be reached")
    X, Y = grid.centres()
    if kind == "circle":
        cx, cy, r = p
        inside = (X - cx) ** 2 + (Y - cy) ** 2 <= r * r
    else:
        cx, cy = 0.5 * (p[0] + p[2]), 0.5 * (p[1] + p[3])
        inside = (X >= p[0]) & (X <= p[2]) & (Y >= p[1]) & (Y <= p[3])
    src = inside & free
    if not src.any():
        d2 = np.where(free, (X - cx) ** 2 + (Y - cy) ** 2, np.inf)
        src = np.zeros_like(free)
        src.reshape(-1)[int(np.argmin(d2))] = True  # argmin returns the first (lowest index) minimum
    return src.astype(np.uint8)


# ----------------------------------------------------------------------------- NavFields
class NavFields:
    """Blocked raster plus one distance and direction field per target.

    Plain attributes for kernels: ox, oy, h, nx, ny, blocked uint8[ny, nx], dist float64[T, ny, nx],
    dir float64[T, ny, nx, 2]. Build with `NavFields.build`; after a scene change call `rebuild`,
    which returns a new object (the old one stays valid until replaced).
    """

    __slots__ = ("grid", "ox", "oy", "h", "nx", "ny", "blocked", "dist", "dir",
                 "walls", "polygons", "targets", "bounds", "clearance", "fill_passes")

    def __init__(self, grid, blocked, dist, dirs, walls, polygons, targets, bounds, clearance, fill_passes):
        self.grid = grid
        self.ox, self.oy, self.h, self.nx, self.ny = grid.args
        self.blocked, self.dist, self.dir = blocked, dist, dirs
        self.walls, self.polygons, self.targets = walls, polygons, targets
        self.bounds, self.clearance, self.fill_passes = bounds, clearance, fill_passes

    @property
    def ntargets(self):
        return self.dist.shape[0]

    @property
    def cell_size(self):
        return self.h

    @classmethod
    def build(cls, walls, polygons, targets, bounds, cell_size, clearance, _reuse=None):
        """Rasterise the obstacles and march one field per target (see module doc).

        targets: list of (kind, params) with kind "circle" (cx, cy, r) or "rect" (xmin, ymin, xmax, ymax).
        Raises ScenarioError naming the bad argument; nothing is built then.
        """
        if bounds is None or len(bounds) != 4:
            raise ScenarioError(f"bounds: must be (xmin, ymin, xmax, ymax), got {bounds!r}")
        grid = grid_for_bounds(*bounds, cell_size)
        w = _check_walls(walls)
        polys = _check_polygons(polygons)
        tg = []
        for k, item in enumerate(targets if targets is not None else []):
            if not isinstance(item, (tuple, list)) or len(item) != 2:
                raise ScenarioError(f"targets[{k}]: must be (kind, params), got {item!r}")
            tg.append(_check_target(item[0], item[1], f"targets[{k}]"))
        clearance = float(clearance)
        if not (math.isfinite(clearance) and clearance >= 0):
            raise ScenarioError(f"clearance: must be a finite number >= 0, got {clearance!r}")
        b = tuple(float(v) for v in bounds)
        # enough passes to cross the blocked clearance band along a wall, plus a margin
        passes = int(math.ceil(wall_reach(clearance, grid.h) / grid.h)) + 2

        same_geometry = (
            _reuse is not None and _reuse.grid == grid and _reuse.clearance == clearance
            and np.array_equal(_reuse.walls, w) and len(_reuse.polygons) == len(polys)
            and all(np.array_equal(p, q) for p, q in zip(_reuse.polygons, polys))
        )
        blocked = _reuse.blocked if same_geometry else rasterise(w, polys, grid, clearance)
        old = {t: k for k, t in enumerate(_reuse.targets)} if same_geometry else {}

        dist = np.empty((len(tg), grid.ny, grid.nx))
        dirs = np.empty((len(tg), grid.ny, grid.nx, 2))
        for k, (kind, p) in enumerate(tg):
            if (kind, p) in old:  # unchanged target on unchanged geometry: identical field
                dist[k] = _reuse.dist[old[(kind, p)]]
                dirs[k] = _reuse.dir[old[(kind, p)]]
                continue
            src = target_sources(grid, blocked, kind, p)
            dist[k] = fast_march(blocked, src, grid.h)
            dirs[k] = direction_field(dist[k], blocked, grid.h, passes)
        return cls(grid, blocked, dist, dirs, w, polys, tuple(tg), b, clearance, passes)

    @classmethod
    def empty(cls, bounds=(0.0, 0.0, 1.0, 1.0), cell_size=1.0):
        """No obstacles and no targets (dist/dir have a leading dimension of 0)."""
        return cls.build(np.zeros((0, 4)), [], [], bounds, cell_size, 0.0)

    def rebuild(self, walls=None, polygons=None, targets=None, bounds=None, cell_size=None, clearance=None):
        """A new NavFields with the given pieces replaced (None keeps the current one).

        Fields of unchanged targets on unchanged geometry are copied rather than recomputed.
        """
        return NavFields.build(
            self.walls if walls is None else walls,
            self.polygons if polygons is None else polygons,
            list(self.targets) if targets is None else targets,
            self.bounds if bounds is None else bounds,
            self.h if cell_size is None else cell_size,
            self.clearance if clearance is None else clearance,
            _reuse=self,
        )
