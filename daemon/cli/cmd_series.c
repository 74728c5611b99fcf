/* cmd_series.c: `stopcock series start|show|wait|abort|next` (docs/cli.md,
 * "series"): a work list from a CSV file queued as a series, and the series
 * followed, stopped or moved on (docs/api.md, "Series").
 *
 * The work list is CSV (RFC 4180: commas, "quoted" fields with "" for a
 * quote, CRLF or LF) with a header row naming its columns: sample_id,
 * method, amount, and optionally position (one rack position per replicate,
 * separated by spaces or ';') and factor:NAME columns (numbers kept with the
 * sample). Every error is reported as FILE:ROW:COLUMN: message (row 1 is the
 * header, columns count from 1) and nothing is sent while any remains.
 */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "client.h"
#include "clock.h"
#include "cmd.h"
#include "diag.h"
#include "names.h"
#include "numparse.h"

#define SERIES_POLL_MS   500
#define CSV_MAX_COLUMNS  32
#define CSV_MAX_ROWS     200 /* the most samples a series takes (docs/api.md) */
#define CSV_MAX_FIELD    512
#define CSV_MAX_POSITION 999

/* ---- CSV ---- */

typedef struct {
	const char *p, *end;
	int row; /* 1-based row of the record being read */
} csv_t;

/* Read one record into fields (each malloc'd); returns the number of fields,
 * 0 at the end of the text, -1 with *err on a malformed record. */
static int csv_record(csv_t *c, char **fields, int cap, int *err_col, const char **err)
{
	int n = 0;
	if (c->p >= c->end)
		return 0;
	c->row++;
	for (;;) {
		char buf[CSV_MAX_FIELD];
		size_t len = 0;
		bool quoted = c->p < c->end && *c->p == '"';
		if (quoted)
			c->p++;
		for (;;) {
			if (c->p >= c->end) {
				if (quoted) {
					*err_col = n + 1;
					*err = "a quoted field is not closed";
					return -1;
				}
				break;
			}
			char ch = *c->p;
			if (quoted && ch == '"') {
				if (c->p + 1 < c->end && c->p[1] == '"') {
					c->p += 2;
					ch = '"';
				} else {
					c->p++;
					quoted = false;
					continue;
				}
			} else if (!quoted && (ch == ',' || ch == '\n' || ch == '\r')) {
				break;
			} else {
				c->p++;
			}
			if (len + 1 >= sizeof buf) {
				*err_col = n + 1;
				*err = "the field is longer than 511 bytes";
				return -1;
			}
			buf[len++] = ch;
		}
		buf[len] = '\0';
		if (n >= cap) {
			*err_col = n + 1;
			*err = "more than 32 columns";
			return -1;
		}
		fields[n++] = strdup(buf);
		if (c->p < c->end && *c->p == ',') {
			c->p++;
			continue;
		}
		if (c->p < c->end && *c->p == '\r')
			c->p++;
		if (c->p < c->end && *c->p == '\n')
			c->p++;
		return n;
	}
}

static void free_fields(char **f, int n)
{
	for (int i = 0; i < n; i++)
		free(f[i]);
}

static bool blank_record(char **f, int n)
{
	return n == 1 && !f[0][0];
}

/* The work list as the samples[] of POST /v1/series; NULL with errors in d. */
static json_t *worklist_read(const char *path, diag_list_t *d)
{
	FILE *fp = fopen(path, "rb");
	if (!fp) {
		diag_add(d, path, 0, 0, "cannot read the work list: %s", strerror(errno));
		return NULL;
	}
	char *text = NULL;
	size_t len = 0, cap = 0;
	for (;;) {
		if (len + 4096 > cap) {
			char *t = realloc(text, cap = cap * 2 + 8192);
			if (!t)
				break;
			text = t;
		}
		size_t got = fread(text + len, 1, cap - len, fp);
		len += got;
		if (got == 0)
			break;
	}
	fclose(fp);
	csv_t c = {.p = text, .end = text + len};
	/* A UTF-8 byte order mark, as spreadsheets write one, is not a column. */
	if (len >= 3 && !memcmp(text, "\xEF\xBB\xBF", 3))
		c.p += 3;
	char *head[CSV_MAX_COLUMNS], *f[CSV_MAX_COLUMNS];
	int col_sample = -1, col_method = -1, col_amount = -1, col_pos = -1, ecol;
	const char *emsg;
	int nh = csv_record(&c, head, CSV_MAX_COLUMNS, &ecol, &emsg);
	json_t *samples = json_array();
	if (nh < 0) {
		diag_add(d, path, c.row, ecol, "%s", emsg);
		nh = 0;
	} else if (nh == 0) {
		diag_add(d, path, 1, 1,
		         "the work list is empty: it needs a header row (sample_id,method,amount,"
		         "position) and one row per sample");
	}
	for (int i = 0; i < nh; i++) {
		const char *h = head[i];
		int *slot = !strcmp(h, "sample_id")  ? &col_sample
		            : !strcmp(h, "method")   ? &col_method
		            : !strcmp(h, "amount")   ? &col_amount
		            : !strcmp(h, "position") ? &col_pos
		                                     : NULL;
		if (slot && *slot >= 0)
			diag_add(d, path, 1, i + 1, "column '%s' is given twice", h);
		else if (slot)
			*slot = i;
		else if (!strncmp(h, "factor:", 7) && name_is_id(h + 7, 64))
			;
		else
			diag_add(
			    d, path, 1, i + 1,
			    "unknown column '%s' (columns: sample_id, method, amount, position, "
			    "factor:NAME)",
			    h);
	}
	if (nh > 0) {
		if (col_sample < 0)
			diag_add(d, path, 1, 1, "the header has no column sample_id");
		if (col_method < 0)
			diag_add(d, path, 1, 1, "the header has no column method");
		if (col_amount < 0)
			diag_add(d, path, 1, 1, "the header has no column amount");
	}
	int n;
	while (nh > 0 && (n = csv_record(&c, f, CSV_MAX_COLUMNS, &ecol, &emsg)) != 0) {
		int row = c.row;
		if (n < 0) {
			diag_add(d, path, row, ecol, "%s", emsg);
			break;
		}
		if (blank_record(f, n)) {
			free_fields(f, n);
			continue;
		}
		if (n != nh) {
			diag_add(d, path, row, n < nh ? n + 1 : nh + 1,
			         "the row has %d fields, the header %d", n, nh);
			free_fields(f, n);
			continue;
		}
		if (json_array_size(samples) >= CSV_MAX_ROWS) {
			diag_add(d, path, row, 1, "a series takes at most %d samples",
			         CSV_MAX_ROWS);
			free_fields(f, n);
			break;
		}
		json_t *s = json_object(), *factors = NULL;
		for (int i = 0; i < n; i++) {
			const char *v = f[i];
			if (i == col_sample) {
				if (!*v)
					diag_add(d, path, row, i + 1, "sample_id is empty");
				json_object_set_new(s, "sample_id", json_string(v));
			} else if (i == col_method) {
				if (!name_is_id(v, 64))
					diag_add(d, path, row, i + 1,
					         "method '%s' is not a method id ([a-z0-9-])", v);
				json_object_set_new(s, "method", json_string(v));
			} else if (i == col_amount) {
				double a;
				if (!strcmp(v, "weigh")) /* the station's balance weighs it */
					json_object_set_new(s, "amount", json_string("weigh"));
				else if (!parse_decimal(v, &a) || !(a > 0))
					diag_add(d, path, row, i + 1,
					         "amount must be a number above 0, not '%s'", v);
				else
					json_object_set_new(s, "amount", json_real(a));
			} else if (i == col_pos) {
				json_t *pos = json_array();
				char *save = NULL, *tok, *copy = strdup(v);
				for (tok = strtok_r(copy, " ;", &save); tok;
				     tok = strtok_r(NULL, " ;", &save)) {
					long long p;
					if (!parse_whole(tok, 1, CSV_MAX_POSITION, &p)) {
						diag_add(
						    d, path, row, i + 1,
						    "position '%s' is not a whole number 1 to %d",
						    tok, CSV_MAX_POSITION);
						break;
					}
					json_array_append_new(pos, json_integer(p));
				}
				free(copy);
				if (json_array_size(pos))
					json_object_set_new(s, "position", pos);
				else
					json_decref(pos);
			} else if (!strncmp(head[i], "factor:", 7) && *v) {
				double x;
				if (!parse_decimal(v, &x)) {
					diag_add(d, path, row, i + 1,
					         "%s must be a number, not '%s'", head[i], v);
					continue;
				}
				if (!factors)
					factors = json_object();
				json_object_set_new(factors, head[i] + 7, json_real(x));
			}
		}
		if (factors)
			json_object_set_new(s, "factors", factors);
		json_array_append_new(samples, s);
		free_fields(f, n);
	}
	if (nh > 0 && !json_array_size(samples) && !d->n)
		diag_add(d, path, c.row + 1, 1, "the work list has a header but no sample");
	free_fields(head, nh);
	free(text);
	if (d->n) {
		json_decref(samples);
		return NULL;
	}
	return samples;
}

/* ---- printing ---- */

static bool is_final(const char *state)
{
	return strcmp(state, "queued") && strcmp(state, "running");
}

static void print_series(const json_t *s)
{
	char b1[32], b2[32], b3[32];
	printf("series %lld on %s: %s (on_failure %s)\n",
	       (long long)json_integer_value(json_object_get(s, "id")),
	       client_str(s, "station", "?"), client_str(s, "state", "?"),
	       client_str(s, "on_failure", "?"));
	if (*client_str(s, "detail", ""))
		printf("  %s\n", client_str(s, "detail", ""));
	if (*client_str(s, "prompt", ""))
		printf("  waiting: %s\n", client_str(s, "prompt", ""));
	size_t i;
	json_t *x;
	json_array_foreach(json_object_get(s, "samples"), i, x)
	{
		/* "weigh": each beaker's amount comes from the balance */
		const char *weigh = json_string_value(json_object_get(x, "amount"));
		printf("  %s (%s, %s): runs", client_str(x, "sample_id", "?"),
		       client_str(x, "method", "?"),
		       weigh ? weigh : client_fmt(b1, sizeof b1, client_num(x, "amount"), -1));
		size_t k;
		json_t *r;
		json_array_foreach(json_object_get(x, "runs"), k, r)
		    printf(" %lld", (long long)json_integer_value(r));
		if (!json_array_size(json_object_get(x, "runs")))
			printf(" -");
		printf("\n");
		const char *name;
		json_t *st;
		json_object_foreach(json_object_get(x, "stats"), name, st)
		{
			printf("    %s: n %lld, mean %s, sd %s, rsd %s %%, %s", name,
			       (long long)json_integer_value(json_object_get(st, "n")),
			       client_fmt(b1, sizeof b1, client_num(st, "mean"), 6),
			       client_fmt(b2, sizeof b2, client_num(st, "sd"), 6),
			       client_fmt(b3, sizeof b3, client_num(st, "rsd_pct"), 3),
			       client_str(st, "accept", "?"));
			json_t *o = json_object_get(st, "outliers");
			if (json_array_size(o)) {
				printf(", outlier run");
				json_array_foreach(o, k, r)
				    printf(" %lld", (long long)json_integer_value(r));
			}
			printf("\n");
		}
	}
}

/* 0 for a finished series whose statistics all pass or have no limit; 3
 * when one is `high`; 1 for a series that did not finish. */
static int series_status(const json_t *s)
{
	if (strcmp(client_str(s, "state", ""), "finished"))
		return CLIENT_EXIT_FAIL;
	size_t i;
	json_t *x;
	json_array_foreach(json_object_get(s, "samples"), i, x)
	{
		const char *name;
		json_t *st;
		json_object_foreach(json_object_get(x, "stats"), name, st)
		{
			if (!strcmp(client_str(st, "accept", ""), "high"))
				return CLIENT_EXIT_OUT_OF_LIMITS;
		}
	}
	return CLIENT_EXIT_OK;
}

/* ---- the subcommands ---- */

static int series_start(int argc, char **argv)
{
	static const char usage[] =
	    "series start --station N [--on-failure stop|continue] WORKLIST.csv";
	const char *station = NULL, *onf = NULL;
	const client_arg_t args[] = {
	    {"station", &station, NULL, "N  the station that titrates the series"},
	    {"on-failure", &onf, NULL,
	     "stop|continue  after a chemistry failure (default stop; a device fault always "
	     "stops)"},
	    {NULL, NULL, NULL, NULL}};
	client_t c;
	client_init(&c, "series start");
	int pos, early = client_parse(&c, argc, argv, usage, args, &pos);
	if (early >= 0)
		return early;
	if (!station)
		return client_usage(&c, usage, "--station is needed");
	if (onf && strcmp(onf, "stop") && strcmp(onf, "continue"))
		return client_usage(&c, usage, "--on-failure is stop or continue, not '%s'", onf);
	if (pos != argc - 1)
		return client_usage(&c, usage, "give one work list (a CSV file)");
	diag_list_t d = DIAG_LIST_INIT;
	json_t *samples = worklist_read(argv[pos], &d);
	if (!samples) {
		diag_print(&d, stderr);
		diag_free(&d);
		client_free(&c);
		return CLIENT_EXIT_USAGE;
	}
	diag_free(&d);
	json_t *body = json_pack("{s:s,s:o}", "station", station, "samples", samples);
	if (onf)
		json_object_set_new(body, "on_failure", json_string(onf));
	json_t *reply = NULL;
	int rc = client_json(&c, "POST", "/v1/series", body, true, &reply, NULL);
	json_decref(body);
	if (rc == 0)
		printf("%lld\n", (long long)json_integer_value(json_object_get(reply, "id")));
	json_decref(reply);
	return client_exit(&c, rc);
}

static int one_id(client_t *c, int argc, char **argv, const char *usage, long long *id)
{
	int pos, early = client_parse(c, argc, argv, usage, NULL, &pos);
	if (early >= 0)
		return early;
	if (pos != argc - 1 || !client_parse_id(argv[pos], id))
		return client_usage(c, usage, "give one series id (a positive integer)");
	return -1;
}

static int series_show(int argc, char **argv)
{
	static const char usage[] = "series show ID";
	client_t c;
	long long id;
	client_init(&c, "series show");
	int early = one_id(&c, argc, argv, usage, &id);
	if (early >= 0)
		return early;
	char path[64];
	snprintf(path, sizeof path, "/v1/series/%lld", id);
	json_t *s = NULL;
	int rc = client_json(&c, "GET", path, NULL, false, &s, NULL);
	if (rc == 0)
		print_series(s);
	json_decref(s);
	return client_exit(&c, rc);
}

static int series_post(int argc, char **argv, const char *what)
{
	char usage[32], cmd[32];
	client_t c;
	long long id;
	snprintf(usage, sizeof usage, "series %s ID", what);
	snprintf(cmd, sizeof cmd, "series %s", what);
	client_init(&c, cmd);
	int early = one_id(&c, argc, argv, usage, &id);
	if (early >= 0)
		return early;
	char path[64];
	snprintf(path, sizeof path, "/v1/series/%lld/%s", id, what);
	int rc = client_json(&c, "POST", path, NULL, true, NULL, NULL);
	if (rc == 0)
		printf("series %lld: %s\n", id,
		       !strcmp(what, "abort") ? "abort requested" : "next beaker in place");
	return client_exit(&c, rc);
}

static int series_wait(int argc, char **argv)
{
	static const char usage[] = "series wait ID";
	client_t c;
	long long id;
	client_init(&c, "series wait");
	int early = one_id(&c, argc, argv, usage, &id);
	if (early >= 0)
		return early;
	char path[64], said[400] = "";
	snprintf(path, sizeof path, "/v1/series/%lld", id);
	for (;;) {
		json_t *s = NULL;
		int status = 0;
		if (client_json(&c, "GET", path, NULL, false, &s, &status)) {
			json_decref(s);
			return client_exit(&c, -1);
		}
		if (is_final(client_str(s, "state", "?"))) {
			print_series(s);
			int rc = series_status(s);
			json_decref(s);
			client_free(&c);
			return rc;
		}
		/* Say each new prompt once: the operator has something to do. */
		const char *prompt = client_str(s, "prompt", "");
		if (*prompt && strcmp(prompt, said)) {
			fprintf(stderr, "series %lld waits: %s\n", id, prompt);
			snprintf(said, sizeof said, "%s", prompt);
		}
		json_decref(s);
		client_sleep_ms(SERIES_POLL_MS);
	}
}

int cmd_series(int argc, char **argv)
{
	static const char usage[] =
	    "usage: stopcock series start --station N [--on-failure stop|continue] WORKLIST.csv\n"
	    "       stopcock series show ID\n"
	    "       stopcock series wait ID\n"
	    "       stopcock series abort ID\n"
	    "       stopcock series next ID\n";
	if (argc < 2 || !strcmp(argv[1], "--help") || !strcmp(argv[1], "-h")) {
		fputs(usage, argc < 2 ? stderr : stdout);
		return argc < 2 ? CLIENT_EXIT_USAGE : CLIENT_EXIT_OK;
	}
	const char *sub = argv[1];
	if (!strcmp(sub, "start"))
		return series_start(argc - 1, argv + 1);
	if (!strcmp(sub, "show"))
		return series_show(argc - 1, argv + 1);
	if (!strcmp(sub, "wait"))
		return series_wait(argc - 1, argv + 1);
	if (!strcmp(sub, "abort") || !strcmp(sub, "next"))
		return series_post(argc - 1, argv + 1, sub);
	fprintf(stderr, "stopcock series: unknown subcommand '%s'\n%s", sub, usage);
	return CLIENT_EXIT_USAGE;
}
