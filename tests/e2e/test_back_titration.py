"""Back titrations with a method's before steps (docs/methods.md, "Steps"):
`stopcock predict` adds the doser's reagent to the simulated beaker, and the
result formula of add1_* gives the sample's content. The expected values are
worked out here from the stoichiometry, and the beaker's pH after the
addition by the independent reference (chem_reference.py, scipy's brentq).
The daemon refuses to queue a method with steps on a station that lacks
the devices they need (tests/e2e/test_rack.py runs them on a rack)."""
import json
import os
import re
import subprocess

import pytest

import chem_reference as ref
import daemon_bench as db

BUILD = os.environ.get("STOPCOCK_BUILD")

METHOD = """\
method: ammonia-back
title: Ammonia by back titration
revision: 1
purpose: assay
titrant: {name: NaOH 0.1 mol/L, molarity: 0.1000}
sample: {unit: mL, min: 10, max: 60}
signal: ph
before:
  - {add: {doser: acid, ml: %(add_ml)s}}
  - {stir_s: 20}
dosing: {mode: adaptive, step_aim: 0.3, dose_min_ml: 0.005, dose_max_ml: 0.5}
settle: {wait_min_s: 1, wait_max_s: 20, still_within: 0.02, still_for_s: 1.5}
detect: {kind: inflection, min_jump: 0.8, window: [4.0, 7.5]}
stop: {past_endpoint_ml: 2.0, volume_max_ml: 30, signal_limit: 10.5, time_max_s: 3600}
after:
  - {rinse_s: 5}
results:
  - name: ammonia
    formula: (add1_ml * add1_molarity * add1_titer - end1_ml * titrant_molarity * titer) * 1000 / amount
    unit: mmol/L
    decimals: 5
"""


def scenario(sample_ml, nh3_molar, hcl_molar, with_doser=True):
    scn = {"temperature_c": 25.0, "sample_ml": sample_ml, "water_ml": 0.0,
           "sample": [{"name": "ammonia", "molar": nh3_molar, "pka": [9.245], "charge": 1}],
           "titrant": [{"name": "sodium hydroxide", "molar": 0.1, "strong": "base"}],
           "electrode": {"offset_mv": 0.0, "slope_pct": 100.0, "tau_s": 1.0,
                         "noise_mv": 0.1, "drift_mv_per_min": 0.0},
           "burette": {"capacity_ml": 10.0, "steps": 20000}}
    text = ref.to_yaml(scn)
    if with_doser:
        text += "dosers:\n  acid: {name: hydrochloric acid, molar: %r, strong: acid}\n" % hcl_molar
    return scn, text


def predict(tmp_path, method_text, scenario_text, amount):
    m = tmp_path / "ammonia-back.yaml"
    s = tmp_path / "beaker.yaml"
    m.write_text(method_text)
    s.write_text(scenario_text)
    return subprocess.run([os.path.join(BUILD, "bin", "stopcock"), "predict", str(m),
                           "--scenario", str(s), "--amount", str(amount), "--seed", "5",
                           "--json"], capture_output=True, text=True, timeout=60)


@pytest.mark.parametrize("sample_ml,nh3_molar,add_ml,hcl_molar", [
    (50.0, 0.0100, 10.0, 0.1000),   # the example's numbers
    (35.0, 0.0173, 20.0, 0.0512),   # another beaker, another acid
])
def test_back_titration_matches_stoichiometry(tmp_path, sample_ml, nh3_molar, add_ml,
                                              hcl_molar):
    assert BUILD, "STOPCOCK_BUILD must name the build directory"
    scn, text = scenario(sample_ml, nh3_molar, hcl_molar)
    r = predict(tmp_path, METHOD % {"add_ml": add_ml}, text, sample_ml)
    assert r.returncode == 0, r.stderr
    rec = json.loads(r.stdout)
    assert rec["state"] == "finished"
    # The excess acid: HCl added minus the ammonia it took, mmol; NaOH 0.1 mol/L.
    excess_mmol = add_ml * hcl_molar - sample_ml * nh3_molar
    v_eq = excess_mmol / 0.1
    [ep] = rec["endpoints"]
    assert abs(ep["volume_ml"] - v_eq) <= 0.002 * v_eq, (ep["volume_ml"], v_eq)
    [res] = rec["results"]
    truth = nh3_molar * 1000  # mmol/L
    assert abs(res["value"] - truth) <= 0.001 * truth, (res["value"], truth)
    # Before the first NaOH the beaker holds sample + acid: its pH by the reference,
    # the acid given as what it is, mmol in the added volume.
    after_add = dict(scn, water_ml=add_ml,
                     sample=scn["sample"] + [{"name": "hydrochloric acid", "strong": "acid",
                                              "molar": add_ml * hcl_molar / sample_ml}])
    want_ph = ref.ph_at(after_add, 0.0)
    first = rec["points"][0]
    assert first["volume_ml"] == 0.0
    assert abs(first["ph"] - want_ph) < 0.01, (first["ph"], want_ph)
    # without the acid the beaker would be alkaline, not acid
    assert ref.ph_at(scn, 0.0) > 10


def test_predict_says_which_steps_it_ran(tmp_path):
    _, text = scenario(50.0, 0.01, 0.1)
    (tmp_path / "ammonia-back.yaml").write_text(METHOD % {"add_ml": 10.0})
    (tmp_path / "beaker.yaml").write_text(text)
    r = subprocess.run([os.path.join(BUILD, "bin", "stopcock"), "predict",
                        str(tmp_path / "ammonia-back.yaml"), "--scenario",
                        str(tmp_path / "beaker.yaml"), "--amount", "50"],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    # 10 mL at the simulated pump's 30 s per 10 mL stroke, then 20 s of stirring
    assert "before: add 10 mL from acid, stir_s 20 (50 s)\n" in r.stdout, r.stdout
    m = re.search(r"^result ammonia: ([0-9.]+) mmol/L", r.stdout, re.M)
    assert m and abs(float(m.group(1)) - 10.0) <= 0.01, r.stdout


def test_predict_refuses_a_scenario_without_the_doser(tmp_path):
    _, text = scenario(50.0, 0.01, 0.1, with_doser=False)
    r = predict(tmp_path, METHOD % {"add_ml": 10.0}, text, 50)
    assert r.returncode == 2
    assert r.stdout == ""
    assert ("before[1] adds from dosing unit 'acid', which the scenario does not name "
            "(add it under dosers:)") in r.stderr


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("steps"))
    yield b
    b.close()


def test_daemon_refuses_a_method_whose_steps_the_station_cannot_run(bench):
    # Stored (a method is valid offline), but this station has no doser `acid`
    # (nor a changer to rinse with): queuing it is refused and leaves no run.
    name = bench.put_method("config/methods/whey-ammonium.yaml")
    before = bench.get("/v1/runs?limit=1000")["runs"]
    r = bench.write("POST", "/v1/runs", json.dumps(
        {"station": "sim1", "method": name, "sample_id": "VAT-7", "amount": 50.0}))
    assert r.status == 422, r.body
    err = r.json()["error"]
    assert err["code"] == "invalid_method"
    assert "before[1] (add): station sim1 has no dosing unit 'acid'" in err["message"]
    assert len(bench.get("/v1/runs?limit=1000")["runs"]) == len(before)


def test_check_config_checks_each_doser_driver(bench, tmp_path):
    text = bench.config.read_text()
    head, sep, rest = text.partition("- name: sim1\n")
    assert sep, text
    indent = " " * (len(head) - len(head.rstrip(" ")) + 2)

    def with_doser(extra):
        return head + sep + (
            f"{indent}dosers:\n{indent}  acid:\n{indent}    reagent: HCl 0.1 mol/L\n"
            f"{indent}    molarity: 0.1\n{indent}    burette: {{driver: pump-serial, "
            f"port: /dev/null, profile: {os.path.abspath('config/pumps/sim.yaml')}, "
            f"capacity_ml: 20{extra}}}\n") + rest

    good = tmp_path / "good.yaml"
    good.write_text(with_doser(""))
    r = subprocess.run([db.binary("stopcockd"), "--check-config", "-c", str(good)],
                       capture_output=True, text=True, timeout=20)
    assert r.returncode == 0, r.stderr
    bad = tmp_path / "bad.yaml"
    bad.write_text(with_doser(", bogus_key: 1"))
    r = subprocess.run([db.binary("stopcockd"), "--check-config", "-c", str(bad)],
                       capture_output=True, text=True, timeout=20)
    assert r.returncode == 2
    assert r.stderr.startswith(str(bad) + ":") and "bogus_key" in r.stderr, r.stderr
