"""Hold `stopcock curve` (daemon/chem/chem.c) against an independent solver.

tests/e2e/chem_reference.py solves the same charge balance with scipy's brentq
(nested bracketed root finds on I and pH) from the same published laws
(Bandura & Lvov 2006 Kw, Kell 1975 density, Davies 1962, CODATA 2018). The
two must agree to |dpH| <= 0.002 at every point of every scenario.
"""

import os
import subprocess
import sys

import pytest

sys.path.insert(0, os.path.dirname(__file__))
import chem_reference as ref  # noqa: E402

BIN = os.path.join(os.environ.get("STOPCOCK_BUILD", "build"), "bin", "stopcock")

NAOH = {"name": "sodium hydroxide", "molar": 0.1, "strong": "base"}
HCL = {"name": "hydrochloric acid", "molar": 0.1, "strong": "acid"}


def grid(lo, hi, n):
    """n volumes from lo to hi mL on the 0.001 mL grid `curve` prints."""
    return [round(lo + (hi - lo) * k / (n - 1), 3) for k in range(n)]


# pKa values from docs/chemistry.md §1 (25 degC) and its pKa(T) table (10, 40 degC).
SCENARIOS = {
    # polyprotic: phosphoric acid (pKa 2.148, 7.198, 12.35), diluted 1:1
    "phosphoric": ({"temperature_c": 25, "sample_ml": 25.0, "water_ml": 25.0,
                    "sample": [{"name": "phosphoric acid", "molar": 0.05,
                                "pka": [2.148, 7.198, 12.35]}],
                    "titrant": [NAOH]}, grid(0.0, 45.0, 46)),
    # a base titrated with acid: sodium carbonate (carbonate + 2 NaOH) with HCl
    "carbonate-hcl": ({"temperature_c": 25, "sample_ml": 20.0, "water_ml": 30.0,
                       "sample": [{"name": "carbonate", "molar": 0.05, "pka": [6.351, 10.329]},
                                  {"name": "sodium", "molar": 0.10, "strong": "base"}],
                       "titrant": [HCL]}, grid(0.0, 25.0, 36)),
    # strong + weak mixture: cider-like, HCl + malic acid + ammonia (charge 1)
    "mixture": ({"temperature_c": 20, "sample_ml": 10.0, "water_ml": 40.0,
                 "sample": [{"name": "hydrochloric acid", "molar": 0.004, "strong": "acid"},
                            {"name": "malic acid", "molar": 0.042, "pka": [3.459, 5.097]},
                            {"name": "ammonium", "molar": 0.005, "pka": [9.245], "charge": 1}],
                 "titrant": [NAOH]}, grid(0.0, 12.0, 37)),
    # dilute: 2e-4 mol/L acetic acid with 2e-3 mol/L NaOH
    "dilute": ({"temperature_c": 25, "sample_ml": 50.0,
                "sample": [{"name": "acetic acid", "molar": 0.0002, "pka": [4.756]}],
                "titrant": [{"name": "sodium hydroxide", "molar": 0.002, "strong": "base"}]},
               grid(0.0, 10.0, 31)),
    # high ionic strength: citric acid in 0.5 mol/L sodium chloride
    "high-ionic": ({"temperature_c": 25, "sample_ml": 25.0,
                    "sample": [{"name": "citric acid", "molar": 0.02,
                                "pka": [3.128, 4.761, 6.396]},
                               {"name": "sodium chloride", "molar": 0.5, "strong": "salt"}],
                    "titrant": [NAOH]}, grid(0.0, 20.0, 31)),
    # 10 degC: TRIS base (charge 1, pKa 8.518 at 10 degC) with HCl
    "tris-10c": ({"temperature_c": 10, "sample_ml": 25.0, "water_ml": 25.0,
                  "sample": [{"name": "TRIS", "molar": 0.04, "pka": [8.518], "charge": 1}],
                  "titrant": [HCL]}, grid(0.0, 15.0, 31)),
    # 40 degC: sulfuric acid as hydrogen sulfate (charge -1, pKa 1.99) and
    # ammonium (pKa 8.806 at 40 degC), titrated with NaOH carrying carbonate
    "sulfate-40c": ({"temperature_c": 40, "sample_ml": 20.0, "water_ml": 20.0,
                     "sample": [{"name": "hydrogen sulfate", "molar": 0.02, "pka": [1.99],
                                 "charge": -1},
                                {"name": "ammonium", "molar": 0.01, "pka": [8.806],
                                 "charge": 1}],
                     "titrant": [NAOH, {"name": "carbonate", "molar": 0.002,
                                        "pka": [6.296, 10.220]}]}, grid(0.0, 14.0, 36)),
}


def run_curve(path, volumes):
    ml = ",".join(f"{v:.3f}" for v in volumes)
    p = subprocess.run([BIN, "curve", str(path), "--ml", ml], capture_output=True, text=True,
                       timeout=30)
    assert p.returncode == 0, p.stderr
    lines = p.stdout.splitlines()
    assert lines[0] == "# titrant_mL pH electrode_mV"
    rows = [line.split() for line in lines[1:]]
    assert len(rows) == len(volumes)
    return [(float(a), float(b), float(c)) for a, b, c in rows]


def test_curve_against_reference(tmp_path):
    worst, count, where = 0.0, 0, None
    for name, (scn, volumes) in SCENARIOS.items():
        path = tmp_path / f"{name}.yaml"
        path.write_text(ref.to_yaml(scn))
        t = scn.get("temperature_c", 25)
        for (ml, ph, mv), v in zip(run_curve(path, volumes), volumes):
            assert ml == pytest.approx(v, abs=5e-4)
            want = ref.ph_at(scn, v)
            diff = abs(ph - want)
            if diff > worst:
                worst, where = diff, (name, v, ph, want)
            count += 1
            assert diff <= 0.002, f"{name} at {v} mL: curve {ph}, reference {want:.5f}"
            # mV from the electrode equation of docs/chemistry.md (default electrode)
            assert mv == pytest.approx(-ref.nernst_mv(t) * (ph - 7.0), abs=0.011)
    print(f"\nchem reference: {count} points over {len(SCENARIOS)} scenarios, "
          f"max |dpH| = {worst:.5f} at {where}")
    assert count >= 200 and len(SCENARIOS) >= 6


def test_reference_laws_match_tables():
    """The reference's own laws against docs/chemistry.md, so it is not wrong in step with C."""
    # CRC "Ionization constant of water" at 0.1 MPa: 14.946, 13.995, 13.264 [S]
    for t, want in ((0, 14.946), (25, 13.995), (50, 13.264)):
        assert ref.pkw(t) == pytest.approx(want, abs=0.002)
    # docs/chemistry.md §6 theory A(25 degC) = 0.5108 [C]; section 4: 59.16 mV/pH [S]
    assert ref.davies_a(25) == pytest.approx(0.5108, abs=0.0002)
    assert ref.nernst_mv(25) == pytest.approx(59.16, abs=0.005)
