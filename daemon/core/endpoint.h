/* endpoint.h: endpoint evaluation for the engine (endpoint.c, modelfit.c).
 *
 * Internal to the engine: the daemon and predict use engine.h. These are pure
 * functions over the accepted points of a run, so tests can call them on
 * hand-made curves.
 */
#ifndef STOPCOCK_ENDPOINT_H
#define STOPCOCK_ENDPOINT_H

#include <stdbool.h>

#include "engine.h"
#include "method.h"

/* Direction of the titration from the data: +1 the signal rises, -1 it
 * falls, 0 not yet clear. `hint` is used while the data say nothing
 * (target or signal_limit side). */
int endpoint_direction(const engine_point_t *pts, int n, int hint);

/* Endpoints by the method's detect kind, in order of volume; at most cap.
 * `final` false: only those already confirmed (the curve has passed them),
 * as the run's stop check needs; true: also one the run ended on.
 * Fills volume_ml (= deriv_ml), signal, ph, mv, half_ph, how; u and the model
 * fields NaN. start_volume_ml (liquid in the beaker at 0 mL) serves Gran's
 * dilution factor. Returns the count. */
int endpoint_find(const method_t *m, const engine_point_t *pts, int n, int dir, bool final,
                  double start_volume_ml, engine_endpoint_t *out, int cap);

/* Linear interpolation of a point field at volume v (clamped to the ends).
 * field: 0 signal, 1 ph, 2 mv. NaN when fewer than 1 point or the field is. */
double endpoint_interp(const engine_point_t *pts, int n, double v_ml, int field);

/* Replace each point's dpdv with the central (two-sided, volume-weighted)
 * first derivative, signal units per mL. */
void endpoint_central_dpdv(engine_point_t *pts, int n);

/* ---- model refinement (modelfit.c) ---- */

typedef struct modelfit_ctx {
	double titrant_molar; /* mol/L = mmol/mL, titer included; > 0 */
	int dir;              /* +1: base titrant (pH rises), -1: acid titrant */
	double start_volume_ml;
	double pkw;
	/* signal -> nominal pH: pH = 7 + (signal - sig7) / sig_per_ph */
	double sig7;
	double sig_per_ph;   /* 1 for signal ph; -k(T)*slope for mV */
	double sigma_signal; /* reading noise estimate, signal units */
	double sigma_ml;     /* volume resolution, mL */
	/* Activity coefficients (Davies, chem.h) in the fit: true for real
	 * solutions; false fits concentrations as activities (apparent pKa). */
	bool activity;
	double temperature_c; /* for Davies A */
} modelfit_ctx_t;

/* Least-squares fit of the acid-base model (group amounts, pKa values,
 * electrode offset and slope) to the points; for each endpoint writes
 * model_ml, model_rms and u_volume_ml, and when the fit is good makes it the
 * reported volume (how = "model"). Returns 0 when a good fit was used,
 * 1 when the fit was poor or failed (endpoints unchanged but the model fields). */
int modelfit_refine(const modelfit_ctx_t *c, const engine_point_t *pts, int n,
                    engine_endpoint_t *eps, int n_eps);

#endif
