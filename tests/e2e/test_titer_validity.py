"""Titer and blank validity (docs/calibration.md, "Titer and blank
validity") through a real stopcockd whose config requires a titer: an assay
without one is refused with 409 and the reason; a certified titer entered by
hand (POST /v1/titrants, `stopcock titrants set`) by an operate or admin
token, with its reason, lets it start and is in the audit trail; a titer
whose date is past its validity refuses the assay again."""
import datetime
import json
import os
import signal
import subprocess
import time

import pytest

import daemon_bench as db

TITRANT = "NaOH 0.1 mol/L"
TOKENS = {"ana": ("read,operate", "ana-operate-token-0123456789"),
          "boss": ("admin", "boss-admin-token-0123456789"),
          "lims": ("read", "lims-read-token-0123456789")}

# notify_command: files each event's JSON (its standard input), one a line.
NOTIFY = """#!/bin/sh
cat >> "$1"
"""


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("titer")
    script = tmp / "alarm.sh"
    script.write_text(NOTIFY)
    script.chmod(0o755)
    b = db.Bench(tmp, extra_config=f"notify_command: [{script}, {tmp / 'alarms.txt'}]\n"
                                   "notify_timeout_s: 5\n")
    b.put_method()
    b.stop_daemon()
    text = b.config.read_text()
    assert "records: {titer_required: false}" in text
    b.config.write_text(text.replace("records: {titer_required: false}",
                                     "records: {titer_required: true, titer_valid_days: 30}"))
    lines = [f"bench:{b.token}"] + [f"{n}:{r}:{t}" for n, (r, t) in TOKENS.items()]
    (b.tmp / "token").write_text("\n".join(lines) + "\n")
    b.start_daemon()
    yield b
    b.close()


def post(bench, who, path, body):
    return bench.request("POST", path, json.dumps(body), token=TOKENS[who][1],
                         headers={"Content-Type": "application/json"})


def start(bench):
    return post(bench, "ana", "/v1/runs", {"station": "sim1", "method": "wash-acid-mv",
                                           "sample_id": "TITER-1", "amount": 10.0})


def sql(bench, statement):
    db_path = next(l.split(":", 1)[1].strip() for l in bench.config.read_text().splitlines()
                   if l.strip().startswith("database:"))
    r = subprocess.run(["sqlite3", "-cmd", ".timeout 5000", db_path, statement],
                       capture_output=True, text=True, timeout=30)
    assert r.returncode == 0, r.stderr


def test_an_assay_without_a_titer_is_refused(bench):
    r = start(bench)
    assert r.status == 409, r.body
    err = r.json()["error"]
    assert err["code"] == "no_titer" and "has no titer" in err["message"], err
    assert bench.get("/v1/runs?limit=10")["runs"] == []  # nothing was queued


def test_a_titer_is_entered_by_operate_or_admin_with_a_reason(bench, tmp_path):
    body = {"name": TITRANT, "titer": 1.0, "molarity": 0.1, "reason": "certificate 4711"}
    assert post(bench, "lims", "/v1/titrants", body).status == 403
    r = post(bench, "ana", "/v1/titrants", {**body, "reason": ""})
    assert r.status == 400, r.body  # a reason is required
    r = post(bench, "boss", "/v1/titrants", {**body, "valid_days": 90})
    assert r.status == 201, r.body
    assert r.json()["by"] == "boss" and r.json()["valid_days"] == 90
    # and from the CLI, by the analyst
    token = tmp_path / "token"
    token.write_text(f"ana:read,operate:{TOKENS['ana'][1]}\n")
    env = dict(os.environ, STOPCOCK_URL=bench.url, STOPCOCK_TOKEN_FILE=str(token))
    out = subprocess.run([db.binary("stopcock"), "titrants", "set", TITRANT, "--titer", "1.002",
                          "--reason", "certificate 4712, new lot", "--valid-days", "60"],
                         env=env, capture_output=True, text=True, timeout=30)
    assert out.returncode == 0, out.stderr
    assert f"{TITRANT}: titer 1.002000 entered by ana" in out.stdout, out.stdout
    t = next(x for x in bench.get("/v1/titrants")["titrants"] if x["name"] == TITRANT)
    assert t["titer"] == 1.002 and t["source"] == "entered" and t["valid_days"] == 60
    assert t["reason"] == "certificate 4712, new lot" and t["by"] == "ana"
    evs = bench.get("/v1/events?after=0&limit=1000")["events"]
    assert [e["actor"] for e in evs if e["kind"] == "titrant"] == ["boss", "ana"]
    assert bench.get("/v1/events/verify")["ok"]


def test_a_valid_titer_lets_the_assay_start_and_an_expired_one_refuses_it(bench):
    bench.fresh_beaker()
    r = start(bench)
    assert r.status == 201, r.body
    rid = r.json()["id"]
    bench.wait_state(rid, ("running",), timeout_s=30)
    assert bench.write("POST", f"/v1/runs/{rid}/abort").status == 200
    rec = bench.wait_state(rid, ("aborted", "finished", "failed"), timeout_s=30)
    # the record names the titer it used: entered by hand, why, by whom, until when
    t = rec["titrant"]
    assert t["titer"] == 1.002 and t["titer_source"] == "entered" and t["titer_run_id"] is None
    assert t["titer_reason"] == "certificate 4712, new lot" and t["titer_by"] == "ana"
    at = datetime.datetime.fromisoformat(t["titer_at"].replace("Z", "+00:00"))
    until = datetime.datetime.fromisoformat(t["titer_valid_until"].replace("Z", "+00:00"))
    assert abs((until - at).total_seconds() - 60 * 86400) < 0.002, t
    assert t["blank_source"] is None and t["blank_valid_until"] is None  # no blank stored
    # a titer entered long ago: past its 60 days
    sql(bench, f"UPDATE titrants SET at='2020-01-01T00:00:00.000Z' WHERE name='{TITRANT}'")
    r = start(bench)
    assert r.status == 409, r.body
    assert "expired" in r.json()["error"]["message"], r.body


def test_a_titer_that_expires_while_the_run_waits_fails_it_at_its_start(bench):
    """Checked again when the station takes the run: queued with a valid
    titer, started after it expired, it fails with the fault `no_titer`
    and doses nothing (docs/calibration.md)."""
    r = post(bench, "boss", "/v1/titrants", {"name": TITRANT, "titer": 1.0, "valid_days": 30,
                                              "reason": "certificate 4713"})
    assert r.status == 201, r.body
    bench.fresh_beaker()
    first = start(bench)
    assert first.status == 201, first.body
    first = first.json()["id"]
    bench.wait_state(first, ("running",), timeout_s=30)
    waiting = start(bench)
    assert waiting.status == 201, waiting.body  # valid when queued
    waiting = waiting.json()["id"]
    assert bench.run(waiting)["state"] == "queued"
    sql(bench, f"UPDATE titrants SET at='2020-01-01T00:00:00.000Z' WHERE name='{TITRANT}'")
    assert bench.write("POST", f"/v1/runs/{first}/abort").status == 200
    rec = bench.wait_state(waiting, ("aborted", "finished", "failed"), timeout_s=30)
    assert rec["state"] == "failed", rec
    fault = rec["faults"][-1]
    assert fault["code"] == "no_titer" and "expired" in fault["message"], rec["faults"]
    assert bench.get(f"/v1/runs/{waiting}/points")["points"] == []


def alarms(bench):
    path = bench.tmp / "alarms.txt"
    text = path.read_text() if path.exists() else ""
    return [json.loads(l) for l in text.splitlines() if l.strip()]


def test_an_alarm_warns_a_day_before_a_titer_or_blank_expires(bench):
    # a blank measured six and a half days ago: half a day of its 7 left
    at = (datetime.datetime.now(datetime.timezone.utc) - datetime.timedelta(days=6.5))
    sql(bench, "INSERT OR REPLACE INTO blanks (method_id, volume_ml, at, run_id) VALUES "
               f"('{TITRANT}', 0.05, '{at.strftime('%Y-%m-%dT%H:%M:%S.000Z')}', NULL)")
    # a titer valid for half a day: the new titrant event makes the daemon look
    r = post(bench, "boss", "/v1/titrants", {"name": TITRANT, "titer": 0.998, "valid_days": 0.5,
                                              "reason": "certificate 4714, short-lived"})
    assert r.status == 201, r.body
    deadline = time.monotonic() + 15
    while not {"titer_expiring", "blank_expiring"} <= {e["event"] for e in alarms(bench)}:
        assert time.monotonic() < deadline, alarms(bench)
        time.sleep(0.2)
    told = {e["event"]: e for e in alarms(bench)}
    assert TITRANT in told["titer_expiring"]["message"], told
    assert "standardize it again" in told["titer_expiring"]["message"], told
    assert told["titer_expiring"]["code"] == "titer"
    assert "run the blank method again" in told["blank_expiring"]["message"], told
    # told once each, though the daemon looks again at every titer stored
    assert post(bench, "ana", "/v1/titrants", {"name": "HCl 0.1 mol/L", "titer": 1.0,
                                               "molarity": 0.1, "valid_days": 30,
                                               "reason": "certificate 4715"}).status == 201
    time.sleep(1.5)
    kinds = [e["event"] for e in alarms(bench)]
    assert kinds.count("titer_expiring") == 1 and kinds.count("blank_expiring") == 1, kinds


def test_a_method_may_ask_for_a_fresher_blank_than_the_default(bench):
    """`blank: {valid_days: N}` in a method (docs/methods.md): the blank of
    6.5 days stored above is within the default 7 days, not within 1."""
    text = db.METHOD_MV.read_text().replace("method: wash-acid-mv", "method: wash-acid-blank")
    text = text.replace("formula: end1_ml * titrant_molarity",
                        "formula: (end1_ml - blank_ml) * titrant_molarity")
    assert "blank_ml" in text
    r = bench.write("PUT", "/v1/methods/wash-acid-blank", text)
    assert r.status in (200, 201), r.body
    body = {"station": "sim1", "method": "wash-acid-blank", "sample_id": "BLANK-1", "amount": 10.0}
    r = post(bench, "ana", "/v1/runs", body)
    assert r.status == 201, r.body  # the default: 7 days
    rid = r.json()["id"]
    assert bench.write("POST", f"/v1/runs/{rid}/abort").status == 200
    bench.wait_state(rid, ("aborted", "finished", "failed"), timeout_s=30)
    text = text.replace("revision: 1", "revision: 2") + "blank: {valid_days: 1}\n"
    r = bench.write("PUT", "/v1/methods/wash-acid-blank", text)
    assert r.status in (200, 201), r.body
    r = post(bench, "ana", "/v1/runs", body)
    assert r.status == 409, r.body
    err = r.json()["error"]
    assert err["code"] == "no_titer" and "blank" in err["message"], err
    assert "after 1 days" in err["message"], err
