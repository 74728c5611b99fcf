/* http_www.c: the bench page (docs/bench-page.md) and the two routes it needs
 * beyond the LIMS contract of docs/lims.md: GET /v1/runs (a filtered list) and
 * POST /v1/methods/{id}/check (validate a method's text without saving it).
 *
 * The page is plain files: GET / is index.html, GET /www/NAME any other file
 * of the folder. Names are checked against a strict pattern rather than
 * resolved, so no path can leave the folder. The folder is, in this order:
 * $STOPCOCK_WWW_DIR; the repository's daemon/server/www when the daemon runs from
 * the tree (found next to the executable, so tests need no install); else the
 * data folder's www/ (datadir.h: PREFIX/share/stopcock beside the program).
 */
#include "http.h"

#include <errno.h>
#include <fcntl.h>
#include <limits.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "datadir.h"
#include "log.h"

#define WWW_NAME_MAX  64
#define WWW_FILE_MAX  (2u << 20) /* bytes; the page's files are a few tens of KiB */
#define RUN_STATES    "queued running finished aborted failed interrupted"
#define TIME_TEXT_MAX 32

static const struct {
	const char *ext;
	const char *type;
} content_types[] = {
    {".html", "text/html; charset=utf-8"},
    {".css", "text/css; charset=utf-8"},
    {".js", "text/javascript; charset=utf-8"},
    {".mjs", "text/javascript; charset=utf-8"},
    {".svg", "image/svg+xml"},
    {".png", "image/png"},
    {".json", "application/json"},
    {".txt", "text/plain; charset=utf-8"},
};

const char *http_www_content_type(const char *name)
{
	size_t n = strlen(name);

	for (size_t i = 0; i < sizeof content_types / sizeof content_types[0]; i++) {
		size_t e = strlen(content_types[i].ext);
		if (n > e && !strcmp(name + n - e, content_types[i].ext))
			return content_types[i].type;
	}
	return NULL;
}

bool http_www_name_ok(const char *name)
{
	size_t n = 0;

	if (!name || !((*name >= 'a' && *name <= 'z') || (*name >= '0' && *name <= '9')))
		return false;
	for (const char *p = name; *p; p++, n++) {
		bool ok = (*p >= 'a' && *p <= 'z') || (*p >= '0' && *p <= '9') || *p == '.' ||
		          *p == '-' || *p == '_';
		if (!ok || n >= WWW_NAME_MAX || (p[0] == '.' && p[1] == '.'))
			return false;
	}
	return n < WWW_NAME_MAX && http_www_content_type(name) != NULL;
}

bool http_www_is_static(const char *url)
{
	if (!url)
		return false;
	if (!strcmp(url, "/"))
		return true;
	return !strncmp(url, "/www/", 5) && http_www_name_ok(url + 5);
}

static bool has_index(const char *dir)
{
	char p[PATH_MAX];
	struct stat st;

	if (snprintf(p, sizeof p, "%s/index.html", dir) >= (int)sizeof p)
		return false;
	return stat(p, &st) == 0 && S_ISREG(st.st_mode);
}

/* Resolved once: the folder does not move while the daemon runs. */
static pthread_once_t dir_once = PTHREAD_ONCE_INIT;
static char www_dir[PATH_MAX];

static void find_dir(void)
{
	const char *env = getenv("STOPCOCK_WWW_DIR");
	char data[PATH_MAX];
	bool in_tree = false;

	if (env && *env) {
		snprintf(www_dir, sizeof www_dir, "%s", env);
		goto out;
	}
	if (datadir_find(data, sizeof data, &in_tree) != 0)
		data[0] = '\0';
	/* In a checkout the data folder is REPO/config and the page REPO/daemon/server/www. */
	int w = in_tree ? snprintf(www_dir, sizeof www_dir, "%s/../daemon/server/www", data)
	                : snprintf(www_dir, sizeof www_dir, "%s/www", data);
	if (w < 0 || (size_t)w >= sizeof www_dir)
		www_dir[0] = '\0'; /* too long a path: no page, said below */
out:
	if (!has_index(www_dir))
		log_warn("http: the bench page's folder %s has no index.html; GET / will be 404",
		         www_dir);
	else
		log_info("http: serving the bench page from %s", www_dir);
}

const char *http_www_dir(void)
{
	pthread_once(&dir_once, find_dir);
	return www_dir;
}

/* The whole file, or NULL (errno set). */
static char *read_file(const char *path, size_t *len)
{
	int fd = open(path, O_RDONLY | O_CLOEXEC | O_NOFOLLOW);
	struct stat st;
	char *buf = NULL;
	size_t got = 0;

	if (fd < 0)
		return NULL;
	if (fstat(fd, &st) || !S_ISREG(st.st_mode) || (size_t)st.st_size > WWW_FILE_MAX) {
		errno = ENOENT;
		goto out;
	}
	buf = malloc((size_t)st.st_size + 1);
	if (!buf)
		goto out;
	while (got < (size_t)st.st_size) {
		ssize_t r = read(fd, buf + got, (size_t)st.st_size - got);
		if (r < 0 && errno == EINTR)
			continue;
		if (r <= 0)
			break;
		got += (size_t)r;
	}
	buf[got] = '\0';
	*len = got;
out:
	close(fd);
	return buf;
}

static void serve_file(const http_req_t *q, const char *name, http_reply_t *r)
{
	char path[PATH_MAX];
	size_t len = 0;
	char *body;

	if (strcmp(q->method, "GET") && strcmp(q->method, "HEAD")) {
		http_reply_error(r, 405, "method_not_allowed", "use GET");
		return;
	}
	if (!http_www_name_ok(name) ||
	    snprintf(path, sizeof path, "%s/%s", http_www_dir(), name) >= (int)sizeof path) {
		http_reply_error(r, 404, "not_found", "no such file");
		return;
	}
	body = read_file(path, &len);
	if (!body) {
		http_reply_error(r, 404, "not_found", "no such file: %s", name);
		return;
	}
	http_reply_text(r, 200, http_www_content_type(name), body, len);
}

/* ---- GET /v1/runs ---- */

static bool word_in(const char *w, const char *list)
{
	size_t n = strlen(w);
	for (const char *p = list; (p = strstr(p, w)); p += n)
		if ((p == list || p[-1] == ' ') && (p[n] == ' ' || p[n] == '\0'))
			return n > 0;
	return false;
}

/* n digits at *p as a number in [lo, hi]; advances *p. */
static bool digits_in(const char **p, int n, int lo, int hi, int *out)
{
	int v = 0;
	for (int i = 0; i < n; i++) {
		if ((*p)[i] < '0' || (*p)[i] > '9')
			return false;
		v = v * 10 + ((*p)[i] - '0');
	}
	*p += n;
	*out = v;
	return v >= lo && v <= hi;
}

/* A real date or UTC time, whole or cut after a field: YYYY[-MM[-DD
 * [THH[:MM[:SS[.fff]]][Z]]]] ("2026-02-30", "2026-13" or "1%00abc" are
 * refused; the store compares it with RFC 3339 text, so a prefix works). */
static bool time_text_ok(const char *s)
{
	static const int mdays[] = {31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31};
	const char *p = s;
	int y, mo, d, v;

	if (strlen(s) >= TIME_TEXT_MAX || !digits_in(&p, 4, 1970, 9999, &y))
		return false;
	if (!*p)
		return true;
	if (*p++ != '-' || !digits_in(&p, 2, 1, 12, &mo))
		return false;
	if (!*p)
		return true;
	if (*p++ != '-' || !digits_in(&p, 2, 1, mdays[mo - 1], &d))
		return false;
	if (mo == 2 && d == 29 && !(y % 4 == 0 && (y % 100 != 0 || y % 400 == 0)))
		return false;
	if (!*p)
		return true;
	if (*p++ != 'T' || !digits_in(&p, 2, 0, 23, &v))
		return false;
	int field = 0;
	for (; field < 2 && *p == ':'; field++) { /* minutes, seconds */
		p++;
		if (!digits_in(&p, 2, 0, 59, &v))
			return false;
	}
	if (*p == '.' && field == 2) { /* a fraction of a second */
		if (p[1] < '0' || p[1] > '9')
			return false;
		for (p++; *p >= '0' && *p <= '9'; p++)
			;
	}
	if (*p == 'Z')
		p++;
	return *p == '\0';
}

static const char *arg(const http_req_t *q, const char *key)
{
	const char *v = http_query(q, key);
	return v && *v ? v : NULL;
}

static void get_runs(const http_req_t *q, http_reply_t *r)
{
	store_runs_filter_t f = {.station = arg(q, "station"),
	                         .state = arg(q, "state"),
	                         .since = arg(q, "since"),
	                         .until = arg(q, "until"),
	                         .limit = 100};
	const char *limit = arg(q, "limit"), *before = arg(q, "before");
	long long v;
	bool db_err;
	json_t *j;

	if (f.state && !word_in(f.state, RUN_STATES)) {
		http_reply_error(r, 400, "bad_request", "state is one of: %s", RUN_STATES);
		return;
	}
	if (f.station && strlen(f.station) >= CFG_NAME_MAX) {
		http_reply_error(r, 400, "bad_request", "station name too long");
		return;
	}
	if ((f.since && !time_text_ok(f.since)) || (f.until && !time_text_ok(f.until))) {
		http_reply_error(r, 400, "bad_request",
		                 "since and until are dates or UTC times, e.g. 2026-12-01 or "
		                 "2026-12-01T14:00:00Z");
		return;
	}
	if (limit) {
		if (!http_parse_id(limit, &v) || v > 1000) {
			http_reply_error(r, 400, "bad_request",
			                 "limit must be an integer 1 to 1000");
			return;
		}
		f.limit = (int)v;
	}
	if (before) {
		if (!http_parse_id(before, &v)) {
			http_reply_error(r, 400, "bad_request", "before must be a run id");
			return;
		}
		f.before_id = v;
	}
	j = store_runs_list(q->ctx->store, &f, &db_err);
	if (j)
		http_reply_json(r, 200, j);
	else
		http_reply_error(r, 500, "database",
		                 "the database failed; the request may be retried");
}

/* ---- POST /v1/methods/{id}/check ---- */

static void post_check(const http_req_t *q, const char *id, http_reply_t *r)
{
	method_t *m;
	method_limits_t lim;
	diag_list_t d = DIAG_LIST_INIT;
	char name[METHOD_ID_MAX + 8], sha[65];
	char *stored_text = NULL;
	size_t stored_len = 0;
	long stored_rev = 0;
	json_t *diags, *out;
	bool valid;

	if (!q->body || q->body_len == 0) {
		http_reply_error(r, 400, "bad_request", "the body must be the method's YAML text");
		return;
	}
	if (strlen(id) >= METHOD_ID_MAX) {
		http_reply_error(r, 400, "bad_request", "method id too long");
		return;
	}
	m = malloc(sizeof *m);
	if (!m) {
		http_reply_error(r, 500, "internal", "out of memory");
		return;
	}
	/* The same name and limits as PUT, so the verdict is PUT's. */
	snprintf(name, sizeof name, "%s.yaml", id);
	http_method_limits(q->ctx, NULL, &lim);
	valid = method_parse(name, q->body, q->body_len, &lim, m, &d) == 0;
	diags = json_array();
	for (size_t i = 0; i < d.n; i++)
		json_array_append_new(diags, json_pack("{s:s,s:i,s:i,s:s}", "file",
		                                       d.v[i].file ? d.v[i].file : name, "line",
		                                       d.v[i].line, "col", d.v[i].col, "message",
		                                       d.v[i].msg ? d.v[i].msg : "invalid"));
	if (store_method_latest(q->ctx->store, id, &stored_text, &stored_len, &stored_rev, sha) !=
	    STORE_OK)
		stored_rev = 0;
	free(stored_text);
	out = json_pack("{s:s,s:b,s:o,s:o,s:o}", "id", id, "valid", valid, "revision",
	                valid ? json_integer(m->revision) : json_null(), "stored_revision",
	                stored_rev > 0 ? json_integer(stored_rev) : json_null(), "diagnostics",
	                diags);
	/* A valid text whose revision is not above the stored one would get 409
	 * from PUT: say so here, so the editor can tell before saving. */
	if (out && valid)
		json_object_set_new(out, "saves", json_boolean(stored_rev < m->revision));
	http_reply_json(r, 200, out);
	diag_free(&d);
	free(m);
}

bool http_route_www(const http_req_t *q, const char *const *seg, int n, http_reply_t *r)
{
	if (n == 0) {
		serve_file(q, "index.html", r);
		return true;
	}
	if (!strcmp(seg[0], "www")) {
		if (n == 2)
			serve_file(q, seg[1], r);
		else
			http_reply_error(r, 404, "not_found", "no such file");
		return true;
	}
	if (strcmp(seg[0], "v1") || n < 2)
		return false;
	if (n == 2 && !strcmp(seg[1], "runs") && !strcmp(q->method, "GET")) {
		get_runs(q, r);
		return true;
	}
	if (n == 4 && !strcmp(seg[1], "methods") && !strcmp(seg[3], "check")) {
		if (strcmp(q->method, "POST"))
			http_reply_error(r, 405, "method_not_allowed", "use POST");
		else
			post_check(q, seg[2], r);
		return true;
	}
	return false;
}
