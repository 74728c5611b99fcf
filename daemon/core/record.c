/* record.c: the run record and its one JSON form (see record.h). */
#include "record.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

const char *const record_stop_codes[] = {
    "endpoints_found", "volume_max", "signal_limit", "time_max",
    "fault",           "aborted",    "interrupted",  NULL,
};

const char *record_stop_words(const char *code)
{
	static const char *const words[][2] = {
	    {"endpoints_found", "every endpoint the method asks for was found, and the volume past "
	                        "the last one was added"},
	    {"volume_max", "the method's or the vessel's maximum volume was reached"},
	    {"signal_limit", "the signal passed the method's signal_limit"},
	    {"time_max", "the method's time_max_s passed"},
	    {"fault", "a fault stopped the run"},
	    {"aborted", "an operator aborted the run or halted the station"},
	    {"interrupted", "the daemon stopped during the run"},
	};
	for (size_t i = 0; code && i < sizeof words / sizeof words[0]; i++)
		if (!strcmp(code, words[i][0]))
			return words[i][1];
	return code ? code : "";
}

void record_init(run_record_t *r)
{
	memset(r, 0, sizeof *r);
	snprintf(r->state, sizeof r->state, "queued");
	r->sample.amount = NAN;
	r->titrant.molarity = NAN;
	r->titrant.titer = 1.0;
	r->titrant.blank_ml = NAN;
	r->dispensed_ml = 0;
	r->duration_s = NAN;
}

void record_set_weighing(run_record_t *r, double value, const char *unit, const char *source)
{
	if (!(value > 0))
		return;
	r->weighing.value = value;
	snprintf(r->weighing.unit, sizeof r->weighing.unit, "%s", unit);
	snprintf(r->weighing.source, sizeof r->weighing.source, "%s", source);
}

void record_set_method(run_record_t *r, const method_t *m)
{
	snprintf(r->method.id, sizeof r->method.id, "%s", m->id);
	r->method.revision = m->revision;
	snprintf(r->method.sha256, sizeof r->method.sha256, "%s", m->sha256);
	snprintf(r->titrant.name, sizeof r->titrant.name, "%s", m->titrant_name);
	r->titrant.molarity = m->titrant_molarity;
	snprintf(r->sample.unit, sizeof r->sample.unit, "%s", method_unit_name(m->sample_unit));
}

void record_add_fault(run_record_t *r, const char *at, const char *code, const char *message)
{
	if (r->n_faults >= RECORD_MAX_FAULTS)
		return;
	record_fault_t *f = &r->faults[r->n_faults++];
	snprintf(f->at, sizeof f->at, "%s", at ? at : "");
	snprintf(f->code, sizeof f->code, "%s", code ? code : "");
	snprintf(f->message, sizeof f->message, "%s", message ? message : "");
}

/* Append a fault unless one with the same code is already listed. */
static void add_fault_once(run_record_t *r, const char *at, const char *code, const char *message)
{
	for (int i = 0; i < r->n_faults; i++)
		if (!strcmp(r->faults[i].code, code))
			return;
	record_add_fault(r, at, code, message);
}

void record_fill_from_engine(run_record_t *r, const engine_t *e, const char *at)
{
	r->n_endpoints = 0;
	for (int i = 0; i < engine_n_endpoints(e) && i < METHOD_MAX_ENDPOINTS; i++) {
		const engine_endpoint_t *ep = engine_endpoint(e, i);
		record_endpoint_t *o = &r->endpoints[r->n_endpoints++];
		o->n = ep->n;
		o->volume_ml = ep->volume_ml;
		o->u_volume_ml = ep->u_volume_ml;
		o->ph = ep->ph;
		o->mv = ep->mv;
		o->half_ph = ep->half_ph;
		snprintf(o->how, sizeof o->how, "%s", ep->how ? ep->how : "");
		o->derivative_ml = ep->deriv_ml;
		o->model_ml = ep->model_ml;
		o->criterion = ep->criterion > 0 ? ep->criterion : 1;
		o->fallback = ep->fallback;
		snprintf(o->doubt, sizeof o->doubt, "%s", ep->doubt);
	}
	r->n_results = 0;
	for (int i = 0; i < engine_n_results(e) && i < METHOD_MAX_RESULTS; i++) {
		const engine_result_t *er = engine_result(e, i);
		record_result_t *o = &r->results[r->n_results++];
		snprintf(o->name, sizeof o->name, "%s", er->name);
		o->has_value = er->has_value;
		o->value = er->value;
		o->decimals = er->decimals;
		snprintf(o->unit, sizeof o->unit, "%s", er->unit);
		snprintf(o->accept, sizeof o->accept, "%s", engine_accept_name(er->accept));
		snprintf(o->note, sizeof o->note, "%s", er->note);
		o->fallback = er->from_fallback;
	}
	r->additions = engine_additions(e);
	r->dispensed_ml = engine_dispensed_ml(e);
	/* A warning that did not stop the run (the settling band below the
	 * readings' noise) is listed with the faults, once, as soon as it is
	 * known: it says why the run took so long or its points are unsettled. */
	const char *warn = engine_warning_code(e);
	if (warn[0])
		add_fault_once(r, at, warn, engine_warning_message(e));
	if (engine_done(e)) {
		r->phase[0] = '\0';
		snprintf(r->stop_reason, sizeof r->stop_reason, "%s",
		         engine_stop_name(engine_stop_reason(e)));
		const char *code = engine_fault_code(e);
		if (code && code[0] && engine_stop_reason(e) == ENGINE_STOP_FAULT)
			snprintf(r->stop_detail, sizeof r->stop_detail, "%s",
			         engine_fault_message(e));
		else if (engine_stop_detail(e)[0])
			/* a detect list or a fallback: which criterion gave which endpoint */
			snprintf(r->stop_detail, sizeof r->stop_detail, "%s (%s)",
			         record_stop_words(r->stop_reason), engine_stop_detail(e));
		else
			snprintf(r->stop_detail, sizeof r->stop_detail, "%s",
			         record_stop_words(r->stop_reason));
		if (code && code[0])
			add_fault_once(r, at, code, engine_fault_message(e));
	} else {
		snprintf(r->phase, sizeof r->phase, "%s", engine_phase(e));
		r->stop_reason[0] = '\0';
		r->stop_detail[0] = '\0';
	}
}

json_t *record_real_or_null(double v)
{
	return isfinite(v) ? json_real(v) : json_null();
}

static json_t *str_or_null(const char *s)
{
	return s && s[0] ? json_string(s) : json_null();
}

/* Set a key from a new reference; a NULL (out of memory) marks failure. */
static json_t *id_or_null(long long id)
{
	return id > 0 ? json_integer(id) : json_null();
}

static void put(json_t *o, const char *k, json_t *v, bool *ok)
{
	if (!v || json_object_set_new(o, k, v) < 0)
		*ok = false;
}

/* A value rounded to the result's decimals prints as written: round it again
 * here so binary noise (0.30000000000000004) never reaches the JSON. */
static json_t *result_value(const record_result_t *rr)
{
	if (!rr->has_value || !isfinite(rr->value))
		return json_null();
	double scale = pow(10.0, rr->decimals);
	double v = round(rr->value * scale) / scale;
	return json_real(isfinite(v) ? v : rr->value);
}

json_t *record_to_json(const run_record_t *r)
{
	bool ok = true;
	json_t *o = json_object();
	if (!o)
		return NULL;
	put(o, "id", r->id > 0 ? json_integer(r->id) : json_null(), &ok);
	put(o, "station", str_or_null(r->station), &ok);

	json_t *m = json_object();
	if (m) {
		put(m, "id", json_string(r->method.id), &ok);
		put(m, "revision", json_integer(r->method.revision), &ok);
		put(m, "sha256", str_or_null(r->method.sha256), &ok);
	}
	put(o, "method", m, &ok);

	json_t *s = json_object();
	if (s) {
		put(s, "id", str_or_null(r->sample.id), &ok);
		put(s, "amount", record_real_or_null(r->sample.amount), &ok);
		put(s, "unit", str_or_null(r->sample.unit), &ok);
	}
	put(o, "sample", s, &ok);

	put(o, "state", json_string(r->state), &ok);
	put(o, "phase", str_or_null(r->phase), &ok);
	put(o, "queued_at", str_or_null(r->queued_at), &ok);
	put(o, "started_at", str_or_null(r->started_at), &ok);
	put(o, "ended_at", str_or_null(r->ended_at), &ok);
	put(o, "requested_by", str_or_null(r->requested_by), &ok);
	put(o, "series", r->series_id > 0 ? json_integer(r->series_id) : json_null(), &ok);
	put(o, "weighing",
	    r->weighing.value > 0 ? json_pack("{s:f,s:s,s:s}", "value", r->weighing.value, "unit",
	                                      r->weighing.unit, "source", r->weighing.source)
	                          : json_null(),
	    &ok);

	json_t *t = json_object();
	if (t) {
		put(t, "name", json_string(r->titrant.name), &ok);
		put(t, "molarity", record_real_or_null(r->titrant.molarity), &ok);
		put(t, "titer", record_real_or_null(r->titrant.titer), &ok);
		put(t, "titer_at", str_or_null(r->titrant.titer_at), &ok);
		put(t, "titer_run_id", id_or_null(r->titrant.titer_run_id), &ok);
		put(t, "titer_source", str_or_null(r->titrant.titer_source), &ok);
		put(t, "titer_valid_until", str_or_null(r->titrant.titer_valid_until), &ok);
		put(t, "titer_reason", str_or_null(r->titrant.titer_reason), &ok);
		put(t, "titer_by", str_or_null(r->titrant.titer_by), &ok);
		put(t, "blank_ml", record_real_or_null(r->titrant.blank_ml), &ok);
		put(t, "blank_at", str_or_null(r->titrant.blank_at), &ok);
		put(t, "blank_run_id", id_or_null(r->titrant.blank_run_id), &ok);
		put(t, "blank_source", str_or_null(r->titrant.blank_source), &ok);
		put(t, "blank_valid_until", str_or_null(r->titrant.blank_valid_until), &ok);
	}
	put(o, "titrant", t, &ok);

	if (r->has_calibration) {
		json_t *c = json_object();
		if (c) {
			put(c, "id", id_or_null(r->calibration.id), &ok);
			put(c, "slope_pct", record_real_or_null(r->calibration.slope_pct), &ok);
			put(c, "offset_mv", record_real_or_null(r->calibration.offset_mv), &ok);
			put(c, "at", str_or_null(r->calibration.at), &ok);
		}
		put(o, "calibration", c, &ok);
	} else {
		put(o, "calibration", json_null(), &ok);
	}

	json_t *eps = json_array();
	for (int i = 0; eps && i < r->n_endpoints; i++) {
		const record_endpoint_t *ep = &r->endpoints[i];
		json_t *e = json_object();
		if (!e) {
			ok = false;
			break;
		}
		put(e, "n", json_integer(ep->n), &ok);
		put(e, "volume_ml", record_real_or_null(ep->volume_ml), &ok);
		put(e, "u_volume_ml", record_real_or_null(ep->u_volume_ml), &ok);
		put(e, "ph", record_real_or_null(ep->ph), &ok);
		put(e, "mv", record_real_or_null(ep->mv), &ok);
		put(e, "half_ph", record_real_or_null(ep->half_ph), &ok);
		put(e, "how", str_or_null(ep->how), &ok);
		put(e, "derivative_ml", record_real_or_null(ep->derivative_ml), &ok);
		put(e, "model_ml", record_real_or_null(ep->model_ml), &ok);
		put(e, "criterion", json_integer(ep->criterion > 0 ? ep->criterion : 1), &ok);
		put(e, "fallback", json_boolean(ep->fallback), &ok);
		put(e, "doubt", str_or_null(ep->doubt), &ok);
		if (json_array_append_new(eps, e) < 0)
			ok = false;
	}
	put(o, "endpoints", eps, &ok);

	json_t *res = json_array();
	for (int i = 0; res && i < r->n_results; i++) {
		const record_result_t *rr = &r->results[i];
		json_t *e = json_object();
		if (!e) {
			ok = false;
			break;
		}
		put(e, "name", json_string(rr->name), &ok);
		put(e, "value", result_value(rr), &ok);
		put(e, "unit", json_string(rr->unit), &ok);
		put(e, "accept", json_string(rr->accept[0] ? rr->accept : "none"), &ok);
		put(e, "fallback", json_boolean(rr->fallback), &ok);
		if (rr->note[0])
			put(e, "note", json_string(rr->note), &ok);
		if (json_array_append_new(res, e) < 0)
			ok = false;
	}
	put(o, "results", res, &ok);

	put(o, "additions", json_integer(r->additions), &ok);
	put(o, "dispensed_ml", record_real_or_null(r->dispensed_ml), &ok);
	put(o, "stop_reason", str_or_null(r->stop_reason), &ok);
	put(o, "stop_detail", str_or_null(r->stop_detail), &ok);

	json_t *fl = json_array();
	for (int i = 0; fl && i < r->n_faults; i++) {
		const record_fault_t *f = &r->faults[i];
		json_t *e = json_object();
		if (!e) {
			ok = false;
			break;
		}
		put(e, "at", str_or_null(f->at), &ok);
		put(e, "code", json_string(f->code), &ok);
		put(e, "message", json_string(f->message), &ok);
		if (json_array_append_new(fl, e) < 0)
			ok = false;
	}
	put(o, "faults", fl, &ok);
	if (r->has_duration)
		put(o, "duration_s", record_real_or_null(r->duration_s), &ok);

	if (!ok) {
		json_decref(o);
		return NULL;
	}
	return o;
}

json_t *record_point_to_json(const engine_point_t *p)
{
	bool ok = true;
	json_t *o = json_object();
	if (!o)
		return NULL;
	put(o, "t_s", record_real_or_null(p->t_s), &ok);
	put(o, "volume_ml", record_real_or_null(p->volume_ml), &ok);
	put(o, "mv", record_real_or_null(p->mv), &ok);
	put(o, "ph", record_real_or_null(p->ph), &ok);
	put(o, "temperature_c", record_real_or_null(p->temperature_c), &ok);
	put(o, "settled", json_boolean(p->settled), &ok);
	put(o, "dpdv", record_real_or_null(p->dpdv), &ok);
	if (!ok) {
		json_decref(o);
		return NULL;
	}
	return o;
}
