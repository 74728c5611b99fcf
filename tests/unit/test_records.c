/* test_records.c: the titer and blank an assay may start with
 * (daemon/server/titer_valid.c), and a corrected version of a run's results
 * (daemon/core/correction.c). */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "config.h"
#include "correction.h"
#include "fixtures.h"
#include "harness.h"
#include "store.h"
#include "timefmt.h"
#include "titer_valid.h"

#define DAY_S 86400.0

static const char *method_named(const char *purpose, const char *name, const char *formula)
{
	static char buf[2048];
	snprintf(buf, sizeof buf,
	         "method: test-method\ntitle: t\nrevision: 1\npurpose: %s\n"
	         "titrant: {name: NaOH 0.1 mol/L, molarity: 0.1000}\n"
	         "sample: {unit: mL, min: 1.0, max: 50.0}\nsignal: mv\n"
	         "start: {stir_s: 5, initial_ml: 0.0}\n"
	         "dosing: {mode: adaptive, step_aim: 30, dose_min_ml: 0.02, dose_max_ml: 1.0}\n"
	         "settle: {wait_min_s: 1, wait_max_s: 20, still_within: 1.2, still_for_s: 2}\n"
	         "detect: {kind: inflection, count: 1, min_jump: 60}\n"
	         "stop: {past_endpoint_ml: 0.5, volume_max_ml: 20, time_max_s: 3600}\n"
	         "results:\n  - {name: %s, formula: '%s', unit: %s, decimals: 2%s}\n",
	         purpose, name, formula, strcmp(name, "acid") ? "1" : "mmol/L",
	         strcmp(name, "acid") ? "" : ", accept: {min: 10, max: 30}");
	return buf;
}

static const char *method_text(const char *purpose, const char *formula)
{
	return method_named(purpose, "acid", formula);
}

static store_t *open_tmp(char dir[64])
{
	char path[128], err[256];
	snprintf(dir, 64, "/tmp/stopcock-rec-XXXXXX");
	if (!mkdtemp(dir))
		return NULL;
	snprintf(path, sizeof path, "%s/t.db", dir);
	return store_open(path, err, sizeof err);
}

static void rm_tmp(const char *dir)
{
	char p[160];
	const char *sfx[] = {"t.db", "t.db-wal", "t.db-shm", "t.db.issued"};
	for (int i = 0; i < 4; i++) {
		snprintf(p, sizeof p, "%s/%s", dir, sfx[i]);
		unlink(p);
	}
	rmdir(dir);
}

static bool ok_at(const cfg_t *c, store_t *s, const method_t *m, double now, char *msg)
{
	bool db_err;
	msg[0] = '\0';
	bool ok = titer_valid_for_run(c, s, m, now, msg, 512, &db_err);
	return ok && !db_err;
}

TEST(titer_missing_expired_and_entered)
{
	char dir[64], msg[512], at[32];
	static method_t m, std;
	cfg_t c;
	memset(&c, 0, sizeof c);
	c.titer_required = true;
	c.titer_valid_days = 30;
	c.blank_valid_days = 7;
	REQUIRE(fixture_method(
	    method_text("assay", "end1_ml * titrant_molarity * titer * 1000 / amount"), &m));
	std = m; /* a standardization determines the titer: it never waits for one */
	std.purpose = PURPOSE_STANDARDIZE;
	store_t *s = open_tmp(dir);
	REQUIRE(s);
	double t0 = 1796000000.0; /* 2026-11-29 */

	/* no titer: refused, saying how to get one; a standardization runs */
	CHECK(!ok_at(&c, s, &m, t0, msg));
	CHECK(strstr(msg, "has no titer") != NULL);
	CHECK(ok_at(&c, s, &std, t0, msg));
	/* unless the lab says its titrant needs none */
	c.titer_required = false;
	CHECK(ok_at(&c, s, &m, t0, msg));
	c.titer_required = true;

	/* a standardized titer: valid for the config's 30 days */
	time_format_rfc3339(t0, at);
	REQUIRE(store_titrant_set(s, "NaOH 0.1 mol/L", 0.1, 1.012, at, 7, NULL) == STORE_OK);
	CHECK(ok_at(&c, s, &m, t0 + 29.9 * DAY_S, msg));
	CHECK(!ok_at(&c, s, &m, t0 + 30.1 * DAY_S, msg));
	CHECK(strstr(msg, "expired") != NULL && strstr(msg, "standardized") != NULL);

	/* entered by hand: its own validity, 90 days */
	REQUIRE(store_titrant_enter(s, "NaOH 0.1 mol/L", 0, 1.000, at, 90, "certificate 4711",
	                            "ana") == STORE_OK);
	CHECK(ok_at(&c, s, &m, t0 + 60 * DAY_S, msg));
	CHECK(!ok_at(&c, s, &m, t0 + 91 * DAY_S, msg));
	CHECK(strstr(msg, "entered") != NULL);
	store_source_t src;
	double titer;
	REQUIRE(store_titrant_get(s, "NaOH 0.1 mol/L", &titer, &src) == STORE_OK);
	CHECK_NEAR(titer, 1.000, 1e-12);
	CHECK_NEAR(src.valid_days, 90, 1e-12);
	CHECK_STR(src.reason, "certificate 4711");
	CHECK_STR(src.by, "ana");
	/* a new titrant entered without its molarity is refused */
	CHECK_INT(store_titrant_enter(s, "HCl 0.1 mol/L", 0, 1.0, at, 30, "x", "ana"),
	          STORE_NOT_FOUND);
	store_close(s);
	rm_tmp(dir);
}

TEST(titer_blank_expires_only_where_a_formula_reads_it)
{
	char dir[64], msg[512], at[32];
	static method_t with_blank, without;
	cfg_t c;
	memset(&c, 0, sizeof c);
	c.titer_required = false;
	c.titer_valid_days = 30;
	c.blank_valid_days = 7;
	REQUIRE(fixture_method(method_text("assay", "(end1_ml - blank_ml) * 1000 / amount"),
	                       &with_blank));
	REQUIRE(fixture_method(method_text("assay", "end1_ml * 1000 / amount"), &without));
	store_t *s = open_tmp(dir);
	REQUIRE(s);
	double t0 = 1796000000.0;
	time_format_rfc3339(t0, at);
	REQUIRE(store_blank_set(s, "NaOH 0.1 mol/L", 0.05, at, 3) == STORE_OK);
	CHECK(ok_at(&c, s, &with_blank, t0 + 6 * DAY_S, msg));
	CHECK(!ok_at(&c, s, &with_blank, t0 + 8 * DAY_S, msg));
	CHECK(strstr(msg, "blank") != NULL && strstr(msg, "expired") != NULL);
	CHECK(ok_at(&c, s, &without, t0 + 8 * DAY_S, msg));
	store_close(s);
	rm_tmp(dir);
}

TEST(correction_recomputes_from_the_same_endpoints)
{
	static method_t m;
	REQUIRE(fixture_method(
	    method_text("assay", "(end1_ml - blank_ml) * titrant_molarity * titer * 1000 / amount"),
	    &m));
	json_t *rec =
	    json_loads("{\"endpoints\":[{\"n\":1,\"volume_ml\":2.05,\"ph\":null,\"mv\":-120.0,"
	               "\"half_ph\":null}],\"results\":[{\"name\":\"acid\",\"value\":20.0,"
	               "\"unit\":\"mmol/L\",\"accept\":\"pass\",\"fallback\":false}]}",
	               0, NULL);
	REQUIRE(rec);
	json_t *out = NULL;
	char why[256] = "";
	correction_in_t in = {.amount = 20.0, .titer = 1.0, .has_blank = true, .blank_ml = 0.05};
	REQUIRE(correction_results(&m, rec, &in, &out, why, sizeof why) == 0);
	json_t *r0 = json_array_get(out, 0);
	CHECK_NEAR(json_number_value(json_object_get(r0, "value")), 10.0, 1e-9);
	CHECK_STR(json_string_value(json_object_get(r0, "accept")), "pass");
	json_decref(out);
	/* a smaller amount: the same endpoint gives more acid, above the limit */
	in.amount = 5.0;
	REQUIRE(correction_results(&m, rec, &in, &out, why, sizeof why) == 0);
	r0 = json_array_get(out, 0);
	CHECK_NEAR(json_number_value(json_object_get(r0, "value")), 40.0, 1e-9);
	CHECK_STR(json_string_value(json_object_get(r0, "accept")), "high");
	json_decref(out);
	/* a doubtful result stays doubtful: the endpoints are the same */
	json_object_set_new(json_array_get(json_object_get(rec, "results"), 0), "accept",
	                    json_string("doubtful"));
	REQUIRE(correction_results(&m, rec, &in, &out, why, sizeof why) == 0);
	CHECK_STR(json_string_value(json_object_get(json_array_get(out, 0), "accept")), "doubtful");
	json_decref(out);
	json_decref(rec);
}
