/* cmd_records.c: `stopcock review`, the second person's signature on a
 * run's results (POST /v1/runs/{id}/review, docs/api.md), and `stopcock
 * correct`, a new version of them (POST /v1/runs/{id}/correct). */
#include <stdio.h>
#include <string.h>

#include "client.h"
#include "cmd.h"
#include "numparse.h"

int cmd_review(int argc, char **argv)
{
	static const char usage[] = "review RUN --approve|--reject [--reason TEXT]";
	bool approve = false, reject = false;
	const char *reason = NULL;
	const client_arg_t args[] = {
	    {"approve", NULL, &approve, "   approve the run's current results"},
	    {"reject", NULL, &reject, "   reject them (a reason is required)"},
	    {"reason", &reason, NULL, "TEXT  why, kept in the record and the audit trail"},
	    {NULL, NULL, NULL, NULL}};
	client_t c;
	client_init(&c, "review");
	int pos, early = client_parse(&c, argc, argv, usage, args, &pos);
	if (early >= 0)
		return early;
	long long id;
	if (pos != argc - 1 || !client_parse_id(argv[pos], &id))
		return client_usage(&c, usage, "give one run id (a positive integer)");
	if (approve == reject)
		return client_usage(&c, usage, "give --approve or --reject");
	if (reject && (!reason || !*reason))
		return client_usage(&c, usage, "--reject needs --reason TEXT");
	char path[64];
	snprintf(path, sizeof path, "/v1/runs/%lld/review", id);
	json_t *body = json_pack("{s:s}", "decision", approve ? "approve" : "reject");
	if (reason)
		json_object_set_new(body, "reason", json_string(reason));
	json_t *reply = NULL;
	int rc = client_json(&c, "POST", path, body, true, &reply, NULL);
	json_decref(body);
	if (rc == 0) {
		const json_t *rv = json_object_get(reply, "review");
		const json_t *ver = json_object_get(rv, "version");
		printf("run %lld version %lld %s by %s at %s\n", id,
		       json_is_integer(ver) ? (long long)json_integer_value(ver) : 1LL,
		       client_str(rv, "state", "?"), client_str(rv, "by", "?"),
		       client_str(rv, "at", "?"));
	}
	json_decref(reply);
	return client_exit(&c, rc);
}

/* One optional number option into body[key]; false (after the usage
 * message) when it is not a number. */
static bool put_number(json_t *body, const char *key, const char *text)
{
	double v;
	if (!text)
		return true;
	if (!parse_decimal(text, &v))
		return false;
	json_object_set_new(body, key, json_real(v));
	return true;
}

int cmd_correct(int argc, char **argv)
{
	static const char usage[] =
	    "correct RUN --reason TEXT [--amount X] [--titer X] [--blank-ml X]";
	const char *reason = NULL, *amount = NULL, *titer = NULL, *blank = NULL;
	const client_arg_t args[] = {
	    {"reason", &reason, NULL,
	     "TEXT  why (required), kept with the version and in the trail"},
	    {"amount", &amount, NULL, "X     the sample amount, in the method's sample unit"},
	    {"titer", &titer, NULL, "X     the titer"},
	    {"blank-ml", &blank, NULL, "X     the blank, mL"},
	    {NULL, NULL, NULL, NULL}};
	client_t c;
	client_init(&c, "correct");
	int pos, early = client_parse(&c, argc, argv, usage, args, &pos);
	if (early >= 0)
		return early;
	long long id;
	if (pos != argc - 1 || !client_parse_id(argv[pos], &id))
		return client_usage(&c, usage, "give one run id (a positive integer)");
	if (!reason || !*reason)
		return client_usage(&c, usage, "--reason TEXT is needed");
	if (!amount && !titer && !blank)
		return client_usage(&c, usage, "give --amount, --titer or --blank-ml");
	json_t *body = json_pack("{s:s}", "reason", reason);
	if (!put_number(body, "amount", amount) || !put_number(body, "titer", titer) ||
	    !put_number(body, "blank_ml", blank)) {
		json_decref(body);
		return client_usage(&c, usage, "--amount, --titer and --blank-ml take a number");
	}
	char path[64];
	snprintf(path, sizeof path, "/v1/runs/%lld/correct", id);
	json_t *reply = NULL;
	int rc = client_json(&c, "POST", path, body, true, &reply, NULL);
	json_decref(body);
	if (rc == 0) {
		const json_t *ver = json_object_get(reply, "version");
		printf("run %lld version %lld stored, waiting for review\n", id,
		       json_is_integer(ver) ? (long long)json_integer_value(ver) : 0LL);
	}
	json_decref(reply);
	return client_exit(&c, rc);
}
