/* station_priv.h: what station.c and station_run.c share; nothing else includes it. */
#ifndef STOPCOCK_STATION_PRIV_H
#define STOPCOCK_STATION_PRIV_H

#include <jansson.h>
#include <pthread.h>
#include <stdatomic.h>
#include <stdbool.h>
#include <stdint.h>

#include "calib.h"
#include "standardization.h"
#include "drv.h"
#include "station.h"
#include "store.h"

#define STATION_RING 8 /* published snapshots; a reader retries if lapped */

/* One published snapshot as relaxed atomic words: a seqlock whose data are
 * atomics is race-free in C11 terms (and to ThreadSanitizer). */
#define STATION_SNAP_WORDS      ((sizeof(station_snapshot_t) + 7) / 8)
#define STATION_MAX_PENDING     8   /* final records kept for another try */
#define STATION_PENDING_RETRY_S 1.0 /* between tries, s */

typedef struct station_snap_slot {
	_Atomic uint64_t w[STATION_SNAP_WORDS];
} station_snap_slot_t;

struct station {
	char name[CFG_NAME_MAX];
	double vessel_max_ml;
	double read_interval_s;
	store_t *store;
	const cfg_t *cfg; /* the daemon's, for the titer rules at a run's start */

	/* devices: touched only by the station thread (and by
	 * station_halt_at_start before the thread exists) */
	drv_burette_t bur;
	drv_probe_t probe;
	drv_stirrer_t stir;
	bool has_stirrer;
	drv_burette_info_t info;
	bool bur_open, probe_open, stir_open;
	bool bur_bad, probe_bad; /* the last idle check failed (logged once) */
	bool stir_on;
	double next_open_try_s; /* monotonic, s */
	/* The sample changer and the extra dosing units (station thread only,
	 * like the burette): a run moves the head to its position and runs the
	 * method's steps with them (station_steps.c). */
	bool has_changer, chg_open;
	drv_changer_t chg;
	drv_changer_info_t chg_info;
	int n_dosers;
	struct station_doser {
		char name[CFG_NAME_MAX];
		char reagent[160];
		double molarity; /* nominal, mol/L */
		drv_burette_t bur;
		drv_burette_info_t info;
		bool open;
		bool halt_pending; /* a halt it did not acknowledge: sent again */
	} dosers[CFG_MAX_DOSERS];
	bool chg_halt_pending;    /* a halt the changer did not acknowledge: sent again */
	double extra_halt_next_s; /* monotonic time of the next try of those, s */

	pthread_t thread;
	bool started;

	/* under lock: commands, the queue, the snapshot, the calibration */
	pthread_mutex_t lock;
	pthread_cond_t cond; /* CLOCK_MONOTONIC; signalled on every command */
	bool stop_req;
	bool halt_req;
	int64_t abort_run; /* abort this run id when current (0: none) */
	station_job_t *queue[STATION_QUEUE_MAX];
	int qn;
	station_snapshot_t snap;
	/* Published copies of snap for readers (HTTP threads), so a burst of
	 * GET /v1/stations never takes `lock`, which the station thread needs on
	 * every wake-up (a niced reader preempted while holding it would delay
	 * an addition). Written under `lock`; read lock-free (station.c). */
	station_snap_slot_t ring[STATION_RING];
	atomic_uint_fast64_t ring_seq;
	atomic_uint_fast64_t heartbeat_us; /* notify_now_us() of the last loop */

	calib_config_t cal_cfg;
	standardization_config_t standardization_cfg; /* replicates that make one titer (config) */
	struct titer_book *titers; /* the daemon's, shared by all stations; NULL: none */
	calib_session_t *cal;      /* the station's calibration, NULL when none */
	int64_t cal_id;
	int64_t cal_logged_id; /* calibration whose end is in the audit trail */
	char cal_actor[64];    /* the token's name that started cal_id */
	bool cal_dirty;        /* state changed by an HTTP call: the thread stores it */
	bool has_valid_cal;    /* valid_cal: latest accepted calibration, for live pH */
	calib_result_t valid_cal;

	/* Final records the store refused (disk full, I/O error), kept to be
	 * stored again (station_store_pending); station thread only. While any
	 * is pending the station starts no run: it doses nothing it cannot
	 * record. */
	struct station_pending {
		int64_t run_id;
		char state[16];
		char *record_json; /* malloc'd */
		int tries;
	} pending[STATION_MAX_PENDING];
	int n_pending;
	double stir_retry_s; /* monotonic time of the next stirrer-off try while idle */
	/* A halt the burette did not acknowledge (station thread only): tried
	 * again at halt_next_s, in a run and while idle; no run starts until
	 * it is acknowledged. */
	bool halt_pending;
	int halt_tries;           /* failed tries since the first */
	double halt_next_s;       /* monotonic s */
	char halt_why[64];        /* why the first halt was sent */
	double pending_next_s;    /* monotonic time of the next try */
	char resume_blocked[160]; /* why a hold cannot be lifted yet; "" when it can */
};

/* Publish snap for readers and release `lock` (use after any change of snap). */
void station_unlock(station_t *s);

/* Sleep until t_mono_s or a command that interrupts the current run.
 * Returns true when interrupted (stop, halt, abort of run_id). */
bool station_wait_until(station_t *s, double t_mono_s, int64_t run_id);

/* Does a pending command stop the run run_id? (caller holds no lock) */
bool station_interrupted(station_t *s, int64_t run_id);

/* Devices, station thread only. */
drv_status_t station_read_probe(station_t *s, drv_reading_t *r, drv_err_t *err);
/* Halt the burette; true when it acknowledged. When it did not, the station
 * says "burette not confirmed halted" and station_halt_retry tries again. */
bool station_halt_burette(station_t *s, const char *why);
/* Try a pending halt again when its time has come; true when none is
 * pending (any more). */
bool station_halt_retry(station_t *s);
void station_set_error(station_t *s, const char *msg);

/* Open the changer and the dosers that are closed (each driver halts its
 * device on every open); true when all of them are open. */
bool station_open_extras(station_t *s);
/* Halt every dosing unit (the burette and each doser) and the changer; true
 * when each acknowledged. A doser or changer that did not is marked and sent
 * the halt again (station_extra_halts_retry) until it answers; no run starts
 * meanwhile. */
bool station_halt_all(station_t *s, const char *why);
/* Try the pending halts of dosers and the changer again when their time has
 * come; true when none is pending (any more). */
bool station_extra_halts_retry(station_t *s);
/* Halt one doser (two tries); marks it pending when it does not answer. */
bool station_halt_doser(station_t *s, int i, const char *why);
/* Ask the changer where it is and publish it; DRV_OK with *st. */
drv_status_t station_changer_status(station_t *s, drv_changer_status_t *st, drv_err_t *err);

/* ---- a run's changer moves and steps (station_steps.c) ---- */

enum { STEP_DONE = 0, STEP_INTERRUPTED = 1, STEP_FAULT = -1 };
#define STATION_MAX_DONE (2 * METHOD_MAX_STEPS)

typedef struct station_step_done {
	method_step_kind_t kind;
	bool before;               /* of before (else after) */
	char doser[METHOD_ID_MAX]; /* add */
	double volume_ml;          /* add: delivered, mL (NaN: none known) */
	double s;                  /* stir, wait, rinse: asked for, s */
	char started_at[32], ended_at[32];
} station_step_done_t;

typedef struct station_step_ctx {
	station_t *s;
	int64_t run_id;
	long position;                       /* the run's rack position; 0: none */
	double in_beaker_ml;                 /* sample + additions + titrant so far, mL */
	double added_ml;                     /* by the steps' additions, mL */
	double delivered_ml[CFG_MAX_DOSERS]; /* by doser index, mL */
	int n_adds;                          /* additions of before, in order: addN_* */
	double add_ml[METHOD_MAX_ADDS];
	int add_doser[METHOD_MAX_ADDS];
	int n_done;
	station_step_done_t done[STATION_MAX_DONE];
	char code[32]; /* on STEP_FAULT */
	char msg[300];
} station_step_ctx_t;

/* The head to `position`: up (every dosing unit halted first), the rack
 * turned, and down when `lower`. STEP_DONE, STEP_INTERRUPTED, or STEP_FAULT
 * with c->code and c->msg. */
int station_head_to(station_step_ctx_t *c, long position, bool lower);
/* Run steps in order; the same returns. */
int station_run_steps(station_step_ctx_t *c, const method_step_t *steps, int n, bool before);
/* After a run: the head to the park position (down, in storage solution),
 * or up when the rack has none. */
int station_park(station_step_ctx_t *c);
/* Halt the burette and every doser; true when each acknowledged. */
bool station_halt_all_dosing(station_t *s, const char *why);
/* After a changer or doser fault: halt every dosing unit and the changer,
 * raise the head where safe. */
void station_fault_stop(station_t *s, const char *code);
/* {"steps": [...], "dosers": {name: {delivered_ml, reagent}}} (new reference). */
json_t *station_steps_json(const station_step_ctx_t *c);

/* Execute one run to its end (station_run.c). */
void station_run_job(station_t *s, station_job_t *job);

/* Try again to store the final records the store refused, at most every
 * STATION_PENDING_RETRY_S unless `now` is set. Returns how many are still
 * pending. */
int station_store_pending(station_t *s, bool now);

#endif
