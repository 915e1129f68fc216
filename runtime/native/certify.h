/* The box certification of runtime/certify.py (`mean_box`, `_slot_hull`, `logit_gaps`, `certify_box`) in C, for the
 * Python fast path (runtime/fastpath.py NativeCertifier). The numpy code is the reference and holds the soundness
 * argument (runtime/certify.py's module doc); this is a faithful port of its arithmetic, slack terms included.
 *
 * The caller owns every array: dp_cert_model points into the arrays of a BoxBound (kept alive by the caller), and
 * each call gets its per-text inputs and a work buffer of dp_certify_work_bytes() bytes. No allocation, no global
 * state: a model may be shared by threads, each passing its own work buffer.
 *
 * What a slot means is not known here: the caller maps each unknown token to a slot (Envelope.slots_of) and hands
 * over the slot table `minima` (lows and negated highs per slot) and the slot a pad reads. */
#ifndef DP_CERTIFY_H
#define DP_CERTIFY_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

enum { DP_CERT_ACT_NONE, DP_CERT_ACT_RELU, DP_CERT_ACT_TANH };
/* what is known about a token without a row of its own (the branches of mean_box) */
enum {
    DP_CERT_ENV_NONE,  /* no envelope (or no rows and not skipped): a text holding one is never covered */
    DP_CERT_ENV_KEEP,  /* no rows but skipped: the float model left every such token out (k = 0) */
    DP_CERT_ENV_ONE,   /* the one envelope lo, hi for every such token */
    DP_CERT_ENV_SLOTS  /* by token: each token's slot in `minima` (when the call passes slots) */
};

typedef struct dp_cert_layer {
    const double *w;         /* (out, in) float64, or NULL for a layer folded into the table */
    const double *w_abs;     /* (out, in) |w|, or NULL */
    const double *bias;      /* (out,) */
    const double *allowance; /* (out,) the float model's float32 rounding of this layer, INFLATE included */
    int64_t act, in, out;    /* DP_CERT_ACT_*; in = 0 when folded */
} dp_cert_layer;

typedef struct dp_cert_model {
    int64_t rows, width;         /* R, W */
    const int8_t *q;             /* (R, W) int8 table, or NULL */
    const float *table;          /* (R, W) float32 table when q is NULL */
    const float *steps;          /* (R,) float32 dequantisation multipliers (1 for a float32 table) */
    const double *row_terms;     /* (R, 2) radius, mass */
    const uint8_t *certifiable;  /* (R,) 0 for the out-of-vocabulary / pruned-rest row */
    int64_t terms;               /* float32 operations of the float model's mean besides the n-term sum */
    int64_t nlayers;
    const dp_cert_layer *layers; /* (nlayers,) */
    const double *contrast;      /* (C, C, H) |W_c - W_k| of the output layer, NULL when it is folded */
    int64_t classes;             /* C */
    int64_t envelope;            /* DP_CERT_ENV_* */
    int64_t skipped;             /* the float model may have left an unknown token out */
    const double *env_lo, *env_hi; /* (W,) the one envelope (DP_CERT_ENV_ONE) */
    int64_t nslots;              /* S */
    const double *minima;        /* (S, 2, W) lows and negated highs per slot (+inf: an empty slot) */
    int64_t pad_slot;            /* the slot a pad (-1) reads in the any-k hull (_slot_hull: the empty slot) */
    double largest;              /* the largest finite |minima| */
} dp_cert_model;

/* Bytes of work buffer one dp_certify call needs for texts of at most T ids and slot tables U wide (0 when they are out
 * of range). */
size_t dp_certify_work_bytes(const dp_cert_model *m, int64_t T, int64_t U);

/* B texts: (B, T) ids, (B,) counts, and either (B, U) slots (-1 pads after each text's slots; DP_CERT_ENV_SLOTS
 * uses them, the other branches count them) or, when slots is NULL, (B,) unknown-token counts; (B,) top classes ->
 * (B,) certified (1/0) and, unless NULL, (B, C) lower bounds on the float model's z_top - z_k and (B,) covered.
 * Returns 0, or -1 with `message` (room for 256 bytes) set when an input is out of range or the work is short. */
int dp_certify(const dp_cert_model *m, const int64_t *ids, int64_t B, int64_t T, const int64_t *counts,
               const int64_t *slots, int64_t U, const int64_t *unknown, const int64_t *top, uint8_t *certified,
               double *low, uint8_t *covered, void *work, size_t work_bytes, char *message);

#ifdef __cplusplus
}
#endif
#endif
