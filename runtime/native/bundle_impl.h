/* The bundle as the native runtime holds it after verification (shared by bundle.c, graph.c, forward.c). */
#ifndef DP_BUNDLE_IMPL_H
#define DP_BUNDLE_IMPL_H

#include "internal.h"

enum { DP_OOV_SKIP, DP_OOV_UNK, DP_OOV_REST };
enum { DP_ACT_NONE, DP_ACT_RELU, DP_ACT_TANH };

typedef struct {
    int act;
    size_t in, out;
    float *weight; /* (out, in) row-major, NULL for a layer folded into the table */
    float *bias; /* (out,) */
} dp_layer;

/* A tensor of the payload as declared there (bytes point into the bundle's data). */
typedef struct {
    const uint8_t *name;
    size_t name_len;
    int int8;
    size_t ndim, shape[2];
    const uint8_t *data;
    size_t bytes;
} tensor;

struct dp_bundle {
    uint8_t *data; /* the file's bytes (the int8 table points into them) */
    size_t size;
    char sha_hex[65];
    dp_tok_spec tok;
    int oov;
    long oov_row; /* -1 for 'skip' */
    size_t rows, width, maxwidth;
    const int8_t *q; /* (rows, width) int8 table, or NULL */
    float *scales; /* (rows,) for the int8 table */
    float *table; /* (rows, width) float32 table, or NULL */
    dp_layer *layers;
    size_t nlayers;
    char *vocab_text; /* tokens joined by newlines (inflated) */
    size_t vocab_len, ntokens;
    size_t *tok_off, *tok_len;
    uint32_t *slots; /* open addressing: row + 1, 0 empty */
    size_t nslots;
    char *label_text;
    size_t *label_off, *label_len, nlabels;
};

struct dp_scratch {
    dp_tok_work tok;
    size_t *ids;
    size_t idcap;
    double *acc;
    float *x, *y;
};

void dp_fail_append(dp_error *err, const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 2, 3)))
#endif
    ;
long dp_vocab_find(const dp_bundle *b, const uint8_t *tok, size_t len);
/* The canonical-graph rule: the bundle's graph `g` is byte for byte the one dp_write_graph builds for the checked
 * manifest (b), and the payload holds no tensor besides the graph's (ntensors, after duplicate names). */
int dp_check_graph(const char *src, const uint8_t *g, size_t n, const dp_bundle *b, size_t ntensors, dp_error *err);
/* runtime/graph.py write_graph in C: the serialised ModelProto for a table of rows x width (int8 with scales when
 * quantized), nlayers layers given as 4 numbers each {has weight, DP_ACT_*, out, in (0 without weight)} and classes
 * labels. Copies at most cap bytes to out (may be NULL) and returns the graph's length; 0 when out of memory. */
size_t dp_write_graph(size_t rows, size_t width, int quantized, size_t classes, const size_t *layers, size_t nlayers,
                      uint8_t *out, size_t cap);
/* tokens of code points -> ids in s->ids (count of them), known: tokens with a row of their own (may be NULL) */
int dp_encode_cps(const dp_bundle *b, dp_scratch *s, const uint32_t *cps, size_t n, size_t *count, size_t *known,
                  dp_token_fn emit, void *ctx, dp_error *err);
/* ids -> probabilities (dp_label_count of them) through gather, mean, layers and softmax */
void dp_forward(const dp_bundle *b, dp_scratch *s, const size_t *ids, size_t n, float *probs);

#endif
