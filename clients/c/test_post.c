/*
 * test_post BASE_URL RAIL_ID DEAD_URL: posting against a running phaseward (run_test.sh
 * starts one). RAIL_ID must be a defined 4-phase rail; DEAD_URL a loopback URL nobody serves.
 */
#include <math.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "phaseward.h"

static int failures = 0;
static int checks = 0;

#define CHECK(cond)                                                                        \
    do {                                                                                   \
        checks++;                                                                          \
        if (!(cond)) {                                                                     \
            failures++;                                                                    \
            fprintf(stderr, "%s:%d: check failed: %s\n", __FILE__, __LINE__, #cond);     \
        }                                                                                  \
    } while (0)

static pw_phase phases[3][4];
static pw_sample batch[3];

static void build(double t0) {
    int k, i;
    for (k = 0; k < 3; k++) {
        for (i = 0; i < 4; i++) {
            phases[k][i].index = i;
            phases[k][i].current_a = 12.5;
            phases[k][i].has_temp = 1;
            phases[k][i].temp_c = 48.0 + k;
            phases[k][i].flags = 0;
        }
        batch[k].time_s = t0 + 0.5 * k;
        batch[k].seq = 100 + k;
        batch[k].vin_v = 12.0;
        batch[k].vout_v = 1.0;
        batch[k].phases = phases[k];
        batch[k].n_phases = 4;
    }
}

int main(int argc, char **argv) {
    pw_client *client, *dead;
    pw_response r;
    pw_sample bad;
    pw_phase bad_phases[4];
    int rc;

    if (argc != 4) {
        fprintf(stderr, "usage: %s BASE_URL RAIL_ID DEAD_URL\n", argv[0]);
        return 2;
    }
    CHECK(pw_global_init() == PW_OK);
    client = pw_client_new(argv[1], 10000);
    dead = pw_client_new(argv[3], 5000);
    CHECK(client != NULL && dead != NULL);
    if (client == NULL || dead == NULL) {
        return 1;
    }
    build((double)time(NULL) - 60.0); /* the service refuses samples dated ahead of its clock */

    /* An access key goes out as a bearer header; one that would break the header is refused,
     * and the open-mode service ignores a well-formed key it is sent. */
    CHECK(pw_client_set_key(client, "pwk bad") == PW_E_INVALID);
    CHECK(pw_client_set_key(client, "pwk_line\r\nX-Evil: 1") == PW_E_INVALID);
    CHECK(pw_client_set_key(client, "pwk_test-key") == PW_OK);

    /* A batch is stored; the same batch again is absorbed as duplicates. */
    rc = pw_post_samples(client, argv[2], batch, 3, &r);
    CHECK(rc == PW_OK);
    CHECK(r.status == 200);
    CHECK(r.body != NULL && strstr(r.body, "\"stored\":3") != NULL);
    CHECK(r.body != NULL && strlen(r.body) == r.body_len);
    printf("batch: %ld %s\n", r.status, r.body ? r.body : "");
    pw_response_free(&r);
    rc = pw_post_samples(client, argv[2], batch, 3, &r);
    CHECK(rc == PW_OK && r.status == 200);
    CHECK(r.body != NULL && strstr(r.body, "\"duplicates\":3") != NULL);
    pw_response_free(&r);

    /* The service's refusals come back as status and JSON error body. */
    rc = pw_post_sample(client, "no-such-rail", &batch[0], &r);
    CHECK(rc == PW_OK && r.status == 404);
    CHECK(r.body != NULL && strstr(r.body, "\"error\":\"not_found\"") != NULL);
    pw_response_free(&r);

    bad = batch[0];
    memcpy(bad_phases, phases[0], sizeof bad_phases);
    bad_phases[2].temp_c = -500.0; /* below absolute zero */
    bad.phases = bad_phases;
    bad.seq = 200;
    rc = pw_post_sample(client, argv[2], &bad, &r);
    CHECK(rc == PW_OK && r.status == 422);
    CHECK(r.body != NULL && strstr(r.body, "\"field\":\"[0].phases[2].temp_c\"") != NULL);
    printf("refused: %ld %s\n", r.status, r.body ? r.body : "");
    pw_response_free(&r);

    /* Refused before any request: a bad rail id, a non-finite number. */
    CHECK(pw_post_sample(client, "Bad/Id", &batch[0], &r) == PW_E_RAIL_ID);
    CHECK(r.body == NULL);
    bad_phases[2].temp_c = INFINITY;
    CHECK(pw_post_sample(client, argv[2], &bad, &r) == PW_E_NONFINITE);

    /* Nothing listening: a transport error with libcurl's text. */
    rc = pw_post_sample(dead, argv[2], &batch[0], &r);
    CHECK(rc == PW_E_CURL);
    CHECK(strlen(pw_client_error(dead)) > 0);
    printf("dead: %s (%s)\n", pw_strerror(rc), pw_client_error(dead));

    pw_client_free(client);
    pw_client_free(dead);
    pw_global_cleanup();
    printf("%d passed, %d failed\n", checks - failures, failures);
    return failures ? 1 : 0;
}
