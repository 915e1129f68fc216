/* The tokenizer presets of runtime/tokenize.py (PRESETS), as scanners over normalised code points.
 * Each scanner finds the same non-overlapping leftmost matches as Python's re.finditer with the preset's pattern;
 * the character classes come from unicode_tables.h (generated from Python's own re classes). */
#include <stdlib.h>
#include <string.h>

#include "internal.h"

enum { PRESET_WORDS_V1, PRESET_SPACES_V1, PRESET_WORDPUNCT_V1, PRESET_COUNT };
static const char *const PRESET_NAMES[PRESET_COUNT] = {"words-v1", "spaces-v1", "wordpunct-v1"};

int dp_preset_id(const char *name, size_t len) {
    for (int i = 0; i < PRESET_COUNT; i++)
        if (strlen(PRESET_NAMES[i]) == len && memcmp(PRESET_NAMES[i], name, len) == 0) return i;
    return -1;
}

const char *dp_preset_names(void) { return "words-v1, spaces-v1, wordpunct-v1"; }

static int add_span(dp_tok_work *w, size_t start, size_t len) {
    if (w->nspans == w->spancap) {
        size_t cap = w->spancap ? w->spancap * 2 : 64;
        if (cap > SIZE_MAX / sizeof(dp_span)) return -1;
        dp_span *s = realloc(w->spans, cap * sizeof(dp_span));
        if (!s) return -1;
        w->spans = s;
        w->spancap = cap;
    }
    w->spans[w->nspans].start = start;
    w->spans[w->nspans].len = len;
    w->nspans++;
    return 0;
}

/* words-v1: [^\W_](?:[^\W_]|MARK)*(?:[APOSTROPHES-](?:[^\W_]|MARK)+)* | one SINGLE character */
static size_t words_v1(const uint32_t *s, size_t n, size_t i, size_t *start) {
    for (; i < n; i++) {
        uint16_t p = dp_props_inline(s[i]);
        if (p & DP_P_ALNUM) {
            size_t j = i + 1;
            for (;;) {
                while (j < n && (dp_props_inline(s[j]) & (DP_P_ALNUM | DP_P_MARK))) j++;
                if (j + 1 < n && (dp_props_inline(s[j]) & DP_P_JOINER) && (dp_props_inline(s[j + 1]) & (DP_P_ALNUM | DP_P_MARK))) {
                    j += 2;
                    continue;
                }
                break;
            }
            *start = i;
            return j - i;
        }
        if (p & DP_P_SINGLE) {
            *start = i;
            return 1;
        }
    }
    *start = n;
    return 0;
}

/* spaces-v1: \S+ */
static size_t spaces_v1(const uint32_t *s, size_t n, size_t i, size_t *start) {
    while (i < n && (dp_props_inline(s[i]) & DP_P_SPACE)) i++;
    size_t j = i;
    while (j < n && !(dp_props_inline(s[j]) & DP_P_SPACE)) j++;
    *start = i;
    return j - i;
}

/* wordpunct-v1: \w+ | [^\w\s] */
static size_t wordpunct_v1(const uint32_t *s, size_t n, size_t i, size_t *start) {
    for (; i < n; i++) {
        uint16_t p = dp_props_inline(s[i]);
        if (p & DP_P_WORD) {
            size_t j = i + 1;
            while (j < n && (dp_props_inline(s[j]) & DP_P_WORD)) j++;
            *start = i;
            return j - i;
        }
        if (!(p & DP_P_SPACE)) {
            *start = i;
            return 1;
        }
    }
    *start = n;
    return 0;
}

int dp_tokenize_cps(const dp_tok_spec *spec, const uint32_t *cps, size_t n, dp_tok_work *w) {
    w->nspans = 0;
    /* Unicode pinned to 14.0.0 (runtime/tokenize.py): a code point unassigned there is a space before
     * normalisation, so hosts with newer tables tokenize every text alike. ASCII is always assigned. */
    size_t k = 0;
    while (k < n && (cps[k] < 0x80 || !(dp_props_inline(cps[k]) & DP_P_UNASSIGNED))) k++;
    if (k < n) {
        if (dp_u32_reserve(&w->pin, n)) return -1;
        for (size_t j = 0; j < n; j++) w->pin.v[j] = cps[j] >= 0x80 && (dp_props_inline(cps[j]) & DP_P_UNASSIGNED) ? 0x20 : cps[j];
        w->pin.n = n;
        cps = w->pin.v;
    }
    if (dp_normalize(cps, n, spec->form, spec->kase, &w->norm, &w->tmp)) return -1;
    const uint32_t *s = w->norm.v;
    size_t len = w->norm.n, i = 0;
    while (w->nspans < spec->max_tokens && i < len) {
        size_t start = len, k = 0;
        switch (spec->preset) {
        case PRESET_WORDS_V1: k = words_v1(s, len, i, &start); break;
        case PRESET_SPACES_V1: k = spaces_v1(s, len, i, &start); break;
        case PRESET_WORDPUNCT_V1: k = wordpunct_v1(s, len, i, &start); break;
        default: return -1;
        }
        if (!k) break;
        if (add_span(w, start, k)) return -1;
        i = start + k;
    }
    return 0;
}

void dp_tok_work_free(dp_tok_work *w) {
    free(w->cps.v);
    free(w->norm.v);
    free(w->tmp.v);
    free(w->pin.v);
    free(w->spans);
    free(w->bytes);
    memset(w, 0, sizeof(*w));
}
