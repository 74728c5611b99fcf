/* fuzz_scenario.c: libFuzzer target for the scenario file parser
 * (scenario_parse). A scenario that parses is also solved at three volumes,
 * so values the parser lets through cannot crash the chemistry model. */
#include <stddef.h>
#include <stdint.h>

#include "chem.h"
#include "scenario.h"
#include "diag.h"

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
	chem_scenario_t s;
	diag_list_t d = DIAG_LIST_INIT;

	if (scenario_parse("fuzz.yaml", (const char *)data, size, &s, &d) == 0) {
		chem_state_t st;
		/* mL of titrant: none, a little, a lot */
		(void)chem_solve(&s, 0.0, &st);
		(void)chem_solve(&s, 1.0, &st);
		(void)chem_solve(&s, 50.0, &st);
	}
	diag_free(&d);
	return 0;
}
