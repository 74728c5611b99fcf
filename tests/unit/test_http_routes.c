/* Unit tests for the HTTP route table (daemon/server/http_routes.c): the
 * Allow list of a path, the authorization of a method on a path, and the
 * dispatcher's own answers (404 no such route, 400 for an id that is not a
 * number) without a server. docs/openapi.yaml against the table is
 * tests/e2e/test_openapi.py's. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "harness.h"
#include "http.h"
#include "http_routes.h"

TEST(routes_allow_lists_the_methods_of_a_path)
{
	char b[64];

	CHECK_STR(http_routes_allow("/", b, sizeof b), "GET, HEAD");
	CHECK_STR(http_routes_allow("/www/app.js", b, sizeof b), "GET, HEAD");
	CHECK_STR(http_routes_allow("/metrics", b, sizeof b), "GET, HEAD");
	CHECK_STR(http_routes_allow("/v1/runs", b, sizeof b), "GET, HEAD, POST");
	CHECK_STR(http_routes_allow("/v1/methods/acid", b, sizeof b), "GET, HEAD, PUT");
	CHECK_STR(http_routes_allow("/v1/methods/acid/check", b, sizeof b), "POST");
	CHECK_STR(http_routes_allow("/v1/stations/sim1/halt", b, sizeof b), "POST");
	/* "latest" and {id} are both GET: listed once. */
	CHECK_STR(http_routes_allow("/v1/calibrations/latest", b, sizeof b), "GET, HEAD");
	/* Empty segments are skipped, as they always were. */
	CHECK_STR(http_routes_allow("//v1//runs/", b, sizeof b), "GET, HEAD, POST");
	/* No route has these paths: no Allow, the 404 comes later. */
	CHECK(http_routes_allow("/www/", b, sizeof b) == NULL);
	CHECK(http_routes_allow("/www/a/b.js", b, sizeof b) == NULL);
	CHECK(http_routes_allow("/v1", b, sizeof b) == NULL);
	CHECK(http_routes_allow("/v1/runs/1/2", b, sizeof b) == NULL);
	CHECK(http_routes_allow("/v1/runsx", b, sizeof b) == NULL);
	/* Too small a buffer gives a shorter list, never a cut word. */
	CHECK_STR(http_routes_allow("/v1/runs", b, 10), "GET, HEAD");
}

TEST(routes_known_is_method_and_path)
{
	CHECK(http_routes_known("GET", "/v1/runs"));
	CHECK(http_routes_known("HEAD", "/v1/runs/7/points"));
	CHECK(http_routes_known("POST", "/v1/runs"));
	CHECK(!http_routes_known("DELETE", "/v1/runs"));
	CHECK(!http_routes_known("POST", "/v1/runs/7"));
	CHECK(!http_routes_known("OPTIONS", "/"));
	CHECK(http_routes_known("GET", "/v1/calibrations/latest"));
	CHECK(http_routes_known("POST", "/v1/calibrations/latest/next")); /* {id}, 400 later */
	CHECK(!http_routes_known("GET", "/v1/nowhere"));
}

/* Each write route names the role it needs (docs/api.md, "Roles"). */
TEST(routes_roles)
{
	CHECK_INT(http_routes_auth("PUT", "/v1/methods/acid"), HTTP_ADMIN);
	CHECK_INT(http_routes_auth("POST", "/v1/methods/acid/check"), HTTP_ADMIN);
	CHECK_INT(http_routes_auth("POST", "/v1/runs"), HTTP_WRITE);
	CHECK_INT(http_routes_auth("GET", "/v1/whoami"), HTTP_OPEN);
	CHECK_INT(http_auth_roles(HTTP_OPEN), 0);
	CHECK_INT(http_auth_roles(HTTP_READ), CFG_ROLE_READ);
	CHECK_INT(http_auth_roles(HTTP_WRITE), CFG_ROLE_OPERATE);
	CHECK_INT(http_auth_roles(HTTP_REVIEW), CFG_ROLE_REVIEW);
	CHECK_INT(http_auth_roles(HTTP_ADMIN), CFG_ROLE_ADMIN);
	CHECK_INT(http_auth_roles(HTTP_CURATE), CFG_ROLE_OPERATE | CFG_ROLE_ADMIN);
}

TEST(routes_authorization)
{
	CHECK_INT(http_routes_auth("GET", "/v1/health"), HTTP_OPEN);
	CHECK_INT(http_routes_auth("HEAD", "/v1/health"), HTTP_OPEN);
	CHECK_INT(http_routes_auth("GET", "/"), HTTP_OPEN);
	CHECK_INT(http_routes_auth("GET", "/www/app.js"), HTTP_OPEN);
	CHECK_INT(http_routes_auth("GET", "/metrics"), HTTP_READ);
	CHECK_INT(http_routes_auth("GET", "/v1/stations"), HTTP_READ);
	CHECK_INT(http_routes_auth("GET", "/v1/runs/3/curve.svg"), HTTP_READ);
	CHECK_INT(http_routes_auth("POST", "/v1/runs"), HTTP_WRITE);
	/* No route: a read needs what reads need, anything else a token. */
	CHECK_INT(http_routes_auth("GET", "/v1/nowhere"), HTTP_READ);
	CHECK_INT(http_routes_auth("DELETE", "/v1/nowhere"), HTTP_WRITE);
	CHECK_INT(http_routes_auth("POST", "/v1/health"), HTTP_WRITE);
}

/* Dispatch method on path; the status, the error code and message in msg. */
static int dispatch(http_ctx_t *ctx, const char *method, const char *path, char *msg, size_t cap)
{
	http_req_t q = {.ctx = ctx, .method = method, .path = path};
	http_reply_t r = {0};
	json_t *j;
	const char *m;

	http_routes_dispatch(&q, &r);
	j = r.body ? json_loads(r.body, 0, NULL) : NULL;
	m = json_string_value(json_object_get(json_object_get(j, "error"), "message"));
	snprintf(msg, cap, "%s", m ? m : (r.body ? r.body : ""));
	json_decref(j);
	free(r.body);
	return r.status;
}

TEST(routes_dispatch_answers)
{
	http_ctx_t ctx = {0};
	char msg[600], longpath[600];

	CHECK_INT(dispatch(&ctx, "GET", "/v1/nowhere", msg, sizeof msg), 404);
	CHECK_STR(msg, "no such route: GET /v1/nowhere");
	CHECK_INT(dispatch(&ctx, "GET", "/v1/runs/1/2", msg, sizeof msg), 404);
	CHECK_INT(dispatch(&ctx, "GET", "/v1/runs/abc", msg, sizeof msg), 400);
	CHECK_STR(msg, "a run id is a positive integer (got 'abc')");
	CHECK_INT(dispatch(&ctx, "GET", "/v1/runs/0/points", msg, sizeof msg), 400);
	CHECK_INT(dispatch(&ctx, "POST", "/v1/calibrations/latest/next", msg, sizeof msg), 400);
	CHECK_STR(msg, "a calibration id is a positive integer (got 'latest')");
	/* The handler gets the {name} segment. */
	CHECK_INT(dispatch(&ctx, "POST", "/v1/stations/nope/halt", msg, sizeof msg), 404);
	CHECK_STR(msg, "no station 'nope'");
	CHECK_INT(dispatch(&ctx, "GET", "//v1/health", msg, sizeof msg), 200);
	CHECK(strstr(msg, "\"status\":\"ok\"") != NULL);
	memset(longpath, 'a', sizeof longpath - 1);
	longpath[0] = '/';
	longpath[sizeof longpath - 1] = '\0';
	CHECK_INT(dispatch(&ctx, "GET", longpath, msg, sizeof msg), 404);
	CHECK_STR(msg, "no such route");
}
