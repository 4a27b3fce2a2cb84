/* Overhead of the crowdcore C ABI, measured from C (driven by bench/cabi_bench.py).
 *   cabi_bench N STEPS COPIES [FLOOR_BYTES_PER_AGENT]  ->  one JSON line on stdout
 * step overhead = wall time of cc_world_step seen from C minus the time spent inside World.step
 * (cc_step_stats.step_seconds, timed around the call at the C boundary): handle and argument checks,
 * the busy flag, taking and releasing the interpreter lock, the way back to the host.
 *
 * The timer is the CPU's time-stamp counter where the kernel uses it as its clock (x86-64, clocksource
 * "tsc"), the same clock the library times the step with: it reads no memory. clock_gettime() after a
 * large step first stalls on its own cold vDSO lines (~0.7 us at 100k agents), a cost of the clock and
 * not of the call, so the step is also timed with it, outside the counter, and reported beside.
 *
 * floor = the same overhead for a plain C step (bench/cabi_floor.c, its own library) that streams
 * FLOOR_BYTES_PER_AGENT x N bytes (default 1024: the peak of new allocations in one World.step, measured
 * with tracemalloc at 100,000 agents). The two steps alternate, so both meet the machine in the same
 * state; overhead above the floor is the median of the per-step differences.
 *
 * Two ways in:
 *   warm entry: each step follows a small call into its own library (cc_world_get_step_stats, as a host
 *               reads results between frames), so only the way back is cold;
 *   cold entry: each step follows the other library's step, as after a host's own heavy work: the way
 *               in is cold too. */
#define _POSIX_C_SOURCE 199309L
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#if defined(__x86_64__)
#include <x86intrin.h>
#endif
#include "crowdcore.h"

uint64_t floor_open(void);                      /* bench/cabi_floor.c */
int32_t floor_step(uint64_t handle, double *buf, int64_t n, int32_t use_tsc);
uint64_t floor_step_ticks(uint64_t handle);

static double now(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return (double)t.tv_sec + 1e-9 * (double)t.tv_nsec;
}

static int use_tsc;                 /* see the top of the file */
static unsigned long long tick0;
static double clock0;

static unsigned long long ticks_with(int tsc)   /* tsc from a local: after a step use_tsc's line is cold */
{
#if defined(__x86_64__)
    if (tsc)
        return __rdtsc();
#endif
    return (unsigned long long)(now() * 1e9);
}

static unsigned long long ticks(void)
{
    return ticks_with(use_tsc);
}

static void timer_start(void)
{
#if defined(__x86_64__)
    char name[32] = {0};
    FILE *f = fopen("/sys/devices/system/clocksource/clocksource0/current_clocksource", "r");
    if (f) {
        use_tsc = fgets(name, sizeof name, f) != NULL && strncmp(name, "tsc\n", 4) == 0;
        fclose(f);
    }
#endif
    clock0 = now();
    tick0 = ticks();
}

static double tick_seconds(void)     /* the counter's rate over the run so far */
{
    return use_tsc ? (now() - clock0) / (double)(ticks() - tick0) : 1e-9;
}

static int cmp(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

static double median(double *v, int n)
{
    qsort(v, (size_t)n, sizeof *v, cmp);
    return n % 2 ? v[n / 2] : 0.5 * (v[n / 2 - 1] + v[n / 2]);
}

#define CHECK(call) do { int32_t s_ = (call); if (s_ != CC_OK) { char e_[4096]; \
    cc_last_error(e_, sizeof e_, NULL); fprintf(stderr, "%s -> %d: %s\n", #call, s_, e_); exit(1); } } while (0)

typedef struct overheads {          /* medians, microseconds */
    double step_ms, step, step_clock, floor, above;
} overheads;

/* Alternate `steps` timed cc_world_step calls with timed floor steps; warm: a small call into each
 * library right before its step. */
static overheads measure(cc_world w, int steps, int warm, double *floor_buf, int64_t floor_n, uint64_t floor_h)
{
    double *over = malloc(sizeof *over * (size_t)steps), *over_clock = malloc(sizeof *over * (size_t)steps);
    double *inner = malloc(sizeof *over * (size_t)steps), *floor_over = malloc(sizeof *over * (size_t)steps);
    double *above = malloc(sizeof *over * (size_t)steps), *total_ms = malloc(sizeof *over * (size_t)steps);
    unsigned long long *total = malloc(sizeof *total * (size_t)steps), *clock_ns = malloc(sizeof *total * (size_t)steps);
    unsigned long long *floor_total = malloc(sizeof *total * (size_t)steps);
    unsigned long long *floor_inner = malloc(sizeof *total * (size_t)steps), k0, k1;
    int tsc = use_tsc, i;
    double t0, tick;
    cc_step_stats st;
    overheads r;
    for (i = 0; i < steps; i++) {
        if (warm)
            CHECK(cc_world_get_step_stats(w, &st));
        t0 = now();
        k0 = ticks_with(tsc);
        CHECK(cc_world_step(w, 0.1));
        k1 = ticks_with(tsc);
        clock_ns[i] = (unsigned long long)((now() - t0) * 1e9);
        total[i] = k1 - k0;
        CHECK(cc_world_get_step_stats(w, &st));
        inner[i] = st.step_seconds;
        if (warm)
            floor_step_ticks(floor_h);
        k0 = ticks_with(tsc);
        floor_step(floor_h, floor_buf, floor_n, tsc);
        k1 = ticks_with(tsc);
        floor_total[i] = k1 - k0;
        floor_inner[i] = floor_step_ticks(floor_h);
    }
    tick = tick_seconds();
    for (i = 0; i < steps; i++) {
        over[i] = (double)total[i] * tick - inner[i];
        over_clock[i] = 1e-9 * (double)clock_ns[i] - inner[i];
        floor_over[i] = (double)(floor_total[i] - floor_inner[i]) * tick;
        above[i] = over[i] - floor_over[i];
        total_ms[i] = (double)total[i] * tick;
    }
    r.step_ms = 1e3 * median(total_ms, steps);
    r.step = 1e6 * median(over, steps);
    r.step_clock = 1e6 * median(over_clock, steps);
    r.floor = 1e6 * median(floor_over, steps);
    r.above = 1e6 * median(above, steps);
    free(over); free(over_clock); free(inner); free(floor_over); free(above); free(total_ms);
    free(total); free(clock_ns); free(floor_total); free(floor_inner);
    return r;
}

static double median_us(const unsigned long long *ticks_, int n, double tick)
{
    double *v = malloc(sizeof *v * (size_t)n), m;
    int i;
    for (i = 0; i < n; i++)
        v[i] = (double)ticks_[i] * tick;
    m = 1e6 * median(v, n);
    free(v);
    return m;
}

int main(int argc, char **argv)
{
    int n = argc > 1 ? atoi(argv[1]) : 1000, steps = argc > 2 ? atoi(argv[2]) : 50;
    int copies = argc > 3 ? atoi(argv[3]) : 200, side = 1, i;
    int64_t floor_n = (int64_t)(argc > 4 ? atof(argv[4]) : 1024.0) * n / (int64_t)sizeof(double);
    cc_world_def wd;
    cc_world w;
    cc_agent_def *defs;
    cc_world_info info;
    double *xy, *xy2, *floor_buf, t0, t_init, spacing = 1.2, extent, tick;
    unsigned long long *copy, *mcpy, *nop, *adapter, k0;
    uint64_t floor_h;
    int32_t count;
    overheads warm, cold;

    timer_start();
    t0 = now();
    CHECK(cc_init());
    t_init = now() - t0;
    while (side * side < n)
        side++;
    extent = side * spacing + 4.0;
    CHECK(cc_default_world_def(&wd));
    wd.nav_cell = extent > 100 ? 1.0 : 0.25;     /* keep the navigation field small for 100k agents */
    CHECK(cc_world_create(&wd, &w));
    CHECK(cc_world_set_bounds(w, -2, -2, extent, extent));
    CHECK(cc_world_add_target_rect(w, "east", extent - 1.5, -2, extent, extent, NULL));
    defs = malloc(sizeof *defs * (size_t)n);
    for (i = 0; i < n; i++) {
        CHECK(cc_default_agent_def(&defs[i]));
        defs[i].x = (i % side) * spacing;
        defs[i].y = (i / side) * spacing;
    }
    CHECK(cc_world_add_agents(w, defs, n, NULL));
    CHECK(cc_world_step(w, 0.1));            /* warm: compilation never lands in a timed call */
    floor_buf = calloc((size_t)floor_n + 8, sizeof *floor_buf);
    floor_h = floor_open();
    if (floor_buf == NULL || floor_h == 0 || floor_step(floor_h, floor_buf, floor_n, use_tsc) != 0) {
        fprintf(stderr, "floor: setup failed\n");
        return 1;
    }
    warm = measure(w, steps, 1, floor_buf, floor_n, floor_h);
    cold = measure(w, steps, 0, floor_buf, floor_n, floor_h);

    nop = malloc(sizeof *nop * (size_t)copies);
    adapter = malloc(sizeof *adapter * (size_t)copies);
    for (i = 0; i < copies; i++) {
        k0 = ticks();
        CHECK(cc_world_is_valid(w));        /* a call answered in C */
        nop[i] = ticks() - k0;
        k0 = ticks();
        CHECK(cc_world_get_info(w, &info)); /* a small call through the Python adapter */
        adapter[i] = ticks() - k0;
    }
    CHECK(cc_world_get_positions(w, NULL, 0, &count));
    xy = malloc(sizeof *xy * 2 * (size_t)(count + 1));
    xy2 = malloc(sizeof *xy2 * 2 * (size_t)(count + 1));
    copy = malloc(sizeof *copy * (size_t)copies);
    mcpy = malloc(sizeof *mcpy * (size_t)copies);
    for (i = 0; i < copies; i++) {
        k0 = ticks();
        CHECK(cc_world_get_positions(w, xy, count, &count));
        copy[i] = ticks() - k0;
        k0 = ticks();
        memcpy(xy2, xy, sizeof *xy * 2 * (size_t)count);   /* reference: a plain memcpy of the same bytes */
        mcpy[i] = ticks() - k0;
    }
    tick = tick_seconds();
    printf("{\"agents\": %d, \"agents_after\": %d, \"steps\": %d, \"init_s\": %.6f, \"timer\": \"%s\", "
           "\"floor_stream_mb\": %.1f, \"step_total_ms_median\": %.4f, "
           "\"step_overhead_us_median\": %.3f, \"step_overhead_with_clock_gettime_us_median\": %.3f, "
           "\"floor_overhead_us_median\": %.3f, \"step_overhead_above_floor_us_median\": %.3f, "
           "\"cold_entry\": {\"step_overhead_us_median\": %.3f, \"step_overhead_with_clock_gettime_us_median\": %.3f, "
           "\"floor_overhead_us_median\": %.3f, \"step_overhead_above_floor_us_median\": %.3f}, "
           "\"c_call_us_median\": %.3f, \"adapter_call_us_median\": %.3f, "
           "\"positions_copy_us_median\": %.3f, \"memcpy_us_median\": %.3f}\n",
           n, count, steps, t_init, use_tsc ? "tsc" : "clock_gettime", 8e-6 * (double)floor_n, warm.step_ms,
           warm.step, warm.step_clock, warm.floor, warm.above, cold.step, cold.step_clock, cold.floor, cold.above,
           median_us(nop, copies, tick), median_us(adapter, copies, tick),
           median_us(copy, copies, tick), median_us(mcpy, copies, tick));
    CHECK(cc_world_destroy(w));
    return 0;
}
