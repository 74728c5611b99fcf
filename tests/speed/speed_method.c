/* speed_method.c: how long method files take to read (the daemon reads every
 * file of methods_dir at start and on SIGHUP, and each PUT), formula
 * evaluation (once per result per run) and SHA-256 throughput. Targets are
 * our own: a method in under 1 ms, so reloading 100 methods is instant. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "speed.h"
#include "formula.h"
#include "method.h"
#include "digest.h"

static char *slurp(const char *path, size_t *len)
{
	FILE *f = fopen(path, "rb");
	char *buf = NULL;
	long n;
	if (!f)
		return NULL;
	if (fseek(f, 0, SEEK_END) == 0 && (n = ftell(f)) >= 0 && fseek(f, 0, SEEK_SET) == 0) {
		buf = malloc((size_t)n + 1);
		if (buf && fread(buf, 1, (size_t)n, f) != (size_t)n) {
			free(buf);
			buf = NULL;
		} else if (buf) {
			*len = (size_t)n;
		}
	}
	fclose(f);
	return buf;
}

SPEED(method_parse)
{
	size_t len = 0;
	char *text = slurp("config/methods/phosphate-two-endpoints.yaml", &len);
	method_t *m = malloc(sizeof *m);
	int rounds = 2000, bad = 0;
	double t0, us;
	if (!text || !m) {
		printf("method_parse: cannot read config/methods/phosphate-two-endpoints.yaml\n");
		free(text);
		free(m);
		return;
	}
	t0 = speed_cpu_s();
	for (int i = 0; i < rounds; i++) {
		diag_list_t d = DIAG_LIST_INIT;
		bad += method_parse("phosphate-two-endpoints.yaml", text, len, NULL, m, &d) != 0;
		diag_free(&d);
	}
	us = (speed_cpu_s() - t0) / rounds * 1e6;
	printf("method_parse (%zu-byte method, 3 formulas): %.1f us per file (target < 1000 us: "
	       "%s)%s\n",
	       len, us, us < 1000 ? "met" : "NOT met", bad ? " [PARSE FAILED]" : "");
	free(text);
	free(m);
}

/* A method of 20,000 unknown keys, about 258 KB (just under the 256 KiB
 * limit): reading it must stay linear in its keys, because the daemon reads
 * such a body on an HTTP worker (PUT /v1/methods, POST .../check). Target
 * our own: under 50 ms. */
SPEED(method_many_unknown_keys)
{
	enum { KEYS = 20000 };
	size_t base_len = 0, cap, len;
	char *base = slurp("config/methods/phosphate-two-endpoints.yaml", &base_len), *text;
	method_t *m = malloc(sizeof *m);
	diag_list_t d = DIAG_LIST_INIT;
	double t0, ms = 0;
	int rc = 0;
	cap = base_len + KEYS * 16;
	text = malloc(cap);
	if (!base || !m || !text) {
		printf("method_many_unknown_keys: cannot read "
		       "config/methods/phosphate-two-endpoints.yaml\n");
		goto out;
	}
	memcpy(text, base, base_len);
	len = base_len;
	for (int i = 0; i < KEYS; i++)
		len += (size_t)snprintf(text + len, cap - len, "unk%05dx: 1\n", i);
	/* The best of 5: the first run also pays for the heap's first pages. */
	for (int round = 0; round < 5; round++) {
		double one;
		diag_free(&d);
		t0 = speed_cpu_s();
		rc = method_parse("many-keys.yaml", text, len, NULL, m, &d);
		one = (speed_cpu_s() - t0) * 1e3;
		ms = round == 0 || one < ms ? one : ms;
	}
	printf("method_parse (%zu-byte method, %d unknown keys): %.1f ms, %zu errors (target < 50 "
	       "ms: %s)%s\n",
	       len, KEYS, ms, d.n, ms < 50 ? "met" : "NOT met",
	       rc == 0 || d.n < KEYS ? " [ERRORS MISSED]" : "");
out:
	diag_free(&d);
	free(text);
	free(base);
	free(m);
}

SPEED(formula_eval)
{
	formula_t f;
	formula_vars_t fv = {0};
	char msg[128];
	int col, rounds = 1000000;
	double sum = 0, out = 0, t0, ns;
	if (formula_compile("(2 * end1_ml - end2_ml) * titrant_molarity * titer * 50000 / amount",
	                    &f, msg, sizeof msg, &col) != 0) {
		printf("formula_eval: compile failed: %s\n", msg);
		return;
	}
	formula_vars_set(&fv, FV_END_ML + 1, 3.62);
	formula_vars_set(&fv, FV_TITRANT_MOLARITY, 0.02);
	formula_vars_set(&fv, FV_TITER, 1.0);
	formula_vars_set(&fv, FV_AMOUNT, 100.0);
	t0 = speed_cpu_s();
	for (int i = 0; i < rounds; i++) {
		formula_vars_set(&fv, FV_END_ML, 3.10 + i * 1e-9);
		formula_eval(&f, &fv, &out, msg, sizeof msg);
		sum += out;
	}
	ns = (speed_cpu_s() - t0) / rounds * 1e9;
	printf("formula_eval (%d ops): %.0f ns per evaluation (checksum %.3f)\n", f.n, ns,
	       sum / rounds);
}

SPEED(sha256)
{
	size_t len = 4 << 20;
	char *buf = malloc(len), hex[65];
	double t0, s;
	if (!buf)
		return;
	memset(buf, 'x', len);
	t0 = speed_cpu_s();
	digest_sha256_hex(buf, len, hex);
	s = speed_cpu_s() - t0;
	printf("sha256: %.0f MB/s (4 MiB in %.1f ms; a 256 KiB method in %.2f ms)\n", len / s / 1e6,
	       s * 1e3, s * 1e3 / 16);
	free(buf);
}
