/* http_routes.c: the route table (see http_routes.h) and its matcher. */
#include "http_routes.h"

#include <stdio.h>
#include <string.h>

#define HTTP_PATH_MAX 512 /* bytes; a longer path is no route's */

typedef struct http_route {
	const char *method; /* GET (which answers HEAD too), POST or PUT */
	const char *pattern;
	void (*handler)(const http_req_t *q, http_reply_t *r);
	http_auth_t auth;
	/* Set: the {id} segment is this thing's id, a positive integer, or
	 * the request is a 400 ("a run id is a positive integer"). */
	const char *id_of;
} http_route_t;

/* docs/openapi.yaml's paths and methods, row for row. A literal segment
 * comes before a {...} one in the same place ("latest" before {id}): the
 * first row that matches answers. */
static const http_route_t routes[] = {
    {"GET", "/", http_get_index, HTTP_OPEN, NULL},
    {"GET", "/www/{name}", http_get_www_file, HTTP_OPEN, NULL},
    {"GET", "/metrics", http_get_metrics, HTTP_READ, NULL},
    {"GET", "/v1/health", http_get_health, HTTP_OPEN, NULL},
    {"GET", "/v1/whoami", http_get_whoami, HTTP_OPEN, NULL},
    {"GET", "/v1/stations", http_get_stations, HTTP_READ, NULL},
    {"POST", "/v1/stations/{name}/halt", http_post_halt, HTTP_WRITE, NULL},
    {"POST", "/v1/stations/{name}/resume", http_post_resume, HTTP_WRITE, NULL},
    {"GET", "/v1/methods", http_get_methods, HTTP_READ, NULL},
    {"GET", "/v1/methods/{id}", http_get_method, HTTP_READ, NULL},
    {"PUT", "/v1/methods/{id}", http_put_method, HTTP_ADMIN, NULL},
    {"POST", "/v1/methods/{id}/check", http_post_method_check, HTTP_ADMIN, NULL},
    {"GET", "/v1/runs", http_get_runs, HTTP_READ, NULL},
    {"POST", "/v1/runs", http_post_run, HTTP_WRITE, NULL},
    {"GET", "/v1/runs/{id}", http_get_run, HTTP_READ, "run"},
    {"GET", "/v1/runs/{id}/points", http_get_points, HTTP_READ, "run"},
    {"GET", "/v1/runs/{id}/curve.svg", http_get_curve, HTTP_READ, "run"},
    {"GET", "/v1/runs/{id}/report.pdf", http_get_report, HTTP_READ, "run"},
    {"POST", "/v1/runs/{id}/abort", http_post_abort, HTTP_WRITE, "run"},
    {"POST", "/v1/runs/{id}/review", http_post_review, HTTP_REVIEW, "run"},
    {"POST", "/v1/runs/{id}/correct", http_post_correct, HTTP_WRITE, "run"},
    {"GET", "/v1/results", http_get_results, HTTP_READ, NULL},
    {"GET", "/v1/events", http_get_events, HTTP_READ, NULL},
    {"GET", "/v1/events/verify", http_get_events_verify, HTTP_READ, NULL},
    {"GET", "/v1/titrants", http_get_titrants, HTTP_READ, NULL},
    {"POST", "/v1/titrants", http_post_titrant, HTTP_CURATE, NULL},
    {"POST", "/v1/calibrations", http_post_calibration, HTTP_WRITE, NULL},
    {"GET", "/v1/calibrations/latest", http_get_calibration_latest, HTTP_READ, NULL},
    {"GET", "/v1/calibrations/{id}", http_get_calibration, HTTP_READ, "calibration"},
    {"POST", "/v1/calibrations/{id}/next", http_post_calibration_next, HTTP_WRITE, "calibration"},
    {"GET", "/v1/series", http_get_series_list, HTTP_READ, NULL},
    {"POST", "/v1/series", http_post_series, HTTP_WRITE, NULL},
    {"GET", "/v1/series/feed", http_get_series_feed, HTTP_READ, NULL},
    {"GET", "/v1/series/{id}", http_get_series, HTTP_READ, "series"},
    {"POST", "/v1/series/{id}/abort", http_post_series_abort, HTTP_WRITE, "series"},
    {"POST", "/v1/series/{id}/next", http_post_series_next, HTTP_WRITE, "series"},
    {"POST", "/v1/series/{id}/weight", http_post_series_weight, HTTP_WRITE, "series"},
};

#define N_ROUTES (sizeof routes / sizeof routes[0])

/* Does path match pattern, segment by segment? A "{...}" segment of the
 * pattern matches any one segment, whose text is then *param (*param_len
 * bytes, not NUL-terminated). Empty segments are skipped, so "//v1/runs/"
 * is "/v1/runs". */
static bool path_matches(const char *pattern, const char *path, const char **param,
                         size_t *param_len)
{
	*param = NULL;
	*param_len = 0;
	for (;;) {
		size_t pn, n;
		while (*pattern == '/')
			pattern++;
		while (*path == '/')
			path++;
		if (!*pattern || !*path)
			return !*pattern && !*path;
		pn = strcspn(pattern, "/");
		n = strcspn(path, "/");
		if (*pattern == '{') {
			*param = path;
			*param_len = n;
		} else if (pn != n || strncmp(pattern, path, n)) {
			return false;
		}
		pattern += pn;
		path += n;
	}
}

/* The first route with this method ("HEAD" looks for "GET") and path. */
static const http_route_t *find(const char *method, const char *path, const char **param,
                                size_t *param_len)
{
	if (!strcmp(method, "HEAD"))
		method = "GET";
	for (size_t i = 0; i < N_ROUTES; i++)
		if (!strcmp(routes[i].method, method) &&
		    path_matches(routes[i].pattern, path, param, param_len))
			return &routes[i];
	return NULL;
}

/* Add w to the list "A, B" in buf (used bytes so far) unless it is there. */
static void add_method(char *buf, size_t cap, size_t *used, const char *w)
{
	size_t n = strlen(w);
	int k;

	for (const char *p = buf; *p; p += strspn(p, ", ")) {
		size_t len = strcspn(p, ", ");
		if (len == n && !strncmp(p, w, n))
			return;
		p += len;
	}
	k = snprintf(buf + *used, cap - *used, "%s%s", *used ? ", " : "", w);
	if (k > 0 && (size_t)k < cap - *used)
		*used += (size_t)k;
	else
		buf[*used] = '\0'; /* no room: the list stays whole, only shorter */
}

const char *http_routes_allow(const char *path, char *buf, size_t cap)
{
	size_t used = 0;
	const char *param;
	size_t len;

	if (!cap)
		return NULL;
	buf[0] = '\0';
	for (size_t i = 0; i < N_ROUTES; i++) {
		if (!path_matches(routes[i].pattern, path, &param, &len))
			continue;
		add_method(buf, cap, &used, routes[i].method);
		if (!strcmp(routes[i].method, "GET"))
			add_method(buf, cap, &used, "HEAD"); /* HEAD is GET without the body */
	}
	return used ? buf : NULL;
}

bool http_routes_known(const char *method, const char *path)
{
	const char *param;
	size_t len;
	return find(method, path, &param, &len) != NULL;
}

unsigned http_auth_roles(http_auth_t a)
{
	switch (a) {
	case HTTP_OPEN:
		return 0;
	case HTTP_READ:
		return CFG_ROLE_READ;
	case HTTP_WRITE:
		return CFG_ROLE_OPERATE;
	case HTTP_REVIEW:
		return CFG_ROLE_REVIEW;
	case HTTP_ADMIN:
		return CFG_ROLE_ADMIN;
	case HTTP_CURATE:
		return CFG_ROLE_OPERATE | CFG_ROLE_ADMIN;
	}
	return CFG_ROLES_ALL;
}

http_auth_t http_routes_auth(const char *method, const char *path)
{
	const char *param;
	size_t len;
	const http_route_t *rt = find(method, path, &param, &len);

	if (rt)
		return rt->auth;
	return strcmp(method, "GET") && strcmp(method, "HEAD") ? HTTP_WRITE : HTTP_READ;
}

void http_routes_dispatch(const http_req_t *q, http_reply_t *r)
{
	char param[HTTP_PATH_MAX];
	const char *p = NULL;
	size_t len = 0;
	const http_route_t *rt;
	http_req_t a = *q;

	if (strlen(q->path) >= sizeof param) {
		http_reply_error(r, 404, "not_found", "no such route");
		return;
	}
	rt = find(q->method, q->path, &p, &len);
	if (!rt) {
		http_reply_error(r, 404, "not_found", "no such route: %s %s", q->method, q->path);
		return;
	}
	a.param = NULL;
	a.id = 0;
	if (p) {
		memcpy(param, p, len); /* len < strlen(q->path) < sizeof param */
		param[len] = '\0';
		a.param = param;
	}
	if (rt->id_of && !http_parse_id(a.param, &a.id)) {
		http_reply_error(r, 400, "bad_request", "a %s id is a positive integer (got '%s')",
		                 rt->id_of, a.param ? a.param : "");
		return;
	}
	rt->handler(&a, r);
}
