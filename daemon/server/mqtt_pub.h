/* mqtt_pub.h: publishing to an MQTT broker (docs/mqtt.md), on a thread of
 * its own.
 *
 * The publisher only reads: the outbox the store fills in the transactions
 * that make runs final and add events (store.h, "the MQTT outbox"), the run
 * records and events themselves, and the station snapshots (as GET
 * /v1/stations gives them). A station thread never waits for it, and a slow
 * or absent broker only makes the outbox longer.
 *
 * Topics under the prefix: status (retained online/offline, offline as the
 * last will), stations/<name> (retained station state), results (each final
 * run record, QoS 1, in seq order), events (the audit trail, QoS 1). An
 * outbox row is removed only after the broker's PUBACK for it; after a lost
 * connection everything unacknowledged is sent again, oldest first, so a
 * subscriber that drops repeats of (prefix, seq) sees each result once.
 */
#ifndef STOPCOCK_MQTT_PUB_H
#define STOPCOCK_MQTT_PUB_H

#include "config.h"
#include "sbuf.h"
#include "station.h"
#include "store.h"

typedef struct mqtt_pub mqtt_pub_t;

/* Start the thread (cfg->mqtt.enabled). The config and stations must
 * outlive it. NULL with a message in err when the thread cannot start; a
 * broker that cannot be reached is no error (it is retried). */
struct series_service;
mqtt_pub_t *mqtt_pub_start(const cfg_t *cfg, store_t *store, station_t **stations, int n,
                           struct series_service *series, char *err, size_t cap);
/* Publish `offline`, disconnect, join and free; NULL is a no-op. */
void mqtt_pub_stop(mqtt_pub_t *p);

/* The publisher's lines of /metrics (nothing when p is NULL). */
void mqtt_pub_metrics(mqtt_pub_t *p, store_t *store, sbuf_t *b);

#endif
