/* simrun.h: one method run against the in-process simulated beaker.
 *
 * `stopcock predict`, the benchmarks and the engine tests all run the engine
 * this way: a beaker (beaker.h) for the chemistry and the electrode, a small
 * virtual burette on top (resolution capacity/steps, limited content,
 * refill), and a virtual clock that jumps to each time the engine asks for.
 * Deterministic for a seed.
 */
#ifndef STOPCOCK_SIMRUN_H
#define STOPCOCK_SIMRUN_H

#include <stdbool.h>
#include <stddef.h>

#include "chem.h"
#include "engine.h"
#include "method.h"

typedef struct simrun_opts {
	unsigned long long seed;
	bool has_amount;      /* else the scenario's sample_ml */
	double amount;        /* method's sample unit; with unit mL it is also the sample put in */
	bool has_calibration; /* else the scenario's electrode (a perfect calibration) */
	double cal_slope_pct; /* % */
	double cal_offset_mv; /* mV at pH 7 */
	double titer;         /* <= 0: 1.0 */
	bool has_blank;       /* blank_ml for the formulas */
	double blank_ml;      /* mL */
	double burette_start_ml; /* titrant in the syringe at start; < 0: full */
	double stroke_s;         /* time for a full syringe stroke; <= 0: 30 s */
	double refill_s;         /* time for a refill; <= 0: 20 s */
	double read_interval_s;  /* <= 0: the engine's default (0.5 s) */
	double vessel_max_ml;    /* <= 0: none */
} simrun_opts_t;

typedef struct simrun_out {
	double duration_s;       /* simulated, start to stop */
	int events;              /* events fed to the engine */
	double max_dispensed_ml; /* the most the virtual burette ever delivered in total */
	bool stuck;              /* the loop guard stopped the run (an engine bug) */
	double engine_cpu_s;     /* thread CPU time spent inside engine_feed, s */
	double steps_s;          /* simulated time of the before steps, s (in duration_s) */
} simrun_out_t;

/* Whether s can run m's steps: every add of before names a dosing unit of
 * the scenario (its `dosers`). Returns 0, or -1 with msg saying which is
 * missing. */
int simrun_check(const method_t *m, const chem_scenario_t *s, char *msg, size_t msg_cap);

/* Run m against scenario s: first the method's before steps (each add from
 * the scenario's dosing unit of that name, at the burette's stroke rate;
 * stir, wait and rinse as time passing), then the titration. The after
 * steps change nothing the run reports. Call simrun_check first: an add
 * whose doser the scenario lacks adds nothing. Returns the finished engine
 * (caller frees), or NULL on out-of-memory. */
engine_t *simrun_run(const method_t *m, const chem_scenario_t *s, const simrun_opts_t *o,
                     simrun_out_t *out);

/* The engine parameters simrun uses (for tests that drive the engine
 * themselves). */
void simrun_params(const method_t *m, const chem_scenario_t *s, const simrun_opts_t *o,
                   engine_params_t *p);

#endif
