/* titer_book.h: the daemon's series of replicate titers, one per titrant.
 *
 * The titer is stored per titrant name (not per station), so replicates of
 * one titrant may run on any station. Owned by the daemon (stopcockd.c) and
 * passed to each station; it grows with the titrants, with no limit of its
 * own. In memory only: a restart starts each series afresh (said in
 * docs/calibration.md), which is what a lab wants after an interruption.
 */
#ifndef STOPCOCK_TITER_BOOK_H
#define STOPCOCK_TITER_BOOK_H

#include <stdbool.h>

#include "standardization.h"

typedef struct titer_book titer_book_t;

titer_book_t *titer_book_new(void); /* NULL on out-of-memory */
void titer_book_free(titer_book_t *b);

/* Add a finished standardization run's titer to its titrant's series
 * (titer_series_add). *replicate is the titer's place in the series (1-based);
 * returns true when it completed the series (then *out holds its statistics).
 * -1 in *replicate on out-of-memory (the titer is then not kept). */
bool titer_book_add(titer_book_t *b, const standardization_config_t *cfg, const char *titrant,
                    double titer, int *replicate, standardization_result_t *out);

/* Titrants with a series (for tests and the status). */
int titer_book_titrants(titer_book_t *b);

#endif
