/* beaker.c: the simulated beaker (see beaker.h).
 *
 * The equilibrium (chem_solve) is cached and recomputed only when titrant
 * arrives or the scenario changes. The electrode is a first-order lag on the
 * equilibrium mV, stepped exactly: mv += (eq - mv) * (1 - exp(-dt/tau)).
 * Drift belongs to the electrode, so it keeps accumulating across loads.
 * Noise: Box-Muller on xoshiro256** seeded through splitmix64 (Vigna), so
 * a seed gives the same readings on every platform.
 */
#include "beaker.h"

#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

struct beaker {
	chem_scenario_t scn;
	chem_state_t state; /* equilibrium at titrant_ml */
	double titrant_ml;
	double eq_mv;    /* equilibrium mV at titrant_ml */
	double lag_mv;   /* lagged electrode mV, before drift and noise */
	double drift_mv; /* accumulated drift, mV */
	double elapsed_s;
	uint64_t rng[4];
	bool have_spare;
	double spare; /* second Box-Muller deviate */
};

static uint64_t splitmix64(uint64_t *x)
{
	uint64_t z = (*x += 0x9e3779b97f4a7c15ULL);
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
	z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
	return z ^ (z >> 31);
}

static uint64_t rotl(uint64_t x, int k)
{
	return (x << k) | (x >> (64 - k));
}

static uint64_t xoshiro_next(uint64_t *s)
{
	uint64_t result = rotl(s[1] * 5, 7) * 9;
	uint64_t t = s[1] << 17;
	s[2] ^= s[0];
	s[3] ^= s[1];
	s[1] ^= s[2];
	s[0] ^= s[3];
	s[2] ^= t;
	s[3] = rotl(s[3], 45);
	return result;
}

/* Uniform in (0, 1): 53 random bits, never 0 (log(0) in Box-Muller). */
static double uniform01(beaker_t *b)
{
	return ((double)(xoshiro_next(b->rng) >> 11) + 0.5) * (1.0 / 9007199254740992.0);
}

static double gaussian(beaker_t *b)
{
	if (b->have_spare) {
		b->have_spare = false;
		return b->spare;
	}
	double u1 = uniform01(b), u2 = uniform01(b);
	double r = sqrt(-2.0 * log(u1));
	b->spare = r * sin(2.0 * M_PI * u2);
	b->have_spare = true;
	return r * cos(2.0 * M_PI * u2);
}

static void resolve(beaker_t *b)
{
	chem_solve(&b->scn, b->titrant_ml, &b->state);
	b->eq_mv = chem_mv_from_ph(b->scn.electrode.offset_mv, b->scn.electrode.slope_pct,
	                           b->state.ph, b->scn.temperature_c);
}

beaker_t *beaker_new(const chem_scenario_t *s, unsigned long long seed)
{
	beaker_t *b;
	uint64_t x = (uint64_t)seed;
	if (!s)
		return NULL;
	b = calloc(1, sizeof *b);
	if (!b)
		return NULL;
	b->scn = *s;
	for (int i = 0; i < 4; i++)
		b->rng[i] = splitmix64(&x);
	resolve(b);
	b->lag_mv = b->eq_mv;
	return b;
}

void beaker_free(beaker_t *b)
{
	free(b);
}

void beaker_load(beaker_t *b, const chem_scenario_t *s)
{
	if (!b || !s)
		return;
	b->scn = *s;
	b->titrant_ml = 0.0;
	b->elapsed_s = 0.0;
	resolve(b); /* lag_mv stays: the electrode moves from where it was */
}

int beaker_add_reagent(beaker_t *b, const chem_comp_t *reagent, double ml)
{
	if (!b || chem_scenario_add(&b->scn, reagent, ml) != 0)
		return -1;
	resolve(b);
	return 0;
}

void beaker_add_ml(beaker_t *b, double ml)
{
	if (!b || !(ml > 0.0) || !isfinite(ml))
		return;
	b->titrant_ml += ml;
	resolve(b);
}

void beaker_advance(beaker_t *b, double dt_s)
{
	if (!b || !(dt_s > 0.0) || !isfinite(dt_s))
		return;
	double tau_s = b->scn.electrode.tau_s;
	if (tau_s > 0.0)
		b->lag_mv += (b->eq_mv - b->lag_mv) * -expm1(-dt_s / tau_s);
	else
		b->lag_mv = b->eq_mv;
	b->drift_mv += b->scn.electrode.drift_mv_per_min * dt_s / 60.0;
	b->elapsed_s += dt_s;
}

double beaker_mv(beaker_t *b)
{
	if (!b)
		return 0.0;
	double noise_mv =
	    b->scn.electrode.noise_mv > 0.0 ? b->scn.electrode.noise_mv * gaussian(b) : 0.0;
	return b->lag_mv + b->drift_mv + noise_mv;
}

double beaker_true_ph(const beaker_t *b)
{
	return b ? b->state.ph : 7.0;
}

double beaker_true_mv(const beaker_t *b)
{
	return b ? b->eq_mv : 0.0;
}

double beaker_titrant_ml(const beaker_t *b)
{
	return b ? b->titrant_ml : 0.0;
}

double beaker_temperature_c(const beaker_t *b)
{
	return b ? b->scn.temperature_c : 25.0;
}

const chem_scenario_t *beaker_scenario(const beaker_t *b)
{
	return b ? &b->scn : NULL;
}

const chem_state_t *beaker_state(const beaker_t *b)
{
	return b ? &b->state : NULL;
}

double beaker_elapsed_s(const beaker_t *b)
{
	return b ? b->elapsed_s : 0.0;
}
