/* http_calib.c: electrode calibrations (the logic is calib.h's; the station
 * thread measures). */
#include "http.h"
#include "http_routes.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

void http_post_calibration(const http_req_t *q, http_reply_t *r)
{
	json_t *body, *bufs = NULL, *v;
	json_error_t jerr;
	const char *station = NULL;
	double buffers[CALIB_MAX_BUFFERS];
	int n = 0;
	size_t i;
	station_t *st;
	int64_t id = 0;
	char err[256];
	bool bad;

	body = q->body ? json_loadb(q->body, q->body_len, JSON_REJECT_DUPLICATES, &jerr) : NULL;
	if (!body) {
		http_reply_error(r, 400, "bad_json", "request:%d:%d: %s", q->body ? jerr.line : 0,
		                 q->body ? jerr.column : 0,
		                 q->body ? jerr.text : "the body must be JSON");
		return;
	}
	if (json_unpack_ex(body, &jerr, JSON_STRICT, "{s:s,s:o}", "station", &station, "buffers",
	                   &bufs) ||
	    !json_is_array(bufs)) {
		http_reply_error(r, 400, "bad_request", "%s",
		                 bufs ? "buffers must be a list of pH values" : jerr.text);
		goto out;
	}
	json_array_foreach(bufs, i, v)
	{
		if (!json_is_number(v) || n == CALIB_MAX_BUFFERS) {
			http_reply_error(r, 400, "bad_request",
			                 "buffers must be 2 to %d numbers (pH)", CALIB_MAX_BUFFERS);
			goto out;
		}
		buffers[n++] = json_number_value(v);
	}
	st = http_find_station(q->ctx, station);
	if (!st) {
		http_reply_error(r, 404, "not_found", "no station '%s'", station);
		goto out;
	}
	if (station_calib_start(st, buffers, n, http_actor(q), &id, err, sizeof err, &bad)) {
		http_reply_error(r, bad ? 400 : 409, bad ? "bad_request" : "conflict", "%s", err);
		goto out;
	}
	http_audit(q, station, 0, "calibration", "started", "calibration %lld with %d buffers",
	           (long long)id, n);
	http_reply_json(r, 201,
	                json_pack("{s:I,s:s,s:f}", "id", (json_int_t)id, "state", "waiting",
	                          "next_buffer", buffers[0]));
	snprintf(r->location, sizeof r->location, "/v1/calibrations/%lld", (long long)id);
out:
	json_decref(body);
}

static void reply_calib(http_reply_t *r, json_t *j, bool db_err, const char *what)
{
	if (j)
		http_reply_json(r, 200, j);
	else if (db_err)
		http_reply_error(r, 500, "database", "the database failed");
	else
		http_reply_error(r, 404, "not_found", "no calibration %s", what);
}

void http_post_calibration_next(const http_req_t *q, http_reply_t *r)
{
	long long id = q->id;
	bool db_err;
	json_t *j = store_calib_json(q->ctx->store, id, &db_err);
	const char *station;
	station_t *st;
	char err[256];

	if (!j) {
		reply_calib(r, NULL, db_err, "with this id");
		return;
	}
	station = json_string_value(json_object_get(j, "station"));
	st = station ? http_find_station(q->ctx, station) : NULL;
	if (!st || station_calib_next(st, id, err, sizeof err)) {
		http_reply_error(r, 409, "conflict", "%s",
		                 st ? err : "the calibration's station is not configured");
		json_decref(j);
		return;
	}
	http_audit(q, station, 0, "calibration", "next",
	           "calibration %lld: buffer in place, measuring", id);
	json_decref(j);
	/* The thread stores `measuring` at its next step (<= 0.25 s); answer
	 * with the stored state once it has. */
	for (int i = 0; i < 50; i++) {
		j = store_calib_json(q->ctx->store, id, &db_err);
		if (!j)
			break;
		if (strcmp(json_string_value(json_object_get(j, "state")) ?: "", "waiting"))
			break;
		json_decref(j);
		j = NULL;
		nanosleep(&(struct timespec){0, 20 * 1000 * 1000}, NULL);
	}
	if (!j)
		j = store_calib_json(q->ctx->store, id, &db_err);
	reply_calib(r, j, db_err, "with this id");
}

void http_get_calibration_latest(const http_req_t *q, http_reply_t *r)
{
	const char *station = http_query(q, "station");
	bool db_err;

	if (!station || !http_find_station(q->ctx, station)) {
		http_reply_error(r, station ? 404 : 400, station ? "not_found" : "bad_request",
		                 station ? "no station '%s'" : "%s",
		                 station ? station : "give ?station=NAME");
	} else {
		/* Read first: an argument list does not order the call before
		 * the read of db_err (UBSan saw an uninitialised bool). */
		json_t *j = store_calib_latest(q->ctx->store, station, false, NULL, &db_err);
		reply_calib(r, j, db_err, "for this station");
	}
}

void http_get_calibration(const http_req_t *q, http_reply_t *r)
{
	bool db_err;
	json_t *j = store_calib_json(q->ctx->store, q->id, &db_err);

	reply_calib(r, j, db_err, "with this id");
}
