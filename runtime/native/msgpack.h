/* Bounded msgpack reading into a tree of nodes that point into the input bytes (nothing copied). */
#ifndef DP_MSGPACK_H
#define DP_MSGPACK_H

#include "internal.h"

#define DP_MP_MAX_ITEMS ((size_t)1 << 18) /* README rule 8: items in one payload */
#define DP_MP_MAX_CONTAINER ((size_t)1 << 16) /* README rule 8: entries of one map or list */

enum { MP_NIL, MP_BOOL, MP_INT, MP_FLOAT, MP_STR, MP_BIN, MP_ARR, MP_MAP };

typedef struct dp_mp {
    int type;
    int huge; /* an unsigned integer past INT64_MAX (i holds INT64_MAX) */
    int64_t i; /* MP_INT value, MP_BOOL 0/1 */
    double f; /* MP_FLOAT */
    const uint8_t *p; /* MP_STR / MP_BIN bytes */
    size_t len; /* bytes (str, bin) or entries (array; map: pairs) */
    struct dp_mp *items; /* array: len items; map: key, value, key, value ... */
} dp_mp;

typedef struct {
    dp_mp *nodes;
    dp_mp *root;
} dp_mp_doc;

int dp_mp_read(const uint8_t *d, size_t len, size_t max_container, const char *what, dp_mp_doc *doc, dp_error *err);
void dp_mp_free(dp_mp_doc *doc);
const dp_mp *dp_mp_get(const dp_mp *map, const char *key);
int dp_mp_is(const dp_mp *v, const char *s);
int dp_mp_keys_are(const dp_mp *map, const char *const *keys, size_t n);

#endif
