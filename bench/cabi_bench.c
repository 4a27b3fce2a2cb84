/* Overhead of the crowdcore C ABI, measured from C (driven by bench/cabi_bench.py).
 *   cabi_bench N STEPS COPIES  ->  one JSON line on stdout
 * step overhead = wall time of cc_world_step seen from C minus the time spent inside World.step
 * (cc_step_stats.step_seconds, timed around the call at the C boundary): handle and argument checks,
 * the busy flag, taking and releasing the interpreter lock, boxing dt. */
#define _POSIX_C_SOURCE 199309L
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include "crowdcore.h"

static double now(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return (double)t.tv_sec + 1e-9 * (double)t.tv_nsec;
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
    cc_last_error(e_, sizeof e_, NULL); fprintf(stderr, "%s -> %d: %s\n", #call, s_, e_); return 1; } } while (0)

int main(int argc, char **argv)
{
    int n = argc > 1 ? atoi(argv[1]) : 1000, steps = argc > 2 ? atoi(argv[2]) : 50;
    int copies = argc > 3 ? atoi(argv[3]) : 200, side = 1, i;
    cc_world_def wd;
    cc_world w;
    cc_agent_def *defs;
    cc_step_stats st;
    double *xy, *xy2, *over, *total, *copy, *mcpy, *nop, *adapter, t0, t_init, spacing = 1.2, extent;
    cc_world_info info;
    int32_t count;

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

    over = malloc(sizeof *over * (size_t)steps);
    total = malloc(sizeof *total * (size_t)steps);
    for (i = 0; i < steps; i++) {
        t0 = now();
        CHECK(cc_world_step(w, 0.1));
        total[i] = now() - t0;
        CHECK(cc_world_get_step_stats(w, &st));
        over[i] = total[i] - st.step_seconds;
    }
    nop = malloc(sizeof *nop * (size_t)copies);
    adapter = malloc(sizeof *adapter * (size_t)copies);
    for (i = 0; i < copies; i++) {
        t0 = now();
        CHECK(cc_world_is_valid(w));        /* a call answered in C */
        nop[i] = now() - t0;
        t0 = now();
        CHECK(cc_world_get_info(w, &info)); /* a small call through the Python adapter */
        adapter[i] = now() - t0;
    }
    CHECK(cc_world_get_positions(w, NULL, 0, &count));
    xy = malloc(sizeof *xy * 2 * (size_t)(count + 1));
    xy2 = malloc(sizeof *xy2 * 2 * (size_t)(count + 1));
    copy = malloc(sizeof *copy * (size_t)copies);
    mcpy = malloc(sizeof *mcpy * (size_t)copies);
    for (i = 0; i < copies; i++) {
        t0 = now();
        CHECK(cc_world_get_positions(w, xy, count, &count));
        copy[i] = now() - t0;
        t0 = now();
        memcpy(xy2, xy, sizeof *xy * 2 * (size_t)count);   /* reference: a plain memcpy of the same bytes */
        mcpy[i] = now() - t0;
    }
    printf("{\"agents\": %d, \"agents_after\": %d, \"steps\": %d, \"init_s\": %.6f, "
           "\"step_total_ms_median\": %.4f, \"step_overhead_us_median\": %.3f, \"c_call_us_median\": %.3f, "
           "\"adapter_call_us_median\": %.3f, "
           "\"positions_copy_us_median\": %.3f, \"memcpy_us_median\": %.3f}\n",
           n, count, steps, t_init, 1e3 * median(total, steps), 1e6 * median(over, steps), 1e6 * median(nop, copies),
           1e6 * median(adapter, copies),
           1e6 * median(copy, copies), 1e6 * median(mcpy, copies));
    CHECK(cc_world_destroy(w));
    return 0;
}
