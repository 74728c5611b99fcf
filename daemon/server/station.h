/* station.h: one titration station = one thread owning its devices.
 *
 * The station thread is the only code that calls its drivers. Everything else
 * (HTTP handlers, the main thread) talks to it through a command queue and
 * reads a snapshot kept under a mutex, so a slow device never blocks a
 * request and a request never races a device call.
 *
 * A run: the HTTP handler creates the run row (state queued) and posts
 * station_enqueue(); the thread takes runs in order, drives the engine
 * (engine.h) and writes every accepted point to the store before it sends
 * the next addition. Device faults halt the burette and end the run `failed`
 * with the fault recorded; the daemon and the thread stay up and retry the
 * devices.
 *
 * Volume interlocks (checked before every dose, whatever the engine asks):
 * the total may not pass the method's volume_max_ml or the station's
 * vessel_max_ml, and one dose may not exceed what the syringe holds.
 */
#ifndef STOPCOCK_STATION_H
#define STOPCOCK_STATION_H

#include <stdbool.h>
#include <stdint.h>

#include "calib.h"
#include "config.h"
#include "diag.h"
#include "drv.h"
#include "method.h"
#include "store.h"

typedef struct station station_t;
struct titer_book;

typedef struct station_snapshot {
	char name[CFG_NAME_MAX];
	char state[16]; /* idle, running, offline (devices not answering) */
	char phase[16]; /* while running: stirring dosing settling evaluating, or refilling
	                 * while the syringe refills; else "" */
	int64_t run_id; /* current run, 0 when none */
	int queued;     /* runs waiting behind it */
	bool has_reading;
	double mv;
	bool has_ph;
	double ph;
	bool ph_from_probe; /* the transmitter gives pH; else ph (if any) comes from
	                     * the station's valid calibration */
	bool has_temperature;
	double temperature_c;
	double reading_age_s;    /* since the last good probe reading, s */
	bool has_burette;        /* burette status known */
	double dispensed_ml;     /* by the current (or last) run, mL */
	double burette_total_ml; /* dispensed since the driver opened, mL */
	double contents_ml;      /* titrant left in the syringe, mL */
	double capacity_ml;      /* syringe volume, mL */
	double vessel_max_ml;
	long additions_total; /* doses sent since start, for /metrics */
	long runs_done;
	/* scheduling: how late the thread woke for the engine's READ/WAIT times,
	 * the figure behind "addition timing jitter" in the benchmark */
	long wake_count;
	double wake_late_sum_s;
	double wake_late_max_s;
	char last_error[256];  /* last device error, "" when none */
	bool halt_pending;     /* a halt the burette did not acknowledge; tried
	                        * again until it does */
	uint64_t heartbeat_us; /* notify_now_us() of the thread's last loop */
	bool held;             /* nothing starts until an operator resumes the station */
	char held_reason[200]; /* why, for the status; "" when not held */
	/* the sample changer, as it last answered (has_changer: the station has one) */
	bool has_changer;
	bool changer_known; /* it has answered since the daemon started */
	long changer_position;
	char changer_lift[8]; /* up, down, between */
	bool changer_moving;
} station_snapshot_t;

/* Configure the drivers from the config (no I/O). NULL with errors in d. */
station_t *station_new(const cfg_t *c, const cfg_station_t *sc, const calib_config_t *cal,
                       diag_list_t *d);

/* For --check-config: configure every driver of the station and free them. */
int station_check_config(const cfg_t *c, const cfg_station_t *sc, diag_list_t *d);

/* Open the burette and halt it, from the calling thread, before anything
 * else runs. Returns 0, or -1 (the device did not answer) with a message. */
int station_halt_at_start(station_t *s, char *err, size_t cap);

/* Start / stop the thread. station_stop() halts the burette, ends the
 * current run `aborted` (queued runs become `aborted` too: "daemon stopped"),
 * and joins. */
int station_start(station_t *s, store_t *store);
void station_stop(station_t *s);
void station_free(station_t *s);

const char *station_name(const station_t *s);
double station_vessel_max_ml(const station_t *s);
/* Syringe volume from the driver's configuration, mL. */
double station_capacity_ml(const station_t *s);
/* The station's sample changer: false when it has none; else its number of
 * positions, and its rinse and park positions (0: none). */
bool station_changer(const station_t *s, long *positions, long *rinse, long *park);
/* Can the station run this step (the doser of an add, a stirrer for
 * stir_s, a changer that rinses for rinse_s)? false with why. */
bool station_can_run_step(const station_t *s, const method_step_t *st, char *why, size_t cap);
/* The station's dosing units' names (for method_limits_add_dosers); how many. */
int station_doser_names(const station_t *s, char (*out)[METHOD_ID_MAX], int cap);

void station_snapshot(station_t *s, station_snapshot_t *out);

/* The volume interlock before every dose: the run's total may not pass the
 * method's volume_max_ml nor the vessel's vessel_max_ml (<= 0: none). A dose
 * that would is cut to the whole burette steps (quantum_ml) that still fit.
 * Returns 0 with *allowed_ml (<= dose_ml), or -1 when nothing may be dosed
 * (also for NaN or non-positive input). Pure; station_run.c uses it. */
int station_dose_interlock(double dispensed_ml, double dose_ml, double method_max_ml,
                           double vessel_max_ml, double quantum_ml, double *allowed_ml);

/* The changer's interlocks (SAFETY.md, "Moving mechanics"), pure; used by
 * station_steps.c. The rack may turn only with the head up, the changer
 * still and no dosing unit moving; the head may go down only at the run's
 * position or the rack's rinse or park position (0: none); an addition may
 * not take the beaker's total (sample + additions + titrant, mL) past
 * vessel_max_ml (<= 0: none): 0 when it may, -1 when not (or bad input). */
bool station_move_allowed(drv_lift_t lift, bool changer_moving, bool dosing_unit_moving);
bool station_lower_allowed(long at_position, long run_position, long rinse, long park);
int station_add_interlock(double in_beaker_ml, double add_ml, double vessel_max_ml);

/* A halt the burette did not acknowledge is tried again, after failed_tries
 * failures, this many seconds later: short at first, then never more than
 * STATION_HALT_RETRY_MAX_S apart, for as long as the daemon runs. Pure;
 * station.c uses it. */
#define STATION_HALT_RETRY_MIN_S 0.1
#define STATION_HALT_RETRY_MAX_S 0.5
double station_halt_retry_s(int failed_tries);

/* Runs a station keeps waiting behind its current one (docs/api.md). */
#define STATION_QUEUE_MAX 32

/* A queued run: the method is copied. */
typedef struct station_job {
	int64_t run_id;
	long position; /* rack position of the sample, 0 = none (no changer) */
	method_t method;
	double amount;
	char sample_id[128];
	char queued_at[32];
	char requested_by[64]; /* the write token's name that queued it */
	int64_t series_id;     /* the series that queued it, 0 when none */
	double weight_value;   /* the weighed amount as given, in weight_unit; 0: not weighed */
	char weight_unit[8];
	char weight_source[200]; /* "balance" or "typed: REASON" */
} station_job_t;

/* Post a run; 0, or -1 when the queue is full. */
int station_enqueue(station_t *s, const station_job_t *job);
/* End a queued (never started) run as aborted in the store, with a reason. */
void station_abort_queued(station_t *s, station_job_t *job, const char *why);
/* A run's change of state into the audit trail (kind "run", code one of
 * started finished failed aborted resumed), made by the daemon itself.
 * Called at each state transition, so a resume adds one line too. */
void station_audit_run(station_t *s, int64_t run_id, const char *code, const char *msg);

typedef enum {
	STATION_CMD_OK = 0,
	STATION_CMD_NOT_HERE = 1, /* run neither current nor queued here */
	STATION_CMD_ERR = -1,
} station_cmd_t;

/* Abort a run that is current or queued on this station. The burette is
 * halted by the thread at its next step (within one device deadline). */
station_cmd_t station_abort(station_t *s, int64_t run_id);
/* Halt the burette, the dosers and the changer at once; the current run
 * becomes aborted. */
station_cmd_t station_halt(station_t *s);

/* The daemon's titer book (titer_book.h), shared by every station; before
 * station_start(). */
void station_set_titer_book(station_t *s, struct titer_book *b);

/* Hold the station: no run starts (queued runs wait) until station_resume().
 * The daemon holds a station at start-up when it had a running or queued run,
 * because nobody knows what is in the beaker (docs/operations.md). */
void station_hold(station_t *s, const char *reason);
/* While the start-up could not yet mark the last daemon's running runs
 * interrupted, a hold cannot be lifted (why says so). */
void station_block_resume(station_t *s, const char *why);
typedef enum {
	STATION_RESUMED = 0,
	STATION_RESUME_NOT_HELD = 1,
	STATION_RESUME_BLOCKED = -1, /* why filled */
} station_resume_t;
station_resume_t station_resume(station_t *s, char *why, size_t cap);

/* Electrode calibration (calib.h), run by the station thread between runs.
 * station_calib_start() makes a session for the buffers and stores it;
 * station_calib_next() moves it to `measuring`; the thread then feeds probe
 * readings and stores the session's JSON on every state change. Both return
 * 0, or -1 with a message for a 409 (run active, another calibration going,
 * wrong state) or 400 (bad buffers: *bad_input set). */
int station_calib_start(station_t *s, const double *buffers, int n, const char *actor,
                        int64_t *id_out, char *err, size_t cap, bool *bad_input);
int station_calib_next(station_t *s, int64_t id, char *err, size_t cap);

#endif
