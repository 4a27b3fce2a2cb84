"""Recording a run (initial snapshot + host commands + a state hash per frame) and replaying it.

A recording is a stream of msgpack objects written as the run goes, flushed after every frame, so a
crash leaves a readable prefix:
    1. header {"format": "crowdcore-recording", "version": 2, "snapshot": <snapshot bytes>}
    2. one entry per step: {"frame", "commands": [[name, args], ...], "dt", "hash", "ids", "digests"}
       (commands are those issued since the previous step; hash is the state after the step)
    3. on close: {"end": true, "frame", "commands", "hash"} with the commands issued after the last step
Each entry is stored as {"entry": <msgpack bytes of the map>, "sum": blake2b-128 hex of those bytes}, so a
damaged entry is reported as damage rather than as a divergence.
Commands are the world's own public calls (add_agents, remove_agents, set_target, add_wall, add_obstacle,
add_target, set_bounds, set_params) with their validated arguments; arrays are stored as array records.
Reading applies the same size limits as snapshots and decodes nothing but plain msgpack types.
"""
import hashlib
import math
import os

import msgpack
import numpy as np

from .errors import CrowdError, SnapshotError
from .snapshot import (MAX_FIELD_CELLS, MAX_NAV_CELLS, SnapshotCorruptError, SnapshotFormatError, SnapshotLimitError,
                       agent_digests, build_world, decode, pack_array, unpack_array, unpack_one)

FORMAT = "crowdcore-recording"
VERSION = 2
MAX_RECORD_OBJECT = 1 << 30           # one header or frame entry
COMMANDS = ("add_agents", "remove_agents", "set_target", "add_wall", "add_obstacle", "add_target", "set_bounds",
            "set_params")


def _plain(v):
    if isinstance(v, np.ndarray):
        return {"__array__": pack_array(v)}
    if isinstance(v, dict):
        return {k: _plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    if isinstance(v, np.generic):
        return v.item()
    return v


def _unplain(v, where):
    if isinstance(v, dict):
        if set(v) == {"__array__"}:
            return unpack_array(v["__array__"], where)
        return {k: _unplain(x, f"{where}.{k}") for k, x in v.items()}
    if isinstance(v, list):
        return [_unplain(x, where) for x in v]
    return v


def pack_entry(entry):
    """The stored form of one frame or end entry (a map): its bytes plus their checksum."""
    payload = msgpack.packb(entry, use_bin_type=True)
    return msgpack.packb({"entry": payload, "sum": hashlib.blake2b(payload, digest_size=16).hexdigest()},
                         use_bin_type=True)


def _open_entry(obj, where):
    if not isinstance(obj, dict) or set(obj) != {"entry", "sum"} or not isinstance(obj["entry"], bytes):
        raise SnapshotCorruptError(f"{where}: not a recording entry")
    if hashlib.blake2b(obj["entry"], digest_size=16).hexdigest() != obj["sum"]:
        raise SnapshotCorruptError(f"{where}: checksum mismatch (the entry is damaged)")
    return unpack_one(obj["entry"], where, max_array_len=1 << 20, max_map_len=64)


class Recorder:
    """Attach to a world; every command and step is appended to `path` as it happens.

    Use as a context manager, or call close(). One recorder per world at a time. agent_detail=True also stores
    per-agent digests each frame so that a replay can name the first diverging agent."""

    def __init__(self, world, path, agent_detail=True):
        if world._journal is not None:
            raise SnapshotError("recording: this world is being recorded already")
        self.world, self.path, self.agent_detail = world, os.fspath(path), bool(agent_detail)
        self._pending = []
        self.frames = 0
        header = msgpack.packb({"format": FORMAT, "version": VERSION, "snapshot": world.snapshot()}, use_bin_type=True)
        self._file = open(self.path, "wb")
        try:
            self._write(header)
        except BaseException:
            self._file.close()
            raise
        world._journal = self._on_command

    def _write(self, packed):
        self._file.write(packed)
        self._file.flush()

    def _on_command(self, name, args):
        if self._file is None:
            return
        if name != "step":
            if name in ("add_wall", "add_obstacle"):
                args = {**args, "points": np.asarray(args["points"], np.float64)}
            self._pending.append([name, _plain(args)])
            return
        w = self.world
        entry = {"frame": w.frame, "commands": self._pending, "dt": float(args["dt"]), "hash": w.state_hash()}
        if self.agent_detail:
            entry["ids"] = pack_array(w.agents["ids"])
            entry["digests"] = pack_array(agent_digests(w))
        self._write(pack_entry(entry))
        self._pending = []
        self.frames += 1

    def close(self):
        """Write the end entry (commands after the last step) and detach. Safe to call twice."""
        if self._file is None:
            return
        try:
            w = self.world
            self._write(pack_entry({"end": True, "frame": w.frame, "commands": self._pending, "hash": w.state_hash()}))
        finally:
            if self.world._journal == self._on_command:
                self.world._journal = None
            self._file.close()
            self._file = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class ReplayReport:
    """What a replay found: frames checked, the first divergence (frame, agent id) if any.

    truncated: the file ends inside an entry (e.g. the recording process crashed); complete: the end entry
    written by Recorder.close() was seen. world: the replayed world at the point where checking stopped."""

    def __init__(self):
        self.frames_checked = 0
        self.diverged_at_frame = None
        self.diverged_agent = None
        self.truncated = False
        self.complete = False
        self.world = None

    @property
    def identical(self):
        return self.diverged_at_frame is None

    def __str__(self):
        if self.identical:
            tail = ""
            if self.truncated:
                tail = " (the recording ends in a truncated entry, ignored)"
            elif not self.complete:
                tail = " (the recording was not closed; its prefix was checked)"
            return f"replay identical over {self.frames_checked} frames{tail}"
        who = f", first differing agent id {self.diverged_agent}" if self.diverged_agent is not None else ""
        return f"replay diverged at frame {self.diverged_at_frame}{who} after {self.frames_checked} identical frames"

    def __repr__(self):
        return (f"ReplayReport(identical={self.identical}, frames_checked={self.frames_checked}, "
                f"diverged_at_frame={self.diverged_at_frame}, diverged_agent={self.diverged_agent}, "
                f"truncated={self.truncated}, complete={self.complete})")


def read_recording(path, report=None):
    """Yield the header then each decoded entry. A truncated final entry ends the stream and sets report.truncated.

    Sizes are bounded and nothing but plain msgpack types is decoded; other damage raises SnapshotCorruptError."""
    path = os.fspath(path)
    try:
        f = open(path, "rb")
        size = os.fstat(f.fileno()).st_size
    except OSError as e:
        raise SnapshotError(f"{path}: cannot read ({e.strerror or e})") from None
    with f:
        unpacker = msgpack.Unpacker(f, raw=False, strict_map_key=True, use_list=True,
                                    max_buffer_size=max(1, min(size, MAX_RECORD_OBJECT)),
                                    max_bin_len=MAX_RECORD_OBJECT, max_str_len=1 << 20, max_array_len=1 << 20,
                                    max_map_len=64, max_ext_len=0)
        first, k = True, 0
        while True:
            try:
                obj = unpacker.unpack()
            except msgpack.OutOfData:
                break
            except Exception as e:   # msgpack raises several kinds; all mean damage
                raise SnapshotCorruptError(f"{path}: damaged recording at byte {unpacker.tell()} "
                                           f"({type(e).__name__}: {e})") from None
            yield obj if first else _open_entry(obj, f"{path}: entry {k - 1}")
            first, k = False, k + 1
        if unpacker.tell() != size and report is not None:
            report.truncated = True


def _check_size(world, name, args, where):
    """Refuse commands that would grow the navigation grids beyond the snapshot limits (untrusted files)."""
    b = list(world._cache.bounds)
    cell, targets = world.params.nav_cell, len(world.scene.targets)
    try:
        pts = None
        if name in ("add_agents", "add_wall", "add_obstacle"):
            pts = np.asarray(args.get("positions", args.get("points")), np.float64).reshape(-1, 2)
        elif name == "add_target":
            s = [float(v) for v in args.get("shape")]
            pts = np.array([[s[0] - s[2], s[1] - s[2]], [s[0] + s[2], s[1] + s[2]]] if len(s) == 3 else [s[:2], s[2:4]])
            targets += 1
        elif name == "set_bounds":
            pts = np.array([[args["xmin"], args["ymin"]], [args["xmax"], args["ymax"]]], np.float64)
        elif name == "set_params" and "nav_cell" in args:
            cell = float(args["nav_cell"])
    except Exception:
        return  # malformed arguments: the world's own validation names them
    if pts is not None and len(pts) and np.isfinite(pts).all():
        lo, hi = pts.min(0) - 2.0, pts.max(0) + 2.0
        b = [min(b[0], lo[0]), min(b[1], lo[1]), max(b[2], hi[0]), max(b[3], hi[1])]
    if not (math.isfinite(cell) and cell > 0):
        return
    cells = math.ceil((b[2] - b[0]) / cell) * math.ceil((b[3] - b[1]) / cell)
    if cells > MAX_NAV_CELLS or cells * max(1, targets) > MAX_FIELD_CELLS:
        raise SnapshotLimitError(f"{where}: command {name} would need a navigation grid of {cells} cells x "
                                 f"{targets} targets, beyond the limits")


def _apply(world, name, args, where):
    if name not in COMMANDS or not isinstance(args, dict):
        raise SnapshotCorruptError(f"{where}: unknown command {name!r}")
    args = _unplain(args, where)
    _check_size(world, name, args, where)
    try:
        getattr(world, name)(**args)
    except SnapshotError:
        raise
    except Exception as e:   # any failure of a recorded command means the file does not describe a valid run
        raise SnapshotCorruptError(f"{where}: command {name} failed on replay ({type(e).__name__}: {e})") from None


def _first_diverging_agent(world, entry, where):
    if "ids" not in entry or "digests" not in entry:
        return None
    ids = unpack_array(entry["ids"], f"{where}.ids", np.int32, 1)
    dig = unpack_array(entry["digests"], f"{where}.digests", np.uint32, 1)
    mine_ids = world.agents["ids"]
    if not np.array_equal(ids, mine_ids):
        diff = np.setxor1d(ids, mine_ids)
        return int(diff[0]) if len(diff) else None
    if len(dig) != len(ids):
        raise SnapshotCorruptError(f"{where}.digests: {len(dig)} digests for {len(ids)} agents")
    bad = np.flatnonzero(dig != agent_digests(world))
    return int(ids[bad[0]]) if len(bad) else None


def replay(path, records=None, on_frame=None, progress=False, max_frames=None):
    """Rebuild the run from a recording and check every frame's hash. Returns a ReplayReport.

    on_frame(world) is called after each replayed step. Stops at the first divergence (report.world is then the
    diverged world) or after max_frames frames. A damaged or foreign file raises a SnapshotError kind."""
    path = os.fspath(path)
    report = ReplayReport()
    stream = read_recording(path, report)
    header = next(stream, None)
    if header is None:
        raise SnapshotFormatError(f"{path}: not a crowdcore recording (empty, or truncated inside its header)")
    if not isinstance(header, dict) or header.get("format") != FORMAT:
        raise SnapshotFormatError(f"{path}: not a crowdcore recording")
    if header.get("version") != VERSION:
        raise SnapshotFormatError(f"{path}: recording version {header.get('version')!r} is not supported "
                                  f"(this build reads {VERSION})")
    world = build_world(decode(header.get("snapshot"), records))
    report.world = world
    bar = None
    if progress:
        from tqdm import tqdm
        bar = tqdm(desc="replay", unit="frame")
    try:
        for k, entry in enumerate(stream):
            where = f"{path}: entry {k}"
            if report.complete:
                raise SnapshotCorruptError(f"{where}: data after the end entry")
            if not isinstance(entry, dict) or not isinstance(entry.get("commands"), list) \
                    or not isinstance(entry.get("hash"), str):
                raise SnapshotCorruptError(f"{where}: malformed")
            for c, cmd in enumerate(entry["commands"]):
                if not isinstance(cmd, list) or len(cmd) != 2:
                    raise SnapshotCorruptError(f"{where}.commands[{c}]: malformed")
                _apply(world, cmd[0], cmd[1], f"{where}.commands[{c}]")
            if entry.get("end") is True:
                report.complete = True
            else:
                if max_frames is not None and report.frames_checked >= max_frames:
                    break
                dt = entry.get("dt")
                if isinstance(dt, bool) or not isinstance(dt, float):
                    raise SnapshotCorruptError(f"{where}.dt: not a float")
                try:
                    world.step(dt)
                except CrowdError as e:
                    raise SnapshotCorruptError(f"{where}: step failed on replay ({e})") from None
                if on_frame is not None:
                    on_frame(world)
                if bar is not None:
                    bar.update()
            if world.state_hash() != entry["hash"] or entry.get("frame") != world.frame:
                report.diverged_at_frame = world.frame
                report.diverged_agent = _first_diverging_agent(world, entry, where)
                break
            if not entry.get("end"):
                report.frames_checked += 1
    finally:
        stream.close()
        if bar is not None:
            bar.close()
    return report
