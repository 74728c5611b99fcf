/* engine.c: the titration state machine (see engine.h).
 *
 * One run goes: stir (stir_s) -> first reading at 0 mL -> predose -> a loop of
 * {dose, settle, accept a point, check endpoints and stops} -> evaluate.
 * Time only comes from events; nothing here reads a clock or does I/O.
 */
#include "engine.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "chem.h"
#include "endpoint.h"
#include "modelfit.h"
#include "settlefit.h"

#define WIN_MAX 512 /* readings kept while settling */
#define FIT_MAX 64  /* latest readings the settling fit looks at */

typedef enum {
	ST_INIT = 0,
	ST_STIR,   /* waiting for the TICK that ends stirring */
	ST_SETTLE, /* reading until the signal is still */
	ST_DOSE,   /* waiting for DOSED */
	ST_REFILL, /* waiting for REFILLED */
	ST_DONE,
} state_t;

struct engine {
	/* The method as the criterion now sought sees it (method_for_criterion):
	 * for one detect mapping, the method itself. */
	method_t m;
	method_t full; /* the method as written */
	engine_params_t p;
	state_t st;
	engine_action_t last; /* answer repeated for an unexpected event */
	double t_s;           /* latest event time */
	double t_start_s;
	double quantum_ml;
	double vmax_ml; /* effective volume limit, mL */

	double dispensed_ml;
	double content_ml; /* titrant left in the syringe */
	int additions, refills;
	double pending_ml; /* addition waiting for a refill or a DOSED */
	bool predose_done;
	double predose_left_ml; /* predose still to add (larger than the syringe) */

	/* settling: readings since the last addition */
	double settle_from_s;
	int n_win;
	double win_t[WIN_MAX], win_s[WIN_MAX], win_mv[WIN_MAX], win_ph[WIN_MAX], win_tc[WIN_MAX];
	/* the readings' noise: the scatter around the settling fits of the
	 * points, pooled (residual sums and their degrees of freedom) */
	double noise_sse;
	int noise_dof, noise_pts;
	int n_timed_out; /* points the still rule took at wait_max_s */
	/* the electrode's time constant, from the points whose approach fixed
	 * it (log-mean, s); extrapolation then needs fewer readings */
	double tau_dsse[SETTLEFIT_N_TAU]; /* summed misfit per grid tau (signal units^2) */
	double tau_lo_s, tau_hi_s;        /* the taus it admits, s; 0: not yet fixed */
	char warn_code[32];
	char warn_msg[256];

	engine_point_t *pts;
	int n_pts, cap_pts;

	int n_ep;
	engine_endpoint_t ep[METHOD_MAX_ENDPOINTS];
	bool all_found;
	/* guided: the volume of the point found past the last jump, from which
	 * one addition of past_endpoint_ml went (past_last_jump); 0: none */
	double past_from_ml;
	bool target_recheck;  /* a target point was read again once (per criterion) */
	double stop_after_ml; /* once all endpoints are found: dose up to here */

	/* endpoints in sequence: detect's criteria, met in turn */
	int n_crit, crit;    /* how many; the one sought now */
	int n_done;          /* endpoints given by the criteria already met */
	double seg_from_ml;  /* the current criterion is sought past this volume */
	engine_point_t *seg; /* scratch: the points past seg_from_ml */
	int cap_seg;
	method_criterion_t crits[METHOD_MAX_ENDPOINTS];
	char detail[400]; /* engine_stop_detail */

	int n_res;
	engine_result_t res[METHOD_MAX_RESULTS];

	engine_stop_t reason;
	char fault_code[32];
	char fault_msg[256];
	char eval_code[32]; /* endpoint_missing, result_missing: set by evaluate() */
	char eval_msg[256];
	char doubt_note[160]; /* a doubtful endpoint, as the results' note */
	const char *phase;
};

static const char *const stop_names[] = {
    [ENGINE_STOP_NONE] = "",
    [ENGINE_STOP_ENDPOINTS] = "endpoints_found",
    [ENGINE_STOP_VOLUME_MAX] = "volume_max",
    [ENGINE_STOP_SIGNAL_LIMIT] = "signal_limit",
    [ENGINE_STOP_TIME_MAX] = "time_max",
    [ENGINE_STOP_FAULT] = "fault",
    [ENGINE_STOP_ABORTED] = "aborted",
};

const char *engine_stop_name(engine_stop_t s)
{
	if ((unsigned)s >= sizeof stop_names / sizeof stop_names[0])
		return "";
	return stop_names[s];
}

const char *engine_accept_name(engine_accept_t a)
{
	switch (a) {
	case ENGINE_ACCEPT_PASS:
		return "pass";
	case ENGINE_ACCEPT_LOW:
		return "low";
	case ENGINE_ACCEPT_HIGH:
		return "high";
	case ENGINE_ACCEPT_MISSING:
		return "missing";
	case ENGINE_ACCEPT_DOUBTFUL:
		return "doubtful";
	default:
		return "none";
	}
}

engine_t *engine_new(const method_t *m, const engine_params_t *p)
{
	engine_t *e = calloc(1, sizeof *e);
	if (!e)
		return NULL;
	e->m = *m;
	e->full = *m;
	e->n_crit = method_criteria(m, e->crits);
	e->p = *p;
	if (!(e->p.burette_capacity_ml > 0))
		e->p.burette_capacity_ml = 10.0;
	if (e->p.burette_steps <= 0)
		e->p.burette_steps = 20000;
	if (!(e->p.read_interval_s > 0))
		e->p.read_interval_s = 0.5;
	if (!(e->p.start_volume_ml > 0))
		e->p.start_volume_ml = 50.0;
	if (!(e->p.titer > 0))
		e->p.titer = 1.0;
	e->quantum_ml = e->p.burette_capacity_ml / (double)e->p.burette_steps;
	e->vmax_ml = m->volume_max_ml;
	if (e->p.vessel_max_ml > 0 && e->p.vessel_max_ml < e->vmax_ml)
		e->vmax_ml = e->p.vessel_max_ml;
	if (!(e->vmax_ml >= 0))
		e->vmax_ml = 0;
	e->content_ml = e->p.burette_content_ml;
	if (!(e->content_ml >= 0) || e->content_ml > e->p.burette_capacity_ml)
		e->content_ml = e->p.burette_capacity_ml;
	e->phase = "stirring";
	e->stop_after_ml = INFINITY;
	e->cap_pts = 64;
	e->pts = malloc((size_t)e->cap_pts * sizeof *e->pts);
	if (!e->pts) {
		free(e);
		return NULL;
	}
	return e;
}

void engine_free(engine_t *e)
{
	if (!e)
		return;
	free(e->seg);
	free(e->pts);
	free(e);
}

/* ---- small helpers ---- */

static double signal_of(const engine_t *e, double mv, double ph)
{
	return e->m.signal == SIGNAL_MV ? mv : ph;
}

/* pH of a reading: the probe's own, else through the calibration (or the
 * ideal electrode when signal: ph has none), else NaN. */
static double ph_of(const engine_t *e, const engine_event_t *ev)
{
	double t_c = isfinite(ev->temperature_c) ? ev->temperature_c : 25.0;
	if (ev->has_ph)
		return ev->ph;
	if (e->p.has_calibration)
		return chem_ph_from_mv(e->p.cal_offset_mv, e->p.cal_slope_pct, ev->mv, t_c);
	if (e->m.signal == SIGNAL_PH)
		return chem_ph_from_mv(0.0, 100.0, ev->mv, t_c);
	return NAN;
}

static engine_action_t act(engine_t *e, engine_act_kind_t k, double until_t_s)
{
	engine_action_t a = {.kind = k,
	                     .until_t_s = until_t_s,
	                     .stir_on = e->st != ST_DONE,
	                     .phase = e->phase,
	                     .new_point = -1};
	return a;
}

static double quantize(const engine_t *e, double ml)
{
	return floor(ml / e->quantum_ml + 0.5) * e->quantum_ml;
}

/* ---- evaluation ---- */

/* The first doubtful endpoint's reason, prefixed with its number; NULL
 * when every endpoint is supported. */
static const char *endpoints_doubt(engine_t *e)
{
	for (int i = 0; i < e->n_ep; i++)
		if (e->ep[i].doubt[0]) {
			snprintf(e->doubt_note, sizeof e->doubt_note, "endpoint %d: %s", e->ep[i].n,
			         e->ep[i].doubt);
			return e->doubt_note;
		}
	return NULL;
}

static void compute_results(engine_t *e)
{
	formula_vars_t fv;
	memset(&fv, 0, sizeof fv);
	for (int i = 0; i < e->n_ep && i < FORMULA_MAX_END; i++) {
		formula_vars_set(&fv, (formula_var_t)(FV_END_ML + i), e->ep[i].volume_ml);
		if (isfinite(e->ep[i].signal))
			formula_vars_set(&fv, (formula_var_t)(FV_END_PH + i), e->ep[i].signal);
		double half = endpoint_interp(e->pts, e->n_pts, e->ep[i].volume_ml / 2, 0);
		if (isfinite(half))
			formula_vars_set(&fv, (formula_var_t)(FV_HALF_PH + i), half);
	}
	if (e->p.has_blank)
		formula_vars_set(&fv, FV_BLANK_ML, e->p.blank_ml);
	formula_vars_set(&fv, FV_TITRANT_MOLARITY, e->m.titrant_molarity);
	formula_vars_set(&fv, FV_TITER, e->p.titer);
	formula_vars_set(&fv, FV_AMOUNT, e->p.amount);
	for (int i = 0; i < e->p.n_adds && i < FORMULA_MAX_ADD; i++) {
		formula_vars_set(&fv, (formula_var_t)(FV_ADD_ML + i), e->p.add_ml[i]);
		formula_vars_set(&fv, (formula_var_t)(FV_ADD_MOLARITY + i), e->p.add_molarity[i]);
		formula_vars_set(&fv, (formula_var_t)(FV_ADD_TITER + i), e->p.add_titer[i]);
	}

	e->n_res = 0;
	for (int i = 0; i < e->m.n_results && i < METHOD_MAX_RESULTS; i++) {
		const method_result_t *mr = &e->m.results[i];
		engine_result_t *r = &e->res[e->n_res++];
		memset(r, 0, sizeof *r);
		memcpy(r->name, mr->name, sizeof r->name);
		r->name[sizeof r->name - 1] = '\0';
		_Static_assert(sizeof r->unit == sizeof mr->unit, "unit sizes");
		memcpy(r->unit, mr->unit, sizeof r->unit);
		r->unit[sizeof r->unit - 1] = '\0';
		r->decimals = mr->decimals;
		for (int j = 0; j < e->n_ep && j < FORMULA_MAX_END; j++) {
			unsigned bits =
			    1u << (FV_END_ML + j) | 1u << (FV_END_PH + j) | 1u << (FV_HALF_PH + j);
			if (e->ep[j].fallback && (mr->formula.used & bits))
				r->from_fallback = true;
		}
		double v = 0;
		char msg[160] = "";
		formula_status_t st = formula_eval(&mr->formula, &fv, &v, msg, sizeof msg);
		if (st != FORMULA_OK || !isfinite(v)) {
			r->has_value = false;
			snprintf(r->note, sizeof r->note, "%s", msg[0] ? msg : "no value");
			r->accept = ENGINE_ACCEPT_MISSING;
			continue;
		}
		double scale = pow(10.0, mr->decimals);
		double rv = round(v * scale) / scale;
		if (!isfinite(rv))
			rv = v;
		r->has_value = true;
		r->value = rv;
		if (mr->has_min && rv < mr->accept_min)
			r->accept = ENGINE_ACCEPT_LOW;
		else if (mr->has_max && rv > mr->accept_max)
			r->accept = ENGINE_ACCEPT_HIGH;
		else if (mr->has_min || mr->has_max)
			r->accept = ENGINE_ACCEPT_PASS;
		else
			r->accept = ENGINE_ACCEPT_NONE;
		/* A value from an endpoint the points do not support is no pass,
		 * whatever its limits say (docs/lims.md). */
		const char *doubt = endpoints_doubt(e);
		if (doubt) {
			r->accept = ENGINE_ACCEPT_DOUBTFUL;
			snprintf(r->note, sizeof r->note, "%s", doubt);
		}
	}
}

static int run_dir(const engine_t *e)
{
	int hint = 0;
	double s0 = e->n_pts ? e->pts[0].signal : NAN;
	/* A target: the side the run starts on, until the signal has moved by
	 * more than the settling band. A first addition's change within it may
	 * be noise the other way (a strong acid's pH 1.763 -> 1.761), read as a
	 * direction that puts the start past the target; a start really past it
	 * (a water below pH 8.3 for P alkalinity) shows once the signal moves. */
	if (e->m.detect == DETECT_TARGET && e->m.has_target && isfinite(s0)) {
		hint = e->m.target > s0 ? 1 : -1;
		if (!(fabs(e->pts[e->n_pts - 1].signal - s0) > e->m.still_within))
			return hint;
	} else if (e->m.has_signal_limit && isfinite(s0)) {
		hint = e->m.signal_limit > s0 ? 1 : -1;
	}
	return endpoint_direction(e->pts, e->n_pts, hint);
}

/* A run that stopped by its own rules has still failed when an endpoint the
 * method asks for is missing or a result has no value: nobody reads a null
 * result as a pass at night (docs/lims.md, "What finished means"). */
static void judge(engine_t *e)
{
	e->eval_code[0] = e->eval_msg[0] = '\0';
	if (e->reason == ENGINE_STOP_FAULT || e->reason == ENGINE_STOP_ABORTED)
		return;
	if (e->n_ep < e->full.count && e->full.n_criteria > 0) {
		/* a list: say which criterion was not met */
		int ci = e->n_ep < e->n_crit ? e->n_ep : e->n_crit - 1;
		snprintf(e->eval_code, sizeof e->eval_code, "endpoint_missing");
		snprintf(e->eval_msg, sizeof e->eval_msg,
		         "found %d of the %d endpoints the method asks for (detect[%d], %s, was "
		         "not met); the run stopped on %s after %.4f mL",
		         e->n_ep, e->full.count, ci + 1, method_detect_name(e->crits[ci].kind),
		         engine_stop_name(e->reason), e->dispensed_ml);
		return;
	}
	if (e->n_ep < e->full.count) {
		snprintf(e->eval_code, sizeof e->eval_code, "endpoint_missing");
		snprintf(e->eval_msg, sizeof e->eval_msg,
		         "found %d of the %d endpoint%s the method asks for; the run stopped on %s "
		         "after %.4f mL",
		         e->n_ep, e->full.count, e->full.count == 1 ? "" : "s",
		         engine_stop_name(e->reason), e->dispensed_ml);
		return;
	}
	for (int i = 0; i < e->n_res; i++)
		if (!e->res[i].has_value) {
			snprintf(e->eval_code, sizeof e->eval_code, "result_missing");
			snprintf(e->eval_msg, sizeof e->eval_msg, "result '%s' has no value: %s",
			         e->res[i].name, e->res[i].note);
			return;
		}
}

/* Endpoints of criterion ci (seen through `view`) past from_ml, the
 * endpoint before it; at most cap, in order of volume, each marked with its
 * criterion. The search sees only the points from the last one at or before
 * from_ml on, their volumes counted from from_ml, so each kind of search
 * finds the next endpoint as it would a first one (Gran's dilution with the
 * liquid then in the beaker). A criterion with a fallback ends at the
 * fallback signal when no inflection lies before it (marked fallback). */
static int seek(engine_t *e, const method_t *view, int ci, double from_ml, int dir, bool final,
                engine_endpoint_t *out, int cap)
{
	const engine_point_t *pts = e->pts;
	int n = e->n_pts;
	double v0_ml = e->p.start_volume_ml;
	if (cap < 1)
		return 0;
	if (from_ml > 0) {
		int i0 = 0;
		while (i0 + 1 < n && e->pts[i0 + 1].volume_ml <= from_ml)
			i0++;
		if (n - i0 > e->cap_seg) {
			engine_point_t *g = realloc(e->seg, (size_t)e->cap_pts * sizeof *g);
			if (!g)
				return 0;
			e->seg = g;
			e->cap_seg = e->cap_pts;
		}
		for (int i = i0; i < n; i++) {
			e->seg[i - i0] = e->pts[i];
			e->seg[i - i0].volume_ml -= from_ml;
		}
		pts = e->seg;
		n -= i0;
		v0_ml += from_ml;
	}
	int k = endpoint_find(view, pts, n, dir, final, v0_ml, out, cap);
	const method_criterion_t *cr = &e->crits[ci];
	if (cr->has_fallback && cr->kind != DETECT_TARGET) {
		method_criterion_t fc = *cr;
		engine_endpoint_t fb = {0};
		fc.kind = DETECT_TARGET;
		fc.has_target = true;
		fc.target = cr->fallback;
		/* only the fields find_target reads differ from the view */
		method_t *fm = malloc(sizeof *fm);
		int kf = 0;
		if (fm) {
			method_for_criterion(view, &fc, fm);
			kf = endpoint_find(fm, pts, n, dir, final, v0_ml, &fb, 1);
			free(fm);
		}
		if (kf > 0) {
			/* an inflection counts only before the fallback signal */
			while (k > 0 && out[k - 1].volume_ml > fb.volume_ml)
				k--;
			if (k == 0) {
				out[0] = fb;
				out[0].fallback = true;
				k = 1;
			}
		}
	}
	for (int i = 0; i < k; i++) {
		out[i].criterion = ci + 1;
		if (from_ml > 0) {
			out[i].volume_ml = fmax(out[i].volume_ml + from_ml, from_ml);
			out[i].deriv_ml += from_ml;
			out[i].model_ml += from_ml;
			out[i].half_ph = endpoint_interp(e->pts, e->n_pts, out[i].volume_ml / 2, 1);
		}
	}
	return k;
}

/* Which criterion gave which endpoint, for a list or a fallback. */
static void describe(engine_t *e)
{
	e->detail[0] = '\0';
	if (e->full.n_criteria == 0 && !e->full.has_fallback)
		return;
	const char *u = e->full.signal == SIGNAL_MV ? "mV" : "pH";
	size_t len = 0;
	for (int i = 0; i < e->n_ep && len < sizeof e->detail; i++) {
		const engine_endpoint_t *ep = &e->ep[i];
		const method_criterion_t *cr = &e->crits[ep->criterion - 1];
		char who[16];
		if (e->full.n_criteria > 0)
			snprintf(who, sizeof who, "detect[%d]", ep->criterion);
		else
			snprintf(who, sizeof who, "detect");
		int w;
		if (ep->fallback)
			w = snprintf(
			    e->detail + len, sizeof e->detail - len,
			    "%sendpoint %d by %s at its fallback %g %s, no inflection before it",
			    i ? "; " : "", ep->n, who, cr->fallback, u);
		else if (cr->kind == DETECT_TARGET)
			w = snprintf(e->detail + len, sizeof e->detail - len,
			             "%sendpoint %d by %s, target %g %s", i ? "; " : "", ep->n, who,
			             cr->target, u);
		else
			w = snprintf(e->detail + len, sizeof e->detail - len,
			             "%sendpoint %d by %s, %s", i ? "; " : "", ep->n, who,
			             method_detect_name(cr->kind));
		if (w < 0)
			break;
		len += (size_t)w;
	}
}

static void evaluate(engine_t *e)
{
	e->phase = "evaluating";
	endpoint_central_dpdv(e->pts, e->n_pts);
	int dir = run_dir(e);
	/* Each criterion in turn past the endpoint before it, on all the
	 * points; for one mapping this is one search over the whole run. */
	bool all_inflection = true;
	double from_ml = 0;
	e->n_ep = 0;
	method_t *view = malloc(sizeof *view);
	for (int ci = 0; view && ci < e->n_crit; ci++) {
		method_for_criterion(&e->full, &e->crits[ci], view);
		int want = e->crits[ci].count;
		int k = seek(e, view, ci, from_ml, dir, true, e->ep + e->n_ep,
		             METHOD_MAX_ENDPOINTS - e->n_ep);
		if (k > want)
			k = want;
		for (int j = 0; j < k; j++) {
			e->ep[e->n_ep + j].n = e->n_ep + j + 1;
			if (e->ep[e->n_ep + j].fallback)
				all_inflection = false;
		}
		if (e->crits[ci].kind != DETECT_INFLECTION)
			all_inflection = false;
		e->n_ep += k;
		if (k < want)
			break;
		from_ml = e->ep[e->n_ep - 1].volume_ml;
	}
	free(view);
	if (all_inflection && e->n_ep > 0 && dir != 0) {
		double t_c = isfinite(e->pts[0].temperature_c) ? e->pts[0].temperature_c : 25.0;
		double k = chem_nernst_mv(t_c);
		modelfit_ctx_t c = {
		    /* nominal molarity: the titer enters the formulas only, so the
		     * measured endpoint volume never depends on it */
		    .titrant_molar = e->m.titrant_molarity,
		    .dir = e->m.signal == SIGNAL_MV ? -dir : dir,
		    .start_volume_ml = e->p.start_volume_ml,
		    .pkw = chem_pkw(t_c),
		    .sig7 = 7.0, /* signal ph: the nominal pH is the signal */
		    .sig_per_ph = 1.0,
		    .sigma_signal = endpoint_sigma_signal(&e->m),
		    .sigma_ml = e->quantum_ml,
		    /* a real beaker's electrode reads a(H+), and its activity
		     * coefficients move with the ionic strength (modelfit.c) */
		    .activity = true,
		    .temperature_c = t_c,
		};
		if (e->m.signal == SIGNAL_MV) {
			double slope = e->p.has_calibration ? e->p.cal_slope_pct : 100.0;
			c.sig7 = e->p.has_calibration ? e->p.cal_offset_mv : 0.0;
			c.sig_per_ph = -k * slope / 100.0;
		}
		modelfit_refine(&c, e->pts, e->n_pts, e->ep, e->n_ep);
	}
	/* Each endpoint is assessed under its own criterion: a target's u reads
	 * the curve at that criterion's target (a fallback's at its signal). */
	method_t *one = malloc(sizeof *one);
	for (int i = 0; i < e->n_ep; i++) {
		engine_endpoint_t *ep = &e->ep[i];
		int ci = ep->criterion >= 1 && ep->criterion <= e->n_crit ? ep->criterion - 1 : 0;
		if (!one) {
			endpoint_assess(&e->m, e->pts, e->n_pts, e->quantum_ml, ep, 1);
			continue;
		}
		method_for_criterion(&e->full, &e->crits[ci], one);
		if (ep->fallback) {
			one->has_target = true;
			one->target = e->crits[ci].fallback;
		}
		endpoint_assess(one, e->pts, e->n_pts, e->quantum_ml, ep, 1);
	}
	free(one);
	compute_results(e);
	judge(e);
	describe(e);
}

static engine_action_t stop(engine_t *e, engine_stop_t why)
{
	if (e->st == ST_DONE)
		return e->last;
	e->reason = why;
	evaluate(e);
	e->st = ST_DONE;
	engine_action_t a = act(e, ENGINE_ACT_STOP, e->t_s);
	a.reason = why;
	a.stir_on = false;
	e->last = a;
	return a;
}

static engine_action_t fault(engine_t *e, const char *code, const char *msg)
{
	snprintf(e->fault_code, sizeof e->fault_code, "%s", code ? code : "fault");
	snprintf(e->fault_msg, sizeof e->fault_msg, "%s", msg ? msg : "");
	return stop(e, ENGINE_STOP_FAULT);
}

/* ---- dosing ---- */

/* Local slope |dS/dV| predicted for the next addition, signal/mL; 0 unknown. */
static double predicted_slope(const engine_t *e)
{
	int n = e->n_pts;
	if (n < 2)
		return 0;
	const engine_point_t *a = &e->pts[n - 2], *b = &e->pts[n - 1];
	double dv = b->volume_ml - a->volume_ml;
	if (!(dv > 0))
		return 0;
	double s1 = fabs(b->signal - a->signal) / dv;
	if (n < 3)
		return s1;
	const engine_point_t *z = &e->pts[n - 3];
	double dv0 = a->volume_ml - z->volume_ml;
	if (!(dv0 > 0))
		return s1;
	double s0 = fabs(a->signal - z->signal) / dv0;
	/* Rising slope: the next interval is steeper still. Extrapolate by the
	 * last growth ratio (capped), so additions shrink before the jump, not
	 * after it. A falling slope is taken as it is: additions grow again
	 * past the inflection. */
	if (s0 > 0 && s1 > s0) {
		double g = s1 / s0;
		if (g > 4)
			g = 4;
		return s1 * g;
	}
	return s1;
}

/* Whole burette steps that fit in `room_ml` (never rounding up past it). */
static double steps_within(const engine_t *e, double room_ml)
{
	if (!(room_ml > 0))
		return 0;
	return floor(room_ml / e->quantum_ml + 1e-9) * e->quantum_ml;
}

/* Signal change per decade of the remaining volume near an acid-base
 * equivalence point: 1/ln 10 pH, or a Nernst slope over ln 10 in mV. */
static double decade_amp(const engine_t *e)
{
	return (e->m.signal == SIGNAL_MV ? chem_nernst_mv(25.0) : 1.0) / 2.302585092994046;
}

/* Addition for a signal change `aim` near a jump: the slope of a titration
 * curve before an equivalence point grows roughly as a/(Ve - V) (the
 * buffer term log(V/(Ve - V)) dominates there). Two slopes fix a and Ve;
 * the addition that changes the signal by aim under that law,
 * (Ve - V)(1 - exp(-aim/a)), can never step over the predicted Ve. Returns
 * INFINITY when the slopes do not rise (no jump ahead). */
static double hyperbolic_dose(const engine_t *e, double aim)
{
	int n = e->n_pts;
	if (n < 3)
		return INFINITY;
	const engine_point_t *z = &e->pts[n - 3], *a = &e->pts[n - 2], *b = &e->pts[n - 1];
	double dv0 = a->volume_ml - z->volume_ml, dv1 = b->volume_ml - a->volume_ml;
	if (!(dv0 > 0 && dv1 > 0))
		return INFINITY;
	double s0 = fabs(a->signal - z->signal) / dv0, s1 = fabs(b->signal - a->signal) / dv1;
	if (!(s1 > 1.05 * s0) || !(s0 > 0))
		return INFINITY;
	double smin = INFINITY;
	for (int i = 1; i < n; i++) {
		double dv = e->pts[i].volume_ml - e->pts[i - 1].volume_ml;
		if (dv > 0)
			smin = fmin(smin, fabs(e->pts[i].signal - e->pts[i - 1].signal) / dv);
	}
	/* For an inflection the law applies only once the slope has doubled
	 * from its lowest (a jump is coming); in the buffer region of a weak
	 * acid it would be needlessly timid. A target always obeys it. */
	if (e->m.detect != DETECT_TARGET && !(s1 >= 2.0 * smin))
		return INFINITY;
	double v0m = (a->volume_ml + z->volume_ml) / 2, v1m = (b->volume_ml + a->volume_ml) / 2;
	double ve = (s1 * v1m - s0 * v0m) / (s1 - s0);
	if (!(ve > b->volume_ml)) {
		/* The slope rose faster than the law allows: the last point is
		 * already on the jump. Near any acid-base equivalence point the
		 * signal moves at least one decade per decade of the remaining
		 * volume (amplitude 1/ln 10 pH, or a Nernst slope over ln 10 in
		 * mV), so the remaining volume is at most amp / slope, with the
		 * slope at the last point taken as the last secant grown once
		 * more by its growth ratio. Without this a jump can be crossed in
		 * one addition, leaving no point on it. */
		double amp = decade_amp(e);
		double sb = s1 * fmin(s1 / s0, 10.0);
		return amp / sb * (1.0 - exp(-aim / amp));
	}
	double amp = s1 * (ve - v1m);
	if (!(amp > 0))
		return INFINITY;
	double d = (ve - b->volume_ml) * (1.0 - exp(-aim / amp));
	return d > 0 ? d : INFINITY;
}

/* Guided mode, past the last endpoint: what is left up to the stop volume
 * only serves the evaluation (the model fit wants the curve beyond the jump,
 * and the points that confirmed the endpoint are already on it), so it goes
 * in one addition (bench: errors unchanged, one to two additions fewer). */
static double guided_after(const engine_t *e, double dose)
{
	if (!e->all_found || !isfinite(e->stop_after_ml))
		return dose;
	double left = e->stop_after_ml - e->dispensed_ml;
	if (!(left > 0))
		return dose;
	return fmax(dose, left);
}

/* The equivalence volume the last two points predict, mL, or NAN. Before an
 * equivalence point the signal moves at least one decade (decade_amp) per
 * decade of the remaining volume Ve - V; a weak acid's buffer term and the
 * dilution of a strong one only add to that. Taking all of the last rise as
 * that law, (Ve - V2) / (Ve - V1) = exp(-dS / amp), puts Ve no later than it
 * is: a safe aim for a large addition. */
static double predicted_ve(const engine_t *e, int dir)
{
	int n = e->n_pts;
	if (n < 2 || dir == 0)
		return NAN;
	const engine_point_t *a = &e->pts[n - 2], *b = &e->pts[n - 1];
	double dv = b->volume_ml - a->volume_ml, ds = (b->signal - a->signal) * dir;
	if (!(dv > 0) || !(ds > 0))
		return NAN;
	double r = exp(-ds / decade_amp(e));
	double ve = (b->volume_ml - r * a->volume_ml) / (1.0 - r);
	return ve > b->volume_ml ? ve : NAN;
}

/* The equivalence volume the last three points predict, mL, or NAN. Before
 * an equivalence point both a weak acid (pH = pKa + log(V/(Ve - V))) and a
 * strong one (pH = -log((Ve - V) c/(V0 + V))) follow
 * S = p + amp ln(V + b) - amp ln(Ve - V), with b = 0 and b = V0 (the
 * beaker's start volume). For each b from 0 to 2 V0 the last two points
 * fix Ve; the b whose curve also passes the third point from the end (within
 * a tenth of the rise) wins; the points are the first n of the run (the
latest, or those before a point to be judged). NAN when none does:
predicted_ve() stands. */
static double predicted_ve3(const engine_t *e, int dir, int n)
{
	if (n < 3 || dir == 0)
		return NAN;
	const engine_point_t *a = &e->pts[n - 3], *b = &e->pts[n - 2], *c = &e->pts[n - 1];
	double amp = decade_amp(e);
	double dsab = (b->signal - a->signal) * dir, dsbc = (c->signal - b->signal) * dir;
	if (!(dsab > 0) || !(dsbc > 0) || !(b->volume_ml > a->volume_ml) ||
	    !(c->volume_ml > b->volume_ml))
		return NAN;
	double best_ve = NAN, best_miss = INFINITY;
	for (int k = 0; k <= 24; k++) {
		double off = k == 0 ? 0 : 2 * e->p.start_volume_ml * pow(2.0, k - 24);
		double r = (c->volume_ml + off) / (b->volume_ml + off) * exp(-dsbc / amp);
		if (!(r < 1))
			continue;
		double ve = (c->volume_ml - r * b->volume_ml) / (1 - r);
		if (!(ve > c->volume_ml) || !(a->volume_ml + off > 0))
			continue;
		double pred = amp * (log((b->volume_ml + off) / (a->volume_ml + off)) -
		                     log((ve - b->volume_ml) / (ve - a->volume_ml)));
		double miss = fabs(pred - dsab);
		if (miss < best_miss) {
			best_miss = miss;
			best_ve = ve;
		}
	}
	return best_miss <= 0.1 * dsab ? best_ve : NAN;
}

/* True once the slopes have risen to twice their lowest: a jump is near or
 * under way, and additions must not grow fast. */
static bool jump_seen(const engine_t *e)
{
	double smin = INFINITY, smax = 0;
	for (int i = 1; i < e->n_pts; i++) {
		double dv = e->pts[i].volume_ml - e->pts[i - 1].volume_ml;
		if (!(dv > 0))
			continue;
		double sl = fabs(e->pts[i].signal - e->pts[i - 1].signal) / dv;
		smin = fmin(smin, sl);
		smax = fmax(smax, sl);
	}
	return smax >= 2 * smin;
}

/* Guided: whether the last point lies past the jump of the last endpoint
 * the method asks for, so the points already resolve its inflection and the
 * one addition of past_endpoint_ml can confirm it (the derivative falls
 * behind the peak over that addition) instead of a point just past the jump
 * and then that addition. It does when the equivalence volume the three
 * points before the last predict lies between the last two, nearer the one
 * before (the last addition crossed it), and the last addition moved the
 * signal by at least half of min_jump and more than the one before (it was
 * on the jump). Inflections only: a target is read where it is, and Gran's
 * line wants no more than the derivative's endpoint. */
static bool past_last_jump(const engine_t *e)
{
	const method_t *m = &e->m;
	int n = e->n_pts, dir = run_dir(e);
	if (m->detect != DETECT_INFLECTION || e->crit != e->n_crit - 1 || n < 5 || dir == 0 ||
	    !(m->past_endpoint_ml > 0))
		return false;
	if (e->n_ep - e->n_done != e->crits[e->crit].count - 1)
		return false;
	const engine_point_t *a = &e->pts[n - 3], *b = &e->pts[n - 2], *c = &e->pts[n - 1];
	double rise = (c->signal - b->signal) * dir, before = (b->signal - a->signal) * dir;
	if (!(rise >= m->min_jump / 2) || !(rise > before))
		return false;
	double ve = predicted_ve3(e, dir, n - 1);
	if (!(isfinite(ve) && ve > b->volume_ml && c->volume_ml - ve > ve - b->volume_ml))
		return false;
	/* ... and the jump is resolved already: three points within two
	 * decades (2 pH, 2 Nernst slopes) of the middle of the last rise. */
	double mid = (b->signal + c->signal) / 2, band = 2 * M_LN10 * decade_amp(e);
	int on_jump = 0;
	for (int i = 0; i < n; i++)
		on_jump += fabs(e->pts[i].signal - mid) <= band;
	return on_jump >= 3;
}

/* Guided: the share of the way to the predicted equivalence point one
 * addition covers. */
#define PLAN_SHARE 0.9

static double next_dose_ml(const engine_t *e)
{
	const method_t *m = &e->m;
	double dose;
	int n = e->n_pts;
	bool guided = m->dosing == DOSING_GUIDED;
	bool past = guided && past_last_jump(e);
	if (m->dosing == DOSING_CONSTANT) {
		dose = m->dose_ml;
	} else {
		double lo = m->dose_min_ml, hi = m->dose_max_ml;
		double aim = m->step_aim;
		/* Guided: never aim at more than a decade of the remaining volume
		 * per addition, so the hyperbolic law below keeps at least one
		 * point in each e-fold of the approach to the predicted
		 * equivalence point, whatever step_aim says. */
		if (guided && aim > decade_amp(e))
			aim = decade_amp(e);
		if (m->detect == DETECT_TARGET && m->has_target && n >= 1) {
			int dir = run_dir(e);
			double left = (m->target - e->pts[n - 1].signal) * (dir ? dir : 1);
			/* Approach the target in shrinking steps: aim at 60 % of the
			 * remaining distance, so the last points bracket it closely. */
			if (left > 0 && 0.6 * left < aim)
				aim = 0.6 * left;
		}
		double slope = predicted_slope(e);
		if (n < 2 || !(slope > 0))
			dose = sqrt(lo * hi);
		else
			dose = aim / slope;
		/* Before a jump the addition also obeys the hyperbolic law, which
		 * never steps past the coming equivalence point: a target must not
		 * be overshot, and an inflection needs points on its steep part
		 * for the derivative (the model fit gains from them too). */
		dose = fmin(dose, hyperbolic_dose(e, aim));
		if (guided) {
			/* Guided: far from the predicted equivalence point, cover
			 * PLAN_SHARE of the way to it at once (the prediction errs
			 * early, so the next point is still before it); where the
			 * rules above allow more, they hold. A target is never
			 * approached faster than the rules above allow. */
			double ve = predicted_ve3(e, run_dir(e), n);
			if (!isfinite(ve))
				ve = predicted_ve(e, run_dir(e));
			if (!e->all_found && isfinite(ve)) {
				double plan = PLAN_SHARE * (ve - e->pts[n - 1].volume_ml);
				dose = m->detect == DETECT_TARGET ? fmin(dose, plan)
				                                  : fmax(dose, plan);
			}
			if (past)
				dose = fmax(dose, m->past_endpoint_ml);
			dose = guided_after(e, dose);
		}
		/* Never more than three times the last addition: a flat stretch
		 * read through noise must not launch a jump over the endpoint.
		 * Guided: eight times while no slope has yet risen (the first
		 * additions reach full size at once), and no limit past the last
		 * endpoint or past the last jump (only the stop volume is
		 * ahead). */
		if (n >= 2 && !(guided && e->all_found) && !past) {
			double last = e->pts[n - 1].volume_ml - e->pts[n - 2].volume_ml;
			double grow = guided && !jump_seen(e) ? 8 : 3;
			if (last > 0 && dose > grow * last)
				dose = grow * last;
		}
		if (dose < lo)
			dose = lo;
		if (dose > hi)
			dose = hi;
	}
	/* Size the last additions so the limits are met exactly, not crossed:
	 * whole burette steps only, rounded down where a limit is near. */
	double room = e->vmax_ml - e->dispensed_ml;
	if (e->all_found && e->stop_after_ml - e->dispensed_ml < room)
		room = e->stop_after_ml - e->dispensed_ml;
	if (dose > e->p.burette_capacity_ml)
		dose = e->p.burette_capacity_ml;
	double q = quantize(e, dose);
	if (q < e->quantum_ml)
		q = e->quantum_ml;
	double fit = steps_within(e, room);
	if (q > fit)
		q = fit;
	return q;
}

static engine_action_t begin_settle(engine_t *e)
{
	e->st = ST_SETTLE;
	e->phase = "settling";
	e->settle_from_s = e->t_s;
	e->n_win = 0;
	return act(e, ENGINE_ACT_READ, e->t_s);
}

static engine_action_t request_dose(engine_t *e, double ml)
{
	e->pending_ml = ml;
	e->phase = "dosing";
	if (ml > e->content_ml + 1e-9) {
		e->st = ST_REFILL;
		return act(e, ENGINE_ACT_REFILL, e->t_s);
	}
	e->st = ST_DOSE;
	engine_action_t a = act(e, ENGINE_ACT_DOSE, e->t_s);
	a.dose_ml = ml;
	return a;
}

/* The predose goes in at once, in syringe-sized pieces with refills between
 * them when it is larger than the burette, without settling in between. */
static engine_action_t predose_chunk(engine_t *e)
{
	double ml = fmin(e->predose_left_ml, e->p.burette_capacity_ml);
	ml = steps_within(e, ml);
	e->predose_left_ml -= ml;
	if (e->predose_left_ml < e->quantum_ml)
		e->predose_left_ml = 0;
	return request_dose(e, ml);
}

/* After a point is accepted: endpoints, stops, then the next addition. */
static engine_action_t after_point(engine_t *e)
{
	const method_t *m = &e->m;
	const engine_point_t *last = &e->pts[e->n_pts - 1];

	int dir = run_dir(e);
	/* The criteria in turn: each sought past the endpoint before it; one
	 * point may meet several (a large addition across two targets). */
	while (!e->all_found) {
		int want = e->crits[e->crit].count;
		int k = seek(e, m, e->crit, e->seg_from_ml, dir, false, e->ep + e->n_done,
		             METHOD_MAX_ENDPOINTS - e->n_done);
		for (int j = 0; j < k; j++)
			e->ep[e->n_done + j].n = e->n_done + j + 1;
		e->n_ep = e->n_done + k;
		/* A target must hold: a point that reached it without settling
		 * is read again at the same volume before it counts (a fallback
		 * signal is a target too). */
		bool at_target = k > 0 && (m->detect == DETECT_TARGET || e->ep[e->n_done].fallback);
		if (at_target && !last->settled && !e->target_recheck) {
			e->target_recheck = true;
			e->n_ep = e->n_done;
			return begin_settle(e);
		}
		if (k < want)
			break;
		e->n_done += want;
		e->seg_from_ml = e->ep[e->n_done - 1].volume_ml;
		if (++e->crit >= e->n_crit) {
			e->all_found = true;
			e->stop_after_ml = e->ep[e->n_done - 1].volume_ml + m->past_endpoint_ml;
			/* That addition already went past_endpoint_ml beyond a
			 * point past the jump, and the endpoint lies before
			 * that point (else the jump went on: the rule above). */
			if (e->past_from_ml > 0 &&
			    e->ep[e->n_done - 1].volume_ml <= e->past_from_ml)
				e->stop_after_ml =
				    fmin(e->stop_after_ml, e->past_from_ml + m->past_endpoint_ml);
		} else {
			/* the next criterion: dosing and the checks now see it */
			method_for_criterion(&e->full, &e->crits[e->crit], &e->m);
			e->target_recheck = false;
		}
	}
	if (e->all_found && steps_within(e, e->stop_after_ml - last->volume_ml) < e->quantum_ml)
		return stop(e, ENGINE_STOP_ENDPOINTS);
	if (m->has_signal_limit && e->n_pts >= 2) {
		double s0 = e->pts[0].signal, lim = m->signal_limit;
		if ((s0 < lim && last->signal >= lim) || (s0 > lim && last->signal <= lim))
			return stop(e, ENGINE_STOP_SIGNAL_LIMIT);
	}
	/* At the limit when not one more burette step fits under it. */
	if (steps_within(e, e->vmax_ml - e->dispensed_ml) < e->quantum_ml)
		return stop(e, ENGINE_STOP_VOLUME_MAX);
	if (e->n_pts >= ENGINE_MAX_POINTS)
		return fault(e, "too_many_points", "the run reached the engine's point limit");

	if (!e->predose_done) {
		e->predose_done = true;
		e->predose_left_ml =
		    fmin(quantize(e, m->initial_ml), steps_within(e, e->vmax_ml - e->dispensed_ml));
		if (e->predose_left_ml >= e->quantum_ml)
			return predose_chunk(e);
	}
	if (m->dosing == DOSING_GUIDED && past_last_jump(e))
		e->past_from_ml = last->volume_ml;
	return request_dose(e, next_dose_ml(e));
}

static bool push_point(engine_t *e, const engine_point_t *pt)
{
	if (e->n_pts == e->cap_pts) {
		int cap = e->cap_pts * 2;
		engine_point_t *np = realloc(e->pts, (size_t)cap * sizeof *np);
		if (!np)
			return false;
		e->pts = np;
		e->cap_pts = cap;
	}
	e->pts[e->n_pts++] = *pt;
	return true;
}

/* The smallest reading scatter the settling fit assumes: the meter's
 * resolution, 0.001 pH or 0.1 mV (common practice, docs/chemistry.md §10). */
static double signal_floor(const engine_t *e)
{
	return e->m.signal == SIGNAL_MV ? 0.1 : 0.001;
}

/* The readings' noise as pooled so far, never below the meter's
 * resolution; NAN before 10 degrees of freedom. */
static double pooled_noise(const engine_t *e)
{
	if (e->noise_dof < 10)
		return NAN;
	return fmax(signal_floor(e), sqrt(e->noise_sse / e->noise_dof));
}

/* The scatter a settling fit assumes at least: the pooled noise once it is
 * known, else the meter's resolution. */
static double assumed_noise(const engine_t *e)
{
	double noise = pooled_noise(e);
	return isfinite(noise) ? noise : signal_floor(e);
}

/* The settling fit of the readings since the addition (the latest FIT_MAX).
 * `learned`: over the time constants the run's points admit together once
 * they fix it; else over the full grid.
 * The scatter assumed is at least the noise seen so far. */
static settlefit_t settle_fit(const engine_t *e, bool learned)
{
	int nfit = e->n_win < FIT_MAX ? e->n_win : FIT_MAX, f0 = e->n_win - nfit;
	double noise = assumed_noise(e);
	bool known = learned && e->tau_lo_s > 0;
	return settlefit_fit(e->win_t + f0, e->win_s + f0, nfit, noise, known ? e->tau_lo_s : 0,
	                     known ? e->tau_hi_s : 0, true);
}

/* What a point's readings tell of the electrode's time constant, added to
 * what the earlier points told. The summed misfit, over the pooled noise
 * variance (the same electrode's noise on every point), is smooth in log
 * tau: a parabola through the least grid value and its neighbours gives the
 * best tau and the range within 4 of its least value (2 sigma), never
 * narrower than TAU_FLOOR_STEP grid steps either way. The run's time
 * constant counts as fixed once that range spans at most a factor 4 and
 * stops short of the grid's slowest. */
#define TAU_FLOOR_STEP 0.1 /* 1.3 % */

static void note_tau(engine_t *e, const settlefit_t *fit)
{
	if (!fit->ok)
		return;
	int best = 0;
	for (int k = 0; k < SETTLEFIT_N_TAU; k++) {
		if (isfinite(fit->dsse[k]))
			e->tau_dsse[k] += fit->dsse[k];
		if (e->tau_dsse[k] < e->tau_dsse[best])
			best = k;
	}
	double sigma = pooled_noise(e);
	if (!isfinite(sigma) || best == 0 || best == SETTLEFIT_N_TAU - 1)
		return;
	double var = sigma * sigma;
	double cm = e->tau_dsse[best - 1] / var, c0 = e->tau_dsse[best] / var,
	       cp = e->tau_dsse[best + 1] / var;
	double curv = (cm + cp - 2 * c0) / 2; /* chi2 = c + curv (k - k*)^2 */
	if (!(curv > 0))
		return;
	double kstar = best + (cm - cp) / (4 * curv);
	double half_k = fmax(sqrt(4.0 / curv), TAU_FLOOR_STEP);
	double klo = kstar - half_k, khi = kstar + half_k;
	if (khi >= SETTLEFIT_N_TAU - 1 || settlefit_tau(khi) > 4 * settlefit_tau(klo))
		return;
	e->tau_lo_s = settlefit_tau(fmax(klo, 0));
	e->tau_hi_s = settlefit_tau(khi);
}

/* The noise check: the still rule accepts when the readings of still_for_s
 * lie within still_within; when the expected range of that many readings of
 * pure noise (d_n sigma, d_n the mean range of n normal deviates: Tippett
 * 1925, as tabled for control charts) exceeds the band, most windows fail and
 * points wait for wait_max_s. The noise is pooled over the points' settling
 * fits; reported once it rests on at least 10 degrees of freedom from 3
 * points. */
static double mean_range_of(int n)
{
	static const double d[] = {0,     0,     1.128, 1.693, 2.059, 2.326, 2.534,
	                           2.704, 2.847, 2.970, 3.078, 3.173, 3.258};
	if (n < 2)
		return 1.128; /* a still_for_s of 0 still compares two readings */
	return n < (int)(sizeof d / sizeof d[0]) ? d[n] : d[sizeof d / sizeof d[0] - 1];
}

static void note_noise(engine_t *e, const settlefit_t *fit)
{
	if (!fit->ok || !(fit->dof > 0) || !isfinite(fit->sse))
		return;
	e->noise_sse += fit->sse;
	e->noise_dof += fit->dof;
	e->noise_pts++;
	double sigma = sqrt(e->noise_sse / e->noise_dof);
	int n_still = (int)floor(e->m.still_for_s / e->p.read_interval_s + 1e-9) + 1;
	double need = mean_range_of(n_still) * sigma;
	if (e->warn_code[0] || e->noise_pts < 3 || e->noise_dof < 10 || !(need > e->m.still_within))
		return;
	/* Under the still rule a band near the noise only costs a few extra
	 * readings; it is worth a warning once points really wait it out. */
	if (e->m.settle_rule == SETTLE_STILL && e->n_timed_out < 2)
		return;
	const char *u = e->m.signal == SIGNAL_MV ? "mV" : "pH";
	snprintf(e->warn_code, sizeof e->warn_code, "settle_below_noise");
	snprintf(e->warn_msg, sizeof e->warn_msg,
	         "settle.still_within %g %s is below the readings' noise (about %.2g %s RMS "
	         "over %d points): %s; widen still_within to %.2g %s or more",
	         e->m.still_within, u, sigma, u, e->noise_pts,
	         e->m.settle_rule == SETTLE_STILL
	             ? "points wait for settle.wait_max_s (or use settle.rule: extrapolate)"
	             : "each point needs many readings",
	         need, u);
}

/* The tolerance of the extrapolated settled value, signal units: the
 * method's band; in guided dosing on a large step (an inflection's jump) a
 * share STEP_SHARE of the step the point makes, when that is more. A point
 * on the steep part locates a volume through its step, not through its
 * level: an error of 2 % of the step moves it by about 2 % of its addition
 * along the curve, and the run's jump additions are its smallest. */
#define STEP_SHARE 0.03

static double extrap_tolerance(const engine_t *e, const settlefit_t *fit)
{
	double tol = e->m.still_within;
	if (e->m.dosing != DOSING_GUIDED || e->m.detect == DETECT_TARGET || e->n_pts < 1 ||
	    !fit->ok || !isfinite(fit->y_inf))
		return tol;
	double step = fabs(fit->y_inf - e->pts[e->n_pts - 1].signal);
	return fmax(tol, STEP_SHARE * step);
}

/* A reading while settling: accept a point when settled by the
 * method's rule, or at wait_max_s. */
static engine_action_t on_reading(engine_t *e, const engine_event_t *ev)
{
	const method_t *m = &e->m;
	double ph = ph_of(e, ev);
	double sig = signal_of(e, ev->mv, ph);
	if (!isfinite(ev->mv) || (m->signal == SIGNAL_PH && !isfinite(sig)))
		return fault(e, "bad_reading", "the probe gave a reading that is not a number");
	if (e->n_win == WIN_MAX) {
		memmove(e->win_t, e->win_t + 1, (WIN_MAX - 1) * sizeof(double));
		memmove(e->win_s, e->win_s + 1, (WIN_MAX - 1) * sizeof(double));
		memmove(e->win_mv, e->win_mv + 1, (WIN_MAX - 1) * sizeof(double));
		memmove(e->win_ph, e->win_ph + 1, (WIN_MAX - 1) * sizeof(double));
		memmove(e->win_tc, e->win_tc + 1, (WIN_MAX - 1) * sizeof(double));
		e->n_win--;
	}
	int w = e->n_win++;
	e->win_t[w] = ev->t_s;
	e->win_s[w] = sig;
	e->win_mv[w] = ev->mv;
	e->win_ph[w] = ph;
	e->win_tc[w] = isfinite(ev->temperature_c) ? ev->temperature_c : 25.0;

	double waited = ev->t_s - e->settle_from_s;
	bool accept = false, settled = false;
	int from = e->n_win - 1;
	int nfit = e->n_win < FIT_MAX ? e->n_win : FIT_MAX, f0 = e->n_win - nfit;
	settlefit_t fit = {.ok = false};
	/* The first point follows no addition: nothing to extrapolate, so it
	 * waits to be still. */
	bool extrap = m->settle_rule == SETTLE_EXTRAPOLATE && e->n_pts > 0, use_fit = false;
	if (waited >= m->wait_min_s) {
		if (extrap) {
			/* Extrapolate: the first-order fit of the readings since the
			 * addition fixes the settled value within the band; once
			 * the run's points have fixed the electrode's time
			 * constant, under that constant. */
			fit = settle_fit(e, true);
			double tol = extrap_tolerance(e, &fit);
			if (fit.ok && fit.half <= tol)
				accept = settled = use_fit = true;
			/* A large approach can fix its own settled value better
			 * than the run's range of tau allows: the readings' own
			 * interval (tau searched within a factor 2 of that range)
			 * counts as well. */
			if (!accept && e->tau_lo_s > 0 && e->n_win >= 6) {
				settlefit_t own = settlefit_fit(e->win_t + f0, e->win_s + f0, nfit,
				                                assumed_noise(e), e->tau_lo_s / 2,
				                                e->tau_hi_s * 2, false);
				if (own.ok && own.half <= extrap_tolerance(e, &own)) {
					fit = own;
					accept = settled = use_fit = true;
				}
			}
		} else {
			/* Still: the readings of the last still_for_s, which must
			 * reach back that far since the addition, lie within
			 * still_within. When still_for_s is not a whole number of
			 * reading intervals, the reading just before the window's
			 * start stands for its start. */
			double t0 = ev->t_s - m->still_for_s;
			while (from > 0 && e->win_t[from - 1] >= t0 - 1e-9)
				from--;
			if (from > 0 && e->win_t[from] > t0 + 1e-9)
				from--;
			bool covers = e->win_t[from] <= t0 + 1e-9 || m->still_for_s <= 0;
			if (covers) {
				double lo = INFINITY, hi = -INFINITY;
				for (int i = from; i < e->n_win; i++) {
					lo = fmin(lo, e->win_s[i]);
					hi = fmax(hi, e->win_s[i]);
				}
				if (hi - lo <= m->still_within)
					accept = settled = true;
			}
		}
		if (!accept && waited >= m->wait_max_s) {
			accept = true;
			from = e->n_win - 1;
			e->n_timed_out++;
		}
	}
	if (!accept)
		return act(e, ENGINE_ACT_READ, ev->t_s + e->p.read_interval_s);

	/* What the readings say of the electrode, for the next points. */
	settlefit_t wide = settle_fit(e, false);
	note_noise(e, &wide);
	note_tau(e, &wide);

	engine_point_t pt = {.t_s = ev->t_s, .volume_ml = e->dispensed_ml, .settled = settled};
	if (use_fit) {
		/* The point is the predicted settled value, each channel under
		 * the time constant the signal's fit found. */
		const double *t = e->win_t + f0;
		pt.signal = fit.y_inf;
		pt.mv = settlefit_at_tau(t, e->win_mv + f0, nfit, fit.tau_s);
		pt.ph = isfinite(e->win_ph[e->n_win - 1])
		            ? settlefit_at_tau(t, e->win_ph + f0, nfit, fit.tau_s)
		            : NAN;
		double st = 0;
		for (int i = f0; i < e->n_win; i++)
			st += e->win_tc[i];
		pt.temperature_c = st / nfit;
	} else {
		/* The point is the mean over the still window: it averages the
		 * noise of the readings that showed the signal had settled. */
		double sm = 0, sv = 0, sp = 0, st = 0;
		int cnt = 0;
		for (int i = from; i < e->n_win; i++, cnt++) {
			sm += e->win_s[i];
			sv += e->win_mv[i];
			sp += e->win_ph[i];
			st += e->win_tc[i];
		}
		pt.signal = sm / cnt;
		pt.mv = sv / cnt;
		pt.ph = sp / cnt;
		pt.temperature_c = st / cnt;
	}
	if (e->n_pts > 0) {
		const engine_point_t *prev = &e->pts[e->n_pts - 1];
		double dv = pt.volume_ml - prev->volume_ml;
		pt.dpdv = dv > 0 ? (pt.signal - prev->signal) / dv : 0.0;
	}
	if (!push_point(e, &pt))
		return fault(e, "out_of_memory", "no memory for another point");
	int idx = e->n_pts - 1;
	engine_action_t a = after_point(e);
	a.new_point = idx;
	if (e->st == ST_DONE)
		e->last.new_point = -1;
	return a;
}

engine_action_t engine_feed(engine_t *e, const engine_event_t *ev)
{
	if (e->st == ST_DONE)
		return e->last;
	if (!ev)
		return e->last;
	double t = ev->t_s;
	if (!isfinite(t))
		return fault(e, "bad_time", "an event came with a time that is not a number");
	if (t > e->t_s || e->st == ST_INIT)
		e->t_s = t;

	if (ev->kind == ENGINE_EV_ABORT)
		return stop(e, ENGINE_STOP_ABORTED);
	if (ev->kind == ENGINE_EV_FAULT)
		return fault(e, ev->code, ev->message);
	if (e->st != ST_INIT && e->t_s - e->t_start_s >= e->m.time_max_s && e->st != ST_DOSE &&
	    e->st != ST_REFILL)
		return stop(e, ENGINE_STOP_TIME_MAX);

	engine_action_t a = e->last;
	switch (e->st) {
	case ST_INIT:
		if (ev->kind != ENGINE_EV_START)
			return e->last;
		e->t_start_s = t;
		if (e->m.stir_s > 0) {
			e->st = ST_STIR;
			e->phase = "stirring";
			a = act(e, ENGINE_ACT_STIR, t + e->m.stir_s);
		} else {
			a = begin_settle(e);
		}
		break;
	case ST_STIR:
		if (ev->kind != ENGINE_EV_TICK && ev->kind != ENGINE_EV_READING)
			return e->last;
		if (t < e->last.until_t_s)
			return e->last;
		a = begin_settle(e);
		break;
	case ST_SETTLE:
		if (ev->kind != ENGINE_EV_READING)
			return e->last;
		a = on_reading(e, ev);
		break;
	case ST_REFILL:
		if (ev->kind != ENGINE_EV_REFILLED)
			return e->last;
		e->content_ml = e->p.burette_capacity_ml;
		e->refills++;
		a = request_dose(e, e->pending_ml);
		break;
	case ST_DOSE: {
		if (ev->kind != ENGINE_EV_DOSED)
			return e->last;
		double ml = ev->dosed_ml;
		if (!isfinite(ml) || ml < 0 || ml > e->pending_ml + e->quantum_ml + 1e-9) {
			char msg[160];
			snprintf(msg, sizeof msg, "the burette reported %g mL for a %g mL addition",
			         ml, e->pending_ml);
			return fault(e, "bad_dose", msg);
		}
		e->dispensed_ml += ml;
		e->content_ml -= ml;
		if (e->content_ml < 0)
			e->content_ml = 0;
		e->additions++;
		e->pending_ml = 0;
		if (e->t_s - e->t_start_s >= e->m.time_max_s)
			return stop(e, ENGINE_STOP_TIME_MAX);
		if (e->predose_left_ml > 0 && ml > 0)
			a = predose_chunk(e);
		else
			a = begin_settle(e);
		break;
	}
	case ST_DONE:
		return e->last;
	}
	if (e->st != ST_DONE) {
		e->last = a;
		e->last.new_point = -1; /* a repeat must not announce the point again */
	}
	return a;
}

/* ---- accessors ---- */

bool engine_done(const engine_t *e)
{
	return e->st == ST_DONE;
}

const char *engine_phase(const engine_t *e)
{
	return e->phase;
}

engine_stop_t engine_stop_reason(const engine_t *e)
{
	return e->reason;
}

const char *engine_fault_code(const engine_t *e)
{
	if (e->reason == ENGINE_STOP_FAULT)
		return e->fault_code;
	return e->st == ST_DONE ? e->eval_code : "";
}

const char *engine_stop_detail(const engine_t *e)
{
	return e->st == ST_DONE ? e->detail : "";
}

const char *engine_fault_message(const engine_t *e)
{
	if (e->reason == ENGINE_STOP_FAULT)
		return e->fault_msg;
	return e->st == ST_DONE ? e->eval_msg : "";
}

const char *engine_warning_code(const engine_t *e)
{
	return e->warn_code;
}

const char *engine_warning_message(const engine_t *e)
{
	return e->warn_msg;
}

engine_outcome_t engine_outcome(const engine_t *e)
{
	if (e->st != ST_DONE)
		return ENGINE_OUTCOME_NONE;
	if (e->reason == ENGINE_STOP_ABORTED)
		return ENGINE_OUTCOME_ABORTED;
	if (e->reason == ENGINE_STOP_FAULT || e->eval_code[0])
		return ENGINE_OUTCOME_FAILED;
	return ENGINE_OUTCOME_FINISHED;
}

const char *engine_outcome_name(engine_outcome_t o)
{
	switch (o) {
	case ENGINE_OUTCOME_FINISHED:
		return "finished";
	case ENGINE_OUTCOME_FAILED:
		return "failed";
	case ENGINE_OUTCOME_ABORTED:
		return "aborted";
	default:
		return "";
	}
}

bool engine_outcome_clean(const engine_t *e)
{
	if (engine_outcome(e) != ENGINE_OUTCOME_FINISHED)
		return false;
	for (int i = 0; i < e->n_res; i++)
		if (e->res[i].accept != ENGINE_ACCEPT_PASS &&
		    e->res[i].accept != ENGINE_ACCEPT_NONE)
			return false;
	return true;
}

int engine_n_points(const engine_t *e)
{
	return e->n_pts;
}

const engine_point_t *engine_point(const engine_t *e, int i)
{
	return i >= 0 && i < e->n_pts ? &e->pts[i] : NULL;
}

int engine_additions(const engine_t *e)
{
	return e->additions;
}

double engine_dispensed_ml(const engine_t *e)
{
	return e->dispensed_ml;
}

int engine_refills(const engine_t *e)
{
	return e->refills;
}

int engine_n_endpoints(const engine_t *e)
{
	return e->n_ep;
}

const engine_endpoint_t *engine_endpoint(const engine_t *e, int i)
{
	return i >= 0 && i < e->n_ep ? &e->ep[i] : NULL;
}

int engine_n_results(const engine_t *e)
{
	return e->n_res;
}

const engine_result_t *engine_result(const engine_t *e, int i)
{
	return i >= 0 && i < e->n_res ? &e->res[i] : NULL;
}

double engine_dose_quantum_ml(const engine_t *e)
{
	return e->quantum_ml;
}
