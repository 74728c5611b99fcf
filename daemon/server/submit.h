/* submit.h: run submission, the one way a run gets queued.
 *
 * Checks the request, parses the method's latest revision against the
 * station's limits, applies the calibration gate for pH runs, looks up the
 * titrant's titer, writes the run record and queues the job. The HTTP handler
 * (POST /v1/runs) only turns JSON into a run_request_t and the result into a
 * reply; other front-ends (series) call the same function.
 */
#ifndef STOPCOCK_SUBMIT_H
#define STOPCOCK_SUBMIT_H

#include <stdint.h>

#include "http.h"

typedef enum {
	SUBMIT_OK,
	SUBMIT_BAD_REQUEST,    /* the request itself is wrong */
	SUBMIT_NOT_FOUND,      /* no such station or method */
	SUBMIT_INVALID_METHOD, /* the method cannot run on this station */
	SUBMIT_NO_CALIBRATION, /* a pH run without a valid calibration */
	SUBMIT_QUEUE_FULL,     /* the station's queue is full */
	SUBMIT_NO_TITER,       /* an assay without a valid titer or blank (titer_valid.h) */
	SUBMIT_DATABASE,       /* the store failed; the request may be retried */
	SUBMIT_NO_MEMORY,
} submit_error_t;

typedef struct {
	const char *station;
	const char *method_id;
	const char *sample_id;
	double amount; /* in the method's sample unit */
	const char *requested_by;
	int position;      /* rack position, 0 = none */
	int64_t series_id; /* the series queuing the run, 0 when none */
	/* A weighed amount as the balance or the operator gave it (amount holds
	 * it in grams); weight_value 0: not weighed. */
	double weight_value;
	const char *weight_unit, *weight_source;
} run_request_t;

typedef struct {
	submit_error_t error;
	char *message;        /* malloc'd; NULL on success (free with run_submit_done) */
	int64_t run_id;       /* on success */
	long method_revision; /* on success */
	const char *unit;     /* the sample unit's name, on success (static) */
} run_submit_result_t;

/* Queue one run. Returns res->error (SUBMIT_OK when queued). */
submit_error_t run_submit(http_ctx_t *ctx, const run_request_t *req, run_submit_result_t *res);

/* Free what a result holds. */
void run_submit_done(run_submit_result_t *res);

#endif
