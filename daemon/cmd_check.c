/* cmd_check.c: `stopcock check [-c stopcockd.yaml] [--station NAME] METHOD.yaml...`
 *
 * Validates method files offline, exactly as the daemon will when it loads
 * them (same method_load). Each error goes to stderr as "file:line:col:
 * message"; each good file prints one line on stdout with its id, revision
 * and sha256, the fingerprint runs will record. With -c, volumes are also
 * checked against a station of that daemon config (the one named by
 * --station, else the one with the smallest vessel, so a method that passes
 * fits every station). Exit 0 when every file is valid, 2 otherwise.
 */
#include <stdio.h>
#include <string.h>

#include "cmd.h"
#include "config.h"
#include "diag.h"
#include "method.h"

static void usage(FILE *f)
{
	fprintf(f, "usage: stopcock check [-c stopcockd.yaml] [--station NAME] METHOD.yaml...\n");
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
		const cfg_station_t *st = NULL;
		memset(&cfg, 0, sizeof cfg);
		if (cfg_load(config_path, &cfg, &cd) != 0) {
			diag_print(&cd, stderr);
			diag_free(&cd);
			cfg_free(&cfg);
			return 2;
		}
		diag_free(&cd);
		if (station) {
			st = cfg_station(&cfg, station);
			if (!st) {
				fprintf(stderr, "stopcock check: %s has no station '%s'\n",
				        config_path, station);
				cfg_free(&cfg);
				return 2;
			}
		} else {
			for (int s = 0; s < cfg.n_stations; s++)
				if (!st || cfg.stations[s].vessel_max_ml < st->vessel_max_ml)
					st = &cfg.stations[s];
		}
		if (st) {
			/* The burette's capacity lives in its driver's profile; the
			 * daemon adds it when it loads methods for a station. */
			lim.vessel_max_ml = st->vessel_max_ml;
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
		}
		diag_free(&d);
	}
	return bad ? 2 : 0;
}
