"""Social Force Model (Helbing, Farkas & Vicsek 2000, "Simulating dynamical features of escape
panic", Nature 407) as an avoidance phase.

    m dv/dt = m (v0 e - v)/tau + sum_j f_ij + sum_W f_iW
    f_ij = (A exp((r_ij - d_ij)/B) + k g(r_ij - d_ij)) n_ij + kappa g(r_ij - d_ij) dv_t t_ij
    f_iW = (A exp((r_i - d_iW)/B) + k g(r_i - d_iW)) n_iW - kappa g(r_i - d_iW) (v_i . t_iW) t_iW
    g(x) = x if x > 0 else 0, n = unit vector pointing to agent i, t = n turned by +90 degrees,
    dv_t = (v_j - v_i) . t_ij;  v0 e is the preferred velocity pref_vel.

Stiffness and time step: with k = 1.2e5 kg/s^2 and m = 80 kg a contact oscillates at
sqrt(k/m) ~ 39 rad/s, and the friction kappa g / m reaches ~150 1/s at 5 cm overlap; an explicit
step of dt = 0.1 s would blow up. So each call integrates the agent over dt in a fixed number of
substeps n = ceil(dt / max_substep) (default max_substep 0.01 s, well below 2/omega ~ 0.05 s even
with several contacts), holding the neighbours on straight lines p_j + v_j t (each agent writes
only its own row, so nothing else can move during the phase). Within a substep the position
forces and the relaxation term are explicit, the friction (linear in the agent's own velocity) is
implicit: a 2x2 solve, stable for any overlap. The speed is clamped to max_speed after each
substep. v_safe is the mean velocity over the substeps (displacement / dt), so the move phase's
pos += v_safe * dt lands exactly where the substeps went. line_count = 0 (no half-planes).
"""
from dataclasses import dataclass
import math

import numpy as np
from numba import prange

from ._jit import kernel, parallel_kernel
from .spatial import walls_near

_BLOCK = 64  # agents per parallel work item (scratch buffers are shared within a block)


@dataclass(frozen=True)
class SocialForceParams:
    """Social Force Model constants; units in the comments."""

    relax_time: float = 0.5     # s, tau [V] Helbing, Farkas & Vicsek 2000
    mass: float = 80.0          # kg, m [V] Helbing, Farkas & Vicsek 2000
    strength: float = 2000.0    # N, A [M] Helbing, Farkas & Vicsek 2000
    range_: float = 0.08        # m, B [M] Helbing, Farkas & Vicsek 2000
    body_k: float = 1.2e5       # kg/s^2, k [M] Helbing, Farkas & Vicsek 2000
    friction: float = 2.4e5     # kg/(m s), kappa [M] Helbing, Farkas & Vicsek 2000
    wall_reach: float = 1.0     # m beyond contact; A exp(-1/B) ~ 0.007 N is negligible (ours)
    max_substep: float = 0.01   # s, see the module note (ours)

    def args(self):
        """Positional arguments of social_force_phase between the wall grid and dt."""
        return (float(self.relax_time), float(self.mass), float(self.strength), float(self.range_),
                float(self.body_k), float(self.friction), float(self.wall_reach), float(self.max_substep))


def substeps(dt, max_substep):
    """Number of substeps social_force_phase uses for a step dt."""
    return max(1, int(math.ceil(dt / max_substep - 1e-9)))


@kernel
def pair_terms(pix, piy, ri, pjx, pjy, rj, A, B, k, kappa):
    """Position part of f_ij and its friction coefficient: (fx, fy, c, tx, ty).
    The full force is (fx, fy) + c ((v_j - v_i) . t) t."""
    dx, dy = pix - pjx, piy - pjy
    d = np.sqrt(dx * dx + dy * dy)
    if d > 0.0:
        nx, ny = dx / d, dy / d
    else:
        nx, ny = 1.0, 0.0   # coincident: any fixed direction; both agents get opposite pushes
    over = ri + rj - d
    g = over if over > 0.0 else 0.0
    s = A * np.exp(over / B) + k * g
    return s * nx, s * ny, kappa * g, -ny, nx


@kernel
def wall_terms(px, py, r, x0, y0, x1, y1, A, B, k, kappa):
    """Position part of f_iW and its friction coefficient: (fx, fy, c, tx, ty, d).
    The full force is (fx, fy) - c (v_i . t) t."""
    ex, ey = x1 - x0, y1 - y0
    l2 = ex * ex + ey * ey
    t = 0.0
    if l2 > 0.0:
        t = ((px - x0) * ex + (py - y0) * ey) / l2
        t = min(max(t, 0.0), 1.0)
    dx, dy = px - (x0 + t * ex), py - (y0 + t * ey)
    d = np.sqrt(dx * dx + dy * dy)
    if d > 0.0:
        nx, ny = dx / d, dy / d
    else:
        nl = np.sqrt(l2)
        nx, ny = (-ey / nl, ex / nl) if nl > 0.0 else (1.0, 0.0)
    over = r - d
    g = over if over > 0.0 else 0.0
    s = A * np.exp(over / B) + k * g
    return s * nx, s * ny, kappa * g, -ny, nx, d


@kernel
def agent_force(i, px, py, vx, vy, t, pos, vel, radius, nbr, nbr_count, walls, cand, nc,
                A, B, k, kappa, wall_reach):
    """Total interaction force on agent i at (px, py) with velocity (vx, vy), neighbours moved to
    p_j + v_j t. Returns (fx, fy, m00, m01, m11, bx, by): explicit force with friction evaluated
    at (vx, vy) is (fx + bx - (M v)_x, ...) where M = sum c t t^T and b = sum c (v_j . t) t."""
    r = radius[i]
    fx, fy = 0.0, 0.0
    m00, m01, m11 = 0.0, 0.0, 0.0
    bx, by = 0.0, 0.0
    for c in range(nc):
        s = cand[c]
        wx, wy, cf, tx, ty, d = wall_terms(px, py, r, walls[s, 0], walls[s, 1], walls[s, 2], walls[s, 3],
                                           A, B, k, kappa)
        if d - r > wall_reach:
            continue
        fx += wx
        fy += wy
        m00 += cf * tx * tx
        m01 += cf * tx * ty
        m11 += cf * ty * ty
    for s in range(nbr_count[i]):
        j = nbr[i, s]
        if j < 0 or j == i:
            continue
        ujx, ujy = vel[j, 0], vel[j, 1]
        qx, qy = pos[j, 0] + ujx * t, pos[j, 1] + ujy * t
        gx, gy, cf, tx, ty = pair_terms(px, py, r, qx, qy, radius[j], A, B, k, kappa)
        if qx == px and qy == py and j > i:
            gx, gy, tx, ty = -gx, -gy, -tx, -ty   # coincident: the pair pushes apart
        fx += gx
        fy += gy
        m00 += cf * tx * tx
        m01 += cf * tx * ty
        m11 += cf * ty * ty
        vt = cf * (ujx * tx + ujy * ty)
        bx += vt * tx
        by += vt * ty
    return fx, fy, m00, m01, m11, bx, by


@kernel
def _sfm_agent(i, pos, vel, radius, max_speed, pref_vel, nbr, nbr_count, walls, wall_cell_start,
               wall_cell_items, ox, oy, wc, wnx, wny, relax_time, mass, A, B, k, kappa, wall_reach,
               max_substep, dt, cand):
    x0, y0 = pos[i, 0], pos[i, 1]
    px, py = x0, y0
    vx, vy = vel[i, 0], vel[i, 1]
    r = radius[i]
    vmax = max_speed[i]
    nsub = max(1, int(np.ceil(dt / max_substep - 1e-9)))
    h = dt / nsub
    nc = 0
    if walls.shape[0] > 0:
        # one query covers every substep: the agent moves at most vmax * dt
        reach = r + wall_reach + vmax * dt
        nc = walls_near(x0, y0, reach, walls, wall_cell_start, wall_cell_items, ox, oy, wc, wnx, wny, cand)
    ex, ey = pref_vel[i, 0], pref_vel[i, 1]
    hm = h / mass
    for step in range(nsub):
        fx, fy, m00, m01, m11, bx, by = agent_force(i, px, py, vx, vy, step * h, pos, vel, radius, nbr,
                                                    nbr_count, walls, cand, nc, A, B, k, kappa, wall_reach)
        # (I + h/m M) v' = v + h (v0 e - v)/tau + h/m (f + b)
        rx = vx + h * (ex - vx) / relax_time + hm * (fx + bx)
        ry = vy + h * (ey - vy) / relax_time + hm * (fy + by)
        a00, a01, a11 = 1.0 + hm * m00, hm * m01, 1.0 + hm * m11
        det = a00 * a11 - a01 * a01     # >= 1: M is positive semi-definite
        vx = (a11 * rx - a01 * ry) / det
        vy = (a00 * ry - a01 * rx) / det
        s = np.sqrt(vx * vx + vy * vy)
        if s > vmax:
            vx *= vmax / s
            vy *= vmax / s
        px += h * vx
        py += h * vy
    ux, uy = (px - x0) / dt, (py - y0) / dt
    s = np.sqrt(ux * ux + uy * uy)
    if s > vmax:   # only rounding: a mean of clamped velocities is within the disc
        ux *= vmax / s
        uy *= vmax / s
    return ux, uy


@parallel_kernel
def social_force_phase(pos, vel, radius, max_speed, pref_vel, nbr, nbr_count, walls, wall_cell_start,
                       wall_cell_items, ox, oy, wc, wnx, wny, relax_time, mass, A, B, k, kappa, wall_reach,
                       max_substep, dt, line_count, v_safe):
    """Social Force velocity for every agent over one step dt (see the module note)."""
    n = pos.shape[0]
    nblocks = (n + _BLOCK - 1) // _BLOCK
    for b in prange(nblocks):
        cand = np.empty(max(walls.shape[0], 1), np.int32)
        for i in range(b * _BLOCK, min((b + 1) * _BLOCK, n)):
            ux, uy = _sfm_agent(i, pos, vel, radius, max_speed, pref_vel, nbr, nbr_count, walls,
                                wall_cell_start, wall_cell_items, ox, oy, wc, wnx, wny, relax_time, mass,
                                A, B, k, kappa, wall_reach, max_substep, dt, cand)
            line_count[i] = 0
            v_safe[i, 0] = ux
            v_safe[i, 1] = uy
