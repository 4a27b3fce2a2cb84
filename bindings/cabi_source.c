/* C side of the crowdcore C ABI: the interpreter boot and the exported wrappers.
 *
 * The build script (build_cabi.py) prepends the baked configuration (CC__BAKED_* macros) and the
 * static prototypes of the extern "Python" bridge functions, and cffi pastes this file after its
 * own embedding support code, so cffi_start_python() and Python.h are in scope here.
 *
 * Why a boot function: cffi's own start-up calls Py_InitializeEx() with the default configuration,
 * which takes its module path from the base interpreter and imports _cffi_backend from there before
 * any init code of ours can run; a base interpreter whose cffi/numpy differ from the project's
 * environment then breaks at first use. So we start the interpreter ourselves, with home, executable,
 * prefixes and module path baked in at build time, and only then let cffi attach to it.
 */
#include <math.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#if defined(__x86_64__)
#include <x86intrin.h>
#endif
#include "crowdcore.h"

#define CC_EXPORT __attribute__((visibility("default")))
#define CC__ERR_SIZE 4096

static __thread char cc__err[CC__ERR_SIZE];      /* this thread's last failure text */
static char cc__init_error[CC__ERR_SIZE];        /* why start-up failed (shared by all threads) */
static int cc__init_failed = -1;                 /* set by the init code: 0 ok, 1 failed; -1 never reported */
static int cc__state = 0;                        /* 0 not started, 1 ready, -1 failed for good */
static pthread_mutex_t cc__boot_lock = PTHREAD_MUTEX_INITIALIZER;

/* Called from Python (crowdcore/cabi.py) to set this thread's error text. */
static void cc__set_error(const char *text)
{
    snprintf(cc__err, CC__ERR_SIZE, "%s", text ? text : "");
}

/* Called once by the embedded init code (cabi_init.py) with its outcome. */
static void cc__init_report(int32_t failed, const char *text)
{
    cc__init_failed = failed ? 1 : 0;
    snprintf(cc__init_error, CC__ERR_SIZE, "%s", text ? text : "");
}

/* ------------------------------------------------------------------ the world table
 * cc_world_step is the call a host makes every frame, so it does not pass through the Python adapter:
 * the handle check, the dt check and the busy flag live here, and the call goes straight to the
 * world's bound step method. Python (crowdcore/cabi.py) decides the table's contents: it opens a slot
 * when it hands out a handle (or replaces the world behind one) and keeps the bound method alive while
 * the slot is open; every adapter call on a world takes the same busy flag. Chunks are allocated once
 * and never moved or freed, so a reader needs no lock to find a slot. */
#define CC__CHUNK_BITS 10
#define CC__CHUNK_SIZE (1u << CC__CHUNK_BITS)
#define CC__CHUNKS 4096u                         /* 4M slots: Python refuses handles beyond */

typedef struct cc__slot {
    uint32_t gen;             /* generation of the live world; 0 when closed */
    int32_t busy;             /* 1 while a call uses the world */
    uint64_t version;         /* bumped by every change; keys the adapter's snapshot cache */
    PyObject *step;           /* borrowed: the world's bound step method, kept alive by Python */
    uint64_t step_ticks;      /* time inside the last successful step, in cc__ticks() units */
    PyObject *dt;             /* owned: the last dt as a Python float (hosts step with one dt) */
    double dt_value;          /* its value, read without touching the float's own line */
} cc__slot;

static cc__slot *cc__chunks[CC__CHUNKS];
static PyObject *cc__step_failed;                /* borrowed: Python's step-error handler */

static cc__slot *cc__slot_at(uint32_t idx)
{
    cc__slot *chunk;
    if ((idx >> CC__CHUNK_BITS) >= CC__CHUNKS)
        return NULL;
    chunk = __atomic_load_n(&cc__chunks[idx >> CC__CHUNK_BITS], __ATOMIC_ACQUIRE);
    return chunk ? &chunk[idx & (CC__CHUNK_SIZE - 1)] : NULL;
}

/* Called from Python (one at a time: the adapter runs under the GIL, which cffi drops only for the call). */
static int32_t cc__slot_open(uint32_t idx, uint32_t gen, void *step)
{
    cc__slot *s;
    uint32_t c = idx >> CC__CHUNK_BITS;
    if (c >= CC__CHUNKS || gen == 0 || step == NULL)
        return -1;
    if (cc__chunks[c] == NULL) {
        cc__slot *chunk = calloc(CC__CHUNK_SIZE, sizeof *chunk);
        if (chunk == NULL)
            return -1;
        __atomic_store_n(&cc__chunks[c], chunk, __ATOMIC_RELEASE);
    }
    s = cc__slot_at(idx);
    s->step = (PyObject *)step;
    s->step_ticks = 0;
    __atomic_add_fetch(&s->version, 1, __ATOMIC_RELAXED);
    __atomic_store_n(&s->gen, gen, __ATOMIC_RELEASE);
    return 0;
}

static void cc__slot_close(uint32_t idx)
{
    cc__slot *s = cc__slot_at(idx);
    if (s) {
        PyGILState_STATE g;
        __atomic_store_n(&s->gen, 0, __ATOMIC_RELEASE);
        s->step = NULL;
        g = PyGILState_Ensure();      /* cffi calls C with the lock released */
        Py_CLEAR(s->dt);
        PyGILState_Release(g);
    }
}

static int32_t cc__slot_lock(uint32_t idx)      /* 1 if taken, 0 if the world is busy */
{
    int32_t free_ = 0;
    cc__slot *s = cc__slot_at(idx);
    return s && __atomic_compare_exchange_n(&s->busy, &free_, 1, 0, __ATOMIC_ACQUIRE, __ATOMIC_RELAXED);
}

static void cc__slot_unlock(uint32_t idx)
{
    cc__slot *s = cc__slot_at(idx);
    if (s)
        __atomic_store_n(&s->busy, 0, __ATOMIC_RELEASE);
}

static void cc__slot_touch(uint32_t idx)
{
    cc__slot *s = cc__slot_at(idx);
    if (s)
        __atomic_add_fetch(&s->version, 1, __ATOMIC_RELAXED);
}

static uint64_t cc__slot_version(uint32_t idx)
{
    cc__slot *s = cc__slot_at(idx);
    return s ? __atomic_load_n(&s->version, __ATOMIC_RELAXED) : 0;
}

static double cc__tick_seconds(void);

static double cc__slot_step_seconds(uint32_t idx)
{
    cc__slot *s = cc__slot_at(idx);
    return s ? (double)s->step_ticks * cc__tick_seconds() : 0.0;
}

static void cc__set_step_failed(void *handler)
{
    cc__step_failed = (PyObject *)handler;
}

/* The live slot of handle w, or NULL. */
static cc__slot *cc__live(cc_world w)
{
    uint32_t idx = (uint32_t)w, gen = (uint32_t)(w >> 32);
    cc__slot *s = idx ? cc__slot_at(idx) : NULL;
    return s && gen && __atomic_load_n(&s->gen, __ATOMIC_ACQUIRE) == gen ? s : NULL;
}

static int32_t cc__bad_handle(cc_world w)
{
    snprintf(cc__err, CC__ERR_SIZE, "world handle %#llx: not a live world (0, destroyed, or never created)",
             (unsigned long long)w);
    return CC_ERR_HANDLE;
}

/* ------------------------------------------------------------------ the step's clock
 * The step is timed with the CPU's time-stamp counter where the kernel itself uses it as its clock
 * (x86-64 with clocksource "tsc", so it is constant-rate and in step across cores): reading it touches
 * no memory, while the first clock_gettime after a large step stalls ~0.7 us on cold vDSO lines.
 * Ticks become seconds when asked, by the counter's rate against CLOCK_MONOTONIC since start-up.
 * Elsewhere ticks are CLOCK_MONOTONIC nanoseconds. */
static int cc__use_tsc;
static uint64_t cc__tick0;
static double cc__clock0;

static double cc__now(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return (double)t.tv_sec + 1e-9 * (double)t.tv_nsec;
}

static uint64_t cc__ticks(int use_tsc)
{
    struct timespec t;
#if defined(__x86_64__)
    if (use_tsc)
        return __rdtsc();
#endif
    (void)use_tsc;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return (uint64_t)t.tv_sec * 1000000000u + (uint64_t)t.tv_nsec;
}

static void cc__clock_start(void)                /* once, at boot */
{
#if defined(__x86_64__)
    char name[32] = {0};
    FILE *f = fopen("/sys/devices/system/clocksource/clocksource0/current_clocksource", "r");
    if (f) {
        cc__use_tsc = fgets(name, sizeof name, f) != NULL && strncmp(name, "tsc", 3) == 0
                      && (name[3] == '\n' || name[3] == 0);
        fclose(f);
    }
#endif
    cc__clock0 = cc__now();
    cc__tick0 = cc__ticks(cc__use_tsc);
}

static double cc__tick_seconds(void)
{
    double elapsed;
    uint64_t ticks;
    if (!cc__use_tsc)
        return 1e-9;
    elapsed = cc__now() - cc__clock0;
    ticks = cc__ticks(1) - cc__tick0;
    return ticks ? elapsed / (double)ticks : 0.0;
}

/* With the GIL and a Python exception set: its status code and text, via Python's handler. */
static int32_t cc__step_error(void)
{
    PyObject *type, *value, *tb, *code;
    long status = CC_ERR_INTERNAL;
    PyErr_Fetch(&type, &value, &tb);
    PyErr_NormalizeException(&type, &value, &tb);
    if (value && tb)
        PyException_SetTraceback(value, tb);
    code = cc__step_failed && value ? PyObject_CallOneArg(cc__step_failed, value) : NULL;
    if (code) {
        status = PyLong_AsLong(code);
        Py_DECREF(code);
    }
    if (code == NULL || status <= CC_OK || PyErr_Occurred()) {
        PyErr_Clear();
        status = CC_ERR_INTERNAL;
        snprintf(cc__err, CC__ERR_SIZE, "internal error in the step (its report failed too)");
    }
    Py_XDECREF(type);
    Py_XDECREF(value);
    Py_XDECREF(tb);
    return (int32_t)status;
}

static int cc__start_interpreter(void)
{
    static const char *paths[] = CC__BAKED_PATHS;
    PyStatus st;
    PyConfig c;
    size_t i;
    PyConfig_InitPythonConfig(&c);
    c.install_signal_handlers = 0;   /* signals belong to the host */
    c.parse_argv = 0;
    c.site_import = 0;               /* no base site-packages; the init code adds the project's site dirs */
    c.user_site_directory = 0;
    c.module_search_paths_set = 1;
#define CC__SET(field, value) \
    st = PyConfig_SetBytesString(&c, &c.field, value); \
    if (PyStatus_Exception(st)) goto fail;
    CC__SET(program_name, CC__BAKED_EXECUTABLE)
    CC__SET(executable, CC__BAKED_EXECUTABLE)
    CC__SET(base_executable, CC__BAKED_BASE_EXECUTABLE)
    CC__SET(home, CC__BAKED_HOME)
    CC__SET(prefix, CC__BAKED_PREFIX)
    CC__SET(exec_prefix, CC__BAKED_EXEC_PREFIX)
    CC__SET(base_prefix, CC__BAKED_HOME)
    CC__SET(base_exec_prefix, CC__BAKED_BASE_EXEC_PREFIX)
#undef CC__SET
    for (i = 0; i < sizeof(paths) / sizeof(paths[0]); i++) {
        wchar_t *w = Py_DecodeLocale(paths[i], NULL);
        if (w == NULL) {
            snprintf(cc__init_error, CC__ERR_SIZE, "crowdcore: cannot decode baked path %s", paths[i]);
            PyConfig_Clear(&c);
            return -1;
        }
        st = PyWideStringList_Append(&c.module_search_paths, w);
        PyMem_RawFree(w);
        if (PyStatus_Exception(st))
            goto fail;
    }
    st = Py_InitializeFromConfig(&c);
    if (PyStatus_Exception(st))
        goto fail;
    PyConfig_Clear(&c);
    PyEval_SaveThread();             /* release the GIL; cffi and each call take it as needed */
    return 0;
fail:
    snprintf(cc__init_error, CC__ERR_SIZE,
             "crowdcore: the embedded Python (home %s) failed to start: %s%s%s", CC__BAKED_HOME,
             st.func ? st.func : "", st.func ? ": " : "", st.err_msg ? st.err_msg : "unknown error");
    PyConfig_Clear(&c);
    return -1;
}

static int cc__boot(void)
{
    int state;
    pthread_mutex_lock(&cc__boot_lock);
    if (cc__state == 0) {
        if (!Py_IsInitialized() && cc__start_interpreter() != 0) {
            cc__state = -1;
        } else if (cffi_start_python() != 0) {
            if (!cc__init_error[0])
                snprintf(cc__init_error, CC__ERR_SIZE,
                         "crowdcore: the embedded runtime could not be set up (cffi printed details on stderr)");
            cc__state = -1;
        } else if (cc__init_failed != 0) {
            if (!cc__init_error[0])
                snprintf(cc__init_error, CC__ERR_SIZE, "crowdcore: the embedded init code did not complete");
            cc__state = -1;
        } else {
            cc__clock_start();
            __atomic_store_n(&cc__state, 1, __ATOMIC_RELEASE);
        }
    }
    state = cc__state;
    pthread_mutex_unlock(&cc__boot_lock);
    if (state != 1) {
        snprintf(cc__err, CC__ERR_SIZE, "%s", cc__init_error);
        return -1;
    }
    return 0;
}

/* Every exported call that needs the runtime: clear this thread's error, start once, then go. */
#define CC_ENTER() do { \
    cc__err[0] = 0; \
    if (__atomic_load_n(&cc__state, __ATOMIC_ACQUIRE) != 1 && cc__boot() != 0) return CC_ERR_INIT; \
} while (0)

/* ------------------------------------------------------------------ pure C calls */
CC_EXPORT int32_t cc_version(int32_t *major, int32_t *minor, int32_t *patch)
{
    if (major) *major = CC_ABI_VERSION_MAJOR;
    if (minor) *minor = CC_ABI_VERSION_MINOR;
    if (patch) *patch = CC_ABI_VERSION_PATCH;
    return CC_OK;
}

CC_EXPORT int32_t cc_status_name(int32_t status, const char **name)
{
    static const char *names[] = {
        "CC_OK", "CC_ERR_HANDLE", "CC_ERR_NULL", "CC_ERR_NOT_FINITE", "CC_ERR_RANGE", "CC_ERR_CAPACITY",
        "CC_ERR_UNKNOWN_ID", "CC_ERR_INVALID", "CC_ERR_SCENARIO", "CC_ERR_SNAPSHOT", "CC_ERR_IO",
        "CC_ERR_BUSY", "CC_ERR_INIT", "CC_ERR_INTERNAL",
    };
    if (name == NULL)
        return CC_ERR_NULL;
    if (status < 0 || status >= (int32_t)(sizeof(names) / sizeof(names[0])))
        return CC_ERR_RANGE;
    *name = names[status];
    return CC_OK;
}

CC_EXPORT int32_t cc_last_error(char *buf, int32_t capacity, int32_t *length)
{
    size_t n = strlen(cc__err);
    if (length)
        *length = (int32_t)n;
    if (buf == NULL)
        return length ? CC_OK : CC_ERR_NULL;
    if (capacity <= 0)
        return CC_ERR_CAPACITY;
    if (n >= (size_t)capacity) {
        memcpy(buf, cc__err, (size_t)capacity - 1);
        buf[capacity - 1] = 0;
        return CC_ERR_CAPACITY;
    }
    memcpy(buf, cc__err, n + 1);
    return CC_OK;
}

CC_EXPORT int32_t cc_init(void)
{
    CC_ENTER();
    return CC_OK;
}

/* ------------------------------------------------------------------ bridged calls */
CC_EXPORT int32_t cc_default_world_def(cc_world_def *def)
{ CC_ENTER(); return cc__py_default_world_def(def); }

CC_EXPORT int32_t cc_default_agent_def(cc_agent_def *def)
{ CC_ENTER(); return cc__py_default_agent_def(def); }

CC_EXPORT int32_t cc_world_create(const cc_world_def *def, cc_world *out)
{ CC_ENTER(); return cc__py_world_create(def, out); }

CC_EXPORT int32_t cc_world_create_from_scenario_file(const char *path, cc_world *out)
{ CC_ENTER(); return cc__py_world_create_from_scenario_file(path, out); }

CC_EXPORT int32_t cc_world_create_from_scenario_text(const char *toml_text, cc_world *out)
{ CC_ENTER(); return cc__py_world_create_from_scenario_text(toml_text, out); }

CC_EXPORT int32_t cc_world_create_from_snapshot(const void *data, int64_t size, cc_world *out)
{ CC_ENTER(); return cc__py_world_create_from_snapshot(data, size, out); }

CC_EXPORT int32_t cc_world_create_from_file(const char *path, cc_world *out)
{ CC_ENTER(); return cc__py_world_create_from_file(path, out); }

CC_EXPORT int32_t cc_world_destroy(cc_world w)
{ CC_ENTER(); return cc__py_world_destroy(w); }

CC_EXPORT int32_t cc_world_is_valid(cc_world w)
{ CC_ENTER(); return cc__live(w) ? CC_OK : cc__bad_handle(w); }

CC_EXPORT int32_t cc_world_add_wall(cc_world w, const double *xy, int32_t point_count, int32_t closed)
{ CC_ENTER(); return cc__py_world_add_wall(w, xy, point_count, closed); }

CC_EXPORT int32_t cc_world_add_obstacle(cc_world w, const double *xy, int32_t point_count)
{ CC_ENTER(); return cc__py_world_add_obstacle(w, xy, point_count); }

CC_EXPORT int32_t cc_world_add_target_circle(cc_world w, const char *name, double cx, double cy, double r,
                                             int32_t *out_index)
{ CC_ENTER(); return cc__py_world_add_target_circle(w, name, cx, cy, r, out_index); }

CC_EXPORT int32_t cc_world_add_target_rect(cc_world w, const char *name, double xmin, double ymin, double xmax,
                                           double ymax, int32_t *out_index)
{ CC_ENTER(); return cc__py_world_add_target_rect(w, name, xmin, ymin, xmax, ymax, out_index); }

CC_EXPORT int32_t cc_world_set_bounds(cc_world w, double xmin, double ymin, double xmax, double ymax)
{ CC_ENTER(); return cc__py_world_set_bounds(w, xmin, ymin, xmax, ymax); }

CC_EXPORT int32_t cc_world_add_agents(cc_world w, const cc_agent_def *defs, int32_t count, int32_t *out_ids)
{ CC_ENTER(); return cc__py_world_add_agents(w, defs, count, out_ids); }

CC_EXPORT int32_t cc_world_remove_agents(cc_world w, const int32_t *ids, int32_t count)
{ CC_ENTER(); return cc__py_world_remove_agents(w, ids, count); }

CC_EXPORT int32_t cc_world_set_params(cc_world w, const char *toml_text)
{ CC_ENTER(); return cc__py_world_set_params(w, toml_text); }

CC_EXPORT int32_t cc_world_set_agent_target(cc_world w, int32_t id, int32_t target)
{ CC_ENTER(); return cc__py_world_set_agent_target(w, id, target); }

/* The step takes the interpreter lock with the calling thread's own thread state, kept in a
 * thread-local from the thread's first step on (PyEval_RestoreThread/SaveThread), rather than through
 * PyGILState_Ensure/Release: after a large step every line is cold, and this path touches fewer of
 * them (0.5-0.7 us less at 100,000 agents, measured in one process, step by step). cffi gives each
 * thread that enters Python a thread state and keeps it until the thread exits, so a thread that has
 * none yet first enters through a no-op bridge call. A thread that holds the interpreter lock at its
 * first step (a Python host) keeps taking the PyGILState path, which allows that. */
static __thread PyThreadState *cc__thread_state;   /* this thread's, once it stepped without the lock */
static __thread int cc__thread_holds_lock;         /* it held the lock at its first step */

/* Take the lock; returns the thread state for cc__release_python, or NULL after PyGILState_Ensure (*g). */
static PyThreadState *cc__enter_python(PyGILState_STATE *g)
{
    PyThreadState *ts = cc__thread_state;
    if (ts) {
        PyEval_RestoreThread(ts);
        return ts;
    }
    if (!cc__thread_holds_lock) {
        if ((ts = PyGILState_GetThisThreadState()) == NULL) {
            cc__py_attach_thread();
            ts = PyGILState_GetThisThreadState();
        }
        cc__thread_holds_lock = ts != NULL && PyGILState_Check();
    }
    if (ts == NULL || cc__thread_holds_lock) {
        *g = PyGILState_Ensure();
        return NULL;
    }
    PyEval_RestoreThread(ts);
    cc__thread_state = ts;
    return ts;
}

static void cc__release_python(PyThreadState *ts, PyGILState_STATE g)
{
    if (ts)
        PyEval_SaveThread();
    else
        PyGILState_Release(g);
}

/* The frame call, without the Python adapter (see the world table above). dt above the world's
 * max_dt is refused by World.step itself, before it changes anything. */
CC_EXPORT int32_t cc_world_step(cc_world w, double dt)
{
    cc__slot *s;
    PyGILState_STATE g = PyGILState_UNLOCKED;
    PyThreadState *ts;
    PyObject *arg, *r;
    uint64_t t0;
    int use_tsc;
    int32_t status = CC_OK;
    CC_ENTER();
    if ((s = cc__live(w)) == NULL)
        return cc__bad_handle(w);
    if (!isfinite(dt)) {
        snprintf(cc__err, CC__ERR_SIZE, "dt: must be finite, got %g", dt);
        return CC_ERR_NOT_FINITE;
    }
    if (!(dt > 0.0)) {
        snprintf(cc__err, CC__ERR_SIZE, "dt: must be > 0 seconds, got %g", dt);
        return CC_ERR_RANGE;
    }
    if (!cc__slot_lock((uint32_t)w)) {
        snprintf(cc__err, CC__ERR_SIZE, "world %#llx: in use by another thread", (unsigned long long)w);
        return CC_ERR_BUSY;
    }
    if (cc__live(w) != s) {                 /* destroyed between the check and the lock */
        cc__slot_unlock((uint32_t)w);
        return cc__bad_handle(w);
    }
    ts = cc__enter_python(&g);
    /* Between frames a host's own work leaves these lines cold, so the way in touches only the slot:
     * dt's float object is reused while dt stays the same (compared by the copy in the slot), and the
     * version is bumped now, with the slot's line at hand: no one reads it while the world is busy,
     * and a failed step changes nothing but costs the adapter's snapshot cache one rebuild. */
    if (s->dt == NULL || s->dt_value != dt) {
        Py_XDECREF(s->dt);
        s->dt = PyFloat_FromDouble(dt);
        s->dt_value = dt;
    }
    arg = s->dt;
    __atomic_add_fetch(&s->version, 1, __ATOMIC_RELAXED);
    use_tsc = cc__use_tsc;                  /* read now: after the step the global's line is cold */
    t0 = cc__ticks(use_tsc);
    r = arg ? PyObject_CallOneArg(s->step, arg) : NULL;
    if (r) {
        s->step_ticks = cc__ticks(use_tsc) - t0;
        Py_DECREF(r);                       /* the stats dict the step just made: its line is hot */
    } else {
        status = cc__step_error();
    }
    cc__release_python(ts, g);
    __atomic_store_n(&s->busy, 0, __ATOMIC_RELEASE);
    return status;
}

CC_EXPORT int32_t cc_world_get_step_stats(cc_world w, cc_step_stats *out)
{ CC_ENTER(); return cc__py_world_get_step_stats(w, out); }

CC_EXPORT int32_t cc_world_get_info(cc_world w, cc_world_info *out)
{ CC_ENTER(); return cc__py_world_get_info(w, out); }

CC_EXPORT int32_t cc_world_get_positions(cc_world w, double *xy, int32_t capacity, int32_t *count)
{ CC_ENTER(); return cc__py_world_get_positions(w, xy, capacity, count); }

CC_EXPORT int32_t cc_world_get_velocities(cc_world w, double *vxy, int32_t capacity, int32_t *count)
{ CC_ENTER(); return cc__py_world_get_velocities(w, vxy, capacity, count); }

CC_EXPORT int32_t cc_world_get_ids(cc_world w, int32_t *ids, int32_t capacity, int32_t *count)
{ CC_ENTER(); return cc__py_world_get_ids(w, ids, capacity, count); }

CC_EXPORT int32_t cc_world_get_neighbours(cc_world w, double x, double y, double radius, int32_t *ids,
                                          int32_t capacity, int32_t *count)
{ CC_ENTER(); return cc__py_world_get_neighbours(w, x, y, radius, ids, capacity, count); }

CC_EXPORT int32_t cc_world_state_hash(cc_world w, char *buf, int32_t capacity)
{ CC_ENTER(); return cc__py_world_state_hash(w, buf, capacity); }

CC_EXPORT int32_t cc_world_save_snapshot(cc_world w, void *buf, int64_t capacity, int64_t *size)
{ CC_ENTER(); return cc__py_world_save_snapshot(w, buf, capacity, size); }

CC_EXPORT int32_t cc_world_load_snapshot(cc_world w, const void *data, int64_t size)
{ CC_ENTER(); return cc__py_world_load_snapshot(w, data, size); }

CC_EXPORT int32_t cc_world_save_file(cc_world w, const char *path)
{ CC_ENTER(); return cc__py_world_save_file(w, path); }

CC_EXPORT int32_t cc_world_load_file(cc_world w, const char *path)
{ CC_ENTER(); return cc__py_world_load_file(w, path); }

CC_EXPORT int32_t cc_world_record_start(cc_world w, const char *path)
{ CC_ENTER(); return cc__py_world_record_start(w, path); }

CC_EXPORT int32_t cc_world_record_stop(cc_world w)
{ CC_ENTER(); return cc__py_world_record_stop(w); }

CC_EXPORT int32_t cc_replay_file(const char *path, cc_replay_result *out)
{ CC_ENTER(); return cc__py_replay_file(path, out); }
