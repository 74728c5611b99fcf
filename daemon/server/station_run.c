/* station_run.c: one run on a station, from queued to a final state.
 *
 * The engine decides; this file performs its actions on the devices, feeds
 * back what happened, and stores every accepted point (committed) before the
 * next addition is sent. Interlocks are checked here again, whatever the
 * engine asks, because an engine bug must not flood a beaker.
 */
#include "station.h"
#include "station_priv.h"
#include "titer_book.h"
#include "titer_valid.h"

#include <math.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "calib.h"
#include "engine.h"
#include "log.h"
#include "record.h"
#include "clock.h"
#include "timefmt.h"

#define PROBE_TRIES     3     /* readings tried before a probe fault */
#define PROBE_RETRY_S   0.2   /* between those tries */
#define STALE_READING_S 10.0  /* a reading older than this is a fault */
#define DOSE_POLL_S     0.02  /* status polls while the plunger moves */
#define MOVE_DEADLINE_S 300.0 /* a dose or refill not done by then is a fault */
#define HALT_WAIT_S     5.0   /* a run's halt not answered by then is left to the idle station */
/* While a run stirs, waits, doses or refills, the station still reads the
 * probe this often (for the status and the page only; the engine gets its own
 * readings on its own schedule), so the live reading is never the previous
 * beaker's. */
#define LIVE_READ_S 1.0

typedef struct run {
	station_t *s;
	station_job_t *job;
	engine_t *e;
	run_record_t rec;
	double t0; /* monotonic s at run start */
	int stored_points;
	char last_phase[16];
	double burette_start_ml; /* driver's dispensed_ml at run start */
	double dispensed_ml;     /* by this run, as the device reports */
	bool fault;              /* a device fault ended the run */
	bool interrupted;        /* stop / halt / abort */
	double live_read_mono_s; /* when the live reading was last taken */
	double sample_ml;        /* the sample's volume when measured in mL, else 0 */
	station_step_ctx_t sc;   /* the head's moves and the method's steps */
	bool step_fault;         /* a step, a move or the changer failed (sc.code, sc.msg) */
	char hold[200];          /* hold the station after the run, why; "" when not */
} run_t;

static void now_text(char out[32])
{
	time_format_rfc3339(clock_wall_s(), out);
}

/* What a run at a rack position adds to the record (docs/api.md): the
 * position, the steps done and each doser's delivered volume. */
static void record_extras(const run_t *r, json_t *j)
{
	if (!j)
		return;
	json_object_set_new(j, "position",
	                    r->job->position > 0 ? json_integer(r->job->position) : json_null());
	if (r->s->n_dosers > 0 || r->sc.n_done > 0) {
		json_t *x = station_steps_json(&r->sc);
		if (x)
			json_object_update(j, x);
		json_decref(x);
	}
}

static char *record_text(run_t *r)
{
	char at[32];
	json_t *j;
	char *text;

	now_text(at);
	if (r->e)
		record_fill_from_engine(&r->rec, r->e, at);
	j = record_to_json(&r->rec);
	record_extras(r, j);
	text = j ? json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
	json_decref(j);
	return text;
}

static void publish(run_t *r)
{
	station_t *s = r->s;
	const char *ph = engine_phase(r->e);

	pthread_mutex_lock(&s->lock);
	snprintf(s->snap.phase, sizeof s->snap.phase, "%s", ph ? ph : "");
	s->snap.dispensed_ml = r->dispensed_ml;
	station_unlock(s);
	if (ph && strcmp(ph, r->last_phase)) {
		char *text = record_text(r);
		snprintf(r->last_phase, sizeof r->last_phase, "%s", ph);
		store_run_update(s->store, r->job->run_id, NULL, ph, text);
		free(text);
	}
}

static void point_of(const engine_point_t *p, store_point_t *out)
{
	out->t_s = p->t_s;
	out->volume_ml = p->volume_ml;
	out->mv = p->mv;
	out->has_ph = isfinite(p->ph);
	out->ph = p->ph;
	out->has_temperature = isfinite(p->temperature_c);
	out->temperature_c = p->temperature_c;
	out->settled = p->settled;
	out->has_dpdv = isfinite(p->dpdv);
	out->dpdv = p->dpdv;
}

/* Store points not stored yet. Returns -1 when the database failed: then the
 * run must stop, since a point we cannot keep must not lead to an addition. */
static int store_new_points(run_t *r)
{
	int n = engine_n_points(r->e);

	while (r->stored_points < n) {
		store_point_t p;
		char *text;
		store_status_t st;
		point_of(engine_point(r->e, r->stored_points), &p);
		text = r->stored_points == n - 1 ? record_text(r) : NULL;
		st = store_point_add(r->s->store, r->job->run_id, r->stored_points, &p, text);
		free(text);
		if (st != STORE_OK)
			return -1;
		r->stored_points++;
	}
	return 0;
}

static bool burette_status(run_t *r, drv_burette_status_t *bs, drv_err_t *err);
static double t_run(const run_t *r);
static void mech_fault(run_t *r);

/* Halt the burette for the run and read where it stopped (bs). A halt the
 * burette does not acknowledge is tried again (station_halt_retry) and so is
 * the status, for up to HALT_WAIT_S: a line back within that time still gives
 * the record the pump's own count. Returns true with bs from the pump after
 * the halt; false when it did not answer in time (the station goes on trying
 * the halt after the run) or the daemon is stopping. */
static bool halt_for_run(run_t *r, const char *why, drv_burette_status_t *bs)
{
	station_t *s = r->s;
	double until = clock_mono_s() + HALT_WAIT_S;
	drv_err_t err = {{0}};
	bool halted = station_halt_burette(s, why);

	for (;;) {
		if (halted && burette_status(r, bs, &err) && !bs->moving)
			return true;
		if (clock_mono_s() >= until)
			return false;
		pthread_mutex_lock(&s->lock);
		bool stopping = s->stop_req;
		s->halt_req = false; /* an operator's halt is what is being done */
		pthread_mutex_unlock(&s->lock);
		if (stopping)
			return false;
		station_wait_until(s, clock_mono_s() + STATION_HALT_RETRY_MIN_S, 0);
		if (!halted)
			halted = station_halt_retry(s);
		else if (bs->moving) /* answered, yet moving: halt it again */
			halted = station_halt_burette(s, why);
	}
}

/* Record a fault on a burette already halted (or given up on) and end the run. */
static engine_action_t fault_halted(run_t *r, double t_s, const char *code, const char *msg)
{
	engine_event_t ev = {.kind = ENGINE_EV_FAULT, .t_s = t_s, .code = code, .message = msg};
	char at[32];

	log_err("station %s run %lld: %s: %s", r->s->name, (long long)r->job->run_id, code, msg);
	now_text(at);
	store_event_add(r->s->store, at, r->s->name, r->job->run_id, "fault", code, msg, "daemon");
	station_set_error(r->s, msg);
	r->fault = true;
	return engine_feed(r->e, &ev);
}

static engine_action_t feed_fault(run_t *r, double t_s, const char *code, const char *msg)
{
	drv_burette_status_t bs = {0};

	halt_for_run(r, code, &bs);
	return fault_halted(r, t_s, code, msg);
}

/* What a dose put in, from the burette's count (bs, read after it stopped)
 * since before_ml: into the run's total and the engine's, so the record says
 * what went into the beaker, also when the dose was cut off. */
static double count_dose(run_t *r, const drv_burette_status_t *bs, double before_ml)
{
	double delivered = bs->dispensed_ml - before_ml;

	if (delivered < 0 || !isfinite(delivered))
		delivered = 0;
	r->dispensed_ml += delivered;
	if (delivered > 0)
		engine_feed(r->e, &(engine_event_t){.kind = ENGINE_EV_DOSED,
		                                    .t_s = t_run(r),
		                                    .dosed_ml = delivered});
	return delivered;
}

/* A dose that failed or was cut off by a fault: halt, count what the pump
 * says went in, then fail the run. */
static engine_action_t dose_fault(run_t *r, double before_ml, const drv_burette_status_t *last,
                                  const char *msg)
{
	drv_burette_status_t bs = *last;
	char text[400];

	if (halt_for_run(r, "burette_dose", &bs)) {
		count_dose(r, &bs, before_ml);
		return fault_halted(r, t_run(r), "burette_dose", msg);
	}
	count_dose(r, &bs, before_ml); /* the last count the pump gave */
	snprintf(text, sizeof text,
	         "%s; the burette did not confirm the halt, so dispensed_ml counts only what it "
	         "reported before",
	         msg);
	return fault_halted(r, t_run(r), "burette_dose", text);
}

static double t_run(const run_t *r)
{
	return clock_mono_s() - r->t0;
}

/* A reading for the status only: a failure here is not the run's fault (the
 * engine's own reading will find it). */
static void live_read(run_t *r)
{
	drv_reading_t rd = {0};
	drv_err_t err = {{0}};
	double now = clock_mono_s();

	if (now - r->live_read_mono_s < LIVE_READ_S)
		return;
	r->live_read_mono_s = now;
	(void)station_read_probe(r->s, &rd, &err);
}

/* Wait until a monotonic time, keeping the live reading fresh; true when the
 * run was interrupted meanwhile. */
static bool wait_reading(run_t *r, double until_mono_s)
{
	for (;;) {
		double now = clock_mono_s(), slice = until_mono_s;

		/* A live read only where it cannot delay the step the engine asked
		 * for: a Modbus reading takes milliseconds, the margin is 0.3 s. */
		if (until_mono_s - now > LIVE_READ_S + 0.3) {
			live_read(r);
			slice = clock_mono_s() + LIVE_READ_S;
		}
		if (station_wait_until(r->s, slice, r->job->run_id))
			return true;
		if (slice >= until_mono_s)
			return false;
	}
}

/* The phase the station shows while the syringe refills: not an engine phase,
 * so it is shown but not stored; the next publish() puts the engine's back. */
static void show_phase(run_t *r, const char *phase)
{
	pthread_mutex_lock(&r->s->lock);
	snprintf(r->s->snap.phase, sizeof r->s->snap.phase, "%s", phase);
	station_unlock(r->s);
}

static bool burette_status(run_t *r, drv_burette_status_t *bs, drv_err_t *err)
{
	if (drv_burette_status(&r->s->bur, bs, err) != DRV_OK)
		return false;
	pthread_mutex_lock(&r->s->lock);
	r->s->snap.has_burette = true;
	r->s->snap.burette_total_ml = bs->dispensed_ml;
	r->s->snap.contents_ml = bs->contents_ml;
	station_unlock(r->s);
	return true;
}

/* Wait for the plunger to stop. 0 done, 1 interrupted (halted), -1 fault. */
static int wait_move(run_t *r, drv_burette_status_t *bs, char *msg, size_t cap)
{
	double deadline = clock_mono_s() + MOVE_DEADLINE_S;
	drv_err_t err = {{0}};

	for (;;) {
		if (station_wait_until(r->s, clock_mono_s() + DOSE_POLL_S, r->job->run_id)) {
			halt_for_run(r, "run interrupted", bs);
			return 1;
		}
		if (!burette_status(r, bs, &err)) {
			snprintf(msg, cap, "burette: %s", err.msg);
			return -1;
		}
		live_read(r);
		if (bs->fault) {
			snprintf(msg, cap, "burette reports a fault (motor stall?)");
			return -1;
		}
		if (!bs->moving)
			return 0;
		if (clock_mono_s() > deadline) {
			snprintf(msg, cap, "burette still moving after %.0f s", MOVE_DEADLINE_S);
			return -1;
		}
	}
}

static engine_action_t do_refill(run_t *r)
{
	drv_err_t err = {{0}};
	drv_burette_status_t bs = {0};
	char msg[300];
	int w;

	show_phase(r, "refilling");
	if (drv_burette_refill(&r->s->bur, &err) != DRV_OK)
		return feed_fault(r, t_run(r), "burette_refill", err.msg);
	w = wait_move(r, &bs, msg, sizeof msg);
	if (w < 0)
		return feed_fault(r, t_run(r), "burette_refill", msg);
	if (w > 0) {
		engine_event_t ev = {.kind = ENGINE_EV_ABORT, .t_s = t_run(r)};
		r->interrupted = true;
		return engine_feed(r->e, &ev);
	}
	return engine_feed(r->e, &(engine_event_t){.kind = ENGINE_EV_REFILLED, .t_s = t_run(r)});
}

int station_dose_interlock(double dispensed_ml, double dose_ml, double method_max_ml,
                           double vessel_max_ml, double quantum_ml, double *allowed_ml)
{
	double limit_ml = method_max_ml, room_ml;

	*allowed_ml = 0;
	if (vessel_max_ml > 0 && vessel_max_ml < limit_ml)
		limit_ml = vessel_max_ml;
	if (!isfinite(dispensed_ml) || !isfinite(dose_ml) || !isfinite(limit_ml) ||
	    !(quantum_ml > 0) || dose_ml <= 0)
		return -1;
	if (dispensed_ml + dose_ml <= limit_ml + 1e-9) {
		*allowed_ml = dose_ml;
		return 0;
	}
	/* Whole steps that still fit; 1e-9 absorbs the rounding of the division. */
	room_ml = floor((limit_ml - dispensed_ml) / quantum_ml + 1e-9) * quantum_ml;
	if (room_ml < quantum_ml / 2)
		return -1;
	*allowed_ml = room_ml;
	return 0;
}

static engine_action_t do_dose(run_t *r, double dose_ml)
{
	station_t *s = r->s;
	const method_t *m = &r->job->method;
	drv_err_t err = {{0}};
	drv_burette_status_t bs = {0};
	double q = engine_dose_quantum_ml(r->e);
	double limit_ml = m->volume_max_ml;
	double before_ml, delivered, allowed_ml;
	char msg[300];
	int w;

	/* Interlocks: the method's limit on the run total, and the vessel's on
	 * the beaker's (the sample in mL and the additions are in it too). */
	double room_ml =
	    s->vessel_max_ml > 0 ? s->vessel_max_ml - r->sample_ml - r->sc.added_ml : 0;
	if (s->vessel_max_ml > 0 && room_ml < limit_ml)
		limit_ml = room_ml;
	if (s->vessel_max_ml > 0 && !(room_ml > 0))
		room_ml = 1e-12; /* nothing fits: station_dose_interlock refuses */
	if (station_dose_interlock(r->dispensed_ml, dose_ml, m->volume_max_ml, room_ml, q,
	                           &allowed_ml)) {
		snprintf(msg, sizeof msg,
		         "interlock: a dose of %.4f mL would pass the limit of %.3f mL "
		         "(%.4f mL dispensed)",
		         dose_ml, limit_ml, r->dispensed_ml);
		return feed_fault(r, t_run(r), "volume_interlock", msg);
	}
	if (allowed_ml < dose_ml) {
		log_warn("station %s run %lld: interlock: dose %.4f mL cut to %.4f mL", s->name,
		         (long long)r->job->run_id, dose_ml, allowed_ml);
		dose_ml = allowed_ml;
	}
	if (!burette_status(r, &bs, &err))
		return feed_fault(r, t_run(r),
		                  "burette_"
		                  "status",
		                  err.msg);
	/* The stroke: never ask for more than the syringe holds. */
	if (dose_ml > bs.contents_ml + q / 2) {
		show_phase(r, "refilling");
		if (drv_burette_refill(&s->bur, &err) != DRV_OK)
			return feed_fault(r, t_run(r), "burette_refill", err.msg);
		w = wait_move(r, &bs, msg, sizeof msg);
		if (w < 0)
			return feed_fault(r, t_run(r), "burette_refill", msg);
		if (w > 0)
			goto interrupted;
		show_phase(r, engine_phase(r->e) ? engine_phase(r->e) : "");
		if (dose_ml > bs.contents_ml + q / 2) {
			snprintf(msg, sizeof msg,
			         "a dose of %.4f mL is more than the syringe holds "
			         "(%.4f mL)",
			         dose_ml, bs.contents_ml);
			return feed_fault(r, t_run(r), "stroke_interlock", msg);
		}
	}
	before_ml = bs.dispensed_ml;
	/* A dose refused or cut off may still have started (a reply lost on
	 * the way back): halt and count from the pump. */
	if (drv_burette_dose(&s->bur, dose_ml, &err) != DRV_OK)
		return dose_fault(r, before_ml, &bs, err.msg);
	pthread_mutex_lock(&s->lock);
	s->snap.additions_total++;
	station_unlock(s);
	w = wait_move(r, &bs, msg, sizeof msg);
	if (w < 0)
		return dose_fault(r, before_ml, &bs, msg);
	if (w > 0) {
		count_dose(r, &bs, before_ml); /* halted by wait_move */
		goto interrupted;
	}
	delivered = bs.dispensed_ml - before_ml;
	if (delivered < 0 || !isfinite(delivered))
		delivered = 0;
	r->dispensed_ml += delivered;
	publish(r);
	return engine_feed(
	    r->e,
	    &(engine_event_t){.kind = ENGINE_EV_DOSED, .t_s = t_run(r), .dosed_ml = delivered});
interrupted:
	r->interrupted = true;
	return engine_feed(r->e, &(engine_event_t){.kind = ENGINE_EV_ABORT, .t_s = t_run(r)});
}

/* `scheduled_t_s` is the run time the engine asked for the reading. When the
 * reading was taken on time (within READ_ON_TIME_S) the event carries that
 * time, as on the engine's virtual clock: the engine's stillness test looks
 * for a reading exactly still_for_s back, which a jittered clock never hits. */
#define READ_ON_TIME_S 0.1
static engine_action_t do_read(run_t *r, double scheduled_t_s)
{
	drv_reading_t rd = {0};
	drv_err_t err = {{0}};
	engine_event_t ev = {.kind = ENGINE_EV_READING};

	/* Never titrate with the head up: on a station with a changer every
	 * reading is taken only when the changer says the head is down. */
	if (r->s->has_changer) {
		drv_changer_status_t cs = {.lift = DRV_LIFT_BETWEEN};
		drv_status_t cst = station_changer_status(r->s, &cs, &err);
		if (cst != DRV_OK || cs.fault || cs.lift != DRV_LIFT_DOWN) {
			if (cst == DRV_OK && !cs.fault) {
				snprintf(r->sc.code, sizeof r->sc.code, "head_up");
				snprintf(r->sc.msg, sizeof r->sc.msg,
				         "interlock: a reading with the head %s is refused; the "
				         "titration stops",
				         drv_lift_name(cs.lift));
			} else {
				snprintf(r->sc.code, sizeof r->sc.code, "changer");
				snprintf(r->sc.msg, sizeof r->sc.msg,
				         "changer during the titration: %s",
				         err.msg[0] ? err.msg : "it reports a fault");
			}
			mech_fault(r);
			return fault_halted(r, t_run(r), r->sc.code, r->sc.msg);
		}
	}
	for (int i = 0; i < PROBE_TRIES; i++) {
		if (station_read_probe(r->s, &rd, &err) == DRV_OK)
			break;
		if (i == PROBE_TRIES - 1)
			return feed_fault(r, t_run(r), "probe", err.msg);
		if (station_wait_until(r->s, clock_mono_s() + PROBE_RETRY_S, r->job->run_id))
			return engine_feed(
			    r->e, &(engine_event_t){.kind = ENGINE_EV_ABORT, .t_s = t_run(r)});
	}
	if (clock_mono_s() - rd.t_s > STALE_READING_S)
		return feed_fault(r, t_run(r), "probe_stale", "the probe reading is stale");
	ev.t_s = t_run(r);
	if (ev.t_s - scheduled_t_s >= 0 && ev.t_s - scheduled_t_s < READ_ON_TIME_S)
		ev.t_s = scheduled_t_s;
	ev.mv = rd.mv;
	ev.has_ph = rd.has_ph;
	ev.ph = rd.ph;
	ev.temperature_c = rd.has_temperature ? rd.temperature_c : NAN;
	return engine_feed(r->e, &ev);
}

static void set_stirrer(run_t *r, bool on)
{
	drv_err_t err = {{0}};
	station_t *s = r->s;

	if (!s->stir_open || s->stir_on == on)
		return;
	if (drv_stirrer_set(&s->stir, on, 0, &err) == DRV_OK)
		s->stir_on = on;
	else
		log_warn("station %s: stirrer: %s", s->name, err.msg);
}

/* Titer, blank and calibration from the store; false (with msg) when a
 * pH run needs a calibration it does not have. */
static bool prepare_params(run_t *r, engine_params_t *p, char *msg, size_t cap)
{
	station_t *s = r->s;
	const method_t *m = &r->job->method;
	drv_burette_status_t bs = {0};
	drv_err_t err = {{0}};
	double titer = 1.0, blank = 0;
	store_source_t src;
	station_snapshot_t snap;

	memset(p, 0, sizeof *p);
	p->amount = r->job->amount;
	if (store_titrant_get(s->store, m->titrant_name, &titer, &src) == STORE_OK && titer > 0) {
		snprintf(r->rec.titrant.titer_at, sizeof r->rec.titrant.titer_at, "%s", src.at);
		r->rec.titrant.titer_run_id = src.run_id;
		snprintf(r->rec.titrant.titer_source, sizeof r->rec.titrant.titer_source, "%s",
		         src.run_id > 0 ? "standardization" : "entered");
		valid_until(src.at, titer_valid_days(s->cfg, &src),
		            r->rec.titrant.titer_valid_until);
		snprintf(r->rec.titrant.titer_reason, sizeof r->rec.titrant.titer_reason, "%s",
		         src.reason);
		snprintf(r->rec.titrant.titer_by, sizeof r->rec.titrant.titer_by, "%s", src.by);
	} else {
		titer = 1.0;
	}
	p->titer = titer;
	/* Blanks belong to the titrant (docs/calibration.md): a blank run of
	 * one method serves every assay that uses the same titrant. A blank
	 * run itself uses none. */
	if (m->purpose != PURPOSE_BLANK &&
	    store_blank_get(s->store, m->titrant_name, &blank, &src) == STORE_OK) {
		p->has_blank = true;
		p->blank_ml = blank;
		r->rec.titrant.blank_ml = blank;
		snprintf(r->rec.titrant.blank_at, sizeof r->rec.titrant.blank_at, "%s", src.at);
		r->rec.titrant.blank_run_id = src.run_id;
		snprintf(r->rec.titrant.blank_source, sizeof r->rec.titrant.blank_source,
		         "blank_run");
		valid_until(src.at, blank_valid_days(s->cfg, m), r->rec.titrant.blank_valid_until);
	}
	p->burette_capacity_ml = s->info.capacity_ml;
	p->burette_steps = s->info.steps;
	p->burette_content_ml = burette_status(r, &bs, &err) ? bs.contents_ml : NAN;
	r->burette_start_ml = bs.dispensed_ml;
	p->vessel_max_ml = s->vessel_max_ml;
	p->read_interval_s = s->read_interval_s;
	r->rec.titrant.titer = titer;

	station_snapshot(s, &snap);
	if (m->signal == SIGNAL_PH && !snap.ph_from_probe) {
		char now[32];
		bool db_err;
		calib_result_t cal;
		json_t *j;
		time_format_rfc3339(clock_wall_s(), now);
		j = store_calib_latest(s->store, s->name, true, now, &db_err);
		if (!j || calib_result_from_json(j, &cal)) {
			json_decref(j);
			snprintf(msg, cap,
			         "station %s has no valid electrode calibration and its probe "
			         "gives no pH",
			         s->name);
			return false;
		}
		json_t *cid = json_object_get(j, "id");
		r->rec.calibration.id = json_is_integer(cid) ? json_integer_value(cid) : 0;
		json_decref(j);
		p->has_calibration = true;
		p->cal_slope_pct = cal.slope_pct;
		p->cal_offset_mv = cal.offset_mv;
		r->rec.has_calibration = true;
		r->rec.calibration.slope_pct = cal.slope_pct;
		r->rec.calibration.offset_mv = cal.offset_mv;
		time_format_rfc3339(cal.at_unix_s, r->rec.calibration.at);
	}
	return true;
}

static const char *final_state(const run_t *r)
{
	switch (engine_outcome(r->e)) {
	case ENGINE_OUTCOME_ABORTED:
		return "aborted";
	case ENGINE_OUTCOME_FAILED:
		return "failed"; /* a fault, or a missing endpoint or result */
	default:
		return r->interrupted ? "aborted" : "finished";
	}
}

typedef struct standardization_note {
	bool have;     /* a standardization run gave a titer */
	bool complete; /* the series is complete: res holds its statistics */
	int replicate, of;
	double titer;
	standardization_result_t res;
} standardization_note_t;

/* The titer a finished standardization run yields, or NaN. */
static double run_titer(const run_t *r)
{
	const method_t *m = &r->job->method;
	for (int i = 0; i < engine_n_results(r->e); i++) {
		const engine_result_t *res = engine_result(r->e, i);
		double titer;
		if (!res->has_value || res->accept == ENGINE_ACCEPT_LOW ||
		    res->accept == ENGINE_ACCEPT_HIGH)
			continue;
		if (standardization_titer_from_result(res->name, res->unit, res->value,
		                                      m->titrant_molarity, &titer) == 0)
			return titer;
	}
	return NAN;
}

/* Add a finished standardization run to its titrant's series. */
static void standardization_add(run_t *r, standardization_note_t *n)
{
	const char *name = r->job->method.titrant_name;

	memset(n, 0, sizeof *n);
	n->titer = run_titer(r);
	if (!isfinite(n->titer))
		return;
	n->have = true;
	n->of = r->s->standardization_cfg.replicates;
	if (!r->s->titers) /* no book: a station outside the daemon (unit tests) */
		return;
	n->complete = titer_book_add(r->s->titers, &r->s->standardization_cfg, name, n->titer,
	                             &n->replicate, &n->res);
	if (n->replicate < 0) {
		n->have = false;
		log_err("station %s run %lld: out of memory keeping the titer", r->s->name,
		        (long long)r->job->run_id);
	}
}

static json_t *num_or_null(double v)
{
	return isfinite(v) ? json_real(v) : json_null();
}

/* The run record's "standardization" object (docs/api.md). */
static json_t *standardization_json(const standardization_note_t *n)
{
	json_t *j = json_pack("{s:o,s:i,s:i,s:b}", "titer", num_or_null(n->titer), "replicate",
	                      n->replicate, "of", n->of, "complete", n->complete);
	if (n->complete) {
		json_object_set_new(j, "n", json_integer(n->res.n));
		json_object_set_new(j, "mean", num_or_null(n->res.mean));
		json_object_set_new(j, "sd", num_or_null(n->res.sd));
		json_object_set_new(j, "rsd_pct", num_or_null(n->res.rsd_pct));
		json_object_set_new(j, "accepted", json_boolean(n->res.accepted));
		json_object_set_new(j, "reason",
		                    n->res.reason[0] ? json_string(n->res.reason) : json_null());
	}
	return j;
}

/* After the final record of a finished standardization or blank is stored:
 * keep what it measured, and say so in the audit trail. */
static void keep_outcome(run_t *r, const standardization_note_t *n)
{
	const method_t *m = &r->job->method;
	const char *st = r->s->name;
	int64_t id = r->job->run_id;
	/* what the run measured is on the name of whoever queued it */
	const char *who = r->job->requested_by[0] ? r->job->requested_by : "daemon";
	char at[32], msg[400];

	now_text(at);
	if (m->purpose == PURPOSE_STANDARDIZE && n->have && !n->complete) {
		snprintf(msg, sizeof msg, "%s: titer %.6f, replicate %d of %d", m->titrant_name,
		         n->titer, n->replicate, n->of);
		store_event_add(r->s->store, at, st, id, "standardization", "replicate", msg, who);
	} else if (m->purpose == PURPOSE_STANDARDIZE && n->have) {
		if (n->res.accepted) {
			json_t *j = standardization_json(n);
			char *text =
			    j ? json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
			json_decref(j);
			if (store_titrant_set(r->s->store, m->titrant_name, m->titrant_molarity,
			                      n->res.mean, at, id, text) != STORE_OK)
				log_err("station %s run %lld: could not store the titer of %s", st,
				        (long long)id, m->titrant_name);
			free(text);
			snprintf(msg, sizeof msg, "%s: titer %.6f stored, mean of %d (RSD %.3f %%)",
			         m->titrant_name, n->res.mean, n->res.n, n->res.rsd_pct);
		} else {
			snprintf(msg, sizeof msg, "%s: titer %.6f not stored: %s", m->titrant_name,
			         n->res.mean, n->res.reason);
		}
		store_event_add(r->s->store, at, st, id, "standardization",
		                n->res.accepted ? "accepted" : "rejected", msg, who);
		log_notice("station %s run %lld: %s", st, (long long)id, msg);
	} else if (m->purpose == PURPOSE_BLANK && engine_n_endpoints(r->e) > 0) {
		double v = engine_endpoint(r->e, 0)->volume_ml;
		store_blank_set(r->s->store, m->titrant_name, v, at, id);
		snprintf(msg, sizeof msg, "%s: blank %.4f mL stored", m->titrant_name, v);
		store_event_add(r->s->store, at, st, id, "blank", "stored", msg, who);
	}
}

/* Keep a final record the store refused (takes `text`). With the list full
 * the oldest goes: a restart still ends that run as `interrupted`. */
static void keep_pending(station_t *s, int64_t run_id, const char *state, char *text)
{
	if (!text)
		return;
	if (s->n_pending == STATION_MAX_PENDING) {
		log_err("station %s: dropping the unstored final record of run %lld", s->name,
		        (long long)s->pending[0].run_id);
		free(s->pending[0].record_json);
		memmove(s->pending, s->pending + 1,
		        (STATION_MAX_PENDING - 1) * sizeof s->pending[0]);
		s->n_pending--;
	}
	struct station_pending *p = &s->pending[s->n_pending++];
	p->run_id = run_id;
	snprintf(p->state, sizeof p->state, "%s", state);
	p->record_json = text;
	p->tries = 1;
	s->pending_next_s = clock_mono_s() + STATION_PENDING_RETRY_S;
	station_set_error(s, "the database refuses writes (disk full?): a run's final record "
	                     "waits to be stored and no run starts until it is");
}

int station_store_pending(station_t *s, bool now)
{
	if (s->n_pending == 0 || (!now && clock_mono_s() < s->pending_next_s))
		return s->n_pending;
	s->pending_next_s = clock_mono_s() + STATION_PENDING_RETRY_S;
	while (s->n_pending > 0) {
		struct station_pending *p = &s->pending[0];
		int64_t seq = 0;
		store_status_t st =
		    store_run_finish(s->store, p->run_id, p->state, p->record_json, &seq);
		if (st == STORE_ERR) {
			p->tries++;
			return s->n_pending;
		}
		/* Stored, or already final / gone (nothing left to do for it). */
		if (st == STORE_OK)
			log_notice(
			    "station %s run %lld: final record stored after %d tries, seq %lld",
			    s->name, (long long)p->run_id, p->tries + 1, (long long)seq);
		free(p->record_json);
		memmove(s->pending, s->pending + 1,
		        (size_t)(s->n_pending - 1) * sizeof s->pending[0]);
		s->n_pending--;
	}
	station_set_error(s, "");
	return 0;
}

/* A dose cut off by a fault or a halt may have put titrant in after the last
 * point: the curve then ends with one more point at the pump's own position
 * (unsettled), so the record's last point and dispensed_ml agree with what
 * went into the beaker. */
static void last_point_at_pump(run_t *r, int n)
{
	drv_reading_t rd = {0};
	drv_err_t err = {{0}};
	store_point_t p = {0};
	double last_ml = n > 0 ? engine_point(r->e, n - 1)->volume_ml : 0;

	if (!(r->dispensed_ml > last_ml + engine_dose_quantum_ml(r->e) / 2))
		return;
	p.t_s = t_run(r);
	p.volume_ml = r->dispensed_ml;
	p.mv = NAN;
	if (station_read_probe(r->s, &rd, &err) == DRV_OK) {
		p.mv = rd.mv;
		p.has_ph = rd.has_ph;
		p.ph = rd.ph;
		p.has_temperature = rd.has_temperature;
		p.temperature_c = rd.temperature_c;
	}
	if (!isfinite(p.mv))
		return; /* no reading to put there: dispensed_ml alone says it */
	p.settled = false;
	if (store_point_add(r->s->store, r->job->run_id, n, &p, NULL) != STORE_OK)
		log_warn("station %s run %lld: could not store the point at the pump's position",
		         r->s->name, (long long)r->job->run_id);
}

/* Why a run ended early by a command, not by itself: "interrupted" (the
 * daemon is stopping), "halted" (the station's halt), "aborted" (the run's
 * abort); "" otherwise. Read at the end of the run, before the station
 * clears its requests. */
static const char *cut_by(run_t *r)
{
	station_t *s = r->s;
	const char *why = "";

	if (!r->interrupted && engine_outcome(r->e) != ENGINE_OUTCOME_ABORTED)
		return why;
	pthread_mutex_lock(&s->lock);
	why = s->stop_req ? "interrupted" : s->halt_req ? "halted" : "aborted";
	pthread_mutex_unlock(&s->lock);
	return why;
}

static void finish(run_t *r)
{
	const char *cut = cut_by(r);
	/* Stopping the daemon is not an operator's abort: the run is
	 * interrupted (docs/lims.md). */
	const char *state = !strcmp(cut, "interrupted") ? "interrupted" : final_state(r);
	/* a fault of an after step or of the park fails a finished titration */
	bool after_fault = r->step_fault && !r->fault && !strcmp(state, "finished");
	char *text;
	int64_t seq = 0;
	int n = engine_n_points(r->e);
	standardization_note_t note;

	set_stirrer(r, false);
	/* engine_done() smooths dpdv: store the final points in place. */
	if (n > 0) {
		store_point_t *pts = calloc((size_t)n, sizeof *pts);
		for (int i = 0; pts && i < n; i++)
			point_of(engine_point(r->e, i), &pts[i]);
		if (!pts || store_points_rewrite(r->s->store, r->job->run_id, pts, n) != STORE_OK)
			log_warn("station %s run %lld: could not store the smoothed derivatives",
			         r->s->name, (long long)r->job->run_id);
		free(pts);
	}
	last_point_at_pump(r, n);
	now_text(r->rec.ended_at);
	snprintf(r->rec.state, sizeof r->rec.state, "%s", state);
	memset(&note, 0, sizeof note);
	if (after_fault)
		state = "failed";
	if (!strcmp(state, "finished") && r->job->method.purpose == PURPOSE_STANDARDIZE)
		standardization_add(r, &note);
	text = record_text(r);
	/* record_fill_from_engine() sets the phase; a final record has none */
	if (text) {
		json_t *j = json_loads(text, 0, NULL);
		free(text);
		json_object_set_new(j, "phase", json_null());
		json_object_set_new(j, "state", json_string(state));
		if (cut[0]) {
			/* Halts, aborts and a stop of the daemon are in the faults, as
			 * docs/lims.md says, with the reason in words. */
			const char *words =
			    !strcmp(cut, "interrupted")
			        ? "the daemon was stopped (SIGTERM or SIGINT) during the run; the "
			          "burette was halted"
			    : !strcmp(cut, "halted")
			        ? "an operator halted the station during the run"
			        : "an operator aborted the run";
			json_t *fl = json_object_get(j, "faults");
			json_object_set_new(
			    j, "stop_reason",
			    json_string(!strcmp(cut, "interrupted") ? "interrupted" : "aborted"));
			json_object_set_new(j, "stop_detail", json_string(words));
			if (json_is_array(fl))
				json_array_append_new(fl, json_pack("{s:s,s:s,s:s}", "at",
				                                    r->rec.ended_at, "code", cut,
				                                    "message", words));
		}
		if (after_fault) {
			json_t *fl = json_object_get(j, "faults");
			json_object_set_new(j, "stop_reason", json_string("fault"));
			json_object_set_new(j, "stop_detail", json_string(r->sc.msg));
			if (json_is_array(fl))
				json_array_append_new(
				    fl, json_pack("{s:s,s:s,s:s}", "at", r->rec.ended_at, "code",
				                  r->sc.code, "message", r->sc.msg));
			store_event_add(r->s->store, r->rec.ended_at, r->s->name, r->job->run_id,
			                "fault", r->sc.code, r->sc.msg, "daemon");
		}
		if (note.have)
			json_object_set_new(j, "standardization", standardization_json(&note));
		text = json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10));
		json_decref(j);
	}
	if (!text) {
		/* No final state without its record: when the full record cannot
		 * be written (out of memory), a short one says so; the points and
		 * endpoints are in their own tables. */
		json_t *j = json_pack(
		    "{s:I,s:s,s:s,s:s,s:s,s:[{s:s,s:s,s:s}]}", "id", (json_int_t)r->job->run_id,
		    "station", r->s->name, "state", state, "ended_at", r->rec.ended_at,
		    "stop_reason", "fault", "faults", "at", r->rec.ended_at, "code", "internal",
		    "message", "the full record could not be written; see the run's points");
		text = j ? json_dumps(j, JSON_COMPACT) : NULL;
		json_decref(j);
		log_err("station %s run %lld: the full record could not be written", r->s->name,
		        (long long)r->job->run_id);
	}
	station_audit_run(r->s, r->job->run_id, state,
	                  cut[0] ? cut : engine_stop_name(engine_stop_reason(r->e)));
	if (store_run_finish(r->s->store, r->job->run_id, state, text, &seq) != STORE_OK) {
		log_err("station %s run %lld: could not store the final record; keeping it to "
		        "store again",
		        r->s->name, (long long)r->job->run_id);
		keep_pending(r->s, r->job->run_id, state, text);
		text = NULL;
	}
	free(text);
	if (!strcmp(state, "finished"))
		keep_outcome(r, &note);
	log_notice("station %s run %lld: %s (%s), %d points, %.4f mL, seq %lld", r->s->name,
	           (long long)r->job->run_id, state, engine_stop_name(engine_stop_reason(r->e)), n,
	           r->dispensed_ml, (long long)seq);
}

/* A run that ends before its titration: failed (no calibration, no devices,
 * a fault of a move or a step) or aborted (a halt or an abort meanwhile). */
static void end_early(run_t *r, const char *state, const char *code, const char *msg)
{
	char at[32];
	json_t *j;
	char *text;

	now_text(at);
	record_add_fault(&r->rec, at, code, msg);
	snprintf(r->rec.state, sizeof r->rec.state, "%s", state);
	snprintf(r->rec.ended_at, sizeof r->rec.ended_at, "%s", at);
	snprintf(r->rec.stop_reason, sizeof r->rec.stop_reason, "%s",
	         strcmp(state, "failed") ? state : "fault");
	j = record_to_json(&r->rec);
	record_extras(r, j);
	text = j ? json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
	json_decref(j);
	store_run_finish(r->s->store, r->job->run_id, state, text, NULL);
	station_audit_run(r->s, r->job->run_id, state, msg);
	store_event_add(r->s->store, at, r->s->name, r->job->run_id,
	                strcmp(state, "failed") ? "abort" : "fault", code, msg, "daemon");
	free(text);
	log_err("station %s run %lld: %s", r->s->name, (long long)r->job->run_id, msg);
}

static void fail_early(run_t *r, const char *code, const char *msg)
{
	end_early(r, "failed", code, msg);
}

/* A fault of the changer or a doser: every dosing unit halted, the head
 * raised where safe, and the station held until an operator resumes it. */
static void mech_fault(run_t *r)
{
	station_fault_stop(r->s, r->sc.code);
	snprintf(r->hold, sizeof r->hold, "%.24s: %.120s; check the rack and the head, then resume",
	         r->sc.code, r->sc.msg);
	r->step_fault = true;
}

/* The head to the run's position and the method's before steps. Returns
 * true when the titration may start; else the run is ended. */
static bool before_titration(run_t *r)
{
	const method_t *m = &r->job->method;
	int rc = STEP_DONE;

	if (r->job->position > 0)
		rc = station_head_to(&r->sc, r->job->position, true);
	if (rc == STEP_DONE)
		rc = station_run_steps(&r->sc, m->before, m->n_before, true);
	if (rc == STEP_DONE)
		return true;
	if (rc == STEP_INTERRUPTED) {
		end_early(r, "aborted", "aborted",
		          "an operator halted the station or aborted the run before its titration");
		return false;
	}
	mech_fault(r);
	fail_early(r, r->sc.code, r->sc.msg);
	return false;
}

static void note_lateness(station_t *s, double late_s)
{
	if (late_s < 0)
		late_s = 0;
	pthread_mutex_lock(&s->lock);
	s->snap.wake_count++;
	s->snap.wake_late_sum_s += late_s;
	if (late_s > s->snap.wake_late_max_s)
		s->snap.wake_late_max_s = late_s;
	station_unlock(s);
}

void station_run_job(station_t *s, station_job_t *job)
{
	run_t r = {.s = s, .job = job};
	engine_params_t p;
	engine_action_t act;
	char msg[300];
	char *text;
	bool scheduled;

	record_init(&r.rec);
	r.rec.id = job->run_id;
	snprintf(r.rec.station, sizeof r.rec.station, "%s", s->name);
	record_set_method(&r.rec, &job->method);
	snprintf(r.rec.sample.id, sizeof r.rec.sample.id, "%s", job->sample_id);
	r.rec.sample.amount = job->amount;
	snprintf(r.rec.queued_at, sizeof r.rec.queued_at, "%s", job->queued_at);
	snprintf(r.rec.requested_by, sizeof r.rec.requested_by, "%s", job->requested_by);
	r.rec.series_id = job->series_id;
	record_set_weighing(&r.rec, job->weight_value, job->weight_unit, job->weight_source);
	now_text(r.rec.started_at);
	snprintf(r.rec.state, sizeof r.rec.state, "running");

	r.sc.s = s;
	r.sc.run_id = job->run_id;
	r.sc.position = job->position;
	r.sample_ml = job->method.sample_unit == UNIT_ML ? job->amount : 0;
	r.sc.in_beaker_ml = r.sample_ml;

	if (!s->bur_open || !s->probe_open) {
		fail_early(&r, "offline", "the station's devices are not answering");
		return;
	}
	if ((s->has_changer || s->n_dosers) && !station_open_extras(s)) {
		fail_early(&r, "offline", "the station's changer or a doser is not answering");
		return;
	}
	{ /* The titer was valid when the run was queued; it may have
	   * expired while the run waited (docs/calibration.md). */
		bool db_err;
		if (!titer_valid_for_run(s->cfg, s->store, &job->method, clock_wall_s(), msg,
		                         sizeof msg, &db_err)) {
			fail_early(&r, db_err ? "database" : "no_titer",
			           db_err ? "the database failed reading the titer" : msg);
			return;
		}
	}
	if (!prepare_params(&r, &p, msg, sizeof msg)) {
		fail_early(&r, "no_calibration", msg);
		return;
	}
	text = record_text(&r);
	store_run_update(s->store, job->run_id, "running", NULL, text);
	free(text);
	if (!before_titration(&r)) {
		if (r.hold[0])
			station_hold(s, r.hold);
		return;
	}
	/* addN_* from what the dosers really delivered */
	for (int i = 0; i < r.sc.n_adds && i < FORMULA_MAX_ADD; i++) {
		const struct station_doser *o = &s->dosers[r.sc.add_doser[i]];
		double titer = 1.0;
		p.add_ml[i] = r.sc.add_ml[i];
		p.add_molarity[i] = o->molarity;
		if (store_titrant_get(s->store, o->reagent, &titer, NULL) != STORE_OK ||
		    !(titer > 0))
			titer = 1.0;
		p.add_titer[i] = titer;
		p.n_adds = i + 1;
	}
	if (r.sc.added_ml > 0)
		p.start_volume_ml = r.sample_ml + r.sc.added_ml;
	/* the titrant may fill what the sample and the additions left */
	if (s->vessel_max_ml > 0)
		p.vessel_max_ml = s->vessel_max_ml - r.sample_ml - r.sc.added_ml;
	r.e = engine_new(&job->method, &p);
	if (!r.e) {
		fail_early(&r, "internal", "out of memory");
		return;
	}
	text = record_text(&r);
	store_run_update(s->store, job->run_id, "running", engine_phase(r.e), text);
	free(text);
	log_info("station %s run %lld: started, method %s revision %ld", s->name,
	         (long long)job->run_id, job->method.id, job->method.revision);

	r.t0 = clock_mono_s();
	act = engine_feed(r.e, &(engine_event_t){.kind = ENGINE_EV_START, .t_s = 0});
	while (act.kind != ENGINE_ACT_STOP) {
		publish(&r);
		if (act.new_point >= 0 && store_new_points(&r)) {
			act = feed_fault(
			    &r, t_run(&r), "storage",
			    "could not store a point; stopping before the next addition");
			continue;
		}
		set_stirrer(&r, act.stir_on);
		if (station_interrupted(s, job->run_id)) {
			station_halt_burette(s, "run interrupted");
			r.interrupted = true;
			act = engine_feed(
			    r.e, &(engine_event_t){.kind = ENGINE_EV_ABORT, .t_s = t_run(&r)});
			continue;
		}
		switch (act.kind) {
		case ENGINE_ACT_STIR:
		case ENGINE_ACT_WAIT:
		case ENGINE_ACT_READ:
			/* Only a wait that starts before its time measures scheduling:
			 * a time already past is the cost of the last step (a commit). */
			scheduled = r.t0 + act.until_t_s > clock_mono_s() + 1e-4;
			if (wait_reading(&r, r.t0 + act.until_t_s))
				continue; /* handled at the top of the loop */
			if (scheduled)
				note_lateness(s, clock_mono_s() - (r.t0 + act.until_t_s));
			if (act.kind == ENGINE_ACT_READ)
				act = do_read(&r, act.until_t_s);
			else
				act = engine_feed(r.e, &(engine_event_t){.kind = ENGINE_EV_TICK,
				                                         .t_s = t_run(&r)});
			break;
		case ENGINE_ACT_DOSE:
			act = do_dose(&r, act.dose_ml);
			break;
		case ENGINE_ACT_REFILL:
			act = do_refill(&r);
			break;
		case ENGINE_ACT_STOP:
			break;
		}
	}
	if (act.new_point >= 0)
		store_new_points(&r);
	if (!r.fault && !r.interrupted && !r.step_fault) {
		/* an after step's addition lands on the titrated beaker */
		r.sc.in_beaker_ml += r.dispensed_ml;
		int rc = station_run_steps(&r.sc, job->method.after, job->method.n_after, false);
		if (rc == STEP_DONE)
			rc = station_park(&r.sc);
		if (rc == STEP_INTERRUPTED)
			r.interrupted = true;
		else if (rc == STEP_FAULT)
			mech_fault(&r);
	}
	finish(&r);
	engine_free(r.e);
	if (r.hold[0])
		station_hold(s, r.hold);
}
