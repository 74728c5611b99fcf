/* pump_profile.c: pump profiles, command templates and the pure reply parser. */
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "pump_profile.h"

static const char *const top_keys[] = {
    "name",      "description", "command_end",      "reply_end",
    "steps",     "capacity_ml", "dose_rate_ml_min", "fill_rate_ml_min",
    "max_speed", "commands",    "replies",          NULL};

#define CMD(k, req)                                                                                \
	{                                                                                          \
#k, req, offsetof(pump_profile_t, k), NULL                                         \
	}
static const cmdp_entry_t commands[] = {
    CMD(init, false),      CMD(dose, true), CMD(fill, true),   CMD(valve_in, false),
    CMD(valve_out, false), CMD(halt, true), CMD(status, true), {NULL, false, 0, NULL}};
static const char *const placeholders[] = {"steps", "volume_ul", "volume_ml",
                                           "speed", "position",  NULL};
/* In the order they are tried (pump_parse_reply). */
static const cmdp_entry_t replies[] = {
    {"error", true, offsetof(pump_profile_t, error), NULL},
    {"busy", false, offsetof(pump_profile_t, busy), NULL},
    {"moving", true, offsetof(pump_profile_t, moving), "position"},
    {"idle", true, offsetof(pump_profile_t, idle), "position"},
    {"ok", true, offsetof(pump_profile_t, ok), NULL},
    {NULL, false, 0, NULL}};
static const char *const fields[] = {"position", "code", NULL};
static const cmdp_spec_t spec = {"pump profile",
                                 commands,
                                 placeholders,
                                 replies,
                                 fields,
                                 offsetof(pump_profile_t, command_end),
                                 offsetof(pump_profile_t, reply_end)};

static bool str_key(const yt_doc_t *doc, const yt_node_t *m, const char *key, bool required,
                    char *out, size_t cap, diag_list_t *d)
{
	const yt_node_t *n = yt_get(m, key);
	out[0] = '\0';
	if (!n) {
		if (required)
			yt_missing(doc, m, key, "pump profile", d);
		return !required;
	}
	return yt_string(doc, n, key, out, cap, d);
}

int pump_profile_parse(const yt_doc_t *doc, pump_profile_t *p, diag_list_t *d)
{
	memset(p, 0, sizeof(*p));
	const yt_node_t *r = doc->root;
	if (!yt_want_map(doc, r, "pump profile", d))
		return -1;
	bool ok = yt_check_keys(doc, r, top_keys, "pump profile", d);
	ok &= str_key(doc, r, "name", true, p->name, sizeof(p->name), d);
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

	if (!cmdp_parse(doc, r, &spec, p, d))
		return -1;
	if (!p->valve_in[0] != !p->valve_out[0]) {
		yt_error(doc, yt_get(r, "commands"), d,
		         "commands: give both valve_in and valve_out, or neither");
		ok = false;
	}
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
	cmdp_arg_t args[] = {
	    {"steps", ""}, {"volume_ul", ""}, {"volume_ml", ""}, {"speed", ""}, {"position", ""}};
	snprintf(args[0].value, sizeof(args[0].value), "%ld", a->steps);
	snprintf(args[1].value, sizeof(args[1].value), "%.1f", a->volume_ml * 1000.0);
	snprintf(args[2].value, sizeof(args[2].value), "%.4f", a->volume_ml);
	snprintf(args[3].value, sizeof(args[3].value), "%ld", a->speed);
	snprintf(args[4].value, sizeof(args[4].value), "%ld", a->position);
	return cmdp_expand(tmpl, args, sizeof(args) / sizeof(args[0]), out, cap);
}

static void to_reply(const cmdp_match_t *m, pump_reply_t *out)
{
	out->position = m->field[0];
	out->code = m->field[1];
	snprintf(out->text, sizeof(out->text), "%s", m->text);
}

bool pump_match(const char *pat, const char *s, pump_reply_t *out)
{
	cmdp_match_t m;
	memset(&m, 0, sizeof(m));
	bool ok = cmdp_match(pat, fields, s, &m);
	to_reply(&m, out);
	return ok;
}

pump_reply_kind_t pump_parse_reply(const pump_profile_t *p, const char *line, pump_reply_t *out)
{
	const char *pats[] = {p->error, p->busy, p->moving, p->idle, p->ok};
	static const pump_reply_kind_t kinds[] = {
	    PUMP_REPLY_ERROR, PUMP_REPLY_BUSY, PUMP_REPLY_MOVING, PUMP_REPLY_IDLE, PUMP_REPLY_OK};
	cmdp_match_t m;
	int i = cmdp_classify(pats, 5, fields, line, &m);
	memset(out, 0, sizeof(*out));
	if (i < 0)
		return PUMP_REPLY_UNKNOWN;
	to_reply(&m, out);
	out->kind = kinds[i];
	return out->kind;
}
