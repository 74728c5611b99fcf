/* store.h: durable storage in one SQLite database (WAL, synchronous=FULL).
 *
 * Tables (schema in store.c, version in schema_version, migrations applied in
 * order at open): methods (every revision's text, sha256), runs (columns for
 * queries plus the run record as JSON), points, endpoints, results, faults,
 * calibrations, titrants (titer), blanks, events.
 *
 * Writers: one connection, used under a mutex by station threads and HTTP
 * handlers, each write one BEGIN IMMEDIATE transaction committed before the
 * call returns (a point is on disk before the next addition is sent).
 * Readers: a small pool of read-only connections for HTTP threads, so reads
 * never wait on the writer (WAL).
 *
 * Result feed: a run gets `seq` in the same transaction that puts it into a
 * final state; seq rises by one each time and is never reused, so a poller
 * asking `after=SEQ` sees every finished run exactly once, across restarts.
 *
 * Read calls return new jansson references (caller decrefs) or NULL when the
 * thing does not exist; *db_err is set when the database failed instead.
 */
#ifndef STOPCOCK_STORE_H
#define STOPCOCK_STORE_H

#include <jansson.h>
#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>

#define STORE_SCHEMA_VERSION 8 /* the number of migrations in store.c */

typedef struct store store_t;

/* Open (create) the database, set WAL/FULL/busy_timeout/foreign_keys, apply
 * migrations. Returns NULL with a message in err. */
store_t *store_open(const char *path, char *err, size_t err_cap);
void store_close(store_t *s);
int store_schema_version(store_t *s);

/* ---- start-up ---- */

/* Runs left `running` by a daemon that stopped become `interrupted` (points
 * kept, seq assigned, stop_reason "interrupted", stop_detail and a fault say
 * why). Their ended_at is the last moment the daemon is known to have held
 * them: the later of its last heartbeat (store_heartbeat) and the run's last
 * point, never after `at`. `held` is called with each such run's station.
 * Queued runs stay queued (store_runs_queued). Returns how many, -1 on error
 * (the caller tries again: docs/operations.md). */
int store_interrupt_stale(store_t *s, const char *at, void (*held)(const char *station, void *arg),
                          void *arg);
/* Runs still `queued`, oldest first: [{"id","station","method_id",
 * "method_revision","sample_id","amount","queued_at","record"}]; NULL on error. */
json_t *store_runs_queued(store_t *s);

/* ---- methods ---- */

typedef enum {
	STORE_OK = 0,
	STORE_ERR = -1, /* database error */
	STORE_NOT_FOUND = 1,
	STORE_CONFLICT = 2,  /* revision not above the stored one / wrong state */
	STORE_UNCHANGED = 3, /* the same revision with the same bytes is already stored */
} store_status_t;

/* The daemon is alive at `at`: kept in the database so that a crash leaves
 * the last moment it held its runs (a few seconds apart, from the main loop). */
store_status_t store_heartbeat(store_t *s, const char *at);
/* The database's history id (32 hex digits): a new one after a restore
 * (docs/lims.md, "After a restore"); in every result-feed reply. */
const char *store_history(const store_t *s);
/* A station to hold at the next start (a run was on it when the daemon was
 * stopped), and the taking of those notes at start: cb for each, then
 * they are gone. */
store_status_t store_hold_note(store_t *s, const char *station, const char *reason);
int store_hold_notes_take(store_t *s,
                          void (*cb)(const char *station, const char *reason, void *arg),
                          void *arg);

/* Store a new revision. STORE_CONFLICT (with *stored_rev) when revision is
 * not above the stored one, except STORE_UNCHANGED for identical text at the
 * stored revision (a reload of an unchanged file). `source` is "file" or "api". */
store_status_t store_method_put(store_t *s, const char *id, long revision, const char *sha256,
                                const char *text, size_t len, const char *source, long *stored_rev);

/* Latest revision's text (malloc'd), revision and sha256. */
/* One stored revision (want > 0), or the latest (want 0). */
store_status_t store_method_revision(store_t *s, const char *id, long want, char **text,
                                     size_t *len, long *revision, char sha256[65]);
store_status_t store_method_latest(store_t *s, const char *id, char **text, size_t *len,
                                   long *revision, char sha256[65]);
json_t *store_method_json(store_t *s, const char *id, bool *db_err); /* latest, with text */
json_t *store_methods_list(store_t *s, bool *db_err);

/* ---- runs ---- */

typedef struct store_run_new {
	const char *station;
	const char *method_id;
	long method_revision;
	const char *method_sha256;
	const char *sample_id;
	double amount;
	const char *unit;   /* "mL" or "g" */
	const char *signal; /* "ph" or "mv": the curve's unit */
	const char *queued_at;
	const char *record_json; /* the initial record; may be NULL */
	int position;            /* rack position of the sample; 0: none (NULL) */
} store_run_new_t;

int64_t store_run_create(store_t *s, const store_run_new_t *r); /* id, or -1 */
/* Remove a run that was never queued (a refused request): no run and no seq
 * remain of it. Only a `queued` run without a seq is removed. */
store_status_t store_run_discard(store_t *s, int64_t id);

/* Replace the run's record and its query columns (state, phase may be NULL). */
store_status_t store_run_update(store_t *s, int64_t id, const char *state, const char *phase,
                                const char *record_json);

typedef struct store_point {
	double t_s;       /* since run start */
	double volume_ml; /* total dispensed */
	double mv;
	bool has_ph;
	double ph;
	bool has_temperature;
	double temperature_c;
	bool settled;
	bool has_dpdv;
	double dpdv; /* signal units per mL */
} store_point_t;

/* Append point number n (0-based) and, in the same transaction, the updated
 * record. Committed (fsync'd) when it returns STORE_OK. */
store_status_t store_point_add(store_t *s, int64_t run_id, int n, const store_point_t *p,
                               const char *record_json);

/* Replace points 0..n-1 of a run in one transaction (the final, smoothed
 * derivatives when a run ends). */
store_status_t store_points_rewrite(store_t *s, int64_t run_id, const store_point_t *p, int n);

/* Final state: state, stop_reason, record, endpoints/results rows from the
 * record, and the next seq, in one transaction. STORE_CONFLICT if the run is
 * already final. *seq_out may be NULL. */
store_status_t store_run_finish(store_t *s, int64_t id, const char *state, const char *record_json,
                                int64_t *seq_out);

/* A change to a final run's record after the fact (a review, a corrected
 * version of the results; docs/lims.md, "Review and corrections"). In one
 * transaction under the writer's lock: fn gets the stored record (without
 * seq) and changes it in place, or refuses (STORE_CONFLICT, its reason in
 * its own arg); then the record is stored, the run gets a new seq (it
 * enters the result feed again), its results rows follow when
 * ev->results_changed, and ev's audit event is chained. STORE_NOT_FOUND;
 * STORE_CONFLICT without calling fn for a run that has not ended. */
typedef struct store_revise {
	const char *at, *kind, *code, *actor; /* the audit event fn fills in */
	char message[512];
	bool results_changed;
} store_revise_t;
typedef store_status_t (*store_revise_fn)(json_t *record, void *arg, store_revise_t *ev);
store_status_t store_run_revise(store_t *s, int64_t id, store_revise_fn fn, void *arg,
                                int64_t *seq_out);

/* An audit-trail or fault row (at NULL: now; run_id 0 when none; station,
 * code, message may be NULL). actor: who did it: the write token's name, "daemon" for what
 * the daemon did by itself, "signal" for a reload by SIGHUP. */
store_status_t store_event_add(store_t *s, const char *at, const char *station, int64_t run_id,
                               const char *kind, const char *code, const char *message,
                               const char *actor);
/* Events with id > after, oldest first, at most limit:
 * {"events":[{id, at, kind, code, station, run_id, actor, message}],
 *  "next_after": last id (after when none)}. NULL on a database error. */
json_t *store_events_after(store_t *s, int64_t after, int limit, bool *db_err);

/* Check the audit trail's hash chain (store_chain.c) from its first event:
 * {"ok", "checked": rows read, "head": {id, hash} of the last good row or
 * null, "first_broken": {id, at, kind, why} or null}. NULL on a database
 * error. Reads on a connection of its own. */
json_t *store_events_verify(store_t *s, bool *db_err);

/* The stored record with "seq" (null until final), NULL when unknown. */
json_t *store_run_json(store_t *s, int64_t id, bool *db_err);
/* State word of a run into out; STORE_NOT_FOUND when unknown. */
store_status_t store_run_state(store_t *s, int64_t id, char *out, size_t cap, char *station,
                               size_t station_cap);
/* The method's signal word of a run ("ph"/"mv") into out. */
store_status_t store_run_signal(store_t *s, int64_t id, char *out, size_t cap);
/* Points as a JSON array of point objects (docs/api.md fields). */
json_t *store_points_json(store_t *s, int64_t id, bool *db_err);
/* Points as CSV text (malloc'd): header t_s,volume_ml,mv,ph,temperature_c,settled,dpdv.
 * NULL with *db_err set on a database error or out of memory (never a short table). */
char *store_points_csv(store_t *s, int64_t id, bool *db_err);
/* {"results":[records with seq], "next_after":SEQ}. */
json_t *store_results_after(store_t *s, int64_t after, int limit, bool *db_err);
/* Runs newest first for GET /v1/runs (store_list.c): each row is the record's
 * id, station, method, sample, state, phase, times, endpoints, results,
 * additions, dispensed_ml, stop_reason and seq. NULL or "" filters match
 * every run; since/until compare queued_at (RFC 3339 UTC prefixes work:
 * "2026-12-01"); before_id > 0 pages back; limit 1..1000 (else 100). */
typedef struct store_runs_filter {
	const char *station, *state, *since, *until;
	int64_t before_id;
	int limit;
} store_runs_filter_t;
json_t *store_runs_list(store_t *s, const store_runs_filter_t *f, bool *db_err);
/* Counts of runs by state, for /metrics: fills n[i] for states[i]. */
int store_run_counts(store_t *s, const char *const *states, long *n, int n_states);

/* ---- titrants, blanks ---- */

/* Where a stored titer or blank came from: when, and the run that measured
 * it (0 when none). */
typedef struct store_source {
	char at[32];
	int64_t run_id;
	/* a titer entered by hand (store_titrant_enter): its validity, days
	 * (NaN: the config's records.titer_valid_days), why and by whom ("" for
	 * a standardization's) */
	double valid_days;
	char reason[512];
	char by[64];
} store_source_t;

/* src may be NULL. */
store_status_t store_titrant_get(store_t *s, const char *name, double *titer, store_source_t *src);
/* replicates_json: the standardization statistics that gave the titer (JSON
 * text, stored as given), or NULL. */
store_status_t store_titrant_set(store_t *s, const char *name, double molarity, double titer,
                                 const char *at, int64_t run_id, const char *replicates_json);
/* A titer entered by hand (a certified titrant; docs/api.md, "POST
 * /v1/titrants"): replaces the stored one, with its validity (days), reason
 * and who; molarity <= 0 keeps the stored molarity (STORE_NOT_FOUND when
 * there is none). The audit event is chained in the same transaction. */
store_status_t store_titrant_enter(store_t *s, const char *name, double molarity, double titer,
                                   const char *at, double valid_days, const char *reason,
                                   const char *by);
/* {"titrants":[{name, molarity, titer, at, run_id, standardization,
 * valid_days, source, reason, by}]} by name. */
json_t *store_titrants_json(store_t *s, bool *db_err);
store_status_t store_blank_get(store_t *s, const char *method_id, double *blank_ml,
                               store_source_t *src);
store_status_t store_blank_set(store_t *s, const char *method_id, double blank_ml, const char *at,
                               int64_t run_id);

/* ---- calibrations ---- */

/* The calibration as JSON is stored whole (its fields are calib's business);
 * the columns station, state, at, expires_at make "latest valid" a query. */
int64_t store_calib_create(store_t *s, const char *station, const char *record_json);
store_status_t store_calib_update(store_t *s, int64_t id, const char *state, const char *at,
                                  const char *expires_at, const char *record_json);
json_t *store_calib_json(store_t *s, int64_t id, bool *db_err);
/* Latest calibration of a station (any state) or, with accepted_only, the
 * latest accepted one not expired at `now` (RFC 3339). */
json_t *store_calib_latest(store_t *s, const char *station, bool accepted_only, const char *now,
                           bool *db_err);

/* ---- the MQTT outbox (docs/mqtt.md, "Outbox") ----
 * While enabled, every run or series that becomes final and every event gets a row,
 * in the same transaction (triggers of the schema); the publisher sends the
 * rows oldest first and removes each once the broker has acknowledged it. */

/* On: the triggers add rows from now on; off: they add none (the default). */
store_status_t store_outbox_enable(store_t *s, bool on);
typedef struct store_outbox_msg {
	int64_t id;     /* the row, rising in commit order */
	bool is_result; /* a run's final record (ref: run id), else an event (ref: event id) */
	bool is_series; /* a finished series (ref: series id) */
	int64_t ref;
} store_outbox_msg_t;
/* Up to max rows with id > after_id, oldest first; how many, -1 on error. */
int store_outbox_peek(store_t *s, int64_t after_id, store_outbox_msg_t *out, int max);
/* Remove the rows the broker acknowledged, in one transaction. */
store_status_t store_outbox_remove(store_t *s, const int64_t *ids, int n);
/* The policy: rows older than max_age_s, then the oldest beyond the newest
 * max_messages, are dropped. Returns how many, -1 on error. */
long store_outbox_prune(store_t *s, long max_messages, double max_age_s, double now_s);
/* Rows waiting and the age of the oldest, s (0 when none); 0 or -1. */
int store_outbox_stats(store_t *s, long *count, double *oldest_age_s, double now_s);
/* ---- series (store_series.c; docs/api.md, "Series") ----
 *
 * A series is one row: station, state, times and its record as JSON (the
 * series service's business). Finishing one (any final state) gives it the
 * next series seq in the same transaction: GET /v1/series/feed?after=SEQ sees
 * every final series once, in order, across restarts, as the run feed does. */
int64_t store_series_create(store_t *s, const char *station, const char *created_at,
                            const char *record_json); /* id, or -1 */
/* Replace the record of a series that is not final (state may be NULL). */
store_status_t store_series_update(store_t *s, int64_t id, const char *state,
                                   const char *record_json);
/* Final state, ended_at, record and the next seq, in one transaction.
 * STORE_CONFLICT when it is already final. */
store_status_t store_series_finish(store_t *s, int64_t id, const char *state, const char *ended_at,
                                   const char *record_json, int64_t *seq_out);
/* The record with "seq" (null until final); NULL when unknown. */
json_t *store_series_json(store_t *s, int64_t id, bool *db_err);
/* Newest first, at most limit: {"series": [records]}. */
json_t *store_series_list(store_t *s, int limit, bool *db_err);
/* Final series with seq > after, oldest first: {"series": [records],
 * "next_after": SEQ, "history": id}. */
json_t *store_series_after(store_t *s, int64_t after, int limit, bool *db_err);
/* Ids of the series still `queued` or `running`, oldest first (a JSON array
 * of integers); NULL on error. */
json_t *store_series_open(store_t *s);

#endif
