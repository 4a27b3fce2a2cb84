"""Snapshots: exact continuation (any frame, 1 or 2 threads, fresh process), a pinned golden hash,
atomic files, and a loader that refuses every kind of damaged or hostile input with a SnapshotError kind."""
import functools
import hashlib
import os
import resource
import subprocess
import sys
import textwrap

import msgpack
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

import crowdcore
from crowdcore import _jit
from crowdcore import snapshot as snap
from crowdcore.errors import SnapshotError
from crowdcore.records import RecordSet
from crowdcore.world import AGENT_FIELDS

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..")
CROSSING = os.path.join(ROOT, "samples", "scenes", "crossing.toml")
TWO_THREADS = _jit.max_threads() >= 2


@pytest.fixture(autouse=True)
def _restore_threads():
    yield
    _jit.set_threads(_jit.max_threads())


def same_state(a, b):
    """Bit-for-bit equality of every state array and counter (not just the hash)."""
    assert a.state_hash() == b.state_hash()
    for k in AGENT_FIELDS:
        assert a.agents[k].dtype == b.agents[k].dtype
        assert a.agents[k].tobytes() == b.agents[k].tobytes(), k
    assert (a.frame, a.next_id, a.arrived_total) == (b.frame, b.next_id, b.arrived_total)
    assert np.float64(a.time).tobytes() == np.float64(b.time).tobytes()
    assert a.rng.bit_generator.state == b.rng.bit_generator.state


def tiny_records():
    """Invented records (uniform random): a small set keeps world rebuilds cheap in the fuzz loops."""
    rng = np.random.default_rng(0)
    return RecordSet.from_arrays(rng.uniform(0, 2, 300), rng.uniform(0, 2, 300), rng.uniform(-1, 1, 300), dt=0.1,
                                 buckets=10, source="invented test records")


def small_world(seed=3, n=12, avoidance="orca", records=None):
    """Invented test scene: a 12 m square room with one interior wall and two exits."""
    w = crowdcore.World(params=crowdcore.Params(avoidance=avoidance), records=records, seed=seed)
    w.add_wall([[0, 0], [12, 0], [12, 12], [0, 12]], closed=True)
    w.add_wall([[6, 3], [6, 8]])
    w.add_target("east", "rect", (10.5, 5, 11.8, 7))
    w.add_target("north", "circle", (3, 10.8, 0.9))
    rng = np.random.default_rng(seed)
    xs = rng.permutation(np.array([[x, y] for x in np.arange(1.0, 5.6, 0.7) for y in np.arange(1.0, 11.0, 0.7)]))
    w.add_agents(xs[:n], target=rng.integers(0, 2, n), pref_speed=rng.uniform(0.8, 1.6, n), radius=0.25)
    return w


# ------------------------------------------------------------------ exact continuation
@st.composite
def scenes(draw):
    """Small generated scenes: a rim, a few walls, 1-2 targets, 5-40 agents, either avoidance model."""
    seed = draw(st.integers(0, 2**31))
    rng = np.random.default_rng(seed)
    size = draw(st.floats(8.0, 16.0))
    w = crowdcore.World(params=crowdcore.Params(avoidance=draw(st.sampled_from(["orca", "social-force"]))), seed=seed)
    w.add_wall([[0, 0], [size, 0], [size, size], [0, size]], closed=True)
    for _ in range(draw(st.integers(0, 3))):
        a = rng.uniform(1, size - 1, 2)
        w.add_wall([a, a + rng.uniform(-3, 3, 2)])
    for k in range(draw(st.integers(1, 2))):
        c = rng.uniform(1.5, size - 1.5, 2)
        if rng.random() < 0.5:
            w.add_target(f"t{k}", "circle", (c[0], c[1], 0.8))
        else:
            w.add_target(f"t{k}", "rect", (c[0] - 0.7, c[1] - 0.7, c[0] + 0.7, c[1] + 0.7))
    n = draw(st.integers(5, 40))
    cells = np.array([[x, y] for x in np.arange(0.6, size - 0.5, 0.65) for y in np.arange(0.6, size - 0.5, 0.65)])
    pos = rng.permutation(cells)[:n] + rng.uniform(-0.05, 0.05, (min(n, len(cells)), 2))
    if draw(st.booleans()):  # an agent outside the rim grows the grids (their bounds must be stored)
        pos = np.vstack([pos, [[size + 3.5, size / 2]]])
    w.add_agents(pos, target=rng.integers(0, len(w.scene.targets), len(pos)), pref_speed=rng.uniform(0.5, 1.8, len(pos)),
                 radius=rng.uniform(0.18, 0.28, len(pos)), velocity=rng.normal(0, 0.3, (len(pos), 2)))
    return w


@settings(max_examples=14, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(scenes(), st.integers(0, 6), st.integers(1, 6), st.sampled_from([1, 2]), st.sampled_from([1, 2]),
       st.sampled_from(["new", "restore", "fork"]))
def test_restore_then_step_is_bit_identical(w, k, m, threads_a, threads_b, how):
    if not TWO_THREADS:
        threads_a = threads_b = 1
    _jit.set_threads(threads_a)
    w.run(k)
    data = w.snapshot()
    if how == "new":
        r = crowdcore.World.from_snapshot(data)
    elif how == "fork":
        r = snap.loads(data, like=w)
    else:  # rewind another live world of the same scene (derived data reused, state swapped)
        r = snap.loads(data)
        r.run(2)
        assert snap.restore(r, data) is True
    same_state(w, r)
    w.run(m)
    _jit.set_threads(threads_b)
    r.run(m)
    same_state(w, r)


def test_snapshot_at_every_frame_continues_exactly():
    w = small_world(avoidance="social-force")
    ref = small_world(avoidance="social-force")
    ref.run(8)
    for f in range(8):
        r = crowdcore.World.from_snapshot(w.snapshot()) if f % 2 else snap.loads(w.snapshot(), like=w)
        r.run(8 - f)
        same_state(ref, r)
        w.step()


def test_restore_with_another_scene_replaces_everything():
    a, b = small_world(n=8), crowdcore.load_scenario(CROSSING)
    a.run(3)
    data = a.snapshot()
    assert snap.restore(b, data) is False
    same_state(a, b)
    assert b.scene.to_dict() == a.scene.to_dict() and b._cache.bounds == a._cache.bounds
    a.run(4)
    b.run(4)
    same_state(a, b)


# Golden state hash of samples/scenes/crossing.toml after 40 frames (default dt 0.1, bundled records).
# Holds on x86_64 Linux, Python 3.11.7, numpy 2.4.6, numba 0.68.1 (glibc 2.36); the same on 1 and 2 threads.
# Any change to the step, the scene, the records or state_hash() moves it: re-pin it only together with an
# explanation in the commit message of why the trajectories were meant to change.
# re-pinned: the queue gap is kept only from a neighbour nearer the shared target along the route; before
# that, record velocities by the angle-sum formulas with stored cos/sin of each turn angle
GOLDEN_CROSSING_40 = "ad8cf21189e6e109fa9241abd2769427"


@pytest.mark.parametrize("threads", [1, 2])
def test_golden_state_hash_crossing(threads):
    if threads > _jit.max_threads():
        pytest.skip("needs 2 threads")
    _jit.set_threads(threads)
    w = crowdcore.load_scenario(CROSSING)
    w.run(20)
    w = crowdcore.World.from_snapshot(w.snapshot())  # the golden run passes through a snapshot on the way
    w.run(20)
    assert w.frame == 40
    assert w.state_hash() == GOLDEN_CROSSING_40


FRESH = textwrap.dedent("""
    import sys, crowdcore
    from crowdcore import _jit
    _jit.set_threads(int(sys.argv[2]))
    w = crowdcore.World.load(sys.argv[1])
    w.run(int(sys.argv[3]))
    print(w.state_hash())
""")


def test_fresh_process_continues_exactly(tmp_path):
    w = crowdcore.load_scenario(CROSSING)
    w.run(7)
    path = tmp_path / "w.snap"
    w.save(path)
    w.run(9)
    env = {**os.environ, "PYTHONPATH": ROOT}
    for threads in ([1, 2] if TWO_THREADS else [1]):
        out = subprocess.run([sys.executable, "-c", FRESH, str(path), str(threads), "9"], env=env, cwd=ROOT,
                             capture_output=True, text=True, timeout=300)
        assert out.returncode == 0, out.stderr
        assert out.stdout.strip() == w.state_hash()


# ------------------------------------------------------------------ contents and files
def test_snapshot_contents_are_self_describing():
    w = small_world()
    w.run(2)
    outer = msgpack.unpackb(w.snapshot(), raw=False)
    assert (outer["format"], outer["version"], outer["byteorder"]) == ("crowdcore-snapshot", 2, "little")
    assert outer["hash"] == hashlib.sha256(outer["body"]).hexdigest()
    body = msgpack.unpackb(outer["body"], raw=False)
    for k, (dt, cols) in AGENT_FIELDS.items():
        a = body["agents"][k]
        assert a["dtype"] == np.dtype(dt).newbyteorder("<").str
        assert a["shape"] == ([w.agent_count, cols] if cols else [w.agent_count])
    assert body["frame"] == 2 and body["records"] is None  # bundled set referenced by hash
    static = msgpack.unpackb(body["static"], raw=False)
    assert static["records_hash"] == w.records.content_hash


def test_custom_record_set_is_embedded_or_required():
    rs = tiny_records()
    w = crowdcore.World(records=rs)
    w.add_target("t", "circle", (5, 0, 1))
    w.add_agents([[0, 0], [1, 1]])
    w.run(3)
    r = crowdcore.World.from_snapshot(w.snapshot())
    assert r.records.content_hash == rs.content_hash
    same_state(w, r)
    lean = w.snapshot(embed_records=False)
    with pytest.raises(snap.SnapshotRecordsError, match="record set"):
        crowdcore.World.from_snapshot(lean)
    same_state(w, crowdcore.World.from_snapshot(lean, records=rs))


def test_save_load_and_atomic_write(tmp_path, monkeypatch):
    w = small_world()
    path = tmp_path / "w.snap"
    w.save(path)
    old = path.read_bytes()
    w.run(2)

    def boom(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", boom)
    with pytest.raises(OSError):
        w.save(path)
    monkeypatch.undo()
    assert path.read_bytes() == old and os.listdir(tmp_path) == ["w.snap"]  # old file intact, no temp left
    w.save(path)
    same_state(w, crowdcore.World.load(path))
    with pytest.raises(SnapshotError, match="cannot read"):
        crowdcore.World.load(tmp_path / "missing.snap")


# ------------------------------------------------------------------ damaged and hostile input
def envelope(body, **over):
    raw = msgpack.packb(body, use_bin_type=True)
    doc = {"format": "crowdcore-snapshot", "version": 2, "byteorder": "little",
           "hash": hashlib.sha256(raw).hexdigest(), "body": raw}
    doc.update(over)
    return msgpack.packb(doc, use_bin_type=True)


def body_of(w):
    return snap.world_body(w)


def restamp_static(body, edit):
    st_ = msgpack.unpackb(body["static"], raw=False)
    edit(st_)
    body["static"] = msgpack.packb(st_, use_bin_type=True)
    return body


def _agents(edit):
    def f(b):
        edit(b["agents"])
        return b
    return f


def _arr(name, value):
    return _agents(lambda a: a.__setitem__(name, snap.pack_array(value)))


CASES = {
    "truncated": (lambda w: w.snapshot()[:-7], snap.SnapshotCorruptError, "truncated"),
    "empty": (lambda w: b"", snap.SnapshotCorruptError, "empty"),
    "not bytes": (lambda w: "text", snap.SnapshotFormatError, "expected bytes"),
    "trailing": (lambda w: w.snapshot() + b"\x00", snap.SnapshotCorruptError, "trailing"),
    "bit flip in body": (lambda w: (lambda d: d[:-100] + bytes([d[-100] ^ 4]) + d[-99:])(w.snapshot()),
                         snap.SnapshotCorruptError, "hash mismatch"),
    "wrong version": (lambda w: envelope(body_of(w), version=99), snap.SnapshotFormatError, "version 99"),
    "wrong byte order": (lambda w: envelope(body_of(w), byteorder="big"), snap.SnapshotFormatError, "byte order"),
    "not a snapshot": (lambda w: msgpack.packb({"hello": 1}), snap.SnapshotFormatError, "not a crowdcore"),
    "hash mismatch": (lambda w: envelope(body_of(w), hash="0" * 64), snap.SnapshotCorruptError, "hash mismatch"),
    "big-endian array": (lambda w: envelope(_agents(lambda a: a["pos"].update(
        dtype=">f8", data=w.agents["pos"].astype(">f8").tobytes()))(body_of(w))),
                         snap.SnapshotFormatError, "dtype '>f8'"),
    "wrong dtype": (lambda w: envelope(_arr("ids", w.agents["ids"].astype(np.int64))(body_of(w))),
                    snap.SnapshotCorruptError, "ids: dtype"),
    "short column": (lambda w: envelope(_arr("vel", w.agents["vel"][:-1])(body_of(w))),
                     snap.SnapshotCorruptError, "rows"),
    "bad columns": (lambda w: envelope(_arr("pos", np.zeros((w.agent_count, 3)))(body_of(w))),
                    snap.SnapshotCorruptError, "columns"),
    "shape vs bytes": (lambda w: envelope(_agents(lambda a: a["pos"].update(shape=[5, 2]))(body_of(w))),
                       snap.SnapshotCorruptError, "do not fit"),
    "absurd shape": (lambda w: envelope(_agents(lambda a: a["pos"].update(shape=[2**40, 2]))(body_of(w))),
                     snap.SnapshotCorruptError, "bad shape"),
    "absurd count": (lambda w: envelope(_agents(lambda a: a["pos"].update(shape=[2**27, 2]))(body_of(w))),
                     snap.SnapshotLimitError, "exceed"),
    "NaN position": (lambda w: envelope(_arr("pos", np.where(np.arange(w.agent_count)[:, None] == 2, np.nan,
                                                               w.agents["pos"]))(body_of(w))),
                     snap.SnapshotCorruptError, "NaN"),
    "unsorted ids": (lambda w: envelope(_arr("ids", w.agents["ids"][::-1].copy())(body_of(w))),
                     snap.SnapshotCorruptError, "increasing"),
    "missing target": (lambda w: envelope(_arr("target", np.full(w.agent_count, 9, np.int32))(body_of(w))),
                       snap.SnapshotCorruptError, "missing target"),
    "missing field": (lambda w: envelope({k: v for k, v in body_of(w).items() if k != "frame"}),
                      snap.SnapshotCorruptError, "frame: missing"),
    "negative frame": (lambda w: envelope({**body_of(w), "frame": -1}), snap.SnapshotCorruptError, "frame"),
    "next_id too low": (lambda w: envelope({**body_of(w), "next_id": 1}), snap.SnapshotCorruptError, "next_id"),
    "rng": (lambda w: envelope({**body_of(w), "rng": {"bit_generator": "MT19937"}}), snap.SnapshotCorruptError, "PCG64"),
    "ext type": (lambda w: envelope({**body_of(w), "name": msgpack.ExtType(1, b"x")}),
                 snap.SnapshotCorruptError, "msgpack"),
    "huge grid": (lambda w: envelope(restamp_static(body_of(w), lambda s: s.update(bounds=[-1e7, -1e7, 1e7, 1e7]))),
                  snap.SnapshotLimitError, "navigation grid"),
    "tiny cell": (lambda w: envelope(restamp_static(body_of(w), lambda s: s["params"].update(nav_cell=1e-4))),
                  snap.SnapshotLimitError, "navigation grid"),
    "bad params": (lambda w: envelope(restamp_static(body_of(w), lambda s: s["params"].update(avoidance="none"))),
                   snap.SnapshotCorruptError, "avoidance"),
    "wall counts": (lambda w: envelope(restamp_static(body_of(w), lambda s: s["scene"].update(
        wall_counts=snap.pack_array(np.array([4, 99], np.int64))))), snap.SnapshotCorruptError, "add up"),
    "other records": (lambda w: envelope(restamp_static(body_of(w), lambda s: s.update(records_hash="ab" * 32))),
                      snap.SnapshotRecordsError, "record set"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_damaged_snapshot_is_refused_and_live_world_untouched(case):
    make, kind, text = CASES[case]
    w = small_world()
    w.run(2)
    live = snap.loads(w.snapshot())
    before = live.state_hash()
    data = make(w)
    with pytest.raises(kind, match=text):
        snap.restore(live, data)
    with pytest.raises(kind, match=text):
        crowdcore.World.from_snapshot(data)
    assert live.state_hash() == before
    assert live.scene is not None and live.agent_count == w.agent_count


def mutate(data, rng):
    """One random bit flip, byte overwrite, truncation, insertion or deletion."""
    d = bytearray(data)
    kind = rng.integers(5)
    i = int(rng.integers(len(d)))
    if kind == 0:
        d[i] ^= 1 << int(rng.integers(8))
    elif kind == 1:
        d[i] = int(rng.integers(256))
    elif kind == 2:
        del d[i:]
    elif kind == 3:
        d[i:i] = bytes(rng.integers(0, 256, int(rng.integers(1, 9)), dtype=np.uint8))
    else:
        del d[i:i + int(rng.integers(1, 9))]
    return bytes(d)


def _check_refused_or_exact(live, data, original, reference_hash):
    before = live.state_hash()
    try:
        snap.restore(live, data)
    except SnapshotError:
        assert live.state_hash() == before
        return False
    if data != original:  # a change that survived every check must at least decode to a valid world
        assert live.agent_count >= 0
    else:
        assert live.state_hash() == reference_hash
    return True


def test_fuzz_mutated_snapshots_only_raise_snapshot_error():
    w = small_world(n=10, records=tiny_records())
    w.run(3)
    data = w.snapshot()
    live = snap.loads(data)
    rng = np.random.default_rng(12345)
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    for _ in range(2500):  # raw mutations: all stop at the envelope or the content hash unless bytes are unchanged
        m = mutate(data, rng)
        assert not _check_refused_or_exact(live, m, data, w.state_hash()) or m == data
    # Mutations of the body with a freshly computed hash reach the decoder and the field checks.
    outer = msgpack.unpackb(data, raw=False)
    for _ in range(1200):
        body = mutate(outer["body"], rng)
        forged = msgpack.packb({**outer, "body": body, "hash": hashlib.sha256(body).hexdigest()}, use_bin_type=True)
        _check_refused_or_exact(live, forged, data, w.state_hash())
        snap.restore(live, data)
    assert live.state_hash() == w.state_hash()
    grown_mb = (resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - rss) / 1024
    assert grown_mb < 300, f"peak memory grew by {grown_mb:.0f} MB while fuzzing"


JSONISH = st.recursive(st.none() | st.booleans() | st.integers(-2**63, 2**64 - 1) | st.floats() | st.text(max_size=8)
                       | st.binary(max_size=24),
                       lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
                       max_leaves=12)


@functools.lru_cache(maxsize=1)
def fuzz_worlds():
    w = small_world(n=6, records=tiny_records())
    return w, snap.loads(w.snapshot())


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.sampled_from(["static", "records", "agents", "last_arrived", "seed", "rng", "frame", "time", "next_id",
                        "arrived_total", "name", "default_frames", "params", "scene", "bounds", "extra_bounds",
                        "pos", "ids"]), JSONISH)
def test_fuzz_structured_fields_only_raise_snapshot_error(field, value):
    w, live = fuzz_worlds()
    b = body_of(w)
    if field in ("params", "scene", "bounds", "extra_bounds"):
        b = restamp_static(b, lambda s: s.__setitem__(field, value))
    elif field in ("pos", "ids"):
        b["agents"][field] = value
    else:
        b[field] = value
    try:
        data = envelope(b)
    except (TypeError, ValueError, OverflowError):
        return  # msgpack itself cannot write this value
    if not _check_refused_or_exact(live, data, None, None):
        return
    snap.restore(live, w.snapshot())  # an accepted value (e.g. another name) was valid: put the state back
    assert live.state_hash() == w.state_hash()
