/* store_priv.h: what store.c and store_read.c share; nothing else includes it. */
#ifndef STOPCOCK_STORE_PRIV_H
#define STOPCOCK_STORE_PRIV_H

#include <pthread.h>
#include <sqlite3.h>
#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>

#define STORE_READERS 8

struct store {
	char path[1024];
	sqlite3 *w; /* the one writer connection, under wlock */
	pthread_mutex_t wlock;
	pthread_mutex_t rlock;     /* guards r[] and r_busy[] */
	sqlite3 *r[STORE_READERS]; /* read-only connections, opened lazily */
	bool r_busy[STORE_READERS];
	/* The database's history (docs/lims.md, "After a restore"): a new one
	 * whenever the database went back in time (a restored backup). */
	char history[33];
	int64_t seq_floor;     /* seqs are issued above this (the lost history's) */
	int64_t restored_upto; /* runs up to this id left unfinished by a backup */
};

/* busy_timeout, synchronous=FULL, foreign_keys=ON. */
int store_setup_conn(sqlite3 *db);

/* The meta table (key, value) on a connection. */
void store_meta_get(sqlite3 *db, const char *key, char *out, size_t cap);
int store_meta_set(sqlite3 *db, const char *key, const char *value);

/* store_chain.c. Add one event row with its chain hash; the caller holds
 * wlock (and may be inside a transaction). An SQLite step result. */
int store_chain_append(store_t *s, const char *at, const char *station, int64_t run_id,
                       const char *kind, const char *code, const char *message, const char *actor);
/* At open, after the migration that brought the hash column: chain the rows
 * from before it, once (meta "events_chain" goes from "pending" to "on"). */
int store_chain_backfill(store_t *s);

#endif
