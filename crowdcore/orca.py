"""ORCA local avoidance (van den Berg, Guy, Lin & Manocha 2011, "Reciprocal n-body collision
avoidance", Robotics Research, ISRR 2009), written from the published method.

Per agent: one half-plane of allowed velocities per near wall segment and per neighbour, then a
2-D linear program picks the allowed velocity closest to the preferred one within the speed
disc; when the half-planes have no common point, a 3-D linear program minimises the largest
violation of the agent half-planes while the wall half-planes stay hard.

Half-planes are rows (point x, y, direction x, y); the allowed side is the left of the direction,
i.e. v is allowed when det(direction, v - point) >= 0.

Determinism: lines are built in a fixed order (walls by segment index, then neighbours in the
order given, which is sorted by (distance^2, id)) and the programs process them in that order, so
a result depends only on the agent's own inputs, never on row order or thread count.
"""
from dataclasses import dataclass

import numpy as np
from numba import prange

from ._jit import inline_kernel, kernel, parallel_kernel
from .spatial import any_wall_near, walls_near

_EPS = 1e-9           # parallel-line test in the linear programs
_WALL_MARGIN = 0.01   # m, added to the wall query reach so segments at the edge are not missed
_BLOCK = 64           # agents per parallel work item (scratch buffers are shared within a block)


@dataclass(frozen=True)
class OrcaParams:
    """ORCA settings. Units: seconds."""

    tau: float = 2.0        # horizon for other agents (common practice)
    tau_obst: float = 0.5   # horizon for walls (common practice)
    extra_walls: int = 16   # line capacity L = K + extra_walls

    def capacity(self, k):
        """Line capacity L for K neighbours."""
        return int(k) + int(self.extra_walls)


@kernel
def _det(ax, ay, bx, by):
    return ax * by - ay * bx


# ------------------------------------------------------------------ half-plane construction

@kernel
def agent_line(i, j, pix, piy, vix, viy, ri, pjx, pjy, vjx, vjy, rj, tau, dt):
    """ORCA half-plane for agent i induced by agent j: (point x, y, direction x, y).

    The velocity obstacle of j (truncated at horizon tau) is a cone cut by a disc; u is the
    smallest change of the relative velocity that leaves it, n its outward normal. Each agent
    takes half the responsibility: allowed = {v : (v - (v_i + u/2)) . n >= 0}.
    i and j (row indices) only break the tie of exactly coincident agents with equal velocities.
    """
    px, py = pjx - pix, pjy - piy          # relative position
    vx, vy = vix - vjx, viy - vjy          # relative velocity
    rr = ri + rj
    dist2 = px * px + py * py
    rr2 = rr * rr
    if dist2 > rr2:
        inv_tau = 1.0 / tau
        wx, wy = vx - inv_tau * px, vy - inv_tau * py   # from cutoff centre to relative velocity
        w2 = wx * wx + wy * wy
        dot1 = wx * px + wy * py
        if dot1 < 0.0 and dot1 * dot1 > rr2 * w2:
            # closest boundary point is on the cutoff circle
            wl = np.sqrt(w2)
            nx, ny = wx / wl, wy / wl
            dirx, diry = ny, -nx
            s = rr * inv_tau - wl
            ux, uy = s * nx, s * ny
        else:
            # closest boundary point is on one of the legs of the cone
            leg = np.sqrt(dist2 - rr2)
            if _det(px, py, wx, wy) > 0.0:
                dirx = (px * leg - py * rr) / dist2
                diry = (px * rr + py * leg) / dist2
            else:
                dirx = -(px * leg + py * rr) / dist2
                diry = -(-px * rr + py * leg) / dist2
            dot2 = vx * dirx + vy * diry
            ux, uy = dot2 * dirx - vx, dot2 * diry - vy
    else:
        # already overlapping: horizon 1/dt, so the pair separates within one step
        inv_dt = 1.0 / dt
        wx, wy = vx - inv_dt * px, vy - inv_dt * py
        wl = np.sqrt(wx * wx + wy * wy)
        if wl > 0.0:
            nx, ny = wx / wl, wy / wl
        else:
            # coincident with equal velocities: opposite fixed directions for the two agents
            nx, ny = (1.0, 0.0) if i < j else (-1.0, 0.0)
        dirx, diry = ny, -nx
        s = rr * inv_dt - wl
        ux, uy = s * nx, s * ny
    return vix + 0.5 * ux, viy + 0.5 * uy, dirx, diry


@kernel
def wall_line(px, py, vx, vy, r, x0, y0, x1, y1, tau_obst, dt):
    """Conservative ORCA half-plane for a static segment: (point x, y, direction x, y, distance).

    c = closest point of the segment to p, d = |c - p|, n = (c - p)/d. Require
    n . v <= (d - r)/tau_obst. Why this keeps the agent at least r from the segment for the
    horizon: c is the closest point of a convex set, so the whole segment lies in
    {x : n . (x - p) >= d} (beyond the supporting line at c). Moving with v for t <= tau_obst
    gives n . (p + v t - p) <= t (d - r)/tau_obst <= d - r, so the new position is at least
    d - (d - r) = r from that half-plane and hence from the segment. If d < r (touching), the
    bound (d - r)/dt pushes the agent out within one step.
    """
    ex, ey = x1 - x0, y1 - y0
    l2 = ex * ex + ey * ey
    t = 0.0
    if l2 > 0.0:
        t = ((px - x0) * ex + (py - y0) * ey) / l2
        t = min(max(t, 0.0), 1.0)
    cx, cy = x0 + t * ex - px, y0 + t * ey - py
    d = np.sqrt(cx * cx + cy * cy)
    if d > 0.0:
        nx, ny = cx / d, cy / d
    else:
        # centre on the segment: take the segment normal on the side the agent is moving to
        nl = np.sqrt(l2)
        nx, ny = (-ey / nl, ex / nl) if nl > 0.0 else (1.0, 0.0)
        if nx * vx + ny * vy < 0.0:
            nx, ny = -nx, -ny
    h = tau_obst if d >= r else dt
    b = (d - r) / h
    # left of (-ny, nx) is {v : n . v <= b}
    return nx * b, ny * b, -ny, nx, d


# ------------------------------------------------------------------ linear programs

@inline_kernel
def _lp2(ln, count, vmax, optx, opty, dir_opt):
    """Incremental 2-D LP over lines 0..count-1 in the given order. Returns (fail, x, y):
    fail == count when feasible, else the first line that could not be satisfied (x, y is then
    the best point for the lines before it).

    The 1-D step (best point on one line) is written out inline: a helper call with an array argument
    costs atomic reference counting, and it runs once per violated line. For the same reason this
    function and solve_lines are inlined into their callers (4% of orca_phase on one thread, 8% on two)."""
    if dir_opt:
        rx, ry = optx * vmax, opty * vmax     # opt is a unit direction here
    else:
        s2 = optx * optx + opty * opty
        if s2 > vmax * vmax:
            s = np.sqrt(s2)
            rx, ry = optx / s * vmax, opty / s * vmax
        else:
            rx, ry = optx, opty
    for no in range(count):
        ptx, pty, dx, dy = ln[no, 0], ln[no, 1], ln[no, 2], ln[no, 3]
        if _det(dx, dy, ptx - rx, pty - ry) <= 0.0:
            continue
        # best point on line `no` subject to lines 0..no-1 and the speed disc
        dot = ptx * dx + pty * dy
        disc = dot * dot + vmax * vmax - (ptx * ptx + pty * pty)
        if disc < 0.0:
            return no, rx, ry         # the line misses the speed disc
        sq = np.sqrt(disc)
        t_lo = -dot - sq
        t_hi = -dot + sq
        for k in range(no):
            kdx, kdy = ln[k, 2], ln[k, 3]
            denom = _det(dx, dy, kdx, kdy)
            numer = _det(kdx, kdy, ptx - ln[k, 0], pty - ln[k, 1])
            if abs(denom) <= _EPS:
                if numer < 0.0:
                    return no, rx, ry  # parallel and on the forbidden side of line k
                continue
            t = numer / denom
            if denom >= 0.0:
                t_hi = min(t_hi, t)
            else:
                t_lo = max(t_lo, t)
            if t_lo > t_hi:
                return no, rx, ry
        if dir_opt:
            t = t_hi if optx * dx + opty * dy > 0.0 else t_lo
        else:
            t = dx * (optx - ptx) + dy * (opty - pty)
            t = min(max(t, t_lo), t_hi)
        rx, ry = ptx + t * dx, pty + t * dy
    return count, rx, ry


@kernel
def _lp3(ln, count, n_hard, begin, vmax, rx, ry, proj):
    """3-D LP fallback: minimise the largest violation of lines n_hard..count-1, lines
    0..n_hard-1 kept hard. proj is scratch with at least `count` rows."""
    worst = 0.0
    for k in range(begin, count):
        if _det(ln[k, 2], ln[k, 3], ln[k, 0] - rx, ln[k, 1] - ry) > worst:
            # lines where violating k by the same amount: bisectors of k with each earlier soft line
            m = 0
            for h in range(n_hard):
                for c in range(4):
                    proj[m, c] = ln[h, c]
                m += 1
            kdx, kdy = ln[k, 2], ln[k, 3]
            for j in range(n_hard, k):
                jdx, jdy = ln[j, 2], ln[j, 3]
                den = _det(kdx, kdy, jdx, jdy)
                if abs(den) <= _EPS:
                    if kdx * jdx + kdy * jdy > 0.0:
                        continue              # same direction: j adds nothing
                    qx = 0.5 * (ln[k, 0] + ln[j, 0])
                    qy = 0.5 * (ln[k, 1] + ln[j, 1])
                else:
                    t = _det(jdx, jdy, ln[k, 0] - ln[j, 0], ln[k, 1] - ln[j, 1]) / den
                    qx, qy = ln[k, 0] + t * kdx, ln[k, 1] + t * kdy
                bx, by = jdx - kdx, jdy - kdy
                bl = np.sqrt(bx * bx + by * by)
                proj[m, 0] = qx
                proj[m, 1] = qy
                proj[m, 2] = bx / bl
                proj[m, 3] = by / bl
                m += 1
            fail, nx, ny = _lp2(proj, m, vmax, -kdy, kdx, True)
            if fail == m:
                rx, ry = nx, ny
            # else: only rounding can make this fail; keep the previous point
            worst = _det(kdx, kdy, ln[k, 0] - rx, ln[k, 1] - ry)
    return rx, ry


@inline_kernel
def solve_lines(ln, count, n_hard, vmax, prefx, prefy, proj):
    """Velocity closest to pref within |v| <= vmax satisfying lines 0..count-1; when infeasible,
    the least-violating one with lines 0..n_hard-1 hard (if those alone conflict, the least
    violation of them alone)."""
    fail, rx, ry = _lp2(ln, count, vmax, prefx, prefy, False)
    if fail < count:
        if fail < n_hard:
            # the hard lines conflict among themselves (deep wall contact): soften them only
            rx, ry = _lp3(ln, n_hard, 0, fail, vmax, rx, ry, proj)
        else:
            rx, ry = _lp3(ln, count, n_hard, fail, vmax, rx, ry, proj)
    return rx, ry


# ------------------------------------------------------------------ phase kernel

@parallel_kernel
def orca_phase(pos, vel, radius, max_speed, pref_vel, nbr, nbr_count, walls, wall_cell_start,
               wall_cell_items, ox, oy, wc, wnx, wny, tau, tau_obst, dt, nav_dir, route_dist, target, queue_gap,
               lines, line_count, v_safe):
    """ORCA for every agent: lines[i, :line_count[i]] (walls first, then neighbours; lines beyond
    the capacity L = lines.shape[1] are dropped, walls kept first) and v_safe[i].

    queue_gap > 0: agent i counts its own radius larger by queue_gap * cos(angle between its route
    nav_dir[i] and the direction to j) * (1 - |v_i|/|v_pref_i|) for a neighbour j ahead of it, so a
    waiting queue keeps that much room and stays loose. Without it the crowd behind a door packed to
    zero gaps, where every ORCA program admits only v = 0, and the crowd froze for good. Scaled by how
    much the agent is held up, it leaves walking crowds alone (their spacing is the headway rule's
    job): unscaled, it bound the ORCA programs of 18% instead of 3% of a walking 1/m^2 crowd and made
    the step 30% slower. The extra room never exceeds the real gap to someone walking on ahead, and is
    restored over tau, not within a step, from someone standing or backing towards the agent (see the loop).
    "Ahead" also needs j nearer than i to the shared target along the route (route_dist, the target's
    distance field at each agent), so of two agents only one can hold room from the other.
    Bodies (guard, invariants) keep their true radius; queue_gap = 0 is plain ORCA.

    The per-agent body is written out in the loop: a helper taking a dozen arrays paid two atomic
    reference-count updates per array per agent, more than the half-plane arithmetic."""
    n = pos.shape[0]
    cap = lines.shape[1]
    nblocks = (n + _BLOCK - 1) // _BLOCK
    has_walls = walls.shape[0] > 0 and cap > 0
    for b in prange(nblocks):
        cand = np.empty(max(walls.shape[0], 1), np.int32)
        proj = np.empty((max(cap, 1), 4), np.float64)
        for i in range(b * _BLOCK, min((b + 1) * _BLOCK, n)):
            ln = lines[i]
            px, py = pos[i, 0], pos[i, 1]
            vx, vy = vel[i, 0], vel[i, 1]
            r = radius[i]
            vmax = max_speed[i]
            reach = r + vmax * tau_obst + _WALL_MARGIN
            m = 0
            if has_walls and any_wall_near(px, py, reach, wall_cell_start, ox, oy, wc, wnx, wny):
                nc = walls_near(px, py, reach, walls, wall_cell_start, wall_cell_items, ox, oy, wc, wnx, wny, cand)
                for c in range(nc):
                    s = cand[c]
                    qx, qy, dx, dy, d = wall_line(px, py, vx, vy, r, walls[s, 0], walls[s, 1], walls[s, 2],
                                                  walls[s, 3], tau_obst, dt)
                    if d > reach:
                        continue   # cannot bind: n . v <= |v| <= vmax < (d - r)/tau_obst
                    ln[m, 0], ln[m, 1], ln[m, 2], ln[m, 3] = qx, qy, dx, dy
                    m += 1
                    if m == cap:
                        break
            n_walls = m
            for s in range(nbr_count[i]):
                if m == cap:
                    break
                j = nbr[i, s]
                if j < 0 or j == i:
                    continue
                ri = r
                h = dt      # horizon for an overlapping pair (a real overlap: separate within one step)
                if queue_gap > 0.0:
                    # keep queue_gap from whoever is ahead along the route (scaled by how far ahead, and
                    # by how much this agent is held up)
                    ddx, ddy = pos[j, 0] - px, pos[j, 1] - py
                    dd = np.sqrt(ddx * ddx + ddy * ddy)
                    ahead = ddx * nav_dir[i, 0] + ddy * nav_dir[i, 1]
                    # Routes converge on an opening, so two agents at its corners each project ahead of the
                    # other; each held room from the other and neither stepped in (a 0.8 m door jammed).
                    # Remaining route distance is a strict order: only the one further back keeps room.
                    # Neighbours bound elsewhere keep the projection test alone: skipping the gap for them
                    # gridlocked the counterflow case (one seed of five, with 50 and with 100 opposing).
                    if target[j] == target[i] and not route_dist[j] < route_dist[i]:
                        ahead = 0.0
                    if dd > 0.0 and ahead > 0.0:
                        ps2 = pref_vel[i, 0] * pref_vel[i, 0] + pref_vel[i, 1] * pref_vel[i, 1]
                        slow = 1.0
                        if ps2 > 0.0:
                            slow = min(max(1.0 - np.sqrt((vx * vx + vy * vy) / ps2), 0.0), 1.0)
                        extra = queue_gap * min(ahead / dd, 1.0) * slow
                        gap = dd - r - radius[j]
                        if gap > 0.0:
                            # Past the real gap the pair counts as overlapping, and ORCA separates overlaps
                            # within one step (dt): a hard push backwards. From someone walking on along our
                            # route: never more than the gap (just do not close in); otherwise an unbounded
                            # push-back ran round a dense ring crowd and it drifted backwards. From someone
                            # standing or backing towards us: step back gently, over tau instead of dt; this
                            # still loosens a packed queue at a door (capping there too jammed a 0.8 m door in
                            # 7 of 20 seeds: agents converging on the opening each held the other off).
                            # Tuned, no source.
                            if vel[j, 0] * nav_dir[i, 0] + vel[j, 1] * nav_dir[i, 1] > 0.0:
                                extra = min(extra, gap)
                            else:
                                h = tau
                        ri = r + extra
                qx, qy, dx, dy = agent_line(i, j, px, py, vx, vy, ri, pos[j, 0], pos[j, 1], vel[j, 0], vel[j, 1],
                                            radius[j], tau, h)
                ln[m, 0], ln[m, 1], ln[m, 2], ln[m, 3] = qx, qy, dx, dy
                m += 1
            rx, ry = solve_lines(ln, m, n_walls, vmax, pref_vel[i, 0], pref_vel[i, 1], proj)
            line_count[i] = m
            v_safe[i, 0] = rx
            v_safe[i, 1] = ry
