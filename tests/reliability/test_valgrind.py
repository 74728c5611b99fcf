"""valgrind over the end-to-end daemon path (docs/reliability.md): stopcockd
(release build) under `valgrind --leak-check=full --error-exitcode=9` drives
one whole run on the simulated bench, answers every kind of route (reads,
CSV, SVG, metrics, a method PUT, refused writes, a 404 and a 413), then gets
SIGTERM: it must exit 0 with 0 errors and 0 bytes lost."""
import json
import re
import signal

import pytest

import daemon_bench as db
import reliability_bench as rb

VALGRIND = ["valgrind", "--leak-check=full", "--show-leak-kinds=definite,indirect,possible",
            "--errors-for-leak-kinds=definite,indirect,possible", "--error-exitcode=9",
            "--track-fds=no", "--num-callers=30"]


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("valgrind")
    log = tmp / "valgrind.log"
    b = rb.Bench(tmp, daemon_wrap=VALGRIND + [f"--log-file={log}"])
    b.valgrind_log = log
    yield b
    b.close()


def test_daemon_path_is_clean_under_valgrind(bench, request):
    b = bench
    b.fresh_beaker()
    rid = b.start_fast(sample="VALGRIND")
    rec = b.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=180)
    assert rec["state"] == "finished", rec
    assert rec["endpoints"][0]["volume_ml"] == pytest.approx(db.EXPECTED_ML, rel=0.03)
    for path in ("/v1/health", "/v1/stations", f"/v1/runs/{rid}", f"/v1/runs/{rid}/points",
                 f"/v1/runs/{rid}/points?format=csv", f"/v1/runs/{rid}/curve.svg",
                 "/v1/results?after=0", "/v1/methods", "/v1/methods/fast-acid-mv", "/metrics",
                 "/v1/calibrations/latest?station=sim1"):
        r = b.request("GET", path, timeout=60)
        assert r.status in (200, 404), (path, r.status)
    assert b.request("GET", "/v1/runs/999999", timeout=60).status == 404
    assert b.request("POST", "/v1/runs", "{}", timeout=60).status == 401
    assert b.write("PUT", "/v1/methods/fast-acid-mv", "x" * (300 * 1024)).status == 413
    text = rb.FAST_METHOD.read_text().replace("revision: 1", "revision: 2")
    assert b.write("PUT", "/v1/methods/fast-acid-mv", text).status == 201
    r = b.write("POST", "/v1/runs", json.dumps({"station": "sim1", "method": "fast-acid-mv",
                                                "sample_id": "V2", "amount": 10}))
    assert r.status == 201
    rid2 = r.json()["id"]
    b.wait_points(rid2, 2, timeout_s=60)
    assert b.write("POST", f"/v1/runs/{rid2}/abort").status == 200

    rc = b.stop_daemon(signal.SIGTERM, timeout=120)
    log = b.valgrind_log.read_text()
    errors = re.search(r"ERROR SUMMARY: (\d+) errors", log)
    lost = {k: int(v.replace(",", "")) for k, v in
            re.findall(r"(definitely|indirectly|possibly) lost: ([\d,]+) bytes", log)}
    rb.report(request, [f"valgrind: stopcockd over one run, a second aborted run and 14 "
                        f"routes: exit {rc}, {errors.group(1) if errors else '?'} errors, "
                        f"lost bytes {lost or 'none reported (all freed)'}"])
    assert rc == 0, log[-3000:]
    assert errors and errors.group(1) == "0", log[-3000:]
    assert all(v == 0 for v in lost.values()), lost
    b.daemon_wrap = []   # plain again: the store is fine after the valgrind run
    b.start_daemon()
    assert b.run(rid)["state"] == "finished"
