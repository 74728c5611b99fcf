"""Series through a real stopcockd on the simulated bench (docs/api.md,
"Series"), one daemon for the module. The bench has no sample changer, so
the series waits for the operator before every beaker after the first; the
test plays the operator: it loads the next beaker into the simulator and
sends `next`. Each beaker is its own scenario, so the replicates differ by
known amounts:

  - duplicates of two samples: each run's result against its beaker's
    stoichiometry, the statistics against a hand computation;
  - on_failure stop and continue, with a result above the method's limit;
  - a device fault mid-series stops it whatever on_failure says;
  - SIGKILL mid-series: the series and its run end interrupted, the finished
    sample keeps its result, nothing is queued after the restart;
  - the series feed gives each final series once, in order, across a restart;
  - the notify command receives the events (series finished and stopped, a
    device fault, a failed run) as JSON on its input and in its environment.
"""
import json
import math
import signal
import subprocess
import time

import pytest
import yaml

import daemon_bench as db
from common import ROOT, binary

METHOD = db.DATA / "fast-acid-rep-mv.yaml"
# The simulator's pump profile at its top speed, as tests/reliability uses it:
# a beaker takes seconds.
FAST_PUMP = ROOT / "tests" / "data" / "reliability" / "sim-fast.yaml"


class FastBench(db.Bench):
    def start_daemon(self, *args, **kw):
        cfg = yaml.safe_load(self.config.read_text())
        cfg["stations"][0]["burette"]["profile"] = str(FAST_PUMP)
        self.config.write_text(yaml.safe_dump(cfg, sort_keys=False))
        return super().start_daemon(*args, **kw)


# notify_command: a small script that files each event's JSON (its standard
# input) and three of its environment variables, one line each.
NOTIFY = """#!/bin/sh
{ cat; echo "env $STOPCOCK_EVENT station=$STOPCOCK_STATION series=$STOPCOCK_SERIES"; } >> "$1"
echo "told $STOPCOCK_EVENT"
"""


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("series")
    script = tmp / "alarm.sh"
    script.write_text(NOTIFY)
    script.chmod(0o755)
    b = FastBench(tmp, extra_config=f"notify_command: [{script}, {tmp / 'alarms.txt'}]\n"
                                   "notify_timeout_s: 5\n")
    b.put_method(METHOD)
    yield b
    b.close()


def load_beaker(bench, molar):
    """Put a beaker of 10 mL wash water with `molar` mol/L HCl in place."""
    text = db.SCENARIO.read_text().replace("molar: 0.0200", f"molar: {molar:.4f}")
    assert f"molar: {molar:.4f}" in text
    path = bench.tmp / f"beaker-{molar:.4f}.yaml"
    path.write_text(text)
    assert bench.control(f"load {path}") == "ok"


def post_series(bench, samples, on_failure=None):
    body = {"station": "sim1", "samples": samples}
    if on_failure:
        body["on_failure"] = on_failure
    r = bench.write("POST", "/v1/series", json.dumps(body))
    assert r.status == 201, r.body
    assert r.json()["state"] == "queued"
    return r.json()["id"]


def sample(sid, positions=None):
    s = {"sample_id": sid, "method": "fast-acid-rep-mv", "amount": 10.0}
    if positions:
        s["position"] = positions
    return s


def run_series(bench, sid, beakers, timeout_s=120):
    """Play the operator: before each beaker after the first the series
    asks (`waiting`, `prompt`); load the next beaker and say `next`."""
    deadline = time.monotonic() + timeout_s
    placed = 1
    while True:
        s = bench.get(f"/v1/series/{sid}")
        if s["state"] not in ("queued", "running"):
            return s
        if s["waiting"]:
            assert s["prompt"] and f"series next {sid}" in s["prompt"], s
            # The station shows the same prompt (the page reads it there).
            assert bench.station()["series"] == {"id": sid, "state": "running",
                                                 "prompt": s["prompt"]}
            load_beaker(bench, beakers[placed])
            placed += 1
            r = bench.write("POST", f"/v1/series/{sid}/next")
            assert r.status == 202, r.body
        assert time.monotonic() < deadline, s
        time.sleep(0.1)


def result(bench, rid):
    rec = bench.run(rid)
    assert rec["state"] == "finished", rec
    return next(x["value"] for x in rec["results"] if x["name"] == "acid")


def hand_stats(values):
    n = len(values)
    mean = sum(values) / n
    sd = math.sqrt(sum((v - mean) ** 2 for v in values) / (n - 1))
    return n, mean, sd, 100 * sd / abs(mean)


@pytest.fixture(scope="module")
def duplicates(bench):
    # Two samples in duplicate: 0.0200/0.0202 and 0.0190/0.0193 mol/L.
    beakers = [0.0200, 0.0202, 0.0190, 0.0193]
    load_beaker(bench, beakers[0])
    sid = post_series(bench, [sample("WW-0412", [1, 2]), sample("WW-0413", [3, 4])])
    return sid, beakers, run_series(bench, sid, beakers)


def test_duplicates_finish_with_hand_computed_statistics(bench, duplicates):
    sid, beakers, s = duplicates
    assert s["state"] == "finished", s
    assert [len(x["runs"]) for x in s["samples"]] == [2, 2]
    runs = [r for x in s["samples"] for r in x["runs"]]
    # Each beaker's result against its stoichiometry: acid = c x 1000 mmol/L.
    for rid, c in zip(runs, beakers):
        assert result(bench, rid) == pytest.approx(c * 1000, rel=0.015), (rid, c)
        assert bench.run(rid)["series"] == sid
    for x in s["samples"]:
        values = [result(bench, r) for r in x["runs"]]
        n, mean, sd, rsd = hand_stats(values)
        st = x["stats"]["acid"]
        assert st["n"] == n == 2
        assert st["mean"] == pytest.approx(mean, rel=1e-9)
        assert st["sd"] == pytest.approx(sd, rel=1e-6)
        assert st["rsd_pct"] == pytest.approx(rsd, rel=1e-6)
        # The beakers differ by 1 % and 1.6 %: the RSD is under the method's 2 %.
        assert st["accept"] == ("pass" if rsd <= 2.0 else "high")
        assert st["outliers"] == []
    # The first sample's RSD: 0.0200 and 0.0202 give about 0.70 %.
    assert s["samples"][0]["stats"]["acid"]["rsd_pct"] == pytest.approx(0.70, abs=0.2)
    assert s["ended_at"] and s["detail"] is None and s["seq"] >= 1


def test_positions_fewer_than_the_method_count_are_refused(bench):
    r = bench.write("POST", "/v1/series", json.dumps(
        {"station": "sim1", "samples": [sample("WW-1", [1])]}))
    assert r.status == 400 and "asks for 2 replicates" in r.json()["error"]["message"], r.body
    r = bench.write("POST", "/v1/series", json.dumps(
        {"station": "sim1", "samples": [sample("WW-1", [1, 2])], "on_failure": "maybe"}))
    assert r.status == 400, r.body
    r = bench.write("POST", "/v1/series", json.dumps(
        {"station": "sim1", "samples": [dict(sample("WW-1"), method="no-such")]}))
    assert r.status == 404, r.body


def test_on_failure_stop_ends_the_series_at_the_first_failure(bench, duplicates):
    # 0.0220 mol/L gives 22 mmol/L, above the method's 21: a chemistry outcome.
    load_beaker(bench, 0.0220)
    sid = post_series(bench, [sample("HIGH-1", [1, 2]), sample("OK-2", [3, 4])])
    s = run_series(bench, sid, [0.0220, 0.0200, 0.0200, 0.0200])
    assert s["state"] == "failed", s
    assert "on_failure is stop" in s["detail"] and "high" in s["detail"], s
    assert len(s["samples"][0]["runs"]) == 1
    assert s["samples"][1]["runs"] == []


def cli(bench, *args, timeout=60):
    return subprocess.run([binary("stopcock"), *map(str, args), "--url", bench.url,
                           "--token-file", str(bench.tmp / "token")],
                          capture_output=True, text=True, timeout=timeout)


def test_on_failure_continue_titrates_every_beaker_through_the_cli(bench, duplicates):
    # The same first beaker; the series goes on to the second. Queued,
    # moved on and followed with `stopcock series`.
    wl = bench.tmp / "continue.csv"
    wl.write_text("sample_id,method,amount,position,factor:dilution\r\n"
                  "HIGH-1,fast-acid-rep-mv,10.0,1;2,2\r\n")
    load_beaker(bench, 0.0220)
    p = cli(bench, "series", "start", "--station", "sim1", "--on-failure", "continue", wl)
    assert p.returncode == 0, p.stderr
    sid = int(p.stdout.strip())
    deadline = time.monotonic() + 90
    while not (s := bench.get(f"/v1/series/{sid}"))["waiting"]:
        assert time.monotonic() < deadline and s["state"] in ("queued", "running"), s
        time.sleep(0.1)
    # `stopcock status` shows the series under its station, with the prompt
    p = cli(bench, "status")
    assert p.returncode == 0, p.stderr
    assert f"\n  series {sid}: running, waiting: {s['prompt']}\n" in p.stdout, p.stdout
    load_beaker(bench, 0.0220)
    p = cli(bench, "series", "next", sid)
    assert p.returncode == 0 and "next beaker in place" in p.stdout, p.stderr
    p = cli(bench, "series", "wait", sid, timeout=90)
    assert p.returncode == 0, (p.stdout, p.stderr)
    assert f"series {sid} on sim1: finished (on_failure continue)" in p.stdout, p.stdout
    assert "acid: n 2, mean 22." in p.stdout, p.stdout
    s = bench.get(f"/v1/series/{sid}")
    assert s["state"] == "finished", s
    assert s["samples"][0]["factors"] == {"dilution": 2.0}
    assert len(s["samples"][0]["runs"]) == 2
    for rid in s["samples"][0]["runs"]:
        assert next(x["accept"] for x in bench.run(rid)["results"]) == "high"
    # The results out of limits still count in the statistics: they are values.
    assert s["samples"][0]["stats"]["acid"]["n"] == 2
    assert s["samples"][0]["stats"]["acid"]["mean"] == pytest.approx(22.0, rel=0.015)
    p = cli(bench, "series", "show", sid)
    assert p.returncode == 0 and "HIGH-1 (fast-acid-rep-mv, 10): runs" in p.stdout, p.stdout
    p = cli(bench, "series", "next", sid)
    assert p.returncode == 1 and "already finished" in p.stderr, p.stderr


def test_work_list_errors_are_file_row_column_and_nothing_is_sent(bench):
    before = bench.get("/v1/series?limit=1000")["series"]
    wl = bench.tmp / "bad.csv"
    wl.write_text("sample_id,method,amount,position,colour\n"
                  "A-1,fast-acid-rep-mv,ten,1;x,red\n"
                  "A-2,fast-acid-rep-mv,weigh,3;4,blue\n"
                  ",fast-acid-rep-mv,10\n")
    p = cli(bench, "series", "start", "--station", "sim1", wl)
    assert p.returncode == 2, p
    lines = p.stderr.strip().splitlines()
    assert lines == [
        f"{wl}:1:5: unknown column 'colour' (columns: sample_id, method, amount, position, "
        "factor:NAME)",
        f"{wl}:2:3: amount must be a number above 0, not 'ten'",
        f"{wl}:2:4: position 'x' is not a whole number 1 to 999",
        f"{wl}:4:4: the row has 3 fields, the header 5",
    ], p.stderr
    wl.write_text("sample_id,method\n")
    p = cli(bench, "series", "start", "--station", "sim1", wl)
    assert p.returncode == 2 and f"{wl}:1:1: the header has no column amount" in p.stderr
    # The daemon refuses what the file alone cannot show: fewer positions than
    # the method's replicates.
    wl.write_text("sample_id,method,amount,position\nA-1,fast-acid-rep-mv,10,1\n")
    p = cli(bench, "series", "start", "--station", "sim1", wl)
    assert p.returncode == 1 and "asks for 2 replicates" in p.stderr, p.stderr
    # "weigh" passes the file; this bench's station has no balance to weigh with.
    wl.write_text("sample_id,method,amount,position\nA-1,fast-acid-rep-mv,weigh,1;2\n")
    p = cli(bench, "series", "start", "--station", "sim1", wl)
    assert p.returncode == 1 and "this station has no balance:" in p.stderr, p.stderr
    assert bench.get("/v1/series?limit=1000")["series"] == before


def test_device_fault_stops_the_series_even_with_continue(bench, duplicates):
    load_beaker(bench, 0.0200)
    sid = post_series(bench, [sample("F-1", [1, 2])], on_failure="continue")
    deadline = time.monotonic() + 30
    while not (s := bench.get(f"/v1/series/{sid}"))["current_run"]:
        assert time.monotonic() < deadline, s
        time.sleep(0.05)
    rid = s["current_run"]
    bench.wait_points(rid, 2)
    assert bench.control("fault stall") == "ok"
    try:
        deadline = time.monotonic() + 30
        while (s := bench.get(f"/v1/series/{sid}"))["state"] in ("queued", "running"):
            assert time.monotonic() < deadline, s
            time.sleep(0.1)
    finally:
        assert bench.control("clear") == "ok"
    assert s["state"] == "failed", s
    assert "device fault" in s["detail"], s
    assert bench.run(rid)["stop_reason"] == "fault"
    assert len(s["samples"][0]["runs"]) == 1, "nothing is queued after a device fault"


def test_sigkill_mid_series_ends_it_interrupted_and_the_feed_is_exactly_once(bench,
                                                                             duplicates):
    # Wait until the station is idle again after the fault test.
    deadline = time.monotonic() + 30
    while bench.station()["state"] != "idle":
        assert time.monotonic() < deadline
        time.sleep(0.1)
    before = bench.get("/v1/series/feed?after=0")
    cursor = before["next_after"]
    load_beaker(bench, 0.0200)
    sid = post_series(bench, [sample("K-1", [1, 2]), sample("K-2", [3, 4])])
    # The first beaker finishes, the series asks for the second; the operator
    # places it and the daemon dies while it is titrated.
    deadline = time.monotonic() + 60
    while not (s := bench.get(f"/v1/series/{sid}"))["waiting"]:
        assert time.monotonic() < deadline, s
        time.sleep(0.1)
    first = s["samples"][0]["runs"][0]
    load_beaker(bench, 0.0202)
    assert bench.write("POST", f"/v1/series/{sid}/next").status == 202
    while not (s := bench.get(f"/v1/series/{sid}"))["current_run"]:
        assert time.monotonic() < deadline, s
        time.sleep(0.05)
    cut = s["current_run"]
    bench.wait_points(cut, 1)
    bench.daemon.send_signal(signal.SIGKILL)
    bench.daemon.wait(timeout=10)
    bench.start_daemon()
    s = bench.get(f"/v1/series/{sid}")
    assert s["state"] == "interrupted", s
    assert "never resumed" in s["detail"], s
    assert bench.run(cut)["state"] == "interrupted"
    assert bench.run(first)["state"] == "finished"
    assert result(bench, first) == pytest.approx(20.0, rel=0.01)
    # Nothing moves: no run of the series is queued or running.
    time.sleep(1.0)
    s2 = bench.get(f"/v1/series/{sid}")
    assert s2["samples"][1]["runs"] == [] and s2["state"] == "interrupted", s2
    assert not [r for r in bench.get("/v1/runs?state=queued")["runs"]]
    st = bench.station()
    assert st["run"] is None and st["state"] == "held", st
    # The feed: every series that ended, once, in order, the interrupted one last.
    page = bench.get(f"/v1/series/feed?after={cursor}")
    assert [x["id"] for x in page["series"]] == [sid]
    everything = bench.get("/v1/series/feed?after=0")
    seqs = [x["seq"] for x in everything["series"]]
    assert seqs == sorted(seqs) and len(set(seqs)) == len(seqs)
    ids = [x["id"] for x in everything["series"]]
    assert len(set(ids)) == len(ids)
    assert duplicates[0] in ids
    # Across a clean restart: nothing new after the cursor, nothing repeated.
    assert bench.stop_daemon() == 0
    bench.start_daemon()
    assert bench.get(f"/v1/series/feed?after={page['next_after']}")["series"] == []
    assert [x["id"] for x in bench.get("/v1/series/feed?after=0")["series"]] == ids
    bench.resume()


def alarms(bench):
    path = bench.tmp / "alarms.txt"
    if not path.exists():
        return [], []
    lines = path.read_text().splitlines()
    return [json.loads(x) for x in lines if x.startswith("{")], \
        [x for x in lines if x.startswith("env ")]


def test_notify_command_receives_the_events(bench, duplicates):
    # Every series of this module has ended by now; the alarms follow
    # within a poll of the audit trail.
    deadline = time.monotonic() + 10
    while True:
        events, env = alarms(bench)
        kinds = [e["event"] for e in events]
        if {"series_finished", "series_stopped", "device_fault", "run_failed"} <= set(kinds):
            break
        assert time.monotonic() < deadline, kinds
        time.sleep(0.2)
    sid = duplicates[0]
    done = next(e for e in events if e["event"] == "series_finished")
    assert done["series"] == sid and done["station"] == "sim1", done
    assert f"env series_finished station=sim1 series={sid}" in env
    fault = next(e for e in events if e["event"] == "device_fault")
    assert fault["run"] and fault["code"] and fault["message"], fault
    stopped = [e for e in events if e["event"] == "series_stopped"]
    assert any("on_failure is stop" in e["message"] for e in stopped), stopped
    assert any("device fault" in e["message"] for e in stopped), stopped
    # The series SIGKILL cut: told by the next daemon.
    assert any(e["code"] == "interrupted" for e in stopped), stopped
    # Each event once: the restarts did not send old ones again.
    keys = [(e["event"], e["at"], e["message"]) for e in events]
    assert len(keys) == len(set(keys)), keys
    # The program's output is in the daemon's log.
    log = (bench.tmp / "daemon.log").read_text(errors="replace")
    assert "notify_command (series_finished): told series_finished" in log
