/* Pump profile and reply parser, from tables of frames (good, short,
 * corrupt, leading garbage), and the serial line framer. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "harness.h"
#include "pump_profile.h"
#include "serial.h"
#include "yamltree.h"

static int load_sim(pump_profile_t *p)
{
	diag_list_t d = DIAG_LIST_INIT;
	int rc = pump_profile_load("config/pumps/sim.yaml", p, &d);
	if (rc)
		diag_print(&d, stderr);
	diag_free(&d);
	return rc;
}

TEST(drv_pump_profiles_load)
{
	pump_profile_t p;
	REQUIRE(load_sim(&p) == 0);
	CHECK_STR(p.name, "sim");
	CHECK_STR(p.command_end, "\n");
	CHECK_STR(p.reply_end, "\r\n");
	CHECK_INT(p.steps, 20000);
	CHECK_NEAR(p.capacity_ml, 10.0, 1e-12);
	CHECK_STR(p.dose, "DOSE {steps} {speed}");
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(pump_profile_load("config/pumps/generic-ascii.yaml", &p, &d) == 0);
	CHECK_STR(p.command_end, "\r");
	CHECK_STR(p.init, "HOME");
	diag_free(&d);
}

static int parse_text(const char *text, pump_profile_t *p, char **msg)
{
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	diag_list_t d = DIAG_LIST_INIT;
	int rc = yt_load_buffer("bad.yaml", text, strlen(text), &doc, &d);
	if (rc == 0)
		rc = pump_profile_parse(&doc, p, &d);
	*msg = diag_join(&d);
	diag_free(&d);
	yt_free(&doc);
	return rc;
}

TEST(drv_pump_profile_errors)
{
	pump_profile_t p;
	char *msg = NULL;
	/* unknown placeholder in a command, reply without {position}, typo'd key */
	const char *bad = "name: x\ncommand_end: \"\\r\"\nreply_end: \"\\r\"\nsteps: 100\n"
	                  "capacity_ml: 1.0\ncommands:\n  dose: \"D{stepz}\"\n  fill: F\n"
	                  "  halt: H\n  status: Q\nreplies:\n  ok: OK\n  error: \"E{code}\"\n"
	                  "  moving: M\n  idle: \"I{position}\"\n  bsy: B\n";
	CHECK(parse_text(bad, &p, &msg) != 0);
	REQUIRE(msg != NULL);
	CHECK(strstr(msg, "bad.yaml:7:") != NULL); /* the dose template's line */
	CHECK(strstr(msg, "unknown placeholder") != NULL);
	CHECK(strstr(msg, "replies.moving must contain {position}") != NULL);
	CHECK(strstr(msg, "bsy") != NULL);
	free(msg);
}

TEST(drv_pump_expand)
{
	pump_args_t a = {.steps = 1000, .volume_ml = 0.5, .speed = 333, .position = 19000};
	char out[64];
	CHECK(pump_expand("DOSE {steps} {speed}", &a, out, sizeof(out)) > 0);
	CHECK_STR(out, "DOSE 1000 333");
	CHECK(pump_expand("PUSH {volume_ul} TO {position}", &a, out, sizeof(out)) > 0);
	CHECK_STR(out, "PUSH 500.0 TO 19000");
	CHECK(pump_expand("V{volume_ml}", &a, out, sizeof(out)) > 0);
	CHECK_STR(out, "V0.5000");
	CHECK(pump_expand("X{nope}", &a, out, sizeof(out)) < 0);
	CHECK(pump_expand("X{steps", &a, out, sizeof(out)) < 0);
	CHECK(pump_expand("DOSE {steps}", &a, out, 6) < 0); /* does not fit */
}

TEST(drv_pump_reply_table)
{
	pump_profile_t p;
	REQUIRE(load_sim(&p) == 0);
	static const struct {
		const char *line;
		pump_reply_kind_t kind;
		long position, code;
	} rows[] = {
	    /* good frames */
	    {"OK", PUMP_REPLY_OK, 0, 0},
	    {"BUSY", PUMP_REPLY_BUSY, 0, 0},
	    {"AT 20000 IDLE", PUMP_REPLY_IDLE, 20000, 0},
	    {"AT 0 MOVING", PUMP_REPLY_MOVING, 0, 0},
	    {"AT  1234   IDLE  ", PUMP_REPLY_IDLE, 1234, 0}, /* extra blanks */
	    {"ERR 5 motor stall", PUMP_REPLY_ERROR, 0, 5},
	    /* leading garbage: control bytes, high bytes, punctuation */
	    {"\x01\x1b#~OK", PUMP_REPLY_OK, 0, 0},
	    {"\xfe\xff%AT 777 MOVING", PUMP_REPLY_MOVING, 777, 0},
	    {"!?ERR 2 syringe holds only 5 steps", PUMP_REPLY_ERROR, 0, 2},
	    {"\x80\x9c\x7f", PUMP_REPLY_UNKNOWN, 0, 0}, /* garbage only */
	    /* short frames */
	    {"", PUMP_REPLY_UNKNOWN, 0, 0},
	    {"O", PUMP_REPLY_UNKNOWN, 0, 0},
	    {"AT 12", PUMP_REPLY_UNKNOWN, 0, 0},
	    {"AT IDLE", PUMP_REPLY_UNKNOWN, 0, 0},
	    {"ERR", PUMP_REPLY_UNKNOWN, 0, 0},
	    /* corrupt frames */
	    {"AT 12x4 IDLE", PUMP_REPLY_UNKNOWN, 0, 0},
	    {"AT 100 IDLEX", PUMP_REPLY_UNKNOWN, 0, 0},
	    {"OKAY", PUMP_REPLY_UNKNOWN, 0, 0},
	    {"AT 99999999999999999999999 IDLE", PUMP_REPLY_UNKNOWN, 0, 0}, /* overflow */
	};
	for (size_t i = 0; i < sizeof(rows) / sizeof(rows[0]); i++) {
		pump_reply_t r;
		pump_reply_kind_t k = pump_parse_reply(&p, rows[i].line, &r);
		if (k != rows[i].kind)
			harness_fail(__FILE__, __LINE__, "row %zu \"%s\": kind %d, wanted %d", i,
			             rows[i].line, k, rows[i].kind);
		if (k == PUMP_REPLY_IDLE || k == PUMP_REPLY_MOVING)
			CHECK_INT(r.position, rows[i].position);
		if (k == PUMP_REPLY_ERROR)
			CHECK_INT(r.code, rows[i].code);
	}
	pump_reply_t r;
	CHECK(pump_parse_reply(&p, "ERR 5 motor stall", &r) == PUMP_REPLY_ERROR);
	CHECK_STR(r.text, "motor stall");
}

TEST(drv_serial_framer_table)
{
	static const struct {
		const char *buf;
		const char *term;
		long line_len;
		size_t consumed;
	} rows[] = {
	    {"OK\r\n", "\r\n", 2, 4},   {"OK\r\nAT 1 IDLE\r\n", "\r\n", 2, 4}, /* first of two */
	    {"OK\r", "\r\n", -1, 0}, /* short: terminator split */
	    {"OK", "\r\n", -1, 0},      {"", "\r\n", -1, 0},
	    {"\r\n", "\r\n", 0, 2}, /* empty line */
	    {"A\rB\r\n", "\r\n", 3, 5}, {"ACK\r", "\r", 3, 4},
	    {"x\ny", "\n", 1, 2},
	};
	for (size_t i = 0; i < sizeof(rows) / sizeof(rows[0]); i++) {
		size_t used = 0;
		long ll = serial_find_line(rows[i].buf, strlen(rows[i].buf), rows[i].term, &used);
		CHECK_INT(ll, rows[i].line_len);
		if (ll >= 0)
			CHECK_INT(used, rows[i].consumed);
	}
	size_t used;
	CHECK(serial_find_line("abc", 3, "", &used) == -1); /* no empty terminator */
}
