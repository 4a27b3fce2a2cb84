/* Recording from C, then replaying the file from C: every frame must match bit for bit. */
#include <stdio.h>
#include <string.h>
#include "crowdcore.h"

static int failures = 0;
#define CHECK(cond, what) do { if (!(cond)) { char e[512]; int32_t n; cc_last_error(e, sizeof e, &n); \
    printf("FAIL %s (last error: %s)\n", what, e); failures++; } } while (0)

int main(int argc, char **argv)
{
    if (argc < 3) { printf("usage: test_recording scene.toml out.rec\n"); return 2; }
    cc_world w = 0;
    cc_replay_result r;
    CHECK(cc_world_create_from_scenario_file(argv[1], &w) == CC_OK, "create");
    CHECK(cc_world_record_stop(w) == CC_ERR_INVALID, "stop without a recording is refused");
    CHECK(cc_world_record_start(w, argv[2]) == CC_OK, "record start");
    CHECK(cc_world_record_start(w, argv[2]) == CC_ERR_INVALID, "a second recording is refused");
    for (int f = 0; f < 30; f++) CHECK(cc_world_step(w, 0.1) == CC_OK, "step");
    CHECK(cc_world_set_agent_target(w, 1, 0) == CC_OK, "a command between steps is recorded");
    for (int f = 0; f < 20; f++) CHECK(cc_world_step(w, 0.1) == CC_OK, "step");
    CHECK(cc_world_load_file(w, argv[2]) == CC_ERR_INVALID, "loading while recording is refused");
    CHECK(cc_world_record_stop(w) == CC_OK, "record stop");
    memset(&r, 0, sizeof r);
    CHECK(cc_replay_file(argv[2], &r) == CC_OK, "replay");
    CHECK(r.identical == 1 && r.frames_checked == 50 && r.diverged_frame == -1, "replay identical over 50 frames");
    CHECK(cc_replay_file(argv[2], NULL) == CC_ERR_NULL, "NULL result is refused");
    CHECK(cc_replay_file("/nonexistent/x.rec", &r) == CC_ERR_IO, "missing file is an I/O error");
    CHECK(cc_world_destroy(w) == CC_OK, "destroy");
    printf("frames_checked %lld identical %d\n", (long long)r.frames_checked, r.identical);
    printf("%s\n", failures ? "FAILED" : "ALL OK");
    return failures != 0;
}
