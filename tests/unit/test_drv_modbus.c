/* Modbus register decoding with explicit word order, and the register-map
 * schema. 0x41480000 is IEEE 754 binary32 for 12.5 (IEEE 754-2019, §3.4).
 * The word order is a register map's setting (docs/drivers.md), decoded
 * here explicitly rather than by libmodbus's float helpers. */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "harness.h"
#include "mbus.h"
#include "yamltree.h"

TEST(drv_modbus_decode_table)
{
	static const struct {
		uint16_t r[2];
		mbus_type_t t;
		mbus_order_t o;
		double want;
	} rows[] = {
	    {{0x4148, 0x0000}, MBUS_FLOAT32, MBUS_BIG, 12.5},
	    {{0x0000, 0x4148}, MBUS_FLOAT32, MBUS_LITTLE, 12.5},
	    {{0xc148, 0x0000}, MBUS_FLOAT32, MBUS_BIG, -12.5},
	    {{0x3f80, 0x0000}, MBUS_FLOAT32, MBUS_BIG, 1.0},
	    {{0x0000, 0x0000}, MBUS_FLOAT32, MBUS_BIG, 0.0},
	    {{0xffff, 0}, MBUS_INT16, MBUS_BIG, -1},
	    {{0x8000, 0}, MBUS_INT16, MBUS_BIG, -32768},
	    {{0xffff, 0}, MBUS_UINT16, MBUS_BIG, 65535},
	    {{0x0001, 0x0002}, MBUS_INT32, MBUS_BIG, 65538},
	    {{0x0002, 0x0001}, MBUS_INT32, MBUS_LITTLE, 65538},
	    {{0xffff, 0xfffe}, MBUS_INT32, MBUS_BIG, -2},
	    {{0xfffe, 0xffff}, MBUS_INT32, MBUS_LITTLE, -2},
	    {{0xffff, 0xffff}, MBUS_UINT32, MBUS_BIG, 4294967295.0},
	};
	for (size_t i = 0; i < sizeof(rows) / sizeof(rows[0]); i++) {
		double v = NAN;
		CHECK(mbus_decode(rows[i].r, rows[i].t, rows[i].o, &v) == 0);
		CHECK_NEAR(v, rows[i].want, 0);
	}
	uint16_t nan_regs[2] = {0x7fc0, 0x0000}, inf_regs[2] = {0x7f80, 0x0000};
	double v;
	CHECK(mbus_decode(nan_regs, MBUS_FLOAT32, MBUS_BIG, &v) == -1);
	CHECK(mbus_decode(inf_regs, MBUS_FLOAT32, MBUS_BIG, &v) == -1);
	CHECK_INT(mbus_type_words(MBUS_INT16), 1);
	CHECK_INT(mbus_type_words(MBUS_FLOAT32), 2);
}

static int parse_reg(const char *text, bool mask, mbus_reg_t *r, char **msg)
{
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	diag_list_t d = DIAG_LIST_INIT;
	int rc = yt_load_buffer("map.yaml", text, strlen(text), &doc, &d);
	if (rc == 0)
		rc = mbus_reg_parse(&doc, doc.root, "registers.mv", mask, r, &d);
	*msg = diag_join(&d);
	diag_free(&d);
	yt_free(&doc);
	return rc;
}

TEST(drv_modbus_register_map)
{
	mbus_reg_t r;
	char *msg;
	CHECK(parse_reg("{table: holding, address: 9, type: int32, word_order: little, "
	                "scale: 0.001, offset: -1.5}",
	                false, &r, &msg) == 0);
	free(msg);
	CHECK(r.present);
	CHECK(r.table == MBUS_HOLDING);
	CHECK_INT(r.address, 9);
	CHECK(r.type == MBUS_INT32);
	CHECK(r.word_order == MBUS_LITTLE);
	CHECK_NEAR(r.scale, 0.001, 0);
	CHECK_NEAR(r.offset, -1.5, 0);
	/* defaults: input table, big word order, scale 1, offset 0 */
	CHECK(parse_reg("{address: 0, type: float32}", false, &r, &msg) == 0);
	free(msg);
	CHECK(r.table == MBUS_INPUT && r.word_order == MBUS_BIG && r.scale == 1.0);
	/* errors carry file:line:col */
	CHECK(parse_reg("{address: 0, type: float64}", false, &r, &msg) != 0);
	CHECK(msg && strstr(msg, "map.yaml:1:") && strstr(msg, "float64"));
	free(msg);
	CHECK(parse_reg("{address: 65535, type: float32}", false, &r, &msg) != 0);
	CHECK(msg && strstr(msg, "past address 65535"));
	free(msg);
	CHECK(parse_reg("{address: 0, type: uint16, error_mask: 1}", false, &r, &msg) != 0);
	free(msg); /* error_mask only on the status word */
	CHECK(parse_reg("{address: 0, type: uint16, error_mask: 1}", true, &r, &msg) == 0);
	free(msg);
	CHECK_INT(r.error_mask, 1);
}
