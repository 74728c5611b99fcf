/* fuzz_config.c: libFuzzer target for the daemon configuration
 * (cfg_load, which reads a path: each input is written to one scratch file)
 * plus what stopcockd checks next: each station's device subtrees through
 * their drivers' configure ops (no I/O), the calibration and
 * standardization sections, and the write-token file (cfg_load_tokens) from
 * the same bytes. */
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <unistd.h>

#include "calib.h"
#include "config.h"
#include "diag.h"
#include "drv.h"
#include "standardization.h"

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

static char path[64];

static void remove_scratch(void)
{
	unlink(path);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
	if (!path[0]) {
		snprintf(path, sizeof path, "/tmp/stopcock-fuzz-config-%ld.yaml", (long)getpid());
		atexit(remove_scratch);
	}
	FILE *f = fopen(path, "wb");
	if (!f)
		abort();
	if (size && fwrite(data, 1, size, f) != size)
		abort();
	fclose(f);

	cfg_t *c = calloc(1, sizeof *c);
	diag_list_t d = DIAG_LIST_INIT;
	if (!c)
		abort();
	if (cfg_load(path, c, &d) == 0) {
		for (int i = 0; i < c->n_stations; i++) {
			const cfg_station_t *st = &c->stations[i];
			drv_burette_t b = {0};
			drv_probe_t p = {0};
			drv_stirrer_t s = {0};
			if (st->burette && drv_burette_configure(&c->doc, st->burette, &b, &d) == 0)
				drv_burette_close(&b);
			if (st->probe && drv_probe_configure(&c->doc, st->probe, &p, &d) == 0)
				drv_probe_close(&p);
			if (st->stirrer && drv_stirrer_configure(&c->doc, st->stirrer, &s, &d) == 0)
				drv_stirrer_close(&s);
		}
		calib_config_t cc;
		standardization_config_t sc;
		if (c->calibration)
			(void)calib_config_parse(&c->doc, c->calibration, &cc, &d);
		if (c->standardization)
			(void)standardization_config_parse(&c->doc, c->standardization, &sc, &d);
	}
	cfg_free(c);
	free(c);
	diag_free(&d);

	cfg_tokens_t *t = calloc(1, sizeof *t);
	if (!t)
		abort();
	(void)cfg_load_tokens(path, t, &d);
	free(t);
	diag_free(&d);
	return 0;
}
