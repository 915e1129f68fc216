/* The fast float32 writer (sb_f32) against the reference it replaces (sb_f32_slow: snprintf + strtof bisection),
 * byte for byte, run by `make test` under the sanitizers:
 *   test_format [STRIDE]
 * every STRIDE-th float32 in [1e-6, 1] (the probabilities danpack-run writes; default 211, about 790,000),
 * 300,000 random bit patterns over the whole range, and edge values: powers of ten and of two with their
 * neighbours, rounding ties (0.125, 0.375 ...), the smallest normal and subnormal, the largest float, zeros, inf,
 * NaN. Also checks that every written number reads back as the same float32 (strtof). */
#include <float.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "json.h"

static long failures = 0, checked = 0;
static sbuf fast, slow;

static void check(float v) {
    fast.n = slow.n = 0;
    sb_f32(&fast, v);
    sb_f32_slow(&slow, v);
    checked++;
    if (fast.n != slow.n || memcmp(fast.p, slow.p, fast.n) != 0) {
        if (failures++ < 20)
            fprintf(stderr, "FAIL %.9g (bits %08lx): fast %.*s, slow %.*s\n", (double)v,
                    (unsigned long)(union { float f; unsigned u; }){v}.u, (int)fast.n, fast.p, (int)slow.n, slow.p);
        return;
    }
    if (isfinite(v)) {
        char buf[64];
        snprintf(buf, sizeof(buf), "%.*s", (int)fast.n, fast.p);
        if (strtof(buf, NULL) != v && failures++ < 20) fprintf(stderr, "FAIL %s does not read back as %.9g\n", buf, (double)v);
    }
}

static float from_bits(unsigned u) {
    union { unsigned u; float f; } x;
    x.u = u;
    return x.f;
}

static unsigned to_bits(float f) {
    union { float f; unsigned u; } x;
    x.f = f;
    return x.u;
}

int main(int argc, char **argv) {
    unsigned stride = argc > 1 ? (unsigned)strtoul(argv[1], NULL, 10) : 211u;
    if (!stride) stride = 1;
    for (unsigned u = to_bits(1e-6f); u <= to_bits(1.0f); u += stride) check(from_bits(u));
    unsigned long long state = 0x2545F4914F6CDD1Dull;
    for (int i = 0; i < 300000; i++) {
        state ^= state << 13, state ^= state >> 7, state ^= state << 17;
        check(from_bits((unsigned)(state >> 16)));
    }
    for (int e = -45; e <= 38; e++) {
        float p = (float)pow(10.0, e);
        for (int k = -3; k <= 3; k++) check(from_bits(to_bits(p) + (unsigned)k));
    }
    for (int e = -149; e <= 127; e++) {
        float p = ldexpf(1.0f, e);
        check(p), check(nextafterf(p, 0.0f)), check(nextafterf(p, INFINITY)), check(p * 3), check(p * 5), check(p * 7);
    }
    float edges[] = {0.0f, -0.0f, INFINITY, -INFINITY, NAN, FLT_MIN, FLT_MAX, 1.4e-45f, 0.125f, 0.375f, 0.5f,
                     0.625f, 0.875f, 0.95f, 0.995f, 0.9999999f, 1.0f, 9.5f, 99.5f, 1e-4f, 9.999999e-5f, 1e16f, 1e-5f,
                     0.1f, 0.2f, 0.3f, 1.0f / 3, 2.0f / 3, 16777216.0f, 16777217.0f, -0.0043776706f};
    for (size_t i = 0; i < sizeof(edges) / sizeof(edges[0]); i++) check(edges[i]);
    free(fast.p);
    free(slow.p);
    printf("test_format: %ld float32 values, %ld mismatches\n", checked, failures);
    return failures ? 1 : 0;
}
