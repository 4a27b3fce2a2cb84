/* C-side check of the threading contract: a world is used by one thread at a time (a second thread
 * gets CC_ERR_BUSY and changes nothing), and different worlds step on different threads at once,
 * with the same results as stepping them alone. Prints one line per check; exit status = failures. */
#define _POSIX_C_SOURCE 199309L
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include "crowdcore.h"

static int failures = 0;
static int busy_world_steps = 3;
static int started = 0, done = 0;
static int32_t thread_status = CC_OK;

static void truth(const char *what, int cond)
{
    if (!cond)
        failures++;
    printf("%s %s\n", cond ? "ok  " : "FAIL", what);
}

static int make_world(int n, cc_world *out)     /* n agents on a 1.2 m grid walking east */
{
    cc_world_def wd;
    cc_agent_def *defs = malloc(sizeof *defs * (size_t)n);
    int side = 1, i, bad;
    double extent;
    while (side * side < n)
        side++;
    extent = side * 1.2 + 4.0;
    bad = cc_default_world_def(&wd) || (wd.seed = 5, wd.nav_cell = 1.0, cc_world_create(&wd, out))
          || cc_world_set_bounds(*out, -2, -2, extent, extent)
          || cc_world_add_target_rect(*out, "east", extent - 1.5, -2, extent, extent, NULL);
    for (i = 0; i < n && !bad; i++) {
        bad = cc_default_agent_def(&defs[i]);
        defs[i].x = (i % side) * 1.2;
        defs[i].y = (i / side) * 1.2;
    }
    bad = bad || cc_world_add_agents(*out, defs, n, NULL);
    free(defs);
    return bad;
}

static void *step_big(void *arg)
{
    cc_world w = *(cc_world *)arg;
    int i = 0;
    __atomic_store_n(&started, 1, __ATOMIC_RELEASE);
    while (i < busy_world_steps && (thread_status == CC_OK || thread_status == CC_ERR_BUSY)) {
        thread_status = cc_world_step(w, 0.1);    /* BUSY when the other thread got in first: retry */
        i += thread_status == CC_OK;
    }
    __atomic_store_n(&done, 1, __ATOMIC_RELEASE);
    return NULL;
}

static void *step_once(void *arg)     /* a thread whose only call is a step */
{
    __atomic_store_n(&thread_status, cc_world_step(*(cc_world *)arg, 0.1), __ATOMIC_RELEASE);
    return NULL;
}

int main(void)
{
    cc_world big, small, small_alone;
    cc_world_info info;
    pthread_t t;
    long busy = 0, other = 0, small_steps = 0, big_extra = 0, polls = 0;
    char h1[33], h2[33], text[256];
    int32_t s, i;

    if (cc_init() || make_world(20000, &big) || make_world(400, &small) || make_world(400, &small_alone)) {
        cc_last_error(text, sizeof text, NULL);
        printf("FAIL setup: %s\n", text);
        return 1;
    }
    cc_world_step(big, 0.1);          /* compile and build indexes before the race */
    cc_world_step(small, 0.1);
    cc_world_step(small_alone, 0.1);
    pthread_create(&t, NULL, step_big, &big);
    while (!__atomic_load_n(&started, __ATOMIC_ACQUIRE))
        ;
    {
        struct timespec pause = {0, 5000000};   /* a big step takes tens of ms: let the thread take it */
        nanosleep(&pause, NULL);
    }
    while (!__atomic_load_n(&done, __ATOMIC_ACQUIRE)) {
        s = (polls++ % 2) ? cc_world_get_info(big, &info) : cc_world_step(big, 0.1);
        if (s == CC_ERR_BUSY) {
            busy++;
            cc_last_error(text, sizeof text, NULL);
            if (!strstr(text, "in use by another thread"))
                other++;
        } else if (s == CC_OK) {
            big_extra += polls % 2 == 1;     /* a step of ours that got in between the thread's */
        } else {
            other++;
        }
        if (cc_world_step(small, 0.1) == CC_OK)   /* another world, meanwhile, on this thread */
            small_steps++;
    }
    pthread_join(t, NULL);
    truth("the stepping thread's steps all succeeded", thread_status == CC_OK);
    truth("a second thread got CC_ERR_BUSY while the world stepped", busy > 0);
    truth("no other status than CC_OK or CC_ERR_BUSY, and BUSY came with its text", other == 0);
    cc_world_get_info(big, &info);
    truth("the busy world made exactly the steps that were accepted",
          info.frame == 1 + busy_world_steps + big_extra);
    for (i = 0; i < small_steps; i++)
        cc_world_step(small_alone, 0.1);
    cc_world_state_hash(small, h1, 33);
    cc_world_state_hash(small_alone, h2, 33);
    truth("a world stepped beside a busy one equals the same world stepped alone",
          small_steps > 0 && strcmp(h1, h2) == 0);
    printf("busy answers %ld, polls %ld, small steps %ld\n", busy, polls, small_steps);

    /* Threads new to Python whose first and only call is a step: each gets a thread state on entry
     * and gives it back when it exits, and the steps are the same as on one thread. */
    for (i = 0; i < 100 && thread_status == CC_OK; i++) {
        pthread_create(&t, NULL, step_once, &small);
        pthread_join(t, NULL);
        cc_world_step(small_alone, 0.1);
    }
    cc_world_state_hash(small, h1, 33);
    cc_world_state_hash(small_alone, h2, 33);
    truth("100 short-lived threads each stepped once, as one thread would", thread_status == CC_OK && i == 100
          && strcmp(h1, h2) == 0);
    cc_world_destroy(big);
    cc_world_destroy(small);
    cc_world_destroy(small_alone);
    printf("threads: %d failures\n", failures);
    return failures;
}
