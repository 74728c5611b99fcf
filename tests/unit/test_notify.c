/* test_notify.c: notify.c against a real AF_UNIX datagram socket standing in
 * for systemd's NOTIFY_SOCKET (the protocol of sd_notify(3)). */
#include "harness.h"
#include "notify.h"

#include <poll.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/socket.h>
#include <sys/types.h>
#include <sys/un.h>
#include <unistd.h>

struct fake_systemd {
	int fd;
	char path[108]; /* "" for an abstract socket */
};

/* Bind a datagram socket and point NOTIFY_SOCKET at it. abstract: use the
 * Linux abstract namespace ("@name" in NOTIFY_SOCKET), as systemd may. */
static bool fake_open(struct fake_systemd *f, bool abstract)
{
	struct sockaddr_un sa = {.sun_family = AF_UNIX};
	socklen_t len;
	char env[120];
	f->fd = socket(AF_UNIX, SOCK_DGRAM | SOCK_CLOEXEC, 0);
	f->path[0] = '\0';
	if (f->fd < 0)
		return false;
	if (abstract) {
		int n = snprintf(sa.sun_path + 1, sizeof sa.sun_path - 1, "stopcock-notify-%d",
		                 (int)getpid());
		len = (socklen_t)(offsetof(struct sockaddr_un, sun_path) + 1 + (size_t)n);
		snprintf(env, sizeof env, "@%s", sa.sun_path + 1);
	} else {
		snprintf(f->path, sizeof f->path, "/tmp/stopcock-notify-%d.sock", (int)getpid());
		unlink(f->path);
		snprintf(sa.sun_path, sizeof sa.sun_path, "%s", f->path);
		len = (socklen_t)sizeof sa;
		snprintf(env, sizeof env, "%s", f->path);
	}
	if (bind(f->fd, (struct sockaddr *)&sa, len) != 0) {
		close(f->fd);
		f->fd = -1;
		return false;
	}
	setenv("NOTIFY_SOCKET", env, 1);
	return true;
}

static void fake_close(struct fake_systemd *f)
{
	unsetenv("NOTIFY_SOCKET");
	if (f->fd >= 0)
		close(f->fd);
	if (f->path[0])
		unlink(f->path);
}

/* One datagram as a string, or "" after 1 s (a deadline, never a hang). */
static const char *fake_recv(struct fake_systemd *f, char *buf, size_t size)
{
	struct pollfd p = {.fd = f->fd, .events = POLLIN};
	buf[0] = '\0';
	if (poll(&p, 1, 1000) != 1)
		return buf;
	ssize_t n = recv(f->fd, buf, size - 1, 0);
	buf[n > 0 ? n : 0] = '\0';
	return buf;
}

/* Nothing pending on the socket (checked without waiting long). */
static bool fake_quiet(struct fake_systemd *f)
{
	struct pollfd p = {.fd = f->fd, .events = POLLIN};
	return poll(&p, 1, 20) == 0;
}

TEST(notify_sends_each_message_to_path_socket)
{
	struct fake_systemd f;
	char buf[600];
	REQUIRE(fake_open(&f, false));
	CHECK(notify_ready() > 0);
	CHECK_STR(fake_recv(&f, buf, sizeof buf), "READY=1");
	CHECK(notify_watchdog() > 0);
	CHECK_STR(fake_recv(&f, buf, sizeof buf), "WATCHDOG=1");
	CHECK(notify_reloading() > 0);
	CHECK_STR(fake_recv(&f, buf, sizeof buf), "RELOADING=1");
	CHECK(notify_stopping() > 0);
	CHECK_STR(fake_recv(&f, buf, sizeof buf), "STOPPING=1");
	CHECK(notify_status("%d stations, %s", 3, "1 running") > 0);
	CHECK_STR(fake_recv(&f, buf, sizeof buf), "STATUS=3 stations, 1 running");
	CHECK(fake_quiet(&f));
	fake_close(&f);
}

TEST(notify_status_folds_newlines_into_one_line)
{
	struct fake_systemd f;
	char buf[600];
	REQUIRE(fake_open(&f, false));
	/* A newline would smuggle a second assignment (READY=1) into the datagram. */
	CHECK(notify_status("station sim1\nREADY=1") > 0);
	CHECK_STR(fake_recv(&f, buf, sizeof buf), "STATUS=station sim1 READY=1");
	fake_close(&f);
}

TEST(notify_status_truncates_long_text)
{
	struct fake_systemd f;
	char buf[2000], longtext[1500];
	REQUIRE(fake_open(&f, false));
	memset(longtext, 'x', sizeof longtext - 1);
	longtext[sizeof longtext - 1] = '\0';
	CHECK(notify_status("%s", longtext) > 0);
	const char *got = fake_recv(&f, buf, sizeof buf);
	CHECK(strncmp(got, "STATUS=xxx", 10) == 0);
	CHECK(strlen(got) < 512);
	fake_close(&f);
}

TEST(notify_sends_to_abstract_socket)
{
	struct fake_systemd f;
	char buf[600];
	REQUIRE(fake_open(&f, true));
	CHECK(notify_ready() > 0);
	CHECK_STR(fake_recv(&f, buf, sizeof buf), "READY=1");
	fake_close(&f);
}

TEST(notify_is_noop_without_socket)
{
	unsetenv("NOTIFY_SOCKET");
	CHECK_INT(notify_ready(), 0);
	CHECK_INT(notify_watchdog(), 0);
	CHECK_INT(notify_status("x"), 0);
}

TEST(notify_reports_send_failure)
{
	/* A socket path nobody listens on: the send fails with an errno. */
	setenv("NOTIFY_SOCKET", "/tmp/stopcock-notify-nobody-listens.sock", 1);
	unlink("/tmp/stopcock-notify-nobody-listens.sock");
	CHECK(notify_ready() < 0);
	unsetenv("NOTIFY_SOCKET");
}

TEST(notify_watchdog_interval_from_environment)
{
	char pid[32];
	snprintf(pid, sizeof pid, "%d", (int)getpid());

	unsetenv("WATCHDOG_USEC");
	unsetenv("WATCHDOG_PID");
	CHECK_INT(notify_watchdog_interval_us(), 0);

	setenv("WATCHDOG_USEC", "20000000", 1);
	CHECK_INT(notify_watchdog_interval_us(), 20000000); /* no PID: meant for us */
	setenv("WATCHDOG_PID", pid, 1);
	CHECK_INT(notify_watchdog_interval_us(), 20000000);

	/* Meant for another process (e.g. the parent of a forked helper). */
	setenv("WATCHDOG_PID", "1", 1);
	CHECK_INT(notify_watchdog_interval_us(), 0);

	setenv("WATCHDOG_PID", pid, 1);
	setenv("WATCHDOG_USEC", "0", 1);
	CHECK_INT(notify_watchdog_interval_us(), 0);
	setenv("WATCHDOG_USEC", "soon", 1);
	CHECK_INT(notify_watchdog_interval_us(), 0);

	unsetenv("WATCHDOG_USEC");
	unsetenv("WATCHDOG_PID");
}

TEST(notify_heartbeats_fresh_gates_watchdog)
{
	const uint64_t max_age_us = 5000000; /* half a 10 s WatchdogSec */
	uint64_t beats[3] = {100000000, 101000000, 104000000};
	CHECK(notify_heartbeats_fresh(beats, 3, 105000000, max_age_us));
	/* The oldest station is exactly at the limit: still fresh. */
	CHECK(notify_heartbeats_fresh(beats, 3, 105000000 + 0, max_age_us));
	CHECK(notify_heartbeats_fresh(beats, 3, 100000000 + max_age_us, max_age_us));
	/* One microsecond later station 0 is stale, so no ping. */
	CHECK(!notify_heartbeats_fresh(beats, 3, 100000000 + max_age_us + 1, max_age_us));
	/* A station that never checked in is stale. */
	beats[1] = 0;
	CHECK(!notify_heartbeats_fresh(beats, 3, 104500000, max_age_us));
	/* A beat written after `now` was read counts as fresh. */
	beats[1] = 106000000;
	CHECK(notify_heartbeats_fresh(beats, 3, 104500000, max_age_us));
	CHECK(notify_heartbeats_fresh(NULL, 0, 1, max_age_us));
}

TEST(notify_now_us_is_monotonic)
{
	uint64_t a = notify_now_us();
	uint64_t b = notify_now_us();
	CHECK(a > 0);
	CHECK(b >= a);
}
