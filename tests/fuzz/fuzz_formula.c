/* fuzz_formula.c: libFuzzer target for the result formula language
 * (formula_compile, then formula_eval with every variable known and with
 * none). The error column must lie inside the text (or just past it). */
#include <stddef.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "formula.h"

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
	char text[1024];
	char msg[256];
	formula_t f;
	formula_vars_t all = {0}, none = {0};
	double out;
	int col = 0;

	if (size >= sizeof text)
		return 0;
	memcpy(text, data, size);
	text[size] = '\0';
	if (formula_compile(text, &f, msg, sizeof msg, &col) != 0) {
		/* A column outside the text would point users at nothing. */
		if (col < 1 || (size_t)col > strlen(text) + 1)
			abort();
		return 0;
	}
	for (int v = 0; v < FV_COUNT; v++)
		formula_vars_set(&all, (formula_var_t)v, 0.5 + v); /* any finite values */
	(void)formula_eval(&f, &all, &out, msg, sizeof msg);
	(void)formula_eval(&f, &none, &out, msg, sizeof msg);
	return 0;
}
