/* clock.c: see clock.h. */
#include "clock.h"

#include <errno.h>
#include <math.h>
#include <time.h>

static double read_clock(clockid_t id)
{
	struct timespec ts;
	if (clock_gettime(id, &ts) != 0)
		return 0.0;
	return (double)ts.tv_sec + (double)ts.tv_nsec / 1e9;
}

double clock_mono_s(void)
{
	return read_clock(CLOCK_MONOTONIC);
}

double clock_wall_s(void)
{
	return read_clock(CLOCK_REALTIME);
}

void clock_sleep_s(double s)
{
	if (!(s > 0) || !isfinite(s))
		return;
	struct timespec ts;
	ts.tv_sec = (time_t)s;
	ts.tv_nsec = (long)((s - (double)ts.tv_sec) * 1e9);
	if (ts.tv_nsec > 999999999L)
		ts.tv_nsec = 999999999L;
	/* nanosleep leaves the unslept time in ts when a signal cuts it short. */
	while (nanosleep(&ts, &ts) != 0 && errno == EINTR)
		;
}
