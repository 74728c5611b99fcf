/* test_stats.c: replicate statistics (daemon/core/stats.c) against published
 * and independently computed values:
 *   - Grubbs' critical values against ISO 5725-2:1994, Table 5 ("Critical
 *     values for Grubbs' test", one largest or one smallest observation, 5 %
 *     and 1 %), published to three decimals;
 *   - the same and Student's t quantiles against scipy (the table
 *     SCIPY_GRUBBS below; tests/e2e/test_stats_scipy.py recomputes every row
 *     with scipy.stats.t.isf, so the numbers here cannot drift);
 *   - mean, SD and RSD of a worked example computed by hand;
 *   - a value is flagged by Grubbs' test, never removed.
 */
#include <math.h>

#include "harness.h"
#include "standardization.h"
#include "stats.h"

/* ISO 5725-2:1994, Table 5: n, critical value at 5 %, at 1 %. The table
 * rounds to three decimals (n = 3: both are the largest possible G,
 * (n - 1) / sqrt(n) = 1.1547, printed 1.155). */
static const struct {
	int n;
	double g5, g1;
} iso_table5[] = {
    {3, 1.155, 1.155},  {4, 1.481, 1.496},  {5, 1.715, 1.764},  {6, 1.887, 1.973},
    {7, 2.020, 2.139},  {8, 2.126, 2.274},  {9, 2.215, 2.387},  {10, 2.290, 2.482},
    {11, 2.355, 2.564}, {12, 2.412, 2.636}, {13, 2.462, 2.699}, {14, 2.507, 2.755},
    {15, 2.549, 2.806}, {16, 2.585, 2.852}, {17, 2.620, 2.894}, {18, 2.651, 2.932},
    {19, 2.681, 2.968}, {20, 2.709, 3.001}, {30, 2.908, 3.236}, {40, 3.036, 3.381},
};

TEST(stats_grubbs_critical_iso5725_table5)
{
	for (size_t i = 0; i < sizeof iso_table5 / sizeof iso_table5[0]; i++) {
		/* Half a unit in the third decimal, plus the table's own rounding
		 * of its computation (n = 3 is printed rounded up). */
		CHECK_NEAR(stats_grubbs_critical(iso_table5[i].n, 0.05), iso_table5[i].g5, 0.0015);
		CHECK_NEAR(stats_grubbs_critical(iso_table5[i].n, 0.01), iso_table5[i].g1, 0.0015);
	}
	CHECK(isnan(stats_grubbs_critical(2, 0.05)));
	CHECK(isnan(stats_grubbs_critical(5, 0.0)));
}

/* scipy: g = (n-1)/sqrt(n) * sqrt(t^2/(n-2+t^2)), t = scipy.stats.t.isf(alpha/(2n), n-2).
 * SCIPY_GRUBBS n alpha value (one row per line; the pytest parses them) */
static const struct {
	int n;
	double alpha, g;
} scipy_grubbs[] = {
    {3, 0.05, 1.154305},   /* SCIPY_GRUBBS */
    {4, 0.05, 1.481250},   /* SCIPY_GRUBBS */
    {6, 0.01, 1.972817},   /* SCIPY_GRUBBS */
    {12, 0.05, 2.411560},  /* SCIPY_GRUBBS */
    {41, 0.05, 3.046571},  /* SCIPY_GRUBBS */
    {50, 0.05, 3.128247},  /* SCIPY_GRUBBS */
    {100, 0.05, 3.384083}, /* SCIPY_GRUBBS */
    {100, 0.01, 3.754004}, /* SCIPY_GRUBBS */
};

/* scipy: scipy.stats.t.isf(p, dof). SCIPY_T p dof value */
static const struct {
	double p, dof, t;
} scipy_t[] = {
    {0.025, 10, 2.228139},  /* SCIPY_T */
    {0.005, 8, 3.355387},   /* SCIPY_T */
    {0.0025, 8, 3.832519},  /* SCIPY_T */
    {0.05, 1, 6.313752},    /* SCIPY_T */
    {0.0001, 3, 22.203742}, /* SCIPY_T */
};

TEST(stats_grubbs_and_t_against_scipy)
{
	for (size_t i = 0; i < sizeof scipy_grubbs / sizeof scipy_grubbs[0]; i++)
		CHECK_NEAR(stats_grubbs_critical(scipy_grubbs[i].n, scipy_grubbs[i].alpha),
		           scipy_grubbs[i].g, 2e-6);
	for (size_t i = 0; i < sizeof scipy_t / sizeof scipy_t[0]; i++)
		CHECK_NEAR(stats_t_upper(scipy_t[i].p, scipy_t[i].dof), scipy_t[i].t,
		           2e-6 * scipy_t[i].t);
	CHECK(isnan(stats_t_upper(0.6, 5)));
	CHECK(isnan(stats_t_upper(0.05, 0.5)));
}

TEST(stats_mean_sd_rsd_worked_example)
{
	/* Five titrations of one sample, in g/L:
	 *   10.08 10.11 10.09 10.10 10.12      sum 50.50, mean 10.10
	 *   deviations -0.02 +0.01 -0.01 0 +0.02
	 *   squares 4e-4 + 1e-4 + 1e-4 + 0 + 4e-4 = 1.0e-3
	 *   s^2 = 1.0e-3 / (5 - 1) = 2.5e-4, s = 0.0158114
	 *   RSD = 100 * 0.0158114 / 10.10 = 0.156549 %
	 * Grubbs: G = 0.02 / 0.0158114 = 1.2649 < 1.715 (n = 5, 5 %): no flag. */
	const double x[] = {10.08, 10.11, 10.09, 10.10, 10.12};
	replicate_stats_t s;
	REQUIRE(stats_replicates(x, 5, 0.2, &s) == 0);
	CHECK_INT(s.n, 5);
	CHECK_NEAR(s.mean, 10.10, 1e-12);
	CHECK_NEAR(s.sd, 0.0158114, 1e-7);
	CHECK_NEAR(s.rsd_pct, 0.156549, 1e-6);
	CHECK_INT(s.accept, STATS_ACCEPT_PASS);
	CHECK_NEAR(s.grubbs_g, 1.2649, 1e-4);
	CHECK_INT(s.outlier, -1);
	/* A tighter limit turns the same numbers into "high". */
	REQUIRE(stats_replicates(x, 5, 0.15, &s) == 0);
	CHECK_INT(s.accept, STATS_ACCEPT_HIGH);
	CHECK_STR(stats_accept_name(s.accept), "high");
	/* No limit: "none". */
	REQUIRE(stats_replicates(x, 5, 0, &s) == 0);
	CHECK_STR(stats_accept_name(s.accept), "none");
}

TEST(stats_grubbs_flags_never_removes)
{
	/* 9.9 10.0 10.1 10.0 10.9: sum 50.9, mean 10.18; deviations -0.28 -0.18
	 * -0.08 -0.18 +0.72; squares sum 0.668, s^2 = 0.167, s = 0.408656;
	 * G = 0.72 / 0.408656 = 1.7619 > 1.715 (5 %) but < 1.764 (1 %): a
	 * straggler in ISO 5725-2's words, flagged at 5 %. */
	const double x[] = {9.9, 10.0, 10.1, 10.0, 10.9};
	replicate_stats_t s;
	REQUIRE(stats_replicates(x, 5, 0, &s) == 0);
	CHECK_NEAR(s.grubbs_g, 1.7619, 1e-4);
	CHECK_NEAR(s.grubbs_crit, 1.715, 0.001);
	CHECK_INT(s.outlier, 4);
	/* Still counted: n and mean include the flagged value. */
	CHECK_INT(s.n, 5);
	CHECK_NEAR(s.mean, 10.18, 1e-12);
	CHECK_NEAR(s.sd, 0.408656, 1e-6);
	/* Among three values G cannot pass (n - 1) / sqrt(n) = 1.1547 by much:
	 * 10.0 10.1 10.9 give G = 0.567 / 0.493 = 1.149 < 1.1543, no flag. */
	const double three[] = {10.0, 10.1, 10.9};
	REQUIRE(stats_replicates(three, 3, 0, &s) == 0);
	CHECK_INT(s.outlier, -1);
}

TEST(stats_small_and_bad_inputs)
{
	replicate_stats_t s;
	const double one[] = {4.2};
	REQUIRE(stats_replicates(one, 1, 0.5, &s) == 0);
	CHECK_NEAR(s.mean, 4.2, 0);
	CHECK(isnan(s.sd));
	CHECK_INT(s.accept, STATS_ACCEPT_MISSING);
	const double two[] = {4.2, 4.2};
	REQUIRE(stats_replicates(two, 2, 0.5, &s) == 0);
	CHECK_NEAR(s.sd, 0, 0);
	CHECK_INT(s.accept, STATS_ACCEPT_PASS);
	CHECK(isnan(s.grubbs_g)); /* n < 3: no test */
	const double same[] = {1, 1, 1, 1};
	REQUIRE(stats_replicates(same, 4, 0.5, &s) == 0);
	CHECK_INT(s.outlier, -1); /* no spread: nothing stands out */
	const double bad[] = {1, NAN};
	CHECK_INT(stats_replicates(bad, 2, 0.5, &s), -1);
	CHECK_INT(stats_replicates(one, 0, 0.5, &s), -1);
	CHECK_INT(stats_replicates(one, STATS_MAX_N + 1, 0.5, &s), -1);
	/* standardization shares the mean and SD. */
	standardization_result_t r;
	const double titers[] = {1.001, 1.003, 1.002};
	REQUIRE(standardization_replicates(titers, 3, 0.2, &r) == 0);
	CHECK_NEAR(r.mean, 1.002, 1e-12);
	CHECK_NEAR(r.sd, 0.001, 1e-12);
}
