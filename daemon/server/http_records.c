/* http_records.c: what a regulated lab's records need (docs/api.md,
 * "Roles", "GET /v1/events/verify"): who the caller is and what its token
 * may do, and the check of the audit trail's hash chain. */
#include "http.h"
#include "http_routes.h"

#include <microhttpd.h>
#include <stdio.h>
#include <string.h>

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
