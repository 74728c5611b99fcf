/* speed_engine.h: helpers of the engine panel (speed_engine.c) that the
 * uncertainty panel (speed_uncert.c) shares. */
#ifndef STOPCOCK_SPEED_ENGINE_H
#define STOPCOCK_SPEED_ENGINE_H

#include <stdbool.h>

#include "chem.h"

/* The stoichiometric volume of eq[0..n) nearest to v_ml, mL. */
double speed_nearest_ml(const double *eq, int n, double v_ml);
/* The titrant has a weak component (carbonate taken up from air). */
bool speed_titrant_has_weak(const chem_scenario_t *s);
/* Stoichiometric volume of a single endpoint with such a titrant, mL
 * (speed_engine.c explains it); eq_full counts every titrant proton. */
double speed_titrant_ref_ml(const chem_scenario_t *s, double eq_full);
/* Median of the finite values of v (reorders v); NaN when none. */
double speed_median(double *v, int n);

#endif
