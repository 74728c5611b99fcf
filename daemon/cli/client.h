/* client.h: what every `stopcock` client command shares.
 *
 * The daemon's URL and write token (from --url / --token-file, else
 * $STOPCOCK_URL / $STOPCOCK_TOKEN_FILE, else http://127.0.0.1:8470 and no
 * token), one call that sends a request and hands back parsed JSON or a
 * plain message, and small printing helpers. Messages go to stderr as
 * "stopcock CMD: ..."; the caller returns the exit status.
 */
#ifndef STOPCOCK_CLIENT_H
#define STOPCOCK_CLIENT_H

#include <jansson.h>
#include <stdbool.h>
#include <stddef.h>

#include "httpc.h"

#define CLIENT_DEFAULT_URL "http://127.0.0.1:8470"
#define CLIENT_TIMEOUT_MS  10000 /* one request, connect to last byte */

/* Exit statuses of every client command. */
/* Exit statuses (docs/cli.md, "Exit status"): OK only for a finished run whose
 * results all pass or carry no limits; OUT_OF_LIMITS for a finished run with a
 * result outside its limits; FAIL for everything else that went wrong. */
enum {
	CLIENT_EXIT_OK = 0,
	CLIENT_EXIT_FAIL = 1,
	CLIENT_EXIT_USAGE = 2,
	CLIENT_EXIT_OUT_OF_LIMITS = 3
};

typedef struct client {
	const char *cmd; /* "start", "show", ... for messages */
	char url[512];
	char token_file[512]; /* "" when none */
	char *token;          /* loaded on the first write; NULL when none */
	bool token_loaded;
	int timeout_ms;
	bool bad_args; /* a request failed because of --url or --token-file: exit 2 */
} client_t;

/* One option of a command beyond --url, --token-file and --help: with a
 * value (`value` set: it receives optarg) or a flag (`flag` set to true). */
typedef struct client_arg {
	const char *name; /* without the leading "--" */
	const char **value;
	bool *flag;
	const char *help; /* "VALUE  meaning, with its unit" for --help */
} client_arg_t;

#define CLIENT_MAX_ARGS 8

/* Defaults from the environment. */
void client_init(client_t *c, const char *cmd);
/* Parse the command's options (`args`, ended by {NULL}) and the common
 * ones; `*pos` is then the index of the first positional argument and the
 * result is -1. Otherwise returns the exit status at once: 0 after --help
 * (usage on stdout), 2 after a usage error (message and usage on stderr). */
int client_parse(client_t *c, int argc, char **argv, const char *usage, const client_arg_t *args,
                 int *pos);
void client_free(client_t *c);
/* Free and give the exit status for rc (0 or -1 from the calls below):
 * 0, 2 when --url or --token-file was at fault, else 1. */
int client_exit(client_t *c, int rc);

/* Print "stopcock CMD: message" to stderr. */
void client_say(const client_t *c, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
/* A usage error: prints the message and "usage: stopcock USAGE"; returns 2. */
int client_usage(const client_t *c, const char *usage, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));

/* Read the token from a file of "name:token" or "name:role,role:token"
 * lines: the first line that is not blank or a '#' comment; the part after
 * the roles field, else after the first ':' (the whole line when there is
 * none). Returns a malloc'd token, or NULL with err set. */
char *client_read_token(const char *path, char *err, size_t err_len);

/* One request. `body` (may be NULL) is sent as JSON; `write` adds the token.
 * On a 2xx reply returns 0 and, when `out` is not NULL, sets *out to the
 * parsed JSON (new reference). On any failure (daemon unreachable, HTTP
 * error, a reply that is not JSON) prints a plain message and returns -1;
 * *status (may be NULL) is the HTTP status or 0 when there was none. */
int client_json(client_t *c, const char *method, const char *path, json_t *body, bool write,
                json_t **out, int *status);

/* A command that takes only the common options: client_parse, then a
 * usage error for any positional argument. Returns -1 to go on, else the
 * exit status, as client_parse does. */
int client_parse_bare(client_t *c, int argc, char **argv, const char *usage);

/* GET a list: the array under `key` of the reply, or the reply itself when
 * it is a bare array. Returns it (borrowed from *doc, which the caller
 * frees), or NULL with *rc -1 after saying what went wrong ("stopcockd's
 * WHAT list is not a list"). */
json_t *client_get_list(client_t *c, const char *path, const char *key, const char *what,
                        json_t **doc, int *rc);

/* The same for a non-JSON reply (CSV, SVG): *resp holds the body on 0. */
int client_raw(client_t *c, const char *method, const char *path, httpc_resp_t *resp, int *status);

/* Like client_json but quiet: no message printed; err gets it instead. */
int client_json_quiet(client_t *c, const char *method, const char *path, json_t **out, int *status,
                      char *err, size_t err_len);

/* Percent-encode a path segment (station names) into out. */
void client_escape_segment(const char *s, char *out, size_t out_len);

void client_sleep_ms(int ms);

/* Parse a run id: a positive integer. */
bool client_parse_id(const char *s, long long *id);

/* Accessors that tolerate missing keys and nulls. */
const char *client_str(const json_t *o, const char *key, const char *dflt);
/* NAN when missing, null or not a number. */
double client_num(const json_t *o, const char *key);
/* A number as "%.*f" (decimals < 0: as short as it is exact, "%.10g"), or
 * "-" when NAN. */
const char *client_fmt(char *buf, size_t len, double v, int decimals);

#endif
