"""A synthetic walker of our own, used to make the bundled demo record set.

All data it makes is INVENTED: no person was tracked. Assumptions, in the units of the records
(metres, seconds; sampled at 10 fps, dt = 0.1 s):

- Free speed per walker ~ Normal(1.34, 0.26) m/s clipped to [0.5, 2.2]
  (Weidmann 1993, via a secondary summary [V]; see REFERENCES.md).
- Speed follows an Ornstein-Uhlenbeck-like process that relaxes towards a target speed with rate
  1/s and noise 0.08 m/s/sqrt(s) (stationary spread about 0.06 m/s) [invented].
- The target is the free speed, except during occasional slow-downs (chance 0.003 per frame,
  target 20-60 % of the free speed for 1-4 s) and stops (chance 0.0015 per frame, relax rate
  2/s towards 0 and standing still, speed exactly 0, once below 0.05 m/s, for 1-5 s; on
  restarting the walker faces a new heading, Normal(0, 0.7) rad away) [invented].
- Heading drifts by small random turns (0.25 rad/sqrt(s), scaled up by free speed / speed, at
  most 3x, so slow walkers wobble more); with chance 0.01 per frame a walker
  makes a sharper turn of 0.6-1.8 rad either way spread over 4-10 frames [invented].
- Speeds are clipped to [0, 3] m/s, under the reader's 4 m/s plausibility limit.
So low speeds and larger turns are represented in the records, not only straight free walking.

Only an explicit numpy Generator (np.random.default_rng(seed)) is used; the output depends on the
seed alone. Regenerate the bundled set with ``python -m crowdcore.walker --out crowdcore/data/default.records``.
"""
from __future__ import annotations

import argparse
import io
from pathlib import Path

import numpy as np

from crowdcore._files import atomic_write
from crowdcore.records import (DEFAULT_PATH, RecordSet, extract_records, tracks_from_table)

FPS = 10.0
DT = 1.0 / FPS
FREE_MEAN, FREE_SD, FREE_MIN, FREE_MAX = 1.34, 0.26, 0.5, 2.2  # Weidmann 1993 [V], via REFERENCES.md
SPEED_RELAX, SPEED_NOISE, STOP_RELAX, STAND_BELOW, SPEED_CAP = 1.0, 0.08, 2.0, 0.05, 3.0
HEADING_NOISE, SLOW_WOBBLE_CAP, RESTART_TURN_SD = 0.25, 3.0, 0.7
P_SLOW, P_STOP, P_TURN = 0.003, 0.0015, 0.01

# Bundled default set: 200 walkers x 402 frames -> 200 x 400 = 80,000 records, B = 100.
DEFAULT_WALKERS, DEFAULT_FRAMES, DEFAULT_SEED, DEFAULT_BUCKETS = 200, 402, 20_251_202, 100

_WALK, _SLOW, _STOP = 0, 1, 2


def synthetic_trajectories(n_walkers: int, n_frames: int, seed: int) -> np.ndarray:
    """Invented trajectories as float64[n_walkers * n_frames, 4] rows (frame, id, x, y).

    Rows are ordered by frame, then id (ids 1..n_walkers), like a tracker's output; x, y in metres.
    """
    for name, val in (("n_walkers", n_walkers), ("n_frames", n_frames)):
        if isinstance(val, bool) or not isinstance(val, (int, np.integer)) or val < 0:
            raise ValueError(f"{name} must be a non-negative integer, got {val!r}")
    n, T = int(n_walkers), int(n_frames)
    rng = np.random.default_rng(seed)
    free = np.clip(rng.normal(FREE_MEAN, FREE_SD, n), FREE_MIN, FREE_MAX)
    pos = rng.uniform(0.0, 100.0, (n, 2))
    heading = rng.uniform(-np.pi, np.pi, n)
    speed = free.copy()
    mode = np.full(n, _WALK, np.int8)
    mode_left = np.zeros(n, np.int64)
    slow_target = np.zeros(n)
    turn_rate = np.zeros(n)
    turn_left = np.zeros(n, np.int64)
    sq = np.sqrt(DT)

    out = np.empty((T, n, 4))
    out[:, :, 0] = np.arange(T)[:, None]
    out[:, :, 1] = np.arange(1, n + 1)[None, :]
    for k in range(T):  # one vectorised step over all walkers per frame
        out[k, :, 2:] = pos
        # Every draw is made for every walker, so the stream does not depend on the state.
        u_event, u_turn = rng.random(n), rng.random(n)
        slow_frac, slow_len = rng.uniform(0.2, 0.6, n), rng.integers(10, 41, n)
        stop_len = rng.integers(10, 51, n)
        turn_angle = rng.uniform(0.6, 1.8, n) * rng.choice((-1.0, 1.0), n)
        turn_len = rng.integers(4, 11, n)
        z_speed, z_head, z_restart = rng.standard_normal(n), rng.standard_normal(n), rng.standard_normal(n)

        walking = mode == _WALK
        start_stop = walking & (u_event < P_STOP)
        start_slow = walking & (u_event >= P_STOP) & (u_event < P_STOP + P_SLOW)
        mode[start_stop], mode_left[start_stop] = _STOP, stop_len[start_stop]
        mode[start_slow], mode_left[start_slow] = _SLOW, slow_len[start_slow]
        slow_target[start_slow] = free[start_slow] * slow_frac[start_slow]
        new_turn = (mode != _STOP) & (turn_left == 0) & (u_turn < P_TURN)
        turn_rate[new_turn] = turn_angle[new_turn] / turn_len[new_turn]
        turn_left[new_turn] = turn_len[new_turn]

        stopping = mode == _STOP
        target = np.where(mode == _WALK, free, np.where(mode == _SLOW, slow_target, 0.0))
        rate = np.where(stopping, STOP_RELAX, SPEED_RELAX)
        speed = speed + rate * (target - speed) * DT + np.where(stopping, 0.0, SPEED_NOISE * sq * z_speed)
        speed = np.clip(speed, 0.0, SPEED_CAP)
        speed[stopping & (speed < STAND_BELOW)] = 0.0

        turning = turn_left > 0
        wobble = HEADING_NOISE * sq * np.minimum(SLOW_WOBBLE_CAP, free / np.maximum(speed, 1e-3))
        heading = heading + np.where(speed > 0, wobble * z_head, 0.0) + np.where(turning, turn_rate, 0.0)
        turn_left[turning] -= 1

        busy = mode != _WALK
        mode_left[busy] -= 1
        ended = busy & (mode_left <= 0)
        heading[ended & stopping] += RESTART_TURN_SD * z_restart[ended & stopping]
        mode[ended] = _WALK
        heading = np.mod(heading + np.pi, 2 * np.pi) - np.pi

        pos = pos + speed[:, None] * np.column_stack((np.cos(heading), np.sin(heading))) * DT
    return out.reshape(T * n, 4)


def write_csv(path, table, comment: str | None = None, decimals: int = 6) -> None:
    """Write rows (frame, id, x, y) as a trajectory CSV, atomically; `comment` lines get a '# ' prefix."""
    arr = np.asarray(table, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[1] != 4:
        raise ValueError(f"table must have shape (n, 4) (frame, id, x, y), got {arr.shape}")
    buf = io.StringIO()
    for line in (comment or "").splitlines():
        buf.write(f"# {line}\n")
    buf.write("frame,id,x,y\n")
    np.savetxt(buf, arr, fmt=("%d", "%d", f"%.{int(decimals)}f", f"%.{int(decimals)}f"), delimiter=",")
    atomic_write(path, buf.getvalue().encode())


def make_record_set(n_walkers: int = DEFAULT_WALKERS, n_frames: int = DEFAULT_FRAMES, seed: int = DEFAULT_SEED,
                    buckets: int = DEFAULT_BUCKETS) -> RecordSet:
    """Records of invented synthetic walkers (the bundled default set with the default arguments)."""
    source = (f"invented data: crowdcore.walker synthetic walkers (walkers={n_walkers}, frames={n_frames}, "
              f"seed={seed}, fps={FPS:g})")
    table = synthetic_trajectories(n_walkers, n_frames, seed)
    a, b, phi = extract_records(tracks_from_table(table, FPS, source=source))
    return RecordSet.from_arrays(a, b, phi, dt=DT, buckets=buckets, source=source)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(prog="python -m crowdcore.walker",
                                 description="Generate invented synthetic walker data and its motion records.")
    ap.add_argument("--out", default=str(DEFAULT_PATH), help="record-set file to write")
    ap.add_argument("--walkers", type=int, default=DEFAULT_WALKERS)
    ap.add_argument("--frames", type=int, default=DEFAULT_FRAMES)
    ap.add_argument("--seed", type=int, default=DEFAULT_SEED)
    ap.add_argument("--buckets", type=int, default=DEFAULT_BUCKETS)
    ap.add_argument("--csv", default=None, help="also write the trajectories as CSV to this path")
    args = ap.parse_args(argv)
    rs = make_record_set(args.walkers, args.frames, args.seed, args.buckets)
    rs.save(args.out)
    if args.csv:
        write_csv(args.csv, synthetic_trajectories(args.walkers, args.frames, args.seed),
                  comment=f"INVENTED DATA: synthetic walkers from crowdcore.walker (seed {args.seed}), 10 fps, metres")
    print(f"wrote {args.out}: {rs.n_records} records, {rs.n_buckets} buckets, hash {rs.content_hash[:16]}")


if __name__ == "__main__":
    main()
