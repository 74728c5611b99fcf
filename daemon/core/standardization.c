/* standardization.c: titrant standardization (titer from replicates, KHP molarity) and
 * the daemon config's `standardization:` key (see calib.h).
 */
#include <math.h>
#include <stdio.h>
#include <string.h>
#include <strings.h>

#include "standardization.h"
#include "stats.h"

void standardization_config_defaults(standardization_config_t *c)
{
	/* Common practice: three replicate titrations, accepted when their
	 * relative standard deviation is at most 0.2 %. */
	c->replicates = 3;
	c->rsd_max_pct = 0.2;
}

int standardization_config_parse(const yt_doc_t *doc, const yt_node_t *n,
                                 standardization_config_t *c, diag_list_t *d)
{
	static const char *const keys[] = {"replicates", "rsd_max_pct", NULL};
	standardization_config_defaults(c);
	if (!n || yt_is_null(n))
		return 0;
	if (!yt_want_map(doc, n, "standardization", d))
		return -1;
	bool ok = yt_check_keys(doc, n, keys, "standardization", d);
	const yt_node_t *v;
	if ((v = yt_get(n, "replicates"))) {
		long r;
		if (yt_long(doc, v, "standardization.replicates", 2, 20, &r, d))
			c->replicates = (int)r;
		else
			ok = false;
	}
	if ((v = yt_get(n, "rsd_max_pct")))
		ok = yt_double_range(doc, v, "standardization.rsd_max_pct", "%", 0.001, 10.0,
		                     &c->rsd_max_pct, d) &&
		     ok;
	return ok ? 0 : -1;
}

int standardization_replicates(const double *titers, int n, double max_rsd_pct,
                               standardization_result_t *out)
{
	memset(out, 0, sizeof *out);
	out->n = n;
	out->mean = out->sd = out->rsd_pct = NAN;
	if (n < 1 || !titers) {
		snprintf(out->reason, sizeof out->reason, "no titers to average");
		return -1;
	}
	for (int i = 0; i < n; i++) {
		if (!isfinite(titers[i]) || !(titers[i] > 0)) {
			snprintf(out->reason, sizeof out->reason,
			         "replicate %d has no usable titer (%g)", i + 1, titers[i]);
			return -1;
		}
	}
	stats_mean_sd(titers, n, &out->mean, &out->sd);
	if (n < 2) {
		snprintf(out->reason, sizeof out->reason,
		         "one replicate gives no spread: at least 2 are needed");
		return 0;
	}
	out->rsd_pct = 100.0 * out->sd / out->mean;
	if (out->rsd_pct <= max_rsd_pct) {
		out->accepted = true;
	} else {
		snprintf(out->reason, sizeof out->reason,
		         "replicates spread too much: RSD %.3f %% is above %.3g %%", out->rsd_pct,
		         max_rsd_pct);
	}
	return 0;
}

double standardization_khp_molarity(double mass_g, double purity, double volume_ml, double blank_ml)
{
	/* docs/chemistry.md §8: c = 1000 m P / (204.22 (V - V_blank)), 1:1
	 * stoichiometry (one acidic proton per phthalate). */
	if (!isfinite(mass_g) || !isfinite(purity) || !isfinite(volume_ml) || !isfinite(blank_ml))
		return NAN;
	double net_ml = volume_ml - blank_ml;
	if (!(net_ml > 0) || !(mass_g > 0) || !(purity > 0))
		return NAN;
	return 1000.0 * mass_g * purity / (KHP_G_PER_MOL * net_ml);
}

double standardization_titer(double measured_molarity, double nominal_molarity)
{
	if (!(nominal_molarity > 0) || !isfinite(measured_molarity))
		return NAN;
	return measured_molarity / nominal_molarity;
}

int standardization_titer_from_result(const char *name, const char *unit, double value,
                                      double nominal_molarity, double *titer)
{
	if (!isfinite(value) || !(value > 0))
		return -1;
	if (name && strcmp(name, "titer") == 0) {
		*titer = value;
		return 0;
	}
	if ((name && strcmp(name, "molarity") == 0) || (unit && strcasecmp(unit, "mol/L") == 0)) {
		double t = standardization_titer(value, nominal_molarity);
		if (!isfinite(t))
			return -1;
		*titer = t;
		return 0;
	}
	return -1;
}

bool titer_series_add(titer_series_t *s, const standardization_config_t *cfg, const char *titrant,
                      double titer, standardization_result_t *out)
{
	standardization_config_t def;
	if (!cfg) {
		standardization_config_defaults(&def);
		cfg = &def;
	}
	memset(out, 0, sizeof *out);
	out->mean = out->sd = out->rsd_pct = NAN;
	const char *name = titrant ? titrant : "";
	if (strcmp(s->titrant, name) != 0) {
		snprintf(s->titrant, sizeof s->titrant, "%s", name);
		s->n = 0;
	}
	if (!isfinite(titer) || !(titer > 0)) {
		out->n = s->n;
		snprintf(out->reason, sizeof out->reason, "no usable titer (%g)", titer);
		return false;
	}
	int want = cfg->replicates;
	if (want < 2)
		want = 2;
	if (want > TITER_MAX_REPLICATES)
		want = TITER_MAX_REPLICATES;
	if (s->n >= TITER_MAX_REPLICATES)
		s->n = 0;
	s->titers[s->n++] = titer;
	if (s->n < want) {
		out->n = s->n;
		snprintf(out->reason, sizeof out->reason, "replicate %d of %d", s->n, want);
		return false;
	}
	standardization_replicates(s->titers, s->n, cfg->rsd_max_pct, out);
	s->n = 0;
	return true;
}
