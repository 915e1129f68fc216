/* danpack native runtime: read a danpack bundle (format version 1) and classify texts, in portable C99.
 *
 * No global state: a dp_bundle is read-only after dp_load_* and may be shared by threads; each thread passes
 * its own dp_scratch (or NULL, which allocates one for the call). Every length is explicit; texts are UTF-8
 * (invalid bytes decode to U+FFFD, as Python's errors="replace" does). Every failure fills a dp_error.
 */
#ifndef DANPACK_H
#define DANPACK_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

#define DP_FORMAT_VERSION 1
#define DP_ERROR_BYTES 512

typedef struct dp_error {
    char message[DP_ERROR_BYTES]; /* what is wrong, naming the file or field and the fix */
} dp_error;

typedef struct dp_bundle dp_bundle;
typedef struct dp_scratch dp_scratch;

/* Read and verify bundle bytes (copied; `source` names the file in messages). NULL on failure. */
dp_bundle *dp_load_bytes(const uint8_t *data, size_t len, const char *source, dp_error *err);
/* Read and verify a bundle file (a regular file of at most 4 GiB). NULL on failure. */
dp_bundle *dp_load_path(const char *path, dp_error *err);
void dp_free(dp_bundle *bundle);

size_t dp_label_count(const dp_bundle *bundle);
/* Label i as UTF-8 bytes (not NUL-terminated when the label holds none; *len set). */
const char *dp_label(const dp_bundle *bundle, size_t i, size_t *len);
/* The payload's sha256 in hex (65 bytes with the NUL). */
const char *dp_sha256(const dp_bundle *bundle);

dp_scratch *dp_scratch_new(const dp_bundle *bundle);
void dp_scratch_free(dp_scratch *scratch);

/* One text -> dp_label_count() probabilities. 0 on success, -1 on failure (out of memory). */
int dp_classify(const dp_bundle *bundle, dp_scratch *scratch, const char *text, size_t len, float *probs,
                dp_error *err);
/* n texts -> n x dp_label_count() probabilities, row-major. */
int dp_classify_batch(const dp_bundle *bundle, dp_scratch *scratch, const char *const *texts, const size_t *lens,
                      size_t n, float *probs, dp_error *err);

/* n texts, text i being the UTF-8 bytes data[offsets[i] .. offsets[i + 1]), -> their row ids (after the unknown-word
 * policy) one text after another into ids (room for cap), each text's id count into counts, (unless NULL) into
 * known how many of its tokens have a row of their own and (unless NULL) into tokens how many tokens it has. Returns the number of ids of all texts: when it exceeds cap,
 * only cap were written (call again with that much room); -1 on failure. */
long long dp_encode_flat(const dp_bundle *bundle, dp_scratch *scratch, const char *data, const int64_t *offsets,
                         size_t n, int64_t *ids, size_t cap, int64_t *counts, int64_t *known, int64_t *tokens,
                         dp_error *err);

/* As dp_encode_flat, and for the certification (runtime/certify.py encode_unknown): into unknown each text's count of
 * tokens without a row of their own (left out by 'skip'; on the out-of-vocabulary row, the unknown-word token
 * included, by 'unk' and 'rest'), into hashes (room for hash_cap) the FNV-1a 32-bit hash of each such token's UTF-8
 * bytes, text after text in token order, and into *hash_total how many there are (when it exceeds hash_cap, call
 * again with that much room). */
long long dp_encode_unknown_flat(const dp_bundle *bundle, dp_scratch *scratch, const char *data, const int64_t *offsets,
                                 size_t n, int64_t *ids, size_t cap, int64_t *counts, int64_t *unknown,
                                 uint32_t *hashes, size_t hash_cap, int64_t *hash_total, dp_error *err);

/* n texts as for dp_encode_flat -> n x dp_label_count() probabilities and (unless NULL) logits, row-major. */
int dp_classify_flat(const dp_bundle *bundle, dp_scratch *scratch, const char *data, const int64_t *offsets, size_t n,
                     float *probs, float *logits, dp_error *err);

/* One text -> probabilities and the number of its tokens with a row of their own (danpack-run's known_tokens). */
int dp_classify_known(const dp_bundle *bundle, dp_scratch *scratch, const char *text, size_t len, float *probs,
                      size_t *known, dp_error *err);

/* Tokens and ids of one text, for tests and tools: calls `emit` per token (UTF-8 bytes, row id or -1 when the
 * token is unknown and left out by the 'skip' policy). */
typedef void (*dp_token_fn)(void *ctx, const char *token, size_t len, long id);
int dp_tokens(const dp_bundle *bundle, dp_scratch *scratch, const char *text, size_t len, dp_token_fn emit,
              void *ctx, dp_error *err);

#ifdef __cplusplus
}
#endif
#endif
