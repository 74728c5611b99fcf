"""Electrode calibration through the daemon's API on the simulated bench:
POST /v1/calibrations, .../next per buffer (the simulator's beaker swapped for
each buffer, as an operator would), accepted with the simulated electrode's
slope and offset; then a `signal: ph` run may start and the live reading has
a pH. Errors: bad buffers 400, unknown station 404, next out of turn 409."""
import json
import time

import pytest

import daemon_bench as db

# The simulated electrode of tests/data/daemon/wash-acid.yaml.
OFFSET_MV, SLOPE_PCT = 2.0, 99.0
BUFFERS = (4.01, 7.00)


def buffer_scenario(tmp, ph):
    """A beaker that sits at pH `ph`: an acid with pKa = ph, half neutralized,
    ideal activities (so pH = pKa exactly, Henderson-Hasselbalch)."""
    p = tmp / f"buffer-{ph:.2f}.yaml"
    p.write_text(f"""title: buffer pH {ph}
temperature_c: 25
activity: ideal
sample_ml: 50.0
water_ml: 0.0
sample:
  - {{name: buffer acid, molar: 0.10, pka: [{ph}]}}
  - {{name: sodium, molar: 0.05, strong: base}}
titrant:
  - {{name: sodium hydroxide, molar: 0.1000, strong: base}}
electrode: {{offset_mv: {OFFSET_MV}, slope_pct: {SLOPE_PCT}, tau_s: 0.3, noise_mv: 0.05}}
""")
    return p


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("calib")
    b = db.Bench(tmp, extra_config="calibration:\n  stable: {drift_mv: 0.3, window_s: 2, "
                                   "min_s: 1, max_s: 60}\n")
    b.buffers = {ph: buffer_scenario(tmp, ph) for ph in BUFFERS}
    yield b
    b.close()


def cal_post(bench, body):
    return bench.write("POST", "/v1/calibrations", json.dumps(body))


def test_bad_calibration_requests(bench):
    assert cal_post(bench, {"station": "sim1", "buffers": [7.0]}).status == 400
    assert cal_post(bench, {"station": "sim1", "buffers": [7.0, 7.2]}).status == 400
    assert cal_post(bench, {"station": "sim1", "buffers": [4.0, 15.0]}).status == 400
    assert cal_post(bench, {"station": "sim1", "buffers": ["x", 7]}).status == 400
    assert cal_post(bench, {"station": "sim1"}).status == 400
    assert cal_post(bench, {"station": "nope", "buffers": [4.01, 7.0]}).status == 404
    assert bench.request("GET", "/v1/calibrations/latest?station=sim1").status == 404
    assert bench.request("GET", "/v1/calibrations/latest").status == 400
    assert bench.request("GET", "/v1/calibrations/9999").status == 404
    assert bench.write("POST", "/v1/calibrations/9999/next").status == 404


def test_calibration_is_accepted_with_the_electrodes_slope_and_offset(bench):
    r = cal_post(bench, {"station": "sim1", "buffers": list(BUFFERS)})
    assert r.status == 201, r.body
    created = r.json()
    assert created["state"] == "waiting" and created["next_buffer"] == BUFFERS[0]
    cid = created["id"]
    for i, ph in enumerate(BUFFERS):
        assert bench.control(f"load {bench.buffers[ph]}") == "ok"
        r = bench.write("POST", f"/v1/calibrations/{cid}/next")
        assert r.status == 200, r.body
        # Out of turn while measuring: 409.
        cal = r.json()
        if cal["state"] == "measuring":
            assert bench.write("POST", f"/v1/calibrations/{cid}/next").status == 409
        deadline = time.monotonic() + 60
        while (cal := bench.get(f"/v1/calibrations/{cid}"))["state"] == "measuring":
            assert time.monotonic() < deadline, cal
            time.sleep(0.2)
        assert cal["state"] == ("waiting" if i < len(BUFFERS) - 1 else "accepted"), cal
    # The simulated electrode: mV = offset - slope/100 * k(T) * (pH - 7).
    assert cal["slope_pct"] == pytest.approx(SLOPE_PCT, abs=1.0)
    assert cal["offset_mv"] == pytest.approx(OFFSET_MV, abs=1.0)
    assert cal["at"] and cal["expires_at"] > cal["at"]
    assert bench.get("/v1/calibrations/latest?station=sim1")["id"] == cid
    assert bench.write("POST", f"/v1/calibrations/{cid}/next").status == 409
    # Each buffer step is in the audit trail, not only the start and the end.
    evs = bench.get("/v1/events?after=0&limit=1000")["events"]
    steps = [e for e in evs if e["kind"] == "calibration" and e["code"] == "next"
             and e["message"].startswith(f"calibration {cid}:")]
    assert len(steps) == len(BUFFERS), evs


def test_calibrated_station_shows_ph_and_runs_ph_methods(bench):
    # The electrode is still in the pH 7.00 buffer.
    deadline = time.monotonic() + 10
    while (s := bench.station())["reading"]["ph"] is None:
        assert time.monotonic() < deadline, s
        time.sleep(0.2)
    assert s["reading"]["ph"] == pytest.approx(7.00, abs=0.1)
    r = bench.write("POST", "/v1/runs", json.dumps(
        {"station": "sim1", "method": "cider-acidity", "sample_id": "P12", "amount": 10}))
    assert r.status == 201, r.body
    rid = r.json()["id"]
    rec = bench.wait_state(rid, ("running",), timeout_s=10)
    assert rec["calibration"]["slope_pct"] == pytest.approx(SLOPE_PCT, abs=1.0)
    assert bench.write("POST", f"/v1/runs/{rid}/abort").status == 200
