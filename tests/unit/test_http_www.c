/* Unit tests for the bench page's file names (http_www.c) and the runs list
 * behind GET /v1/runs (store_list.c). */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "harness.h"
#include "http.h"
#include "store.h"

TEST(www_names_accepted)
{
	CHECK(http_www_name_ok("app.js"));
	CHECK(http_www_name_ok("app.css"));
	CHECK(http_www_name_ok("index.html"));
	CHECK(http_www_name_ok("favicon.svg"));
	CHECK(http_www_name_ok("run-view_2.js"));
	CHECK(http_www_name_ok("0.png"));
}

TEST(www_names_refused)
{
	static const char *const bad[] = {
	    "",         ".hidden.js", "..",       "../token",       "a/../b.js",
	    "a/b.js",   "App.js",     "app.JS",   "app.js.bak",     "app",
	    "x..js",    "app.js ",    " app.js",  "app%2e.js",      "-app.js",
	    "_app.js",  "app.exe",    "app.js\n", "stopcockd.yaml", "token",
	    "app.yaml", "é.js",
	};
	for (size_t i = 0; i < sizeof bad / sizeof bad[0]; i++)
		if (http_www_name_ok(bad[i]))
			harness_fail(__FILE__, __LINE__, "accepted '%s'", bad[i]);
	CHECK(!http_www_name_ok(NULL));
	/* 64 bytes and more are refused, 63 are fine. */
	char name[80];
	memset(name, 'a', sizeof name);
	strcpy(name + 60, ".js"); /* 63 bytes */
	CHECK(http_www_name_ok(name));
	memset(name, 'a', sizeof name);
	strcpy(name + 61, ".js"); /* 64 bytes */
	CHECK(!http_www_name_ok(name));
}

TEST(www_content_types)
{
	CHECK_STR(http_www_content_type("index.html"), "text/html; charset=utf-8");
	CHECK_STR(http_www_content_type("app.js"), "text/javascript; charset=utf-8");
	CHECK_STR(http_www_content_type("app.css"), "text/css; charset=utf-8");
	CHECK_STR(http_www_content_type("favicon.svg"), "image/svg+xml");
	CHECK(http_www_content_type("js") == NULL);
	CHECK(http_www_content_type("app.yaml") == NULL);
}

TEST(www_static_urls)
{
	CHECK(http_www_is_static("/"));
	CHECK(http_www_is_static("/www/app.js"));
	CHECK(!http_www_is_static("/www/../token"));
	CHECK(!http_www_is_static("/www/"));
	CHECK(!http_www_is_static("/v1/stations"));
	CHECK(!http_www_is_static("//"));
	CHECK(!http_www_is_static(NULL));
}

static int64_t new_run(store_t *s, const char *station, const char *queued_at)
{
	return store_run_create(s, &(store_run_new_t){.station = station,
	                                              .method_id = "cider-acidity",
	                                              .method_revision = 1,
	                                              .method_sha256 = "00",
	                                              .sample_id = "OLC-12",
	                                              .amount = 10.0,
	                                              .unit = "mL",
	                                              .signal = "ph",
	                                              .queued_at = queued_at,
	                                              .record_json = NULL});
}

static size_t count(store_t *s, store_runs_filter_t f)
{
	bool db_err = true;
	json_t *j = store_runs_list(s, &f, &db_err);
	size_t n;
	if (!j || db_err) {
		json_decref(j);
		return (size_t)-1;
	}
	n = json_array_size(json_object_get(j, "runs"));
	json_decref(j);
	return n;
}

TEST(store_runs_list_filters)
{
	char dir[] = "/tmp/stopcock-www-XXXXXX", path[64], err[256];
	store_t *s;
	int64_t a, b, c;
	bool db_err;
	json_t *j, *runs;

	REQUIRE(mkdtemp(dir));
	snprintf(path, sizeof path, "%s/db.sqlite", dir);
	s = store_open(path, err, sizeof err);
	REQUIRE(s);
	a = new_run(s, "sim1", "2026-11-30T09:00:00.000Z");
	b = new_run(s, "sim1", "2026-12-01T10:00:00.000Z");
	c = new_run(s, "sim2", "2026-12-01T11:00:00.000Z");
	REQUIRE(a > 0 && b > a && c > b);
	CHECK(store_run_finish(s, b, "finished",
	                       "{\"results\":[{\"name\":\"acidity\",\"value\":5.1,\"unit\":\"g/L\","
	                       "\"accept\":\"pass\"}]}",
	                       NULL) == STORE_OK);

	CHECK_INT(count(s, (store_runs_filter_t){0}), 3);
	CHECK_INT(count(s, (store_runs_filter_t){.station = "sim1"}), 2);
	CHECK_INT(count(s, (store_runs_filter_t){.station = "sim9"}), 0);
	CHECK_INT(count(s, (store_runs_filter_t){.state = "queued"}), 2);
	CHECK_INT(count(s, (store_runs_filter_t){.state = "finished"}), 1);
	CHECK_INT(count(s, (store_runs_filter_t){.since = "2026-12-01"}), 2);
	CHECK_INT(count(s, (store_runs_filter_t){.until = "2026-12-01"}), 1);
	CHECK_INT(count(s, (store_runs_filter_t){.since = "2026-12-01", .station = "sim1"}), 1);
	CHECK_INT(count(s, (store_runs_filter_t){.before_id = c}), 2);
	CHECK_INT(count(s, (store_runs_filter_t){.limit = 1}), 1);

	/* Newest first; the finished run carries its results and state. */
	j = store_runs_list(s, &(store_runs_filter_t){0}, &db_err);
	REQUIRE(j);
	runs = json_object_get(j, "runs");
	CHECK_INT(json_integer_value(json_object_get(json_array_get(runs, 0), "id")), c);
	{
		json_t *row = json_array_get(runs, 1);
		CHECK_STR(json_string_value(json_object_get(row, "state")), "finished");
		CHECK_NEAR(json_real_value(json_object_get(
		               json_array_get(json_object_get(row, "results"), 0), "value")),
		           5.1, 1e-12);
		CHECK(json_integer_value(json_object_get(row, "seq")) >= 1);
		CHECK(json_is_null(json_object_get(json_array_get(runs, 0), "seq")));
	}
	json_decref(j);
	store_close(s);
	unlink(path);
	{
		char side[80];
		snprintf(side, sizeof side, "%s-wal", path);
		unlink(side);
		snprintf(side, sizeof side, "%s-shm", path);
		unlink(side);
	}
	rmdir(dir);
}
