/* Unit tests for the shared toolbox in daemon/lib: clock, RFC 3339 times,
 * the text buffer, number parsing and the id rule. Expected epoch values are
 * from the POSIX "Seconds Since the Epoch" formula (IEEE Std 1003.1, XBD 4.16),
 * worked by hand for the dates below. */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "clock.h"
#include "harness.h"
#include "names.h"
#include "numparse.h"
#include "text.h"
#include "sbuf.h"
#include "timefmt.h"

TEST(lib_clock_monotonic_advances)
{
	double a = clock_mono_s();
	clock_sleep_s(0.01);
	double b = clock_mono_s();
	CHECK(b - a >= 0.009);
	/* Wall time is after 2020-01-01 (1577836800) on any machine running this. */
	CHECK(clock_wall_s() > 1577836800.0);
}

TEST(lib_time_format_edges)
{
	char out[TIME_RFC3339_SIZE];
	CHECK(time_format_rfc3339(0, out));
	CHECK_STR(out, "1970-01-01T00:00:00.000Z");
	/* 2000-03-01 is day 11017 after the epoch: 11017 * 86400 = 951868800. */
	CHECK(time_format_rfc3339(951868800.123, out));
	CHECK_STR(out, "2000-03-01T00:00:00.123Z");
	/* 999.9996 ms truncates, never rounds into the next second. */
	CHECK(time_format_rfc3339(951868800.9996, out));
	CHECK_STR(out, "2000-03-01T00:00:00.999Z");
	CHECK(!time_format_rfc3339(NAN, out));
	CHECK_STR(out, "");
	CHECK(!time_format_rfc3339(-1, out));
	CHECK(!time_format_rfc3339(1e13, out)); /* past year 9999 */
}

TEST(lib_time_parse_round_trip_and_refusals)
{
	double t = 0;
	CHECK(time_parse_rfc3339("2000-03-01T00:00:00.123Z", &t));
	CHECK_NEAR(t, 951868800.123, 1e-6);
	CHECK(time_parse_rfc3339("2000-03-01T01:00:00+01:00", &t));
	CHECK_NEAR(t, 951868800.0, 1e-9);
	char out[TIME_RFC3339_SIZE];
	for (double v = 1.7e9; v < 1.7e9 + 5e6; v += 123456.789) {
		double back = 0;
		REQUIRE(time_format_rfc3339(v, out));
		REQUIRE(time_parse_rfc3339(out, &back));
		CHECK(fabs(back - v) < 1e-3);
	}
	double keep = 42;
	CHECK(!time_parse_rfc3339("2026-02-30T00:00:00Z", &keep)); /* no such day */
	CHECK(!time_parse_rfc3339("2026-13-01T00:00:00Z", &keep));
	CHECK(!time_parse_rfc3339("2026-01-01T00:00:00", &keep)); /* no zone */
	CHECK(!time_parse_rfc3339("2026-01-01T00:00:00Zjunk", &keep));
	CHECK(!time_parse_rfc3339("2026-01-01 00:00:00Z", &keep));
	CHECK(!time_parse_rfc3339("", &keep));
	CHECK(!time_parse_rfc3339(NULL, &keep));
	CHECK(keep == 42);
}

TEST(lib_sbuf_builds_and_hands_over)
{
	sbuf_t b = SBUF_INIT;
	CHECK_STR(sbuf_str(&b), "");
	sbuf_add(&b, "pH ");
	sbuf_addf(&b, "%.2f", 8.2);
	sbuf_addc(&b, '!');
	for (int i = 0; i < 1000; i++)
		sbuf_add(&b, "0123456789");
	size_t len = 0;
	char *s = sbuf_finish(&b, &len);
	REQUIRE(s);
	CHECK_INT(len, 8 + 10000);
	CHECK(strncmp(s, "pH 8.20!0123", 12) == 0);
	CHECK(b.p == NULL && b.len == 0);
	free(s);

	sbuf_t e = SBUF_INIT;
	char *empty = sbuf_finish(&e, NULL);
	REQUIRE(empty);
	CHECK_STR(empty, "");
	free(empty);
}

TEST(lib_sbuf_remembers_out_of_memory)
{
	sbuf_t b = SBUF_INIT;
	sbuf_add(&b, "start");
	/* An append that cannot be sized is an out-of-memory: the text is
	 * incomplete and must never be handed over as if whole. */
	sbuf_addn(&b, "x", (size_t)-1 / 2);
	CHECK(b.oom);
	sbuf_add(&b, "more");
	CHECK(sbuf_finish(&b, NULL) == NULL);
}

TEST(lib_parse_decimal_is_strict)
{
	double v = 0;
	CHECK(parse_decimal("8.20", &v) && v == 8.2);
	CHECK(parse_decimal("-.5", &v) && v == -0.5);
	CHECK(parse_decimal("1e-3", &v) && v == 1e-3);
	CHECK(parse_decimal("+7", &v) && v == 7);
	v = 99;
	CHECK(!parse_decimal("0x1p3", &v));
	CHECK(!parse_decimal("inf", &v));
	CHECK(!parse_decimal("nan", &v));
	CHECK(!parse_decimal(" 1", &v));
	CHECK(!parse_decimal("1 ", &v));
	CHECK(!parse_decimal("1e", &v));
	CHECK(!parse_decimal(".", &v));
	CHECK(!parse_decimal("", &v));
	CHECK(!parse_decimal("1e999", &v));
	CHECK(!parse_decimal("25mL", &v));
	CHECK(v == 99);
}

TEST(lib_parse_whole_range)
{
	long long v = 0;
	CHECK(parse_whole("42", 0, 100, &v) && v == 42);
	CHECK(parse_whole("-3", -5, 5, &v) && v == -3);
	CHECK(!parse_whole("101", 0, 100, &v));
	CHECK(!parse_whole("0x10", 0, 100, &v));
	CHECK(!parse_whole("1.0", 0, 100, &v));
	CHECK(!parse_whole("99999999999999999999", 0, 1LL << 62, &v));
	CHECK(!parse_whole("", 0, 100, &v));
}

TEST(lib_name_is_id)
{
	CHECK(name_is_id("cider-acidity", 0));
	CHECK(name_is_id("sim1", 5));
	CHECK(!name_is_id("sim12", 5)); /* 5 chars need 6 bytes with the NUL */
	CHECK(!name_is_id("", 0));
	CHECK(!name_is_id("Cider", 0));
	CHECK(!name_is_id("a_b", 0));
	CHECK(!name_is_id("a/b", 0));
	CHECK(!name_is_id(NULL, 0));
}

/* Control characters: C0 but tab, DEL, C1 (text.h). */
TEST(lib_text_control_characters)
{
	CHECK(text_control_at("BATCH-7", 7, false) == TEXT_NONE);
	CHECK(text_control_at("a\tb", 3, false) == TEXT_NONE);
	CHECK_INT((int)text_control_at("a\nb", 3, false), 1);
	CHECK(text_control_at("a\nb", 3, true) == TEXT_NONE);
	CHECK_INT((int)text_control_at("ok\x1b[2J", 6, false), 2);
	CHECK_INT((int)text_control_at("x\x7f", 2, false), 1);
	CHECK_INT((int)text_control_at("x\xc2\x9b", 3, false), 1);        /* U+009B, the C1 CSI */
	CHECK(text_control_at("Bl\xc3\xa4ttler", 9, false) == TEXT_NONE); /* ä is text */
	char *e = text_escaped("ok\x1b[2J\nFAKE \xc2\x9b \xff");
	REQUIRE(e);
	CHECK_STR(e, "ok\\x1B[2J\\x0AFAKE \\u009B \\xFF");
	free(e);
	e = text_escaped("G\xc3\xa4rtnerei");
	REQUIRE(e);
	CHECK_STR(e, "G\xc3\xa4rtnerei");
	free(e);
}

/* UTF-8: well-formed per RFC 3629, and cuts on character boundaries. */
TEST(lib_text_utf8)
{
	CHECK(text_utf8_valid("abc", 3));
	CHECK(text_utf8_valid("\xc3\xa4\xe2\x82\xac\xf0\x9f\x8d\x8e", 9)); /* ä € 🍎 */
	CHECK(!text_utf8_valid("\xe4", 1));                                /* Latin-1 ä */
	CHECK(!text_utf8_valid("\xc0\xaf", 2));                            /* overlong '/' */
	CHECK(!text_utf8_valid("\xed\xa0\x80", 3));                        /* a surrogate */
	CHECK(!text_utf8_valid("\xe2\x82", 2));                            /* cut short */
	/* "ä€" is 2 + 3 bytes: a cut at 4 keeps "ä" only. */
	CHECK_INT((int)text_utf8_cut("\xc3\xa4\xe2\x82\xac", 4), 2);
	CHECK_INT((int)text_utf8_cut("\xc3\xa4\xe2\x82\xac", 5), 5);
	CHECK_INT((int)text_utf8_cut("abc", 2), 2);
}
