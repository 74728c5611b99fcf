/* Unit tests for a method's before/after steps (method_steps.c), reagent
 * additions in the beaker (chem_scenario_add) and a back titration run by
 * simrun, its result a formula of add1_* (docs/methods.md, "Steps").
 * The malformed steps are in tests/data/methods/bad/steps-*.yaml.
 */
#include <math.h>
#include <string.h>

#include "beaker.h"
#include "chem.h"
#include "engine.h"
#include "fixtures.h"
#include "harness.h"
#include "method.h"
#include "simrun.h"

TEST(steps_example_values)
{
	method_t m;
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(method_load("config/methods/whey-ammonium.yaml", NULL, &m, &d) == 0);
	diag_free(&d);
	REQUIRE(m.n_before == 3);
	CHECK_INT(m.before[0].kind, STEP_ADD);
	CHECK_STR(m.before[0].doser, "acid");
	CHECK_NEAR(m.before[0].ml, 10.0, 0);
	CHECK_INT(m.before[1].kind, STEP_STIR);
	CHECK_NEAR(m.before[1].s, 30.0, 0);
	CHECK_INT(m.before[2].kind, STEP_WAIT);
	CHECK_NEAR(m.before[2].s, 10.0, 0);
	REQUIRE(m.n_after == 1);
	CHECK_INT(m.after[0].kind, STEP_RINSE);
	CHECK_NEAR(m.after[0].s, 5.0, 0);
	CHECK_INT(method_additions(&m), 1);
	CHECK(method_addition(&m, 0) == &m.before[0]);
	CHECK(method_addition(&m, 1) == NULL);
	CHECK_STR(method_step_name(STEP_RINSE), "rinse_s");
	CHECK_STR(method_step_name(STEP_ADD), "add");
}

/* A method without steps has none, and passes a station without dosers. */
TEST(steps_absent_and_station_without_dosers)
{
	method_t m;
	method_limits_t lim;
	diag_list_t d = DIAG_LIST_INIT;
	method_limits_init(&lim);
	method_limits_add_station(&lim, 150, 10);
	method_limits_add_dosers(&lim, NULL, 0);
	CHECK(method_load("config/methods/cider-acidity.yaml", &lim, &m, &d) == 0);
	CHECK_INT(m.n_before, 0);
	CHECK_INT(m.n_after, 0);
	diag_free(&d);
	/* the back titration names `acid`, which that station lacks */
	CHECK(method_load("config/methods/whey-ammonium.yaml", &lim, &m, &d) != 0);
	REQUIRE(d.n == 1);
	CHECK(strstr(d.v[0].msg, "'acid' is not a dosing unit of the station (it has none)"));
	diag_free(&d);
}

/* Several stations: only the dosers every one of them has count. */
TEST(steps_limits_keep_the_dosers_all_stations_have)
{
	method_limits_t lim;
	const char a[3][METHOD_ID_MAX] = {"acid", "base", "water"};
	const char b[2][METHOD_ID_MAX] = {"water", "acid"};
	method_limits_init(&lim);
	CHECK(!lim.dosers_known);
	method_limits_add_dosers(&lim, a, 3);
	CHECK(lim.dosers_known);
	CHECK_INT(lim.n_dosers, 3);
	method_limits_add_dosers(&lim, b, 2);
	REQUIRE(lim.n_dosers == 2);
	CHECK_STR(lim.dosers[0], "acid");
	CHECK_STR(lim.dosers[1], "water");
	method_limits_add_dosers(&lim, NULL, 0);
	CHECK_INT(lim.n_dosers, 0);
}

/* 10 mL of 0.1 mol/L HCl into 50 mL of water (ideal activities): 1 mmol in
 * 60 mL, pH = -log10(1/60) = 1.778; the same again merges into one
 * component: 2 mmol in 70 mL. */
TEST(steps_reagent_addition_dilutes_and_merges)
{
	chem_scenario_t s;
	REQUIRE(fixture_scenario("sample_ml: 50\n"
	                         "activity: ideal\n"
	                         "titrant: [{name: sodium hydroxide, molar: 0.1, strong: base}]\n"
	                         "dosers:\n"
	                         "  acid: {name: hydrochloric acid, molar: 0.1, strong: acid}\n",
	                         &s));
	REQUIRE(s.n_dosers == 1);
	const chem_comp_t *hcl = chem_scenario_doser(&s, "acid");
	REQUIRE(hcl != NULL);
	CHECK(chem_scenario_doser(&s, "base") == NULL);
	CHECK_NEAR(chem_ph(&s, 0), 7.0, 0.01);
	chem_comp_t r = *hcl;
	REQUIRE(chem_scenario_add(&s, &r, 10.0) == 0);
	CHECK_NEAR(s.water_ml, 10.0, 1e-12);
	CHECK_NEAR(chem_ph(&s, 0), -log10(1.0 / 60.0), 1e-6);
	REQUIRE(chem_scenario_add(&s, &r, 10.0) == 0);
	CHECK_INT(s.n_sample, 1);
	CHECK_NEAR(chem_ph(&s, 0), -log10(2.0 / 70.0), 1e-6);
	CHECK(chem_scenario_add(&s, &r, -1.0) != 0);
	CHECK(chem_scenario_add(&s, &r, NAN) != 0);
	/* the beaker re-solves on an addition */
	beaker_t *b = beaker_new(&s, 1);
	REQUIRE(b != NULL);
	double ph0 = beaker_true_ph(b);
	CHECK(beaker_add_reagent(b, &r, 30.0) == 0);
	CHECK_NEAR(beaker_true_ph(b), -log10(5.0 / 100.0), 1e-6);
	CHECK(beaker_true_ph(b) < ph0);
	beaker_free(b);
}

/* The scenario's numbers differ from the example's, so the expected values
 * are worked out here, from the stoichiometry alone. */
#define BACK_SCENARIO                                                                              \
	"sample_ml: 40\n"                                                                          \
	"sample: [{name: ammonia, molar: 0.0124, pka: [9.245], charge: 1}]\n"                      \
	"titrant: [{name: sodium hydroxide, molar: 0.1000, strong: base}]\n"                       \
	"dosers:\n"                                                                                \
	"  acid: {name: hydrochloric acid, molar: 0.0987, strong: acid}\n"                         \
	"electrode: {offset_mv: 0, slope_pct: 100, tau_s: 1.0, noise_mv: 0.1}\n"

#define BACK_METHOD                                                                                \
	"method: back-test\n"                                                                      \
	"title: back titration\nrevision: 1\npurpose: assay\n"                                     \
	"titrant: {name: NaOH 0.1 mol/L, molarity: 0.1000}\n"                                      \
	"sample: {unit: mL, min: 10, max: 60}\n"                                                   \
	"signal: ph\n"                                                                             \
	"before:\n"                                                                                \
	"  - {add: {doser: acid, ml: 15.0}}\n"                                                     \
	"  - {stir_s: 20}\n"                                                                       \
	"dosing: {mode: adaptive, step_aim: 0.3, dose_min_ml: 0.005, dose_max_ml: 0.5}\n"          \
	"settle: {wait_min_s: 1, wait_max_s: 20, still_within: 0.02, still_for_s: 1.5}\n"          \
	"detect: {kind: inflection, min_jump: 0.8, window: [4.0, 7.5]}\n"                          \
	"stop: {past_endpoint_ml: 2.0, volume_max_ml: 25, signal_limit: 10.5, time_max_s: 3600}\n" \
	"results:\n"                                                                               \
	"  - name: ammonia\n"                                                                      \
	"    formula: (add1_ml * add1_molarity * add1_titer - end1_ml * titrant_molarity * "       \
	"titer) * 1000 / amount\n"                                                                 \
	"    decimals: 5\n"

TEST(steps_ammonia_back_titration_matches_stoichiometry)
{
	method_t m;
	chem_scenario_t s;
	REQUIRE(fixture_method(BACK_METHOD, &m));
	REQUIRE(fixture_scenario(BACK_SCENARIO, &s));
	char why[256];
	REQUIRE(simrun_check(&m, &s, why, sizeof why) == 0);
	/* HCl 15.0 mL x 0.0987 mol/L = 1.4805 mmol; ammonia 40 mL x 0.0124
	 * mol/L = 0.496 mmol; the excess 0.9845 mmol takes 9.845 mL of 0.1
	 * mol/L NaOH (one refill of the 10 mL burette on the way). */
	const double v_eq_ml = (15.0 * 0.0987 - 40 * 0.0124) / 0.1000;
	const double ammonia_mmol_l = 12.4;
	simrun_opts_t o = {.seed = 3, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(&m, &s, &o, &out);
	REQUIRE(e != NULL);
	CHECK_STR(engine_outcome_name(engine_outcome(e)), "finished");
	REQUIRE(engine_n_endpoints(e) == 1);
	CHECK_NEAR(engine_endpoint(e, 0)->volume_ml, v_eq_ml, 0.01);
	REQUIRE(engine_n_results(e) == 1);
	const engine_result_t *r = engine_result(e, 0);
	REQUIRE(r->has_value);
	/* within 0.1 % of the truth */
	CHECK_NEAR(r->value, ammonia_mmol_l, 0.001 * ammonia_mmol_l);
	/* the steps took their time: 15 mL at 30 s per 10 mL stroke, 20 s stir */
	CHECK_NEAR(out.steps_s, 45.0 + 20.0, 1e-9);
	CHECK(out.duration_s > out.steps_s);
	engine_free(e);

	/* A scenario without the doser the method adds from is refused. */
	s.n_dosers = 0;
	CHECK(simrun_check(&m, &s, why, sizeof why) != 0);
	CHECK(strstr(why, "'acid'") != NULL);
}

/* The addition's variables come from the engine's parameters. */
TEST(steps_formula_reads_the_additions)
{
	method_t m;
	chem_scenario_t s;
	engine_params_t p;
	REQUIRE(fixture_method(BACK_METHOD, &m));
	REQUIRE(fixture_scenario(BACK_SCENARIO, &s));
	simrun_opts_t o = {.seed = 1, .burette_start_ml = -1};
	simrun_params(&m, &s, &o, &p);
	CHECK_INT(p.n_adds, 1);
	CHECK_NEAR(p.add_ml[0], 15.0, 0);
	CHECK_NEAR(p.add_molarity[0], 0.0987, 0);
	CHECK_NEAR(p.add_titer[0], 1.0, 0);
	CHECK_NEAR(p.start_volume_ml, 40.0 + 15.0, 1e-12);
	formula_t f;
	char msg[256];
	int col;
	REQUIRE(formula_compile("add1_ml * add1_molarity * add1_titer", &f, msg, sizeof msg,
	                        &col) == 0);
	formula_vars_t fv;
	memset(&fv, 0, sizeof fv);
	formula_vars_set(&fv, FV_ADD_ML, 15.0);
	formula_vars_set(&fv, FV_ADD_MOLARITY, 0.0987);
	formula_vars_set(&fv, FV_ADD_TITER, 1.01);
	double v = 0;
	CHECK_INT(formula_eval(&f, &fv, &v, msg, sizeof msg), FORMULA_OK);
	CHECK_NEAR(v, 15.0 * 0.0987 * 1.01, 1e-12);
	CHECK_STR(formula_var_name(FV_ADD_TITER + 3), "add4_titer");
	CHECK_STR(formula_var_name(FV_ADD_MOLARITY + 1), "add2_molarity");
}
