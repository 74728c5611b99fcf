"""The audit trail through a real stopcockd on the simulated bench: each run
leaves a line when it starts and when it ends (finished, failed, aborted),
not only when it is queued, and `stopcock events` prints its columns in line
however long an event's name is."""
import os
import re
import subprocess
import time

import pytest

import daemon_bench as db


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("audit"))
    b.put_method()
    yield b
    b.close()


def run_events(bench, rid):
    evs = bench.get("/v1/events?after=0&limit=1000")["events"]
    return [(e["kind"], e["code"], e["actor"]) for e in evs if e.get("run_id") == rid]


def test_a_finished_run_is_recorded_from_queue_to_end(bench):
    bench.fresh_beaker()
    rid = bench.start_run(sample="AUDIT-1")
    rec = bench.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=90)
    assert rec["state"] == "finished", rec
    got = run_events(bench, rid)
    kinds = [(k, c) for k, c, _ in got]
    assert ("run", "queued") in kinds
    assert ("run", "started") in kinds
    assert ("run", "finished") in kinds
    assert kinds.index(("run", "queued")) < kinds.index(("run", "started")) \
        < kinds.index(("run", "finished"))
    assert dict(((k, c), a) for k, c, a in got)[("run", "finished")] == "daemon"


def test_an_aborted_run_is_recorded(bench):
    bench.fresh_beaker()
    rid = bench.start_run(sample="AUDIT-2")
    bench.wait_points(rid, 1, timeout_s=60)
    r = bench.write("POST", f"/v1/runs/{rid}/abort")
    assert r.status in (200, 202), r.body
    rec = bench.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=60)
    assert rec["state"] == "aborted", rec
    kinds = [(k, c) for k, c, _ in run_events(bench, rid)]
    assert ("run", "started") in kinds and ("run", "aborted") in kinds


def test_events_columns_line_up(bench, tmp_path):
    token = tmp_path / "token"
    token.write_text("audit:%s\n" % bench.token)
    env = dict(os.environ, STOPCOCK_URL=bench.url, STOPCOCK_TOKEN_FILE=str(token))
    r = subprocess.run([db.binary("stopcock"), "events", "--limit", "1000"], env=env,
                       capture_output=True, text=True, timeout=30)
    assert r.returncode == 0, r.stderr
    lines = r.stdout.splitlines()
    assert len(lines) >= 4
    # Each column starts where its header starts, on every row.
    header = lines[0]
    starts = [m.start() for m in re.finditer(r"\S+", header)]
    assert len(starts) == 7
    for line in lines[1:]:
        for s in starts[1:6]:
            assert line[s - 1] == " " and line[s] != " ", (header, line)


def test_a_crash_interrupted_run_is_recorded_at_the_next_start(bench):
    import signal
    bench.fresh_beaker()
    rid = bench.start_run(sample="AUDIT-3")
    bench.wait_points(rid, 1, timeout_s=60)
    bench.stop_daemon(sig=signal.SIGKILL)
    bench.start_daemon()
    assert bench.run(rid)["state"] == "interrupted"
    got = run_events(bench, rid)
    assert ("run", "interrupted", "daemon") in got, got
