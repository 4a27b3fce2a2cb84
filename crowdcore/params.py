"""World parameters: one validated, plain-data object (snapshots store it as a dict)."""
from dataclasses import dataclass, field, fields, asdict
import math

from .errors import ScenarioError

WEIGHT_NAMES = ("similarity", "consistency", "expectation", "direction", "avoidance", "group")
AVOIDANCE_MODELS = ("orca", "social-force")
SEARCH_METHODS = ("pruned", "full")

DEFAULT_WEIGHTS = {
    "similarity": 1.0,   # smooth change of velocity
    "consistency": 1.0,  # the record starts from the present speed
    "expectation": 1.0,  # preferred speed along the route
    "direction": 0.5,    # follow the direction field
    "avoidance": 6.0,    # stay near the collision-free velocity
    "group": 1.0,        # hold the formation (only agents in a group)
}


def _default_coeffs():
    from .governor import DEFAULT_COEFFS
    return DEFAULT_COEFFS


@dataclass
class Params:
    """Everything that shapes a step, apart from scene and agents. Units: metres, seconds."""

    dt: float = 0.1                       # default step when step() is called without dt
    avoidance: str = "orca"               # "orca" or "social-force"
    weights: dict = field(default_factory=lambda: dict(DEFAULT_WEIGHTS))
    search_width: int = 3                 # buckets scanned on each side of the agent's speed bucket
    strict: bool = True                   # candidates must satisfy the avoidance constraints
    search: str = "pruned"                # "pruned" (indexed) or "full" scan; both pick the same record
    neighbours: int = 10                  # K nearest neighbours considered
    sense_radius: float = 2.5             # neighbours farther than this are ignored
    nav_cell: float = 0.25                # navigation grid cell size
    clearance: float = 0.2                # wall clearance used when rasterising the navigation grid; a bit
                                          # under the default radius: the grid only guides routes (ORCA walls
                                          # and the contact guard keep bodies off walls), and at the full
                                          # 0.25 m a 1.2 m door kept 2 free cells of 0.25 m: single file,
                                          # 0.82 /(m s) against 1.26-1.42 with 0.2 (tuned, no source)
    max_speed_factor: float = 1.3         # an agent's speed limit = factor x its preferred speed
    orca_tau: float = 1.0                 # ORCA horizon for other agents (common practice; longer horizons
                                          # made opposing streams stop short of each other and lock)
    orca_tau_walls: float = 0.2           # ORCA horizon for walls (common practice: short, so agents may
                                          # walk close along door frames; 0.5 s cut bottleneck flow)
    queue_gap: float = 0.3                # m; a slowed agent keeps up to this extra room from agents ahead on
                                          # its route in ORCA, so a waiting queue stays loose (0 = off; 0 froze
                                          # a 0.8 m door for good; 0.2 still jammed it in 1 of 6 seeds; tuned)
    max_dt: float = 1.0                   # larger steps are refused
    headway_time: float = 0.6             # s; plan no faster than gap ahead / this (0 = off; tuned: 0.5 let a
                                          # 2.4 /m^2 crowd walk 0.78 m/s, above Weidmann's band, once
                                          # overtaking freed thin crowds from slow walkers)
    overtake: float = 20.0                # degrees to turn left to pass a slower leader when the left is free
                                          # (0 = off; tuned, no source)
    headway_cone: float = 30.0            # degrees either side of the route that count as "ahead"
    keep_right: float = 45.0              # degrees to turn right when someone walks towards you (0 = off; tuned,
                                          # no source: 25 let 20 or 40 against 40 lock in a 2 m corridor)
    jostle: float = 0.0                   # degrees of shuffling for agents pressed and stuck (0 = off)
    look_ahead: float = 10.0              # m along the route where an opposing flow counts as oncoming
    budget_ms: float = 0.0                # > 0: the governor picks search width and K per frame to fit this
    budget_coeffs: list = field(default_factory=lambda: list(_default_coeffs()))  # the governor's cost model

    def __post_init__(self):
        self.validate()

    def validate(self, where="params"):
        def bad(key, msg):
            raise ScenarioError(f"{where}.{key}: {msg}")

        def positive(key, value):
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
                bad(key, f"must be a positive number, got {value!r}")

        for key in ("dt", "sense_radius", "nav_cell", "max_speed_factor", "orca_tau", "orca_tau_walls", "max_dt"):
            positive(key, getattr(self, key))
        if isinstance(self.clearance, bool) or not isinstance(self.clearance, (int, float)) or not (0 <= self.clearance < 10):
            bad("clearance", f"must be a number in [0, 10), got {self.clearance!r}")
        if self.avoidance not in AVOIDANCE_MODELS:
            bad("avoidance", f"must be one of {', '.join(AVOIDANCE_MODELS)}, got {self.avoidance!r}")
        if self.search not in SEARCH_METHODS:
            bad("search", f"must be one of {', '.join(SEARCH_METHODS)}, got {self.search!r}")
        for key, hi in (("search_width", 1000), ("neighbours", 64)):
            v = getattr(self, key)
            if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v <= hi:
                bad(key, f"must be an integer in 0..{hi}, got {v!r}")
        for key, hi in (("queue_gap", 1.0), ("headway_time", 10.0), ("headway_cone", 90.0), ("keep_right", 90.0),
                        ("overtake", 90.0),
                        ("look_ahead", 50.0), ("jostle", 180.0)):
            v = getattr(self, key)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or not 0 <= v <= hi:
                bad(key, f"must be a number in [0, {hi}], got {v!r}")
        if isinstance(self.budget_ms, bool) or not isinstance(self.budget_ms, (int, float)) \
                or not math.isfinite(self.budget_ms) or self.budget_ms < 0:
            bad("budget_ms", f"must be a number >= 0 (0 = no governor), got {self.budget_ms!r}")
        from .governor import check_coeffs
        self.budget_coeffs = list(check_coeffs(self.budget_coeffs, f"{where}.budget_coeffs"))
        if not isinstance(self.strict, bool):
            bad("strict", f"must be true or false, got {self.strict!r}")
        if not isinstance(self.weights, dict):
            bad("weights", f"must be a table of {', '.join(WEIGHT_NAMES)}")
        for key in self.weights:
            if key not in WEIGHT_NAMES:
                bad(f"weights.{key}", f"unknown weight; known: {', '.join(WEIGHT_NAMES)}")
        merged = dict(DEFAULT_WEIGHTS)
        merged.update(self.weights)
        for key, v in merged.items():
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
                bad(f"weights.{key}", f"must be a finite number >= 0, got {v!r}")
            merged[key] = float(v)
        self.weights = merged

    def weight_vector(self):
        import numpy as np
        return np.array([self.weights[k] for k in WEIGHT_NAMES], dtype=np.float64)

    def to_dict(self):
        return asdict(self)

    @classmethod
    def from_dict(cls, data, where="params"):
        if not isinstance(data, dict):
            raise ScenarioError(f"{where}: must be a table")
        known = {f.name for f in fields(cls)}
        for key in data:
            if key not in known:
                raise ScenarioError(f"{where}.{key}: unknown setting; known: {', '.join(sorted(known))}")
        p = cls.__new__(cls)
        defaults = cls()
        for f in fields(cls):
            value = data.get(f.name, getattr(defaults, f.name))
            if f.name == "weights" and isinstance(value, dict):
                value = dict(value)
            setattr(p, f.name, value)
        p.validate(where)
        return p
