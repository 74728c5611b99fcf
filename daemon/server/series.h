/* series.h: series of samples titrated one beaker after another on one
 * station (docs/api.md, "Series").
 *
 * A series is stored in its own table (store.h, "series") and queues its runs
 * through run_submit() one at a time: each run carries the sample's method,
 * amount, its series id and (on a station with a sample changer) the rack
 * position of its beaker. One service thread follows the series: when a run
 * ends it applies on_failure, queues the next beaker or, on a station
 * without a changer, waits for the operator (series_next), computes the
 * sample's replicate statistics (stats.h) and ends the series.
 *
 * A device fault always stops the series; a chemistry outcome (no endpoint,
 * a result out of its limits or doubtful) follows on_failure. A series never
 * resumes by itself: at a daemon stop or crash it ends `interrupted`, its
 * finished samples keep their results, its queued run ends `interrupted`.
 */
#ifndef STOPCOCK_SERIES_H
#define STOPCOCK_SERIES_H

#include <jansson.h>
#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>

#include "http.h"

/* Samples one series may hold; with up to STATS_MAX_N beakers each. */
#define SERIES_MAX_SAMPLES 200

typedef struct series_service series_service_t;

/* Before the stations start and before recover_start(): every series the
 * last daemon left `queued` or `running` ends `interrupted` (its queued run
 * too; a running one is recover.c's). Returns how many, -1 on a store error. */
int series_recover_start(store_t *store);

/* Start the service thread (after the stations); NULL when it cannot. */
series_service_t *series_service_start(http_ctx_t *ctx);
/* At a stop, before the stations stop: every series still going ends
 * `interrupted`; joins the thread. Requests may still call in (new series are
 * refused) until series_service_free, after the HTTP server stopped. NULL is
 * a no-op for both. */
void series_service_stop(series_service_t *sv);
void series_service_free(series_service_t *sv);

typedef enum {
	SERIES_OK = 0,
	SERIES_BAD_REQUEST,    /* 400 */
	SERIES_NOT_FOUND,      /* 404: no such series, station or method */
	SERIES_INVALID_METHOD, /* 422 */
	SERIES_CONFLICT,       /* 409: wrong state */
	SERIES_DATABASE,       /* 500 */
} series_error_t;

/* The first series going on a station as {"id","state","prompt"} (prompt
 * null unless it waits for the operator), or NULL when none is. */
json_t *series_on_station(series_service_t *sv, const char *station);

/* POST /v1/series: check body, store the series, let the thread start it.
 * On SERIES_OK *id_out; otherwise err holds the message. */
series_error_t series_submit(series_service_t *sv, const json_t *body, const char *actor,
                             int64_t *id_out, char *err, size_t cap);
/* Abort: the current run is aborted (burette halted) and nothing more is
 * queued; the series ends `aborted`. */
series_error_t series_abort(series_service_t *sv, int64_t id, char *err, size_t cap);
/* The operator placed the next beaker (a station without a changer). */
series_error_t series_next(series_service_t *sv, int64_t id, char *err, size_t cap);
/* The operator's weight for the beaker the series waits to weigh (unit g,
 * mg or kg), with the reason it is typed rather than weighed. */
series_error_t series_weight(series_service_t *sv, int64_t id, double value, const char *unit,
                             const char *reason, char *err, size_t cap);

#endif
