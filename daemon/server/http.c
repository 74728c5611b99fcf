/* http.c: the server, bodies, authentication and replies. Which path and
 * method is which handler, and who may call it, is the route table's
 * (http_routes.c); the handlers are in http_www.c, http_misc.c, http_runs.c
 * and http_calib.c. */
#include "http.h"

#include <arpa/inet.h>
#include <errno.h>
#include <microhttpd.h>
#include <netinet/in.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>
#include <sys/resource.h>
#include <unistd.h>

#include "drv.h"
#include "http_guard.h"
#include "http_routes.h"
#include "log.h"
#include "clock.h"

#define HTTP_NICE 5 /* niceness of HTTP worker threads, relative to 0 */

static _Thread_local bool niced;

#define MHD_LOG_BURST    20   /* libmicrohttpd messages logged per window */
#define MHD_LOG_WINDOW_S 60.0 /* s */

struct http_server {
	struct MHD_Daemon *d;
	http_ctx_t *ctx;
	http_guard_t *guard;
	/* libmicrohttpd logs a line per refused or cut connection: under a
	 * flood of them only MHD_LOG_BURST a window reach the log. */
	pthread_mutex_t log_lock;
	double log_window_s; /* CLOCK_MONOTONIC s when the window began */
	unsigned logged, dropped;
};

/* Per-request state: made when the request line is in (on_uri), then the
 * body as it arrives. */
typedef struct conn_state {
	char *buf;
	size_t len, cap;
	bool started; /* the first call (headers in) is done */
	bool too_big;
	bool answered;   /* refused at the first call */
	unsigned n_args; /* query arguments in the request target */
} conn_state_t;

void http_reply_json(http_reply_t *r, int status, json_t *j)
{
	r->status = status;
	r->content_type = "application/json";
	free(r->body);
	r->body = j ? json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
	json_decref(j);
	if (!r->body) {
		r->status = 500;
		r->body =
		    strdup("{\"error\":{\"code\":\"internal\",\"message\":\"out of memory\"}}");
	}
	r->len = r->body ? strlen(r->body) : 0;
}

void http_reply_error(http_reply_t *r, int status, const char *code, const char *fmt, ...)
{
	char msg[4096];
	va_list ap;
	json_t *j;

	va_start(ap, fmt);
	vsnprintf(msg, sizeof msg, fmt, ap);
	va_end(ap);
	j = json_pack("{s:{s:s,s:s}}", "error", "code", code, "message", msg);
	if (!j) {
		/* The message quotes request bytes (a path) that are not UTF-8,
		 * or was cut inside a character: keep ASCII so the status stays
		 * this error's, not a 500 (found by tests/fuzz/fuzz_http.c). */
		for (char *p = msg; *p; p++)
			if ((unsigned char)*p >= 0x80 || (unsigned char)*p < 0x20)
				*p = '?';
		j = json_pack("{s:{s:s,s:s}}", "error", "code", code, "message", msg);
	}
	http_reply_json(r, status, j);
}

void http_reply_text(http_reply_t *r, int status, const char *ctype, char *text, size_t len)
{
	free(r->body);
	r->status = status;
	r->content_type = ctype;
	r->body = text;
	r->len = len;
}

const char *http_query(const http_req_t *q, const char *key)
{
	return MHD_lookup_connection_value(q->conn, MHD_GET_ARGUMENT_KIND, key);
}

bool http_parse_id(const char *s, long long *out)
{
	long long v = 0;

	if (!s || !*s || strlen(s) > 15)
		return false;
	for (const char *p = s; *p; p++) {
		if (*p < '0' || *p > '9')
			return false;
		v = v * 10 + (*p - '0');
	}
	if (v <= 0)
		return false;
	*out = v;
	return true;
}

station_t *http_find_station(http_ctx_t *ctx, const char *name)
{
	for (int i = 0; i < ctx->n_stations; i++)
		if (!strcmp(station_name(ctx->stations[i]), name))
			return ctx->stations[i];
	return NULL;
}

void http_method_limits(http_ctx_t *ctx, station_t *st, method_limits_t *lim)
{
	method_limits_init(lim);
	for (int i = 0; i < ctx->n_stations; i++) {
		station_t *s = ctx->stations[i];
		if (st && s != st)
			continue;
		method_limits_add_station(lim, station_vessel_max_ml(s), station_capacity_ml(s));
	}
}

/* Equal in time independent of where the first difference is; every token
 * is compared, so the time does not tell which one matched either. */
static bool ct_equal(const char *a, size_t alen, const char *b, size_t blen)
{
	unsigned char diff = (unsigned char)(alen != blen);
	for (size_t i = 0; i < blen; i++)
		diff |= (unsigned char)((i < alen ? a[i] : 0) ^ b[i]);
	return diff == 0;
}

void http_set_tokens(http_ctx_t *ctx, const cfg_tokens_t *t)
{
	pthread_rwlock_wrlock(&ctx->tokens_lock);
	ctx->tokens = *t;
	pthread_rwlock_unlock(&ctx->tokens_lock);
}

const char *http_actor(const http_req_t *q)
{
	return q->token_name && *q->token_name ? q->token_name : "anonymous";
}

void http_audit(const http_req_t *q, const char *station, int64_t run_id, const char *kind,
                const char *code, const char *fmt, ...)
{
	char msg[512];
	va_list ap;

	va_start(ap, fmt);
	vsnprintf(msg, sizeof msg, fmt, ap);
	va_end(ap);
	if (store_event_add(q->ctx->store, NULL, station, run_id, kind, code, msg, http_actor(q)) !=
	    STORE_OK)
		log_warn("could not store the audit event %s/%s: %s", kind, code, msg);
}

/* The name of the matching token, copied into buf, and its roles, or NULL. */
static const char *check_token(http_ctx_t *ctx, struct MHD_Connection *c, char *buf, size_t cap,
                               unsigned *roles)
{
	const char *h =
	    MHD_lookup_connection_value(c, MHD_HEADER_KIND, MHD_HTTP_HEADER_AUTHORIZATION);
	const char *found = NULL;
	size_t len;

	if (!h || strncasecmp(h, "Bearer ", 7))
		return NULL;
	h += 7;
	while (*h == ' ')
		h++;
	len = strlen(h);
	while (len > 0 && (h[len - 1] == ' ' || h[len - 1] == '\t'))
		len--; /* MHD 0.9.75 keeps a value's trailing white space */
	pthread_rwlock_rdlock(&ctx->tokens_lock);
	for (int i = 0; i < ctx->tokens.n; i++) {
		const cfg_token_t *t = &ctx->tokens.v[i];
		if (ct_equal(h, len, t->token, strlen(t->token)) && !found) {
			snprintf(buf, cap, "%s", t->name);
			*roles = t->roles;
			found = buf;
		}
	}
	pthread_rwlock_unlock(&ctx->tokens_lock);
	return found;
}

static enum MHD_Result send_reply(struct MHD_Connection *c, http_ctx_t *ctx, http_reply_t *r)
{
	struct MHD_Response *resp;
	enum MHD_Result ret;

	if (!r->body) {
		r->body = strdup("");
		r->len = 0;
	}
	resp = MHD_create_response_from_buffer(r->len, r->body, MHD_RESPMEM_MUST_FREE);
	if (!resp) {
		free(r->body);
		return MHD_NO;
	}
	r->body = NULL;
	MHD_add_response_header(resp, MHD_HTTP_HEADER_CONTENT_TYPE,
	                        r->content_type ? r->content_type : "application/json");
	MHD_add_response_header(resp, MHD_HTTP_HEADER_CACHE_CONTROL, "no-store");
	MHD_add_response_header(resp, "X-Content-Type-Options", "nosniff");
	MHD_add_response_header(
	    resp, "Content-Security-Policy",
	    r->content_type && !strcmp(r->content_type, "image/svg+xml") ? HTTP_CSP_SVG : HTTP_CSP);
	MHD_add_response_header(resp, "Referrer-Policy", "no-referrer");
	if (r->status == 401)
		MHD_add_response_header(resp, MHD_HTTP_HEADER_WWW_AUTHENTICATE,
		                        "Bearer realm=\"stopcock\"");
	if (r->location[0])
		MHD_add_response_header(resp, MHD_HTTP_HEADER_LOCATION, r->location);
	if (r->allow)
		MHD_add_response_header(resp, MHD_HTTP_HEADER_ALLOW, r->allow);
	if (r->status == 503)
		MHD_add_response_header(resp, MHD_HTTP_HEADER_RETRY_AFTER, "1");
	if (r->close)
		MHD_add_response_header(resp, MHD_HTTP_HEADER_CONNECTION, "close");
	ret = MHD_queue_response(c, (unsigned)r->status, resp);
	MHD_destroy_response(resp);
	if (r->status >= 500)
		atomic_fetch_add(&ctx->requests_5xx, 1);
	else if (r->status >= 400)
		atomic_fetch_add(&ctx->requests_4xx, 1);
	else
		atomic_fetch_add(&ctx->requests_2xx, 1);
	return ret;
}

static enum MHD_Result too_large(struct MHD_Connection *c, http_ctx_t *ctx)
{
	http_reply_t r = {0};
	atomic_fetch_add(&ctx->body_too_large, 1);
	http_reply_error(&r, 413, "too_large", "the request body is larger than %u bytes",
	                 ctx->cfg->max_body_bytes);
	return send_reply(c, ctx, &r);
}

static enum MHD_Result on_request(void *cls, struct MHD_Connection *c, const char *url,
                                  const char *method, const char *version, const char *upload_data,
                                  size_t *upload_size, void **con_cls)
{
	http_ctx_t *ctx = cls;
	conn_state_t *cs = *con_cls;
	http_reply_t r = {0};
	http_req_t q = {0};
	http_auth_t auth;
	enum MHD_Result ret;

	if (!niced) {
		/* HTTP workers yield to station threads: a burst of requests must
		 * not delay an addition (raising one's own nice needs no privilege). */
		setpriority(PRIO_PROCESS, (id_t)gettid(), HTTP_NICE);
		niced = true;
	}
	if (!cs) {
		cs = calloc(1, sizeof *cs); /* on_uri ran out of memory */
		if (!cs)
			return MHD_NO;
		*con_cls = cs;
	}
	if (!cs->started) {
		const char *cl =
		    MHD_lookup_connection_value(c, MHD_HEADER_KIND, MHD_HTTP_HEADER_CONTENT_LENGTH);
		char allow_buf[64];
		const char *allow = http_routes_allow(url, allow_buf, sizeof allow_buf);
		cs->started = true;
		/* Everything that can be refused from the headers is refused
		 * here, before the body is read and before authentication; MHD
		 * then discards any body and closes the connection. */
		if (http_guard_over_limit(c)) {
			atomic_fetch_add(&ctx->over_limit, 1);
			r.close = true;
			http_reply_error(&r, 503, "busy",
			                 "too many connections from this address (http.max_per_ip "
			                 "is %u); retry when one has closed",
			                 ctx->cfg->max_per_ip);
		} else if (http_guard_refuse(ctx, c, method, version, cs->n_args, &r)) {
			/* r filled */
		} else if (allow && !http_routes_known(method, url)) {
			r.allow = allow;
			http_reply_error(&r, 405, "method_not_allowed",
			                 "%s is not allowed on %s (use %s)", method, url, allow);
		} else if (cl && strtoull(cl, NULL, 10) > ctx->cfg->max_body_bytes) {
			cs->answered = true;
			return too_large(c, ctx);
		} else {
			return MHD_YES;
		}
		cs->answered = true;
		ret = send_reply(c, ctx, &r);
		free(r.body);
		return ret;
	}
	if (*upload_size) {
		size_t n = *upload_size;
		*upload_size = 0;
		if (cs->answered || cs->too_big)
			return MHD_YES;
		if (cs->len + n > ctx->cfg->max_body_bytes) {
			cs->too_big = true; /* chunked: counted, answered at the end */
			return MHD_YES;
		}
		if (cs->len + n + 1 > cs->cap) {
			size_t cap = (cs->len + n + 1) * 2;
			char *nb;
			if (cap > (size_t)ctx->cfg->max_body_bytes + 1)
				cap = (size_t)ctx->cfg->max_body_bytes + 1;
			nb = realloc(cs->buf, cap);
			if (!nb)
				return MHD_NO;
			cs->buf = nb;
			cs->cap = cap;
		}
		memcpy(cs->buf + cs->len, upload_data, n);
		cs->len += n;
		cs->buf[cs->len] = '\0';
		return MHD_YES;
	}
	if (cs->answered)
		return MHD_YES;
	http_guard_request_received(c);
	if (cs->too_big)
		return too_large(c, ctx);

	q.ctx = ctx;
	/* HEAD is GET without the body, which MHD leaves out itself. */
	q.method = strcmp(method, "HEAD") ? method : "GET";
	q.path = url;
	q.body = cs->buf;
	q.body_len = cs->len;
	q.conn = c;
	auth = http_routes_auth(method, url);
	/* A token sent where none is needed still says who asks (GET /v1/whoami). */
	if (auth != HTTP_OPEN ||
	    MHD_lookup_connection_value(c, MHD_HEADER_KIND, MHD_HTTP_HEADER_AUTHORIZATION))
		q.token_name = check_token(ctx, c, q.token_buf, sizeof q.token_buf, &q.roles);
	if (auth != HTTP_OPEN && (auth != HTTP_READ || ctx->cfg->read_needs_token)) {
		unsigned need = http_auth_roles(auth);
		if (q.token_name && !(q.roles & need)) {
			char names[64], msg[256];
			/* Counted with the refused tokens: a probe of what a
			 * stolen read token may do shows in /metrics too. */
			atomic_fetch_add(&ctx->auth_failures, 1);
			cfg_roles_text(need, names, sizeof names);
			snprintf(msg, sizeof msg,
			         "the token '%s' lacks the role %s this request needs",
			         q.token_name, need & (need - 1) ? "operate or admin" : names);
			/* The name is UTF-8 (checked at load), so the pack holds. */
			http_reply_json(&r, 403,
			                json_pack("{s:{s:s,s:s,s:s}}", "error", "code", "forbidden",
			                          "message", msg, "role", names));
			ret = send_reply(c, ctx, &r);
			free(r.body);
			return ret;
		}
		if (!q.token_name) {
			const char *h = MHD_lookup_connection_value(c, MHD_HEADER_KIND,
			                                            MHD_HTTP_HEADER_AUTHORIZATION);
			atomic_fetch_add(&ctx->auth_failures, 1);
			http_reply_error(&r, 401, h ? "bad_token" : "no_token",
			                 h ? "the bearer token is not valid"
			                   : "this request needs 'Authorization: Bearer TOKEN'");
			return send_reply(c, ctx, &r);
		}
	}
	http_routes_dispatch(&q, &r);
	ret = send_reply(c, ctx, &r);
	free(r.body);
	return ret;
}

static void on_completed(void *cls, struct MHD_Connection *c, void **con_cls,
                         enum MHD_RequestTerminationCode toe)
{
	conn_state_t *cs = *con_cls;
	(void)cls;
	(void)toe;
	http_guard_request_done(c); /* the next request's deadline starts now */
	if (cs) {
		free(cs->buf);
		free(cs);
	}
	*con_cls = NULL;
}

/* The request line is in: count its query arguments (and keep MHD from
 * parsing too many); the state made here is the request's *con_cls. */
static void *on_uri(void *cls, const char *uri, struct MHD_Connection *c)
{
	conn_state_t *cs = calloc(1, sizeof *cs);
	(void)cls;
	(void)c;
	if (cs)
		/* MHD hands its own writable copy of the line (const only in
		 * the prototype) and parses the query from it after this call. */
		cs->n_args = http_guard_count_args((char *)uri);
	return cs;
}

/* fmt is libmicrohttpd's own printf format: say so, so the compiler checks
 * it as one rather than warning that it is not a literal. */
static void on_mhd_log(void *cls, const char *fmt, va_list ap)
    __attribute__((format(printf, 2, 0)));
static void on_mhd_log(void *cls, const char *fmt, va_list ap)
{
	http_server_t *h = cls;
	char buf[512];
	double now = clock_mono_s();
	unsigned dropped = 0;
	bool keep;

	pthread_mutex_lock(&h->log_lock);
	if (now - h->log_window_s >= MHD_LOG_WINDOW_S) {
		dropped = h->dropped;
		h->log_window_s = now;
		h->logged = h->dropped = 0;
	}
	keep = h->logged < MHD_LOG_BURST;
	if (keep)
		h->logged++;
	else
		h->dropped++;
	pthread_mutex_unlock(&h->log_lock);
	if (dropped)
		log_warn("http: %u more libmicrohttpd messages were not logged", dropped);
	if (!keep)
		return;
	vsnprintf(buf, sizeof buf, fmt, ap);
	buf[strcspn(buf, "\n")] = '\0';
	log_warn("http: %s", buf);
}

http_server_t *http_start(http_ctx_t *ctx, char *err, size_t cap)
{
	http_server_t *h = calloc(1, sizeof *h);
	struct sockaddr_in a4;
	struct sockaddr_in6 a6;
	struct sockaddr *sa;
	unsigned flags = MHD_USE_AUTO_INTERNAL_THREAD | MHD_USE_ITC | MHD_USE_ERROR_LOG;
	unsigned per_ip = ctx->cfg->max_per_ip ? ctx->cfg->max_per_ip + HTTP_OVER_LIMIT_EXTRA : 0;

	if (!h) {
		snprintf(err, cap, "out of memory");
		return NULL;
	}
	h->ctx = ctx;
	h->guard = http_guard_new(ctx, err, cap);
	if (!h->guard) {
		free(h);
		return NULL;
	}
	pthread_mutex_init(&h->log_lock, NULL);
	h->log_window_s = clock_mono_s();
	memset(&a4, 0, sizeof a4);
	memset(&a6, 0, sizeof a6);
	if (inet_pton(AF_INET, ctx->cfg->listen_addr, &a4.sin_addr) == 1) {
		a4.sin_family = AF_INET;
		a4.sin_port = htons((uint16_t)ctx->cfg->listen_port);
		sa = (struct sockaddr *)&a4;
	} else if (inet_pton(AF_INET6, ctx->cfg->listen_addr, &a6.sin6_addr) == 1) {
		a6.sin6_family = AF_INET6;
		a6.sin6_port = htons((uint16_t)ctx->cfg->listen_port);
		sa = (struct sockaddr *)&a6;
		flags |= MHD_USE_IPv6;
	} else {
		snprintf(err, cap, "bad listen address '%s'", ctx->cfg->listen_addr);
		http_guard_free(h->guard);
		pthread_mutex_destroy(&h->log_lock);
		free(h);
		return NULL;
	}
	h->d = MHD_start_daemon(flags, (uint16_t)ctx->cfg->listen_port, NULL, NULL, on_request, ctx,
	                        MHD_OPTION_EXTERNAL_LOGGER, on_mhd_log, h, MHD_OPTION_SOCK_ADDR, sa,
	                        MHD_OPTION_THREAD_POOL_SIZE, ctx->cfg->threads,
	                        MHD_OPTION_CONNECTION_LIMIT, ctx->cfg->max_connections,
	                        /* MHD drops connections past this without a word; the
	                         * extra few are ours to answer 503 (http_guard.h). */
	                        MHD_OPTION_PER_IP_CONNECTION_LIMIT, per_ip,
	                        MHD_OPTION_CONNECTION_TIMEOUT, ctx->cfg->connection_timeout_s,
	                        MHD_OPTION_NOTIFY_CONNECTION, http_guard_notify, h->guard,
	                        MHD_OPTION_URI_LOG_CALLBACK, on_uri, NULL,
	                        MHD_OPTION_NOTIFY_COMPLETED, on_completed, NULL, MHD_OPTION_END);
	if (!h->d) {
		snprintf(err, cap, "cannot listen on %s:%d: %s", ctx->cfg->listen_addr,
		         ctx->cfg->listen_port, errno ? strerror(errno) : "libmicrohttpd failed");
		http_guard_free(h->guard);
		pthread_mutex_destroy(&h->log_lock);
		free(h);
		return NULL;
	}
	return h;
}

void http_stop(http_server_t *h)
{
	MHD_socket fd;

	if (!h)
		return;
	fd = MHD_quiesce_daemon(h->d);
	MHD_stop_daemon(h->d);
	if (fd != MHD_INVALID_SOCKET)
		close(fd);
	http_guard_free(h->guard);
	if (h->dropped)
		log_warn("http: %u more libmicrohttpd messages were not logged", h->dropped);
	pthread_mutex_destroy(&h->log_lock);
	free(h);
}
