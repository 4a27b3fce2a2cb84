/* The floor of the C ABI benchmark: a plain C "step" in its own shared library, with no Python in it.
 * It checks a handle against a table and takes a busy flag, as cc_world_step does, then streams a
 * buffer as large as a big world's working set, which evicts caches and TLBs as a large step does,
 * and times that inner work with the same clock. Its call time minus that inner time is what any C
 * library pays to return to a host after such a step: cold lines and page walks on the way back
 * (the host's code among them). cabi_bench.c compares cc_world_step's overhead with it, step by step. */
#define _POSIX_C_SOURCE 199309L
#include <stdint.h>
#include <stdlib.h>
#include <time.h>
#if defined(__x86_64__)
#include <x86intrin.h>
#endif

typedef struct floor_slot {
    uint32_t gen;
    int32_t busy;
    uint64_t version;
    uint64_t step_ticks;
} floor_slot;

static floor_slot *floor_table;                  /* 1024 slots, like one chunk of the world table */

static uint64_t floor_ticks(int use_tsc)
{
    struct timespec t;
#if defined(__x86_64__)
    if (use_tsc)
        return __rdtsc();
#endif
    clock_gettime(CLOCK_MONOTONIC, &t);
    return (uint64_t)t.tv_sec * 1000000000u + (uint64_t)t.tv_nsec;
}

uint64_t floor_open(void)                        /* a handle: index 7, generation 1; 0 on failure */
{
    if (floor_table == NULL && (floor_table = calloc(1024, sizeof *floor_table)) == NULL)
        return 0;
    floor_table[7].gen = 1;
    return (1ull << 32) | 7u;
}

/* Stream n doubles (read and write every 64-byte line); 0 on success, -1 for a bad handle or busy. */
int32_t floor_step(uint64_t handle, double *buf, int64_t n, int32_t use_tsc)
{
    uint32_t idx = (uint32_t)handle, gen = (uint32_t)(handle >> 32);
    floor_slot *s;
    int32_t free_ = 0;
    uint64_t t0;
    int64_t i;
    if (floor_table == NULL || idx >= 1024 || gen == 0 || floor_table[idx].gen != gen)
        return -1;
    s = &floor_table[idx];
    if (!__atomic_compare_exchange_n(&s->busy, &free_, 1, 0, __ATOMIC_ACQUIRE, __ATOMIC_RELAXED))
        return -1;
    s->version++;
    t0 = floor_ticks(use_tsc);
    for (i = 0; i < n; i += 8)
        buf[i] += 1.0;
    s->step_ticks = floor_ticks(use_tsc) - t0;
    __atomic_store_n(&s->busy, 0, __ATOMIC_RELEASE);
    return 0;
}

uint64_t floor_step_ticks(uint64_t handle)
{
    return floor_table ? floor_table[(uint32_t)handle & 1023u].step_ticks : 0;
}
