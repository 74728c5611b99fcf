/* speed_client.c: the curve SVG renderer and the HTTP client's request cost.
 *
 * Target (our own): the curve of a long run (2000 points) renders in under
 * 5 ms, so GET /v1/runs/{id}/curve.svg stays cheap even when a LIMS fetches
 * every curve. The HTTP client is timed against a loopback server that
 * answers every connection with a small canned reply. */
#include <arpa/inet.h>
#include <math.h>
#include <netinet/in.h>
#include <pthread.h>
#include <stdbool.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <unistd.h>

#include "speed.h"
#include "httpc.h"
#include "svg.h"

#define SVG_TARGET_MS 5.0

SPEED(svg_curve_2000_points)
{
	enum { N = 2000, REPS = 50 };
	svg_point_t *pts = malloc(N * sizeof *pts);
	if (!pts)
		return;
	for (int i = 0; i < N; i++) {
		double v = 0.005 * i;
		pts[i].volume_ml = v;
		pts[i].signal = 3.0 + 6.0 / (1.0 + exp(-(v - 8.0) * 6.0));
		pts[i].dpdv = 36.0 * exp(-(v - 8.0) * 6.0) / pow(1.0 + exp(-(v - 8.0) * 6.0), 2);
	}
	svg_endpoint_t ep = {8.0, 6.0, NULL};
	svg_opts_t o = {.title = "Orchard Lane Cider, long run", .signal_unit = "pH"};
	size_t bytes = 0;
	double t0 = speed_cpu_s();
	for (int r = 0; r < REPS; r++) {
		char *s = svg_curve(pts, N, &ep, 1, &o);
		bytes = s ? strlen(s) : 0;
		free(s);
	}
	double ms = (speed_cpu_s() - t0) / REPS * 1e3;
	printf("  svg_curve, %d points: %.2f ms CPU per render, %zu bytes (target < %.0f ms: %s)\n",
	       N, ms, bytes, SVG_TARGET_MS, ms < SVG_TARGET_MS ? "met" : "NOT met");
	free(pts);
}

typedef struct canned {
	int lfd;
	int n;
} canned_t;

static void *canned_main(void *arg)
{
	canned_t *c = arg;
	static const char reply[] = "HTTP/1.1 200 OK\r\nContent-Type: application/json\r\n"
	                            "Content-Length: 15\r\n\r\n{\"status\":\"ok\"}";
	char buf[2048];
	for (int i = 0; i < c->n; i++) {
		int fd = accept(c->lfd, NULL, NULL);
		if (fd < 0)
			break;
		size_t got = 0;
		while (got < sizeof buf - 1) { /* read the request's headers */
			ssize_t k = recv(fd, buf + got, sizeof buf - 1 - got, 0);
			if (k <= 0)
				break;
			got += (size_t)k;
			buf[got] = '\0';
			if (strstr(buf, "\r\n\r\n"))
				break;
		}
		(void)!send(fd, reply, sizeof reply - 1, MSG_NOSIGNAL);
		close(fd);
	}
	return NULL;
}

SPEED(httpc_loopback_request)
{
	enum { REQS = 500 };
	canned_t c = {.lfd = socket(AF_INET, SOCK_STREAM | SOCK_CLOEXEC, 0), .n = REQS};
	struct sockaddr_in a = {.sin_family = AF_INET, .sin_addr.s_addr = htonl(INADDR_LOOPBACK)};
	socklen_t al = sizeof a;
	pthread_t th;
	if (c.lfd < 0 || bind(c.lfd, (struct sockaddr *)&a, sizeof a) || listen(c.lfd, 64) ||
	    getsockname(c.lfd, (struct sockaddr *)&a, &al) ||
	    pthread_create(&th, NULL, canned_main, &c)) {
		printf("  httpc: cannot set up the loopback server\n");
		return;
	}
	char url[64], err[256];
	snprintf(url, sizeof url, "http://127.0.0.1:%d", ntohs(a.sin_port));
	httpc_req_t req = {.method = "GET", .path = "/v1/health", .timeout_ms = 2000};
	int ok = 0;
	double t0 = speed_wall_s();
	for (int i = 0; i < REQS; i++) {
		httpc_resp_t r;
		if (httpc_request(url, &req, &r, err, sizeof err) == HTTPC_OK && r.status == 200)
			ok++;
		httpc_resp_free(&r);
	}
	double us = (speed_wall_s() - t0) / REQS * 1e6;
	pthread_join(th, NULL);
	close(c.lfd);
	printf("  httpc: %d/%d loopback requests, %.0f us each (connect, send, receive, close)\n",
	       ok, REQS, us);
}
