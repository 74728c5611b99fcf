/* test_httpc.c: the HTTP client against a tiny server on a loopback socket. */
#include <arpa/inet.h>
#include <netinet/in.h>
#include <poll.h>
#include <pthread.h>
#include <stdbool.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <time.h>
#include <unistd.h>

#include "harness.h"
#include "httpc.h"

/* One connection: read the request (headers plus Content-Length bytes), then
 * send `reply` in two pieces `split_at` bytes apart with a pause between, then
 * close. With `hang`, send nothing and wait for the client to give up. */
typedef struct srv {
	int lfd;
	int port;
	const char *reply;
	size_t split_at; /* 0: all at once */
	bool hang;
	char req[8192];
	size_t req_len;
	pthread_t th;
} srv_t;

static void *srv_main(void *arg)
{
	srv_t *s = arg;
	struct pollfd pfd = {.fd = s->lfd, .events = POLLIN};
	if (poll(&pfd, 1, 5000) <= 0)
		return NULL;
	int c = accept(s->lfd, NULL, NULL);
	if (c < 0)
		return NULL;
	size_t want = 0;
	for (;;) {
		pfd = (struct pollfd){.fd = c, .events = POLLIN};
		if (poll(&pfd, 1, 5000) <= 0)
			break;
		ssize_t k = recv(c, s->req + s->req_len, sizeof s->req - 1 - s->req_len, 0);
		if (k <= 0)
			break;
		s->req_len += (size_t)k;
		s->req[s->req_len] = '\0';
		char *end = strstr(s->req, "\r\n\r\n");
		if (!end)
			continue;
		const char *cl = strstr(s->req, "Content-Length: ");
		want = (size_t)(end + 4 - s->req) + (cl ? strtoul(cl + 16, NULL, 10) : 0);
		if (s->req_len >= want)
			break;
	}
	if (s->hang) {
		char tmp[64];
		pfd = (struct pollfd){.fd = c, .events = POLLIN};
		if (poll(&pfd, 1, 5000) > 0) /* until the client closes */
			(void)!recv(c, tmp, sizeof tmp, 0);
	} else if (s->reply) {
		size_t n = strlen(s->reply), a = s->split_at && s->split_at < n ? s->split_at : n;
		(void)!send(c, s->reply, a, MSG_NOSIGNAL);
		if (a < n) {
			struct timespec ts = {0, 30 * 1000000L};
			nanosleep(&ts, NULL);
			(void)!send(c, s->reply + a, n - a, MSG_NOSIGNAL);
		}
	}
	close(c);
	return NULL;
}

static bool srv_start(srv_t *s)
{
	s->lfd = socket(AF_INET, SOCK_STREAM | SOCK_CLOEXEC, 0);
	struct sockaddr_in a = {.sin_family = AF_INET, .sin_addr.s_addr = htonl(INADDR_LOOPBACK)};
	socklen_t al = sizeof a;
	if (s->lfd < 0 || bind(s->lfd, (struct sockaddr *)&a, sizeof a) || listen(s->lfd, 4) ||
	    getsockname(s->lfd, (struct sockaddr *)&a, &al))
		return false;
	s->port = ntohs(a.sin_port);
	return pthread_create(&s->th, NULL, srv_main, s) == 0;
}

static void srv_stop(srv_t *s)
{
	pthread_join(s->th, NULL);
	close(s->lfd);
}

static httpc_err_t roundtrip(srv_t *s, const char *prefix, const httpc_req_t *req,
                             httpc_resp_t *resp, char *err, size_t err_len)
{
	char url[128];
	snprintf(url, sizeof url, "http://127.0.0.1:%d%s", s->port, prefix);
	return httpc_request(url, req, resp, err, err_len);
}

TEST(httpc_parse_url_table)
{
	static const struct {
		const char *url, *host, *port, *prefix;
	} good[] = {
	    {"http://127.0.0.1:8470", "127.0.0.1", "8470", ""},
	    {"http://127.0.0.1:8470/", "127.0.0.1", "8470", ""},
	    {"HTTP://lab-pc.local", "lab-pc.local", "80", ""},
	    {"http://[::1]:9000/stopcock/", "::1", "9000", "/stopcock"},
	    {"http://10.0.0.7:1/a/b", "10.0.0.7", "1", "/a/b"},
	};
	for (size_t i = 0; i < sizeof good / sizeof good[0]; i++) {
		httpc_url_t u;
		char err[256] = "";
		CHECK_INT(httpc_parse_url(good[i].url, &u, err, sizeof err), 0);
		CHECK_STR(u.host, good[i].host);
		CHECK_STR(u.port, good[i].port);
		CHECK_STR(u.prefix, good[i].prefix);
	}
	static const char *const bad[] = {"",
	                                  "127.0.0.1:8470",
	                                  "https://127.0.0.1:8470",
	                                  "http://",
	                                  "http://:80",
	                                  "http://host:0",
	                                  "http://host:65536",
	                                  "http://host:12ab",
	                                  "http://user@host:80",
	                                  "http://host/x?y=1",
	                                  "http://[::1"};
	for (size_t i = 0; i < sizeof bad / sizeof bad[0]; i++) {
		httpc_url_t u;
		char err[256] = "";
		CHECK_INT(httpc_parse_url(bad[i], &u, err, sizeof err), -1);
		CHECK(err[0] != '\0');
	}
	char err[256];
	httpc_url_t u;
	httpc_parse_url("https://x", &u, err, sizeof err);
	CHECK(strstr(err, "https is not supported") != NULL);
}

TEST(httpc_post_with_length)
{
	srv_t s = {.reply = "HTTP/1.1 201 Created\r\nContent-Type: application/json\r\n"
	                    "Content-Length: 27\r\n\r\n{\"id\":12,\"state\":\"queued\"}\n"};
	REQUIRE(srv_start(&s));
	httpc_req_t req = {.method = "POST",
	                   .path = "/v1/runs",
	                   .token = "s3cret",
	                   .body = "{\"a\":1}",
	                   .body_len = 7,
	                   .timeout_ms = 3000};
	httpc_resp_t r;
	char err[256];
	httpc_err_t e = roundtrip(&s, "", &req, &r, err, sizeof err);
	srv_stop(&s);
	CHECK_INT(e, HTTPC_OK);
	CHECK_INT(r.status, 201);
	CHECK_STR(r.content_type, "application/json");
	CHECK_STR(r.body, "{\"id\":12,\"state\":\"queued\"}\n");
	CHECK_INT(r.body_len, 27);
	CHECK(strncmp(s.req, "POST /v1/runs HTTP/1.1\r\n", 24) == 0);
	CHECK(strstr(s.req, "\r\nAuthorization: Bearer s3cret\r\n") != NULL);
	CHECK(strstr(s.req, "\r\nContent-Length: 7\r\n") != NULL);
	CHECK(strstr(s.req, "\r\nContent-Type: application/json\r\n") != NULL);
	char host[64];
	snprintf(host, sizeof host, "\r\nHost: 127.0.0.1:%d\r\n", s.port);
	CHECK(strstr(s.req, host) != NULL);
	CHECK(s.req_len > 7 && !strcmp(s.req + s.req_len - 7, "{\"a\":1}"));
	httpc_resp_free(&r);
}

TEST(httpc_chunked_in_pieces)
{
	srv_t s = {.reply = "HTTP/1.1 200 OK\r\nTransfer-Encoding: chunked\r\n\r\n"
	                    "6\r\nt_s,vo\r\n8\r\nlume_ml\n\r\n0\r\n\r\n",
	           .split_at = 55};
	REQUIRE(srv_start(&s));
	httpc_req_t req = {.method = "GET", .path = "/v1/runs/3/points?format=csv"};
	httpc_resp_t r;
	char err[256];
	httpc_err_t e = roundtrip(&s, "/lab/", &req, &r, err, sizeof err);
	srv_stop(&s);
	CHECK_INT(e, HTTPC_OK);
	CHECK_INT(r.status, 200);
	CHECK_STR(r.body, "t_s,volume_ml\n");
	CHECK(r.content_type == NULL);
	CHECK(strncmp(s.req, "GET /lab/v1/runs/3/points?format=csv HTTP/1.1\r\n", 47) == 0);
	CHECK(strstr(s.req, "Authorization") == NULL);
	CHECK(strstr(s.req, "Content-Length") == NULL);
	httpc_resp_free(&r);
}

TEST(httpc_body_until_close_and_errors)
{
	srv_t s = {.reply = "HTTP/1.0 404 Not Found\r\n\r\n{\"error\":{}}"};
	REQUIRE(srv_start(&s));
	httpc_req_t req = {.method = "GET", .path = "/v1/runs/99"};
	httpc_resp_t r;
	char err[256];
	httpc_err_t e = roundtrip(&s, "", &req, &r, err, sizeof err);
	srv_stop(&s);
	CHECK_INT(e, HTTPC_OK);
	CHECK_INT(r.status, 404);
	CHECK_STR(r.body, "{\"error\":{}}");
	httpc_resp_free(&r);

	srv_t cut = {.reply = "HTTP/1.1 200 OK\r\nContent-Length: 100\r\n\r\nonly ten b"};
	REQUIRE(srv_start(&cut));
	e = roundtrip(&cut, "", &req, &r, err, sizeof err);
	srv_stop(&cut);
	CHECK_INT(e, HTTPC_E_IO);
	CHECK(strstr(err, "cut short") != NULL);
	CHECK(r.body == NULL);

	srv_t junk = {.reply = "SSH-2.0-OpenSSH_9.2\r\n\r\n"};
	REQUIRE(srv_start(&junk));
	e = roundtrip(&junk, "", &req, &r, err, sizeof err);
	srv_stop(&junk);
	CHECK_INT(e, HTTPC_E_PROTO);

	srv_t twolen = {.reply =
	                    "HTTP/1.1 200 OK\r\nContent-Length: 2\r\nContent-Length: 3\r\n\r\nabc"};
	REQUIRE(srv_start(&twolen));
	e = roundtrip(&twolen, "", &req, &r, err, sizeof err);
	srv_stop(&twolen);
	CHECK_INT(e, HTTPC_E_PROTO);
}

TEST(httpc_refused_and_timeout)
{
	/* A port that was just free: bind, note it, close, then connect to it. */
	int fd = socket(AF_INET, SOCK_STREAM, 0);
	struct sockaddr_in a = {.sin_family = AF_INET, .sin_addr.s_addr = htonl(INADDR_LOOPBACK)};
	socklen_t al = sizeof a;
	REQUIRE(fd >= 0 && bind(fd, (struct sockaddr *)&a, sizeof a) == 0 &&
	        getsockname(fd, (struct sockaddr *)&a, &al) == 0);
	close(fd);
	char url[64], err[256];
	snprintf(url, sizeof url, "http://127.0.0.1:%d", ntohs(a.sin_port));
	httpc_req_t req = {.method = "GET", .path = "/v1/health", .timeout_ms = 2000};
	httpc_resp_t r;
	CHECK_INT(httpc_request(url, &req, &r, err, sizeof err), HTTPC_E_CONNECT);
	CHECK_STR(err, "connection refused");

	/* A server that accepts and never answers: the deadline ends it. */
	srv_t s = {.hang = true};
	REQUIRE(srv_start(&s));
	req.timeout_ms = 200;
	struct timespec t0, t1;
	clock_gettime(CLOCK_MONOTONIC, &t0);
	httpc_err_t e = roundtrip(&s, "", &req, &r, err, sizeof err);
	clock_gettime(CLOCK_MONOTONIC, &t1);
	srv_stop(&s);
	CHECK_INT(e, HTTPC_E_TIMEOUT);
	double took_s = (double)(t1.tv_sec - t0.tv_sec) + (double)(t1.tv_nsec - t0.tv_nsec) / 1e9;
	CHECK(took_s >= 0.19 && took_s < 3.0); /* loose: a loaded machine may be slow */

	CHECK_INT(httpc_request("ftp://x", &req, &r, err, sizeof err), HTTPC_E_URL);
	req.path = "/v1/x y";
	CHECK_INT(httpc_request("http://127.0.0.1:1", &req, &r, err, sizeof err), HTTPC_E_URL);
}
