/* httpc.h: the HTTP client of the `stopcock` commands, on libcurl.
 *
 * `http://host[:port][/prefix]` URLs only (loopback or the lab's LAN), no
 * TLS, no proxy, no redirects, one request per connection. One deadline
 * covers the whole exchange, name lookup included. Errors are values: a kind
 * and a message a user can act on.
 */
#ifndef STOPCOCK_HTTPC_H
#define STOPCOCK_HTTPC_H

#include <stddef.h>

#define HTTPC_MAX_BODY (64u * 1024u * 1024u) /* bytes; larger replies are refused */

typedef enum {
	HTTPC_OK = 0,
	HTTPC_E_URL,     /* the URL is not http://host[:port][/prefix] */
	HTTPC_E_RESOLVE, /* the host name is unknown */
	HTTPC_E_CONNECT, /* refused, unreachable, ... (nobody listening) */
	HTTPC_E_TIMEOUT, /* the deadline passed */
	HTTPC_E_IO,      /* the connection broke mid-way */
	HTTPC_E_PROTO,   /* the reply is not HTTP/1.x as we understand it */
	HTTPC_E_NOMEM,
} httpc_err_t;

typedef struct httpc_url {
	char host[256];
	char port[8];
	char prefix[256]; /* path prefix without the trailing '/', often "" */
} httpc_url_t;

typedef struct httpc_resp {
	int status;         /* e.g. 200 */
	char *content_type; /* malloc'd, or NULL when absent */
	char *body;         /* malloc'd and NUL-terminated (the NUL is not counted) */
	size_t body_len;
} httpc_resp_t;

typedef struct httpc_req {
	const char *method;       /* "GET", "POST", ... */
	const char *path;         /* "/v1/runs/3", query included; appended to the prefix */
	const char *token;        /* sent as "Authorization: Bearer TOKEN"; NULL for none */
	const char *content_type; /* for the body; NULL means application/json */
	const char *body;         /* NULL for none */
	size_t body_len;
	int timeout_ms; /* the whole exchange; <= 0 means 10000 */
} httpc_req_t;

/* Split a base URL. Returns 0, or -1 with a message in err. */
int httpc_parse_url(const char *url, httpc_url_t *u, char *err, size_t err_len);

/* Do one request. On HTTPC_OK *resp is filled (any status, 4xx and 5xx
 * included) and must be freed with httpc_resp_free; otherwise *resp is
 * empty and err holds a message like "connection refused". */
httpc_err_t httpc_request(const char *base_url, const httpc_req_t *req, httpc_resp_t *resp,
                          char *err, size_t err_len);

void httpc_resp_free(httpc_resp_t *resp);

#endif
