/* harness.c: registry and runner for TEST() functions (see harness.h). */
#include "harness.h"

#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>

#define HARNESS_MAX 2048

struct harness_entry {
	const char *name;
	const char *file;
	harness_fn fn;
};
static struct harness_entry tests[HARNESS_MAX];
static int n_tests;
static int current_failed;

void harness_register(const char *name, const char *file, harness_fn fn)
{
	if (n_tests >= HARNESS_MAX) {
		fprintf(stderr, "harness: more than %d tests\n", HARNESS_MAX);
		exit(2);
	}
	tests[n_tests].name = name;
	tests[n_tests].file = file;
	tests[n_tests].fn = fn;
	n_tests++;
}

void harness_fail(const char *file, int line, const char *fmt, ...)
{
	va_list ap;
	fprintf(stdout, "  %s:%d: ", file, line);
	va_start(ap, fmt);
	vfprintf(stdout, fmt, ap);
	va_end(ap);
	fputc('\n', stdout);
	current_failed = 1;
}

bool harness_quick(void)
{
	const char *q = getenv("STOPCOCK_QUICK");
	return q && *q && *q != '0';
}

static int by_file_then_name(const void *a, const void *b)
{
	const struct harness_entry *x = a, *y = b;
	int c = strcmp(x->file, y->file);
	return c ? c : strcmp(x->name, y->name);
}

int main(int argc, char **argv)
{
	const char *filter = argc > 1 ? argv[1] : NULL;
	int passed = 0, failed = 0;
	qsort(tests, (size_t)n_tests, sizeof tests[0], by_file_then_name);
	setvbuf(stdout, NULL, _IOLBF, 0);
	for (int i = 0; i < n_tests; i++) {
		if (filter && !strstr(tests[i].name, filter) && !strstr(tests[i].file, filter))
			continue;
		current_failed = 0;
		tests[i].fn();
		if (current_failed) {
			printf("FAIL %s (%s)\n", tests[i].name, tests[i].file);
			failed++;
		} else {
			printf("ok   %s\n", tests[i].name);
			passed++;
		}
	}
	printf("%d passed, %d failed\n", passed, failed);
	return failed ? 1 : 0;
}
