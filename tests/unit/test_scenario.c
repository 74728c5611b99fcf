/* test_scenario.c: scenario files: good ones parse to the right values, and
 * every file of the malformed corpus tests/data/scenarios/bad/ is refused with the
 * exact line, column and message (1-based, as editors count). */
#include "harness.h"

#include <stdio.h>

#include "chem.h"
#include "scenario.h"

static const struct {
	const char *file;
	int line, col;
	const char *msg;
} bad_cases[] = {
    {"charge-not-integer.yaml", 3, 61, "sample[1].charge must be a whole number (got \"1.5\")"},
    {"charge-on-strong.yaml", 3, 50,
     "sample[1]: 'charge' applies only to a weak system (with pka); strong components are singly "
     "charged"},
    {"doser-neither-pka-nor-strong.yaml", 4, 9,
     "dosers.acid needs 'pka' (a weak system) or 'strong' (acid, base or salt)"},
    {"dosers-not-a-map.yaml", 3, 9, "dosers must be a mapping of keys (got a list)"},
    {"electrode-unknown-key.yaml", 4, 29,
     "unknown key 'slope' in electrode; did you mean 'slope_pct'?"},
    {"empty-pka.yaml", 3, 43, "sample[1].pka must list at least one pKa value"},
    {"missing-molar.yaml", 3, 5, "missing key 'molar' in sample[1]"},
    {"missing-titrant.yaml", 1, 1, "missing key 'titrant' in the scenario"},
    {"negative-molar.yaml", 3, 32, "sample[1].molar must be between 0 and 20 mol/L (got -0.1)"},
    {"neither-pka-nor-strong.yaml", 3, 5,
     "sample[1] needs 'pka' (a weak system) or 'strong' (acid, base or salt)"},
    {"pka-and-strong.yaml", 3, 51,
     "sample[1] has both 'pka' and 'strong': a component is either a weak system (pka) or strong "
     "(acid, base or salt)"},
    {"pka-not-ascending.yaml", 3, 49,
     "sample[1].pka must be ascending: 3.4 follows 5.2 (list the most acidic step first)"},
    {"quoted-number.yaml", 1, 12,
     "sample_ml must be a number in mL, not a quoted string (got \"10.0\")"},
    {"temperature-too-high.yaml", 1, 16, "temperature_c must be between 0 and 95 degC (got 120)"},
    {"titrant-not-a-list.yaml", 2, 10, "titrant must be a list (got a mapping)"},
    {"titrant-not-acid-or-base.yaml", 3, 3,
     "the titrant is neither an acid nor a base (it must contain a strong acid or base or a weak "
     "system with protons to give or take)"},
    {"too-many-pka.yaml", 3, 39, "sample[1].pka has 7 values; at most 6 are supported"},
    {"unknown-activity.yaml", 1, 11, "activity must be one of davies, ideal (got \"debye\")"},
    {"unknown-key.yaml", 1, 1,
     "unknown key 'temprature_c' in the scenario; did you mean 'temperature_c'?"},
    {"unknown-strong.yaml", 3, 52,
     "sample[1].strong must be one of acid, base, salt (got \"acidic\"; did you mean 'acid'?)"},
    {"volume-with-unit.yaml", 1, 12,
     "sample_ml must be a number in mL, written without a unit (got \"10 mL\")"},
    {"wrong-type.yaml", 1, 16, "temperature_c must be a number in degC (got \"warm\")"},
};

TEST(scenario_bad_corpus_exact_messages)
{
	for (size_t i = 0; i < sizeof bad_cases / sizeof bad_cases[0]; i++) {
		char path[256];
		chem_scenario_t s;
		diag_list_t d = DIAG_LIST_INIT;
		snprintf(path, sizeof path, "tests/data/scenarios/bad/%s", bad_cases[i].file);
		CHECK(scenario_load(path, &s, &d) == -1);
		if (d.n != 1) {
			harness_fail(__FILE__, __LINE__, "%s: %zu errors, want 1", path, d.n);
			diag_print(&d, stdout);
			diag_free(&d);
			continue;
		}
		CHECK_STR(d.v[0].file, path);
		CHECK_INT(d.v[0].line, bad_cases[i].line);
		CHECK_INT(d.v[0].col, bad_cases[i].col);
		CHECK_STR(d.v[0].msg, bad_cases[i].msg);
		diag_free(&d);
	}
}

TEST(scenario_good_files_parse)
{
	static const char *const files[] = {"tests/data/scenarios/acetic-skoog.yaml",
	                                    "tests/data/scenarios/cider.yaml",
	                                    "tests/data/scenarios/alkalinity.yaml"};
	for (size_t i = 0; i < sizeof files / sizeof files[0]; i++) {
		chem_scenario_t s;
		diag_list_t d = DIAG_LIST_INIT;
		CHECK(scenario_load(files[i], &s, &d) == 0);
		CHECK(d.n == 0);
		diag_print(&d, stdout);
		diag_free(&d);
	}
}

TEST(scenario_values_and_defaults)
{
	static const char text[] = "temperature_c: 20\n"
	                           "sample_ml: 10.0\n"
	                           "water_ml: 40.0\n"
	                           "sample:\n"
	                           "  - {name: malic acid, molar: 0.042, pka: [3.40, 5.20]}\n"
	                           "  - {name: ammonium, molar: 0.005, pka: [9.25], charge: 1}\n"
	                           "  - {name: hydrochloric acid, molar: 0.001, strong: acid}\n"
	                           "titrant:\n"
	                           "  - {name: sodium hydroxide, molar: 0.1000, strong: base}\n"
	                           "electrode: {offset_mv: 3.5, slope_pct: 98.0}\n";
	chem_scenario_t s;
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(scenario_parse("cider", text, sizeof text - 1, &s, &d) == 0);
	diag_free(&d);
	CHECK_NEAR(s.temperature_c, 20.0, 0.0);
	CHECK(s.activity == CHEM_ACT_DAVIES);
	CHECK_NEAR(s.sample_ml, 10.0, 0.0);
	CHECK_NEAR(s.water_ml, 40.0, 0.0);
	REQUIRE(s.n_sample == 3 && s.n_titrant == 1);
	CHECK_STR(s.sample[0].name, "malic acid");
	CHECK(s.sample[0].kind == CHEM_WEAK && s.sample[0].n_pka == 2);
	CHECK_NEAR(s.sample[0].pka[1], 5.20, 0.0);
	CHECK_INT(s.sample[0].charge, 0);
	CHECK_INT(s.sample[1].charge, 1);
	CHECK(s.sample[2].kind == CHEM_STRONG_ACID);
	CHECK(s.titrant[0].kind == CHEM_STRONG_BASE);
	CHECK_NEAR(s.titrant[0].molar, 0.1, 0.0);
	CHECK_NEAR(s.electrode.offset_mv, 3.5, 0.0);
	CHECK_NEAR(s.electrode.slope_pct, 98.0, 0.0);
	/* defaults of chem.h for what the file leaves out */
	CHECK_NEAR(s.electrode.tau_s, 1.0, 0.0);
	CHECK_NEAR(s.electrode.noise_mv, 0.1, 0.0);
	CHECK_NEAR(s.electrode.drift_mv_per_min, 0.0, 0.0);
	CHECK_NEAR(s.burette.capacity_ml, 10.0, 0.0);
	CHECK_INT(s.burette.steps, 20000);
	CHECK_NEAR(s.pkw_override, 0.0, 0.0);
}

TEST(scenario_reports_every_error)
{
	static const char text[] = "temperature_c: hot\n"
	                           "sample_ml: -1\n"
	                           "titrant:\n"
	                           "  - {name: x, molar: 0.1, strong: bass}\n";
	chem_scenario_t s;
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(scenario_parse("multi", text, sizeof text - 1, &s, &d) == -1);
	REQUIRE(d.n == 3);
	CHECK_INT(d.v[0].line, 1);
	CHECK_INT(d.v[1].line, 2);
	CHECK_STR(d.v[1].msg, "sample_ml must be between 0 and 5000 mL (got -1)");
	CHECK_INT(d.v[2].line, 4);
	CHECK_INT(d.v[2].col, 35);
	diag_free(&d);
}

TEST(scenario_empty_and_garbage)
{
	chem_scenario_t s;
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(scenario_parse("empty", "", 0, &s, &d) == -1);
	CHECK(d.n >= 1);
	diag_free(&d);
	CHECK(scenario_parse("list", "- 1\n- 2\n", 8, &s, &d) == -1);
	REQUIRE(d.n == 1);
	CHECK_STR(d.v[0].msg, "the scenario must be a mapping of keys (got a list)");
	diag_free(&d);
	static const char many[] = "sample_ml: 1\ntitrant:\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n"
	                           "  - {name: a, molar: 0.1, strong: base}\n";
	CHECK(scenario_parse("many", many, sizeof many - 1, &s, &d) == -1);
	REQUIRE(d.n == 1);
	CHECK_INT(d.v[0].line, 15);
	CHECK_STR(d.v[0].msg, "titrant has more than 12 components");
	diag_free(&d);
}
