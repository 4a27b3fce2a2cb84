"""Micro benchmark of the sense, avoid and contact-guard kernels on a realistic crowd.

Builds the `square-1` budget scene (invented layout, crowdcore.budget.layout), steps a few frames,
then records the exact arguments World.step passes to knn_phase, orca_phase and
contact_guard_phase in one frame and calls each kernel directly with them. CPU time
(time.process_time) per call, median over repeats; compilation is excluded (warm-up call first).
Prints one JSON object. --save / --check write or compare every kernel output (bit for bit), so a
speed-up can be checked to change nothing.

    NUMBA_CACHE_DIR=/tmp/nb python bench/kernels_micro.py [--agents 10000] [--threads 1] [--repeat 15]
        [--save out.npz | --check out.npz]
"""
import argparse
import json
import os
import platform
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from crowdcore import _jit, world as world_mod  # noqa: E402
from crowdcore.budget import build_scene  # noqa: E402

KERNELS = ("knn_phase", "orca_phase", "contact_guard_phase")
# positions of the output arguments of each kernel (everything else is read-only)
OUTPUTS = {"knn_phase": (-2, -1), "orca_phase": (-3, -2, -1), "contact_guard_phase": (-2, -1)}
LABEL = {"knn_phase": "sense", "orca_phase": "avoid", "contact_guard_phase": "guard"}


def capture(w):
    """Step once with the world's kernel references wrapped; returns {kernel name: (fn, args)}."""
    got = {}
    saved = {name: getattr(world_mod, name) for name in KERNELS}

    def wrap(name, fn):
        def call(*args):
            got[name] = (fn, tuple(a.copy() if isinstance(a, np.ndarray) else a for a in args))
            return fn(*args)
        return call
    try:
        for name in KERNELS:
            setattr(world_mod, name, wrap(name, saved[name]))
        w.step()
    finally:
        for name in KERNELS:
            setattr(world_mod, name, saved[name])
    return got


def run(fn, args, name):
    """One call on fresh zeroed output arrays; returns (cpu seconds, outputs). Zeroed, not copied:
    lines beyond line_count are never written, and World.step allocates them with np.empty."""
    args = list(args)
    for p in OUTPUTS[name]:
        args[p] = np.zeros_like(args[p])
    t0 = time.process_time()
    fn(*args)
    dt = time.process_time() - t0
    return dt, [args[p] for p in OUTPUTS[name]]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--agents", type=int, default=10000)
    ap.add_argument("--scene", default="square-1")
    ap.add_argument("--frames", type=int, default=5, help="untimed frames before the captured one")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--repeat", type=int, default=15)
    ap.add_argument("--save", help="write every kernel output to this .npz")
    ap.add_argument("--check", help="compare every kernel output with this .npz (bit for bit)")
    a = ap.parse_args(argv)
    _jit.set_threads(a.threads)
    w = build_scene(a.scene, a.agents, 0, None, None)
    for _ in range(a.frames):
        w.step()
    got = capture(w)
    result = {"scene": a.scene, "agents": a.agents, "threads": a.threads, "repeat": a.repeat,
              "machine": {"python": platform.python_version(), "cpu": platform.processor() or platform.machine(),
                          "cores": os.cpu_count(), "load_average_1min": os.getloadavg()[0]},
              "cpu_ms": {}, "identical": None}
    outs = {}
    for name in KERNELS:
        if name not in got:
            continue
        fn, args = got[name]
        run(fn, args, name)   # warm-up (compilation or cache load)
        times = []
        for _ in range(a.repeat):
            dt, out = run(fn, args, name)
            times.append(dt * 1e3)
        result["cpu_ms"][LABEL[name]] = round(float(np.median(times)), 3)
        for q, arr in enumerate(out):
            outs[f"{name}_{q}"] = arr
    if a.save:
        np.savez(a.save, **outs)
    if a.check:
        ref = np.load(a.check)
        diff = [k for k in ref.files if k not in outs or ref[k].shape != outs[k].shape
                or ref[k].tobytes() != outs[k].tobytes()]
        result["identical"] = not diff
        result["differs"] = diff
    print(json.dumps(result, indent=1))
    return 1 if result.get("differs") else 0


if __name__ == "__main__":
    sys.exit(main())
