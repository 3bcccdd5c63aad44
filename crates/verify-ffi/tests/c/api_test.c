/*
 * The C interface as a C program uses it (issue 14). tests/c_api.rs compiles this file with
 * the system C compiler against include/ampoule.h and the static library, once plainly and once
 * under AddressSanitizer, and runs one case per test:
 *
 *   api_test CASE FIXTURES SCRATCH
 *
 * FIXTURES holds what the `ampoule` binary made (key.raw: the raw Ed25519 public key that
 * signed everything; v1.offline and v2.offline: offline files of versions 1.0.0 and 1.1.0 of
 * an invented trail-camera model; tampered.offline: v2.offline with one byte of its bundle
 * flipped; policy-*.json; tree/: the release tree both offline files came from). SCRATCH is an
 * empty directory for the case's stores. The cases named http_* and session_* update over HTTP
 * from the test's server on 127.0.0.1, which serves tree/ at the address in the environment
 * variable AMPOULE_TEST_SERVER (127.0.0.1:PORT). A case prints nothing and exits 0, or names
 * the failed check and exits 1.
 *
 * The HTTP client is written here on plain sockets (HTTP/1.0, one request per connection), as
 * an app with its own network stack would bring one: the test needs nothing beyond the C
 * library, and it sees every byte it hands to the session.
 */
#define _DEFAULT_SOURCE /* flock */
#define _POSIX_C_SOURCE 200809L
#include <arpa/inet.h>
#include <fcntl.h>
#include <netinet/in.h>
#include <pthread.h>
#include <stdarg.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/file.h>
#include <sys/socket.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

#include "ampoule.h"

static const char *fixtures;
static const char *scratch;

static void fail(int line, const char *format, ...) {
    va_list args;
    fprintf(stderr, "api_test.c:%d: ", line);
    va_start(args, format);
    vfprintf(stderr, format, args);
    va_end(args);
    fputc('\n', stderr);
    exit(1);
}

#define CHECK(cond)                                                                            \
    do {                                                                                       \
        if (!(cond)) fail(__LINE__, "check failed: %s", #cond);                                \
    } while (0)

/* The call returned `want`, its error object says the same, and its message holds `part`. */
#define EXPECT(got, want, err, part) expect(__LINE__, #got, (got), (want), (err), (part))

static void expect(int line, const char *call, int32_t got, int32_t want, const ampoule_error *err,
                   const char *part) {
    if (got != want) {
        fail(line, "%s returned %d (%s), not %d (%s): %.*s", call, got, ampoule_status_name(got),
             want, ampoule_status_name(want), (int)err->message_len, (const char *)err->message);
    }
    if (err->code != want) fail(line, "%s: the error object's code is %d, not %d", call, err->code, want);
    if (err->message_len >= AMPOULE_MESSAGE_BYTES || err->message[err->message_len] != 0) {
        fail(line, "%s: the message's length %u is wrong or it is not NUL-terminated", call,
             err->message_len);
    }
    if (want == AMPOULE_OK && err->message_len != 0) fail(line, "%s: a success with a message", call);
    if (part && !strstr((const char *)err->message, part)) {
        fail(line, "%s: the message \"%s\" does not hold \"%s\"", call, (const char *)err->message,
             part);
    }
}

static uint8_t *read_file(const char *name, size_t *len) {
    char path[4096];
    snprintf(path, sizeof path, "%s/%s", fixtures, name);
    FILE *f = fopen(path, "rb");
    if (!f) fail(__LINE__, "cannot open %s", path);
    fseek(f, 0, SEEK_END);
    long size = ftell(f);
    fseek(f, 0, SEEK_SET);
    uint8_t *bytes = malloc((size_t)size + 1);
    CHECK(bytes != NULL);
    CHECK(fread(bytes, 1, (size_t)size, f) == (size_t)size);
    fclose(f);
    *len = (size_t)size;
    return bytes;
}

static const char *fixture(const char *name) {
    static char paths[8][4096];
    static int next;
    char *path = paths[next++ % 8];
    snprintf(path, 4096, "%s/%s", fixtures, name);
    return path;
}

static const char *store_dir(const char *name) {
    static char path[4096];
    snprintf(path, sizeof path, "%s/%s", scratch, name);
    return path;
}

static uint8_t key[32];

static int32_t open_store(const char *dir, const uint8_t *policy, size_t policy_len,
                          ampoule_store *out, ampoule_error *err) {
    ampoule_role_keys keys = {key, sizeof key, 1};
    return ampoule_store_open_with_pinned_keys(dir, strlen(dir), "stable", 6, &keys, &keys, &keys,
                                               "2.3.0", 5, policy, policy_len, (int64_t)time(NULL),
                                               out, err);
}

static ampoule_store open_ok(const char *name, const char *policy_file) {
    ampoule_error err;
    ampoule_store store = {0};
    size_t policy_len = 0;
    uint8_t *policy = policy_file ? read_file(policy_file, &policy_len) : NULL;
    EXPECT(open_store(store_dir(name), policy, policy_len, &store, &err), AMPOULE_OK, &err, NULL);
    CHECK(store.id != 0);
    free(policy);
    return store;
}

static int32_t install(ampoule_store store, const char *file, ampoule_outcome *outcome,
                       ampoule_error *err) {
    const char *path = fixture(file);
    return ampoule_install_offline(store, path, strlen(path), (int64_t)time(NULL), outcome, err);
}

/* A release field as a NUL-terminated string in a static buffer. */
static const char *field(ampoule_release release, int32_t which) {
    static char text[8192];
    ampoule_error err;
    size_t len = 0;
    EXPECT(ampoule_release_field(release, which, (uint8_t *)text, sizeof text - 1, &len, &err),
           AMPOULE_OK, &err, NULL);
    text[len] = 0;
    return text;
}

static const char *metadata(ampoule_release release, const char *key_text) {
    static char text[4096];
    ampoule_error err;
    size_t len = 0;
    EXPECT(ampoule_release_metadata(release, key_text, key_text ? strlen(key_text) : 0,
                                    (uint8_t *)text, sizeof text - 1, &len, &err),
           AMPOULE_OK, &err, NULL);
    text[len] = 0;
    return text;
}

static void release_free(ampoule_release release) {
    ampoule_error err;
    EXPECT(ampoule_release_free(release, &err), AMPOULE_OK, &err, NULL);
}

static void store_free(ampoule_store store) {
    ampoule_error err;
    EXPECT(ampoule_store_free(store, &err), AMPOULE_OK, &err, NULL);
}

/* ABI version and status names. */
static void case_abi(void) {
    CHECK(ampoule_abi_version() == AMPOULE_ABI_VERSION);
    CHECK(strcmp(ampoule_status_name(AMPOULE_OK), "ok") == 0);
    CHECK(strcmp(ampoule_status_name(AMPOULE_INCOMPATIBLE), "incompatible") == 0);
    CHECK(strcmp(ampoule_status_name(AMPOULE_INVALID_HANDLE), "invalid_handle") == 0);
    CHECK(strcmp(ampoule_status_name(AMPOULE_UNSUPPORTED), "unsupported") == 0);
    CHECK(strcmp(ampoule_status_name(-5), "unknown") == 0);
}

/* Open, install 1.0.0 then 1.1.0 offline, read labels and metadata, roll back. */
static void case_lifecycle(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", "policy-fits.json");
    ampoule_release current = {99};
    EXPECT(ampoule_current(store, &current, &err), AMPOULE_OK, &err, NULL);
    CHECK(current.id == 0);

    ampoule_outcome outcome;
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    ampoule_release first = outcome.installed;
    CHECK(strcmp(field(first, AMPOULE_FIELD_NAME), "trailcam-species") == 0);
    CHECK(strcmp(field(first, AMPOULE_FIELD_VERSION), "1.0.0") == 0);
    CHECK(strcmp(field(first, AMPOULE_FIELD_CREATED), "2026-12-01T08:00:00Z") == 0);
    CHECK(strcmp(field(first, AMPOULE_FIELD_REQUIRES_APP), ">=2.0.0, <3.0.0") == 0);
    CHECK(strlen(field(first, AMPOULE_FIELD_MANIFEST_SHA256)) == 64);
    CHECK(strlen(field(first, AMPOULE_FIELD_SIGNERS)) > 0);
    CHECK(strstr(field(first, AMPOULE_FIELD_MANIFEST_JSON), "\"name\":\"trailcam-species\""));
    const char *model = field(first, AMPOULE_FIELD_MODEL_PATH);
    struct stat st;
    CHECK(stat(model, &st) == 0 && st.st_size == 40000);
    CHECK(strstr(model, store_dir("camera")) == model);
    CHECK(access(field(first, AMPOULE_FIELD_LABELS_PATH), R_OK) == 0);

    size_t count = 0;
    EXPECT(ampoule_release_label_count(first, &count, &err), AMPOULE_OK, &err, NULL);
    CHECK(count == 6);
    const char *expected[] = {"fox", "roe deer", "wild boar", "badger", "hare", "empty frame"};
    for (size_t i = 0; i < count; i++) {
        uint8_t label[64];
        size_t len = 0;
        EXPECT(ampoule_release_label(first, i, label, sizeof label, &len, &err), AMPOULE_OK, &err,
               NULL);
        CHECK(len == strlen(expected[i]) && memcmp(label, expected[i], len) == 0);
    }
    CHECK(strcmp(metadata(first, "preprocess.colour_order"), "\"rgb\"") == 0);
    CHECK(strcmp(metadata(first, "eval.top1"), "0.91") == 0);
    CHECK(strcmp(metadata(first, NULL), "{\"eval\":{\"top1\":0.91},\"preprocess\":{\"colour_order\":\"rgb\"}}") == 0);
    size_t len = 0;
    uint8_t buf[8];
    EXPECT(ampoule_release_metadata(first, "notes", 5, buf, sizeof buf, &len, &err),
           AMPOULE_NOT_FOUND, &err, "has no key 'notes'");
    release_free(first);

    EXPECT(install(store, "v2.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    CHECK(strcmp(field(outcome.installed, AMPOULE_FIELD_VERSION), "1.1.0") == 0);
    release_free(outcome.installed);
    EXPECT(install(store, "v2.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_UP_TO_DATE && outcome.installed.id == 0);
    /* An older file after a newer install is a replay: refused. */
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_STALE, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_REFUSED);

    ampoule_release back = {0};
    EXPECT(ampoule_rollback(store, &back, &err), AMPOULE_OK, &err, NULL);
    CHECK(strcmp(field(back, AMPOULE_FIELD_VERSION), "1.0.0") == 0);
    release_free(back);
    EXPECT(ampoule_current(store, &current, &err), AMPOULE_OK, &err, NULL);
    CHECK(strcmp(field(current, AMPOULE_FIELD_VERSION), "1.0.0") == 0);
    release_free(current);
    /* Nothing before 1.0.0: a second rollback has nothing to go back to. */
    EXPECT(ampoule_rollback(store, &back, &err), AMPOULE_POLICY, &err, NULL);
    store_free(store);
}

/* The shipped trust set path: a file that is not a trust set is refused by kind; the genuine
 * one opens the store. */
static void case_trust_set(void) {
    ampoule_error err;
    ampoule_store store = {0};
    const char *dir = store_dir("camera");
    const char *garbage = "{\"not\": \"a trust set\"}";
    EXPECT(ampoule_store_open_with_trust_set(dir, strlen(dir), "stable", 6,
                                             (const uint8_t *)garbage, strlen(garbage), "2.3.0", 5,
                                             NULL, 0, (int64_t)time(NULL), &store, &err),
           AMPOULE_TRUST_SET, &err, "the trust set shipped with the app");
    CHECK(store.id == 0);
    /* The genuine set: the store opens, and a bundle its keys signed installs. */
    size_t set_len = 0;
    uint8_t *set = read_file("trust-1.json", &set_len);
    EXPECT(ampoule_store_open_with_trust_set(dir, strlen(dir), "stable", 6, set, set_len, "2.3.0",
                                             5, NULL, 0, (int64_t)time(NULL), &store, &err),
           AMPOULE_OK, &err, NULL);
    free(set);
    ampoule_outcome outcome;
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    CHECK(strcmp(field(outcome.installed, AMPOULE_FIELD_VERSION), "1.0.0") == 0);
    release_free(outcome.installed);
    store_free(store);
}

/* A bundle changed after signing: refused by its digest, nothing installed. */
static void case_tampered(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", NULL);
    ampoule_outcome outcome;
    EXPECT(install(store, "tampered.offline", &outcome, &err), AMPOULE_DIGEST, &err,
           "but the feed declares");
    CHECK(outcome.kind == AMPOULE_OUTCOME_REFUSED && outcome.installed.id == 0);
    ampoule_release current = {7};
    EXPECT(ampoule_current(store, &current, &err), AMPOULE_OK, &err, NULL);
    CHECK(current.id == 0);
    store_free(store);
}

/* A validly signed bundle the app's policy document refuses. */
static void case_policy_refused(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", "policy-refuses.json");
    ampoule_outcome outcome;
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_INCOMPATIBLE, &err,
           "the label list lacks 'wolf', which the app requires");
    CHECK(outcome.kind == AMPOULE_OUTCOME_REFUSED);
    store_free(store);
}

/* Null pointers, each refused by name. */
static void case_null_pointers(void) {
    ampoule_error err;
    ampoule_store store = {0};
    ampoule_role_keys keys = {key, sizeof key, 1};
    const char *dir = store_dir("camera");
    EXPECT(ampoule_store_open_with_pinned_keys(NULL, 5, "stable", 6, &keys, &keys, &keys, "2.3.0",
                                               5, NULL, 0, 0, &store, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "dir is a null pointer with length 5");
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), "stable", 6, NULL, &keys, &keys,
                                               "2.3.0", 5, NULL, 0, 0, &store, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "bundle_keys is a null pointer");
    ampoule_role_keys no_keys = {NULL, 32, 1};
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), "stable", 6, &keys, &no_keys,
                                               &keys, "2.3.0", 5, NULL, 0, 0, &store, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "feed_keys is a null pointer with length 32");
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), "stable", 6, &keys, &keys, &keys,
                                               NULL, 0, NULL, 0, 0, &store, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "app_version is empty");
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), "stable", 6, &keys, &keys, &keys,
                                               "2.3.0", 5, NULL, 0, (int64_t)time(NULL), NULL, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "out is a null pointer");
    /* A NULL error object: the status alone. */
    CHECK(ampoule_store_open_with_pinned_keys(NULL, 5, "stable", 6, &keys, &keys, &keys, "2.3.0",
                                              5, NULL, 0, 0, &store, NULL) ==
          AMPOULE_INVALID_ARGUMENT);

    store = open_ok("camera", NULL);
    EXPECT(ampoule_install_offline(store, NULL, 0, 0, NULL, &err), AMPOULE_INVALID_ARGUMENT, &err,
           "file is empty");
    const char *v1 = fixture("v1.offline");
    EXPECT(ampoule_install_offline(store, v1, strlen(v1), (int64_t)time(NULL), NULL, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "out is a null pointer");
    EXPECT(ampoule_current(store, NULL, &err), AMPOULE_INVALID_ARGUMENT, &err,
           "out is a null pointer");
    ampoule_outcome outcome;
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    ampoule_release release = outcome.installed;
    uint8_t buf[64];
    EXPECT(ampoule_release_field(release, AMPOULE_FIELD_NAME, buf, sizeof buf, NULL, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "the length output is a null pointer");
    size_t len = 0;
    EXPECT(ampoule_release_field(release, AMPOULE_FIELD_NAME, NULL, 64, &len, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "the buffer for the field is a null pointer");
    EXPECT(ampoule_release_label_count(release, NULL, &err), AMPOULE_INVALID_ARGUMENT, &err,
           "count is a null pointer");
    EXPECT(ampoule_release_metadata(release, NULL, 3, buf, sizeof buf, &len, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "key is a null pointer with length 3");
    release_free(release);
    store_free(store);
}

/* Strings that are not UTF-8. */
static void case_non_utf8(void) {
    ampoule_error err;
    ampoule_store store = {0};
    ampoule_role_keys keys = {key, sizeof key, 1};
    const char *dir = store_dir("camera");
    const char bad[] = {'c', 'a', 'm', (char)0xff, (char)0xfe};
    EXPECT(ampoule_store_open_with_pinned_keys(bad, sizeof bad, "stable", 6, &keys, &keys, &keys,
                                               "2.3.0", 5, NULL, 0, 0, &store, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "dir is not UTF-8");
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), bad, sizeof bad, &keys, &keys,
                                               &keys, "2.3.0", 5, NULL, 0, 0, &store, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "channel is not UTF-8");
    /* Overlong encoding of '/' (0xC0 0xAF): not UTF-8 either. */
    const char overlong[] = {'2', '.', (char)0xc0, (char)0xaf};
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), "stable", 6, &keys, &keys, &keys,
                                               overlong, sizeof overlong, NULL, 0, 0, &store, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "app_version is not UTF-8");
    store = open_ok("camera", NULL);
    EXPECT(ampoule_install_offline(store, bad, sizeof bad, 0, NULL, &err), AMPOULE_INVALID_ARGUMENT,
           &err, "file is not UTF-8");
    ampoule_outcome outcome;
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    uint8_t buf[64];
    size_t len = 0;
    EXPECT(ampoule_release_metadata(outcome.installed, bad, sizeof bad, buf, sizeof buf, &len,
                                    &err),
           AMPOULE_INVALID_ARGUMENT, &err, "key is not UTF-8");
    release_free(outcome.installed);
    store_free(store);
}

/* Lengths that do not belong to their pointers, and buffers too small. */
static void case_mismatched_lengths(void) {
    ampoule_error err;
    ampoule_store store = {0};
    ampoule_role_keys keys = {key, sizeof key, 1};
    const char *dir = store_dir("camera");
    /* A -1 length: refused before anything is read. */
    EXPECT(ampoule_store_open_with_pinned_keys(dir, (size_t)-1, "stable", 6, &keys, &keys, &keys,
                                               "2.3.0", 5, NULL, 0, 0, &store, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "dir has length 18446744073709551615, over its limit");
    /* The terminating NUL counted in the length. */
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), "stable", 7, &keys, &keys, &keys,
                                               "2.3.0", 5, NULL, 0, 0, &store, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "channel holds a NUL byte at offset 6");
    ampoule_role_keys odd = {key, 31, 1};
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), "stable", 6, &odd, &keys, &keys,
                                               "2.3.0", 5, NULL, 0, 0, &store, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "bundle_keys has keys_len 31, which is not a whole");
    ampoule_role_keys too_many = {key, 32, 2};
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), "stable", 6, &too_many, &keys,
                                               &keys, "2.3.0", 5, NULL, 0, (int64_t)time(NULL),
                                               &store, &err),
           AMPOULE_KEY, &err, "a threshold of 2 signature(s) is not usable with 1 trusted key(s)");
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), "stable", 6, &keys, &keys, &keys,
                                               "2.3.0", 5, NULL, 0, -1, &store, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "now_unix -1 is not a time");

    store = open_ok("camera", NULL);
    ampoule_outcome outcome;
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    ampoule_release release = outcome.installed;
    size_t len = 0;
    uint8_t small[4];
    EXPECT(ampoule_release_field(release, AMPOULE_FIELD_NAME, small, sizeof small, &len, &err),
           AMPOULE_BUFFER_TOO_SMALL, &err, "call again with a buffer of at least 16 bytes");
    CHECK(len == strlen("trailcam-species"));
    /* Asking for the length with a NULL buffer of capacity 0. */
    EXPECT(ampoule_release_label(release, 5, NULL, 0, &len, &err), AMPOULE_BUFFER_TOO_SMALL, &err,
           NULL);
    CHECK(len == strlen("empty frame"));
    EXPECT(ampoule_release_label(release, 6, small, sizeof small, &len, &err), AMPOULE_NOT_FOUND,
           &err, "label index 6 is out of range: the release has 6 labels");
    EXPECT(ampoule_release_field(release, 42, small, sizeof small, &len, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "field 42 is not an AMPOULE_FIELD_* value");
    release_free(release);
    store_free(store);
}

/* Freed and double-freed handles. */
static void case_freed_handles(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", NULL);
    ampoule_outcome outcome;
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    ampoule_release release = outcome.installed;
    release_free(release);
    size_t count = 0;
    EXPECT(ampoule_release_label_count(release, &count, &err), AMPOULE_INVALID_HANDLE, &err,
           "the release handle is not a live handle");
    EXPECT(ampoule_release_free(release, &err), AMPOULE_INVALID_HANDLE, &err,
           "the release handle is not a live handle");
    store_free(store);
    ampoule_release current;
    EXPECT(ampoule_current(store, &current, &err), AMPOULE_INVALID_HANDLE, &err,
           "the store handle is not a live handle");
    EXPECT(install(store, "v2.offline", &outcome, &err), AMPOULE_INVALID_HANDLE, &err, NULL);
    EXPECT(ampoule_store_free(store, &err), AMPOULE_INVALID_HANDLE, &err, NULL);
    /* A new store gets a new handle: the freed one stays dead. */
    ampoule_store again = open_ok("camera", NULL);
    CHECK(again.id != store.id);
    EXPECT(ampoule_current(store, &current, &err), AMPOULE_INVALID_HANDLE, &err, NULL);
    store_free(again);
}

/* Handles the library never made, and handles of the other type. */
static void case_foreign_handles(void) {
    ampoule_error err;
    ampoule_release current;
    size_t count = 0;
    ampoule_store zero = {0}, made_up = {0x5354000000001234ull}, random = {0xdeadbeefcafef00dull};
    EXPECT(ampoule_current(zero, &current, &err), AMPOULE_INVALID_HANDLE, &err, NULL);
    EXPECT(ampoule_current(made_up, &current, &err), AMPOULE_INVALID_HANDLE, &err, NULL);
    EXPECT(ampoule_store_free(random, &err), AMPOULE_INVALID_HANDLE, &err, NULL);
    ampoule_store store = open_ok("camera", NULL);
    ampoule_outcome outcome;
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    /* The same number, read as the other type. */
    ampoule_release store_as_release = {store.id};
    ampoule_store release_as_store = {outcome.installed.id};
    EXPECT(ampoule_release_label_count(store_as_release, &count, &err), AMPOULE_INVALID_HANDLE,
           &err, "the release handle is not a live handle");
    EXPECT(ampoule_current(release_as_store, &current, &err), AMPOULE_INVALID_HANDLE, &err,
           "the store handle is not a live handle");
    EXPECT(ampoule_store_free(release_as_store, &err), AMPOULE_INVALID_HANDLE, &err, NULL);
    /* Both still work. */
    EXPECT(ampoule_release_label_count(outcome.installed, &count, &err), AMPOULE_OK, &err, NULL);
    release_free(outcome.installed);
    store_free(store);
}

static ampoule_store shared_store;
static const char *shared_file;
static int32_t results[4];
static int32_t kinds[4];

static void *install_thread(void *arg) {
    int i = (int)(intptr_t)arg;
    ampoule_error err;
    ampoule_outcome outcome;
    results[i] = ampoule_install_offline(shared_store, shared_file, strlen(shared_file),
                                         (int64_t)time(NULL), &outcome, &err);
    kinds[i] = outcome.kind;
    if (outcome.kind == AMPOULE_OUTCOME_INSTALLED) release_free(outcome.installed);
    return NULL;
}

/* Two updates at once on one store: one runs, the other is told the store is locked. */
static void case_two_updates_at_once(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", NULL);
    /* Another updater (here: this process, as a second program would) holds the lock. */
    char lock[4096];
    snprintf(lock, sizeof lock, "%s/downloads/lock", store_dir("camera"));
    ampoule_release current;
    EXPECT(ampoule_current(store, &current, &err), AMPOULE_OK, &err, NULL);
    mkdir(store_dir("camera/downloads"), 0700);
    int fd = open(lock, O_RDWR | O_CREAT, 0600);
    CHECK(fd >= 0);
    CHECK(flock(fd, LOCK_EX) == 0);
    ampoule_outcome outcome;
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_LOCKED, &err,
           "another update is running on store");
    CHECK(outcome.kind == AMPOULE_OUTCOME_FAILED);
    CHECK(flock(fd, LOCK_UN) == 0);
    close(fd);

    /* Four threads at once on one handle: exactly one installs; the others find the store
     * locked or, having started after it finished, up to date. */
    shared_store = store;
    shared_file = fixture("v1.offline");
    pthread_t threads[4];
    for (int i = 0; i < 4; i++) {
        CHECK(pthread_create(&threads[i], NULL, install_thread, (void *)(intptr_t)i) == 0);
    }
    int installed = 0;
    for (int i = 0; i < 4; i++) {
        CHECK(pthread_join(threads[i], NULL) == 0);
        if (kinds[i] == AMPOULE_OUTCOME_INSTALLED) {
            installed++;
            CHECK(results[i] == AMPOULE_OK);
        } else if (kinds[i] == AMPOULE_OUTCOME_FAILED) {
            CHECK(results[i] == AMPOULE_LOCKED);
        } else {
            CHECK(kinds[i] == AMPOULE_OUTCOME_UP_TO_DATE && results[i] == AMPOULE_OK);
        }
    }
    CHECK(installed == 1);
    store_free(store);
}

static void expect_policy_refused(const uint8_t *policy, size_t len, const char *part) {
    ampoule_error err;
    ampoule_store store = {0};
    EXPECT(open_store(store_dir("camera"), policy, len, &store, &err), AMPOULE_POLICY_DOCUMENT,
           &err, part);
    CHECK(store.id == 0);
}

#define POLICY(text, part) expect_policy_refused((const uint8_t *)(text), strlen(text), (part))

/* Policy documents that are not JSON, repeat a key, name an unknown one or a wrong type. */
static void case_policy_document_malformed(void) {
    POLICY("{\"policy_format\": 1", "policy document: not valid: EOF while parsing an object");
    POLICY("{\"policy_format\": 1, \"policy_format\": 1}",
           "policy document: not valid: key 'policy_format' appears twice");
    POLICY("{\"policy_format\": 1, \"labels\": {\"required\": [\"fox\"], \"required\": []}}",
           "key 'labels.required' appears twice");
    POLICY("{\"policy_format\": 1, \"modle\": {}}", "policy document: unknown key 'modle'");
    POLICY("{\"policy_format\": 1, \"model\": {\"inputs\": [{\"name\": \"image\", \"dtype\": "
           "\"float33\"}]}}",
           "policy document: model.inputs[0].dtype: 'float33' is not a tensor element type");
    POLICY("{\"bundle_name\": \"trailcam-species\"}", "policy document: it has no policy_format");
    const char not_utf8[] = "{\"policy_format\": 1, \"about\": \"\xff\"}";
    POLICY(not_utf8, "policy document: not valid: invalid unicode code point");
}

/* Policy documents over a cap: size, nesting, string length, item count. */
static void case_policy_document_over_caps(void) {
    size_t big = 70000;
    char *huge = malloc(big + 1);
    CHECK(huge != NULL);
    memset(huge, ' ', big);
    memcpy(huge, "{\"policy_format\": 1}", 20);
    huge[big] = 0;
    POLICY(huge, "policy document: it is 70000 bytes, over the limit of 65536 bytes");
    free(huge);
    POLICY("{\"policy_format\": 1, \"metadata\": {\"notes\": [[[[[[[1]]]]]]]}}",
           "nested deeper than 8 levels");
    char *long_string = malloc(2000);
    CHECK(long_string != NULL);
    snprintf(long_string, 2000, "{\"policy_format\": 1, \"about\": \"%01100d\"}", 0);
    POLICY(long_string, "about: a string of 1100 bytes, over the limit of 1024 bytes");
    free(long_string);
    char *many = malloc(20000);
    CHECK(many != NULL);
    size_t at = (size_t)sprintf(many, "{\"policy_format\": 1, \"labels\": {\"required\": [");
    for (int i = 0; i < 1100; i++) at += (size_t)sprintf(many + at, "%s\"l%d\"", i ? "," : "", i);
    sprintf(many + at, "]}}");
    POLICY(many, "labels.required: more than 1024 items");
    free(many);
}

/* Installs onnx.offline (channel "onnx": the invented ONNX classifier, `image` float32
 * [N, 3, 8, 8] in, `species` float32 [N, 6] out, opset 13, float weights, six labels, metadata
 * preprocess.colour_order "rgb") into a fresh store with policy document `members` (inside
 * {"policy_format": 1, ...}) and app version `app_version`; expects `want` and a message
 * holding `part`, and nothing installed unless `want` is AMPOULE_OK. */
static void install_onnx(const char *name, const char *app_version, const char *members,
                         int32_t want, const char *part) {
    char policy[4096];
    snprintf(policy, sizeof policy, "{\"policy_format\": 1, %s}", members);
    ampoule_error err;
    ampoule_store store = {0};
    ampoule_role_keys keys = {key, sizeof key, 1};
    const char *dir = store_dir(name);
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), "onnx", 4, &keys, &keys, &keys,
                                               app_version, strlen(app_version),
                                               (const uint8_t *)policy, strlen(policy),
                                               (int64_t)time(NULL), &store, &err),
           AMPOULE_OK, &err, NULL);
    ampoule_outcome outcome;
    int32_t status = install(store, "onnx.offline", &outcome, &err);
    if (status != want) fail(__LINE__, "policy %s: status %s, not %s: %.*s", members,
                             ampoule_status_name(status), ampoule_status_name(want),
                             (int)err.message_len, (const char *)err.message);
    EXPECT(status, want, &err, part);
    ampoule_release current = {0};
    EXPECT(ampoule_current(store, &current, &err), AMPOULE_OK, &err, NULL);
    if (want == AMPOULE_OK) {
        CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED && current.id != 0);
        release_free(outcome.installed);
        release_free(current);
    } else {
        CHECK(outcome.kind == (want == AMPOULE_NEEDS_OTHER_APP ? AMPOULE_OUTCOME_NEEDS_OTHER_APP
                                                               : AMPOULE_OUTCOME_REFUSED));
        CHECK(outcome.installed.id == 0 && current.id == 0);
    }
    store_free(store);
}

/* One bundle refused per setting of the policy document (FORMAT.md, "The policy document":
 * every key of its table), each with its status, from C; the document stating every setting
 * the bundle fits installs it. The app's own version, which the document leaves to the caller,
 * is checked too. */
static void case_policy_settings(void) {
    install_onnx("fits", "2.3.0",
                 "\"about\": \"every setting, all of them fitting\", \"bundle_name\": "
                 "\"trailcam-species\", \"max_bundle_bytes\": 10000000, \"max_unpacked_bytes\": "
                 "10000000, \"model\": {\"format\": \"onnx\", \"max_opset\": 13, \"weights_8bit\": "
                 "false, \"inputs\": [{\"name\": \"image\", \"dtype\": \"float32\", \"shape\": "
                 "\"[*, 3, 8, 8]\"}], \"outputs\": [{\"name\": \"species\", \"dtype\": "
                 "\"float32\", \"shape\": \"[*, 6]\"}], \"classifier_output\": \"species\", "
                 "\"class_dim\": 1}, \"labels\": {\"min_count\": 6, \"max_count\": 6, "
                 "\"required\": [\"empty frame\", \"fox\"]}, \"metadata\": "
                 "{\"preprocess.colour_order\": \"rgb\", \"eval.top1\": 0.91}",
                 AMPOULE_OK, NULL);
    static const struct {
        const char *members;
        int32_t status;
        const char *part;
    } cases[] = {
        {"\"bundle_name\": \"trailcam-birds\"", AMPOULE_POLICY,
         "feed offers bundle 'trailcam-species' but this app accepts only 'trailcam-birds'"},
        {"\"max_bundle_bytes\": 1000", AMPOULE_TOO_LARGE,
         ".ampoule' is 17920 bytes, over the limit of 1000 bytes"},
        /* The library's kind for the unpacked size is policy, not too_large: as it is. */
        {"\"max_unpacked_bytes\": 1000", AMPOULE_POLICY,
         "bundle unpacks to 13043 bytes, over this app's limit of 1000 bytes"},
        {"\"model\": {\"format\": \"safetensors\"}", AMPOULE_INCOMPATIBLE,
         "the model is onnx, the app expects safetensors"},
        {"\"model\": {\"max_opset\": 12}", AMPOULE_INCOMPATIBLE,
         "the model needs onnx opset 13, the app supports at most 12"},
        {"\"model\": {\"weights_8bit\": true}", AMPOULE_INCOMPATIBLE,
         "the model's weights are not 8-bit, the app expects 8-bit weights"},
        {"\"model\": {\"inputs\": [{\"name\": \"frame\"}]}", AMPOULE_INCOMPATIBLE,
         "the model has no input 'frame' (its inputs: 'image')"},
        {"\"model\": {\"inputs\": [{\"name\": \"image\", \"dtype\": \"uint8\"}]}",
         AMPOULE_INCOMPATIBLE, "input 'image' has dtype float32, the app expects uint8"},
        {"\"model\": {\"inputs\": [{\"name\": \"image\", \"shape\": \"[*, 3, 96, 96]\"}]}",
         AMPOULE_INCOMPATIBLE,
         "input 'image' has shape [N, 3, 8, 8], the app expects [*, 3, 96, 96]: dimension 2 is "
         "8, not 96"},
        {"\"model\": {\"outputs\": [{\"name\": \"scores\"}]}", AMPOULE_INCOMPATIBLE,
         "the model has no output 'scores' (its outputs: 'species')"},
        {"\"model\": {\"outputs\": [{\"name\": \"species\", \"dtype\": \"float16\"}]}",
         AMPOULE_INCOMPATIBLE, "output 'species' has dtype float32, the app expects float16"},
        {"\"model\": {\"outputs\": [{\"name\": \"species\", \"shape\": \"[*, 7]\"}]}",
         AMPOULE_INCOMPATIBLE,
         "output 'species' has shape [N, 6], the app expects [*, 7]: dimension 1 is 6, not 7"},
        {"\"model\": {\"classifier_output\": \"image\"}", AMPOULE_INCOMPATIBLE,
         "the model has no output 'image' (its outputs: 'species')"},
        {"\"model\": {\"classifier_output\": \"species\", \"class_dim\": 0}",
         AMPOULE_INCOMPATIBLE,
         "output 'species' has shape [N, 6]: its class dimension 0 is N, not a fixed size"},
        {"\"labels\": {\"min_count\": 7}", AMPOULE_INCOMPATIBLE,
         "the label list has 6 labels, the app accepts 7 to 100000"},
        {"\"labels\": {\"max_count\": 5}", AMPOULE_INCOMPATIBLE,
         "the label list has 6 labels, the app accepts 0 to 5"},
        {"\"labels\": {\"required\": [\"wolf\"]}", AMPOULE_INCOMPATIBLE,
         "the label list lacks 'wolf', which the app requires"},
        {"\"metadata\": {\"preprocess.colour_order\": \"bgr\"}", AMPOULE_INCOMPATIBLE,
         "the bundle's metadata has preprocess.colour_order = \"rgb\", the app requires \"bgr\""},
        {"\"metadata\": {\"eval.top1\": 0.95}", AMPOULE_INCOMPATIBLE,
         "the bundle's metadata has eval.top1 = 0.91, the app requires 0.95"},
        {"\"metadata\": {\"preprocess.mean\": [0.5]}", AMPOULE_INCOMPATIBLE,
         "the bundle's metadata has no preprocess.mean"},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        char name[32];
        snprintf(name, sizeof name, "setting-%zu", i);
        install_onnx(name, "2.3.0", cases[i].members, cases[i].status, cases[i].part);
    }
    /* The app's version outside the bundle's requires_app (>=2.0.0, <3.0.0). */
    install_onnx("app-version", "3.0.0", "\"about\": \"no setting\"", AMPOULE_NEEDS_OTHER_APP,
                 "trailcam-species 1.2.0 requires app >=2.0.0, <3.0.0, and this app is 3.0.0");
}

/* ---- An update over HTTP, step by step, with the app's own (tiny) HTTP client ---- */

/* Where each piece of a response body goes; nonzero stops the transfer. */
typedef int (*sink_fn)(void *ctx, const uint8_t *bytes, size_t len);

/* GET url from the test server (http://127.0.0.1:PORT/path), asking for bytes from..to
 * (inclusive) when ranged; each piece of the body goes to sink, at most max bytes in all.
 * Returns the HTTP status, or -1 when the transfer failed, was over max, or sink stopped it. */
static int http_get(const char *url, int ranged, uint64_t from, uint64_t to, uint64_t max,
                    sink_fn sink, void *ctx) {
    const char *prefix = "http://127.0.0.1:";
    if (strncmp(url, prefix, strlen(prefix)) != 0) fail(__LINE__, "not the test server: %s", url);
    char *path = NULL;
    long port = strtol(url + strlen(prefix), &path, 10);
    CHECK(port > 0 && port < 65536 && *path == '/');
    int fd = socket(AF_INET, SOCK_STREAM, 0);
    CHECK(fd >= 0);
    struct sockaddr_in addr;
    memset(&addr, 0, sizeof addr);
    addr.sin_family = AF_INET;
    addr.sin_port = htons((uint16_t)port);
    CHECK(inet_pton(AF_INET, "127.0.0.1", &addr.sin_addr) == 1);
    if (connect(fd, (struct sockaddr *)&addr, sizeof addr) != 0) {
        close(fd);
        return -1;
    }
    char request[8192];
    int n = ranged ? snprintf(request, sizeof request,
                              "GET %s HTTP/1.0\r\nHost: 127.0.0.1\r\nRange: bytes=%llu-%llu\r\n\r\n",
                              path, (unsigned long long)from, (unsigned long long)to)
                   : snprintf(request, sizeof request, "GET %s HTTP/1.0\r\nHost: 127.0.0.1\r\n\r\n",
                              path);
    CHECK(n > 0 && (size_t)n < sizeof request);
    CHECK(send(fd, request, (size_t)n, 0) == n);
    /* The status line and headers, then the body as it arrives. */
    static char head[16384];
    size_t have = 0;
    char *body = NULL;
    int status = -1;
    uint64_t total = 0;
    uint8_t piece[16384];
    for (;;) {
        ssize_t got = recv(fd, body ? (char *)piece : head + have,
                           body ? sizeof piece : sizeof head - 1 - have, 0);
        if (got < 0) {
            status = -1;
            break;
        }
        if (got == 0) break;
        if (!body) {
            have += (size_t)got;
            head[have] = 0;
            char *end = strstr(head, "\r\n\r\n");
            if (!end) {
                CHECK(have < sizeof head - 1);
                continue;
            }
            CHECK(sscanf(head, "HTTP/1.%*d %d", &status) == 1);
            body = end + 4;
            size_t first = have - (size_t)(body - head);
            total = first;
            if (total > max || (first && sink(ctx, (const uint8_t *)body, first) != 0)) {
                status = -1;
                break;
            }
            continue;
        }
        total += (uint64_t)got;
        if (total > max || sink(ctx, piece, (size_t)got) != 0) {
            status = -1;
            break;
        }
    }
    close(fd);
    return status;
}

/* A document in memory. */
struct buffer {
    uint8_t *data;
    size_t len;
};

static int to_buffer(void *ctx, const uint8_t *bytes, size_t len) {
    struct buffer *b = ctx;
    uint8_t *grown = realloc(b->data, b->len + len);
    CHECK(grown != NULL);
    memcpy(grown + b->len, bytes, len);
    b->data = grown;
    b->len += len;
    return 0;
}

static const char *server(void) {
    const char *addr = getenv("AMPOULE_TEST_SERVER");
    if (!addr) fail(__LINE__, "AMPOULE_TEST_SERVER is not set (tests/c_api.rs sets it)");
    return addr;
}

/* The channel the HTTP cases follow. */
static const char *channel = "stable";

static const char *feed_url(void) {
    static char url[256];
    snprintf(url, sizeof url, "http://%s/feeds/%s.json", server(), channel);
    return url;
}

/* What one update over HTTP did, and what the "app" should do wrong on purpose. */
struct plan {
    /* what to do */
    int tamper;              /* flip one bit of the first piece of the download */
    uint64_t stop_after;     /* end the download with ampoule_update_fail after this many bytes */
    /* what happened */
    int fetches, downloads;
    uint64_t first_offset;   /* step.offset of the first DOWNLOAD step */
    uint64_t offsets[4], sizes[4]; /* of the first four DOWNLOAD steps */
    ampoule_session session; /* kept open (not freed) when keep_session is set */
    int keep_session;
};

struct download {
    ampoule_session session;
    struct plan *plan;
    uint64_t written;
    int32_t status; /* the first write's failure */
};

static int to_session(void *ctx, const uint8_t *bytes, size_t len) {
    struct download *d = ctx;
    struct plan *plan = d->plan;
    uint8_t copy[16384];
    CHECK(len <= sizeof copy);
    memcpy(copy, bytes, len);
    if (plan->tamper && d->written == 0 && len > 0) copy[len / 2] ^= 0x01;
    if (plan->stop_after && d->written + len > plan->stop_after) {
        len = (size_t)(plan->stop_after - d->written);
    }
    ampoule_error err;
    int32_t status = ampoule_update_write(d->session, copy, len, &err);
    if (status != AMPOULE_OK) {
        d->status = status;
        return 1;
    }
    d->written += len;
    return plan->stop_after && d->written >= plan->stop_after;
}

static char *session_url(ampoule_session session, size_t index) {
    static char url[4096];
    size_t len = 0;
    ampoule_error err;
    EXPECT(ampoule_update_url(session, index, (uint8_t *)url, sizeof url - 1, &len, &err),
           AMPOULE_OK, &err, NULL);
    url[len] = 0;
    return url;
}

/* Fetches the channel's feed, as the app does before it starts a session. */
static struct buffer fetch_feed(void) {
    struct buffer feed = {NULL, 0};
    CHECK(http_get(feed_url(), 0, 0, 0, 64 * 1024, to_buffer, &feed) == 200);
    return feed;
}

/* Runs one update over HTTP to its end: the status of the last call, *outcome its outcome,
 * err its error. */
static int32_t update_over_http(ampoule_store store, struct plan *plan, ampoule_outcome *outcome,
                                ampoule_error *err) {
    struct buffer feed = fetch_feed();
    ampoule_session session = {0};
    const char *url = feed_url();
    EXPECT(ampoule_update_begin(store, url, strlen(url), feed.data, feed.len, (int64_t)time(NULL),
                                &session, err),
           AMPOULE_OK, err, NULL);
    free(feed.data);
    CHECK(session.id != 0);
    plan->session = session;
    int32_t status;
    for (;;) {
        ampoule_step step = {0};
        status = ampoule_update_next(session, &step, err);
        if (step.kind == AMPOULE_STEP_DONE) {
            *outcome = step.outcome;
            break;
        }
        EXPECT(status, AMPOULE_OK, err, NULL);
        if (step.kind == AMPOULE_STEP_FETCH) {
            plan->fetches++;
            CHECK(step.url_count == 1);
            struct buffer doc = {NULL, 0};
            int http = http_get(session_url(session, 0), 0, 0, 0, step.max_bytes, to_buffer, &doc);
            if (http != 200) {
                free(doc.data);
                status = ampoule_update_fail(session, "the server failed", 17, outcome, err);
                break;
            }
            EXPECT(ampoule_update_provide(session, doc.data, doc.len, err), AMPOULE_OK, err, NULL);
            free(doc.data);
        } else if (step.kind == AMPOULE_STEP_DOWNLOAD) {
            if (plan->downloads < 4) {
                plan->offsets[plan->downloads] = step.offset;
                plan->sizes[plan->downloads] = step.size;
            }
            if (plan->downloads++ == 0) plan->first_offset = step.offset;
            CHECK(step.url_count >= 1 && step.size > step.offset);
            struct download d = {session, plan, step.offset, AMPOULE_OK};
            /* Always a Range request: the step may ask for the bundle's head only. */
            int http = http_get(session_url(session, 0), 1, step.offset, step.size - 1,
                                step.size - step.offset, to_session, &d);
            CHECK(d.status == AMPOULE_OK);
            if (!(http == 206 || (http == 200 && step.offset == 0)) || d.written != step.size) {
                status = ampoule_update_fail(session, "connection lost", 15, outcome, err);
                break;
            }
            EXPECT(ampoule_update_downloaded(session, err), AMPOULE_OK, err, NULL);
        } else {
            fail(__LINE__, "unknown step kind %d", step.kind);
        }
    }
    if (!plan->keep_session) {
        ampoule_error free_err;
        EXPECT(ampoule_session_free(session, &free_err), AMPOULE_OK, &free_err, NULL);
    }
    return status;
}

/* A store that installed 1.0.0 from an offline file catches up over HTTP: the session asks for
 * the ledger's consistency steps and the bundle of 1.1.0, which installs; the next update finds
 * nothing newer; rolling back returns to 1.0.0. */
static void case_http_update(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", "policy-fits.json");
    ampoule_outcome outcome;
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    release_free(outcome.installed);

    struct plan plan = {0};
    EXPECT(update_over_http(store, &plan, &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    CHECK(plan.fetches >= 1 && plan.downloads == 1 && plan.first_offset == 0);
    ampoule_release release = outcome.installed;
    CHECK(strcmp(field(release, AMPOULE_FIELD_VERSION), "1.1.0") == 0);
    size_t count = 0;
    EXPECT(ampoule_release_label_count(release, &count, &err), AMPOULE_OK, &err, NULL);
    CHECK(count == 6);
    CHECK(strcmp(metadata(release, "preprocess.colour_order"), "\"rgb\"") == 0);
    const char *model = field(release, AMPOULE_FIELD_MODEL_PATH);
    struct stat st;
    CHECK(stat(model, &st) == 0 && st.st_size == 40000);
    release_free(release);

    struct plan again = {0};
    EXPECT(update_over_http(store, &again, &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_UP_TO_DATE && again.downloads == 0);

    ampoule_release back = {0};
    EXPECT(ampoule_rollback(store, &back, &err), AMPOULE_OK, &err, NULL);
    CHECK(strcmp(field(back, AMPOULE_FIELD_VERSION), "1.0.0") == 0);
    release_free(back);
    store_free(store);
}

/* A store following the channel "large", whose bundle (2.9.0) is larger than its head. */
static ampoule_store open_large(void) {
    ampoule_error err;
    ampoule_store store = {0};
    ampoule_role_keys keys = {key, sizeof key, 1};
    const char *dir = store_dir("camera");
    channel = "large";
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), channel, strlen(channel), &keys,
                                               &keys, &keys, "2.3.0", 5, NULL, 0,
                                               (int64_t)time(NULL), &store, &err),
           AMPOULE_OK, &err, NULL);
    return store;
}

/* A bundle larger than its head (274 KiB): the session asks for the head first, checks its
 * signed manifest, then asks for the rest into the same file from where the head ended (an HTTP
 * Range request), and installs. */
static void case_http_head_first(void) {
    ampoule_error err;
    ampoule_store store = open_large();
    ampoule_outcome outcome;
    struct plan plan = {0};
    EXPECT(update_over_http(store, &plan, &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    CHECK(plan.downloads == 2 && plan.offsets[0] == 0);
    CHECK(plan.offsets[1] == plan.sizes[0] && plan.sizes[1] > plan.sizes[0]);
    CHECK(plan.sizes[0] <= 274 * 1024 && plan.sizes[1] > 300000);
    CHECK(strcmp(field(outcome.installed, AMPOULE_FIELD_VERSION), "2.9.0") == 0);
    release_free(outcome.installed);
    store_free(store);
}

/* A download cut off: the update fails with AMPOULE_NETWORK and keeps what arrived; the next
 * update asks for the rest only (an HTTP Range request) and installs. */
static void case_http_resume(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", NULL);
    ampoule_outcome outcome;
    struct plan cut = {0};
    cut.stop_after = 2000;
    EXPECT(update_over_http(store, &cut, &outcome, &err), AMPOULE_NETWORK, &err,
           "connection lost");
    CHECK(outcome.kind == AMPOULE_OUTCOME_FAILED && cut.downloads == 1);
    ampoule_release current = {5};
    EXPECT(ampoule_current(store, &current, &err), AMPOULE_OK, &err, NULL);
    CHECK(current.id == 0);

    struct plan rest = {0};
    EXPECT(update_over_http(store, &rest, &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    CHECK(rest.downloads == 1 && rest.first_offset == 2000);
    CHECK(strcmp(field(outcome.installed, AMPOULE_FIELD_VERSION), "1.1.0") == 0);
    release_free(outcome.installed);
    store_free(store);
}

/* A bundle changed in transit: refused by its SHA-256 before it is opened; nothing installed. */
static void case_http_tampered(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", NULL);
    ampoule_outcome outcome;
    struct plan plan = {0};
    plan.tamper = 1;
    EXPECT(update_over_http(store, &plan, &outcome, &err), AMPOULE_DIGEST, &err,
           "but the feed declares");
    CHECK(outcome.kind == AMPOULE_OUTCOME_REFUSED && outcome.installed.id == 0);
    ampoule_release current = {5};
    EXPECT(ampoule_current(store, &current, &err), AMPOULE_OK, &err, NULL);
    CHECK(current.id == 0);
    store_free(store);
}

/* A bundle the app's policy document refuses, over HTTP: refused, nothing installed. */
static void case_http_policy_refused(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", "policy-refuses.json");
    ampoule_outcome outcome;
    struct plan plan = {0};
    EXPECT(update_over_http(store, &plan, &outcome, &err), AMPOULE_INCOMPATIBLE, &err,
           "the label list lacks 'wolf', which the app requires");
    CHECK(outcome.kind == AMPOULE_OUTCOME_REFUSED);
    store_free(store);
}

/* A session holds the store's update lock until it is freed: a second session (through another
 * handle on the same directory) ends LOCKED, and so does an offline install; reading the current
 * release does not wait. Once the first is freed, an update runs. */
static void case_session_locks_the_store(void) {
    ampoule_error err;
    ampoule_store first = open_ok("camera", NULL);
    ampoule_store second = open_ok("camera", NULL);
    struct buffer feed = fetch_feed();
    const char *url = feed_url();
    ampoule_session holding = {0}, waiting = {0};
    EXPECT(ampoule_update_begin(first, url, strlen(url), feed.data, feed.len, (int64_t)time(NULL),
                                &holding, &err),
           AMPOULE_OK, &err, NULL);
    EXPECT(ampoule_update_begin(second, url, strlen(url), feed.data, feed.len,
                                (int64_t)time(NULL), &waiting, &err),
           AMPOULE_OK, &err, NULL);
    free(feed.data);
    ampoule_step step;
    EXPECT(ampoule_update_next(waiting, &step, &err), AMPOULE_LOCKED, &err,
           "another update is running on store");
    CHECK(step.kind == AMPOULE_STEP_DONE && step.outcome.kind == AMPOULE_OUTCOME_FAILED);
    ampoule_outcome outcome;
    EXPECT(install(first, "v1.offline", &outcome, &err), AMPOULE_LOCKED, &err, NULL);
    EXPECT(install(second, "v1.offline", &outcome, &err), AMPOULE_LOCKED, &err, NULL);
    ampoule_release current = {5};
    EXPECT(ampoule_current(second, &current, &err), AMPOULE_OK, &err, NULL);
    CHECK(current.id == 0);
    /* The holding session goes as far as its download, then is freed unanswered. */
    EXPECT(ampoule_update_next(holding, &step, &err), AMPOULE_OK, &err, NULL);
    CHECK(step.kind == AMPOULE_STEP_DOWNLOAD);
    EXPECT(ampoule_session_free(holding, &err), AMPOULE_OK, &err, NULL);
    EXPECT(ampoule_session_free(waiting, &err), AMPOULE_OK, &err, NULL);

    struct plan plan = {0};
    EXPECT(update_over_http(second, &plan, &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    release_free(outcome.installed);
    store_free(first);
    store_free(second);
}

/* What a progress callback saw. */
struct seen {
    int calls, unpack_calls, download_calls, other_stages;
    uint64_t last_done, last_total;
};

static void count_progress(void *context, int32_t stage, uint64_t done, uint64_t total) {
    struct seen *seen = context;
    seen->calls++;
    if (stage == AMPOULE_STAGE_UNPACK) seen->unpack_calls++;
    else if (stage == AMPOULE_STAGE_DOWNLOAD) seen->download_calls++;
    else if (stage != AMPOULE_STAGE_HASH_PAYLOAD) seen->other_stages++;
    if (done > total) fail(__LINE__, "progress %llu of %llu", (unsigned long long)done,
                           (unsigned long long)total);
    seen->last_done = done;
    seen->last_total = total;
}

/* Progress: the callback hears an offline install (the bundle copied out of the file, then
 * unpacked), ending at its total, with the context it was given; cleared, it hears nothing
 * more. Device id: made on first use, kept in the store, the same through another handle. */
static void case_progress_and_device_id(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", NULL);
    struct seen seen = {0};
    EXPECT(ampoule_store_set_progress(store, count_progress, &seen, &err), AMPOULE_OK, &err, NULL);
    ampoule_outcome outcome;
    EXPECT(install(store, "v1.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    release_free(outcome.installed);
    /* The bundle copied out of the offline file counts as its download. */
    CHECK(seen.download_calls > 0 && seen.unpack_calls > 0 && seen.other_stages == 0);
    CHECK(seen.last_total > 0 && seen.last_done == seen.last_total);
    EXPECT(ampoule_store_set_progress(store, NULL, NULL, &err), AMPOULE_OK, &err, NULL);
    int before = seen.calls;
    EXPECT(install(store, "v2.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    release_free(outcome.installed);
    CHECK(seen.calls == before);
    ampoule_store foreign = {0x5254000000000001ull};
    EXPECT(ampoule_store_set_progress(foreign, count_progress, &seen, &err),
           AMPOULE_INVALID_HANDLE, &err, "the store handle is not a live handle");

    char id[256], again[256];
    size_t len = 0, again_len = 0;
    EXPECT(ampoule_device_id(store, (uint8_t *)id, sizeof id, &len, &err), AMPOULE_OK, &err, NULL);
    CHECK(len > 0 && len <= 128);
    ampoule_store other = open_ok("camera", NULL);
    EXPECT(ampoule_device_id(other, (uint8_t *)again, sizeof again, &again_len, &err), AMPOULE_OK,
           &err, NULL);
    CHECK(again_len == len && memcmp(id, again, len) == 0);
    ampoule_store elsewhere = open_ok("another-camera", NULL);
    EXPECT(ampoule_device_id(elsewhere, (uint8_t *)again, sizeof again, &again_len, &err),
           AMPOULE_OK, &err, NULL);
    CHECK(!(again_len == len && memcmp(id, again, len) == 0));
    store_free(elsewhere);
    store_free(other);
    store_free(store);
}

/* Switching channels: a store that follows "stable" refuses the other channel's file until the
 * handle opened on that channel switches it. Garbage collection while a session downloads
 * leaves the session's file alone (the download completes and installs), and runs after. */
static void case_switch_channel_and_gc(void) {
    ampoule_error err;
    ampoule_store stable = open_ok("camera", NULL);
    ampoule_outcome outcome;
    EXPECT(install(stable, "v1.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    release_free(outcome.installed);

    /* A session midway through its download; gc runs beside it. */
    struct buffer feed = fetch_feed();
    const char *url = feed_url();
    ampoule_session session = {0};
    EXPECT(ampoule_update_begin(stable, url, strlen(url), feed.data, feed.len, (int64_t)time(NULL),
                                &session, &err),
           AMPOULE_OK, &err, NULL);
    free(feed.data);
    ampoule_step step = {0};
    do {
        EXPECT(ampoule_update_next(session, &step, &err), AMPOULE_OK, &err, NULL);
        if (step.kind == AMPOULE_STEP_FETCH) {
            struct buffer doc = {NULL, 0};
            CHECK(http_get(session_url(session, 0), 0, 0, 0, step.max_bytes, to_buffer, &doc) ==
                  200);
            EXPECT(ampoule_update_provide(session, doc.data, doc.len, &err), AMPOULE_OK, &err,
                   NULL);
            free(doc.data);
        }
    } while (step.kind == AMPOULE_STEP_FETCH);
    CHECK(step.kind == AMPOULE_STEP_DOWNLOAD && step.offset == 0);
    struct buffer bundle = {NULL, 0};
    CHECK(http_get(session_url(session, 0), 0, 0, 0, step.size, to_buffer, &bundle) == 200);
    CHECK(bundle.len == step.size);
    size_t half = bundle.len / 2;
    EXPECT(ampoule_update_write(session, bundle.data, half, &err), AMPOULE_OK, &err, NULL);
    size_t removed = 99;
    EXPECT(ampoule_gc(stable, &removed, &err), AMPOULE_OK, &err, NULL);
    CHECK(removed != 99);
    EXPECT(ampoule_update_write(session, bundle.data + half, bundle.len - half, &err), AMPOULE_OK,
           &err, NULL);
    free(bundle.data);
    EXPECT(ampoule_update_downloaded(session, &err), AMPOULE_OK, &err, NULL);
    EXPECT(ampoule_update_next(session, &step, &err), AMPOULE_OK, &err, NULL);
    CHECK(step.kind == AMPOULE_STEP_DONE && step.outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    CHECK(strcmp(field(step.outcome.installed, AMPOULE_FIELD_VERSION), "1.1.0") == 0);
    release_free(step.outcome.installed);
    EXPECT(ampoule_session_free(session, &err), AMPOULE_OK, &err, NULL);

    ampoule_store onnx = {0};
    ampoule_role_keys keys = {key, sizeof key, 1};
    const char *dir = store_dir("camera");
    EXPECT(ampoule_store_open_with_pinned_keys(dir, strlen(dir), "onnx", 4, &keys, &keys, &keys,
                                               "2.3.0", 5, NULL, 0, (int64_t)time(NULL), &onnx,
                                               &err),
           AMPOULE_OK, &err, NULL);
    EXPECT(install(onnx, "onnx.offline", &outcome, &err), AMPOULE_POLICY, &err,
           "follows channel 'stable', not 'onnx'");
    EXPECT(ampoule_switch_channel(onnx, &err), AMPOULE_OK, &err, NULL);
    EXPECT(install(onnx, "onnx.offline", &outcome, &err), AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    CHECK(strcmp(field(outcome.installed, AMPOULE_FIELD_VERSION), "1.2.0") == 0);
    release_free(outcome.installed);
    EXPECT(install(stable, "v2.offline", &outcome, &err), AMPOULE_POLICY, &err,
           "follows channel 'onnx', not 'stable'");

    EXPECT(ampoule_gc(stable, NULL, &err), AMPOULE_INVALID_ARGUMENT, &err,
           "removed is a null pointer");
    removed = 99;
    EXPECT(ampoule_gc(stable, &removed, &err), AMPOULE_OK, &err, NULL);
    CHECK(removed != 99);
    /* The current release still checks in full after the clean-up. */
    ampoule_release current = {0};
    EXPECT(ampoule_current(stable, &current, &err), AMPOULE_OK, &err, NULL);
    CHECK(strcmp(field(current, AMPOULE_FIELD_VERSION), "1.2.0") == 0);
    release_free(current);
    store_free(onnx);
    store_free(stable);
}

/* The URL update with the library's own HTTP client (the test links a library built with
 * `fetch`): it installs 1.1.0 from the server, reporting its progress, finds nothing newer
 * next time, fails with AMPOULE_NETWORK on a feed the server does not have, and refuses a null
 * URL. */
static void case_url_update(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", "policy-fits.json");
    struct seen seen = {0};
    EXPECT(ampoule_store_set_progress(store, count_progress, &seen, &err), AMPOULE_OK, &err, NULL);
    ampoule_outcome outcome;
    const char *url = feed_url();
    EXPECT(ampoule_update(store, url, strlen(url), (int64_t)time(NULL), &outcome, &err),
           AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    /* The library's own client reports the download, then the unpacking. */
    CHECK(seen.download_calls > 0 && seen.unpack_calls > 0 && seen.other_stages == 0);
    CHECK(seen.last_done == seen.last_total);
    CHECK(strcmp(field(outcome.installed, AMPOULE_FIELD_VERSION), "1.1.0") == 0);
    CHECK(strcmp(metadata(outcome.installed, "eval.top1"), "0.91") == 0);
    release_free(outcome.installed);
    EXPECT(ampoule_update(store, url, strlen(url), (int64_t)time(NULL), &outcome, &err),
           AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_UP_TO_DATE);

    char missing[256];
    snprintf(missing, sizeof missing, "http://%s/feeds/no-such-channel.json", server());
    EXPECT(ampoule_update(store, missing, strlen(missing), (int64_t)time(NULL), &outcome, &err),
           AMPOULE_NETWORK, &err, "404");
    CHECK(outcome.kind == AMPOULE_OUTCOME_FAILED);
    EXPECT(ampoule_update(store, NULL, 0, (int64_t)time(NULL), &outcome, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "feed_url is empty");
    EXPECT(ampoule_update(store, url, strlen(url), (int64_t)time(NULL), NULL, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "out is a null pointer");
    store_free(store);
}

/* A listening socket on a free port of 127.0.0.1 that never answers: connections open (the
 * kernel's backlog accepts them) and then hear nothing. */
static int silent_listener(int *port) {
    int fd = socket(AF_INET, SOCK_STREAM, 0);
    CHECK(fd >= 0);
    struct sockaddr_in addr = {0};
    addr.sin_family = AF_INET;
    addr.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
    CHECK(bind(fd, (struct sockaddr *)&addr, sizeof addr) == 0);
    CHECK(listen(fd, 16) == 0);
    socklen_t len = sizeof addr;
    CHECK(getsockname(fd, (struct sockaddr *)&addr, &len) == 0);
    *port = ntohs(addr.sin_port);
    return fd;
}

/* What the cancelling progress callback saw. */
struct canceller {
    ampoule_store store;
    int download_calls;
    uint64_t first_done;
    int32_t cancel_status;
    size_t running;
};

/* On the first download report, asks the update that reports to stop (from its own thread,
 * as an app's cancel button would from another). */
static void cancel_on_download(void *context, int32_t stage, uint64_t done, uint64_t total) {
    (void)total;
    struct canceller *c = context;
    if (stage != AMPOULE_STAGE_DOWNLOAD) return;
    if (c->download_calls++ == 0) {
        c->first_done = done;
        if (c->cancel_status < 0) {
            ampoule_error err;
            c->cancel_status = ampoule_update_cancel(c->store, &c->running, &err);
        }
    }
}

/* The URL update's limits and its cancel (`fetch`). Limits: against a server that accepts the
 * connection and never answers, a 200 ms read timeout and one try (with a total timeout of
 * UINT64_MAX ms, "no limit") give up at once with
 * AMPOULE_NETWORK, where the defaults (connect 20 s and read 30 s, three tries) would wait
 * minutes. Cancel: asked during the download of the large bundle, the update stops with
 * AMPOULE_CANCELLED and nothing installed; the next update resumes from the bytes kept (its first
 * report starts above zero) and installs. Misuse: a null limits, a foreign handle. */
static void case_url_limits_and_cancel(void) {
    ampoule_error err;
    ampoule_outcome outcome;
    ampoule_store store = open_large();

    int port = 0;
    int silent = silent_listener(&port);
    char stalled[128];
    snprintf(stalled, sizeof stalled, "http://127.0.0.1:%d/feeds/large.json", port);
    ampoule_transfer quick = {0};
    quick.connect_timeout_ms = 200;
    quick.read_timeout_ms = 200;
    quick.attempts_per_source = 1;
    quick.total_timeout_ms = UINT64_MAX; /* "no limit": taken as 366 days */
    EXPECT(ampoule_store_set_transfer(store, &quick, &err), AMPOULE_OK, &err, NULL);
    time_t started = time(NULL);
    EXPECT(ampoule_update(store, stalled, strlen(stalled), (int64_t)time(NULL), &outcome, &err),
           AMPOULE_NETWORK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_FAILED);
    /* Not a timing of the library: the defaults would take 50 s or more here. */
    CHECK(time(NULL) - started < 10);
    close(silent);
    EXPECT(ampoule_store_set_transfer(store, NULL, &err), AMPOULE_INVALID_ARGUMENT, &err,
           "limits is a null pointer");
    ampoule_store foreign = {0x5254000000000001ull};
    EXPECT(ampoule_store_set_transfer(foreign, &quick, &err), AMPOULE_INVALID_HANDLE, &err,
           "the store handle is not a live handle");
    ampoule_transfer defaults = {0};
    EXPECT(ampoule_store_set_transfer(store, &defaults, &err), AMPOULE_OK, &err, NULL);

    /* Nothing runs: a cancel asks no one, and the next update is not cancelled by it. */
    size_t running = 99;
    EXPECT(ampoule_update_cancel(store, &running, &err), AMPOULE_OK, &err, NULL);
    CHECK(running == 0);
    EXPECT(ampoule_update_cancel(store, NULL, &err), AMPOULE_OK, &err, NULL);
    EXPECT(ampoule_update_cancel(foreign, NULL, &err), AMPOULE_INVALID_HANDLE, &err,
           "the store handle is not a live handle");

    const char *url = feed_url();
    struct canceller c = {store, 0, 0, -1, 0};
    EXPECT(ampoule_store_set_progress(store, cancel_on_download, &c, &err), AMPOULE_OK, &err, NULL);
    EXPECT(ampoule_update(store, url, strlen(url), (int64_t)time(NULL), &outcome, &err),
           AMPOULE_CANCELLED, &err, "cancelled");
    CHECK(outcome.kind == AMPOULE_OUTCOME_FAILED);
    CHECK(c.cancel_status == AMPOULE_OK && c.running == 1);
    ampoule_release current = {1};
    EXPECT(ampoule_current(store, &current, &err), AMPOULE_OK, &err, NULL);
    CHECK(current.id == 0);

    struct canceller again = {store, 0, 0, AMPOULE_OK, 0};
    EXPECT(ampoule_store_set_progress(store, cancel_on_download, &again, &err), AMPOULE_OK, &err,
           NULL);
    EXPECT(ampoule_update(store, url, strlen(url), (int64_t)time(NULL), &outcome, &err),
           AMPOULE_OK, &err, NULL);
    CHECK(outcome.kind == AMPOULE_OUTCOME_INSTALLED);
    CHECK(again.download_calls > 0 && again.first_done > 0);
    CHECK(strcmp(field(outcome.installed, AMPOULE_FIELD_VERSION), "2.9.0") == 0);
    release_free(outcome.installed);
    store_free(store);
}

/* Sessions misused: null pointers, answers to steps not asked, bytes past the size asked for,
 * freed, double-freed and other types' handles, a session driven after its end. */
static void case_session_misuse(void) {
    ampoule_error err;
    ampoule_store store = open_ok("camera", NULL);
    struct buffer feed = fetch_feed();
    const char *url = feed_url();
    ampoule_session session = {0};
    EXPECT(ampoule_update_begin(store, url, strlen(url), NULL, 0, 0, &session, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "feed is empty");
    EXPECT(ampoule_update_begin(store, url, strlen(url), feed.data, feed.len, (int64_t)time(NULL),
                                NULL, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "out is a null pointer");
    ampoule_store not_a_store = {0x5345000000000001ull};
    EXPECT(ampoule_update_begin(not_a_store, url, strlen(url), feed.data, feed.len,
                                (int64_t)time(NULL), &session, &err),
           AMPOULE_INVALID_HANDLE, &err, "the store handle is not a live handle");
    EXPECT(ampoule_update_begin(store, url, strlen(url), feed.data, feed.len, (int64_t)time(NULL),
                                &session, &err),
           AMPOULE_OK, &err, NULL);
    free(feed.data);
    EXPECT(ampoule_update_next(session, NULL, &err), AMPOULE_INVALID_ARGUMENT, &err,
           "step is a null pointer");
    EXPECT(ampoule_update_provide(session, (const uint8_t *)"{}", 2, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "the update asked for no document");
    EXPECT(ampoule_update_downloaded(session, &err), AMPOULE_INVALID_ARGUMENT, &err,
           "the update asked for no download");
    uint8_t buf[8];
    size_t len = 0;
    EXPECT(ampoule_update_url(session, 0, buf, sizeof buf, &len, &err), AMPOULE_INVALID_ARGUMENT,
           &err, "no step asks for a URL now");

    ampoule_step step;
    EXPECT(ampoule_update_next(session, &step, &err), AMPOULE_OK, &err, NULL);
    CHECK(step.kind == AMPOULE_STEP_DOWNLOAD && step.offset == 0 && step.url_count >= 1);
    /* The digest the step names is the bundle's own SHA-256, as the signed feed lists it. */
    CHECK(memcmp(step.sha256, (uint8_t[AMPOULE_SHA256_BYTES]){0}, AMPOULE_SHA256_BYTES) != 0);
    EXPECT(ampoule_update_url(session, step.url_count, buf, sizeof buf, &len, &err),
           AMPOULE_NOT_FOUND, &err, "is out of range");
    EXPECT(ampoule_update_provide(session, (const uint8_t *)"{}", 2, &err),
           AMPOULE_INVALID_ARGUMENT, &err, "answers a AMPOULE_STEP_FETCH step only");
    uint8_t *junk = calloc(1, (size_t)step.size + 1);
    CHECK(junk != NULL);
    EXPECT(ampoule_update_write(session, junk, (size_t)step.size + 1, &err), AMPOULE_TOO_LARGE,
           &err, "nothing was written");
    EXPECT(ampoule_update_write(session, NULL, 4, &err), AMPOULE_INVALID_ARGUMENT, &err,
           "bytes is a null pointer with length 4");
    free(junk);
    /* Not answered: the same step is asked again. */
    ampoule_step again;
    EXPECT(ampoule_update_next(session, &again, &err), AMPOULE_OK, &err, NULL);
    CHECK(again.kind == AMPOULE_STEP_DOWNLOAD && again.size == step.size && again.offset == 0);
    CHECK(memcmp(again.sha256, step.sha256, AMPOULE_SHA256_BYTES) == 0);
    ampoule_outcome outcome;
    EXPECT(ampoule_update_fail(session, "gave up", 7, &outcome, &err), AMPOULE_NETWORK, &err,
           "gave up");
    CHECK(outcome.kind == AMPOULE_OUTCOME_FAILED);
    EXPECT(ampoule_update_next(session, &step, &err), AMPOULE_SETTINGS, &err,
           "this update already ended; start another");
    CHECK(step.kind == AMPOULE_STEP_DONE && step.outcome.kind == AMPOULE_OUTCOME_FAILED);

    /* Handles: the session as a store, the store as a session, freed, double-freed. */
    ampoule_store session_as_store = {session.id};
    ampoule_session store_as_session = {store.id};
    ampoule_release current;
    EXPECT(ampoule_current(session_as_store, &current, &err), AMPOULE_INVALID_HANDLE, &err, NULL);
    EXPECT(ampoule_update_next(store_as_session, &step, &err), AMPOULE_INVALID_HANDLE, &err,
           "the session handle is not a live handle");
    EXPECT(ampoule_session_free(store_as_session, &err), AMPOULE_INVALID_HANDLE, &err, NULL);
    EXPECT(ampoule_session_free(session, &err), AMPOULE_OK, &err, NULL);
    EXPECT(ampoule_update_next(session, &step, &err), AMPOULE_INVALID_HANDLE, &err,
           "the session handle is not a live handle");
    EXPECT(ampoule_session_free(session, &err), AMPOULE_INVALID_HANDLE, &err, NULL);
    store_free(store);
}

int main(int argc, char **argv) {
    if (argc != 4) {
        fprintf(stderr, "usage: api_test CASE FIXTURES SCRATCH\n");
        return 2;
    }
    fixtures = argv[2];
    scratch = argv[3];
    size_t key_len = 0;
    uint8_t *raw = read_file("key.raw", &key_len);
    CHECK(key_len == sizeof key);
    memcpy(key, raw, sizeof key);
    free(raw);
    static const struct {
        const char *name;
        void (*run)(void);
    } cases[] = {
        {"abi", case_abi},
        {"lifecycle", case_lifecycle},
        {"trust_set", case_trust_set},
        {"tampered", case_tampered},
        {"policy_refused", case_policy_refused},
        {"null_pointers", case_null_pointers},
        {"non_utf8", case_non_utf8},
        {"mismatched_lengths", case_mismatched_lengths},
        {"freed_handles", case_freed_handles},
        {"foreign_handles", case_foreign_handles},
        {"two_updates_at_once", case_two_updates_at_once},
        {"policy_document_malformed", case_policy_document_malformed},
        {"policy_document_over_caps", case_policy_document_over_caps},
        {"policy_settings", case_policy_settings},
        {"http_update", case_http_update},
        {"http_resume", case_http_resume},
        {"http_head_first", case_http_head_first},
        {"http_tampered", case_http_tampered},
        {"http_policy_refused", case_http_policy_refused},
        {"session_locks_the_store", case_session_locks_the_store},
        {"session_misuse", case_session_misuse},
        {"url_update", case_url_update},
        {"url_limits_and_cancel", case_url_limits_and_cancel},
        {"progress_and_device_id", case_progress_and_device_id},
        {"switch_channel_and_gc", case_switch_channel_and_gc},
    };
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
        if (strcmp(cases[i].name, argv[1]) == 0) {
            cases[i].run();
            return 0;
        }
    }
    fprintf(stderr, "no case named %s\n", argv[1]);
    return 2;
}
