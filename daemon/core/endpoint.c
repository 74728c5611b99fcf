/* endpoint.c: endpoints from a run's points (see endpoint.h).
 *
 * Inflection: the first derivative between neighbouring points (a difference
 * quotient over each irregular volume step, placed at the step's middle);
 * peaks of dir * dS/dV whose rise between the flanking derivative minima is at
 * least min_jump, inside `window`; the peak's volume refined by a parabola
 * through the logarithms of the three highest derivative values (a Gaussian
 * through three points: the derivative of a titration curve near its
 * inflection is close to bell-shaped, and the log makes the fit exact for a
 * Gaussian peak on irregular spacing).
 * Target: the volume at which the curve crosses the target, by linear
 * interpolation between the two points either side.
 * Gran: Gran's linearisation before the endpoint (Gran, Analyst 1952, 77,
 * 661): w(V) * 10^(-dir*pH) is linear in V and reaches zero at the
 * equivalence volume, with w = V for a weak system and w = V0 + V for a
 * strong one; the better straight line of the two gives the x-intercept.
 */
#include "endpoint.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "chem.h"

int endpoint_direction(const engine_point_t *pts, int n, int hint)
{
	if (n >= 2) {
		double d = pts[n - 1].signal - pts[0].signal;
		if (d > 0)
			return 1;
		if (d < 0)
			return -1;
	}
	return hint > 0 ? 1 : hint < 0 ? -1 : 0;
}

double endpoint_interp(const engine_point_t *pts, int n, double v_ml, int field)
{
	if (n < 1 || !isfinite(v_ml))
		return NAN;
#define FIELD(p) (field == 0 ? (p).signal : field == 1 ? (p).ph : (p).mv)
	if (v_ml <= pts[0].volume_ml)
		return FIELD(pts[0]);
	for (int i = 1; i < n; i++) {
		if (pts[i].volume_ml >= v_ml) {
			double v0 = pts[i - 1].volume_ml, v1 = pts[i].volume_ml;
			double f = v1 > v0 ? (v_ml - v0) / (v1 - v0) : 1.0;
			return FIELD(pts[i - 1]) + f * (FIELD(pts[i]) - FIELD(pts[i - 1]));
		}
	}
	return FIELD(pts[n - 1]);
#undef FIELD
}

/* The addition that brackets volume v: index i of its upper point (v in
 * [V_i-1, V_i]), 0 when v is at or before the first point. */
static int bracket_at(const engine_point_t *pts, int n, double v_ml)
{
	for (int i = 1; i < n; i++)
		if (pts[i].volume_ml >= v_ml)
			return i;
	return 0;
}

double endpoint_lag_ml(const engine_point_t *pts, int n, int i)
{
	if (i < 1 || i >= n || pts[i].settled)
		return 0;
	double h = pts[i].volume_ml - pts[i - 1].volume_ml;
	return h > 0 ? h / sqrt(3.0) : 0;
}

/* Size of that addition, mL (0 outside the curve). */
static double step_at(const engine_point_t *pts, int n, double v_ml)
{
	int i = bracket_at(pts, n, v_ml);
	return i > 0 ? pts[i].volume_ml - pts[i - 1].volume_ml : 0;
}

void endpoint_central_dpdv(engine_point_t *pts, int n)
{
	if (n < 2) {
		if (n == 1)
			pts[0].dpdv = 0;
		return;
	}
	/* Forward differences first, kept aside so each point uses the raw ones. */
	double prev_g = 0, prev_dv = 0;
	for (int i = 0; i < n; i++) {
		double g = 0, dv = 0;
		if (i + 1 < n) {
			dv = pts[i + 1].volume_ml - pts[i].volume_ml;
			g = dv > 0 ? (pts[i + 1].signal - pts[i].signal) / dv : 0;
		}
		double d;
		if (i == 0)
			d = g;
		else if (i == n - 1)
			d = prev_g;
		else if (prev_dv + dv > 0)
			/* derivative at the middle point of the parabola through three
			 * points: the one-sided slopes weighted by the other step */
			d = (prev_g * dv + g * prev_dv) / (prev_dv + dv);
		else
			d = g;
		pts[i].dpdv = isfinite(d) ? d : 0;
		prev_g = g;
		prev_dv = dv;
	}
}

static void fill_point_fields(const engine_point_t *pts, int n, engine_endpoint_t *ep)
{
	ep->signal = endpoint_interp(pts, n, ep->volume_ml, 0);
	ep->ph = endpoint_interp(pts, n, ep->volume_ml, 1);
	ep->mv = endpoint_interp(pts, n, ep->volume_ml, 2);
	ep->half_ph = endpoint_interp(pts, n, ep->volume_ml / 2, 1);
	ep->deriv_ml = ep->volume_ml;
	ep->u_volume_ml = NAN;
	ep->model_ml = NAN;
	ep->model_rms = NAN;
	ep->model_u_ml = NAN;
	ep->doubt[0] = '\0';
}

/* Derivative segments: g[j] = dir * dS/dV over [V_j, V_j+1], at vm[j]. */
typedef struct seg {
	double g, vm, dv;
} seg_t;

/* Peak volume: a parabola in log g by least squares over the segments of
 * the peak's top (g >= 0.6 of the peak, at least its two neighbours), so
 * a noisy plateau of many small steps gives a stable vertex; the vertex is
 * kept within the top's span. */
static double refine_peak(const seg_t *sg, int m, int k)
{
	double gk = sg[k].g;
	int lo = k, hi = k;
	while (lo > 0 && sg[lo - 1].g >= 0.6 * gk && sg[lo - 1].g > 0)
		lo--;
	while (hi < m - 1 && sg[hi + 1].g >= 0.6 * gk && sg[hi + 1].g > 0)
		hi++;
	/* A next segment far wider than the peak's (guided dosing's one
	 * addition past the jump; adaptive additions grow at most 3x) averages
	 * the slope over a span the peak's shape does not reach: its mean is no
	 * sample of the bell at its middle, and a parabola through it pulls
	 * the vertex out along that span. */
	if (lo == k && k > 0 && sg[k - 1].g > 0)
		lo = k - 1;
	if (hi == k && k < m - 1 && sg[k + 1].g > 0 && sg[k + 1].dv <= 4 * sg[k].dv)
		hi = k + 1;
	if (hi - lo < 2)
		return sg[k].vm;
	/* Centre and scale x for a well-conditioned 3x3 normal system. */
	double x0 = sg[k].vm, xs = (sg[hi].vm - sg[lo].vm) / 2;
	if (!(xs > 0))
		return x0;
	double s[5] = {0}, t[3] = {0};
	for (int j = lo; j <= hi; j++) {
		double x = (sg[j].vm - x0) / xs, y = log(sg[j].g);
		double p = 1;
		for (int q = 0; q < 5; q++, p *= x)
			s[q] += p;
		t[0] += y;
		t[1] += x * y;
		t[2] += x * x * y;
	}
	/* Solve [s0 s1 s2; s1 s2 s3; s2 s3 s4] [c0 c1 c2] = t by Cramer's rule. */
	double a11 = s[0], a12 = s[1], a13 = s[2], a22 = s[2], a23 = s[3], a33 = s[4];
	double det = a11 * (a22 * a33 - a23 * a23) - a12 * (a12 * a33 - a23 * a13) +
	             a13 * (a12 * a23 - a22 * a13);
	if (!(fabs(det) > 1e-300))
		return x0;
	double d1 = a11 * (t[1] * a33 - a23 * t[2]) - t[0] * (a12 * a33 - a23 * a13) +
	            a13 * (a12 * t[2] - t[1] * a13);
	double d2 = a11 * (a22 * t[2] - t[1] * a23) - a12 * (a12 * t[2] - t[1] * a13) +
	            t[0] * (a12 * a23 - a22 * a13);
	double c1 = d1 / det, c2 = d2 / det;
	if (!(c2 < 0))
		return x0;
	double v = x0 + xs * (-c1 / (2 * c2));
	if (!isfinite(v))
		return x0;
	return fmin(fmax(v, sg[lo].vm), sg[hi].vm);
}

static int by_g_desc(const void *a, const void *b, void *ctx)
{
	const seg_t *sg = ctx;
	double x = sg[*(const int *)a].g, y = sg[*(const int *)b].g;
	return (x < y) - (x > y);
}

static int by_volume(const void *a, const void *b)
{
	double x = ((const engine_endpoint_t *)a)->volume_ml;
	double y = ((const engine_endpoint_t *)b)->volume_ml;
	return (x > y) - (x < y);
}

/* Peaks are taken highest first; each claims its flanks down to the
 * derivative minima either side, so noise bumps on a flank or on a flat top
 * (many small constant additions) neither split a peak nor count as one:
 * a flank walk goes on while the derivative stays above half the
 * peak, or keeps falling (within 10 % of the last value, for noise), and stops at
 * a segment already claimed or more than 10 % higher than the peak (a
 * neighbour as high as the peak is part of it). */
static int find_inflections(const method_t *m, const engine_point_t *pts, int n, int dir,
                            bool final, engine_endpoint_t *out, int cap)
{
	int ms = n - 1;
	if (ms < 2 || dir == 0)
		return 0;
	seg_t *sg = malloc((size_t)ms * sizeof *sg);
	int *order = malloc((size_t)ms * sizeof *order);
	unsigned char *claimed = calloc((size_t)ms, 1);
	int found = 0;
	engine_endpoint_t tmp[METHOD_MAX_ENDPOINTS * 4];
	int ntmp = 0;
	if (!sg || !order || !claimed)
		goto out;
	/* Smoothing that adapts to the signal: a segment whose signal change is
	 * within the reading scatter (1.5 still_within) takes its difference
	 * quotient over a wider, symmetric span of points (up to 8 either
	 * side), so many small additions in a flat stretch do not turn noise
	 * into peaks, while large steps and steep jumps keep full resolution. */
	double thr = 1.5 * m->still_within;
	for (int j = 0; j < ms; j++) {
		int a = j, b = j + 1;
		while (fabs(pts[b].signal - pts[a].signal) < thr && b - a < 17 &&
		       (a > 0 || b < n - 1)) {
			if (a > 0)
				a--;
			if (b < n - 1)
				b++;
		}
		double dv = pts[b].volume_ml - pts[a].volume_ml;
		sg[j].dv = pts[j + 1].volume_ml - pts[j].volume_ml;
		sg[j].vm = (pts[j].volume_ml + pts[j + 1].volume_ml) / 2;
		sg[j].g = dv > 0 ? dir * (pts[b].signal - pts[a].signal) / dv : 0;
		order[j] = j;
	}
	qsort_r(order, (size_t)ms, sizeof *order, by_g_desc, sg);
	for (int oi = 0; oi < ms && ntmp < (int)(sizeof tmp / sizeof tmp[0]); oi++) {
		int k = order[oi];
		double gk = sg[k].g;
		if (!(gk > 0))
			break;
		if (claimed[k])
			continue;
		int lo = k, hi = k;
		while (lo > 0 && !claimed[lo - 1] && sg[lo - 1].g <= 1.1 * gk &&
		       (sg[lo - 1].g >= 0.5 * gk || sg[lo - 1].g <= 1.1 * sg[lo].g))
			lo--;
		while (hi < ms - 1 && !claimed[hi + 1] && sg[hi + 1].g <= 1.1 * gk &&
		       (sg[hi + 1].g >= 0.5 * gk || sg[hi + 1].g <= 1.1 * sg[hi].g))
			hi++;
		for (int j = lo; j <= hi; j++)
			claimed[j] = 1;
		if (k == ms - 1)
			continue; /* still rising at the last point: not past it yet */
		/* Prominence: a real peak stands at least 1.5 times above the
		 * derivative minimum (valley) on each side, counting the segment
		 * just outside its flanks (a neighbouring peak may have claimed the
		 * valley). A noise bump on another peak's flank does not, nor does
		 * the fast start of a weak acid (the derivative only falls from the
		 * first point: there is no rise before it). */
		if (lo == k || hi == k)
			continue;
		double left = INFINITY, right = INFINITY;
		for (int j = lo; j <= k; j++)
			left = fmin(left, sg[j].g);
		for (int j = k; j <= hi; j++)
			right = fmin(right, sg[j].g);
		if (lo > 0)
			left = fmin(left, sg[lo - 1].g);
		if (hi < ms - 1)
			right = fmin(right, sg[hi + 1].g);
		double edge = fmax(fmax(left, right), 0.0);
		if (!(gk >= 1.5 * edge))
			continue;
		double jump = dir * (pts[hi + 1].signal - pts[lo].signal);
		if (!(jump >= m->min_jump))
			continue;
		/* Passed: the derivative has since dropped below half its peak. */
		bool passed = false;
		for (int j = k + 1; j < ms; j++)
			if (sg[j].g < 0.5 * gk) {
				passed = true;
				break;
			}
		if (!passed && !final)
			continue;
		engine_endpoint_t ep;
		memset(&ep, 0, sizeof ep);
		ep.volume_ml = refine_peak(sg, ms, k);
		fill_point_fields(pts, n, &ep);
		/* In the window when the refined endpoint's signal is, or when
		 * the steepest step itself crosses into it: a jump taken in one
		 * addition leaves the refined volume anywhere on that step (its
		 * interpolated signal may fall short of the window while the
		 * step spans it). */
		if (m->has_window) {
			double s_lo = fmin(pts[k].signal, pts[k + 1].signal);
			double s_hi = fmax(pts[k].signal, pts[k + 1].signal);
			bool in = ep.signal >= m->window_lo && ep.signal <= m->window_hi;
			bool spans = s_hi >= m->window_lo && s_lo <= m->window_hi;
			if (!in && !spans)
				continue;
		}
		ep.how = "inflection";
		tmp[ntmp++] = ep;
	}
	qsort(tmp, (size_t)ntmp, sizeof tmp[0], by_volume);
	for (int i = 0; i < ntmp && found < cap; i++) {
		out[found] = tmp[i];
		out[found].n = found + 1;
		found++;
	}
out:
	free(sg);
	free(order);
	free(claimed);
	return found;
}

/* Excess of strong acid over base in the beaker's liquid, mol/L, as a
 * point's pH shows it: [H+] - [OH-] (NaN without a pH). */
static double excess_of(const engine_point_t *p)
{
	if (!isfinite(p->ph))
		return NAN;
	double t_c = isfinite(p->temperature_c) ? p->temperature_c : 25.0;
	return pow(10.0, -p->ph) - pow(10.0, p->ph - chem_pkw(t_c));
}

/* Volume at which the straight line in the excess through points a and b
 * reaches the excess of pH t_ph, mL; NaN when they do not fix one. */
static double excess_crossing(const engine_point_t *a, const engine_point_t *b, double t_ph)
{
	double da = excess_of(a), db = excess_of(b);
	double t_c = isfinite(b->temperature_c) ? b->temperature_c : 25.0;
	double dt = pow(10.0, -t_ph) - pow(10.0, t_ph - chem_pkw(t_c));
	if (!isfinite(da) || !isfinite(db) || da == db)
		return NAN;
	return a->volume_ml + (dt - da) / (db - da) * (b->volume_ml - a->volume_ml);
}

/* A pH target crossed in one addition from an acid to a basic point (or
 * back) on a strong system: there the charge balance makes the excess
 * [H+] - [OH-] a straight line in the volume near the equivalence point
 * (V0 + V changes by a fraction of a percent over the addition), so the
 * crossing is read on that line, not on the pH's (which bends like a
 * logarithm on either side). Strong is what the points show: the line
 * through the two points before the bracket (or the two after it) reaches
 * the target's excess within a quarter of the bracketing addition of the
 * bracket's own line. Returns the crossing at the bracket ending at point
 * i, mL, and in *miss the larger distance to the neighbouring lines (the
 * curve's own bend); NaN when this does not apply. */
static double strong_crossing(const method_t *m, const engine_point_t *pts, int n, int i,
                              double *miss)
{
	if (m->signal != SIGNAL_PH || i < 1 || i >= n)
		return NAN;
	const engine_point_t *p0 = &pts[i - 1], *p1 = &pts[i];
	double t_c = isfinite(p1->temperature_c) ? p1->temperature_c : 25.0;
	double neutral = chem_pkw(t_c) / 2;
	if (!((p0->ph - neutral) * (p1->ph - neutral) < 0))
		return NAN;
	double v = excess_crossing(p0, p1, m->target);
	double h = p1->volume_ml - p0->volume_ml;
	if (!isfinite(v) || !(h > 0))
		return NAN;
	double worst = -1;
	if (i >= 2) {
		double w = excess_crossing(&pts[i - 2], p0, m->target);
		if (isfinite(w))
			worst = fmax(worst, fabs(w - v));
	}
	if (i + 1 < n) {
		double w = excess_crossing(p1, &pts[i + 1], m->target);
		if (isfinite(w))
			worst = fmax(worst, fabs(w - v));
	}
	if (!(worst >= 0) || !(worst <= h / 4))
		return NAN;
	*miss = worst;
	return v;
}

static int find_target(const method_t *m, const engine_point_t *pts, int n, int dir,
                       engine_endpoint_t *out, int cap)
{
	if (!m->has_target || n < 1 || cap < 1)
		return 0;
	double t = m->target;
	if (dir == 0)
		dir = t >= pts[0].signal ? 1 : -1;
	/* Reached and holding: the crossing after which every point stays at
	 * or past the target (a signal that fell back, as when dissolved CO2
	 * re-equilibrates, has not reached it yet). */
	if (dir * (pts[n - 1].signal - t) < 0)
		return 0;
	int i = n - 1;
	while (i > 0 && dir * (pts[i - 1].signal - t) >= 0)
		i--;
	double v;
	if (i == 0) {
		v = pts[0].volume_ml; /* already there at the start */
	} else {
		double s0 = pts[i - 1].signal, s1 = pts[i].signal;
		double v0 = pts[i - 1].volume_ml, v1 = pts[i].volume_ml;
		double f = s1 != s0 ? (t - s0) / (s1 - s0) : 1.0;
		v = v0 + f * (v1 - v0);
		double miss = 0, vs = strong_crossing(m, pts, n, i, &miss);
		if (isfinite(vs) && vs >= v0 && vs <= v1)
			v = vs;
	}
	if (!isfinite(v))
		return 0;
	engine_endpoint_t ep;
	memset(&ep, 0, sizeof ep);
	ep.volume_ml = v;
	fill_point_fields(pts, n, &ep);
	ep.signal = t;
	ep.n = 1;
	ep.how = "target";
	out[0] = ep;
	return 1;
}

/* pH of a point for Gran: the point's own, else the ideal electrode. */
static double gran_ph(const method_t *m, const engine_point_t *p)
{
	if (isfinite(p->ph))
		return p->ph;
	return m->signal == SIGNAL_MV ? 7.0 - p->mv / 59.16 : p->signal;
}

/* Straight line through (x, y): y = a + b x; returns r^2, or -1. *u_x0 is
 * the standard error of the x-intercept -a/b from the residual scatter
 * (s^2/b^2 (1/n + (x0 - mean x)^2 / Sxx), the usual propagation for a
 * calibration line's inverse prediction). */
static double line_fit(const double *x, const double *y, int n, double *a, double *b, double *u_x0)
{
	if (n < 3)
		return -1;
	double sx = 0, sy = 0, sxx = 0, sxy = 0, syy = 0;
	for (int i = 0; i < n; i++) {
		sx += x[i];
		sy += y[i];
	}
	double mx = sx / n, my = sy / n;
	for (int i = 0; i < n; i++) {
		double dx = x[i] - mx, dy = y[i] - my;
		sxx += dx * dx;
		sxy += dx * dy;
		syy += dy * dy;
	}
	if (!(sxx > 0) || !(syy > 0))
		return -1;
	*b = sxy / sxx;
	*a = my - *b * mx;
	double ss = 0;
	for (int i = 0; i < n; i++) {
		double r = y[i] - *a - *b * x[i];
		ss += r * r;
	}
	double x0 = -*a / *b, s2 = ss / (n - 2);
	*u_x0 = sqrt(s2 / (*b * *b) * (1.0 / n + (x0 - mx) * (x0 - mx) / sxx));
	return sxy * sxy / (sxx * syy);
}

/* Gran volume for the endpoint near ve0 (from the derivative), between the
 * previous endpoint v_prev and ve0; NaN when the data do not allow it. */
static double gran_volume(const method_t *m, const engine_point_t *pts, int n, int ph_dir,
                          double v_prev, double ve0, double v0_ml, double *u_ml)
{
	double span = ve0 - v_prev;
	if (!(span > 0))
		return NAN;
	double *x = malloc((size_t)n * sizeof *x), *y1 = malloc((size_t)n * sizeof *y1),
	       *y2 = malloc((size_t)n * sizeof *y2), *xw = malloc((size_t)n * sizeof *xw);
	double best = NAN;
	if (!x || !y1 || !y2 || !xw)
		goto out;
	int k = 0;
	for (int i = 0; i < n; i++) {
		double v = pts[i].volume_ml;
		/* 30..95 % of the way: the straight part of either Gran function */
		if (v < v_prev + 0.3 * span || v > v_prev + 0.95 * span)
			continue;
		/* c: the ion the titrant removes, mol/L: H+ when the pH rises,
		 * OH- (Kw 1e-14) when it falls. The weak form counts the conjugate
		 * made by the titrant, corrected for the free c itself, which
		 * matters early on (Ingman & Still, Talanta 1966; docs/chemistry.md §9):
		 * x = V + (V0 + V) c / c_t, and x c is linear in x to zero at Ve. */
		double ph = gran_ph(m, &pts[i]);
		double c = ph_dir > 0 ? pow(10.0, -ph) : pow(10.0, ph - 14.0);
		double ct = m->titrant_molarity > 0 ? m->titrant_molarity : 0.1;
		double xv = (v - v_prev) + (v0_ml + v) * c / ct;
		x[k] = v;
		xw[k] = xv + v_prev;
		y1[k] = xv * c;
		y2[k] = (v0_ml + v) * c;
		k++;
	}
	double a1, b1, a2, b2, u1 = NAN, u2 = NAN;
	double r1 = line_fit(xw, y1, k, &a1, &b1, &u1);
	double r2 = line_fit(x, y2, k, &a2, &b2, &u2);
	double v1 = r1 > 0 && b1 < 0 ? -a1 / b1 : NAN;
	double v2 = r2 > 0 && b2 < 0 ? -a2 / b2 : NAN;
	if (isfinite(v1) && (!isfinite(v2) || r1 >= r2)) {
		best = v1;
		*u_ml = u1;
	} else if (isfinite(v2)) {
		best = v2;
		*u_ml = u2;
	}
	/* A Gran intercept far from the derivative's volume is not this endpoint,
	 * nor is one beyond the last point when the curve has already shown
	 * its jump (the line was fitted to the wrong stretch). */
	if (isfinite(best) && fabs(best - ve0) > 0.2 * span)
		best = NAN;
	if (isfinite(best) && (best <= v_prev || best > pts[n - 1].volume_ml))
		best = NAN;
out:
	free(x);
	free(y1);
	free(y2);
	free(xw);
	return best;
}

int endpoint_find(const method_t *m, const engine_point_t *pts, int n, int dir, bool final,
                  double start_volume_ml, engine_endpoint_t *out, int cap)
{
	if (!pts || n < 1 || cap < 1)
		return 0;
	if (m->detect == DETECT_TARGET)
		return find_target(m, pts, n, dir, out, cap);
	int k = find_inflections(m, pts, n, dir, final, out, cap);
	if (m->detect == DETECT_GRAN && final) {
		int ph_dir = m->signal == SIGNAL_MV ? -dir : dir;
		double v_prev = 0;
		for (int i = 0; i < k; i++) {
			double u_se = NAN, ve0 = out[i].volume_ml;
			double g =
			    gran_volume(m, pts, n, ph_dir, v_prev, ve0, start_volume_ml, &u_se);
			v_prev = ve0;
			if (isfinite(g)) {
				out[i].volume_ml = g;
				fill_point_fields(pts, n, &out[i]);
				out[i].how = "gran";
				/* The line's own scatter, and half its distance from
				 * the derivative's volume: a Gran line bent by
				 * changing activity coefficients (docs/engine.md)
				 * has a small scatter but lands away from the jump. */
				double half = (g - ve0) / 2;
				out[i].u_volume_ml = sqrt(u_se * u_se + half * half);
				double u_d = step_at(pts, n, ve0) / sqrt(12.0);
				if (fabs(g - ve0) > 2 * sqrt(u_se * u_se + u_d * u_d))
					snprintf(out[i].doubt, sizeof out[i].doubt,
					         "the Gran line (%.4f mL) and the derivative (%.4f "
					         "mL) disagree",
					         g, ve0);
			}
		}
	}
	return k;
}

double endpoint_sigma_signal(const method_t *m)
{
	/* A settled point is good to about half the settling band (the
	 * electrode may still creep within it), and never better than the
	 * meter's resolution (0.001 pH / 0.1 mV, common practice,
	 * docs/chemistry.md §10). */
	return fmax(m->signal == SIGNAL_MV ? 0.1 : 0.002, m->still_within / 2);
}

/* The lag of the points around the addition ending at point i (it, the
 * one before and the one after), mL: the largest (endpoint_lag_ml). */
static double bracket_lag_ml(const engine_point_t *pts, int n, int i)
{
	double lag = 0;
	for (int j = i - 1; j <= i + 1; j++)
		if (j >= 0 && j < n)
			lag = fmax(lag, endpoint_lag_ml(pts, n, j));
	return lag;
}

/* u of a first-derivative volume v, mL: the peak lies somewhere on the
 * addition that brackets v (rectangular over that step h: h/sqrt 12; the
 * parabola through the top narrows it, so this is an upper figure where the
 * top has many points), and the reading noise through the steepest slope
 * there (signal/mL). */
static double deriv_u(const method_t *m, const engine_point_t *pts, int n, double v_ml)
{
	int i = bracket_at(pts, n, v_ml);
	if (i < 1)
		return NAN;
	double h = pts[i].volume_ml - pts[i - 1].volume_ml;
	double g = fmax(fabs(pts[i].dpdv), fabs(pts[i - 1].dpdv));
	g = fmax(g, h > 0 ? fabs(pts[i].signal - pts[i - 1].signal) / h : 0);
	double u_noise = g > 0 ? endpoint_sigma_signal(m) / g : 0;
	double u_lag = bracket_lag_ml(pts, n, i);
	return sqrt(h * h / 12 + u_noise * u_noise + u_lag * u_lag);
}

/* V at signal t on the quadratic V(S) through points a, b, c (inverse
 * interpolation); NaN when two signals coincide. */
static double inverse_quadratic(const engine_point_t *a, const engine_point_t *b,
                                const engine_point_t *c, double t)
{
	double sa = a->signal, sb = b->signal, sc = c->signal;
	if (sa == sb || sb == sc || sa == sc)
		return NAN;
	return a->volume_ml * (t - sb) * (t - sc) / ((sa - sb) * (sa - sc)) +
	       b->volume_ml * (t - sa) * (t - sc) / ((sb - sa) * (sb - sc)) +
	       c->volume_ml * (t - sa) * (t - sb) / ((sc - sa) * (sc - sb));
}

/* u of a target crossing at v, mL: the settling band (a point accepted
 * as still may lag its settled value by up to still_within, always on the
 * same side: the whole band) and the reading noise, each through the
 * flatter of the bracketing addition and the one before it; and the
 * curve's bend between the two points: the most that a quadratic through
 * a third point, or a straight line in the ion's concentration, moves the
 * crossing, at most the step's own h/sqrt 3. */
static double target_u(const method_t *m, const engine_point_t *pts, int n, double v_ml)
{
	int i = bracket_at(pts, n, v_ml);
	if (i < 1)
		return NAN;
	const engine_point_t *p0 = &pts[i - 1], *p1 = &pts[i];
	double h = p1->volume_ml - p0->volume_ml;
	double ds = fabs(p1->signal - p0->signal);
	double u_band, u_noise;
	/* the slope on the approach: the addition before the bracketing one
	 * when it was flatter (the lag of the last reading acts there) */
	double per = h > 0 && ds > 0 ? h / ds : 0;
	if (per > 0 && i >= 2) {
		double h0 = p0->volume_ml - pts[i - 2].volume_ml;
		double ds0 = fabs(p0->signal - pts[i - 2].signal);
		if (h0 > 0 && ds0 > 0)
			per = fmax(per, h0 / ds0);
	}
	if (per > 0) {
		u_band = m->still_within * per;
		u_noise = endpoint_sigma_signal(m) * per;
	} else {
		u_band = h / sqrt(3.0);
		u_noise = 0;
	}
	double bend = 0;
	if (i >= 2) {
		double q = inverse_quadratic(&pts[i - 2], p0, p1, m->target);
		if (isfinite(q))
			bend = fmax(bend, fabs(q - v_ml));
	}
	if (i + 1 < n) {
		double q = inverse_quadratic(p0, p1, &pts[i + 1], m->target);
		if (isfinite(q))
			bend = fmax(bend, fabs(q - v_ml));
	}
	/* ... and as far as interpolating the ion's concentration instead of
	 * its logarithm moves it, either way round ([H+] or [OH-]): past an
	 * equivalence point the excess ion grows linearly with the volume,
	 * so the curve between two points on the jump bends like a log. */
	double per_ph = m->signal == SIGNAL_MV ? 1.0 / 59.16 : 1.0; /* pH per signal unit */
	for (int sgn = -1; sgn <= 1 && h > 0; sgn += 2) {
		double c0 = pow(10.0, sgn * per_ph * p0->signal);
		double c1 = pow(10.0, sgn * per_ph * p1->signal);
		double ct = pow(10.0, sgn * per_ph * m->target);
		if (c1 != c0 && isfinite(c0) && isfinite(c1)) {
			double ve = p0->volume_ml + (ct - c0) / (c1 - c0) * h;
			if (isfinite(ve))
				bend = fmax(bend, fabs(ve - v_ml));
		}
	}
	bend = fmin(bend, h / sqrt(3.0));
	/* A strong system's crossing (find_target read it on the line of the
	 * excess): the curve's own bend is how far the neighbouring lines miss
	 * it, and the other shapes above do not apply. */
	double miss = 0, vs = strong_crossing(m, pts, n, i, &miss);
	if (isfinite(vs) && fabs(vs - v_ml) < 1e-12)
		bend = miss;
	double u_lag = bracket_lag_ml(pts, n, i);
	return sqrt(u_band * u_band + u_noise * u_noise + bend * bend + u_lag * u_lag);
}

void endpoint_assess(const method_t *m, const engine_point_t *pts, int n, double quantum_ml,
                     engine_endpoint_t *eps, int n_eps)
{
	double u_q = quantum_ml > 0 ? quantum_ml / sqrt(3.0) : 0;
	for (int i = 0; i < n_eps; i++) {
		engine_endpoint_t *ep = &eps[i];
		double v = ep->volume_ml;
		bool model = ep->how && !strcmp(ep->how, "model");
		double u = ep->u_volume_ml;
		if (ep->how && !strcmp(ep->how, "target"))
			u = target_u(m, pts, n, v);
		else if (ep->how && !strcmp(ep->how, "inflection"))
			u = deriv_u(m, pts, n, v);
		else if (!isfinite(u))
			u = deriv_u(m, pts, n, v);
		/* the burette's step on every volume but the model's, whose fit
		 * already weighs it */
		if (!model)
			u = sqrt(u * u + u_q * u_q);
		if (!(u > 0) || !isfinite(u))
			u = fmax(u_q, step_at(pts, n, v) / sqrt(12.0));
		if (!(u > 0))
			u = fmax(fabs(v), 1.0); /* nothing measured near it: u as large as it */
		ep->u_volume_ml = u;

		if (ep->doubt[0])
			continue;
		/* The fit and the derivative disagree beyond both uncertainties. */
		if (isfinite(ep->model_ml) && isfinite(ep->deriv_ml)) {
			double u_d = deriv_u(m, pts, n, ep->deriv_ml);
			double u_m = model ? u : ep->model_u_ml;
			double d = fabs(ep->model_ml - ep->deriv_ml);
			if (isfinite(u_d) && isfinite(u_m) && d > 2 * sqrt(u_d * u_d + u_m * u_m)) {
				snprintf(
				    ep->doubt, sizeof ep->doubt,
				    "the model fit (%.4f mL) and the derivative (%.4f mL) disagree",
				    ep->model_ml, ep->deriv_ml);
				continue;
			}
		}
		/* Never below two burette steps: no method can locate a volume
		 * better than the burette delivers it (a 0.1 mL blank is read to
		 * its step, not to 0.1 % of itself). */
		double pct = fabs(v) > 0 ? 100 * u / fabs(v) : INFINITY;
		double limit_ml = fmax(m->u_max_pct / 100 * fabs(v), 2 * quantum_ml);
		if (u > limit_ml) {
			double h = step_at(pts, n, v);
			bool jump = !ep->how || strcmp(ep->how, "target");
			if (jump && !model && h > 2 * sqrt(3.0) * limit_ml)
				snprintf(ep->doubt, sizeof ep->doubt,
				         "too few points across the jump: one addition of %.4f mL "
				         "spans it (u %.2f %%, limit %.2f %%)",
				         h, pct, m->u_max_pct);
			else
				snprintf(
				    ep->doubt, sizeof ep->doubt,
				    "u %.4f mL is %.2f %% of the volume, above the limit %.2f %%",
				    u, pct, m->u_max_pct);
		}
	}
}
