/* httpc.c: the `stopcock` commands' HTTP client, on libcurl (see httpc.h).
 *
 * libcurl does the wire work (name lookup, connect, framing, chunked bodies,
 * deadlines); this file checks the URL a user typed, sets the few options
 * that make a request ours, and turns libcurl's result codes into the error
 * kinds the commands print. */
#include "httpc.h"

#include <ctype.h>
#include <curl/curl.h>
#include <stdbool.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

/* strerror, starting lower-case so it reads well after "cannot reach ...: ". */
static void say_errno(char *err, size_t err_len, int e)
{
	snprintf(err, err_len, "%s", strerror(e));
	if (err_len && isupper((unsigned char)err[0]))
		err[0] = (char)tolower((unsigned char)err[0]);
}

/* One URL part from a parsed handle, or NULL when it is absent. */
static char *url_part(CURLU *h, CURLUPart what)
{
	char *v = NULL;
	if (curl_url_get(h, what, &v, 0) != CURLUE_OK)
		return NULL;
	return v;
}

int httpc_parse_url(const char *url, httpc_url_t *u, char *err, size_t err_len)
{
	memset(u, 0, sizeof *u);
	if (!url || !*url) {
		snprintf(err, err_len, "empty URL");
		return -1;
	}
	if (!strncasecmp(url, "https://", 8)) {
		snprintf(err, err_len,
		         "'%s': https is not supported; stopcockd speaks plain http://", url);
		return -1;
	}
	if (strncasecmp(url, "http://", 7)) {
		snprintf(err, err_len, "'%s' is not an http://host:port URL", url);
		return -1;
	}
	CURLU *h = curl_url();
	if (!h) {
		snprintf(err, err_len, "out of memory");
		return -1;
	}
	int rc = -1;
	char *host = NULL, *port = NULL, *path = NULL, *user = NULL, *query = NULL, *frag = NULL;
	CURLUcode uc = curl_url_set(h, CURLUPART_URL, url, 0);
	if (uc != CURLUE_OK) {
		/* A port libcurl refuses reads best in our words; the rest in its. */
		if (uc == CURLUE_BAD_PORT_NUMBER)
			snprintf(err, err_len, "'%s': the port must be a number from 1 to 65535",
			         url);
		else
			snprintf(err, err_len, "'%s': %s", url, curl_url_strerror(uc));
		goto out;
	}
	host = url_part(h, CURLUPART_HOST);
	port = url_part(h, CURLUPART_PORT);
	path = url_part(h, CURLUPART_PATH);
	user = url_part(h, CURLUPART_USER);
	query = url_part(h, CURLUPART_QUERY);
	frag = url_part(h, CURLUPART_FRAGMENT);
	if (user || query || frag) {
		snprintf(err, err_len, "'%s': user names, queries and fragments do not belong here",
		         url);
		goto out;
	}
	/* libcurl keeps an IPv6 literal's brackets; the Host header adds them back. */
	size_t hl = host ? strlen(host) : 0;
	const char *hp = host;
	if (hl >= 2 && host[0] == '[' && host[hl - 1] == ']') {
		hp++;
		hl -= 2;
	}
	if (hl == 0 || hl >= sizeof u->host) {
		snprintf(err, err_len, "'%s': missing or too long host", url);
		goto out;
	}
	memcpy(u->host, hp, hl);
	long pn = port ? strtol(port, NULL, 10) : 80;
	if (pn < 1 || pn > 65535) {
		snprintf(err, err_len, "'%s': the port must be a number from 1 to 65535", url);
		goto out;
	}
	snprintf(u->port, sizeof u->port, "%ld", pn);
	size_t plen = path ? strlen(path) : 0;
	while (plen && path[plen - 1] == '/')
		plen--;
	if (plen >= sizeof u->prefix || (path && memchr(path, ' ', plen))) {
		snprintf(err, err_len, "'%s': bad path after the host", url);
		goto out;
	}
	memcpy(u->prefix, path ? path : "", plen);
	rc = 0;
out:
	curl_free(host);
	curl_free(port);
	curl_free(path);
	curl_free(user);
	curl_free(query);
	curl_free(frag);
	curl_url_cleanup(h);
	return rc;
}

/* The reply body as it arrives, refused past HTTPC_MAX_BODY. */
typedef struct sink {
	char *buf;
	size_t len, cap;
	bool too_big, no_mem;
	char length[24]; /* the first Content-Length value seen, "" before */
	bool two_lengths;
} sink_t;

/* Refuse a reply with two different Content-Lengths (RFC 9112 §6.3): its
 * end is ambiguous, and libcurl 7.88 would silently take the last one. */
static size_t on_header(char *p, size_t size, size_t n, void *arg)
{
	sink_t *s = arg;
	size_t k = size * n;
	static const char name[] = "content-length:";
	const size_t nl = sizeof name - 1;

	if (k > nl && !strncasecmp(p, name, nl)) {
		char v[24];
		size_t a = nl, b = k;
		while (a < b && (p[a] == ' ' || p[a] == '\t'))
			a++;
		while (b > a && isspace((unsigned char)p[b - 1]))
			b--;
		snprintf(v, sizeof v, "%.*s", (int)(b - a), p + a);
		if (!s->length[0]) {
			snprintf(s->length, sizeof s->length, "%s", v);
		} else if (strcmp(s->length, v)) {
			s->two_lengths = true;
			return 0; /* libcurl ends the transfer with CURLE_WRITE_ERROR */
		}
	}
	/* A status line starts the headers of the next reply (after a 1xx). */
	if (k > 5 && !strncmp(p, "HTTP/", 5))
		s->length[0] = '\0';
	return k;
}

static size_t on_body(char *p, size_t size, size_t n, void *arg)
{
	sink_t *s = arg;
	size_t k = size * n;
	if (s->len + k > HTTPC_MAX_BODY) {
		s->too_big = true;
		return 0; /* libcurl ends the transfer with CURLE_WRITE_ERROR */
	}
	if (s->len + k + 1 > s->cap) {
		size_t cap = s->cap ? s->cap : 4096;
		while (cap < s->len + k + 1)
			cap *= 2;
		char *nb = realloc(s->buf, cap);
		if (!nb) {
			s->no_mem = true;
			return 0;
		}
		s->buf = nb;
		s->cap = cap;
	}
	memcpy(s->buf + s->len, p, k);
	s->len += k;
	s->buf[s->len] = '\0';
	return k;
}

/* libcurl's outcome as one of our kinds, with a message a user can act on. */
static httpc_err_t kind_of(CURLcode rc, CURL *c, const httpc_url_t *u, const sink_t *s,
                           const char *detail, char *err, size_t err_len)
{
	long os_errno = 0;
	curl_easy_getinfo(c, CURLINFO_OS_ERRNO, &os_errno);
	switch (rc) {
	case CURLE_COULDNT_RESOLVE_HOST:
		snprintf(err, err_len, "unknown host '%s'", u->host);
		return HTTPC_E_RESOLVE;
	case CURLE_COULDNT_CONNECT:
		if (os_errno)
			say_errno(err, err_len, (int)os_errno);
		else
			snprintf(err, err_len, "%s", detail[0] ? detail : curl_easy_strerror(rc));
		return HTTPC_E_CONNECT;
	case CURLE_OPERATION_TIMEDOUT:
		snprintf(err, err_len, "no complete reply in time");
		return HTTPC_E_TIMEOUT;
	case CURLE_WRITE_ERROR:
		if (s->two_lengths) {
			snprintf(err, err_len, "the reply has two different Content-Lengths");
			return HTTPC_E_PROTO;
		}
		if (s->too_big) {
			snprintf(err, err_len, "the reply's body is larger than %u bytes",
			         HTTPC_MAX_BODY);
			return HTTPC_E_PROTO;
		}
		snprintf(err, err_len, "out of memory");
		return HTTPC_E_NOMEM;
	case CURLE_OUT_OF_MEMORY:
		snprintf(err, err_len, "out of memory");
		return HTTPC_E_NOMEM;
	case CURLE_PARTIAL_FILE:
		snprintf(err, err_len, "the reply was cut short (%zu body bytes)", s->len);
		return HTTPC_E_IO;
	case CURLE_WEIRD_SERVER_REPLY:
	case CURLE_UNSUPPORTED_PROTOCOL:
	case CURLE_BAD_CONTENT_ENCODING:
		snprintf(err, err_len, "the reply is not HTTP/1.x as we understand it (%s)",
		         detail[0] ? detail : curl_easy_strerror(rc));
		return HTTPC_E_PROTO;
	default:
		if (os_errno)
			say_errno(err, err_len, (int)os_errno);
		else
			snprintf(err, err_len, "%s", detail[0] ? detail : curl_easy_strerror(rc));
		return HTTPC_E_IO;
	}
}

/* The request line's target and headers, or NULL with *nomem when out of memory. */
static struct curl_slist *headers_for(const httpc_req_t *req, bool *nomem)
{
	char *auth = NULL, *ctype = NULL;
	const char *fixed[] = {"Accept: application/json, text/csv, image/svg+xml, */*",
	                       "Connection: close",
	                       /* No 100-continue round trip: bodies are small and the
	                        * daemon reads them whole anyway. */
	                       "Expect:"};
	struct curl_slist *l = NULL, *t;

	*nomem = false;
	for (size_t i = 0; i < sizeof fixed / sizeof fixed[0]; i++) {
		if (!(t = curl_slist_append(l, fixed[i])))
			goto oom;
		l = t;
	}
	if (req->token) {
		if (asprintf(&auth, "Authorization: Bearer %s", req->token) < 0) {
			auth = NULL;
			goto oom;
		}
		if (!(t = curl_slist_append(l, auth)))
			goto oom;
		l = t;
	}
	if (req->body || strcmp(req->method, "GET")) {
		if (asprintf(&ctype, "Content-Type: %s",
		             req->content_type ? req->content_type : "application/json") < 0) {
			ctype = NULL;
			goto oom;
		}
		if (!(t = curl_slist_append(l, ctype)))
			goto oom;
		l = t;
	}
	free(auth);
	free(ctype);
	return l;
oom:
	free(auth);
	free(ctype);
	curl_slist_free_all(l);
	*nomem = true;
	return NULL;
}

httpc_err_t httpc_request(const char *base_url, const httpc_req_t *req, httpc_resp_t *resp,
                          char *err, size_t err_len)
{
	memset(resp, 0, sizeof *resp);
	if (err_len)
		err[0] = '\0';
	httpc_url_t u;
	if (httpc_parse_url(base_url, &u, err, err_len))
		return HTTPC_E_URL;
	const char *path = req->path && req->path[0] ? req->path : "/";
	if (path[0] != '/' || strpbrk(path, " \r\n") ||
	    (req->token && strpbrk(req->token, "\r\n"))) {
		snprintf(err, err_len, "bad request path or token");
		return HTTPC_E_URL;
	}

	char *full = NULL;
	bool v6 = strchr(u.host, ':') != NULL;
	if (asprintf(&full, "http://%s%s%s:%s%s%s", v6 ? "[" : "", u.host, v6 ? "]" : "", u.port,
	             u.prefix, path) < 0)
		return HTTPC_E_NOMEM;
	bool nomem;
	struct curl_slist *hdrs = headers_for(req, &nomem);
	CURL *c = nomem ? NULL : curl_easy_init();
	if (!c) {
		curl_slist_free_all(hdrs);
		free(full);
		snprintf(err, err_len, "out of memory");
		return HTTPC_E_NOMEM;
	}
	sink_t s = {0};
	char detail[CURL_ERROR_SIZE] = "";
	long timeout_ms = req->timeout_ms > 0 ? req->timeout_ms : 10000;
	bool is_get = !strcmp(req->method, "GET"), is_head = !strcmp(req->method, "HEAD");

	curl_easy_setopt(c, CURLOPT_URL, full);
	/* Only plain HTTP, never a redirect elsewhere, never through a proxy
	 * from the environment: the daemon is on loopback or the lab's LAN. */
	curl_easy_setopt(c, CURLOPT_PROTOCOLS_STR, "http");
	curl_easy_setopt(c, CURLOPT_FOLLOWLOCATION, 0L);
	curl_easy_setopt(c, CURLOPT_PROXY, "");
	/* One deadline for the whole exchange, lookup included; no signals, so
	 * the client may run beside threads (the benchmark's server). */
	curl_easy_setopt(c, CURLOPT_TIMEOUT_MS, timeout_ms);
	curl_easy_setopt(c, CURLOPT_NOSIGNAL, 1L);
	curl_easy_setopt(c, CURLOPT_FORBID_REUSE, 1L);
	curl_easy_setopt(c, CURLOPT_USERAGENT, "stopcock/" STOPCOCK_VERSION);
	curl_easy_setopt(c, CURLOPT_HTTPHEADER, hdrs);
	curl_easy_setopt(c, CURLOPT_ERRORBUFFER, detail);
	curl_easy_setopt(c, CURLOPT_WRITEFUNCTION, on_body);
	curl_easy_setopt(c, CURLOPT_WRITEDATA, &s);
	curl_easy_setopt(c, CURLOPT_HEADERFUNCTION, on_header);
	curl_easy_setopt(c, CURLOPT_HEADERDATA, &s);
	if (is_head) {
		curl_easy_setopt(c, CURLOPT_NOBODY, 1L);
	} else if (!is_get || req->body) {
		/* Every other method sends a body, empty when there is none, so the
		 * daemon always sees a Content-Length. */
		curl_easy_setopt(c, CURLOPT_POSTFIELDSIZE_LARGE,
		                 (curl_off_t)(req->body ? req->body_len : 0));
		curl_easy_setopt(c, CURLOPT_POSTFIELDS, req->body ? req->body : "");
		if (strcmp(req->method, "POST"))
			curl_easy_setopt(c, CURLOPT_CUSTOMREQUEST, req->method);
	}

	httpc_err_t kind = HTTPC_OK;
	CURLcode rc = curl_easy_perform(c);
	if (rc != CURLE_OK) {
		kind = kind_of(rc, c, &u, &s, detail, err, err_len);
		free(s.buf);
	} else {
		long status = 0;
		char *ct = NULL;
		curl_easy_getinfo(c, CURLINFO_RESPONSE_CODE, &status);
		curl_easy_getinfo(c, CURLINFO_CONTENT_TYPE, &ct);
		resp->status = (int)status;
		resp->body = s.buf ? s.buf : calloc(1, 1);
		resp->body_len = s.len;
		resp->content_type = ct ? strdup(ct) : NULL;
		if (!resp->body || (ct && !resp->content_type)) {
			httpc_resp_free(resp);
			snprintf(err, err_len, "out of memory");
			kind = HTTPC_E_NOMEM;
		}
	}
	curl_easy_cleanup(c);
	curl_slist_free_all(hdrs);
	free(full);
	return kind;
}

void httpc_resp_free(httpc_resp_t *resp)
{
	if (!resp)
		return;
	free(resp->content_type);
	free(resp->body);
	memset(resp, 0, sizeof *resp);
}
