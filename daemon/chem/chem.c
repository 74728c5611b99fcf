/* chem.c: equilibrium state of the beaker (see chem.h).
 *
 * The model. After V mL of titrant the beaker holds every sample component
 * at c * sample_ml / V_total and every titrant component at c * V / V_total,
 * V_total = sample_ml + water_ml + V. Each component brings only its own
 * species, with no implicit counter-ions:
 *   - strong acid: a singly charged anion (the H+ is in [H+]);
 *   - strong base: a singly charged cation (the OH- is in [OH-]);
 *   - salt: one cation and one anion (ionic strength only);
 *   - weak system with pKa_1..pKa_n and charge z0 of its most protonated
 *     form: species j = 0..n carry charge z0 - j. Added as such a system it is
 *     electrically neutral overall, i.e. as ammonia (z0 = 1) rather than an
 *     ammonium salt; list the salt's anion as a strong acid for NH4Cl.
 * Charge balance, with activities a = gamma * c (Davies, same gamma for one
 * charge), a(H+) = 10^-pH:
 *   f(pH) = [H+] - [OH-] + sum(strong cations) - sum(strong anions)
 *           + sum_weak c * sum_j alpha_j (z0 - j) = 0
 *   [OH-] = Kw / (a(H+) gamma_1),  alpha_j / alpha_{j-1} = Ka_j g_{z(j-1)} / (g_{z(j)} a(H+)).
 * For fixed ionic strength the positive charges only fall with pH and the
 * negative ones only rise, so g(pH) = ln(positive) - ln(negative) is strictly
 * decreasing with one root in the bracket [-1, 15], or the bracket end is the
 * answer; g is near-linear in pH, so Newton steps (kept in the bracket, with
 * bisection as the fallback) take a handful of evaluations. The ionic
 * strength is made self-consistent by accelerated fixed-point steps, with a
 * bisection on it as the fallback, which always converges because I(I) is
 * continuous and bounded.
 */
#include "chem.h"

#include <math.h>
#include <string.h>

#define PH_LO        (-1.0)
#define PH_HI        15.0
#define PH_TOL       1e-11 /* pH units: far below any printed digit */
#define NEWTON_MAX   200   /* bracketed Newton: bisection needs ~44 steps at most */
#define OUTER_MAX    40    /* fixed-point steps on the ionic strength */
#define BISECT_I_MAX 100   /* bisection steps on the ionic strength (fallback) */
#define LN10         2.302585092994046

typedef struct weak_sys {
	double c_molar;
	int n;
	int z0;
	const double *pka;
} weak_sys_t;

/* The beaker reduced to what the charge balance needs, at one volume. */
typedef struct mix {
	double strong_net_molar; /* strong cations - strong anions, mol/L */
	double strong_i_molar;   /* their ionic-strength share, mol/L */
	double pkw;
	double a; /* Davies A at the temperature; 0 for ideal */
	int n_weak;
	weak_sys_t weak[2 * CHEM_MAX_COMP];
} mix_t;

/* Species fractions of one weak system at pH with log10 gamma_1 = lg1, in
 * the log domain so that no pKa or pH makes an overflow. */
static void weak_alpha(const weak_sys_t *w, double ph, double lg1, double *alpha)
{
	double l[CHEM_MAX_PKA + 1];
	double lmax = 0.0, sum = 0.0;
	l[0] = 0.0;
	for (int j = 1; j <= w->n; j++) {
		int zp = w->z0 - j + 1, zj = w->z0 - j;
		l[j] = l[j - 1] + ph - w->pka[j - 1] + lg1 * (double)(zp * zp - zj * zj);
		if (l[j] > lmax)
			lmax = l[j];
	}
	for (int j = 0; j <= w->n; j++) {
		alpha[j] = exp(LN10 * (l[j] - lmax));
		sum += alpha[j];
	}
	for (int j = 0; j <= w->n; j++)
		alpha[j] /= sum;
}

/* The charge balance split into its positive and negative charges (mol/L),
 * each with its derivative in pH; ionic strength as a by-product. */
typedef struct balance {
	double pos, neg;   /* > 0 always: [H+] and [OH-] are in them */
	double dpos, dneg; /* d/dpH */
	double ionic;      /* mol/L */
} balance_t;

static void charge_balance(const mix_t *m, double ph, double lg1, balance_t *b)
{
	double alpha[CHEM_MAX_PKA + 1];
	double h = exp(LN10 * (-ph - lg1));
	double oh = exp(LN10 * (ph - m->pkw - lg1));
	double i2 = h + oh;
	b->pos = h + fmax(m->strong_net_molar, 0.0);
	b->neg = oh + fmax(-m->strong_net_molar, 0.0);
	b->dpos = -LN10 * h;
	b->dneg = LN10 * oh;
	for (int k = 0; k < m->n_weak; k++) {
		const weak_sys_t *w = &m->weak[k];
		double mean_j = 0.0, pos = 0.0, neg = 0.0, dpos = 0.0, dneg = 0.0, z2 = 0.0;
		weak_alpha(w, ph, lg1, alpha);
		for (int j = 0; j <= w->n; j++)
			mean_j += alpha[j] * j;
		for (int j = 0; j <= w->n; j++) {
			int z = w->z0 - j;
			/* d alpha_j / dpH = ln10 alpha_j (j - mean j) */
			double q = alpha[j] * (double)z, dq = LN10 * q * ((double)j - mean_j);
			if (z > 0) {
				pos += q;
				dpos += dq;
			} else if (z < 0) {
				neg -= q;
				dneg -= dq;
			}
			z2 += alpha[j] * (double)(z * z);
		}
		b->pos += w->c_molar * pos;
		b->neg += w->c_molar * neg;
		b->dpos += w->c_molar * dpos;
		b->dneg += w->c_molar * dneg;
		i2 += w->c_molar * z2;
	}
	b->ionic = 0.5 * i2 + m->strong_i_molar;
}

/* Root of g(pH) = ln(positive) - ln(negative) in [PH_LO, PH_HI] at fixed lg1.
 * g has the root of the charge balance, is strictly decreasing (positive
 * charges only fall with pH, negative ones only rise) and close to linear
 * over whole decades, where the balance itself is exponential: Newton on it
 * converges in a few steps from anywhere. Steps are kept inside a shrinking
 * bracket, with bisection when one leaves it or stalls; the bracket ends
 * need no evaluation unless the root sits at one of them. */
static double solve_ph(const mix_t *m, double lg1, double ph_start, int *work)
{
	balance_t b;
	double lo = PH_LO, hi = PH_HI;
	double x = (ph_start > lo && ph_start < hi) ? ph_start : 7.0;
	double prev_step = hi - lo;
	for (int it = 0; it < NEWTON_MAX; it++) {
		charge_balance(m, x, lg1, &b);
		(*work)++;
		double g = log(b.pos) - log(b.neg);
		double dg = b.dpos / b.pos - b.dneg / b.neg;
		if (g > 0.0)
			lo = x;
		else if (g < 0.0)
			hi = x;
		else
			return x;
		double next = dg < 0.0 ? x - g / dg : 0.5 * (lo + hi);
		double step = fabs(next - x);
		/* Bisect when Newton leaves the bracket or does not halve the step
		 * every two iterations. */
		if (!(next > lo && next < hi) || step > 0.5 * prev_step) {
			next = 0.5 * (lo + hi);
			step = hi - lo;
		}
		prev_step = step;
		x = next;
		if (step < PH_TOL || hi - lo < PH_TOL)
			break;
	}
	/* Converged onto a bracket end: the root is there or beyond it. */
	if (x > PH_HI - 1e-6) {
		charge_balance(m, PH_HI, lg1, &b);
		if (b.pos >= b.neg)
			return PH_HI;
	}
	if (x < PH_LO + 1e-6) {
		charge_balance(m, PH_LO, lg1, &b);
		if (b.pos <= b.neg)
			return PH_LO;
	}
	return x;
}

/* Ionic strength (held at CHEM_DAVIES_I_MAX) after solving at i_eff. */
static double ionic_after(const mix_t *m, double i_eff, double *ph, int *work)
{
	balance_t b;
	double lg1 = chem_davies_log_gamma(m->a, 1, i_eff);
	*ph = solve_ph(m, lg1, *ph, work);
	charge_balance(m, *ph, lg1, &b);
	return fmin(b.ionic, CHEM_DAVIES_I_MAX);
}

/* pH with the ionic strength self-consistent: I = G(I), G = "solve at I, then
 * recompute I". G varies slowly with I, so fixed-point steps converge;
 * a secant (Aitken) step on G(I) - I makes it superlinear. Fallback, in
 * case that has not converged: G(I) - I is >= 0 at 0 and <= 0 at I_MAX and
 * continuous, so bisection on it always ends. Returns the I used. */
static double solve_davies(const mix_t *m, double *ph, int *work)
{
	double i = m->strong_i_molar < CHEM_DAVIES_I_MAX ? m->strong_i_molar : CHEM_DAVIES_I_MAX;
	double i_prev = 0.0, g_prev = 0.0;
	for (int it = 0; it < OUTER_MAX; it++) {
		double g = ionic_after(m, i, ph, work);
		if (fabs(g - i) <= 1e-14 + 1e-11 * i)
			return g;
		double next = g;
		if (it > 0 && i != i_prev) {
			double slope = (g - g_prev) / (i - i_prev);
			if (isfinite(slope) && fabs(slope) < 0.9)
				next = i + (g - i) / (1.0 - slope);
		}
		i_prev = i;
		g_prev = g;
		i = fmin(fmax(next, 0.0), CHEM_DAVIES_I_MAX);
	}
	double lo = 0.0, hi = CHEM_DAVIES_I_MAX;
	for (int it = 0; it < BISECT_I_MAX && hi - lo > 1e-14; it++) {
		double mid = 0.5 * (lo + hi);
		if (ionic_after(m, mid, ph, work) > mid)
			lo = mid;
		else
			hi = mid;
	}
	return 0.5 * (lo + hi);
}

static bool comp_ok(const chem_comp_t *c)
{
	if (!(c->molar >= 0.0) || !isfinite(c->molar))
		return false;
	if (c->kind == CHEM_WEAK) {
		if (c->n_pka < 1 || c->n_pka > CHEM_MAX_PKA || c->charge < -CHEM_MAX_PKA * 2 ||
		    c->charge > CHEM_MAX_PKA * 2)
			return false;
		for (int j = 0; j < c->n_pka; j++)
			if (!isfinite(c->pka[j]))
				return false;
	} else if (c->kind != CHEM_STRONG_ACID && c->kind != CHEM_STRONG_BASE &&
	           c->kind != CHEM_SALT) {
		return false;
	}
	return true;
}

static void mix_add(mix_t *m, const chem_comp_t *c, double c_molar)
{
	switch (c->kind) {
	case CHEM_STRONG_ACID:
		m->strong_net_molar -= c_molar;
		m->strong_i_molar += 0.5 * c_molar;
		break;
	case CHEM_STRONG_BASE:
		m->strong_net_molar += c_molar;
		m->strong_i_molar += 0.5 * c_molar;
		break;
	case CHEM_SALT:
		m->strong_i_molar += c_molar;
		break;
	case CHEM_WEAK:
		m->weak[m->n_weak].c_molar = c_molar;
		m->weak[m->n_weak].n = c->n_pka;
		m->weak[m->n_weak].z0 = c->charge;
		m->weak[m->n_weak].pka = c->pka;
		m->n_weak++;
		break;
	}
}

static int solve_fail(chem_state_t *out, double titrant_ml)
{
	memset(out, 0, sizeof *out);
	out->titrant_ml = titrant_ml;
	out->ph = 7.0;
	out->h_molar = 1e-7;
	out->oh_molar = 1e-7;
	out->gamma1 = 1.0;
	out->pkw = 14.0;
	return -1;
}

int chem_solve(const chem_scenario_t *s, double titrant_ml, chem_state_t *out)
{
	mix_t m;
	int work = 0;
	if (!s || !out)
		return out ? solve_fail(out, 0.0) : -1;
	if (s->n_sample < 0 || s->n_sample > CHEM_MAX_COMP || s->n_titrant < 0 ||
	    s->n_titrant > CHEM_MAX_COMP || !(titrant_ml >= 0.0) || !isfinite(titrant_ml) ||
	    !(s->sample_ml >= 0.0) || !(s->water_ml >= 0.0) || !isfinite(s->sample_ml) ||
	    !isfinite(s->water_ml) || !isfinite(s->temperature_c) || s->temperature_c < -30.0 ||
	    s->temperature_c > 150.0)
		return solve_fail(out, titrant_ml);
	double total_ml = s->sample_ml + s->water_ml + titrant_ml;
	if (!(total_ml > 0.0))
		return solve_fail(out, titrant_ml);

	memset(&m, 0, sizeof m);
	m.pkw = (s->pkw_override > 0.0 && isfinite(s->pkw_override)) ? s->pkw_override
	                                                             : chem_pkw(s->temperature_c);
	m.a = s->activity == CHEM_ACT_IDEAL ? 0.0 : chem_davies_a(s->temperature_c);
	int n = 0;
	double totals[2 * CHEM_MAX_COMP];
	for (int i = 0; i < s->n_sample + s->n_titrant; i++) {
		bool is_sample = i < s->n_sample;
		const chem_comp_t *c = is_sample ? &s->sample[i] : &s->titrant[i - s->n_sample];
		if (!comp_ok(c))
			return solve_fail(out, titrant_ml);
		double c_molar = c->molar * (is_sample ? s->sample_ml : titrant_ml) / total_ml;
		totals[n++] = c_molar;
		mix_add(&m, c, c_molar);
	}

	/* Ionic strength to self-consistency. lg1 = log10 gamma_1. */
	double lg1 = 0.0, ph = 7.0;
	balance_t bal;
	if (m.a > 0.0) {
		double i_eff = solve_davies(&m, &ph, &work);
		lg1 = chem_davies_log_gamma(m.a, 1, i_eff);
		ph = solve_ph(&m, lg1, ph, &work);
	} else {
		ph = solve_ph(&m, 0.0, 7.0, &work);
	}
	charge_balance(&m, ph, lg1, &bal);

	memset(out, 0, sizeof *out);
	out->titrant_ml = titrant_ml;
	out->volume_ml = total_ml;
	out->ph = ph;
	out->gamma1 = exp(LN10 * lg1);
	out->h_molar = exp(LN10 * (-ph - lg1));
	out->oh_molar = exp(LN10 * (ph - m.pkw - lg1));
	out->ionic_strength = bal.ionic;
	out->pkw = m.pkw;
	out->n_comp = n;
	out->iterations = work;
	int k = 0;
	for (int i = 0; i < n; i++) {
		const chem_comp_t *c =
		    i < s->n_sample ? &s->sample[i] : &s->titrant[i - s->n_sample];
		out->total_molar[i] = totals[i];
		if (c->kind == CHEM_WEAK)
			weak_alpha(&m.weak[k++], ph, lg1, out->alpha[i]);
		else
			out->alpha[i][0] = 1.0;
	}
	return 0;
}

double chem_ph(const chem_scenario_t *s, double titrant_ml)
{
	chem_state_t st;
	chem_solve(s, titrant_ml, &st);
	return st.ph;
}

/* ---- stoichiometry ---- */

/* Protons a component holds beyond its fully deprotonated form, per mol, as
 * added (a weak system is added in its overall neutral form, j = z0). */
static double comp_protons(const chem_comp_t *c)
{
	switch (c->kind) {
	case CHEM_STRONG_ACID:
		return 1.0;
	case CHEM_STRONG_BASE:
		return -1.0;
	case CHEM_SALT:
		return 0.0;
	case CHEM_WEAK:
		return (double)(c->n_pka - c->charge);
	}
	return 0.0;
}

int chem_scenario_add(chem_scenario_t *s, const chem_comp_t *reagent, double ml)
{
	if (!s || !reagent || !(ml > 0.0) || !isfinite(ml) || !(s->sample_ml > 0.0) ||
	    !(reagent->molar >= 0.0) || !isfinite(reagent->molar))
		return -1;
	/* mmol = molar * ml; as a sample component it is diluted from sample_ml. */
	double molar = reagent->molar * ml / s->sample_ml;
	int i = 0;
	while (i < s->n_sample &&
	       !(s->sample[i].kind == reagent->kind && s->sample[i].kind != CHEM_WEAK &&
	         !strcmp(s->sample[i].name, reagent->name)))
		i++;
	if (i == s->n_sample) {
		if (s->n_sample >= CHEM_MAX_COMP)
			return -1;
		s->sample[i] = *reagent;
		s->sample[i].molar = 0.0;
		s->n_sample++;
	}
	s->sample[i].molar += molar;
	s->water_ml += ml;
	return 0;
}

const chem_comp_t *chem_scenario_doser(const chem_scenario_t *s, const char *name)
{
	for (int i = 0; s && name && i < s->n_dosers && i < CHEM_MAX_DOSERS; i++)
		if (!strcmp(s->doser_name[i], name))
			return &s->doser[i];
	return NULL;
}

double chem_titrant_acidity(const chem_scenario_t *s)
{
	/* At the far basic end every weak system of the titrant has given up all
	 * its protons; at the far acid end it holds all of them. */
	double base_end = 0.0, acid_end = 0.0;
	for (int i = 0; s && i < s->n_titrant && i < CHEM_MAX_COMP; i++) {
		const chem_comp_t *c = &s->titrant[i];
		if (!(c->molar >= 0.0) || !isfinite(c->molar))
			continue;
		base_end += c->molar * comp_protons(c);
		acid_end +=
		    c->molar * (c->kind == CHEM_WEAK ? -(double)c->charge : comp_protons(c));
	}
	if (base_end < 0.0)
		return base_end;
	if (acid_end > 0.0)
		return acid_end;
	return 0.0;
}

typedef struct site {
	double pka;
	double cap_mmol;
	double filled_mmol;
} site_t;

int chem_equivalence_ml(const chem_scenario_t *s, double *out_ml, int cap)
{
	site_t sites[CHEM_MAX_COMP * CHEM_MAX_PKA];
	int n_sites = 0, n_out = 0;
	double protons_mmol = 0.0, sites_mmol = 0.0;
	if (!s || !out_ml || cap <= 0 || s->n_sample < 0 || s->n_sample > CHEM_MAX_COMP)
		return 0;
	double acidity = chem_titrant_acidity(s);
	if (acidity == 0.0 || !(s->sample_ml > 0.0))
		return 0;
	for (int i = 0; i < s->n_sample; i++) {
		const chem_comp_t *c = &s->sample[i];
		if (!comp_ok(c))
			return 0;
		double mmol = c->molar * s->sample_ml;
		protons_mmol += mmol * comp_protons(c);
		if (c->kind != CHEM_WEAK)
			continue;
		for (int j = 0; j < c->n_pka; j++) {
			sites[n_sites].pka = c->pka[j];
			sites[n_sites].cap_mmol = mmol;
			sites[n_sites].filled_mmol = 0.0;
			n_sites++;
			sites_mmol += mmol;
		}
	}
	/* Sort sites by pKa, ascending (insertion sort: stable, short). */
	for (int i = 1; i < n_sites; i++) {
		site_t x = sites[i];
		int j = i;
		while (j > 0 && sites[j - 1].pka > x.pka) {
			sites[j] = sites[j - 1];
			j--;
		}
		sites[j] = x;
	}
	/* At equilibrium the protons sit on the most basic sites first. */
	double left = fmin(fmax(protons_mmol, 0.0), sites_mmol);
	for (int i = n_sites - 1; i >= 0 && left > 0.0; i--) {
		sites[i].filled_mmol = fmin(left, sites[i].cap_mmol);
		left -= sites[i].filled_mmol;
	}
	double tiny = 1e-12 * (fabs(protons_mmol) + sites_mmol + 1e-30);
	double cum_mmol = 0.0;
	double per_ml = fabs(acidity); /* mmol of titrant action per mL */
	if (acidity < 0.0) {
		/* Base titrant: free strong acid first, then filled sites from the
		 * most acidic. */
		if (protons_mmol - sites_mmol > tiny) {
			cum_mmol += protons_mmol - sites_mmol;
			out_ml[n_out++] = cum_mmol / per_ml;
		}
		for (int i = 0; i < n_sites && n_out < cap; i++) {
			if (sites[i].filled_mmol <= tiny)
				continue;
			cum_mmol += sites[i].filled_mmol;
			out_ml[n_out++] = cum_mmol / per_ml;
		}
	} else {
		/* Acid titrant: free strong base first, then empty sites from the
		 * most basic. */
		if (-protons_mmol > tiny) {
			cum_mmol += -protons_mmol;
			out_ml[n_out++] = cum_mmol / per_ml;
		}
		for (int i = n_sites - 1; i >= 0 && n_out < cap; i--) {
			double empty = sites[i].cap_mmol - sites[i].filled_mmol;
			if (empty <= tiny)
				continue;
			cum_mmol += empty;
			out_ml[n_out++] = cum_mmol / per_ml;
		}
	}
	return n_out;
}
