/* The bundle's ONNX graph, read with the protocol-buffers wire format (as runtime/onnx_wire.py does) and checked as
 * runtime/bundle.py _check_graph does: well-formed, only the packer's operators, inputs ids/counts, outputs
 * probs/logits, every used name defined, and external tensors exactly the bundle's by name, type and shape.
 * The native runtime never runs the graph: it computes the manifest's gather -> mean -> layers -> softmax, and the
 * packer's probe (re-run at load) holds the two to the same answers. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "bundle_impl.h"

typedef struct {
    const uint8_t *p;
    size_t n;
} slice;

typedef struct {
    const uint8_t *p;
    size_t n, pos;
} pbuf;

typedef struct {
    uint64_t field, value;
    int wire;
    slice sub;
} pfield;

static int varint(pbuf *b, uint64_t *out) {
    uint64_t v = 0;
    int over = 0;
    for (int shift = 0; shift < 70; shift += 7) {
        if (b->pos >= b->n) return -1;
        uint8_t c = b->p[b->pos++];
        if (shift < 64) {
            uint64_t part = (uint64_t)(c & 0x7F) << shift;
            if (shift > 57 && (c & 0x7F) >> (64 - shift)) over = 1;
            v |= part;
        } else if (c & 0x7F) {
            over = 1;
        }
        if (c < 0x80) {
            *out = over ? UINT64_MAX : v;
            return 0;
        }
    }
    return -1; /* longer than 10 bytes */
}

/* 1: a field, 0: end of message, -1: malformed */
static int next(pbuf *b, pfield *f) {
    if (b->pos >= b->n) return 0;
    uint64_t key;
    if (varint(b, &key)) return -1;
    f->field = key >> 3;
    f->wire = (int)(key & 7);
    if (f->field == 0) return -1;
    if (f->wire == 0) return varint(b, &f->value) ? -1 : 1;
    if (f->wire == 1 || f->wire == 5) {
        size_t k = f->wire == 1 ? 8 : 4;
        if (k > b->n - b->pos) return -1;
        b->pos += k;
        return 1;
    }
    if (f->wire == 2) {
        uint64_t len;
        if (varint(b, &len) || len > b->n - b->pos) return -1;
        f->sub.p = b->p + b->pos;
        f->sub.n = (size_t)len;
        b->pos += (size_t)len;
        return 1;
    }
    return -1;
}

/* Every field of a message is well-formed, and the listed string fields are length-delimited UTF-8. */
static int check_message(slice m, const int *text, size_t ntext) {
    pbuf b = {m.p, m.n, 0};
    pfield f;
    int r;
    while ((r = next(&b, &f)) == 1) {
        for (size_t i = 0; i < ntext; i++) {
            if (f.field != (uint64_t)text[i]) continue;
            if (f.wire != 2 || !dp_utf8_valid(f.sub.p, f.sub.n)) return -1;
        }
    }
    return r;
}

static const int T_MODEL[] = {2, 3, 4, 6}, T_OPSET[] = {1}, T_GRAPH[] = {2, 10}, T_NODE[] = {1, 2, 3, 4, 6, 7},
                 T_ATTR[] = {1, 13, 21}, T_TENSOR[] = {8, 12}, T_VALUE[] = {1, 3};
#define CHECK(m, t) check_message(m, t, sizeof(t) / sizeof(t[0]))

typedef struct {
    slice name;
    size_t order;
    uint64_t dtype;
    size_t ndims;
    uint64_t dims[2];
    int many_dims;
} ext;

typedef struct {
    slice *v;
    size_t n, cap;
} names;

static int add(names *s, slice x) {
    if (s->n == s->cap) {
        size_t cap = s->cap ? 2 * s->cap : 16;
        slice *v = realloc(s->v, cap * sizeof(slice));
        if (!v) return -1;
        s->v = v;
        s->cap = cap;
    }
    s->v[s->n++] = x;
    return 0;
}

static int cmp_slice(const void *a, const void *b) {
    const slice *x = a, *y = b;
    size_t k = x->n < y->n ? x->n : y->n;
    int c = k ? memcmp(x->p, y->p, k) : 0;
    return c ? c : (x->n > y->n) - (x->n < y->n);
}

static int has(const names *s, const uint8_t *p, size_t n) {
    slice key = {p, n};
    return s->n && bsearch(&key, s->v, s->n, sizeof(slice), cmp_slice) != NULL;
}

static int has_str(const names *s, const char *z) { return has(s, (const uint8_t *)z, strlen(z)); }

static int cmp_ext(const void *a, const void *b) {
    const ext *x = a, *y = b;
    int c = cmp_slice(&x->name, &y->name);
    return c ? c : (x->order > y->order) - (x->order < y->order);
}

static const char *const OPS[] = {"Add", "Cast", "Div", "Gather", "Gemm", "Identity", "Less", "MatMul", "Max", "Mul",
                                  "Range", "Relu", "Shape", "Softmax", "Squeeze", "Tanh", "Unsqueeze"};

static int known_op(slice op) {
    for (size_t i = 0; i < sizeof(OPS) / sizeof(OPS[0]); i++)
        if (strlen(OPS[i]) == op.n && memcmp(OPS[i], op.p, op.n) == 0) return 1;
    return 0;
}

int dp_check_graph(const char *src, const uint8_t *g, size_t n, const tensor *ts, size_t nts, dp_error *err) {
    names used = {0}, defined = {0}, inputs = {0}, outputs = {0};
    ext *exts = NULL;
    size_t nexts = 0, extcap = 0;
    int rc = -1;
    const char *why = "is not a well-formed ONNX model";
    char detail[160] = "";
    slice model = {g, n}, body = {0};
    pbuf b = {g, n, 0};
    pfield f;
    int r, bodies = 0;
    if (CHECK(model, T_MODEL)) goto done;
    while ((r = next(&b, &f)) == 1) {
        if (f.field == 8 && f.wire == 2 && CHECK(f.sub, T_OPSET)) goto done;
        if (f.field == 7 && f.wire == 2) {
            body = f.sub;
            bodies++;
        }
    }
    if (r < 0) goto done;
    if (bodies != 1) {
        snprintf(detail, sizeof(detail), " (%d graphs in the model, expected 1)", bodies);
        goto done;
    }
    if (CHECK(body, T_GRAPH)) goto done;
    b = (pbuf){body.p, body.n, 0};
    while ((r = next(&b, &f)) == 1) {
        if (f.wire != 2) continue;
        if (f.field == 1) { /* NodeProto */
            if (CHECK(f.sub, T_NODE)) goto done;
            slice op = {(const uint8_t *)"", 0}, domain = {(const uint8_t *)"", 0};
            pbuf nb = {f.sub.p, f.sub.n, 0};
            pfield nf;
            while (next(&nb, &nf) == 1) {
                if (nf.field == 1 && add(&used, nf.sub)) goto oom;
                if (nf.field == 2 && add(&defined, nf.sub)) goto oom;
                if (nf.field == 4) op = nf.sub;
                if (nf.field == 7) domain = nf.sub;
                if (nf.field == 5 && nf.wire == 2 && CHECK(nf.sub, T_ATTR)) goto done;
            }
            int default_domain = domain.n == 0 || (domain.n == 7 && memcmp(domain.p, "ai.onnx", 7) == 0);
            if (!default_domain || !known_op(op)) {
                why = "uses an operator which danpack never writes";
                snprintf(detail, sizeof(detail), " ('%.*s'; it writes only Add, Cast, Div, Gather, Gemm, Identity, Less, "
                         "MatMul, Max, Mul, Range, Relu, Shape, Softmax, Squeeze, Tanh, Unsqueeze)",
                         (int)(op.n > 40 ? 40 : op.n), (const char *)op.p);
                goto done;
            }
        } else if (f.field == 5) { /* TensorProto initializer */
            if (CHECK(f.sub, T_TENSOR)) goto done;
            ext e = {{(const uint8_t *)"", 0}, nexts, 0, 0, {0, 0}, 0};
            uint64_t location = 0;
            pbuf tb = {f.sub.p, f.sub.n, 0};
            pfield tf;
            int tr;
            while ((tr = next(&tb, &tf)) == 1) {
                if (tf.field == 8) e.name = tf.sub;
                else if (tf.field == 2 && tf.wire == 0) e.dtype = tf.value;
                else if (tf.field == 14 && tf.wire == 0) location = tf.value;
                else if (tf.field == 1 && tf.wire == 0) {
                    if (e.ndims < 2) e.dims[e.ndims] = tf.value;
                    else e.many_dims = 1;
                    e.ndims++;
                } else if (tf.field == 1 && tf.wire == 2) {
                    pbuf db = {tf.sub.p, tf.sub.n, 0};
                    while (db.pos < db.n) {
                        uint64_t d;
                        if (varint(&db, &d)) goto done;
                        if (e.ndims < 2) e.dims[e.ndims] = d;
                        else e.many_dims = 1;
                        e.ndims++;
                    }
                }
            }
            if (tr < 0) goto done;
            if (add(&defined, e.name)) goto oom;
            if (location == 1) {
                if (nexts == extcap) {
                    size_t cap = extcap ? 2 * extcap : 8;
                    ext *v = realloc(exts, cap * sizeof(ext));
                    if (!v) goto oom;
                    exts = v;
                    extcap = cap;
                }
                exts[nexts++] = e;
            }
        } else if (f.field == 11 || f.field == 12) { /* ValueInfoProto */
            if (CHECK(f.sub, T_VALUE)) goto done;
            pbuf vb = {f.sub.p, f.sub.n, 0};
            pfield vf;
            while (next(&vb, &vf) == 1) {
                if (vf.field != 1) continue;
                if (add(f.field == 11 ? &inputs : &outputs, vf.sub) || add(&defined, vf.sub)) goto oom;
            }
        }
    }
    if (r < 0) goto done;
    qsort(defined.v, defined.n, sizeof(slice), cmp_slice);
    qsort(inputs.v, inputs.n, sizeof(slice), cmp_slice);
    qsort(outputs.v, outputs.n, sizeof(slice), cmp_slice);
    static const char *const need_in[] = {"ids", "counts"}, *const need_out[] = {"probs", "logits"};
    for (int i = 0; i < 2; i++) {
        if (!has_str(&inputs, need_in[i])) {
            why = "has no input";
            snprintf(detail, sizeof(detail), " '%s'", need_in[i]);
            goto done;
        }
        if (!has_str(&outputs, need_out[i])) {
            why = "has no output";
            snprintf(detail, sizeof(detail), " '%s'", need_out[i]);
            goto done;
        }
    }
    for (size_t i = 0; i < used.n; i++) {
        if (used.v[i].n && !has(&defined, used.v[i].p, used.v[i].n)) {
            why = "uses a name which no input, initializer or node defines";
            snprintf(detail, sizeof(detail), " ('%.*s')", (int)(used.v[i].n > 40 ? 40 : used.v[i].n), (const char *)used.v[i].p);
            goto done;
        }
    }
    /* external initializers: the last of a repeated name counts (as a Python dict) */
    qsort(exts, nexts, sizeof(ext), cmp_ext);
    size_t k = 0;
    for (size_t i = 0; i < nexts; i++) {
        if (i + 1 < nexts && cmp_slice(&exts[i].name, &exts[i + 1].name) == 0) continue;
        exts[k++] = exts[i];
    }
    nexts = k;
    qsort(used.v, used.n, sizeof(slice), cmp_slice);
    for (size_t i = 0; i < nexts; i++) {
        const ext *e = &exts[i];
        const tensor *t = NULL;
        for (size_t j = 0; j < nts && !t; j++)
            if (ts[j].name_len == e->name.n && memcmp(ts[j].name, e->name.p, e->name.n) == 0) t = &ts[j];
        int name_len = (int)(e->name.n > 40 ? 40 : e->name.n);
        if (!t) {
            why = "takes a tensor the bundle does not hold";
            snprintf(detail, sizeof(detail), " ('%.*s')", name_len, (const char *)e->name.p);
            goto done;
        }
        if (!has(&used, e->name.p, e->name.n)) {
            why = "declares a tensor that no node uses";
            snprintf(detail, sizeof(detail), " ('%.*s')", name_len, (const char *)e->name.p);
            goto done;
        }
        int same = e->dtype == (t->int8 ? 3u : 1u) && e->ndims == t->ndim && !e->many_dims;
        for (size_t d = 0; same && d < t->ndim; d++) same = e->dims[d] == (uint64_t)t->shape[d];
        if (!same) {
            why = "declares a tensor with another type or shape than the bundle holds";
            snprintf(detail, sizeof(detail), " ('%.*s')", name_len, (const char *)e->name.p);
            goto done;
        }
    }
    if (nexts != nts) {
        why = "does not use every tensor of the bundle";
        goto done;
    }
    rc = 0;
    goto done;
oom:
    why = "could not be read (out of memory)";
done:
    if (rc) dp_fail(err, "%s: graph %s%s; repack the model with `danpack pack`", src, why, detail);
    free(used.v);
    free(defined.v);
    free(inputs.v);
    free(outputs.v);
    free(exts);
    return rc;
}
