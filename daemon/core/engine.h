/* engine.h: the titration engine, a pure state machine.
 *
 * The engine decides what a titration does next; it never touches a device,
 * a file or a clock. The caller (the daemon's station thread, `stopcock
 * predict`, the benchmarks) performs each action it returns and feeds back
 * what happened as an event stamped with the caller's time. The same code
 * therefore runs on the bench and on a virtual clock, and a run is
 * repeatable from its event sequence.
 *
 * Protocol:
 *   e = engine_new(&method, &params);
 *   act = engine_feed(e, &(engine_event_t){.kind = ENGINE_EV_START, .t_s = 0});
 *   loop until act.kind == ENGINE_ACT_STOP:
 *     STIR   set the stirrer to act.stir_on, then feed TICK at/after act.until_t_s
 *     WAIT   feed TICK at/after act.until_t_s (the stirrer stays as it is)
 *     READ   at/after act.until_t_s take one probe reading and feed READING
 *     DOSE   add act.dose_ml (already quantized to burette steps), feed DOSED
 *            with the volume really delivered (the engine trusts that figure)
 *     REFILL refill the burette, feed REFILLED
 *   A FAULT or ABORT event may be fed at any time; the engine answers STOP.
 *   An event the engine did not ask for is ignored (the answer repeats what
 *   it still waits for), so a late or duplicate event cannot corrupt a run.
 *
 * Every accepted point is available as soon as the engine accepts it: the
 * action returned from that READING has new_point = its index (else -1), so
 * the daemon can store it before performing the next addition.
 *
 * Units: volumes mL, times s, potentials mV, signal in the method's unit
 * (pH or mV).
 */
#ifndef STOPCOCK_ENGINE_H
#define STOPCOCK_ENGINE_H

#include <stdbool.h>

#include "method.h"

#define ENGINE_MAX_POINTS 4000 /* accepted points per run; past this the run stops (fault) */

typedef struct engine engine_t;

typedef struct engine_params {
	double amount; /* sample amount in the method's sample unit (mL or g) */
	double titer;  /* titrant correction factor (1.0 when unknown) */
	bool has_blank;
	double blank_ml; /* blank volume for formulas, mL */

	/* mV -> pH when signal: ph and a reading carries no pH. Without a
	 * calibration the ideal electrode (0 mV at pH 7, 100 %) is assumed. */
	bool has_calibration;
	double cal_slope_pct; /* % of Nernst */
	double cal_offset_mv; /* mV at pH 7 */

	double burette_capacity_ml; /* syringe volume, mL (> 0) */
	long burette_steps;         /* motor steps per full stroke (resolution = capacity/steps) */
	double burette_content_ml;  /* titrant in the syringe at start; < 0 or NaN: full */
	double vessel_max_ml;       /* station limit on total titrant, mL; <= 0: none */

	double read_interval_s; /* time between probe readings while settling; <= 0: 0.5 s */
	double start_volume_ml; /* liquid in the beaker at start (for the model fit); <= 0: 50 mL */

	/* The method's additions (its before steps' add, in order) as the
	 * caller made them: volume delivered, mL; the reagent's nominal
	 * molarity, mol/L; its correction factor (1.0 when unknown). The
	 * formulas read them as addN_ml, addN_molarity, addN_titer. */
	int n_adds;
	double add_ml[FORMULA_MAX_ADD];
	double add_molarity[FORMULA_MAX_ADD];
	double add_titer[FORMULA_MAX_ADD];
} engine_params_t;

typedef enum {
	ENGINE_EV_START = 0,
	ENGINE_EV_READING,
	ENGINE_EV_DOSED,
	ENGINE_EV_REFILLED,
	ENGINE_EV_TICK,
	ENGINE_EV_FAULT,
	ENGINE_EV_ABORT,
} engine_ev_kind_t;

typedef struct engine_event {
	engine_ev_kind_t kind;
	double t_s; /* caller's clock, s since run start; must not go backwards */
	/* READING */
	double mv;
	bool has_ph; /* the probe gives its own pH (else derived from mV) */
	double ph;
	double temperature_c; /* NaN: unknown (25 degC assumed) */
	/* DOSED: volume really delivered by this addition, mL */
	double dosed_ml;
	/* FAULT: short code (e.g. "probe_stale") and a sentence; copied */
	const char *code;
	const char *message;
} engine_event_t;

typedef enum {
	ENGINE_ACT_STIR = 0,
	ENGINE_ACT_WAIT,
	ENGINE_ACT_READ,
	ENGINE_ACT_DOSE,
	ENGINE_ACT_REFILL,
	ENGINE_ACT_STOP,
} engine_act_kind_t;

typedef enum {
	ENGINE_STOP_NONE = 0,
	ENGINE_STOP_ENDPOINTS,    /* "endpoints_found": count endpoints and past_endpoint_ml more */
	ENGINE_STOP_VOLUME_MAX,   /* "volume_max": volume_max_ml (or the vessel) reached */
	ENGINE_STOP_SIGNAL_LIMIT, /* "signal_limit": the signal passed signal_limit */
	ENGINE_STOP_TIME_MAX,     /* "time_max": time_max_s passed */
	ENGINE_STOP_FAULT,        /* "fault": a FAULT event, or the engine's own (point limit) */
	ENGINE_STOP_ABORTED,      /* "aborted": an ABORT event */
} engine_stop_t;

typedef struct engine_action {
	engine_act_kind_t kind;
	double until_t_s;     /* STIR, WAIT, READ: not before this time */
	double dose_ml;       /* DOSE: mL, > 0, a whole number of burette steps */
	bool stir_on;         /* the stirrer state the engine wants (all actions) */
	engine_stop_t reason; /* STOP */
	const char *phase;    /* "stirring", "dosing", "settling", "evaluating" */
	int new_point;        /* index of a point accepted by this event, else -1 */
} engine_action_t;

typedef struct engine_point {
	double t_s;       /* when accepted, s since start */
	double volume_ml; /* total dispensed, continuous across refills */
	double mv;
	double ph; /* NaN when unknown (signal: mv without a probe pH) */
	double temperature_c;
	double signal; /* in method units (ph or mv) */
	bool settled;  /* false: accepted at wait_max_s */
	double dpdv;   /* backward difference to the previous point, signal/mL (0 first);
	                * once the run is done, the smoothed central value */
} engine_point_t;

typedef struct engine_endpoint {
	int n;              /* 1-based */
	double volume_ml;   /* the reported volume */
	double u_volume_ml; /* standard uncertainty, mL, finite and > 0 once the run is
	                     * done (docs/engine.md, "Uncertainty"); NaN while running */
	double ph;          /* pH at the endpoint (NaN when unknown) */
	double mv;          /* mV at the endpoint */
	double signal;      /* in method units */
	double half_ph;     /* pH at half the endpoint volume (NaN when unknown) */
	const char *how;    /* "inflection", "model", "target", "gran" */
	double deriv_ml;    /* the first-derivative (or target/gran) result, mL */
	double model_ml;    /* the model fit's result, mL; NaN: no fit or a poor one */
	double model_rms;   /* fit residual RMS in units of the assumed reading noise; NaN: none */
	int criterion;      /* 1-based: the detect criterion that gave it (1 for one mapping) */
	bool fallback;      /* found at the criterion's fallback signal: no inflection came first */
	double model_u_ml;  /* the model fit's standard uncertainty, mL; NaN: no fit */
	/* "": the points support the endpoint; else why they do not, a
	 * sentence (docs/engine.md, "Doubtful endpoints"). Its results are then
	 * "doubtful", never "pass". */
	char doubt[120];
} engine_endpoint_t;

typedef enum {
	ENGINE_ACCEPT_NONE = 0,
	ENGINE_ACCEPT_PASS,
	ENGINE_ACCEPT_LOW,
	ENGINE_ACCEPT_HIGH,
	ENGINE_ACCEPT_MISSING, /* "missing": the result has no value (docs/lims.md) */
	ENGINE_ACCEPT_DOUBTFUL /* "doubtful": from an endpoint the points do not support */
} engine_accept_t;

/* How a run ended, from the engine's point of view (docs/lims.md): FINISHED
 * only when every endpoint the method asks for was found and every result has
 * a value; FAILED on a fault, a missing endpoint or a result without a value;
 * ABORTED on an ABORT event. */
typedef enum {
	ENGINE_OUTCOME_NONE = 0, /* not done yet */
	ENGINE_OUTCOME_FINISHED,
	ENGINE_OUTCOME_FAILED,
	ENGINE_OUTCOME_ABORTED,
} engine_outcome_t;

typedef struct engine_result {
	char name[METHOD_ID_MAX];
	bool has_value; /* false: value is null and note says why */
	double value;   /* rounded to the method's decimals */
	int decimals;
	char unit[32];
	engine_accept_t accept;
	char note[160];     /* fault note when has_value is false */
	bool from_fallback; /* its formula reads an endpoint found at a fallback signal */
} engine_result_t;

/* A new engine; the method and params are copied. NULL on out-of-memory. */
engine_t *engine_new(const method_t *m, const engine_params_t *p);
void engine_free(engine_t *e);

/* Feed one event; returns the next action. After STOP every call returns the
 * same STOP. Never NaN in an action: bad numbers in events (NaN mV, negative
 * dosed volume) are treated as a fault of the run, not a crash. */
engine_action_t engine_feed(engine_t *e, const engine_event_t *ev);

bool engine_done(const engine_t *e);
const char *engine_phase(const engine_t *e);
engine_stop_t engine_stop_reason(const engine_t *e);
const char *engine_stop_name(engine_stop_t s); /* JSON word, "" for NONE */
/* The fault that failed the run (code, message), or "" when none: the one
 * that stopped it, or else "endpoint_missing" / "result_missing" from the
 * evaluation of a run that stopped by its own rules. */
const char *engine_fault_code(const engine_t *e);
const char *engine_fault_message(const engine_t *e);
/* Once done: which criterion gave which endpoint, in words, when the method
 * lists criteria or names a fallback (e.g. "endpoint 1 by detect[1], target
 * 8.3 pH; endpoint 2 by detect[2] at its fallback 4.5 pH, no inflection
 * before it"); "" otherwise. The run record appends it to stop_detail. */
const char *engine_stop_detail(const engine_t *e);
engine_outcome_t engine_outcome(const engine_t *e);
/* A warning about the run that did not stop it, or "" when none: today
 * "settle_below_noise", the settling band is narrower than the readings'
 * noise (docs/engine.md, "Settling"). Set while running, once. */
const char *engine_warning_code(const engine_t *e);
const char *engine_warning_message(const engine_t *e);
const char *engine_outcome_name(engine_outcome_t o); /* "finished", "failed", "aborted", "" */
/* True for a finished run whose results all pass or carry no limits: the
 * outcome nobody has to look at again (the CLI's exit status 0). */
bool engine_outcome_clean(const engine_t *e);

int engine_n_points(const engine_t *e);
const engine_point_t *engine_point(const engine_t *e, int i);
int engine_additions(const engine_t *e);       /* DOSE actions delivered (predose counts 1) */
double engine_dispensed_ml(const engine_t *e); /* total delivered, mL */
int engine_refills(const engine_t *e);

/* Endpoints and results: final once engine_done(); while running, the
 * endpoints found so far by the online first-derivative check. */
int engine_n_endpoints(const engine_t *e);
const engine_endpoint_t *engine_endpoint(const engine_t *e, int i);
int engine_n_results(const engine_t *e);
const engine_result_t *engine_result(const engine_t *e, int i);
/* "pass", "low", "high", "none", "missing", "doubtful" */
const char *engine_accept_name(engine_accept_t a);

/* The quantum of dosing (burette capacity/steps), mL. */
double engine_dose_quantum_ml(const engine_t *e);

#endif
