"""python -m bench [--quick] [--json] [--out DIR]: the budget benchmark, one JSON object on stdout.

Top-level keys (issue 2): max_agents_30fps, max_agents_60fps, pruned_vs_full_speedup, pruned_equals_full,
hash_vs_kdtree_speedup, scaling_exponent, warm_start_first_frame_s; the sections behind them follow.
The progress bar goes to stderr, so stdout stays one JSON object.
"""
import argparse
import json
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

SUMMARY_KEYS = ("max_agents_30fps", "max_agents_60fps", "pruned_vs_full_speedup", "pruned_equals_full",
                "hash_vs_kdtree_speedup", "scaling_exponent", "threads_speedup", "warm_start_first_frame_s")


def main(argv=None):
    ap = argparse.ArgumentParser(prog="python -m bench", description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="finish in under 2 minutes (warm numba cache)")
    ap.add_argument("--json", action="store_true", help="print the JSON object on one line")
    ap.add_argument("--out", default="crowdcore-budget", help="folder for budget.json and the PNG plots")
    ap.add_argument("--quiet", action="store_true", help="no progress bar")
    args = ap.parse_args(argv)
    from crowdcore.budget import run_budget
    res = run_budget(quick=args.quick, out_dir=args.out, progress=not args.quiet)
    # summary keys first, then every section
    ordered = {k: res.get(k) for k in SUMMARY_KEYS}
    ordered.update({k: v for k, v in res.items() if k not in ordered})
    print(json.dumps(ordered) if args.json else json.dumps(ordered, indent=1))
    if not res.get("pruned_equals_full", False):
        print("bench: the pruned search did not pick the same records as the full scan", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
