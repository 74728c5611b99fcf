/* cmd_profile.h: the command-profile mechanism shared by every line-based
 * ASCII serial driver (the syringe pump, the sample changer).
 *
 * A profile is data (config/pumps/NAME.yaml, config/changers/NAME.yaml; keys
 * in docs/drivers.md, "Profile format"): the line ends, command templates
 * with {placeholders}, and reply patterns. Each driver describes the keys
 * its profile takes in a cmdp_spec_t; parsing, template expansion, reply
 * matching, profile lookup and the one-command transaction are here, once.
 *
 * Templates: literal text with {name} placeholders the spec allows.
 * Reply patterns: literal text; {field} (a name the spec allows) matches an
 * integer, {text} the rest of the line (last only); a space matches one or
 * more blanks.
 */
#ifndef STOPCOCK_CMD_PROFILE_H
#define STOPCOCK_CMD_PROFILE_H

#include <stdbool.h>
#include <stddef.h>

#include "diag.h"
#include "drv.h"
#include "link.h"
#include "serial.h"
#include "yamltree.h"

#define CMDP_STR    96 /* longest command or pattern, bytes incl. NUL */
#define CMDP_END    8  /* longest line end, bytes incl. NUL */
#define CMDP_FIELDS 4  /* integer fields a reply may carry */

/* One key under `commands:` or `replies:`. The text goes to a char[CMDP_STR]
 * at `offset` in the driver's own profile struct. */
typedef struct cmdp_entry {
	const char *name;
	bool required;
	size_t offset;
	const char *need; /* replies: a field the pattern must contain, or NULL */
} cmdp_entry_t;

typedef struct cmdp_spec {
	const char *what;                /* "pump profile", in messages */
	const cmdp_entry_t *commands;    /* ends with {NULL} */
	const char *const *placeholders; /* allowed in commands, NULL-terminated */
	const cmdp_entry_t *replies;     /* in the order they are tried; ends with {NULL} */
	const char *const *fields;       /* integer fields of replies, NULL-terminated */
	size_t command_end_offset;       /* char[CMDP_END] in the driver's struct */
	size_t reply_end_offset;         /* char[CMDP_END] */
} cmdp_spec_t;

/* A placeholder's value, already formatted. */
typedef struct cmdp_arg {
	const char *name;
	char value[48];
} cmdp_arg_t;

typedef struct cmdp_match {
	long field[CMDP_FIELDS]; /* in the order of spec->fields; 0 when absent */
	char text[CMDP_STR];     /* {text}, "" when absent */
} cmdp_match_t;

/* Parse command_end, reply_end, commands: and replies: of map `root` into
 * the struct at prof (the caller checks the other top-level keys). Returns
 * true, or false with errors as file:line:col in d. */
bool cmdp_parse(const yt_doc_t *doc, const yt_node_t *root, const cmdp_spec_t *spec, void *prof,
                diag_list_t *d);

/* Expand a template. Returns the length, or -1 for a placeholder not in
 * args, an unclosed brace, or an output that does not fit. */
int cmdp_expand(const char *tmpl, const cmdp_arg_t *args, size_t nargs, char *out, size_t cap);

/* Match one pattern against all of s; fields named in `fields`. */
bool cmdp_match(const char *pat, const char *const *fields, const char *s, cmdp_match_t *out);

/* Classify one reply line (terminator removed): bytes outside printable ASCII
 * are dropped, a pattern may match after leading garbage, the earliest match
 * wins and among equals the first pattern. Returns the index of the pattern
 * in pats[0..n) or -1. Pure. */
int cmdp_classify(const char *const *pats, size_t n, const char *const *fields, const char *line,
                  cmdp_match_t *out);

/* Find a profile by the name a station config gives: absolute; or beside the
 * config file, in SUBDIR/ beside it (the repository's config/), in the data
 * folder's SUBDIR/ (datadir.h); never the current folder. A bare name may
 * leave out ".yaml". `data` gets the data folder, for the message. */
bool cmdp_resolve(const char *cfg_file, const char *subdir, const char *name, char *out, size_t cap,
                  char *data, size_t data_cap);

/* Read `profile:` of a station subtree (`where`: "burette"), find the file in
 * `subdir` and parse it with `load`; `kind` ("pump") names it in messages.
 * Returns true, or false with errors in d. */
bool cmdp_profile_key(const yt_doc_t *doc, const yt_node_t *cfg, const char *where,
                      const char *kind, const char *subdir,
                      int (*load)(const char *path, void *prof, diag_list_t *d), void *prof,
                      diag_list_t *d);

/* Is this reply line one the driver understands (ctx: where it keeps it)? */
typedef bool (*cmdp_accept_fn)(void *ctx, const char *line);

/* A driver's line: the transport, its link options, the profile's line ends
 * and the name that starts every message ("pump", "changer"). */
typedef struct cmdp_line {
	serial_t ser;
	link_serial_t link;
	const char *who;
	const char *command_end; /* point into the driver's profile */
	const char *reply_end;
} cmdp_line_t;

/* Send one command (command_end appended) and wait for one reply line the
 * driver accepts; other lines are discarded until link.timeout_ms. No retry. */
drv_status_t cmdp_transact_once(cmdp_line_t *l, const char *cmd, cmdp_accept_fn accept, void *ctx,
                                drv_err_t *err);

/* The driver's own open of a closed line (cmdp_open_with_halt and more). */
typedef drv_status_t (*cmdp_reopen_fn)(void *drv, drv_err_t *err);

/* For commands safe to repeat: reopen a closed line with `reopen`, then
 * cmdp_transact_once, up to 1 + link.retries times after a timeout or a bad
 * reply; a line lost again after the first try ends it. */
drv_status_t cmdp_transact(cmdp_line_t *l, cmdp_reopen_fn reopen, void *drv, const char *cmd,
                           cmdp_accept_fn accept, void *ctx, drv_err_t *err);

/* Open the line; the first command it carries is `halt`, so whatever the
 * device was doing while nobody could reach it stops first. Retried; any
 * reply counts (a device in an error state may refuse the halt with an
 * error and is still stopped); silence or a lost line fails the open and
 * closes the line again, so the next try also starts with the halt. */
drv_status_t cmdp_open_with_halt(cmdp_line_t *l, const char *halt, cmdp_accept_fn accept, void *ctx,
                                 drv_err_t *err);

#endif
