"""Budget governor: choose the search width z and neighbour count K per frame so a step fits a ms budget.

The decision is a pure function of the agent count and a few stored numbers (the cost model's
coefficients), never of a clock read during the run. So two runs, a replay and a run resumed from a
snapshot make the same choices and stay bit-exact; only `calibrate` reads the clock, once, and its
result is plain data that a world stores with its parameters.

Cost model (ms per frame), fitted per machine:
    estimate = c0 + n * (c_agent + c_nbr * K + c_cand * (2z + 1) + c_wide * [z > 0])
c0: fixed cost per step; c_agent: per-agent work that depends on neither K nor z (index, navigate,
move, account, the choice's own set-up); c_nbr: per agent and neighbour (sense, avoid); c_cand:
per agent and speed bucket searched; c_wide: the step from searching one bucket to searching its
neighbours too. The pruned search prunes most outer records early, so the choice grows much less
than 2z + 1 and jumps once from z = 0 to z = 1 (measured, choose phase, square-1 with 5,000 agents on
2 cores: 5.5 ms at z = 0, 7.1 at 1, 8.0 at 2, 8.6 at 3; 13.8 at 5 and 15.6 at 8, where one tree per
bucket replaces the window trees): a cost linear in 2z + 1
alone overestimated wide searches and underestimated narrow ones. All coefficients are >= 0, so the
estimate never falls when n, K or z grow. Four numbers (the model without c_wide) are still accepted.

plan() aims at HEADROOM x the budget: single frames scatter by about +-10% around the model on a
shared 2-core machine (measured), and a governor that plans to the last millisecond overshoots half
of the time.
"""
import math

from .errors import ScenarioError

COEFF_NAMES = ("c0_ms", "agent_ms", "nbr_ms", "bucket_ms", "wide_ms")
# Conservative fall-back (ms), in the range measured on a 2-core machine; calibrate() replaces it.
DEFAULT_COEFFS = (1.0, 1.1e-3, 0.07e-3, 0.03e-3, 0.8e-3)
HEADROOM = 0.9


def check_coeffs(coeffs, where="budget_coeffs"):
    """The coefficients as a tuple of 5 finite floats >= 0 (4 are read as the model without c_wide);
    raises ScenarioError naming the bad one."""
    n = len(COEFF_NAMES)
    if isinstance(coeffs, (str, bytes)) or not hasattr(coeffs, "__len__") or len(coeffs) not in (n - 1, n):
        raise ScenarioError(f"{where}: must be {n} numbers ({', '.join(COEFF_NAMES)}), got {coeffs!r}")
    out = []
    for name, v in zip(COEFF_NAMES, coeffs):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
            raise ScenarioError(f"{where}.{name}: must be a finite number >= 0, got {v!r}")
        out.append(float(v))
    return tuple(out + [0.0] * (n - len(out)))


def estimate_ms(n, k, z, coeffs):
    """Predicted ms per frame for n agents, K neighbours and search width z (pure, deterministic)."""
    return _estimate(n, k, z, check_coeffs(coeffs))


def _per_agent(k, z, coeffs):
    """ms per agent at (K, z) on 5 checked coefficients."""
    _c0, ca, cn, cb, cw = coeffs
    return ca + cn * k + cb * (2 * z + 1) + (cw if z > 0 else 0.0)


def _estimate(n, k, z, coeffs):
    """estimate_ms on 5 checked coefficients: plan() validates once per frame, not once per trial."""
    return coeffs[0] + n * _per_agent(k, z, coeffs)


def plan(n, budget_ms, coeffs, z_max=3, k_min=4, k_max=10):
    """(z, K) for this frame: the largest z, then the largest K, whose estimate fits HEADROOM x budget_ms.

    z is given up first (the choice degrades gracefully to fewer speed buckets); K falls only once
    z = 0 does not fit. If even (0, k_min) is over budget, that is returned: the step still runs.
    Decisions depend only on the arguments, so they replay exactly."""
    z_max, k_min, k_max = int(z_max), int(k_min), int(k_max)
    if z_max < 0 or k_min < 0 or k_max < k_min:
        raise ScenarioError(f"governor: need z_max >= 0 and 0 <= k_min <= k_max, got {z_max}, {k_min}, {k_max}")
    if budget_ms <= 0:  # governor off
        return z_max, k_max
    coeffs = check_coeffs(coeffs)
    budget_ms = HEADROOM * budget_ms
    for z in range(z_max, -1, -1):
        if _estimate(n, k_max, z, coeffs) <= budget_ms:
            return z, k_max
    for k in range(k_max - 1, k_min - 1, -1):
        if _estimate(n, k, 0, coeffs) <= budget_ms:
            return 0, k
    return 0, k_min


def max_agents(budget_ms, coeffs, k, z):
    """Largest n whose estimate fits budget_ms at (K, z), by the model; 0 if none."""
    coeffs = check_coeffs(coeffs)
    c0, per = coeffs[0], _per_agent(k, z, coeffs)
    if budget_ms < c0:
        return 0
    if per <= 0:
        return 2**31 - 1
    n = int((budget_ms - c0) / per)
    while n > 0 and _estimate(n, k, z, coeffs) > budget_ms:  # guard the float division
        n -= 1
    return n


# ------------------------------------------------------------------------------------- calibration

def calibrate(progress=False, n=3000, frames=5, seed=0):
    """Measure this machine's coefficients (see the module text); returns a tuple of 4 floats.

    Times whole steps of open squares with n/2 and n agents at several (K, z) and fits the model by
    non-negative least squares. Reads the clock: call it once and store the result
    (Params.budget_coeffs); never per frame."""
    import numpy as np
    from scipy.optimize import nnls
    from .budget import build_scene, warm_up

    warm_up()
    settings = [(10, 3), (10, 0), (4, 3), (10, 8), (4, 0), (10, 1)]
    runs = [(size, k, z) for size in (max(n // 2, 8), max(n, 16)) for k, z in settings]
    it = runs
    if progress:
        from tqdm import tqdm
        it = tqdm(runs, desc="calibrate", unit="run")
    rows, ms = [], []
    worlds = {}
    for size, k, z in it:
        if size not in worlds:
            worlds[size] = build_scene("square-1", size, seed=seed)
        w = worlds[size]
        w.set_params(neighbours=k, search_width=z)
        w.step()  # the first step after a change settles buffers
        t = []
        for _ in range(frames):
            w.step()
            t.append(sum(w.phase_ms.values()))
        m = w.agent_count
        rows.append([1.0, m, m * k, m * (2 * z + 1), m * (z > 0)])
        ms.append(float(np.median(t)))
    coef, _ = nnls(np.asarray(rows), np.asarray(ms))
    return check_coeffs(tuple(float(c) for c in coef))


# ------------------------------------------------------------------------------------- governed run

def run_governed(budget_ms, coeffs, start=200, add=100, every=1, frames=40, z_max=8, k_min=4, k_max=10,
                 seed=0, recorder_path=None, progress=False, builtin=False):
    """Run an open square while agents are added, applying plan() before each step.

    Each frame: maybe add `add` agents (every `every` frames), plan (z, K) from the agent count,
    set them with world.set_params (journaled, so a recording replays exactly), step, and note the
    measured ms. With builtin=True the world's own governor (Params.budget_ms / budget_coeffs) decides
    inside step() instead, and the trace reads its choices from the step stats. Returns a trace dict
    of lists (frame, n, z, k, estimate_ms, measured_ms) and the world's final state hash."""
    from .budget import layout, _speeds

    coeffs = check_coeffs(coeffs)
    n_final = start + add * ((frames + every - 1) // every)
    lay = layout("square-1", n_final, seed)
    speeds = _speeds(n_final, seed)
    w = lay.world(0, seed)
    w.add_agents(lay.positions[:start], target=lay.target[:start], pref_speed=speeds[:start])
    used = start
    if builtin:   # setting the budget builds the search forests of every width the governor may pick
        w.set_params(budget_ms=float(budget_ms), budget_coeffs=list(coeffs), search_width=z_max, neighbours=k_max)
    else:
        w._prepare_forests(z_max)  # as a governed world does: no frame pays for a build
    rec = None
    if recorder_path is not None:
        from .recording import Recorder
        rec = Recorder(w, recorder_path)
    trace = {"frame": [], "n": [], "z": [], "k": [], "estimate_ms": [], "measured_ms": [], "budget_ms": budget_ms}
    it = range(frames)
    if progress:
        from tqdm import tqdm
        it = tqdm(it, desc="governor", unit="frame")
    try:
        for f in it:
            if f % every == 0 and add and used < n_final:
                sl = slice(used, min(used + add, n_final))
                w.add_agents(lay.positions[sl], target=lay.target[sl], pref_speed=speeds[sl])
                used = sl.stop
            n = w.agent_count
            if builtin:
                stats = w.step()
                z, k = stats["search_width"], stats["neighbours"]
            else:
                z, k = plan(n, budget_ms, coeffs, z_max, k_min, k_max)
                if (z, k) != (w.params.search_width, w.params.neighbours):
                    w.set_params(search_width=z, neighbours=k)
                w.step()
            trace["frame"].append(w.frame)
            trace["n"].append(n)
            trace["z"].append(z)
            trace["k"].append(k)
            trace["estimate_ms"].append(estimate_ms(n, k, z, coeffs))
            trace["measured_ms"].append(sum(w.phase_ms.values()))
    finally:
        if rec is not None:
            rec.close()
    trace["state_hash"] = w.state_hash()
    return trace


def plot_governor(out_png, trace):
    """Measured ms/frame against the budget line, and the chosen z (and K) over the frames."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fr = trace["frame"]
    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(8, 6), sharex=True)
    ax1.plot(fr, trace["measured_ms"], label="measured ms/frame", color="tab:blue")
    ax1.plot(fr, trace["estimate_ms"], label="model estimate", color="tab:orange", ls="--")
    ax1.axhline(trace["budget_ms"], color="tab:red", label=f"budget {trace['budget_ms']:.1f} ms")
    ax1.set_ylabel("ms per frame")
    ax1.legend(loc="upper left", fontsize=8)
    axn = ax1.twinx()
    axn.plot(fr, trace["n"], color="grey", lw=0.8)
    axn.set_ylabel("agents", color="grey")
    ax2.step(fr, trace["z"], where="post", label="search width z")
    ax2.step(fr, trace["k"], where="post", label="neighbours K")
    ax2.set_xlabel("frame")
    ax2.set_ylabel("chosen")
    ax2.legend(loc="upper right", fontsize=8)
    fig.suptitle("budget governor while agents are added")
    fig.tight_layout()
    _save(fig, out_png)
    plt.close(fig)
    return out_png


def _save(fig, path):
    import os
    tmp = f"{path}.tmp.png"
    fig.savefig(tmp, dpi=90)
    os.replace(tmp, path)
