"""Scenario files: a TOML schema of our own describing a scene, its agents and parameters.

    name = "two-way crossing"      # free text
    seed = 7                       # drives spawning; same seed, same world
    frames = 600                   # default run length for the command line
    [params]                       # any World parameter (see crowdcore.params.Params)
    avoidance = "orca"
    [params.weights]
    avoidance = 3.0
    [records]                      # optional; default: the bundled record set
    file = "my.records"            # relative to the scenario file
    buckets = 100
    [[walls]]                      # a polyline; closed = true joins the last point to the first
    points = [[0, 0], [40, 0]]
    [[obstacles]]                  # a solid polygon
    points = [[1, 1], [2, 1], [2, 2]]
    [[targets]]                    # circle = [x, y, r] or rect = [xmin, ymin, xmax, ymax]
    name = "east"
    rect = [39, 0, 41, 2]
    [[spawns]]
    rect = [0, 0, 5, 2]            # where agents start (random, no overlap, clear of walls)
    count = 20                     # or positions = [[x, y], ...]
    target = "east"
    speed = { mean = 1.34, sd = 0.26, min = 0.5, max = 2.0 }   # or a plain number
    radius = 0.25
    group_size = 1                 # > 1: consecutive agents walk together

Every error names its key path, e.g. `spawns[1].count: must be a positive integer, got -3`,
and a bad file builds nothing.
"""
import math
import os
import tomllib

import numpy as np

from .errors import ScenarioError, RecordSetError
from .params import Params
from .placement import place_in_rect
from .scene import Scene

TOP_KEYS = {"name", "seed", "frames", "params", "records", "walls", "obstacles", "targets", "spawns", "bounds"}
SPAWN_KEYS = {"rect", "count", "positions", "target", "speed", "radius", "group_size", "velocity"}


def _check_keys(table, allowed, where):
    if not isinstance(table, dict):
        raise ScenarioError(f"{where}: must be a table")
    for key in table:
        if key not in allowed:
            raise ScenarioError(f"{where}{'.' if where else ''}{key}: unknown key; known: {', '.join(sorted(allowed))}")


def _number(value, where, lo=-math.inf, hi=math.inf, integer=False):
    kind = "an integer" if integer else "a number"
    if isinstance(value, bool) or not isinstance(value, int if integer else (int, float)):
        raise ScenarioError(f"{where}: must be {kind}, got {value!r}")
    if not math.isfinite(value) or not lo <= value <= hi:
        raise ScenarioError(f"{where}: must be {kind} in [{lo}, {hi}], got {value!r}")
    return value


def _numbers(value, n, where):
    if not isinstance(value, list) or len(value) != n:
        raise ScenarioError(f"{where}: must be a list of {n} numbers, got {value!r}")
    return [float(_number(v, f"{where}[{i}]")) for i, v in enumerate(value)]


def _points(value, where):
    if not isinstance(value, list) or not all(isinstance(p, list) and len(p) == 2 for p in value):
        raise ScenarioError(f"{where}: must be a list of [x, y] points")
    return [_numbers(p, 2, f"{where}[{i}]") for i, p in enumerate(value)]


def _speeds(spec, n, rng, where):
    if isinstance(spec, (int, float)) and not isinstance(spec, bool):
        return np.full(n, float(_number(spec, where, 0.0, 5.0)))
    _check_keys(spec, {"mean", "sd", "min", "max"}, where)
    mean = _number(spec.get("mean", 1.34), f"{where}.mean", 0.0, 5.0)
    sd = _number(spec.get("sd", 0.26), f"{where}.sd", 0.0, 5.0)
    lo = _number(spec.get("min", 0.3), f"{where}.min", 0.0, 5.0)
    hi = _number(spec.get("max", 2.2), f"{where}.max", 0.0, 5.0)
    if lo > hi:
        raise ScenarioError(f"{where}: min ({lo}) exceeds max ({hi})")
    return np.clip(rng.normal(mean, sd, n), lo, hi)


def parse_scenario(text, base_dir=".", source="<text>"):
    """Parse and validate scenario TOML text; returns a plain description (no world yet)."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise ScenarioError(f"{source}: not valid TOML: {e}") from None
    _check_keys(doc, TOP_KEYS, "")
    spec = {"name": str(doc.get("name", "")), "source": source}
    spec["seed"] = _number(doc.get("seed", 0), "seed", 0, 2**63 - 1, integer=True)
    spec["frames"] = _number(doc.get("frames", 600), "frames", 1, 10**7, integer=True)
    spec["params"] = Params.from_dict(doc.get("params", {}), "params")
    rec = doc.get("records", {})
    _check_keys(rec, {"file", "buckets"}, "records")
    spec["records_file"] = None
    if "file" in rec:
        if not isinstance(rec["file"], str):
            raise ScenarioError("records.file: must be a path string")
        spec["records_file"] = os.path.join(base_dir, rec["file"])
    spec["buckets"] = _number(rec.get("buckets", 100), "records.buckets", 1, 100000, integer=True) if "buckets" in rec else None

    scene = Scene()
    for i, w in enumerate(doc.get("walls", [])):
        _check_keys(w, {"points", "closed"}, f"walls[{i}]")
        closed = w.get("closed", False)
        if not isinstance(closed, bool):
            raise ScenarioError(f"walls[{i}].closed: must be true or false")
        scene.add_wall(_points(w.get("points"), f"walls[{i}].points"), closed, f"walls[{i}].points")
    for i, o in enumerate(doc.get("obstacles", [])):
        _check_keys(o, {"points"}, f"obstacles[{i}]")
        scene.add_obstacle(_points(o.get("points"), f"obstacles[{i}].points"), f"obstacles[{i}].points")
    for i, t in enumerate(doc.get("targets", [])):
        where = f"targets[{i}]"
        _check_keys(t, {"name", "circle", "rect"}, where)
        if not isinstance(t.get("name"), str) or not t["name"]:
            raise ScenarioError(f"{where}.name: must be a non-empty string")
        if ("circle" in t) == ("rect" in t):
            raise ScenarioError(f"{where}: give exactly one of circle = [x, y, r] or rect = [xmin, ymin, xmax, ymax]")
        kind = "circle" if "circle" in t else "rect"
        scene.add_target(t["name"], kind, _numbers(t[kind], 3 if kind == "circle" else 4, f"{where}.{kind}"), where)
    spec["scene"] = scene
    spec["bounds"] = _numbers(doc["bounds"], 4, "bounds") if "bounds" in doc else None

    spawns = []
    for i, s in enumerate(doc.get("spawns", [])):
        where = f"spawns[{i}]"
        _check_keys(s, SPAWN_KEYS, where)
        sp = {"where": where}
        if ("rect" in s) == ("positions" in s):
            raise ScenarioError(f"{where}: give exactly one of rect (with count) or positions")
        if "rect" in s:
            sp["rect"] = _numbers(s["rect"], 4, f"{where}.rect")
            if not (sp["rect"][0] < sp["rect"][2] and sp["rect"][1] < sp["rect"][3]):
                raise ScenarioError(f"{where}.rect: needs xmin < xmax and ymin < ymax")
            c = s.get("count")
            if isinstance(c, bool) or not isinstance(c, int) or c <= 0:
                raise ScenarioError(f"{where}.count: must be a positive integer, got {c!r}")
            if c > 1_000_000:
                raise ScenarioError(f"{where}.count: at most 1000000 agents per spawn, got {c}")
            sp["count"] = c
        else:
            sp["positions"] = _points(s["positions"], f"{where}.positions")
            if not sp["positions"]:
                raise ScenarioError(f"{where}.positions: must not be empty")
        tname = s.get("target")
        if tname is None:
            sp["target"] = -1
        else:
            try:
                sp["target"] = scene.target_index(tname)
            except ScenarioError as e:
                raise ScenarioError(f"{where}.target: {e}") from None
        sp["speed"] = s.get("speed", {"mean": 1.34, "sd": 0.26})
        if not isinstance(sp["speed"], (dict, int, float)) or isinstance(sp["speed"], bool):
            raise ScenarioError(f"{where}.speed: must be a number or a table with mean, sd, min, max")
        sp["radius"] = _number(s.get("radius", 0.25), f"{where}.radius", 0.05, 2.0)
        sp["group_size"] = _number(s.get("group_size", 1), f"{where}.group_size", 1, 100, integer=True)
        sp["velocity"] = _numbers(s["velocity"], 2, f"{where}.velocity") if "velocity" in s else None
        spawns.append(sp)
    spec["spawns"] = spawns
    return spec


def build_world(spec):
    """Build a World from a parsed scenario; on error nothing is built."""
    from .records import RecordSet, default_record_set
    from .world import World

    records = default_record_set()
    if spec["records_file"]:
        try:
            records = RecordSet.load(spec["records_file"])
        except (OSError, RecordSetError) as e:
            raise ScenarioError(f"records.file: cannot load {spec['records_file']}: {e}") from None
    if spec["buckets"] and spec["buckets"] != records.n_buckets:
        if spec["buckets"] > records.n_records:
            raise ScenarioError(f"records.buckets: {spec['buckets']} exceeds the {records.n_records} records")
        records = records.with_buckets(spec["buckets"])
    world = World(spec["scene"], spec["params"], records, seed=spec["seed"])
    if spec["bounds"]:
        world.set_bounds(*spec["bounds"])
    segments = world.scene.segments()
    polys = list(world.scene.obstacles)
    placed = np.zeros((0, 2))
    next_group = 0
    for sp in spec["spawns"]:
        if "rect" in sp:
            pos = place_in_rect(world.rng, sp["rect"], sp["count"], sp["radius"], 0.05, segments, polys, placed)
            if len(pos) < sp["count"]:
                raise ScenarioError(f"{sp['where']}: room for only {len(pos)} of {sp['count']} agents of radius "
                                    f"{sp['radius']} m in rect {sp['rect']}")
        else:
            pos = np.asarray(sp["positions"], float)
        n = len(pos)
        speeds = _speeds(sp["speed"], n, world.rng, f"{sp['where']}.speed")
        group = -np.ones(n, np.int64)
        if sp["group_size"] > 1:
            group = next_group + np.arange(n) // sp["group_size"]
            next_group = int(group.max()) + 1
        vel = None if sp["velocity"] is None else np.tile(sp["velocity"], (n, 1))
        world.add_agents(pos, target=sp["target"], pref_speed=speeds, radius=sp["radius"], velocity=vel, group=group)
        placed = np.vstack([placed, pos])
    world.name = spec["name"]
    world.default_frames = spec["frames"]
    return world


def load_scenario(source):
    """A World from a scenario file path (str or os.PathLike) or from TOML text containing a newline."""
    if isinstance(source, (str, os.PathLike)) and "\n" not in str(source):
        path = os.fspath(source)
        try:
            with open(path, "rb") as f:
                text = f.read().decode("utf-8")
        except OSError as e:
            raise ScenarioError(f"{path}: cannot read scenario: {e.strerror or e}") from None
        except UnicodeDecodeError:
            raise ScenarioError(f"{path}: scenario is not UTF-8 text") from None
        return build_world(parse_scenario(text, os.path.dirname(os.path.abspath(path)), path))
    return build_world(parse_scenario(str(source)))
