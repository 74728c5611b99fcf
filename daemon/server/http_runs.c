/* http_runs.c: runs, their points and curve, abort, and the result feed. */
#include "http.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "calib.h"
#include "submit.h"
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

static void post_run(const http_req_t *q, http_reply_t *r)
{
	/* Error code, HTTP status and the reply's error word, in submit_error_t order. */
	static const struct {
		int status;
		const char *code;
	} replies[] = {
	    [SUBMIT_OK] = {201, ""},
	    [SUBMIT_BAD_REQUEST] = {400, "bad_request"},
	    [SUBMIT_NOT_FOUND] = {404, "not_found"},
	    [SUBMIT_INVALID_METHOD] = {422, "invalid_method"},
	    [SUBMIT_NO_CALIBRATION] = {409, "no_calibration"},
	    [SUBMIT_QUEUE_FULL] = {409, "queue_full"},
	    [SUBMIT_DATABASE] = {500, "database"},
	    [SUBMIT_NO_MEMORY] = {500, "internal"},
	};
	json_t *body;
	json_error_t jerr;
	run_request_t req = {.requested_by = http_actor(q)};
	run_submit_result_t res;

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
	if (json_unpack_ex(body, &jerr, JSON_STRICT, "{s:s,s:s,s:s,s:F}", "station", &req.station,
	                   "method", &req.method_id, "sample_id", &req.sample_id, "amount",
	                   &req.amount)) {
		http_reply_error(r, 400, "bad_request", "%s", jerr.text);
		json_decref(body);
		return;
	}
	if (run_submit(q->ctx, &req, &res) == SUBMIT_OK) {
		http_audit(q, req.station, res.run_id, "run", "queued",
		           "method %s revision %ld, sample %s, amount %g %s", req.method_id,
		           res.method_revision, req.sample_id, req.amount, res.unit);
		http_reply_json(
		    r, 201,
		    json_pack("{s:I,s:s}", "id", (json_int_t)res.run_id, "state", "queued"));
		snprintf(r->location, sizeof r->location, "/v1/runs/%lld", (long long)res.run_id);
	} else if (res.error == SUBMIT_DATABASE) {
		db_error(r);
	} else {
		if (res.error == SUBMIT_QUEUE_FULL)
			http_audit(q, req.station, 0, "run", "refused",
			           "queue full: method %s, sample %s not queued", req.method_id,
			           req.sample_id);
		http_reply_error(r, replies[res.error].status, replies[res.error].code, "%s",
		                 res.message ? res.message : "out of memory");
	}
	run_submit_done(&res);
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
