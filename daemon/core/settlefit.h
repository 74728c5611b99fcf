/* settlefit.h: the settled value of an electrode from its approach.
 *
 * After an addition a glass electrode approaches its new reading roughly as
 * a first-order lag, y(t) = y_inf + A exp(-t/tau) (docs/engine.md,
 * "Settling"). settlefit_fit() fits that law to the readings since the
 * addition and says how well the readings fix y_inf: the settling rule
 * `extrapolate` accepts a point once they fix it within the method's band,
 * and the engine's noise check uses the scatter left around the fit. The
 * time constant is the electrode's, the same after every addition, so the
 * fit also returns its misfit at each tau of a common grid, for the caller
 * to add up over the points of a run.
 * Pure arithmetic: no clock, no state.
 */
#ifndef STOPCOCK_SETTLEFIT_H
#define STOPCOCK_SETTLEFIT_H

#include <stdbool.h>

#define SETTLEFIT_N_TAU  64   /* steps of the common grid of time constants (x1.135) */
#define SETTLEFIT_TAU_LO 0.02 /* s: faster than readings can show */
#define SETTLEFIT_TAU_HI 60.0 /* s: slower than any usable electrode */

typedef struct settlefit {
	bool ok;      /* enough readings for a fit (at least 4) */
	double y_inf; /* predicted settled value, in the readings' unit */
	double half;  /* half-width of the ~2-sigma interval of y_inf, tau's
	               * uncertainty included; INFINITY when the readings do not
	               * fix it (over the full grid a slow drift fits any tau) */
	double tau_s; /* best time constant, s */
	double sse;   /* residual sum of squares at the best tau */
	int dof;      /* its degrees of freedom (readings less parameters) */
	/* misfit at each grid tau: the residual sum of squares less the
	 * least one (in the readings' unit squared); INFINITY when the fit
	 * had a tau range */
	double dsse[SETTLEFIT_N_TAU];
} settlefit_t;

/* Time constant at grid position k (0 .. SETTLEFIT_N_TAU - 1, fractions
 * allowed), s: log-spaced from TAU_LO to TAU_HI. */
double settlefit_tau(double k);

/* Fit y[i] at t_s[i] (s, increasing), n readings. `noise` is the scatter to
 * assume at least (the meter's resolution, or the noise seen on earlier
 * points; same unit as y): a fit through a few readings can look perfect by
 * chance. Without a tau range (tau_lo_s <= 0) tau is the readings' to find
 * over the common grid: the interval spans the taus they admit, a fit still
 * good at the slowest leaves y_inf unfixed, and dsse is filled. With a range
 * and `known` (an electrode known from earlier points) every tau in it
 * counts, whatever these few readings prefer; with a range and not `known`
 * the readings search it, and a fit still good at either end leaves y_inf
 * unfixed. */
settlefit_t settlefit_fit(const double *t_s, const double *y, int n, double noise, double tau_lo_s,
                          double tau_hi_s, bool known);

/* The settled value of another channel read at the same times (mV beside
 * pH) under the time constant tau_s found by settlefit_fit. */
double settlefit_at_tau(const double *t_s, const double *y, int n, double tau_s);

#endif
