/* notify_cmd.c: see notify_cmd.h. */
#include "notify_cmd.h"

#include <errno.h>
#include <fcntl.h>
#include <poll.h>
#include <pthread.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/statvfs.h>
#include <sys/types.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

#include "clock.h"
#include "log.h"
#include "timefmt.h"
#include "titer_valid.h"

extern char **environ;

#define NOTIFY_POLL_S   0.5  /* how often the audit trail and the stations are read, s */
#define NOTIFY_PAGE     100  /* events read at once */
#define NOTIFY_OUT_LINE 1024 /* the longest output line logged, bytes */
#define NOTIFY_SLOW_S   60.0 /* how often disk space and calibrations are looked at, s */
#define NOTIFY_TOLD_MAX 64   /* titers and blanks remembered as told */

struct notify_cmd {
	http_ctx_t *ctx;
	pthread_t thread;
	pthread_mutex_t lock;
	pthread_cond_t wake;
	bool stopping;
	int64_t cursor; /* the last audit-trail event looked at */
	bool halt_pending[CFG_MAX_STATIONS];
	double slow_at_s;                     /* clock_mono_s of the last slow look */
	bool disk_low;                        /* told, until the space is back */
	int64_t calib_told[CFG_MAX_STATIONS]; /* the calibration told of as expiring */
	/* titers and blanks told of as expiring ("titer|name|at"), oldest
	 * replaced first; a new titer or blank has a new `at` */
	char told[NOTIFY_TOLD_MAX][240];
	int told_next;
	bool titers_changed; /* a titer or blank was stored: look at them now */
};

bool notify_cmd_disk_low(double avail_bytes, double total_bytes)
{
	return total_bytes > 0 && (avail_bytes < NOTIFY_DISK_LOW_FRACTION * total_bytes ||
	                           avail_bytes < NOTIFY_DISK_LOW_BYTES);
}

static bool expires_within(double expires_at_unix_s, double now_unix_s, double window_s)
{
	double left_s = expires_at_unix_s - now_unix_s;
	return expires_at_unix_s > 0 && left_s > 0 && left_s <= window_s;
}

bool notify_cmd_expiring(double expires_at_unix_s, double now_unix_s)
{
	return expires_within(expires_at_unix_s, now_unix_s, NOTIFY_EXPIRE_WARN_S);
}

bool notify_cmd_titer_expiring(double expires_at_unix_s, double now_unix_s)
{
	return expires_within(expires_at_unix_s, now_unix_s, NOTIFY_TITER_WARN_S);
}

const char *notify_cmd_event_of(const char *kind, const char *code)
{
	if (!kind || !code)
		return NULL;
	if (!strcmp(kind, "run") && !strcmp(code, "failed"))
		return "run_failed";
	if (!strcmp(kind, "fault"))
		return "device_fault";
	if (!strcmp(kind, "series") && !strcmp(code, "finished"))
		return "series_finished";
	if (!strcmp(kind, "series") &&
	    (!strcmp(code, "failed") || !strcmp(code, "aborted") || !strcmp(code, "interrupted")))
		return "series_stopped";
	return NULL;
}

/* Log what the program wrote, line by line. */
static void log_output(const char *event, char *buf, size_t *len, bool flush)
{
	char *start = buf, *nl;
	while ((nl = memchr(start, '\n', *len - (size_t)(start - buf)))) {
		*nl = '\0';
		log_notice("notify_command (%s): %s", event, start);
		start = nl + 1;
	}
	size_t rest = *len - (size_t)(start - buf);
	if (flush && rest) {
		log_notice("notify_command (%s): %.*s", event, (int)rest, start);
		rest = 0;
	}
	memmove(buf, start, rest);
	*len = rest;
}

/* Run the program for one event, wait for it (at most the timeout), log. */
static void run_program(notify_cmd_t *nc, const char *event, const char *at, const char *station,
                        long long run, long long series, const char *code, const char *message)
{
	const cfg_t *cfg = nc->ctx->cfg;
	json_t *j = json_pack("{s:s,s:s,s:o,s:o,s:o,s:o,s:o}", "event", event, "at", at, "station",
	                      station ? json_string(station) : json_null(), "run",
	                      run > 0 ? json_integer(run) : json_null(), "series",
	                      series > 0 ? json_integer(series) : json_null(), "code",
	                      code ? json_string(code) : json_null(), "message",
	                      message ? json_string(message) : json_null());
	char *input = j ? json_dumps(j, JSON_COMPACT) : NULL;
	json_decref(j);
	if (!input)
		return;

	/* Everything the child needs is made before fork(): after it, only
	 * async-signal-safe calls (a thread may hold malloc's lock). */
	char vars[7][1200];
	snprintf(vars[0], sizeof vars[0], "STOPCOCK_EVENT=%s", event);
	snprintf(vars[1], sizeof vars[1], "STOPCOCK_AT=%s", at);
	snprintf(vars[2], sizeof vars[2], "STOPCOCK_STATION=%s", station ? station : "");
	snprintf(vars[3], sizeof vars[3], "STOPCOCK_RUN=%lld", run > 0 ? run : 0);
	snprintf(vars[4], sizeof vars[4], "STOPCOCK_SERIES=%lld", series > 0 ? series : 0);
	snprintf(vars[5], sizeof vars[5], "STOPCOCK_CODE=%s", code ? code : "");
	snprintf(vars[6], sizeof vars[6], "STOPCOCK_MESSAGE=%.1000s", message ? message : "");
	size_t n_env = 0;
	while (environ && environ[n_env])
		n_env++;
	char **envp = calloc(n_env + 8, sizeof *envp);
	char *argv[CFG_NOTIFY_MAX_ARGS + 1] = {NULL};
	int in[2] = {-1, -1}, out[2] = {-1, -1};
	if (!envp || pipe2(in, O_CLOEXEC) || pipe2(out, O_CLOEXEC)) {
		log_err("notify_command (%s): cannot start it: %s", event, strerror(errno));
		goto done;
	}
	/* Ours first: getenv() takes the first of a name. */
	for (int i = 0; i < 7; i++)
		envp[i] = vars[i];
	for (size_t i = 0; i < n_env; i++)
		envp[7 + i] = environ[i];
	for (int i = 0; i < cfg->n_notify_argv; i++)
		argv[i] = (char *)cfg->notify_argv[i];

	pid_t pid = fork();
	if (pid < 0) {
		log_err("notify_command (%s): cannot start it: %s", event, strerror(errno));
		goto done;
	}
	if (pid == 0) {
		dup2(in[0], 0);
		dup2(out[1], 1);
		dup2(out[1], 2);
		closefrom(3);
		execve(argv[0], argv, envp);
		_exit(127);
	}
	close(in[0]);
	in[0] = -1;
	close(out[1]);
	out[1] = -1;
	/* The event on standard input. A program that does not read it makes
	 * the write fail with EPIPE (stopcockd ignores SIGPIPE), which only
	 * ends the writing. */
	size_t left = strlen(input);
	const char *p = input;
	while (left > 0) {
		ssize_t w = write(in[1], p, left);
		if (w <= 0)
			break;
		p += w;
		left -= (size_t)w;
	}
	if (left == 0 && write(in[1], "\n", 1) < 0)
		log_info("notify_command (%s): the program did not read its input", event);
	close(in[1]);
	in[1] = -1;

	char buf[NOTIFY_OUT_LINE];
	size_t len = 0;
	double deadline = clock_mono_s() + cfg->notify_timeout_s;
	bool killed = false;
	for (;;) {
		double left_s = deadline - clock_mono_s();
		if (left_s <= 0) {
			kill(pid, SIGKILL);
			killed = true;
			break;
		}
		struct pollfd pf = {.fd = out[0], .events = POLLIN};
		int pr = poll(&pf, 1, (int)(left_s * 1000) + 1);
		if (pr < 0 && errno == EINTR)
			continue;
		if (pr <= 0)
			continue;
		ssize_t r = read(out[0], buf + len, sizeof buf - 1 - len);
		if (r <= 0)
			break; /* the program closed its output: it is ending */
		len += (size_t)r;
		if (len == sizeof buf - 1) {
			buf[len++] = '\n'; /* a line too long: log it in pieces */
		}
		log_output(event, buf, &len, false);
	}
	log_output(event, buf, &len, true);
	int status = 0;
	/* Output closed but the program may still run: wait to the deadline. */
	while (!killed && waitpid(pid, &status, WNOHANG) == 0) {
		if (clock_mono_s() >= deadline) {
			kill(pid, SIGKILL);
			killed = true;
			break;
		}
		clock_sleep_s(0.02);
	}
	if (killed) {
		waitpid(pid, &status, 0);
		log_err("notify_command (%s): still running after %g s: killed", event,
		        cfg->notify_timeout_s);
	} else if (WIFEXITED(status) && WEXITSTATUS(status) == 127) {
		log_err("notify_command (%s): %s could not be run (exit status 127)", event,
		        argv[0]);
	} else if (WIFEXITED(status) && WEXITSTATUS(status) != 0) {
		log_err("notify_command (%s): exit status %d", event, WEXITSTATUS(status));
	} else if (WIFSIGNALED(status)) {
		log_err("notify_command (%s): ended by signal %d", event, WTERMSIG(status));
	} else {
		log_info("notify_command (%s): done", event);
	}
done:
	for (int i = 0; i < 2; i++) {
		if (in[i] >= 0)
			close(in[i]);
		if (out[i] >= 0)
			close(out[i]);
	}
	free(envp);
	free(input);
}

/* The series id an event's message names ("series 12 ..."), else 0. */
static long long series_of(const char *kind, const char *message)
{
	long long id = 0;
	if (kind && !strcmp(kind, "series") && message && sscanf(message, "series %lld", &id) == 1)
		return id;
	return 0;
}

static void look(notify_cmd_t *nc)
{
	bool db_err;
	json_t *page = store_events_after(nc->ctx->store, nc->cursor, NOTIFY_PAGE, &db_err), *e;
	size_t i;
	json_array_foreach(json_object_get(page, "events"), i, e)
	{
		const char *kind = json_string_value(json_object_get(e, "kind"));
		const char *code = json_string_value(json_object_get(e, "code"));
		const char *msg = json_string_value(json_object_get(e, "message"));
		const char *ev = notify_cmd_event_of(kind, code);
		if (kind && (!strcmp(kind, "titrant") || !strcmp(kind, "blank") ||
		             !strcmp(kind, "standardization")))
			nc->titers_changed = true;
		if (ev)
			run_program(nc, ev, json_string_value(json_object_get(e, "at")),
			            json_string_value(json_object_get(e, "station")),
			            json_integer_value(json_object_get(e, "run_id")),
			            series_of(kind, msg), code, msg);
	}
	if (page)
		nc->cursor = json_integer_value(json_object_get(page, "next_after"));
	json_decref(page);
	/* A halt the burette did not confirm is in the station's snapshot
	 * only; tell once each time it starts. */
	for (int k = 0; k < nc->ctx->n_stations && k < CFG_MAX_STATIONS; k++) {
		station_snapshot_t s;
		station_snapshot(nc->ctx->stations[k], &s);
		if (s.halt_pending && !nc->halt_pending[k]) {
			char at[32];
			time_format_rfc3339(clock_wall_s(), at);
			run_program(nc, "burette_not_halted", at, s.name, s.run_id, 0,
			            "halt_pending", s.last_error);
		}
		nc->halt_pending[k] = s.halt_pending;
	}
}

/* Tell once of one titer or blank (what: "titer" or "blank") whose
 * validity from `at` for valid_days ends within NOTIFY_TITER_WARN_S. */
static void tell_expiring(notify_cmd_t *nc, const char *what, const char *name, const char *at,
                          double valid_days, double now, const char *now_text)
{
	char until[32], key[240], msg[400], event[32];
	double until_s;
	if (!valid_until(at, valid_days, until) || !time_parse_rfc3339(until, &until_s) ||
	    !notify_cmd_titer_expiring(until_s, now))
		return;
	snprintf(key, sizeof key, "%s|%.160s|%s", what, name, at);
	for (int i = 0; i < NOTIFY_TOLD_MAX; i++)
		if (!strcmp(nc->told[i], key))
			return;
	snprintf(nc->told[nc->told_next], sizeof nc->told[0], "%s", key);
	nc->told_next = (nc->told_next + 1) % NOTIFY_TOLD_MAX;
	snprintf(msg, sizeof msg, "the %s of '%.160s' (%s) expires at %s: %s", what, name, at,
	         until,
	         strcmp(what, "titer") ? "run the blank method again"
	                               : "standardize it again or enter a new one");
	snprintf(event, sizeof event, "%s_expiring", what);
	run_program(nc, event, now_text, NULL, 0, 0, what, msg);
}

/* Each titrant's titer and blank (docs/calibration.md, "Titer and blank
 * validity"): told before they expire. */
static void look_titers(notify_cmd_t *nc)
{
	const cfg_t *cfg = nc->ctx->cfg;
	char at[32];
	double now = clock_wall_s();
	bool db_err;
	json_t *all = store_titrants_json(nc->ctx->store, &db_err), *t;
	size_t i;
	time_format_rfc3339(now, at);
	json_array_foreach(json_object_get(all, "titrants"), i, t)
	{
		const char *name = json_string_value(json_object_get(t, "name"));
		store_source_t src;
		double v;
		if (!name)
			continue;
		if (store_titrant_get(nc->ctx->store, name, &v, &src) == STORE_OK && v > 0)
			tell_expiring(nc, "titer", name, src.at, titer_valid_days(cfg, &src), now,
			              at);
		if (store_blank_get(nc->ctx->store, name, &v, &src) == STORE_OK)
			tell_expiring(nc, "blank", name, src.at, blank_valid_days(cfg, NULL), now,
			              at);
	}
	json_decref(all);
}

/* Once a minute: the database's disk, and each station's calibration. */
static void look_slow(notify_cmd_t *nc)
{
	const cfg_t *cfg = nc->ctx->cfg;
	char dir[CFG_PATH_MAX], at[32], msg[400];
	double now = clock_wall_s();
	time_format_rfc3339(now, at);
	snprintf(dir, sizeof dir, "%s", cfg->database);
	char *slash = strrchr(dir, '/');
	if (slash)
		*(slash == dir ? slash + 1 : slash) = '\0';
	else
		snprintf(dir, sizeof dir, ".");
	struct statvfs v;
	if (statvfs(dir, &v) == 0) {
		double avail = (double)v.f_bavail * (double)v.f_frsize;
		double total = (double)v.f_blocks * (double)v.f_frsize;
		bool low = notify_cmd_disk_low(avail, total);
		if (low && !nc->disk_low) {
			snprintf(msg, sizeof msg,
			         "%.0f MiB left of %.0f MiB on %.200s (the database's disk)",
			         avail / 1048576.0, total / 1048576.0, dir);
			run_program(nc, "disk_nearly_full", at, NULL, 0, 0, "disk", msg);
		}
		nc->disk_low = low;
	}
	for (int k = 0; k < nc->ctx->n_stations && k < CFG_MAX_STATIONS; k++) {
		const char *name = station_name(nc->ctx->stations[k]);
		bool db_err;
		json_t *c = store_calib_latest(nc->ctx->store, name, true, at, &db_err);
		double exp_s = 0;
		int64_t id = json_integer_value(json_object_get(c, "id"));
		const char *exp = json_string_value(json_object_get(c, "expires_at"));
		if (c && exp && time_parse_rfc3339(exp, &exp_s) &&
		    notify_cmd_expiring(exp_s, now) && nc->calib_told[k] != id) {
			snprintf(msg, sizeof msg,
			         "calibration %lld of station %s expires at %s: calibrate again "
			         "before the next pH run",
			         (long long)id, name, exp);
			run_program(nc, "calibration_expiring", at, name, 0, 0, "calibration", msg);
			nc->calib_told[k] = id;
		}
		json_decref(c);
	}
}

static void *notify_main(void *arg)
{
	notify_cmd_t *nc = arg;
	pthread_mutex_lock(&nc->lock);
	for (;;) {
		bool stopping = nc->stopping;
		pthread_mutex_unlock(&nc->lock);
		look(nc);
		if (clock_mono_s() - nc->slow_at_s >= NOTIFY_SLOW_S) {
			nc->slow_at_s = clock_mono_s();
			look_slow(nc);
			nc->titers_changed = true;
		}
		if (nc->titers_changed) {
			nc->titers_changed = false;
			look_titers(nc);
		}
		pthread_mutex_lock(&nc->lock);
		if (stopping)
			break;
		struct timespec to;
		clock_gettime(CLOCK_REALTIME, &to);
		to.tv_nsec += (long)(NOTIFY_POLL_S * 1e9);
		if (to.tv_nsec >= 1000000000L) {
			to.tv_sec++;
			to.tv_nsec -= 1000000000L;
		}
		if (!nc->stopping)
			pthread_cond_timedwait(&nc->wake, &nc->lock, &to);
	}
	pthread_mutex_unlock(&nc->lock);
	return NULL;
}

notify_cmd_t *notify_cmd_start(http_ctx_t *ctx)
{
	if (!ctx->cfg || ctx->cfg->n_notify_argv == 0)
		return NULL;
	notify_cmd_t *nc = calloc(1, sizeof *nc);
	if (!nc)
		return NULL;
	nc->ctx = ctx;
	/* Start after the events already written: an alarm is for what happens
	 * from now on (a restart must not send the last day's again). */
	for (;;) {
		bool db_err;
		json_t *page = store_events_after(ctx->store, nc->cursor, 1000, &db_err);
		int64_t next = page ? json_integer_value(json_object_get(page, "next_after")) : 0;
		json_decref(page);
		if (!page || next == nc->cursor)
			break;
		nc->cursor = next;
	}
	pthread_mutex_init(&nc->lock, NULL);
	pthread_cond_init(&nc->wake, NULL);
	if (pthread_create(&nc->thread, NULL, notify_main, nc)) {
		log_err("notify_command: cannot start its thread");
		pthread_mutex_destroy(&nc->lock);
		pthread_cond_destroy(&nc->wake);
		free(nc);
		return NULL;
	}
	log_notice("notify_command: %s (timeout %g s)", ctx->cfg->notify_argv[0],
	           ctx->cfg->notify_timeout_s);
	return nc;
}

void notify_cmd_stop(notify_cmd_t *nc)
{
	if (!nc)
		return;
	pthread_mutex_lock(&nc->lock);
	nc->stopping = true;
	pthread_cond_signal(&nc->wake);
	pthread_mutex_unlock(&nc->lock);
	pthread_join(nc->thread, NULL);
	pthread_mutex_destroy(&nc->lock);
	pthread_cond_destroy(&nc->wake);
	free(nc);
}
