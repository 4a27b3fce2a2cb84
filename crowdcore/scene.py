"""The static scene: walls, solid obstacles, targets, and what is derived from them.

Derived data (segment grid, navigation fields) is rebuilt from the inputs whenever they change,
so a snapshot only needs the inputs to rebuild an identical scene.
"""
import math

import numpy as np

from .errors import ScenarioError
from .spatial import HashGrid, build_wall_grid

TARGET_KINDS = ("circle", "rect")


class Target:
    """A target region: ("circle", (cx, cy, r)) or ("rect", (xmin, ymin, xmax, ymax))."""

    __slots__ = ("name", "kind", "shape")

    def __init__(self, name, kind, shape, where="target"):
        if kind not in TARGET_KINDS:
            raise ScenarioError(f"{where}.kind: must be one of {', '.join(TARGET_KINDS)}, got {kind!r}")
        shape = tuple(float(v) for v in shape)
        need = 3 if kind == "circle" else 4
        if len(shape) != need or not all(math.isfinite(v) for v in shape):
            raise ScenarioError(f"{where}: a {kind} needs {need} finite numbers, got {shape!r}")
        if kind == "circle" and shape[2] <= 0:
            raise ScenarioError(f"{where}.radius: must be positive, got {shape[2]!r}")
        if kind == "rect" and not (shape[0] < shape[2] and shape[1] < shape[3]):
            raise ScenarioError(f"{where}: rectangle needs min < max on both axes, got {shape!r}")
        self.name, self.kind, self.shape = str(name), kind, shape

    def bounds(self):
        if self.kind == "circle":
            cx, cy, r = self.shape
            return cx - r, cy - r, cx + r, cy + r
        return self.shape

    def to_dict(self):
        return {"name": self.name, "kind": self.kind, "shape": list(self.shape)}


def _as_points(points, where, closed):
    pts = np.asarray(points, dtype=np.float64) if len(points) else np.zeros((0, 2))
    if pts.ndim != 2 or pts.shape[1] != 2:
        raise ScenarioError(f"{where}: must be a list of [x, y] points")
    if not np.isfinite(pts).all():
        raise ScenarioError(f"{where}: coordinates must be finite numbers")
    if len(pts) < (3 if closed else 2):
        raise ScenarioError(f"{where}: needs at least {3 if closed else 2} points, got {len(pts)}")
    return pts


def polyline_segments(pts, closed):
    ends = np.roll(pts, -1, axis=0) if closed else pts[1:]
    starts = pts if closed else pts[:-1]
    return np.hstack([starts, ends])


class Scene:
    """Walls (open or closed polylines), solid polygons and targets, plus derived grids."""

    def __init__(self):
        self.walls = []        # list of (points float64[k,2], closed bool)
        self.obstacles = []    # list of float64[k,2] polygons (solid)
        self.targets = []      # list of Target

    # ---------------------------------------------------------- editing (validated, atomic)
    def add_wall(self, points, closed=False, where="wall"):
        self.walls.append((_as_points(points, where, closed), bool(closed)))

    def add_obstacle(self, points, where="obstacle"):
        self.obstacles.append(_as_points(points, where, True))

    def add_target(self, name, kind, shape, where="target"):
        if any(t.name == name for t in self.targets):
            raise ScenarioError(f"{where}.name: target {name!r} exists already")
        self.targets.append(Target(name, kind, shape, where))
        return len(self.targets) - 1

    def target_index(self, name):
        for i, t in enumerate(self.targets):
            if t.name == name:
                return i
        raise ScenarioError(f"unknown target {name!r}; known: {', '.join(t.name for t in self.targets) or 'none'}")

    def copy(self):
        s = Scene()
        s.walls = [(p.copy(), c) for p, c in self.walls]
        s.obstacles = [p.copy() for p in self.obstacles]
        s.targets = list(self.targets)
        return s

    # ---------------------------------------------------------- derived
    def segments(self):
        """All wall and obstacle edges as float64[m, 4] (x0, y0, x1, y1)."""
        parts = [polyline_segments(p, c) for p, c in self.walls]
        parts += [polyline_segments(p, True) for p in self.obstacles]
        return np.ascontiguousarray(np.vstack(parts)) if parts else np.zeros((0, 4))

    def bounds(self, extra_points=None, margin=2.0):
        boxes = [np.r_[p.min(0), p.max(0)] for p, _ in self.walls]
        boxes += [np.r_[p.min(0), p.max(0)] for p in self.obstacles]
        boxes += [np.array(t.bounds(), float) for t in self.targets]
        if extra_points is not None and len(extra_points):
            boxes.append(np.r_[extra_points.min(0), extra_points.max(0)])
        if not boxes:
            return (-10.0, -10.0, 10.0, 10.0)
        b = np.array(boxes)
        return (b[:, 0].min() - margin, b[:, 1].min() - margin, b[:, 2].max() + margin, b[:, 3].max() + margin)

    def to_dict(self):
        return {
            "walls": [{"points": p.tolist(), "closed": c} for p, c in self.walls],
            "obstacles": [p.tolist() for p in self.obstacles],
            "targets": [t.to_dict() for t in self.targets],
        }

    @classmethod
    def from_dict(cls, data):
        s = cls()
        for i, w in enumerate(data.get("walls", [])):
            s.add_wall(w["points"], w.get("closed", False), f"walls[{i}]")
        for i, p in enumerate(data.get("obstacles", [])):
            s.add_obstacle(p, f"obstacles[{i}]")
        for i, t in enumerate(data.get("targets", [])):
            s.add_target(t["name"], t["kind"], t["shape"], f"targets[{i}]")
        return s


class SceneCache:
    """Everything kernels need from a scene, built in one go (so a failure replaces nothing)."""

    def __init__(self, scene, params, bounds):
        from .navfield import NavFields

        self.bounds = tuple(float(v) for v in bounds)
        self.segments = scene.segments()
        xmin, ymin, xmax, ymax = self.bounds
        self.wall_grid = HashGrid.covering(xmin, ymin, xmax, ymax, 2.0, max_cells=1 << 20)
        # a segment is listed in the cells its bounding box touches; queries cover their whole reach
        self.wall_start, self.wall_items = build_wall_grid(self.segments, self.wall_grid, 0.0)
        self.nav = NavFields.build(
            self.segments,
            [p for p in scene.obstacles],
            [(t.kind, t.shape) for t in scene.targets],
            self.bounds,
            params.nav_cell,
            params.clearance,
        )
        self.target_kind = np.array([TARGET_KINDS.index(t.kind) for t in scene.targets], np.int32)
        shapes = np.zeros((len(scene.targets), 4))
        for i, t in enumerate(scene.targets):
            shapes[i, : len(t.shape)] = t.shape
        self.target_shape = shapes
