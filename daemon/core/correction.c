/* correction.c: see correction.h. */
#include "correction.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "formula.h"
#include "record.h"

static double num_or_nan(const json_t *o, const char *key)
{
	const json_t *v = json_object_get(o, key);
	return json_is_number(v) ? json_number_value(v) : NAN;
}

/* The old version's result of this name, or NULL. */
static const json_t *old_result(const json_t *record, const char *name)
{
	size_t i;
	const json_t *r;
	json_array_foreach(json_object_get(record, "results"), i, r)
	{
		const char *n = json_string_value(json_object_get(r, "name"));
		if (n && !strcmp(n, name))
			return r;
	}
	return NULL;
}

/* The limits verdict of a rounded value, as the engine words it. */
static const char *verdict(const method_result_t *mr, double v)
{
	if (mr->has_min && v < mr->accept_min)
		return "low";
	if (mr->has_max && v > mr->accept_max)
		return "high";
	return mr->has_min || mr->has_max ? "pass" : "none";
}

int correction_results(const method_t *m, const json_t *record, const correction_in_t *in,
                       json_t **out, char *why, size_t cap)
{
	formula_vars_t fv;
	unsigned adds = 0;
	size_t i;
	const json_t *ep;

	*out = NULL;
	for (int k = 0; k < FORMULA_MAX_ADD; k++)
		adds |=
		    1u << (FV_ADD_ML + k) | 1u << (FV_ADD_MOLARITY + k) | 1u << (FV_ADD_TITER + k);
	memset(&fv, 0, sizeof fv);
	json_array_foreach(json_object_get(record, "endpoints"), i, ep)
	{
		if (i >= FORMULA_MAX_END)
			break;
		double ml = num_or_nan(ep, "volume_ml"), ph = num_or_nan(ep, "ph"),
		       mv = num_or_nan(ep, "mv"), half = num_or_nan(ep, "half_ph");
		/* endN_ph is the endpoint's signal: pH, or mV for a mV method */
		double signal = m->signal == SIGNAL_MV ? mv : ph;
		if (isfinite(ml))
			formula_vars_set(&fv, (formula_var_t)(FV_END_ML + i), ml);
		if (isfinite(signal))
			formula_vars_set(&fv, (formula_var_t)(FV_END_PH + i), signal);
		if (isfinite(half))
			formula_vars_set(&fv, (formula_var_t)(FV_HALF_PH + i), half);
	}
	if (in->has_blank)
		formula_vars_set(&fv, FV_BLANK_ML, in->blank_ml);
	formula_vars_set(&fv, FV_TITRANT_MOLARITY, m->titrant_molarity);
	formula_vars_set(&fv, FV_TITER, in->titer);
	formula_vars_set(&fv, FV_AMOUNT, in->amount);

	json_t *arr = json_array();
	for (int k = 0; k < m->n_results && k < METHOD_MAX_RESULTS; k++) {
		const method_result_t *mr = &m->results[k];
		const json_t *old = old_result(record, mr->name);
		const char *old_accept = json_string_value(json_object_get(old, "accept"));
		const json_t *old_note = json_object_get(old, "note");
		double v = 0;
		char msg[160] = "";
		json_t *o;

		if (mr->formula.used & adds) {
			snprintf(why, cap,
			         "result %s reads a method addition (add1_ml, ...), whose volumes "
			         "the record does not keep: it cannot be corrected here",
			         mr->name);
			json_decref(arr);
			return -1;
		}
		o = json_pack("{s:s,s:s,s:b}", "name", mr->name, "unit", mr->unit, "fallback",
		              json_is_true(json_object_get(old, "fallback")));
		if (formula_eval(&mr->formula, &fv, &v, msg, sizeof msg) != FORMULA_OK ||
		    !isfinite(v)) {
			json_object_set_new(o, "value", json_null());
			json_object_set_new(o, "accept", json_string("missing"));
			json_object_set_new(o, "note", json_string(msg[0] ? msg : "no value"));
		} else {
			double scale = pow(10.0, mr->decimals), rv = round(v * scale) / scale;
			if (!isfinite(rv))
				rv = v;
			bool doubtful = old_accept && !strcmp(old_accept, "doubtful");
			json_object_set_new(o, "value", record_real_or_null(rv));
			json_object_set_new(o, "accept",
			                    json_string(doubtful ? "doubtful" : verdict(mr, rv)));
			if (doubtful && json_is_string(old_note))
				json_object_set(o, "note", (json_t *)old_note);
		}
		json_array_append_new(arr, o);
	}
	*out = arr;
	return 0;
}
