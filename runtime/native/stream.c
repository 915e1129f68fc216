/* The records of `danpack-run` (see stream.h): the rules of runtime/stream_records.py, in C. */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stream.h"

#define MAX_NEST 100 /* runtime/stream_records.py MAX_JSON_DEPTH: deeper JSON is an error record before decoding */
#define NON_FINITE "the model returned a non-finite probability (NaN or Inf); the bundle is damaged or crafted"

enum { REC_ANSWER, REC_DONE };

struct dp_stream {
    dp_stream_options o;
    char *text_field, *id_field;
    const dp_bundle *b;
    dp_scratch *s;
    dp_text_fn on_text;
    void *ctx;
    size_t C, k; /* labels; label/probability pairs per record */
    sbuf *labels_json, *labels_tsv; /* each label written once, as JSON ("name":) and as a TSV cell */
    /* the parsed batch */
    sbuf heads; /* each record's head; an error record whole */
    size_t *head_end;
    uint8_t *kind;
    size_t nrec, reccap;
    size_t *ids, nids, idcap;
    size_t *counts, *known, nok, okcap;
    size_t parse_errors;
    sbuf out;
    size_t *order;
    jdoc doc;
    dp_u32buf cps;
};

static void *grow(void *p, size_t *cap, size_t need, size_t size) {
    if (need == 0) need = 1; /* never NULL on success */
    if (need <= *cap && p) return p;
    size_t c = *cap ? *cap : 64;
    while (c < need) {
        if (c > SIZE_MAX / 2 / size) return NULL;
        c *= 2;
    }
    void *q = realloc(p, c * size);
    if (q) *cap = c;
    return q;
}

/* ---- writing values (runtime/safe_text.py escape_text applied after the TSV / JSON escapes) ---- */

static void put_uint(sbuf *b, size_t v) {
    char tmp[24];
    int n = 0;
    do tmp[n++] = (char)('0' + v % 10), v /= 10;
    while (v);
    char out[24];
    for (int i = 0; i < n; i++) out[i] = tmp[n - 1 - i];
    sb_put(b, out, (size_t)n);
}

static void tsv_cps(sbuf *b, const uint32_t *s, size_t n) {
    char tmp[4];
    for (size_t i = 0; i < n; i++) {
        uint32_t c = s[i];
        if (c == '\\') sb_put(b, "\\\\", 2);
        else if (c == '\t') sb_put(b, "\\t", 2);
        else if (c == '\n') sb_put(b, "\\n", 2);
        else if (c == '\r') sb_put(b, "\\r", 2);
        else if (c < 0x20 || c == 0x7F || (c > 0x7F && (dp_props(c) & DP_P_UNSAFE))) sb_json_unsafe(b, c);
        else sb_put(b, tmp, dp_utf8_put(c, tmp));
    }
}

static void tsv_utf8(sbuf *b, const char *s, size_t n) {
    dp_u32buf tmp = {0};
    if (dp_utf8_decode((const uint8_t *)s, n, &tmp)) {
        b->failed = 1;
        return;
    }
    tsv_cps(b, tmp.v, tmp.n);
    free(tmp.v);
}

static int key_is(const jdoc *d, size_t k, const char *z) {
    const jnode *x = &d->nodes[k];
    return dp_cps_eq_utf8(d->cps.v + x->off, x->len, z, strlen(z));
}

/* The root object's members as a Python dict after pop(skip) (dp_json_members, the skipped key left out). */
static int members(const jdoc *d, const char *skip, jmember **out, size_t *n) {
    if (dp_json_members(d, 0, out, n)) return -1;
    size_t w = 0;
    for (size_t i = 0; i < *n; i++)
        if (!skip || !key_is(d, (*out)[i].key, skip)) (*out)[w++] = (*out)[i];
    *n = w;
    return 0;
}

static const char *const RESERVED[] = {"line", "label", "probs", "known_tokens", "no_known_token", "error", "skipped"};

static int reserved(const uint32_t *s, size_t n) {
    for (int i = 0; i < 7; i++)
        if (dp_cps_eq_utf8(s, n, RESERVED[i], strlen(RESERVED[i]))) return 1;
    return 0;
}

static int in_extra(const jdoc *d, const jmember *ex, size_t n, const uint32_t *s, size_t len) {
    for (size_t i = 0; i < n; i++) {
        const jnode *k = &d->nodes[ex[i].key];
        if (k->len == len && memcmp(d->cps.v + k->off, s, len * sizeof(uint32_t)) == 0) return 1;
    }
    return 0;
}

/* `,"key":value` for each passthrough field, reserved names renamed input_<name> (runtime/stream_records.py) */
static void put_extras(sbuf *b, const jdoc *d, const jmember *ex, size_t n) {
    dp_u32buf name = {0};
    for (size_t i = 0; i < n; i++) {
        const jnode *k = &d->nodes[ex[i].key];
        const uint32_t *key = d->cps.v + k->off;
        sb_put(b, ",", 1);
        if (!reserved(key, k->len)) {
            sb_json_cps(b, key, k->len);
        } else {
            name.n = 0;
            for (size_t j = 0; j < k->len; j++) dp_u32_push(&name, key[j]);
            do {
                static const uint32_t prefix[] = {'i', 'n', 'p', 'u', 't', '_'};
                dp_u32buf next = {0};
                for (int j = 0; j < 6; j++) dp_u32_push(&next, prefix[j]);
                for (size_t j = 0; j < name.n; j++) dp_u32_push(&next, name.v[j]);
                free(name.v);
                name = next;
            } while (name.v && (reserved(name.v, name.n) || in_extra(d, ex, n, name.v, name.n)));
            if (!name.v) {
                b->failed = 1;
                break;
            }
            sb_json_cps(b, name.v, name.n);
        }
        sb_put(b, ":", 1);
        sb_json_value(b, d, ex[i].value);
    }
    free(name.v);
}

/* Python's repr() of a short ASCII-ish name, for messages */
static void repr(char *out, size_t cap, const char *s) {
    int dq = strchr(s, '\'') && !strchr(s, '"');
    char q = dq ? '"' : '\'';
    size_t k = 0;
    out[k++] = q;
    for (; *s && k + 6 < cap; s++) {
        unsigned char c = (unsigned char)*s;
        if (c == '\\' || c == (unsigned char)q) out[k++] = '\\', out[k++] = (char)c;
        else if (c == '\n') out[k++] = '\\', out[k++] = 'n';
        else if (c == '\r') out[k++] = '\\', out[k++] = 'r';
        else if (c == '\t') out[k++] = '\\', out[k++] = 't';
        else if (c < 0x20 || c == 0x7F) k += (size_t)snprintf(out + k, cap - k, "\\x%02x", c);
        else out[k++] = (char)c;
    }
    out[k++] = q;
    out[k] = 0;
}

static const char *json_type(int t) {
    switch (t) {
    case J_OBJ: return "an object";
    case J_ARR: return "an array";
    case J_STR: return "a string";
    case J_INT: case J_FLOAT: return "a number";
    case J_TRUE: case J_FALSE: return "a boolean";
    default: return "null";
    }
}

/* runtime/stream_records.py nests_deeper: more than MAX_NEST brackets open at once, string literals left out (an
 * unterminated one is not a literal: its brackets count, as the regular expression there leaves it in place) */
static int nests_deeper(const uint32_t *s, size_t n) {
    size_t brackets = 0;
    for (size_t i = 0; i < n; i++) brackets += s[i] == '[' || s[i] == '{';
    if (brackets <= MAX_NEST) return 0;
    long depth = 0;
    for (size_t i = 0; i < n; i++) {
        uint32_t c = s[i];
        if (c == '"') {
            size_t j = i + 1;
            while (j < n && s[j] != '"') {
                if (s[j] == '\\') {
                    if (j + 1 >= n || s[j + 1] == '\n') break; /* "\\." needs a character after the backslash */
                    j += 2;
                } else {
                    j++;
                }
            }
            if (j < n && s[j] == '"') {
                i = j;
                continue;
            }
        } else if (c == '[' || c == '{') {
            if (++depth > MAX_NEST) return 1;
        } else if (c == ']' || c == '}') {
            depth--;
        }
    }
    return 0;
}

/* ---- record parts ---- */

static void put_head(dp_stream *st, sbuf *b, size_t line, const jmember *ex, size_t nex, int has_obj) {
    if (!st->o.tsv) {
        sb_put(b, "{\"line\":", 8);
        put_uint(b, line);
        if (has_obj) put_extras(b, &st->doc, ex, nex);
        return;
    }
    put_uint(b, line);
    if (!st->id_field) return;
    sb_put(b, "\t", 1);
    for (size_t i = 0; has_obj && i < nex; i++) {
        if (!dp_cps_eq_utf8(st->doc.cps.v + st->doc.nodes[ex[i].key].off, st->doc.nodes[ex[i].key].len, st->id_field,
                            strlen(st->id_field)))
            continue;
        const jnode *v = &st->doc.nodes[ex[i].value];
        if (v->type == J_STR) {
            tsv_cps(b, st->doc.cps.v + v->off, v->len);
        } else if (v->type != J_NULL) {
            /* json.dumps, then the TSV escapes, then escape_text: the JSON text keeps unsafe characters (lone
             * surrogates too, as 3-byte sequences) for tsv_cps to escape */
            sbuf tmp = {0};
            tmp.keep_unsafe = 1;
            sb_json_value(&tmp, &st->doc, ex[i].value);
            dp_u32buf cps = {0};
            for (size_t j = 0; j < tmp.n;) {
                unsigned char c = (unsigned char)tmp.p[j];
                size_t k = c < 0x80 ? 1 : c < 0xE0 ? 2 : c < 0xF0 ? 3 : 4;
                if (j + k > tmp.n) k = tmp.n - j;
                uint32_t cp = k == 1 ? c : k == 2 ? (c & 0x1Fu) : k == 3 ? (c & 0x0Fu) : (c & 0x07u);
                for (size_t m = 1; m < k; m++) cp = cp << 6 | ((unsigned char)tmp.p[j + m] & 0x3Fu);
                if (dp_u32_push(&cps, cp)) b->failed = 1;
                j += k;
            }
            tsv_cps(b, cps.v, cps.n);
            if (tmp.failed) b->failed = 1;
            free(cps.v);
            free(tmp.p);
        }
    }
}

static void put_error_tail(const dp_stream *st, sbuf *b, const char *msg, int skipped) {
    if (!st->o.tsv) {
        sb_str(b, skipped ? ",\"skipped\":" : ",\"error\":");
        sb_json_utf8(b, msg, strlen(msg));
        sb_put(b, "}\n", 2);
        return;
    }
    for (size_t i = 0; i < 2 * st->k + 2; i++) sb_put(b, "\t", 1); /* label/probability pairs, known_tokens */
    if (skipped) sb_str(b, "skipped: ");
    tsv_utf8(b, msg, strlen(msg));
    sb_put(b, "\n", 1);
}

static void put_answer_tail(dp_stream *st, sbuf *b, const float *probs, size_t known) {
    size_t C = st->C, *ord = st->order;
    for (size_t c = 0; c < C; c++) { /* rank: stable by descending probability, ties in label order */
        size_t j = c;
        while (j > 0 && probs[ord[j - 1]] < probs[c]) {
            ord[j] = ord[j - 1];
            j--;
        }
        ord[j] = c;
    }
    if (!st->o.tsv) {
        sb_put(b, ",\"label\":", 9);
        sb_put(b, st->labels_json[ord[0]].p, st->labels_json[ord[0]].n - 1); /* without its colon */
        sb_put(b, ",\"probs\":{", 10);
        for (size_t i = 0; i < st->k; i++) {
            size_t c = st->o.top_k ? ord[i] : i;
            if (i) sb_put(b, ",", 1);
            sb_put(b, st->labels_json[c].p, st->labels_json[c].n);
            sb_f32(b, probs[c]);
        }
        sb_put(b, "},\"known_tokens\":", 17);
        put_uint(b, known);
        if (known) sb_put(b, ",\"no_known_token\":false}\n", 25);
        else sb_put(b, ",\"no_known_token\":true}\n", 24);
    } else {
        for (size_t i = 0; i < st->k; i++) {
            sb_put(b, "\t", 1);
            sb_put(b, st->labels_tsv[ord[i]].p, st->labels_tsv[ord[i]].n);
            sb_put(b, "\t", 1);
            sb_f32(b, probs[ord[i]]);
        }
        sb_put(b, "\t", 1);
        put_uint(b, known);
        sb_put(b, "\t\n", 2);
    }
}

/* ---- the stream ---- */

static char *copy_str(const char *s) {
    if (!s) return NULL;
    char *c = malloc(strlen(s) + 1);
    if (c) strcpy(c, s);
    return c;
}

dp_stream *dp_stream_new(const dp_bundle *b, const dp_stream_options *o, dp_error *err) {
    dp_stream *st = calloc(1, sizeof(dp_stream));
    if (!st) return dp_fail(err, "out of memory"), NULL;
    st->o = *o;
    st->b = b;
    st->text_field = copy_str(o->text_field ? o->text_field : "text");
    st->id_field = copy_str(o->id_field);
    st->o.text_field = st->text_field;
    st->o.id_field = st->id_field;
    if (!st->text_field || (o->id_field && !st->id_field)) goto oom;
    if (b) {
        st->C = dp_label_count(b);
        st->k = o->top_k ? o->top_k : (o->tsv ? 1 : st->C);
        if (st->k > st->C) {
            dp_fail(err, "top-k %zu is more than the bundle's %zu labels", o->top_k, st->C);
            dp_stream_free(st);
            return NULL;
        }
        st->s = dp_scratch_new(b);
        st->order = malloc(st->C * sizeof(size_t));
        st->labels_json = calloc(st->C, sizeof(sbuf));
        st->labels_tsv = calloc(st->C, sizeof(sbuf));
        if (!st->s || !st->order || !st->labels_json || !st->labels_tsv) goto oom;
        for (size_t c = 0; c < st->C; c++) {
            size_t len;
            const char *name = dp_label(b, c, &len);
            sb_json_utf8(&st->labels_json[c], name, len);
            sb_put(&st->labels_json[c], ":", 1);
            tsv_utf8(&st->labels_tsv[c], name, len);
            if (st->labels_json[c].failed || st->labels_tsv[c].failed || !st->labels_tsv[c].p) {
                if (!st->labels_tsv[c].p && !st->labels_tsv[c].failed) continue; /* an empty label: no bytes */
                goto oom;
            }
        }
    }
    return st;
oom:
    dp_fail(err, "out of memory");
    dp_stream_free(st);
    return NULL;
}

void dp_stream_free(dp_stream *st) {
    if (!st) return;
    for (size_t c = 0; st->labels_json && c < st->C; c++) free(st->labels_json[c].p);
    for (size_t c = 0; st->labels_tsv && c < st->C; c++) free(st->labels_tsv[c].p);
    free(st->labels_json);
    free(st->labels_tsv);
    free(st->text_field);
    free(st->id_field);
    dp_scratch_free(st->s);
    free(st->heads.p);
    free(st->head_end);
    free(st->kind);
    free(st->ids);
    free(st->counts);
    free(st->known);
    free(st->out.p);
    free(st->order);
    dp_json_free(&st->doc);
    free(st->cps.v);
    free(st);
}

void dp_stream_on_text(dp_stream *st, dp_text_fn fn, void *ctx) {
    st->on_text = fn;
    st->ctx = ctx;
}

void dp_stream_header(const dp_stream *st, sbuf *out) {
    if (!st->o.tsv) return;
    sb_str(out, "line\t");
    if (st->id_field) {
        tsv_utf8(out, st->id_field, strlen(st->id_field));
        sb_put(out, "\t", 1);
    }
    sb_str(out, "label\tprobability");
    for (size_t i = 2; i <= (st->o.top_k ? st->o.top_k : 1); i++) {
        char tmp[64];
        snprintf(tmp, sizeof(tmp), "\tlabel_%zu\tprobability_%zu", i, i);
        sb_str(out, tmp);
    }
    sb_str(out, "\tknown_tokens\terror\n");
}

/* an error (or skipped) record, whole */
static void done_error(dp_stream *st, size_t line, const jmember *ex, size_t nex, int has_obj, const char *msg,
                       int skipped) {
    put_head(st, &st->heads, line, ex, nex, has_obj);
    put_error_tail(st, &st->heads, msg, skipped);
    if (!skipped) st->parse_errors++;
}

/* one input line (without its newline); overlong: the line passed --max-line-bytes and was not kept.
 * Sets *kind; 0, or -1 when out of memory. */
static int parse_one(dp_stream *st, const uint8_t *raw, size_t len, int overlong, size_t line, uint8_t *kind,
                     dp_error *err) {
    char msg[256];
    int allow_empty = !st->o.jsonl && st->o.classify_empty;
    *kind = REC_DONE;
    if (!overlong && len && raw[len - 1] == '\r') len--;
    if (!overlong && line == 1 && len >= 3 && memcmp(raw, "\xef\xbb\xbf", 3) == 0) raw += 3, len -= 3;
    if (overlong || len > st->o.max_line_bytes) {
        snprintf(msg, sizeof(msg), "line longer than %zu bytes (skipped)", st->o.max_line_bytes);
        done_error(st, line, NULL, 0, 0, msg, 0);
        return 0;
    }
    if (!len && !allow_empty) {
        done_error(st, line, NULL, 0, 0, "empty line", st->o.skip_empty);
        return 0;
    }
    if (memchr(raw, 0, len)) {
        done_error(st, line, NULL, 0, 0, "NUL byte in line", 0);
        return 0;
    }
    size_t i = 0; /* first invalid byte, as Python's UnicodeDecodeError.start */
    while (i < len) {
        if (raw[i] < 0x80) {
            i++;
            continue;
        }
        size_t k = 1;
        while (k < 4 && i + k <= len && !dp_utf8_valid(raw + i, k)) k++;
        if (i + k > len || !dp_utf8_valid(raw + i, k)) break;
        i += k;
    }
    if (i < len) {
        snprintf(msg, sizeof(msg), "not valid UTF-8 (byte %zu)", i + 1);
        done_error(st, line, NULL, 0, 0, msg, 0);
        return 0;
    }
    if (dp_utf8_decode(raw, len, &st->cps)) return -1;
    const uint32_t *text = st->cps.v;
    size_t tlen = st->cps.n;
    jmember *ex = NULL;
    size_t nex = 0;
    int has_obj = 0, rc = 0;
    if (st->o.jsonl) {
        if (nests_deeper(st->cps.v, st->cps.n)) {
            snprintf(msg, sizeof(msg), "invalid JSON: nested deeper than %d levels", MAX_NEST);
            done_error(st, line, NULL, 0, 0, msg, 0);
            return 0;
        }
        int pr = dp_json_parse(&st->doc, st->cps.v, st->cps.n);
        if (pr == -2) return -1;
        if (pr) {
            done_error(st, line, NULL, 0, 0, st->doc.error, 0);
            return 0;
        }
        if (st->doc.nodes[0].type != J_OBJ) {
            snprintf(msg, sizeof(msg), "JSON value is %s, expected an object", json_type(st->doc.nodes[0].type));
            done_error(st, line, NULL, 0, 0, msg, 0);
            return 0;
        }
        /* the text field: its last occurrence (a Python dict) */
        const jnode *field = NULL;
        const jnode *root = &st->doc.nodes[0];
        for (size_t k = root->first; k; k = st->doc.nodes[st->doc.nodes[k - 1].next - 1].next)
            if (key_is(&st->doc, k - 1, st->text_field)) field = &st->doc.nodes[st->doc.nodes[k - 1].next - 1];
        if (members(&st->doc, st->text_field, &ex, &nex)) return -1;
        has_obj = 1;
        char name[200];
        repr(name, sizeof(name), st->text_field);
        if (!field) {
            snprintf(msg, sizeof(msg), "field %s is missing", name);
            done_error(st, line, ex, nex, 1, msg, 0);
            goto done;
        }
        if (field->type != J_STR) {
            snprintf(msg, sizeof(msg), "field %s is %s, expected a string", name, json_type(field->type));
            done_error(st, line, ex, nex, 1, msg, 0);
            goto done;
        }
        text = st->doc.cps.v + field->off;
        tlen = field->len;
        for (size_t k = 0; k < tlen; k++) {
            if (text[k] == 0) {
                snprintf(msg, sizeof(msg), "field %s holds a NUL character", name);
                done_error(st, line, ex, nex, 1, msg, 0);
                goto done;
            }
        }
    }
    if (st->on_text) {
        rc = st->on_text(st->ctx, &st->heads, line, text, tlen);
        goto done;
    }
    size_t count, found;
    if (dp_encode_cps(st->b, st->s, text, tlen, &count, &found, NULL, NULL, err)) {
        rc = -1;
        goto done;
    }
    size_t *ids = grow(st->ids, &st->idcap, st->nids + count, sizeof(size_t));
    if (!ids) {
        rc = -1;
        goto done;
    }
    st->ids = ids;
    if (count) memcpy(st->ids + st->nids, st->s->ids, count * sizeof(size_t));
    st->nids += count;
    size_t okcap = st->okcap, *counts = grow(st->counts, &okcap, st->nok + 1, sizeof(size_t));
    if (counts) st->counts = counts;
    size_t okcap2 = st->okcap, *known = grow(st->known, &okcap2, st->nok + 1, sizeof(size_t));
    if (known) st->known = known;
    if (!counts || !known) {
        rc = -1;
        goto done;
    }
    st->okcap = okcap < okcap2 ? okcap : okcap2;
    st->counts[st->nok] = count;
    st->known[st->nok] = found;
    st->nok++;
    put_head(st, &st->heads, line, ex, nex, has_obj);
    *kind = REC_ANSWER;
done:
    free(ex);
    return rc;
}

long long dp_stream_parse(dp_stream *st, const char *data, const int64_t *offsets, const uint8_t *overlong, size_t n,
                          size_t first_line, dp_error *err) {
    st->heads.n = st->heads.failed = 0;
    st->nrec = st->nids = st->nok = st->parse_errors = 0;
    size_t *ends = grow(st->head_end, &st->reccap, n ? n : 1, sizeof(size_t));
    if (!ends) return dp_fail(err, "out of memory"), -1;
    st->head_end = ends;
    size_t cap = st->reccap;
    st->reccap = 0;
    uint8_t *kind = grow(st->kind, &st->reccap, cap, 1);
    if (!kind) return dp_fail(err, "out of memory"), -1;
    st->kind = kind;
    for (size_t i = 0; i < n; i++) {
        int64_t a = offsets[i], z = offsets[i + 1];
        if (a < 0 || z < a) return dp_fail(err, "line %zu: offsets out of order", i), -1;
        if (parse_one(st, (const uint8_t *)data + a, (size_t)(z - a), overlong && overlong[i], first_line + i,
                      &st->kind[i], err))
            return dp_fail(err, "out of memory"), -1;
        st->head_end[i] = st->heads.n;
        st->nrec++;
    }
    if (st->heads.failed) return dp_fail(err, "out of memory"), -1;
    return (long long)st->nok;
}

size_t dp_stream_ids(const dp_stream *st, int64_t *ids, int64_t *counts, int64_t *known) {
    for (size_t i = 0; ids && i < st->nids; i++) ids[i] = (int64_t)st->ids[i];
    for (size_t i = 0; counts && i < st->nok; i++) counts[i] = (int64_t)st->counts[i];
    for (size_t i = 0; known && i < st->nok; i++) known[i] = (int64_t)st->known[i];
    return st->nids;
}

const size_t *dp_stream_record_ids(const dp_stream *st, size_t k, size_t *count) {
    size_t start = 0;
    for (size_t i = 0; i < k; i++) start += st->counts[i];
    *count = st->counts[k];
    return st->ids + start;
}

int dp_stream_format_into(dp_stream *st, const float *probs, sbuf *out, size_t *errors) {
    size_t start = 0, j = 0, bad = 0;
    for (size_t i = 0; i < st->nrec; i++) {
        const char *head = st->heads.p + start;
        size_t n = st->head_end[i] - start;
        start = st->head_end[i];
        sb_put(out, head, n);
        if (st->kind[i] != REC_ANSWER) continue;
        const float *row = probs + j * st->C;
        int finite = 1;
        for (size_t c = 0; c < st->C; c++) finite &= isfinite(row[c]) != 0;
        if (finite) {
            put_answer_tail(st, out, row, st->known[j]);
        } else {
            put_error_tail(st, out, NON_FINITE, 0);
            bad++;
        }
        j++;
    }
    *errors = st->parse_errors + bad;
    return out->failed ? -1 : 0;
}

int dp_stream_format(dp_stream *st, const float *probs, const char **out, size_t *len, size_t *errors,
                     dp_error *err) {
    st->out.n = st->out.failed = 0;
    if (dp_stream_format_into(st, probs, &st->out, errors)) return dp_fail(err, "out of memory"), -1;
    *out = st->out.p ? st->out.p : "";
    *len = st->out.n;
    return 0;
}
