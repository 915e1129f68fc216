/* JSON for danpack-run-native: one JSONL record parsed as Python's json module (strict, with the rules of
 * runtime/stream_records.py), and values written back as json.dumps(ensure_ascii=False, separators=(",", ":")). */
#ifndef DP_JSON_H
#define DP_JSON_H

#include "internal.h"

enum { J_NULL, J_FALSE, J_TRUE, J_INT, J_FLOAT, J_STR, J_ARR, J_OBJ };

typedef struct {
    int type;
    size_t off, len; /* J_STR: code points in doc->cps; J_INT: digits in doc->text */
    double f;
    size_t first, next; /* first child and next sibling (node index + 1, 0: none); objects: key, value, ... */
    size_t count; /* children */
} jnode;

typedef struct {
    jnode *nodes;
    size_t n, cap;
    dp_u32buf cps; /* string contents */
    const uint32_t *text; /* the line as code points */
    size_t tlen;
    char error[160]; /* Python's message, e.g. "invalid JSON: Expecting value (column 1)" */
} jdoc;

/* Parse code points; 0 on success (root is node 0), -1 with doc->error set, -2 when out of memory. */
int dp_json_parse(jdoc *doc, const uint32_t *text, size_t n);
void dp_json_free(jdoc *doc);

typedef struct {
    char *p;
    size_t n, cap;
    int failed; /* out of memory */
    int keep_unsafe; /* JSON strings as json.dumps alone writes them (no \uXXXX for what escape_text escapes) */
} sbuf;
void sb_put(sbuf *b, const char *s, size_t n);
void sb_str(sbuf *b, const char *z);
/* a JSON string of code points (lone surrogates as \udXXX, as Python's backslashreplace writes them) */
void sb_json_cps(sbuf *b, const uint32_t *s, size_t n);
void sb_json_utf8(sbuf *b, const char *s, size_t n);
/* one character runtime/safe_text.py escapes (DP_P_UNSAFE, or a control character) as \uXXXX (astral: a pair) */
void sb_json_unsafe(sbuf *b, uint32_t c);
/* an object member: key and value node indices */
typedef struct {
    size_t key, value;
} jmember;
/* The object's members as the dict Python builds from them: each distinct key once, where it first appeared, with
 * the value it last had; *out malloc'd (the caller frees it), *n members. -1 when out of memory. */
int dp_json_members(const jdoc *doc, size_t object, jmember **out, size_t *n);
/* a value as json.dumps writes it (objects with repeated keys as the dict Python builds) */
void sb_json_value(sbuf *b, const jdoc *doc, size_t node);
/* float32 as numpy's str() writes it (shortest digits that read back as the same float32) */
void sb_f32(sbuf *b, float v);
/* the same through snprintf + strtof only (the reference sb_f32's tests compare against) */
void sb_f32_slow(sbuf *b, float v);
const jnode *dp_json_node(const jdoc *doc, size_t index); /* index + 1 as stored in first/next */
int dp_cps_eq_utf8(const uint32_t *s, size_t n, const char *z, size_t zn);

#endif
