/* modelfit.h: refine endpoints by a least-squares fit of the acid-base model
 * to the measured points (docs/engine.md, "The model fit"). */
#ifndef STOPCOCK_MODELFIT_H
#define STOPCOCK_MODELFIT_H

#include <stdbool.h>

#include "engine.h"

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
