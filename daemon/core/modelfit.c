/* modelfit.c: least-squares fit of an acid-base model to a measured curve.
 *
 * The model: the sample holds G weak proton groups (amount n_j mmol, pKa_j)
 * and a constant charge Q0 mmol (strong acids and bases, counter ions, and
 * the charge of the groups' acid forms). The titrant is a strong base (c > 0)
 * or acid (c < 0) of c mol/L = mmol/mL. With h = [H+] and oh = [OH-] the
 * charge balance after V mL in V0 + V mL of liquid,
 *     (V0 + V)(h - oh) + Q0 - sum_j n_j alpha_j + c V = 0,
 * alpha_j the deprotonated fraction of group j, is linear in V, so the volume
 * at a given pH is explicit:
 *     V(pH) = (sum_j n_j alpha_j - Q0 - V0 D) / (D + c),  D = h - oh.
 * This is the classic trick of writing the titration curve as V(pH); it needs
 * no equation solving per point.
 *
 * Activity. The electrode measures a(H+) = 10^-pH, the same as the beaker of
 * chem.c does, so with Davies coefficients (chem_davies_log_gamma, the
 * simulator's law; Davies 1962) at point i's ionic strength I_i,
 *     h = a_H / gamma_1,  oh = Kw / (a_H gamma_1),
 *     alpha_j = K'_j / (a_H + K'_j),  K'_j = K_j gamma(z_a) / gamma(z_a - 1),
 * z_a the charge of the group's acid form; pKa_j stays the thermodynamic
 * value and the fitted parameter. I_i comes from the composition the fit
 * itself gives at V_i: the titrant's counter-ion c V, h and oh, the sample's
 * strong ions and the groups' species. With I_i held, V(pH) is explicit as
 * before, so the fit alternates: fit with the activity terms held, then
 * recompute them from that fit (a fixed point; each pass moves log gamma
 * tens of times less, so three or four passes do). Without this, the
 * apparent pKa of a step whose charges go -1 -> -2 drifts by
 * 3 delta(log gamma_1) along the curve (0.06 for maleic acid, I 0.01 ->
 * 0.025 mol/L), which biased the endpoints of the bench's polyprotic acids
 * and mixture by up to ~0.15 % on average.
 *
 * Charges are not known to the fit; it assumes:
 *   - the groups are the successive protons of one kind of molecule, in
 *     order of pKa: the most acidic group's acid form has charge z_top, the
 *     next z_top - 1, and so on (a base titrant's groups are in segment
 *     order, an acid titrant's in reverse);
 *   - z_top is 0 (a neutral acid such as acetic, maleic or phosphoric acid,
 *     or the acid form of carbonate or acetate titrated with acid), +1 (a
 *     cationic acid: ammonium, an amine or an amino acid hydrochloride) or
 *     -1 (an anion such as hydrogen phthalate); each is fitted and the
 *     lowest chi-square wins, as for the group counts;
 *   - Q0 minus the charge of the acid forms (z_top times the first group's
 *     amount) is one kind of singly charged strong ion (Cl-, Na+), and a
 *     salt background the curve cannot show is absent.
 * Mixtures of molecules of different charge types (acetic acid with
 * ammonium) get wrong terms for some groups, and those can be biased by
 * about the drift of their apparent pKa over their steps, as an ideal fit
 * is.
 * ctx->activity false fits concentrations for activities (the fitted pKa are
 * then apparent ones), for curves from an ideal model.
 *
 * The measured pH comes through the electrode with a free offset and slope:
 * pH = 7 + g (x - 7) + d, where x is the nominal pH of the signal.
 *
 * The fit minimises sum_i ((V(pH_i) - V_i) / s_i)^2 with effective variances
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
 * scaled by the reduced chi-square; the activity terms count as known).
 */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "chem.h"
#include "endpoint.h"
#include "modelfit.h"

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
	/* Activity (see the header): Davies A (0: ideal), the charge of each
	 * group's acid form, and per point 1/gamma_1 and each group's factor
	 * K_cond/K = gamma_acid/gamma_base, held fixed within one fit pass. */
	double a_davies;
	int zp[MF_MAX_G];
	double *ig1;           /* n */
	double *gf;            /* n x MF_MAX_G */
	double ep_x[MF_MAX_G]; /* nominal pH at each endpoint (the derivative's) */
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
	double ah = p10(ph); /* the measured pH is the activity of H+ */
	double ig = f->ig1[i];
	double dd = ah * ig - f->kw * ig / ah; /* [H+] - [OH-] */
	double den = dd + f->c->dir * f->c->titrant_molar;
	if (!(fabs(den) > 1e-12) || !isfinite(den))
		return false;
	const double *gf = f->gf + (size_t)i * MF_MAX_G;
	for (int j = 0; j < f->g; j++) {
		double kc = k[j] * gf[j];
		phi[j] = kc / (ah + kc) / den;
	}
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
				/* Converged: chi-square or the parameters (pH units,
				 * slope) no longer move by anything that shows. */
				double big = 0;
				for (int p = 0; p < np; p++)
					big = fmax(big, fabs(step[p]));
				if (gain < 1e-6 * (chi + 1.0) || big < 1e-6) {
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

/* Reset the activity terms to ideal (gamma = 1 everywhere). */
static void set_ideal(fit_t *f)
{
	for (int i = 0; i < f->n; i++) {
		f->ig1[i] = 1.0;
		for (int j = 0; j < MF_MAX_G; j++)
			f->gf[(size_t)i * MF_MAX_G + j] = 1.0;
	}
}

/* One fixed-point pass on the activity terms: each point's ionic strength
 * from the composition the fit (nl, lin) says the beaker has at that
 * volume, then gamma_1 (Davies) and the groups' factors from it. Returns
 * the largest change of log10 gamma_1. */
static double update_activity(fit_t *f, const double *nl, const double *lin)
{
	double k[MF_MAX_G] = {0}, worst = 0.0;
	pka_to_k(f, nl, k);
	/* The sample's strong ions: Q0 is their net charge plus the charge the
	 * acid forms bring (zp of the first group, per molecule); taken as one
	 * kind of singly charged ion. */
	int first = 0;
	for (int j = 1; j < f->g; j++)
		if (f->zp[j] > f->zp[first])
			first = j;
	double n_mol = f->g > 0 ? fmax(lin[first], 0.0) : 0.0;
	double z0 = f->g > 0 ? f->zp[first] : 0.0;
	double strong = fabs(lin[f->g] - z0 * n_mol);
	double ct = fabs(f->c->titrant_molar);
	for (int i = 0; i < f->n; i++) {
		double ph = 7.0 + nl[1] * (f->x[i] - 7.0) + nl[0];
		double ah = p10(ph), vt = f->c->start_volume_ml + f->v[i];
		if (!(vt > 0) || !isfinite(ah))
			continue;
		double lg_old = -log10(f->ig1[i]), lg = lg_old;
		/* Two inner steps: [H+], [OH-] and the fractions depend on gamma
		 * themselves, weakly. */
		for (int it = 0; it < 2; it++) {
			double ig = p10(lg);
			/* sum c z^2 in mmol: titrant counter-ion, H+ and OH-, the
			 * sample's strong ions, the acid molecules' top charge
			 * and each group's change of z^2 as it loses its proton */
			double s2 = ct * fmax(f->v[i], 0.0) + vt * (ah * ig + f->kw * ig / ah) +
			            strong + n_mol * z0 * z0;
			for (int j = 0; j < f->g; j++) {
				int zp = f->zp[j], zd = zp - 1;
				double kc = k[j] * p10(-lg * (double)(zp * zp - zd * zd));
				double frac = kc / (ah + kc);
				s2 += fmax(lin[j], 0.0) * frac * (double)(zd * zd - zp * zp);
			}
			double ionic = 0.5 * fmax(s2, 0.0) / vt;
			lg = chem_davies_log_gamma(f->a_davies, 1, ionic);
		}
		worst = fmax(worst, fabs(lg - lg_old));
		f->ig1[i] = p10(lg);
		for (int j = 0; j < f->g; j++) {
			int zp = f->zp[j], zd = zp - 1;
			/* K_cond = K gamma_acid / gamma_base on the a(H+) scale */
			f->gf[(size_t)i * MF_MAX_G + j] = p10(-lg * (double)(zp * zp - zd * zd));
		}
	}
	return worst;
}

typedef struct variant {
	double chi;
	int g;
	int seg[MF_MAX_G];
	int zp[MF_MAX_G];
	double nl[MF_MAX_NL];
	double lin[MF_MAX_G + 1];
	double *ig1, *gf; /* the activity terms it was fitted with */
} variant_t;

/* Whether the fit in f (parameters nl, amounts f->lin) is a physical one. */
static bool valid(const fit_t *f, const double *nl)
{
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
			return false;
	/* A group titrated between two endpoints has its pKa between their
	 * pH values: it must be mostly titrated at its own endpoint and mostly
	 * not at the one before (0.5 pH of slack for the activity terms, which
	 * move the apparent pKa by up to ~0.3 at I ~ 0.05 mol/L). Without
	 * this, a group of a later step put before an earlier endpoint can fit
	 * the residue of the electrode's lag better than the right structure. */
	for (int j = 0; j < f->g; j++) {
		int sg = f->seg[j];
		double pka = nl[2 + j] * f->c->dir;
		double end = (7.0 + nl[1] * (f->ep_x[sg] - 7.0) + nl[0]) * f->c->dir;
		if (!(pka < end + 0.5))
			return false;
		if (sg > 0) {
			double before = (7.0 + nl[1] * (f->ep_x[sg - 1] - 7.0) + nl[0]) * f->c->dir;
			if (!(pka > before - 0.5))
				return false;
		}
	}
	return true;
}

/* Keep the fit in f (parameters nl, activity terms in f) when it is valid
 * and scores better than best. */
static void keep_if_better(fit_t *f, variant_t *best, const double *nl, double chi)
{
	if (!valid(f, nl))
		return;
	/* Akaike-like penalty: each group costs two parameters. */
	double score = chi + 2.0 * 2 * f->g;
	if (isfinite(chi) && score < best->chi) {
		best->chi = score;
		best->g = f->g;
		memcpy(best->seg, f->seg, sizeof best->seg);
		memcpy(best->zp, f->zp, sizeof best->zp);
		memcpy(best->nl, nl, MF_MAX_NL * sizeof(double));
		memcpy(best->lin, f->lin, sizeof best->lin);
		memcpy(best->ig1, f->ig1, (size_t)f->n * sizeof(double));
		memcpy(best->gf, f->gf, (size_t)f->n * MF_MAX_G * sizeof(double));
	}
}

/* Charge of the acid form of the most acidic group, per variant (see the
 * header): a neutral acid or base, a cation (ammonium), an anion (hydrogen
 * phthalate). */
static const int zp_top[] = {0, 1, -1};
#define MF_ACT_PASSES 4

/* The activity fit of one structure (groups and segments in f) with one
 * charge assignment, started from the ideal fit nl0/lin0: fixed-point
 * passes of "activity terms from the fit, then fit with them". Keeps it in
 * best when it is valid and better. */
static void try_charges(fit_t *f, variant_t *best, int ztop, const double *nl0, const double *lin0,
                        double *r, double *r2, double *jac)
{
	/* Groups in order of pKa: segment order for a base titrant, the
	 * reverse for an acid titrant (it titrates the most basic first). */
	for (int j = 0; j < f->g; j++) {
		int rank = f->c->dir > 0 ? j : f->g - 1 - j;
		f->zp[j] = ztop - rank;
	}
	double nl[MF_MAX_NL];
	memcpy(nl, nl0, sizeof nl);
	memcpy(f->lin, lin0, (size_t)(f->g + 1) * sizeof(double));
	set_ideal(f);
	double chi = INFINITY;
	for (int pass = 0; pass < MF_ACT_PASSES; pass++) {
		/* The terms move tens of times less each pass; 1e-4 in
		 * log gamma is ~0.02 % in gamma, far below the noise. */
		if (update_activity(f, nl, f->lin) < 1e-4 && pass > 0)
			break;
		chi = lm(f, nl, r, r2, jac);
		/* an unphysical fit does not come back: give it up early */
		if (!isfinite(chi) || !valid(f, nl))
			return;
	}
	keep_if_better(f, best, nl, chi);
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
	double *lag = malloc((size_t)n * sizeof *lag);
	int k = 0;
	if (!lag)
		goto out;
	for (int i = 0; i < n; i++) {
		double xi = 7.0 + (pts[i].signal - c->sig7) / c->sig_per_ph;
		if (!isfinite(xi))
			continue;
		v[k] = pts[i].volume_ml;
		x[k] = xi;
		lag[k] = endpoint_lag_ml(pts, n, i);
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
		double s2 =
		    dvdph * dvdph * sig_ph * sig_ph + c->sigma_ml * c->sigma_ml + lag[i] * lag[i];
		w[i] = 1.0 / sqrt(s2);
	}

	/* basis values, then the activity terms of the fit and of the best */
	size_t per = (size_t)(MF_MAX_G + 2) + 2 * (size_t)(1 + MF_MAX_G);
	scratch = malloc((size_t)k * per * sizeof *scratch);
	if (!scratch)
		goto out;
	double *act = scratch + (size_t)k * (MF_MAX_G + 2);
	fit_t f = {.c = c,
	           .n = k,
	           .v = v,
	           .x = x,
	           .w = w,
	           .kw = pow(10.0, -c->pkw),
	           .scratch = scratch,
	           .a_davies = c->activity ? chem_davies_a(c->temperature_c) : 0.0,
	           .ig1 = act,
	           .gf = act + k};
	for (int i = 0; i < ne; i++)
		f.ep_x[i] = 7.0 + (eps[i].signal - c->sig7) / c->sig_per_ph;
	double *best_act = act + (size_t)k * (1 + MF_MAX_G);
	variant_t best = {.chi = INFINITY, .ig1 = best_act, .gf = best_act + k};
	/* Structures: groups between consecutive endpoints always (a step
	 * between two endpoints needs a weak group); before the first endpoint
	 * none (a strong analyte), one, or two (two protons titrated together,
	 * such as malic or citric acid, whose pKa values lie close). Each is
	 * fitted ideal first; that fit starts the activity fits. */
	struct {
		int g, seg[MF_MAX_G];
		double chi, nl[MF_MAX_NL], lin[MF_MAX_G + 1];
		bool ok;
	} st[3];
	int n_st = 0;
	double best_ideal = INFINITY;
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
		set_ideal(&f);
		memset(f.zp, 0, sizeof f.zp);
		double chi = lm(&f, nl0, r, r2, jac);
		st[n_st].g = f.g;
		memcpy(st[n_st].seg, f.seg, sizeof f.seg);
		memcpy(st[n_st].nl, nl0, sizeof nl0);
		memcpy(st[n_st].lin, f.lin, sizeof f.lin);
		st[n_st].chi = chi + 2.0 * 2 * f.g;
		st[n_st].ok = isfinite(chi) && valid(&f, nl0);
		if (st[n_st].ok)
			best_ideal = fmin(best_ideal, st[n_st].chi);
		if (!(f.a_davies > 0))
			keep_if_better(&f, &best, nl0, chi);
		n_st++;
	}
	/* With activity: each structure whose ideal fit is valid and not far
	 * worse than the best ideal one (the activity terms lower chi-square
	 * by a factor up to ~2 in the bench's scenarios; a structure that is
	 * wrong misses by orders of magnitude), under each charge assignment;
	 * the lowest score wins as above. The number of charge assignments is
	 * the same for every structure with groups, so it needs no penalty. */
	for (int q = 0; f.a_davies > 0 && q < n_st; q++) {
		if (!st[q].ok || !(st[q].chi <= 4.0 * best_ideal + 20.0))
			continue;
		f.g = st[q].g;
		memcpy(f.seg, st[q].seg, sizeof f.seg);
		int n_z = f.g > 0 ? (int)(sizeof zp_top / sizeof zp_top[0]) : 1;
		for (int z = 0; z < n_z; z++)
			try_charges(&f, &best, zp_top[z], st[q].nl, st[q].lin, r, r2, jac);
	}
	/* No activity fit was valid (a structure the charge rules do not
	 * cover): the best ideal fit is still a refinement. */
	for (int q = 0; f.a_davies > 0 && !isfinite(best.chi) && q < n_st; q++) {
		if (!st[q].ok)
			continue;
		f.g = st[q].g;
		memcpy(f.seg, st[q].seg, sizeof f.seg);
		memcpy(f.lin, st[q].lin, sizeof f.lin);
		set_ideal(&f);
		keep_if_better(&f, &best, st[q].nl, st[q].chi - 2.0 * 2 * f.g);
	}
	if (!isfinite(best.chi))
		goto out;

	/* Covariance of all parameters at the optimum (nonlinear and linear). */
	f.g = best.g;
	memcpy(f.seg, best.seg, sizeof f.seg);
	memcpy(f.zp, best.zp, sizeof f.zp);
	f.ig1 = best.ig1;
	f.gf = best.gf;
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
		eps[i].model_u_ml = u;
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
	free(lag);
	free(scratch);
	free(buf);
	return rc;
}
