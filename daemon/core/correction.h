/* correction.h: a corrected version of a finished run's results
 * (docs/lims.md, "Review and corrections"): the same formulas of the same
 * method revision over the same endpoints, with another sample amount,
 * titer or blank. Pure: no store, no clock.
 */
#ifndef STOPCOCK_CORRECTION_H
#define STOPCOCK_CORRECTION_H

#include <jansson.h>
#include <stdbool.h>
#include <stddef.h>

#include "method.h"

typedef struct correction_in {
	double amount; /* in the method's sample unit (mL or g) */
	double titer;  /* dimensionless correction factor of the titrant */
	bool has_blank;
	double blank_ml; /* mL */
} correction_in_t;

/* The results of method m for the endpoints of `record` (a run record of
 * docs/lims.md) with in's amount, titer and blank, in the record's results
 * form ([{name, value, unit, accept, fallback, note?}]). A result the old
 * version marked doubtful stays doubtful (the endpoints are the same). 0
 * and *out (new reference), or -1 with why: a formula that reads a
 * method addition (add1_ml, ...), whose volumes the record does not keep. */
int correction_results(const method_t *m, const json_t *record, const correction_in_t *in,
                       json_t **out, char *why, size_t cap);

#endif
