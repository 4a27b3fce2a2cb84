/* crowdcore.h - the crowdcore C ABI (one public header; everything else is private).
 *
 * Build the library with `crowdcore cabi --build`; compile a host with
 *     gcc host.c $(crowdcore cabi --cflags --libs)
 *
 * Conventions
 *   - Every call returns a status code (CC_OK = 0); on failure cc_last_error() gives readable text and
 *     nothing in any world has changed. Output arguments are written only on success unless a line says
 *     otherwise (the size-query arguments `count`/`size` are also written on CC_ERR_CAPACITY).
 *   - Units: metres, seconds, metres per second. Agent ids are int32 and stable; target indices are int32.
 *   - A world is an opaque integer handle (index + generation); 0 is never valid and a destroyed
 *     handle stays invalid for ever (CC_ERR_HANDLE), it never crashes.
 *   - Bulk data goes into caller-owned buffers: capacity in, count out; a NULL buffer asks for the count.
 *     The library keeps no pointer into caller memory after a call returns.
 *   - Threading: any thread may call. A world must be used by one thread at a time; a concurrent call on
 *     the same world is refused with CC_ERR_BUSY (tests/c/test_threads.c). Different worlds may be used
 *     from different threads:
 *     calls serialise on the embedded Python interpreter lock, except inside compiled kernels, which
 *     release it, so two worlds stepping on two threads overlap only partly.
 *     A host thread written in Python calls with the interpreter lock released (ctypes.CDLL and cffi's ABI
 *     mode release it) or always holds it: a thread that stepped once without it is expected to stay so.
 *   - The first call that needs the runtime starts an embedded Python interpreter configured from paths
 *     baked in at build time (no PYTHONPATH needed); call cc_init() to pay that cost at a time you choose.
 *   - Results are bit-identical to the Python API (crowdcore.World) for the same inputs.
 */
#ifndef CROWDCORE_H
#define CROWDCORE_H

#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* @cdef-begin (this block is also the cffi declaration source: constants, typedefs and structs only) */
#define CC_ABI_VERSION_MAJOR 1
#define CC_ABI_VERSION_MINOR 2
#define CC_ABI_VERSION_PATCH 2

/* Status codes. */
#define CC_OK 0
#define CC_ERR_HANDLE 1        /* invalid, stale or destroyed world handle */
#define CC_ERR_NULL 2          /* a required pointer argument was NULL */
#define CC_ERR_NOT_FINITE 3    /* a NaN or infinite number */
#define CC_ERR_RANGE 4         /* a number outside its allowed range (dt <= 0, radius <= 0, negative count...) */
#define CC_ERR_CAPACITY 5      /* the caller's buffer is too small; the needed count/size was written */
#define CC_ERR_UNKNOWN_ID 6    /* an agent id or target index that does not exist */
#define CC_ERR_INVALID 7       /* another invalid argument (def struct not from cc_default_*, bad polygon, bad text) */
#define CC_ERR_SCENARIO 8      /* scenario file or text rejected */
#define CC_ERR_SNAPSHOT 9      /* snapshot bytes rejected (corrupt, other version, missing records) */
#define CC_ERR_IO 10           /* a file could not be read or written */
#define CC_ERR_BUSY 11         /* the world is being used by another thread right now */
#define CC_ERR_INIT 12         /* the embedded runtime failed to start (cc_last_error says why) */
#define CC_ERR_INTERNAL 13     /* an unexpected internal error (a bug; please report the text) */

/* Avoidance models for cc_world_def.avoidance. */
#define CC_AVOID_ORCA 0
#define CC_AVOID_SOCIAL_FORCE 1

typedef uint64_t cc_world;     /* opaque world handle; 0 is never valid */

/* World parameters; fill with cc_default_world_def() and change what you need. */
typedef struct cc_world_def {
    uint64_t seed;             /* random seed */
    double dt;                 /* default step (s); cc_world_step takes dt explicitly */
    double max_dt;             /* larger steps are refused (s) */
    int32_t avoidance;         /* CC_AVOID_ORCA or CC_AVOID_SOCIAL_FORCE */
    int32_t strict;            /* 1: chosen velocities obey the avoidance constraints and the contact guard */
    int32_t neighbours;        /* K nearest neighbours considered, 0..64 */
    int32_t search_width;      /* speed buckets scanned on each side, 0..1000 */
    double sense_radius;       /* neighbours farther than this are ignored (m) */
    double nav_cell;           /* navigation grid cell size (m) */
    double clearance;          /* wall clearance of the navigation grid (m) */
    double max_speed_factor;   /* speed limit = factor x preferred speed */
    double orca_tau;           /* ORCA horizon for agents (s) */
    double orca_tau_walls;     /* ORCA horizon for walls (s) */
    double weights[6];         /* energy weights: similarity, consistency, expectation, direction, avoidance, group */
    double bounds[4];          /* xmin, ymin, xmax, ymax to cover at least; all zero = from the content */
    double budget_ms;          /* > 0: a deterministic governor narrows search width, then K, to fit this step time (ms) */
    int32_t internal_check;    /* set by cc_default_world_def; do not change */
    int32_t reserved;
} cc_world_def;

/* One agent to add; fill with cc_default_agent_def() and change what you need. */
typedef struct cc_agent_def {
    double x, y;               /* start position (m) */
    double vx, vy;             /* start velocity (m/s) */
    double pref_speed;         /* preferred speed (m/s), 0..5 */
    double radius;             /* body radius (m), (0, 2] */
    int32_t target;            /* target index, -1 = none */
    int32_t group;             /* group number >= 0, -1 = none */
    int32_t internal_check;    /* set by cc_default_agent_def; do not change */
    int32_t reserved;
} cc_agent_def;

/* Counters of a world. */
typedef struct cc_world_info {
    int64_t frame;             /* frames stepped so far */
    double time;               /* simulated time (s) */
    int64_t arrived_total;     /* agents that reached their target and left */
    int32_t agent_count;       /* agents in the world now */
    int32_t target_count;
    int32_t wall_count;        /* wall polylines */
    int32_t obstacle_count;    /* solid polygons */
    int32_t last_arrived;      /* agents that arrived in the last step */
    int32_t reserved;
} cc_world_info;

/* Statistics of the last step (all zero before the first step). */
typedef struct cc_step_stats {
    double min_gap;            /* smallest surface gap between neighbours (m); +inf with no agents */
    double step_seconds;       /* wall time inside the simulation step itself, timed around World.step (s) */
    int32_t overlaps;          /* overlapping neighbour pairs */
    int32_t blocked_moves;     /* moves cancelled at walls */
    int32_t arrived;           /* agents that arrived */
    int32_t fallbacks;         /* agents that took the collision-free velocity (no record eligible) */
    int32_t guarded;           /* agents slowed by the contact guard */
    int32_t search_width;      /* search width used in the step (the governor's choice when budget_ms > 0) */
    int32_t neighbours;        /* neighbour count K used in the step */
    int32_t reserved;
} cc_step_stats;

/* What cc_replay_file found. */
typedef struct cc_replay_result {
    int64_t frames_checked;    /* frames whose state hash matched the recording */
    int64_t diverged_frame;    /* first frame whose hash differs; -1 if none */
    int32_t diverged_agent;    /* id of the first differing agent; -1 if none or unknown */
    int32_t identical;         /* 1 if every recorded frame replayed bit for bit */
    int32_t truncated;         /* 1 if the file ends inside an entry (a crash mid-run); the prefix was checked */
    int32_t reserved;
} cc_replay_result;
/* @cdef-end */

#if defined(_WIN32)
#  define CC_API __declspec(dllimport)
#else
#  define CC_API
#endif

/* --- library (pure C: no runtime start, any thread, any time) --- */
CC_API int32_t cc_version(int32_t *major, int32_t *minor, int32_t *patch);   /* ABI version; NULL outputs skipped. */
CC_API int32_t cc_status_name(int32_t status, const char **name);            /* *name = static text ("CC_ERR_HANDLE"); never freed. */
CC_API int32_t cc_last_error(char *buf, int32_t capacity, int32_t *length);  /* This thread's last failure text, "" after a success; copies NUL-terminated into buf (truncated -> CC_ERR_CAPACITY), *length = full length without NUL; buf NULL asks the length. Does not reset it. */

/* --- start-up and defaults --- */
CC_API int32_t cc_init(void);                                                 /* Start the embedded runtime now (otherwise the first call does); idempotent; CC_ERR_INIT with text on failure. */
CC_API int32_t cc_default_world_def(cc_world_def *def);                       /* Fill *def with the documented defaults (same as Python's Params()). */
CC_API int32_t cc_default_agent_def(cc_agent_def *def);                       /* Fill *def with defaults: at (0,0), at rest, 1.34 m/s, radius 0.25 m, target 0, no group. */

/* --- worlds: create and destroy --- */
CC_API int32_t cc_world_create(const cc_world_def *def, cc_world *out);                          /* Empty world from *def (copied); *out = new handle, yours until cc_world_destroy. */
CC_API int32_t cc_world_create_from_scenario_file(const char *path, cc_world *out);              /* World from a UTF-8 scenario (TOML) file path; spawns its agents with the file's seed. */
CC_API int32_t cc_world_create_from_scenario_text(const char *toml_text, cc_world *out);         /* World from scenario TOML text (NUL-terminated UTF-8; record-file paths relative to the cwd). */
CC_API int32_t cc_world_create_from_snapshot(const void *data, int64_t size, cc_world *out);     /* World from snapshot bytes (copied; the buffer may be freed on return). */
CC_API int32_t cc_world_create_from_file(const char *path, cc_world *out);                       /* World from a snapshot file written by cc_world_save_file. */
CC_API int32_t cc_world_destroy(cc_world w);                                                     /* Free the world; w and every copy of it become invalid (CC_ERR_HANDLE). */
CC_API int32_t cc_world_is_valid(cc_world w);                                                    /* CC_OK if w names a live world, else CC_ERR_HANDLE (pure C after start-up). */

/* --- scene edits (each rebuilds navigation fields: milliseconds, not per frame) --- */
CC_API int32_t cc_world_add_wall(cc_world w, const double *xy, int32_t point_count, int32_t closed); /* Wall polyline of point_count (x,y) pairs (>= 2, >= 3 if closed); closed != 0 joins last to first. */
CC_API int32_t cc_world_add_obstacle(cc_world w, const double *xy, int32_t point_count);          /* Solid polygon of point_count (x,y) pairs (>= 3). */
CC_API int32_t cc_world_add_target_circle(cc_world w, const char *name, double cx, double cy, double r, int32_t *out_index); /* Circular target (m); unique name; *out_index = its index (out_index may be NULL). */
CC_API int32_t cc_world_add_target_rect(cc_world w, const char *name, double xmin, double ymin, double xmax, double ymax, int32_t *out_index); /* Rectangular target (m); unique name; *out_index may be NULL. */
CC_API int32_t cc_world_set_bounds(cc_world w, double xmin, double ymin, double xmax, double ymax);  /* Grow the simulated area to cover this box (m). */
CC_API int32_t cc_world_set_params(cc_world w, const char *toml_text);  /* Change parameters now: TOML with the keys of a scenario's [params] (or that table), e.g. "search_width = 2\nweights = { avoidance = 4.0 }"; validated as a whole, all or nothing; recorded. */

/* --- agents --- */
CC_API int32_t cc_world_add_agents(cc_world w, const cc_agent_def *defs, int32_t count, int32_t *out_ids); /* Add count agents (all or none); out_ids (count slots, may be NULL) receives their new ids. */
CC_API int32_t cc_world_remove_agents(cc_world w, const int32_t *ids, int32_t count);            /* Remove agents by id (all or none; an unknown id -> CC_ERR_UNKNOWN_ID). */
CC_API int32_t cc_world_set_agent_target(cc_world w, int32_t id, int32_t target);                /* Send agent `id` to target index `target` (-1 = none). */

/* --- stepping --- */
CC_API int32_t cc_world_step(cc_world w, double dt);                                             /* Advance one frame of dt seconds, 0 < dt <= max_dt; invalidates earlier query results. Checks run in C, then World.step directly. */
CC_API int32_t cc_world_get_step_stats(cc_world w, cc_step_stats *out);                          /* Statistics of the last step. */
CC_API int32_t cc_world_get_info(cc_world w, cc_world_info *out);                                /* Frame number, time and counts. */

/* --- queries: copies into caller buffers, rows sorted by agent id, valid until the next step or edit --- */
CC_API int32_t cc_world_get_positions(cc_world w, double *xy, int32_t capacity, int32_t *count);   /* xy[2*i], xy[2*i+1] = position (m) of the i-th agent; capacity in agents. */
CC_API int32_t cc_world_get_velocities(cc_world w, double *vxy, int32_t capacity, int32_t *count); /* Velocities (m/s), same rows as cc_world_get_positions. */
CC_API int32_t cc_world_get_ids(cc_world w, int32_t *ids, int32_t capacity, int32_t *count);       /* Agent ids, ascending; same rows as the positions. */
CC_API int32_t cc_world_get_neighbours(cc_world w, double x, double y, double radius, int32_t *ids, int32_t capacity, int32_t *count); /* Ids of agents whose centre lies within radius (m) of (x, y), ascending. */
CC_API int32_t cc_world_state_hash(cc_world w, char *buf, int32_t capacity);                     /* 32 hex digits + NUL (capacity >= 33) naming the evolving state; equal hash = bit-identical agents. */

/* --- snapshots (complete state; loading builds the new world first, so a bad image changes nothing) --- */
CC_API int32_t cc_world_save_snapshot(cc_world w, void *buf, int64_t capacity, int64_t *size);  /* Snapshot bytes into buf; *size = bytes needed; buf NULL asks the size. */
CC_API int32_t cc_world_load_snapshot(cc_world w, const void *data, int64_t size);              /* Replace world w's state with a snapshot (w stays the same handle). */
CC_API int32_t cc_world_save_file(cc_world w, const char *path);                                /* Write a snapshot file atomically (an old file survives a failed write). */
CC_API int32_t cc_world_load_file(cc_world w, const char *path);                                /* Replace world w's state with a snapshot file. */

/* --- recordings (initial snapshot + every command and step with a state hash, flushed each step) --- */
CC_API int32_t cc_world_record_start(cc_world w, const char *path);   /* Record w to path from now on (CC_ERR_INVALID if already recording; loading a snapshot into w is refused while recording). */
CC_API int32_t cc_world_record_stop(cc_world w);                      /* Finish w's recording and close the file (CC_ERR_INVALID if not recording); destroy also stops it. */
CC_API int32_t cc_replay_file(const char *path, cc_replay_result *out); /* Replay a recording in a private world and check every frame's hash; CC_ERR_SNAPSHOT for a damaged file. */

#ifdef __cplusplus
}
#endif
#endif /* CROWDCORE_H */
