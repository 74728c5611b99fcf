/* svg.h: the titration curve as SVG text.
 *
 * One renderer for everyone: the daemon serves it at GET /v1/runs/{id}/curve.svg
 * and `stopcock show RUN --svg FILE` saves what the daemon serves. The picture:
 * the measured curve (signal against total volume) on the left axis, its first
 * derivative on a right axis, each endpoint marked with a dashed line and its
 * volume, axes with ticks and units, the title on top.
 *
 * Pure function: no I/O, no globals. NaN or infinite values in a point are
 * skipped (the line breaks there); 0 or 1 point gives a valid picture with a
 * "no points" / single-marker plot. Text is XML-escaped.
 */
#ifndef STOPCOCK_SVG_H
#define STOPCOCK_SVG_H

#include <stddef.h>

typedef struct svg_point {
	double volume_ml; /* total dispensed, mL */
	double signal;    /* pH or mV, per svg_opts_t.signal_unit */
	double dpdv;      /* first derivative, signal units per mL; NaN when unknown */
} svg_point_t;

typedef struct svg_endpoint {
	double volume_ml;  /* mL */
	double signal;     /* signal at the endpoint, pH or mV; NaN when unknown */
	const char *label; /* e.g. "E1"; NULL for "E<n>" */
} svg_endpoint_t;

typedef struct svg_opts {
	const char *title;       /* shown on top; NULL or "" for none */
	const char *signal_unit; /* "pH" or "mV"; NULL means "pH" */
	int width_px;            /* 0 means 800 */
	int height_px;           /* 0 means 500 */
} svg_opts_t;

/* A complete standalone SVG document (malloc'd, NUL-terminated; caller frees),
 * or NULL only when out of memory. `pts` and `ends` may be NULL when their
 * counts are 0; `o` may be NULL for defaults. */
char *svg_curve(const svg_point_t *pts, size_t n, const svg_endpoint_t *ends, size_t n_ends,
                const svg_opts_t *o);

#endif
