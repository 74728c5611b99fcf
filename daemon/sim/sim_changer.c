/* sim_changer.c: the simulated sample changer (see sim.h) and its rack file.
 *
 * The changer speaks config/changers/sim.yaml's protocol on its own
 * pseudo-terminal. It knows its own mechanics: the rack turns only with the
 * head up, a move and a lift take time, and the probe is in the beaker at
 * the current position only while the head is down; with the head up it is
 * in air (sim_pump.c's measure). A head lowered into one beaker and then into
 * another without a rinse between them (the rinse position, or the rinse
 * pump) takes SIM_CARRY_ML of the first solution into the second. */
#include <errno.h>
#include <limits.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "numparse.h"
#include "scenario.h"
#include "sim.h"

static const char *const rack_keys[] = {"positions", "rinse", "park", "weights", NULL};

void sim_rack_free(sim_rack_t *r)
{
	for (int i = 0; i <= SIM_RACK_POSITIONS; i++) {
		free(r->scen[i]);
		r->scen[i] = NULL;
	}
}

static bool position_of(const yt_doc_t *doc, const yt_node_t *n, const char *what, long *out,
                        diag_list_t *d)
{
	long long v;
	if (n->kind != YT_SCALAR || !n->plain || !parse_whole(n->str, 1, SIM_RACK_POSITIONS, &v)) {
		yt_error(doc, n, d, "%s must be a position number 1..%d (got %s)", what,
		         SIM_RACK_POSITIONS, n->kind == YT_SCALAR ? n->str : "a list or map");
		return false;
	}
	*out = (long)v;
	return true;
}

/* The folder of the rack file, for the scenario paths in it. */
static void rack_dir(const char *file, char *out, size_t cap)
{
	const char *slash = strrchr(file, '/');
	if (slash)
		snprintf(out, cap, "%.*s", (int)(slash - file), file);
	else
		snprintf(out, cap, ".");
}

int sim_rack_parse(const yt_doc_t *doc, sim_rack_t *r, diag_list_t *d)
{
	memset(r, 0, sizeof(*r));
	const yt_node_t *root = doc->root;
	if (!yt_want_map(doc, root, "rack file", d))
		return -1;
	bool ok = yt_check_keys(doc, root, rack_keys, "rack file", d);
	const yt_node_t *pos = yt_get(root, "positions");
	char dir[PATH_MAX];
	rack_dir(doc->file, dir, sizeof(dir));
	if (!pos) {
		yt_missing(doc, root, "positions", "rack file", d);
		ok = false;
	} else if (!yt_want_map(doc, pos, "positions", d)) {
		ok = false;
	} else if (pos->n == 0) {
		yt_error(doc, pos, d, "positions: the rack holds no beaker");
		ok = false;
	}
	for (size_t i = 0; ok && pos && pos->kind == YT_MAP && i < pos->n; i++) {
		long p;
		char name[256], path[PATH_MAX + 256];
		if (!position_of(doc, pos->keys[i], "a position", &p, d)) {
			ok = false;
			continue;
		}
		if (!yt_string(doc, pos->items[i], "scenario", name, sizeof(name), d)) {
			ok = false;
			continue;
		}
		if (name[0] == '/')
			snprintf(path, sizeof(path), "%s", name);
		else
			snprintf(path, sizeof(path), "%s/%s", dir, name);
		r->scen[p] = calloc(1, sizeof(chem_scenario_t));
		if (!r->scen[p]) {
			yt_error(doc, pos->items[i], d, "out of memory");
			ok = false;
			continue;
		}
		snprintf(r->file[p], sizeof(r->file[p]), "%s", name);
		size_t before = d->n;
		if (scenario_load(path, r->scen[p], d) != 0) {
			yt_error(doc, pos->items[i], d,
			         "position %ld: scenario '%s' cannot be used (%s)", p, name,
			         d->n > before ? "errors above" : strerror(errno));
			ok = false;
		}
		if (!r->first)
			r->first = p;
		else if (p < r->first)
			r->first = p;
	}
	const char *const which[] = {"rinse", "park"};
	long *dst[] = {&r->rinse, &r->park};
	for (int k = 0; k < 2; k++) {
		const yt_node_t *n = yt_get(root, which[k]);
		if (!n)
			continue;
		if (!position_of(doc, n, which[k], dst[k], d)) {
			ok = false;
			continue;
		}
		if (r->scen[*dst[k]]) {
			yt_error(doc, n, d, "%s: position %ld holds a sample (%s)", which[k],
			         *dst[k], r->file[*dst[k]]);
			ok = false;
		}
	}
	/* The sample weighed into each beaker, g: what the balance reports. */
	const yt_node_t *w = yt_get(root, "weights");
	if (w && !yt_want_map(doc, w, "weights", d))
		ok = false;
	for (size_t i = 0; w && w->kind == YT_MAP && i < w->n; i++) {
		long p;
		double g;
		if (!position_of(doc, w->keys[i], "a position", &p, d)) {
			ok = false;
			continue;
		}
		const yt_node_t *v = w->items[i];
		if (v->kind != YT_SCALAR || !v->plain || !parse_decimal(v->str, &g) || !(g > 0) ||
		    g > 1000) {
			yt_error(doc, v, d, "weights: position %ld wants grams above 0 (got %s)", p,
			         v->kind == YT_SCALAR ? v->str : "a list or map");
			ok = false;
			continue;
		}
		r->weight_g[p] = g;
	}
	if (r->rinse && r->rinse == r->park) {
		yt_error(doc, yt_get(root, "park"), d,
		         "park: position %ld is the rinse position too", r->park);
		ok = false;
	}
	if (!ok) {
		sim_rack_free(r);
		return -1;
	}
	return 0;
}

int sim_rack_load(const char *path, sim_rack_t *r, diag_list_t *d)
{
	yt_doc_t doc;
	memset(&doc, 0, sizeof(doc));
	memset(r, 0, sizeof(*r));
	if (yt_load_file(path, &doc, d) != 0) {
		yt_free(&doc);
		return -1;
	}
	int rc = sim_rack_parse(&doc, r, d);
	yt_free(&doc);
	return rc;
}

int sim_changer_attach(sim_t *s, const sim_rack_t *r, unsigned long long seed)
{
	sim_changer_t *c = &s->changer;
	memset(c, 0, sizeof(*c));
	for (int i = 1; i <= SIM_RACK_POSITIONS; i++) {
		if (!r->scen[i])
			continue;
		c->beakers[i] = beaker_new(r->scen[i], seed + (unsigned long long)i);
		if (!c->beakers[i]) {
			for (int k = 0; k < i; k++)
				beaker_free(c->beakers[k]);
			memset(c->beakers, 0, sizeof(c->beakers));
			return -1;
		}
	}
	beaker_free(s->beaker); /* sim_init's own: the rack's beakers replace it */
	s->beaker = NULL;       /* the head starts up */
	c->present = true;
	c->rinse = r->rinse;
	c->park = r->park;
	c->pos = r->park ? r->park : r->first;
	c->target = c->pos;
	c->lift = 0;
	return 0;
}

/* The beaker the probe and the burette tip are in: at the current position
 * with the head fully down and the rack still. */
static void route(sim_t *s)
{
	sim_changer_t *c = &s->changer;
	s->beaker = c->lift == 1 && c->move_left_s <= 0 ? c->beakers[c->pos] : NULL;
}

/* Add `frac` of each component in `n` of `comps`, per mL of `per_ml` (mmol
 * = mol/L x mL), to the sample of `to`, whose sample volume is `sample_ml`.
 * A component of the same name and kind adds to the one there. */
static void add_comps(chem_scenario_t *to, const chem_comp_t *comps, int n, double mmol_scale,
                      double sample_ml)
{
	for (int i = 0; i < n; i++) {
		double molar = comps[i].molar * mmol_scale / sample_ml;
		int k = 0;
		while (k < to->n_sample && (strcmp(to->sample[k].name, comps[i].name) ||
		                            to->sample[k].kind != comps[i].kind))
			k++;
		if (k == to->n_sample) {
			if (to->n_sample == CHEM_MAX_COMP)
				continue; /* no room: that trace is left out */
			to->sample[k] = comps[i];
			to->sample[k].molar = 0;
			to->n_sample++;
		}
		to->sample[k].molar += molar;
	}
}

/* SIM_CARRY_ML of `from`'s solution (sample, water and titrant so far) into
 * `to`: the sample volume of `to` grows by it, its own components keep their
 * amounts, and its titrant so far is put back after the reload. */
static void carry_over(sim_changer_t *c, beaker_t *from, beaker_t *to)
{
	const chem_scenario_t *a = beaker_scenario(from);
	double v_a_ml = beaker_state(from)->volume_ml;
	if (!(v_a_ml > 0))
		return;
	double f = SIM_CARRY_ML / v_a_ml; /* share of the first beaker carried */
	chem_scenario_t b = *beaker_scenario(to);
	double new_sample_ml = b.sample_ml + SIM_CARRY_ML;
	for (int i = 0; i < b.n_sample; i++)
		b.sample[i].molar *= b.sample_ml / new_sample_ml;
	add_comps(&b, a->sample, a->n_sample, a->sample_ml * f, new_sample_ml);
	add_comps(&b, a->titrant, a->n_titrant, beaker_titrant_ml(from) * f, new_sample_ml);
	b.sample_ml = new_sample_ml;
	double titrant_ml = beaker_titrant_ml(to);
	beaker_load(to, &b);
	beaker_add_ml(to, titrant_ml);
	c->carried_ml += SIM_CARRY_ML;
}

/* The head has just come down at the current position. */
static void lowered(sim_changer_t *c)
{
	beaker_t *here = c->beakers[c->pos];
	if (c->pos == c->rinse) {
		c->wet_from = 0; /* rinsed in water */
	} else if (here) {
		if (c->wet_from && c->wet_from != c->pos && c->beakers[c->wet_from])
			carry_over(c, c->beakers[c->wet_from], here);
		c->wet_from = c->pos;
	}
}

void sim_changer_tick(sim_t *s, double dt)
{
	sim_changer_t *c = &s->changer;
	if (c->move_left_s > 0) {
		if (s->fault == SIM_FAULT_JAM) {
			c->jammed = true; /* stopped where it was */
			c->move_left_s = 0;
			c->target = c->pos;
		} else if ((c->move_left_s -= dt) <= 0) {
			c->move_left_s = 0;
			c->pos = c->target;
		}
	}
	if (c->lift_left_s > 0) {
		if (s->fault == SIM_FAULT_STUCK_LIFT) {
			c->stuck = true; /* stopped part way */
			c->lift_left_s = 0;
		} else if ((c->lift_left_s -= dt) <= 0) {
			c->lift_left_s = 0;
			c->lift = c->lift_to;
			if (c->lift == 1)
				lowered(c);
		}
	}
	if (c->pump_left_s > 0 && (c->pump_left_s -= dt) < 0)
		c->pump_left_s = 0;
	route(s);
}

static bool parse_num(const char *args, long lo, long hi, long *out)
{
	long long v;
	if (!parse_whole(args, lo, hi, &v))
		return false;
	*out = (long)v;
	return true;
}

bool sim_changer_command(sim_t *s, const char *line, char *reply, size_t cap)
{
	if (s->fault == SIM_FAULT_MUTE_CHANGER || s->fault == SIM_FAULT_UNPLUG)
		return false;
	sim_changer_t *c = &s->changer;
	bool busy = c->move_left_s > 0 || c->lift_left_s > 0;
	long n;
	if (!strcmp(line, "WHERE")) {
		if (c->jammed)
			snprintf(reply, cap, "ERR 6 move jammed");
		else if (c->stuck)
			snprintf(reply, cap, "ERR 7 lift stuck");
		else
			snprintf(reply, cap, "AT %ld HEAD %d %s", c->pos, c->lift,
			         busy || c->pump_left_s > 0 ? "MOVING" : "STILL");
	} else if (!strcmp(line, "HALT")) {
		if (c->move_left_s > 0)
			c->target = c->pos;
		c->move_left_s = 0;
		c->lift_left_s = 0; /* a lift stopped part way stays between */
		c->pump_left_s = 0;
		c->jammed = c->stuck = false;
		snprintf(reply, cap, "OK");
	} else if (!strncmp(line, "GO ", 3)) {
		if (!parse_num(line + 3, LONG_MIN / 2, LONG_MAX / 2, &n))
			snprintf(reply, cap, "ERR 1 bad argument");
		else if (n < 1 || n > SIM_RACK_POSITIONS)
			snprintf(reply, cap, "ERR 2 no position %ld", n);
		else if (busy)
			snprintf(reply, cap, "BUSY");
		else if (c->lift != 0)
			snprintf(reply, cap, "ERR 3 head not up");
		else {
			c->target = n;
			c->move_left_s = SIM_MOVE_S + SIM_MOVE_PER_POS_S * (double)labs(n - c->pos);
			snprintf(reply, cap, "OK");
		}
	} else if (!strcmp(line, "HEAD UP") || !strcmp(line, "HEAD DOWN")) {
		int to = line[5] == 'D';
		if (busy)
			snprintf(reply, cap, "BUSY");
		else {
			if (c->lift != to) {
				c->lift = 2;
				c->lift_to = to;
				c->lift_left_s = SIM_LIFT_S;
			}
			snprintf(reply, cap, "OK");
		}
	} else if (!strncmp(line, "RINSE ", 6) || !strncmp(line, "DRAIN ", 6)) {
		if (!parse_num(line + 6, 1, 3600000, &n))
			snprintf(reply, cap, "ERR 1 bad argument");
		else if (c->pump_left_s > 0)
			snprintf(reply, cap, "BUSY");
		else {
			c->pump_left_s = (double)n / 1000.0;
			if (line[0] == 'R')
				c->wet_from = 0; /* the rinse pump washes the head */
			snprintf(reply, cap, "OK");
		}
	} else {
		snprintf(reply, cap, "ERR 1 unknown command");
	}
	route(s);
	return true;
}
