/* serial.c: termios + poll byte transport with deadlines (see serial.h). */
#include <errno.h>
#include <fcntl.h>
#include <poll.h>
#include <string.h>
#include <termios.h>
#include <unistd.h>

#include "serial.h"
#include "clock.h"

void serial_init(serial_t *s)
{
	memset(s, 0, sizeof(*s));
	s->fd = -1;
}

static speed_t baud_const(long baud)
{
	switch (baud) {
	case 1200:
		return B1200;
	case 2400:
		return B2400;
	case 4800:
		return B4800;
	case 9600:
		return B9600;
	case 19200:
		return B19200;
	case 38400:
		return B38400;
	case 57600:
		return B57600;
	case 115200:
		return B115200;
	case 230400:
		return B230400;
	case 460800:
		return B460800;
	case 921600:
		return B921600;
	default:
		return 0;
	}
}

drv_status_t serial_open(serial_t *s, const link_serial_t *cfg, drv_err_t *err)
{
	serial_close(s);
	speed_t sp = baud_const(cfg->baud);
	if (!sp)
		return drv_fail(err, DRV_CONFIG, "%s: baud %ld is not a standard rate", cfg->port,
		                cfg->baud);
	/* O_NONBLOCK: open must not wait for carrier; reads go through poll. */
	int fd = open(cfg->port, O_RDWR | O_NOCTTY | O_CLOEXEC | O_NONBLOCK);
	if (fd < 0) {
		int e = errno;
		return drv_fail(err, DRV_UNPLUGGED, "%s: cannot open: %s", cfg->port, strerror(e));
	}
	struct termios t;
	memset(&t, 0, sizeof(t));
	if (tcgetattr(fd, &t) != 0) {
		int e = errno;
		close(fd);
		return drv_fail(err, DRV_CONFIG, "%s: not a terminal: %s", cfg->port, strerror(e));
	}
	cfmakeraw(&t);
	t.c_cflag |= CLOCAL | CREAD;
	t.c_cflag &= ~(CSTOPB | PARENB | PARODD | CRTSCTS);
	if (cfg->stop_bits == 2)
		t.c_cflag |= CSTOPB;
	if (cfg->parity == 'E')
		t.c_cflag |= PARENB;
	else if (cfg->parity == 'O')
		t.c_cflag |= PARENB | PARODD;
	t.c_cc[VMIN] = 0;
	t.c_cc[VTIME] = 0;
	cfsetispeed(&t, sp);
	cfsetospeed(&t, sp);
	if (tcsetattr(fd, TCSANOW, &t) != 0) {
		int e = errno;
		close(fd);
		return drv_fail(err, DRV_CONFIG, "%s: cannot set line: %s", cfg->port, strerror(e));
	}
	tcflush(fd, TCIOFLUSH);
	s->fd = fd;
	s->rx_len = 0;
	return DRV_OK;
}

void serial_close(serial_t *s)
{
	if (s->fd >= 0)
		close(s->fd);
	s->fd = -1;
	s->rx_len = 0;
}

static int ms_left(double deadline_s)
{
	double left = deadline_s - clock_mono_s();
	if (left <= 0)
		return 0;
	return (int)(left * 1000.0) + 1;
}

static drv_status_t hung_up(serial_t *s, drv_err_t *err, const char *why)
{
	serial_close(s);
	return drv_fail(err, DRV_UNPLUGGED, "serial link hung up (%s)", why);
}

drv_status_t serial_write(serial_t *s, const void *buf, size_t n, double deadline_s, drv_err_t *err)
{
	const char *p = buf;
	if (s->fd < 0)
		return drv_fail(err, DRV_UNPLUGGED, "serial link is closed");
	while (n > 0) {
		ssize_t w = write(s->fd, p, n);
		if (w > 0) {
			p += w;
			n -= (size_t)w;
			continue;
		}
		if (w < 0 && errno == EINTR)
			continue;
		if (w < 0 && errno != EAGAIN)
			return hung_up(s, err, strerror(errno));
		int ms = ms_left(deadline_s);
		if (ms == 0)
			return drv_fail(err, DRV_TIMEOUT, "serial write did not finish in time");
		struct pollfd pf = {.fd = s->fd, .events = POLLOUT};
		int r = poll(&pf, 1, ms);
		if (r > 0 && (pf.revents & (POLLHUP | POLLERR | POLLNVAL)))
			return hung_up(s, err, "poll");
	}
	return DRV_OK;
}

void serial_drain(serial_t *s)
{
	s->rx_len = 0;
	if (s->fd < 0)
		return;
	tcflush(s->fd, TCIFLUSH);
	char junk[256];
	/* tcflush does not reach bytes a pty master wrote a moment ago on every
	 * kernel; read what is there without waiting. */
	for (int i = 0; i < 16; i++) {
		ssize_t r = read(s->fd, junk, sizeof(junk));
		if (r <= 0)
			break;
		s->discarded += (unsigned long)r;
	}
}

long serial_find_line(const char *buf, size_t len, const char *term, size_t *consumed)
{
	size_t tl = strlen(term);
	if (tl == 0 || len < tl)
		return -1;
	for (size_t i = 0; i + tl <= len; i++) {
		if (memcmp(buf + i, term, tl) == 0) {
			*consumed = i + tl;
			return (long)i;
		}
	}
	return -1;
}

drv_status_t serial_read_line(serial_t *s, const char *term, char *line, size_t cap,
                              double deadline_s, drv_err_t *err)
{
	bool overlong = false;
	for (;;) {
		size_t used;
		long ll = serial_find_line(s->rx, s->rx_len, term, &used);
		if (ll >= 0) {
			if (!overlong && (size_t)ll < cap) {
				memcpy(line, s->rx, (size_t)ll);
				line[ll] = '\0';
				memmove(s->rx, s->rx + used, s->rx_len - used);
				s->rx_len -= used;
				return DRV_OK;
			}
			/* the tail of an overlong line, or too long for the caller */
			s->discarded += used;
			memmove(s->rx, s->rx + used, s->rx_len - used);
			s->rx_len -= used;
			overlong = false;
			continue;
		}
		if (s->rx_len >= sizeof(s->rx) - 1) {
			/* no terminator in a full buffer: garbage; keep the last
			 * strlen(term)-1 bytes in case a terminator straddles. */
			size_t keep = strlen(term) - 1;
			s->discarded += s->rx_len - keep;
			memmove(s->rx, s->rx + s->rx_len - keep, keep);
			s->rx_len = keep;
			overlong = true;
		}
		if (s->fd < 0)
			return drv_fail(err, DRV_UNPLUGGED, "serial link is closed");
		int ms = ms_left(deadline_s);
		if (ms == 0)
			return drv_fail(err, DRV_TIMEOUT, "no complete reply in time");
		struct pollfd pf = {.fd = s->fd, .events = POLLIN};
		int r = poll(&pf, 1, ms);
		if (r < 0 && errno == EINTR)
			continue;
		if (r == 0)
			continue; /* deadline re-checked above */
		if (r < 0)
			return hung_up(s, err, strerror(errno));
		if (pf.revents & POLLIN) {
			ssize_t n = read(s->fd, s->rx + s->rx_len, sizeof(s->rx) - 1 - s->rx_len);
			if (n == 0)
				return hung_up(s, err, "end of file");
			if (n < 0) {
				if (errno == EAGAIN || errno == EINTR)
					continue;
				return hung_up(s, err, strerror(errno));
			}
			/* NUL bytes are never part of a reply; drop them so the line
			 * stays a C string. */
			size_t o = s->rx_len;
			for (ssize_t i = 0; i < n; i++) {
				char c = s->rx[s->rx_len + (size_t)i];
				if (c != '\0')
					s->rx[o++] = c;
				else
					s->discarded++;
			}
			s->rx_len = o;
		} else if (pf.revents & (POLLHUP | POLLERR | POLLNVAL)) {
			return hung_up(s, err, "poll");
		}
	}
}
