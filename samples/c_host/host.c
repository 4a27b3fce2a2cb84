/* A plain C99 host for crowdcore: load a scene, step it, print a summary, write positions as CSV.
 *
 *   make                      # builds ./host against the library (see README.md)
 *   ./host [scene.toml] [frames] [out.csv]      defaults: ../scenes/hall.toml 600 positions.csv
 */
#define _POSIX_C_SOURCE 199309L
#include <stdio.h>
#include <stdlib.h>
#include <time.h>
#include "crowdcore.h"

static double now(void)
{
    struct timespec t;
    clock_gettime(CLOCK_MONOTONIC, &t);
    return (double)t.tv_sec + 1e-9 * (double)t.tv_nsec;
}

/* Print the status and the library's explanation, then give up. */
static int fail(const char *what, int32_t status)
{
    char text[4096];
    const char *name = "?";
    cc_status_name(status, &name);
    cc_last_error(text, (int32_t)sizeof text, NULL);
    fprintf(stderr, "%s failed: %s\n%s\n", what, name, text);
    return 1;
}

int main(int argc, char **argv)
{
    const char *scene = argc > 1 ? argv[1] : "../scenes/hall.toml";
    long frames = argc > 2 ? strtol(argv[2], NULL, 10) : 600;
    const char *csv = argc > 3 ? argv[3] : "positions.csv";
    const double dt = 0.1;
    double t_start = now(), t_first = 0.0, t_steps = 0.0;
    int32_t major, minor, patch, status, n = 0, start_agents;
    cc_world world = 0;
    cc_world_info info;
    double *xy = NULL;
    int32_t *ids = NULL;
    char hash[33];
    long f;
    FILE *out;

    cc_version(&major, &minor, &patch);
    if ((status = cc_world_create_from_scenario_file(scene, &world)) != CC_OK)
        return fail("cc_world_create_from_scenario_file", status);
    if ((status = cc_world_get_info(world, &info)) != CC_OK)
        return fail("cc_world_get_info", status);
    start_agents = info.agent_count;
    for (f = 0; f < frames; f++) {
        double t0 = now();
        if ((status = cc_world_step(world, dt)) != CC_OK)
            return fail("cc_world_step", status);
        if (f == 0)
            t_first = now() - t_start;
        else
            t_steps += now() - t0;
    }
    cc_world_get_info(world, &info);

    /* Ask for the size, then copy positions and ids into our own buffers. */
    if ((status = cc_world_get_positions(world, NULL, 0, &n)) != CC_OK)
        return fail("cc_world_get_positions", status);
    xy = malloc(sizeof(double) * 2 * (size_t)(n ? n : 1));
    ids = malloc(sizeof(int32_t) * (size_t)(n ? n : 1));
    if (!xy || !ids)
        return fprintf(stderr, "out of memory\n"), 1;
    if ((status = cc_world_get_positions(world, xy, n, &n)) != CC_OK)
        return fail("cc_world_get_positions", status);
    if ((status = cc_world_get_ids(world, ids, n, &n)) != CC_OK)
        return fail("cc_world_get_ids", status);
    if ((status = cc_world_state_hash(world, hash, (int32_t)sizeof hash)) != CC_OK)
        return fail("cc_world_state_hash", status);

    out = fopen(csv, "w");
    if (!out)
        return fprintf(stderr, "cannot write %s\n", csv), 1;
    fprintf(out, "id,x,y\n");
    for (f = 0; f < n; f++)     /* %.17g round-trips every double exactly */
        fprintf(out, "%d,%.17g,%.17g\n", ids[f], xy[2 * f], xy[2 * f + 1]);
    fclose(out);

    printf("crowdcore C ABI %d.%d.%d\n", major, minor, patch);
    printf("scene            %s\n", scene);
    printf("frames           %lld (dt %.3f s, simulated %.1f s)\n", (long long)info.frame, dt, info.time);
    printf("agents           %d at start, %d left, %lld arrived\n", start_agents, info.agent_count,
           (long long)info.arrived_total);
    printf("start to frame 1 %.3f s\n", t_first);
    printf("ms per frame     %.3f\n", frames > 1 ? 1e3 * t_steps / (double)(frames - 1) : 0.0);
    printf("state hash       %s\n", hash);
    printf("positions        %s\n", csv);

    free(xy);
    free(ids);
    cc_world_destroy(world);
    return 0;
}
