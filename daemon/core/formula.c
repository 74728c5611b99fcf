/* formula.c: see formula.h.
 *
 * Grammar (recursive descent, emitting postfix):
 *   expr    := term { ('+' | '-') term }
 *   term    := unary { ('*' | '/') unary }
 *   unary   := ('-' | '+') unary | primary
 *   primary := NUMBER | VARIABLE | '(' expr ')'
 * NUMBER is decimal with an optional exponent (12, 0.5, .5, 6.7e-2); there are
 * no functions, no powers and no implicit multiplication, so every character
 * of a formula has one plain meaning a reviewer can check by eye.
 */
#include "formula.h"

#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

enum { OP_NUM = 0, OP_VAR, OP_ADD, OP_SUB, OP_MUL, OP_DIV, OP_NEG };

/* Parentheses and unary signs nest at most this deep; keeps the recursion
 * bounded for hostile input (a formula is at most 511 bytes anyway). */
#define FORMULA_MAX_DEPTH 32

static const char *const var_names[FV_COUNT] = {
    "end1_ml",       "end2_ml",       "end3_ml",       "end4_ml",          "end1_ph",
    "end2_ph",       "end3_ph",       "end4_ph",       "half1_ph",         "half2_ph",
    "half3_ph",      "half4_ph",      "blank_ml",      "titrant_molarity", "titer",
    "amount",        "add1_ml",       "add2_ml",       "add3_ml",          "add4_ml",
    "add1_molarity", "add2_molarity", "add3_molarity", "add4_molarity",    "add1_titer",
    "add2_titer",    "add3_titer",    "add4_titer",
};
/* `used` and `have` hold one bit per variable. */
_Static_assert(FV_COUNT <= 32, "a bit per formula variable in an unsigned");

const char *formula_var_name(formula_var_t v)
{
	if ((int)v < 0 || v >= FV_COUNT)
		return "?";
	return var_names[v];
}

void formula_vars_set(formula_vars_t *fv, formula_var_t var, double value)
{
	if ((int)var < 0 || var >= FV_COUNT)
		return;
	fv->v[var] = value;
	fv->have |= 1u << var;
}

typedef struct parser {
	const char *s;
	size_t pos;
	formula_t *f;
	int depth;
	bool failed;
	char *msg;
	size_t msg_cap;
	int col;
	int base_col; /* file column of s[0], so messages name columns the author sees */
} parser_t;

static void fail(parser_t *p, size_t at, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));

static void fail(parser_t *p, size_t at, const char *fmt, ...)
{
	va_list ap;
	if (p->failed)
		return;
	p->failed = true;
	p->col = (int)at + 1;
	if (p->msg && p->msg_cap) {
		va_start(ap, fmt);
		vsnprintf(p->msg, p->msg_cap, fmt, ap);
		va_end(ap);
	}
}

static bool is_space(char c)
{
	return c == ' ' || c == '\t' || c == '\n' || c == '\r';
}

static bool is_digit(char c)
{
	return c >= '0' && c <= '9';
}

static bool is_ident_start(char c)
{
	return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || c == '_';
}

static bool is_ident(char c)
{
	return is_ident_start(c) || is_digit(c);
}

static void skip_space(parser_t *p)
{
	while (is_space(p->s[p->pos]))
		p->pos++;
}

static void emit(parser_t *p, unsigned char kind, unsigned char var, double num, size_t at)
{
	if (p->failed)
		return;
	if (p->f->n >= FORMULA_MAX_OPS) {
		fail(p, at, "formula is too long (at most %d numbers, variables and operators)",
		     FORMULA_MAX_OPS);
		return;
	}
	p->f->op[p->f->n].kind = kind;
	p->f->op[p->f->n].var = var;
	p->f->op[p->f->n].num = num;
	p->f->n++;
}

/* Small Levenshtein distance for "did you mean"; names are short. */
static int edit_distance(const char *a, const char *b)
{
	size_t la = strlen(a), lb = strlen(b);
	int row[64];
	if (la >= 63 || lb >= 63)
		return 99;
	for (size_t j = 0; j <= lb; j++)
		row[j] = (int)j;
	for (size_t i = 1; i <= la; i++) {
		int diag = row[0];
		row[0] = (int)i;
		for (size_t j = 1; j <= lb; j++) {
			int up = row[j];
			int best = diag + (a[i - 1] != b[j - 1]);
			if (up + 1 < best)
				best = up + 1;
			if (row[j - 1] + 1 < best)
				best = row[j - 1] + 1;
			row[j] = best;
			diag = up;
		}
	}
	return row[lb];
}

static void describe_here(const parser_t *p, char *out, size_t cap)
{
	unsigned char c = (unsigned char)p->s[p->pos];
	if (c == '\0')
		snprintf(out, cap, "the end of the formula");
	else if (c < 0x20 || c >= 0x7f)
		snprintf(out, cap, "byte 0x%02x", c);
	else
		snprintf(out, cap, "'%c'", c);
}

static void parse_expr(parser_t *p);

static void parse_number(parser_t *p)
{
	size_t start = p->pos;
	char buf[64];
	double v;
	while (is_digit(p->s[p->pos]))
		p->pos++;
	if (p->s[p->pos] == '.') {
		p->pos++;
		while (is_digit(p->s[p->pos]))
			p->pos++;
	}
	if (p->pos == start + 1 && p->s[start] == '.') {
		fail(p, start, "a number needs digits around its '.'");
		return;
	}
	if (p->s[p->pos] == 'e' || p->s[p->pos] == 'E') {
		size_t e = p->pos++;
		if (p->s[p->pos] == '+' || p->s[p->pos] == '-')
			p->pos++;
		if (!is_digit(p->s[p->pos])) {
			fail(p, e, "exponent of number needs digits (as in 6.7e-2)");
			return;
		}
		while (is_digit(p->s[p->pos]))
			p->pos++;
	}
	if (is_ident(p->s[p->pos]) || p->s[p->pos] == '.') {
		fail(
		    p, p->pos,
		    "number is followed by '%c'; put an operator between a number and what follows",
		    p->s[p->pos]);
		return;
	}
	if (p->pos - start >= sizeof buf) {
		fail(p, start, "number is too long");
		return;
	}
	memcpy(buf, p->s + start, p->pos - start);
	buf[p->pos - start] = '\0';
	v = strtod(buf, NULL);
	if (!isfinite(v)) {
		fail(p, start, "number %s is out of range", buf);
		return;
	}
	emit(p, OP_NUM, 0, v, start);
}

static void parse_variable(parser_t *p)
{
	size_t start = p->pos, len;
	char name[64];
	while (is_ident(p->s[p->pos]))
		p->pos++;
	len = p->pos - start;
	if (len >= sizeof name) {
		fail(p, start, "unknown variable (name too long)");
		return;
	}
	memcpy(name, p->s + start, len);
	name[len] = '\0';
	for (int v = 0; v < FV_COUNT; v++) {
		if (!strcmp(name, var_names[v])) {
			emit(p, OP_VAR, (unsigned char)v, 0.0, start);
			p->f->used |= 1u << v;
			return;
		}
	}
	{
		int best = -1, best_d = 3;
		for (int v = 0; v < FV_COUNT; v++) {
			int dist = edit_distance(name, var_names[v]);
			if (dist < best_d) {
				best_d = dist;
				best = v;
			}
		}
		if (best >= 0)
			fail(p, start, "unknown variable '%s'; did you mean '%s'?", name,
			     var_names[best]);
		else
			fail(p, start,
			     "unknown variable '%s' (allowed: end1_ml..end4_ml, end1_ph..end4_ph, "
			     "half1_ph..half4_ph, blank_ml, titrant_molarity, titer, amount, "
			     "add1_ml..add4_ml, add1_molarity..add4_molarity, "
			     "add1_titer..add4_titer)",
			     name);
	}
}

static void parse_primary(parser_t *p)
{
	char what[32];
	skip_space(p);
	if (p->failed)
		return;
	char c = p->s[p->pos];
	if (is_digit(c) || c == '.') {
		parse_number(p);
	} else if (is_ident_start(c)) {
		parse_variable(p);
	} else if (c == '(') {
		size_t open = p->pos++;
		if (++p->depth > FORMULA_MAX_DEPTH) {
			fail(p, open, "parentheses nest deeper than %d", FORMULA_MAX_DEPTH);
			return;
		}
		parse_expr(p);
		p->depth--;
		if (p->failed)
			return;
		skip_space(p);
		if (p->s[p->pos] != ')') {
			describe_here(p, what, sizeof what);
			fail(p, p->pos, "expected ')' to close the '(' at column %zu, found %s",
			     open + (size_t)p->base_col, what);
			return;
		}
		p->pos++;
	} else {
		describe_here(p, what, sizeof what);
		fail(p, p->pos, "expected a number, a variable or '(', found %s", what);
	}
}

static void parse_unary(parser_t *p)
{
	skip_space(p);
	char c = p->s[p->pos];
	if (c == '-' || c == '+') {
		size_t at = p->pos++;
		if (++p->depth > FORMULA_MAX_DEPTH) {
			fail(p, at, "too many signs in a row");
			return;
		}
		parse_unary(p);
		p->depth--;
		if (c == '-')
			emit(p, OP_NEG, 0, 0.0, at);
		return;
	}
	parse_primary(p);
}

static void parse_term(parser_t *p)
{
	parse_unary(p);
	for (;;) {
		if (p->failed)
			return;
		skip_space(p);
		char c = p->s[p->pos];
		if (c != '*' && c != '/')
			return;
		size_t at = p->pos++;
		parse_unary(p);
		emit(p, c == '*' ? OP_MUL : OP_DIV, 0, 0.0, at);
	}
}

static void parse_expr(parser_t *p)
{
	parse_term(p);
	for (;;) {
		if (p->failed)
			return;
		skip_space(p);
		char c = p->s[p->pos];
		if (c != '+' && c != '-')
			return;
		size_t at = p->pos++;
		parse_term(p);
		emit(p, c == '+' ? OP_ADD : OP_SUB, 0, 0.0, at);
	}
}

int formula_compile(const char *text, formula_t *f, char *msg, size_t msg_cap, int *col)
{
	return formula_compile_at(text, 1, f, msg, msg_cap, col);
}

int formula_compile_at(const char *text, int base_col, formula_t *f, char *msg, size_t msg_cap,
                       int *col)
{
	parser_t p = {.s = text ? text : "",
	              .f = f,
	              .msg = msg,
	              .msg_cap = msg_cap,
	              .base_col = base_col > 0 ? base_col : 1};
	char what[32];
	memset(f, 0, sizeof *f);
	if (msg && msg_cap)
		msg[0] = '\0';
	skip_space(&p);
	if (p.s[p.pos] == '\0') {
		fail(&p, 0, "formula is empty");
	} else {
		parse_expr(&p);
		skip_space(&p);
		if (!p.failed && p.s[p.pos] != '\0') {
			describe_here(&p, what, sizeof what);
			if (p.s[p.pos] == ')')
				fail(&p, p.pos, "')' has no matching '('");
			else if (is_digit(p.s[p.pos]) || is_ident_start(p.s[p.pos]) ||
			         p.s[p.pos] == '(')
				fail(&p, p.pos, "expected an operator (+ - * /) before %s", what);
			else
				fail(&p, p.pos,
				     "unexpected %s (allowed: numbers, variables, + - * / and "
				     "parentheses)",
				     what);
		}
	}
	if (p.failed) {
		if (col)
			*col = p.col;
		memset(f, 0, sizeof *f);
		return -1;
	}
	if (col)
		*col = 0;
	return 0;
}

static void say(char *msg, size_t cap, const char *fmt, ...) __attribute__((format(printf, 3, 4)));

static void say(char *msg, size_t cap, const char *fmt, ...)
{
	va_list ap;
	if (!msg || !cap)
		return;
	va_start(ap, fmt);
	vsnprintf(msg, cap, fmt, ap);
	va_end(ap);
}

formula_status_t formula_eval(const formula_t *f, const formula_vars_t *fv, double *out, char *msg,
                              size_t msg_cap)
{
	double st[FORMULA_MAX_OPS];
	int sp = 0;
	if (msg && msg_cap)
		msg[0] = '\0';
	if (!f || f->n <= 0) {
		say(msg, msg_cap, "formula was not compiled");
		return FORMULA_MISSING;
	}
	/* Every variable must be known before anything is computed, so the note
	 * names what is missing rather than a consequence of it. */
	for (int v = 0; v < FV_COUNT; v++) {
		if ((f->used & (1u << v)) && !(fv && (fv->have & (1u << v)))) {
			say(msg, msg_cap, "%s has no value in this run", var_names[v]);
			return FORMULA_MISSING;
		}
		if ((f->used & (1u << v)) && !isfinite(fv->v[v])) {
			say(msg, msg_cap, "%s is not a finite number in this run", var_names[v]);
			return FORMULA_MISSING;
		}
	}
	for (int i = 0; i < f->n; i++) {
		const formula_op_t *o = &f->op[i];
		double a, b, r;
		if (o->kind == OP_NUM || o->kind == OP_VAR) {
			if (sp >= FORMULA_MAX_OPS)
				goto corrupt;
			if (o->kind == OP_VAR && o->var >= FV_COUNT)
				goto corrupt;
			st[sp++] = o->kind == OP_NUM ? o->num : fv->v[o->var];
			continue;
		}
		if (o->kind == OP_NEG) {
			if (sp < 1)
				goto corrupt;
			st[sp - 1] = -st[sp - 1];
			continue;
		}
		if (sp < 2)
			goto corrupt;
		b = st[--sp];
		a = st[sp - 1];
		switch (o->kind) {
		case OP_ADD:
			r = a + b;
			break;
		case OP_SUB:
			r = a - b;
			break;
		case OP_MUL:
			r = a * b;
			break;
		case OP_DIV:
			if (b == 0.0) {
				say(msg, msg_cap, "division by zero");
				return FORMULA_DIV_ZERO;
			}
			r = a / b;
			break;
		default:
			goto corrupt;
		}
		if (!isfinite(r)) {
			say(msg, msg_cap, "result is too large to represent");
			return FORMULA_NOT_FINITE;
		}
		st[sp - 1] = r;
	}
	if (sp != 1)
		goto corrupt;
	*out = st[0];
	return FORMULA_OK;
corrupt:
	say(msg, msg_cap, "formula program is corrupt");
	return FORMULA_MISSING;
}
