/* Texts -> tokens -> row ids (the bundle's unknown-word policy) -> int8 gather, mean, layers, softmax in float32,
 * as runtime/encode.py and runtime/forward.py compute them (sums accumulate in double, then round to float32). */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "bundle_impl.h"

#if defined(__SSE2__)
#include <emmintrin.h>
#endif

dp_scratch *dp_scratch_new(const dp_bundle *b) {
    dp_scratch *s = calloc(1, sizeof(dp_scratch));
    if (!s) return NULL;
    size_t w = b->maxwidth ? b->maxwidth : 1;
    s->acc = malloc(w * sizeof(double));
    s->x = malloc(w * sizeof(float));
    s->y = malloc(w * sizeof(float));
    if (!s->acc || !s->x || !s->y) {
        dp_scratch_free(s);
        return NULL;
    }
    return s;
}

void dp_scratch_free(dp_scratch *s) {
    if (!s) return;
    dp_tok_work_free(&s->tok);
    free(s->ids);
    free(s->acc);
    free(s->x);
    free(s->y);
    free(s);
}

static void forward(const dp_bundle *b, dp_scratch *s, const size_t *ids, size_t n, float *probs, float *logits) {
    size_t W = b->width;
    double *acc = s->acc;
    float *x = s->x, *y = s->y;
    for (size_t d = 0; d < W; d++) acc[d] = 0.0;
    for (size_t t = 0; t < n; t++) { /* (n, W) gathered rows summed; int8 rows dequantised by their scale */
        size_t id = ids[t];
        if (b->q) {
            /* restrict: an int8 row may alias anything as far as C knows; four at a time for the compiler's
             * straight-line vectoriser (the same operations on each element, in the same order per element) */
            const int8_t *restrict row = b->q + id * W;
            double *restrict a = acc;
            float scale = (float)b->scales[id];
            size_t d = 0;
#if defined(__SSE2__)
            /* the same IEEE operations four lanes at a time: int8 -> int32 -> float, float product, exact widening
             * to double, double sum (x86-64 always has SSE2; other machines take the loop below) */
            __m128 sc = _mm_set1_ps(scale);
            for (; d + 4 <= W; d += 4) {
                __m128 f = dp_four_products(row + d, sc);
                _mm_storeu_pd(a + d, _mm_add_pd(_mm_loadu_pd(a + d), _mm_cvtps_pd(f)));
                _mm_storeu_pd(a + d + 2, _mm_add_pd(_mm_loadu_pd(a + d + 2), _mm_cvtps_pd(_mm_movehl_ps(f, f))));
            }
#endif
            for (; d < W; d++) a[d] += (double)((float)row[d] * scale);
        } else {
            const float *row = b->table + id * W;
            for (size_t d = 0; d < W; d++) acc[d] += row[d];
        }
    }
    float count = n ? (float)n : 1.0f;
    size_t d0 = 0;
#if defined(__SSE2__)
    __m128 cnt = _mm_set1_ps(count); /* float32 of each sum, divided in float32: four at a time */
    for (; d0 + 4 <= W; d0 += 4) {
        __m128 lo = _mm_cvtpd_ps(_mm_loadu_pd(acc + d0)), hi = _mm_cvtpd_ps(_mm_loadu_pd(acc + d0 + 2));
        _mm_storeu_ps(x + d0, _mm_div_ps(_mm_movelh_ps(lo, hi), cnt));
    }
#endif
    for (size_t d = d0; d < W; d++) x[d] = (float)acc[d] / count; /* (W,) mean */
    size_t width = W;
    for (size_t l = 0; l < b->nlayers; l++) {
        const dp_layer *L = &b->layers[l];
        for (size_t o = 0; o < L->out; o++) {
            double z;
            if (L->weight) {
                const float *w = L->weight + o * L->in;
                z = 0.0;
                for (size_t i = 0; i < L->in; i++) z += (double)x[i] * (double)w[i];
                z = (double)(float)z;
            } else {
                z = x[o];
            }
            float v = (float)z + L->bias[o];
            if (L->act == DP_ACT_RELU) v = v > 0.0f ? v : 0.0f;
            else if (L->act == DP_ACT_TANH) v = tanhf(v);
            y[o] = v;
        }
        memcpy(x, y, L->out * sizeof(float));
        width = L->out;
    }
    if (logits) memcpy(logits, x, width * sizeof(float));
    float top = x[0];
    for (size_t c = 1; c < width; c++)
        if (x[c] > top) top = x[c];
    float sum = 0.0f;
    for (size_t c = 0; c < width; c++) {
        probs[c] = expf(x[c] - top);
        sum += probs[c];
    }
    for (size_t c = 0; c < width; c++) probs[c] /= sum;
}

void dp_forward(const dp_bundle *b, dp_scratch *s, const size_t *ids, size_t n, float *probs) {
    forward(b, s, ids, n, probs, NULL);
}

/* Tokens of code points -> ids in s->ids (after the unknown-word policy); emit, when given, sees every token. */
static int encode(const dp_bundle *b, dp_scratch *s, const uint32_t *cps, size_t n, size_t *count, dp_token_fn emit,
                  void *ctx, dp_error *err) {
    return dp_encode_cps(b, s, cps, n, count, NULL, emit, ctx, err);
}

/* known: tokens with a row of their own (not the unknown-word row, not left out), as Encoder.encode_known counts */
int dp_encode_cps(const dp_bundle *b, dp_scratch *s, const uint32_t *cps, size_t n, size_t *count, size_t *known,
                  dp_token_fn emit, void *ctx, dp_error *err) {
    dp_tok_work *w = &s->tok;
    if (dp_tokenize_cps(&b->tok, cps, n, w)) return dp_fail(err, "out of memory while tokenizing"), -1;
    if (w->nspans > s->idcap) {
        size_t *ids = realloc(s->ids, w->nspans * sizeof(size_t));
        if (!ids) return dp_fail(err, "out of memory"), -1;
        s->ids = ids;
        s->idcap = w->nspans;
    }
    size_t k = 0, found = 0;
    for (size_t t = 0; t < w->nspans; t++) {
        const dp_span *sp = &w->spans[t];
        if (sp->len > (SIZE_MAX - 1) / 4) return dp_fail(err, "token too long"), -1;
        size_t need = 4 * sp->len;
        if (need > w->bytecap) {
            char *nb = realloc(w->bytes, need);
            if (!nb) return dp_fail(err, "out of memory"), -1;
            w->bytes = nb;
            w->bytecap = need;
        }
        size_t len = 0;
        const uint32_t *cp = w->norm.v + sp->start;
        for (size_t i = 0; i < sp->len; i++) {
            if (cp[i] < 0x80) w->bytes[len++] = (char)cp[i];
            else len += dp_utf8_put(cp[i], w->bytes + len);
        }
        long row = dp_vocab_find(b, (const uint8_t *)w->bytes, len);
        if (row >= 0) found++;
        else row = b->oov_row;
        if (emit) emit(ctx, w->bytes, len, row);
        if (row >= 0) s->ids[k++] = (size_t)row;
    }
    *count = k;
    if (known) *known = found;
    return 0;
}

int dp_classify_cps(const dp_bundle *b, dp_scratch *s, const uint32_t *cps, size_t n, float *probs, size_t *known,
                    dp_error *err) {
    size_t count;
    if (dp_encode_cps(b, s, cps, n, &count, known, NULL, NULL, err)) return -1;
    dp_forward(b, s, s->ids, count, probs);
    return 0;
}

int dp_tokens_cps(const dp_bundle *b, dp_scratch *s, const uint32_t *cps, size_t n, dp_token_fn emit, void *ctx,
                  dp_error *err) {
    size_t count;
    return encode(b, s, cps, n, &count, emit, ctx, err);
}

static int with_text(const dp_bundle *b, dp_scratch *s, const char *text, size_t len, float *probs, size_t *known,
                     dp_token_fn emit, void *ctx, dp_error *err) {
    dp_scratch *own = NULL;
    if (!s && !(s = own = dp_scratch_new(b))) return dp_fail(err, "out of memory"), -1;
    int rc = dp_utf8_decode((const uint8_t *)text, len, &s->tok.cps);
    if (rc) dp_fail(err, "out of memory");
    else if (emit) rc = dp_tokens_cps(b, s, s->tok.cps.v, s->tok.cps.n, emit, ctx, err);
    else rc = dp_classify_cps(b, s, s->tok.cps.v, s->tok.cps.n, probs, known, err);
    dp_scratch_free(own);
    return rc;
}

int dp_classify(const dp_bundle *b, dp_scratch *s, const char *text, size_t len, float *probs, dp_error *err) {
    return with_text(b, s, text, len, probs, NULL, NULL, NULL, err);
}

int dp_classify_known(const dp_bundle *b, dp_scratch *s, const char *text, size_t len, float *probs, size_t *known,
                      dp_error *err) {
    return with_text(b, s, text, len, probs, known, NULL, NULL, err);
}

int dp_tokens(const dp_bundle *b, dp_scratch *s, const char *text, size_t len, dp_token_fn emit, void *ctx,
              dp_error *err) {
    return with_text(b, s, text, len, NULL, NULL, emit, ctx, err);
}

int dp_classify_batch(const dp_bundle *b, dp_scratch *s, const char *const *texts, const size_t *lens, size_t n,
                      float *probs, dp_error *err) {
    dp_scratch *own = NULL;
    if (!s && !(s = own = dp_scratch_new(b))) return dp_fail(err, "out of memory"), -1;
    int rc = 0;
    for (size_t i = 0; i < n && !rc; i++) rc = dp_classify(b, s, texts[i], lens[i], probs + i * b->nlabels, err);
    dp_scratch_free(own);
    return rc;
}

/* FNV-1a, 32 bits (runtime/certify.py hash_token), of each token without a row of its own, into hashes (room for cap);
 * `total` counts them all, `text` those of the current text */
typedef struct {
    long oov_row;
    uint32_t *hashes;
    size_t cap, total, text;
} unknown_hashes;

static void hash_unknown(void *ctx, const char *token, size_t len, long id) {
    unknown_hashes *h = ctx;
    /* skip: left out (-1); unk / rest: on the out-of-vocabulary row, the literal unknown-word token included */
    if (id >= 0 && id != h->oov_row) return;
    uint32_t x = 2166136261u;
    for (size_t i = 0; i < len; i++) x = (x ^ (uint8_t)token[i]) * 16777619u;
    if (h->total < h->cap) h->hashes[h->total] = x;
    h->total++;
    h->text++;
}

static long long encode_flat(const dp_bundle *b, dp_scratch *s, const char *data, const int64_t *offsets, size_t n,
                             int64_t *ids, size_t cap, int64_t *counts, int64_t *known, int64_t *tokens,
                             unknown_hashes *unknown, int64_t *unknown_counts, dp_error *err) {
    dp_scratch *own = NULL;
    if (!s && !(s = own = dp_scratch_new(b))) return dp_fail(err, "out of memory"), -1;
    size_t total = 0;
    long long rc = 0;
    for (size_t i = 0; i < n; i++) {
        if (offsets[i] < 0 || offsets[i + 1] < offsets[i]) {
            dp_fail(err, "text %zu: offsets out of order", i);
            rc = -1;
            break;
        }
        size_t count, found;
        if (unknown) unknown->text = 0;
        if (dp_utf8_decode((const uint8_t *)data + offsets[i], (size_t)(offsets[i + 1] - offsets[i]), &s->tok.cps) ||
            dp_encode_cps(b, s, s->tok.cps.v, s->tok.cps.n, &count, &found, unknown ? hash_unknown : NULL, unknown,
                          err)) {
            dp_fail(err, "out of memory");
            rc = -1;
            break;
        }
        counts[i] = (int64_t)count;
        if (known) known[i] = (int64_t)found;
        if (tokens) tokens[i] = (int64_t)s->tok.nspans;
        if (unknown_counts) unknown_counts[i] = (int64_t)unknown->text;
        for (size_t k = 0; k < count; k++, total++)
            if (total < cap) ids[total] = (int64_t)s->ids[k];
    }
    dp_scratch_free(own);
    return rc < 0 ? rc : (long long)total;
}

long long dp_encode_flat(const dp_bundle *b, dp_scratch *s, const char *data, const int64_t *offsets, size_t n,
                         int64_t *ids, size_t cap, int64_t *counts, int64_t *known, int64_t *tokens, dp_error *err) {
    return encode_flat(b, s, data, offsets, n, ids, cap, counts, known, tokens, NULL, NULL, err);
}

long long dp_encode_unknown_flat(const dp_bundle *b, dp_scratch *s, const char *data, const int64_t *offsets, size_t n,
                                 int64_t *ids, size_t cap, int64_t *counts, int64_t *unknown, uint32_t *hashes,
                                 size_t hash_cap, int64_t *hash_total, dp_error *err) {
    unknown_hashes h = {b->oov_row, hashes, hash_cap, 0, 0};
    long long total = encode_flat(b, s, data, offsets, n, ids, cap, counts, NULL, NULL, &h, unknown, err);
    *hash_total = (int64_t)h.total;
    return total;
}

int dp_classify_flat(const dp_bundle *b, dp_scratch *s, const char *data, const int64_t *offsets, size_t n,
                     float *probs, float *logits, dp_error *err) {
    dp_scratch *own = NULL;
    if (!s && !(s = own = dp_scratch_new(b))) return dp_fail(err, "out of memory"), -1;
    int rc = 0;
    for (size_t i = 0; i < n && !rc; i++) {
        size_t count;
        if (offsets[i] < 0 || offsets[i + 1] < offsets[i]) {
            dp_fail(err, "text %zu: offsets out of order", i);
            rc = -1;
        } else if (dp_utf8_decode((const uint8_t *)data + offsets[i], (size_t)(offsets[i + 1] - offsets[i]),
                                  &s->tok.cps) ||
                   dp_encode_cps(b, s, s->tok.cps.v, s->tok.cps.n, &count, NULL, NULL, NULL, err)) {
            dp_fail(err, "out of memory");
            rc = -1;
        } else {
            forward(b, s, s->ids, count, probs + i * b->nlabels, logits ? logits + i * b->nlabels : NULL);
        }
    }
    dp_scratch_free(own);
    return rc;
}
