/* config.c: see config.h. */
#include "config.h"
#include "text.h"
#include "names.h"

#include <arpa/inet.h>
#include <errno.h>
#include <unistd.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static const char *const top_keys[] = {
    "http", "storage", "methods_dir",    "stations",         "calibration", "standardization",
    "mqtt", "records", "notify_command", "notify_timeout_s", NULL};
static const char *const records_keys[] = {"titer_required", "titer_valid_days", "blank_valid_days",
                                           "lab_name", NULL};
/* clang-format off */
static const char *const http_keys[] = {
    "listen",     "token_file",     "read_needs_token",     "max_connections",
    "max_per_ip", "max_body_bytes", "connection_timeout_s", "request_deadline_s",
    "threads",    "allowed_hosts",  NULL};
/* clang-format on */
static const char *const storage_keys[] = {"database", NULL};
static const char *const station_keys[] = {
    "name",    "vessel_max_ml", "read_interval_s", "burette", "probe",
    "stirrer", "dosers",        "changer",         "balance", NULL};

int cfg_parse_listen(const char *s, char *addr, size_t addr_cap, int *port)
{
	const char *colon;
	const char *a = s;
	size_t alen;
	char *end;
	long p;
	unsigned char buf[16];

	if (!s || !*s)
		return -1;
	if (s[0] == '[') {
		const char *rb = strchr(s, ']');
		if (!rb || rb[1] != ':')
			return -1;
		a = s + 1;
		alen = (size_t)(rb - a);
		colon = rb + 1;
	} else {
		colon = strrchr(s, ':');
		if (!colon)
			return -1;
		alen = (size_t)(colon - s);
	}
	if (alen == 0 || alen >= addr_cap)
		return -1;
	memcpy(addr, a, alen);
	addr[alen] = '\0';
	errno = 0;
	p = strtol(colon + 1, &end, 10);
	if (errno || *end || end == colon + 1 || p < 0 || p > 65535)
		return -1;
	if (inet_pton(AF_INET, addr, buf) != 1 && inet_pton(AF_INET6, addr, buf) != 1)
		return -1;
	*port = (int)p;
	return 0;
}

void cfg_resolve_path(const char *base_file, const char *rel, char *out, size_t cap)
{
	const char *slash;

	if (rel[0] == '/' || !base_file || !(slash = strrchr(base_file, '/'))) {
		snprintf(out, cap, "%s", rel);
		return;
	}
	snprintf(out, cap, "%.*s/%s", (int)(slash - base_file), base_file, rel);
}

static void get_uint(const yt_doc_t *doc, const yt_node_t *m, const char *key, const char *name,
                     long lo, long hi, unsigned *out, diag_list_t *d)
{
	const yt_node_t *n = yt_get(m, key);
	long v;

	if (n && yt_long(doc, n, name, lo, hi, &v, d))
		*out = (unsigned)v;
}

static void get_path(const cfg_t *c, const yt_node_t *n, const char *name, char *out, size_t cap,
                     diag_list_t *d)
{
	char tmp[CFG_PATH_MAX];

	if (!yt_string(&c->doc, n, name, tmp, sizeof tmp, d))
		return;
	cfg_resolve_path(c->path, tmp, out, cap);
}

/* A host name as a Host header gives it: letters, digits, '-' and '.',
 * no empty label; kept in lower case without a trailing dot. */
static bool parse_host_name(const char *s, char *out, size_t cap)
{
	size_t n = strlen(s), label = 0;

	if (n > 0 && s[n - 1] == '.')
		n--;
	if (n == 0 || n >= cap)
		return false;
	for (size_t i = 0; i < n; i++) {
		char ch = s[i];
		if (ch >= 'A' && ch <= 'Z')
			ch = (char)(ch - 'A' + 'a');
		if (ch == '.') {
			if (label == 0)
				return false;
			label = 0;
		} else if ((ch >= 'a' && ch <= 'z') || (ch >= '0' && ch <= '9') || ch == '-') {
			label++;
		} else {
			return false;
		}
		out[i] = ch;
	}
	out[n] = '\0';
	return label > 0;
}

static void parse_allowed_hosts(cfg_t *c, const yt_node_t *n, diag_list_t *d)
{
	if (!yt_want_seq(&c->doc, n, "http.allowed_hosts", d))
		return;
	c->n_allowed_hosts = 0;
	for (size_t i = 0; i < n->n; i++) {
		char tmp[CFG_HOST_MAX + 2];
		if (c->n_allowed_hosts >= CFG_MAX_HOSTS) {
			yt_error(&c->doc, n->items[i], d,
			         "http.allowed_hosts holds at most %d names", CFG_MAX_HOSTS);
			return;
		}
		if (!yt_string(&c->doc, n->items[i], "http.allowed_hosts", tmp, sizeof tmp, d))
			continue;
		if (!parse_host_name(tmp, c->allowed_hosts[c->n_allowed_hosts],
		                     sizeof c->allowed_hosts[0]))
			yt_error(
			    &c->doc, n->items[i], d,
			    "http.allowed_hosts: '%s' is not a host name (letters, digits, '-' "
			    "and '.'; no port; IP addresses are always allowed)",
			    tmp);
		else
			c->n_allowed_hosts++;
	}
}

static void parse_http(cfg_t *c, const yt_node_t *h, diag_list_t *d)
{
	const yt_node_t *n;

	if (!yt_want_map(&c->doc, h, "http", d))
		return;
	yt_check_keys(&c->doc, h, http_keys, "http", d);
	if ((n = yt_get(h, "listen"))) {
		char tmp[128];
		if (yt_string(&c->doc, n, "http.listen", tmp, sizeof tmp, d) &&
		    cfg_parse_listen(tmp, c->listen_addr, sizeof c->listen_addr, &c->listen_port))
			yt_error(&c->doc, n, d,
			         "http.listen must be ADDR:PORT with a numeric address, e.g. "
			         "127.0.0.1:8470 (got '%s')",
			         tmp);
	}
	if ((n = yt_get(h, "token_file")))
		get_path(c, n, "http.token_file", c->token_file, sizeof c->token_file, d);
	if ((n = yt_get(h, "read_needs_token")))
		yt_bool(&c->doc, n, "http.read_needs_token", &c->read_needs_token, d);
	get_uint(&c->doc, h, "max_connections", "http.max_connections", 1, 10000,
	         &c->max_connections, d);
	get_uint(&c->doc, h, "max_per_ip", "http.max_per_ip", 0, 10000, &c->max_per_ip, d);
	get_uint(&c->doc, h, "max_body_bytes", "http.max_body_bytes", 1024, 16L * 1024 * 1024,
	         &c->max_body_bytes, d);
	get_uint(&c->doc, h, "connection_timeout_s", "http.connection_timeout_s", 1, 3600,
	         &c->connection_timeout_s, d);
	get_uint(&c->doc, h, "request_deadline_s", "http.request_deadline_s", 1, 3600,
	         &c->request_deadline_s, d);
	get_uint(&c->doc, h, "threads", "http.threads", 2, 64, &c->threads, d);
	if ((n = yt_get(h, "allowed_hosts")))
		parse_allowed_hosts(c, n, d);
}

/* dosers: {NAME: {reagent: TEXT, molarity: M, burette: {driver: ...}}}. A
 * molarity is the reagent's nominal one: 0.00001 to 20 mol/L, from trace
 * standards to concentrated acids. */
static void parse_dosers(cfg_t *c, cfg_station_t *st, const yt_node_t *n, diag_list_t *d)
{
	static const char *const doser_keys[] = {"reagent", "molarity", "burette", NULL};
	if (yt_is_null(n))
		return;
	if (!yt_want_map(&c->doc, n, "dosers", d))
		return;
	for (size_t i = 0; i < n->n; i++) {
		const yt_node_t *key = n->keys[i], *u = n->items[i], *v;
		char where[96];
		snprintf(where, sizeof where, "dosers.%s", key->str);
		if (st->n_dosers >= CFG_MAX_DOSERS) {
			yt_error(&c->doc, key, d, "a station has at most %d dosers",
			         CFG_MAX_DOSERS);
			return;
		}
		if (!name_is_id(key->str, CFG_NAME_MAX)) {
			yt_error(&c->doc, key, d,
			         "doser name must be 1 to %d lower-case letters, digits and '-' "
			         "(got '%s')",
			         CFG_NAME_MAX - 1, key->str);
			continue;
		}
		if (!yt_want_map(&c->doc, u, where, d))
			continue;
		cfg_doser_t *ds = &st->dosers[st->n_dosers++];
		memset(ds, 0, sizeof *ds);
		snprintf(ds->name, sizeof ds->name, "%s", key->str);
		ds->line = u->line;
		ds->col = u->col;
		yt_check_keys(&c->doc, u, doser_keys, where, d);
		char path[128];
		snprintf(path, sizeof path, "%s.reagent", where);
		if (!(v = yt_get(u, "reagent")))
			yt_missing(&c->doc, u, "reagent", where, d);
		else
			yt_string(&c->doc, v, path, ds->reagent, sizeof ds->reagent, d);
		snprintf(path, sizeof path, "%s.molarity", where);
		if (!(v = yt_get(u, "molarity")))
			yt_missing(&c->doc, u, "molarity", where, d);
		else
			yt_double_range(&c->doc, v, path, "mol/L", 0.00001, 20.0, &ds->molarity, d);
		snprintf(path, sizeof path, "%s.burette", where);
		if (!(ds->burette = yt_get(u, "burette")))
			yt_missing(&c->doc, u, "burette", where, d);
		else if (!yt_want_map(&c->doc, ds->burette, path, d))
			ds->burette = NULL;
	}
}

static void parse_station(cfg_t *c, const yt_node_t *s, diag_list_t *d)
{
	cfg_station_t *st;
	const yt_node_t *n;

	if (!yt_want_map(&c->doc, s, "station", d))
		return;
	if (c->n_stations >= CFG_MAX_STATIONS) {
		yt_error(&c->doc, s, d, "at most %d stations are supported", CFG_MAX_STATIONS);
		return;
	}
	st = &c->stations[c->n_stations++];
	memset(st, 0, sizeof *st);
	st->line = s->line;
	st->col = s->col;
	yt_check_keys(&c->doc, s, station_keys, "station", d);
	if (!(n = yt_get(s, "name"))) {
		yt_missing(&c->doc, s, "name", "station", d);
	} else if (yt_string(&c->doc, n, "name", st->name, sizeof st->name, d)) {
		if (!name_is_id(st->name, 0))
			yt_error(&c->doc, n, d,
			         "station name must be lower-case letters, digits and '-' "
			         "(got '%s')",
			         st->name);
		for (int i = 0; i < c->n_stations - 1; i++)
			if (!strcmp(c->stations[i].name, st->name))
				yt_error(&c->doc, n, d, "station name '%s' is used twice",
				         st->name);
	}
	if (!(n = yt_get(s, "vessel_max_ml")))
		yt_missing(&c->doc, s, "vessel_max_ml", "station", d);
	else
		yt_double_range(&c->doc, n, "vessel_max_ml", "mL", 1.0, 10000.0, &st->vessel_max_ml,
		                d);
	/* How often the probe is read while a reading settles: 0.5 s suits
	 * most transmitters (common practice); a faster one may be read more
	 * often. */
	st->read_interval_s = 0.5;
	if ((n = yt_get(s, "read_interval_s")))
		yt_double_range(&c->doc, n, "read_interval_s", "s", 0.05, 10.0,
		                &st->read_interval_s, d);
	st->burette = yt_get(s, "burette");
	st->probe = yt_get(s, "probe");
	st->stirrer = yt_get(s, "stirrer");
	if (!st->burette)
		yt_missing(&c->doc, s, "burette", "station", d);
	else
		yt_want_map(&c->doc, st->burette, "burette", d);
	if (!st->probe)
		yt_missing(&c->doc, s, "probe", "station", d);
	else
		yt_want_map(&c->doc, st->probe, "probe", d);
	if (st->stirrer && yt_is_null(st->stirrer))
		st->stirrer = NULL;
	else if (st->stirrer)
		yt_want_map(&c->doc, st->stirrer, "stirrer", d);
	if ((n = yt_get(s, "dosers")))
		parse_dosers(c, st, n, d);
	/* The sample changer (optional): its driver checks the subtree. */
	st->changer = yt_get(s, "changer");
	if (st->changer && yt_is_null(st->changer))
		st->changer = NULL;
	else if (st->changer)
		yt_want_map(&c->doc, st->changer, "changer", d);
	/* The balance (optional) that weighs a series' samples. */
	st->balance = yt_get(s, "balance");
	if (st->balance && yt_is_null(st->balance))
		st->balance = NULL;
	else if (st->balance)
		yt_want_map(&c->doc, st->balance, "balance", d);
}

/* ---- mqtt: (docs/mqtt.md) ---- */

static const char *const mqtt_keys[] = {"host",
                                        "port",
                                        "topic_prefix",
                                        "client_id",
                                        "username",
                                        "password_file",
                                        "tls",
                                        "keepalive_s",
                                        "outbox_max_messages",
                                        "outbox_max_age_days",
                                        NULL};
static const char *const mqtt_tls_keys[] = {"ca_file", "cert_file", "key_file", NULL};

/* A topic prefix is the first levels of every topic: text without the
 * wildcards + and #, not starting with '$' (the broker's own topics), with no
 * empty level and no '/' at either end. */
static const char *topic_prefix_problem(const char *s)
{
	size_t n = strlen(s);

	if (n == 0)
		return "is empty";
	if (!text_utf8_valid(s, n) || text_control_at(s, n, false) != TEXT_NONE)
		return "holds a control character or is not UTF-8";
	if (strpbrk(s, "+#"))
		return "holds an MQTT wildcard (+ or #)";
	if (s[0] == '$')
		return "starts with '$', which brokers keep for their own topics";
	if (s[0] == '/' || s[n - 1] == '/' || strstr(s, "//"))
		return "has an empty level (a '/' at an end or two in a row)";
	return NULL;
}

static bool host_or_address(const char *s, char *out, size_t cap)
{
	unsigned char buf[16];

	if (inet_pton(AF_INET, s, buf) == 1 || inet_pton(AF_INET6, s, buf) == 1) {
		if (strlen(s) >= cap)
			return false;
		memcpy(out, s, strlen(s) + 1);
		return true;
	}
	return parse_host_name(s, out, cap);
}

static void parse_mqtt_tls(cfg_t *c, const yt_node_t *t, diag_list_t *d)
{
	cfg_mqtt_t *m = &c->mqtt;
	const yt_node_t *n;
	bool on;

	/* `tls: off` (or false, or nothing) leaves it off. */
	if (yt_is_null(t))
		return;
	if (t->kind != YT_MAP) {
		if (t->plain && !strcmp(t->str, "off"))
			return;
		if (yt_bool(&c->doc, t, "mqtt.tls", &on, d) && on)
			yt_error(&c->doc, t, d,
			         "mqtt.tls is off, or {ca_file: FILE} with cert_file and key_file "
			         "for a client certificate");
		return;
	}
	yt_check_keys(&c->doc, t, mqtt_tls_keys, "mqtt.tls", d);
	m->tls = true;
	if (!(n = yt_get(t, "ca_file")))
		yt_missing(&c->doc, t, "ca_file", "mqtt.tls", d);
	else
		get_path(c, n, "mqtt.tls.ca_file", m->ca_file, sizeof m->ca_file, d);
	if ((n = yt_get(t, "cert_file")))
		get_path(c, n, "mqtt.tls.cert_file", m->cert_file, sizeof m->cert_file, d);
	if ((n = yt_get(t, "key_file")))
		get_path(c, n, "mqtt.tls.key_file", m->key_file, sizeof m->key_file, d);
	if (!m->cert_file[0] != !m->key_file[0])
		yt_error(&c->doc, t, d,
		         "mqtt.tls: a client certificate needs both cert_file and key_file");
}

static void parse_mqtt(cfg_t *c, const yt_node_t *q, diag_list_t *d)
{
	cfg_mqtt_t *m = &c->mqtt;
	const yt_node_t *n;
	char tmp[CFG_HOST_MAX + 2];
	long v;

	if (!yt_want_map(&c->doc, q, "mqtt", d))
		return;
	yt_check_keys(&c->doc, q, mqtt_keys, "mqtt", d);
	m->enabled = true;
	m->line = q->line;
	m->col = q->col;
	if (!(n = yt_get(q, "host")))
		yt_missing(&c->doc, q, "host", "mqtt", d);
	else if (yt_string(&c->doc, n, "mqtt.host", tmp, sizeof tmp, d) &&
	         !host_or_address(tmp, m->host, sizeof m->host))
		yt_error(&c->doc, n, d,
		         "mqtt.host must be a host name or a numeric address, without a port "
		         "(got '%s'; the port is mqtt.port)",
		         tmp);
	if ((n = yt_get(q, "port")) && yt_long(&c->doc, n, "mqtt.port", 1, 65535, &v, d))
		m->port = (int)v;
	if ((n = yt_get(q, "topic_prefix")) &&
	    yt_string(&c->doc, n, "mqtt.topic_prefix", m->topic_prefix, sizeof m->topic_prefix,
	              d)) {
		const char *why = topic_prefix_problem(m->topic_prefix);
		if (why)
			yt_error(&c->doc, n, d, "mqtt.topic_prefix %s (got '%s')", why,
			         m->topic_prefix);
	}
	if ((n = yt_get(q, "client_id")) &&
	    yt_string(&c->doc, n, "mqtt.client_id", m->client_id, sizeof m->client_id, d) &&
	    (!m->client_id[0] ||
	     strspn(m->client_id,
	            "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_.") !=
	         strlen(m->client_id)))
		yt_error(&c->doc, n, d,
		         "mqtt.client_id must be 1 to %zu letters, digits, '-', '_' and '.' "
		         "(got '%s')",
		         sizeof m->client_id - 1, m->client_id);
	if ((n = yt_get(q, "username")) &&
	    yt_string(&c->doc, n, "mqtt.username", m->username, sizeof m->username, d) &&
	    text_control_at(m->username, strlen(m->username), false) != TEXT_NONE)
		yt_error(&c->doc, n, d, "mqtt.username holds a control character");
	if ((n = yt_get(q, "password_file"))) {
		get_path(c, n, "mqtt.password_file", m->password_file, sizeof m->password_file, d);
		if (!m->username[0])
			yt_error(&c->doc, n, d, "mqtt.password_file needs mqtt.username");
	}
	if ((n = yt_get(q, "tls")))
		parse_mqtt_tls(c, n, d);
	get_uint(&c->doc, q, "keepalive_s", "mqtt.keepalive_s", 5, 3600, &m->keepalive_s, d);
	get_uint(&c->doc, q, "outbox_max_messages", "mqtt.outbox_max_messages", 100, 10000000,
	         &m->outbox_max_messages, d);
	get_uint(&c->doc, q, "outbox_max_age_days", "mqtt.outbox_max_age_days", 1, 3650,
	         &m->outbox_max_age_days, d);
}

int cfg_read_secret(const char *path, char *out, size_t cap, diag_list_t *d)
{
	FILE *f = fopen(path, "r");
	size_t n;

	out[0] = '\0';
	if (!f) {
		diag_add(d, path, 0, 0, "cannot read the password file: %s", strerror(errno));
		return -1;
	}
	if (!fgets(out, (int)cap, f))
		out[0] = '\0';
	fclose(f);
	n = strcspn(out, "\r\n");
	if (out[n] == '\0' && n == cap - 1) {
		memset(out, 0, cap);
		diag_add(d, path, 1, 1, "the password is too long (at most %zu bytes)", cap - 2);
		return -1;
	}
	out[n] = '\0';
	if (n == 0) {
		diag_add(d, path, 1, 1, "the password file's first line is empty");
		return -1;
	}
	return 0;
}

/* A file named by key (under mqtt:, or mqtt.tls when tls) that cannot be
 * read: at the key's line, naming the file, not its content. */
static void mqtt_file_readable(const cfg_t *c, const char *key, bool tls, const char *path,
                               diag_list_t *d)
{
	const yt_node_t *q = yt_get(c->doc.root, "mqtt");
	const yt_node_t *n = yt_get(tls ? yt_get(q, "tls") : q, key);

	if (!path[0] || access(path, R_OK) == 0 || !n)
		return;
	diag_add(d, c->path, n->line, n->col, "mqtt.%s%s: cannot read '%s': %s", tls ? "tls." : "",
	         key, path, strerror(errno));
}

void cfg_mqtt_check_files(const cfg_t *c, diag_list_t *d)
{
	const cfg_mqtt_t *m = &c->mqtt;
	char secret[256];
	diag_list_t sd = DIAG_LIST_INIT;

	if (!m->enabled)
		return;
	mqtt_file_readable(c, "password_file", false, m->password_file, d);
	if (m->password_file[0] && access(m->password_file, R_OK) == 0 &&
	    cfg_read_secret(m->password_file, secret, sizeof secret, &sd)) {
		const yt_node_t *n = yt_get(yt_get(c->doc.root, "mqtt"), "password_file");
		for (size_t i = 0; i < sd.n; i++)
			diag_add(d, c->path, n ? n->line : 0, n ? n->col : 0, "%s: %s",
			         sd.v[i].file, sd.v[i].msg);
	}
	memset(secret, 0, sizeof secret);
	diag_free(&sd);
	if (m->tls) {
		mqtt_file_readable(c, "ca_file", true, m->ca_file, d);
		mqtt_file_readable(c, "cert_file", true, m->cert_file, d);
		mqtt_file_readable(c, "key_file", true, m->key_file, d);
	}
}

/* notify_command: a program (a path; relative to this file's folder) or a
 * list of the program and its arguments. No shell reads it. */
static void parse_notify(cfg_t *c, const yt_node_t *n, diag_list_t *d)
{
	if (n->kind != YT_SEQ) {
		if (yt_string(&c->doc, n, "notify_command", c->notify_argv[0],
		              sizeof c->notify_argv[0], d)) {
			get_path(c, n, "notify_command", c->notify_argv[0],
			         sizeof c->notify_argv[0], d);
			c->n_notify_argv = 1;
		}
		return;
	}
	if (n->n == 0 || n->n > CFG_NOTIFY_MAX_ARGS) {
		yt_error(&c->doc, n, d,
		         "notify_command must list the program and at most %d arguments",
		         CFG_NOTIFY_MAX_ARGS - 1);
		return;
	}
	for (size_t i = 0; i < n->n; i++) {
		char *out = c->notify_argv[i];
		if (!yt_string(&c->doc, n->items[i], "notify_command", out, CFG_PATH_MAX, d))
			return;
	}
	get_path(c, n->items[0], "notify_command", c->notify_argv[0], CFG_PATH_MAX, d);
	c->n_notify_argv = (int)n->n;
}

int cfg_load(const char *path, cfg_t *c, diag_list_t *d)
{
	const yt_node_t *root, *n;
	size_t before = d->n;

	memset(c, 0, sizeof *c);
	snprintf(c->path, sizeof c->path, "%s", path);
	snprintf(c->listen_addr, sizeof c->listen_addr, "127.0.0.1");
	c->listen_port = 8470;
	c->max_connections = 256;
	c->max_per_ip = 32;             /* 7 addresses at their limit (and 503 extras) leave room */
	c->max_body_bytes = 256 * 1024; /* a method file is at most 256 KiB (YT_MAX_BYTES) */
	c->connection_timeout_s = 30;
	c->request_deadline_s = 10;
	c->n_allowed_hosts = 1;
	snprintf(c->allowed_hosts[0], sizeof c->allowed_hosts[0], "localhost");
	c->threads = 4;
	snprintf(c->database, sizeof c->database, "/var/lib/stopcock/stopcock.db");
	c->mqtt.port = 1883;
	c->mqtt.keepalive_s = 30;
	c->mqtt.outbox_max_messages = 100000; /* about a year of a busy bench's runs */
	c->mqtt.outbox_max_age_days = 30;
	c->titer_required = true;
	c->titer_valid_days = 30; /* a month: common practice for 0.1 mol/L NaOH */
	c->blank_valid_days = 7;
	c->notify_timeout_s = CFG_NOTIFY_TIMEOUT_S;

	if (yt_load_file(path, &c->doc, d))
		return -1;
	root = c->doc.root;
	if (!yt_want_map(&c->doc, root, "the daemon configuration", d))
		return -1;
	yt_check_keys(&c->doc, root, top_keys, "the daemon configuration", d);
	if ((n = yt_get(root, "http")))
		parse_http(c, n, d);
	if ((n = yt_get(root, "storage")) && yt_want_map(&c->doc, n, "storage", d)) {
		const yt_node_t *db;
		yt_check_keys(&c->doc, n, storage_keys, "storage", d);
		if ((db = yt_get(n, "database")))
			get_path(c, db, "storage.database", c->database, sizeof c->database, d);
	}
	if ((n = yt_get(root, "methods_dir")) && !yt_is_null(n))
		get_path(c, n, "methods_dir", c->methods_dir, sizeof c->methods_dir, d);
	if ((n = yt_get(root, "mqtt")))
		parse_mqtt(c, n, d);
	if ((n = yt_get(root, "records")) && yt_want_map(&c->doc, n, "records", d)) {
		const yt_node_t *v;
		yt_check_keys(&c->doc, n, records_keys, "records", d);
		if ((v = yt_get(n, "titer_required")))
			yt_bool(&c->doc, v, "records.titer_required", &c->titer_required, d);
		if ((v = yt_get(n, "titer_valid_days")))
			yt_double_range(&c->doc, v, "records.titer_valid_days", "days", 0.01, 3650,
			                &c->titer_valid_days, d);
		if ((v = yt_get(n, "lab_name")))
			yt_string(&c->doc, v, "records.lab_name", c->lab_name, sizeof c->lab_name,
			          d);
		if ((v = yt_get(n, "blank_valid_days")))
			yt_double_range(&c->doc, v, "records.blank_valid_days", "days", 0.01, 3650,
			                &c->blank_valid_days, d);
	}
	if ((n = yt_get(root, "notify_command")) && !yt_is_null(n))
		parse_notify(c, n, d);
	if ((n = yt_get(root, "notify_timeout_s")))
		yt_double_range(&c->doc, n, "notify_timeout_s", "s", 0.1, 600.0,
		                &c->notify_timeout_s, d);
	c->calibration = yt_get(root, "calibration");
	c->standardization = yt_get(root, "standardization");
	if (!(n = yt_get(root, "stations"))) {
		yt_missing(&c->doc, root, "stations", "the daemon configuration", d);
	} else if (yt_want_seq(&c->doc, n, "stations", d)) {
		if (n->n == 0)
			yt_error(&c->doc, n, d, "stations must list at least one station");
		for (size_t i = 0; i < n->n; i++)
			parse_station(c, n->items[i], d);
	}
	diag_sort(d);
	return d->n > before ? -1 : 0;
}

void cfg_free(cfg_t *c)
{
	yt_free(&c->doc);
	c->n_stations = 0;
}

const cfg_station_t *cfg_station(const cfg_t *c, const char *name)
{
	for (int i = 0; i < c->n_stations; i++)
		if (!strcmp(c->stations[i].name, name))
			return &c->stations[i];
	return NULL;
}

static const char *const role_names[CFG_N_ROLES] = {"read", "operate", "review", "admin"};

const char *cfg_role_name(int i)
{
	return i >= 0 && i < CFG_N_ROLES ? role_names[i] : "?";
}

const char *cfg_roles_text(unsigned roles, char *buf, size_t cap)
{
	size_t used = 0;

	if (!cap)
		return buf;
	buf[0] = '\0';
	for (int i = 0; i < CFG_N_ROLES; i++) {
		if (!(roles & (1u << i)))
			continue;
		int k = snprintf(buf + used, cap - used, "%s%s", used ? "," : "", role_names[i]);
		if (k < 0 || (size_t)k >= cap - used)
			break;
		used += (size_t)k;
	}
	return buf;
}

bool cfg_is_roles_field(const char *s, size_t n)
{
	return strspn(s, "abcdefghijklmnopqrstuvwxyz,") >= n;
}

/* "read,operate" into *roles; a diagnostic at col for an empty or unknown
 * word (a misspelt role must not fall back to every right). */
static int parse_roles(const char *s, unsigned *roles, diag_list_t *d, const char *path, int lineno,
                       int col)
{
	*roles = 0;
	for (;;) {
		size_t n = strcspn(s, ",");
		int i;
		for (i = 0; i < CFG_N_ROLES; i++)
			if (strlen(role_names[i]) == n && !strncmp(s, role_names[i], n))
				break;
		if (i == CFG_N_ROLES && !n) {
			diag_add(d, path, lineno, col,
			         "an empty role (the roles are read, operate, review, admin)");
			return -1;
		}
		if (i == CFG_N_ROLES) {
			diag_add(d, path, lineno, col,
			         "unknown role '%.*s' (the roles are read, operate, review, admin)",
			         (int)n, s);
			return -1;
		}
		*roles |= 1u << i;
		if (!s[n])
			return 0;
		col += (int)n + 1;
		s += n + 1;
	}
}

int cfg_load_tokens(const char *path, cfg_tokens_t *t, diag_list_t *d)
{
	FILE *f = fopen(path, "r");
	char line[512];
	int lineno = 0;
	size_t before = d->n;

	t->n = 0;
	if (!f) {
		diag_add(d, path, 0, 0, "cannot read the token file: %s", strerror(errno));
		return -1;
	}
	while (fgets(line, sizeof line, f)) {
		char *p = line, *colon, *end;
		lineno++;
		line[strcspn(line, "\r\n")] = '\0';
		while (*p == ' ' || *p == '\t')
			p++;
		if (!*p || *p == '#')
			continue;
		colon = strchr(p, ':');
		if (!colon) {
			diag_add(d, path, lineno, 1,
			         "a token line is 'name:role,role:token' or 'name:token'");
			continue;
		}
		*colon = '\0';
		/* A second ':' after a field of lower-case words ends the roles
		 * field: "name:read,operate:token". Otherwise the ':' is part of
		 * a token from before roles ("sim:3f9a:x"). */
		char *roles_s = NULL, *second = strchr(colon + 1, ':');
		unsigned roles = CFG_ROLES_ALL;
		if (second && cfg_is_roles_field(colon + 1, (size_t)(second - colon - 1))) {
			roles_s = colon + 1;
			*second = '\0';
			colon = second;
			if (parse_roles(roles_s, &roles, d, path, lineno,
			                (int)(roles_s - line) + 1))
				continue;
		}
		end = colon + 1 + strlen(colon + 1);
		while (end > colon + 1 && (end[-1] == ' ' || end[-1] == '\t'))
			*--end = '\0';
		/* The name goes into every record and audit event the token
		 * makes: it must be text (UTF-8, no control characters), or the
		 * records it touches cannot be written as JSON. */
		if (!*p) {
			diag_add(d, path, lineno, 1, "the name before ':' is empty");
			continue;
		}
		if (!text_utf8_valid(p, strlen(p))) {
			diag_add(d, path, lineno, (int)(p - line) + 1,
			         "the name is not valid UTF-8 (saved in another encoding, such as "
			         "Latin-1?); save the token file as UTF-8");
			continue;
		}
		if (text_control_at(p, strlen(p), false) != TEXT_NONE ||
		    text_control_at(colon + 1, strlen(colon + 1), false) != TEXT_NONE) {
			diag_add(d, path, lineno, (int)(p - line) + 1,
			         "a token line holds a control character");
			continue;
		}
		if (strlen(colon + 1) < 16 || strlen(colon + 1) >= sizeof t->v[0].token) {
			diag_add(d, path, lineno, (int)(colon - line) + 2,
			         "token of '%s' must be 16 to 255 characters long", p);
			continue;
		}
		if (t->n >= CFG_MAX_TOKENS) {
			diag_add(d, path, lineno, 1, "at most %d tokens are supported",
			         CFG_MAX_TOKENS);
			break;
		}
		/* A long name is cut on a character boundary, never mid-character. */
		size_t keep = text_utf8_cut(p, sizeof t->v[t->n].name - 1);
		memcpy(t->v[t->n].name, p, keep);
		t->v[t->n].name[keep] = '\0';
		snprintf(t->v[t->n].token, sizeof t->v[t->n].token, "%.255s", colon + 1);
		t->v[t->n].roles = roles;
		t->v[t->n].no_roles = roles_s == NULL;
		t->v[t->n].line = lineno;
		t->n++;
	}
	fclose(f);
	return d->n > before ? -1 : 0;
}
