/* http_guard.c: deadlines, per-address limits and protocol checks before any
 * route runs (see http_guard.h). */
#include "http_guard.h"

#include <arpa/inet.h>
#include <netinet/in.h>
#include <pthread.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>
#include <sys/socket.h>
#include <time.h>

#include "drv.h"
#include "clock.h"

#define WATCH_PERIOD_NS (100 * 1000 * 1000) /* deadlines are kept to 0.1 s */

typedef struct http_conn http_conn_t;

/* One open connection (MHD's socket context), linked under guard->lock. */
struct http_conn {
	http_guard_t *g;
	http_conn_t *prev, *next;
	int fd;
	struct sockaddr_storage addr;
	double deadline_s; /* CLOCK_MONOTONIC s; 0: none while a reply is made */
	bool over_limit;
	bool cut; /* shut down at its deadline */
};

struct http_guard {
	http_ctx_t *ctx;
	pthread_mutex_t lock;
	pthread_cond_t wake; /* CLOCK_MONOTONIC */
	bool stop;
	pthread_t watcher;
	http_conn_t *head;
};

/* ---- connections ---- */

static bool same_host(const struct sockaddr_storage *a, const struct sockaddr_storage *b)
{
	if (a->ss_family != b->ss_family)
		return false;
	if (a->ss_family == AF_INET)
		return ((const struct sockaddr_in *)a)->sin_addr.s_addr ==
		       ((const struct sockaddr_in *)b)->sin_addr.s_addr;
	if (a->ss_family == AF_INET6)
		return !memcmp(&((const struct sockaddr_in6 *)a)->sin6_addr,
		               &((const struct sockaddr_in6 *)b)->sin6_addr,
		               sizeof(struct in6_addr));
	return false;
}

/* When the connection must have its request in; 0: never (a hand-made
 * config without request_deadline_s, as cfg_load never gives). */
static double deadline_s(const http_guard_t *g, bool over_limit)
{
	double d = g->ctx->cfg->request_deadline_s;
	if (over_limit && (d == 0 || d > HTTP_OVER_LIMIT_GRACE_S))
		d = HTTP_OVER_LIMIT_GRACE_S;
	return d > 0 ? clock_mono_s() + d : 0;
}

static void started(http_guard_t *g, struct MHD_Connection *c, void **socket_context)
{
	const union MHD_ConnectionInfo *fd =
	    MHD_get_connection_info(c, MHD_CONNECTION_INFO_CONNECTION_FD);
	const union MHD_ConnectionInfo *ad =
	    MHD_get_connection_info(c, MHD_CONNECTION_INFO_CLIENT_ADDRESS);
	http_conn_t *k = calloc(1, sizeof *k);
	unsigned same = 0, limit = g->ctx->cfg->max_per_ip;

	if (!k || !fd || !ad || !ad->client_addr) {
		free(k); /* without memory: served with the idle timeout only */
		return;
	}
	k->g = g;
	k->fd = fd->connect_fd;
	memcpy(&k->addr, ad->client_addr,
	       ad->client_addr->sa_family == AF_INET6 ? sizeof(struct sockaddr_in6)
	                                              : sizeof(struct sockaddr_in));
	pthread_mutex_lock(&g->lock);
	for (http_conn_t *o = g->head; o && limit; o = o->next)
		same += !o->over_limit && same_host(&o->addr, &k->addr);
	k->over_limit = limit && same >= limit;
	k->deadline_s = deadline_s(g, k->over_limit);
	k->next = g->head;
	if (g->head)
		g->head->prev = k;
	g->head = k;
	pthread_mutex_unlock(&g->lock);
	*socket_context = k;
}

static void closed(http_conn_t *k)
{
	http_guard_t *g = k->g;

	/* MHD closes the fd after this returns, so the watcher (which holds
	 * the lock while it shuts sockets down) never touches a reused fd. */
	pthread_mutex_lock(&g->lock);
	if (k->prev)
		k->prev->next = k->next;
	else
		g->head = k->next;
	if (k->next)
		k->next->prev = k->prev;
	pthread_mutex_unlock(&g->lock);
	free(k);
}

void http_guard_notify(void *cls, struct MHD_Connection *c, void **socket_context,
                       enum MHD_ConnectionNotificationCode code)
{
	if (code == MHD_CONNECTION_NOTIFY_STARTED) {
		*socket_context = NULL;
		started(cls, c, socket_context);
	} else if (*socket_context) {
		closed(*socket_context);
		*socket_context = NULL;
	}
}

static http_conn_t *conn_of(struct MHD_Connection *c)
{
	const union MHD_ConnectionInfo *i =
	    MHD_get_connection_info(c, MHD_CONNECTION_INFO_SOCKET_CONTEXT);
	return i ? i->socket_context : NULL;
}

bool http_guard_over_limit(struct MHD_Connection *c)
{
	http_conn_t *k = conn_of(c);
	return k && k->over_limit; /* set before MHD saw the connection; never changes */
}

static void set_deadline(struct MHD_Connection *c, bool running)
{
	http_conn_t *k = conn_of(c);
	if (!k)
		return;
	pthread_mutex_lock(&k->g->lock);
	k->deadline_s = running ? deadline_s(k->g, k->over_limit) : 0;
	pthread_mutex_unlock(&k->g->lock);
}

void http_guard_request_received(struct MHD_Connection *c)
{
	set_deadline(c, false);
}

void http_guard_request_done(struct MHD_Connection *c)
{
	set_deadline(c, true);
}

/* Every 0.1 s: shut down the sockets past their deadline. */
static void *watch(void *arg)
{
	http_guard_t *g = arg;
	struct timespec at;

	pthread_mutex_lock(&g->lock);
	while (!g->stop) {
		double now = clock_mono_s();
		for (http_conn_t *k = g->head; k; k = k->next) {
			if (k->cut || k->deadline_s == 0 || now < k->deadline_s)
				continue;
			/* libmicrohttpd sees the end of the stream and closes the
			 * connection itself, in its own thread. */
			shutdown(k->fd, SHUT_RDWR);
			k->cut = true;
			atomic_fetch_add(&g->ctx->deadline_cuts, 1);
		}
		clock_gettime(CLOCK_MONOTONIC, &at);
		at.tv_nsec += WATCH_PERIOD_NS;
		if (at.tv_nsec >= 1000000000L) {
			at.tv_sec++;
			at.tv_nsec -= 1000000000L;
		}
		pthread_cond_timedwait(&g->wake, &g->lock, &at);
	}
	pthread_mutex_unlock(&g->lock);
	return NULL;
}

http_guard_t *http_guard_new(http_ctx_t *ctx, char *err, size_t cap)
{
	http_guard_t *g = calloc(1, sizeof *g);
	pthread_condattr_t ca;

	if (!g) {
		snprintf(err, cap, "out of memory");
		return NULL;
	}
	g->ctx = ctx;
	pthread_mutex_init(&g->lock, NULL);
	pthread_condattr_init(&ca);
	pthread_condattr_setclock(&ca, CLOCK_MONOTONIC);
	pthread_cond_init(&g->wake, &ca);
	pthread_condattr_destroy(&ca);
	if (pthread_create(&g->watcher, NULL, watch, g)) {
		snprintf(err, cap, "cannot start the HTTP deadline thread");
		pthread_cond_destroy(&g->wake);
		pthread_mutex_destroy(&g->lock);
		free(g);
		return NULL;
	}
	return g;
}

void http_guard_free(http_guard_t *g)
{
	if (!g)
		return;
	pthread_mutex_lock(&g->lock);
	g->stop = true;
	pthread_cond_signal(&g->wake);
	pthread_mutex_unlock(&g->lock);
	pthread_join(g->watcher, NULL);
	pthread_cond_destroy(&g->wake);
	pthread_mutex_destroy(&g->lock);
	free(g);
}

/* ---- the request target ---- */

unsigned http_guard_count_args(char *target)
{
	char *q = strchr(target, '?');
	unsigned n = 0;
	bool in_arg = false;

	if (!q)
		return 0;
	for (const char *p = q + 1; *p; p++) {
		if (*p == '&') {
			in_arg = false;
		} else if (!in_arg) {
			in_arg = true;
			n++;
		}
	}
	if (n > HTTP_MAX_QUERY_ARGS)
		q[1] = '\0'; /* MHD parses the query after this callback, from this buffer */
	return n;
}

/* ---- protocol checks ---- */

typedef struct seen {
	unsigned host, auth, length, coding, nul;
	const char *host_v, *auth_v, *length_v, *coding_v;
	bool length_conflict;
} seen_t;

static enum MHD_Result see_header(void *cls, enum MHD_ValueKind kind, const char *key,
                                  size_t key_size, const char *value, size_t value_size)
{
	seen_t *s = cls;
	(void)kind;
	if (!key || strlen(key) != key_size || (value && strlen(value) != value_size))
		s->nul++;
	if (!key)
		return MHD_YES;
	if (!strcasecmp(key, MHD_HTTP_HEADER_HOST)) {
		s->host++;
		s->host_v = value;
	} else if (!strcasecmp(key, MHD_HTTP_HEADER_AUTHORIZATION)) {
		s->auth++;
		s->auth_v = value;
	} else if (!strcasecmp(key, MHD_HTTP_HEADER_CONTENT_LENGTH)) {
		if (s->length++ && (!value || !s->length_v || strcmp(value, s->length_v)))
			s->length_conflict = true;
		s->length_v = value;
	} else if (!strcasecmp(key, MHD_HTTP_HEADER_TRANSFER_ENCODING)) {
		s->coding++;
		s->coding_v = value;
	}
	return MHD_YES;
}

static bool all_digits(const char *s)
{
	if (!s || !*s || strlen(s) > 19)
		return false;
	for (; *s; s++)
		if (*s < '0' || *s > '9')
			return false;
	return true;
}

/* Host is "name[:port]", "v4[:port]" or "[v6][:port]". An IP address is
 * always allowed (a DNS-rebinding page reaches us only through a name);
 * a name must be one of http.allowed_hosts. */
static bool host_allowed(const cfg_t *cfg, const char *h)
{
	char name[CFG_HOST_MAX + 2];
	const char *end, *port = NULL;
	size_t n;
	unsigned char ip[16];

	if (!h || !*h)
		return false;
	if (h[0] == '[') {
		end = strchr(h, ']');
		if (!end || (end[1] && end[1] != ':'))
			return false;
		port = end[1] ? end + 2 : NULL;
		n = (size_t)(end - h - 1);
		if (n >= sizeof name)
			return false;
		memcpy(name, h + 1, n);
		name[n] = '\0';
		return (!port || all_digits(port)) && inet_pton(AF_INET6, name, ip) == 1;
	}
	end = strchr(h, ':');
	if (end) {
		port = end + 1;
		if (!all_digits(port))
			return false;
	}
	n = end ? (size_t)(end - h) : strlen(h);
	if (n == 0 || n >= sizeof name)
		return false;
	memcpy(name, h, n);
	name[n] = '\0';
	if (inet_pton(AF_INET, name, ip) == 1)
		return true;
	if (name[n - 1] == '.')
		name[--n] = '\0';
	for (int i = 0; i < cfg->n_allowed_hosts; i++)
		if (!strcasecmp(name, cfg->allowed_hosts[i]))
			return true;
	return false;
}

typedef struct args_seen {
	unsigned n;
	bool nul, repeated;
	const char *keys[HTTP_MAX_QUERY_ARGS];
} args_seen_t;

static enum MHD_Result see_arg(void *cls, enum MHD_ValueKind kind, const char *key, size_t key_size,
                               const char *value, size_t value_size)
{
	args_seen_t *a = cls;
	(void)kind;
	if (!key || strlen(key) != key_size || (value && strlen(value) != value_size)) {
		a->nul = true;
		return MHD_YES;
	}
	for (unsigned i = 0; i < a->n && i < HTTP_MAX_QUERY_ARGS; i++)
		if (!strcmp(a->keys[i], key))
			a->repeated = true;
	if (a->n < HTTP_MAX_QUERY_ARGS)
		a->keys[a->n] = key;
	a->n++;
	return MHD_YES;
}

/* libmicrohttpd 0.9.75 cuts a header value at a NUL byte without a word
 * ("Bearer T\0junk" reads as "Bearer T"). The header block stays in its
 * read buffer while the request is handled, in place, each line's CR LF
 * overwritten with NULs: so between the end of one value and the next key
 * there are at most two bytes, both NUL (four after the last value, with
 * the empty line), unless the value held a NUL. Where the layout is not as
 * expected nothing is concluded. */
typedef struct nul_scan {
	const char *block, *end; /* the request's header block */
	const char *gap;         /* just past the last value seen; NULL: unknown */
	bool nul;
} nul_scan_t;

static void scan_gap(nul_scan_t *n, const char *to, long max)
{
	if (!n->gap || to < n->gap || to > n->end || to - n->gap > 256)
		return;
	if (to - n->gap > max)
		n->nul = true;
	for (const char *p = n->gap; p < to; p++)
		if (*p)
			n->nul = true;
}

static enum MHD_Result scan_nul(void *cls, enum MHD_ValueKind kind, const char *key,
                                size_t key_size, const char *value, size_t value_size)
{
	nul_scan_t *n = cls;
	(void)kind;
	(void)key_size;
	scan_gap(n, key, 2);
	n->gap = value && value >= n->block && value < n->end ? value + value_size : NULL;
	return MHD_YES;
}

static bool header_has_nul(struct MHD_Connection *c, const char *method)
{
	const union MHD_ConnectionInfo *i =
	    MHD_get_connection_info(c, MHD_CONNECTION_INFO_REQUEST_HEADER_SIZE);
	nul_scan_t n = {.block = method};

	if (!i || !method || i->header_size == 0)
		return false;
	n.end = method + i->header_size;
	MHD_get_connection_values_n(c, MHD_HEADER_KIND, scan_nul, &n);
	scan_gap(&n, n.end, 4);
	return n.nul;
}

bool http_guard_refuse(http_ctx_t *ctx, struct MHD_Connection *c, const char *method,
                       const char *version, unsigned n_args, http_reply_t *r)
{
	seen_t s = {0};
	args_seen_t a = {0};

	MHD_get_connection_values_n(c, MHD_HEADER_KIND, see_header, &s);
	s.nul += header_has_nul(c, method);
	/* Framing first: after a framing error the next request's start is
	 * unknown, so the connection is closed after the answer. */
	r->close = true;
	if (s.length && (s.length_conflict || !all_digits(s.length_v))) {
		http_reply_error(r, 400, "bad_request",
		                 "Content-Length must be one decimal number, given once");
		return true;
	}
	if (s.coding && s.length) {
		http_reply_error(
		    r, 400, "bad_request",
		    "a request may not carry both Transfer-Encoding and Content-Length");
		return true;
	}
	if (s.coding) {
		bool chunked = s.coding == 1 && s.coding_v && !strcasecmp(s.coding_v, "chunked");
		if (chunked)
			http_reply_error(
			    r, 411, "length_required",
			    "send the body with a Content-Length (chunked request bodies "
			    "are not accepted)");
		else
			http_reply_error(
			    r, 501, "not_implemented",
			    "Transfer-Encoding '%s' is not supported; send the body with "
			    "a Content-Length",
			    s.coding_v ? s.coding_v : "");
		return true;
	}
	if (s.nul) {
		http_reply_error(r, 400, "bad_request",
		                 "a header holds a NUL byte or is folded onto a second line");
		return true;
	}
	r->close = false;
	if (s.host > 1 || (s.host == 0 && version && !strcmp(version, MHD_HTTP_VERSION_1_1))) {
		http_reply_error(r, 400, "bad_request",
		                 "an HTTP/1.1 request needs one Host header");
		return true;
	}
	if (s.host && !host_allowed(ctx->cfg, s.host_v)) {
		http_reply_error(r, 421, "unknown_host",
		                 "this server does not answer for Host '%s' (add the name to "
		                 "http.allowed_hosts, or use an IP address)",
		                 s.host_v);
		return true;
	}
	if (s.auth > 1) {
		http_reply_error(r, 400, "bad_request", "send one Authorization header");
		return true;
	}
	if (n_args > HTTP_MAX_QUERY_ARGS) {
		http_reply_error(r, 414, "uri_too_long", "at most %d query arguments (got %u)",
		                 HTTP_MAX_QUERY_ARGS, n_args);
		return true;
	}
	MHD_get_connection_values_n(c, MHD_GET_ARGUMENT_KIND, see_arg, &a);
	if (a.nul) {
		http_reply_error(r, 400, "bad_request", "a query argument holds a NUL character");
		return true;
	}
	if (a.repeated) {
		http_reply_error(r, 400, "bad_request", "a query argument is given twice");
		return true;
	}
	if (a.n < n_args) {
		http_reply_error(r, 400, "bad_request", "the query could not be read whole");
		return true;
	}
	return false;
}
