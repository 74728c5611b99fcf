/* method.c: parse and validate a method file (see method.h, docs/methods.md).
 *
 * One pass over the YAML tree fills method_t with each key's value or its
 * documented default and reports every bad key, type and range; a second pass
 * (method_cross.c) checks the rules that tie keys together. Errors go on
 * being collected after the first, so an author fixes a file in one round.
 * Every physical range below is a unit-carrying bound stated once, here.
 */
#include "method.h"
#include "method_priv.h"
#include "stats.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include "digest.h"
#include "names.h"

/* Electrode ranges: a glass electrode reads pH -1 .. 15; a mV input spans
 * +-1000 mV (common practice for pH/mV transmitters). */
#define PH_LO -1.0
#define PH_HI 15.0
#define MV_LO -1000.0
#define MV_HI 1000.0

static const char *const purpose_words[] = {"assay", "standardize", "blank", NULL};
static const char *const signal_words[] = {"ph", "mv", NULL};
static const char *const dosing_words[] = {"adaptive", "constant", "guided", NULL};
static const char *const rule_words[] = {"still", "extrapolate", NULL};
static const char *const detect_words[] = {"inflection", "target", "gran", NULL};
static const char *const unit_words[] = {"mL", "g", NULL};

const char *method_purpose_name(method_purpose_t p)
{
	return (unsigned)p < 3 ? purpose_words[p] : "?";
}

const char *method_signal_name(method_signal_t s)
{
	return (unsigned)s < 2 ? signal_words[s] : "?";
}

const char *method_detect_name(method_detect_t k)
{
	return (unsigned)k < 3 ? detect_words[k] : "?";
}

const char *method_unit_name(method_unit_t u)
{
	return (unsigned)u < 2 ? unit_words[u] : "?";
}

const char *method_dosing_name(method_dosing_t d)
{
	return (unsigned)d < 3 ? dosing_words[d] : "?";
}

const char *method_settle_rule_name(method_settle_rule_t r)
{
	return (unsigned)r < 2 ? rule_words[r] : "?";
}

const char *mp_signal_unit(const method_t *m)
{
	return m->signal == SIGNAL_MV ? "mV" : "pH";
}

void mp_signal_range(const method_t *m, double *lo, double *hi)
{
	*lo = m->signal == SIGNAL_MV ? MV_LO : PH_LO;
	*hi = m->signal == SIGNAL_MV ? MV_HI : PH_HI;
}

void method_defaults(method_t *m)
{
	memset(m, 0, sizeof *m);
	m->revision = 1;
	m->purpose = PURPOSE_ASSAY;
	m->titrant_molarity = 0.1;
	m->sample_unit = UNIT_ML;
	m->sample_min = 0.001;
	m->sample_max = 1000.0;
	m->signal = SIGNAL_PH;
	m->stir_s = 10.0;
	m->initial_ml = 0.0;
	m->dosing = DOSING_ADAPTIVE;
	m->step_aim = 0.10;
	m->dose_min_ml = 0.005;
	m->dose_max_ml = 0.50;
	m->dose_ml = 0.05;
	m->wait_min_s = 2.0;
	m->wait_max_s = 30.0;
	m->still_within = 0.02;
	m->still_for_s = 3.0;
	m->detect = DETECT_INFLECTION;
	m->count = 1;
	m->min_jump = 0.5;
	m->u_max_pct = METHOD_U_MAX_PCT;
	m->past_endpoint_ml = 0.5;
	m->volume_max_ml = 10.0;
	m->time_max_s = 1800.0;
	m->replicates = 1;
	m->blank_valid_days = NAN;
}

/* Defaults in signal units change with the signal: a 0.1 pH step is about
 * 6 mV at 25 degC (59.16 mV/pH, CODATA 2018 via docs/chemistry.md §4). */
static void signal_defaults(method_t *m)
{
	if (m->signal == SIGNAL_MV) {
		m->step_aim = 6.0;
		m->still_within = 1.0;
		m->min_jump = 30.0;
	}
}

/* ---- small helpers shared with method_cross.c ---- */

/* "missing key", unless a misspelt key already stands in its place: then the
 * unknown-key error ("did you mean ...") says it all. */
static void missing(mp_ctx_t *c, const yt_node_t *map, const char *key, const char *where)
{
	/* Every key of the schema: a known key is never taken for a typo. */
	/* clang-format off */
	static const char *const known[] = {
		"method", "title", "revision", "purpose", "titrant", "sample", "signal", "start",
		"dosing", "settle", "detect", "stop", "results", "name", "molarity", "unit", "min",
		"max", "stir_s", "initial_ml", "mode", "step_aim", "dose_min_ml", "dose_max_ml",
		"dose_ml", "wait_min_s", "wait_max_s", "still_within", "still_for_s", "kind",
		"count", "min_jump", "window", "target", "past_endpoint_ml", "volume_max_ml",
		"signal_limit", "time_max_s", "formula", "decimals", "accept", "fallback", "rule", "u_max_pct",
		"before", "after", "add", "doser", "ml", "wait_s", "rinse_s", "replicates",
		"max_rsd_pct", "blank", "valid_days",
		NULL};
	/* clang-format on */
	for (size_t i = 0; map && map->kind == YT_MAP && i < map->n; i++) {
		const char *k = map->keys[i]->str;
		bool is_known = false;
		for (size_t j = 0; known[j]; j++)
			if (!strcmp(k, known[j]))
				is_known = true;
		if (!is_known && yt_edit_distance(k, key, 2) <= 2)
			return;
	}
	yt_missing(c->doc, map, key, where, c->d);
}

static const yt_node_t *section(mp_ctx_t *c, const yt_node_t *parent, const char *key,
                                bool required, const char *const *allowed, bool *bad)
{
	const yt_node_t *n = yt_get(parent, key);
	*bad = false;
	if (!n) {
		if (required)
			missing(c, parent, key, "method");
		*bad = required;
		return NULL;
	}
	if (!yt_want_map(c->doc, n, key, c->d)) {
		*bad = true;
		return NULL;
	}
	yt_check_keys(c->doc, n, allowed, key, c->d);
	return n;
}

/* A number in node n with lo <= v <= hi (lo < v when lo_open). An absent
 * node keeps *out (the default) and leaves f->node NULL. */
static bool num_node(mp_ctx_t *c, const yt_node_t *n, const char *path, const char *unit, double lo,
                     bool lo_open, double hi, double *out, mp_field_t *f)
{
	double v;
	f->node = n;
	f->bad = false;
	if (!n)
		return true;
	if (!yt_double(c->doc, n, path, unit, &v, c->d)) {
		f->bad = true;
		return false;
	}
	if ((lo_open ? v <= lo : v < lo) || v > hi) {
		if (lo_open)
			yt_error(c->doc, n, c->d, "%s must be above %g and at most %g %s (got %g)",
			         path, lo, hi, unit, v);
		else
			yt_error(c->doc, n, c->d, "%s must be between %g and %g %s (got %g)", path,
			         lo, hi, unit, v);
		f->bad = true;
		return false;
	}
	*out = v;
	return true;
}

static bool num(mp_ctx_t *c, const yt_node_t *map, const char *key, const char *path,
                const char *unit, double lo, bool lo_open, double hi, double *out, mp_field_t *f)
{
	return num_node(c, yt_get(map, key), path, unit, lo, lo_open, hi, out, f);
}

static bool word(mp_ctx_t *c, const yt_node_t *map, const char *key, const char *path,
                 const char *const *words, int *out, mp_field_t *f)
{
	const yt_node_t *n = yt_get(map, key);
	f->node = n;
	f->bad = false;
	if (!n)
		return true;
	if (!yt_enum(c->doc, n, path, words, out, c->d)) {
		f->bad = true;
		return false;
	}
	return true;
}

/* ---- sections ---- */

static void parse_head(mp_ctx_t *c, const yt_node_t *root, const char *name)
{
	method_t *m = c->m;
	const yt_node_t *n;
	int w;

	n = yt_get(root, "method");
	if (!n) {
		missing(c, root, "method", "method");
	} else if (yt_string(c->doc, n, "method", m->id, sizeof m->id, c->d)) {
		if (!name_is_id(m->id, 0)) {
			yt_error(c->doc, n, c->d,
			         "method must be an id of lower-case letters, digits and '-' "
			         "(got \"%s\")",
			         m->id);
		} else if (name) {
			/* The id names the file, so a copied file cannot shadow another. */
			const char *base = strrchr(name, '/');
			size_t len;
			base = base ? base + 1 : name;
			len = strlen(base);
			if (len > 5 && !strcmp(base + len - 5, ".yaml") &&
			    (strlen(m->id) != len - 5 || strncmp(base, m->id, len - 5) != 0))
				yt_error(c->doc, n, c->d,
				         "method '%s' must equal the file name '%.*s' (without "
				         ".yaml)",
				         m->id, (int)(len - 5), base);
		}
	}

	n = yt_get(root, "title");
	if (!n)
		missing(c, root, "title", "method");
	else
		yt_string(c->doc, n, "title", m->title, sizeof m->title, c->d);

	n = yt_get(root, "revision");
	if (!n)
		missing(c, root, "revision", "method");
	else
		yt_long(c->doc, n, "revision", 1, 1000000000L, &m->revision, c->d);

	w = (int)m->purpose;
	if (word(c, root, "purpose", "purpose", purpose_words, &w, &c->f_purpose))
		m->purpose = (method_purpose_t)w;

	w = (int)m->signal;
	if (word(c, root, "signal", "signal", signal_words, &w, &c->f_signal))
		m->signal = (method_signal_t)w;
	else if (c->f_signal.node && c->f_signal.node->str &&
	         !strcasecmp(c->f_signal.node->str, "mv"))
		/* "mV" is already an error; read the rest as mV so its values do
		 * not all fail the pH ranges as well. */
		m->signal = SIGNAL_MV;
	signal_defaults(m);
}

static void parse_titrant(mp_ctx_t *c, const yt_node_t *root)
{
	static const char *const keys[] = {"name", "molarity", NULL};
	method_t *m = c->m;
	bool bad;
	const yt_node_t *t = section(c, root, "titrant", true, keys, &bad), *n;
	if (!t)
		return;
	n = yt_get(t, "name");
	if (!n)
		missing(c, t, "name", "titrant");
	else
		yt_string(c->doc, n, "titrant.name", m->titrant_name, sizeof m->titrant_name, c->d);
	if (!yt_get(t, "molarity"))
		missing(c, t, "molarity", "titrant");
	/* 20 mol/L: above the strongest aqueous titrants in use (common practice). */
	num(c, t, "molarity", "titrant.molarity", "mol/L", 0.0, true, 20.0, &m->titrant_molarity,
	    &c->f_molarity);
}

static void parse_sample(mp_ctx_t *c, const yt_node_t *root)
{
	static const char *const keys[] = {"unit", "min", "max", NULL};
	method_t *m = c->m;
	bool blank = m->purpose == PURPOSE_BLANK;
	bool bad;
	const yt_node_t *s = section(c, root, "sample", !blank, keys, &bad);
	int w = (int)m->sample_unit;
	const char *u;
	if (blank)
		m->sample_min = 0.0; /* a blank may be solvent only */
	c->f_sample_bad = bad;
	if (!s)
		return;
	if (!yt_get(s, "unit"))
		missing(c, s, "unit", "sample");
	if (word(c, s, "unit", "sample.unit", unit_words, &w, &c->f_unit))
		m->sample_unit = (method_unit_t)w;
	u = method_unit_name(m->sample_unit);
	/* Amounts divide results, so only a blank may have amount 0. */
	num(c, s, "min", "sample.min", u, 0.0, !blank, 10000.0, &m->sample_min, &c->f_sample_min);
	num(c, s, "max", "sample.max", u, 0.0, true, 10000.0, &m->sample_max, &c->f_sample_max);
}

static void parse_start(mp_ctx_t *c, const yt_node_t *root)
{
	/* "predose_ml" stays in the list only so that its error names the new key
	 * instead of guessing at a typo. */
	static const char *const keys[] = {"stir_s", "initial_ml", "predose_ml", NULL};
	method_t *m = c->m;
	bool bad;
	const yt_node_t *s = section(c, root, "start", false, keys, &bad);
	c->f_stir.bad = c->f_predose.bad = bad;
	if (!s)
		return;
	for (size_t i = 0; i < s->n; i++)
		if (!strcmp(s->keys[i]->str, "predose_ml")) {
			yt_error(c->doc, s->keys[i], c->d,
			         "start.predose_ml was renamed to start.initial_ml");
			c->f_predose.bad = true;
		}
	num(c, s, "stir_s", "start.stir_s", "s", 0.0, false, 3600.0, &m->stir_s, &c->f_stir);
	num(c, s, "initial_ml", "start.initial_ml", "mL", 0.0, false, 1000.0, &m->initial_ml,
	    &c->f_predose);
}

static void not_here(mp_ctx_t *c, const yt_node_t *map, const char *key, const char *msg)
{
	const yt_node_t *k = yt_key(map, key);
	if (k)
		yt_error(c->doc, k, c->d, "%s", msg);
}

static void parse_dosing(mp_ctx_t *c, const yt_node_t *root)
{
	static const char *const keys[] = {"mode",        "step_aim", "dose_min_ml",
	                                   "dose_max_ml", "dose_ml",  NULL};
	method_t *m = c->m;
	bool bad;
	const yt_node_t *s = section(c, root, "dosing", false, keys, &bad);
	double lo, hi;
	int w = (int)m->dosing;
	c->f_dose_min.bad = c->f_dose_max.bad = c->f_dose.bad = bad;
	if (!s)
		return;
	if (word(c, s, "mode", "dosing.mode", dosing_words, &w, &c->f_mode))
		m->dosing = (method_dosing_t)w;
	if (c->f_mode.bad) {
		c->f_dose_min.bad = c->f_dose_max.bad = c->f_dose.bad = true;
		return;
	}
	/* Doses: 0.5 uL is about the resolution of a 1 mL syringe on a
	 * 2000-step drive; 100 mL is more than any burette holds. */
	if (m->dosing != DOSING_CONSTANT) {
		mp_signal_range(m, &lo, &hi);
		num(c, s, "step_aim", "dosing.step_aim", mp_signal_unit(m), 0.0, true,
		    m->signal == SIGNAL_MV ? 120.0 : 2.0, &m->step_aim, &c->f_step_aim);
		num(c, s, "dose_min_ml", "dosing.dose_min_ml", "mL", 0.0005, false, 100.0,
		    &m->dose_min_ml, &c->f_dose_min);
		num(c, s, "dose_max_ml", "dosing.dose_max_ml", "mL", 0.0005, false, 100.0,
		    &m->dose_max_ml, &c->f_dose_max);
		not_here(c, s, "dose_ml",
		         "dosing.dose_ml applies only to mode: constant (this method doses "
		         "adaptively; remove it or set mode: constant)");
		return;
	}
	not_here(c, s, "step_aim", "dosing.step_aim applies only to mode: adaptive or guided");
	not_here(c, s, "dose_min_ml",
	         "dosing.dose_min_ml applies only to mode: adaptive or guided");
	not_here(c, s, "dose_max_ml",
	         "dosing.dose_max_ml applies only to mode: adaptive or guided");
	if (!yt_get(s, "dose_ml")) {
		yt_error(c->doc, s, c->d,
		         "missing key 'dose_ml' in dosing (required with mode: "
		         "constant)");
		c->f_dose.bad = true;
		return;
	}
	if (num(c, s, "dose_ml", "dosing.dose_ml", "mL", 0.0005, false, 100.0, &m->dose_ml,
	        &c->f_dose)) {
		/* The engine sees one dose size in constant mode. */
		m->dose_min_ml = m->dose_ml;
		m->dose_max_ml = m->dose_ml;
	}
}

static void parse_settle(mp_ctx_t *c, const yt_node_t *root)
{
	static const char *const keys[] = {"rule",         "wait_min_s",  "wait_max_s",
	                                   "still_within", "still_for_s", NULL};
	method_t *m = c->m;
	bool bad;
	const yt_node_t *s = section(c, root, "settle", false, keys, &bad);
	int w = (int)m->settle_rule;
	mp_field_t f_rule;
	c->f_wait_min.bad = c->f_wait_max.bad = c->f_still_for.bad = bad;
	if (!s)
		return;
	if (word(c, s, "rule", "settle.rule", rule_words, &w, &f_rule))
		m->settle_rule = (method_settle_rule_t)w;
	num(c, s, "wait_min_s", "settle.wait_min_s", "s", 0.0, false, 600.0, &m->wait_min_s,
	    &c->f_wait_min);
	num(c, s, "wait_max_s", "settle.wait_max_s", "s", 0.0, true, 3600.0, &m->wait_max_s,
	    &c->f_wait_max);
	num(c, s, "still_within", "settle.still_within", mp_signal_unit(m), 0.0, true,
	    m->signal == SIGNAL_MV ? 100.0 : 2.0, &m->still_within, &c->f_still_within);
	num(c, s, "still_for_s", "settle.still_for_s", "s", 0.0, false, 600.0, &m->still_for_s,
	    &c->f_still_for);
}

/* Where one criterion's values came from: `path` is "detect" for the single
 * mapping, "detect[N]" for the Nth item of a list (messages name it). */
typedef struct crit_fields {
	char path[24];
	mp_field_t kind, count, min_jump, window, target, fallback;
} crit_fields_t;

static void parse_window(mp_ctx_t *c, const yt_node_t *n, crit_fields_t *f, method_criterion_t *cr)
{
	method_t *m = c->m;
	double lo, hi, v[2] = {0, 0};
	bool ok = true;
	const char *u = mp_signal_unit(m);
	char plo[48], phi[48];
	mp_field_t tmp;
	f->window.node = n;
	f->window.bad = true;
	if (n->kind != YT_SEQ || n->n != 2) {
		if (n->kind == YT_SEQ)
			yt_error(c->doc, n, c->d,
			         "%s.window must be a list of two numbers [low, high] in %s "
			         "(got %zu item%s)",
			         f->path, u, n->n, n->n == 1 ? "" : "s");
		else
			yt_error(c->doc, n, c->d,
			         "%s.window must be a list of two numbers [low, high] in %s",
			         f->path, u);
		return;
	}
	mp_signal_range(m, &lo, &hi);
	snprintf(plo, sizeof plo, "%s.window low", f->path);
	snprintf(phi, sizeof phi, "%s.window high", f->path);
	if (!num_node(c, n->items[0], plo, u, lo, false, hi, &v[0], &tmp))
		ok = false;
	if (!num_node(c, n->items[1], phi, u, lo, false, hi, &v[1], &tmp))
		ok = false;
	if (!ok)
		return;
	if (v[0] >= v[1]) {
		yt_error(c->doc, n->items[0], c->d,
		         "%s.window low (%g %s) must be below its high (%g %s)", f->path, v[0], u,
		         v[1], u);
		return;
	}
	cr->window_lo = v[0];
	cr->window_hi = v[1];
	cr->has_window = true;
	f->window.bad = false;
}

/* fallback: {target: X}, the signal to end at when no inflection came first. */
static void parse_fallback(mp_ctx_t *c, const yt_node_t *n, crit_fields_t *f,
                           method_criterion_t *cr)
{
	static const char *const keys[] = {"target", NULL};
	char path[48];
	double lo, hi;
	f->fallback.node = n;
	f->fallback.bad = true;
	snprintf(path, sizeof path, "%s.fallback", f->path);
	if (!yt_want_map(c->doc, n, path, c->d))
		return;
	yt_check_keys(c->doc, n, keys, path, c->d);
	if (!yt_get(n, "target")) {
		yt_missing(c->doc, n, "target", path, c->d);
		return;
	}
	snprintf(path, sizeof path, "%s.fallback.target", f->path);
	mp_signal_range(c->m, &lo, &hi);
	mp_field_t tmp;
	if (num(c, n, "target", path, mp_signal_unit(c->m), lo, false, hi, &cr->fallback, &tmp)) {
		cr->has_fallback = true;
		f->fallback.node = yt_get(n, "target");
		f->fallback.bad = false;
	}
}

/* One criterion: the single detect mapping (in_list false, count allowed)
 * or one item of a detect list (one endpoint each). */
static void parse_criterion(mp_ctx_t *c, const yt_node_t *s, bool in_list, crit_fields_t *f,
                            method_criterion_t *cr)
{
	static const char *const keys[] = {"kind",   "count",    "min_jump",  "window",
	                                   "target", "fallback", "u_max_pct", NULL};
	method_t *m = c->m;
	const yt_node_t *n;
	const char *u = mp_signal_unit(m);
	char path[48];
	double lo, hi;
	long count = cr->count;
	int w = (int)cr->kind;
	yt_check_keys(c->doc, s, keys, f->path, c->d);
	if (!yt_get(s, "kind")) {
		missing(c, s, "kind", f->path);
		f->kind.bad = true;
	} else {
		snprintf(path, sizeof path, "%s.kind", f->path);
		if (word(c, s, "kind", path, detect_words, &w, &f->kind))
			cr->kind = (method_detect_t)w;
	}
	n = yt_get(s, "count");
	f->count.node = n;
	if (n && in_list) {
		not_here(c, s, "count",
		         "a detect list gives one endpoint per item: write the criterion once for "
		         "each endpoint instead of count");
		f->count.bad = true;
	} else if (n) {
		snprintf(path, sizeof path, "%s.count", f->path);
		if (yt_long(c->doc, n, path, 1, METHOD_MAX_ENDPOINTS, &count, c->d))
			cr->count = (int)count;
		else
			f->count.bad = true;
	}
	if (f->kind.bad)
		return;
	mp_signal_range(m, &lo, &hi);
	if (cr->kind != DETECT_INFLECTION && n && !f->count.bad && cr->count != 1) {
		yt_error(c->doc, n, c->d, "%s.count must be 1 with kind: %s (got %d)", f->path,
		         method_detect_name(cr->kind), cr->count);
		f->count.bad = true;
	}
	if (cr->kind == DETECT_INFLECTION) {
		snprintf(path, sizeof path, "%s.min_jump", f->path);
		num(c, s, "min_jump", path, u, 0.0, true, hi - lo, &cr->min_jump, &f->min_jump);
	} else {
		char msg[96];
		snprintf(msg, sizeof msg, "%s.min_jump applies only to kind: inflection", f->path);
		not_here(c, s, "min_jump", msg);
	}

	n = yt_get(s, "window");
	if (n && cr->kind == DETECT_TARGET) {
		snprintf(path, sizeof path, "%s.window", f->path);
		yt_error(c->doc, yt_key(s, "window"), c->d,
		         "%s applies only to kind: inflection or gran (a target is one value)",
		         path);
	} else if (n) {
		parse_window(c, n, f, cr);
	}

	n = yt_get(s, "target");
	if (cr->kind == DETECT_TARGET) {
		snprintf(path, sizeof path, "%s.target", f->path);
		if (!n) {
			yt_error(c->doc, s, c->d,
			         "missing key 'target' in %s (required with kind: target)",
			         f->path);
			f->target.bad = true;
		} else if (num(c, s, "target", path, u, lo, false, hi, &cr->target, &f->target)) {
			cr->has_target = true;
		}
	} else if (n) {
		yt_error(c->doc, yt_key(s, "target"), c->d,
		         "%s.target applies only to kind: target", f->path);
	}

	n = yt_get(s, "fallback");
	if (n && cr->kind == DETECT_TARGET) {
		yt_error(c->doc, yt_key(s, "fallback"), c->d,
		         "%s.fallback applies only to kind: inflection or gran (a target is "
		         "already a fixed signal)",
		         f->path);
		f->fallback.bad = true;
	} else if (n && !f->count.bad && cr->count != 1) {
		yt_error(c->doc, yt_key(s, "fallback"), c->d,
		         "%s.fallback needs %s.count 1 (one endpoint to fall back for)", f->path,
		         f->path);
		f->fallback.bad = true;
	} else if (n) {
		parse_fallback(c, n, f, cr);
	}

	/* docs/methods.md: above this the endpoint is doubtful, never a pass.
	 * One limit for the run: a list may give it on any item, once or alike. */
	n = yt_get(s, "u_max_pct");
	if (n) {
		double v;
		mp_field_t tmp;
		snprintf(path, sizeof path, "%s.u_max_pct", f->path);
		if (num(c, s, "u_max_pct", path, "%", 0.0, true, 100.0, &v, &tmp)) {
			if (c->u_max_node && v != m->u_max_pct)
				yt_error(
				    c->doc, n, c->d,
				    "%s (%g %%) differs from the %g %% given before: one limit "
				    "applies to all of the run's endpoints",
				    path, v, m->u_max_pct);
			m->u_max_pct = v;
			c->u_max_node = n;
		}
	}
}

/* The signals a list's criteria stop at (targets, fallbacks) must run one
 * way, and toward stop.signal_limit when there is one: a criterion is only
 * sought past the endpoint before it, so a target behind the run could
 * never be met. Uses c->crit_sig (set by parse_detect), after parse_stop. */
static void check_order(mp_ctx_t *c)
{
	const method_t *m = c->m;
	const char *u = mp_signal_unit(m);
	method_criterion_t cr[METHOD_MAX_ENDPOINTS];
	int n = method_criteria(m, cr), dir = 0, prev = -1;
	double prev_v = 0;
	const char *dir_from = "";
	char path[24], prev_path[24] = "";
	bool limit = m->has_signal_limit && !c->f_limit.bad;
	if (m->n_criteria == 0 && !(m->has_fallback && limit))
		return; /* one mapping: only a fallback against the limit to check */
	for (int i = 0; i < n; i++) {
		const yt_node_t *node = c->crit_sig[i];
		if (!node)
			continue;
		double v = cr[i].has_target ? cr[i].target : cr[i].fallback;
		const char *what = cr[i].has_target ? "target" : "fallback.target";
		if (m->n_criteria > 0)
			snprintf(path, sizeof path, "detect[%d]", i + 1);
		else
			snprintf(path, sizeof path, "detect");
		if (limit && v == m->signal_limit) {
			yt_error(
			    c->doc, node, c->d,
			    "%s.%s (%g %s) must differ from stop.signal_limit (%g %s): the run "
			    "would stop on reaching it",
			    path, what, v, u, m->signal_limit, u);
			return;
		}
		if (prev < 0 && limit) {
			dir = m->signal_limit > v ? 1 : -1;
			dir_from = "toward stop.signal_limit";
		}
		if (prev >= 0) {
			int d = v > prev_v ? 1 : v < prev_v ? -1 : 0;
			if (dir == 0 && d != 0) {
				dir = d;
				dir_from = d > 0 ? "up, as the first two set it"
				                 : "down, as the first two set it";
			} else if (d != dir) {
				yt_error(c->doc, node, c->d,
				         "%s.%s (%g %s) is out of order: it must lie %s %s's %g %s "
				         "(the run goes %s)",
				         path, what, v, u, dir > 0 ? "above" : "below", prev_path,
				         prev_v, u, dir_from);
				return;
			}
		}
		if (limit && dir != 0 && !(dir * (m->signal_limit - v) > 0)) {
			yt_error(c->doc, node, c->d,
			         "%s.%s (%g %s) lies at or beyond stop.signal_limit (%g %s): the "
			         "run would stop before reaching it",
			         path, what, v, u, m->signal_limit, u);
			return;
		}
		prev = i;
		prev_v = v;
		memcpy(prev_path, path, sizeof path);
	}
}

/* The node of the signal a criterion stops at (target or fallback), or NULL. */
static const yt_node_t *sig_node(const method_criterion_t *cr, const crit_fields_t *f)
{
	if (cr->has_target && !f->target.bad)
		return f->target.node;
	if (cr->has_fallback && !f->fallback.bad)
		return f->fallback.node;
	return NULL;
}

static void parse_detect(mp_ctx_t *c, const yt_node_t *root)
{
	method_t *m = c->m;
	const yt_node_t *s = yt_get(root, "detect");
	method_criterion_t cr;
	crit_fields_t f;
	c->f_count.bad = c->f_window.bad = c->f_target.bad = false;
	if (!s) {
		missing(c, root, "detect", "method");
		c->f_count.bad = c->f_window.bad = c->f_target.bad = true;
		return;
	}
	method_criteria(m, &cr); /* the defaults, as one criterion */
	if (s->kind == YT_SEQ) {
		crit_fields_t fl[METHOD_MAX_ENDPOINTS];
		int n = 0;
		if (s->n == 0) {
			yt_error(
			    c->doc, s, c->d,
			    "detect must be one criterion or a list of 1 to %d criteria (got an "
			    "empty list)",
			    METHOD_MAX_ENDPOINTS);
			c->f_kind.bad = c->f_count.bad = true;
			return;
		}
		if (s->n > METHOD_MAX_ENDPOINTS) {
			yt_error(c->doc, s->items[METHOD_MAX_ENDPOINTS], c->d,
			         "detect lists %zu criteria; at most %d endpoints are allowed",
			         s->n, METHOD_MAX_ENDPOINTS);
			c->f_kind.bad = c->f_count.bad = true;
			return;
		}
		bool bad = false;
		for (size_t i = 0; i < s->n; i++) {
			memset(&fl[n], 0, sizeof fl[n]);
			snprintf(fl[n].path, sizeof fl[n].path, "detect[%d]", n + 1);
			m->criteria[n] = cr;
			if (!yt_want_map(c->doc, s->items[i], fl[n].path, c->d)) {
				bad = true;
				n++;
				continue;
			}
			parse_criterion(c, s->items[i], true, &fl[n], &m->criteria[n]);
			if (fl[n].kind.bad)
				bad = true;
			n++;
		}
		m->n_criteria = n;
		for (int i = 0; i < n && !bad; i++)
			c->crit_sig[i] = sig_node(&m->criteria[i], &fl[i]);
		method_criterion_t *c0 = &m->criteria[0];
		m->detect = c0->kind;
		m->min_jump = c0->min_jump;
		m->has_window = c0->has_window;
		m->window_lo = c0->window_lo;
		m->window_hi = c0->window_hi;
		m->has_target = c0->has_target;
		m->target = c0->target;
		m->has_fallback = c0->has_fallback;
		m->fallback = c0->fallback;
		m->count = n;
		c->f_kind = fl[0].kind;
		c->f_kind.bad = bad;
		c->f_window = fl[0].window;
		c->f_target = fl[0].target;
		return;
	}
	if (!yt_want_map(c->doc, s, "detect", c->d)) {
		c->f_count.bad = c->f_window.bad = c->f_target.bad = true;
		return;
	}
	memset(&f, 0, sizeof f);
	snprintf(f.path, sizeof f.path, "detect");
	parse_criterion(c, s, false, &f, &cr);
	m->detect = cr.kind;
	m->count = cr.count;
	m->min_jump = cr.min_jump;
	m->has_window = cr.has_window;
	m->window_lo = cr.window_lo;
	m->window_hi = cr.window_hi;
	m->has_target = cr.has_target;
	m->target = cr.target;
	m->has_fallback = cr.has_fallback;
	m->fallback = cr.fallback;
	c->f_kind = f.kind;
	c->f_count = f.count;
	c->f_min_jump = f.min_jump;
	c->f_window = f.window;
	c->f_target = f.target;
	c->crit_sig[0] = sig_node(&cr, &f);
}

int method_criteria(const method_t *m, method_criterion_t *out)
{
	if (m->n_criteria > 0) {
		int n = m->n_criteria < METHOD_MAX_ENDPOINTS ? m->n_criteria : METHOD_MAX_ENDPOINTS;
		memcpy(out, m->criteria, (size_t)n * sizeof *out);
		return n;
	}
	method_criterion_t c = {.kind = m->detect,
	                        .count = m->count,
	                        .min_jump = m->min_jump,
	                        .has_window = m->has_window,
	                        .window_lo = m->window_lo,
	                        .window_hi = m->window_hi,
	                        .has_target = m->has_target,
	                        .target = m->target,
	                        .has_fallback = m->has_fallback,
	                        .fallback = m->fallback};
	out[0] = c;
	return 1;
}

void method_for_criterion(const method_t *m, const method_criterion_t *c, method_t *out)
{
	if (out != m)
		*out = *m;
	out->detect = c->kind;
	out->count = c->count;
	out->min_jump = c->min_jump;
	out->has_window = c->has_window;
	out->window_lo = c->window_lo;
	out->window_hi = c->window_hi;
	out->has_target = c->has_target;
	out->target = c->target;
	out->has_fallback = c->has_fallback;
	out->fallback = c->fallback;
	out->n_criteria = 0;
}

static void parse_stop(mp_ctx_t *c, const yt_node_t *root)
{
	static const char *const keys[] = {"past_endpoint_ml", "volume_max_ml", "signal_limit",
	                                   "time_max_s", NULL};
	method_t *m = c->m;
	bool bad;
	const yt_node_t *s = section(c, root, "stop", true, keys, &bad);
	double lo, hi;
	c->f_past.bad = c->f_vol_max.bad = c->f_limit.bad = c->f_time_max.bad = bad;
	if (!s)
		return;
	num(c, s, "past_endpoint_ml", "stop.past_endpoint_ml", "mL", 0.0, false, 100.0,
	    &m->past_endpoint_ml, &c->f_past);
	/* The volume limit is a safety interlock: always written out. */
	if (!yt_get(s, "volume_max_ml")) {
		missing(c, s, "volume_max_ml", "stop");
		c->f_vol_max.bad = true;
	}
	num(c, s, "volume_max_ml", "stop.volume_max_ml", "mL", 0.0, true, 1000.0, &m->volume_max_ml,
	    &c->f_vol_max);
	mp_signal_range(m, &lo, &hi);
	if (num(c, s, "signal_limit", "stop.signal_limit", mp_signal_unit(m), lo, false, hi,
	        &m->signal_limit, &c->f_limit) &&
	    c->f_limit.node)
		m->has_signal_limit = true;
	/* 24 h: longer than any titration; catches a forgotten run. */
	num(c, s, "time_max_s", "stop.time_max_s", "s", 0.0, true, 86400.0, &m->time_max_s,
	    &c->f_time_max);
}

/* replicates: {count: N, max_rsd_pct: X}: beakers per sample a series
 * titrates and the relative SD their results may show (docs/methods.md,
 * "Replicates"). Both keys are needed: a count without a limit would accept
 * any spread, a limit without a count judges nothing. */
static void parse_replicates(mp_ctx_t *c, const yt_node_t *root)
{
	static const char *const keys[] = {"count", "max_rsd_pct", NULL};
	method_t *m = c->m;
	bool bad;
	const yt_node_t *r = section(c, root, "replicates", false, keys, &bad), *n;
	mp_field_t f;
	if (!r)
		return;
	n = yt_get(r, "count");
	if (!n)
		missing(c, r, "count", "replicates");
	else if (!yt_long(c->doc, n, "replicates.count", 1, STATS_MAX_N, &m->replicates, c->d))
		m->replicates = 1;
	if (!yt_get(r, "max_rsd_pct"))
		missing(c, r, "max_rsd_pct", "replicates");
	/* 50 %: beyond any spread a titration result could be accepted with. */
	num(c, r, "max_rsd_pct", "replicates.max_rsd_pct", "%", 0.0, true, 50.0, &m->max_rsd_pct,
	    &f);
}

/* blank: {valid_days: N}: a method that needs a fresher blank than the
 * daemon's default (docs/methods.md, "blank"). 0.01 to 3650 days, the range
 * of records.blank_valid_days. */
static void parse_blank(mp_ctx_t *c, const yt_node_t *root)
{
	static const char *const keys[] = {"valid_days", NULL};
	bool bad;
	const yt_node_t *b = section(c, root, "blank", false, keys, &bad);
	mp_field_t f;
	if (!b)
		return;
	if (!yt_get(b, "valid_days"))
		missing(c, b, "valid_days", "blank");
	else if (!num(c, b, "valid_days", "blank.valid_days", "days", 0.01, false, 3650.0,
	              &c->m->blank_valid_days, &f))
		c->m->blank_valid_days = NAN;
}

static int method_from_doc(const yt_doc_t *doc, const char *name, const method_limits_t *lim,
                           method_t *m, diag_list_t *d)
{
	static const char *const top[] = {"method",     "title",  "revision", "purpose", "titrant",
	                                  "sample",     "signal", "start",    "dosing",  "settle",
	                                  "detect",     "stop",   "results",  "before",  "after",
	                                  "replicates", "blank",  NULL};
	mp_ctx_t c;
	size_t before = d ? d->n : 0;
	diag_list_t local = DIAG_LIST_INIT;
	if (!d)
		d = &local;
	memset(&c, 0, sizeof c);
	c.doc = doc;
	c.d = d;
	c.m = m;
	c.lim = lim;
	c.titer_index = -1;
	if (!yt_want_map(doc, doc->root, "a method file", d))
		goto out;
	yt_check_keys(doc, doc->root, top, "method", d);
	parse_head(&c, doc->root, name);
	parse_titrant(&c, doc->root);
	parse_sample(&c, doc->root);
	parse_start(&c, doc->root);
	parse_dosing(&c, doc->root);
	parse_settle(&c, doc->root);
	parse_detect(&c, doc->root);
	parse_stop(&c, doc->root);
	parse_replicates(&c, doc->root);
	parse_blank(&c, doc->root);
	check_order(&c);
	mp_parse_steps(&c, doc->root);
	mp_parse_results(&c, doc->root);
	mp_cross_check(&c, doc->root);
	mp_check_steps(&c);
out:
	diag_sort(d);
	if (d == &local) {
		size_t n = local.n;
		diag_free(&local);
		return n ? -1 : 0;
	}
	return d->n > before ? -1 : 0;
}

int method_parse(const char *name, const char *buf, size_t len, const method_limits_t *lim,
                 method_t *m, diag_list_t *d)
{
	yt_doc_t doc;
	int rc;
	method_defaults(m);
	digest_sha256_hex(buf ? buf : "", buf ? len : 0, m->sha256);
	memset(&doc, 0, sizeof doc);
	if (yt_load_buffer(name, buf ? buf : "", buf ? len : 0, &doc, d) != 0) {
		yt_free(&doc);
		if (d)
			diag_sort(d);
		return -1;
	}
	rc = method_from_doc(&doc, name, lim, m, d);
	yt_free(&doc);
	return rc;
}

int method_load(const char *path, const method_limits_t *lim, method_t *m, diag_list_t *d)
{
	yt_doc_t doc;
	int rc;
	method_defaults(m);
	memset(&doc, 0, sizeof doc);
	if (yt_load_file(path, &doc, d) != 0) {
		yt_free(&doc);
		if (d)
			diag_sort(d);
		return -1;
	}
	digest_sha256_hex(doc.text ? doc.text : "", doc.text ? doc.text_len : 0, m->sha256);
	rc = method_from_doc(&doc, path, lim, m, d);
	yt_free(&doc);
	return rc;
}
