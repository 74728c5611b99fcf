/* recover.c: the runs the last daemon left behind (see recover.h). */
#include "recover.h"

#include <jansson.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clock.h"
#include "log.h"
#include "station.h"
#include "store.h"
#include "timefmt.h"

static void hold_running(const char *name, void *arg)
{
	station_t *st = http_find_station(arg, name);

	if (st)
		station_hold(st, "a run was on this station when the daemon stopped; nobody knows "
		                 "what is in the beaker: check it, then resume the station");
}

/* End a queued run that cannot be queued again as interrupted, with why. */
static void end_queued(store_t *store, json_int_t id, const char *record, const char *why)
{
	char at[32];
	json_t *j = json_loads(record, 0, NULL);
	char *text = NULL;

	time_format_rfc3339(clock_wall_s(), at);
	if (j && json_is_object(j)) {
		json_t *fl = json_object_get(j, "faults");
		json_object_set_new(j, "state", json_string("interrupted"));
		json_object_set_new(j, "ended_at", json_string(at));
		json_object_set_new(j, "stop_reason", json_string("interrupted"));
		json_object_set_new(j, "stop_detail", json_string(why));
		if (json_is_array(fl))
			json_array_append_new(fl, json_pack("{s:s,s:s,s:s}", "at", at, "code",
			                                    "interrupted", "message", why));
		text = json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10));
	}
	json_decref(j);
	if (store_run_finish(store, (int64_t)id, "interrupted", text, NULL) != STORE_OK)
		log_err("run %lld: could not be ended as interrupted (%s)", (long long)id, why);
	else
		log_warn("run %lld: interrupted: %s", (long long)id, why);
	free(text);
}

/* Queue one stored run again, as POST /v1/runs queued it: the same method
 * revision, checked against the station's limits of today. */
static void requeue_one(http_ctx_t *ctx, json_t *row, int *held_runs)
{
	json_int_t id = json_integer_value(json_object_get(row, "id"));
	const char *station = json_string_value(json_object_get(row, "station"));
	const char *mid = json_string_value(json_object_get(row, "method_id"));
	const char *record = json_string_value(json_object_get(row, "record"));
	long rev = (long)json_integer_value(json_object_get(row, "method_revision"));
	station_t *st = station ? http_find_station(ctx, station) : NULL;
	station_job_t *job = calloc(1, sizeof *job);
	json_t *rec = record ? json_loads(record, 0, NULL) : NULL;
	char *text = NULL, sha[65], name[METHOD_ID_MAX + 8], why[512];
	size_t len = 0;
	long got = 0;
	method_limits_t lim;
	diag_list_t d = DIAG_LIST_INIT;

	if (!job || !st || !mid) {
		snprintf(why, sizeof why, "queued when the daemon stopped, and %s",
		         !job ? "out of memory when queuing it again"
		              : "its station is no longer configured");
		end_queued(ctx->store, id, record ? record : "", why);
		goto out;
	}
	if (store_method_revision(ctx->store, mid, rev, &text, &len, &got, sha) != STORE_OK) {
		snprintf(
		    why, sizeof why,
		    "queued when the daemon stopped, and method %s revision %ld cannot be read "
		    "again",
		    mid, rev);
		end_queued(ctx->store, id, record ? record : "", why);
		goto out;
	}
	snprintf(name, sizeof name, "%s.yaml", mid);
	http_method_limits(ctx, st, &lim);
	if (method_parse(name, text, len, &lim, &job->method, &d)) {
		char *all = diag_join(&d);
		snprintf(why, sizeof why,
		         "queued when the daemon stopped; method %s revision %ld no longer runs on "
		         "station %s: %s",
		         mid, rev, station, all ? all : "");
		free(all);
		end_queued(ctx->store, id, record ? record : "", why);
		goto out;
	}
	job->run_id = id;
	job->amount = json_real_value(json_object_get(row, "amount"));
	/* the rack position it was queued for; the station is held below, so
	 * nothing moves to it before an operator resumes */
	json_t *pos = json_object_get(rec, "position");
	job->position =
	    json_is_integer(pos) && json_integer_value(pos) > 0 ? (long)json_integer_value(pos) : 0;
	snprintf(job->sample_id, sizeof job->sample_id, "%s",
	         json_string_value(json_object_get(row, "sample_id")));
	snprintf(job->queued_at, sizeof job->queued_at, "%s",
	         json_string_value(json_object_get(row, "queued_at")));
	const char *by = json_string_value(json_object_get(rec, "requested_by"));
	snprintf(job->requested_by, sizeof job->requested_by, "%s", by ? by : "");
	if (station_enqueue(st, job)) {
		end_queued(ctx->store, id, record ? record : "",
		           "queued when the daemon stopped, and the station's queue is full");
		goto out;
	}
	station_hold(st, "runs were queued on this station when the daemon stopped; check the "
	                 "beaker, then resume the station to start them");
	(*held_runs)++;
out:
	diag_free(&d);
	json_decref(rec);
	free(text);
	free(job);
}

static bool mark(http_ctx_t *ctx, bool first)
{
	char at[32];
	int k;

	time_format_rfc3339(clock_wall_s(), at);
	k = store_interrupt_stale(ctx->store, at, hold_running, ctx);
	if (k < 0) {
		if (first) {
			static const char why[] =
			    "the runs the last daemon left running are not yet marked interrupted "
			    "(the "
			    "database refused the write: a full disk?); trying again every 5 s";
			log_err("%s", why);
			for (int i = 0; i < ctx->n_stations; i++) {
				station_hold(ctx->stations[i], why);
				station_block_resume(ctx->stations[i], why);
			}
		}
		return false;
	}
	if (k > 0)
		log_notice("%d run%s left running by the last daemon marked interrupted", k,
		           k == 1 ? "" : "s");
	if (!first) {
		log_notice("the last daemon's runs are marked interrupted now; the stations stay "
		           "held until an operator resumes them");
		for (int i = 0; i < ctx->n_stations; i++) {
			station_hold(
			    ctx->stations[i],
			    "the database refused writes at start-up; the last daemon's runs "
			    "are marked interrupted now: check the beaker, then resume");
			station_block_resume(ctx->stations[i], NULL);
		}
	}
	return true;
}

static void hold_noted(const char *name, const char *reason, void *arg)
{
	station_t *st = http_find_station(arg, name);

	if (st)
		station_hold(st, reason);
}

void recover_note_holds(http_ctx_t *ctx, const bool *had_run)
{
	for (int i = 0; i < ctx->n_stations; i++)
		if (had_run[i] &&
		    store_hold_note(
		        ctx->store, station_name(ctx->stations[i]),
		        "a run was on this station when the daemon was stopped; check the "
		        "beaker, then resume the station") != STORE_OK)
			log_err("station %s: could not note the hold for the next start",
			        station_name(ctx->stations[i]));
}

bool recover_start(http_ctx_t *ctx)
{
	bool ok = mark(ctx, true);
	store_hold_notes_take(ctx->store, hold_noted, ctx);
	json_t *queued = store_runs_queued(ctx->store);
	size_t i;
	json_t *row;
	int n = 0;

	if (!queued) {
		log_err("could not read the runs left queued; they stay queued in the database");
		for (int k = 0; k < ctx->n_stations; k++)
			station_hold(ctx->stations[k], "the runs left queued could not be read");
		return ok;
	}
	json_array_foreach(queued, i, row) requeue_one(ctx, row, &n);
	json_decref(queued);
	if (n)
		log_notice("%d run%s queued again; their stations are held until resumed", n,
		           n == 1 ? "" : "s");
	return ok;
}

bool recover_retry(http_ctx_t *ctx)
{
	return mark(ctx, false);
}
