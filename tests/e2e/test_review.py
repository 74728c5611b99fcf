"""Review and corrections (docs/lims.md, "Review and corrections") through a
real stopcockd on the simulated bench: a second person with the `review`
role signs a finished run's results, never the one who requested it (four
eyes); a correction is a new version with its reason and author, the
original kept; every review and correction puts the run in the result feed
again with a new seq; an approved record refuses any change."""
import json
import os
import signal
import subprocess
import time

import pytest

import daemon_bench as db

TOKENS = {
    "ana": ("read,operate,review", "ana-operate-review-0123456789"),
    "qa": ("read,review", "qa-review-token-0123456789"),
    "lims": ("read", "lims-read-token-0123456789"),
}


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("review"))
    b.put_method()
    lines = [f"bench:{b.token}"] + [f"{n}:{r}:{t}" for n, (r, t) in TOKENS.items()]
    (b.tmp / "token").write_text("\n".join(lines) + "\n")
    b.daemon.send_signal(signal.SIGHUP)
    deadline = time.monotonic() + 10
    while b.request("GET", "/v1/whoami", token=TOKENS["qa"][1]).status != 200:
        assert time.monotonic() < deadline, "SIGHUP did not load the tokens"
        time.sleep(0.1)
    yield b
    b.close()


def post(bench, who, path, body):
    return bench.request("POST", path, json.dumps(body), token=TOKENS[who][1],
                         headers={"Content-Type": "application/json"})


@pytest.fixture(scope="module")
def run(bench):
    """A finished run that `ana` requested."""
    bench.fresh_beaker()
    r = post(bench, "ana", "/v1/runs", {"station": "sim1", "method": "wash-acid-mv",
                                        "sample_id": "REVIEW-1", "amount": 10.0})
    assert r.status == 201, r.body
    rid = r.json()["id"]
    rec = bench.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=90)
    assert rec["state"] == "finished", rec
    return rid


def feed_entries(bench, rid):
    res = bench.get("/v1/results?after=0&limit=1000")["results"]
    return [x for x in res if x["id"] == rid]


def test_a_queued_or_running_run_cannot_be_reviewed(bench):
    bench.fresh_beaker()
    rid = bench.start_run(sample="REVIEW-0")
    r = post(bench, "qa", f"/v1/runs/{rid}/review", {"decision": "approve"})
    assert r.status == 409, r.body
    assert bench.write("POST", f"/v1/runs/{rid}/abort").status == 200
    bench.wait_state(rid, ("aborted", "finished", "failed"), timeout_s=30)


def test_a_new_record_waits_for_review(bench, run):
    rec = bench.run(run)
    assert rec["review"] == {"state": "pending", "by": None, "at": None, "reason": None,
                             "version": 1}
    assert feed_entries(bench, run)[0]["review"]["state"] == "pending"


def test_four_eyes_and_roles(bench, run):
    # ana may review, but ana requested this run
    r = post(bench, "ana", f"/v1/runs/{run}/review", {"decision": "approve"})
    assert r.status == 409 and "four eyes" in r.json()["error"]["message"], r.body
    r = post(bench, "lims", f"/v1/runs/{run}/review", {"decision": "approve"})
    assert r.status == 403 and r.json()["error"]["role"] == "review", r.body
    r = post(bench, "qa", f"/v1/runs/{run}/review", {"decision": "reject"})
    assert r.status == 400, r.body  # a rejection says why
    r = post(bench, "qa", f"/v1/runs/{run}/review", {"decision": "maybe", "reason": "x"})
    assert r.status == 400, r.body
    assert bench.run(run)["review"]["state"] == "pending"


def test_a_correction_is_a_new_version_announced_in_the_feed(bench, run):
    before = bench.run(run)
    acid = before["results"][0]["value"]
    seq0 = before["seq"]
    r = post(bench, "ana", f"/v1/runs/{run}/correct",
             {"amount": 20.0, "reason": "sample volume misread: 20 mL, not 10"})
    assert r.status == 200, r.body
    assert r.json()["version"] == 2 and r.json()["seq"] > seq0
    rec = bench.run(run)
    assert rec["version"] == 2 and rec["sample"]["amount"] == 20.0
    assert rec["results"][0]["value"] == pytest.approx(acid / 2, abs=0.011)
    v1, v2 = rec["result_versions"]
    assert v1["version"] == 1 and v1["by"] is None and v1["amount"] == 10.0
    assert v1["results"] == before["results"]  # the original kept
    assert v2["by"] == "ana" and v2["reason"].startswith("sample volume misread")
    assert rec["review"]["state"] == "pending" and rec["review"]["version"] == 2
    # the feed has the run once, at its new seq, with the new version
    feed = feed_entries(bench, run)
    assert len(feed) == 1 and feed[0]["seq"] == rec["seq"] and feed[0]["version"] == 2
    evs = bench.get("/v1/events?after=0&limit=1000")["events"]
    assert any(e["kind"] == "result" and e["code"] == "corrected" and e["run_id"] == run
               and e["actor"] == "ana" for e in evs)
    # the one who corrected may not sign it either
    r = post(bench, "ana", f"/v1/runs/{run}/review", {"decision": "approve"})
    assert r.status == 409, r.body


def test_the_client_corrects_a_run(bench, run, tmp_path):
    acid = bench.run(run)["result_versions"][0]["results"][0]["value"]
    token = tmp_path / "token"
    token.write_text(f"ana:read,operate:{TOKENS['ana'][1]}\n")
    env = dict(os.environ, STOPCOCK_URL=bench.url, STOPCOCK_TOKEN_FILE=str(token))
    cli = [db.binary("stopcock"), "correct", str(run)]
    out = subprocess.run(cli + ["--amount", "25"], env=env, capture_output=True, text=True,
                         timeout=30)
    assert out.returncode == 2 and "--reason TEXT is needed" in out.stderr, out.stderr
    out = subprocess.run(cli + ["--amount", "25", "--reason", "read again: 25 mL"], env=env,
                         capture_output=True, text=True, timeout=30)
    assert out.returncode == 0, out.stderr
    assert f"run {run} version 3 stored, waiting for review" in out.stdout, out.stdout
    rec = bench.run(run)
    assert rec["version"] == 3 and rec["sample"]["amount"] == 25.0
    assert rec["results"][0]["value"] == pytest.approx(acid * 10 / 25, abs=0.011)
    assert rec["result_versions"][-1]["reason"] == "read again: 25 mL"
    assert rec["result_versions"][-1]["by"] == "ana"


def test_an_approval_is_signed_and_the_record_then_refuses_change(bench, run, tmp_path):
    seq0 = bench.run(run)["seq"]
    token = tmp_path / "token"
    token.write_text(f"qa:read,review:{TOKENS['qa'][1]}\n")
    env = dict(os.environ, STOPCOCK_URL=bench.url, STOPCOCK_TOKEN_FILE=str(token))
    out = subprocess.run([db.binary("stopcock"), "review", str(run), "--approve", "--reason",
                          "checked against the bench log"], env=env, capture_output=True,
                         text=True, timeout=30)
    assert out.returncode == 0, out.stderr
    assert f"run {run} version 3 approved by qa" in out.stdout, out.stdout
    rec = bench.run(run)
    assert rec["review"]["state"] == "approved" and rec["review"]["by"] == "qa"
    assert rec["review"]["reason"] == "checked against the bench log"
    assert rec["seq"] > seq0
    assert feed_entries(bench, run)[0]["review"]["state"] == "approved"
    # approved: neither a correction nor another review changes it
    r = post(bench, "ana", f"/v1/runs/{run}/correct", {"titer": 1.01, "reason": "x"})
    assert r.status == 409 and "approved" in r.json()["error"]["message"], r.body
    r = post(bench, "qa", f"/v1/runs/{run}/review", {"decision": "reject", "reason": "oops"})
    assert r.status == 409, r.body
    out = subprocess.run([db.binary("stopcock"), "review", str(run), "--reject", "--reason",
                          "again"], env=env, capture_output=True, text=True, timeout=30)
    assert out.returncode == 1 and "cannot change" in out.stderr, out.stderr
    assert bench.run(run)["review"]["state"] == "approved"
    # and the chain holds over reviews and versions
    assert bench.get("/v1/events/verify")["ok"]
