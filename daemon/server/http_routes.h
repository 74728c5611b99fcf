/* http_routes.h: the one table of HTTP routes (http_routes.c) and the
 * handlers it names. Private to daemon/server/http*.c.
 *
 * A route is a method, a path pattern in docs/openapi.yaml's spelling
 * ("/v1/runs/{id}/points"; "{...}" is any one segment), a handler and the
 * authorization it needs. The table alone decides which paths exist, which
 * methods each allows (405 with Allow, before the body and the token), who
 * may call it, and which handler answers. To add a route: write the handler
 * in an http_*.c file, declare it below, add its row to the table.
 */
#ifndef STOPCOCK_HTTP_ROUTES_H
#define STOPCOCK_HTTP_ROUTES_H

#include <stdbool.h>
#include <stddef.h>

#include "http.h"

typedef enum http_auth {
	HTTP_OPEN,   /* no token, even with http.read_needs_token (probes, the page's files) */
	HTTP_READ,   /* a token with `read` only when http.read_needs_token is set */
	HTTP_WRITE,  /* a token with `operate` always (runs, halt, resume, calibrations) */
	HTTP_REVIEW, /* a token with `review` always */
	HTTP_ADMIN,  /* a token with `admin` always (methods) */
	HTTP_CURATE, /* a token with `operate` or `admin` always (a titer by hand) */
} http_auth_t;

/* The roles (CFG_ROLE_* bits) of which a token needs one for a route of
 * this authorization; 0 for HTTP_OPEN. */
unsigned http_auth_roles(http_auth_t a);

/* The methods of the routes on path, as for an Allow header ("GET, HEAD,
 * POST"; GET brings HEAD), into buf; NULL when no route has this path. */
const char *http_routes_allow(const char *path, char *buf, size_t cap);

/* A route has this method ("HEAD" counts as "GET") and path. */
bool http_routes_known(const char *method, const char *path);

/* The authorization method ("HEAD" counts as "GET") on path needs: its
 * route's, or for a path no route has, HTTP_READ for GET and HEAD and
 * HTTP_WRITE for any other method (the 404 comes after the token). */
http_auth_t http_routes_auth(const char *method, const char *path);

/* Answer q (its method already "GET" for a HEAD) with its route's handler:
 * 400 when the route takes a numeric id and the path's is not one, 404 when
 * no route has this method and path. */
void http_routes_dispatch(const http_req_t *q, http_reply_t *r);

/* ---- the handlers; q->param and q->id are the path's {...} segment ---- */

/* http_www.c */
void http_get_index(const http_req_t *q, http_reply_t *r);
void http_get_www_file(const http_req_t *q, http_reply_t *r);
void http_get_runs(const http_req_t *q, http_reply_t *r);
void http_post_method_check(const http_req_t *q, http_reply_t *r);

/* http_misc.c */
void http_get_metrics(const http_req_t *q, http_reply_t *r);
void http_get_health(const http_req_t *q, http_reply_t *r);
void http_get_stations(const http_req_t *q, http_reply_t *r);
/* One station as GET /v1/stations lists it (also the MQTT station topic). */
struct series_service;
json_t *http_station_json(struct series_service *sv, station_t *st);
void http_post_halt(const http_req_t *q, http_reply_t *r);
void http_post_resume(const http_req_t *q, http_reply_t *r);
void http_get_methods(const http_req_t *q, http_reply_t *r);
void http_get_method(const http_req_t *q, http_reply_t *r);
void http_put_method(const http_req_t *q, http_reply_t *r);

/* http_runs.c */
void http_post_run(const http_req_t *q, http_reply_t *r);
void http_get_run(const http_req_t *q, http_reply_t *r);
void http_get_points(const http_req_t *q, http_reply_t *r);
void http_get_curve(const http_req_t *q, http_reply_t *r);
void http_post_abort(const http_req_t *q, http_reply_t *r);
void http_get_results(const http_req_t *q, http_reply_t *r);
void http_get_events(const http_req_t *q, http_reply_t *r);
void http_get_titrants(const http_req_t *q, http_reply_t *r);

/* http_calib.c */
void http_post_calibration(const http_req_t *q, http_reply_t *r);
void http_get_calibration_latest(const http_req_t *q, http_reply_t *r);
void http_get_calibration(const http_req_t *q, http_reply_t *r);
void http_post_calibration_next(const http_req_t *q, http_reply_t *r);

/* http_records.c */
void http_get_whoami(const http_req_t *q, http_reply_t *r);
void http_get_events_verify(const http_req_t *q, http_reply_t *r);
void http_post_review(const http_req_t *q, http_reply_t *r);
void http_post_correct(const http_req_t *q, http_reply_t *r);
void http_post_titrant(const http_req_t *q, http_reply_t *r);
void http_get_report(const http_req_t *q, http_reply_t *r);
/* http_series.c */
void http_post_series(const http_req_t *q, http_reply_t *r);
void http_get_series(const http_req_t *q, http_reply_t *r);
void http_get_series_list(const http_req_t *q, http_reply_t *r);
void http_get_series_feed(const http_req_t *q, http_reply_t *r);
void http_post_series_abort(const http_req_t *q, http_reply_t *r);
void http_post_series_next(const http_req_t *q, http_reply_t *r);
void http_post_series_weight(const http_req_t *q, http_reply_t *r);

#endif
