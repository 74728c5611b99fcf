/* titer_valid.c: see titer_valid.h. */
#include "titer_valid.h"

#include <math.h>
#include <stdio.h>

#include "formula.h"
#include "timefmt.h"

#define SECONDS_PER_DAY 86400.0

/* The formula variables any of m's results read (formula_var_t bits). */
static unsigned vars_used(const method_t *m)
{
	unsigned used = 0;
	for (int i = 0; i < m->n_results && i < METHOD_MAX_RESULTS; i++)
		used |= m->results[i].formula.used;
	return used;
}

double titer_valid_days(const cfg_t *cfg, const store_source_t *src)
{
	return isfinite(src->valid_days) ? src->valid_days : cfg->titer_valid_days;
}

double blank_valid_days(const cfg_t *cfg, const method_t *m)
{
	return m && isfinite(m->blank_valid_days) ? m->blank_valid_days : cfg->blank_valid_days;
}

bool valid_until(const char *at, double valid_days, char until[32])
{
	double t;
	until[0] = '\0';
	if (!time_parse_rfc3339(at, &t))
		return false;
	time_format_rfc3339(t + valid_days * SECONDS_PER_DAY, until);
	return true;
}

/* Expired at now_s after valid_days from `at`? *until gets the end. */
static bool expired(const char *at, double valid_days, double now_s, char until[32])
{
	double t;
	if (!valid_until(at, valid_days, until) || !time_parse_rfc3339(at, &t))
		return true; /* a date that cannot be read vouches for nothing */
	return now_s > t + valid_days * SECONDS_PER_DAY;
}

bool titer_valid_for_run(const cfg_t *cfg, store_t *store, const method_t *m, double now_s,
                         char *msg, size_t cap, bool *db_err)
{
	unsigned used = vars_used(m);
	store_source_t src;
	store_status_t st;
	double v, days;
	char until[32];

	*db_err = false;
	/* Standardizations and blanks determine them; only assays use them. */
	if (m->purpose != PURPOSE_ASSAY)
		return true;
	if (used & (1u << FV_TITER)) {
		st = store_titrant_get(store, m->titrant_name, &v, &src);
		if (st == STORE_ERR) {
			*db_err = true;
			return false;
		}
		if (st != STORE_OK || !(v > 0)) {
			if (!cfg->titer_required)
				return true;
			snprintf(msg, cap,
			         "titrant '%s' has no titer: standardize it (a standardization "
			         "method), or enter a certified titer with its reason (POST "
			         "/v1/titrants, stopcock titrants set)",
			         m->titrant_name);
			return false;
		}
		days = titer_valid_days(cfg, &src);
		if (expired(src.at, days, now_s, until)) {
			snprintf(msg, cap,
			         "the titer %.6f of '%s' (%s %s) expired %s after %g days: "
			         "standardize it again or enter a new one",
			         v, m->titrant_name, src.run_id ? "standardized" : "entered",
			         src.at, until[0] ? until : "?", days);
			return false;
		}
	}
	if (used & (1u << FV_BLANK_ML)) {
		/* Blanks belong to the titrant (docs/calibration.md). */
		st = store_blank_get(store, m->titrant_name, &v, &src);
		if (st == STORE_ERR) {
			*db_err = true;
			return false;
		}
		days = blank_valid_days(cfg, m);
		if (st == STORE_OK && expired(src.at, days, now_s, until)) {
			snprintf(
			    msg, cap,
			    "the blank %.4f mL of '%s' (measured %s) expired %s after %g days: "
			    "run the blank method again",
			    v, m->titrant_name, src.at, until[0] ? until : "?", days);
			return false;
		}
	}
	return true;
}
