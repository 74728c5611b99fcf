/* record.h: the run record of docs/lims.md as a C struct, and its one JSON form.
 *
 * `stopcock predict --json` and the daemon (GET /v1/runs/{id}, /v1/results)
 * print the same record through record_to_json(), so the two can never
 * disagree on a field name or on how a missing value is written.
 *
 * Text fields that are "" are written as JSON null (phase when not running,
 * started_at/ended_at before they happen, stop_reason while running). Numbers
 * that are NaN are written as null (jansson's json_real(NAN) is NULL).
 * Reals are rounded by the caller's dump flags: use
 * json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10)).
 */
#ifndef STOPCOCK_RECORD_H
#define STOPCOCK_RECORD_H

#include <jansson.h>
#include <stdbool.h>

#include "engine.h"
#include "method.h"

#define RECORD_MAX_FAULTS 16
#define RECORD_TIME_MAX   32 /* RFC 3339 UTC text, e.g. "2026-12-01T21:46:40.123Z" */

typedef struct record_endpoint {
	int n;              /* 1-based */
	double volume_ml;   /* reported volume */
	double u_volume_ml; /* standard uncertainty, mL; NaN -> null */
	double ph;          /* NaN -> null */
	double mv;          /* NaN -> null */
	double half_ph;     /* pH at half the endpoint volume; NaN -> null */
	char how[16];       /* "inflection", "model", "target", "gran" */
	/* additions to the record of docs/lims.md: both evaluations side by side */
	double derivative_ml; /* first-derivative / target / Gran volume; NaN -> null */
	double model_ml;      /* model-fit volume; NaN -> null */
	int criterion;        /* 1-based detect criterion that gave it */
	bool fallback;        /* found at the criterion's fallback signal */
	char doubt[120];      /* why the points do not support it; "" -> null */
} record_endpoint_t;

typedef struct record_result {
	char name[METHOD_ID_MAX];
	bool has_value; /* false -> "value": null, with "note" saying why */
	double value;
	int decimals;
	char unit[32];
	bool fallback;   /* its formula reads an endpoint found at a fallback signal */
	char accept[16]; /* "pass", "low", "high", "none", "missing", "doubtful" */
	char note[160];  /* "" -> no "note" key */
} record_result_t;

typedef struct record_fault {
	char at[RECORD_TIME_MAX]; /* RFC 3339, or "" -> null */
	char code[32];
	char message[256];
} record_fault_t;

typedef struct run_record {
	long long id; /* <= 0 -> null (predict has no id) */
	char station[64];
	struct {
		char id[METHOD_ID_MAX];
		long revision;
		char sha256[65];
	} method;
	struct {
		char id[128];
		double amount;
		char unit[8]; /* "mL" or "g" */
	} sample;
	char state[16]; /* queued running finished aborted failed interrupted */
	char phase[16]; /* stirring dosing settling evaluating; "" -> null */
	char queued_at[RECORD_TIME_MAX], started_at[RECORD_TIME_MAX], ended_at[RECORD_TIME_MAX];
	char requested_by[64]; /* the write token's name that queued the run; "" -> null */
	long long series_id;   /* the series that queued the run; <= 0 -> null */
	/* The sample's weight when a series weighed it (docs/api.md, "Series"):
	 * as the balance or the operator gave it; value 0 -> null. */
	struct {
		double value;     /* in unit */
		char unit[8];     /* "g", "mg" or "kg" */
		char source[200]; /* "balance" or "typed: REASON" */
	} weighing;
	struct {
		char name[METHOD_TEXT_MAX];
		double molarity; /* mol/L, nominal */
		double titer;
		/* where the titer and the blank came from (docs/calibration.md):
		 * "" / 0 -> null; blank_ml NaN -> null (no blank stored) */
		char titer_at[RECORD_TIME_MAX];
		long long titer_run_id;
		/* "standardization" or "entered" (by hand: titer_reason,
		 * titer_by); the end of its validity; "" -> null */
		char titer_source[16];
		char titer_valid_until[RECORD_TIME_MAX];
		char titer_reason[512];
		char titer_by[64];
		double blank_ml;
		char blank_at[RECORD_TIME_MAX];
		long long blank_run_id;
		char blank_source[16]; /* "blank_run"; "" -> null */
		char blank_valid_until[RECORD_TIME_MAX];
	} titrant;
	bool has_calibration;
	struct {
		long long id; /* <= 0 -> null */
		double slope_pct;
		double offset_mv;
		char at[RECORD_TIME_MAX];
	} calibration;

	int n_endpoints;
	record_endpoint_t endpoints[METHOD_MAX_ENDPOINTS];
	int n_results;
	record_result_t results[METHOD_MAX_RESULTS];
	int additions;
	double dispensed_ml;
	char stop_reason[24];  /* a code of record_stop_codes (docs/lims.md); "" -> null */
	char stop_detail[512]; /* the same in words, for a person; "" -> null */
	int n_faults;
	record_fault_t faults[RECORD_MAX_FAULTS];

	bool has_duration; /* predict: "duration_s", the simulated run time */
	double duration_s;
} run_record_t;

/* Empty record: numbers 0 (NaN where null is meant), strings "", state "queued". */
void record_init(run_record_t *r);

/* Method id/revision/sha256, titrant name and molarity, sample unit. */
void record_set_method(run_record_t *r, const method_t *m);
/* The sample's weight (value 0: not weighed; nothing is set). */
void record_set_weighing(run_record_t *r, double value, const char *unit, const char *source);

/* The evaluation part from an engine (running or done): endpoints, results,
 * additions, dispensed_ml, phase, and stop_reason once done. A fault that
 * stopped the engine is appended to faults (at = `at`, may be "") unless a
 * fault with the same code is already listed. */
void record_fill_from_engine(run_record_t *r, const engine_t *e, const char *at);

/* Append a fault (silently dropped past RECORD_MAX_FAULTS). */
void record_add_fault(run_record_t *r, const char *at, const char *code, const char *message);

/* The record as docs/lims.md's JSON object (new reference; NULL on OOM). */
json_t *record_to_json(const run_record_t *r);

/* One point as docs/api.md's point object {t_s, volume_ml, mv, ph,
 * temperature_c, settled, dpdv} (new reference). */
json_t *record_point_to_json(const engine_point_t *p);

/* A real, or null for NaN/inf (new reference). */
json_t *record_real_or_null(double v);

/* The one list of stop_reason codes (docs/lims.md, "Why a run stopped"):
 * the engine's (engine_stop_name) and "interrupted" (the daemon stopped
 * during the run). NULL-terminated. */
extern const char *const record_stop_codes[];
/* Words a person reads for a stop_reason code; the code itself when unknown. */
const char *record_stop_words(const char *code);

#endif
