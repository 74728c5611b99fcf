/* link.h: the link options every driver shares, defined once.
 *
 * Serial links (burettes):  port, baud, parity, stop_bits, timeout_ms, retries
 * Modbus links (probes, stirrers): transport (tcp | rtu), host, port (TCP),
 *   device, baud, parity, stop_bits, rs485 (RTU), unit, response_timeout_ms,
 *   retries
 * A driver checks its subtree's keys against LINK_*_KEYS plus its own.
 */
#ifndef STOPCOCK_LINK_H
#define STOPCOCK_LINK_H

#include <stdbool.h>

#include "diag.h"
#include "yamltree.h"

#define LINK_PATH_MAX 256

typedef struct link_serial {
	char port[LINK_PATH_MAX]; /* device path, e.g. /dev/ttyUSB0 or a pty symlink */
	long baud;                /* bits per second */
	char parity;              /* 'N', 'E' or 'O' */
	int stop_bits;            /* 1 or 2 */
	long timeout_ms;          /* deadline for one reply */
	long retries;             /* extra attempts after a timeout or bad reply */
} link_serial_t;

typedef enum { LINK_TCP = 0, LINK_RTU } link_transport_t;

typedef struct link_modbus {
	link_transport_t transport;
	char host[128];             /* tcp */
	long tcp_port;              /* tcp */
	char device[LINK_PATH_MAX]; /* rtu */
	long baud;                  /* rtu */
	char parity;                /* rtu: 'N', 'E', 'O' */
	int stop_bits;              /* rtu */
	bool rs485;                 /* rtu: switch the UART to RS-485 mode */
	long unit;                  /* Modbus unit (slave) id, 1..247 (0..255 on TCP) */
	long response_timeout_ms;   /* deadline for one reply */
	long retries;               /* extra attempts after a timeout */
} link_modbus_t;

/* The keys each kind of link takes (NULL-terminated), for yt_check_keys. */
extern const char *const link_serial_keys[];
extern const char *const link_modbus_keys[];

/* Build an allowed-key list: `a` then `b` (both NULL-terminated) into out
 * (cap entries incl. the NULL). Returns out. */
const char **link_keys_join(const char *const *a, const char *const *b, const char **out, int cap);

/* Parse the link options of map `cfg`. Defaults: baud 9600, parity none,
 * stop_bits 1, timeout_ms 500, retries 2; Modbus: transport tcp, port 502,
 * baud 19200, parity even, unit 1, response_timeout_ms 300, retries 1.
 * Returns 0, or -1 with errors in d. Unknown keys are the caller's check. */
int link_serial_parse(const yt_doc_t *doc, const yt_node_t *cfg, link_serial_t *out,
                      diag_list_t *d);
int link_modbus_parse(const yt_doc_t *doc, const yt_node_t *cfg, link_modbus_t *out,
                      diag_list_t *d);

#endif
