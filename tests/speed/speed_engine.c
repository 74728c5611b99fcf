/* speed_engine.c: the engine against the simulated beaker, a panel of
 * scenarios, each run with adaptive dosing and with constant 0.02 mL
 * additions. Prints one row per run and a summary line, each figure beside
 * its target (met / NOT met). The targets are the project's (issue 4):
 *   endpoint error <= 0.05 % of the stoichiometric volume on single-endpoint
 *   scenarios with 0.15 mV noise; <= 25 additions per endpoint; >= 4x fewer
 *   additions than constant 0.02 mL at equal or better error; <= 120 s
 *   simulated per endpoint at tau 1.5 s; <= 100 us CPU per point.
 * The stoichiometric volumes come from the scenario (chem_equivalence_ml),
 * not from the engine; for a titrant with a weak component (carbonate taken
 * up from air) see speed_titrant_ref_ml. CPU per point is the engine's own time
 * (engine_feed), without the simulated chemistry, divided by the accepted
 * points.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "speed.h"
#include "speed_engine.h"
#include "chem.h"
#include "scenario.h"
#include "diag.h"
#include "method.h"
#include "simrun.h"

#define N_SCN 10
static const char *const scenarios[N_SCN] = {"strong",    "weak",      "dilute-weak", "diprotic",
                                             "triprotic", "weak-base", "mixture",     "carbonate",
                                             "noisy",     "slow"};

typedef struct row {
	bool ok;
	double err_pct;   /* worst |error| over the endpoints, % of the stoichiometric volume */
	double deriv_pct; /* the same for the first-derivative (or target/Gran) result */
	int found, wanted;
	int additions;
	double dur_s;
	double cpu_us_per_point;
	const char *how;
	const char *stop;
	double full_ml, full_err_pct; /* see speed_titrant_ref_ml */
} row_t;

/* Nearest stoichiometric volume to v. */
double speed_nearest_ml(const double *eq, int n, double v)
{
	double best = NAN;
	for (int i = 0; i < n; i++)
		if (!isfinite(best) || fabs(eq[i] - v) < fabs(best - v))
			best = eq[i];
	return best;
}

bool speed_titrant_has_weak(const chem_scenario_t *s)
{
	for (int i = 0; i < s->n_titrant; i++)
		if (s->titrant[i].kind == CHEM_WEAK)
			return true;
	return false;
}

/* Stoichiometric volume of a single endpoint when the titrant has a weak
 * component. chem_equivalence_ml counts all of its protons, as at the far end
 * of the titration; at the endpoint that exists only those it has given up at
 * the equivalence pH count. NaOH that took up CO2 reaches an acetic acid
 * endpoint (pH ~8.7) with its carbonate as hydrogen carbonate, so each
 * carbonate takes one proton, not two: the "carbonate error" of titrations
 * to a phenolphthalein-range endpoint (Skoog, West, Holler & Crouch,
 * Fundamentals of Analytical Chemistry, applications of neutralization
 * titrations, from memory). Here the titrant's protons are weighed by the
 * species fractions of the simulated beaker (chem_solve, activities and
 * all) at the volume itself, V = amount / effective strength(pH(V)), by
 * fixed-point steps; the engine's own pH is not used. That V is where the
 * beaker holds the sample's salt and the titrant's weak system at its
 * equilibrium, which is the equivalence point. full_ml is the volume that
 * counts every proton, eq_full. */
double speed_titrant_ref_ml(const chem_scenario_t *s, double eq_full)
{
	double acidity = chem_titrant_acidity(s);
	double need_mmol = eq_full * fabs(acidity);
	double v = eq_full;
	for (int it = 0; it < 50; it++) {
		chem_state_t st;
		if (chem_solve(s, v, &st) != 0)
			return NAN;
		/* protons the titrant gives per mL at this state */
		double given = 0;
		for (int i = 0; i < s->n_titrant; i++) {
			const chem_comp_t *c = &s->titrant[i];
			const double *alpha = st.alpha[s->n_sample + i];
			if (c->kind == CHEM_STRONG_ACID)
				given += c->molar;
			else if (c->kind == CHEM_STRONG_BASE)
				given -= c->molar;
			else if (c->kind == CHEM_WEAK) {
				/* added as its neutral form, j = charge protons off */
				double jbar = 0;
				for (int j = 0; j <= c->n_pka; j++)
					jbar += alpha[j] * j;
				given += c->molar * (jbar - c->charge);
			}
		}
		double next = need_mmol / fabs(given);
		if (!isfinite(next))
			return NAN;
		if (fabs(next - v) < 1e-10) {
			v = next;
			break;
		}
		v = next;
	}
	return v;
}

static row_t run_one(const method_t *m, const chem_scenario_t *s, unsigned long long seed)
{
	row_t r = {.err_pct = NAN,
	           .deriv_pct = NAN,
	           .wanted = m->count,
	           .how = "-",
	           .stop = "-",
	           .full_ml = NAN,
	           .full_err_pct = NAN};
	double eq[16];
	int n_eq = chem_equivalence_ml(s, eq, 16);
	if (m->count == 1 && n_eq == 1 && speed_titrant_has_weak(s)) {
		r.full_ml = eq[0];
		eq[0] = speed_titrant_ref_ml(s, eq[0]);
	}
	simrun_opts_t o = {.seed = seed, .burette_start_ml = -1};
	simrun_out_t out;
	engine_t *e = simrun_run(m, s, &o, &out);
	if (!e)
		return r;
	r.ok = !out.stuck;
	r.found = engine_n_endpoints(e);
	r.additions = engine_additions(e);
	r.dur_s = out.duration_s;
	int np = engine_n_points(e);
	r.cpu_us_per_point = np > 0 ? out.engine_cpu_s / np * 1e6 : NAN;
	r.stop = engine_stop_name(engine_stop_reason(e));
	double worst = 0, worst_d = 0;
	for (int i = 0; i < r.found; i++) {
		const engine_endpoint_t *ep = engine_endpoint(e, i);
		double ve = speed_nearest_ml(eq, n_eq, ep->volume_ml);
		double err = fabs(ep->volume_ml - ve) / ve * 100;
		double err_d = fabs(ep->deriv_ml - ve) / ve * 100;
		if (!(err <= worst))
			worst = err;
		if (!(err_d <= worst_d))
			worst_d = err_d;
		r.how = ep->how;
	}
	r.err_pct = r.found >= r.wanted ? worst : NAN;
	r.deriv_pct = r.found >= r.wanted ? worst_d : NAN;
	if (r.found == 1 && isfinite(r.full_ml)) {
		const engine_endpoint_t *ep = engine_endpoint(e, 0);
		r.full_err_pct = fabs(ep->volume_ml - r.full_ml) / r.full_ml * 100;
	}
	engine_free(e);
	return r;
}

static int cmp_d(const void *a, const void *b)
{
	double x = *(const double *)a, y = *(const double *)b;
	return (x > y) - (x < y);
}

double speed_median(double *v, int n)
{
	int k = 0;
	for (int i = 0; i < n; i++)
		if (isfinite(v[i]))
			v[k++] = v[i];
	if (k == 0)
		return NAN;
	qsort(v, (size_t)k, sizeof *v, cmp_d);
	return k % 2 ? v[k / 2] : (v[k / 2 - 1] + v[k / 2]) / 2;
}

static const char *met(bool ok)
{
	return ok ? "met" : "NOT met";
}

SPEED(engine_panel)
{
	printf("%-12s %-8s %9s %-10s %8s %5s %6s %8s %8s %8s  %s\n", "scenario", "dosing", "err_%",
	       "how", "deriv_%", "adds", "adds/e", "sim_s", "sim_s/e", "cpu_us/p", "stop");
	double med_err[N_SCN], med_adds[N_SCN], med_dur[N_SCN], med_cpu[N_SCN], ratio[N_SCN];
	bool err_ok = true, adds_ok = true, ratio_ok = true, dur_ok = true, cpu_ok = true;
	int n_ok = 0;
	for (int i = 0; i < N_SCN; i++) {
		char mp[256], sp[256];
		snprintf(mp, sizeof mp, "tests/speed/methods/%s.yaml", scenarios[i]);
		snprintf(sp, sizeof sp, "tests/speed/scenarios/%s.yaml", scenarios[i]);
		method_t m;
		chem_scenario_t s;
		diag_list_t d = DIAG_LIST_INIT;
		if (method_load(mp, NULL, &m, &d) != 0 || scenario_load(sp, &s, &d) != 0) {
			diag_print(&d, stdout);
			diag_free(&d);
			med_err[i] = med_adds[i] = med_dur[i] = med_cpu[i] = ratio[i] = NAN;
			continue;
		}
		diag_free(&d);
		row_t ad = run_one(&m, &s, 1000 + (unsigned)i);
		method_t mc = m;
		mc.dosing = DOSING_CONSTANT;
		mc.dose_ml = 0.02;
		row_t co = run_one(&mc, &s, 1000 + (unsigned)i);
		/* One seed can be lucky: the worst adaptive error over 8 more. */
		double worst8 = ad.err_pct;
		int missed = !isfinite(ad.err_pct);
		for (unsigned k = 1; k <= 8; k++) {
			row_t x = run_one(&m, &s, 1000 + (unsigned)i + 100 * k);
			if (!isfinite(x.err_pct))
				missed++;
			else if (!(x.err_pct <= worst8))
				worst8 = x.err_pct;
		}
		if (missed)
			worst8 = NAN; /* an endpoint not found is the worst error */
		int ne = m.count;
		const row_t *rows[2] = {&ad, &co};
		for (int k = 0; k < 2; k++) {
			const row_t *r = rows[k];
			printf("%-12s %-8s %9.4f %-10s %8.4f %5d %6.1f %8.0f %8.0f %8.1f  %s%s\n",
			       scenarios[i], k ? "constant" : "adaptive", r->err_pct, r->how,
			       r->deriv_pct, r->additions, (double)r->additions / ne, r->dur_s,
			       r->dur_s / ne, r->cpu_us_per_point, r->stop,
			       r->ok ? "" : " (STUCK)");
		}
		if (isfinite(ad.full_err_pct)) {
			double ref = speed_titrant_ref_ml(&s, ad.full_ml);
			printf(
			    "%-12s   (titrant with a weak component: err_%% is against %.4f mL, "
			    "its "
			    "carbonate weighed as the beaker holds it there, mostly hydrogen "
			    "carbonate; counting every carbonate proton, %.4f mL, the errors are "
			    "%.4f %% adaptive, %.4f %% constant: the titer error a lab sees "
			    "without standardizing the titrant)\n",
			    "", ref, ad.full_ml, ad.full_err_pct, co.full_err_pct);
		}
		printf("%-12s   worst adaptive error over 9 seeds: %.4f %% (%d of 9 runs missed an "
		       "endpoint)\n",
		       "", worst8, missed);
		med_err[i] = ad.err_pct;
		med_adds[i] = (double)ad.additions / ne;
		med_dur[i] = ad.dur_s / ne;
		med_cpu[i] = ad.cpu_us_per_point;
		ratio[i] = ad.additions > 0 ? (double)co.additions / ad.additions : NAN;
		n_ok++;

		bool single_low_noise = ne == 1 && s.electrode.noise_mv <= 0.15 + 1e-9;
		if (single_low_noise && !(worst8 <= 0.05))
			err_ok = false;
		if (!((double)ad.additions / ne <= 25))
			adds_ok = false;
		if (!(ratio[i] >= 4 && ad.err_pct <= fmax(co.err_pct, 0.05)))
			ratio_ok = false;
		if (fabs(s.electrode.tau_s - 1.5) < 1e-9 && !(ad.dur_s / ne <= 120))
			dur_ok = false;
		if (!(ad.cpu_us_per_point <= 100))
			cpu_ok = false;
		printf("%-12s   error %s, additions %s, ratio %.1fx %s, time %s, cpu %s\n", "",
		       single_low_noise ? met(worst8 <= 0.05) : "(no target)",
		       met((double)ad.additions / ne <= 25), ratio[i],
		       met(ratio[i] >= 4 && ad.err_pct <= fmax(co.err_pct, 0.05)),
		       fabs(s.electrode.tau_s - 1.5) < 1e-9 ? met(ad.dur_s / ne <= 120)
		                                            : "(no target)",
		       met(ad.cpu_us_per_point <= 100));
	}
	double me = speed_median(med_err, N_SCN), ma = speed_median(med_adds, N_SCN),
	       md = speed_median(med_dur, N_SCN), mcpu = speed_median(med_cpu, N_SCN),
	       mr = speed_median(ratio, N_SCN);
	printf("summary: %d scenarios; median error %.4f %% (single-endpoint 0.15 mV <= 0.05 %%: "
	       "%s); median additions/endpoint %.1f (<= 25: %s); additions constant/adaptive "
	       "%.1fx (>= 4x at equal or better error: %s); median simulated %.0f s/endpoint "
	       "(<= 120 s at tau 1.5 s: %s); median CPU %.1f us/point (<= 100: %s)\n",
	       n_ok, me, met(err_ok), ma, met(adds_ok), mr, met(ratio_ok), md, met(dur_ok), mcpu,
	       met(cpu_ok));
}
