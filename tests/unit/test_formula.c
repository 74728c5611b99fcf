/* Unit tests for formula.c: grammar, error columns, evaluation, faults.
 * Reference calculations name their source beside them. */
#include <stdio.h>
#include <string.h>

#include "formula.h"
#include "harness.h"

static double eval_ok(const char *text, const formula_vars_t *fv)
{
	formula_t f;
	char msg[200];
	int col = -1;
	double out = -12345.0;
	if (formula_compile(text, &f, msg, sizeof msg, &col) != 0) {
		harness_fail(__FILE__, __LINE__, "compile '%s': %d: %s", text, col, msg);
		return -12345.0;
	}
	if (formula_eval(&f, fv, &out, msg, sizeof msg) != FORMULA_OK)
		harness_fail(__FILE__, __LINE__, "eval '%s': %s", text, msg);
	return out;
}

TEST(formula_precedence_and_associativity)
{
	formula_vars_t fv = {0};
	CHECK_NEAR(eval_ok("1 + 2 * 3", &fv), 7.0, 1e-12);
	CHECK_NEAR(eval_ok("(1 + 2) * 3", &fv), 9.0, 1e-12);
	CHECK_NEAR(eval_ok("10 / 4 / 5", &fv), 0.5, 1e-12); /* left to right */
	CHECK_NEAR(eval_ok("2 - 3 - 4", &fv), -5.0, 1e-12); /* left to right */
	CHECK_NEAR(eval_ok("-2 * -3", &fv), 6.0, 1e-12);
	CHECK_NEAR(eval_ok("-(2 + 3) * 2", &fv), -10.0, 1e-12);
	CHECK_NEAR(eval_ok("+4 - -1", &fv), 5.0, 1e-12);
	CHECK_NEAR(eval_ok("6.7e-2 * 1E2", &fv), 6.7, 1e-12);
	CHECK_NEAR(eval_ok(".5 + 2.", &fv), 2.5, 1e-12);
	CHECK_NEAR(eval_ok("((((3))))", &fv), 3.0, 1e-12);
}

TEST(formula_alkalinity_standard_methods)
{
	/* Standard Methods 2320 B: alkalinity (mg CaCO3/L) = A x N x 50 000 / mL sample
	 * (form [M] in docs/chemistry.md §8; 50 000 from CaCO3's equivalent mass 50.043 g,
	 * CIAAW 2021 [S]). Hand-computed: 4.20 mL x 0.0200 N x 50 000 / 100 mL = 42.0. */
	formula_vars_t fv = {0};
	formula_vars_set(&fv, FV_END_ML + 0, 4.20);
	formula_vars_set(&fv, FV_TITRANT_MOLARITY, 0.0200);
	formula_vars_set(&fv, FV_TITER, 1.0);
	formula_vars_set(&fv, FV_AMOUNT, 100.0);
	CHECK_NEAR(eval_ok("end1_ml * titrant_molarity * titer * 50000 / amount", &fv), 42.0, 1e-9);
	/* Low-alkalinity form of the same method, (2B - C) x N x 50 000 / V [M]:
	 * B = 3.10 mL, C = 3.62 mL, N = 0.0200, V = 100 mL -> 2.58 x 1000 / 100 = 25.8. */
	formula_vars_set(&fv, FV_END_ML + 1, 3.62);
	formula_vars_set(&fv, FV_END_ML + 0, 3.10);
	CHECK_NEAR(
	    eval_ok("(2 * end1_ml - end2_ml) * titrant_molarity * titer * 50000 / amount", &fv),
	    25.8, 1e-9);
}

TEST(formula_khp_titer)
{
	/* NaOH standardized with KHP: c = 1000 m P / (204.22 (V - V_blank)), 1:1
	 * (docs/chemistry.md §8; 204.22 g/mol from CIAAW 2021 atomic weights [S]).
	 * Hand-computed: m = 0.5105 g, P = 1, V = 25.10 mL, blank 0.05 mL:
	 * c = 510.5 / (204.22 x 25.05) = 0.099790625 mol/L; titer = c / 0.1000 = 0.99790625. */
	formula_vars_t fv = {0};
	formula_vars_set(&fv, FV_END_ML + 0, 25.10);
	formula_vars_set(&fv, FV_BLANK_ML, 0.05);
	formula_vars_set(&fv, FV_AMOUNT, 0.5105);
	formula_vars_set(&fv, FV_TITRANT_MOLARITY, 0.1000);
	CHECK_NEAR(
	    eval_ok("1000 * amount / (204.22 * (end1_ml - blank_ml) * titrant_molarity)", &fv),
	    0.99790625, 1e-8);
}

TEST(formula_cider_acidity)
{
	/* Titratable acidity as malic acid: V x c x 67.04 / V_sample, g/L; 67.04 g per
	 * equivalent = 134.087 / 2 (docs/chemistry.md §7 [C]; AOAC 942.15 malic factor
	 * 0.067 g/meq [S]). Hand-computed: 8.15 mL x 0.1 x 67.04 / 10 mL = 5.46376 g/L. */
	formula_vars_t fv = {0};
	formula_vars_set(&fv, FV_END_ML + 0, 8.15);
	formula_vars_set(&fv, FV_TITRANT_MOLARITY, 0.1);
	formula_vars_set(&fv, FV_TITER, 1.0);
	formula_vars_set(&fv, FV_AMOUNT, 10.0);
	CHECK_NEAR(eval_ok("end1_ml * titrant_molarity * titer * 67.04 / amount", &fv), 5.46376,
	           1e-9);
}

TEST(formula_used_bits)
{
	formula_t f;
	char msg[200];
	int col;
	REQUIRE(formula_compile("end2_ml - blank_ml + half1_ph * end3_ph", &f, msg, sizeof msg,
	                        &col) == 0);
	CHECK(f.used == ((1u << (FV_END_ML + 1)) | (1u << FV_BLANK_ML) | (1u << FV_HALF_PH) |
	                 (1u << (FV_END_PH + 2))));
	CHECK_STR(formula_var_name(FV_TITRANT_MOLARITY), "titrant_molarity");
	CHECK_STR(formula_var_name(FV_HALF_PH + 3), "half4_ph");
}

static void check_error(const char *text, int want_col, const char *want_msg)
{
	formula_t f;
	char msg[300];
	int col = -1;
	if (formula_compile(text, &f, msg, sizeof msg, &col) == 0) {
		harness_fail(__FILE__, __LINE__, "'%s' compiled but should fail", text);
		return;
	}
	if (col != want_col)
		harness_fail(__FILE__, __LINE__, "'%s': column %d, wanted %d (%s)", text, col,
		             want_col, msg);
	if (strcmp(msg, want_msg) != 0)
		harness_fail(__FILE__, __LINE__, "'%s':\n    got:    %s\n    wanted: %s", text, msg,
		             want_msg);
}

TEST(formula_errors_point_at_the_column)
{
	check_error(
	    "end1_ml * foo", 11,
	    "unknown variable 'foo' (allowed: end1_ml..end4_ml, end1_ph..end4_ph, "
	    "half1_ph..half4_ph, blank_ml, titrant_molarity, titer, amount, add1_ml..add4_ml, "
	    "add1_molarity..add4_molarity, add1_titer..add4_titer)");
	check_error("end1_ml * titr", 11, "unknown variable 'titr'; did you mean 'titer'?");
	check_error("end5_ml", 1, "unknown variable 'end5_ml'; did you mean 'end1_ml'?");
	check_error("1 +", 4, "expected a number, a variable or '(', found the end of the formula");
	check_error("(1 + 2", 7,
	            "expected ')' to close the '(' at column 1, found the end of the formula");
	check_error("1 + 2)", 6, "')' has no matching '('");
	check_error("2 ^ 3", 3,
	            "unexpected '^' (allowed: numbers, variables, + - * / and parentheses)");
	check_error("", 1, "formula is empty");
	check_error("   ", 1, "formula is empty");
	check_error("3 end1_ml", 3, "expected an operator (+ - * /) before 'e'");
	check_error("3end1_ml", 2, "exponent of number needs digits (as in 6.7e-2)");
	check_error("2x", 2,
	            "number is followed by 'x'; put an operator between a number and what follows");
	check_error("1 * . + 2", 5, "a number needs digits around its '.'");
	check_error("1e999 * 2", 1, "number 1e999 is out of range");
	check_error("amount / * 2", 10, "expected a number, a variable or '(', found '*'");
	check_error("sqrt(amount)", 1,
	            "unknown variable 'sqrt' (allowed: end1_ml..end4_ml, "
	            "end1_ph..end4_ph, half1_ph..half4_ph, blank_ml, "
	            "titrant_molarity, titer, amount, add1_ml..add4_ml, "
	            "add1_molarity..add4_molarity, add1_titer..add4_titer)");
	check_error("1 + \xc3\xa9", 5, "expected a number, a variable or '(', found byte 0xc3");
}

TEST(formula_limits)
{
	char text[600];
	size_t n = 0;
	/* 65 terms = 129 ops > FORMULA_MAX_OPS (128); the 129th op is the last '+',
	 * emitted after its right operand, at column 128 */
	for (int i = 0; i < 65; i++)
		n += (size_t)snprintf(text + n, sizeof text - n, "%s1", i ? "+" : "");
	check_error(text, 128,
	            "formula is too long (at most 128 numbers, variables and operators)");
	n = 0;
	for (int i = 0; i < 40; i++)
		text[n++] = '(';
	text[n++] = '1';
	for (int i = 0; i < 40; i++)
		text[n++] = ')';
	text[n] = '\0';
	check_error(text, 33, "parentheses nest deeper than 32");
}

TEST(formula_eval_faults)
{
	formula_t f;
	formula_vars_t fv = {0};
	char msg[200];
	int col;
	double out = 7.0;
	REQUIRE(formula_compile("amount / (end1_ml - blank_ml)", &f, msg, sizeof msg, &col) == 0);
	formula_vars_set(&fv, FV_AMOUNT, 1.0);
	formula_vars_set(&fv, FV_END_ML, 2.5);
	/* blank_ml not set yet: missing, named in the note */
	CHECK(formula_eval(&f, &fv, &out, msg, sizeof msg) == FORMULA_MISSING);
	CHECK_STR(msg, "blank_ml has no value in this run");
	formula_vars_set(&fv, FV_BLANK_ML, 2.5);
	CHECK(formula_eval(&f, &fv, &out, msg, sizeof msg) == FORMULA_DIV_ZERO);
	CHECK_STR(msg, "division by zero");
	CHECK(out == 7.0); /* untouched */
	formula_vars_set(&fv, FV_BLANK_ML, 0.5);
	CHECK(formula_eval(&f, &fv, &out, msg, sizeof msg) == FORMULA_OK);
	CHECK_NEAR(out, 0.5, 1e-12);

	REQUIRE(formula_compile("1e300 * 1e300", &f, msg, sizeof msg, &col) == 0);
	out = 7.0;
	CHECK(formula_eval(&f, &fv, &out, msg, sizeof msg) == FORMULA_NOT_FINITE);
	CHECK(out == 7.0);
	REQUIRE(formula_compile("0 / 0", &f, msg, sizeof msg, &col) == 0);
	CHECK(formula_eval(&f, &fv, &out, msg, sizeof msg) == FORMULA_DIV_ZERO);

	/* A NaN handed in by a caller never leaks out as a result */
	formula_vars_set(&fv, FV_AMOUNT, NAN);
	REQUIRE(formula_compile("amount * 2", &f, msg, sizeof msg, &col) == 0);
	CHECK(formula_eval(&f, &fv, &out, msg, sizeof msg) == FORMULA_MISSING);
	CHECK_STR(msg, "amount is not a finite number in this run");

	/* An all-zero (never compiled) formula is refused, not evaluated */
	memset(&f, 0, sizeof f);
	CHECK(formula_eval(&f, &fv, &out, msg, sizeof msg) == FORMULA_MISSING);
}

TEST(formula_random_text_property)
{
	/* Property over random strings of formula characters: compile either
	 * fails with a column inside the text (or just past its end), or the
	 * program evaluates to a finite number or a named fault; never NaN/inf. */
	static const char pool[] = "0123456789.eE+-*/() _abcdehilmnoprstuvxy12345\t";
	unsigned long long s = 1;
	int rounds = harness_quick() ? 2000 : 20000, compiled = 0;
	for (int it = 0; it < rounds; it++) {
		char t[80], msg[200];
		int n = 1 + it % 70, col = -1;
		formula_t f;
		for (int i = 0; i < n; i++) {
			s ^= s << 13;
			s ^= s >> 7;
			s ^= s << 17;
			t[i] = pool[s % (sizeof pool - 1)];
		}
		t[n] = '\0';
		if (formula_compile(t, &f, msg, sizeof msg, &col) != 0) {
			if (col < 1 || col > n + 1)
				harness_fail(__FILE__, __LINE__, "'%s': column %d", t, col);
			continue;
		}
		compiled++;
		formula_vars_t fv = {0};
		for (int v = 0; v < FV_COUNT; v++)
			formula_vars_set(&fv, (formula_var_t)v, (v % 3) - 0.5);
		double out = 0;
		if (formula_eval(&f, &fv, &out, msg, sizeof msg) == FORMULA_OK && !isfinite(out))
			harness_fail(__FILE__, __LINE__, "'%s' gave %g", t, out);
	}
	CHECK(compiled > 0); /* the pool does make valid formulas */
}
