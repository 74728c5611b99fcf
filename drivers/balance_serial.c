/* balance_serial.c: balance driver for line-based ASCII balances, driven by
 * a profile (balance_profile.h) over the serial transport.
 *
 * A weight is the amount a result is computed from, so only a reply the
 * balance marks stable, in a unit we know, is a weight: a settling pan is
 * asked again until stable_timeout_ms, and garbage or silence end in a clear
 * error, never in a number. Asking for a weight moves nothing, so every
 * command may be repeated after a lost reply.
 */
#include <ctype.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "balance_profile.h"
#include "clock.h"
#include "drv.h"
#include "link.h"
#include "numparse.h"
#include "serial.h"

/* ---- the profile ---- */

static const char *const top_keys[] = {"name",     "description", "command_end", "reply_end",
                                       "commands", "replies",     NULL};

static const cmdp_entry_t commands[] = {{"weigh", true, offsetof(balance_profile_t, weigh), NULL},
                                        {NULL, false, 0, NULL}};
static const char *const placeholders[] = {NULL};
/* In the order they are tried, as balance_reply_kind_t. */
static const cmdp_entry_t replies[] = {
    {"error", true, offsetof(balance_profile_t, error), NULL},
    {"unstable", true, offsetof(balance_profile_t, unstable), NULL},
    {"stable", true, offsetof(balance_profile_t, stable), NULL},
    {NULL, false, 0, NULL}};
static const char *const fields[] = {"code", NULL};
static const cmdp_spec_t spec = {"balance profile",
                                 commands,
                                 placeholders,
                                 replies,
                                 fields,
                                 offsetof(balance_profile_t, command_end),
                                 offsetof(balance_profile_t, reply_end)};

int balance_profile_parse(const yt_doc_t *doc, balance_profile_t *p, diag_list_t *d)
{
	memset(p, 0, sizeof(*p));
	const yt_node_t *r = doc->root;
	if (!yt_want_map(doc, r, "balance profile", d))
		return -1;
	bool ok = yt_check_keys(doc, r, top_keys, "balance profile", d);
	const yt_node_t *n;
	if (!(n = yt_get(r, "name"))) {
		yt_missing(doc, r, "name", "balance profile", d);
		ok = false;
	} else {
		ok &= yt_string(doc, n, "name", p->name, sizeof(p->name), d);
	}
	ok &= cmdp_parse(doc, r, &spec, p, d);
	/* The weight is the {text} of the stable reply: without it there is none. */
	if (p->stable[0] && !strstr(p->stable, "{text}")) {
		yt_error(doc, yt_get(yt_get(r, "replies"), "stable"), d,
		         "replies.stable must end in {text} (the value and its unit)");
		ok = false;
	}
	return ok ? 0 : -1;
}

int balance_profile_load(const char *path, balance_profile_t *p, diag_list_t *d)
{
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	if (yt_load_file(path, &doc, d) != 0) {
		yt_free(&doc);
		return -1;
	}
	int rc = balance_profile_parse(&doc, p, d);
	yt_free(&doc);
	return rc;
}

/* "  +10.0120 g" -> 10.012, "g". The units a balance reports a sample in. */
static bool parse_weight(const char *text, double *value, char *unit, size_t cap)
{
	char buf[CMDP_STR];
	snprintf(buf, sizeof(buf), "%s", text);
	size_t n = strlen(buf);
	while (n > 0 && isspace((unsigned char)buf[n - 1]))
		buf[--n] = '\0';
	char *sp = strrchr(buf, ' ');
	if (!sp)
		return false;
	*sp = '\0';
	const char *u = sp + 1, *num = buf;
	while (*num == ' ')
		num++;
	if (*num == '+')
		num++;
	if (strcmp(u, "g") != 0 && strcmp(u, "mg") != 0 && strcmp(u, "kg") != 0)
		return false;
	if (!parse_decimal(num, value))
		return false;
	snprintf(unit, cap, "%s", u);
	return true;
}

balance_reply_kind_t balance_parse_reply(const balance_profile_t *p, const char *line,
                                         balance_reply_t *out)
{
	const char *pats[] = {p->error, p->unstable, p->stable};
	cmdp_match_t m;
	int i = cmdp_classify(pats, 3, fields, line, &m);
	memset(out, 0, sizeof(*out));
	out->kind = (balance_reply_kind_t)i;
	out->code = m.field[0];
	snprintf(out->text, sizeof(out->text), "%s", m.text);
	if (out->kind == BALANCE_REPLY_STABLE &&
	    !parse_weight(m.text, &out->value, out->unit, sizeof(out->unit)))
		out->kind = BALANCE_REPLY_UNKNOWN;
	return out->kind;
}

/* ---- the driver ---- */

#define BALANCE_ASK_AGAIN_S 0.1 /* between questions to a settling pan, s */

typedef struct balance {
	cmdp_line_t line; /* the serial link, its options and the profile's line ends */
	balance_profile_t prof;
	long stable_timeout_ms; /* how long a pan may take to settle */
} balance_t;

static const char *const own_keys[] = {"profile", "stable_timeout_ms", NULL};

static int load_profile(const char *path, void *prof, diag_list_t *d)
{
	return balance_profile_load(path, prof, d);
}

static int bal_configure(const yt_doc_t *doc, const yt_node_t *cfg, void **priv, diag_list_t *d)
{
	const char *keys[32];
	if (!yt_want_map(doc, cfg, "balance", d))
		return -1;
	bool ok = yt_check_keys(doc, cfg, link_keys_join(link_serial_keys, own_keys, keys, 32),
	                        "balance", d);
	balance_t *b = calloc(1, sizeof(*b));
	if (!b)
		return -1;
	serial_init(&b->line.ser);
	b->line.who = "balance";
	b->line.command_end = b->prof.command_end;
	b->line.reply_end = b->prof.reply_end;
	b->stable_timeout_ms = 10000;
	ok &= link_serial_parse(doc, cfg, &b->line.link, d) == 0;
	ok &=
	    cmdp_profile_key(doc, cfg, "balance", "balance", "balances", load_profile, &b->prof, d);
	const yt_node_t *n = yt_get(cfg, "stable_timeout_ms");
	if (n)
		ok &= yt_long(doc, n, "stable_timeout_ms", 100, 600000, &b->stable_timeout_ms, d);
	if (!ok) {
		free(b);
		return -1;
	}
	*priv = b;
	return 0;
}

static drv_status_t open_link(void *priv, drv_err_t *err)
{
	balance_t *b = priv;
	return serial_open(&b->line.ser, &b->line.link, err);
}

static drv_status_t bal_open(void *priv, drv_err_t *err)
{
	balance_t *b = priv;
	return serial_is_open(&b->line.ser) ? DRV_OK : open_link(b, err);
}

typedef struct accept {
	const balance_profile_t *prof;
	balance_reply_t *rep;
} accept_t;

static bool accept_reply(void *ctx, const char *line)
{
	accept_t *a = ctx;
	return balance_parse_reply(a->prof, line, a->rep) != BALANCE_REPLY_UNKNOWN;
}

static drv_status_t bal_weigh(void *priv, drv_weight_t *out, drv_err_t *err)
{
	balance_t *b = priv;
	double deadline = clock_mono_s() + (double)b->stable_timeout_ms / 1000.0;
	for (;;) {
		balance_reply_t r;
		memset(&r, 0, sizeof(r));
		accept_t a = {&b->prof, &r};
		drv_status_t st =
		    cmdp_transact(&b->line, open_link, b, b->prof.weigh, accept_reply, &a, err);
		if (st != DRV_OK)
			return st;
		if (r.kind == BALANCE_REPLY_ERROR)
			return drv_fail(err, DRV_DEVICE_ERROR, "balance: error %ld: %s", r.code,
			                r.text[0] ? r.text : "(no text)");
		if (r.kind == BALANCE_REPLY_STABLE) {
			out->value = r.value;
			snprintf(out->unit, sizeof(out->unit), "%s", r.unit);
			return DRV_OK;
		}
		if (clock_mono_s() + BALANCE_ASK_AGAIN_S > deadline)
			return drv_fail(err, DRV_TIMEOUT,
			                "balance: the pan did not settle within %ld ms "
			                "(no stable weight)",
			                b->stable_timeout_ms);
		clock_sleep_s(BALANCE_ASK_AGAIN_S);
	}
}

static void bal_close(void *priv)
{
	balance_t *b = priv;
	if (!b)
		return;
	serial_close(&b->line.ser);
	free(b);
}

const drv_balance_ops_t drv_balance_serial = {
    .name = "balance-serial",
    .summary = "line-based ASCII balance on a serial port, described by a profile",
    .configure = bal_configure,
    .open = bal_open,
    .weigh = bal_weigh,
    .close = bal_close,
};
