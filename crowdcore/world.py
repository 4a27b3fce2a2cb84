"""The World: agents as a structure of arrays, a scene, parameters, and the fixed-phase step.

No per-agent Python runs in a step: every phase is one kernel call over flat arrays. A step
computes into scratch buffers and commits them only at the end, so an error leaves the world
exactly as it was.
"""
import math
import time

import numpy as np

from . import phases
from .choose import RecordIndex, choose_full, choose_pruned
from .errors import ScenarioError, StepError
from .governor import plan
from .guard import contact_guard_phase
from .orca import orca_phase
from .params import Params
from .records import RecordSet, default_record_set
from .scene import Scene, SceneCache
from .social_force import social_force_phase, SocialForceParams
from .spatial import HashGrid, build_hash, knn_phase, query_radius

PHASES = ("index", "sense", "navigate", "avoid", "choose", "move", "account")

# Agent state arrays, in snapshot order: name -> (dtype, columns)
AGENT_FIELDS = {
    "ids": (np.int32, 0),
    "pos": (np.float64, 2),
    "vel": (np.float64, 2),
    "prev_vel": (np.float64, 2),
    "pref_speed": (np.float64, 0),
    "radius": (np.float64, 0),
    "target": (np.int32, 0),
    "group": (np.int32, 0),
}


def _empty_agents():
    return {k: np.zeros((0, c) if c else 0, dtype=dt) for k, (dt, c) in AGENT_FIELDS.items()}


def _finite_array(name, value, shape_tail, n=None):
    arr = np.asarray(value, dtype=np.float64)
    if n is not None and arr.ndim == len(shape_tail):
        arr = np.broadcast_to(arr, (n,) + tuple(shape_tail))
    if arr.ndim != 1 + len(shape_tail) or tuple(arr.shape[1:]) != tuple(shape_tail):
        raise StepError(f"{name}: expected shape (n{''.join(f', {s}' for s in shape_tail)}), got {arr.shape}")
    if n is not None and arr.shape[0] != n:
        raise StepError(f"{name}: expected {n} rows, got {arr.shape[0]}")
    if not arr.size:  # an empty batch (reshape cannot infer a width from zero rows)
        return np.ascontiguousarray(arr)
    bad = ~np.isfinite(arr).reshape(arr.shape[0], -1).all(axis=1)
    if bad.any():
        raise StepError(f"{name}[{int(np.argmax(bad))}]: must be finite, got {arr[int(np.argmax(bad))].tolist()}")
    return np.ascontiguousarray(arr)


_INDEX_CACHE = {}


def _record_index(records):
    """The search index of a record set, built once per content hash (it is read-only)."""
    key = records.content_hash
    index = _INDEX_CACHE.get(key)
    if index is None:
        if len(_INDEX_CACHE) >= 4:
            _INDEX_CACHE.pop(next(iter(_INDEX_CACHE)))
        index = _INDEX_CACHE[key] = RecordIndex.build(records)
    return index


class World:
    """A crowd: scene + agents + parameters + frame counter. Use one thread per world at a time."""

    def __init__(self, scene=None, params=None, records=None, seed=0):
        self.params = params if params is not None else Params()
        self.records = records if records is not None else default_record_set()
        self.scene = scene.copy() if scene is not None else Scene()
        self.seed = int(seed)
        self.rng = np.random.Generator(np.random.PCG64(self.seed))
        self.frame = 0
        self.time = 0.0
        self.next_id = 1
        self.agents = _empty_agents()
        self.arrived_total = 0
        self.last_arrived = np.zeros(0, np.int32)
        self.phase_ms = dict.fromkeys(PHASES, 0.0)
        self.stats = {}
        self._index = _record_index(self.records)
        self._extra_bounds = None
        self._journal = None        # a Recorder attaches here to log host commands
        self.name = ""
        self.default_frames = 600
        self._rebuild_scene()
        if self.params.budget_ms > 0:
            self._prepare_forests(self.params.search_width)

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_scenario(cls, source):
        """Build a world from a scenario file path or TOML text."""
        from .scenario import load_scenario
        return load_scenario(source)

    def _rebuild_scene(self, scene=None, bounds=None):
        scene = scene if scene is not None else self.scene
        if bounds is None:
            bounds = scene.bounds(self.agents["pos"] if len(self.agents["pos"]) else None)
            if self._extra_bounds is not None:
                b = self._extra_bounds
                bounds = (min(bounds[0], b[0]), min(bounds[1], b[1]), max(bounds[2], b[2]), max(bounds[3], b[3]))
        cache = SceneCache(scene, self.params, bounds)  # may raise: nothing replaced yet
        self.scene, self._cache = scene, cache
        xmin, ymin, xmax, ymax = cache.bounds
        # cells a third of the sense radius: fewer far candidates per query (measured fastest)
        self._hash = HashGrid.covering(xmin, ymin, xmax, ymax, self.params.sense_radius / 3)
        self._hash_start = np.zeros(self._hash.nx * self._hash.ny + 1, np.int32)
        self._flow_grid = HashGrid.covering(xmin, ymin, xmax, ymax, 1.5, max_cells=1 << 20)

    def set_bounds(self, xmin, ymin, xmax, ymax):
        """Extend the simulated area (navigation grid and hash) to cover these bounds."""
        b = tuple(float(v) for v in (xmin, ymin, xmax, ymax))
        if not all(math.isfinite(v) for v in b) or not (b[0] < b[2] and b[1] < b[3]):
            raise ScenarioError(f"bounds: need finite xmin < xmax and ymin < ymax, got {b}")
        old = self._extra_bounds
        self._extra_bounds = b
        try:
            self._rebuild_scene()
        except Exception:
            self._extra_bounds = old
            raise
        self._log("set_bounds", xmin=b[0], ymin=b[1], xmax=b[2], ymax=b[3])

    def set_params(self, **changes):
        """Change parameters (validated as a whole; on error nothing changes)."""
        merged = self.params.to_dict()
        weights = changes.pop("weights", None)
        merged.update(changes)
        if weights is not None:
            merged["weights"] = {**merged["weights"], **weights}
        new = Params.from_dict(merged, "params")
        rebuild = new.nav_cell != self.params.nav_cell or new.clearance != self.params.clearance \
            or new.sense_radius != self.params.sense_radius
        old, self.params = self.params, new
        if rebuild:
            try:
                self._rebuild_scene()
            except Exception:
                self.params = old
                raise
        if new.budget_ms > 0:
            self._prepare_forests(new.search_width)
        self._log("set_params", **({**changes, "weights": weights} if weights is not None else changes))

    def _prepare_forests(self, z_max):
        """Build the search forests of every width up to z_max now (a budget governor may pick any of
        them), so that no budgeted frame pays for a build."""
        for z in range(1, min(int(z_max), RecordIndex.WINDOW_Z_MAX) + 1):
            self._index.forest(z)

    def _log(self, _command, **args):
        if self._journal is not None:
            self._journal(_command, args)

    # ------------------------------------------------------------------ scene edits
    def _edit_scene(self, edit):
        scene = self.scene.copy()
        result = edit(scene)
        self._rebuild_scene(scene)
        return result

    def add_wall(self, points, closed=False):
        """Add a wall polyline (list of [x, y], metres); rebuilds navigation fields."""
        self._edit_scene(lambda s: s.add_wall(points, closed))
        self._log("add_wall", points=self.scene.walls[-1][0].tolist(), closed=bool(closed))

    def add_obstacle(self, points):
        """Add a solid polygon obstacle; rebuilds navigation fields."""
        self._edit_scene(lambda s: s.add_obstacle(points))
        self._log("add_obstacle", points=self.scene.obstacles[-1].tolist())

    def add_target(self, name, kind, shape):
        """Add a target region ("circle", (cx, cy, r)) or ("rect", (xmin, ymin, xmax, ymax)); returns its index."""
        index = self._edit_scene(lambda s: s.add_target(name, kind, shape))
        t = self.scene.targets[index]
        self._log("add_target", name=t.name, kind=t.kind, shape=list(t.shape))
        return index

    def target_index(self, name):
        return self.scene.target_index(name)

    # ------------------------------------------------------------------ agents
    def add_agents(self, positions, target=0, pref_speed=1.34, radius=0.25, velocity=None, group=-1):
        """Add agents in one batch; returns their new ids (int32). Scalars broadcast."""
        pos = _finite_array("positions", positions, (2,))
        n = pos.shape[0]
        if isinstance(target, str):
            target = self.scene.target_index(target)
        tgt = np.broadcast_to(np.asarray(target), (n,)).astype(np.int64)
        if n and (tgt.min() < -1 or tgt.max() >= len(self.scene.targets)):
            raise StepError(f"target: must be -1 (none) or a target index below {len(self.scene.targets)}, got {tgt.tolist()[:5]}")
        speed = _finite_array("pref_speed", np.broadcast_to(np.asarray(pref_speed, float), (n,)), ())
        rad = _finite_array("radius", np.broadcast_to(np.asarray(radius, float), (n,)), ())
        if n and (speed.min() < 0 or speed.max() > 5):
            raise StepError(f"pref_speed: must lie in [0, 5] m/s, got range {speed.min()}..{speed.max()}")
        if n and (rad.min() <= 0 or rad.max() > 2):
            raise StepError(f"radius: must lie in (0, 2] m, got range {rad.min()}..{rad.max()}")
        vel = np.zeros((n, 2)) if velocity is None else _finite_array("velocity", velocity, (2,), n)
        grp = np.broadcast_to(np.asarray(group), (n,)).astype(np.int64)
        if n and grp.min() < -1:
            raise StepError("group: must be -1 (none) or a group number >= 0")
        new_ids = np.arange(self.next_id, self.next_id + n, dtype=np.int64)
        if n and new_ids[-1] >= 2**31:
            raise StepError("ids: agent id space exhausted")
        new = {
            "ids": new_ids.astype(np.int32), "pos": pos, "vel": vel, "prev_vel": vel.copy(),
            "pref_speed": speed, "radius": rad, "target": tgt.astype(np.int32), "group": grp.astype(np.int32),
        }
        outside = self._outside_bounds(pos)
        self.agents = {k: np.concatenate([self.agents[k], new[k]]) for k in AGENT_FIELDS}
        self.next_id += n
        if outside:
            self._rebuild_scene()
        self._log("add_agents", positions=pos, target=new["target"], pref_speed=speed, radius=rad, velocity=vel,
                  group=new["group"])
        return new["ids"].copy()

    def _outside_bounds(self, pos):
        if not len(pos):
            return False
        xmin, ymin, xmax, ymax = self._cache.bounds
        return bool((pos[:, 0] < xmin).any() or (pos[:, 0] > xmax).any() or (pos[:, 1] < ymin).any() or (pos[:, 1] > ymax).any())

    def rows_of(self, ids):
        """Row index of each id; raises StepError naming the first unknown id."""
        ids = np.atleast_1d(np.asarray(ids, dtype=np.int64))
        have = self.agents["ids"]
        order = np.argsort(have, kind="stable")
        k = np.searchsorted(have[order], ids)
        k = np.minimum(k, max(len(have) - 1, 0))
        ok = (len(have) > 0) & (have[order][k] == ids) if len(have) else np.zeros(len(ids), bool)
        if not np.all(ok):
            raise StepError(f"ids: unknown agent id {int(ids[np.argmin(ok)])}")
        return order[k]

    def remove_agents(self, ids):
        """Remove agents by id (all or nothing)."""
        rows = self.rows_of(ids)
        keep = np.ones(len(self.agents["ids"]), bool)
        keep[rows] = False
        self.agents = {k: v[keep] for k, v in self.agents.items()}
        self._log("remove_agents", ids=np.asarray(ids, np.int64).reshape(-1))

    def set_target(self, ids, target):
        """Send agents (by id) to a target index or name."""
        if isinstance(target, str):
            target = self.scene.target_index(target)
        if not (-1 <= int(target) < len(self.scene.targets)):
            raise StepError(f"target: no target with index {target}")
        rows = self.rows_of(ids)
        self.agents["target"] = self.agents["target"].copy()
        self.agents["target"][rows] = int(target)
        self._log("set_target", ids=np.asarray(ids, np.int64).reshape(-1), target=int(target))

    # ------------------------------------------------------------------ queries
    @staticmethod
    def _view(a):
        v = a.view()
        v.flags.writeable = False
        return v

    @property
    def positions(self):
        """Read-only float64[n, 2] view, valid until the next step or edit."""
        return self._view(self.agents["pos"])

    @property
    def velocities(self):
        return self._view(self.agents["vel"])

    @property
    def ids(self):
        return self._view(self.agents["ids"])

    @property
    def agent_count(self):
        return int(len(self.agents["ids"]))

    def neighbours(self, x, y, radius):
        """Ids of agents whose centre lies within `radius` of (x, y), ascending by row."""
        if not all(math.isfinite(float(v)) for v in (x, y, radius)) or radius < 0:
            raise StepError(f"neighbours: x, y must be finite and radius >= 0, got {(x, y, radius)}")
        pos = self.agents["pos"]
        start, items = self._index_agents(pos)
        out = np.empty(len(pos), np.int32)
        count = query_radius(pos, start, items, *self._hash.args, float(x), float(y), float(radius), out)
        return self.agents["ids"][np.sort(out[:count])]

    def _index_agents(self, pos):
        items = np.empty(len(pos), np.int32)
        build_hash(pos, *self._hash.args, self._hash_start, items)
        return self._hash_start, items

    # ------------------------------------------------------------------ step
    def step(self, dt=None):
        """Advance one frame of dt seconds (default params.dt). Raises StepError and changes nothing on bad dt."""
        dt = self.params.dt if dt is None else dt
        if isinstance(dt, bool) or not isinstance(dt, (int, float, np.floating)) or not math.isfinite(dt) \
                or not 0 < dt <= self.params.max_dt:
            raise StepError(f"dt: must be a finite number in (0, {self.params.max_dt}] seconds, got {dt!r}")
        dt = float(dt)
        a = self.agents
        p = self.params
        n = len(a["ids"])
        t = time.perf_counter
        ms = {}
        f = self._before_choice(dt, ms)
        pos, vel, nbr, nbr_count, z, k = f["pos"], f["vel"], f["nbr"], f["nbr_count"], f["z"], f["k"]
        pref_vel, nav_dir, v_safe, v_group = f["pref_vel"], f["nav_dir"], f["v_safe"], f["v_group"]
        max_speed, lines, line_count, start, items = f["max_speed"], f["lines"], f["line_count"], f["start"], f["items"]
        c = self._cache
        wg = c.wall_grid
        t4 = t()

        new_vel = np.empty((n, 2))
        rec = np.empty(n, np.int32)
        chooser = choose_pruned if p.search == "pruned" else choose_full
        self._index.run(chooser, p.weight_vector(), z, p.strict, vel, pref_vel, nav_dir, v_safe,
                        v_group, max_speed, lines, line_count, new_vel, rec)
        t5 = t(); ms["choose"] = t5 - t4

        guarded = np.zeros(n, np.bool_)
        if p.strict:
            safe_vel = np.empty((n, 2))
            contact_guard_phase(pos, a["ids"], a["radius"], max_speed, new_vel, nbr, nbr_count, p.sense_radius, start, items, *self._hash.args,
                                c.segments, c.wall_start, c.wall_items, *wg.args, dt, safe_vel, guarded)
            new_vel = safe_vel
        out_pos = np.empty((n, 2))
        out_vel = np.empty((n, 2))
        arrived = np.empty(n, np.bool_)
        blocked = np.empty(n, np.bool_)
        phases.move_phase(pos, new_vel, a["radius"], a["target"], c.target_kind, c.target_shape, dt,
                          c.segments, c.wall_start, c.wall_items, *wg.args, out_pos, out_vel, arrived, blocked)
        t6 = t(); ms["move"] = t6 - t5

        min_gap = np.empty(n)
        overlaps = np.empty(n, np.int32)
        phases.separation_phase(out_pos, a["radius"], a["ids"], nbr, nbr_count, 0.01, min_gap, overlaps)
        gap_min, n_overlaps, n_blocked, n_fallbacks, n_guarded, n_arrived = phases.frame_tally(
            min_gap, overlaps, blocked, rec, guarded, arrived)
        # commit: nothing above touched the world
        n_arrived = int(n_arrived)
        self.last_arrived = a["ids"][arrived]
        new_state = dict(a, pos=out_pos, vel=out_vel, prev_vel=vel)
        if n_arrived:  # arrivals leave the world; rows stay sorted by id
            keep = ~arrived
            new_state = {k: v[keep] for k, v in new_state.items()}
        self.agents = new_state
        self.arrived_total += n_arrived
        self.frame += 1
        self.time += dt
        self.stats = {
            "min_gap": float(gap_min),
            "overlaps": int(n_overlaps),
            "blocked_moves": int(n_blocked),
            "arrived": n_arrived,
            "fallbacks": int(n_fallbacks),
            "guarded": int(n_guarded),
            "search_width": z,
            "neighbours": k,
        }
        ms["account"] = t() - t6
        self.phase_ms = {k: v * 1e3 for k, v in ms.items()}
        self._log("step", dt=dt)
        return self.stats

    def _before_choice(self, dt, ms):
        """Phases index, sense, navigate and avoid: everything the choice reads, in fresh buffers.
        Fills ms (seconds per phase); changes nothing in the world."""
        a = self.agents
        p = self.params
        n = len(a["ids"])
        t = time.perf_counter
        t0 = t()

        pos, vel = a["pos"], a["vel"]
        start, items = self._index_agents(pos)
        t1 = t(); ms["index"] = t1 - t0

        z, k = p.search_width, p.neighbours
        if p.budget_ms > 0:  # a pure function of n and stored numbers: replays make the same choice
            z, k = plan(n, p.budget_ms, p.budget_coeffs, z_max=z, k_min=min(4, k), k_max=k)
        nbr = np.empty((n, k), np.int32)
        nbr_count = np.empty(n, np.int32)
        knn_phase(pos, a["ids"], start, items, *self._hash.args, p.sense_radius, nbr, nbr_count)
        t2 = t(); ms["sense"] = t2 - t1

        nav = self._cache.nav
        pref_vel = np.empty((n, 2))
        nav_dir = np.empty((n, 2))
        phases.navigate_phase(pos, a["pref_speed"], a["target"], nav.dir, nav.ox, nav.oy, nav.h, nav.nx, nav.ny,
                              pref_vel, nav_dir)
        if p.headway_time > 0 or p.keep_right > 0 or p.jostle > 0:  # overtaking only lifts the headway cap
            fg = self._flow_grid
            flow = np.empty((fg.ny, fg.nx, 3))
            phases.flow_grid(pos, vel, *fg.args, flow)
            phases.conventions_phase(pos, vel, a["radius"], a["ids"], a["target"], nav_dir, nbr, nbr_count,
                                     p.headway_time,
                                     math.cos(math.radians(p.headway_cone)), math.radians(p.keep_right),
                                     flow, fg.ox, fg.oy, fg.cell, p.look_ahead, math.radians(p.jostle),
                                     self.seed & 0xFFFFFFFFFFFFFFFF, self.frame, pref_vel, math.radians(p.overtake))
        v_group = np.empty((n, 2))
        phases.group_pull_phase(pos, a["group"], self._group_centres(), pref_vel, a["pref_speed"], v_group)
        t3 = t(); ms["navigate"] = t3 - t2

        c = self._cache
        wg = c.wall_grid
        max_speed = a["pref_speed"] * p.max_speed_factor
        cap = k + 16
        lines = np.empty((n, cap, 4))
        line_count = np.zeros(n, np.int32)
        v_safe = np.empty((n, 2))
        if p.avoidance == "orca":
            route_dist = np.full(n, np.inf)   # the queue gap's order of who is ahead on a shared route
            if p.queue_gap > 0:
                phases.route_distance_phase(pos, a["target"], nav.dist, nav.ox, nav.oy, nav.h, nav.nx, nav.ny,
                                            route_dist)
            orca_phase(pos, vel, a["radius"], max_speed, pref_vel, nbr, nbr_count, c.segments, c.wall_start,
                       c.wall_items, *wg.args, p.orca_tau, p.orca_tau_walls, dt, nav_dir, route_dist, a["target"],
                       p.queue_gap, lines, line_count, v_safe)
        else:
            sf = SocialForceParams()
            social_force_phase(pos, vel, a["radius"], max_speed, pref_vel, nbr, nbr_count, c.segments, c.wall_start,
                               c.wall_items, *wg.args, *sf.args(), dt, line_count, v_safe)
        t4 = t(); ms["avoid"] = t4 - t3

        return {"pos": pos, "vel": vel, "nbr": nbr, "nbr_count": nbr_count, "z": z, "k": k, "pref_vel": pref_vel,
                "nav_dir": nav_dir, "v_safe": v_safe, "v_group": v_group, "max_speed": max_speed, "lines": lines,
                "line_count": line_count, "start": start, "items": items}

    def _group_centres(self):
        g = self.agents["group"]
        if not len(g) or g.max() < 0:
            return np.zeros((0, 2))
        m = g >= 0
        size = int(g.max()) + 1
        count = np.bincount(g[m], minlength=size).astype(float)
        cx = np.bincount(g[m], weights=self.agents["pos"][m, 0], minlength=size)
        cy = np.bincount(g[m], weights=self.agents["pos"][m, 1], minlength=size)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.ascontiguousarray(np.stack([cx / count, cy / count], axis=1))

    # ------------------------------------------------------------------ snapshots
    def snapshot(self, embed_records=None):
        """The complete state as msgpack bytes (see crowdcore.snapshot)."""
        from .snapshot import dumps
        return dumps(self, embed_records)

    @classmethod
    def from_snapshot(cls, data, records=None, like=None):
        """A new world from snapshot bytes; raises a SnapshotError kind on any defect.

        like: a world whose scene, parameters and records may equal the snapshot's; then the new
        world shares its read-only derived data (navigation fields, grids) instead of rebuilding them."""
        from .snapshot import loads
        return loads(data, records, like=like)

    def restore(self, data, records=None):
        """Replace this world's state with a snapshot's, after validating all of it (on error nothing
        changes). Fast when the snapshot's scene and parameters equal this world's."""
        from .snapshot import restore
        return restore(self, data, records)

    def save(self, path, embed_records=None):
        """Write a snapshot file atomically (the old file survives a failed write)."""
        from .snapshot import atomic_write
        atomic_write(path, self.snapshot(embed_records))

    @classmethod
    def load(cls, path, records=None, like=None):
        """A new world from a snapshot file (see from_snapshot)."""
        from .snapshot import read_file
        return cls.from_snapshot(read_file(path), records, like=like)

    def state_hash(self):
        """Hash of the evolving state; equal hashes mean bit-identical agents, frame and time."""
        from .snapshot import state_hash
        return state_hash(self)

    def run(self, frames, dt=None, progress=False, on_frame=None):
        """Step `frames` times; on_frame(world) is called after each step."""
        it = range(int(frames))
        if progress:
            from tqdm import tqdm
            it = tqdm(it, desc="frames", unit="frame")
        for _ in it:
            self.step(dt)
            if on_frame is not None:
                on_frame(self)
