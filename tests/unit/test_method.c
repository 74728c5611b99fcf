/* Unit tests for method.c / method_cross.c.
 *
 * The malformed corpus lives in tests/data/methods/bad/: each NAME.yaml has a
 * NAME.expect with the exact "line:col: message" lines method_load must give,
 * in order (an optional first line "# limits: vessel_max_ml=.. burette_capacity_ml=..
 * max_refills=.. [dosers=NAME,NAME]" checks against a station). Every config/methods/ file must
 * pass (each *.yaml there). Tests run with the repository root as the working directory.
 */
#include <dirent.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "harness.h"
#include "method.h"
#include "digest.h"

static char *read_all(const char *path, size_t *len)
{
	FILE *f = fopen(path, "rb");
	char *buf;
	long n;
	if (!f)
		return NULL;
	fseek(f, 0, SEEK_END);
	n = ftell(f);
	fseek(f, 0, SEEK_SET);
	buf = malloc((size_t)n + 1);
	if (buf && fread(buf, 1, (size_t)n, f) != (size_t)n) {
		free(buf);
		buf = NULL;
	}
	fclose(f);
	if (buf) {
		buf[n] = '\0';
		*len = (size_t)n;
	}
	return buf;
}

static int by_name(const void *a, const void *b)
{
	return strcmp(*(char *const *)a, *(char *const *)b);
}

/* Sorted list of the .yaml files in dir (caller frees each and the array). */
static int list_yaml(const char *dir, char ***out)
{
	DIR *d = opendir(dir);
	struct dirent *e;
	char **v = NULL;
	int n = 0;
	if (!d)
		return -1;
	while ((e = readdir(d))) {
		size_t len = strlen(e->d_name);
		if (len < 6 || strcmp(e->d_name + len - 5, ".yaml"))
			continue;
		char **grown = realloc(v, (size_t)(n + 1) * sizeof *v);
		if (!grown)
			abort(); /* a test machine out of memory: stop loudly */
		v = grown;
		v[n] = malloc(strlen(dir) + len + 2);
		if (!v[n])
			abort();
		sprintf(v[n], "%s/%s", dir, e->d_name);
		n++;
	}
	closedir(d);
	qsort(v, (size_t)n, sizeof *v, by_name);
	*out = v;
	return n;
}

static void check_bad_file(const char *path)
{
	char expect_path[512], *expect, *line, *save = NULL;
	size_t len, k = 0;
	method_limits_t lim = {0};
	bool have_lim = false;
	method_t m;
	diag_list_t d = DIAG_LIST_INIT;
	snprintf(expect_path, sizeof expect_path, "%.*s.expect", (int)(strlen(path) - 5), path);
	expect = read_all(expect_path, &len);
	if (!expect) {
		harness_fail(__FILE__, __LINE__, "%s: no %s", path, expect_path);
		return;
	}
	if (!strncmp(expect, "# limits:", 9)) {
		have_lim =
		    sscanf(expect,
		           "# limits: vessel_max_ml=%lf burette_capacity_ml=%lf "
		           "max_refills=%d",
		           &lim.vessel_max_ml, &lim.burette_capacity_ml, &lim.max_refills) == 3;
		if (!have_lim)
			harness_fail(__FILE__, __LINE__, "%s: bad limits line", expect_path);
		/* " dosers=a,b" (or "dosers=" for none) on the same line: the
		 * station's dosing units */
		const char *ds = strstr(expect, " dosers=");
		const char *eol = strchr(expect, '\n');
		if (ds && (!eol || ds < eol)) {
			char names[METHOD_MAX_DOSERS][METHOD_ID_MAX];
			int n = 0;
			ds += 8;
			while (*ds && *ds != '\n' && n < METHOD_MAX_DOSERS) {
				size_t w = strcspn(ds, ",\n");
				snprintf(names[n++], METHOD_ID_MAX, "%.*s", (int)w, ds);
				ds += w + (ds[w] == ',');
			}
			method_limits_add_dosers(&lim, (const char(*)[METHOD_ID_MAX])names, n);
		}
	}
	if (method_load(path, have_lim ? &lim : NULL, &m, &d) == 0)
		harness_fail(__FILE__, __LINE__, "%s: accepted, but it is malformed", path);
	for (line = strtok_r(expect, "\n", &save); line; line = strtok_r(NULL, "\n", &save)) {
		char got[1200];
		if (line[0] == '#')
			continue;
		if (k >= d.n) {
			harness_fail(__FILE__, __LINE__, "%s: missing diagnostic\n    wanted: %s",
			             path, line);
			k++;
			continue;
		}
		snprintf(got, sizeof got, "%d:%d: %s", d.v[k].line, d.v[k].col, d.v[k].msg);
		if (strcmp(got, line) != 0)
			harness_fail(__FILE__, __LINE__, "%s:\n    got:    %s\n    wanted: %s",
			             path, got, line);
		if (strcmp(d.v[k].file, path) != 0)
			harness_fail(__FILE__, __LINE__, "%s: diagnostic names file '%s'", path,
			             d.v[k].file);
		k++;
	}
	for (; k < d.n; k++)
		harness_fail(__FILE__, __LINE__, "%s: unexpected diagnostic\n    got: %d:%d: %s",
		             path, d.v[k].line, d.v[k].col, d.v[k].msg);
	diag_free(&d);
	free(expect);
}

TEST(method_malformed_corpus)
{
	char **files;
	int n = list_yaml("tests/data/methods/bad", &files);
	REQUIRE(n >= 0);
	CHECK(n >= 40);
	for (int i = 0; i < n; i++) {
		check_bad_file(files[i]);
		free(files[i]);
	}
	free(files);
}

TEST(method_examples_pass)
{
	char **files;
	int n = list_yaml("config/methods", &files);
	REQUIRE(n >= 0);
	CHECK(n >= 5);
	for (int i = 0; i < n; i++) {
		method_t m;
		diag_list_t d = DIAG_LIST_INIT;
		/* A 150 mL beaker on a 10 mL burette with 3 refills is the
		 * simulator's station; every example must fit it. */
		method_limits_t lim = {
		    .vessel_max_ml = 150.0, .burette_capacity_ml = 10.0, .max_refills = 3};
		if (method_load(files[i], &lim, &m, &d) != 0) {
			char *all = diag_join(&d);
			harness_fail(__FILE__, __LINE__, "%s:\n%s", files[i], all ? all : "");
			free(all);
		}
		CHECK(m.n_results >= 1);
		diag_free(&d);
		free(files[i]);
	}
	free(files);
}

TEST(method_cider_values)
{
	method_t m;
	diag_list_t d = DIAG_LIST_INIT;
	size_t len;
	char *text = read_all("config/methods/cider-acidity.yaml", &len);
	char hex[65];
	REQUIRE(text);
	REQUIRE(method_load("config/methods/cider-acidity.yaml", NULL, &m, &d) == 0);
	CHECK_STR(m.id, "cider-acidity"); /* the demo queues exactly this id */
	CHECK(m.purpose == PURPOSE_ASSAY);
	CHECK(m.signal == SIGNAL_PH);
	CHECK(m.dosing == DOSING_ADAPTIVE);
	CHECK(m.detect == DETECT_INFLECTION);
	CHECK_NEAR(m.titrant_molarity, 0.1, 1e-12);
	CHECK(m.sample_unit == UNIT_ML);
	CHECK_INT(m.count, 1);
	CHECK(m.has_window);
	CHECK(m.window_lo < m.window_hi);
	CHECK(!m.has_target);
	CHECK_INT(m.n_results, 1);
	CHECK_STR(m.results[0].name, "acidity");
	CHECK_STR(m.results[0].unit, "g/L");
	CHECK(m.results[0].formula.n > 0);
	CHECK(m.results[0].has_min && m.results[0].has_max);
	/* the fingerprint is of the exact bytes, and method_parse agrees */
	digest_sha256_hex(text, len, hex);
	CHECK_STR(m.sha256, hex);
	{
		method_t m2;
		REQUIRE(method_parse("cider-acidity.yaml", text, len, NULL, &m2, &d) == 0);
		CHECK_STR(m2.sha256, hex);
		CHECK(memcmp(&m, &m2, sizeof m) == 0); /* plain data, same either way */
	}
	diag_free(&d);
	free(text);
}

static const char minimal[] = "method: tiny\n"
                              "title: Smallest valid method\n"
                              "revision: 1\n"
                              "titrant: {name: NaOH, molarity: 0.1}\n"
                              "sample: {unit: mL}\n"
                              "detect: {kind: inflection}\n"
                              "stop: {volume_max_ml: 20}\n";

TEST(method_documented_defaults)
{
	/* docs/methods.md lists these defaults; a change here is a change there. */
	method_t m;
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(method_parse("tiny.yaml", minimal, strlen(minimal), NULL, &m, &d) == 0);
	CHECK(m.purpose == PURPOSE_ASSAY);
	CHECK(m.signal == SIGNAL_PH);
	CHECK_NEAR(m.sample_min, 0.001, 0);
	CHECK_NEAR(m.sample_max, 1000, 0);
	CHECK_NEAR(m.stir_s, 10, 0);
	CHECK_NEAR(m.initial_ml, 0, 0);
	CHECK(m.dosing == DOSING_ADAPTIVE);
	CHECK_NEAR(m.step_aim, 0.10, 0);
	CHECK_NEAR(m.dose_min_ml, 0.005, 0);
	CHECK_NEAR(m.dose_max_ml, 0.50, 0);
	CHECK_NEAR(m.wait_min_s, 2, 0);
	CHECK_NEAR(m.wait_max_s, 30, 0);
	CHECK_NEAR(m.still_within, 0.02, 0);
	CHECK_NEAR(m.still_for_s, 3, 0);
	CHECK_INT(m.count, 1);
	CHECK_NEAR(m.min_jump, 0.5, 0);
	CHECK(!m.has_window && !m.has_target && !m.has_signal_limit);
	CHECK_NEAR(m.past_endpoint_ml, 0.5, 0);
	CHECK_NEAR(m.volume_max_ml, 20, 0);
	CHECK_NEAR(m.time_max_s, 1800, 0);
	CHECK_INT(m.n_results, 0);
	CHECK_INT(m.replicates, 1);
	CHECK_NEAR(m.max_rsd_pct, 0, 0);
	CHECK_INT(d.n, 0);
	diag_free(&d);
}

TEST(method_replicates_key)
{
	/* replicates: {count, max_rsd_pct} (docs/methods.md, "replicates"). */
	char text[1024];
	method_t m;
	diag_list_t d = DIAG_LIST_INIT;
	snprintf(text, sizeof text, "%sreplicates: {count: 3, max_rsd_pct: 0.5}\n", minimal);
	REQUIRE(method_parse("tiny.yaml", text, strlen(text), NULL, &m, &d) == 0);
	CHECK_INT(m.replicates, 3);
	CHECK_NEAR(m.max_rsd_pct, 0.5, 0);
	snprintf(text, sizeof text, "%sreplicates: {count: 21, max_rsd_pct: 0.5}\n", minimal);
	CHECK_INT(method_parse("tiny.yaml", text, strlen(text), NULL, &m, &d), -1);
	REQUIRE(d.n == 1);
	CHECK_STR(d.v[0].msg, "replicates.count must be between 1 and 20 (got 21)");
	CHECK_INT(d.v[0].line, 8);
	diag_free(&d);
}

TEST(method_mv_defaults_and_constant_mode)
{
	static const char text[] = "method: mvc\n"
	                           "title: mV constant\n"
	                           "revision: 4\n"
	                           "purpose: blank\n"
	                           "titrant: {name: KOH in propan-2-ol, molarity: 0.1}\n"
	                           "signal: mv\n"
	                           "dosing: {mode: constant, dose_ml: 0.05}\n"
	                           "detect: {kind: gran, window: [-300, -50]}\n"
	                           "stop: {volume_max_ml: 5, signal_limit: -350}\n"
	                           "results: [{name: blank, formula: end1_ml, unit: mL}]\n";
	method_t m;
	diag_list_t d = DIAG_LIST_INIT;
	int rc = method_parse("request", text, strlen(text), NULL, &m, &d);
	char *all = diag_join(&d);
	CHECK(rc == 0);
	if (rc != 0)
		harness_fail(__FILE__, __LINE__, "%s", all ? all : "");
	free(all);
	CHECK(m.purpose == PURPOSE_BLANK);
	CHECK_NEAR(m.sample_min, 0, 0); /* a blank may have amount 0 */
	CHECK(m.signal == SIGNAL_MV);
	CHECK_NEAR(m.still_within, 1.0, 0);
	CHECK_NEAR(m.min_jump, 30.0, 0);
	CHECK(m.dosing == DOSING_CONSTANT);
	CHECK_NEAR(m.dose_ml, 0.05, 0);
	CHECK_NEAR(m.dose_min_ml, 0.05, 0);
	CHECK_NEAR(m.dose_max_ml, 0.05, 0);
	CHECK(m.detect == DETECT_GRAN);
	CHECK(m.has_window);
	CHECK_NEAR(m.window_lo, -300, 0);
	CHECK(m.has_signal_limit);
	CHECK_NEAR(m.signal_limit, -350, 0);
	CHECK_INT(m.revision, 4);
	diag_free(&d);
}

TEST(method_standardize_by_molarity)
{
	/* A standardize run may report the measured molarity instead of the
	 * titer: standardization_titer_from_result (calib.h) divides it by the nominal. */
	static const char text[] =
	    "method: khp-molarity\n"
	    "title: NaOH against KHP, as mol/L\n"
	    "revision: 1\n"
	    "purpose: standardize\n"
	    "titrant: {name: NaOH 0.1 mol/L, molarity: 0.1}\n"
	    "sample: {unit: g, min: 0.3, max: 0.7}\n"
	    "detect: {kind: inflection}\n"
	    "stop: {volume_max_ml: 40}\n"
	    "results:\n"
	    "  - {name: molarity, formula: 1000 * amount / (204.22 * end1_ml),"
	    " unit: mol/L}\n";
	method_t m;
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(method_parse("khp-molarity.yaml", text, strlen(text), NULL, &m, &d) == 0);
	CHECK_INT(d.n, 0);
	CHECK(m.purpose == PURPOSE_STANDARDIZE);
	CHECK(m.sample_unit == UNIT_G);
	diag_free(&d);
}

TEST(method_too_large)
{
	/* yamltree refuses more than 256 KiB before parsing anything. */
	size_t len = 300 * 1024;
	char *big = malloc(len);
	method_t m;
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(big);
	memset(big, '#', len);
	memcpy(big, minimal, strlen(minimal));
	big[strlen(minimal)] = '#';
	CHECK(method_parse("big.yaml", big, len, NULL, &m, &d) == -1);
	REQUIRE(d.n == 1);
	CHECK_INT(d.v[0].line, 1);
	CHECK_STR(d.v[0].msg, "file is too large: 307200 bytes (at most 256 KiB)");
	diag_free(&d);
	free(big);
}

TEST(method_formula_column_with_crlf_and_escapes)
{
	/* Windows line ends, and an escape before the bad spot in a quoted
	 * formula: the column still lands on the character. */
	static const char text[] = "method: crlf\r\n"
	                           "title: CRLF\r\n"
	                           "revision: 1\r\n"
	                           "titrant: {name: NaOH, molarity: 0.1}\r\n"
	                           "sample: {unit: mL}\r\n"
	                           "detect: {kind: inflection}\r\n"
	                           "stop: {volume_max_ml: 20}\r\n"
	                           "results:\r\n"
	                           "  - name: a\r\n"
	                           "    formula: \"\\x20end1_ml @ 2\"\r\n";
	method_t m;
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(method_parse("crlf.yaml", text, strlen(text), NULL, &m, &d) == -1);
	REQUIRE(d.n == 1);
	CHECK_INT(d.v[0].line, 10);
	/* `    formula: "` is 14 characters, \x20 four more, `end1_ml ` eight: '@' at 27 */
	CHECK_INT(d.v[0].col, 27);
	CHECK_STR(d.v[0].msg, "results[1].formula: unexpected '@' (allowed: numbers, variables, "
	                      "+ - * / and parentheses)");
	diag_free(&d);
}

TEST(method_mangled_bytes_never_crash)
{
	/* Property: any byte-level damage to a valid file gives either a valid
	 * method or errors with positions inside the file; never a crash. */
	size_t len;
	char *text = read_all("config/methods/cider-acidity.yaml", &len);
	unsigned seed = 12345;
	int rounds = harness_quick() ? 40 : 400;
	REQUIRE(text);
	for (int r = 0; r < rounds; r++) {
		char *copy = malloc(len);
		method_t m;
		diag_list_t d = DIAG_LIST_INIT;
		int flips = 1 + r % 4, lines = 1;
		memcpy(copy, text, len);
		for (int k = 0; k < flips; k++) {
			seed = seed * 1103515245u + 12345u;
			size_t at = (seed >> 8) % len;
			seed = seed * 1103515245u + 12345u;
			copy[at] = (char)(seed >> 16);
		}
		for (size_t i = 0; i < len; i++)
			lines += copy[i] == '\n';
		if (method_parse("cider-acidity.yaml", copy, len, NULL, &m, &d) != 0)
			CHECK(d.n > 0);
		for (size_t i = 0; i < d.n; i++)
			CHECK(d.v[i].line >= 0 && d.v[i].line <= lines + 1);
		diag_free(&d);
		free(copy);
	}
	free(text);
}

TEST(method_enum_names)
{
	CHECK_STR(method_purpose_name(PURPOSE_STANDARDIZE), "standardize");
	CHECK_STR(method_signal_name(SIGNAL_MV), "mv");
	CHECK_STR(method_detect_name(DETECT_GRAN), "gran");
	CHECK_STR(method_unit_name(UNIT_G), "g");
}
