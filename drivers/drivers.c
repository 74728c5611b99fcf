/* drivers.c: the one table of drivers, lookup by the `driver:` word, and the
 * thin handle wrappers of drv.h. To add a driver: write drivers/<dev>_<wire>.c
 * exporting one const ops struct, declare it here and list it below. */
#include <stdarg.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "drv.h"

extern const drv_burette_ops_t drv_pump_serial;
extern const drv_probe_ops_t drv_probe_modbus;
extern const drv_stirrer_ops_t drv_stirrer_modbus;
extern const drv_changer_ops_t drv_changer_serial;
extern const drv_balance_ops_t drv_balance_serial;

static const drv_burette_ops_t *const burettes[] = {&drv_pump_serial, NULL};
static const drv_probe_ops_t *const probes[] = {&drv_probe_modbus, NULL};
static const drv_stirrer_ops_t *const stirrers[] = {&drv_stirrer_modbus, NULL};
static const drv_changer_ops_t *const changers[] = {&drv_changer_serial, NULL};
static const drv_balance_ops_t *const balances[] = {&drv_balance_serial, NULL};

const char *drv_status_name(drv_status_t s)
{
	switch (s) {
	case DRV_OK:
		return "ok";
	case DRV_TIMEOUT:
		return "timeout";
	case DRV_BAD_REPLY:
		return "bad_reply";
	case DRV_DEVICE_ERROR:
		return "device_error";
	case DRV_UNPLUGGED:
		return "unplugged";
	case DRV_CONFIG:
		return "config";
	}
	return "unknown";
}

drv_status_t drv_fail(drv_err_t *err, drv_status_t st, const char *fmt, ...)
{
	if (err) {
		va_list ap;
		va_start(ap, fmt);
		vsnprintf(err->msg, sizeof(err->msg), fmt, ap);
		va_end(ap);
	}
	return st;
}

const drv_probe_ops_t *const *drv_probe_table(void)
{
	return probes;
}

const drv_burette_ops_t *const *drv_burette_table(void)
{
	return burettes;
}

const drv_stirrer_ops_t *const *drv_stirrer_table(void)
{
	return stirrers;
}

const drv_changer_ops_t *const *drv_changer_table(void)
{
	return changers;
}

const drv_balance_ops_t *const *drv_balance_table(void)
{
	return balances;
}

const drv_balance_ops_t *drv_find_balance(const char *name)
{
	for (size_t i = 0; balances[i]; i++)
		if (!strcmp(balances[i]->name, name))
			return balances[i];
	return NULL;
}

static const char *balance_name(size_t i)
{
	return balances[i] ? balances[i]->name : NULL;
}

const drv_probe_ops_t *drv_find_probe(const char *name)
{
	for (size_t i = 0; probes[i]; i++)
		if (!strcmp(probes[i]->name, name))
			return probes[i];
	return NULL;
}

const drv_burette_ops_t *drv_find_burette(const char *name)
{
	for (size_t i = 0; burettes[i]; i++)
		if (!strcmp(burettes[i]->name, name))
			return burettes[i];
	return NULL;
}

const drv_stirrer_ops_t *drv_find_stirrer(const char *name)
{
	for (size_t i = 0; stirrers[i]; i++)
		if (!strcmp(stirrers[i]->name, name))
			return stirrers[i];
	return NULL;
}

const drv_changer_ops_t *drv_find_changer(const char *name)
{
	for (size_t i = 0; changers[i]; i++)
		if (!strcmp(changers[i]->name, name))
			return changers[i];
	return NULL;
}

static const char *changer_name(size_t i)
{
	return changers[i] ? changers[i]->name : NULL;
}

static const char *burette_name(size_t i)
{
	return burettes[i] ? burettes[i]->name : NULL;
}

static const char *probe_name(size_t i)
{
	return probes[i] ? probes[i]->name : NULL;
}

static const char *stirrer_name(size_t i)
{
	return stirrers[i] ? stirrers[i]->name : NULL;
}

/* Read `driver:` and return the index of that driver in its kind's table
 * (`name_at(i)` is entry i's name, NULL past the end); on an unknown name
 * list the known ones. -1 with the error added. */
static int driver_index(const yt_doc_t *doc, const yt_node_t *cfg, const char *what,
                        const char *(*name_at)(size_t), diag_list_t *d)
{
	char out[64];
	if (!yt_want_map(doc, cfg, what, d))
		return -1;
	const yt_node_t *n = yt_get(cfg, "driver");
	if (!n) {
		yt_missing(doc, cfg, "driver", what, d);
		return -1;
	}
	if (!yt_string(doc, n, "driver", out, sizeof(out), d))
		return -1;
	for (size_t i = 0; name_at(i); i++)
		if (!strcmp(name_at(i), out))
			return (int)i;
	char known[256] = "";
	for (size_t i = 0; name_at(i); i++) {
		size_t l = strlen(known);
		snprintf(known + l, sizeof(known) - l, "%s%s", i ? ", " : "", name_at(i));
	}
	yt_error(doc, n, d, "unknown %s driver '%s' (known: %s)", what, out, known);
	return -1;
}

int drv_probe_configure(const yt_doc_t *doc, const yt_node_t *cfg, drv_probe_t *out, diag_list_t *d)
{
	void *priv = NULL;
	int i;
	memset(out, 0, sizeof(*out));
	i = driver_index(doc, cfg, "probe", probe_name, d);
	if (i < 0 || probes[i]->configure(doc, cfg, &priv, d) != 0)
		return -1;
	out->ops = probes[i];
	out->priv = priv;
	return 0;
}

int drv_burette_configure(const yt_doc_t *doc, const yt_node_t *cfg, drv_burette_t *out,
                          diag_list_t *d)
{
	void *priv = NULL;
	int i;
	memset(out, 0, sizeof(*out));
	i = driver_index(doc, cfg, "burette", burette_name, d);
	if (i < 0 || burettes[i]->configure(doc, cfg, &priv, d) != 0)
		return -1;
	out->ops = burettes[i];
	out->priv = priv;
	return 0;
}

int drv_stirrer_configure(const yt_doc_t *doc, const yt_node_t *cfg, drv_stirrer_t *out,
                          diag_list_t *d)
{
	void *priv = NULL;
	int i;
	memset(out, 0, sizeof(*out));
	i = driver_index(doc, cfg, "stirrer", stirrer_name, d);
	if (i < 0 || stirrers[i]->configure(doc, cfg, &priv, d) != 0)
		return -1;
	out->ops = stirrers[i];
	out->priv = priv;
	return 0;
}

int drv_changer_configure(const yt_doc_t *doc, const yt_node_t *cfg, drv_changer_t *out,
                          diag_list_t *d)
{
	void *priv = NULL;
	int i;
	memset(out, 0, sizeof(*out));
	i = driver_index(doc, cfg, "changer", changer_name, d);
	if (i < 0 || changers[i]->configure(doc, cfg, &priv, d) != 0)
		return -1;
	out->ops = changers[i];
	out->priv = priv;
	return 0;
}

int drv_balance_configure(const yt_doc_t *doc, const yt_node_t *cfg, drv_balance_t *out,
                          diag_list_t *d)
{
	void *priv = NULL;
	int i;
	memset(out, 0, sizeof(*out));
	i = driver_index(doc, cfg, "balance", balance_name, d);
	if (i < 0 || balances[i]->configure(doc, cfg, &priv, d) != 0)
		return -1;
	out->ops = balances[i];
	out->priv = priv;
	return 0;
}

static drv_status_t not_configured(drv_err_t *err)
{
	return drv_fail(err, DRV_CONFIG, "device not configured");
}

drv_status_t drv_probe_open(drv_probe_t *p, drv_err_t *err)
{
	return p->ops ? p->ops->open(p->priv, err) : not_configured(err);
}

drv_status_t drv_probe_read(drv_probe_t *p, drv_reading_t *out, drv_err_t *err)
{
	return p->ops ? p->ops->read(p->priv, out, err) : not_configured(err);
}

void drv_probe_close(drv_probe_t *p)
{
	if (p->ops)
		p->ops->close(p->priv);
	memset(p, 0, sizeof(*p));
}

void drv_burette_info(const drv_burette_t *b, drv_burette_info_t *out)
{
	memset(out, 0, sizeof(*out));
	if (b->ops)
		b->ops->info(b->priv, out);
}

drv_status_t drv_burette_open(drv_burette_t *b, drv_err_t *err)
{
	return b->ops ? b->ops->open(b->priv, err) : not_configured(err);
}

drv_status_t drv_burette_dose(drv_burette_t *b, double volume_ml, drv_err_t *err)
{
	return b->ops ? b->ops->dose(b->priv, volume_ml, err) : not_configured(err);
}

drv_status_t drv_burette_status(drv_burette_t *b, drv_burette_status_t *out, drv_err_t *err)
{
	return b->ops ? b->ops->status(b->priv, out, err) : not_configured(err);
}

drv_status_t drv_burette_halt(drv_burette_t *b, drv_err_t *err)
{
	return b->ops ? b->ops->halt(b->priv, err) : not_configured(err);
}

drv_status_t drv_burette_refill(drv_burette_t *b, drv_err_t *err)
{
	return b->ops ? b->ops->refill(b->priv, err) : not_configured(err);
}

void drv_burette_close(drv_burette_t *b)
{
	if (b->ops)
		b->ops->close(b->priv);
	memset(b, 0, sizeof(*b));
}

drv_status_t drv_stirrer_open(drv_stirrer_t *s, drv_err_t *err)
{
	return s->ops ? s->ops->open(s->priv, err) : not_configured(err);
}

drv_status_t drv_stirrer_set(drv_stirrer_t *s, bool on, double rpm, drv_err_t *err)
{
	return s->ops ? s->ops->set(s->priv, on, rpm, err) : not_configured(err);
}

void drv_stirrer_close(drv_stirrer_t *s)
{
	if (s->ops)
		s->ops->close(s->priv);
	memset(s, 0, sizeof(*s));
}

const char *drv_lift_name(drv_lift_t l)
{
	switch (l) {
	case DRV_LIFT_UP:
		return "up";
	case DRV_LIFT_DOWN:
		return "down";
	case DRV_LIFT_BETWEEN:
		return "between";
	}
	return "between";
}

void drv_changer_info(const drv_changer_t *c, drv_changer_info_t *out)
{
	memset(out, 0, sizeof(*out));
	if (c->ops)
		c->ops->info(c->priv, out);
}

drv_status_t drv_changer_open(drv_changer_t *c, drv_err_t *err)
{
	return c->ops ? c->ops->open(c->priv, err) : not_configured(err);
}

drv_status_t drv_changer_move(drv_changer_t *c, long position, drv_err_t *err)
{
	return c->ops ? c->ops->move(c->priv, position, err) : not_configured(err);
}

drv_status_t drv_changer_lift(drv_changer_t *c, bool down, drv_err_t *err)
{
	return c->ops ? c->ops->lift(c->priv, down, err) : not_configured(err);
}

drv_status_t drv_changer_pump(drv_changer_t *c, drv_changer_pump_t which, double seconds_s,
                              drv_err_t *err)
{
	return c->ops ? c->ops->pump(c->priv, which, seconds_s, err) : not_configured(err);
}

drv_status_t drv_changer_status(drv_changer_t *c, drv_changer_status_t *out, drv_err_t *err)
{
	return c->ops ? c->ops->status(c->priv, out, err) : not_configured(err);
}

drv_status_t drv_changer_halt(drv_changer_t *c, drv_err_t *err)
{
	return c->ops ? c->ops->halt(c->priv, err) : not_configured(err);
}

void drv_changer_close(drv_changer_t *c)
{
	if (c->ops)
		c->ops->close(c->priv);
	memset(c, 0, sizeof(*c));
}

drv_status_t drv_balance_open(drv_balance_t *b, drv_err_t *err)
{
	return b->ops ? b->ops->open(b->priv, err) : not_configured(err);
}

drv_status_t drv_balance_weigh(drv_balance_t *b, drv_weight_t *out, drv_err_t *err)
{
	memset(out, 0, sizeof(*out));
	return b->ops ? b->ops->weigh(b->priv, out, err) : not_configured(err);
}

void drv_balance_close(drv_balance_t *b)
{
	if (b->ops)
		b->ops->close(b->priv);
	memset(b, 0, sizeof(*b));
}
