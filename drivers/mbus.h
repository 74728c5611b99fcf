/* mbus.h: what the Modbus drivers share: a libmodbus connection with bounded
 * retries and stale-reply recovery, and the pure register decoder.
 *
 * libmodbus 3.1.6 can hand back a stale reply after a timeout (RTU has no
 * transaction id; TCP then stays one reply behind), so after ETIMEDOUT,
 * EMBBADDATA or EMBBADCRC we sleep one response timeout, flush, and on TCP
 * reconnect. Its float helpers disagree in this build, so values are decoded
 * here with an explicit word order.
 */
#ifndef STOPCOCK_MBUS_H
#define STOPCOCK_MBUS_H

#include <stdbool.h>
#include <stdint.h>

#include "drv.h"
#include "link.h"

typedef enum { MBUS_INPUT = 0, MBUS_HOLDING } mbus_table_t;
typedef enum { MBUS_INT16 = 0, MBUS_UINT16, MBUS_INT32, MBUS_UINT32, MBUS_FLOAT32 } mbus_type_t;
typedef enum { MBUS_BIG = 0, MBUS_LITTLE } mbus_order_t; /* word order of 32-bit values */

/* One entry of a register map. */
typedef struct mbus_reg {
	bool present;
	mbus_table_t table;
	long address;
	mbus_type_t type;
	mbus_order_t word_order;
	double scale; /* value = raw * scale + offset */
	double offset;
	long error_mask; /* status word only: bits that mean a device error */
} mbus_reg_t;

/* Registers a type occupies: 1 or 2. */
int mbus_type_words(mbus_type_t t);

/* Decode raw registers (each as received: high byte first) into a number,
 * before scale and offset. Pure. Returns 0, or -1 for a float that is NaN or
 * infinite. */
int mbus_decode(const uint16_t *regs, mbus_type_t t, mbus_order_t o, double *out);

/* Parse one register-map entry {table, address, type, word_order, scale,
 * offset[, error_mask]}. `key` names it in messages. Returns 0 or -1. */
int mbus_reg_parse(const yt_doc_t *doc, const yt_node_t *n, const char *key, bool allow_mask,
                   mbus_reg_t *out, diag_list_t *d);

typedef struct mbus {
	link_modbus_t link;
	void *ctx;       /* modbus_t *, NULL when closed */
	const char *who; /* message prefix: "probe", "stirrer" */
} mbus_t;

void mbus_init(mbus_t *m, const link_modbus_t *link, const char *who);
drv_status_t mbus_connect(mbus_t *m, drv_err_t *err);
void mbus_close(mbus_t *m);

/* Read n registers (n <= 125) with bounded retries and recovery. */
drv_status_t mbus_read(mbus_t *m, mbus_table_t t, int addr, int n, uint16_t *dst, drv_err_t *err);
drv_status_t mbus_write_coil(mbus_t *m, int addr, bool on, drv_err_t *err);
drv_status_t mbus_write_register(mbus_t *m, int addr, uint16_t value, drv_err_t *err);

#endif
