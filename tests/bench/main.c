/* main.c: runner for BENCH() functions (see bench.h). */
#include "bench.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#define BENCH_MAX 64

struct bench_entry {
	const char *name;
	const char *file;
	bench_fn fn;
};
static struct bench_entry benches[BENCH_MAX];
static int n_benches;

void bench_register(const char *name, const char *file, bench_fn fn)
{
	if (n_benches >= BENCH_MAX)
		return;
	benches[n_benches].name = name;
	benches[n_benches].file = file;
	benches[n_benches].fn = fn;
	n_benches++;
}

double bench_cpu_s(void)
{
	struct timespec ts;
	clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
	return (double)ts.tv_sec + (double)ts.tv_nsec * 1e-9;
}

double bench_wall_s(void)
{
	struct timespec ts;
	clock_gettime(CLOCK_MONOTONIC, &ts);
	return (double)ts.tv_sec + (double)ts.tv_nsec * 1e-9;
}

static int by_file(const void *a, const void *b)
{
	const struct bench_entry *x = a, *y = b;
	int c = strcmp(x->file, y->file);
	return c ? c : strcmp(x->name, y->name);
}

int main(int argc, char **argv)
{
	const char *filter = argc > 1 ? argv[1] : NULL;
	qsort(benches, (size_t)n_benches, sizeof benches[0], by_file);
	setvbuf(stdout, NULL, _IOLBF, 0);
	for (int i = 0; i < n_benches; i++) {
		if (filter && !strstr(benches[i].name, filter))
			continue;
		printf("== bench %s\n", benches[i].name);
		benches[i].fn();
	}
	return 0;
}
