/* cmd_check.c: `stopcock check [-c stopcockd.yaml] [--station NAME] METHOD.yaml...`
 *
 * Validates method files offline, exactly as the daemon will when it loads
 * them (same method_load). Each error goes to stderr as "file:line:col:
 * message"; each good file prints one line on stdout with its id, revision
 * and sha256, the fingerprint runs will record. With -c, volumes are also
 * checked against the stations of that daemon config, as the daemon does:
 * the one named by --station, else the smallest vessel and the smallest
 * burette of all, so a method that passes fits every station. The burette's
 * capacity comes from its driver's configuration (parsed, never opened).
 * A method's add steps must name dosers every such station has, and the
 * beaker must hold sample, additions and titrant (docs/methods.md, "Steps").
 * Exit 0 when every file is valid, 2 otherwise.
 */
#include <stdio.h>
#include <string.h>

#include "cmd.h"
#include "config.h"
#include "diag.h"
#include "drv.h"
#include "method.h"

static void usage(FILE *f)
{
	fprintf(f, "usage: stopcock check [-c stopcockd.yaml] [--station NAME] METHOD.yaml...\n"
	           "  -c, --config FILE   also hold the methods against this daemon config's\n"
	           "                      station limits\n"
	           "      --station NAME  only that station of the config\n");
}

int cmd_check(int argc, char **argv)
{
	const char *config_path = NULL, *station = NULL;
	method_limits_t lim = {0};
	bool have_lim = false;
	int first = 0, bad = 0, i;

	for (i = 1; i < argc; i++) {
		if (!strcmp(argv[i], "-h") || !strcmp(argv[i], "--help")) {
			usage(stdout);
			return 0;
		} else if ((!strcmp(argv[i], "-c") || !strcmp(argv[i], "--config")) &&
		           i + 1 < argc) {
			config_path = argv[++i];
		} else if (!strcmp(argv[i], "--station") && i + 1 < argc) {
			station = argv[++i];
		} else if (!strcmp(argv[i], "--")) {
			i++;
			break;
		} else if (argv[i][0] == '-' && argv[i][1] != '\0') {
			fprintf(stderr, "stopcock check: unknown option '%s'\n", argv[i]);
			usage(stderr);
			return 2;
		} else {
			break;
		}
	}
	first = i;
	if (first >= argc) {
		usage(stderr);
		return 2;
	}
	if (station && !config_path) {
		fprintf(stderr, "stopcock check: --station needs -c stopcockd.yaml\n");
		return 2;
	}

	if (config_path) {
		cfg_t cfg;
		diag_list_t cd = DIAG_LIST_INIT;
		memset(&cfg, 0, sizeof cfg);
		if (cfg_load(config_path, &cfg, &cd) != 0) {
			diag_print(&cd, stderr);
			diag_free(&cd);
			cfg_free(&cfg);
			return 2;
		}
		diag_free(&cd);
		if (station && !cfg_station(&cfg, station)) {
			fprintf(stderr, "stopcock check: %s has no station '%s'\n", config_path,
			        station);
			cfg_free(&cfg);
			return 2;
		}
		/* The same rule as the daemon's (method_limits_add_station). */
		method_limits_init(&lim);
		for (int s = 0; s < cfg.n_stations; s++) {
			const cfg_station_t *st = &cfg.stations[s];
			drv_burette_t b = {0};
			drv_burette_info_t info = {0};
			diag_list_t bd = DIAG_LIST_INIT;
			if (station && strcmp(st->name, station) != 0)
				continue;
			if (drv_burette_configure(&cfg.doc, st->burette, &b, &bd) == 0) {
				drv_burette_info(&b, &info);
				method_limits_add_station(&lim, st->vessel_max_ml,
				                          info.capacity_ml);
				drv_burette_close(&b);
			} else {
				/* cfg_load accepted the file, so this is the
				 * driver's own check: report it, it matters. */
				diag_print(&bd, stderr);
				diag_free(&bd);
				cfg_free(&cfg);
				return 2;
			}
			diag_free(&bd);
			/* Each doser's driver is checked like the burette's; the
			 * method's add steps may name only the dosers every
			 * station given has. */
			char names[CFG_MAX_DOSERS][METHOD_ID_MAX];
			for (int k = 0; k < st->n_dosers; k++) {
				drv_burette_t db = {0};
				diag_list_t dd = DIAG_LIST_INIT;
				if (drv_burette_configure(&cfg.doc, st->dosers[k].burette, &db,
				                          &dd) != 0) {
					diag_print(&dd, stderr);
					diag_free(&dd);
					cfg_free(&cfg);
					return 2;
				}
				drv_burette_close(&db);
				diag_free(&dd);
				snprintf(names[k], METHOD_ID_MAX, "%s", st->dosers[k].name);
			}
			method_limits_add_dosers(&lim, (const char(*)[METHOD_ID_MAX])names,
			                         st->n_dosers);
			have_lim = true;
		}
		cfg_free(&cfg);
	}

	for (i = first; i < argc; i++) {
		method_t m;
		diag_list_t d = DIAG_LIST_INIT;
		if (method_load(argv[i], have_lim ? &lim : NULL, &m, &d) != 0) {
			diag_print(&d, stderr);
			if (d.n == 0)
				fprintf(stderr, "%s:0:0: invalid method\n", argv[i]);
			bad++;
		} else {
			printf("%s: ok (method %s, revision %ld, sha256 %s)\n", argv[i], m.id,
			       m.revision, m.sha256);
			char warn[8][256];
			int nw = method_warnings(&m, have_lim, warn, 8);
			for (int k = 0; k < nw; k++)
				fprintf(stderr, "%s: warning: %s\n", argv[i], warn[k]);
		}
		diag_free(&d);
	}
	return bad ? 2 : 0;
}
