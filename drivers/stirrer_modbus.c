/* stirrer_modbus.c: a stirrer switched by a Modbus coil and/or a speed
 * holding register (0 = off when there is no coil). */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "drv.h"
#include "link.h"
#include "mbus.h"

typedef struct stirrer {
	mbus_t mb;
	long coil;           /* -1: none */
	long speed_register; /* -1: none */
	double rpm;          /* default speed */
	double rpm_scale;    /* register value = rpm * rpm_scale */
} stirrer_t;

static const char *const own_keys[] = {"coil", "speed_register", "rpm", "rpm_scale", NULL};

static int stirrer_configure(const yt_doc_t *doc, const yt_node_t *cfg, void **priv, diag_list_t *d)
{
	const char *keys[32];
	if (!yt_want_map(doc, cfg, "stirrer", d))
		return -1;
	bool ok = yt_check_keys(doc, cfg, link_keys_join(link_modbus_keys, own_keys, keys, 32),
	                        "stirrer", d);
	stirrer_t *s = calloc(1, sizeof(*s));
	if (!s)
		return -1;
	link_modbus_t link;
	ok &= link_modbus_parse(doc, cfg, &link, d) == 0;
	mbus_init(&s->mb, &link, "stirrer");
	s->coil = -1;
	s->speed_register = -1;
	s->rpm = 300;
	s->rpm_scale = 1.0;
	const yt_node_t *n;
	if ((n = yt_get(cfg, "coil")))
		ok &= yt_long(doc, n, "coil", 0, 65535, &s->coil, d);
	if ((n = yt_get(cfg, "speed_register")))
		ok &= yt_long(doc, n, "speed_register", 0, 65535, &s->speed_register, d);
	if ((n = yt_get(cfg, "rpm")))
		ok &= yt_double_range(doc, n, "rpm", "rpm", 0, 10000, &s->rpm, d);
	if ((n = yt_get(cfg, "rpm_scale")))
		ok &= yt_double_range(doc, n, "rpm_scale", NULL, 1e-6, 1e6, &s->rpm_scale, d);
	if (ok && s->coil < 0 && s->speed_register < 0) {
		yt_error(doc, cfg, d, "stirrer: give 'coil', 'speed_register' or both");
		ok = false;
	}
	if (!ok) {
		free(s);
		return -1;
	}
	*priv = s;
	return 0;
}

static drv_status_t stirrer_open(void *priv, drv_err_t *err)
{
	stirrer_t *s = priv;
	return mbus_connect(&s->mb, err);
}

static drv_status_t stirrer_set(void *priv, bool on, double rpm, drv_err_t *err)
{
	stirrer_t *s = priv;
	if (!(rpm > 0) || !isfinite(rpm))
		rpm = s->rpm;
	drv_status_t st = DRV_OK;
	if (s->speed_register >= 0) {
		double v = (on ? rpm : 0) * s->rpm_scale;
		if (v > 65535)
			return drv_fail(err, DRV_CONFIG, "stirrer: %g rpm does not fit a register",
			                rpm);
		st = mbus_write_register(&s->mb, (int)s->speed_register, (uint16_t)lround(v), err);
		if (st != DRV_OK)
			return st;
	}
	if (s->coil >= 0)
		st = mbus_write_coil(&s->mb, (int)s->coil, on, err);
	return st;
}

static void stirrer_close(void *priv)
{
	stirrer_t *s = priv;
	if (!s)
		return;
	mbus_close(&s->mb);
	free(s);
}

const drv_stirrer_ops_t drv_stirrer_modbus = {
    .name = "stirrer-modbus",
    .summary = "stirrer on a Modbus coil and/or speed register",
    .configure = stirrer_configure,
    .open = stirrer_open,
    .set = stirrer_set,
    .close = stirrer_close,
};
