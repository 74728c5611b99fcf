/* standardization.h: a titrant's titer from replicate standardization runs,
 * and the molarity of a base titrated against KHP (standardization.c;
 * docs/calibration.md, "Titrant standardization"). Pure functions: the
 * daemon keeps the series (daemon/server/titer_book.h).
 */
#ifndef STOPCOCK_STANDARDIZATION_H
#define STOPCOCK_STANDARDIZATION_H

#include <stdbool.h>

#include "diag.h"
#include "yamltree.h"

typedef struct standardization_config {
	int replicates;     /* standardization runs that make one titer, >= 2 */
	double rsd_max_pct; /* accepted relative SD of their titers, % */
} standardization_config_t;

/* Defaults: 3 replicates, RSD at most 0.2 % (common practice). */
void standardization_config_defaults(standardization_config_t *c);
/* The daemon config's `standardization:` key: {replicates: N, rsd_max_pct: X}. */
int standardization_config_parse(const yt_doc_t *doc, const yt_node_t *n,
                                 standardization_config_t *c, diag_list_t *d);

typedef struct standardization_result {
	int n;
	double mean;    /* mean titer */
	double sd;      /* sample standard deviation (n - 1) */
	double rsd_pct; /* 100 sd / mean */
	bool accepted;
	char reason[160]; /* "" when accepted */
} standardization_result_t;

/* Mean, SD, RSD of n titers; accepted when n >= 2, all finite and > 0, and
 * RSD <= max_rsd_pct. Returns 0, or -1 when nothing can be computed (n < 1). */
int standardization_replicates(const double *titers, int n, double max_rsd_pct,
                               standardization_result_t *out);

/* Replicates of one titrant, collected run by run by the caller (e.g. one per
 * station, in memory). */
#define TITER_MAX_REPLICATES 20
typedef struct standardization_series {
	char titrant[160]; /* the method's titrant name */
	int n;
	double titers[TITER_MAX_REPLICATES];
} titer_series_t;

/* Add one standardization run's titer. A titer for another titrant than the
 * series holds starts a new series. When the series reaches cfg->replicates,
 * fills *out (mean, SD, RSD, accepted or not, reason), empties the series and
 * returns true: store out->mean as the titrant's titer when out->accepted.
 * Otherwise returns false (out->n says how many are collected). A titer
 * that is not finite and > 0 is ignored (false). */
bool titer_series_add(titer_series_t *s, const standardization_config_t *cfg, const char *titrant,
                      double titer, standardization_result_t *out);

/* Molarity (mol/L) of a base titrated against potassium hydrogen phthalate
 * (1:1): c = 1000 m P / (204.22 (V - V_blank)), docs/chemistry.md §8. mass_g
 * of KHP, purity as a fraction (1.0 when unknown), volumes mL. NaN when
 * V - V_blank <= 0 or an input is not finite. */
double standardization_khp_molarity(double mass_g, double purity, double volume_ml,
                                    double blank_ml);
#define KHP_G_PER_MOL 204.22 /* C8H5KO4, CIAAW 2021 atomic weights: 204.222 */

/* Titer = measured molarity / nominal molarity; NaN when nominal <= 0. */
double standardization_titer(double measured_molarity, double nominal_molarity);

/* The titer a finished `purpose: standardize` run yields from its results:
 * a result named "titer" is the titer itself; else one named "molarity" (or
 * any with unit "mol/L") is the measured molarity, divided by the method's
 * nominal molarity. Returns 0, or -1 when no such result has a value. */
int standardization_titer_from_result(const char *name, const char *unit, double value,
                                      double nominal_molarity, double *titer);

#endif
