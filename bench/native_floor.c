/* The bare C floor for the native runtime's bench: the least work a classifier of ASCII text can do.
 * Reads a table dump written by bench/native.py (no checks of any kind), then for each input line: ASCII lower case,
 * words-v1's ASCII split ([a-z0-9]+ with inner ' or -, or one punctuation mark), hash lookup, int8 gather with the
 * row scale, mean, the layers, softmax; prints the best label index and its probability.
 *   native_floor DUMP INPUT > answers
 * DUMP: int32 rows, width, nlayers; per layer int32 in, out, has_weight, activation (0 none, 1 relu, 2 tanh);
 * int8 table; float32 scales; per layer float32 weight (if any) and bias; then the tokens, one per line. */
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

typedef struct {
    int in, out, has_w, act;
    float *w, *b;
} layer;

static int alnum(char c) { return ((c | 32) >= 'a' && (c | 32) <= 'z') || (c >= '0' && c <= '9'); }

static uint64_t fnv(const char *p, size_t n) {
    uint64_t h = 1469598103934665603ull;
    for (size_t i = 0; i < n; i++) h = (h ^ (uint8_t)p[i]) * 1099511628211ull;
    return h;
}

int main(int argc, char **argv) {
    if (argc != 3) return 2;
    FILE *f = fopen(argv[1], "rb");
    if (!f) return 2;
    int32_t hdr[3];
    if (fread(hdr, 4, 3, f) != 3) return 2;
    int rows = hdr[0], width = hdr[1], nl = hdr[2], maxw = width;
    layer *L = calloc((size_t)nl, sizeof(layer));
    for (int i = 0; i < nl; i++) {
        int32_t v[4];
        if (fread(v, 4, 4, f) != 4) return 2;
        L[i].in = v[0], L[i].out = v[1], L[i].has_w = v[2], L[i].act = v[3];
        if (v[1] > maxw) maxw = v[1];
    }
    int8_t *table = malloc((size_t)rows * width);
    float *scales = malloc(sizeof(float) * rows);
    if (fread(table, 1, (size_t)rows * width, f) != (size_t)rows * width) return 2;
    if (fread(scales, 4, (size_t)rows, f) != (size_t)rows) return 2;
    for (int i = 0; i < nl; i++) {
        if (L[i].has_w) {
            L[i].w = malloc(sizeof(float) * L[i].in * L[i].out);
            if (fread(L[i].w, 4, (size_t)L[i].in * L[i].out, f) != (size_t)L[i].in * L[i].out) return 2;
        }
        L[i].b = malloc(sizeof(float) * L[i].out);
        if (fread(L[i].b, 4, (size_t)L[i].out, f) != (size_t)L[i].out) return 2;
    }
    /* tokens: the rest of the file */
    long start = ftell(f);
    fseek(f, 0, SEEK_END);
    long end = ftell(f);
    fseek(f, start, SEEK_SET);
    char *vocab = malloc((size_t)(end - start) + 1);
    size_t vlen = fread(vocab, 1, (size_t)(end - start), f);
    fclose(f);
    size_t nslots = 16;
    while (nslots < 2 * (size_t)rows) nslots *= 2;
    uint32_t *slots = calloc(nslots, 4);
    size_t *off = malloc(sizeof(size_t) * rows), *len = malloc(sizeof(size_t) * rows);
    size_t s = 0;
    int r = 0;
    for (size_t i = 0; i <= vlen && r < rows; i++) {
        if (i < vlen && vocab[i] != '\n') continue;
        off[r] = s, len[r] = i - s;
        size_t k = fnv(vocab + s, i - s) & (nslots - 1);
        while (slots[k]) k = (k + 1) & (nslots - 1);
        slots[k] = (uint32_t)r + 1;
        r++;
        s = i + 1;
    }
    int ntok = r;
    float *acc = malloc(sizeof(float) * maxw), *x = malloc(sizeof(float) * maxw), *y = malloc(sizeof(float) * maxw);
    FILE *in = fopen(argv[2], "rb");
    if (!in) return 2;
    char line[1 << 16], tok[1 << 16];
    while (fgets(line, sizeof(line), in)) {
        for (int d = 0; d < width; d++) acc[d] = 0;
        int count = 0;
        for (char *p = line; *p;) {
            unsigned char c = (unsigned char)*p;
            size_t n = 0;
            if (alnum((char)c)) {
                for (;;) {
                    for (; alnum(*p); p++) tok[n++] = (char)(*p >= 'A' && *p <= 'Z' ? *p + 32 : *p);
                    if ((*p == '\'' || *p == '-') && alnum(p[1])) {
                        tok[n++] = *p++;
                        continue;
                    }
                    break;
                }
            } else if (c > 32 && c < 127) {
                tok[n++] = *p++;
            } else {
                p++;
                continue;
            }
            size_t k = fnv(tok, n) & (nslots - 1);
            for (; slots[k]; k = (k + 1) & (nslots - 1)) {
                int row = (int)slots[k] - 1;
                if (len[row] == n && memcmp(vocab + off[row], tok, n) == 0) {
                    const int8_t *q = table + (size_t)row * width;
                    for (int d = 0; d < width; d++) acc[d] += (float)q[d] * scales[row];
                    count++;
                    break;
                }
            }
        }
        for (int d = 0; d < width; d++) x[d] = acc[d] / (float)(count ? count : 1);
        int w = width;
        for (int l = 0; l < nl; l++) {
            for (int o = 0; o < L[l].out; o++) {
                float z = L[l].b[o];
                if (L[l].has_w)
                    for (int i = 0; i < L[l].in; i++) z += x[i] * L[l].w[o * L[l].in + i];
                else
                    z += x[o];
                y[o] = L[l].act == 1 ? (z > 0 ? z : 0) : L[l].act == 2 ? tanhf(z) : z;
            }
            memcpy(x, y, sizeof(float) * L[l].out);
            w = L[l].out;
        }
        float top = x[0], sum = 0;
        int best = 0;
        for (int c = 1; c < w; c++)
            if (x[c] > top) top = x[c], best = c;
        for (int c = 0; c < w; c++) sum += expf(x[c] - top);
        printf("%d %.7g\n", best, 1.0f / sum);
    }
    fclose(in);
    (void)ntok;
    FILE *st = fopen("/proc/self/status", "r"); /* peak resident memory for the bench */
    char row[256];
    while (st && fgets(row, sizeof(row), st))
        if (!strncmp(row, "VmHWM:", 6)) fprintf(stderr, "peak resident %ld kB\n", strtol(row + 6, NULL, 10));
    if (st) fclose(st);
    return 0;
}
