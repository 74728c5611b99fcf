/* probe_modbus.c: pH/mV transmitter on Modbus RTU or TCP, with a register
 * map in the station config (mv required; temperature_c, ph, status and
 * counter optional). Registers of one table are read in one request when
 * they lie within 125 words of each other. */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "drv.h"
#include "link.h"
#include "mbus.h"
#include "clock.h"

enum { R_MV = 0, R_TEMP, R_PH, R_STATUS, R_COUNTER, R_N };
static const char *const reg_names[R_N] = {"mv", "temperature_c", "ph", "status", "counter"};

typedef struct probe {
	mbus_t mb;
	mbus_reg_t reg[R_N];
	double frozen_after_s; /* counter unchanged this long = frozen transmitter */
	bool have_counter;
	double counter;
	double counter_changed_s;
} probe_t;

static const char *const own_keys[] = {"registers", "frozen_after_s", NULL};

static int probe_configure(const yt_doc_t *doc, const yt_node_t *cfg, void **priv, diag_list_t *d)
{
	const char *keys[32];
	if (!yt_want_map(doc, cfg, "probe", d))
		return -1;
	bool ok = yt_check_keys(doc, cfg, link_keys_join(link_modbus_keys, own_keys, keys, 32),
	                        "probe", d);
	probe_t *p = calloc(1, sizeof(*p));
	if (!p)
		return -1;
	link_modbus_t link;
	ok &= link_modbus_parse(doc, cfg, &link, d) == 0;
	mbus_init(&p->mb, &link, "probe");
	p->frozen_after_s = 10.0;
	const yt_node_t *n;
	if ((n = yt_get(cfg, "frozen_after_s")))
		ok &= yt_double_range(doc, n, "frozen_after_s", "s", 0.1, 3600, &p->frozen_after_s,
		                      d);
	const yt_node_t *regs = yt_get(cfg, "registers");
	if (!regs) {
		yt_missing(doc, cfg, "registers", "probe", d);
		ok = false;
	} else if (!yt_want_map(doc, regs, "registers", d)) {
		ok = false;
	} else {
		static const char *const rk[] = {"mv",     "temperature_c", "ph",
		                                 "status", "counter",       NULL};
		ok &= yt_check_keys(doc, regs, rk, "registers", d);
		for (int i = 0; i < R_N; i++) {
			char where[48];
			snprintf(where, sizeof(where), "registers.%s", reg_names[i]);
			if ((n = yt_get(regs, reg_names[i])))
				ok &= mbus_reg_parse(doc, n, where, i == R_STATUS, &p->reg[i], d) ==
				      0;
		}
		if (!yt_get(regs, "mv")) {
			yt_missing(doc, regs, "mv", "registers", d);
			ok = false;
		}
	}
	if (!ok) {
		free(p);
		return -1;
	}
	*priv = p;
	return 0;
}

static drv_status_t probe_open(void *priv, drv_err_t *err)
{
	probe_t *p = priv;
	return mbus_connect(&p->mb, err);
}

/* Read every mapped register of one table, in one request when possible. */
static drv_status_t read_table(probe_t *p, mbus_table_t t, uint16_t raw[R_N][2], drv_err_t *err)
{
	long lo = 65536, hi = -1;
	for (int i = 0; i < R_N; i++) {
		const mbus_reg_t *r = &p->reg[i];
		if (!r->present || r->table != t)
			continue;
		if (r->address < lo)
			lo = r->address;
		long end = r->address + mbus_type_words(r->type) - 1;
		if (end > hi)
			hi = end;
	}
	if (hi < 0)
		return DRV_OK;
	if (hi - lo + 1 <= 125) {
		uint16_t buf[125];
		drv_status_t st = mbus_read(&p->mb, t, (int)lo, (int)(hi - lo + 1), buf, err);
		if (st != DRV_OK)
			return st;
		for (int i = 0; i < R_N; i++) {
			const mbus_reg_t *r = &p->reg[i];
			if (!r->present || r->table != t)
				continue;
			raw[i][0] = buf[r->address - lo];
			if (mbus_type_words(r->type) == 2)
				raw[i][1] = buf[r->address - lo + 1];
		}
		return DRV_OK;
	}
	for (int i = 0; i < R_N; i++) {
		const mbus_reg_t *r = &p->reg[i];
		if (!r->present || r->table != t)
			continue;
		drv_status_t st =
		    mbus_read(&p->mb, t, (int)r->address, mbus_type_words(r->type), raw[i], err);
		if (st != DRV_OK)
			return st;
	}
	return DRV_OK;
}

static drv_status_t probe_read(void *priv, drv_reading_t *out, drv_err_t *err)
{
	probe_t *p = priv;
	uint16_t raw[R_N][2] = {{0}};
	drv_status_t st = read_table(p, MBUS_INPUT, raw, err);
	if (st == DRV_OK)
		st = read_table(p, MBUS_HOLDING, raw, err);
	if (st != DRV_OK)
		return st;
	double now = clock_mono_s();
	double v[R_N] = {0};
	for (int i = 0; i < R_N; i++) {
		const mbus_reg_t *r = &p->reg[i];
		if (!r->present)
			continue;
		if (mbus_decode(raw[i], r->type, r->word_order, &v[i]) != 0)
			return drv_fail(err, DRV_BAD_REPLY,
			                "probe: %s register %ld holds NaN or "
			                "infinity",
			                reg_names[i], r->address);
		if (i != R_STATUS && i != R_COUNTER)
			v[i] = v[i] * r->scale + r->offset;
	}
	if (p->reg[R_STATUS].present) {
		unsigned long bits =
		    (unsigned long)v[R_STATUS] & (unsigned long)p->reg[R_STATUS].error_mask;
		if (bits)
			return drv_fail(err, DRV_DEVICE_ERROR,
			                "probe: transmitter status 0x%04lx "
			                "reports an error",
			                (unsigned long)v[R_STATUS]);
	}
	bool repeated = false;
	if (p->reg[R_COUNTER].present) {
		repeated = p->have_counter && v[R_COUNTER] == p->counter;
		if (!p->have_counter || v[R_COUNTER] != p->counter) {
			p->have_counter = true;
			p->counter = v[R_COUNTER];
			p->counter_changed_s = now;
		} else if (now - p->counter_changed_s > p->frozen_after_s) {
			return drv_fail(err, DRV_DEVICE_ERROR,
			                "probe: reading frozen (measurement counter %.0f unchanged "
			                "for %.1f s)",
			                p->counter, now - p->counter_changed_s);
		}
	}
	memset(out, 0, sizeof(*out));
	out->mv = v[R_MV];
	out->has_temperature = p->reg[R_TEMP].present;
	out->temperature_c = v[R_TEMP];
	out->has_ph = p->reg[R_PH].present;
	out->ph = v[R_PH];
	out->t_s = now;
	out->repeated = repeated;
	if (out->has_temperature && (out->temperature_c < -50 || out->temperature_c > 200))
		return drv_fail(err, DRV_BAD_REPLY, "probe: temperature %.1f degC out of range",
		                out->temperature_c);
	if (fabs(out->mv) > 5000)
		return drv_fail(err, DRV_BAD_REPLY, "probe: %.1f mV out of range", out->mv);
	return DRV_OK;
}

static void probe_close(void *priv)
{
	probe_t *p = priv;
	if (!p)
		return;
	mbus_close(&p->mb);
	free(p);
}

const drv_probe_ops_t drv_probe_modbus = {
    .name = "probe-modbus",
    .summary = "pH/mV transmitter on Modbus RTU or TCP with a register map",
    .configure = probe_configure,
    .open = probe_open,
    .read = probe_read,
    .close = probe_close,
};
