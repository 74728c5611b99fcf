/* test_svg.c: the curve renderer gives well-formed, escaped SVG for any input. */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "harness.h"
#include "svg.h"

/* A small XML well-formedness check, enough for what svg_curve writes:
 * balanced and properly nested elements, quoted attributes, only the five
 * predefined entities or numeric references, no raw '<' or '&' in text.
 * Returns NULL when good, or a static description of the first problem. */
static const char *xml_problem(const char *s)
{
	const char *stack[64];
	size_t stack_len[64];
	int depth = 0, roots = 0;
	const char *p = s;
	if (!strncmp(p, "<?xml", 5)) {
		p = strstr(p, "?>");
		if (!p)
			return "unterminated XML declaration";
		p += 2;
	}
	while (*p) {
		if (*p == '&') {
			static const char *const ents[] = {"&amp;", "&lt;", "&gt;", "&quot;",
			                                   "&apos;"};
			size_t k = 0;
			for (; k < 5; k++)
				if (!strncmp(p, ents[k], strlen(ents[k])))
					break;
			if (k == 5 && strncmp(p, "&#", 2))
				return "bad entity";
			p = strchr(p, ';');
			if (!p)
				return "unterminated entity";
			p++;
			continue;
		}
		if (*p != '<') {
			if (depth == 0 && *p != '\n' && *p != ' ')
				return "text outside the root element";
			if ((unsigned char)*p < 0x20 && *p != '\n' && *p != '\t')
				return "control character";
			p++;
			continue;
		}
		if (p[1] == '/') {
			const char *name = p + 2;
			size_t len = strcspn(name, " >");
			if (depth == 0 || len != stack_len[depth - 1] ||
			    strncmp(name, stack[depth - 1], len))
				return "mismatched end tag";
			depth--;
			p = strchr(p, '>');
			if (!p)
				return "unterminated end tag";
			p++;
			continue;
		}
		const char *name = p + 1;
		size_t len = strcspn(name, " />\n");
		if (len == 0)
			return "empty tag name";
		const char *q = name + len;
		for (;;) { /* attributes: name="value" with no raw '<' or '"' inside */
			while (*q == ' ' || *q == '\n')
				q++;
			if (*q == '>' || (q[0] == '/' && q[1] == '>'))
				break;
			size_t an = strcspn(q, "= >");
			if (an == 0 || q[an] != '=' || q[an + 1] != '"')
				return "unquoted or malformed attribute";
			q += an + 2;
			while (*q && *q != '"') {
				if (*q == '<')
					return "'<' in an attribute";
				q++;
			}
			if (!*q)
				return "unterminated attribute";
			q++;
		}
		if (*q == '/') {
			if (depth == 0)
				roots++;
			p = q + 2;
			continue;
		}
		if (depth == 0)
			roots++;
		if (depth == 64)
			return "too deep";
		stack[depth] = name;
		stack_len[depth] = len;
		depth++;
		p = q + 1;
	}
	if (depth != 0)
		return "unclosed element";
	if (roots != 1)
		return "not exactly one root element";
	return NULL;
}

static int count(const char *s, const char *needle)
{
	int k = 0;
	for (const char *p = strstr(s, needle); p; p = strstr(p + 1, needle))
		k++;
	return k;
}

TEST(svg_checker_rejects_bad_xml)
{
	/* The checker itself must be able to fail, or the tests below mean nothing. */
	CHECK(xml_problem("<svg><g></svg>") != NULL);
	CHECK(xml_problem("<svg a=b></svg>") != NULL);
	CHECK(xml_problem("<svg>a & b</svg>") != NULL);
	CHECK(xml_problem("<svg></svg><svg></svg>") != NULL);
	CHECK(xml_problem("<svg><text>x</text><a b=\"c\"/></svg>") == NULL);
}

TEST(svg_curve_typical)
{
	svg_point_t pts[40];
	for (int i = 0; i < 40; i++) {
		double v = 0.25 * i;
		/* A made-up sigmoid around 6.2 mL, just to have a shape. */
		pts[i].volume_ml = v;
		pts[i].signal = 3.5 + 5.0 / (1.0 + exp(-(v - 6.2) * 4.0));
		pts[i].dpdv = 20.0 * exp(-(v - 6.2) * 4.0) / pow(1.0 + exp(-(v - 6.2) * 4.0), 2);
	}
	svg_endpoint_t ends[] = {{6.2, 6.0, NULL}};
	svg_opts_t o = {.title = "Orchard Lane Cider, batch 0412", .signal_unit = "pH"};
	char *s = svg_curve(pts, 40, ends, 1, &o);
	REQUIRE(s);
	const char *bad = xml_problem(s);
	CHECK_STR(bad ? bad : "ok", "ok");
	CHECK(strstr(s, "<svg xmlns=\"http://www.w3.org/2000/svg\"") != NULL);
	CHECK(strstr(s, "class=\"curve\"") != NULL);
	CHECK(strstr(s, "class=\"dpdv\"") != NULL);
	CHECK(strstr(s, "E1 6.200 mL") != NULL);
	CHECK(strstr(s, "titrant added (mL)") != NULL);
	CHECK(strstr(s, "first derivative (pH/mL)") != NULL);
	CHECK(strstr(s, ">endpoint</text>") != NULL);
	CHECK(strstr(s, "Orchard Lane Cider, batch 0412") != NULL);
	CHECK_INT(count(s, "<g class=\"endpoint\">"), 1);
	/* 40 measured points each get one marker. */
	const char *g = strstr(s, "<g class=\"pts\">");
	REQUIRE(g);
	int markers = 0;
	for (const char *p = strstr(g, "<circle"); p && p < strstr(g, "</g>");
	     p = strstr(p + 1, "<circle"))
		markers++;
	CHECK_INT(markers, 40);
	free(s);
}

TEST(svg_curve_escapes_text)
{
	svg_point_t pts[] = {{0, 4.0, NAN}, {1, 5.0, 1.0}};
	svg_endpoint_t ends[] = {{0.5, 4.5, "<EP&1>"}};
	svg_opts_t o = {.title = "Fernhill \"raw\" <water> & 'more'\x01", .signal_unit = "mV"};
	char *s = svg_curve(pts, 2, ends, 1, &o);
	REQUIRE(s);
	const char *bad = xml_problem(s);
	CHECK_STR(bad ? bad : "ok", "ok");
	CHECK(strstr(s, "Fernhill &quot;raw&quot; &lt;water&gt; &amp; &apos;more&apos;") != NULL);
	CHECK(strstr(s, "&lt;EP&amp;1&gt; 0.500 mL") != NULL);
	CHECK(strstr(s, "<water>") == NULL);
	CHECK(strstr(s, "potential (mV)") != NULL);
	CHECK(strstr(s, "first derivative (mV/mL)") != NULL);
	CHECK(strstr(s, ">potential</text>") != NULL); /* the legend names the signal */
	free(s);
}

TEST(svg_curve_empty_and_single)
{
	char *s = svg_curve(NULL, 0, NULL, 0, NULL);
	REQUIRE(s);
	const char *bad = xml_problem(s);
	CHECK_STR(bad ? bad : "ok", "ok");
	CHECK(strstr(s, "no points yet") != NULL);
	CHECK(strstr(s, "class=\"curve\"") == NULL);
	CHECK(strstr(s, "nan") == NULL && strstr(s, "inf") == NULL);
	free(s);

	svg_point_t one = {0.0, 7.0, NAN};
	s = svg_curve(&one, 1, NULL, 0, NULL);
	REQUIRE(s);
	bad = xml_problem(s);
	CHECK_STR(bad ? bad : "ok", "ok");
	CHECK(strstr(s, "no points yet") == NULL);
	CHECK(strstr(s, "class=\"dpdv\"") == NULL); /* no derivative known */
	CHECK(strstr(s, "nan") == NULL && strstr(s, "inf") == NULL);
	free(s);
}

TEST(svg_curve_nan_everywhere)
{
	svg_point_t pts[] = {{NAN, 4.0, 1.0}, {0.1, NAN, NAN},       {0.2, 4.1, INFINITY},
	                     {0.3, 4.2, 2.0}, {0.4, -INFINITY, 0.5}, {0.5, 4.4, 0.4}};
	svg_endpoint_t ends[] = {{NAN, 5.0, "x"}, {0.35, NAN, NULL}};
	char *s = svg_curve(pts, 6, ends, 2, NULL);
	REQUIRE(s);
	const char *bad = xml_problem(s);
	CHECK_STR(bad ? bad : "ok", "ok");
	CHECK(strstr(s, "nan") == NULL && strstr(s, "inf") == NULL);
	/* The endpoint with no volume is left out; the one without a signal still
	 * gets its line and label, named by its place in the list. */
	CHECK_INT(count(s, "<g class=\"endpoint\">"), 1);
	CHECK(strstr(s, "E2 0.350 mL") != NULL);
	/* A non-finite signal breaks the curve into separate pieces (M = move). */
	const char *c = strstr(s, "class=\"curve\" d=\"");
	REQUIRE(c);
	const char *e = strchr(c + 17, '"');
	int moves = 0;
	for (const char *p = c; p < e; p++)
		moves += *p == 'M';
	CHECK_INT(moves, 2);
	free(s);
}
