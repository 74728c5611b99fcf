/* chem_laws.c: physical constants and temperature laws of the chemistry model.
 *
 * Each law names its published source beside it. Temperatures in degC on the
 * API (t_c), kelvin inside (t_k). Nothing here has state.
 */
#include "chem.h"

#include <math.h>

/* CODATA 2018 exact SI values (since the 2019 redefinition). */
#define CODATA_R      8.314462618      /* molar gas constant, J mol^-1 K^-1 */
#define CODATA_F      96485.33212      /* Faraday constant, C mol^-1 */
#define CODATA_NA     6.02214076e23    /* Avogadro constant, mol^-1 */
#define CODATA_E      1.602176634e-19  /* elementary charge, C */
#define CODATA_KB     1.380649e-23     /* Boltzmann constant, J K^-1 */
#define CODATA_EPS0   8.8541878128e-12 /* vacuum permittivity, F m^-1 (CODATA 2018) */
#define KELVIN_OFFSET 273.15

/* Water density at 1 atm, g/cm3, Kell 1975 (J. Chem. Eng. Data 20, 97),
 * valid 0..150 degC. */
static double water_density_g_cm3(double t_c)
{
	double t = t_c;
	double num = 0.99983952 + 16.945176e-3 * t - 7.9870401e-6 * t * t -
	             46.170461e-9 * t * t * t + 105.56302e-12 * t * t * t * t -
	             280.54253e-15 * t * t * t * t * t;
	return num / (1.0 + 16.879850e-3 * t);
}

/* Relative permittivity of water, Malmberg & Maryott 1956 (J. Res. NBS 56, 1),
 * valid 0..100 degC. */
static double water_permittivity(double t_c)
{
	double t = t_c;
	return 87.740 - 0.40008 * t + 9.398e-4 * t * t - 1.410e-6 * t * t * t;
}

double chem_pkw(double t_c)
{
	/* IAPWS R11-07 (Bandura & Lvov, J. Phys. Chem. Ref. Data 35, 15 (2006)),
	 * with the 1 atm density of Kell 1975. Gives 13.995 at 25 degC. */
	const double n = 6.0, a0 = -0.864671, a1 = 8659.19, a2 = -22786.2;
	const double b0 = 0.642044, b1 = -56.8534, b2 = -0.375754;
	const double g0 = 0.61415, g1 = 48251.33, g2 = -67707.93, g3 = 10102100.0;
	const double mw_g_mol = 18.015268;
	double t_k = t_c + KELVIN_OFFSET;
	double rho = water_density_g_cm3(t_c);
	double q = rho * exp(a0 + a1 / t_k + a2 * pow(rho, 2.0 / 3.0) / (t_k * t_k));
	double pkwg = g0 + g1 / t_k + g2 / (t_k * t_k) + g3 / (t_k * t_k * t_k);
	return -2.0 * n * (log10(1.0 + q) - q / (q + 1.0) * rho * (b0 + b1 / t_k + b2 * rho)) +
	       pkwg + 2.0 * log10(mw_g_mol / 1000.0);
}

double chem_davies_a(double t_c)
{
	/* Debye-Hueckel limiting-law constant from theory, log10 basis:
	 * A = sqrt(2 pi N_A rho_w) / ln10 * (e^2 / (4 pi eps0 eps_r k_B T))^(3/2),
	 * rho_w in kg/m3 (Kell 1975), eps_r Malmberg & Maryott 1956, CODATA 2018
	 * constants. Gives 0.5108 (mol/kg)^-1/2 at 25 degC (docs/chemistry.md §6). */
	double t_k = t_c + KELVIN_OFFSET;
	double rho_kg_m3 = water_density_g_cm3(t_c) * 1000.0;
	double bjerrum_m = CODATA_E * CODATA_E /
	                   (4.0 * M_PI * CODATA_EPS0 * water_permittivity(t_c) * CODATA_KB * t_k);
	return sqrt(2.0 * M_PI * CODATA_NA * rho_kg_m3) / log(10.0) * pow(bjerrum_m, 1.5);
}

double chem_davies_log_gamma(double a, int z, double ionic_strength)
{
	/* Davies 1962 (Ion Association, p. 41): log10 g = -A z^2 (sqrt I/(1+sqrt I) - 0.3 I).
	 * Beyond its useful range (~0.5 mol/L) the curve turns upwards without
	 * bound, so I is held at CHEM_DAVIES_I_MAX: a documented model limit that
	 * keeps every coefficient finite for any input. */
	double i = ionic_strength;
	if (!(i > 0.0) || z == 0)
		return 0.0;
	if (i > CHEM_DAVIES_I_MAX)
		i = CHEM_DAVIES_I_MAX;
	double s = sqrt(i);
	return -a * (double)(z * z) * (s / (1.0 + s) - 0.3 * i);
}

double chem_nernst_mv(double t_c)
{
	/* k = ln(10) R T / F with CODATA 2018 R and F: 59.159 mV/pH at 25 degC. */
	return log(10.0) * CODATA_R * (t_c + KELVIN_OFFSET) / CODATA_F * 1000.0;
}

double chem_mv_from_ph(double offset_mv, double slope_pct, double ph, double t_c)
{
	return offset_mv - slope_pct / 100.0 * chem_nernst_mv(t_c) * (ph - 7.0);
}

double chem_ph_from_mv(double offset_mv, double slope_pct, double mv, double t_c)
{
	double k_mv = slope_pct / 100.0 * chem_nernst_mv(t_c);
	if (!(fabs(k_mv) > 1e-9))
		return 7.0; /* a zero slope carries no pH information */
	return 7.0 - (mv - offset_mv) / k_mv;
}
