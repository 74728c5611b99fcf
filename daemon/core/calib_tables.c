/* calib_tables.c: pH buffers, their temperature tables, and the daemon
 * config's `calibration:` key (see calib.h, docs/calibration.md).
 *
 * Interpolation is linear between table rows: exact at every published row,
 * and with rows 5 degC apart the error between rows stays below 0.001 pH for
 * these buffers (their curvature is about 1e-4 pH/degC^2; the linear error is
 * at most h^2/8 times that, h = 5 degC: 0.0003 pH).
 */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "calib.h"

/* IUPAC 2002 (Buck et al., Pure Appl. Chem. 74, 2169), pH(PS) of the primary
 * standards, copied from docs/chemistry.md §3. The full 3-decimal rows there are
 * marked [M] (from memory); the 25 degC values are confirmed [S]: KHP 4.005
 * (Hamer, Pinching & Acree 1946), phosphate 6.865 (Partanen & Minkkinen 1996),
 * borax 9.180 and carbonate 10.012 (Bates et al. 1969). Every row agrees with
 * the JIS Z 8802:2011 2-decimal table within 0.01 [S].
 * Tetroxalate is a secondary standard in IUPAC 2002; its rows are the NBS
 * values (Bates 1962) [M], which round to the JIS 2-decimal values [S]. */
#define ROWS11(a, b, c, d, e, f, g, h, i, j, k)                                                    \
	{                                                                                          \
		11, {0, 5, 10, 15, 20, 25, 30, 35, 37, 40, 50},                                    \
		{                                                                                  \
			a, b, c, d, e, f, g, h, i, j, k                                            \
		}                                                                                  \
	}

static const calib_buffer_t iupac[] = {
    {4.005, CALIB_BUF_IUPAC, "0.05 mol/kg potassium hydrogen phthalate (IUPAC primary)",
     ROWS11(4.000, 3.998, 3.997, 3.998, 4.000, 4.005, 4.011, 4.018, 4.022, 4.027, 4.050)},
    {6.865, CALIB_BUF_IUPAC, "0.025/0.025 mol/kg KH2PO4/Na2HPO4 (IUPAC primary)",
     ROWS11(6.984, 6.951, 6.923, 6.900, 6.881, 6.865, 6.853, 6.844, 6.841, 6.838, 6.833)},
    {9.180, CALIB_BUF_IUPAC, "0.01 mol/kg borax (IUPAC primary)",
     ROWS11(9.464, 9.395, 9.332, 9.276, 9.225, 9.180, 9.139, 9.102, 9.088, 9.068, 9.011)},
    {10.012, CALIB_BUF_IUPAC, "0.025/0.025 mol/kg NaHCO3/Na2CO3 (IUPAC primary)",
     ROWS11(10.317, 10.245, 10.179, 10.118, 10.062, 10.012, 9.966, 9.926, 9.910, 9.889, 9.828)},
    {1.679,
     CALIB_BUF_IUPAC,
     "0.05 mol/kg potassium tetroxalate (IUPAC secondary)",
     {10,
      {0, 5, 10, 15, 20, 25, 30, 35, 40, 50},
      {1.666, 1.668, 1.670, 1.672, 1.675, 1.679, 1.683, 1.688, 1.694, 1.707}}},
};

/* Technical buffers (nominal at 25 degC): common practice, the typical values
 * printed on makers' bottles and tables, from memory [M], 2 decimals. A lab
 * whose bottles say otherwise supplies its own table in the daemon config. */
#define ROWS_TECH(a, b, c, d, e, f, g, h, i, j, k)                                                 \
	{                                                                                          \
		11, {0, 5, 10, 15, 20, 25, 30, 35, 40, 45, 50},                                    \
		{                                                                                  \
			a, b, c, d, e, f, g, h, i, j, k                                            \
		}                                                                                  \
	}

static const calib_buffer_t technical[] = {
    {4.01, CALIB_BUF_TECHNICAL, "technical buffer 4.01",
     ROWS_TECH(4.01, 4.00, 4.00, 4.00, 4.00, 4.01, 4.01, 4.02, 4.03, 4.04, 4.06)},
    {7.00, CALIB_BUF_TECHNICAL, "technical buffer 7.00",
     ROWS_TECH(7.12, 7.09, 7.06, 7.04, 7.02, 7.00, 6.99, 6.98, 6.97, 6.97, 6.97)},
    {10.01, CALIB_BUF_TECHNICAL, "technical buffer 10.01",
     ROWS_TECH(10.32, 10.25, 10.18, 10.12, 10.06, 10.01, 9.97, 9.93, 9.89, 9.86, 9.83)},
};

#define N_IUPAC ((int)(sizeof iupac / sizeof iupac[0]))
#define N_TECH  ((int)(sizeof technical / sizeof technical[0]))

/* A nominal value names a table when it equals the table's own (lab,
 * technical) within this, pH. */
#define EXACT_PH 0.0005
/* ... or rounds to an IUPAC 25 degC value (4.00 and 4.005 both mean KHP). */
#define ROUNDS_PH 0.0051

int calib_iupac_count(void)
{
	return N_IUPAC;
}

const calib_buffer_t *calib_iupac(int i)
{
	return i >= 0 && i < N_IUPAC ? &iupac[i] : NULL;
}

int calib_technical_count(void)
{
	return N_TECH;
}

const calib_buffer_t *calib_technical(int i)
{
	return i >= 0 && i < N_TECH ? &technical[i] : NULL;
}

calib_buffer_kind_t calib_buffer_lookup(const calib_config_t *c, double nominal_ph,
                                        calib_buffer_t *out)
{
	if (c) {
		for (int i = 0; i < c->n_lab; i++) {
			if (fabs(c->lab[i].nominal_ph - nominal_ph) <= EXACT_PH) {
				*out = c->lab[i];
				out->nominal_ph = nominal_ph;
				return out->kind;
			}
		}
	}
	for (int i = 0; i < N_TECH; i++) {
		if (fabs(technical[i].nominal_ph - nominal_ph) <= EXACT_PH) {
			*out = technical[i];
			out->nominal_ph = nominal_ph;
			return out->kind;
		}
	}
	for (int i = 0; i < N_IUPAC; i++) {
		if (fabs(iupac[i].nominal_ph - nominal_ph) <= ROUNDS_PH) {
			*out = iupac[i];
			out->nominal_ph = nominal_ph;
			return out->kind;
		}
	}
	memset(out, 0, sizeof *out);
	out->nominal_ph = nominal_ph;
	out->kind = CALIB_BUF_CUSTOM;
	snprintf(out->name, sizeof out->name,
	         "buffer %.3g (no table: value used at any temperature)", nominal_ph);
	return CALIB_BUF_CUSTOM;
}

double calib_buffer_ph(const calib_buffer_t *b, double temperature_c)
{
	const calib_table_t *t = &b->table;
	if (t->n <= 0)
		return b->nominal_ph;
	if (!isfinite(temperature_c))
		return NAN;
	if (t->n == 1)
		return fabs(temperature_c - t->t_c[0]) < 1e-9 ? t->ph[0] : NAN;
	/* A hair of slack at the ends so 50.0 read as 50.000000001 still counts. */
	const double slack_c = 1e-6;
	if (temperature_c < t->t_c[0] - slack_c || temperature_c > t->t_c[t->n - 1] + slack_c)
		return NAN;
	int i = 0;
	while (i < t->n - 2 && temperature_c > t->t_c[i + 1])
		i++;
	double f = (temperature_c - t->t_c[i]) / (t->t_c[i + 1] - t->t_c[i]);
	if (f < 0)
		f = 0;
	if (f > 1)
		f = 1;
	return t->ph[i] + f * (t->ph[i + 1] - t->ph[i]);
}

/* ---- the daemon config's `calibration:` key ---- */

void calib_config_defaults(calib_config_t *c)
{
	memset(c, 0, sizeof *c);
	/* Common practice, not a standard (docs/chemistry.md §4): 95..105 % of the
	 * Nernst slope and +-30 mV at pH 7 are the widely used acceptance limits. */
	c->slope_min_pct = 95.0;
	c->slope_max_pct = 105.0;
	c->offset_min_mv = -30.0;
	c->offset_max_mv = 30.0;
	/* Our choice: 5 mV is about 0.085 pH; a buffer that far off the line of
	 * the others is the wrong buffer or a spoiled one. */
	c->residual_max_mv = 5.0;
	/* Common practice: recalibrate daily. */
	c->expires_h = 24.0;
	/* Our choice: the electrode has settled when its reading drifts less than
	 * 0.1 mV (about 0.002 pH) over 10 s; 180 s is ample for a healthy glass
	 * electrode in a stirred buffer (t90 is typically 2-30 s, docs/chemistry.md §10). */
	c->stable_drift_mv = 0.1;
	c->stable_window_s = 10.0;
	c->stable_min_s = 5.0;
	c->stable_max_s = 180.0;
}

static bool parse_pair(const yt_doc_t *doc, const yt_node_t *n, const char *key, const char *unit,
                       double lo, double hi, double *a, double *b, diag_list_t *d)
{
	if (!n || n->kind != YT_SEQ || n->n != 2) {
		if (n)
			yt_error(doc, n, d, "%s must be a list of two numbers [MIN, MAX] (in %s)",
			         key, unit);
		return false;
	}
	double x, y;
	bool ok = yt_double_range(doc, n->items[0], key, unit, lo, hi, &x, d);
	ok = yt_double_range(doc, n->items[1], key, unit, lo, hi, &y, d) && ok;
	if (!ok)
		return false;
	if (!(x < y)) {
		yt_error(doc, n, d, "%s: MIN must be below MAX (got [%g, %g])", key, x, y);
		return false;
	}
	*a = x;
	*b = y;
	return true;
}

static bool parse_table(const yt_doc_t *doc, const yt_node_t *n, calib_table_t *t, diag_list_t *d)
{
	if (!yt_want_seq(doc, n, "calibration.buffers[].table", d))
		return false;
	if (n->n < 2 || n->n > CALIB_MAX_ROWS) {
		yt_error(doc, n, d, "a buffer table needs 2 to %d rows [T_C, PH] (got %zu)",
		         CALIB_MAX_ROWS, n->n);
		return false;
	}
	bool ok = true;
	t->n = 0;
	for (size_t i = 0; i < n->n; i++) {
		const yt_node_t *row = n->items[i];
		if (row->kind != YT_SEQ || row->n != 2) {
			yt_error(doc, row, d,
			         "a table row must be [temperature in degC, pH], e.g. [25, 4.01]");
			ok = false;
			continue;
		}
		double t_c, ph;
		bool r = yt_double_range(doc, row->items[0], "table temperature", "degC", -5.0,
		                         100.0, &t_c, d);
		r = yt_double_range(doc, row->items[1], "table pH", "pH", 0.0, 14.0, &ph, d) && r;
		if (!r) {
			ok = false;
			continue;
		}
		if (t->n > 0 && !(t_c > t->t_c[t->n - 1])) {
			yt_error(doc, row->items[0], d,
			         "table temperatures must rise row by row (%g after %g)", t_c,
			         t->t_c[t->n - 1]);
			ok = false;
			continue;
		}
		t->t_c[t->n] = t_c;
		t->ph[t->n] = ph;
		t->n++;
	}
	return ok;
}

static bool parse_lab_buffer(const yt_doc_t *doc, const yt_node_t *n, calib_buffer_t *b,
                             diag_list_t *d)
{
	static const char *const keys[] = {"nominal", "name", "table", NULL};
	if (!yt_want_map(doc, n, "calibration.buffers[]", d))
		return false;
	bool ok = yt_check_keys(doc, n, keys, "calibration.buffers[]", d);
	memset(b, 0, sizeof *b);
	b->kind = CALIB_BUF_LAB;
	const yt_node_t *v = yt_get(n, "nominal");
	if (!v) {
		yt_missing(doc, n, "nominal", "calibration.buffers[]", d);
		ok = false;
	} else if (!yt_double_range(doc, v, "calibration.buffers[].nominal", "pH at 25 degC", 0.0,
	                            14.0, &b->nominal_ph, d)) {
		ok = false;
	}
	v = yt_get(n, "name");
	if (v) {
		ok = yt_string(doc, v, "calibration.buffers[].name", b->name, sizeof b->name, d) &&
		     ok;
	} else if (ok) {
		snprintf(b->name, sizeof b->name, "lab buffer %.2f", b->nominal_ph);
	}
	v = yt_get(n, "table");
	if (!v) {
		yt_missing(doc, n, "table", "calibration.buffers[]", d);
		ok = false;
	} else {
		ok = parse_table(doc, v, &b->table, d) && ok;
	}
	return ok;
}

static bool parse_stable(const yt_doc_t *doc, const yt_node_t *n, calib_config_t *c, diag_list_t *d)
{
	static const char *const keys[] = {"drift_mv", "window_s", "min_s", "max_s", NULL};
	if (!yt_want_map(doc, n, "calibration.stable", d))
		return false;
	bool ok = yt_check_keys(doc, n, keys, "calibration.stable", d);
	const yt_node_t *v;
	if ((v = yt_get(n, "drift_mv")))
		ok = yt_double_range(doc, v, "calibration.stable.drift_mv", "mV", 0.001, 10.0,
		                     &c->stable_drift_mv, d) &&
		     ok;
	if ((v = yt_get(n, "window_s")))
		ok = yt_double_range(doc, v, "calibration.stable.window_s", "s", 1.0, 600.0,
		                     &c->stable_window_s, d) &&
		     ok;
	if ((v = yt_get(n, "min_s")))
		ok = yt_double_range(doc, v, "calibration.stable.min_s", "s", 0.0, 3600.0,
		                     &c->stable_min_s, d) &&
		     ok;
	if ((v = yt_get(n, "max_s")))
		ok = yt_double_range(doc, v, "calibration.stable.max_s", "s", 1.0, 7200.0,
		                     &c->stable_max_s, d) &&
		     ok;
	if (ok && !(c->stable_max_s > c->stable_min_s && c->stable_max_s > c->stable_window_s)) {
		yt_error(doc, n, d,
		         "calibration.stable.max_s (%g s) must be above min_s (%g s) and "
		         "window_s (%g s)",
		         c->stable_max_s, c->stable_min_s, c->stable_window_s);
		ok = false;
	}
	return ok;
}

int calib_config_parse(const yt_doc_t *doc, const yt_node_t *n, calib_config_t *c, diag_list_t *d)
{
	static const char *const keys[] = {
	    "slope_pct", "offset_mv", "residual_max_mv", "expires_h", "stable", "buffers", NULL};
	calib_config_defaults(c);
	if (!n || yt_is_null(n))
		return 0;
	if (!yt_want_map(doc, n, "calibration", d))
		return -1;
	bool ok = yt_check_keys(doc, n, keys, "calibration", d);
	const yt_node_t *v;
	if ((v = yt_get(n, "slope_pct")))
		ok = parse_pair(doc, v, "calibration.slope_pct", "% of the Nernst slope", 50.0,
		                150.0, &c->slope_min_pct, &c->slope_max_pct, d) &&
		     ok;
	if ((v = yt_get(n, "offset_mv")))
		ok = parse_pair(doc, v, "calibration.offset_mv", "mV at pH 7", -500.0, 500.0,
		                &c->offset_min_mv, &c->offset_max_mv, d) &&
		     ok;
	if ((v = yt_get(n, "residual_max_mv")))
		ok = yt_double_range(doc, v, "calibration.residual_max_mv", "mV", 0.01, 100.0,
		                     &c->residual_max_mv, d) &&
		     ok;
	if ((v = yt_get(n, "expires_h")))
		ok = yt_double_range(doc, v, "calibration.expires_h", "h", 0.001, 24.0 * 366,
		                     &c->expires_h, d) &&
		     ok;
	if ((v = yt_get(n, "stable")))
		ok = parse_stable(doc, v, c, d) && ok;
	if ((v = yt_get(n, "buffers"))) {
		if (!yt_want_seq(doc, v, "calibration.buffers", d)) {
			ok = false;
		} else if (v->n > CALIB_MAX_LAB_BUFFERS) {
			yt_error(doc, v, d, "calibration.buffers: at most %d tables (got %zu)",
			         CALIB_MAX_LAB_BUFFERS, v->n);
			ok = false;
		} else {
			for (size_t i = 0; i < v->n; i++) {
				calib_buffer_t b;
				if (!parse_lab_buffer(doc, v->items[i], &b, d)) {
					ok = false;
					continue;
				}
				bool dup = false;
				for (int j = 0; j < c->n_lab; j++)
					dup = dup ||
					      fabs(c->lab[j].nominal_ph - b.nominal_ph) <= EXACT_PH;
				if (dup) {
					yt_error(doc, v->items[i], d,
					         "calibration.buffers: a second table for nominal "
					         "%g",
					         b.nominal_ph);
					ok = false;
					continue;
				}
				c->lab[c->n_lab++] = b;
			}
		}
	}
	return ok ? 0 : -1;
}
