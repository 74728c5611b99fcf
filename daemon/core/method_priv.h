/* method_priv.h: shared between method.c (sections) and method_cross.c
 * (results, formulas and the rules that tie keys together). Not for other
 * modules: use method.h. */
#ifndef STOPCOCK_METHOD_PRIV_H
#define STOPCOCK_METHOD_PRIV_H

#include <stdbool.h>

#include "method.h"
#include "yamltree.h"

/* Where a value came from: node NULL = default; bad = given but invalid,
 * so cross-checks that involve it are skipped (one error per mistake). */
typedef struct mp_field {
	const yt_node_t *node;
	bool bad;
} mp_field_t;

typedef struct mp_ctx {
	const yt_doc_t *doc;
	diag_list_t *d;
	method_t *m;
	const method_limits_t *lim;
	mp_field_t f_purpose, f_signal, f_molarity;
	bool f_sample_bad;
	mp_field_t f_unit, f_sample_min, f_sample_max;
	mp_field_t f_stir, f_predose;
	mp_field_t f_mode, f_step_aim, f_dose_min, f_dose_max, f_dose;
	mp_field_t f_wait_min, f_wait_max, f_still_within, f_still_for;
	mp_field_t f_kind, f_count, f_min_jump, f_window, f_target;
	const yt_node_t *u_max_node; /* where detect...u_max_pct was given, or NULL */
	mp_field_t f_past, f_vol_max, f_limit, f_time_max;
	/* per detect criterion: the node of its target or fallback signal
	 * (NULL: none, or given but bad), for the order check */
	const yt_node_t *crit_sig[METHOD_MAX_ENDPOINTS];
	/* The result a standardize run takes its titer from (the rule of
	 * standardization_titer_from_result in calib.h): one named titer, else the first
	 * named molarity or in mol/L. -1 when none. */
	int titer_index;
	bool titer_is_named;
	const yt_node_t *titer_item;
	/* before/after: where each step came from (the item), for cross-checks;
	 * steps_bad: a step was reported, so the total volume is unknown. */
	const yt_node_t *before_node[METHOD_MAX_STEPS];
	const yt_node_t *after_node[METHOD_MAX_STEPS];
	int before_pos[METHOD_MAX_STEPS], after_pos[METHOD_MAX_STEPS]; /* 1-based in the file */
	bool steps_bad;
} mp_ctx_t;

const char *mp_signal_unit(const method_t *m);
void mp_signal_range(const method_t *m, double *lo, double *hi);

void mp_parse_results(mp_ctx_t *c, const yt_node_t *root);
void mp_cross_check(mp_ctx_t *c, const yt_node_t *root);
/* before: and after: (method_steps.c), and their checks against the
 * station's dosers and vessel (after mp_cross_check's own). */
void mp_parse_steps(mp_ctx_t *c, const yt_node_t *root);
void mp_check_steps(mp_ctx_t *c);

/* 1-based line/column in the file of byte `off` of scalar n's value, for
 * plain, quoted and block scalars alike. */
void mp_scalar_pos(const yt_doc_t *doc, const yt_node_t *n, size_t off, int *line, int *col);

#endif
