/* The bundle's ONNX graph must be byte for byte the graph runtime/graph.py `write_graph` builds from the manifest and
 * the tensor shapes (the canonical-graph rule, as runtime/bundle.py _check_graph_is_written applies it). This file
 * writes the same bytes in C (protocol-buffers wire format by hand, fields in the same order) and compares; on a
 * difference it names the first differing part as runtime/graph.py `first_difference` does. No other graph rule is
 * needed: the written graph uses only the packer's operators and exactly the bundle's tensors by name, type and shape.
 * The native runtime never runs the graph (it computes gather -> mean -> layers -> softmax from the tensors). */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "bundle_impl.h"

/* ---- writing (runtime/onnx_wire.py put_varint / put_int / put_bytes, runtime/graph.py write_graph) ---- */

enum { T_FLOAT = 1, T_INT8 = 3, T_INT64 = 7 }; /* TensorProto.DataType */
#define IR_VERSION 8
#define OPSET 17

typedef struct {
    uint8_t *p;
    size_t n, cap;
    int oom;
} wbuf;

static void put_raw(wbuf *b, const void *d, size_t n) {
    if (b->oom || !n) return;
    if (n > b->cap - b->n) {
        size_t cap = b->cap ? b->cap : 256;
        while (cap - b->n < n) cap *= 2;
        uint8_t *p = realloc(b->p, cap);
        if (!p) {
            b->oom = 1;
            return;
        }
        b->p = p;
        b->cap = cap;
    }
    memcpy(b->p + b->n, d, n);
    b->n += n;
}

static void put_varint(wbuf *b, uint64_t v) { /* negative int64 values arrive as their two's complement: 10 bytes */
    uint8_t t[10];
    size_t k = 0;
    while (v >= 0x80) {
        t[k++] = (uint8_t)(v | 0x80);
        v >>= 7;
    }
    t[k++] = (uint8_t)v;
    put_raw(b, t, k);
}

static void put_int(wbuf *b, unsigned field, int64_t v) {
    put_varint(b, (uint64_t)field << 3);
    put_varint(b, (uint64_t)v);
}

static void put_bytes(wbuf *b, unsigned field, const void *d, size_t n) {
    put_varint(b, (uint64_t)field << 3 | 2);
    put_varint(b, n);
    put_raw(b, d, n);
}

static void put_str(wbuf *b, unsigned field, const char *s) { put_bytes(b, field, s, strlen(s)); }

/* `sub` as a length-delimited field of `b`; `sub` is emptied for reuse */
static void put_msg(wbuf *b, unsigned field, wbuf *sub) {
    if (sub->oom) b->oom = 1;
    put_bytes(b, field, sub->p, sub->n);
    sub->n = 0;
}

typedef struct {
    wbuf nodes, inits, body, attr;
} writer;

/* One NodeProto from a line "OP OUTPUT INPUT... [@KEY=INT ...]" (words split by single spaces): inputs (1), output
 * (2), name (3) = output, op_type (4), attributes (5: name 1, i 3, type 20 = INT), in runtime/graph.py's order. */
static void node(writer *w, const char *line) {
    const char *word[8];
    size_t len[8], n = 0;
    for (const char *p = line; *p && n < 8; n++) {
        size_t k = strcspn(p, " ");
        word[n] = p;
        len[n] = k;
        p += k + (p[k] == ' ');
    }
    for (size_t i = 2; i < n && word[i][0] != '@'; i++) put_bytes(&w->body, 1, word[i], len[i]);
    put_bytes(&w->body, 2, word[1], len[1]);
    put_bytes(&w->body, 3, word[1], len[1]);
    put_bytes(&w->body, 4, word[0], len[0]);
    for (size_t i = 2; i < n; i++) {
        if (word[i][0] != '@') continue;
        size_t eq = strcspn(word[i], "=");
        put_bytes(&w->attr, 1, word[i] + 1, eq - 1);
        put_int(&w->attr, 3, strtoll(word[i] + eq + 1, NULL, 10));
        put_int(&w->attr, 20, 2);
        put_msg(&w->body, 5, &w->attr);
    }
    put_msg(&w->nodes, 1, &w->body);
}

/* The graph up to the mean, one node a line; "Q" lines only for an int8 table, "F" lines only for a float32 one.
 * Shapes: mask (B, T) from position < count; token weight = mask [* row scale] / max(count, 1) (B, T); the mean
 * as a batched matmul (B, 1, T) @ (B, T, W) -> (B, W). */
static const char MEAN_NODES[] =
    "* Shape width_t ids @start=1 @end=2\n"
    "* Squeeze width_s width_t axis_0\n"
    "* Range positions zero_i width_s one_i\n"
    "* Unsqueeze pos_row positions axis_0\n"
    "* Unsqueeze count_col counts axis_1\n"
    "* Less mask_b pos_row count_col\n"
    "* Cast mask mask_b @to=1\n"
    "Q Gather row_scales scales ids\n"
    "Q Mul scaled_mask mask row_scales\n"
    "* Cast counts_f counts @to=1\n"
    "* Max denom counts_f one_f\n"
    "* Unsqueeze denom_col denom axis_1\n"
    "Q Div token_weight scaled_mask denom_col\n"
    "F Div token_weight mask denom_col\n"
    "* Gather rows table ids\n"
    "Q Cast rows_f rows @to=1\n"
    "* Unsqueeze token_weight3 token_weight axis_1\n"
    "Q MatMul mean3 token_weight3 rows_f\n"
    "F MatMul mean3 token_weight3 rows\n"
    "* Squeeze mean mean3 axis_1\n";

/* TensorProto: dims (1), data_type (2), name (8), then raw_data (9: an int64 or float32 scalar constant, `bits`) or
 * external data (13: location, 14: EXTERNAL) */
static void tensor_proto(writer *w, const char *name, int dtype, size_t ndims, size_t d0, size_t d1, int raw,
                         uint32_t bits) {
    size_t dims[2] = {d0, d1};
    for (size_t i = 0; i < ndims; i++) put_int(&w->body, 1, (int64_t)dims[i]);
    put_int(&w->body, 2, dtype);
    put_str(&w->body, 8, name);
    if (raw) {
        const uint8_t le[8] = {(uint8_t)bits, (uint8_t)(bits >> 8), (uint8_t)(bits >> 16), (uint8_t)(bits >> 24)};
        put_bytes(&w->body, 9, le, dtype == T_FLOAT ? 4 : 8);
    } else {
        put_str(&w->attr, 1, "location");
        put_str(&w->attr, 2, "danpack-bundle");
        put_msg(&w->body, 13, &w->attr);
        put_int(&w->body, 14, 1);
    }
    put_msg(&w->inits, 5, &w->body);
}

/* ValueInfoProto: name (1), type (2: tensor_type 1: elem_type 1, shape 2: dims 1 each dim_value 1 or dim_param 2) */
static void value_info(wbuf *graph, unsigned field, const char *name, int dtype, size_t classes) {
    wbuf dim = {0}, shape = {0}, type = {0}, info = {0};
    put_str(&dim, 2, "batch");
    put_msg(&shape, 1, &dim);
    if (!strcmp(name, "ids")) put_str(&dim, 2, "tokens");
    else if (strcmp(name, "counts") != 0) put_int(&dim, 1, (int64_t)classes);
    if (dim.n || dim.oom) put_msg(&shape, 1, &dim);
    put_int(&type, 1, dtype);
    put_msg(&type, 2, &shape);
    put_msg(&dim, 1, &type); /* TypeProto.tensor_type */
    put_str(&info, 1, name);
    put_msg(&info, 2, &dim);
    put_msg(graph, field, &info);
    free(dim.p);
    free(shape.p);
    free(type.p);
    free(info.p);
}

size_t dp_write_graph(size_t rows, size_t width, int quantized, size_t classes, const size_t *layers, size_t nlayers,
                      uint8_t *out, size_t cap) {
    writer ww = {{0}, {0}, {0}, {0}}, *w = &ww;
    wbuf graph = {0}, model = {0};
    char line[160], name[40], x[40] = "mean", z[40];
    tensor_proto(w, "axis_0", T_INT64, 1, 1, 0, 1, 0);
    tensor_proto(w, "axis_1", T_INT64, 1, 1, 0, 1, 1);
    tensor_proto(w, "one_f", T_FLOAT, 0, 0, 0, 1, 0x3F800000u); /* 1.0f */
    tensor_proto(w, "zero_i", T_INT64, 0, 0, 0, 1, 0);
    tensor_proto(w, "one_i", T_INT64, 0, 0, 0, 1, 1);
    tensor_proto(w, "table", quantized ? T_INT8 : T_FLOAT, 2, rows, width, 0, 0);
    if (quantized) tensor_proto(w, "scales", T_FLOAT, 1, rows, 0, 0, 0);
    for (const char *p = MEAN_NODES; *p; p += strcspn(p, "\n") + 1) {
        size_t k = strcspn(p, "\n");
        if (*p == '*' || *p == (quantized ? 'Q' : 'F')) {
            snprintf(line, sizeof(line), "%.*s", (int)(k - 2), p + 2);
            node(w, line);
        }
    }
    /* the feed-forward stack: per layer {has weight, activation, out, in} */
    for (size_t i = 0; i < nlayers; i++) {
        const size_t *L = layers + 4 * i;
        snprintf(name, sizeof(name), "layer.%zu.bias", i);
        tensor_proto(w, name, T_FLOAT, 1, L[2], 0, 0, 0);
        if (L[0]) {
            snprintf(name, sizeof(name), "layer.%zu.weight", i);
            tensor_proto(w, name, T_FLOAT, 2, L[2], L[3], 0, 0);
            snprintf(line, sizeof(line), "Gemm layer%zu_z %s layer.%zu.weight layer.%zu.bias @transB=1", i, x, i, i);
        } else {
            snprintf(line, sizeof(line), "Add layer%zu_z %s layer.%zu.bias", i, x, i);
        }
        node(w, line);
        snprintf(z, sizeof(z), "layer%zu_z", i);
        if (L[1] == DP_ACT_RELU || L[1] == DP_ACT_TANH) {
            snprintf(line, sizeof(line), "%s layer%zu_a %s", L[1] == DP_ACT_RELU ? "Relu" : "Tanh", i, z);
            node(w, line);
            snprintf(z, sizeof(z), "layer%zu_a", i);
        }
        memcpy(x, z, sizeof(x));
    }
    snprintf(line, sizeof(line), "Identity logits %s", x);
    node(w, line);
    node(w, "Softmax probs logits @axis=-1");

    if (w->nodes.oom || w->inits.oom) graph.oom = 1;
    put_raw(&graph, w->nodes.p, w->nodes.n);
    put_str(&graph, 2, "danpack_dan");
    put_raw(&graph, w->inits.p, w->inits.n);
    value_info(&graph, 11, "ids", T_INT64, classes);
    value_info(&graph, 11, "counts", T_INT64, classes);
    value_info(&graph, 12, "probs", T_FLOAT, classes);
    value_info(&graph, 12, "logits", T_FLOAT, classes);
    put_int(&model, 1, IR_VERSION);
    put_str(&model, 2, "danpack");
    put_msg(&model, 7, &graph);
    put_str(&w->attr, 1, ""); /* OperatorSetIdProto: domain (1), version (2) */
    put_int(&w->attr, 2, OPSET);
    put_msg(&model, 8, &w->attr);
    size_t len = model.oom ? 0 : model.n;
    if (len && out) memcpy(out, model.p, len < cap ? len : cap);
    free(w->nodes.p);
    free(w->inits.p);
    free(w->body.p);
    free(w->attr.p);
    free(graph.p);
    free(model.p);
    return len;
}

/* ---- reading, for the message (runtime/onnx_wire.py _fields) ---- */

typedef struct {
    const uint8_t *p;
    size_t n, pos;
} pbuf;

typedef struct {
    uint64_t field, value;
    int wire;
    const uint8_t *v; /* the value's bytes (for a varint: its encoding) */
    size_t vn;
} pfield;

static int varint(pbuf *b, uint64_t *out) {
    uint64_t v = 0;
    for (int shift = 0; shift < 70; shift += 7) {
        if (b->pos >= b->n) return -1;
        uint8_t c = b->p[b->pos++];
        if (shift < 64) v |= (uint64_t)(c & 0x7F) << shift;
        if (c < 0x80) {
            *out = v;
            return 0;
        }
    }
    return -1; /* longer than 10 bytes */
}

/* 1: a field, 0: end of message, -1: malformed */
static int next(pbuf *b, pfield *f) {
    if (b->pos >= b->n) return 0;
    uint64_t key, len = 0;
    if (varint(b, &key)) return -1;
    f->field = key >> 3;
    f->wire = (int)(key & 7);
    if (f->field == 0) return -1;
    size_t start = b->pos;
    if (f->wire == 0) {
        if (varint(b, &f->value)) return -1;
        len = b->pos - start;
    } else if (f->wire == 1 || f->wire == 5) {
        len = f->wire == 1 ? 8 : 4;
    } else if (f->wire == 2) {
        if (varint(b, &len)) return -1;
        start = b->pos;
    } else {
        return -1;
    }
    if (len > b->n - start) return -1;
    f->v = b->p + start;
    f->vn = (size_t)len;
    b->pos = start + (size_t)len;
    return 1;
}

/* 1 when a message is well-formed protobuf (every field, not the sub-messages) */
static int well_formed(const uint8_t *p, size_t len) {
    pbuf b = {p, len, 0};
    pfield f;
    int r;
    while ((r = next(&b, &f)) == 1) continue;
    return r == 0;
}

static int same_field(const pfield *a, const pfield *b) {
    return a->field == b->field && a->wire == b->wire && a->vn == b->vn && (!a->vn || !memcmp(a->v, b->v, a->vn));
}

static const char *const MODEL_FIELDS[] = {NULL, "ir_version", "producer_name", "producer_version", "domain",
                                           "model_version", "doc_string", "graph", "opset_import"};
static const char *const GRAPH_FIELDS[] = {NULL, "node", "graph name", NULL, NULL, "initializer", NULL, NULL, NULL,
                                           NULL, "doc_string", "input", "output", "value_info",
                                           "quantization_annotation", "sparse_initializer"};

/* a field's name in runtime/graph.py's words (_MODEL_FIELDS / _GRAPH_FIELDS), or "field N" */
static void kind(char *out, size_t cap, int graph, uint64_t f) {
    const char *known = NULL;
    if (graph && f < sizeof(GRAPH_FIELDS) / sizeof(GRAPH_FIELDS[0])) known = GRAPH_FIELDS[f];
    if (!graph && f < sizeof(MODEL_FIELDS) / sizeof(MODEL_FIELDS[0])) known = MODEL_FIELDS[f];
    if (!graph && (f == 14 || f == 20 || f == 25)) known = f == 14 ? "metadata_props" : f == 20 ? "training_info" : "functions";
    if (known) snprintf(out, cap, "%s", known);
    else snprintf(out, cap, "field %llu", (unsigned long long)f);
}

/* printable ASCII as it is, ' and \ escaped, every other byte as \xNN (inert on a terminal); in quotes or not */
static void escape(char *out, size_t cap, const uint8_t *p, size_t n, int quoted) {
    size_t k = 0;
    if (quoted) out[k++] = '\'';
    for (size_t i = 0; i < n && k + 6 < cap; i++) {
        if (p[i] == '\'' || p[i] == '\\') k += (size_t)snprintf(out + k, cap - k, "\\%c", p[i]);
        else if (p[i] >= 0x20 && p[i] < 0x7F) out[k++] = (char)p[i];
        else k += (size_t)snprintf(out + k, cap - k, "\\x%02x", p[i]);
    }
    if (quoted) out[k++] = '\'';
    out[k] = 0;
}

/* one part of a GraphProto in words: its kind, operator and name (runtime/graph.py _describe), or "nothing" */
static void describe(char *out, size_t cap, const pfield *f) {
    char k[40], name[260], op[200] = "";
    if (!f) {
        snprintf(out, cap, "nothing");
        return;
    }
    kind(k, sizeof(k), 1, f->field);
    uint64_t named = f->field == 1 ? 3 : f->field == 5 ? 8 : f->field >= 11 && f->field <= 13 ? 1 : 0;
    if (f->wire != 2 || !named) {
        snprintf(out, cap, "%s", k);
        return;
    }
    if (!well_formed(f->v, f->vn)) {
        snprintf(out, cap, "%s (malformed)", k);
        return;
    }
    escape(name, sizeof(name), (const uint8_t *)"", 0, 1);
    pbuf b = {f->v, f->vn, 0};
    pfield part;
    while (next(&b, &part) == 1) {
        if (part.wire != 2) continue;
        if (part.field == named) escape(name, sizeof(name), part.v, part.vn < 60 ? part.vn : 60, 1);
        else if (f->field == 1 && part.field == 4) escape(op, sizeof(op), part.v, part.vn < 40 ? part.vn : 40, 0);
    }
    snprintf(out, cap, "%s %s%s%s", k, op, *op ? " " : "", name);
}

/* The first differing part of two serialised models in words (runtime/graph.py first_difference), read field by
 * field in step (no list of fields is built, so a crafted graph of many tiny fields costs no memory). */
static void first_difference(char *out, size_t cap, const uint8_t *got_p, size_t got_n, const uint8_t *want_p,
                             size_t want_n) {
    char found[512], wanted[512];
    pbuf gb = {got_p, got_n, 0}, wb = {want_p, want_n, 0};
    pfield g, w;
    int graph = 0;
    if (!well_formed(got_p, got_n)) {
        snprintf(out, cap, "the model is not well-formed protobuf");
        return;
    }
    size_t seen[16] = {0}; /* graph parts written so far, by field number (the writer uses 1, 2, 5, 11, 12) */
    for (size_t i = 0;; i++) {
        int has_g = next(&gb, &g) == 1, has_w = next(&wb, &w) == 1;
        if (!has_g && !has_w) break;
        if (graph && has_w && w.field < 16) seen[w.field]++;
        if (has_g && has_w && same_field(&g, &w)) continue;
        if (graph) { /* inside the two graphs */
            describe(found, sizeof(found), has_g ? &g : NULL);
            describe(wanted, sizeof(wanted), has_w ? &w : NULL);
            if (has_g && has_w && g.field == w.field) {
                char k[40];
                kind(k, sizeof(k), 1, w.field);
                if (!strcmp(found, wanted))
                    snprintf(out, cap, "%s %zu (%s) differs in its inputs, attributes or contents", k, seen[w.field % 16],
                             wanted);
                else
                    snprintf(out, cap, "%s %zu is %s, expected %s", k, seen[w.field % 16], found, wanted);
            } else {
                snprintf(out, cap, "part %zu of the graph is %s, expected %s", i + 1, found, wanted);
            }
            return;
        }
        if (!has_g || !has_w || g.field != 7 || w.field != 7 || g.wire != 2) {
            if (has_g) kind(found, sizeof(found), 0, g.field);
            else snprintf(found, sizeof(found), "nothing");
            if (has_w) kind(wanted, sizeof(wanted), 0, w.field);
            else snprintf(wanted, sizeof(wanted), "nothing");
            snprintf(out, cap, "model field %zu is %s%s, expected %s", i + 1, found,
                     strcmp(found, wanted) ? "" : " with other content", wanted);
            return;
        }
        if (!well_formed(g.v, g.vn)) {
            snprintf(out, cap, "the graph is not well-formed protobuf");
            return;
        }
        gb = (pbuf){g.v, g.vn, 0}; /* the two graphs differ: go into them */
        wb = (pbuf){w.v, w.vn, 0};
        graph = 1;
        i = (size_t)-1;
    }
    snprintf(out, cap, graph ? "the graph differs in its encoding" : "the model differs in its encoding");
}

/* ---- the rule ---- */

int dp_check_graph(const char *src, const uint8_t *g, size_t n, const dp_bundle *b, size_t ntensors, dp_error *err) {
    size_t *layers = malloc(4 * b->nlayers * sizeof(size_t) + 1), expected_tensors = b->q ? 2 : 1;
    if (!layers) return dp_fail(err, "%s: out of memory", src), -1;
    for (size_t i = 0; i < b->nlayers; i++) {
        const dp_layer *L = &b->layers[i];
        size_t *d = layers + 4 * i;
        d[0] = L->weight != NULL;
        d[1] = (size_t)L->act;
        d[2] = L->out;
        d[3] = L->weight ? L->in : 0;
        expected_tensors += L->weight ? 2 : 1;
    }
    size_t cap = 2048 + 256 * b->nlayers, len = 0; /* room for the whole graph: written once */
    uint8_t *want = malloc(cap);
    if (want) len = dp_write_graph(b->rows, b->width, b->q != NULL, b->nlabels, layers, b->nlayers, want, cap);
    if (want && len > cap) { /* not expected: write it again into its size */
        free(want);
        if ((want = malloc(len))) dp_write_graph(b->rows, b->width, b->q != NULL, b->nlabels, layers, b->nlayers, want, len);
    }
    free(layers);
    int rc = 0;
    if (!want || !len) {
        dp_fail(err, "%s: out of memory", src);
        rc = -1;
    } else if (len != n || memcmp(want, g, n) != 0) {
        char why[1200];
        first_difference(why, sizeof(why), g, n, want, len);
        dp_fail(err, "%s: graph is not the one danpack writes for this manifest: %s; repack the model with `danpack pack`",
                src, why);
        rc = -1;
    } else if (ntensors != expected_tensors) { /* the graph takes exactly its tensors: any other is refused */
        dp_fail(err, "%s: graph does not use every tensor of the bundle (%zu held, the graph takes %zu); repack the model "
                     "with `danpack pack`", src, ntensors, expected_tensors);
        rc = -1;
    }
    free(want);
    return rc;
}
