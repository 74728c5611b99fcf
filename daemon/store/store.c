/* store.c: see store.h. Write paths; read paths are in store_read.c. */
#include "store.h"
#include "store_priv.h"
#include "log.h"
#include "timefmt.h"
#include "clock.h"

#include <math.h>
#include <pthread.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

/* Each migration takes the schema from version i to i+1; never edit one that
 * has shipped, append a new one. */
static const char *const migrations[] = {
    /* 0 -> 1 */
    "CREATE TABLE methods ("
    "  id TEXT NOT NULL, revision INTEGER NOT NULL, sha256 TEXT NOT NULL,"
    "  text TEXT NOT NULL, source TEXT NOT NULL, stored_at TEXT NOT NULL,"
    "  PRIMARY KEY (id, revision));"
    "CREATE TABLE runs ("
    "  id INTEGER PRIMARY KEY AUTOINCREMENT, station TEXT NOT NULL,"
    "  method_id TEXT NOT NULL, method_revision INTEGER NOT NULL, method_sha256 TEXT NOT NULL,"
    "  sample_id TEXT NOT NULL, amount REAL NOT NULL, unit TEXT NOT NULL, signal TEXT,"
    "  state TEXT NOT NULL, phase TEXT, queued_at TEXT NOT NULL, started_at TEXT,"
    "  ended_at TEXT, stop_reason TEXT, seq INTEGER UNIQUE, record TEXT);"
    "CREATE INDEX runs_state ON runs(state);"
    "CREATE TABLE points ("
    "  run_id INTEGER NOT NULL REFERENCES runs(id), n INTEGER NOT NULL, t_s REAL NOT NULL,"
    "  volume_ml REAL NOT NULL, mv REAL NOT NULL, ph REAL, temperature_c REAL,"
    "  settled INTEGER NOT NULL, dpdv REAL, PRIMARY KEY (run_id, n));"
    "CREATE TABLE endpoints ("
    "  run_id INTEGER NOT NULL REFERENCES runs(id), n INTEGER NOT NULL,"
    "  volume_ml REAL, u_volume_ml REAL, ph REAL, mv REAL, half_ph REAL, how TEXT,"
    "  PRIMARY KEY (run_id, n));"
    "CREATE TABLE results ("
    "  run_id INTEGER NOT NULL REFERENCES runs(id), name TEXT NOT NULL, value REAL,"
    "  unit TEXT, accept TEXT, PRIMARY KEY (run_id, name));"
    "CREATE TABLE events ("
    "  id INTEGER PRIMARY KEY AUTOINCREMENT, at TEXT NOT NULL, station TEXT,"
    "  run_id INTEGER, kind TEXT NOT NULL, code TEXT, message TEXT);"
    "CREATE TABLE calibrations ("
    "  id INTEGER PRIMARY KEY AUTOINCREMENT, station TEXT NOT NULL, state TEXT NOT NULL,"
    "  at TEXT, expires_at TEXT, record TEXT NOT NULL);"
    "CREATE TABLE titrants ("
    "  name TEXT PRIMARY KEY, molarity REAL NOT NULL, titer REAL NOT NULL,"
    "  at TEXT NOT NULL, run_id INTEGER);"
    "CREATE TABLE blanks ("
    "  method_id TEXT PRIMARY KEY, volume_ml REAL NOT NULL, at TEXT NOT NULL,"
    "  run_id INTEGER);",
    /* 1 -> 2: the audit trail names who did it (a token's name, "daemon",
     * "signal"); titrants keep the replicate statistics of their titer. */
    ("ALTER TABLE events ADD COLUMN actor TEXT;"
     "ALTER TABLE titrants ADD COLUMN replicates TEXT;"),
    /* 2 -> 3: the daemon's heartbeat, for the end time of a run a crash cut. */
    "CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);",
    /* 3 -> 4: the MQTT outbox (docs/mqtt.md, "Outbox"): what is still to
     * be published. Triggers add a row in the very transaction that gives a
     * run its seq or adds an event, so nothing final escapes it; they add
     * nothing unless the daemon has an mqtt: section (meta outbox=on).
     * A row names its run or event; the payload is read when it is sent. */
    ("CREATE TABLE outbox (id INTEGER PRIMARY KEY AUTOINCREMENT, kind TEXT NOT NULL,"
     "  ref INTEGER NOT NULL, at_s INTEGER NOT NULL);"
     "CREATE TRIGGER outbox_result AFTER UPDATE OF seq ON runs"
     "  WHEN NEW.seq IS NOT NULL AND OLD.seq IS NULL"
     "  AND (SELECT value FROM meta WHERE key='outbox') = 'on'"
     "  BEGIN INSERT INTO outbox (kind, ref, at_s)"
     "  VALUES ('result', NEW.id, CAST(strftime('%s','now') AS INTEGER)); END;"
     "CREATE TRIGGER outbox_event AFTER INSERT ON events"
     "  WHEN (SELECT value FROM meta WHERE key='outbox') = 'on'"
     "  BEGIN INSERT INTO outbox (kind, ref, at_s)"
     "  VALUES ('event', NEW.id, CAST(strftime('%s','now') AS INTEGER)); END;"),
    /* 4 -> 5: runs at a sample changer's position */
    "ALTER TABLE runs ADD COLUMN position INTEGER;",
    /* 5 -> 6: records: the audit trail is a hash chain
     * (store_chain.c); the rows from before are chained once, at the first
     * open after this migration (store_chain_backfill). Titers entered by
     * hand keep their validity, reason and author. */
    ("ALTER TABLE events ADD COLUMN hash TEXT;"
     "INSERT OR REPLACE INTO meta (key, value) VALUES ('events_chain', 'pending');"
     /* a titer entered by hand: its validity (days), reason and author */
     "ALTER TABLE titrants ADD COLUMN valid_days REAL;"
     "ALTER TABLE titrants ADD COLUMN reason TEXT;"
     "ALTER TABLE titrants ADD COLUMN set_by TEXT;"
     /* a review or a correction gives a run a new seq (docs/lims.md): the
      * broker hears of it as the feed does */
     "DROP TRIGGER outbox_result;"
     "CREATE TRIGGER outbox_result AFTER UPDATE OF seq ON runs"
     "  WHEN NEW.seq IS NOT NULL AND NEW.seq IS NOT OLD.seq"
     "  AND (SELECT value FROM meta WHERE key='outbox') = 'on'"
     "  BEGIN INSERT INTO outbox (kind, ref, at_s)"
     "  VALUES ('result', NEW.id, CAST(strftime('%s','now') AS INTEGER)); END;"),
    /* 6 -> 7: series (store_series.c): a work list of samples for one station,
     * its record as JSON; seq for the finished-series feed. */
    ("CREATE TABLE series ("
     "  id INTEGER PRIMARY KEY AUTOINCREMENT, station TEXT NOT NULL, state TEXT NOT NULL,"
     "  created_at TEXT NOT NULL, ended_at TEXT, seq INTEGER UNIQUE, record TEXT NOT NULL);"
     "CREATE INDEX series_state ON series(state);"),
    /* 7 -> 8: finished series on the broker (docs/mqtt.md): the series seq
     * adds an outbox row in its own transaction, as a run's seq does. */
    ("CREATE TRIGGER outbox_series AFTER UPDATE OF seq ON series"
     "  WHEN NEW.seq IS NOT NULL AND OLD.seq IS NULL"
     "  AND (SELECT value FROM meta WHERE key='outbox') = 'on'"
     "  BEGIN INSERT INTO outbox (kind, ref, at_s)"
     "  VALUES ('series', NEW.id, CAST(strftime('%s','now') AS INTEGER)); END;"),
};

#define N_MIGRATIONS ((int)(sizeof migrations / sizeof migrations[0]))
_Static_assert(N_MIGRATIONS == STORE_SCHEMA_VERSION, "STORE_SCHEMA_VERSION counts the migrations");

int store_setup_conn(sqlite3 *db)
{
	sqlite3_busy_timeout(db, 5000);
	return sqlite3_exec(db, "PRAGMA synchronous=FULL; PRAGMA foreign_keys=ON;", NULL, NULL,
	                    NULL) == SQLITE_OK
	           ? 0
	           : -1;
}

static int user_version(sqlite3 *db)
{
	sqlite3_stmt *st;
	int v = -1;

	if (sqlite3_prepare_v2(db, "SELECT version FROM schema_version", -1, &st, NULL) !=
	    SQLITE_OK)
		return -1;
	if (sqlite3_step(st) == SQLITE_ROW)
		v = sqlite3_column_int(st, 0);
	sqlite3_finalize(st);
	return v;
}

static int migrate(sqlite3 *db, char *err, size_t cap)
{
	int v;
	char *msg = NULL;

	if (sqlite3_exec(db,
	                 "BEGIN IMMEDIATE;"
	                 "CREATE TABLE IF NOT EXISTS schema_version (version INTEGER NOT NULL);"
	                 "INSERT INTO schema_version SELECT 0 WHERE NOT EXISTS "
	                 "(SELECT 1 FROM schema_version);",
	                 NULL, NULL, &msg) != SQLITE_OK)
		goto fail;
	v = user_version(db);
	if (v > N_MIGRATIONS) {
		snprintf(err, cap, "database schema version %d is newer than this daemon's %d", v,
		         N_MIGRATIONS);
		sqlite3_exec(db, "ROLLBACK", NULL, NULL, NULL);
		return -1;
	}
	for (; v >= 0 && v < N_MIGRATIONS; v++) {
		char sql[64];
		if (sqlite3_exec(db, migrations[v], NULL, NULL, &msg) != SQLITE_OK)
			goto fail;
		snprintf(sql, sizeof sql, "UPDATE schema_version SET version=%d", v + 1);
		if (sqlite3_exec(db, sql, NULL, NULL, &msg) != SQLITE_OK)
			goto fail;
	}
	if (sqlite3_exec(db, "COMMIT", NULL, NULL, &msg) != SQLITE_OK)
		goto fail;
	return 0;
fail:
	snprintf(err, cap, "database schema: %s", msg ? msg : sqlite3_errmsg(db));
	sqlite3_free(msg);
	sqlite3_exec(db, "ROLLBACK", NULL, NULL, NULL);
	return -1;
}

/* ---- history: ids and seqs are never issued twice (docs/lims.md) ----
 *
 * Beside the database, PATH.issued holds the history id and the highest run
 * id and seq this daemon ever issued. A database whose marks are below the
 * file's (or whose history is another) went back in time: a restored backup.
 * Then a new history starts, and ids and seqs continue above the file's. */

static int64_t one_int(sqlite3 *db, const char *sql)
{
	sqlite3_stmt *st;
	int64_t v = 0;
	if (sqlite3_prepare_v2(db, sql, -1, &st, NULL) == SQLITE_OK) {
		if (sqlite3_step(st) == SQLITE_ROW)
			v = sqlite3_column_int64(st, 0);
		sqlite3_finalize(st);
	}
	return v;
}

void store_meta_get(sqlite3 *db, const char *key, char *out, size_t cap)
{
	sqlite3_stmt *st;
	out[0] = '\0';
	if (sqlite3_prepare_v2(db, "SELECT value FROM meta WHERE key=?", -1, &st, NULL) !=
	    SQLITE_OK)
		return;
	sqlite3_bind_text(st, 1, key, -1, SQLITE_STATIC);
	if (sqlite3_step(st) == SQLITE_ROW)
		snprintf(out, cap, "%s", (const char *)sqlite3_column_text(st, 0));
	sqlite3_finalize(st);
}

int store_meta_set(sqlite3 *db, const char *key, const char *value)
{
	sqlite3_stmt *st;
	int rc;
	if (sqlite3_prepare_v2(db, "INSERT OR REPLACE INTO meta(key, value) VALUES(?, ?)", -1, &st,
	                       NULL) != SQLITE_OK)
		return -1;
	sqlite3_bind_text(st, 1, key, -1, SQLITE_STATIC);
	sqlite3_bind_text(st, 2, value, -1, SQLITE_STATIC);
	rc = sqlite3_step(st);
	sqlite3_finalize(st);
	return rc == SQLITE_DONE ? 0 : -1;
}

static int new_history(char out[33])
{
	unsigned char b[16];
	FILE *f = fopen("/dev/urandom", "rb");
	size_t n = f ? fread(b, 1, sizeof b, f) : 0;
	if (f)
		fclose(f);
	if (n != sizeof b)
		return -1;
	for (int i = 0; i < 16; i++)
		snprintf(out + 2 * i, 3, "%02x", b[i]);
	return 0;
}

static int64_t db_max_id(store_t *s)
{
	int64_t a = one_int(s->w, "SELECT seq FROM sqlite_sequence WHERE name='runs'");
	int64_t b = one_int(s->w, "SELECT COALESCE(MAX(id),0) FROM runs");
	return a > b ? a : b;
}

static int64_t db_max_seq(store_t *s)
{
	int64_t m = one_int(s->w, "SELECT COALESCE(MAX(seq),0) FROM runs");
	return m > s->seq_floor ? m : s->seq_floor;
}

/* Write PATH.issued (a new file renamed over the old one). Callers hold
 * wlock or are alone (store_open). A refused write keeps the old marks,
 * which are lower: the next write catches up. */
static void issued_write(store_t *s)
{
	char path[1100], tmp[1110];
	FILE *f;

	snprintf(path, sizeof path, "%s.issued", s->path);
	snprintf(tmp, sizeof tmp, "%s.new", path);
	f = fopen(tmp, "w");
	if (!f)
		return;
	fprintf(f, "history %s\nrun_id %lld\nseq %lld\n", s->history, (long long)db_max_id(s),
	        (long long)db_max_seq(s));
	if (fflush(f) == 0 && fsync(fileno(f)) == 0 && fclose(f) == 0)
		rename(tmp, path);
	else
		unlink(tmp);
}

static int history_start(store_t *s, char *err, size_t cap)
{
	char path[1100], fh[64] = "", buf[64];
	long long fid = 0, fseq = 0;
	FILE *f;

	store_meta_get(s->w, "history", s->history, sizeof s->history);
	store_meta_get(s->w, "seq_floor", buf, sizeof buf);
	s->seq_floor = buf[0] ? strtoll(buf, NULL, 10) : 0;
	if (!s->history[0]) {
		if (new_history(s->history) || store_meta_set(s->w, "history", s->history)) {
			snprintf(err, cap, "%s: cannot start the database's history", s->path);
			return -1;
		}
	}
	snprintf(path, sizeof path, "%s.issued", s->path);
	f = fopen(path, "r");
	if (f) {
		if (fscanf(f, "history %32s run_id %lld seq %lld", fh, &fid, &fseq) != 3)
			fh[0] = '\0';
		fclose(f);
	}
	if (fh[0] && (strcmp(fh, s->history) || fid > db_max_id(s) || fseq > db_max_seq(s))) {
		/* The database went back in time, or is another one. */
		char old[33], num[32];
		int64_t id_floor = fid > db_max_id(s) ? fid : db_max_id(s);
		int64_t seq_floor = fseq > db_max_seq(s) ? fseq : db_max_seq(s);
		snprintf(old, sizeof old, "%s", s->history);
		if (new_history(s->history) || store_meta_set(s->w, "history", s->history) ||
		    store_meta_set(s->w, "restored_from", fh)) {
			snprintf(err, cap, "%s: cannot start a new history after a restore",
			         s->path);
			return -1;
		}
		snprintf(num, sizeof num, "%lld", (long long)seq_floor);
		s->seq_floor = seq_floor;
		if (store_meta_set(s->w, "seq_floor", num) ||
		    sqlite3_exec(
		        s->w, "INSERT OR IGNORE INTO sqlite_sequence(name, seq) VALUES('runs', 0)",
		        NULL, NULL, NULL) != SQLITE_OK) {
			snprintf(err, cap, "%s: cannot keep run ids above the lost history's",
			         s->path);
			return -1;
		}
		sqlite3_stmt *st;
		if (sqlite3_prepare_v2(s->w, "UPDATE sqlite_sequence SET seq=? WHERE name='runs'",
		                       -1, &st, NULL) != SQLITE_OK) {
			snprintf(err, cap, "%s: cannot keep run ids above the lost history's",
			         s->path);
			return -1;
		}
		sqlite3_bind_int64(st, 1, id_floor);
		sqlite3_step(st);
		sqlite3_finalize(st);
		s->restored_upto = fid;
		log_warn(
		    "%s went back in time (a restored backup?): it had issued run ids up to %lld "
		    "and seqs up to %lld; history %s ends, history %s starts, and ids and seqs "
		    "go on above those (docs/lims.md, \"After a restore\")",
		    s->path, fid, fseq, old, s->history);
	}
	issued_write(s);
	return 0;
}

const char *store_history(const store_t *s)
{
	return s->history;
}

store_t *store_open(const char *path, char *err, size_t err_cap)
{
	store_t *s = calloc(1, sizeof *s);
	char *msg = NULL;

	if (!s) {
		snprintf(err, err_cap, "out of memory");
		return NULL;
	}
	snprintf(s->path, sizeof s->path, "%s", path);
	pthread_mutex_init(&s->wlock, NULL);
	pthread_mutex_init(&s->rlock, NULL);
	if (sqlite3_open_v2(path, &s->w, SQLITE_OPEN_READWRITE | SQLITE_OPEN_CREATE, NULL) !=
	    SQLITE_OK) {
		snprintf(err, err_cap, "%s: cannot open the database: %s", path,
		         s->w ? sqlite3_errmsg(s->w) : "out of memory");
		store_close(s);
		return NULL;
	}
	/* WAL persists in the file; readers then never block the writer. */
	if (sqlite3_exec(s->w, "PRAGMA journal_mode=WAL;", NULL, NULL, &msg) != SQLITE_OK ||
	    store_setup_conn(s->w)) {
		snprintf(err, err_cap, "%s: %s", path, msg ? msg : sqlite3_errmsg(s->w));
		sqlite3_free(msg);
		store_close(s);
		return NULL;
	}
	if (migrate(s->w, err, err_cap) || history_start(s, err, err_cap)) {
		store_close(s);
		return NULL;
	}
	if (store_chain_backfill(s)) {
		snprintf(err, err_cap, "%s: cannot chain the audit trail's earlier events: %s",
		         path, sqlite3_errmsg(s->w));
		store_close(s);
		return NULL;
	}
	return s;
}

void store_close(store_t *s)
{
	if (!s)
		return;
	for (int i = 0; i < STORE_READERS; i++)
		if (s->r[i])
			sqlite3_close(s->r[i]);
	if (s->w)
		sqlite3_close(s->w);
	pthread_mutex_destroy(&s->wlock);
	pthread_mutex_destroy(&s->rlock);
	free(s);
}

int store_schema_version(store_t *s)
{
	int v;
	pthread_mutex_lock(&s->wlock);
	v = user_version(s->w);
	pthread_mutex_unlock(&s->wlock);
	return v;
}

/* ---- write helpers: callers hold wlock ---- */

static int begin(store_t *s)
{
	return sqlite3_exec(s->w, "BEGIN IMMEDIATE", NULL, NULL, NULL) == SQLITE_OK ? 0 : -1;
}

static int commit(store_t *s)
{
	if (sqlite3_exec(s->w, "COMMIT", NULL, NULL, NULL) == SQLITE_OK)
		return 0;
	sqlite3_exec(s->w, "ROLLBACK", NULL, NULL, NULL);
	return -1;
}

static void rollback(store_t *s)
{
	sqlite3_exec(s->w, "ROLLBACK", NULL, NULL, NULL);
}

static void bind_text(sqlite3_stmt *st, int i, const char *v)
{
	if (v)
		sqlite3_bind_text(st, i, v, -1, SQLITE_TRANSIENT);
	else
		sqlite3_bind_null(st, i);
}

static void bind_opt_double(sqlite3_stmt *st, int i, bool have, double v)
{
	if (have && isfinite(v))
		sqlite3_bind_double(st, i, v);
	else
		sqlite3_bind_null(st, i);
}

/* Run one statement with bound text/double args described by fmt:
 * 't' text, 'd' double, 'i' int64, 'n' null. Returns sqlite step result. */
static int exec_w(store_t *s, const char *sql, const char *fmt, ...)
{
	sqlite3_stmt *st;
	va_list ap;
	int rc;

	if (sqlite3_prepare_v2(s->w, sql, -1, &st, NULL) != SQLITE_OK)
		return SQLITE_ERROR;
	va_start(ap, fmt);
	for (int i = 0; fmt[i]; i++) {
		switch (fmt[i]) {
		case 't':
			bind_text(st, i + 1, va_arg(ap, const char *));
			break;
		case 'd':
			sqlite3_bind_double(st, i + 1, va_arg(ap, double));
			break;
		case 'i':
			sqlite3_bind_int64(st, i + 1, va_arg(ap, int64_t));
			break;
		default:
			sqlite3_bind_null(st, i + 1);
		}
	}
	va_end(ap);
	rc = sqlite3_step(st);
	sqlite3_finalize(st);
	return rc;
}

static int64_t next_seq(store_t *s)
{
	sqlite3_stmt *st;
	int64_t seq = -1;

	if (sqlite3_prepare_v2(s->w, "SELECT MAX(COALESCE(MAX(seq),0), ?)+1 FROM runs", -1, &st,
	                       NULL) != SQLITE_OK)
		return -1;
	sqlite3_bind_int64(st, 1, s->seq_floor);
	if (sqlite3_step(st) == SQLITE_ROW)
		seq = sqlite3_column_int64(st, 0);
	sqlite3_finalize(st);
	return seq;
}

/* Patch a stored record for a run that will never continue: the state, its
 * end, stop_reason `interrupted` with the words in stop_detail, and a fault. */
static char *patch_record(const char *text, const char *state, const char *at, const char *why)
{
	json_t *j = text ? json_loads(text, 0, NULL) : NULL;
	char *out;

	if (!j || !json_is_object(j)) {
		json_decref(j);
		return NULL;
	}
	json_object_set_new(j, "state", json_string(state));
	json_object_set_new(j, "phase", json_null());
	json_object_set_new(j, "ended_at", json_string(at));
	json_object_set_new(j, "stop_reason", json_string("interrupted"));
	json_object_set_new(j, "stop_detail", json_string(why));
	json_t *faults = json_object_get(j, "faults");
	if (!json_is_array(faults)) {
		faults = json_array();
		json_object_set_new(j, "faults", faults);
	}
	json_array_append_new(
	    faults, json_pack("{s:s,s:s,s:s}", "at", at, "code", "interrupted", "message", why));
	out = json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10));
	json_decref(j);
	return out;
}

/* The last moment the daemon held run `id`: the later of the heartbeat and
 * the run's last point (started_at + t_s), never after `now`; `now` when
 * neither is known. */
static void last_held(store_t *s, int64_t id, const char *started_at, const char *now, char out[32])
{
	double now_s = 0, best = -1, t;
	sqlite3_stmt *st;

	snprintf(out, 32, "%s", now);
	if (!time_parse_rfc3339(now, &now_s))
		return;
	if (sqlite3_prepare_v2(s->w, "SELECT value FROM meta WHERE key='heartbeat_at'", -1, &st,
	                       NULL) == SQLITE_OK) {
		if (sqlite3_step(st) == SQLITE_ROW &&
		    time_parse_rfc3339((const char *)sqlite3_column_text(st, 0), &t))
			best = t;
		sqlite3_finalize(st);
	}
	if (started_at && time_parse_rfc3339(started_at, &t) &&
	    sqlite3_prepare_v2(s->w, "SELECT MAX(t_s) FROM points WHERE run_id=?", -1, &st, NULL) ==
	        SQLITE_OK) {
		sqlite3_bind_int64(st, 1, id);
		if (sqlite3_step(st) == SQLITE_ROW && sqlite3_column_type(st, 0) != SQLITE_NULL)
			t += sqlite3_column_double(st, 0);
		if (t > best)
			best = t;
		sqlite3_finalize(st);
	}
	if (best > 0 && best < now_s)
		time_format_rfc3339(best, out);
}

int store_interrupt_stale(store_t *s, const char *at, void (*held)(const char *station, void *arg),
                          void *arg)
{
	sqlite3_stmt *st = NULL;
	int n = 0;
	const char *why = "the daemon stopped while the run was running (a crash, a power cut or "
	                  "a kill); nothing is known of the beaker after ended_at";
	const char *why_restored =
	    "the database was restored from a backup taken while this run was unfinished; what "
	    "became of it is in the history before the restore (docs/lims.md, \"After a restore\")";

	pthread_mutex_lock(&s->wlock);
	if (begin(s))
		goto fail;
	/* Oldest first, so seq follows the order the runs were queued. */
	if (sqlite3_prepare_v2(s->w,
	                       "SELECT id, station, started_at, record FROM runs WHERE "
	                       "state='running' OR (state='queued' AND id <= ?) ORDER BY id",
	                       -1, &st, NULL) != SQLITE_OK)
		goto fail_tx;
	sqlite3_bind_int64(st, 1, s->restored_upto);
	while (sqlite3_step(st) == SQLITE_ROW) {
		int64_t id = sqlite3_column_int64(st, 0);
		char ended[32];
		/* A run a restored backup left unfinished went on in the lost
		 * history: its end is not known here (the LIMS may hold it). */
		bool restored = id <= s->restored_upto;
		last_held(s, id, (const char *)sqlite3_column_text(st, 2), at, ended);
		char *rec = patch_record((const char *)sqlite3_column_text(st, 3), "interrupted",
		                         ended, restored ? why_restored : why);
		int64_t seq = next_seq(s);
		int rc = exec_w(s,
		                "UPDATE runs SET state='interrupted', phase=NULL, ended_at=?, "
		                "stop_reason='interrupted', seq=?, record=COALESCE(?, record) "
		                "WHERE id=?",
		                "titi", ended, seq, rec, id);
		free(rec);
		if (seq < 0 || rc != SQLITE_DONE)
			goto fail_tx;
		if (held)
			held((const char *)sqlite3_column_text(st, 1), arg);
		/* into the audit trail in the same transaction: the run's end and
		 * its line there are one change */
		if (store_chain_append(s, at, (const char *)sqlite3_column_text(st, 1), id, "run",
		                       "interrupted", restored ? why_restored : why,
		                       "daemon") != SQLITE_DONE)
			goto fail_tx;
		n++;
	}
	sqlite3_finalize(st);
	st = NULL;
	if (commit(s))
		goto fail;
	if (n)
		issued_write(s);
	pthread_mutex_unlock(&s->wlock);
	return n;
fail_tx:
	sqlite3_finalize(st);
	rollback(s);
fail:
	pthread_mutex_unlock(&s->wlock);
	return -1;
}

store_status_t store_heartbeat(store_t *s, const char *at)
{
	int rc;

	pthread_mutex_lock(&s->wlock);
	rc =
	    exec_w(s, "INSERT OR REPLACE INTO meta(key, value) VALUES('heartbeat_at', ?)", "t", at);
	pthread_mutex_unlock(&s->wlock);
	return rc == SQLITE_DONE ? STORE_OK : STORE_ERR;
}

store_status_t store_hold_note(store_t *s, const char *station, const char *reason)
{
	char key[96];
	int rc;

	snprintf(key, sizeof key, "hold:%s", station);
	pthread_mutex_lock(&s->wlock);
	rc = exec_w(s, "INSERT OR REPLACE INTO meta(key, value) VALUES(?, ?)", "tt", key, reason);
	pthread_mutex_unlock(&s->wlock);
	return rc == SQLITE_DONE ? STORE_OK : STORE_ERR;
}

int store_hold_notes_take(store_t *s,
                          void (*cb)(const char *station, const char *reason, void *arg), void *arg)
{
	sqlite3_stmt *st = NULL;
	int n = 0;

	pthread_mutex_lock(&s->wlock);
	if (sqlite3_prepare_v2(s->w,
	                       "SELECT substr(key, 6), value FROM meta WHERE key LIKE 'hold:%'", -1,
	                       &st, NULL) != SQLITE_OK) {
		pthread_mutex_unlock(&s->wlock);
		return -1;
	}
	while (sqlite3_step(st) == SQLITE_ROW) {
		cb((const char *)sqlite3_column_text(st, 0),
		   (const char *)sqlite3_column_text(st, 1), arg);
		n++;
	}
	sqlite3_finalize(st);
	/* Taken: a later start holds only for its own reasons. A refused delete
	 * holds once more at the next start, the safe side. */
	exec_w(s, "DELETE FROM meta WHERE key LIKE 'hold:%'", "");
	pthread_mutex_unlock(&s->wlock);
	return n;
}

json_t *store_runs_queued(store_t *s)
{
	sqlite3_stmt *st = NULL;
	json_t *list = json_array();

	pthread_mutex_lock(&s->wlock);
	if (!list ||
	    sqlite3_prepare_v2(s->w,
	                       "SELECT id, station, method_id, method_revision, sample_id, "
	                       "amount, queued_at, record FROM runs WHERE state='queued' "
	                       "ORDER BY id",
	                       -1, &st, NULL) != SQLITE_OK) {
		pthread_mutex_unlock(&s->wlock);
		json_decref(list);
		return NULL;
	}
	while (sqlite3_step(st) == SQLITE_ROW) {
		const char *rec = (const char *)sqlite3_column_text(st, 7);
		json_array_append_new(
		    list,
		    json_pack("{s:I,s:s,s:s,s:I,s:s,s:f,s:s,s:s}", "id",
		              (json_int_t)sqlite3_column_int64(st, 0), "station",
		              (const char *)sqlite3_column_text(st, 1), "method_id",
		              (const char *)sqlite3_column_text(st, 2), "method_revision",
		              (json_int_t)sqlite3_column_int64(st, 3), "sample_id",
		              (const char *)sqlite3_column_text(st, 4), "amount",
		              sqlite3_column_double(st, 5), "queued_at",
		              (const char *)sqlite3_column_text(st, 6), "record", rec ? rec : ""));
	}
	sqlite3_finalize(st);
	pthread_mutex_unlock(&s->wlock);
	return list;
}

/* ---- methods ---- */

store_status_t store_method_put(store_t *s, const char *id, long revision, const char *sha256,
                                const char *text, size_t len, const char *source, long *stored_rev)
{
	sqlite3_stmt *st = NULL;
	store_status_t ret = STORE_ERR;
	char at[32];
	long cur = 0;
	bool same = false;

	time_format_rfc3339(clock_wall_s(), at);
	pthread_mutex_lock(&s->wlock);
	if (begin(s))
		goto out_unlock;
	if (sqlite3_prepare_v2(s->w,
	                       "SELECT revision, sha256 FROM methods WHERE id=? "
	                       "ORDER BY revision DESC LIMIT 1",
	                       -1, &st, NULL) != SQLITE_OK)
		goto out_tx;
	bind_text(st, 1, id);
	if (sqlite3_step(st) == SQLITE_ROW) {
		const char *h = (const char *)sqlite3_column_text(st, 1);
		cur = sqlite3_column_int(st, 0);
		same = h && !strcmp(h, sha256);
	}
	sqlite3_finalize(st);
	st = NULL;
	if (stored_rev)
		*stored_rev = cur;
	if (cur && revision <= cur) {
		ret = (revision == cur && same) ? STORE_UNCHANGED : STORE_CONFLICT;
		goto out_tx;
	}
	if (sqlite3_prepare_v2(
	        s->w,
	        "INSERT INTO methods (id, revision, sha256, text, source, stored_at) "
	        "VALUES (?,?,?,?,?,?)",
	        -1, &st, NULL) != SQLITE_OK)
		goto out_tx;
	bind_text(st, 1, id);
	sqlite3_bind_int64(st, 2, revision);
	bind_text(st, 3, sha256);
	sqlite3_bind_text(st, 4, text, (int)len, SQLITE_TRANSIENT);
	bind_text(st, 5, source);
	bind_text(st, 6, at);
	if (sqlite3_step(st) != SQLITE_DONE)
		goto out_tx;
	sqlite3_finalize(st);
	st = NULL;
	if (commit(s) == 0) {
		ret = STORE_OK;
		if (stored_rev)
			*stored_rev = revision;
	}
	goto out_unlock;
out_tx:
	sqlite3_finalize(st);
	rollback(s);
out_unlock:
	pthread_mutex_unlock(&s->wlock);
	return ret;
}

/* ---- runs ---- */

store_status_t store_run_discard(store_t *s, int64_t id)
{
	int rc;

	pthread_mutex_lock(&s->wlock);
	rc = exec_w(s, "DELETE FROM runs WHERE id=? AND state='queued' AND seq IS NULL", "i", id);
	pthread_mutex_unlock(&s->wlock);
	return rc == SQLITE_DONE && sqlite3_changes(s->w) == 1 ? STORE_OK : STORE_ERR;
}

int64_t store_run_create(store_t *s, const store_run_new_t *r)
{
	int64_t id = -1;

	pthread_mutex_lock(&s->wlock);
	if (exec_w(
	        s,
	        "INSERT INTO runs (station, method_id, method_revision, method_sha256, sample_id,"
	        " amount, unit, signal, state, queued_at, record, position)"
	        " VALUES (?,?,?,?,?,?,?,?,'queued',?,?,?)",
	        r->position > 0 ? "ttittdtttti" : "ttittdttttn", r->station, r->method_id,
	        (int64_t)r->method_revision, r->method_sha256, r->sample_id, r->amount, r->unit,
	        r->signal, r->queued_at, r->record_json, (int64_t)r->position) == SQLITE_DONE) {
		id = sqlite3_last_insert_rowid(s->w);
		issued_write(s);
	}
	pthread_mutex_unlock(&s->wlock);
	return id;
}

/* Pull started_at/ended_at/stop_reason out of a record for the columns. */
static void record_fields(const char *record_json, json_t **j, const char **started,
                          const char **ended, const char **reason)
{
	*j = record_json ? json_loads(record_json, 0, NULL) : NULL;
	*started = json_string_value(json_object_get(*j, "started_at"));
	*ended = json_string_value(json_object_get(*j, "ended_at"));
	*reason = json_string_value(json_object_get(*j, "stop_reason"));
}

store_status_t store_run_update(store_t *s, int64_t id, const char *state, const char *phase,
                                const char *record_json)
{
	json_t *j;
	const char *started, *ended, *reason;
	int rc;

	record_fields(record_json, &j, &started, &ended, &reason);
	pthread_mutex_lock(&s->wlock);
	rc = exec_w(s,
	            "UPDATE runs SET state=COALESCE(?,state), phase=?, "
	            "started_at=COALESCE(?,started_at), record=COALESCE(?,record) "
	            "WHERE id=? AND seq IS NULL",
	            "tttti", state, phase, started, record_json, id);
	pthread_mutex_unlock(&s->wlock);
	json_decref(j);
	if (rc != SQLITE_DONE)
		return STORE_ERR;
	return STORE_OK;
}

static int insert_point(store_t *s, int64_t run_id, int n, const store_point_t *p)
{
	sqlite3_stmt *st;
	int rc;

	if (sqlite3_prepare_v2(s->w,
	                       "INSERT OR REPLACE INTO points (run_id, n, t_s, volume_ml, mv, ph,"
	                       " temperature_c, settled, dpdv) VALUES (?,?,?,?,?,?,?,?,?)",
	                       -1, &st, NULL) != SQLITE_OK)
		return -1;
	sqlite3_bind_int64(st, 1, run_id);
	sqlite3_bind_int(st, 2, n);
	sqlite3_bind_double(st, 3, p->t_s);
	sqlite3_bind_double(st, 4, p->volume_ml);
	sqlite3_bind_double(st, 5, isfinite(p->mv) ? p->mv : 0.0);
	bind_opt_double(st, 6, p->has_ph, p->ph);
	bind_opt_double(st, 7, p->has_temperature, p->temperature_c);
	sqlite3_bind_int(st, 8, p->settled);
	bind_opt_double(st, 9, p->has_dpdv, p->dpdv);
	rc = sqlite3_step(st);
	sqlite3_finalize(st);
	return rc == SQLITE_DONE ? 0 : -1;
}

store_status_t store_points_rewrite(store_t *s, int64_t run_id, const store_point_t *p, int n)
{
	store_status_t ret = STORE_ERR;

	pthread_mutex_lock(&s->wlock);
	if (begin(s))
		goto out;
	for (int i = 0; i < n; i++)
		if (insert_point(s, run_id, i, &p[i])) {
			rollback(s);
			goto out;
		}
	if (commit(s) == 0)
		ret = STORE_OK;
out:
	pthread_mutex_unlock(&s->wlock);
	return ret;
}

store_status_t store_point_add(store_t *s, int64_t run_id, int n, const store_point_t *p,
                               const char *record_json)
{
	store_status_t ret = STORE_ERR;

	pthread_mutex_lock(&s->wlock);
	if (begin(s))
		goto out;
	if (insert_point(s, run_id, n, p) ||
	    (record_json && exec_w(s, "UPDATE runs SET record=? WHERE id=? AND seq IS NULL", "ti",
	                           record_json, run_id) != SQLITE_DONE)) {
		rollback(s);
		goto out;
	}
	if (commit(s) == 0)
		ret = STORE_OK;
out:
	pthread_mutex_unlock(&s->wlock);
	return ret;
}

static double jnum(const json_t *o, const char *k, bool *have)
{
	const json_t *v = json_object_get(o, k);
	*have = json_is_number(v);
	return *have ? json_number_value(v) : 0.0;
}

/* Endpoint and result rows, for queries outside the daemon (sqlite3 CLI). */
static int write_outcome_rows(store_t *s, int64_t id, json_t *rec)
{
	json_t *v;
	size_t i;

	if (exec_w(s, "DELETE FROM endpoints WHERE run_id=?", "i", id) != SQLITE_DONE ||
	    exec_w(s, "DELETE FROM results WHERE run_id=?", "i", id) != SQLITE_DONE)
		return -1;
	json_array_foreach(json_object_get(rec, "endpoints"), i, v)
	{
		sqlite3_stmt *st;
		bool h;
		double x;
		if (sqlite3_prepare_v2(
		        s->w,
		        "INSERT OR REPLACE INTO endpoints (run_id, n, volume_ml, "
		        "u_volume_ml, ph, mv, half_ph, how) VALUES (?,?,?,?,?,?,?,?)",
		        -1, &st, NULL) != SQLITE_OK)
			return -1;
		sqlite3_bind_int64(st, 1, id);
		sqlite3_bind_int64(st, 2, json_integer_value(json_object_get(v, "n")));
		x = jnum(v, "volume_ml", &h);
		bind_opt_double(st, 3, h, x);
		x = jnum(v, "u_volume_ml", &h);
		bind_opt_double(st, 4, h, x);
		x = jnum(v, "ph", &h);
		bind_opt_double(st, 5, h, x);
		x = jnum(v, "mv", &h);
		bind_opt_double(st, 6, h, x);
		x = jnum(v, "half_ph", &h);
		bind_opt_double(st, 7, h, x);
		bind_text(st, 8, json_string_value(json_object_get(v, "how")));
		if (sqlite3_step(st) != SQLITE_DONE) {
			sqlite3_finalize(st);
			return -1;
		}
		sqlite3_finalize(st);
	}
	json_array_foreach(json_object_get(rec, "results"), i, v)
	{
		sqlite3_stmt *st;
		bool h;
		double x;
		const char *name = json_string_value(json_object_get(v, "name"));
		if (!name)
			continue;
		if (sqlite3_prepare_v2(s->w,
		                       "INSERT OR REPLACE INTO results (run_id, name, value, unit, "
		                       "accept) VALUES (?,?,?,?,?)",
		                       -1, &st, NULL) != SQLITE_OK)
			return -1;
		sqlite3_bind_int64(st, 1, id);
		bind_text(st, 2, name);
		x = jnum(v, "value", &h);
		bind_opt_double(st, 3, h, x);
		bind_text(st, 4, json_string_value(json_object_get(v, "unit")));
		bind_text(st, 5, json_string_value(json_object_get(v, "accept")));
		if (sqlite3_step(st) != SQLITE_DONE) {
			sqlite3_finalize(st);
			return -1;
		}
		sqlite3_finalize(st);
	}
	return 0;
}

store_status_t store_run_finish(store_t *s, int64_t id, const char *state, const char *record_json,
                                int64_t *seq_out)
{
	json_t *j;
	const char *started, *ended, *reason;
	store_status_t ret = STORE_ERR;
	sqlite3_stmt *st = NULL;
	int64_t seq;
	bool final = false, found = false;

	record_fields(record_json, &j, &started, &ended, &reason);
	pthread_mutex_lock(&s->wlock);
	if (begin(s))
		goto out;
	if (sqlite3_prepare_v2(s->w, "SELECT seq IS NOT NULL FROM runs WHERE id=?", -1, &st,
	                       NULL) != SQLITE_OK)
		goto out_tx;
	sqlite3_bind_int64(st, 1, id);
	if (sqlite3_step(st) == SQLITE_ROW) {
		found = true;
		final = sqlite3_column_int(st, 0) != 0;
	}
	sqlite3_finalize(st);
	if (!found || final) {
		ret = found ? STORE_CONFLICT : STORE_NOT_FOUND;
		goto out_tx;
	}
	seq = next_seq(s);
	if (seq < 0 ||
	    exec_w(s,
	           "UPDATE runs SET state=?, phase=NULL, started_at=COALESCE(?,"
	           "started_at), ended_at=?, stop_reason=?, seq=?, "
	           "record=COALESCE(?,record) WHERE id=?",
	           "ttttiti", state, started, ended, reason, seq, record_json, id) != SQLITE_DONE)
		goto out_tx;
	if (j && write_outcome_rows(s, id, j))
		goto out_tx;
	if (commit(s) == 0) {
		ret = STORE_OK;
		if (seq_out)
			*seq_out = seq;
		issued_write(s);
	}
	goto out;
out_tx:
	rollback(s);
out:
	pthread_mutex_unlock(&s->wlock);
	json_decref(j);
	return ret;
}

store_status_t store_run_revise(store_t *s, int64_t id, store_revise_fn fn, void *arg,
                                int64_t *seq_out)
{
	store_revise_t ev;
	store_status_t ret = STORE_ERR;
	sqlite3_stmt *st = NULL;
	json_t *rec = NULL;
	char *text = NULL, station[64] = "";
	int64_t seq;
	bool final = false, found = false;

	memset(&ev, 0, sizeof ev);
	pthread_mutex_lock(&s->wlock);
	if (begin(s))
		goto out;
	if (sqlite3_prepare_v2(s->w, "SELECT seq IS NOT NULL, record, station FROM runs WHERE id=?",
	                       -1, &st, NULL) != SQLITE_OK)
		goto out_tx;
	sqlite3_bind_int64(st, 1, id);
	if (sqlite3_step(st) == SQLITE_ROW) {
		const char *r = (const char *)sqlite3_column_text(st, 1);
		found = true;
		final = sqlite3_column_int(st, 0) != 0;
		rec = r ? json_loads(r, 0, NULL) : NULL;
		snprintf(station, sizeof station, "%s", (const char *)sqlite3_column_text(st, 2));
	}
	sqlite3_finalize(st);
	if (!found || !final || !json_is_object(rec)) {
		ret = !found ? STORE_NOT_FOUND : final ? STORE_ERR : STORE_CONFLICT;
		goto out_tx;
	}
	/* The caller's change, decided on the record as it is now, under the
	 * writer's lock: two reviewers cannot both sign one version. */
	ret = fn(rec, arg, &ev);
	if (ret != STORE_OK)
		goto out_tx;
	ret = STORE_ERR;
	text = json_dumps(rec, JSON_COMPACT | JSON_REAL_PRECISION(10));
	seq = next_seq(s);
	if (!text || seq < 0 ||
	    exec_w(s, "UPDATE runs SET seq=?, record=? WHERE id=?", "iti", seq, text, id) !=
	        SQLITE_DONE ||
	    (ev.results_changed && write_outcome_rows(s, id, rec)) ||
	    store_chain_append(s, ev.at, station, id, ev.kind, ev.code, ev.message, ev.actor) !=
	        SQLITE_DONE)
		goto out_tx;
	if (commit(s) == 0) {
		ret = STORE_OK;
		if (seq_out)
			*seq_out = seq;
		issued_write(s);
	}
	goto out;
out_tx:
	rollback(s);
out:
	pthread_mutex_unlock(&s->wlock);
	json_decref(rec);
	free(text);
	return ret;
}

store_status_t store_event_add(store_t *s, const char *at, const char *station, int64_t run_id,
                               const char *kind, const char *code, const char *message,
                               const char *actor)
{
	int rc;
	char now[32];
	if (!at) {
		time_format_rfc3339(clock_wall_s(), now);
		at = now;
	}
	pthread_mutex_lock(&s->wlock);
	rc = store_chain_append(s, at, station, run_id, kind, code, message, actor);
	pthread_mutex_unlock(&s->wlock);
	return rc == SQLITE_DONE ? STORE_OK : STORE_ERR;
}

/* ---- titrants, blanks, calibrations (writes) ---- */

store_status_t store_titrant_set(store_t *s, const char *name, double molarity, double titer,
                                 const char *at, int64_t run_id, const char *replicates_json)
{
	int rc;
	pthread_mutex_lock(&s->wlock);
	rc = exec_w(
	    s,
	    "INSERT OR REPLACE INTO titrants (name, molarity, titer, at, run_id, replicates) "
	    "VALUES (?,?,?,?,NULLIF(?,0),?)",
	    "tddtit", name, molarity, titer, at, run_id, replicates_json);
	pthread_mutex_unlock(&s->wlock);
	return rc == SQLITE_DONE ? STORE_OK : STORE_ERR;
}

store_status_t store_titrant_enter(store_t *s, const char *name, double molarity, double titer,
                                   const char *at, double valid_days, const char *reason,
                                   const char *by)
{
	store_status_t ret = STORE_ERR;
	char msg[768];

	pthread_mutex_lock(&s->wlock);
	if (begin(s))
		goto out;
	if (molarity <= 0) { /* keep the stored one */
		sqlite3_stmt *st;
		if (sqlite3_prepare_v2(s->w, "SELECT molarity FROM titrants WHERE name=?", -1, &st,
		                       NULL) != SQLITE_OK)
			goto out_tx;
		sqlite3_bind_text(st, 1, name, -1, SQLITE_STATIC);
		if (sqlite3_step(st) == SQLITE_ROW)
			molarity = sqlite3_column_double(st, 0);
		sqlite3_finalize(st);
		if (molarity <= 0) {
			ret = STORE_NOT_FOUND;
			goto out_tx;
		}
	}
	snprintf(msg, sizeof msg, "%s: titer %.6f entered by hand, valid %g days: %s", name, titer,
	         valid_days, reason);
	if (exec_w(
	        s,
	        "INSERT OR REPLACE INTO titrants (name, molarity, titer, at, run_id, replicates, "
	        "valid_days, reason, set_by) VALUES (?,?,?,?,NULL,NULL,?,?,?)",
	        "tddtdtt", name, molarity, titer, at, valid_days, reason, by) != SQLITE_DONE ||
	    store_chain_append(s, at, NULL, 0, "titrant", "entered", msg, by) != SQLITE_DONE)
		goto out_tx;
	if (commit(s) == 0)
		ret = STORE_OK;
	goto out;
out_tx:
	rollback(s);
out:
	pthread_mutex_unlock(&s->wlock);
	return ret;
}

store_status_t store_blank_set(store_t *s, const char *method_id, double blank_ml, const char *at,
                               int64_t run_id)
{
	int rc;
	pthread_mutex_lock(&s->wlock);
	rc = exec_w(s,
	            "INSERT OR REPLACE INTO blanks (method_id, volume_ml, at, run_id) "
	            "VALUES (?,?,?,NULLIF(?,0))",
	            "tdti", method_id, blank_ml, at, run_id);
	pthread_mutex_unlock(&s->wlock);
	return rc == SQLITE_DONE ? STORE_OK : STORE_ERR;
}

int64_t store_calib_create(store_t *s, const char *station, const char *record_json)
{
	int64_t id = -1;
	pthread_mutex_lock(&s->wlock);
	if (exec_w(s, "INSERT INTO calibrations (station, state, record) VALUES (?,'waiting',?)",
	           "tt", station, record_json ? record_json : "{}") == SQLITE_DONE)
		id = sqlite3_last_insert_rowid(s->w);
	pthread_mutex_unlock(&s->wlock);
	return id;
}

store_status_t store_calib_update(store_t *s, int64_t id, const char *state, const char *at,
                                  const char *expires_at, const char *record_json)
{
	int rc;
	pthread_mutex_lock(&s->wlock);
	rc = exec_w(s,
	            "UPDATE calibrations SET state=?, at=COALESCE(?,at), "
	            "expires_at=COALESCE(?,expires_at), record=COALESCE(?,record) WHERE id=?",
	            "tttti", state, at, expires_at, record_json, id);
	pthread_mutex_unlock(&s->wlock);
	return rc == SQLITE_DONE ? STORE_OK : STORE_ERR;
}

/* ---- the MQTT outbox (writes; docs/mqtt.md, "Outbox") ---- */

store_status_t store_outbox_enable(store_t *s, bool on)
{
	int rc;
	pthread_mutex_lock(&s->wlock);
	rc = store_meta_set(s->w, "outbox", on ? "on" : "off");
	pthread_mutex_unlock(&s->wlock);
	return rc ? STORE_ERR : STORE_OK;
}

store_status_t store_outbox_remove(store_t *s, const int64_t *ids, int n)
{
	store_status_t ret = STORE_OK;

	if (n <= 0)
		return STORE_OK;
	pthread_mutex_lock(&s->wlock);
	if (begin(s)) {
		pthread_mutex_unlock(&s->wlock);
		return STORE_ERR;
	}
	for (int i = 0; i < n && ret == STORE_OK; i++)
		if (exec_w(s, "DELETE FROM outbox WHERE id=?", "i", ids[i]) != SQLITE_DONE)
			ret = STORE_ERR;
	if (ret == STORE_OK && commit(s))
		ret = STORE_ERR;
	else if (ret != STORE_OK)
		rollback(s);
	pthread_mutex_unlock(&s->wlock);
	return ret;
}

long store_outbox_prune(store_t *s, long max_messages, double max_age_s, double now_s)
{
	long n = -1;

	pthread_mutex_lock(&s->wlock);
	if (begin(s))
		goto out;
	if (exec_w(s, "DELETE FROM outbox WHERE at_s < ?", "d", now_s - max_age_s) != SQLITE_DONE)
		goto out_tx;
	n = sqlite3_changes(s->w);
	/* the oldest go first: the newest are what a subscriber waits for */
	if (exec_w(s,
	           "DELETE FROM outbox WHERE id <= (SELECT id FROM outbox ORDER BY id DESC "
	           "LIMIT 1 OFFSET ?)",
	           "i", (int64_t)max_messages) != SQLITE_DONE)
		goto out_tx;
	n += sqlite3_changes(s->w);
	if (commit(s))
		n = -1;
	goto out;
out_tx:
	rollback(s);
	n = -1;
out:
	pthread_mutex_unlock(&s->wlock);
	return n;
}
