/* recover.h: what a start of stopcockd does with the runs the last daemon
 * left behind (docs/operations.md, "After a stop or a crash").
 *
 * A run left `running` becomes `interrupted` (never resumed); a run left
 * `queued` is queued again; and every station that had either is held: nothing
 * moves there until an operator resumes it, because nobody knows what is in
 * the beaker. When the store refuses the marking (a full disk), every station
 * is held and cannot be resumed until a later try succeeds.
 */
#ifndef STOPCOCK_RECOVER_H
#define STOPCOCK_RECOVER_H

#include <stdbool.h>

#include "http.h"

#define RECOVER_RETRY_S 5.0 /* between tries of a refused marking */

/* The start-up pass; false when the marking was refused (call
 * recover_retry() until it returns true). */
bool recover_start(http_ctx_t *ctx);
/* At a stop: note for the next start the stations that had a run on them
 * (had_run, one per ctx station), which that start holds. */
void recover_note_holds(http_ctx_t *ctx, const bool *had_run);
/* Try the marking again; true once it succeeded. */
bool recover_retry(http_ctx_t *ctx);

#endif
