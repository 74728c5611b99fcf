/* test_calib.c: buffer tables, the calibration session and fit, using a
 * calibration, titrant standardization (calib.h).
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "calib.h"
#include "standardization.h"
#include "chem.h"
#include "formula.h"
#include "harness.h"
#include "yamltree.h"

/* IUPAC 2002 (Buck et al., Pure Appl. Chem. 74, 2169) pH(PS), as copied in
 * docs/chemistry.md §3. The full 3-decimal rows are [M] (from memory); the 25
 * degC values are [S] (Hamer, Pinching & Acree 1946; Partanen & Minkkinen 1996;
 * Bates et al. 1969). Typed here independently of calib_tables.c. */
static const double ref_t_c[] = {5, 10, 15, 20, 25, 30, 35, 37, 40, 50};
static const struct {
	double nominal;
	double ph[10];
} ref_iupac[] = {
    {4.005, {3.998, 3.997, 3.998, 4.000, 4.005, 4.011, 4.018, 4.022, 4.027, 4.050}}, /* KHP */
    {6.865, {6.951, 6.923, 6.900, 6.881, 6.865, 6.853, 6.844, 6.841, 6.838, 6.833}}, /* phosphate */
    {9.180, {9.395, 9.332, 9.276, 9.225, 9.180, 9.139, 9.102, 9.088, 9.068, 9.011}}, /* borax */
    {10.012,
     {10.245, 10.179, 10.118, 10.062, 10.012, 9.966, 9.926, 9.910, 9.889, 9.828}}, /* carbonate */
};

TEST(calib_iupac_tables_5_to_50_c)
{
	for (size_t b = 0; b < sizeof ref_iupac / sizeof ref_iupac[0]; b++) {
		calib_buffer_t buf;
		CHECK_INT(calib_buffer_lookup(NULL, ref_iupac[b].nominal, &buf), CALIB_BUF_IUPAC);
		for (size_t i = 0; i < sizeof ref_t_c / sizeof ref_t_c[0]; i++)
			CHECK_NEAR(calib_buffer_ph(&buf, ref_t_c[i]), ref_iupac[b].ph[i], 0.005);
	}
	/* Between rows: linear interpolation, e.g. KHP at 22.5 degC lies between
	 * 4.000 (20) and 4.005 (25). */
	calib_buffer_t khp;
	calib_buffer_lookup(NULL, 4.005, &khp);
	CHECK_NEAR(calib_buffer_ph(&khp, 22.5), 4.0025, 0.0005);
	/* Cross-check of the shape between rows against an independent closed
	 * form: Hetzer, Durst, Robinson & Bates 1977 (NBS basis, about 0.003 above
	 * the IUPAC rows; docs/chemistry.md §3 [S]). */
	for (double t_c = 7.5; t_c <= 42.5; t_c += 5.0) {
		double t_k = t_c + 273.15;
		double nbs = 2073.44 / t_k - 13.3270 + 0.045199 * t_k - 3.4846e-5 * t_k * t_k;
		CHECK_NEAR(calib_buffer_ph(&khp, t_c), nbs - 0.003, 0.004);
	}
	/* Tetroxalate (secondary; NBS, Bates 1962 [M]; JIS 2-decimal [S]: 1.67 at
	 * 5 degC, 1.68 at 25, 1.71 at 50). */
	calib_buffer_t tet;
	CHECK_INT(calib_buffer_lookup(NULL, 1.68, &tet), CALIB_BUF_IUPAC);
	CHECK_NEAR(calib_buffer_ph(&tet, 5), 1.67, 0.005);
	CHECK_NEAR(calib_buffer_ph(&tet, 25), 1.68, 0.005);
	CHECK_NEAR(calib_buffer_ph(&tet, 50), 1.71, 0.005);
	/* Outside the table: no value rather than a guess. */
	CHECK(isnan(calib_buffer_ph(&khp, 55.0)));
	CHECK(isnan(calib_buffer_ph(&khp, -1.0)));
}

TEST(calib_buffer_lookup_names)
{
	calib_buffer_t b;
	CHECK_INT(calib_buffer_lookup(NULL, 6.86, &b), CALIB_BUF_IUPAC);
	CHECK_NEAR(calib_buffer_ph(&b, 37), 6.841, 1e-9);
	CHECK_INT(calib_buffer_lookup(NULL, 9.18, &b), CALIB_BUF_IUPAC);
	CHECK_INT(calib_buffer_lookup(NULL, 4.00, &b), CALIB_BUF_IUPAC); /* KHP */
	CHECK_INT(calib_buffer_lookup(NULL, 4.01, &b), CALIB_BUF_TECHNICAL);
	/* Technical tables are common practice (typical makers' tables) [M]. */
	CHECK_NEAR(calib_buffer_ph(&b, 25), 4.01, 1e-9);
	CHECK_INT(calib_buffer_lookup(NULL, 7.00, &b), CALIB_BUF_TECHNICAL);
	CHECK_NEAR(calib_buffer_ph(&b, 25), 7.00, 1e-9);
	CHECK(calib_buffer_ph(&b, 10) > 7.0); /* phosphate buffers rise when cold */
	CHECK_INT(calib_buffer_lookup(NULL, 10.01, &b), CALIB_BUF_TECHNICAL);
	CHECK(calib_buffer_ph(&b, 40) < 10.0);
	/* No table: the value as given at any temperature. */
	CHECK_INT(calib_buffer_lookup(NULL, 12.45, &b), CALIB_BUF_CUSTOM);
	CHECK_NEAR(calib_buffer_ph(&b, 5), 12.45, 1e-12);
	CHECK_NEAR(calib_buffer_ph(&b, 60), 12.45, 1e-12);
	CHECK_INT(calib_technical_count(), 3);
	CHECK(calib_iupac_count() >= 5);
}

static int load_cfg(const char *yaml, calib_config_t *c, diag_list_t *d)
{
	yt_doc_t doc;
	if (yt_load_buffer("stopcockd.yaml", yaml, strlen(yaml), &doc, d) != 0)
		return -2;
	int rc = calib_config_parse(&doc, yt_get(doc.root, "calibration"), c, d);
	yt_free(&doc);
	return rc;
}

TEST(calib_config_parse_keys)
{
	calib_config_t c;
	diag_list_t d = DIAG_LIST_INIT;
	const char *good = "calibration:\n"
	                   "  slope_pct: [92, 104]\n"
	                   "  offset_mv: [-20, 25]\n"
	                   "  expires_h: 8\n"
	                   "  stable: {drift_mv: 0.2, window_s: 8, min_s: 4, max_s: 90}\n"
	                   "  buffers:\n"
	                   "    - nominal: 4.01\n"
	                   "      name: Fernhill bottle 4.01\n"
	                   "      table: [[0, 4.02], [25, 4.01], [50, 4.05]]\n";
	CHECK_INT(load_cfg(good, &c, &d), 0);
	CHECK_INT(d.n, 0);
	CHECK_NEAR(c.slope_min_pct, 92, 0);
	CHECK_NEAR(c.slope_max_pct, 104, 0);
	CHECK_NEAR(c.offset_min_mv, -20, 0);
	CHECK_NEAR(c.expires_h, 8, 0);
	CHECK_NEAR(c.stable_drift_mv, 0.2, 1e-12);
	CHECK_NEAR(c.stable_max_s, 90, 0);
	CHECK_INT(c.n_lab, 1);
	calib_buffer_t b;
	CHECK_INT(calib_buffer_lookup(&c, 4.01, &b), CALIB_BUF_LAB); /* the lab's table wins */
	CHECK_STR(b.name, "Fernhill bottle 4.01");
	CHECK_NEAR(calib_buffer_ph(&b, 37.5), 4.03, 1e-9);
	diag_free(&d);

	/* Absent key: defaults (common practice, docs/chemistry.md §4). */
	CHECK_INT(load_cfg("stations: []\n", &c, &d), 0);
	CHECK_NEAR(c.slope_min_pct, 95, 0);
	CHECK_NEAR(c.slope_max_pct, 105, 0);
	CHECK_NEAR(c.offset_max_mv, 30, 0);
	CHECK_NEAR(c.expires_h, 24, 0);

	const char *bad = "calibration:\n"
	                  "  slope_pct: [105, 95]\n"
	                  "  expiry_h: 8\n"
	                  "  buffers:\n"
	                  "    - {nominal: 7.00, table: [[25, 7.00], [20, 7.02]]}\n";
	CHECK_INT(load_cfg(bad, &c, &d), -1);
	CHECK_INT(d.n, 3);
	char *all = diag_join(&d);
	REQUIRE(all);
	CHECK(strstr(all, "stopcockd.yaml:2:") != NULL); /* slope MIN above MAX */
	CHECK(strstr(all, "expiry_h") != NULL);
	CHECK(strstr(all, "stopcockd.yaml:5:") != NULL && strstr(all, "rise") != NULL);
	free(all);
	diag_free(&d);
}

/* ---- a simulated electrode for session tests ---- */

typedef struct sim_probe {
	double offset_mv, slope_pct, tau_s, noise_mv, drift_mv_per_min;
	double lag_mv; /* first-order lagged potential */
	unsigned long long rng;
} sim_probe_t;

static double sim_gauss(sim_probe_t *p)
{
	/* Deterministic LCG + Box-Muller: the same noise on every run. */
	double u[2];
	for (int i = 0; i < 2; i++) {
		p->rng = p->rng * 6364136223846793005ULL + 1442695040888963407ULL;
		u[i] = ((double)(p->rng >> 11) + 0.5) / 9007199254740992.0;
	}
	return sqrt(-2.0 * log(u[0])) * cos(2.0 * M_PI * u[1]);
}

/* Measure one buffer of true pH `ph` at t_c: `next`, then readings every
 * 0.5 s until the session leaves MEASURING or max_s passes. */
static calib_state_t sim_buffer(calib_session_t *s, sim_probe_t *p, double *t_s, double ph,
                                double t_c, double max_s)
{
	char err[128];
	if (calib_session_next(s, *t_s, err, sizeof err) != 0)
		return calib_session_state(s);
	double target = chem_mv_from_ph(p->offset_mv, p->slope_pct, ph, t_c);
	double until = *t_s + max_s;
	calib_state_t st = CALIB_MEASURING;
	while (st == CALIB_MEASURING && *t_s < until) {
		*t_s += 0.5;
		p->lag_mv += (target - p->lag_mv) * (1.0 - exp(-0.5 / p->tau_s));
		calib_reading_t r = {.t_s = *t_s,
		                     .mv = p->lag_mv + p->noise_mv * sim_gauss(p) +
		                           p->drift_mv_per_min * *t_s / 60.0,
		                     .temperature_c = t_c};
		st = calib_session_feed(s, &r);
	}
	return st;
}

/* Calibrate 4.01/7.00/10.01 with the given electrode at t_c; returns the result. */
static calib_result_t sim_calibrate(const calib_config_t *cfg, sim_probe_t *p, double t_c)
{
	const double nominal[] = {4.01, 7.00, 10.01};
	char err[160];
	calib_result_t res;
	memset(&res, 0, sizeof res);
	calib_session_t *s = calib_session_new(cfg, nominal, 3, err, sizeof err);
	if (!s)
		return res;
	double t_s = 100.0;
	for (int i = 0; i < 3; i++) {
		calib_buffer_t b;
		calib_buffer_lookup(cfg, nominal[i], &b);
		calib_state_t st = sim_buffer(s, p, &t_s, calib_buffer_ph(&b, t_c), t_c, 600.0);
		if (st != CALIB_WAITING)
			break;
	}
	calib_session_result(s, 1.8e9, &res);
	calib_session_free(s);
	return res;
}

TEST(calib_fit_exact_and_weighted)
{
	/* Synthetic readings from the electrode equation (chem_mv_from_ph):
	 * the fit must give back slope and offset, also when each buffer was
	 * read at another temperature. */
	const double ph[] = {4.005, 6.865, 9.180};
	double mv[3], t_c[3] = {18.0, 25.0, 31.0};
	for (int i = 0; i < 3; i++)
		mv[i] = chem_mv_from_ph(-12.4, 97.3, ph[i], t_c[i]);
	double slope_pct, offset_mv;
	REQUIRE(calib_fit(ph, mv, t_c, 3, &slope_pct, &offset_mv) == 0);
	CHECK_NEAR(slope_pct, 97.3, 1e-9);
	CHECK_NEAR(offset_mv, -12.4, 1e-9);
	/* Two buffers are enough. */
	REQUIRE(calib_fit(ph, mv, t_c, 2, &slope_pct, &offset_mv) == 0);
	CHECK_NEAR(slope_pct, 97.3, 1e-9);
	/* Degenerate inputs. */
	const double same[] = {7.0, 7.0};
	CHECK_INT(calib_fit(same, mv, NULL, 2, &slope_pct, &offset_mv), -1);
	CHECK_INT(calib_fit(ph, mv, NULL, 1, &slope_pct, &offset_mv), -1);
}

TEST(calib_session_recovers_noisy_lagging_electrode)
{
	calib_config_t cfg;
	calib_config_defaults(&cfg);
	/* Electrode like docs/chemistry.md §10's defaults (common practice):
	 * 0.1 mV RMS noise, t90 5 s (tau 2.2 s), plus an aged slope. */
	const struct {
		double slope_pct, offset_mv, t_c;
	} cases[] = {{98.7, 8.3, 25.0}, {96.1, -21.0, 12.0}, {101.9, 3.0, 37.0}};
	for (size_t k = 0; k < sizeof cases / sizeof cases[0]; k++) {
		sim_probe_t p = {cases[k].offset_mv, cases[k].slope_pct, 2.2, 0.1, 0.0, 150.0,
		                 12345u + k};
		calib_result_t r = sim_calibrate(&cfg, &p, cases[k].t_c);
		CHECK_INT(r.state, CALIB_ACCEPTED);
		CHECK_NEAR(r.slope_pct, cases[k].slope_pct, 0.2);
		CHECK_NEAR(r.offset_mv, cases[k].offset_mv, 0.5);
		CHECK_NEAR(r.temperature_c, cases[k].t_c, 1e-9);
		CHECK_NEAR(r.slope_mv_per_ph,
		           -cases[k].slope_pct / 100 * chem_nernst_mv(cases[k].t_c), 0.2);
		for (int i = 0; i < 3; i++) {
			CHECK(r.buffers[i].measured);
			CHECK(r.buffers[i].wait_s >= cfg.stable_min_s);
			CHECK(fabs(r.buffers[i].residual_mv) < 0.5);
		}
		CHECK_STR(r.reason, "");
		CHECK_NEAR(r.at_unix_s, 1.8e9, 0);
		CHECK_NEAR(r.expires_at_unix_s, 1.8e9 + 24 * 3600, 1e-6);
	}
}

TEST(calib_session_states)
{
	calib_config_t cfg;
	calib_config_defaults(&cfg);
	const double nominal[] = {7.00, 4.01};
	char err[160];
	calib_session_t *s = calib_session_new(&cfg, nominal, 2, err, sizeof err);
	REQUIRE(s);
	CHECK_INT(calib_session_state(s), CALIB_WAITING);
	CHECK_NEAR(calib_session_next_buffer(s), 7.00, 0); /* in the order given */
	/* readings before `next` are ignored */
	calib_reading_t r = {.t_s = 1, .mv = 0, .temperature_c = 25};
	CHECK_INT(calib_session_feed(s, &r), CALIB_WAITING);
	CHECK_INT(calib_session_next(s, 10, err, sizeof err), 0);
	CHECK_INT(calib_session_state(s), CALIB_MEASURING);
	CHECK_INT(calib_session_next(s, 11, err, sizeof err), -1); /* 409: already measuring */
	CHECK(strstr(err, "measuring") != NULL);
	/* Not before stable_min_s and a covered window, even when flat. */
	calib_state_t st = CALIB_MEASURING;
	double t;
	for (t = 10.5; st == CALIB_MEASURING && t < 100; t += 0.5) {
		r.t_s = t;
		st = calib_session_feed(s, &r);
	}
	CHECK_INT(st, CALIB_WAITING);
	CHECK(t - 10.0 >= 0.9 * cfg.stable_window_s);
	CHECK_NEAR(calib_session_next_buffer(s), 4.01, 0);
	calib_result_t res;
	calib_session_result(s, 0, &res);
	CHECK(res.buffers[0].measured);
	CHECK(!res.buffers[1].measured);
	CHECK(isnan(res.slope_pct));
	/* A NaN reading is a tick and never a crash. */
	CHECK_INT(calib_session_next(s, 200, err, sizeof err), 0);
	r.mv = NAN;
	r.t_s = 201;
	CHECK_INT(calib_session_feed(s, &r), CALIB_MEASURING);
	calib_session_cancel(s, "operator stopped");
	CHECK_INT(calib_session_state(s), CALIB_REJECTED);
	calib_session_result(s, 5, &res);
	CHECK_STR(res.reason, "operator stopped");
	CHECK(isnan(calib_session_next_buffer(s)));
	CHECK_INT(calib_session_next(s, 300, err, sizeof err), -1);
	calib_session_free(s);
}

TEST(calib_session_refuses_bad_buffer_lists)
{
	char err[200];
	const double one[] = {7.00};
	CHECK(calib_session_new(NULL, one, 1, err, sizeof err) == NULL);
	CHECK(strstr(err, "2 to 5") != NULL);
	const double six[] = {1.68, 4.01, 6.86, 7.00 + 2, 10.01, 12.45};
	CHECK(calib_session_new(NULL, six, 6, err, sizeof err) == NULL);
	const double close[] = {4.01, 7.00, 4.50};
	CHECK(calib_session_new(NULL, close, 3, err, sizeof err) == NULL);
	CHECK(strstr(err, "4.01 and 4.5") != NULL && strstr(err, "1 pH") != NULL);
	const double dup[] = {7.00, 7.00};
	CHECK(calib_session_new(NULL, dup, 2, err, sizeof err) == NULL);
	const double out[] = {4.01, 15.0};
	CHECK(calib_session_new(NULL, out, 2, err, sizeof err) == NULL);
	CHECK(strstr(err, "0..14") != NULL);
	const double nan_buf[] = {4.01, NAN};
	CHECK(calib_session_new(NULL, nan_buf, 2, err, sizeof err) == NULL);
}

TEST(calib_session_rejections)
{
	calib_config_t cfg;
	calib_config_defaults(&cfg);
	/* A tired electrode: 90 % slope. */
	sim_probe_t p = {0.0, 90.0, 1.0, 0.05, 0.0, 0.0, 7u};
	calib_result_t r = sim_calibrate(&cfg, &p, 25.0);
	CHECK_INT(r.state, CALIB_REJECTED);
	CHECK(strstr(r.reason, "slope ") != NULL && strstr(r.reason, "outside 95..105 %") != NULL);
	CHECK_NEAR(r.slope_pct, 90.0, 0.2); /* the fit is still reported */
	CHECK(!calib_is_valid(&r, 1.8e9));
	/* Offset 40 mV. */
	sim_probe_t q = {40.0, 99.0, 1.0, 0.05, 0.0, 0.0, 8u};
	r = sim_calibrate(&cfg, &q, 25.0);
	CHECK_INT(r.state, CALIB_REJECTED);
	CHECK(strstr(r.reason, "offset 40.0 mV") != NULL);
	/* An electrode that never settles: 5 mV/min of drift. */
	sim_probe_t u = {0.0, 99.0, 1.0, 0.05, 5.0, 0.0, 9u};
	r = sim_calibrate(&cfg, &u, 25.0);
	CHECK_INT(r.state, CALIB_REJECTED);
	CHECK(strstr(r.reason, "not stable") != NULL);
	CHECK(strstr(r.reason, "buffer 4.01") != NULL);
	CHECK(!r.buffers[0].measured);
	/* A wrong bottle: 7.00 asked, the beaker is really at 7.30. */
	const double nominal[] = {4.01, 7.00, 10.01};
	const double true_ph[] = {4.01, 7.30, 10.01};
	char err[160];
	calib_session_t *s = calib_session_new(&cfg, nominal, 3, err, sizeof err);
	REQUIRE(s);
	sim_probe_t w = {0.0, 99.0, 1.0, 0.05, 0.0, 0.0, 10u};
	double t_s = 0;
	for (int i = 0; i < 3; i++)
		sim_buffer(s, &w, &t_s, true_ph[i], 25.0, 600);
	calib_session_result(s, 1.8e9, &r);
	CHECK_INT(r.state, CALIB_REJECTED);
	CHECK(strstr(r.reason, "off the line") != NULL);
	calib_session_free(s);
	/* A buffer read outside its table's temperatures. */
	s = calib_session_new(&cfg, nominal, 3, err, sizeof err);
	REQUIRE(s);
	CHECK_INT(sim_buffer(s, &w, &t_s, 4.06, 55.0, 600), CALIB_REJECTED);
	calib_session_result(s, 1.8e9, &r);
	CHECK(strstr(r.reason, "outside its table") != NULL);
	calib_session_free(s);
}

TEST(calib_expiry_and_run_check)
{
	calib_config_t cfg;
	calib_config_defaults(&cfg);
	cfg.expires_h = 24;
	sim_probe_t p = {5.0, 99.0, 1.0, 0.05, 0.0, 150.0, 11u};
	calib_result_t r = sim_calibrate(&cfg, &p, 25.0);
	REQUIRE(r.state == CALIB_ACCEPTED);
	double at = r.at_unix_s;
	char msg[256];
	CHECK(calib_is_valid(&r, at + 1));
	CHECK(calib_is_valid(&r, at + 24 * 3600 - 1));
	CHECK(!calib_is_valid(&r, at + 24 * 3600 + 1));
	CHECK(calib_check_for_run(&r, "sim1", at + 3600, msg, sizeof msg));
	CHECK(!calib_check_for_run(&r, "sim1", at + 25 * 3600, msg, sizeof msg));
	CHECK(strstr(msg, "expired") != NULL && strstr(msg, "sim1") != NULL);
	CHECK(!calib_check_for_run(NULL, "sim1", at, msg, sizeof msg));
	CHECK(strstr(msg, "no electrode calibration") != NULL);
	r.state = CALIB_REJECTED;
	CHECK(!calib_check_for_run(&r, "sim1", at + 1, msg, sizeof msg));
	CHECK(strstr(msg, "not accepted") != NULL);
	r.state = CALIB_MEASURING;
	CHECK(!calib_check_for_run(&r, "sim1", at + 1, msg, sizeof msg));
	CHECK(strstr(msg, "in progress") != NULL);
	/* A shorter validity from the config. */
	cfg.expires_h = 1;
	r = sim_calibrate(&cfg, &p, 25.0);
	CHECK(calib_is_valid(&r, r.at_unix_s + 3599));
	CHECK(!calib_is_valid(&r, r.at_unix_s + 3601));
}

TEST(calib_temperature_compensation)
{
	/* Calibrated at 25 degC: ideal electrode. A reading at 37 degC of a
	 * pH 9.000 sample gives -2 k(37) = -123.081 mV (k(37) = 61.540 mV/pH,
	 * docs/chemistry.md §4 [C], CODATA 2018). */
	calib_result_t c;
	memset(&c, 0, sizeof c);
	c.state = CALIB_ACCEPTED;
	c.slope_pct = 100.0;
	c.offset_mv = 0.0;
	c.temperature_c = 25.0;
	c.expires_at_unix_s = 1e10;
	CHECK_NEAR(calib_ph_from_mv(&c, -2 * 61.540, 37.0), 9.000, 0.001);
	/* Without compensation (the 25 degC slope) the same mV would read 9.081. */
	CHECK_NEAR(calib_ph_from_mv(&c, -2 * 61.540, 25.0), 7.0 + 2 * 61.540 / 59.159, 0.001);
	/* With a real slope and offset, the inverse of the electrode equation. */
	c.slope_pct = 97.0;
	c.offset_mv = -11.0;
	for (double ph = 2; ph <= 12; ph += 2.5)
		CHECK_NEAR(calib_ph_from_mv(&c, chem_mv_from_ph(-11.0, 97.0, ph, 37.0), 37.0), ph,
		           1e-9);
	/* unknown temperature: 25 degC */
	CHECK_NEAR(calib_ph_from_mv(&c, -11.0 - 0.97 * 59.159, NAN), 8.0, 0.001);
	c.slope_pct = NAN;
	CHECK(isnan(calib_ph_from_mv(&c, 0, 25)));
}

TEST(calib_json_round_trip)
{
	calib_config_t cfg;
	calib_config_defaults(&cfg);
	sim_probe_t p = {-6.5, 98.2, 1.0, 0.05, 0.0, 150.0, 12u};
	calib_result_t r = sim_calibrate(&cfg, &p, 21.0);
	REQUIRE(r.state == CALIB_ACCEPTED);
	r.at_unix_s = 1796160400.25; /* 2026-12-01T21:26:40.250Z */
	r.expires_at_unix_s = r.at_unix_s + 86400;
	json_t *j = calib_result_json(&r);
	REQUIRE(j);
	CHECK_STR(json_string_value(json_object_get(j, "state")), "accepted");
	CHECK_STR(json_string_value(json_object_get(j, "at")), "2026-12-01T21:26:40.250Z");
	CHECK_STR(json_string_value(json_object_get(j, "expires_at")), "2026-12-02T21:26:40.250Z");
	CHECK(json_is_null(json_object_get(j, "next_buffer")));
	CHECK(json_is_null(json_object_get(j, "reason")));
	CHECK_INT(json_array_size(json_object_get(j, "buffers")), 3);
	CHECK(json_is_number(
	    json_object_get(json_array_get(json_object_get(j, "buffers"), 1), "mv")));
	char *text = json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(17));
	json_decref(j);
	REQUIRE(text);
	json_error_t e;
	json_t *back = json_loads(text, 0, &e);
	free(text);
	REQUIRE(back);
	calib_result_t b;
	CHECK_INT(calib_result_from_json(back, &b), 0);
	json_decref(back);
	CHECK_INT(b.state, CALIB_ACCEPTED);
	CHECK_NEAR(b.slope_pct, r.slope_pct, 1e-12);
	CHECK_NEAR(b.offset_mv, r.offset_mv, 1e-12);
	CHECK_NEAR(b.at_unix_s, r.at_unix_s, 1e-3);
	CHECK_NEAR(b.expires_at_unix_s, r.expires_at_unix_s, 1e-3);
	CHECK_INT(b.n_buffers, 3);
	CHECK_NEAR(b.buffers[2].mv, r.buffers[2].mv, 1e-12);
	CHECK(calib_is_valid(&b, r.at_unix_s + 10));
	CHECK_NEAR(calib_ph_from_mv(&b, 30, 25), calib_ph_from_mv(&r, 30, 25), 1e-12);
	/* A waiting session: next_buffer set, at null. */
	const double nominal[] = {4.01, 7.00};
	char err[100];
	calib_session_t *s = calib_session_new(&cfg, nominal, 2, err, sizeof err);
	REQUIRE(s);
	calib_session_result(s, 123, &r);
	j = calib_result_json(&r);
	CHECK_STR(json_string_value(json_object_get(j, "state")), "waiting");
	CHECK_NEAR(json_number_value(json_object_get(j, "next_buffer")), 4.01, 1e-12);
	CHECK(json_is_null(json_object_get(j, "at")));
	CHECK(json_is_null(json_object_get(j, "slope_pct")));
	json_decref(j);
	calib_session_free(s);
	/* Garbage is refused, not crashed on. */
	json_t *g = json_pack("{s:s}", "state", "sleepy");
	CHECK_INT(calib_result_from_json(g, &b), -1);
	json_decref(g);
	CHECK_INT(calib_result_from_json(NULL, &b), -1);
}

TEST(standardization_replicates_hand_computed)
{
	/* Hand computation: mean (1.0012 + 1.0020 + 1.0004)/3 = 1.0012;
	 * deviations 0, +0.0008, -0.0008; SD = sqrt(1.28e-6 / 2) = 0.0008;
	 * RSD = 0.0008/1.0012 = 0.0799 %. */
	const double t[] = {1.0012, 1.0020, 1.0004};
	standardization_result_t r;
	CHECK_INT(standardization_replicates(t, 3, 0.2, &r), 0);
	CHECK_NEAR(r.mean, 1.0012, 1e-12);
	CHECK_NEAR(r.sd, 0.0008, 1e-12);
	CHECK_NEAR(r.rsd_pct, 0.0799041, 1e-6);
	CHECK(r.accepted);
	/* 1.000 and 1.010: SD = 0.01/sqrt(2) = 0.0070711, RSD 0.7036 % > 0.2 %. */
	const double u[] = {1.000, 1.010};
	CHECK_INT(standardization_replicates(u, 2, 0.2, &r), 0);
	CHECK_NEAR(r.rsd_pct, 0.703589, 1e-5);
	CHECK(!r.accepted);
	CHECK(strstr(r.reason, "RSD") != NULL);
	/* One replicate: a mean, no acceptance. */
	CHECK_INT(standardization_replicates(u, 1, 0.2, &r), 0);
	CHECK(!r.accepted);
	CHECK_NEAR(r.mean, 1.000, 0);
	const double bad[] = {1.0, NAN};
	CHECK_INT(standardization_replicates(bad, 2, 0.2, &r), -1);
	CHECK(!r.accepted);
	CHECK_INT(standardization_replicates(NULL, 0, 0.2, &r), -1);
	standardization_config_t c;
	standardization_config_defaults(&c);
	CHECK_INT(c.replicates, 3);
	CHECK_NEAR(c.rsd_max_pct, 0.2, 0); /* common practice */
}

TEST(standardization_khp_titer_hand_computed)
{
	/* docs/chemistry.md §8: c = 1000 m P / (204.22 (V - V_blank)); by hand
	 * 0.5105 g KHP, P = 1, 25.00 mL, blank 0.02 mL:
	 * 510.5 / (204.22 x 24.98) = 510.5 / 5101.4156 = 0.100070 mol/L. */
	double c = standardization_khp_molarity(0.5105, 1.0, 25.00, 0.02);
	CHECK_NEAR(c, 0.100070, 1e-6);
	CHECK_NEAR(standardization_titer(c, 0.1000), 1.00070, 1e-5);
	/* A certified KHP of 99.95 % scales it exactly. */
	CHECK_NEAR(standardization_khp_molarity(0.5105, 0.9995, 25.00, 0.02), c * 0.9995, 1e-15);
	CHECK(isnan(standardization_khp_molarity(0.5, 1.0, 0.02, 0.02)));
	CHECK(isnan(standardization_khp_molarity(NAN, 1.0, 25, 0)));
	CHECK(isnan(standardization_titer(0.1, 0)));
	double titer = 0;
	CHECK_INT(standardization_titer_from_result("molarity", "mol/L", 0.10212, 0.1000, &titer),
	          0);
	CHECK_NEAR(titer, 1.0212, 1e-12);
	CHECK_INT(standardization_titer_from_result("titer", "", 0.9987, 0.1000, &titer), 0);
	CHECK_NEAR(titer, 0.9987, 0);
	CHECK_INT(standardization_titer_from_result("c_naoh", "mol/L", 0.0995, 0.1000, &titer), 0);
	CHECK_NEAR(titer, 0.995, 1e-12);
	CHECK_INT(standardization_titer_from_result("acidity", "g/L", 5.2, 0.1000, &titer), -1);
}

static double eval(const char *text, double end1_ml, double blank_ml, double titer)
{
	formula_t f;
	char msg[128];
	int col;
	if (formula_compile(text, &f, msg, sizeof msg, &col) != 0)
		return NAN;
	formula_vars_t v;
	memset(&v, 0, sizeof v);
	formula_vars_set(&v, FV_END_ML, end1_ml);
	formula_vars_set(&v, FV_BLANK_ML, blank_ml);
	formula_vars_set(&v, FV_TITER, titer);
	formula_vars_set(&v, FV_TITRANT_MOLARITY, 0.1000);
	formula_vars_set(&v, FV_AMOUNT, 10.0);
	double out = NAN;
	if (formula_eval(&f, &v, &out, msg, sizeof msg) != FORMULA_OK)
		return NAN;
	return out;
}

TEST(standardization_titer_and_blank_change_results_as_expected)
{
	/* Orchard Lane Cider's acidity method: a new titer scales the result by
	 * titer_new/titer_old; a new blank shifts it by the blank's share. */
	const char *acidity = "(end1_ml - blank_ml) * titrant_molarity * titer * 67.04 / amount";
	double base = eval(acidity, 8.40, 0.00, 1.0000);
	REQUIRE(isfinite(base));
	CHECK_NEAR(base, 8.40 * 0.1 * 67.04 / 10.0, 1e-12);
	double t2 = eval(acidity, 8.40, 0.00, 1.0123);
	CHECK_NEAR(t2 / base, 1.0123, 1e-12);
	double b2 = eval(acidity, 8.40, 0.05, 1.0000);
	CHECK_NEAR(base - b2, 0.05 * 0.1 * 67.04 / 10.0, 1e-12);
	double both = eval(acidity, 8.40, 0.05, 1.0123);
	CHECK_NEAR(both, (8.40 - 0.05) * 0.1 * 1.0123 * 67.04 / 10.0, 1e-12);
}

TEST(standardization_series_collects_replicates)
{
	standardization_config_t c;
	standardization_config_defaults(&c);
	titer_series_t s;
	memset(&s, 0, sizeof s);
	standardization_result_t r;
	/* The hand-computed set above, one run at a time. */
	CHECK(!titer_series_add(&s, &c, "NaOH 0.1 mol/L", 1.0012, &r));
	CHECK_INT(r.n, 1);
	CHECK(!titer_series_add(&s, &c, "NaOH 0.1 mol/L", NAN, &r)); /* ignored */
	CHECK(!titer_series_add(&s, &c, "NaOH 0.1 mol/L", 1.0020, &r));
	CHECK(titer_series_add(&s, &c, "NaOH 0.1 mol/L", 1.0004, &r));
	CHECK(r.accepted);
	CHECK_NEAR(r.mean, 1.0012, 1e-12);
	CHECK_NEAR(r.rsd_pct, 0.0799041, 1e-6);
	CHECK_INT(s.n, 0);
	/* Another titrant starts over; a spread set is refused. */
	CHECK(!titer_series_add(&s, &c, "NaOH 0.1 mol/L", 1.000, &r));
	CHECK(!titer_series_add(&s, &c, "HCl 0.1 mol/L", 1.000, &r));
	CHECK(!titer_series_add(&s, &c, "HCl 0.1 mol/L", 1.010, &r));
	CHECK(titer_series_add(&s, &c, "HCl 0.1 mol/L", 1.005, &r));
	CHECK(!r.accepted);
	CHECK(strstr(r.reason, "RSD") != NULL);
}
