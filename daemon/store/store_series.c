/* store_series.c: the series table (see store.h, "series"). Every call uses
 * the writer connection under its lock: series are read a few times a second
 * at most, and one connection keeps a finish and its seq in one transaction. */
#include <stdio.h>
#include <string.h>

#include "store.h"
#include "store_priv.h"

static int prep(store_t *s, const char *sql, sqlite3_stmt **st)
{
	return sqlite3_prepare_v2(s->w, sql, -1, st, NULL) == SQLITE_OK ? 0 : -1;
}

int64_t store_series_create(store_t *s, const char *station, const char *created_at,
                            const char *record_json)
{
	sqlite3_stmt *st;
	int64_t id = -1;
	pthread_mutex_lock(&s->wlock);
	if (prep(s,
	         "INSERT INTO series (station, state, created_at, record) VALUES (?,'queued',?,?)",
	         &st) == 0) {
		sqlite3_bind_text(st, 1, station, -1, SQLITE_TRANSIENT);
		sqlite3_bind_text(st, 2, created_at, -1, SQLITE_TRANSIENT);
		sqlite3_bind_text(st, 3, record_json, -1, SQLITE_TRANSIENT);
		if (sqlite3_step(st) == SQLITE_DONE)
			id = sqlite3_last_insert_rowid(s->w);
		sqlite3_finalize(st);
	}
	pthread_mutex_unlock(&s->wlock);
	return id;
}

store_status_t store_series_update(store_t *s, int64_t id, const char *state,
                                   const char *record_json)
{
	sqlite3_stmt *st;
	store_status_t rc = STORE_ERR;
	pthread_mutex_lock(&s->wlock);
	if (prep(s,
	         "UPDATE series SET state=COALESCE(?, state), record=? WHERE id=? AND seq IS NULL",
	         &st) == 0) {
		if (state)
			sqlite3_bind_text(st, 1, state, -1, SQLITE_TRANSIENT);
		sqlite3_bind_text(st, 2, record_json, -1, SQLITE_TRANSIENT);
		sqlite3_bind_int64(st, 3, id);
		if (sqlite3_step(st) == SQLITE_DONE)
			rc = sqlite3_changes(s->w) ? STORE_OK : STORE_CONFLICT;
		sqlite3_finalize(st);
	}
	pthread_mutex_unlock(&s->wlock);
	return rc;
}

store_status_t store_series_finish(store_t *s, int64_t id, const char *state, const char *ended_at,
                                   const char *record_json, int64_t *seq_out)
{
	sqlite3_stmt *st;
	store_status_t rc = STORE_ERR;
	pthread_mutex_lock(&s->wlock);
	if (sqlite3_exec(s->w, "BEGIN IMMEDIATE", NULL, NULL, NULL) != SQLITE_OK)
		goto out;
	/* seq only grows: the next one is above every seq ever given, kept in
	 * the table itself (rows are never deleted). */
	if (prep(s,
	         "UPDATE series SET state=?, ended_at=?, record=?,"
	         " seq=(SELECT COALESCE(MAX(seq), 0) + 1 FROM series)"
	         " WHERE id=? AND seq IS NULL",
	         &st) == 0) {
		sqlite3_bind_text(st, 1, state, -1, SQLITE_TRANSIENT);
		sqlite3_bind_text(st, 2, ended_at, -1, SQLITE_TRANSIENT);
		sqlite3_bind_text(st, 3, record_json, -1, SQLITE_TRANSIENT);
		sqlite3_bind_int64(st, 4, id);
		if (sqlite3_step(st) == SQLITE_DONE)
			rc = sqlite3_changes(s->w) ? STORE_OK : STORE_CONFLICT;
		sqlite3_finalize(st);
	}
	if (rc == STORE_OK && seq_out && prep(s, "SELECT seq FROM series WHERE id=?", &st) == 0) {
		sqlite3_bind_int64(st, 1, id);
		if (sqlite3_step(st) == SQLITE_ROW)
			*seq_out = sqlite3_column_int64(st, 0);
		sqlite3_finalize(st);
	}
	if (rc == STORE_OK && sqlite3_exec(s->w, "COMMIT", NULL, NULL, NULL) != SQLITE_OK)
		rc = STORE_ERR;
	if (rc != STORE_OK)
		sqlite3_exec(s->w, "ROLLBACK", NULL, NULL, NULL);
out:
	pthread_mutex_unlock(&s->wlock);
	return rc;
}

/* The stored record with the row's seq (null while not final). */
static json_t *row_json(sqlite3_stmt *st)
{
	const char *text = (const char *)sqlite3_column_text(st, 0);
	json_t *j = text ? json_loads(text, 0, NULL) : NULL;
	if (!j)
		j = json_object();
	if (j)
		json_object_set_new(j, "seq",
		                    sqlite3_column_type(st, 1) == SQLITE_NULL
		                        ? json_null()
		                        : json_integer(sqlite3_column_int64(st, 1)));
	return j;
}

json_t *store_series_json(store_t *s, int64_t id, bool *db_err)
{
	sqlite3_stmt *st;
	json_t *j = NULL;
	*db_err = false;
	pthread_mutex_lock(&s->wlock);
	if (prep(s, "SELECT record, seq FROM series WHERE id=?", &st) == 0) {
		sqlite3_bind_int64(st, 1, id);
		int rc = sqlite3_step(st);
		if (rc == SQLITE_ROW)
			j = row_json(st);
		else if (rc != SQLITE_DONE)
			*db_err = true;
		sqlite3_finalize(st);
	} else {
		*db_err = true;
	}
	pthread_mutex_unlock(&s->wlock);
	return j;
}

static json_t *rows(store_t *s, const char *sql, int64_t a, int limit, int64_t *last, bool *db_err)
{
	sqlite3_stmt *st;
	json_t *arr = json_array();
	*db_err = false;
	pthread_mutex_lock(&s->wlock);
	if (arr && prep(s, sql, &st) == 0) {
		int rc;
		sqlite3_bind_int64(st, 1, a);
		sqlite3_bind_int(st, 2, limit);
		while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
			json_array_append_new(arr, row_json(st));
			if (last)
				*last = sqlite3_column_int64(st, 1);
		}
		if (rc != SQLITE_DONE)
			*db_err = true;
		sqlite3_finalize(st);
	} else {
		*db_err = true;
	}
	pthread_mutex_unlock(&s->wlock);
	if (*db_err) {
		json_decref(arr);
		return NULL;
	}
	return arr;
}

json_t *store_series_list(store_t *s, int limit, bool *db_err)
{
	json_t *arr =
	    rows(s, "SELECT record, seq FROM series WHERE id > ? ORDER BY id DESC LIMIT ?", 0,
	         limit, NULL, db_err);
	return arr ? json_pack("{s:o}", "series", arr) : NULL;
}

json_t *store_series_after(store_t *s, int64_t after, int limit, bool *db_err)
{
	int64_t last = after;
	json_t *arr = rows(s, "SELECT record, seq FROM series WHERE seq > ? ORDER BY seq LIMIT ?",
	                   after, limit, &last, db_err);
	return arr ? json_pack("{s:o,s:I,s:s}", "series", arr, "next_after", (json_int_t)last,
	                       "history", store_history(s))
	           : NULL;
}

json_t *store_series_open(store_t *s)
{
	sqlite3_stmt *st;
	json_t *arr = json_array();
	bool ok = false;
	pthread_mutex_lock(&s->wlock);
	if (arr && prep(s, "SELECT id FROM series WHERE state IN ('queued','running') ORDER BY id",
	                &st) == 0) {
		int rc;
		while ((rc = sqlite3_step(st)) == SQLITE_ROW)
			json_array_append_new(arr, json_integer(sqlite3_column_int64(st, 0)));
		ok = rc == SQLITE_DONE;
		sqlite3_finalize(st);
	}
	pthread_mutex_unlock(&s->wlock);
	if (!ok) {
		json_decref(arr);
		return NULL;
	}
	return arr;
}
