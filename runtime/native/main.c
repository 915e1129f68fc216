/* danpack-run-native BUNDLE [INPUT|-]: the native `danpack-run`. Same input formats (plain lines, JSONL with a text
 * field), output records (JSONL, TSV), error records, exit codes and in = out guarantee as runtime/stream.py:
 * one output record per input line, in input order, always. Output is written whenever the program would wait for
 * input, so an interactive pipe gets each answer at once and a file gets large writes. */
#include <errno.h>
#include <fcntl.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include <sys/stat.h>

#include "stream.h"

#define PROG "danpack-run-native"
#define CHUNK_BYTES 65536
#define EXIT_OK 0
#define EXIT_RECORD_ERRORS 1
#define EXIT_USAGE 2
#define EXIT_SIGPIPE 141
#define EXIT_SIGINT 130
#define EXIT_SIGTERM 143
#ifndef DANPACK_VERSION
#define DANPACK_VERSION "unknown"
#endif

static volatile sig_atomic_t stop_signal = 0;
static void on_stop(int sig) { stop_signal = sig; }

typedef struct {
    int jsonl, lines, tsv, header, classify_empty, skip_empty, lenient, verbose;
    const char *text_field, *id_field, *bundle, *input;
    size_t top_k, max_line_bytes;
    int tokens_mode; /* --tokens: print each text's tokens and ids (for tests) */
    const char *tokenize_spec; /* --tokenize FORM,CASE,PRESET,MAX: tokens without a bundle (for tests) */
} options;

typedef struct {
    options o;
    dp_bundle *b;
    dp_scratch *s;
    dp_tok_spec spec;
    dp_tok_work work;
    dp_stream *st;
    float *probs;
    sbuf out;
    size_t records, errors;
    int out_fd, write_failed;
} runner;

static void say(const char *fmt, const char *a, const char *b) {
    fprintf(stderr, "%s: ", PROG);
    fprintf(stderr, fmt, a, b);
    fputc('\n', stderr);
}

static const char USAGE[] =
    "usage: " PROG " [-h] [--jsonl | --lines] [--text-field NAME] [--id-field NAME] [--format {jsonl,tsv}] [--header]\n"
    "       [--top-k K] [--batch N] [--max-wait-ms MS] [--max-line-bytes N] [--classify-empty | --skip-empty]\n"
    "       [--lenient]"
    " [--verbose] [--version] BUNDLE [INPUT]\n";

static int usage_error(const char *msg, const char *arg) {
    fputs(USAGE, stderr);
    fprintf(stderr, "%s: error: ", PROG);
    fprintf(stderr, msg, arg);
    fputc('\n', stderr);
    return EXIT_USAGE;
}

static int parse_count(const char *text, size_t *out) {
    char *end;
    errno = 0;
    long long v = strtoll(text, &end, 10);
    if (errno || *end || end == text || v < 1) return -1;
    *out = (size_t)v;
    return 0;
}

/* ---- output ---- */

static int flush_out(runner *r) {
    size_t done = 0;
    while (done < r->out.n) {
        ssize_t k = write(r->out_fd, r->out.p + done, r->out.n - done);
        if (k < 0) {
            if (errno == EINTR) continue;
            r->write_failed = errno;
            return -1;
        }
        done += (size_t)k;
    }
    r->out.n = 0;
    return 0;
}

/* ---- records ---- */

static void put_token_json(sbuf *b, const char *tok, size_t len) {
    /* tokens are UTF-8 except lone surrogates (3-byte sequences ED A0..BF xx) from JSON escapes */
    dp_u32buf cps = {0};
    size_t i = 0;
    while (i < len) {
        unsigned char c = (unsigned char)tok[i];
        uint32_t cp;
        size_t k = c < 0x80 ? 1 : c < 0xE0 ? 2 : c < 0xF0 ? 3 : 4;
        if (i + k > len) k = len - i;
        cp = k == 1 ? c : k == 2 ? (c & 0x1Fu) : k == 3 ? (c & 0x0Fu) : (c & 0x07u);
        for (size_t j = 1; j < k; j++) cp = cp << 6 | ((unsigned char)tok[i + j] & 0x3Fu);
        dp_u32_push(&cps, cp);
        i += k;
    }
    sb_json_cps(b, cps.v, cps.n);
    free(cps.v);
}

typedef struct {
    sbuf *b;
    sbuf ids;
    size_t n;
} tok_ctx;

static void on_token(void *ctx, const char *token, size_t len, long id) {
    tok_ctx *t = ctx;
    if (t->n++) sb_put(t->b, ",", 1);
    put_token_json(t->b, token, len);
    char tmp[32];
    snprintf(tmp, sizeof(tmp), "%s%ld", t->ids.n ? "," : "", id);
    sb_str(&t->ids, tmp);
}

/* --tokens: the record of one classifiable text (a dp_text_fn) */
static int tokens_record(void *ctx, sbuf *b, size_t line, const uint32_t *cps, size_t n) {
    runner *r = ctx;
    dp_error err;
    sb_str(b, "{\"line\":");
    char num[32];
    snprintf(num, sizeof(num), "%zu", line);
    sb_str(b, num);
    sb_str(b, ",\"tokens\":[");
    tok_ctx t = {b, {0}, 0};
    int rc;
    if (r->b) {
        rc = dp_tokens_cps(r->b, r->s, cps, n, on_token, &t, &err);
    } else {
        rc = dp_tokenize_cps(&r->spec, cps, n, &r->work);
        char tmp[4];
        for (size_t i = 0; !rc && i < r->work.nspans; i++) {
            sbuf tok = {0};
            for (size_t j = 0; j < r->work.spans[i].len; j++)
                sb_put(&tok, tmp, dp_utf8_put(r->work.norm.v[r->work.spans[i].start + j], tmp));
            on_token(&t, tok.p ? tok.p : "", tok.n, -1);
            free(tok.p);
        }
    }
    sb_str(b, "],\"ids\":[");
    if (t.ids.n) sb_put(b, t.ids.p, t.ids.n);
    sb_str(b, "]}\n");
    free(t.ids.p);
    return rc;
}

/* one input line (without its newline); overlong: the line passed --max-line-bytes and was not kept */
static int record(runner *r, const uint8_t *raw, size_t len, int overlong) {
    size_t line = ++r->records, errors, count;
    int64_t offsets[2] = {0, (int64_t)len};
    uint8_t over = (uint8_t)(overlong != 0);
    dp_error err;
    long long ok = dp_stream_parse(r->st, raw ? (const char *)raw : "", offsets, &over, 1, line, &err);
    if (ok < 0) return -1;
    if (ok == 1) {
        const size_t *ids = dp_stream_record_ids(r->st, 0, &count);
        dp_forward(r->b, r->s, ids, count, r->probs);
    }
    if (dp_stream_format_into(r->st, r->probs, &r->out, &errors)) return -1;
    r->errors += errors;
    return 0;
}

/* Peak resident memory in kB (Linux /proc/self/status VmHWM), 0 when unknown: the --verbose summary shows it. */
static long peak_resident_kb(void) {
    FILE *f = fopen("/proc/self/status", "r");
    char row[256];
    long kb = 0;
    if (!f) return 0;
    while (fgets(row, sizeof(row), f))
        if (!strncmp(row, "VmHWM:", 6)) kb = strtol(row + 6, NULL, 10);
    fclose(f);
    return kb;
}

/* ---- the stream ---- */

static int run_stream(runner *r, int fd) {
    uint8_t *chunk = malloc(CHUNK_BYTES);
    size_t limit = r->o.max_line_bytes, keep = 0;
    size_t cap = limit < 4096 ? limit + 2 : 4096;
    uint8_t *line = malloc(cap);
    int skipping = 0;
    if (!chunk || !line) {
        free(chunk);
        free(line);
        return -1;
    }
    for (;;) {
        if (stop_signal) break;
        if (r->out.n && flush_out(r)) break; /* answer everything before waiting for more input */
        ssize_t got = read(fd, chunk, CHUNK_BYTES);
        if (got < 0) {
            if (errno == EINTR) continue;
            free(chunk);
            free(line);
            return -2;
        }
        if (got == 0) break;
        size_t pos = 0, n = (size_t)got;
        while (pos < n && !stop_signal) {
            uint8_t *nl = memchr(chunk + pos, '\n', n - pos);
            size_t piece = nl ? (size_t)(nl - (chunk + pos)) : n - pos;
            if (!skipping) {
                if (keep + piece > limit + 1) { /* + 1: a CR may still come before the newline */
                    keep = 0;
                    skipping = !nl; /* its remaining bytes are dropped as they arrive */
                    if (record(r, NULL, 0, 1)) goto oom;
                } else {
                    if (keep + piece > cap) {
                        size_t ncap = cap;
                        while (ncap < keep + piece) ncap *= 2;
                        if (ncap > limit + 2) ncap = limit + 2;
                        uint8_t *l = realloc(line, ncap);
                        if (!l) goto oom;
                        line = l;
                        cap = ncap;
                    }
                    memcpy(line + keep, chunk + pos, piece);
                    keep += piece;
                    if (nl) {
                        if (record(r, line, keep, 0)) goto oom;
                        keep = 0;
                    }
                }
            } else if (nl) {
                skipping = 0;
            }
            pos += piece + (nl ? 1 : 0);
            if (r->out.n >= CHUNK_BYTES && flush_out(r)) break;
        }
        if (r->write_failed) break;
    }
    if (!stop_signal && !r->write_failed && keep && !skipping) {
        if (record(r, line, keep, 0)) goto oom;
    }
    free(chunk);
    free(line);
    if (r->out.failed) return -1;
    if (!r->write_failed) flush_out(r);
    return 0;
oom:
    free(chunk);
    free(line);
    return -1;
}

/* runtime/formats.py's rule for a named input without --jsonl / --lines: a known suffix decides (.jsonl, .ndjson,
 * .json: JSONL; .csv, .tsv, .txt: plain lines, a .txt whose first line is a JSON object with a warning), else the
 * first non-blank line (a JSON object: JSONL). Standard input is plain lines. */
static int looks_like_json_object(const uint8_t *line, size_t n) {
    dp_u32buf cps = {0};
    jdoc doc;
    memset(&doc, 0, sizeof(doc));
    if (dp_utf8_decode(line, n, &cps)) return 0;
    size_t a = 0, b = cps.n;
    while (a < b && (dp_props(cps.v[a]) & DP_P_SPACE)) a++;
    while (b > a && (dp_props(cps.v[b - 1]) & DP_P_SPACE)) b--;
    while (a < b && cps.v[a] == 0xFEFF) a++;
    int yes = b - a >= 2 && cps.v[a] == '{' && cps.v[b - 1] == '}' && dp_json_parse(&doc, cps.v + a, b - a) == 0 &&
              doc.nodes[0].type == J_OBJ;
    dp_json_free(&doc);
    free(cps.v);
    return yes;
}

static int input_is_jsonl(const options *o) {
    if (o->jsonl || o->lines || !strcmp(o->input, "-")) return o->jsonl;
    const char *base = strrchr(o->input, '/');
    base = base ? base + 1 : o->input;
    const char *dot = strrchr(base, '.');
    char suffix[16] = "";
    if (dot && dot != base && dot[1] && strlen(dot) < sizeof(suffix))
        for (size_t i = 0; dot[i]; i++) suffix[i] = (char)(dot[i] >= 'A' && dot[i] <= 'Z' ? dot[i] + 32 : dot[i]);
    int json_first = 0;
    struct stat st;
    FILE *f = stat(o->input, &st) == 0 && S_ISREG(st.st_mode) ? fopen(o->input, "rb") : NULL;
    if (f) {
        uint8_t *head = malloc(65536);
        size_t n = head ? fread(head, 1, 65536, f) : 0, i = 0;
        while (head && i < n) { /* bytes.splitlines: \n, \r, \r\n */
            size_t j = i;
            while (j < n && head[j] != '\n' && head[j] != '\r') j++;
            int blank = 1;
            for (size_t k = i; k < j; k++)
                if (!strchr(" \t\x0b\x0c", head[k])) blank = 0;
            if (!blank) {
                json_first = looks_like_json_object(head + i, j - i);
                break;
            }
            i = j + (j + 1 < n && head[j] == '\r' && head[j + 1] == '\n' ? 2 : 1);
        }
        free(head);
        fclose(f);
    }
    if (!strcmp(suffix, ".jsonl") || !strcmp(suffix, ".ndjson") || !strcmp(suffix, ".json")) return 1;
    if (!strcmp(suffix, ".csv") || !strcmp(suffix, ".tsv")) return 0;
    if (!strcmp(suffix, ".txt")) {
        if (json_first)
            fprintf(stderr, "%s: warning: %s: its first line is a JSON object but a %s file is read as plain lines (the "
                            "JSON text itself would be classified); name it .jsonl or choose the JSONL format (pass "
                            "--jsonl or --lines to choose)\n", PROG, o->input, suffix);
        return 0;
    }
    return json_first;
}

static int parse_spec(const char *text, dp_tok_spec *spec) {
    char buf[128];
    snprintf(buf, sizeof(buf), "%s", text);
    char *form = strtok(buf, ","), *kase = strtok(NULL, ","), *preset = strtok(NULL, ","), *max = strtok(NULL, ",");
    if (!form || !kase || !preset || !max) return -1;
    static const char *const forms[] = {"none", "NFC", "NFKC", "NFD", "NFKD"};
    static const char *const cases[] = {"keep", "lower", "casefold"};
    spec->form = spec->kase = -1;
    for (int i = 0; i < 5; i++)
        if (!strcmp(form, forms[i])) spec->form = i;
    for (int i = 0; i < 3; i++)
        if (!strcmp(kase, cases[i])) spec->kase = i;
    spec->preset = dp_preset_id(preset, strlen(preset));
    return spec->form < 0 || spec->kase < 0 || spec->preset < 0 || parse_count(max, &spec->max_tokens) ? -1 : 0;
}

int main(int argc, char **argv) {
    runner r;
    memset(&r, 0, sizeof(r));
    options *o = &r.o;
    o->text_field = NULL;
    o->max_line_bytes = 1u << 20;
    const char *positional[2] = {NULL, NULL};
    size_t npos = 0, ignored;
    const char *format = "jsonl";
    for (int i = 1; i < argc; i++) {
        const char *a = argv[i], *val = NULL;
        char name[64];
        if (a[0] != '-' || !strcmp(a, "-") || a[1] == 0) {
            if (npos == 2) return usage_error("unrecognized arguments: %s", a);
            positional[npos++] = a;
            continue;
        }
        if (!strcmp(a, "--")) {
            for (i++; i < argc; i++) {
                if (npos == 2) return usage_error("unrecognized arguments: %s", argv[i]);
                positional[npos++] = argv[i];
            }
            break;
        }
        const char *eq = strchr(a, '=');
        snprintf(name, sizeof(name), "%.*s", (int)(eq ? (size_t)(eq - a) : strlen(a)), a);
        int takes = !strcmp(name, "--text-field") || !strcmp(name, "--id-field") || !strcmp(name, "--format") ||
                    !strcmp(name, "--top-k") || !strcmp(name, "--batch") || !strcmp(name, "--max-wait-ms") ||
                    !strcmp(name, "--max-line-bytes") || !strcmp(name, "--backend") || !strcmp(name, "--threads") ||
                    !strcmp(name, "--tokenize");
        if (takes) {
            if (eq) val = eq + 1;
            else if (i + 1 < argc) val = argv[++i];
            else return usage_error("argument %s: expected one argument", name);
        } else if (eq) {
            return usage_error("unrecognized arguments: %s", a);
        }
        if (!strcmp(name, "--jsonl")) o->jsonl = 1;
        else if (!strcmp(name, "--lines")) o->lines = 1;
        else if (!strcmp(name, "--header")) o->header = 1;
        else if (!strcmp(name, "--classify-empty")) {
            if (o->skip_empty) return usage_error("%s", "argument --classify-empty: not allowed with argument --skip-empty");
            o->classify_empty = 1;
        } else if (!strcmp(name, "--skip-empty")) {
            if (o->classify_empty) return usage_error("%s", "argument --skip-empty: not allowed with argument --classify-empty");
            o->skip_empty = 1;
        }
        else if (!strcmp(name, "--lenient")) o->lenient = 1;
        else if (!strcmp(name, "--verbose")) o->verbose = 1;
        else if (!strcmp(name, "--tokens")) o->tokens_mode = 1;
        else if (!strcmp(name, "--tokenize")) o->tokenize_spec = val;
        else if (!strcmp(name, "--text-field")) o->text_field = val;
        else if (!strcmp(name, "--id-field")) o->id_field = val;
        else if (!strcmp(name, "--format")) {
            if (strcmp(val, "jsonl") && strcmp(val, "tsv"))
                return usage_error("argument --format: invalid choice: '%s' (choose from 'jsonl', 'tsv')", val);
            format = val;
        } else if (!strcmp(name, "--top-k")) {
            if (parse_count(val, &o->top_k)) return usage_error("argument --top-k: expected an integer >= 1, found '%s'", val);
        } else if (!strcmp(name, "--max-line-bytes")) {
            if (parse_count(val, &o->max_line_bytes))
                return usage_error("argument --max-line-bytes: expected an integer >= 1, found '%s'", val);
        } else if (!strcmp(name, "--batch") || !strcmp(name, "--threads")) {
            if (parse_count(val, &ignored)) return usage_error("expected an integer >= 1, found '%s'", val);
        } else if (!strcmp(name, "--max-wait-ms")) {
            char *end;
            double v = strtod(val, &end);
            if (*end || end == val || !(v >= 0) || v > 1e308) return usage_error("argument --max-wait-ms: expected a finite number >= 0, found '%s'", val);
        } else if (!strcmp(name, "--backend")) {
            if (strcmp(val, "onnxruntime") && strcmp(val, "numpy"))
                return usage_error("argument --backend: invalid choice: '%s' (choose from 'onnxruntime', 'numpy')", val);
        } else if (!strcmp(name, "--version")) {
            printf("%s %s (Unicode %s)\n", PROG, DANPACK_VERSION, dp_unicode_version());
            return EXIT_OK;
        } else if (!strcmp(name, "-h") || !strcmp(name, "--help")) {
            fputs(USAGE, stdout);
            puts("\nClassify texts with a danpack bundle: one answer per input line, in input order (the native "
                 "danpack-run:\nsame records, error records and exit status; --backend and --threads are accepted "
                 "and ignored).");
            return EXIT_OK;
        } else {
            return usage_error("unrecognized arguments: %s", a);
        }
    }
    o->tsv = !strcmp(format, "tsv");
    if (o->jsonl && o->lines) return usage_error("%s", "argument --lines: not allowed with argument --jsonl");
    o->input = positional[o->tokenize_spec ? 0 : 1] ? positional[o->tokenize_spec ? 0 : 1] : "-";
    o->jsonl = input_is_jsonl(o);
    if (o->text_field && !o->jsonl)
        return usage_error("%s", "--text-field names a JSONL field: add --jsonl (or give a .jsonl input)");
    if (!o->text_field) o->text_field = "text";
    if (!o->id_field && o->jsonl && o->tsv) o->id_field = "id";
    if (o->id_field && (!o->jsonl || !o->tsv))
        return usage_error("%s", "an id column exists only for JSONL input shown as TSV (--jsonl --format tsv)");
    if (o->id_field && !strcmp(o->id_field, o->text_field))
        return usage_error("the id field and the text field are both '%s'; name two different fields", o->id_field);
    if (o->header && !o->tsv) return usage_error("%s", "a header line exists only for TSV output (--format tsv)");
    if (o->tokenize_spec) { /* --tokenize SPEC [INPUT]: no bundle */
        if (parse_spec(o->tokenize_spec, &r.spec))
            return usage_error("argument --tokenize: expected FORM,CASE,PRESET,MAX, found '%s'", o->tokenize_spec);
        o->tokens_mode = 1;
        o->input = positional[0] ? positional[0] : "-";
        if (positional[1]) return usage_error("unrecognized arguments: %s", positional[1]);
    } else {
        if (!positional[0]) return usage_error("%s", "the following arguments are required: BUNDLE");
        o->bundle = positional[0];
        o->input = positional[1] ? positional[1] : "-";
    }
    if (fcntl(1, F_GETFD) < 0 || (!strcmp(o->input, "-") && fcntl(0, F_GETFD) < 0)) {
        say("error: standard %s is closed; give the stream an open input and output%s",
            fcntl(1, F_GETFD) < 0 ? "output" : "input", "");
        return EXIT_USAGE;
    }
    int fd = 0;
    if (strcmp(o->input, "-")) {
        fd = open(o->input, O_RDONLY);
        if (fd < 0) {
            say("error: cannot open input %s: %s", o->input, strerror(errno));
            return EXIT_USAGE;
        }
    }
    struct sigaction sa;
    memset(&sa, 0, sizeof(sa));
    sa.sa_handler = on_stop; /* no SA_RESTART: a read waiting for input returns at once */
    sigemptyset(&sa.sa_mask);
    sigaction(SIGINT, &sa, NULL);
    sigaction(SIGTERM, &sa, NULL);
    signal(SIGPIPE, SIG_IGN);
    struct timespec t0, t1;
    clock_gettime(CLOCK_MONOTONIC, &t0);
    int status = EXIT_OK;
    if (o->bundle) {
        dp_error err;
        r.b = dp_load_path(o->bundle, &err);
        if (!r.b) {
            say("error: %s%s", err.message, "");
            status = EXIT_USAGE;
            goto end;
        }
        size_t C = dp_label_count(r.b);
        if (o->top_k && o->top_k > C) {
            char labels[400] = "";
            for (size_t i = 0; i < C; i++) {
                size_t len;
                const char *l = dp_label(r.b, i, &len);
                snprintf(labels + strlen(labels), sizeof(labels) - strlen(labels), "%s%.*s", i ? ", " : "", (int)len, l);
            }
            fprintf(stderr, "%s: error: top-k %zu is more than the bundle's %zu labels (%s)\n", PROG, o->top_k, C, labels);
            status = EXIT_USAGE;
            goto end;
        }
        r.s = dp_scratch_new(r.b);
        r.probs = malloc(C * sizeof(float));
        if (!r.s || !r.probs) {
            say("error: out of memory%s%s", "", "");
            status = EXIT_USAGE;
            goto end;
        }
    }
    dp_stream_options so = {o->jsonl, o->tsv, o->classify_empty, o->skip_empty, o->text_field, o->id_field,
                            o->top_k, o->max_line_bytes};
    dp_error serr;
    r.st = dp_stream_new(r.b, &so, &serr);
    if (!r.st) {
        say("error: %s%s", serr.message, "");
        status = EXIT_USAGE;
        goto end;
    }
    if (o->tokens_mode) dp_stream_on_text(r.st, tokens_record, &r);
    r.out_fd = 1;
    if (o->header) dp_stream_header(r.st, &r.out);
    int rc = run_stream(&r, fd);
    if (r.write_failed == EPIPE) {
        status = EXIT_SIGPIPE;
    } else if (r.write_failed) {
        say("error: cannot write the output: %s%s", strerror(r.write_failed), "");
        status = EXIT_USAGE;
    } else if (rc == -2) {
        say("error: cannot read the input: %s%s", strerror(errno), "");
        status = EXIT_USAGE;
    } else if (rc) {
        say("error: out of memory%s%s", "", "");
        status = EXIT_USAGE;
    } else if (stop_signal) {
        status = stop_signal == SIGTERM ? EXIT_SIGTERM : EXIT_SIGINT;
    } else {
        status = r.errors && !o->lenient ? EXIT_RECORD_ERRORS : EXIT_OK;
    }
    if (o->verbose) {
        clock_gettime(CLOCK_MONOTONIC, &t1);
        double secs = (double)(t1.tv_sec - t0.tv_sec) + (double)(t1.tv_nsec - t0.tv_nsec) / 1e9;
        fprintf(stderr, "%s: %zu records, %zu errors, %.2f s, %.0f lines/s, peak resident %ld kB%s\n", PROG, r.records,
                r.errors, secs, secs > 0 ? (double)r.records / secs : 0.0, peak_resident_kb(),
                stop_signal ? (stop_signal == SIGTERM ? " (terminated)" : " (interrupted)") : "");
    }
end:
    if (fd > 0) close(fd);
    free(r.out.p);
    free(r.probs);
    dp_stream_free(r.st);
    dp_tok_work_free(&r.work);
    dp_scratch_free(r.s);
    dp_free(r.b);
    return status;
}
