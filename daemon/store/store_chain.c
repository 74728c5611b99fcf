/* store_chain.c: the audit trail's hash chain (store.h, "The audit trail is
 * chained"; docs/operations.md, "Checking the audit trail").
 *
 * Each event row's `hash` is SHA-256 (lib/digest.h) over the previous row's
 * hash, a newline and the row as a compact JSON array [id, at, station,
 * run_id, kind, code, message, actor] (NULL columns as null). Changing any
 * column of a row breaks its hash; deleting or inserting a row breaks the
 * next row's; the first row chains to 64 zeros. Anyone who can write the
 * database can also recompute the whole chain: the chain's head (id and
 * hash, GET /v1/events/verify) kept outside the database closes that gap.
 */
#include "store.h"
#include "store_priv.h"
#include "digest.h"
#include "log.h"
#include "sbuf.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define CHAIN_GENESIS "0000000000000000000000000000000000000000000000000000000000000000"

static json_t *text_or_null(sqlite3_stmt *st, int col)
{
	const char *t = (const char *)sqlite3_column_text(st, col);
	return t ? json_string(t) : json_null();
}

/* The hash of one row given its columns as a JSON array and prev. */
static int row_hash(json_t *row, const char *prev, char out[65])
{
	char *text = row ? json_dumps(row, JSON_COMPACT) : NULL;
	sbuf_t b = SBUF_INIT;
	size_t len;
	char *all;

	json_decref(row);
	if (!text)
		return -1;
	sbuf_addf(&b, "%s\n%s", prev, text);
	free(text);
	all = sbuf_finish(&b, &len);
	if (!all)
		return -1;
	digest_sha256_hex(all, len, out);
	free(all);
	return 0;
}

/* Row of a SELECT id, at, station, run_id, kind, code, message, actor. */
static json_t *row_of(sqlite3_stmt *st)
{
	return json_pack(
	    "[I,o,o,o,o,o,o,o]", (json_int_t)sqlite3_column_int64(st, 0), text_or_null(st, 1),
	    text_or_null(st, 2),
	    sqlite3_column_type(st, 3) == SQLITE_NULL ? json_null()
	                                              : json_integer(sqlite3_column_int64(st, 3)),
	    text_or_null(st, 4), text_or_null(st, 5), text_or_null(st, 6), text_or_null(st, 7));
}

static json_t *str_or_null(const char *s)
{
	return s ? json_string(s) : json_null();
}

/* The last row's hash (the genesis when there is none) and the id the next
 * row gets (AUTOINCREMENT: above every id ever issued). */
static int chain_tail(sqlite3 *db, char prev[65], int64_t *next_id)
{
	sqlite3_stmt *st;
	int64_t seq = 0, max = 0;

	snprintf(prev, 65, "%s", CHAIN_GENESIS);
	if (sqlite3_prepare_v2(db, "SELECT id, hash FROM events ORDER BY id DESC LIMIT 1", -1, &st,
	                       NULL) != SQLITE_OK)
		return -1;
	if (sqlite3_step(st) == SQLITE_ROW) {
		const char *h = (const char *)sqlite3_column_text(st, 1);
		max = sqlite3_column_int64(st, 0);
		snprintf(prev, 65, "%s", h ? h : "");
	}
	sqlite3_finalize(st);
	if (sqlite3_prepare_v2(db, "SELECT seq FROM sqlite_sequence WHERE name='events'", -1, &st,
	                       NULL) == SQLITE_OK) {
		if (sqlite3_step(st) == SQLITE_ROW)
			seq = sqlite3_column_int64(st, 0);
		sqlite3_finalize(st);
	}
	*next_id = (seq > max ? seq : max) + 1;
	return 0;
}

int store_chain_append(store_t *s, const char *at, const char *station, int64_t run_id,
                       const char *kind, const char *code, const char *message, const char *actor)
{
	char prev[65], hash[65];
	int64_t id;
	sqlite3_stmt *st;
	int rc;

	if (chain_tail(s->w, prev, &id))
		return SQLITE_ERROR;
	if (row_hash(json_pack("[I,s,o,o,s,o,o,o]", (json_int_t)id, at, str_or_null(station),
	                       run_id ? json_integer(run_id) : json_null(), kind, str_or_null(code),
	                       str_or_null(message), str_or_null(actor)),
	             prev, hash))
		return SQLITE_NOMEM;
	if (sqlite3_prepare_v2(s->w,
	                       "INSERT INTO events (id, at, station, run_id, kind, code, message, "
	                       "actor, hash) VALUES (?,?,?,NULLIF(?,0),?,?,?,?,?)",
	                       -1, &st, NULL) != SQLITE_OK)
		return SQLITE_ERROR;
	sqlite3_bind_int64(st, 1, id);
	sqlite3_bind_text(st, 2, at, -1, SQLITE_STATIC);
	const char *texts[] = {station, NULL, kind, code, message, actor, hash};
	for (int i = 0; i < 7; i++) {
		if (i == 1)
			sqlite3_bind_int64(st, 4, run_id);
		else if (texts[i])
			sqlite3_bind_text(st, 3 + i, texts[i], -1, SQLITE_STATIC);
		else
			sqlite3_bind_null(st, 3 + i);
	}
	rc = sqlite3_step(st);
	sqlite3_finalize(st);
	return rc;
}

int store_chain_backfill(store_t *s)
{
	char flag[16], prev[65] = CHAIN_GENESIS, hash[65];
	sqlite3_stmt *sel, *upd;
	int n = 0, rc = 0;

	store_meta_get(s->w, "events_chain", flag, sizeof flag);
	if (strcmp(flag, "pending"))
		return 0;
	if (sqlite3_exec(s->w, "BEGIN IMMEDIATE", NULL, NULL, NULL) != SQLITE_OK)
		return -1;
	if (sqlite3_prepare_v2(s->w,
	                       "SELECT id, at, station, run_id, kind, code, message, actor FROM "
	                       "events ORDER BY id",
	                       -1, &sel, NULL) != SQLITE_OK) {
		sqlite3_exec(s->w, "ROLLBACK", NULL, NULL, NULL);
		return -1;
	}
	if (sqlite3_prepare_v2(s->w, "UPDATE events SET hash=? WHERE id=?", -1, &upd, NULL) !=
	    SQLITE_OK) {
		sqlite3_finalize(sel);
		sqlite3_exec(s->w, "ROLLBACK", NULL, NULL, NULL);
		return -1;
	}
	while (!rc && sqlite3_step(sel) == SQLITE_ROW) {
		int64_t id = sqlite3_column_int64(sel, 0);
		if (row_hash(row_of(sel), prev, hash)) {
			rc = -1;
			break;
		}
		sqlite3_bind_text(upd, 1, hash, -1, SQLITE_STATIC);
		sqlite3_bind_int64(upd, 2, id);
		if (sqlite3_step(upd) != SQLITE_DONE)
			rc = -1;
		sqlite3_reset(upd);
		memcpy(prev, hash, sizeof prev);
		n++;
	}
	sqlite3_finalize(sel);
	sqlite3_finalize(upd);
	if (!rc && !store_meta_set(s->w, "events_chain", "on") &&
	    sqlite3_exec(s->w, "COMMIT", NULL, NULL, NULL) == SQLITE_OK) {
		if (n)
			log_notice("%s: the audit trail is chained from now on; its %d earlier "
			           "events were chained as they stood at this upgrade",
			           s->path, n);
		return 0;
	}
	sqlite3_exec(s->w, "ROLLBACK", NULL, NULL, NULL);
	return -1;
}

json_t *store_events_verify(store_t *s, bool *db_err)
{
	sqlite3 *db = NULL;
	sqlite3_stmt *st = NULL;
	char prev[65] = CHAIN_GENESIS, hash[65];
	json_t *broken = NULL, *out = NULL;
	int64_t n = 0, last_id = 0, issued = 0;
	int step;

	*db_err = false;
	/* A connection of its own: a long check never holds the writer or a
	 * reader the HTTP threads wait for. */
	if (sqlite3_open_v2(s->path, &db, SQLITE_OPEN_READONLY, NULL) != SQLITE_OK ||
	    store_setup_conn(db) || sqlite3_exec(db, "BEGIN", NULL, NULL, NULL) != SQLITE_OK ||
	    sqlite3_prepare_v2(db,
	                       "SELECT id, at, station, run_id, kind, code, message, actor, hash "
	                       "FROM events ORDER BY id",
	                       -1, &st, NULL) != SQLITE_OK)
		goto fail;
	while ((step = sqlite3_step(st)) == SQLITE_ROW) {
		const char *stored = (const char *)sqlite3_column_text(st, 8);
		int64_t id = sqlite3_column_int64(st, 0);
		json_t *row = row_of(st);
		json_t *copy = json_deep_copy(row);
		if (row_hash(row, prev, hash)) {
			json_decref(copy);
			goto fail;
		}
		n++;
		if (!stored || strcmp(stored, hash)) {
			broken = json_pack(
			    "{s:I,s:O,s:O,s:s}", "id", (json_int_t)id, "at",
			    json_array_get(copy, 1), "kind", json_array_get(copy, 4), "why",
			    !stored ? "it has no hash"
			            : "its hash does not match its content and the "
			              "previous event's hash: it, or the event before "
			              "it, was changed, inserted or deleted");
			json_decref(copy);
			break;
		}
		json_decref(copy);
		memcpy(prev, stored, sizeof prev);
		last_id = id;
	}
	if (!broken && step != SQLITE_DONE)
		goto fail;
	sqlite3_finalize(st);
	st = NULL;
	if (!broken && sqlite3_prepare_v2(db, "SELECT seq FROM sqlite_sequence WHERE name='events'",
	                                  -1, &st, NULL) == SQLITE_OK) {
		if (sqlite3_step(st) == SQLITE_ROW)
			issued = sqlite3_column_int64(st, 0);
		sqlite3_finalize(st);
		st = NULL;
		if (issued > last_id)
			/* The last rows are gone: the chain alone cannot show
			 * that, the id counter can (unless it was edited too). */
			broken =
			    json_pack("{s:I,s:n,s:n,s:s}", "id", (json_int_t)(last_id + 1), "at",
			              "kind", "why",
			              "events up to this id were written, and the last ones are "
			              "missing");
	}
	out = json_pack("{s:b,s:I,s:o,s:o}", "ok", broken == NULL, "checked", (json_int_t)n, "head",
	                last_id ? json_pack("{s:I,s:s}", "id", (json_int_t)last_id, "hash", prev)
	                        : json_null(),
	                "first_broken", broken ? broken : json_null());
	sqlite3_exec(db, "COMMIT", NULL, NULL, NULL);
	sqlite3_close(db);
	return out;
fail:
	json_decref(broken);
	sqlite3_finalize(st);
	if (db)
		sqlite3_close(db);
	*db_err = true;
	return NULL;
}
