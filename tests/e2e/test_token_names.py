"""Token names become part of every record and audit event a token makes
(docs/api.md): a name that is not UTF-8 is refused at load with file:line,
and a long name is cut on a character boundary. Before, a Latin-1 name gave
201 and a normal run, but the run's record was stored NULL (the feed showed
only seq, id and state) and its audit events were skipped."""
import signal
import subprocess
import time

import pytest

import daemon_bench as db

TOKEN_OK = "orchard-token-0123456789"
TOKEN_LATIN1 = "latin1-token-0123456789"
TOKEN_LONG = "longname-token-0123456789"
# 62 ASCII letters then "ä" (2 bytes): 64 bytes, one over the 63 a name keeps.
LONG_NAME = "x" * 62 + "ä"


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("tokname"))
    b.put_method()
    path = b.tmp / "token"
    path.write_bytes(f"ok-name:{TOKEN_OK}\n".encode()
                     + b"Gr\xe4fin:" + TOKEN_LATIN1.encode() + b"\n"
                     + f"{LONG_NAME}:{TOKEN_LONG}\n".encode())
    b.daemon.send_signal(signal.SIGHUP)
    deadline = time.monotonic() + 10
    while b.request("POST", "/v1/stations/sim1/halt", token=TOKEN_OK).status != 200:
        assert time.monotonic() < deadline, "SIGHUP did not load the tokens"
        time.sleep(0.1)
    yield b
    b.close()


def test_a_latin1_name_is_refused_at_load_with_its_line(bench):
    r = subprocess.run([db.binary("stopcockd"), "--check-config", "-c", str(bench.config)],
                       capture_output=True, text=True, errors="replace")
    assert r.returncode != 0
    assert f"{bench.tmp / 'token'}:2:1: the name is not valid UTF-8" in r.stderr, r.stderr
    assert bench.request("POST", "/v1/stations/sim1/halt", token=TOKEN_LATIN1).status == 401


def test_a_long_name_is_cut_on_a_character_and_its_run_is_recorded(bench):
    bench.fresh_beaker()
    r = bench.request("POST", "/v1/runs", body=(
        '{"station":"sim1","method":"wash-acid-mv","sample_id":"TOKNAME-1","amount":10.0}'),
        token=TOKEN_LONG, headers={"Content-Type": "application/json"})
    assert r.status == 201, r.body
    rid = r.json()["id"]
    assert bench.request("POST", f"/v1/runs/{rid}/abort", token=TOKEN_OK).status == 200
    rec = bench.wait_state(rid, ("aborted",), timeout_s=30)
    # The whole record is there, with the name cut before the "ä", not inside it.
    assert rec["requested_by"] == "x" * 62, rec.get("requested_by")
    assert rec["sample"]["id"] == "TOKNAME-1" and rec["method"]["id"] == "wash-acid-mv"
    feed = bench.get("/v1/results?after=0&limit=1000")["results"]
    mine = next(x for x in feed if x["id"] == rid)
    assert "sample" in mine and "faults" in mine, mine
    ev = bench.get("/v1/events?limit=1000")["events"]
    assert any(e.get("run_id") == rid and e.get("actor") == "x" * 62 for e in ev), ev[-5:]
