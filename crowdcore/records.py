"""Motion records: read trajectory CSVs, extract rotation-invariant records, keep them bucketed.

A record comes from three consecutive samples p0, p1, p2 of one track (no frame gap):
entry speed a = |v1|, exit speed b = |v2|, turn angle phi = signed angle from v1 to v2 in
(-pi, pi], with v1 = (p1 - p0) * fps and v2 = (p2 - p1) * fps. Only lengths and the relative
angle are kept, so a rotated or shifted track gives the same records.

Trajectory CSV: header line ``frame,id,x,y`` (x, y in metres), ``#`` comment lines and blank
lines allowed anywhere. Rows of different persons may be interleaved; a person's rows must
have strictly increasing frames in line order. A frame step > 1 splits the track.

Record-set files are msgpack maps of our own design (see ``RecordSet.to_bytes``); never pickle.
"""
from __future__ import annotations

import functools
import hashlib
import operator
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable

import msgpack
import numpy as np

from ._files import atomic_write
from crowdcore.errors import RecordSetError, TrajectoryError

FORMAT_TAG = "crowdcore-records"
FORMAT_VERSION = 1
DEFAULT_MAX_SPEED = 4.0  # m/s; faster steps are tracking errors, not walking
ZERO_SPEED = 1e-9  # below this a velocity has no direction, so phi = 0
HEADER = ("frame", "id", "x", "y")
_MAX_FILE_BYTES = 1 << 31  # refuse record files above 2 GiB before reading them
_MAX_SOURCE_CHARS = 1 << 16
_EXACT_INT = float(2**53)  # frames and ids must be integers a float64 holds exactly


# ----------------------------------------------------------------------------------------------
# Trajectories


@dataclass(frozen=True)
class Tracks:
    """Validated trajectory samples, rows sorted by (person id, frame).

    Track segment t (a person's run of consecutive frames) is rows ``start[t]:start[t+1]``.
    """

    frame: np.ndarray  # int64[n]
    pid: np.ndarray  # int64[n]
    xy: np.ndarray  # float64[n, 2], metres
    start: np.ndarray  # int64[T+1]
    fps: float
    source: str

    @property
    def n_tracks(self) -> int:
        return len(self.start) - 1


def _check_rate(fps, max_speed) -> tuple[float, float]:
    try:
        fps_f, ms_f = float(fps), float(max_speed)
    except (TypeError, ValueError):
        raise TrajectoryError(f"fps and max_speed must be numbers, got {fps!r} and {max_speed!r}") from None
    if not (np.isfinite(fps_f) and fps_f > 0):
        raise TrajectoryError(f"fps must be a finite number > 0, got {fps!r}")
    if not (np.isfinite(ms_f) and ms_f > 0):
        raise TrajectoryError(f"max_speed must be a finite number > 0 (m/s), got {max_speed!r}")
    return fps_f, ms_f


def _first_unparsable(path: str, lines: np.ndarray, line_no: np.ndarray) -> TrajectoryError | None:
    """Slow scan used only after the fast parser failed, to name the offending line."""
    for text, ln in zip(lines, line_no):
        fields = str(text).split(",")
        if len(fields) != 4:
            return TrajectoryError(f"{path}: line {ln}: expected 4 comma-separated values "
                                   f"(frame,id,x,y), found {len(fields)}")
        for name, field in zip(HEADER, fields):
            try:
                float(field)
            except ValueError:
                return TrajectoryError(f"{path}: line {ln}: {name} value {field.strip()!r} is not a number")
    return None


def read_trajectories(path, fps: float, max_speed: float = DEFAULT_MAX_SPEED) -> Tracks:
    """Read and validate one trajectory CSV; raise TrajectoryError naming file and line."""
    fps_f, ms_f = _check_rate(fps, max_speed)
    name = str(path)
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        raise TrajectoryError(f"{name}: cannot read file: {exc.strerror or exc}") from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise TrajectoryError(f"{name}: line {line}: not valid UTF-8 text") from None

    text_lines = text.splitlines()
    lines = np.array(text_lines, dtype=np.dtypes.StringDType())
    stripped = np.strings.strip(lines)
    content = np.flatnonzero(~(np.strings.startswith(stripped, "#") | (stripped == "")))
    if len(content) == 0:
        raise TrajectoryError(f"{name}: line 1: missing header line 'frame,id,x,y' (file has no data)")
    header_at = int(content[0])
    header = tuple(f.strip() for f in str(stripped[header_at]).split(","))
    if header != HEADER:
        raise TrajectoryError(f"{name}: line {header_at + 1}: missing header line 'frame,id,x,y' "
                              f"(found {str(stripped[header_at])[:60]!r})")
    data_idx = content[1:]
    line_no = data_idx + 1  # 1-based physical line numbers
    if len(data_idx) == 0:
        table = np.empty((0, 4))
    else:
        # loadtxt reads a list of str about twice as fast as a StringDType array
        if data_idx[-1] - data_idx[0] + 1 == len(data_idx):
            data = text_lines[data_idx[0]:data_idx[-1] + 1]
        else:
            data = list(operator.itemgetter(*data_idx)(text_lines)) if len(data_idx) > 1 else [text_lines[data_idx[0]]]
        try:
            table = np.loadtxt(data, delimiter=",", comments=None, dtype=np.float64, ndmin=2)
        except ValueError as exc:
            err = _first_unparsable(name, data, line_no)
            raise (err or TrajectoryError(f"{name}: cannot parse rows: {exc}")) from None
        if table.shape[1] != 4:
            raise TrajectoryError(f"{name}: line {line_no[0]}: expected 4 comma-separated values "
                                  f"(frame,id,x,y), found {table.shape[1]}")
    return _validate(table, line_no, fps_f, ms_f, name, "line")


def tracks_from_table(table, fps: float, max_speed: float = DEFAULT_MAX_SPEED,
                      source: str = "<array>") -> Tracks:
    """Validate an in-memory float array of rows (frame, id, x, y); errors name the row (1-based)."""
    fps_f, ms_f = _check_rate(fps, max_speed)
    arr = np.asarray(table, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[1] != 4:
        raise TrajectoryError(f"{source}: table must have shape (n, 4) (frame, id, x, y), got {arr.shape}")
    return _validate(arr, np.arange(1, len(arr) + 1), fps_f, ms_f, source, "row")


def _validate(table: np.ndarray, line_no: np.ndarray, fps: float, max_speed: float,
              name: str, unit: str) -> Tracks:
    """Vectorised checks; the offending line is located only once a problem is known."""
    n = len(table)
    bad = ~np.isfinite(table)
    if bad.any():
        r, c = np.argwhere(bad)[0]
        raise TrajectoryError(f"{name}: {unit} {line_no[r]}: {HEADER[c]} is {float(table[r, c])} (must be finite)")
    ints = table[:, :2]
    bad = (ints != np.floor(ints)) | (np.abs(ints) >= _EXACT_INT)
    if bad.any():
        r, c = np.argwhere(bad)[0]
        raise TrajectoryError(f"{name}: {unit} {line_no[r]}: {HEADER[c]} must be an integer, got {float(table[r, c])}")
    frame = table[:, 0].astype(np.int64)
    pid = table[:, 1].astype(np.int64)
    xy = np.ascontiguousarray(table[:, 2:4])
    row = np.arange(n)

    # Duplicate (frame, id): sort by id, frame, then line order; equal neighbours are duplicates.
    order = np.lexsort((row, frame, pid))
    same = (pid[order][1:] == pid[order][:-1]) & (frame[order][1:] == frame[order][:-1])
    if same.any():
        first, second = order[:-1][same], order[1:][same]
        k = np.argmin(second)
        raise TrajectoryError(f"{name}: {unit}s {line_no[first[k]]} and {line_no[second[k]]}: duplicate sample "
                              f"for id {pid[second[k]]} at frame {frame[second[k]]}")

    # Each person's rows, in line order, must have strictly increasing frames.
    order = np.argsort(pid, kind="stable")
    f, p = frame[order], pid[order]
    cont = p[1:] == p[:-1]
    step = f[1:] - f[:-1]
    bad = cont & (step <= 0)
    if bad.any():
        prev, cur = order[:-1][bad], order[1:][bad]
        k = np.argmin(cur)
        raise TrajectoryError(f"{name}: {unit} {line_no[cur[k]]}: frame {frame[cur[k]]} of id {pid[cur[k]]} does not "
                              f"increase (its previous sample, {unit} {line_no[prev[k]]}, has frame {frame[prev[k]]})")

    xy = xy[order]
    frame, pid = f, p
    adjacent = cont & (step == 1)
    speed = np.hypot(*(xy[1:] - xy[:-1]).T) * fps
    bad = adjacent & (speed > max_speed)
    if bad.any():
        prev, cur = order[:-1][bad], order[1:][bad]
        k = np.argmin(cur)
        j = np.flatnonzero(bad)[k]
        raise TrajectoryError(f"{name}: {unit}s {line_no[prev[k]]} and {line_no[cur[k]]}: id {pid[j]} moves at "
                              f"{speed[j]:.3g} m/s between frames {frame[j]} and {frame[j + 1]} "
                              f"(max_speed {max_speed:g} m/s)")

    breaks = np.flatnonzero(~adjacent) + 1
    start = np.concatenate(([0], breaks, [n])).astype(np.int64) if n else np.zeros(1, np.int64)
    return Tracks(frame=frame, pid=pid, xy=xy, start=start, fps=fps, source=name)


def extract_records(tracks: Tracks) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Entry speed a, exit speed b, turn angle phi for every sample triple inside one segment.

    Records come out in row order of ``tracks`` (by person id, then frame).
    """
    xy, n = tracks.xy, len(tracks.xy)
    if n < 3:
        return np.empty(0), np.empty(0), np.empty(0)
    seg = np.repeat(np.arange(tracks.n_tracks), np.diff(tracks.start))
    ok = seg[:-2] == seg[2:]
    v = (xy[1:] - xy[:-1]) * tracks.fps
    v1, v2 = v[:-1][ok], v[1:][ok]
    a = np.hypot(v1[:, 0], v1[:, 1])
    b = np.hypot(v2[:, 0], v2[:, 1])
    cross = v1[:, 0] * v2[:, 1] - v1[:, 1] * v2[:, 0]
    dot = v1[:, 0] * v2[:, 0] + v1[:, 1] * v2[:, 1]
    phi = np.arctan2(cross, dot)
    phi[phi <= -np.pi] = np.pi  # atan2 may give -pi; the range is (-pi, pi]
    phi[(a < ZERO_SPEED) | (b < ZERO_SPEED)] = 0.0
    return a, b, phi


# ----------------------------------------------------------------------------------------------
# Record sets


def _bucket_bounds(n: int, buckets: int) -> np.ndarray:
    # Bucket k starts at floor(k*N/B): sizes differ by at most one and none is empty (B <= N).
    return ((np.arange(buckets + 1, dtype=np.int64) * n) // buckets).astype(np.int32)


def _readonly(x: np.ndarray, dtype) -> np.ndarray:
    out = np.array(x, dtype=dtype, copy=True, order="C")
    out.setflags(write=False)
    return out


class RecordSet:
    """An immutable set of motion records, sorted by entry speed and split into equal-count buckets.

    Arrays (read-only): a, b, phi float64[N]; bucket_start int32[B+1]; bucket_min_a float64[B].
    """

    __slots__ = ("a", "b", "phi", "bucket_start", "bucket_min_a", "dt", "source", "_hash")

    def __init__(self, *_args, **_kwargs):
        raise TypeError("use RecordSet.from_arrays, RecordSet.load or RecordSet.from_bytes")

    @classmethod
    def _build(cls, a, b, phi, dt, buckets, source) -> "RecordSet":
        # a, b, phi already validated and sorted.
        obj = object.__new__(cls)
        n = len(a)
        start = _bucket_bounds(n, buckets)
        sa = _readonly(a, np.float64)
        for name, val in (("a", sa), ("b", _readonly(b, np.float64)), ("phi", _readonly(phi, np.float64)),
                          ("bucket_start", _readonly(start, np.int32)),
                          ("bucket_min_a", _readonly(sa[start[:-1]], np.float64)),
                          ("dt", float(dt)), ("source", str(source)), ("_hash", None)):
            object.__setattr__(obj, name, val)
        return obj

    def __setattr__(self, name, value):
        raise AttributeError("RecordSet is immutable")

    def __delattr__(self, name):
        raise AttributeError("RecordSet is immutable")

    @classmethod
    def from_arrays(cls, a, b, phi, dt: float, buckets: int = 100, source: str = "") -> "RecordSet":
        """Validate, sort stably by a, and split into `buckets` equal-count buckets (1 <= buckets <= N)."""
        arrs = []
        for name, x in (("a", a), ("b", b), ("phi", phi)):
            try:
                arr = np.asarray(x, dtype=np.float64)
            except (TypeError, ValueError):
                raise RecordSetError(f"{name} must be an array of numbers") from None
            if arr.ndim != 1:
                raise RecordSetError(f"{name} must be one-dimensional, got shape {arr.shape}")
            arrs.append(arr)
        a_, b_, phi_ = arrs
        _check_records(a_, b_, phi_, dt, buckets, source, sorted_a=False)
        order = np.argsort(a_, kind="stable")
        return cls._build(a_[order], b_[order], phi_[order], float(dt), int(buckets), source)

    # -- basic properties -----------------------------------------------------------------------
    @property
    def n_records(self) -> int:
        return len(self.a)

    @property
    def n_buckets(self) -> int:
        return len(self.bucket_min_a)

    @property
    def content_hash(self) -> str:
        """Hex sha256 over B, dt and the little-endian bytes of all five arrays."""
        if self._hash is None:
            h = hashlib.sha256(FORMAT_TAG.encode())
            h.update(np.int64(self.n_buckets).astype("<i8").tobytes())
            h.update(np.float64(self.dt).astype("<f8").tobytes())
            for name, dtype in _ARRAYS:
                h.update(np.ascontiguousarray(getattr(self, name), dtype=dtype).tobytes())
            object.__setattr__(self, "_hash", h.hexdigest())
        return self._hash

    def __repr__(self) -> str:
        return (f"RecordSet(n_records={self.n_records}, n_buckets={self.n_buckets}, dt={self.dt:g}, "
                f"source={self.source[:40]!r}, hash={self.content_hash[:12]})")

    def __eq__(self, other) -> bool:
        if not isinstance(other, RecordSet):
            return NotImplemented
        return self.content_hash == other.content_hash and self.source == other.source

    __hash__ = None

    def __copy__(self):  # immutable: a copy is the same object
        return self

    def __deepcopy__(self, memo):
        return self

    def bucket_of(self, speed):
        """Bucket index of an agent moving at `speed` (scalar or array; per the shared contract)."""
        s = np.asarray(speed, dtype=np.float64)
        if np.isnan(s).any():
            raise ValueError("speed must not be NaN")
        k = np.searchsorted(self.bucket_min_a, s, side="right") - 1
        k = np.clip(k, 0, self.n_buckets - 1).astype(np.int32)
        return int(k) if k.ndim == 0 else k

    def with_buckets(self, buckets: int) -> "RecordSet":
        """Same records, split into a different number of buckets."""
        _check_buckets(buckets, self.n_records)
        return RecordSet._build(self.a, self.b, self.phi, self.dt, int(buckets), self.source)

    # -- serialisation --------------------------------------------------------------------------
    def to_bytes(self) -> bytes:
        """msgpack map: format tag, version, byte order, dt, source, B, N, arrays, hash, file_sha256.

        Each array is {dtype, shape, data} with little-endian raw bytes. ``hash`` is the content hash;
        ``file_sha256`` covers the packed map without itself, so any flipped byte is detected.
        """
        body = {
            "format": FORMAT_TAG,
            "version": FORMAT_VERSION,
            "byteorder": "<",
            "dt": float(self.dt),
            "source": self.source,
            "n_buckets": self.n_buckets,
            "n_records": self.n_records,
            "arrays": {name: {"dtype": dtype, "shape": list(getattr(self, name).shape),
                              "data": np.ascontiguousarray(getattr(self, name), dtype=dtype).tobytes()}
                       for name, dtype in _ARRAYS},
            "hash": self.content_hash,
        }
        packed = msgpack.packb(body, use_bin_type=True)
        body["file_sha256"] = hashlib.sha256(packed).hexdigest()
        return msgpack.packb(body, use_bin_type=True)

    @classmethod
    def from_bytes(cls, data: bytes) -> "RecordSet":
        """Parse and fully validate bytes from ``to_bytes``; any defect raises RecordSetError."""
        if not isinstance(data, (bytes, bytearray, memoryview)):
            raise RecordSetError(f"record data must be bytes, got {type(data).__name__}")
        data = bytes(data)
        if not data:
            raise RecordSetError("record data is empty")
        try:
            unpacker = msgpack.Unpacker(raw=False, strict_map_key=True, use_list=True,
                                        max_buffer_size=len(data), max_str_len=_MAX_SOURCE_CHARS * 4,
                                        max_bin_len=len(data), max_array_len=8, max_map_len=16, max_ext_len=0)
            unpacker.feed(data)
            obj = unpacker.unpack()
            trailing = unpacker.tell() != len(data)
        except Exception as exc:  # msgpack raises several types; all mean a malformed file
            raise RecordSetError(f"not a valid record-set file (msgpack: {type(exc).__name__}: {exc})") from None
        if trailing:
            raise RecordSetError(f"not a valid record-set file ({len(data) - unpacker.tell()} trailing bytes)")
        return _decode(obj)

    def save(self, path) -> None:
        """Write atomically: a temp file in the same folder, then os.replace; on failure the old file stays."""
        atomic_write(path, self.to_bytes())

    @classmethod
    def load(cls, path) -> "RecordSet":
        p = Path(path)
        try:
            size = p.stat().st_size
            if size > _MAX_FILE_BYTES:
                raise RecordSetError(f"{p}: file is {size} bytes, above the {_MAX_FILE_BYTES} byte limit")
            data = p.read_bytes()
        except OSError as exc:
            raise RecordSetError(f"{p}: cannot read record-set file: {exc.strerror or exc}") from None
        try:
            return cls.from_bytes(data)
        except RecordSetError as exc:
            raise RecordSetError(f"{p}: {exc}") from None


_ARRAYS = (("a", "<f8"), ("b", "<f8"), ("phi", "<f8"), ("bucket_start", "<i4"), ("bucket_min_a", "<f8"))


def _check_buckets(buckets, n: int) -> None:
    if isinstance(buckets, bool) or not isinstance(buckets, (int, np.integer)):
        raise RecordSetError(f"buckets must be an integer, got {buckets!r}")
    if not 1 <= int(buckets) <= n:
        raise RecordSetError(f"buckets must be between 1 and the number of records ({n}), got {buckets}")


def _check_records(a, b, phi, dt, buckets, source, sorted_a: bool) -> None:
    n = len(a)
    if len(b) != n or len(phi) != n:
        raise RecordSetError(f"a, b and phi must have equal lengths, got {len(a)}, {len(b)}, {len(phi)}")
    if n == 0:
        raise RecordSetError("a record set needs at least one record")
    for name, arr in (("a", a), ("b", b), ("phi", phi)):
        bad = ~np.isfinite(arr)
        if bad.any():
            raise RecordSetError(f"{name}[{int(np.argmax(bad))}] is not finite")
    for name, arr in (("a", a), ("b", b)):
        if (arr < 0).any():
            raise RecordSetError(f"{name}[{int(np.argmax(arr < 0))}] is negative (speeds are lengths)")
    bad = (phi <= -np.pi) | (phi > np.pi)
    if bad.any():
        raise RecordSetError(f"phi[{int(np.argmax(bad))}] = {phi[bad][0]!r} is outside (-pi, pi]")
    if sorted_a and (np.diff(a) < 0).any():
        raise RecordSetError("a is not sorted ascending")
    if isinstance(dt, bool) or not isinstance(dt, (int, float, np.floating, np.integer)) \
            or not (np.isfinite(dt) and dt > 0):
        raise RecordSetError(f"dt must be a finite number > 0 (seconds), got {dt!r}")
    if not isinstance(source, str):
        raise RecordSetError(f"source must be a string, got {type(source).__name__}")
    if len(source) > _MAX_SOURCE_CHARS:
        raise RecordSetError(f"source text is longer than {_MAX_SOURCE_CHARS} characters")
    _check_buckets(buckets, n)


def _decode(obj) -> RecordSet:
    """Validate a decoded map field by field, checking declared sizes before building arrays."""
    if not isinstance(obj, dict):
        raise RecordSetError("not a record-set file (top level is not a map)")
    if obj.get("format") != FORMAT_TAG:
        raise RecordSetError(f"not a record-set file (format tag {obj.get('format')!r}, expected {FORMAT_TAG!r})")
    if obj.get("version") != FORMAT_VERSION:
        raise RecordSetError(f"unsupported record-set version {obj.get('version')!r} (this build reads {FORMAT_VERSION})")
    expected = {"format", "version", "byteorder", "dt", "source", "n_buckets", "n_records", "arrays", "hash",
                "file_sha256"}
    if set(obj) != expected:
        raise RecordSetError(f"unexpected or missing fields: {sorted(set(obj) ^ expected)}")
    file_sha = obj.pop("file_sha256")
    if not isinstance(file_sha, str) or hashlib.sha256(msgpack.packb(obj, use_bin_type=True)).hexdigest() != file_sha:
        raise RecordSetError("file checksum mismatch (file_sha256): the data is corrupt")
    if obj["byteorder"] != "<":
        raise RecordSetError(f"unsupported byte order {obj['byteorder']!r}")
    n, nb, dt = obj["n_records"], obj["n_buckets"], obj["dt"]
    if not isinstance(n, int) or isinstance(n, bool) or n < 1:
        raise RecordSetError(f"n_records must be a positive integer, got {n!r}")
    if not isinstance(nb, int) or isinstance(nb, bool) or not 1 <= nb <= n:
        raise RecordSetError(f"n_buckets must be an integer in 1..n_records, got {nb!r}")
    if not isinstance(dt, float):
        raise RecordSetError(f"dt must be a float, got {dt!r}")
    arrays = obj["arrays"]
    if not isinstance(arrays, dict) or set(arrays) != {name for name, _ in _ARRAYS}:
        raise RecordSetError("arrays map is missing or has unexpected entries")
    shapes = {"a": n, "b": n, "phi": n, "bucket_start": nb + 1, "bucket_min_a": nb}
    out = {}
    for name, dtype in _ARRAYS:
        spec = arrays[name]
        if not isinstance(spec, dict) or set(spec) != {"dtype", "shape", "data"}:
            raise RecordSetError(f"array {name!r}: malformed entry")
        if spec["dtype"] != dtype:
            raise RecordSetError(f"array {name!r}: dtype {spec['dtype']!r}, expected {dtype!r}")
        if spec["shape"] != [shapes[name]]:
            raise RecordSetError(f"array {name!r}: shape {spec['shape']!r}, expected [{shapes[name]}]")
        raw = spec["data"]
        itemsize = np.dtype(dtype).itemsize
        if not isinstance(raw, bytes) or len(raw) != shapes[name] * itemsize:
            raise RecordSetError(f"array {name!r}: {len(raw) if isinstance(raw, bytes) else 'no'} data bytes, "
                                 f"expected {shapes[name] * itemsize}")
        out[name] = np.frombuffer(raw, dtype=dtype).astype(dtype[1:])  # native copy, owns its memory
    _check_records(out["a"], out["b"], out["phi"], dt, nb, obj["source"], sorted_a=True)
    rs = RecordSet._build(out["a"], out["b"], out["phi"], dt, nb, obj["source"])
    if not np.array_equal(rs.bucket_start, out["bucket_start"]):
        raise RecordSetError("bucket_start does not match the equal-count split of the records")
    if not np.array_equal(rs.bucket_min_a, out["bucket_min_a"]):
        raise RecordSetError("bucket_min_a does not match the first entry speed of each bucket")
    if rs.content_hash != obj["hash"]:
        raise RecordSetError("content hash mismatch: the data is corrupt")
    return rs


# ----------------------------------------------------------------------------------------------
# Convenience


def records_from_trajectories(paths, fps: float, buckets: int = 100, max_speed: float = DEFAULT_MAX_SPEED,
                              progress: bool = False) -> RecordSet:
    """Read trajectory CSVs (one path or several), extract and bucket their records.

    Every file is validated before anything is returned; records keep file order before the stable sort.
    """
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    paths = list(paths)
    if not paths:
        raise TrajectoryError("no trajectory files given")
    it: Iterable = paths
    if progress:
        from tqdm import tqdm
        it = tqdm(paths, desc="trajectories", unit="file")
    parts = [extract_records(read_trajectories(p, fps, max_speed)) for p in it]
    a, b, phi = (np.concatenate([part[i] for part in parts]) for i in range(3))
    if len(a) == 0:
        raise TrajectoryError(f"no records: no track in {', '.join(map(str, paths))} has three consecutive frames")
    names = ", ".join(Path(p).name for p in paths)
    source = f"trajectories ({names}) at {float(fps):g} fps"
    return RecordSet.from_arrays(a, b, phi, dt=1.0 / float(fps), buckets=buckets, source=source[:_MAX_SOURCE_CHARS])


DEFAULT_PATH = Path(__file__).parent / "data" / "default.records"


@functools.lru_cache(maxsize=1)
def default_record_set() -> RecordSet:
    """The bundled demo set (invented synthetic walkers, see crowdcore.walker); loaded once."""
    return RecordSet.load(DEFAULT_PATH)
