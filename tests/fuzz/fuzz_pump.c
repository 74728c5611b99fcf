/* fuzz_pump.c: libFuzzer target for the line devices' byte path: the framer
 * (serial_find_line) over the raw bytes, then the reply classifier
 * (pump_parse_reply) on every line, with both shipped pump profiles
 * (config/pumps; the fuzzer runs from the repository root); and the same
 * lines through the changer's classifier (changer_parse_reply, with
 * config/changers/sim.yaml), whose {lift} field the pump's lacks. */
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "changer_profile.h"
#include "diag.h"
#include "pump_profile.h"
#include "serial.h"

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

static pump_profile_t profiles[2];
static changer_profile_t changer;

static void load_profiles(void)
{
	static const char *const paths[2] = {"config/pumps/sim.yaml",
	                                     "config/pumps/generic-ascii.yaml"};
	for (int i = 0; i < 2; i++) {
		diag_list_t d = DIAG_LIST_INIT;
		if (pump_profile_load(paths[i], &profiles[i], &d) != 0) {
			diag_print(&d, stderr);
			fprintf(stderr, "fuzz_pump: run from the repository root\n");
			exit(1);
		}
		diag_free(&d);
	}
	diag_list_t d = DIAG_LIST_INIT;
	if (changer_profile_load("config/changers/sim.yaml", &changer, &d) != 0) {
		diag_print(&d, stderr);
		exit(1);
	}
	diag_free(&d);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
	static int loaded;
	if (!loaded) {
		load_profiles();
		loaded = 1;
	}
	const char *buf = (const char *)data;
	size_t off = 0;

	/* Every other byte of the first says which profile reads the line. */
	const pump_profile_t *p = &profiles[size && (data[0] & 1)];
	while (off < size) {
		size_t used = 0;
		long n = serial_find_line(buf + off, size - off, p->reply_end, &used);
		char line[256];
		pump_reply_t r;
		size_t take;

		if (n < 0) {
			take = size - off; /* the unterminated tail, as a line */
			used = take;
		} else {
			if ((size_t)n > size - off || used > size - off || used < (size_t)n)
				abort(); /* the framer pointed outside the buffer */
			take = (size_t)n;
		}
		if (used == 0)
			break;
		if (take >= sizeof line)
			take = sizeof line - 1; /* serial_read_line drops such lines */
		memcpy(line, buf + off, take);
		line[take] = '\0';
		if (pump_parse_reply(p, line, &r) != r.kind && r.kind != PUMP_REPLY_UNKNOWN)
			abort();
		changer_reply_t cr;
		if (changer_parse_reply(&changer, line, &cr) != cr.kind)
			abort();
		off += used;
	}
	return 0;
}
