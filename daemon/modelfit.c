/* modelfit.c: least-squares fit of an acid-base model to a measured curve.
 *
 * The model: the sample holds G weak proton groups (amount n_j mmol, pKa_j)
 * and a constant charge Q0 mmol (strong acids and bases, counter ions). The
 * titrant is a strong base (c > 0) or acid (c < 0) of c mol/L = mmol/mL. The
 * charge balance after V mL in V0 + V mL of liquid,
 *     (V0 + V)(h - Kw/h) + Q0 - sum_j n_j K_j/(h + K_j) + c V = 0,
 * is linear in V, so the volume at a given pH is explicit:
 *     V(h) = (sum_j n_j a_j(h) - Q0 - V0 D) / (D + c),  D = h - Kw/h.
 * This is the classic trick of writing the titration curve as V(pH); it needs
 * no equation solving per point. Concentrations stand for activities (ideal):
 * the fitted pKa values are apparent ones, which absorbs activity effects.
 *
 * The measured pH comes through the electrode with a free offset and slope:
 * pH = 7 + g (x - 7) + d, where x is the nominal pH of the signal.
 *
 * The fit minimises sum_i ((V(h_i) - V_i) / s_i)^2 with effective variances
 * s_i^2 = (dV/dpH_i * sigma_pH)^2 + sigma_V^2 (the reading noise carried
 * into volume along the curve, plus the burette's resolution), with
 * dV/dpH from the data. The amounts n_j and Q0 enter linearly and are solved
 * exactly for each trial of the nonlinear parameters (d, g, pKa_j) (variable
 * projection); those are found by Levenberg-Marquardt with weak priors on d
 * (0 +- 0.5 pH) and g (1 +- 0.05) so a curve without strong-acid or -base
 * stretches, which cannot tell offset from pKa, stays well posed.
 *
 * Endpoint i lies where the groups titrated before it are used up:
 * V_eq,i = (sum of n_j of those groups - Q0) / c, and its standard
 * uncertainty follows from the covariance of all parameters (Gauss-Newton,
 * scaled by the reduced chi-square).
 */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "endpoint.h"

#define MF_MAX_G  (METHOD_MAX_ENDPOINTS + 1) /* two groups may share the first step */
#define MF_MAX_NL (2 + MF_MAX_G)
#define MF_MAX_P  (MF_MAX_NL + MF_MAX_G + 1)

typedef struct fit {
	const modelfit_ctx_t *c;
	int n;
	const double *v, *x, *w; /* volume, nominal pH, 1/s_i */
	int g;                   /* weak groups */
	int seg[MF_MAX_G];       /* segment of each group: titrated before endpoint seg+1 */
	double kw;
	double *scratch; /* n x (MF_MAX_G + 2): basis values per point */
	/* current nonlinear parameters: d, g, pKa... and the linear solution */
	double lin[MF_MAX_G + 1]; /* n_1..n_G, Q0 */
} fit_t;

/* Solve A x = b (dim k, A row-major) by Gaussian elimination with partial
 * pivoting; returns -1 when singular. A and b are overwritten. */
static int solve(double *a, double *b, int k)
{
	for (int c = 0; c < k; c++) {
		int p = c;
		for (int r = c + 1; r < k; r++)
			if (fabs(a[r * k + c]) > fabs(a[p * k + c]))
				p = r;
		if (!(fabs(a[p * k + c]) > 1e-300))
			return -1;
		if (p != c) {
			for (int j = 0; j < k; j++) {
				double t = a[c * k + j];
				a[c * k + j] = a[p * k + j];
				a[p * k + j] = t;
			}
			double t = b[c];
			b[c] = b[p];
			b[p] = t;
		}
		for (int r = c + 1; r < k; r++) {
			double f = a[r * k + c] / a[c * k + c];
			for (int j = c; j < k; j++)
				a[r * k + j] -= f * a[c * k + j];
			b[r] -= f * b[c];
		}
	}
	for (int c = k - 1; c >= 0; c--) {
		double s = b[c];
		for (int j = c + 1; j < k; j++)
			s -= a[c * k + j] * b[j];
		b[c] = s / a[c * k + c];
		if (!isfinite(b[c]))
			return -1;
	}
	return 0;
}

/* 10^-x, by exp: the fit evaluates it thousands of times. */
static double p10(double x)
{
	return exp(-M_LN10 * x);
}

/* Basis values at point i for the linear unknowns and the fixed part:
 * V = sum_j lin_j * phi_j + f0, with k[j] = 10^-pKa_j precomputed.
 * Returns false where the model is singular. */
static bool basis_k(const fit_t *f, const double *nl, const double *k, int i, double *phi,
                    double *f0)
{
	double ph = 7.0 + nl[1] * (f->x[i] - 7.0) + nl[0];
	double h = p10(ph);
	double dd = h - f->kw / h;
	double den = dd + f->c->dir * f->c->titrant_molar;
	if (!(fabs(den) > 1e-12) || !isfinite(den))
		return false;
	for (int j = 0; j < f->g; j++)
		phi[j] = k[j] / (h + k[j]) / den;
	phi[f->g] = -1.0 / den;
	*f0 = -f->c->start_volume_ml * dd / den;
	return true;
}

static void pka_to_k(const fit_t *f, const double *nl, double *k)
{
	for (int j = 0; j < f->g; j++)
		k[j] = p10(nl[2 + j]);
}

/* Model volume at point i for explicit parameters (NaN where singular). */
static double model_v(const fit_t *f, const double *nl, const double *lin, int i)
{
	double phi[MF_MAX_G + 1], f0, k[MF_MAX_G] = {0};
	pka_to_k(f, nl, k);
	if (!basis_k(f, nl, k, i, phi, &f0))
		return NAN;
	double v = f0;
	for (int a = 0; a <= f->g; a++)
		v += lin[a] * phi[a];
	return v;
}

/* Residuals for nonlinear parameters nl; solves the linear part into f->lin.
 * r has n + 2 entries (the last two are the priors). Returns chi-square or
 * INFINITY. */
static double residuals(fit_t *f, const double *nl, double *r)
{
	int m = f->g + 1, stride = MF_MAX_G + 2;
	double ata[(MF_MAX_G + 1) * (MF_MAX_G + 1)] = {0}, atb[MF_MAX_G + 1] = {0};
	double k[MF_MAX_G] = {0};
	pka_to_k(f, nl, k);
	for (int i = 0; i < f->n; i++) {
		double *phi = f->scratch + (size_t)i * stride;
		if (!basis_k(f, nl, k, i, phi, &phi[m]))
			return INFINITY;
		double w2 = f->w[i] * f->w[i];
		double y = f->v[i] - phi[m];
		for (int a = 0; a < m; a++) {
			atb[a] += w2 * phi[a] * y;
			for (int b = 0; b < m; b++)
				ata[a * m + b] += w2 * phi[a] * phi[b];
		}
	}
	/* A tiny ridge keeps a group the data cannot see from going singular. */
	for (int a = 0; a < m; a++)
		ata[a * m + a] += 1e-12 * (ata[a * m + a] + 1e-30);
	if (solve(ata, atb, m) < 0)
		return INFINITY;
	memcpy(f->lin, atb, (size_t)m * sizeof(double));
	double chi = 0;
	for (int i = 0; i < f->n; i++) {
		const double *phi = f->scratch + (size_t)i * stride;
		double vm = phi[m];
		for (int a = 0; a < m; a++)
			vm += f->lin[a] * phi[a];
		r[i] = (vm - f->v[i]) * f->w[i];
		chi += r[i] * r[i];
	}
	r[f->n] = nl[0] / 0.5;
	r[f->n + 1] = (nl[1] - 1.0) / 0.05;
	chi += r[f->n] * r[f->n] + r[f->n + 1] * r[f->n + 1];
	return isfinite(chi) ? chi : INFINITY;
}

static void clamp_nl(const fit_t *f, double *nl)
{
	nl[0] = fmax(-2.0, fmin(2.0, nl[0]));
	nl[1] = fmax(0.8, fmin(1.2, nl[1]));
	for (int j = 0; j < f->g; j++)
		nl[2 + j] = fmax(-1.0, fmin(15.0, nl[2 + j]));
}

/* Levenberg-Marquardt on the nonlinear parameters; returns chi-square. */
static double lm(fit_t *f, double *nl, double *r, double *r2, double *jac)
{
	int np = 2 + f->g, nr = f->n + 2;
	double chi = residuals(f, nl, r);
	if (!isfinite(chi))
		return chi;
	double lambda = 1e-3;
	for (int it = 0; it < 60; it++) {
		/* Jacobian by forward differences. */
		for (int p = 0; p < np; p++) {
			double save = nl[p], h = 1e-6 * (fabs(save) + 1e-2);
			nl[p] = save + h;
			double c2 = residuals(f, nl, r2);
			nl[p] = save;
			if (!isfinite(c2))
				return residuals(f, nl, r);
			for (int i = 0; i < nr; i++)
				jac[i * np + p] = (r2[i] - r[i]) / h;
		}
		residuals(f, nl, r); /* restore f->lin for nl */
		double jtj[MF_MAX_NL * MF_MAX_NL] = {0}, jtr[MF_MAX_NL] = {0};
		for (int a = 0; a < np; a++) {
			jtr[a] = 0;
			for (int i = 0; i < nr; i++)
				jtr[a] += jac[i * np + a] * r[i];
			for (int b = 0; b < np; b++) {
				double s = 0;
				for (int i = 0; i < nr; i++)
					s += jac[i * np + a] * jac[i * np + b];
				jtj[a * np + b] = s;
			}
		}
		bool improved = false;
		for (int tries = 0; tries < 12 && !improved; tries++) {
			double a[MF_MAX_NL * MF_MAX_NL], step[MF_MAX_NL], trial[MF_MAX_NL];
			memcpy(a, jtj, sizeof a);
			for (int p = 0; p < np; p++) {
				a[p * np + p] *= 1.0 + lambda;
				a[p * np + p] += 1e-15;
				step[p] = -jtr[p];
			}
			if (solve(a, step, np) < 0) {
				lambda *= 10;
				continue;
			}
			for (int p = 0; p < np; p++)
				trial[p] = nl[p] + step[p];
			clamp_nl(f, trial);
			double c2 = residuals(f, trial, r2);
			if (c2 < chi) {
				double gain = chi - c2;
				memcpy(nl, trial, (size_t)np * sizeof(double));
				memcpy(r, r2, (size_t)nr * sizeof(double));
				chi = c2;
				lambda = fmax(lambda / 10, 1e-9);
				improved = true;
				if (gain < 1e-9 * (chi + 1e-12)) {
					residuals(f, nl, r);
					return chi;
				}
			} else {
				lambda *= 10;
			}
		}
		if (!improved)
			break;
	}
	residuals(f, nl, r); /* leave f->lin matching nl */
	return chi;
}

/* V_eq of endpoint i (0-based) as weights over the linear unknowns. */
static void eq_weights(const fit_t *f, int i, double *wt)
{
	double c = f->c->dir * f->c->titrant_molar;
	for (int j = 0; j < f->g; j++) {
		bool before = f->seg[j] < i + 1;
		bool used = f->c->dir > 0 ? before : !before;
		wt[j] = used ? 1.0 / c : 0.0;
	}
	wt[f->g] = -1.0 / c;
}

typedef struct variant {
	double chi;
	int g;
	int seg[MF_MAX_G];
	double nl[MF_MAX_NL];
	double lin[MF_MAX_G + 1];
} variant_t;

static void try_variant(fit_t *f, variant_t *best, const double *nl0, double *r, double *r2,
                        double *jac)
{
	double nl[MF_MAX_NL];
	memcpy(nl, nl0, sizeof nl);
	double chi = lm(f, nl, r, r2, jac);
	/* A group the data cannot see is no group: its pKa must lie within the
	 * measured pH range (one unit beyond either end at most) and its amount
	 * must be positive, else its amount is free to take any value and the
	 * endpoint with it. */
	double lo = INFINITY, hi = -INFINITY;
	for (int i = 0; i < f->n; i++) {
		double ph = 7.0 + nl[1] * (f->x[i] - 7.0) + nl[0];
		lo = fmin(lo, ph);
		hi = fmax(hi, ph);
	}
	for (int j = 0; j < f->g; j++)
		if (!(nl[2 + j] > lo - 1 && nl[2 + j] < hi + 1 && f->lin[j] > 0))
			return;
	/* Akaike-like penalty: each group costs two parameters. */
	double score = chi + 2.0 * 2 * f->g;
	if (isfinite(chi) && score < best->chi) {
		best->chi = score;
		best->g = f->g;
		memcpy(best->seg, f->seg, sizeof best->seg);
		memcpy(best->nl, nl, sizeof nl);
		memcpy(best->lin, f->lin, sizeof best->lin);
	}
}

/* Width of the points around volume v (one point beyond each neighbour):
 * how far the derivative's own result can be off when the additions there
 * were large, mL. */
static double bracket_ml(const engine_point_t *pts, int n, double v)
{
	int i = 0;
	while (i < n - 1 && pts[i + 1].volume_ml < v)
		i++;
	int a = i > 0 ? i - 1 : 0, b = i + 2 < n ? i + 2 : n - 1;
	return pts[b].volume_ml - pts[a].volume_ml;
}

int modelfit_refine(const modelfit_ctx_t *c, const engine_point_t *pts, int n,
                    engine_endpoint_t *eps, int n_eps)
{
	if (n_eps < 1 || n_eps > MF_MAX_G || !(c->titrant_molar > 0) || c->dir == 0)
		return 1;
	int ne = n_eps, rc = 1;
	double *scratch = NULL;
	double *buf = malloc((size_t)(n * 3 + 2 * (n + 2) + (n + 2) * MF_MAX_NL) * sizeof *buf);
	if (!buf)
		return 1;
	double *v = buf, *x = buf + n, *w = buf + 2 * n, *r = buf + 3 * n, *r2 = r + n + 2;
	double *jac = r2 + n + 2;
	int k = 0;
	for (int i = 0; i < n; i++) {
		double xi = 7.0 + (pts[i].signal - c->sig7) / c->sig_per_ph;
		if (!isfinite(xi))
			continue;
		v[k] = pts[i].volume_ml;
		x[k] = xi;
		k++;
	}
	if (k < 2 * ne + 4)
		goto out;
	/* Effective variance weights with dV/dpH from the neighbouring points. */
	double sig_ph = c->sigma_signal / fabs(c->sig_per_ph);
	for (int i = 0; i < k; i++) {
		int a = i > 0 ? i - 1 : i, b = i < k - 1 ? i + 1 : i;
		double dx = fabs(x[b] - x[a]);
		double dvdph = dx > 1e-9 ? (v[b] - v[a]) / dx : 1e3;
		double s2 = dvdph * dvdph * sig_ph * sig_ph + c->sigma_ml * c->sigma_ml;
		w[i] = 1.0 / sqrt(s2);
	}

	scratch = malloc((size_t)k * (MF_MAX_G + 2) * sizeof *scratch);
	if (!scratch)
		goto out;
	fit_t f = {
	    .c = c, .n = k, .v = v, .x = x, .w = w, .kw = pow(10.0, -c->pkw), .scratch = scratch};
	variant_t best = {.chi = INFINITY};
	/* Variants: groups between consecutive endpoints always (a step between
	 * two endpoints needs a weak group); before the first endpoint none (a
	 * strong analyte), one, or two (two protons titrated together, such as
	 * malic or citric acid, whose pKa values lie close). */
	for (int first = 2; first >= 0; first--) {
		if (first + ne - 1 > MF_MAX_G)
			continue;
		f.g = 0;
		double nl0[MF_MAX_NL] = {0.0, 1.0};
		for (int s = first ? 0 : 1; s < ne; s++) {
			double va = s == 0 ? 0.0 : eps[s - 1].volume_ml;
			double vb = eps[s].volume_ml;
			int groups = s == 0 ? first : 1;
			for (int q = 0; q < groups; q++) {
				/* pKa guesses: the pH at the middle of the step, or at
				 * its quarter points for two groups */
				double at = groups == 1 ? 0.5 : (q == 0 ? 0.25 : 0.75);
				double ph = endpoint_interp(pts, n, va + at * (vb - va), 0);
				ph = 7.0 + (ph - c->sig7) / c->sig_per_ph;
				f.seg[f.g] = s;
				nl0[2 + f.g] = isfinite(ph) ? ph : 7.0;
				f.g++;
			}
		}
		try_variant(&f, &best, nl0, r, r2, jac);
	}
	if (!isfinite(best.chi))
		goto out;

	/* Covariance of all parameters at the optimum (nonlinear and linear). */
	f.g = best.g;
	memcpy(f.seg, best.seg, sizeof f.seg);
	int np = 2 + f.g, nl_n = np, nall = np + f.g + 1, nr = k + 2;
	double chi = residuals(&f, best.nl, r);
	if (!isfinite(chi))
		goto out;
	double *ja = malloc((size_t)nr * (size_t)nall * sizeof *ja);
	if (!ja)
		goto out;
	double all[MF_MAX_P];
	memcpy(all, best.nl, (size_t)nl_n * sizeof(double));
	memcpy(all + nl_n, f.lin, (size_t)(f.g + 1) * sizeof(double));
	for (int p = 0; p < nall; p++) {
		double trial[MF_MAX_P];
		memcpy(trial, all, sizeof trial);
		double h = 1e-6 * (fabs(all[p]) + 1e-4);
		trial[p] += h;
		for (int i = 0; i < k; i++) {
			double v0 = model_v(&f, all, all + nl_n, i);
			double v1 = model_v(&f, trial, trial + nl_n, i);
			ja[i * nall + p] = (v1 - v0) * w[i] / h;
		}
		ja[k * nall + p] = p == 0 ? 1.0 / 0.5 : 0.0;
		ja[(k + 1) * nall + p] = p == 1 ? 1.0 / 0.05 : 0.0;
	}
	double jtj[MF_MAX_P * MF_MAX_P] = {0};
	for (int a = 0; a < nall; a++)
		for (int b = 0; b < nall; b++) {
			double s = 0;
			for (int i = 0; i < nr; i++)
				s += ja[i * nall + a] * ja[i * nall + b];
			jtj[a * nall + b] = s;
		}
	free(ja);
	int dof = k - nall;
	double red = dof > 0 ? chi / dof : INFINITY;
	double rms = sqrt(red);
	double s2 = fmax(1.0, red);

	rc = 0;
	for (int i = 0; i < ne; i++) {
		double wt[MF_MAX_G + 1], rhs[MF_MAX_P], a[MF_MAX_P * MF_MAX_P];
		eq_weights(&f, i, wt);
		double veq = 0;
		for (int j = 0; j <= f.g; j++)
			veq += wt[j] * f.lin[j];
		/* var = g' C g with C = s2 (J'J)^-1: solve (J'J) y = g. */
		memset(rhs, 0, sizeof rhs);
		for (int j = 0; j <= f.g; j++)
			rhs[nl_n + j] = wt[j];
		memcpy(a, jtj, sizeof a);
		double u = NAN;
		double gvec[MF_MAX_P];
		memcpy(gvec, rhs, sizeof gvec);
		if (solve(a, rhs, nall) == 0) {
			double var = 0;
			for (int p = 0; p < nall; p++)
				var += gvec[p] * rhs[p];
			if (var >= 0)
				u = sqrt(s2 * var);
		}
		eps[i].model_ml = veq;
		eps[i].model_rms = rms;
		/* Good fit: residuals near the assumed noise, a small uncertainty,
		 * and agreement with the derivative within a few percent (a model
		 * that found another step is no refinement). */
		double dv = fabs(veq - eps[i].deriv_ml);
		double span = bracket_ml(pts, n, eps[i].deriv_ml);
		/* ... and inside the measured curve: a fit is no measurement of an
		 * endpoint the additions never reached. */
		bool inside = veq > pts[0].volume_ml && veq <= pts[n - 1].volume_ml;
		bool good = inside && isfinite(veq) && isfinite(u) && rms <= 4.0 &&
		            u <= 0.01 * fabs(eps[i].deriv_ml) + 0.002 &&
		            dv <= 0.03 * fabs(eps[i].deriv_ml) + 0.01 + span;
		if (good) {
			eps[i].volume_ml = veq;
			eps[i].u_volume_ml = u;
			eps[i].how = "model";
			eps[i].signal = endpoint_interp(pts, n, veq, 0);
			eps[i].ph = endpoint_interp(pts, n, veq, 1);
			eps[i].mv = endpoint_interp(pts, n, veq, 2);
			eps[i].half_ph = endpoint_interp(pts, n, veq / 2, 1);
		} else {
			rc = 1;
		}
	}
out:
	free(scratch);
	free(buf);
	return rc;
}
