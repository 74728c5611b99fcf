/* http_misc.c: health, stations (halt, resume), methods (list, get, put,
 * check) and /metrics. */
#include "http.h"
#include "http_routes.h"

#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "series.h"
#include "station.h"
#include "mqtt_pub.h"
#include "clock.h"
#include "names.h"
#include "sbuf.h"

static json_t *real_or_null(bool have, double v)
{
	return have && isfinite(v) ? json_real(v) : json_null();
}

json_t *http_station_json(struct series_service *sv, station_t *st)
{
	station_snapshot_t s;
	json_t *reading, *burette;

	station_snapshot(st, &s);
	json_t *series = sv ? series_on_station(sv, s.name) : NULL;
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
	/* The sample changer as it last answered; null without one. */
	json_t *changer =
	    !s.has_changer ? json_null()
	    : s.changer_known
	        ? json_pack("{s:I,s:s,s:b}", "position", (json_int_t)s.changer_position, "lift",
	                    s.changer_lift, "moving", s.changer_moving)
	        : json_pack("{s:n,s:n,s:n}", "position", "lift", "moving");
	return json_pack("{s:s,s:s,s:o,s:o,s:o,s:o,s:f,s:i,s:o,s:b,s:o,s:o,s:o}", "name", s.name,
	                 "state", state, "phase", s.phase[0] ? json_string(s.phase) : json_null(),
	                 "reading", reading, "burette", burette, "run",
	                 s.run_id ? json_integer(s.run_id) : json_null(), "vessel_max_ml",
	                 s.vessel_max_ml, "queued", s.queued, "error",
	                 s.last_error[0] ? json_string(s.last_error) : json_null(), "held", s.held,
	                 "held_reason", s.held ? json_string(s.held_reason) : json_null(),
	                 "changer", changer, "series", series ? series : json_null());
}

void http_get_stations(const http_req_t *q, http_reply_t *r)
{
	json_t *arr = json_array();
	for (int i = 0; i < q->ctx->n_stations; i++)
		json_array_append_new(arr, http_station_json(q->ctx->series, q->ctx->stations[i]));
	http_reply_json(r, 200, json_pack("{s:o}", "stations", arr));
}

void http_post_halt(const http_req_t *q, http_reply_t *r)
{
	const char *name = q->param;
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

void http_post_resume(const http_req_t *q, http_reply_t *r)
{
	const char *name = q->param;
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

void http_get_methods(const http_req_t *q, http_reply_t *r)
{
	bool db_err;
	json_t *j = store_methods_list(q->ctx->store, &db_err);

	if (j)
		http_reply_json(r, 200, j);
	else
		http_reply_error(r, 500, "database", "the database failed");
}

void http_get_method(const http_req_t *q, http_reply_t *r)
{
	const char *id = q->param;
	bool db_err;
	json_t *j = store_method_json(q->ctx->store, id, &db_err);

	if (j)
		http_reply_json(r, 200, j);
	else if (db_err)
		http_reply_error(r, 500, "database", "the database failed");
	else
		http_reply_error(r, 404, "not_found", "no method '%s'", id);
}

/* Parse the body as method id's text, as PUT stores it and check judges it:
 * named like its file ("ID.yaml", into name), so method_parse checks
 * `method:` against the id, with the limits of every station. NULL with r
 * filled when there is no body, the id is too long or memory ran out; else
 * the method to free, *valid and the diagnostics in d. */
static method_t *parse_body(const http_req_t *q, const char *id, char *name, size_t cap,
                            bool *valid, diag_list_t *d, http_reply_t *r)
{
	method_limits_t lim;
	method_t *m;

	if (!q->body || q->body_len == 0) {
		http_reply_error(r, 400, "bad_request", "the body must be the method's YAML text");
		return NULL;
	}
	if (strlen(id) >= METHOD_ID_MAX) {
		http_reply_error(r, 400, "bad_request", "method id too long");
		return NULL;
	}
	m = malloc(sizeof *m);
	if (!m) {
		http_reply_error(r, 500, "internal", "out of memory");
		return NULL;
	}
	snprintf(name, cap, "%s.yaml", id);
	http_method_limits(q->ctx, NULL, &lim);
	*valid = method_parse(name, q->body, q->body_len, &lim, m, d) == 0;
	return m;
}

void http_put_method(const http_req_t *q, http_reply_t *r)
{
	const char *id = q->param;
	method_t *m;
	diag_list_t d = DIAG_LIST_INIT;
	char name[METHOD_ID_MAX + 8];
	long stored = 0;
	store_status_t st;
	bool valid;

	if (!name_is_id(id, METHOD_ID_MAX)) {
		http_reply_error(r, 400, "bad_request",
		                 "a method id is lower-case letters, digits and '-'");
		return;
	}
	m = parse_body(q, id, name, sizeof name, &valid, &d, r);
	if (!m)
		return;
	if (!valid) {
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

/* ---- POST /v1/methods/{id}/check ---- */

void http_post_method_check(const http_req_t *q, http_reply_t *r)
{
	const char *id = q->param;
	method_t *m;
	diag_list_t d = DIAG_LIST_INIT;
	char name[METHOD_ID_MAX + 8], sha[65];
	char *stored_text = NULL;
	size_t stored_len = 0;
	long stored_rev = 0;
	json_t *diags, *out;
	bool valid;

	/* PUT's parse, so the verdict is PUT's. */
	m = parse_body(q, id, name, sizeof name, &valid, &d, r);
	if (!m)
		return;
	diags = json_array();
	for (size_t i = 0; i < d.n; i++)
		json_array_append_new(diags, json_pack("{s:s,s:i,s:i,s:s}", "file",
		                                       d.v[i].file ? d.v[i].file : name, "line",
		                                       d.v[i].line, "col", d.v[i].col, "message",
		                                       d.v[i].msg ? d.v[i].msg : "invalid"));
	if (store_method_latest(q->ctx->store, id, &stored_text, &stored_len, &stored_rev, sha) !=
	    STORE_OK)
		stored_rev = 0;
	free(stored_text);
	out = json_pack("{s:s,s:b,s:o,s:o,s:o}", "id", id, "valid", valid, "revision",
	                valid ? json_integer(m->revision) : json_null(), "stored_revision",
	                stored_rev > 0 ? json_integer(stored_rev) : json_null(), "diagnostics",
	                diags);
	/* A valid text whose revision is not above the stored one would get 409
	 * from PUT: say so here, so the editor can tell before saving. */
	if (out && valid)
		json_object_set_new(out, "saves", json_boolean(stored_rev < m->revision));
	http_reply_json(r, 200, out);
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
	mqtt_pub_metrics(ctx->mqtt, ctx->store, &b); /* nothing without an mqtt: section */
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

void http_get_metrics(const http_req_t *q, http_reply_t *r)
{
	size_t len;
	char *t = http_metrics_text(q->ctx, &len);

	if (!t)
		http_reply_error(r, 500, "internal", "out of memory");
	else
		http_reply_text(
		    r, 200, "application/openmetrics-text; version=1.0.0; charset=utf-8", t, len);
}

void http_get_health(const http_req_t *q, http_reply_t *r)
{
	http_reply_json(r, 200,
	                json_pack("{s:s,s:s,s:f}", "status", "ok", "version", STOPCOCK_VERSION,
	                          "uptime_s", clock_mono_s() - q->ctx->started_mono_s));
}
