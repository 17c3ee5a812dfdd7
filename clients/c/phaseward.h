/*
 * phaseward.h - a small C99 client for the phaseward telemetry endpoint.
 *
 * Formats samples into the service's JSON sample format and posts one sample or a batch to
 * POST /v1/rails/{rail}/samples with libcurl, handing back the HTTP status and the body.
 *
 * Numbers: only finite values are accepted (JSON has no NaN or infinity); each is written
 * with the fewest significant digits (15, 16 or 17) that read back to the same double, and
 * always with '.' as the decimal point, whatever LC_NUMERIC says.
 *
 * Threads: a pw_client is used by one thread at a time; the formatting functions are
 * reentrant except for the locale query (localeconv), which C99 does not make thread-safe.
 */
#ifndef PHASEWARD_H
#define PHASEWARD_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* Per-phase fault flags (pw_phase.flags); each set bit is sent as a true JSON boolean. */
#define PW_FLAG_BREAKER_TRIPPED 0x01u
#define PW_FLAG_DRIVER_DISABLED 0x02u
#define PW_FLAG_OVERCURRENT 0x04u
#define PW_FLAG_OVERTEMPERATURE 0x08u

/* Error codes: 0 is success, every error is negative. */
enum pw_error {
    PW_OK = 0,
    PW_E_INVALID = -1,   /* a NULL pointer, no phases, a negative seq or index */
    PW_E_NONFINITE = -2, /* a NaN or infinite number */
    PW_E_RAIL_ID = -3,   /* a rail id outside [a-z0-9][a-z0-9-]{0,63} */
    PW_E_NOMEM = -4,     /* out of memory */
    PW_E_CURL = -5,      /* libcurl failed; pw_client_error() says why */
    PW_E_FLAGS = -6      /* unknown bits in pw_phase.flags */
};

/* One phase in one sample. */
typedef struct pw_phase {
    int index;          /* 0-based phase index */
    double current_a;   /* phase current, amperes */
    int has_temp;       /* 0: no temperature reading for this phase */
    double temp_c;      /* temperature, degrees Celsius (used when has_temp) */
    unsigned int flags; /* PW_FLAG_* bits */
} pw_phase;

/* One sample of a rail. */
typedef struct pw_sample {
    double time_s;          /* epoch seconds (UTC) */
    int64_t seq;            /* sequence number, >= 0; a resent seq is absorbed */
    double vin_v;           /* input voltage */
    double vout_v;          /* output voltage */
    const pw_phase *phases; /* n_phases readings */
    size_t n_phases;
} pw_sample;

/*
 * Format one sample as a JSON object (pw_format_sample) or samples as a JSON array
 * (pw_format_samples) into dst, snprintf-style: at most cap bytes are written, the text is
 * always NUL-terminated when cap > 0, and the return value is the length the full text needs
 * (without the NUL), or a negative pw_error. Call with dst = NULL, cap = 0 to size a buffer.
 */
long pw_format_sample(char *dst, size_t cap, const pw_sample *sample);
long pw_format_samples(char *dst, size_t cap, const pw_sample *samples, size_t n);

/* Format one finite double the way the samples carry numbers; same return convention. */
long pw_format_number(char *dst, size_t cap, double value);

/* 1 if rail_id is a valid rail id, else 0. */
int pw_valid_rail_id(const char *rail_id);

/* An HTTP answer: status and body (NUL-terminated, body_len bytes before the NUL). */
typedef struct pw_response {
    long status;
    char *body;
    size_t body_len;
} pw_response;

void pw_response_free(pw_response *response);

typedef struct pw_client pw_client;

/* Call once per program before any client (wraps curl_global_init), and at the end. */
int pw_global_init(void);
void pw_global_cleanup(void);

/* A client for base_url (e.g. "http://127.0.0.1:8470"); timeout_ms bounds each request
 * (0: libcurl's default). NULL when out of memory or base_url is NULL. */
pw_client *pw_client_new(const char *base_url, long timeout_ms);
void pw_client_free(pw_client *client);

/* Send an access key ("pwk_...") as "Authorization: Bearer <key>" on every request; NULL
 * sends none again (for a service in open mode). PW_OK, or PW_E_NOMEM / PW_E_INVALID when the key
 * is not printable ASCII. */
int pw_client_set_key(pw_client *client, const char *key);

/* The last libcurl error text of the client ("" when none). */
const char *pw_client_error(const pw_client *client);

/*
 * Post one sample (as a JSON object) or a batch (as a JSON array, stored all or nothing by
 * the service). Returns PW_OK when an HTTP answer arrived, whatever its status: the caller
 * reads response->status (200 when stored) and response->body (the service's JSON answer or
 * error body), and must call pw_response_free. On a negative return nothing needs freeing.
 */
int pw_post_sample(pw_client *client, const char *rail_id, const pw_sample *sample,
                   pw_response *response);
int pw_post_samples(pw_client *client, const char *rail_id, const pw_sample *samples, size_t n,
                    pw_response *response);

/* Post an already formatted JSON body (one object or an array). */
int pw_post_json(pw_client *client, const char *rail_id, const char *json, size_t json_len,
                 pw_response *response);

/* Fetch row `row` of finished rehearsal `rehearsal_id` as firmware settings: a C header
 * (as_header != 0) or JSON. PW_OK when an HTTP answer arrived (200: response->body holds
 * the file); call pw_response_free. */
int pw_get_settings(pw_client *client, long rehearsal_id, long row, int as_header,
                    pw_response *response);

/* A short English text for a pw_error. */
const char *pw_strerror(int code);

#ifdef __cplusplus
}
#endif

#endif /* PHASEWARD_H */
