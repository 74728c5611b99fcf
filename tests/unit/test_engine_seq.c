/* test_engine_seq.c: endpoints in sequence (a detect list) and fallbacks.
 *
 * The reference volumes are solved here from the charge balance of each
 * scenario, by hand, never taken from the engine: with ideal activities and
 * pKw 14.00 (the scenario's `pkw`), the balance at a given pH is linear in
 * the titrant volume V, so V at a target pH has a closed form (see
 * volume_at_ph). The electrode is fast and quiet so the engine's points sit
 * on the equilibrium curve; what is tested is which endpoint the engine
 * takes, and that it interpolates it where the chemistry puts it.
 */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "chem.h"
#include "engine.h"
#include "fixtures.h"
#include "harness.h"
#include "method.h"
#include "record.h"
#include "simrun.h"

/* A sample of one weak system (total c_weak mol/L, pKa list, acid form
 * neutral) and a strong base (c_base mol/L) in v0_ml, titrated with a strong
 * acid (ct > 0, mol/L) or base (ct < 0). At pH p the charge balance, per
 * litre of beaker, is
 *   c_base*v0/(v0+V) + H - OH - ct*V/(v0+V) - c_weak*v0/(v0+V) * s(p) = 0
 * (ct > 0; a base titrant enters with the other sign), with s the mean
 * negative charge of the weak system. Multiplying by (v0 + V):
 *   V = v0 * (c_base - c_weak*s + D) / (ct - D),  D = H - OH. */
static double volume_at_ph(double v0_ml, double c_weak, const double *pka, int n_pka, double c_base,
                           double ct, double ph)
{
	double h = pow(10.0, -ph), oh = pow(10.0, ph - 14.0), d = h - oh;
	/* fractions of the species H_nA ... A^n-, from the pKa list */
	double w[8], sum = 0, s = 0;
	w[0] = 1.0;
	for (int j = 1; j <= n_pka; j++)
		w[j] = w[j - 1] * pow(10.0, ph - pka[j - 1]);
	for (int j = 0; j <= n_pka; j++)
		sum += w[j];
	for (int j = 0; j <= n_pka; j++)
		s += j * w[j] / sum;
	return v0_ml * (c_base - c_weak * s + d) / (ct - d);
}

#define FAST_ELECTRODE                                                                             \
	"electrode: {offset_mv: 0.0, slope_pct: 100.0, tau_s: 0.05, noise_mv: 0.0, "               \
	"drift_mv_per_min: 0.0}\n"

static const char *const seq_method_head = "method: seq-test\n"
                                           "title: Sequence test\n"
                                           "revision: 1\n"
                                           "purpose: assay\n"
                                           "titrant: {name: T, molarity: %g}\n"
                                           "sample: {unit: mL, min: 1.0, max: 100.0}\n"
                                           "signal: ph\n"
                                           "start: {stir_s: 5, initial_ml: 0.0}\n"
                                           "dosing: {mode: adaptive, step_aim: 0.1, "
                                           "dose_min_ml: 0.002, dose_max_ml: 0.4}\n"
                                           "settle: {wait_min_s: 1, wait_max_s: 20, "
                                           "still_within: 0.01, still_for_s: 2}\n";

static bool seq_method(method_t *m, double molarity, const char *rest)
{
	char buf[4096];
	int n = snprintf(buf, sizeof buf, seq_method_head, molarity);
	snprintf(buf + n, sizeof buf - (size_t)n, "%s", rest);
	return fixture_method(buf, m);
}

/* Well water with carbonate and hydrogen carbonate, as the example
 * water-p-and-t-alkalinity: 100 mL, 0.0030 mol/L carbonate system, 0.0036
 * mol/L strong base, HCl 0.02 mol/L; ideal activities, pKw 14.00. */
#define WELL_WATER                                                                                 \
	"temperature_c: 25\nactivity: ideal\npkw: 14.00\nsample_ml: 100.0\nwater_ml: 0.0\n"        \
	"sample:\n"                                                                                \
	"  - {name: carbonate, molar: 0.0030, pka: [6.351, 10.329]}\n"                             \
	"  - {name: sodium, molar: 0.0036, strong: base}\n"                                        \
	"titrant:\n  - {name: hydrochloric acid, molar: 0.0200, strong: acid}\n" FAST_ELECTRODE    \
	"burette: {capacity_ml: 10.0, steps: 20000}\n"

#define PT_DETECT                                                                                  \
	"detect:\n"                                                                                \
	"  - {kind: target, target: 8.3}\n"                                                        \
	"  - {kind: target, target: 4.5}\n"                                                        \
	"stop: {past_endpoint_ml: 0.2, volume_max_ml: 25, signal_limit: 3.8, time_max_s: 7200}\n"  \
	"results:\n"                                                                               \
	"  - {name: p_alk, formula: end1_ml * titrant_molarity * 1000 / amount, decimals: 4}\n"    \
	"  - {name: t_alk, formula: end2_ml * titrant_molarity * 1000 / amount, decimals: 4}\n"

TEST(engine_seq_p_then_t_alkalinity_exact)
{
	method_t m;
	chem_scenario_t s;
	REQUIRE(seq_method(&m, 0.02, PT_DETECT));
	REQUIRE(fixture_scenario(WELL_WATER, &s));
	REQUIRE(m.n_criteria == 2 && m.count == 2);
	const double pka[2] = {6.351, 10.329};
	double v_p = volume_at_ph(100.0, 0.0030, pka, 2, 0.0036, 0.02, 8.3);
	double v_t = volume_at_ph(100.0, 0.0030, pka, 2, 0.0036, 0.02, 4.5);
	/* Stoichiometry: CO3 2- -> HCO3- takes 100 mL x (0.0036 - 0.0030) mol/L
	 * = 0.060 mmol, 3.000 mL of 0.02 mol/L; everything to H2CO3 takes 0.36
	 * mmol, 18.000 mL. pH 8.3 lies near the first equivalence point (the
	 * phenolphthalein end point of ISO 9963-1): within 0.05 mL of it here;
	 * pH 4.5 within 0.05 mL of the second. */
	CHECK_NEAR(v_p, 3.000, 0.05);
	CHECK_NEAR(v_t, 18.000, 0.05);
	simrun_opts_t o = {.seed = 7, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e);
	CHECK(!out.stuck);
	CHECK_INT(engine_stop_reason(e), ENGINE_STOP_ENDPOINTS);
	CHECK_INT(engine_outcome(e), ENGINE_OUTCOME_FINISHED);
	REQUIRE(engine_n_endpoints(e) == 2);
	const engine_endpoint_t *p = engine_endpoint(e, 0), *t = engine_endpoint(e, 1);
	/* Interpolated between points that bracket the target closely: within
	 * 0.05 % of the volume at the target pH (the bound). */
	CHECK_NEAR(p->volume_ml, v_p, 0.0005 * v_p);
	CHECK_NEAR(t->volume_ml, v_t, 0.0005 * v_t);
	CHECK_STR(p->how, "target");
	CHECK_STR(t->how, "target");
	CHECK_INT(p->criterion, 1);
	CHECK_INT(t->criterion, 2);
	CHECK(!p->fallback && !t->fallback);
	CHECK_NEAR(p->signal, 8.3, 1e-12);
	CHECK_NEAR(t->signal, 4.5, 1e-12);
	/* The run went on to past_endpoint_ml after the second, not the first. */
	CHECK(engine_dispensed_ml(e) > t->volume_ml + 0.19);
	REQUIRE(engine_n_results(e) == 2);
	CHECK_NEAR(engine_result(e, 0)->value, v_p * 0.02 * 1000 / 100, 0.0005);
	CHECK(!engine_result(e, 0)->from_fallback && !engine_result(e, 1)->from_fallback);
	CHECK(strstr(engine_stop_detail(e), "endpoint 2 by detect[2], target 4.5 pH") != NULL);
	engine_free(e);
}

/* One large addition may cross both targets: each is still its own
 * endpoint, interpolated on the same step, the second past the first. */
TEST(engine_seq_one_step_across_two_targets)
{
	method_t m;
	chem_scenario_t s;
	REQUIRE(seq_method(&m, 0.02, PT_DETECT));
	REQUIRE(fixture_scenario(WELL_WATER, &s));
	m.dosing = DOSING_CONSTANT;
	m.dose_ml = m.dose_min_ml = m.dose_max_ml = 20.0;
	s.burette.capacity_ml = 25.0;
	s.burette.steps = 50000;
	simrun_opts_t o = {.seed = 1, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e);
	REQUIRE(engine_n_endpoints(e) == 2);
	CHECK(engine_endpoint(e, 0)->volume_ml < engine_endpoint(e, 1)->volume_ml);
	CHECK_INT(engine_endpoint(e, 1)->criterion, 2);
	engine_free(e);
}

/* A weak acid too weak and dilute to show an inflection (pKa 9.24, as boric
 * acid, 0.001 mol/L in 50 mL, NaOH 0.05 mol/L): the criterion ends at its
 * fallback pH 9.5, where the charge balance puts that pH. */
#define BORIC                                                                                      \
	"temperature_c: 25\nactivity: ideal\npkw: 14.00\nsample_ml: 50.0\nwater_ml: 0.0\n"         \
	"sample:\n  - {name: boric acid, molar: 0.0010, pka: [9.24]}\n"                            \
	"titrant:\n  - {name: sodium hydroxide, molar: 0.0500, strong: base}\n" FAST_ELECTRODE     \
	"burette: {capacity_ml: 10.0, steps: 20000}\n"
#define BORIC_STOP                                                                                 \
	"stop: {past_endpoint_ml: 0.0, volume_max_ml: 5, signal_limit: 11.5, time_max_s: 7200}\n"  \
	"results:\n  - {name: acid, formula: end1_ml * titrant_molarity / amount, decimals: 6}\n"

TEST(engine_seq_fallback_when_no_inflection)
{
	method_t m, plain;
	chem_scenario_t s;
	REQUIRE(seq_method(&m, 0.05,
	                   "detect: {kind: inflection, min_jump: 1.0, window: [7, 11], "
	                   "fallback: {target: 9.5}}\n" BORIC_STOP));
	REQUIRE(
	    seq_method(&plain, 0.05,
	               "detect: {kind: inflection, min_jump: 1.0, window: [7, 11]}\n" BORIC_STOP));
	REQUIRE(fixture_scenario(BORIC, &s));
	CHECK(m.has_fallback && m.n_criteria == 0);
	CHECK_NEAR(m.fallback, 9.5, 0);
	const double pka[1] = {9.24};
	/* NaOH is a titrant of negative acidity: ct = -0.05 in the closed form */
	double v_fb = volume_at_ph(50.0, 0.0010, pka, 1, 0.0, -0.05, 9.5);
	CHECK(v_fb > 0.5 && v_fb < 1.0); /* past half-neutralisation (pH 9.24), before the end */

	/* Without the fallback the run finds nothing and fails... */
	simrun_opts_t o = {.seed = 3, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(&plain, &s, &o, &out);
	REQUIRE(e);
	CHECK_INT(engine_n_endpoints(e), 0);
	CHECK_INT(engine_outcome(e), ENGINE_OUTCOME_FAILED);
	CHECK_STR(engine_fault_code(e), "endpoint_missing");
	engine_free(e);

	/* ...with it, the run ends at pH 9.5, marked as a fallback. */
	e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e);
	CHECK(!out.stuck);
	CHECK_INT(engine_stop_reason(e), ENGINE_STOP_ENDPOINTS);
	CHECK_INT(engine_outcome(e), ENGINE_OUTCOME_FINISHED);
	REQUIRE(engine_n_endpoints(e) == 1);
	const engine_endpoint_t *ep = engine_endpoint(e, 0);
	CHECK(ep->fallback);
	CHECK_INT(ep->criterion, 1);
	CHECK_STR(ep->how, "target");
	CHECK_NEAR(ep->signal, 9.5, 1e-12);
	CHECK_NEAR(ep->volume_ml, v_fb, 0.002 * v_fb);
	REQUIRE(engine_n_results(e) == 1);
	CHECK(engine_result(e, 0)->from_fallback);
	CHECK(strstr(engine_stop_detail(e), "fallback 9.5 pH") != NULL);

	/* The record says so, for the endpoint and the result. */
	run_record_t r;
	record_init(&r);
	record_fill_from_engine(&r, e, "");
	json_t *j = record_to_json(&r);
	REQUIRE(j);
	json_t *je = json_array_get(json_object_get(j, "endpoints"), 0);
	CHECK(json_is_true(json_object_get(je, "fallback")));
	CHECK_INT(json_integer_value(json_object_get(je, "criterion")), 1);
	json_t *jr = json_array_get(json_object_get(j, "results"), 0);
	CHECK(json_is_true(json_object_get(jr, "fallback")));
	CHECK(strstr(json_string_value(json_object_get(j, "stop_detail")), "fallback") != NULL);
	json_decref(j);
	engine_free(e);
}

/* An inflection that appears before the fallback signal wins: acetic acid
 * (1.000 mmol in 50 mL, NaOH 0.1 mol/L: 10.000 mL) with a fallback at pH
 * 11.5, far past its endpoint (about pH 8.7). */
TEST(engine_seq_inflection_before_fallback_wins)
{
	method_t m;
	chem_scenario_t s;
	REQUIRE(seq_method(&m, 0.1,
	                   "detect: {kind: inflection, min_jump: 1.0, window: [7, 11], "
	                   "fallback: {target: 11.5}}\n"
	                   "stop: {past_endpoint_ml: 0.5, volume_max_ml: 20, signal_limit: 12.5, "
	                   "time_max_s: 7200}\n"));
	REQUIRE(fixture_scenario(
	    "temperature_c: 25\nactivity: ideal\npkw: 14.00\nsample_ml: 10.0\nwater_ml: 40.0\n"
	    "sample:\n  - {name: acetic acid, molar: 0.1000, pka: [4.76]}\n"
	    "titrant:\n  - {name: sodium hydroxide, molar: 0.1000, strong: base}\n" FAST_ELECTRODE
	    "burette: {capacity_ml: 20.0, steps: 40000}\n",
	    &s));
	simrun_opts_t o = {.seed = 5, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e);
	REQUIRE(engine_n_endpoints(e) == 1);
	const engine_endpoint_t *ep = engine_endpoint(e, 0);
	CHECK(!ep->fallback);
	CHECK(strcmp(ep->how, "target") != 0);
	CHECK_NEAR(ep->volume_ml, 10.000, 0.02);
	CHECK(strstr(engine_stop_detail(e), "fallback") == NULL);
	engine_free(e);
}

/* Mixed kinds in a list: phosphoric acid's first proton by inflection, then
 * a target at pH 9.0 (before the second equivalence point, about pH 9.7). */
TEST(engine_seq_inflection_then_target)
{
	method_t m;
	chem_scenario_t s;
	REQUIRE(seq_method(&m, 0.1,
	                   "detect:\n"
	                   "  - {kind: inflection, min_jump: 0.8, window: [3.0, 6.5]}\n"
	                   "  - {kind: target, target: 9.0}\n"
	                   "stop: {past_endpoint_ml: 0.0, volume_max_ml: 25, signal_limit: 11.5, "
	                   "time_max_s: 7200}\n"));
	REQUIRE(fixture_scenario(
	    "temperature_c: 25\nactivity: ideal\npkw: 14.00\nsample_ml: 10.0\nwater_ml: 40.0\n"
	    "sample:\n  - {name: phosphoric acid, molar: 0.1000, pka: [2.148, 7.198, 12.35]}\n"
	    "titrant:\n  - {name: sodium hydroxide, molar: 0.1000, strong: base}\n" FAST_ELECTRODE
	    "burette: {capacity_ml: 25.0, steps: 50000}\n",
	    &s));
	const double pka[3] = {2.148, 7.198, 12.35};
	/* 10 mL of 0.1 mol/L in 40 mL water: the same as 50 mL of 0.02 mol/L */
	double v9 = volume_at_ph(50.0, 0.0200, pka, 3, 0.0, -0.1, 9.0);
	simrun_opts_t o = {.seed = 9, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e);
	REQUIRE(engine_n_endpoints(e) == 2);
	CHECK_INT(engine_endpoint(e, 0)->criterion, 1);
	CHECK_INT(engine_endpoint(e, 1)->criterion, 2);
	/* first proton: 1.000 mmol / 0.1 mol/L = 10.00 mL (the derivative's
	 * peak, a little early on phosphoric acid's sloping first step) */
	CHECK_NEAR(engine_endpoint(e, 0)->volume_ml, 10.00, 0.15);
	CHECK_STR(engine_endpoint(e, 1)->how, "target");
	CHECK_NEAR(engine_endpoint(e, 1)->volume_ml, v9, 0.0005 * v9);
	engine_free(e);
}

/* ---- parsing ---- */

TEST(method_detect_list_parses)
{
	method_t m;
	REQUIRE(seq_method(&m, 0.02, PT_DETECT));
	CHECK_INT(m.n_criteria, 2);
	CHECK_INT(m.count, 2);
	CHECK(m.criteria[0].kind == DETECT_TARGET && m.criteria[1].kind == DETECT_TARGET);
	CHECK_NEAR(m.criteria[0].target, 8.3, 0);
	CHECK_NEAR(m.criteria[1].target, 4.5, 0);
	CHECK_INT(m.criteria[0].count, 1);
	method_criterion_t c[METHOD_MAX_ENDPOINTS];
	CHECK_INT(method_criteria(&m, c), 2);
	method_t v;
	method_for_criterion(&m, &c[1], &v);
	CHECK(v.detect == DETECT_TARGET && v.has_target && v.n_criteria == 0);
	CHECK_NEAR(v.target, 4.5, 0);
	CHECK_INT(v.count, 1);
}

/* The single mapping means what it meant: one criterion, the top-level
 * fields, count as written. */
TEST(method_detect_mapping_is_one_criterion)
{
	method_t m;
	REQUIRE(
	    seq_method(&m, 0.1,
	               "detect: {kind: inflection, count: 2, min_jump: 0.8, window: [3.5, 11]}\n"
	               "stop: {past_endpoint_ml: 1.0, volume_max_ml: 35, time_max_s: 2400}\n"));
	CHECK_INT(m.n_criteria, 0);
	CHECK_INT(m.count, 2);
	CHECK(!m.has_fallback);
	method_criterion_t c[METHOD_MAX_ENDPOINTS];
	REQUIRE(method_criteria(&m, c) == 1);
	CHECK(c[0].kind == DETECT_INFLECTION);
	CHECK_INT(c[0].count, 2);
	CHECK_NEAR(c[0].min_jump, 0.8, 0);
	CHECK(c[0].has_window && c[0].window_lo == 3.5 && c[0].window_hi == 11);
}
