/* scenario.h: scenario files, what is in the simulated beaker: the sample,
 * the titrant, the electrode and the burette (keys in docs/chemistry.md and
 * docs/stopcock-sim.1). Used by stopcock-sim, `stopcock predict` and `curve`. */
#ifndef STOPCOCK_SCENARIO_H
#define STOPCOCK_SCENARIO_H

#include <stddef.h>

#include "chem.h"
#include "diag.h"

/* Parse and validate. Returns 0, or -1 with every error added to d as
 * "file:line:col: message". Defaults: temperature_c 25, activity davies,
 * water_ml 0, electrode {0, 100, 1.0, 0.1, 0}, burette {10, 20000}. */
int scenario_load(const char *path, chem_scenario_t *s, diag_list_t *d);
int scenario_parse(const char *name, const char *buf, size_t len, chem_scenario_t *s,
                   diag_list_t *d);
void scenario_defaults(chem_scenario_t *s);

#endif
