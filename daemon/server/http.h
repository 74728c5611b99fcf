/* http.h: the HTTP API of docs/api.md on libmicrohttpd (routes in docs/api.md).
 *
 * Handlers never touch a device: they read the store and station snapshots
 * and post commands to station threads. Every error is JSON
 * {"error":{"code","message"}} with its status. Writes need
 * "Authorization: Bearer TOKEN" (constant-time compare against every token
 * of the token file); reads too when http.read_needs_token is set.
 */
#ifndef STOPCOCK_HTTP_H
#define STOPCOCK_HTTP_H

#include <jansson.h>
#include <pthread.h>
#include <stdatomic.h>
#include <stdbool.h>
#include <stddef.h>

#include "config.h"
#include "method.h"
#include "station.h"
#include "store.h"

struct series_service;

typedef struct http_ctx {
	const cfg_t *cfg;
	struct series_service *series; /* series.h; NULL until it started */
	store_t *store;
	station_t **stations;
	int n_stations;
	cfg_tokens_t tokens;          /* n == 0: every write gets 401; under tokens_lock */
	pthread_rwlock_t tokens_lock; /* SIGHUP replaces the tokens while requests run */
	double started_mono_s;
	/* counters for /metrics */
	atomic_long requests_2xx, requests_4xx, requests_5xx;
	atomic_long body_too_large, auth_failures;
	atomic_long deadline_cuts, over_limit; /* http_guard.h */
	struct mqtt_pub *mqtt;                 /* the MQTT publisher; NULL without mqtt: */
} http_ctx_t;

typedef struct http_server http_server_t;

/* Listen on cfg's address; NULL with a message on failure. */
http_server_t *http_start(http_ctx_t *ctx, char *err, size_t cap);
/* Replace the write tokens (start-up, SIGHUP); ctx->tokens_lock must be
 * initialised. */
void http_set_tokens(http_ctx_t *ctx, const cfg_tokens_t *t);

/* Stop accepting, finish the requests in flight, free. */
void http_stop(http_server_t *h);

/* ---- for the route handlers (http_*.c) ---- */

typedef struct http_req {
	http_ctx_t *ctx;
	const char *method; /* "GET", ... */
	const char *path;   /* without the query */
	const char *body;   /* NUL-terminated copy, may be NULL */
	size_t body_len;
	void *conn;             /* struct MHD_Connection * */
	const char *token_name; /* who wrote, for the events table (in token_buf) */
	char token_buf[64];
	unsigned roles; /* the token's CFG_ROLE_* bits (0 without a token) */
	/* Set by http_routes_dispatch: the text of the path's {...} segment
	 * (NULL when its pattern has none) and, when the route takes a numeric
	 * id, that id. */
	const char *param;
	long long id;
} http_req_t;

typedef struct http_reply {
	int status;
	char *body; /* malloc'd */
	size_t len;
	const char *content_type;
	char location[96];
	const char *allow; /* 405: the Allow header */
	bool close;        /* answer with "Connection: close" */
} http_reply_t;

/* Fill a reply: JSON (steals j), an error, or text (copied). */
void http_reply_json(http_reply_t *r, int status, json_t *j);
void http_reply_error(http_reply_t *r, int status, const char *code, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));
void http_reply_text(http_reply_t *r, int status, const char *ctype, char *text_malloced,
                     size_t len);

/* Who made a write request, for the audit trail: the token's name. */
const char *http_actor(const http_req_t *q);
/* Add an audit-trail event now, made by the request's token (store_event_add;
 * station and message may be NULL). */
void http_audit(const http_req_t *q, const char *station, int64_t run_id, const char *kind,
                const char *code, const char *fmt, ...) __attribute__((format(printf, 6, 7)));

/* Query argument, or NULL. */
const char *http_query(const http_req_t *q, const char *key);

/* Path id "123" -> 123; false when not a positive decimal integer. */
bool http_parse_id(const char *s, long long *out);

station_t *http_find_station(http_ctx_t *ctx, const char *name);

/* Limits a method must meet on station st (NULL: the strictest of all). */
void http_method_limits(http_ctx_t *ctx, station_t *st, method_limits_t *lim);

/* The routes and their handlers are in http_routes.h. */

/* The bench page's files (http_www.c). True for "/" and "/www/NAME" with a
 * good NAME: the page's own files, open without a token (the token is
 * entered on the page itself). */
bool http_www_is_static(const char *url);
/* [a-z0-9][a-z0-9._-]*, no "..", at most 63 bytes, a known extension. */
bool http_www_name_ok(const char *name);
const char *http_www_content_type(const char *name); /* NULL: not served */
const char *http_www_dir(void);                      /* the folder served, resolved once */

/* Sent with every reply: the page runs no inline script or style, loads
 * nothing from elsewhere and may not be framed. */
#define HTTP_CSP                                                                                   \
	"default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "          \
	"connect-src 'self'; frame-ancestors 'none'; base-uri 'none'; form-action 'self'"
/* The run's curve.svg styles itself inline (svg.c) and runs nothing. */
#define HTTP_CSP_SVG "default-src 'none'; style-src 'unsafe-inline'; frame-ancestors 'none'"

/* /metrics text (http_misc.c). */
char *http_metrics_text(http_ctx_t *ctx, size_t *len);

#endif
