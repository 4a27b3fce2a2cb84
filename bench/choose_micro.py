"""Micro benchmark: full scan vs pruned search of the data-driven choice.

Invented synthetic data (not measured): 80k records, 10k agents walking at about 1.3 m/s.
Three regimes: non-strict; strict with up to 4 mild half-planes ("easy"); strict with 10 tight
half-planes per agent, about 40% of agents left without an eligible record ("constrained").
Prints one JSON object. Compilation is excluded (warm-up call first); times are medians.

A fourth regime, "scene", times the choose phase of a real world step: scene square-1 with
--scene-agents agents (ORCA, strict, default records) after 5 steps, inputs from
crowdcore.budget.choose_inputs, one thread, CPU time per agent (the machine is shared, so CPU time
is steadier than wall time). --scene-agents 0 skips it.

    NUMBA_CACHE_DIR=/tmp/nb python bench/choose_micro.py [--records 80000] [--agents 10000] [--repeat 5]
        [--lines 10] [--scene-agents 10000] [--out result.json]
"""
import argparse
import json
import os
import platform
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from crowdcore import choose as ch  # noqa: E402


def make_records(rng, n, buckets):
    """Invented records: entry speed ~ N(1.3, 0.3), exit = entry + noise, turn ~ N(0, 0.08)
    with heavy tails, some near-standstill records and exact duplicates (for exact ties)."""
    a = np.clip(rng.normal(1.3, 0.3, n), 0.0, None)
    slow = rng.random(n) < 0.03
    a[slow] = np.abs(rng.normal(0.0, 0.05, slow.sum()))
    b = np.clip(a + rng.normal(0.0, 0.04, n), 0.0, None)
    b[slow & (rng.random(n) < 0.3)] = 0.0
    phi = rng.normal(0.0, 0.08, n)
    tail = rng.random(n) < 0.05
    phi[tail] = rng.standard_t(2, tail.sum()) * 0.3
    phi = np.pi - np.mod(np.pi - phi, 2 * np.pi)  # wrap into (-pi, pi]
    dup = rng.choice(n, n // 50, replace=False)
    src = rng.choice(n, n // 50)
    a[dup], b[dup], phi[dup] = a[src], b[src], phi[src]
    order = np.argsort(a, kind="stable")
    a, b, phi = a[order], b[order], phi[order]
    start = (np.arange(buckets + 1, dtype=np.int64) * n // buckets).astype(np.int32)
    return a, b, phi, start, a[np.minimum(start[:-1], n - 1)].copy()


def _unit(ang):
    return np.stack([np.cos(ang), np.sin(ang)], axis=1)


def make_agents(rng, n):
    """Invented agent states: speed ~ 1.3 m/s, random heading, preferred/safe/group velocities nearby."""
    heading = rng.uniform(-np.pi, np.pi, n)
    speed = np.clip(rng.normal(1.3, 0.2, n), 0.0, None)
    v_now = speed[:, None] * _unit(heading)
    pref_ang = heading + rng.normal(0.0, 0.15, n)
    v_pref = 1.34 * _unit(pref_ang)
    nav_dir = _unit(pref_ang)
    v_safe = v_now + rng.normal(0.0, 0.05, (n, 2))
    v_group = v_now + rng.normal(0.0, 0.1, (n, 2))
    max_speed = np.full(n, 2.5)
    # Half-planes in the shape avoidance produces: v_safe on the allowed (left) side, 0.05-0.4 m/s
    # inside each line, lines facing random directions.
    L = 4
    normal = _unit(rng.uniform(-np.pi, np.pi, n * L)).reshape(n, L, 2)  # points into the allowed side
    depth = rng.uniform(0.05, 0.4, (n, L))
    lines = np.empty((n, L, 4))
    lines[:, :, :2] = v_safe[:, None, :] - depth[:, :, None] * normal
    lines[:, :, 2] = normal[:, :, 1]  # direction = normal rotated by -90 degrees: allowed side is left
    lines[:, :, 3] = -normal[:, :, 0]
    line_count = rng.integers(0, L + 1, n).astype(np.int32)
    return v_now, v_pref, nav_dir, v_safe, v_group, max_speed, lines, line_count


def constrain(rng, agents, L=10, offset=1.0):
    """Invented strict, crowded regime: L half-planes per agent, all facing away from a safe velocity
    that sits 0-`offset` m/s from v_now, 0.05-0.5 m/s inside each line. The allowed polygon is
    small and often away from the records: with the defaults about 40% of agents have no eligible
    record, and the records of least energy are mostly ineligible."""
    v_now = agents[0]
    n = v_now.shape[0]
    v_safe = v_now + rng.uniform(0.0, offset, n)[:, None] * _unit(rng.uniform(-np.pi, np.pi, n))
    normal = _unit(rng.uniform(-np.pi, np.pi, n * L)).reshape(n, L, 2)  # points into the allowed side
    depth = rng.uniform(0.05, 0.5, (n, L))
    lines = np.empty((n, L, 4))
    lines[:, :, :2] = v_safe[:, None, :] - depth[:, :, None] * normal
    lines[:, :, 2] = normal[:, :, 1]
    lines[:, :, 3] = -normal[:, :, 0]
    return agents[:3] + (v_safe,) + agents[4:6] + (lines, np.full(n, L, np.int32))


def _median_ms(fn, repeat):
    """(median wall ms, median CPU ms over all threads): the CPU time shows the work done even when
    other jobs share the machine."""
    wall, cpu = [], []
    for _ in range(repeat):
        c0 = time.process_time()
        t0 = time.perf_counter()
        fn()
        wall.append((time.perf_counter() - t0) * 1e3)
        cpu.append((time.process_time() - c0) * 1e3)
    return float(np.median(wall)), float(np.median(cpu))


def scene_regime(n_agents, repeat, steps=5):
    """CPU microseconds per agent of the choose phase in a real world step, one thread."""
    from crowdcore import _jit
    from crowdcore.budget import build_scene, choose_inputs

    world = build_scene("square-1", n_agents, 0, None, None)
    for _ in range(steps):
        world.step()
    inp = choose_inputs(world)
    index = world._index
    n = world.agent_count
    threads = ch.numba.get_num_threads()
    _jit.set_threads(1)
    try:
        outs = {}
        for name, fn in (("full", ch.choose_full), ("pruned", ch.choose_pruned)):
            vel, rec = np.empty((n, 2)), np.empty(n, np.int32)
            run = lambda: index.run(fn, *inp, vel, rec)  # noqa: E731
            run()  # warm-up
            _wall, cpu = _median_ms(run, max(1, repeat if name == "pruned" else min(repeat, 3)))
            outs[name] = (cpu, vel, rec)
        evals, visits = np.empty(n, np.int64), np.empty(n, np.int64)
        ch.pruned_work(*index.pruned_args(inp[1]), *inp, evals, visits)
    finally:
        _jit.set_threads(threads)
    full_cpu, pruned_cpu = outs["full"][0], outs["pruned"][0]
    return {"scene": "square-1", "agents": n, "steps_before": steps, "threads": 1,
            "records": index.n_records, "buckets": index.n_buckets, "leaf_size": index.leaf_size,
            "half_planes_per_agent": float(inp[10].mean()),
            "full_cpu_us_per_agent": round(full_cpu * 1e3 / n, 3),
            "pruned_cpu_us_per_agent": round(pruned_cpu * 1e3 / n, 3),
            "cpu_speedup": round(full_cpu / pruned_cpu, 2),
            "identical_records": bool(np.array_equal(outs["full"][2], outs["pruned"][2])),
            "identical_velocities": bool(np.array_equal(outs["full"][1], outs["pruned"][1])),
            "agents_without_record": int((outs["full"][2] < 0).sum()),
            "mean_energies_pruned": float(evals.mean()), "max_energies_pruned": int(evals.max()),
            "mean_nodes_pruned": float(visits.mean())}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--records", type=int, default=80_000)
    ap.add_argument("--agents", type=int, default=10_000)
    ap.add_argument("--buckets", type=int, default=100)
    ap.add_argument("--width", type=int, default=3)
    ap.add_argument("--leaf", type=int, default=32)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--lines", type=int, default=10, help="half-planes per agent in the constrained regime")
    ap.add_argument("--scene-agents", type=int, default=10_000,
                    help="agents in the real-scene regime (0 skips it)")
    ap.add_argument("--out", help="also write the JSON here (atomically)")
    args = ap.parse_args(argv)

    rng = np.random.default_rng(args.seed)
    recs = make_records(rng, args.records, args.buckets)
    agents = make_agents(rng, args.agents)
    weights = np.ones(6)
    ch.RecordIndex.build(*make_records(rng, 500, 5), leaf_size=args.leaf)  # compile / load the builder
    t0 = time.perf_counter()
    index = ch.RecordIndex.build(*recs, leaf_size=args.leaf)
    build_ms = (time.perf_counter() - t0) * 1e3
    n = args.agents
    result = {"records": args.records, "agents": n, "buckets": args.buckets, "width": args.width,
              "leaf_size": args.leaf, "threads": ch.numba.get_num_threads(), "repeat": args.repeat,
              "build_ms": round(build_ms, 2)}
    k = np.clip(np.searchsorted(recs[4], np.hypot(*agents[0].T), "right") - 1, 0, args.buckets - 1)
    lo, hi = np.maximum(0, k - args.width), np.minimum(args.buckets - 1, k + args.width)
    result["mean_records_in_range"] = float(np.mean(recs[3][hi + 1] - recs[3][lo]))
    regimes = (("non_strict", False, agents), ("strict", True, agents),
               ("strict_constrained", True, constrain(rng, agents, args.lines)))
    for name, strict, ag in regimes:
        vel_f, rec_f = np.empty((n, 2)), np.empty(n, np.int32)
        vel_p, rec_p = np.empty((n, 2)), np.empty(n, np.int32)
        full = lambda: index.run(ch.choose_full, weights, args.width, strict, *ag, vel_f, rec_f)  # noqa
        pruned = lambda: index.run(ch.choose_pruned, weights, args.width, strict, *ag, vel_p, rec_p)  # noqa
        full()
        pruned()  # warm-up: compile (or load from cache) before timing
        full_ms, full_cpu = _median_ms(full, args.repeat)
        pruned_ms, pruned_cpu = _median_ms(pruned, args.repeat)
        evals, visits = np.empty(n, np.int64), np.empty(n, np.int64)
        ch.pruned_work(*index.pruned_args(args.width), weights, args.width, strict, *ag, evals, visits)
        result[name] = {
            "half_planes_per_agent": float(ag[7].mean()),
            "full_ms": round(full_ms, 2), "pruned_ms": round(pruned_ms, 2),
            "speedup": round(full_ms / pruned_ms, 2),
            "full_cpu_ms": round(full_cpu, 2), "pruned_cpu_ms": round(pruned_cpu, 2),
            "cpu_speedup": round(full_cpu / pruned_cpu, 2),
            "identical_records": bool(np.array_equal(rec_f, rec_p)),
            "identical_velocities": bool(np.array_equal(vel_f, vel_p)),
            "agents_without_record": int((rec_f < 0).sum()),
            "mean_energies_pruned": float(evals.mean()), "max_energies_pruned": int(evals.max()),
            "mean_nodes_pruned": float(visits.mean())}
    if args.scene_agents > 0:
        result["scene"] = scene_regime(args.scene_agents, args.repeat)
    result["machine"] = {"cpu_count": os.cpu_count(), "python": platform.python_version(),
                         "processor": platform.processor() or platform.machine(),
                         "note": "shared machine: other jobs may inflate both timings"}
    text = json.dumps(result, indent=1)
    print(text)
    if args.out:
        tmp = args.out + ".tmp"
        with open(tmp, "w") as f:
            f.write(text + "\n")
        os.replace(tmp, args.out)


if __name__ == "__main__":
    main()
