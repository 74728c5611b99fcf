/* formula.h: the result formula language of method files.
 *
 * Numbers, + - * / ( ), unary minus, and the named variables of docs/methods.md:
 * end1_ml .. end4_ml, end1_ph .. end4_ph, half1_ph .. half4_ph, blank_ml,
 * titrant_molarity, titer, amount, and per addition of a method's before
 * steps add1_ml .. add4_ml, add1_molarity .. add4_molarity, add1_titer ..
 * add4_titer. Nothing else is evaluated. A formula is
 * compiled once into a fixed-size postfix program (no heap), so method_t
 * stays plain data.
 */
#ifndef STOPCOCK_FORMULA_H
#define STOPCOCK_FORMULA_H

#include <stdbool.h>
#include <stddef.h>

#define FORMULA_MAX_OPS 128
#define FORMULA_MAX_END 4
#define FORMULA_MAX_ADD 4

typedef enum {
	FV_END_ML = 0, /* + index 0..3 */
	FV_END_PH = 4,
	FV_HALF_PH = 8,
	FV_BLANK_ML = 12,
	FV_TITRANT_MOLARITY,
	FV_TITER,
	FV_AMOUNT,
	FV_ADD_ML = 16,       /* + index 0..3: volume of the method's addition N, mL */
	FV_ADD_MOLARITY = 20, /* its reagent's nominal molarity, mol/L */
	FV_ADD_TITER = 24,    /* its reagent's correction factor */
	FV_COUNT = 28
} formula_var_t;

typedef struct formula_op {
	unsigned char kind; /* number, variable, + - * / neg */
	unsigned char var;  /* formula_var_t when kind is variable */
	double num;
} formula_op_t;

typedef struct formula {
	int n;
	formula_op_t op[FORMULA_MAX_OPS];
	unsigned used; /* bit per formula_var_t: which variables it reads */
} formula_t;

/* Values for evaluation; `have` has a bit per formula_var_t that is known. */
typedef struct formula_vars {
	double v[FV_COUNT];
	unsigned have;
} formula_vars_t;

void formula_vars_set(formula_vars_t *fv, formula_var_t var, double value);

/* Compile. On error returns -1 and fills msg (a sentence naming what is
 * wrong) and *col (1-based column in `text`). */
int formula_compile(const char *text, formula_t *f, char *msg, size_t msg_cap, int *col);
/* The same, for a formula whose first character sits at file column
 * base_col: columns named inside msg are file columns (*col stays 1-based
 * in `text`). */
int formula_compile_at(const char *text, int base_col, formula_t *f, char *msg, size_t msg_cap,
                       int *col);

typedef enum {
	FORMULA_OK = 0,
	FORMULA_DIV_ZERO,   /* division by zero: result is null, with a fault note */
	FORMULA_MISSING,    /* a variable has no value (e.g. end2_ml with one endpoint) */
	FORMULA_NOT_FINITE, /* overflow */
} formula_status_t;

/* Evaluate; on anything but FORMULA_OK *out is left untouched and msg says why. */
formula_status_t formula_eval(const formula_t *f, const formula_vars_t *fv, double *out, char *msg,
                              size_t msg_cap);

const char *formula_var_name(formula_var_t v);

#endif
