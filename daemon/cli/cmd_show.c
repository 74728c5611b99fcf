/* cmd_show.c: `stopcock show RUN [--csv] [--svg FILE]`: one run's record in
 * words (endpoints with units and uncertainty, results with their verdict,
 * stop reason, faults), or its points as CSV, or its curve saved as SVG. */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "client.h"
#include "cmd.h"

static const char usage[] = "show RUN [--csv] [--svg FILE] [--pdf FILE]";

static void print_record(const json_t *r)
{
	char b1[32], b2[32], b3[32], b4[32];
	const json_t *m = json_object_get(r, "method"), *s = json_object_get(r, "sample");
	const json_t *t = json_object_get(r, "titrant"), *cal = json_object_get(r, "calibration");
	json_t *id = json_object_get(r, "id");
	const char *phase = client_str(r, "phase", NULL);

	printf("run %lld  %s%s%s\n", json_is_integer(id) ? (long long)json_integer_value(id) : 0LL,
	       client_str(r, "state", "?"), phase ? "/" : "", phase ? phase : "");
	json_t *rev = json_object_get(m, "revision");
	printf("  station      %s\n", client_str(r, "station", "-"));
	printf("  method       %s, revision %lld\n", client_str(m, "id", "-"),
	       json_is_integer(rev) ? (long long)json_integer_value(rev) : 0LL);
	printf("  sample       %s, %s %s\n", client_str(s, "id", "-"),
	       client_fmt(b1, sizeof b1, client_num(s, "amount"), 4), client_str(s, "unit", ""));
	printf("  titrant      %s, %s mol/L, titer %s", client_str(t, "name", "-"),
	       client_fmt(b1, sizeof b1, client_num(t, "molarity"), 4),
	       client_fmt(b2, sizeof b2, client_num(t, "titer"), 4));
	json_t *tr = json_object_get(t, "titer_run_id");
	const char *src = client_str(t, "titer_source", NULL);
	if (json_is_integer(tr))
		printf(" (run %lld, %s)", (long long)json_integer_value(tr),
		       client_str(t, "titer_at", "-"));
	else if (src && !strcmp(src, "entered"))
		printf(" (entered by %s: %s)", client_str(t, "titer_by", "-"),
		       client_str(t, "titer_reason", "-"));
	else if (src)
		printf(" (%s)", src);
	else
		printf(" (none stored)");
	if (client_str(t, "titer_valid_until", NULL))
		printf(", valid until %s", client_str(t, "titer_valid_until", "-"));
	printf("\n");
	if (isfinite(client_num(t, "blank_ml"))) {
		json_t *br = json_object_get(t, "blank_run_id");
		printf("  blank        %s mL",
		       client_fmt(b1, sizeof b1, client_num(t, "blank_ml"), 4));
		if (json_is_integer(br))
			printf(" (run %lld, %s)", (long long)json_integer_value(br),
			       client_str(t, "blank_at", "-"));
		printf("\n");
	}
	if (json_is_object(cal)) {
		json_t *cid = json_object_get(cal, "id");
		printf("  calibration  ");
		if (json_is_integer(cid))
			printf("%lld: ", (long long)json_integer_value(cid));
		printf("slope %s %%, offset %s mV, at %s\n",
		       client_fmt(b1, sizeof b1, client_num(cal, "slope_pct"), 1),
		       client_fmt(b2, sizeof b2, client_num(cal, "offset_mv"), 1),
		       client_str(cal, "at", "-"));
	} else {
		printf("  calibration  none\n");
	}
	printf("  requested by %s\n", client_str(r, "requested_by", "-"));
	printf("  queued       %s\n", client_str(r, "queued_at", "-"));
	printf("  started      %s\n", client_str(r, "started_at", "-"));
	printf("  ended        %s\n", client_str(r, "ended_at", "-"));
	json_t *add = json_object_get(r, "additions");
	printf("  additions    %lld, %s mL dispensed\n",
	       json_is_integer(add) ? (long long)json_integer_value(add) : 0LL,
	       client_fmt(b1, sizeof b1, client_num(r, "dispensed_ml"), 3));
	printf("  stop reason  %s\n", client_str(r, "stop_reason", "-"));

	json_t *eps = json_object_get(r, "endpoints");
	size_t i;
	json_t *e;
	if (json_array_size(eps) == 0)
		printf("endpoints: none found\n");
	else
		printf("endpoints:\n");
	json_array_foreach(eps, i, e)
	{
		double u = client_num(e, "u_volume_ml");
		char ubuf[48] = "";
		if (isfinite(u))
			snprintf(ubuf, sizeof ubuf, " (u %s mL)", client_fmt(b2, sizeof b2, u, 4));
		json_t *n = json_object_get(e, "n");
		printf("  E%lld  %s mL%s  pH %s  %s mV  half pH %s  by %s\n",
		       json_is_integer(n) ? (long long)json_integer_value(n) : (long long)i + 1,
		       client_fmt(b1, sizeof b1, client_num(e, "volume_ml"), 4), ubuf,
		       client_fmt(b3, sizeof b3, client_num(e, "ph"), 2),
		       client_fmt(b4, sizeof b4, client_num(e, "mv"), 1),
		       client_fmt(b2, sizeof b2, client_num(e, "half_ph"), 2),
		       client_str(e, "how", "-"));
		if (json_is_true(json_object_get(e, "fallback")))
			printf(
			    "      (at the fallback signal of detect criterion %lld: no inflection "
			    "before it)\n",
			    (long long)json_integer_value(json_object_get(e, "criterion")));
		const char *doubt = client_str(e, "doubt", NULL);
		if (doubt)
			printf("      doubtful: %s\n", doubt);
	}
	json_t *res = json_object_get(r, "results");
	if (json_array_size(res))
		printf("results:\n");
	json_array_foreach(res, i, e)
	{
		json_t *dec = json_object_get(e, "decimals");
		const char *accept = client_str(e, "accept", "none");
		/* The words of the page and the SVG: "none" means the method sets no limits. */
		printf("  %-16s %s %s  %s", client_str(e, "name", "?"),
		       client_fmt(b1, sizeof b1, client_num(e, "value"),
		                  json_is_integer(dec) ? (int)json_integer_value(dec) : -1),
		       client_str(e, "unit", ""), strcmp(accept, "none") ? accept : "no limits");
		const char *note = client_str(e, "note", NULL);
		if (note)
			printf("  (%s)", note);
		printf("\n");
	}
	json_t *faults = json_object_get(r, "faults");
	if (json_array_size(faults))
		printf("faults:\n");
	json_array_foreach(faults, i, e)
	    printf("  %s  %s: %s\n", client_str(e, "at", "-"), client_str(e, "code", "?"),
	           client_str(e, "message", ""));
}

/* Write the bytes to FILE through a temporary beside it, so a reader never
 * sees half a picture; "-" writes to stdout. */
static int write_file(const client_t *c, const char *file, const char *buf, size_t len)
{
	if (!strcmp(file, "-"))
		return fwrite(buf, 1, len, stdout) == len ? 0 : -1;
	char tmp[4200];
	if ((size_t)snprintf(tmp, sizeof tmp, "%s.tmp%ld", file, (long)getpid()) >= sizeof tmp) {
		client_say(c, "file name too long: %s", file);
		return -1;
	}
	FILE *f = fopen(tmp, "wb");
	if (!f) {
		client_say(c, "cannot write %s: %s", file, strerror(errno));
		return -1;
	}
	bool ok = fwrite(buf, 1, len, f) == len;
	ok = fclose(f) == 0 && ok;
	if (!ok || rename(tmp, file)) {
		client_say(c, "cannot write %s: %s", file, strerror(errno));
		unlink(tmp);
		return -1;
	}
	return 0;
}

int cmd_show(int argc, char **argv)
{
	bool csv = false;
	const char *svg_file = NULL, *pdf_file = NULL;
	const client_arg_t args[] = {
	    {"csv", NULL, &csv,
	     "   the points as CSV (t_s, volume_ml, mv, ph, ...) instead of the summary"},
	    {"svg", &svg_file, NULL, "FILE  also write the curve as SVG to FILE"},
	    {"pdf", &pdf_file, NULL, "FILE  also write the run's one-page report as PDF to FILE"},
	    {NULL, NULL, NULL, NULL}};
	client_t c;
	client_init(&c, "show");
	int pos, early = client_parse(&c, argc, argv, usage, args, &pos);
	if (early >= 0)
		return early;
	long long id;
	if (pos != argc - 1 || !client_parse_id(argv[pos], &id))
		return client_usage(&c, usage, "give one run id (a positive integer)");
	if (csv && svg_file && !strcmp(svg_file, "-"))
		return client_usage(&c, usage, "--csv and --svg - both want stdout");
	bool pdf_out = pdf_file && !strcmp(pdf_file, "-");
	if (pdf_out && (csv || (svg_file && !strcmp(svg_file, "-"))))
		return client_usage(&c, usage, "--pdf - wants stdout for itself");

	char path[96];
	int rc = 0;
	if (!csv) {
		snprintf(path, sizeof path, "/v1/runs/%lld", id);
		json_t *rec = NULL;
		rc = client_json(&c, "GET", path, NULL, false, &rec, NULL);
		if (rc == 0 && !(svg_file && !strcmp(svg_file, "-")) && !pdf_out)
			print_record(rec);
		json_decref(rec);
	} else {
		snprintf(path, sizeof path, "/v1/runs/%lld/points?format=csv", id);
		httpc_resp_t r;
		rc = client_raw(&c, "GET", path, &r, NULL);
		if (rc == 0) {
			rc = fwrite(r.body, 1, r.body_len, stdout) == r.body_len ? 0 : -1;
			httpc_resp_free(&r);
		}
	}
	if (rc == 0 && svg_file) {
		snprintf(path, sizeof path, "/v1/runs/%lld/curve.svg", id);
		httpc_resp_t r;
		rc = client_raw(&c, "GET", path, &r, NULL);
		if (rc == 0) {
			rc = write_file(&c, svg_file, r.body, r.body_len);
			if (rc == 0 && strcmp(svg_file, "-"))
				fprintf(stderr, "curve of run %lld written to %s\n", id, svg_file);
			httpc_resp_free(&r);
		}
	}
	if (rc == 0 && pdf_file) {
		snprintf(path, sizeof path, "/v1/runs/%lld/report.pdf", id);
		httpc_resp_t r;
		rc = client_raw(&c, "GET", path, &r, NULL);
		if (rc == 0) {
			rc = write_file(&c, pdf_file, r.body, r.body_len);
			if (rc == 0 && strcmp(pdf_file, "-"))
				fprintf(stderr, "report of run %lld written to %s\n", id, pdf_file);
			httpc_resp_free(&r);
		}
	}
	return client_exit(&c, rc);
}
