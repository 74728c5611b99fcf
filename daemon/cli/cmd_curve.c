/* cmd_curve.c: `stopcock curve S.yaml --ml 0,1,2.5,...`
 *
 * Prints the model's equilibrium state of scenario S after each titrant
 * volume, one "ml ph mv" line each (mL to 3 decimals, pH to 4, mV to 2), so
 * other tools and tests can hold the chemistry model against references.
 * Bad scenarios and bad volume lists are reported as file:line:col (the list
 * as "--ml:1:COL") with exit status 2.
 */
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "chem.h"
#include "scenario.h"
#include "cmd.h"
#include "diag.h"
#include "numparse.h"

#define CURVE_MAX_POINTS 100000

static void curve_usage(FILE *f)
{
	fprintf(f, "usage: stopcock curve S.yaml --ml 0,1,2.5,...\n"
	           "  prints a header line '# titrant_mL pH electrode_mV', then one line per\n"
	           "  volume: titrant added (mL), equilibrium pH, electrode potential (mV)\n");
}

/* Parse "0,1,2.5" into volumes (mL >= 0). Errors go to d at column of the item. */
static int parse_ml_list(const char *list, double **out, int *n_out, diag_list_t *d)
{
	const char *p = list;
	int n = 0, cap = 16;
	double *v = malloc((size_t)cap * sizeof *v);
	if (!v) {
		diag_add(d, "--ml", 1, 1, "out of memory");
		return -1;
	}
	for (;;) {
		const char *start = p;
		const char *comma = strchr(p, ',');
		size_t len = comma ? (size_t)(comma - p) : strlen(p);
		char item[64];
		int col = (int)(start - list) + 1;
		if (len == 0 || len >= sizeof item) {
			diag_add(d, "--ml", 1, col, "expected a volume in mL (got \"%.*s\")",
			         (int)(len < 40 ? len : 40), start);
			free(v);
			return -1;
		}
		memcpy(item, start, len);
		item[len] = '\0';
		double ml;
		if (!parse_decimal(item, &ml)) {
			diag_add(d, "--ml", 1, col, "expected a volume in mL (got \"%s\")", item);
			free(v);
			return -1;
		}
		if (ml < 0.0) {
			diag_add(d, "--ml", 1, col, "volume must be at least 0 mL (got %s)", item);
			free(v);
			return -1;
		}
		if (n == CURVE_MAX_POINTS) {
			diag_add(d, "--ml", 1, col, "more than %d volumes", CURVE_MAX_POINTS);
			free(v);
			return -1;
		}
		if (n == cap) {
			double *nv = realloc(v, (size_t)cap * 2 * sizeof *v);
			if (!nv) {
				diag_add(d, "--ml", 1, col, "out of memory");
				free(v);
				return -1;
			}
			v = nv;
			cap *= 2;
		}
		v[n++] = ml;
		if (!comma)
			break;
		p = comma + 1;
	}
	*out = v;
	*n_out = n;
	return 0;
}

int cmd_curve(int argc, char **argv)
{
	const char *path = NULL, *ml_list = NULL;
	diag_list_t d = DIAG_LIST_INIT;
	chem_scenario_t scn;
	double *ml = NULL;
	int n_ml = 0, rc = 2;

	for (int i = 1; i < argc; i++) {
		if (!strcmp(argv[i], "-h") || !strcmp(argv[i], "--help")) {
			curve_usage(stdout);
			return 0;
		} else if (!strcmp(argv[i], "--ml") && i + 1 < argc) {
			ml_list = argv[++i];
		} else if (!strcmp(argv[i], "--ml")) {
			fprintf(stderr, "stopcock curve: --ml needs a list of volumes in mL\n");
			return 2;
		} else if (!strncmp(argv[i], "--ml=", 5)) {
			ml_list = argv[i] + 5;
		} else if (argv[i][0] == '-' && argv[i][1] != '\0') {
			fprintf(stderr, "stopcock curve: unknown option '%s'\n", argv[i]);
			curve_usage(stderr);
			return 2;
		} else if (!path) {
			path = argv[i];
		} else {
			fprintf(stderr, "stopcock curve: one scenario file only (got '%s')\n",
			        argv[i]);
			return 2;
		}
	}
	if (!path || !ml_list) {
		curve_usage(stderr);
		return 2;
	}
	if (scenario_load(path, &scn, &d) != 0 || parse_ml_list(ml_list, &ml, &n_ml, &d) != 0) {
		diag_print(&d, stderr);
		goto out;
	}
	/* A header so a reader knows each column's unit; '#' lets plotting tools
	 * (gnuplot, numpy.loadtxt) skip it as a comment. */
	printf("# titrant_mL pH electrode_mV\n");
	for (int i = 0; i < n_ml; i++) {
		chem_state_t st;
		if (chem_solve(&scn, ml[i], &st) != 0) {
			fprintf(stderr, "stopcock curve: %s: the model cannot use this scenario\n",
			        path);
			rc = 1;
			goto out;
		}
		double mv = chem_mv_from_ph(scn.electrode.offset_mv, scn.electrode.slope_pct, st.ph,
		                            scn.temperature_c);
		printf("%.3f %.4f %.2f\n", ml[i], st.ph, mv);
	}
	rc = fflush(stdout) == 0 ? 0 : 1;
out:
	free(ml);
	diag_free(&d);
	return rc;
}
