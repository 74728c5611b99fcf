/* speed_series.c: the throughput of a series (docs/operations.md, "Series"):
 * 12 samples in duplicate, 24 beakers on a sample changer, run one after
 * another on the in-process simulated beaker and its virtual clock, against
 * the same 24 runs as a plain queue in one beaker place (no moves, no rinse;
 * the operator's beaker changes not counted).
 *
 * The titrations are simulated (simrun.h); the mechanics are not: the
 * changer's times below are our own assumptions for a benchtop changer, not
 * measurements of any instrument, and they are printed with the figures.
 * Titrating is the time the pump moves (dispensed volume at the simulated
 * burette's stroke rate), settling the rest of each titration (stirring,
 * waiting for the electrode, evaluating).
 */
#include <stdio.h>

#include "speed.h"
#include "diag.h"
#include "method.h"
#include "scenario.h"
#include "simrun.h"

enum { SAMPLES = 12, REPLICATES = 2, BEAKERS = SAMPLES * REPLICATES };

/* Assumed changer mechanics, s (not measured; change them to a real
 * changer's figures to plan a rack). */
#define MOVE_S         2.0  /* start and stop of the rack */
#define MOVE_PER_POS_S 0.3  /* the rack turning past one position */
#define LIFT_S         3.0  /* the head going up or down */
#define RINSE_S        10.0 /* rinse after each beaker when the method has none */
#define STROKE_S       30.0 /* simrun's default full syringe stroke, s */

static double move_s(int from, int to)
{
	int d = from > to ? from - to : to - from;
	return MOVE_S + MOVE_PER_POS_S * d;
}

static double after_rinse_s(const method_t *m)
{
	double s = 0;
	for (int i = 0; i < m->n_after; i++)
		if (m->after[i].kind == STEP_RINSE)
			s += m->after[i].s;
	return s > 0 ? s : RINSE_S;
}

SPEED(series_throughput)
{
	method_t m;
	chem_scenario_t s;
	diag_list_t d = DIAG_LIST_INIT;

	if (method_load("config/methods/cider-acidity.yaml", NULL, &m, &d) != 0 ||
	    scenario_load("config/scenarios/cider-acidity.yaml", &s, &d) != 0) {
		diag_print(&d, stdout);
		diag_free(&d);
		return;
	}
	diag_free(&d);

	double titrating = 0, settling = 0, moving = 0, rinsing = 0;
	int pos = 0, failed = 0; /* the head starts parked at "position 0" */
	for (int b = 0; b < BEAKERS; b++) {
		/* each beaker its own noise; amounts as weighed, 9.9-10.1 mL */
		simrun_opts_t o = {.seed = 7000 + (unsigned)b,
		                   .has_amount = true,
		                   .amount = 9.9 + 0.2 * (double)((b * 7) % 11) / 10.0,
		                   .burette_start_ml = -1,
		                   .stroke_s = STROKE_S};
		simrun_out_t out;
		engine_t *e = simrun_run(&m, &s, &o, &out);
		if (!e || engine_n_endpoints(e) < 1)
			failed++;
		if (e) {
			double pump_s = out.max_dispensed_ml / s.burette.capacity_ml * STROKE_S;
			titrating += pump_s;
			settling += out.duration_s - out.steps_s - pump_s;
			engine_free(e);
		}
		/* head up, turn to the beaker, head down; the rinse after it */
		moving += 2 * LIFT_S + move_s(pos, b + 1);
		pos = b + 1;
		rinsing += after_rinse_s(&m);
	}
	moving += 2 * LIFT_S + move_s(pos, 0); /* park at the end */
	double plain = titrating + settling;
	double series = plain + moving + rinsing;

	printf("method cider-acidity on its scenario, %d samples x %d replicates = %d beakers "
	       "(%d without an endpoint)\n",
	       SAMPLES, REPLICATES, BEAKERS, failed);
	printf("assumed changer: move %.1f s + %.1f s per position, lift %.1f s each way, rinse "
	       "%.0f s per beaker\n",
	       MOVE_S, MOVE_PER_POS_S, LIFT_S, after_rinse_s(&m));
	printf("series:      %6.0f s in all: titrating %5.0f s (%4.1f %%), settling %5.0f s "
	       "(%4.1f %%), moving %4.0f s (%4.1f %%), rinsing %4.0f s (%4.1f %%)\n",
	       series, titrating, 100 * titrating / series, settling, 100 * settling / series,
	       moving, 100 * moving / series, rinsing, 100 * rinsing / series);
	printf("series:      %.1f samples per hour (%.1f beakers per hour), unattended\n",
	       SAMPLES * 3600.0 / series, BEAKERS * 3600.0 / series);
	printf("plain queue: %.1f samples per hour (%.1f beakers per hour) of titration alone; "
	       "every beaker change and rinse by hand\n",
	       SAMPLES * 3600.0 / plain, BEAKERS * 3600.0 / plain);
}
