/* Unicode for the tokenizer: UTF-8, normal forms (NFC/NFKC/NFD/NFKD), str.lower / str.casefold, character classes.
 * Every table comes from Python 3.11's unicodedata (Unicode 14.0.0) through gen_tables.py. */
#include <stdlib.h>
#include <string.h>

#include "internal.h"

/* key: code point (bits 0-20), then the UTF-16 lengths in the pool (NFD bits 21-25, NFKD 26-30) */
typedef struct {
    uint32_t key;
    uint16_t nfd_off, nfkd_off;
} dp_decomp_row;
typedef struct {
    uint32_t first, second, composite;
} dp_compose_row;

#include "unicode_tables.h"

#define CP_MASK 0x1FFFFFu
#define HANGUL_S 0xAC00u
#define HANGUL_L 0x1100u
#define HANGUL_V 0x1161u
#define HANGUL_T 0x11A7u
#define HANGUL_COUNT 11172u

/* a three-stage table of unicode_tables.h: top (per 2^(B+M) code points) -> mid (per 2^B) -> block */
#define STAGE3(name, NAME, c)                                                                                          \
    name##_blocks[((uint32_t)name##_mid[((uint32_t)name##_top[(c) >> (NAME##_BLOCK_SHIFT + NAME##_MID_SHIFT)]           \
                                         << NAME##_MID_SHIFT) +                                                        \
                                        (((c) >> NAME##_BLOCK_SHIFT) & ((1u << NAME##_MID_SHIFT) - 1u))]               \
                   << NAME##_BLOCK_SHIFT) +                                                                            \
                  ((c) & ((1u << NAME##_BLOCK_SHIFT) - 1u))]

const char *dp_unicode_version(void) { return DP_UNICODE_VERSION; }

uint16_t dp_props(uint32_t c) {
    if (c < 0x80) return dp_ascii_props[c];
    if (c > 0x10FFFF) return 0;
    return (uint16_t)(STAGE3(dp_cls, DP_CLS, c) | STAGE3(dp_flags, DP_FLAGS, c) << 8);
}

static uint8_t ccc(uint32_t c) {
    if (c > 0x10FFFF) return 0;
    return STAGE3(dp_ccc, DP_CCC, c);
}

int dp_u32_reserve(dp_u32buf *b, size_t need) {
    if (need <= b->cap) return 0;
    size_t cap = b->cap ? b->cap : 64;
    while (cap < need) {
        if (cap > SIZE_MAX / 2 / sizeof(uint32_t)) return -1;
        cap *= 2;
    }
    uint32_t *v = realloc(b->v, cap * sizeof(uint32_t));
    if (!v) return -1;
    b->v = v;
    b->cap = cap;
    return 0;
}

int dp_u32_push(dp_u32buf *b, uint32_t x) {
    if (b->n == b->cap && dp_u32_reserve(b, b->n + 1)) return -1;
    b->v[b->n++] = x;
    return 0;
}

static int push_seq(dp_u32buf *b, const uint32_t *s, size_t n) {
    if (dp_u32_reserve(b, b->n + n)) return -1;
    memcpy(b->v + b->n, s, n * sizeof(uint32_t));
    b->n += n;
    return 0;
}

/* n UTF-16 units of the pool from off, as code points */
static int push_pool(dp_u32buf *b, size_t off, size_t n) {
    if (dp_u32_reserve(b, b->n + n)) return -1;
    for (size_t i = 0; i < n; i++) {
        uint32_t u = dp_pool[off + i];
        if (u >= 0xD800 && u < 0xDC00 && i + 1 < n) {
            u = 0x10000 + ((u - 0xD800) << 10) + (dp_pool[off + i + 1] - 0xDC00u);
            i++;
        }
        b->v[b->n++] = u;
    }
    return 0;
}

/* ---- UTF-8 ---- */

/* Length of a valid sequence starting at s[0] given the bytes available, or 0 when s[0] starts none;
 * *good is how many bytes form the maximal valid prefix (Python replaces that prefix by one U+FFFD). */
static size_t utf8_seq(const uint8_t *s, size_t n, size_t *good, uint32_t *cp) {
    uint8_t b = s[0];
    size_t need;
    uint8_t lo = 0x80, hi = 0xBF;
    if (b < 0x80) {
        *cp = b;
        return 1;
    } else if (b >= 0xC2 && b <= 0xDF) {
        need = 2;
        *cp = b & 0x1F;
    } else if (b >= 0xE0 && b <= 0xEF) {
        need = 3;
        *cp = b & 0x0F;
        if (b == 0xE0) lo = 0xA0;
        if (b == 0xED) hi = 0x9F;
    } else if (b >= 0xF0 && b <= 0xF4) {
        need = 4;
        *cp = b & 0x07;
        if (b == 0xF0) lo = 0x90;
        if (b == 0xF4) hi = 0x8F;
    } else {
        *good = 1;
        return 0;
    }
    size_t i = 1;
    for (; i < need; i++) {
        if (i >= n) break;
        uint8_t c = s[i];
        if (i == 1 ? (c < lo || c > hi) : (c < 0x80 || c > 0xBF)) break;
        *cp = (*cp << 6) | (c & 0x3F);
    }
    if (i == need) return need;
    *good = i;
    return 0;
}

int dp_utf8_decode(const uint8_t *s, size_t n, dp_u32buf *out) {
    out->n = 0;
    if (dp_u32_reserve(out, n + 1)) return -1; /* never more code points than bytes */
    size_t i = 0;
    while (i < n) {
        if (s[i] < 0x80) {
            out->v[out->n++] = s[i++];
            continue;
        }
        size_t good = 0;
        uint32_t cp = 0;
        size_t k = utf8_seq(s + i, n - i, &good, &cp);
        if (k) {
            out->v[out->n++] = cp;
            i += k;
        } else {
            out->v[out->n++] = 0xFFFD;
            i += good;
        }
    }
    return 0;
}

int dp_utf8_valid(const uint8_t *s, size_t n) {
    size_t i = 0;
    while (i < n) {
        if (s[i] < 0x80) {
            i++;
            continue;
        }
        size_t good = 0;
        uint32_t cp = 0;
        size_t k = utf8_seq(s + i, n - i, &good, &cp);
        if (!k) return 0;
        i += k;
    }
    return 1;
}

size_t dp_utf8_put(uint32_t c, char *o) {
    if (c < 0x80) {
        o[0] = (char)c;
        return 1;
    }
    if (c < 0x800) {
        o[0] = (char)(0xC0 | (c >> 6));
        o[1] = (char)(0x80 | (c & 0x3F));
        return 2;
    }
    if (c < 0x10000) {
        o[0] = (char)(0xE0 | (c >> 12));
        o[1] = (char)(0x80 | ((c >> 6) & 0x3F));
        o[2] = (char)(0x80 | (c & 0x3F));
        return 3;
    }
    o[0] = (char)(0xF0 | (c >> 18));
    o[1] = (char)(0x80 | ((c >> 12) & 0x3F));
    o[2] = (char)(0x80 | ((c >> 6) & 0x3F));
    o[3] = (char)(0x80 | (c & 0x3F));
    return 4;
}

/* ---- normal forms ---- */

static const dp_decomp_row *find_decomp(uint32_t c) {
    size_t lo = 0, hi = DP_DECOMP_COUNT;
    while (lo < hi) {
        size_t mid = lo + (hi - lo) / 2;
        if ((dp_decomp[mid].key & CP_MASK) < c) lo = mid + 1;
        else hi = mid;
    }
    return lo < DP_DECOMP_COUNT && (dp_decomp[lo].key & CP_MASK) == c ? &dp_decomp[lo] : NULL;
}

/* case maps: keys hold the code point (bits 0-20) and the UTF-16 length of its mapping (bits 21-25); index or -1 */
static long find_case(const uint32_t *keys, size_t count, uint32_t c) {
    size_t lo = 0, hi = count;
    while (lo < hi) {
        size_t mid = lo + (hi - lo) / 2;
        if ((keys[mid] & CP_MASK) < c) lo = mid + 1;
        else hi = mid;
    }
    return lo < count && (keys[lo] & CP_MASK) == c ? (long)lo : -1;
}

static uint32_t compose_pair(uint32_t a, uint32_t b) {
    if (a >= HANGUL_L && a < HANGUL_L + 19 && b >= HANGUL_V && b < HANGUL_V + 21)
        return HANGUL_S + ((a - HANGUL_L) * 21 + (b - HANGUL_V)) * 28;
    if (a >= HANGUL_S && a < HANGUL_S + HANGUL_COUNT && (a - HANGUL_S) % 28 == 0 && b > HANGUL_T && b < HANGUL_T + 28)
        return a + (b - HANGUL_T);
    if (b < 0x300) return 0; /* no composition has a second character below U+0300 (gen_tables.py pairs) */
    size_t lo = 0, hi = DP_COMPOSE_COUNT;
    while (lo < hi) {
        size_t mid = lo + (hi - lo) / 2;
        const dp_compose_row *r = &dp_compose[mid];
        if (r->first < a || (r->first == a && r->second < b)) lo = mid + 1;
        else hi = mid;
    }
    if (lo < DP_COMPOSE_COUNT && dp_compose[lo].first == a && dp_compose[lo].second == b) return dp_compose[lo].composite;
    return 0;
}

static int decompose(const uint32_t *in, size_t n, int compat, dp_u32buf *out) {
    out->n = 0;
    if (dp_u32_reserve(out, n)) return -1;
    uint16_t bit = compat ? DP_P_NFKD : DP_P_NFD;
    for (size_t i = 0; i < n; i++) {
        uint32_t c = in[i];
        if (c < 0xA0 || !(dp_props(c) & bit)) {
            if (dp_u32_push(out, c)) return -1;
        } else if (c >= HANGUL_S && c < HANGUL_S + HANGUL_COUNT) {
            uint32_t s = c - HANGUL_S, t = HANGUL_T + s % 28;
            uint32_t seq[3] = {HANGUL_L + s / 588, HANGUL_V + (s % 588) / 28, t};
            if (push_seq(out, seq, t == HANGUL_T ? 2 : 3)) return -1;
        } else {
            const dp_decomp_row *r = find_decomp(c);
            if (!r) {
                if (dp_u32_push(out, c)) return -1;
            } else if (compat) {
                if (push_pool(out, r->nfkd_off, (r->key >> 26) & 31u)) return -1;
            } else if (push_pool(out, r->nfd_off, (r->key >> 21) & 31u)) {
                return -1;
            }
        }
    }
    /* canonical order: a stable sort of each run of non-starters by combining class */
    uint32_t *v = out->v;
    for (size_t i = 1; i < out->n; i++) {
        uint8_t k = ccc(v[i]);
        if (!k) continue;
        size_t j = i;
        uint32_t c = v[i];
        while (j > 0 && ccc(v[j - 1]) > k) {
            v[j] = v[j - 1];
            j--;
        }
        v[j] = c;
    }
    return 0;
}

static void compose(dp_u32buf *b) {
    uint32_t *s = b->v;
    size_t n = b->n;
    if (n == 0) return;
    size_t starter = 0, w = 1;
    uint32_t starter_ch = s[0];
    int last = ccc(starter_ch) ? 256 : 0; /* 256: no starter yet, nothing composes */
    for (size_t r = 1; r < n; r++) {
        uint32_t c = s[r];
        int k = ccc(c);
        uint32_t comp = (last < k || last == 0) ? compose_pair(starter_ch, c) : 0;
        if (comp) {
            s[starter] = starter_ch = comp;
            continue;
        }
        if (k == 0) {
            starter = w;
            starter_ch = c;
        }
        last = k;
        s[w++] = c;
    }
    b->n = w;
}

/* Final_Sigma (as str.lower does it): capital sigma at i lowers to final sigma when a cased letter precedes it
 * (skipping case-ignorables) and none follows. */
static int final_sigma(const uint32_t *s, size_t n, size_t i) {
    size_t j = i;
    uint16_t p = 0;
    while (j > 0) {
        p = dp_props(s[--j]);
        if (!(p & DP_P_IGNORABLE)) break;
        p = 0;
    }
    if (!(p & DP_P_CASED) || (p & DP_P_IGNORABLE)) return 0;
    for (j = i + 1; j < n; j++) {
        p = dp_props(s[j]);
        if (!(p & DP_P_IGNORABLE)) return !(p & DP_P_CASED);
    }
    return 1;
}

static int change_case(const uint32_t *in, size_t n, int kase, dp_u32buf *out) {
    out->n = 0;
    if (dp_u32_reserve(out, n)) return -1;
    uint16_t bit = kase == DP_CASE_LOWER ? DP_P_LOWER : DP_P_FOLD;
    for (size_t i = 0; i < n; i++) {
        uint32_t c = in[i];
        if (c < 0x80) { /* room for n reserved above; only non-ASCII mappings grow the text */
            if (out->n == out->cap && dp_u32_reserve(out, out->n + 1)) return -1;
            out->v[out->n++] = c >= 'A' && c <= 'Z' ? c + 32 : c;
            continue;
        }
        if (!(dp_props(c) & bit)) {
            if (dp_u32_push(out, c)) return -1;
            continue;
        }
        if (kase == DP_CASE_LOWER && c == 0x3A3) {
            if (dp_u32_push(out, final_sigma(in, n, i) ? 0x3C2 : 0x3C3)) return -1;
            continue;
        }
        int lower = kase == DP_CASE_LOWER;
        long r = lower ? find_case(dp_lower_key, DP_LOWER_COUNT, c) : find_case(dp_fold_key, DP_FOLD_COUNT, c);
        if (r < 0) {
            if (dp_u32_push(out, c)) return -1;
        } else if (push_pool(out, lower ? dp_lower_off[r] : dp_fold_off[r],
                             ((lower ? dp_lower_key[r] : dp_fold_key[r]) >> 21) & 31u)) {
            return -1;
        }
    }
    return 0;
}

static int all_ascii(const uint32_t *s, size_t n) {
    for (size_t i = 0; i < n; i++)
        if (s[i] >= 0x80) return 0;
    return 1;
}

int dp_normalize(const uint32_t *in, size_t n, int form, int kase, dp_u32buf *out, dp_u32buf *tmp) {
    const uint32_t *src = in;
    size_t len = n;
    if (form != DP_NORM_NONE && !all_ascii(in, n)) { /* ASCII is in every normal form already */
        /* Piece by piece: an ASCII character has combining class 0, has no other normal form and never composes
         * with what precedes it (every second character of a composition is U+0300 or above), so the text may be
         * cut before each one. ASCII runs are copied; each non-ASCII run is normalised with the ASCII character
         * before it (which may compose with it). `out` holds the piece meanwhile. */
        int compat = form == DP_NORM_NFKC || form == DP_NORM_NFKD;
        tmp->n = 0;
        if (dp_u32_reserve(tmp, n)) return -1;
        size_t i = 0;
        while (i < n) {
            size_t j = i;
            while (j < n && in[j] < 0x80 && (j + 1 == n || in[j + 1] < 0x80)) j++;
            if (j > i && push_seq(tmp, in + i, j - i)) return -1;
            if (j == n) break;
            i = j++; /* the piece: in[i] (ASCII or not) and the non-ASCII characters after it */
            while (j < n && in[j] >= 0x80) j++;
            if (decompose(in + i, j - i, compat, out)) return -1;
            if (form == DP_NORM_NFC || form == DP_NORM_NFKC) compose(out);
            if (push_seq(tmp, out->v, out->n)) return -1;
            i = j;
        }
        src = tmp->v;
        len = tmp->n;
    }
    if (kase == DP_CASE_KEEP) {
        out->n = 0;
        if (len && push_seq(out, src, len)) return -1;
        return 0;
    }
    return change_case(src, len, kase, out);
}
