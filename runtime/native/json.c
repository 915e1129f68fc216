/* JSON parsing with Python's json module's rules and messages, and writing as json.dumps / numpy's str() do. */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "json.h"

/* Python raises RecursionError past its recursion limit (1000 frames, less the caller's): danpack-run's decoder
 * gives up at this many nested arrays / objects. */
#define JSON_MAX_DEPTH 985
#define MAX_INT_DIGITS 4000

typedef struct {
    jdoc *d;
    size_t pos;
    int depth;
} jp;

static int fail_at(jp *p, const char *msg, size_t pos) {
    snprintf(p->d->error, sizeof(p->d->error), "invalid JSON: %s (column %zu)", msg, pos + 1);
    return -1;
}

static int fail_plain(jp *p, const char *msg) {
    snprintf(p->d->error, sizeof(p->d->error), "invalid JSON: %s", msg);
    return -1;
}

static long new_node(jp *p, int type) {
    jdoc *d = p->d;
    if (d->n == d->cap) {
        size_t cap = d->cap ? 2 * d->cap : 16;
        jnode *v = realloc(d->nodes, cap * sizeof(jnode));
        if (!v) return -2;
        d->nodes = v;
        d->cap = cap;
    }
    memset(&d->nodes[d->n], 0, sizeof(jnode));
    d->nodes[d->n].type = type;
    return (long)d->n++;
}

static void skip_ws(jp *p) {
    while (p->pos < p->d->tlen) {
        uint32_t c = p->d->text[p->pos];
        if (c != ' ' && c != '\t' && c != '\n' && c != '\r') break;
        p->pos++;
    }
}

static int hex4(const uint32_t *s, uint32_t *out) {
    uint32_t v = 0;
    for (int i = 0; i < 4; i++) {
        uint32_t c = s[i], h;
        if (c >= '0' && c <= '9') h = c - '0';
        else if (c >= 'a' && c <= 'f') h = c - 'a' + 10;
        else if (c >= 'A' && c <= 'F') h = c - 'A' + 10;
        else return -1;
        v = v * 16 + h;
    }
    *out = v;
    return 0;
}

/* a string whose opening quote is at p->pos */
static long parse_string(jp *p) {
    jdoc *d = p->d;
    size_t begin = p->pos, i = p->pos + 1, n = d->tlen;
    const uint32_t *s = d->text;
    long node = new_node(p, J_STR);
    if (node < 0) return node;
    size_t off = d->cps.n;
    for (;;) {
        if (i >= n) return fail_at(p, "Unterminated string starting", begin);
        uint32_t c = s[i];
        if (c == '"') break;
        if (c < 0x20) return fail_at(p, "Invalid control character", i);
        if (c != '\\') {
            if (dp_u32_push(&d->cps, c)) return -2;
            i++;
            continue;
        }
        if (i + 1 >= n) return fail_at(p, "Unterminated string starting", begin);
        uint32_t e = s[i + 1], out;
        switch (e) {
        case '"': out = '"'; break;
        case '\\': out = '\\'; break;
        case '/': out = '/'; break;
        case 'b': out = '\b'; break;
        case 'f': out = '\f'; break;
        case 'n': out = '\n'; break;
        case 'r': out = '\r'; break;
        case 't': out = '\t'; break;
        case 'u': {
            /* as CPython's _json.c: 4 hex digits and at least one character after them */
            if (i + 6 >= n || hex4(s + i + 2, &out)) return fail_at(p, "Invalid \\uXXXX escape", i + 1);
            i += 6;
            if (out >= 0xD800 && out <= 0xDBFF && i + 6 < n && s[i] == '\\' && s[i + 1] == 'u') {
                uint32_t lo;
                if (hex4(s + i + 2, &lo)) return fail_at(p, "Invalid \\uXXXX escape", i + 1);
                if (lo >= 0xDC00 && lo <= 0xDFFF) {
                    out = 0x10000 + ((out - 0xD800) << 10) + (lo - 0xDC00);
                    i += 6;
                }
            }
            if (dp_u32_push(&d->cps, out)) return -2;
            continue;
        }
        default: return fail_at(p, "Invalid \\escape", i);
        }
        if (dp_u32_push(&d->cps, out)) return -2;
        i += 2;
    }
    d->nodes[node].off = off;
    d->nodes[node].len = d->cps.n - off;
    p->pos = i + 1;
    return node;
}

static int match(jp *p, const char *word) {
    size_t k = strlen(word);
    if (p->pos + k > p->d->tlen) return 0;
    for (size_t i = 0; i < k; i++)
        if (p->d->text[p->pos + i] != (uint32_t)(unsigned char)word[i]) return 0;
    return 1;
}

static int is_digit(jp *p, size_t i) { return i < p->d->tlen && p->d->text[i] >= '0' && p->d->text[i] <= '9'; }

static long parse_value(jp *p);

static void link_child(jdoc *d, long parent, long *last, long child) {
    if (*last < 0) d->nodes[parent].first = (size_t)child + 1;
    else d->nodes[*last].next = (size_t)child + 1;
    *last = child;
    d->nodes[parent].count++;
}

static long parse_number(jp *p) {
    jdoc *d = p->d;
    size_t start = p->pos, i = p->pos;
    if (i < d->tlen && d->text[i] == '-') i++;
    if (!is_digit(p, i)) return fail_at(p, "Expecting value", start);
    if (d->text[i] == '0') i++;
    else
        while (is_digit(p, i)) i++;
    int is_float = 0;
    if (i < d->tlen && d->text[i] == '.' && is_digit(p, i + 1)) {
        i += 2;
        while (is_digit(p, i)) i++;
        is_float = 1;
    }
    if (i < d->tlen && (d->text[i] == 'e' || d->text[i] == 'E')) {
        size_t j = i + 1;
        if (j < d->tlen && (d->text[j] == '+' || d->text[j] == '-')) j++;
        if (is_digit(p, j)) {
            while (is_digit(p, j)) j++;
            i = j;
            is_float = 1;
        }
    }
    size_t len = i - start;
    long node = new_node(p, is_float ? J_FLOAT : J_INT);
    if (node < 0) return node;
    if (is_float) {
        char buf[64], *tmp = len < sizeof(buf) ? buf : malloc(len + 1);
        if (!tmp) return -2;
        for (size_t k = 0; k < len; k++) tmp[k] = (char)d->text[start + k];
        tmp[len] = 0;
        double v = strtod(tmp, NULL);
        if (isinf(v)) {
            char msg[80];
            snprintf(msg, sizeof(msg), "number %.24s is out of range", tmp);
            if (tmp != buf) free(tmp);
            return fail_plain(p, msg);
        }
        if (tmp != buf) free(tmp);
        d->nodes[node].f = v;
    } else {
        if (len > MAX_INT_DIGITS) {
            char msg[80];
            snprintf(msg, sizeof(msg), "an integer of %zu digits is too long", len);
            return fail_plain(p, msg);
        }
        d->nodes[node].off = start;
        d->nodes[node].len = len;
    }
    p->pos = i;
    return node;
}

static long parse_value(jp *p) {
    jdoc *d = p->d;
    if (p->pos >= d->tlen) return fail_at(p, "Expecting value", p->pos);
    uint32_t c = d->text[p->pos];
    if (c == '"') return parse_string(p);
    if (c == '{' || c == '[') {
        if (++p->depth > JSON_MAX_DEPTH) return fail_plain(p, "nested too deeply");
        int obj = c == '{';
        long node = new_node(p, obj ? J_OBJ : J_ARR), last = -1;
        if (node < 0) return node;
        p->pos++;
        skip_ws(p);
        uint32_t close = obj ? '}' : ']';
        if (p->pos < d->tlen && d->text[p->pos] == close) {
            p->pos++;
            p->depth--;
            return node;
        }
        for (;;) {
            if (obj) {
                if (p->pos >= d->tlen || d->text[p->pos] != '"')
                    return fail_at(p, "Expecting property name enclosed in double quotes", p->pos);
                long key = parse_string(p);
                if (key < 0) return key;
                link_child(d, node, &last, key);
                skip_ws(p);
                if (p->pos >= d->tlen || d->text[p->pos] != ':') return fail_at(p, "Expecting ':' delimiter", p->pos);
                p->pos++;
                skip_ws(p);
            }
            long v = parse_value(p);
            if (v < 0) return v;
            link_child(d, node, &last, v);
            skip_ws(p);
            if (p->pos < d->tlen && d->text[p->pos] == close) {
                p->pos++;
                break;
            }
            if (p->pos >= d->tlen || d->text[p->pos] != ',') return fail_at(p, "Expecting ',' delimiter", p->pos);
            p->pos++;
            skip_ws(p);
        }
        p->depth--;
        return node;
    }
    if (c == 'n' && match(p, "null")) return p->pos += 4, new_node(p, J_NULL);
    if (c == 't' && match(p, "true")) return p->pos += 4, new_node(p, J_TRUE);
    if (c == 'f' && match(p, "false")) return p->pos += 5, new_node(p, J_FALSE);
    if (c == 'N' && match(p, "NaN")) return fail_plain(p, "NaN is not a JSON number");
    if (c == 'I' && match(p, "Infinity")) return fail_plain(p, "Infinity is not a JSON number");
    if (c == '-' && match(p, "-Infinity")) return fail_plain(p, "-Infinity is not a JSON number");
    if (c == '-' || (c >= '0' && c <= '9')) return parse_number(p);
    return fail_at(p, "Expecting value", p->pos);
}

int dp_json_parse(jdoc *doc, const uint32_t *text, size_t n) {
    doc->n = 0;
    doc->cps.n = 0;
    doc->text = text;
    doc->tlen = n;
    doc->error[0] = 0;
    jp p = {doc, 0, 0};
    skip_ws(&p);
    long root = parse_value(&p);
    if (root == -2) return -2;
    if (root < 0) return -1;
    skip_ws(&p);
    if (p.pos != n) return fail_at(&p, "Extra data", p.pos);
    return 0;
}

void dp_json_free(jdoc *doc) {
    free(doc->nodes);
    free(doc->cps.v);
    memset(doc, 0, sizeof(*doc));
}

const jnode *dp_json_node(const jdoc *doc, size_t index) { return index ? &doc->nodes[index - 1] : NULL; }

int dp_cps_eq_utf8(const uint32_t *s, size_t n, const char *z, size_t zn) {
    char tmp[4];
    size_t pos = 0;
    for (size_t i = 0; i < n; i++) {
        size_t k = dp_utf8_put(s[i], tmp);
        if (pos + k > zn || memcmp(z + pos, tmp, k) != 0) return 0;
        pos += k;
    }
    return pos == zn;
}

/* ---- writing ---- */

void sb_put(sbuf *b, const char *s, size_t n) {
    if (b->failed) return;
    if (b->n + n > b->cap) {
        size_t cap = b->cap ? b->cap : 256;
        while (cap < b->n + n) cap *= 2;
        char *p = realloc(b->p, cap);
        if (!p) {
            b->failed = 1;
            return;
        }
        b->p = p;
        b->cap = cap;
    }
    if (s) memcpy(b->p + b->n, s, n); /* s NULL: room only, the caller writes the bytes */
    b->n += n;
}

void sb_str(sbuf *b, const char *z) { sb_put(b, z, strlen(z)); }

/* runtime/safe_text.py escape_text: what str.isprintable() refuses, space separators aside, as \uXXXX (astral
 * characters as their UTF-16 pair); applied after json.dumps's own escapes, as Python's stream writer does */
void sb_json_unsafe(sbuf *b, uint32_t c) {
    char tmp[16];
    if (c >= 0x10000) {
        c -= 0x10000;
        snprintf(tmp, sizeof(tmp), "\\u%04x\\u%04x", 0xD800u + (c >> 10), 0xDC00u + (c & 0x3FFu));
        sb_put(b, tmp, 12);
    } else {
        snprintf(tmp, sizeof(tmp), "\\u%04x", (unsigned)c);
        sb_put(b, tmp, 6);
    }
}

static void put_escaped(sbuf *b, uint32_t c) {
    char tmp[16];
    switch (c) {
    case '"': sb_put(b, "\\\"", 2); return;
    case '\\': sb_put(b, "\\\\", 2); return;
    case '\n': sb_put(b, "\\n", 2); return;
    case '\r': sb_put(b, "\\r", 2); return;
    case '\t': sb_put(b, "\\t", 2); return;
    case '\b': sb_put(b, "\\b", 2); return;
    case '\f': sb_put(b, "\\f", 2); return;
    default: break;
    }
    if (c < 0x20 || (!b->keep_unsafe && (c == 0x7F || (c > 0x7F && (dp_props(c) & DP_P_UNSAFE))))) sb_json_unsafe(b, c);
    else sb_put(b, tmp, dp_utf8_put(c, tmp));
}

void sb_json_cps(sbuf *b, const uint32_t *s, size_t n) {
    sb_put(b, "\"", 1);
    size_t i = 0;
    while (i < n) {
        size_t j = i; /* a run of printable ASCII other than the quote and backslash: copied as bytes */
        while (j < n && s[j] >= 0x20 && s[j] < 0x7F && s[j] != '"' && s[j] != '\\') j++;
        if (j > i && !b->failed) {
            sb_put(b, NULL, j - i);
            if (b->failed) return;
            char *o = b->p + b->n - (j - i);
            for (size_t k = i; k < j; k++) *o++ = (char)s[k];
        }
        if (j < n) put_escaped(b, s[j++]);
        i = j;
    }
    sb_put(b, "\"", 1);
}

void sb_json_utf8(sbuf *b, const char *s, size_t n) {
    dp_u32buf tmp = {0};
    if (dp_utf8_decode((const uint8_t *)s, n, &tmp)) {
        b->failed = 1;
        return;
    }
    sb_json_cps(b, tmp.v, tmp.n);
    free(tmp.v);
}

/* shortest digits of v that read back as v (float32 when single): digits (no dot) and decimal exponent of the
 * first digit */
static int text_reads_back(const char *buf, double v, int single) {
    return single ? strtof(buf, NULL) == (float)v : strtod(buf, NULL) == v;
}

/* buf ("d.ddde+XX", prec digits) moved one unit of its last digit up (up) or down, carries and borrows included. */
static void step_decimal(char *buf, size_t cap, int prec, int up) {
    char m[24];
    int k = 0;
    const char *s = buf;
    for (; *s && *s != 'e' && k < prec; s++)
        if (*s >= '0' && *s <= '9') m[k++] = *s;
    while (*s && *s != 'e') s++;
    int e = *s ? atoi(s + 1) : 0;
    int i = k - 1;
    if (up) {
        while (i >= 0 && m[i] == '9') m[i--] = '0';
        if (i >= 0) m[i]++;
        else m[0] = '1', e++; /* 9.99 -> 10.0: one digit more on the left, the last zero dropped */
    } else {
        while (i >= 0 && m[i] == '0') m[i--] = '9';
        if (i >= 0) m[i]--;
        if (m[0] == '0') { /* 1.00 -> 0.999: shift left, one more 9 on the right */
            memmove(m, m + 1, (size_t)k - 1);
            m[k - 1] = '9';
            e--;
        }
    }
    m[k] = 0;
    snprintf(buf, cap, "%c%s%se%c%02d", m[0], k > 1 ? "." : "", m + 1, e < 0 ? '-' : '+', e < 0 ? -e : e);
}

/* Whether some prec-digit decimal reads back as v; if so, buf holds it. The nearest one first; next to a power of
 * two the gap below v is half the gap above, so when the nearest lies below (or is a tie rounded down) and does not
 * read back, the one on the other side may (2^-24 as a double: 5.960464477539063e-08, as Python's repr writes). */
static int round_trips(double v, int single, int prec, char *buf, size_t cap) {
    snprintf(buf, cap, "%.*e", prec - 1, v);
    if (text_reads_back(buf, v, single)) return 1;
    double near = strtod(buf, NULL);
    step_decimal(buf, cap, prec, near < v);
    return text_reads_back(buf, v, single);
}

static void shortest(double v, int single, char *digits, int *exp10) {
    /* the nearest p-digit decimal reads back as v for every p from the shortest one up (it is never farther from v
     * than the shorter one padded with zeros), so the shortest p is found by bisection */
    char buf[40];
    int lo = 1, hi = single ? 9 : 17;
    while (lo < hi) {
        int mid = (lo + hi) / 2;
        if (round_trips(v, single, mid, buf, sizeof(buf))) hi = mid;
        else lo = mid + 1;
    }
    round_trips(v, single, lo, buf, sizeof(buf));
    const char *s = buf;
    if (*s == '-') s++;
    size_t k = 0;
    for (; *s && *s != 'e'; s++)
        if (*s != '.') digits[k++] = *s;
    while (k > 1 && digits[k - 1] == '0') k--;
    digits[k] = 0;
    *exp10 = atoi(s + 1);
}

static void put_positional(sbuf *b, const char *digits, int e) {
    size_t nd = strlen(digits);
    if (e < 0) {
        sb_str(b, "0.");
        for (int i = -1; i > e; i--) sb_put(b, "0", 1);
        sb_put(b, digits, nd);
        return;
    }
    size_t whole = (size_t)e + 1;
    if (nd <= whole) {
        sb_put(b, digits, nd);
        for (size_t i = nd; i < whole; i++) sb_put(b, "0", 1);
        sb_str(b, ".0");
    } else {
        sb_put(b, digits, whole);
        sb_put(b, ".", 1);
        sb_put(b, digits + whole, nd - whole);
    }
}

static void put_scientific(sbuf *b, const char *digits, int e) {
    char tmp[16];
    sb_put(b, digits, 1);
    if (digits[1]) {
        sb_put(b, ".", 1);
        sb_str(b, digits + 1);
    }
    snprintf(tmp, sizeof(tmp), "e%c%02d", e < 0 ? '-' : '+', e < 0 ? -e : e);
    sb_str(b, tmp);
}

/* ---- the fast exact path for float32 ----
 * The same digits as shortest(v, 1, ...), found without printf / strtof: for a precision p the slow path prints
 * the p-digit rounding of v (correctly rounded, ties to even) and reads it back with strtof (correctly rounded to
 * float32). Here the p-digit candidate D is round(v * 10^k) computed in double, and "reads back as v" is "D / 10^k
 * lies strictly between the midpoints from v to its float32 neighbours". Both are decided only when the double
 * arithmetic (at most three roundings, relative error < 4e-16) cannot change the answer: a scaled value within
 * that error of a rounding tie, a midpoint or a power of ten makes the call return 0 and the slow path decide. */

static const double POW10[23] = {1e0,  1e1,  1e2,  1e3,  1e4,  1e5,  1e6,  1e7,  1e8,  1e9,  1e10, 1e11,
                                 1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18, 1e19, 1e20, 1e21, 1e22};
#define SCALE_EPS 1e-15 /* relative error bound of scale() (3 roundings of 2^-53), with room to spare */

/* x * 10^k (|k| <= 44) with at most two roundings; exact powers of ten only */
static int scale(double x, int k, double *out) {
    if (k > 44 || k < -22) return 0;
    if (k > 22) x *= POW10[22], k -= 22;
    *out = k >= 0 ? x * POW10[k] : x / POW10[-k];
    return 1;
}

/* 1: the p-digit rounding of a (digits *d, exponent of the first digit *e) is decided; 0: too close to call */
static int candidate(double a, int e10, int p, uint64_t *d, int *e) {
    double s;
    if (!scale(a, p - 1 - e10, &s)) return 0;
    double lo = POW10[p - 1], hi = POW10[p];
    if (fabs(s - lo) <= lo * SCALE_EPS * 4 || fabs(s - hi) <= hi * SCALE_EPS * 4) return 0; /* e10 itself unsure */
    if (s < lo || s >= hi) return -1; /* e10 off by one: the caller fixes it */
    double f = floor(s), frac = s - f;
    if (fabs(frac - 0.5) <= s * SCALE_EPS) return 0; /* a tie, or too near one: ties-to-even needs exact digits */
    uint64_t n = (uint64_t)f + (frac > 0.5);
    *e = e10;
    if (n == (uint64_t)hi) n /= 10, (*e)++; /* 9.99 -> 10.0: one digit more in front */
    *d = n;
    return 1;
}

/* 1 / 0: D * 10^(e - p + 1) reads back as v / does not; -1: too close to a midpoint to call */
static int reads_back(uint64_t d, int e, int p, double mid_lo, double mid_hi) {
    double lo, hi;
    int k = p - 1 - e;
    if (!scale(mid_lo, k, &lo) || !scale(mid_hi, k, &hi)) return -1;
    double x = (double)d;
    if (fabs(x - lo) <= lo * SCALE_EPS * 2 || fabs(x - hi) <= hi * SCALE_EPS * 2) return -1;
    return x > lo && x < hi;
}

/* shortest(v, 1, ...) without printf; 0 when the slow path must decide */
static int shortest_f32_fast(float v, char *digits, int *exp10) {
    double a = (double)v;
    if (!(a >= 1.1754943508222875e-38) || !(a <= 1e30)) return 0; /* subnormal, huge, NaN: the slow path */
    float below = nextafterf(v, 0.0f), above = nextafterf(v, INFINITY);
    if (isinf(above)) return 0;
    double mid_lo = (a + (double)below) / 2, mid_hi = (a + (double)above) / 2; /* exact in double */
    int e2;
    if (frexp(a, &e2) == 0.5) return 0; /* a power of two: the gap below is half the gap above (round_trips) */
    /* a in [2^(e2-1), 2^e2): floor(log10(a)) is this or one more; candidate() finds which */
    int e10 = (int)floor((e2 - 1) * 0.30102999566398120);
    uint64_t best = 0;
    int best_e = 0;
    int lo = 1, hi = 9; /* the slow path's bisection, step for step */
    uint64_t cand[10];
    int cand_e[10], known[10] = {0};
    while (lo <= hi) {
        int mid = lo == hi ? lo : (lo + hi) / 2;
        uint64_t d;
        int e, c = candidate(a, e10, mid, &d, &e);
        if (c < 0) { /* the decimal exponent was off by one: find it from this precision */
            double s;
            if (!scale(a, mid - 1 - e10, &s)) return 0;
            e10 += s >= POW10[mid] ? 1 : -1;
            c = candidate(a, e10, mid, &d, &e);
        }
        if (c != 1) return 0;
        int r = reads_back(d, e, mid, mid_lo, mid_hi);
        if (r < 0) return 0;
        cand[mid] = d, cand_e[mid] = e, known[mid] = r + 1;
        if (lo == hi) break;
        if (r) hi = mid;
        else lo = mid + 1;
    }
    if (known[lo] != 2) return 0; /* the slow path uses precision 9 even when it does not read back */
    best = cand[lo], best_e = cand_e[lo];
    char tmp[24];
    int n = 0;
    while (best) tmp[n++] = (char)('0' + best % 10), best /= 10;
    int k = 0;
    while (n > 0) digits[k++] = tmp[--n];
    while (k > 1 && digits[k - 1] == '0') k--;
    digits[k] = 0;
    *exp10 = best_e;
    return 1;
}

static void put_f32(sbuf *b, float v, int fast) {
    if (isnan(v)) return sb_str(b, "nan");
    if (isinf(v)) return sb_str(b, v < 0 ? "-inf" : "inf");
    if (signbit(v)) sb_put(b, "-", 1);
    double a = fabs((double)v);
    if (a == 0.0) return sb_str(b, "0.0");
    char digits[40];
    int e;
    if (!fast || !shortest_f32_fast(fabsf(v), digits, &e)) shortest(a, 1, digits, &e);
    if (a < 1e16 && a >= 1e-4) put_positional(b, digits, e);
    else put_scientific(b, digits, e);
}

void sb_f32(sbuf *b, float v) { put_f32(b, v, 1); }

void sb_f32_slow(sbuf *b, float v) { put_f32(b, v, 0); }

/* float as Python's repr() writes it */
static void sb_f64(sbuf *b, double v) {
    if (signbit(v)) sb_put(b, "-", 1);
    double a = fabs(v);
    if (a == 0.0) return sb_str(b, "0.0");
    char digits[40];
    int e;
    shortest(a, 0, digits, &e);
    if (e < -4 || e >= 16) put_scientific(b, digits, e);
    else put_positional(b, digits, e);
}

typedef struct {
    const jdoc *doc;
    size_t key, order;
} keyed;

/* by key (code points), then by position */
static int cmp_keyed(const void *x, const void *y) {
    const keyed *a = x, *c = y;
    const jnode *ka = &a->doc->nodes[a->key], *kc = &c->doc->nodes[c->key];
    const uint32_t *sa = a->doc->cps.v + ka->off, *sc = c->doc->cps.v + kc->off;
    size_t n = ka->len < kc->len ? ka->len : kc->len;
    for (size_t i = 0; i < n; i++)
        if (sa[i] != sc[i]) return sa[i] < sc[i] ? -1 : 1;
    if (ka->len != kc->len) return ka->len < kc->len ? -1 : 1;
    return (a->order > c->order) - (a->order < c->order);
}

static int same_key(const jdoc *d, size_t a, size_t b) {
    const jnode *x = &d->nodes[a], *y = &d->nodes[b];
    return x->len == y->len && memcmp(d->cps.v + x->off, d->cps.v + y->off, x->len * sizeof(uint32_t)) == 0;
}

int dp_json_members(const jdoc *doc, size_t object, jmember **out, size_t *n) {
    const jnode *v = &doc->nodes[object];
    size_t m = v->count / 2, i = 0;
    jmember *all = malloc((m ? m : 1) * sizeof(jmember));
    keyed *sorted = malloc((m ? m : 1) * sizeof(keyed));
    size_t *last = malloc((m ? m : 1) * sizeof(size_t)); /* last[position of a key's first member]: its last */
    if (!all || !sorted || !last) {
        free(all);
        free(sorted);
        free(last);
        return -1;
    }
    for (size_t k = v->first; k; k = doc->nodes[doc->nodes[k - 1].next - 1].next, i++) {
        all[i] = (jmember){k - 1, doc->nodes[k - 1].next - 1};
        sorted[i] = (keyed){doc, k - 1, i};
        last[i] = SIZE_MAX;
    }
    qsort(sorted, m, sizeof(keyed), cmp_keyed);
    for (i = 0; i < m;) {
        size_t j = i;
        while (j + 1 < m && same_key(doc, sorted[j + 1].key, sorted[i].key)) j++;
        last[sorted[i].order] = sorted[j].order;
        i = j + 1;
    }
    size_t w = 0;
    for (i = 0; i < m; i++)
        if (last[i] != SIZE_MAX) all[w++] = (jmember){all[i].key, all[last[i]].value};
    free(sorted);
    free(last);
    *out = all;
    *n = w;
    return 0;
}

void sb_json_value(sbuf *b, const jdoc *doc, size_t node) {
    const jnode *v = &doc->nodes[node];
    switch (v->type) {
    case J_NULL: sb_str(b, "null"); return;
    case J_TRUE: sb_str(b, "true"); return;
    case J_FALSE: sb_str(b, "false"); return;
    case J_FLOAT: sb_f64(b, v->f); return;
    case J_STR: sb_json_cps(b, doc->cps.v + v->off, v->len); return;
    case J_INT: {
        const uint32_t *t = doc->text + v->off;
        size_t n = v->len;
        if (n == 2 && t[0] == '-' && t[1] == '0') n = 1, t++; /* int("-0") is 0 */
        for (size_t i = 0; i < n; i++) {
            char c = (char)t[i];
            sb_put(b, &c, 1);
        }
        return;
    }
    case J_ARR: {
        sb_put(b, "[", 1);
        size_t i = 0;
        for (size_t k = v->first; k; k = doc->nodes[k - 1].next, i++) {
            if (i) sb_put(b, ",", 1);
            sb_json_value(b, doc, k - 1);
        }
        sb_put(b, "]", 1);
        return;
    }
    default: break;
    }
    /* object: each key once, where it first appeared, with the value it last had (a Python dict) */
    jmember *m;
    size_t n;
    if (dp_json_members(doc, node, &m, &n)) {
        b->failed = 1;
        return;
    }
    sb_put(b, "{", 1);
    for (size_t i = 0; i < n; i++) {
        if (i) sb_put(b, ",", 1);
        const jnode *key = &doc->nodes[m[i].key];
        sb_json_cps(b, doc->cps.v + key->off, key->len);
        sb_put(b, ":", 1);
        sb_json_value(b, doc, m[i].value);
    }
    sb_put(b, "}", 1);
    free(m);
}
