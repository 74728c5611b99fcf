/* http_runs.c: runs, their points and curve, abort, and the result feed. */
#include "http.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "calib.h"
#include "record.h"
#include "svg.h"
#include "text.h"
#include "timefmt.h"
#include "clock.h"

static void db_error(http_reply_t *r)
{
	http_reply_error(r, 500, "database", "the database failed; the request may be retried");
}

static bool is_final(const char *state)
{
	return strcmp(state, "queued") && strcmp(state, "running");
}

/* A pH run on a probe without its own pH needs a valid calibration. */
static bool calibration_ok(http_ctx_t *ctx, station_t *st, const method_t *m, char *msg, size_t cap)
{
	station_snapshot_t s;
	char now[32];
	bool db_err;
	json_t *j;
	calib_result_t cal;
	bool ok;

	if (m->signal != SIGNAL_PH)
		return true;
	station_snapshot(st, &s);
	if (s.has_reading && s.ph_from_probe)
		return true;
	time_format_rfc3339(clock_wall_s(), now);
	/* A valid accepted calibration counts even when a newer one was started
	 * and left unfinished; only without one does the latest of any state
	 * explain the refusal (rejected, expired, still in progress). */
	j = store_calib_latest(ctx->store, station_name(st), true, now, &db_err);
	if (!j)
		j = store_calib_latest(ctx->store, station_name(st), false, now, &db_err);
	if (j && calib_result_from_json(j, &cal) == 0)
		ok = calib_check_for_run(&cal, station_name(st), clock_wall_s(), msg, cap);
	else
		ok = calib_check_for_run(NULL, station_name(st), clock_wall_s(), msg, cap);
	json_decref(j);
	return ok;
}

static void post_run(const http_req_t *q, http_reply_t *r)
{
	http_ctx_t *ctx = q->ctx;
	json_t *body;
	json_error_t jerr;
	const char *station = NULL, *method_id = NULL, *sample_id = NULL;
	double amount = 0;
	station_t *st;
	char *text = NULL, sha[65];
	size_t len = 0;
	long rev = 0;
	station_job_t *job = NULL;
	method_limits_t lim;
	diag_list_t d = DIAG_LIST_INIT;
	char name[METHOD_ID_MAX + 8], msg[512];
	run_record_t *rec = NULL;
	json_t *rj;
	char *rec_text = NULL;
	int64_t id;
	store_status_t ss;

	if (!q->body || !q->body_len) {
		http_reply_error(r, 400, "bad_request",
		                 "the body must be JSON {\"station\",\"method\",\"sample_id\","
		                 "\"amount\"}");
		return;
	}
	body = json_loadb(q->body, q->body_len, JSON_REJECT_DUPLICATES, &jerr);
	if (!body) {
		http_reply_error(r, 400, "bad_json", "request:%d:%d: %s", jerr.line, jerr.column,
		                 jerr.text);
		return;
	}
	if (json_unpack_ex(body, &jerr, JSON_STRICT, "{s:s,s:s,s:s,s:F}", "station", &station,
	                   "method", &method_id, "sample_id", &sample_id, "amount", &amount)) {
		http_reply_error(r, 400, "bad_request", "%s", jerr.text);
		goto out;
	}
	if (!*sample_id || strlen(sample_id) >= sizeof job->sample_id) {
		http_reply_error(r, 400, "bad_request", "sample_id must be 1 to 127 characters");
		goto out;
	}
	if (text_control_at(sample_id, strlen(sample_id), false) != TEXT_NONE) {
		http_reply_error(r, 400, "bad_request",
		                 "sample_id holds a control character (an escape, a newline, ...): "
		                 "send the id as printed on the sample");
		goto out;
	}
	if (!isfinite(amount) || amount <= 0) {
		http_reply_error(r, 400, "bad_request", "amount must be a number above 0");
		goto out;
	}
	st = http_find_station(ctx, station);
	if (!st) {
		http_reply_error(r, 404, "not_found", "no station '%s'", station);
		goto out;
	}
	ss = store_method_latest(ctx->store, method_id, &text, &len, &rev, sha);
	if (ss == STORE_NOT_FOUND) {
		http_reply_error(r, 404, "not_found", "no method '%s'", method_id);
		goto out;
	} else if (ss != STORE_OK) {
		db_error(r);
		goto out;
	}
	job = calloc(1, sizeof *job);
	rec = calloc(1, sizeof *rec);
	if (!job || !rec) {
		http_reply_error(r, 500, "internal", "out of memory");
		goto out;
	}
	snprintf(name, sizeof name, "%s.yaml", method_id);
	http_method_limits(ctx, st, &lim);
	if (method_parse(name, text, len, &lim, &job->method, &d)) {
		char *all = diag_join(&d);
		http_reply_error(r, 422, "invalid_method",
		                 "method '%s' revision %ld cannot run on station %s:\n%s",
		                 method_id, rev, station, all ? all : "");
		free(all);
		goto out;
	}
	if (amount < job->method.sample_min || amount > job->method.sample_max) {
		http_reply_error(r, 400, "bad_request",
		                 "amount %g %s is outside the method's sample range %g to %g",
		                 amount, method_unit_name(job->method.sample_unit),
		                 job->method.sample_min, job->method.sample_max);
		goto out;
	}
	if (!calibration_ok(ctx, st, &job->method, msg, sizeof msg)) {
		http_reply_error(r, 409, "no_calibration", "%s", msg);
		goto out;
	}
	job->amount = amount;
	snprintf(job->sample_id, sizeof job->sample_id, "%s", sample_id);
	time_format_rfc3339(clock_wall_s(), job->queued_at);
	snprintf(job->requested_by, sizeof job->requested_by, "%s", http_actor(q));

	record_init(rec);
	snprintf(rec->station, sizeof rec->station, "%s", station);
	record_set_method(rec, &job->method);
	snprintf(rec->sample.id, sizeof rec->sample.id, "%s", sample_id);
	rec->sample.amount = amount;
	snprintf(rec->queued_at, sizeof rec->queued_at, "%s", job->queued_at);
	snprintf(rec->requested_by, sizeof rec->requested_by, "%s", job->requested_by);
	rec->titrant.titer = 1.0;
	{
		double titer;
		if (store_titrant_get(ctx->store, job->method.titrant_name, &titer, NULL) ==
		        STORE_OK &&
		    titer > 0)
			rec->titrant.titer = titer;
	}
	rj = record_to_json(rec);
	rec_text = rj ? json_dumps(rj, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
	json_decref(rj);
	id = store_run_create(ctx->store,
	                      &(store_run_new_t){.station = station,
	                                         .method_id = method_id,
	                                         .method_revision = job->method.revision,
	                                         .method_sha256 = job->method.sha256,
	                                         .sample_id = sample_id,
	                                         .amount = amount,
	                                         .unit = method_unit_name(job->method.sample_unit),
	                                         .signal = method_signal_name(job->method.signal),
	                                         .queued_at = job->queued_at,
	                                         .record_json = rec_text});
	if (id < 0) {
		db_error(r);
		goto out;
	}
	/* The record's id is known only now. */
	rec->id = id;
	free(rec_text);
	rj = record_to_json(rec);
	rec_text = rj ? json_dumps(rj, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
	json_decref(rj);
	store_run_update(ctx->store, id, NULL, NULL, rec_text);
	job->run_id = id;
	if (station_enqueue(st, job)) {
		/* Refused: nothing of the run remains, only the audit event. */
		if (store_run_discard(ctx->store, id) != STORE_OK)
			station_abort_queued(st, job, "the station's queue is full");
		http_audit(q, station, 0, "run", "refused",
		           "queue full: method %s, sample %s not queued", method_id, sample_id);
		http_reply_error(
		    r, 409, "queue_full",
		    "station %s has %d runs queued, the most it takes; nothing was queued", station,
		    STATION_QUEUE_MAX);
		goto out;
	}
	http_audit(q, station, id, "run", "queued",
	           "method %s revision %ld, sample %s, amount %g %s", method_id,
	           job->method.revision, sample_id, amount,
	           method_unit_name(job->method.sample_unit));
	http_reply_json(r, 201, json_pack("{s:I,s:s}", "id", (json_int_t)id, "state", "queued"));
	snprintf(r->location, sizeof r->location, "/v1/runs/%lld", (long long)id);
out:
	diag_free(&d);
	free(text);
	free(job);
	free(rec);
	free(rec_text);
	json_decref(body);
}

static void get_run(const http_req_t *q, long long id, http_reply_t *r)
{
	bool db_err;
	json_t *j = store_run_json(q->ctx->store, id, &db_err);

	if (j)
		http_reply_json(r, 200, j);
	else if (db_err)
		db_error(r);
	else
		http_reply_error(r, 404, "not_found", "no run %lld", id);
}

static void get_points(const http_req_t *q, long long id, http_reply_t *r)
{
	const char *fmt = http_query(q, "format");
	bool db_err = false;

	if (fmt && !strcmp(fmt, "csv")) {
		char *csv = store_points_csv(q->ctx->store, id, &db_err);
		if (csv)
			http_reply_text(r, 200, "text/csv; charset=utf-8", csv, strlen(csv));
		else if (db_err)
			db_error(r);
		else
			http_reply_error(r, 404, "not_found", "no run %lld", id);
	} else if (fmt && strcmp(fmt, "json")) {
		http_reply_error(r, 400, "bad_request", "format is json or csv (got '%s')", fmt);
	} else {
		json_t *j = store_points_json(q->ctx->store, id, &db_err);
		if (j)
			http_reply_json(r, 200, j);
		else if (db_err)
			db_error(r);
		else
			http_reply_error(r, 404, "not_found", "no run %lld", id);
	}
}

static double num_or_nan(const json_t *j)
{
	return json_is_number(j) ? json_number_value(j) : NAN;
}

static void get_curve(const http_req_t *q, long long id, http_reply_t *r)
{
	bool db_err = false;
	json_t *pts = store_points_json(q->ctx->store, id, &db_err);
	json_t *rec = pts ? store_run_json(q->ctx->store, id, &db_err) : NULL;
	json_t *arr, *eps, *v;
	svg_point_t *sp = NULL;
	svg_endpoint_t se[METHOD_MAX_ENDPOINTS];
	size_t n, ne = 0, i;
	char signal[8] = "ph", title[256];
	bool mv;
	char *svg;

	if (!pts || !rec) {
		json_decref(pts);
		if (db_err)
			db_error(r);
		else
			http_reply_error(r, 404, "not_found", "no run %lld", id);
		return;
	}
	store_run_signal(q->ctx->store, id, signal, sizeof signal);
	mv = !strcmp(signal, "mv");
	arr = json_object_get(pts, "points");
	n = json_array_size(arr);
	sp = calloc(n ? n : 1, sizeof *sp);
	json_array_foreach(arr, i, v)
	{
		sp[i].volume_ml = num_or_nan(json_object_get(v, "volume_ml"));
		sp[i].signal = num_or_nan(json_object_get(v, mv ? "mv" : "ph"));
		sp[i].dpdv = num_or_nan(json_object_get(v, "dpdv"));
	}
	eps = json_object_get(rec, "endpoints");
	json_array_foreach(eps, i, v)
	{
		if (ne == METHOD_MAX_ENDPOINTS)
			break;
		se[ne].volume_ml = num_or_nan(json_object_get(v, "volume_ml"));
		se[ne].signal = num_or_nan(json_object_get(v, mv ? "mv" : "ph"));
		se[ne].label = NULL;
		ne++;
	}
	snprintf(title, sizeof title, "Run %lld: %s, sample %s", id,
	         json_string_value(json_object_get(json_object_get(rec, "method"), "id")) ?: "?",
	         json_string_value(json_object_get(json_object_get(rec, "sample"), "id")) ?: "?");
	svg = svg_curve(sp, n, se, ne,
	                &(svg_opts_t){.title = title, .signal_unit = mv ? "mV" : "pH"});
	if (svg)
		http_reply_text(r, 200, "image/svg+xml", svg, strlen(svg));
	else
		http_reply_error(r, 500, "internal", "out of memory");
	free(sp);
	json_decref(pts);
	json_decref(rec);
}

static void post_abort(const http_req_t *q, long long id, http_reply_t *r)
{
	char state[32], station[CFG_NAME_MAX];
	store_status_t ss =
	    store_run_state(q->ctx->store, id, state, sizeof state, station, sizeof station);
	station_t *st;

	if (ss == STORE_NOT_FOUND) {
		http_reply_error(r, 404, "not_found", "no run %lld", id);
		return;
	}
	if (ss != STORE_OK) {
		db_error(r);
		return;
	}
	if (is_final(state)) {
		http_reply_error(r, 409, "conflict", "run %lld is already %s", id, state);
		return;
	}
	st = http_find_station(q->ctx, station);
	if (!st || station_abort(st, id) != STATION_CMD_OK) {
		http_reply_error(r, 409, "conflict", "run %lld is not on a station of this daemon",
		                 id);
		return;
	}
	http_audit(q, station, id, "abort", "requested", "run %lld aborted through the API", id);
	/* The thread halts the burette within one device deadline and writes
	 * the final record; wait for it (bounded) so the reply is the truth. */
	for (int i = 0; i < 250; i++) {
		if (store_run_state(q->ctx->store, id, state, sizeof state, NULL, 0) == STORE_OK &&
		    is_final(state))
			break;
		nanosleep(&(struct timespec){0, 20 * 1000 * 1000}, NULL);
	}
	http_reply_json(r, 200,
	                json_pack("{s:I,s:s}", "id", (json_int_t)id, "state",
	                          is_final(state) ? state : "aborted"));
}

static bool parse_nonneg(const char *s, long long *out)
{
	if (s && !strcmp(s, "0")) {
		*out = 0;
		return true;
	}
	return http_parse_id(s, out);
}

/* GET /v1/results and /v1/events: one polling contract (after, limit). */
static void get_feed(const http_req_t *q, http_reply_t *r, bool events)
{
	const char *a = http_query(q, "after"), *l = http_query(q, "limit");
	long long after = 0, limit = 100;
	bool db_err;
	json_t *j;

	if (a && !parse_nonneg(a, &after)) {
		http_reply_error(r, 400, "bad_request", "after must be an integer >= 0");
		return;
	}
	if (l && (!http_parse_id(l, &limit) || limit > 1000)) {
		http_reply_error(r, 400, "bad_request", "limit must be an integer 1 to 1000");
		return;
	}
	j = events ? store_events_after(q->ctx->store, after, (int)limit, &db_err)
	           : store_results_after(q->ctx->store, after, (int)limit, &db_err);
	if (j)
		http_reply_json(r, 200, j);
	else
		db_error(r);
}

bool http_route_runs(const http_req_t *q, const char *const *seg, int n, http_reply_t *r)
{
	bool get = !strcmp(q->method, "GET"), post = !strcmp(q->method, "POST");
	long long id;

	if (n < 2 || strcmp(seg[0], "v1"))
		return false;
	if (n == 2 && (!strcmp(seg[1], "results") || !strcmp(seg[1], "events"))) {
		if (get)
			get_feed(q, r, !strcmp(seg[1], "events"));
		else
			http_reply_error(r, 405, "method_not_allowed", "use GET");
		return true;
	}
	if (n == 2 && !strcmp(seg[1], "titrants")) {
		bool db_err;
		json_t *j = get ? store_titrants_json(q->ctx->store, &db_err) : NULL;
		if (!get)
			http_reply_error(r, 405, "method_not_allowed", "use GET");
		else if (j)
			http_reply_json(r, 200, j);
		else
			db_error(r);
		return true;
	}
	if (strcmp(seg[1], "runs") || n > 4)
		return false;
	if (n == 2) {
		if (post)
			post_run(q, r);
		else
			http_reply_error(r, 405, "method_not_allowed", "use POST");
		return true;
	}
	if (!http_parse_id(seg[2], &id)) {
		http_reply_error(r, 400, "bad_request", "a run id is a positive integer (got '%s')",
		                 seg[2]);
		return true;
	}
	if (n == 3 && get)
		get_run(q, id, r);
	else if (n == 4 && get && !strcmp(seg[3], "points"))
		get_points(q, id, r);
	else if (n == 4 && get && !strcmp(seg[3], "curve.svg"))
		get_curve(q, id, r);
	else if (n == 4 && post && !strcmp(seg[3], "abort"))
		post_abort(q, id, r);
	else if (n == 3 || !strcmp(seg[3], "points") || !strcmp(seg[3], "curve.svg") ||
	         !strcmp(seg[3], "abort"))
		http_reply_error(r, 405, "method_not_allowed", "%s is not allowed on %s", q->method,
		                 q->path);
	else
		return false;
	return true;
}
