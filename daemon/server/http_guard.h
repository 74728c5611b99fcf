/* http_guard.h: what the server checks before any route runs (http_guard.c;
 * docs/api.md, "What the server refuses"). Private to daemon/http*.c.
 *
 * - Deadlines: a connection must deliver each request's headers and body
 *   within http.request_deadline_s of being ready for it (accepted, or its
 *   previous reply done); bytes that trickle in do not extend it. A watcher
 *   thread shuts the socket down at the deadline; libmicrohttpd then closes
 *   it as if the client had.
 * - Per-address limit: past http.max_per_ip connections from one address,
 *   up to HTTP_OVER_LIMIT_EXTRA more are let in only to be answered 503 (and
 *   are cut after HTTP_OVER_LIMIT_GRACE_S); libmicrohttpd drops the rest.
 * - Protocol: Host, framing (Content-Length, Transfer-Encoding), one
 *   Authorization header without NUL, query arguments (count, NUL,
 *   repeats). The methods each known path allows (405 with Allow, also
 *   before authentication) are the route table's (http_routes.h).
 */
#ifndef STOPCOCK_HTTP_GUARD_H
#define STOPCOCK_HTTP_GUARD_H

#include <microhttpd.h>
#include <stdbool.h>

#include "http.h"

#define HTTP_OVER_LIMIT_EXTRA   4   /* connections per address answered 503 */
#define HTTP_OVER_LIMIT_GRACE_S 1.0 /* s an over-limit connection may wait for its request */
#define HTTP_MAX_QUERY_ARGS     32  /* the routes read at most 7 */

typedef struct http_guard http_guard_t;

/* Start the deadline watcher; NULL with a message on failure. */
http_guard_t *http_guard_new(http_ctx_t *ctx, char *err, size_t cap);
/* Stop the watcher and free; call after MHD_stop_daemon. */
void http_guard_free(http_guard_t *g);

/* MHD_OPTION_NOTIFY_CONNECTION callback; cls is the guard. */
void http_guard_notify(void *cls, struct MHD_Connection *c, void **socket_context,
                       enum MHD_ConnectionNotificationCode code);

/* The connection is over its address's limit: answer 503. */
bool http_guard_over_limit(struct MHD_Connection *c);
/* The request is all in (no deadline while its reply is made) / its reply
 * is done (the deadline runs again for the next request). */
void http_guard_request_received(struct MHD_Connection *c);
void http_guard_request_done(struct MHD_Connection *c);

/* Count the query arguments of a raw request target ("/p?a=1&b=2" -> 2).
 * Past HTTP_MAX_QUERY_ARGS the query is cut off in place, so that
 * libmicrohttpd does not parse it (it runs out of its 32 KiB pool near 500
 * arguments and then neither answers nor closes); the request is then
 * answered 414 by http_guard_refuse. */
unsigned http_guard_count_args(char *target);

/* The protocol checks of a request whose headers are in: true when it is
 * refused (r filled; r->close set when the connection must not be reused).
 * method must be the access handler's own pointer (the start of MHD's
 * header block, scanned for NUL bytes); n_args is http_guard_count_args'
 * count. */
bool http_guard_refuse(http_ctx_t *ctx, struct MHD_Connection *c, const char *method,
                       const char *version, unsigned n_args, http_reply_t *r);

#endif
