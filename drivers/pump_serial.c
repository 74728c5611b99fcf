/* pump_serial.c: burette driver for line-based ASCII syringe pumps, driven by
 * a profile (pump_profile.h) over the serial transport (serial.h).
 *
 * Idempotent commands (status, halt, valve) are retried up to `retries`
 * times; a dose or fill is never re-sent blindly: after a lost or garbled
 * reply the driver asks for the status and re-sends only if the plunger has
 * not moved, so a noisy line cannot double a dose.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "drv.h"
#include "link.h"
#include "pump_profile.h"
#include "serial.h"

typedef enum {
	MODE_IDLE = 0,
	MODE_DOSE,
	MODE_VALVE_IN, /* refill: valve turning to the reservoir */
	MODE_FILL,     /* refill: plunger filling */
	MODE_VALVE_OUT /* refill: valve turning back to the outlet */
} pump_mode_t;

typedef struct pump {
	cmdp_line_t line; /* the serial link, its options and the profile's line ends */
	pump_profile_t prof;
	long steps;         /* steps per full stroke (station may override the profile) */
	double capacity_ml; /* syringe volume */
	bool known;         /* pos is from the device */
	long pos;           /* last reported position, steps of titrant in the syringe */
	long long dispensed_steps;
	pump_mode_t mode;
	bool moving;
	bool fault;
	bool valve_known; /* false until this process has set the valve: a daemon
	                   * restarted mid-refill finds it at the reservoir */
} pump_t;

typedef struct accept {
	const pump_profile_t *prof;
	pump_reply_t *rep;
} accept_t;

static const char *const own_keys[] = {"profile",          "capacity_ml",      "steps",
                                       "dose_rate_ml_min", "fill_rate_ml_min", NULL};

static int load_profile(const char *path, void *prof, diag_list_t *d)
{
	return pump_profile_load(path, prof, d);
}

static int pump_configure(const yt_doc_t *doc, const yt_node_t *cfg, void **priv, diag_list_t *d)
{
	const char *keys[32];
	if (!yt_want_map(doc, cfg, "burette", d))
		return -1;
	bool ok = yt_check_keys(doc, cfg, link_keys_join(link_serial_keys, own_keys, keys, 32),
	                        "burette", d);
	pump_t *p = calloc(1, sizeof(*p));
	if (!p)
		return -1;
	serial_init(&p->line.ser);
	p->line.who = "pump";
	p->line.command_end = p->prof.command_end;
	p->line.reply_end = p->prof.reply_end;
	ok &= link_serial_parse(doc, cfg, &p->line.link, d) == 0;
	ok &= cmdp_profile_key(doc, cfg, "burette", "pump", "pumps", load_profile, &p->prof, d);
	const yt_node_t *n;
	p->steps = p->prof.steps;
	p->capacity_ml = p->prof.capacity_ml;
	if ((n = yt_get(cfg, "steps")))
		ok &= yt_long(doc, n, "steps", 1, 100000000, &p->steps, d);
	if ((n = yt_get(cfg, "capacity_ml")))
		ok &= yt_double_range(doc, n, "capacity_ml", "mL", 0.01, 1000, &p->capacity_ml, d);
	if ((n = yt_get(cfg, "dose_rate_ml_min")))
		ok &= yt_double_range(doc, n, "dose_rate_ml_min", "mL/min", 0.001, 10000,
		                      &p->prof.dose_rate_ml_min, d);
	if ((n = yt_get(cfg, "fill_rate_ml_min")))
		ok &= yt_double_range(doc, n, "fill_rate_ml_min", "mL/min", 0.001, 10000,
		                      &p->prof.fill_rate_ml_min, d);
	if (!ok) {
		free(p);
		return -1;
	}
	*priv = p;
	return 0;
}

static void pump_info(void *priv, drv_burette_info_t *out)
{
	pump_t *p = priv;
	out->capacity_ml = p->capacity_ml;
	out->steps = p->steps;
}

static double ml_per_step(const pump_t *p)
{
	return p->capacity_ml / (double)p->steps;
}

static long speed_for(const pump_t *p, double rate_ml_min)
{
	long v = lround(rate_ml_min / 60.0 / ml_per_step(p));
	if (v < 1)
		v = 1;
	if (v > p->prof.max_speed)
		v = p->prof.max_speed;
	return v;
}

static bool accept_reply(void *ctx, const char *line)
{
	accept_t *a = ctx;
	return pump_parse_reply(a->prof, line, a->rep) != PUMP_REPLY_UNKNOWN;
}

/* Send one command and wait for one reply that parses; garbage lines are
 * discarded until the deadline. No retry here. */
static drv_status_t transact_once(pump_t *p, const char *cmd, pump_reply_t *rep, drv_err_t *err)
{
	memset(rep, 0, sizeof(*rep));
	accept_t a = {&p->prof, rep};
	return cmdp_transact_once(&p->line, cmd, accept_reply, &a, err);
}

static drv_status_t open_link(void *priv, drv_err_t *err);

/* With bounded retries: for commands that are safe to repeat. */
static drv_status_t transact(pump_t *p, const char *cmd, pump_reply_t *rep, drv_err_t *err)
{
	memset(rep, 0, sizeof(*rep));
	accept_t a = {&p->prof, rep};
	return cmdp_transact(&p->line, open_link, p, cmd, accept_reply, &a, err);
}

static drv_status_t expect_ok(pump_t *p, const char *what, const pump_reply_t *r, drv_err_t *err)
{
	switch (r->kind) {
	case PUMP_REPLY_OK:
		return DRV_OK;
	case PUMP_REPLY_BUSY:
		return drv_fail(err, DRV_DEVICE_ERROR, "pump: busy, refused '%s'", what);
	case PUMP_REPLY_ERROR:
		p->fault = true;
		return drv_fail(err, DRV_DEVICE_ERROR, "pump: error %ld on '%s': %s", r->code, what,
		                r->text[0] ? r->text : "(no text)");
	default:
		return drv_fail(err, DRV_BAD_REPLY, "pump: unexpected reply to '%s'", what);
	}
}

static drv_status_t simple_cmd(pump_t *p, const char *tmpl, const pump_args_t *a, drv_err_t *err)
{
	char cmd[PUMP_STR * 2];
	if (pump_expand(tmpl, a, cmd, sizeof(cmd)) < 0)
		return drv_fail(err, DRV_CONFIG, "pump: cannot expand '%s'", tmpl);
	pump_reply_t r;
	drv_status_t st = transact(p, cmd, &r, err);
	if (st != DRV_OK)
		return st;
	return expect_ok(p, cmd, &r, err);
}

/* Ask for the position; count what left the syringe while dosing. */
static drv_status_t query(pump_t *p, bool *moving, drv_err_t *err)
{
	pump_reply_t r;
	drv_status_t st = transact(p, p->prof.status, &r, err);
	if (st != DRV_OK)
		return st;
	if (r.kind == PUMP_REPLY_ERROR) {
		p->fault = true;
		return drv_fail(err, DRV_DEVICE_ERROR, "pump: error %ld: %s", r.code,
		                r.text[0] ? r.text : "(no text)");
	}
	if (r.kind != PUMP_REPLY_MOVING && r.kind != PUMP_REPLY_IDLE)
		return drv_fail(err, DRV_BAD_REPLY, "pump: status reply without a position");
	if (r.position < 0 || r.position > p->steps)
		return drv_fail(err, DRV_BAD_REPLY, "pump: position %ld outside 0..%ld", r.position,
		                p->steps);
	bool counting = p->mode == MODE_DOSE || p->mode == MODE_IDLE;
	if (p->known && counting && r.position < p->pos)
		p->dispensed_steps += p->pos - r.position;
	p->pos = r.position;
	p->known = true;
	p->fault = false; /* a plain status reply: the device reports no error now */
	*moving = r.kind == PUMP_REPLY_MOVING;
	return DRV_OK;
}

/* The first line a pump hears on every open of its line, the first and each
 * reopen after the line was lost, is the halt: before the profile's init
 * (which may move the plunger, e.g. a homing command) and before any status
 * query. Whatever the pump was doing while nobody could reach it (a dose or
 * a fill it was given before the line went) stops first. Any reply counts (a
 * pump in an error state may refuse the halt with an error and is still
 * stopped); only silence or a lost line fails the open, and closes the
 * line again so the next try also starts with the halt. A refill cut off
 * this way ends with the valve turned back to the outlet, its safe
 * position. */
static drv_status_t open_link(void *priv, drv_err_t *err)
{
	pump_t *p = priv;
	char cmd[PUMP_STR * 2];
	pump_args_t a = {0};
	if (pump_expand(p->prof.halt, &a, cmd, sizeof(cmd)) < 0)
		return drv_fail(err, DRV_CONFIG, "pump: cannot expand '%s'", p->prof.halt);
	pump_reply_t hr;
	accept_t ha = {&p->prof, &hr};
	drv_status_t st = cmdp_open_with_halt(&p->line, cmd, accept_reply, &ha, err);
	if (st != DRV_OK)
		return st;
	bool refilling = p->mode == MODE_VALVE_IN || p->mode == MODE_FILL;
	/* Moves since the last status count in IDLE as in DOSE (query). */
	p->mode = MODE_IDLE;
	p->moving = false;
	if (p->prof.init[0]) {
		pump_reply_t r;
		st = transact_once(p, p->prof.init, &r, err);
		if (st == DRV_OK)
			st = expect_ok(p, p->prof.init, &r, err);
		if (st != DRV_OK)
			return st;
	}
	if (refilling && p->prof.valve_out[0]) {
		st = simple_cmd(p, p->prof.valve_out, &a, err);
		if (st != DRV_OK)
			return st;
		p->valve_known = true;
	}
	return DRV_OK;
}

static drv_status_t ensure_open(pump_t *p, drv_err_t *err)
{
	if (serial_is_open(&p->line.ser))
		return DRV_OK;
	return open_link(p, err);
}

static drv_status_t pump_open(void *priv, drv_err_t *err)
{
	pump_t *p = priv;
	drv_status_t st = open_link(p, err);
	if (st != DRV_OK)
		return st;
	bool mv;
	return query(p, &mv, err);
}

static drv_status_t pump_dose(void *priv, double volume_ml, drv_err_t *err)
{
	pump_t *p = priv;
	if (!(volume_ml > 0) || !isfinite(volume_ml))
		return drv_fail(err, DRV_CONFIG, "pump: dose must be > 0 mL (got %g)", volume_ml);
	long steps = lround(volume_ml / ml_per_step(p));
	if (steps < 1)
		return drv_fail(err, DRV_CONFIG, "pump: %g mL is less than one step (%g mL)",
		                volume_ml, ml_per_step(p));
	bool mv;
	drv_status_t st = query(p, &mv, err);
	if (st != DRV_OK)
		return st;
	if (!mv && p->mode == MODE_DOSE)
		p->mode = MODE_IDLE; /* the last dose ended since the last status */
	if (mv || p->mode != MODE_IDLE)
		return drv_fail(err, DRV_DEVICE_ERROR, "pump: still moving; dose refused");
	if (steps > p->pos)
		return drv_fail(err, DRV_CONFIG,
		                "pump: syringe holds %.4f mL, dose of %.4f mL needs a refill",
		                p->pos * ml_per_step(p), volume_ml);
	pump_args_t a = {.steps = steps,
	                 .volume_ml = steps * ml_per_step(p),
	                 .speed = speed_for(p, p->prof.dose_rate_ml_min),
	                 .position = p->pos - steps};
	char cmd[PUMP_STR * 2];
	if (pump_expand(p->prof.dose, &a, cmd, sizeof(cmd)) < 0)
		return drv_fail(err, DRV_CONFIG, "pump: cannot expand dose command");
	long before = p->pos;
	for (long i = 0; i <= p->line.link.retries; i++) {
		pump_reply_t r;
		st = ensure_open(p, err);
		if (st != DRV_OK)
			return st;
		st = transact_once(p, cmd, &r, err);
		if (st == DRV_OK) {
			st = expect_ok(p, cmd, &r, err);
			if (st == DRV_OK)
				p->mode = MODE_DOSE;
			return st;
		}
		if (st == DRV_CONFIG)
			return st;
		/* Lost or garbled reply: did the plunger start? */
		drv_err_t e2;
		if (query(p, &mv, &e2) == DRV_OK && (mv || p->pos < before)) {
			p->mode = MODE_DOSE;
			return DRV_OK;
		}
	}
	return st;
}

/* Advance a refill when the device is at rest. */
static drv_status_t refill_step(pump_t *p, drv_err_t *err)
{
	pump_args_t a = {0};
	drv_status_t st = DRV_OK;
	switch (p->mode) {
	case MODE_VALVE_IN:
		a.steps = p->steps - p->pos;
		a.volume_ml = a.steps * ml_per_step(p);
		a.speed = speed_for(p, p->prof.fill_rate_ml_min);
		a.position = p->steps;
		if (a.steps > 0) {
			st = simple_cmd(p, p->prof.fill, &a, err);
			if (st == DRV_OK)
				p->mode = MODE_FILL;
			return st;
		}
		/* fall through: already full */
		p->mode = MODE_FILL;
		return refill_step(p, err);
	case MODE_FILL:
		if (!p->prof.valve_out[0]) {
			p->mode = MODE_IDLE;
			return DRV_OK;
		}
		st = simple_cmd(p, p->prof.valve_out, &a, err);
		if (st == DRV_OK) {
			p->mode = MODE_VALVE_OUT;
			p->valve_known = true; /* this process set it: at the outlet */
		}
		return st;
	case MODE_VALVE_OUT:
	case MODE_DOSE:
		p->mode = MODE_IDLE;
		return DRV_OK;
	case MODE_IDLE:
		return DRV_OK;
	}
	return DRV_OK;
}

static drv_status_t pump_status(void *priv, drv_burette_status_t *out, drv_err_t *err)
{
	pump_t *p = priv;
	bool mv = false;
	drv_status_t st = query(p, &mv, err);
	if (st == DRV_OK && !mv && p->mode != MODE_IDLE) {
		st = refill_step(p, err);
		if (st == DRV_OK && p->mode != MODE_IDLE)
			mv = true; /* the next refill move has started */
	}
	p->moving = mv;
	memset(out, 0, sizeof(*out));
	out->moving = p->moving || (p->mode != MODE_IDLE && p->mode != MODE_DOSE);
	out->refilling =
	    p->mode == MODE_VALVE_IN || p->mode == MODE_FILL || p->mode == MODE_VALVE_OUT;
	out->dispensed_ml = (double)p->dispensed_steps * ml_per_step(p);
	out->contents_ml = p->known ? p->pos * ml_per_step(p) : 0;
	out->fault = p->fault;
	return st;
}

static drv_status_t pump_halt(void *priv, drv_err_t *err)
{
	pump_t *p = priv;
	pump_args_t a = {0};
	bool refilling = p->mode == MODE_VALVE_IN || p->mode == MODE_FILL;
	drv_status_t st = simple_cmd(p, p->prof.halt, &a, err);
	if (st != DRV_OK)
		return st;
	p->fault = false;
	/* The plunger may have moved since the last status: count it now, in
	 * the mode it moved in, before leaving that mode. */
	bool mv;
	drv_err_t e2;
	(void)query(p, &mv, &e2);
	p->mode = MODE_IDLE;
	if ((refilling || !p->valve_known) && p->prof.valve_out[0]) {
		st = simple_cmd(p, p->prof.valve_out, &a, err);
		if (st == DRV_OK)
			p->valve_known = true;
		return st;
	}
	return DRV_OK;
}

static drv_status_t pump_refill(void *priv, drv_err_t *err)
{
	pump_t *p = priv;
	bool mv;
	drv_status_t st = query(p, &mv, err);
	if (st != DRV_OK)
		return st;
	if (!mv && p->mode == MODE_DOSE)
		p->mode = MODE_IDLE;
	if (mv || p->mode != MODE_IDLE)
		return drv_fail(err, DRV_DEVICE_ERROR, "pump: still moving; refill refused");
	pump_args_t a = {0};
	if (p->prof.valve_in[0]) {
		st = simple_cmd(p, p->prof.valve_in, &a, err);
		if (st == DRV_OK)
			p->mode = MODE_VALVE_IN;
		return st;
	}
	p->mode = MODE_VALVE_IN; /* no valve: go straight to filling */
	return refill_step(p, err);
}

static void pump_close(void *priv)
{
	pump_t *p = priv;
	if (!p)
		return;
	serial_close(&p->line.ser);
	free(p);
}

const drv_burette_ops_t drv_pump_serial = {
    .name = "pump-serial",
    .summary = "line-based ASCII syringe pump on a serial port, described by a profile",
    .configure = pump_configure,
    .info = pump_info,
    .open = pump_open,
    .dose = pump_dose,
    .status = pump_status,
    .halt = pump_halt,
    .refill = pump_refill,
    .close = pump_close,
};
