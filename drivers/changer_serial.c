/* changer_serial.c: sample-changer driver for line-based ASCII changers,
 * driven by a profile (changer_profile.h) over the serial transport.
 *
 * The rack turns only with the head up and nothing in motion, checked on the
 * device's own status just before the command: a head dragged through a
 * beaker wall breaks the electrode. Moves and lifts are absolute, so they
 * are retried like status and halt; a pump run is sent once (a lost reply
 * may mean it runs, and a second run would double the volume).
 */
#include <math.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "changer_profile.h"
#include "drv.h"
#include "link.h"
#include "serial.h"

/* ---- the profile ---- */

static const char *const top_keys[] = {"name",      "description", "command_end", "reply_end",
                                       "positions", "commands",    "replies",     NULL};

#define CMD(k, req)                                                                                \
	{                                                                                          \
#k, req, offsetof(changer_profile_t, k), NULL                                      \
	}
static const cmdp_entry_t commands[] = {
    CMD(init, false),     CMD(move, true),   CMD(lift_up, true),
    CMD(lift_down, true), CMD(rinse, false), CMD(waste, false),
    CMD(halt, true),      CMD(status, true), {NULL, false, 0, NULL}};
static const char *const placeholders[] = {"position", "seconds", "ms", NULL};
/* In the order they are tried, as changer_reply_kind_t. */
static const cmdp_entry_t replies[] = {
    {"error", true, offsetof(changer_profile_t, error), NULL},
    {"busy", false, offsetof(changer_profile_t, busy), NULL},
    {"moving", true, offsetof(changer_profile_t, moving), "position"},
    {"idle", true, offsetof(changer_profile_t, idle), "position"},
    {"ok", true, offsetof(changer_profile_t, ok), NULL},
    {NULL, false, 0, NULL}};
static const char *const fields[] = {"position", "lift", "code", NULL};
static const cmdp_spec_t spec = {"changer profile",
                                 commands,
                                 placeholders,
                                 replies,
                                 fields,
                                 offsetof(changer_profile_t, command_end),
                                 offsetof(changer_profile_t, reply_end)};

int changer_profile_parse(const yt_doc_t *doc, changer_profile_t *p, diag_list_t *d)
{
	memset(p, 0, sizeof(*p));
	const yt_node_t *r = doc->root;
	if (!yt_want_map(doc, r, "changer profile", d))
		return -1;
	bool ok = yt_check_keys(doc, r, top_keys, "changer profile", d);
	const yt_node_t *n;
	if (!(n = yt_get(r, "name"))) {
		yt_missing(doc, r, "name", "changer profile", d);
		ok = false;
	} else {
		ok &= yt_string(doc, n, "name", p->name, sizeof(p->name), d);
	}
	if (!(n = yt_get(r, "positions"))) {
		yt_missing(doc, r, "positions", "changer profile", d);
		ok = false;
	} else {
		ok &= yt_long(doc, n, "positions", 1, 1000, &p->positions, d);
	}
	ok &= cmdp_parse(doc, r, &spec, p, d);
	/* Without {lift} a status reply could not say whether the rack may turn
	 * (a pattern that is missing has its own error already). */
	const yt_node_t *rp = yt_get(r, "replies");
	if (p->moving[0] && !strstr(p->moving, "{lift}")) {
		yt_error(doc, yt_get(rp, "moving"), d, "replies.moving must contain {lift}");
		ok = false;
	}
	if (p->idle[0] && !strstr(p->idle, "{lift}")) {
		yt_error(doc, yt_get(rp, "idle"), d, "replies.idle must contain {lift}");
		ok = false;
	}
	return ok ? 0 : -1;
}

int changer_profile_load(const char *path, changer_profile_t *p, diag_list_t *d)
{
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	if (yt_load_file(path, &doc, d) != 0) {
		yt_free(&doc);
		return -1;
	}
	int rc = changer_profile_parse(&doc, p, d);
	yt_free(&doc);
	return rc;
}

changer_reply_kind_t changer_parse_reply(const changer_profile_t *p, const char *line,
                                         changer_reply_t *out)
{
	const char *pats[] = {p->error, p->busy, p->moving, p->idle, p->ok};
	cmdp_match_t m;
	int i = cmdp_classify(pats, 5, fields, line, &m);
	memset(out, 0, sizeof(*out));
	out->kind = (changer_reply_kind_t)i;
	out->position = m.field[0];
	out->lift = m.field[1];
	out->code = m.field[2];
	snprintf(out->text, sizeof(out->text), "%s", m.text);
	return out->kind;
}

/* ---- the driver ---- */

typedef struct changer {
	cmdp_line_t line; /* the serial link, its options and the profile's line ends */
	changer_profile_t prof;
	long positions;
	long rinse, park; /* positions of the rack; 0: none */
	bool fault;
} changer_t;

static const char *const own_keys[] = {"profile", "positions", "rinse", "park", NULL};

static int load_profile(const char *path, void *prof, diag_list_t *d)
{
	return changer_profile_load(path, prof, d);
}

static int ch_configure(const yt_doc_t *doc, const yt_node_t *cfg, void **priv, diag_list_t *d)
{
	const char *keys[32];
	if (!yt_want_map(doc, cfg, "changer", d))
		return -1;
	bool ok = yt_check_keys(doc, cfg, link_keys_join(link_serial_keys, own_keys, keys, 32),
	                        "changer", d);
	changer_t *c = calloc(1, sizeof(*c));
	if (!c)
		return -1;
	serial_init(&c->line.ser);
	c->line.who = "changer";
	c->line.command_end = c->prof.command_end;
	c->line.reply_end = c->prof.reply_end;
	ok &= link_serial_parse(doc, cfg, &c->line.link, d) == 0;
	ok &=
	    cmdp_profile_key(doc, cfg, "changer", "changer", "changers", load_profile, &c->prof, d);
	c->positions = c->prof.positions;
	const yt_node_t *n;
	/* A rack with fewer places than the mechanism can reach. */
	if (ok && (n = yt_get(cfg, "positions")))
		ok &= yt_long(doc, n, "positions", 1, c->prof.positions, &c->positions, d);
	/* Where the head is rinsed and where it waits between runs: places of
	 * the rack, which a station uses for a method's rinse and after a run. */
	if (ok && (n = yt_get(cfg, "rinse")))
		ok &= yt_long(doc, n, "rinse", 1, c->positions, &c->rinse, d);
	if (ok && (n = yt_get(cfg, "park")))
		ok &= yt_long(doc, n, "park", 1, c->positions, &c->park, d);
	if (ok && c->rinse && c->rinse == c->park) {
		yt_error(doc, yt_get(cfg, "park"), d,
		         "park: position %ld is the rinse position too", c->park);
		ok = false;
	}
	if (!ok) {
		free(c);
		return -1;
	}
	*priv = c;
	return 0;
}

static void ch_info(void *priv, drv_changer_info_t *out)
{
	changer_t *c = priv;
	out->positions = c->positions;
	out->has_rinse = c->prof.rinse[0] != '\0';
	out->has_waste = c->prof.waste[0] != '\0';
	out->rinse = c->rinse;
	out->park = c->park;
}

typedef struct accept {
	const changer_profile_t *prof;
	changer_reply_t *rep;
} accept_t;

static bool accept_reply(void *ctx, const char *line)
{
	accept_t *a = ctx;
	return changer_parse_reply(a->prof, line, a->rep) != CHANGER_REPLY_UNKNOWN;
}

static drv_status_t transact_once(changer_t *c, const char *cmd, changer_reply_t *rep,
                                  drv_err_t *err)
{
	memset(rep, 0, sizeof(*rep));
	accept_t a = {&c->prof, rep};
	return cmdp_transact_once(&c->line, cmd, accept_reply, &a, err);
}

static drv_status_t open_link(void *priv, drv_err_t *err);

/* With bounded retries: for commands that are safe to repeat. */
static drv_status_t transact(changer_t *c, const char *cmd, changer_reply_t *rep, drv_err_t *err)
{
	memset(rep, 0, sizeof(*rep));
	accept_t a = {&c->prof, rep};
	return cmdp_transact(&c->line, open_link, c, cmd, accept_reply, &a, err);
}

static drv_status_t expect_ok(changer_t *c, const char *what, const changer_reply_t *r,
                              drv_err_t *err)
{
	switch (r->kind) {
	case CHANGER_REPLY_OK:
		return DRV_OK;
	case CHANGER_REPLY_BUSY:
		return drv_fail(err, DRV_DEVICE_ERROR, "changer: busy, refused '%s'", what);
	case CHANGER_REPLY_ERROR:
		c->fault = true;
		return drv_fail(err, DRV_DEVICE_ERROR, "changer: error %ld on '%s': %s", r->code,
		                what, r->text[0] ? r->text : "(no text)");
	default:
		return drv_fail(err, DRV_BAD_REPLY, "changer: unexpected reply to '%s'", what);
	}
}

static drv_status_t expand(const char *tmpl, long position, double seconds_s, char *out, size_t cap,
                           drv_err_t *err)
{
	cmdp_arg_t a[] = {{"position", ""}, {"seconds", ""}, {"ms", ""}};
	snprintf(a[0].value, sizeof(a[0].value), "%ld", position);
	snprintf(a[1].value, sizeof(a[1].value), "%.1f", seconds_s);
	snprintf(a[2].value, sizeof(a[2].value), "%ld", lround(seconds_s * 1000.0));
	if (cmdp_expand(tmpl, a, 3, out, cap) < 0)
		return drv_fail(err, DRV_CONFIG, "changer: cannot expand '%s'", tmpl);
	return DRV_OK;
}

static drv_status_t simple_cmd(changer_t *c, const char *tmpl, long position, drv_err_t *err)
{
	char cmd[CMDP_STR * 2];
	drv_status_t st = expand(tmpl, position, 0, cmd, sizeof(cmd), err);
	if (st != DRV_OK)
		return st;
	changer_reply_t r;
	st = transact(c, cmd, &r, err);
	if (st != DRV_OK)
		return st;
	return expect_ok(c, cmd, &r, err);
}

static drv_status_t query(changer_t *c, drv_changer_status_t *out, drv_err_t *err)
{
	changer_reply_t r;
	memset(out, 0, sizeof(*out));
	drv_status_t st = transact(c, c->prof.status, &r, err);
	if (st != DRV_OK)
		return st;
	if (r.kind == CHANGER_REPLY_ERROR) {
		c->fault = true;
		out->fault = true;
		return drv_fail(err, DRV_DEVICE_ERROR, "changer: error %ld: %s", r.code,
		                r.text[0] ? r.text : "(no text)");
	}
	if (r.kind != CHANGER_REPLY_MOVING && r.kind != CHANGER_REPLY_IDLE)
		return drv_fail(err, DRV_BAD_REPLY, "changer: status reply without a position");
	if (r.position < 1 || r.position > c->prof.positions)
		return drv_fail(err, DRV_BAD_REPLY, "changer: position %ld outside 1..%ld",
		                r.position, c->prof.positions);
	c->fault = false; /* a plain status reply: the device reports no error now */
	out->position = r.position;
	out->lift = r.lift == 0 ? DRV_LIFT_UP : r.lift == 1 ? DRV_LIFT_DOWN : DRV_LIFT_BETWEEN;
	out->moving = r.kind == CHANGER_REPLY_MOVING;
	return DRV_OK;
}

/* As the pump's: the first line on every open of the line is the halt, so
 * whatever the changer was doing while nobody could reach it stops first. */
static drv_status_t open_link(void *priv, drv_err_t *err)
{
	changer_t *c = priv;
	changer_reply_t hr;
	accept_t ha = {&c->prof, &hr};
	drv_status_t st = cmdp_open_with_halt(&c->line, c->prof.halt, accept_reply, &ha, err);
	if (st == DRV_OK && c->prof.init[0]) {
		changer_reply_t r;
		st = transact_once(c, c->prof.init, &r, err);
		if (st == DRV_OK)
			st = expect_ok(c, c->prof.init, &r, err);
	}
	return st;
}

static drv_status_t ensure_open(changer_t *c, drv_err_t *err)
{
	return serial_is_open(&c->line.ser) ? DRV_OK : open_link(c, err);
}

static drv_status_t ch_open(void *priv, drv_err_t *err)
{
	changer_t *c = priv;
	drv_status_t st = open_link(c, err);
	if (st != DRV_OK)
		return st;
	drv_changer_status_t s;
	return query(c, &s, err);
}

static drv_status_t ch_move(void *priv, long position, drv_err_t *err)
{
	changer_t *c = priv;
	if (position < 1 || position > c->positions)
		return drv_fail(err, DRV_CONFIG, "changer: position %ld outside 1..%ld", position,
		                c->positions);
	drv_changer_status_t s;
	drv_status_t st = query(c, &s, err);
	if (st != DRV_OK)
		return st;
	if (s.moving)
		return drv_fail(err, DRV_CONFIG, "changer: still moving; move to %ld refused",
		                position);
	if (s.lift != DRV_LIFT_UP)
		return drv_fail(err, DRV_CONFIG,
		                "changer: the head is %s; raise it before moving to %ld",
		                drv_lift_name(s.lift), position);
	return simple_cmd(c, c->prof.move, position, err);
}

static drv_status_t ch_lift(void *priv, bool down, drv_err_t *err)
{
	changer_t *c = priv;
	if (down) {
		drv_changer_status_t s;
		drv_status_t st = query(c, &s, err);
		if (st != DRV_OK)
			return st;
		if (s.moving && s.lift == DRV_LIFT_UP)
			return drv_fail(err, DRV_CONFIG,
			                "changer: the rack is moving; lowering the head refused");
	}
	return simple_cmd(c, down ? c->prof.lift_down : c->prof.lift_up, 0, err);
}

static drv_status_t ch_pump(void *priv, drv_changer_pump_t which, double seconds_s, drv_err_t *err)
{
	changer_t *c = priv;
	const char *tmpl = which == DRV_CHANGER_RINSE ? c->prof.rinse : c->prof.waste;
	const char *what = which == DRV_CHANGER_RINSE ? "rinse" : "waste";
	if (!tmpl[0])
		return drv_fail(err, DRV_CONFIG, "changer: the profile has no %s pump", what);
	if (!(seconds_s > 0) || seconds_s > 3600)
		return drv_fail(err, DRV_CONFIG,
		                "changer: a %s pump run must be > 0 and at most 3600 s (got %g)",
		                what, seconds_s);
	char cmd[CMDP_STR * 2];
	drv_status_t st = expand(tmpl, 0, seconds_s, cmd, sizeof(cmd), err);
	if (st != DRV_OK)
		return st;
	if ((st = ensure_open(c, err)) != DRV_OK)
		return st;
	changer_reply_t r;
	st = transact_once(c, cmd, &r, err);
	if (st != DRV_OK)
		return st;
	return expect_ok(c, cmd, &r, err);
}

static drv_status_t ch_status(void *priv, drv_changer_status_t *out, drv_err_t *err)
{
	changer_t *c = priv;
	drv_status_t st = query(c, out, err);
	out->fault = c->fault;
	return st;
}

static drv_status_t ch_halt(void *priv, drv_err_t *err)
{
	changer_t *c = priv;
	drv_status_t st = simple_cmd(c, c->prof.halt, 0, err);
	if (st == DRV_OK)
		c->fault = false;
	return st;
}

static void ch_close(void *priv)
{
	changer_t *c = priv;
	if (!c)
		return;
	serial_close(&c->line.ser);
	free(c);
}

const drv_changer_ops_t drv_changer_serial = {
    .name = "changer-serial",
    .summary = "line-based ASCII sample changer on a serial port, described by a profile",
    .configure = ch_configure,
    .info = ch_info,
    .open = ch_open,
    .move = ch_move,
    .lift = ch_lift,
    .pump = ch_pump,
    .status = ch_status,
    .halt = ch_halt,
    .close = ch_close,
};
