/* The C app without the verifier (issue 14, figure c): the same arguments, reading the key,
 * one line of output, as offline.c; it copies the offline file's first bytes unchecked. Its
 * size is the zero offline.c is measured against. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

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
    FILE *in = fopen(argv[2], "rb");
    if (!in) return 1;
    char buf[4096];
    size_t n = fread(buf, 1, sizeof buf, in);
    fclose(in);
    printf("copied %zu bytes unchecked\n", n);
    return 0;
}
