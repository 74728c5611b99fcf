/* station_steps.c: what a run does around its titration on a station with a
 * sample changer and dosing units: the head to the run's position (up, move,
 * down), the method's before and after steps, and the head to its park.
 *
 * The interlocks live here (SAFETY.md, "Moving mechanics"): the rack turns
 * only with the head up and every dosing unit halted; the head goes down
 * only at the run's position (or the rack's rinse or park position); no
 * addition may take the beaker past vessel_max_ml. Each device call is
 * bounded (drv.h); a wait for the mechanics is bounded too. */
#include "station.h"
#include "station_priv.h"

#include <jansson.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <string.h>

#include "clock.h"
#include "log.h"
#include "timefmt.h"

#define MECH_POLL_S     0.05  /* changer status polls while it moves */
#define MECH_DEADLINE_S 60.0  /* a move, lift or pump run not done by then is a fault */
#define ADD_POLL_S      0.02  /* doser status polls while its plunger moves */
#define ADD_DEADLINE_S  300.0 /* a doser's stroke or refill not done by then is a fault */

bool station_move_allowed(drv_lift_t lift, bool changer_moving, bool dosing_unit_moving)
{
	return lift == DRV_LIFT_UP && !changer_moving && !dosing_unit_moving;
}

bool station_lower_allowed(long at_position, long run_position, long rinse, long park)
{
	if (at_position < 1)
		return false;
	return at_position == run_position || (rinse > 0 && at_position == rinse) ||
	       (park > 0 && at_position == park);
}

int station_add_interlock(double in_beaker_ml, double add_ml, double vessel_max_ml)
{
	if (!isfinite(in_beaker_ml) || !isfinite(add_ml) || add_ml <= 0)
		return -1;
	if (vessel_max_ml > 0 && in_beaker_ml + add_ml > vessel_max_ml + 1e-9)
		return -1;
	return 0;
}

static int fail(station_step_ctx_t *c, const char *code, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));

static int fail(station_step_ctx_t *c, const char *code, const char *fmt, ...)
{
	va_list ap;
	snprintf(c->code, sizeof c->code, "%s", code);
	va_start(ap, fmt);
	vsnprintf(c->msg, sizeof c->msg, fmt, ap);
	va_end(ap);
	return STEP_FAULT;
}

/* Is a dosing unit (the burette or a doser) moving? A unit that does not
 * answer counts as moving: the rack must not turn under a tip that may. */
static bool dosing_unit_moving(station_t *s, char *which, size_t cap)
{
	drv_burette_status_t bs;
	drv_err_t err = {{0}};

	if (!s->bur_open || drv_burette_status(&s->bur, &bs, &err) != DRV_OK || bs.moving) {
		snprintf(which, cap, "the burette");
		return true;
	}
	for (int i = 0; i < s->n_dosers; i++) {
		struct station_doser *o = &s->dosers[i];
		if (!o->open || drv_burette_status(&o->bur, &bs, &err) != DRV_OK || bs.moving) {
			snprintf(which, cap, "doser %s", o->name);
			return true;
		}
	}
	return false;
}

/* Wait for the changer to stand still; STEP_DONE with *st. */
static int wait_changer(station_step_ctx_t *c, const char *what, drv_changer_status_t *st)
{
	station_t *s = c->s;
	double deadline = clock_mono_s() + MECH_DEADLINE_S;
	drv_err_t err = {{0}};

	for (;;) {
		if (station_changer_status(s, st, &err) != DRV_OK)
			return fail(c, "changer", "changer during %s: %s", what, err.msg);
		if (st->fault)
			return fail(c, "changer", "changer reports a fault during %s", what);
		if (!st->moving)
			return STEP_DONE;
		if (clock_mono_s() > deadline)
			return fail(c, "changer", "changer still moving after %.0f s (%s)",
			            MECH_DEADLINE_S, what);
		if (station_wait_until(s, clock_mono_s() + MECH_POLL_S, c->run_id)) {
			station_halt_all(s, "run interrupted");
			return STEP_INTERRUPTED;
		}
	}
}

static int raise_head(station_step_ctx_t *c)
{
	drv_changer_status_t st;
	drv_err_t err = {{0}};
	int rc;

	if (drv_changer_lift(&c->s->chg, false, &err) != DRV_OK)
		return fail(c, "changer", "raising the head: %s", err.msg);
	if ((rc = wait_changer(c, "raising the head", &st)) != STEP_DONE)
		return rc;
	if (st.lift != DRV_LIFT_UP)
		return fail(c, "changer", "the head did not come up (it is %s)",
		            drv_lift_name(st.lift));
	return STEP_DONE;
}

int station_head_to(station_step_ctx_t *c, long position, bool lower)
{
	station_t *s = c->s;
	drv_changer_status_t st;
	drv_err_t err = {{0}};
	char which[64];
	int rc;

	if (!s->has_changer)
		return STEP_DONE;
	if ((rc = wait_changer(c, "a status query", &st)) != STEP_DONE)
		return rc;
	if (st.position != position || st.lift != DRV_LIFT_DOWN || !lower) {
		/* every dosing unit halted before the head leaves the beaker */
		if (!station_halt_all_dosing(s, "the head moves"))
			return fail(
			    c, "move_interlock",
			    "a dosing unit did not confirm its halt; the head is not moved");
		if (st.lift != DRV_LIFT_UP && (rc = raise_head(c)) != STEP_DONE)
			return rc;
	}
	if (st.position != position) {
		if ((rc = wait_changer(c, "a status query", &st)) != STEP_DONE)
			return rc;
		if (!station_move_allowed(st.lift, st.moving,
		                          dosing_unit_moving(s, which, sizeof which)))
			return fail(c, "move_interlock",
			            "interlock: the rack may turn only with the head up and every "
			            "dosing unit halted (head %s, %s)",
			            drv_lift_name(st.lift), which);
		if (drv_changer_move(&s->chg, position, &err) != DRV_OK)
			return fail(c, "changer", "moving to position %ld: %s", position, err.msg);
		if ((rc = wait_changer(c, "a move", &st)) != STEP_DONE)
			return rc;
		if (st.position != position)
			return fail(c, "changer", "the rack stopped at position %ld, not %ld",
			            st.position, position);
	}
	if (!lower || st.lift == DRV_LIFT_DOWN)
		return STEP_DONE;
	if (!station_lower_allowed(st.position, c->position, s->chg_info.rinse, s->chg_info.park))
		return fail(
		    c, "lift_interlock",
		    "interlock: the head goes down only at the run's position %ld (it is at "
		    "%ld)",
		    c->position, st.position);
	if (drv_changer_lift(&s->chg, true, &err) != DRV_OK)
		return fail(c, "changer", "lowering the head at %ld: %s", position, err.msg);
	if ((rc = wait_changer(c, "lowering the head", &st)) != STEP_DONE)
		return rc;
	if (st.lift != DRV_LIFT_DOWN)
		return fail(c, "changer", "the head did not come down (it is %s)",
		            drv_lift_name(st.lift));
	return STEP_DONE;
}

bool station_halt_all_dosing(station_t *s, const char *why)
{
	bool ok = station_halt_burette(s, why);

	for (int i = 0; i < s->n_dosers; i++)
		ok = station_halt_doser(s, i, why) && ok;
	return ok;
}

/* Wait for a doser's plunger to stop; STEP_DONE with *bs. */
static int wait_doser(station_step_ctx_t *c, struct station_doser *o, drv_burette_status_t *bs)
{
	double deadline = clock_mono_s() + ADD_DEADLINE_S;
	drv_err_t err = {{0}};

	for (;;) {
		if (station_wait_until(c->s, clock_mono_s() + ADD_POLL_S, c->run_id)) {
			station_halt_all(c->s, "run interrupted");
			(void)drv_burette_status(&o->bur, bs, &err);
			return STEP_INTERRUPTED;
		}
		if (drv_burette_status(&o->bur, bs, &err) != DRV_OK)
			return fail(c, "doser", "doser %s: %s", o->name, err.msg);
		if (bs->fault)
			return fail(c, "doser", "doser %s reports a fault (motor stall?)", o->name);
		if (!bs->moving)
			return STEP_DONE;
		if (clock_mono_s() > deadline)
			return fail(c, "doser", "doser %s still moving after %.0f s", o->name,
			            ADD_DEADLINE_S);
	}
}

/* ml mL from doser o, in strokes of its syringe; what went in is counted
 * from the doser's own count into *delivered_ml, also on a fault. */
static int doser_add(station_step_ctx_t *c, struct station_doser *o, double ml,
                     double *delivered_ml)
{
	drv_burette_status_t bs = {0};
	drv_err_t err = {{0}};
	double q = o->info.steps > 0 ? o->info.capacity_ml / (double)o->info.steps : 1e-3;
	int rc = STEP_DONE;

	*delivered_ml = 0;
	if (!o->open && !station_open_extras(c->s) && !o->open)
		return fail(c, "doser", "doser %s is not connected", o->name);
	if (drv_burette_status(&o->bur, &bs, &err) != DRV_OK)
		return fail(c, "doser", "doser %s: %s", o->name, err.msg);
	while (ml - *delivered_ml > q / 2) {
		double want = ml - *delivered_ml, before;
		if (bs.contents_ml < q / 2 ||
		    (want > bs.contents_ml && bs.contents_ml < o->info.capacity_ml - q / 2)) {
			if (drv_burette_refill(&o->bur, &err) != DRV_OK)
				return fail(c, "doser", "doser %s refill: %s", o->name, err.msg);
			if ((rc = wait_doser(c, o, &bs)) != STEP_DONE)
				return rc;
		}
		if (want > bs.contents_ml)
			want = bs.contents_ml;
		before = bs.dispensed_ml;
		if (drv_burette_dose(&o->bur, want, &err) != DRV_OK) {
			rc = fail(c, "doser", "doser %s: %s", o->name, err.msg);
			station_halt_all(c->s, "doser fault");
		} else {
			rc = wait_doser(c, o, &bs);
		}
		/* After a fault the doser's own count says what went in; when it
		 * cannot be read (its line is gone) nobody knows: NaN, null in the
		 * record, never a guess. */
		if (rc == STEP_FAULT && drv_burette_status(&o->bur, &bs, &err) != DRV_OK) {
			*delivered_ml = NAN;
			return rc;
		}
		if (bs.dispensed_ml > before && isfinite(bs.dispensed_ml))
			*delivered_ml += bs.dispensed_ml - before;
		if (rc != STEP_DONE)
			return rc;
	}
	return STEP_DONE;
}

static struct station_doser *find_doser(station_t *s, const char *name, int *idx)
{
	for (int i = 0; i < s->n_dosers; i++)
		if (!strcmp(s->dosers[i].name, name)) {
			*idx = i;
			return &s->dosers[i];
		}
	return NULL;
}

static int set_stir(station_step_ctx_t *c, bool on)
{
	drv_err_t err = {{0}};
	station_t *s = c->s;

	if (!s->stir_open)
		return fail(c, "stirrer", "the stirrer is not connected");
	if (drv_stirrer_set(&s->stir, on, 0, &err) != DRV_OK)
		return fail(c, "stirrer", "stirrer: %s", err.msg);
	s->stir_on = on;
	return STEP_DONE;
}

static int pause_s(station_step_ctx_t *c, double seconds_s)
{
	if (station_wait_until(c->s, clock_mono_s() + seconds_s, c->run_id)) {
		station_halt_all(c->s, "run interrupted");
		return STEP_INTERRUPTED;
	}
	return STEP_DONE;
}

static int rinse(station_step_ctx_t *c, double seconds_s, bool before)
{
	station_t *s = c->s;
	drv_changer_status_t st;
	drv_err_t err = {{0}};
	int rc;

	if (s->chg_info.has_rinse) {
		if (drv_changer_pump(&s->chg, DRV_CHANGER_RINSE, seconds_s, &err) != DRV_OK)
			return fail(c, "changer", "rinse pump: %s", err.msg);
		return wait_changer(c, "rinsing", &st);
	}
	/* In the water at the rinse position, then back to the sample (before
	 * the titration) or up (after it: the park comes next). */
	if ((rc = station_head_to(c, s->chg_info.rinse, true)) != STEP_DONE ||
	    (rc = pause_s(c, seconds_s)) != STEP_DONE)
		return rc;
	return before ? station_head_to(c, c->position, true) : raise_head(c);
}

int station_run_steps(station_step_ctx_t *c, const method_step_t *steps, int n, bool before)
{
	station_t *s = c->s;

	for (int i = 0; i < n; i++) {
		const method_step_t *st = &steps[i];
		station_step_done_t *d =
		    c->n_done < STATION_MAX_DONE ? &c->done[c->n_done++] : NULL;
		int rc = STEP_DONE, idx = -1;
		double delivered = 0;

		if (d) {
			memset(d, 0, sizeof *d);
			d->kind = st->kind;
			d->before = before;
			d->s = st->s;
			d->volume_ml = NAN;
			time_format_rfc3339(clock_wall_s(), d->started_at);
		}
		switch (st->kind) {
		case STEP_ADD: {
			struct station_doser *o = find_doser(s, st->doser, &idx);
			if (d)
				snprintf(d->doser, sizeof d->doser, "%s", st->doser);
			if (!o) {
				rc = fail(c, "doser", "station %s has no dosing unit '%s'", s->name,
				          st->doser);
				break;
			}
			/* the beaker's total, checked before every addition */
			if (station_add_interlock(c->in_beaker_ml, st->ml, s->vessel_max_ml)) {
				rc = fail(c, "volume_interlock",
				          "interlock: adding %.4f mL from %s would take the beaker "
				          "(%.4f mL) past vessel_max_ml %.3f mL",
				          st->ml, o->name, c->in_beaker_ml, s->vessel_max_ml);
				break;
			}
			rc = doser_add(c, o, st->ml, &delivered);
			c->delivered_ml[idx] += delivered; /* NaN stays: unknown */
			/* unknown counts as all of it, for the beaker's total */
			c->in_beaker_ml += isfinite(delivered) ? delivered : st->ml;
			c->added_ml += isfinite(delivered) ? delivered : st->ml;
			if (d)
				d->volume_ml = delivered;
			if (before && c->n_adds < METHOD_MAX_ADDS) {
				c->add_ml[c->n_adds] = delivered;
				c->add_doser[c->n_adds] = idx;
				c->n_adds++;
			}
			break;
		}
		case STEP_STIR:
			if ((rc = set_stir(c, true)) == STEP_DONE)
				rc = pause_s(c, st->s);
			if (rc == STEP_DONE && !before)
				rc = set_stir(c, false);
			break;
		case STEP_WAIT:
			rc = pause_s(c, st->s);
			break;
		case STEP_RINSE:
			rc = rinse(c, st->s, before);
			break;
		}
		if (d)
			time_format_rfc3339(clock_wall_s(), d->ended_at);
		if (rc != STEP_DONE) {
			if (rc == STEP_FAULT)
				log_err("station %s run %lld: %s step %d (%s): %s", s->name,
				        (long long)c->run_id, before ? "before" : "after", i + 1,
				        method_step_name(st->kind), c->msg);
			return rc;
		}
	}
	return STEP_DONE;
}

int station_park(station_step_ctx_t *c)
{
	station_t *s = c->s;

	if (!s->has_changer)
		return STEP_DONE;
	if (s->chg_info.park)
		return station_head_to(c, s->chg_info.park, true);
	/* no park position: the head waits up, out of the finished beaker */
	if (!station_halt_all_dosing(s, "the head comes up"))
		return fail(c, "move_interlock", "a dosing unit did not confirm its halt");
	return raise_head(c);
}

void station_fault_stop(station_t *s, const char *code)
{
	drv_err_t err = {{0}};
	bool answered = false;

	station_halt_all_dosing(s, code);
	for (int k = 0; k < 2 && s->has_changer && s->chg_open && !answered; k++)
		answered = drv_changer_halt(&s->chg, &err) == DRV_OK;
	s->chg_halt_pending = s->has_changer && !answered;
	if (s->chg_halt_pending)
		s->extra_halt_next_s = clock_mono_s() + STATION_HALT_RETRY_MAX_S;
	/* Raise the head where it is safe: only a changer that answered its
	 * halt is given a command (a silent line may hear half of one). The head
	 * out of the beaker keeps a tip from dripping into it. */
	if (answered && drv_changer_lift(&s->chg, false, &err) != DRV_OK)
		log_warn("station %s: the head could not be raised after %s: %s", s->name, code,
		         err.msg);
	if (s->has_changer && !answered)
		log_err("station %s: the changer did not confirm its halt after %s: %s", s->name,
		        code, err.msg);
}

json_t *station_steps_json(const station_step_ctx_t *c)
{
	json_t *steps = json_array(), *dosers = json_object(), *o = json_object();
	const station_t *s = c->s;

	for (int i = 0; i < c->n_done; i++) {
		const station_step_done_t *d = &c->done[i];
		json_t *j = json_pack("{s:s,s:s,s:s,s:s}", "kind", method_step_name(d->kind),
		                      "when", d->before ? "before" : "after", "started_at",
		                      d->started_at, "ended_at", d->ended_at);
		if (d->kind == STEP_ADD) {
			json_object_set_new(j, "doser", json_string(d->doser));
			json_object_set_new(j, "volume_ml",
			                    isfinite(d->volume_ml) ? json_real(d->volume_ml)
			                                           : json_null());
		} else {
			json_object_set_new(j, "seconds", json_real(d->s));
		}
		json_array_append_new(steps, j);
	}
	for (int i = 0; i < s->n_dosers; i++)
		json_object_set_new(dosers, s->dosers[i].name,
		                    json_pack("{s:o,s:s}", "delivered_ml",
		                              isfinite(c->delivered_ml[i])
		                                  ? json_real(c->delivered_ml[i])
		                                  : json_null(),
		                              "reagent", s->dosers[i].reagent));
	json_object_set_new(o, "steps", steps);
	json_object_set_new(o, "dosers", dosers);
	return o;
}
