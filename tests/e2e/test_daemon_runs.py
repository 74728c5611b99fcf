"""Whole runs through a real stopcockd on the simulated bench: a run to
`finished` with its endpoint at the stoichiometric volume, the result feed
across daemon restarts, points as JSON/CSV/SVG, abort of a finished run."""
import csv
import io
import json

import pytest

import daemon_bench as db


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("runs"))
    b.put_method()
    yield b
    b.close()


@pytest.fixture(scope="module")
def finished(bench):
    bench.fresh_beaker()
    rid = bench.start_run(sample="BATCH-7")
    rec = bench.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=90)
    return rid, rec


def test_run_finishes_at_the_stoichiometric_volume(finished):
    rid, rec = finished
    assert rec["state"] == "finished", rec
    assert rec["stop_reason"] == "endpoints_found"
    assert rec["phase"] is None
    assert rec["seq"] >= 1
    assert len(rec["endpoints"]) == 1
    # Stoichiometry of the scenario: 10 mL x 0.0200 mol/L / 0.1000 mol/L = 2.000 mL.
    # 1 % tolerance: the simulated electrode has noise and a lag (tau 0.3 s).
    assert rec["endpoints"][0]["volume_ml"] == pytest.approx(db.EXPECTED_ML, rel=0.01)
    res = rec["results"][0]
    assert res["name"] == "acid" and res["unit"] == "mmol/L"
    assert res["value"] == pytest.approx(20.0, rel=0.01)   # 0.0200 mol/L = 20 mmol/L
    assert res["accept"] == "pass"
    assert rec["sample"] == {"id": "BATCH-7", "amount": 10.0, "unit": "mL"}
    assert rec["method"]["id"] == "wash-acid-mv" and len(rec["method"]["sha256"]) == 64
    assert rec["started_at"] and rec["ended_at"] and rec["queued_at"] <= rec["started_at"]
    assert rec["faults"] == []


def test_dispensed_volume_matches_the_simulated_burette(bench, finished):
    rid, rec = finished
    # The simulator's own count of what left the syringe (the first run of
    # this bench, so its whole count).
    assert bench.sim_state()["dispensed_ml"] == pytest.approx(rec["dispensed_ml"], abs=1e-3)
    # Interlock: never beyond the method's volume_max_ml (5 mL).
    assert rec["dispensed_ml"] <= 5.0


def test_points_json_csv_and_svg(bench, finished):
    rid, rec = finished
    pts = bench.get(f"/v1/runs/{rid}/points")
    assert pts["run"] == rid
    p = pts["points"]
    assert len(p) >= 5
    assert set(p[0]) == {"t_s", "volume_ml", "mv", "ph", "temperature_c", "settled", "dpdv"}
    vols = [x["volume_ml"] for x in p]
    assert vols == sorted(vols)
    assert vols[-1] == pytest.approx(rec["dispensed_ml"], abs=1e-3)
    ts = [x["t_s"] for x in p]
    assert ts == sorted(ts)
    # The simulated electrode (tau 0.3 s, 0.05 mV noise) settles well within
    # wait_max_s, so most points are settled ones, not timeouts.
    assert sum(x["settled"] for x in p) > len(p) / 2, p
    r = bench.request("GET", f"/v1/runs/{rid}/points?format=csv")
    assert r.status == 200 and r.headers["Content-Type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(r.body.decode())))
    assert len(rows) == len(p)
    assert float(rows[-1]["volume_ml"]) == pytest.approx(vols[-1], abs=1e-3)
    assert bench.request("GET", f"/v1/runs/{rid}/points?format=xml").status == 400
    r = bench.request("GET", f"/v1/runs/{rid}/curve.svg")
    assert r.status == 200 and r.headers["Content-Type"] == "image/svg+xml"
    svg = r.body.decode()
    assert svg.lstrip().startswith(("<?xml", "<svg")) and "</svg>" in svg
    assert "mV" in svg and "mL" in svg


def test_abort_of_a_finished_run_is_409(bench, finished):
    rid, _ = finished
    r = bench.write("POST", f"/v1/runs/{rid}/abort")
    assert r.status == 409
    assert bench.run(rid)["state"] == "finished"


def test_result_feed_gives_each_final_run_once_across_restarts(bench, finished):
    rid, rec = finished
    page = bench.get("/v1/results?after=0")
    seqs = [r["seq"] for r in page["results"]]
    assert seqs == sorted(seqs) and len(set(seqs)) == len(seqs)
    assert [r["id"] for r in page["results"]].count(rid) == 1
    cursor = page["next_after"]
    assert cursor == seqs[-1]
    # Nothing new: the same cursor back, no records.
    again = bench.get(f"/v1/results?after={cursor}")
    assert again == {"results": [], "next_after": cursor, "history": page["history"]}
    # A queued run aborted before it starts is final too: one new record.
    blocker = bench.start_run(sample="BLOCKER")
    queued = bench.start_run(sample="QUEUED")
    assert bench.write("POST", f"/v1/runs/{queued}/abort").status == 200
    assert bench.write("POST", f"/v1/runs/{blocker}/abort").status == 200
    bench.wait_state(blocker, ("aborted",), timeout_s=20)
    # Restart the daemon: the feed continues where it was, without repeats.
    assert bench.stop_daemon() == 0
    bench.start_daemon()
    page = bench.get(f"/v1/results?after={cursor}")
    ids = [r["id"] for r in page["results"]]
    assert sorted(ids) == sorted([blocker, queued]), page
    assert all(r["seq"] > cursor for r in page["results"])
    assert all(r["state"] == "aborted" for r in page["results"])
    full = bench.get("/v1/results?after=0&limit=1000")["results"]
    assert [r["id"] for r in full].count(rid) == 1
    # Paging by one never skips or repeats.
    seen, c = [], 0
    while True:
        p = bench.get(f"/v1/results?after={c}&limit=1")
        if not p["results"]:
            break
        seen += [r["id"] for r in p["results"]]
        c = p["next_after"]
    assert seen == [r["id"] for r in full]
