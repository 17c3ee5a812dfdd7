/* Formatting tests: exact JSON, number round trips, refusals, truncation, a comma locale. */
#include <locale.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

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

static void check_text(const char *got, const char *want, int line) {
    checks++;
    if (strcmp(got, want) != 0) {
        failures++;
        fprintf(stderr, "test_format.c:%d:\n  got  %s\n  want %s\n", line, got, want);
    }
}
#define CHECK_TEXT(got, want) check_text((got), (want), __LINE__)

static const char *number(double v) {
    static char buf[64];
    long n = pw_format_number(buf, sizeof buf, v);
    if (n < 0) {
        snprintf(buf, sizeof buf, "error %ld", n);
    }
    return buf;
}

static void test_numbers(void) {
    CHECK_TEXT(number(0.1), "0.1");
    CHECK_TEXT(number(12.0), "12");
    CHECK_TEXT(number(-2.5), "-2.5");
    CHECK_TEXT(number(1.0 / 3.0), "0.3333333333333333");
    CHECK_TEXT(number(0.1 + 0.2), "0.30000000000000004");
    CHECK_TEXT(number(1.8e9 + 0.25), "1800000000.25");
    CHECK_TEXT(number(220e-9), "2.2e-07");
    CHECK_TEXT(number(1e300), "1e+300");
    CHECK_TEXT(number(1.7976931348623157e308), "1.7976931348623157e+308");
    CHECK_TEXT(number(5e-324), "4.94065645841247e-324"); /* fewest digits that read back */
    CHECK(strtod(number(5e-324), NULL) == 5e-324);
    CHECK(pw_format_number(NULL, 0, NAN) == PW_E_NONFINITE);
    CHECK(pw_format_number(NULL, 0, INFINITY) == PW_E_NONFINITE);
    CHECK(pw_format_number(NULL, 0, -INFINITY) == PW_E_NONFINITE);
}

/* Every formatted double reads back exactly (in the C locale). */
static void test_round_trip(void) {
    unsigned long long state = 0x9E3779B97F4A7C15ull;
    int k, bad = 0;
    char buf[64];
    for (k = 0; k < 200000; k++) {
        double v;
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        memcpy(&v, &state, sizeof v);
        if (!isfinite(v)) {
            continue;
        }
        if (pw_format_number(buf, sizeof buf, v) < 0 || strtod(buf, NULL) != v) {
            if (bad++ < 5) {
                fprintf(stderr, "round trip failed for %s\n", buf);
            }
        }
    }
    CHECK(bad == 0);
}

static pw_phase PHASES[2] = {
    {0, 23.4, 1, 71.2, 0},
    {1, 0.0, 0, 0.0, PW_FLAG_BREAKER_TRIPPED | PW_FLAG_OVERTEMPERATURE},
};

static void test_sample(void) {
    pw_sample s = {1800000000.5, 42, 12.0, 0.75, PHASES, 2};
    const char *want = "{\"time\":1800000000.5,\"seq\":42,\"vin_v\":12,\"vout_v\":0.75,"
                       "\"phases\":[{\"index\":0,\"current_a\":23.4,\"temp_c\":71.2},"
                       "{\"index\":1,\"current_a\":0,\"breaker_tripped\":true,"
                       "\"overtemperature\":true}]}";
    char buf[512], small[16];
    long need = pw_format_sample(NULL, 0, &s);
    CHECK(need == (long)strlen(want));
    CHECK(pw_format_sample(buf, sizeof buf, &s) == need);
    CHECK_TEXT(buf, want);

    /* snprintf semantics: truncated, NUL-terminated, full length returned */
    CHECK(pw_format_sample(small, sizeof small, &s) == need);
    CHECK(strlen(small) == sizeof small - 1);
    CHECK(strncmp(small, want, sizeof small - 1) == 0);
}

static void test_batch(void) {
    pw_sample s[2] = {{1.0, 1, 12.0, 1.0, PHASES, 1}, {2.0, 2, 12.0, 1.0, PHASES, 1}};
    char buf[512];
    long n = pw_format_samples(buf, sizeof buf, s, 2);
    CHECK(n > 0);
    CHECK_TEXT(buf, "[{\"time\":1,\"seq\":1,\"vin_v\":12,\"vout_v\":1,\"phases\":[{\"index\":0,"
                    "\"current_a\":23.4,\"temp_c\":71.2}]},{\"time\":2,\"seq\":2,\"vin_v\":12,"
                    "\"vout_v\":1,\"phases\":[{\"index\":0,\"current_a\":23.4,\"temp_c\":71.2}]}]");
    CHECK(pw_format_samples(buf, sizeof buf, s, 0) == PW_E_INVALID);
}

static void test_refusals(void) {
    pw_phase bad_phase[1] = {{0, 1.0, 1, NAN, 0}};
    pw_phase bad_flags[1] = {{0, 1.0, 0, 0.0, 0x100u}};
    pw_phase bad_index[1] = {{-1, 1.0, 0, 0.0, 0}};
    pw_sample s = {1.0, 1, 12.0, 1.0, PHASES, 1};
    char buf[256] = "untouched";

    s.vin_v = INFINITY;
    CHECK(pw_format_sample(buf, sizeof buf, &s) == PW_E_NONFINITE);
    CHECK(buf[0] == '\0'); /* no half sample is left behind */
    s.vin_v = 12.0;
    s.phases = bad_phase;
    CHECK(pw_format_sample(NULL, 0, &s) == PW_E_NONFINITE);
    bad_phase[0].has_temp = 0; /* an absent temperature is not looked at */
    CHECK(pw_format_sample(NULL, 0, &s) > 0);
    s.phases = bad_flags;
    CHECK(pw_format_sample(NULL, 0, &s) == PW_E_FLAGS);
    s.phases = bad_index;
    CHECK(pw_format_sample(NULL, 0, &s) == PW_E_INVALID);
    s.phases = PHASES;
    s.seq = -1;
    CHECK(pw_format_sample(NULL, 0, &s) == PW_E_INVALID);
    s.seq = 1;
    s.n_phases = 0;
    CHECK(pw_format_sample(NULL, 0, &s) == PW_E_INVALID);
    CHECK(pw_format_sample(NULL, 0, NULL) == PW_E_INVALID);
    CHECK(pw_format_sample(NULL, 8, &s) == PW_E_INVALID);
}

static void test_rail_ids(void) {
    CHECK(pw_valid_rail_id("demo-core"));
    CHECK(pw_valid_rail_id("a"));
    CHECK(pw_valid_rail_id("0-1"));
    CHECK(!pw_valid_rail_id(""));
    CHECK(!pw_valid_rail_id("-lead"));
    CHECK(!pw_valid_rail_id("Upper"));
    CHECK(!pw_valid_rail_id("a/../b"));
    CHECK(!pw_valid_rail_id("a b"));
    CHECK(!pw_valid_rail_id(NULL));
    CHECK(pw_valid_rail_id("a123456789012345678901234567890123456789012345678901234567890123"));
    CHECK(!pw_valid_rail_id("a1234567890123456789012345678901234567890123456789012345678901234"));
}

/* Under a locale whose decimal point is ',', printf writes "0,75": the JSON must not. */
static void test_comma_locale(void) {
    const char *name = getenv("PW_COMMA_LOCALE");
    pw_sample s = {1800000000.5, 7, 12.0, 0.75, PHASES, 1};
    char printed[32], buf[512];
    if (name == NULL || name[0] == '\0') {
        printf("SKIP comma locale (set PW_COMMA_LOCALE)\n");
        return;
    }
    CHECK(setlocale(LC_NUMERIC, name) != NULL);
    snprintf(printed, sizeof printed, "%.2f", 0.75);
    CHECK_TEXT(printed, "0,75"); /* the locale really is in force */
    CHECK_TEXT(number(0.75), "0.75");
    CHECK_TEXT(number(1.0 / 3.0), "0.3333333333333333");
    CHECK_TEXT(number(-1.5e-7), "-1.5e-07");
    CHECK(pw_format_sample(buf, sizeof buf, &s) > 0);
    CHECK(strstr(buf, "\"time\":1800000000.5,") != NULL);
    CHECK(strstr(buf, "\"vout_v\":0.75,") != NULL);
    CHECK(strchr(buf, ';') == NULL);
    setlocale(LC_NUMERIC, "C");
}

int main(void) {
    test_numbers();
    test_round_trip();
    test_sample();
    test_batch();
    test_refusals();
    test_rail_ids();
    test_comma_locale();
    if (failures) {
        printf("%d passed, %d failed\n", checks - failures, failures);
        return 1;
    }
    printf("%d passed, 0 failed\n", checks);
    return 0;
}
