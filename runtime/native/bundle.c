/* Reading and verifying a danpack bundle (format version 1) with every rule of the README's specification, in the
 * order runtime/bundle.py applies them: outer map, format, version, checksum, payload, tensors, vocabulary (bounded
 * inflation), manifest, graph; then the packer's probe is re-run (as runtime.classifier does) before any answer. */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <zlib.h>

#include "bundle_impl.h"
#include "label_ranges.h"
#include "msgpack.h"

#define MAX_FILE_BYTES ((uint64_t)1 << 32)
#define MAX_MANIFEST_DEPTH 8
#define MAX_LOGIT_REACH 1e30
#define MAX_VOCAB_BYTES_PER_ROW 256
#define VOCAB_SLACK_BYTES 4096
#define PROBE_TOLERANCE 1e-4
#define MAX_TOKENS_LIMIT 1024 /* runtime/tokenize.py MAX_TOKENS_LIMIT */
#define MAX_LABELS 1024 /* runtime/safe_text.py MAX_LABELS */
#define MAX_LABEL_CHARS 100 /* runtime/safe_text.py MAX_LABEL_CHARS */
#define MAX_TOKEN_CHARS 256 /* runtime/safe_text.py MAX_TOKEN_CHARS */
#define MAX_PROBE_TEXTS 32 /* runtime/bundle.py MAX_PROBE_TEXTS */
#define MAX_PROBE_TEXT_CHARS 16384 /* runtime/bundle.py MAX_PROBE_TEXT_CHARS */
#define NOTE_COPY "; copy it again from the packer's output"

void dp_fail(dp_error *err, const char *fmt, ...) {
    if (!err) return;
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(err->message, sizeof(err->message), fmt, ap);
    va_end(ap);
}

/* ---- tensors ---- */

typedef struct {
    tensor *t;
    size_t n;
} tensors;

static const tensor *find_tensor(const tensors *ts, const char *name) {
    size_t len = strlen(name);
    for (size_t i = 0; i < ts->n; i++)
        if (ts->t[i].name_len == len && memcmp(ts->t[i].name, name, len) == 0) return &ts->t[i];
    return NULL;
}

static float f32_at(const uint8_t *p, size_t i) {
    uint32_t v = (uint32_t)p[4 * i] | (uint32_t)p[4 * i + 1] << 8 | (uint32_t)p[4 * i + 2] << 16 |
                 (uint32_t)p[4 * i + 3] << 24;
    float f;
    memcpy(&f, &v, 4);
    return f;
}

static float *copy_f32(const tensor *t) {
    size_t n = t->bytes / 4;
    float *out = malloc(n ? n * sizeof(float) : 1);
    if (out)
        for (size_t i = 0; i < n; i++) out[i] = f32_at(t->data, i);
    return out;
}

static void show(char *out, size_t cap, const uint8_t *p, size_t n) {
    size_t k = n < 40 ? n : 40;
    snprintf(out, cap, "'%.*s%s'", (int)k, (const char *)p, n > k ? "..." : "");
}

static int decode_tensors(const char *src, const dp_mp *map, tensors *ts, dp_error *err) {
    ts->t = calloc(map->len ? map->len : 1, sizeof(tensor));
    ts->n = 0;
    if (!ts->t) return dp_fail(err, "%s: out of memory", src), -1;
    static const char *const keys[] = {"data", "dtype", "shape"};
    for (size_t i = 0; i < map->len; i++) {
        const dp_mp *k = &map->items[2 * i], *spec = &map->items[2 * i + 1];
        int later = 0; /* a repeated name: the last one counts, as in a Python dict */
        for (size_t j = i + 1; j < map->len && !later; j++) {
            const dp_mp *k2 = &map->items[2 * j];
            later = k2->type == k->type && k2->len == k->len && memcmp(k2->p, k->p, k->len) == 0;
        }
        if (later) continue;
        char name[64];
        show(name, sizeof(name), k->p, k->len);
        if (k->type != MP_STR || !dp_mp_keys_are(spec, keys, 3))
            return dp_fail(err, "%s: tensor %s must be a map with dtype, shape and data", src, name), -1;
        const dp_mp *dtype = dp_mp_get(spec, "dtype"), *shape = dp_mp_get(spec, "shape"), *data = dp_mp_get(spec, "data");
        if (!dp_mp_is(dtype, "int8") && !dp_mp_is(dtype, "float32"))
            return dp_fail(err, "%s: tensor %s has dtype other than 'float32' or 'int8'", src, name), -1;
        int ok = shape->type == MP_ARR && shape->len >= 1 && shape->len <= 2;
        for (size_t d = 0; ok && d < shape->len; d++)
            ok = shape->items[d].type == MP_INT && !shape->items[d].huge && shape->items[d].i >= 0;
        if (!ok)
            return dp_fail(err, "%s: tensor %s has a shape other than 1 or 2 non-negative integers", src, name), -1;
        if (data->type != MP_BIN) return dp_fail(err, "%s: tensor %s data is not bytes", src, name), -1;
        tensor *t = &ts->t[ts->n++];
        t->name = k->p;
        t->name_len = k->len;
        t->int8 = dp_mp_is(dtype, "int8");
        t->ndim = shape->len;
        uint64_t expected = t->int8 ? 1 : 4;
        int overflow = 0;
        for (size_t d = 0; d < shape->len; d++) {
            uint64_t dim = (uint64_t)shape->items[d].i;
            t->shape[d] = (size_t)dim;
            if (dim && expected > UINT64_MAX / dim) overflow = 1;
            else expected *= dim;
            if (dim > SIZE_MAX) overflow = 1;
        }
        t->data = data->p;
        t->bytes = data->len;
        if (overflow || expected != data->len)
            return dp_fail(err, "%s: tensor %s declares a shape whose bytes differ from the %zu bytes it holds", src, name,
                           data->len), -1;
    }
    return 0;
}

/* ---- vocabulary ---- */

static uint64_t fnv(const uint8_t *p, size_t n) {
    uint64_t h = 1469598103934665603ull;
    for (size_t i = 0; i < n; i++) h = (h ^ p[i]) * 1099511628211ull;
    return h;
}

long dp_vocab_find(const dp_bundle *b, const uint8_t *tok, size_t len) {
    if (!b->nslots) return -1;
    size_t mask = b->nslots - 1, i = (size_t)fnv(tok, len) & mask;
    for (;;) {
        uint32_t slot = b->slots[i];
        if (!slot) return -1;
        size_t row = slot - 1;
        if (b->tok_len[row] == len && memcmp(b->vocab_text + b->tok_off[row], tok, len) == 0) return (long)row;
        i = (i + 1) & mask;
    }
}

static int inflate_vocab(const char *src, const uint8_t *blob, size_t len, uint64_t limit, dp_bundle *b, dp_error *err) {
    z_stream zs;
    memset(&zs, 0, sizeof(zs));
    if (inflateInit(&zs) != Z_OK) return dp_fail(err, "%s: out of memory", src), -1;
    size_t cap = limit < 65536 ? (size_t)limit : 65536, got = 0;
    char *out = malloc(cap + 1);
    int ret = Z_OK, rc = -1;
    if (!out) goto done;
    zs.next_in = (Bytef *)(uintptr_t)blob;
    for (;;) {
        size_t left_in = len - (size_t)((const uint8_t *)zs.next_in - blob);
        zs.avail_in = left_in > 0x40000000u ? 0x40000000u : (uInt)left_in;
        if (got == cap) {
            if (cap >= limit) break;
            size_t ncap = cap * 2 > limit ? (size_t)limit : cap * 2;
            char *o = realloc(out, ncap + 1);
            if (!o) goto done;
            out = o;
            cap = ncap;
        }
        size_t room = cap - got;
        zs.next_out = (Bytef *)out + got;
        zs.avail_out = room > 0x40000000u ? 0x40000000u : (uInt)room;
        ret = inflate(&zs, Z_NO_FLUSH);
        got = (size_t)((char *)zs.next_out - out);
        if (ret == Z_STREAM_END) break;
        if (ret == Z_BUF_ERROR && got < cap) break; /* no progress: input used up */
        if (ret != Z_OK && ret != Z_BUF_ERROR) {
            dp_fail(err, "%s: vocab is not a valid zlib stream (%s)", src, zs.msg ? zs.msg : "damaged");
            rc = -2;
            goto done;
        }
    }
    size_t unused = len - (size_t)((const uint8_t *)zs.next_in - blob);
    if (ret != Z_STREAM_END && got >= limit) {
        dp_fail(err, "%s: vocab inflates to more than %llu bytes (%d per table row, far beyond any real vocabulary); "
                     "refused as a decompression bomb", src, (unsigned long long)limit, MAX_VOCAB_BYTES_PER_ROW);
        rc = -2;
        goto done;
    }
    if (ret != Z_STREAM_END || unused) {
        dp_fail(err, "%s: vocab's zlib stream is %s", src, ret != Z_STREAM_END ? "cut short" : "followed by other bytes");
        rc = -2;
        goto done;
    }
    if (!dp_utf8_valid((const uint8_t *)out, got)) {
        dp_fail(err, "%s: vocab is not UTF-8", src);
        rc = -2;
        goto done;
    }
    out[got] = '\n';
    b->vocab_text = out;
    b->vocab_len = got;
    out = NULL;
    rc = 0;
done:
    inflateEnd(&zs);
    free(out);
    if (rc == -1) dp_fail(err, "%s: out of memory while inflating the vocabulary", src);
    return rc ? -1 : 0;
}

static size_t utf8_chars(const uint8_t *p, size_t len);

static int index_vocab(const char *src, dp_bundle *b, dp_error *err) {
    size_t n = 0;
    if (b->vocab_len) {
        n = 1;
        for (size_t i = 0; i < b->vocab_len; i++) n += b->vocab_text[i] == '\n';
    }
    b->ntokens = n;
    b->tok_off = malloc((n ? n : 1) * sizeof(size_t));
    b->tok_len = malloc((n ? n : 1) * sizeof(size_t));
    size_t slots = 16;
    while (slots < 2 * n) slots *= 2;
    b->slots = calloc(slots, sizeof(uint32_t));
    b->nslots = slots;
    if (!b->tok_off || !b->tok_len || !b->slots) return dp_fail(err, "%s: out of memory", src), -1;
    size_t start = 0, row = 0;
    for (size_t i = 0; n && i <= b->vocab_len; i++) {
        if (b->vocab_text[i] != '\n') continue;
        b->tok_off[row] = start;
        b->tok_len[row] = i - start;
        row++;
        start = i + 1;
    }
    for (row = 0; row < n; row++) {
        const uint8_t *tok = (const uint8_t *)b->vocab_text + b->tok_off[row];
        if (utf8_chars((const uint8_t *)b->vocab_text + b->tok_off[row], b->tok_len[row]) > MAX_TOKEN_CHARS)
            return dp_fail(err, "%s: manifest vocabulary token %zu is longer than %d characters", src, row + 1,
                           MAX_TOKEN_CHARS), -1;
        if (b->tok_len[row] == 0)
            return dp_fail(err, "%s: manifest vocabulary holds an empty token (line %zu); tokens must be non-empty", src,
                           row + 1), -1;
        if (row >= UINT32_MAX - 1) return dp_fail(err, "%s: vocabulary too large", src), -1;
        size_t mask = slots - 1, i = (size_t)fnv(tok, b->tok_len[row]) & mask;
        for (;;) {
            uint32_t slot = b->slots[i];
            if (!slot) {
                b->slots[i] = (uint32_t)row + 1;
                break;
            }
            if (b->tok_len[slot - 1] == b->tok_len[row] &&
                memcmp(b->vocab_text + b->tok_off[slot - 1], tok, b->tok_len[row]) == 0)
                return dp_fail(err, "%s: manifest vocabulary (%zu tokens) repeats the token on line %zu", src, n,
                               row + 1), -1;
            i = (i + 1) & mask;
        }
    }
    return 0;
}

/* ---- manifest ---- */

static int is_int(const dp_mp *v) { return v && v->type == MP_INT; }
static int is_count(const dp_mp *v) { return is_int(v) && !v->huge && v->i >= 0; }
static int int_is(const dp_mp *v, size_t want) { return is_count(v) && (uint64_t)v->i == (uint64_t)want; }

static int check_tokenizer(const char *src, const dp_mp *t, dp_tok_spec *spec, dp_error *err) {
    spec->form = DP_NORM_NFKC;
    spec->kase = DP_CASE_LOWER;
    spec->preset = dp_preset_id("words-v1", 8);
    spec->max_tokens = 512;
    if (!t || t->type != MP_MAP) return dp_fail(err, "%s: manifest field 'tokenizer' is invalid (not a mapping)", src), -1;
    static const char *const forms[] = {"none", "NFC", "NFKC", "NFD", "NFKD"};
    static const char *const cases[] = {"keep", "lower", "casefold"};
    for (size_t i = 0; i < t->len; i++) {
        const dp_mp *k = &t->items[2 * i], *v = &t->items[2 * i + 1];
        if (dp_mp_is(k, "normalization")) {
            int f = -1;
            for (int j = 0; j < 5; j++)
                if (dp_mp_is(v, forms[j])) f = j;
            if (f < 0) return dp_fail(err, "%s: manifest field 'tokenizer' is invalid (normalization)", src), -1;
            spec->form = f;
        } else if (dp_mp_is(k, "case")) {
            int c = -1;
            for (int j = 0; j < 3; j++)
                if (dp_mp_is(v, cases[j])) c = j;
            if (c < 0) return dp_fail(err, "%s: manifest field 'tokenizer' is invalid (case)", src), -1;
            spec->kase = c;
        } else if (dp_mp_is(k, "unicode_version")) {
            if (!dp_mp_is(v, "14.0.0"))
                return dp_fail(err, "%s: manifest field 'tokenizer' is invalid (unicode_version must be 14.0.0, the "
                                    "version danpack pins)", src), -1;
        } else if (dp_mp_is(k, "max_tokens")) {
            if (!is_int(v) || v->huge || v->i < 1 || v->i > MAX_TOKENS_LIMIT)
                return dp_fail(err, "%s: manifest field 'tokenizer' is invalid (max_tokens must be an integer from 1 to %d)",
                               src, MAX_TOKENS_LIMIT), -1;
            spec->max_tokens = v->huge || (uint64_t)v->i > SIZE_MAX ? SIZE_MAX : (size_t)v->i;
        } else if (dp_mp_is(k, "pattern")) {
            if (v->type != MP_STR || v->len == 0)
                return dp_fail(err, "%s: manifest field 'tokenizer' is invalid (pattern must be a non-empty string)", src), -1;
            spec->preset = dp_preset_id((const char *)v->p, v->len);
            if (spec->preset < 0) {
                char pat[64];
                show(pat, sizeof(pat), v->p, v->len);
                return dp_fail(err, "%s: the bundle's tokenizer uses the custom pattern %s, which the native runtime "
                                    "does not run (it implements the presets %s); run this bundle with the Python "
                                    "runtime (danpack-run) or repack it with a preset pattern", src, pat,
                               dp_preset_names()), -1;
            }
        } else {
            return dp_fail(err, "%s: manifest field 'tokenizer' is invalid (unknown fields)", src), -1;
        }
    }
    return 0;
}

static int check_description(const char *src, const dp_mp *m, dp_error *err) {
    const dp_mp *source = dp_mp_get(m, "source"), *selection = dp_mp_get(m, "selection");
    if (!source || source->type != MP_MAP || !dp_mp_get(source, "sha256") || dp_mp_get(source, "sha256")->type != MP_STR ||
        !is_count(dp_mp_get(source, "rows")) || !is_count(dp_mp_get(source, "embedding_dim")) ||
        !is_count(dp_mp_get(source, "bytes")))
        return dp_fail(err, "%s: manifest field 'source' must hold the float model's sha256 (str) and rows, "
                            "embedding_dim, bytes (integers)", src), -1;
    const dp_mp *coverage = selection && selection->type == MP_MAP ? dp_mp_get(selection, "coverage") : NULL;
    if (!coverage || (coverage->type != MP_INT && coverage->type != MP_FLOAT))
        return dp_fail(err, "%s: manifest field 'selection' must be a map with a numeric coverage", src), -1;
    const dp_mp *packer = dp_mp_get(m, "packer"), *folded = dp_mp_get(dp_mp_get(m, "table"), "folded");
    if (!packer || packer->type != MP_STR || !folded || folded->type != MP_BOOL)
        return dp_fail(err, "%s: manifest fields 'packer' (a version string) and 'table.folded' (a bool) are required", src), -1;
    return 0;
}

static int too_deep(const dp_mp *v, int depth) {
    if (v->type != MP_MAP && v->type != MP_ARR) return 0;
    if (depth > MAX_MANIFEST_DEPTH) return 1;
    size_t n = v->type == MP_MAP ? 2 * v->len : v->len;
    for (size_t i = 0; i < n; i++)
        if (too_deep(&v->items[i], depth + 1)) return 1;
    return 0;
}

/* The first character of a (valid UTF-8) label that runtime/safe_text.py calls unsafe (the UNSAFE property of
 * unicode_tables.h, generated from safe_text's own rule, as the record writer escapes): its code point and general
 * category for the message, or 0 when there is none. Categories: Cn from the UNASSIGNED property, the rest from
 * label_ranges.h. */
static int first_unsafe(const uint8_t *p, size_t len, uint32_t *cp, const char **category) {
    for (size_t i = 0; i < len;) {
        uint32_t c = p[i];
        size_t n = c < 0x80 ? 1 : c < 0xE0 ? 2 : c < 0xF0 ? 3 : 4;
        if (i + n > len) n = len - i;
        for (size_t k = 1; k < n; k++) c = (c << 6) | (p[i + k] & 0x3F);
        c &= n == 1 ? 0x7F : n == 2 ? 0x7FF : n == 3 ? 0xFFFF : 0x1FFFFF;
        i += n;
        if (!(dp_props(c) & DP_P_UNSAFE)) continue;
        const char *cat = "Cn";
        if (!(dp_props(c) & DP_P_UNASSIGNED)) {
            size_t lo = 0, hi = sizeof(DP_UNSAFE_RANGES) / sizeof(DP_UNSAFE_RANGES[0]);
            while (lo < hi) { /* the first range ending at or after c */
                size_t mid = lo + (hi - lo) / 2;
                if (DP_UNSAFE_RANGES[mid].last < c) lo = mid + 1;
                else hi = mid;
            }
            cat = lo < sizeof(DP_UNSAFE_RANGES) / sizeof(DP_UNSAFE_RANGES[0]) && DP_UNSAFE_RANGES[lo].first <= c
                      ? DP_UNSAFE_RANGES[lo].category : "C?";
        }
        *cp = c;
        *category = cat;
        return 1;
    }
    return 0;
}

/* A label for a message as runtime/safe_text.py escape_text and repr show it: unsafe characters as \\uXXXX (astral
 * ones as their UTF-16 pair), ' and \ escaped, the rest as it is; cut at about 200 bytes. */
static void show_label(char *out, size_t cap, const uint8_t *p, size_t len) {
    size_t k = 0;
    out[k++] = '\'';
    for (size_t i = 0; i < len && k + 16 < cap;) {
        size_t n = p[i] < 0x80 ? 1 : p[i] < 0xE0 ? 2 : p[i] < 0xF0 ? 3 : 4;
        if (i + n > len) n = len - i;
        uint32_t c;
        const char *cat;
        if (first_unsafe(p + i, n, &c, &cat)) {
            if (c < 0x10000) k += (size_t)snprintf(out + k, cap - k, "\\\\u%04x", (unsigned)c);
            else k += (size_t)snprintf(out + k, cap - k, "\\\\u%04x\\\\u%04x", (unsigned)(0xD800 + ((c - 0x10000) >> 10)),
                                       (unsigned)(0xDC00 + ((c - 0x10000) & 0x3FF)));
        } else if (p[i] == '\'' || p[i] == '\\') {
            out[k++] = '\\';
            out[k++] = (char)p[i];
        } else {
            memcpy(out + k, p + i, n);
            k += n;
        }
        i += n;
    }
    out[k++] = '\'';
    out[k] = 0;
}

/* Characters of a UTF-8 string: its bytes that do not continue a sequence (Python counts str length so). */
static size_t utf8_chars(const uint8_t *p, size_t len) {
    size_t n = 0;
    for (size_t i = 0; i < len; i++) n += (p[i] & 0xC0) != 0x80;
    return n;
}

static int check_probe_probs(const dp_mp *p, size_t classes) {
    int ok = p->type == MP_ARR && p->len == classes;
    for (size_t j = 0; ok && j < p->len; j++)
        ok = p->items[j].type == MP_FLOAT && p->items[j].f >= 0.0 && p->items[j].f <= 1.0;
    return ok;
}

static int check_probe(const char *src, const dp_mp *probe, size_t rows, size_t classes, dp_error *err) {
    static const char *const keys[] = {"ids", "probs", "text_probs", "texts"};
    if (!dp_mp_keys_are(probe, keys, 4))
        return dp_fail(err, "%s: manifest field 'probe' must be a map with ids, probs, text_probs, texts", src), -1;
    const dp_mp *texts = dp_mp_get(probe, "texts"), *text_probs = dp_mp_get(probe, "text_probs");
    int ok = texts->type == MP_ARR && text_probs->type == MP_ARR && texts->len == text_probs->len
             && texts->len <= MAX_PROBE_TEXTS;
    for (size_t i = 0; ok && i < texts->len; i++)
        ok = texts->items[i].type == MP_STR && utf8_chars(texts->items[i].p, texts->items[i].len) <= MAX_PROBE_TEXT_CHARS;
    if (!ok)
        return dp_fail(err, "%s: manifest probe texts and text_probs must be lists of the same length (at most %d), "
                            "the texts strings of at most %d characters", src, MAX_PROBE_TEXTS, MAX_PROBE_TEXT_CHARS), -1;
    for (size_t i = 0; i < text_probs->len; i++)
        if (!check_probe_probs(&text_probs->items[i], classes))
            return dp_fail(err, "%s: manifest probe probabilities must be %zu floats in [0, 1] per text", src, classes), -1;
    const dp_mp *ids = dp_mp_get(probe, "ids"), *probs = dp_mp_get(probe, "probs");
    if (ids->type != MP_ARR || probs->type != MP_ARR || ids->len != probs->len || ids->len < 1 || ids->len > 64)
        return dp_fail(err, "%s: manifest probe ids and probs must be lists of the same length (1 to 64): without a "
                            "probe a backend that computes differently goes unnoticed", src), -1;
    for (size_t i = 0; i < ids->len; i++) {
        const dp_mp *seq = &ids->items[i], *p = &probs->items[i];
        int ok = seq->type == MP_ARR && seq->len <= 64;
        for (size_t j = 0; ok && j < seq->len; j++) ok = is_count(&seq->items[j]) && (uint64_t)seq->items[j].i < rows;
        if (!ok) return dp_fail(err, "%s: manifest probe ids must be lists of at most 64 row ids in [0, %zu)", src, rows), -1;
        if (!check_probe_probs(p, classes))
            return dp_fail(err, "%s: manifest probe probabilities must be %zu floats in [0, 1] per sequence", src, classes), -1;
    }
    return 0;
}

static int bit_at(const uint8_t *p, uint64_t j) { return p[j / 8] >> (j % 8) & 1; }

/* The Elias-Fano fingerprint set of the `absent` list (runtime/fingerprints.py decode_fingerprints): 0 when it is
 * the one encoding of `count` strictly ascending values below 2^bits, 1 for a wrong shape, 2 for wrong values.
 * Reads only the bytes present: count is bounded by the bits of `high` before anything is decoded. */
static int check_fingerprints(const dp_mp *f) {
    static const char *keys[4] = {"bits", "count", "low", "high"};
    if (!dp_mp_keys_are(f, keys, 4)) return 1;
    const dp_mp *bits = dp_mp_get(f, "bits"), *count = dp_mp_get(f, "count");
    const dp_mp *low = dp_mp_get(f, "low"), *high = dp_mp_get(f, "high");
    if (!is_count(bits) || !is_count(count) || low->type != MP_BIN || high->type != MP_BIN) return 1;
    if (bits->i < 1 || bits->i > 32 || count->i < 1 || (uint64_t)count->i > 8 * (uint64_t)high->len ||
        (uint64_t)count->i > (uint64_t)1 << bits->i)
        return 1;
    uint64_t n = (uint64_t)count->i, b = (uint64_t)bits->i, ceil_log2 = 0;
    while (((uint64_t)1 << ceil_log2) < n) ceil_log2++;
    uint64_t s = b > ceil_log2 ? b - ceil_log2 : 0; /* split: low bits per value */
    if (low->len != (n * s + 7) / 8 || high->p[high->len - 1] == 0) return 2;
    for (uint64_t j = n * s; j < 8 * (uint64_t)low->len; j++)
        if (bit_at(low->p, j)) return 2;
    uint64_t seen = 0, prev = 0;
    for (uint64_t j = 0; j < 8 * (uint64_t)high->len; j++) {
        if (!bit_at(high->p, j)) continue;
        if (seen == n || (j - seen) >> (b - s)) return 2; /* one bit too many, or a value at or past 2^bits */
        uint64_t v = (j - seen) << s;
        for (uint64_t t = 0; t < s; t++) v |= (uint64_t)bit_at(low->p, seen * s + t) << t;
        if (seen && v <= prev) return 2;
        prev = v;
        seen++;
    }
    return seen == n ? 0 : 2;
}

/* The optional envelope of the rows the bundle leaves out (runtime/bundle.py _check_unknown); absent in older bundles.
 * Optional parts: buckets ((K, 2, width) uint8 steps: a bucket all 255, or each coordinate's two steps summing to at
 * most 254), absent (a fingerprint set, check_fingerprints, or strictly ascending little-endian uint32 hashes as
 * older packers wrote; only where skipped is true) and outliers
 * ({filter: non-empty bytes, probes: 1..16}, only with buckets). */
static int check_unknown(const char *src, const dp_mp *f, size_t width, dp_error *err) {
    if (!f || f->type == MP_NIL) return 0;
    const dp_mp *buckets = f->type == MP_MAP ? dp_mp_get(f, "buckets") : NULL;
    const dp_mp *absent = f->type == MP_MAP ? dp_mp_get(f, "absent") : NULL;
    const dp_mp *outliers = f->type == MP_MAP ? dp_mp_get(f, "outliers") : NULL;
    const char *keys[7] = {"hi", "lo", "rows", "skipped"};
    size_t nkeys = 4;
    if (buckets) keys[nkeys++] = "buckets";
    if (absent) keys[nkeys++] = "absent";
    if (outliers) keys[nkeys++] = "outliers";
    if (!dp_mp_keys_are(f, keys, nkeys))
        return dp_fail(err, "%s: manifest field 'unknown' must be a map with rows, skipped, lo and hi (and optionally "
                            "buckets, absent, outliers)", src), -1;
    const dp_mp *rows = dp_mp_get(f, "rows"), *skipped = dp_mp_get(f, "skipped");
    if (!is_count(rows) || skipped->type != MP_BOOL || !(rows->i || skipped->i))
        return dp_fail(err, "%s: manifest field 'unknown' has rows and skipped other than a count and a bool (a count "
                            "of 0 only when skipped)", src), -1;
    const dp_mp *lo = dp_mp_get(f, "lo"), *hi = dp_mp_get(f, "hi");
    int ok = lo->type == MP_ARR && hi->type == MP_ARR && lo->len == width && hi->len == width;
    for (size_t i = 0; ok && i < width; i++)
        ok = lo->items[i].type == MP_FLOAT && hi->items[i].type == MP_FLOAT && isfinite(lo->items[i].f) &&
             isfinite(hi->items[i].f) && lo->items[i].f <= hi->items[i].f;
    if (!ok)
        return dp_fail(err, "%s: manifest field 'unknown' lo and hi must be %zu finite floats each (the table width), "
                            "lo <= hi", src, width), -1;
    if (buckets) {
        if (buckets->type != MP_BIN || buckets->len == 0 || width == 0 || buckets->len % (2 * width))
            return dp_fail(err, "%s: manifest field 'unknown' buckets must be bytes, a positive multiple of 2 x %zu "
                                "(the table width)", src, width), -1;
        for (size_t k = 0; k < buckets->len / (2 * width); k++) {
            const uint8_t *b = buckets->p + k * 2 * width;
            int empty = 1;
            for (size_t i = 0; empty && i < 2 * width; i++) empty = b[i] == 255;
            for (size_t i = 0; !empty && i < width; i++)
                if ((unsigned)b[i] + b[width + i] > 254)
                    return dp_fail(err, "%s: manifest field 'unknown' buckets: a bucket must be all 255 (empty) or have "
                                        "lo + hi steps <= 254", src), -1;
        }
    }
    if (absent && !skipped->i)
        return dp_fail(err, "%s: manifest field 'unknown' absent is allowed only where skipped is true", src), -1;
    if (absent && absent->type == MP_BIN) { /* packers before the fingerprint set wrote plain uint32 hashes */
        if (absent->len == 0 || absent->len % 4)
            return dp_fail(err, "%s: manifest field 'unknown' absent bytes must be a positive multiple of 4", src), -1;
        uint32_t prev = 0;
        for (size_t i = 0; i < absent->len / 4; i++) {
            const uint8_t *q = absent->p + 4 * i;
            uint32_t h = (uint32_t)q[0] | (uint32_t)q[1] << 8 | (uint32_t)q[2] << 16 | (uint32_t)q[3] << 24;
            if (i && h <= prev)
                return dp_fail(err, "%s: manifest field 'unknown' absent must hold strictly ascending uint32 hashes",
                               src), -1;
            prev = h;
        }
    } else if (absent) {
        int bad = check_fingerprints(absent);
        if (bad == 1)
            return dp_fail(err, "%s: manifest field 'unknown' absent must be a map with bits (1 to 32), count (1 to "
                                "2^bits, at most 8 per byte of high), low and high (bytes)", src), -1;
        if (bad == 2)
            return dp_fail(err, "%s: manifest field 'unknown' absent does not decode to count strictly ascending "
                                "fingerprints below 2^bits (low: count x split bits, zero-padded; high: one set bit "
                                "per fingerprint, ending in its last byte)", src), -1;
    }
    if (outliers) {
        static const char *filter_keys[2] = {"filter", "probes"};
        const dp_mp *bits = outliers->type == MP_MAP ? dp_mp_get(outliers, "filter") : NULL;
        const dp_mp *probes = outliers->type == MP_MAP ? dp_mp_get(outliers, "probes") : NULL;
        if (!buckets || outliers->type != MP_MAP || !dp_mp_keys_are(outliers, filter_keys, 2) ||
            bits->type != MP_BIN || bits->len == 0 || !is_count(probes) || probes->i < 1 || probes->i > 16)
            return dp_fail(err, "%s: manifest field 'unknown' outliers must be a map with filter (non-empty bytes) and "
                                "probes (1 to 16), and only where buckets are present", src), -1;
    }
    return 0;
}

/* The largest |logit| any text can reach (runtime/bundle.py _logit_reach), in double. */
static double logit_reach(const dp_bundle *b) {
    double top = 0.0;
    if (b->q) {
        int lo = 0, hi = 0;
        for (size_t i = 0; i < b->rows * b->width; i++) {
            if (b->q[i] > hi) hi = b->q[i];
            if (b->q[i] < lo) lo = b->q[i];
        }
        double smax = 0.0;
        for (size_t r = 0; r < b->rows; r++)
            if (b->scales[r] > smax) smax = b->scales[r];
        top = (hi > -lo ? hi : -lo) * smax;
    } else {
        double hi = -INFINITY, lo = INFINITY;
        for (size_t i = 0; i < b->rows * b->width; i++) {
            if (b->table[i] > hi) hi = b->table[i];
            if (b->table[i] < lo) lo = b->table[i];
        }
        top = hi > -lo ? hi : -lo;
    }
    size_t width = b->width, maxw = b->maxwidth;
    double *m = malloc(maxw * sizeof(double)), *z = malloc(maxw * sizeof(double));
    double reach = INFINITY;
    if (!m || !z) goto done;
    for (size_t i = 0; i < width; i++) m[i] = top;
    for (size_t l = 0; l < b->nlayers; l++) {
        const dp_layer *L = &b->layers[l];
        for (size_t o = 0; o < L->out; o++) {
            double acc = fabs((double)L->bias[o]);
            if (L->weight) {
                for (size_t i = 0; i < L->in; i++) acc += fabs((double)L->weight[o * L->in + i]) * m[i];
            } else {
                acc += m[o];
            }
            if (L->act == DP_ACT_TANH && acc > 1.0) acc = 1.0;
            z[o] = acc;
        }
        memcpy(m, z, L->out * sizeof(double));
        width = L->out;
    }
    reach = 0.0;
    for (size_t i = 0; i < width; i++)
        if (m[i] > reach || m[i] != m[i]) reach = m[i] != m[i] ? INFINITY : m[i];
done:
    free(m);
    free(z);
    return reach;
}

static int all_finite(const tensor *t) {
    if (t->int8) return 1;
    for (size_t i = 0; i < t->bytes / 4; i++)
        if (!isfinite(f32_at(t->data, i))) return 0;
    return 1;
}

static int check_manifest(const char *src, const dp_mp *m, const tensors *ts, dp_bundle *b, dp_error *err) {
#define FAIL(...) return (snprintf(err->message, sizeof(err->message), "%s: manifest ", src), \
                          dp_fail_append(err, __VA_ARGS__), -1)
    const dp_mp *labels = dp_mp_get(m, "labels");
    int ok = labels && labels->type == MP_ARR && labels->len >= 2 && labels->len <= MAX_LABELS;
    for (size_t i = 0; ok && i < labels->len; i++) ok = labels->items[i].type == MP_STR;
    if (!ok) FAIL("field 'labels' must list 2 to %d label strings", MAX_LABELS);
    char shown[256];
    for (size_t i = 0; i < labels->len; i++) { /* runtime/safe_text.py labels_problem, in its order */
        const dp_mp *l = &labels->items[i];
        uint32_t cp;
        const char *cat;
        size_t chars = utf8_chars(l->p, l->len);
        if (l->len == 0) FAIL("field 'labels' label %zu is empty", i + 1);
        if (chars > MAX_LABEL_CHARS)
            FAIL("field 'labels' label %zu is %zu characters long, at most %d allowed", i + 1, chars, MAX_LABEL_CHARS);
        if (first_unsafe(l->p, l->len, &cp, &cat)) {
            show_label(shown, sizeof(shown), l->p, l->len);
            FAIL("field 'labels' label %zu (%s) holds U+%04X (%s); control, format, line-separator and unassigned "
                 "characters are not allowed in labels", i + 1, shown, (unsigned)cp, cat);
        }
    }
    for (size_t i = 0; i < labels->len; i++) {
        const dp_mp *l = &labels->items[i];
        for (size_t j = 0; j < i; j++)
            if (labels->items[j].len == l->len && !memcmp(labels->items[j].p, l->p, l->len)) {
                show_label(shown, sizeof(shown), l->p, l->len);
                FAIL("field 'labels' repeats the label %s; labels must be unique", shown);
            }
    }
    if (check_tokenizer(src, dp_mp_get(m, "tokenizer"), &b->tok, err)) return -1;
    const dp_mp *oov = dp_mp_get(m, "oov"), *meta = dp_mp_get(m, "table"), *layers = dp_mp_get(m, "layers");
    const dp_mp *policy = dp_mp_get(oov, "policy");
    int pol = dp_mp_is(policy, "skip") ? DP_OOV_SKIP : dp_mp_is(policy, "unk") ? DP_OOV_UNK
            : dp_mp_is(policy, "rest") ? DP_OOV_REST : -1;
    if (!oov || oov->type != MP_MAP || pol < 0 || !dp_mp_get(oov, "row"))
        FAIL("field 'oov' must be a map with policy in ('skip', 'unk', 'rest') and a row");
    const dp_mp *dtype = dp_mp_get(meta, "dtype");
    if (!meta || meta->type != MP_MAP || (!dp_mp_is(dtype, "int8") && !dp_mp_is(dtype, "float32")))
        FAIL("field 'table' must be a map with dtype int8 or float32");
    const tensor *table = find_tensor(ts, "table");
    if (!table || table->ndim != 2 || table->int8 != dp_mp_is(dtype, "int8"))
        FAIL("names a table the tensors do not hold (missing, not 2-D, or of another dtype)");
    size_t rows = table->shape[0], width = table->shape[1];
    if (rows < 1 || width < 1) FAIL("names a table of shape (%zu, %zu), expected at least one row and one column", rows, width);
    if (b->ntokens > rows || b->ntokens + 1 < rows)
        FAIL("vocabulary (%zu tokens) does not match the table (%zu rows) or repeats a token", b->ntokens, rows);
    if (!int_is(dp_mp_get(meta, "rows"), rows) || !int_is(dp_mp_get(meta, "width"), width) ||
        !int_is(dp_mp_get(meta, "tokens"), b->ntokens))
        FAIL("field 'table' does not describe the %zu x %zu table with %zu tokens the bundle holds", rows, width, b->ntokens);
    const dp_mp *row = dp_mp_get(oov, "row");
    int valid_row = pol == DP_OOV_SKIP ? row->type == MP_NIL : is_count(row) && (uint64_t)row->i < rows;
    if (!valid_row) FAIL("field 'oov' row is not valid for its policy and %zu rows (None for 'skip', a row id otherwise)", rows);
    if (rows == b->ntokens + 1 && pol != DP_OOV_REST) FAIL("table has a row without a token but the policy is not 'rest'");
    b->oov = pol;
    b->oov_row = pol == DP_OOV_SKIP ? -1 : (long)row->i;
    b->rows = rows;
    b->width = width;
    b->maxwidth = width;
    if (table->int8) {
        const tensor *scales = find_tensor(ts, "scales");
        if (!scales || scales->int8 || scales->ndim != 1 || scales->shape[0] != rows)
            FAIL("int8 table needs float32 'scales' of shape (%zu,)", rows);
        if (!(b->scales = copy_f32(scales))) FAIL("out of memory");
        for (size_t r = 0; r < rows; r++)
            if (!isfinite(b->scales[r]) || b->scales[r] < 0) FAIL("'scales' must be finite and non-negative");
        b->q = (const int8_t *)table->data;
    } else if (!(b->table = copy_f32(table))) {
        FAIL("out of memory");
    }
    if (!layers || layers->type != MP_ARR || layers->len == 0) FAIL("field 'layers' must be a non-empty list");
    b->layers = calloc(layers->len, sizeof(dp_layer));
    if (!b->layers) FAIL("out of memory");
    b->nlayers = layers->len;
    size_t w = width;
    for (size_t i = 0; i < layers->len; i++) {
        const dp_mp *L = &layers->items[i];
        const dp_mp *act = dp_mp_get(L, "activation"), *hasw = dp_mp_get(L, "weight");
        int a = !act ? -1 : act->type == MP_NIL ? DP_ACT_NONE : dp_mp_is(act, "relu") ? DP_ACT_RELU
              : dp_mp_is(act, "tanh") ? DP_ACT_TANH : -1;
        if (L->type != MP_MAP || a < 0 || !hasw || hasw->type != MP_BOOL)
            FAIL("layer %zu must be a map with activation in ('relu', 'tanh', None) and a bool 'weight'", i);
        char name[64];
        snprintf(name, sizeof(name), "layer.%zu.bias", i);
        const tensor *bias = find_tensor(ts, name);
        if (!bias || bias->ndim != 1 || bias->int8) FAIL("layer %zu has no float32 bias vector", i);
        size_t out = bias->shape[0];
        dp_layer *D = &b->layers[i];
        D->act = a;
        D->in = w;
        D->out = out;
        if (!(D->bias = copy_f32(bias))) FAIL("out of memory");
        if (hasw->i) {
            snprintf(name, sizeof(name), "layer.%zu.weight", i);
            const tensor *wt = find_tensor(ts, name);
            if (!wt || wt->ndim != 2 || wt->int8 || wt->shape[0] != out || wt->shape[1] != w)
                FAIL("layer %zu weight must be float32 of shape (%zu, %zu)", i, out, w);
            if (!(D->weight = copy_f32(wt))) FAIL("out of memory");
        } else if (i != 0 || out != w) {
            FAIL("layer %zu has no weight, which only a folded first layer of width %zu may", i, w);
        }
        w = out;
        if (w > b->maxwidth) b->maxwidth = w;
    }
    if (w != labels->len) FAIL("output width %zu differs from the %zu labels", w, labels->len);
    const dp_mp *folded = dp_mp_get(meta, "folded");
    if (!folded || folded->type != MP_BOOL || folded->i != !b->layers[0].weight)
        FAIL("field 'table.folded' does not say whether layer 0 has its weight");
    if (check_probe(src, dp_mp_get(m, "probe"), rows, labels->len, err)) return -1;
    if (check_unknown(src, dp_mp_get(m, "unknown"), width, err)) return -1;
    if (check_description(src, m, err)) return -1;
    if (too_deep(m, 1)) FAIL("nests deeper than %d levels of maps and lists", MAX_MANIFEST_DEPTH);
    for (size_t i = 0; i < ts->n; i++)
        if (!all_finite(&ts->t[i])) FAIL("tensor '%.*s' holds NaN or Inf", (int)(ts->t[i].name_len > 40 ? 40 : ts->t[i].name_len),
                                         (const char *)ts->t[i].name);
    double reach = logit_reach(b);
    if (!(reach < MAX_LOGIT_REACH))
        FAIL("weights can drive the logits to %.3g, past what float32 computes safely (1e+30); a trained model stays "
             "far below, so the bundle is damaged or crafted", reach);
    /* labels, copied */
    size_t total = 0;
    for (size_t i = 0; i < labels->len; i++) total += labels->items[i].len + 1;
    b->label_text = malloc(total ? total : 1);
    b->label_off = malloc(labels->len * sizeof(size_t));
    b->label_len = malloc(labels->len * sizeof(size_t));
    if (!b->label_text || !b->label_off || !b->label_len) FAIL("out of memory");
    size_t pos = 0;
    for (size_t i = 0; i < labels->len; i++) {
        b->label_off[i] = pos;
        b->label_len[i] = labels->items[i].len;
        memcpy(b->label_text + pos, labels->items[i].p, labels->items[i].len);
        pos += labels->items[i].len;
        b->label_text[pos++] = 0;
    }
    b->nlabels = labels->len;
    return 0;
#undef FAIL
}

void dp_fail_append(dp_error *err, const char *fmt, ...) {
    size_t used = strlen(err->message);
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(err->message + used, sizeof(err->message) - used, fmt, ap);
    va_end(ap);
}

/* ---- load ---- */

static dp_bundle *load_owned(uint8_t *data, size_t len, const char *src, dp_error *err);

static int run_probe(const char *src, const dp_bundle *b, const dp_mp *probe, dp_error *err) {
    const dp_mp *ids = dp_mp_get(probe, "ids"), *probs = dp_mp_get(probe, "probs");
    dp_scratch *s = dp_scratch_new(b);
    float *p = malloc(b->nlabels * sizeof(float));
    size_t *seq = malloc(64 * sizeof(size_t) + 1);
    int rc = 0;
    if (!s || !p || !seq) {
        dp_fail(err, "%s: out of memory", src);
        rc = -1;
    }
    double worst = 0.0;
    for (size_t i = 0; !rc && i < ids->len; i++) {
        for (size_t j = 0; j < ids->items[i].len; j++) seq[j] = (size_t)ids->items[i].items[j].i;
        dp_forward(b, s, seq, ids->items[i].len, p);
        for (size_t c = 0; c < b->nlabels; c++) {
            double d = fabs((double)p[c] - (double)(float)probs->items[i].items[c].f);
            if (!(d <= worst)) worst = d;
        }
    }
    if (!rc && !(worst <= PROBE_TOLERANCE)) {
        dp_fail(err, "%s: the native runtime disagrees with the packer on the bundle's probe (max difference %.2e > "
                     "0.0001); the bundle or the runtime is damaged", src, worst);
        rc = -1;
    }
    /* the probe texts, through tokenizer and vocabulary: a permuted or edited vocabulary is refused */
    const dp_mp *texts = dp_mp_get(probe, "texts"), *text_probs = dp_mp_get(probe, "text_probs");
    worst = 0.0;
    for (size_t i = 0; !rc && i < texts->len; i++) {
        if (dp_classify(b, s, (const char *)texts->items[i].p, texts->items[i].len, p, err)) {
            rc = -1;
            break;
        }
        for (size_t c = 0; c < b->nlabels; c++) {
            double d = fabs((double)p[c] - (double)(float)text_probs->items[i].items[c].f);
            if (!(d <= worst)) worst = d;
        }
    }
    if (!rc && !(worst <= PROBE_TOLERANCE)) {
        dp_fail(err, "%s: the native runtime disagrees with the packer on the bundle's probe texts (max difference "
                     "%.2e > 0.0001) (its vocabulary or tokenizer is not the one the packer used); the bundle or the "
                     "runtime is damaged", src, worst);
        rc = -1;
    }
    free(seq);
    free(p);
    dp_scratch_free(s);
    return rc;
}

dp_bundle *dp_load_bytes(const uint8_t *data, size_t len, const char *source, dp_error *err) {
    dp_error dummy;
    if (!err) err = &dummy;
    const char *src = source ? source : "bundle";
    if ((uint64_t)len > MAX_FILE_BYTES) {
        dp_fail(err, "%s: %zu bytes is larger than any bundle (%llu max)", src, len, (unsigned long long)MAX_FILE_BYTES);
        return NULL;
    }
    if (len == 0) {
        dp_fail(err, "%s: the file is empty (0 bytes); copy the bundle again from the packer's output", src);
        return NULL;
    }
    uint8_t *copy = malloc(len);
    if (!copy) {
        dp_fail(err, "%s: out of memory", src);
        return NULL;
    }
    memcpy(copy, data, len);
    return load_owned(copy, len, src, err);
}

/* Verify `data` (malloc'd; the bundle keeps it, or it is freed on failure). */
static dp_bundle *load_owned(uint8_t *data, size_t len, const char *src, dp_error *err) {
    dp_bundle *b = calloc(1, sizeof(dp_bundle));
    if (!b) {
        free(data);
        dp_fail(err, "%s: out of memory", src);
        return NULL;
    }
    b->data = data;
    b->size = len;
    char what[300];
    dp_mp_doc outer = {0}, body = {0};
    tensors ts = {0};
    snprintf(what, sizeof(what), "%s: file", src);
    if (dp_mp_read(b->data, len, 8, what, &outer, err)) goto fail;
    const dp_mp *o = outer.root;
    if (o->type != MP_MAP) {
        dp_fail(err, "%s: not a danpack bundle (top level is not a map)", src);
        goto fail;
    }
    if (!dp_mp_is(dp_mp_get(o, "format"), "danpack-bundle")) {
        dp_fail(err, "%s: not a danpack bundle (format is not 'danpack-bundle'); pack one with `danpack pack`", src);
        goto fail;
    }
    const dp_mp *version = dp_mp_get(o, "version");
    if (!version || version->type != MP_INT) {
        dp_fail(err, "%s: bundle version is not an integer", src);
        goto fail;
    }
    if (version->huge || version->i > DP_FORMAT_VERSION) {
        dp_fail(err, "%s: bundle version %lld is newer than this runtime reads (%d); upgrade danpack on the device or "
                     "repack with the older packer", src, (long long)version->i, DP_FORMAT_VERSION);
        goto fail;
    }
    if (version->i != DP_FORMAT_VERSION) {
        dp_fail(err, "%s: bundle version %lld is not supported (this runtime reads %d)", src, (long long)version->i,
                DP_FORMAT_VERSION);
        goto fail;
    }
    static const char *const outer_keys[] = {"format", "payload", "sha256", "version"};
    if (!dp_mp_keys_are(o, outer_keys, 4)) {
        dp_fail(err, "%s: top-level keys are not ['format', 'payload', 'sha256', 'version']", src);
        goto fail;
    }
    const dp_mp *payload = dp_mp_get(o, "payload"), *digest = dp_mp_get(o, "sha256");
    if (payload->type != MP_BIN || digest->type != MP_BIN || digest->len != 32) {
        dp_fail(err, "%s: 'payload' must be bytes and 'sha256' 32 bytes", src);
        goto fail;
    }
    uint8_t actual[32];
    dp_sha256_digest(payload->p, payload->len, actual);
    for (int i = 0; i < 32; i++) snprintf(b->sha_hex + 2 * i, 3, "%02x", digest->p[i]);
    if (memcmp(actual, digest->p, 32) != 0) {
        char got[65];
        for (int i = 0; i < 32; i++) snprintf(got + 2 * i, 3, "%02x", actual[i]);
        dp_fail(err, "%s: checksum mismatch (stored sha256 %s, computed %s); the file is damaged or was modified: copy it "
                     "again from the packer's output", src, b->sha_hex, got);
        goto fail;
    }
    snprintf(what, sizeof(what), "%s: payload", src);
    if (dp_mp_read(payload->p, payload->len, DP_MP_MAX_CONTAINER, what, &body, err)) goto fail;
    static const char *const payload_keys[] = {"graph", "manifest", "tensors", "vocab"};
    if (!dp_mp_keys_are(body.root, payload_keys, 4)) {
        dp_fail(err, "%s: payload does not hold exactly the keys ['graph', 'manifest', 'tensors', 'vocab']", src);
        goto fail;
    }
    const dp_mp *manifest = dp_mp_get(body.root, "manifest"), *vocab = dp_mp_get(body.root, "vocab");
    const dp_mp *graph = dp_mp_get(body.root, "graph"), *raw = dp_mp_get(body.root, "tensors");
    if (manifest->type != MP_MAP) {
        dp_fail(err, "%s: manifest is not a map", src);
        goto fail;
    }
    if (vocab->type != MP_BIN) {
        dp_fail(err, "%s: vocab is not bytes (a zlib stream)", src);
        goto fail;
    }
    if (graph->type != MP_BIN) {
        dp_fail(err, "%s: graph is not bytes", src);
        goto fail;
    }
    if (raw->type != MP_MAP) {
        dp_fail(err, "%s: tensors is not a map", src);
        goto fail;
    }
    if (decode_tensors(src, raw, &ts, err)) goto fail;
    const tensor *table = find_tensor(&ts, "table");
    uint64_t rows = table ? table->shape[0] : 0;
    uint64_t limit = MAX_VOCAB_BYTES_PER_ROW * rows + VOCAB_SLACK_BYTES; /* rows <= bytes of the file: no overflow */
    if (inflate_vocab(src, vocab->p, vocab->len, limit, b, err)) goto fail;
    if (index_vocab(src, b, err)) goto fail;
    if (check_manifest(src, manifest, &ts, b, err)) goto fail;
    if (dp_check_graph(src, graph->p, graph->len, b, ts.n, err)) goto fail;
    if (run_probe(src, b, dp_mp_get(manifest, "probe"), err)) goto fail;
    free(ts.t);
    dp_mp_free(&body);
    dp_mp_free(&outer);
    return b;
fail:
    free(ts.t);
    dp_mp_free(&body);
    dp_mp_free(&outer);
    dp_free(b);
    return NULL;
}

dp_bundle *dp_load_path(const char *path, dp_error *err) {
    dp_error dummy;
    if (!err) err = &dummy;
    struct stat st;
    if (stat(path, &st) != 0) {
        if (errno == ENOENT) dp_fail(err, "%s: no such bundle file", path);
        else dp_fail(err, "%s: cannot be read (%s)", path, strerror(errno));
        return NULL;
    }
    if (S_ISDIR(st.st_mode)) {
        dp_fail(err, "%s: is a directory; pass the bundle file written by `danpack pack -o`", path);
        return NULL;
    }
    if (!S_ISREG(st.st_mode)) {
        dp_fail(err, "%s: is not a regular file; pass the bundle file written by `danpack pack -o`", path);
        return NULL;
    }
    if ((uint64_t)st.st_size > MAX_FILE_BYTES) {
        dp_fail(err, "%s: %lld bytes is larger than any bundle (%llu max)", path, (long long)st.st_size,
                (unsigned long long)MAX_FILE_BYTES);
        return NULL;
    }
    FILE *f = fopen(path, "rb");
    if (!f) {
        dp_fail(err, "%s: cannot be read (%s)", path, strerror(errno));
        return NULL;
    }
    size_t cap = (size_t)st.st_size + 1, got = 0; /* one byte more: a file that grew after stat() is seen */
    uint8_t *data = malloc(cap);
    if (!data) {
        fclose(f);
        dp_fail(err, "%s: out of memory", path);
        return NULL;
    }
    got = fread(data, 1, cap, f);
    int bad = ferror(f);
    fclose(f);
    if (bad) {
        free(data);
        dp_fail(err, "%s: cannot be read (I/O error)", path);
        return NULL;
    }
    if (got == cap) { /* it grew: read it as it is now would need another pass; refuse plainly */
        free(data);
        dp_fail(err, "%s: the file changed while it was read; copy the bundle again", path);
        return NULL;
    }
    if (got == 0) {
        free(data);
        dp_fail(err, "%s: the file is empty (0 bytes); copy the bundle again from the packer's output", path);
        return NULL;
    }
    return load_owned(data, got, path, err);
}

void dp_free(dp_bundle *b) {
    if (!b) return;
    for (size_t i = 0; b->layers && i < b->nlayers; i++) {
        free(b->layers[i].weight);
        free(b->layers[i].bias);
    }
    free(b->layers);
    free(b->scales);
    free(b->table);
    free(b->vocab_text);
    free(b->tok_off);
    free(b->tok_len);
    free(b->slots);
    free(b->label_text);
    free(b->label_off);
    free(b->label_len);
    free(b->data);
    free(b);
}

size_t dp_label_count(const dp_bundle *b) { return b->nlabels; }

const char *dp_label(const dp_bundle *b, size_t i, size_t *len) {
    if (i >= b->nlabels) return NULL;
    if (len) *len = b->label_len[i];
    return b->label_text + b->label_off[i];
}

const char *dp_sha256(const dp_bundle *b) { return b->sha_hex; }

const dp_tok_spec *dp_bundle_tok_spec(const dp_bundle *b) { return &b->tok; }
