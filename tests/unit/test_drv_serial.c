/* The serial transport over a pseudo-terminal pair: lines split across
 * writes, leading garbage, overlong lines, deadlines, hang-up. */
#include <fcntl.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "harness.h"
#include "serial.h"
#include "sim.h"
#include "clock.h"

static int pty_pair(char *link, size_t cap, int *master, int *slave)
{
	snprintf(link, cap, "/tmp/stopcock-unit-pty-%d", (int)getpid());
	return sim_pty_open(link, master, slave);
}

static void put(int fd, const char *s)
{
	ssize_t n = write(fd, s, strlen(s));
	(void)n;
}

TEST(drv_serial_pty_lines)
{
	char link[128];
	int m, sl;
	REQUIRE(pty_pair(link, sizeof(link), &m, &sl) == 0);
	link_serial_t cfg = {.baud = 9600, .parity = 'N', .stop_bits = 1, .timeout_ms = 200};
	snprintf(cfg.port, sizeof(cfg.port), "%s", link);
	serial_t s;
	serial_init(&s);
	drv_err_t e;
	REQUIRE(serial_open(&s, &cfg, &e) == DRV_OK);
	char line[64];

	/* one line in two writes, then two lines in one write */
	put(m, "AT 12");
	put(m, "3 IDLE\r\nOK\r\nBUSY\r\n");
	CHECK(serial_read_line(&s, "\r\n", line, sizeof(line), clock_mono_s() + 1, &e) == DRV_OK);
	CHECK_STR(line, "AT 123 IDLE");
	CHECK(serial_read_line(&s, "\r\n", line, sizeof(line), clock_mono_s() + 1, &e) == DRV_OK);
	CHECK_STR(line, "OK");
	CHECK(serial_read_line(&s, "\r\n", line, sizeof(line), clock_mono_s() + 1, &e) == DRV_OK);
	CHECK_STR(line, "BUSY");

	/* NUL bytes dropped; garbage stays for the parser to skip */
	ssize_t w = write(m, "#\0~OK\r\n", 7);
	CHECK(w == 7);
	CHECK(serial_read_line(&s, "\r\n", line, sizeof(line), clock_mono_s() + 1, &e) == DRV_OK);
	CHECK_STR(line, "#~OK");

	/* a line too long for the caller is discarded whole; the next is read */
	char big[200];
	memset(big, 'x', sizeof(big) - 1);
	big[sizeof(big) - 1] = '\0';
	put(m, big);
	put(m, "\r\nOK\r\n");
	CHECK(serial_read_line(&s, "\r\n", line, sizeof(line), clock_mono_s() + 1, &e) == DRV_OK);
	CHECK_STR(line, "OK");

	/* no terminator: timeout at the deadline, not before */
	put(m, "partial");
	double t0 = clock_mono_s();
	CHECK(serial_read_line(&s, "\r\n", line, sizeof(line), t0 + 0.15, &e) == DRV_TIMEOUT);
	CHECK(clock_mono_s() - t0 >= 0.15);
	CHECK(clock_mono_s() - t0 < 2.0);

	/* drain drops what is pending */
	put(m, "stale\r\n");
	usleep(20000);
	serial_drain(&s);
	put(m, "fresh\r\n");
	CHECK(serial_read_line(&s, "\r\n", line, sizeof(line), clock_mono_s() + 1, &e) == DRV_OK);
	CHECK_STR(line, "fresh");

	/* writes reach the other end */
	CHECK(serial_write(&s, "STAT\n", 5, clock_mono_s() + 1, &e) == DRV_OK);
	char got[16] = "";
	usleep(20000);
	CHECK(read(m, got, sizeof(got) - 1) == 5);
	CHECK(!strncmp(got, "STAT\n", 5));

	/* hang-up: the far end closes -> unplugged, link closed */
	close(m);
	close(sl);
	t0 = clock_mono_s();
	CHECK(serial_read_line(&s, "\r\n", line, sizeof(line), t0 + 1, &e) == DRV_UNPLUGGED);
	CHECK(!serial_is_open(&s));
	CHECK(serial_write(&s, "X", 1, clock_mono_s() + 1, &e) == DRV_UNPLUGGED);
	serial_close(&s);
	unlink(link);

	/* a missing port is 'unplugged'; a non-terminal is a config error */
	snprintf(cfg.port, sizeof(cfg.port), "/nonexistent/tty");
	CHECK(serial_open(&s, &cfg, &e) == DRV_UNPLUGGED);
	snprintf(cfg.port, sizeof(cfg.port), "/dev/null");
	CHECK(serial_open(&s, &cfg, &e) == DRV_CONFIG);
}
