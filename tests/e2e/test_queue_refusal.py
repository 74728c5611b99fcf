"""A refused POST /v1/runs leaves nothing behind (docs/api.md, "POST
/v1/runs"): before, 60 concurrent POSTs gave 33 x 201 and 27 x 409 but 60
runs in the feed, each refused one `aborted` with a seq. Real stopcock-sim and
stopcockd (tests/e2e/daemon_bench.py)."""
import json
import threading

import pytest

import daemon_bench as db

QUEUE_MAX = 32   # docs/api.md: a station keeps 32 runs waiting behind its current one


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    # 60 concurrent clients from one address: raise the per-address limit.
    b = db.Bench(tmp_path_factory.mktemp("queue"))
    b.config.write_text(b.config.read_text().replace("http:\n", "http:\n  max_per_ip: 100\n", 1))
    b.stop_daemon()
    b.start_daemon()
    b.put_method()
    yield b
    b.close()


def test_refused_posts_leave_no_run_and_no_seq(bench):
    before = bench.get("/v1/results?after=0&limit=1000")["results"]
    replies = [None] * 60
    body = json.dumps({"station": "sim1", "method": "wash-acid-mv", "sample_id": "BURST",
                       "amount": 10.0})

    def post(i):
        replies[i] = bench.write("POST", "/v1/runs", body)

    threads = [threading.Thread(target=post, args=(i,)) for i in range(60)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    made = [r.json()["id"] for r in replies if r.status == 201]
    refused = [r for r in replies if r.status == 409]
    assert len(made) + len(refused) == 60, [r.status for r in replies]
    assert refused, "the queue never filled"
    assert len(made) <= QUEUE_MAX + 1
    assert all(r.json()["error"]["code"] == "queue_full" for r in refused)
    # Only the accepted runs exist; no refused one got a seq.
    runs = bench.get("/v1/runs?limit=1000")["runs"]
    burst = sorted(r["id"] for r in runs if r["sample"]["id"] == "BURST")
    assert burst == sorted(made), (len(burst), len(made))
    after = bench.get("/v1/results?after=0&limit=1000")["results"]
    assert len(after) == len(before), "a refused request reached the result feed"
    # The refusals are in the audit trail.
    ev = bench.get("/v1/events?limit=1000")["events"]
    assert sum(1 for e in ev if e.get("code") == "refused") == len(refused)
    for rid in made:
        bench.write("POST", f"/v1/runs/{rid}/abort")
    for rid in made:
        bench.wait_state(rid, ("aborted", "finished", "failed"), timeout_s=60)
