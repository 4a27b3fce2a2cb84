"""Test kit for teams that embed a crowd: hypothesis strategies that generate valid scenes, and
invariant checkers that step a world and report the first violation (frame, agents, values).

    from hypothesis import given, settings
    from crowdcore.testing import scenes, assert_invariants

    @settings(max_examples=50, deadline=None)
    @given(scenes(max_agents=12))
    def test_my_crowd(spec):
        assert_invariants(spec.build(), frames=40)

Checks: no overlap beyond a tolerance (meaningful for ORCA and for strict mode), no wall crossing,
speeds within each agent's maximum, all state finite; plus determinism checks (agent order,
thread count, snapshot round trip). Needs `hypothesis` only for the strategies.
"""
from dataclasses import dataclass, field
import math

import numpy as np

from .errors import CrowdError
from .invariants import pair_overlaps, wall_crossings
from .params import WEIGHT_NAMES

__all__ = ["SceneSpec", "Violation", "InvariantError", "scenes", "weights", "first_violation", "assert_invariants",
           "check_order_independence", "check_thread_independence", "check_snapshot_round_trip"]


# ------------------------------------------------------------------ scene description

@dataclass
class SceneSpec:
    """A scene as plain data; build() makes a fresh, identical World every time."""

    walls: list                      # [(points float64[k,2], closed bool)]
    obstacles: list                  # [float64[k,2]] solid polygons
    targets: list                    # [(name, "circle"|"rect", shape tuple)]
    positions: np.ndarray            # float64[n,2]
    target_of: np.ndarray            # int32[n], index into targets
    pref_speed: np.ndarray           # float64[n], m/s
    radius: np.ndarray               # float64[n], m
    avoidance: str = "orca"
    weights: dict = field(default_factory=dict)
    dt: float = 0.1
    strict: bool = True
    seed: int = 0

    @property
    def n(self):
        return len(self.positions)

    def build(self, order=None):
        """A new World; `order` (a permutation) adds the agents in that order, with the same ids."""
        from .world import World
        w = World(seed=self.seed)
        w.set_params(avoidance=self.avoidance, weights=dict(self.weights), dt=float(self.dt), strict=self.strict)
        for pts, closed in self.walls:
            w.add_wall(pts, closed)
        for poly in self.obstacles:
            w.add_obstacle(poly)
        for name, kind, shape in self.targets:
            w.add_target(name, kind, shape)
        w.add_agents(self.positions, target=self.target_of, pref_speed=self.pref_speed, radius=self.radius)
        if order is not None:
            order = np.asarray(order)
            w.agents = {k: v[order].copy() for k, v in w.agents.items()}
        return w

    def __repr__(self):  # hypothesis prints this for a counterexample: make it paste-able
        def arr(a):
            return np.array2string(np.asarray(a), separator=", ", precision=17, threshold=10**6).replace("\n", "")
        walls = ", ".join(f"(np.array({arr(p)}), {c})" for p, c in self.walls)
        obst = ", ".join(f"np.array({arr(p)})" for p in self.obstacles)
        return (f"SceneSpec(walls=[{walls}], obstacles=[{obst}], targets={self.targets!r}, "
                f"positions=np.array({arr(self.positions)}), target_of=np.array({arr(self.target_of)}, np.int32), "
                f"pref_speed=np.array({arr(self.pref_speed)}), radius=np.array({arr(self.radius)}), "
                f"avoidance={self.avoidance!r}, weights={self.weights!r}, dt={self.dt!r}, strict={self.strict!r}, "
                f"seed={self.seed!r})")


# ------------------------------------------------------------------ strategies

def weights(max_weight=5.0):
    """Strategy: a full energy-weight table (each weight in [0, max_weight])."""
    from hypothesis import strategies as st
    w = st.floats(0.0, max_weight, allow_nan=False, allow_infinity=False)
    return st.fixed_dictionaries({k: w for k in WEIGHT_NAMES})


def _polygon(draw, st, cx, cy, size):
    """A convex polygon (rectangle or triangle) of about `size` around (cx, cy)."""
    if draw(st.booleans()):
        w, h = draw(st.floats(0.3, size)), draw(st.floats(0.3, size))
        return np.array([[cx - w / 2, cy - h / 2], [cx + w / 2, cy - h / 2], [cx + w / 2, cy + h / 2],
                         [cx - w / 2, cy + h / 2]])
    a0 = draw(st.floats(0.0, 2 * math.pi))
    rad = draw(st.floats(0.3, size / 1.5))
    ang = a0 + np.array([0.0, 2.1, 4.2])
    return np.column_stack([cx + rad * np.cos(ang), cy + rad * np.sin(ang)])


def scenes(min_agents=3, max_agents=20, room=(6.0, 16.0), max_obstacles=2, avoidance=("orca",),
           dt=(0.05, 0.2), radius=(0.2, 0.3), speed=(0.5, 1.8), max_targets=2, vary_weights=True, strict=(True,)):
    """Strategy for SceneSpec: a closed rectangular room (side lengths in `room`, metres) with up to
    `max_obstacles` solid convex polygons, 1..max_targets targets in free space, and
    min_agents..max_agents agents placed without overlap and clear of walls and obstacles.

    avoidance / strict: the values to draw from; dt: (lo, hi) seconds; radius, speed: (lo, hi).
    The room may hold fewer agents than asked when it is crowded (never fewer than min_agents;
    such draws are rejected)."""
    from hypothesis import assume, strategies as st
    from .placement import place_in_rect

    if not 1 <= min_agents <= max_agents:
        raise ValueError(f"scenes: need 1 <= min_agents <= max_agents, got {min_agents}, {max_agents}")

    @st.composite
    def build(draw):
        wx = draw(st.floats(*room))
        wy = draw(st.floats(*room))
        walls = [(np.array([[0.0, 0.0], [wx, 0.0], [wx, wy], [0.0, wy]]), True)]
        obstacles = []
        for _ in range(draw(st.integers(0, max_obstacles))):
            cx, cy = draw(st.floats(1.5, wx - 1.5)), draw(st.floats(1.5, wy - 1.5))
            obstacles.append(_polygon(draw, st, cx, cy, min(2.0, wx / 4, wy / 4)))
        seed = draw(st.integers(0, 2**31 - 1))
        rng = np.random.default_rng(seed)
        rmax = radius[1]
        segs = np.vstack([np.hstack([p, np.roll(p, -1, 0)]) for p in [walls[0][0]] + obstacles])
        n_targets = draw(st.integers(1, max_targets))
        targets = []
        for t in range(n_targets):
            spot = place_in_rect(rng, (0.0, 0.0, wx, wy), 1, 0.5, 0.0, segs, obstacles)
            assume(len(spot) == 1)
            targets.append((f"t{t}", "circle", (float(spot[0, 0]), float(spot[0, 1]), 0.5)))
        want = draw(st.integers(min_agents, max_agents))
        pos = place_in_rect(rng, (0.0, 0.0, wx, wy), want, rmax, 0.02, segs, obstacles)
        # agents must not start inside a target (they would vanish before moving)
        inside = np.zeros(len(pos), bool)
        for _, _, (cx, cy, r) in targets:
            inside |= np.hypot(pos[:, 0] - cx, pos[:, 1] - cy) <= r + rmax
        pos = pos[~inside]
        assume(len(pos) >= min_agents)
        n = len(pos)
        return SceneSpec(
            walls=walls, obstacles=obstacles, targets=targets, positions=np.ascontiguousarray(pos),
            target_of=rng.integers(0, n_targets, n).astype(np.int32),
            pref_speed=rng.uniform(speed[0], speed[1], n), radius=rng.uniform(radius[0], rmax, n),
            avoidance=draw(st.sampled_from(list(avoidance))),
            weights=draw(weights()) if vary_weights else {},
            dt=draw(st.floats(dt[0], dt[1])), strict=draw(st.sampled_from(list(strict))), seed=seed)

    return build()


# ------------------------------------------------------------------ invariant checks

@dataclass
class Violation:
    """The first broken invariant: which check, at which frame (after that step), which agents, what values."""

    check: str
    frame: int
    agents: tuple
    values: dict

    def __str__(self):
        vals = ", ".join(f"{k}={v}" for k, v in self.values.items())
        return f"{self.check} at frame {self.frame}, agents {list(self.agents)}: {vals}"


class InvariantError(AssertionError):
    """Raised by the assert_* / check_* helpers; .violation holds the details."""

    def __init__(self, violation):
        super().__init__(str(violation))
        self.violation = violation


def _max_speed(world):
    return world.agents["pref_speed"] * world.params.max_speed_factor


def first_violation(world, frames, dt=None, overlap_tolerance=0.01, overlaps=True, walls=True, speeds=True,
                    finite=True, stop_when_empty=True, on_frame=None):
    """Step `world` up to `frames` times; return the first Violation or None.

    overlaps: no pair closer than (1 - overlap_tolerance) x radius sum (use for ORCA or strict mode);
    walls: no move crosses a wall segment; speeds: |v| <= pref_speed x max_speed_factor (+1e-9);
    finite: positions and velocities finite. on_frame(world, stats) is called after each step."""
    for _ in range(int(frames)):
        prev_ids, prev_pos = world.ids.copy(), world.positions.copy()
        stats = world.step(dt)
        f = world.frame
        pos, vel, ids = world.positions, world.velocities, world.ids
        if finite:
            bad = ~(np.isfinite(pos).all(axis=1) & np.isfinite(vel).all(axis=1))
            if bad.any():
                k = int(np.argmax(bad))
                return Violation("non-finite state", f, (int(ids[k]),),
                                 {"position": pos[k].tolist(), "velocity": vel[k].tolist()})
        if speeds and len(ids):
            s = np.hypot(vel[:, 0], vel[:, 1])
            cap = _max_speed(world)
            over = s > cap + 1e-9
            if over.any():
                k = int(np.argmax(s - cap))
                return Violation("speed above maximum", f, (int(ids[k]),),
                                 {"speed": float(s[k]), "max_speed": float(cap[k])})
        if walls and len(ids):
            who, seg = wall_crossings(world, prev_ids, prev_pos)
            if len(who):
                row_prev = int(np.flatnonzero(prev_ids == who[0])[0])
                row = int(np.flatnonzero(ids == who[0])[0])
                return Violation("wall crossing", f, (int(who[0]),),
                                 {"segment": world._cache.segments[int(seg[0])].tolist(),
                                  "from": prev_pos[row_prev].tolist(), "to": pos[row].tolist()})
        if overlaps and len(ids) > 1:
            ov = pair_overlaps(pos, world.agents["radius"], ids, overlap_tolerance)
            if len(ov):
                k = int(np.argmax(ov[:, 2]))
                return Violation("overlap", f, (int(ov[k, 0]), int(ov[k, 1])),
                                 {"overlap_fraction_of_radius_sum": float(ov[k, 2]), "tolerance": overlap_tolerance})
        if on_frame is not None:
            on_frame(world, stats)
        if stop_when_empty and world.agent_count == 0:
            break
    return None


def assert_invariants(world, frames, dt=None, **checks):
    """first_violation(...) that raises InvariantError instead of returning the violation."""
    v = first_violation(world, frames, dt, **checks)
    if v is not None:
        raise InvariantError(v)


def _by_id(world):
    order = np.argsort(world.agents["ids"], kind="stable")
    return {k: v[order] for k, v in world.agents.items()}


def _compare(a, b, frame, check):
    """None if two worlds hold bit-identical agents (matched by id), else a Violation."""
    sa, sb = _by_id(a), _by_id(b)
    if not np.array_equal(sa["ids"], sb["ids"]):
        diff = np.setxor1d(sa["ids"], sb["ids"])
        return Violation(check, frame, tuple(int(i) for i in diff[:4]), {"reason": "different agents present"})
    for key in ("pos", "vel", "prev_vel"):
        neq = ~(sa[key] == sb[key]).all(axis=1)
        if neq.any():
            k = int(np.argmax(neq))
            return Violation(check, frame, (int(sa["ids"][k]),),
                             {"field": key, "first": sa[key][k].tolist(), "second": sb[key][k].tolist()})
    return None


def _lockstep(a, b, frames, dt, check):
    for _ in range(int(frames)):
        a.step(dt)
        b.step(dt)
        v = _compare(a, b, a.frame, check)
        if v is not None:
            return v
        if a.agent_count == 0:
            break
    return None


def check_order_independence(spec, frames, dt=None, seed=0):
    """Build the scene twice, the second time with the agents' rows shuffled (same ids), step both
    and require bit-identical agents after every frame. Raises InvariantError on the first difference."""
    perm = np.random.default_rng(seed).permutation(spec.n)
    v = _lockstep(spec.build(), spec.build(order=perm), frames, dt, "agent order changes the result")
    if v is not None:
        raise InvariantError(v)


def check_thread_independence(spec, frames, dt=None, threads=None):
    """Step the scene with 1 thread and with `threads` (default: all) in lockstep; require identical agents."""
    import numba
    threads = numba.config.NUMBA_NUM_THREADS if threads is None else int(threads)
    a, b = spec.build(), spec.build()
    old = numba.get_num_threads()
    violation = None
    try:
        for _ in range(int(frames)):
            numba.set_num_threads(1)
            a.step(dt)
            numba.set_num_threads(threads)
            b.step(dt)
            violation = _compare(a, b, a.frame, f"thread count (1 vs {threads}) changes the result")
            if violation is not None or a.agent_count == 0:
                break
    finally:
        numba.set_num_threads(old)
    if violation is not None:
        raise InvariantError(violation)


def check_snapshot_round_trip(world, frames_before, frames_after, dt=None):
    """Step `frames_before`, snapshot, load the copy, then step both `frames_after` frames in lockstep;
    require equal state hashes every frame. Raises InvariantError naming the first diverging frame."""
    from .world import World
    for _ in range(int(frames_before)):
        world.step(dt)
    try:
        copy = World.from_snapshot(world.snapshot())
    except CrowdError as e:
        raise InvariantError(Violation("snapshot round trip", world.frame, (), {"error": str(e)})) from None
    if copy.state_hash() != world.state_hash():
        raise InvariantError(Violation("snapshot round trip", world.frame, (), {"reason": "loaded state differs"}))
    for _ in range(int(frames_after)):
        world.step(dt)
        copy.step(dt)
        if copy.state_hash() != world.state_hash():
            v = _compare(world, copy, world.frame, "snapshot round trip") or \
                Violation("snapshot round trip", world.frame, (), {"reason": "state hash differs"})
            raise InvariantError(v)
