/* Baseline for tools/bench_rtp.py: how late does a plain C SCHED_FIFO thread wake from
 * clock_nanosleep(CLOCK_MONOTONIC, TIMER_ABSTIME) at 1 ms deadlines on this machine?
 * No audio, no Python, no socket: whatever lateness it shows is the machine's (scheduler,
 * kernel preemption model, hypervisor), and it bounds what any sender can do here.
 * Prints one JSON object.  Usage: rt_wake_baseline PACKETS [PRIORITY] */
#include <sched.h>
#include <stdio.h>
#include <stdlib.h>
#include <sys/prctl.h>
#include <time.h>

static int cmp_long(const void *a, const void *b) {
    long x = *(const long *)a, y = *(const long *)b;
    return x < y ? -1 : x > y;
}

int main(int argc, char **argv) {
    int n = argc > 1 ? atoi(argv[1]) : 20000;
    int priority = argc > 2 ? atoi(argv[2]) : 70;
    struct sched_param param = {.sched_priority = priority};
    int realtime = priority > 0 && sched_setscheduler(0, SCHED_FIFO, &param) == 0;
    prctl(PR_SET_TIMERSLACK, 1, 0, 0, 0);
    long *late_ns = malloc((size_t)n * sizeof(long));
    struct timespec ts, now;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    long base = ts.tv_sec * 1000000000L + ts.tv_nsec + 10000000L;
    for (int k = 0; k < n; k++) {
        long deadline = base + (long)k * 1000000L;
        ts.tv_sec = deadline / 1000000000L;
        ts.tv_nsec = deadline % 1000000000L;
        clock_nanosleep(CLOCK_MONOTONIC, TIMER_ABSTIME, &ts, NULL);
        clock_gettime(CLOCK_MONOTONIC, &now);
        late_ns[k] = now.tv_sec * 1000000000L + now.tv_nsec - deadline;
    }
    qsort(late_ns, (size_t)n, sizeof(long), cmp_long);
    long late = 0;
    for (int k = 0; k < n; k++)
        if (late_ns[k] > 1000000L) late++;
    printf("{\"realtime\": %s, \"wakeups\": %d, \"p50_ms\": %.4f, \"p99_ms\": %.4f, \"p999_ms\": %.4f, "
           "\"max_ms\": %.4f, \"later_than_1ms\": %ld}\n",
           realtime ? "true" : "false", n, late_ns[n / 2] / 1e6, late_ns[(long)n * 99 / 100] / 1e6,
           late_ns[(long)n * 999 / 1000] / 1e6, late_ns[n - 1] / 1e6, late);
    free(late_ns);
    return 0;
}
