"""Snapshots: a world's complete state as one msgpack document, and its safe loading.

Layout (all ours): an outer map {"format": "crowdcore-snapshot", "version": 1, "hash": sha256 hex,
"body": bytes}. The hash covers the body bytes, so a damaged file is refused before the body is even
unpacked. The body is a map of plain values; every array is {"dtype", "shape", "data"} with
little-endian raw bytes. Derived data (navigation fields, grids, the record index) is not stored: it is
rebuilt from the stored inputs by the same code, which gives identical bits.

Loading never trusts sizes: msgpack limits are set from the input length, shapes and dtypes are
checked against the byte counts before any array is made, and nothing is ever unpickled.
"""
import hashlib
import math
import os
import tempfile

import msgpack
import numpy as np

from .errors import SnapshotError, CrowdError

FORMAT = "crowdcore-snapshot"
VERSION = 1
MAX_SNAPSHOT_BYTES = 1 << 31          # 2 GiB
MAX_AGENTS = 50_000_000
ALLOWED_DTYPES = {"<f8": np.float64, "<i4": np.int32, "<i8": np.int64, "|u1": np.uint8}


class SnapshotFormatError(SnapshotError):
    """Not a crowdcore snapshot, or of another version."""


class SnapshotCorruptError(SnapshotError):
    """Damaged bytes: truncated, altered, or inconsistent."""


class SnapshotRecordsError(SnapshotError):
    """The snapshot refers to a record set that was not supplied."""


# ------------------------------------------------------------------ encoding
def pack_array(a):
    a = np.ascontiguousarray(a)
    dt = a.dtype.newbyteorder("<") if a.dtype.byteorder not in ("|", "<") else a.dtype
    a = a.astype(dt, copy=False)
    return {"dtype": a.dtype.str, "shape": list(a.shape), "data": a.tobytes()}


def unpack_array(obj, where, max_items=MAX_AGENTS * 4):
    if not isinstance(obj, dict) or set(obj) != {"dtype", "shape", "data"}:
        raise SnapshotCorruptError(f"{where}: not an array record")
    dt = obj["dtype"]
    if dt not in ALLOWED_DTYPES:
        raise SnapshotCorruptError(f"{where}: dtype {dt!r} not allowed (byte order must be little-endian)")
    shape = obj["shape"]
    if not isinstance(shape, list) or len(shape) > 4 or not all(isinstance(s, int) and 0 <= s <= max_items for s in shape):
        raise SnapshotCorruptError(f"{where}: bad shape {shape!r}")
    count = math.prod(shape)
    data = obj["data"]
    if not isinstance(data, bytes) or count > max_items or len(data) != count * np.dtype(dt).itemsize:
        raise SnapshotCorruptError(f"{where}: {len(data) if isinstance(data, bytes) else '?'} bytes do not fit "
                                   f"shape {shape} of {dt}")
    return np.frombuffer(data, dtype=ALLOWED_DTYPES[dt]).reshape(shape).astype(ALLOWED_DTYPES[dt], copy=True)


def _rng_state(rng):
    s = rng.bit_generator.state
    return {"bit_generator": s["bit_generator"], "state": format(s["state"]["state"], "x"),
            "inc": format(s["state"]["inc"], "x"), "has_uint32": int(s["has_uint32"]), "uinteger": int(s["uinteger"])}


def _restore_rng(obj):
    try:
        if obj["bit_generator"] != "PCG64":
            raise SnapshotCorruptError("rng: only PCG64 generators are stored")
        rng = np.random.Generator(np.random.PCG64())
        rng.bit_generator.state = {"bit_generator": "PCG64",
                                   "state": {"state": int(obj["state"], 16), "inc": int(obj["inc"], 16)},
                                   "has_uint32": int(obj["has_uint32"]), "uinteger": int(obj["uinteger"])}
        return rng
    except SnapshotError:
        raise
    except Exception as e:
        raise SnapshotCorruptError(f"rng: bad generator state ({e})") from None


def world_body(world, embed_records=None):
    """The snapshot body (a plain dict) of a world."""
    from .records import default_record_set
    from .world import AGENT_FIELDS
    is_default = world.records.content_hash == default_record_set().content_hash
    embed = (not is_default) if embed_records is None else bool(embed_records)
    return {
        "params": world.params.to_dict(),
        "scene": world.scene.to_dict(),
        "extra_bounds": list(world._extra_bounds) if world._extra_bounds else None,
        "seed": world.seed,
        "rng": _rng_state(world.rng),
        "frame": world.frame,
        "time": world.time,
        "next_id": world.next_id,
        "arrived_total": world.arrived_total,
        "agents": {k: pack_array(world.agents[k]) for k in AGENT_FIELDS},
        "records_hash": world.records.content_hash,
        "records": world.records.to_bytes() if embed else None,
        "name": getattr(world, "name", ""),
    }


def dumps(world, embed_records=None):
    """Snapshot bytes of a world; the bundled record set is referenced by hash unless embed_records."""
    body = msgpack.packb(world_body(world, embed_records), use_bin_type=True)
    return msgpack.packb({"format": FORMAT, "version": VERSION, "byteorder": "little",
                          "hash": hashlib.sha256(body).hexdigest(), "body": body}, use_bin_type=True)


# ------------------------------------------------------------------ decoding
def _unpack(data, where):
    try:
        return msgpack.unpackb(data, raw=False, strict_map_key=True, max_buffer_size=len(data),
                               max_bin_len=len(data), max_str_len=1 << 20, max_array_len=1 << 22,
                               max_map_len=256, max_ext_len=0, use_list=True)
    except Exception as e:
        raise SnapshotCorruptError(f"{where}: cannot decode msgpack ({type(e).__name__}: {e})") from None


def _get(d, key, types, where):
    if not isinstance(d, dict) or key not in d:
        raise SnapshotCorruptError(f"{where}.{key}: missing")
    v = d[key]
    if isinstance(v, bool) or not isinstance(v, types):
        raise SnapshotCorruptError(f"{where}.{key}: wrong type {type(v).__name__}")
    return v


def read_body(data):
    """Check the envelope and the hash, then decode the body. Raises a SnapshotError kind."""
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise SnapshotFormatError(f"snapshot: expected bytes, got {type(data).__name__}")
    data = bytes(data)
    if len(data) > MAX_SNAPSHOT_BYTES:
        raise SnapshotCorruptError(f"snapshot: {len(data)} bytes exceeds the {MAX_SNAPSHOT_BYTES} byte limit")
    outer = _unpack(data, "snapshot")
    if not isinstance(outer, dict) or outer.get("format") != FORMAT:
        raise SnapshotFormatError("snapshot: not a crowdcore snapshot (format tag missing)")
    if outer.get("version") != VERSION:
        raise SnapshotFormatError(f"snapshot: version {outer.get('version')!r} is not supported (this build reads {VERSION})")
    if outer.get("byteorder") != "little":
        raise SnapshotFormatError(f"snapshot: byte order {outer.get('byteorder')!r} is not supported")
    body = _get(outer, "body", bytes, "snapshot")
    if hashlib.sha256(body).hexdigest() != outer.get("hash"):
        raise SnapshotCorruptError("snapshot: content hash mismatch (the file is damaged)")
    b = _unpack(body, "snapshot.body")
    if not isinstance(b, dict):
        raise SnapshotCorruptError("snapshot.body: not a map")
    return b


def world_from_body(b, records=None):
    """A new World from a decoded body; the caller's live world is never touched."""
    from .params import Params
    from .records import RecordSet, default_record_set
    from .scene import Scene
    from .world import AGENT_FIELDS, World

    try:
        params = Params.from_dict(_get(b, "params", dict, "snapshot"), "snapshot.params")
        scene = Scene.from_dict(_get(b, "scene", dict, "snapshot"))
    except SnapshotError:
        raise
    except (CrowdError, KeyError, TypeError, ValueError) as e:
        raise SnapshotCorruptError(f"snapshot: bad scene or parameters ({e})") from None
    rec_hash = _get(b, "records_hash", str, "snapshot")
    if b.get("records") is not None:
        try:
            rs = RecordSet.from_bytes(_get(b, "records", bytes, "snapshot"))
        except CrowdError as e:
            raise SnapshotCorruptError(f"snapshot.records: {e}") from None
    elif records is not None:
        rs = records
    else:
        rs = default_record_set()
    if rs.content_hash != rec_hash:
        raise SnapshotRecordsError(f"snapshot: needs the record set with hash {rec_hash[:16]}..., "
                                   f"got {rs.content_hash[:16]}... (pass records=)")
    agents_in = _get(b, "agents", dict, "snapshot")
    agents = {}
    for k, (dt, cols) in AGENT_FIELDS.items():
        arr = unpack_array(agents_in.get(k), f"snapshot.agents.{k}")
        if arr.dtype != dt or (arr.ndim != (2 if cols else 1)) or (cols and arr.shape[1] != cols):
            raise SnapshotCorruptError(f"snapshot.agents.{k}: shape {arr.shape} / {arr.dtype} is not {dt.__name__} x {cols or 1}")
        agents[k] = arr
    n = len(agents["ids"])
    if any(len(v) != n for v in agents.values()):
        raise SnapshotCorruptError("snapshot.agents: arrays differ in length")
    if n and (np.any(np.diff(agents["ids"]) <= 0) or agents["ids"][0] < 1):
        raise SnapshotCorruptError("snapshot.agents.ids: must be positive and strictly increasing")
    for k in ("pos", "vel", "prev_vel", "pref_speed", "radius"):
        if not np.isfinite(agents[k]).all():
            raise SnapshotCorruptError(f"snapshot.agents.{k}: contains NaN or infinity")
    if n and (agents["target"].min() < -1 or agents["target"].max() >= len(scene.targets)):
        raise SnapshotCorruptError("snapshot.agents.target: refers to a missing target")
    frame = _get(b, "frame", int, "snapshot")
    next_id = _get(b, "next_id", int, "snapshot")
    if frame < 0 or next_id < 1 or (n and next_id <= int(agents["ids"][-1])):
        raise SnapshotCorruptError("snapshot: frame or next_id out of range")
    try:
        w = World(scene, params, rs, seed=_get(b, "seed", int, "snapshot"))
        extra = b.get("extra_bounds")
        if extra is not None:
            w.set_bounds(*[float(v) for v in extra])
    except SnapshotError:
        raise
    except (CrowdError, TypeError, ValueError) as e:
        raise SnapshotCorruptError(f"snapshot: cannot rebuild the scene ({e})") from None
    w.rng = _restore_rng(_get(b, "rng", dict, "snapshot"))
    w.frame = frame
    w.time = float(_get(b, "time", (float, int), "snapshot"))
    w.next_id = next_id
    w.arrived_total = _get(b, "arrived_total", int, "snapshot")
    w.agents = agents
    w.name = str(b.get("name", ""))
    if n and w._outside_bounds(agents["pos"]):
        w._rebuild_scene()
    return w


def loads(data, records=None):
    """A new World from snapshot bytes."""
    return world_from_body(read_body(data), records)


# ------------------------------------------------------------------ files
def atomic_write(path, data):
    """Write bytes to path via a temp file in the same folder and a rename; the old file survives a failure."""
    path = os.fspath(path)
    d = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(dir=d, prefix=".tmp-", suffix=".part")
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def read_file(path, limit=MAX_SNAPSHOT_BYTES):
    path = os.fspath(path)
    try:
        size = os.path.getsize(path)
        if size > limit:
            raise SnapshotCorruptError(f"{path}: {size} bytes exceeds the {limit} byte limit")
        with open(path, "rb") as f:
            return f.read(limit + 1)
    except OSError as e:
        raise SnapshotError(f"{path}: cannot read ({e.strerror or e})") from None


def state_hash(world):
    """A short hash of everything that evolves (agents, frame, rng): equal hashes mean equal states."""
    from .world import AGENT_FIELDS
    h = hashlib.blake2b(digest_size=16)
    h.update(np.array([world.frame, world.next_id, world.arrived_total], np.int64).tobytes())
    h.update(np.float64(world.time).tobytes())
    for k in AGENT_FIELDS:
        h.update(np.ascontiguousarray(world.agents[k]).tobytes())
    return h.hexdigest()


def agent_digests(world):
    """A 32-bit digest per agent row (ids, position, velocity), to name the first diverging agent."""
    a = world.agents
    rows = np.concatenate([a["pos"], a["vel"], a["prev_vel"]], axis=1).view(np.uint64)
    acc = a["ids"].astype(np.uint64) * np.uint64(0x9E3779B97F4A7C15)
    for c in range(rows.shape[1]):
        acc = (acc ^ rows[:, c]) * np.uint64(0xBF58476D1CE4E5B9)
        acc ^= acc >> np.uint64(31)
    return (acc >> np.uint64(32)).astype(np.uint32)
