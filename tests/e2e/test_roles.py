"""Roles (docs/api.md, "Roles"): each write route against a token of each
role, through a real stopcockd on the simulated bench. A token without the
route's role gets 403 naming the role it lacks; the one with it gets its
answer. A `name:token` line keeps every role, and --check-config warns about
it; GET /v1/whoami says what a token may do (the bench page hides the rest)."""
import json
import signal
import subprocess
import time

import pytest

import daemon_bench as db

TOKENS = {
    "read": "lims-read-token-0123456789",
    "operate": "ana-operate-token-0123456789",
    "review": "qa-review-token-0123456789",
    "admin": "boss-admin-token-0123456789",
}
NAMES = {"read": "lims", "operate": "ana", "review": "qa", "admin": "boss"}


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("roles"))
    b.put_method()
    lines = [f"bench:{b.token}"]  # the simulator's line: no roles, every right
    lines += [f"{NAMES[r]}:{r}:{t}" for r, t in TOKENS.items()]
    (b.tmp / "token").write_text("\n".join(lines) + "\n")
    b.daemon.send_signal(signal.SIGHUP)
    deadline = time.monotonic() + 10
    while b.request("GET", "/v1/whoami", token=TOKENS["read"]).status != 200:
        assert time.monotonic() < deadline, "SIGHUP did not load the tokens"
        time.sleep(0.1)
    yield b
    b.close()


def call(bench, role, method, path, body=None):
    return bench.request(method, path, body, token=TOKENS[role],
                         headers={"Content-Type": "application/json"})


def refused_to_all_but(bench, allowed, method, path, body=None):
    """Every role not in `allowed` gets 403 naming the needed role."""
    for role in TOKENS:
        if role in allowed:
            continue
        r = call(bench, role, method, path, body)
        assert r.status == 403, (role, method, path, r.status, r.body)
        err = r.json()["error"]
        assert err["code"] == "forbidden"
        assert err["role"] == ",".join(allowed), err
        assert NAMES[role] in err["message"], err


def test_each_write_route_needs_its_role(bench):
    run_body = json.dumps({"station": "sim1", "method": "wash-acid-mv",
                           "sample_id": "ROLES-1", "amount": 10.0})
    method_text = db.METHOD_MV.read_text()

    refused_to_all_but(bench, ["admin"], "PUT", "/v1/methods/wash-acid-mv", method_text)
    r = call(bench, "admin", "PUT", "/v1/methods/wash-acid-mv", method_text)
    assert r.status in (200, 201), r.body
    refused_to_all_but(bench, ["admin"], "POST", "/v1/methods/wash-acid-mv/check", method_text)
    r = call(bench, "admin", "POST", "/v1/methods/wash-acid-mv/check", method_text)
    assert r.status == 200, r.body

    bench.fresh_beaker()
    refused_to_all_but(bench, ["operate"], "POST", "/v1/runs", run_body)
    r = call(bench, "operate", "POST", "/v1/runs", run_body)
    assert r.status == 201, r.body
    rid = r.json()["id"]
    assert bench.run(rid)["requested_by"] == "ana"
    refused_to_all_but(bench, ["operate"], "POST", f"/v1/runs/{rid}/abort")
    r = call(bench, "operate", "POST", f"/v1/runs/{rid}/abort")
    assert r.status == 200, r.body
    bench.wait_state(rid, ("aborted", "finished", "failed"), timeout_s=30)
    review = json.dumps({"decision": "reject", "reason": "aborted at the bench"})
    refused_to_all_but(bench, ["review"], "POST", f"/v1/runs/{rid}/review", review)
    r = call(bench, "review", "POST", f"/v1/runs/{rid}/review", review)
    assert r.status == 200, r.body
    correct = json.dumps({"amount": 5.0, "reason": "roles"})
    refused_to_all_but(bench, ["operate"], "POST", f"/v1/runs/{rid}/correct", correct)
    r = call(bench, "operate", "POST", f"/v1/runs/{rid}/correct", correct)
    assert r.status == 409, r.body  # allowed, but an aborted run has no results to correct

    refused_to_all_but(bench, ["operate"], "POST", "/v1/stations/sim1/halt")
    r = call(bench, "operate", "POST", "/v1/stations/sim1/halt")
    assert r.status == 200, r.body
    refused_to_all_but(bench, ["operate"], "POST", "/v1/stations/sim1/resume")
    r = call(bench, "operate", "POST", "/v1/stations/sim1/resume")
    assert r.status == 200, r.body

    titer = json.dumps({"name": "NaOH 0.1 mol/L", "titer": 1.0, "molarity": 0.1,
                        "reason": "certificate"})
    refused_to_all_but(bench, ["operate", "admin"], "POST", "/v1/titrants", titer)
    for role in ("operate", "admin"):
        r = call(bench, role, "POST", "/v1/titrants", titer)
        assert r.status == 201, r.body

    cal_body = json.dumps({"station": "sim1", "buffers": [4.01, 7.00]})
    refused_to_all_but(bench, ["operate"], "POST", "/v1/calibrations", cal_body)
    r = call(bench, "operate", "POST", "/v1/calibrations", cal_body)
    assert r.status == 201, r.body
    cid = r.json()["id"]
    refused_to_all_but(bench, ["operate"], "POST", f"/v1/calibrations/{cid}/next", "{}")
    r = call(bench, "operate", "POST", f"/v1/calibrations/{cid}/next", "{}")
    assert r.status not in (401, 403), r.body


def test_reads_need_no_role_while_reads_are_open(bench):
    # http.read_needs_token is off here: a write-only token reads too.
    for role in TOKENS:
        assert call(bench, role, "GET", "/v1/runs").status == 200


def test_a_line_without_roles_keeps_every_right_and_check_config_says_so(bench):
    r = bench.request("GET", "/v1/whoami", token=bench.token)
    assert r.json()["roles"] == ["read", "operate", "review", "admin"]
    out = subprocess.run([db.binary("stopcockd"), "--check-config", "-c", str(bench.config)],
                         capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert f"{bench.tmp / 'token'}:1:1: warning: token 'bench' has no roles" in out.stderr
    assert "'lims'" not in out.stderr  # lines with roles are not warned about


def test_whoami_names_the_token_and_its_roles(bench):
    me = bench.request("GET", "/v1/whoami", token=TOKENS["review"]).json()
    assert me == {"name": "qa", "roles": ["review"], "read_needs_token": False}
    anon = bench.request("GET", "/v1/whoami").json()
    assert anon["name"] is None and anon["roles"] == []
    assert bench.request("GET", "/v1/whoami", token="not-a-token-0123456789").status == 401


def test_a_refused_role_changes_nothing(bench):
    before = bench.get("/v1/events?after=0&limit=1000")["events"]
    assert call(bench, "read", "POST", "/v1/stations/sim1/halt").status == 403
    assert bench.station()["state"] != "halted"
    after = bench.get("/v1/events?after=0&limit=1000")["events"]
    assert len(after) == len(before)
