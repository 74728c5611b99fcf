/* speed_chem.c: time per chem_solve (the simulator solves once per addition,
 * `stopcock predict` and model-based evaluation many times per run).
 * Target: microseconds a solve (issue 2); printed as met / NOT met. */
#include "speed.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "chem.h"
#include "scenario.h"

#define BATCH     200 /* solves per timed batch */
#define BATCHES   101
#define TARGET_US 10.0

static chem_comp_t comp(const char *name, double molar, chem_kind_t kind, int charge, int n,
                        const double *pka)
{
	chem_comp_t c;
	memset(&c, 0, sizeof c);
	snprintf(c.name, sizeof c.name, "%s", name);
	c.molar = molar;
	c.kind = kind;
	c.charge = charge;
	c.n_pka = n;
	for (int j = 0; j < n; j++)
		c.pka[j] = pka[j];
	return c;
}

static int cmp_double(const void *a, const void *b)
{
	double x = *(const double *)a, y = *(const double *)b;
	return (x > y) - (x < y);
}

static void run(const char *label, const chem_scenario_t *s, double v_max_ml)
{
	double us[BATCHES], sink = 0.0;
	long iters = 0, solves = 0;
	for (int b = 0; b < BATCHES; b++) {
		double t0 = speed_cpu_s();
		for (int i = 0; i < BATCH; i++) {
			chem_state_t st;
			chem_solve(s, v_max_ml * (double)i / (BATCH - 1), &st);
			sink += st.ph;
			iters += st.iterations;
			solves++;
		}
		us[b] = (speed_cpu_s() - t0) / BATCH * 1e6;
	}
	qsort(us, BATCHES, sizeof us[0], cmp_double);
	printf("  %-34s median %6.2f us/solve (min %6.2f, max %6.2f), %.1f charge-balance "
	       "evaluations/solve  [%s]%s\n",
	       label, us[BATCHES / 2], us[0], us[BATCHES - 1], (double)iters / (double)solves,
	       us[BATCHES / 2] <= TARGET_US ? "met" : "NOT met", sink == 0.0 ? " " : "");
}

SPEED(chem_solve)
{
	chem_scenario_t s;
	double h3po4[3] = {2.148, 7.198, 12.35}, citric[3] = {3.128, 4.761, 6.396};
	double malic[2] = {3.40, 5.20}, nh4 = 9.25, co3[2] = {6.351, 10.329};
	printf("  target: <= %.0f us per solve (median of %d batches of %d solves over the "
	       "whole curve)\n",
	       TARGET_US, BATCHES, BATCH);

	scenario_defaults(&s);
	s.sample_ml = 25.0;
	s.water_ml = 25.0;
	s.n_sample = 1;
	s.sample[0] = comp("phosphoric acid", 0.05, CHEM_WEAK, 0, 3, h3po4);
	s.n_titrant = 1;
	s.titrant[0] = comp("sodium hydroxide", 0.1, CHEM_STRONG_BASE, 0, 0, NULL);
	run("phosphoric acid, Davies", &s, 45.0);

	s.n_sample = 3;
	s.sample_ml = 10.0;
	s.water_ml = 40.0;
	s.sample[0] = comp("malic acid", 0.042, CHEM_WEAK, 0, 2, malic);
	s.sample[1] = comp("ammonium", 0.005, CHEM_WEAK, 1, 1, &nh4);
	s.sample[2] = comp("hydrochloric acid", 0.001, CHEM_STRONG_ACID, 0, 0, NULL);
	run("cider (malic+ammonium+HCl), Davies", &s, 12.0);

	s.n_sample = 2;
	s.sample_ml = 25.0;
	s.water_ml = 0.0;
	s.sample[0] = comp("citric acid", 0.02, CHEM_WEAK, 0, 3, citric);
	s.sample[1] = comp("sodium chloride", 0.5, CHEM_SALT, 0, 0, NULL);
	s.n_titrant = 2;
	s.titrant[1] = comp("carbonate", 0.002, CHEM_WEAK, 0, 2, co3);
	run("citric in 0.5 M NaCl, CO2 in NaOH", &s, 20.0);

	s.activity = CHEM_ACT_IDEAL;
	run("same, ideal", &s, 20.0);
}
