/* notify.c: see notify.h. A thin layer on libsystemd's sd_notify(3), which
 * already does the datagram protocol (abstract and path sockets) and returns
 * 0 when NOTIFY_SOCKET is unset. */
#include "notify.h"
#include "clock.h"

#include <errno.h>
#include <stdarg.h>
#include <stdio.h>
#include <systemd/sd-daemon.h>
#include <time.h>

/* unset_environment = 0 throughout: the daemon sends many messages over its
 * life, so NOTIFY_SOCKET must stay in the environment. */
int notify_ready(void)
{
	return sd_notify(0, "READY=1");
}

int notify_stopping(void)
{
	return sd_notify(0, "STOPPING=1");
}

int notify_reloading(void)
{
	return sd_notify(0, "RELOADING=1");
}

int notify_watchdog(void)
{
	return sd_notify(0, "WATCHDOG=1");
}

int notify_status(const char *fmt, ...)
{
	/* One line; systemctl status shows the first screenful anyway. */
	char msg[512] = "STATUS=";
	const size_t pre = sizeof "STATUS=" - 1;
	va_list ap;
	va_start(ap, fmt);
	int n = vsnprintf(msg + pre, sizeof msg - pre, fmt, ap);
	va_end(ap);
	if (n < 0)
		return -EINVAL;
	/* A newline would start a new KEY=VALUE assignment in the protocol. */
	for (char *p = msg + pre; *p; p++)
		if (*p == '\n' || *p == '\r')
			*p = ' ';
	return sd_notify(0, msg);
}

uint64_t notify_watchdog_interval_us(void)
{
	uint64_t usec = 0;
	/* sd_watchdog_enabled checks WATCHDOG_PID against getpid() and parses
	 * WATCHDOG_USEC; it returns > 0 only when the watchdog is for us. */
	if (sd_watchdog_enabled(0, &usec) <= 0)
		return 0;
	return usec;
}

uint64_t notify_now_us(void)
{
	/* The toolbox clock in whole microseconds: systemd counts the watchdog
	 * in microseconds. A double holds uptime to well under 1 us. */
	return (uint64_t)(clock_mono_s() * 1e6);
}

bool notify_heartbeats_fresh(const uint64_t *last_beat_us, size_t n, uint64_t now_us,
                             uint64_t max_age_us)
{
	for (size_t i = 0; i < n; i++) {
		uint64_t beat_us = last_beat_us[i];
		if (beat_us == 0)
			return false;
		if (beat_us < now_us && now_us - beat_us > max_age_us)
			return false;
	}
	return true;
}
