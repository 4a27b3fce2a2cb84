"""Benchmark of the C ABI (not a test): call overhead and start-up, measured from C.

    python bench/cabi_bench.py [--cold] [--out bench/results]

Builds libcrowdcore into OUT/cabi, compiles bench/cabi_bench.c and samples/c_host/host.c, and reports:
  - step overhead: wall time of cc_world_step seen from C minus the time inside World.step (timed at
    the C boundary), for 1k and 100k agents (median over steps): the ABI's own cost per frame, timed
    with the CPU's time-stamp counter where the kernel uses it (see bench/cabi_bench.c), and also with
    clock_gettime, whose own first read after a large step is slow;
  - the floor beside it: the same overhead for a plain C step in its own library (bench/cabi_floor.c)
    that streams as many bytes as World.step allocates (1 KB per agent), and the step's overhead above
    that floor: the part that is the ABI's and not any library's way back from a large step;
  - calls that do no work: cc_world_is_valid (answered in C) and cc_world_get_info (a trip through
    the Python adapter, which every call but the step takes);
  - positions copy: cc_world_get_positions into a caller buffer, beside a plain memcpy of the bytes;
  - start to first frame from C (sample host, hall scene): warm (kernel cache filled) and, with --cold,
    cold (empty NUMBA_CACHE_DIR: every kernel compiles).
Writes OUT/cabi_bench.json and prints it. Compilation never lands in a timed call (one warm-up step).
"""
import argparse
import json
import os
import platform
import re
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)


def run(cmd, env=None, cwd=None):
    r = subprocess.run(cmd, capture_output=True, text=True, env=env, cwd=cwd)
    if r.returncode:
        raise SystemExit(f"{' '.join(cmd)} failed ({r.returncode}):\n{r.stdout}\n{r.stderr}")
    return r.stdout


def start_to_first_frame(host, env, repeats):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = run([host, os.path.join(ROOT, "samples", "scenes", "hall.toml"), "1", os.devnull], env=env)
        wall = time.perf_counter() - t0
        inner = float(re.search(r"start to frame 1\s+([0-9.]+)", out).group(1))
        times.append({"process_wall_s": round(wall, 3), "start_to_first_frame_s": round(inner, 3)})
    return times


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=os.path.join(ROOT, "bench", "results"))
    ap.add_argument("--cold", action="store_true", help="also time a start with an empty kernel cache (minutes)")
    args = ap.parse_args()
    from crowdcore import cabi

    out = os.path.abspath(args.out)
    lib_dir = os.path.join(out, "cabi")
    cabi.build_library(lib_dir)
    flags = (cabi.cflags(lib_dir) + " " + cabi.libs(lib_dir)).split()
    bench = os.path.join(lib_dir, "cabi_bench")
    host = os.path.join(lib_dir, "host")
    floor_lib = os.path.join(lib_dir, "libcabi_floor.so")
    run(["gcc", "-std=c99", "-O2", "-shared", "-fPIC", os.path.join(ROOT, "bench", "cabi_floor.c"), "-o", floor_lib])
    run(["gcc", "-std=c99", "-O2", os.path.join(ROOT, "bench", "cabi_bench.c"), "-o", bench, "-L" + lib_dir,
         "-lcabi_floor"] + flags)
    run(["gcc", "-std=c99", "-O2", os.path.join(ROOT, "samples", "c_host", "host.c"), "-o", host] + flags)
    env = dict(os.environ)
    results = {
        "machine": {"platform": platform.platform(), "cpus": os.cpu_count(), "python": platform.python_version(),
                    "load_average": os.getloadavg()},
        "overhead": [json.loads(run([bench, "1000", "100", "500"], env=env)),
                     json.loads(run([bench, "100000", "40", "50"], env=env))],
        "targets": {"step_overhead_us": 2.0, "positions_copy_100k_us": 1000.0},
    }
    run([host, os.path.join(ROOT, "samples", "scenes", "hall.toml"), "1", os.devnull], env=env)   # fill the cache
    results["start_warm"] = start_to_first_frame(host, env, 3)
    if args.cold:
        with tempfile.TemporaryDirectory(prefix="crowdcore-cold-") as d:
            results["start_cold"] = start_to_first_frame(host, {**env, "NUMBA_CACHE_DIR": d}, 1)
    os.makedirs(out, exist_ok=True)
    with open(os.path.join(out, "cabi_bench.json"), "w") as f:
        json.dump(results, f, indent=2)
    print(json.dumps(results, indent=2))


if __name__ == "__main__":
    main()
