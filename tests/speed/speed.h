/* speed.h: `make bench` runs every SPEED() of the files in tests/speed, in file order.
 * Speed measurements print their own tables; targets are printed beside figures
 * (met / NOT met), never asserted in unit tests. `speed [SUBSTRING]` filters. */
#ifndef STOPCOCK_SPEED_H
#define STOPCOCK_SPEED_H

typedef void (*speed_fn)(void);
void speed_register(const char *name, const char *file, speed_fn fn);
/* Monotonic CPU time of this thread, seconds. */
double speed_cpu_s(void);
/* Monotonic wall time, seconds. */
double speed_wall_s(void);

#define SPEED(name)                                                                                \
	static void speed_##name(void);                                                            \
	__attribute__((constructor)) static void speed_reg_##name(void)                            \
	{                                                                                          \
		speed_register(#name, __FILE__, speed_##name);                                     \
	}                                                                                          \
	static void speed_##name(void)

#endif
