"""Recordings: host commands + per-frame hashes replay bit-identically (also in a fresh process), divergence is
located to the frame and agent, a crashed or truncated recording leaves a checkable prefix, damage raises."""
import os
import subprocess
import sys
import textwrap

import msgpack
import numpy as np
import pytest

import crowdcore
from crowdcore import cli
from crowdcore.errors import SnapshotError
from crowdcore.records import RecordSet
from crowdcore.recording import Recorder, pack_entry, read_recording, replay
from crowdcore.snapshot import SnapshotCorruptError, SnapshotFormatError

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..")


def tiny_records():
    """Invented records (uniform random), small so that world builds stay cheap."""
    rng = np.random.default_rng(1)
    return RecordSet.from_arrays(rng.uniform(0, 2, 300), rng.uniform(0, 2, 300), rng.uniform(-1, 1, 300), dt=0.1,
                                 buckets=10, source="invented test records")


def room(records=None):
    """Invented test scene: a 12 m square room with two exits and 10 agents."""
    w = crowdcore.World(records=records, seed=5)
    w.add_wall([[0, 0], [12, 0], [12, 12], [0, 12]], closed=True)
    w.add_target("east", "rect", (10.5, 5, 11.8, 7))
    w.add_target("north", "circle", (6, 10.8, 0.9))
    rng = np.random.default_rng(5)
    w.add_agents(1.0 + 0.8 * np.column_stack([np.arange(10) % 5, np.arange(10) // 5]) * [1, 2] + [0, 1],
                 target=rng.integers(0, 2, 10), pref_speed=rng.uniform(1.0, 1.5, 10))
    return w


def record_session(w, path, close=True):
    """Every kind of host command between steps; returns the live world's hash after each step."""
    hashes = []
    rec = Recorder(w, path)
    step = lambda: (w.step(), hashes.append(w.state_hash()))  # noqa: E731
    for _ in range(3):
        step()
    ids = w.add_agents([[2.0, 9.0], [3.0, 9.5]], target="north", velocity=[[0.3, 0.0], [0.0, 0.2]], group=0)
    step()
    w.set_target(ids[:1], "east")
    w.step(0.05)
    hashes.append(w.state_hash())
    w.remove_agents(w.ids[:2])
    w.set_params(avoidance="social-force", weights={"direction": 0.8})
    step()
    w.add_wall([[8.0, 2.0], [8.0, 4.0]])
    w.add_obstacle([[4, 4], [4.6, 4], [4.6, 4.6]])
    w.add_target("west", "circle", (1.0, 6.0, 0.5))
    w.set_bounds(-3, -3, 15, 15)
    step()
    w.set_params(avoidance="orca")
    for _ in range(3):
        step()
    w.set_target(w.ids[-1:], "west")  # after the last step: kept by the end entry
    if close:
        rec.close()
    return rec, hashes


def test_replay_is_identical_and_ends_in_the_same_state(tmp_path):
    w = room(tiny_records())
    path = tmp_path / "run.ccrec"
    _, hashes = record_session(w, path)
    frames = []
    report = replay(path, on_frame=lambda x: frames.append(x.state_hash()))
    assert report.identical and report.complete and not report.truncated, report
    assert report.frames_checked == len(hashes) == 10
    assert frames == hashes
    assert report.world.state_hash() == w.state_hash()
    assert report.world.agents["target"].tolist() == w.agents["target"].tolist()
    assert report.world.scene.to_dict() == w.scene.to_dict()
    assert "identical over 10 frames" in str(report)
    assert replay(path, max_frames=4).frames_checked == 4


def test_recording_in_python_replays_in_fresh_process(tmp_path):
    w = room()  # bundled record set, referenced by hash
    path = tmp_path / "run.ccrec"
    record_session(w, path)
    code = textwrap.dedent("""
        import sys
        from crowdcore.recording import replay
        r = replay(sys.argv[1])
        print(r.identical, r.frames_checked, r.world.state_hash())
    """)
    out = subprocess.run([sys.executable, "-c", code, str(path)], env={**os.environ, "PYTHONPATH": ROOT}, cwd=ROOT,
                         capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["True", "10", w.state_hash()]


def rewrite(path, out, edit):
    """Copy a recording, passing each decoded entry through edit(index, entry)."""
    with open(out, "wb") as f:
        for k, obj in enumerate(read_recording(path)):
            obj = edit(k, obj)
            f.write(msgpack.packb(obj, use_bin_type=True) if k == 0 else pack_entry(obj))


def test_divergence_names_frame_and_agent(tmp_path):
    w = room(tiny_records())
    path, bad = tmp_path / "run.ccrec", tmp_path / "bad.ccrec"
    rec = Recorder(w, path)
    w.run(4)
    victim = int(w.ids[3])
    w.set_target([victim], "north" if w.agents["target"][3] == 0 else "east")
    w.run(4)
    rec.close()

    def edit(k, obj):  # the replayed host "forgets" the retarget: only the victim moves differently at first
        if k == 5:
            assert obj["commands"][0][0] == "set_target"
            obj["commands"] = []
        return obj

    rewrite(path, bad, edit)
    report = replay(bad)
    assert not report.identical
    assert (report.diverged_at_frame, report.diverged_agent, report.frames_checked) == (5, victim, 4)
    assert f"diverged at frame 5, first differing agent id {victim}" in str(report)
    assert cli.main(["replay", str(bad), "--quiet"]) == 1


def test_crash_leaves_a_readable_prefix_and_truncation_is_reported(tmp_path):
    w = room(tiny_records())
    path = tmp_path / "run.ccrec"
    rec, hashes = record_session(w, path, close=False)  # "crash": never closed, but flushed per frame
    report = replay(path)
    assert report.identical and not report.complete and not report.truncated
    assert report.frames_checked == len(hashes)
    assert "not closed" in str(report)
    rec.close()
    data = path.read_bytes()
    cut = tmp_path / "cut.ccrec"
    cut.write_bytes(data[:-40])
    report = replay(cut)
    assert report.identical and report.truncated and report.frames_checked == len(hashes)
    u = msgpack.Unpacker()
    u.feed(data)
    u.unpack()
    head = u.tell()
    cut.write_bytes(data[: head + (len(data) - head) * 2 // 3])
    report = replay(cut)
    assert report.identical and report.truncated and 0 < report.frames_checked < len(hashes)
    assert "truncated" in str(report)
    cut.write_bytes(data[:200])  # inside the header: nothing to replay
    with pytest.raises(SnapshotFormatError, match="truncated inside its header"):
        replay(cut)


def test_cli_replay_and_gif(tmp_path, capsys):
    w = room(tiny_records())
    path = tmp_path / "run.ccrec"
    record_session(w, path)
    gif = tmp_path / "replay.gif"
    assert cli.main(["replay", str(path), "--quiet", "--gif", str(gif), "--every", "2"]) == 0
    assert gif.stat().st_size > 0 and gif.read_bytes()[:3] == b"GIF"
    assert "identical over 10 frames" in capsys.readouterr().out
    assert cli.main(["replay", str(tmp_path / "missing.ccrec"), "--quiet"]) == 2


def test_recorder_rules(tmp_path):
    w = room(tiny_records())
    with Recorder(w, tmp_path / "a.ccrec"):
        with pytest.raises(SnapshotError, match="recorded already"):
            Recorder(w, tmp_path / "b.ccrec")
        w.step()
    assert w._journal is None
    Recorder(w, tmp_path / "c.ccrec").close()   # a recorder can attach again once closed
    assert replay(tmp_path / "c.ccrec").frames_checked == 0


@pytest.mark.parametrize("edit, kind, text", [
    (lambda k, o: {**o, "format": "other"} if k == 0 else o, SnapshotFormatError, "not a crowdcore recording"),
    (lambda k, o: {**o, "version": 7} if k == 0 else o, SnapshotFormatError, "version 7"),
    (lambda k, o: {**o, "snapshot": o["snapshot"][:-3]} if k == 0 else o, SnapshotCorruptError, "truncated"),
    (lambda k, o: {**o, "commands": [["exec", {}]]} if k == 2 else o, SnapshotCorruptError, "unknown command"),
    (lambda k, o: {**o, "commands": [["remove_agents", {"ids": [10**6]}]]} if k == 2 else o,
     SnapshotCorruptError, "unknown agent id"),
    (lambda k, o: {**o, "commands": [["set_params", {"bogus": 1}]]} if k == 2 else o, SnapshotCorruptError, "bogus"),
    (lambda k, o: {**o, "dt": -1.0} if k == 2 else o, SnapshotCorruptError, "dt"),
    (lambda k, o: {**o, "dt": "fast"} if k == 2 else o, SnapshotCorruptError, "dt"),
    (lambda k, o: [1, 2] if k == 2 else o, SnapshotCorruptError, "malformed"),
])
def test_damaged_recordings_raise(tmp_path, edit, kind, text):
    w = room(tiny_records())
    path, bad = tmp_path / "run.ccrec", tmp_path / "bad.ccrec"
    with Recorder(w, path):
        w.run(4)
    rewrite(path, bad, edit)
    with pytest.raises(kind, match=text):
        replay(bad)


def test_fuzz_mutated_recordings(tmp_path):
    w = room(tiny_records())
    path = tmp_path / "run.ccrec"
    with Recorder(w, path):
        w.run(2)
        w.add_agents([[3, 3]], target=1)
        w.run(2)
    data = path.read_bytes()
    rng = np.random.default_rng(7)
    bad = tmp_path / "bad.ccrec"
    outcomes = {"refused": 0, "diverged": 0, "identical": 0}
    for _ in range(300):
        d = bytearray(data)
        i = int(rng.integers(len(d)))
        if rng.random() < 0.7:
            d[i] ^= 1 << int(rng.integers(8))
        else:
            del d[i:]
        bad.write_bytes(bytes(d))
        try:
            r = replay(bad)
        except SnapshotError:
            outcomes["refused"] += 1
            continue
        outcomes["identical" if r.identical else "diverged"] += 1
    assert outcomes["refused"] > 0 and sum(outcomes.values()) == 300


def test_hostile_command_sizes_are_refused(tmp_path):
    w = room(tiny_records())
    path, bad = tmp_path / "run.ccrec", tmp_path / "bad.ccrec"
    with Recorder(w, path):
        w.step()
        w.add_agents([[3.0, 3.0]], target=1)
        w.step()

    def edit(k, obj):  # an agent 10^6 m away would need a navigation grid of ~10^11 cells
        if k == 2:
            obj["commands"][0][1]["positions"]["__array__"]["data"] = np.array([[1e6, 1e6]]).tobytes()
        return obj

    rewrite(path, bad, edit)
    with pytest.raises(SnapshotError, match="navigation grid"):
        replay(bad)
