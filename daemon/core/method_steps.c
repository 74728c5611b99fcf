/* method_steps.c: a method's before: and after: steps (docs/methods.md,
 * "Steps"), and the rules that tie them to the station: every add names a
 * dosing unit the station has, and the beaker can hold all that goes in.
 * Errors carry file:line:col like every other key (method_priv.h).
 */
#include "method_priv.h"

#include <stdio.h>
#include <string.h>

#include "names.h"

/* A step's duration: above 0 s, at most 1 h (longer is a forgotten digit,
 * and a run's stop.time_max_s does not cover the steps). */
#define STEP_S_MAX 3600.0
/* An addition: above 0 mL, at most 1000 mL, the range of every other
 * volume of a method. */
#define STEP_ML_MAX 1000.0

static const char *const step_words[] = {"add", "stir_s", "wait_s", "rinse_s", NULL};

const char *method_step_name(method_step_kind_t k)
{
	return (unsigned)k < 4 ? step_words[k] : "?";
}

const method_step_t *method_addition(const method_t *m, int n)
{
	for (int i = 0; i < m->n_before && i < METHOD_MAX_STEPS; i++)
		if (m->before[i].kind == STEP_ADD && n-- == 0)
			return &m->before[i];
	return NULL;
}

int method_additions(const method_t *m)
{
	int n = 0;
	while (method_addition(m, n))
		n++;
	return n;
}

/* {add: {doser: NAME, ml: V}} */
static bool parse_add(mp_ctx_t *c, const yt_node_t *n, const char *where, method_step_t *st)
{
	static const char *const keys[] = {"doser", "ml", NULL};
	char path[64];
	const yt_node_t *v;
	bool ok = true;
	snprintf(path, sizeof path, "%s.add", where);
	if (!yt_want_map(c->doc, n, path, c->d))
		return false;
	if (!yt_check_keys(c->doc, n, keys, path, c->d))
		ok = false;
	snprintf(path, sizeof path, "%s.add.doser", where);
	if (!(v = yt_get(n, "doser"))) {
		snprintf(path, sizeof path, "%s.add", where);
		yt_missing(c->doc, n, "doser", path, c->d);
		ok = false;
	} else if (!yt_string(c->doc, v, path, st->doser, sizeof st->doser, c->d)) {
		ok = false;
	} else if (!name_is_id(st->doser, sizeof st->doser)) {
		yt_error(c->doc, v, c->d,
		         "%s must be a dosing unit's name: lower-case letters, digits and '-' "
		         "(got \"%s\")",
		         path, st->doser);
		ok = false;
	}
	snprintf(path, sizeof path, "%s.add.ml", where);
	if (!(v = yt_get(n, "ml"))) {
		snprintf(path, sizeof path, "%s.add", where);
		yt_missing(c->doc, n, "ml", path, c->d);
		ok = false;
	} else if (!yt_double(c->doc, v, path, "mL", &st->ml, c->d)) {
		ok = false;
	} else if (!(st->ml > 0.0) || st->ml > STEP_ML_MAX) {
		yt_error(c->doc, v, c->d, "%s must be above 0 and at most %g mL (got %g)", path,
		         STEP_ML_MAX, st->ml);
		ok = false;
	}
	return ok;
}

/* One item: a map of exactly one step key. */
static bool parse_step(mp_ctx_t *c, const yt_node_t *item, const char *where, method_step_t *st)
{
	char path[64];
	int k = 0;
	memset(st, 0, sizeof *st);
	if (item->kind != YT_MAP || item->n != 1) {
		yt_error(c->doc, item, c->d,
		         "%s must be one step: a mapping of one key, add, stir_s, wait_s or "
		         "rinse_s (as in {stir_s: 30})",
		         where);
		return false;
	}
	if (!yt_check_keys(c->doc, item, step_words, where, c->d))
		return false;
	while (strcmp(item->keys[0]->str, step_words[k]) != 0)
		k++; /* a known key: yt_check_keys passed */
	st->kind = (method_step_kind_t)k;
	if (st->kind == STEP_ADD)
		return parse_add(c, item->items[0], where, st);
	snprintf(path, sizeof path, "%s.%s", where, step_words[k]);
	if (!yt_double(c->doc, item->items[0], path, "s", &st->s, c->d))
		return false;
	if (!(st->s > 0.0) || st->s > STEP_S_MAX) {
		yt_error(c->doc, item->items[0], c->d,
		         "%s must be above 0 and at most %g s (got %g)", path, STEP_S_MAX, st->s);
		return false;
	}
	return true;
}

static int parse_list(mp_ctx_t *c, const yt_node_t *root, const char *key, method_step_t *out,
                      const yt_node_t **nodes, int *pos)
{
	const yt_node_t *s = yt_get(root, key);
	int n = 0;
	if (!s)
		return 0;
	if (!yt_want_seq(c->doc, s, key, c->d)) {
		c->steps_bad = true;
		return 0;
	}
	for (size_t i = 0; i < s->n; i++) {
		char where[32];
		if (i >= METHOD_MAX_STEPS) {
			yt_error(c->doc, s->items[i], c->d,
			         "%s may hold at most %d steps (this is step %zu)", key,
			         METHOD_MAX_STEPS, i + 1);
			c->steps_bad = true;
			break;
		}
		snprintf(where, sizeof where, "%s[%zu]", key, i + 1);
		if (parse_step(c, s->items[i], where, &out[n])) {
			pos[n] = (int)i + 1;
			nodes[n++] = s->items[i];
		} else {
			c->steps_bad = true;
		}
	}
	return n;
}

void mp_parse_steps(mp_ctx_t *c, const yt_node_t *root)
{
	method_t *m = c->m;
	m->n_before = parse_list(c, root, "before", m->before, c->before_node, c->before_pos);
	m->n_after = parse_list(c, root, "after", m->after, c->after_node, c->after_pos);
	int adds = 0;
	for (int i = 0; i < m->n_before; i++)
		if (m->before[i].kind == STEP_ADD && ++adds == METHOD_MAX_ADDS + 1)
			yt_error(c->doc, c->before_node[i], c->d,
			         "before lists more than %d add steps; formulas name at most "
			         "add1 .. add%d (merge additions from one doser into one step)",
			         METHOD_MAX_ADDS, METHOD_MAX_ADDS);
}

static bool has_doser(const method_limits_t *lim, const char *name)
{
	for (int i = 0; i < lim->n_dosers; i++)
		if (!strcmp(lim->dosers[i], name))
			return true;
	return false;
}

static void check_dosers(mp_ctx_t *c, const method_step_t *st, const yt_node_t **nodes,
                         const int *pos, int n, const char *key)
{
	const method_limits_t *lim = c->lim;
	for (int i = 0; i < n; i++) {
		if (st[i].kind != STEP_ADD || has_doser(lim, st[i].doser))
			continue;
		char have[METHOD_MAX_DOSERS * (METHOD_ID_MAX + 2) + 8] = "";
		size_t len = 0;
		for (int j = 0; j < lim->n_dosers && len < sizeof have; j++)
			len += (size_t)snprintf(have + len, sizeof have - len, "%s%s",
			                        j ? ", " : "", lim->dosers[j]);
		yt_error(c->doc, yt_get(yt_get(nodes[i], "add"), "doser"), c->d,
		         "%s[%d].add.doser '%s' is not a dosing unit of the station (%s%s)", key,
		         pos[i], st[i].doser, lim->n_dosers ? "it has: " : "it has none", have);
	}
}

void mp_check_steps(mp_ctx_t *c)
{
	const method_t *m = c->m;
	const method_limits_t *lim = c->lim;
	if (!lim)
		return;
	if (lim->dosers_known) {
		check_dosers(c, m->before, c->before_node, c->before_pos, m->n_before, "before");
		check_dosers(c, m->after, c->after_node, c->after_pos, m->n_after, "after");
	}
	/* Everything that may be in the beaker at once: the largest sample
	 * (when measured in mL), every addition of before (after's additions
	 * come on top of the finished titration, so they count too) and the
	 * titrant up to stop.volume_max_ml, which includes start.initial_ml
	 * (the burette delivers it). The sample-plus-titrant rule of
	 * method_cross.c reports a method without additions. */
	double add_ml = 0;
	const yt_node_t *first = NULL;
	for (int i = 0; i < m->n_before; i++)
		if (m->before[i].kind == STEP_ADD) {
			add_ml += m->before[i].ml;
			first = first ? first : c->before_node[i];
		}
	for (int i = 0; i < m->n_after; i++)
		if (m->after[i].kind == STEP_ADD) {
			add_ml += m->after[i].ml;
			first = first ? first : c->after_node[i];
		}
	if (!first || c->steps_bad || c->f_vol_max.bad || !(lim->vessel_max_ml > 0))
		return;
	double sample_ml = 0;
	if (m->sample_unit == UNIT_ML) {
		if (c->f_sample_bad || c->f_sample_max.bad)
			return;
		sample_ml = m->sample_max;
	}
	double total_ml = sample_ml + add_ml + m->volume_max_ml;
	if (total_ml > lim->vessel_max_ml && sample_ml + m->volume_max_ml <= lim->vessel_max_ml) {
		char smp[48] = "";
		if (m->sample_unit == UNIT_ML)
			snprintf(smp, sizeof smp, "sample.max %g mL + ", sample_ml);
		yt_error(c->doc, first, c->d,
		         "the beaker could reach %g mL, above the station's vessel_max_ml (%g "
		         "mL): %sadditions %g mL + stop.volume_max_ml %g mL",
		         total_ml, lim->vessel_max_ml, smp, add_ml, m->volume_max_ml);
	}
}

void method_limits_add_dosers(method_limits_t *lim, const char (*names)[METHOD_ID_MAX], int n)
{
	if (!lim->dosers_known) {
		lim->dosers_known = true;
		lim->n_dosers = 0;
		for (int i = 0; i < n && lim->n_dosers < METHOD_MAX_DOSERS; i++)
			snprintf(lim->dosers[lim->n_dosers++], METHOD_ID_MAX, "%s", names[i]);
		return;
	}
	int kept = 0;
	for (int i = 0; i < lim->n_dosers; i++) {
		bool both = false;
		for (int j = 0; j < n; j++)
			if (!strcmp(lim->dosers[i], names[j]))
				both = true;
		if (both)
			memmove(lim->dosers[kept++], lim->dosers[i], METHOD_ID_MAX);
	}
	lim->n_dosers = kept;
}
