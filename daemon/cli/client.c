/* client.c: what every `stopcock` client command shares (see client.h). */
#include "client.h"
#include "config.h"
#include "text.h"
#include "numparse.h"

#include <limits.h>
#include <ctype.h>
#include <errno.h>
#include <getopt.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

void client_init(client_t *c, const char *cmd)
{
	memset(c, 0, sizeof *c);
	c->cmd = cmd;
	const char *url = getenv("STOPCOCK_URL");
	snprintf(c->url, sizeof c->url, "%s", url && *url ? url : CLIENT_DEFAULT_URL);
	const char *tf = getenv("STOPCOCK_TOKEN_FILE");
	snprintf(c->token_file, sizeof c->token_file, "%s", tf ? tf : "");
	c->timeout_ms = CLIENT_TIMEOUT_MS;
}

static void print_usage(FILE *f, const char *usage)
{
	fprintf(f, "usage: stopcock %s [--url URL] [--token-file F]\n", usage);
}

/* --help: the usage line, then every option with its meaning and unit. */
static void print_help(const char *usage, const client_arg_t *args)
{
	print_usage(stdout, usage);
	printf("\noptions:\n");
	for (int i = 0; args && args[i].name; i++)
		printf("  --%-12s %s\n", args[i].name, args[i].help ? args[i].help : "");
	printf("  --%-12s %s\n", "url",
	       "URL  the daemon (default $STOPCOCK_URL, else "
	       "http://127.0.0.1:8470)");
	printf("  --%-12s %s\n", "token-file",
	       "F  a file of name:token lines; the first token is sent with writes (default "
	       "$STOPCOCK_TOKEN_FILE)");
	printf("  --%-12s %s\n", "help", "this text");
}

int client_parse(client_t *c, int argc, char **argv, const char *usage, const client_arg_t *args,
                 int *pos)
{
	enum { OPT_URL = 1000, OPT_TOKEN_FILE, OPT_HELP, OPT_ARG0 = 2000 };
	struct option opts[CLIENT_MAX_ARGS + 4] = {
	    {"url", required_argument, NULL, OPT_URL},
	    {"token-file", required_argument, NULL, OPT_TOKEN_FILE},
	    {"help", no_argument, NULL, OPT_HELP},
	};
	int n = 3;
	for (int i = 0; args && args[i].name && i < CLIENT_MAX_ARGS; i++, n++)
		opts[n] =
		    (struct option){args[i].name, args[i].value ? required_argument : no_argument,
		                    NULL, OPT_ARG0 + i};
	/* getopt_long is reused by each command; 0 makes glibc start afresh. */
	optind = 0;
	opterr = 0;
	int opt;
	while ((opt = getopt_long(argc, argv, ":", opts, NULL)) != -1) {
		if (opt == OPT_URL) {
			snprintf(c->url, sizeof c->url, "%s", optarg);
		} else if (opt == OPT_TOKEN_FILE) {
			snprintf(c->token_file, sizeof c->token_file, "%s", optarg);
			free(c->token);
			c->token = NULL;
			c->token_loaded = false;
		} else if (opt == OPT_HELP) {
			print_help(usage, args);
			return CLIENT_EXIT_OK;
		} else if (opt >= OPT_ARG0 && opt < OPT_ARG0 + n - 3) {
			const client_arg_t *a = &args[opt - OPT_ARG0];
			if (a->value)
				*a->value = optarg;
			else
				*a->flag = true;
		} else if (opt == ':') {
			return client_usage(c, usage, "%s needs a value", argv[optind - 1]);
		} else {
			return client_usage(c, usage, "unknown option %s", argv[optind - 1]);
		}
	}
	*pos = optind;
	return -1;
}

void client_free(client_t *c)
{
	free(c->token);
	c->token = NULL;
}

int client_exit(client_t *c, int rc)
{
	client_free(c);
	return rc == 0 ? CLIENT_EXIT_OK : c->bad_args ? CLIENT_EXIT_USAGE : CLIENT_EXIT_FAIL;
}

void client_say(const client_t *c, const char *fmt, ...)
{
	va_list ap;
	va_start(ap, fmt);
	fprintf(stderr, "stopcock %s: ", c->cmd);
	vfprintf(stderr, fmt, ap);
	fputc('\n', stderr);
	va_end(ap);
}

int client_usage(const client_t *c, const char *usage, const char *fmt, ...)
{
	if (fmt) {
		va_list ap;
		va_start(ap, fmt);
		fprintf(stderr, "stopcock %s: ", c->cmd);
		vfprintf(stderr, fmt, ap);
		fputc('\n', stderr);
		va_end(ap);
	}
	print_usage(stderr, usage);
	return CLIENT_EXIT_USAGE;
}

char *client_read_token(const char *path, char *err, size_t err_len)
{
	FILE *f = fopen(path, "r");
	if (!f) {
		snprintf(err, err_len, "cannot read the token file %s: %s", path, strerror(errno));
		return NULL;
	}
	char line[1024];
	char *tok = NULL;
	while (!tok && fgets(line, sizeof line, f)) {
		char *s = line;
		while (isspace((unsigned char)*s))
			s++;
		size_t n = strlen(s);
		while (n && isspace((unsigned char)s[n - 1]))
			s[--n] = '\0';
		if (!n || s[0] == '#')
			continue;
		/* "name:token" or "name:role,role:token" (docs/api.md, "Roles") */
		char *colon = strchr(s, ':');
		char *second = colon ? strchr(colon + 1, ':') : NULL;
		if (second && !cfg_is_roles_field(colon + 1, (size_t)(second - colon - 1)))
			second = NULL; /* a ':' inside a token from before roles */
		char *t = second ? second + 1 : colon ? colon + 1 : s;
		while (isspace((unsigned char)*t))
			t++;
		if (*t)
			tok = strdup(t);
	}
	fclose(f);
	if (!tok)
		snprintf(err, err_len, "the token file %s holds no name:token line", path);
	return tok;
}

/* Every string the daemon sends is printed with its control characters
 * escaped (text.h), whatever the daemon let in: what reaches the terminal is
 * text, never a sequence that repaints it or a forged line. */
static void defang(json_t *j)
{
	const char *k;
	json_t *v;
	size_t i;

	if (json_is_object(j)) {
		void *tmp;
		json_object_foreach_safe(j, tmp, k, v)
		{
			if (json_is_string(v)) {
				const char *s = json_string_value(v);
				if (text_control_at(s, json_string_length(v), false) != TEXT_NONE) {
					char *e = text_escaped(s);
					json_object_set_new(j, k, json_string(e ? e : "?"));
					free(e);
				}
			} else {
				defang(v);
			}
		}
	} else if (json_is_array(j)) {
		json_array_foreach(j, i, v)
		{
			if (json_is_string(v)) {
				const char *s = json_string_value(v);
				if (text_control_at(s, json_string_length(v), false) != TEXT_NONE) {
					char *e = text_escaped(s);
					json_array_set_new(j, i, json_string(e ? e : "?"));
					free(e);
				}
			} else {
				defang(v);
			}
		}
	}
}

/* The message of a daemon error body {"error":{"code","message"}}, or of
 * the status alone when the body is something else. */
static void describe_http_error(const client_t *c, const httpc_resp_t *r, bool write)
{
	json_error_t je;
	json_t *j = r->body ? json_loadb(r->body, r->body_len, 0, &je) : NULL;
	defang(j);
	json_t *e = j ? json_object_get(j, "error") : NULL;
	const char *msg = client_str(e, "message", NULL), *code = client_str(e, "code", NULL);
	if (msg)
		client_say(c, "%s (HTTP %d%s%s)", msg, r->status, code ? ", " : "",
		           code ? code : "");
	else
		client_say(c, "stopcockd answered HTTP %d", r->status);
	if (r->status == 401)
		fprintf(stderr, "%s\n",
		        c->token
		            ? "  the token was refused: check the token file against the daemon's"
		        : write ? "  this needs a write token: give --token-file F or set "
		                  "STOPCOCK_TOKEN_FILE"
		                : "  reads need a token on this daemon: give --token-file F");
	json_decref(j);
}

/* The request itself, with messages either printed or returned in err. */
static int call(client_t *c, const char *method, const char *path, const char *body, bool write,
                httpc_resp_t *resp, int *status, bool quiet, char *err, size_t err_len)
{
	char msg[512];
	if (status)
		*status = 0;
	if (write && !c->token_loaded) {
		c->token_loaded = true;
		if (c->token_file[0]) {
			c->token = client_read_token(c->token_file, msg, sizeof msg);
			if (!c->token) {
				c->bad_args = true;
				if (quiet)
					snprintf(err, err_len, "%s", msg);
				else
					client_say(c, "%s", msg);
				return -1;
			}
		}
	}
	httpc_req_t req = {.method = method,
	                   .path = path,
	                   .token = c->token,
	                   .body = body,
	                   .body_len = body ? strlen(body) : 0,
	                   .timeout_ms = c->timeout_ms};
	httpc_err_t e = httpc_request(c->url, &req, resp, msg, sizeof msg);
	if (e != HTTPC_OK) {
		char full[1400];
		switch (e) {
		case HTTPC_E_URL:
			c->bad_args = true;
			snprintf(full, sizeof full, "bad --url: %s", msg);
			break;
		case HTTPC_E_CONNECT:
		case HTTPC_E_RESOLVE:
			snprintf(full, sizeof full,
			         "cannot reach stopcockd at %s: %s — is it running?", c->url, msg);
			break;
		case HTTPC_E_TIMEOUT:
			snprintf(full, sizeof full, "stopcockd at %s did not answer in %.1f s: %s",
			         c->url, c->timeout_ms / 1000.0, msg);
			break;
		default:
			snprintf(full, sizeof full, "talking to stopcockd at %s: %s", c->url, msg);
		}
		if (quiet)
			snprintf(err, err_len, "%s", full);
		else
			client_say(c, "%s", full);
		return -1;
	}
	if (status)
		*status = resp->status;
	if (resp->status / 100 != 2) {
		if (quiet)
			snprintf(err, err_len, "stopcockd answered HTTP %d", resp->status);
		else
			describe_http_error(c, resp, write);
		httpc_resp_free(resp);
		return -1;
	}
	return 0;
}

static int call_json(client_t *c, const char *method, const char *path, json_t *body, bool write,
                     json_t **out, int *status, bool quiet, char *err, size_t err_len)
{
	if (out)
		*out = NULL;
	char *text = body ? json_dumps(body, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
	if (body && !text)
		return -1;
	httpc_resp_t r;
	int rc = call(c, method, path, text, write, &r, status, quiet, err, err_len);
	free(text);
	if (rc)
		return rc;
	if (out) {
		json_error_t je;
		*out = json_loadb(r.body, r.body_len, 0, &je);
		defang(*out);
		if (!*out) {
			if (quiet)
				snprintf(err, err_len, "stopcockd's reply is not JSON: %s",
				         je.text);
			else
				client_say(c, "stopcockd's reply to %s %s is not JSON: %s", method,
				           path, je.text);
			rc = -1;
		}
	}
	httpc_resp_free(&r);
	return rc;
}

int client_json(client_t *c, const char *method, const char *path, json_t *body, bool write,
                json_t **out, int *status)
{
	return call_json(c, method, path, body, write, out, status, false, NULL, 0);
}

int client_json_quiet(client_t *c, const char *method, const char *path, json_t **out, int *status,
                      char *err, size_t err_len)
{
	return call_json(c, method, path, NULL, false, out, status, true, err, err_len);
}

int client_parse_bare(client_t *c, int argc, char **argv, const char *usage)
{
	int pos, early = client_parse(c, argc, argv, usage, NULL, &pos);
	if (early >= 0)
		return early;
	if (pos < argc)
		return client_usage(c, usage, "unexpected argument '%s'", argv[pos]);
	return -1;
}

json_t *client_get_list(client_t *c, const char *path, const char *key, const char *what,
                        json_t **doc, int *rc)
{
	*doc = NULL;
	*rc = client_json(c, "GET", path, NULL, false, doc, NULL);
	if (*rc)
		return NULL;
	json_t *list = json_is_array(*doc) ? *doc : json_object_get(*doc, key);
	if (!json_is_array(list)) {
		client_say(c, "stopcockd's %s list is not a list", what);
		*rc = -1;
		return NULL;
	}
	return list;
}

int client_raw(client_t *c, const char *method, const char *path, httpc_resp_t *resp, int *status)
{
	return call(c, method, path, NULL, false, resp, status, false, NULL, 0);
}

void client_escape_segment(const char *s, char *out, size_t out_len)
{
	size_t j = 0;
	for (; *s && j + 4 < out_len; s++) {
		unsigned char ch = (unsigned char)*s;
		if (isalnum(ch) || ch == '-' || ch == '_' || ch == '.' || ch == '~')
			out[j++] = (char)ch;
		else
			j += (size_t)snprintf(out + j, out_len - j, "%%%02X", ch);
	}
	if (out_len)
		out[j < out_len ? j : out_len - 1] = '\0';
}

void client_sleep_ms(int ms)
{
	struct timespec ts = {ms / 1000, (long)(ms % 1000) * 1000000L};
	while (nanosleep(&ts, &ts) != 0)
		;
}

bool client_parse_id(const char *s, long long *id)
{
	/* Digits only: an id is never written with a sign. */
	return s && isdigit((unsigned char)*s) && parse_whole(s, 1, LLONG_MAX, id);
}

const char *client_str(const json_t *o, const char *key, const char *dflt)
{
	const char *s = json_string_value(json_object_get(o, key));
	return s ? s : dflt;
}

double client_num(const json_t *o, const char *key)
{
	json_t *v = json_object_get(o, key);
	return json_is_number(v) ? json_number_value(v) : NAN;
}

const char *client_fmt(char *buf, size_t len, double v, int decimals)
{
	if (isfinite(v) && decimals < 0) {
		snprintf(buf, len, "%.10g", v);
	} else if (isfinite(v)) {
		/* No "-0.0" for a value that rounds to zero. */
		if (fabs(v) < 0.5 * pow(10.0, -decimals))
			v = 0.0;
		snprintf(buf, len, "%.*f", decimals, v);
	} else
		snprintf(buf, len, "-");
	return buf;
}
