/* cmd_calibrate.c: `stopcock calibrate --station N --buffers 4.01,7.00,10.01`
 * walks the operator through an electrode calibration on the daemon
 * (POST /v1/calibrations, then POST .../next per buffer), showing each
 * buffer's measured mV and, at the end, the slope, offset and verdict.
 * Exit 0 when the calibration is accepted, 1 when rejected or broken off. */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "client.h"
#include "cmd.h"
#include "clock.h"
#include "numparse.h"

#define CAL_MAX_BUFFERS   8     /* sent on; the daemon enforces its own limit */
#define CAL_POLL_MS       1000  /* ms between polls while a buffer is measured: one line a second */
#define CAL_MOVE_S        5.0   /* s: the live line says how far the reading moved in this time */
#define CAL_MEASURE_MAX_S 600.0 /* s; the daemon has its own, shorter time limit */

static const char usage[] = "calibrate --station N --buffers 4.01,7.00,10.01";

static int parse_buffers(const char *s, double *ph, int max)
{
	int n = 0;
	char *copy = strdup(s), *save = NULL;
	if (!copy)
		return -1;
	for (char *tok = strtok_r(copy, ",", &save); tok; tok = strtok_r(NULL, ",", &save)) {
		double v;
		if (n == max || !parse_decimal(tok, &v) || v < 0 || v > 14) {
			n = -1;
			break;
		}
		ph[n++] = v;
	}
	free(copy);
	return n;
}

/* The entry of `buffers` for the nominal pH, or NULL. */
static const json_t *buffer_entry(const json_t *cal, double nominal)
{
	size_t i;
	json_t *b;
	json_array_foreach(json_object_get(cal, "buffers"), i, b)
	{
		double v = client_num(b, "nominal");
		if (isfinite(v) && fabs(v - nominal) < 1e-6)
			return b;
	}
	return NULL;
}

static void print_verdict(const json_t *cal)
{
	char b1[32], b2[32], b3[32], b4[32], b5[32];
	size_t i;
	json_t *b;
	/* One column each, right-aligned, units in the header ("°C" is two
	 * bytes but one column: the header is padded by hand). */
	printf("  buffer  pH at T     T, °C       mV   off the line, mV\n");
	json_array_foreach(json_object_get(cal, "buffers"), i, b)
	{
		printf("  %6s  %7s  %8s  %7s  %17s\n",
		       client_fmt(b1, sizeof b1, client_num(b, "nominal"), 2),
		       client_fmt(b2, sizeof b2, client_num(b, "ph"), 3),
		       client_fmt(b3, sizeof b3, client_num(b, "temperature_c"), 1),
		       client_fmt(b4, sizeof b4, client_num(b, "mv"), 1),
		       client_fmt(b5, sizeof b5, client_num(b, "residual_mv"), 1));
	}
	printf("slope   %s %% of the Nernst slope\n",
	       client_fmt(b1, sizeof b1, client_num(cal, "slope_pct"), 1));
	printf("offset  %s mV at pH 7\n",
	       client_fmt(b1, sizeof b1, client_num(cal, "offset_mv"), 1));
	const char *state = client_str(cal, "state", "?");
	if (!strcmp(state, "accepted")) {
		printf("verdict accepted");
		const char *exp = client_str(cal, "expires_at", NULL);
		if (exp)
			printf(", valid until %s", exp);
		printf("\n");
	} else {
		printf("verdict %s: %s\n", state, client_str(cal, "reason", "no reason given"));
	}
}

/* The live reading while a buffer is measured: the station's mV now and how
 * far it moved over the last CAL_MOVE_S, once a second (rewritten in place on
 * a terminal, a line every 5 s otherwise). The daemon decides stability by
 * its own rule (docs/calibration.md, "Stability"); this is what a person
 * watches. */
#define LIVE_MAX 64
typedef struct live {
	double t[LIVE_MAX], mv[LIVE_MAX];
	int n;
	double last_line_s;
} live_t;

static void live_line(client_t *c, const char *station, const char *nb, double elapsed_s, bool tty,
                      live_t *lv)
{
	json_t *j = NULL, *st;
	size_t i;
	double mv = NAN, moved = NAN;
	if (client_json_quiet(c, "GET", "/v1/stations", &j, NULL, NULL, 0) == 0) {
		json_array_foreach(json_object_get(j, "stations"), i, st)
		{
			if (!strcmp(client_str(st, "name", ""), station))
				mv = client_num(json_object_get(st, "reading"), "mv");
		}
	}
	json_decref(j);
	if (isfinite(mv)) {
		if (lv->n == LIVE_MAX) {
			memmove(lv->t, lv->t + 1, (LIVE_MAX - 1) * sizeof lv->t[0]);
			memmove(lv->mv, lv->mv + 1, (LIVE_MAX - 1) * sizeof lv->mv[0]);
			lv->n--;
		}
		lv->t[lv->n] = elapsed_s;
		lv->mv[lv->n++] = mv;
		for (int k = 0; k < lv->n; k++)
			if (elapsed_s - lv->t[k] <= CAL_MOVE_S + 0.5) {
				if (elapsed_s - lv->t[k] >= CAL_MOVE_S - 1.5)
					moved = mv - lv->mv[k];
				break;
			}
	}
	char m1[32], m2[32], line[160];
	snprintf(line, sizeof line, "buffer %s: %s mV, moved %s mV in the last %.0f s; %.0f s", nb,
	         client_fmt(m1, sizeof m1, mv, 1), client_fmt(m2, sizeof m2, moved, 2), CAL_MOVE_S,
	         elapsed_s);
	if (tty) {
		fprintf(stderr, "\r\033[K%s", line);
	} else if (elapsed_s - lv->last_line_s >= 5.0) {
		fprintf(stderr, "%s\n", line);
		lv->last_line_s = elapsed_s;
	}
	fflush(stderr);
}

int cmd_calibrate(int argc, char **argv)
{
	const char *station = NULL, *buffers_s = NULL;
	const client_arg_t args[] = {
	    {"station", &station, NULL, "N  the station whose electrode is calibrated"},
	    {"buffers", &buffers_s, NULL,
	     "B1,B2,...  the buffers' pH at 25 degC, in the order you use them"},
	    {NULL, NULL, NULL, NULL}};
	client_t c;
	client_init(&c, "calibrate");
	int pos, early = client_parse(&c, argc, argv, usage, args, &pos);
	if (early >= 0)
		return early;
	if (pos < argc)
		return client_usage(&c, usage, "unexpected argument '%s'", argv[pos]);
	if (!station || !buffers_s)
		return client_usage(&c, usage, "--station and --buffers are needed");
	double ph[CAL_MAX_BUFFERS];
	int n = parse_buffers(buffers_s, ph, CAL_MAX_BUFFERS);
	if (n < 1)
		return client_usage(&c, usage,
		                    "--buffers takes pH values from 0 to 14 separated by commas, "
		                    "not '%s'",
		                    buffers_s);

	json_t *list = json_array();
	for (int i = 0; i < n; i++)
		json_array_append_new(list, json_real(ph[i]));
	json_t *body = json_pack("{s:s,s:o}", "station", station, "buffers", list);
	json_t *cal = NULL;
	int rc = client_json(&c, "POST", "/v1/calibrations", body, true, &cal, NULL);
	json_decref(body);
	if (rc)
		return client_exit(&c, rc);
	json_t *idj = json_object_get(cal, "id");
	long long id = json_is_integer(idj) ? json_integer_value(idj) : 0;
	if (id <= 0) {
		client_say(&c, "stopcockd's reply has no calibration id");
		json_decref(cal);
		client_free(&c);
		return CLIENT_EXIT_FAIL;
	}
	fprintf(stderr, "calibration %lld on station %s: %d buffers\n", id, station, n);
	bool tty = isatty(STDERR_FILENO);
	char path[96];
	int exit_code = CLIENT_EXIT_FAIL;
	for (;;) {
		const char *state = client_str(cal, "state", "?");
		if (!strcmp(state, "accepted") || !strcmp(state, "rejected")) {
			print_verdict(cal);
			exit_code = strcmp(state, "accepted") ? CLIENT_EXIT_FAIL : CLIENT_EXIT_OK;
			break;
		}
		if (strcmp(state, "waiting")) {
			client_say(&c, "unexpected calibration state '%s'", state);
			break;
		}
		double next = client_num(cal, "next_buffer");
		char nb[32];
		/* A script answering the prompt reads it line by line: end it there. */
		fprintf(stderr, "Put the electrode in buffer %s and press Enter%s",
		        client_fmt(nb, sizeof nb, next, 2), isatty(STDIN_FILENO) ? " " : "\n");
		fflush(stderr);
		char line[256];
		if (!fgets(line, sizeof line, stdin)) {
			fprintf(stderr, "\n");
			client_say(&c, "no answer (end of input); calibration %lld left waiting",
			           id);
			break;
		}
		snprintf(path, sizeof path, "/v1/calibrations/%lld/next", id);
		json_t *r = NULL;
		if (client_json(&c, "POST", path, NULL, true, &r, NULL))
			break;
		json_decref(r);
		/* Poll until this buffer is measured; show the live mV meanwhile. */
		snprintf(path, sizeof path, "/v1/calibrations/%lld", id);
		double t0 = clock_mono_s();
		bool broken = false;
		live_t lv = {0};
		for (;;) {
			json_t *now = NULL;
			if (client_json(&c, "GET", path, NULL, false, &now, NULL)) {
				broken = true;
				break;
			}
			json_decref(cal);
			cal = now;
			if (strcmp(client_str(cal, "state", "?"), "measuring"))
				break;
			if (clock_mono_s() - t0 > CAL_MEASURE_MAX_S) {
				client_say(&c, "buffer %s not stable after %.0f s; giving up", nb,
				           CAL_MEASURE_MAX_S);
				broken = true;
				break;
			}
			live_line(&c, station, nb, clock_mono_s() - t0, tty, &lv);
			client_sleep_ms(CAL_POLL_MS);
		}
		if (tty)
			fprintf(stderr, "\r\033[K");
		if (broken)
			break;
		const json_t *b = buffer_entry(cal, next);
		char b1[32], b2[32];
		if (b && isfinite(client_num(b, "mv")))
			fprintf(stderr, "buffer %s: %s mV at %s °C\n", nb,
			        client_fmt(b1, sizeof b1, client_num(b, "mv"), 1),
			        client_fmt(b2, sizeof b2, client_num(b, "temperature_c"), 1));
	}
	json_decref(cal);
	client_free(&c);
	return exit_code;
}
