/* clock.h: the one clock of every program.
 *
 * Monotonic seconds for deadlines, intervals and timeouts (never steps when
 * the wall clock is set); wall-clock seconds since the Unix epoch for what
 * people and records see. Both as double seconds: a double holds Unix time
 * to better than a microsecond for the next few centuries, finer than any
 * deadline here needs.
 */
#ifndef STOPCOCK_CLOCK_H
#define STOPCOCK_CLOCK_H

/* Seconds on CLOCK_MONOTONIC: only differences mean anything. */
double clock_mono_s(void);

/* Seconds since 1970-01-01T00:00:00Z on CLOCK_REALTIME. */
double clock_wall_s(void);

/* Sleep for s seconds (s <= 0 returns at once), resuming after signals. */
void clock_sleep_s(double s);

#endif
