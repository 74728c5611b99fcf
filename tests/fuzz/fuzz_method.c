/* fuzz_method.c: libFuzzer target for the method file parser and validator
 * (method_parse), with and without station limits. Any input must come back
 * as 0 or -1 with diagnostics; sanitizers catch the rest. */
#include <stddef.h>
#include <stdint.h>

#include "diag.h"
#include "method.h"

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
	/* A station like the simulator's: 150 mL beaker, 10 mL syringe. */
	static const method_limits_t lim = {
	    .vessel_max_ml = 150.0, .burette_capacity_ml = 10.0, .max_refills = 20};
	method_t m;
	diag_list_t d = DIAG_LIST_INIT;

	/* The name ends in .yaml so the id-equals-file-name rule runs too. */
	(void)method_parse("fuzz.yaml", (const char *)data, size, (size & 1) ? &lim : NULL, &m, &d);
	diag_free(&d);
	return 0;
}
