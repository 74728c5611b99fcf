/* test_client.c: the client commands' pure helpers (token file, option
 * parsing, path escaping, number parsing). */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "client.h"
#include "harness.h"
#include "numparse.h"

static char *write_tmp(const char *text)
{
	static char path[64];
	snprintf(path, sizeof path, "/tmp/stopcock-test-token-%ld", (long)getpid());
	FILE *f = fopen(path, "w");
	if (!f)
		return NULL;
	fputs(text, f);
	fclose(f);
	return path;
}

TEST(client_read_token_lines)
{
	static const struct {
		const char *text, *token;
	} cases[] = {
	    {"lims:abc123\n", "abc123"},
	    {"# tokens for the bench\n\n  sim:3f9a:with-colon  \nother:x\n", "3f9a:with-colon"},
	    {"justthetoken\n", "justthetoken"},
	    {"qa:review,read:0123456789abcdef\n", "0123456789abcdef"},
	    {"name:   spaced\n", "spaced"},
	};
	for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
		char *path = write_tmp(cases[i].text), err[256] = "";
		REQUIRE(path);
		char *tok = client_read_token(path, err, sizeof err);
		CHECK_STR(tok, cases[i].token);
		free(tok);
		unlink(path);
	}
	char *path = write_tmp("# only a comment\n\nname:\n");
	REQUIRE(path);
	char err[512] = "";
	CHECK(client_read_token(path, err, sizeof err) == NULL);
	CHECK(strstr(err, "holds no name:token line") != NULL);
	unlink(path);
	CHECK(client_read_token("/nonexistent/token", err, sizeof err) == NULL);
	CHECK(strstr(err, "cannot read the token file /nonexistent/token") != NULL);
}

TEST(client_parse_options)
{
	const char *station = NULL, *timeout = NULL;
	bool csv = false;
	const client_arg_t args[] = {{"station", &station, NULL, "N  a station"},
	                             {"timeout", &timeout, NULL, "S  seconds"},
	                             {"csv", NULL, &csv, "   as CSV"},
	                             {NULL, NULL, NULL, NULL}};
	char a0[] = "show", a1[] = "12", a2[] = "--station=sim1", a3[] = "--csv", a4[] = "--url",
	     a5[] = "http://10.0.0.7:9000", a6[] = "--timeout", a7[] = "5";
	char *argv[] = {a0, a1, a2, a3, a4, a5, a6, a7, NULL};
	client_t c;
	client_init(&c, "show");
	int pos = -1;
	CHECK_INT(client_parse(&c, 8, argv, "show RUN", args, &pos), -1);
	CHECK_STR(station, "sim1");
	CHECK_STR(timeout, "5");
	CHECK(csv);
	CHECK_STR(c.url, "http://10.0.0.7:9000");
	/* GNU getopt moves the positional argument after the options. */
	REQUIRE(pos >= 1 && pos < 8);
	CHECK_STR(argv[pos], "12");
	CHECK_INT(pos, 7);
	client_free(&c);

	/* An unknown option and a missing value are usage errors (exit 2). */
	char b0[] = "halt", b1[] = "--stattion", b2[] = "sim1";
	char *bad[] = {b0, b1, b2, NULL};
	client_init(&c, "halt");
	CHECK_INT(client_parse(&c, 3, bad, "halt --station N", args, &pos), CLIENT_EXIT_USAGE);
	char d0[] = "halt", d1[] = "--station";
	char *missing[] = {d0, d1, NULL};
	CHECK_INT(client_parse(&c, 2, missing, "halt --station N", args, &pos), CLIENT_EXIT_USAGE);
	client_free(&c);
}

TEST(client_defaults_from_environment)
{
	setenv("STOPCOCK_URL", "http://192.168.1.20:8470", 1);
	setenv("STOPCOCK_TOKEN_FILE", "/etc/stopcock/token", 1);
	client_t c;
	client_init(&c, "status");
	CHECK_STR(c.url, "http://192.168.1.20:8470");
	CHECK_STR(c.token_file, "/etc/stopcock/token");
	client_free(&c);
	unsetenv("STOPCOCK_URL");
	unsetenv("STOPCOCK_TOKEN_FILE");
	client_init(&c, "status");
	CHECK_STR(c.url, CLIENT_DEFAULT_URL);
	CHECK_STR(c.token_file, "");
	client_free(&c);
}

TEST(client_escape_and_numbers)
{
	char out[64];
	client_escape_segment("sim1", out, sizeof out);
	CHECK_STR(out, "sim1");
	client_escape_segment("bench 2/a?b", out, sizeof out);
	CHECK_STR(out, "bench%202%2Fa%3Fb");
	client_escape_segment("abcdef", out, 5); /* truncates, stays terminated */
	CHECK(strlen(out) < 5);

	long long id = 0;
	CHECK(client_parse_id("12", &id) && id == 12);
	CHECK(!client_parse_id("0", &id));
	CHECK(!client_parse_id("-3", &id));
	CHECK(!client_parse_id("12a", &id));
	CHECK(!client_parse_id("", &id));
	CHECK(!client_parse_id("99999999999999999999", &id));
	double v = 0;
	CHECK(parse_decimal("10", &v) && v == 10.0);
	CHECK(parse_decimal("0.25", &v) && v == 0.25);
	CHECK(!parse_decimal("ten", &v));
	CHECK(!parse_decimal("1e999", &v));
	CHECK(!parse_decimal("nan", &v));
	CHECK(!parse_decimal("", &v));
	/* Decimal only: hex floats, spaces and infinities are not a lab number. */
	CHECK(!parse_decimal("0x1p3", &v));
	CHECK(!parse_decimal(" 1", &v));
	CHECK(!parse_decimal("inf", &v));

	char b[32];
	CHECK_STR(client_fmt(b, sizeof b, 5.36, 2), "5.36");
	CHECK_STR(client_fmt(b, sizeof b, 5.36, -1), "5.36");
	CHECK_STR(client_fmt(b, sizeof b, 8.0, 4), "8.0000");
	CHECK_STR(client_fmt(b, sizeof b, NAN, 2), "-");
	CHECK_STR(client_fmt(b, sizeof b, -0.00004, 1), "0.0");
	CHECK_STR(client_fmt(b, sizeof b, -0.06, 1), "-0.1");
}
