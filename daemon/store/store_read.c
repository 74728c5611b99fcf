/* store_read.c: the read paths of store.h, on a pool of read-only connections. */
#include "store.h"
#include "store_priv.h"
#include "sbuf.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

/* A reader from the pool, or a fresh one when all are taken (slot -1). */
static sqlite3 *reader_get(store_t *s, int *slot)
{
	sqlite3 *db = NULL;

	*slot = -1;
	pthread_mutex_lock(&s->rlock);
	for (int i = 0; i < STORE_READERS; i++) {
		if (s->r_busy[i])
			continue;
		if (!s->r[i]) {
			if (sqlite3_open_v2(s->path, &s->r[i], SQLITE_OPEN_READONLY, NULL) !=
			    SQLITE_OK) {
				sqlite3_close(s->r[i]);
				s->r[i] = NULL;
				break;
			}
			sqlite3_busy_timeout(s->r[i], 5000);
		}
		s->r_busy[i] = true;
		*slot = i;
		db = s->r[i];
		break;
	}
	pthread_mutex_unlock(&s->rlock);
	if (db)
		return db;
	if (sqlite3_open_v2(s->path, &db, SQLITE_OPEN_READONLY, NULL) != SQLITE_OK) {
		sqlite3_close(db);
		return NULL;
	}
	sqlite3_busy_timeout(db, 5000);
	return db;
}

static void reader_put(store_t *s, sqlite3 *db, int slot)
{
	if (slot < 0) {
		sqlite3_close(db);
		return;
	}
	pthread_mutex_lock(&s->rlock);
	s->r_busy[slot] = false;
	pthread_mutex_unlock(&s->rlock);
}

typedef struct rq {
	store_t *s;
	sqlite3 *db;
	int slot;
	sqlite3_stmt *st;
} rq_t;

static int rq_open(rq_t *q, store_t *s, const char *sql)
{
	q->s = s;
	q->st = NULL;
	q->db = reader_get(s, &q->slot);
	if (!q->db)
		return -1;
	if (sqlite3_prepare_v2(q->db, sql, -1, &q->st, NULL) != SQLITE_OK) {
		reader_put(s, q->db, q->slot);
		q->db = NULL;
		return -1;
	}
	return 0;
}

/* Finalize promptly: an open read transaction blocks WAL checkpoints. */
static void rq_close(rq_t *q)
{
	if (q->st)
		sqlite3_finalize(q->st);
	if (q->db)
		reader_put(q->s, q->db, q->slot);
	q->st = NULL;
	q->db = NULL;
}

static json_t *col_json_text(sqlite3_stmt *st, int i)
{
	const char *t = (const char *)sqlite3_column_text(st, i);
	return t ? json_string(t) : json_null();
}

static json_t *col_json_real(sqlite3_stmt *st, int i)
{
	if (sqlite3_column_type(st, i) == SQLITE_NULL)
		return json_null();
	return json_real(sqlite3_column_double(st, i));
}

/* ---- methods ---- */

store_status_t store_method_latest(store_t *s, const char *id, char **text, size_t *len,
                                   long *revision, char sha256[65])
{
	return store_method_revision(s, id, 0, text, len, revision, sha256);
}

store_status_t store_method_revision(store_t *s, const char *id, long want, char **text,
                                     size_t *len, long *revision, char sha256[65])
{
	rq_t q;
	store_status_t ret = STORE_NOT_FOUND;

	if (rq_open(&q, s,
	            "SELECT text, revision, sha256 FROM methods WHERE id=?1 "
	            "AND (?2 = 0 OR revision = ?2) ORDER BY revision DESC LIMIT 1"))
		return STORE_ERR;
	sqlite3_bind_text(q.st, 1, id, -1, SQLITE_TRANSIENT);
	sqlite3_bind_int64(q.st, 2, want);
	if (sqlite3_step(q.st) == SQLITE_ROW) {
		int n = sqlite3_column_bytes(q.st, 0);
		const void *b = sqlite3_column_blob(q.st, 0);
		*text = malloc((size_t)n + 1);
		if (*text) {
			if (n)
				memcpy(*text, b, (size_t)n);
			(*text)[n] = '\0';
			*len = (size_t)n;
			*revision = sqlite3_column_int(q.st, 1);
			snprintf(sha256, 65, "%s", (const char *)sqlite3_column_text(q.st, 2));
			ret = STORE_OK;
		} else {
			ret = STORE_ERR;
		}
	}
	rq_close(&q);
	return ret;
}

json_t *store_method_json(store_t *s, const char *id, bool *db_err)
{
	rq_t q;
	json_t *j = NULL;

	*db_err = false;
	if (rq_open(&q, s,
	            "SELECT id, revision, sha256, text, source, stored_at, "
	            "(SELECT COUNT(*) FROM methods m2 WHERE m2.id=methods.id) "
	            "FROM methods WHERE id=? ORDER BY revision DESC LIMIT 1")) {
		*db_err = true;
		return NULL;
	}
	sqlite3_bind_text(q.st, 1, id, -1, SQLITE_TRANSIENT);
	if (sqlite3_step(q.st) == SQLITE_ROW)
		j = json_pack("{s:o,s:I,s:o,s:o,s:o,s:o,s:I}", "id", col_json_text(q.st, 0),
		              "revision", (json_int_t)sqlite3_column_int64(q.st, 1), "sha256",
		              col_json_text(q.st, 2), "text", col_json_text(q.st, 3), "source",
		              col_json_text(q.st, 4), "stored_at", col_json_text(q.st, 5),
		              "revisions_stored", (json_int_t)sqlite3_column_int64(q.st, 6));
	rq_close(&q);
	return j;
}

json_t *store_methods_list(store_t *s, bool *db_err)
{
	rq_t q;
	json_t *arr = json_array();

	*db_err = false;
	if (rq_open(&q, s,
	            "SELECT id, MAX(revision), "
	            "(SELECT sha256 FROM methods m2 WHERE m2.id=m.id ORDER BY revision DESC "
	            "LIMIT 1), COUNT(*) FROM methods m GROUP BY id ORDER BY id")) {
		*db_err = true;
		json_decref(arr);
		return NULL;
	}
	while (sqlite3_step(q.st) == SQLITE_ROW)
		json_array_append_new(
		    arr, json_pack("{s:o,s:I,s:o,s:I}", "id", col_json_text(q.st, 0), "revision",
		                   (json_int_t)sqlite3_column_int64(q.st, 1), "sha256",
		                   col_json_text(q.st, 2), "revisions_stored",
		                   (json_int_t)sqlite3_column_int64(q.st, 3)));
	rq_close(&q);
	return json_pack("{s:o}", "methods", arr);
}

/* ---- runs ---- */

/* Record of a row (record, seq, state, columns) as JSON. The stored record is
 * the source of truth; seq is added here, as it is assigned by the store. */
static json_t *row_record(sqlite3_stmt *st)
{
	const char *text = (const char *)sqlite3_column_text(st, 0);
	json_t *j = text ? json_loads(text, 0, NULL) : NULL;

	if (!json_is_object(j)) {
		json_decref(j);
		j = json_object();
	}
	if (sqlite3_column_type(st, 1) == SQLITE_NULL)
		json_object_set_new(j, "seq", json_null());
	else
		json_object_set_new(j, "seq", json_integer(sqlite3_column_int64(st, 1)));
	/* The columns win over a record written before the last state change. */
	json_object_set_new(j, "id", json_integer(sqlite3_column_int64(st, 2)));
	json_object_set_new(j, "state", col_json_text(st, 3));
	/* Not reviewed yet (docs/lims.md, "Review and corrections"): a review
	 * or a correction stores its own. */
	if (!json_object_get(j, "review"))
		json_object_set_new(j, "review",
		                    json_pack("{s:s,s:n,s:n,s:n,s:i}", "state", "pending", "by",
		                              "at", "reason", "version", 1));
	return j;
}

json_t *store_run_json(store_t *s, int64_t id, bool *db_err)
{
	rq_t q;
	json_t *j = NULL;

	*db_err = false;
	if (rq_open(&q, s, "SELECT record, seq, id, state FROM runs WHERE id=?")) {
		*db_err = true;
		return NULL;
	}
	sqlite3_bind_int64(q.st, 1, id);
	if (sqlite3_step(q.st) == SQLITE_ROW)
		j = row_record(q.st);
	rq_close(&q);
	return j;
}

store_status_t store_run_state(store_t *s, int64_t id, char *out, size_t cap, char *station,
                               size_t station_cap)
{
	rq_t q;
	store_status_t ret = STORE_NOT_FOUND;

	if (rq_open(&q, s, "SELECT state, station FROM runs WHERE id=?"))
		return STORE_ERR;
	sqlite3_bind_int64(q.st, 1, id);
	if (sqlite3_step(q.st) == SQLITE_ROW) {
		snprintf(out, cap, "%s", (const char *)sqlite3_column_text(q.st, 0));
		if (station)
			snprintf(station, station_cap, "%s",
			         (const char *)sqlite3_column_text(q.st, 1));
		ret = STORE_OK;
	}
	rq_close(&q);
	return ret;
}

store_status_t store_run_signal(store_t *s, int64_t id, char *out, size_t cap)
{
	rq_t q;
	store_status_t ret = STORE_NOT_FOUND;

	if (rq_open(&q, s, "SELECT COALESCE(signal,'ph') FROM runs WHERE id=?"))
		return STORE_ERR;
	sqlite3_bind_int64(q.st, 1, id);
	if (sqlite3_step(q.st) == SQLITE_ROW) {
		snprintf(out, cap, "%s", (const char *)sqlite3_column_text(q.st, 0));
		ret = STORE_OK;
	}
	rq_close(&q);
	return ret;
}

static bool run_exists(store_t *s, int64_t id, bool *db_err)
{
	char st[32];
	store_status_t r = store_run_state(s, id, st, sizeof st, NULL, 0);
	*db_err = r == STORE_ERR;
	return r == STORE_OK;
}

#define POINTS_SQL                                                                                 \
	"SELECT t_s, volume_ml, mv, ph, temperature_c, settled, dpdv FROM points WHERE run_id=? "  \
	"ORDER BY n"

json_t *store_points_json(store_t *s, int64_t id, bool *db_err)
{
	rq_t q;
	json_t *arr;

	if (!run_exists(s, id, db_err))
		return NULL;
	if (rq_open(&q, s, POINTS_SQL)) {
		*db_err = true;
		return NULL;
	}
	arr = json_array();
	sqlite3_bind_int64(q.st, 1, id);
	while (sqlite3_step(q.st) == SQLITE_ROW)
		json_array_append_new(
		    arr, json_pack("{s:f,s:f,s:f,s:o,s:o,s:b,s:o}", "t_s",
		                   sqlite3_column_double(q.st, 0), "volume_ml",
		                   sqlite3_column_double(q.st, 1), "mv",
		                   sqlite3_column_double(q.st, 2), "ph", col_json_real(q.st, 3),
		                   "temperature_c", col_json_real(q.st, 4), "settled",
		                   sqlite3_column_int(q.st, 5), "dpdv", col_json_real(q.st, 6)));
	rq_close(&q);
	return json_pack("{s:I,s:o}", "run", (json_int_t)id, "points", arr);
}

static void csv_num(sbuf_t *b, sqlite3_stmt *st, int i, int digits, char sep)
{
	if (sqlite3_column_type(st, i) != SQLITE_NULL)
		sbuf_addf(b, "%.*f", digits, sqlite3_column_double(st, i));
	sbuf_addc(b, sep);
}

char *store_points_csv(store_t *s, int64_t id, bool *db_err)
{
	rq_t q;

	if (!run_exists(s, id, db_err))
		return NULL;
	if (rq_open(&q, s, POINTS_SQL)) {
		*db_err = true;
		return NULL;
	}
	sbuf_t b = SBUF_INIT;
	sbuf_add(&b, "t_s,volume_ml,mv,ph,temperature_c,settled,dpdv\n");
	sqlite3_bind_int64(q.st, 1, id);
	while (sqlite3_step(q.st) == SQLITE_ROW) {
		csv_num(&b, q.st, 0, 3, ',');
		csv_num(&b, q.st, 1, 4, ',');
		csv_num(&b, q.st, 2, 2, ',');
		csv_num(&b, q.st, 3, 3, ',');
		csv_num(&b, q.st, 4, 2, ',');
		csv_num(&b, q.st, 5, 0, ',');
		csv_num(&b, q.st, 6, 4, '\n');
	}
	rq_close(&q);
	/* Out of memory mid-table: an error (500), never a CSV missing rows. */
	char *csv = sbuf_finish(&b, NULL);
	if (!csv)
		*db_err = true;
	return csv;
}

json_t *store_results_after(store_t *s, int64_t after, int limit, bool *db_err)
{
	rq_t q;
	json_t *arr;
	int64_t last = after;

	*db_err = false;
	if (rq_open(&q, s,
	            "SELECT record, seq, id, state FROM runs WHERE seq > ? ORDER BY seq LIMIT ?")) {
		*db_err = true;
		return NULL;
	}
	arr = json_array();
	sqlite3_bind_int64(q.st, 1, after);
	sqlite3_bind_int(q.st, 2, limit);
	while (sqlite3_step(q.st) == SQLITE_ROW) {
		json_array_append_new(arr, row_record(q.st));
		last = sqlite3_column_int64(q.st, 1);
	}
	rq_close(&q);
	return json_pack("{s:o,s:I,s:s}", "results", arr, "next_after", (json_int_t)last, "history",
	                 store_history(s));
}

static json_t *text_or_null(sqlite3_stmt *st, int col)
{
	const char *t = (const char *)sqlite3_column_text(st, col);
	return t ? json_string(t) : json_null();
}

json_t *store_events_after(store_t *s, int64_t after, int limit, bool *db_err)
{
	rq_t q;
	json_t *arr;
	int64_t last = after;

	*db_err = false;
	if (rq_open(&q, s,
	            "SELECT id, at, kind, code, station, run_id, actor, message, hash FROM events "
	            "WHERE id > ? ORDER BY id LIMIT ?")) {
		*db_err = true;
		return NULL;
	}
	arr = json_array();
	sqlite3_bind_int64(q.st, 1, after);
	sqlite3_bind_int(q.st, 2, limit);
	while (sqlite3_step(q.st) == SQLITE_ROW) {
		last = sqlite3_column_int64(q.st, 0);
		json_array_append_new(
		    arr,
		    json_pack("{s:I,s:o,s:o,s:o,s:o,s:o,s:o,s:o,s:o}", "id", (json_int_t)last, "at",
		              text_or_null(q.st, 1), "kind", text_or_null(q.st, 2), "code",
		              text_or_null(q.st, 3), "station", text_or_null(q.st, 4), "run_id",
		              sqlite3_column_type(q.st, 5) == SQLITE_NULL
		                  ? json_null()
		                  : json_integer(sqlite3_column_int64(q.st, 5)),
		              "actor", text_or_null(q.st, 6), "message", text_or_null(q.st, 7),
		              "hash", text_or_null(q.st, 8)));
	}
	rq_close(&q);
	return json_pack("{s:o,s:I}", "events", arr, "next_after", (json_int_t)last);
}

json_t *store_titrants_json(store_t *s, bool *db_err)
{
	rq_t q;
	json_t *arr;

	*db_err = false;
	if (rq_open(&q, s,
	            "SELECT name, molarity, titer, at, run_id, replicates, valid_days, reason, "
	            "set_by FROM titrants ORDER BY name")) {
		*db_err = true;
		return NULL;
	}
	arr = json_array();
	while (sqlite3_step(q.st) == SQLITE_ROW) {
		const char *rep = (const char *)sqlite3_column_text(q.st, 5);
		json_t *stats = rep ? json_loads(rep, 0, NULL) : NULL;
		json_array_append_new(
		    arr,
		    json_pack("{s:o,s:f,s:f,s:o,s:o,s:o}", "name", text_or_null(q.st, 0),
		              "molarity", sqlite3_column_double(q.st, 1), "titer",
		              sqlite3_column_double(q.st, 2), "at", text_or_null(q.st, 3), "run_id",
		              sqlite3_column_type(q.st, 4) == SQLITE_NULL
		                  ? json_null()
		                  : json_integer(sqlite3_column_int64(q.st, 4)),
		              "standardization", stats ? stats : json_null()));
		/* Entered by hand or measured: for the record and the page. */
		json_t *t = json_array_get(arr, json_array_size(arr) - 1);
		json_object_set_new(t, "valid_days",
		                    sqlite3_column_type(q.st, 6) == SQLITE_NULL
		                        ? json_null()
		                        : json_real(sqlite3_column_double(q.st, 6)));
		json_object_set_new(t, "source",
		                    json_string(sqlite3_column_type(q.st, 7) == SQLITE_NULL
		                                    ? "standardization"
		                                    : "entered"));
		json_object_set_new(t, "reason", text_or_null(q.st, 7));
		json_object_set_new(t, "by", text_or_null(q.st, 8));
	}
	rq_close(&q);
	return json_pack("{s:o}", "titrants", arr);
}

int store_run_counts(store_t *s, const char *const *states, long *n, int n_states)
{
	rq_t q;

	for (int i = 0; i < n_states; i++)
		n[i] = 0;
	if (rq_open(&q, s, "SELECT state, COUNT(*) FROM runs GROUP BY state"))
		return -1;
	while (sqlite3_step(q.st) == SQLITE_ROW) {
		const char *st = (const char *)sqlite3_column_text(q.st, 0);
		for (int i = 0; i < n_states; i++)
			if (st && !strcmp(st, states[i]))
				n[i] = (long)sqlite3_column_int64(q.st, 1);
	}
	rq_close(&q);
	return 0;
}

/* ---- titrants, blanks ---- */

/* One stored value of a titrant (titer or blank) with where it came from. */
static store_status_t value_get(store_t *s, const char *sql, const char *key, double *value,
                                store_source_t *src)
{
	rq_t q;
	store_status_t ret = STORE_NOT_FOUND;

	if (src) {
		memset(src, 0, sizeof *src);
		src->valid_days = NAN;
	}
	if (rq_open(&q, s, sql))
		return STORE_ERR;
	sqlite3_bind_text(q.st, 1, key, -1, SQLITE_TRANSIENT);
	if (sqlite3_step(q.st) == SQLITE_ROW) {
		*value = sqlite3_column_double(q.st, 0);
		if (src) {
			const char *at = (const char *)sqlite3_column_text(q.st, 1);
			snprintf(src->at, sizeof src->at, "%s", at ? at : "");
			src->run_id = sqlite3_column_int64(q.st, 2);
		}
		/* a titer's own validity, reason and author, when asked */
		if (src && sqlite3_column_count(q.st) >= 6) {
			const char *why = (const char *)sqlite3_column_text(q.st, 4);
			const char *by = (const char *)sqlite3_column_text(q.st, 5);
			if (sqlite3_column_type(q.st, 3) != SQLITE_NULL)
				src->valid_days = sqlite3_column_double(q.st, 3);
			snprintf(src->reason, sizeof src->reason, "%s", why ? why : "");
			snprintf(src->by, sizeof src->by, "%s", by ? by : "");
		}
		ret = STORE_OK;
	}
	rq_close(&q);
	return ret;
}

store_status_t store_titrant_get(store_t *s, const char *name, double *titer, store_source_t *src)
{
	return value_get(s,
	                 "SELECT titer, at, run_id, valid_days, reason, set_by FROM titrants WHERE "
	                 "name=?",
	                 name, titer, src);
}

store_status_t store_blank_get(store_t *s, const char *method_id, double *blank_ml,
                               store_source_t *src)
{
	return value_get(s, "SELECT volume_ml, at, run_id FROM blanks WHERE method_id=?", method_id,
	                 blank_ml, src);
}

/* ---- calibrations ---- */

static json_t *calib_row(sqlite3_stmt *st)
{
	const char *text = (const char *)sqlite3_column_text(st, 0);
	json_t *j = text ? json_loads(text, 0, NULL) : NULL;

	if (!json_is_object(j)) {
		json_decref(j);
		j = json_object();
	}
	json_object_set_new(j, "id", json_integer(sqlite3_column_int64(st, 1)));
	json_object_set_new(j, "station", col_json_text(st, 2));
	json_object_set_new(j, "state", col_json_text(st, 3));
	/* Not reviewed yet (docs/lims.md, "Review and corrections"): a review
	 * or a correction stores its own. */
	if (!json_object_get(j, "review"))
		json_object_set_new(j, "review",
		                    json_pack("{s:s,s:n,s:n,s:n,s:i}", "state", "pending", "by",
		                              "at", "reason", "version", 1));
	return j;
}

json_t *store_calib_json(store_t *s, int64_t id, bool *db_err)
{
	rq_t q;
	json_t *j = NULL;

	*db_err = false;
	if (rq_open(&q, s, "SELECT record, id, station, state FROM calibrations WHERE id=?")) {
		*db_err = true;
		return NULL;
	}
	sqlite3_bind_int64(q.st, 1, id);
	if (sqlite3_step(q.st) == SQLITE_ROW)
		j = calib_row(q.st);
	rq_close(&q);
	return j;
}

json_t *store_calib_latest(store_t *s, const char *station, bool accepted_only, const char *now,
                           bool *db_err)
{
	rq_t q;
	json_t *j = NULL;
	const char *sql = accepted_only
	                      ? "SELECT record, id, station, state FROM calibrations WHERE "
	                        "station=? AND state='accepted' AND (expires_at IS NULL OR "
	                        "expires_at > ?) ORDER BY id DESC LIMIT 1"
	                      : "SELECT record, id, station, state FROM calibrations WHERE "
	                        "station=? ORDER BY id DESC LIMIT 1";

	*db_err = false;
	if (rq_open(&q, s, sql)) {
		*db_err = true;
		return NULL;
	}
	sqlite3_bind_text(q.st, 1, station, -1, SQLITE_TRANSIENT);
	if (accepted_only)
		sqlite3_bind_text(q.st, 2, now ? now : "", -1, SQLITE_TRANSIENT);
	if (sqlite3_step(q.st) == SQLITE_ROW)
		j = calib_row(q.st);
	rq_close(&q);
	return j;
}

/* ---- the MQTT outbox (reads) ---- */

int store_outbox_peek(store_t *s, int64_t after_id, store_outbox_msg_t *out, int max)
{
	rq_t q;
	int n = 0;

	if (rq_open(&q, s, "SELECT id, kind, ref FROM outbox WHERE id > ? ORDER BY id LIMIT ?"))
		return -1;
	sqlite3_bind_int64(q.st, 1, after_id);
	sqlite3_bind_int(q.st, 2, max);
	while (n < max && sqlite3_step(q.st) == SQLITE_ROW) {
		const char *kind = (const char *)sqlite3_column_text(q.st, 1);
		out[n].id = sqlite3_column_int64(q.st, 0);
		out[n].is_result = kind && !strcmp(kind, "result");
		out[n].is_series = kind && !strcmp(kind, "series");
		out[n].ref = sqlite3_column_int64(q.st, 2);
		n++;
	}
	rq_close(&q);
	return n;
}

int store_outbox_stats(store_t *s, long *count, double *oldest_age_s, double now_s)
{
	rq_t q;
	int ret = -1;

	*count = 0;
	*oldest_age_s = 0;
	if (rq_open(&q, s, "SELECT COUNT(*), MIN(at_s) FROM outbox"))
		return -1;
	if (sqlite3_step(q.st) == SQLITE_ROW) {
		*count = (long)sqlite3_column_int64(q.st, 0);
		if (sqlite3_column_type(q.st, 1) != SQLITE_NULL)
			*oldest_age_s = now_s - (double)sqlite3_column_int64(q.st, 1);
		ret = 0;
	}
	rq_close(&q);
	return ret;
}
