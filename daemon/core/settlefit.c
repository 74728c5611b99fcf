/* settlefit.c: first-order fit of an electrode's approach (see settlefit.h).
 *
 * For a fixed time constant the law y = y_inf + A g(t), g = exp(-(t - t0)/tau),
 * is linear in (y_inf, A), so the fit scans tau over a log grid and solves
 * the 2x2 least-squares problem at each (variable projection). The interval
 * of y_inf is the profile over tau: every tau whose residual sum stays within
 * four noise variances of the best (a 2-sigma profile for one parameter)
 * contributes its y_inf with its own 2-sigma linear error. When the range is open and its slowest
 * tau still fits, the readings cannot tell an approach from a drift: the interval is infinite.
 */
#include "settlefit.h"

#include <math.h>

double settlefit_tau(double k)
{
	return SETTLEFIT_TAU_LO *
	       pow(SETTLEFIT_TAU_HI / SETTLEFIT_TAU_LO, (double)k / (SETTLEFIT_N_TAU - 1));
}

typedef struct lin {
	double c, a, sse, var_c_unit; /* var_c_unit: var(c) per unit noise variance */
	bool ok;
} lin_t;

/* g(t_i) = exp(-(t_i - t_0)/tau) as a running product: one exp per
 * distinct reading interval, not one per reading. Start with g = 1,
 * last_dt = NAN, and call for i = 1, 2, ... in turn. */
static double next_g(const double *t_s, int i, double tau_s, double g, double *last_dt,
                     double *step)
{
	double dt = t_s[i] - t_s[i - 1];
	if (dt != *last_dt) {
		*step = exp(-dt / tau_s);
		*last_dt = dt;
	}
	return g * *step;
}

/* Least squares of y = c + a g at one tau; y is taken relative to y0 for
 * precision. */
static lin_t lin_at(const double *t_s, const double *y, int n, double tau_s, double y0)
{
	lin_t r = {0};
	double sg = 0, sgg = 0, sy = 0, sgy = 0, g = 1.0, last_dt = NAN, step = 1.0;
	for (int i = 0; i < n; i++) {
		if (i > 0)
			g = next_g(t_s, i, tau_s, g, &last_dt, &step);
		double v = y[i] - y0;
		sg += g;
		sgg += g * g;
		sy += v;
		sgy += g * v;
	}
	double det = n * sgg - sg * sg;
	if (!(det > 1e-12 * n * n))
		return r;
	r.c = (sgg * sy - sg * sgy) / det;
	r.a = (n * sgy - sg * sy) / det;
	r.var_c_unit = sgg / det;
	g = 1.0;
	last_dt = NAN;
	double sse = 0;
	for (int i = 0; i < n; i++) {
		if (i > 0)
			g = next_g(t_s, i, tau_s, g, &last_dt, &step);
		double d = y[i] - y0 - r.c - r.a * g;
		sse += d * d;
	}
	r.sse = sse;
	r.c += y0;
	r.ok = true;
	return r;
}

#define N_RANGE 9 /* taus tried across a known range */

settlefit_t settlefit_fit(const double *t_s, const double *y, int n, double noise, double tau_lo_s,
                          double tau_hi_s, bool known)
{
	settlefit_t f = {.ok = false, .y_inf = NAN, .half = INFINITY, .tau_s = NAN, .sse = NAN};
	for (int k = 0; k < SETTLEFIT_N_TAU; k++)
		f.dsse[k] = INFINITY;
	/* Over the grid or a range of search tau is a third parameter; over a
	 * known electrode's range it is all but fixed. */
	bool grid = !(tau_lo_s > 0), open = grid || !known;
	if (!grid && !(tau_hi_s >= tau_lo_s))
		return f;
	int npar = open ? 3 : 2, nk = grid ? SETTLEFIT_N_TAU : N_RANGE;
	if (n < npar + 1)
		return f;
	double y0 = y[n - 1];
	lin_t fits[SETTLEFIT_N_TAU];
	double taus[SETTLEFIT_N_TAU];
	int best = -1;
	for (int k = 0; k < nk; k++) {
		taus[k] = grid ? settlefit_tau(k)
		               : tau_lo_s * pow(tau_hi_s / tau_lo_s, (double)k / (N_RANGE - 1));
		fits[k] = lin_at(t_s, y, n, taus[k], y0);
		if (fits[k].ok && (best < 0 || fits[k].sse < fits[best].sse))
			best = k;
	}
	if (best < 0)
		return f;
	/* The grid steps tau by 13.5 %: on a large approach that alone leaves
	 * a residual far above the noise. Golden-section search between the
	 * best grid point's neighbours finds the best tau itself; it stands
	 * for the best grid point from here on. (A known range counts every
	 * tau in it: no search.) */
	if (open) {
		double a = log(taus[best > 0 ? best - 1 : best]);
		double b = log(taus[best < nk - 1 ? best + 1 : best]);
		const double g = 0.6180339887498949;
		double x1 = b - g * (b - a), x2 = a + g * (b - a);
		lin_t f1 = lin_at(t_s, y, n, exp(x1), y0), f2 = lin_at(t_s, y, n, exp(x2), y0);
		for (int it = 0; it < 14 && f1.ok && f2.ok; it++) {
			if (f1.sse < f2.sse) {
				b = x2;
				x2 = x1;
				f2 = f1;
				x1 = b - g * (b - a);
				f1 = lin_at(t_s, y, n, exp(x1), y0);
			} else {
				a = x1;
				x1 = x2;
				f1 = f2;
				x2 = a + g * (b - a);
				f2 = lin_at(t_s, y, n, exp(x2), y0);
			}
		}
		lin_t *m = f1.ok && f1.sse < f2.sse ? &f1 : &f2;
		double xm = m == &f1 ? x1 : x2;
		if (m->ok && m->sse < fits[best].sse) {
			fits[best] = *m;
			taus[best] = exp(xm);
		}
	}
	double own = fits[best].sse / (n - npar);
	double var = fmax(own, noise * noise);
	double spread = 0;
	bool unfixed = false;
	for (int k = 0; k < nk; k++) {
		if (!fits[k].ok)
			continue;
		double chi2 = (fits[k].sse - fits[best].sse) / var;
		if (grid)
			f.dsse[k] = fits[k].sse - fits[best].sse;
		if (open) {
			if (chi2 > 4.0)
				continue;
			/* the slowest tau still fits: a drift; over a search
			 * range, either end: the interval runs past it */
			if (k == nk - 1 || (!grid && k == 0))
				unfixed = true;
		}
		spread = fmax(spread, fabs(fits[k].c - fits[best].c) +
		                          2.0 * sqrt(var * fits[k].var_c_unit));
	}
	/* The profile near the best tau, finer than the grid: a readings'
	 * interval of tau narrower than a grid step would otherwise count
	 * no tau uncertainty at all. Steps of 1.5 %, out to the neighbours. */
	if (open) {
		for (int j = -9; j <= 9; j++) {
			if (j == 0)
				continue;
			lin_t r = lin_at(t_s, y, n, taus[best] * exp(0.015 * j), y0);
			if (!r.ok || (r.sse - fits[best].sse) / var > 4.0)
				continue;
			spread =
			    fmax(spread, fabs(r.c - fits[best].c) + 2.0 * sqrt(var * r.var_c_unit));
		}
	}
	f.ok = true;
	f.y_inf = fits[best].c;
	f.tau_s = taus[best];
	f.sse = fits[best].sse;
	f.dof = n - npar;
	f.half = unfixed ? INFINITY : spread;
	return f;
}

double settlefit_at_tau(const double *t_s, const double *y, int n, double tau_s)
{
	if (n < 2 || !(tau_s > 0))
		return n > 0 ? y[n - 1] : NAN;
	lin_t r = lin_at(t_s, y, n, tau_s, y[n - 1]);
	return r.ok ? r.c : y[n - 1];
}
