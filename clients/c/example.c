/*
 * example: post samples of a 4-phase rail to phaseward.
 *
 *   example BASE_URL RAIL_ID [FIRST_SEQ]
 *
 * Posts one sample alone (seq FIRST_SEQ), then a batch of four (FIRST_SEQ+1 .. FIRST_SEQ+4)
 * in which phase 3 runs warmer; prints each JSON body sent and each answer. Exits 0 when both
 * posts were answered 200, 1 otherwise.
 */
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

#include "phaseward.h"

#define N_PHASES 4
#define N_BATCH 4

static void fill(pw_sample *s, pw_phase phases[N_PHASES], double t, long long seq, double load_a,
                 double hot_c) {
    int i;
    for (i = 0; i < N_PHASES; i++) {
        phases[i].index = i;
        phases[i].current_a = load_a / N_PHASES;
        phases[i].has_temp = 1;
        phases[i].temp_c = 55.0 + 0.25 * i + (i == 3 ? hot_c : 0.0);
        phases[i].flags = 0;
    }
    s->time_s = t;
    s->seq = (int64_t)seq;
    s->vin_v = 12.0;
    s->vout_v = 1.0;
    s->phases = phases;
    s->n_phases = N_PHASES;
}

static int report(const char *what, int rc, pw_client *client, pw_response *answer) {
    if (rc != PW_OK) {
        fprintf(stderr, "%s: %s (%s)\n", what, pw_strerror(rc), pw_client_error(client));
        return 0;
    }
    printf("%s: HTTP %ld %s\n", what, answer->status, answer->body);
    return answer->status == 200;
}

int main(int argc, char **argv) {
    pw_phase one_phases[N_PHASES];
    pw_phase batch_phases[N_BATCH][N_PHASES];
    pw_sample one, batch[N_BATCH];
    pw_response answer;
    pw_client *client;
    long long first_seq = 0;
    double now = (double)time(NULL);
    char json[2048];
    int ok = 1, rc, k;

    if (argc < 3 || argc > 4) {
        fprintf(stderr, "usage: %s BASE_URL RAIL_ID [FIRST_SEQ]\n", argv[0]);
        return 2;
    }
    if (argc == 4) {
        first_seq = strtoll(argv[3], NULL, 10);
    }
    if (pw_global_init() != PW_OK) {
        fprintf(stderr, "libcurl did not initialise\n");
        return 1;
    }
    client = pw_client_new(argv[1], 10000);
    if (client == NULL || pw_client_set_key(client, getenv("PHASEWARD_KEY")) != PW_OK) {
        fprintf(stderr, "out of memory, or PHASEWARD_KEY is not a key\n");
        pw_client_free(client);
        pw_global_cleanup();
        return 1;
    }

    fill(&one, one_phases, now, first_seq, 60.0, 0.0);
    if (pw_format_sample(json, sizeof json, &one) >= 0) {
        printf("sending %s\n", json);
    }
    rc = pw_post_sample(client, argv[2], &one, &answer);
    ok = report("one sample", rc, client, &answer) && ok;
    pw_response_free(&answer);

    for (k = 0; k < N_BATCH; k++) {
        fill(&batch[k], batch_phases[k], now + 0.1 * (k + 1), first_seq + 1 + k, 60.0 + k,
             1.5 * k);
    }
    if (pw_format_samples(json, sizeof json, batch, N_BATCH) >= 0) {
        printf("sending %s\n", json);
    }
    rc = pw_post_samples(client, argv[2], batch, N_BATCH, &answer);
    ok = report("batch of 4", rc, client, &answer) && ok;
    pw_response_free(&answer);

    pw_client_free(client);
    pw_global_cleanup();
    return ok ? 0 : 1;
}
