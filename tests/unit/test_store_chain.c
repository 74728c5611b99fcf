/* test_store_chain.c: the audit trail's hash chain (daemon/store/
 * store_chain.c): an intact trail verifies; a changed, deleted or unhashed
 * row is named; the rows from before the chain are chained once, at the
 * first open after the migration. */
#include <sqlite3.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "harness.h"
#include "store.h"

static store_t *open_at(const char *path)
{
	char err[256];
	return store_open(path, err, sizeof err);
}

static void tmp_paths(char dir[64], char path[128])
{
	snprintf(dir, 64, "/tmp/stopcock-chain-XXXXXX");
	if (!mkdtemp(dir))
		dir[0] = '\0';
	snprintf(path, 128, "%s/t.db", dir);
}

static void rm_tmp(const char *dir)
{
	char p[160];
	const char *sfx[] = {"t.db", "t.db-wal", "t.db-shm", "t.db.issued"};
	for (int i = 0; i < 4; i++) {
		snprintf(p, sizeof p, "%s/%s", dir, sfx[i]);
		unlink(p);
	}
	rmdir(dir);
}

/* Run SQL on the file behind the daemon's back, as someone with the
 * database would. */
static int tamper(const char *path, const char *sql)
{
	sqlite3 *db;
	int rc;
	if (sqlite3_open(path, &db) != SQLITE_OK)
		return -1;
	sqlite3_busy_timeout(db, 5000);
	rc = sqlite3_exec(db, sql, NULL, NULL, NULL);
	sqlite3_close(db);
	return rc == SQLITE_OK ? 0 : -1;
}

static void add_events(store_t *s, int n)
{
	for (int i = 0; i < n; i++) {
		char msg[32];
		snprintf(msg, sizeof msg, "event %d", i + 1);
		store_event_add(s, NULL, i % 2 ? "sim1" : NULL, i % 3 ? i : 0, "run", "queued", msg,
		                "ana");
	}
}

/* first_broken's id, 0 when the chain holds, -1 on an error. */
static long long broken_at(store_t *s, long long *checked)
{
	bool db_err;
	json_t *j = store_events_verify(s, &db_err);
	long long id;
	if (!j)
		return -1;
	*checked = (long long)json_integer_value(json_object_get(j, "checked"));
	json_t *b = json_object_get(j, "first_broken");
	id = json_is_object(b) ? (long long)json_integer_value(json_object_get(b, "id")) : 0;
	if (!json_is_true(json_object_get(j, "ok")) != (id != 0))
		id = -1; /* "ok" and "first_broken" disagree */
	json_decref(j);
	return id;
}

TEST(chain_verifies_and_names_a_changed_row)
{
	char dir[64], path[128];
	long long n;
	tmp_paths(dir, path);
	store_t *s = open_at(path);
	REQUIRE(s);
	add_events(s, 6);
	CHECK_INT(broken_at(s, &n), 0);
	CHECK_INT(n, 6);
	/* a word of one message changed: that row */
	REQUIRE(tamper(path, "UPDATE events SET message='event 99' WHERE id=4") == 0);
	CHECK_INT(broken_at(s, &n), 4);
	REQUIRE(tamper(path, "UPDATE events SET message='event 4' WHERE id=4") == 0);
	CHECK_INT(broken_at(s, &n), 0);
	/* another actor, or a run id taken away */
	REQUIRE(tamper(path, "UPDATE events SET actor='qa' WHERE id=2") == 0);
	CHECK_INT(broken_at(s, &n), 2);
	REQUIRE(tamper(path, "UPDATE events SET actor='ana' WHERE id=2") == 0);
	REQUIRE(tamper(path, "UPDATE events SET run_id=NULL WHERE id=5") == 0);
	CHECK_INT(broken_at(s, &n), 5);
	store_close(s);
	rm_tmp(dir);
}

TEST(chain_names_a_deleted_row_and_a_lost_tail)
{
	char dir[64], path[128];
	long long n;
	tmp_paths(dir, path);
	store_t *s = open_at(path);
	REQUIRE(s);
	add_events(s, 5);
	/* the last rows gone: the ids issued say so */
	REQUIRE(tamper(path, "DELETE FROM events WHERE id=5") == 0);
	CHECK_INT(broken_at(s, &n), 5);
	/* a row in the middle gone: the next one no longer chains */
	REQUIRE(tamper(path, "DELETE FROM events WHERE id=3") == 0);
	CHECK_INT(broken_at(s, &n), 4);
	store_close(s);
	rm_tmp(dir);
}

TEST(chain_rows_from_before_are_chained_once_at_upgrade)
{
	char dir[64], path[128];
	long long n;
	tmp_paths(dir, path);
	store_t *s = open_at(path);
	REQUIRE(s);
	add_events(s, 4);
	store_close(s);
	/* As the migration leaves a database from before the chain. */
	REQUIRE(tamper(path, "UPDATE events SET hash=NULL; INSERT OR REPLACE INTO meta VALUES "
	                     "('events_chain','pending')") == 0);
	s = open_at(path);
	REQUIRE(s);
	CHECK_INT(broken_at(s, &n), 0);
	CHECK_INT(n, 4);
	add_events(s, 1); /* and new events chain on from them */
	CHECK_INT(broken_at(s, &n), 0);
	CHECK_INT(n, 5);
	store_close(s);
	/* Later, a hash taken away is not filled in again by an open. */
	REQUIRE(tamper(path, "UPDATE events SET hash=NULL WHERE id=3") == 0);
	s = open_at(path);
	REQUIRE(s);
	CHECK_INT(broken_at(s, &n), 3);
	store_close(s);
	rm_tmp(dir);
}
