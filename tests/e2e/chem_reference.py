"""chem_reference.py: an independent reference for Stopcock's chemistry model.

Solves the same charge balance as daemon/chem/chem.c, written separately in Python
with scipy's brentq (Debian python3-scipy), so that the two can be held
against each other (tests/e2e/test_chem_reference.py). The laws are the same
published ones; the numerics are different: here the ionic strength is found
by an outer brentq on I(I) - I, and the pH by an inner brentq, both plain
bracketed root finds with no Newton steps and no fixed-point iteration.

Scenarios are plain dicts with the keys of docs/chemistry.md "Scenario files"; a
component is {"name", "molar", "pka": [...], "charge"} or {"name", "molar",
"strong": "acid"|"base"|"salt"}.
"""

import math

from scipy.optimize import brentq

# CODATA 2018 exact values.
R = 8.314462618  # J/(mol K)
F = 96485.33212  # C/mol
NA = 6.02214076e23  # 1/mol
E = 1.602176634e-19  # C
KB = 1.380649e-23  # J/K
EPS0 = 8.8541878128e-12  # F/m
DAVIES_I_MAX = 1.0  # mol/L; the Davies equation is held constant above this


def water_density(t):
    """g/cm3 at 1 atm, Kell 1975."""
    num = (0.99983952 + 16.945176e-3 * t - 7.9870401e-6 * t**2 - 46.170461e-9 * t**3
           + 105.56302e-12 * t**4 - 280.54253e-15 * t**5)
    return num / (1 + 16.879850e-3 * t)


def pkw(t):
    """IAPWS R11-07 (Bandura & Lvov 2006) with Kell 1975 density."""
    tk = t + 273.15
    rho = water_density(t)
    n, a0, a1, a2 = 6, -0.864671, 8659.19, -22786.2
    b0, b1, b2 = 0.642044, -56.8534, -0.375754
    g0, g1, g2, g3 = 0.61415, 48251.33, -67707.93, 10102100
    q = rho * math.exp(a0 + a1 / tk + a2 * rho ** (2 / 3) / tk**2)
    pkwg = g0 + g1 / tk + g2 / tk**2 + g3 / tk**3
    return (-2 * n * (math.log10(1 + q) - q / (q + 1) * rho * (b0 + b1 / tk + b2 * rho))
            + pkwg + 2 * math.log10(18.015268 / 1000))


def davies_a(t):
    """Debye-Hueckel A from theory (docs/chemistry.md §6)."""
    tk = t + 273.15
    eps_r = 87.740 - 0.40008 * t + 9.398e-4 * t**2 - 1.410e-6 * t**3  # Malmberg & Maryott
    rho = water_density(t) * 1000
    lb = E**2 / (4 * math.pi * EPS0 * eps_r * KB * tk)
    return math.sqrt(2 * math.pi * NA * rho) / math.log(10) * lb**1.5


def nernst_mv(t):
    return math.log(10) * R * (t + 273.15) / F * 1000


def log_gamma(a, z, ionic):
    i = min(max(ionic, 0.0), DAVIES_I_MAX)
    s = math.sqrt(i)
    return -a * z * z * (s / (1 + s) - 0.3 * i)


def _species(comp, ph, lg1):
    """Fractions of a weak system; species j has charge z0 - j."""
    z0, pkas = comp.get("charge", 0), comp["pka"]
    logs = [0.0]
    for j, pka in enumerate(pkas, start=1):
        zp, zj = z0 - j + 1, z0 - j
        # K_j = a(H) a(A_j) / a(A_{j-1}) with a = gamma c; log gamma_z = z^2 lg1
        logs.append(logs[-1] + ph - pka + lg1 * (zp * zp - zj * zj))
    top = max(logs)
    w = [10 ** (x - top) for x in logs]
    s = sum(w)
    return [x / s for x in w], [z0 - j for j in range(len(w))]


def beaker(scn, ml):
    """Diluted components at ml of titrant: list of (comp, mol/L)."""
    total = scn["sample_ml"] + scn.get("water_ml", 0.0) + ml
    out = [(c, c["molar"] * scn["sample_ml"] / total) for c in scn.get("sample", [])]
    out += [(c, c["molar"] * ml / total) for c in scn["titrant"]]
    return out


def balance(mix, pkw_, ph, lg1):
    """Charge balance (mol/L) and ionic strength at pH."""
    h = 10 ** (-ph - lg1)
    oh = 10 ** (ph - pkw_ - lg1)
    charge, i2 = h - oh, h + oh
    for comp, c in mix:
        kind = comp.get("strong")
        if kind == "acid":
            charge -= c
            i2 += c
        elif kind == "base":
            charge += c
            i2 += c
        elif kind == "salt":
            i2 += 2 * c
        else:
            alpha, z = _species(comp, ph, lg1)
            charge += c * sum(a * zz for a, zz in zip(alpha, z))
            i2 += c * sum(a * zz * zz for a, zz in zip(alpha, z))
    return charge, 0.5 * i2


def ph_at(scn, ml):
    t = scn.get("temperature_c", 25.0)
    pkw_ = scn.get("pkw") or pkw(t)
    mix = beaker(scn, ml)
    ideal = scn.get("activity", "davies") == "ideal"
    a = 0.0 if ideal else davies_a(t)

    def solve_ph(lg1):
        f = lambda ph: balance(mix, pkw_, ph, lg1)[0]
        if f(-1.0) <= 0:
            return -1.0
        if f(15.0) >= 0:
            return 15.0
        return brentq(f, -1.0, 15.0, xtol=1e-13, rtol=1e-15, maxiter=500)

    if ideal:
        return solve_ph(0.0)

    def g(i):
        ph = solve_ph(log_gamma(a, 1, i))
        return min(balance(mix, pkw_, ph, log_gamma(a, 1, i))[1], DAVIES_I_MAX) - i

    if g(DAVIES_I_MAX) >= 0:
        i = DAVIES_I_MAX
    else:
        i = brentq(g, 0.0, DAVIES_I_MAX, xtol=1e-15, rtol=1e-13, maxiter=500)
    return solve_ph(log_gamma(a, 1, i))


def to_yaml(scn):
    """The scenario as YAML text with the keys of docs/chemistry.md (flow style for components)."""
    lines = []
    for key in ("temperature_c", "activity", "sample_ml", "water_ml", "pkw"):
        if key in scn:
            lines.append(f"{key}: {scn[key]}")

    def comp_text(c):
        parts = [f"name: {c['name']}", f"molar: {c['molar']!r}"]
        if "strong" in c:
            parts.append(f"strong: {c['strong']}")
        else:
            parts.append("pka: [" + ", ".join(repr(p) for p in c["pka"]) + "]")
            if c.get("charge", 0):
                parts.append(f"charge: {c['charge']}")
        return "  - {" + ", ".join(parts) + "}"

    for key in ("sample", "titrant"):
        if key in scn:
            lines.append(f"{key}:" if scn[key] else f"{key}: []")
            lines.extend(comp_text(c) for c in scn[key])
    return "\n".join(lines) + "\n"
