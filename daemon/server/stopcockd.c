/* stopcockd: the daemon. Config, stations, storage, HTTP; see docs/config.md.
 *
 * Start-up order matters for safety: every burette is halted before anything
 * else, then runs a dead daemon left `running` become `interrupted` (never
 * resumed), then station threads and the HTTP server start. SIGTERM/SIGINT
 * halt every burette (station_stop), finish writing, and exit 0; SIGHUP
 * reloads the method files.
 */
#include <dirent.h>
#include <errno.h>
#include <getopt.h>
#include <jansson.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>

#include "calib.h"
#include "config.h"
#include "http.h"
#include "log.h"
#include "method.h"
#include "mqtt_pub.h"
#include "notify.h"
#include "recover.h"
#include "notify_cmd.h"
#include "series.h"
#include "station.h"
#include "report.h"
#include "standardization.h"
#include "store.h"
#include "titer_book.h"
#include "timefmt.h"
#include "clock.h"

#define READY_WAIT_S 15.0 /* how long start-up waits for devices to answer */
/* How often the daemon notes in the database that it is alive: the end time
 * of a run a crash cut is at most this much before the crash (docs/lims.md). */
#define HEARTBEAT_S 5.0

typedef struct opts {
	const char *config;
	const char *listen;
	const char *state_dir;
	bool check;
	bool verbose;
} opts_t;

static void usage(FILE *f)
{
	fprintf(f,
	        "usage: stopcockd [-c FILE] [--listen ADDR:PORT] [--state-dir DIR] [-v]\n"
	        "       stopcockd --check-config [-c FILE]\n\n"
	        "options:\n"
	        "  -c, --config FILE       the daemon config (default "
	        "/etc/stopcock/stopcockd.yaml)\n"
	        "      --listen ADDR:PORT  listen here instead of the config's http.listen\n"
	        "      --state-dir DIR     create DIR (mode 0750) before opening the database\n"
	        "      --check-config      check the config, its pump profiles, methods and token\n"
	        "                          file, print every problem as FILE:LINE:COL, and exit\n"
	        "  -v, --verbose           log debug messages too\n"
	        "  -V, --version           print the version and exit\n"
	        "  -h, --help              print this help and exit\n\n"
	        "exit status: 0 clean stop (SIGTERM/SIGINT) or a good config; 1 a failure at\n"
	        "start; 2 bad arguments or an invalid config\n");
}

static int parse_args(int argc, char **argv, opts_t *o)
{
	enum { OPT_LISTEN = 1000, OPT_STATE_DIR, OPT_CHECK };
	static const struct option opts[] = {
	    {"config", required_argument, NULL, 'c'},
	    {"listen", required_argument, NULL, OPT_LISTEN},
	    {"state-dir", required_argument, NULL, OPT_STATE_DIR},
	    {"check-config", no_argument, NULL, OPT_CHECK},
	    {"verbose", no_argument, NULL, 'v'},
	    {"version", no_argument, NULL, 'V'},
	    {"help", no_argument, NULL, 'h'},
	    {NULL, 0, NULL, 0},
	};
	int opt;

	o->config = "/etc/stopcock/stopcockd.yaml";
	opterr = 0;
	while ((opt = getopt_long(argc, argv, ":c:vVh", opts, NULL)) != -1) {
		switch (opt) {
		case 'c':
			o->config = optarg;
			break;
		case OPT_LISTEN:
			o->listen = optarg;
			break;
		case OPT_STATE_DIR:
			o->state_dir = optarg;
			break;
		case OPT_CHECK:
			o->check = true;
			break;
		case 'v':
			o->verbose = true;
			break;
		case 'V':
			printf("stopcockd %s\n", STOPCOCK_VERSION);
			exit(0);
		case 'h':
			usage(stdout);
			exit(0);
		case ':':
			fprintf(stderr, "stopcockd: %s needs a value (see stopcockd --help)\n",
			        argv[optind - 1]);
			return -1;
		default:
			fprintf(stderr, "stopcockd: unknown option '%s' (see stopcockd --help)\n",
			        argv[optind - 1]);
			return -1;
		}
	}
	if (optind < argc) {
		fprintf(stderr, "stopcockd: unexpected argument '%s' (see stopcockd --help)\n",
		        argv[optind]);
		return -1;
	}
	return 0;
}

static int name_cmp(const void *a, const void *b)
{
	return strcmp(*(char *const *)a, *(char *const *)b);
}

static char *read_file(const char *path, size_t *len, char *err, size_t cap)
{
	FILE *f = fopen(path, "rb");
	char *buf;
	size_t n;

	if (!f) {
		snprintf(err, cap, "%s", strerror(errno));
		return NULL;
	}
	buf = malloc(YT_MAX_BYTES + 1);
	if (!buf) {
		fclose(f);
		snprintf(err, cap, "out of memory");
		return NULL;
	}
	n = fread(buf, 1, YT_MAX_BYTES + 1, f);
	fclose(f);
	if (n > YT_MAX_BYTES) {
		free(buf);
		snprintf(err, cap, "larger than %d bytes", YT_MAX_BYTES);
		return NULL;
	}
	buf[n] = '\0';
	*len = n;
	return buf;
}

/* Validate every *.yaml in methods_dir; with a store, keep each good one as a
 * revision. Errors go to d (check) or the log. Returns the number of bad files. */
static int load_methods_dir(const char *dir, const method_limits_t *lim, store_t *store,
                            diag_list_t *d)
{
	DIR *dp = opendir(dir);
	struct dirent *de;
	char **names = NULL;
	size_t n = 0, cap = 0;
	int bad = 0;

	if (!dp) {
		diag_add(d, dir, 0, 0, "cannot read methods_dir: %s", strerror(errno));
		return 1;
	}
	while ((de = readdir(dp))) {
		size_t l = strlen(de->d_name);
		if (de->d_name[0] == '.' || l < 6 || strcmp(de->d_name + l - 5, ".yaml"))
			continue;
		if (n == cap) {
			char **nn = realloc(names, (cap = cap ? cap * 2 : 16) * sizeof *nn);
			if (!nn)
				break;
			names = nn;
		}
		names[n++] = strdup(de->d_name);
	}
	closedir(dp);
	if (n)
		qsort(names, n, sizeof *names, name_cmp);
	for (size_t i = 0; i < n; i++) {
		char path[CFG_PATH_MAX + 256], err[256];
		size_t len = 0;
		char *text;
		method_t *m = malloc(sizeof *m);
		snprintf(path, sizeof path, "%s/%s", dir, names[i] ? names[i] : "");
		text = m && names[i] ? read_file(path, &len, err, sizeof err) : NULL;
		if (!text) {
			diag_add(d, path, 0, 0, "cannot read: %s", m ? err : "out of memory");
			bad++;
		} else if (method_parse(path, text, len, lim, m, d)) {
			bad++;
		} else if (store) {
			long stored = 0;
			store_status_t st = store_method_put(store, m->id, m->revision, m->sha256,
			                                     text, len, "file", &stored);
			if (st == STORE_OK) {
				char msg[sizeof path + 160];
				log_info("method %s revision %ld loaded from %s", m->id,
				         m->revision, path);
				snprintf(msg, sizeof msg,
				         "method %s revision %ld sha256 %s from %s", m->id,
				         m->revision, m->sha256, path);
				store_event_add(store, NULL, NULL, 0, "method", "stored", msg,
				                "methods_dir");
			} else if (st == STORE_CONFLICT)
				log_warn("%s: revision %ld is not above the stored revision %ld; "
				         "kept the stored one (raise revision: to change it)",
				         path, m->revision, stored);
			else if (st != STORE_UNCHANGED)
				log_err("%s: could not store the method", path);
		}
		free(text);
		free(m);
		free(names[i]);
	}
	free(names);
	return bad;
}

static void log_diags(const diag_list_t *d)
{
	for (size_t i = 0; i < d->n; i++)
		log_err("%s:%d:%d: %s", d->v[i].file, d->v[i].line, d->v[i].col, d->v[i].msg);
}

/* A daemon-wide audit-trail event (no station, no run). */
static void daemon_event(store_t *store, const char *code, const char *msg, const char *actor)
{
	if (store_event_add(store, NULL, NULL, 0, "daemon", code, msg, actor) != STORE_OK)
		log_warn("could not store the audit event daemon/%s", code);
}

/* A problem with a whole file the config names (it is missing, unreadable)
 * has no line of its own: report it at the config line naming the file, so
 * the message points at something to edit. Problems inside the file keep
 * their own line. `key` is "token_file" (under http:) or "methods_dir". */
static void at_config_line(const cfg_t *cfg, const char *key, const diag_t *in, diag_list_t *out,
                           const char *hint)
{
	const yt_node_t *root = cfg->doc.root;
	const yt_node_t *n =
	    !strcmp(key, "token_file") ? yt_get(yt_get(root, "http"), key) : yt_get(root, key);

	if (in->line > 0 || !n) {
		diag_add(out, in->file, in->line, in->col, "%s", in->msg);
		return;
	}
	diag_add(out, cfg->path, n->line, n->col, "%s: %s%s", in->file, in->msg, hint);
}

/* (Re)load the write tokens; problems are logged, good lines kept. */
static void load_tokens(const cfg_t *cfg, http_ctx_t *ctx)
{
	static cfg_tokens_t t; /* 8 KiB; only the main thread calls this */
	diag_list_t td = DIAG_LIST_INIT;

	memset(&t, 0, sizeof t);
	if (cfg->token_file[0]) {
		cfg_load_tokens(cfg->token_file, &t, &td);
		log_diags(&td);
		diag_free(&td);
		for (int i = 0; i < t.n; i++)
			if (t.v[i].no_roles)
				log_warn("%s:%d: token '%s' has no roles: it keeps every role",
				         cfg->token_file, t.v[i].line, t.v[i].name);
	}
	if (t.n == 0)
		log_warn("no valid write tokens: every write request will get 401");
	http_set_tokens(ctx, &t);
}

/* Stations answered once (or READY_WAIT_S passed). SIGTERM or SIGINT ends
 * the wait at once (systemd stopping a daemon whose devices are absent must
 * not wait for them): returns that signal, else 0. */
static int wait_for_stations(station_t **st, int n)
{
	sigset_t stop;
	sigemptyset(&stop);
	sigaddset(&stop, SIGTERM);
	sigaddset(&stop, SIGINT);
	double start_s = clock_mono_s();
	for (;;) {
		int offline = 0;
		const char *name = NULL;
		for (int i = 0; i < n; i++) {
			station_snapshot_t s;
			station_snapshot(st[i], &s);
			if (!strcmp(s.state, "offline")) {
				offline++;
				name = station_name(st[i]);
			}
		}
		if (!offline)
			return 0;
		if (clock_mono_s() - start_s > READY_WAIT_S) {
			log_warn("station %s: devices not answering; starting anyway, retrying",
			         name);
			return 0;
		}
		notify_status("waiting for station %s", name);
		int sig = sigtimedwait(&stop, NULL, &(struct timespec){0, 100 * 1000 * 1000});
		if (sig == SIGTERM || sig == SIGINT)
			return sig;
	}
}

static void set_status(station_t **st, int n)
{
	int running = 0;
	for (int i = 0; i < n; i++) {
		station_snapshot_t s;
		station_snapshot(st[i], &s);
		running += s.run_id != 0;
	}
	notify_status("%d station%s, %d running", n, n == 1 ? "" : "s", running);
}

int main(int argc, char **argv)
{
	opts_t o = {0};
	static cfg_t cfg; /* large; static keeps it off the stack */
	diag_list_t d = DIAG_LIST_INIT, warn = DIAG_LIST_INIT; /* warn: --check-config's */
	calib_config_t cal;
	station_t *stations[CFG_MAX_STATIONS] = {0};
	store_t *store = NULL;
	static http_ctx_t ctx;
	http_server_t *http = NULL;
	mqtt_pub_t *mqtt = NULL;
	method_limits_t lim;
	sigset_t set;
	char err[512];
	int rc = 1, n = 0;
	uint64_t wd_us;
	bool stale_pending = false;
	titer_book_t *titers = NULL;   /* the replicate titers, daemon-wide */
	notify_cmd_t *notifier = NULL; /* notify_command's thread, when configured */
	double beat_s = 0, stale_try_s = 0;

	sigemptyset(&set);
	sigaddset(&set, SIGTERM);
	sigaddset(&set, SIGINT);
	sigaddset(&set, SIGHUP);
	/* Blocked before any thread exists, so only sigwait sees them. */
	pthread_sigmask(SIG_BLOCK, &set, NULL);
	signal(SIGPIPE, SIG_IGN);
	json_object_seed(0);

	if (parse_args(argc, argv, &o))
		return 2;
	log_init("stopcockd", o.verbose);
	if (cfg_load(o.config, &cfg, &d)) {
		diag_print(&d, stderr);
		diag_free(&d);
		cfg_free(&cfg);
		return 2;
	}
	if (o.listen &&
	    cfg_parse_listen(o.listen, cfg.listen_addr, sizeof cfg.listen_addr, &cfg.listen_port)) {
		fprintf(stderr, "stopcockd: --listen must be ADDR:PORT (got '%s')\n", o.listen);
		cfg_free(&cfg);
		return 2;
	}
	if (o.state_dir)
		snprintf(cfg.database, sizeof cfg.database, "%s/stopcock.db", o.state_dir);
	calib_config_parse(&cfg.doc, cfg.calibration, &cal, &d);
	if (cfg.standardization) {
		standardization_config_t sz;
		standardization_config_parse(&cfg.doc, cfg.standardization, &sz, &d);
	}
	titers = titer_book_new();
	if (!titers) {
		log_err("out of memory");
		goto out;
	}
	for (int i = 0; i < cfg.n_stations; i++) {
		stations[i] = station_new(&cfg, &cfg.stations[i], &cal, &d);
		if (stations[i]) {
			station_set_titer_book(stations[i], titers);
			n++;
		}
	}
	ctx.cfg = &cfg;
	ctx.stations = stations;
	ctx.n_stations = n;
	if (n == cfg.n_stations) {
		http_method_limits(&ctx, NULL, &lim);
		/* A bad method file fails --check-config; the daemon itself
		 * starts anyway, logs it, and keeps the file out. */
		if (cfg.methods_dir[0] && o.check) {
			diag_list_t md = DIAG_LIST_INIT;
			load_methods_dir(cfg.methods_dir, &lim, NULL, &md);
			for (size_t i = 0; i < md.n; i++)
				at_config_line(&cfg, "methods_dir", &md.v[i], &d, "");
			diag_free(&md);
		}
	}
	pthread_rwlock_init(&ctx.tokens_lock, NULL);
	if (cfg.token_file[0] && o.check) {
		diag_list_t td = DIAG_LIST_INIT;
		cfg_tokens_t t;
		cfg_load_tokens(cfg.token_file, &t, &td);
		for (size_t i = 0; i < td.n; i++)
			at_config_line(&cfg, "token_file", &td.v[i], &d,
			               " (lines 'name:role,role:TOKEN'; how to make one: "
			               "stopcockd.yaml(5), TOKEN FILE)");
		diag_free(&td);
		/* A warning, not an error: files from before roles keep working.
		 * Said once the config is otherwise good, after any errors. */
		for (int i = 0; i < t.n; i++)
			if (t.v[i].no_roles)
				diag_add(
				    &warn, cfg.token_file, t.v[i].line, 1,
				    "warning: token '%s' has no roles, so it keeps every role "
				    "(read, operate, review, admin); give it only what it needs: "
				    "'%s:read:TOKEN'",
				    t.v[i].name, t.v[i].name);
	}
	if (o.check)
		cfg_mqtt_check_files(&cfg, &d);
	if (d.n) {
		diag_print(&d, stderr);
		rc = 2;
		goto out;
	}
	if (o.check) {
		diag_print(&warn, stderr);
		printf("%s: ok (%d station%s)\n", o.config, n, n == 1 ? "" : "s");
		rc = 0;
		goto out;
	}

	/* 1. Every burette halted, before anything else (tokens are only read). */
	load_tokens(&cfg, &ctx);
	for (int i = 0; i < n; i++)
		if (station_halt_at_start(stations[i], err, sizeof err))
			log_warn("station %s: could not halt the burette at start: %s (the "
			         "station thread halts it as soon as it answers)",
			         station_name(stations[i]), err);
	/* 2. Storage; runs a dead daemon left behind become interrupted. */
	if (o.state_dir)
		mkdir(o.state_dir, 0750);
	store = store_open(cfg.database, err, sizeof err);
	if (!store) {
		log_err("%s", err);
		goto out;
	}
	ctx.store = store;
	/* Before recovery, so the runs it ends reach the broker too; off
	 * without an mqtt: section, so the outbox then stays empty. */
	if (store_outbox_enable(store, cfg.mqtt.enabled) != STORE_OK)
		log_warn("mqtt: could not switch the outbox %s", cfg.mqtt.enabled ? "on" : "off");
	/* Running runs become interrupted, queued ones are queued again, and
	 * their stations are held until an operator resumes them (recover.h). */
	/* Alarms from here on (notify_cmd.h), so that a series cut by the last
	 * daemon reaches a person too. */
	notifier = notify_cmd_start(&ctx);
	/* Series first: a series the last daemon left going ends interrupted,
	 * and so does the run it had queued, which recover_start would queue
	 * again otherwise (series.h). */
	if (series_recover_start(store) < 0)
		log_err("series: cannot mark the last daemon's series interrupted");
	stale_pending = !recover_start(&ctx);
	if (cfg.methods_dir[0]) {
		diag_list_t md = DIAG_LIST_INIT;
		load_methods_dir(cfg.methods_dir, &lim, store, &md);
		log_diags(&md);
		diag_free(&md);
	}
	/* 3. Station threads, then HTTP. */
	for (int i = 0; i < n; i++)
		if (station_start(stations[i], store)) {
			log_err("station %s: cannot start its thread", station_name(stations[i]));
			goto out;
		}
	{
		struct timespec ts;
		clock_gettime(CLOCK_MONOTONIC, &ts);
		ctx.started_mono_s = (double)ts.tv_sec + ts.tv_nsec / 1e9;
	}
	ctx.series = series_service_start(&ctx);
	if (!ctx.series) {
		log_err("series: cannot start its thread");
		goto out;
	}
	if (cfg.mqtt.enabled) {
		mqtt = mqtt_pub_start(&cfg, store, stations, n, ctx.series, err, sizeof err);
		if (!mqtt) {
			log_err("mqtt: %s", err);
			goto out;
		}
		ctx.mqtt = mqtt;
	}
	http = http_start(&ctx, err, sizeof err);
	if (!http) {
		log_err("http: %s", err);
		goto out;
	}
	log_notice("listening on %s:%d, %d station%s, database %s", cfg.listen_addr,
	           cfg.listen_port, n, n == 1 ? "" : "s", cfg.database);
	daemon_event(store, "start", "stopcockd " STOPCOCK_VERSION " started", "daemon");
	{
		int sig = wait_for_stations(stations, n);
		if (sig) {
			log_notice("signal %d while waiting for the devices: stopping", sig);
			daemon_event(store, "stop",
			             sig == SIGTERM ? "stopping on SIGTERM" : "stopping on SIGINT",
			             "signal");
			notify_stopping();
			rc = 0;
			goto out;
		}
	}
	notify_ready();
	set_status(stations, n);

	wd_us = notify_watchdog_interval_us();
	for (;;) {
		struct timespec to = {1, 0};
		int sig;
		if (wd_us) {
			uint64_t q = wd_us / 4;
			to.tv_sec = (time_t)(q / 1000000u);
			to.tv_nsec = (long)(q % 1000000u) * 1000;
		}
		sig = sigtimedwait(&set, NULL, &to);
		if (sig == SIGTERM || sig == SIGINT) {
			log_notice("signal %d: stopping", sig);
			daemon_event(store, "stop",
			             sig == SIGTERM ? "stopping on SIGTERM" : "stopping on SIGINT",
			             "signal");
			break;
		}
		if (sig == SIGHUP) {
			diag_list_t md = DIAG_LIST_INIT;
			notify_reloading();
			if (cfg.methods_dir[0])
				load_methods_dir(cfg.methods_dir, &lim, store, &md);
			log_diags(&md);
			diag_free(&md);
			load_tokens(&cfg, &ctx);
			log_notice("methods and tokens reloaded");
			daemon_event(store, "reload", "methods and tokens reloaded (SIGHUP)",
			             "signal");
			notify_ready();
		}
		if (wd_us) {
			uint64_t beats[CFG_MAX_STATIONS];
			for (int i = 0; i < n; i++) {
				station_snapshot_t s;
				station_snapshot(stations[i], &s);
				beats[i] = s.heartbeat_us;
			}
			if (notify_heartbeats_fresh(beats, (size_t)n, notify_now_us(), wd_us / 2))
				notify_watchdog();
		}
		set_status(stations, n);
		{
			double now = clock_wall_s();
			if (now - beat_s >= HEARTBEAT_S) {
				char at[32];
				beat_s = now;
				time_format_rfc3339(now, at);
				store_heartbeat(store,
				                at); /* a refused beat costs only precision */
			}
			if (stale_pending && now - stale_try_s >= RECOVER_RETRY_S) {
				stale_try_s = now;
				stale_pending = !recover_retry(&ctx);
			}
		}
	}
	notify_stopping();
	rc = 0;
out:
	/* Stations first: each halts its burette and writes its run's end. The
	 * ones that had a run are held at the next start (recover.h). */
	{
		bool had_run[CFG_MAX_STATIONS] = {false};
		for (int i = 0; i < n && ctx.store; i++) {
			station_snapshot_t s;
			station_snapshot(stations[i], &s);
			had_run[i] = s.run_id != 0;
		}
		/* A series goes no further once the daemon stops (series.h). */
		series_service_stop(ctx.series);
		for (int i = 0; i < cfg.n_stations; i++)
			if (stations[i])
				station_stop(stations[i]); /* no-op when not started */
		if (ctx.store)
			recover_note_holds(&ctx, had_run);
	}
	/* After the stations stopped, so their last events are sent; before
	 * they are freed, since it reads their snapshots. */
	notify_cmd_stop(notifier);
	http_stop(http);
	/* After the stations, so the runs they ended are offered to the broker. */
	mqtt_pub_stop(mqtt);
	report_cleanup(); /* after the last request that may draw a report */
	series_service_free(ctx.series);
	for (int i = 0; i < cfg.n_stations; i++)
		station_free(stations[i]);
	titer_book_free(titers);
	store_close(store);
	pthread_rwlock_destroy(&ctx.tokens_lock);
	diag_free(&warn);
	diag_free(&d);
	cfg_free(&cfg);
	return rc;
}
