/* C-side checks of the crowdcore ABI: every error case returns its own status with readable text,
 * never crashes, and leaves the world unchanged (same state hash); plus the positions query writing
 * straight into the caller's buffer. Prints one line per check; exit status = number of failures. */
#define _POSIX_C_SOURCE 199309L
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include "crowdcore.h"

static int failures = 0, checks = 0;

static void expect(const char *what, int32_t got, int32_t want)
{
    char text[4096] = "";
    int32_t len = 0;
    const char *gn = "?", *wn = "?";
    cc_last_error(text, (int32_t)sizeof text, &len);
    cc_status_name(got, &gn);
    cc_status_name(want, &wn);
    checks++;
    /* an error must come with text; a success must leave the text empty */
    if (got != want || (want != CC_OK && len == 0) || (want == CC_OK && len != 0)) {
        failures++;
        printf("FAIL %s: got %s, want %s; text: %s\n", what, gn, wn, text);
    } else {
        printf("ok   %s: %s%s%.120s\n", what, gn, len ? " -- " : "", text);
    }
}

static void truth(const char *what, int cond)
{
    checks++;
    if (!cond)
        failures++;
    printf("%s %s\n", cond ? "ok  " : "FAIL", what);
}

static void hash_of(cc_world w, char out[33])
{
    if (cc_world_state_hash(w, out, 33) != CC_OK)
        strcpy(out, "<no hash>");
}

int main(void)
{
    cc_world_def wd;
    cc_agent_def ad[4];
    cc_world w = 0, w2 = 0, stale = 0;
    int32_t ids[4], n = -1, i, idx = -1;
    double xy[2 * 8], nan = NAN, inf = INFINITY;
    char before[33], after[33];
    unsigned char junk[64];

    /* ---- setup: an empty world with one wall, one target and four agents at known spots */
    expect("cc_init", cc_init(), CC_OK);
    expect("cc_default_world_def", cc_default_world_def(&wd), CC_OK);
    wd.seed = 3;
    expect("cc_world_create", cc_world_create(&wd, &w), CC_OK);
    truth("handle is not 0", w != 0);
    {
        double wall[] = {0, 0, 20, 0};
        expect("cc_world_add_wall", cc_world_add_wall(w, wall, 2, 0), CC_OK);
    }
    expect("cc_world_add_target_circle", cc_world_add_target_circle(w, "goal", 18, 5, 1, &idx), CC_OK);
    truth("first target has index 0", idx == 0);
    for (i = 0; i < 4; i++) {
        expect("cc_default_agent_def", cc_default_agent_def(&ad[i]), CC_OK);
        ad[i].x = 1.0 + 1.5 * i;
        ad[i].y = 2.0 + 0.25 * i;
    }
    expect("cc_world_add_agents", cc_world_add_agents(w, ad, 4, ids), CC_OK);
    truth("ids ascend from 1", ids[0] == 1 && ids[3] == 4);

    /* ---- positions go straight into the caller's buffer (no step yet: exactly the defs) */
    for (i = 0; i < 16; i++)
        xy[i] = -12345.0;               /* canary */
    expect("get_positions into caller buffer", cc_world_get_positions(w, xy, 8, &n), CC_OK);
    truth("count = 4", n == 4);
    {
        int same = 1;
        for (i = 0; i < 4; i++)
            same &= xy[2 * i] == ad[i].x && xy[2 * i + 1] == ad[i].y;
        truth("buffer rows equal the agents' positions", same);
        same = 1;
        for (i = 8; i < 16; i++)
            same &= xy[i] == -12345.0;
        truth("buffer beyond count untouched", same);
    }
    expect("get_positions NULL buffer asks the size", cc_world_get_positions(w, NULL, 0, &n), CC_OK);
    truth("size query gives 4", n == 4);

    expect("step", cc_world_step(w, 0.1), CC_OK);
    hash_of(w, before);

    /* ---- invalid and stale handles */
    expect("handle 0", cc_world_step(0, 0.1), CC_ERR_HANDLE);
    expect("forged handle", cc_world_step((cc_world)0x0000000700000009ULL, 0.1), CC_ERR_HANDLE);
    expect("forged generation", cc_world_step(w + (1ULL << 32), 0.1), CC_ERR_HANDLE);
    expect("is_valid(live)", cc_world_is_valid(w), CC_OK);
    expect("is_valid(0)", cc_world_is_valid(0), CC_ERR_HANDLE);
    expect("create second", cc_world_create(&wd, &stale), CC_OK);
    expect("destroy second", cc_world_destroy(stale), CC_OK);
    expect("stale handle step", cc_world_step(stale, 0.1), CC_ERR_HANDLE);
    expect("stale handle positions", cc_world_get_positions(stale, xy, 8, &n), CC_ERR_HANDLE);
    expect("double destroy", cc_world_destroy(stale), CC_ERR_HANDLE);
    expect("create reuses the slot", cc_world_create(&wd, &w2), CC_OK);
    truth("reused slot gets a new handle", w2 != stale);
    expect("old handle still stale", cc_world_is_valid(stale), CC_ERR_HANDLE);

    /* ---- NULL pointers */
    expect("create NULL def", cc_world_create(NULL, &w2), CC_ERR_NULL);
    expect("create NULL out", cc_world_create(&wd, NULL), CC_ERR_NULL);
    expect("default def NULL", cc_default_world_def(NULL), CC_ERR_NULL);
    expect("positions NULL count", cc_world_get_positions(w, xy, 8, NULL), CC_ERR_NULL);
    expect("add_wall NULL points", cc_world_add_wall(w, NULL, 2, 0), CC_ERR_NULL);
    expect("add_agents NULL defs", cc_world_add_agents(w, NULL, 2, NULL), CC_ERR_NULL);
    expect("remove NULL ids", cc_world_remove_agents(w, NULL, 1), CC_ERR_NULL);
    expect("target NULL name", cc_world_add_target_circle(w, NULL, 1, 1, 1, NULL), CC_ERR_NULL);
    expect("scenario NULL path", cc_world_create_from_scenario_file(NULL, &w2), CC_ERR_NULL);
    expect("snapshot NULL data", cc_world_load_snapshot(w, NULL, 10), CC_ERR_NULL);
    expect("save_snapshot NULL size", cc_world_save_snapshot(w, NULL, 0, NULL), CC_ERR_NULL);
    expect("state_hash NULL buf", cc_world_state_hash(w, NULL, 33), CC_ERR_NULL);
    expect("step stats NULL", cc_world_get_step_stats(w, NULL), CC_ERR_NULL);
    expect("info NULL", cc_world_get_info(w, NULL), CC_ERR_NULL);
    expect("status_name NULL", cc_status_name(CC_OK, NULL), CC_ERR_NULL);

    /* ---- NaN and infinite numbers */
    expect("step NaN", cc_world_step(w, nan), CC_ERR_NOT_FINITE);
    expect("step +inf", cc_world_step(w, inf), CC_ERR_NOT_FINITE);
    expect("step -inf", cc_world_step(w, -inf), CC_ERR_NOT_FINITE);
    {
        cc_agent_def bad[2];
        cc_default_agent_def(&bad[0]);
        cc_default_agent_def(&bad[1]);
        bad[1].y = nan;
        expect("add_agents NaN position", cc_world_add_agents(w, bad, 2, NULL), CC_ERR_NOT_FINITE);
        bad[1].y = 1;
        bad[1].vx = inf;
        expect("add_agents inf velocity", cc_world_add_agents(w, bad, 2, NULL), CC_ERR_NOT_FINITE);
        bad[1].vx = 0;
        bad[1].pref_speed = nan;
        expect("add_agents NaN speed", cc_world_add_agents(w, bad, 2, NULL), CC_ERR_NOT_FINITE);
    }
    {
        double wall[] = {0, 0, inf, 1};
        expect("add_wall inf", cc_world_add_wall(w, wall, 2, 0), CC_ERR_NOT_FINITE);
    }
    expect("target NaN centre", cc_world_add_target_circle(w, "t", nan, 0, 1, NULL), CC_ERR_NOT_FINITE);
    expect("neighbours NaN", cc_world_get_neighbours(w, nan, 0, 1, ids, 4, &n), CC_ERR_NOT_FINITE);
    expect("set_bounds inf", cc_world_set_bounds(w, -inf, 0, 1, 1), CC_ERR_NOT_FINITE);
    {
        cc_world_def d = wd;
        d.sense_radius = nan;
        expect("world def NaN", cc_world_create(&d, &w2), CC_ERR_NOT_FINITE);
    }

    /* ---- out-of-range numbers (negative dt first) */
    expect("step negative dt", cc_world_step(w, -0.1), CC_ERR_RANGE);
    expect("step zero dt", cc_world_step(w, 0.0), CC_ERR_RANGE);
    expect("step dt above max_dt", cc_world_step(w, 5.0), CC_ERR_RANGE);
    expect("add_agents negative count", cc_world_add_agents(w, ad, -1, NULL), CC_ERR_RANGE);
    expect("positions negative capacity", cc_world_get_positions(w, xy, -1, &n), CC_ERR_RANGE);
    expect("neighbours negative radius", cc_world_get_neighbours(w, 0, 0, -1, ids, 4, &n), CC_ERR_RANGE);
    {
        cc_agent_def bad;
        cc_default_agent_def(&bad);
        bad.radius = -0.2;
        expect("add_agents negative radius", cc_world_add_agents(w, &bad, 1, NULL), CC_ERR_RANGE);
    }
    {
        cc_world_def d = wd;
        d.dt = -1;
        expect("world def negative dt", cc_world_create(&d, &w2), CC_ERR_RANGE);
    }

    /* ---- too-small buffers: error, needed size written, buffer untouched */
    for (i = 0; i < 16; i++)
        xy[i] = -7.0;
    n = -1;
    expect("positions capacity too small", cc_world_get_positions(w, xy, 3, &n), CC_ERR_CAPACITY);
    truth("needed count written on CAPACITY", n == 4);
    truth("small buffer untouched", xy[0] == -7.0 && xy[5] == -7.0);
    expect("ids capacity too small", cc_world_get_ids(w, ids, 1, &n), CC_ERR_CAPACITY);
    expect("velocities capacity 0", cc_world_get_velocities(w, xy, 0, &n), CC_ERR_CAPACITY);
    expect("neighbours capacity too small", cc_world_get_neighbours(w, 4, 2, 50, ids, 1, &n), CC_ERR_CAPACITY);
    {
        int64_t size = -1;
        expect("snapshot size query", cc_world_save_snapshot(w, NULL, 0, &size), CC_OK);
        truth("snapshot size > 0", size > 0);
        expect("snapshot buffer too small", cc_world_save_snapshot(w, junk, (int64_t)sizeof junk, &size), CC_ERR_CAPACITY);
    }
    {
        char small[8];
        expect("state_hash capacity too small", cc_world_state_hash(w, small, 8), CC_ERR_CAPACITY);
    }

    /* ---- unknown ids and target indices */
    {
        int32_t unknown[2] = {2, 999};
        expect("remove unknown id", cc_world_remove_agents(w, unknown, 2), CC_ERR_UNKNOWN_ID);
        expect("set target of unknown id", cc_world_set_agent_target(w, 999, 0), CC_ERR_UNKNOWN_ID);
        expect("set unknown target index", cc_world_set_agent_target(w, 1, 7), CC_ERR_UNKNOWN_ID);
    }
    {
        cc_agent_def bad;
        cc_default_agent_def(&bad);
        bad.target = 5;
        expect("add_agents unknown target", cc_world_add_agents(w, &bad, 1, NULL), CC_ERR_UNKNOWN_ID);
    }

    /* ---- other invalid input */
    {
        cc_agent_def raw;
        memset(&raw, 0, sizeof raw);
        expect("agent def not from cc_default_agent_def", cc_world_add_agents(w, &raw, 1, NULL), CC_ERR_INVALID);
    }
    {
        cc_world_def raw;
        memset(&raw, 0, sizeof raw);
        expect("world def not from cc_default_world_def", cc_world_create(&raw, &w2), CC_ERR_INVALID);
    }
    expect("duplicate target name", cc_world_add_target_circle(w, "goal", 1, 1, 1, NULL), CC_ERR_INVALID);
    {
        double one[] = {1, 1};
        expect("wall with one point", cc_world_add_wall(w, one, 1, 0), CC_ERR_INVALID);
    }
    expect("bad scenario text", cc_world_create_from_scenario_text("name = 3\n[[spawns]]\ncount = -1\n", &w2),
           CC_ERR_SCENARIO);
    expect("missing scenario file", cc_world_create_from_scenario_file("/nonexistent/x.toml", &w2), CC_ERR_IO);
    memset(junk, 0xAB, sizeof junk);
    expect("garbage snapshot", cc_world_load_snapshot(w, junk, (int64_t)sizeof junk), CC_ERR_SNAPSHOT);
    expect("empty snapshot", cc_world_load_snapshot(w, junk, 0), CC_ERR_SNAPSHOT);
    expect("missing snapshot file", cc_world_load_file(w, "/nonexistent/x.snap"), CC_ERR_IO);
    expect("unwritable snapshot file", cc_world_save_file(w, "/nonexistent/dir/x.snap"), CC_ERR_IO);
    expect("set_params handle 0", cc_world_set_params(0, "search_width = 1"), CC_ERR_HANDLE);
    expect("set_params NULL text", cc_world_set_params(w, NULL), CC_ERR_NULL);
    expect("set_params not TOML", cc_world_set_params(w, "search_width = "), CC_ERR_INVALID);
    expect("set_params nothing", cc_world_set_params(w, ""), CC_ERR_INVALID);
    expect("set_params unknown key", cc_world_set_params(w, "search_width = 1\nspeeed = 2"), CC_ERR_INVALID);
    expect("set_params out of range", cc_world_set_params(w, "search_width = 1\nqueue_gap = -1.0"), CC_ERR_INVALID);
    expect("set_params NaN", cc_world_set_params(w, "search_width = 1\nweights = { avoidance = nan }"),
           CC_ERR_NOT_FINITE);
    expect("set_params inf", cc_world_set_params(w, "[params]\nqueue_gap = inf"), CC_ERR_NOT_FINITE);

    /* ---- every error above left the world unchanged */
    hash_of(w, after);
    truth("world unchanged by all the refused calls", strcmp(before, after) == 0);

    /* ---- parameters change at run time (all or nothing): the next step uses them */
    {
        cc_step_stats st;
        expect("set_params", cc_world_set_params(w, "search_width = 1\nneighbours = 6\nweights = { avoidance = 4.0 }"),
               CC_OK);
        expect("step after set_params", cc_world_step(w, 0.1), CC_OK);
        expect("stats after set_params", cc_world_get_step_stats(w, &st), CC_OK);
        truth("the step used the new search width and neighbour count", st.search_width == 1 && st.neighbours == 6);
        {   /* the step's own clock (the CPU's counter where the kernel trusts it) reads in seconds */
            struct timespec a, b;
            double wall;
            clock_gettime(CLOCK_MONOTONIC, &a);
            expect("timed step", cc_world_step(w, 0.1), CC_OK);
            clock_gettime(CLOCK_MONOTONIC, &b);
            wall = (double)(b.tv_sec - a.tv_sec) + 1e-9 * (double)(b.tv_nsec - a.tv_nsec);
            expect("stats after the timed step", cc_world_get_step_stats(w, &st), CC_OK);
            truth("step_seconds is within the call's wall time, and most of it",
                  st.step_seconds > 0.5 * wall && st.step_seconds <= wall * 1.001 + 1e-6);
        }
        expect("set_params as a [params] table", cc_world_set_params(w, "[params]\nsearch_width = 3\nneighbours = 10"),
               CC_OK);
        expect("step after restoring", cc_world_step(w, 0.1), CC_OK);
        hash_of(w, before);     /* the snapshot checks below start from here */
    }

    /* ---- a truncated snapshot is refused and changes nothing; a good one round-trips */
    {
        int64_t size = 0;
        unsigned char *buf;
        char later[33], restored[33];
        cc_world_save_snapshot(w, NULL, 0, &size);
        buf = malloc((size_t)size);
        expect("save snapshot", cc_world_save_snapshot(w, buf, size, &size), CC_OK);
        expect("step after snapshot", cc_world_step(w, 0.1), CC_OK);
        hash_of(w, later);
        expect("truncated snapshot", cc_world_load_snapshot(w, buf, size - 5), CC_ERR_SNAPSHOT);
        hash_of(w, after);
        truth("truncated snapshot left the world unchanged", strcmp(later, after) == 0);
        buf[size / 2] ^= 0x5A;
        expect("corrupted snapshot", cc_world_load_snapshot(w, buf, size), CC_ERR_SNAPSHOT);
        buf[size / 2] ^= 0x5A;
        expect("load snapshot", cc_world_load_snapshot(w, buf, size), CC_OK);
        hash_of(w, restored);
        truth("snapshot restores the state", strcmp(restored, before) == 0);
        free(buf);
    }

    /* ---- a snapshot taken after a step holds that step (the C-side step must invalidate the
     * adapter's cached image from a size query made before it) */
    {
        int64_t size = 0;
        unsigned char *buf;
        cc_world copy = 0;
        char now[33], copied[33];
        cc_world_save_snapshot(w, NULL, 0, &size);          /* caches an image of the current state */
        expect("step between size query and copy", cc_world_step(w, 0.1), CC_OK);
        cc_world_save_snapshot(w, NULL, 0, &size);
        buf = malloc((size_t)size);
        expect("save after step", cc_world_save_snapshot(w, buf, size, &size), CC_OK);
        expect("world from that snapshot", cc_world_create_from_snapshot(buf, size, &copy), CC_OK);
        hash_of(w, now);
        hash_of(copy, copied);
        truth("snapshot after a step holds the stepped state", strcmp(now, copied) == 0);
        cc_world_destroy(copy);
        free(buf);
    }

    /* ---- last-error text API */
    {
        char small[6];
        int32_t len = 0;
        cc_world_step(0, 0.1);
        truth("last_error size query", cc_last_error(NULL, 0, &len) == CC_OK && len > 5);
        checks++;
        if (cc_last_error(small, 6, &len) != CC_ERR_CAPACITY || strlen(small) != 5) {
            failures++;
            printf("FAIL last_error truncates into a small buffer\n");
        } else {
            printf("ok   last_error truncates into a small buffer\n");
        }
    }
    {
        const char *a, *b;
        int distinct = 1, s, t;
        for (s = 0; s <= CC_ERR_INTERNAL; s++)
            for (t = s + 1; t <= CC_ERR_INTERNAL; t++) {
                cc_status_name(s, &a);
                cc_status_name(t, &b);
                distinct &= strcmp(a, b) != 0;
            }
        truth("status names distinct", distinct);
    }

    expect("destroy", cc_world_destroy(w), CC_OK);
    printf("%d checks, %d failures\n", checks, failures);
    return failures;
}
