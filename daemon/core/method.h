/* method.h: a validated titration method, as the engine consumes it.
 *
 * Method files are YAML written by people (keys in docs/methods.md and
 * docs/methods.md). method_parse() checks every key, type, unit, range and
 * cross-field rule and reports every error as "file:line:col: message".
 * The struct it fills is plain data: no pointers into the YAML, so it may be
 * copied freely (the formulas are compiled into fixed arrays).
 */
#ifndef STOPCOCK_METHOD_H
#define STOPCOCK_METHOD_H

#include <stdbool.h>
#include <stddef.h>

#include "diag.h"
#include "formula.h"

#define METHOD_ID_MAX      64
#define METHOD_TEXT_MAX    160
#define METHOD_MAX_RESULTS 8
/* Default of detect.u_max_pct, % (docs/methods.md). */
#define METHOD_U_MAX_PCT     0.1
#define METHOD_MAX_ENDPOINTS 4

typedef enum { PURPOSE_ASSAY = 0, PURPOSE_STANDARDIZE, PURPOSE_BLANK } method_purpose_t;
typedef enum { SIGNAL_PH = 0, SIGNAL_MV } method_signal_t;
/* guided: adaptive, and once the points allow it the next addition is planned
 * from a local model of the coming jump (docs/engine.md, "Dosing"). */
typedef enum { DOSING_ADAPTIVE = 0, DOSING_CONSTANT, DOSING_GUIDED } method_dosing_t;
/* still: accept when the readings sit still; extrapolate: accept when a
 * first-order fit of the readings since the addition predicts the settled
 * value within still_within (docs/engine.md, "Settling"). */
typedef enum { SETTLE_STILL = 0, SETTLE_EXTRAPOLATE } method_settle_rule_t;
typedef enum { DETECT_INFLECTION = 0, DETECT_TARGET, DETECT_GRAN } method_detect_t;
typedef enum { UNIT_ML = 0, UNIT_G } method_unit_t;

/* One endpoint criterion of `detect` (docs/methods.md). A list of them is
 * met in turn: each is sought only past the endpoint before it. */
typedef struct method_criterion {
	method_detect_t kind;
	int count;       /* endpoints it gives: 1, or more for one inflection mapping */
	double min_jump; /* smallest rise across an inflection, signal units */
	bool has_window;
	double window_lo, window_hi; /* signal units */
	bool has_target;
	double target; /* signal units, kind target */
	/* Inflection or Gran only: end at this signal (signal units) when no
	 * inflection has appeared before the signal reaches it. */
	bool has_fallback;
	double fallback;
} method_criterion_t;

/* Steps run before or after the titration (docs/methods.md, "Steps"). */
#define METHOD_MAX_STEPS 16
/* Additions a formula can name (add1_ml .. add4_ml, FORMULA_MAX_ADD). */
#define METHOD_MAX_ADDS 4
typedef enum { STEP_ADD = 0, STEP_STIR, STEP_WAIT, STEP_RINSE } method_step_kind_t;

typedef struct method_step {
	method_step_kind_t kind;
	char doser[METHOD_ID_MAX]; /* add: the station's dosing unit, [a-z0-9-]+ */
	double ml;                 /* add: volume, mL */
	double s;                  /* stir, wait, rinse: duration, s */
} method_step_t;

typedef struct method_result {
	char name[METHOD_ID_MAX];
	char formula_text[512];
	formula_t formula; /* compiled */
	char unit[32];
	int decimals; /* 0..10 */
	bool has_min, has_max;
	double accept_min, accept_max;
} method_result_t;

typedef struct method {
	char id[METHOD_ID_MAX]; /* [a-z0-9-]+, equal to the file name */
	char title[METHOD_TEXT_MAX];
	long revision; /* >= 1 */
	method_purpose_t purpose;

	char titrant_name[METHOD_TEXT_MAX];
	double titrant_molarity; /* mol/L, nominal */

	method_unit_t sample_unit;
	double sample_min, sample_max; /* in sample_unit */

	method_signal_t signal;

	double stir_s;     /* stirring before the first addition, s */
	double initial_ml; /* added at once after stirring, mL */

	method_dosing_t dosing;
	double step_aim; /* signal change aimed at per addition (pH or mV) */
	double dose_min_ml;
	double dose_max_ml;
	double dose_ml; /* constant mode */

	method_settle_rule_t settle_rule;
	double wait_min_s, wait_max_s; /* settling bounds, s */
	double still_within;           /* signal units */
	double still_for_s;            /* s */

	/* detect written as one mapping: these fields are it. Written as a
	 * list (n_criteria > 0): they repeat criteria[0], except count, which
	 * is always the number of endpoints the method asks for in all. */
	method_detect_t detect;
	int count;       /* endpoints to find before stopping, 1..METHOD_MAX_ENDPOINTS */
	double min_jump; /* smallest rise across an inflection, signal units */
	bool has_window;
	double window_lo, window_hi; /* signal units */
	bool has_target;
	double target; /* signal units, detect: target */
	bool has_fallback;
	double fallback; /* signal units, see method_criterion_t */
	int n_criteria;  /* 0: detect is one mapping; else the length of its list */
	method_criterion_t criteria[METHOD_MAX_ENDPOINTS];
	/* An endpoint whose standard uncertainty is above this share of its
	 * volume is doubtful (detect.u_max_pct), %. */
	double u_max_pct;

	double past_endpoint_ml; /* keep dosing this much past the last endpoint */
	double volume_max_ml;    /* never dose beyond this total */
	bool has_signal_limit;
	double signal_limit; /* stop once the signal passes it */
	double time_max_s;

	int n_results;
	method_result_t results[METHOD_MAX_RESULTS];

	/* before: run in order before the titration's start.stir_s; after: once
	 * the titration has stopped. The n-th add of `before` is addN_* in
	 * the formulas. */
	int n_before, n_after;
	method_step_t before[METHOD_MAX_STEPS];
	method_step_t after[METHOD_MAX_STEPS];

	/* replicates: beakers per sample in a series (1 when the key is absent)
	 * and the largest accepted relative SD of their results, % (0: no
	 * limit). */
	long replicates;
	double max_rsd_pct;

	/* blank: {valid_days: N}: how old a stored blank this method's
	 * formulas may use, days (NaN when the key is absent: the daemon
	 * config's records.blank_valid_days) */
	double blank_valid_days;

	char sha256[65]; /* hex of the exact file bytes */
} method_t;

/* Limits from the daemon config for cross-checks; pass NULL offline
 * (`stopcock check` without -c checks everything else). */
#define METHOD_MAX_DOSERS 8
typedef struct method_limits {
	double vessel_max_ml;       /* station */
	double burette_capacity_ml; /* station's burette */
	int max_refills;            /* allowed refills per run (0: none) */
	/* The dosing units every station given has (names); only checked when
	 * dosers_known (method_limits_add_dosers was called). */
	bool dosers_known;
	int n_dosers;
	char dosers[METHOD_MAX_DOSERS][METHOD_ID_MAX];
} method_limits_t;

/* Refills a method may count on when its volume_max_ml is checked against a
 * station's burette capacity (the engine refills the syringe as needed). */
#define METHOD_MAX_REFILLS 20

/* The one rule for the limits a method is checked against, used by the
 * daemon and by `stopcock check -c`: start empty, then fold in each station
 * the method may run on; the smallest vessel and burette win. 0 = unknown. */
void method_limits_init(method_limits_t *lim);
void method_limits_add_station(method_limits_t *lim, double vessel_max_ml, double capacity_ml);
/* Fold in one station's dosing units (names): only those every station has
 * stay, since the method may run on any of them. Call once per station,
 * with n 0 for a station without dosers. */
void method_limits_add_dosers(method_limits_t *lim, const char (*names)[METHOD_ID_MAX], int n);

/* The name of a step kind as its key reads in files and JSON ("add",
 * "stir_s", ...). */
const char *method_step_name(method_step_kind_t k);
/* The method's n-th (0-based) addition of its before steps, or NULL; and
 * how many additions before has. */
const method_step_t *method_addition(const method_t *m, int n);
int method_additions(const method_t *m);

/* Parse and validate a method. `name` is the path or name used in messages;
 * the file's base name (without .yaml) must equal `method:` when name ends in
 * ".yaml". Returns 0, or -1 with all errors added (sorted by position). */
int method_parse(const char *name, const char *buf, size_t len, const method_limits_t *lim,
                 method_t *m, diag_list_t *d);
int method_load(const char *path, const method_limits_t *lim, method_t *m, diag_list_t *d);

/* Fill m with every documented default (docs/methods.md); method_parse
 * starts from these. Useful for tests that build a method by hand. */
void method_defaults(method_t *m);

/* The method's endpoint criteria in order (one for a single mapping, taken
 * from the top-level detect fields); out has room for
 * METHOD_MAX_ENDPOINTS. Returns how many. */
int method_criteria(const method_t *m, method_criterion_t *out);

/* The method as one criterion sees it: a copy of m whose detect fields
 * (detect, count, min_jump, window, target, fallback) are c's, with
 * n_criteria 0, so code written for one mapping serves each criterion. */
void method_for_criterion(const method_t *m, const method_criterion_t *c, method_t *out);

/* Names for enum values as they appear in files and JSON. */
const char *method_purpose_name(method_purpose_t p);
const char *method_signal_name(method_signal_t s);
const char *method_detect_name(method_detect_t k);
const char *method_unit_name(method_unit_t u);
const char *method_dosing_name(method_dosing_t d);
const char *method_settle_rule_name(method_settle_rule_t r);

/* Plausible mistakes in a valid method, as lines "warning: ..." (at most
 * cap of them, each of line_cap bytes); `have_burette` says whether the
 * station's burette is known (then the station check covers dose_max_ml).
 * Returns how many. The rules and their thresholds are in docs/methods.md,
 * "Warnings". */
int method_warnings(const method_t *m, bool have_burette, char (*out)[256], int cap);

#endif
