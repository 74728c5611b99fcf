"""A station with a sample changer and a dosing unit running a rack of
beakers through the daemon (docs/operations.md, "A rack of samples"):
stopcock-sim --rack (tests/data/rack/rack.yaml) and stopcockd over its
--config-out, runs queued with a `position`.

- four different beakers titrated at their positions with a rinse after each,
  each result within 0.1 % of its own stoichiometry;
- an ammonia back titration: excess HCl from the doser `acid`, NaOH from the
  burette, the result from the volume the doser really delivered (after a
  rinsed head: the carry-over below would bias it);
- three of them again without a rinse: the first (after a rinsed head) at its
  stoichiometry, the next two biased by the simulator's stated carry-over
  (0.05 mL of the last beaker, docs/stopcock-sim.1); the figures are printed;
- the interlocks (SAFETY.md, "Moving mechanics") and each changer fault,
  ending the run failed, everything halted, the station held, the daemon up.

One daemon for the module; the tests run in file order (the beakers are
used once each). Truths: HCl mmol/L = its molarity x 1000 (10 mL samples,
0.1000 mol/L NaOH); ammonia 10.00 mmol/L (tests/data/rack/ammonia.yaml)."""
import json
import pathlib
import subprocess
import time

import pytest

import daemon_bench as db
from common import binary
import reliability_bench as rb

RACK = db.ROOT / "tests" / "data" / "rack"
FAST_PUMP = db.ROOT / "tests" / "data" / "reliability" / "sim-fast.yaml"
TRUTH = {1: 15.0, 2: 20.0, 3: 25.0, 4: 30.0, 5: 15.0, 6: 20.0, 7: 25.0}
FINAL = ("finished", "failed", "aborted", "interrupted")


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("rack"), rack=RACK / "rack.yaml")
    # the probe read every 0.1 s while settling: the bench's real time is the
    # test's time (docs/config.md, read_interval_s)
    text = b.config.read_text()
    assert "    vessel_max_ml: 150\n" in text
    text = text.replace("    vessel_max_ml: 150\n", "    vessel_max_ml: 150\n    read_interval_s: 0.1\n")
    # the burette (the station's first pump line; the doser's comes later) at the
    # simulator's top speed, as tests/reliability runs it: the figures here are
    # about positions and carry-over, not pumps. The doser keeps its own speed,
    # so that the doser-fault test can cut its line mid-addition.
    pump = str(db.ROOT / "config" / "pumps" / "sim.yaml")
    assert text.count(pump) == 2 and text.index(pump) < text.index("dosers:"), text
    b.config.write_text(text.replace(pump, str(FAST_PUMP), 1))
    assert b.stop_daemon() == 0
    b.start_daemon()
    for m in ("rack-acid", "rack-acid-unrinsed", "rack-ammonia"):
        b.put_method(RACK / f"{m}.yaml")
    yield b
    b.close()


def queue(bench, method, position, amount=10.0, sample=None):
    body = {"station": "sim1", "method": method, "sample_id": sample or f"P{position}",
            "amount": amount}
    if position is not None:
        body["position"] = position
    return bench.write("POST", "/v1/runs", json.dumps(body))


def run_at(bench, method, positions, amount=10.0, timeout_s=240):
    ids = []
    for p in positions:
        r = queue(bench, method, p, amount)
        assert r.status == 201, r.body
        ids.append(r.json()["id"])
    return [bench.wait_state(i, FINAL, timeout_s) for i in ids]


def result(rec):
    [res] = rec["results"]
    return res["value"]


def bias_pct(rec, truth):
    return (result(rec) - truth) / truth * 100


def test_rack_with_rinse_each_result_at_its_stoichiometry(bench, request):
    recs = run_at(bench, "rack-acid", [1, 2, 3, 4])
    for p, rec in zip([1, 2, 3, 4], recs):
        assert rec["state"] == "finished", rec["faults"]
        assert rec["position"] == p
        assert abs(bias_pct(rec, TRUTH[p])) <= 0.1, (p, result(rec), TRUTH[p])
        [rinse] = rec["steps"]
        assert rinse["kind"] == "rinse_s" and rinse["when"] == "after"
        assert rinse["started_at"] <= rinse["ended_at"]
        assert rec["dosers"] == {"acid": {"delivered_ml": 0.0,
                                          "reagent": "hydrochloric acid 0.1 mol/L"}}
    rb.report(request, [
        "rack with rinse: position %d, %.4f mmol/L against %.2f (%+.3f %%)"
        % (p, result(r), TRUTH[p], bias_pct(r, TRUTH[p])) for p, r in zip([1, 2, 3, 4], recs)])
    sim = bench.sim_state()
    # after the last run the head waits at the park position, down
    assert (sim["position"], sim["lift"]) == (16, "down")
    assert sim["spilled_ml"] == 0.0  # no titrant ever left with the head up
    st = bench.station()
    assert st["changer"] == {"position": 16, "lift": "down", "moving": False}
    # and `stopcock status` shows it under the station's line
    p = subprocess.run([binary("stopcock"), "status", "--url", bench.url, "--token-file",
                        str(bench.tmp / "token")], capture_output=True, text=True, timeout=30)
    assert p.returncode == 0, p.stderr
    assert "\n  changer: position 16, head down\n" in p.stdout, p.stdout


def test_ammonia_back_titration_at_a_position(bench, request):
    dispensed_before = bench.sim_state()["dosers"]["acid"]["dispensed_ml"]
    [rec] = run_at(bench, "rack-ammonia", [9], amount=20.0)
    assert rec["state"] == "finished", rec["faults"]
    assert rec["position"] == 9
    add, stir, wait, rinse = rec["steps"]
    assert (add["kind"], add["doser"], add["when"]) == ("add", "acid", "before")
    assert add["volume_ml"] == pytest.approx(4.0, abs=0.001)
    assert (stir["kind"], stir["seconds"], wait["kind"]) == ("stir_s", 2.0, "wait_s")
    assert (rinse["kind"], rinse["when"]) == ("rinse_s", "after")
    assert rec["dosers"]["acid"]["delivered_ml"] == pytest.approx(4.0, abs=0.001)
    # the doser's own count agrees with the record
    assert bench.sim_state()["dosers"]["acid"]["dispensed_ml"] == pytest.approx(
        dispensed_before + 4.0, abs=0.001)
    # 0.400 mmol HCl - 0.200 mmol NH3 leaves 0.200 mmol: 2.000 mL of 0.1 mol/L NaOH
    [ep] = rec["endpoints"]
    assert ep["volume_ml"] == pytest.approx(2.000, rel=0.001)
    rb.report(request, ["rack ammonia back titration: position 9, %.4f mmol/L against 10.00 "
                        "(%.4f mL HCl delivered, endpoint %.4f mL)"
                        % (result(rec), add["volume_ml"], ep["volume_ml"])])
    assert abs(result(rec) - 10.0) <= 0.01


def test_rack_without_rinse_is_biased_by_carry_over(bench, request):
    carried_before = bench.sim_state()["carried_ml"]
    recs = run_at(bench, "rack-acid-unrinsed", [5, 6, 7])
    assert all(r["state"] == "finished" for r in recs), [r["faults"] for r in recs]
    biases = [bias_pct(r, TRUTH[p]) for p, r in zip([5, 6, 7], recs)]
    rb.report(request, [
        "rack without rinse: position %d, %.4f mmol/L against %.2f (%+.3f %%)"
        % (p, result(r), TRUTH[p], b) for p, r, b in zip([5, 6, 7], recs, biases)])
    # 5 follows a rinsed head; 6 and 7 each take 0.05 mL of the last beaker,
    # whose excess NaOH (1.5 mL past the endpoint) eats some of their acid
    assert abs(biases[0]) <= 0.1
    assert all(b < -0.15 for b in biases[1:]), biases
    assert bench.sim_state()["carried_ml"] == pytest.approx(carried_before + 0.10)
    assert all(r["steps"] == [] for r in recs)


@pytest.mark.parametrize("body,words", [
    ({"position": None}, "has a sample changer: give the sample's position (1 to 16)"),
    ({"position": 0}, "position must be a whole number of 1 or more"),
    ({"position": 2.5}, "position must be a whole number of 1 or more"),
    ({"position": "3"}, "position must be a whole number of 1 or more"),
    ({"position": 17}, "position 17 is outside station sim1's rack (1 to 16)"),
    ({"position": 15}, "position 15 is the rack's rinse position, not a sample's"),
    ({"position": 16}, "position 16 is the rack's park position, not a sample's"),
])
def test_position_is_checked_before_anything_is_queued(bench, body, words):
    # the head goes down only at a position a run names, and only a sample's
    before = len(bench.get("/v1/runs?limit=1000")["runs"])
    req = {"station": "sim1", "method": "rack-acid", "sample_id": "X", "amount": 10.0}
    req.update({k: v for k, v in body.items() if v is not None})
    r = bench.write("POST", "/v1/runs", json.dumps(req))
    assert r.status == 400, r.body
    assert words in r.json()["error"]["message"], r.body
    assert len(bench.get("/v1/runs?limit=1000")["runs"]) == before


def test_method_that_could_overflow_the_beaker_is_refused(bench):
    text = (RACK / "rack-ammonia.yaml").read_text()
    text = text.replace("method: rack-ammonia", "method: rack-flood").replace(
        "{add: {doser: acid, ml: 4.0}}", "{add: {doser: acid, ml: 140.0}}")
    r = bench.write("PUT", "/v1/methods/rack-flood", text)
    assert r.status == 422, r.body
    assert "above the station's vessel_max_ml (150 mL)" in r.body.decode(), r.body


def wait_held(bench, timeout_s=60):
    deadline = time.monotonic() + timeout_s
    while not (st := bench.station())["held"]:
        assert time.monotonic() < deadline, st
        time.sleep(0.1)
    return st


def resume_when_idle(bench):
    assert bench.resume() is True
    deadline = time.monotonic() + 20
    while (st := bench.station())["state"] != "idle":
        assert time.monotonic() < deadline, st
        time.sleep(0.1)


def ready(bench):
    """A station that runs: no fault injected, not held (an earlier test that
    failed half way must not fail the next ones too)."""
    assert bench.control("clear") == "ok"
    if bench.station()["held"]:
        resume_when_idle(bench)


def assert_all_halted(bench):
    sim = bench.sim_state()
    assert sim["moving"] is False  # the burette
    assert all(not d["moving"] for d in sim["dosers"].values())
    return sim


def test_reading_with_the_head_up_is_refused(bench, request):
    ready(bench)
    r = queue(bench, "rack-acid", 13)
    assert r.status == 201, r.body
    run_id = r.json()["id"]
    bench.wait_points(run_id, 2)
    # someone lifts the head out of the beaker during the titration
    assert bench.control("lift up") == "ok"
    rec = bench.wait_state(run_id, FINAL, 60)
    assert rec["state"] == "failed"
    assert "head_up" in [f["code"] for f in rec["faults"]], rec["faults"]
    st = wait_held(bench)
    assert "head_up" in st["held_reason"]
    rb.report(request, [f"rack head raised during a titration: run {rec['state']} (head_up "
                        f"after {len(bench.get(f'/v1/runs/{run_id}/points')['points'])} "
                        "points); station held, daemon up"])
    assert_all_halted(bench)
    resume_when_idle(bench)


@pytest.mark.parametrize("fault,position", [("jam", 10), ("stuck-lift", 11),
                                            ("mute-changer", 12)])
def test_changer_fault_halts_fails_and_holds(bench, request, fault, position):
    ready(bench)
    assert bench.control(f"fault {fault}") == "ok"
    r = queue(bench, "rack-acid", position)
    assert r.status == 201, r.body
    rec = bench.wait_state(r.json()["id"], FINAL, 90)
    assert rec["state"] == "failed"
    assert rec["stop_reason"] == "fault"
    assert "changer" in [f["code"] for f in rec["faults"]], rec["faults"]
    st = wait_held(bench)
    assert st["held_reason"].startswith("changer: ")
    assert_all_halted(bench)
    assert bench.request("GET", "/v1/health").status == 200  # the daemon is up
    msg = next(f["message"] for f in rec["faults"] if f["code"] == "changer")
    rb.report(request, [f"rack fault {fault}: run {rec['state']} ({msg}); station held, "
                        "burette and dosers halted, daemon up"])
    # nothing more starts on a held station: a queued run waits
    r = queue(bench, "rack-acid", position + 1 if position < 12 else 13)
    assert r.status == 201
    waiting = r.json()["id"]
    time.sleep(1.0)
    assert bench.run(waiting)["state"] == "queued"
    assert bench.write("POST", f"/v1/runs/{waiting}/abort").status == 200
    assert bench.control("clear") == "ok"
    resume_when_idle(bench)


def test_doser_fault_halts_fails_and_holds(bench, request):
    ready(bench)
    count0 = bench.sim_state()["dosers"]["acid"]["dispensed_ml"]
    r = queue(bench, "rack-ammonia", 14, amount=20.0)
    assert r.status == 201, r.body
    run_id = r.json()["id"]
    deadline = time.monotonic() + 30
    while not bench.sim_state()["dosers"]["acid"]["moving"]:
        assert time.monotonic() < deadline, "the doser never started"
        time.sleep(0.05)
    # every line of the bench gone for 2 s, in the middle of the addition
    assert bench.control("fault unplug 2") == "ok"
    rec = bench.wait_state(run_id, FINAL, 60)
    assert rec["state"] == "failed"
    [add] = rec["steps"]
    # the doser's count could not be read with its line gone: unknown, not a guess
    assert add["kind"] == "add" and add["volume_ml"] is None
    assert rec["dosers"]["acid"]["delivered_ml"] is None
    codes = [f["code"] for f in rec["faults"]]
    assert "doser" in codes, rec["faults"]
    assert rec["endpoints"] == [] and rec["dispensed_ml"] == 0  # never titrated
    st = wait_held(bench)
    assert st["held_reason"].startswith("doser: ")
    time.sleep(2.5)  # the lines are back
    before = assert_all_halted(bench)["dosers"]["acid"]["dispensed_ml"]
    time.sleep(0.5)  # halted for good: its count stands still
    assert bench.sim_state()["dosers"]["acid"]["dispensed_ml"] == before
    assert bench.request("GET", "/v1/health").status == 200
    rb.report(request, [f"rack doser fault (lines unplugged mid-addition): run {rec['state']}, "
                        f"doser halted once its line was back ({before - count0:.3f} of 4 mL in, "
                        "by its own count); station held, daemon up"])
    resume_when_idle(bench)


def test_nothing_moves_after_a_restart(bench):
    # a run queued on a held station, then the daemon restarts: the run is
    # queued again, the station is held, and the changer stays where it is
    ready(bench)
    assert bench.control("fault jam") == "ok"
    r = queue(bench, "rack-acid", 10)
    bench.wait_state(r.json()["id"], FINAL, 60)
    wait_held(bench)
    assert bench.control("clear") == "ok"
    r = queue(bench, "rack-acid", 11)
    assert r.status == 201
    queued = r.json()["id"]
    where = bench.sim_state()
    assert bench.stop_daemon() == 0
    bench.start_daemon()
    time.sleep(1.5)
    st = bench.station()
    assert st["held"] is True
    assert bench.run(queued)["state"] == "queued"
    now = bench.sim_state()
    assert (now["position"], now["lift"]) == (where["position"], where["lift"])
    assert bench.write("POST", f"/v1/runs/{queued}/abort").status == 200
    resume_when_idle(bench)
