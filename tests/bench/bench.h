/* bench.h: `make bench` runs every BENCH() of the files in tests/bench, in file order.
 * Benchmarks print their own tables; targets are printed beside figures
 * (met / NOT met), never asserted in unit tests. `bench [SUBSTRING]` filters. */
#ifndef STOPCOCK_BENCH_H
#define STOPCOCK_BENCH_H

typedef void (*bench_fn)(void);
void bench_register(const char *name, const char *file, bench_fn fn);
/* Monotonic CPU time of this thread, seconds. */
double bench_cpu_s(void);
/* Monotonic wall time, seconds. */
double bench_wall_s(void);

#define BENCH(name)                                                                                \
	static void bench_##name(void);                                                            \
	__attribute__((constructor)) static void bench_reg_##name(void)                            \
	{                                                                                          \
		bench_register(#name, __FILE__, bench_##name);                                     \
	}                                                                                          \
	static void bench_##name(void)

#endif
