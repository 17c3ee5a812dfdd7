/*
 * export_settings: fetch the protection settings of one rehearsal row as a C header.
 *
 *   export_settings BASE_URL REHEARSAL_ID ROW OUT.h
 *
 * Writes the header the service exports (one macro per setting, the rail, trace, date and
 * the rehearsal's figures in its comment) to OUT.h, ready to #include in firmware. Exits 0
 * when it was written, 1 on a failure, 2 on a usage error. The key comes from PHASEWARD_KEY.
 */
#include <stdio.h>
#include <stdlib.h>

#include "phaseward.h"

int main(int argc, char **argv) {
    pw_client *client;
    pw_response answer;
    FILE *out;
    int rc, ok = 0;

    if (argc != 5) {
        fprintf(stderr, "usage: %s BASE_URL REHEARSAL_ID ROW OUT.h\n", argv[0]);
        return 2;
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
    rc = pw_get_settings(client, strtol(argv[2], NULL, 10), strtol(argv[3], NULL, 10), 1,
                         &answer);
    if (rc != PW_OK) {
        fprintf(stderr, "export: %s (%s)\n", pw_strerror(rc), pw_client_error(client));
    } else if (answer.status != 200) {
        fprintf(stderr, "export: HTTP %ld %s\n", answer.status, answer.body);
        pw_response_free(&answer);
    } else {
        out = fopen(argv[4], "w");
        if (out != NULL && fwrite(answer.body, 1, answer.body_len, out) == answer.body_len) {
            ok = 1;
            printf("wrote %s (%lu bytes)\n", argv[4], (unsigned long)answer.body_len);
        } else {
            fprintf(stderr, "export: cannot write %s\n", argv[4]);
        }
        if (out != NULL) {
            fclose(out);
        }
        pw_response_free(&answer);
    }
    pw_client_free(client);
    pw_global_cleanup();
    return ok ? 0 : 1;
}
