"""Data-driven velocity choice: each agent takes the motion record of least energy.

Two searches give the same record for every agent:
- `choose_full` scans every record of the buckets within the search width, in index order;
- `choose_pruned` runs a branch-and-bound over per-bucket k-d trees (`RecordIndex`).
Both call the one `energy` kernel on the same inputs, so the energies they compare are bitwise
identical; pruning only ever skips records whose energy is provably (with a wide rounding
margin) above the best found, so ties still resolve to the lowest record index.

Why pruning works: the four quadratic terms add up to W*|u - c|^2 + C0 with W = w0+w2+w4+w5,
c = (w0*v_now + w2*v_pref + w4*v_safe + w5*v_group)/W. In the agent's heading frame u becomes
q_r = b_r*(cos phi_r, sin phi_r), which does not depend on the agent, so the quadratic part is a
nearest-point query among fixed points q_r around c' = rotate(c, -theta). Tree nodes also bound the
entry speed a (consistency term) and the turn angle phi (direction term).

Bounding the quadratic and direction terms apart is loose when the navigation direction points away
from the heading (they pull towards different records), and such agents used to expand about 7x more
nodes. So each node also gets a joint bound: on a box away from the origin, 1 - cos(angle(q) - beta)
is at least its tangent plane at q0 minus (M/2)|q - q0|^2, where M = 1.25/|q|min^2 exceeds the norm of
its Hessian (at most (2/sqrt 3)/|q|^2); added to W|q - c'|^2 this is one paraboloid whose minimum over
the box is exact. Mean nodes per agent fell from 32.8 to 17.6 (square-1, 10,000 agents).

Strict mode also prunes by feasibility, unless the centre c itself satisfies every half-plane (the
usual case: then the best record lies near c and the outline below costs more than it saves): the
agent's half-planes, rotated into the heading frame and
relaxed by 1e-9 of their scale, are clipped against the searched buckets' q box and the speed limit
into a convex outline of where eligible records can lie. An empty outline ends the search at once;
otherwise a node is skipped when its q box misses the outline's box or lies wholly beyond one line,
and a record is skipped before any trigonometry when it lies beyond one. The relaxation is ~1e7
times the rounding between these tests and `_allowed`, which still decides every record taken.

Each bucket's tree holds one copy of records with bitwise-identical (a, b, phi): a later copy has
the same energy and velocity, so the full scan (first strictly smaller energy wins) never picks it.

Four things make the search fast in practice without touching what it returns:
- Window forests. Searching 2z+1 separate bucket trees means 2z+1 descents. For 1 <= z <= 3 the
  index builds, on first use of that z by 1,000 agents or more, one tree per bucket k over all records of buckets k-z..k+z
  (the agent's whole window), so each agent descends one tree. Records are stored 2z+1 times
  (about 30 MB at z = 3 for 80,000 records), and the choice runs 1.5-1.8x faster (square-1 and
  square-2, 10,000 agents, one thread).
- Agents are searched grouped by speed bucket, so consecutive searches walk the same tree, which
  stays in cache: about 10% faster. Each agent's result does not depend on the order.
- Prefetching. A profile showed the search stalled on loads: the next agent's inputs (its rows come
  in bucket order, not row order) and the boxes or records of nodes it had just put on its open list.
  So the search asks for those lines ahead of use: the next agent's inputs while it works on this one,
  and a node's children's boxes (or a leaf's records) when the node is opened. 12-15% faster on
  square-1, 3-5% on square-2 (10,000 agents, one thread); a hint only, results are unchanged.
- Dynamic balance. A search's cost varies with an agent's speed and surroundings, so threads take
  the next block of agents from a shared atomic counter instead of a fixed share (`_pruned_blocks`).
"""
import math

import numpy as np
import numba

from ._jit import fetch_add, kernel, parallel_kernel, prefetch
from .errors import RecordSetError, StepError

__all__ = ["energy", "choose_full", "choose_pruned",
           "RecordIndex", "choose"]

HEADING_EPS = 1e-9      # |v_now| above this defines the heading (contract)
LINE_EPS = 1e-9         # half-plane violation tolerance in strict mode (contract)
_MARGIN_REL = 1e-9      # prune only when a bound beats the best by this fraction of the energy scale
_FEAS_REL = 1e-9        # strict-mode feasibility tests are relaxed by this fraction of each line's scale
_BIG = 1.7976931348623157e308  # largest float64: energy bounds are capped here, inf means infeasible
_BLOCK = 64             # agents per work item that a thread takes from the shared counter
_MAX_WORKERS = 256      # upper bound on threads the search can use
_JOINT_COS = math.cos(0.1)  # joint bound only where the direction is this far off the quadratic centre
_HESS_DIR = 1.25        # |Hessian of cos(angle(q) - beta)| <= (2/sqrt(3))/|q|^2 ~ 1.155/|q|^2; rounded up
_NODE_COLS = 13         # qx_lo qx_hi qy_lo qy_hi a_lo a_hi phi_lo phi_hi cos/sin(phi_lo) cos/sin(phi_hi) b_lo


# ---------------------------------------------------------------------------------------------
# Per-agent, per-record pieces (shared by both searches)

@kernel
def _unit(x, y):
    """(x, y) / |(x, y)| without overflow or underflow in the squares; (0, 0) for a zero vector."""
    m = max(abs(x), abs(y))
    if m == 0.0:
        return 0.0, 0.0
    if 1e-150 < m < 1e150:  # squares stay normal: the direct formula (all but absurd inputs)
        h = math.sqrt(x * x + y * y)
        return x / h, y / h
    x /= m
    y /= m
    h = math.sqrt(x * x + y * y)
    return x / h, y / h


@kernel
def agent_frame(vnx, vny, vpx, vpy, dx, dy):
    """(ct, st, s, dn): unit heading, speed |v_now| and |nav_dir|, as the contract defines them.

    The heading is the direction of v_now; an agent slower than HEADING_EPS takes the navigation
    direction, else its preferred velocity's, else +x."""
    s = math.sqrt(vnx * vnx + vny * vny)
    dn = math.sqrt(dx * dx + dy * dy)
    if s > HEADING_EPS:
        ct, st = _unit(vnx, vny)
    elif dx != 0.0 or dy != 0.0:
        ct, st = _unit(dx, dy)
    elif vpx != 0.0 or vpy != 0.0:
        ct, st = _unit(vpx, vpy)
    else:
        ct, st = 1.0, 0.0
    return ct, st, s, dn


@kernel
def record_velocity(b_r, cphi, sphi, ct, st):
    """u_r = b_r * R(theta) (cos phi_r, sin phi_r) with (ct, st) = (cos theta, sin theta)."""
    return b_r * (ct * cphi - st * sphi), b_r * (st * cphi + ct * sphi)


@kernel
def energy(a_r, b_r, cphi, sphi, ct, st, s, dn, w, vnx, vny, vpx, vpy, dx, dy, vsx, vsy, vgx, vgy):
    """Energy of record (a_r, b_r, phi_r) for one agent (cphi, sphi = cos, sin phi_r; ct, st = the
    unit heading); terms added in the contract's order.

    The direction cosine uses the direction theta+phi_r, which is that of u_r when b_r > 0 and the
    contract's rule when b_r == 0. dn == 0 drops the direction term. No trigonometry per record:
    cos and sin of phi are stored with the records.
    """
    e, _ux, _uy = _energy_uv(a_r, b_r, cphi, sphi, ct, st, s, dn, w[0], w[1], w[2], w[3], w[4], w[5],
                             vnx, vny, vpx, vpy, dx, dy, vsx, vsy, vgx, vgy)
    return e


@kernel
def _energy_uv(a_r, b_r, cphi, sphi, ct, st, s, dn, w0, w1, w2, w3, w4, w5,
               vnx, vny, vpx, vpy, dx, dy, vsx, vsy, vgx, vgy):
    """`energy` with the weights as scalars (no array argument, so no refcounting in hot loops);
    also returns u_r, bitwise equal to `record_velocity`."""
    ca = ct * cphi - st * sphi
    sa = st * cphi + ct * sphi
    ux = b_r * ca
    uy = b_r * sa
    ex = ux - vnx
    ey = uy - vny
    e = w0 * (ex * ex + ey * ey)
    da = a_r - s
    e += w1 * (da * da)
    ex = ux - vpx
    ey = uy - vpy
    e += w2 * (ex * ex + ey * ey)
    if dn > 0.0:
        e += w3 * (1.0 - (ca * dx + sa * dy) / dn)
    ex = ux - vsx
    ey = uy - vsy
    e += w4 * (ex * ex + ey * ey)
    ex = ux - vgx
    ey = uy - vgy
    e += w5 * (ex * ex + ey * ey)
    return e, ux, uy


@kernel
def _allowed(ux, uy, strict, lines, i, nl):
    # Strict: u must lie left of (or within LINE_EPS of) every half-plane line of agent i.
    if strict:
        for j in range(nl):
            px = lines[i, j, 0]
            py = lines[i, j, 1]
            ldx = lines[i, j, 2]
            ldy = lines[i, j, 3]
            if ldx * (py - uy) - ldy * (px - ux) > LINE_EPS:
                return False
    return True


@kernel
def _cos_sin(phi):
    """cos and sin of every turn angle, by libm as `math.cos`/`math.sin` (one value per record for both
    searches and the Python reference)."""
    c = np.empty(phi.shape[0])
    s = np.empty(phi.shape[0])
    for r in range(phi.shape[0]):
        c[r] = math.cos(phi[r])
        s[r] = math.sin(phi[r])
    return c, s


@kernel
def _bucket_of(bucket_min_a, s):
    """The last bucket whose least entry speed is <= s, clamped to 0..nb-1 (NaN: the last bucket, as
    numpy's searchsorted would sort it). A plain bisection: numba's searchsorted costs about 4x more."""
    nb = bucket_min_a.shape[0]
    if s != s:
        return nb - 1
    lo = 0
    hi = nb
    while lo < hi:
        mid = (lo + hi) >> 1
        if bucket_min_a[mid] <= s:
            lo = mid + 1
        else:
            hi = mid
    return min(max(lo - 1, 0), nb - 1)


@kernel
def _scan_agent(a, b, cphi, sphi, r0, r1, ct, st, s, dn, w, vmax, strict, lines, i, nl,
                vnx, vny, vpx, vpy, dx, dy, vsx, vsy, vgx, vgy):
    # Full scan of records r0..r1-1 in index order: first strictly smaller energy wins, so ties
    # keep the lowest index. NaN energies (only from overflow) never win.
    best = np.inf
    best_r = -1
    for r in range(r0, r1):
        if b[r] > vmax:
            continue
        e = energy(a[r], b[r], cphi[r], sphi[r], ct, st, s, dn, w, vnx, vny, vpx, vpy, dx, dy, vsx, vsy, vgx, vgy)
        if e != e:
            continue
        if best_r >= 0 and not e < best:
            continue
        if strict:
            ux, uy = record_velocity(b[r], cphi[r], sphi[r], ct, st)
            if not _allowed(ux, uy, strict, lines, i, nl):
                continue
        best = e
        best_r = r
    return best_r


@kernel
def _write_choice(i, best_r, b, cphi, sphi, ct, st, v_safe, out_vel, out_rec):
    if best_r < 0:
        out_vel[i, 0] = v_safe[i, 0]
        out_vel[i, 1] = v_safe[i, 1]
        out_rec[i] = -1
    else:
        ux, uy = record_velocity(b[best_r], cphi[best_r], sphi[best_r], ct, st)
        out_vel[i, 0] = ux
        out_vel[i, 1] = uy
        out_rec[i] = best_r


@kernel
def _search_range(bucket_start, bucket_min_a, z, s):
    nb = bucket_start.shape[0] - 1
    k = _bucket_of(bucket_min_a, s)
    k0 = max(0, k - z)
    k1 = min(nb - 1, k + z)
    return k0, k1


# ---------------------------------------------------------------------------------------------
# Full scan

@kernel
def _solo_weights(weights):
    w = weights.copy()
    w[5] = 0.0
    return w


@kernel
def _pick_weights(weights, w_solo, vgx, vgy):
    """An agent outside any group has v_group = NaN: its group term is dropped (weight 0)."""
    if vgx != vgx or vgy != vgy:
        return w_solo, 0.0, 0.0
    return weights, vgx, vgy


@parallel_kernel
def choose_full(a, b, cphi, sphi, bucket_start, bucket_min_a, weights, z, strict, v_now, v_pref, nav_dir,
                v_safe, v_group, max_speed, lines, line_count, out_vel, out_rec):
    """Reference search: every record of buckets k-z..k+z, in index order. Writes row i only."""
    n = v_now.shape[0]
    nb = bucket_start.shape[0] - 1
    w_solo = _solo_weights(weights)
    for i in numba.prange(n):
        w, vgx, vgy = _pick_weights(weights, w_solo, v_group[i, 0], v_group[i, 1])
        vnx = v_now[i, 0]
        vny = v_now[i, 1]
        vpx = v_pref[i, 0]
        vpy = v_pref[i, 1]
        dx = nav_dir[i, 0]
        dy = nav_dir[i, 1]
        ct, st, s, dn = agent_frame(vnx, vny, vpx, vpy, dx, dy)
        best_r = -1
        if nb > 0 and a.shape[0] > 0:
            k0, k1 = _search_range(bucket_start, bucket_min_a, z, s)
            best_r = _scan_agent(a, b, cphi, sphi, bucket_start[k0], bucket_start[k1 + 1], ct, st, s, dn, w,
                                 max_speed[i], strict, lines, i, line_count[i], vnx, vny, vpx, vpy, dx, dy,
                                 v_safe[i, 0], v_safe[i, 1], vgx, vgy)
        _write_choice(i, best_r, b, cphi, sphi, ct, st, v_safe, out_vel, out_rec)


# ---------------------------------------------------------------------------------------------
# Index: one implicit, balanced k-d tree over q_r per bucket

@kernel
def _tree_sizes(tree_start, leaf_size):
    """Nodes per tree: complete binary trees deep enough for <= leaf_size records per leaf."""
    nt = tree_start.shape[0] - 1
    tree_node_start = np.zeros(nt + 1, np.int32)
    for t in range(nt):
        m = tree_start[t + 1] - tree_start[t]
        nodes = 0
        if m > 0:
            depth = 0
            while (m + (1 << depth) - 1) >> depth > leaf_size:
                depth += 1
            nodes = (1 << (depth + 1)) - 1
        tree_node_start[t + 1] = tree_node_start[t] + nodes
    return tree_node_start


@parallel_kernel
def _build_trees(a, b, phi, cphi, sphi, tree_items, tree_start, leaf_size):
    """Returns (perm, tree_node_start, node_range, node_box).

    Tree t indexes the records tree_items[tree_start[t]:tree_start[t+1]] (ascending record indices).
    perm: tree order -> record index. Tree t owns nodes tree_node_start[t]..[t+1]; local node j has
    children 2j+1, 2j+2 and is a leaf when 2j+1 is past the end. Nodes split their range at the
    middle along the wider q axis, so all leaves of a tree sit at one depth with <= leaf_size records.
    Trees are built in parallel; each writes only its own rows, so the result is thread-count free.
    """
    nt = tree_start.shape[0] - 1
    qx = b * cphi   # the same products as the forest's rec_t columns
    qy = b * sphi
    tree_node_start = _tree_sizes(tree_start, leaf_size)
    total = tree_node_start[nt]
    node_range = np.zeros((total, 2), np.int32)
    node_box = np.zeros((total, _NODE_COLS))
    perm = tree_items.copy()
    for k in numba.prange(nt):
        base = tree_node_start[k]
        nodes = tree_node_start[k + 1] - base
        if nodes == 0:
            continue
        node_range[base, 0] = tree_start[k]
        node_range[base, 1] = tree_start[k + 1]
        for j in range(nodes):  # index order is breadth-first: parents before children
            lo = node_range[base + j, 0]
            hi = node_range[base + j, 1]
            box = node_box[base + j]
            box[0] = np.inf
            box[1] = -np.inf
            box[2] = np.inf
            box[3] = -np.inf
            box[4] = np.inf
            box[5] = -np.inf
            box[6] = np.inf
            box[7] = -np.inf
            box[12] = np.inf
            for t in range(lo, hi):
                r = perm[t]
                box[0] = min(box[0], qx[r])
                box[1] = max(box[1], qx[r])
                box[2] = min(box[2], qy[r])
                box[3] = max(box[3], qy[r])
                box[4] = min(box[4], a[r])
                box[5] = max(box[5], a[r])
                box[6] = min(box[6], phi[r])
                box[7] = max(box[7], phi[r])
                box[12] = min(box[12], b[r])
            box[8] = math.cos(box[6])
            box[9] = math.sin(box[6])
            box[10] = math.cos(box[7])
            box[11] = math.sin(box[7])
            if 2 * j + 1 < nodes:
                seg = perm[lo:hi].copy()
                key = np.empty(hi - lo)
                if box[1] - box[0] >= box[3] - box[2]:
                    for t in range(hi - lo):
                        key[t] = qx[seg[t]]
                else:
                    for t in range(hi - lo):
                        key[t] = qy[seg[t]]
                order = np.argsort(key, kind="mergesort")
                for t in range(hi - lo):
                    perm[lo + t] = seg[order[t]]
                mid = lo + (hi - lo) // 2
                node_range[base + 2 * j + 1, 0] = lo
                node_range[base + 2 * j + 1, 1] = mid
                node_range[base + 2 * j + 2, 0] = mid
                node_range[base + 2 * j + 2, 1] = hi
    return perm, tree_node_start, node_range, node_box


@kernel
def _clip(poly, src, n, hx, hy, h0):
    """Sutherland-Hodgman on the scratch table `poly` (rows x, y of two polygons): keeps the part of
    polygon `src` (n vertices) where h0 + hx*x + hy*y <= 0. Returns (polygon now holding it, count).
    Rows are indexed, not sliced: a view would cost an atomic refcount per call."""
    if n == 0:
        return src, 0
    sx = 2 * src
    sy = sx + 1
    inside = True
    for k in range(n):
        if h0 + hx * poly[sx, k] + hy * poly[sy, k] > 0.0:
            inside = False
            break
    if inside:  # the line misses the polygon: nothing to copy
        return src, n
    ox = 2 - sx
    oy = ox + 1
    m = 0
    jx = poly[sx, n - 1]
    jy = poly[sy, n - 1]
    fj = h0 + hx * jx + hy * jy
    for k in range(n):
        kx = poly[sx, k]
        ky = poly[sy, k]
        fk = h0 + hx * kx + hy * ky
        if (fk <= 0.0) != (fj <= 0.0):
            t = fj / (fj - fk)  # opposite sides: no cancellation, |t| <= 1
            poly[ox, m] = jx + t * (kx - jx)
            poly[oy, m] = jy + t * (ky - jy)
            m += 1
        if fk <= 0.0:
            poly[ox, m] = kx
            poly[oy, m] = ky
            m += 1
        jx = kx
        jy = ky
        fj = fk
    return 1 - src, m


@kernel
def _feasible_region(strict, lines, i, nl, ct, st, b_max, vmax, node_box, tree_node_start, t0, t1, fl, fb,
                     poly):
    """Strict mode: a conservative outline, in the heading frame q = R(-theta) u, of where eligible
    records can lie. Fills fb with a q box (x0, x1, y0, y1) holding every eligible record of trees
    t0..t1 and returns the number of half-planes written to fl (rows hx, hy, h0: a record is surely
    ineligible when h0 + hx*qx + hy*qy > 0), keeping only lines that cut that box (the others cannot
    reject anything inside it); returns -1 when no record there can be eligible.

    Each half-plane is relaxed by 1e-9 of its own scale, about 1e7 times the rounding that separates
    these tests from `_allowed`, so they never reject a record `_allowed` accepts.

    Every line is clipped in, not only those the quadratic centre breaks: in a congested crowd the
    others cut off the records near the centre, and without them the search evaluated 15-22 exact
    energies per such agent that `_allowed` then refused (square-1 at 10,000 agents, frame 200: the
    choice 30.7 -> 20.5 ms on one thread, 22.1 -> 17.0 at frame 100, 18.4 -> 16.7 at frame 10).
    """
    fb[0] = -np.inf
    fb[1] = np.inf
    fb[2] = -np.inf
    fb[3] = np.inf
    if not strict or nl == 0:
        return 0
    # Half-planes in the heading frame: det(d, p - u) = c0 + hx*qx + hy*qy with u = R(theta) q.
    nf = 0
    for j in range(nl):
        px = lines[i, j, 0]
        py = lines[i, j, 1]
        ldx = lines[i, j, 2]
        ldy = lines[i, j, 3]
        hx = ldy * ct - ldx * st
        hy = -(ldx * ct + ldy * st)
        c0 = ldx * py - ldy * px
        scale = (abs(ldx) + abs(ldy)) * (abs(px) + abs(py) + 2.0 * b_max)
        h0 = c0 - (LINE_EPS + _FEAS_REL * scale)
        if math.isfinite(hx) and math.isfinite(hy) and math.isfinite(h0) and math.isfinite(scale):
            fl[nf, 0] = hx
            fl[nf, 1] = hy
            fl[nf, 2] = h0
            nf += 1
    # Start from the q box of the searched trees' roots, cut to the speed limit.
    x0 = np.inf
    x1 = -np.inf
    y0 = np.inf
    y1 = -np.inf
    for k in range(t0, t1 + 1):
        if tree_node_start[k + 1] > tree_node_start[k]:
            m = tree_node_start[k]
            x0 = min(x0, node_box[m, 0])
            x1 = max(x1, node_box[m, 1])
            y0 = min(y0, node_box[m, 2])
            y1 = max(y1, node_box[m, 3])
    rad = b_max
    if vmax < rad:
        rad = vmax
    rad *= 1.0 + _FEAS_REL  # |q| <= b(1 + few ulps) for every record with b <= rad
    x0 = max(x0, -rad)
    x1 = min(x1, rad)
    y0 = max(y0, -rad)
    y1 = min(y1, rad)
    if not (x0 <= x1 and y0 <= y1):
        return -1
    cap = poly.shape[1]
    poly[0, 0] = x0
    poly[1, 0] = y0
    poly[0, 1] = x1
    poly[1, 1] = y0
    poly[0, 2] = x1
    poly[1, 2] = y1
    poly[0, 3] = x0
    poly[1, 3] = y1
    cnt = 4
    src = 0
    rd = rad * math.sqrt(2.0) * (1.0 + _FEAS_REL)  # |qx| + |qy| <= sqrt(2) |q|
    for j in range(4 + nf):
        if 2 * cnt > cap:  # only rounding could grow it this much; stopping early stays conservative
            break
        if j < 4:
            hx = 1.0 if j % 2 == 0 else -1.0
            hy = 1.0 if j < 2 else -1.0
            h0 = -rd
        else:
            hx = fl[j - 4, 0]
            hy = fl[j - 4, 1]
            h0 = fl[j - 4, 2]
        src, cnt = _clip(poly, src, cnt, hx, hy, h0)
        if cnt == 0:
            return -1
    x0 = np.inf
    x1 = -np.inf
    y0 = np.inf
    y1 = -np.inf
    for t in range(cnt):
        x0 = min(x0, poly[2 * src, t])
        x1 = max(x1, poly[2 * src, t])
        y0 = min(y0, poly[2 * src + 1, t])
        y1 = max(y1, poly[2 * src + 1, t])
    pad = _FEAS_REL * rad
    x0 -= pad
    x1 += pad
    y0 -= pad
    y1 += pad
    fb[0] = x0
    fb[1] = x1
    fb[2] = y0
    fb[3] = y1
    # Keep the lines some corner of the box violates: a line all four corners satisfy holds on the
    # whole box, so it can reject neither a record nor a node part inside the box.
    kept = 0
    for j in range(nf):
        hx = fl[j, 0]
        hy = fl[j, 1]
        h0 = fl[j, 2]
        if h0 + max(hx * x0, hx * x1) + max(hy * y0, hy * y1) > 0.0:
            fl[kept, 0] = hx
            fl[kept, 1] = hy
            fl[kept, 2] = h0
            kept += 1
    return kept


@kernel
def _search_block(lo, hi, a, b, cphi, sphi, bucket_start, bucket_min_a, perm, rec_t, tree_node_start,
                  node_range, node_box, b_max, a_max, forest_z, weights, z, strict, v_now, v_pref, nav_dir,
                  v_safe, v_group, max_speed, lines, line_count, fl, fb, poly, hl, hm, cand_e, cand_p,
                  out_vel, out_rec, out_evals, out_visits, work, order, agent_bucket):
    """Pruned search for agents lo..hi-1: writes out_vel/out_rec, or out_evals/out_visits when `work`.

    One call per block of agents: every array argument of a numba call costs atomic refcounts, so
    the per-agent and per-node work below is written inline with scalar-only helpers. fl, fb, poly,
    hl, hm, cand_e, cand_p are scratch buffers. forest_z >= 0: tree k
    holds buckets k-z..k+z (one root per agent); -1: tree k holds bucket k (roots k-z..k+z).

    Nodes are expanded best-first (least bound first) across all searched buckets, so the search
    stops as soon as the least open bound exceeds the best energy found. A leaf's records that pass
    the trigonometry-free filters get their exact energy in ascending order of approximate energy.
    """
    nb = bucket_start.shape[0] - 1
    for ii in range(lo, hi):
        i = order[ii]
        if ii + 1 < hi:  # rows come in bucket order, not row order: fetch the next agent's inputs now
            i2 = order[ii + 1]
            prefetch(v_now, i2, 0)
            prefetch(v_pref, i2, 0)
            prefetch(nav_dir, i2, 0)
            prefetch(v_safe, i2, 0)
            prefetch(v_group, i2, 0)
            prefetch(max_speed, i2, 0)
            prefetch(line_count, i2, 0)
            prefetch(agent_bucket, i2, 0)
            for off in range(0, 32 * min(lines.shape[1], 12), 64):  # most agents use <= 12 lines
                prefetch(lines, i2, off)
        vnx = v_now[i, 0]
        vny = v_now[i, 1]
        vpx = v_pref[i, 0]
        vpy = v_pref[i, 1]
        dx = nav_dir[i, 0]
        dy = nav_dir[i, 1]
        vsx = v_safe[i, 0]
        vsy = v_safe[i, 1]
        vgx = v_group[i, 0]
        vgy = v_group[i, 1]
        w0 = weights[0]
        w1 = weights[1]
        w2 = weights[2]
        w3 = weights[3]
        w4 = weights[4]
        w5 = weights[5]
        if vgx != vgx or vgy != vgy:  # outside any group: the group term is dropped (as `_pick_weights`)
            w5 = 0.0
            vgx = 0.0
            vgy = 0.0
        vmax = max_speed[i]
        nl = line_count[i]
        ct, st, s, dn = agent_frame(vnx, vny, vpx, vpy, dx, dy)
        best = np.inf
        best_r = -1
        evals = 0
        visits = 0
        if nb > 0 and a.shape[0] > 0:
            kb = agent_bucket[i]  # _bucket_of(bucket_min_a, s), found when ordering the agents
            k0 = max(0, kb - z)
            k1 = min(nb - 1, kb + z)
            if forest_z >= 0:  # one tree holds the whole window: the one of the agent's own bucket
                t0 = kb
                t1 = t0
            else:
                t0 = k0
                t1 = k1
            # Quadratic terms as W*|q - c'|^2 + C0 in the heading frame.
            W = w0 + w2 + w4 + w5
            tx = w0 * vnx + w2 * vpx + w4 * vsx + w5 * vgx
            ty = w0 * vny + w2 * vpy + w4 * vsy + w5 * vgy
            pp = (w0 * (vnx * vnx + vny * vny) + w2 * (vpx * vpx + vpy * vpy)
                  + w4 * (vsx * vsx + vsy * vsy) + w5 * (vgx * vgx + vgy * vgy))
            cx = 0.0
            cy = 0.0
            C0 = 0.0
            c_eligible = False
            gx = 0.0
            gy = 0.0
            if W > 0.0:
                gx = tx / W
                gy = ty / W
                # Most agents' quadratic centre is itself eligible: then the best record lies near it,
                # inside every half-plane, and building the feasible outline would cost more than it saves.
                c_eligible = _allowed(gx, gy, strict, lines, i, nl)
                C0 = pp - W * (gx * gx + gy * gy)
                cx = ct * gx + st * gy
                cy = -st * gx + ct * gy
            use_dir = dn > 0.0 and w3 > 0.0
            joint = False
            beta = 0.0
            cb = 1.0
            sb = 0.0
            if use_dir:
                ddx = ct * dx + st * dy
                ddy = -st * dx + ct * dy
                beta = math.atan2(ddy, ddx)
                cb = ddx / dn
                sb = ddy / dn
                # Where the direction points within ~0.1 rad of the centre, the two terms pull the same
                # way and the separate bounds are as tight: the joint bound only costs time (10%).
                joint = not (cx * cb + cy * sb > _JOINT_COS * math.sqrt(cx * cx + cy * cy))
            # Rounding in energies and bounds is a few ulps of this scale; the margin is ~1e7 times wider.
            nv = math.sqrt(vnx * vnx + vny * vny)
            npf = math.sqrt(vpx * vpx + vpy * vpy)
            nsf = math.sqrt(vsx * vsx + vsy * vsy)
            ngr = math.sqrt(vgx * vgx + vgy * vgy)
            scale = (w0 * (nv + b_max) ** 2 + w2 * (npf + b_max) ** 2 + w4 * (nsf + b_max) ** 2
                     + w5 * (ngr + b_max) ** 2 + w1 * (a_max + s) ** 2 + 2.0 * w3)
            margin = _MARGIN_REL * scale
            if not (math.isfinite(margin) and math.isfinite(C0) and math.isfinite(cx) and math.isfinite(cy)):
                r0 = bucket_start[k0]
                r1 = bucket_start[k1 + 1]
                ws = weights.copy()  # rare path: the allocation does not matter
                ws[5] = w5
                best_r = _scan_agent(a, b, cphi, sphi, r0, r1, ct, st, s, dn, ws, vmax, strict, lines, i, nl,
                                     vnx, vny, vpx, vpy, dx, dy, vsx, vsy, vgx, vgy)
                evals = r1 - r0
                t1 = t0 - 1  # nothing left to search
                nf = 0
            else:
                # Where eligible records can lie (strict mode); nothing to search when nowhere.
                if c_eligible:  # skip the outline: exactness never depends on it (`_allowed` decides)
                    fb[0] = -np.inf
                    fb[1] = np.inf
                    fb[2] = -np.inf
                    fb[3] = np.inf
                    nf = 0
                else:
                    nf = _feasible_region(strict, lines, i, nl, ct, st, b_max, vmax, node_box, tree_node_start,
                                          t0, t1, fl, fb, poly)
                if nf < 0:
                    t1 = t0 - 1
                    nf = 0
            fx0 = fb[0]
            fx1 = fb[1]
            fy0 = fb[2]
            fy1 = fb[3]
            # Lines with c on their wrong side first: the node bound measures the distance to those.
            nvc = 0
            for j in range(nf):
                if fl[j, 2] + fl[j, 0] * cx + fl[j, 1] * cy > 0.0:
                    for col in range(3):
                        tmp = fl[nvc, col]
                        fl[nvc, col] = fl[j, col]
                        fl[j, col] = tmp
                    nvc += 1
            pad = _FEAS_REL * (b_max + abs(cx) + abs(cy))

            size = 0
            roots = True
            base = 0
            c1 = 0
            while True:
                if roots:
                    cnt = t1 - t0 + 1
                else:
                    if size == 0:
                        break
                    # pop the least bound (open nodes are few: a linear scan beats a heap's branches)
                    t = 0
                    lb = hl[0]
                    for u in range(1, size):
                        if hl[u] < lb:
                            lb = hl[u]
                            t = u
                    m = hm[t] & 0xFFFFFFFF  # open entries carry their tree: (k << 32) | node
                    k = hm[t] >> 32
                    size -= 1
                    hl[t] = hl[size]
                    hm[t] = hm[size]
                    if lb > best + margin:
                        break  # every open node's bound is at least this one
                    visits += 1
                    base = tree_node_start[k]
                    c1 = 2 * (m - base) + 1
                    if c1 >= tree_node_start[k + 1] - base:
                        # Leaf: trigonometry-free filters first, then exact energies, least approximate first.
                        nc = 0
                        for p in range(node_range[m, 0], node_range[m, 1]):
                            if rec_t[p, 5] > vmax:
                                continue
                            # The energy in the heading frame: equal to the exact one up to rounding
                            # (far below margin), so it only lets through near-best records.
                            qx = rec_t[p, 0]
                            qy = rec_t[p, 1]
                            ex = qx - cx
                            ey = qy - cy
                            da = rec_t[p, 2] - s
                            approx = W * (ex * ex + ey * ey) + C0 + w1 * (da * da)
                            if use_dir:
                                approx += w3 * (1.0 - (rec_t[p, 3] * cb + rec_t[p, 4] * sb))
                            if approx > best + margin:
                                continue
                            # Surely ineligible (relaxed half-planes): skip before any trigonometry.
                            if qx < fx0 or qx > fx1 or qy < fy0 or qy > fy1:
                                continue
                            out = False
                            for jj in range(nf):
                                if fl[jj, 2] + fl[jj, 0] * qx + fl[jj, 1] * qy > 0.0:
                                    out = True
                                    break
                            if out:
                                continue
                            cand_e[nc] = approx
                            cand_p[nc] = p
                            nc += 1
                        while nc > 0:
                            t = 0
                            for u in range(1, nc):
                                if cand_e[u] < cand_e[t]:
                                    t = u
                            if cand_e[t] > best + margin:
                                break
                            p = cand_p[t]
                            nc -= 1
                            cand_e[t] = cand_e[nc]
                            cand_p[t] = cand_p[nc]
                            r = perm[p]
                            evals += 1
                            # the record's own row: the same numbers as a[r], b[r], cphi[r], sphi[r]
                            e, ux, uy = _energy_uv(rec_t[p, 2], rec_t[p, 5], rec_t[p, 3], rec_t[p, 4], ct, st, s,
                                                   dn, w0, w1, w2, w3, w4, w5,
                                                   vnx, vny, vpx, vpy, dx, dy, vsx, vsy, vgx, vgy)
                            if e != e:
                                continue
                            if best_r >= 0 and not (e < best or (e == best and r < best_r)):
                                continue
                            if strict:  # the contract's eligibility test, as `_allowed`
                                ok = True
                                for j in range(nl):
                                    if (lines[i, j, 2] * (lines[i, j, 1] - uy)
                                            - lines[i, j, 3] * (lines[i, j, 0] - ux) > LINE_EPS):
                                        ok = False
                                        break
                                if not ok:
                                    continue
                            best = e
                            best_r = r
                        continue
                    cnt = 2
                for t in range(cnt):
                    if roots:
                        k = t0 + t
                        if tree_node_start[k + 1] == tree_node_start[k]:
                            continue
                        base = tree_node_start[k]
                        mc = base
                    else:
                        mc = base + c1 + t
                    # Lower bound of the energy of every record in node mc; skip the node when no
                    # record in it can be eligible (speed limit, feasible box, one relaxed line).
                    if node_box[mc, 12] > vmax:
                        continue
                    x0 = max(node_box[mc, 0], fx0)  # only the part inside the feasible box counts
                    x1 = min(node_box[mc, 1], fx1)
                    y0 = max(node_box[mc, 2], fy0)
                    y1 = min(node_box[mc, 3], fy1)
                    if not (x0 <= x1 and y0 <= y1):
                        continue
                    out = False
                    for j in range(nf):
                        hx = fl[j, 0]
                        hy = fl[j, 1]
                        if fl[j, 2] + min(hx * x0, hx * x1) + min(hy * y0, hy * y1) > 0.0:
                            out = True
                            break
                    if out:
                        continue
                    ddx = max(x0 - cx, 0.0, cx - x1)
                    ddy = max(y0 - cy, 0.0, cy - y1)
                    d2 = ddx * ddx + ddy * ddy
                    # Lines 0..nvc-1 put c on their wrong side: where the box's nearest point to c is
                    # beyond such a line, the nearest eligible point lies on the line's part inside
                    # the box. The box is widened by `pad` (far above rounding) so rounding can only
                    # lower this bound; degenerate cases just keep the box distance.
                    bx0 = x0 - pad
                    bx1 = x1 + pad
                    by0 = y0 - pad
                    by1 = y1 + pad
                    px = min(max(cx, bx0), bx1)
                    py = min(max(cy, by0), by1)
                    for j in range(nvc):
                        hx = fl[j, 0]
                        hy = fl[j, 1]
                        h0 = fl[j, 2]
                        if h0 + hx * px + hy * py <= 0.0:
                            continue
                        hh = hx * hx + hy * hy
                        hc = h0 + hx * cx + hy * cy
                        if not (hh > 0.0 and hc > 0.0):
                            continue
                        f = hc / hh
                        lx = cx - f * hx  # foot of c on the line, which runs along (-hy, hx)
                        ly = cy - f * hy
                        tlo = -np.inf
                        thi = np.inf
                        if hy != 0.0:
                            ta = (lx - bx0) / hy
                            tb = (lx - bx1) / hy
                            tlo = max(tlo, min(ta, tb))
                            thi = min(thi, max(ta, tb))
                        elif not (bx0 <= lx <= bx1):
                            continue
                        if hx != 0.0:
                            ta = (by0 - ly) / hx
                            tb = (by1 - ly) / hx
                            tlo = max(tlo, min(ta, tb))
                            thi = min(thi, max(ta, tb))
                        elif not (by0 <= ly <= by1):
                            continue
                        if not tlo <= thi:
                            continue
                        tt = min(max(0.0, tlo), thi)
                        dl = (f * f + tt * tt) * hh
                        if dl > d2:
                            d2 = dl
                    lbc = W * d2 + C0
                    da = max(node_box[mc, 4] - s, 0.0, s - node_box[mc, 5])
                    lbc += w1 * (da * da)
                    if use_dir:
                        if not (node_box[mc, 6] <= beta <= node_box[mc, 7]):
                            c_lo = node_box[mc, 8] * cb + node_box[mc, 9] * sb
                            c_hi = node_box[mc, 10] * cb + node_box[mc, 11] * sb
                            lbc += w3 * (1.0 - max(c_lo, c_hi))
                        # The bound above minimises the quadratic and direction terms apart, which is
                        # loose where they pull apart (nav direction off the heading). A joint bound:
                        # on a box away from the origin the direction term is at least its tangent
                        # plane at q0 minus (M/2)|q - q0|^2, M >= its Hessian norm; folded into the
                        # quadratic this is one paraboloid whose box minimum is exact.
                        rx = max(x0, 0.0, -x1)
                        ry = max(y0, 0.0, -y1)
                        rmin2 = rx * rx + ry * ry
                        if joint and rmin2 > 0.0 and not lbc > best + margin:  # only when the cheap bound keeps the node
                            mh = 0.5 * _HESS_DIR * w3 / rmin2
                            w_j = W - mh
                            if w_j > 0.0:
                                q0x = min(max(cx, x0), x1)
                                q0y = min(max(cy, y0), y1)
                                ir0 = 1.0 / math.sqrt(q0x * q0x + q0y * q0y)
                                h0 = (q0x * cb + q0y * sb) * ir0
                                gdx = -w3 * (cb - h0 * q0x * ir0) * ir0
                                gdy = -w3 * (sb - h0 * q0y * ir0) * ir0
                                iwj = 1.0 / w_j
                                jx = (W * cx - mh * q0x - 0.5 * gdx) * iwj
                                jy = (W * cy - mh * q0y - 0.5 * gdy) * iwj
                                kj = (W * (cx * cx + cy * cy) - mh * (q0x * q0x + q0y * q0y)
                                      - (gdx * q0x + gdy * q0y) + w3 * (1.0 - h0) - w_j * (jx * jx + jy * jy))
                                ddx = max(x0 - jx, 0.0, jx - x1)
                                ddy = max(y0 - jy, 0.0, jy - y1)
                                lbj = w_j * (ddx * ddx + ddy * ddy) + kj + C0 + w1 * (da * da)
                                if lbj > lbc:
                                    lbc = lbj
                    if lbc > _BIG:  # overflow: the largest finite value is still a bound
                        lbc = _BIG
                    if lbc > best + margin:
                        continue
                    hl[size] = lbc
                    hm[size] = (k << 32) | mc
                    size += 1
                    # An open node is expanded later if at all: start fetching what that reads (its
                    # children's boxes, or a leaf's first records) so it is in cache by then.
                    g = 2 * mc - base + 1
                    if g < tree_node_start[k + 1]:
                        for off in range(0, 16 * _NODE_COLS, 64):
                            prefetch(node_box, g, off)
                        prefetch(node_box, g, 16 * _NODE_COLS - 1)
                    else:
                        p0 = node_range[mc, 0]
                        nbytes = 8 * rec_t.shape[1] * (node_range[mc, 1] - p0)
                        for off in range(0, nbytes, 64):
                            prefetch(rec_t, p0, off)
                        prefetch(rec_t, p0, nbytes - 1)
                roots = False
        if work:
            out_evals[i] = evals
            out_visits[i] = visits
        else:
            _write_choice(i, best_r, b, cphi, sphi, ct, st, v_safe, out_vel, out_rec)


@kernel
def _window_nodes(tree_node_start, z):
    """Most tree nodes any agent's roots t-z..t+z hold: the most open nodes a search can have."""
    nt = tree_node_start.shape[0] - 1
    most = 1
    for k in range(nt):
        lo = max(0, k - z)
        hi = min(nt - 1, k + z)
        most = max(most, tree_node_start[hi + 1] - tree_node_start[lo])
    return most


@kernel
def _largest_leaf(tree_node_start, node_range):
    """At least the most records in one leaf: halving at the middle keeps every leaf of a tree within
    ceil(records / leaves) of its root's records (one pass over the trees, not over every leaf)."""
    most = 1
    for k in range(tree_node_start.shape[0] - 1):
        nodes = tree_node_start[k + 1] - tree_node_start[k]
        if nodes > 0:
            root = tree_node_start[k]
            leaves = (nodes + 1) // 2
            most = max(most, (node_range[root, 1] - node_range[root, 0] + leaves - 1) // leaves)
    return most


@kernel
def _order_by_bucket(agent_bucket, nb):
    """Agent rows grouped by bucket (counting sort; ascending rows within a bucket).

    Agents of one bucket walk the same few trees and leaves, so searching them one after another
    finds those nodes in cache. Each agent's result does not depend on the order."""
    n = agent_bucket.shape[0]
    order = np.arange(n)
    if nb < 1:
        return order
    count = np.zeros(nb + 1, np.int64)
    for i in range(n):
        count[agent_bucket[i] + 1] += 1
    for k in range(nb):
        count[k + 1] += count[k]
    for i in range(n):
        order[count[agent_bucket[i]]] = i
        count[agent_bucket[i]] += 1
    return order


@parallel_kernel
def _pruned_blocks(a, b, cphi, sphi, bucket_start, bucket_min_a, perm, rec_t, tree_node_start, node_range,
                   node_box, b_max, a_max, forest_z, weights, z, strict, v_now, v_pref, nav_dir, v_safe, v_group,
                   max_speed, lines, line_count, out_vel, out_rec, out_evals, out_visits, work):
    n = v_now.shape[0]
    if forest_z >= 0 and z != forest_z:
        raise ValueError("this forest was built for another search width")
    most = _largest_leaf(tree_node_start, node_range)
    hcap = _window_nodes(tree_node_start, 0 if forest_z >= 0 else z)
    nl_max = max(lines.shape[1], 1)
    nblocks = (n + _BLOCK - 1) // _BLOCK
    nb = bucket_start.shape[0] - 1
    agent_bucket = np.zeros(n, np.int64)  # `_bucket_of` of each agent's speed, as the search computes it
    if nb >= 1:
        for i in numba.prange(n):
            agent_bucket[i] = _bucket_of(bucket_min_a, math.sqrt(v_now[i, 0] * v_now[i, 0]
                                                                 + v_now[i, 1] * v_now[i, 1]))
    order = _order_by_bucket(agent_bucket, nb)
    # Agents come in speed-bucket order and a search's cost varies with where and how fast an agent
    # walks, so any fixed split of the blocks leaves a thread waiting. Each worker takes the next
    # block from a shared counter instead; every agent's result is the same whoever searches it.
    # More workers than threads cost nothing: a thread's first worker drains the counter and the rest
    # find it empty. (numba.get_num_threads() inside a kernel would stop it from being cached.)
    workers = min(nblocks, _MAX_WORKERS)
    next_block = np.zeros(1, np.int64)
    for _wk in numba.prange(workers):
        blk = fetch_add(next_block, 0, 1)
        if blk >= nblocks:
            continue
        # Scratch per worker, shared by the agents it searches.
        fl = np.empty((nl_max, 3))
        fb = np.empty(4)
        poly = np.empty((4, 4 * (8 + nl_max)))
        hl = np.empty(hcap)
        hm = np.empty(hcap, np.int64)
        cand_e = np.empty(most)
        cand_p = np.empty(most, np.int64)
        while blk < nblocks:
            _search_block(blk * _BLOCK, min((blk + 1) * _BLOCK, n), a, b, cphi, sphi, bucket_start, bucket_min_a,
                          perm, rec_t, tree_node_start, node_range, node_box, b_max, a_max, forest_z, weights, z,
                          strict, v_now, v_pref, nav_dir, v_safe, v_group, max_speed, lines, line_count, fl, fb,
                          poly, hl, hm, cand_e, cand_p, out_vel, out_rec, out_evals, out_visits, work, order,
                          agent_bucket)
            blk = fetch_add(next_block, 0, 1)


@kernel  # the prange over agent blocks is in `_pruned_blocks`
def choose_pruned(a, b, cphi, sphi, bucket_start, bucket_min_a, perm, rec_t, tree_node_start, node_range,
                  node_box, b_max, a_max, forest_z, weights, z, strict, v_now, v_pref, nav_dir, v_safe, v_group,
                  max_speed, lines, line_count, out_vel, out_rec):
    """Indexed search; returns exactly the record `choose_full` returns. Writes row i only."""
    dummy = np.empty(1, np.int64)
    _pruned_blocks(a, b, cphi, sphi, bucket_start, bucket_min_a, perm, rec_t, tree_node_start, node_range,
                   node_box, b_max, a_max, forest_z, weights, z, strict, v_now, v_pref, nav_dir, v_safe, v_group,
                   max_speed, lines, line_count, out_vel, out_rec, dummy, dummy, False)


@kernel  # the prange over agent blocks is in `_pruned_blocks`
def pruned_work(a, b, cphi, sphi, bucket_start, bucket_min_a, perm, rec_t, tree_node_start, node_range,
                node_box, b_max, a_max, forest_z, weights, z, strict, v_now, v_pref, nav_dir, v_safe, v_group,
                max_speed, lines, line_count, out_evals, out_visits):
    """Diagnostics for benchmarks: energies evaluated and tree nodes visited per agent."""
    _pruned_blocks(a, b, cphi, sphi, bucket_start, bucket_min_a, perm, rec_t, tree_node_start, node_range,
                   node_box, b_max, a_max, forest_z, weights, z, strict, v_now, v_pref, nav_dir, v_safe, v_group,
                   max_speed, lines, line_count, np.empty((1, 2)), np.empty(1, np.int32), out_evals,
                   out_visits, True)


# ---------------------------------------------------------------------------------------------
# Python surface

def _as_f64(name, x, err, ndim=1):
    try:
        arr = np.ascontiguousarray(x, dtype=np.float64)
    except (TypeError, ValueError):
        raise err(f"{name} must be an array of numbers") from None
    if arr.ndim != ndim:
        raise err(f"{name} must be {ndim}-dimensional, got shape {arr.shape}")
    return arr


def _check_records(a, b, phi, bucket_start, bucket_min_a):
    a = _as_f64("a", a, RecordSetError)
    b = _as_f64("b", b, RecordSetError)
    phi = _as_f64("phi", phi, RecordSetError)
    n = a.shape[0]
    if b.shape[0] != n or phi.shape[0] != n:
        raise RecordSetError(f"a, b and phi must have equal lengths, got {n}, {b.shape[0]}, {phi.shape[0]}")
    for name, arr in (("a", a), ("b", b), ("phi", phi)):
        bad = ~np.isfinite(arr)
        if bad.any():
            raise RecordSetError(f"{name}[{int(np.argmax(bad))}] is not finite")
    if (b < 0).any():
        raise RecordSetError(f"b[{int(np.argmax(b < 0))}] is negative (exit speeds are lengths)")
    bad = (phi < -np.pi) | (phi > np.pi)
    if bad.any():
        raise RecordSetError(f"phi[{int(np.argmax(bad))}] is outside [-pi, pi]")
    if n > 1 and (np.diff(a) < 0).any():
        raise RecordSetError(f"a is not sorted ascending (at index {int(np.argmax(np.diff(a) < 0)) + 1})")
    bs = np.asarray(bucket_start)
    if bs.ndim != 1 or bs.shape[0] < 2 or not np.issubdtype(bs.dtype, np.integer):
        raise RecordSetError(f"bucket_start must be a 1-D integer array of B+1 >= 2 entries, got {bs.dtype} "
                             f"{bs.shape}")
    if bs[0] != 0 or bs[-1] != n or (np.diff(bs) < 0).any():
        raise RecordSetError(f"bucket_start must rise from 0 to the record count {n}")
    bs = np.ascontiguousarray(bs, dtype=np.int32)
    nb = bs.shape[0] - 1
    if bucket_min_a is None:
        bma = a[np.minimum(bs[:-1], n - 1)] if n > 0 else np.zeros(nb)
    else:
        bma = _as_f64("bucket_min_a", bucket_min_a, RecordSetError)
    if bma.shape[0] != nb:
        raise RecordSetError(f"bucket_min_a must have B = {nb} entries, got {bma.shape[0]}")
    if np.isnan(bma).any() or (nb > 1 and (np.diff(bma) < 0).any()):
        raise RecordSetError("bucket_min_a must be ascending and not NaN")
    return a, b, phi, bs, np.ascontiguousarray(bma)


def _record_arrays(records):
    """(a, b, phi, bucket_start, bucket_min_a) from a RecordIndex, a record-set object or a tuple."""
    if isinstance(records, RecordIndex):
        return records.a, records.b, records.phi, records.bucket_start, records.bucket_min_a
    if isinstance(records, (tuple, list)):
        if len(records) == 4:
            return tuple(records) + (None,)
        if len(records) == 5:
            return tuple(records)
        raise RecordSetError("records tuple must be (a, b, phi, bucket_start[, bucket_min_a])")
    try:
        return records.a, records.b, records.phi, records.bucket_start, records.bucket_min_a
    except AttributeError:
        raise RecordSetError("records must be a RecordIndex, a record set or (a, b, phi, bucket_start"
                             "[, bucket_min_a])") from None


def _distinct_items(a, b, phi, bucket_start):
    """Per bucket, the records whose (a, b, phi) bits no lower-indexed record of the same bucket shares.

    A later bitwise copy has the same energy and velocity as its first occurrence, so a full scan in
    index order can never pick it; leaving copies out of the trees keeps the search exact and spares
    it long runs of exact ties (e.g. thousands of standstill records). Returns (items, item_start).
    """
    n = a.shape[0]
    nb = bucket_start.shape[0] - 1
    if n == 0:
        return np.zeros(0, np.int32), np.zeros(nb + 1, np.int32)
    bucket = np.repeat(np.arange(nb), np.diff(bucket_start))
    bits = [x.view(np.int64) for x in (a, b, phi)]
    order = np.lexsort((np.arange(n), bits[2], bits[1], bits[0], bucket))  # last key is primary
    same = np.zeros(n, bool)
    same[1:] = bucket[order[1:]] == bucket[order[:-1]]
    for x in bits:
        same[1:] &= x[order[1:]] == x[order[:-1]]
    keep = np.ones(n, bool)
    keep[order[same]] = False
    items = np.flatnonzero(keep).astype(np.int32)
    item_start = np.zeros(nb + 1, np.int32)
    np.cumsum(np.bincount(bucket[keep], minlength=nb), out=item_start[1:])
    return items, item_start


class _Forest:
    """k-d trees of q_r = b_r*(cos phi_r, sin phi_r), one per bucket or one per bucket window."""

    __slots__ = ("perm", "rec_t", "tree_node_start", "node_range", "node_box", "z")

    def __init__(self, a, b, phi, cphi, sphi, items, tree_start, leaf_size, z):
        perm, self.tree_node_start, self.node_range, self.node_box = _build_trees(
            a, b, phi, cphi, sphi, items, tree_start, leaf_size)
        self.perm = perm
        # Tree-order rows (qx, qy, a, cos phi, sin phi, b) so leaves read memory sequentially; the exact
        # energies read them too, so they are the index-order values gathered, bit for bit.
        cp, sp = cphi[perm], sphi[perm]
        self.rec_t = np.ascontiguousarray(np.stack([b[perm] * cp, b[perm] * sp, a[perm], cp, sp, b[perm]], axis=1))
        self.z = z
        for name in ("perm", "rec_t", "tree_node_start", "node_range", "node_box"):
            getattr(self, name).setflags(write=False)


def _window_items(items, item_start, z):
    """Items of the windows k-z..k+z, window after window: one tree's records per window."""
    nb = item_start.shape[0] - 1
    k = np.arange(nb)
    lo = item_start[np.maximum(k - z, 0)]
    hi = item_start[np.minimum(k + z, nb - 1) + 1]
    start = np.zeros(nb + 1, np.int32)
    np.cumsum(hi - lo, out=start[1:])
    if nb == 0:
        return np.zeros(0, np.int32), start
    return np.concatenate([items[x:y] for x, y in zip(lo, hi)]).astype(np.int32), start


class RecordIndex:
    """Search index over one record set: k-d trees of q_r = b_r*(cos phi_r, sin phi_r).

    The base forest has one tree per bucket and serves every search width z (the search starts at the
    roots of buckets k-z..k+z). For 1 <= z <= WINDOW_Z_MAX a window forest is built on first use: one
    tree per bucket k over buckets k-z..k+z, so each agent searches a single tree. That holds each
    record (2z+1) times (z = 3: 7x the base forest, about 30 MB for 80,000 records), and halves the
    search time: one descent instead of 2z+1. Built in O(N log N); read-only afterwards.
    """

    WINDOW_Z_MAX = 3  # the default width and below: a window forest holds each record 2z+1 times
    # Below this many agents `run` builds no window forest (it uses one if built): the build (about
    # 0.25 s at z = 3 on 2 cores) would outweigh what it saves a small crowd, and would slow a host's
    # first frame. The result is the same record with either forest.
    WINDOW_MIN_AGENTS = 1000
    __slots__ = ("a", "b", "phi", "cphi", "sphi", "bucket_start", "bucket_min_a", "items", "item_start", "base",
                 "_windows", "b_max", "a_max", "leaf_size")

    @classmethod
    def build(cls, a, b=None, phi=None, bucket_start=None, bucket_min_a=None, leaf_size=32):
        """Build from arrays, or from one record-set object (attributes a, b, phi, bucket_start,
        bucket_min_a) passed as the first argument. bucket_min_a defaults to a[bucket_start[k]]."""
        if b is None and phi is None and bucket_start is None:
            a, b, phi, bucket_start, bucket_min_a = _record_arrays(a)
        elif b is None or phi is None or bucket_start is None:
            raise RecordSetError("RecordIndex.build needs a, b, phi and bucket_start")
        if isinstance(leaf_size, bool) or not isinstance(leaf_size, (int, np.integer)) or leaf_size < 1:
            raise RecordSetError(f"leaf_size must be an integer >= 1, got {leaf_size!r}")
        a, b, phi, bs, bma = _check_records(a, b, phi, bucket_start, bucket_min_a)
        items, item_start = _distinct_items(a, b, phi, bs)
        self = object.__new__(cls)
        self.a, self.b, self.phi, self.bucket_start, self.bucket_min_a = a, b, phi, bs, bma
        self.cphi, self.sphi = _cos_sin(phi)
        self.items, self.item_start = items, item_start
        self.leaf_size = int(leaf_size)
        self.base = _Forest(a, b, phi, self.cphi, self.sphi, items, item_start, self.leaf_size, -1)
        self._windows = {}
        self.b_max = float(b.max()) if len(b) else 0.0
        self.a_max = float(np.abs(a).max()) if len(a) else 0.0
        for name in ("a", "b", "phi", "cphi", "sphi", "bucket_start", "bucket_min_a", "items", "item_start"):
            getattr(self, name).setflags(write=False)
        return self

    def forest(self, z=None):
        """The forest a search of width z uses (the base forest when z is None, 0 or above WINDOW_Z_MAX)."""
        if z is None or not 1 <= z <= self.WINDOW_Z_MAX or self.n_buckets < 2:
            return self.base
        z = int(z)
        f = self._windows.get(z)
        if f is None:  # a race between threads only builds the same forest twice
            items, start = _window_items(self.items, self.item_start, z)
            f = self._windows[z] = _Forest(self.a, self.b, self.phi, self.cphi, self.sphi, items, start,
                                           self.leaf_size, z)
        return f

    @property
    def n_records(self) -> int:
        return int(self.a.shape[0])

    @property
    def n_buckets(self) -> int:
        return int(self.bucket_start.shape[0] - 1)

    def full_args(self):
        """Leading arguments of `choose_full`."""
        return self.a, self.b, self.cphi, self.sphi, self.bucket_start, self.bucket_min_a

    def pruned_args(self, z=None):
        """Leading arguments of `choose_pruned` (and `pruned_work`) for search width z; without z, the
        base forest's, which serve any width."""
        f = self.forest(z)
        return (self.a, self.b, self.cphi, self.sphi, self.bucket_start, self.bucket_min_a, f.perm, f.rec_t,
                f.tree_node_start, f.node_range, f.node_box, self.b_max, self.a_max, f.z)

    def run(self, kernel_fn, weights, z, strict, v_now, v_pref, nav_dir, v_safe, v_group, max_speed,
            lines, line_count, out_vel, out_rec):
        """Call `choose_full` or `choose_pruned` on this index. Fast path: shapes and dtypes are checked,
        values are not (use `choose` for full validation)."""
        # Contiguous copies of strided inputs (no dtype change): avoids compiling another specialisation.
        weights, v_now, v_pref, nav_dir, v_safe, v_group, max_speed, lines, line_count = (
            x if not isinstance(x, np.ndarray) or x.flags.c_contiguous else np.ascontiguousarray(x)
            for x in (weights, v_now, v_pref, nav_dir, v_safe, v_group, max_speed, lines, line_count))
        n = _check_shapes(weights, v_now, v_pref, nav_dir, v_safe, v_group, max_speed, lines, line_count,
                          out_vel, out_rec)
        if kernel_fn is choose_full:
            lead = self.full_args()
        elif kernel_fn is choose_pruned:
            z_forest = int(z) if n >= self.WINDOW_MIN_AGENTS or int(z) in self._windows else None
            lead = self.pruned_args(z_forest)
        else:
            raise StepError("kernel_fn must be choose_full or choose_pruned")
        if n:
            kernel_fn(*lead, weights, int(z), bool(strict), v_now, v_pref, nav_dir, v_safe, v_group,
                      max_speed, lines, line_count, out_vel, out_rec)


def _check_shapes(weights, v_now, v_pref, nav_dir, v_safe, v_group, max_speed, lines, line_count, out_vel,
                  out_rec):
    def need(name, x, dtype, shape):
        if not isinstance(x, np.ndarray) or x.dtype != dtype or not x.flags.c_contiguous or x.shape != shape:
            got = f"{x.dtype} {x.shape}" if isinstance(x, np.ndarray) else type(x).__name__
            raise StepError(f"{name} must be a C-contiguous {np.dtype(dtype).name} array of shape {shape}, "
                            f"got {got}")
    if not isinstance(v_now, np.ndarray) or v_now.ndim != 2:
        raise StepError("v_now must be a float64 array of shape (n, 2)")
    n = v_now.shape[0]
    need("weights", weights, np.float64, (6,))
    for name, x in (("v_now", v_now), ("v_pref", v_pref), ("nav_dir", nav_dir), ("v_safe", v_safe),
                    ("v_group", v_group)):
        need(name, x, np.float64, (n, 2))
    need("max_speed", max_speed, np.float64, (n,))
    if not isinstance(lines, np.ndarray) or lines.ndim != 3:
        raise StepError("lines must be a float64 array of shape (n, L, 4)")
    need("lines", lines, np.float64, (n, lines.shape[1], 4))
    need("line_count", line_count, np.int32, (n,))
    need("out_vel", out_vel, np.float64, (n, 2))
    need("out_rec", out_rec, np.int32, (n,))
    if not (out_vel.flags.writeable and out_rec.flags.writeable):
        raise StepError("out_vel and out_rec must be writeable")
    if n and (line_count.min() < 0 or line_count.max() > lines.shape[1]):
        raise StepError(f"line_count must lie in 0..{lines.shape[1]} (lines.shape[1])")
    return n


def choose(records, weights, z, strict, v_now, v_pref, nav_dir, v_safe, v_group, max_speed, lines=None,
           line_count=None, *, method="pruned", out_vel=None, out_rec=None):
    """Validated data-driven choice for n agents. Returns (velocity float64[n,2], record int32[n]).

    records: a RecordIndex (needed for method="pruned" to be fast; other forms build one per call),
    a record-set object or (a, b, phi, bucket_start[, bucket_min_a]). weights: 6 finite values >= 0
    (similarity, consistency, expectation, direction, avoidance, group); a NaN row of v_group drops
    that agent's group term. z: search width >= 0.
    lines/line_count: half-planes (n, L, 4) / int32[n]; None means no lines. Record -1 means the
    agent takes v_safe (no eligible record). Nothing is written when an argument is invalid.
    """
    if method not in ("pruned", "full"):
        raise StepError(f"method must be 'pruned' or 'full', got {method!r}")
    if isinstance(z, bool) or not isinstance(z, (int, np.integer)) or z < 0:
        raise StepError(f"z (search width) must be an integer >= 0, got {z!r}")
    if not isinstance(strict, (bool, np.bool_)):
        raise StepError(f"strict must be a bool, got {strict!r}")
    w = _as_f64("weights", weights, StepError)
    if w.shape != (6,) or not np.isfinite(w).all() or (w < 0).any():
        raise StepError(f"weights must be 6 finite values >= 0, got {w!r}")
    vn = _as_f64("v_now", v_now, StepError, 2)
    n = vn.shape[0]
    arrs = {}
    for name, x in (("v_now", vn), ("v_pref", v_pref), ("nav_dir", nav_dir), ("v_safe", v_safe),
                    ("v_group", v_group)):
        arr = _as_f64(name, x, StepError, 2)
        if arr.shape != (n, 2):
            raise StepError(f"{name} must have shape ({n}, 2), got {arr.shape}")
        bad = ~np.isfinite(arr)
        if name == "v_group":  # a whole NaN row means "not in a group"
            bad &= ~np.isnan(arr).all(axis=1, keepdims=True)
        if bad.any():
            raise StepError(f"{name}[{int(np.argmax(bad.any(axis=1)))}] is not finite")
        arrs[name] = arr
    vmax = _as_f64("max_speed", max_speed, StepError)
    if vmax.shape != (n,) or np.isnan(vmax).any() or (vmax < 0).any():
        raise StepError(f"max_speed must be {n} values >= 0 (inf allowed), got shape {vmax.shape}")
    if lines is None:
        lines = np.zeros((n, 0, 4))
    ln = _as_f64("lines", lines, StepError, 3)
    if ln.shape[0] != n or ln.shape[2] != 4:
        raise StepError(f"lines must have shape ({n}, L, 4), got {ln.shape}")
    lc = np.zeros(n, np.int32) if line_count is None else np.asarray(line_count)
    if lc.shape != (n,) or not np.issubdtype(lc.dtype, np.integer):
        raise StepError(f"line_count must be {n} integers")
    if n and (lc.min() < 0 or lc.max() > ln.shape[1]):
        raise StepError(f"line_count must lie in 0..{ln.shape[1]} (lines.shape[1])")
    lc = np.ascontiguousarray(lc, dtype=np.int32)
    used = np.arange(ln.shape[1])[None, :] < lc[:, None]
    if not np.isfinite(ln[used]).all():
        raise StepError("lines holds a non-finite value in a used half-plane")
    if isinstance(records, RecordIndex):
        index = records
    elif method == "pruned":
        index = RecordIndex.build(*_record_arrays(records))
    else:
        index = None
        a_, b_, phi_, bs_, bma_ = _check_records(*_record_arrays(records))
        full = (a_, b_) + _cos_sin(phi_) + (bs_, bma_)
    if out_vel is None:
        out_vel = np.empty((n, 2))
    if out_rec is None:
        out_rec = np.empty(n, np.int32)
    _check_shapes(w, arrs["v_now"], arrs["v_pref"], arrs["nav_dir"], arrs["v_safe"], arrs["v_group"], vmax, ln,
                  lc, out_vel, out_rec)
    if n == 0:
        return out_vel, out_rec
    args = (w, int(z), bool(strict), arrs["v_now"], arrs["v_pref"], arrs["nav_dir"], arrs["v_safe"],
            arrs["v_group"], vmax, ln, lc, out_vel, out_rec)
    if method == "pruned":
        choose_pruned(*index.pruned_args(int(z)), *args)
    else:
        choose_full(*(index.full_args() if index is not None else full), *args)
    return out_vel, out_rec
