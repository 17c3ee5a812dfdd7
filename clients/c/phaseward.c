/* phaseward.c - see phaseward.h. C99 plus libcurl. */
#include "phaseward.h"

#include <curl/curl.h>
#include <inttypes.h>
#include <locale.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define PW_MAX_SEQ ((int64_t)1 << 62)
#define PW_ALL_FLAGS                                                                       \
    (PW_FLAG_BREAKER_TRIPPED | PW_FLAG_DRIVER_DISABLED | PW_FLAG_OVERCURRENT |             \
     PW_FLAG_OVERTEMPERATURE)

/* ---- formatting ------------------------------------------------------------------------ */

/* snprintf-style output: counts everything, stores what fits, keeps room for the NUL. */
typedef struct writer {
    char *dst;
    size_t cap;
    size_t len;
} writer;

static void put(writer *w, const char *s, size_t n) {
    if (w->cap > 0 && w->len < w->cap - 1) {
        size_t room = w->cap - 1 - w->len;
        memcpy(w->dst + w->len, s, n < room ? n : room);
    }
    w->len += n;
}

static void puts_(writer *w, const char *s) { put(w, s, strlen(s)); }

static long finish(writer *w) {
    if (w->cap > 0) {
        w->dst[w->len < w->cap - 1 ? w->len : w->cap - 1] = '\0';
    }
    return (long)w->len;
}

/* The shortest of %.15g, %.16g, %.17g that reads back exactly, with '.' as decimal point. */
static int number_text(char out[40], double value) {
    char tmp[40];
    int precision;
    const char *point;
    size_t point_len;
    size_t i = 0, o = 0;

    if (!isfinite(value)) {
        return PW_E_NONFINITE;
    }
    for (precision = 15; precision <= 17; precision++) {
        snprintf(tmp, sizeof tmp, "%.*g", precision, value);
        if (strtod(tmp, NULL) == value) {
            break; /* strtod reads in the same locale snprintf wrote in */
        }
    }
    point = localeconv()->decimal_point;
    point_len = (point != NULL) ? strlen(point) : 0;
    while (tmp[i] != '\0') {
        if (point_len > 0 && strncmp(tmp + i, point, point_len) == 0) {
            out[o++] = '.';
            i += point_len;
        } else {
            out[o++] = tmp[i++];
        }
    }
    out[o] = '\0';
    return PW_OK;
}

static int put_number(writer *w, double value) {
    char text[40];
    int rc = number_text(text, value);
    if (rc != PW_OK) {
        return rc;
    }
    puts_(w, text);
    return PW_OK;
}

long pw_format_number(char *dst, size_t cap, double value) {
    writer w;
    int rc;
    if (dst == NULL && cap > 0) {
        return PW_E_INVALID;
    }
    w.dst = dst;
    w.cap = cap;
    w.len = 0;
    rc = put_number(&w, value);
    if (rc != PW_OK) {
        return rc;
    }
    return finish(&w);
}

static int put_field(writer *w, const char *name, double value) {
    puts_(w, name);
    return put_number(w, value);
}

static int put_phase(writer *w, const pw_phase *p) {
    char index[24];
    int rc;
    if (p->index < 0) {
        return PW_E_INVALID;
    }
    if ((p->flags & ~PW_ALL_FLAGS) != 0) {
        return PW_E_FLAGS;
    }
    snprintf(index, sizeof index, "{\"index\":%d", p->index);
    puts_(w, index);
    if ((rc = put_field(w, ",\"current_a\":", p->current_a)) != PW_OK) {
        return rc;
    }
    if (p->has_temp && (rc = put_field(w, ",\"temp_c\":", p->temp_c)) != PW_OK) {
        return rc;
    }
    if (p->flags & PW_FLAG_BREAKER_TRIPPED) {
        puts_(w, ",\"breaker_tripped\":true");
    }
    if (p->flags & PW_FLAG_DRIVER_DISABLED) {
        puts_(w, ",\"driver_disabled\":true");
    }
    if (p->flags & PW_FLAG_OVERCURRENT) {
        puts_(w, ",\"overcurrent\":true");
    }
    if (p->flags & PW_FLAG_OVERTEMPERATURE) {
        puts_(w, ",\"overtemperature\":true");
    }
    puts_(w, "}");
    return PW_OK;
}

static int put_sample(writer *w, const pw_sample *s) {
    char seq[48];
    size_t k;
    int rc;
    if (s == NULL || s->phases == NULL || s->n_phases == 0 || s->seq < 0 || s->seq > PW_MAX_SEQ) {
        return PW_E_INVALID;
    }
    if ((rc = put_field(w, "{\"time\":", s->time_s)) != PW_OK) {
        return rc;
    }
    snprintf(seq, sizeof seq, ",\"seq\":%" PRId64, s->seq);
    puts_(w, seq);
    if ((rc = put_field(w, ",\"vin_v\":", s->vin_v)) != PW_OK ||
        (rc = put_field(w, ",\"vout_v\":", s->vout_v)) != PW_OK) {
        return rc;
    }
    puts_(w, ",\"phases\":[");
    for (k = 0; k < s->n_phases; k++) {
        if (k > 0) {
            puts_(w, ",");
        }
        if ((rc = put_phase(w, &s->phases[k])) != PW_OK) {
            return rc;
        }
    }
    puts_(w, "]}");
    return PW_OK;
}

long pw_format_sample(char *dst, size_t cap, const pw_sample *sample) {
    writer w;
    int rc;
    if (dst == NULL && cap > 0) {
        return PW_E_INVALID;
    }
    w.dst = dst;
    w.cap = cap;
    w.len = 0;
    if ((rc = put_sample(&w, sample)) != PW_OK) {
        if (cap > 0) {
            dst[0] = '\0';
        }
        return rc;
    }
    return finish(&w);
}

long pw_format_samples(char *dst, size_t cap, const pw_sample *samples, size_t n) {
    writer w;
    size_t k;
    int rc;
    if ((dst == NULL && cap > 0) || samples == NULL || n == 0) {
        return PW_E_INVALID;
    }
    w.dst = dst;
    w.cap = cap;
    w.len = 0;
    puts_(&w, "[");
    for (k = 0; k < n; k++) {
        if (k > 0) {
            puts_(&w, ",");
        }
        if ((rc = put_sample(&w, &samples[k])) != PW_OK) {
            if (cap > 0) {
                dst[0] = '\0';
            }
            return rc;
        }
    }
    puts_(&w, "]");
    return finish(&w);
}

int pw_valid_rail_id(const char *rail_id) {
    size_t i, n;
    if (rail_id == NULL) {
        return 0;
    }
    n = strlen(rail_id);
    if (n == 0 || n > 64) {
        return 0;
    }
    for (i = 0; i < n; i++) {
        char c = rail_id[i];
        int ok = (c >= 'a' && c <= 'z') || (c >= '0' && c <= '9') || (c == '-' && i > 0);
        if (!ok) {
            return 0;
        }
    }
    return 1;
}

const char *pw_strerror(int code) {
    switch (code) {
    case PW_OK:
        return "ok";
    case PW_E_INVALID:
        return "invalid argument";
    case PW_E_NONFINITE:
        return "a number is NaN or infinite";
    case PW_E_RAIL_ID:
        return "invalid rail id";
    case PW_E_NOMEM:
        return "out of memory";
    case PW_E_CURL:
        return "HTTP transfer failed";
    case PW_E_FLAGS:
        return "unknown phase flag bits";
    default:
        return "unknown error";
    }
}

/* ---- HTTP ------------------------------------------------------------------------------ */

struct pw_client {
    CURL *curl;
    char *base_url; /* without a trailing '/' */
    long timeout_ms;
    char *auth_header; /* "Authorization: Bearer <key>", or NULL */
    char error[CURL_ERROR_SIZE];
};

typedef struct body_buf {
    char *data;
    size_t len;
    size_t cap;
    int nomem;
} body_buf;

static size_t on_body(char *chunk, size_t size, size_t count, void *user) {
    body_buf *b = (body_buf *)user;
    size_t n = size * count;
    if (b->len + n + 1 > b->cap) {
        size_t cap = b->cap ? b->cap : 1024;
        char *grown;
        while (cap < b->len + n + 1) {
            cap *= 2;
        }
        grown = (char *)realloc(b->data, cap);
        if (grown == NULL) {
            b->nomem = 1;
            return 0; /* makes libcurl stop with CURLE_WRITE_ERROR */
        }
        b->data = grown;
        b->cap = cap;
    }
    memcpy(b->data + b->len, chunk, n);
    b->len += n;
    b->data[b->len] = '\0';
    return n;
}

int pw_global_init(void) {
    return curl_global_init(CURL_GLOBAL_DEFAULT) == CURLE_OK ? PW_OK : PW_E_CURL;
}

void pw_global_cleanup(void) { curl_global_cleanup(); }

pw_client *pw_client_new(const char *base_url, long timeout_ms) {
    pw_client *c;
    size_t n;
    if (base_url == NULL) {
        return NULL;
    }
    c = (pw_client *)calloc(1, sizeof *c);
    if (c == NULL) {
        return NULL;
    }
    n = strlen(base_url);
    while (n > 0 && base_url[n - 1] == '/') {
        n--;
    }
    c->base_url = (char *)malloc(n + 1);
    c->curl = curl_easy_init();
    if (c->base_url == NULL || c->curl == NULL) {
        pw_client_free(c);
        return NULL;
    }
    memcpy(c->base_url, base_url, n);
    c->base_url[n] = '\0';
    c->timeout_ms = timeout_ms;
    return c;
}

void pw_client_free(pw_client *client) {
    if (client == NULL) {
        return;
    }
    if (client->curl != NULL) {
        curl_easy_cleanup(client->curl);
    }
    free(client->base_url);
    free(client->auth_header);
    free(client);
}

int pw_client_set_key(pw_client *client, const char *key) {
    static const char head[] = "Authorization: Bearer ";
    char *header;
    const char *p;
    if (client == NULL) {
        return PW_E_INVALID;
    }
    if (key != NULL) {
        for (p = key; *p != '\0'; p++) {
            if (*p <= ' ' || *p > '~') {
                return PW_E_INVALID; /* a header must not carry spaces, controls or line breaks */
            }
        }
        header = (char *)malloc(sizeof head + strlen(key));
        if (header == NULL) {
            return PW_E_NOMEM;
        }
        sprintf(header, "%s%s", head, key);
    } else {
        header = NULL;
    }
    free(client->auth_header);
    client->auth_header = header;
    return PW_OK;
}

const char *pw_client_error(const pw_client *client) {
    return client != NULL ? client->error : "no client";
}

void pw_response_free(pw_response *response) {
    if (response == NULL) {
        return;
    }
    free(response->body);
    response->body = NULL;
    response->body_len = 0;
}

/* curl_slist_append leaves the list as it was when it fails; remember the failure. */
static struct curl_slist *append_header(struct curl_slist *list, const char *header,
                                        int *failed) {
    struct curl_slist *longer;
    if (*failed) {
        return list;
    }
    longer = curl_slist_append(list, header);
    if (longer == NULL) {
        *failed = 1;
        return list;
    }
    return longer;
}

/* One request to url (owned by the caller): a POST of json when json is not NULL, else a
 * GET. PW_OK when an HTTP answer arrived. */
static int perform(pw_client *client, const char *url, const char *json, size_t json_len,
                   const char *accept, pw_response *response) {
    struct curl_slist *headers = NULL;
    int failed = 0;
    body_buf body = {NULL, 0, 0, 0};
    CURLcode rc;
    long status = 0;

    if (json != NULL) {
        headers = append_header(headers, "Content-Type: application/json", &failed);
        headers = append_header(headers, "Expect:", &failed); /* no 100-continue round trip */
    }
    headers = append_header(headers, accept, &failed);
    if (client->auth_header != NULL) {
        headers = append_header(headers, client->auth_header, &failed);
    }
    if (failed) {
        curl_slist_free_all(headers);
        return PW_E_NOMEM;
    }

    client->error[0] = '\0';
    curl_easy_reset(client->curl);
    curl_easy_setopt(client->curl, CURLOPT_URL, url);
    if (json != NULL) {
        curl_easy_setopt(client->curl, CURLOPT_POST, 1L);
        curl_easy_setopt(client->curl, CURLOPT_POSTFIELDS, json);
        curl_easy_setopt(client->curl, CURLOPT_POSTFIELDSIZE_LARGE, (curl_off_t)json_len);
    }
    curl_easy_setopt(client->curl, CURLOPT_HTTPHEADER, headers);
    curl_easy_setopt(client->curl, CURLOPT_WRITEFUNCTION, on_body);
    curl_easy_setopt(client->curl, CURLOPT_WRITEDATA, &body);
    curl_easy_setopt(client->curl, CURLOPT_ERRORBUFFER, client->error);
    curl_easy_setopt(client->curl, CURLOPT_NOSIGNAL, 1L);
    if (client->timeout_ms > 0) {
        curl_easy_setopt(client->curl, CURLOPT_TIMEOUT_MS, client->timeout_ms);
    }
    rc = curl_easy_perform(client->curl);
    curl_slist_free_all(headers);
    if (rc != CURLE_OK) {
        if (client->error[0] == '\0') {
            snprintf(client->error, sizeof client->error, "%s", curl_easy_strerror(rc));
        }
        free(body.data);
        return body.nomem ? PW_E_NOMEM : PW_E_CURL;
    }
    curl_easy_getinfo(client->curl, CURLINFO_RESPONSE_CODE, &status);
    if (body.data == NULL) { /* an empty body is still a string */
        body.data = (char *)calloc(1, 1);
        if (body.data == NULL) {
            return PW_E_NOMEM;
        }
    }
    response->status = status;
    response->body = body.data;
    response->body_len = body.len;
    return PW_OK;
}

int pw_post_json(pw_client *client, const char *rail_id, const char *json, size_t json_len,
                 pw_response *response) {
    static const char path_head[] = "/v1/rails/";
    static const char path_tail[] = "/samples";
    char *url;
    int rc;

    if (client == NULL || json == NULL || response == NULL) {
        return PW_E_INVALID;
    }
    response->status = 0;
    response->body = NULL;
    response->body_len = 0;
    if (!pw_valid_rail_id(rail_id)) {
        return PW_E_RAIL_ID;
    }
    url = (char *)malloc(strlen(client->base_url) + sizeof path_head + strlen(rail_id) +
                         sizeof path_tail);
    if (url == NULL) {
        return PW_E_NOMEM;
    }
    sprintf(url, "%s%s%s%s", client->base_url, path_head, rail_id, path_tail);
    rc = perform(client, url, json, json_len, "Accept: application/json", response);
    free(url);
    return rc;
}

int pw_get_settings(pw_client *client, long rehearsal_id, long row, int as_header,
                    pw_response *response) {
    char *url;
    int rc;

    if (client == NULL || response == NULL || rehearsal_id < 1 || row < 0) {
        return PW_E_INVALID;
    }
    response->status = 0;
    response->body = NULL;
    response->body_len = 0;
    url = (char *)malloc(strlen(client->base_url) + 80);
    if (url == NULL) {
        return PW_E_NOMEM;
    }
    sprintf(url, "%s/v1/rehearsals/%ld/rows/%ld/settings.%s", client->base_url, rehearsal_id,
            row, as_header ? "h" : "json");
    rc = perform(client, url, NULL, 0, as_header ? "Accept: text/x-c" : "Accept: application/json",
                 response);
    free(url);
    return rc;
}

static int post_formatted(pw_client *client, const char *rail_id, const pw_sample *samples,
                          size_t n, int as_array, pw_response *response) {
    long need;
    char *json;
    int rc;
    if (response != NULL) {
        response->status = 0;
        response->body = NULL;
        response->body_len = 0;
    }
    need = as_array ? pw_format_samples(NULL, 0, samples, n) : pw_format_sample(NULL, 0, samples);
    if (need < 0) {
        return (int)need;
    }
    json = (char *)malloc((size_t)need + 1);
    if (json == NULL) {
        return PW_E_NOMEM;
    }
    if (as_array) {
        pw_format_samples(json, (size_t)need + 1, samples, n);
    } else {
        pw_format_sample(json, (size_t)need + 1, samples);
    }
    rc = pw_post_json(client, rail_id, json, (size_t)need, response);
    free(json);
    return rc;
}

int pw_post_sample(pw_client *client, const char *rail_id, const pw_sample *sample,
                   pw_response *response) {
    return post_formatted(client, rail_id, sample, 1, 0, response);
}

int pw_post_samples(pw_client *client, const char *rail_id, const pw_sample *samples, size_t n,
                    pw_response *response) {
    return post_formatted(client, rail_id, samples, n, 1, response);
}
