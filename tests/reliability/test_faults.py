"""Fault suite (docs/reliability.md): every fault kind of stopcock-sim, and
garbage on the Modbus line (tests/reliability/reliability_bench.py's proxy), injected
mid-run. For each: the designed outcome (recovered, or the run `failed` with
the fault recorded), the burette halted as the simulator sees it, every point
the API had shown kept, the daemon answering /v1/health, and the next run
finishing after `clear`.

Designed outcomes (docs/drivers.md, "Faults"): pump-line noise is resynced
and retried, so the run finishes with the right endpoint and no doubled
dose; every persistent fault that leaves no usable burette or reading ends
the run `failed`; a fault shorter than the drivers' bounded retries is
ridden out and the run finishes."""
import threading
import time

import pytest

import daemon_bench as db
import reliability_bench as rb

# kind -> (designed state, fault code prefix or None, words the message has)
PERSISTENT = {
    "noise": ("finished", None, None),
    "mute-pump": ("failed", "burette", "no reply"),
    "stall": ("failed", "burette", "stall"),
    "unplug": ("failed", "", None),          # whichever device notices first
    "mute-probe": ("failed", "probe", "no reply"),
    "slow-probe": ("failed", "probe", "no reply"),
    "modbus-exception": ("failed", "probe", "exception"),
    "frozen-probe": ("failed", "probe", "frozen"),
    "modbus-garbage": ("failed", "probe", None),   # the proxy's, not the sim's
}

# Shorter than the drivers' retries: pump 500 ms x (1 + 2 retries); probe
# 300 ms x (1 + 1 retry), tried 3 times 0.2 s apart by the station.
TRANSIENT = {"mute-pump": 0.4, "mute-probe": 0.25, "modbus-garbage": 0.25}

BENCHES = 3   # scenarios run on three benches at once: the suite waits, it does not compute


def scenarios():
    return ([(k, None) for k in PERSISTENT] + [(k, s) for k, s in TRANSIENT.items()])


@pytest.fixture(scope="module")
def results(tmp_path_factory, request):
    """Run every scenario (three benches in parallel, each scenario on one
    bench from start to finish); each test below then checks one result."""
    benches = []
    try:
        for i in range(BENCHES):
            benches.append(rb.Bench(tmp_path_factory.mktemp(f"faults{i}")))
        todo = scenarios()
        out = {}
        lock = threading.Lock()

        def worker(b):
            while True:
                with lock:
                    if not todo:
                        return
                    kind, secs = todo.pop(0)
                try:
                    r = scenario(b, kind, secs)
                except BaseException as e:   # reported by the test of this scenario
                    r = e
                with lock:
                    out[(kind, secs)] = r

        threads = [threading.Thread(target=worker, args=(b,)) for b in benches]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    finally:
        for b in benches:
            b.close()
    rb.report(request, [r["line"] for k, r in sorted(out.items(), key=lambda kv: str(kv[0]))
                        if isinstance(r, dict)])
    return out


def inject(bench, kind, seconds=None):
    if kind == "modbus-garbage":
        bench.proxy.garbage = True
        if seconds:
            threading.Timer(seconds, lambda: setattr(bench.proxy, "garbage", False)).start()
        return
    line = f"fault {kind}" + (f" {seconds}" if seconds else "")
    assert bench.control(line) == "ok"


def clear(bench):
    bench.proxy.garbage = False
    assert bench.control("clear") == "ok"


def good_run(bench, sample):
    bench.wait_idle()
    bench.fresh_beaker()
    rid = bench.start_fast(sample=sample)
    rec = bench.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=60)
    assert rec["state"] == "finished", rec
    # Stoichiometry: 10 mL x 0.0200 mol/L / 0.1000 mol/L = 2.000 mL (tests/data/daemon/wash-acid.yaml).
    rb.endpoint_right_or_marked(rec)
    return rec


def scenario(bench, kind, seconds):
    """One run into one fault, then clear and one good run."""
    bench.wait_idle()
    bench.fresh_beaker()
    rid = bench.start_fast(sample=f"FAULT-{kind}")
    bench.wait_points(rid, 2, timeout_s=30)
    shown = bench.measured(rid)
    t0 = time.monotonic()
    inject(bench, kind, seconds)
    try:
        rec = bench.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=45)
        took_s = time.monotonic() - t0
        # Halted while the fault is still there...
        still, a, b = bench.burette_still(for_s=0.5)
        assert still, (kind, "burette moving during the fault", a, b)
    finally:
        clear(bench)
    # ... and not moving again once it is gone: nothing resumes by itself.
    still, a, b = bench.burette_still(for_s=0.5)
    assert still, (kind, "burette moving after clear", a, b)
    # The run is over, so the stirrer goes off, even when its line (shared
    # with the probe) was the one that failed: the station tries again.
    t_clear = time.monotonic()
    while bench.sim_state()["stirrer"]:
        assert time.monotonic() - t_clear < 8, (kind, "stirrer still on after clear")
        time.sleep(0.1)
    after = bench.measured(rid)
    assert after[:len(shown)] == shown, "a point the API had shown changed or vanished"
    assert bench.get("/v1/health")["status"] == "ok"
    sim_ml = bench.sim_state()["dispensed_ml"]
    stored = bench.run(rid)
    nxt = good_run(bench, f"AFTER-{kind}")
    if seconds:
        what = f"fault {kind} for {seconds} s -> {rec['state']}"
    else:
        what = f"fault {kind:17s} -> {rec['state']:8s}"
    code = rec["faults"][0]["code"] if rec["faults"] else "recovered"
    line = (f"{what} ({code}) in {took_s:4.1f} s; {len(shown)} points shown, "
            f"{len(after)} kept; burette halted; next run {nxt['state']}")
    return {"rec": rec, "stored": stored, "sim_ml": sim_ml, "line": line}


def result(results, kind, secs):
    r = results[(kind, secs)]
    if isinstance(r, BaseException):
        raise r
    return r


@pytest.mark.parametrize("kind", list(PERSISTENT))
def test_persistent_fault(results, kind):
    r = result(results, kind, None)
    rec = r["rec"]
    state, code, words = PERSISTENT[kind]
    assert rec["state"] == state, (kind, rec["state"], rec["faults"], rec["stop_reason"])
    if state == "failed":
        assert rec["stop_reason"] == "fault"
        assert rec["faults"], rec
        f = rec["faults"][0]
        assert f["code"].startswith(code), f
        if words:
            assert words in f["message"], f
        assert f["at"]
    else:
        assert rec["faults"] == []
        rb.endpoint_right_or_marked(rec)
        # No doubled or lost dose: the daemon's count is the syringe's.
        assert rec["dispensed_ml"] == pytest.approx(r["sim_ml"], abs=2e-3)
    # The stored record, read again, says the same.
    assert r["stored"]["state"] == state


@pytest.mark.parametrize("kind", list(TRANSIENT))
def test_short_fault_is_ridden_out(results, kind):
    r = result(results, kind, TRANSIENT[kind])
    rec = r["rec"]
    assert rec["state"] == "finished", (kind, rec["faults"])
    assert rec["faults"] == []
    rb.endpoint_right_or_marked(rec)
    assert rec["dispensed_ml"] == pytest.approx(r["sim_ml"], abs=2e-3)
