/* drv.h: the device-driver interface (burette, probe, stirrer, sample changer).
 *
 * A driver knows its wire protocol and nothing of titration. Each driver file
 * drivers/<device>_<wire>.c exports one const ops struct; drivers/drivers.c
 * holds the one table and finds a driver by the `driver:` string of a
 * station's `burette:`, `probe:`, `stirrer:` or `changer:` subtree.
 *
 * Life cycle of a handle (the daemon never reaches into a driver's state):
 *   drv_burette_configure(doc, subtree, &b, &diag)   parse + validate only; no I/O
 *   drv_burette_open(&b, &err)                        connect (may fail: retry later)
 *   drv_burette_dose / status / halt / refill ...     each returns within its deadline
 *   drv_burette_close(&b)                             also frees; safe on a zeroed handle
 * configure never touches a device, so `stopcockd --check-config` can use it.
 *
 * Deadlines: every call returns within the link's deadline (timeout_ms times
 * the bounded number of attempts; see docs/drivers.md). A call on a closed or
 * unplugged link first tries to reopen it once, so a replugged device comes
 * back by itself.
 *
 * Threads: a handle is not thread-safe; the caller serialises calls on one
 * handle (e.g. a station mutex). Because calls are bounded, a halt from
 * another thread waits at most one deadline for the lock.
 *
 * Errors are values: each call returns a drv_status_t and, when not DRV_OK,
 * puts a one-line message for a person in err->msg ("pump: no reply within
 * 500 ms to 'Q'").
 */
#ifndef STOPCOCK_DRV_H
#define STOPCOCK_DRV_H

#include <stdbool.h>
#include <stddef.h>

#include "diag.h"
#include "yamltree.h"

typedef enum {
	DRV_OK = 0,
	DRV_TIMEOUT,      /* no (complete) reply within the deadline */
	DRV_BAD_REPLY,    /* a reply came but did not parse (garbage, CRC, framing) */
	DRV_DEVICE_ERROR, /* the device answered with an error (motor stall, exception) */
	DRV_UNPLUGGED,    /* the link is gone (hang-up, EIO, connection refused) */
	DRV_CONFIG,       /* the request cannot be done as configured (bad volume, ...) */
} drv_status_t;

/* "ok", "timeout", "bad_reply", "device_error", "unplugged", "config". */
const char *drv_status_name(drv_status_t s);

typedef struct drv_err {
	char msg[256];
} drv_err_t;

/* ---- probe (pH/mV transmitter) ---- */

typedef struct drv_reading {
	double mv;
	bool has_ph; /* the transmitter reports its own pH too */
	double ph;
	bool has_temperature;
	double temperature_c;
	double t_s;    /* CLOCK_MONOTONIC seconds when read */
	bool repeated; /* the transmitter's measurement counter did not advance:
	                * the same measurement as the last read, not a new one */
} drv_reading_t;

typedef struct drv_probe_ops {
	const char *name;    /* the `driver:` word, e.g. "probe-modbus" */
	const char *summary; /* one line for docs and `stopcock ports` */
	/* Parse the subtree (a map including `driver:`); on success *priv is the
	 * driver's state. Returns 0, or -1 with errors in d. No I/O. */
	int (*configure)(const yt_doc_t *doc, const yt_node_t *cfg, void **priv, diag_list_t *d);
	drv_status_t (*open)(void *priv, drv_err_t *err);
	drv_status_t (*read)(void *priv, drv_reading_t *out, drv_err_t *err);
	void (*close)(void *priv); /* closes and frees priv */
} drv_probe_ops_t;

/* ---- burette (syringe pump) ---- */

typedef struct drv_burette_info {
	double capacity_ml; /* syringe volume, mL */
	long steps;         /* motor steps per full stroke */
} drv_burette_info_t;

typedef struct drv_burette_status {
	bool moving;         /* a dose, a refill or a valve move is in progress */
	bool refilling;      /* the move in progress is a refill */
	double dispensed_ml; /* total dispensed since open; never decreases, refills excluded */
	double contents_ml;  /* titrant left in the syringe, 0 .. capacity_ml */
	bool fault;          /* the device reports an error (stall); cleared by halt */
} drv_burette_status_t;

typedef struct drv_burette_ops {
	const char *name;
	const char *summary;
	int (*configure)(const yt_doc_t *doc, const yt_node_t *cfg, void **priv, diag_list_t *d);
	void (*info)(void *priv, drv_burette_info_t *out);
	drv_status_t (*open)(void *priv, drv_err_t *err);
	/* Start dispensing volume_ml (> 0, at most contents_ml; rounded to whole
	 * steps). Returns once the device accepted the command; poll status()
	 * until !moving. DRV_CONFIG when the syringe holds too little (refill). */
	drv_status_t (*dose)(void *priv, double volume_ml, drv_err_t *err);
	/* Ask the device. While moving, dispensed_ml follows the plunger. Also
	 * advances a refill in progress (valve in, fill, valve out). */
	drv_status_t (*status)(void *priv, drv_burette_status_t *out, drv_err_t *err);
	/* Stop any motion at once; abandons a refill. */
	drv_status_t (*halt)(void *priv, drv_err_t *err);
	/* Start a refill: valve to the reservoir, fill the syringe, valve to the
	 * outlet. Poll status() until !moving. */
	drv_status_t (*refill)(void *priv, drv_err_t *err);
	void (*close)(void *priv);
} drv_burette_ops_t;

/* ---- stirrer ---- */

typedef struct drv_stirrer_ops {
	const char *name;
	const char *summary;
	int (*configure)(const yt_doc_t *doc, const yt_node_t *cfg, void **priv, diag_list_t *d);
	drv_status_t (*open)(void *priv, drv_err_t *err);
	/* rpm <= 0 keeps the configured default speed. */
	drv_status_t (*set)(void *priv, bool on, double rpm, drv_err_t *err);
	void (*close)(void *priv);
} drv_stirrer_ops_t;

/* ---- sample changer ---- */

typedef enum {
	DRV_LIFT_UP = 0, /* the head is clear of every beaker: the rack may turn */
	DRV_LIFT_DOWN,   /* the head is in the beaker at the current position */
	DRV_LIFT_BETWEEN /* on its way, or stopped part way */
} drv_lift_t;

typedef enum { DRV_CHANGER_RINSE = 0, DRV_CHANGER_WASTE } drv_changer_pump_t;

typedef struct drv_changer_info {
	long positions; /* positions are numbered 1 .. positions */
	bool has_rinse; /* the profile has a rinse pump command */
	bool has_waste; /* the profile has a waste pump command */
	long rinse;     /* the position holding water for rinsing the head; 0: none */
	long park;      /* where the head waits between runs, in storage solution; 0: none */
} drv_changer_info_t;

typedef struct drv_changer_status {
	long position; /* where the rack is (the last position reached while moving) */
	drv_lift_t lift;
	bool moving; /* the rack, the lift or a pump is in motion */
	bool fault;  /* the device reports an error (jam, stuck lift); cleared by halt */
} drv_changer_status_t;

typedef struct drv_changer_ops {
	const char *name;
	const char *summary;
	int (*configure)(const yt_doc_t *doc, const yt_node_t *cfg, void **priv, diag_list_t *d);
	void (*info)(void *priv, drv_changer_info_t *out);
	drv_status_t (*open)(void *priv, drv_err_t *err);
	/* Start turning the rack to `position` (1 .. positions). Refused with
	 * DRV_CONFIG unless the lift is up and nothing moves: the head must never
	 * be dragged through a beaker wall. Poll status() until !moving. */
	drv_status_t (*move)(void *priv, long position, drv_err_t *err);
	/* Start lowering (down = true) or raising the head. Lowering is refused
	 * with DRV_CONFIG while the rack moves. Poll status() until !moving. */
	drv_status_t (*lift)(void *priv, bool down, drv_err_t *err);
	/* Run the rinse or waste pump for seconds_s (> 0). */
	drv_status_t (*pump)(void *priv, drv_changer_pump_t which, double seconds_s,
	                     drv_err_t *err);
	drv_status_t (*status)(void *priv, drv_changer_status_t *out, drv_err_t *err);
	/* Stop the rack, the lift and the pumps at once. */
	drv_status_t (*halt)(void *priv, drv_err_t *err);
	void (*close)(void *priv);
} drv_changer_ops_t;

/* ---- balance ---- */

typedef struct drv_weight {
	double value; /* in `unit` */
	char unit[8]; /* "g", "mg" or "kg", as the balance said it */
} drv_weight_t;

typedef struct drv_balance_ops {
	const char *name;
	const char *summary;
	int (*configure)(const yt_doc_t *doc, const yt_node_t *cfg, void **priv, diag_list_t *d);
	drv_status_t (*open)(void *priv, drv_err_t *err);
	/* Ask for a stable weight; while the balance says it has not settled,
	 * ask again until its stable_timeout_ms. Never a weight the balance did
	 * not say was stable. */
	drv_status_t (*weigh)(void *priv, drv_weight_t *out, drv_err_t *err);
	void (*close)(void *priv);
} drv_balance_ops_t;

/* ---- the table (drivers/drivers.c) ---- */

const drv_probe_ops_t *drv_find_probe(const char *name);
const drv_burette_ops_t *drv_find_burette(const char *name);
const drv_stirrer_ops_t *drv_find_stirrer(const char *name);
const drv_changer_ops_t *drv_find_changer(const char *name);
const drv_balance_ops_t *drv_find_balance(const char *name);
/* NULL-terminated lists, for help texts and docs. */
const drv_probe_ops_t *const *drv_probe_table(void);
const drv_burette_ops_t *const *drv_burette_table(void);
const drv_stirrer_ops_t *const *drv_stirrer_table(void);
const drv_changer_ops_t *const *drv_changer_table(void);
const drv_balance_ops_t *const *drv_balance_table(void);

/* ---- handles: what the daemon holds ---- */

typedef struct drv_probe {
	const drv_probe_ops_t *ops;
	void *priv;
} drv_probe_t;

typedef struct drv_burette {
	const drv_burette_ops_t *ops;
	void *priv;
} drv_burette_t;

typedef struct drv_stirrer {
	const drv_stirrer_ops_t *ops;
	void *priv;
} drv_stirrer_t;

typedef struct drv_changer {
	const drv_changer_ops_t *ops;
	void *priv;
} drv_changer_t;

typedef struct drv_balance {
	const drv_balance_ops_t *ops;
	void *priv;
} drv_balance_t;

/* Read `driver:` from the subtree `cfg`, find the driver, configure it.
 * An unknown driver name is an error at its mark listing the known ones.
 * Returns 0, or -1 with errors in d (the handle stays zeroed). */
int drv_probe_configure(const yt_doc_t *doc, const yt_node_t *cfg, drv_probe_t *out,
                        diag_list_t *d);
int drv_burette_configure(const yt_doc_t *doc, const yt_node_t *cfg, drv_burette_t *out,
                          diag_list_t *d);
int drv_stirrer_configure(const yt_doc_t *doc, const yt_node_t *cfg, drv_stirrer_t *out,
                          diag_list_t *d);
int drv_changer_configure(const yt_doc_t *doc, const yt_node_t *cfg, drv_changer_t *out,
                          diag_list_t *d);
int drv_balance_configure(const yt_doc_t *doc, const yt_node_t *cfg, drv_balance_t *out,
                          diag_list_t *d);

/* Thin wrappers over the ops; each fills err when not DRV_OK. */
drv_status_t drv_probe_open(drv_probe_t *p, drv_err_t *err);
drv_status_t drv_probe_read(drv_probe_t *p, drv_reading_t *out, drv_err_t *err);
void drv_probe_close(drv_probe_t *p);

void drv_burette_info(const drv_burette_t *b, drv_burette_info_t *out);
drv_status_t drv_burette_open(drv_burette_t *b, drv_err_t *err);
drv_status_t drv_burette_dose(drv_burette_t *b, double volume_ml, drv_err_t *err);
drv_status_t drv_burette_status(drv_burette_t *b, drv_burette_status_t *out, drv_err_t *err);
drv_status_t drv_burette_halt(drv_burette_t *b, drv_err_t *err);
drv_status_t drv_burette_refill(drv_burette_t *b, drv_err_t *err);
void drv_burette_close(drv_burette_t *b);

drv_status_t drv_stirrer_open(drv_stirrer_t *s, drv_err_t *err);
drv_status_t drv_stirrer_set(drv_stirrer_t *s, bool on, double rpm, drv_err_t *err);
void drv_stirrer_close(drv_stirrer_t *s);

void drv_changer_info(const drv_changer_t *c, drv_changer_info_t *out);
drv_status_t drv_changer_open(drv_changer_t *c, drv_err_t *err);
drv_status_t drv_changer_move(drv_changer_t *c, long position, drv_err_t *err);
drv_status_t drv_changer_lift(drv_changer_t *c, bool down, drv_err_t *err);
drv_status_t drv_changer_pump(drv_changer_t *c, drv_changer_pump_t which, double seconds_s,
                              drv_err_t *err);
drv_status_t drv_changer_status(drv_changer_t *c, drv_changer_status_t *out, drv_err_t *err);
drv_status_t drv_changer_halt(drv_changer_t *c, drv_err_t *err);
void drv_changer_close(drv_changer_t *c);
drv_status_t drv_balance_open(drv_balance_t *b, drv_err_t *err);
drv_status_t drv_balance_weigh(drv_balance_t *b, drv_weight_t *out, drv_err_t *err);
void drv_balance_close(drv_balance_t *b);
/* "up", "down", "between". */
const char *drv_lift_name(drv_lift_t l);

/* Fill err->msg with a formatted message and return st (for one-line returns). */
drv_status_t drv_fail(drv_err_t *err, drv_status_t st, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));

#endif
