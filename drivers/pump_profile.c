/* pump_profile.c: pump profiles, command templates and the pure reply parser. */
#include <ctype.h>
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "pump_profile.h"

static const char *const top_keys[] = {
    "name",      "description", "command_end",      "reply_end",
    "steps",     "capacity_ml", "dose_rate_ml_min", "fill_rate_ml_min",
    "max_speed", "commands",    "replies",          NULL};
static const char *const cmd_keys[] = {"init",      "dose", "fill",   "valve_in",
                                       "valve_out", "halt", "status", NULL};
static const char *const reply_keys[] = {"ok", "busy", "error", "moving", "idle", NULL};

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

/* Placeholders a template or pattern may use. */
static bool check_template(const yt_doc_t *doc, const yt_node_t *m, const char *key, const char *s,
                           diag_list_t *d)
{
	pump_args_t a = {1, 1.0, 1, 1};
	char buf[512];
	if (!s[0] || pump_expand(s, &a, buf, sizeof(buf)) >= 0)
		return true;
	yt_error(doc, yt_get(m, key), d,
	         "commands.%s: unknown placeholder in \"%s\" (allowed: {steps}, {volume_ul}, "
	         "{volume_ml}, {speed}, {position})",
	         key, s);
	return false;
}

static bool check_pattern(const yt_doc_t *doc, const yt_node_t *m, const char *key, const char *s,
                          bool need_position, diag_list_t *d)
{
	const char *p = s;
	bool has_pos = false;
	while ((p = strchr(p, '{'))) {
		const char *e = strchr(p, '}');
		size_t n = e ? (size_t)(e - p + 1) : 0;
		if (n == 10 && !strncmp(p, "{position}", n)) {
			has_pos = true;
		} else if (n == 6 && !strncmp(p, "{code}", n)) {
		} else if (n == 6 && !strncmp(p, "{text}", n)) {
			if (e[1] != '\0') {
				yt_error(doc, yt_get(m, key), d,
				         "replies.%s: {text} must end the pattern", key);
				return false;
			}
		} else {
			yt_error(doc, yt_get(m, key), d,
			         "replies.%s: unknown placeholder in \"%s\" (allowed: {position}, "
			         "{code}, {text})",
			         key, s);
			return false;
		}
		p = e + 1;
	}
	if (need_position && !has_pos) {
		yt_error(doc, yt_get(m, key), d, "replies.%s must contain {position}", key);
		return false;
	}
	return true;
}

int pump_profile_parse(const yt_doc_t *doc, pump_profile_t *p, diag_list_t *d)
{
	memset(p, 0, sizeof(*p));
	const yt_node_t *r = doc->root;
	if (!yt_want_map(doc, r, "pump profile", d))
		return -1;
	bool ok = yt_check_keys(doc, r, top_keys, "pump profile", d);
	ok &= str_key(doc, r, "name", "pump profile", true, p->name, sizeof(p->name), d);
	ok &= str_key(doc, r, "command_end", "pump profile", true, p->command_end,
	              sizeof(p->command_end), d);
	ok &= str_key(doc, r, "reply_end", "pump profile", true, p->reply_end, sizeof(p->reply_end),
	              d);
	if (ok && !p->reply_end[0]) {
		yt_error(doc, yt_get(r, "reply_end"), d, "reply_end must not be empty");
		ok = false;
	}
	const yt_node_t *n;
	if (!(n = yt_get(r, "steps"))) {
		yt_missing(doc, r, "steps", "pump profile", d);
		ok = false;
	} else {
		ok &= yt_long(doc, n, "steps", 1, 100000000, &p->steps, d);
	}
	if (!(n = yt_get(r, "capacity_ml"))) {
		yt_missing(doc, r, "capacity_ml", "pump profile", d);
		ok = false;
	} else {
		ok &= yt_double_range(doc, n, "capacity_ml", "mL", 0.01, 1000, &p->capacity_ml, d);
	}
	p->dose_rate_ml_min = 30.0;
	p->fill_rate_ml_min = 60.0;
	p->max_speed = 100000;
	if ((n = yt_get(r, "dose_rate_ml_min")))
		ok &= yt_double_range(doc, n, "dose_rate_ml_min", "mL/min", 0.001, 10000,
		                      &p->dose_rate_ml_min, d);
	if ((n = yt_get(r, "fill_rate_ml_min")))
		ok &= yt_double_range(doc, n, "fill_rate_ml_min", "mL/min", 0.001, 10000,
		                      &p->fill_rate_ml_min, d);
	if ((n = yt_get(r, "max_speed")))
		ok &= yt_long(doc, n, "max_speed", 1, 100000000, &p->max_speed, d);

	const yt_node_t *c = yt_get(r, "commands");
	if (!c) {
		yt_missing(doc, r, "commands", "pump profile", d);
		return -1;
	}
	if (!yt_want_map(doc, c, "commands", d))
		return -1;
	ok &= yt_check_keys(doc, c, cmd_keys, "commands", d);
	ok &= str_key(doc, c, "init", "commands", false, p->init, PUMP_STR, d);
	ok &= str_key(doc, c, "dose", "commands", true, p->dose, PUMP_STR, d);
	ok &= str_key(doc, c, "fill", "commands", true, p->fill, PUMP_STR, d);
	ok &= str_key(doc, c, "valve_in", "commands", false, p->valve_in, PUMP_STR, d);
	ok &= str_key(doc, c, "valve_out", "commands", false, p->valve_out, PUMP_STR, d);
	ok &= str_key(doc, c, "halt", "commands", true, p->halt, PUMP_STR, d);
	ok &= str_key(doc, c, "status", "commands", true, p->status, PUMP_STR, d);
	if (!p->valve_in[0] != !p->valve_out[0]) {
		yt_error(doc, c, d, "commands: give both valve_in and valve_out, or neither");
		ok = false;
	}
	static const char *const cnames[] = {"init",      "dose", "fill",  "valve_in",
	                                     "valve_out", "halt", "status"};
	char *cvals[] = {p->init, p->dose, p->fill, p->valve_in, p->valve_out, p->halt, p->status};
	for (int i = 0; i < 7; i++)
		ok &= check_template(doc, c, cnames[i], cvals[i], d);

	const yt_node_t *rp = yt_get(r, "replies");
	if (!rp) {
		yt_missing(doc, r, "replies", "pump profile", d);
		return -1;
	}
	if (!yt_want_map(doc, rp, "replies", d))
		return -1;
	ok &= yt_check_keys(doc, rp, reply_keys, "replies", d);
	ok &= str_key(doc, rp, "ok", "replies", true, p->ok, PUMP_STR, d);
	ok &= str_key(doc, rp, "busy", "replies", false, p->busy, PUMP_STR, d);
	ok &= str_key(doc, rp, "error", "replies", true, p->error, PUMP_STR, d);
	ok &= str_key(doc, rp, "moving", "replies", true, p->moving, PUMP_STR, d);
	ok &= str_key(doc, rp, "idle", "replies", true, p->idle, PUMP_STR, d);
	ok &= check_pattern(doc, rp, "ok", p->ok, false, d);
	ok &= check_pattern(doc, rp, "busy", p->busy, false, d);
	ok &= check_pattern(doc, rp, "error", p->error, false, d);
	ok &= check_pattern(doc, rp, "moving", p->moving, true, d);
	ok &= check_pattern(doc, rp, "idle", p->idle, true, d);
	return ok ? 0 : -1;
}

int pump_profile_load(const char *path, pump_profile_t *p, diag_list_t *d)
{
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	if (yt_load_file(path, &doc, d) != 0) {
		yt_free(&doc);
		return -1;
	}
	int rc = pump_profile_parse(&doc, p, d);
	yt_free(&doc);
	return rc;
}

int pump_expand(const char *tmpl, const pump_args_t *a, char *out, size_t cap)
{
	size_t o = 0;
	for (const char *p = tmpl; *p;) {
		char piece[64];
		const char *src = piece;
		size_t n;
		if (*p == '{') {
			const char *e = strchr(p, '}');
			if (!e)
				return -1;
			size_t kl = (size_t)(e - p - 1);
			const char *k = p + 1;
			if (kl == 5 && !strncmp(k, "steps", kl))
				snprintf(piece, sizeof(piece), "%ld", a->steps);
			else if (kl == 9 && !strncmp(k, "volume_ul", kl))
				snprintf(piece, sizeof(piece), "%.1f", a->volume_ml * 1000.0);
			else if (kl == 9 && !strncmp(k, "volume_ml", kl))
				snprintf(piece, sizeof(piece), "%.4f", a->volume_ml);
			else if (kl == 5 && !strncmp(k, "speed", kl))
				snprintf(piece, sizeof(piece), "%ld", a->speed);
			else if (kl == 8 && !strncmp(k, "position", kl))
				snprintf(piece, sizeof(piece), "%ld", a->position);
			else
				return -1;
			n = strlen(piece);
			p = e + 1;
		} else {
			src = p;
			n = 1;
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

bool pump_match(const char *pat, const char *s, pump_reply_t *out)
{
	if (!pat[0])
		return false;
	const char *p = pat;
	while (*p) {
		if (*p == ' ') {
			if (*s != ' ' && *s != '\t')
				return false;
			while (*s == ' ' || *s == '\t')
				s++;
			p++;
		} else if (!strncmp(p, "{position}", 10)) {
			if (!match_int(&s, &out->position))
				return false;
			p += 10;
		} else if (!strncmp(p, "{code}", 6)) {
			if (!match_int(&s, &out->code))
				return false;
			p += 6;
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

pump_reply_kind_t pump_parse_reply(const pump_profile_t *p, const char *line, pump_reply_t *out)
{
	char clean[256];
	size_t n = 0;
	for (const char *s = line; *s && n < sizeof(clean) - 1; s++) {
		unsigned char c = (unsigned char)*s;
		if (c >= 0x20 && c < 0x7f)
			clean[n++] = (char)c;
		else if (c == '\t')
			clean[n++] = ' ';
	}
	clean[n] = '\0';
	const struct {
		const char *pat;
		pump_reply_kind_t kind;
	} pats[] = {{p->error, PUMP_REPLY_ERROR},
	            {p->busy, PUMP_REPLY_BUSY},
	            {p->moving, PUMP_REPLY_MOVING},
	            {p->idle, PUMP_REPLY_IDLE},
	            {p->ok, PUMP_REPLY_OK}};
	for (size_t off = 0; off <= n; off++) {
		for (size_t i = 0; i < sizeof(pats) / sizeof(pats[0]); i++) {
			pump_reply_t r;
			memset(&r, 0, sizeof(r));
			if (pump_match(pats[i].pat, clean + off, &r)) {
				r.kind = pats[i].kind;
				*out = r;
				return r.kind;
			}
		}
	}
	memset(out, 0, sizeof(*out));
	return PUMP_REPLY_UNKNOWN;
}
