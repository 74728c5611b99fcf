/* httpc.c: a small HTTP/1.1 client over TCP sockets (see httpc.h). */
#include "httpc.h"

#include <ctype.h>
#include <errno.h>
#include <netdb.h>
#include <netinet/in.h>
#include <poll.h>
#include <stdbool.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>
#include <sys/socket.h>
#include <time.h>
#include <unistd.h>

#define HEADER_MAX (64 * 1024) /* bytes of status line and headers we accept */

static long long now_ms(void)
{
	struct timespec ts;
	clock_gettime(CLOCK_MONOTONIC, &ts);
	return (long long)ts.tv_sec * 1000 + ts.tv_nsec / 1000000;
}

/* Milliseconds left before the deadline, at least 0. */
static int left_ms(long long deadline_ms)
{
	long long d = deadline_ms - now_ms();
	return d <= 0 ? 0 : d > INT32_MAX ? INT32_MAX : (int)d;
}

/* strerror, starting lower-case so it reads well after "cannot reach ...: ". */
static void say_errno(char *err, size_t err_len, int e)
{
	snprintf(err, err_len, "%s", strerror(e));
	if (err_len && isupper((unsigned char)err[0]))
		err[0] = (char)tolower((unsigned char)err[0]);
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
	const char *p = url + 7, *host_end;
	if (*p == '[') { /* IPv6 literal */
		host_end = strchr(p, ']');
		if (!host_end || host_end == p + 1) {
			snprintf(err, err_len, "'%s': unterminated [IPv6] host", url);
			return -1;
		}
		p++;
	} else {
		host_end = p + strcspn(p, ":/?#@");
	}
	size_t host_len = (size_t)(host_end - p);
	if (host_len == 0 || host_len >= sizeof u->host) {
		snprintf(err, err_len, "'%s': missing or too long host", url);
		return -1;
	}
	memcpy(u->host, p, host_len);
	p = host_end + (*host_end == ']');
	if (*p == '@' || *p == '?' || *p == '#') {
		snprintf(err, err_len, "'%s': user names, queries and fragments do not belong here",
		         url);
		return -1;
	}
	snprintf(u->port, sizeof u->port, "80");
	if (*p == ':') {
		p++;
		size_t n = strspn(p, "0123456789");
		long port = n && n <= 5 ? strtol(p, NULL, 10) : 0;
		if (port < 1 || port > 65535 || (p[n] && p[n] != '/')) {
			snprintf(err, err_len, "'%s': the port must be a number from 1 to 65535",
			         url);
			return -1;
		}
		snprintf(u->port, sizeof u->port, "%ld", port);
		p += n;
	}
	size_t plen = strlen(p);
	while (plen && p[plen - 1] == '/')
		plen--;
	if (plen >= sizeof u->prefix || memchr(p, '?', plen) || memchr(p, '#', plen) ||
	    memchr(p, ' ', plen)) {
		snprintf(err, err_len, "'%s': bad path after the host", url);
		return -1;
	}
	memcpy(u->prefix, p, plen);
	return 0;
}

int httpc_dechunk(const char *in, size_t in_len, size_t max, char **out, size_t *out_len)
{
	size_t i = 0, len = 0, cap = 0;
	char *buf = NULL;
	int rc = -1;
	for (;;) {
		/* size line: hex digits, optional ";extension", CRLF */
		size_t start = i, size = 0;
		while (i < in_len && isxdigit((unsigned char)in[i])) {
			int d = isdigit((unsigned char)in[i])
			            ? in[i] - '0'
			            : tolower((unsigned char)in[i]) - 'a' + 10;
			if (size > (SIZE_MAX - 15) / 16)
				goto out;
			size = size * 16 + (size_t)d;
			i++;
		}
		if (i == in_len)
			goto more;
		if (i == start)
			goto out;
		if (in[i] == ';') /* a chunk extension: ignored */
			while (i < in_len && in[i] != '\r' && in[i] != '\n')
				i++;
		if (i + 1 >= in_len)
			goto more;
		if (in[i] != '\r' || in[i + 1] != '\n')
			goto out;
		i += 2;
		if (size == 0) {
			/* trailers, each ending in CRLF, then an empty line */
			for (;;) {
				const char *nl = memchr(in + i, '\n', in_len - i);
				if (!nl)
					goto more;
				size_t line_len = (size_t)(nl - (in + i));
				if (line_len == 0 || in[i + line_len - 1] != '\r')
					goto out;
				i += line_len + 1;
				if (line_len == 1)
					break;
			}
			break;
		}
		if (size > max || len > max - size)
			goto out;
		if (in_len - i < size + 2)
			goto more;
		if (in[i + size] != '\r' || in[i + size + 1] != '\n')
			goto out;
		if (len + size + 1 > cap) {
			size_t ncap = cap ? cap : 1024;
			while (ncap < len + size + 1)
				ncap *= 2;
			char *nb = realloc(buf, ncap);
			if (!nb)
				goto out;
			buf = nb;
			cap = ncap;
		}
		memcpy(buf + len, in + i, size);
		len += size;
		i += size + 2;
	}
	if (!buf) {
		buf = malloc(1);
		if (!buf)
			goto out;
	}
	buf[len] = '\0';
	*out = buf;
	*out_len = len;
	return 0;
more:
	rc = 1;
out:
	free(buf);
	return rc;
}

/* Look the host up within the deadline: numeric hosts at once, names through
 * getaddrinfo_a so that a dead DNS server cannot hang the client. */
static httpc_err_t resolve(const httpc_url_t *u, long long deadline_ms, struct addrinfo **res,
                           char *err, size_t err_len)
{
	struct addrinfo hints = {.ai_family = AF_UNSPEC,
	                         .ai_socktype = SOCK_STREAM,
	                         .ai_flags = AI_NUMERICHOST | AI_NUMERICSERV};
	int rc = getaddrinfo(u->host, u->port, &hints, res);
	if (rc == 0)
		return HTTPC_OK;
	if (rc != EAI_NONAME) {
		snprintf(err, err_len, "%s", gai_strerror(rc));
		return HTTPC_E_RESOLVE;
	}
	/* Everything the lookup thread reads lives on the heap, so that a lookup
	 * that cannot be cancelled may finish after we return (a rare small leak). */
	struct lookup {
		struct gaicb cb;
		struct addrinfo hints;
		char host[sizeof u->host];
		char port[sizeof u->port];
	} *lk = calloc(1, sizeof *lk);
	if (!lk)
		return HTTPC_E_NOMEM;
	memcpy(lk->host, u->host, sizeof lk->host);
	memcpy(lk->port, u->port, sizeof lk->port);
	lk->hints = hints;
	lk->hints.ai_flags = AI_NUMERICSERV;
	lk->cb.ar_name = lk->host;
	lk->cb.ar_service = lk->port;
	lk->cb.ar_request = &lk->hints;
	struct gaicb *list[1] = {&lk->cb};
	if (getaddrinfo_a(GAI_NOWAIT, list, 1, NULL)) {
		free(lk);
		snprintf(err, err_len, "cannot start the name lookup of '%s'", u->host);
		return HTTPC_E_RESOLVE;
	}
	while (gai_error(&lk->cb) == EAI_INPROGRESS) {
		int ms = left_ms(deadline_ms);
		if (ms == 0) {
			int c = gai_cancel(&lk->cb);
			if (c == EAI_ALLDONE && gai_error(&lk->cb) == 0)
				freeaddrinfo(lk->cb.ar_result);
			if (c == EAI_CANCELED || c == EAI_ALLDONE)
				free(lk);
			snprintf(err, err_len, "looking up '%s' took too long", u->host);
			return HTTPC_E_TIMEOUT;
		}
		struct timespec ts = {ms / 1000, (long)(ms % 1000) * 1000000L};
		gai_suspend((const struct gaicb *const *)list, 1, &ts);
	}
	rc = gai_error(&lk->cb);
	*res = lk->cb.ar_result;
	free(lk);
	if (rc) {
		snprintf(err, err_len, "unknown host '%s' (%s)", u->host, gai_strerror(rc));
		return HTTPC_E_RESOLVE;
	}
	return HTTPC_OK;
}

static httpc_err_t connect_any(const struct addrinfo *ai, long long deadline_ms, int *fd_out,
                               char *err, size_t err_len)
{
	int last = ECONNREFUSED;
	for (; ai; ai = ai->ai_next) {
		int fd = socket(ai->ai_family, ai->ai_socktype | SOCK_NONBLOCK | SOCK_CLOEXEC,
		                ai->ai_protocol);
		if (fd < 0) {
			last = errno;
			continue;
		}
		if (connect(fd, ai->ai_addr, ai->ai_addrlen) == 0) {
			*fd_out = fd;
			return HTTPC_OK;
		}
		if (errno == EINPROGRESS) {
			struct pollfd pfd = {.fd = fd, .events = POLLOUT};
			int pr;
			do
				pr = poll(&pfd, 1, left_ms(deadline_ms));
			while (pr < 0 && errno == EINTR);
			if (pr == 0) {
				close(fd);
				snprintf(err, err_len,
				         "no answer to the connection attempt in time");
				return HTTPC_E_TIMEOUT;
			}
			int soerr = 0;
			socklen_t sl = sizeof soerr;
			if (pr > 0 && getsockopt(fd, SOL_SOCKET, SO_ERROR, &soerr, &sl) == 0 &&
			    soerr == 0) {
				*fd_out = fd;
				return HTTPC_OK;
			}
			last = pr < 0 ? errno : soerr;
		} else {
			last = errno;
		}
		close(fd);
	}
	say_errno(err, err_len, last);
	return HTTPC_E_CONNECT;
}

static httpc_err_t send_all(int fd, const char *p, size_t n, long long deadline_ms, char *err,
                            size_t err_len)
{
	while (n) {
		ssize_t k = send(fd, p, n, MSG_NOSIGNAL);
		if (k > 0) {
			p += k;
			n -= (size_t)k;
			continue;
		}
		if (k < 0 && errno == EINTR)
			continue;
		if (k < 0 && errno != EAGAIN && errno != EWOULDBLOCK) {
			say_errno(err, err_len, errno);
			return HTTPC_E_IO;
		}
		struct pollfd pfd = {.fd = fd, .events = POLLOUT};
		int ms = left_ms(deadline_ms);
		if (ms == 0 || poll(&pfd, 1, ms) == 0) {
			snprintf(err, err_len, "sending the request took too long");
			return HTTPC_E_TIMEOUT;
		}
	}
	return HTTPC_OK;
}

/* Read more bytes into *buf. Returns the count, 0 at EOF, -1 with err set. */
static ssize_t recv_some(int fd, char **buf, size_t *len, size_t *cap, size_t limit,
                         long long deadline_ms, httpc_err_t *kind, char *err, size_t err_len)
{
	if (*cap - *len < 4096 + 1) {
		size_t ncap = *cap ? *cap * 2 : 16384;
		if (ncap > limit + 4096 + 1)
			ncap = limit + 4096 + 1;
		if (*len >= limit || ncap <= *len + 1) {
			*kind = HTTPC_E_PROTO;
			snprintf(err, err_len, "the reply is larger than %zu bytes", limit);
			return -1;
		}
		char *nb = realloc(*buf, ncap);
		if (!nb) {
			*kind = HTTPC_E_NOMEM;
			snprintf(err, err_len, "out of memory");
			return -1;
		}
		*buf = nb;
		*cap = ncap;
	}
	for (;;) {
		struct pollfd pfd = {.fd = fd, .events = POLLIN};
		int ms = left_ms(deadline_ms);
		int pr = ms == 0 ? 0 : poll(&pfd, 1, ms);
		if (pr < 0 && errno == EINTR)
			continue;
		if (pr == 0) {
			*kind = HTTPC_E_TIMEOUT;
			snprintf(err, err_len, "no complete reply in time");
			return -1;
		}
		ssize_t k = recv(fd, *buf + *len, *cap - *len - 1, 0);
		if (k < 0 && (errno == EINTR || errno == EAGAIN || errno == EWOULDBLOCK))
			continue;
		if (k < 0) {
			*kind = HTTPC_E_IO;
			say_errno(err, err_len, errno);
			return -1;
		}
		*len += (size_t)k;
		return k;
	}
}

typedef struct head {
	int status;
	bool chunked;
	bool has_length;
	size_t length;
	char *content_type;
} head_t;

/* Parse the status line and headers (text up to and excluding the blank line). */
static int parse_head(char *h, head_t *hd, char *err, size_t err_len)
{
	if (strncmp(h, "HTTP/1.", 7) || !isdigit((unsigned char)h[7]) || h[8] != ' ' ||
	    !isdigit((unsigned char)h[9]) || !isdigit((unsigned char)h[10]) ||
	    !isdigit((unsigned char)h[11]) || (h[12] != ' ' && h[12] != '\r')) {
		snprintf(err, err_len, "the reply is not HTTP/1.x");
		return -1;
	}
	hd->status = (h[9] - '0') * 100 + (h[10] - '0') * 10 + (h[11] - '0');
	char *line = strstr(h, "\r\n");
	while (line) {
		line += 2;
		char *end = strstr(line, "\r\n");
		if (end)
			*end = '\0';
		char *colon = strchr(line, ':');
		if (colon && colon != line) {
			*colon = '\0';
			char *v = colon + 1;
			while (*v == ' ' || *v == '\t')
				v++;
			size_t vl = strlen(v);
			while (vl && (v[vl - 1] == ' ' || v[vl - 1] == '\t'))
				v[--vl] = '\0';
			if (!strcasecmp(line, "Content-Length")) {
				char *e;
				errno = 0;
				unsigned long long cl = strtoull(v, &e, 10);
				if (!isdigit((unsigned char)*v) || *e || errno ||
				    (hd->has_length && hd->length != cl)) {
					snprintf(err, err_len, "bad Content-Length '%s'", v);
					return -1;
				}
				hd->has_length = true;
				hd->length = (size_t)cl;
			} else if (!strcasecmp(line, "Transfer-Encoding")) {
				if (strcasestr(v, "chunked"))
					hd->chunked = true;
			} else if (!strcasecmp(line, "Content-Type") && !hd->content_type) {
				hd->content_type = strdup(v);
			}
		}
		line = end;
	}
	return 0;
}

static httpc_err_t exchange(int fd, const char *head, size_t head_len, const httpc_req_t *req,
                            long long deadline_ms, httpc_resp_t *resp, char *err, size_t err_len)
{
	httpc_err_t kind = send_all(fd, head, head_len, deadline_ms, err, err_len);
	if (kind == HTTPC_OK && req->body && req->body_len)
		kind = send_all(fd, req->body, req->body_len, deadline_ms, err, err_len);
	if (kind != HTTPC_OK)
		return kind;

	char *buf = NULL;
	size_t len = 0, cap = 0, hlen = 0;
	head_t hd = {0};
	const size_t limit = HEADER_MAX + HTTPC_MAX_BODY + 64;
	/* 1. status line and headers */
	for (;;) {
		char *blank = len ? memmem(buf, len, "\r\n\r\n", 4) : NULL;
		if (blank) {
			hlen = (size_t)(blank - buf) + 4;
			break;
		}
		if (len > HEADER_MAX) {
			snprintf(err, err_len, "the reply's headers exceed %d bytes", HEADER_MAX);
			kind = HTTPC_E_PROTO;
			goto fail;
		}
		ssize_t k =
		    recv_some(fd, &buf, &len, &cap, limit, deadline_ms, &kind, err, err_len);
		if (k < 0)
			goto fail;
		if (k == 0) {
			snprintf(err, err_len,
			         len ? "the server closed the connection mid-reply"
			             : "the server closed the connection without replying");
			kind = HTTPC_E_IO;
			goto fail;
		}
	}
	buf[hlen - 2] = '\0';
	if (parse_head(buf, &hd, err, err_len)) {
		kind = HTTPC_E_PROTO;
		goto fail;
	}
	bool no_body = !strcmp(req->method, "HEAD") || hd.status / 100 == 1 || hd.status == 204 ||
	               hd.status == 304;
	if (!no_body && hd.has_length && !hd.chunked && hd.length > HTTPC_MAX_BODY) {
		snprintf(err, err_len, "the reply's body is larger than %u bytes", HTTPC_MAX_BODY);
		kind = HTTPC_E_PROTO;
		goto fail;
	}
	/* 2. the body */
	char *body = NULL;
	size_t body_len = 0;
	for (;;) {
		size_t have = len - hlen;
		if (no_body) {
			body = strdup("");
			break;
		}
		if (hd.chunked) {
			int r = httpc_dechunk(buf + hlen, have, HTTPC_MAX_BODY, &body, &body_len);
			if (r == 0)
				break;
			if (r < 0) {
				snprintf(err, err_len, "bad chunked body in the reply");
				kind = HTTPC_E_PROTO;
				goto fail;
			}
		} else if (hd.has_length && have >= hd.length) {
			body_len = hd.length;
			body = malloc(body_len + 1);
			if (body) {
				memcpy(body, buf + hlen, body_len);
				body[body_len] = '\0';
			}
			break;
		}
		ssize_t k =
		    recv_some(fd, &buf, &len, &cap, limit, deadline_ms, &kind, err, err_len);
		if (k < 0)
			goto fail;
		if (k == 0) {
			if (hd.chunked || hd.has_length) {
				snprintf(err, err_len, "the reply was cut short (%zu body bytes)",
				         len - hlen);
				kind = HTTPC_E_IO;
				goto fail;
			}
			/* no framing: the body runs until the server closes */
			body_len = len - hlen;
			body = malloc(body_len + 1);
			if (body) {
				memcpy(body, buf + hlen, body_len);
				body[body_len] = '\0';
			}
			break;
		}
	}
	if (!body) {
		snprintf(err, err_len, "out of memory");
		kind = HTTPC_E_NOMEM;
		goto fail;
	}
	free(buf);
	resp->status = hd.status;
	resp->content_type = hd.content_type;
	resp->body = body;
	resp->body_len = body_len;
	return HTTPC_OK;
fail:
	free(buf);
	free(hd.content_type);
	return kind;
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
	long long deadline_ms = now_ms() + (req->timeout_ms > 0 ? req->timeout_ms : 10000);

	char hostport[300];
	bool v6 = strchr(u.host, ':') != NULL;
	snprintf(hostport, sizeof hostport, "%s%s%s:%s", v6 ? "[" : "", u.host, v6 ? "]" : "",
	         u.port);
	char *head = NULL;
	int hl = asprintf(&head,
	                  "%s %s%s HTTP/1.1\r\nHost: %s\r\nUser-Agent: stopcock/" STOPCOCK_VERSION
	                  "\r\nAccept: application/json, text/csv, image/svg+xml, */*\r\n"
	                  "Connection: close\r\n%s%s%s",
	                  req->method, u.prefix, path, hostport,
	                  req->token ? "Authorization: Bearer " : "", req->token ? req->token : "",
	                  req->token ? "\r\n" : "");
	if (hl < 0)
		return HTTPC_E_NOMEM;
	if (req->body || strcmp(req->method, "GET")) {
		char *more = NULL;
		hl = asprintf(&more, "%sContent-Type: %s\r\nContent-Length: %zu\r\n\r\n", head,
		              req->content_type ? req->content_type : "application/json",
		              req->body ? req->body_len : 0);
		free(head);
		head = more;
	} else {
		char *more = NULL;
		hl = asprintf(&more, "%s\r\n", head);
		free(head);
		head = more;
	}
	if (hl < 0)
		return HTTPC_E_NOMEM;

	struct addrinfo *ai = NULL;
	httpc_err_t kind = resolve(&u, deadline_ms, &ai, err, err_len);
	if (kind != HTTPC_OK) {
		free(head);
		return kind;
	}
	int fd = -1;
	kind = connect_any(ai, deadline_ms, &fd, err, err_len);
	freeaddrinfo(ai);
	if (kind == HTTPC_OK) {
		kind = exchange(fd, head, (size_t)hl, req, deadline_ms, resp, err, err_len);
		close(fd);
	}
	free(head);
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
