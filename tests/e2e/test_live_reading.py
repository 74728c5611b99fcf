"""The station's live reading and burette figures while a run stirs and
refills (docs/api.md, GET /v1/stations): the probe is read at least once a
second in every phase, a refill shows as `refilling`, and the syringe's
content is shown apart from the run's volume. Real stopcock-sim and stopcockd
(tests/e2e/daemon_bench.py)."""
import time

import pytest

import daemon_bench as db

# wash-acid-mv with a long stir and a large first addition: the stir is long
# enough to see a stale reading (before this was fixed the age grew to the
# whole stir time), the initial volume forces a refill in the second run.
METHOD = db.METHOD_MV.read_text().replace(
    "method: wash-acid-mv", "method: live-stir").replace(
    "start: {stir_s: 1, initial_ml: 1.4}", "start: {stir_s: 5, initial_ml: 6.0}").replace(
    "volume_max_ml: 5.0", "volume_max_ml: 12.0")


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("live")
    b = db.Bench(tmp)
    (tmp / "live-stir.yaml").write_text(METHOD)
    b.put_method(tmp / "live-stir.yaml")
    yield b
    b.close()


def watch(bench, run_id, until, timeout_s=60):
    """Poll the station every 0.1 s until until(station) or timeout; returns the snapshots."""
    seen = []
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        st = bench.station()
        seen.append((time.monotonic(), st))
        if until(st):
            return seen
        time.sleep(0.1)
    raise AssertionError(f"run {run_id}: not seen in {timeout_s} s; last {seen[-1][1]}")


def test_reading_stays_fresh_while_stirring(bench):
    assert bench.control(f"load {db.SCENARIO}") == "ok"
    run = bench.start_run(method="live-stir", sample="LIVE-1")
    seen = watch(bench, run, lambda st: st.get("phase") not in (None, "stirring", "refilling")
                 and st["state"] == "running")
    stirring = [st for _, st in seen if st.get("phase") == "stirring"]
    assert len(stirring) >= 20, f"the 5 s stir was seen only {len(stirring)} times"
    ages = [st["reading"]["age_s"] for st in stirring if st.get("reading")]
    assert ages and max(ages) <= 2.0, f"reading ages while stirring: max {max(ages):.1f} s"
    bench.write("POST", f"/v1/runs/{run}/abort")
    bench.wait_state(run, ("aborted",))


def test_refill_shows_and_the_syringe_is_not_zero(bench):
    # A first run takes its 6 mL; the next 6 mL start then needs a refill.
    assert bench.control(f"load {db.SCENARIO}") == "ok"
    first = bench.start_run(method="live-stir", sample="LIVE-2a")
    watch(bench, first, lambda st: st["burette"]["dispensed_ml"] >= 5.9, timeout_s=60)
    bench.write("POST", f"/v1/runs/{first}/abort")
    bench.wait_state(first, ("aborted",))
    assert bench.control(f"load {db.SCENARIO}") == "ok"
    before = bench.station()["burette"]
    assert before["contents_ml"] < 6.0, before
    run = bench.start_run(method="live-stir", sample="LIVE-2")
    seen = watch(bench, run, lambda st: st.get("phase") == "refilling", timeout_s=30)
    st = seen[-1][1]
    assert st["reading"] and st["reading"]["age_s"] <= 2.0, st["reading"]
    # Wait for the refill to end: the syringe holds what the pump says, and the
    # run's dispensed volume is its own.
    seen = watch(bench, run, lambda st: st.get("phase") not in ("refilling",), timeout_s=60)
    refilling = [s for _, s in seen if s.get("phase") == "refilling"]
    assert all(s["reading"]["age_s"] <= 2.0 for s in refilling if s.get("reading")), \
        [s["reading"]["age_s"] for s in refilling]
    st = seen[-1][1]
    assert st["burette"]["contents_ml"] > 0.5, st["burette"]
    bench.write("POST", f"/v1/runs/{run}/abort")
    rec = bench.wait_state(run, ("aborted",))
    assert st["burette"]["dispensed_ml"] <= rec["dispensed_ml"] + 1e-6
