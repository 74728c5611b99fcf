/* serial.h: the byte transport under every serial driver.
 *
 * open(O_NOCTTY|O_CLOEXEC) + termios + poll: works on real UARTs and on
 * pseudo-terminals alike (libserialport 0.1.1 cannot open ptys; it is used
 * only to list ports, see cmd_ports.c). Framing and protocol code above this
 * layer is the same for both. Every read and write has a deadline on
 * CLOCK_MONOTONIC; a hang-up (read() == 0, POLLHUP, EIO) closes the link and
 * reports DRV_UNPLUGGED, and the next serial_open() may bring it back.
 */
#ifndef STOPCOCK_SERIAL_H
#define STOPCOCK_SERIAL_H

#include <stddef.h>

#include "drv.h"
#include "link.h"

#define SERIAL_RX_CAP 512

typedef struct serial {
	int fd;                 /* -1 when closed */
	char rx[SERIAL_RX_CAP]; /* bytes read but not yet taken as a line */
	size_t rx_len;
	unsigned long discarded; /* bytes thrown away while resynchronising */
} serial_t;

void serial_init(serial_t *s); /* closed, empty */
drv_status_t serial_open(serial_t *s, const link_serial_t *cfg, drv_err_t *err);
void serial_close(serial_t *s);
static inline int serial_is_open(const serial_t *s)
{
	return s->fd >= 0;
}

/* Write all n bytes before deadline_s (CLOCK_MONOTONIC seconds). */
drv_status_t serial_write(serial_t *s, const void *buf, size_t n, double deadline_s,
                          drv_err_t *err);

/* Drop pending input (kernel queue and our buffer): before a command, so a
 * late reply to an earlier one is never taken for this one's. */
void serial_drain(serial_t *s);

/* Read one line ending in `term` (e.g. "\r\n"; "" is not allowed) before
 * deadline_s. The line, without its terminator, is copied NUL-terminated into
 * line (at most cap-1 bytes). A line longer than the buffer is discarded
 * whole (resynchronising at the next terminator). NUL bytes are dropped. */
drv_status_t serial_read_line(serial_t *s, const char *term, char *line, size_t cap,
                              double deadline_s, drv_err_t *err);

/* Pure framer (tested from tables): find the first `term` in buf[0..len).
 * Returns the length of the line before it (and *consumed = line + term), or
 * -1 when no complete line is there. */
long serial_find_line(const char *buf, size_t len, const char *term, size_t *consumed);

#endif
