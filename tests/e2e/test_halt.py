"""A pump line lost mid-move always ends with the burette halted and the
record saying what went into the beaker (docs/drivers.md, "Faults";
SAFETY.md, "Halt on fault").

The simulator's own pump profile (config/pumps/sim.yaml, 30 mL/min dosing,
60 mL/min filling) is used, so a move lasts seconds and the fault lands in
the middle of it. For each fault (the line unplugged, the pump mute, a motor
stall), injected during a dose and during a refill:
- the simulator's plunger is not moving 1.5 s after the line answers again
  (every reopen of the line sends a halt first; a halt that was not answered
  is tried again until it is);
- the run's `dispensed_ml` equals what the simulator put into the beaker,
  within one burette step (the count comes from the pump's own position
  once it answers);
- a refill cut off leaves the valve at the outlet.
"""
import time

import pytest

import reliability_bench as rb

SIM_PUMP = rb.HERE.parent / "config" / "pumps" / "sim.yaml"
STEP_ML = 10.0 / 20000        # one step of the simulator's burette
BACK_WITHIN_S = 1.5           # the plunger still by then, after the line is back

# kind -> (seconds the fault lasts, seconds into the move it is injected)
FAULTS = {
    "unplug": (0.5, 0.1),
    "mute-pump": (1.8, 0.1),   # longer than the driver's 3 x 500 ms tries
    "stall": (0.5, 0.05),
}

# Empties the syringe down to 1.4 mL at the refill bench's fast dose rate, so
# the next fast-acid-mv run (initial volume 1.6 mL) starts with a refill.
PRIME = """method: prime-syringe-mv
title: Empty most of the syringe before a refill test
revision: 1
purpose: assay
titrant: {name: NaOH 0.1 mol/L, molarity: 0.1000}
sample: {unit: mL, min: 1.0, max: 50.0}
signal: mv
start: {stir_s: 0.2, initial_ml: 8.6}
dosing: {mode: adaptive, step_aim: 40, dose_min_ml: 0.02, dose_max_ml: 0.2}
settle: {wait_min_s: 0.2, wait_max_s: 0.5, still_within: 2.0, still_for_s: 0.2}
detect: {kind: inflection, count: 1, min_jump: 100}
stop: {past_endpoint_ml: 0.3, volume_max_ml: 9.0, time_max_s: 120}
results:
  - {name: acid, formula: end1_ml * titrant_molarity * titer * 1000 / amount, unit: mmol/L,
     decimals: 2}
"""

FINAL = ("finished", "failed", "aborted", "interrupted")


@pytest.fixture(scope="module")
def dose_bench(tmp_path_factory):
    b = rb.Bench(tmp_path_factory.mktemp("halt-dose"), burette={"profile": str(SIM_PUMP)})
    yield b
    b.close()


@pytest.fixture(scope="module")
def refill_bench(tmp_path_factory):
    # Dosing at the simulator's top speed only makes the priming run short;
    # the refill itself runs at the profile's 60 mL/min.
    b = rb.Bench(tmp_path_factory.mktemp("halt-refill"),
                 burette={"profile": str(SIM_PUMP), "dose_rate_ml_min": 240.0})
    r = b.write("PUT", "/v1/methods/prime-syringe-mv", PRIME)
    assert r.status in (200, 201), r.body
    yield b
    b.close()


def wait_sim(bench, pred, timeout_s, what):
    deadline = time.monotonic() + timeout_s
    while True:
        st = bench.sim_state()
        if pred(st):
            return st
        assert time.monotonic() < deadline, (what, st)
        time.sleep(0.005)


def prime(bench):
    """Leave 1.4 mL in the syringe: a priming run, aborted once its initial volume
    is in."""
    bench.wait_idle()
    bench.fresh_beaker()
    rid = bench.start_run(method="prime-syringe-mv", sample="PRIME")
    wait_sim(bench, lambda s: s["contents_ml"] < 1.5 and not s["moving"], 30, "priming")
    r = bench.write("POST", f"/v1/runs/{rid}/abort")
    assert r.status in (200, 202, 409), r.body
    bench.wait_state(rid, FINAL, timeout_s=30)
    st = bench.sim_state()
    assert st["contents_ml"] < 1.5, st


def fault_in_move(bench, kind, during, request):
    secs, into_s = FAULTS[kind]
    bench.wait_idle()
    bench.fresh_beaker()
    start = bench.sim_state()
    rid = bench.start_fast(sample=f"HALT-{kind}-{during}")
    if during == "dose":
        wait_sim(bench, lambda s: s["moving"] and s["valve"] == "out", 20, "no dose started")
    else:
        wait_sim(bench, lambda s: s["moving"] and s["valve"] == "in", 20, "no refill started")
    time.sleep(into_s)
    t_fault = time.monotonic()
    assert bench.control(f"fault {kind} {secs}") == "ok"
    try:
        t_back = t_fault + secs
        # Until BACK_WITHIN_S after the line is back, note when the plunger
        # was last seen moving.
        last_moving = None
        while time.monotonic() < t_back + BACK_WITHIN_S:
            st = bench.sim_state()
            if st["moving"]:
                last_moving = time.monotonic()
            time.sleep(0.02)
        still = bench.sim_state()
        rec = bench.wait_state(rid, FINAL, timeout_s=30)
        end = bench.sim_state()
        station = bench.station()
    finally:
        bench.control("clear")
    put_in = end["dispensed_ml"]
    rb.report(request, [
        f"halt: {kind} during a {during}: plunger "
        f"{'moving' if still['moving'] else 'still'} {BACK_WITHIN_S} s after the line was "
        f"back; {put_in:.4f} mL put in, record says {rec['dispensed_ml']}; run "
        f"{rec['state']}; valve {end['valve']}"])
    assert not still["moving"], (kind, during, "plunger moving", still)
    if last_moving is not None:
        assert last_moving < t_back + BACK_WITHIN_S - 0.05
    # Nothing moves again afterwards.
    assert end["moving"] is False and end["dispensed_ml"] == still["dispensed_ml"], (still, end)
    assert rec["state"] == "failed", rec
    assert rec["dispensed_ml"] == pytest.approx(put_in, abs=STEP_ML * 1.01), (rec, end)
    # ... and the curve's last point stands where the pump stopped.
    pts = bench.get(f"/v1/runs/{rid}/points")["points"]
    if pts:
        assert pts[-1]["volume_ml"] == pytest.approx(rec["dispensed_ml"], abs=STEP_ML * 1.01), \
            (pts[-1], rec["dispensed_ml"])
    # What the record counts left the syringe: the simulator agrees.
    if during == "refill":
        assert end["valve"] == "out", end
    # Once the pump answered, the station no longer says it is unconfirmed.
    assert not station["burette"].get("halt_pending"), station
    return rec, start, end


@pytest.mark.parametrize("kind", list(FAULTS))
def test_fault_during_dose_ends_halted_and_counted(dose_bench, kind, request):
    fault_in_move(dose_bench, kind, "dose", request)


@pytest.mark.parametrize("kind", list(FAULTS))
def test_fault_during_refill_ends_halted_valve_out(refill_bench, kind, request):
    prime(refill_bench)
    fault_in_move(refill_bench, kind, "refill", request)


def test_unanswered_halt_is_reported_and_retried(dose_bench):
    """While the pump stays unplugged the station says the burette is not
    confirmed halted; the first line the pump hears when it is back is a halt,
    and the report goes away."""
    b = dose_bench
    b.wait_idle()
    b.fresh_beaker()
    rid = b.start_fast(sample="HALT-LONG")
    wait_sim(b, lambda s: s["moving"] and s["valve"] == "out", 20, "no dose started")
    time.sleep(0.1)
    assert b.control("fault unplug") == "ok"
    try:
        deadline = time.monotonic() + 20
        while True:
            st = b.station()
            if st["burette"].get("halt_pending"):
                break
            assert time.monotonic() < deadline, st
            time.sleep(0.1)
        assert "burette not confirmed halted" in (st["error"] or ""), st
        rec = b.wait_state(rid, FINAL, timeout_s=30)
        assert rec["state"] == "failed"
        codes = [f["code"] for f in rec["faults"]]
        assert "burette_dose" in codes, rec["faults"]
        # The station still says so after the run ended, and starts nothing.
        time.sleep(0.5)
        st = b.station()
        assert st["burette"]["halt_pending"] is True, st
    finally:
        assert b.control("clear") == "ok"
    deadline = time.monotonic() + 5
    while b.station()["burette"].get("halt_pending"):
        assert time.monotonic() < deadline, "still not confirmed halted after the line came back"
        time.sleep(0.05)
    assert not b.sim_state()["moving"]
    log = (b.tmp / "daemon.log").read_text()
    assert "burette not confirmed halted" in log
