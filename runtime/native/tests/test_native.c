/* C tests of the native runtime, run under AddressSanitizer + UndefinedBehaviorSanitizer by `make test`:
 *   test_native ADVERSARIAL_DIR BUNDLE_DIR [MUTATIONS]
 * 1. sha256 against the FIPS 180-2 example vectors;
 * 2. every file of the adversarial corpus is refused with a message naming it (no crash, no leak);
 * 3. every bundle in BUNDLE_DIR loads and answers (probabilities finite, summing to 1);
 * 4. MUTATIONS (default 3000) damaged copies of those bundles, most of them resealed with a valid checksum so that
 *    the structural checks meet the damage: each is refused with a message or loads and answers — never a crash. */
#include <dirent.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "bundle_impl.h"
#include "msgpack.h"

static int failures = 0;
#define CHECK(cond, ...)                                                                                               \
    do {                                                                                                               \
        if (!(cond)) {                                                                                                 \
            failures++;                                                                                                \
            fprintf(stderr, "FAIL %s:%d: ", __FILE__, __LINE__);                                                       \
            fprintf(stderr, __VA_ARGS__);                                                                              \
            fputc('\n', stderr);                                                                                       \
        }                                                                                                              \
    } while (0)

static void hex(const uint8_t *d, char *out) {
    for (int i = 0; i < 32; i++) snprintf(out + 2 * i, 3, "%02x", d[i]);
}

static void test_sha256(void) {
    static const struct {
        const char *text, *digest;
    } v[] = {
        {"", "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"},
        {"abc", "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"},
        {"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq",
         "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1"},
    };
    for (size_t i = 0; i < sizeof(v) / sizeof(v[0]); i++) {
        uint8_t d[32];
        char h[65];
        dp_sha256_digest((const uint8_t *)v[i].text, strlen(v[i].text), d);
        hex(d, h);
        CHECK(strcmp(h, v[i].digest) == 0, "sha256(%s) = %s", v[i].text, h);
    }
    size_t n = 1000000;
    uint8_t *a = malloc(n), d[32];
    char h[65];
    memset(a, 'a', n);
    dp_sha256_digest(a, n, d);
    hex(d, h);
    CHECK(strcmp(h, "cdc76e5c9914fb9281a1c7e284d73e67f1809a48a497200e046d39ccc7112cd0") == 0, "sha256(a x 1e6) = %s", h);
    free(a);
}

static uint8_t *read_file(const char *path, size_t *len) {
    FILE *f = fopen(path, "rb");
    if (!f) return NULL;
    fseek(f, 0, SEEK_END);
    long n = ftell(f);
    fseek(f, 0, SEEK_SET);
    uint8_t *d = malloc(n > 0 ? (size_t)n : 1);
    *len = fread(d, 1, (size_t)(n > 0 ? n : 0), f);
    fclose(f);
    return d;
}

static const char *TEXTS[] = {"", "The charger was slow!", "Café don't CABLE type-2 STRASSE ß",
                              "\xce\xa3\xce\xa3 \xef\xbc\xa1 \xe2\x91\xa0 \xf0\x9f\x94\x8c", "\xff\xfe broken utf-8 \xe2\x82",
                              "a a a a a a a a a a a a a a a a a a a a a a a a a a a a a a a a a a a"};

static void on_token(void *ctx, const char *token, size_t len, long id) {
    (void)token;
    (void)len;
    (void)id;
    (*(size_t *)ctx)++;
}

/* a loaded bundle answers every test text with finite probabilities summing to 1 */
static void exercise(const dp_bundle *b, const char *name) {
    size_t C = dp_label_count(b);
    float *p = malloc(C * sizeof(float) * 6);
    dp_scratch *s = dp_scratch_new(b);
    dp_error err;
    size_t lens[6];
    for (int i = 0; i < 6; i++) lens[i] = strlen(TEXTS[i]);
    CHECK(dp_classify_batch(b, s, TEXTS, lens, 6, p, &err) == 0, "%s: batch failed: %s", name, err.message);
    for (int i = 0; i < 6; i++) {
        double sum = 0;
        for (size_t c = 0; c < C; c++) {
            CHECK(isfinite(p[i * C + c]) && p[i * C + c] >= 0, "%s: text %d prob %zu not finite", name, i, c);
            sum += p[i * C + c];
        }
        CHECK(fabs(sum - 1.0) < 1e-4, "%s: text %d probabilities sum to %g", name, i, sum);
        size_t tokens = 0;
        CHECK(dp_tokens(b, NULL, TEXTS[i], lens[i], on_token, &tokens, &err) == 0, "%s: tokens failed", name);
    }
    CHECK(dp_classify(b, NULL, TEXTS[1], lens[1], p, &err) == 0, "%s: one text failed", name);
    dp_scratch_free(s);
    free(p);
}

static int ends_with(const char *s, const char *tail) {
    size_t a = strlen(s), b = strlen(tail);
    return a >= b && strcmp(s + a - b, tail) == 0;
}

/* the reason given for a few files whose protection matters most (the C messages follow runtime/bundle.py's) */
static const struct {
    const char *file, *phrase;
} REASONS[] = {
    {"flipped_bit_in_payload.bundle", "checksum mismatch"},
    {"vocab_zlib_bomb.bundle", "refused as a decompression bomb"},
    {"newer_version.bundle", "is newer than this runtime reads"},
    {"scale_overflows_float32.bundle", "past what float32 computes safely"},
    {"graph_loop_operator.bundle", "graph is not the one danpack writes for this manifest"},
    {"graph_back_door.bundle", "node 22 is node Gather 'spy_rows', expected node Identity 'logits'"},
    {"graph_inline_nan.bundle", "initializer 3 (initializer 'one_f') differs in its inputs, attributes or contents"},
    {"graph_unused_tensor.bundle", "graph does not use every tensor of the bundle"},
    {"nested_4000_levels.bundle", "nested deeper than allowed"},
    {"outer_map32_claims_4gb.bundle", "declares more entries than"},
    {"probe_disagrees.bundle", "disagrees with the packer on the bundle's probe"},
    {"vocab_duplicate_token.bundle", "repeats the token"},
    {"tensor_data_short.bundle", "declares a shape whose bytes differ"},
};

static void test_adversarial(const char *dir) {
    DIR *d = opendir(dir);
    CHECK(d != NULL, "cannot open %s", dir);
    if (!d) return;
    struct dirent *e;
    size_t n = 0;
    char path[4096];
    while ((e = readdir(d))) {
        if (!ends_with(e->d_name, ".bundle")) continue;
        snprintf(path, sizeof(path), "%s/%s", dir, e->d_name);
        dp_error err;
        err.message[0] = 0;
        dp_bundle *b = dp_load_path(path, &err);
        CHECK(b == NULL, "%s was accepted", e->d_name);
        for (size_t r = 0; r < sizeof(REASONS) / sizeof(REASONS[0]); r++)
            if (!strcmp(REASONS[r].file, e->d_name))
                CHECK(strstr(err.message, REASONS[r].phrase) != NULL, "%s refused for another reason: %s", e->d_name,
                      err.message);
        CHECK(strncmp(err.message, path, strlen(path)) == 0 && strlen(err.message) > strlen(path) + 10,
              "%s: message does not name the file: %s", e->d_name, err.message);
        size_t len = 0;
        uint8_t *data = read_file(path, &len);
        dp_bundle *b2 = dp_load_bytes(data ? data : (const uint8_t *)"", len, e->d_name, &err);
        CHECK(b2 == NULL, "%s was accepted from bytes", e->d_name);
        dp_free(b);
        dp_free(b2);
        free(data);
        n++;
    }
    closedir(d);
    CHECK(n >= 100, "only %zu adversarial files in %s", n, dir);
    printf("adversarial corpus: %zu files, every one refused\n", n);
}

static uint64_t rng_state = 0x9E3779B97F4A7C15ull;
static uint64_t rnd(void) {
    rng_state ^= rng_state << 13;
    rng_state ^= rng_state >> 7;
    rng_state ^= rng_state << 17;
    return rng_state;
}

/* the outer map as the packer writes it, around `payload`, with its sha256 */
static uint8_t *seal(const uint8_t *payload, size_t n, size_t *len) {
    uint8_t *out = malloc(n + 128), *p = out, digest[32];
    dp_sha256_digest(payload, n, digest);
    *p++ = 0x84;
    *p++ = 0xA6, memcpy(p, "format", 6), p += 6;
    *p++ = 0xAE, memcpy(p, "danpack-bundle", 14), p += 14;
    *p++ = 0xA7, memcpy(p, "payload", 7), p += 7;
    *p++ = 0xC6, *p++ = (uint8_t)(n >> 24), *p++ = (uint8_t)(n >> 16), *p++ = (uint8_t)(n >> 8), *p++ = (uint8_t)n;
    memcpy(p, payload, n), p += n;
    *p++ = 0xA6, memcpy(p, "sha256", 6), p += 6;
    *p++ = 0xC4, *p++ = 32, memcpy(p, digest, 32), p += 32;
    *p++ = 0xA7, memcpy(p, "version", 7), p += 7;
    *p++ = 0x01;
    *len = (size_t)(p - out);
    return out;
}

static const uint8_t INTERESTING[] = {0x00, 0x01, 0x7f, 0x80, 0xff, 0xc0, 0xc1, 0xc2, 0xc3, 0xca, 0xcb, 0xcc, 0xd0,
                                      0xd3, 0xd9, 0xdb, 0xc4, 0xc6, 0xdc, 0xdd, 0xde, 0xdf, 0x90, 0x80, 0x8f, 0x9f};

static uint8_t *mutate(const uint8_t *src, size_t n, size_t *out_len) {
    size_t cap = n + 64, len = n;
    uint8_t *d = malloc(cap);
    memcpy(d, src, n);
    int rounds = 1 + (int)(rnd() % 3);
    for (int r = 0; r < rounds && len > 0; r++) {
        size_t at = (size_t)(rnd() % len);
        switch (rnd() % 7) {
        case 0: d[at] ^= (uint8_t)(1u << (rnd() % 8)); break;
        case 1: d[at] = INTERESTING[rnd() % sizeof(INTERESTING)]; break;
        case 2: d[at] = (uint8_t)rnd(); break;
        case 3: len = at; break; /* truncate */
        case 4: /* delete one byte */
            memmove(d + at, d + at + 1, len - at - 1);
            len--;
            break;
        case 5: /* insert one byte */
            if (len + 1 < cap) {
                memmove(d + at + 1, d + at, len - at);
                d[at] = INTERESTING[rnd() % sizeof(INTERESTING)];
                len++;
            }
            break;
        default: /* a 4-byte big number over a length or count */
            for (size_t k = 0; k < 4 && at + k < len; k++) d[at + k] = (uint8_t)(k == 0 ? 0x7f : rnd());
        }
    }
    *out_len = len;
    return d;
}

static void test_bundles(const char *dir, size_t mutations) {
    DIR *d = opendir(dir);
    CHECK(d != NULL, "cannot open %s", dir);
    if (!d) return;
    char *names[64];
    size_t nb = 0;
    struct dirent *e;
    while ((e = readdir(d)) && nb < 64)
        if (ends_with(e->d_name, ".bundle")) names[nb++] = strdup(e->d_name);
    closedir(d);
    CHECK(nb > 0, "no bundles in %s", dir);
    size_t accepted = 0, refused = 0;
    for (size_t i = 0; i < nb; i++) {
        char path[4096];
        snprintf(path, sizeof(path), "%s/%s", dir, names[i]);
        dp_error err;
        dp_bundle *b = dp_load_path(path, &err);
        CHECK(b != NULL, "%s refused: %s", names[i], b ? "" : err.message);
        if (b) exercise(b, names[i]);
        dp_free(b);
        size_t len = 0;
        uint8_t *data = read_file(path, &len);
        dp_mp_doc outer;
        CHECK(dp_mp_read(data, len, 8, "file", &outer, &err) == 0, "%s: outer map", names[i]);
        const dp_mp *payload = dp_mp_get(outer.root, "payload");
        /* an equal share of the mutations for each bundle */
        size_t share = mutations / nb;
        for (size_t m = 0; m < share; m++) {
            size_t mlen, blen;
            int sealed = (rnd() % 10) != 0;
            uint8_t *mut = sealed ? mutate(payload->p, payload->len, &mlen) : mutate(data, len, &mlen);
            uint8_t *bytes = sealed ? seal(mut, mlen, &blen) : mut;
            if (!sealed) blen = mlen;
            err.message[0] = 0;
            dp_bundle *mb = dp_load_bytes(bytes, blen, "mutant", &err);
            if (mb) {
                accepted++;
                exercise(mb, "mutant");
            } else {
                refused++;
                CHECK(strncmp(err.message, "mutant: ", 8) == 0, "refusal without a message naming the source: %s", err.message);
            }
            dp_free(mb);
            if (sealed) free(bytes);
            free(mut);
        }
        dp_mp_free(&outer);
        free(data);
        free(names[i]);
    }
    printf("mutated bundles: %zu refused, %zu loaded and answered\n", refused, accepted);
}

int main(int argc, char **argv) {
    if (argc < 3) {
        fprintf(stderr, "usage: test_native ADVERSARIAL_DIR BUNDLE_DIR [MUTATIONS]\n");
        return 2;
    }
    size_t mutations = argc > 3 ? (size_t)strtoul(argv[3], NULL, 10) : 3000;
    test_sha256();
    test_adversarial(argv[1]);
    test_bundles(argv[2], mutations);
    if (failures) {
        fprintf(stderr, "%d check(s) failed\n", failures);
        return 1;
    }
    printf("all C tests passed\n");
    return 0;
}
