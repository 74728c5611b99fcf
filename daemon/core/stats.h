/* stats.h: replicate statistics of one sample (stats.c; docs/methods.md,
 * "Replicates"). Pure functions, no allocation.
 *
 * n, mean, sample standard deviation (n - 1), relative standard deviation in
 * %, the acceptance of that RSD against a limit, and Grubbs' single-outlier
 * test as ISO 5725-2:1994 (7.3.4) applies it: the value farthest from the
 * mean is flagged when G = |x - mean| / sd exceeds the 5 % critical value. A
 * flagged value is only flagged: it stays in n, mean and SD.
 */
#ifndef STOPCOCK_STATS_H
#define STOPCOCK_STATS_H

#include <stdbool.h>

/* The most replicates one sample may have (one beaker each). */
#define STATS_MAX_N 20

/* Mean and sample SD (n - 1) of n values, two passes (exact enough for
 * values far from zero). sd is NaN when n < 2; both NaN when n < 1 or a value
 * is not finite. Returns 0, or -1 when nothing can be computed. */
int stats_mean_sd(const double *x, int n, double *mean, double *sd);

/* The two-sided upper quantile of Student's t: t such that P(T > t) = p for
 * dof degrees of freedom (p in (0, 0.5], dof >= 1). NaN outside that. */
double stats_t_upper(double p, double dof);

/* The critical value of Grubbs' statistic for one outlier among n values at
 * significance alpha (0.05 for ISO 5725-2's "straggler", 0.01 for
 * "outlier"), either the largest or the smallest (two-sided):
 *   G_crit = (n - 1) / sqrt(n) * sqrt(t^2 / (n - 2 + t^2)),
 *   t = the upper alpha / (2 n) quantile of Student's t with n - 2 dof.
 * NaN when n < 3. */
double stats_grubbs_critical(int n, double alpha);

typedef enum {
	STATS_ACCEPT_NONE,    /* no RSD limit is set */
	STATS_ACCEPT_PASS,    /* RSD <= the limit */
	STATS_ACCEPT_HIGH,    /* RSD above the limit */
	STATS_ACCEPT_MISSING, /* fewer than 2 values: no spread to judge */
} stats_accept_t;

/* The word the API shows for a verdict: "none", "pass", "high", "missing"
 * (the same words as a result's `accept`). */
const char *stats_accept_name(stats_accept_t a);

typedef struct {
	int n;
	double mean;    /* NaN when n < 1 */
	double sd;      /* sample SD (n - 1); NaN when n < 2 */
	double rsd_pct; /* 100 sd / |mean|; NaN when n < 2 or mean == 0 */
	stats_accept_t accept;
	double grubbs_g;    /* the largest |x - mean| / sd; NaN when n < 3 or sd == 0 */
	double grubbs_crit; /* its 5 % critical value; NaN when n < 3 */
	int outlier;        /* index of the flagged value, -1 when none */
} replicate_stats_t;

/* Statistics of n values (n <= STATS_MAX_N, all finite). max_rsd_pct <= 0 or
 * NaN means no limit (accept NONE, unless n < 2: MISSING). Returns 0, or -1
 * when n is out of range or a value is not finite (out then holds n and
 * NaNs). */
int stats_replicates(const double *x, int n, double max_rsd_pct, replicate_stats_t *out);

#endif
