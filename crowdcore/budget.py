"""Budget benchmark: how many agents fit a frame budget on this machine, and where the time goes.

Fixed scenes (built in code, invented layouts): open square at 0.5, 1 and 2 agents/m^2 with every
agent walking to the opposite side, two crossing streams, and a room emptying through a bottleneck.
Everything is timed after a warm-up on tiny worlds, so compilation (or loading the numba on-disk
cache) never lands in a timed frame. Results: one JSON-able dict (also written as budget.json) and
PNG plots. Timings are medians over frames; p95 is the 95th percentile of the same frames.

`run_budget(quick=True)` finishes in about 2 minutes on 2 cores once the numba cache is warm; it
shrinks its work to a wall-clock deadline, and says in the JSON what it skipped.
"""
import json
import math
import os
import platform
import subprocess
import sys
import time
from dataclasses import dataclass, field, replace

import numpy as np

SCENES = ("square-0.5", "square-1", "square-2", "crossing", "bottleneck")
PHASE_KEYS = ("index", "sense", "navigate", "avoid", "choose", "move", "account")
BUDGETS_MS = {"30fps": 1000.0 / 30.0, "60fps": 1000.0 / 60.0}


# ------------------------------------------------------------------------------------------ scenes

class Layout:
    """A scene as plain data: walls, targets, spawn positions and each spawn's target index."""

    def __init__(self, kind, walls, targets, positions, target, side):
        self.kind, self.walls, self.targets = kind, walls, targets
        self.positions, self.target, self.side = positions, target, side

    def world(self, n=None, seed=0, params=None, records=None):
        """A World with the first n spawn positions as agents (all of them if n is None)."""
        from .scene import Scene
        from .world import World
        scene = Scene()
        for pts, closed in self.walls:
            scene.add_wall(pts, closed)
        for name, kind, shape in self.targets:
            scene.add_target(name, kind, shape)
        w = World(scene=scene, params=params, records=records, seed=seed)
        n = len(self.positions) if n is None else int(n)
        if n:
            w.add_agents(self.positions[:n], target=self.target[:n], pref_speed=_speeds(n, seed))
        return w


def _speeds(n, seed):
    """Preferred speeds, invented: uniform 1.1..1.5 m/s around the common 1.34 m/s."""
    return np.random.default_rng(seed + 1).uniform(1.1, 1.5, n)


def _grid(n, x0, y0, x1, y1, rng, jitter=0.05):
    """n points on a jittered grid over a rectangle, row by row (y-major), at least ~0.5 m apart
    for the densities used here."""
    w, h = x1 - x0, y1 - y0
    nx = max(1, int(math.ceil(math.sqrt(n * w / h))))
    ny = max(1, int(math.ceil(n / nx)))
    sx, sy = w / nx, h / ny
    gy, gx = np.mgrid[0:ny, 0:nx]
    pts = np.stack([x0 + (gx.ravel() + 0.5) * sx, y0 + (gy.ravel() + 0.5) * sy], axis=1)[:n]
    pts += rng.uniform(-jitter, jitter, pts.shape) * np.array([sx, sy])
    return np.ascontiguousarray(pts)


def layout(kind, n, seed=0):
    """The layout of scene `kind` (one of SCENES) for n agents."""
    rng = np.random.default_rng(seed)
    n = int(n)
    if kind.startswith("square-"):
        rho = float(kind.split("-", 1)[1])
        inner = math.sqrt(max(n, 1) / rho)
        side = inner + 3.0
        pos = _grid(n, 1.5, 1.5, side - 1.5, side - 1.5, rng)
        targets = [("east", "rect", (side - 1.0, 0.5, side - 0.3, side - 0.5)),
                   ("west", "rect", (0.3, 0.5, 1.0, side - 0.5))]
        tgt = np.where(pos[:, 0] < side / 2.0, 0, 1).astype(np.int32)
        return Layout(kind, [([[0, 0], [side, 0], [side, side], [0, side]], True)], targets, pos, tgt, side)
    if kind == "crossing":
        # two blocks at 1 agent/m^2, one walking east, one walking north, meeting in the middle
        s = math.sqrt(max(n, 2) / 2.0)
        c = 2.5 + 1.5 * s
        side = 2.0 * c
        na = n // 2
        west = _grid(na, 1.5, c - s / 2, 1.5 + s, c + s / 2, rng)
        south = _grid(n - na, c - s / 2, 1.5, c + s / 2, 1.5 + s, rng)
        pos = np.ascontiguousarray(np.vstack([west, south]))
        tgt = np.r_[np.zeros(na, np.int32), np.ones(n - na, np.int32)]
        targets = [("east", "rect", (side - 1.0, 0.5, side - 0.3, side - 0.5)),
                   ("north", "rect", (0.5, side - 1.0, side - 0.5, side - 0.3))]
        return Layout(kind, [([[0, 0], [side, 0], [side, side], [0, side]], True)], targets, pos, tgt, side)
    if kind == "bottleneck":
        # a square room at 1 agent/m^2 empties through one door into a 10 m deep hall
        inner = math.sqrt(max(n, 1))
        room = inner + 3.0
        door = max(1.2, room / 20.0)
        lo, hi = room / 2 - door / 2, room / 2 + door / 2
        pos = _grid(n, 1.5, 1.5, room - 1.5, room - 1.5, rng)
        walls = [([[room, 0], [0, 0], [0, room], [room, room]], False),
                 ([[room, 0], [room + 10, 0], [room + 10, room], [room, room]], False),
                 ([[room, 0], [room, lo]], False), ([[room, hi], [room, room]], False)]
        targets = [("hall", "rect", (room + 8.5, 0.5, room + 9.7, room - 0.5))]
        return Layout(kind, walls, targets, pos, np.zeros(n, np.int32), room)
    raise ValueError(f"scene: unknown benchmark scene {kind!r}; known: {', '.join(SCENES)}")


def build_scene(kind, n, seed=0, params=None, records=None):
    """A World of scene `kind` with n agents (see `layout`)."""
    return layout(kind, n, seed).world(n, seed, params, records)


_WARM = False


def warm_up():
    """Compile (or load from the numba cache) every kernel the benchmark times, on tiny worlds."""
    global _WARM
    if _WARM:
        return
    from .choose import choose_full
    for kind in SCENES:
        w = build_scene(kind, 40)
        w.step()
        w.step()
    w = build_scene("square-1", 40)
    w.set_params(search="full")
    w.step()
    inp = choose_inputs(w)
    _run_choose(w, choose_full, inp)
    _WARM = True


# ------------------------------------------------------------------------------------------ timing

def _pct(values, q):
    return float(np.percentile(np.asarray(values, float), q)) if len(values) else float("nan")


def measure(world, frames=5, warmup=2):
    """Step `warmup` untimed frames, then `frames` timed ones; medians and p95 per phase and in total."""
    for _ in range(warmup):
        world.step()
    totals, per = [], {k: [] for k in PHASE_KEYS}
    for _ in range(frames):
        t0 = time.perf_counter()
        world.step()
        totals.append((time.perf_counter() - t0) * 1e3)
        for k in PHASE_KEYS:
            per[k].append(world.phase_ms.get(k, 0.0))
    return {"agents": world.agent_count, "frames": frames,
            "ms_median": round(float(np.median(totals)), 3), "ms_p95": round(_pct(totals, 95), 3),
            "phases": {k: {"median": round(float(np.median(v)), 3), "p95": round(_pct(v, 95), 3)}
                       for k, v in per.items()}}


def find_max_agents(budget_ms, scene="square-1", start=1000, frames=3, warmup=2, tol=0.05, lo_limit=16,
                    hi_limit=1 << 21, deadline=None, seed=0):
    """Largest n whose median step fits budget_ms: doubling (or halving) to bracket, then bisection
    until the bracket is narrower than `tol` of its lower end. Returns (n, probes)."""
    probes = []
    cache = {}

    def fits(n):
        if n not in cache:
            r = measure(build_scene(scene, n, seed=seed), frames, warmup)
            probes.append([n, r["ms_median"]])
            cache[n] = r["ms_median"] <= budget_ms
        return cache[n]

    def late():
        return deadline is not None and time.perf_counter() > deadline

    n = max(int(start), lo_limit)
    if fits(n):
        lo, hi = n, None
        while hi is None and lo < hi_limit and not late():
            if fits(lo * 2):
                lo *= 2
            else:
                hi = lo * 2
    else:
        lo, hi = None, n
        while lo is None and hi > lo_limit and not late():
            if fits(hi // 2):
                lo = hi // 2
            else:
                hi //= 2
        if lo is None:
            return 0, probes
    while hi is not None and hi - lo > max(1, tol * lo) and not late():
        mid = (lo + hi) // 2
        if fits(mid):
            lo = mid
        else:
            hi = mid
    return lo, probes


def fit_exponent(ns, ms):
    """Slope of log(ms) against log(n) (least squares)."""
    ns, ms = np.asarray(ns, float), np.asarray(ms, float)
    ok = (ns > 0) & (ms > 0)
    if ok.sum() < 2:
        return float("nan")
    return float(np.polyfit(np.log(ns[ok]), np.log(ms[ok]), 1)[0])


# ------------------------------------------------------------------------------------------ reference ratios

def choose_inputs(world):
    """The inputs the world's choose phase sees this frame, computed by the world's own phases
    (index, sense, navigate, avoid) exactly as World.step does; the world is not changed."""
    f = world._before_choice(world.params.dt, {})
    p = world.params
    return (p.weight_vector(), f["z"], p.strict, f["vel"], f["pref_vel"], f["nav_dir"], f["v_safe"], f["v_group"],
            f["max_speed"], f["lines"], f["line_count"])


def _run_choose(world, kernel_fn, inputs):
    n = world.agent_count
    out_vel, out_rec = np.empty((n, 2)), np.empty(n, np.int32)
    world._index.run(kernel_fn, *inputs, out_vel, out_rec)
    return out_vel, out_rec


def _median_ms(fn, repeat):
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append((time.perf_counter() - t0) * 1e3)
    return float(np.median(times))


def pruned_vs_full(n, repeat=3, seed=0):
    """The choose phase of one frame (same agents, same inputs) by full scan and by pruned search."""
    from .choose import choose_full, choose_pruned
    w = build_scene("square-1", n, seed=seed)
    for _ in range(3):  # let the crowd start walking so speeds spread over buckets
        w.step()
    inp = choose_inputs(w)
    vf, rf = _run_choose(w, choose_full, inp)
    vp, rp = _run_choose(w, choose_pruned, inp)
    same = bool(np.array_equal(rf, rp) and np.array_equal(vf, vp))
    out = {"agents": n, "identical_picks": same}
    if not same:  # reported, not raised: the run still describes everything else; tests and bench fail on it
        bad = (rf != rp) | (vf != vp).any(axis=1)
        i = int(np.argmax(bad))
        out["mismatch"] = {"agents_differing": int(bad.sum()), "first_agent_id": int(w.agents["ids"][i]),
                           "pruned_record": int(rp[i]), "full_record": int(rf[i])}
    full_ms = _median_ms(lambda: _run_choose(w, choose_full, inp), repeat)
    pruned_ms = _median_ms(lambda: _run_choose(w, choose_pruned, inp), repeat)
    out.update({"full_ms": round(full_ms, 3), "pruned_ms": round(pruned_ms, 3),
                "speedup": round(full_ms / max(pruned_ms, 1e-9), 2)})
    return out


def hash_vs_kdtree(n, repeat=5, seed=0):
    """Build + K-nearest-within-r query: the world's spatial hash against scipy's cKDTree, same points."""
    from scipy.spatial import cKDTree  # reference: scipy.spatial.cKDTree
    from .spatial import build_hash, knn_phase
    w = build_scene("square-1", n, seed=seed)
    pos, ids, p = w.agents["pos"], w.agents["ids"], w.params
    k, r = p.neighbours, p.sense_radius
    grid = w._hash
    start = np.zeros(grid.nx * grid.ny + 1, np.int32)
    items = np.empty(n, np.int32)
    nbr, cnt = np.empty((n, k), np.int32), np.empty(n, np.int32)

    def ours():
        build_hash(pos, *grid.args, start, items)
        knn_phase(pos, ids, start, items, *grid.args, r, nbr, cnt)

    def theirs():
        return cKDTree(pos).query(pos, k=k + 1, distance_upper_bound=r, workers=-1)

    ours()
    dist, idx = theirs()
    # same neighbour distances (ties at the K-th place may pick other agents at the same distance)
    ok = True
    for i in range(0, n, max(1, n // 500)):
        j = idx[i][(idx[i] != i) & (idx[i] < n)][:k]
        ref = np.sort(((pos[j] - pos[i]) ** 2).sum(1))
        got = ((pos[nbr[i, :cnt[i]]] - pos[i]) ** 2).sum(1)
        ok &= len(ref) == cnt[i] and np.allclose(np.sort(got), ref, rtol=0, atol=1e-12)
    h_ms = _median_ms(ours, repeat)
    t_ms = _median_ms(theirs, repeat)
    return {"agents": n, "k": k, "radius": r, "hash_ms": round(h_ms, 3), "kdtree_ms": round(t_ms, 3),
            "speedup": round(t_ms / max(h_ms, 1e-9), 2), "same_neighbour_distances": bool(ok),
            "kdtree_workers": "all cores"}


def threads_ratio(n, frames=3, seed=0):
    """Full step with numba on all cores against one thread (same world, same frames)."""
    from ._jit import max_threads, set_threads
    import numba
    allt = numba.get_num_threads()
    out = {"agents": n, "threads_all": allt}
    try:
        set_threads(1)
        one = measure(build_scene("square-1", n, seed=seed), frames, 1)["ms_median"]
        set_threads(allt)
        many = measure(build_scene("square-1", n, seed=seed), frames, 1)["ms_median"]
    finally:
        set_threads(allt)
    out.update({"one_thread_ms": one, "all_threads_ms": many, "speedup": round(one / max(many, 1e-9), 2),
                "max_threads": max_threads()})
    return out


def warm_start_s():
    """Seconds from a fresh interpreter's `import crowdcore` to the end of its first frame (cache warm)."""
    code = ("import time; t=time.perf_counter(); import crowdcore.budget as b; w=b.build_scene('square-1', 100);"
            "w.step(); print(time.perf_counter()-t)")
    env = dict(os.environ)
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    env["PYTHONPATH"] = root + os.pathsep + env.get("PYTHONPATH", "")
    t0 = time.perf_counter()
    try:
        out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=600)
        wall = time.perf_counter() - t0
        return {"first_frame_s": round(float(out.stdout.strip().splitlines()[-1]), 3),
                "process_wall_s": round(wall, 3)}
    except (subprocess.SubprocessError, ValueError, IndexError) as e:
        return {"error": str(e)[:200]}


def machine():
    import numba
    import scipy
    model = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    model = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    try:
        layer = numba.threading_layer()
    except ValueError:
        layer = "not started"
    try:
        load = os.getloadavg()[0]
    except OSError:
        load = None
    return {"cpu_model": model, "cpu_count": os.cpu_count(), "numba_threads": numba.get_num_threads(),
            "threading_layer": layer, "python": platform.python_version(), "numpy": np.__version__,
            "numba": numba.__version__, "scipy": scipy.__version__, "platform": platform.platform(),
            "load_average_1min": load}


# ------------------------------------------------------------------------------------------ plan

@dataclass
class BudgetConfig:
    """What a run measures. Presets: FULL, QUICK, and TINY (tests)."""
    counts: tuple = (1000, 2000, 5000, 10000, 20000, 40000)
    curve_scenes: tuple = SCENES                 # scenes measured at every count
    other_scenes_at: int = 5000                  # the remaining scenes at this one count
    frames: int = 7
    warmup: int = 5                              # untimed frames first: a crowd starting from rest is a transient
    search_start: int = 2000
    search_frames: int = 7
    search_tol: float = 0.03
    search_max: int = 1 << 20
    governor_max: int = 100000
    exponent_range: tuple = (1000, 20000)
    widths: tuple = (0, 1, 2, 3, 5, 8)
    buckets: tuple = (25, 50, 100, 200, 400)
    sweep_n: int = 10000
    ratio_n: int = 10000
    hash_n: int = 20000
    repeat: int = 5
    governor_frames: int = 80
    calibrate_n: int = 0                         # 0: the agent count found for the 30 fps budget
    deadline_s: float = 3600.0
    warm_start: bool = True
    sustained_counts: tuple = (10000, 20000)   # square-1 once its counterflow has jammed (see run_budget)
    sustained_after: int = 150


FULL = BudgetConfig()
QUICK = BudgetConfig(counts=(1000, 2000, 5000, 10000, 20000), curve_scenes=("square-1",), other_scenes_at=5000,
                     frames=5, warmup=5, search_start=1000, search_frames=7, search_tol=0.1, search_max=200000,
                     governor_max=40000, buckets=(25, 100, 400), sweep_n=5000, ratio_n=5000, hash_n=10000,
                     repeat=3, governor_frames=40, calibrate_n=0, deadline_s=95.0, sustained_counts=(10000,))
TINY = BudgetConfig(counts=(30, 60), curve_scenes=("square-1",), other_scenes_at=30, frames=2, warmup=1,
                    search_start=32, search_frames=1, search_tol=0.5, search_max=128,
                    governor_max=80, exponent_range=(30, 60), widths=(0, 3),
                    buckets=(10, 100), sweep_n=40, ratio_n=40, hash_n=200, repeat=1, governor_frames=6,
                    calibrate_n=60, deadline_s=60.0, warm_start=False, sustained_counts=(60,), sustained_after=8)


def run_budget(quick=False, out_dir="crowdcore-budget", progress=True, config=None):
    """Run the benchmark; write budget.json and PNG plots into out_dir; return the result dict."""
    cfg = config if config is not None else (QUICK if quick else FULL)
    os.makedirs(out_dir, exist_ok=True)
    t_start = time.perf_counter()
    sections = ["warm-up", "curve", "other scenes", "max agents", "sustained", "pruned vs full", "hash vs kd-tree",
                "threads", "search width", "buckets", "governor", "warm start", "plots"]
    bar = None
    if progress:
        from tqdm import tqdm
        bar = tqdm(total=len(sections), desc="budget", unit="part", file=sys.stderr)

    def step(name):
        if bar is not None:
            bar.set_postfix_str(name)

    def done():
        if bar is not None:
            bar.update(1)

    def left():
        return deadline - time.perf_counter()

    res = {"quick": bool(quick), "config": {k: v for k, v in cfg.__dict__.items()}, "skipped": []}

    step("warm-up (compile / load cache)")
    t0 = time.perf_counter()
    # a fresh process first: with a warm numba cache this is the warm start; with a cold one it fills the cache
    first_start = warm_start_s() if cfg.warm_start else None
    warm_up()
    res["warm_up_s"] = round(time.perf_counter() - t0, 2)
    deadline = time.perf_counter() + cfg.deadline_s  # compilation does not count against the deadline
    res["machine"] = machine()
    done()

    # ms/frame against agent count
    step("curve")
    curve = {s: [] for s in cfg.curve_scenes}
    for scene in cfg.curve_scenes:
        last = None
        for n in cfg.counts:
            if last is not None:  # predict this point's cost from the last one (linear in n)
                cost = last[1] * n / last[0] * (cfg.frames + cfg.warmup) / 1e3 + 0.5
                if cost > left() * 0.25:
                    res["skipped"].append(f"curve {scene} n={n}: predicted {cost:.0f} s")
                    break
            r = measure(build_scene(scene, n), cfg.frames, cfg.warmup)
            r["scene"] = scene
            curve[scene].append(r)
            last = (n, r["ms_median"])
    res["curve"] = curve
    done()

    step("other scenes")
    others = []
    for scene in SCENES:
        if scene in cfg.curve_scenes:
            continue
        if left() < 20:
            res["skipped"].append(f"scene {scene}: deadline")
            continue
        r = measure(build_scene(scene, cfg.other_scenes_at), cfg.frames, cfg.warmup)
        r["scene"] = scene
        others.append(r)
    res["scenes_at_one_count"] = others
    done()

    base = curve.get("square-1") or next(iter(curve.values()))
    lo_n, hi_n = cfg.exponent_range
    sel = [r for r in base if lo_n <= r["agents"] <= hi_n]
    res["scaling_exponent"] = round(fit_exponent([r["agents"] for r in sel], [r["ms_median"] for r in sel]), 3)
    res["scaling_points"] = [[r["agents"], r["ms_median"]] for r in sel]

    step("max agents (search)")
    res["max_agents"] = {}
    for label, budget in BUDGETS_MS.items():
        # start near the model's guess from the curve so the search needs few probes
        guess = cfg.search_start
        if base:
            n0, m0 = base[0]["agents"], base[0]["ms_median"]
            guess = max(16, int(n0 * budget / max(m0, 1e-6)))
        guess = min(guess, cfg.search_max // 2)
        stop = deadline - 0.5 * max(left(), 0.0)  # leave half the remaining time for the rest
        n, probes = find_max_agents(budget, "square-1", guess, cfg.search_frames, cfg.warmup, cfg.search_tol,
                                    hi_limit=cfg.search_max, deadline=stop)
        res["max_agents"][label] = {"budget_ms": round(budget, 2), "agents": n, "probes": probes,
                                    "scene": "square-1", "stopped_by_deadline": time.perf_counter() > stop}
        res[f"max_agents_{label}"] = n
    done()

    # The curve and the search time frames 6-12 of a crowd starting from rest. Later the two halves
    # of square-1 meet and jam in the middle; a step there costs more (about 1.2x at 10,000 agents:
    # more agents whose ideal velocity breaks an avoidance line). Users who run a crowd for minutes
    # pay that, so it is measured too, on the same scene after `sustained_after` frames.
    step("sustained")
    sustained = []
    for n in cfg.sustained_counts:
        per_frame_ms = base[-1]["ms_median"] * n / base[-1]["agents"] if base else 30.0
        cost = 1.5 * per_frame_ms * (cfg.sustained_after + max(cfg.frames, cfg.search_frames)) / 1e3
        if cost > left() * 0.5:
            res["skipped"].append(f"sustained n={n}: predicted {cost:.0f} s")
            continue
        r = measure(build_scene("square-1", n), max(cfg.frames, cfg.search_frames), cfg.sustained_after)
        r["scene"], r["after_frames"] = "square-1", cfg.sustained_after
        sustained.append(r)
    res["sustained"] = sustained
    for label, budget in BUDGETS_MS.items():
        res[f"sustained_fits_{label}"] = {str(r["agents"]): r["ms_median"] <= budget for r in sustained}
    done()

    step("pruned vs full")
    pf = pruned_vs_full(cfg.ratio_n, cfg.repeat)
    res["pruned_vs_full"] = pf
    res["pruned_vs_full_speedup"] = pf["speedup"]
    res["pruned_equals_full"] = pf["identical_picks"]
    done()

    step("hash vs cKDTree")
    hk = hash_vs_kdtree(cfg.hash_n, cfg.repeat)
    res["hash_vs_kdtree"] = hk
    res["hash_vs_kdtree_speedup"] = hk["speedup"]
    done()

    step("threads")
    th = threads_ratio(cfg.ratio_n, cfg.frames)
    res["threads"] = th
    res["threads_speedup"] = th["speedup"]
    done()

    step("search width")
    sweep = []
    for z in cfg.widths:
        if left() < 15 and sweep:
            res["skipped"].append(f"search width z={z}: deadline")
            continue
        w = build_scene("square-1", cfg.sweep_n)
        w.set_params(search_width=int(z))
        r = measure(w, cfg.frames, cfg.warmup)
        sweep.append({"z": int(z), "ms_median": r["ms_median"], "choose_ms": r["phases"]["choose"]["median"]})
    res["search_width"] = {"agents": cfg.sweep_n, "rows": sweep}
    done()

    step("buckets")
    from .records import default_record_set
    recs = default_record_set()
    brows = []
    for nb in cfg.buckets:
        if left() < 12 and brows:
            res["skipped"].append(f"buckets B={nb}: deadline")
            continue
        w = build_scene("square-1", cfg.sweep_n, records=recs.with_buckets(int(nb)))
        r = measure(w, cfg.frames, cfg.warmup)
        brows.append({"buckets": int(nb), "ms_median": r["ms_median"], "choose_ms": r["phases"]["choose"]["median"]})
    res["buckets"] = {"agents": cfg.sweep_n, "records": recs.n_records, "z": 3, "rows": brows}
    done()

    step("governor")
    from . import governor as gv
    cal_n = cfg.calibrate_n or min(max(res["max_agents_30fps"], 500), 20000)
    coeffs = gv.calibrate(n=cal_n, frames=max(2, cfg.frames))
    budget = BUDGETS_MS["30fps"]
    # agents from half of where z_max fits up to the most the governor can hold (z=0, K=4), by the model
    held = gv.HEADROOM * budget
    n_lo = max(16, gv.max_agents(held, coeffs, 10, 8) // 2)
    n_hi = max(n_lo + cfg.governor_frames, gv.max_agents(held, coeffs, 4, 0))
    n_hi = min(n_hi, cfg.governor_max)
    n_lo = min(n_lo, n_hi // 2)
    add = max(1, (n_hi - n_lo) // cfg.governor_frames)
    trace = gv.run_governed(budget, coeffs, start=n_lo, add=add, frames=cfg.governor_frames)
    gov_png = os.path.join(out_dir, "governor.png")
    gv.plot_governor(gov_png, trace)
    meas = np.asarray(trace["measured_ms"])
    res["governor"] = {"coeffs": list(coeffs), "calibrated_at_agents": cal_n, "coeff_names": list(gv.COEFF_NAMES), "budget_ms": round(budget, 2),
                       "agents_from": trace["n"][0], "agents_to": trace["n"][-1],
                       "z_chosen": sorted(set(trace["z"])), "k_chosen": sorted(set(trace["k"])),
                       "frames_over_budget": int((meas > budget).sum()), "frames": len(meas),
                       "model_error_median_pct": round(float(np.median(
                           np.abs(meas - np.asarray(trace["estimate_ms"])) / np.maximum(meas, 1e-9))) * 100, 1),
                       "measured_ms_median": round(float(np.median(meas)), 3), "plot": gov_png}
    done()

    step("warm start")
    if cfg.warm_start:
        ws = first_start
        if ws.get("first_frame_s") is None or ws["first_frame_s"] > 10.0:  # that one compiled: measure again
            if left() > 0:
                ws = dict(warm_start_s(), cold_start=first_start)
            else:
                ws = dict(ws, note="the cache was cold (compiled); no time left to measure a warm start")
        res["warm_start"] = ws
        res["warm_start_first_frame_s"] = ws.get("first_frame_s")
    done()

    step("plots")
    res["plots"] = plot_results(res, out_dir)
    res["plots"]["governor"] = gov_png
    done()
    if bar is not None:
        bar.close()
    res["phase_breakdown_at"] = _breakdown(base)
    res["elapsed_s"] = round(time.perf_counter() - t_start, 1)
    _write_json(os.path.join(out_dir, "budget.json"), res)
    return res


def _breakdown(rows, at=10000):
    """Per-phase medians of the curve point nearest `at` agents."""
    if not rows:
        return {}
    r = min(rows, key=lambda r: abs(r["agents"] - at))
    return {"agents": r["agents"], "ms_median": r["ms_median"], "ms_p95": r["ms_p95"], "phases": r["phases"]}


def _write_json(path, obj):
    tmp = path + ".tmp"
    with open(tmp, "w") as f:
        json.dump(obj, f, indent=1)
    os.replace(tmp, path)


# ------------------------------------------------------------------------------------------ plots

def plot_results(res, out_dir):
    """ms/frame vs agents with budget lines; stacked phase bars; cost vs search width and buckets."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from .governor import _save

    paths = {}
    fig, ax = plt.subplots(figsize=(7, 5))
    for scene, rows in res["curve"].items():
        if rows:
            ax.plot([r["agents"] for r in rows], [r["ms_median"] for r in rows], "o-", label=f"{scene} median")
            ax.plot([r["agents"] for r in rows], [r["ms_p95"] for r in rows], ":", color=ax.lines[-1].get_color(),
                    label=f"{scene} p95")
    for r in res.get("scenes_at_one_count", []):
        ax.plot([r["agents"]], [r["ms_median"]], "s", label=r["scene"])
    for label, b in BUDGETS_MS.items():
        ax.axhline(b, color="tab:red" if label == "30fps" else "tab:orange", ls="--", label=f"{b:.1f} ms ({label})")
    for label, m in res.get("max_agents", {}).items():
        if m["agents"]:
            ax.plot([m["agents"]], [m["budget_ms"]], "k*", ms=10)
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("agents")
    ax.set_ylabel("ms per frame (full step)")
    ax.set_title(f"step cost, exponent {res.get('scaling_exponent')}  (* = max agents found by search)")
    ax.legend(fontsize=7)
    fig.tight_layout()
    paths["ms_vs_agents"] = os.path.join(out_dir, "ms_vs_agents.png")
    _save(fig, paths["ms_vs_agents"])
    plt.close(fig)

    rows = list(next(iter(res["curve"].values()), [])) + list(res.get("scenes_at_one_count", []))
    fig, ax = plt.subplots(figsize=(8, 5))
    labels = [f"{r.get('scene', '')}\n{r['agents']}" for r in rows]
    bottom = np.zeros(len(rows))
    for k in PHASE_KEYS:
        vals = np.array([r["phases"][k]["median"] for r in rows])
        ax.bar(range(len(rows)), vals, bottom=bottom, label=k)
        bottom += vals
    ax.set_xticks(range(len(rows)))
    ax.set_xticklabels(labels, fontsize=7)
    ax.set_yscale("log" if len(bottom) and bottom.max() > 50 * max(bottom.min(), 1e-3) else "linear")
    ax.set_ylabel("ms per frame (median per phase, stacked)")
    ax.set_title("where the time goes")
    ax.legend(fontsize=7)
    fig.tight_layout()
    paths["phases"] = os.path.join(out_dir, "phases.png")
    _save(fig, paths["phases"])
    plt.close(fig)

    fig, (a1, a2) = plt.subplots(1, 2, figsize=(10, 4))
    sw = res["search_width"]["rows"]
    a1.plot([r["z"] for r in sw], [r["ms_median"] for r in sw], "o-", label="step")
    a1.plot([r["z"] for r in sw], [r["choose_ms"] for r in sw], "s--", label="choose phase")
    a1.set_xlabel("search width z")
    a1.set_ylabel("ms per frame")
    a1.set_title(f"{res['search_width']['agents']} agents")
    a1.legend()
    bk = res["buckets"]["rows"]
    a2.plot([r["buckets"] for r in bk], [r["ms_median"] for r in bk], "o-", label="step")
    a2.plot([r["buckets"] for r in bk], [r["choose_ms"] for r in bk], "s--", label="choose phase")
    a2.set_xscale("log")
    a2.set_xlabel("bucket count B (z = 3)")
    a2.legend()
    fig.tight_layout()
    paths["search_cost"] = os.path.join(out_dir, "search_cost.png")
    _save(fig, paths["search_cost"])
    plt.close(fig)
    return paths
