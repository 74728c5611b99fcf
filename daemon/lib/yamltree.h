/* yamltree.h: a small, strict YAML reader on libyaml's event API.
 *
 * Every YAML file Stopcock reads (scenarios, methods, the daemon config,
 * pump profiles) goes through here, so the same rules hold everywhere:
 *   - at most YT_MAX_BYTES bytes and YT_MAX_DEPTH levels of nesting
 *     (libyaml 0.2.5 has no nesting limit and is quadratic in it);
 *   - exactly one document; an empty file is an error;
 *   - no anchors, aliases or tags (alias bombs and cycles cannot happen);
 *   - no duplicate keys in a mapping, keys must be scalars;
 *   - bad UTF-8 is reported at the line and column of the bad byte.
 * Nodes keep 1-based line/column marks for error messages.
 *
 * The typed getters below resolve a scalar only when it is plain (unquoted):
 * "12" in quotes is a string, not a number, as YAML 1.2's core schema says.
 * They report errors into a diag_list as "file:line:col: message" naming the
 * key, the bad value and what is allowed.
 */
#ifndef STOPCOCK_YAMLTREE_H
#define STOPCOCK_YAMLTREE_H

#include <stdbool.h>
#include <stddef.h>

#include "diag.h"

#define YT_MAX_BYTES (256 * 1024)
#define YT_MAX_DEPTH 32

typedef enum { YT_SCALAR, YT_MAP, YT_SEQ } yt_kind_t;

typedef struct yt_node {
	yt_kind_t kind;
	int line; /* 1-based */
	int col;  /* 1-based */
	/* scalar */
	char *str; /* NUL-terminated; YAML allows embedded NUL only via escapes, rejected */
	size_t len;
	bool plain; /* unquoted plain scalar: may be resolved as number/bool/null */
	/* map: keys[i] -> items[i]; seq: items[i] */
	struct yt_node **keys;
	struct yt_node **items;
	size_t n;
} yt_node_t;

typedef struct yt_doc {
	char *file;      /* name used in messages */
	yt_node_t *root; /* NULL when loading failed */
	char *text;      /* the exact bytes read (for sha256, storage) */
	size_t text_len;
	/* Key texts compared by the duplicate-key check while loading: about
	 * one per key, so tests and `make bench` can see it stays linear. */
	size_t key_compares;
} yt_doc_t;

/* Load from a path. Returns 0 on success, -1 with errors added to d.
 * The name in messages is `path`. */
int yt_load_file(const char *path, yt_doc_t *doc, diag_list_t *d);

/* Load from memory; `name` is used in messages. The bytes are copied. */
int yt_load_buffer(const char *name, const char *buf, size_t len, yt_doc_t *doc, diag_list_t *d);

void yt_free(yt_doc_t *doc);

/* ---- navigation ---- */

/* Value node for `key` in a map, or NULL (also NULL when m is not a map). */
const yt_node_t *yt_get(const yt_node_t *m, const char *key);

/* Key node for `key` (for marks), or NULL. */
const yt_node_t *yt_key(const yt_node_t *m, const char *key);

/* Is this a null value (plain "", "~", "null", "Null", "NULL")? */
bool yt_is_null(const yt_node_t *n);

/* ---- schema checks; each adds an error and returns false on failure ---- */

/* Report every key of map `m` not in the NULL-terminated list `allowed`,
 * with "did you mean 'x'?" when one allowed key is within a small edit
 * distance. `where` names the map in the message ("method", "dosing", ...). */
bool yt_check_keys(const yt_doc_t *doc, const yt_node_t *m, const char *const *allowed,
                   const char *where, diag_list_t *d);

/* The node must be a map / sequence; `what` names it ("dosing"). */
bool yt_want_map(const yt_doc_t *doc, const yt_node_t *n, const char *what, diag_list_t *d);
bool yt_want_seq(const yt_doc_t *doc, const yt_node_t *n, const char *what, diag_list_t *d);

/* Required key missing: error at the map's mark, "missing key 'x' in <where>". */
void yt_missing(const yt_doc_t *doc, const yt_node_t *m, const char *key, const char *where,
                diag_list_t *d);

/* Scalar getters. `key` names the value in the message (e.g. "dosing.dose_min_ml").
 * Numbers: plain scalars in decimal or exponent form (no hex, no inf/nan);
 * a value like "25 mL" fails with a message saying the unit is implied by the
 * key. `unit` (may be NULL or "") is shown in messages: "... (in mL)". */
bool yt_double(const yt_doc_t *doc, const yt_node_t *n, const char *key, const char *unit,
               double *out, diag_list_t *d);
/* As yt_double, then lo <= value <= hi (use -INFINITY/INFINITY for open ends). */
bool yt_double_range(const yt_doc_t *doc, const yt_node_t *n, const char *key, const char *unit,
                     double lo, double hi, double *out, diag_list_t *d);
bool yt_long(const yt_doc_t *doc, const yt_node_t *n, const char *key, long lo, long hi, long *out,
             diag_list_t *d);
bool yt_bool(const yt_doc_t *doc, const yt_node_t *n, const char *key, bool *out, diag_list_t *d);
/* A byte string, control characters allowed (a device's line ends, "\r\n"):
 * only for wire protocol data, never for text people read. */
bool yt_bytes(const yt_doc_t *doc, const yt_node_t *n, const char *key, char *out, size_t cap,
              diag_list_t *d);
/* Text: any non-null scalar without control characters (text.h); copies at
 * most cap-1 bytes, longer is an error. */
bool yt_string(const yt_doc_t *doc, const yt_node_t *n, const char *key, char *out, size_t cap,
               diag_list_t *d);
/* One of a NULL-terminated list of words; *out is its index. */
bool yt_enum(const yt_doc_t *doc, const yt_node_t *n, const char *key, const char *const *words,
             int *out, diag_list_t *d);

/* Convenience: error at node n ("file:line:col: <message>"). */
void yt_error(const yt_doc_t *doc, const yt_node_t *n, diag_list_t *d, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));

/* Edit distance, capped (returns cap+1 when larger); used for did-you-mean. */
int yt_edit_distance(const char *a, const char *b, int cap);

/* The single closest word of the NULL-terminated list within a typo's
 * distance (a unit left off counts as one), or NULL (none, or a tie): the
 * "did you mean" of every error message. */
const char *yt_closest(const char *word, const char *const *words);

#endif
