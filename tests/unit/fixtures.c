/* fixtures.c: see fixtures.h. */
#include "fixtures.h"

#include <stdio.h>
#include <string.h>

bool fixture_method(const char *yaml, method_t *m)
{
	diag_list_t d = DIAG_LIST_INIT;
	int rc = method_parse("test-method", yaml, strlen(yaml), NULL, m, &d);
	if (rc != 0)
		diag_print(&d, stderr);
	diag_free(&d);
	return rc == 0;
}

bool fixture_scenario(const char *yaml, chem_scenario_t *s)
{
	diag_list_t d = DIAG_LIST_INIT;
	int rc = scenario_parse("test-scenario", yaml, strlen(yaml), s, &d);
	if (rc != 0)
		diag_print(&d, stderr);
	diag_free(&d);
	return rc == 0;
}
