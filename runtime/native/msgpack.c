/* A bounded msgpack reader: counts checked against the bytes present before anything is allocated, a budget of
 * items, a nesting limit, strings checked as UTF-8, map keys str or bin (as msgpack-python's strict_map_key). */
#include <stdlib.h>
#include <string.h>

#include "msgpack.h"

#define MP_MAX_DEPTH 32 /* a bundle nests 6 levels; the manifest rule allows 8 inside the payload */

static uint64_t be(const uint8_t *p, size_t k) {
    uint64_t v = 0;
    for (size_t i = 0; i < k; i++) v = v << 8 | p[i];
    return v;
}

/* The rule of runtime/bundle.py _check_counts: refuse containers declaring more entries than bytes remain,
 * and more than `max_items` items in all; *items is how many items the walk saw. */
static int check_counts(const uint8_t *d, size_t end, size_t max_items, size_t *items, dp_error *err,
                        const char *what) {
    size_t pos = 0, owed = 1, seen = 0;
    while (owed && pos < end) {
        uint8_t b = d[pos++];
        owed--;
        if (++seen > max_items) {
            dp_fail(err, "%s is not a well-formed msgpack map (more than %zu msgpack items; a bundle holds a few thousand)",
                    what, max_items);
            return -1;
        }
        uint64_t n = 0;
        if (b <= 0x7F || b >= 0xE0) continue;
        if (b >= 0xA0 && b <= 0xBF) {
            pos += b - 0xA0u;
            continue;
        }
        size_t k = 0;
        switch (b) {
        case 0xC0: case 0xC2: case 0xC3: continue;
        case 0xCC: case 0xD0: pos += 1; continue;
        case 0xCD: case 0xD1: case 0xD4: pos += 2; continue;
        case 0xD5: pos += 3; continue;
        case 0xCA: case 0xCE: case 0xD2: pos += 4; continue;
        case 0xD6: pos += 5; continue;
        case 0xCB: case 0xCF: case 0xD3: pos += 8; continue;
        case 0xD7: pos += 9; continue;
        case 0xD8: pos += 17; continue;
        case 0xC4: case 0xD9: case 0xC7: k = 1; break;
        case 0xC5: case 0xDA: case 0xC8: k = 2; break;
        case 0xC6: case 0xDB: case 0xC9: k = 4; break;
        default: break;
        }
        if (k) {
            if (pos + k > end) { /* the length field itself is cut: the parse names it */
                pos = end;
                continue;
            }
            uint64_t len = be(d + pos, k);
            pos += k;
            if (len > end - pos) {
                pos = end;
                continue;
            }
            pos += (size_t)len + (b >= 0xC7 && b <= 0xC9);
            continue;
        }
        if (b <= 0x8F) n = 2u * (b & 0x0F);
        else if (b <= 0x9F) n = b & 0x0F;
        else if (b == 0xDC || b == 0xDE || b == 0xDD || b == 0xDF) {
            k = (b == 0xDC || b == 0xDE) ? 2 : 4;
            if (pos + k > end) break;
            n = be(d + pos, k) * ((b == 0xDE || b == 0xDF) ? 2u : 1u);
            pos += k;
        } else {
            break; /* 0xC1: the parse names it */
        }
        owed += (size_t)n;
        if (pos > end || owed > end - pos) {
            dp_fail(err, "%s is not a well-formed msgpack map (a container at byte %zu declares more entries than the "
                         "%zu bytes left); the file is cut short or damaged: copy it again from the packer's output",
                    what, pos, pos > end ? (size_t)0 : end - pos);
            return -1;
        }
    }
    *items = seen;
    return 0;
}

typedef struct {
    const uint8_t *d;
    size_t end, pos;
    dp_mp *nodes;
    size_t used, cap, max_container;
    dp_error *err;
    const char *what;
} parser;

static int bad(parser *p, const char *why) {
    dp_fail(p->err, "%s is not a well-formed msgpack map (%s at byte %zu); the file is cut short or damaged: copy it "
                    "again from the packer's output", p->what, why, p->pos);
    return -1;
}

static int need(parser *p, size_t k) { return k <= p->end - p->pos ? 0 : bad(p, "incomplete input"); }

static int parse(parser *p, dp_mp *out, int depth);

static int parse_items(parser *p, dp_mp *out, uint64_t count, int is_map, int depth) {
    if (count > p->max_container) return bad(p, "a container longer than allowed");
    uint64_t total = is_map ? 2 * count : count;
    if (total > p->cap - p->used) return bad(p, "more items than the file holds");
    out->type = is_map ? MP_MAP : MP_ARR;
    out->len = (size_t)count;
    out->items = p->nodes + p->used;
    p->used += (size_t)total;
    for (size_t i = 0; i < (size_t)total; i++) {
        if (parse(p, &out->items[i], depth + 1)) return -1;
        if (is_map && i % 2 == 0 && out->items[i].type != MP_STR && out->items[i].type != MP_BIN)
            return bad(p, "a map key that is not a string");
    }
    return 0;
}

static int parse(parser *p, dp_mp *out, int depth) {
    if (depth > MP_MAX_DEPTH) return bad(p, "containers nested deeper than allowed");
    memset(out, 0, sizeof(*out));
    if (need(p, 1)) return -1;
    uint8_t b = p->d[p->pos++];
    size_t k = 0;
    if (b <= 0x7F) {
        out->type = MP_INT;
        out->i = b;
        return 0;
    }
    if (b >= 0xE0) {
        out->type = MP_INT;
        out->i = (int8_t)b;
        return 0;
    }
    if (b <= 0x8F) return parse_items(p, out, b & 0x0F, 1, depth);
    if (b <= 0x9F) return parse_items(p, out, b & 0x0F, 0, depth);
    if (b <= 0xBF) {
        k = b - 0xA0u;
        goto str;
    }
    switch (b) {
    case 0xC0: out->type = MP_NIL; return 0;
    case 0xC2: case 0xC3: out->type = MP_BOOL; out->i = b == 0xC3; return 0;
    case 0xCC: case 0xCD: case 0xCE: case 0xCF: {
        size_t w = (size_t)1 << (b - 0xCC);
        if (need(p, w)) return -1;
        uint64_t v = be(p->d + p->pos, w);
        p->pos += w;
        out->type = MP_INT;
        if (v > (uint64_t)INT64_MAX) out->huge = 1, out->i = INT64_MAX;
        else out->i = (int64_t)v;
        return 0;
    }
    case 0xD0: case 0xD1: case 0xD2: case 0xD3: {
        size_t w = (size_t)1 << (b - 0xD0);
        if (need(p, w)) return -1;
        uint64_t v = be(p->d + p->pos, w);
        p->pos += w;
        out->type = MP_INT;
        if (w < 8 && (v >> (8 * w - 1))) v |= ~(uint64_t)0 << (8 * w); /* sign-extend */
        out->i = v > (uint64_t)INT64_MAX ? -(int64_t)(~v) - 1 : (int64_t)v;
        return 0;
    }
    case 0xCA: {
        if (need(p, 4)) return -1;
        uint32_t v = (uint32_t)be(p->d + p->pos, 4);
        float f;
        memcpy(&f, &v, 4);
        p->pos += 4;
        out->type = MP_FLOAT;
        out->f = f;
        return 0;
    }
    case 0xCB: {
        if (need(p, 8)) return -1;
        uint64_t v = be(p->d + p->pos, 8);
        memcpy(&out->f, &v, 8);
        p->pos += 8;
        out->type = MP_FLOAT;
        return 0;
    }
    case 0xD9: case 0xDA: case 0xDB: case 0xC4: case 0xC5: case 0xC6: {
        size_t w = (b == 0xD9 || b == 0xC4) ? 1 : (b == 0xDA || b == 0xC5) ? 2 : 4;
        if (need(p, w)) return -1;
        uint64_t len = be(p->d + p->pos, w);
        p->pos += w;
        if (len > p->end - p->pos) return bad(p, "incomplete input");
        k = (size_t)len;
        if (b >= 0xC4 && b <= 0xC6) {
            out->type = MP_BIN;
            out->p = p->d + p->pos;
            out->len = k;
            p->pos += k;
            return 0;
        }
        goto str;
    }
    case 0xDC: case 0xDD: case 0xDE: case 0xDF: {
        size_t w = (b == 0xDC || b == 0xDE) ? 2 : 4;
        if (need(p, w)) return -1;
        uint64_t n = be(p->d + p->pos, w);
        p->pos += w;
        return parse_items(p, out, n, b >= 0xDE, depth);
    }
    default: return bad(p, "an extension type or reserved byte, which bundles never hold");
    }
str:
    if (need(p, k)) return -1;
    if (!dp_utf8_valid(p->d + p->pos, k)) return bad(p, "a string that is not UTF-8");
    out->type = MP_STR;
    out->p = p->d + p->pos;
    out->len = k;
    p->pos += k;
    return 0;
}

int dp_mp_read(const uint8_t *d, size_t len, size_t max_container, const char *what, dp_mp_doc *doc, dp_error *err) {
    size_t items = 0;
    memset(doc, 0, sizeof(*doc));
    if (check_counts(d, len, DP_MP_MAX_ITEMS, &items, err, what)) return -1;
    parser p = {d, len, 0, NULL, 0, 0, max_container, err, what};
    p.cap = items + 1;
    p.nodes = calloc(p.cap, sizeof(dp_mp));
    if (!p.nodes) {
        dp_fail(err, "%s: out of memory", what);
        return -1;
    }
    dp_mp *root = &p.nodes[p.used++];
    if (parse(&p, root, 0)) {
        free(p.nodes);
        return -1;
    }
    if (p.pos != len) {
        free(p.nodes);
        return bad(&p, "extra data after the map");
    }
    doc->nodes = p.nodes;
    doc->root = root;
    return 0;
}

void dp_mp_free(dp_mp_doc *doc) {
    free(doc->nodes);
    doc->nodes = NULL;
    doc->root = NULL;
}

const dp_mp *dp_mp_get(const dp_mp *map, const char *key) {
    if (!map || map->type != MP_MAP) return NULL;
    size_t klen = strlen(key);
    const dp_mp *found = NULL;
    for (size_t i = 0; i < map->len; i++) { /* the last of duplicate keys wins, as in a Python dict */
        const dp_mp *k = &map->items[2 * i];
        if (k->type == MP_STR && k->len == klen && memcmp(k->p, key, klen) == 0) found = &map->items[2 * i + 1];
    }
    return found;
}

int dp_mp_is(const dp_mp *v, const char *s) {
    return v && v->type == MP_STR && v->len == strlen(s) && memcmp(v->p, s, v->len) == 0;
}

/* The distinct keys of a map are exactly `keys` (n of them): duplicates collapse as in a Python dict. */
int dp_mp_keys_are(const dp_mp *map, const char *const *keys, size_t n) {
    if (!map || map->type != MP_MAP) return 0;
    for (size_t i = 0; i < map->len; i++) {
        const dp_mp *k = &map->items[2 * i];
        size_t j = 0;
        for (; j < n; j++)
            if (dp_mp_is(k, keys[j])) break;
        if (j == n) return 0;
    }
    for (size_t j = 0; j < n; j++)
        if (!dp_mp_get(map, keys[j])) return 0;
    return 1;
}
