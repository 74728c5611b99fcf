/* http_misc.c: health, stations, halt, methods and /metrics. */
#include "http.h"

#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "station.h"
#include "clock.h"
#include "names.h"
#include "sbuf.h"

static json_t *real_or_null(bool have, double v)
{
	return have && isfinite(v) ? json_real(v) : json_null();
}

static json_t *station_json(station_t *st)
{
	station_snapshot_t s;
	json_t *reading, *burette;

	station_snapshot(st, &s);
	reading = s.has_reading ? json_pack("{s:o,s:o,s:o,s:o}", "ph", real_or_null(s.has_ph, s.ph),
	                                    "mv", json_real(s.mv), "temperature_c",
	                                    real_or_null(s.has_temperature, s.temperature_c),
	                                    "age_s", json_real(s.reading_age_s))
	                        : json_null();
	burette =
	    json_pack("{s:o,s:o,s:o,s:b}", "dispensed_ml", json_real(s.dispensed_ml), "capacity_ml",
	              real_or_null(s.capacity_ml > 0, s.capacity_ml), "contents_ml",
	              real_or_null(s.has_burette, s.contents_ml), "halt_pending", s.halt_pending);
	/* A held station that runs nothing says so in its state (docs/api.md). */
	const char *state = s.held && !s.run_id && !strcmp(s.state, "idle") ? "held" : s.state;
	return json_pack("{s:s,s:s,s:o,s:o,s:o,s:o,s:f,s:i,s:o,s:b,s:o}", "name", s.name, "state",
	                 state, "phase", s.phase[0] ? json_string(s.phase) : json_null(), "reading",
	                 reading, "burette", burette, "run",
	                 s.run_id ? json_integer(s.run_id) : json_null(), "vessel_max_ml",
	                 s.vessel_max_ml, "queued", s.queued, "error",
	                 s.last_error[0] ? json_string(s.last_error) : json_null(), "held", s.held,
	                 "held_reason", s.held ? json_string(s.held_reason) : json_null());
}

static void get_stations(const http_req_t *q, http_reply_t *r)
{
	json_t *arr = json_array();
	for (int i = 0; i < q->ctx->n_stations; i++)
		json_array_append_new(arr, station_json(q->ctx->stations[i]));
	http_reply_json(r, 200, json_pack("{s:o}", "stations", arr));
}

static void post_halt(const http_req_t *q, const char *name, http_reply_t *r)
{
	station_t *st = http_find_station(q->ctx, name);
	station_snapshot_t s;

	if (!st) {
		http_reply_error(r, 404, "not_found", "no station '%s'", name);
		return;
	}
	station_snapshot(st, &s);
	station_halt(st);
	http_audit(q, name, s.run_id, "halt", "requested", "burette halted through the API");
	http_reply_json(r, 200,
	                json_pack("{s:s,s:b,s:o}", "station", name, "halted", 1, "run",
	                          s.run_id ? json_integer(s.run_id) : json_null()));
}

static void post_resume(const http_req_t *q, const char *name, http_reply_t *r)
{
	station_t *st = http_find_station(q->ctx, name);
	char why[200];
	station_snapshot_t s;

	if (!st) {
		http_reply_error(r, 404, "not_found", "no station '%s'", name);
		return;
	}
	station_snapshot(st, &s);
	switch (station_resume(st, why, sizeof why)) {
	case STATION_RESUME_BLOCKED:
		http_reply_error(r, 409, "conflict", "station %s cannot resume yet: %s", name, why);
		return;
	case STATION_RESUME_NOT_HELD:
		http_reply_json(
		    r, 200,
		    json_pack("{s:s,s:b,s:i}", "station", name, "resumed", 0, "queued", s.queued));
		return;
	case STATION_RESUMED:
		break;
	}
	http_audit(q, name, 0, "resume", "resumed",
	           "station resumed through the API (was held: %s)", s.held_reason);
	http_reply_json(
	    r, 200, json_pack("{s:s,s:b,s:i}", "station", name, "resumed", 1, "queued", s.queued));
}

static void get_method(const http_req_t *q, const char *id, http_reply_t *r)
{
	bool db_err;
	json_t *j = store_method_json(q->ctx->store, id, &db_err);

	if (j)
		http_reply_json(r, 200, j);
	else if (db_err)
		http_reply_error(r, 500, "database", "the database failed");
	else
		http_reply_error(r, 404, "not_found", "no method '%s'", id);
}

static void put_method(const http_req_t *q, const char *id, http_reply_t *r)
{
	method_t *m;
	method_limits_t lim;
	diag_list_t d = DIAG_LIST_INIT;
	char name[METHOD_ID_MAX + 8];
	long stored = 0;
	store_status_t st;

	if (!name_is_id(id, METHOD_ID_MAX)) {
		http_reply_error(r, 400, "bad_request",
		                 "a method id is lower-case letters, digits and '-'");
		return;
	}
	if (!q->body || q->body_len == 0) {
		http_reply_error(r, 400, "bad_request", "the body must be the method's YAML text");
		return;
	}
	m = malloc(sizeof *m);
	if (!m) {
		http_reply_error(r, 500, "internal", "out of memory");
		return;
	}
	/* Named like its file, so method_parse checks `method:` against the id. */
	snprintf(name, sizeof name, "%s.yaml", id);
	http_method_limits(q->ctx, NULL, &lim);
	if (method_parse(name, q->body, q->body_len, &lim, m, &d)) {
		char *msg = diag_join(&d);
		http_reply_error(r, 422, "invalid_method", "%s",
		                 msg && *msg ? msg : "invalid method");
		free(msg);
		goto out;
	}
	st = store_method_put(q->ctx->store, id, m->revision, m->sha256, q->body, q->body_len,
	                      "api", &stored);
	switch (st) {
	case STORE_OK:
	case STORE_UNCHANGED:
		if (st == STORE_OK)
			http_audit(q, NULL, 0, "method", "stored",
			           "method %s revision %ld sha256 %s", id, m->revision, m->sha256);
		http_reply_json(r, st == STORE_OK ? 201 : 200,
		                json_pack("{s:s,s:I,s:s}", "id", id, "revision",
		                          (json_int_t)m->revision, "sha256", m->sha256));
		snprintf(r->location, sizeof r->location, "/v1/methods/%s", id);
		break;
	case STORE_CONFLICT:
		http_reply_error(r, 409, "conflict",
		                 "revision %ld is not above the stored revision %ld of '%s'",
		                 m->revision, stored, id);
		break;
	default:
		http_reply_error(r, 500, "database", "the database failed");
	}
out:
	diag_free(&d);
	free(m);
}

char *http_metrics_text(http_ctx_t *ctx, size_t *out_len)
{
	static const char *const states[] = {"queued",  "running", "finished",
	                                     "aborted", "failed",  "interrupted"};
	long counts[6];
	/* An out-of-memory anywhere makes the whole text NULL (a 500), never a
	 * short page that a scraper would take for the truth. */
	sbuf_t b = SBUF_INIT;
	sbuf_addf(&b, "# TYPE stopcock_runs gauge\n# HELP stopcock_runs Runs by state.\n");
	if (store_run_counts(ctx->store, states, counts, 6) == 0)
		for (int i = 0; i < 6; i++)
			sbuf_addf(&b, "stopcock_runs{state=\"%s\"} %ld\n", states[i], counts[i]);
	sbuf_addf(
	    &b, "# TYPE stopcock_additions counter\n"
	        "# HELP stopcock_additions Doses sent to the burette since the daemon started.\n");
	for (int i = 0; i < ctx->n_stations; i++) {
		station_snapshot_t s;
		station_snapshot(ctx->stations[i], &s);
		sbuf_addf(&b, "stopcock_additions_total{station=\"%s\"} %ld\n", s.name,
		          s.additions_total);
	}
	sbuf_addf(&b,
	          "# TYPE stopcock_reading_age_seconds gauge\n"
	          "# UNIT stopcock_reading_age_seconds seconds\n"
	          "# HELP stopcock_reading_age_seconds Age of the station's last probe reading.\n");
	for (int i = 0; i < ctx->n_stations; i++) {
		station_snapshot_t s;
		station_snapshot(ctx->stations[i], &s);
		if (s.has_reading)
			sbuf_addf(&b, "stopcock_reading_age_seconds{station=\"%s\"} %.3f\n", s.name,
			          s.reading_age_s);
	}
	sbuf_addf(&b, "# TYPE stopcock_wake_lateness_seconds summary\n"
	              "# UNIT stopcock_wake_lateness_seconds seconds\n"
	              "# HELP stopcock_wake_lateness_seconds How late station threads woke for the "
	              "engine's scheduled readings.\n");
	for (int i = 0; i < ctx->n_stations; i++) {
		station_snapshot_t s;
		station_snapshot(ctx->stations[i], &s);
		sbuf_addf(&b,
		          "stopcock_wake_lateness_seconds_count{station=\"%s\"} %ld\n"
		          "stopcock_wake_lateness_seconds_sum{station=\"%s\"} %.6f\n",
		          s.name, s.wake_count, s.name, s.wake_late_sum_s);
	}
	sbuf_addf(&b,
	          "# TYPE stopcock_wake_lateness_max_seconds gauge\n"
	          "# UNIT stopcock_wake_lateness_max_seconds seconds\n"
	          "# HELP stopcock_wake_lateness_max_seconds The largest of those since start.\n");
	for (int i = 0; i < ctx->n_stations; i++) {
		station_snapshot_t s;
		station_snapshot(ctx->stations[i], &s);
		sbuf_addf(&b, "stopcock_wake_lateness_max_seconds{station=\"%s\"} %.6f\n", s.name,
		          s.wake_late_max_s);
	}
	sbuf_addf(&b,
	          "# TYPE stopcock_http_requests counter\n"
	          "# HELP stopcock_http_requests HTTP requests answered, by status class.\n"
	          "stopcock_http_requests_total{class=\"2xx\"} %ld\n"
	          "stopcock_http_requests_total{class=\"4xx\"} %ld\n"
	          "stopcock_http_requests_total{class=\"5xx\"} %ld\n"
	          "# TYPE stopcock_http_auth_failures counter\n"
	          "stopcock_http_auth_failures_total %ld\n"
	          "# TYPE stopcock_http_body_too_large counter\n"
	          "stopcock_http_body_too_large_total %ld\n"
	          "# TYPE stopcock_http_deadline_cuts counter\n"
	          "# HELP stopcock_http_deadline_cuts Connections closed for not delivering a "
	          "request within http.request_deadline_s.\n"
	          "stopcock_http_deadline_cuts_total %ld\n"
	          "# TYPE stopcock_http_busy counter\n"
	          "# HELP stopcock_http_busy Requests answered 503 for their address's "
	          "connection limit.\n"
	          "stopcock_http_busy_total %ld\n"
	          "# TYPE stopcock_uptime_seconds gauge\n"
	          "# UNIT stopcock_uptime_seconds seconds\n"
	          "stopcock_uptime_seconds %.1f\n# EOF\n",
	          atomic_load(&ctx->requests_2xx), atomic_load(&ctx->requests_4xx),
	          atomic_load(&ctx->requests_5xx), atomic_load(&ctx->auth_failures),
	          atomic_load(&ctx->body_too_large), atomic_load(&ctx->deadline_cuts),
	          atomic_load(&ctx->over_limit), clock_mono_s() - ctx->started_mono_s);
	return sbuf_finish(&b, out_len);
}

static void method_not_allowed(const http_req_t *q, http_reply_t *r)
{
	http_reply_error(r, 405, "method_not_allowed", "%s is not allowed on %s", q->method,
	                 q->path);
}

bool http_route_misc(const http_req_t *q, const char *const *seg, int n, http_reply_t *r)
{
	bool get = !strcmp(q->method, "GET");

	if (n == 1 && !strcmp(seg[0], "metrics")) {
		size_t len;
		char *t;
		if (!get) {
			method_not_allowed(q, r);
			return true;
		}
		t = http_metrics_text(q->ctx, &len);
		if (!t)
			http_reply_error(r, 500, "internal", "out of memory");
		else
			http_reply_text(r, 200,
			                "application/openmetrics-text; version=1.0.0; "
			                "charset=utf-8",
			                t, len);
		return true;
	}
	if (n < 2 || strcmp(seg[0], "v1"))
		return false;
	if (n == 2 && !strcmp(seg[1], "health")) {
		if (!get)
			method_not_allowed(q, r);
		else
			http_reply_json(r, 200,
			                json_pack("{s:s,s:s,s:f}", "status", "ok", "version",
			                          STOPCOCK_VERSION, "uptime_s",
			                          clock_mono_s() - q->ctx->started_mono_s));
		return true;
	}
	if (!strcmp(seg[1], "stations")) {
		if (n == 2 && get)
			get_stations(q, r);
		else if (n == 4 && !strcmp(seg[3], "halt") && !strcmp(q->method, "POST"))
			post_halt(q, seg[2], r);
		else if (n == 4 && !strcmp(seg[3], "resume") && !strcmp(q->method, "POST"))
			post_resume(q, seg[2], r);
		else if (n == 2 ||
		         (n == 4 && (!strcmp(seg[3], "halt") || !strcmp(seg[3], "resume"))))
			method_not_allowed(q, r);
		else
			return false;
		return true;
	}
	if (!strcmp(seg[1], "methods")) {
		if (n == 2 && get) {
			bool db_err;
			json_t *j = store_methods_list(q->ctx->store, &db_err);
			if (j)
				http_reply_json(r, 200, j);
			else
				http_reply_error(r, 500, "database", "the database failed");
		} else if (n == 3 && get) {
			get_method(q, seg[2], r);
		} else if (n == 3 && !strcmp(q->method, "PUT")) {
			put_method(q, seg[2], r);
		} else if (n <= 3) {
			method_not_allowed(q, r);
		} else {
			return false;
		}
		return true;
	}
	return false;
}
