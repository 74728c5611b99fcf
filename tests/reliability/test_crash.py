"""Crash suite (docs/reliability.md): SIGKILL of stopcockd at random instants
during runs, then a restart. After each kill:
- 0 acknowledged points lost: every point the API had returned before the
  kill is there after the restart, with the same measured values;
- `PRAGMA integrity_check` of the database says ok (checked while no daemon
  runs, before the restart opens it);
- the run is `interrupted` (or final, when the kill came after its end), and
  never resumes by itself;
- the first command the new daemon sends the burette is a halt
  (reliability_bench.PumpRelay sees every command line);
- no addition before a new authenticated start: no dose command on the pump
  line and no change of the simulator's count until the next POST /v1/runs,
  and a start without a token gets 401 and doses nothing.

STOPCOCK_KILLS sets the number of kills (default 50, `make soak` 1000),
spread over two benches that run at once."""
import os
import random
import signal
import sqlite3
import threading
import time

import pytest

import reliability_bench as rb

KILLS = int(os.environ.get("STOPCOCK_KILLS", "50"))
BENCHES = 2
KILL_WINDOW_S = 4.0   # kills fall uniformly in [0, 4) s after the start; a run takes ~6 s
DOSE_WORDS = ("DOSE", "FILL")   # the sim profile's commands that move the plunger


def integrity(db_path):
    con = sqlite3.connect(str(db_path), timeout=10)
    try:
        return con.execute("PRAGMA integrity_check").fetchall()
    finally:
        con.close()


def moving_commands(cmds):
    return [c for c in cmds if c.split(" ")[0] in DOSE_WORDS]


def kill_loop(bench, n, seed, stats):
    rng = random.Random(seed)
    db_path = bench.tmp / "state" / "stopcock.db"
    restart_t, sim_after_restart, resumed_queued = 0.0, 0.0, False
    for i in range(n):
        bench.wait_idle()
        # Since the last restart nothing may have moved the plunger (checked
        # just before this authenticated start).
        if i and not resumed_queued:
            cmds = bench.relay.since(restart_t)
            assert not moving_commands(cmds), ("dose before a new start", cmds)
            assert bench.sim_state()["dispensed_ml"] == sim_after_restart
        bench.fresh_beaker()
        rid = bench.start_fast(sample=f"KILL-{seed}-{i}")
        kill_at = time.monotonic() + rng.uniform(0.0, KILL_WINDOW_S)
        acked = []
        while time.monotonic() < kill_at:
            acked = bench.measured(rid)
            time.sleep(rng.uniform(0.0, 0.05))
        assert bench.stop_daemon(signal.SIGKILL) == -signal.SIGKILL
        moving = bench.sim_state()["moving"]   # the dead daemon's last dose still running
        ic = integrity(db_path)
        assert ic == [("ok",)], ic
        restart_t = time.monotonic()
        bench.start_daemon()
        cmds = bench.relay.since(restart_t)
        # The very first line the new daemon sends the burette is a halt:
        # the pump driver's open halts before its init and before any query.
        assert cmds, "the restarted daemon sent the burette nothing"
        assert cmds[0] == "HALT", ("first command after restart", cmds[:5])
        rec = bench.run(rid)
        after = bench.measured(rid)
        lost = sum(1 for k, p in enumerate(acked) if k >= len(after) or after[k] != p)
        with stats["lock"]:
            stats["kills"] += 1
            stats["acked"] += len(acked)
            stats["kept"] += len(acked) - lost
            stats["lost"] += lost
            stats["states"][rec["state"]] = stats["states"].get(rec["state"], 0) + 1
            stats["integrity_ok"] += 1
            stats["halt_first"] += 1
            stats["moving"] += moving
        assert lost == 0, ("acknowledged points lost", rid, acked, after)
        # A kill before the station took the run leaves it queued: it is queued
        # again at start-up, with no point and nothing dosed for it.
        assert rec["state"] in ("interrupted", "finished", "queued"), (
            rec["state"], rec["faults"], rec["stop_reason"], acked)
        if rec["state"] == "interrupted":
            assert rec["stop_reason"] == "interrupted", rec["stop_reason"]
            assert rec["ended_at"]
        if rec["state"] == "queued":
            assert acked == [] and after == [], (acked, after)
        assert bench.station()["run"] is None
        # Held until an operator resumes, when a run was on the station or queued.
        assert bench.station()["held"] is (rec["state"] in ("interrupted", "queued"))
        # Nothing moved between the restart and the operator's resume.
        cmds = bench.relay.since(restart_t)
        assert not moving_commands(cmds), ("dose before the resume", cmds)
        sim_after_restart = bench.sim_state()["dispensed_ml"]
        bench.resume()
        resumed_queued = rec["state"] == "queued"
        if resumed_queued:
            # The resume starts the run left queued; let it end before the next.
            deadline = time.monotonic() + 60
            while bench.run(rid)["state"] in ("queued", "running"):
                assert time.monotonic() < deadline, bench.run(rid)["state"]
                time.sleep(0.1)


@pytest.fixture(scope="module")
def benches(tmp_path_factory):
    bs = []
    try:
        for i in range(BENCHES):
            bs.append(rb.Bench(tmp_path_factory.mktemp(f"crash{i}"), pump_relay=True))
        yield bs
    finally:
        for b in bs:
            b.close()


def test_sigkill_at_random_instants(benches, request):
    stats = {"lock": threading.Lock(), "kills": 0, "acked": 0, "kept": 0, "lost": 0,
             "states": {}, "integrity_ok": 0, "halt_first": 0,
             "moving": 0}
    errors = []
    t0 = time.monotonic()

    def worker(i):
        try:
            kill_loop(benches[i], KILLS // BENCHES + (i < KILLS % BENCHES), i, stats)
        except BaseException as e:
            errors.append(e)

    threads = [threading.Thread(target=worker, args=(i,)) for i in range(BENCHES)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    took = time.monotonic() - t0
    rb.report(request, [
        f"crash: {stats['kills']} SIGKILLs in {took:.0f} s ({stats['moving']} with the plunger "
        f"moving); {stats['acked']} acknowledged "
        f"points compared, {stats['lost']} lost; integrity_check ok {stats['integrity_ok']}"
        f"/{stats['kills']}; first burette command after restart HALT "
        f"{stats['halt_first']}/{stats['kills']}; runs after restart: "
        + ", ".join(f"{k} {v}" for k, v in sorted(stats["states"].items()))])
    if errors:
        raise errors[0]
    assert stats["kills"] == KILLS


def test_no_dose_without_an_authenticated_start(benches):
    b = benches[0]
    b.wait_idle()
    b.fresh_beaker()
    t = time.monotonic()
    r = b.request("POST", "/v1/runs", '{"station":"sim1","method":"fast-acid-mv",'
                  '"sample_id":"NOAUTH","amount":10}', headers={"Content-Type":
                                                                "application/json"})
    assert r.status == 401
    time.sleep(1.0)
    assert not moving_commands(b.relay.since(t))
    assert b.sim_state()["dispensed_ml"] == 0.0
    assert b.station()["run"] is None
