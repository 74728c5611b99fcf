"""The audit trail is a hash chain (docs/operations.md, "Checking the audit
trail"): through a real stopcockd, someone edits one event row with the
sqlite3 tool, and GET /v1/events/verify and `stopcock events --verify` name
that event; put back, the chain holds again."""
import os
import subprocess

import pytest

import daemon_bench as db


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("chain"))
    b.put_method()
    for _ in range(2):
        assert b.write("POST", "/v1/stations/sim1/halt").status == 200
    yield b
    b.close()


def database(bench):
    for line in bench.config.read_text().splitlines():
        if line.strip().startswith("database:"):
            p = line.split(":", 1)[1].strip().strip('"')
            return p if os.path.isabs(p) else str(bench.config.parent / p)
    raise AssertionError("no database: in the config")


def sql(bench, statement):
    r = subprocess.run(["sqlite3", "-cmd", ".timeout 5000", database(bench), statement],
                       capture_output=True, text=True, timeout=30)
    assert r.returncode == 0, r.stderr
    return r.stdout.strip()


def cli_verify(bench):
    env = dict(os.environ, STOPCOCK_URL=bench.url)
    return subprocess.run([db.binary("stopcock"), "events", "--verify"], env=env,
                          capture_output=True, text=True, timeout=30)


def test_an_edited_row_is_named_and_a_restored_one_passes(bench):
    v = bench.get("/v1/events/verify")
    assert v["ok"] and v["first_broken"] is None, v
    events = bench.get("/v1/events?after=0&limit=1000")["events"]
    assert v["checked"] == len(events) >= 3
    assert v["head"] == {"id": events[-1]["id"], "hash": events[-1]["hash"]}
    r = cli_verify(bench)
    assert r.returncode == 0 and "intact" in r.stdout, r.stdout + r.stderr

    victim = events[1]
    original = sql(bench, f"SELECT actor FROM events WHERE id={victim['id']}")
    sql(bench, f"UPDATE events SET actor='mallory' WHERE id={victim['id']}")
    v = bench.get("/v1/events/verify")
    assert not v["ok"] and v["first_broken"]["id"] == victim["id"], v
    r = cli_verify(bench)
    assert r.returncode == 1, r.stdout + r.stderr
    assert f"BROKEN at event {victim['id']} " in r.stdout, r.stdout

    sql(bench, f"UPDATE events SET actor='{original}' WHERE id={victim['id']}")
    assert bench.get("/v1/events/verify")["ok"]


def test_new_events_keep_chaining(bench):
    assert bench.write("POST", "/v1/stations/sim1/resume").status == 200
    v = bench.get("/v1/events/verify")
    assert v["ok"], v
    last = bench.get("/v1/events?after=0&limit=1000")["events"][-1]
    assert v["head"]["id"] == last["id"] and len(last["hash"]) == 64
