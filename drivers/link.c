/* link.c: the shared link options (see link.h), parsed once for all drivers. */
#include <string.h>

#include "link.h"

const char *const link_serial_keys[] = {"driver",    "port",       "baud",    "parity",
                                        "stop_bits", "timeout_ms", "retries", NULL};
const char *const link_modbus_keys[] = {"driver",
                                        "transport",
                                        "host",
                                        "port",
                                        "device",
                                        "baud",
                                        "parity",
                                        "stop_bits",
                                        "rs485",
                                        "unit",
                                        "response_timeout_ms",
                                        "retries",
                                        NULL};

static const char *const parity_words[] = {"none", "even", "odd", NULL};
static const char parity_chars[] = {'N', 'E', 'O'};

const char **link_keys_join(const char *const *a, const char *const *b, const char **out, int cap)
{
	int n = 0;
	for (; a && *a && n < cap - 1; a++)
		out[n++] = *a;
	for (; b && *b && n < cap - 1; b++)
		out[n++] = *b;
	out[n] = NULL;
	return out;
}

/* Common serial line settings (also used by Modbus RTU). */
static int parse_line(const yt_doc_t *doc, const yt_node_t *cfg, long *baud, char *parity,
                      int *stop_bits, diag_list_t *d)
{
	int bad = 0;
	const yt_node_t *n;
	if ((n = yt_get(cfg, "baud")) && !yt_long(doc, n, "baud", 50, 4000000, baud, d))
		bad = 1;
	if ((n = yt_get(cfg, "parity"))) {
		int i;
		if (yt_enum(doc, n, "parity", parity_words, &i, d))
			*parity = parity_chars[i];
		else
			bad = 1;
	}
	if ((n = yt_get(cfg, "stop_bits"))) {
		long sb;
		if (yt_long(doc, n, "stop_bits", 1, 2, &sb, d))
			*stop_bits = (int)sb;
		else
			bad = 1;
	}
	return bad ? -1 : 0;
}

int link_serial_parse(const yt_doc_t *doc, const yt_node_t *cfg, link_serial_t *out, diag_list_t *d)
{
	memset(out, 0, sizeof(*out));
	out->baud = 9600;
	out->parity = 'N';
	out->stop_bits = 1;
	out->timeout_ms = 500;
	out->retries = 2;
	int bad = 0;
	const yt_node_t *n = yt_get(cfg, "port");
	if (!n) {
		yt_missing(doc, cfg, "port", "serial link", d);
		bad = 1;
	} else if (!yt_string(doc, n, "port", out->port, sizeof(out->port), d)) {
		bad = 1;
	}
	if (parse_line(doc, cfg, &out->baud, &out->parity, &out->stop_bits, d))
		bad = 1;
	if ((n = yt_get(cfg, "timeout_ms")) &&
	    !yt_long(doc, n, "timeout_ms", 10, 60000, &out->timeout_ms, d))
		bad = 1;
	if ((n = yt_get(cfg, "retries")) && !yt_long(doc, n, "retries", 0, 10, &out->retries, d))
		bad = 1;
	return bad ? -1 : 0;
}

static const char *const transport_words[] = {"tcp", "rtu", NULL};

int link_modbus_parse(const yt_doc_t *doc, const yt_node_t *cfg, link_modbus_t *out, diag_list_t *d)
{
	memset(out, 0, sizeof(*out));
	out->transport = LINK_TCP;
	out->tcp_port = 502;
	out->baud = 19200;
	out->parity = 'E';
	out->stop_bits = 1;
	out->unit = 1;
	out->response_timeout_ms = 300;
	out->retries = 1;
	int bad = 0;
	const yt_node_t *n;
	if ((n = yt_get(cfg, "transport"))) {
		int i;
		if (yt_enum(doc, n, "transport", transport_words, &i, d))
			out->transport = (link_transport_t)i;
		else
			bad = 1;
	}
	if (out->transport == LINK_TCP) {
		n = yt_get(cfg, "host");
		if (!n) {
			yt_missing(doc, cfg, "host", "Modbus TCP link", d);
			bad = 1;
		} else if (!yt_string(doc, n, "host", out->host, sizeof(out->host), d)) {
			bad = 1;
		}
		if ((n = yt_get(cfg, "port")) &&
		    !yt_long(doc, n, "port", 1, 65535, &out->tcp_port, d))
			bad = 1;
		if ((n = yt_get(cfg, "device"))) {
			yt_error(doc, n, d, "'device' is for transport: rtu (this link is tcp)");
			bad = 1;
		}
	} else {
		n = yt_get(cfg, "device");
		if (!n) {
			yt_missing(doc, cfg, "device", "Modbus RTU link", d);
			bad = 1;
		} else if (!yt_string(doc, n, "device", out->device, sizeof(out->device), d)) {
			bad = 1;
		}
		if (parse_line(doc, cfg, &out->baud, &out->parity, &out->stop_bits, d))
			bad = 1;
		if ((n = yt_get(cfg, "rs485")) && !yt_bool(doc, n, "rs485", &out->rs485, d))
			bad = 1;
		if ((n = yt_get(cfg, "host")) || (n = yt_get(cfg, "port"))) {
			yt_error(doc, n, d,
			         "'host' and 'port' are for transport: tcp (this link is rtu)");
			bad = 1;
		}
	}
	long unit_max = out->transport == LINK_TCP ? 255 : 247;
	if ((n = yt_get(cfg, "unit")) && !yt_long(doc, n, "unit", 0, unit_max, &out->unit, d))
		bad = 1;
	if ((n = yt_get(cfg, "response_timeout_ms")) &&
	    !yt_long(doc, n, "response_timeout_ms", 10, 60000, &out->response_timeout_ms, d))
		bad = 1;
	if ((n = yt_get(cfg, "retries")) && !yt_long(doc, n, "retries", 0, 10, &out->retries, d))
		bad = 1;
	return bad ? -1 : 0;
}
