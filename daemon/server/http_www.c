/* http_www.c: the bench page's files (docs/bench-page.md). GET / is
 * index.html, GET /www/NAME any other file of the folder. Names are checked
 * against a strict pattern rather than resolved, so no path can leave the
 * folder. The folder is, in this order: $STOPCOCK_WWW_DIR; the repository's
 * daemon/server/www when the daemon runs from the tree (found next to the
 * executable, so tests need no install); else the data folder's www/
 * (datadir.h: PREFIX/share/stopcock beside the program). The page's two
 * API routes beyond the LIMS contract of docs/lims.md, GET /v1/runs and
 * POST /v1/methods/{id}/check, are with their kin in http_runs.c and
 * http_misc.c.
 */
#include "http.h"
#include "http_routes.h"

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

#define WWW_NAME_MAX 64
#define WWW_FILE_MAX (2u << 20) /* bytes; the page's files are a few tens of KiB */

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

static void serve_file(const char *name, http_reply_t *r)
{
	char path[PATH_MAX];
	size_t len = 0;
	char *body;

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

void http_get_index(const http_req_t *q, http_reply_t *r)
{
	(void)q;
	serve_file("index.html", r);
}

void http_get_www_file(const http_req_t *q, http_reply_t *r)
{
	serve_file(q->param, r);
}
