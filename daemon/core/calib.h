/* calib.h: electrode calibration, titrant standardization and blanks.
 *
 * Pure logic, no I/O and no clock: the daemon's station thread feeds probe
 * readings stamped with its own clock, HTTP handlers read results, storage
 * keeps the JSON this module writes. Details and sources in docs/calibration.md.
 *
 * Electrode calibration:
 *   s = calib_session_new(&cfg, (double[]){4.01, 7.00, 10.01}, 3, err, sizeof err);
 *   state WAITING, next_buffer 4.01 (buffers in the order given)
 *   operator puts the electrode in it  -> calib_session_next(s, t_s, ...)  state MEASURING
 *   every probe reading                -> calib_session_feed(s, &reading)
 *     when the reading is stable the buffer is recorded; the state becomes
 *     WAITING (next buffer) or, after the last, ACCEPTED / REJECTED (reason)
 *   calib_session_result(s, at_unix_s, &res) copies what is known at any time.
 * Buffer values are corrected to the measured temperature (tables below),
 * mV is fitted against pH by least squares, the slope is reported in % of the
 * Nernst slope and the offset in mV at pH 7, then checked against limits.
 *
 * Units: potentials mV, temperatures degC, times s, volumes mL, mol/L.
 */
#ifndef STOPCOCK_CALIB_H
#define STOPCOCK_CALIB_H

#include <jansson.h>
#include <stdbool.h>
#include <stddef.h>

#include "diag.h"
#include "yamltree.h"

#define CALIB_MIN_BUFFERS     2
#define CALIB_MAX_BUFFERS     5
#define CALIB_MAX_ROWS        24 /* rows of one temperature table */
#define CALIB_MAX_LAB_BUFFERS 8  /* lab-supplied tables in the daemon config */
#define CALIB_NAME_MAX        64
#define CALIB_REASON_MAX      256

/* ---- buffers and their temperature tables ---- */

typedef enum {
	CALIB_BUF_IUPAC = 0, /* IUPAC 2002 primary (or secondary) standard */
	CALIB_BUF_TECHNICAL, /* technical 4.01 / 7.00 / 10.01, default table (common practice) */
	CALIB_BUF_LAB,       /* table from the daemon config `calibration.buffers` */
	CALIB_BUF_CUSTOM,    /* unknown value, no table: used as given at any temperature */
} calib_buffer_kind_t;

typedef struct calib_table {
	int n;                      /* rows; 0 for a custom buffer */
	double t_c[CALIB_MAX_ROWS]; /* ascending, degC */
	double ph[CALIB_MAX_ROWS];
} calib_table_t;

typedef struct calib_buffer {
	double nominal_ph; /* as the operator named it: the value at 25 degC */
	calib_buffer_kind_t kind;
	char name[CALIB_NAME_MAX]; /* e.g. "0.05 mol/kg potassium hydrogen phthalate" */
	calib_table_t table;
} calib_buffer_t;

/* ---- configuration (daemon config key `calibration:`) ---- */

typedef struct calib_config {
	double slope_min_pct, slope_max_pct; /* accepted slope, % of Nernst */
	double offset_min_mv, offset_max_mv; /* accepted mV at pH 7 */
	double residual_max_mv;              /* largest distance of a buffer from the line */
	double expires_h;                    /* a calibration is valid this long */
	/* stability of one buffer's reading */
	double stable_drift_mv; /* drift over the window below this counts as stable */
	double stable_window_s; /* the window the drift is measured over */
	double stable_min_s;    /* never accept a buffer sooner than this after `next` */
	double stable_max_s;    /* not stable by then: the calibration is rejected */
	int n_lab;
	calib_buffer_t lab[CALIB_MAX_LAB_BUFFERS];
} calib_config_t;

/* Defaults: slope 95..105 %, offset -30..30 mV (common practice, docs/chemistry.md
 * section 4), residual 5 mV, expires 24 h, stable 0.1 mV over 10 s after at
 * least 5 s, at most 180 s, no lab tables. */
void calib_config_defaults(calib_config_t *c);

/* Parse the value of the daemon config's `calibration:` key (a map; n may be
 * NULL: defaults). Keys:
 *   slope_pct: [MIN, MAX]   offset_mv: [MIN, MAX]   residual_max_mv: X
 *   expires_h: X
 *   stable: {drift_mv: X, window_s: X, min_s: X, max_s: X}
 *   buffers: [{nominal: 4.01, name: "...", table: [[T_C, PH], ...]}, ...]
 * Fills defaults first. Returns 0, or -1 with every error added to d. */
int calib_config_parse(const yt_doc_t *doc, const yt_node_t *n, calib_config_t *c, diag_list_t *d);

/* What a nominal value means. Order: a lab table with this nominal (within
 * 0.0005), then the technical buffers 4.01/7.00/10.01 (same), then an IUPAC
 * standard whose 25 degC value rounds to it (within 0.0051: 4.00 or 4.005 is
 * KHP, 6.86/6.865 phosphate, 9.18 borax, 10.012 carbonate, 1.68 tetroxalate),
 * else a custom buffer without table. Always fills *out; returns its kind. */
calib_buffer_kind_t calib_buffer_lookup(const calib_config_t *c, double nominal_ph,
                                        calib_buffer_t *out);

/* The buffer's pH at t degC: linear interpolation between table rows (exact
 * at the rows). NaN outside the table's temperature range; a custom buffer
 * gives its nominal value at any temperature. */
double calib_buffer_ph(const calib_buffer_t *b, double temperature_c);

/* The built-in IUPAC standards (i < calib_iupac_count()), for docs and tests. */
int calib_iupac_count(void);
const calib_buffer_t *calib_iupac(int i);
/* The built-in technical buffers 4.01, 7.00, 10.01 (i < 3). */
int calib_technical_count(void);
const calib_buffer_t *calib_technical(int i);

/* ---- the calibration session ---- */

typedef enum {
	CALIB_WAITING = 0, /* for the operator to put the electrode into next_buffer */
	CALIB_MEASURING,   /* reading the current buffer until stable */
	CALIB_ACCEPTED,
	CALIB_REJECTED, /* reason says why */
} calib_state_t;

const char *calib_state_name(calib_state_t s); /* "waiting", "measuring", ... */

typedef struct calib_reading {
	double t_s;           /* caller's clock, s; must not go backwards */
	double mv;            /* NaN: no reading (a tick: only the time limit is checked) */
	double temperature_c; /* NaN: unknown, 25 degC assumed */
} calib_reading_t;

typedef struct calib_point {
	double nominal_ph; /* as requested */
	char name[CALIB_NAME_MAX];
	calib_buffer_kind_t kind;
	bool measured;
	double ph;            /* the buffer's value at the measured temperature */
	double mv;            /* mean over the stable window */
	double temperature_c; /* mean over the stable window */
	double drift_mv;      /* drift over the window when accepted */
	double wait_s;        /* from `next` to stable */
	double residual_mv;   /* measured minus fitted line (after the fit) */
} calib_point_t;

typedef struct calib_result {
	calib_state_t state;
	int n_buffers;
	calib_point_t buffers[CALIB_MAX_BUFFERS];
	double next_buffer; /* nominal pH of the buffer waited for or measured; NaN when final */
	/* the fit; NaN until accepted or rejected after a fit */
	double slope_pct;       /* % of the Nernst slope */
	double offset_mv;       /* mV at pH 7 */
	double temperature_c;   /* mean measured temperature */
	double slope_mv_per_ph; /* the line, mV per pH: -slope_pct/100 * Nernst(temperature_c) */
	/* wall clock, s since 1970; 0 while not final */
	double at_unix_s;
	double expires_at_unix_s;      /* at + expires_h; 0 when rejected */
	char reason[CALIB_REASON_MAX]; /* "" unless rejected */
} calib_result_t;

typedef struct calib_session calib_session_t;

/* A new session for buffers given as nominal pH values, in measuring order.
 * Refuses (NULL, message in err) fewer than 2 or more than 5 buffers, values
 * outside 0..14, and two buffers less than 1 pH apart. The config is copied. */
calib_session_t *calib_session_new(const calib_config_t *c, const double *nominal_ph, int n,
                                   char *err, size_t err_cap);
void calib_session_free(calib_session_t *s);

calib_state_t calib_session_state(const calib_session_t *s);
/* Nominal pH of the buffer waited for or being measured; NaN when final. */
double calib_session_next_buffer(const calib_session_t *s);

/* The operator has put the electrode in next_buffer: WAITING -> MEASURING.
 * Returns 0, or -1 (wrong state, message in err) for a 409. */
int calib_session_next(calib_session_t *s, double t_s, char *err, size_t err_cap);

/* One probe reading (or tick). Returns the state after it. Ignored unless
 * MEASURING; readings closer together than window/200 are skipped. */
calib_state_t calib_session_feed(calib_session_t *s, const calib_reading_t *r);

/* A probe fault while a buffer is measured: that buffer is not recorded, the
 * session waits for it again (state WAITING, the same next_buffer) and the
 * reason says why. No effect unless MEASURING. */
void calib_session_fail_buffer(calib_session_t *s, const char *why);

/* End the session as REJECTED with this reason (probe fault, operator abort).
 * No effect once final. */
void calib_session_cancel(calib_session_t *s, const char *reason);

/* Copy the session's state. `at_unix_s` is the wall-clock time the caller
 * noted when the session became final (ignored before that). */
void calib_session_result(const calib_session_t *s, double at_unix_s, calib_result_t *out);

/* ---- using a calibration ---- */

/* The fit itself, for tests and offline use: buffers' pH, mV and temperature
 * (degC, NaN -> 25) -> slope (% of Nernst) and offset (mV at pH 7). Each
 * buffer is weighted by the Nernst slope at its own temperature, so buffers
 * read at different temperatures still give the electrode's true slope; at
 * one temperature it is the ordinary straight line of mV against pH.
 * Returns 0, or -1 when fewer than 2 points or all at one pH. */
int calib_fit(const double *ph, const double *mv, const double *temperature_c, int n,
              double *slope_pct, double *offset_mv);

/* pH from mV with the calibration's slope and offset and the Nernst slope at
 * the probe's temperature (temperature compensation; NaN -> 25 degC):
 * pH = 7 - (mV - offset) / (slope_pct/100 * k(T)). NaN without a fit. */
double calib_ph_from_mv(const calib_result_t *c, double mv, double temperature_c);

/* Accepted and not expired at now_unix_s. */
bool calib_is_valid(const calib_result_t *c, double now_unix_s);

/* Why a pH run may not start: fills msg (for a 409) and returns false when c
 * is NULL (never calibrated), rejected, or expired; true when valid. */
bool calib_check_for_run(const calib_result_t *c, const char *station, double now_unix_s, char *msg,
                         size_t cap);

/* JSON of a calibration (docs/api.md): state, next_buffer (or null),
 * slope_pct, offset_mv, temperature_c, slope_mv_per_ph, buffers [{nominal,
 * name, ph, mv, temperature_c, residual_mv}], at, expires_at (RFC 3339 UTC or
 * null), reason (or null). The caller adds "id" and "station". New reference. */
json_t *calib_result_json(const calib_result_t *c);
/* Back from that JSON (as stored). Returns 0, or -1 when fields are missing. */
int calib_result_from_json(const json_t *j, calib_result_t *c);

#endif
