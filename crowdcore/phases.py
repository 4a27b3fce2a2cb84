"""Step phases owned by the world: navigate, move and account.

Each kernel reads last frame's arrays and writes only its own agent's row of fresh buffers.
"""
import math

import numpy as np
from numba import prange

from ._jit import inline_kernel, kernel, parallel_kernel
from .navfield import sample_dir, sample_dist
from .spatial import any_wall_near, walls_near, segments_cross

TARGET_CIRCLE = 0
TARGET_RECT = 1


@inline_kernel
def inside_target(kind, shape, x, y):
    if kind == TARGET_CIRCLE:
        dx, dy = x - shape[0], y - shape[1]
        return dx * dx + dy * dy <= shape[2] * shape[2]
    return shape[0] <= x <= shape[2] and shape[1] <= y <= shape[3]


@parallel_kernel
def navigate_phase(pos, pref_speed, target, dirs, ox, oy, h, nx, ny, pref_vel, nav_dir):
    """Preferred velocity = preferred speed along the target's direction field."""
    n = pos.shape[0]
    for i in prange(n):
        t = target[i]
        dx, dy = 0.0, 0.0
        if 0 <= t < dirs.shape[0]:
            dx, dy = sample_dir(dirs, t, ox, oy, h, nx, ny, pos[i, 0], pos[i, 1])
        nav_dir[i, 0] = dx
        nav_dir[i, 1] = dy
        pref_vel[i, 0] = pref_speed[i] * dx
        pref_vel[i, 1] = pref_speed[i] * dy


@parallel_kernel
def route_distance_phase(pos, target, dists, ox, oy, h, nx, ny, out):
    """Remaining route distance of each agent to its own target (inf without one)."""
    n = pos.shape[0]
    for i in prange(n):
        out[i] = sample_dist(dists, target[i], ox, oy, h, nx, ny, pos[i, 0], pos[i, 1])


@parallel_kernel
def group_pull_phase(pos, group, group_centre, pref_vel, pref_speed, v_group):
    """Velocity that keeps a group member near its group's centre while it walks the route.

    Agents without a group get NaN, which the choice reads as "no group term"."""
    n = pos.shape[0]
    for i in prange(n):
        g = group[i]
        if g < 0 or g >= group_centre.shape[0]:
            v_group[i, 0] = np.nan
            v_group[i, 1] = np.nan
            continue
        # catch up with the centre within one second, on top of the route velocity
        vx = pref_vel[i, 0] + (group_centre[g, 0] - pos[i, 0])
        vy = pref_vel[i, 1] + (group_centre[g, 1] - pos[i, 1])
        s = math.sqrt(vx * vx + vy * vy)
        cap = 1.3 * pref_speed[i]
        if s > cap:
            vx *= cap / s
            vy *= cap / s
        v_group[i, 0] = vx
        v_group[i, 1] = vy


_BLOCK = 64  # agents per parallel work item (scratch buffers are allocated once per block)


@parallel_kernel
def move_phase(pos, new_vel, radius, target, target_kind, target_shape, dt,
               walls, wall_start, wall_items, wox, woy, wc, wnx, wny,
               out_pos, out_vel, arrived, blocked_moves):
    """Integrate positions; a move that would cross a wall is cancelled (the agent waits).

    With ORCA in strict mode no move crosses a wall (the wall half-planes forbid it); the guard
    makes the no-crossing rule hold for every model and setting. The candidate buffer is allocated
    once per block and walls_near runs only near a wall: a per-agent allocation and the call's
    array reference counting were half of this phase."""
    n = pos.shape[0]
    nblocks = (n + _BLOCK - 1) // _BLOCK
    for b in prange(nblocks):
        cand = np.empty(64, np.int32)
        for i in range(b * _BLOCK, min((b + 1) * _BLOCK, n)):
            x0, y0 = pos[i, 0], pos[i, 1]
            vx, vy = new_vel[i, 0], new_vel[i, 1]
            x1, y1 = x0 + vx * dt, y0 + vy * dt
            reach = math.sqrt(vx * vx + vy * vy) * dt + 1e-9
            crossed = False
            # no listed segment in reach means walls_near would return none
            if any_wall_near(x0, y0, reach, wall_start, wox, woy, wc, wnx, wny):
                count = walls_near(x0, y0, reach, walls, wall_start, wall_items, wox, woy, wc, wnx, wny, cand)
                for c in range(count):
                    s = cand[c]
                    if segments_cross(x0, y0, x1, y1, walls[s, 0], walls[s, 1], walls[s, 2], walls[s, 3]):
                        crossed = True
                        break
            if crossed:
                x1, y1, vx, vy = x0, y0, 0.0, 0.0
            blocked_moves[i] = crossed
            out_pos[i, 0] = x1
            out_pos[i, 1] = y1
            out_vel[i, 0] = vx
            out_vel[i, 1] = vy
            t = target[i]
            arrived[i] = 0 <= t < target_kind.shape[0] and inside_target(target_kind[t], target_shape[t], x1, y1)


@parallel_kernel
def separation_phase(pos, radius, ids, nbr, nbr_count, overlap_tol, min_gap, overlaps):
    """Per agent: smallest surface gap to a neighbour and pairs (counted once) overlapping by
    more than overlap_tol x the radius sum."""
    n = pos.shape[0]
    for i in prange(n):
        g = np.inf
        c = 0
        for s in range(nbr_count[i]):
            j = nbr[i, s]
            dx = pos[j, 0] - pos[i, 0]
            dy = pos[j, 1] - pos[i, 1]
            d = math.sqrt(dx * dx + dy * dy)
            rs = radius[i] + radius[j]
            g = min(g, d - rs)
            if ids[j] > ids[i] and d < rs * (1.0 - overlap_tol):
                c += 1
        min_gap[i] = g
        overlaps[i] = c


@kernel
def frame_tally(min_gap, overlaps, blocked, rec, guarded, arrived):
    """The step's counters in one pass (separate numpy reductions cost more than the pass):
    (smallest min_gap, inf when empty and NaN if any is NaN, as numpy's min; overlap pairs; blocked
    moves; fallbacks rec < 0; guarded; arrived)."""
    g = np.inf
    o = 0
    b = 0
    f = 0
    gu = 0
    a = 0
    for i in range(min_gap.shape[0]):
        x = min_gap[i]
        if x < g or x != x:
            g = x
        o += overlaps[i]
        b += blocked[i]
        f += rec[i] < 0
        gu += guarded[i]
        a += arrived[i]
    return g, o, b, f, gu, a


@kernel
def _unit_hash(seed, a, b):
    """A number in [0, 1) from (seed, a, b): splitmix64 finaliser over their mix (counter-based)."""
    z = np.uint64(seed) ^ (np.uint64(a) * np.uint64(0x9E3779B97F4A7C15)) ^ (np.uint64(b) * np.uint64(0xC2B2AE3D27D4EB4F))
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    z = z ^ (z >> np.uint64(31))
    return float(z >> np.uint64(11)) * (1.0 / 9007199254740992.0)


@kernel
def flow_grid(pos, vel, ox, oy, cell, nx, ny, flow):
    """Sum of velocities and count per coarse cell (flow[cy, cx] = (sum vx, sum vy, count)).

    Serial over rows (kept in id order), so the sums are the same on any thread count."""
    flow[:] = 0.0
    for i in range(pos.shape[0]):
        cx = int(np.floor((pos[i, 0] - ox) / cell))
        cy = int(np.floor((pos[i, 1] - oy) / cell))
        if 0 <= cx < nx and 0 <= cy < ny:
            flow[cy, cx, 0] += vel[i, 0]
            flow[cy, cx, 1] += vel[i, 1]
            flow[cy, cx, 2] += 1.0


@parallel_kernel
def conventions_phase(pos, vel, radius, ids, target, nav_dir, nbr, nbr_count, headway_time, cos_cone, keep_right,
                      flow, fox, foy, fcell, look_ahead, jostle, seed, frame, pref_vel, overtake=0.0):
    """Walking conventions that shape the preferred velocity (own row only):

    - time headway: an agent plans no faster than gap / headway_time, where gap is the surface gap to
      the nearest neighbour ahead (in the cone around its route) that walks the same way (within 60
      degrees). This is what makes speed fall with density. Standing people and people crossing the
      path are left to avoidance: counting them let crossing streams wait for each other for ever.
    - keep right: with someone walking towards it ahead (a neighbour bound for another target, or an
      opposing mean flow in the flow grid up to look_ahead metres along its route), an agent turns its
      preferred direction by keep_right radians clockwise, so opposing streams pass left side to left
      side and form lanes before they meet instead of locking head-on.
    - overtake: when the headway would slow an agent behind a leader walking slower than 0.85 of the
      agent's own preferred speed, and nobody is on its left from 0.5 m behind to 1 m past the leader
      (within the two radii plus 0.3 m), it keeps its speed and turns overtake radians anticlockwise to
      pass on the left. Without it a slow walker held everyone behind it, and a thin crowd (0.5 /m^2)
      walked at 0.91 m/s, below Weidmann's band; with it 1.14.
    - jostle: an agent that is pressed against a neighbour and barely moving turns its preferred
      direction by a pseudo-random angle up to +-jostle radians, redrawn every half second. People
      in a jam shuffle; without it, an arch of agents at a narrow door would hold for ever. The
      angle comes from a counter-based hash of (seed, agent id, frame // 5), so it is the same on
      every thread count and after a snapshot.
    Each is off when its parameter is 0."""
    n = pos.shape[0]
    ck, sk = np.cos(keep_right), np.sin(keep_right)
    co, so = np.cos(overtake), np.sin(overtake)
    for i in prange(n):
        ex, ey = nav_dir[i, 0], nav_dir[i, 1]
        if ex * ex + ey * ey == 0.0:
            continue
        limit = np.inf
        lead_along = 0.0
        lead_ahead = 0.0
        oncoming = False
        for s in range(nbr_count[i]):
            j = nbr[i, s]
            dx, dy = pos[j, 0] - pos[i, 0], pos[j, 1] - pos[i, 1]
            d = math.sqrt(dx * dx + dy * dy)  # not hypot: ~7x slower, and no overflow to guard against
            ahead = dx * ex + dy * ey
            # Every test below runs for every neighbour, combined with & and selects rather than `continue`:
            # the outcomes are random per neighbour (half are behind), and mispredicted branches cost more
            # than the arithmetic (9% of this phase). Each value is computed by the same expression.
            front = not ((d == 0.0) | (ahead <= 0.0))
            along = vel[j, 0] * ex + vel[j, 1] * ey
            back = along < 0.0
            # anyone ahead walking towards us, not just in the headway cone, unless bound for our own
            # target: people converging on one door do not meet head-on, and turning right there
            # steered them off the opening (bottleneck flow fell, 0.8 m doors jammed)
            oncoming |= front & back & (target[j] != target[i])
            vj2 = vel[j, 0] * vel[j, 0] + vel[j, 1] * vel[j, 1]
            # a leader: ahead in the cone, walking our way; not standing, nor crossing our path (avoidance
            # handles those)
            lead = front & (not back) & (not (ahead < cos_cone * d)) \
                & (not ((vj2 <= 0.01) | (along * along < 0.25 * vj2)))
            lj = max(0.0, d - radius[i] - radius[j]) / headway_time
            better = lead & (headway_time > 0.0) & (lj < limit)
            limit = lj if better else limit
            lead_along = along if better else lead_along
            lead_ahead = ahead if better else lead_ahead
        stuck = False
        if jostle != 0.0 and vel[i, 0] * vel[i, 0] + vel[i, 1] * vel[i, 1] < 0.04 * (
                pref_vel[i, 0] * pref_vel[i, 0] + pref_vel[i, 1] * pref_vel[i, 1]):
            for s in range(nbr_count[i]):
                j = nbr[i, s]
                dx = pos[j, 0] - pos[i, 0]
                dy = pos[j, 1] - pos[i, 1]
                if math.sqrt(dx * dx + dy * dy) - radius[i] - radius[j] < 0.05:
                    stuck = True
                    break
        if not oncoming and keep_right != 0.0:
            # A cell ahead (every half cell up to look_ahead) whose mean velocity opposes ours by more than
            # 0.3 m/s. Written inline: a call with an array argument costs an atomic reference count per
            # agent, and both threads hitting one counter serialised this whole phase.
            fny, fnx = flow.shape[0], flow.shape[1]
            for kk in range(1, int(look_ahead / (0.5 * fcell)) + 1):
                fx = int(np.floor((pos[i, 0] + ex * 0.5 * fcell * kk - fox) / fcell))
                fy = int(np.floor((pos[i, 1] + ey * 0.5 * fcell * kk - foy) / fcell))
                if 0 <= fx < fnx and 0 <= fy < fny and flow[fy, fx, 2] > 0.0:
                    if (flow[fy, fx, 0] * ex + flow[fy, fx, 1] * ey) < -0.3 * flow[fy, fx, 2]:
                        oncoming = True
                        break
        px, py = pref_vel[i, 0], pref_vel[i, 1]
        sp = math.sqrt(px * px + py * py)
        passing = False
        if overtake != 0.0 and sp > limit and lead_along < 0.85 * sp:  # sp > limit: some leader set the cap
            passing = True
            for s in range(nbr_count[i]):
                j = nbr[i, s]
                dx, dy = pos[j, 0] - pos[i, 0], pos[j, 1] - pos[i, 1]
                a_j = dx * ex + dy * ey
                l_j = ex * dy - ey * dx
                # combined with & and no early exit: cheaper than the mispredicted chain of tests
                passing &= not ((-0.5 < a_j) & (a_j < lead_ahead + 1.0) & (0.0 < l_j)
                                & (l_j < radius[i] + radius[j] + 0.3))
        if passing:
            px, py = co * px - so * py, so * px + co * py
        elif sp > limit:
            f = limit / sp
            px *= f
            py *= f
        if oncoming and keep_right != 0.0:
            px, py = ck * px + sk * py, -sk * px + ck * py
        if stuck:
            u = _unit_hash(seed, ids[i], frame // 5)
            ang = (2.0 * u - 1.0) * jostle
            ca, sa = np.cos(ang), np.sin(ang)
            px, py = ca * px - sa * py, sa * px + ca * py
        pref_vel[i, 0] = px
        pref_vel[i, 1] = py
