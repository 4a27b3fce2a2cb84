"""Recording a run (initial snapshot + host commands + a state hash per frame) and replaying it.

A recording is a stream of msgpack objects written as the run goes, flushed after every frame, so a
crash leaves a readable prefix:
    1. {"format": "crowdcore-recording", "version": 1, "snapshot": <snapshot bytes>}
    2. one map per step: {"frame", "commands": [[name, args], ...], "dt", "hash", "ids", "digests"}
Commands are the world's own public calls (add_agents, remove_agents, set_target, add_wall,
add_obstacle, add_target, set_bounds, set_params) with their validated arguments.
"""
import os

import msgpack
import numpy as np

from .errors import SnapshotError
from .snapshot import (SnapshotCorruptError, SnapshotFormatError, agent_digests, pack_array, read_body,
                       unpack_array, world_from_body)

FORMAT = "crowdcore-recording"
VERSION = 1
MAX_RECORD_OBJECT = 1 << 30
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


class Recorder:
    """Attach to a world; every command and step is appended to `path` as it happens.

    Use as a context manager, or call close(). Only one recorder per world at a time."""

    def __init__(self, world, path, agent_detail=True):
        if world._journal is not None:
            raise SnapshotError("recording: this world is being recorded already")
        self.world, self.path, self.agent_detail = world, os.fspath(path), agent_detail
        self._pending = []
        self._file = open(self.path, "wb")
        self._file.write(msgpack.packb({"format": FORMAT, "version": VERSION, "snapshot": world.snapshot()},
                                       use_bin_type=True))
        self._file.flush()
        world._journal = self._on_command
        self.frames = 0

    def _on_command(self, name, args):
        if name != "step":
            self._pending.append([name, _plain(args)])
            return
        w = self.world
        entry = {"frame": w.frame, "commands": self._pending, "dt": args["dt"], "hash": w.state_hash()}
        if self.agent_detail:
            entry["ids"] = pack_array(w.agents["ids"])
            entry["digests"] = pack_array(agent_digests(w))
        self._file.write(msgpack.packb(entry, use_bin_type=True))
        self._file.flush()
        self._pending = []
        self.frames += 1

    def close(self):
        if self._file is not None:
            if self.world._journal == self._on_command:
                self.world._journal = None
            self._file.close()
            self._file = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class ReplayReport:
    """What a replay found: frames checked, the first divergence (frame, agent id) if any."""

    def __init__(self):
        self.frames_checked = 0
        self.diverged_at_frame = None
        self.diverged_agent = None
        self.truncated = False
        self.world = None

    @property
    def identical(self):
        return self.diverged_at_frame is None

    def __str__(self):
        if self.identical:
            tail = " (the recording ends in a truncated entry, ignored)" if self.truncated else ""
            return f"replay identical over {self.frames_checked} frames{tail}"
        who = f", first differing agent id {self.diverged_agent}" if self.diverged_agent is not None else ""
        return f"replay diverged at frame {self.diverged_at_frame}{who} after {self.frames_checked} identical frames"


def read_recording(path):
    """Yield the header then each frame entry; a truncated final entry ends the stream quietly.

    Sizes are bounded and nothing but plain msgpack types is decoded."""
    size = os.path.getsize(path)
    with open(path, "rb") as f:
        unpacker = msgpack.Unpacker(f, raw=False, strict_map_key=True, max_buffer_size=min(size, MAX_RECORD_OBJECT) + 1,
                                    max_bin_len=MAX_RECORD_OBJECT, max_str_len=1 << 20, max_array_len=1 << 22,
                                    max_map_len=256, max_ext_len=0)
        try:
            for obj in unpacker:
                yield obj
        except (msgpack.OutOfData, ValueError) as e:
            if isinstance(e, msgpack.OutOfData):
                return
            raise SnapshotCorruptError(f"{path}: damaged recording ({e})") from None
        except Exception as e:
            raise SnapshotCorruptError(f"{path}: damaged recording ({type(e).__name__}: {e})") from None


def _apply(world, name, args, where):
    if name not in COMMANDS or not isinstance(args, dict):
        raise SnapshotCorruptError(f"{where}: unknown command {name!r}")
    args = _unplain(args, where)
    try:
        getattr(world, name)(**args)
    except SnapshotError:
        raise
    except Exception as e:
        raise SnapshotCorruptError(f"{where}: command {name} failed on replay ({e})") from None


def replay(path, records=None, on_frame=None, progress=False):
    """Rebuild the run from a recording and check every frame's hash. Returns a ReplayReport."""
    report = ReplayReport()
    stream = read_recording(os.fspath(path))
    header = next(stream, None)
    if not isinstance(header, dict) or header.get("format") != FORMAT:
        raise SnapshotFormatError(f"{path}: not a crowdcore recording")
    if header.get("version") != VERSION:
        raise SnapshotFormatError(f"{path}: recording version {header.get('version')!r} is not supported")
    world = world_from_body(read_body(header.get("snapshot")), records)
    report.world = world
    bar = None
    if progress:
        from tqdm import tqdm
        bar = tqdm(desc="replay", unit="frame")
    for k, entry in enumerate(stream):
        where = f"{path}: frame entry {k}"
        if not isinstance(entry, dict) or not isinstance(entry.get("commands"), list):
            raise SnapshotCorruptError(f"{where}: malformed")
        for c, cmd in enumerate(entry["commands"]):
            if not isinstance(cmd, list) or len(cmd) != 2:
                raise SnapshotCorruptError(f"{where}.commands[{c}]: malformed")
            _apply(world, cmd[0], cmd[1], f"{where}.commands[{c}]")
        world.step(entry.get("dt"))
        if on_frame is not None:
            on_frame(world)
        if bar is not None:
            bar.update()
        if world.state_hash() != entry.get("hash"):
            report.diverged_at_frame = world.frame
            if "ids" in entry and "digests" in entry:
                ids = unpack_array(entry["ids"], f"{where}.ids")
                dig = unpack_array(entry["digests"], f"{where}.digests")
                mine_ids, mine = world.agents["ids"], agent_digests(world)
                if not np.array_equal(ids, mine_ids):
                    diff = np.setxor1d(ids, mine_ids)
                    report.diverged_agent = int(diff[0]) if len(diff) else None
                else:
                    bad = np.flatnonzero(dig != mine)
                    report.diverged_agent = int(ids[bad[0]]) if len(bad) else None
            break
        report.frames_checked += 1
    if bar is not None:
        bar.close()
    return report
