"""Snapshots: a world's complete state as one msgpack document, and its safe loading.

Layout (all ours). The outer map is {"format": "crowdcore-snapshot", "version": 2, "byteorder": "little",
"hash": sha256 hex of body, "body": bin}; a damaged file is refused before the body is even unpacked.
The body is a map:
    static   bin: msgpack of {params, scene, bounds, extra_bounds, records_hash} - everything the derived
             data (navigation fields, wall grid, agent hash, record index) is rebuilt from, so equal
             `static` bytes mean equal derived data (restore() then reuses a live world's).
    records  the record set's own bytes (embedded) or nil (referenced by records_hash in `static`)
    agents   {name: array} for every state array; last_arrived array
    seed, rng (PCG64 state), frame, time, next_id, arrived_total, name, default_frames
Every array is {"dtype": "<f8"|"<i4"|"<i8"|"|u1", "shape": [...], "data": little-endian raw bytes}.
Derived data is not stored: it is rebuilt from `static` by the same code, which gives identical bits.

Loading never trusts sizes: msgpack limits are set from the input length, every count, shape and dtype is
checked against the byte counts and the limits below before anything is allocated or built, nothing is ever
unpickled, and every defect raises a SnapshotError kind. A live world is never touched on error.
"""
import copy
import hashlib
import math
import os

import msgpack
import numpy as np

from ._files import atomic_write  # noqa: F401  (re-exported for callers of snapshot.atomic_write)
from .errors import CrowdError, SnapshotError

FORMAT = "crowdcore-snapshot"
VERSION = 2

# Limits for untrusted input (module constants so a host with a huge world can raise them knowingly).
MAX_SNAPSHOT_BYTES = 1 << 31          # whole file
MAX_AGENTS = 1 << 26
MAX_WALLS = 1 << 20                   # polylines + polygons
MAX_POINTS = 1 << 22                  # vertices over all walls and polygons
MAX_TARGETS = 1 << 12
MAX_NAV_CELLS = 1 << 24               # navigation grid cells
MAX_FIELD_CELLS = 1 << 25             # navigation cells x targets (each costs 24 bytes of fields)
MAX_WALL_GRID_ITEMS = 1 << 26         # segment-in-cell entries of the wall grid
MAX_STRING = 1 << 16

ALLOWED_DTYPES = {"<f8": np.float64, "<i4": np.int32, "<i8": np.int64, "<u4": np.uint32, "|u1": np.uint8}


class SnapshotFormatError(SnapshotError):
    """Not a crowdcore snapshot or recording, or of another version or byte order."""


class SnapshotCorruptError(SnapshotError):
    """Damaged bytes: truncated, altered, or inconsistent."""


class SnapshotLimitError(SnapshotError):
    """Declared sizes beyond the limits above (refused before anything is allocated)."""


class SnapshotRecordsError(SnapshotError):
    """The snapshot refers to a record set that was not supplied."""


# ------------------------------------------------------------------ arrays
def pack_array(a):
    """{dtype, shape, data} with little-endian bytes."""
    a = np.ascontiguousarray(a)
    a = a.astype(a.dtype.newbyteorder("<"), copy=False)
    return {"dtype": a.dtype.str, "shape": list(a.shape), "data": a.tobytes()}


def unpack_array(obj, where, dtype=None, ndim=None, cols=None, max_items=MAX_AGENTS * 2):
    """A fresh, writeable native array from an array record, every size checked before allocation."""
    if not isinstance(obj, dict) or set(obj) != {"dtype", "shape", "data"}:
        raise SnapshotCorruptError(f"{where}: not an array record (dtype, shape, data)")
    dt = obj["dtype"]
    if dt not in ALLOWED_DTYPES:
        raise SnapshotFormatError(f"{where}: dtype {dt!r} is not allowed (little-endian {', '.join(ALLOWED_DTYPES)})")
    if dtype is not None and ALLOWED_DTYPES[dt] != dtype:
        raise SnapshotCorruptError(f"{where}: dtype {dt} where {np.dtype(dtype).newbyteorder('<').str} is expected")
    shape = obj["shape"]
    if not isinstance(shape, list) or not 1 <= len(shape) <= 4 or \
            not all(isinstance(s, int) and not isinstance(s, bool) and 0 <= s <= max_items for s in shape):
        raise SnapshotCorruptError(f"{where}: bad shape {shape!r}")
    if ndim is not None and len(shape) != ndim:
        raise SnapshotCorruptError(f"{where}: shape {shape} should have {ndim} dimension(s)")
    if cols is not None and shape[1] != cols:
        raise SnapshotCorruptError(f"{where}: shape {shape} should have {cols} columns")
    count = math.prod(shape)
    if count > max_items:
        raise SnapshotLimitError(f"{where}: {count} items exceed the limit of {max_items}")
    data = obj["data"]
    if not isinstance(data, bytes) or len(data) != count * np.dtype(dt).itemsize:
        got = len(data) if isinstance(data, bytes) else type(data).__name__
        raise SnapshotCorruptError(f"{where}: {got} bytes do not fit shape {shape} of {dt}")
    return np.frombuffer(data, dtype=dt).astype(ALLOWED_DTYPES[dt]).reshape(shape)


# ------------------------------------------------------------------ plain values
def _get(d, key, types, where, default=...):
    if not isinstance(d, dict) or key not in d:
        if default is not ...:
            return default
        raise SnapshotCorruptError(f"{where}.{key}: missing")
    v = d[key]
    if isinstance(v, bool) and bool not in (types if isinstance(types, tuple) else (types,)):
        raise SnapshotCorruptError(f"{where}.{key}: wrong type bool")
    if not isinstance(v, types):
        raise SnapshotCorruptError(f"{where}.{key}: wrong type {type(v).__name__}")
    return v


def _int(d, key, lo, hi, where):
    v = _get(d, key, int, where)
    if not lo <= v <= hi:
        raise SnapshotCorruptError(f"{where}.{key}: {v} is outside {lo}..{hi}")
    return v


def _bounds(v, where, optional=False):
    if v is None and optional:
        return None
    if not isinstance(v, list) or len(v) != 4 or not all(isinstance(x, float) and math.isfinite(x) for x in v) \
            or not (v[0] < v[2] and v[1] < v[3]):
        raise SnapshotCorruptError(f"{where}: need 4 finite floats xmin < xmax, ymin < ymax, got {v!r}")
    return tuple(v)


# ------------------------------------------------------------------ rng
def _rng_state(rng):
    s = rng.bit_generator.state
    if s["bit_generator"] != "PCG64":
        raise SnapshotError(f"snapshot: only PCG64 generators can be stored, the world has {s['bit_generator']}")
    return {"bit_generator": "PCG64", "state": format(s["state"]["state"], "x"),
            "inc": format(s["state"]["inc"], "x"), "has_uint32": int(s["has_uint32"]), "uinteger": int(s["uinteger"])}


def _restore_rng(obj, where="snapshot.rng"):
    if not isinstance(obj, dict) or obj.get("bit_generator") != "PCG64":
        raise SnapshotCorruptError(f"{where}: not a PCG64 generator state")
    try:
        st, inc = _get(obj, "state", str, where), _get(obj, "inc", str, where)
        if len(st) > 32 or len(inc) > 32:
            raise SnapshotCorruptError(f"{where}: state wider than 128 bits")
        rng = np.random.Generator(np.random.PCG64())
        rng.bit_generator.state = {"bit_generator": "PCG64", "state": {"state": int(st, 16), "inc": int(inc, 16)},
                                   "has_uint32": _int(obj, "has_uint32", 0, 1, where),
                                   "uinteger": _int(obj, "uinteger", 0, 2**32 - 1, where)}
        return rng
    except SnapshotError:
        raise
    except Exception as e:
        raise SnapshotCorruptError(f"{where}: bad generator state ({e})") from None


# ------------------------------------------------------------------ scene
def _pack_polys(polys):
    pts = np.concatenate(polys) if polys else np.zeros((0, 2))
    return pack_array(pts), pack_array(np.array([len(p) for p in polys], np.int64))


def _scene_doc(scene):
    wp, wc = _pack_polys([p for p, _ in scene.walls])
    op, oc = _pack_polys(list(scene.obstacles))
    return {"wall_points": wp, "wall_counts": wc, "wall_closed": pack_array(np.array([c for _, c in scene.walls], np.uint8)),
            "obstacle_points": op, "obstacle_counts": oc,
            "targets": [[t.name, t.kind, list(t.shape)] for t in scene.targets]}


def _split_polys(d, prefix, where):
    pts = unpack_array(d.get(f"{prefix}_points"), f"{where}.{prefix}_points", np.float64, 2, 2, max_items=2 * MAX_POINTS)
    counts = unpack_array(d.get(f"{prefix}_counts"), f"{where}.{prefix}_counts", np.int64, 1, max_items=MAX_WALLS)
    if (counts < 2).any() or int(counts.sum()) != len(pts):
        raise SnapshotCorruptError(f"{where}.{prefix}_counts: do not add up to the {len(pts)} points")
    if not np.isfinite(pts).all():
        raise SnapshotCorruptError(f"{where}.{prefix}_points: contain NaN or infinity")
    return np.split(pts, np.cumsum(counts)[:-1]) if len(counts) else []


def _scene_from_doc(d, where="snapshot.scene"):
    from .scene import Scene
    if not isinstance(d, dict):
        raise SnapshotCorruptError(f"{where}: not a map")
    walls = _split_polys(d, "wall", where)
    closed = unpack_array(d.get("wall_closed"), f"{where}.wall_closed", np.uint8, 1, max_items=MAX_WALLS)
    obstacles = _split_polys(d, "obstacle", where)
    targets = _get(d, "targets", list, where)
    if len(closed) != len(walls) or (closed > 1).any():
        raise SnapshotCorruptError(f"{where}.wall_closed: needs one 0/1 flag per wall")
    if len(walls) + len(obstacles) > MAX_WALLS or len(targets) > MAX_TARGETS:
        raise SnapshotLimitError(f"{where}: more than {MAX_WALLS} walls or {MAX_TARGETS} targets")
    s = Scene()
    try:
        for i, (p, c) in enumerate(zip(walls, closed)):
            s.add_wall(p, bool(c), f"{where}.walls[{i}]")
        for i, p in enumerate(obstacles):
            s.add_obstacle(p, f"{where}.obstacles[{i}]")
        for i, t in enumerate(targets):
            if not (isinstance(t, list) and len(t) == 3 and isinstance(t[0], str) and len(t[0]) <= MAX_STRING
                    and isinstance(t[2], list) and all(isinstance(v, float) for v in t[2])):
                raise SnapshotCorruptError(f"{where}.targets[{i}]: need [name, kind, [floats]]")
            s.add_target(t[0], t[1], t[2], f"{where}.targets[{i}]")
    except SnapshotError:
        raise
    except Exception as e:
        raise SnapshotCorruptError(f"{e}" if isinstance(e, CrowdError) else f"{where}: invalid ({type(e).__name__}: {e})") \
            from None
    return s


def _check_build_size(scene, params, bounds, where):
    """Refuse scenes whose derived grids would be absurdly large, before building them."""
    from .spatial import HashGrid
    def cells(b, h):
        return math.ceil((b[2] - b[0]) / h) * math.ceil((b[3] - b[1]) / h)
    nav = max(cells(bounds, params.nav_cell), cells((-10.0, -10.0, 10.0, 10.0), params.nav_cell))
    if nav > MAX_NAV_CELLS or nav * max(1, len(scene.targets)) > MAX_FIELD_CELLS:
        raise SnapshotLimitError(f"{where}: navigation grid of {nav} cells x {len(scene.targets)} targets exceeds "
                                 f"the limits ({MAX_NAV_CELLS} cells, {MAX_FIELD_CELLS} cells x targets)")
    seg = scene.segments()
    if len(seg):
        g = HashGrid.covering(*bounds, 2.0, max_cells=1 << 20)   # as SceneCache: 2 m cells, 3 m margin
        lo = np.floor((np.minimum(seg[:, :2], seg[:, 2:]) - 3.0 - (g.ox, g.oy)) / g.cell)
        hi = np.floor((np.maximum(seg[:, :2], seg[:, 2:]) + 3.0 - (g.ox, g.oy)) / g.cell)
        lo = np.clip(lo, 0, (g.nx - 1, g.ny - 1))
        hi = np.clip(hi, 0, (g.nx - 1, g.ny - 1))
        items = float(np.prod(hi - lo + 1, axis=1).sum())
        if items > MAX_WALL_GRID_ITEMS:
            raise SnapshotLimitError(f"{where}: the wall grid would list {items:.0f} segment entries "
                                     f"(limit {MAX_WALL_GRID_ITEMS})")


# ------------------------------------------------------------------ encoding
def _static_doc(world):
    return {"params": world.params.to_dict(), "scene": _scene_doc(world.scene),
            "bounds": [float(v) for v in world._cache.bounds],
            "extra_bounds": [float(v) for v in world._extra_bounds] if world._extra_bounds else None,
            "records_hash": world.records.content_hash}


def static_bytes(world):
    """Packed inputs of everything derived (scene, params, grid bounds, record set hash)."""
    return msgpack.packb(_static_doc(world), use_bin_type=True)


def world_body(world, embed_records=None):
    """The snapshot body (a plain dict) of a world."""
    from .records import default_record_set
    from .world import AGENT_FIELDS
    is_default = world.records.content_hash == default_record_set().content_hash
    embed = (not is_default) if embed_records is None else bool(embed_records)
    return {
        "static": static_bytes(world),
        "records": world.records.to_bytes() if embed else None,
        "agents": {k: pack_array(world.agents[k]) for k in AGENT_FIELDS},
        "last_arrived": pack_array(np.asarray(world.last_arrived, np.int32)),
        "seed": int(world.seed),
        "rng": _rng_state(world.rng),
        "frame": int(world.frame),
        "time": float(world.time),
        "next_id": int(world.next_id),
        "arrived_total": int(world.arrived_total),
        "name": str(getattr(world, "name", "")),
        "default_frames": int(getattr(world, "default_frames", 0)),
    }


def dumps(world, embed_records=None):
    """Snapshot bytes of a world; the bundled record set is referenced by hash unless embed_records."""
    body = msgpack.packb(world_body(world, embed_records), use_bin_type=True)
    return msgpack.packb({"format": FORMAT, "version": VERSION, "byteorder": "little",
                          "hash": hashlib.sha256(body).hexdigest(), "body": body}, use_bin_type=True)


# ------------------------------------------------------------------ decoding
def unpack_one(data, where, max_array_len=1 << 16, max_map_len=64):
    """Exactly one msgpack object from bytes, with bounded sizes, no ext types and no trailing bytes."""
    if not data:
        raise SnapshotCorruptError(f"{where}: empty")
    try:
        u = msgpack.Unpacker(None, raw=False, strict_map_key=True, use_list=True, max_buffer_size=len(data),
                             max_bin_len=len(data), max_str_len=min(len(data), 1 << 20),
                             max_array_len=max_array_len, max_map_len=max_map_len, max_ext_len=0)
        u.feed(data)
        obj = u.unpack()
        end = u.tell()
    except msgpack.OutOfData:
        raise SnapshotCorruptError(f"{where}: truncated msgpack data") from None
    except Exception as e:   # msgpack raises several kinds (ValueError, TypeError, ExtraData...)
        raise SnapshotCorruptError(f"{where}: cannot decode msgpack ({type(e).__name__}: {e})") from None
    if end != len(data):
        raise SnapshotCorruptError(f"{where}: {len(data) - end} trailing bytes after the msgpack object")
    return obj


def read_body(data):
    """Check the envelope and the content hash, then decode the body map. Raises a SnapshotError kind."""
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise SnapshotFormatError(f"snapshot: expected bytes, got {type(data).__name__}")
    data = bytes(data)
    if len(data) > MAX_SNAPSHOT_BYTES:
        raise SnapshotLimitError(f"snapshot: {len(data)} bytes exceed the {MAX_SNAPSHOT_BYTES} byte limit")
    outer = unpack_one(data, "snapshot", max_array_len=0, max_map_len=8)
    if not isinstance(outer, dict) or outer.get("format") != FORMAT:
        raise SnapshotFormatError("snapshot: not a crowdcore snapshot (format tag missing)")
    if outer.get("version") != VERSION:
        raise SnapshotFormatError(f"snapshot: version {outer.get('version')!r} is not supported (this build reads {VERSION})")
    if outer.get("byteorder") != "little":
        raise SnapshotFormatError(f"snapshot: byte order {outer.get('byteorder')!r} is not supported (only little)")
    body = _get(outer, "body", bytes, "snapshot")
    if hashlib.sha256(body).hexdigest() != outer.get("hash"):
        raise SnapshotCorruptError("snapshot: content hash mismatch (the data is damaged)")
    b = unpack_one(body, "snapshot.body")
    if not isinstance(b, dict):
        raise SnapshotCorruptError("snapshot.body: not a map")
    return b


class Decoded:
    """A fully validated snapshot body: plain objects, nothing built yet."""

    __slots__ = ("static", "static_raw", "records", "agents", "last_arrived", "state")


def _decode_agents(b, n_targets):
    from .world import AGENT_FIELDS
    agents_in = _get(b, "agents", dict, "snapshot")
    if set(agents_in) != set(AGENT_FIELDS):
        raise SnapshotCorruptError(f"snapshot.agents: fields {sorted(agents_in)} differ from {sorted(AGENT_FIELDS)}")
    agents = {}
    for k, (dt, cols) in AGENT_FIELDS.items():
        agents[k] = unpack_array(agents_in[k], f"snapshot.agents.{k}", dt, 2 if cols else 1, cols or None,
                                 max_items=MAX_AGENTS * max(cols, 1))
    n = len(agents["ids"])
    for k, v in agents.items():
        if len(v) != n:
            raise SnapshotCorruptError(f"snapshot.agents.{k}: {len(v)} rows, but there are {n} ids")
    ids = agents["ids"]
    if n and (ids[0] < 1 or np.any(np.diff(ids) <= 0)):
        raise SnapshotCorruptError("snapshot.agents.ids: must be positive and strictly increasing")
    for k in ("pos", "vel", "prev_vel", "pref_speed", "radius"):
        if not np.isfinite(agents[k]).all():
            raise SnapshotCorruptError(f"snapshot.agents.{k}: contains NaN or infinity")
    if n and (agents["pref_speed"].min() < 0 or agents["pref_speed"].max() > 5):
        raise SnapshotCorruptError("snapshot.agents.pref_speed: outside [0, 5] m/s")
    if n and (agents["radius"].min() <= 0 or agents["radius"].max() > 2):
        raise SnapshotCorruptError("snapshot.agents.radius: outside (0, 2] m")
    if n and (agents["target"].min() < -1 or agents["target"].max() >= n_targets):
        raise SnapshotCorruptError(f"snapshot.agents.target: refers to a missing target (there are {n_targets})")
    if n and agents["group"].min() < -1:
        raise SnapshotCorruptError("snapshot.agents.group: below -1")
    return agents


def decode(data, records=None, live=None):
    """Validate snapshot bytes completely. `live`: a world whose static inputs may be reused if equal."""
    from .params import Params
    from .records import RecordSet, default_record_set

    b = read_body(data)
    d = Decoded()
    d.static_raw = _get(b, "static", bytes, "snapshot")
    reuse = live is not None and d.static_raw == static_bytes(live)
    st = unpack_one(d.static_raw, "snapshot.static")
    if not isinstance(st, dict):
        raise SnapshotCorruptError("snapshot.static: not a map")
    if reuse:
        d.static = {"params": live.params, "scene": live.scene, "bounds": live._cache.bounds,
                    "extra_bounds": live._extra_bounds}
        d.records = live.records
    else:
        params_doc = _get(st, "params", dict, "snapshot.static")
        try:
            params = Params.from_dict(params_doc, "snapshot.params")
        except Exception as e:   # untrusted values: any failure of validation means a bad file
            raise SnapshotCorruptError(f"{e}" if isinstance(e, CrowdError) else
                                       f"snapshot.params: invalid ({type(e).__name__}: {e})") from None
        scene = _scene_from_doc(_get(st, "scene", dict, "snapshot.static"))
        bounds = _bounds(st.get("bounds"), "snapshot.static.bounds")
        extra = _bounds(st.get("extra_bounds"), "snapshot.static.extra_bounds", optional=True)
        _check_build_size(scene, params, bounds, "snapshot.static")
        d.static = {"params": params, "scene": scene, "bounds": bounds, "extra_bounds": extra}
        rec_hash = _get(st, "records_hash", str, "snapshot.static")
        emb = b.get("records")
        if emb is not None:
            if not isinstance(emb, bytes):
                raise SnapshotCorruptError("snapshot.records: not bytes")
            try:
                rs = RecordSet.from_bytes(emb)
            except CrowdError as e:
                raise SnapshotCorruptError(f"snapshot.records: {e}") from None
        elif records is not None:
            rs = records
        else:
            rs = default_record_set()
        if rs.content_hash != rec_hash:
            raise SnapshotRecordsError(f"snapshot: needs the record set with hash {rec_hash[:16]}..., "
                                       f"got {rs.content_hash[:16]}... (pass records=)")
        d.records = rs
    agents = _decode_agents(b, len(d.static["scene"].targets))
    d.agents = agents
    d.last_arrived = unpack_array(b.get("last_arrived"), "snapshot.last_arrived", np.int32, 1)
    n = len(agents["ids"])
    next_id = _int(b, "next_id", 1, 2**31, "snapshot")
    if n and next_id <= int(agents["ids"][-1]):
        raise SnapshotCorruptError(f"snapshot.next_id: {next_id} is not above the largest id {int(agents['ids'][-1])}")
    t = _get(b, "time", float, "snapshot")
    if not (math.isfinite(t) and t >= 0):
        raise SnapshotCorruptError(f"snapshot.time: must be finite and >= 0, got {t!r}")
    name = _get(b, "name", str, "snapshot")
    if len(name) > MAX_STRING:
        raise SnapshotLimitError("snapshot.name: too long")
    d.state = {
        "seed": _int(b, "seed", 0, 2**64 - 1, "snapshot"),
        "rng": _restore_rng(b.get("rng")),
        "frame": _int(b, "frame", 0, 2**62, "snapshot"),
        "time": t,
        "next_id": next_id,
        "arrived_total": _int(b, "arrived_total", 0, 2**62, "snapshot"),
        "name": name,
        "default_frames": _int(b, "default_frames", 0, 2**31, "snapshot"),
    }
    return d


def _set_state(w, d):
    """Put decoded state into a world (plain assignments that cannot fail)."""
    w.agents = d.agents
    w.last_arrived = d.last_arrived
    w.stats = {}
    for k, v in d.state.items():
        setattr(w, k, v)


def build_world(d):
    """A new World from a decoded snapshot (derived data rebuilt with the stored bounds)."""
    from .world import World
    s = d.static
    try:
        w = World(None, s["params"], d.records, seed=d.state["seed"])
        w._extra_bounds = s["extra_bounds"]
        w._rebuild_scene(s["scene"], bounds=s["bounds"])
    except Exception as e:   # everything was validated; a failure here still means the file cannot be used
        raise SnapshotCorruptError(f"snapshot: cannot rebuild the scene ({type(e).__name__}: {e})") from None
    _set_state(w, d)
    return w


def loads(data, records=None, like=None):
    """A new World from snapshot bytes.

    like: an existing world; if the snapshot's static inputs equal its own, the new world shares its read-only
    derived data (navigation fields, wall grid, record index) instead of rebuilding them (a fast fork)."""
    d = decode(data, records, live=like)
    if like is None or d.static["scene"] is not like.scene:
        return build_world(d)
    w = copy.copy(like)   # shares only immutable or replaced-on-change members, see below
    w._journal = None
    w._hash_start = like._hash_start.copy()   # per-world scratch buffer of the agent hash
    w.phase_ms = dict(like.phase_ms)
    _set_state(w, d)
    return w


def restore(world, data, records=None):
    """Put a snapshot's state into `world` in place; returns True if its derived data was reused.

    When the snapshot's scene, parameters, grid bounds and record set equal the live world's (the usual case:
    rewinding a running world), only the agent state is swapped, after full validation. Otherwise a new world
    is built and its contents replace the live one's. On any error the live world is untouched."""
    if getattr(world, "_journal", None) is not None:
        raise SnapshotError("snapshot: cannot restore a world that is being recorded (close the recorder first)")
    d = decode(data, records, live=world)
    if d.static["scene"] is world.scene:
        _set_state(world, d)
        return True
    new = build_world(d)
    world.__dict__.update(new.__dict__)
    return False


# ------------------------------------------------------------------ files
def read_file(path, limit=None):
    """The bytes of a snapshot file, refusing files above the size limit before reading them."""
    limit = MAX_SNAPSHOT_BYTES if limit is None else limit
    path = os.fspath(path)
    try:
        size = os.path.getsize(path)
        if size > limit:
            raise SnapshotLimitError(f"{path}: {size} bytes exceed the {limit} byte limit")
        with open(path, "rb") as f:
            data = f.read(limit + 1)
    except OSError as e:
        raise SnapshotError(f"{path}: cannot read ({e.strerror or e})") from None
    if len(data) > limit:
        raise SnapshotLimitError(f"{path}: grew beyond the {limit} byte limit while being read")
    return data


# ------------------------------------------------------------------ hashes
def state_hash(world):
    """A hash of everything that evolves (agents, frame, time, ids, generator): equal hashes, equal states."""
    from .world import AGENT_FIELDS
    h = hashlib.blake2b(digest_size=16)
    h.update(np.array([world.frame, world.next_id, world.arrived_total], "<i8").tobytes())
    h.update(np.array([world.time], "<f8").tobytes())
    h.update(repr(sorted(_rng_state(world.rng).items())).encode())
    for k, (dt, _) in AGENT_FIELDS.items():
        h.update(k.encode())
        h.update(np.ascontiguousarray(world.agents[k], np.dtype(dt).newbyteorder("<")).tobytes())
    return h.hexdigest()


def agent_digests(world):
    """A 32-bit digest per agent row (id, position, velocities), to name the first diverging agent."""
    a = world.agents
    rows = np.ascontiguousarray(np.concatenate([a["pos"], a["vel"], a["prev_vel"]], axis=1)).view(np.uint64)
    acc = a["ids"].astype(np.uint64) * np.uint64(0x9E3779B97F4A7C15)
    for c in range(rows.shape[1]):
        acc = (acc ^ rows[:, c]) * np.uint64(0xBF58476D1CE4E5B9)
        acc ^= acc >> np.uint64(31)
    return (acc >> np.uint64(32)).astype(np.uint32)
