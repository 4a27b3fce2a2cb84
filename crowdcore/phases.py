"""Step phases owned by the world: navigate, move and account.

Each kernel reads last frame's arrays and writes only its own agent's row of fresh buffers.
"""
import numpy as np
from numba import prange

from ._jit import kernel, parallel_kernel
from .navfield import sample_dir
from .spatial import walls_near, segments_cross

TARGET_CIRCLE = 0
TARGET_RECT = 1


@kernel
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
        s = np.hypot(vx, vy)
        cap = 1.3 * pref_speed[i]
        if s > cap:
            vx *= cap / s
            vy *= cap / s
        v_group[i, 0] = vx
        v_group[i, 1] = vy


@parallel_kernel
def move_phase(pos, new_vel, radius, target, target_kind, target_shape, dt,
               walls, wall_start, wall_items, wox, woy, wc, wnx, wny,
               out_pos, out_vel, arrived, blocked_moves):
    """Integrate positions; a move that would cross a wall is cancelled (the agent waits).

    With ORCA in strict mode no move crosses a wall (the wall half-planes forbid it); the guard
    makes the no-crossing rule hold for every model and setting."""
    n = pos.shape[0]
    for i in prange(n):
        x0, y0 = pos[i, 0], pos[i, 1]
        vx, vy = new_vel[i, 0], new_vel[i, 1]
        x1, y1 = x0 + vx * dt, y0 + vy * dt
        cand = np.empty(64, np.int32)
        reach = np.hypot(vx, vy) * dt + 1e-9
        count = walls_near(x0, y0, reach, walls, wall_start, wall_items, wox, woy, wc, wnx, wny, cand)
        crossed = False
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
            d = np.hypot(pos[j, 0] - pos[i, 0], pos[j, 1] - pos[i, 1])
            rs = radius[i] + radius[j]
            g = min(g, d - rs)
            if ids[j] > ids[i] and d < rs * (1.0 - overlap_tol):
                c += 1
        min_gap[i] = g
        overlaps[i] = c


@parallel_kernel
def headway_phase(pos, vel, radius, nav_dir, nbr, nbr_count, headway_time, cos_cone, pref_vel):
    """Speed-headway rule: an agent plans to walk no faster than gap / headway_time, where gap is the
    surface gap to the nearest neighbour ahead (within the cone around its route direction) that is
    not walking towards it. People keep a time headway to the person in front; this is what makes
    speed fall with density. Oncoming neighbours are left to avoidance, so counterflow cannot lock
    on this rule. Scales pref_vel (own row only)."""
    n = pos.shape[0]
    for i in prange(n):
        ex, ey = nav_dir[i, 0], nav_dir[i, 1]
        if ex * ex + ey * ey == 0.0:
            continue
        limit = np.inf
        for s in range(nbr_count[i]):
            j = nbr[i, s]
            dx, dy = pos[j, 0] - pos[i, 0], pos[j, 1] - pos[i, 1]
            d = np.hypot(dx, dy)
            if d == 0.0 or dx * ex + dy * ey < cos_cone * d:
                continue
            if vel[j, 0] * ex + vel[j, 1] * ey < 0.0:
                continue
            limit = min(limit, max(0.0, d - radius[i] - radius[j]) / headway_time)
        sp = np.hypot(pref_vel[i, 0], pref_vel[i, 1])
        if sp > limit:
            f = limit / sp
            pref_vel[i, 0] *= f
            pref_vel[i, 1] *= f
