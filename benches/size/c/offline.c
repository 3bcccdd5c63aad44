/* The C app that opens a store and installs an offline file through the C interface (issue 14,
 * figure c): what linking the static library costs a C or C++ app, against baseline.c. One raw
 * Ed25519 key is pinned for every role. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "ampoule.h"

int main(int argc, char **argv) {
    if (argc != 5) {
        fprintf(stderr, "usage: STORE-DIR OFFLINE-FILE PUBLIC-KEY.raw APP-VERSION\n");
        return 2;
    }
    unsigned char key[32];
    FILE *k = fopen(argv[3], "rb");
    if (!k || fread(key, 1, sizeof key, k) != sizeof key) {
        fprintf(stderr, "error: %s: not a 32-byte raw key\n", argv[3]);
        return 2;
    }
    fclose(k);
    ampoule_error err;
    ampoule_store store;
    ampoule_role_keys keys = {key, sizeof key, 1};
    if (ampoule_store_open_with_pinned_keys(argv[1], strlen(argv[1]), "stable", 6, &keys, &keys,
                                            &keys, argv[4], strlen(argv[4]), NULL, 0,
                                            (int64_t)time(NULL), &store, &err) != AMPOULE_OK) {
        fprintf(stderr, "error: %s\n", (const char *)err.message);
        return 1;
    }
    ampoule_outcome outcome;
    int32_t status = ampoule_install_offline(store, argv[2], strlen(argv[2]), (int64_t)time(NULL),
                                             &outcome, &err);
    if (outcome.kind == AMPOULE_OUTCOME_INSTALLED) {
        char text[256];
        size_t len = 0;
        ampoule_release_field(outcome.installed, AMPOULE_FIELD_VERSION, (uint8_t *)text,
                              sizeof text - 1, &len, &err);
        text[len] = 0;
        printf("installed %s\n", text);
        ampoule_release_free(outcome.installed, &err);
    } else if (status != AMPOULE_OK) {
        fprintf(stderr, "error: %s\n", (const char *)err.message);
    }
    ampoule_store_free(store, &err);
    return status == AMPOULE_OK ? 0 : 1;
}
