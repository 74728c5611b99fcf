/* fixtures.h: method and scenario texts written inline in unit tests,
 * parsed the way the daemon parses files. Errors are printed to stderr so a
 * failing test shows why its fixture was refused. */
#ifndef STOPCOCK_FIXTURES_H
#define STOPCOCK_FIXTURES_H

#include <stdbool.h>

#include "chem.h"
#include "scenario.h"
#include "method.h"

bool fixture_method(const char *yaml, method_t *m);
bool fixture_scenario(const char *yaml, chem_scenario_t *s);

#endif
