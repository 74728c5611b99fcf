/* beaker.h: the simulated beaker, for `stopcock predict` and `stopcock-sim`.
 *
 * A beaker holds a scenario (chem.h) and the titrant added so far. It answers
 * the electrode's reading over time: a first-order lag (tau_s) from the last
 * reading towards the equilibrium mV, linear drift (drift_mv_per_min) and
 * Gaussian noise (noise_mv RMS) from a PRNG seeded per beaker, so a run is
 * repeatable for one seed. The chemistry is solved only when the titrant
 * volume (or the scenario) changes; advancing time never re-solves.
 *
 * Not thread-safe: the caller serialises access to one beaker.
 */
#ifndef STOPCOCK_BEAKER_H
#define STOPCOCK_BEAKER_H

#include "chem.h"

typedef struct beaker beaker_t;

/* A new beaker with scenario s (copied), no titrant, the electrode already at
 * equilibrium. NULL on out-of-memory. */
beaker_t *beaker_new(const chem_scenario_t *s, unsigned long long seed);
void beaker_free(beaker_t *b);

/* A new beaker (the operator changed the sample or the buffer): scenario s is
 * copied, titrant back to 0 mL, elapsed time back to 0 s; the electrode lags
 * from its previous mV towards the new equilibrium, and the drift it has
 * gathered stays (drift belongs to the electrode, not to the beaker). */
void beaker_load(beaker_t *b, const chem_scenario_t *s);

/* Titrant arrives (ml >= 0; negative, NaN or infinite amounts are ignored). */
void beaker_add_ml(beaker_t *b, double ml);

/* A reagent arrives from a dosing unit (chem_scenario_add): ml mL of
 * `reagent`. Returns 0, or -1 when the scenario cannot take it. */
int beaker_add_reagent(beaker_t *b, const chem_comp_t *reagent, double ml);

/* Time passes (dt_s >= 0 s): first-order lag tau_s towards the equilibrium
 * mV, and drift. Exact for any step length (exponential, not Euler). */
void beaker_advance(beaker_t *b, double dt_s);

/* Electrode reading now, mV: lagged equilibrium + drift + fresh Gaussian
 * noise (noise_mv RMS). Each call draws new noise, so it is not const. */
double beaker_mv(beaker_t *b);

double beaker_true_ph(const beaker_t *b);    /* equilibrium pH now */
double beaker_true_mv(const beaker_t *b);    /* equilibrium mV (no lag, noise or drift) */
double beaker_titrant_ml(const beaker_t *b); /* titrant added since the last load, mL */
double beaker_temperature_c(const beaker_t *b);
const chem_scenario_t *beaker_scenario(const beaker_t *b);

/* Additions beyond the agreed API. */

/* The full equilibrium state now (species, ionic strength): cached, no solve. */
const chem_state_t *beaker_state(const beaker_t *b);

/* Elapsed simulated time since beaker_new/beaker_load, s. */
double beaker_elapsed_s(const beaker_t *b);

#endif
