/* submit.c: see submit.h. */
#include "submit.h"

#include "text.h"

#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "calib.h"
#include "clock.h"
#include "record.h"
#include "timefmt.h"
#include "titer_valid.h"

static submit_error_t fail(run_submit_result_t *res, submit_error_t e, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));

static submit_error_t fail(run_submit_result_t *res, submit_error_t e, const char *fmt, ...)
{
	va_list ap;
	va_start(ap, fmt);
	if (vasprintf(&res->message, fmt, ap) < 0)
		res->message = NULL;
	va_end(ap);
	res->error = e;
	return e;
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

static char *record_text(const run_record_t *rec, int position)
{
	json_t *rj = record_to_json(rec);
	if (rj)
		json_object_set_new(rj, "position",
		                    position > 0 ? json_integer(position) : json_null());
	char *t = rj ? json_dumps(rj, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
	json_decref(rj);
	return t;
}

submit_error_t run_submit(http_ctx_t *ctx, const run_request_t *req, run_submit_result_t *res)
{
	const char *station = req->station, *method_id = req->method_id;
	const char *sample_id = req->sample_id;
	double amount = req->amount;
	station_t *st;
	char *text = NULL, sha[65];
	size_t len = 0;
	long rev = 0;
	station_job_t *job = NULL;
	method_limits_t lim;
	diag_list_t d = DIAG_LIST_INIT;
	char name[METHOD_ID_MAX + 8], msg[512];
	run_record_t *rec = NULL;
	char *rec_text = NULL;
	int64_t id;
	store_status_t ss;

	memset(res, 0, sizeof *res);
	if (!*sample_id || strlen(sample_id) >= sizeof job->sample_id) {
		fail(res, SUBMIT_BAD_REQUEST, "sample_id must be 1 to 127 characters");
		goto out;
	}
	if (text_control_at(sample_id, strlen(sample_id), false) != TEXT_NONE) {
		fail(res, SUBMIT_BAD_REQUEST,
		     "sample_id holds a control character (an escape, a newline, ...): send the id "
		     "as printed on the sample");
		goto out;
	}
	if (!isfinite(amount) || amount <= 0) {
		fail(res, SUBMIT_BAD_REQUEST, "amount must be a number above 0");
		goto out;
	}
	st = http_find_station(ctx, station);
	if (!st) {
		fail(res, SUBMIT_NOT_FOUND, "no station '%s'", station);
		goto out;
	}
	{
		/* A station with a sample changer titrates only at a named
		 * position: its head goes down nowhere else (SAFETY.md). */
		long positions = 0, rinse = 0, park = 0;
		bool changer = station_changer(st, &positions, &rinse, &park);
		if (req->position < 0) {
			fail(res, SUBMIT_BAD_REQUEST,
			     "position must be a whole number of 1 or more");
			goto out;
		}
		if (req->position > 0 && !changer) {
			fail(res, SUBMIT_BAD_REQUEST,
			     "station %s has no sample changer; leave position out", station);
			goto out;
		}
		if (changer && req->position == 0) {
			fail(res, SUBMIT_BAD_REQUEST,
			     "station %s has a sample changer: give the sample's position (1 to "
			     "%ld)",
			     station, positions);
			goto out;
		}
		if (changer && req->position > positions) {
			fail(res, SUBMIT_BAD_REQUEST,
			     "position %d is outside station %s's rack (1 to %ld)", req->position,
			     station, positions);
			goto out;
		}
		if (changer && (req->position == rinse || req->position == park)) {
			fail(res, SUBMIT_BAD_REQUEST,
			     "position %d is the rack's %s position, not a sample's", req->position,
			     req->position == rinse ? "rinse" : "park");
			goto out;
		}
	}
	ss = store_method_latest(ctx->store, method_id, &text, &len, &rev, sha);
	if (ss == STORE_NOT_FOUND) {
		/* A misspelt id gets the near one, as `stopcock check` does for keys. */
		const char *ids[257] = {NULL};
		bool db_err = false;
		json_t *list = store_methods_list(ctx->store, &db_err), *m;
		size_t i, n = 0;
		json_array_foreach(json_object_get(list, "methods"), i, m)
		{
			if (n < 256)
				ids[n++] = json_string_value(json_object_get(m, "id"));
		}
		const char *near = yt_closest(method_id, ids);
		if (near)
			fail(res, SUBMIT_NOT_FOUND, "no method '%s'; did you mean '%s'?", method_id,
			     near);
		else
			fail(res, SUBMIT_NOT_FOUND, "no method '%s'", method_id);
		json_decref(list);
		goto out;
	} else if (ss != STORE_OK) {
		fail(res, SUBMIT_DATABASE, "the database failed");
		goto out;
	}
	job = calloc(1, sizeof *job);
	rec = calloc(1, sizeof *rec);
	if (!job || !rec) {
		fail(res, SUBMIT_NO_MEMORY, "out of memory");
		goto out;
	}
	snprintf(name, sizeof name, "%s.yaml", method_id);
	http_method_limits(ctx, st, &lim);
	if (method_parse(name, text, len, &lim, &job->method, &d)) {
		char *all = diag_join(&d);
		fail(res, SUBMIT_INVALID_METHOD,
		     "method '%s' revision %ld cannot run on station %s:\n%s", method_id, rev,
		     station, all ? all : "");
		free(all);
		goto out;
	}
	/* Each step needs its device on this station (a doser, the stirrer, a
	 * changer that rinses): a back titration without its addition would
	 * report a wrong value. */
	for (int i = 0; i < job->method.n_before + job->method.n_after; i++) {
		bool before = i < job->method.n_before;
		const method_step_t *step =
		    before ? &job->method.before[i] : &job->method.after[i - job->method.n_before];
		if (!station_can_run_step(st, step, msg, sizeof msg)) {
			fail(res, SUBMIT_INVALID_METHOD,
			     "method '%s' revision %ld: %s[%d] (%s): %s", method_id, rev,
			     before ? "before" : "after",
			     (before ? i : i - job->method.n_before) + 1,
			     method_step_name(step->kind), msg);
			goto out;
		}
	}
	if (amount < job->method.sample_min || amount > job->method.sample_max) {
		fail(res, SUBMIT_BAD_REQUEST,
		     "amount %g %s is outside the method's sample range %g to %g", amount,
		     method_unit_name(job->method.sample_unit), job->method.sample_min,
		     job->method.sample_max);
		goto out;
	}
	if (!calibration_ok(ctx, st, &job->method, msg, sizeof msg)) {
		fail(res, SUBMIT_NO_CALIBRATION, "%s", msg);
		goto out;
	}
	{ /* records (issue 24): never again a silent titer of 1.0 */
		bool db_err;
		if (!titer_valid_for_run(ctx->cfg, ctx->store, &job->method, clock_wall_s(), msg,
		                         sizeof msg, &db_err)) {
			fail(res, db_err ? SUBMIT_DATABASE : SUBMIT_NO_TITER, "%s",
			     db_err ? "the database failed" : msg);
			goto out;
		}
	}
	job->amount = amount;
	job->position = req->position;
	snprintf(job->sample_id, sizeof job->sample_id, "%s", sample_id);
	time_format_rfc3339(clock_wall_s(), job->queued_at);
	snprintf(job->requested_by, sizeof job->requested_by, "%s", req->requested_by);
	job->series_id = req->series_id;
	if (req->weight_value > 0 && req->weight_unit && req->weight_source) {
		job->weight_value = req->weight_value;
		snprintf(job->weight_unit, sizeof job->weight_unit, "%s", req->weight_unit);
		snprintf(job->weight_source, sizeof job->weight_source, "%s", req->weight_source);
	}

	record_init(rec);
	snprintf(rec->station, sizeof rec->station, "%s", station);
	record_set_method(rec, &job->method);
	snprintf(rec->sample.id, sizeof rec->sample.id, "%s", sample_id);
	rec->sample.amount = amount;
	snprintf(rec->queued_at, sizeof rec->queued_at, "%s", job->queued_at);
	snprintf(rec->requested_by, sizeof rec->requested_by, "%s", job->requested_by);
	rec->series_id = req->series_id;
	record_set_weighing(rec, job->weight_value, job->weight_unit, job->weight_source);
	rec->titrant.titer = 1.0;
	{
		double titer;
		if (store_titrant_get(ctx->store, job->method.titrant_name, &titer, NULL) ==
		        STORE_OK &&
		    titer > 0)
			rec->titrant.titer = titer;
	}
	rec_text = record_text(rec, req->position);
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
	                                         .record_json = rec_text,
	                                         .position = req->position});
	if (id < 0) {
		fail(res, SUBMIT_DATABASE, "the database failed");
		goto out;
	}
	/* The record's id is known only now. */
	rec->id = id;
	free(rec_text);
	rec_text = record_text(rec, req->position);
	store_run_update(ctx->store, id, NULL, NULL, rec_text);
	job->run_id = id;
	if (station_enqueue(st, job)) {
		/* Refused: nothing of the run remains (docs/api.md), only the
		 * audit event the caller writes. */
		if (store_run_discard(ctx->store, id) != STORE_OK)
			station_abort_queued(st, job, "the station's queue is full");
		fail(res, SUBMIT_QUEUE_FULL,
		     "station %s has %d runs queued, the most it takes; nothing was queued",
		     station, STATION_QUEUE_MAX);
		goto out;
	}
	res->error = SUBMIT_OK;
	res->run_id = id;
	res->method_revision = job->method.revision;
	res->unit = method_unit_name(job->method.sample_unit);
out:
	diag_free(&d);
	free(text);
	free(job);
	free(rec);
	free(rec_text);
	return res->error;
}

void run_submit_done(run_submit_result_t *res)
{
	free(res->message);
	res->message = NULL;
}
