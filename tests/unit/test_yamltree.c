/* Tests of the strict YAML reader (daemon/lib/yamltree.c). */
#include <stdlib.h>
#include <string.h>

#include "harness.h"
#include "yamltree.h"

static int load(const char *text, yt_doc_t *doc, diag_list_t *d)
{
	return yt_load_buffer("t.yaml", text, strlen(text), doc, d);
}

/* The first diagnostic, formatted as the user sees it. */
static char *first(const diag_list_t *d)
{
	static char buf[1024];
	if (d->n == 0)
		return "";
	snprintf(buf, sizeof buf, "%d:%d: %s", d->v[0].line, d->v[0].col, d->v[0].msg);
	return buf;
}

TEST(yamltree_loads_nested_map_with_marks)
{
	yt_doc_t doc;
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(load("a: 1\nb:\n  c: [x, 'y']\n", &doc, &d) == 0);
	CHECK_INT(d.n, 0);
	const yt_node_t *b = yt_get(doc.root, "b");
	REQUIRE(b && b->kind == YT_MAP);
	CHECK_INT(b->line, 3);
	CHECK_INT(b->col, 3);
	const yt_node_t *c = yt_get(b, "c");
	REQUIRE(c && c->kind == YT_SEQ && c->n == 2);
	CHECK(c->items[0]->plain);
	CHECK(!c->items[1]->plain);
	CHECK_INT(c->items[1]->col, 10);
	yt_free(&doc);
	diag_free(&d);
}

TEST(yamltree_rejects_duplicate_keys)
{
	yt_doc_t doc;
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(load("a: 1\nb: 2\na: 3\n", &doc, &d) != 0);
	CHECK_STR(first(&d), "3:1: duplicate key 'a' (first given at line 1)");
	yt_free(&doc);
	diag_free(&d);
}

TEST(yamltree_rejects_anchor_alias_tag)
{
	yt_doc_t doc;
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(load("a: &x 1\nb: *x\nc: !!str 3\n", &doc, &d) != 0);
	REQUIRE(d.n == 3);
	CHECK_STR(d.v[0].msg, "anchors (&x) are not allowed; write the value out in full");
	CHECK_INT(d.v[1].line, 2);
	CHECK_STR(d.v[1].msg, "aliases (*x) are not allowed; write the value out in full");
	CHECK_INT(d.v[2].line, 3);
	CHECK(strstr(d.v[2].msg, "tags") != NULL);
	yt_free(&doc);
	diag_free(&d);
}

TEST(yamltree_rejects_deep_nesting_and_size)
{
	yt_doc_t doc;
	diag_list_t d = DIAG_LIST_INIT;
	char deep[200];
	memset(deep, '[', 100);
	deep[100] = '\0';
	CHECK(load(deep, &doc, &d) != 0);
	CHECK_STR(first(&d), "1:33: nesting is deeper than 32 levels");
	yt_free(&doc);
	diag_free(&d);

	size_t big = YT_MAX_BYTES + 10;
	char *buf = malloc(big);
	REQUIRE(buf);
	memset(buf, '#', big);
	CHECK(yt_load_buffer("big.yaml", buf, big, &doc, &d) != 0);
	CHECK(strstr(first(&d), "too large") != NULL);
	free(buf);
	yt_free(&doc);
	diag_free(&d);
}

TEST(yamltree_reports_bad_utf8_position)
{
	yt_doc_t doc;
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(load("title: ok\nname: caf\xe9 au lait\n", &doc, &d) != 0);
	REQUIRE(d.n >= 1);
	CHECK_INT(d.v[0].line, 2);
	CHECK_INT(d.v[0].col, 10);
	CHECK(strstr(d.v[0].msg, "UTF-8") != NULL);
	yt_free(&doc);
	diag_free(&d);
}

TEST(yamltree_rejects_empty_and_multi_document)
{
	yt_doc_t doc;
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(load("", &doc, &d) != 0);
	CHECK_STR(first(&d), "1:1: the file is empty");
	yt_free(&doc);
	diag_free(&d);
	CHECK(load("a: 1\n---\nb: 2\n", &doc, &d) != 0);
	CHECK_STR(first(&d), "2:1: only one YAML document per file (found a second one)");
	yt_free(&doc);
	diag_free(&d);
}

TEST(yamltree_syntax_error_position)
{
	yt_doc_t doc;
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(load("a: [1, 2\nb: 3\n", &doc, &d) != 0);
	REQUIRE(d.n == 1);
	CHECK(strncmp(d.v[0].msg, "YAML syntax:", 12) == 0);
	CHECK(d.v[0].line >= 1);
	yt_free(&doc);
	diag_free(&d);
}

TEST(yamltree_typed_getters)
{
	yt_doc_t doc;
	diag_list_t d = DIAG_LIST_INIT;
	double v = 0;
	long l = 0;
	bool b = false;
	int e = -1;
	char s[8];
	REQUIRE(load("n: 2.5e-1\nu: 25 mL\nq: \"3\"\nh: 0x1F\ni: 12\nt: true\nw: constnt\n"
	             "s: toolongtext\nr: 99\n",
	             &doc, &d) == 0);
	CHECK(yt_double(&doc, yt_get(doc.root, "n"), "n", "mL", &v, &d));
	CHECK_NEAR(v, 0.25, 1e-15);
	CHECK(!yt_double(&doc, yt_get(doc.root, "u"), "stop.volume_max_ml", "mL", &v, &d));
	CHECK_STR(first(&d), "2:4: stop.volume_max_ml must be a number in mL, written without a "
	                     "unit (got \"25 mL\")");
	diag_free(&d);
	CHECK(!yt_double(&doc, yt_get(doc.root, "q"), "q", NULL, &v, &d));
	CHECK_STR(first(&d), "3:4: q must be a number, not a quoted string (got \"3\")");
	diag_free(&d);
	CHECK(!yt_double(&doc, yt_get(doc.root, "h"), "h", NULL, &v, &d));
	diag_free(&d);
	CHECK(yt_long(&doc, yt_get(doc.root, "i"), "i", 0, 100, &l, &d));
	CHECK_INT(l, 12);
	CHECK(yt_bool(&doc, yt_get(doc.root, "t"), "t", &b, &d) && b);
	static const char *const modes[] = {"adaptive", "constant", NULL};
	CHECK(!yt_enum(&doc, yt_get(doc.root, "w"), "dosing.mode", modes, &e, &d));
	CHECK_STR(first(&d), "7:4: dosing.mode must be one of adaptive, constant (got "
	                     "\"constnt\"; did you mean 'constant'?)");
	diag_free(&d);
	CHECK(!yt_string(&doc, yt_get(doc.root, "s"), "s", s, sizeof s, &d));
	CHECK_STR(first(&d), "8:4: s is too long: 11 characters (at most 7)");
	diag_free(&d);
	CHECK(!yt_double_range(&doc, yt_get(doc.root, "r"), "r", "mL", 0, 50, &v, &d));
	CHECK_STR(first(&d), "9:4: r must be between 0 and 50 mL (got 99)");
	diag_free(&d);
	yt_free(&doc);
}

TEST(yamltree_unknown_keys_did_you_mean)
{
	yt_doc_t doc;
	diag_list_t d = DIAG_LIST_INIT;
	static const char *const keys[] = {"past_endpoint_ml", "volume_max_ml", "time_max_s", NULL};
	REQUIRE(load("volum_max_ml: 3\nzzz: 1\ntime_max: 9\n", &doc, &d) == 0);
	CHECK(!yt_check_keys(&doc, doc.root, keys, "stop", &d));
	REQUIRE(d.n == 3);
	CHECK_STR(d.v[2].msg, "unknown key 'time_max' in stop; did you mean 'time_max_s'?");
	CHECK_STR(d.v[0].msg, "unknown key 'volum_max_ml' in stop; did you mean 'volume_max_ml'?");
	CHECK_STR(
	    d.v[1].msg,
	    "unknown key 'zzz' in stop (allowed: past_endpoint_ml, volume_max_ml, time_max_s)");
	yt_free(&doc);
	diag_free(&d);
}

TEST(yamltree_non_scalar_key)
{
	yt_doc_t doc;
	diag_list_t d = DIAG_LIST_INIT;
	CHECK(load("? [a, b]\n: 1\nc: 2\n", &doc, &d) != 0);
	CHECK(strstr(first(&d), "a key must be a plain word") != NULL);
	yt_free(&doc);
	diag_free(&d);
}

/* 20,000 keys in one map: the duplicate check compares about one key text
 * per key (a scan per key made it 200 million compares, a second of CPU
 * for a 220 KB file). The count, not the time, is checked. */
TEST(yamltree_duplicate_check_is_linear_in_keys)
{
	enum { KEYS = 20000 };
	size_t cap = KEYS * 16 + 64, used = 0;
	char *text = malloc(cap);
	yt_doc_t doc;
	diag_list_t d = DIAG_LIST_INIT;
	REQUIRE(text);
	for (int i = 0; i < KEYS; i++)
		used += (size_t)snprintf(text + used, cap - used, "k%05dx: 1\n", i);
	/* and one duplicate at the end, of the key on line 7 */
	used += (size_t)snprintf(text + used, cap - used, "k00006x: again\n");
	CHECK(yt_load_buffer("t.yaml", text, used, &doc, &d) != 0);
	REQUIRE(d.n == 1);
	CHECK_STR(first(&d), "20001:1: duplicate key 'k00006x' (first given at line 7)");
	CHECK(doc.key_compares > 0);
	CHECK(doc.key_compares < 3 * KEYS);
	yt_free(&doc);
	diag_free(&d);
	/* The same keys without the duplicate load, and each is found. */
	CHECK(yt_load_buffer("t.yaml", text, used - strlen("k00006x: again\n"), &doc, &d) == 0);
	REQUIRE(doc.root && doc.root->n == KEYS);
	CHECK(yt_get(doc.root, "k19999x") == doc.root->items[KEYS - 1]);
	CHECK(yt_get(doc.root, "k00000x") == doc.root->items[0]);
	yt_free(&doc);
	diag_free(&d);
	free(text);
}

TEST(diag_sort_is_stable_by_line_and_column)
{
	diag_list_t d = DIAG_LIST_INIT;
	/* reversed lines, with ties on (line, col) that must keep their order */
	for (int i = 3000; i > 0; i--) {
		diag_add(&d, "f", i, 2, "b%d", i);
		diag_add(&d, "f", i, 1, "a%d", i);
		diag_add(&d, "f", i, 2, "c%d", i);
	}
	diag_sort(&d);
	REQUIRE(d.n == 9000);
	for (size_t i = 0; i < d.n; i += 3) {
		char a[16], b[16], c[16];
		int line = (int)(i / 3) + 1;
		snprintf(a, sizeof a, "a%d", line);
		snprintf(b, sizeof b, "b%d", line);
		snprintf(c, sizeof c, "c%d", line);
		CHECK_INT(d.v[i].line, line);
		CHECK_STR(d.v[i].msg, a);
		CHECK_STR(d.v[i + 1].msg, b);
		CHECK_STR(d.v[i + 2].msg, c);
		if (d.v[i].line != line)
			break; /* one report is enough */
	}
	diag_free(&d);
}
