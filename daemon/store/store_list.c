/* store_list.c: the runs list behind GET /v1/runs (the bench page's runs view).
 *
 * A separate read-only connection per call: the list is polled every few
 * seconds by an open page, so opening one (well under a millisecond on a
 * local file) costs nothing worth a slot of store_read.c's pool.
 */
#include "store.h"
#include "store_priv.h"

#include <stdio.h>
#include <string.h>

/* Fields of a stored record a list row carries: enough for a table, not the
 * whole record (faults and titrant stay in GET /v1/runs/{id}). */
static const char *const row_keys[] = {
    "station",  "method",    "sample",  "phase",     "queued_at",    "started_at",
    "ended_at", "endpoints", "results", "additions", "dispensed_ml", "stop_reason",
};

static json_t *list_row(sqlite3_stmt *st)
{
	const char *text = (const char *)sqlite3_column_text(st, 0);
	json_t *rec = text ? json_loads(text, 0, NULL) : NULL;
	json_t *row = json_object();

	for (size_t i = 0; i < sizeof row_keys / sizeof row_keys[0]; i++) {
		json_t *v = json_is_object(rec) ? json_object_get(rec, row_keys[i]) : NULL;
		json_object_set(row, row_keys[i], v ? v : json_null());
	}
	/* The columns win over a record written before the last state change,
	 * as in store_run_json. */
	json_object_set_new(row, "id", json_integer(sqlite3_column_int64(st, 1)));
	json_object_set_new(row, "state",
	                    json_string((const char *)sqlite3_column_text(st, 2) ?: "unknown"));
	if (sqlite3_column_type(st, 3) == SQLITE_NULL)
		json_object_set_new(row, "seq", json_null());
	else
		json_object_set_new(row, "seq", json_integer(sqlite3_column_int64(st, 3)));
	json_decref(rec);
	return row;
}

json_t *store_runs_list(store_t *s, const store_runs_filter_t *f, bool *db_err)
{
	sqlite3 *db = NULL;
	sqlite3_stmt *st = NULL;
	json_t *arr = NULL;
	int limit = f->limit > 0 && f->limit <= 1000 ? f->limit : 100, rc;
	/* Empty filters match everything, so one statement serves every form of
	 * the query; queued_at is RFC 3339 UTC, so text order is time order. */
	const char *sql = "SELECT record, id, state, seq FROM runs"
	                  " WHERE (?1 = '' OR station = ?1) AND (?2 = '' OR state = ?2)"
	                  " AND (?3 = '' OR queued_at >= ?3) AND (?4 = '' OR queued_at < ?4)"
	                  " AND (?5 = 0 OR id < ?5)"
	                  " ORDER BY id DESC LIMIT ?6";

	*db_err = false;
	if (sqlite3_open_v2(s->path, &db, SQLITE_OPEN_READONLY, NULL) != SQLITE_OK)
		goto fail;
	sqlite3_busy_timeout(db, 5000);
	if (sqlite3_prepare_v2(db, sql, -1, &st, NULL) != SQLITE_OK)
		goto fail;
	sqlite3_bind_text(st, 1, f->station ? f->station : "", -1, SQLITE_TRANSIENT);
	sqlite3_bind_text(st, 2, f->state ? f->state : "", -1, SQLITE_TRANSIENT);
	sqlite3_bind_text(st, 3, f->since ? f->since : "", -1, SQLITE_TRANSIENT);
	sqlite3_bind_text(st, 4, f->until ? f->until : "", -1, SQLITE_TRANSIENT);
	sqlite3_bind_int64(st, 5, f->before_id > 0 ? f->before_id : 0);
	sqlite3_bind_int(st, 6, limit);
	arr = json_array();
	while ((rc = sqlite3_step(st)) == SQLITE_ROW)
		json_array_append_new(arr, list_row(st));
	if (rc != SQLITE_DONE)
		goto fail;
	sqlite3_finalize(st);
	sqlite3_close(db);
	return json_pack("{s:o}", "runs", arr);
fail:
	*db_err = true;
	json_decref(arr);
	sqlite3_finalize(st);
	sqlite3_close(db);
	return NULL;
}
