/* calib.c: the electrode calibration session, the fit, and using a
 * calibration (see calib.h, docs/calibration.md).
 *
 * Stability: a buffer's reading counts as stable when the least-squares
 * slope of the readings over the last stable_window_s, times that window,
 * is below stable_drift_mv. A slope, not max-min: with 0.1 mV of noise the
 * spread of 20 readings is several tenths of a mV even when the electrode is
 * perfectly settled, while the fitted slope averages the noise out. The mV
 * recorded is the mean over that window, for the same reason.
 */
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "calib.h"
#include "chem.h"
#include "timefmt.h"

#define RING_MAX            256 /* readings kept for one window; faster readings are thinned */
#define MIN_WINDOW_READINGS 5
#define DEFAULT_T_C         25.0 /* a probe without a temperature sensor: assume 25 degC */

struct calib_session {
	calib_config_t cfg;
	calib_result_t res;
	calib_buffer_t buf[CALIB_MAX_BUFFERS];
	int cur;         /* buffer waited for / being measured */
	double t_next_s; /* when `next` came for the current buffer */
	double last_t_s; /* last reading kept */
	int ring_head, ring_n;
	double ring_t[RING_MAX], ring_mv[RING_MAX], ring_tc[RING_MAX];
};

const char *calib_state_name(calib_state_t s)
{
	switch (s) {
	case CALIB_WAITING:
		return "waiting";
	case CALIB_MEASURING:
		return "measuring";
	case CALIB_ACCEPTED:
		return "accepted";
	case CALIB_REJECTED:
		return "rejected";
	}
	return "rejected";
}

static bool is_final(calib_state_t s)
{
	return s == CALIB_ACCEPTED || s == CALIB_REJECTED;
}

static void clear_fit(calib_result_t *r)
{
	r->slope_pct = r->offset_mv = r->temperature_c = r->slope_mv_per_ph = NAN;
}

calib_session_t *calib_session_new(const calib_config_t *c, const double *nominal_ph, int n,
                                   char *err, size_t err_cap)
{
	if (n < CALIB_MIN_BUFFERS || n > CALIB_MAX_BUFFERS || !nominal_ph) {
		snprintf(err, err_cap, "a calibration needs %d to %d buffers (got %d)",
		         CALIB_MIN_BUFFERS, CALIB_MAX_BUFFERS, n);
		return NULL;
	}
	for (int i = 0; i < n; i++) {
		if (!(nominal_ph[i] >= 0.0 && nominal_ph[i] <= 14.0)) {
			snprintf(err, err_cap, "buffer %g is outside 0..14 pH", nominal_ph[i]);
			return NULL;
		}
	}
	for (int i = 0; i < n; i++) {
		for (int j = i + 1; j < n; j++) {
			/* Buffers closer than 1 pH make the slope ill-determined: a
			 * 0.1 mV error on 0.5 pH is already 0.3 % of slope. */
			if (fabs(nominal_ph[i] - nominal_ph[j]) < 1.0) {
				snprintf(err, err_cap,
				         "buffers %g and %g are less than 1 pH apart: choose "
				         "buffers that span the range you measure",
				         nominal_ph[i], nominal_ph[j]);
				return NULL;
			}
		}
	}
	calib_session_t *s = calloc(1, sizeof *s);
	if (!s) {
		snprintf(err, err_cap, "out of memory");
		return NULL;
	}
	if (c)
		s->cfg = *c;
	else
		calib_config_defaults(&s->cfg);
	s->res.state = CALIB_WAITING;
	s->res.n_buffers = n;
	clear_fit(&s->res);
	for (int i = 0; i < n; i++) {
		calib_buffer_lookup(&s->cfg, nominal_ph[i], &s->buf[i]);
		calib_point_t *p = &s->res.buffers[i];
		p->nominal_ph = nominal_ph[i];
		p->kind = s->buf[i].kind;
		memcpy(p->name, s->buf[i].name, sizeof p->name);
		p->name[sizeof p->name - 1] = '\0';
		p->ph = p->mv = p->temperature_c = p->drift_mv = p->wait_s = p->residual_mv = NAN;
	}
	s->res.next_buffer = nominal_ph[0];
	return s;
}

void calib_session_free(calib_session_t *s)
{
	free(s);
}

calib_state_t calib_session_state(const calib_session_t *s)
{
	return s->res.state;
}

double calib_session_next_buffer(const calib_session_t *s)
{
	return is_final(s->res.state) ? NAN : s->res.next_buffer;
}

int calib_session_next(calib_session_t *s, double t_s, char *err, size_t err_cap)
{
	if (s->res.state != CALIB_WAITING) {
		snprintf(err, err_cap, "calibration is %s, not waiting for a buffer",
		         calib_state_name(s->res.state));
		return -1;
	}
	if (!isfinite(t_s)) {
		snprintf(err, err_cap, "no time given");
		return -1;
	}
	s->res.state = CALIB_MEASURING;
	s->res.reason[0] = '\0'; /* a failed try of this buffer is over */
	s->t_next_s = t_s;
	s->last_t_s = -INFINITY;
	s->ring_head = s->ring_n = 0;
	return 0;
}

void calib_session_fail_buffer(calib_session_t *s, const char *why)
{
	if (s->res.state != CALIB_MEASURING)
		return;
	snprintf(s->res.reason, sizeof s->res.reason,
	         "buffer %g not recorded: %s; put the electrode back in it and measure it again",
	         s->res.buffers[s->cur].nominal_ph, why && *why ? why : "probe fault");
	s->res.state = CALIB_WAITING;
	s->res.next_buffer = s->res.buffers[s->cur].nominal_ph;
	s->ring_head = s->ring_n = 0;
}

static void reject(calib_session_t *s, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
static void reject(calib_session_t *s, const char *fmt, ...)
{
	va_list ap;
	va_start(ap, fmt);
	vsnprintf(s->res.reason, sizeof s->res.reason, fmt, ap);
	va_end(ap);
	s->res.state = CALIB_REJECTED;
	s->res.next_buffer = NAN;
}

void calib_session_cancel(calib_session_t *s, const char *reason)
{
	if (is_final(s->res.state))
		return;
	reject(s, "%s", reason && *reason ? reason : "cancelled");
}

/* ---- the ring of recent readings ---- */

static int ring_idx(const calib_session_t *s, int k) /* k-th oldest */
{
	return (s->ring_head + k) % RING_MAX;
}

static void ring_push(calib_session_t *s, double t_s, double mv, double t_c)
{
	/* Drop readings older than the window, keeping one at or before its start
	 * so the window is known to be covered. */
	double from_s = t_s - s->cfg.stable_window_s;
	while (s->ring_n >= 2 && s->ring_t[ring_idx(s, 1)] <= from_s) {
		s->ring_head = ring_idx(s, 1);
		s->ring_n--;
	}
	if (s->ring_n == RING_MAX) { /* cannot happen with thinning; be safe */
		s->ring_head = ring_idx(s, 1);
		s->ring_n--;
	}
	int i = ring_idx(s, s->ring_n);
	s->ring_t[i] = t_s;
	s->ring_mv[i] = mv;
	s->ring_tc[i] = t_c;
	s->ring_n++;
}

/* Drift over the window (mV), mean mV and mean temperature of its readings.
 * Returns false when the window is not yet covered. */
static bool window_stats(const calib_session_t *s, double now_s, double *drift_mv, double *mean_mv,
                         double *mean_tc)
{
	double w = s->cfg.stable_window_s;
	double from_s = now_s - w - 1e-9;
	int n = 0;
	double st = 0, sv = 0, sc = 0, oldest = now_s;
	for (int k = 0; k < s->ring_n; k++) {
		int i = ring_idx(s, k);
		if (s->ring_t[i] < from_s)
			continue;
		n++;
		st += s->ring_t[i];
		sv += s->ring_mv[i];
		sc += s->ring_tc[i];
		if (s->ring_t[i] < oldest)
			oldest = s->ring_t[i];
	}
	/* Covered: readings from (nearly) the whole window; 10 % slack lets a
	 * reading clock with jitter still qualify. */
	if (n < MIN_WINDOW_READINGS || now_s - oldest < 0.9 * w)
		return false;
	/* ... and up to now: readings that stopped coming (a transmitter that
	 * repeats its last value) never make a window stable. */
	double newest = -INFINITY;
	for (int k = 0; k < s->ring_n; k++)
		if (s->ring_t[ring_idx(s, k)] > newest)
			newest = s->ring_t[ring_idx(s, k)];
	if (now_s - newest > fmax(1.0, 0.1 * w))
		return false;
	double tm = st / n, vm = sv / n;
	double sxx = 0, sxy = 0;
	for (int k = 0; k < s->ring_n; k++) {
		int i = ring_idx(s, k);
		if (s->ring_t[i] < from_s)
			continue;
		double dt = s->ring_t[i] - tm;
		sxx += dt * dt;
		sxy += dt * (s->ring_mv[i] - vm);
	}
	if (!(sxx > 0))
		return false;
	*drift_mv = fabs(sxy / sxx) * w;
	*mean_mv = vm;
	*mean_tc = sc / n;
	return true;
}

/* ---- the fit ---- */

int calib_fit(const double *ph, const double *mv, const double *temperature_c, int n,
              double *slope_pct, double *offset_mv)
{
	if (n < 2)
		return -1;
	/* Model (docs/chemistry.md's electrode): mV_i = offset - s/100 k(T_i) (pH_i - 7).
	 * Linear in (offset, s) with x_i = -k(T_i) (pH_i - 7) / 100. */
	double sx = 0, sy = 0;
	double x[CALIB_MAX_BUFFERS * 4];
	if (n > (int)(sizeof x / sizeof x[0]))
		return -1;
	for (int i = 0; i < n; i++) {
		double t_c =
		    temperature_c && isfinite(temperature_c[i]) ? temperature_c[i] : DEFAULT_T_C;
		if (!isfinite(ph[i]) || !isfinite(mv[i]))
			return -1;
		x[i] = -chem_nernst_mv(t_c) * (ph[i] - 7.0) / 100.0;
		sx += x[i];
		sy += mv[i];
	}
	double xm = sx / n, ym = sy / n;
	double sxx = 0, sxy = 0;
	for (int i = 0; i < n; i++) {
		sxx += (x[i] - xm) * (x[i] - xm);
		sxy += (x[i] - xm) * (mv[i] - ym);
	}
	/* All buffers at one pH: no slope. 1e-6 (mV/%)^2 is far below any real
	 * spread (1 pH apart gives about 0.1). */
	if (!(sxx > 1e-6))
		return -1;
	double s = sxy / sxx;
	*slope_pct = s;
	/* offset = mV where x = 0, i.e. at pH 7 */
	*offset_mv = ym - s * xm;
	return 0;
}

static void finish(calib_session_t *s)
{
	calib_result_t *r = &s->res;
	int n = r->n_buffers;
	double ph[CALIB_MAX_BUFFERS] = {0}, mv[CALIB_MAX_BUFFERS] = {0},
	       tc[CALIB_MAX_BUFFERS] = {0};
	double sum_tc = 0;
	for (int i = 0; i < n; i++) {
		ph[i] = r->buffers[i].ph;
		mv[i] = r->buffers[i].mv;
		tc[i] = r->buffers[i].temperature_c;
		sum_tc += tc[i];
	}
	double slope_pct, offset_mv;
	if (calib_fit(ph, mv, tc, n, &slope_pct, &offset_mv) != 0) {
		reject(s, "the buffers' readings give no slope");
		return;
	}
	r->slope_pct = slope_pct;
	r->offset_mv = offset_mv;
	r->temperature_c = sum_tc / n;
	/* the line's own slope: mV fall as pH rises, so it is negative */
	r->slope_mv_per_ph = -slope_pct / 100.0 * chem_nernst_mv(r->temperature_c);
	double worst_mv = 0;
	int worst = 0;
	for (int i = 0; i < n; i++) {
		double fit_mv = chem_mv_from_ph(offset_mv, slope_pct, ph[i], tc[i]);
		r->buffers[i].residual_mv = mv[i] - fit_mv;
		if (fabs(r->buffers[i].residual_mv) > fabs(worst_mv)) {
			worst_mv = r->buffers[i].residual_mv;
			worst = i;
		}
	}
	const calib_config_t *c = &s->cfg;
	char why[CALIB_REASON_MAX] = "";
	size_t len = 0;
	if (!(slope_pct >= c->slope_min_pct && slope_pct <= c->slope_max_pct))
		len += (size_t)snprintf(why + len, sizeof why - len,
		                        "slope %.2f %% is outside %g..%g %% (clean or replace the "
		                        "electrode)",
		                        slope_pct, c->slope_min_pct, c->slope_max_pct);
	if (len < sizeof why && !(offset_mv >= c->offset_min_mv && offset_mv <= c->offset_max_mv))
		len += (size_t)snprintf(
		    why + len, sizeof why - len, "%soffset %.1f mV at pH 7 is outside %g..%g mV",
		    len ? "; " : "", offset_mv, c->offset_min_mv, c->offset_max_mv);
	if (len < sizeof why && n > 2 && fabs(worst_mv) > c->residual_max_mv)
		snprintf(why + len, sizeof why - len,
		         "%sbuffer %g reads %.1f mV off the line of the others (limit %g mV): "
		         "wrong or spoiled buffer?",
		         len ? "; " : "", r->buffers[worst].nominal_ph, worst_mv,
		         c->residual_max_mv);
	if (why[0]) {
		reject(s, "%s", why);
		return;
	}
	r->state = CALIB_ACCEPTED;
	r->next_buffer = NAN;
	r->reason[0] = '\0';
}

static void record_buffer(calib_session_t *s, double now_s, double drift_mv, double mean_mv,
                          double mean_tc)
{
	calib_point_t *p = &s->res.buffers[s->cur];
	const calib_buffer_t *b = &s->buf[s->cur];
	double ph = calib_buffer_ph(b, mean_tc);
	if (!isfinite(ph)) {
		reject(s, "buffer %g was read at %.1f degC, outside its table (%g..%g degC)",
		       p->nominal_ph, mean_tc, b->table.t_c[0], b->table.t_c[b->table.n - 1]);
		return;
	}
	p->measured = true;
	p->ph = ph;
	p->mv = mean_mv;
	p->temperature_c = mean_tc;
	p->drift_mv = drift_mv;
	p->wait_s = now_s - s->t_next_s;
	s->cur++;
	if (s->cur < s->res.n_buffers) {
		s->res.state = CALIB_WAITING;
		s->res.next_buffer = s->res.buffers[s->cur].nominal_ph;
		return;
	}
	finish(s);
}

calib_state_t calib_session_feed(calib_session_t *s, const calib_reading_t *r)
{
	if (s->res.state != CALIB_MEASURING || !r || !isfinite(r->t_s))
		return s->res.state;
	double now_s = r->t_s;
	double elapsed_s = now_s - s->t_next_s;
	/* A reading stamped before `next` belongs to the previous beaker. */
	if (elapsed_s < 0)
		return s->res.state;
	double thin_s = s->cfg.stable_window_s / 200.0;
	bool usable = isfinite(r->mv) && fabs(r->mv) < 5000.0 && now_s >= s->last_t_s + thin_s;
	if (usable) {
		double t_c =
		    isfinite(r->temperature_c) && r->temperature_c > -50 && r->temperature_c < 200
		        ? r->temperature_c
		        : DEFAULT_T_C;
		ring_push(s, now_s, r->mv, t_c);
		s->last_t_s = now_s;
	}
	double drift_mv = NAN, mean_mv, mean_tc;
	bool covered = window_stats(s, now_s, &drift_mv, &mean_mv, &mean_tc);
	if (covered && elapsed_s >= s->cfg.stable_min_s && drift_mv <= s->cfg.stable_drift_mv) {
		record_buffer(s, now_s, drift_mv, mean_mv, mean_tc);
		return s->res.state;
	}
	if (elapsed_s > s->cfg.stable_max_s) {
		if (covered)
			reject(
			    s,
			    "buffer %g: reading not stable within %g s (drift %.2f mV over %g s, "
			    "limit %g mV)",
			    s->res.buffers[s->cur].nominal_ph, s->cfg.stable_max_s, drift_mv,
			    s->cfg.stable_window_s, s->cfg.stable_drift_mv);
		else
			reject(s, "buffer %g: not stable within %g s (too few readings)",
			       s->res.buffers[s->cur].nominal_ph, s->cfg.stable_max_s);
	}
	return s->res.state;
}

void calib_session_result(const calib_session_t *s, double at_unix_s, calib_result_t *out)
{
	*out = s->res;
	if (out->state == CALIB_ACCEPTED) {
		out->at_unix_s = at_unix_s;
		out->expires_at_unix_s = at_unix_s + s->cfg.expires_h * 3600.0;
	} else if (out->state == CALIB_REJECTED) {
		out->at_unix_s = at_unix_s;
		out->expires_at_unix_s = 0;
	} else {
		out->at_unix_s = out->expires_at_unix_s = 0;
	}
}

/* ---- using a calibration ---- */

double calib_ph_from_mv(const calib_result_t *c, double mv, double temperature_c)
{
	if (!c || !isfinite(c->slope_pct) || !isfinite(c->offset_mv) || !isfinite(mv))
		return NAN;
	double t_c = isfinite(temperature_c) ? temperature_c : DEFAULT_T_C;
	double k_mv = c->slope_pct / 100.0 * chem_nernst_mv(t_c);
	if (!(fabs(k_mv) > 1e-6))
		return NAN;
	return 7.0 - (mv - c->offset_mv) / k_mv;
}

bool calib_is_valid(const calib_result_t *c, double now_unix_s)
{
	return c && c->state == CALIB_ACCEPTED && isfinite(c->slope_pct) &&
	       isfinite(c->offset_mv) && now_unix_s < c->expires_at_unix_s;
}

static void format_time(double unix_s, char out[TIME_RFC3339_SIZE])
{
	/* 0 means "not yet": no time at all rather than the epoch. */
	if (!(unix_s > 0) || !time_format_rfc3339(unix_s, out))
		out[0] = '\0';
}

bool calib_check_for_run(const calib_result_t *c, const char *station, double now_unix_s, char *msg,
                         size_t cap)
{
	const char *st = station && *station ? station : "this station";
	char when[32];
	if (!c) {
		snprintf(msg, cap,
		         "%s has no electrode calibration; a signal: ph run needs one "
		         "(POST /v1/calibrations or `stopcock calibrate`)",
		         st);
		return false;
	}
	if (c->state == CALIB_WAITING || c->state == CALIB_MEASURING) {
		snprintf(msg, cap,
		         "%s's electrode calibration is still in progress (%s); finish it before "
		         "a signal: ph run",
		         st, calib_state_name(c->state));
		return false;
	}
	if (c->state != CALIB_ACCEPTED || !isfinite(c->slope_pct)) {
		snprintf(msg, cap,
		         "%s's latest electrode calibration was not accepted; calibrate again "
		         "before a signal: ph run",
		         st);
		return false;
	}
	if (!(now_unix_s < c->expires_at_unix_s)) {
		format_time(c->expires_at_unix_s, when);
		snprintf(msg, cap,
		         "%s's electrode calibration expired at %s; calibrate again before a "
		         "signal: ph run",
		         st, when[0] ? when : "an unknown time");
		return false;
	}
	if (cap)
		msg[0] = '\0';
	return true;
}

/* ---- JSON ---- */

static json_t *jnum(double x)
{
	return isfinite(x) ? json_real(x) : json_null();
}

static json_t *jtime(double unix_s)
{
	char s[32];
	format_time(unix_s, s);
	return s[0] ? json_string(s) : json_null();
}

json_t *calib_result_json(const calib_result_t *c)
{
	json_t *o = json_object();
	if (!o)
		return NULL;
	json_object_set_new(o, "state", json_string(calib_state_name(c->state)));
	json_object_set_new(o, "next_buffer", jnum(is_final(c->state) ? NAN : c->next_buffer));
	json_object_set_new(o, "slope_pct", jnum(c->slope_pct));
	json_object_set_new(o, "offset_mv", jnum(c->offset_mv));
	json_object_set_new(o, "temperature_c", jnum(c->temperature_c));
	json_object_set_new(o, "slope_mv_per_ph", jnum(c->slope_mv_per_ph));
	json_t *a = json_array();
	for (int i = 0; i < c->n_buffers && i < CALIB_MAX_BUFFERS; i++) {
		const calib_point_t *p = &c->buffers[i];
		json_t *b = json_object();
		json_object_set_new(b, "nominal", json_real(p->nominal_ph));
		json_object_set_new(b, "name", json_string(p->name));
		json_object_set_new(b, "ph", jnum(p->measured ? p->ph : NAN));
		json_object_set_new(b, "mv", jnum(p->measured ? p->mv : NAN));
		json_object_set_new(b, "temperature_c", jnum(p->measured ? p->temperature_c : NAN));
		json_object_set_new(b, "residual_mv", jnum(p->residual_mv));
		json_array_append_new(a, b);
	}
	json_object_set_new(o, "buffers", a);
	json_object_set_new(o, "at", jtime(is_final(c->state) ? c->at_unix_s : 0));
	json_object_set_new(o, "expires_at",
	                    jtime(c->state == CALIB_ACCEPTED ? c->expires_at_unix_s : 0));
	json_object_set_new(o, "reason", c->reason[0] ? json_string(c->reason) : json_null());
	return o;
}

static double jget_num(const json_t *o, const char *key)
{
	const json_t *v = json_object_get(o, key);
	return json_is_number(v) ? json_number_value(v) : NAN;
}

static double parse_time(const char *s)
{
	double t = 0;
	return s && time_parse_rfc3339(s, &t) ? t : 0;
}

int calib_result_from_json(const json_t *j, calib_result_t *c)
{
	memset(c, 0, sizeof *c);
	clear_fit(c);
	c->next_buffer = NAN;
	if (!json_is_object(j))
		return -1;
	const char *state = json_string_value(json_object_get(j, "state"));
	if (!state)
		return -1;
	static const calib_state_t states[] = {CALIB_WAITING, CALIB_MEASURING, CALIB_ACCEPTED,
	                                       CALIB_REJECTED};
	bool known = false;
	for (size_t i = 0; i < sizeof states / sizeof states[0]; i++) {
		if (strcmp(state, calib_state_name(states[i])) == 0) {
			c->state = states[i];
			known = true;
		}
	}
	/* "aborted" (a session the daemon lost) is as unusable as a rejection. */
	if (!known && strcmp(state, "aborted") == 0) {
		c->state = CALIB_REJECTED;
		known = true;
	}
	if (!known)
		return -1;
	c->next_buffer = jget_num(j, "next_buffer");
	c->slope_pct = jget_num(j, "slope_pct");
	c->offset_mv = jget_num(j, "offset_mv");
	c->temperature_c = jget_num(j, "temperature_c");
	c->slope_mv_per_ph = jget_num(j, "slope_mv_per_ph");
	c->at_unix_s = parse_time(json_string_value(json_object_get(j, "at")));
	c->expires_at_unix_s = parse_time(json_string_value(json_object_get(j, "expires_at")));
	const char *reason = json_string_value(json_object_get(j, "reason"));
	if (reason)
		snprintf(c->reason, sizeof c->reason, "%s", reason);
	const json_t *a = json_object_get(j, "buffers");
	size_t i;
	const json_t *b;
	json_array_foreach(a, i, b)
	{
		if (c->n_buffers >= CALIB_MAX_BUFFERS)
			break;
		calib_point_t *p = &c->buffers[c->n_buffers++];
		p->nominal_ph = jget_num(b, "nominal");
		const char *name = json_string_value(json_object_get(b, "name"));
		snprintf(p->name, sizeof p->name, "%s", name ? name : "");
		p->ph = jget_num(b, "ph");
		p->mv = jget_num(b, "mv");
		p->temperature_c = jget_num(b, "temperature_c");
		p->residual_mv = jget_num(b, "residual_mv");
		p->measured = isfinite(p->mv);
		p->drift_mv = p->wait_s = NAN;
	}
	if (c->state == CALIB_ACCEPTED && (!isfinite(c->slope_pct) || !isfinite(c->offset_mv)))
		return -1;
	return 0;
}
