/* http_series.c: series of samples (series.h; docs/api.md, "Series"). */
#include "http.h"
#include "http_routes.h"

#include <stdio.h>
#include <string.h>

#include "series.h"

static void reply_error(http_reply_t *r, series_error_t e, const char *msg)
{
	static const struct {
		int status;
		const char *code;
	} replies[] = {
	    [SERIES_OK] = {200, ""},
	    [SERIES_BAD_REQUEST] = {400, "bad_request"},
	    [SERIES_NOT_FOUND] = {404, "not_found"},
	    [SERIES_INVALID_METHOD] = {422, "invalid_method"},
	    [SERIES_CONFLICT] = {409, "conflict"},
	    [SERIES_DATABASE] = {500, "database"},
	};
	http_reply_error(r, replies[e].status, replies[e].code, "%s", msg);
}

static bool service_up(const http_req_t *q, http_reply_t *r)
{
	if (q->ctx->series)
		return true;
	http_reply_error(r, 503, "unavailable", "the series service is not running");
	return false;
}

void http_post_series(const http_req_t *q, http_reply_t *r)
{
	json_error_t jerr;
	json_t *body;
	char err[512];
	int64_t id = 0;
	series_error_t e;

	if (!service_up(q, r))
		return;
	body = q->body && q->body_len
	           ? json_loadb(q->body, q->body_len, JSON_REJECT_DUPLICATES, &jerr)
	           : NULL;
	if (!body || !json_is_object(body)) {
		if (body)
			http_reply_error(
			    r, 400, "bad_request",
			    "the body must be a JSON object {\"station\",\"samples\"}");
		else if (q->body && q->body_len)
			http_reply_error(r, 400, "bad_json", "request:%d:%d: %s", jerr.line,
			                 jerr.column, jerr.text);
		else
			http_reply_error(
			    r, 400, "bad_request",
			    "the body must be JSON {\"station\",\"samples\",\"on_failure\"}");
		json_decref(body);
		return;
	}
	e = series_submit(q->ctx->series, body, http_actor(q), &id, err, sizeof err);
	if (e == SERIES_OK) {
		http_audit(q, json_string_value(json_object_get(body, "station")), 0, "series",
		           "queued", "series %lld of %zu samples", (long long)id,
		           json_array_size(json_object_get(body, "samples")));
		http_reply_json(r, 201,
		                json_pack("{s:I,s:s}", "id", (json_int_t)id, "state", "queued"));
		snprintf(r->location, sizeof r->location, "/v1/series/%lld", (long long)id);
	} else {
		reply_error(r, e, err);
	}
	json_decref(body);
}

void http_get_series(const http_req_t *q, http_reply_t *r)
{
	bool db_err;
	json_t *j = store_series_json(q->ctx->store, q->id, &db_err);
	if (j)
		http_reply_json(r, 200, j);
	else if (db_err)
		http_reply_error(r, 500, "database",
		                 "the database failed; the request may be retried");
	else
		http_reply_error(r, 404, "not_found", "no series %lld", q->id);
}

void http_get_series_list(const http_req_t *q, http_reply_t *r)
{
	const char *l = http_query(q, "limit");
	long long limit = 50;
	bool db_err;
	json_t *j;
	if (l && (!http_parse_id(l, &limit) || limit > 1000)) {
		http_reply_error(r, 400, "bad_request", "limit must be an integer 1 to 1000");
		return;
	}
	j = store_series_list(q->ctx->store, (int)limit, &db_err);
	if (j)
		http_reply_json(r, 200, j);
	else
		http_reply_error(r, 500, "database",
		                 "the database failed; the request may be retried");
}

void http_get_series_feed(const http_req_t *q, http_reply_t *r)
{
	const char *a = http_query(q, "after"), *l = http_query(q, "limit");
	long long after = 0, limit = 100;
	bool db_err;
	json_t *j;
	if (a && strcmp(a, "0") && !http_parse_id(a, &after)) {
		http_reply_error(r, 400, "bad_request", "after must be an integer >= 0");
		return;
	}
	if (l && (!http_parse_id(l, &limit) || limit > 1000)) {
		http_reply_error(r, 400, "bad_request", "limit must be an integer 1 to 1000");
		return;
	}
	j = store_series_after(q->ctx->store, after, (int)limit, &db_err);
	if (j)
		http_reply_json(r, 200, j);
	else
		http_reply_error(r, 500, "database",
		                 "the database failed; the request may be retried");
}

static void command(const http_req_t *q, http_reply_t *r, bool next)
{
	char err[300];
	series_error_t e;
	if (!service_up(q, r))
		return;
	e = next ? series_next(q->ctx->series, q->id, err, sizeof err)
	         : series_abort(q->ctx->series, q->id, err, sizeof err);
	if (e != SERIES_OK) {
		reply_error(r, e, err);
		return;
	}
	http_audit(q, NULL, 0, "series", next ? "next" : "abort", "series %lld: %s", q->id,
	           next ? "the operator placed the next beaker" : "abort requested");
	http_reply_json(
	    r, 202,
	    json_pack("{s:I,s:s}", "id", (json_int_t)q->id, "requested", next ? "next" : "abort"));
}

void http_post_series_abort(const http_req_t *q, http_reply_t *r)
{
	command(q, r, false);
}

void http_post_series_next(const http_req_t *q, http_reply_t *r)
{
	command(q, r, true);
}

void http_post_series_weight(const http_req_t *q, http_reply_t *r)
{
	char err[300];
	if (!service_up(q, r))
		return;
	json_error_t jerr;
	json_t *body = q->body && q->body_len
	                   ? json_loadb(q->body, q->body_len, JSON_REJECT_DUPLICATES, &jerr)
	                   : NULL;
	if (!body || !json_is_object(body)) {
		json_decref(body);
		http_reply_error(r, 400, "bad_request",
		                 "the body must be JSON {\"value\",\"unit\",\"reason\"}");
		return;
	}
	json_t *v = json_object_get(body, "value");
	const char *unit = json_string_value(json_object_get(body, "unit"));
	const char *reason = json_string_value(json_object_get(body, "reason"));
	series_error_t e =
	    series_weight(q->ctx->series, q->id, json_is_number(v) ? json_number_value(v) : 0, unit,
	                  reason, err, sizeof err);
	if (e != SERIES_OK) {
		json_decref(body);
		reply_error(r, e, err);
		return;
	}
	http_audit(q, NULL, 0, "series", "weight", "series %lld: typed %g %s: %s", q->id,
	           json_number_value(v), unit, reason);
	json_decref(body);
	http_reply_json(r, 202,
	                json_pack("{s:I,s:s}", "id", (json_int_t)q->id, "requested", "weight"));
}
