"""The C ABI's Python side: build helpers, and the thin adapter that the embedded library binds.

Build and link (see bindings/crowdcore.h for the calls):

    crowdcore cabi --build                   # -> crowdcore/_native/libcrowdcore.so (+ crowdcore.h)
    gcc host.c $(crowdcore cabi --cflags --libs)

The adapter maps each exported C call onto the same World methods Python users call. Worlds live
in an integer handle table (index in the low 32 bits, generation in the high 32 bits; slot 0 and
generation 0 are never used, so handle 0 is never valid). Every entry catches every exception and
turns it into a status code plus this thread's last-error text; nothing is changed on error because
all checks run before the World method, and World methods are all-or-nothing themselves.
Bulk data moves with one numpy copy over the caller's memory: no Python per agent.
"""
import math
import os
import sys

LIBRARY_NAME = "crowdcore"

# Status codes: the same values as bindings/crowdcore.h.
OK, ERR_HANDLE, ERR_NULL, ERR_NOT_FINITE, ERR_RANGE, ERR_CAPACITY, ERR_UNKNOWN_ID, ERR_INVALID, \
    ERR_SCENARIO, ERR_SNAPSHOT, ERR_IO, ERR_BUSY, ERR_INIT, ERR_INTERNAL = range(14)

_WORLD_DEF_CHECK = 0x43435744   # "CCWD": the def struct came from cc_default_world_def
_AGENT_DEF_CHECK = 0x43434144   # "CCAD": the def struct came from cc_default_agent_def
_AVOIDANCE = ("orca", "social-force")   # index = CC_AVOID_* code


# ====================================================================== build helpers
def _bindings_dir():
    here = os.path.dirname(os.path.abspath(__file__))
    for d in (os.path.join(here, "bindings"), os.path.join(os.path.dirname(here), "bindings")):
        if os.path.isfile(os.path.join(d, "build_cabi.py")):
            return d
    from .errors import CrowdError
    raise CrowdError("the C ABI sources (bindings/build_cabi.py) are not installed with this copy of crowdcore; "
                     "build from a source checkout")


def default_out_dir():
    """crowdcore/_native if writable, else a per-user cache folder for this version and Python."""
    from . import __version__
    here = os.path.dirname(os.path.abspath(__file__))
    native = os.path.join(here, "_native")
    try:
        os.makedirs(native, exist_ok=True)
        if os.access(native, os.W_OK):
            ignore = os.path.join(native, ".gitignore")
            if not os.path.exists(ignore):
                with open(ignore, "w") as f:
                    f.write("# build output of `crowdcore cabi --build`\n*\n")
            return native
    except OSError:
        pass
    tag = f"native-{__version__}-py{sys.version_info[0]}{sys.version_info[1]}"
    return os.path.join(os.path.expanduser("~"), ".cache", "crowdcore", tag)


def _out(out_dir):
    return os.path.abspath(out_dir) if out_dir else default_out_dir()


def library_path(out_dir=None):
    ext = ".dylib" if sys.platform == "darwin" else ".so"
    return os.path.join(_out(out_dir), f"lib{LIBRARY_NAME}{ext}")


def build_library(out_dir=None, verbose=False):
    """Compile libcrowdcore and copy crowdcore.h beside it; returns the library path."""
    import importlib.util
    spec = importlib.util.spec_from_file_location("crowdcore_build_cabi", os.path.join(_bindings_dir(), "build_cabi.py"))
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod.build(_out(out_dir), package_dir=os.path.dirname(os.path.abspath(__file__)), verbose=verbose)


def _ensure_built(out_dir):
    path = library_path(out_dir)
    if not os.path.exists(path):
        # flags are printed on stdout: keep any compiler chatter on stderr
        import contextlib
        with contextlib.redirect_stdout(sys.stderr):
            build_library(out_dir)
    return path


def cflags(out_dir=None):
    """Compiler flags for a host: the folder holding crowdcore.h (builds the library if missing)."""
    _ensure_built(out_dir)
    return f"-I{_out(out_dir)}"


def libs(out_dir=None):
    """Linker flags for a host, with an rpath so it runs without LD_LIBRARY_PATH."""
    _ensure_built(out_dir)
    d = _out(out_dir)
    return f"-L{d} -l{LIBRARY_NAME} -Wl,-rpath,{d}"


def describe(out_dir=None):
    path = library_path(out_dir)
    state = "built" if os.path.exists(path) else "not built yet (run `crowdcore cabi --build`)"
    return "\n".join([
        f"crowdcore C ABI {'.'.join(map(str, ABI_VERSION))}",
        f"library: {path} ({state})",
        f"header:  {os.path.join(_out(out_dir), 'crowdcore.h')}",
        f"python:  {sys.executable} (baked into the library at build time)",
        "build a host:  gcc -std=c99 host.c $(crowdcore cabi --cflags --libs)",
    ])


ABI_VERSION = (1, 2, 2)


# ====================================================================== adapter
class _Fail(Exception):
    """A refused call: status code and text for the host."""

    def __init__(self, code, text):
        super().__init__(text)
        self.code, self.text = code, text


class _Slot:
    __slots__ = ("world", "gen", "idx", "step", "snap", "recorder")

    def __init__(self, idx):
        self.world, self.gen, self.idx, self.step = None, 0, idx, None
        self.snap, self.recorder = None, None


_slots = [_Slot(0)]     # slot 0 is never handed out
_free = []
_MAX_SLOTS = 1 << 22    # the C world table's size
_lib = _ffi = None      # set by _bind
_keep = []              # Python objects the C side points to


def _open(s, world):
    """Put world behind slot s and publish its bound step method to the C world table, which
    cc_world_step calls without this adapter. s.step keeps the method alive while the slot is open."""
    s.world, s.step, s.snap = world, world.step, None
    if _lib.cc__slot_open(s.idx, s.gen, _ffi.cast("void *", id(s.step))) != 0:
        raise _Fail(ERR_INTERNAL, "the C world table refused a slot (out of memory?)")


def _new_handle(world):
    if _free:
        idx = _free.pop()
    else:
        idx = len(_slots)
        if idx >= _MAX_SLOTS:
            raise _Fail(ERR_RANGE, f"too many live worlds (at most {_MAX_SLOTS - 1})")
        _slots.append(_Slot(idx))
    s = _slots[idx]
    s.gen = s.gen % 0xFFFFFFFF + 1          # 1..2^32-1, never 0
    _open(s, world)
    return (s.gen << 32) | idx


def _slot(h):
    idx = h & 0xFFFFFFFF
    if 0 < idx < len(_slots):
        s = _slots[idx]
        if s.gen == h >> 32 and s.world is not None:
            return s
    raise _Fail(ERR_HANDLE, f"world handle {h:#x}: not a live world (0, destroyed, or never created)")


def _bind(ffi, lib):
    """Register every extern "Python" bridge function; called once by the embedded init code."""
    import inspect

    import numpy as np

    from .errors import CrowdError, ScenarioError, SnapshotError, StepError
    from .params import Params, WEIGHT_NAMES
    from .scenario import build_world, parse_scenario
    from .world import World

    global _lib, _ffi
    _lib, _ffi = lib, ffi
    NULL = ffi.NULL
    set_error = lib.cc__set_error
    lock, unlock, touch = lib.cc__slot_lock, lib.cc__slot_unlock, lib.cc__slot_touch
    agent_size = ffi.sizeof("cc_agent_def")
    f8, i4 = ("x", "y", "vx", "vy", "pref_speed", "radius"), ("target", "group", "internal_check", "reserved")
    agent_dtype = np.dtype({"names": f8 + i4, "formats": ["<f8"] * len(f8) + ["<i4"] * len(i4),
                            "offsets": [ffi.offsetof("cc_agent_def", n) for n in f8 + i4], "itemsize": agent_size})
    agent_defaults = {k: v.default for k, v in inspect.signature(World.add_agents).parameters.items()
                      if v.default is not inspect.Parameter.empty}

    def report(e):
        if isinstance(e, _Fail):
            code, text = e.code, e.text
        elif isinstance(e, SnapshotError):
            code, text = ERR_SNAPSHOT, str(e)
        elif isinstance(e, CrowdError):
            code, text = ERR_INVALID, str(e)
        elif isinstance(e, OSError):
            code, text = ERR_IO, f"{e.filename or ''}: {e.strerror or e}".lstrip(": ")
        else:
            import traceback
            code = ERR_INTERNAL
            text = f"internal error {type(e).__name__}: {e}\n" + "".join(traceback.format_tb(e.__traceback__, -3))
        try:
            set_error(text.encode("utf-8", "replace")[:4000])
        except BaseException:   # noqa: BLE001 - the status code still gets through
            pass
        return code

    def export(name, world=True, mutates=False):
        """Wrap fn(slot, *args) or fn(*args) as the extern "Python" function cc__py_<name>."""
        def deco(fn):
            if world:
                def entry(h, *args):
                    try:
                        s = _slot(h)
                        if not lock(s.idx):
                            raise _Fail(ERR_BUSY, f"world {h:#x}: in use by another thread")
                        try:
                            fn(s, *args)
                            if mutates:
                                touch(s.idx)
                        finally:
                            unlock(s.idx)
                        return OK
                    except BaseException as e:  # noqa: BLE001 - every failure becomes a status
                        return report(e)
            else:
                def entry(*args):
                    try:
                        fn(*args)
                        return OK
                    except BaseException as e:  # noqa: BLE001
                        return report(e)
            entry.__name__ = f"cc__py_{name}"
            ffi.def_extern(name=f"cc__py_{name}", error=ERR_INTERNAL)(entry)
            return fn
        return deco

    # -------------------------------------------------------------- argument checks
    def need(ptr, what):
        if ptr == NULL:
            raise _Fail(ERR_NULL, f"{what}: must not be NULL")

    def finite(what, *values):
        for v in values:
            if not math.isfinite(v):
                raise _Fail(ERR_NOT_FINITE, f"{what}: must be finite, got {v!r}")

    def text_arg(ptr, what):
        need(ptr, what)
        try:
            return ffi.string(ptr).decode("utf-8")
        except UnicodeDecodeError:
            raise _Fail(ERR_INVALID, f"{what}: not valid UTF-8") from None

    def count_arg(n, what):
        if n < 0:
            raise _Fail(ERR_RANGE, f"{what}: must be >= 0, got {n}")
        return n

    def points_arg(xy, n, what):
        count_arg(n, f"{what} point_count")
        need(xy, what)
        pts = np.frombuffer(ffi.buffer(xy, 16 * n), np.float64).reshape(n, 2).copy()
        bad = ~np.isfinite(pts).all(axis=1)
        if bad.any():
            i = int(np.argmax(bad))
            raise _Fail(ERR_NOT_FINITE, f"{what}[{i}]: coordinates must be finite, got {pts[i].tolist()}")
        return pts

    def target_arg(w, t):
        if not -1 <= t < len(w.scene.targets):
            raise _Fail(ERR_UNKNOWN_ID, f"target: no target with index {t} (the world has {len(w.scene.targets)})")
        return t

    def put_handle(out, world):
        out[0] = _new_handle(world)

    def copy_out(src, buf, cap, count, item, ctype_size):
        """count[0] = rows; copy src (C-contiguous) into buf unless buf is NULL; capacity in rows."""
        need(count, "count")
        n = len(src)
        if cap < 0:
            raise _Fail(ERR_RANGE, f"capacity: must be >= 0, got {cap}")
        count[0] = n
        if buf == NULL:
            return
        if cap < n:
            raise _Fail(ERR_CAPACITY, f"buffer too small: capacity {cap}, need {n} (written to *count)")
        if n:
            dst = np.frombuffer(ffi.buffer(buf, n * ctype_size), item).reshape(src.shape)
            np.copyto(dst, src)

    # -------------------------------------------------------------- defaults and creation
    @export("default_world_def", world=False)
    def default_world_def(d):
        need(d, "def")
        p = Params()
        d.seed, d.dt, d.max_dt = 0, p.dt, p.max_dt
        d.avoidance, d.strict = _AVOIDANCE.index(p.avoidance), int(p.strict)
        d.neighbours, d.search_width = p.neighbours, p.search_width
        d.sense_radius, d.nav_cell, d.clearance = p.sense_radius, p.nav_cell, p.clearance
        d.max_speed_factor, d.orca_tau, d.orca_tau_walls = p.max_speed_factor, p.orca_tau, p.orca_tau_walls
        for i, k in enumerate(WEIGHT_NAMES):
            d.weights[i] = p.weights[k]
        for i in range(4):
            d.bounds[i] = 0.0
        d.budget_ms = p.budget_ms
        d.internal_check, d.reserved = _WORLD_DEF_CHECK, 0

    @export("default_agent_def", world=False)
    def default_agent_def(d):
        need(d, "def")
        d.x = d.y = d.vx = d.vy = 0.0
        d.pref_speed, d.radius = agent_defaults["pref_speed"], agent_defaults["radius"]
        d.target, d.group = agent_defaults["target"], agent_defaults["group"]
        d.internal_check, d.reserved = _AGENT_DEF_CHECK, 0

    @export("world_create", world=False)
    def world_create(d, out):
        need(d, "def")
        need(out, "out")
        if d.internal_check != _WORLD_DEF_CHECK:
            raise _Fail(ERR_INVALID, "def: not initialised by cc_default_world_def")
        names = ("dt", "max_dt", "sense_radius", "nav_cell", "clearance", "max_speed_factor", "orca_tau",
                 "orca_tau_walls", "budget_ms")
        for k in names:
            finite(f"def.{k}", getattr(d, k))
        weights = {k: d.weights[i] for i, k in enumerate(WEIGHT_NAMES)}
        for k, v in weights.items():
            finite(f"def.weights[{k}]", v)
        bounds = [d.bounds[i] for i in range(4)]
        finite("def.bounds", *bounds)
        if not 0 <= d.avoidance < len(_AVOIDANCE):
            raise _Fail(ERR_RANGE, f"def.avoidance: must be CC_AVOID_ORCA or CC_AVOID_SOCIAL_FORCE, got {d.avoidance}")
        if d.strict not in (0, 1):
            raise _Fail(ERR_RANGE, f"def.strict: must be 0 or 1, got {d.strict}")
        try:
            params = Params.from_dict({**{k: float(getattr(d, k)) for k in names}, "avoidance": _AVOIDANCE[d.avoidance],
                                       "strict": bool(d.strict), "neighbours": int(d.neighbours),
                                       "search_width": int(d.search_width), "weights": weights}, "def")
            world = World(params=params, seed=int(d.seed))
            if any(bounds):
                world.set_bounds(*bounds)
        except ScenarioError as e:
            raise _Fail(ERR_RANGE, str(e)) from None
        put_handle(out, world)

    def readable_file(path, what):
        if not os.path.isfile(path):
            raise _Fail(ERR_IO, f"{what} {path}: no such file")
        if not os.access(path, os.R_OK):
            raise _Fail(ERR_IO, f"{what} {path}: not readable")

    @export("world_create_from_scenario_file", world=False)
    def world_create_from_scenario_file(path, out):
        p = text_arg(path, "path")
        need(out, "out")
        readable_file(p, "scenario")
        try:
            with open(p, "rb") as f:
                raw = f.read()
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError:
                raise _Fail(ERR_SCENARIO, f"{p}: scenario is not UTF-8 text") from None
            world = build_world(parse_scenario(text, os.path.dirname(os.path.abspath(p)), p))   # as load_scenario
        except ScenarioError as e:
            raise _Fail(ERR_SCENARIO, str(e)) from None
        put_handle(out, world)

    @export("world_create_from_scenario_text", world=False)
    def world_create_from_scenario_text(text, out):
        t = text_arg(text, "toml_text")
        need(out, "out")
        try:
            world = build_world(parse_scenario(t))
        except ScenarioError as e:
            raise _Fail(ERR_SCENARIO, str(e)) from None
        put_handle(out, world)

    def snapshot_bytes(data, size):
        need(data, "data")
        if size < 0:
            raise _Fail(ERR_RANGE, f"size: must be >= 0, got {size}")
        return bytes(ffi.buffer(data, size))

    @export("world_create_from_snapshot", world=False)
    def world_create_from_snapshot(data, size, out):
        need(out, "out")
        put_handle(out, World.from_snapshot(snapshot_bytes(data, size)))

    @export("world_create_from_file", world=False)
    def world_create_from_file(path, out):
        p = text_arg(path, "path")
        need(out, "out")
        readable_file(p, "snapshot")
        put_handle(out, World.load(p))

    @export("world_destroy")
    def world_destroy(s):
        if s.recorder is not None:
            s.recorder, rec = None, s.recorder
            rec.close()
        lib.cc__slot_close(s.idx)          # C first: no step may start on a world being dropped
        s.world, s.step, s.snap = None, None, None
        s.gen = s.gen % 0xFFFFFFFF + 1     # every old copy of the handle is now stale
        _free.append(s.idx)

    # -------------------------------------------------------------- scene edits
    def scene_edit(call, *args):
        try:
            return call(*args)
        except ScenarioError as e:
            raise _Fail(ERR_INVALID, str(e)) from None

    @export("world_add_wall", mutates=True)
    def world_add_wall(s, xy, n, closed):
        pts = points_arg(xy, n, "xy")
        scene_edit(s.world.add_wall, pts, bool(closed))

    @export("world_add_obstacle", mutates=True)
    def world_add_obstacle(s, xy, n):
        scene_edit(s.world.add_obstacle, points_arg(xy, n, "xy"))

    def add_target(s, name, kind, shape, out_index):
        label = text_arg(name, "name")
        finite("target shape", *shape)
        if kind == "circle" and shape[2] <= 0:
            raise _Fail(ERR_RANGE, f"r: must be > 0, got {shape[2]}")
        if kind == "rect" and not (shape[0] < shape[2] and shape[1] < shape[3]):
            raise _Fail(ERR_RANGE, f"rect: needs xmin < xmax and ymin < ymax, got {list(shape)}")
        index = scene_edit(s.world.add_target, label, kind, shape)
        if out_index != NULL:
            out_index[0] = index

    @export("world_add_target_circle", mutates=True)
    def world_add_target_circle(s, name, cx, cy, r, out_index):
        add_target(s, name, "circle", (cx, cy, r), out_index)

    @export("world_add_target_rect", mutates=True)
    def world_add_target_rect(s, name, x0, y0, x1, y1, out_index):
        add_target(s, name, "rect", (x0, y0, x1, y1), out_index)

    @export("world_set_bounds", mutates=True)
    def world_set_bounds(s, x0, y0, x1, y1):
        finite("bounds", x0, y0, x1, y1)
        if not (x0 < x1 and y0 < y1):
            raise _Fail(ERR_RANGE, f"bounds: need xmin < xmax and ymin < ymax, got {[x0, y0, x1, y1]}")
        scene_edit(s.world.set_bounds, x0, y0, x1, y1)

    # -------------------------------------------------------------- parameters
    def non_finite(table, path):
        """The key path of the first NaN or infinite number in a parsed TOML table, else None."""
        for k, v in table.items():
            where = f"{path}.{k}" if path else k
            if isinstance(v, dict):
                bad = non_finite(v, where)
                if bad:
                    return bad
            elif isinstance(v, float) and not math.isfinite(v):
                return f"{where} = {v!r}"
        return None

    @export("world_set_params", mutates=True)
    def world_set_params(s, toml_text):
        import tomllib
        t = text_arg(toml_text, "toml_text")
        try:
            table = tomllib.loads(t)
        except tomllib.TOMLDecodeError as e:
            raise _Fail(ERR_INVALID, f"toml_text: not TOML: {e}") from None
        if set(table) == {"params"} and isinstance(table["params"], dict):
            table = table["params"]     # a [params] table as in a scenario file, or its keys alone
        if not table:
            raise _Fail(ERR_INVALID, "toml_text: no parameters given")
        bad = non_finite(table, "params")
        if bad:
            raise _Fail(ERR_NOT_FINITE, f"{bad}: must be finite")
        s.world.set_params(**table)     # validated as a whole: a ScenarioError names the key, nothing changes

    # -------------------------------------------------------------- agents
    @export("world_add_agents", mutates=True)
    def world_add_agents(s, defs, count, out_ids):
        w = s.world
        if count_arg(count, "count") == 0:
            return
        need(defs, "defs")
        a = np.frombuffer(ffi.buffer(defs, count * agent_size), agent_dtype)
        bad = a["internal_check"] != _AGENT_DEF_CHECK
        if bad.any():
            raise _Fail(ERR_INVALID, f"defs[{int(np.argmax(bad))}]: not initialised by cc_default_agent_def")
        for k in f8:
            bad = ~np.isfinite(a[k])
            if bad.any():
                i = int(np.argmax(bad))
                raise _Fail(ERR_NOT_FINITE, f"defs[{i}].{k}: must be finite, got {a[k][i]!r}")
        checks = (("pref_speed", (a["pref_speed"] < 0) | (a["pref_speed"] > 5), "must lie in [0, 5] m/s"),
                  ("radius", (a["radius"] <= 0) | (a["radius"] > 2), "must lie in (0, 2] m"),
                  ("group", a["group"] < -1, "must be -1 (none) or >= 0"))
        for k, bad, rule in checks:
            if bad.any():
                i = int(np.argmax(bad))
                raise _Fail(ERR_RANGE, f"defs[{i}].{k}: {rule}, got {a[k][i]!r}")
        bad = (a["target"] < -1) | (a["target"] >= len(w.scene.targets))
        if bad.any():
            i = int(np.argmax(bad))
            raise _Fail(ERR_UNKNOWN_ID, f"defs[{i}].target: no target with index {int(a['target'][i])} "
                                        f"(the world has {len(w.scene.targets)})")
        pos = np.column_stack([a["x"], a["y"]])
        vel = np.column_stack([a["vx"], a["vy"]])
        ids = w.add_agents(pos, target=a["target"].copy(), pref_speed=a["pref_speed"].copy(),
                           radius=a["radius"].copy(), velocity=vel, group=a["group"].copy())
        if out_ids != NULL:
            np.copyto(np.frombuffer(ffi.buffer(out_ids, 4 * count), np.int32), ids)

    def known_ids(w, ids):
        missing = ~np.isin(ids, w.agents["ids"])
        if missing.any():
            raise _Fail(ERR_UNKNOWN_ID, f"ids: no agent with id {int(ids[int(np.argmax(missing))])}")

    @export("world_remove_agents", mutates=True)
    def world_remove_agents(s, ids, count):
        if count_arg(count, "count") == 0:
            return
        need(ids, "ids")
        arr = np.frombuffer(ffi.buffer(ids, 4 * count), np.int32).copy()
        known_ids(s.world, arr)
        s.world.remove_agents(arr)

    @export("world_set_agent_target", mutates=True)
    def world_set_agent_target(s, agent_id, target):
        w = s.world
        target_arg(w, target)
        arr = np.array([agent_id], np.int32)
        known_ids(w, arr)
        w.set_target(arr, target)

    # -------------------------------------------------------------- step
    # cc_world_step runs in C (bindings/cabi_source.c) and calls World.step directly; this turns
    # an exception out of that call into a status code and this thread's error text.
    def step_failed(e):
        if isinstance(e, StepError):     # dt above max_dt: refused before anything changed
            e = _Fail(ERR_RANGE, str(e))
        return report(e)

    _keep.append(step_failed)            # the C side holds a borrowed pointer
    lib.cc__set_step_failed(ffi.cast("void *", id(step_failed)))

    # A no-op that cc_world_step calls on a thread new to Python: entering through cffi gives the
    # thread a thread state that cffi keeps until the thread exits, which the step then reuses.
    @ffi.def_extern(name="cc__py_attach_thread", error=ERR_INTERNAL)
    def attach_thread():
        return OK

    @export("world_get_step_stats")
    def world_get_step_stats(s, out):
        need(out, "out")
        st = s.world.stats
        out.min_gap = st.get("min_gap", 0.0)
        out.step_seconds = lib.cc__slot_step_seconds(s.idx)
        for k in ("overlaps", "blocked_moves", "arrived", "fallbacks", "guarded", "search_width", "neighbours"):
            setattr(out, k, st.get(k, 0))
        out.reserved = 0

    @export("world_get_info")
    def world_get_info(s, out):
        need(out, "out")
        w = s.world
        out.frame, out.time, out.arrived_total = w.frame, w.time, w.arrived_total
        out.agent_count, out.target_count = w.agent_count, len(w.scene.targets)
        out.wall_count, out.obstacle_count = len(w.scene.walls), len(w.scene.obstacles)
        out.last_arrived, out.reserved = len(w.last_arrived), 0

    # -------------------------------------------------------------- queries
    @export("world_get_positions")
    def world_get_positions(s, buf, cap, count):
        copy_out(s.world.agents["pos"], buf, cap, count, np.float64, 16)

    @export("world_get_velocities")
    def world_get_velocities(s, buf, cap, count):
        copy_out(s.world.agents["vel"], buf, cap, count, np.float64, 16)

    @export("world_get_ids")
    def world_get_ids(s, buf, cap, count):
        copy_out(s.world.agents["ids"], buf, cap, count, np.int32, 4)

    @export("world_get_neighbours")
    def world_get_neighbours(s, x, y, radius, buf, cap, count):
        finite("x, y, radius", x, y, radius)
        if radius < 0:
            raise _Fail(ERR_RANGE, f"radius: must be >= 0, got {radius}")
        need(count, "count")
        copy_out(np.ascontiguousarray(s.world.neighbours(x, y, radius), np.int32), buf, cap, count, np.int32, 4)

    @export("world_state_hash")
    def world_state_hash(s, buf, cap):
        need(buf, "buf")
        digest = s.world.state_hash().encode("ascii") + b"\0"
        if cap < len(digest):
            raise _Fail(ERR_CAPACITY, f"capacity: need {len(digest)} bytes, got {cap}")
        ffi.memmove(buf, digest, len(digest))

    # -------------------------------------------------------------- snapshots
    @export("world_save_snapshot")
    def world_save_snapshot(s, buf, cap, size):
        need(size, "size")
        if cap < 0:
            raise _Fail(ERR_RANGE, f"capacity: must be >= 0, got {cap}")
        version = lib.cc__slot_version(s.idx)
        if s.snap is None or s.snap[0] != version:       # a size query then a copy encode once
            s.snap = (version, s.world.snapshot())
        data = s.snap[1]
        size[0] = len(data)
        if buf == NULL:
            return
        if cap < len(data):
            raise _Fail(ERR_CAPACITY, f"buffer too small: capacity {cap} bytes, need {len(data)} (written to *size)")
        ffi.memmove(buf, data, len(data))

    def not_recording(s):
        if s.recorder is not None:
            raise _Fail(ERR_INVALID, "world is being recorded: stop the recording before loading a snapshot")

    @export("world_load_snapshot", mutates=True)
    def world_load_snapshot(s, data, size):
        not_recording(s)
        _open(s, World.from_snapshot(snapshot_bytes(data, size)))   # built completely before it replaces

    @export("world_save_file")
    def world_save_file(s, path):
        s.world.save(text_arg(path, "path"))

    @export("world_load_file", mutates=True)
    def world_load_file(s, path):
        not_recording(s)
        p = text_arg(path, "path")
        readable_file(p, "snapshot")
        _open(s, World.load(p))

    @export("world_record_start")
    def world_record_start(s, path):
        from .recording import Recorder
        if s.recorder is not None:
            raise _Fail(ERR_INVALID, "world is being recorded already")
        p = text_arg(path, "path")
        try:
            s.recorder = Recorder(s.world, p)
        except OSError as e:
            raise _Fail(ERR_IO, f"{p}: cannot write recording ({e.strerror or e})") from None

    @export("world_record_stop")
    def world_record_stop(s):
        if s.recorder is None:
            raise _Fail(ERR_INVALID, "world is not being recorded")
        s.recorder, rec = None, s.recorder
        rec.close()

    @export("replay_file", world=False)
    def replay_file(path, out):
        from .recording import replay
        need(out, "out")
        p = text_arg(path, "path")
        readable_file(p, "recording")
        r = replay(p)
        out.frames_checked = r.frames_checked
        out.diverged_frame = -1 if r.diverged_at_frame is None else r.diverged_at_frame
        out.diverged_agent = -1 if r.diverged_agent is None else r.diverged_agent
        out.identical, out.truncated, out.reserved = int(r.identical), int(bool(r.truncated)), 0
