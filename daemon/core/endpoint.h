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

/* How far, in volume, point i's reading may stand from its settled value
 * because it was taken before the electrode was still (settled false: the
 * still rule's wait_max_s ran out), mL: the electrode still showed a mix of
 * this addition's signal and the one before, which on a curve's steep part
 * reads like a point anywhere on the addition, so the addition's size h
 * taken as rectangular, h/sqrt 3 (docs/engine.md, "Points taken
 * unsettled"). 0 for a settled point and the first. */
double endpoint_lag_ml(const engine_point_t *pts, int n, int i);

/* Reading noise assumed for a settled point, signal units: half the
 * settling band, never below the meter's resolution. */
double endpoint_sigma_signal(const method_t *m);

/* Once the run is done (points with their central dpdv, the model fit
 * applied): give every endpoint a finite u_volume_ml > 0 (docs/engine.md,
 * "Uncertainty") and mark in `doubt` each one the points cannot support
 * (the model fit and the derivative disagree, or u above the method's
 * u_max_pct, naming too few points across the jump when one addition spans
 * it). quantum_ml is the burette's step. */
void endpoint_assess(const method_t *m, const engine_point_t *pts, int n, double quantum_ml,
                     engine_endpoint_t *eps, int n_eps);

#endif
