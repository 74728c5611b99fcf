/* main.c: runner for SPEED() functions (see speed.h). */
#include "speed.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#define SPEED_MAX 64

struct speed_entry {
	const char *name;
	const char *file;
	speed_fn fn;
};
static struct speed_entry measures[SPEED_MAX];
static int n_measures;

void speed_register(const char *name, const char *file, speed_fn fn)
{
	if (n_measures >= SPEED_MAX)
		return;
	measures[n_measures].name = name;
	measures[n_measures].file = file;
	measures[n_measures].fn = fn;
	n_measures++;
}

double speed_cpu_s(void)
{
	struct timespec ts;
	clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
	return (double)ts.tv_sec + (double)ts.tv_nsec * 1e-9;
}

double speed_wall_s(void)
{
	struct timespec ts;
	clock_gettime(CLOCK_MONOTONIC, &ts);
	return (double)ts.tv_sec + (double)ts.tv_nsec * 1e-9;
}

static int by_file(const void *a, const void *b)
{
	const struct speed_entry *x = a, *y = b;
	int c = strcmp(x->file, y->file);
	return c ? c : strcmp(x->name, y->name);
}

int main(int argc, char **argv)
{
	const char *filter = argc > 1 ? argv[1] : NULL;
	qsort(measures, (size_t)n_measures, sizeof measures[0], by_file);
	setvbuf(stdout, NULL, _IOLBF, 0);
	for (int i = 0; i < n_measures; i++) {
		if (filter && !strstr(measures[i].name, filter))
			continue;
		printf("== speed %s\n", measures[i].name);
		measures[i].fn();
	}
	return 0;
}
