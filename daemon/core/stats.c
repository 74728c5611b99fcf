/* stats.c: replicate statistics and Grubbs' test (see stats.h).
 *
 * Student's t tail comes from the regularized incomplete beta function,
 * P(T > t) = I_x(dof / 2, 1 / 2) / 2 with x = dof / (dof + t^2), evaluated
 * by its continued fraction (modified Lentz), and the quantile by bisection:
 * a few hundred evaluations per sample, nothing a series notices.
 */
#include <math.h>
#include <stddef.h>

#include "stats.h"

int stats_mean_sd(const double *x, int n, double *mean, double *sd)
{
	*mean = *sd = NAN;
	if (!x || n < 1)
		return -1;
	double sum = 0;
	for (int i = 0; i < n; i++) {
		if (!isfinite(x[i]))
			return -1;
		sum += x[i];
	}
	*mean = sum / n;
	if (n < 2)
		return 0;
	/* Two passes: a one-pass sum of squares cancels badly for replicates
	 * that agree to many digits. */
	double ss = 0;
	for (int i = 0; i < n; i++)
		ss += (x[i] - *mean) * (x[i] - *mean);
	*sd = sqrt(ss / (n - 1));
	return 0;
}

/* The continued fraction of the incomplete beta function I_x(a, b), good
 * for x < (a + 1) / (a + b + 2) (the caller swaps otherwise). */
static double beta_cf(double a, double b, double x)
{
	const double tiny = 1e-300;
	double qab = a + b, qap = a + 1.0, qam = a - 1.0;
	double c = 1.0, d = 1.0 - qab * x / qap;
	if (fabs(d) < tiny)
		d = tiny;
	d = 1.0 / d;
	double h = d;
	for (int m = 1; m <= 300; m++) {
		int m2 = 2 * m;
		double aa = m * (b - m) * x / ((qam + m2) * (a + m2));
		d = 1.0 + aa * d;
		if (fabs(d) < tiny)
			d = tiny;
		c = 1.0 + aa / c;
		if (fabs(c) < tiny)
			c = tiny;
		d = 1.0 / d;
		h *= d * c;
		aa = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2));
		d = 1.0 + aa * d;
		if (fabs(d) < tiny)
			d = tiny;
		c = 1.0 + aa / c;
		if (fabs(c) < tiny)
			c = tiny;
		d = 1.0 / d;
		double del = d * c;
		h *= del;
		if (fabs(del - 1.0) < 1e-15)
			break;
	}
	return h;
}

/* Regularized incomplete beta I_x(a, b), 0 <= x <= 1. */
static double beta_reg(double a, double b, double x)
{
	if (x <= 0)
		return 0;
	if (x >= 1)
		return 1;
	double ln_front = lgamma(a + b) - lgamma(a) - lgamma(b) + a * log(x) + b * log1p(-x);
	double front = exp(ln_front);
	if (x < (a + 1.0) / (a + b + 2.0))
		return front * beta_cf(a, b, x) / a;
	return 1.0 - front * beta_cf(b, a, 1.0 - x) / b;
}

/* P(T > t) for t >= 0. */
static double t_tail(double t, double dof)
{
	return 0.5 * beta_reg(dof / 2.0, 0.5, dof / (dof + t * t));
}

double stats_t_upper(double p, double dof)
{
	if (!(p > 0 && p <= 0.5) || !(dof >= 1))
		return NAN;
	double lo = 0, hi = 1;
	while (t_tail(hi, dof) > p && hi < 1e12)
		hi *= 2;
	/* Bisection to a relative width far below the 4 digits the critical
	 * values are published with. */
	for (int i = 0; i < 200 && hi - lo > 1e-12 * hi; i++) {
		double mid = 0.5 * (lo + hi);
		if (t_tail(mid, dof) > p)
			lo = mid;
		else
			hi = mid;
	}
	return 0.5 * (lo + hi);
}

double stats_grubbs_critical(int n, double alpha)
{
	if (n < 3 || !(alpha > 0 && alpha < 1))
		return NAN;
	double t = stats_t_upper(alpha / (2.0 * n), n - 2);
	return (n - 1) / sqrt((double)n) * sqrt(t * t / (n - 2 + t * t));
}

const char *stats_accept_name(stats_accept_t a)
{
	switch (a) {
	case STATS_ACCEPT_PASS:
		return "pass";
	case STATS_ACCEPT_HIGH:
		return "high";
	case STATS_ACCEPT_MISSING:
		return "missing";
	case STATS_ACCEPT_NONE:
		break;
	}
	return "none";
}

int stats_replicates(const double *x, int n, double max_rsd_pct, replicate_stats_t *out)
{
	out->n = n;
	out->mean = out->sd = out->rsd_pct = out->grubbs_g = out->grubbs_crit = NAN;
	out->accept = STATS_ACCEPT_MISSING;
	out->outlier = -1;
	if (n < 1 || n > STATS_MAX_N || stats_mean_sd(x, n, &out->mean, &out->sd) != 0)
		return -1;
	if (n < 2)
		return 0;
	if (out->mean != 0)
		out->rsd_pct = 100.0 * out->sd / fabs(out->mean);
	if (!(max_rsd_pct > 0))
		out->accept = STATS_ACCEPT_NONE;
	else if (isfinite(out->rsd_pct) && out->rsd_pct <= max_rsd_pct)
		out->accept = STATS_ACCEPT_PASS;
	else
		out->accept = STATS_ACCEPT_HIGH;
	if (n < 3)
		return 0;
	/* ISO 5725-2:1994, 7.3.4: Grubbs' test for one outlying observation at
	 * the 5 % level; the value is flagged, never removed. */
	out->grubbs_crit = stats_grubbs_critical(n, 0.05);
	if (!(out->sd > 0))
		return 0;
	int far = 0;
	for (int i = 1; i < n; i++)
		if (fabs(x[i] - out->mean) > fabs(x[far] - out->mean))
			far = i;
	out->grubbs_g = fabs(x[far] - out->mean) / out->sd;
	if (out->grubbs_g > out->grubbs_crit)
		out->outlier = far;
	return 0;
}
