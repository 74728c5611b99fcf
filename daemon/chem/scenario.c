/* scenario.c: scenario files (docs/chemistry.md "Scenario files") into chem_scenario_t.
 *
 * Every problem is reported as "file:line:col: message" and parsing goes on,
 * so a user sees all of a file's errors at once. Components are named in
 * messages as `sample[N]` / `titrant[N]`, N counted from 1 as in the file.
 */
#include "chem.h"
#include "scenario.h"
#include "yamltree.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

/* Model validity: Kell's density and Malmberg & Maryott's permittivity hold
 * from 0 to 100 degC; liquid water at 1 atm. */
#define T_MIN_C       0.0
#define T_MAX_C       95.0
#define MOLAR_MAX     20.0   /* mol/L: beyond any aqueous solution */
#define VOLUME_MAX_ML 5000.0 /* a 5 L beaker */
#define PKA_MIN       (-10.0)
#define PKA_MAX       30.0
#define CHARGE_MAX    6

static const char *const top_keys[] = {"title",    "temperature_c", "activity", "sample_ml",
                                       "water_ml", "sample",        "titrant",  "electrode",
                                       "burette",  "pkw",           "dosers",   NULL};
static const char *const comp_keys[] = {"name", "molar", "pka", "charge", "strong", NULL};
static const char *const electrode_keys[] = {"offset_mv", "slope_pct",        "tau_s",
                                             "noise_mv",  "drift_mv_per_min", NULL};
static const char *const burette_keys[] = {"capacity_ml", "steps", NULL};
static const char *const activity_words[] = {"davies", "ideal", NULL};
static const char *const strong_words[] = {"acid", "base", "salt", NULL};

void scenario_defaults(chem_scenario_t *s)
{
	memset(s, 0, sizeof *s);
	s->temperature_c = 25.0;
	s->activity = CHEM_ACT_DAVIES;
	s->sample_ml = 0.0;
	s->water_ml = 0.0;
	s->electrode.offset_mv = 0.0;
	s->electrode.slope_pct = 100.0;
	s->electrode.tau_s = 1.0;
	s->electrode.noise_mv = 0.1;
	s->electrode.drift_mv_per_min = 0.0;
	s->burette.capacity_ml = 10.0;
	s->burette.steps = 20000;
	s->pkw_override = 0.0;
}

/* An optional number in [lo, hi]; absent keeps *out. */
static bool opt_double(const yt_doc_t *doc, const yt_node_t *m, const char *key, const char *label,
                       const char *unit, double lo, double hi, double *out, diag_list_t *d)
{
	const yt_node_t *v = yt_get(m, key);
	if (!yt_key(m, key))
		return true;
	return yt_double_range(doc, v, label, unit, lo, hi, out, d);
}

static bool parse_pka(const yt_doc_t *doc, const yt_node_t *v, const char *where, chem_comp_t *c,
                      diag_list_t *d)
{
	char label[96];
	bool ok = true;
	snprintf(label, sizeof label, "%s.pka", where);
	if (!yt_want_seq(doc, v, label, d))
		return false;
	if (v->n == 0) {
		yt_error(doc, v, d, "%s must list at least one pKa value", label);
		return false;
	}
	if (v->n > CHEM_MAX_PKA) {
		yt_error(doc, v, d, "%s has %zu values; at most %d are supported", label, v->n,
		         CHEM_MAX_PKA);
		return false;
	}
	c->n_pka = (int)v->n;
	for (size_t j = 0; j < v->n; j++) {
		char item[160];
		snprintf(item, sizeof item, "%s[%zu]", label, j + 1);
		if (!yt_double_range(doc, v->items[j], item, NULL, PKA_MIN, PKA_MAX, &c->pka[j],
		                     d)) {
			ok = false;
			continue;
		}
		if (ok && j > 0 && c->pka[j] < c->pka[j - 1]) {
			yt_error(doc, v->items[j], d,
			         "%s must be ascending: %g follows %g (list the most acidic "
			         "step first)",
			         label, c->pka[j], c->pka[j - 1]);
			ok = false;
		}
	}
	return ok;
}

static bool parse_comp(const yt_doc_t *doc, const yt_node_t *m, const char *where, chem_comp_t *c,
                       diag_list_t *d)
{
	char label[96];
	bool ok = true;
	memset(c, 0, sizeof *c);
	if (!yt_want_map(doc, m, where, d))
		return false;
	ok &= yt_check_keys(doc, m, comp_keys, where, d);

	snprintf(label, sizeof label, "%s.name", where);
	if (!yt_key(m, "name")) {
		yt_missing(doc, m, "name", where, d);
		ok = false;
	} else {
		ok &= yt_string(doc, yt_get(m, "name"), label, c->name, sizeof c->name, d);
	}

	snprintf(label, sizeof label, "%s.molar", where);
	if (!yt_key(m, "molar")) {
		yt_missing(doc, m, "molar", where, d);
		ok = false;
	} else {
		ok &= yt_double_range(doc, yt_get(m, "molar"), label, "mol/L", 0.0, MOLAR_MAX,
		                      &c->molar, d);
	}

	const yt_node_t *strong = yt_get(m, "strong");
	const yt_node_t *pka = yt_get(m, "pka");
	bool has_strong = yt_key(m, "strong") != NULL, has_pka = yt_key(m, "pka") != NULL;
	if (has_strong && has_pka) {
		yt_error(doc, yt_key(m, "strong"), d,
		         "%s has both 'pka' and 'strong': a component is either a weak system "
		         "(pka) or strong (acid, base or salt)",
		         where);
		ok = false;
	} else if (!has_strong && !has_pka) {
		yt_error(doc, m, d,
		         "%s needs 'pka' (a weak system) or 'strong' (acid, base or salt)", where);
		ok = false;
	} else if (has_strong) {
		int kind = 0;
		snprintf(label, sizeof label, "%s.strong", where);
		if (yt_enum(doc, strong, label, strong_words, &kind, d))
			c->kind = kind == 0   ? CHEM_STRONG_ACID
			          : kind == 1 ? CHEM_STRONG_BASE
			                      : CHEM_SALT;
		else
			ok = false;
	} else {
		c->kind = CHEM_WEAK;
		ok &= parse_pka(doc, pka, where, c, d);
	}

	if (yt_key(m, "charge")) {
		long z = 0;
		snprintf(label, sizeof label, "%s.charge", where);
		if (has_strong) {
			yt_error(doc, yt_key(m, "charge"), d,
			         "%s: 'charge' applies only to a weak system (with pka); strong "
			         "components are singly charged",
			         where);
			ok = false;
		} else if (yt_long(doc, yt_get(m, "charge"), label, -CHARGE_MAX, CHARGE_MAX, &z,
		                   d)) {
			c->charge = (int)z;
		} else {
			ok = false;
		}
	}
	return ok;
}

static bool parse_list(const yt_doc_t *doc, const yt_node_t *v, const char *what, chem_comp_t *out,
                       int *n_out, bool need_one, diag_list_t *d)
{
	bool ok = true;
	*n_out = 0;
	if (!yt_want_seq(doc, v, what, d))
		return false;
	if (need_one && v->n == 0) {
		yt_error(doc, v, d, "%s must list at least one component", what);
		return false;
	}
	for (size_t i = 0; i < v->n; i++) {
		char where[48];
		if (i >= CHEM_MAX_COMP) {
			yt_error(doc, v->items[i], d, "%s has more than %d components", what,
			         CHEM_MAX_COMP);
			return false;
		}
		snprintf(where, sizeof where, "%s[%zu]", what, i + 1);
		ok &= parse_comp(doc, v->items[i], where, &out[i], d);
	}
	*n_out = (int)(v->n < CHEM_MAX_COMP ? v->n : CHEM_MAX_COMP);
	return ok;
}

static bool parse_electrode(const yt_doc_t *doc, const yt_node_t *m, chem_electrode_t *e,
                            diag_list_t *d)
{
	bool ok = true;
	if (!yt_want_map(doc, m, "electrode", d))
		return false;
	ok &= yt_check_keys(doc, m, electrode_keys, "electrode", d);
	ok &= opt_double(doc, m, "offset_mv", "electrode.offset_mv", "mV", -1000.0, 1000.0,
	                 &e->offset_mv, d);
	ok &= opt_double(doc, m, "slope_pct", "electrode.slope_pct", "%", 10.0, 150.0,
	                 &e->slope_pct, d);
	ok &= opt_double(doc, m, "tau_s", "electrode.tau_s", "s", 0.0, 3600.0, &e->tau_s, d);
	ok &=
	    opt_double(doc, m, "noise_mv", "electrode.noise_mv", "mV", 0.0, 100.0, &e->noise_mv, d);
	ok &= opt_double(doc, m, "drift_mv_per_min", "electrode.drift_mv_per_min", "mV/min", -100.0,
	                 100.0, &e->drift_mv_per_min, d);
	return ok;
}

static bool parse_burette(const yt_doc_t *doc, const yt_node_t *m, chem_burette_t *b,
                          diag_list_t *d)
{
	bool ok = true;
	if (!yt_want_map(doc, m, "burette", d))
		return false;
	ok &= yt_check_keys(doc, m, burette_keys, "burette", d);
	ok &= opt_double(doc, m, "capacity_ml", "burette.capacity_ml", "mL", 0.001, 1000.0,
	                 &b->capacity_ml, d);
	if (yt_key(m, "steps")) {
		long steps = 0;
		if (yt_long(doc, yt_get(m, "steps"), "burette.steps", 1, 1000000000L, &steps, d))
			b->steps = steps;
		else
			ok = false;
	}
	return ok;
}

/* dosers: {NAME: COMPONENT, ...}: the reagent each dosing unit holds. */
static bool parse_dosers(const yt_doc_t *doc, const yt_node_t *m, chem_scenario_t *s,
                         diag_list_t *d)
{
	bool ok = true;
	if (!yt_want_map(doc, m, "dosers", d))
		return false;
	for (size_t i = 0; i < m->n; i++) {
		char where[96];
		if (i >= CHEM_MAX_DOSERS) {
			yt_error(doc, m->keys[i], d, "dosers has more than %d dosing units",
			         CHEM_MAX_DOSERS);
			return false;
		}
		snprintf(where, sizeof where, "dosers.%s", m->keys[i]->str);
		if (m->keys[i]->len >= CHEM_NAME_MAX) {
			yt_error(doc, m->keys[i], d, "%s: the name is longer than %d bytes", where,
			         CHEM_NAME_MAX - 1);
			ok = false;
			continue;
		}
		snprintf(s->doser_name[s->n_dosers], CHEM_NAME_MAX, "%s", m->keys[i]->str);
		if (parse_comp(doc, m->items[i], where, &s->doser[s->n_dosers], d))
			s->n_dosers++;
		else
			ok = false;
	}
	return ok;
}

static int parse_doc(const yt_doc_t *doc, chem_scenario_t *s, diag_list_t *d)
{
	const yt_node_t *root = doc->root;
	bool ok = true;
	scenario_defaults(s);
	if (!yt_want_map(doc, root, "the scenario", d))
		return -1;
	ok &= yt_check_keys(doc, root, top_keys, "the scenario", d);

	if (yt_key(root, "title")) {
		char title[256];
		ok &= yt_string(doc, yt_get(root, "title"), "title", title, sizeof title, d);
	}
	ok &= opt_double(doc, root, "temperature_c", "temperature_c", "degC", T_MIN_C, T_MAX_C,
	                 &s->temperature_c, d);
	if (yt_key(root, "activity")) {
		int a = 0;
		if (yt_enum(doc, yt_get(root, "activity"), "activity", activity_words, &a, d))
			s->activity = a == 0 ? CHEM_ACT_DAVIES : CHEM_ACT_IDEAL;
		else
			ok = false;
	}
	if (!yt_key(root, "sample_ml")) {
		yt_missing(doc, root, "sample_ml", "the scenario", d);
		ok = false;
	} else {
		ok &= yt_double_range(doc, yt_get(root, "sample_ml"), "sample_ml", "mL", 0.0,
		                      VOLUME_MAX_ML, &s->sample_ml, d);
	}
	ok &= opt_double(doc, root, "water_ml", "water_ml", "mL", 0.0, VOLUME_MAX_ML, &s->water_ml,
	                 d);
	if (ok && !(s->sample_ml + s->water_ml > 0.0)) {
		yt_error(doc, yt_get(root, "sample_ml"), d,
		         "the beaker is empty: sample_ml + water_ml must be above 0 mL");
		ok = false;
	}
	if (yt_key(root, "sample"))
		ok &= parse_list(doc, yt_get(root, "sample"), "sample", s->sample, &s->n_sample,
		                 false, d);
	if (!yt_key(root, "titrant")) {
		yt_missing(doc, root, "titrant", "the scenario", d);
		ok = false;
	} else {
		ok &= parse_list(doc, yt_get(root, "titrant"), "titrant", s->titrant, &s->n_titrant,
		                 true, d);
	}
	if (yt_key(root, "electrode"))
		ok &= parse_electrode(doc, yt_get(root, "electrode"), &s->electrode, d);
	if (yt_key(root, "burette"))
		ok &= parse_burette(doc, yt_get(root, "burette"), &s->burette, d);
	ok &= opt_double(doc, root, "pkw", "pkw", NULL, 10.0, 20.0, &s->pkw_override, d);
	if (yt_key(root, "dosers"))
		ok &= parse_dosers(doc, yt_get(root, "dosers"), s, d);
	if (ok && s->n_titrant > 0 && chem_titrant_acidity(s) == 0.0) {
		yt_error(doc, yt_get(root, "titrant"), d,
		         "the titrant is neither an acid nor a base (it must contain a strong "
		         "acid or base or a weak system with protons to give or take)");
		ok = false;
	}
	return ok ? 0 : -1;
}

int scenario_parse(const char *name, const char *buf, size_t len, chem_scenario_t *s,
                   diag_list_t *d)
{
	yt_doc_t doc;
	int rc;
	memset(&doc, 0, sizeof doc);
	if (yt_load_buffer(name, buf, len, &doc, d) != 0) {
		yt_free(&doc);
		scenario_defaults(s);
		return -1;
	}
	rc = parse_doc(&doc, s, d);
	yt_free(&doc);
	diag_sort(d);
	return rc;
}

int scenario_load(const char *path, chem_scenario_t *s, diag_list_t *d)
{
	yt_doc_t doc;
	int rc;
	memset(&doc, 0, sizeof doc);
	if (yt_load_file(path, &doc, d) != 0) {
		yt_free(&doc);
		scenario_defaults(s);
		return -1;
	}
	rc = parse_doc(&doc, s, d);
	yt_free(&doc);
	diag_sort(d);
	return rc;
}
