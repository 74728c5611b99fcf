/* http_records.c: what a regulated lab's records need (docs/api.md,
 * "Roles", "GET /v1/events/verify", "POST /v1/runs/{id}/review", "POST
 * /v1/runs/{id}/correct"): who the caller is and what its token may do, the
 * check of the audit trail's hash chain, the second person's review of a
 * result and corrected versions of results. */
#include "http.h"
#include "http_routes.h"

#include <math.h>
#include <microhttpd.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "clock.h"
#include "correction.h"
#include "report.h"
#include "text.h"
#include "timefmt.h"

void http_get_whoami(const http_req_t *q, http_reply_t *r)
{
	json_t *roles = json_array();
	bool sent = MHD_lookup_connection_value(q->conn, MHD_HEADER_KIND,
	                                        MHD_HTTP_HEADER_AUTHORIZATION) != NULL;

	/* A wrong token is said to be wrong here too: the page must not show
	 * buttons to someone whose every write would get 401. */
	if (sent && !q->token_name) {
		json_decref(roles);
		http_reply_error(r, 401, "bad_token", "the bearer token is not valid");
		return;
	}
	for (int i = 0; i < CFG_N_ROLES; i++)
		if (q->roles & (1u << i))
			json_array_append_new(roles, json_string(cfg_role_name(i)));
	http_reply_json(r, 200,
	                json_pack("{s:o,s:o,s:b}", "name",
	                          q->token_name ? json_string(q->token_name) : json_null(), "roles",
	                          roles, "read_needs_token", q->ctx->cfg->read_needs_token));
}

void http_get_events_verify(const http_req_t *q, http_reply_t *r)
{
	bool db_err;
	json_t *j = store_events_verify(q->ctx->store, &db_err);

	if (!j) {
		http_reply_error(r, 500, "database", "could not read the audit trail");
		return;
	}
	http_reply_json(r, 200, j);
}

/* ---- review and corrections (docs/lims.md, "Review and corrections") ---- */

/* The body as a JSON object, or NULL after answering 400. */
static json_t *body_object(const http_req_t *q, http_reply_t *r, const char *shape)
{
	json_error_t jerr;
	json_t *body;

	if (!q->body || !q->body_len) {
		http_reply_error(r, 400, "bad_request", "the body must be JSON %s", shape);
		return NULL;
	}
	body = json_loadb(q->body, q->body_len, JSON_REJECT_DUPLICATES, &jerr);
	if (!body) {
		http_reply_error(r, 400, "bad_json", "request:%d:%d: %s", jerr.line, jerr.column,
		                 jerr.text);
		return NULL;
	}
	return body;
}

/* A reason: text a person wrote, kept in the record and the audit trail. */
static bool reason_ok(const char *s, http_reply_t *r, bool required)
{
	size_t n = s ? strlen(s) : 0;
	if (required && !n) {
		http_reply_error(r, 400, "bad_request", "a reason is required");
		return false;
	}
	if (n > 500 || (n && text_control_at(s, n, false) != TEXT_NONE)) {
		http_reply_error(r, 400, "bad_request",
		                 "the reason is at most 500 bytes of text without control "
		                 "characters");
		return false;
	}
	return true;
}

static const char *rec_str(const json_t *o, const char *key)
{
	const char *s = json_string_value(json_object_get(o, key));
	return s ? s : "";
}

/* The current version of a record's results: 1 until corrected. */
static long long rec_version(const json_t *rec)
{
	const json_t *v = json_object_get(rec, "version");
	return json_is_integer(v) ? (long long)json_integer_value(v) : 1;
}

/* Who made the current version: "" for the run itself. */
static const char *version_author(const json_t *rec)
{
	const json_t *vs = json_object_get(rec, "result_versions");
	return rec_str(json_array_get(vs, json_array_size(vs) ? json_array_size(vs) - 1 : 0), "by");
}

typedef struct review_arg {
	const char *decision; /* "approve" / "reject" */
	const char *reason;
	const char *actor;
	char at[32];
	char why[256];  /* a refusal's reason */
	json_t *review; /* the review stored (the caller's reference) */
	long long version;
} review_arg_t;

static store_status_t apply_review(json_t *rec, void *argp, store_revise_t *ev)
{
	review_arg_t *a = argp;
	const char *state = rec_str(json_object_get(rec, "review"), "state");
	const char *by = rec_str(json_object_get(rec, "review"), "by");
	bool approve = !strcmp(a->decision, "approve");

	a->version = rec_version(rec);
	if (!strcmp(state, "approved") || !strcmp(state, "rejected")) {
		snprintf(a->why, sizeof a->why,
		         "version %lld of run %lld's results was already %s by %s; an %s record "
		         "cannot change%s",
		         a->version, (long long)json_integer_value(json_object_get(rec, "id")),
		         state, by, state,
		         approve || !strcmp(state, "approved")
		             ? ""
		             : " (a correction makes a new version to review)");
		return STORE_CONFLICT;
	}
	/* Four eyes: whoever asked for the run, or made the version under
	 * review, does not sign it. */
	if (!strcmp(a->actor, rec_str(rec, "requested_by")) ||
	    !strcmp(a->actor, version_author(rec))) {
		snprintf(a->why, sizeof a->why,
		         "'%s' %s this run and may not review it: a second person must (four eyes)",
		         a->actor,
		         !strcmp(a->actor, rec_str(rec, "requested_by")) ? "requested"
		                                                         : "corrected");
		return STORE_CONFLICT;
	}
	a->review = json_pack("{s:s,s:s,s:s,s:o,s:I}", "state", approve ? "approved" : "rejected",
	                      "by", a->actor, "at", a->at, "reason",
	                      a->reason && *a->reason ? json_string(a->reason) : json_null(),
	                      "version", (json_int_t)a->version);
	json_object_set(rec, "review", a->review); /* a->review stays ours */
	ev->at = a->at;
	ev->kind = "review";
	ev->code = approve ? "approved" : "rejected";
	ev->actor = a->actor;
	snprintf(ev->message, sizeof ev->message, "version %lld %s%s%s", a->version,
	         approve ? "approved" : "rejected", a->reason && *a->reason ? ": " : "",
	         a->reason ? a->reason : "");
	return STORE_OK;
}

void http_post_review(const http_req_t *q, http_reply_t *r)
{
	review_arg_t a = {.actor = http_actor(q)};
	json_error_t jerr;
	json_t *body = body_object(q, r, "{\"decision\": \"approve\"|\"reject\", \"reason\"}");
	int64_t seq = 0;

	if (!body)
		return;
	if (json_unpack_ex(body, &jerr, JSON_STRICT, "{s:s,s?s}", "decision", &a.decision, "reason",
	                   &a.reason)) {
		http_reply_error(r, 400, "bad_request", "%s", jerr.text);
		json_decref(body);
		return;
	}
	if (strcmp(a.decision, "approve") && strcmp(a.decision, "reject")) {
		http_reply_error(r, 400, "bad_request",
		                 "decision is \"approve\" or \"reject\" (got \"%s\")", a.decision);
		json_decref(body);
		return;
	}
	if (!reason_ok(a.reason, r, !strcmp(a.decision, "reject"))) {
		json_decref(body);
		return;
	}
	time_format_rfc3339(clock_wall_s(), a.at);
	store_status_t st = store_run_revise(q->ctx->store, q->id, apply_review, &a, &seq);
	if (st == STORE_OK)
		http_reply_json(r, 200,
		                json_pack("{s:I,s:I,s:O}", "id", (json_int_t)q->id, "seq",
		                          (json_int_t)seq, "review", a.review));
	else if (st == STORE_NOT_FOUND)
		http_reply_error(r, 404, "not_found", "no run %lld", q->id);
	else if (st == STORE_CONFLICT)
		http_reply_error(r, 409, "conflict", "%s",
		                 a.why[0] ? a.why : "the run has not ended: nothing to review yet");
	else
		http_reply_error(r, 500, "database", "could not store the review");
	json_decref(a.review);
	json_decref(body);
}

typedef struct correct_arg {
	const method_t *m;
	const char *reason, *actor;
	bool has_amount, has_titer, has_blank;
	double amount, titer, blank_ml;
	char at[32];
	char why[256];
	long long version;
} correct_arg_t;

/* The version entry of the record's results as they are now. */
static json_t *version_entry(const json_t *rec, long long version, const char *at, const char *by,
                             const char *reason)
{
	const json_t *t = json_object_get(rec, "titrant");
	return json_pack("{s:I,s:s?,s:o,s:o,s:O?,s:O?,s:O?,s:O?}", "version", (json_int_t)version,
	                 "at", at, "by", by ? json_string(by) : json_null(), "reason",
	                 reason ? json_string(reason) : json_null(), "amount",
	                 json_object_get(json_object_get(rec, "sample"), "amount"), "titer",
	                 json_object_get(t, "titer"), "blank_ml", json_object_get(t, "blank_ml"),
	                 "results", json_object_get(rec, "results"));
}

static store_status_t apply_correction(json_t *rec, void *argp, store_revise_t *ev)
{
	correct_arg_t *a = argp;
	json_t *sample = json_object_get(rec, "sample"), *t = json_object_get(rec, "titrant");
	json_t *versions = json_object_get(rec, "result_versions"), *results = NULL;
	const json_t *old_blank = json_object_get(t, "blank_ml");
	correction_in_t in = {
	    .amount =
	        a->has_amount ? a->amount : json_number_value(json_object_get(sample, "amount")),
	    .titer = a->has_titer ? a->titer : json_number_value(json_object_get(t, "titer")),
	    .has_blank = a->has_blank || json_is_number(old_blank),
	    .blank_ml = a->has_blank ? a->blank_ml : json_number_value(old_blank)};

	if (!strcmp(rec_str(json_object_get(rec, "review"), "state"), "approved")) {
		snprintf(a->why, sizeof a->why,
		         "run %lld's results were approved by %s: an approved record cannot change",
		         (long long)json_integer_value(json_object_get(rec, "id")),
		         rec_str(json_object_get(rec, "review"), "by"));
		return STORE_CONFLICT;
	}
	if (strcmp(rec_str(rec, "state"), "finished")) {
		snprintf(a->why, sizeof a->why,
		         "only a finished run's results can be corrected (this one %s)",
		         rec_str(rec, "state"));
		return STORE_CONFLICT;
	}
	if (correction_results(a->m, rec, &in, &results, a->why, sizeof a->why))
		return STORE_CONFLICT;
	a->version = rec_version(rec) + 1;
	/* The first correction keeps the run's own results as version 1. */
	if (!json_is_array(versions)) {
		versions = json_array();
		json_array_append_new(versions,
		                      version_entry(rec, 1, rec_str(rec, "ended_at"), NULL, NULL));
		json_object_set_new(rec, "result_versions", versions);
	}
	json_object_set_new(rec, "results", results);
	json_object_set_new(sample, "amount", json_real(in.amount));
	if (a->has_titer) {
		json_object_set_new(t, "titer", json_real(in.titer));
		json_object_set_new(t, "titer_at", json_string(a->at));
		json_object_set_new(t, "titer_run_id", json_null());
		json_object_set_new(t, "titer_source", json_string("correction"));
	}
	if (a->has_blank) {
		json_object_set_new(t, "blank_ml", json_real(in.blank_ml));
		json_object_set_new(t, "blank_at", json_string(a->at));
		json_object_set_new(t, "blank_run_id", json_null());
		json_object_set_new(t, "blank_source", json_string("correction"));
	}
	json_array_append_new(versions, version_entry(rec, a->version, a->at, a->actor, a->reason));
	json_object_set_new(rec, "version", json_integer(a->version));
	/* a new version is reviewed anew */
	json_object_set_new(rec, "review",
	                    json_pack("{s:s,s:n,s:n,s:n,s:I}", "state", "pending", "by", "at",
	                              "reason", "version", (json_int_t)a->version));
	ev->at = a->at;
	ev->kind = "result";
	ev->code = "corrected";
	ev->actor = a->actor;
	ev->results_changed = true;
	int n = snprintf(ev->message, sizeof ev->message, "version %lld:", a->version);
	if (a->has_amount && n > 0 && (size_t)n < sizeof ev->message)
		n += snprintf(ev->message + n, sizeof ev->message - (size_t)n, " amount %.6g",
		              in.amount);
	if (a->has_titer && n > 0 && (size_t)n < sizeof ev->message)
		n += snprintf(ev->message + n, sizeof ev->message - (size_t)n, " titer %.6g",
		              in.titer);
	if (a->has_blank && n > 0 && (size_t)n < sizeof ev->message)
		n += snprintf(ev->message + n, sizeof ev->message - (size_t)n, " blank %.4g mL",
		              in.blank_ml);
	if (n > 0 && (size_t)n < sizeof ev->message)
		snprintf(ev->message + n, sizeof ev->message - (size_t)n, "; %s", a->reason);
	return STORE_OK;
}

/* A number field of the body: absent, or a finite number in range. */
static bool opt_number(const json_t *body, const char *key, bool *has, double *v, double lo,
                       bool lo_open, http_reply_t *r)
{
	const json_t *n = json_object_get(body, key);
	*has = n != NULL;
	if (!n)
		return true;
	*v = json_number_value(n);
	if (!json_is_number(n) || !isfinite(*v) || *v < lo || (lo_open && *v <= lo) || *v > 1e6) {
		http_reply_error(r, 400, "bad_request", "%s must be a number %s %g", key,
		                 lo_open ? "above" : "at least", lo);
		return false;
	}
	return true;
}

void http_post_correct(const http_req_t *q, http_reply_t *r)
{
	correct_arg_t a = {.actor = http_actor(q)};
	json_error_t jerr;
	json_t *body = body_object(
	    q, r, "{\"reason\", and one or more of \"amount\", \"titer\", \"blank_ml\"}");
	json_t *rec = NULL, *amount = NULL, *titer = NULL, *blank = NULL;
	method_t *m = NULL;
	char *text = NULL, sha[65];
	size_t len;
	long rev;
	bool db_err;
	int64_t seq = 0;
	diag_list_t d = DIAG_LIST_INIT;

	if (!body)
		return;
	if (json_unpack_ex(body, &jerr, JSON_STRICT, "{s:s,s?o,s?o,s?o}", "reason", &a.reason,
	                   "amount", &amount, "titer", &titer, "blank_ml", &blank)) {
		http_reply_error(r, 400, "bad_request", "%s", jerr.text);
		goto out;
	}
	if (!reason_ok(a.reason, r, true) ||
	    !opt_number(body, "amount", &a.has_amount, &a.amount, 0, true, r) ||
	    !opt_number(body, "titer", &a.has_titer, &a.titer, 0, true, r) ||
	    !opt_number(body, "blank_ml", &a.has_blank, &a.blank_ml, 0, false, r))
		goto out;
	if (!a.has_amount && !a.has_titer && !a.has_blank) {
		http_reply_error(r, 400, "bad_request",
		                 "a correction changes amount, titer or blank_ml: give one");
		goto out;
	}
	rec = store_run_json(q->ctx->store, q->id, &db_err);
	if (!rec) {
		if (db_err)
			http_reply_error(r, 500, "database", "could not read run %lld", q->id);
		else
			http_reply_error(r, 404, "not_found", "no run %lld", q->id);
		goto out;
	}
	/* The revision that made the results, as stored. */
	const json_t *meth = json_object_get(rec, "method");
	const char *mid = rec_str(meth, "id");
	long want = (long)json_integer_value(json_object_get(meth, "revision"));
	m = calloc(1, sizeof *m);
	if (!m ||
	    store_method_revision(q->ctx->store, mid, want, &text, &len, &rev, sha) != STORE_OK ||
	    method_parse(mid, text, len, NULL, m, &d)) {
		http_reply_error(r, 409, "conflict",
		                 "method %s revision %ld of run %lld cannot be read back", mid,
		                 want, q->id);
		goto out;
	}
	a.m = m;
	time_format_rfc3339(clock_wall_s(), a.at);
	store_status_t st = store_run_revise(q->ctx->store, q->id, apply_correction, &a, &seq);
	if (st == STORE_OK)
		http_reply_json(r, 200,
		                json_pack("{s:I,s:I,s:I}", "id", (json_int_t)q->id, "seq",
		                          (json_int_t)seq, "version", (json_int_t)a.version));
	else if (st == STORE_NOT_FOUND)
		http_reply_error(r, 404, "not_found", "no run %lld", q->id);
	else if (st == STORE_CONFLICT)
		http_reply_error(r, 409, "conflict", "%s",
		                 a.why[0] ? a.why
		                          : "the run has not ended: nothing to correct yet");
	else
		http_reply_error(r, 500, "database", "could not store the correction");
out:
	diag_free(&d);
	free(text);
	free(m);
	json_decref(rec);
	json_decref(body);
}

/* ---- a titer entered by hand (docs/api.md, "POST /v1/titrants") ---- */

void http_post_titrant(const http_req_t *q, http_reply_t *r)
{
	json_error_t jerr;
	json_t *body = body_object(
	    q, r, "{\"name\", \"titer\", \"reason\", \"valid_days\", \"molarity\" (new titrants)}");
	const char *name = NULL, *reason = NULL;
	double titer = 0, valid_days = q->ctx->cfg->titer_valid_days, molarity = 0;
	bool has_days = false, has_mol = false;
	char at[32];

	if (!body)
		return;
	if (json_unpack_ex(body, &jerr, JSON_STRICT, "{s:s,s:F,s:s,s?F,s?F}", "name", &name,
	                   "titer", &titer, "reason", &reason, "valid_days", &valid_days,
	                   "molarity", &molarity)) {
		http_reply_error(r, 400, "bad_request", "%s", jerr.text);
		goto out;
	}
	has_days = json_object_get(body, "valid_days") != NULL;
	has_mol = json_object_get(body, "molarity") != NULL;
	if (!*name || strlen(name) >= METHOD_TEXT_MAX ||
	    text_control_at(name, strlen(name), false) != TEXT_NONE) {
		http_reply_error(
		    r, 400, "bad_request",
		    "name is the titrant as the methods name it (1 to %d bytes of text)",
		    METHOD_TEXT_MAX - 1);
		goto out;
	}
	if (!isfinite(titer) || titer <= 0 || titer > 2) {
		http_reply_error(r, 400, "bad_request",
		                 "titer must be above 0 and at most 2 (got %g)", titer);
		goto out;
	}
	if (has_days && (!isfinite(valid_days) || valid_days < 0.01 || valid_days > 3650)) {
		http_reply_error(r, 400, "bad_request", "valid_days must be 0.01 to 3650");
		goto out;
	}
	if (has_mol && (!isfinite(molarity) || molarity <= 0 || molarity > 20)) {
		http_reply_error(r, 400, "bad_request",
		                 "molarity must be above 0 and at most 20 mol/L");
		goto out;
	}
	if (!reason_ok(reason, r, true))
		goto out;
	time_format_rfc3339(clock_wall_s(), at);
	switch (store_titrant_enter(q->ctx->store, name, has_mol ? molarity : 0, titer, at,
	                            valid_days, reason, http_actor(q))) {
	case STORE_OK: {
		char until[32];
		time_format_rfc3339(clock_wall_s() + valid_days * 86400.0, until);
		http_reply_json(r, 201,
		                json_pack("{s:s,s:f,s:s,s:f,s:s,s:s,s:s}", "name", name, "titer",
		                          titer, "at", at, "valid_days", valid_days, "valid_until",
		                          until, "reason", reason, "by", http_actor(q)));
		break;
	}
	case STORE_NOT_FOUND:
		http_reply_error(r, 400, "bad_request",
		                 "titrant '%s' is not stored yet: give its molarity (mol/L) too",
		                 name);
		break;
	default:
		http_reply_error(r, 500, "database", "could not store the titer");
	}
out:
	json_decref(body);
}

/* ---- the one-page report (docs/api.md, "GET /v1/runs/{id}/report.pdf") ---- */

void http_get_report(const http_req_t *q, http_reply_t *r)
{
	bool db_err = false;
	json_t *rec = store_run_json(q->ctx->store, q->id, &db_err);
	json_t *pts = rec ? store_points_json(q->ctx->store, q->id, &db_err) : NULL;
	method_t *m = NULL;
	char *text = NULL, sha[65], *pdf = NULL;
	size_t len = 0;
	long rev;
	diag_list_t d = DIAG_LIST_INIT;

	if (!rec || !pts) {
		if (db_err)
			http_reply_error(r, 500, "database", "could not read run %lld", q->id);
		else
			http_reply_error(r, 404, "not_found", "no run %lld", q->id);
		goto out;
	}
	/* The method revision that ran gives the results' limits. */
	const json_t *meth = json_object_get(rec, "method");
	m = calloc(1, sizeof *m);
	if (m && (store_method_revision(q->ctx->store, rec_str(meth, "id"),
	                                (long)json_integer_value(json_object_get(meth, "revision")),
	                                &text, &len, &rev, sha) != STORE_OK ||
	          method_parse(rec_str(meth, "id"), text, len, NULL, m, &d))) {
		free(m);
		m = NULL;
	}
	pdf = report_pdf(rec, json_object_get(pts, "points"), m, q->ctx->cfg->lab_name, &len);
	if (!pdf)
		http_reply_error(r, 500, "internal", "could not draw the report");
	else
		http_reply_text(r, 200, "application/pdf", pdf, len);
out:
	diag_free(&d);
	free(text);
	free(m);
	json_decref(pts);
	json_decref(rec);
}
