/* test_store.c: the SQLite store: schema, method revisions, points, the
 * result feed's seq, interrupted runs after a crash, reopening. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "harness.h"
#include "store.h"
#include "timefmt.h"

static store_t *open_tmp(char dir[64], char path[128])
{
	char err[256];
	snprintf(dir, 64, "/tmp/stopcock-store-XXXXXX");
	if (!mkdtemp(dir))
		return NULL;
	snprintf(path, 128, "%s/t.db", dir);
	return store_open(path, err, sizeof err);
}

static void rm_tmp(const char *dir)
{
	char p[160];
	const char *sfx[] = {"t.db", "t.db-wal", "t.db-shm"};
	for (int i = 0; i < 3; i++) {
		snprintf(p, sizeof p, "%s/%s", dir, sfx[i]);
		unlink(p);
	}
	rmdir(dir);
}

static int64_t new_run(store_t *s, const char *sample)
{
	return store_run_create(s, &(store_run_new_t){.station = "sim1",
	                                              .method_id = "m",
	                                              .method_revision = 1,
	                                              .method_sha256 = "00",
	                                              .sample_id = sample,
	                                              .amount = 10,
	                                              .unit = "mL",
	                                              .signal = "mv",
	                                              .queued_at = "2026-01-01T00:00:00.000Z",
	                                              .record_json = "{\"state\":\"queued\"}"});
}

TEST(store_schema_and_method_revisions)
{
	char dir[64], path[128];
	store_t *s = open_tmp(dir, path);
	long stored = -1;
	char *text = NULL, sha[65];
	size_t len;
	long rev;

	REQUIRE(s);
	CHECK_INT(store_schema_version(s), STORE_SCHEMA_VERSION);
	CHECK_INT(store_method_put(s, "m", 2, "aa", "revision: 2\n", 12, "api", &stored), STORE_OK);
	CHECK_INT(stored, 2);
	/* same bytes at the stored revision: unchanged; other bytes: conflict */
	CHECK_INT(store_method_put(s, "m", 2, "aa", "revision: 2\n", 12, "file", &stored),
	          STORE_UNCHANGED);
	CHECK_INT(store_method_put(s, "m", 2, "bb", "revision: 2 \n", 13, "api", &stored),
	          STORE_CONFLICT);
	CHECK_INT(store_method_put(s, "m", 1, "cc", "revision: 1\n", 12, "api", &stored),
	          STORE_CONFLICT);
	CHECK_INT(stored, 2);
	CHECK_INT(store_method_put(s, "m", 3, "dd", "revision: 3\n", 12, "api", &stored), STORE_OK);
	REQUIRE(store_method_latest(s, "m", &text, &len, &rev, sha) == STORE_OK);
	CHECK_INT(rev, 3);
	CHECK_STR(sha, "dd");
	CHECK_STR(text, "revision: 3\n");
	free(text);
	CHECK_INT(store_method_latest(s, "x", &text, &len, &rev, sha), STORE_NOT_FOUND);
	store_close(s);
	rm_tmp(dir);
}

TEST(store_points_and_result_feed_seq)
{
	char dir[64], path[128], err[256];
	store_t *s = open_tmp(dir, path);
	int64_t a, b, c, seq = 0;
	bool db_err;
	json_t *j;

	REQUIRE(s);
	a = new_run(s, "A");
	b = new_run(s, "B");
	c = new_run(s, "C");
	REQUIRE(a > 0 && b > a && c > b);
	for (int i = 0; i < 3; i++) {
		store_point_t p = {.t_s = i, .volume_ml = 0.1 * i, .mv = 200 - i, .settled = true};
		CHECK_INT(store_point_add(s, a, i, &p, "{\"state\":\"running\"}"), STORE_OK);
	}
	j = store_points_json(s, a, &db_err);
	REQUIRE(j);
	CHECK_INT(json_array_size(json_object_get(j, "points")), 3);
	CHECK(json_is_null(json_object_get(json_array_get(json_object_get(j, "points"), 0), "ph")));
	json_decref(j);
	/* Finishing in the order b, a gives seq 1, 2: the order they ended. */
	CHECK_INT(store_run_finish(s, b, "finished", "{\"ended_at\":\"t\"}", &seq), STORE_OK);
	CHECK_INT(seq, 1);
	CHECK_INT(store_run_finish(s, a, "failed", NULL, &seq), STORE_OK);
	CHECK_INT(seq, 2);
	CHECK_INT(store_run_finish(s, a, "aborted", NULL, &seq), STORE_CONFLICT);
	CHECK_INT(store_run_finish(s, 999, "aborted", NULL, &seq), STORE_NOT_FOUND);
	j = store_results_after(s, 0, 10, &db_err);
	REQUIRE(j);
	CHECK_INT(json_array_size(json_object_get(j, "results")), 2);
	CHECK_INT(json_integer_value(
	              json_object_get(json_array_get(json_object_get(j, "results"), 0), "id")),
	          b);
	CHECK_INT(json_integer_value(json_object_get(j, "next_after")), 2);
	json_decref(j);
	j = store_results_after(s, 2, 10, &db_err);
	CHECK_INT(json_array_size(json_object_get(j, "results")), 0);
	CHECK_INT(json_integer_value(json_object_get(j, "next_after")), 2);
	json_decref(j);
	/* c is left running: a crash. Reopen and mark it interrupted. */
	CHECK_INT(store_run_update(s, c, "running", "dosing", "{\"state\":\"running\"}"), STORE_OK);
	store_close(s);
	s = store_open(path, err, sizeof err);
	REQUIRE(s);
	CHECK_INT(store_interrupt_stale(s, "2026-01-01T01:00:00.000Z", NULL, NULL), 1);
	CHECK_INT(store_interrupt_stale(s, "2026-01-01T01:00:00.000Z", NULL, NULL), 0);
	j = store_run_json(s, c, &db_err);
	REQUIRE(j);
	CHECK_STR(json_string_value(json_object_get(j, "state")), "interrupted");
	/* One code, the words apart (docs/lims.md). */
	CHECK_STR(json_string_value(json_object_get(j, "stop_reason")), "interrupted");
	CHECK_INT(json_integer_value(json_object_get(j, "seq")), 3);
	CHECK(json_is_null(json_object_get(j, "phase")));
	json_decref(j);
	CHECK(store_run_json(s, 12345, &db_err) == NULL && !db_err);
	store_close(s);
	rm_tmp(dir);
}

TEST(store_points_csv_header)
{
	char dir[64], path[128];
	store_t *s = open_tmp(dir, path);
	store_point_t p = {.t_s = 1.5, .volume_ml = 0.25, .mv = 12.5, .has_ph = true, .ph = 6.5};
	bool db_err;
	char *csv;
	int64_t a;

	REQUIRE(s);
	a = new_run(s, "A");
	CHECK_INT(store_point_add(s, a, 0, &p, NULL), STORE_OK);
	csv = store_points_csv(s, a, &db_err);
	REQUIRE(csv);
	CHECK_STR(csv, "t_s,volume_ml,mv,ph,temperature_c,settled,dpdv\n"
	               "1.500,0.2500,12.50,6.500,,0,\n");
	free(csv);
	CHECK(store_points_csv(s, a + 1, &db_err) == NULL);
	store_close(s);
	rm_tmp(dir);
}

TEST(store_time_rfc3339_format)
{
	char t[32];
	time_format_rfc3339(0.25, t);
	CHECK_STR(t, "1970-01-01T00:00:00.250Z");
	time_format_rfc3339(1796160400.0, t);
	CHECK_STR(t, "2026-12-01T21:26:40.000Z");
}

TEST(store_points_rewrite_replaces_in_place)
{
	char dir[64], path[128];
	store_t *s = open_tmp(dir, path);
	store_point_t p[3] = {{.t_s = 0, .volume_ml = 0, .mv = 100},
	                      {.t_s = 1, .volume_ml = 0.5, .mv = 90},
	                      {.t_s = 2, .volume_ml = 1.0, .mv = 60}};
	bool db_err;
	json_t *j, *pts;
	int64_t a;

	REQUIRE(s);
	a = new_run(s, "A");
	for (int i = 0; i < 3; i++)
		CHECK_INT(store_point_add(s, a, i, &p[i], NULL), STORE_OK);
	for (int i = 0; i < 3; i++) {
		p[i].has_dpdv = true;
		p[i].dpdv = -10.0 * (i + 1);
	}
	CHECK_INT(store_points_rewrite(s, a, p, 3), STORE_OK);
	j = store_points_json(s, a, &db_err);
	REQUIRE(j);
	pts = json_object_get(j, "points");
	CHECK_INT(json_array_size(pts), 3);
	CHECK_NEAR(json_real_value(json_object_get(json_array_get(pts, 2), "dpdv")), -30.0, 1e-12);
	CHECK_NEAR(json_real_value(json_object_get(json_array_get(pts, 1), "mv")), 90.0, 1e-12);
	json_decref(j);
	store_close(s);
	rm_tmp(dir);
}

/* The MQTT outbox (docs/mqtt.md): off by default; while on, a run's final
 * state and an event each put a row in the same transaction, oldest first,
 * crash-interrupted runs too; rows go when acknowledged or by the policy. */
TEST(store_outbox_follows_final_runs_and_events)
{
	char dir[64], path[128], err[256];
	store_t *s = open_tmp(dir, path);
	store_outbox_msg_t m[8];
	int64_t a, b, c, ids[2];
	long count;
	double age;

	REQUIRE(s);
	a = new_run(s, "A");
	b = new_run(s, "B");
	c = new_run(s, "C");
	CHECK_INT(store_run_finish(s, a, "finished", NULL, NULL), STORE_OK);
	CHECK_INT(store_outbox_peek(s, 0, m, 8), 0); /* off: nothing */
	CHECK_INT(store_outbox_enable(s, true), STORE_OK);
	CHECK_INT(store_run_update(s, b, "running", "dosing", NULL), STORE_OK);
	CHECK_INT(store_outbox_peek(s, 0, m, 8), 0); /* not final yet */
	CHECK_INT(store_run_finish(s, b, "failed", NULL, NULL), STORE_OK);
	CHECK_INT(store_event_add(s, NULL, "sim1", b, "run", "failed", "x", "daemon"), STORE_OK);
	CHECK_INT(store_run_update(s, c, "running", "dosing", NULL), STORE_OK);
	store_close(s);
	/* c was running: a crash; at the next start it becomes interrupted */
	s = store_open(path, err, sizeof err);
	REQUIRE(s);
	CHECK_INT(store_interrupt_stale(s, "2026-01-01T00:01:00.000Z", NULL, NULL), 1);
	REQUIRE(store_outbox_peek(s, 0, m, 8) == 4);
	CHECK(m[0].is_result && m[0].ref == b);
	CHECK(!m[1].is_result);
	CHECK(m[2].is_result && m[2].ref == c);
	CHECK(!m[3].is_result); /* the interrupted run's audit line */
	CHECK(m[0].id < m[1].id && m[1].id < m[2].id && m[2].id < m[3].id);
	CHECK_INT(store_outbox_peek(s, m[1].id, m, 8), 2);
	CHECK_INT(m[0].ref, c);
	/* acknowledged rows go */
	REQUIRE(store_outbox_peek(s, 0, m, 8) == 4);
	ids[0] = m[0].id;
	ids[1] = m[2].id;
	CHECK_INT(store_outbox_remove(s, ids, 2), STORE_OK);
	CHECK_INT(store_outbox_stats(s, &count, &age, 2e9), 0);
	CHECK_INT(count, 2);
	CHECK(age > 0);
	/* the policy: beyond 1 message the oldest goes; beyond an age all do */
	CHECK_INT(store_outbox_prune(s, 1, 1e10, 2e9), 1);
	REQUIRE(store_outbox_peek(s, 0, m, 8) == 1);
	CHECK_INT(m[0].id, ids[1] + 1);
	CHECK_INT(store_outbox_prune(s, 100, 1.0, 1e10), 1);
	CHECK_INT(store_outbox_peek(s, 0, m, 8), 0);
	/* off again: nothing more */
	CHECK_INT(store_outbox_enable(s, false), STORE_OK);
	CHECK_INT(store_event_add(s, NULL, NULL, 0, "daemon", "start", "x", "daemon"), STORE_OK);
	CHECK_INT(store_outbox_peek(s, 0, m, 8), 0);
	store_close(s);
	rm_tmp(dir);
}
