/* Internal declarations of the danpack native runtime (not part of the public header). */
#ifndef DP_INTERNAL_H
#define DP_INTERNAL_H

#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>

#include "danpack.h"

#if defined(__SSE2__)
#include <emmintrin.h>
#include <string.h>
/* four int8 elements -> four float32 products q·s: the same IEEE operations as a scalar loop (int8 -> int32 ->
 * float, float product), four lanes at once (x86-64 always has SSE2; other machines take the scalar loops) */
static inline __m128 dp_four_products(const int8_t *row, __m128 step) {
    int32_t four;
    memcpy(&four, row, 4);
    __m128i v = _mm_cvtsi32_si128(four);
    v = _mm_unpacklo_epi8(v, v);
    v = _mm_srai_epi32(_mm_unpacklo_epi16(v, v), 24); /* sign-extended */
    return _mm_mul_ps(_mm_cvtepi32_ps(v), step);
}
#endif

/* ---- errors ---- */
void dp_fail(dp_error *err, const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 2, 3)))
#endif
    ;

/* ---- growable buffers (all sizes checked) ---- */
typedef struct {
    uint32_t *v;
    size_t n, cap;
} dp_u32buf;
int dp_u32_reserve(dp_u32buf *b, size_t need); /* 0 or -1 (overflow / out of memory) */
int dp_u32_push(dp_u32buf *b, uint32_t x);

/* ---- unicode ---- */
enum { DP_NORM_NONE, DP_NORM_NFC, DP_NORM_NFKC, DP_NORM_NFD, DP_NORM_NFKD };
enum { DP_CASE_KEEP, DP_CASE_LOWER, DP_CASE_FOLD };
enum {
    DP_P_ALNUM = 1 << 0, DP_P_WORD = 1 << 1, DP_P_SPACE = 1 << 2, DP_P_MARK = 1 << 3, DP_P_JOINER = 1 << 4,
    DP_P_SINGLE = 1 << 5, DP_P_CASED = 1 << 6, DP_P_IGNORABLE = 1 << 7, DP_P_UNASSIGNED = 1 << 8,
    DP_P_NFD = 1 << 9, DP_P_NFKD = 1 << 10, DP_P_LOWER = 1 << 11, DP_P_FOLD = 1 << 12,
    DP_P_UNSAFE = 1 << 13 /* runtime/safe_text.py escapes it as \uXXXX: not printable, not a space separator */
};
uint16_t dp_props(uint32_t c);
extern const uint16_t dp_ascii_props[128]; /* dp_props of ASCII, for the inline test below */
static inline uint16_t dp_props_inline(uint32_t c) { return c < 0x80 ? dp_ascii_props[c] : dp_props(c); }
const char *dp_unicode_version(void);
/* in -> out (out emptied first): normal form, then case; -1 when out of memory */
int dp_normalize(const uint32_t *in, size_t n, int form, int kase, dp_u32buf *out, dp_u32buf *tmp);
/* UTF-8 -> code points, invalid sequences -> U+FFFD exactly as Python's decoder with errors="replace" */
int dp_utf8_decode(const uint8_t *s, size_t n, dp_u32buf *out);
/* 1 when s is valid UTF-8 as Python's strict decoder sees it (no surrogates, no overlongs) */
int dp_utf8_valid(const uint8_t *s, size_t n);
/* code point -> UTF-8 (surrogates written as 3 bytes); returns bytes written (<= 4) */
size_t dp_utf8_put(uint32_t c, char *out);

/* ---- tokenizer ---- */
typedef struct {
    int form, kase, preset;
    size_t max_tokens;
} dp_tok_spec;
typedef struct {
    size_t start, len; /* in the normalised code points */
} dp_span;
typedef struct {
    dp_u32buf cps, norm, tmp, pin;
    dp_span *spans;
    size_t nspans, spancap;
    char *bytes;
    size_t nbytes, bytecap;
} dp_tok_work;
/* preset name -> id, -1 when this runtime does not implement it */
int dp_preset_id(const char *name, size_t len);
const char *dp_preset_names(void);
int dp_tokenize_cps(const dp_tok_spec *spec, const uint32_t *cps, size_t n, dp_tok_work *w);
void dp_tok_work_free(dp_tok_work *w);

/* ---- sha256 ---- */
void dp_sha256_digest(const uint8_t *data, size_t len, uint8_t out[32]);

/* ---- bundle internals needed by the command-line program ---- */
int dp_classify_cps(const dp_bundle *b, dp_scratch *s, const uint32_t *cps, size_t n, float *probs, size_t *known,
                    dp_error *err);
int dp_tokens_cps(const dp_bundle *b, dp_scratch *s, const uint32_t *cps, size_t n, dp_token_fn emit, void *ctx,
                  dp_error *err);
const dp_tok_spec *dp_bundle_tok_spec(const dp_bundle *b);

#endif
