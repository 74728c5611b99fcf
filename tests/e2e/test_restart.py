"""What a stop or a crash of stopcockd leaves behind (docs/lims.md, "Why a run
stopped"; docs/operations.md, "After a stop or a crash"): a run that was on the
station ends `interrupted` whether the daemon got SIGTERM or SIGKILL, its
stop_reason a code from the one documented list with the words apart; queued
runs survive; and after any start a station that had a running or queued run
is held, moving nothing, until an operator resumes it. Real stopcock-sim and
stopcockd (tests/e2e/daemon_bench.py)."""
import signal
import subprocess
import time

import pytest

import daemon_bench as db

STOP_CODES = {"endpoints_found", "volume_max", "signal_limit", "time_max", "fault", "aborted",
              "interrupted"}


@pytest.fixture
def bench(tmp_path):
    b = db.Bench(tmp_path)
    b.put_method()
    yield b
    b.close()


def running_with_points(bench, run, n=2):
    bench.wait_points(run, n)
    assert bench.run(run)["state"] == "running"


def cli(bench, *args):
    return subprocess.run([db.binary("stopcock"), *args, "--url", bench.url],
                          capture_output=True, text=True, timeout=30,
                          env={"STOPCOCK_TOKEN_FILE": str(bench.tmp / "token"), "PATH": "/usr/bin:/bin"})


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGKILL])
def test_a_stop_interrupts_keeps_the_queue_and_holds(bench, sig):
    bench.fresh_beaker()
    run = bench.start_run(sample="RESTART-1")
    queued = [bench.start_run(sample=f"RESTART-Q{i}") for i in (1, 2)]
    running_with_points(bench, run)
    pts_before = len(bench.get(f"/v1/runs/{run}/points")["points"])
    bench.daemon.send_signal(sig)
    bench.daemon.wait(timeout=15)
    t_stop = time.time()
    bench.start_daemon()

    rec = bench.run(run)
    assert rec["state"] == "interrupted", rec
    assert rec["stop_reason"] == "interrupted"
    assert rec["stop_reason"] in STOP_CODES
    assert rec["stop_detail"] and "daemon" in rec["stop_detail"]
    assert [f["code"] for f in rec["faults"]][-1:] == ["interrupted"], rec["faults"]
    assert len(bench.get(f"/v1/runs/{run}/points")["points"]) >= pts_before
    # ended_at: the last moment the daemon held the run, not the restart.
    ended = time.mktime(time.strptime(rec["ended_at"][:19], "%Y-%m-%dT%H:%M:%S")) - time.timezone
    assert ended <= t_stop + 1.0, (rec["ended_at"], t_stop)
    # The queued runs survive, still queued, and the station is held.
    for q in queued:
        assert bench.run(q)["state"] == "queued", bench.run(q)
    st = bench.station()
    assert st["held"] is True and st["state"] == "held", st
    assert st["held_reason"]
    assert st["queued"] == 2
    # Nothing moves while held.
    time.sleep(2.0)
    assert bench.run(queued[0])["state"] == "queued"
    assert bench.sim_state()["moving"] is False, bench.sim_state()
    r = cli(bench, "status")
    assert "held:" in r.stdout, r.stdout
    # An operator resumes (the CLI, as docs/operations.md says); the queue runs.
    r = cli(bench, "resume", "--station", "sim1")
    assert r.returncode == 0 and "resumed" in r.stdout, (r.stdout, r.stderr)
    assert bench.station()["held"] is False
    bench.wait_state(queued[0], ("running", "finished", "failed"), timeout_s=30)
    for q in queued:
        bench.write("POST", f"/v1/runs/{q}/abort")
        bench.wait_state(q, ("aborted",), timeout_s=30)
    ev = bench.get("/v1/events?limit=1000")["events"]
    assert any(e["kind"] == "resume" for e in ev), ev[-5:]


def test_resume_route_needs_the_token_and_a_station(bench):
    assert bench.request("POST", "/v1/stations/sim1/resume").status == 401
    assert bench.write("POST", "/v1/stations/nowhere/resume").status == 404
    r = bench.write("POST", "/v1/stations/sim1/resume")
    assert r.status == 200 and r.json()["resumed"] is False


def test_halt_and_abort_are_faults_with_words(bench):
    bench.fresh_beaker()
    run = bench.start_run(sample="RESTART-ABORT")
    running_with_points(bench, run)
    bench.write("POST", f"/v1/runs/{run}/abort")
    rec = bench.wait_state(run, ("aborted",))
    assert rec["stop_reason"] == "aborted" and rec["stop_detail"]
    assert [f["code"] for f in rec["faults"]] == ["aborted"], rec["faults"]
    bench.fresh_beaker()
    run = bench.start_run(sample="RESTART-HALT")
    running_with_points(bench, run)
    bench.write("POST", "/v1/stations/sim1/halt")
    rec = bench.wait_state(run, ("aborted",))
    assert [f["code"] for f in rec["faults"]] == ["halted"], rec["faults"]
