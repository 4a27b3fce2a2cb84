"""Contact guard: the last word on every chosen velocity in strict mode, so that no two agents ever
come to overlap and no agent comes closer than its radius to a wall, whatever the model chose.

Why it holds. For every pair (i, j) with surface gap g >= 0 and unit direction n from i to j, agent
i may move at most g/2 towards j in this step: n . v_i dt <= g/2. Agent j obeys the mirrored bound,
so the new centre distance is at least (p_j' - p_i') . n >= d - g/2 - g/2 = r_i + r_j: no overlap.
Pairs farther apart than both agents can close in one step, (vmax_i + vmax_all) dt, are skipped,
because they cannot touch. Walls get the half-plane n . v <= (d - r)/dt, which keeps the agent at
least r from the segment over the step (see orca.wall_line). Velocity 0 satisfies every bound, so
the projection is always feasible (except when an agent already touches a wall, where the wall
bound pushes it out). Already overlapping pairs (g < 0) get n . v <= 0: an overlap never grows.

The guarded velocity is the allowed velocity closest to the chosen one (a 2-D linear program):
when the chosen velocity is already allowed it is returned bit for bit unchanged. Each agent reads
only start-of-step positions, so neither row order nor thread count changes the result.
"""
import numpy as np
from numba import prange

from ._jit import inline_kernel, parallel_kernel
from .orca import _det, solve_lines, wall_line
from .spatial import _cell_of, _insert_sorted, any_wall_near, walls_near

CAPACITY = 48   # contact lines per agent; more neighbours than this cannot fit within reach
_BLOCK = 64     # agents per parallel work item (scratch buffers shared within a block)


@inline_kernel
def _allowed(ln, m, vmax, vx, vy):
    """True when solve_lines(ln, m, ., vmax, vx, vy) would return (vx, vy) unchanged: the same
    tests, in the same arithmetic, as the first pass of its linear program."""
    if vx * vx + vy * vy > vmax * vmax:
        return False
    for k in range(m):
        if _det(ln[k, 2], ln[k, 3], ln[k, 0] - vx, ln[k, 1] - vy) > 0.0:
            return False
    return True


@parallel_kernel
def contact_guard_phase(pos, ids, radius, max_speed, vel_in, nbr, nbr_count, sense_radius, cell_start, cell_items, ox, oy, cell, nx, ny,
                        walls, wall_start, wall_items, wox, woy, wc, wnx, wny, dt, vel_out, changed):
    """Guarded velocity of every agent (vel_out) and whether it differs from vel_in (changed).

    The per-agent body is written out in the loop (a helper taking a dozen arrays paid atomic
    reference counting per array per agent), and the linear program runs only for the few agents
    whose chosen velocity breaks a line: it would return an allowed velocity unchanged anyway."""
    n = pos.shape[0]
    vmax_all = 0.0
    rmax_all = 0.0
    for i in range(n):
        vmax_all = max(vmax_all, max_speed[i])
        rmax_all = max(rmax_all, radius[i])
    k = nbr.shape[1]
    has_walls = walls.shape[0] > 0
    nblocks = (n + _BLOCK - 1) // _BLOCK
    for b in prange(nblocks):
        ln = np.empty((CAPACITY + 16, 4))
        proj = np.empty((CAPACITY + 16, 4))
        cand = np.empty(max(walls.shape[0], 1), np.int32)
        best_d = np.empty(CAPACITY, np.float64)
        best_j = np.empty(CAPACITY, np.int32)
        lcap = ln.shape[0]
        cap = best_d.shape[0]
        for i in range(b * _BLOCK, min((b + 1) * _BLOCK, n)):
            px, py = pos[i, 0], pos[i, 1]
            ux, uy = vel_in[i, 0], vel_in[i, 1]
            r = radius[i]
            vmax = max_speed[i]
            step_reach = (vmax + vmax_all) * dt
            m = 0
            wreach = r + vmax * dt + 1e-6
            if has_walls and any_wall_near(px, py, wreach, wall_start, wox, woy, wc, wnx, wny):
                nc = walls_near(px, py, wreach, walls, wall_start, wall_items, wox, woy, wc, wnx, wny, cand)
                for c in range(nc):
                    s = cand[c]
                    qx, qy, dx, dy, d = wall_line(px, py, ux, uy, r, walls[s, 0], walls[s, 1],
                                                  walls[s, 2], walls[s, 3], dt, dt)
                    if d - r > vmax * dt or m == lcap:
                        continue
                    ln[m, 0], ln[m, 1], ln[m, 2], ln[m, 3] = qx, qy, dx, dy
                    m += 1
            n_walls = m
            # contacts: every agent whose gap could close this step, nearest first, ties by id
            count = 0
            reach_max = r + rmax_all + step_reach
            kc = nbr_count[i]
            complete = reach_max <= sense_radius and kc < k
            if kc == k and k > 0:
                jl = nbr[i, k - 1]
                dl2 = (pos[jl, 0] - px) ** 2 + (pos[jl, 1] - py) ** 2
                complete = dl2 > reach_max * reach_max
            if complete:
                # the sense list (sorted by (distance^2, id), the order used below) holds every agent
                # within reach_max: no need to search the hash again
                for s in range(kc):
                    j = nbr[i, s]
                    ddx, ddy = pos[j, 0] - px, pos[j, 1] - py
                    d2 = ddx * ddx + ddy * ddy
                    dd = np.sqrt(d2)
                    if dd - r - rmax_all >= step_reach:
                        # the list is sorted by distance and rounding is monotone, so no later
                        # neighbour passes the test below either: skip their square roots
                        break
                    if dd - r - radius[j] < step_reach and count < cap:
                        best_d[count] = d2
                        best_j[count] = j
                        count += 1
            else:
                cx, cy = _cell_of(px, py, ox, oy, cell, nx, ny)
                span = int(np.ceil(reach_max / cell))
                for gy in range(max(cy - span, 0), min(cy + span, ny - 1) + 1):
                    for gx in range(max(cx - span, 0), min(cx + span, nx - 1) + 1):
                        g = gy * nx + gx
                        for s in range(cell_start[g], cell_start[g + 1]):
                            j = cell_items[s]
                            if j == i:
                                continue
                            ddx, ddy = pos[j, 0] - px, pos[j, 1] - py
                            d2 = ddx * ddx + ddy * ddy
                            gap = np.sqrt(d2) - r - radius[j]
                            if gap < step_reach:
                                count = _insert_sorted(best_d, best_j, count, cap, d2, j, ids)
            for s in range(count):
                if m == lcap:
                    break
                j = best_j[s]
                ddx, ddy = pos[j, 0] - px, pos[j, 1] - py
                d = np.sqrt(ddx * ddx + ddy * ddy)
                if d > 0.0:
                    nxx, nyy = ddx / d, ddy / d
                else:  # coincident: the lower id steps left along x, the other right
                    nxx, nyy = (1.0, 0.0) if ids[i] < ids[j] else (-1.0, 0.0)
                gap = d - r - radius[j]
                bb = 0.5 * gap / dt if gap > 0.0 else 0.0
                ln[m, 0], ln[m, 1], ln[m, 2], ln[m, 3] = nxx * bb, nyy * bb, -nyy, nxx
                m += 1
            # the chosen velocity is the optimisation target; when it is allowed it comes back unchanged
            if _allowed(ln, m, vmax, ux, uy):
                vx, vy = ux, uy
            else:
                vx, vy = solve_lines(ln, m, n_walls, vmax, ux, uy, proj)
            changed[i] = vx != ux or vy != uy
            vel_out[i, 0] = vx
            vel_out[i, 1] = vy
