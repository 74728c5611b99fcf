/* notify.h: tell systemd how the daemon is doing (sd_notify(3) protocol).
 *
 * Every call is a no-op returning 0 when NOTIFY_SOCKET is unset (started by
 * hand, from a test, or by a unit that is not Type=notify), so the daemon calls
 * them unconditionally. They return > 0 when a message was sent, 0 when there
 * is nobody to tell, < 0 (a negative errno) when sending failed; the daemon may
 * log a failure once but must never stop because of it.
 *
 * How stopcockd must use them (systemd/stopcockd.service is Type=notify with
 * WatchdogSec=):
 *
 *   1. Start-up: open the store, start every station thread, and wait until
 *      each station's devices have answered once (burette status and a probe
 *      reading). Only then call notify_ready(). The wait is bounded (well
 *      under TimeoutStartSec=): a station still silent at its end is logged,
 *      stays offline (no runs) and is retried, and the daemon reports ready
 *      for the others. While waiting, notify_status("waiting for station %s",
 *      name) is shown by `systemctl status`.
 *
 *   2. Watchdog: notify_watchdog_interval_us() gives systemd's WatchdogSec in
 *      microseconds (0: no watchdog; then do not ping). A supervisor loop (the
 *      main thread, or a small thread of its own) wakes every interval/4 and
 *      calls notify_watchdog() ONLY when every station thread has checked in
 *      (its heartbeat, kept by station.c) within interval/2 and the HTTP server
 *      is still running; notify_heartbeats_fresh() below does that test. A hung
 *      station thread thus stops the pings, systemd kills the daemon (SIGABRT
 *      after WatchdogSec) and restarts it (Restart=on-failure); the new daemon
 *      starts with every burette halted and marks the runs it finds `running`
 *      as `interrupted`, never resuming them.
 *
 *   3. SIGHUP (reload method files): notify_reloading() first, reload, then
 *      notify_ready() again (systemd 252 waits for READY=1 after RELOADING=1).
 *
 *   4. SIGTERM/SIGINT: notify_stopping() at once, then halt every burette,
 *      finish writing and exit 0.
 *
 * notify_status() sets the one-line status `systemctl status` shows
 * ("3 stations, 1 running"); keep it short and update it on state changes,
 * not per reading.
 *
 * The functions are thread-safe (each is one datagram send).
 */
#ifndef STOPCOCK_NOTIFY_H
#define STOPCOCK_NOTIFY_H

#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>

int notify_ready(void);                                                        /* READY=1 */
int notify_stopping(void);                                                     /* STOPPING=1 */
int notify_reloading(void);                                                    /* RELOADING=1 */
int notify_watchdog(void);                                                     /* WATCHDOG=1 */
int notify_status(const char *fmt, ...) __attribute__((format(printf, 1, 2))); /* STATUS=... */

/* systemd's watchdog interval in microseconds, from WATCHDOG_USEC when
 * WATCHDOG_PID is unset or names this process; 0 when there is no watchdog
 * (unset, malformed, zero, or meant for another process). */
uint64_t notify_watchdog_interval_us(void);

/* CLOCK_MONOTONIC in microseconds: the clock for heartbeats (never steps). */
uint64_t notify_now_us(void);

/* True when every one of the n heartbeats (notify_now_us() values written by
 * the station threads) is at most max_age_us old at now_us. A heartbeat of 0
 * (never checked in) is stale. n == 0 is true: a daemon with no stations is
 * alive while its main loop runs. Heartbeats from the future (a race between
 * reading now and a thread writing its beat) count as fresh. */
bool notify_heartbeats_fresh(const uint64_t *last_beat_us, size_t n, uint64_t now_us,
                             uint64_t max_age_us);

#endif
