"""Snapshot benchmark (not a test): save/load time and size for 1k, 10k and 100k agents.

    NUMBA_CACHE_DIR=/tmp/nc python bench/snapshot_bench.py [--out DIR] [--runs 7] [--sizes 1000,10000,100000]

Measured per size (medians over --runs, after one warm-up run outside the timing):
  dumps        World.snapshot() -> bytes
  save         World.save(path)  (dumps + atomic write with fsync)
  decode       crowdcore.snapshot.decode(bytes): envelope, hash and full validation, nothing built
  from_bytes   World.from_snapshot(bytes): decode + a NEW world (navigation fields and record index rebuilt)
  load         World.load(path)
  restore      crowdcore.snapshot.restore(live_world, bytes): validated in-place swap reusing derived data
  rebuild_*    the parts of from_bytes that are derived-data rebuilds (record index, scene cache)
Target (issue 4): 10k agents save + load under 20 ms, size under 2 MB beyond the record set.
Writes snapshot_bench.json and snapshot_bench.png into --out.
"""
import argparse
import json
import os
import platform
import statistics
import sys
import tempfile
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

import crowdcore  # noqa: E402
from crowdcore import snapshot as snap  # noqa: E402
from crowdcore.choose import RecordIndex  # noqa: E402
from crowdcore.scene import SceneCache  # noqa: E402


def make_world(n, seed=1):
    """Invented test scene: an open square with two exits, agents on a jittered lattice, random velocities."""
    side = max(20.0, float(np.ceil(np.sqrt(n) * 0.8)) + 4.0)
    w = crowdcore.World(seed=seed)
    w.add_wall([[0, 0], [side, 0], [side, side], [0, side]], closed=True)
    w.add_target("east", "rect", (side - 1.0, side / 2 - 1, side - 0.2, side / 2 + 1))
    w.add_target("north", "rect", (side / 2 - 1, side - 1.0, side / 2 + 1, side - 0.2))
    rng = np.random.default_rng(seed)
    k = int(np.ceil(np.sqrt(n)))
    gx, gy = np.meshgrid(np.arange(k), np.arange(k))
    pos = 2.0 + 0.8 * np.column_stack([gx.ravel(), gy.ravel()])[:n] + rng.uniform(-0.05, 0.05, (n, 2))
    vel = rng.normal(0, 0.5, (n, 2))
    w.add_agents(pos, target=rng.integers(0, 2, n), pref_speed=rng.uniform(1.0, 1.6, n), radius=0.25, velocity=vel)
    return w


def timed(fn, runs):
    fn()  # warm-up, not timed
    out = []
    for _ in range(runs):
        t = time.perf_counter()
        fn()
        out.append((time.perf_counter() - t) * 1e3)
    return statistics.median(out)


def bench_size(n, runs, folder):
    w = make_world(n)
    data = w.snapshot()
    path = os.path.join(folder, f"w{n}.snap")
    w.save(path)
    live = snap.build_world(snap.decode(data))
    row = {"agents": n, "bytes": len(data), "mb": len(data) / 1e6,
           "records_embedded": False, "nav_cells": int(w._cache.nav.nx * w._cache.nav.ny)}
    row["dumps_ms"] = timed(w.snapshot, runs)
    row["save_ms"] = timed(lambda: w.save(path), runs)
    row["decode_ms"] = timed(lambda: snap.decode(data), runs)
    row["from_bytes_ms"] = timed(lambda: crowdcore.World.from_snapshot(data), max(3, runs // 2))
    row["load_ms"] = timed(lambda: crowdcore.World.load(path), max(3, runs // 2))
    row["restore_ms"] = timed(lambda: snap.restore(live, data), runs)
    row["rebuild_record_index_ms"] = timed(lambda: RecordIndex.build(w.records), 3)
    row["rebuild_scene_cache_ms"] = timed(lambda: SceneCache(w.scene, w.params, w._cache.bounds), 3)
    row["save_plus_load_ms"] = row["save_ms"] + row["load_ms"]
    row["save_plus_restore_ms"] = row["save_ms"] + snap_read_ms(path, runs) + row["restore_ms"]
    if live.state_hash() != w.state_hash():
        raise SystemExit("restore is not exact")
    return row


def snap_read_ms(path, runs):
    return timed(lambda: snap.read_file(path), runs)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="bench-out")
    ap.add_argument("--runs", type=int, default=7)
    ap.add_argument("--sizes", default="1000,10000,100000")
    args = ap.parse_args(argv)
    os.makedirs(args.out, exist_ok=True)
    import numba
    import msgpack
    machine = {"platform": platform.platform(), "machine": platform.machine(), "python": platform.python_version(),
               "numpy": np.__version__, "numba": numba.__version__, "msgpack": ".".join(map(str, msgpack.version)),
               "cpus": os.cpu_count()}
    rows = []
    with tempfile.TemporaryDirectory(dir=args.out) as folder:
        for n in [int(s) for s in args.sizes.split(",")]:
            row = bench_size(n, args.runs, folder)
            rows.append(row)
            print(f"{n:>7} agents  {row['mb']:6.2f} MB  dumps {row['dumps_ms']:7.2f} ms  save {row['save_ms']:7.2f} ms  "
                  f"decode {row['decode_ms']:7.2f} ms  load(new world) {row['load_ms']:7.2f} ms  "
                  f"restore(in place) {row['restore_ms']:7.2f} ms  | rebuild: record index "
                  f"{row['rebuild_record_index_ms']:.1f} ms, scene {row['rebuild_scene_cache_ms']:.1f} ms", flush=True)
    result = {"machine": machine, "rows": rows,
              "target": "10k agents: save + load < 20 ms, size < 2 MB beyond the record set"}
    with open(os.path.join(args.out, "snapshot_bench.json"), "w") as f:
        json.dump(result, f, indent=1)
    try:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        fig, ax = plt.subplots(figsize=(7, 4))
        keys = ["dumps_ms", "save_ms", "decode_ms", "load_ms", "restore_ms"]
        x = np.arange(len(rows))
        for i, k in enumerate(keys):
            ax.bar(x + i * 0.15, [r[k] for r in rows], 0.15, label=k[:-3])
        ax.set_xticks(x + 0.3, [f"{r['agents']} agents" for r in rows])
        ax.set_yscale("log")
        ax.set_ylabel("ms (median)")
        ax.legend()
        ax.set_title(f"snapshot timings, {machine['machine']} {machine['cpus']} cpus")
        fig.tight_layout()
        fig.savefig(os.path.join(args.out, "snapshot_bench.png"), dpi=100)
    except ImportError:
        pass
    print(json.dumps(machine))


if __name__ == "__main__":
    main()
