/* http_runs.c: runs (the list, one run, its points and curve, abort), the
 * result and event feeds, and the titrants. */
#include "http.h"
#include "http_routes.h"

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

#define RUN_STATES    "queued running finished aborted failed interrupted"
#define TIME_TEXT_MAX 32

static void db_error(http_reply_t *r)
{
	http_reply_error(r, 500, "database", "the database failed; the request may be retried");
}

static bool is_final(const char *state)
{
	return strcmp(state, "queued") && strcmp(state, "running");
}

void http_post_run(const http_req_t *q, http_reply_t *r)
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
	    [SUBMIT_NO_TITER] = {409, "no_titer"},
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
	json_t *pos = NULL;
	if (json_unpack_ex(body, &jerr, JSON_STRICT, "{s:s,s:s,s:s,s:F,s?o}", "station",
	                   &req.station, "method", &req.method_id, "sample_id", &req.sample_id,
	                   "amount", &req.amount, "position", &pos)) {
		http_reply_error(r, 400, "bad_request", "%s", jerr.text);
		json_decref(body);
		return;
	}
	if (pos && !json_is_null(pos)) {
		if (!json_is_integer(pos) || json_integer_value(pos) < 1 ||
		    json_integer_value(pos) > 1000000) {
			http_reply_error(r, 400, "bad_request",
			                 "position must be a whole number of 1 or more (the rack "
			                 "position of the sample)");
			json_decref(body);
			return;
		}
		req.position = (int)json_integer_value(pos);
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

/* ---- GET /v1/runs: the runs list, filtered (for the page) ---- */

static bool word_in(const char *w, const char *list)
{
	size_t n = strlen(w);
	for (const char *p = list; (p = strstr(p, w)); p += n)
		if ((p == list || p[-1] == ' ') && (p[n] == ' ' || p[n] == '\0'))
			return n > 0;
	return false;
}

/* n digits at *p as a number in [lo, hi]; advances *p. */
static bool digits_in(const char **p, int n, int lo, int hi, int *out)
{
	int v = 0;
	for (int i = 0; i < n; i++) {
		if ((*p)[i] < '0' || (*p)[i] > '9')
			return false;
		v = v * 10 + ((*p)[i] - '0');
	}
	*p += n;
	*out = v;
	return v >= lo && v <= hi;
}

/* A real date or UTC time, whole or cut after a field: YYYY[-MM[-DD
 * [THH[:MM[:SS[.fff]]][Z]]]] ("2026-02-30", "2026-13" or "1%00abc" are
 * refused; the store compares it with RFC 3339 text, so a prefix works). */
static bool time_text_ok(const char *s)
{
	static const int mdays[] = {31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31};
	const char *p = s;
	int y, mo, d, v;

	if (strlen(s) >= TIME_TEXT_MAX || !digits_in(&p, 4, 1970, 9999, &y))
		return false;
	if (!*p)
		return true;
	if (*p++ != '-' || !digits_in(&p, 2, 1, 12, &mo))
		return false;
	if (!*p)
		return true;
	if (*p++ != '-' || !digits_in(&p, 2, 1, mdays[mo - 1], &d))
		return false;
	if (mo == 2 && d == 29 && !(y % 4 == 0 && (y % 100 != 0 || y % 400 == 0)))
		return false;
	if (!*p)
		return true;
	if (*p++ != 'T' || !digits_in(&p, 2, 0, 23, &v))
		return false;
	int field = 0;
	for (; field < 2 && *p == ':'; field++) { /* minutes, seconds */
		p++;
		if (!digits_in(&p, 2, 0, 59, &v))
			return false;
	}
	if (*p == '.' && field == 2) { /* a fraction of a second */
		if (p[1] < '0' || p[1] > '9')
			return false;
		for (p++; *p >= '0' && *p <= '9'; p++)
			;
	}
	if (*p == 'Z')
		p++;
	return *p == '\0';
}

static const char *arg(const http_req_t *q, const char *key)
{
	const char *v = http_query(q, key);
	return v && *v ? v : NULL;
}

void http_get_runs(const http_req_t *q, http_reply_t *r)
{
	store_runs_filter_t f = {.station = arg(q, "station"),
	                         .state = arg(q, "state"),
	                         .since = arg(q, "since"),
	                         .until = arg(q, "until"),
	                         .limit = 100};
	const char *limit = arg(q, "limit"), *before = arg(q, "before");
	long long v;
	bool db_err;
	json_t *j;

	if (f.state && !word_in(f.state, RUN_STATES)) {
		http_reply_error(r, 400, "bad_request", "state is one of: %s", RUN_STATES);
		return;
	}
	if (f.station && strlen(f.station) >= CFG_NAME_MAX) {
		http_reply_error(r, 400, "bad_request", "station name too long");
		return;
	}
	if ((f.since && !time_text_ok(f.since)) || (f.until && !time_text_ok(f.until))) {
		http_reply_error(r, 400, "bad_request",
		                 "since and until are dates or UTC times, e.g. 2026-12-01 or "
		                 "2026-12-01T14:00:00Z");
		return;
	}
	if (limit) {
		if (!http_parse_id(limit, &v) || v > 1000) {
			http_reply_error(r, 400, "bad_request",
			                 "limit must be an integer 1 to 1000");
			return;
		}
		f.limit = (int)v;
	}
	if (before) {
		if (!http_parse_id(before, &v)) {
			http_reply_error(r, 400, "bad_request", "before must be a run id");
			return;
		}
		f.before_id = v;
	}
	j = store_runs_list(q->ctx->store, &f, &db_err);
	if (j)
		http_reply_json(r, 200, j);
	else
		db_error(r);
}

/* ---- one run ---- */

void http_get_run(const http_req_t *q, http_reply_t *r)
{
	long long id = q->id;
	bool db_err;
	json_t *j = store_run_json(q->ctx->store, id, &db_err);

	if (j)
		http_reply_json(r, 200, j);
	else if (db_err)
		db_error(r);
	else
		http_reply_error(r, 404, "not_found", "no run %lld", id);
}

void http_get_points(const http_req_t *q, http_reply_t *r)
{
	long long id = q->id;
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

void http_get_curve(const http_req_t *q, http_reply_t *r)
{
	long long id = q->id;
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

void http_post_abort(const http_req_t *q, http_reply_t *r)
{
	long long id = q->id;
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

void http_get_results(const http_req_t *q, http_reply_t *r)
{
	get_feed(q, r, false);
}

void http_get_events(const http_req_t *q, http_reply_t *r)
{
	get_feed(q, r, true);
}

void http_get_titrants(const http_req_t *q, http_reply_t *r)
{
	bool db_err;
	json_t *j = store_titrants_json(q->ctx->store, &db_err);

	if (j)
		http_reply_json(r, 200, j);
	else
		db_error(r);
}
