/* svg.c: the titration curve as SVG text (see svg.h). */
#include "svg.h"

#include <math.h>
#include <stdarg.h>
#include <stdbool.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

/* A growing text buffer; after a failed allocation every append is a no-op
 * and the result is NULL, so callers check once at the end. */
typedef struct sbuf {
	char *s;
	size_t len;
	size_t cap;
	bool failed;
} sbuf_t;

__attribute__((format(printf, 2, 3))) static void sb_printf(sbuf_t *b, const char *fmt, ...)
{
	if (b->failed)
		return;
	for (;;) {
		va_list ap;
		va_start(ap, fmt);
		size_t room = b->cap - b->len;
		int k = vsnprintf(b->s ? b->s + b->len : NULL, room, fmt, ap);
		va_end(ap);
		if (k < 0) {
			b->failed = true;
			return;
		}
		if ((size_t)k < room) {
			b->len += (size_t)k;
			return;
		}
		size_t cap = b->cap ? b->cap : 4096;
		while (cap - b->len <= (size_t)k)
			cap *= 2;
		char *p = realloc(b->s, cap);
		if (!p) {
			b->failed = true;
			return;
		}
		b->s = p;
		b->cap = cap;
	}
}

/* Text content and attribute values: the five XML specials, and control
 * characters (not allowed in XML 1.0) dropped. */
static void sb_escaped(sbuf_t *b, const char *s)
{
	for (; s && *s; s++) {
		unsigned char c = (unsigned char)*s;
		switch (c) {
		case '&':
			sb_printf(b, "&amp;");
			break;
		case '<':
			sb_printf(b, "&lt;");
			break;
		case '>':
			sb_printf(b, "&gt;");
			break;
		case '"':
			sb_printf(b, "&quot;");
			break;
		case '\'':
			sb_printf(b, "&apos;");
			break;
		default:
			if (c >= 0x20 || c == '\t' || c == '\n')
				sb_printf(b, "%c", c);
		}
	}
}

typedef struct range {
	double lo, hi;
	bool any;
} range_t;

static void range_add(range_t *r, double v)
{
	if (!isfinite(v))
		return;
	if (!r->any) {
		r->lo = r->hi = v;
		r->any = true;
		return;
	}
	if (v < r->lo)
		r->lo = v;
	if (v > r->hi)
		r->hi = v;
}

/* A 1-2-5 tick step giving about `want` intervals over `span`. */
static double nice_step(double span, int want)
{
	double raw = span / want;
	double mag = pow(10.0, floor(log10(raw)));
	double f = raw / mag;
	double nice = f < 1.5 ? 1.0 : f < 3.5 ? 2.0 : f < 7.5 ? 5.0 : 10.0;
	return nice * mag;
}

/* Widen [lo, hi] to whole tick steps; a degenerate range gets room around it. */
static void range_nice(range_t *r, double dflt_lo, double dflt_hi, double *step)
{
	if (!r->any) {
		r->lo = dflt_lo;
		r->hi = dflt_hi;
	}
	if (r->hi - r->lo < 1e-9 * (fabs(r->lo) + 1.0)) {
		double pad = fabs(r->lo) > 0 ? fabs(r->lo) * 0.1 : 1.0;
		r->lo -= pad;
		r->hi += pad;
	}
	*step = nice_step(r->hi - r->lo, 5);
	r->lo = floor(r->lo / *step + 1e-9) * *step;
	r->hi = ceil(r->hi / *step - 1e-9) * *step;
}

static int step_decimals(double step)
{
	int d = (int)ceil(-log10(step) - 1e-9);
	return d < 0 ? 0 : d > 6 ? 6 : d;
}

typedef struct frame {
	double x0, x1, y0, y1; /* plot area in px: left, right, top, bottom */
	range_t vx, vy, vd;    /* data ranges: volume, signal, derivative */
} frame_t;

static double px_x(const frame_t *f, double v)
{
	return f->x0 + (v - f->vx.lo) / (f->vx.hi - f->vx.lo) * (f->x1 - f->x0);
}

static double px_y(const frame_t *f, const range_t *r, double v)
{
	return f->y1 - (v - r->lo) / (r->hi - r->lo) * (f->y1 - f->y0);
}

/* One polyline through the finite values; a non-finite value breaks it. */
static void draw_line(sbuf_t *b, const frame_t *f, const svg_point_t *pts, size_t n, bool deriv,
                      const char *cls)
{
	bool pen = false, any = false;
	for (size_t i = 0; i < n; i++) {
		double v = pts[i].volume_ml, y = deriv ? pts[i].dpdv : pts[i].signal;
		if (!isfinite(v) || !isfinite(y)) {
			pen = false;
			continue;
		}
		if (!any)
			sb_printf(b, "<path class=\"%s\" d=\"", cls);
		any = true;
		sb_printf(b, "%s%.1f %.1f ", pen ? "L" : "M", px_x(f, v),
		          px_y(f, deriv ? &f->vd : &f->vy, y));
		pen = true;
	}
	if (any)
		sb_printf(b, "\"/>\n");
}

static void draw_axes(sbuf_t *b, const frame_t *f, double sx, double sy, double sd, bool deriv,
                      const char *unit)
{
	bool ph = !strcmp(unit, "pH");
	int dx = step_decimals(sx), dy = step_decimals(sy), dd = step_decimals(sd);

	sb_printf(b,
	          "<rect class=\"frame\" x=\"%.1f\" y=\"%.1f\" width=\"%.1f\" height=\"%.1f\"/>\n",
	          f->x0, f->y0, f->x1 - f->x0, f->y1 - f->y0);
	sb_printf(b, "<g class=\"ticks\">\n");
	for (double v = f->vx.lo; v <= f->vx.hi + sx * 1e-6; v += sx) {
		double x = px_x(f, v);
		sb_printf(b,
		          "<line class=\"grid\" x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" y2=\"%.1f\"/>",
		          x, f->y0, x, f->y1);
		sb_printf(b, "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"middle\">%.*f</text>\n", x,
		          f->y1 + 18, dx, fabs(v) < sx * 1e-6 ? 0.0 : v);
	}
	for (double v = f->vy.lo; v <= f->vy.hi + sy * 1e-6; v += sy) {
		double y = px_y(f, &f->vy, v);
		sb_printf(b,
		          "<line class=\"grid\" x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" y2=\"%.1f\"/>",
		          f->x0, y, f->x1, y);
		sb_printf(b, "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"end\">%.*f</text>\n",
		          f->x0 - 6, y + 4, dy, fabs(v) < sy * 1e-6 ? 0.0 : v);
	}
	if (deriv)
		for (double v = f->vd.lo; v <= f->vd.hi + sd * 1e-6; v += sd)
			sb_printf(b, "<text class=\"deriv\" x=\"%.1f\" y=\"%.1f\">%.*f</text>\n",
			          f->x1 + 6, px_y(f, &f->vd, v) + 4, dd,
			          fabs(v) < sd * 1e-6 ? 0.0 : v);
	sb_printf(b, "</g>\n");

	double mid_y = (f->y0 + f->y1) / 2;
	sb_printf(b,
	          "<text class=\"label\" x=\"%.1f\" y=\"%.1f\" text-anchor=\"middle\">"
	          "titrant added (mL)</text>\n",
	          (f->x0 + f->x1) / 2, f->y1 + 40);
	sb_printf(b,
	          "<text class=\"label\" transform=\"translate(%.1f %.1f) rotate(-90)\" "
	          "text-anchor=\"middle\">%s</text>\n",
	          f->x0 - 50, mid_y, ph ? "pH" : "potential (mV)");
	if (deriv)
		sb_printf(
		    b,
		    "<text class=\"label deriv\" transform=\"translate(%.1f %.1f) rotate(90)\" "
		    "text-anchor=\"middle\">%s</text>\n",
		    f->x1 + 52, mid_y,
		    ph ? "first derivative (pH/mL)" : "first derivative (mV/mL)");
}

static void draw_endpoints(sbuf_t *b, const frame_t *f, const svg_endpoint_t *ends, size_t n_ends)
{
	for (size_t i = 0; i < n_ends; i++) {
		double v = ends[i].volume_ml;
		if (!isfinite(v))
			continue;
		double x = px_x(f, v);
		sb_printf(b, "<g class=\"endpoint\">");
		sb_printf(b, "<line x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" y2=\"%.1f\"/>", x, f->y0, x,
		          f->y1);
		if (isfinite(ends[i].signal))
			sb_printf(b, "<circle cx=\"%.1f\" cy=\"%.1f\" r=\"5\"/>", x,
			          px_y(f, &f->vy, ends[i].signal));
		/* Labels stagger downwards so that close endpoints stay readable,
		 * and sit left of the line in the right third so that they never
		 * run over the derivative's axis (the page does the same). */
		bool left = x > f->x0 + (f->x1 - f->x0) * 2 / 3;
		sb_printf(b, "<text x=\"%.1f\" y=\"%.1f\"%s>", left ? x - 5 : x + 5,
		          f->y0 + 16 + 16.0 * (double)(i % 4), left ? " text-anchor=\"end\"" : "");
		if (ends[i].label && ends[i].label[0])
			sb_escaped(b, ends[i].label);
		else
			sb_printf(b, "E%zu", i + 1);
		sb_printf(b, " %.3f mL</text></g>\n", v);
	}
}

char *svg_curve(const svg_point_t *pts, size_t n, const svg_endpoint_t *ends, size_t n_ends,
                const svg_opts_t *o)
{
	svg_opts_t dflt = {0};
	if (!o)
		o = &dflt;
	const char *unit = o->signal_unit && !strcmp(o->signal_unit, "mV") ? "mV" : "pH";
	double w = o->width_px > 200 ? o->width_px : 800,
	       h = o->height_px > 150 ? o->height_px : 500;
	if (!pts)
		n = 0;
	if (!ends)
		n_ends = 0;

	frame_t f = {.x0 = 80, .x1 = w - 80, .y0 = 48, .y1 = h - 60};
	size_t shown = 0;
	range_add(&f.vx, 0.0); /* volume axes start at zero: the titration does */
	for (size_t i = 0; i < n; i++) {
		if (!isfinite(pts[i].volume_ml))
			continue;
		range_add(&f.vx, pts[i].volume_ml);
		if (isfinite(pts[i].signal)) {
			range_add(&f.vy, pts[i].signal);
			shown++;
		}
		range_add(&f.vd, pts[i].dpdv);
	}
	for (size_t i = 0; i < n_ends; i++) {
		if (!isfinite(ends[i].volume_ml))
			continue;
		range_add(&f.vx, ends[i].volume_ml);
		range_add(&f.vy, ends[i].signal);
	}
	bool deriv = f.vd.any;
	if (deriv)
		range_add(&f.vd, 0.0); /* the derivative axis shows its zero */
	double sx, sy, sd;
	range_nice(&f.vx, 0.0, 1.0, &sx);
	if (!strcmp(unit, "pH"))
		range_nice(&f.vy, 0.0, 14.0, &sy);
	else
		range_nice(&f.vy, -400.0, 400.0, &sy);
	range_nice(&f.vd, 0.0, 1.0, &sd);

	sbuf_t b = {0};
	sb_printf(&b,
	          "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n"
	          "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"%.0f\" height=\"%.0f\" "
	          "viewBox=\"0 0 %.0f %.0f\" font-family=\"sans-serif\" font-size=\"12\">\n",
	          w, h, w, h);
	sb_printf(&b, "<title>");
	sb_escaped(&b, o->title && o->title[0] ? o->title : "titration curve");
	sb_printf(&b, "</title>\n");
	sb_printf(&b, "<style>\n"
	              ".frame{fill:#fcfcfa;stroke:#555;stroke-width:1}\n"
	              ".grid{stroke:#e2e2dc;stroke-width:1}\n"
	              ".ticks text{fill:#333}\n"
	              ".label{fill:#222;font-size:13px}\n"
	              ".deriv{fill:#b5601e}\n"
	              ".curve{fill:none;stroke:#1f4e79;stroke-width:2}\n"
	              ".dpdv{fill:none;stroke:#b5601e;stroke-width:1.3;stroke-dasharray:5 3}\n"
	              ".pts circle{fill:#1f4e79}\n"
	              ".endpoint line{stroke:#2d6a3e;stroke-width:1.2;stroke-dasharray:2 3}\n"
	              ".endpoint circle{fill:none;stroke:#2d6a3e;stroke-width:2}\n"
	              ".endpoint text{fill:#2d6a3e;font-weight:bold}\n"
	              ".title{font-size:15px;font-weight:bold;fill:#222}\n"
	              ".note{fill:#777;font-size:14px}\n"
	              "</style>\n");
	sb_printf(&b, "<rect width=\"100%%\" height=\"100%%\" fill=\"#ffffff\"/>\n");
	if (o->title && o->title[0]) {
		sb_printf(&b, "<text class=\"title\" x=\"%.1f\" y=\"28\">", f.x0);
		sb_escaped(&b, o->title);
		sb_printf(&b, "</text>\n");
	}
	draw_axes(&b, &f, sx, sy, sd, deriv, unit);
	if (deriv)
		draw_line(&b, &f, pts, n, true, "dpdv");
	draw_line(&b, &f, pts, n, false, "curve");
	sb_printf(&b, "<g class=\"pts\">");
	for (size_t i = 0; i < n; i++)
		if (isfinite(pts[i].volume_ml) && isfinite(pts[i].signal))
			sb_printf(&b, "<circle cx=\"%.1f\" cy=\"%.1f\" r=\"%s\"/>",
			          px_x(&f, pts[i].volume_ml), px_y(&f, &f.vy, pts[i].signal),
			          shown > 300 ? "1" : "2");
	sb_printf(&b, "</g>\n");
	if (shown == 0)
		sb_printf(&b,
		          "<text class=\"note\" x=\"%.1f\" y=\"%.1f\" text-anchor=\"middle\">"
		          "no points yet</text>\n",
		          (f.x0 + f.x1) / 2, (f.y0 + f.y1) / 2);
	draw_endpoints(&b, &f, ends, n_ends);

	/* Legend in the bottom margin, right-aligned, beside the volume label:
	 * clear of the curve and of long titles. The same three keys and words as
	 * the page's legend (daemon/server/www/runs.js). */
	struct {
		const char *word, *style;
	} keys[] = {
	    {strcmp(unit, "mV") ? "pH" : "potential", "stroke:#1f4e79;stroke-width:2"},
	    {"first derivative", "stroke:#b5601e;stroke-width:1.3;stroke-dasharray:5 3"},
	    {"endpoint", "stroke:#2d6a3e;stroke-width:1.2;stroke-dasharray:2 3"},
	};
	double width = 0, ly = f.y1 + 36;
	for (size_t i = 0; i < 3; i++)
		if (i != 1 || deriv)
			width += 30 + 7.0 * (double)strlen(keys[i].word) + 14; /* ~7 px a letter */
	double lx = f.x1 - width;
	sb_printf(&b, "<g class=\"legend\">");
	for (size_t i = 0; i < 3; i++) {
		if (i == 1 && !deriv)
			continue;
		sb_printf(&b,
		          "<line x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" y2=\"%.1f\" style=\"%s\"/>"
		          "<text x=\"%.1f\" y=\"%.1f\">%s</text>",
		          lx, ly, lx + 24, ly, keys[i].style, lx + 30, ly + 4, keys[i].word);
		lx += 30 + 7.0 * (double)strlen(keys[i].word) + 14;
	}
	sb_printf(&b, "</g>\n</svg>\n");

	if (b.failed) {
		free(b.s);
		return NULL;
	}
	return b.s;
}
