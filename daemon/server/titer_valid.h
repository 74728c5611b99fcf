/* titer_valid.h: may an assay start with the titer and blank stored now?
 * (docs/calibration.md, "Titer and blank validity"). Checked when a run is
 * queued (submit.c) and again when its station takes it (station_run.c),
 * since a value may expire while the run waits: an assay whose formulas read `titer` needs a stored
 * titer (unless records.titer_required is false) that has not expired, and
 * one that reads `blank_ml` needs a blank that has not expired.
 */
#ifndef STOPCOCK_TITER_VALID_H
#define STOPCOCK_TITER_VALID_H

#include <stdbool.h>
#include <stddef.h>

#include "config.h"
#include "method.h"
#include "store.h"

/* True when m may start at now_s (Unix time, s); false with the reason in
 * msg; *db_err when the store failed instead. */
/* How long a stored titer (src from store_titrant_get) and the blank of m
 * stay valid, days: their own validity, else the config's default. */
double titer_valid_days(const cfg_t *cfg, const store_source_t *src);
double blank_valid_days(const cfg_t *cfg, const method_t *m); /* m may be NULL */
/* The end of a validity of valid_days from `at` (RFC 3339) into until;
 * false ("") when `at` cannot be read. */
bool valid_until(const char *at, double valid_days, char until[32]);

bool titer_valid_for_run(const cfg_t *cfg, store_t *store, const method_t *m, double now_s,
                         char *msg, size_t cap, bool *db_err);

#endif
