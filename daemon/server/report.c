/* report.c: see report.h. A4 portrait, 1 pt = 1/72 in; every length below
 * is in points. The curve is drawn as paths, not an image, so it prints
 * sharp and pdftotext reads every label. */
#include "report.h"

#include <cairo-pdf.h>
#include <fontconfig/fontconfig.h>
#include <math.h>
#include <pango/pangocairo.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "sbuf.h"

#define PAGE_W  595.0 /* pt, A4 */
#define PAGE_H  842.0
#define MARGIN  40.0
#define PLOT_H  230.0
#define FONT    "DejaVu Sans 8"
#define FONT_B  "DejaVu Sans Bold 9"
#define FONT_H1 "DejaVu Sans Bold 14"

typedef struct page {
	cairo_t *cr;
	double y; /* next line's top, pt */
} page_t;

/* One line of text at (x, y); its height in pt. */
static double text_at(cairo_t *cr, double x, double y, const char *font, const char *s)
{
	PangoLayout *l = pango_cairo_create_layout(cr);
	PangoFontDescription *fd = pango_font_description_from_string(font);
	int w, h;

	pango_layout_set_font_description(l, fd);
	pango_layout_set_width(l, (int)((PAGE_W - MARGIN - x) * PANGO_SCALE));
	pango_layout_set_wrap(l, PANGO_WRAP_WORD_CHAR);
	pango_layout_set_text(l, s, -1);
	cairo_move_to(cr, x, y);
	pango_cairo_show_layout(cr, l);
	pango_layout_get_size(l, &w, &h);
	pango_font_description_free(fd);
	g_object_unref(l);
	return (double)h / PANGO_SCALE;
}

static void line(page_t *p, const char *font, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));
static void line(page_t *p, const char *font, const char *fmt, ...)
{
	char buf[1024];
	va_list ap;
	va_start(ap, fmt);
	vsnprintf(buf, sizeof buf, fmt, ap);
	va_end(ap);
	p->y += text_at(p->cr, MARGIN, p->y, font, buf) + 1.5;
}

static const char *str(const json_t *o, const char *key, const char *dflt)
{
	const char *s = json_string_value(json_object_get(o, key));
	return s && *s ? s : dflt;
}

static double num(const json_t *o, const char *key)
{
	const json_t *v = json_object_get(o, key);
	return json_is_number(v) ? json_number_value(v) : NAN;
}

/* "1.234" or "-" for a missing number. */
static const char *fmt_num(char *buf, size_t cap, double v, int decimals)
{
	if (!isfinite(v))
		snprintf(buf, cap, "-");
	else
		snprintf(buf, cap, "%.*f", decimals, v);
	return buf;
}

/* The curve: signal (black) and derivative (grey, its own scale) against
 * volume, endpoints as dashed verticals with their number. */
static void plot(page_t *p, const json_t *points, const json_t *rec, bool mv)
{
	cairo_t *cr = p->cr;
	const double x0 = MARGIN + 34, w = PAGE_W - 2 * MARGIN - 44, y0 = p->y + 4, h = PLOT_H;
	double vmin = INFINITY, vmax = -INFINITY, smin = INFINITY, smax = -INFINITY, dmax = 0;
	size_t i;
	const json_t *pt, *ep;
	char a[32], b[96];
	const char *sig = mv ? "mv" : "ph";

	json_array_foreach(points, i, pt)
	{
		double v = num(pt, "volume_ml"), s = num(pt, sig), d = fabs(num(pt, "dpdv"));
		if (isfinite(v)) {
			vmin = fmin(vmin, v);
			vmax = fmax(vmax, v);
		}
		if (isfinite(s)) {
			smin = fmin(smin, s);
			smax = fmax(smax, s);
		}
		if (isfinite(d))
			dmax = fmax(dmax, d);
	}
	cairo_set_line_width(cr, 0.6);
	cairo_set_source_rgb(cr, 0, 0, 0);
	cairo_rectangle(cr, x0, y0, w, h);
	cairo_stroke(cr);
	if (!(vmax > vmin) || !(smax >= smin)) {
		text_at(cr, x0 + 8, y0 + 8, FONT, "no points");
		p->y = y0 + h + 16;
		return;
	}
	if (smax == smin) {
		smax += 1;
		smin -= 1;
	}
	double pad = (smax - smin) * 0.05;
	smin -= pad;
	smax += pad;
#define X(v) (x0 + ((v)-vmin) / (vmax - vmin) * w)
#define Y(s) (y0 + h - ((s)-smin) / (smax - smin) * h)
	/* derivative first, beneath */
	if (dmax > 0) {
		bool on = false;
		cairo_set_source_rgb(cr, 0.55, 0.55, 0.55);
		json_array_foreach(points, i, pt)
		{
			double v = num(pt, "volume_ml"), d = fabs(num(pt, "dpdv"));
			if (!isfinite(v) || !isfinite(d))
				continue;
			double yy = y0 + h - d / dmax * h * 0.9;
			if (on)
				cairo_line_to(cr, X(v), yy);
			else
				cairo_move_to(cr, X(v), yy);
			on = true;
		}
		cairo_stroke(cr);
	}
	bool on = false;
	cairo_set_source_rgb(cr, 0, 0, 0);
	cairo_set_line_width(cr, 1.0);
	json_array_foreach(points, i, pt)
	{
		double v = num(pt, "volume_ml"), s = num(pt, sig);
		if (!isfinite(v) || !isfinite(s))
			continue;
		if (on)
			cairo_line_to(cr, X(v), Y(s));
		else
			cairo_move_to(cr, X(v), Y(s));
		on = true;
	}
	cairo_stroke(cr);
	/* endpoints */
	static const double dash[] = {3.0, 2.0};
	cairo_set_dash(cr, dash, 2, 0);
	cairo_set_line_width(cr, 0.7);
	json_array_foreach(json_object_get(rec, "endpoints"), i, ep)
	{
		double v = num(ep, "volume_ml");
		char lab[48];
		if (!isfinite(v) || v < vmin || v > vmax)
			continue;
		cairo_move_to(cr, X(v), y0);
		cairo_line_to(cr, X(v), y0 + h);
		cairo_stroke(cr);
		snprintf(lab, sizeof lab, "EP%zu %.3f mL", i + 1, v);
		text_at(cr, X(v) + 2, y0 + 2 + 10.0 * (double)i, FONT, lab);
	}
	cairo_set_dash(cr, NULL, 0, 0);
	/* axis labels: the ranges */
	text_at(cr, x0, y0 + h + 2, FONT, fmt_num(a, sizeof a, vmin, 2));
	snprintf(b, sizeof b, "%.2f mL", vmax);
	text_at(cr, x0 + w - 40, y0 + h + 2, FONT, b);
	text_at(cr, MARGIN - 4, y0, FONT, fmt_num(a, sizeof a, smax, mv ? 0 : 2));
	text_at(cr, MARGIN - 4, y0 + h - 10, FONT, fmt_num(a, sizeof a, smin, mv ? 0 : 2));
	snprintf(b, sizeof b, "%s (black), |d%s/dV| (grey, own scale) against volume",
	         mv ? "mV" : "pH", mv ? "mV" : "pH");
	text_at(cr, x0 + 60, y0 + h + 2, FONT, b);
#undef X
#undef Y
	p->y = y0 + h + 16;
}

/* The limits of result `name` in the method, as "10 to 30", or "". */
static void limits(const method_t *m, const char *name, char *out, size_t cap)
{
	out[0] = '\0';
	for (int i = 0; m && i < m->n_results; i++) {
		const method_result_t *r = &m->results[i];
		if (strcmp(r->name, name))
			continue;
		if (r->has_min && r->has_max)
			snprintf(out, cap, "%g to %g", r->accept_min, r->accept_max);
		else if (r->has_min)
			snprintf(out, cap, "at least %g", r->accept_min);
		else if (r->has_max)
			snprintf(out, cap, "at most %g", r->accept_max);
	}
}

static cairo_status_t to_sbuf(void *closure, const unsigned char *data, unsigned int n)
{
	sbuf_addn(closure, (const char *)data, n);
	return ((sbuf_t *)closure)->oom ? CAIRO_STATUS_NO_MEMORY : CAIRO_STATUS_SUCCESS;
}

static void body(page_t *p, const json_t *rec, const json_t *points, const method_t *m,
                 const char *lab)
{
	const json_t *meth = json_object_get(rec, "method"),
	             *sample = json_object_get(rec, "sample");
	const json_t *t = json_object_get(rec, "titrant"),
	             *cal = json_object_get(rec, "calibration");
	const json_t *rv = json_object_get(rec, "review"), *v;
	char a[32], b[32], c[32], lim[64];
	size_t i;
	bool mv = m ? m->signal == SIGNAL_MV : !isfinite(num(json_array_get(points, 0), "ph"));

	if (lab && *lab)
		line(p, FONT_B, "%s", lab);
	line(p, FONT_H1, "Titration report: run %lld",
	     (long long)json_integer_value(json_object_get(rec, "id")));
	p->y += 4;
	line(p, FONT, "Station %s    State %s    Stop reason %s", str(rec, "station", "-"),
	     str(rec, "state", "-"), str(rec, "stop_reason", "-"));
	line(p, FONT, "Method %s revision %lld    sha256 %s", str(meth, "id", "-"),
	     (long long)json_integer_value(json_object_get(meth, "revision")),
	     str(meth, "sha256", "-"));
	line(p, FONT, "Sample %s    Amount %s %s    Operator %s", str(sample, "id", "-"),
	     fmt_num(a, sizeof a, num(sample, "amount"), 4), str(sample, "unit", ""),
	     str(rec, "requested_by", "-"));
	line(p, FONT, "Queued %s    Started %s    Ended %s    (times in UTC)",
	     str(rec, "queued_at", "-"), str(rec, "started_at", "-"), str(rec, "ended_at", "-"));
	p->y += 4;
	plot(p, points, rec, mv);

	line(p, FONT_B, "Endpoints");
	json_array_foreach(json_object_get(rec, "endpoints"), i, v)
	{
		line(p, FONT,
		     "EP%zu  %s mL ± %s mL (standard uncertainty)   %s %s   found by %s%s%s", i + 1,
		     fmt_num(a, sizeof a, num(v, "volume_ml"), 4),
		     fmt_num(b, sizeof b, num(v, "u_volume_ml"), 4), mv ? "mV" : "pH",
		     fmt_num(c, sizeof c, num(v, mv ? "mv" : "ph"), mv ? 1 : 3), str(v, "how", "-"),
		     json_is_string(json_object_get(v, "doubt")) ? "   doubt: " : "",
		     str(v, "doubt", ""));
	}
	if (!json_array_size(json_object_get(rec, "endpoints")))
		line(p, FONT, "none");
	p->y += 3;
	line(p, FONT_B, "Results%s",
	     json_is_integer(json_object_get(rec, "version")) ? " (corrected version)" : "");
	json_array_foreach(json_object_get(rec, "results"), i, v)
	{
		limits(m, str(v, "name", ""), lim, sizeof lim);
		line(p, FONT, "%s = %s %s    limits %s    verdict %s%s%s", str(v, "name", "?"),
		     fmt_num(a, sizeof a, num(v, "value"), 4), str(v, "unit", ""),
		     lim[0] ? lim : "none", str(v, "accept", "-"),
		     json_is_string(json_object_get(v, "note")) ? "    " : "", str(v, "note", ""));
	}
	p->y += 3;
	line(p, FONT_B, "Titrant, blank and calibration used");
	line(p, FONT, "%s, nominal %s mol/L, titer %s, determined %s (%s), valid until %s",
	     str(t, "name", "-"), fmt_num(a, sizeof a, num(t, "molarity"), 4),
	     fmt_num(b, sizeof b, num(t, "titer"), 5), str(t, "titer_at", "-"),
	     json_is_integer(json_object_get(t, "titer_run_id")) ? "standardization run"
	     : json_is_string(json_object_get(t, "titer_at"))    ? "entered by hand"
	                                                         : "no stored titer",
	     str(t, "titer_valid_until", "-"));
	if (json_is_string(json_object_get(t, "titer_reason")))
		line(p, FONT, "Titer entered by %s: %s", str(t, "titer_by", "-"),
		     str(t, "titer_reason", "-"));
	line(p, FONT, "Blank %s mL, determined %s, valid until %s",
	     fmt_num(a, sizeof a, num(t, "blank_ml"), 4), str(t, "blank_at", "-"),
	     str(t, "blank_valid_until", "-"));
	if (json_is_object(cal))
		line(p, FONT, "Electrode calibration %lld: slope %s %%, offset %s mV, at %s",
		     (long long)json_integer_value(json_object_get(cal, "id")),
		     fmt_num(a, sizeof a, num(cal, "slope_pct"), 1),
		     fmt_num(b, sizeof b, num(cal, "offset_mv"), 1), str(cal, "at", "-"));
	else
		line(p, FONT, "Electrode calibration: none (a mV method needs none)");
	p->y += 3;
	line(p, FONT_B, "Faults");
	json_array_foreach(json_object_get(rec, "faults"), i, v) line(
	    p, FONT, "%s  %s  %s", str(v, "at", "-"), str(v, "code", "-"), str(v, "message", ""));
	if (!json_array_size(json_object_get(rec, "faults")))
		line(p, FONT, "none");
	p->y += 3;
	line(p, FONT_B, "Review");
	if (!strcmp(str(rv, "state", "pending"), "pending"))
		line(p, FONT, "Not reviewed yet: these results are not released.");
	else
		line(p, FONT, "Version %lld %s by %s at %s%s%s",
		     (long long)json_integer_value(json_object_get(rv, "version")),
		     str(rv, "state", "?"), str(rv, "by", "?"), str(rv, "at", "?"),
		     json_is_string(json_object_get(rv, "reason")) ? ": " : "",
		     str(rv, "reason", ""));
	json_array_foreach(json_object_get(rec, "result_versions"), i, v)
	{
		if (!json_is_string(json_object_get(v, "by")))
			continue;
		line(p, FONT, "Version %lld by %s at %s: %s",
		     (long long)json_integer_value(json_object_get(v, "version")),
		     str(v, "by", "?"), str(v, "at", "?"), str(v, "reason", ""));
	}
}

void report_cleanup(void)
{
	pango_cairo_font_map_set_default(NULL);
	cairo_debug_reset_static_data();
	FcFini();
}

char *report_pdf(const json_t *rec, const json_t *points, const method_t *m, const char *lab,
                 size_t *len)
{
	sbuf_t out = SBUF_INIT;
	cairo_surface_t *s = cairo_pdf_surface_create_for_stream(to_sbuf, &out, PAGE_W, PAGE_H);
	cairo_t *cr = cairo_create(s);
	page_t p = {cr, MARGIN};
	char title[96];

	snprintf(title, sizeof title, "Stopcock run %lld",
	         (long long)json_integer_value(json_object_get(rec, "id")));
	cairo_pdf_surface_set_metadata(s, CAIRO_PDF_METADATA_TITLE, title);
	cairo_pdf_surface_set_metadata(s, CAIRO_PDF_METADATA_CREATOR, "stopcockd");
	cairo_set_source_rgb(cr, 0, 0, 0);
	body(&p, rec, points, m, lab);
	cairo_show_page(cr);
	cairo_destroy(cr);
	cairo_surface_finish(s);
	bool ok = cairo_surface_status(s) == CAIRO_STATUS_SUCCESS;
	cairo_surface_destroy(s);
	char *pdf = sbuf_finish(&out, len);
	if (!ok) {
		free(pdf);
		return NULL;
	}
	return pdf;
}
