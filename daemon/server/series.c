/* series.c: see series.h. */
#include "series.h"

#include <math.h>
#include <pthread.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "clock.h"
#include "log.h"
#include "method.h"
#include "names.h"
#include "record.h"
#include "stats.h"
#include "submit.h"
#include "text.h"
#include "timefmt.h"

/* How often the thread looks at the runs it waits for, s: a beaker change
 * takes longer, so the delay between runs stays small against it. */
#define SERIES_POLL_S 0.2

/* The weight of one beaker: from the station's balance, or typed by the
 * operator with a reason. value_g 0: not weighed yet. */
typedef struct {
	double value;     /* as the balance or the operator gave it, in `unit` */
	double value_g;   /* the same in grams: the run's amount */
	char unit[8];     /* "g", "mg" or "kg" */
	char source[200]; /* "balance" or "typed: REASON" */
} weighing_t;

/* Retry a balance that failed this often, s: the operator may type the
 * weight meanwhile. */
#define SERIES_WEIGH_RETRY_S 5.0

typedef struct {
	char sample_id[128];
	char method[METHOD_ID_MAX];
	double amount;
	int reps;                   /* beakers (the positions given, else the method's count) */
	int positions[STATS_MAX_N]; /* 0 = none given */
	double max_rsd_pct;         /* the method's replicates.max_rsd_pct, 0 = no limit */
	int n_runs;
	int64_t runs[STATS_MAX_N];
	bool weigh; /* amount "weigh": each beaker's weight is its amount */
	weighing_t weights[STATS_MAX_N];
	json_t *factors; /* the row's factors (object), or NULL */
	json_t *stats;   /* computed once the sample is done, or NULL */
} sample_t;

typedef struct series {
	int64_t id;
	char station[CFG_NAME_MAX];
	char state[16];
	bool stop_on_failure;
	bool has_changer;
	char created_at[32], ended_at[32];
	char requested_by[64];
	char detail[400]; /* why it stopped, for a person; "" -> null */
	char prompt[300]; /* what the operator must do now; "" -> null */
	int n_samples;
	sample_t *samples;
	int cur_sample, cur_rep; /* the next beaker to titrate */
	int64_t cur_run;         /* the run it waits for, 0 when none */
	bool released;           /* the operator placed the next beaker */
	bool abort_wanted, abort_sent;
	drv_balance_t bal; /* the station's balance, configured when a row weighs */
	bool has_balance;
	double next_weigh_s; /* clock_mono_s of the next try after a balance fault */
	struct series *next;
} series_t;

struct series_service {
	http_ctx_t *ctx;
	pthread_t thread;
	pthread_mutex_t lock;
	pthread_cond_t wake;
	bool stopping;
	series_t *active;
};

static bool is_final(const char *state)
{
	return strcmp(state, "queued") && strcmp(state, "running");
}

static void now_text(char out[32])
{
	time_format_rfc3339(clock_wall_s(), out);
}

static json_t *str_or_null(const char *s)
{
	return s && *s ? json_string(s) : json_null();
}

static json_t *num_or_null(double v)
{
	return isfinite(v) ? json_real(v) : json_null();
}

static json_t *series_json(const series_t *s)
{
	json_t *samples = json_array();
	for (int i = 0; i < s->n_samples; i++) {
		const sample_t *p = &s->samples[i];
		json_t *pos = json_array(), *runs = json_array();
		for (int k = 0; k < p->reps; k++)
			if (p->positions[k] > 0)
				json_array_append_new(pos, json_integer(p->positions[k]));
		for (int k = 0; k < p->n_runs; k++)
			json_array_append_new(runs, json_integer(p->runs[k]));
		json_t *weights = NULL;
		if (p->weigh) {
			weights = json_array();
			for (int k = 0; k < p->reps; k++) {
				const weighing_t *w = &p->weights[k];
				json_array_append_new(
				    weights, w->value_g > 0
				                 ? json_pack("{s:f,s:s,s:s}", "value", w->value,
				                             "unit", w->unit, "source", w->source)
				                 : json_null());
			}
		}
		json_array_append_new(
		    samples,
		    json_pack("{s:s,s:s,s:o,s:o,s:i,s:o,s:O?,s:O?,s:o?}", "sample_id", p->sample_id,
		              "method", p->method, "amount",
		              p->weigh ? json_string("weigh") : json_real(p->amount), "position",
		              pos, "replicates", p->reps, "runs", runs, "factors", p->factors,
		              "stats", p->stats ? p->stats : NULL, "weights", weights));
	}
	return json_pack("{s:I,s:s,s:s,s:s,s:s,s:o,s:o,s:o,s:o,s:o,s:o,s:b}", "id",
	                 (json_int_t)s->id, "station", s->station, "state", s->state, "on_failure",
	                 s->stop_on_failure ? "stop" : "continue", "created_at", s->created_at,
	                 "ended_at", str_or_null(s->ended_at), "requested_by",
	                 str_or_null(s->requested_by), "detail", str_or_null(s->detail), "prompt",
	                 str_or_null(s->prompt), "current_run",
	                 s->cur_run ? json_integer(s->cur_run) : json_null(), "samples", samples,
	                 "waiting", s->prompt[0] != 0);
}

static char *series_text(const series_t *s)
{
	json_t *j = series_json(s);
	char *t = j ? json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
	json_decref(j);
	return t;
}

static void save(series_service_t *sv, series_t *s)
{
	char *t = series_text(s);
	if (!t || store_series_update(sv->ctx->store, s->id, s->state, t) != STORE_OK)
		log_err("series %lld: cannot store its state", (long long)s->id);
	free(t);
}

static void series_free(series_t *s)
{
	if (!s)
		return;
	for (int i = 0; i < s->n_samples; i++) {
		json_decref(s->samples[i].factors);
		json_decref(s->samples[i].stats);
	}
	free(s->samples);
	drv_balance_close(&s->bal);
	free(s);
}

/* ---- statistics of one sample, from its finished runs ---- */

static void sample_stats(series_service_t *sv, sample_t *p)
{
	/* Per result name: the values of the runs that finished, and which run
	 * each came from, so an outlier is named by its run. */
	json_t *out = json_object();
	json_t *recs[STATS_MAX_N] = {NULL};
	bool db_err;
	for (int k = 0; k < p->n_runs; k++) {
		json_t *r = store_run_json(sv->ctx->store, p->runs[k], &db_err);
		const char *st = json_string_value(json_object_get(r, "state"));
		if (r && st && !strcmp(st, "finished"))
			recs[k] = r;
		else
			json_decref(r);
	}
	for (int k = 0; k < p->n_runs; k++) {
		size_t i;
		json_t *res;
		json_array_foreach(json_object_get(recs[k], "results"), i, res)
		{
			const char *name = json_string_value(json_object_get(res, "name"));
			if (!name || json_object_get(out, name))
				continue;
			double x[STATS_MAX_N];
			int64_t from[STATS_MAX_N];
			int n = 0;
			for (int m = 0; m < p->n_runs; m++) {
				size_t jx;
				json_t *rr;
				json_array_foreach(json_object_get(recs[m], "results"), jx, rr)
				{
					const char *nm =
					    json_string_value(json_object_get(rr, "name"));
					json_t *v = json_object_get(rr, "value");
					if (nm && !strcmp(nm, name) && json_is_number(v)) {
						x[n] = json_number_value(v);
						from[n++] = p->runs[m];
					}
				}
			}
			replicate_stats_t s;
			json_t *outl = json_array();
			if (n == 0 || stats_replicates(x, n, p->max_rsd_pct, &s) != 0) {
				json_object_set_new(out, name,
				                    json_pack("{s:i,s:n,s:n,s:n,s:s,s:o}", "n", n,
				                              "mean", "sd", "rsd_pct", "accept",
				                              "missing", "outliers", outl));
				continue;
			}
			if (s.outlier >= 0)
				json_array_append_new(outl, json_integer(from[s.outlier]));
			json_object_set_new(out, name,
			                    json_pack("{s:i,s:o,s:o,s:o,s:s,s:o}", "n", s.n, "mean",
			                              num_or_null(s.mean), "sd", num_or_null(s.sd),
			                              "rsd_pct", num_or_null(s.rsd_pct), "accept",
			                              stats_accept_name(s.accept), "outliers",
			                              outl));
		}
	}
	for (int k = 0; k < p->n_runs; k++)
		json_decref(recs[k]);
	json_decref(p->stats);
	p->stats = out;
}

/* ---- the end of a series ---- */

static void finish(series_service_t *sv, series_t *s, const char *state, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));

static void finish(series_service_t *sv, series_t *s, const char *state, const char *fmt, ...)
{
	va_list ap;
	char *t;
	int64_t seq = 0;
	if (fmt) {
		va_start(ap, fmt);
		vsnprintf(s->detail, sizeof s->detail, fmt, ap);
		va_end(ap);
	}
	/* A sample cut short keeps the statistics of the beakers it has. */
	if (s->cur_sample < s->n_samples && s->samples[s->cur_sample].n_runs > 0)
		sample_stats(sv, &s->samples[s->cur_sample]);
	snprintf(s->state, sizeof s->state, "%s", state);
	now_text(s->ended_at);
	s->prompt[0] = '\0';
	s->cur_run = 0;
	t = series_text(s);
	if (!t ||
	    store_series_finish(sv->ctx->store, s->id, state, s->ended_at, t, &seq) != STORE_OK)
		log_err("series %lld: cannot store its end", (long long)s->id);
	free(t);
	{
		/* The audit trail names the series; notify_cmd.c tells a person. */
		char msg[480];
		snprintf(msg, sizeof msg, "series %lld %s%s%s", (long long)s->id, state,
		         s->detail[0] ? ": " : "", s->detail);
		store_event_add(sv->ctx->store, s->ended_at, s->station, 0, "series", state, msg,
		                "daemon");
	}
	log_notice("series %lld on %s: %s%s%s", (long long)s->id, s->station, state,
	           s->detail[0] ? ": " : "", s->detail);
}

/* What a final run means for its series. */
typedef enum { RUN_OK, RUN_CHEMISTRY, RUN_DEVICE, RUN_ABORTED, RUN_INTERRUPTED } run_outcome_t;

static run_outcome_t outcome(const json_t *rec, const char *state, char *why, size_t cap)
{
	const char *stop = json_string_value(json_object_get(rec, "stop_reason"));
	size_t i;
	json_t *e;
	why[0] = '\0';
	if (!strcmp(state, "interrupted"))
		return RUN_INTERRUPTED;
	if (!strcmp(state, "aborted"))
		return RUN_ABORTED;
	if (!strcmp(state, "failed")) {
		json_t *f = json_array_get(json_object_get(rec, "faults"), 0);
		const char *code = json_string_value(json_object_get(f, "code"));
		snprintf(why, cap, "%s", record_stop_words(stop));
		if (code)
			snprintf(why, cap, "%s (%s)", record_stop_words(stop), code);
		/* fault: a device, an interlock or a stale reading (docs/lims.md). */
		return stop && !strcmp(stop, "fault") ? RUN_DEVICE : RUN_CHEMISTRY;
	}
	/* Finished, but a result outside its limits or one the data cannot
	 * support is a chemistry outcome too. */
	json_array_foreach(json_object_get(rec, "results"), i, e)
	{
		const char *a = json_string_value(json_object_get(e, "accept"));
		if (a && strcmp(a, "pass") && strcmp(a, "none")) {
			snprintf(why, cap, "result %s is %s",
			         json_string_value(json_object_get(e, "name")), a);
			return RUN_CHEMISTRY;
		}
	}
	return RUN_OK;
}

/* ---- one step of one series; false when it ended ---- */

static bool step_run_ended(series_service_t *sv, series_t *s)
{
	char state[32], why[300];
	bool db_err;
	if (store_run_state(sv->ctx->store, s->cur_run, state, sizeof state, NULL, 0) != STORE_OK)
		return true;
	if (!is_final(state)) {
		if (s->abort_wanted && !s->abort_sent) {
			station_t *st = http_find_station(sv->ctx, s->station);
			s->abort_sent = true;
			if (st)
				station_abort(st, s->cur_run);
		}
		return true;
	}
	json_t *rec = store_run_json(sv->ctx->store, s->cur_run, &db_err);
	run_outcome_t o = outcome(rec, state, why, sizeof why);
	json_decref(rec);
	int64_t run = s->cur_run;
	sample_t *p = &s->samples[s->cur_sample];
	s->cur_run = 0;
	s->cur_rep++;
	if (o == RUN_INTERRUPTED) {
		finish(sv, s, "interrupted", "run %lld was interrupted", (long long)run);
		return false;
	}
	if (o == RUN_ABORTED) {
		finish(sv, s, "aborted",
		       s->abort_wanted ? "aborted by request" : "run %lld was aborted",
		       (long long)run);
		return false;
	}
	if (o == RUN_DEVICE) {
		finish(sv, s, "failed", "run %lld: %s; a device fault stops the series",
		       (long long)run, why);
		return false;
	}
	if (o == RUN_CHEMISTRY) {
		if (s->stop_on_failure) {
			finish(sv, s, "failed", "run %lld (sample %s): %s; on_failure is stop",
			       (long long)run, p->sample_id, why);
			return false;
		}
	}
	if (s->cur_rep >= p->reps) {
		sample_stats(sv, p);
		s->cur_sample++;
		s->cur_rep = 0;
	}
	save(sv, s);
	return true;
}

static double grams(double value, const char *unit)
{
	return !strcmp(unit, "mg") ? value / 1000.0 : !strcmp(unit, "kg") ? value * 1000.0 : value;
}

/* Ask the balance for the current beaker's weight. Called with sv->lock
 * held; the lock is let go while the balance answers (up to its
 * stable_timeout_ms), so the series stays readable and abortable, and the
 * station's thread never waits on it. Returns true with the weight kept, or
 * false with a prompt naming the fault: the series waits, asks again after
 * SERIES_WEIGH_RETRY_S, and takes a typed weight meanwhile. Never a made-up
 * amount. */
static bool weigh_beaker(series_service_t *sv, series_t *s)
{
	sample_t *p = &s->samples[s->cur_sample];
	int rep = s->cur_rep;
	if (clock_mono_s() < s->next_weigh_s)
		return false;
	drv_weight_t w;
	drv_err_t e = {0};
	pthread_mutex_unlock(&sv->lock);
	drv_status_t st = drv_balance_open(&s->bal, &e);
	if (st == DRV_OK)
		st = drv_balance_weigh(&s->bal, &w, &e);
	pthread_mutex_lock(&sv->lock);
	weighing_t *k = &p->weights[rep];
	if (k->value_g > 0) /* typed while the balance was asked */
		return true;
	if (st == DRV_OK && grams(w.value, w.unit) > 0) {
		k->value = w.value;
		k->value_g = grams(w.value, w.unit);
		snprintf(k->unit, sizeof k->unit, "%s", w.unit);
		snprintf(k->source, sizeof k->source, "balance");
		s->prompt[0] = '\0';
		log_info("series %lld: sample %s replicate %d weighed %.6g %s on the balance",
		         (long long)s->id, p->sample_id, rep + 1, w.value, w.unit);
		save(sv, s);
		return true;
	}
	if (st == DRV_OK)
		snprintf(e.msg, sizeof e.msg, "balance: weight %g %s is not above zero", w.value,
		         w.unit);
	/* Bounded so the whole prompt fits: the fault and where to type. */
	char want[300];
	snprintf(want, sizeof want,
	         "weigh sample %.48s (replicate %d of %d): %.90s; asked again in %d s, or type "
	         "the weight: POST /v1/series/%lld/weight",
	         p->sample_id, rep + 1, p->reps, e.msg, (int)SERIES_WEIGH_RETRY_S,
	         (long long)s->id);
	s->next_weigh_s = clock_mono_s() + SERIES_WEIGH_RETRY_S;
	if (strcmp(want, s->prompt)) {
		snprintf(s->prompt, sizeof s->prompt, "%s", want);
		log_warn("series %lld: %s", (long long)s->id, want);
		save(sv, s);
	}
	return false;
}

static bool step_next_beaker(series_service_t *sv, series_t *s)
{
	if (s->abort_wanted) {
		finish(sv, s, "aborted", "aborted by request");
		return false;
	}
	if (s->cur_sample >= s->n_samples) {
		finish(sv, s, "finished", NULL);
		return false;
	}
	sample_t *p = &s->samples[s->cur_sample];
	int pos = p->positions[s->cur_rep];
	bool first = s->cur_sample == 0 && s->cur_rep == 0;
	/* Without a changer the operator places every beaker after the first
	 * (the first is in place when the series is started). */
	if (!s->has_changer && !first && !s->released) {
		char want[300], where[32] = "";
		/* Name the rack position the work list gives, if any. */
		if (pos > 0)
			snprintf(where, sizeof where, ", position %d", pos);
		snprintf(want, sizeof want,
		         "place the beaker of sample %s (replicate %d of %d%s), then "
		         "`stopcock series next %lld`",
		         p->sample_id, s->cur_rep + 1, p->reps, where, (long long)s->id);
		if (strcmp(want, s->prompt)) {
			snprintf(s->prompt, sizeof s->prompt, "%s", want);
			save(sv, s);
		}
		return true;
	}
	if (p->weigh && !(p->weights[s->cur_rep].value_g > 0) && !weigh_beaker(sv, s))
		return true; /* waiting for a weight: the prompt says why */
	run_request_t req = {.station = s->station,
	                     .method_id = p->method,
	                     .sample_id = p->sample_id,
	                     .amount = p->weigh ? p->weights[s->cur_rep].value_g : p->amount,
	                     .requested_by = s->requested_by,
	                     .position = s->has_changer ? pos : 0,
	                     .series_id = s->id,
	                     .weight_value = p->weigh ? p->weights[s->cur_rep].value : 0,
	                     .weight_unit = p->weights[s->cur_rep].unit,
	                     .weight_source = p->weights[s->cur_rep].source};
	run_submit_result_t res;
	if (run_submit(sv->ctx, &req, &res) != SUBMIT_OK) {
		finish(sv, s, "failed", "sample %s could not be queued: %s", p->sample_id,
		       res.message ? res.message : "out of memory");
		run_submit_done(&res);
		return false;
	}
	run_submit_done(&res);
	s->released = false;
	s->prompt[0] = '\0';
	s->cur_run = res.run_id;
	p->runs[p->n_runs++] = res.run_id;
	snprintf(s->state, sizeof s->state, "running");
	save(sv, s);
	return true;
}

static void *service_main(void *arg)
{
	series_service_t *sv = arg;
	pthread_mutex_lock(&sv->lock);
	while (!sv->stopping) {
		series_t **pp = &sv->active;
		while (*pp) {
			series_t *s = *pp;
			bool going = s->cur_run ? step_run_ended(sv, s) : true;
			if (going && !s->cur_run)
				going = step_next_beaker(sv, s);
			if (going) {
				pp = &s->next;
			} else {
				*pp = s->next;
				series_free(s);
			}
		}
		struct timespec to;
		clock_gettime(CLOCK_REALTIME, &to);
		to.tv_nsec += (long)(SERIES_POLL_S * 1e9);
		if (to.tv_nsec >= 1000000000L) {
			to.tv_sec++;
			to.tv_nsec -= 1000000000L;
		}
		pthread_cond_timedwait(&sv->wake, &sv->lock, &to);
	}
	pthread_mutex_unlock(&sv->lock);
	return NULL;
}

series_service_t *series_service_start(http_ctx_t *ctx)
{
	series_service_t *sv = calloc(1, sizeof *sv);
	if (!sv)
		return NULL;
	sv->ctx = ctx;
	pthread_mutex_init(&sv->lock, NULL);
	pthread_cond_init(&sv->wake, NULL);
	if (pthread_create(&sv->thread, NULL, service_main, sv)) {
		pthread_mutex_destroy(&sv->lock);
		pthread_cond_destroy(&sv->wake);
		free(sv);
		return NULL;
	}
	return sv;
}

void series_service_stop(series_service_t *sv)
{
	if (!sv)
		return;
	pthread_mutex_lock(&sv->lock);
	sv->stopping = true;
	pthread_cond_signal(&sv->wake);
	pthread_mutex_unlock(&sv->lock);
	pthread_join(sv->thread, NULL);
	/* The stations stop next and end the current runs; the series is cut
	 * and never resumed (series.h). Requests may still come in: under the
	 * lock, and series_submit refuses new ones now. */
	pthread_mutex_lock(&sv->lock);
	while (sv->active) {
		series_t *s = sv->active;
		sv->active = s->next;
		finish(sv, s, "interrupted", "the daemon stopped");
		series_free(s);
	}
	pthread_mutex_unlock(&sv->lock);
}

void series_service_free(series_service_t *sv)
{
	if (!sv)
		return;
	pthread_mutex_destroy(&sv->lock);
	pthread_cond_destroy(&sv->wake);
	free(sv);
}

/* ---- start-up ---- */

/* A run the last daemon left queued for a series ends interrupted: the
 * series will not go on, so the run must not start by itself either. */
static void interrupt_queued_run(store_t *store, int64_t run, const char *at)
{
	bool db_err;
	char state[32];
	if (store_run_state(store, run, state, sizeof state, NULL, 0) != STORE_OK ||
	    strcmp(state, "queued"))
		return;
	json_t *rec = store_run_json(store, run, &db_err);
	if (!rec)
		return;
	json_object_del(rec, "seq");
	json_object_set_new(rec, "state", json_string("interrupted"));
	json_object_set_new(rec, "ended_at", json_string(at));
	json_object_set_new(rec, "stop_reason", json_string("interrupted"));
	json_object_set_new(rec, "stop_detail",
	                    json_string("the daemon stopped while the run was queued in a series"));
	char *t = json_dumps(rec, JSON_COMPACT | JSON_REAL_PRECISION(10));
	if (t)
		store_run_finish(store, run, "interrupted", t, NULL);
	free(t);
	json_decref(rec);
}

int series_recover_start(store_t *store)
{
	json_t *ids = store_series_open(store), *v;
	size_t i;
	int n = 0;
	char at[32];
	if (!ids)
		return -1;
	now_text(at);
	json_array_foreach(ids, i, v)
	{
		int64_t id = json_integer_value(v);
		bool db_err;
		json_t *rec = store_series_json(store, id, &db_err);
		if (!rec)
			continue;
		json_t *cur = json_object_get(rec, "current_run");
		if (json_is_integer(cur))
			interrupt_queued_run(store, json_integer_value(cur), at);
		json_object_del(rec, "seq");
		json_object_set_new(rec, "state", json_string("interrupted"));
		json_object_set_new(rec, "ended_at", json_string(at));
		json_object_set_new(rec, "prompt", json_null());
		json_object_set_new(rec, "current_run", json_null());
		json_object_set_new(rec, "waiting", json_false());
		json_object_set_new(rec, "detail",
		                    json_string("the daemon stopped during the series; a series is "
		                                "never resumed by itself"));
		char *t = json_dumps(rec, JSON_COMPACT | JSON_REAL_PRECISION(10));
		if (t && store_series_finish(store, id, "interrupted", at, t, NULL) == STORE_OK)
			n++;
		char msg[160];
		snprintf(msg, sizeof msg, "series %lld interrupted: the daemon stopped during it",
		         (long long)id);
		store_event_add(store, at, json_string_value(json_object_get(rec, "station")), 0,
		                "series", "interrupted", msg, "daemon");
		free(t);
		json_decref(rec);
	}
	json_decref(ids);
	return n;
}

/* ---- requests ---- */

static series_error_t bad(char *err, size_t cap, series_error_t e, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));

static series_error_t bad(char *err, size_t cap, series_error_t e, const char *fmt, ...)
{
	va_list ap;
	va_start(ap, fmt);
	vsnprintf(err, cap, fmt, ap);
	va_end(ap);
	return e;
}

/* One row of samples[] into p (i: its index, for messages). */
static series_error_t parse_sample(series_service_t *sv, const json_t *row, int i, bool has_balance,
                                   sample_t *p, char *err, size_t cap)
{
	static const char *const keys[] = {"position", "sample_id", "method",
	                                   "amount",   "factors",   NULL};
	const char *k;
	json_t *v;
	json_object_foreach((json_t *)row, k, v)
	{
		bool known = false;
		for (int j = 0; keys[j]; j++)
			known = known || !strcmp(k, keys[j]);
		if (!known)
			return bad(err, cap, SERIES_BAD_REQUEST,
			           "samples[%d]: unknown key '%s' (allowed: position, sample_id, "
			           "method, amount, factors)",
			           i, k);
	}
	const char *sid = json_string_value(json_object_get(row, "sample_id"));
	const char *mid = json_string_value(json_object_get(row, "method"));
	json_t *amount = json_object_get(row, "amount");
	if (!sid || !*sid || strlen(sid) >= sizeof p->sample_id ||
	    text_control_at(sid, strlen(sid), false) != TEXT_NONE)
		return bad(err, cap, SERIES_BAD_REQUEST,
		           "samples[%d].sample_id must be 1 to 127 characters without control "
		           "characters",
		           i);
	if (!mid || !name_is_id(mid, METHOD_ID_MAX))
		return bad(err, cap, SERIES_BAD_REQUEST, "samples[%d].method must be a method id",
		           i);
	p->weigh = json_is_string(amount) && !strcmp(json_string_value(amount), "weigh");
	if (p->weigh && !has_balance)
		return bad(err, cap, SERIES_BAD_REQUEST,
		           "samples[%d].amount \"weigh\" needs a balance: this station has no "
		           "balance: in the config (docs/config.md); give the amount as a number",
		           i);
	if (!p->weigh && (!json_is_number(amount) || !(json_number_value(amount) > 0)))
		return bad(err, cap, SERIES_BAD_REQUEST,
		           "samples[%d].amount must be a number above 0, or \"weigh\"", i);
	snprintf(p->sample_id, sizeof p->sample_id, "%s", sid);
	snprintf(p->method, sizeof p->method, "%s", mid);
	p->amount = p->weigh ? 0 : json_number_value(amount);
	json_t *f = json_object_get(row, "factors");
	if (f) {
		json_t *fv;
		if (!json_is_object(f))
			return bad(err, cap, SERIES_BAD_REQUEST,
			           "samples[%d].factors must be an object of numbers", i);
		json_object_foreach(f, k, fv)
		{
			if (!json_is_number(fv) || !name_is_id(k, 64))
				return bad(
				    err, cap, SERIES_BAD_REQUEST,
				    "samples[%d].factors.%s must be a number (names [a-z0-9-])", i,
				    k);
		}
		p->factors = json_incref(f);
	}

	/* The method as it is now: its replicates and sample range. */
	char *text = NULL, sha[65], name[METHOD_ID_MAX + 8];
	size_t len = 0;
	long rev = 0;
	store_status_t ss = store_method_latest(sv->ctx->store, mid, &text, &len, &rev, sha);
	if (ss == STORE_NOT_FOUND)
		return bad(err, cap, SERIES_NOT_FOUND, "samples[%d]: no method '%s'", i, mid);
	if (ss != STORE_OK)
		return bad(err, cap, SERIES_DATABASE, "the database failed");
	method_t *m = malloc(sizeof *m);
	diag_list_t d = DIAG_LIST_INIT;
	snprintf(name, sizeof name, "%s.yaml", mid);
	int prc = m ? method_parse(name, text, len, NULL, m, &d) : -1;
	free(text);
	diag_free(&d);
	if (prc) {
		free(m);
		return bad(err, cap, SERIES_INVALID_METHOD,
		           "samples[%d]: method '%s' revision %ld does not parse", i, mid, rev);
	}
	long want = m->replicates;
	p->max_rsd_pct = m->max_rsd_pct;
	/* A weighed amount is checked when the run is queued, like any other. */
	bool in_range = p->weigh || (p->amount >= m->sample_min && p->amount <= m->sample_max);
	double lo = m->sample_min, hi = m->sample_max;
	free(m);
	if (!in_range)
		return bad(err, cap, SERIES_BAD_REQUEST,
		           "samples[%d].amount %g is outside method %s's sample range %g to %g", i,
		           p->amount, mid, lo, hi);

	/* position: a number (one beaker) or a list, one per replicate. */
	json_t *pos = json_object_get(row, "position");
	int n = 0;
	if (json_is_integer(pos)) {
		json_int_t pv = json_integer_value(pos);
		p->positions[n++] = pv >= 1 && pv <= 999 ? (int)pv : -1;
	} else if (json_is_array(pos)) {
		size_t j;
		json_t *e;
		if (json_array_size(pos) > STATS_MAX_N)
			return bad(err, cap, SERIES_BAD_REQUEST,
			           "samples[%d].position lists more than %d beakers", i,
			           STATS_MAX_N);
		json_array_foreach(pos, j, e)
		{
			if (!json_is_integer(e))
				return bad(err, cap, SERIES_BAD_REQUEST,
				           "samples[%d].position[%zu] must be a whole number", i,
				           j);
			json_int_t pv = json_integer_value(e);
			p->positions[n++] = pv >= 1 && pv <= 999 ? (int)pv : -1;
		}
	} else if (pos && !json_is_null(pos)) {
		return bad(err, cap, SERIES_BAD_REQUEST,
		           "samples[%d].position must be a number or a list of numbers", i);
	}
	for (int j = 0; j < n; j++)
		if (p->positions[j] < 1 || p->positions[j] > 999)
			return bad(err, cap, SERIES_BAD_REQUEST,
			           "samples[%d].position must be whole numbers 1 to 999", i);
	if (n == 0) {
		/* No positions (a station without a changer): the method's count. */
		p->reps = (int)want;
	} else if (n < want) {
		return bad(err, cap, SERIES_BAD_REQUEST,
		           "samples[%d]: method %s asks for %ld replicates but position lists %d",
		           i, mid, want, n);
	} else {
		p->reps = n;
	}
	return SERIES_OK;
}

series_error_t series_submit(series_service_t *sv, const json_t *body, const char *actor,
                             int64_t *id_out, char *err, size_t cap)
{
	const char *k;
	json_t *v;
	json_object_foreach((json_t *)body, k, v)
	{
		if (strcmp(k, "station") && strcmp(k, "samples") && strcmp(k, "on_failure"))
			return bad(err, cap, SERIES_BAD_REQUEST,
			           "unknown key '%s' (allowed: station, samples, on_failure)", k);
	}
	const char *station = json_string_value(json_object_get(body, "station"));
	json_t *samples = json_object_get(body, "samples");
	json_t *onf = json_object_get(body, "on_failure");
	if (!station)
		return bad(err, cap, SERIES_BAD_REQUEST, "station must be a station's name");
	if (!json_is_array(samples) || json_array_size(samples) == 0 ||
	    json_array_size(samples) > SERIES_MAX_SAMPLES)
		return bad(err, cap, SERIES_BAD_REQUEST,
		           "samples must be a list of 1 to %d samples", SERIES_MAX_SAMPLES);
	if (onf && (!json_is_string(onf) || (strcmp(json_string_value(onf), "stop") &&
	                                     strcmp(json_string_value(onf), "continue"))))
		return bad(err, cap, SERIES_BAD_REQUEST,
		           "on_failure must be \"stop\" or \"continue\"");
	if (!http_find_station(sv->ctx, station))
		return bad(err, cap, SERIES_NOT_FOUND, "no station '%s'", station);
	const cfg_station_t *sc = sv->ctx->cfg ? cfg_station(sv->ctx->cfg, station) : NULL;

	series_t *s = calloc(1, sizeof *s);
	if (!s || !(s->samples = calloc(json_array_size(samples), sizeof *s->samples))) {
		free(s);
		return bad(err, cap, SERIES_DATABASE, "out of memory");
	}
	snprintf(s->station, sizeof s->station, "%s", station);
	snprintf(s->state, sizeof s->state, "queued");
	snprintf(s->requested_by, sizeof s->requested_by, "%s", actor ? actor : "");
	s->stop_on_failure = !onf || !strcmp(json_string_value(onf), "stop");
	s->has_changer = sc && sc->changer != NULL;
	/* The balance was checked with the config; a handle of its own here, so
	 * a weighing never waits on the station's thread nor it on a weighing. */
	if (sc && sc->balance) {
		diag_list_t d = DIAG_LIST_INIT;
		s->has_balance =
		    drv_balance_configure(&sv->ctx->cfg->doc, sc->balance, &s->bal, &d) == 0;
		diag_free(&d);
	}
	now_text(s->created_at);
	size_t i;
	json_t *row;
	json_array_foreach(samples, i, row)
	{
		series_error_t e;
		if (!json_is_object(row)) {
			series_free(s);
			return bad(err, cap, SERIES_BAD_REQUEST, "samples[%zu] must be an object",
			           i);
		}
		s->n_samples = (int)i + 1;
		e = parse_sample(sv, row, (int)i, s->has_balance, &s->samples[i], err, cap);
		if (e != SERIES_OK) {
			series_free(s);
			return e;
		}
	}
	char *t = series_text(s);
	int64_t id = t ? store_series_create(sv->ctx->store, station, s->created_at, t) : -1;
	free(t);
	if (id < 0) {
		series_free(s);
		return bad(err, cap, SERIES_DATABASE, "the database failed");
	}
	s->id = id;
	pthread_mutex_lock(&sv->lock);
	if (sv->stopping) {
		/* Stored but never started: it ends at once, as a series the
		 * daemon's stop cut. */
		finish(sv, s, "interrupted", "the daemon was stopping when the series came");
		series_free(s);
		pthread_mutex_unlock(&sv->lock);
		return bad(err, cap, SERIES_CONFLICT,
		           "the daemon is stopping: series %lld was not "
		           "started",
		           (long long)id);
	}
	save(sv, s); /* the record with its id */
	series_t **pp = &sv->active;
	while (*pp)
		pp = &(*pp)->next;
	*pp = s;
	pthread_cond_signal(&sv->wake);
	pthread_mutex_unlock(&sv->lock);
	*id_out = id;
	return SERIES_OK;
}

static series_t *find(series_service_t *sv, int64_t id)
{
	for (series_t *s = sv->active; s; s = s->next)
		if (s->id == id)
			return s;
	return NULL;
}

/* Not going (any more): 404 for an unknown id, else 409 with its state. */
static series_error_t not_active(series_service_t *sv, int64_t id, char *err, size_t cap)
{
	bool db_err;
	json_t *j = store_series_json(sv->ctx->store, id, &db_err);
	series_error_t e;
	if (!j)
		e = db_err ? bad(err, cap, SERIES_DATABASE, "the database failed")
		           : bad(err, cap, SERIES_NOT_FOUND, "no series %lld", (long long)id);
	else
		e = bad(err, cap, SERIES_CONFLICT, "series %lld is already %s", (long long)id,
		        json_string_value(json_object_get(j, "state")));
	json_decref(j);
	return e;
}

series_error_t series_abort(series_service_t *sv, int64_t id, char *err, size_t cap)
{
	pthread_mutex_lock(&sv->lock);
	series_t *s = find(sv, id);
	if (s) {
		s->abort_wanted = true;
		/* Halt now rather than at the thread's next look. */
		if (s->cur_run && !s->abort_sent) {
			station_t *st = http_find_station(sv->ctx, s->station);
			s->abort_sent = true;
			if (st)
				station_abort(st, s->cur_run);
		}
		pthread_cond_signal(&sv->wake);
	}
	pthread_mutex_unlock(&sv->lock);
	return s ? SERIES_OK : not_active(sv, id, err, cap);
}

series_error_t series_next(series_service_t *sv, int64_t id, char *err, size_t cap)
{
	series_error_t e = SERIES_OK;
	pthread_mutex_lock(&sv->lock);
	series_t *s = find(sv, id);
	if (s && !s->prompt[0])
		e = bad(err, cap, SERIES_CONFLICT,
		        "series %lld is not waiting for the operator (it is %s)", (long long)id,
		        s->state);
	else if (s)
		s->released = true;
	pthread_cond_signal(&sv->wake);
	pthread_mutex_unlock(&sv->lock);
	return s ? e : not_active(sv, id, err, cap);
}

series_error_t series_weight(series_service_t *sv, int64_t id, double value, const char *unit,
                             const char *reason, char *err, size_t cap)
{
	if (!(value > 0) || !unit ||
	    (strcmp(unit, "g") && strcmp(unit, "mg") && strcmp(unit, "kg")))
		return bad(err, cap, SERIES_BAD_REQUEST,
		           "value must be a number above 0 and unit \"g\", \"mg\" or \"kg\"");
	if (!reason || !*reason || strlen(reason) > 150 ||
	    text_control_at(reason, strlen(reason), false) != TEXT_NONE)
		return bad(err, cap, SERIES_BAD_REQUEST,
		           "reason must say why the weight is typed (1 to 150 characters)");
	series_error_t e = SERIES_OK;
	pthread_mutex_lock(&sv->lock);
	series_t *s = find(sv, id);
	sample_t *p = s && s->cur_sample < s->n_samples ? &s->samples[s->cur_sample] : NULL;
	if (s && (!p || !p->weigh || s->cur_run || p->weights[s->cur_rep].value_g > 0)) {
		e = bad(err, cap, SERIES_CONFLICT,
		        "series %lld is not waiting for a weight (it is %s)", (long long)id,
		        s->state);
	} else if (s) {
		weighing_t *k = &p->weights[s->cur_rep];
		k->value = value;
		k->value_g = grams(value, unit);
		snprintf(k->unit, sizeof k->unit, "%s", unit);
		snprintf(k->source, sizeof k->source, "typed: %s", reason);
		s->prompt[0] = '\0';
		save(sv, s);
	}
	pthread_cond_signal(&sv->wake);
	pthread_mutex_unlock(&sv->lock);
	return s ? e : not_active(sv, id, err, cap);
}

json_t *series_on_station(series_service_t *sv, const char *station)
{
	json_t *j = NULL;
	if (!sv)
		return NULL;
	pthread_mutex_lock(&sv->lock);
	for (series_t *s = sv->active; s && !j; s = s->next)
		if (!strcmp(s->station, station))
			j = json_pack("{s:I,s:s,s:o}", "id", (json_int_t)s->id, "state", s->state,
			              "prompt", str_or_null(s->prompt));
	pthread_mutex_unlock(&sv->lock);
	return j;
}
