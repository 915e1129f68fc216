/* The records of `danpack-run` in C: raw input lines -> parsed records and their ids; probabilities -> output
 * records. One implementation, used by danpack-run-native (main.c) and, through ctypes, by the Python
 * `danpack-run` when the compiled part is there (runtime/fastpath.py NativeStream): the same records, error
 * records and escapes as runtime/stream_records.py, which stays the fallback without the compiled part.
 *
 * A batch goes through two calls: dp_stream_parse (checks, JSON, tokens, ids; error records are written whole
 * then) and dp_stream_format (each classifiable record's label, probabilities and known-token count, from the
 * probabilities the caller computed for those records, in order). */
#ifndef DP_STREAM_H
#define DP_STREAM_H

#include "bundle_impl.h"
#include "json.h"

typedef struct {
    int jsonl; /* each line is a JSON object with a text field (else the line is the text) */
    int tsv; /* output: tab-separated (else JSONL) */
    int classify_empty, skip_empty;
    const char *text_field; /* JSONL: the text's field */
    const char *id_field; /* TSV of JSONL input: the id column's field, or NULL */
    size_t top_k; /* 0: every label (JSONL) / the best one (TSV) */
    size_t max_line_bytes;
} dp_stream_options;

/* Tokens mode of the program (--tokens): called for each classifiable text instead of encoding it; writes the
 * whole output record into `out`. */
typedef int (*dp_text_fn)(void *ctx, sbuf *out, size_t line, const uint32_t *text, size_t n);

typedef struct dp_stream dp_stream;

/* A stream over a loaded bundle (NULL: tokens mode only, with on_text). Option strings are copied. */
dp_stream *dp_stream_new(const dp_bundle *b, const dp_stream_options *o, dp_error *err);
void dp_stream_free(dp_stream *st);
void dp_stream_on_text(dp_stream *st, dp_text_fn fn, void *ctx);

/* n raw lines (line i: data[offsets[i] .. offsets[i + 1]) without its newline; overlong[i] nonzero (or overlong
 * NULL: none): the line passed --max-line-bytes and was dropped), numbered first_line, first_line + 1, ...
 * Returns how many of them are classifiable (their ids wait for dp_stream_format), -1 when out of memory. */
long long dp_stream_parse(dp_stream *st, const char *data, const int64_t *offsets, const uint8_t *overlong, size_t n,
                          size_t first_line, dp_error *err);
/* The parsed batch's ids, one classifiable record after another: the total, and (when the arrays are not NULL)
 * the ids, each record's id count and known-token count. */
size_t dp_stream_ids(const dp_stream *st, int64_t *ids, int64_t *counts, int64_t *known);
/* Output records of the parsed batch, in input order, from probs (classifiable records x labels, row-major);
 * a row with a non-finite probability becomes that record's error record. *out / *len: the bytes (valid until the
 * next call); *errors: error records among them (skipped records are not errors). 0, or -1 when out of memory. */
int dp_stream_format(dp_stream *st, const float *probs, const char **out, size_t *len, size_t *errors,
                     dp_error *err);

/* For the program: the parsed batch's ids as the forward pass takes them, and formatting into its own buffer. */
const size_t *dp_stream_record_ids(const dp_stream *st, size_t k, size_t *count);
int dp_stream_format_into(dp_stream *st, const float *probs, sbuf *out, size_t *errors);
/* The TSV header line for these options (empty for JSONL). */
void dp_stream_header(const dp_stream *st, sbuf *out);

#endif
