/* mbus.c: Modbus connection with recovery, and the register decoder (mbus.h). */
#include <errno.h>
#include <math.h>
#include <string.h>
#include <time.h>

#include <modbus.h>

#include "mbus.h"

int mbus_type_words(mbus_type_t t)
{
	return (t == MBUS_INT16 || t == MBUS_UINT16) ? 1 : 2;
}

int mbus_decode(const uint16_t *regs, mbus_type_t t, mbus_order_t o, double *out)
{
	if (t == MBUS_INT16) {
		*out = (double)(int16_t)regs[0];
		return 0;
	}
	if (t == MBUS_UINT16) {
		*out = (double)regs[0];
		return 0;
	}
	uint32_t hi = o == MBUS_BIG ? regs[0] : regs[1];
	uint32_t lo = o == MBUS_BIG ? regs[1] : regs[0];
	uint32_t u = (hi << 16) | lo;
	switch (t) {
	case MBUS_INT32:
		*out = (double)(int32_t)u;
		return 0;
	case MBUS_UINT32:
		*out = (double)u;
		return 0;
	case MBUS_FLOAT32: {
		float f;
		memcpy(&f, &u, sizeof(f)); /* IEEE 754 binary32, host order = value order */
		if (!isfinite(f))
			return -1;
		*out = (double)f;
		return 0;
	}
	default:
		return -1;
	}
}

static const char *const table_words[] = {"input", "holding", NULL};
static const char *const type_words[] = {"int16", "uint16", "int32", "uint32", "float32", NULL};
static const char *const order_words[] = {"big", "little", NULL};
static const char *const reg_keys[] = {"table", "address", "type", "word_order",
                                       "scale", "offset",  NULL};
static const char *const reg_keys_mask[] = {"table", "address", "type",       "word_order",
                                            "scale", "offset",  "error_mask", NULL};

int mbus_reg_parse(const yt_doc_t *doc, const yt_node_t *n, const char *key, bool allow_mask,
                   mbus_reg_t *out, diag_list_t *d)
{
	memset(out, 0, sizeof(*out));
	out->scale = 1.0;
	out->error_mask = 0xffff;
	if (!yt_want_map(doc, n, key, d))
		return -1;
	bool ok = yt_check_keys(doc, n, allow_mask ? reg_keys_mask : reg_keys, key, d);
	const yt_node_t *v;
	int i;
	if ((v = yt_get(n, "table"))) {
		if (yt_enum(doc, v, "table", table_words, &i, d))
			out->table = (mbus_table_t)i;
		else
			ok = false;
	}
	if (!(v = yt_get(n, "address"))) {
		yt_missing(doc, n, "address", key, d);
		ok = false;
	} else {
		ok &= yt_long(doc, v, "address", 0, 65535, &out->address, d);
	}
	if (!(v = yt_get(n, "type"))) {
		yt_missing(doc, n, "type", key, d);
		ok = false;
	} else if (yt_enum(doc, v, "type", type_words, &i, d)) {
		out->type = (mbus_type_t)i;
	} else {
		ok = false;
	}
	if ((v = yt_get(n, "word_order"))) {
		if (yt_enum(doc, v, "word_order", order_words, &i, d))
			out->word_order = (mbus_order_t)i;
		else
			ok = false;
	}
	if ((v = yt_get(n, "scale")))
		ok &= yt_double(doc, v, "scale", NULL, &out->scale, d);
	if ((v = yt_get(n, "offset")))
		ok &= yt_double(doc, v, "offset", NULL, &out->offset, d);
	if ((v = yt_get(n, "error_mask")))
		ok &= yt_long(doc, v, "error_mask", 0, 0xffffffffL, &out->error_mask, d);
	if (ok && out->address + mbus_type_words(out->type) > 65536) {
		yt_error(doc, n, d, "%s: register %ld+%d runs past address 65535", key,
		         out->address, mbus_type_words(out->type));
		ok = false;
	}
	out->present = ok;
	return ok ? 0 : -1;
}

void mbus_init(mbus_t *m, const link_modbus_t *link, const char *who)
{
	memset(m, 0, sizeof(*m));
	m->link = *link;
	m->who = who;
}

void mbus_close(mbus_t *m)
{
	if (m->ctx) {
		modbus_close(m->ctx);
		modbus_free(m->ctx);
	}
	m->ctx = NULL;
}

static void set_timeout(modbus_t *ctx, long ms)
{
	modbus_set_response_timeout(ctx, (uint32_t)(ms / 1000), (uint32_t)(ms % 1000) * 1000);
}

drv_status_t mbus_connect(mbus_t *m, drv_err_t *err)
{
	mbus_close(m);
	const link_modbus_t *l = &m->link;
	modbus_t *ctx;
	if (l->transport == LINK_TCP)
		ctx = modbus_new_tcp(l->host, (int)l->tcp_port);
	else
		ctx = modbus_new_rtu(l->device, (int)l->baud, l->parity, 8, l->stop_bits);
	if (!ctx)
		return drv_fail(err, DRV_CONFIG, "%s: cannot set up Modbus: %s", m->who,
		                modbus_strerror(errno));
	modbus_set_error_recovery(ctx, MODBUS_ERROR_RECOVERY_NONE);
	set_timeout(ctx, l->response_timeout_ms);
	if (modbus_set_slave(ctx, (int)l->unit) != 0) {
		modbus_free(ctx);
		return drv_fail(err, DRV_CONFIG, "%s: bad unit %ld", m->who, l->unit);
	}
	if (modbus_connect(ctx) != 0) {
		int e = errno;
		modbus_free(ctx);
		if (l->transport == LINK_TCP)
			return drv_fail(err, DRV_UNPLUGGED, "%s: cannot connect to %s:%ld: %s",
			                m->who, l->host, l->tcp_port, modbus_strerror(e));
		return drv_fail(err, DRV_UNPLUGGED, "%s: cannot open %s: %s", m->who, l->device,
		                modbus_strerror(e));
	}
	if (l->transport == LINK_RTU && l->rs485 &&
	    modbus_rtu_set_serial_mode(ctx, MODBUS_RTU_RS485) != 0) {
		int e = errno;
		modbus_close(ctx);
		modbus_free(ctx);
		return drv_fail(err, DRV_CONFIG, "%s: %s cannot switch to RS-485: %s", m->who,
		                l->device, modbus_strerror(e));
	}
	m->ctx = ctx;
	return DRV_OK;
}

static void sleep_ms(long ms)
{
	struct timespec ts = {ms / 1000, (ms % 1000) * 1000000L};
	while (nanosleep(&ts, &ts) != 0 && errno == EINTR)
		;
}

/* Classify a failed call and recover the link for the next one. */
static drv_status_t failed(mbus_t *m, int e, const char *what, drv_err_t *err)
{
	if (e > MODBUS_ENOBASE && e <= EMBXGTAR)
		return drv_fail(err, DRV_DEVICE_ERROR, "%s: %s answered exception: %s", m->who,
		                what, modbus_strerror(e));
	if (e == ETIMEDOUT || e == EMBBADDATA || e == EMBBADCRC || e == EMBBADSLAVE ||
	    e == EMBBADEXC || e == EMBUNKEXC || e == EMBMDATA) {
		/* a late reply may still arrive: wait it out, then drop it */
		sleep_ms(m->link.response_timeout_ms);
		if (m->ctx)
			modbus_flush(m->ctx);
		if (m->link.transport == LINK_TCP)
			mbus_close(m); /* reconnect on the next attempt */
		if (e == ETIMEDOUT)
			return drv_fail(err, DRV_TIMEOUT, "%s: no reply to %s within %ld ms",
			                m->who, what, m->link.response_timeout_ms);
		return drv_fail(err, DRV_BAD_REPLY, "%s: bad reply to %s: %s", m->who, what,
		                modbus_strerror(e));
	}
	mbus_close(m);
	return drv_fail(err, DRV_UNPLUGGED, "%s: link lost during %s: %s", m->who, what,
	                modbus_strerror(e));
}

typedef enum { OP_READ_IN, OP_READ_HOLD, OP_COIL, OP_REG } op_t;

static drv_status_t run(mbus_t *m, op_t op, int addr, int n, uint16_t *dst, int value,
                        drv_err_t *err)
{
	drv_status_t st = DRV_OK;
	const char *what = op == OP_READ_IN     ? "read input registers"
	                   : op == OP_READ_HOLD ? "read holding registers"
	                   : op == OP_COIL      ? "write coil"
	                                        : "write register";
	for (long i = 0; i <= m->link.retries; i++) {
		if (!m->ctx) {
			st = mbus_connect(m, err);
			if (st != DRV_OK)
				return st;
		}
		int rc, want = op == OP_READ_IN || op == OP_READ_HOLD ? n : 1;
		errno = 0;
		switch (op) {
		case OP_READ_IN:
			rc = modbus_read_input_registers(m->ctx, addr, n, dst);
			break;
		case OP_READ_HOLD:
			rc = modbus_read_registers(m->ctx, addr, n, dst);
			break;
		case OP_COIL:
			rc = modbus_write_bit(m->ctx, addr, value);
			break;
		default:
			rc = modbus_write_register(m->ctx, addr, (uint16_t)value);
			break;
		}
		if (rc == want)
			return DRV_OK;
		int e = rc < 0 ? errno : EMBMDATA;
		st = failed(m, e, what, err);
		if (st == DRV_DEVICE_ERROR || st == DRV_CONFIG)
			return st;
	}
	return st;
}

drv_status_t mbus_read(mbus_t *m, mbus_table_t t, int addr, int n, uint16_t *dst, drv_err_t *err)
{
	return run(m, t == MBUS_INPUT ? OP_READ_IN : OP_READ_HOLD, addr, n, dst, 0, err);
}

drv_status_t mbus_write_coil(mbus_t *m, int addr, bool on, drv_err_t *err)
{
	return run(m, OP_COIL, addr, 1, NULL, on ? 1 : 0, err);
}

drv_status_t mbus_write_register(mbus_t *m, int addr, uint16_t value, drv_err_t *err)
{
	return run(m, OP_REG, addr, 1, NULL, value, err);
}
