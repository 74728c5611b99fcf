/* cmd_audit.c: `stopcock titrants` and `stopcock events`, the two read-only
 * views a lab needs to show where a result's titer came from and who did
 * what (GET /v1/titrants and GET /v1/events, docs/api.md), and `stopcock
 * events --verify`, the check of the audit trail's hash chain. */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "client.h"
#include "numparse.h"
#include "cmd.h"

/* Grow a column's width *w (characters) to fit s. */
static void widen(int *w, const char *s)
{
	int n = (int)strlen(s);
	if (n > *w)
		*w = n;
}

/* ---- titrants ---- */

/* `stopcock titrants set NAME --titer X --reason TEXT`: a certified
 * titrant's titer entered by hand (POST /v1/titrants). */
static int titrants_set(int argc, char **argv)
{
	static const char usage[] =
	    "titrants set NAME --titer X --reason TEXT [--valid-days N] [--molarity M]";
	const char *titer_s = NULL, *reason = NULL, *days_s = NULL, *mol_s = NULL;
	const client_arg_t args[] = {
	    {"titer", &titer_s, NULL, "X  the titer (correction factor, above 0, at most 2)"},
	    {"reason", &reason, NULL, "TEXT  why: the certificate, the lot"},
	    {"valid-days", &days_s, NULL, "N  days it stays valid (default: the daemon's)"},
	    {"molarity", &mol_s, NULL, "M  nominal mol/L, for a titrant not stored yet"},
	    {NULL, NULL, NULL, NULL}};
	client_t c;
	client_init(&c, "titrants set");
	int pos, early = client_parse(&c, argc, argv, usage, args, &pos);
	if (early >= 0)
		return early;
	if (pos != argc - 1)
		return client_usage(&c, usage, "give the titrant's name, as its methods name it");
	double titer, days = 0, mol = 0;
	if (!titer_s || !parse_decimal(titer_s, &titer))
		return client_usage(&c, usage, "--titer X is needed, a number");
	if (!reason || !*reason)
		return client_usage(&c, usage, "--reason TEXT is needed");
	if (days_s && !parse_decimal(days_s, &days))
		return client_usage(&c, usage, "--valid-days must be a number of days");
	if (mol_s && !parse_decimal(mol_s, &mol))
		return client_usage(&c, usage, "--molarity must be a number in mol/L");
	json_t *body =
	    json_pack("{s:s,s:f,s:s}", "name", argv[pos], "titer", titer, "reason", reason);
	if (days_s)
		json_object_set_new(body, "valid_days", json_real(days));
	if (mol_s)
		json_object_set_new(body, "molarity", json_real(mol));
	json_t *reply = NULL;
	int rc = client_json(&c, "POST", "/v1/titrants", body, true, &reply, NULL);
	json_decref(body);
	if (rc == 0)
		printf("%s: titer %.6f entered by %s, valid until %s\n",
		       client_str(reply, "name", "?"), client_num(reply, "titer"),
		       client_str(reply, "by", "?"), client_str(reply, "valid_until", "?"));
	json_decref(reply);
	return client_exit(&c, rc);
}

int cmd_titrants(int argc, char **argv)
{
	static const char usage[] = "titrants | titrants set NAME --titer X --reason TEXT";
	if (argc > 1 && !strcmp(argv[1], "set"))
		return titrants_set(argc - 1, argv + 1);
	client_t c;
	client_init(&c, "titrants");
	int early = client_parse_bare(&c, argc, argv, usage);
	if (early >= 0)
		return early;
	json_t *j;
	int rc;
	json_t *list = client_get_list(&c, "/v1/titrants", "titrants", "titrant", &j, &rc);
	if (list) {
		if (json_array_size(list) == 0) {
			printf("no titer stored yet: run a standardization method\n");
		} else {
			printf("%-24s %10s %8s %4s %8s  %-20s %s\n", "TITRANT", "MOL/L", "TITER",
			       "N", "RSD_%", "STANDARDIZED", "RUN");
			size_t i;
			json_t *t;
			json_array_foreach(list, i, t)
			{
				char b1[32], b2[32], b3[32];
				const json_t *st = json_object_get(t, "standardization");
				const json_t *n = json_object_get(st, "n");
				const json_t *run = json_object_get(t, "run_id");
				char ns[16] = "-", runs[24] = "-";
				if (json_is_integer(n))
					snprintf(ns, sizeof ns, "%lld",
					         (long long)json_integer_value(n));
				if (json_is_integer(run))
					snprintf(runs, sizeof runs, "%lld",
					         (long long)json_integer_value(run));
				printf("%-24s %10s %8s %4s %8s  %-20s %s\n",
				       client_str(t, "name", "?"),
				       client_fmt(b1, sizeof b1, client_num(t, "molarity"), 4),
				       client_fmt(b2, sizeof b2, client_num(t, "titer"), 4), ns,
				       client_fmt(b3, sizeof b3, client_num(st, "rsd_pct"), 3),
				       client_str(t, "at", "-"), runs);
			}
		}
	}
	json_decref(j);
	return client_exit(&c, rc);
}

/* ---- events ---- */

/* GET /v1/events/verify: 0 when the chain holds, 1 naming the first broken
 * event otherwise. */
static int verify_events(client_t *c)
{
	json_t *j = NULL;
	int rc = client_json(c, "GET", "/v1/events/verify", NULL, false, &j, NULL);
	if (rc) {
		json_decref(j);
		return client_exit(c, rc);
	}
	const json_t *head = json_object_get(j, "head"), *bad = json_object_get(j, "first_broken");
	const json_t *n = json_object_get(j, "checked");
	long long checked = json_is_integer(n) ? (long long)json_integer_value(n) : 0;
	if (json_is_true(json_object_get(j, "ok"))) {
		const json_t *hid = json_object_get(head, "id");
		printf("audit trail intact: %lld events chained", checked);
		if (json_is_integer(hid))
			printf(", last %lld with hash %s", (long long)json_integer_value(hid),
			       client_str(head, "hash", "?"));
		printf("\n");
	} else {
		const json_t *bid = json_object_get(bad, "id");
		printf("audit trail BROKEN at event %lld (%s %s): %s\n",
		       json_is_integer(bid) ? (long long)json_integer_value(bid) : 0LL,
		       client_str(bad, "kind", "-"), client_str(bad, "at", "-"),
		       client_str(bad, "why", "?"));
		rc = -1;
	}
	json_decref(j);
	client_free(c);
	return rc ? CLIENT_EXIT_FAIL : CLIENT_EXIT_OK;
}

int cmd_events(int argc, char **argv)
{
	static const char usage[] = "events [--after SEQ] [--limit N] | events --verify";
	const char *after_s = NULL, *limit_s = NULL;
	bool verify = false;
	const client_arg_t args[] = {
	    {"after", &after_s, NULL, "SEQ  only events after this one (default 0)"},
	    {"limit", &limit_s, NULL, "N  at most this many events, 1 to 1000 (default 100)"},
	    {"verify", NULL, &verify,
	     "   check the whole trail's hash chain; exit 1 naming the first broken event"},
	    {NULL, NULL, NULL, NULL}};
	client_t c;
	client_init(&c, "events");
	int pos, early = client_parse(&c, argc, argv, usage, args, &pos);
	if (early >= 0)
		return early;
	if (pos < argc)
		return client_usage(&c, usage, "unexpected argument '%s'", argv[pos]);
	if (verify && (after_s || limit_s))
		return client_usage(&c, usage,
		                    "--verify checks the whole trail: no --after, --limit");
	if (verify)
		return verify_events(&c);
	long long after = 0, limit = 100;
	if (after_s && !(client_parse_id(after_s, &after) || !strcmp(after_s, "0")))
		return client_usage(&c, usage, "--after must be an event number >= 0 (got '%s')",
		                    after_s);
	if (limit_s && (!client_parse_id(limit_s, &limit) || limit > 1000))
		return client_usage(&c, usage, "--limit must be 1 to 1000 (got '%s')", limit_s);
	char path[96];
	snprintf(path, sizeof path, "/v1/events?after=%lld&limit=%lld", after, limit);
	json_t *j;
	int rc;
	json_t *list = client_get_list(&c, path, "events", "event", &j, &rc);
	if (list) {
		/* Columns as wide as their widest entry, so long event names
		 * ("standardization replicate") never push a row out of line. */
		int w_at = 2, w_actor = 5, w_what = 5, w_station = 7, w_run = 3;
		size_t i;
		json_t *e;
		for (int pass = 0; pass < 2; pass++) {
			if (pass == 1)
				printf("%6s  %-*s  %-*s  %-*s  %-*s  %-*s  %s\n", "SEQ", w_at, "AT",
				       w_actor, "ACTOR", w_what, "EVENT", w_station, "STATION",
				       w_run, "RUN", "MESSAGE");
			json_array_foreach(list, i, e)
			{
				const json_t *id = json_object_get(e, "id"),
				             *run = json_object_get(e, "run_id");
				const char *at = client_str(e, "at", "-"),
				           *actor = client_str(e, "actor", "-"),
				           *station = client_str(e, "station", "-");
				char what[64], runs[24] = "-";
				snprintf(what, sizeof what, "%s %s", client_str(e, "kind", "?"),
				         client_str(e, "code", ""));
				if (json_is_integer(run))
					snprintf(runs, sizeof runs, "%lld",
					         (long long)json_integer_value(run));
				if (pass == 0) {
					widen(&w_at, at);
					widen(&w_actor, actor);
					widen(&w_what, what);
					widen(&w_station, station);
					widen(&w_run, runs);
					continue;
				}
				printf("%6lld  %-*s  %-*s  %-*s  %-*s  %-*s  %s\n",
				       json_is_integer(id) ? (long long)json_integer_value(id)
				                           : 0LL,
				       w_at, at, w_actor, actor, w_what, what, w_station, station,
				       w_run, runs, client_str(e, "message", ""));
			}
		}
		const json_t *next = json_object_get(j, "next_after");
		if (json_is_integer(next))
			/* on stderr, so the table on stdout stays a table */
			fprintf(stderr, "next: stopcock events --after %lld\n",
			        (long long)json_integer_value(next));
	}
	json_decref(j);
	return client_exit(&c, rc);
}
