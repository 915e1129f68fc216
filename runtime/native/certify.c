/* The box certification of runtime/certify.py in C (see certify.h): mean_box, _slot_hull, logit_gaps and
 * certify_box, one text at a time, every slack term of the numpy code kept (gamma, gamma64, INFLATE, the 2^-50 and
 * 2^-52 terms, TANH_ERROR). float64 wherever the numpy code computes in float64.
 *
 * Two orders are numpy's own, so that the bounds come out as numpy's, not just as sound: the float32 sum of a text's
 * dequantised kept rows and the float64 sum of their (radius, mass) follow np.add.reduceat (the first row, plus
 * numpy's pairwise sum of the rest; `pairwise32` / `pairwise64`). Soundness needs neither: the γ_{n+1} term of
 * mean_box bounds the float32 sum in any order, and the float64 sums are covered by INFLATE. The float64 dot
 * products run in two lanes where numpy calls BLAS: the γ64 terms (values) and INFLATE (radii) numpy carries for its
 * own products cover any order. */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "certify.h"
#include "internal.h"

#define INFLATE (1.0 + 0x1p-20)    /* runtime/certify.py INFLATE */
#define TANH_ERROR 0x1p-20         /* runtime/certify.py TANH_ERROR */
/* np.tanh and this C library's tanh are each within a few ulp of the exact tanh and were measured to differ by up to
 * 3 ulp on this machine's numpy (its own SIMD tanh): the image of each interval end is widened by 2^-51 more, at
 * least 4 ulp of any value in [-1, 1], so the interval holds whatever the exact tanh of its ends is wherever numpy's
 * would. */
#define TANH_ULPS 0x1p-51
#define LEVELS 64 /* recursion levels of the pairwise sum: n halves per level, so 64 is never reached */
#define BLOCK 128 /* numpy's PW_BLOCKSIZE */

/* γ_k for float32 (u = 2^-24), infinite where k·u ≥ 1: runtime/certify.py gamma */
static double gamma32(double k) { return k * 0x1p-24 < 1.0 ? k * 0x1p-24 / (1.0 - k * 0x1p-24) : INFINITY; }
/* γ_k for float64 (u = 2^-53): runtime/certify.py gamma64 */
static double gamma64(double k) { return k * 0x1p-53 / (1.0 - k * 0x1p-53); }
/* np.minimum / np.maximum: a NaN on either side is the answer (C's fmin / fmax would drop it) */
static double nmin(double a, double b) { return a != a ? a : b != b ? b : a < b ? a : b; }
static double nmax(double a, double b) { return a != a ? a : b != b ? b : a > b ? a : b; }

/* acc += dequantised row id, in float32 (int8 -> float32 is exact, times its float32 step, rounded as numpy does) */
static void add_row(const dp_cert_model *m, int64_t id, float *restrict acc) {
    size_t W = (size_t)m->width, d = 0;
    float step = m->steps[id];
    if (m->q) {
        const int8_t *restrict row = m->q + (size_t)id * W;
#if defined(__SSE2__)
        __m128 sc = _mm_set1_ps(step);
        for (; d + 4 <= W; d += 4)
            _mm_storeu_ps(acc + d, _mm_add_ps(_mm_loadu_ps(acc + d), dp_four_products(row + d, sc)));
#endif
        for (; d < W; d++) acc[d] += (float)row[d] * step;
    } else {
        const float *restrict row = m->table + (size_t)id * W;
#if defined(__SSE2__)
        __m128 sc = _mm_set1_ps(step);
        for (; d + 4 <= W; d += 4)
            _mm_storeu_ps(acc + d, _mm_add_ps(_mm_loadu_ps(acc + d), _mm_mul_ps(_mm_loadu_ps(row + d), sc)));
#endif
        for (; d < W; d++) acc[d] += row[d] * step;
    }
}

/* out = dequantised row id (0 + x is x for every x but -0, which every bound below treats as +0) */
static void load_row(const dp_cert_model *m, int64_t id, float *restrict out) {
    memset(out, 0, (size_t)m->width * sizeof *out);
    add_row(m, id, out);
}

/* numpy's pairwise float32 sum of the dequantised rows ids[0..n) (its pairwise_sum, coordinate by coordinate);
 * scratch: (8 + LEVELS) x W floats */
static void pairwise32(const dp_cert_model *m, const int64_t *ids, size_t n, float *out, float *scratch) {
    size_t W = (size_t)m->width;
    if (n < 8) {
        for (size_t d = 0; d < W; d++) out[d] = 0.0f;
        for (size_t i = 0; i < n; i++) add_row(m, ids[i], out);
    } else if (n <= BLOCK) {
        float *r = scratch; /* (8, W) */
        for (size_t j = 0; j < 8; j++) load_row(m, ids[j], r + j * W);
        size_t i = 8;
        for (; i < n - (n % 8); i += 8)
            for (size_t j = 0; j < 8; j++) add_row(m, ids[i + j], r + j * W);
        for (size_t d = 0; d < W; d++)
            out[d] = ((r[d] + r[W + d]) + (r[2 * W + d] + r[3 * W + d])) +
                     ((r[4 * W + d] + r[5 * W + d]) + (r[6 * W + d] + r[7 * W + d]));
        for (; i < n; i++) add_row(m, ids[i], out);
    } else {
        size_t n2 = n / 2;
        n2 -= n2 % 8;
        pairwise32(m, ids, n2, out, scratch);
        float *rest = scratch; /* one level's partial sum, then the next level's scratch after it */
        pairwise32(m, ids + n2, n - n2, rest, scratch + W);
        for (size_t d = 0; d < W; d++) out[d] += rest[d];
    }
}

/* the same pairwise order over the rows' (radius, mass) in float64 */
static void pairwise64(const double *terms, const int64_t *ids, size_t n, double out[2]) {
    if (n < 8) {
        out[0] = out[1] = 0.0;
        for (size_t i = 0; i < n; i++) out[0] += terms[2 * ids[i]], out[1] += terms[2 * ids[i] + 1];
    } else if (n <= BLOCK) {
        double r[8][2];
        for (size_t j = 0; j < 8; j++) r[j][0] = terms[2 * ids[j]], r[j][1] = terms[2 * ids[j] + 1];
        size_t i = 8;
        for (; i < n - (n % 8); i += 8)
            for (size_t j = 0; j < 8; j++) r[j][0] += terms[2 * ids[i + j]], r[j][1] += terms[2 * ids[i + j] + 1];
        for (int c = 0; c < 2; c++)
            out[c] = ((r[0][c] + r[1][c]) + (r[2][c] + r[3][c])) + ((r[4][c] + r[5][c]) + (r[6][c] + r[7][c]));
        for (; i < n; i++) out[0] += terms[2 * ids[i]], out[1] += terms[2 * ids[i] + 1];
    } else {
        size_t n2 = n / 2;
        n2 -= n2 % 8;
        double rest[2];
        pairwise64(terms, ids, n2, out);
        pairwise64(terms, ids + n2, n - n2, rest);
        out[0] += rest[0];
        out[1] += rest[1];
    }
}

/* Σ a_i b_i in float64, in any order: numpy's BLAS picks its own, and the γ64 terms (values) or INFLATE (radii) of
 * logit_gaps cover the rounding of every order */
static double dot(const double *a, const double *b, size_t n) {
    size_t i = 0;
    double sum = 0.0;
#if defined(__SSE2__)
    __m128d two = _mm_setzero_pd();
    for (; i + 2 <= n; i += 2) two = _mm_add_pd(two, _mm_mul_pd(_mm_loadu_pd(a + i), _mm_loadu_pd(b + i)));
    double lanes[2];
    _mm_storeu_pd(lanes, two);
    sum = lanes[0] + lanes[1];
#endif
    for (; i < n; i++) sum += a[i] * b[i];
    return sum;
}

#if defined(__SSE2__)
static __m128d abs2(__m128d x) { return _mm_and_pd(x, _mm_castsi128_pd(_mm_set1_epi64x(0x7fffffffffffffffLL))); }
#endif

/* runtime/certify.py _as_box: [lo, hi] -> centre and radius (two lanes at a time where SSE2 is there: the same
 * float64 operations per element) */
static void as_box(const double *lo, const double *hi, double *c, double *r, size_t n) {
    size_t d = 0;
#if defined(__SSE2__)
    const __m128d half = _mm_set1_pd(0.5), slack = _mm_set1_pd(0x1p-50);
    for (; d + 2 <= n; d += 2) {
        __m128d a = _mm_loadu_pd(lo + d), b = _mm_loadu_pd(hi + d);
        _mm_storeu_pd(c + d, _mm_mul_pd(half, _mm_add_pd(a, b)));
        _mm_storeu_pd(r + d, _mm_add_pd(_mm_mul_pd(half, _mm_sub_pd(b, a)),
                                        _mm_mul_pd(slack, _mm_add_pd(abs2(a), abs2(b)))));
    }
#endif
    for (; d < n; d++) {
        c[d] = 0.5 * (lo[d] + hi[d]);
        r[d] = 0.5 * (hi[d] - lo[d]) + 0x1p-50 * (fabs(lo[d]) + fabs(hi[d]));
    }
}

/* t = r + g·|c|: the radius carrying this module's float64 rounding of W·c */
static void widen(const double *r, const double *c, double g, double *t, size_t n) {
    size_t i = 0;
#if defined(__SSE2__)
    const __m128d gg = _mm_set1_pd(g);
    for (; i + 2 <= n; i += 2)
        _mm_storeu_pd(t + i, _mm_add_pd(_mm_loadu_pd(r + i), _mm_mul_pd(gg, abs2(_mm_loadu_pd(c + i)))));
#endif
    for (; i < n; i++) t[i] = r[i] + g * fabs(c[i]);
}

/* a hidden layer's z and radius -> the activation's box as centre c and radius r (r may be the radius given) */
static void activate(int64_t act, const double *z, const double *radius, double *c, double *r, size_t out) {
    size_t o = 0;
#if defined(__SSE2__)
    if (act != DP_CERT_ACT_TANH) {
        const __m128d small = _mm_set1_pd(0x1p-52), inflate = _mm_set1_pd(INFLATE), zero = _mm_setzero_pd();
        const __m128d half = _mm_set1_pd(0.5), slack = _mm_set1_pd(0x1p-50);
        for (; o + 2 <= out; o += 2) {
            __m128d zz = _mm_loadu_pd(z + o);
            __m128d rad = _mm_mul_pd(_mm_add_pd(_mm_loadu_pd(radius + o), _mm_mul_pd(small, abs2(zz))), inflate);
            __m128d a = _mm_sub_pd(zz, rad), b = _mm_add_pd(zz, rad), nan = _mm_setzero_pd();
            if (act == DP_CERT_ACT_RELU) {
                nan = _mm_or_pd(_mm_cmpunord_pd(a, a), _mm_cmpunord_pd(b, b));
                a = _mm_max_pd(a, zero); /* a > 0 ? a : 0 per lane; a NaN is put back below */
                b = _mm_max_pd(b, zero);
            }
            /* all ones (a NaN) where an end was NaN: np.maximum keeps it, so the unit's centre and radius are NaN */
            _mm_storeu_pd(c + o, _mm_or_pd(_mm_mul_pd(half, _mm_add_pd(a, b)), nan));
            _mm_storeu_pd(r + o, _mm_or_pd(_mm_add_pd(_mm_mul_pd(half, _mm_sub_pd(b, a)),
                                                      _mm_mul_pd(slack, _mm_add_pd(abs2(a), abs2(b)))), nan));
        }
    }
#endif
    for (; o < out; o++) {
        double rad = (radius[o] + 0x1p-52 * fabs(z[o])) * INFLATE;
        double a = z[o] - rad, b = z[o] + rad;
        int nan = (a != a) | (b != b);
        if (act == DP_CERT_ACT_RELU) { /* exact in float32; a wholly negative unit contributes 0 */
            a = a > 0.0 ? a : 0.0; /* branch-free (the sign is unpredictable); a NaN is put back below */
            b = b > 0.0 ? b : 0.0;
        } else if (act == DP_CERT_ACT_TANH) { /* monotone: the image of the interval, widened */
            a = tanh(a) - TANH_ERROR - TANH_ULPS;
            b = tanh(b) + TANH_ERROR + TANH_ULPS;
        }
        c[o] = 0.5 * (a + b);
        r[o] = 0.5 * (b - a) + 0x1p-50 * (fabs(a) + fabs(b));
        if (nan) c[o] = r[o] = NAN; /* np.maximum keeps a NaN end: the unit's centre and radius are NaN */
    }
}

static int compare_doubles(const void *a, const void *b) {
    double x = *(const double *)a, y = *(const double *)b;
    return x < y ? -1 : x > y ? 1 : 0;
}

/* ascending, as np.sort (the values are finite or +inf: the slot table holds no NaN) */
static void sort_doubles(double *v, size_t n) {
    if (n > 32) {
        qsort(v, n, sizeof(double), compare_doubles);
        return;
    }
    for (size_t i = 1; i < n; i++) {
        double x = v[i];
        size_t j = i;
        for (; j > 0 && v[j - 1] > x; j--) v[j] = v[j - 1];
        v[j] = x;
    }
}

static size_t max_width(const dp_cert_model *m) {
    size_t w = (size_t)m->width;
    for (int64_t l = 0; l < m->nlayers; l++)
        if ((size_t)m->layers[l].out > w) w = (size_t)m->layers[l].out;
    return w;
}

/* work layout: doubles (lo, hi, low, high: 4W; sort room: U; centre, radius, next radius, z, t: 5 MW;
 * lower bounds: C), floats (total: W; pairwise scratch: (8 + LEVELS) W), int64 (kept ids: T) */
static int layout(const dp_cert_model *m, int64_t T, int64_t U, size_t *doubles, size_t *floats, size_t *longs) {
    size_t W = (size_t)m->width, MW = max_width(m);
    if (T < 0 || U < 0 || W > ((size_t)1 << 40) || MW > ((size_t)1 << 40) || (uint64_t)U > ((uint64_t)1 << 40) ||
        (uint64_t)T > ((uint64_t)1 << 40) || (uint64_t)m->classes > ((uint64_t)1 << 40))
        return -1;
    *doubles = 4 * W + (size_t)U + 5 * MW + (size_t)m->classes;
    *floats = (9 + LEVELS) * W + 1; /* + 1: keeps the int64 part 8-byte aligned when W is odd (rounded below) */
    *floats += *floats % 2;
    *longs = (size_t)T + 1;
    return 0;
}

size_t dp_certify_work_bytes(const dp_cert_model *m, int64_t T, int64_t U) {
    size_t doubles, floats, longs;
    if (layout(m, T, U, &doubles, &floats, &longs)) return 0;
    return doubles * sizeof(double) + floats * sizeof(float) + longs * sizeof(int64_t);
}

/* _slot_hull for one text with u > 0 unknown tokens: low / high (W) -> lo / hi (W) */
static void slot_hull(const dp_cert_model *m, const int64_t *slots, int64_t U, size_t u, size_t n, const double *low,
                      const double *high, double *lo, double *hi, double *sorted) {
    size_t W = (size_t)m->width;
    double kept = (double)n, floor1 = kept > 1.0 ? kept : 1.0; /* np.maximum(kept, 1.0) */
    double g = gamma64((double)U + 4.0), spread = (double)U * m->largest;
    const double *minima = m->minima; /* (S, 2, W) */
    int64_t first_slot = 0; /* the text's first slot (slots come first, pads after) */
    while (slots[first_slot] < 0) first_slot++;
    for (int side = 0; side < 2; side++) {
        size_t d0 = 0;
#if defined(__SSE2__)
        if (!m->skipped || u == 1) { /* the common branches, two coordinates at a time (the same operations) */
            const __m128d sign = _mm_set1_pd(-0.0), gg = _mm_set1_pd(g), sp = _mm_set1_pd(spread);
            const __m128d f1 = _mm_set1_pd(floor1), k1 = _mm_set1_pd(kept + 1.0), ku = _mm_set1_pd(kept + (double)u);
            const double *row = minima + ((size_t)slots[first_slot] * 2 + (size_t)side) * W;
            for (; d0 + 2 <= W; d0 += 2) {
                __m128d base = side ? _mm_xor_pd(_mm_loadu_pd(high + d0), sign) : _mm_loadu_pd(low + d0);
                __m128d slack = _mm_div_pd(_mm_mul_pd(gg, _mm_add_pd(abs2(base), sp)), f1), bound;
                if (!m->skipped) {
                    __m128d sum = _mm_loadu_pd(row + d0);
                    for (int64_t j = first_slot + 1; j < U; j++)
                        if (slots[j] >= 0)
                            sum = _mm_add_pd(sum, _mm_loadu_pd(minima + ((size_t)slots[j] * 2 + (size_t)side) * W + d0));
                    bound = _mm_sub_pd(_mm_div_pd(_mm_add_pd(base, sum), ku), slack);
                } else { /* k = 0 (the mean box's own lo, or -hi: base / max(n, 1)) or k = 1, NaN kept */
                    __m128d none = side ? _mm_xor_pd(_mm_loadu_pd(hi + d0), sign) : _mm_loadu_pd(lo + d0);
                    __m128d one = _mm_div_pd(_mm_add_pd(base, _mm_loadu_pd(row + d0)), k1);
                    __m128d nan = _mm_or_pd(_mm_cmpunord_pd(none, none), _mm_cmpunord_pd(one, one));
                    bound = _mm_sub_pd(_mm_or_pd(_mm_min_pd(none, one), nan), slack);
                }
                if (side) _mm_storeu_pd(hi + d0, _mm_xor_pd(bound, sign));
                else _mm_storeu_pd(lo + d0, bound);
            }
        }
#endif
        for (size_t d = d0; d < W; d++) {
            double base = side ? -high[d] : low[d];
            /* this module's float64 sums of up to U + 1 terms and their divisions: γ64_{U+4} (|base| + U·largest) */
            double slack = g * (fabs(base) + spread) / floor1, bound;
            if (!m->skipped) { /* every token a row (k = u): one sum; an empty slot makes it +inf */
                double sum = 0.0;
                int first = 1;
                for (int64_t j = 0; j < U; j++) {
                    if (slots[j] < 0) continue;
                    double v = minima[((size_t)slots[j] * 2 + (size_t)side) * W + d];
                    sum = first ? v : sum + v;
                    first = 0;
                }
                bound = (base + sum) / (kept + (double)u) - slack;
            } else {
                bound = base / floor1; /* k = 0: every unknown token left out */
                if (u == 1) { /* the text's one slot */
                    double v = minima[((size_t)slots[first_slot] * 2 + (size_t)side) * W + d];
                    bound = nmin(bound, (base + v) / (kept + 1.0));
                } else { /* any k in 0..U: the k smallest (pads read the pad slot, as numpy's do), for every k */
                    size_t k = 0;
                    for (int64_t j = 0; j < U; j++)
                        if (slots[j] >= 0) sorted[k++] = minima[((size_t)slots[j] * 2 + (size_t)side) * W + d];
                    sort_doubles(sorted, u);
                    double pad = minima[((size_t)m->pad_slot * 2 + (size_t)side) * W + d];
                    size_t vi = 0, pads = (size_t)U - u;
                    double acc = 0.0, best = INFINITY;
                    for (size_t taken = 1; taken <= (size_t)U; taken++) {
                        double v; /* the next smallest of the valid values and the pads (np.sort's order) */
                        if (vi < u && (pads == 0 || !(sorted[vi] > pad))) v = sorted[vi++];
                        else v = pad, pads--;
                        acc = taken == 1 ? v : acc + v; /* np.cumsum */
                        best = nmin(best, (base + acc) / (kept + (double)taken));
                        if (acc == INFINITY) break; /* every later k gives the same +inf (or NaN, taken now) */
                    }
                    bound = nmin(bound, best);
                }
                bound -= slack;
            }
            if (side) hi[d] = -bound;
            else lo[d] = bound;
        }
    }
}

/* one text: ids (count), unknown tokens' slots (U wide, or NULL) or their count -> lower bounds (C), covered */
static int certify_text(const dp_cert_model *m, const int64_t *ids, int64_t count, const int64_t *slots, int64_t U,
                        int64_t unknown, int64_t top, double *lowk, int *covered, double *dw, float *fw,
                        int64_t *kept_ids) {
    size_t W = (size_t)m->width, MW = max_width(m), C = (size_t)m->classes;
    double *lo = dw, *hi = lo + W, *low = hi + W, *high = low + W, *sorted = high + W;
    double *c = sorted + U, *r = c + MW, *r2 = r + MW, *z = r2 + MW, *t = z + MW;
    float *total32 = fw, *scratch = fw + W;
    /* mean_box */
    size_t n = 0, u = 0;
    for (int64_t j = 0; j < count; j++)
        if (m->certifiable[ids[j]]) kept_ids[n++] = ids[j];
    if (slots) {
        for (int64_t j = 0; j < U; j++) u += slots[j] >= 0;
    } else {
        u = (size_t)unknown;
    }
    double sums[2] = {0.0, 0.0};
    if (n) { /* np.add.reduceat: the first row, plus the pairwise sum of the others */
        load_row(m, kept_ids[0], total32);
        sums[0] = m->row_terms[2 * kept_ids[0]], sums[1] = m->row_terms[2 * kept_ids[0] + 1];
        if (n > 1) {
            float *rest = scratch;
            double more[2];
            pairwise32(m, kept_ids + 1, n - 1, rest, scratch + W);
            for (size_t d = 0; d < W; d++) total32[d] += rest[d];
            pairwise64(m->row_terms, kept_ids + 1, n - 1, more);
            sums[0] += more[0];
            sums[1] += more[1];
        }
    } else {
        for (size_t d = 0; d < W; d++) total32[d] = 0.0f;
    }
    /* the float model's mean rounding, plus this sum's own: γ_{n+u+terms} + γ_{n+1} */
    double reach = sums[0] + (gamma32((double)(n + u) + (double)m->terms) + gamma32((double)n + 1.0)) * sums[1] * INFLATE;
    double kept_n = n ? (double)n : 1.0;
    size_t d0 = 0;
#if defined(__SSE2__)
    { /* the same float64 operations two lanes at a time (the divisions are this loop's cost) */
        __m128d rr = _mm_set1_pd(reach), kk = _mm_set1_pd(kept_n);
        for (; d0 + 2 <= W; d0 += 2) {
            __m128d sum = _mm_cvtps_pd(_mm_castsi128_ps(_mm_loadl_epi64((const __m128i *)(const void *)(total32 + d0))));
            __m128d a = _mm_sub_pd(sum, rr), b = _mm_add_pd(sum, rr);
            _mm_storeu_pd(low + d0, a);
            _mm_storeu_pd(high + d0, b);
            _mm_storeu_pd(lo + d0, _mm_div_pd(a, kk));
            _mm_storeu_pd(hi + d0, _mm_div_pd(b, kk));
        }
    }
#endif
    for (size_t d = d0; d < W; d++) {
        low[d] = (double)total32[d] - reach;
        high[d] = (double)total32[d] + reach;
        lo[d] = low[d] / kept_n; /* k = 0: every unknown token left out */
        hi[d] = high[d] / kept_n;
    }
    *covered = n > 0;
    if (m->envelope == DP_CERT_ENV_NONE) {
        if (u) *covered = 0;
    } else if (m->envelope == DP_CERT_ENV_SLOTS && slots) {
        if (u) slot_hull(m, slots, U, u, n, low, high, lo, hi, sorted);
    } else if (m->envelope == DP_CERT_ENV_ONE || m->envelope == DP_CERT_ENV_SLOTS) {
        if (u) { /* (a + k·e) / (n + k) is monotone in k: k = 0 and k = u bound every k */
            double uf = (double)u;
            for (size_t d = 0; d < W; d++) {
                double lo_u = (low[d] + uf * m->env_lo[d]) / (kept_n + uf);
                double hi_u = (high[d] + uf * m->env_hi[d]) / (kept_n + uf);
                lo[d] = m->skipped ? nmin(lo[d], lo_u) : lo_u;
                hi[d] = m->skipped ? nmax(hi[d], hi_u) : hi_u;
            }
        }
    } /* DP_CERT_ENV_KEEP: k = 0 only */

    /* logit_gaps: _as_box, then the hidden layers */
    size_t width = W;
    as_box(lo, hi, c, r, W);
    for (int64_t l = 0; l + 1 < m->nlayers; l++) {
        const dp_cert_layer *L = &m->layers[l];
        size_t out = (size_t)L->out, in = (size_t)L->in;
        if (!L->w) {
            for (size_t o = 0; o < out; o++) z[o] = c[o] + L->bias[o], r2[o] = r[o] + L->allowance[o];
        } else { /* the float64 product rounds by ≤ γ64 |W||c|: carried in the radius through the same |W| */
            widen(r, c, gamma64((double)in + 1.0), t, in);
            for (size_t o = 0; o < out; o++) {
                z[o] = dot(c, L->w + o * in, in) + L->bias[o];
                r2[o] = dot(t, L->w_abs + o * in, in) + L->allowance[o];
            }
        }
        activate(L->act, z, r2, c, r, out);
        width = out;
    }
    const dp_cert_layer *L = &m->layers[m->nlayers - 1];
    size_t in = (size_t)L->in;
    if (!L->w) { /* a lone folded layer: the logits are the mean plus the bias */
        if (width != C) return -1;
        for (size_t k = 0; k < C; k++) z[k] = c[k] + L->bias[k];
        for (size_t k = 0; k < C; k++) t[k] = r[top] + r[k];
    } else {
        double g = gamma64((double)in + 1.0);
        widen(r, c, g, r, in);
        for (size_t k = 0; k < C; k++) {
            z[k] = dot(c, L->w + k * in, in) + L->bias[k];
            t[k] = dot(m->contrast + ((size_t)top * C + k) * in, r, in); /* |W_top − W_k| · r */
        }
    }
    /* z_top − z_k ≥ (W_top − W_k)·c − |W_top − W_k|·r − both allowances, less this module's own rounding */
    for (size_t k = 0; k < C; k++) {
        double v = z[top] - z[k] - t[k] * INFLATE - L->allowance[top] - L->allowance[k] -
                   0x1p-50 * (fabs(z[top]) + fabs(z[k]));
        lowk[k] = v != v ? -INFINITY : v;
    }
    return 0;
}

int dp_certify(const dp_cert_model *m, const int64_t *ids, int64_t B, int64_t T, const int64_t *counts,
               const int64_t *slots, int64_t U, const int64_t *unknown, const int64_t *top, uint8_t *certified,
               double *low, uint8_t *covered, void *work, size_t work_bytes, char *message) {
    size_t doubles, floats, longs;
    if (B < 0 || m->nlayers < 1 || m->classes < 1 || m->width < 1 || layout(m, T, slots ? U : 0, &doubles, &floats,
                                                                              &longs)) {
        snprintf(message, 256, "dp_certify: sizes out of range (B %lld, T %lld, U %lld)", (long long)B, (long long)T,
                 (long long)U);
        return -1;
    }
    if (!slots) U = 0;
    if (!work || work_bytes < doubles * sizeof(double) + floats * sizeof(float) + longs * sizeof(int64_t)) {
        snprintf(message, 256, "dp_certify: work buffer of %zu bytes is too small", work_bytes);
        return -1;
    }
    if ((m->envelope == DP_CERT_ENV_SLOTS && (m->pad_slot < 0 || m->pad_slot >= m->nslots || !m->minima)) ||
        ((m->envelope == DP_CERT_ENV_ONE || m->envelope == DP_CERT_ENV_SLOTS) && (!m->env_lo || !m->env_hi)) ||
        (!m->layers[m->nlayers - 1].w == !!m->contrast)) {
        snprintf(message, 256, "dp_certify: the model's envelope or output layer is incomplete");
        return -1;
    }
    for (int64_t l = 0, width = m->width; l < m->nlayers; width = m->layers[l].out, l++) {
        const dp_cert_layer *L = &m->layers[l];
        if (L->w ? (L->in != width || !L->w_abs) : L->out != width) {
            snprintf(message, 256, "dp_certify: layer %lld takes %lld inputs, the layer before gives %lld", (long long)l,
                     (long long)(L->w ? L->in : L->out), (long long)width);
            return -1;
        }
    }
    if (m->layers[m->nlayers - 1].out != m->classes) {
        snprintf(message, 256, "dp_certify: the output layer has %lld units for %lld classes",
                 (long long)m->layers[m->nlayers - 1].out, (long long)m->classes);
        return -1;
    }
    double *dw = work;
    float *fw = (float *)(dw + doubles);
    int64_t *kept_ids = (int64_t *)(fw + floats);
    double *own_low = dw + doubles - (size_t)m->classes;
    size_t C = (size_t)m->classes;
    for (int64_t b = 0; b < B; b++) {
        const int64_t *row = ids + (size_t)b * (size_t)T, *srow = slots ? slots + (size_t)b * (size_t)U : NULL;
        int64_t count = counts[b], k = top[b];
        if (count < 0 || count > T || k < 0 || k >= m->classes || (!slots && unknown[b] < 0)) {
            snprintf(message, 256, "dp_certify: text %lld: count %lld (of %lld) or class %lld out of range",
                     (long long)b, (long long)count, (long long)T, (long long)k);
            return -1;
        }
        for (int64_t j = 0; j < count; j++)
            if (row[j] < 0 || row[j] >= m->rows) {
                snprintf(message, 256, "dp_certify: text %lld: id %lld out of range", (long long)b, (long long)row[j]);
                return -1;
            }
        for (int64_t j = 0; srow && j < U; j++)
            if (srow[j] < -1 || srow[j] >= m->nslots) {
                snprintf(message, 256, "dp_certify: text %lld: slot %lld out of range", (long long)b,
                         (long long)srow[j]);
                return -1;
            }
        double *lowk = low ? low + (size_t)b * C : own_low;
        int cov;
        if (certify_text(m, row, count, srow, U, slots ? 0 : unknown[b], k, lowk, &cov, dw, fw, kept_ids)) {
            snprintf(message, 256, "dp_certify: a folded output layer of %lld units for %lld classes",
                     (long long)m->layers[m->nlayers - 1].out, (long long)m->classes);
            return -1;
        }
        int beats = 1; /* certify_box: every other class's bound is > 0 */
        for (size_t c = 0; c < C; c++)
            if (c != (size_t)k && !(lowk[c] > 0.0)) beats = 0;
        certified[b] = (uint8_t)(cov && beats);
        if (covered) covered[b] = (uint8_t)cov;
    }
    return 0;
}
