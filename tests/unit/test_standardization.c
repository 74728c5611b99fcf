/* test_standardization.c: calibration and standardization on the in-process
 * simulated bench (beaker.h, simrun.h) on a virtual clock:
 *   - the calibration session recovers the beaker's electrode;
 *   - a KHP standardization, read through that calibration, recovers the
 *     titrant's true molarity within 0.1 %, and replicates pass the RSD limit;
 *   - a later assay's result changes exactly as expected with the titer (the
 *     blank's share is checked on the formula in test_calib.c: simrun has no
 *     blank option).
 */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "beaker.h"
#include "calib.h"
#include "standardization.h"
#include "titer_book.h"
#include "chem.h"
#include "scenario.h"
#include "engine.h"
#include "fixtures.h"
#include "harness.h"
#include "method.h"
#include "simrun.h"

/* Orchard Lane Cider's NaOH check against KHP; results with enough decimals
 * that rounding stays far below the 0.1 % asked of the molarity. */
static const char khp_method[] =
    "method: khp-bench\n"
    "title: NaOH against KHP on the simulated bench\n"
    "revision: 1\n"
    "purpose: standardize\n"
    "titrant: {name: NaOH 0.1 mol/L, molarity: 0.1000}\n"
    "sample: {unit: g, min: 0.1, max: 1.0}\n"
    "signal: ph\n"
    "start: {stir_s: 10}\n"
    "dosing: {mode: adaptive, step_aim: 0.10, dose_min_ml: 0.005, dose_max_ml: 0.50}\n"
    "settle: {wait_min_s: 2, wait_max_s: 30, still_within: 0.02, still_for_s: 3}\n"
    "detect: {kind: inflection, count: 1, min_jump: 1.0, window: [6.5, 11.0]}\n"
    "stop: {past_endpoint_ml: 1.0, volume_max_ml: 40.0, signal_limit: 12.0, time_max_s: 3600}\n"
    "results:\n"
    "  - {name: titer, formula: 1000 * amount / (204.22 * end1_ml * titrant_molarity),"
    " unit: \"\", decimals: 6}\n"
    "  - {name: molarity, formula: 1000 * amount / (204.22 * end1_ml),"
    " unit: mol/L, decimals: 6}\n";

static const char acidity_method[] =
    "method: cider-bench\n"
    "title: Titratable acidity as malic acid, bench test\n"
    "revision: 1\n"
    "purpose: assay\n"
    "titrant: {name: NaOH 0.1 mol/L, molarity: 0.1000}\n"
    "sample: {unit: mL, min: 1.0, max: 50.0}\n"
    "signal: ph\n"
    "start: {stir_s: 10}\n"
    "dosing: {mode: adaptive, step_aim: 0.10, dose_min_ml: 0.005, dose_max_ml: 0.50}\n"
    "settle: {wait_min_s: 2, wait_max_s: 30, still_within: 0.02, still_for_s: 3}\n"
    "detect: {kind: inflection, count: 1, min_jump: 0.8, window: [5.5, 11.5]}\n"
    "stop: {past_endpoint_ml: 1.0, volume_max_ml: 25.0, signal_limit: 12.5, time_max_s: 3600}\n"
    "results:\n"
    "  - {name: acidity, formula: end1_ml * titrant_molarity * titer * 67.04"
    " / amount, unit: g/L, decimals: 9}\n";

#define KHP_G               0.5106 /* weighed KHP, g */
#define TRUE_NAOH           0.1023 /* the bottle's true molarity, mol/L */
#define BENCH_T_C           22.0   /* room temperature, degC */
#define ELECTRODE_SLOPE_PCT 98.4
#define ELECTRODE_OFFSET_MV -7.5

static void electrode(chem_scenario_t *s)
{
	s->electrode.offset_mv = ELECTRODE_OFFSET_MV;
	s->electrode.slope_pct = ELECTRODE_SLOPE_PCT;
	s->electrode.tau_s = 2.2; /* t90 5 s: docs/chemistry.md §10 (common practice) */
	s->electrode.noise_mv = 0.1;
	s->electrode.drift_mv_per_min = 0.0;
}

static bool khp_scenario(chem_scenario_t *s)
{
	char yaml[1024];
	/* KHP as phthalic acid (pKa 2.950, 5.408, docs/chemistry.md §1 [M]) plus
	 * one equivalent of potassium as strong base; KHP_G g in 50 mL. */
	double molar = KHP_G / 204.22 / 0.050;
	snprintf(yaml, sizeof yaml,
	         "temperature_c: %g\n"
	         "sample_ml: 50.0\n"
	         "sample:\n"
	         "  - {name: phthalic acid, molar: %.8f, pka: [2.950, 5.408]}\n"
	         "  - {name: potassium, molar: %.8f, strong: base}\n"
	         "titrant:\n"
	         "  - {name: sodium hydroxide, molar: %g, strong: base}\n"
	         "burette: {capacity_ml: 10.0, steps: 20000}\n",
	         BENCH_T_C, molar, molar, TRUE_NAOH);
	diag_list_t d = DIAG_LIST_INIT;
	int rc = scenario_parse("khp", yaml, strlen(yaml), s, &d);
	diag_free(&d);
	electrode(s);
	return rc == 0;
}

/* A beaker at true pH `ph`: a half-neutralized weak acid whose pKa is tuned
 * until the model gives ph (ideal activities, concentrated). */
static void buffer_scenario(chem_scenario_t *s, double ph)
{
	memset(s, 0, sizeof *s);
	scenario_defaults(s);
	s->temperature_c = BENCH_T_C;
	s->activity = CHEM_ACT_IDEAL;
	s->sample_ml = 50.0;
	s->n_sample = 2;
	snprintf(s->sample[0].name, CHEM_NAME_MAX, "buffer acid");
	s->sample[0].kind = CHEM_WEAK;
	s->sample[0].molar = 0.5;
	s->sample[0].n_pka = 1;
	s->sample[0].pka[0] = ph;
	snprintf(s->sample[1].name, CHEM_NAME_MAX, "sodium");
	s->sample[1].kind = CHEM_STRONG_BASE;
	s->sample[1].molar = 0.25;
	s->n_titrant = 1;
	snprintf(s->titrant[0].name, CHEM_NAME_MAX, "sodium hydroxide");
	s->titrant[0].kind = CHEM_STRONG_BASE;
	s->titrant[0].molar = 0.1;
	electrode(s);
	for (int i = 0; i < 6; i++)
		s->sample[0].pka[0] -= chem_ph(s, 0.0) - ph;
}

/* Calibrate the bench electrode with IUPAC buffers at BENCH_T_C. */
static calib_result_t bench_calibration(beaker_t *b)
{
	const double nominal[] = {4.005, 6.865, 9.180};
	calib_config_t cfg;
	calib_config_defaults(&cfg);
	calib_result_t res;
	memset(&res, 0, sizeof res);
	char err[160];
	calib_session_t *s = calib_session_new(&cfg, nominal, 3, err, sizeof err);
	if (!s)
		return res;
	double t_s = 0;
	for (int i = 0; i < 3 && calib_session_state(s) == CALIB_WAITING; i++) {
		calib_buffer_t buf;
		calib_buffer_lookup(&cfg, nominal[i], &buf);
		chem_scenario_t sc;
		buffer_scenario(&sc, calib_buffer_ph(&buf, BENCH_T_C));
		beaker_load(b, &sc);
		calib_session_next(s, t_s, err, sizeof err);
		while (calib_session_state(s) == CALIB_MEASURING && t_s < 1e4) {
			beaker_advance(b, 0.25);
			t_s += 0.25;
			calib_reading_t r = {t_s, beaker_mv(b), beaker_temperature_c(b)};
			calib_session_feed(s, &r);
		}
	}
	calib_session_result(s, 1.8e9, &res);
	calib_session_free(s);
	return res;
}

static double result_value(const engine_t *e, const char *name)
{
	for (int i = 0; i < engine_n_results(e); i++) {
		const engine_result_t *r = engine_result(e, i);
		if (strcmp(r->name, name) == 0 && r->has_value)
			return r->value;
	}
	return NAN;
}

TEST(standardization_khp_on_the_bench_recovers_true_molarity)
{
	/* 1. Calibrate the bench's electrode. */
	chem_scenario_t sc;
	REQUIRE(khp_scenario(&sc));
	beaker_t *b = beaker_new(&sc, 42);
	REQUIRE(b);
	calib_result_t cal = bench_calibration(b);
	beaker_free(b);
	REQUIRE(cal.state == CALIB_ACCEPTED);
	CHECK_NEAR(cal.slope_pct, ELECTRODE_SLOPE_PCT, 0.2);
	CHECK_NEAR(cal.offset_mv, ELECTRODE_OFFSET_MV, 0.5);

	/* 2. Standardize, reading pH through that calibration; replicates. */
	method_t m;
	REQUIRE(fixture_method(khp_method, &m));
	int n_rep = harness_quick() ? 2 : 3;
	double titers[3];
	for (int k = 0; k < n_rep; k++) {
		simrun_opts_t o = {0};
		o.seed = 100 + (unsigned long long)k;
		o.has_amount = true;
		o.amount = KHP_G;
		o.has_calibration = true;
		o.cal_slope_pct = cal.slope_pct;
		o.cal_offset_mv = cal.offset_mv;
		o.titer = 1.0;
		o.burette_start_ml = -1;
		simrun_out_t out;
		engine_t *e = simrun_run(&m, &sc, &o, &out);
		REQUIRE(e);
		CHECK(!out.stuck);
		CHECK_INT(engine_n_endpoints(e), 1);
		/* Equivalence: KHP_G/204.22 mol over TRUE_NAOH mol/L = 24.44 mL. */
		double molarity = result_value(e, "molarity");
		CHECK_NEAR(molarity, TRUE_NAOH, TRUE_NAOH * 0.001);
		/* the daemon keeps the `titer` result; it must agree with molarity */
		titers[k] = NAN;
		CHECK_INT(standardization_titer_from_result("titer", "", result_value(e, "titer"),
		                                            m.titrant_molarity, &titers[k]),
		          0);
		CHECK_NEAR(titers[k], molarity / m.titrant_molarity, 1e-5);
		engine_free(e);
	}
	standardization_result_t r;
	CHECK_INT(standardization_replicates(titers, n_rep, 0.2, &r), 0);
	CHECK(r.accepted);
	CHECK_NEAR(r.mean, TRUE_NAOH / 0.1000, TRUE_NAOH / 0.1000 * 0.001);
	CHECK(r.rsd_pct < 0.2);
}

TEST(standardization_titer_changes_a_bench_result_exactly)
{
	/* Orchard Lane Cider: 10 mL of cider; the same run (same seed, same
	 * noise) evaluated with another titer and blank. Titer and blank do not
	 * change the dosing, so end1_ml is identical and the result moves exactly
	 * as the formula says. */
	static const char cider[] = "temperature_c: 20\n"
	                            "sample_ml: 10.0\n"
	                            "water_ml: 40.0\n"
	                            "sample:\n"
	                            "  - {name: malic acid, molar: 0.042, pka: [3.40, 5.20]}\n"
	                            "titrant:\n"
	                            "  - {name: sodium hydroxide, molar: 0.1023, strong: base}\n"
	                            "electrode: {offset_mv: 3.0, slope_pct: 99.0, tau_s: 2.0,"
	                            " noise_mv: 0.1}\n";
	chem_scenario_t sc;
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(scenario_parse("cider", cider, strlen(cider), &sc, &d) == 0);
	diag_free(&d);
	method_t m;
	REQUIRE(fixture_method(acidity_method, &m));
	double v[2], end_ml[2];
	const double titer[2] = {1.0000, 1.0230};
	for (int k = 0; k < 2; k++) {
		simrun_opts_t o = {0};
		o.seed = 7;
		o.has_amount = true;
		o.amount = 10.0;
		o.titer = titer[k];
		o.burette_start_ml = -1;
		simrun_out_t out;
		engine_t *e = simrun_run(&m, &sc, &o, &out);
		REQUIRE(e);
		REQUIRE(engine_n_endpoints(e) == 1);
		end_ml[k] = engine_endpoint(e, 0)->volume_ml;
		v[k] = result_value(e, "acidity");
		engine_free(e);
	}
	CHECK_NEAR(end_ml[1], end_ml[0], 0);
	CHECK_NEAR(v[1] / v[0], 1.0230, 1e-8);
	/* With the true titer the result is right: 0.042 mol/L malic acid gives
	 * 2 x 0.042 mol NaOH per litre, at 67.04 g malic acid per mol NaOH
	 * (134.087/2, docs/chemistry.md §7): 5.631 g/L (0.5 %: endpoint accuracy). */
	CHECK_NEAR(v[1], 0.042 * 2 * 67.04, 0.042 * 2 * 67.04 * 0.005);
	CHECK(fabs(v[0] - 0.042 * 2 * 67.04) > 0.02 * 0.042 * 2 * 67.04 * 0.5);
}

/* The daemon's titer book keeps one series per titrant however many
 * titrants there are: before, the ninth titrant silently took the first's
 * slot and lost its replicates. */
TEST(titer_book_has_no_silent_limit)
{
	titer_book_t *b = titer_book_new();
	REQUIRE(b);
	standardization_config_t cfg;
	standardization_config_defaults(&cfg); /* 3 replicates, RSD <= 0.2 % */
	standardization_result_t res;
	char name[32];
	int rep = 0;
	/* Two replicates each of 12 titrants... */
	for (int k = 0; k < 2; k++)
		for (int t = 0; t < 12; t++) {
			snprintf(name, sizeof name, "NaOH lot %d", t);
			CHECK(!titer_book_add(b, &cfg, name, 1.0010, &rep, &res));
			CHECK_INT(rep, k + 1);
		}
	CHECK_INT(titer_book_titrants(b), 12);
	/* ... then the third of each completes every series. */
	for (int t = 0; t < 12; t++) {
		snprintf(name, sizeof name, "NaOH lot %d", t);
		CHECK(titer_book_add(b, &cfg, name, 1.0010, &rep, &res));
		CHECK_INT(rep, 3);
		CHECK_INT(res.n, 3);
		CHECK(res.accepted);
	}
	titer_book_free(b);
}
