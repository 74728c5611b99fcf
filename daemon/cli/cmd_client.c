/* cmd_client.c: the `stopcock` client commands start, status, wait, abort
 * and halt, over the daemon's HTTP API (docs/api.md). `show` is in
 * cmd_show.c, `calibrate` in cmd_calibrate.c; shared plumbing in client.c. */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "client.h"
#include "cmd.h"
#include "clock.h"
#include "numparse.h"

#define WAIT_POLL_MS       500  /* how often `wait` asks, ms */
#define WAIT_UNREACHABLE_S 10.0 /* `wait` gives up after the daemon is gone this long, s */

/* ---- start ---- */

int cmd_start(int argc, char **argv)
{
	static const char usage[] =
	    "start --station N --method M --sample-id ID --amount X [--position P]";
	const char *station = NULL, *method = NULL, *sample = NULL, *amount_s = NULL;
	const char *position_s = NULL;
	const client_arg_t args[] = {
	    {"station", &station, NULL, "N  the station to run on"},
	    {"method", &method, NULL, "M  the method id (its latest revision runs)"},
	    {"sample-id", &sample, NULL, "ID  the sample's id, as the LIMS knows it"},
	    {"amount", &amount_s, NULL,
	     "X  the sample amount, in the method's sample unit (mL or g)"},
	    {"position", &position_s, NULL,
	     "P  the sample's rack position (1 or more), on a station with a sample changer"},
	    {NULL, NULL, NULL, NULL}};
	client_t c;
	client_init(&c, "start");
	int pos, early = client_parse(&c, argc, argv, usage, args, &pos);
	if (early >= 0)
		return early;
	if (pos < argc)
		return client_usage(&c, usage, "unexpected argument '%s'", argv[pos]);
	if (!station || !method || !sample || !amount_s)
		return client_usage(&c, usage,
		                    "--station, --method, --sample-id and --amount are "
		                    "all needed");
	double amount;
	if (!parse_decimal(amount_s, &amount) || amount <= 0)
		return client_usage(&c, usage,
		                    "--amount must be a positive number (mL or g, as the method's "
		                    "sample unit says), not '%s'",
		                    amount_s);

	long long position = 0;
	if (position_s && !parse_whole(position_s, 1, 1000000, &position))
		return client_usage(&c, usage,
		                    "--position must be a whole number of 1 or more (the rack "
		                    "position), not '%s'",
		                    position_s);

	json_t *body = json_pack("{s:s,s:s,s:s,s:f}", "station", station, "method", method,
	                         "sample_id", sample, "amount", amount);
	if (body && position > 0)
		json_object_set_new(body, "position", json_integer((json_int_t)position));
	json_t *reply = NULL;
	int rc = client_json(&c, "POST", "/v1/runs", body, true, &reply, NULL);
	json_decref(body);
	if (rc == 0) {
		json_t *id = json_object_get(reply, "id");
		if (json_is_integer(id)) {
			printf("%lld\n", (long long)json_integer_value(id));
		} else {
			client_say(&c, "stopcockd's reply has no run id");
			rc = -1;
		}
	}
	json_decref(reply);
	return client_exit(&c, rc);
}

/* ---- status ---- */

static void print_station(client_t *c, const json_t *st)
{
	char b1[32], b2[32], b4[32], b5[32];
	const json_t *rd = json_object_get(st, "reading");
	const json_t *bu = json_object_get(st, "burette");
	double age_s = client_num(rd, "age_s");
	if (!isfinite(age_s))
		age_s = client_num(st, "reading_age_s");
	const json_t *run = json_object_get(st, "run");
	const char *phase = client_str(st, "phase", NULL);
	char runs[32] = "-", phase_buf[16];
	if (json_is_integer(run)) {
		snprintf(runs, sizeof runs, "%lld", (long long)json_integer_value(run));
		if (!phase) { /* the station does not say: ask the run */
			char path[64];
			json_t *rec = NULL;
			char err[256];
			snprintf(path, sizeof path, "/v1/runs/%lld",
			         (long long)json_integer_value(run));
			if (!client_json_quiet(c, "GET", path, &rec, NULL, err, sizeof err)) {
				snprintf(phase_buf, sizeof phase_buf, "%s",
				         client_str(rec, "phase", "-"));
				phase = phase_buf;
			}
			json_decref(rec);
		}
	}
	char temp[40];
	double t_c = client_num(rd, "temperature_c");
	if (isfinite(t_c))
		snprintf(temp, sizeof temp, "%.1f °C", t_c);
	else
		snprintf(temp, sizeof temp, "-");
	char age[32] = "-";
	if (isfinite(age_s))
		snprintf(age, sizeof age, "%.1f s", age_s);
	/* This run's volume and what the syringe holds, apart: a refilled
	 * syringe at the start of a run is not "0 mL". */
	char dispensed[24], syringe[48], b6[32];
	snprintf(dispensed, sizeof dispensed, "%s mL",
	         client_fmt(b4, sizeof b4, client_num(bu, "dispensed_ml"), 3));
	snprintf(syringe, sizeof syringe, "%s / %s mL",
	         client_fmt(b6, sizeof b6, client_num(bu, "contents_ml"), 3),
	         client_fmt(b5, sizeof b5, client_num(bu, "capacity_ml"), 3));
	/* "°C" is two bytes but one column: pad by hand. */
	printf("%-10s %-11s %-10s %6s %8s %-9s %6s  %10s  %-19s %s\n", client_str(st, "name", "?"),
	       client_str(st, "state", "?"), phase ? phase : "-",
	       client_fmt(b1, sizeof b1, client_num(rd, "ph"), 2),
	       client_fmt(b2, sizeof b2, client_num(rd, "mv"), 1), temp, age, dispensed, syringe,
	       runs);
	/* The sample changer and the series, under the station's line. */
	const json_t *ch = json_object_get(st, "changer");
	if (json_is_object(ch)) {
		const json_t *pos = json_object_get(ch, "position");
		if (json_is_integer(pos))
			printf("  changer: position %lld, head %s%s\n",
			       (long long)json_integer_value(pos), client_str(ch, "lift", "?"),
			       json_is_true(json_object_get(ch, "moving")) ? ", moving" : "");
		else
			printf("  changer: not answered yet\n");
	}
	const json_t *se = json_object_get(st, "series");
	if (json_is_object(se)) {
		const char *prompt = client_str(se, "prompt", NULL);
		printf("  series %lld: %s%s%s\n",
		       (long long)json_integer_value(json_object_get(se, "id")),
		       client_str(se, "state", "?"), prompt ? ", waiting: " : "",
		       prompt ? prompt : "");
	}
	/* What needs a person, under the station's line. */
	if (json_is_true(json_object_get(bu, "halt_pending")))
		printf("  burette not confirmed halted: %s\n",
		       client_str(st, "error", "no answer"));
	const char *held = client_str(st, "held_reason", NULL);
	if (held)
		printf("  held: %s (stopcock resume --station %s)\n", held,
		       client_str(st, "name", "?"));
}

int cmd_status(int argc, char **argv)
{
	static const char usage[] = "status";
	client_t c;
	client_init(&c, "status");
	int early = client_parse_bare(&c, argc, argv, usage);
	if (early >= 0)
		return early;
	json_t *j;
	int rc;
	json_t *list = client_get_list(&c, "/v1/stations", "stations", "station", &j, &rc);
	if (list) {
		if (json_array_size(list) == 0) {
			printf("no stations configured\n");
		} else {
			printf("%-10s %-11s %-10s %6s %8s %-8s %6s  %10s  %-19s %s\n", "STATION",
			       "STATE", "PHASE", "PH", "MV", "TEMP", "AGE", "DISPENSED", "SYRINGE",
			       "RUN");
			size_t i;
			json_t *st;
			json_array_foreach(list, i, st) print_station(&c, st);
		}
	}
	json_decref(j);
	return client_exit(&c, rc);
}

/* ---- wait ---- */

static bool state_is_final(const char *s)
{
	return !strcmp(s, "finished") || !strcmp(s, "aborted") || !strcmp(s, "failed") ||
	       !strcmp(s, "interrupted");
}

/* The station's live reading for the progress line, or NULL. */
static json_t *station_reading(client_t *c, const char *name)
{
	json_t *j = NULL, *found = NULL;
	char err[256];
	if (client_json_quiet(c, "GET", "/v1/stations", &j, NULL, err, sizeof err))
		return NULL;
	json_t *list = json_is_array(j) ? j : json_object_get(j, "stations");
	size_t i;
	json_t *st;
	json_array_foreach(list, i, st)
	{
		if (!strcmp(client_str(st, "name", ""), name)) {
			found = json_object_get(st, "reading");
			json_incref(found);
			break;
		}
	}
	json_decref(j);
	return found;
}

/* The pH of the run's last point, or NAN. `run_path` is /v1/runs/ID. */
static double last_point_ph_of(client_t *c, const char *run_path)
{
	char path[96], err[256];
	json_t *j = NULL;
	snprintf(path, sizeof path, "%s/points", run_path);
	if (client_json_quiet(c, "GET", path, &j, NULL, err, sizeof err))
		return NAN;
	json_t *list = json_is_array(j) ? j : json_object_get(j, "points");
	size_t n = json_array_size(list);
	double ph = n ? client_num(json_array_get(list, n - 1), "ph") : NAN;
	json_decref(j);
	return ph;
}

/* The short summary printed when the run has ended. */
/* 0 for a finished run whose results all pass or carry no limits, 3 for a
 * finished run with a result outside its limits, 1 otherwise (docs/cli.md). */
static int final_status(const json_t *rec)
{
	if (strcmp(client_str(rec, "state", "?"), "finished"))
		return CLIENT_EXIT_FAIL;
	size_t i;
	const json_t *res;
	int rc = CLIENT_EXIT_OK;
	json_array_foreach(json_object_get(rec, "results"), i, res)
	{
		const char *a = client_str(res, "accept", "none");
		if (!strcmp(a, "low") || !strcmp(a, "high"))
			rc = CLIENT_EXIT_OUT_OF_LIMITS;
		else if (strcmp(a, "pass") && strcmp(a, "none"))
			return CLIENT_EXIT_FAIL; /* "missing", "doubtful" or a word this
			                          * client does not know: someone must look */
	}
	return rc;
}

static void print_final(long long id, const json_t *rec)
{
	char b[32];
	printf("run %lld %s", id, client_str(rec, "state", "?"));
	const char *why = client_str(rec, "stop_reason", NULL);
	if (why)
		printf(" (%s)", why);
	size_t i;
	json_t *e;
	json_array_foreach(json_object_get(rec, "endpoints"), i, e)
	{
		printf("%s E%lld %s mL", i ? "," : ":",
		       (long long)json_integer_value(json_object_get(e, "n")),
		       client_fmt(b, sizeof b, client_num(e, "volume_ml"), 4));
		if (client_str(e, "doubt", NULL))
			printf(" (doubtful)");
	}
	json_array_foreach(json_object_get(rec, "results"), i, e)
	{
		json_t *dec = json_object_get(e, "decimals");
		printf("%s %s %s %s (%s)", i ? "," : ";", client_str(e, "name", "?"),
		       client_fmt(b, sizeof b, client_num(e, "value"),
		                  json_is_integer(dec) ? (int)json_integer_value(dec) : -1),
		       client_str(e, "unit", ""), client_str(e, "accept", "none"));
	}
	printf("\n");
	json_array_foreach(json_object_get(rec, "endpoints"), i, e)
	{
		const char *doubt = client_str(e, "doubt", NULL);
		if (doubt)
			printf("  doubtful E%lld: %s\n",
			       (long long)json_integer_value(json_object_get(e, "n")), doubt);
	}
	json_t *faults = json_object_get(rec, "faults");
	json_array_foreach(faults, i, e)
	    printf("  fault %s: %s\n", client_str(e, "code", "?"), client_str(e, "message", ""));
}

/* What `wait` shows while it waits. */
typedef struct watch {
	bool tty;           /* stderr is a terminal: rewrite one line in place */
	char line[256];     /* the last progress line */
	char last_key[128]; /* state, phase and additions of the last line written */
	long long last_additions;
	double last_point_ph;
} watch_t;

/* One progress line: state/phase, additions, volume, signal. On a terminal
 * it is rewritten at each poll; otherwise written when the state, the phase
 * or the number of additions changed. */
static void show_progress(client_t *c, watch_t *w, long long id, const json_t *rec,
                          const char *run_path)
{
	const char *state = client_str(rec, "state", "?");
	const char *phase = client_str(rec, "phase", NULL);
	json_t *add = json_object_get(rec, "additions");
	long long additions = json_is_integer(add) ? json_integer_value(add) : 0;
	char b1[32], b2[32], b3[32], sig[64] = "";
	if (!strcmp(state, "running")) {
		/* The live reading; when the probe gives only mV, the pH of the
		 * last point (the engine's calibrated value). */
		if (additions != w->last_additions) {
			w->last_point_ph = last_point_ph_of(c, run_path);
			w->last_additions = additions;
		}
		json_t *rd = station_reading(c, client_str(rec, "station", ""));
		double ph = client_num(rd, "ph");
		if (!isfinite(ph))
			ph = w->last_point_ph;
		if (rd)
			snprintf(sig, sizeof sig, "  pH %s  %s mV",
			         client_fmt(b2, sizeof b2, ph, 2),
			         client_fmt(b3, sizeof b3, client_num(rd, "mv"), 1));
		json_decref(rd);
	}
	snprintf(w->line, sizeof w->line, "run %lld %s%s%s  additions %lld  %s mL%s", id, state,
	         phase ? "/" : "", phase ? phase : "", additions,
	         client_fmt(b1, sizeof b1, client_num(rec, "dispensed_ml"), 3), sig);
	char key[128];
	snprintf(key, sizeof key, "%s %s %lld", state, phase ? phase : "", additions);
	if (w->tty) {
		fprintf(stderr, "\r\033[K%s", w->line);
		fflush(stderr);
	} else if (strcmp(key, w->last_key)) {
		fprintf(stderr, "%s\n", w->line);
		snprintf(w->last_key, sizeof w->last_key, "%s", key);
	}
}

int cmd_wait(int argc, char **argv)
{
	static const char usage[] = "wait RUN [--timeout S]";
	const char *timeout_arg = NULL;
	const client_arg_t args[] = {{"timeout", &timeout_arg, NULL,
	                              "S  give up after S seconds (default: wait for the end)"},
	                             {NULL, NULL, NULL, NULL}};
	client_t c;
	client_init(&c, "wait");
	int pos, early = client_parse(&c, argc, argv, usage, args, &pos);
	if (early >= 0)
		return early;
	double timeout_s = 0; /* 0: as long as it takes */
	if (timeout_arg && (!parse_decimal(timeout_arg, &timeout_s) || timeout_s <= 0))
		return client_usage(&c, usage,
		                    "--timeout must be a positive number of seconds, not '%s'",
		                    timeout_arg);
	long long id;
	if (pos != argc - 1 || !client_parse_id(argv[pos], &id))
		return client_usage(&c, usage, "give one run id (a positive integer)");

	watch_t w = {.tty = isatty(STDERR_FILENO), .last_additions = -1, .last_point_ph = NAN};
	char path[64], last_err[1500] = "";
	snprintf(path, sizeof path, "/v1/runs/%lld", id);
	double t0 = clock_mono_s(), gone_since = -1;
	bool seen = false;
	int rc = CLIENT_EXIT_FAIL;
	for (;;) {
		json_t *rec = NULL;
		int status = 0;
		char err[1500];
		if (client_json_quiet(&c, "GET", path, &rec, &status, err, sizeof err)) {
			if (status == 404) {
				client_say(&c, "there is no run %lld", id);
				break;
			}
			if (c.bad_args) {
				client_say(&c, "%s", err);
				rc = CLIENT_EXIT_USAGE;
				break;
			}
			snprintf(last_err, sizeof last_err, "%s", err);
			if (status == 0) {
				/* Not reachable. Once the run was seen the daemon may
				 * be restarting: give it a while; before, fail at once. */
				if (gone_since < 0)
					gone_since = clock_mono_s();
				if (!seen || clock_mono_s() - gone_since > WAIT_UNREACHABLE_S) {
					if (w.tty && w.line[0])
						fputc('\n', stderr);
					client_say(&c, "%s", err);
					break;
				}
			}
		} else {
			gone_since = -1;
			seen = true;
			const char *state = client_str(rec, "state", "?");
			if (state_is_final(state)) {
				if (w.tty && w.line[0])
					fprintf(stderr, "\r\033[K");
				print_final(id, rec);
				rc = final_status(rec);
				json_decref(rec);
				break;
			}
			show_progress(&c, &w, id, rec, path);
		}
		json_decref(rec);
		if (timeout_s > 0 && clock_mono_s() - t0 >= timeout_s) {
			if (w.tty && w.line[0])
				fputc('\n', stderr);
			if (gone_since >= 0)
				client_say(&c, "%s", last_err);
			else
				client_say(&c, "run %lld has not ended after %g s", id, timeout_s);
			break;
		}
		client_sleep_ms(WAIT_POLL_MS);
	}
	client_free(&c);
	return rc;
}

/* ---- abort, halt ---- */

int cmd_abort(int argc, char **argv)
{
	static const char usage[] = "abort RUN";
	client_t c;
	client_init(&c, "abort");
	int pos, early = client_parse(&c, argc, argv, usage, NULL, &pos);
	if (early >= 0)
		return early;
	long long id;
	if (pos != argc - 1 || !client_parse_id(argv[pos], &id))
		return client_usage(&c, usage, "give one run id (a positive integer)");
	char path[64];
	snprintf(path, sizeof path, "/v1/runs/%lld/abort", id);
	json_t *reply = NULL;
	int rc = client_json(&c, "POST", path, NULL, true, &reply, NULL);
	if (rc == 0)
		printf("run %lld %s\n", id, client_str(reply, "state", "aborted"));
	json_decref(reply);
	return client_exit(&c, rc);
}

/* halt and resume: one POST to the station, one line on success. */
static int station_post(int argc, char **argv, const char *cmd, const char *done)
{
	char usage[64];
	const char *station = NULL;
	const client_arg_t args[] = {{"station", &station, NULL, "N  the station"},
	                             {NULL, NULL, NULL, NULL}};
	client_t c;
	snprintf(usage, sizeof usage, "%s --station N", cmd);
	client_init(&c, cmd);
	int pos, early = client_parse(&c, argc, argv, usage, args, &pos);
	if (early >= 0)
		return early;
	if (pos < argc)
		return client_usage(&c, usage, "unexpected argument '%s'", argv[pos]);
	if (!station || !*station)
		return client_usage(&c, usage, "--station is needed");
	char seg[200], path[256];
	client_escape_segment(station, seg, sizeof seg);
	snprintf(path, sizeof path, "/v1/stations/%s/%s", seg, cmd);
	json_t *reply = NULL;
	int rc = client_json(&c, "POST", path, NULL, true, &reply, NULL);
	if (rc == 0) {
		if (!strcmp(cmd, "resume") && json_is_false(json_object_get(reply, "resumed")))
			printf("station %s was not held\n", station);
		else
			printf("station %s %s\n", station, done);
	}
	json_decref(reply);
	return client_exit(&c, rc);
}

int cmd_halt(int argc, char **argv)
{
	return station_post(argc, argv, "halt", "halted");
}

int cmd_resume(int argc, char **argv)
{
	return station_post(argc, argv, "resume", "resumed: its queued runs may start");
}
