/* chem.h: the chemistry model of the beaker, used by everything.
 *
 * One module answers "what is the equilibrium state of this beaker after V mL
 * of titrant?": the simulator, `stopcock predict`, `stopcock curve` and the
 * model-based endpoint evaluation all call chem_solve(). It also holds the
 * physical constants and temperature laws (Kw(T), Davies A(T), Nernst slope)
 * and the electrode equation of docs/chemistry.md, so nothing else re-derives them.
 *
 * Units: concentrations mol/L, volumes mL, temperatures degC, potentials mV.
 */
#ifndef STOPCOCK_CHEM_H
#define STOPCOCK_CHEM_H

#include <stdbool.h>
#include <stddef.h>

#include "diag.h"

#define CHEM_MAX_COMP   12 /* components per list (sample, titrant) */
#define CHEM_MAX_PKA    6  /* protonation steps per weak system */
#define CHEM_NAME_MAX   64
#define CHEM_MAX_DOSERS 8 /* named reagents of a scenario's dosing units */

typedef enum {
	CHEM_WEAK = 0,    /* weak system with pKa list */
	CHEM_STRONG_ACID, /* fully dissociated monoprotic acid, e.g. HCl */
	CHEM_STRONG_BASE, /* fully dissociated monoacidic base, e.g. NaOH */
	CHEM_SALT,        /* 1:1 fully dissociated salt, e.g. NaCl: ionic strength only */
} chem_kind_t;

typedef struct chem_comp {
	char name[CHEM_NAME_MAX];
	double molar; /* analytical concentration, mol/L */
	chem_kind_t kind;
	int n_pka;                /* weak only: number of dissociation steps */
	double pka[CHEM_MAX_PKA]; /* ascending, at the scenario temperature */
	int charge;               /* weak only: charge of the most protonated form */
} chem_comp_t;

typedef enum { CHEM_ACT_DAVIES = 0, CHEM_ACT_IDEAL } chem_activity_t;

typedef struct chem_electrode {
	double offset_mv;        /* mV at pH 7 */
	double slope_pct;        /* % of the Nernst slope */
	double tau_s;            /* first-order response time constant, s */
	double noise_mv;         /* RMS noise, mV */
	double drift_mv_per_min; /* linear drift, mV/min */
} chem_electrode_t;

typedef struct chem_burette {
	double capacity_ml; /* syringe volume, mL */
	long steps;         /* motor steps per full stroke */
} chem_burette_t;

typedef struct chem_scenario {
	double temperature_c;
	chem_activity_t activity;
	double sample_ml; /* sample volume put in the beaker */
	double water_ml;  /* diluent added with it */
	int n_sample;
	chem_comp_t sample[CHEM_MAX_COMP];
	int n_titrant;
	chem_comp_t titrant[CHEM_MAX_COMP];
	chem_electrode_t electrode;
	chem_burette_t burette;
	/* Optional (YAML `pkw`): when > 0, use this pKw instead of chem_pkw(T),
	 * e.g. 14.00 to reproduce textbook tables that state Kw = 1.00e-14.
	 * 0 (the default, and what a zeroed struct gives) means "from T". */
	double pkw_override;
	/* Optional (YAML `dosers`): the reagent of each named dosing unit, as a
	 * component (molar = the reagent's concentration), for a method's add
	 * steps (chem_scenario_add). */
	int n_dosers;
	char doser_name[CHEM_MAX_DOSERS][CHEM_NAME_MAX];
	chem_comp_t doser[CHEM_MAX_DOSERS];
} chem_scenario_t;

/* Equilibrium state of the beaker. Species fractions: for component i of the
 * combined list (sample first, then titrant; index i < n_sample is sample),
 * alpha[i][j] is the fraction carrying j protons fewer than the most
 * protonated form (j = 0 .. n_pka). Strong components have alpha[i][0] = 1. */
typedef struct chem_state {
	double titrant_ml;                     /* titrant added */
	double volume_ml;                      /* total volume in the beaker */
	double ph;                             /* -log10 a(H+) */
	double h_molar;                        /* [H+], mol/L */
	double oh_molar;                       /* [OH-], mol/L */
	double ionic_strength;                 /* mol/L */
	double gamma1;                         /* activity coefficient of a singly charged ion */
	double pkw;                            /* used at this temperature */
	int n_comp;                            /* n_sample + n_titrant */
	double total_molar[2 * CHEM_MAX_COMP]; /* diluted analytical conc., mol/L */
	double alpha[2 * CHEM_MAX_COMP][CHEM_MAX_PKA + 1];
	int iterations; /* solver work, for benchmarks */
} chem_state_t;

/* Solve the charge balance after `titrant_ml` mL of titrant.
 * Bracketed (pH -1 .. 15), always converges: returns 0, never NaN; returns -1
 * only for an unusable scenario (negative volume or concentration) with
 * out->ph set to 7. Pure: no I/O, no global state, thread-safe. */
int chem_solve(const chem_scenario_t *s, double titrant_ml, chem_state_t *out);

/* ml mL of a reagent (a component at reagent->molar mol/L) go into the
 * beaker before the titrant: its amount joins the sample list (merged with
 * a component of the same name and kind) and its volume the diluent
 * (water_ml), which is exact in this model's dilution law. The sample must
 * have a volume (sample_ml > 0). Returns 0, or -1 (bad volume, no sample
 * volume, or a full sample list) with s untouched. */
int chem_scenario_add(chem_scenario_t *s, const chem_comp_t *reagent, double ml);

/* The reagent of dosing unit `name` in s, or NULL. */
const chem_comp_t *chem_scenario_doser(const chem_scenario_t *s, const char *name);

/* Convenience: pH only. */
double chem_ph(const chem_scenario_t *s, double titrant_ml);

/* Stoichiometric equivalence volumes (mL) of the scenario's titrant against
 * its sample, in order of increasing volume: each proton step of each weak
 * system (only steps between pH ~ 2 and 12 that show as a step are listed by
 * the caller; this lists all) and strong acid/base totals. Returns count. */
int chem_equivalence_ml(const chem_scenario_t *s, double *out_ml, int cap);

/* Net acid concentration of the titrant in mol/L (positive for an acid
 * titrant, negative for a base), i.e. protons it donates per litre at the
 * far end of the titration. */
double chem_titrant_acidity(const chem_scenario_t *s);

/* ---- physical laws ---- */

/* pKw at t degC and 1 atm: IAPWS R11-07 (Bandura & Lvov 2006) with water
 * density from Kell 1975. */
double chem_pkw(double t_c);

/* Davies/Debye-Hueckel A (log10 basis, (mol/kg)^-1/2) at t degC. */
double chem_davies_a(double t_c);

/* Ionic strength (mol/L) above which the Davies equation is held constant:
 * the equation is meant for I up to ~0.5 mol/L and, past its minimum, turns
 * upwards without bound; holding it keeps every coefficient finite. */
#define CHEM_DAVIES_I_MAX 1.0

/* log10 of the Davies activity coefficient for charge z at ionic strength I
 * (I above CHEM_DAVIES_I_MAX is taken as CHEM_DAVIES_I_MAX). */
double chem_davies_log_gamma(double a, int z, double ionic_strength);

/* Nernst slope ln(10) R T / F in mV per pH at t degC (CODATA 2018 R, F). */
double chem_nernst_mv(double t_c);

/* Electrode equation of docs/chemistry.md (no lag, noise or drift):
 * mV = offset_mv - slope_pct/100 * k(T) * (pH - 7). */
double chem_mv_from_ph(double offset_mv, double slope_pct, double ph, double t_c);
double chem_ph_from_mv(double offset_mv, double slope_pct, double mv, double t_c);

#endif
