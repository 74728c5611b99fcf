/* mqtt_pub.c: see mqtt_pub.h. One thread drives libmosquitto by
 * mosquitto_loop(), so the library's callbacks run on it and its state needs
 * no lock; only the counters /metrics reads are atomic. */
#include "mqtt_pub.h"
#include "http_routes.h"
#include "clock.h"
#include "log.h"

#include <errno.h>
#include <jansson.h>
#include <mosquitto.h>
#include <pthread.h>
#include <stdatomic.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

/* Outbox messages sent but not yet acknowledged: enough to keep a link with
 * tens of milliseconds of delay busy, few enough that a reconnect resends
 * little. */
#define WINDOW         32
#define BACKOFF_MIN_S  0.5
#define BACKOFF_MAX_S  5.0 /* a broker back from an outage is found within 5 s */
#define STATION_MIN_S  1.0 /* readings alone republish a station at most this often */
#define STATION_POLL_S 0.1 /* how often station snapshots are compared */
#define PRUNE_EVERY_S  60.0
#define LOOP_MS        50 /* mosquitto_loop's wait: also how soon a stop is seen */

typedef struct inflight {
	int mid;        /* libmosquitto's message id */
	int64_t row_id; /* its outbox row */
} inflight_t;

typedef struct station_pub {
	char *key;  /* state, phase, run, queued, held, error: a change is sent at once */
	char *full; /* everything but the reading's age: a change is sent within 1 s */
	double sent_mono_s;
} station_pub_t;

struct mqtt_pub {
	const cfg_mqtt_t *m;
	store_t *store;
	station_t **stations;
	int n_stations;
	struct series_service *series; /* for the station JSON's `series`; may be NULL */
	char prefix[CFG_TOPIC_MAX];
	char client_id[96];
	pthread_t thread;
	atomic_bool stop;
	/* thread-only state */
	struct mosquitto *mosq;
	bool connected;   /* CONNACK accepted, until the link drops */
	bool announced;   /* online and every station sent on this connection */
	bool logged_down; /* the current outage is in the log */
	int n_inflight;
	inflight_t inflight[WINDOW];
	int64_t last_sent_id;      /* outbox rows up to this are sent on this connection */
	int64_t acked[2 * WINDOW]; /* rows to remove: acknowledged, or gone */
	int n_acked;
	station_pub_t st[CFG_MAX_STATIONS];
	/* for /metrics */
	atomic_bool up;
	atomic_long published, dropped, reconnects;
};

/* prefix/leaf; the prefix is at most CFG_TOPIC_MAX - 1 and a leaf at most
 * "stations/" and a station name, so the buffers below hold every topic. */
static void topic(const mqtt_pub_t *p, const char *leaf, char *out, size_t cap)
{
	if (snprintf(out, cap, "%s/%s", p->prefix, leaf) >= (int)cap)
		out[0] = '\0';
}

/* ---- callbacks (on the publisher's thread, inside mosquitto_loop) ---- */

static void on_connect(struct mosquitto *mosq, void *obj, int rc)
{
	mqtt_pub_t *p = obj;
	(void)mosq;
	if (rc == 0) {
		p->connected = true;
		p->logged_down = false;
		atomic_store(&p->up, true);
		log_notice("mqtt: connected to %s:%d as %s, topics under %s/", p->m->host,
		           p->m->port, p->client_id, p->prefix);
	} else if (!p->logged_down) {
		p->logged_down = true;
		log_warn("mqtt: %s:%d refused the connection: %s", p->m->host, p->m->port,
		         mosquitto_connack_string(rc));
	}
}

static void on_publish(struct mosquitto *mosq, void *obj, int mid)
{
	mqtt_pub_t *p = obj;
	(void)mosq;
	for (int i = 0; i < p->n_inflight; i++)
		if (p->inflight[i].mid == mid) {
			p->acked[p->n_acked++] = p->inflight[i].row_id;
			p->inflight[i] = p->inflight[--p->n_inflight];
			return;
		}
}

/* ---- one connection ---- */

static void drop_connection(mqtt_pub_t *p)
{
	if (p->mosq) {
		mosquitto_destroy(p->mosq);
		p->mosq = NULL;
	}
	if (p->connected)
		atomic_fetch_add(&p->reconnects, 1);
	p->connected = false;
	p->announced = false;
	atomic_store(&p->up, false);
	/* what was not acknowledged is sent again on the next connection */
	p->n_inflight = 0;
	p->last_sent_id = 0;
}

static int try_connect(mqtt_pub_t *p)
{
	const cfg_mqtt_t *m = p->m;
	char t[CFG_TOPIC_MAX + 64];
	int rc;

	p->mosq = mosquitto_new(p->client_id, true, p);
	if (!p->mosq)
		return -1;
	mosquitto_connect_callback_set(p->mosq, on_connect);
	mosquitto_publish_callback_set(p->mosq, on_publish);
	mosquitto_int_option(p->mosq, MOSQ_OPT_PROTOCOL_VERSION, MQTT_PROTOCOL_V311);
	mosquitto_max_inflight_messages_set(p->mosq, WINDOW + 8);
	topic(p, "status", t, sizeof t);
	mosquitto_will_set(p->mosq, t, 7, "offline", 1, true);
	if (m->username[0]) {
		/* read at each connection, so a changed password needs no restart;
		 * kept no longer than libmosquitto needs it, and never logged */
		char pw[256] = "";
		diag_list_t d = DIAG_LIST_INIT;
		if (m->password_file[0] && cfg_read_secret(m->password_file, pw, sizeof pw, &d)) {
			if (!p->logged_down)
				log_warn("mqtt: %s:%d: %s", d.v[0].file, d.v[0].line, d.v[0].msg);
			p->logged_down = true;
			diag_free(&d);
			return -1;
		}
		rc = mosquitto_username_pw_set(p->mosq, m->username, pw[0] ? pw : NULL);
		memset(pw, 0, sizeof pw);
		if (rc != MOSQ_ERR_SUCCESS)
			return -1;
	}
	if (m->tls) {
		rc = mosquitto_tls_set(p->mosq, m->ca_file, NULL,
		                       m->cert_file[0] ? m->cert_file : NULL,
		                       m->key_file[0] ? m->key_file : NULL, NULL);
		if (rc != MOSQ_ERR_SUCCESS) {
			if (!p->logged_down)
				log_warn("mqtt: TLS set-up failed: %s", mosquitto_strerror(rc));
			p->logged_down = true;
			return -1;
		}
	}
	rc = mosquitto_connect_async(p->mosq, m->host, m->port, (int)m->keepalive_s);
	if (rc != MOSQ_ERR_SUCCESS) {
		if (!p->logged_down)
			log_warn("mqtt: cannot reach %s:%d: %s (retrying)", m->host, m->port,
			         rc == MOSQ_ERR_ERRNO ? strerror(errno) : mosquitto_strerror(rc));
		p->logged_down = true;
		return -1;
	}
	return 0;
}

/* ---- what is published ---- */

static int publish(mqtt_pub_t *p, const char *leaf, const char *payload, bool retain, int *mid)
{
	char t[CFG_TOPIC_MAX + 64];
	topic(p, leaf, t, sizeof t);
	return mosquitto_publish(p->mosq, mid, t, (int)strlen(payload), payload, 1, retain) ==
	               MOSQ_ERR_SUCCESS
	           ? 0
	           : -1;
}

/* The station as GET /v1/stations gives it; *key and *cmp for the change
 * tests (malloc'd). NULL on out of memory. */
static char *station_texts(mqtt_pub_t *p, station_t *st, char **key, char **cmp)
{
	json_t *j = http_station_json(p->series, st);
	char *full = j ? json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
	json_t *k =
	    j ? json_pack("{s:O*,s:O*,s:O*,s:O*,s:O*,s:O*}", "state", json_object_get(j, "state"),
	                  "phase", json_object_get(j, "phase"), "run", json_object_get(j, "run"),
	                  "queued", json_object_get(j, "queued"), "held",
	                  json_object_get(j, "held"), "error", json_object_get(j, "error"))
	      : NULL;

	*key = k ? json_dumps(k, JSON_COMPACT | JSON_SORT_KEYS) : NULL;
	json_object_del(json_object_get(j, "reading"), "age_s");
	*cmp = j ? json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10)) : NULL;
	json_decref(k);
	json_decref(j);
	if (!full || !*key || !*cmp) {
		free(full);
		free(*key);
		free(*cmp);
		*key = *cmp = NULL;
		return NULL;
	}
	return full;
}

static void publish_stations(mqtt_pub_t *p, bool force)
{
	double now = clock_mono_s();

	for (int i = 0; i < p->n_stations; i++) {
		station_pub_t *s = &p->st[i];
		char *key, *cmp, *full = station_texts(p, p->stations[i], &key, &cmp);
		char leaf[64];
		bool changed_key = !s->key || strcmp(key ? key : "", s->key);
		bool changed = !s->full || strcmp(cmp ? cmp : "", s->full);

		if (full &&
		    (force || changed_key || (changed && now - s->sent_mono_s >= STATION_MIN_S))) {
			snprintf(leaf, sizeof leaf, "stations/%s", station_name(p->stations[i]));
			if (publish(p, leaf, full, true, NULL) == 0) {
				free(s->key);
				free(s->full);
				s->key = key;
				s->full = cmp;
				s->sent_mono_s = now;
				key = cmp = NULL;
			}
		}
		free(full);
		free(key);
		free(cmp);
	}
}

/* The payload of an outbox row: the run's record as GET /v1/runs/{id}, the
 * series as GET /v1/series/{id}, or the event as GET /v1/events lists it.
 * NULL with *gone when it no longer exists, NULL alone on a database error. */
static char *payload_of(mqtt_pub_t *p, const store_outbox_msg_t *m, bool *gone)
{
	bool db_err = false;
	json_t *j = NULL, *wrap = NULL;
	char *out;

	*gone = false;
	if (m->is_result) {
		j = store_run_json(p->store, m->ref, &db_err);
	} else if (m->is_series) {
		j = store_series_json(p->store, m->ref, &db_err);
	} else {
		wrap = store_events_after(p->store, m->ref - 1, 1, &db_err);
		json_t *e = json_array_get(json_object_get(wrap, "events"), 0);
		if (e && json_integer_value(json_object_get(e, "id")) == m->ref)
			j = json_incref(e);
		json_decref(wrap);
	}
	if (!j) {
		*gone = !db_err;
		return NULL;
	}
	out = json_dumps(j, JSON_COMPACT | JSON_REAL_PRECISION(10));
	json_decref(j);
	return out;
}

/* Fill the window from the outbox, oldest first. */
static void feed_outbox(mqtt_pub_t *p)
{
	store_outbox_msg_t rows[WINDOW];
	int n, room = WINDOW - p->n_inflight;

	if (room <= 0)
		return;
	n = store_outbox_peek(p->store, p->last_sent_id, rows, room);
	for (int i = 0; i < n; i++) {
		bool gone;
		int mid;
		char *body = payload_of(p, &rows[i], &gone);
		if (!body) {
			if (gone) /* nothing to send: the row goes */
				p->acked[p->n_acked++] = rows[i].id;
			else
				return; /* the database failed: try again later */
			p->last_sent_id = rows[i].id;
			continue;
		}
		if (publish(p,
		            rows[i].is_result   ? "results"
		            : rows[i].is_series ? "series"
		                                : "events",
		            body, false, &mid)) {
			free(body);
			return;
		}
		free(body);
		p->inflight[p->n_inflight].mid = mid;
		p->inflight[p->n_inflight].row_id = rows[i].id;
		p->n_inflight++;
		p->last_sent_id = rows[i].id;
	}
}

static void flush_acked(mqtt_pub_t *p)
{
	if (p->n_acked == 0)
		return;
	if (store_outbox_remove(p->store, p->acked, p->n_acked) == STORE_OK)
		atomic_fetch_add(&p->published, p->n_acked);
	/* a failed removal only means those are sent again (a repeat, not a loss) */
	p->n_acked = 0;
}

static void prune(mqtt_pub_t *p)
{
	long n = store_outbox_prune(p->store, (long)p->m->outbox_max_messages,
	                            p->m->outbox_max_age_days * 86400.0, clock_wall_s());
	if (n > 0) {
		atomic_fetch_add(&p->dropped, n);
		log_warn(
		    "mqtt: the outbox policy dropped %ld unsent message%s (older than %u days or "
		    "beyond %u); they stay in GET /v1/results and /v1/events",
		    n, n == 1 ? "" : "s", p->m->outbox_max_age_days, p->m->outbox_max_messages);
	}
}

/* Sleep s seconds unless asked to stop. */
static void nap(mqtt_pub_t *p, double s)
{
	for (double t = 0; t < s && !atomic_load(&p->stop); t += 0.05)
		clock_sleep_s(0.05);
}

static void *publisher(void *arg)
{
	mqtt_pub_t *p = arg;
	double backoff = BACKOFF_MIN_S, station_check = 0, prune_at = 0;

	while (!atomic_load(&p->stop)) {
		double now = clock_mono_s();
		if (now >= prune_at) {
			prune(p);
			prune_at = now + PRUNE_EVERY_S;
		}
		if (!p->mosq && try_connect(p)) {
			drop_connection(p);
			nap(p, backoff);
			backoff = backoff * 2 > BACKOFF_MAX_S ? BACKOFF_MAX_S : backoff * 2;
			continue;
		}
		int rc = mosquitto_loop(p->mosq, LOOP_MS, 1);
		flush_acked(p);
		if (rc != MOSQ_ERR_SUCCESS) {
			if (p->connected)
				log_warn("mqtt: lost %s:%d (%s); results wait in the outbox",
				         p->m->host, p->m->port, mosquitto_strerror(rc));
			p->logged_down = p->logged_down || p->connected;
			drop_connection(p);
			nap(p, backoff);
			backoff = backoff * 2 > BACKOFF_MAX_S ? BACKOFF_MAX_S : backoff * 2;
			continue;
		}
		if (!p->connected)
			continue;
		backoff = BACKOFF_MIN_S;
		if (!p->announced) {
			publish(p, "status", "online", true, NULL);
			publish_stations(p, true);
			p->announced = true;
			station_check = now;
		}
		if (now - station_check >= STATION_POLL_S) {
			publish_stations(p, false);
			station_check = now;
		}
		feed_outbox(p);
	}
	/* A clean stop: offline now (the will is only for a broken link), and
	 * a short wait for what is in flight to be acknowledged. */
	if (p->mosq && p->connected) {
		double until = clock_mono_s() + 2.0;
		int mid = -1;
		publish(p, "status", "offline", true, &mid);
		while (clock_mono_s() < until && p->n_inflight > 0 &&
		       mosquitto_loop(p->mosq, LOOP_MS, 1) == MOSQ_ERR_SUCCESS)
			flush_acked(p);
		for (int i = 0; i < 4 && mosquitto_want_write(p->mosq); i++)
			mosquitto_loop(p->mosq, LOOP_MS, 1);
		mosquitto_disconnect(p->mosq);
		mosquitto_loop(p->mosq, LOOP_MS, 1);
		flush_acked(p);
	}
	drop_connection(p);
	return NULL;
}

/* The default prefix and client id carry the host name (docs/mqtt.md). */
static void names(mqtt_pub_t *p, const cfg_mqtt_t *m)
{
	char host[128] = "localhost";

	if (gethostname(host, sizeof host - 1) != 0 || !host[0])
		snprintf(host, sizeof host, "localhost");
	host[sizeof host - 1] = '\0';
	for (char *c = host; *c; c++)
		if (*c == '+' || *c == '#' || *c == '/')
			*c = '-';
	if (m->topic_prefix[0])
		snprintf(p->prefix, sizeof p->prefix, "%s", m->topic_prefix);
	else
		snprintf(p->prefix, sizeof p->prefix, "stopcock/%.180s", host);
	if (m->client_id[0])
		snprintf(p->client_id, sizeof p->client_id, "%s", m->client_id);
	else
		snprintf(p->client_id, sizeof p->client_id, "stopcock-%.60s-%ld", host,
		         (long)getpid());
}

mqtt_pub_t *mqtt_pub_start(const cfg_t *cfg, store_t *store, station_t **stations, int n,
                           struct series_service *series, char *err, size_t cap)
{
	mqtt_pub_t *p = calloc(1, sizeof *p);

	if (!p) {
		snprintf(err, cap, "out of memory");
		return NULL;
	}
	p->m = &cfg->mqtt;
	p->store = store;
	p->stations = stations;
	p->n_stations = n;
	p->series = series;
	names(p, &cfg->mqtt);
	mosquitto_lib_init();
	if (pthread_create(&p->thread, NULL, publisher, p)) {
		snprintf(err, cap, "cannot start the publisher thread");
		mosquitto_lib_cleanup();
		free(p);
		return NULL;
	}
	return p;
}

void mqtt_pub_stop(mqtt_pub_t *p)
{
	if (!p)
		return;
	atomic_store(&p->stop, true);
	pthread_join(p->thread, NULL);
	for (int i = 0; i < CFG_MAX_STATIONS; i++) {
		free(p->st[i].key);
		free(p->st[i].full);
	}
	mosquitto_lib_cleanup();
	free(p);
}

void mqtt_pub_metrics(mqtt_pub_t *p, store_t *store, sbuf_t *b)
{
	long count = 0;
	double age = 0;

	if (!p)
		return;
	store_outbox_stats(store, &count, &age, clock_wall_s());
	sbuf_addf(b,
	          "# TYPE stopcock_mqtt_connected gauge\n"
	          "# HELP stopcock_mqtt_connected 1 while the broker has accepted the connection.\n"
	          "stopcock_mqtt_connected %d\n"
	          "# TYPE stopcock_mqtt_outbox_messages gauge\n"
	          "# HELP stopcock_mqtt_outbox_messages Results, series and events not yet "
	          "acknowledged by the broker.\n"
	          "stopcock_mqtt_outbox_messages %ld\n"
	          "# TYPE stopcock_mqtt_outbox_oldest_seconds gauge\n"
	          "# UNIT stopcock_mqtt_outbox_oldest_seconds seconds\n"
	          "stopcock_mqtt_outbox_oldest_seconds %.0f\n"
	          "# TYPE stopcock_mqtt_published counter\n"
	          "# HELP stopcock_mqtt_published Outbox messages the broker acknowledged.\n"
	          "stopcock_mqtt_published_total %ld\n"
	          "# TYPE stopcock_mqtt_outbox_dropped counter\n"
	          "# HELP stopcock_mqtt_outbox_dropped Unsent messages the outbox policy "
	          "dropped.\n"
	          "stopcock_mqtt_outbox_dropped_total %ld\n"
	          "# TYPE stopcock_mqtt_reconnects counter\n"
	          "stopcock_mqtt_reconnects_total %ld\n",
	          atomic_load(&p->up) ? 1 : 0, count, age, atomic_load(&p->published),
	          atomic_load(&p->dropped), atomic_load(&p->reconnects));
}
