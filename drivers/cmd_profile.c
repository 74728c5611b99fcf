/* cmd_profile.c: command profiles of line-based ASCII serial devices (see
 * cmd_profile.h): parsing, templates, the pure reply matcher, profile lookup
 * and one command-reply transaction. */
#include <ctype.h>
#include <errno.h>
#include <limits.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "clock.h"
#include "cmd_profile.h"
#include "datadir.h"
#include "link.h"

#define CMDP_KEYS 16 /* most keys under commands: or replies: */

static char *slot(void *prof, size_t offset)
{
	return (char *)prof + offset;
}

static bool str_key(const yt_doc_t *doc, const yt_node_t *m, const char *key, const char *where,
                    bool required, char *out, size_t cap, diag_list_t *d)
{
	const yt_node_t *n = yt_get(m, key);
	out[0] = '\0';
	if (!n) {
		if (required)
			yt_missing(doc, m, key, where, d);
		return !required;
	}
	/* Commands, patterns and line ends are wire bytes: "\r\n" is allowed. */
	return yt_bytes(doc, n, key, out, cap, d);
}

static void list_braced(const char *const *names, bool with_text, char *out, size_t cap)
{
	out[0] = '\0';
	for (size_t i = 0; names[i]; i++) {
		size_t l = strlen(out);
		snprintf(out + l, cap - l, "%s{%s}", i ? ", " : "", names[i]);
	}
	if (with_text) {
		size_t l = strlen(out);
		snprintf(out + l, cap - l, "%s{text}", out[0] ? ", " : "");
	}
}

static bool check_template(const yt_doc_t *doc, const yt_node_t *m, const cmdp_spec_t *spec,
                           const char *key, const char *s, diag_list_t *d)
{
	cmdp_arg_t a[CMDP_KEYS];
	size_t n = 0;
	for (; n < CMDP_KEYS && spec->placeholders[n]; n++) {
		a[n].name = spec->placeholders[n];
		snprintf(a[n].value, sizeof(a[n].value), "1");
	}
	char buf[512], allowed[256];
	if (!s[0] || cmdp_expand(s, a, n, buf, sizeof(buf)) >= 0)
		return true;
	list_braced(spec->placeholders, false, allowed, sizeof(allowed));
	yt_error(doc, yt_get(m, key), d, "commands.%s: unknown placeholder in \"%s\" (allowed: %s)",
	         key, s, allowed);
	return false;
}

static bool is_field(const char *const *fields, const char *name, size_t len)
{
	for (size_t i = 0; fields[i]; i++)
		if (strlen(fields[i]) == len && !strncmp(fields[i], name, len))
			return true;
	return false;
}

static bool check_pattern(const yt_doc_t *doc, const yt_node_t *m, const cmdp_spec_t *spec,
                          const char *key, const char *s, const char *need, diag_list_t *d)
{
	const char *p = s;
	bool has_need = false;
	while ((p = strchr(p, '{'))) {
		const char *e = strchr(p, '}');
		size_t n = e ? (size_t)(e - p - 1) : 0;
		if (e && n == 4 && !strncmp(p + 1, "text", 4)) {
			if (e[1] != '\0') {
				yt_error(doc, yt_get(m, key), d,
				         "replies.%s: {text} must end the pattern", key);
				return false;
			}
		} else if (e && is_field(spec->fields, p + 1, n)) {
			if (need && strlen(need) == n && !strncmp(need, p + 1, n))
				has_need = true;
		} else {
			char allowed[256];
			list_braced(spec->fields, true, allowed, sizeof(allowed));
			yt_error(doc, yt_get(m, key), d,
			         "replies.%s: unknown placeholder in \"%s\" (allowed: %s)", key, s,
			         allowed);
			return false;
		}
		p = e + 1;
	}
	if (need && !has_need) {
		yt_error(doc, yt_get(m, key), d, "replies.%s must contain {%s}", key, need);
		return false;
	}
	return true;
}

/* 1 when good, 0 with errors, -1 when the group is missing or not a map
 * (nothing after it is read, as the rest would only add noise). */
static int parse_group(const yt_doc_t *doc, const yt_node_t *root, const char *group,
                       const cmdp_spec_t *spec, const cmdp_entry_t *ents, void *prof,
                       diag_list_t *d)
{
	const yt_node_t *m = yt_get(root, group);
	if (!m) {
		yt_missing(doc, root, group, spec->what, d);
		return -1;
	}
	if (!yt_want_map(doc, m, group, d))
		return -1;
	const char *keys[CMDP_KEYS + 1];
	size_t n = 0;
	for (; n < CMDP_KEYS && ents[n].name; n++)
		keys[n] = ents[n].name;
	keys[n] = NULL;
	bool ok = yt_check_keys(doc, m, keys, group, d);
	bool is_cmd = ents == spec->commands;
	for (size_t i = 0; i < n; i++) {
		char *out = slot(prof, ents[i].offset);
		if (!str_key(doc, m, ents[i].name, group, ents[i].required, out, CMDP_STR, d)) {
			ok = false;
			continue;
		}
		if (is_cmd)
			ok &= check_template(doc, m, spec, ents[i].name, out, d);
		else if (out[0] || ents[i].required)
			ok &= check_pattern(doc, m, spec, ents[i].name, out, ents[i].need, d);
	}
	return ok ? 1 : 0;
}

bool cmdp_parse(const yt_doc_t *doc, const yt_node_t *root, const cmdp_spec_t *spec, void *prof,
                diag_list_t *d)
{
	char *cend = slot(prof, spec->command_end_offset);
	char *rend = slot(prof, spec->reply_end_offset);
	bool ok = str_key(doc, root, "command_end", spec->what, true, cend, CMDP_END, d);
	bool rok = str_key(doc, root, "reply_end", spec->what, true, rend, CMDP_END, d);
	if (rok && !rend[0]) {
		yt_error(doc, yt_get(root, "reply_end"), d, "reply_end must not be empty");
		rok = false;
	}
	ok &= rok;
	int c = parse_group(doc, root, "commands", spec, spec->commands, prof, d);
	if (c < 0)
		return false;
	return parse_group(doc, root, "replies", spec, spec->replies, prof, d) == 1 && c == 1 && ok;
}

int cmdp_expand(const char *tmpl, const cmdp_arg_t *args, size_t nargs, char *out, size_t cap)
{
	size_t o = 0;
	for (const char *p = tmpl; *p;) {
		const char *src = p;
		size_t n = 1;
		if (*p == '{') {
			const char *e = strchr(p, '}');
			if (!e)
				return -1;
			size_t kl = (size_t)(e - p - 1);
			src = NULL;
			for (size_t i = 0; i < nargs && !src; i++)
				if (strlen(args[i].name) == kl && !strncmp(args[i].name, p + 1, kl))
					src = args[i].value;
			if (!src)
				return -1;
			n = strlen(src);
			p = e + 1;
		} else {
			p++;
		}
		if (o + n >= cap)
			return -1;
		memcpy(out + o, src, n);
		o += n;
	}
	out[o] = '\0';
	return (int)o;
}

static bool match_int(const char **s, long *out)
{
	const char *p = *s;
	if (*p == '+' || *p == '-')
		p++;
	if (!isdigit((unsigned char)*p))
		return false;
	errno = 0;
	char *end;
	long v = strtol(*s, &end, 10);
	if (errno)
		return false;
	*out = v;
	*s = end;
	return true;
}

/* Index of the field whose "{name}" starts p, or -1. */
static int field_at(const char *const *fields, const char *p, size_t *len)
{
	for (int i = 0; i < CMDP_FIELDS && fields[i]; i++) {
		size_t l = strlen(fields[i]);
		if (p[0] == '{' && !strncmp(p + 1, fields[i], l) && p[l + 1] == '}') {
			*len = l + 2;
			return i;
		}
	}
	return -1;
}

bool cmdp_match(const char *pat, const char *const *fields, const char *s, cmdp_match_t *out)
{
	if (!pat[0])
		return false;
	const char *p = pat;
	while (*p) {
		size_t fl;
		int fi;
		if (*p == ' ') {
			if (*s != ' ' && *s != '\t')
				return false;
			while (*s == ' ' || *s == '\t')
				s++;
			p++;
		} else if ((fi = field_at(fields, p, &fl)) >= 0) {
			if (!match_int(&s, &out->field[fi]))
				return false;
			p += fl;
		} else if (!strncmp(p, "{text}", 6)) {
			snprintf(out->text, sizeof(out->text), "%s", s);
			s += strlen(s);
			p += 6;
		} else {
			if (*p != *s)
				return false;
			p++;
			s++;
		}
	}
	while (*s == ' ' || *s == '\t')
		s++;
	return *s == '\0';
}

int cmdp_classify(const char *const *pats, size_t n, const char *const *fields, const char *line,
                  cmdp_match_t *out)
{
	char clean[256];
	size_t len = 0;
	for (const char *s = line; *s && len < sizeof(clean) - 1; s++) {
		unsigned char c = (unsigned char)*s;
		if (c >= 0x20 && c < 0x7f)
			clean[len++] = (char)c;
		else if (c == '\t')
			clean[len++] = ' ';
	}
	clean[len] = '\0';
	for (size_t off = 0; off <= len; off++) {
		for (size_t i = 0; i < n; i++) {
			cmdp_match_t m;
			memset(&m, 0, sizeof(m));
			if (cmdp_match(pats[i], fields, clean + off, &m)) {
				*out = m;
				return (int)i;
			}
		}
	}
	memset(out, 0, sizeof(*out));
	return -1;
}

static bool file_exists(const char *p)
{
	return access(p, R_OK) == 0;
}

bool cmdp_resolve(const char *cfg_file, const char *subdir, const char *name, char *out, size_t cap,
                  char *data, size_t data_cap)
{
	if (datadir_find(data, data_cap, NULL) != 0)
		snprintf(data, data_cap, "%s", "(none)");
	if (name[0] == '/') {
		snprintf(out, cap, "%s", name);
		return file_exists(out);
	}
	char dir[PATH_MAX] = ".";
	const char *slash = cfg_file ? strrchr(cfg_file, '/') : NULL;
	if (slash)
		snprintf(dir, sizeof(dir), "%.*s", (int)(slash - cfg_file), cfg_file);
	const char *ext = strstr(name, ".yaml") ? "" : ".yaml";
	char beside[PATH_MAX + 16], installed[PATH_MAX + 16];
	snprintf(beside, sizeof(beside), "%s/%s", dir, subdir);
	snprintf(installed, sizeof(installed), "%s/%s", data, subdir);
	const char *dirs[] = {dir, beside, installed};
	for (size_t i = 0; i < sizeof(dirs) / sizeof(dirs[0]); i++) {
		snprintf(out, cap, "%s/%s", dirs[i], name);
		if (file_exists(out))
			return true;
		snprintf(out, cap, "%s/%s%s", dirs[i], name, ext);
		if (file_exists(out))
			return true;
	}
	return false;
}

bool cmdp_profile_key(const yt_doc_t *doc, const yt_node_t *cfg, const char *where,
                      const char *kind, const char *subdir,
                      int (*load)(const char *path, void *prof, diag_list_t *d), void *prof,
                      diag_list_t *d)
{
	const yt_node_t *n = yt_get(cfg, "profile");
	char name[LINK_PATH_MAX], path[PATH_MAX], data[PATH_MAX];
	if (!n) {
		yt_missing(doc, cfg, "profile", where, d);
		return false;
	}
	if (!yt_string(doc, n, "profile", name, sizeof(name), d))
		return false;
	if (!cmdp_resolve(doc->file, subdir, name, path, sizeof(path), data, sizeof(data))) {
		yt_error(doc, n, d,
		         "%s profile '%s' not found (looked beside this file, "
		         "in %s/ beside it and in %s/%s)",
		         kind, name, subdir, data, subdir);
		return false;
	}
	if (load(path, prof, d) != 0) {
		yt_error(doc, n, d, "%s profile '%s' is invalid (errors above)", kind, path);
		return false;
	}
	return true;
}

drv_status_t cmdp_transact_once(cmdp_line_t *l, const char *cmd, cmdp_accept_fn accept, void *ctx,
                                drv_err_t *err)
{
	char buf[CMDP_STR * 2 + CMDP_END];
	int n = snprintf(buf, sizeof(buf), "%s%s", cmd, l->command_end);
	if (n < 0 || (size_t)n >= sizeof(buf))
		return drv_fail(err, DRV_CONFIG, "%s: command too long", l->who);
	long timeout_ms = l->link.timeout_ms;
	double deadline = clock_mono_s() + (double)timeout_ms / 1000.0;
	serial_drain(&l->ser);
	drv_status_t st = serial_write(&l->ser, buf, (size_t)n, deadline, err);
	if (st != DRV_OK)
		return st;
	int garbage = 0;
	for (;;) {
		char line[256];
		st = serial_read_line(&l->ser, l->reply_end, line, sizeof(line), deadline, err);
		if (st == DRV_TIMEOUT && garbage)
			return drv_fail(err, DRV_BAD_REPLY,
			                "%s: %d unreadable line(s) and no valid reply to '%s' "
			                "within %ld ms",
			                l->who, garbage, cmd, timeout_ms);
		if (st == DRV_TIMEOUT)
			return drv_fail(err, DRV_TIMEOUT, "%s: no reply to '%s' within %ld ms",
			                l->who, cmd, timeout_ms);
		if (st != DRV_OK)
			return st;
		if (accept(ctx, line))
			return DRV_OK;
		garbage++;
	}
}

drv_status_t cmdp_transact(cmdp_line_t *l, cmdp_reopen_fn reopen, void *drv, const char *cmd,
                           cmdp_accept_fn accept, void *ctx, drv_err_t *err)
{
	drv_status_t st = DRV_OK;
	for (long i = 0; i <= l->link.retries; i++) {
		if (!serial_is_open(&l->ser) && (st = reopen(drv, err)) != DRV_OK)
			return st;
		st = cmdp_transact_once(l, cmd, accept, ctx, err);
		if (st == DRV_OK || st == DRV_CONFIG)
			return st;
		if (st == DRV_UNPLUGGED && i > 0)
			return st;
	}
	return st;
}

drv_status_t cmdp_open_with_halt(cmdp_line_t *l, const char *halt, cmdp_accept_fn accept, void *ctx,
                                 drv_err_t *err)
{
	drv_status_t st = serial_open(&l->ser, &l->link, err);
	if (st != DRV_OK)
		return st;
	for (long i = 0; i <= l->link.retries; i++) {
		st = cmdp_transact_once(l, halt, accept, ctx, err);
		if (st == DRV_OK || st == DRV_CONFIG || st == DRV_UNPLUGGED)
			break;
	}
	if (st != DRV_OK)
		serial_close(&l->ser); /* the next try opens again, and halts first */
	return st;
}
