/* station.c: the station thread's life, its idle loop, commands and snapshot.
 * The run itself is in station_run.c. */
#include "station.h"
#include "station_priv.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "log.h"
#include "notify.h"
#include "record.h"
#include "clock.h"
#include "timefmt.h"

#define IDLE_READ_S 1.0 /* probe reading while idle, for the live value */
#define REOPEN_S    2.0 /* retry unanswering devices this often */

/* Configure the devices; the changer and the dosers into `x` when given
 * (the station keeps them), else only checked and freed. */
static void configure_devices(const cfg_t *c, const cfg_station_t *sc, drv_burette_t *b,
                              drv_probe_t *p, drv_stirrer_t *st, station_t *x, diag_list_t *d)
{
	if (sc->burette)
		drv_burette_configure(&c->doc, sc->burette, b, d);
	if (sc->probe)
		drv_probe_configure(&c->doc, sc->probe, p, d);
	if (sc->stirrer)
		drv_stirrer_configure(&c->doc, sc->stirrer, st, d);
	/* Each doser is a burette driver of its own. */
	for (int i = 0; i < sc->n_dosers; i++) {
		drv_burette_t db = {0};
		if (sc->dosers[i].burette &&
		    drv_burette_configure(&c->doc, sc->dosers[i].burette, &db, d) == 0 && x) {
			struct station_doser *o = &x->dosers[x->n_dosers++];
			snprintf(o->name, sizeof o->name, "%s", sc->dosers[i].name);
			snprintf(o->reagent, sizeof o->reagent, "%s", sc->dosers[i].reagent);
			o->molarity = sc->dosers[i].molarity;
			o->bur = db;
			drv_burette_info(&o->bur, &o->info);
			continue;
		}
		drv_burette_close(&db);
	}
	/* The balance: checked here; the series service opens its own handle. */
	if (sc->balance) {
		drv_balance_t bal = {0};
		drv_balance_configure(&c->doc, sc->balance, &bal, d);
		drv_balance_close(&bal);
	}
	if (sc->changer) {
		drv_changer_t ch = {0};
		if (drv_changer_configure(&c->doc, sc->changer, &ch, d) == 0 && x) {
			x->chg = ch;
			x->has_changer = true;
			drv_changer_info(&x->chg, &x->chg_info);
			return;
		}
		drv_changer_close(&ch);
	}
}

static void close_extras(station_t *s)
{
	for (int i = 0; i < s->n_dosers; i++)
		drv_burette_close(&s->dosers[i].bur);
	s->n_dosers = 0;
	drv_changer_close(&s->chg);
	s->has_changer = false;
}

int station_check_config(const cfg_t *c, const cfg_station_t *sc, diag_list_t *d)
{
	drv_burette_t b = {0};
	drv_probe_t p = {0};
	drv_stirrer_t st = {0};
	size_t before = d->n;

	configure_devices(c, sc, &b, &p, &st, NULL, d);
	drv_burette_close(&b);
	drv_probe_close(&p);
	drv_stirrer_close(&st);
	return d->n > before ? -1 : 0;
}

station_t *station_new(const cfg_t *c, const cfg_station_t *sc, const calib_config_t *cal,
                       diag_list_t *d)
{
	station_t *s = calloc(1, sizeof *s);
	pthread_condattr_t ca;
	size_t before = d->n;

	if (!s)
		return NULL;
	snprintf(s->name, sizeof s->name, "%s", sc->name);
	s->vessel_max_ml = sc->vessel_max_ml;
	s->read_interval_s = sc->read_interval_s;
	s->cfg = c;
	configure_devices(c, sc, &s->bur, &s->probe, &s->stir, s, d);
	s->has_stirrer = sc->stirrer != NULL;
	if (d->n > before) {
		close_extras(s);
		drv_burette_close(&s->bur);
		drv_probe_close(&s->probe);
		drv_stirrer_close(&s->stir);
		free(s);
		return NULL;
	}
	drv_burette_info(&s->bur, &s->info);
	{
		/* stopcockd reports errors in `standardization:`; here only the values */
		diag_list_t ignored = DIAG_LIST_INIT;
		standardization_config_parse(&c->doc, c->standardization, &s->standardization_cfg,
		                             &ignored);
		diag_free(&ignored);
	}
	if (cal)
		s->cal_cfg = *cal;
	else
		calib_config_defaults(&s->cal_cfg);
	pthread_mutex_init(&s->lock, NULL);
	pthread_condattr_init(&ca);
	pthread_condattr_setclock(&ca, CLOCK_MONOTONIC);
	pthread_cond_init(&s->cond, &ca);
	pthread_condattr_destroy(&ca);
	snprintf(s->snap.name, sizeof s->snap.name, "%s", s->name);
	snprintf(s->snap.state, sizeof s->snap.state, "offline");
	s->snap.capacity_ml = s->info.capacity_ml;
	s->snap.vessel_max_ml = s->vessel_max_ml;
	s->snap.has_changer = s->has_changer;
	snprintf(s->snap.changer_lift, sizeof s->snap.changer_lift, "up");
	pthread_mutex_lock(&s->lock);
	station_unlock(s); /* the first published snapshot */
	return s;
}

const char *station_name(const station_t *s)
{
	return s->name;
}

double station_vessel_max_ml(const station_t *s)
{
	return s->vessel_max_ml;
}

double station_capacity_ml(const station_t *s)
{
	return s->info.capacity_ml;
}

bool station_changer(const station_t *s, long *positions, long *rinse, long *park)
{
	if (!s->has_changer)
		return false;
	*positions = s->chg_info.positions;
	*rinse = s->chg_info.rinse;
	*park = s->chg_info.park;
	return true;
}

bool station_can_run_step(const station_t *s, const method_step_t *st, char *why, size_t cap)
{
	switch (st->kind) {
	case STEP_ADD:
		for (int i = 0; i < s->n_dosers; i++)
			if (!strcmp(s->dosers[i].name, st->doser))
				return true;
		snprintf(why, cap, "station %s has no dosing unit '%s'", s->name, st->doser);
		return false;
	case STEP_STIR:
		if (s->has_stirrer)
			return true;
		snprintf(why, cap, "station %s has no stirrer for stir_s", s->name);
		return false;
	case STEP_RINSE:
		if (s->has_changer && (s->chg_info.has_rinse || s->chg_info.rinse))
			return true;
		snprintf(why, cap,
		         "station %s cannot rinse the head for rinse_s: it needs a sample changer "
		         "with a rinse pump or a rinse position",
		         s->name);
		return false;
	case STEP_WAIT:
		return true;
	}
	return true;
}

int station_doser_names(const station_t *s, char (*out)[METHOD_ID_MAX], int cap)
{
	int n = 0;
	for (int i = 0; i < s->n_dosers && n < cap; i++)
		snprintf(out[n++], METHOD_ID_MAX, "%s", s->dosers[i].name);
	return n;
}

void station_set_error(station_t *s, const char *msg)
{
	pthread_mutex_lock(&s->lock);
	if (s->snap.halt_pending) { /* that says most: it stays until the halt is answered */
		pthread_mutex_unlock(&s->lock);
		return;
	}
	snprintf(s->snap.last_error, sizeof s->snap.last_error, "%s", msg ? msg : "");
	station_unlock(s);
}

static void note_health(station_t *s, const char *what, bool *bad, bool ok, const char *msg);

/* Open the burette when it is closed; true when open. Its driver halts it
 * first on every open and reopen of its line (drv.h), so a replugged pump
 * never continues a move it was given before; the halt here is a second. */
static bool open_burette(station_t *s)
{
	drv_err_t err = {{0}};

	if (s->bur_open)
		return true;
	if (drv_burette_open(&s->bur, &err) != DRV_OK) {
		note_health(s, "burette", &s->bur_bad, false, err.msg);
		return false;
	}
	s->bur_open = true;
	if (drv_burette_halt(&s->bur, &err) != DRV_OK)
		log_warn("station %s: halt after open: %s", s->name, err.msg);
	log_info("station %s: burette open", s->name);
	return true;
}

/* Open what is closed. */
static void open_devices(station_t *s, bool force)
{
	drv_err_t err = {{0}};
	double now = clock_mono_s();

	if (!force && now < s->next_open_try_s)
		return;
	s->next_open_try_s = now + REOPEN_S;
	open_burette(s);
	if (!s->probe_open) {
		if (drv_probe_open(&s->probe, &err) == DRV_OK) {
			s->probe_open = true;
			log_info("station %s: probe open", s->name);
		} else {
			note_health(s, "probe", &s->probe_bad, false, err.msg);
		}
	}
	station_open_extras(s);
	if (s->has_stirrer && !s->stir_open) {
		if (drv_stirrer_open(&s->stir, &err) == DRV_OK) {
			s->stir_open = true;
			/* Its state is unknown (a crash may have left it on):
			 * count it on, so idle_tick turns it off. */
			s->stir_on = true;
		} else
			log_warn("station %s: stirrer: %s", s->name, err.msg);
	}
}

int station_halt_at_start(station_t *s, char *err, size_t cap)
{
	drv_err_t e = {{0}};

	if (drv_burette_open(&s->bur, &e) != DRV_OK) {
		snprintf(err, cap, "%s", e.msg);
		return -1;
	}
	s->bur_open = true;
	if (drv_burette_halt(&s->bur, &e) != DRV_OK) {
		snprintf(err, cap, "%s", e.msg);
		return -1;
	}
	/* The changer and the dosers halt on opening too: nothing moves after a
	 * restart (one that does not answer yet is opened by the thread). */
	station_open_extras(s);
	return 0;
}

bool station_open_extras(station_t *s)
{
	drv_err_t err = {{0}};
	bool all = true;

	if (s->has_changer && !s->chg_open) {
		if (drv_changer_open(&s->chg, &err) == DRV_OK) {
			s->chg_open = true;
			log_info("station %s: changer open", s->name);
		} else {
			log_warn("station %s: changer: %s", s->name, err.msg);
			all = false;
		}
	}
	for (int i = 0; i < s->n_dosers; i++) {
		struct station_doser *o = &s->dosers[i];
		if (o->open)
			continue;
		if (drv_burette_open(&o->bur, &err) == DRV_OK) {
			o->open = true;
			if (drv_burette_halt(&o->bur, &err) != DRV_OK)
				log_warn("station %s: doser %s: halt after open: %s", s->name,
				         o->name, err.msg);
			log_info("station %s: doser %s open", s->name, o->name);
		} else {
			log_warn("station %s: doser %s: %s", s->name, o->name, err.msg);
			all = false;
		}
	}
	return all;
}

drv_status_t station_changer_status(station_t *s, drv_changer_status_t *st, drv_err_t *err)
{
	drv_status_t rc;

	if (!s->chg_open && !station_open_extras(s) && !s->chg_open)
		return drv_fail(err, DRV_UNPLUGGED, "changer is not connected");
	rc = drv_changer_status(&s->chg, st, err);
	if (rc == DRV_OK) {
		pthread_mutex_lock(&s->lock);
		s->snap.changer_known = true;
		s->snap.changer_position = st->position;
		snprintf(s->snap.changer_lift, sizeof s->snap.changer_lift, "%s",
		         drv_lift_name(st->lift));
		s->snap.changer_moving = st->moving;
		station_unlock(s);
	}
	return rc;
}

bool station_halt_doser(station_t *s, int i, const char *why)
{
	struct station_doser *o = &s->dosers[i];
	drv_err_t err = {{0}};
	bool done = false;

	/* tried also on a line that failed: the driver reopens it once (drv.h) */
	for (int k = 0; k < 2 && !done; k++)
		done = drv_burette_halt(&o->bur, &err) == DRV_OK;
	if (done && o->halt_pending)
		log_notice("station %s: doser %s halted (%s)", s->name, o->name, why);
	if (!done && !o->halt_pending) {
		log_err("station %s: doser %s not confirmed halted (%s): %s; trying again until it "
		        "answers",
		        s->name, o->name, why, err.msg);
		station_set_error(s, "a doser did not confirm its halt; trying again");
	}
	o->halt_pending = !done;
	if (!done)
		s->extra_halt_next_s = clock_mono_s() + STATION_HALT_RETRY_MAX_S;
	return done;
}

static bool halt_changer(station_t *s, const char *why)
{
	drv_err_t err = {{0}};
	bool done = false;

	for (int k = 0; k < 2 && !done; k++)
		done = drv_changer_halt(&s->chg, &err) == DRV_OK;
	if (done && s->chg_halt_pending)
		log_notice("station %s: changer halted (%s)", s->name, why);
	if (!done && !s->chg_halt_pending)
		log_err("station %s: changer not confirmed halted (%s): %s; trying again until it "
		        "answers",
		        s->name, why, err.msg);
	s->chg_halt_pending = !done;
	if (!done)
		s->extra_halt_next_s = clock_mono_s() + STATION_HALT_RETRY_MAX_S;
	return done;
}

bool station_halt_all(station_t *s, const char *why)
{
	bool ok = station_halt_burette(s, why);

	for (int i = 0; i < s->n_dosers; i++)
		ok = station_halt_doser(s, i, why) && ok;
	if (s->has_changer)
		ok = halt_changer(s, why) && ok;
	return ok;
}

bool station_extra_halts_retry(station_t *s)
{
	bool pending = s->chg_halt_pending;

	for (int i = 0; i < s->n_dosers; i++)
		pending = pending || s->dosers[i].halt_pending;
	if (!pending)
		return true;
	if (clock_mono_s() < s->extra_halt_next_s)
		return false;
	pending = false;
	for (int i = 0; i < s->n_dosers; i++)
		if (s->dosers[i].halt_pending)
			pending = !station_halt_doser(s, i, "halt not yet acknowledged") || pending;
	if (s->chg_halt_pending)
		pending = !halt_changer(s, "halt not yet acknowledged") || pending;
	return !pending;
}

double station_halt_retry_s(int failed_tries)
{
	double t = STATION_HALT_RETRY_MIN_S;

	/* doubling from the shortest: a line back in a moment is caught at
	 * once, a long outage is not hammered */
	for (int i = 1; i < failed_tries && t < STATION_HALT_RETRY_MAX_S; i++)
		t *= 2;
	return t < STATION_HALT_RETRY_MAX_S ? t : STATION_HALT_RETRY_MAX_S;
}

/* Publish whether the burette is confirmed halted. */
static void note_halt(station_t *s, const char *why, bool ok, const char *msg)
{
	if (ok) {
		if (s->halt_pending)
			log_notice("station %s: burette halted (%s) after %d unanswered tries",
			           s->name, s->halt_why, s->halt_tries);
		else
			log_info("station %s: burette halted (%s)", s->name, why);
		s->halt_pending = false;
		s->halt_tries = 0;
		pthread_mutex_lock(&s->lock);
		if (s->snap.halt_pending)
			s->snap.last_error[0] = '\0';
		s->snap.halt_pending = false;
		station_unlock(s);
		return;
	}
	if (!s->halt_pending) {
		log_err("station %s: burette not confirmed halted (%s): %s; trying again until it "
		        "answers",
		        s->name, why, msg);
		snprintf(s->halt_why, sizeof s->halt_why, "%s", why);
	}
	s->halt_pending = true;
	s->halt_tries++;
	s->halt_next_s = clock_mono_s() + station_halt_retry_s(s->halt_tries);
	pthread_mutex_lock(&s->lock);
	s->snap.halt_pending = true;
	snprintf(s->snap.last_error, sizeof s->snap.last_error,
	         "burette not confirmed halted (%s): %.150s", s->halt_why, msg);
	station_unlock(s);
}

bool station_halt_burette(station_t *s, const char *why)
{
	drv_err_t err = {{0}};
	bool ok = false;

	if (open_burette(s)) {
		/* A halt is the one command worth a second try. */
		for (int i = 0; i < 2 && !ok; i++)
			ok = drv_burette_halt(&s->bur, &err) == DRV_OK;
	} else {
		snprintf(err.msg, sizeof err.msg, "the burette is not connected");
	}
	note_halt(s, why, ok, err.msg);
	return ok;
}

bool station_halt_retry(station_t *s)
{
	if (s->halt_pending && clock_mono_s() >= s->halt_next_s)
		station_halt_burette(s, s->halt_why);
	return !s->halt_pending;
}

drv_status_t station_read_probe(station_t *s, drv_reading_t *r, drv_err_t *err)
{
	drv_status_t st;

	if (!s->probe_open)
		open_devices(s, true);
	if (!s->probe_open)
		return drv_fail(err, DRV_UNPLUGGED, "probe is not connected");
	st = drv_probe_read(&s->probe, r, err);
	pthread_mutex_lock(&s->lock);
	if (st == DRV_OK && isfinite(r->mv)) {
		s->snap.has_reading = true;
		s->snap.mv = r->mv;
		s->snap.ph_from_probe = r->has_ph && isfinite(r->ph);
		s->snap.has_ph = s->snap.ph_from_probe;
		s->snap.ph = r->ph;
		if (!s->snap.has_ph && s->has_valid_cal &&
		    calib_is_valid(&s->valid_cal, clock_wall_s())) {
			/* live display only; runs take the calibration from the store */
			s->snap.ph = calib_ph_from_mv(&s->valid_cal, r->mv,
			                              r->has_temperature ? r->temperature_c : NAN);
			s->snap.has_ph = isfinite(s->snap.ph);
		}
		s->snap.has_temperature = r->has_temperature && isfinite(r->temperature_c);
		s->snap.temperature_c = r->temperature_c;
		/* reading_age_s is derived from this on every snapshot */
		s->snap.reading_age_s = r->t_s;
	} else if (st == DRV_OK) {
		st = drv_fail(err, DRV_BAD_REPLY, "probe reading is not a number");
	}
	station_unlock(s);
	return st;
}

void station_audit_run(station_t *s, int64_t run_id, const char *code, const char *msg)
{
	if (store_event_add(s->store, NULL, s->name, run_id, "run", code, msg, "daemon") !=
	    STORE_OK)
		log_warn("station %s: could not store the audit event run/%s", s->name, code);
}

bool station_interrupted(station_t *s, int64_t run_id)
{
	bool r;
	pthread_mutex_lock(&s->lock);
	r = s->stop_req || s->halt_req || (run_id && s->abort_run == run_id);
	station_unlock(s);
	return r;
}

bool station_wait_until(station_t *s, double t_mono_s, int64_t run_id)
{
	bool r;

	pthread_mutex_lock(&s->lock);
	for (;;) {
		double now = clock_mono_s(), until;
		struct timespec ts;
		r = s->stop_req || s->halt_req || (run_id && s->abort_run == run_id);
		atomic_store_explicit(&s->heartbeat_us, notify_now_us(), memory_order_relaxed);
		if (r || now >= t_mono_s)
			break;
		/* Wake at least every 250 ms, for the watchdog heartbeat. */
		until = t_mono_s < now + 0.25 ? t_mono_s : now + 0.25;
		ts.tv_sec = (time_t)until;
		ts.tv_nsec = (long)((until - (double)ts.tv_sec) * 1e9);
		if (ts.tv_nsec >= 1000000000L)
			ts.tv_nsec = 999999999L;
		pthread_cond_timedwait(&s->cond, &s->lock, &ts);
	}
	pthread_mutex_unlock(&s->lock); /* nothing of snap changed */
	return r;
}

void station_unlock(station_t *s)
{
	uint_fast64_t n = atomic_load_explicit(&s->ring_seq, memory_order_relaxed) + 1;
	uint64_t tmp[STATION_SNAP_WORDS] = {0};
	station_snap_slot_t *slot = &s->ring[n % STATION_RING];

	memcpy(tmp, &s->snap, sizeof s->snap);
	for (size_t i = 0; i < STATION_SNAP_WORDS; i++)
		atomic_store_explicit(&slot->w[i], tmp[i], memory_order_relaxed);
	atomic_store_explicit(&s->ring_seq, n, memory_order_release);
	pthread_mutex_unlock(&s->lock);
}

void station_snapshot(station_t *s, station_snapshot_t *out)
{
	double now = clock_mono_s();
	uint64_t tmp[STATION_SNAP_WORDS];

	/* Slot a is rewritten only when the writer publishes a + STATION_RING,
	 * so a copy is whole if fewer than STATION_RING - 1 came after it. */
	for (;;) {
		uint_fast64_t a = atomic_load_explicit(&s->ring_seq, memory_order_acquire);
		const station_snap_slot_t *slot = &s->ring[a % STATION_RING];
		for (size_t i = 0; i < STATION_SNAP_WORDS; i++)
			tmp[i] = atomic_load_explicit(&slot->w[i], memory_order_relaxed);
		atomic_thread_fence(memory_order_acquire);
		if (atomic_load_explicit(&s->ring_seq, memory_order_relaxed) - a < STATION_RING - 1)
			break;
	}
	memcpy(out, tmp, sizeof *out);
	out->heartbeat_us = atomic_load_explicit(&s->heartbeat_us, memory_order_relaxed);
	/* snap.reading_age_s holds the reading's monotonic time */
	out->reading_age_s = out->has_reading ? now - out->reading_age_s : 0.0;
	if (out->reading_age_s < 0)
		out->reading_age_s = 0;
}

static void set_state(station_t *s, const char *state)
{
	pthread_mutex_lock(&s->lock);
	snprintf(s->snap.state, sizeof s->snap.state, "%s", state);
	station_unlock(s);
}

void station_abort_queued(station_t *s, station_job_t *job, const char *why)
{
	json_t *j;
	bool db_err;
	char at[32];
	char *text = NULL;

	if (!s->store)
		return;
	time_format_rfc3339(clock_wall_s(), at);
	j = store_run_json(s->store, job->run_id, &db_err);
	if (j) {
		json_object_set_new(j, "state", json_string("aborted"));
		json_object_set_new(j, "ended_at", json_string(at));
		json_object_set_new(j, "stop_reason", json_string("aborted"));
		json_object_del(j, "seq");
		text = json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10));
		json_decref(j);
	}
	store_run_finish(s->store, job->run_id, "aborted", text, NULL);
	station_audit_run(s, job->run_id, "aborted", why);
	store_event_add(s->store, at, s->name, job->run_id, "abort", "queued", why, "daemon");
	free(text);
}

/* ---- calibration, in the thread ---- */

static void load_valid_cal(station_t *s);

static void calib_store(station_t *s)
{
	calib_result_t res;
	json_t *j;
	char *text;
	char at[32] = "", exp[32] = "";
	calib_state_t state;
	int64_t cal_id;
	bool log_end;

	pthread_mutex_lock(&s->lock);
	if (!s->cal) {
		station_unlock(s);
		return;
	}
	state = calib_session_state(s->cal);
	calib_session_result(s->cal, clock_wall_s(), &res);
	s->cal_dirty = false;
	cal_id = s->cal_id;
	/* the end of each calibration goes into the audit trail once */
	log_end =
	    (state == CALIB_ACCEPTED || state == CALIB_REJECTED) && s->cal_logged_id != cal_id;
	if (log_end)
		s->cal_logged_id = cal_id;
	station_unlock(s);
	j = calib_result_json(&res);
	text = j ? json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
	json_decref(j);
	if (res.at_unix_s > 0)
		time_format_rfc3339(res.at_unix_s, at);
	if (res.expires_at_unix_s > 0)
		time_format_rfc3339(res.expires_at_unix_s, exp);
	store_calib_update(s->store, cal_id, calib_state_name(state), at[0] ? at : NULL,
	                   exp[0] ? exp : NULL, text);
	free(text);
	if (log_end) {
		char msg[320];
		if (state == CALIB_ACCEPTED)
			snprintf(
			    msg, sizeof msg,
			    "calibration %lld: slope %.2f %% of Nernst, offset %.2f mV at pH 7",
			    (long long)cal_id, res.slope_pct, res.offset_mv);
		else
			snprintf(msg, sizeof msg, "calibration %lld: %s", (long long)cal_id,
			         res.reason[0] ? res.reason : "rejected");
		/* the outcome is the starter's calibration: their name on it */
		store_event_add(s->store, NULL, s->name, 0, "calibration", calib_state_name(state),
		                msg, s->cal_actor[0] ? s->cal_actor : "daemon");
	}
	if (state == CALIB_ACCEPTED)
		load_valid_cal(s);
}

static void calib_step(station_t *s)
{
	calib_state_t before, after;
	drv_reading_t r = {0};
	drv_err_t err = {{0}};
	calib_reading_t cr;

	pthread_mutex_lock(&s->lock);
	before = s->cal ? calib_session_state(s->cal) : CALIB_ACCEPTED;
	station_unlock(s);
	if (before != CALIB_MEASURING)
		return;
	cr.t_s = clock_mono_s();
	cr.mv = NAN;
	cr.temperature_c = NAN;
	bool fault = station_read_probe(s, &r, &err) != DRV_OK;
	/* A repeated measurement is not a new reading: fed as a tick, so a
	 * frozen transmitter can never look stable. */
	if (!fault && !r.repeated) {
		cr.mv = r.mv;
		cr.temperature_c = r.has_temperature ? r.temperature_c : NAN;
	}
	pthread_mutex_lock(&s->lock);
	if (fault && s->cal) {
		/* Any probe fault fails the buffer being measured, with why. */
		calib_session_fail_buffer(s->cal, err.msg);
		after = calib_session_state(s->cal);
	} else {
		after = s->cal ? calib_session_feed(s->cal, &cr) : before;
	}
	station_unlock(s);
	if (after != before)
		calib_store(s);
}

int station_calib_start(station_t *s, const double *buffers, int n, const char *actor,
                        int64_t *id_out, char *err, size_t cap, bool *bad_input)
{
	calib_session_t *cs;
	int64_t id;

	*bad_input = false;
	pthread_mutex_lock(&s->lock);
	if (s->snap.run_id || s->qn) {
		station_unlock(s);
		snprintf(err, cap, "station %s has a run; calibrate between runs", s->name);
		return -1;
	}
	if (s->cal && calib_session_state(s->cal) == CALIB_MEASURING) {
		station_unlock(s);
		snprintf(err, cap, "station %s is measuring calibration %lld", s->name,
		         (long long)s->cal_id);
		return -1;
	}
	station_unlock(s);
	cs = calib_session_new(&s->cal_cfg, buffers, n, err, cap);
	if (!cs) {
		*bad_input = true;
		return -1;
	}
	id = store_calib_create(s->store, s->name, NULL);
	if (id < 0) {
		calib_session_free(cs);
		snprintf(err, cap, "database error");
		return -1;
	}
	pthread_mutex_lock(&s->lock);
	calib_session_free(s->cal);
	s->cal = cs;
	s->cal_id = id;
	snprintf(s->cal_actor, sizeof s->cal_actor, "%s", actor && *actor ? actor : "daemon");
	station_unlock(s);
	calib_store(s);
	*id_out = id;
	return 0;
}

int station_calib_next(station_t *s, int64_t id, char *err, size_t cap)
{
	int rc;

	pthread_mutex_lock(&s->lock);
	if (!s->cal || s->cal_id != id) {
		station_unlock(s);
		snprintf(err, cap, "calibration %lld is not the current one of station %s",
		         (long long)id, s->name);
		return -1;
	}
	if (s->snap.run_id) {
		station_unlock(s);
		snprintf(err, cap, "station %s has a run", s->name);
		return -1;
	}
	rc = calib_session_next(s->cal, clock_mono_s(), err, cap);
	s->cal_dirty = true;
	pthread_cond_broadcast(&s->cond);
	station_unlock(s);
	return rc;
}

/* ---- the thread ---- */

/* Log a device's health only when it changes (a dead probe must not log a
 * line a second), and keep the last error for GET /v1/stations. */
static void note_health(station_t *s, const char *what, bool *bad, bool ok, const char *msg)
{
	if (!ok) {
		if (!*bad)
			log_warn("station %s: %s: %s", s->name, what, msg);
		station_set_error(s, msg);
	} else if (*bad) {
		log_notice("station %s: %s answers again", s->name, what);
	}
	*bad = !ok;
}

static void idle_tick(station_t *s, double *next_read)
{
	double now = clock_mono_s();
	drv_reading_t r = {0};
	drv_burette_status_t bs = {0};
	drv_err_t err = {{0}};
	bool measuring, dirty;

	station_halt_retry(s);
	station_extra_halts_retry(s);
	open_devices(s, false);
	/* No run: the stirrer should be off. An off that failed (its link was
	 * the thing that failed, e.g. a Modbus line shared with the probe) is
	 * tried again until it is answered. */
	if (s->stir_open && s->stir_on && now >= s->stir_retry_s) {
		drv_err_t serr = {{0}};
		if (drv_stirrer_set(&s->stir, false, 0, &serr) == DRV_OK) {
			s->stir_on = false;
			log_info("station %s: stirrer off", s->name);
		} else {
			s->stir_retry_s = now + REOPEN_S;
		}
	}
	pthread_mutex_lock(&s->lock);
	measuring = s->cal && calib_session_state(s->cal) == CALIB_MEASURING;
	if (s->halt_req) {
		s->halt_req = false;
		station_unlock(s);
		station_halt_all(s, "halt requested");
		pthread_mutex_lock(&s->lock);
	}
	station_unlock(s);
	pthread_mutex_lock(&s->lock);
	dirty = s->cal_dirty;
	station_unlock(s);
	if (dirty)
		calib_store(s);
	if (measuring) {
		set_state(s, "calibrating");
		calib_step(s);
		*next_read = now + 0.25;
		return;
	}
	if (now < *next_read)
		return;
	*next_read = now + IDLE_READ_S;
	if (s->probe_open)
		note_health(s, "probe", &s->probe_bad, station_read_probe(s, &r, &err) == DRV_OK,
		            err.msg);
	if (s->bur_open) {
		bool ok = drv_burette_status(&s->bur, &bs, &err) == DRV_OK;
		if (ok) {
			pthread_mutex_lock(&s->lock);
			s->snap.has_burette = true;
			s->snap.burette_total_ml = bs.dispensed_ml;
			s->snap.contents_ml = bs.contents_ml;
			station_unlock(s);
		}
		note_health(s, "burette", &s->bur_bad, ok, err.msg);
	}
	if (s->has_changer && s->chg_open) {
		drv_changer_status_t cs;
		(void)station_changer_status(s, &cs, &err); /* for the status and the page */
	}
	if (s->bur_open && s->probe_open && !s->bur_bad && !s->probe_bad && !s->n_pending &&
	    !s->halt_pending)
		station_set_error(s, "");
	set_state(s, s->bur_open && s->probe_open && !s->bur_bad && !s->probe_bad ? "idle"
	                                                                          : "offline");
}

static void *station_main(void *arg)
{
	station_t *s = arg;
	double next_read = 0;

	open_devices(s, true);
	for (;;) {
		station_job_t *job = NULL;
		int unstored = station_store_pending(s, false);
		bool extras_halted = station_extra_halts_retry(s);
		pthread_mutex_lock(&s->lock);
		atomic_store_explicit(&s->heartbeat_us, notify_now_us(), memory_order_relaxed);
		if (s->stop_req) {
			station_unlock(s);
			break;
		}
		/* nothing starts on a burette that may still be moving, nor while
		 * a doser or the changer may be */
		if (s->qn && !unstored && !s->halt_pending && extras_halted && !s->snap.held &&
		    !(s->cal && calib_session_state(s->cal) == CALIB_MEASURING)) {
			job = s->queue[0];
			memmove(s->queue, s->queue + 1, (size_t)(s->qn - 1) * sizeof s->queue[0]);
			s->qn--;
			s->snap.queued = s->qn;
			s->snap.run_id = job->run_id;
			if (s->abort_run == job->run_id)
				s->abort_run = 0;
		}
		station_unlock(s);
		if (job) {
			set_state(s, "running");
			station_audit_run(s, job->run_id, "started", "run started");
			station_run_job(s, job);
			free(job);
			pthread_mutex_lock(&s->lock);
			s->snap.run_id = 0;
			s->snap.phase[0] = '\0';
			s->snap.runs_done++;
			s->halt_req = false;
			station_unlock(s);
			set_state(s, s->bur_open && s->probe_open ? "idle" : "offline");
			continue;
		}
		idle_tick(s, &next_read);
		station_wait_until(s, clock_mono_s() + 0.1, 0);
		/* a halt while idle is handled by idle_tick; stop ends the loop */
		pthread_mutex_lock(&s->lock);
		if (s->halt_req && !s->stop_req) {
			station_unlock(s);
			idle_tick(s, &next_read);
		} else {
			station_unlock(s);
		}
	}
	/* Shutting down: halt the burette (and the dosers and the changer), end
	 * queued runs. */
	station_halt_all(s, "daemon stopping");
	/* A last try for unstored final records; those still refused end as
	 * `interrupted` at the next start, their points kept. */
	if (station_store_pending(s, true))
		log_err("station %s: %d final record(s) could not be stored before stopping",
		        s->name, s->n_pending);
	for (int i = 0; i < s->n_pending; i++)
		free(s->pending[i].record_json);
	s->n_pending = 0;
	if (s->stir_open) {
		drv_err_t err = {{0}};
		drv_stirrer_set(&s->stir, false, 0, &err);
	}
	/* Queued runs stay `queued` in the store: the next start queues them
	 * again and holds the station until an operator resumes it. */
	pthread_mutex_lock(&s->lock);
	while (s->qn)
		free(s->queue[--s->qn]);
	station_unlock(s);
	return NULL;
}

static void load_valid_cal(station_t *s)
{
	char now[32];
	bool db_err;
	json_t *j;
	calib_result_t c;

	time_format_rfc3339(clock_wall_s(), now);
	j = store_calib_latest(s->store, s->name, true, now, &db_err);
	pthread_mutex_lock(&s->lock);
	s->has_valid_cal = j && calib_result_from_json(j, &c) == 0;
	if (s->has_valid_cal)
		s->valid_cal = c;
	station_unlock(s);
	json_decref(j);
}

int station_start(station_t *s, store_t *store)
{
	s->store = store;
	load_valid_cal(s);
	if (pthread_create(&s->thread, NULL, station_main, s))
		return -1;
	s->started = true;
	return 0;
}

void station_stop(station_t *s)
{
	if (!s->started)
		return;
	pthread_mutex_lock(&s->lock);
	s->stop_req = true;
	pthread_cond_broadcast(&s->cond);
	station_unlock(s);
	pthread_join(s->thread, NULL);
	s->started = false;
}

void station_free(station_t *s)
{
	if (!s)
		return;
	station_stop(s);
	drv_burette_close(&s->bur);
	drv_probe_close(&s->probe);
	drv_stirrer_close(&s->stir);
	close_extras(s);
	for (int i = 0; i < s->qn; i++)
		free(s->queue[i]);
	calib_session_free(s->cal);
	pthread_mutex_destroy(&s->lock);
	pthread_cond_destroy(&s->cond);
	free(s);
}

int station_enqueue(station_t *s, const station_job_t *job)
{
	station_job_t *copy;

	copy = malloc(sizeof *copy);
	if (!copy)
		return -1;
	*copy = *job;
	pthread_mutex_lock(&s->lock);
	if (s->qn >= STATION_QUEUE_MAX || s->stop_req) {
		station_unlock(s);
		free(copy);
		return -1;
	}
	s->queue[s->qn++] = copy;
	s->snap.queued = s->qn;
	pthread_cond_broadcast(&s->cond);
	station_unlock(s);
	return 0;
}

void station_set_titer_book(station_t *s, struct titer_book *b)
{
	s->titers = b;
}

void station_hold(station_t *s, const char *reason)
{
	pthread_mutex_lock(&s->lock);
	s->snap.held = true;
	snprintf(s->snap.held_reason, sizeof s->snap.held_reason, "%s", reason);
	station_unlock(s);
	log_notice("station %s: held: %s", s->name, reason);
}

void station_block_resume(station_t *s, const char *why)
{
	pthread_mutex_lock(&s->lock);
	snprintf(s->resume_blocked, sizeof s->resume_blocked, "%s", why ? why : "");
	station_unlock(s);
}

station_resume_t station_resume(station_t *s, char *why, size_t cap)
{
	station_resume_t rc = STATION_RESUMED;

	pthread_mutex_lock(&s->lock);
	if (s->resume_blocked[0]) {
		snprintf(why, cap, "%s", s->resume_blocked);
		rc = STATION_RESUME_BLOCKED;
	} else if (!s->snap.held) {
		rc = STATION_RESUME_NOT_HELD;
	} else {
		s->snap.held = false;
		s->snap.held_reason[0] = '\0';
		pthread_cond_broadcast(&s->cond);
	}
	station_unlock(s);
	if (rc == STATION_RESUMED)
		log_notice("station %s: resumed by an operator", s->name);
	return rc;
}

station_cmd_t station_abort(station_t *s, int64_t run_id)
{
	station_job_t *job = NULL;

	pthread_mutex_lock(&s->lock);
	if (s->snap.run_id == run_id) {
		s->abort_run = run_id;
		pthread_cond_broadcast(&s->cond);
		station_unlock(s);
		return STATION_CMD_OK;
	}
	for (int i = 0; i < s->qn; i++) {
		if (s->queue[i]->run_id != run_id)
			continue;
		job = s->queue[i];
		memmove(s->queue + i, s->queue + i + 1, (size_t)(s->qn - i - 1) * sizeof job);
		s->qn--;
		s->snap.queued = s->qn;
		break;
	}
	station_unlock(s);
	if (!job)
		return STATION_CMD_NOT_HERE;
	station_abort_queued(s, job, "aborted before it started");
	free(job);
	return STATION_CMD_OK;
}

station_cmd_t station_halt(station_t *s)
{
	pthread_mutex_lock(&s->lock);
	s->halt_req = true;
	pthread_cond_broadcast(&s->cond);
	station_unlock(s);
	return STATION_CMD_OK;
}
