/* test_engine_more.c: target and Gran endpoints, a textbook curve, results,
 * the run record's JSON, and a property test over random scenarios and
 * methods. */
#include <jansson.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "chem.h"
#include "scenario.h"
#include "engine.h"
#include "fixtures.h"
#include "harness.h"
#include "method.h"
#include "record.h"
#include "simrun.h"

#define HEAD                                                                                       \
	"method: test-method\ntitle: t\nrevision: 1\npurpose: assay\n"                             \
	"titrant: {name: NaOH, molarity: 0.1000}\n"                                                \
	"sample: {unit: mL, min: 1.0, max: 60.0}\nsignal: ph\n"                                    \
	"start: {stir_s: 5, initial_ml: 0.0}\n"                                                    \
	"settle: {wait_min_s: 1, wait_max_s: 20, still_within: 0.02, still_for_s: 2}\n"

#define VINEGAR                                                                                    \
	"temperature_c: 25\nsample_ml: 10.0\nwater_ml: 40.0\n"                                     \
	"sample:\n  - {name: acetic acid, molar: 0.1000, pka: [4.76]}\n"                           \
	"titrant:\n  - {name: sodium hydroxide, molar: 0.1000, strong: base}\n"                    \
	"electrode: {offset_mv: 0.0, slope_pct: 100.0, tau_s: 1.5, noise_mv: 0.15, "               \
	"drift_mv_per_min: 0.0}\nburette: {capacity_ml: 20.0, steps: 40000}\n"

/* Target: to pH 8.20 (the wine-acidity endpoint of Iland et al. 2000,
 * docs/chemistry.md §8). The reference is the model's own volume at pH 8.20,
 * found by bisection on the equilibrium curve. The additions shrink towards
 * the target (dose_min 0.005 mL), and the volume is interpolated between the
 * points either side, so it is good to about one smallest addition. */
TEST(engine_target_endpoint)
{
	method_t m;
	chem_scenario_t s;
	REQUIRE(fixture_method(
	    HEAD "dosing: {mode: adaptive, step_aim: 0.5, dose_min_ml: 0.005, "
	         "dose_max_ml: 1.0}\n"
	         "detect: {kind: target, target: 8.20}\n"
	         "stop: {past_endpoint_ml: 0.0, volume_max_ml: 20, time_max_s: 3600}\n",
	    &m));
	REQUIRE(fixture_scenario(VINEGAR, &s));
	double lo = 5, hi = 10.5;
	for (int i = 0; i < 60; i++) {
		double mid = (lo + hi) / 2;
		if (chem_ph(&s, mid) < 8.20)
			lo = mid;
		else
			hi = mid;
	}
	simrun_opts_t o = {.seed = 21, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e && engine_n_endpoints(e) == 1);
	CHECK_STR(engine_endpoint(e, 0)->how, "target");
	CHECK_NEAR(engine_endpoint(e, 0)->volume_ml, lo, 0.005);
	CHECK_NEAR(engine_endpoint(e, 0)->signal, 8.20, 1e-9);
	CHECK_INT(engine_stop_reason(e), ENGINE_STOP_ENDPOINTS);
	/* Shrinking additions: the last one is among the smallest. */
	int n = engine_n_points(e);
	double last = engine_point(e, n - 1)->volume_ml - engine_point(e, n - 2)->volume_ml;
	CHECK(last <= 0.05);
	engine_free(e);
}

/* Gran (Gran 1952; docs/chemistry.md §9): V 10^-pH against V is a straight line
 * before the endpoint whose x-intercept is the equivalence volume, 10.000
 * mL here. The line is straight only where activity coefficients stay
 * constant (Gran titrations keep a constant ionic medium): with Davies
 * activities at the rising ionic strength of this beaker it bends and the
 * intercept moves by ~0.9 %, so this checks the method on ideal solutions,
 * as the textbook form assumes. 0.02 mL (0.2 %): the lagging electrode reads
 * each settled point a little low. */
TEST(engine_gran_endpoint)
{
	method_t m;
	chem_scenario_t s;
	REQUIRE(fixture_method(
	    HEAD "dosing: {mode: adaptive, step_aim: 0.3, dose_min_ml: 0.02, "
	         "dose_max_ml: 0.5}\n"
	         "detect: {kind: gran, count: 1}\n"
	         "stop: {past_endpoint_ml: 0.5, volume_max_ml: 20, time_max_s: 3600}\n",
	    &m));
	REQUIRE(fixture_scenario("activity: ideal\n" VINEGAR, &s));
	simrun_opts_t o = {.seed = 22, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e && engine_n_endpoints(e) == 1);
	CHECK_STR(engine_endpoint(e, 0)->how, "gran");
	CHECK_NEAR(engine_endpoint(e, 0)->volume_ml, 10.000, 0.02);
	engine_free(e);
}

/* Skoog et al., Fundamentals of Analytical Chemistry, weak acid table
 * (docs/chemistry.md §5a; book values [M], exact column [C]): 50.00 mL of 0.1000 M
 * HOAc, Ka 1.75e-5, Kw 1.00e-14, no activity corrections, titrated with
 * 0.1000 M NaOH: equivalence at 50.00 mL, pH 4.76 at 25.00 mL (half). The
 * run needs two refills of a 20 mL burette. Tolerances: 0.025 mL is the
 * 0.05 % target; half_ph is read between two points of the flat buffer
 * region through a settled electrode (still_within 0.02 pH): 0.02. */
TEST(engine_textbook_weak_acid)
{
	method_t m;
	chem_scenario_t s;
	REQUIRE(fixture_method(
	    HEAD "dosing: {mode: adaptive, step_aim: 0.5, dose_min_ml: 0.05, "
	         "dose_max_ml: 4.0}\n"
	         "detect: {kind: inflection, count: 1, min_jump: 1.0}\n"
	         "stop: {past_endpoint_ml: 2.0, volume_max_ml: 60, time_max_s: 3600}\n"
	         "results:\n  - name: half\n    formula: half1_ph\n    unit: pH\n"
	         "    decimals: 2\n",
	    &m));
	REQUIRE(fixture_scenario(
	    "temperature_c: 25\nactivity: ideal\npkw: 14.0\nsample_ml: 50.0\n"
	    "water_ml: 0.0\n"
	    "sample:\n  - {name: acetic acid, molar: 0.1000, pka: [4.7570]}\n"
	    "titrant:\n  - {name: sodium hydroxide, molar: 0.1000, strong: base}\n"
	    "electrode: {offset_mv: 0.0, slope_pct: 100.0, tau_s: 1.5, noise_mv: 0.15, "
	    "drift_mv_per_min: 0.0}\nburette: {capacity_ml: 20.0, steps: 40000}\n",
	    &s));
	simrun_opts_t o = {.seed = 23, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e && engine_n_endpoints(e) == 1);
	CHECK(engine_refills(e) >= 2);
	CHECK_NEAR(engine_endpoint(e, 0)->volume_ml, 50.00, 0.025);
	CHECK_NEAR(engine_endpoint(e, 0)->half_ph, 4.76, 0.02);
	REQUIRE(engine_n_results(e) == 1 && engine_result(e, 0)->has_value);
	CHECK_NEAR(engine_result(e, 0)->value, 4.76, 0.02);
	engine_free(e);
}

/* Results: formula, rounding to decimals, accept, and null with a note. */
TEST(engine_results_accept_and_null)
{
	method_t m;
	chem_scenario_t s;
	REQUIRE(fixture_method(
	    HEAD "dosing: {mode: adaptive, step_aim: 0.5, dose_min_ml: 0.02, "
	         "dose_max_ml: 1.0}\n"
	         "detect: {kind: inflection, count: 1, min_jump: 1.0}\n"
	         "stop: {past_endpoint_ml: 0.5, volume_max_ml: 20, time_max_s: 3600}\n"
	         "results:\n"
	         "  - name: acetic\n"
	         "    formula: end1_ml * titrant_molarity * titer * 60.052 / amount\n"
	         "    unit: g/L\n    decimals: 2\n    accept: {min: 5.0, max: 7.0}\n"
	         "  - name: low\n    formula: end1_ml\n    unit: mL\n    decimals: 1\n"
	         "    accept: {min: 11.0}\n"
	         "  - name: high\n    formula: end1_ml - blank_ml\n    unit: mL\n"
	         "    decimals: 3\n    accept: {max: 9.0}\n"
	         "  - name: divzero\n    formula: end1_ml / (amount - amount)\n"
	         "    unit: mL\n    decimals: 2\n",
	    &m));
	REQUIRE(fixture_scenario(VINEGAR, &s));
	simrun_opts_t o = {.seed = 24, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e && engine_n_results(e) == 4);
	/* 1.000 mmol acetic acid (60.052 g/mol) in 10 mL: 6.0052 g/L -> 6.01
	 * (docs/chemistry.md §7, molar mass from CIAAW 2021 atomic weights). */
	const engine_result_t *r = engine_result(e, 0);
	CHECK(r->has_value);
	CHECK_NEAR(r->value, 6.01, 1e-9);
	CHECK_STR(engine_accept_name(r->accept), "pass");
	CHECK_STR(r->unit, "g/L");
	CHECK_STR(engine_accept_name(engine_result(e, 1)->accept), "low");
	CHECK_NEAR(engine_result(e, 1)->value, 10.0, 1e-9);
	/* blank_ml unknown in this run (simrun gives none): null with a note. */
	CHECK(!engine_result(e, 2)->has_value);
	CHECK(engine_result(e, 2)->note[0] != '\0');
	CHECK(!engine_result(e, 3)->has_value); /* division by zero */
	CHECK(engine_result(e, 3)->note[0] != '\0');
	/* A result without a value is "missing", never "none" (which says the
	 * method sets no limits), and the run is failed, not finished
	 * (docs/lims.md, "What finished means"). */
	CHECK_STR(engine_accept_name(engine_result(e, 3)->accept), "missing");
	CHECK_STR(engine_accept_name(engine_result(e, 2)->accept), "missing");
	CHECK_STR(engine_outcome_name(engine_outcome(e)), "failed");
	CHECK_STR(engine_fault_code(e), "result_missing");
	CHECK(strstr(engine_fault_message(e), "'high'") != NULL);
	CHECK_STR(engine_stop_name(engine_stop_reason(e)), "endpoints_found");
	CHECK(!engine_outcome_clean(e));
	engine_free(e);

	/* The same with a blank: 10.000 - 0.5 = 9.500 -> "high" against 9.0. */
	o.has_blank = true;
	o.blank_ml = 0.5;
	e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e && engine_n_results(e) == 4);
	CHECK(engine_result(e, 2)->has_value);
	CHECK_NEAR(engine_result(e, 2)->value, 9.5, 0.005);
	CHECK_STR(engine_accept_name(engine_result(e, 2)->accept), "high");
	engine_free(e);
}

/* The record's JSON: docs/lims.md field names, nulls for unknowns. */
TEST(engine_record_json)
{
	method_t m;
	chem_scenario_t s;
	REQUIRE(fixture_method(
	    HEAD "dosing: {mode: adaptive, step_aim: 0.5, dose_min_ml: 0.02, "
	         "dose_max_ml: 1.0}\n"
	         "detect: {kind: inflection, count: 1, min_jump: 1.0}\n"
	         "stop: {past_endpoint_ml: 0.5, volume_max_ml: 20, time_max_s: 3600}\n"
	         "results:\n  - name: acetic\n"
	         "    formula: end1_ml * titrant_molarity * 60.052 / amount\n"
	         "    unit: g/L\n    decimals: 2\n",
	    &m));
	REQUIRE(fixture_scenario(VINEGAR, &s));
	simrun_opts_t o = {.seed = 25, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e);
	run_record_t r;
	record_init(&r);
	record_set_method(&r, &m);
	r.id = 12;
	snprintf(r.station, sizeof r.station, "sim1");
	snprintf(r.state, sizeof r.state, "finished");
	r.sample.amount = 10;
	record_add_fault(&r, "2026-12-01T21:46:40.123Z", "probe_slow", "a reply took 2 s");
	record_fill_from_engine(&r, e, "");
	json_t *j = record_to_json(&r);
	REQUIRE(j);
	CHECK_INT(json_integer_value(json_object_get(j, "id")), 12);
	CHECK_STR(json_string_value(json_object_get(j, "station")), "sim1");
	CHECK(json_is_null(json_object_get(j, "phase")));
	CHECK(json_is_null(json_object_get(j, "calibration")));
	CHECK(json_is_null(json_object_get(j, "started_at")));
	CHECK(!json_object_get(j, "duration_s"));
	CHECK_STR(json_string_value(json_object_get(j, "stop_reason")), "endpoints_found");
	CHECK_STR(json_string_value(json_object_get(json_object_get(j, "method"), "id")),
	          "test-method");
	CHECK_STR(json_string_value(json_object_get(json_object_get(j, "sample"), "unit")), "mL");
	json_t *ep = json_array_get(json_object_get(j, "endpoints"), 0);
	REQUIRE(ep);
	CHECK_INT(json_integer_value(json_object_get(ep, "n")), 1);
	CHECK_NEAR(json_real_value(json_object_get(ep, "volume_ml")), 10.0, 0.005);
	CHECK(json_is_real(json_object_get(ep, "u_volume_ml")));
	CHECK(json_object_get(ep, "half_ph") && json_object_get(ep, "how"));
	json_t *res = json_array_get(json_object_get(j, "results"), 0);
	REQUIRE(res);
	CHECK_STR(json_string_value(json_object_get(res, "accept")), "none");
	CHECK_INT(json_integer_value(json_object_get(j, "additions")), engine_additions(e));
	CHECK_INT(json_array_size(json_object_get(j, "faults")), 1);
	char *txt = json_dumps(res, JSON_COMPACT | JSON_REAL_PRECISION(10));
	REQUIRE(txt);
	CHECK(strstr(txt, "\"value\":6.01") != NULL);
	free(txt);
	json_decref(j);

	/* Unknown numbers print as null, never as a missing key or NaN. */
	engine_point_t pt = {.t_s = 1, .volume_ml = 0.5, .mv = 10, .ph = NAN, .temperature_c = 25};
	j = record_point_to_json(&pt);
	REQUIRE(j);
	CHECK(json_is_null(json_object_get(j, "ph")));
	CHECK(json_is_false(json_object_get(j, "settled")));
	json_decref(j);
	record_init(&r);
	r.endpoints[0] = (record_endpoint_t){.n = 1,
	                                     .volume_ml = 5,
	                                     .u_volume_ml = NAN,
	                                     .ph = NAN,
	                                     .mv = NAN,
	                                     .half_ph = NAN,
	                                     .derivative_ml = 5,
	                                     .model_ml = NAN};
	snprintf(r.endpoints[0].how, sizeof r.endpoints[0].how, "inflection");
	r.n_endpoints = 1;
	r.has_duration = true;
	r.duration_s = 12.5;
	j = record_to_json(&r);
	REQUIRE(j);
	ep = json_array_get(json_object_get(j, "endpoints"), 0);
	CHECK(json_is_null(json_object_get(ep, "u_volume_ml")));
	CHECK(json_is_null(json_object_get(ep, "model_ml")));
	CHECK(json_is_null(json_object_get(j, "stop_reason")));
	CHECK(json_is_null(json_object_get(j, "id")));
	CHECK_NEAR(json_real_value(json_object_get(j, "duration_s")), 12.5, 0);
	json_decref(j);
	engine_free(e);
}

/* ---- property test ---- */

static unsigned long long rng_state;

static double urand(void)
{
	/* splitmix64: a fixed, seedable sequence for a repeatable test. */
	unsigned long long z = (rng_state += 0x9e3779b97f4a7c15ULL);
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
	z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
	z ^= z >> 31;
	return (double)(z >> 11) * (1.0 / 9007199254740992.0);
}

static double uni(double lo, double hi)
{
	return lo + (hi - lo) * urand();
}

static void random_scenario(chem_scenario_t *s)
{
	scenario_defaults(s);
	bool acid_sample = urand() < 0.6;
	s->temperature_c = uni(10, 40);
	s->activity = urand() < 0.5 ? CHEM_ACT_DAVIES : CHEM_ACT_IDEAL;
	s->sample_ml = uni(1, 20);
	s->water_ml = uni(0, 50);
	s->n_sample = 1 + (urand() < 0.3);
	for (int i = 0; i < s->n_sample; i++) {
		chem_comp_t *c = &s->sample[i];
		memset(c, 0, sizeof *c);
		snprintf(c->name, sizeof c->name, "analyte %d", i);
		c->molar = uni(0.0005, 0.2);
		if (urand() < 0.4) {
			c->kind = acid_sample ? CHEM_STRONG_ACID : CHEM_STRONG_BASE;
		} else {
			c->kind = CHEM_WEAK;
			c->n_pka = 1 + (int)(urand() * 3);
			double pk = uni(2, 6);
			for (int j = 0; j < c->n_pka; j++, pk += uni(1, 4))
				c->pka[j] = pk;
			c->charge = acid_sample ? 0 : c->n_pka;
		}
	}
	s->n_titrant = 1;
	memset(&s->titrant[0], 0, sizeof s->titrant[0]);
	snprintf(s->titrant[0].name, sizeof s->titrant[0].name, "titrant");
	s->titrant[0].kind = acid_sample ? CHEM_STRONG_BASE : CHEM_STRONG_ACID;
	s->titrant[0].molar = uni(0.01, 0.5);
	s->electrode.offset_mv = uni(-30, 30);
	s->electrode.slope_pct = uni(90, 102);
	s->electrode.tau_s = uni(0.1, 5);
	s->electrode.noise_mv = uni(0, 1);
	s->electrode.drift_mv_per_min = uni(-1, 1);
	static const double caps[] = {1, 5, 10, 20, 50};
	s->burette.capacity_ml = caps[(int)(urand() * 5)];
	s->burette.steps = (long)uni(1000, 40000);
}

/* When set, every random method doses guided and settles by extrapolation. */
static bool force_guided_extrapolate;

static void random_method(method_t *m, const chem_scenario_t *s)
{
	bool mv = urand() < 0.3;
	double u = mv ? 59.16 : 1.0; /* signal units per pH */
	double q = s->burette.capacity_ml / (double)s->burette.steps;
	m->signal = mv ? SIGNAL_MV : SIGNAL_PH;
	m->stir_s = uni(0, 20);
	m->initial_ml = urand() < 0.3 ? uni(0, 2) : 0;
	double d = urand();
	m->dosing = d < 0.45 ? DOSING_ADAPTIVE : d < 0.7 ? DOSING_GUIDED : DOSING_CONSTANT;
	m->settle_rule = urand() < 0.5 ? SETTLE_STILL : SETTLE_EXTRAPOLATE;
	if (force_guided_extrapolate) {
		m->dosing = DOSING_GUIDED;
		m->settle_rule = SETTLE_EXTRAPOLATE;
	}
	m->step_aim = uni(0.05, 1.0) * u;
	m->dose_min_ml = fmax(q, uni(0.001, 0.1));
	m->dose_max_ml = m->dose_min_ml * uni(1, 50);
	m->volume_max_ml = uni(0.5, 30);
	m->dose_ml = fmax(q, fmax(m->volume_max_ml / 200, uni(0.01, 1)));
	m->wait_min_s = uni(0, 3);
	m->wait_max_s = m->wait_min_s + uni(1, 30);
	m->still_within = uni(0.002, 0.1) * u;
	m->still_for_s = uni(0, 4);
	int k = (int)(urand() * 3);
	m->detect = k == 0 ? DETECT_INFLECTION : k == 1 ? DETECT_TARGET : DETECT_GRAN;
	m->count = 1 + (int)(urand() * 3);
	if (m->detect == DETECT_TARGET)
		m->count = 1;
	m->min_jump = uni(0.1, 3) * u;
	m->has_window = urand() < 0.5;
	double lo = uni(2, 8), hi = lo + uni(1, 6);
	m->window_lo = mv ? (7 - hi) * u : lo;
	m->window_hi = mv ? (7 - lo) * u : hi;
	m->has_target = true;
	m->target = mv ? (7 - uni(3, 11)) * u : uni(3, 11);
	m->past_endpoint_ml = uni(0, 2);
	m->has_signal_limit = urand() < 0.5;
	m->signal_limit = mv ? (7 - uni(1, 13)) * u : uni(1, 13);
	m->time_max_s = uni(30, 3600);
}

/* The properties every run must have, whatever the method and beaker:
 * stopped by a rule (not stuck, not a fault), never past the volume limit,
 * no NaN, points in order, endpoints within what was dosed, each result a
 * value or a note; for endpoints in sequence, each endpoint's criterion in
 * order and past the one before, a fallback only where the criterion has
 * one. */
static bool run_ok(const method_t *m, engine_t *e, const simrun_opts_t *o, const simrun_out_t *out,
                   double *limit_out)
{
	double limit = m->volume_max_ml;
	if (o->vessel_max_ml > 0 && o->vessel_max_ml < limit)
		limit = o->vessel_max_ml;
	*limit_out = limit;
	bool ok = !out->stuck && engine_done(e) && engine_stop_reason(e) != ENGINE_STOP_NONE;
	ok &= out->max_dispensed_ml <= limit + 1e-9;
	ok &= fabs(engine_dispensed_ml(e) - out->max_dispensed_ml) < 1e-9;
	ok &= engine_stop_reason(e) != ENGINE_STOP_FAULT;
	for (int k = 0; k < engine_n_points(e); k++) {
		const engine_point_t *p = engine_point(e, k);
		ok &= isfinite(p->t_s) && isfinite(p->volume_ml) && isfinite(p->mv) &&
		      isfinite(p->signal) && isfinite(p->dpdv) && isfinite(p->ph);
		ok &= p->volume_ml <= limit + 1e-9;
		if (k > 0)
			ok &= p->volume_ml >= engine_point(e, k - 1)->volume_ml &&
			      p->t_s >= engine_point(e, k - 1)->t_s;
	}
	method_criterion_t cr[METHOD_MAX_ENDPOINTS];
	int n_crit = method_criteria(m, cr);
	for (int k = 0; k < engine_n_endpoints(e); k++) {
		const engine_endpoint_t *ep = engine_endpoint(e, k);
		ok &= isfinite(ep->volume_ml) && ep->volume_ml >= 0 &&
		      ep->volume_ml <= engine_dispensed_ml(e) + 1e-6;
		ok &= isfinite(ep->u_volume_ml) && ep->u_volume_ml > 0; /* every endpoint has u */
		ok &= ep->how != NULL;
		ok &= ep->criterion >= 1 && ep->criterion <= n_crit;
		ok &= !ep->fallback || cr[ep->criterion - 1].has_fallback;
		if (k > 0 && m->n_criteria > 0) {
			const engine_endpoint_t *pe = engine_endpoint(e, k - 1);
			ok &= ep->criterion == pe->criterion + 1 && ep->volume_ml >= pe->volume_ml;
		}
	}
	for (int k = 0; k < engine_n_results(e); k++) {
		const engine_result_t *r = engine_result(e, k);
		ok &= r->has_value ? isfinite(r->value) : r->note[0] != '\0';
	}
	return ok;
}

static void property_runs(unsigned long long seed, int runs)
{
	method_t base;
	REQUIRE(fixture_method(
	    HEAD "dosing: {mode: adaptive, step_aim: 0.5, dose_min_ml: 0.02, "
	         "dose_max_ml: 1.0}\n"
	         "detect: {kind: inflection, count: 1, min_jump: 1.0}\n"
	         "stop: {past_endpoint_ml: 0.5, volume_max_ml: 20, time_max_s: 3600}\n"
	         "results:\n  - name: r\n    formula: end1_ml * titer / amount\n"
	         "    unit: mL/mL\n    decimals: 3\n",
	    &base));
	rng_state = seed;
	int bad = 0;
	for (int i = 0; i < runs && bad < 5; i++) {
		chem_scenario_t s;
		method_t m = base;
		random_scenario(&s);
		random_method(&m, &s);
		simrun_opts_t o = {.seed = (unsigned long long)i,
		                   .burette_start_ml = urand() < 0.3 ? uni(0, 1) : -1,
		                   .vessel_max_ml = urand() < 0.2 ? uni(0.5, 30) : 0};
		simrun_out_t out;
		engine_t *e = simrun_run(&m, &s, &o, &out);
		REQUIRE(e);
		double limit;
		bool ok = run_ok(&m, e, &o, &out, &limit);
		/* Every endpoint has a finite u > 0, and one more than 0.2 % from
		 * the nearest stoichiometric volume is marked doubtful (issue 21;
		 * a target's volume is not a stoichiometric one). "Far" is also
		 * more than 4 burette steps: an unmarked endpoint has u within two
		 * (docs/engine.md, "Doubtful endpoints"), and these random burettes
		 * have steps up to 50 uL, larger than 0.2 % of a small endpoint. */
		double q_ml = s.burette.capacity_ml / (double)s.burette.steps;
		double eq[16];
		int n_eq = chem_equivalence_ml(&s, eq, 16);
		for (int k = 0; k < engine_n_endpoints(e); k++) {
			const engine_endpoint_t *ep = engine_endpoint(e, k);
			double ve = NAN;
			for (int q = 0; q < n_eq; q++)
				if (!isfinite(ve) ||
				    fabs(eq[q] - ep->volume_ml) < fabs(ve - ep->volume_ml))
					ve = eq[q];
			if (m.detect != DETECT_TARGET && !ep->fallback && isfinite(ve) &&
			    !ep->doubt[0] &&
			    fabs(ep->volume_ml - ve) > fmax(0.002 * ve, 4 * q_ml)) {
				ok = false;
				harness_fail(
				    __FILE__, __LINE__,
				    "run %d: endpoint %d at %.4f mL (%s), %.3f %% from %.4f mL, "
				    "u %.4f mL, not marked",
				    i, k + 1, ep->volume_ml, ep->how,
				    100 * fabs(ep->volume_ml - ve) / ve, ve, ep->u_volume_ml);
			}
		}
		if (!ok) {
			bad++;
			harness_fail(
			    __FILE__, __LINE__,
			    "run %d: stuck %d stop %s dispensed %.6f (max %.6f, limit %.6f) "
			    "points %d endpoints %d fault '%s'",
			    i, out.stuck, engine_stop_name(engine_stop_reason(e)),
			    engine_dispensed_ml(e), out.max_dispensed_ml, limit, engine_n_points(e),
			    engine_n_endpoints(e), engine_fault_code(e));
		}
		engine_free(e);
	}
}

/* The same properties with endpoints in sequence: detect lists of 1 to 4
 * random criteria of any kind (targets in any order, as a hand-built method
 * may have them), some with fallbacks, and single criteria with a fallback. */
TEST(engine_property_random_sequences)
{
	method_t base;
	REQUIRE(fixture_method(
	    HEAD "dosing: {mode: adaptive, step_aim: 0.5, dose_min_ml: 0.02, "
	         "dose_max_ml: 1.0}\n"
	         "detect: {kind: inflection, count: 1, min_jump: 1.0}\n"
	         "stop: {past_endpoint_ml: 0.5, volume_max_ml: 20, time_max_s: 3600}\n"
	         "results:\n  - name: r\n    formula: end1_ml * titer / amount\n"
	         "    unit: mL/mL\n    decimals: 3\n",
	    &base));
	rng_state = 20261205;
	int runs = harness_quick() ? 40 : 300;
	int bad = 0, listed = 0, fell_back = 0;
	for (int i = 0; i < runs && bad < 5; i++) {
		chem_scenario_t s;
		method_t m = base;
		random_scenario(&s);
		random_method(&m, &s);
		double u = m.signal == SIGNAL_MV ? 59.16 : 1.0;
		bool mv = m.signal == SIGNAL_MV;
		int n = urand() < 0.25 ? 0 : 1 + (int)(urand() * METHOD_MAX_ENDPOINTS);
		for (int c = 0; c < (n ? n : 1); c++) {
			method_criterion_t *cr = &m.criteria[c];
			int k = (int)(urand() * 3);
			cr->kind = k == 0   ? DETECT_INFLECTION
			           : k == 1 ? DETECT_TARGET
			                    : DETECT_GRAN;
			cr->count = 1;
			cr->min_jump = uni(0.1, 3) * u;
			cr->has_window = urand() < 0.5;
			double lo = uni(2, 8), hi = lo + uni(1, 6);
			cr->window_lo = mv ? (7 - hi) * u : lo;
			cr->window_hi = mv ? (7 - lo) * u : hi;
			cr->has_target = cr->kind == DETECT_TARGET;
			cr->target = mv ? (7 - uni(3, 11)) * u : uni(3, 11);
			cr->has_fallback = cr->kind != DETECT_TARGET && urand() < 0.6;
			cr->fallback = mv ? (7 - uni(3, 11)) * u : uni(3, 11);
		}
		if (n) {
			m.n_criteria = n;
			m.count = n;
			listed++;
		} else {
			method_criterion_t one = m.criteria[0];
			one.count = m.count;
			if (one.kind == DETECT_TARGET)
				one.count = 1;
			one.has_fallback = one.kind != DETECT_TARGET && one.count == 1;
			method_for_criterion(&m, &one, &m);
		}
		simrun_opts_t o = {.seed = 7000 + (unsigned long long)i,
		                   .burette_start_ml = urand() < 0.3 ? uni(0, 1) : -1,
		                   .vessel_max_ml = urand() < 0.2 ? uni(0.5, 30) : 0};
		simrun_out_t out;
		engine_t *e = simrun_run(&m, &s, &o, &out);
		REQUIRE(e);
		double limit;
		bool ok = run_ok(&m, e, &o, &out, &limit);
		for (int k = 0; k < engine_n_endpoints(e); k++)
			fell_back += engine_endpoint(e, k)->fallback;
		if (!ok) {
			bad++;
			harness_fail(
			    __FILE__, __LINE__,
			    "run %d: %d criteria, stuck %d stop %s dispensed %.6f (limit %.6f) "
			    "points %d endpoints %d fault '%s'",
			    i, n, out.stuck, engine_stop_name(engine_stop_reason(e)),
			    engine_dispensed_ml(e), limit, engine_n_points(e),
			    engine_n_endpoints(e), engine_fault_code(e));
		}
		engine_free(e);
	}
	/* the generator really made lists, and some runs really fell back */
	CHECK(listed > runs / 2);
	CHECK(fell_back > 0);
}

TEST(engine_property_random_runs)
{
	force_guided_extrapolate = false;
	property_runs(20261201, harness_quick() ? 40 : 300);
}

/* The same properties with every method dosing guided and settling by
 * extrapolation: always terminates, never past a limit, never NaN. */
TEST(engine_property_guided_extrapolate)
{
	force_guided_extrapolate = true;
	property_runs(20261205, harness_quick() ? 40 : 300);
	force_guided_extrapolate = false;
}
