/* method_cross.c: results and their formulas, and the rules between keys
 * (see method_priv.h). Each rule reports once, at the key a user is most
 * likely to change; a rule is skipped when one of its values was already
 * reported as bad, so one mistake gives one message. */
#include "method_priv.h"

#include <math.h>
#include <stdio.h>
#include <string.h>
#include <strings.h>

/* ---- positions inside scalars ---- */

static size_t utf8_len(unsigned char c)
{
	if (c < 0x80)
		return 1;
	if ((c & 0xE0) == 0xC0)
		return 2;
	if ((c & 0xF0) == 0xE0)
		return 3;
	if ((c & 0xF8) == 0xF0)
		return 4;
	return 1;
}

/* Byte offset of 1-based (line, col) in text; col counts characters, as
 * libyaml's marks do. Returns len when out of range. */
static size_t offset_of(const char *t, size_t len, int line, int col)
{
	size_t p = 0;
	for (int l = 1; l < line; l++) {
		while (p < len && t[p] != '\n')
			p++;
		if (p >= len)
			return len;
		p++;
	}
	for (int c = 1; c < col && p < len && t[p] != '\n'; c++)
		p += utf8_len((unsigned char)t[p]);
	return p < len ? p : len;
}

static bool is_break(char ch)
{
	return ch == '\n' || ch == '\r';
}

/* Only spaces/tabs until the end of the raw line? Then a break is folded. */
static bool blank_to_eol(const char *t, size_t len, size_t p)
{
	while (p < len && (t[p] == ' ' || t[p] == '\t'))
		p++;
	return p >= len || is_break(t[p]);
}

void mp_scalar_pos(const yt_doc_t *doc, const yt_node_t *n, size_t off, int *line, int *col)
{
	const char *t = doc->text, *v = n->str;
	size_t len = doc->text_len, p, vi = 0;
	int ln = n->line, cl = n->col;
	char style; /* 'p'lain, '"', '\'', '|' or '>' */
	*line = n->line;
	*col = n->col;
	if (!t || !v)
		return;
	p = offset_of(t, len, n->line, n->col);
	if (p >= len)
		return;
	style = t[p] == '"' || t[p] == '\'' || t[p] == '|' || t[p] == '>' ? t[p] : 'p';
	if (style == '"' || style == '\'') {
		p++;
		cl++;
	} else if (style == '|' || style == '>') {
		/* Content starts on the next line, after the indentation. */
		while (p < len && !is_break(t[p]))
			p++;
		if (p < len && t[p] == '\r')
			p++;
		if (p < len && t[p] == '\n')
			p++;
		ln++;
		cl = 1;
		while (p < len && t[p] == ' ') {
			p++;
			cl++;
		}
	}
	while (vi < off && vi < n->len && p < len) {
		unsigned char rc = (unsigned char)t[p];
		if (is_break((char)rc) ||
		    ((rc == ' ' || rc == '\t') && style != '|' && blank_to_eol(t, len, p))) {
			/* A line fold: trailing blanks, k breaks, indentation give one
			 * space for k = 1 (k newlines in a literal block) or k-1 newlines. */
			int k = 0;
			while (p < len && (t[p] == ' ' || t[p] == '\t'))
				p++;
			while (p < len && is_break(t[p])) {
				if (t[p] == '\r' && p + 1 < len && t[p + 1] == '\n')
					p++;
				p++;
				k++;
				ln++;
				cl = 1;
				while (p < len && (t[p] == ' ' || t[p] == '\t')) {
					p++;
					cl++;
				}
			}
			vi += style == '|' ? (size_t)k : (k <= 1 ? 1 : (size_t)(k - 1));
			continue;
		}
		if (style == '"' && rc == '\\' && p + 1 < len) {
			char e = t[p + 1];
			size_t skip = e == 'x' ? 4 : e == 'u' ? 6 : e == 'U' ? 10 : 2;
			p += skip;
			cl += (int)skip;
			vi += 1;
			continue;
		}
		if (style == '\'' && rc == '\'' && p + 1 < len && t[p + 1] == '\'') {
			p += 2;
			cl += 2;
			vi += 1;
			continue;
		}
		p += utf8_len(rc);
		vi += utf8_len((unsigned char)v[vi]);
		cl++;
	}
	*line = ln;
	*col = cl;
}

/* ---- results ---- */

static bool result_name_ok(const char *s)
{
	if (!(*s >= 'a' && *s <= 'z'))
		return false;
	for (; *s; s++)
		if (!((*s >= 'a' && *s <= 'z') || (*s >= '0' && *s <= '9') || *s == '_'))
			return false;
	return true;
}

static void formula_error(mp_ctx_t *c, const yt_node_t *n, size_t off, const char *path,
                          const char *msg)
{
	int line, col;
	mp_scalar_pos(c->doc, n, off, &line, &col);
	diag_add(c->d, c->doc->file, line, col, "%s: %s", path, msg);
}

static bool ident_start(char ch)
{
	return (ch >= 'a' && ch <= 'z') || (ch >= 'A' && ch <= 'Z') || ch == '_';
}

static bool ident_char(char ch)
{
	return ident_start(ch) || (ch >= '0' && ch <= '9');
}

/* Variables that exist in the language but not in this method, each at its
 * own column. The formula compiled, so every identifier is a variable. */
static void check_formula_vars(mp_ctx_t *c, const yt_node_t *n, const char *text, const char *path)
{
	const method_t *m = c->m;
	char msg[256];
	for (size_t i = 0; text[i]; i++) {
		size_t start = i, len;
		int var = -1;
		if (!ident_start(text[i]) ||
		    (i > 0 && (ident_char(text[i - 1]) || text[i - 1] == '.')))
			continue;
		while (ident_char(text[i + 1]))
			i++;
		len = i + 1 - start;
		for (int v = 0; v < FV_COUNT; v++) {
			const char *name = formula_var_name((formula_var_t)v);
			if (strlen(name) == len && !strncmp(name, text + start, len))
				var = v;
		}
		if (var < 0)
			continue;
		msg[0] = '\0';
		if (var < FV_BLANK_ML && !c->f_count.bad && var % 4 + 1 > m->count &&
		    m->n_criteria > 0)
			snprintf(msg, sizeof msg,
			         "%s needs a detect list of at least %d criteria (this method "
			         "lists %d)",
			         formula_var_name((formula_var_t)var), var % 4 + 1, m->count);
		else if (var < FV_BLANK_ML && !c->f_count.bad && var % 4 + 1 > m->count)
			snprintf(msg, sizeof msg,
			         "%s needs detect.count of at least %d (this method finds %d "
			         "endpoint%s)",
			         formula_var_name((formula_var_t)var), var % 4 + 1, m->count,
			         m->count == 1 ? "" : "s");
		else if (var >= FV_END_PH && var < FV_BLANK_ML && m->signal == SIGNAL_MV)
			snprintf(msg, sizeof msg, "%s needs signal: ph (this method measures mV)",
			         formula_var_name((formula_var_t)var));
		else if (var == FV_BLANK_ML && m->purpose == PURPOSE_BLANK)
			snprintf(msg, sizeof msg,
			         "blank_ml cannot be used in a blank method (the blank is what it "
			         "measures)");
		else if (var >= FV_ADD_ML && !c->steps_bad &&
		         (var - FV_ADD_ML) % 4 >= method_additions(m))
			snprintf(msg, sizeof msg,
			         "%s needs at least %d add step%s in before (this method has %d)",
			         formula_var_name((formula_var_t)var), (var - FV_ADD_ML) % 4 + 1,
			         (var - FV_ADD_ML) % 4 ? "s" : "", method_additions(m));
		else if (var == FV_TITER && m->purpose == PURPOSE_STANDARDIZE)
			snprintf(msg, sizeof msg,
			         "titer cannot be used in a standardize method (it determines the "
			         "titer)");
		if (msg[0])
			formula_error(c, n, start, path, msg);
	}
}

static void parse_result(mp_ctx_t *c, const yt_node_t *item, int i)
{
	static const char *const keys[] = {"name", "formula", "unit", "decimals", "accept", NULL};
	method_t *m = c->m;
	method_result_t *r = &m->results[m->n_results];
	char where[32], path[64], msg[256];
	const yt_node_t *n, *acc;
	long dec = 2;
	int col;
	bool named = false;

	snprintf(where, sizeof where, "results[%d]", i + 1);
	if (!yt_want_map(c->doc, item, where, c->d))
		return;
	yt_check_keys(c->doc, item, keys, where, c->d);
	memset(r, 0, sizeof *r);
	r->decimals = 2;

	n = yt_get(item, "name");
	snprintf(path, sizeof path, "%s.name", where);
	if (!n) {
		yt_missing(c->doc, item, "name", where, c->d);
	} else if (yt_string(c->doc, n, path, r->name, sizeof r->name, c->d)) {
		if (!result_name_ok(r->name)) {
			yt_error(c->doc, n, c->d,
			         "%s must be a lower-case word of letters, digits and '_', "
			         "starting with a letter (got \"%s\")",
			         path, r->name);
		} else {
			named = true;
			for (int j = 0; j < m->n_results; j++)
				if (!strcmp(m->results[j].name, r->name)) {
					yt_error(c->doc, n, c->d,
					         "%s '%s' is already used by an earlier result",
					         path, r->name);
					named = false;
				}
		}
	}

	n = yt_get(item, "formula");
	snprintf(path, sizeof path, "%s.formula", where);
	if (!n) {
		yt_missing(c->doc, item, "formula", where, c->d);
	} else if (yt_string(c->doc, n, path, r->formula_text, sizeof r->formula_text, c->d)) {
		int fline, fcol;
		mp_scalar_pos(c->doc, n, 0, &fline, &fcol);
		if (formula_compile_at(r->formula_text, fcol, &r->formula, msg, sizeof msg, &col) !=
		    0)
			formula_error(c, n, (size_t)(col > 0 ? col - 1 : 0), path, msg);
		else
			check_formula_vars(c, n, r->formula_text, path);
	}

	n = yt_get(item, "unit");
	snprintf(path, sizeof path, "%s.unit", where);
	if (n && !yt_is_null(n))
		yt_string(c->doc, n, path, r->unit, sizeof r->unit, c->d);

	n = yt_get(item, "decimals");
	snprintf(path, sizeof path, "%s.decimals", where);
	if (n && yt_long(c->doc, n, path, 0, 10, &dec, c->d))
		r->decimals = (int)dec;

	if (named && !c->titer_is_named &&
	    (!strcmp(r->name, "titer") ||
	     (c->titer_index < 0 &&
	      (!strcmp(r->name, "molarity") || !strcasecmp(r->unit, "mol/L"))))) {
		c->titer_index = m->n_results;
		c->titer_is_named = !strcmp(r->name, "titer");
		c->titer_item = item;
	}

	acc = yt_get(item, "accept");
	snprintf(path, sizeof path, "%s.accept", where);
	if (acc && yt_want_map(c->doc, acc, path, c->d)) {
		static const char *const akeys[] = {"min", "max", NULL};
		const yt_node_t *lo = yt_get(acc, "min"), *hi = yt_get(acc, "max");
		char p2[80];
		yt_check_keys(c->doc, acc, akeys, path, c->d);
		snprintf(p2, sizeof p2, "%s.min", path);
		if (lo && yt_double(c->doc, lo, p2, r->unit, &r->accept_min, c->d))
			r->has_min = true;
		snprintf(p2, sizeof p2, "%s.max", path);
		if (hi && yt_double(c->doc, hi, p2, r->unit, &r->accept_max, c->d))
			r->has_max = true;
		if (r->has_min && r->has_max && r->accept_min > r->accept_max)
			yt_error(c->doc, lo, c->d, "%s.min (%g) must not exceed %s.max (%g)", path,
			         r->accept_min, path, r->accept_max);
	}
	m->n_results++;
}

void mp_parse_results(mp_ctx_t *c, const yt_node_t *root)
{
	const yt_node_t *rs = yt_get(root, "results");
	if (!rs)
		return;
	if (!yt_want_seq(c->doc, rs, "results", c->d))
		return;
	for (size_t i = 0; i < rs->n; i++) {
		if (i >= METHOD_MAX_RESULTS) {
			yt_error(c->doc, rs->items[i], c->d,
			         "results may hold at most %d entries (this is entry %zu)",
			         METHOD_MAX_RESULTS, i + 1);
			break;
		}
		parse_result(c, rs->items[i], (int)i);
	}
}

/* ---- rules between keys ---- */

/* Report at a's node when the user wrote it, else at b's. */
static const yt_node_t *at(const mp_field_t *a, const mp_field_t *b)
{
	return a->node ? a->node : b->node;
}

static bool both_ok(const mp_field_t *a, const mp_field_t *b)
{
	return !a->bad && !b->bad;
}

static void check_limits(mp_ctx_t *c)
{
	const method_t *m = c->m;
	const method_limits_t *lim = c->lim;
	const char *dose_key =
	    m->dosing == DOSING_CONSTANT ? "dosing.dose_ml" : "dosing.dose_max_ml";
	const mp_field_t *dose = m->dosing == DOSING_CONSTANT ? &c->f_dose : &c->f_dose_max;
	if (!lim)
		return;
	if (!c->f_vol_max.bad && lim->vessel_max_ml > 0 && m->volume_max_ml > lim->vessel_max_ml)
		yt_error(c->doc, c->f_vol_max.node, c->d,
		         "stop.volume_max_ml (%g mL) is above the station's vessel_max_ml (%g mL)",
		         m->volume_max_ml, lim->vessel_max_ml);
	/* The sample goes into the same beaker as the titrant (diluent too, but
	 * the method does not know how much). */
	if (!c->f_vol_max.bad && !c->f_sample_bad && !c->f_sample_max.bad &&
	    lim->vessel_max_ml > 0 && m->sample_unit == UNIT_ML &&
	    m->volume_max_ml <= lim->vessel_max_ml &&
	    m->sample_max + m->volume_max_ml > lim->vessel_max_ml)
		yt_error(c->doc, at(&c->f_sample_max, &c->f_vol_max), c->d,
		         "sample.max (%g mL) plus stop.volume_max_ml (%g mL) is above the "
		         "station's vessel_max_ml (%g mL)",
		         m->sample_max, m->volume_max_ml, lim->vessel_max_ml);
	if (lim->burette_capacity_ml > 0) {
		int refills = lim->max_refills > 0 ? lim->max_refills : 0;
		double most_ml = lim->burette_capacity_ml * (1 + refills);
		if (!c->f_vol_max.bad && m->volume_max_ml > most_ml)
			yt_error(c->doc, c->f_vol_max.node, c->d,
			         "stop.volume_max_ml (%g mL) is more than the burette can deliver: "
			         "%g mL capacity x (1 + %d refill%s) = %g mL",
			         m->volume_max_ml, lim->burette_capacity_ml, refills,
			         refills == 1 ? "" : "s", most_ml);
		if (!dose->bad && m->dose_max_ml > lim->burette_capacity_ml)
			yt_error(c->doc, dose->node ? dose->node : c->f_vol_max.node, c->d,
			         "%s (%g mL) is above the burette's capacity (%g mL)", dose_key,
			         m->dose_max_ml, lim->burette_capacity_ml);
	}
}

void mp_cross_check(mp_ctx_t *c, const yt_node_t *root)
{
	const method_t *m = c->m;
	const char *su = method_unit_name(m->sample_unit);
	const char *sig = mp_signal_unit(m);

	if (!c->f_sample_bad && both_ok(&c->f_sample_min, &c->f_sample_max) &&
	    m->sample_min > m->sample_max)
		yt_error(c->doc, at(&c->f_sample_min, &c->f_sample_max), c->d,
		         "sample.min (%g %s) must not exceed sample.max (%g %s)", m->sample_min, su,
		         m->sample_max, su);

	if (m->dosing != DOSING_CONSTANT && both_ok(&c->f_dose_min, &c->f_dose_max) &&
	    m->dose_min_ml > m->dose_max_ml)
		yt_error(c->doc, at(&c->f_dose_min, &c->f_dose_max), c->d,
		         "dosing.dose_min_ml (%g mL) must not exceed dosing.dose_max_ml (%g mL)",
		         m->dose_min_ml, m->dose_max_ml);

	if (!c->f_vol_max.bad) {
		const mp_field_t *dose = m->dosing == DOSING_CONSTANT ? &c->f_dose : &c->f_dose_max;
		if (!dose->bad && !c->f_mode.bad && m->dose_max_ml > m->volume_max_ml)
			yt_error(c->doc, at(dose, &c->f_vol_max), c->d,
			         "%s (%g mL) must not exceed stop.volume_max_ml (%g mL)",
			         m->dosing == DOSING_CONSTANT ? "dosing.dose_ml"
			                                      : "dosing.dose_max_ml",
			         m->dose_max_ml, m->volume_max_ml);
		if (!c->f_predose.bad && m->initial_ml >= m->volume_max_ml)
			yt_error(
			    c->doc, at(&c->f_predose, &c->f_vol_max), c->d,
			    "start.initial_ml (%g mL) must be below stop.volume_max_ml (%g mL)",
			    m->initial_ml, m->volume_max_ml);
		if (!c->f_past.bad && m->past_endpoint_ml > m->volume_max_ml)
			yt_error(c->doc, at(&c->f_past, &c->f_vol_max), c->d,
			         "stop.past_endpoint_ml (%g mL) must not exceed stop.volume_max_ml "
			         "(%g mL)",
			         m->past_endpoint_ml, m->volume_max_ml);
	}

	if (both_ok(&c->f_wait_min, &c->f_wait_max) && m->wait_min_s > m->wait_max_s)
		yt_error(c->doc, at(&c->f_wait_min, &c->f_wait_max), c->d,
		         "settle.wait_min_s (%g s) must not exceed settle.wait_max_s (%g s)",
		         m->wait_min_s, m->wait_max_s);
	if (both_ok(&c->f_still_for, &c->f_wait_max) && m->still_for_s > m->wait_max_s)
		yt_error(c->doc, at(&c->f_still_for, &c->f_wait_max), c->d,
		         "settle.still_for_s (%g s) must not exceed settle.wait_max_s (%g s): the "
		         "reading could never be still for long enough",
		         m->still_for_s, m->wait_max_s);

	if (both_ok(&c->f_time_max, &c->f_stir) && m->time_max_s <= m->stir_s)
		yt_error(c->doc, at(&c->f_time_max, &c->f_stir), c->d,
		         "stop.time_max_s (%g s) must be longer than start.stir_s (%g s)",
		         m->time_max_s, m->stir_s);

	/* (a detect list's targets are checked against the limit with their order) */
	if (m->has_signal_limit && m->has_target && m->signal_limit == m->target &&
	    m->n_criteria == 0)
		yt_error(c->doc, c->f_limit.node, c->d,
		         "stop.signal_limit (%g %s) must differ from detect.target (%g %s)",
		         m->signal_limit, sig, m->target, sig);

	if (m->purpose == PURPOSE_STANDARDIZE && !c->f_purpose.bad) {
		const yt_node_t *rk = yt_key(root, "results");
		if (!c->f_sample_bad && !c->f_unit.bad && c->f_unit.node &&
		    m->sample_unit != UNIT_G)
			yt_error(c->doc, c->f_unit.node, c->d,
			         "sample.unit must be g with purpose: standardize (the primary "
			         "standard is weighed; got %s)",
			         su);
		if (c->titer_index < 0) {
			yt_error(c->doc, rk ? rk : c->f_purpose.node, c->d,
			         "purpose: standardize needs a result named 'titer' (the titrant's "
			         "actual/nominal molarity) or 'molarity' (in mol/L)");
		} else {
			const method_result_t *r = &m->results[c->titer_index];
			unsigned ends = (1u << FV_END_ML) | (1u << (FV_END_ML + 1)) |
			                (1u << (FV_END_ML + 2)) | (1u << (FV_END_ML + 3));
			if (r->formula.n > 0 &&
			    (!(r->formula.used & (1u << FV_AMOUNT)) || !(r->formula.used & ends)))
				yt_error(
				    c->doc, yt_get(c->titer_item, "formula"), c->d,
				    "results[%d].formula: the %s formula must use amount (the "
				    "weighed standard, g) and an endpoint volume such as end1_ml",
				    c->titer_index + 1, r->name);
		}
	}

	check_limits(c);
}

void method_limits_init(method_limits_t *lim)
{
	memset(lim, 0, sizeof *lim);
	lim->max_refills = METHOD_MAX_REFILLS;
}

void method_limits_add_station(method_limits_t *lim, double vessel_max_ml, double capacity_ml)
{
	if (vessel_max_ml > 0 && (lim->vessel_max_ml == 0 || vessel_max_ml < lim->vessel_max_ml))
		lim->vessel_max_ml = vessel_max_ml;
	if (capacity_ml > 0 &&
	    (lim->burette_capacity_ml == 0 || capacity_ml < lim->burette_capacity_ml))
		lim->burette_capacity_ml = capacity_ml;
}

/* Thresholds of the warnings (docs/methods.md, "Warnings"), common practice:
 * a glass electrode's reading is noisy by about 0.1 mV RMS, so a settling
 * band below twice that (0.2 mV, about 0.0034 pH) is never reached by a
 * still electrode; burette syringes are 1 to 50 mL. */
#define WARN_NOISE_MV       0.2
#define WARN_NOISE_PH       0.0034
#define WARN_BIGGEST_SYR_ML 50.0

int method_warnings(const method_t *m, bool have_burette, char (*out)[256], int cap)
{
	int n = 0;
#define WARN(...)                                                                                  \
	do {                                                                                       \
		if (n < cap)                                                                       \
			snprintf(out[n++], 256, __VA_ARGS__);                                      \
	} while (0)
	bool mv = m->signal == SIGNAL_MV;
	/* pH-sized numbers on a mV signal: a window or an aim of a few units
	 * is a fraction of a pH step in mV (59 mV per pH at 25 degC). */
	if (mv && m->has_window && fabs(m->window_lo) <= 14 && fabs(m->window_hi) <= 14)
		WARN("detect.window [%g, %g] looks like pH values, but signal is mv: the window "
		     "is in mV (about 59 mV per pH unit at 25 degC)",
		     m->window_lo, m->window_hi);
	if (mv && m->dosing != DOSING_CONSTANT && m->step_aim < 2)
		WARN("dosing.step_aim %g looks like a pH step, but signal is mv: it is in mV (try "
		     "about %g mV for %g pH)",
		     m->step_aim, m->step_aim * 59.16, m->step_aim);
	double noise = mv ? WARN_NOISE_MV : WARN_NOISE_PH;
	if (m->still_within < noise)
		WARN("settle.still_within %g %s is below the noise of a typical electrode (about "
		     "%g %s): points will be taken at wait_max_s, not when still",
		     m->still_within, mv ? "mV" : "pH", noise, mv ? "mV" : "pH");
	double dose_max = m->dosing != DOSING_CONSTANT ? m->dose_max_ml : m->dose_ml;
	if (!have_burette && dose_max > WARN_BIGGEST_SYR_ML)
		WARN("dosing.%s %g mL is more than the largest common burette syringe holds (%g "
		     "mL); check the method against the station with -c stopcockd.yaml",
		     m->dosing != DOSING_CONSTANT ? "dose_max_ml" : "dose_ml", dose_max,
		     WARN_BIGGEST_SYR_ML);
	if (m->dosing != DOSING_CONSTANT && m->dose_max_ml <= 2 * m->dose_min_ml)
		WARN("dosing.step_aim has almost no effect: dose_max_ml (%g mL) leaves the doses "
		     "between %g and %g mL whatever the curve does",
		     m->dose_max_ml, m->dose_min_ml, m->dose_max_ml);
#undef WARN
	return n;
}
