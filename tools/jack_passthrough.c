/* A minimal native JACK pass-through client: the floor rtstage is measured against.
 *
 * Copies two input ports to two output ports every cycle and watches the server's
 * frame counter the way rtstage's callback does (rtstage/live/timing.py): with
 * jack_last_frame_time, the exact frame count at the start of the cycle a call runs in,
 * k = (frames the server advanced - frames this client processed) / period is constant
 * while every cycle calls the client once.  A call that ran in the next cycle raises k
 * and the call after it (same cycle) brings it back: a LATE cycle.  A change that holds
 * is a JUMP: cycles the server counted and nobody ran.  A shift followed at once by a further
 * shift counts as a jump too (it did not come back), so back-to-back stalls are each recorded.
 *
 * Build: gcc -O2 -o jack_passthrough tools/jack_passthrough.c -ljack
 * Run:   jack_passthrough NAME    (JACK_DEFAULT_SERVER picks the server)
 * Every line on stdin ("report") prints one JSON line of cumulative counts on stdout;
 * end of input closes the client and exits.
 */
#include <jack/jack.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>

#define MAX_EVENTS 4096

static jack_client_t *client;
static jack_port_t *in_port[2], *out_port[2];
static volatile int64_t calls, late, jumps, xruns;
static volatile uint32_t late_at[MAX_EVENTS], jump_at[MAX_EVENTS];
static int64_t delivered, net, cand, pend;
static uint32_t first_cycle, cand_at;

static int process(jack_nframes_t nframes, void *arg)
{
    (void)arg;
    uint32_t cycle = jack_last_frame_time(client);
    jack_nframes_t period = jack_get_buffer_size(client);
    for (int c = 0; c < 2; c++) {
        const float *in = jack_port_get_buffer(in_port[c], nframes);
        float *out = jack_port_get_buffer(out_port[c], nframes);
        memcpy(out, in, sizeof(float) * nframes);
    }
    if (calls == 0)
        first_cycle = cycle;
    int64_t d = (int64_t)(uint32_t)(cycle - first_cycle) - delivered;
    int64_t k = d >= 0 ? d / period : -((-d + period - 1) / period);
    if (k == net) {
        if (pend) {
            if (late < MAX_EVENTS)
                late_at[late] = cand_at;
            late++;
            pend = 0;
        }
    } else if (!pend || cand != k) {
        if (pend) {
            /* A second shift before the first was confirmed: the first held (it did not come back), so
             * it was a jump of its own; without this, two stalls in consecutive cycles record only the second. */
            if (jumps < MAX_EVENTS)
                jump_at[jumps] = cand_at;
            jumps++;
            net = cand;
        }
        cand = k;
        cand_at = cycle;
        pend = 1;
    } else {
        if (jumps < MAX_EVENTS)
            jump_at[jumps] = cand_at;
        jumps++;
        net = k;
        pend = 0;
    }
    delivered += nframes;
    calls++;
    return 0;
}

static int on_xrun(void *arg)
{
    (void)arg;
    xruns++;
    return 0;
}

static void report(void)
{
    printf("{\"calls\": %lld, \"late\": %lld, \"jumps\": %lld, \"xruns\": %lld, \"late_at\": [",
           (long long)calls, (long long)late, (long long)jumps, (long long)xruns);
    for (int64_t i = 0; i < late && i < MAX_EVENTS; i++)
        printf("%s%u", i ? ", " : "", late_at[i]);
    printf("], \"jump_at\": [");
    for (int64_t i = 0; i < jumps && i < MAX_EVENTS; i++)
        printf("%s%u", i ? ", " : "", jump_at[i]);
    printf("]}\n");
    fflush(stdout);
}

int main(int argc, char **argv)
{
    const char *name = argc > 1 ? argv[1] : "native-floor";
    jack_status_t status;
    client = jack_client_open(name, JackNoStartServer, &status);
    if (!client) {
        fprintf(stderr, "jack_passthrough: cannot open a client (status 0x%x)\n", (unsigned)status);
        return 2;
    }
    char port_name[16];
    for (int c = 0; c < 2; c++) {
        snprintf(port_name, sizeof port_name, "in_%d", c + 1);
        in_port[c] = jack_port_register(client, port_name, JACK_DEFAULT_AUDIO_TYPE, JackPortIsInput, 0);
        snprintf(port_name, sizeof port_name, "out_%d", c + 1);
        out_port[c] = jack_port_register(client, port_name, JACK_DEFAULT_AUDIO_TYPE, JackPortIsOutput, 0);
    }
    jack_set_process_callback(client, process, NULL);
    jack_set_xrun_callback(client, on_xrun, NULL);
    if (jack_activate(client)) {
        fprintf(stderr, "jack_passthrough: cannot activate\n");
        return 2;
    }
    char full[64];
    for (int c = 0; c < 2; c++) {
        snprintf(full, sizeof full, "system:capture_%d", c + 1);
        jack_connect(client, full, jack_port_name(in_port[c]));
        snprintf(full, sizeof full, "system:playback_%d", c + 1);
        jack_connect(client, jack_port_name(out_port[c]), full);
    }
    printf("{\"ready\": true, \"realtime\": %d}\n", jack_is_realtime(client));
    fflush(stdout);
    char line[256];
    while (fgets(line, sizeof line, stdin))
        report();
    jack_deactivate(client);
    jack_client_close(client);
    return 0;
}
