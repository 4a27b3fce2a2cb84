"""The `crowdcore` command line."""
import argparse
import json
import os
import sys
import time

import numpy as np

from .errors import CrowdError

CAUTION = ("Caution: crowd and evacuation results from crowdcore support, and never replace, the analysis "
           "required by local codes and licensed fire-safety practice.")


def bundled_scenes():
    """Name -> path of the scenes shipped with the package."""
    from importlib import resources
    from pathlib import Path
    try:
        root = resources.files("crowdcore.scenes")
    except ModuleNotFoundError:  # running from a source checkout: the scenes live in samples/
        root = Path(__file__).resolve().parent.parent / "samples" / "scenes"
    return {p.name[:-5]: str(p) for p in sorted(root.iterdir(), key=lambda p: p.name) if p.name.endswith(".toml")}


def resolve_scene(name_or_path):
    if os.path.exists(name_or_path):
        return name_or_path
    scenes = bundled_scenes()
    if name_or_path in scenes:
        return scenes[name_or_path]
    raise CrowdError(f"scene {name_or_path!r}: no such file and no bundled scene of that name "
                     f"(bundled: {', '.join(scenes)})")


def run_command(args):
    from . import _jit
    from .invariants import wall_crossings
    from .pictures import Trace, write_gif, write_summary_png
    from .scenario import load_scenario

    if args.threads:
        _jit.set_threads(args.threads)
    path = resolve_scene(args.scene)
    world = load_scenario(path)
    if args.budget_ms is not None:
        world.set_params(budget_ms=args.budget_ms)
    frames = args.frames or world.default_frames
    start_agents = world.agent_count
    every = max(1, frames // 200)
    trace = Trace(every=every, max_frames=frames // every + 2)
    trace.capture(world)
    worst_gap, overlaps, crossings, blocked, speeds = np.inf, 0, 0, 0, []
    step_ms = []
    from tqdm import tqdm
    if not args.quiet:
        print("preparing kernels (a first run on a machine compiles them: about a minute; later runs "
              "start in seconds)", file=sys.stderr)
    t0 = time.perf_counter()
    # one step on a copy compiles (or loads) every kernel the run needs, outside the timed frames
    world.from_snapshot(world.snapshot(), records=world.records, like=world).step(args.dt)
    prepare_s = time.perf_counter() - t0
    for _ in tqdm(range(frames), desc=os.path.basename(path), unit="frame", disable=args.quiet):
        prev_ids, prev_pos = world.ids.copy(), world.positions.copy()
        t0 = time.perf_counter()
        st = world.step(args.dt)
        step_ms.append((time.perf_counter() - t0) * 1e3)
        worst_gap = min(worst_gap, st["min_gap"])
        overlaps += st["overlaps"]
        blocked += st["blocked_moves"]
        crossings += len(wall_crossings(world, prev_ids, prev_pos)[0])
        if world.agent_count:
            speeds.append(float(np.linalg.norm(world.velocities, axis=1).mean()))
        trace.capture(world)
        if world.agent_count == 0 and not args.keep_going:
            break
    summary = {
        "scene": world.name or os.path.basename(path),
        "agents_at_start": start_agents,
        "agents_left": world.agent_count,
        "frames": world.frame,
        "simulated_s": round(world.time, 3),
        "ms_per_frame_median": round(float(np.median(step_ms)), 3),
        "kernel_preparation_s": round(prepare_s, 2),
        "arrivals": world.arrived_total,
        "min_separation_m": None if not np.isfinite(worst_gap) else round(float(worst_gap), 4) + 0.0,
        "overlap_pair_frames": overlaps,
        "wall_crossings": crossings,
        "moves_stopped_at_walls": blocked,
        "mean_speed_m_s": round(float(np.mean(speeds)), 3) if speeds else 0.0,
        "avoidance": world.params.avoidance,
    }
    if world.params.budget_ms > 0 and world.stats:
        summary["budget_ms"] = world.params.budget_ms
        summary["last_search_width"] = world.stats["search_width"]
        summary["last_neighbours"] = world.stats["neighbours"]
    if not args.no_pictures:
        os.makedirs(args.out, exist_ok=True)
        stem = os.path.join(args.out, os.path.splitext(os.path.basename(path))[0])
        write_gif(world, trace, stem + ".gif")
        write_summary_png(world, trace, stem + ".png")
        summary["pictures"] = [stem + ".gif", stem + ".png"]
    if args.json:
        print(json.dumps(summary))
    else:
        width = max(len(k) for k in summary)
        for k, v in summary.items():
            print(f"{k:<{width}}  {v}")
        print(CAUTION)
    return 0


def records_build_command(args):
    from .records import records_from_trajectories
    rs = records_from_trajectories(args.csv, fps=args.fps, buckets=args.buckets, max_speed=args.max_speed,
                                   progress=not args.quiet)
    rs.save(args.output)
    print(f"{args.output}: {rs.n_records} records in {rs.n_buckets} buckets, sampled every {rs.dt:g} s, "
          f"hash {rs.content_hash[:16]}")
    return 0


def scenes_command(args):
    for name, path in bundled_scenes().items():
        print(f"{name:<12} {path}")
    return 0


def replay_command(args):
    from .recording import replay
    from .pictures import Trace, write_gif
    trace = Trace(every=max(1, args.every)) if args.gif else None
    report = replay(args.recording, on_frame=trace.capture if trace else None, progress=not args.quiet)
    print(report)
    if args.gif and report.world is not None:
        write_gif(report.world, trace, args.gif)
        print(f"wrote {args.gif}")
    return 0 if report.identical else 1


def cabi_command(args):
    from . import cabi
    if args.build:
        out = cabi.build_library(args.out)
        print(out)
    if args.cflags:
        print(cabi.cflags(args.out))
    if args.libs:
        print(cabi.libs(args.out))
    if not (args.build or args.cflags or args.libs):
        print(cabi.describe(args.out))
    return 0


def verify_command(args):
    from .verify import run_verification
    params = None
    if args.params:
        from .scenario import parse_scenario
        with open(args.params, encoding="utf-8") as f:   # a scenario file: only its [params] table is used
            params = parse_scenario(f.read(), os.path.dirname(os.path.abspath(args.params)), args.params)["params"]
        defaults = type(params)().to_dict()
        params = {k: v for k, v in params.to_dict().items() if v != defaults[k]}
    report = run_verification(args.out, quick=args.quick, progress=not args.quiet, params=params)
    print(f"wrote {report}")
    print(CAUTION)
    return 0


def budget_command(args):
    from .budget import run_budget
    result = run_budget(quick=args.quick, out_dir=args.out, progress=not args.quiet)
    import json as _json
    print(_json.dumps(result) if args.json else _json.dumps(result, indent=2))
    return 0


def build_parser():
    p = argparse.ArgumentParser(prog="crowdcore", description="Data-driven crowd runtime: run scenes, build motion records.")
    sub = p.add_subparsers(dest="command", required=True)

    r = sub.add_parser("run", help="run a scenario and write a summary and pictures")
    r.add_argument("scene", nargs="?", default="crossing", help="scenario file or bundled scene name (default: crossing)")
    r.add_argument("--frames", type=int, default=None, help="frames to run (default: the scenario's own)")
    r.add_argument("--dt", type=float, default=None, help="seconds per frame (default: the scenario's params.dt)")
    r.add_argument("--out", default="crowdcore-out", help="folder for the GIF and PNG (default: crowdcore-out)")
    r.add_argument("--threads", type=int, default=0, help="worker threads (default: all cores)")
    r.add_argument("--budget-ms", type=float, default=None,
                   help="hold each step within this many ms by narrowing the search (deterministic governor)")
    r.add_argument("--no-pictures", action="store_true", help="skip the GIF and PNG")
    r.add_argument("--keep-going", action="store_true", help="keep stepping after every agent has arrived")
    r.add_argument("--json", action="store_true", help="print the summary as one JSON object")
    r.add_argument("--quiet", action="store_true", help="no progress bar")
    r.set_defaults(func=run_command)

    rec = sub.add_parser("records", help="motion-record sets")
    rsub = rec.add_subparsers(dest="records_command", required=True)
    b = rsub.add_parser("build", help="build a record set from trajectory CSV files (frame,id,x,y)")
    b.add_argument("csv", nargs="+", help="trajectory files")
    b.add_argument("--fps", type=float, required=True, help="frames per second of the recordings")
    b.add_argument("--buckets", type=int, default=100, help="speed buckets (default 100)")
    b.add_argument("--max-speed", type=float, default=4.0, help="reject samples faster than this, m/s (default 4)")
    b.add_argument("-o", "--output", required=True, help="record-set file to write")
    b.add_argument("--quiet", action="store_true")
    b.set_defaults(func=records_build_command)

    s = sub.add_parser("scenes", help="list the bundled scenes")
    s.set_defaults(func=scenes_command)

    rp = sub.add_parser("replay", help="replay a recording, verify every frame's hash, optionally render a GIF")
    rp.add_argument("recording", help="recording file written by crowdcore.recording.Recorder")
    rp.add_argument("--gif", default=None, help="write the replay as an animated GIF here")
    rp.add_argument("--every", type=int, default=1, help="GIF: keep every Nth frame (default 1)")
    rp.add_argument("--quiet", action="store_true")
    rp.set_defaults(func=replay_command)

    c = sub.add_parser("cabi", help="build the C library and print compiler flags for hosts")
    c.add_argument("--build", action="store_true", help="build libcrowdcore and its header")
    c.add_argument("--cflags", action="store_true", help="print the include flags")
    c.add_argument("--libs", action="store_true", help="print the link flags")
    c.add_argument("--out", default=None, help="folder of the built library (default: inside the package)")
    c.set_defaults(func=cabi_command)

    v = sub.add_parser("verify", help="run the verification suite and write a Markdown report with plots")
    v.add_argument("--out", default="crowdcore-verify", help="report folder (default: crowdcore-verify)")
    v.add_argument("--quick", action="store_true", help="fewer agents and repeats")
    v.add_argument("--params", default=None, help="verify the [params] of this scenario file instead of the defaults")
    v.add_argument("--quiet", action="store_true")
    v.set_defaults(func=verify_command)

    bg = sub.add_parser("budget", help="agents-per-frame budget benchmark (JSON + plots)")
    bg.add_argument("--quick", action="store_true", help="finish in under 2 minutes")
    bg.add_argument("--json", action="store_true", help="print one JSON line")
    bg.add_argument("--out", default="crowdcore-budget", help="folder for JSON and plots")
    bg.add_argument("--quiet", action="store_true")
    bg.set_defaults(func=budget_command)
    return p


def main(argv=None):
    args = build_parser().parse_args(argv)
    try:
        return args.func(args)
    except CrowdError as e:
        print(f"crowdcore: error: {e}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
